"""Robust catenary fit of one wire in one span, with confidence intervals.

The wire hangs in a plane that contains the chord between its attachments; without wind the
plane is vertical, in wind it swings about the chord by the *tilt* angle (blowout). The fit:

1. drops non-finite points and finds the wire's horizontal direction by a robust line fit in xy
   (iteratively reweighted principal axis);
2. sets the stations (horizontal distance along that direction): the projections of the two
   structures when their positions are given (station 0 = A, station L = B; partial spans are
   extrapolated to the attachments), else the extent of the points;
3. fits, with a robust loss (``soft_l1`` or ``huber`` with scale ``f_scale_m``, as defined by
   :func:`scipy.optimize.least_squares`; minimised by a damped Gauss-Newton loop, checked
   against least_squares), the parameters

   ``(z_a, z_b, ln C, y_a, y_b, tilt)``

   -- attachment heights [m], log of the catenary constant [ln m], lateral offsets of the
   attachments from the direction line [m] (these refine the direction), and the tilt [rad] --
   to the lateral and vertical residuals of every point (normalised to first-order distance
   from the curve); the frame is then re-aligned with the fitted chord (and, without supports,
   trimmed to the inlier extent) and the fit repeated once;
4. computes 95 % confidence half-widths from the parameter covariance and propagates them to
   the sag by the delta method.

Curve model in the span frame (station s, lateral offset v, height z):

.. math::
    v(s) = y_a + (y_b - y_a)\\frac{s}{L} + d(\\xi)\\sin\\varphi,\\qquad
    z(s) = z_a + h\\frac{s}{L} - d(\\xi)\\cos\\varphi

with :math:`h = z_b - z_a`, and :math:`d` the in-plane deflection below the chord of a catenary
of constant :math:`C` over the in-plane span :math:`L' = \\sqrt{L^2 + h^2\\sin^2\\varphi}` with
height difference :math:`h' = h\\cos\\varphi`, at :math:`\\xi = sL'/L`
(:func:`clearaudit.physics.catenary.chord_deflection`). This is the exact geometry of a
catenary whose plane is rotated by :math:`\\varphi` about its chord; positive tilt swings the wire
towards the left of the direction A -> B. For :math:`\\varphi = 0` it is the vertical catenary.
``C`` and the sag are those in the wire's plane: ``H = w C`` with ``w`` the load per unit length
in that plane (the resultant of weight and wind when the plane is tilted).

Residuals: lateral :math:`(v_i - v(s_i))/\\sqrt{1 + v'^2}` and vertical
:math:`(z_i - z(s_i))/\\sqrt{1 + z'^2}` (first-order distance normal to the curve).

Residual balance: after the first pass the lateral residuals are weighted by
sigma_vertical / sigma_lateral (robust MAD scales, clipped to 0.1..10), so a laterally spread
bundle or anisotropic scanner noise does not dominate the vertical information. The first pass
uses at most 500 points spread along the span; the second pass uses all of them.

Uncertainty: M-estimator ("sandwich") covariance ([2]_, ch. 7)

.. math:: \\operatorname{Cov} = \\frac{m}{m - p}\\,A^{-1} B A^{-1},\\quad
          A = J^T \\operatorname{diag}(\\psi'(r_i)) J,\\quad
          B = J^T \\operatorname{diag}(\\psi(r_i)^2) J

with :math:`\\psi = \\rho'` the influence function of the loss, :math:`J` the Jacobian of the
residuals (central differences), :math:`m` residuals and :math:`p` parameters. For the linear
loss and equal residual variances it reduces to :math:`s^2 (J^TJ)^{-1}`; with a robust loss the
residual scale is the robust-weighted one, and lateral and vertical residuals may have
different scales. Half-widths use Student's t with :math:`m - p` degrees of freedom; derived
quantities (C, sag) by the delta method [1]_. Measured coverage of the 95 % intervals on
synthetic spans: see ``benchmarks/bench_fit_coverage.py``.

Coverage: the span [0, L] is cut into 1-m bins; ``coverage`` is the fraction of bins that hold
at least one inlier point. ``largest_gap_m`` is the longest stretch of [0, L] without inlier
points, including the stretches from each support to the first point.

Inliers: points whose (balanced) residual distance is below max(3 f_scale, 4 sigma) with sigma
the MAD-based scale of the residual components. ``rms_m`` is the root mean square residual
distance of the inliers.

The fit never raises for bad data: it returns ``ok=False`` with a reason. Bad arguments (wrong
array shape, unknown loss) raise ValueError.

References
----------
.. [1] Seber, G. A. F. and Wild, C. J. (1989). *Nonlinear Regression*. Wiley, ch. 5
   (asymptotic covariance, delta method).
.. [2] Huber, P. J. and Ronchetti, E. M. (2009). *Robust Statistics*, 2nd ed. Wiley, ch. 7
   (regression M-estimators and their covariance).
.. [3] Irvine, H. M. (1981). *Cable Structures*. MIT Press, ch. 1.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike
from scipy import special

from clearaudit.arrays import median_1d
from clearaudit.physics import catenary
from clearaudit.physics._catenary_residuals import LOSSES as _LOSS_CODES
from clearaudit.physics._catenary_residuals import catenary_residuals as _compiled_residuals
from clearaudit.physics._catenary_residuals import minimise as _compiled_minimise

__all__ = ["PARAMETER_NAMES", "CatenaryFit", "fit_catenary"]

PARAMETER_NAMES = ("z_a_m", "z_b_m", "log_catenary_constant", "lateral_a_m", "lateral_b_m",
                   "tilt_rad")
"""Order of the parameters in :attr:`CatenaryFit.covariance`."""

_LOSSES = ("soft_l1", "huber", "linear", "cauchy", "arctan")
_MAX_CONSTANT_M = 1e5          # beyond the breaking length of any conductor material
_MIN_CONSTANT_PER_SPAN = 0.25  # C < L/4 means sag > half the span: not a power line
_MAX_TILT_RAD = 1.4
_BIN_M = 1.0
_FIRST_PASS_POINTS = 500


@dataclass(eq=False)
class CatenaryFit:
    """Result of :func:`fit_catenary`: one wire in one span (local metres).

    Attributes
    ----------
    ok, reason
        Whether the fit succeeded; when not, ``reason`` says why ("" when ok).
    n_points, n_inliers
        Points given; points within the inlier distance of the fitted curve.
    origin_xy
        Horizontal position of attachment A = station 0 (shape (2,)). [m]
    direction
        Unit horizontal vector from A towards B (shape (2,)).
    span_length_m
        Horizontal distance from station 0 to station L. [m]
    tilt_rad, tilt_ci95_rad
        Swing of the wire plane from vertical about the chord (positive to the left of A -> B)
        and its 95 % half-width. [rad]
    catenary_constant_m, catenary_constant_ci95_m
        C = H/w in the wire plane and its 95 % half-width. [m]
    z_a_m, z_a_ci95_m, z_b_m, z_b_ci95_m
        Attachment heights (local z) and their 95 % half-widths. [m]
    sag_m, sag_ci95_m
        Sag in the wire plane (largest chord-to-conductor distance) and its 95 % half-width. [m]
    rms_m
        Root mean square residual distance of the inliers. [m]
    coverage
        Fraction (0..1) of the 1-m bins of [0, L] holding at least one inlier point.
    largest_gap_m
        Longest stretch of [0, L] without inlier points, ends included. [m]
    station_min_m, station_max_m
        Extent of the inlier points along the span. [m]
    covariance
        Parameter covariance, order :data:`PARAMETER_NAMES` (tilt row zero when not fitted).
        [m², ln m, rad]
    """

    ok: bool
    reason: str
    n_points: int
    n_inliers: int
    origin_xy: np.ndarray
    direction: np.ndarray
    span_length_m: float
    tilt_rad: float
    tilt_ci95_rad: float
    catenary_constant_m: float
    catenary_constant_ci95_m: float
    z_a_m: float
    z_a_ci95_m: float
    z_b_m: float
    z_b_ci95_m: float
    sag_m: float
    sag_ci95_m: float
    rms_m: float
    coverage: float
    largest_gap_m: float
    station_min_m: float
    station_max_m: float
    covariance: np.ndarray = field(default_factory=lambda: np.full((6, 6), np.nan))

    def point_at(self, station_m: ArrayLike) -> np.ndarray:
        """Points on the fitted curve.

        Parameters
        ----------
        station_m
            Horizontal distances from attachment A along the span. [m]

        Returns
        -------
        xyz : numpy.ndarray
            Shape (k, 3), local metres.
        """
        s = np.atleast_1d(np.asarray(station_m, dtype=float))
        if not self.ok:
            return np.full((s.size, 3), np.nan)
        lateral, z = _curve(s, self.span_length_m, self.z_a_m, self.z_b_m,
                            self.catenary_constant_m, 0.0, 0.0, self.tilt_rad)
        normal = np.array([-self.direction[1], self.direction[0]])
        xy = self.origin_xy + s[:, None] * self.direction + lateral[:, None] * normal
        return np.column_stack([xy, z])

    def curve(self, n: int = 200) -> np.ndarray:
        """``n`` points on the fitted curve from A to B, shape (n, 3). [m]"""
        if n < 2:
            raise ValueError("A curve needs at least two points.")
        return self.point_at(np.linspace(0.0, self.span_length_m, n))

    def horizontal_tension_n(self, unit_weight_n_per_m: float) -> tuple[float, float]:
        """Horizontal tension H = w C and its 95 % half-width.

        Parameters
        ----------
        unit_weight_n_per_m
            Load per unit length acting in the wire's plane (the weight, or the resultant of
            weight and wind for a tilted plane). [N/m]

        Returns
        -------
        (H, H_ci95) : tuple of float
            [N]
        """
        w = float(unit_weight_n_per_m)
        if not (w > 0 and np.isfinite(w)):
            raise ValueError("The unit weight must be positive and finite.")
        return w * self.catenary_constant_m, w * self.catenary_constant_ci95_m

    @property
    def attachment_a(self) -> np.ndarray:
        """Attachment A (station 0), shape (3,), local metres."""
        return self.point_at(0.0)[0]

    @property
    def attachment_b(self) -> np.ndarray:
        """Attachment B (station L), shape (3,), local metres."""
        return self.point_at(self.span_length_m)[0]

    def as_dict(self) -> dict[str, Any]:
        """Plain-Python dictionary of every field (for JSON)."""
        out: dict[str, Any] = {}
        for name in self.__dataclass_fields__:
            value = getattr(self, name)
            out[name] = value.tolist() if isinstance(value, np.ndarray) else value
        out["parameter_names"] = list(PARAMETER_NAMES)
        return out


def _failed(reason: str, n_points: int, **known: Any) -> CatenaryFit:
    nan = float("nan")
    values: dict[str, Any] = dict(
        ok=False, reason=reason, n_points=n_points, n_inliers=0,
        origin_xy=np.full(2, np.nan), direction=np.full(2, np.nan), span_length_m=nan,
        tilt_rad=nan, tilt_ci95_rad=nan, catenary_constant_m=nan, catenary_constant_ci95_m=nan,
        z_a_m=nan, z_a_ci95_m=nan, z_b_m=nan, z_b_ci95_m=nan, sag_m=nan, sag_ci95_m=nan,
        rms_m=nan, coverage=0.0, largest_gap_m=nan, station_min_m=nan, station_max_m=nan)
    values.update(known)
    return CatenaryFit(**values)


def _curve(s, span, z_a, z_b, constant, y_a, y_b, tilt, with_slopes=False):
    """Lateral offset and height of the model at stations ``s`` (see module notes).

    The catenary formulas of :mod:`clearaudit.physics.catenary` (low point, product form of the
    height, slope) are evaluated inline so the low point is computed once per call.
    """
    h = z_b - z_a
    sin_t, cos_t = np.sin(tilt), np.cos(tilt)
    plane_span = np.hypot(span, h * sin_t)
    plane_h = h * cos_t
    scale = plane_span / span
    xi = s * scale
    half = 0.5 / constant
    x0 = 0.5 * plane_span - constant * np.arcsinh(
        plane_h * half / np.sinh(plane_span * half))
    height = 2.0 * constant * np.sinh((xi - 2.0 * x0) * half) * np.sinh(xi * half)
    deflection = plane_h * xi / plane_span - height
    lateral = y_a + (y_b - y_a) * s / span + deflection * sin_t
    z = z_a + h * s / span - deflection * cos_t
    if not with_slopes:
        return lateral, z
    d_slope = (plane_h / plane_span - np.sinh((xi - x0) / constant)) * scale
    return lateral, z, (y_b - y_a) / span + d_slope * sin_t, h / span - d_slope * cos_t


def _robust_direction(xy: np.ndarray, f_scale: float) -> tuple[np.ndarray, np.ndarray]:
    """Centre and unit direction of a robust (IRLS principal axis) line through ``xy``."""
    weights = np.ones(len(xy))
    centre = xy.mean(axis=0)
    direction = np.array([1.0, 0.0])
    for _ in range(6):
        centre = (weights[:, None] * xy).sum(axis=0) / weights.sum()
        d = xy - centre
        cov = (weights[:, None] * d).T @ d / weights.sum()
        _, vectors = np.linalg.eigh(cov)
        direction = vectors[:, -1]
        distance = np.abs(d @ np.array([-direction[1], direction[0]]))
        scale = max(1.4826 * median_1d(distance), f_scale)
        weights = np.minimum(1.0, 2.0 * scale / np.maximum(distance, 1e-12))  # Huber
    return centre, direction / np.hypot(*direction)


def _psi(r: np.ndarray, loss: str, f_scale: float) -> tuple[np.ndarray, np.ndarray]:
    """Influence function psi(r) = rho'(r) and its derivative for scipy's losses."""
    u = r / f_scale
    if loss == "soft_l1":
        q = 1.0 + u * u
        return r / np.sqrt(q), q**-1.5
    if loss == "huber":
        inside = np.abs(u) <= 1.0
        return np.where(inside, r, f_scale * np.sign(r)), inside.astype(float)
    if loss == "cauchy":
        q = 1.0 + u * u
        return r / q, (1.0 - u * u) / q**2
    if loss == "arctan":
        q = 1.0 + u**4
        return r / q, (1.0 - 3.0 * u**4) / q**2
    return r, np.ones_like(r)


def _coverage(stations: np.ndarray, span: float) -> tuple[float, float]:
    n_bins = max(1, int(np.ceil(span / _BIN_M - 1e-9)))
    inside = stations[(stations >= 0.0) & (stations <= span)]
    bins = np.clip(np.floor(inside / _BIN_M).astype(int), 0, n_bins - 1)
    coverage = np.unique(bins).size / n_bins
    edges = np.concatenate([[0.0], np.sort(inside), [span]])
    return float(coverage), float(np.max(np.diff(edges)))


def _one_sided(stations: np.ndarray, span: float) -> bool:
    """True when (almost) all points lie in one end third of [0, L]."""
    n = stations.size
    allowance = max(3, int(0.02 * n))
    beyond_first = np.count_nonzero(stations > span / 3.0)
    before_last = np.count_nonzero(stations < 2.0 * span / 3.0)
    return min(beyond_first, before_last) < allowance


class _Problem:
    """Points in one span frame and their residuals from the curve."""

    def __init__(self, xyz, origin, direction, span, fit_tilt):
        self.origin = origin
        self.direction = direction
        self.normal = np.array([-direction[1], direction[0]])
        rel = xyz[:, :2] - origin
        self.s = np.ascontiguousarray(rel @ direction)
        self.v = np.ascontiguousarray(rel @ self.normal)
        self.z = np.ascontiguousarray(xyz[:, 2], dtype=float)
        self.span = float(span)
        self.fit_tilt = fit_tilt
        self.lateral_weight = 1.0

    def full(self, p):
        return p if self.fit_tilt else np.append(p, 0.0)

    def _evaluate(self, params, lateral_weight):
        """Residual rows of the parameter rows ``params`` (compiled: the operations of
        :func:`_curve`, one pass over the points per row)."""
        params = np.asarray(params, dtype=float).reshape(-1, 6 if self.fit_tilt else 5)
        if not self.fit_tilt:
            params = np.column_stack([params, np.zeros(len(params))])
        out = np.empty((len(params), 2 * self.s.size))
        _compiled_residuals(self.s, self.v, self.z, self.span, np.ascontiguousarray(params),
                            float(lateral_weight), out)
        return out

    def components(self, p):
        """Lateral and vertical residuals (unweighted) at ``p``."""
        row = self._evaluate(p, 1.0)[0]
        return row[:self.s.size], row[self.s.size:]

    def residuals(self, p):
        return self._evaluate(p, self.lateral_weight)[0]

    def residuals_many(self, params):
        """Residuals of several parameter vectors (rows of ``params``) in one evaluation:
        row ``i`` equals ``residuals(params[i])`` bit for bit (the same compiled loop;
        checked in tests/test_model_speed.py)."""
        return self._evaluate(params, self.lateral_weight)

    def balance(self, p):
        """Weight the lateral residuals by sigma_vertical / sigma_lateral (robust scales)."""
        r_v, r_z = self.components(p)
        sigma_v = max(1.4826 * median_1d(np.abs(r_v - median_1d(r_v))), 1e-4)
        sigma_z = max(1.4826 * median_1d(np.abs(r_z - median_1d(r_z))), 1e-4)
        self.lateral_weight = float(np.clip(sigma_z / sigma_v, 0.1, 10.0))

    def jacobian(self, p):
        """Central-difference Jacobian of the residuals."""
        steps = 1e-6 * np.maximum(1.0, np.abs(p))
        steps[2] = 1e-7
        shifts = np.diag(steps)
        values = self.residuals_many(np.concatenate([p + shifts, p - shifts]))
        columns = [(values[k] - values[p.size + k]) / (2 * steps[k]) for k in range(p.size)]
        return np.column_stack(columns)


def _initial_guess(problem: _Problem, fit_tilt: bool, f_scale: float) -> np.ndarray:
    """Robust quadratic fits of z(s) and v(s) give heights, curvature and tilt."""
    s, span = problem.s, problem.span
    t = s / span
    design = np.column_stack([np.ones_like(t), t, t * t])
    coef = {}
    for name, values in (("z", problem.z), ("v", problem.v)):
        weights = np.ones_like(t)
        for _ in range(4):
            sw = np.sqrt(weights)
            c, *_ = np.linalg.lstsq(design * sw[:, None], values * sw, rcond=None)
            r = np.abs(values - design @ c)
            scale = max(1.4826 * median_1d(r), f_scale)
            weights = np.minimum(1.0, 2.0 * scale / np.maximum(r, 1e-12))
        coef[name] = c
    cz, cv = coef["z"], coef["v"]
    curvature_z, curvature_v = 2.0 * cz[2] / span**2, 2.0 * cv[2] / span**2
    tilt = float(np.arctan2(-curvature_v, curvature_z)) if fit_tilt else 0.0
    tilt = float(np.clip(tilt, -1.0, 1.0))
    curvature = curvature_z / np.cos(tilt) if curvature_z > 0 else 0.0
    c_max = _MAX_CONSTANT_M / 2.0
    constant = 1.0 / curvature if curvature > 1.0 / c_max else c_max
    constant = float(np.clip(constant, span, c_max))
    z_a, z_b = cz[0], cz.sum()
    # the chord lateral offsets: the quadratic's ends minus the tilted deflection (zero there)
    y_a, y_b = cv[0], cv.sum()
    p = [z_a, z_b, np.log(constant), y_a, y_b] + ([tilt] if fit_tilt else [])
    return np.asarray(p, dtype=float)


def _solve(problem: _Problem, p0: np.ndarray, loss: str, f_scale: float) -> _Solution:
    lower = [-np.inf, -np.inf, np.log(_MIN_CONSTANT_PER_SPAN * problem.span), -np.inf, -np.inf]
    upper = [np.inf, np.inf, np.log(_MAX_CONSTANT_M), np.inf, np.inf]
    if problem.fit_tilt:
        lower.append(-_MAX_TILT_RAD)
        upper.append(_MAX_TILT_RAD)
    lower, upper = np.array(lower), np.array(upper)
    p0 = np.clip(p0, lower + 1e-9, upper - 1e-9)
    # typical parameter scales (m, m, ln m, m, m, rad)
    scales = np.array([1.0, 1.0, 0.01, 1.0, 1.0, 0.01])[:p0.size]
    return _minimise(problem, p0, lower, upper, scales, loss, f_scale)


@dataclass
class _Solution:
    """What the fit keeps of a minimisation (the names of scipy's ``OptimizeResult``)."""

    x: np.ndarray
    #: 1 gradient small, 2 cost change small, 3 step small, 0 evaluations exhausted
    status: int
    cost: float
    nfev: int
    njev: int


def _minimise(problem: _Problem, x0: np.ndarray, lower: np.ndarray, upper: np.ndarray,
              scales: np.ndarray, loss: str, f_scale: float, *, ftol: float = 1e-9,
              xtol: float = 1e-9, gtol: float = 1e-9, max_nfev: int = 200) -> _Solution:
    """Minimise the robust cost 0.5 f^2 sum rho((r_i/f)^2) of ``problem``'s residuals within
    the bounds: a damped Gauss-Newton (Levenberg-Marquardt) iteration.

    The same problem scipy.optimize.least_squares solves with ``loss``, ``f_scale``,
    ``x_scale=scales`` and the tolerances (and the same termination tests), without its
    general set-up, which took most of a span's fit (a few evaluations each): the robust
    loss enters through the Gauss-Newton model of scipy's ``scale_for_robust_loss_function``
    (weights rho' + 2 rho'' z), the damping is in the scaled parameters x / scales, steps
    are cut back to the bounds and parameters held on a bound by the gradient stay there,
    and a step is taken when the cost falls (ratio to the model's prediction > 1e-4; the
    damping then follows Nielsen's rule). The Jacobian is scipy's forward-difference rule
    (step sqrt(eps) max(1, |x|), turned inwards at an upper bound), evaluated for all
    parameters at once.

    The loop is compiled (``_catenary_residuals.minimise``) and runs without the GIL, so
    fits on several threads share the cores. Checked against least_squares and against the
    same loop written with numpy in tests/test_fit_solver.py.

    References
    ----------
    Madsen, K., Nielsen, H. B., Tingleff, O. (2004). *Methods for Non-Linear Least Squares
    Problems*, 2nd ed. IMM, DTU, ch. 3.2 (damping update).
    """
    x = np.array(np.clip(np.asarray(x0, dtype=float), lower, upper), dtype=float)
    status, cost, nfev, njev = _compiled_minimise(
        problem.s, problem.v, problem.z, problem.span, float(problem.lateral_weight), x,
        np.ascontiguousarray(lower, dtype=float), np.ascontiguousarray(upper, dtype=float),
        np.ascontiguousarray(scales, dtype=float), _LOSS_CODES[loss], float(f_scale),
        float(ftol), float(xtol), float(gtol), int(max_nfev))
    return _Solution(x=x, status=int(status), cost=float(cost), nfev=int(nfev),
                     njev=int(njev))


def _inliers(problem: _Problem, p: np.ndarray, f_scale: float) -> tuple[np.ndarray, np.ndarray]:
    r_v, r_z = problem.components(p)
    weighted = np.hypot(problem.lateral_weight * r_v, r_z)
    sigma = 1.4826 * median_1d(np.abs(np.concatenate([problem.lateral_weight * r_v, r_z])))
    return weighted <= max(3.0 * f_scale, 4.0 * sigma), np.hypot(r_v, r_z)


def fit_catenary(points: ArrayLike, support_a_xy: ArrayLike | None = None,
                 support_b_xy: ArrayLike | None = None, *, loss: str = "soft_l1",
                 f_scale_m: float = 0.05, fit_tilt: bool = True, min_points: int = 15,
                 max_rms_m: float = 0.3) -> CatenaryFit:
    """Fit a catenary, robustly, to the points of one wire in one span.

    Parameters
    ----------
    points
        (n, 3) positions of the wire's points, local metres. [m]
    support_a_xy, support_b_xy
        Horizontal positions of the two structures, shape (2,), when known; the stations of
        the attachments are their projections on the wire's direction. Give both or neither.
        [m]
    loss
        Robust loss of :func:`scipy.optimize.least_squares`: "soft_l1" (default) or "huber"
        ("linear", "cauchy", "arctan" also accepted).
    f_scale_m
        Residual scale at which the loss turns robust. [m]
    fit_tilt
        Fit the swing of the wire plane about its chord (blowout); else keep it vertical.
    min_points
        Fewest finite points worth fitting (at least 7).
    max_rms_m
        Largest inlier rms distance accepted as a catenary. [m]

    Returns
    -------
    CatenaryFit
        With ``ok=False`` and a reason for too few points, one-sided coverage (all points in
        one end third of the span and no supports given), a fit that is not a catenary (rms
        above ``max_rms_m``, C at its limits, most points off the curve), or an unresolved
        sag. Never raises for bad data.

    Notes
    -----
    Model, residuals, covariance, coverage and inlier definitions: see the module docstring.

    References
    ----------
    .. [1] Huber, P. J. and Ronchetti, E. M. (2009). *Robust Statistics*, 2nd ed., ch. 7.
    .. [2] Seber, G. A. F. and Wild, C. J. (1989). *Nonlinear Regression*, ch. 5.
    """
    xyz = np.asarray(points, dtype=float)
    if xyz.ndim != 2 or xyz.shape[1] != 3:
        raise ValueError("points must be an array of shape (n, 3).")
    if loss not in _LOSSES:
        raise ValueError(f"loss must be one of {', '.join(_LOSSES)}.")
    if not (f_scale_m > 0 and np.isfinite(f_scale_m)):
        raise ValueError("f_scale_m must be positive.")
    if int(min_points) < 7:
        raise ValueError("min_points must be at least 7 (six parameters are fitted).")
    if (support_a_xy is None) != (support_b_xy is None):
        raise ValueError("Give both support positions or neither.")
    supports = None
    if support_a_xy is not None:
        supports = (np.asarray(support_a_xy, dtype=float).reshape(-1),
                    np.asarray(support_b_xy, dtype=float).reshape(-1))
        if supports[0].shape != (2,) or supports[1].shape != (2,):
            raise ValueError("Support positions must have shape (2,).")
    n_points = len(xyz)
    finite = np.all(np.isfinite(xyz), axis=1)
    xyz = xyz[finite]
    n_bad = n_points - len(xyz)
    if len(xyz) < min_points:
        note = f"; {n_bad} not finite" if n_bad else ""
        return _failed(f"too few points ({len(xyz)} < {min_points}{note})", n_points)
    try:
        return _fit(xyz, n_points, supports, loss, float(f_scale_m),
                    bool(fit_tilt), float(max_rms_m))
    except (np.linalg.LinAlgError, ValueError, FloatingPointError) as error:
        return _failed(f"fit failed ({error})", n_points)


def _fit(xyz, n_points, support_xy, loss, f_scale, fit_tilt, max_rms):
    supports = support_xy is not None
    centre, direction = _robust_direction(xyz[:, :2], f_scale)
    if supports:
        a, b = support_xy
        if not (np.all(np.isfinite(a)) and np.all(np.isfinite(b))):
            return _failed("support position not finite", n_points)
        if np.hypot(*(b - a)) < 1.0:
            return _failed("supports less than 1 m apart", n_points)
        if np.ptp(xyz[:, :2] @ direction) < 1.0:
            direction = (b - a) / np.hypot(*(b - a))
        if direction @ (b - a) < 0:
            direction = -direction
        s_a, s_b = (a - centre) @ direction, (b - centre) @ direction
        if s_b - s_a < 1.0:
            return _failed("supports less than 1 m apart along the wire", n_points)
    else:
        along = (xyz[:, :2] - centre) @ direction
        s_a, s_b = along.min(), along.max()
        if s_b - s_a < 1.0:
            return _failed(f"points span only {s_b - s_a:.2f} m horizontally", n_points)
    origin = centre + s_a * direction
    span = s_b - s_a
    if supports:
        # drop points beyond the supports (other spans, jumpers) by more than 1 m
        along = (xyz[:, :2] - origin) @ direction
        xyz = xyz[(along >= -1.0) & (along <= span + 1.0)]
        if len(xyz) < 7:
            return _failed(f"too few points between the supports ({len(xyz)})", n_points)
    else:
        pre = _Problem(xyz, origin, direction, span, fit_tilt)
        if _one_sided(pre.s, span):
            return _failed("one-sided coverage", n_points)

    # first pass on at most _FIRST_PASS_POINTS points spread along the span
    step = max(1, len(xyz) // _FIRST_PASS_POINTS)
    along = (xyz[:, :2] - origin) @ direction
    problem = _Problem(xyz[np.argsort(along)[::step]], origin, direction, span, fit_tilt)
    first = _solve(problem, _initial_guess(problem, fit_tilt, f_scale), loss, f_scale)
    problem.balance(first.x)
    p = problem.full(first.x)

    # re-align the frame with the fitted chord; without supports, trim to the inlier extent
    a_xy = origin + p[3] * problem.normal
    b_xy = origin + span * direction + p[4] * problem.normal
    chord = b_xy - a_xy
    new_direction = chord / np.hypot(*chord)
    if supports:
        new_s_a = (a - a_xy) @ new_direction
        new_s_b = (b - a_xy) @ new_direction
    else:
        everything = _Problem(xyz, origin, direction, span, fit_tilt)
        everything.lateral_weight = problem.lateral_weight
        inlier, _ = _inliers(everything, first.x, f_scale)
        along = (xyz[inlier, :2] - a_xy) @ new_direction if inlier.sum() >= 7 else \
            (xyz[:, :2] - a_xy) @ new_direction
        new_s_a, new_s_b = along.min(), along.max()
    new_span = new_s_b - new_s_a
    if not new_span >= 1.0:
        return _failed("fit failed (span collapsed)", n_points)
    old_stations = ((a_xy + np.outer([new_s_a, new_s_b], new_direction)) - origin) @ direction
    _, z_ends = _curve(old_stations, span, p[0], p[1], np.exp(p[2]), p[3], p[4], p[5])
    new_origin = a_xy + new_s_a * new_direction
    weight = problem.lateral_weight
    problem = _Problem(xyz, new_origin, new_direction, new_span, fit_tilt)
    problem.lateral_weight = weight
    p0 = np.array([z_ends[0], z_ends[1], p[2], 0.0, 0.0, p[5]])
    result = _solve(problem, p0 if fit_tilt else p0[:5], loss, f_scale)
    return _summarise(problem, result, loss, f_scale, supports, n_points, max_rms)


def _summarise(problem, result, loss, f_scale, supports, n_points, max_rms):
    p = result.x
    full = problem.full(p)
    span = problem.span
    inlier, distance = _inliers(problem, p, f_scale)
    stations = problem.s[inlier]
    n_inliers = int(inlier.sum())
    rms = float(np.sqrt(np.mean(distance[inlier] ** 2))) if n_inliers else float("nan")
    coverage, gap = _coverage(stations, span)

    # covariance: M-estimator sandwich A^-1 B A^-1 (module notes)
    residuals = problem.residuals(p)
    jac = problem.jacobian(p)
    m, k = jac.shape
    psi, dpsi = _psi(residuals, loss, f_scale)
    bread = np.linalg.pinv(jac.T @ (dpsi[:, None] * jac))
    meat = jac.T @ ((psi**2)[:, None] * jac)
    cov_free = bread @ meat @ bread * m / max(m - k, 1)
    cov = np.zeros((6, 6))
    cov[:k, :k] = cov_free
    # Student's t quantile; scipy.stats.t.ppf evaluates this same function, and importing
    # scipy.special alone avoids loading scipy.stats (about a second) on the first fit
    t95 = float(special.stdtrit(max(m - k, 1), 0.975))

    z_a, z_b, log_c, y_a, y_b, tilt = full
    constant = float(np.exp(log_c))

    # sag in the wire plane at the fit and at the central-difference shifts of the four
    # parameters it depends on, in one (element-wise) evaluation
    moved = (0, 1, 2, 5)
    shifts = np.zeros((len(moved), 6))
    for row, i in enumerate(moved):
        shifts[row, i] = 1e-6 if i != 2 else 1e-7
    q = np.concatenate([full[None, :], full + shifts, full - shifts])
    h_q = q[:, 1] - q[:, 0]
    sags = catenary.sag(np.hypot(span, h_q * np.sin(q[:, 5])), h_q * np.cos(q[:, 5]),
                        np.exp(q[:, 2]))
    sag_value = float(sags[0])
    grad = np.zeros(6)
    for row, i in enumerate(moved):
        grad[i] = ((float(sags[1 + row]) - float(sags[1 + len(moved) + row]))
                   / (2 * shifts[row, i]))
    sd = np.sqrt(np.maximum(np.diag(cov), 0.0))
    sag_ci = t95 * float(np.sqrt(max(grad @ cov @ grad, 0.0)))

    # absorb the (tiny) lateral offsets of the second pass into origin and direction
    origin = problem.origin + y_a * problem.normal
    chord = span * problem.direction + (y_b - y_a) * problem.normal
    span_out = float(np.hypot(*chord))
    values = dict(
        ok=True, reason="", n_points=n_points, n_inliers=n_inliers, origin_xy=origin,
        direction=chord / span_out, span_length_m=span_out, tilt_rad=float(tilt),
        tilt_ci95_rad=t95 * sd[5], catenary_constant_m=constant,
        catenary_constant_ci95_m=t95 * constant * sd[2], z_a_m=float(z_a),
        z_a_ci95_m=t95 * sd[0], z_b_m=float(z_b), z_b_ci95_m=t95 * sd[1], sag_m=sag_value,
        sag_ci95_m=sag_ci, rms_m=rms, coverage=coverage, largest_gap_m=gap,
        station_min_m=float(stations.min()) if n_inliers else float("nan"),
        station_max_m=float(stations.max()) if n_inliers else float("nan"), covariance=cov)

    reason = ""
    if result.status <= 0:
        reason = "fit did not converge"
    elif log_c >= np.log(_MAX_CONSTANT_M) - 1e-3:
        reason = f"not a catenary (no measurable sag: C reached {_MAX_CONSTANT_M:.0f} m)"
    elif log_c <= np.log(_MIN_CONSTANT_PER_SPAN * span) + 1e-3:
        reason = f"not a catenary (C {constant:.1f} m too small for a {span:.0f} m span)"
    elif n_inliers < 0.5 * problem.s.size:
        reason = (f"not a catenary (only {n_inliers} of {problem.s.size} points near the "
                  f"curve)")
    elif not rms <= max_rms:
        reason = f"not a catenary (rms {rms:.2f} m)"
    elif not sag_ci < sag_value:
        reason = f"sag not resolved ({sag_value:.2f} ± {sag_ci:.2f} m)"
    elif not supports and _one_sided(stations, span):
        reason = "one-sided coverage"
    if reason:
        values.update(ok=False, reason=reason)
    return CatenaryFit(**values)

"""Where a wire is attached at its structures, along the span, and how well that is known.

The catenary fit (:func:`clearaudit.physics.fit.fit_catenary`) takes the horizontal positions
of a wire's two attachments as given: the sag it reports is the sag between those two points,
and its confidence interval covers only the scatter of the wire's points. This module

- estimates the along-span *station* of an attachment at a dead-end structure, which is the far
  end of the horizontal strain insulator string where the conductor starts (not the structure
  axis), from the insulator points and from where the wire's own points begin
  (:func:`uniform_end`, :func:`regular_start`);
- pools the dead-end estimates of all phases on one side of a structure, whose strain strings
  are alike and hang from the crossarm line (:func:`pool_stations`);
- moves a dead-end structure's axis along the line onto its strain strings, for the wires
  without a string (shield wires) (:func:`deadend_axis_shift`);
- propagates the station uncertainty of both attachments to the sag
  (:func:`sag_ci95_with_stations`).

References
----------
.. [1] David, H. A. and Nagaraja, H. N. (2003). *Order Statistics*, 3rd ed. Wiley, ch. 2-3
   (moments of the order statistics of a uniform sample).
.. [2] Seber, G. A. F. and Wild, C. J. (1989). *Nonlinear Regression*. Wiley, ch. 5 (delta
   method).
.. [3] Irvine, H. M. (1981). *Cable Structures*. MIT Press, ch. 1 (catenary; a part of a
   catenary is the same catenary).
.. [4] Kay, S. M. (1993). *Fundamentals of Statistical Signal Processing: Estimation Theory*.
   Prentice Hall, ch. 10-11 (linear Bayesian / weighted least-squares estimator with a Gaussian
   prior).
"""
from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike

from ..physics import catenary

__all__ = ["deadend_axis_shift", "pool_stations", "regular_start", "sag_ci95_with_stations", "uniform_end"]

_Z95 = 1.959963984540054  # two-sided 95 % quantile of the standard normal distribution


def uniform_end(values_m: ArrayLike, *, top: int | None = None) -> tuple[float, float]:
    """Upper end of an interval from a uniform sample of positions along it.

    Parameters
    ----------
    values_m
        Positions of the points along the interval (e.g. along a strain insulator string),
        at least three. [m]
    top
        Use only the ``top`` highest positions (at least 3): the estimate then needs the
        points to be uniform only near the end (other members below do not matter).

    Returns
    -------
    (end_m, sd_m) : tuple of float
        Unbiased estimate of the upper end and its standard deviation. [m]

    Notes
    -----
    For :math:`n` points uniform on :math:`[a, b]` with order statistics :math:`x_{(1)}` and
    :math:`x_{(n)}`, the unbiased estimate of the upper end is

    .. math:: \\hat b = x_{(n)} + \\frac{x_{(n)} - x_{(1)}}{n - 1}

    with variance :math:`\\theta^2\\, n / ((n + 1)(n + 2)(n - 1))`, :math:`\\theta = b - a`,
    estimated by :math:`\\hat\\theta = (x_{(n)} - x_{(1)})(n + 1)/(n - 1)` ([1]_, moments of
    uniform order statistics: :math:`E\\,x_{(k)} = a + \\theta k/(n + 1)`).
    With ``top`` = :math:`m`, the mean spacing comes from the top :math:`m` points,
    :math:`\\hat\\Delta = (x_{(n)} - x_{(n-m+1)})/(m - 1)`, the estimate is
    :math:`x_{(n)} + \\hat\\Delta` and its standard deviation
    :math:`\\hat\\Delta\\sqrt{1 + 1/(m - 1)}` (uniform spacings are nearly independent
    exponential variables, [1]_).

    References
    ----------
    .. [1] David, H. A. and Nagaraja, H. N. (2003). *Order Statistics*, 3rd ed., ch. 2-3.
    """
    x = np.asarray(values_m, dtype=float).reshape(-1)
    x = x[np.isfinite(x)]
    n = x.size
    if n < 3:
        raise ValueError("The end of a uniform sample needs at least three positions.")
    if top is not None:
        if int(top) < 3:
            raise ValueError("top must be at least 3.")
        if n > int(top):
            m = int(top)
            head = np.sort(x)[-m:]
            spacing = float(head[-1] - head[0]) / (m - 1)
            return float(head[-1]) + spacing, spacing * math.sqrt(1.0 + 1.0 / (m - 1))
    highest, spread = float(x.max()), float(np.ptp(x))
    theta = spread * (n + 1) / (n - 1)
    sd = theta * math.sqrt(n / ((n + 1.0) * (n + 2.0) * (n - 1.0)))
    return highest + spread / (n - 1), sd


def regular_start(stations_m: ArrayLike, *, max_points: int = 30) -> tuple[float, float, float]:
    """Where a regularly sampled wire begins, from its first points.

    Parameters
    ----------
    stations_m
        Positions of the wire's points along the span, measured from the structure into the
        span (any order); at least five. [m]
    max_points
        Most points (from the first) used; the run also stops at the first gap wider than
        2.5 point spacings.

    Returns
    -------
    (start_m, sd_m, spacing_m) : tuple of float
        Estimated start of the wire, its standard deviation and the point spacing. [m]

    Notes
    -----
    An airborne scan hits a wire about once per scan line, so its points lie at
    :math:`s_i = s_0 + (i + \\phi_i)\\,\\Delta` with spacing :math:`\\Delta` and an offset
    :math:`\\phi_i` between 0 and 1 (common practice (no source)). A least-squares line
    :math:`s_i = \\alpha + i\\,\\Delta` through the first points of one run gives the start
    :math:`\\hat s_0 = \\hat\\alpha - \\Delta / 2`. Whether the offsets vary from point to point
    or are one common phase of the scan pattern cannot be told from the points, so the
    standard deviation is that of a phase uniform over one spacing, :math:`\\Delta/\\sqrt{12}`,
    or the line's intercept standard error when that is larger.
    """
    s = np.sort(np.asarray(stations_m, dtype=float).reshape(-1))
    s = s[np.isfinite(s)]
    if s.size < 5:
        raise ValueError("The start of a wire needs at least five points.")
    head = s[: max(5, int(max_points))]
    spacing = float(np.median(np.diff(head)))
    if not spacing > 0:
        return float(s[0]), 0.0, 0.0
    gaps = np.flatnonzero(np.diff(head) > 2.5 * spacing)
    run = head[: gaps[0] + 1] if gaps.size else head
    if run.size < 5:
        return float(s[0] - 0.5 * spacing), spacing / math.sqrt(12.0), spacing
    i = np.arange(run.size, dtype=float)
    design = np.column_stack([np.ones_like(i), i])
    coef, *_ = np.linalg.lstsq(design, run, rcond=None)
    residual = run - design @ coef
    dof = max(run.size - 2, 1)
    s2 = float(residual @ residual) / dof
    intercept_sd = math.sqrt(s2 * float(np.linalg.inv(design.T @ design)[0, 0]))
    step = float(coef[1])
    sd = max(step / math.sqrt(12.0), intercept_sd)
    return float(coef[0] - 0.5 * step), sd, step


def pool_stations(stations_m: ArrayLike, laterals_m: ArrayLike, sd_m: ArrayLike,
                  arm_slope: float = 0.0, *, outlier_sigma: float = 3.0,
                  outlier_margin_m: float = 0.1) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pool the attachment stations of the strain strings on one side of a dead-end.

    Parameters
    ----------
    stations_m
        Each wire's own estimate of its attachment station (along the span). [m]
    laterals_m
        Each wire's lateral offset at the structure (right of the line positive). [m]
    sd_m
        Standard deviations of the estimates (positive). [m]
    arm_slope
        d(station)/d(lateral) of the crossarm line in the span frame (0 when the arms are
        square to the span; tan of half the line angle at an angle structure). [-]
    outlier_sigma, outlier_margin_m
        A wire whose estimate lies farther than ``outlier_sigma`` combined standard deviations
        plus ``outlier_margin_m`` from the pooled line keeps its own estimate. [-], [m]

    Returns
    -------
    (stations_m, sd_m, pooled) : tuple of numpy.ndarray
        The stations after pooling, their standard deviations [m] and which wires were pooled.

    Notes
    -----
    The strain strings of one structure side are one assembly type, hung from the crossarm
    tips, so their far ends lie on a line parallel to the crossarm line (common practice (no
    source)): :math:`s_i = c + k\\,t_i` with :math:`k` the crossarm slope. The common offset
    :math:`\\hat c` is the median of :math:`s_i - k t_i` (one string with a gap in its points
    must not pull the others), with standard deviation
    :math:`\\sqrt{\\pi/2}\\,\\bar\\sigma/\\sqrt{m}` for :math:`m \\ge 3` pooled strings
    (asymptotic efficiency :math:`2/\\pi` of the median of normal samples) and
    :math:`\\bar\\sigma/\\sqrt{2}` for two (their mean); :math:`\\bar\\sigma^2` is the mean
    of the :math:`\\sigma_i^2`.
    """
    s = np.asarray(stations_m, dtype=float).reshape(-1)
    t = np.asarray(laterals_m, dtype=float).reshape(-1)
    sd = np.asarray(sd_m, dtype=float).reshape(-1)
    if not (s.shape == t.shape == sd.shape):
        raise ValueError("stations, laterals and standard deviations must have one length.")
    if np.any(~(sd > 0)):
        raise ValueError("Standard deviations must be positive.")
    out_s, out_sd = s.copy(), sd.copy()
    pooled = np.zeros(s.size, dtype=bool)
    if s.size < 2:
        return out_s, out_sd, pooled
    r = s - arm_slope * t
    use = np.ones(s.size, dtype=bool)
    for _ in range(3):
        c, sd_c = _median_offset(r[use], sd[use])
        keep = np.abs(r - c) <= outlier_sigma * np.sqrt(sd**2 + sd_c**2) + outlier_margin_m
        if keep.sum() < 2 or np.array_equal(keep, use):
            break
        use = keep
    if use.sum() < 2:
        return out_s, out_sd, pooled
    c, sd_c = _median_offset(r[use], sd[use])
    out_s[use] = c + arm_slope * t[use]
    out_sd[use] = sd_c
    pooled[use] = True
    return out_s, out_sd, pooled


def deadend_axis_shift(directions: ArrayLike, far_ends_m: ArrayLike, sd_m: ArrayLike, *,
                       near_ends_m: ArrayLike | None = None, near_sd_m: ArrayLike | None = None,
                       prior_sd_m: float = 0.10, string_length_m: float | None = None,
                       string_length_sd_m: float | None = None
                       ) -> tuple[np.ndarray, np.ndarray, float, float]:
    r"""Shift of a dead-end structure's axis along the line from its strain strings.

    Parameters
    ----------
    directions
        Horizontal unit vectors from the structure into each span that has strain strings at
        it (one row per side), shape (n, 2). [-]
    far_ends_m
        Per side, the pooled far end of the strain strings, measured along that side's direction
        from the crossarm line through the *detected* structure position. [m]
    sd_m
        Standard deviations of ``far_ends_m`` (positive). [m]
    near_ends_m, near_sd_m
        Per side, the pooled near end of the strings (at the crossarm tips), measured the same
        way, and its standard deviation; NaN where it is not seen (strings continue on the
        other side of the structure). [m]
    prior_sd_m
        Standard deviation of the detected position in each horizontal axis (the prior of the
        shift). [m]
    string_length_m, string_length_sd_m
        Length of the strain strings and its standard deviation when known from elsewhere
        (e.g. the other dead-ends of the line); ``None`` estimates it here, which needs strings
        on two sides of the structure to tell the shift from the length. [m]

    Returns
    -------
    (shift_m, shift_sd_m, length_m, length_sd_m)
        Per side the axis shift along that side's direction and its standard deviation, and
        the estimated string length with its standard deviation. [m]

    Notes
    -----
    The strings hang from the crossarm tips and run along the span, so the far end on side
    :math:`i` is :math:`f_i = \delta\cdot e_i + l + \varepsilon_i` with :math:`\delta` the
    horizontal offset of the true structure axis from the detected one, :math:`e_i` the side's
    direction and :math:`l` the string length (common practice (no source): the strain
    assemblies of one structure are alike); where the near end is seen,
    :math:`g_i = \delta\cdot e_i + \eta_i`. With the prior :math:`\delta \sim N(0, p^2 I)`
    (the detected position) and, if given, :math:`l \sim N(l_0, \sigma_l^2)`, the estimate of
    :math:`\theta = (\delta_x, \delta_y, l)` is the weighted least-squares / linear Bayesian
    solution :math:`\hat\theta = A^{-1} b`, :math:`A = \sum_i x_i x_i^T/\sigma_i^2 +
    P^{-1}`, :math:`x_i = (e_{ix}, e_{iy}, 1)` (far ends) or :math:`(e_{ix}, e_{iy}, 0)`
    (near ends), with covariance :math:`A^{-1}` ([4]_). On a
    straight line with strings on both sides :math:`\hat\delta\cdot e = (f_a - f_b)/2`
    (before the prior): the length cancels. Across a line angle only the component of
    :math:`\delta` square to the crossarm is measured; the component along the crossarm keeps
    its prior.

    References
    ----------
    .. [4] Kay, S. M. (1993). *Fundamentals of Statistical Signal Processing: Estimation
       Theory*, ch. 10-11.
    """
    e = np.asarray(directions, dtype=float).reshape(-1, 2)
    f = np.asarray(far_ends_m, dtype=float).reshape(-1)
    sd = np.asarray(sd_m, dtype=float).reshape(-1)
    if not (e.shape[0] == f.size == sd.size) or f.size == 0:
        raise ValueError("directions, far ends and standard deviations must have one "
                         "non-zero length.")
    if np.any(~(sd > 0)) or not prior_sd_m > 0:
        raise ValueError("Standard deviations must be positive.")
    if not np.allclose(np.hypot(e[:, 0], e[:, 1]), 1.0, atol=1e-6):
        raise ValueError("directions must be unit vectors.")
    x = np.column_stack([e, np.ones(f.size)])
    w = sd**-2.0
    if near_ends_m is not None:
        g = np.asarray(near_ends_m, dtype=float).reshape(-1)
        g_sd = np.asarray(near_sd_m, dtype=float).reshape(-1) if near_sd_m is not None else None
        if g_sd is None or not (g.size == g_sd.size == f.size):
            raise ValueError("near ends need one standard deviation each, one per side.")
        seen = np.isfinite(g)
        if np.any(~(g_sd[seen] > 0)):
            raise ValueError("Standard deviations must be positive.")
        x = np.vstack([x, np.column_stack([e[seen], np.zeros(int(seen.sum()))])])
        f = np.concatenate([f, g[seen]])
        w = np.concatenate([w, g_sd[seen] ** -2.0])
    a = (x * w[:, None]).T @ x
    b = x.T @ (w * f)
    a[0, 0] += prior_sd_m**-2.0
    a[1, 1] += prior_sd_m**-2.0
    if string_length_m is not None:
        if string_length_sd_m is None or not string_length_sd_m > 0:
            raise ValueError("A given string length needs a positive standard deviation.")
        a[2, 2] += string_length_sd_m**-2.0
        b[2] += float(string_length_m) * string_length_sd_m**-2.0
    if abs(np.linalg.det(a)) < 1e-12 * max(float(np.max(np.abs(a))), 1.0) ** 3:
        raise ValueError("The string length cannot be told from the shift: give it.")
    cov = np.linalg.inv(a)
    theta = cov @ b
    shift = e @ theta[:2]
    shift_sd = np.sqrt(np.einsum("ij,jk,ik->i", e, cov[:2, :2], e))
    return shift, shift_sd, float(theta[2]), float(math.sqrt(cov[2, 2]))


def _median_offset(r: np.ndarray, sd: np.ndarray) -> tuple[float, float]:
    """Median of the offsets and its standard deviation (see :func:`pool_stations`)."""
    m = r.size
    sigma = float(np.sqrt(np.mean(sd**2)))
    factor = math.sqrt(math.pi / 2.0) if m >= 3 else 1.0
    return float(np.median(r)), factor * sigma / math.sqrt(m)


def sag_ci95_with_stations(fit, sd_a_m: float, sd_b_m: float, *, step_m: float = 0.05) -> float:
    """Sag half-width (95 %) including the uncertainty of the attachment stations.

    Parameters
    ----------
    fit
        A successful :class:`clearaudit.physics.fit.CatenaryFit`.
    sd_a_m, sd_b_m
        Standard deviations of the along-span positions of attachments A and B. [m]
    step_m
        Step of the central differences. [m]

    Returns
    -------
    float
        :math:`\\sqrt{\\delta_{fit}^2 + 1.96^2 (g_a^2\\sigma_a^2 + g_b^2\\sigma_b^2)}` with
        :math:`\\delta_{fit}` the fit's own half-width (``fit.sag_ci95_m``). [m]

    Notes
    -----
    The fitted curve (catenary constant :math:`C`) does not depend on where its ends are put;
    moving an end along the curve by :math:`\\delta` keeps the same catenary ([3]_) and changes
    the chord, hence the sag :math:`D(L', h', C)` with :math:`L'` and :math:`h'` the new
    horizontal span and height difference (in the tilted plane of the wire). The sensitivities
    :math:`g = \\partial D / \\partial \\delta` are central differences, propagated by the delta
    method ([2]_); the two ends are independent. For a level span
    :math:`g \\approx 2D/L` (parabola :math:`D = L^2/8C`).
    """
    if not (sd_a_m >= 0 and sd_b_m >= 0):
        raise ValueError("Station standard deviations must be non-negative.")
    base = float(fit.sag_ci95_m)
    if not (getattr(fit, "ok", False) and np.isfinite(base)):
        return base
    span = float(fit.span_length_m)
    constant = float(fit.catenary_constant_m)
    tilt = float(fit.tilt_rad) if np.isfinite(fit.tilt_rad) else 0.0

    def plane_sag(d_a: float, d_b: float) -> float:
        ends = fit.point_at([d_a, span + d_b])
        length = float(np.hypot(*(ends[1, :2] - ends[0, :2])))
        h = float(ends[1, 2] - ends[0, 2])
        return float(catenary.sag(math.hypot(length, h * math.sin(tilt)), h * math.cos(tilt),
                                  constant))

    g_a = (plane_sag(step_m, 0.0) - plane_sag(-step_m, 0.0)) / (2.0 * step_m)
    g_b = (plane_sag(0.0, step_m) - plane_sag(0.0, -step_m)) / (2.0 * step_m)
    extra = _Z95**2 * ((g_a * sd_a_m) ** 2 + (g_b * sd_b_m) ** 2)
    return math.sqrt(base**2 + extra)

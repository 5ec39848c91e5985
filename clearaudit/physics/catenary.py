"""Catenary of a conductor hanging between two supports at different heights.

Coordinates are in the wire's plane: ``x`` is the horizontal distance from support A
(x = 0) towards support B (x = L), ``z`` the height relative to support A. The curve is

.. math:: z(x) = C\\,[\\cosh((x - x_0)/C) - \\cosh(x_0/C)]

with catenary constant :math:`C = H / w` (horizontal tension over load per unit length) and
low point abscissa

.. math:: x_0 = L/2 - C\\,\\operatorname{asinh}\\big(h / (2 C \\sinh(L / 2C))\\big)

where :math:`h = z_B - z_A`. :math:`x_0` may lie outside [0, L] on steep spans (no low point
within the span). The conductor is treated as a perfectly flexible, inextensible chain under a
uniform load per unit of its (stretched) length; elasticity enters through
:mod:`clearaudit.physics.state_change`. All functions broadcast over numpy arrays; physical
inputs come first, in the order (span_length, height_difference, catenary_constant).

References
----------
.. [1] Irvine, H. M. (1981). *Cable Structures*. MIT Press, ch. 1 (inextensible catenary).
.. [2] IEEE Std 524-2016, *Guide for the Installation of Overhead Transmission Line
   Conductors*, annex on sag and tension (catenary equations).
"""
from __future__ import annotations

from collections.abc import Callable

import numpy as np
from numpy.typing import ArrayLike
from scipy import optimize

__all__ = [
    "arc_length",
    "average_tension",
    "catenary_constant_from_arc_length",
    "catenary_constant_from_point",
    "catenary_constant_from_sag",
    "catenary_height",
    "catenary_slope",
    "chord_deflection",
    "low_point_offset",
    "parabolic_sag",
    "sag",
    "sag_location",
    "slack",
    "support_tensions",
]

# Smallest catenary constant the inverse solvers try, as a fraction of the span: at C = L/50 the
# level-span sag is ~7e8 L, far beyond any conductor, while sinh(L/2C) = sinh(25) stays finite.
_SOLVER_MIN_CONSTANT_PER_SPAN = 1.0 / 50.0
_SOLVER_MAX_CONSTANT_M = 1e15


def _positive(value: ArrayLike, message: str) -> np.ndarray:
    """``value`` as a float array, every element > 0 (NaN is not), else ``ValueError``."""
    if type(value) is float or type(value) is np.float64:  # the common scalar: no array test
        if not value > 0:
            raise ValueError(message)
        return np.asarray(value, dtype=float)
    v = np.asarray(value, dtype=float)
    if not (v > 0).all():  # the same test as np.any(~(v > 0)), without its wrapper
        raise ValueError(message)
    return v


def _check_constant(catenary_constant: ArrayLike) -> np.ndarray:
    return _positive(catenary_constant, "The catenary constant must be positive.")


def _check_span(span_length: ArrayLike) -> np.ndarray:
    return _positive(span_length, "The span length must be positive.")


def low_point_offset(span_length: ArrayLike, height_difference: ArrayLike,
                     catenary_constant: ArrayLike) -> np.ndarray:
    """Horizontal position of the catenary's lowest point, from support A.

    Parameters
    ----------
    span_length
        Horizontal distance between the supports, L. [m]
    height_difference
        Height of support B minus height of support A, h. [m]
    catenary_constant
        C = H / w. [m]

    Returns
    -------
    x0 : numpy.ndarray
        Horizontal distance from support A to the low point (can be < 0 or > L). [m]

    Notes
    -----
    :math:`x_0 = L/2 - C\\,\\operatorname{asinh}\\big(h / (2 C \\sinh(L/2C))\\big)`, from
    requiring :math:`z(L) - z(0) = h` ([1]_, eq. 1.9).

    References
    ----------
    .. [1] Irvine, H. M. (1981). *Cable Structures*. MIT Press, ch. 1.
    """
    L = np.asarray(span_length, dtype=float)
    h = np.asarray(height_difference, dtype=float)
    C = _check_constant(catenary_constant)
    return _low_point_offset(L, h, C)


def _low_point_offset(L: np.ndarray, h: np.ndarray, C: np.ndarray) -> np.ndarray:
    """:func:`low_point_offset` of float arrays already checked (C > 0)."""
    return L / 2.0 - C * np.arcsinh(h / (2.0 * C * np.sinh(L / (2.0 * C))))


def catenary_height(x: ArrayLike, span_length: ArrayLike, height_difference: ArrayLike,
                    catenary_constant: ArrayLike) -> np.ndarray:
    """Height of the conductor above support A at horizontal distance ``x``.

    Parameters
    ----------
    x
        Horizontal distance from support A. [m]
    span_length
        Horizontal span length, L. [m]
    height_difference
        z_B - z_A, h. [m]
    catenary_constant
        C = H / w. [m]

    Returns
    -------
    z : numpy.ndarray
        Height relative to support A (z(0) = 0, z(L) = h). [m]

    Notes
    -----
    :math:`z = C[\\cosh(a) - \\cosh(b)] = 2C\\sinh((a+b)/2)\\sinh((a-b)/2)` with
    :math:`a = (x - x_0)/C`, :math:`b = -x_0/C`; the product form keeps full precision when
    C is much larger than the span.
    """
    C = _check_constant(catenary_constant)
    x0 = low_point_offset(span_length, height_difference, C)
    x = np.asarray(x, dtype=float)
    return 2.0 * C * np.sinh((x - 2.0 * x0) / (2.0 * C)) * np.sinh(x / (2.0 * C))


def chord_deflection(x: ArrayLike, span_length: ArrayLike, height_difference: ArrayLike,
                     catenary_constant: ArrayLike) -> np.ndarray:
    """Vertical distance from the chord (straight line A-B) down to the conductor at ``x``.

    Parameters
    ----------
    x
        Horizontal distance from support A. [m]
    span_length, height_difference, catenary_constant
        L, h, C as in :func:`catenary_height`. [m]

    Returns
    -------
    d : numpy.ndarray
        :math:`h x / L - z(x)`; positive between the supports. [m]
    """
    L = _check_span(span_length)
    x = np.asarray(x, dtype=float)
    h = np.asarray(height_difference, dtype=float)
    return h * x / L - catenary_height(x, L, h, catenary_constant)


def catenary_slope(x: ArrayLike, span_length: ArrayLike, height_difference: ArrayLike,
                   catenary_constant: ArrayLike) -> np.ndarray:
    """Slope dz/dx of the conductor at ``x``.

    Parameters
    ----------
    x
        Horizontal distance from support A. [m]
    span_length, height_difference, catenary_constant
        L, h, C as in :func:`catenary_height`. [m]

    Returns
    -------
    slope : numpy.ndarray
        :math:`\\sinh((x - x_0)/C)`, the tangent of the conductor's angle to the horizontal. [-]
    """
    C = _check_constant(catenary_constant)
    x0 = low_point_offset(span_length, height_difference, C)
    return np.sinh((np.asarray(x, dtype=float) - x0) / C)


def sag_location(span_length: ArrayLike, height_difference: ArrayLike,
                 catenary_constant: ArrayLike) -> np.ndarray:
    """Horizontal position of the largest chord-to-conductor vertical distance.

    Parameters
    ----------
    span_length, height_difference, catenary_constant
        L, h, C as in :func:`catenary_height`. [m]

    Returns
    -------
    x_s : numpy.ndarray
        Distance from support A. [m]

    Notes
    -----
    Where the conductor's slope equals the chord's slope h/L:
    :math:`x_s = x_0 + C\\,\\operatorname{asinh}(h/L)`.
    """
    C = _check_constant(catenary_constant)
    L = _check_span(span_length)
    h = np.asarray(height_difference, dtype=float)
    return low_point_offset(L, h, C) + C * np.arcsinh(h / L)


def sag(span_length: ArrayLike, height_difference: ArrayLike,
        catenary_constant: ArrayLike) -> np.ndarray:
    """Sag: the largest vertical distance between the chord and the conductor.

    Parameters
    ----------
    span_length
        Horizontal span length, L. [m]
    height_difference
        z_B - z_A, h. [m]
    catenary_constant
        C = H / w. [m]

    Returns
    -------
    D : numpy.ndarray
        Sag. [m]

    Notes
    -----
    :math:`D = h\\,x_s/L - z(x_s)` with :math:`x_s` from :func:`sag_location`. For a level span
    this reduces to :math:`D = C(\\cosh(L/2C) - 1)` ([1]_, sag and tension annex).

    References
    ----------
    .. [1] IEEE Std 524-2016, annex on sag and tension.
    """
    L = _check_span(span_length)
    h = np.asarray(height_difference, dtype=float)
    xs = sag_location(L, h, catenary_constant)
    return chord_deflection(xs, L, h, catenary_constant)


def arc_length(span_length: ArrayLike, height_difference: ArrayLike,
               catenary_constant: ArrayLike) -> np.ndarray:
    """Length of conductor between the supports.

    Parameters
    ----------
    span_length, height_difference, catenary_constant
        L, h, C as in :func:`catenary_height`. [m]

    Returns
    -------
    S : numpy.ndarray
        Arc length. [m]

    Notes
    -----
    :math:`S = \\sqrt{h^2 + (2C\\sinh(L/2C))^2}`, an exact identity of the catenary
    ([1]_, eq. 1.12).

    References
    ----------
    .. [1] Irvine, H. M. (1981). *Cable Structures*. MIT Press, ch. 1.
    """
    L = np.asarray(span_length, dtype=float)
    h = np.asarray(height_difference, dtype=float)
    C = _check_constant(catenary_constant)
    return _arc_length(L, h, C)


def _arc_length(L: np.ndarray, h: np.ndarray, C: np.ndarray) -> np.ndarray:
    """:func:`arc_length` of float arrays already checked (C > 0)."""
    return np.hypot(h, 2.0 * C * np.sinh(L / (2.0 * C)))


def slack(span_length: ArrayLike, height_difference: ArrayLike,
          catenary_constant: ArrayLike) -> np.ndarray:
    """Arc length minus the straight chord length between the supports.

    Parameters
    ----------
    span_length, height_difference, catenary_constant
        L, h, C as in :func:`catenary_height`. [m]

    Returns
    -------
    slack : numpy.ndarray
        :math:`S - \\sqrt{L^2 + h^2}`. [m]

    Notes
    -----
    Computed as :math:`(S_h - L)(S_h + L)/(S + \\text{chord})` with
    :math:`S_h = 2C\\sinh(L/2C)` and :math:`S_h - L = 2C[\\sinh(u) - u]`, :math:`u = L/2C`,
    the latter from its Taylor series when u is small, so no digits cancel.
    """
    L = np.asarray(span_length, dtype=float)
    h = np.asarray(height_difference, dtype=float)
    C = _check_constant(catenary_constant)
    u = L / (2.0 * C)
    s_h = 2.0 * C * np.sinh(u)
    u2 = u * u
    series = u * u2 / 6.0 * (1.0 + u2 / 20.0 * (1.0 + u2 / 42.0 * (1.0 + u2 / 72.0)))
    sinh_minus_u = np.where(u < 0.05, series, np.sinh(u) - u)
    s = np.hypot(h, s_h)
    chord = np.hypot(h, L)
    return 2.0 * C * sinh_minus_u * (s_h + L) / (s + chord)


def support_tensions(horizontal_tension: ArrayLike, unit_weight: ArrayLike,
                     span_length: ArrayLike, height_difference: ArrayLike
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Total conductor tension at supports A and B.

    Parameters
    ----------
    horizontal_tension
        H. [N]
    unit_weight
        Weight (or resultant load) per unit length, w. [N/m]
    span_length
        Horizontal span length, L. [m]
    height_difference
        z_B - z_A, h. [m]

    Returns
    -------
    (T_A, T_B) : tuple of numpy.ndarray
        Tensions at the supports. [N]

    Notes
    -----
    :math:`T = H\\cosh((x - x_0)/C)` with :math:`C = H/w` ([1]_).

    References
    ----------
    .. [1] Irvine, H. M. (1981). *Cable Structures*. MIT Press, ch. 1.
    """
    H = np.asarray(horizontal_tension, dtype=float)
    w = np.asarray(unit_weight, dtype=float)
    C = _check_constant(H / w)
    x0 = low_point_offset(span_length, height_difference, C)
    L = np.asarray(span_length, dtype=float)
    return H * np.cosh(-x0 / C), H * np.cosh((L - x0) / C)


def average_tension(horizontal_tension: ArrayLike, unit_weight: ArrayLike,
                    span_length: ArrayLike, height_difference: ArrayLike) -> np.ndarray:
    """Tension averaged along the conductor's arc length.

    Parameters
    ----------
    horizontal_tension
        H. [N]
    unit_weight
        Load per unit length, w. [N/m]
    span_length
        Horizontal span length, L. [m]
    height_difference
        z_B - z_A, h. [m]

    Returns
    -------
    T_avg : numpy.ndarray
        :math:`\\frac{1}{S}\\int_0^S T\\,ds`. [N]

    Notes
    -----
    With :math:`T = H\\cosh u`, :math:`ds = \\cosh u\\,dx`, :math:`u = (x - x_0)/C`:

    .. math:: \\int T\\,ds = H\\int_0^L \\cosh^2 u\\,dx
              = H\\left[\\frac{L}{2} + \\frac{C}{2}\\cosh\\frac{L - 2x_0}{C}
                \\sinh\\frac{L}{C}\\right]

    (exact for the catenary; the product form avoids cancellation).
    """
    H = np.asarray(horizontal_tension, dtype=float)
    w = np.asarray(unit_weight, dtype=float)
    L = _check_span(span_length)
    h = np.asarray(height_difference, dtype=float)
    _check_constant(H / w)
    return _average_tension(H, w, L, h)


def _average_tension(H: np.ndarray, w: np.ndarray, L: np.ndarray, h: np.ndarray) -> np.ndarray:
    """:func:`average_tension` of float arrays already checked (L > 0, H / w > 0): the same
    operations without the checks, for the change-of-state solver's inner loop."""
    C = H / w
    x0 = _low_point_offset(L, h, C)
    integral = L / 2.0 + 0.5 * C * np.cosh((L - 2.0 * x0) / C) * np.sinh(L / C)
    return H * integral / _arc_length(L, h, C)


def parabolic_sag(span_length: ArrayLike, catenary_constant: ArrayLike) -> np.ndarray:
    """Parabolic approximation of the sag of a level span. Cross-check only.

    Parameters
    ----------
    span_length
        Horizontal span length, L. [m]
    catenary_constant
        C = H / w. [m]

    Returns
    -------
    D : numpy.ndarray
        :math:`L^2 / (8C)`; underestimates the catenary sag by about
        :math:`(L/C)^2/48` relative. [m]
    """
    L = np.asarray(span_length, dtype=float)
    return L**2 / (8.0 * _check_constant(catenary_constant))


def _solve_log_constant(residual: Callable[[float], float], c_lo: float, c_hi: float,
                        what: str) -> float:
    """Root of ``residual(log C)`` (monotone), expanding the upper bracket as needed."""
    lo, hi = np.log(c_lo), np.log(max(c_hi, 2.0 * c_lo))
    r_lo = residual(lo)
    r_hi = residual(hi)
    while np.sign(r_hi) == np.sign(r_lo) and hi < np.log(_SOLVER_MAX_CONSTANT_M):
        hi = min(hi + np.log(100.0), np.log(_SOLVER_MAX_CONSTANT_M))
        r_hi = residual(hi)
    if np.sign(r_hi) == np.sign(r_lo):
        raise ValueError(f"No catenary fits the given {what}.")
    return float(np.exp(optimize.brentq(residual, lo, hi, xtol=1e-13, rtol=1e-14,
                                         maxiter=500)))


def _vectorised(scalar_function: Callable[..., float], *args: ArrayLike) -> np.ndarray | float:
    arrays = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in args))
    if arrays[0].ndim == 0:
        return scalar_function(*(float(a) for a in arrays))
    return np.vectorize(scalar_function, otypes=[float])(*arrays)


def _constant_from_sag(L: float, h: float, D: float) -> float:
    if not (L > 0 and D > 0 and np.isfinite(h)):
        raise ValueError("The span length and the sag must be positive and finite.")
    guess = L * L / (8.0 * D) * (1.0 + (h / L) ** 2)
    # sag decreases monotonically with C.
    return _solve_log_constant(lambda lc: float(sag(L, h, np.exp(lc))) - D,
                               _SOLVER_MIN_CONSTANT_PER_SPAN * L, 4.0 * guess, "sag")


def catenary_constant_from_sag(span_length: ArrayLike, height_difference: ArrayLike,
                               sag_m: ArrayLike) -> np.ndarray | float:
    """Catenary constant C that gives the sag ``sag_m`` (inverse of :func:`sag`).

    Parameters
    ----------
    span_length
        Horizontal span length, L. [m]
    height_difference
        z_B - z_A, h. [m]
    sag_m
        Sag, the largest vertical chord-to-conductor distance. [m]

    Returns
    -------
    C : float or numpy.ndarray
        Catenary constant. [m]

    Notes
    -----
    Sag decreases monotonically with C; the root is found by Brent's method in log C, bracketed
    between :math:`C = L/50` and a multiple of the parabolic estimate
    :math:`L^2(1 + h^2/L^2)/(8D)`.
    """
    return _vectorised(_constant_from_sag, span_length, height_difference, sag_m)


def _constant_from_point(L: float, h: float, x: float, z: float) -> float:
    if not L > 0:
        raise ValueError("The span length must be positive.")
    if not (0.0 < x < L):
        raise ValueError("The point must lie between the supports.")
    chord = h * x / L
    if not z < chord:
        raise ValueError("The point must lie below the chord.")
    guess = x * (L - x) / (2.0 * (chord - z))
    # z(x) increases monotonically with C towards the chord.
    return _solve_log_constant(lambda lc: float(catenary_height(x, L, h, np.exp(lc))) - z,
                               _SOLVER_MIN_CONSTANT_PER_SPAN * L, 4.0 * guess + L, "point")


def catenary_constant_from_point(span_length: ArrayLike, height_difference: ArrayLike,
                                 x: ArrayLike, z: ArrayLike) -> np.ndarray | float:
    """Catenary constant C of the curve through both supports and the point (x, z).

    Parameters
    ----------
    span_length
        Horizontal span length, L. [m]
    height_difference
        z_B - z_A, h. [m]
    x
        Horizontal distance of the point from support A; 0 < x < L. [m]
    z
        Height of the point relative to support A; below the chord. [m]

    Returns
    -------
    C : float or numpy.ndarray
        Catenary constant. [m]

    Notes
    -----
    z(x) rises monotonically towards the chord as C grows; Brent's method in log C.
    """
    return _vectorised(_constant_from_point, span_length, height_difference, x, z)


def _constant_from_arc_length(L: float, h: float, S: float) -> float:
    if not L > 0:
        raise ValueError("The span length must be positive.")
    target_sq = S * S - h * h
    if not (np.isfinite(target_sq) and target_sq > L * L):
        raise ValueError("The arc length must exceed the chord length.")
    target = np.sqrt(target_sq)
    slack_h = target - L  # 2C(sinh(L/2C) - L/2C) ≈ L³/(24C²)
    guess = np.sqrt(L**3 / (24.0 * slack_h))
    return _solve_log_constant(lambda lc: target - float(2.0 * np.exp(lc)
                                                        * np.sinh(L / (2.0 * np.exp(lc)))),
                               _SOLVER_MIN_CONSTANT_PER_SPAN * L, 4.0 * guess, "arc length")


def catenary_constant_from_arc_length(span_length: ArrayLike, height_difference: ArrayLike,
                                      arc_length_m: ArrayLike) -> np.ndarray | float:
    """Catenary constant C for which the conductor between the supports is ``arc_length_m`` long.

    Parameters
    ----------
    span_length
        Horizontal span length, L. [m]
    height_difference
        z_B - z_A, h. [m]
    arc_length_m
        Conductor length between the supports, S; must exceed the chord. [m]

    Returns
    -------
    C : float or numpy.ndarray
        Catenary constant. [m]

    Notes
    -----
    Solves :math:`2C\\sinh(L/2C) = \\sqrt{S^2 - h^2}` (inverse of :func:`arc_length`).
    """
    return _vectorised(_constant_from_arc_length, span_length, height_difference, arc_length_m)

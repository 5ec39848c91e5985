"""Catenary of a conductor hanging between two supports at different heights.

Coordinates are in the wire's vertical plane: ``x`` is the horizontal distance from support A
(x = 0) towards support B (x = L), ``z`` the height relative to support A. The curve is

.. math:: z(x) = C\\,[\\cosh((x - x_0)/C) - \\cosh(x_0/C)]

with catenary constant :math:`C = H / w` (horizontal tension over weight per unit length) and
low point abscissa

.. math:: x_0 = L/2 - C\\,\\operatorname{asinh}\\big(h / (2 C \\sinh(L / 2C))\\big)

where :math:`h = z_B - z_A`. :math:`x_0` may lie outside [0, L] on steep spans (no low point
within the span). All functions broadcast over numpy arrays.

References
----------
.. [1] Irvine, H. M. (1981). *Cable Structures*. MIT Press, ch. 1 (inextensible catenary).
.. [2] IEEE Std 524-2016, *Guide for the Installation of Overhead Transmission Line
   Conductors*, annex on sag and tension (catenary equations).
"""
from __future__ import annotations

import numpy as np
from scipy import optimize


def _check_constant(catenary_constant):
    c = np.asarray(catenary_constant, dtype=float)
    if np.any(~(c > 0)):
        raise ValueError("catenary constant must be positive")
    return c


def low_point_offset(span_length, height_difference, catenary_constant):
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
    x0 : Horizontal distance from support A to the low point (can be < 0 or > L). [m]
    """
    L = np.asarray(span_length, dtype=float)
    h = np.asarray(height_difference, dtype=float)
    C = _check_constant(catenary_constant)
    return L / 2.0 - C * np.arcsinh(h / (2.0 * C * np.sinh(L / (2.0 * C))))


def catenary_height(x, span_length, height_difference, catenary_constant):
    """Height of the conductor above support A at horizontal distance ``x``.

    Parameters
    ----------
    x
        Horizontal distance from support A. [m]
    span_length, height_difference, catenary_constant
        See :func:`low_point_offset`. [m]

    Returns
    -------
    z : Height relative to support A (z(0) = 0, z(L) = h). [m]
    """
    C = _check_constant(catenary_constant)
    x0 = low_point_offset(span_length, height_difference, C)
    x = np.asarray(x, dtype=float)
    # cosh(a) - cosh(b) = 2 sinh((a+b)/2) sinh((a-b)/2): stable for large C.
    a = (x - x0) / C
    b = -x0 / C
    return 2.0 * C * np.sinh((a + b) / 2.0) * np.sinh((a - b) / 2.0)


def catenary_slope(x, span_length, height_difference, catenary_constant):
    """dz/dx of the conductor at ``x`` (tangent of its angle to the horizontal). [-]"""
    C = _check_constant(catenary_constant)
    x0 = low_point_offset(span_length, height_difference, C)
    return np.sinh((np.asarray(x, dtype=float) - x0) / C)


def sag_location(span_length, height_difference, catenary_constant):
    """Horizontal position of the largest chord-to-conductor vertical distance. [m]

    Where the conductor's slope equals the chord's slope h/L:
    :math:`x_s = x_0 + C\\,\\operatorname{asinh}(h/L)`.
    """
    C = _check_constant(catenary_constant)
    L = np.asarray(span_length, dtype=float)
    h = np.asarray(height_difference, dtype=float)
    return low_point_offset(L, h, C) + C * np.arcsinh(h / L)


def sag(span_length, height_difference, catenary_constant):
    """Sag: the largest vertical distance between the chord and the conductor.

    Parameters
    ----------
    span_length
        Horizontal span length, L. [m]
    height_difference
        z_B - z_A. [m]
    catenary_constant
        C = H / w. [m]

    Returns
    -------
    D : Sag. [m]

    Notes
    -----
    :math:`D = h\\,x_s/L - z(x_s)` with :math:`x_s` from :func:`sag_location`. For a level span
    this reduces to :math:`D = C(\\cosh(L/2C) - 1)`.
    """
    L = np.asarray(span_length, dtype=float)
    h = np.asarray(height_difference, dtype=float)
    xs = sag_location(L, h, catenary_constant)
    return h * xs / L - catenary_height(xs, L, h, catenary_constant)


def arc_length(span_length, height_difference, catenary_constant):
    """Length of conductor between the supports.

    Notes
    -----
    :math:`S = \\sqrt{h^2 + (2C\\sinh(L/2C))^2}` (exact identity for the catenary).

    Returns
    -------
    S : Arc length. [m]
    """
    L = np.asarray(span_length, dtype=float)
    h = np.asarray(height_difference, dtype=float)
    C = _check_constant(catenary_constant)
    return np.hypot(h, 2.0 * C * np.sinh(L / (2.0 * C)))


def slack(span_length, height_difference, catenary_constant):
    """Arc length minus the straight chord length between supports. [m]"""
    L = np.asarray(span_length, dtype=float)
    h = np.asarray(height_difference, dtype=float)
    C = _check_constant(catenary_constant)
    # S - chord computed without cancellation: (S² - chord²) / (S + chord).
    s_h = 2.0 * C * np.sinh(L / (2.0 * C))
    s = np.hypot(h, s_h)
    chord = np.hypot(h, L)
    return (s_h - L) * (s_h + L) / (s + chord)


def support_tensions(horizontal_tension, unit_weight, span_length, height_difference):
    """Total conductor tension at supports A and B.

    Parameters
    ----------
    horizontal_tension
        H. [N]
    unit_weight
        Weight (or resultant load) per unit length, w. [N/m]
    span_length, height_difference
        [m]

    Returns
    -------
    (T_A, T_B) : Tensions at the supports, :math:`T = H\\cosh((x - x_0)/C)`. [N]
    """
    H = np.asarray(horizontal_tension, dtype=float)
    w = np.asarray(unit_weight, dtype=float)
    C = H / w
    x0 = low_point_offset(span_length, height_difference, C)
    L = np.asarray(span_length, dtype=float)
    return H * np.cosh(-x0 / C), H * np.cosh((L - x0) / C)


def parabolic_sag(span_length, catenary_constant):
    """Parabolic approximation of the sag, :math:`D \\approx L^2 / (8C)`. Cross-check only. [m]"""
    L = np.asarray(span_length, dtype=float)
    return L**2 / (8.0 * _check_constant(catenary_constant))


def _solve_constant(residual, lo=1e-3, hi=1e9):
    return optimize.brentq(residual, lo, hi, xtol=1e-12, rtol=1e-14, maxiter=500)


def catenary_constant_from_sag(span_length, height_difference, sag_m):
    """Catenary constant C that gives the sag ``sag_m`` (inverse of :func:`sag`).

    Parameters
    ----------
    span_length, height_difference
        [m]
    sag_m
        Sag, the largest vertical chord-to-conductor distance. [m]

    Returns
    -------
    C : [m] (scalar inputs; use ``np.vectorize`` for arrays).
    """
    L, h, D = float(span_length), float(height_difference), float(sag_m)
    if not (L > 0 and D > 0):
        raise ValueError("span length and sag must be positive")
    # sag decreases monotonically with C; work in log C for conditioning.
    return float(np.exp(_solve_constant(lambda lc: float(sag(L, h, np.exp(lc))) - D,
                                        np.log(1e-3), np.log(1e12))))


def catenary_constant_from_point(span_length, height_difference, x, z):
    """Catenary constant C of the curve through both supports and the point (x, z).

    Parameters
    ----------
    span_length, height_difference
        [m]
    x, z
        A point on the conductor, horizontal distance from A and height relative to A; it must
        lie below the chord (0 < x < L). [m]

    Returns
    -------
    C : [m]
    """
    L, h, x, z = map(float, (span_length, height_difference, x, z))
    if not (0.0 < x < L):
        raise ValueError("the point must lie between the supports")
    if z >= h * x / L:
        raise ValueError("the point must lie below the chord")
    return float(np.exp(_solve_constant(
        lambda lc: float(catenary_height(x, L, h, np.exp(lc))) - z, np.log(1e-3), np.log(1e12))))

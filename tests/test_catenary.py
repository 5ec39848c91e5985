"""Tests of clearaudit.physics.catenary against a handbook example and independent numerics.

The reference curve in these tests is built from the cosh form directly, with the low point
found by scipy.optimize.brentq from the support condition (not from clearaudit), and lengths,
sags and tensions are integrated or searched numerically with scipy.
"""
from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, optimize

from clearaudit.physics import catenary as cat
from clearaudit.units import FOOT_M, LB_PER_FT_TO_N_PER_M, POUND_FORCE_N


# ----------------------------------------------------------------------------- reference curve
def reference_low_point(span, h, constant):
    """x0 from C[cosh((L - x0)/C) - cosh(x0/C)] = h by root finding (Irvine 1981, ch. 1)."""
    def mismatch(x0):
        return constant * (np.cosh((span - x0) / constant) - np.cosh(x0 / constant)) - h
    width = span + constant * 20
    return optimize.brentq(mismatch, -width, width, xtol=1e-12, rtol=1e-15)


def reference_z(x, span, h, constant):
    x0 = reference_low_point(span, h, constant)
    return constant * (np.cosh((x - x0) / constant) - np.cosh(x0 / constant))


def reference_arc_length(span, h, constant):
    """scipy.integrate.quad of sqrt(1 + z'^2), z' by the derivative of the cosh form."""
    x0 = reference_low_point(span, h, constant)
    value, _ = integrate.quad(lambda x: np.sqrt(1 + np.sinh((x - x0) / constant) ** 2),
                              0, span, epsabs=1e-12, epsrel=1e-13)
    return value


def reference_sag(span, h, constant):
    """Brute-force maximum of chord minus curve on a fine grid, refined by a bounded search."""
    x = np.linspace(0, span, 200001)
    gap = h * x / span - reference_z(x, span, h, constant)
    i = int(np.argmax(gap))
    lo, hi = x[max(i - 1, 0)], x[min(i + 1, x.size - 1)]
    result = optimize.minimize_scalar(
        lambda t: -(h * t / span - reference_z(t, span, h, constant)), bounds=(lo, hi),
        method="bounded", options={"xatol": 1e-10})
    return max(-result.fun, gap[i])


CASES = [  # (L, h, C) [m]: level, inclined, steep, taut, slack
    (300.0, 0.0, 1500.0), (400.0, 40.0, 1800.0), (250.0, -60.0, 900.0),
    (150.0, 30.0, 3000.0), (500.0, 100.0, 600.0), (80.0, 0.0, 20000.0), (600.0, 150.0, 400.0),
]


# ----------------------------------------------------------------------------- handbook example
def test_handbook_level_span_795_kcmil_acsr():
    # From memory, handbook worked example: level 600 ft span, 795 kcmil 26/7 ACSR weighing
    # 1.094 lb/ft, horizontal tension 6,300 lb -> sag 7.81 ft, arc length minus span 0.27 ft.
    # Exact unit factors from clearaudit.units (NIST). The exact catenary gives 7.816 ft and the
    # parabola 7.814 ft; the quoted 7.81 is checked to one unit in its last digit (0.01 ft).
    span = 600 * FOOT_M
    weight = 1.094 * LB_PER_FT_TO_N_PER_M
    tension = 6300 * POUND_FORCE_N
    constant = tension / weight
    assert cat.sag(span, 0.0, constant) / FOOT_M == pytest.approx(7.81, abs=0.01)
    assert (cat.arc_length(span, 0.0, constant) - span) / FOOT_M == pytest.approx(0.27,
                                                                                  abs=0.005)
    assert cat.slack(span, 0.0, constant) / FOOT_M == pytest.approx(0.27, abs=0.005)


# ----------------------------------------------------------------------------- identities
@pytest.mark.parametrize("span,h,constant", CASES)
def test_curve_matches_cosh_form(span, h, constant):
    # Reference: cosh form with the low point from brentq (Irvine 1981, ch. 1).
    x = np.linspace(0, span, 41)
    assert cat.low_point_offset(span, h, constant) == pytest.approx(
        reference_low_point(span, h, constant), rel=1e-9, abs=1e-8)
    np.testing.assert_allclose(cat.catenary_height(x, span, h, constant),
                               reference_z(x, span, h, constant), rtol=1e-9, atol=1e-8)
    assert cat.catenary_height(0.0, span, h, constant) == pytest.approx(0.0, abs=1e-9)
    assert cat.catenary_height(span, span, h, constant) == pytest.approx(h, abs=1e-8)
    # slope against a central finite difference of the reference curve
    step = 1e-3
    fd = (reference_z(x[1:-1] + step, span, h, constant)
          - reference_z(x[1:-1] - step, span, h, constant)) / (2 * step)
    np.testing.assert_allclose(cat.catenary_slope(x[1:-1], span, h, constant), fd, atol=1e-7)


@pytest.mark.parametrize("span,h,constant", CASES)
def test_arc_length_and_slack_against_quadrature(span, h, constant):
    # Reference: scipy.integrate.quad of sqrt(1 + z'^2).
    length = reference_arc_length(span, h, constant)
    assert cat.arc_length(span, h, constant) == pytest.approx(length, rel=1e-11)
    assert cat.slack(span, h, constant) == pytest.approx(length - np.hypot(span, h),
                                                         rel=1e-6, abs=1e-9)


@pytest.mark.parametrize("span,h,constant", CASES)
def test_sag_against_brute_force(span, h, constant):
    # Reference: brute-force maximum of chord minus curve.
    assert cat.sag(span, h, constant) == pytest.approx(reference_sag(span, h, constant),
                                                       rel=1e-9)


@pytest.mark.parametrize("span,h,constant", CASES)
def test_support_and_average_tensions(span, h, constant):
    # References: T = H cosh((x - x0)/C) with the brentq low point (Irvine 1981, ch. 1);
    # T = sqrt(H^2 + V^2) with V = w x (arc length from the low point, by quad); the classic
    # identity T_B - T_A = w h; average tension by quad of T ds.
    weight = 16.0
    tension = weight * constant
    x0 = reference_low_point(span, h, constant)
    t_a, t_b = cat.support_tensions(tension, weight, span, h)
    assert t_a == pytest.approx(tension * np.cosh(-x0 / constant), rel=1e-10)
    assert t_b == pytest.approx(tension * np.cosh((span - x0) / constant), rel=1e-10)

    def arc_from_low_point(x):
        value, _ = integrate.quad(lambda u: np.sqrt(1 + np.sinh((u - x0) / constant) ** 2),
                                  x0, x, epsabs=1e-10, epsrel=1e-12)
        return value

    assert t_a == pytest.approx(np.hypot(tension, weight * arc_from_low_point(0.0)), rel=1e-9)
    assert t_b == pytest.approx(np.hypot(tension, weight * arc_from_low_point(span)), rel=1e-9)
    assert t_b - t_a == pytest.approx(weight * h, rel=1e-8, abs=1e-6)
    integral, _ = integrate.quad(lambda x: tension * np.cosh((x - x0) / constant) ** 2, 0, span,
                                 epsabs=1e-8, epsrel=1e-12)
    assert cat.average_tension(tension, weight, span, h) == pytest.approx(
        integral / reference_arc_length(span, h, constant), rel=1e-10)


@settings(max_examples=30, deadline=None)
@given(span=st.floats(30, 1500), incline=st.floats(-0.5, 0.5), sag_ratio=st.floats(0.005, 0.05))
def test_parabolic_sag_within_expected_error(span, incline, sag_ratio):
    # Taylor series of cosh (common practice, no source): level-span catenary sag
    # C(cosh u - 1) = C u^2/2 (1 + u^2/12 + ...), u = L/2C, so the parabola L^2/8C is low by
    # about (L/C)^2/48, i.e. < 0.35 % for sag/span < 5 %. Inclined spans: the catenary sag
    # measured vertically from the chord is close to L^2 sqrt(1 + (h/L)^2) / (8C) (same order).
    constant = span / (8 * sag_ratio)
    exact = float(cat.sag(span, 0.0, constant))
    parabola = float(cat.parabolic_sag(span, constant))
    expected = (span / constant) ** 2 / 48
    assert 0 < 1 - parabola / exact <= 1.05 * expected
    assert 1 - parabola / exact < 0.0035
    h = incline * span
    inclined = float(cat.sag(span, h, constant))
    assert inclined == pytest.approx(parabola * np.hypot(1, incline), rel=0.01)


# ----------------------------------------------------------------------------- inverses
@pytest.mark.parametrize("span,h,constant", CASES)
def test_inverse_problems_round_trip(span, h, constant):
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no overflow in the solver brackets
        d = float(cat.sag(span, h, constant))
        assert cat.catenary_constant_from_sag(span, h, d) == pytest.approx(constant, rel=1e-9)
        x = 0.37 * span
        z = float(reference_z(x, span, h, constant))
        assert cat.catenary_constant_from_point(span, h, x, z) == pytest.approx(constant,
                                                                                 rel=1e-8)
        s = reference_arc_length(span, h, constant)
        assert cat.catenary_constant_from_arc_length(span, h, s) == pytest.approx(
            constant, rel=1e-6)


def test_inverse_solvers_extremes_without_warnings():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        # a nearly taut span (sag 1 mm), a very slack one (sag 40 % of the span), a steep one
        for span, h, sag_m in [(500.0, 0.0, 1e-3), (100.0, 0.0, 40.0), (300.0, 250.0, 2.0),
                               (2000.0, -800.0, 150.0)]:
            c = cat.catenary_constant_from_sag(span, h, sag_m)
            assert cat.sag(span, h, c) == pytest.approx(sag_m, rel=1e-9)
        vector = cat.catenary_constant_from_sag([300.0, 400.0], [0.0, 30.0], [6.0, 9.0])
        assert vector.shape == (2,)
        np.testing.assert_allclose(cat.sag([300.0, 400.0], [0.0, 30.0], vector), [6.0, 9.0])


def test_large_constant_keeps_precision():
    # C >> L: sag -> L^2/8C and slack -> L^3/(24 C^2) (Taylor series, common practice).
    span, constant = 100.0, 1e7
    assert cat.sag(span, 0.0, constant) == pytest.approx(span**2 / (8 * constant), rel=1e-6)
    assert cat.slack(span, 0.0, constant) == pytest.approx(span**3 / (24 * constant**2),
                                                           rel=1e-6)


def test_bad_arguments():
    with pytest.raises(ValueError):
        cat.sag(300.0, 0.0, -5.0)
    with pytest.raises(ValueError):
        cat.sag(0.0, 0.0, 1000.0)
    with pytest.raises(ValueError):
        cat.catenary_constant_from_sag(300.0, 0.0, 0.0)
    with pytest.raises(ValueError):
        cat.catenary_constant_from_point(300.0, 0.0, 100.0, 1.0)  # above the chord
    with pytest.raises(ValueError):
        cat.catenary_constant_from_point(300.0, 0.0, 400.0, -1.0)  # outside the span
    with pytest.raises(ValueError):
        cat.catenary_constant_from_arc_length(300.0, 0.0, 299.0)

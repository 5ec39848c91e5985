"""Tests of clearaudit.physics.fit (robust catenary fit with confidence intervals).

Truth: synthetic spans drawn from the exact catenary (Irvine 1981, Cable Structures, ch. 1),
sampled at even arc-length spacing, rotated about the chord for blowout, with isotropic Gaussian
noise. The truth curve is built here from numpy's cosh directly (not from clearaudit), so the fit
is checked against an independent geometry.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from clearaudit.physics.fit import PARAMETER_NAMES, fit_catenary


# ----------------------------------------------------------------------------- synthetic spans
def _catenary_z(x, span, h, constant):
    """Height above A of the catenary through (0, 0) and (span, h) (Irvine 1981, eq. 1.9)."""
    x0 = span / 2 - constant * np.arcsinh(h / (2 * constant * np.sinh(span / (2 * constant))))
    return constant * (np.cosh((x - x0) / constant) - np.cosh(x0 / constant))


@dataclass
class SyntheticSpan:
    points: np.ndarray
    support_a_xy: np.ndarray
    support_b_xy: np.ndarray
    catenary_constant_m: float
    sag_m: float
    z_a_m: float
    z_b_m: float
    tilt_rad: float


def synthetic_span(rng, span_length_m=300.0, height_difference_m=20.0,
                   catenary_constant_m=1500.0, spacing_m=0.5, noise_m=0.03, tilt_rad=0.0,
                   n_gaps=0, outlier_fraction=0.0, keep=(0.0, 1.0)) -> SyntheticSpan:
    """Points along an exact catenary whose plane is rotated by ``tilt_rad`` about its chord."""
    L, h, C = span_length_m, height_difference_m, catenary_constant_m
    plane_span = np.hypot(L, h * np.sin(tilt_rad))
    plane_h = h * np.cos(tilt_rad)
    xi = np.linspace(0.0, plane_span, 40001)
    deflection = plane_h * xi / plane_span - _catenary_z(xi, plane_span, plane_h, C)
    s = xi * L / plane_span
    lateral = deflection * np.sin(tilt_rad)
    z = h * s / L - deflection * np.cos(tilt_rad)
    arc = np.concatenate([[0.0], np.cumsum(np.sqrt(np.diff(s) ** 2 + np.diff(lateral) ** 2
                                                   + np.diff(z) ** 2))])
    at = np.arange(rng.uniform(0, spacing_m), arc[-1], spacing_m)
    s, lateral, z = (np.interp(at, arc, q) for q in (s, lateral, z))
    keep_mask = (s >= keep[0] * L) & (s <= keep[1] * L)
    for _ in range(n_gaps):
        start, length = rng.uniform(0, L), rng.uniform(5.0, 0.1 * L)
        keep_mask &= ~((s > start) & (s < start + length))
    s, lateral, z = s[keep_mask], lateral[keep_mask], z[keep_mask]
    angle = rng.uniform(0, 2 * np.pi)
    direction = np.array([np.cos(angle), np.sin(angle)])
    normal = np.array([-direction[1], direction[0]])
    origin = rng.uniform(-200, 200, 2)
    z_a = rng.uniform(10, 40)
    # structures sit a few metres to the side of the wire (cross-arm offset)
    arm = rng.uniform(-6, 6)
    xy = origin + s[:, None] * direction + lateral[:, None] * normal
    points = np.column_stack([xy, z + z_a]) + rng.normal(0.0, noise_m, (s.size, 3))
    n_out = int(outlier_fraction * s.size)
    if n_out:
        index = rng.choice(s.size, n_out, replace=False)
        points[index] += rng.normal(0.0, 2.0, (n_out, 3))
    sag = float(np.max(plane_h * xi / plane_span - _catenary_z(xi, plane_span, plane_h, C)))
    return SyntheticSpan(points, origin + arm * normal, origin + L * direction + arm * normal,
                         C, sag, z_a, z_a + h, tilt_rad)


def random_span_parameters(rng) -> dict:
    """Realistic span: 150-500 m, C 800-3000 m, up to 20 % incline, 0.3-1 m spacing, gaps."""
    L = rng.uniform(150, 500)
    return dict(span_length_m=L, height_difference_m=L * rng.uniform(-0.2, 0.2),
                catenary_constant_m=rng.uniform(800, 3000), spacing_m=rng.uniform(0.3, 1.0),
                noise_m=0.03, tilt_rad=rng.choice([0.0, rng.uniform(-0.5, 0.5)]),
                n_gaps=int(rng.integers(0, 4)))


def _expected_relative_c_se(span):
    """Rough information limit on C: SE(sag) ~ 0.1 m / sqrt(n) for 3 cm noise (3-parameter
    quadratic fit with uniform stations: var of the t^2 coefficient is 180 sigma^2 / n)."""
    return 0.03 * np.sqrt(180.0 / len(span.points)) / 4.0 / span.sag_m


# ----------------------------------------------------------------------------- property tests
span_strategy = dict(
    seed=st.integers(0, 2**32 - 1), span=st.floats(150, 500), constant=st.floats(800, 3000),
    incline=st.floats(-0.2, 0.2), spacing=st.floats(0.3, 1.0), gaps=st.integers(0, 3))


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(**span_strategy)
def test_recovers_sag_within_5_cm(seed, span, constant, incline, spacing, gaps):
    # Brief target: sag within 5 cm with 3 cm noise (synthetic truth, exact catenary).
    rng = np.random.default_rng(seed)
    truth = synthetic_span(rng, span, incline * span, constant, spacing, 0.03, 0.0, gaps)
    fit = fit_catenary(truth.points, truth.support_a_xy, truth.support_b_xy)
    assert fit.ok, fit.reason
    assert abs(fit.sag_m - truth.sag_m) < 0.05
    assert abs(fit.z_a_m - truth.z_a_m) < 0.05 and abs(fit.z_b_m - truth.z_b_m) < 0.05


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(**span_strategy)
def test_recovers_catenary_constant_within_1_percent(seed, span, constant, incline, spacing,
                                                     gaps):
    # Brief target: C within 1 %. Only reachable where the data carry that information: with
    # 3 cm noise, SE(C)/C ~ SE(sag)/sag; e.g. a 150 m span at C = 3000 m (sag 0.94 m) sampled
    # every metre has SE ~ 0.9 % (95 % interval ~ 1.8 %). The 1 % check is applied where the
    # expected standard error is below 1/3 %; everywhere else the error must lie within 1.5x
    # the fit's own 95 % half-width (about 3 standard errors).
    rng = np.random.default_rng(seed)
    truth = synthetic_span(rng, span, incline * span, constant, spacing, 0.03, 0.0, gaps)
    fit = fit_catenary(truth.points, truth.support_a_xy, truth.support_b_xy)
    assert fit.ok, fit.reason
    error = abs(fit.catenary_constant_m - constant)
    if _expected_relative_c_se(truth) < 1.0 / 300.0:
        assert error / constant < 0.01
    else:
        assert error < 1.5 * fit.catenary_constant_ci95_m


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**32 - 1), span=st.floats(150, 500), constant=st.floats(800, 2000),
       incline=st.floats(-0.2, 0.2), tilt=st.floats(-0.6, 0.6))
@example(seed=1, span=150.0, constant=1831.0, incline=0.125, tilt=0.0)
def test_blown_out_span_recovers_tilt_and_constant(seed, span, constant, incline, tilt):
    # Plane rotated about the chord (exact geometry built above); tilt within 0.01 rad. The
    # constant as in test_recovers_catenary_constant_within_1_percent: 1 % where the data
    # carry that information, else within 1.5x the fit's own 95 % half-width (a short, tight
    # span such as 150 m at C = 1831 m, sag 1.5 m, has SE(C)/C ~ 0.4 %: 1.0002 % was seen).
    rng = np.random.default_rng(seed)
    truth = synthetic_span(rng, span, incline * span, constant, 0.5, 0.03, tilt, 1)
    fit = fit_catenary(truth.points, truth.support_a_xy, truth.support_b_xy)
    assert fit.ok, fit.reason
    assert abs(fit.tilt_rad - tilt) < 0.01
    error = abs(fit.catenary_constant_m - constant)
    if _expected_relative_c_se(truth) < 1.0 / 300.0:
        assert error / constant < 0.01
    else:
        assert error < 1.5 * fit.catenary_constant_ci95_m
    assert abs(fit.sag_m - truth.sag_m) < 0.05


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**32 - 1), span=st.floats(200, 500), constant=st.floats(800, 2500))
def test_without_supports_and_with_outliers(seed, span, constant):
    # 3 % gross outliers (2 m scatter): the robust loss must ignore them.
    rng = np.random.default_rng(seed)
    truth = synthetic_span(rng, span, 0.1 * span, constant, 0.5, 0.03, 0.0, 0, 0.03)
    fit = fit_catenary(truth.points)
    assert fit.ok, fit.reason
    assert abs(fit.catenary_constant_m / constant - 1) < 0.01
    # without supports the span is the extent of the inlier points: the samples start up to one
    # spacing (0.5 m) inside each support and an end sample may be one of the outliers, so the
    # extent is within 1 m + 2 spacings + 1 spacing of the true span
    assert abs(fit.span_length_m - span) < 2.5
    assert fit.n_inliers >= 0.96 * len(truth.points)


def test_interval_coverage_small_sample():
    # Reduced version of benchmarks/bench_fit_coverage.py (500 spans, target 90-98 %): 60 spans,
    # wide acceptance 80-100 % because of the small sample (binomial SD ~3 % at 95 %).
    rng = np.random.default_rng(7)
    hits_c, hits_sag, fitted = 0, 0, 0
    for _ in range(60):
        truth = synthetic_span(rng, **random_span_parameters(rng))
        fit = fit_catenary(truth.points, truth.support_a_xy, truth.support_b_xy)
        if not fit.ok:
            continue
        fitted += 1
        hits_c += abs(fit.catenary_constant_m - truth.catenary_constant_m) \
            <= fit.catenary_constant_ci95_m
        hits_sag += abs(fit.sag_m - truth.sag_m) <= fit.sag_ci95_m
    assert fitted == 60
    assert 0.80 <= hits_c / fitted <= 1.0
    assert 0.80 <= hits_sag / fitted <= 1.0


# ----------------------------------------------------------------------------- contract details
def test_result_contract_and_curve_geometry():
    rng = np.random.default_rng(3)
    truth = synthetic_span(rng, 320.0, 25.0, 1400.0, 0.5, 0.03)
    fit = fit_catenary(truth.points, truth.support_a_xy, truth.support_b_xy)
    assert fit.ok and fit.reason == ""
    assert fit.n_points == len(truth.points)
    assert fit.covariance.shape == (6, 6) and len(PARAMETER_NAMES) == 6
    assert np.isclose(np.hypot(*fit.direction), 1.0)
    # direction points from support A to support B
    assert fit.direction @ (truth.support_b_xy - truth.support_a_xy) > 0
    assert abs(fit.span_length_m - 320.0) < 0.05
    curve = fit.curve(50)
    assert curve.shape == (50, 3)
    assert np.allclose(curve[0], fit.attachment_a) and np.allclose(curve[-1], fit.attachment_b)
    # every data point lies close to the fitted curve (3 cm noise)
    dense = fit.curve(20000)
    nearest = np.min(np.linalg.norm(truth.points[:400, None, :] - dense[None, ::4, :], axis=2),
                     axis=1)
    assert np.sqrt(np.mean(nearest**2)) < 0.08
    h, h_ci = fit.horizontal_tension_n(15.0)
    assert h == pytest.approx(15.0 * fit.catenary_constant_m)
    assert h_ci == pytest.approx(15.0 * fit.catenary_constant_ci95_m)
    assert 0.99 <= fit.coverage <= 1.0 and fit.largest_gap_m < 3.0
    assert fit.as_dict()["parameter_names"][2] == "log_catenary_constant"


def test_partial_span_extrapolates_with_wider_interval():
    # Only the first 40 % of the span observed; supports known.
    rng = np.random.default_rng(11)
    full = synthetic_span(rng, 300.0, 15.0, 1500.0, 0.5, 0.03)
    rng = np.random.default_rng(11)
    part = synthetic_span(rng, 300.0, 15.0, 1500.0, 0.5, 0.03, keep=(0.0, 0.4))
    fit_full = fit_catenary(full.points, full.support_a_xy, full.support_b_xy)
    fit_part = fit_catenary(part.points, part.support_a_xy, part.support_b_xy)
    assert fit_part.ok, fit_part.reason
    assert fit_part.z_b_ci95_m > 5 * fit_full.z_b_ci95_m
    assert abs(fit_part.z_b_m - part.z_b_m) < 3 * fit_part.z_b_ci95_m
    assert fit_part.coverage == pytest.approx(0.4, abs=0.02)
    assert fit_part.largest_gap_m == pytest.approx(180.0, abs=2.0)
    assert fit_part.station_max_m == pytest.approx(120.0, abs=2.0)


def test_huber_loss_and_no_tilt():
    rng = np.random.default_rng(5)
    truth = synthetic_span(rng, 250.0, -20.0, 1200.0, 0.5, 0.03, outlier_fraction=0.02)
    fit = fit_catenary(truth.points, truth.support_a_xy, truth.support_b_xy, loss="huber",
                       fit_tilt=False)
    assert fit.ok, fit.reason
    assert fit.tilt_rad == 0.0 and fit.covariance[5, 5] == 0.0
    assert abs(fit.catenary_constant_m / 1200.0 - 1) < 0.01


# ----------------------------------------------------------------------------- failures
def test_too_few_points():
    rng = np.random.default_rng(1)
    truth = synthetic_span(rng, 200.0, 0.0, 1000.0, 20.0)
    fit = fit_catenary(truth.points[:9])
    assert not fit.ok and fit.reason == "too few points (9 < 15)"
    assert np.all(np.isnan(fit.point_at([0.0, 1.0])))


def test_nans_are_dropped_and_counted():
    rng = np.random.default_rng(2)
    truth = synthetic_span(rng, 300.0, 10.0, 1500.0, 0.5)
    points = truth.points.copy()
    points[::10, 2] = np.nan
    fit = fit_catenary(points, truth.support_a_xy, truth.support_b_xy)
    assert fit.ok and fit.n_points == len(points)
    assert abs(fit.catenary_constant_m / 1500.0 - 1) < 0.01
    all_nan = np.full((40, 3), np.nan)
    fit = fit_catenary(all_nan)
    assert not fit.ok and fit.reason.startswith("too few points (0 < 15")


def test_one_sided_coverage_without_supports():
    # 400 points in the first 50 m, two stray wire points 250 m away.
    rng = np.random.default_rng(4)
    truth = synthetic_span(rng, 300.0, 0.0, 1500.0, 0.5, keep=(0.0, 0.17))
    stray = synthetic_span(np.random.default_rng(4), 300.0, 0.0, 1500.0, 0.5,
                           keep=(0.99, 1.0)).points[:2]
    fit = fit_catenary(np.vstack([truth.points, stray]))
    assert not fit.ok and fit.reason == "one-sided coverage"


def test_straight_line_is_not_a_catenary():
    rng = np.random.default_rng(8)
    t = np.linspace(0, 200, 400)
    points = np.column_stack([t, 0.5 * t, 20 + 0.1 * t]) + rng.normal(0, 0.03, (400, 3))
    fit = fit_catenary(points)
    assert not fit.ok
    assert fit.reason.startswith(("not a catenary", "sag not resolved"))


def test_random_cloud_is_not_a_catenary():
    rng = np.random.default_rng(9)
    points = rng.uniform([0, -5, 10], [200, 5, 30], (500, 3))
    fit = fit_catenary(points)
    assert not fit.ok and fit.reason.startswith("not a catenary")


def test_upside_down_curve_is_not_a_catenary():
    rng = np.random.default_rng(10)
    t = np.linspace(0, 200, 400)
    points = np.column_stack([t, np.zeros_like(t), 20 + t * (200 - t) / 2000])
    fit = fit_catenary(points + rng.normal(0, 0.03, points.shape))
    assert not fit.ok and fit.reason.startswith("not a catenary")


def test_bad_arguments_raise():
    points = np.zeros((20, 3))
    with pytest.raises(ValueError):
        fit_catenary(np.zeros((20, 2)))
    with pytest.raises(ValueError):
        fit_catenary(points, loss="square")
    with pytest.raises(ValueError):
        fit_catenary(points, support_a_xy=[0.0, 0.0])
    with pytest.raises(ValueError):
        fit_catenary(points, min_points=3)


def test_degenerate_data_never_raises():
    fit = fit_catenary(np.zeros((50, 3)))
    assert not fit.ok and fit.reason
    fit = fit_catenary(np.ones((50, 3)), [0.0, 0.0], [np.nan, 1.0])
    assert not fit.ok and fit.reason == "support position not finite"

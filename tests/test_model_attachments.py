"""Attachment stations and their uncertainty (``clearaudit.model.attachments``)."""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from clearaudit.model.attachments import (
    deadend_axis_shift,
    pool_stations,
    regular_start,
    sag_ci95_with_stations,
    uniform_end,
)
from clearaudit.physics.fit import fit_catenary


def test_uniform_end_unbiased_with_order_statistic_variance():
    # David & Nagaraja (2003), Order Statistics, ch. 2-3: for n uniform points on [a, b],
    # max + range/(n-1) is unbiased for b with variance theta^2 n / ((n+1)(n+2)(n-1)).
    # Checked by Monte Carlo with scipy.stats.uniform as the reference sampler.
    a, b, n = 0.0, 3.1, 26
    samples = stats.uniform(a, b - a).rvs(size=(20000, n), random_state=np.random.default_rng(4))
    est = samples.max(axis=1) + np.ptp(samples, axis=1) / (n - 1)
    assert est.mean() == pytest.approx(b, abs=0.003)
    theory = (b - a) * math.sqrt(n / ((n + 1) * (n + 2) * (n - 1)))
    assert est.std() == pytest.approx(theory, rel=0.03)
    # the function reports the same standard deviation (from the sample's own range)
    _, sd = uniform_end(samples[0])
    assert sd == pytest.approx(theory, rel=0.15)


def test_uniform_end_from_top_points_ignores_members_below():
    rng = np.random.default_rng(7)
    errors, sds = [], []
    for _ in range(2000):
        string = rng.uniform(0.0, 3.1, 26)
        other = rng.uniform(-2.0, 0.0, 15)   # the string on the other side of the structure
        end, sd = uniform_end(np.concatenate([string, other]), top=20)
        errors.append(end - 3.1)
        sds.append(sd)
    # unbiased, and the reported sd matches the scatter within 15 % (Monte Carlo reference)
    assert abs(np.mean(errors)) < 0.01
    assert np.std(errors) == pytest.approx(np.mean(sds), rel=0.15)


def test_regular_start_of_regular_points():
    # points at (i + 0.5) * 0.6 m from a start at 2.0 m: the start is recovered exactly;
    # the standard deviation is that of a phase uniform over one spacing, 0.6/sqrt(12)
    s = 2.0 + (np.arange(40) + 0.5) * 0.6
    start, sd, spacing = regular_start(s[::-1])
    assert start == pytest.approx(2.0, abs=1e-9)
    assert spacing == pytest.approx(0.6)
    assert sd == pytest.approx(0.6 / math.sqrt(12.0))


def test_pool_stations_follows_the_crossarm_line_and_resists_one_bad_string():
    slope = -math.tan(math.radians(10.0))      # arms on the bisector of a 20 degree angle
    t = np.array([-7.5, 0.0, 7.5])
    truth = 3.06 + slope * t
    got = truth + np.array([0.02, -0.01, -0.35])  # the third string has a gap at its end
    pooled, sd, used = pool_stations(got, t, [0.08, 0.10, 0.07], slope)
    assert used.all()
    assert np.max(np.abs(pooled - truth)) < 0.03   # median of the offsets
    assert np.all(sd < 0.08)
    with pytest.raises(ValueError):
        pool_stations([1.0, 2.0], [0.0, 1.0], [0.1, 0.0])


def test_sag_sensitivity_to_the_attachment_stations():
    # level span, C = 1500 m, L = 300 m: sag D = C (cosh(L/2C) - 1) (Irvine 1981, ch. 1);
    # moving one end by delta along the curve changes the sag by about dD/dL = L / (4 C)
    # on the parabola D = L^2 / 8C (common practice (no source))
    c, span = 1500.0, 300.0
    x = np.linspace(1.0, span - 1.0, 600)
    z = c * (np.cosh((x - span / 2) / c) - math.cosh(span / 2 / c))
    fit = fit_catenary(np.column_stack([x, np.zeros_like(x), z]), [0.0, 0.0], [span, 0.0])
    assert fit.ok
    sd = 0.1
    total = sag_ci95_with_stations(fit, sd, sd)
    g = span / (4.0 * c)
    expected = math.sqrt(fit.sag_ci95_m**2 + 2 * (1.959964 * g * sd) ** 2)
    assert total == pytest.approx(expected, rel=0.02)
    assert sag_ci95_with_stations(fit, 0.0, 0.0) == pytest.approx(fit.sag_ci95_m)


def _reference_solution(e, f, sd, near, near_sd, prior_sd, length=None, length_sd=None):
    """The same estimator as a stacked weighted least-squares problem solved by
    scipy.linalg.lstsq (general-purpose reference library): rows sqrt(w) x = sqrt(w) y for the
    far ends (x = (e, 1)), near ends (x = (e, 0)) and the prior rows delta = 0 (and l = l0)."""
    from scipy import linalg

    rows, rhs = [], []
    for ei, fi, si in zip(e, f, sd, strict=True):
        rows.append(np.r_[ei, 1.0] / si)
        rhs.append(fi / si)
    for ei, gi, si in zip(e, near, near_sd, strict=True):
        if np.isfinite(gi):
            rows.append(np.r_[ei, 0.0] / si)
            rhs.append(gi / si)
    rows += [np.array([1.0, 0.0, 0.0]) / prior_sd, np.array([0.0, 1.0, 0.0]) / prior_sd]
    rhs += [0.0, 0.0]
    if length is not None:
        rows.append(np.array([0.0, 0.0, 1.0]) / length_sd)
        rhs.append(length / length_sd)
    theta, *_ = linalg.lstsq(np.array(rows), np.array(rhs))
    return theta


def test_deadend_axis_shift_straight_line_cancels_the_string_length():
    # straight line, strings on both sides: the far ends are f_a = d + l, f_b = -d + l,
    # so d = (f_a - f_b)/2 and l = (f_a + f_b)/2 (algebra); with a weak prior it is exact
    e = np.array([[1.0, 0.0], [-1.0, 0.0]])
    shift, shift_sd, length, length_sd = deadend_axis_shift(e, [3.20, 2.96], [0.03, 0.03],
                                                            prior_sd_m=1e4)
    assert shift == pytest.approx([0.12, -0.12], abs=1e-6)
    assert length == pytest.approx(3.08, abs=1e-6)
    # the sd of (f_a - f_b)/2 is sqrt(2) 0.03 / 2 (propagation of independent errors)
    assert shift_sd == pytest.approx([0.03 / math.sqrt(2.0)] * 2, rel=1e-4)
    assert length_sd == pytest.approx(0.03 / math.sqrt(2.0), rel=1e-4)


def test_deadend_axis_shift_matches_a_reference_least_squares_solution():
    # a 20 degree angle structure with near ends seen on one side, and a line end with a
    # string length known from elsewhere; reference: scipy.linalg.lstsq on the stacked rows
    a = math.radians(20.0)
    e = np.array([[1.0, 0.0], [-math.cos(a), math.sin(a)]])
    f, sd = [3.15, 2.95], [0.03, 0.04]
    near, near_sd = [0.06, np.nan], [0.04, np.nan]
    shift, _, length, _ = deadend_axis_shift(e, f, sd, near_ends_m=near, near_sd_m=near_sd,
                                             prior_sd_m=0.1)
    theta = _reference_solution(e, f, sd, near, near_sd, 0.1)
    assert shift == pytest.approx(e @ theta[:2], abs=1e-9)
    assert length == pytest.approx(theta[2], abs=1e-9)
    e1 = np.array([[0.6, 0.8]])
    shift, _, length, _ = deadend_axis_shift(e1, [3.2], [0.03], prior_sd_m=0.1,
                                             string_length_m=3.05, string_length_sd_m=0.02)
    theta = _reference_solution(e1, [3.2], [0.03], [np.nan], [np.nan], 0.1, 3.05, 0.02)
    assert shift == pytest.approx(e1 @ theta[:2], abs=1e-9)
    assert length == pytest.approx(theta[2], abs=1e-9)


def test_deadend_axis_shift_sd_matches_monte_carlo_at_an_angle():
    # Monte Carlo with numpy's normal generator as the reference: true offset drawn from the
    # prior, string length fixed, far ends with their stated errors; the reported sd of the
    # shift along each side must match the scatter of the estimate (within 10 %), and the
    # estimate must be unbiased.
    rng = np.random.default_rng(11)
    a = math.radians(20.0)
    e = np.array([[math.cos(a / 2), -math.sin(a / 2)], [-math.cos(a / 2), -math.sin(a / 2)]])
    sd = np.array([0.03, 0.03])
    errs, sds = [], []
    for _ in range(4000):
        delta = rng.normal(0.0, 0.1, 2)
        f = e @ delta + 3.1 + rng.normal(0.0, sd)
        shift, shift_sd, _, _ = deadend_axis_shift(e, f, sd, prior_sd_m=0.1)
        errs.append(shift - e @ delta)
        sds.append(shift_sd)
    errs, sds = np.array(errs), np.array(sds)
    assert np.abs(errs.mean(axis=0)).max() < 0.003
    assert errs.std(axis=0) == pytest.approx(sds.mean(axis=0), rel=0.10)


def test_deadend_axis_shift_rejects_bad_arguments():
    with pytest.raises(ValueError):
        deadend_axis_shift([[1.0, 0.0]], [3.0, 3.1], [0.03])
    with pytest.raises(ValueError):
        deadend_axis_shift([[1.0, 0.0]], [3.0], [0.0])
    with pytest.raises(ValueError):
        deadend_axis_shift([[2.0, 0.0]], [3.0], [0.03])
    with pytest.raises(ValueError):
        deadend_axis_shift([[1.0, 0.0]], [3.0], [0.03], string_length_m=3.0)

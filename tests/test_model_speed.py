"""The faster paths of the line-model stage give the same numbers as the plain ones.

Each shortcut is checked against the general-purpose routine it stands in for (numpy, scipy),
bit for bit where the shortcut promises identical results. No timings are asserted here; the
measured speed-up is in the change notes.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import special, stats
from scipy.optimize._numdiff import approx_derivative

from clearaudit.arrays import median_1d
from clearaudit.model import line, wires
from clearaudit.physics import fit


def _problem(fit_tilt: bool, seed: int = 3) -> tuple[fit._Problem, np.ndarray]:
    """A noisy tilted catenary in its span frame and a parameter vector near the truth."""
    rng = np.random.default_rng(seed)
    span = 310.0
    s = np.sort(rng.uniform(-0.5, span + 0.5, 700))
    lateral, z = fit._curve(s, span, 31.0, 36.5, 1150.0, 0.3, -0.2, 0.25 if fit_tilt else 0.0)
    xyz = np.column_stack([s, lateral, z]) + rng.normal(0.0, 0.03, (s.size, 3))
    problem = fit._Problem(xyz, np.zeros(2), np.array([1.0, 0.0]), span, fit_tilt)
    problem.lateral_weight = 0.8
    p = np.array([31.05, 36.4, np.log(1100.0), 0.25, -0.15, 0.2])
    return problem, (p if fit_tilt else p[:5])


@pytest.mark.parametrize("fit_tilt", [True, False])
def test_residuals_many_rows_equal_single_evaluations(fit_tilt):
    problem, p = _problem(fit_tilt)
    shifted = p + np.diag(1e-7 * np.maximum(1.0, np.abs(p)))
    many = problem.residuals_many(np.vstack([p, shifted]))
    for row, q in zip(many, np.vstack([p, shifted]), strict=True):
        assert np.array_equal(row, problem.residuals(q))  # bit for bit


@pytest.mark.parametrize("fit_tilt", [True, False])
def test_central_difference_jacobian(fit_tilt):
    problem, p = _problem(fit_tilt)
    jac = problem.jacobian(p)
    # the same central differences column by column, one residual call per shift
    steps = 1e-6 * np.maximum(1.0, np.abs(p))
    steps[2] = 1e-7
    columns = []
    for k in range(p.size):
        dp = np.zeros_like(p)
        dp[k] = steps[k]
        columns.append((problem.residuals(p + dp) - problem.residuals(p - dp)) / (2 * steps[k]))
    assert np.array_equal(jac, np.column_stack(columns))
    # reference library: scipy's 3-point finite differences (own step rule); agreement to
    # the truncation error of the two schemes
    reference = approx_derivative(problem.residuals, p, method="3-point")
    assert np.max(np.abs(jac - reference)) <= 1e-6 * np.max(np.abs(reference))


def test_student_t_quantile_is_scipy_stats():
    # reference library: scipy.stats.t.ppf (the fit now calls the special function it uses)
    for dof in (1, 2, 7, 30, 493, 10_000, 2_000_001):
        assert float(special.stdtrit(dof, 0.975)) == float(stats.t.ppf(0.975, dof))


def test_compose_linear_is_poly1d_composition():
    rng = np.random.default_rng(11)
    cases = [rng.normal(size=n) * 10.0 ** rng.uniform(-3, 3, n) for n in (1, 2, 3, 4)]
    cases += [np.array([0.0, 1.5, -2.0]), np.array([0.0, 0.0, 3.0]), np.array([0.0]),
              np.array([2.0, 0.0, -0.0])]
    for coef in cases:
        for a, b in ((1.0 / 157.3, -0.93), (2.5, 0.0), (1e-3, 4.0e2)):
            # reference library: numpy's polynomial class
            expected = np.asarray(np.poly1d(coef)(np.poly1d([a, b])).coeffs, dtype=float)
            got = wires._compose_linear(coef, a, b)
            assert got.shape == expected.shape and np.array_equal(got, expected)


def test_median_is_numpy_median():
    rng = np.random.default_rng(5)
    for n in (1, 2, 3, 10, 11, 999, 1000):
        values = np.abs(rng.standard_t(3, n))
        assert median_1d(values) == float(np.median(values))  # reference: numpy
    with_nan = np.array([1.0, np.nan, 3.0, 2.0])
    assert np.isnan(median_1d(with_nan)) and np.isnan(np.median(with_nan))


def test_distinct_count_is_unique_count():
    rng = np.random.default_rng(8)
    for values in (np.round(rng.uniform(0, 1, 50), 1), np.full(20, 4.2), np.array([1.0, 2.0]),
                   np.array([]), np.array([np.nan, 1.0, np.nan]), np.round(rng.normal(size=9), 3)):
        for at_most in (1, 2, 3, 6):
            # reference: numpy.unique
            assert wires._distinct_count(values, at_most) == min(at_most,
                                                                 len(np.unique(values)))


def test_robust_polyfit_unchanged_by_shortcuts():
    """robust_polyfit equals the same algorithm written with numpy's general routines (to
    rounding)."""
    rng = np.random.default_rng(21)
    x = np.sort(rng.uniform(0.0, 240.0, 800))
    y = 1e-3 * (x - 110.0) ** 2 + 20.0 + rng.normal(0.0, 0.05, x.size)
    y[::37] += 3.0  # outliers
    coef, w = wires.robust_polyfit(x, y, 2)
    # the loop as numpy's polynomial, median and unique routines spell it
    degree = int(min(2, max(len(np.unique(np.round(x, 3))) - 1, 0)))
    xm, xs = x.mean(), max(np.ptp(x) / 2.0, 1e-9)
    xn = (x - xm) / xs
    weights = np.ones_like(x)
    for _ in range(10):
        sw = np.sqrt(weights)
        design = np.vander(xn, degree + 1)
        c, *_ = np.linalg.lstsq(design * sw[:, None], y * sw, rcond=None)
        r = y - design @ c
        scale = max(1.4826 * np.median(np.abs(r[weights > 0])), 0.02)
        u = r / (4.685 * scale)
        weights = np.where(np.abs(u) < 1.0, (1.0 - u**2) ** 2, 0.0)
    expected = np.poly1d(c)(np.poly1d([1.0 / xs, -xm / xs])).coeffs
    # the compiled loop solves the normal equations by Cholesky, numpy's lstsq by SVD: the
    # same curve and weights to rounding (1e-9 m, 1e-9)
    np.testing.assert_allclose(np.polyval(coef, x), np.polyval(expected, x), rtol=0, atol=1e-9)
    np.testing.assert_allclose(w, weights, rtol=0, atol=1e-9)
    # and the fit itself is right: Holland & Welsch (1977) biweight down-weights the outliers
    assert np.allclose(coef, [1e-3, -0.22, 32.1], rtol=0.02, atol=0.2)
    assert np.all(w[::37] == 0.0)


def test_point_grid_candidates_hold_every_point_of_the_rectangle():
    rng = np.random.default_rng(2)
    xy = rng.uniform([-800.0, -300.0], [900.0, 400.0], (20000, 2))
    grid = line._PointGrid(xy)
    a, b = np.array([-620.0, -150.0]), np.array([310.0, 260.0])
    u, v, length = wires.span_frame(a, b)
    half = 25.0
    corners = np.array([a + v * half, a - v * half, b + v * half, b - v * half])
    cand = grid.candidates(corners)
    assert np.all(np.diff(cand) > 0)  # ascending, no repeats
    s, t = wires.to_span_frame(np.column_stack([xy, np.zeros(len(xy))]), a, b)
    inside = np.flatnonzero((s >= 0) & (s <= length) & (np.abs(t) <= half))
    assert inside.size > 0 and np.all(np.isin(inside, cand))
    assert line._PointGrid(np.zeros((0, 2))).candidates(corners).size == 0
    far = corners + 5000.0
    assert grid.candidates(far).size == 0


@pytest.mark.parametrize("fit_tilt", [True, False])
def test_compiled_residuals_are_the_numpy_model(fit_tilt):
    # the compiled residuals against the same model written with numpy (fit._curve, whose
    # catenary is checked against the closed forms in test_fit.py / test_catenary.py): the
    # normal distances agree to rounding
    problem, p = _problem(fit_tilt)
    rows = np.vstack([p, p + 0.01, p * 1.001])
    full = rows if fit_tilt else np.column_stack([rows, np.zeros(3)])
    got = problem.residuals_many(rows)
    for q, row in zip(full, got, strict=True):
        lateral, z, dv, dz = fit._curve(problem.s, problem.span, q[0], q[1], np.exp(q[2]),
                                        q[3], q[4], q[5], with_slopes=True)
        want = np.concatenate([problem.lateral_weight * (problem.v - lateral)
                               / np.sqrt(1.0 + dv * dv), (problem.z - z) / np.sqrt(1.0 + dz * dz)])
        np.testing.assert_allclose(row, want, rtol=1e-9, atol=1e-12)
    r_v, r_z = problem.components(p)
    np.testing.assert_array_equal(np.concatenate([problem.lateral_weight * r_v, r_z]),
                                  problem.residuals(p))

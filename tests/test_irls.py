"""The compiled biweight IRLS of the wire separation against numpy (reference library).

``robust_polyfit`` runs its reweighting loop in compiled code (Cholesky of the weighted
normal equations); the reference is the same loop with numpy's least squares
(``wires._irls_lstsq``, which stays the path for singular systems and non-finite samples),
and on clean data numpy.polyfit itself. The median of the robust scale is checked against
numpy.median through the fits' weights.
"""
from __future__ import annotations

import numpy as np
import pytest

from clearaudit.model import wires


def _reference(x, y, degree, iterations=10, tuning=4.685, min_scale=0.02):
    x = np.asarray(x, float)
    degree = int(min(degree, max(wires._distinct_count(np.round(x, 3), degree + 1) - 1, 0)))
    xm = x.mean()
    xs = max(np.ptp(x) / 2.0, 1e-9)
    xn = (x - xm) / xs
    return wires._irls_lstsq(x, xn, np.asarray(y, float), degree, iterations, tuning,
                             min_scale, xm, xs)


@pytest.mark.parametrize("degree", [0, 1, 2, 3])
@pytest.mark.parametrize("seed, n, outliers", [(0, 400, 0.0), (1, 400, 0.2), (2, 9, 0.0),
                                               (3, 60, 0.35), (4, 2000, 0.1)])
def test_compiled_irls_is_the_least_squares_loop(degree, seed, n, outliers):
    rng = np.random.default_rng(seed)
    x = np.sort(rng.uniform(-40.0, 360.0, n))
    y = 12.0 + 0.03 * x - 4e-4 * x**2 + rng.normal(0, 0.05, n)
    bad = rng.random(n) < outliers
    y[bad] += rng.uniform(-3.0, 3.0, int(bad.sum()))
    coef, w = wires.robust_polyfit(x, y, degree)
    ref_coef, ref_w = _reference(x, y, degree)
    assert coef.shape == ref_coef.shape
    # the same fitted curve to 1e-9 m over the samples, the same weights to 1e-9
    np.testing.assert_allclose(np.polyval(coef, x), np.polyval(ref_coef, x), rtol=0, atol=1e-9)
    np.testing.assert_allclose(w, ref_w, rtol=0, atol=1e-9)


def test_clean_data_is_numpy_polyfit():
    # no outliers and all weights near one: numpy.polyfit's least-squares parabola
    x = np.linspace(0.0, 300.0, 301)
    y = 30.0 - 0.08 * x + 2.5e-4 * x**2 + 0.01 * np.sin(x)
    coef, w = wires.robust_polyfit(x, y, 2)
    np.testing.assert_allclose(np.polyval(coef, x), np.polyval(np.polyfit(x, y, 2), x),
                               rtol=0, atol=2e-3)
    assert w.min() > 0.9


def test_singular_and_non_finite_fall_back_to_least_squares():
    # two distinct stations for a parabola: the degree drops (as before); all weight on one
    # station after reweighting: the minimum-norm least-squares path
    x = np.array([0.0, 0.0, 0.0, 10.0, 10.0, 10.0, 10.0])
    y = np.array([1.0, 1.01, 0.99, 5.0, 5.02, 4.98, 5.0])
    coef, w = wires.robust_polyfit(x, y, 2)
    ref = _reference(x, y, 2)
    np.testing.assert_allclose(coef, ref[0], atol=1e-9)
    y_nan = y.copy()
    y_nan[2] = np.nan
    coef_nan, w_nan = wires.robust_polyfit(x, y_nan, 1)
    ref_nan = _reference(x, y_nan, 1)
    np.testing.assert_array_equal(coef_nan, ref_nan[0])
    np.testing.assert_array_equal(w_nan, ref_nan[1])


def test_median_of_even_and_odd_counts():
    # the robust scale: 1.4826 x median |r| of the weighted points (numpy.median); with every
    # residual but one tiny, the scale floor decides, else the median does
    from clearaudit.model._irls import irls_polyfit

    for n in (1, 2, 3, 4, 7, 10, 101, 1000):
        rng = np.random.default_rng(n)
        xn = np.linspace(-1.0, 1.0, n)
        y = rng.normal(0.0, 1.0, n)
        coef, w = np.zeros(1), np.ones(n)
        status = irls_polyfit(xn, y, 0, 1, 4.685, 1e-9, coef, w)
        r = y - coef[0]
        scale = max(1.4826 * np.median(np.abs(r)), 1e-9)
        u = r / (4.685 * scale)
        want = np.where(np.abs(u) < 1.0, (1.0 - u**2) ** 2, 0.0)
        assert status in (0, 1)
        np.testing.assert_allclose(coef[0], np.mean(y), rtol=1e-12, atol=1e-15)
        np.testing.assert_allclose(w, want, rtol=1e-12, atol=1e-15)

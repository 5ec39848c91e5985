"""Checks of the faster ground-stage kernels against direct computations and scipy.

External references used here:
- scipy.ndimage (``minimum_filter`` with a footprint, ``grey_opening``) and
  scipy.interpolate.RegularGridInterpolator (bilinear interpolation), general-purpose PyPI
  libraries;
- brute-force evaluation of the definitions (voxel block counts, block sums) on small inputs.
No timing assertions: speed is measured by scripts outside the test suite.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage
from scipy.interpolate import RegularGridInterpolator

from clearaudit.classify.grid import (
    InpaintPlan,
    PointLocation,
    _block_sum,
    inpaint,
)
from clearaudit.classify.ground import morphological_slope_ratio
from clearaudit.classify.noise import compact_voxel_keys, isolated_points, pit_cells
from clearaudit.threads import inner_threads, run_chunks


def _isolated_brute_force(xyz, voxel, min_neighbours):
    # definition: fewer than min_neighbours other points in the 3 x 3 x 3 voxel block
    v = np.floor(xyz / voxel)
    near = (np.abs(v[:, None, :] - v[None, :, :]) <= 1).all(axis=2)
    return near.sum(axis=1) - 1 < min_neighbours


@pytest.mark.parametrize("voxel, min_neighbours", [(3.0, 1), (1.0, 1), (2.0, 3), (0.5, 0)])
def test_isolated_points_match_the_definition(voxel, min_neighbours):
    # reference: brute-force pairwise voxel-block test (the function's definition)
    rng = np.random.default_rng(7)
    xyz = np.concatenate([rng.normal(size=(600, 3)) * [20, 5, 2],
                          rng.uniform(-60, 60, size=(40, 3))]) + [5.0e5, 4.2e6, 310.0]
    expected = _isolated_brute_force(xyz, voxel, min_neighbours)
    got = isolated_points(xyz, voxel, min_neighbours)
    np.testing.assert_array_equal(got, expected)
    assert expected.any() or min_neighbours == 0


def test_compact_voxel_keys_are_one_number_per_voxel():
    # reference: the voxel triple floor(xyz / e); equal keys <=> equal triples
    rng = np.random.default_rng(3)
    xyz = rng.uniform(-30, 30, size=(3000, 3))
    keys, dims = compact_voxel_keys(xyz, 2.5)
    triples = np.floor(xyz / 2.5).astype(np.int64)
    _, by_triple = np.unique(triples, axis=0, return_inverse=True)
    _, by_key = np.unique(keys, return_inverse=True)
    np.testing.assert_array_equal(by_triple.ravel(), by_key.ravel())
    assert keys.min() > 0 and keys.max() < np.prod(dims)


def test_pit_cells_match_scipy_footprint_filter():
    # reference: scipy.ndimage.minimum_filter with the 8-neighbour footprint, "nearest" edges
    rng = np.random.default_rng(5)
    zmin = rng.normal(size=(41, 29))
    zmin[rng.random(zmin.shape) < 0.2] = np.nan
    zmin[10, 10] = -9.0
    footprint = np.ones((3, 3), bool)
    footprint[1, 1] = False
    lowest = ndimage.minimum_filter(np.where(np.isnan(zmin), np.inf, zmin), footprint=footprint,
                                    mode="nearest")
    pits, got = pit_cells(zmin, 1.0)
    np.testing.assert_array_equal(got, lowest)
    assert pits[10, 10]
    np.testing.assert_array_equal(pits, ~np.isnan(zmin) & np.isfinite(lowest) & (zmin < lowest - 1.0))


@pytest.mark.parametrize("threads", ["1", "2", "3"])
def test_slope_ratio_matches_scipy_openings(monkeypatch, threads):
    # reference: scipy.ndimage.grey_opening with square windows, applied progressively
    monkeypatch.setenv("CLEARAUDIT_THREADS", threads)
    rng = np.random.default_rng(11)
    surface = (np.cumsum(rng.normal(size=(700, 37)), axis=0) * 0.1).astype(np.float32)
    surface[300:304, 10:13] += 6.0  # an object
    ratio, opened = morphological_slope_ratio(surface, 6, 1.0)
    previous = surface
    expected = np.zeros_like(surface)
    for radius in range(1, 7):
        current = ndimage.grey_opening(previous, size=(2 * radius + 1, 2 * radius + 1))
        expected = np.maximum(expected, (previous - current) * np.float32(1.0 / radius))
        previous = current
    np.testing.assert_array_equal(opened, previous)
    np.testing.assert_array_equal(ratio, expected)
    assert ratio[301, 11] > 1.0


def test_block_sum_matches_numpy_reduction():
    # reference: numpy's reduction over the block axes (same summation order, bit-identical)
    rng = np.random.default_rng(2)
    for b in (1, 2, 4, 5):
        values = rng.normal(size=(12 * b, 7 * b)) * 1e3
        expected = values.reshape(12, b, 7, b).sum(axis=(1, 3))
        assert _block_sum(values, b).tobytes() == expected.tobytes()


def test_inpaint_plan_reuse_gives_the_same_grid():
    # reference: the same call without a plan (the plan only caches mask-derived work)
    rng = np.random.default_rng(4)
    grid = np.full((300, 90), np.nan)
    grid[40:60, 20:35] = rng.normal(size=(20, 15)) + 100.0
    grid[200:230, 50:80] = rng.normal(size=(30, 30)) + 90.0
    plan = InpaintPlan.for_grid(grid, 30)
    first = inpaint(grid, 30)
    np.testing.assert_array_equal(inpaint(grid, 30, plan=plan), first)
    shifted = grid + 5.0  # same unknown cells, other values
    np.testing.assert_array_equal(inpaint(shifted, 30, plan=plan), inpaint(shifted, 30))
    # a plan for other unknown cells is not used
    other = grid.copy()
    other[0, 0] = 1.0
    np.testing.assert_array_equal(inpaint(other, 30, plan=plan), inpaint(other, 30))
    assert not np.isnan(first).any()


def test_inpaint_keeps_a_plane_over_a_wide_gap():
    # reference: a plane is harmonic, so the Laplace fill reproduces it (common practice, no source)
    u, v = np.meshgrid(np.arange(120.0), np.arange(80.0), indexing="ij")
    plane = 0.02 * u - 0.01 * v + 50.0
    holed = plane.copy()
    holed[30:90, 20:60] = np.nan
    np.testing.assert_allclose(inpaint(holed, 60, sweeps=400), plane, atol=0.02)


@pytest.mark.parametrize("threads", ["1", "2"])
def test_sampler_matches_scipy_bilinear(monkeypatch, threads):
    # reference: scipy.interpolate.RegularGridInterpolator (linear) on the cell centres
    monkeypatch.setenv("CLEARAUDIT_THREADS", threads)
    rng = np.random.default_rng(9)
    shape = (23, 17)
    grid = rng.normal(size=shape)
    n = 5000
    fu = rng.uniform(0.5, shape[0] - 0.5, n).astype(np.float32)
    fv = rng.uniform(0.5, shape[1] - 0.5, n).astype(np.float32)
    location = PointLocation(fu, fv, shape)
    got = location.sampler()(grid)
    interp = RegularGridInterpolator((np.arange(shape[0]) + 0.5, np.arange(shape[1]) + 0.5), grid)
    np.testing.assert_allclose(got, interp(np.c_[fu, fv]), atol=1e-6)
    # the weights are kept with the location and handed down to subsets
    assert location.sampler() is location.sampler()
    part = location.subset(np.arange(0, n, 3))
    np.testing.assert_array_equal(part.sampler()(grid), got[::3])
    # outside the grid: NaN
    outside = PointLocation(np.array([-1.0, 30.0], np.float32), np.array([3.0, 3.0], np.float32), shape)
    assert np.isnan(outside.sampler()(grid)).all()


def test_run_chunks_covers_every_index_once(monkeypatch):
    # reference: direct count of the visited indices
    for threads in ("1", "2"):
        monkeypatch.setenv("CLEARAUDIT_THREADS", threads)
        assert inner_threads() == int(threads)
        hits = np.zeros(10_001, np.int64)

        def work(lo, hi, hits=hits):
            hits[lo:hi] += 1

        run_chunks(work, len(hits), chunk=997)
        assert (hits == 1).all()

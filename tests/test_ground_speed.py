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


@pytest.mark.parametrize("voxel", [3.0, 1.0, 0.5])
def test_isolated_points_dense_and_sorted_counts_agree(voxel, monkeypatch):
    # reference: the brute-force definition above, through both ways of counting (the dense
    # count over the whole voxel block, the sorted voxel numbers), forced in turn
    import clearaudit.classify.noise as noise

    rng = np.random.default_rng(11)
    xyz = np.concatenate([rng.normal(size=(500, 3)) * [15, 4, 2],
                          rng.uniform(-40, 40, size=(30, 3))]) + [3.1e5, 5.7e6, 95.0]
    expected = _isolated_brute_force(xyz, voxel, 2)
    dense_calls = []
    dense = noise._isolated_dense
    monkeypatch.setattr(noise, "_isolated_dense",
                        lambda *a: dense_calls.append(1) or dense(*a))
    monkeypatch.setattr(noise, "_DENSE_MIN_VOXELS", 1 << 40)
    np.testing.assert_array_equal(isolated_points(xyz, voxel, 2), expected)
    assert len(dense_calls) == 1  # the dense count ran
    monkeypatch.setattr(noise, "_DENSE_MIN_VOXELS", 0)
    np.testing.assert_array_equal(isolated_points(xyz, voxel, 2), expected)
    assert len(dense_calls) == 1  # the sorted form ran


def test_compiled_block_counts_equal_numpy_bincount_sums():
    # reference: numpy.bincount of the voxel numbers and the 27 shifted counts per sparse
    # voxel (the numpy form the kernel replaced), on random voxel blocks of both key types
    from clearaudit.classify.kernels import isolated_in_block
    from clearaudit.classify.noise import _block_offsets

    rng = np.random.default_rng(41)
    for dtype in (np.int32, np.int64):
        for n_x, n_y, n_z, n, m in ((3, 3, 3, 5, 1), (12, 9, 7, 300, 2), (40, 30, 8, 3000, 4)):
            ijk = np.column_stack([rng.integers(1, d - 1, n) for d in (n_x, n_y, n_z)])
            keys = ((ijk[:, 0] * n_y + ijk[:, 1]) * n_z + ijk[:, 2]).astype(dtype)
            counts = np.bincount(keys, minlength=n_x * n_y * n_z)
            total = sum(counts[keys + off] for off in _block_offsets(n_y, n_z))
            want = (counts[keys] - 1 < m) & (total - 1 < m)
            got = np.empty(n, np.uint8)
            isolated_in_block(keys, n_x * n_y * n_z, n_y, n_z, m, got)
            np.testing.assert_array_equal(got.view(bool), want)
        with pytest.raises(IndexError):  # a voxel on the block's border has no full block
            isolated_in_block(np.array([0], dtype), 27, 3, 3, 1, np.empty(1, np.uint8))


def test_block_byte_counts_saturate_without_changing_answers(monkeypatch):
    # reference: numpy.bincount's exact counts (and the brute-force definition through the
    # sorted form): voxels of 200-700 points make the kernel's byte counts stop at 255
    import clearaudit.classify.noise as noise
    from clearaudit.classify.kernels import isolated_in_block
    from clearaudit.classify.noise import _block_offsets

    rng = np.random.default_rng(5)
    n_x, n_y, n_z = 9, 8, 7
    heavy = np.repeat(rng.integers(1, 6, size=(4, 3)), [700, 300, 254, 200], axis=0)
    light = np.column_stack([rng.integers(1, d - 1, 40) for d in (n_x, n_y, n_z)])
    ijk = np.concatenate([heavy, light])
    keys = ((ijk[:, 0] * n_y + ijk[:, 1]) * n_z + ijk[:, 2]).astype(np.int64)
    counts = np.bincount(keys, minlength=n_x * n_y * n_z)
    total = sum(counts[keys + off] for off in _block_offsets(n_y, n_z))
    for m in (1, 3, 200, 253, 254):
        want = (counts[keys] - 1 < m) & (total - 1 < m)
        got = np.empty(len(keys), np.uint8)
        isolated_in_block(keys, n_x * n_y * n_z, n_y, n_z, m, got)
        np.testing.assert_array_equal(got.view(bool), want)
    with pytest.raises(ValueError, match="254"):
        isolated_in_block(keys, n_x * n_y * n_z, n_y, n_z, 255, np.empty(len(keys), np.uint8))
    # more than 254 neighbours asked for: the sorted form answers (the dense count can't)
    xyz = (ijk + rng.uniform(0.05, 0.95, size=ijk.shape)) * 3.0
    calls = []
    dense = noise._isolated_dense
    monkeypatch.setattr(noise, "_isolated_dense", lambda *a: calls.append(1) or dense(*a))
    for m in (254, 300):
        np.testing.assert_array_equal(noise.isolated_points(xyz, 3.0, m),
                                      _isolated_brute_force(xyz, 3.0, m))
    assert len(calls) == 1  # 254 counted densely, 300 sorted


def _locate_numpy(frame, xy):
    """GridFrame.locate's numpy form (float64 in this order, rounded to float32 once)."""
    a = frame.axes
    cu, cv = a[0, 0] / frame.cell, a[0, 1] / frame.cell
    du, dv = a[1, 0] / frame.cell, a[1, 1] / frame.cell
    su, sv = frame.corner[0] / frame.cell, frame.corner[1] / frame.cell
    dx, dy = xy[:, 0] - frame.centre[0], xy[:, 1] - frame.centre[1]
    acc = dx * cu
    acc += dy * cv
    acc -= su
    fu = acc.astype(np.float32)
    acc = dx * du
    acc += dy * dv
    acc -= sv
    return fu, acc.astype(np.float32)


def _flat_and_weights_numpy(fu, fv, shape):
    """PointLocation.flat and the bilinear weights of its sampler, the numpy forms."""
    n_u, n_v = shape
    m_u, m_v = max(n_u, 2), max(n_v, 2)
    itype = np.int32 if n_u * n_v < 2**31 else np.int64
    flat = np.clip(fu, 0, n_u - 1).astype(itype) * n_v + np.clip(fv, 0, n_v - 1).astype(itype)
    outside = (fu < 0) | (fu > n_u) | (fv < 0) | (fv > n_v)
    u = np.clip(fu - np.float32(0.5), 0, n_u - 1)
    v = np.clip(fv - np.float32(0.5), 0, n_v - 1)
    i0 = np.minimum(u.astype(itype), m_u - 2)
    j0 = np.minimum(v.astype(itype), m_v - 2)
    u -= i0
    v -= j0
    return flat, outside, i0 * m_v + j0, u, v


def test_compiled_grid_locations_equal_the_numpy_form():
    # reference: the numpy forms above (the compiled passes replaced them): the same float32
    # cell coordinates, cells and bilinear weights, for rotated frames, points beyond the
    # grid on every side, grids one cell across (padded to two) and several cell sizes
    from clearaudit.classify.grid import GridFrame

    rng = np.random.default_rng(43)
    for case in range(24):
        n = int(rng.integers(1, 20_000))
        xy = rng.normal(size=(n, 2)) * rng.uniform(1, 400, 2) + rng.uniform(-5e3, 5e3, 2)
        if case % 6 == 5:
            xy[:, 1] = xy[0, 1]  # one row of cells
        cell = float(rng.choice([0.25, 1.0, 1.5, 3.0]))
        frame, loc = GridFrame.fit_locate(xy, cell, margin=cell)
        for pts in (xy, xy + rng.normal(size=xy.shape) * 60, np.asfortranarray(xy)):
            fu, fv = _locate_numpy(frame, pts)
            got = frame.locate(pts)
            np.testing.assert_array_equal(got.fu, fu)
            np.testing.assert_array_equal(got.fv, fv)
            flat, outside, k00, wa, wb = _flat_and_weights_numpy(fu, fv, frame.shape)
            np.testing.assert_array_equal(got.flat, flat)
            s = got.sampler()
            np.testing.assert_array_equal(s.outside, outside)
            np.testing.assert_array_equal(s.k00, k00)
            np.testing.assert_array_equal(s.a, wa)
            np.testing.assert_array_equal(s.b, wb)
            assert s.k00.dtype == k00.dtype and got.flat.dtype == flat.dtype
    # a coordinate that is not finite counts as 0 for the cell, and is outside for sampling
    from clearaudit.classify.grid import PointLocation

    odd = PointLocation(np.array([np.nan, 2.5], np.float32), np.array([1.5, 1.5], np.float32),
                        (4, 4))
    assert odd.flat[0] == 0 * 4 + 1 and odd.flat[1] == 2 * 4 + 1  # the NaN coordinate as 0
    assert odd.sampler().outside.tolist() == [True, False]
    assert np.isnan(odd.sampler()(np.ones((4, 4)))[0])


def test_bilinear_residual_equals_sampling_then_numpy_subtract_and_compress():
    # reference: the sampler's own values, numpy's float32 subtraction and numpy.compress
    from clearaudit.classify.grid import GridFrame

    rng = np.random.default_rng(47)
    for case in range(12):
        n = int(rng.integers(1, 30_000))
        xy = rng.normal(size=(n, 2)) * rng.uniform(5, 200, 2) + rng.uniform(-1e3, 1e3, 2)
        frame, _ = GridFrame.fit_locate(xy, 1.0, margin=1.0)
        pts = xy + (rng.normal(size=xy.shape) * 30 if case % 3 == 0 else 0.0)  # some outside
        at = frame.locate(pts).sampler()
        grid = rng.normal(size=frame.shape).astype(np.float32) * 3 + 100
        z = (rng.normal(size=n) * 2 + 100).astype(np.float32)
        inside = rng.random(n) < rng.uniform(0, 1)
        resid, picked = at.residual(grid, z, inside)
        want = np.subtract(z, at(grid))
        np.testing.assert_array_equal(resid, want)
        np.testing.assert_array_equal(picked, np.compress(inside, want))
        assert resid.dtype == picked.dtype == np.float32


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
    plan = InpaintPlan(np.isnan(grid), 30)
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


@pytest.mark.parametrize("itype", [np.int32, np.int64])
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_compiled_bilinear_equals_the_numpy_formula(itype, dtype):
    # reference: the same formula in numpy, one rounding per operation in the grid's precision
    # (the kernel is built without fused multiply-add): equal values, not just close ones
    from clearaudit.classify.kernels import bilinear

    rng = np.random.default_rng(4)
    rows, cols = 40, 30
    grid = (rng.normal(size=rows * cols) * 300 + 1200).astype(dtype)
    n = 20_000
    k00 = (rng.integers(0, rows - 1, n) * cols + rng.integers(0, cols - 1, n)).astype(itype)
    a, b = rng.random(n, dtype=np.float32), rng.random(n, dtype=np.float32)
    outside = rng.random(n) < 0.05
    out = np.empty(n, dtype)
    bilinear(grid, k00, a, b, outside.view(np.uint8), cols, out)
    aa, bb = a.astype(dtype), b.astype(dtype)
    v00, v01, v10, v11 = (grid[k00 + d] for d in (0, 1, cols, cols + 1))
    lower = (v01 - v00) * bb + v00
    upper = (v11 - v10) * bb + v10
    expected = (upper - lower) * aa + lower
    expected[outside] = np.nan
    assert np.array_equal(out, expected, equal_nan=True)
    with pytest.raises(IndexError):
        bilinear(grid, np.array([rows * cols - 1], itype), a[:1], b[:1],
                 np.zeros(1, np.uint8), cols, out[:1])
    with pytest.raises(ValueError):  # rows of no cells (or negative) are refused
        bilinear(grid, k00[:1], a[:1], b[:1], np.zeros(1, np.uint8), -10**12, out[:1])


def test_compiled_median_equals_numpy_median():
    # reference: numpy.median (float32 in, the two middle values added and halved in float32)
    from clearaudit.classify.kernels import median_f32

    rng = np.random.default_rng(8)
    cases = [rng.normal(size=n).astype(np.float32) * scale
             for n in (1, 2, 3, 4, 11, 1000, 1001, 65_537) for scale in (1.0, 1e-4, 3e4)]
    cases += [np.round(rng.normal(size=5000), 1).astype(np.float32),  # many ties
              np.array([-0.0, 0.0, -0.0, 0.0], np.float32),
              np.array([np.inf, -np.inf, 1.0, 2.0], np.float32),
              rng.integers(-5, 5, 10_001).astype(np.float32)]
    for v in cases:
        med = np.median(v)
        got = median_f32(v)
        assert isinstance(got, float) and np.float32(got) == med
        # the median absolute deviation about that median, as refine_ground takes it
        assert np.float32(median_f32(v, med, True)) == np.median(np.abs(v - med))
    assert np.isnan(median_f32(np.array([1.0, np.nan, 2.0], np.float32)))
    # numpy's mean sums from +0.0: the median of negative zeros is +0.0, as numpy's
    for v in (np.array([-0.0], np.float32), np.array([-0.0, -0.0], np.float32)):
        assert np.signbit(median_f32(v)) == np.signbit(np.median(v))
    assert np.isnan(median_f32(np.zeros(0, np.float32)))


def test_compiled_window_sums_equal_bincount():
    # reference: numpy.bincount over the points within the window (same order: same sums)
    from clearaudit.classify.kernels import window_sums

    rng = np.random.default_rng(6)
    n, m = 50_000, 700
    resid = rng.normal(scale=0.3, size=n).astype(np.float32)
    resid[:10] = np.nan
    cell = rng.integers(0, m, n).astype(np.int64)
    values = rng.normal(loc=120.0, size=n)
    for limit in (np.array([0.25], np.float32), rng.uniform(0.1, 0.4, n).astype(np.float32)):
        inside = np.empty(n, np.uint8)
        total, count = np.zeros(m), np.zeros(m, np.int64)
        window_sums(resid, limit, cell, values, inside, total, count)
        expected = np.abs(resid) <= limit
        assert np.array_equal(inside.view(bool), expected)
        assert np.array_equal(total, np.bincount(cell[expected], values[expected], minlength=m))
        assert np.array_equal(count, np.bincount(cell[expected], minlength=m))
    with pytest.raises(IndexError):
        window_sums(resid[:1], limit[:1], np.array([m], np.int64), values[:1], inside[:1],
                    total, count)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_compiled_jacobi_sweep_equals_the_numpy_form(dtype):
    # reference: the numpy form of the sweep, ((up + down) + left) + right times 0.25 on the
    # free cells of each box, one rounding per operation: equal values
    from clearaudit.classify.kernels import jacobi_sweep

    rng = np.random.default_rng(13)
    n_u, n_v = 37, 29
    buf = rng.normal(size=(n_u + 2, n_v + 2)).astype(dtype) * 50 + 300
    free = rng.random((n_u, n_v)) < 0.4
    boxes = [(0, 20, 0, 29), (15, 37, 3, 17), (30, 37, 20, 29)]  # overlapping, as may happen
    expected = buf.copy()
    for r0, r1, c0, c1 in boxes:
        avg = buf[r0:r1, c0 + 1:c1 + 1] + buf[r0 + 2:r1 + 2, c0 + 1:c1 + 1]
        avg += buf[r0 + 1:r1 + 1, c0:c1]
        avg += buf[r0 + 1:r1 + 1, c0 + 2:c1 + 2]
        avg *= dtype(0.25)
        np.copyto(expected[r0 + 1:r1 + 1, c0 + 1:c1 + 1], avg, where=free[r0:r1, c0:c1])
    got = buf.copy()
    jacobi_sweep(buf, got, free.view(np.uint8), np.array(boxes, dtype=np.int64))
    assert np.array_equal(got, expected)
    with pytest.raises(IndexError):
        jacobi_sweep(buf, got, free.view(np.uint8), np.array([[0, n_u + 1, 0, 1]], np.int64))


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


@pytest.mark.parametrize("shape", [(1, 1), (3, 7), (8, 5), (61, 23), (200, 90)])
@pytest.mark.parametrize("radius", [1, 2, 4, 9, 30])
def test_square_filter_matches_scipy(shape, radius):
    # reference: scipy.ndimage.minimum_filter / maximum_filter (default "reflect" edges),
    # row bands filtered separately must give the rows of the whole-grid filter
    from clearaudit.classify.grid import _square_filter

    rng = np.random.default_rng(radius * 100 + shape[0])
    source = np.round(rng.normal(size=shape) * 4).astype(np.float32)  # rounded: many ties
    for op, ref in ((np.minimum, ndimage.minimum_filter), (np.maximum, ndimage.maximum_filter)):
        expected = ref(source, size=2 * radius + 1)
        out = np.full_like(source, np.nan)
        cut = shape[0] // 3
        for lo, hi in ((0, cut), (cut, shape[0])):
            if hi > lo:
                _square_filter(op, source, out, lo, hi, radius)
        np.testing.assert_array_equal(out, expected)


def test_square_filter_on_a_boolean_mask_is_a_dilation():
    # reference: scipy.ndimage.maximum_filter with constant (empty) edges, as the inpainting
    # plan used it: for a maximum of booleans mirrored edges add nothing
    from clearaudit.classify.grid import _square_filter

    rng = np.random.default_rng(8)
    known = rng.random((150, 70)) < 0.01
    out = np.empty_like(known)
    _square_filter(np.maximum, known, out, 0, 150, 20)
    np.testing.assert_array_equal(out, ndimage.maximum_filter(known, size=41, mode="constant"))


def test_inpaint_far_cells_copy_the_nearest_block_mean():
    # reference: direct evaluation of the rule in the InpaintPlan notes (far cells take the
    # mean of the known cells of the b x b block nearest to their own block,
    # scipy.ndimage.distance_transform_edt on the block grid)
    rng = np.random.default_rng(12)
    grid = np.full((240, 100), np.nan)
    grid[10:30, 5:40] = rng.normal(size=(20, 35)) + 50.0
    grid[200:230, 60:95] = rng.normal(size=(30, 35)) + 80.0
    max_cells = 45
    b = max_cells // 15
    plan = InpaintPlan(np.isnan(grid), max_cells)
    out = grid.copy()
    plan.fill_far(out)
    known = ~np.isnan(grid)
    assert plan.far is not None and plan.far.any()
    n_u, n_v = grid.shape
    pu, pv = n_u + (-n_u) % b, n_v + (-n_v) % b
    total = np.zeros((pu, pv))
    total[:n_u, :n_v] = np.where(known, grid, 0.0)
    count = np.zeros((pu, pv))
    count[:n_u, :n_v] = known
    block_total = total.reshape(pu // b, b, pv // b, b).sum(axis=(1, 3))
    block_count = count.reshape(pu // b, b, pv // b, b).sum(axis=(1, 3))
    _, (ii, jj) = ndimage.distance_transform_edt(block_count == 0, return_indices=True)
    qi, qj = np.nonzero(plan.far)
    src_i, src_j = ii[qi // b, qj // b], jj[qi // b, qj // b]
    expected = block_total[src_i, src_j] / block_count[src_i, src_j]
    np.testing.assert_allclose(out[qi, qj], expected, rtol=1e-12)
    # cells that are not far keep their value (NaN where unknown)
    np.testing.assert_array_equal(out[~plan.far], grid[~plan.far])


@pytest.mark.parametrize("shape, max_radius", [((3, 4), 6), ((9, 2), 5), ((40, 12), 18)])
def test_slope_ratio_on_grids_smaller_than_the_window(shape, max_radius):
    # reference: scipy.ndimage.grey_opening applied progressively (Pingel et al. 2013 Eq. 1,
    # square windows), on grids narrower than the largest window
    rng = np.random.default_rng(shape[0])
    surface = np.round(rng.normal(size=shape) * 3).astype(np.float32)
    ratio, opened = morphological_slope_ratio(surface, max_radius, 0.5)
    previous = surface
    expected = np.zeros_like(surface)
    for radius in range(1, max_radius + 1):
        current = ndimage.grey_opening(previous, size=(2 * radius + 1, 2 * radius + 1))
        expected = np.maximum(expected, (previous - current) * np.float32(1.0 / (radius * 0.5)))
        previous = current
    np.testing.assert_array_equal(opened, previous)
    np.testing.assert_array_equal(ratio, expected)


def test_occupied_cells_match_numpy_unique():
    # The occupancy-map compaction gives the cells and inverse of numpy.unique, and the
    # lookup array maps every occupied cell to its position (-1 elsewhere).
    from clearaudit.classify.grid import occupied_cells

    rng = np.random.default_rng(12)
    for size in (1, 50, 10_000):
        flat = rng.integers(0, size, int(rng.integers(1, 5000)))
        cells, k, lookup = occupied_cells(flat, size, lookup=True)
        ref_cells, ref_k = np.unique(flat, return_inverse=True)
        assert np.array_equal(cells, ref_cells) and np.array_equal(k, ref_k)
        assert k.dtype == np.intp
        assert np.array_equal(lookup[cells], np.arange(len(cells)))
        assert np.all(lookup[np.setdiff1d(np.arange(size), cells)] == -1)
        assert occupied_cells(flat, size)[2] is None
        # the int32 cell numbers the grid frames give: the same answer
        cells32, k32, _ = occupied_cells(flat.astype(np.int32), size)
        assert np.array_equal(cells32, ref_cells) and np.array_equal(k32, ref_k)
    cells, k, lookup = occupied_cells(np.zeros(0, np.int64), 7, lookup=True)
    assert len(cells) == 0 and len(k) == 0 and np.all(lookup == -1)
    # a cell number outside the grid is refused (the compiled kernel indexes unchecked)
    for bad in (-1, 10):
        with pytest.raises(IndexError):
            occupied_cells(np.array([0, bad, 3]), 10)


def test_compiled_cell_sums_equal_bincount():
    # reference: numpy.bincount (weights widened to float64, added in point order)
    from clearaudit.classify.kernels import cell_sums3

    rng = np.random.default_rng(17)
    n, m = 40_000, 900
    cell = rng.integers(0, m - 50, n).astype(np.int64)  # some cells stay empty
    xyz = rng.normal(size=(n, 3)) * [1.0, 1.0, 30.0] + [0.0, 0.0, 250.0]
    fu, fv = rng.uniform(0, 40, (2, n)).astype(np.float32)
    sums = np.empty((3, m))
    count = np.empty(m, np.int64)
    cell_sums3(cell, xyz[:, 2], fu, fv, sums[0], sums[1], sums[2], count)
    assert np.array_equal(count, np.bincount(cell, minlength=m))
    for got, w in zip(sums, (xyz[:, 2], fu, fv), strict=True):
        assert np.array_equal(got, np.bincount(cell, w, minlength=m))


@pytest.mark.parametrize("itype", [np.int32, np.int64])
def test_cell_min_and_max_equal_ufunc_at(itype):
    # reference: numpy.minimum.at / maximum.at, including NaN, infinities and signed zeros
    from clearaudit.classify.grid import cell_max, cell_min

    rng = np.random.default_rng(23)
    n, m = 30_000, 400
    cell = rng.integers(0, m - 20, n).astype(itype)
    values = np.round(rng.normal(size=n), 1)
    pick = rng.random(n)
    values[pick < 0.01] = np.nan
    values[(pick > 0.01) & (pick < 0.1)] = -0.0
    values[(pick > 0.1) & (pick < 0.11)] = np.inf
    for ours, ufunc, start in ((cell_min, np.minimum, np.inf), (cell_max, np.maximum, -np.inf)):
        expected = np.full(m, start)
        with np.errstate(invalid="ignore"):
            ufunc.at(expected, cell, values)
        expected[np.isinf(expected)] = np.nan
        got = ours(cell, values, m)
        assert np.array_equal(got, expected, equal_nan=True)
        assert np.array_equal(np.signbit(got), np.signbit(expected))


def _free_boxes_numpy(free: np.ndarray, strip_cells: int = 1 << 16, min_gap: int = 16
                      ) -> list[tuple[int, int, int, int]]:
    """The numpy form :func:`clearaudit.classify.grid._free_boxes` replaced."""
    n_u, n_v = free.shape
    height = int(min(n_u, max(8, strip_cells // max(n_v, 1))))
    starts = np.arange(0, n_u, height)
    columns = np.logical_or.reduceat(free, starts, axis=0)
    edges = np.diff(np.pad(columns, ((0, 0), (1, 1))).astype(np.int8), axis=1)
    boxes = []
    for r0, row in zip(starts, edges, strict=True):
        begin = np.flatnonzero(row == 1)
        if len(begin) == 0:
            continue
        end = np.flatnonzero(row == -1)
        keep = np.r_[True, begin[1:] - end[:-1] >= min_gap]
        r1 = min(n_u, int(r0) + height)
        for c0, c1 in zip(begin[keep], np.r_[end[np.flatnonzero(keep)[1:] - 1], end[-1]], strict=True):
            boxes.append((int(r0), r1, int(c0), int(c1)))
    return boxes


def test_free_boxes_equal_the_numpy_form_and_cover_every_free_cell():
    # reference: the numpy form (_free_boxes_numpy) and the definition (every free cell lies
    # in a box; boxes of one strip do not overlap)
    from clearaudit.classify.grid import _free_boxes

    rng = np.random.default_rng(5)
    for _ in range(300):
        n_u, n_v = (int(v) for v in rng.integers(1, 120, 2))
        free = rng.random((n_u, n_v)) < rng.choice([0.0, 0.002, 0.05, 0.5, 1.0])
        strip, gap = int(rng.choice([50, 700, 1 << 16])), int(rng.integers(1, 20))
        boxes = _free_boxes(free, strip, gap)
        assert boxes == _free_boxes_numpy(free, strip, gap)
        covered = np.zeros_like(free)
        for r0, r1, c0, c1 in boxes:
            covered[r0:r1, c0:c1] = True
        assert not np.any(free & ~covered)
    # a strided (transposed) mask gives the boxes of its copy
    free = rng.random((90, 70)) < 0.03
    assert _free_boxes(free.T, 500) == _free_boxes_numpy(np.ascontiguousarray(free.T), 500)

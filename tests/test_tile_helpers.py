"""Small helpers of the tile tasks and the stages against the numpy / scipy calls they stand for.

References: numpy.isin, numpy.unique and scipy.spatial.cKDTree.query with
distance_upper_bound (general-purpose reference libraries).
"""
from __future__ import annotations

import os

import numpy as np
import pytest
from scipy.spatial import cKDTree

from clearaudit.arrays import class_counts, class_mask, near_points


@pytest.mark.parametrize("dtype", [np.uint8, np.int32])
def test_class_mask_and_counts_match_numpy(dtype):
    rng = np.random.default_rng(3)
    codes = rng.choice([1, 2, 5, 7, 14, 15, 64], size=10_000).astype(dtype)
    wanted = (5, 14, 15, 200)
    np.testing.assert_array_equal(class_mask(codes, wanted), np.isin(codes, wanted))
    got, ref = class_counts(codes), np.unique(codes, return_counts=True)
    np.testing.assert_array_equal(got[0], ref[0])
    np.testing.assert_array_equal(got[1], ref[1])
    assert got[0].dtype == codes.dtype
    empty = class_counts(np.zeros(0, dtype))
    assert len(empty[0]) == len(empty[1]) == 0


@pytest.mark.parametrize("seed, offset", [(0, 0.0), (1, 0.0), (2, 0.0), (3, 5.2e6)])
def test_near_points_is_the_bounded_tree_query(seed, offset):
    # reference: cKDTree.query over every point with distance_upper_bound
    rng = np.random.default_rng(seed)
    xy = rng.uniform([0, 0], [400, 90], size=(50_000, 2))
    centres = np.concatenate([
        rng.uniform([0, 0], [400, 90], size=(5, 2)),  # inside the points' box
        [[-15.0, 40.0], [420.0, 95.0], [200.0, -21.0]],  # just outside, still within reach
        [[-500.0, 0.0], [1e6, 1e6]],  # far away
        np.floor(rng.uniform([0, 0], [400, 90], size=(3, 2))) + 0.5])
    xy, centres = xy + offset, centres + offset  # also at projected-coordinate magnitudes
    radius = 21.0
    d, _ = cKDTree(centres).query(xy, distance_upper_bound=radius)
    np.testing.assert_array_equal(near_points(xy, centres, radius), np.flatnonzero(np.isfinite(d)))
    # points exactly on the cell edges and the circle
    on = centres[0] + radius * np.column_stack([np.cos(np.arange(8)), np.sin(np.arange(8))])
    grid = np.concatenate([xy, on, np.floor(xy[:100] / 10.5) * 10.5])
    d, _ = cKDTree(centres).query(grid, distance_upper_bound=radius)
    np.testing.assert_array_equal(near_points(grid, centres, radius), np.flatnonzero(np.isfinite(d)))
    # the points near one centre only, a ring just inside and just outside the radius
    ring = centres[1] + np.column_stack([np.cos(np.arange(64.0)), np.sin(np.arange(64.0))]) \
        * np.repeat([radius - 1e-7, radius + 1e-7], 32)[:, None]
    d, _ = cKDTree(centres).query(ring, distance_upper_bound=radius)
    np.testing.assert_array_equal(near_points(ring, centres, radius), np.flatnonzero(np.isfinite(d)))
    assert len(near_points(xy, centres[-4:-3], radius)) == 0
    assert len(near_points(xy[:0], centres, radius)) == 0


def test_near_points_around_clustered_anchors_queries_only_their_cells(monkeypatch):
    # reference: cKDTree.query with distance_upper_bound. A tile's anchors: hundreds of 1 m
    # cells at a few structures along a long strip; their boxes (shared where they start in
    # the same raster cell) are marked instead of every cell of the raster being queried.
    import clearaudit.arrays as arrays

    rng = np.random.default_rng(31)
    xy = rng.uniform([0, 0], [1500, 110], size=(120_000, 2))
    towers = np.array([[120.0, 55.0], [480.0, 52.0], [860.0, 58.0], [1240.0, 54.0]])
    centres = np.floor(np.repeat(towers, 70, axis=0) + rng.uniform(-6, 6, (280, 2))) + 0.5
    seen = []
    original = arrays._cells_near

    def spy(*args):
        got = original(*args)
        seen.append((None if got is None else len(got), int(args[3][0]) * int(args[3][1])))
        return got

    monkeypatch.setattr(arrays, "_cells_near", spy)
    radius = 21.0
    d, _ = cKDTree(centres).query(xy, distance_upper_bound=radius)
    np.testing.assert_array_equal(near_points(xy, centres, radius), np.flatnonzero(np.isfinite(d)))
    (queried, raster), = seen
    assert queried is not None and queried < raster / 5


@pytest.mark.parametrize("dtype", [np.float64, np.float32, np.int64])
def test_column_bounds_match_numpy(dtype):
    # reference: numpy's own min / max over the rows
    from clearaudit.arrays import column_bounds

    rng = np.random.default_rng(5)
    a = (rng.normal(size=(10_001, 3)) * 1000).astype(dtype)
    for arr in (a, a[::3, :2], a[:1]):
        lo, hi = column_bounds(arr)
        np.testing.assert_array_equal(lo, arr.min(axis=0))
        np.testing.assert_array_equal(hi, arr.max(axis=0))
        assert lo.dtype == arr.dtype
    if dtype is np.float64:
        a[7, 1] = np.nan
        lo, hi = column_bounds(a)
        np.testing.assert_array_equal(lo, a.min(axis=0))
        np.testing.assert_array_equal(hi, a.max(axis=0))
    with pytest.raises(ValueError):
        column_bounds(a[:0])


@pytest.mark.parametrize("dtype", [np.int64, np.int32, np.int16, np.uint8, np.uint32, np.uint64,
                                   np.float64])
def test_unique_rows_equals_numpy_unique_along_rows(dtype):
    # reference: numpy.unique(axis=0): rows, first positions and inverse, value for value
    from clearaudit.arrays import unique_rows

    rng = np.random.default_rng(11)
    low = 0 if np.dtype(dtype).kind in "uf" else -6
    for n, cols in ((1, 3), (7, 1), (2_000, 2), (60_000, 3)):
        a = rng.integers(low, 9, size=(n, cols)).astype(dtype)
        u, first, inv = unique_rows(a, return_index=True, return_inverse=True)
        ref_u, ref_first, ref_inv = np.unique(a, axis=0, return_index=True, return_inverse=True)
        np.testing.assert_array_equal(u, ref_u)
        assert u.dtype == ref_u.dtype
        np.testing.assert_array_equal(first, ref_first)
        np.testing.assert_array_equal(inv, ref_inv.reshape(-1))
        np.testing.assert_array_equal(unique_rows(a), ref_u)
    # ranges whose mixed-radix key would not fit in int64: numpy's own path
    wide = np.array([[-2**62, 3], [2**62, 1], [0, 5], [-2**62, 3]], dtype=np.int64)
    u, inv = unique_rows(wide, return_inverse=True)
    ref_u, ref_inv = np.unique(wide, axis=0, return_inverse=True)
    np.testing.assert_array_equal(u, ref_u)
    np.testing.assert_array_equal(inv, ref_inv.reshape(-1))
    empty = np.zeros((0, 3), dtype=np.int64)
    assert unique_rows(empty).shape == np.unique(empty, axis=0).shape


def test_take_columns_equals_numpy_fancy_indexing_per_column():
    # reference: numpy's own indexing a[index, c] / a[mask, c], column by column
    from clearaudit.arrays import take_columns

    rng = np.random.default_rng(12)
    a = rng.normal(size=(5_003, 3)) * 100
    idx = rng.integers(0, len(a), 2_000)
    mask = rng.random(len(a)) < 0.5
    for arr in (a, a[::2], np.asfortranarray(a), a.astype(np.float32)):
        i = idx[idx < len(arr)]
        for index in (i, i.astype(np.int32), np.sort(i), i[:0], mask[:len(arr)],
                      np.arange(len(arr))):
            got = take_columns(arr, index)
            assert len(got) == 3
            for c in range(3):
                want = arr[index, c]
                assert got[c].dtype == want.dtype and got[c].shape == want.shape
                assert got[c].flags["C_CONTIGUOUS"]
                np.testing.assert_array_equal(got[c], want)
    for bad in (np.array([len(a)]), np.array([-1]), mask[:-1]):
        with pytest.raises(IndexError):
            take_columns(a, bad)
    with pytest.raises(ValueError, match="n, 3"):
        take_columns(a[:, :2], idx)


def test_take_rows_equals_numpy_fancy_and_boolean_indexing():
    # reference: numpy's own indexing a[index] / a[mask]
    from clearaudit.arrays import take_rows
    from clearaudit.classify.grid import GridFrame

    rng = np.random.default_rng(11)
    a = rng.normal(size=(5_003, 3)) * 100
    idx = rng.integers(0, len(a), 2_000)
    mask = rng.random(len(a)) < 0.5
    for arr in (a, a[:, :2], a[::2], a[:, 2], a.astype(np.float32)):
        i = idx[idx < len(arr)]
        m = mask[:len(arr)]
        for got, want in ((take_rows(arr, i), arr[i]), (take_rows(arr, m), arr[m]),
                          (take_rows(arr, -i - 1), arr[-i - 1]),
                          (take_rows(arr, i[:0]), arr[i[:0]]),
                          (take_rows(arr, np.sort(i)), arr[np.sort(i)])):
            assert got.dtype == want.dtype and got.shape == want.shape
            np.testing.assert_array_equal(got, want)
            assert got.flags["C_CONTIGUOUS"]
    with pytest.raises(IndexError):
        take_rows(a, mask[:-1])
    with pytest.raises(IndexError):
        take_rows(a, np.array([len(a)]))
    # grid locations and their bilinear weights: a mask picks what its positions pick
    frame, loc = GridFrame.fit_locate(a[:, :2], 1.0, margin=1.0)
    loc.sampler()
    grid = rng.normal(size=frame.shape).astype(np.float32)
    by_mask, by_index = loc.subset(mask), loc.subset(np.flatnonzero(mask))
    np.testing.assert_array_equal(by_mask.fu, loc.fu[mask])
    np.testing.assert_array_equal(by_mask.sampler()(grid), by_index.sampler()(grid))
    np.testing.assert_array_equal(by_mask.sampler()(grid), loc.sampler()(grid)[mask])


def test_records_in_box_equals_the_tile_test_on_the_records():
    # reference: TileSpec.near on the records' own coordinates (numpy)
    from clearaudit.classify.kernels import records_in_box
    from clearaudit.tiling import RECORD, TileSpec, make_records, record_xyz

    rng = np.random.default_rng(21)
    xyz = rng.uniform(-30, 230, size=(20_000, 3))
    xyz[:50, 0] = 0.0 - 40.0          # on the lower bound: kept
    xyz[50:100, 0] = 200.0 + 40.0     # on the upper bound: dropped
    xyz[100, 1] = np.nan
    rec = make_records(xyz, np.zeros(len(xyz), np.uint8), np.arange(len(xyz)))
    tile = TileSpec("t0_0", ((0, 0),), (0.0, 0.0, 200.0, 100.0), 40.0, (), len(xyz))
    want = np.flatnonzero(tile.near(record_xyz(rec)[:, :2], 40.0))
    out = np.empty(len(rec), np.int64)
    m = records_in_box(rec.view(np.uint8), RECORD.itemsize, -40.0, -40.0, 240.0, 140.0, out)
    np.testing.assert_array_equal(out[:m], want)
    with pytest.raises(ValueError):
        records_in_box(rec.view(np.uint8)[:-1], RECORD.itemsize, 0, 0, 1, 1, out)
    with pytest.raises(ValueError):
        records_in_box(rec.view(np.uint8), RECORD.itemsize, 0, 0, 1, 1, out[:-1])


@pytest.mark.parametrize("point_format", [0, 1, 3, 6, 8])
def test_record_int_bounds_equals_numpy_on_laspy_records(point_format):
    # reference: numpy's min and max of laspy's own X, Y, Z fields of the same records
    import laspy

    from clearaudit.classify.kernels import record_int_bounds

    rng = np.random.default_rng(point_format)
    points = laspy.ScaleAwarePointRecord.zeros(3001, header=laspy.LasHeader(
        point_format=point_format, version="1.4" if point_format >= 6 else "1.2"))
    for name in "XYZ":
        points[name] = rng.integers(-2**31, 2**31 - 1, len(points), dtype=np.int64)
    raw = points.array.view(np.uint8).reshape(-1)
    lo, hi = np.empty(3, np.int64), np.empty(3, np.int64)
    record_int_bounds(raw, points.array.dtype.itemsize, lo, hi)
    np.testing.assert_array_equal(lo, [points[n].min() for n in "XYZ"])
    np.testing.assert_array_equal(hi, [points[n].max() for n in "XYZ"])
    record_int_bounds(raw[:0], points.array.dtype.itemsize, lo, hi)
    assert (lo > hi).all()  # no records
    with pytest.raises(ValueError):
        record_int_bounds(raw[:-1], points.array.dtype.itemsize, lo, hi)


def test_record_take_and_concat_match_numpy():
    # reference: numpy's own fancy indexing and concatenation of the structured records
    from clearaudit.tiling import RECORD, concat_records, take_records

    rng = np.random.default_rng(9)
    rec = np.zeros(5000, RECORD)
    rec["xyz"] = rng.normal(size=(5000, 3))
    rec["cls"] = rng.integers(0, 20, 5000)
    rec["key"] = rng.integers(0, 2**40, 5000)
    order = rng.permutation(5000)
    mask = rng.random(5000) < 0.3
    for index in (order, mask, order[:0]):
        got = take_records(rec, index)
        assert got.dtype == RECORD
        assert got.tobytes() == rec[index].tobytes()
    parts = [rec[:10], rec[10:4000], rec[4000:], take_records(rec, order[:7])]
    assert concat_records(parts).tobytes() == np.concatenate(parts).tobytes()
    assert concat_records([]).dtype == RECORD and len(concat_records([])) == 0


def test_make_records_and_fields_match_numpy_fields():
    # reference: numpy's own field assignment and field views of the structured records
    from clearaudit.tiling import RECORD, make_records, record_keys, record_xyz

    rng = np.random.default_rng(4)
    xyz = rng.normal(size=(3000, 3)) * 1e3
    cls = rng.integers(0, 30, 3000).astype(np.uint8)
    key = rng.integers(0, 2**50, 3000)
    ref = np.empty(3000, RECORD)
    ref["xyz"], ref["cls"], ref["key"] = xyz, cls, key
    for sl in (slice(None), slice(None, None, 3), slice(0, 0)):
        got = make_records(xyz[sl], cls[sl], key[sl])
        assert got.dtype == RECORD and got.tobytes() == ref[sl].tobytes()
        assert record_xyz(got).flags.c_contiguous
        np.testing.assert_array_equal(record_xyz(got), ref[sl]["xyz"])
        np.testing.assert_array_equal(record_keys(got), ref[sl]["key"])


def test_grid_frame_of_a_strided_sample_equals_its_contiguous_copy():
    # fit_locate fits its frame to a contiguous copy of every k-th point: numpy's reduction
    # over the rows gives the same mean for the strided view and the copy
    from clearaudit.classify.grid import GridFrame

    rng = np.random.default_rng(12)
    for step in (1, 3, 7):
        xyz = rng.normal(size=(300_000, 3)) * 800 + 5e4
        view = xyz[:, :2][::step]
        a, b = GridFrame.fit(view, 1.0), GridFrame.fit(np.ascontiguousarray(view), 1.0)
        for name in ("centre", "axes", "corner"):
            np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
        assert a.shape == b.shape


@pytest.mark.parametrize("seed", [0, 1])
def test_near_points_with_centres_around_and_beyond_the_box(seed):
    # reference: cKDTree.query with distance_upper_bound (the structure-extent lookup of the
    # refinement asks for the points within the largest extent this way)
    rng = np.random.default_rng(seed)
    xy = rng.uniform([0, 0], [500, 120], size=(40_000, 2))
    centres = np.concatenate([rng.uniform([0, 0], [500, 120], size=(6, 2)),
                              [[-20.0, 60.0], [250.0, 140.0], [-900.0, 0.0]]])
    radius = 23.0
    d, _ = cKDTree(centres).query(xy, distance_upper_bound=radius)
    got = near_points(xy, centres, radius)
    assert np.all(np.diff(got) > 0)
    np.testing.assert_array_equal(got, np.flatnonzero(np.isfinite(d)))
    assert len(got) < len(xy) / 2
    few = np.array([[0.0, 0.0], [9000.0, 7000.0]])  # a raster of more than 4 cells a point
    d, _ = cKDTree(centres).query(few, distance_upper_bound=radius)
    np.testing.assert_array_equal(near_points(few, centres, radius), np.flatnonzero(np.isfinite(d)))
    assert len(near_points(xy, centres[-1:], radius)) == 0  # out of reach


def test_near_points_on_thin_and_sparse_boxes_and_bad_input():
    # reference: cKDTree.query with distance_upper_bound over every point
    rng = np.random.default_rng(8)
    centres = rng.uniform([0, 0], [3000, 1], size=(10, 2))
    for xy in (np.column_stack([rng.uniform(0, 3000, 20_000), np.full(20_000, 0.5)]),  # a line
               rng.uniform([0, 0], [6000, 6000], size=(300, 2)),  # few points, large box
               np.array([[0.0, 0.0], [10.0, 0.0]])):
        for radius in (0.01, 21.0, 300.0):
            d, _ = cKDTree(centres).query(xy, distance_upper_bound=radius)
            np.testing.assert_array_equal(near_points(xy, centres, radius),
                                          np.flatnonzero(np.isfinite(d)))
    bad = np.array([[np.nan, 1.0], [1.0, 1.0]])
    with pytest.raises(ValueError):
        near_points(bad, centres, 2.0)  # as the plain query: non-finite points rejected
    for radius in (0.0, -1.0, np.inf, np.nan):
        with pytest.raises(ValueError):
            near_points(centres, centres, radius)


def test_record_helpers_reject_other_layouts_and_class_mask_ignores_foreign_codes():
    from clearaudit.tiling import RECORD, take_records

    other = np.zeros(4, dtype=np.dtype([("xyz", ">f8", (3,)), ("cls", "u1"), ("key", ">i8")]))
    assert other.dtype.itemsize == RECORD.itemsize
    with pytest.raises(TypeError):
        take_records(other, [0, 1])
    codes = np.array([255, 1, 0], dtype=np.uint8)
    np.testing.assert_array_equal(class_mask(codes, (-1, 1, 256)), np.isin(codes, (-1, 1, 256)))


def test_plan_tiles_joins_scrap_blocks_into_rectangles():
    # a line crossing block corners: blocks of k x k cells, some holding only a few points.
    # Expected by construction (common practice, no source): every occupied cell owned by one
    # tile, every tile a rectangle of one block or two side-by-side blocks within the point
    # budget, context = occupied cells within the overlap of the box that the tile does not own
    from clearaudit.tiling import Grid, _scrap_partners, plan_tiles

    grid = Grid(0.0, 0.0, 100.0)
    counts = {}
    for i in range(12):  # a diagonal band of cells: full blocks and corner scraps
        for j in range(max(0, i - 1), i + 2):
            counts[(i, j)] = 60_000 if abs(i - j) <= 0 else 9_000
    tiles = plan_tiles(counts, grid, 400_000, 40.0)
    owned = [c for t in tiles for c in t.cells]
    assert sorted(owned) == sorted(counts) and len(set(owned)) == len(owned)
    reach = 1
    for t in tiles:
        assert t.n_points == sum(counts[c] for c in t.cells) <= 400_000
        x0, y0, x1, y1 = t.box
        i0, j0, i1, j1 = (round(v / 100.0) for v in t.box)
        assert all(i0 <= i < i1 and j0 <= j < j1 for i, j in t.cells)  # cells inside the box
        sides = sorted((i1 - i0, j1 - j0))
        assert sides[1] in (sides[0], 2 * sides[0])  # a block or two blocks side by side
        expect = sorted(c for c in counts if i0 - reach <= c[0] < i1 + reach
                        and j0 - reach <= c[1] < j1 + reach and c not in t.cells)
        assert list(t.context_cells) == expect
    for a in tiles:  # boxes never overlap
        for b in tiles:
            if a is not b:
                assert (a.box[2] <= b.box[0] or b.box[2] <= a.box[0] or a.box[3] <= b.box[1]
                        or b.box[3] <= a.box[1])
    # fewer tiles than blocks: the scraps were joined
    k = round((tiles[0].box[2] - tiles[0].box[0]) / 100.0)
    blocks = {(i // k, j // k) for i, j in counts}
    assert len(tiles) < len(blocks)
    # the pairing itself: smallest scrap first, to its smallest fitting side neighbour
    blocks = np.array([[0, 0], [0, 1], [1, 1], [5, 5]])
    points = np.array([100, 900, 50, 10])
    np.testing.assert_array_equal(_scrap_partners(blocks, points, 1000), [-1, 2, 1, -1])
    # a neighbour already joined is not taken again; nothing fits: no pair
    np.testing.assert_array_equal(_scrap_partners(blocks, points, 960), [-1, 2, 1, -1])
    np.testing.assert_array_equal(_scrap_partners(blocks, points, 900), [-1, -1, -1, -1])
    # among the neighbours that fit, the one with the fewest points
    blocks = np.array([[0, 0], [0, 1], [1, 0], [5, 5]])
    points = np.array([100, 900, 300, 10])
    np.testing.assert_array_equal(_scrap_partners(blocks, points, 1000), [2, -1, 0, -1])



def test_tile_target_cuts_a_small_survey_in_two_or_three_tiles():
    # Expected by construction (common practice, no source): an asked size wins; else the
    # default, or 60 % of a smaller survey's points while that leaves at least 400 000
    from clearaudit.tiling import (
        DEFAULT_TILE_POINTS,
        SMALL_SURVEY_MIN_TILE_POINTS,
        Grid,
        plan_tiles,
        tile_target,
    )

    assert tile_target(1_100_000, 5_000_000) == 5_000_000  # asked: honoured as it is
    assert tile_target(10, 300_000) == 300_000
    assert tile_target(20_000_000) == DEFAULT_TILE_POINTS == 1_500_000
    assert tile_target(2_500_000) == 1_500_000  # 60 % of it is the default itself
    assert tile_target(2_400_000) == 1_440_000
    assert tile_target(1_100_000) == 660_000
    assert tile_target(666_666) == SMALL_SURVEY_MIN_TILE_POINTS == 400_000  # ceil(399 999.6)
    assert tile_target(666_665) == DEFAULT_TILE_POINTS  # tiles would be too small: one tile
    assert tile_target(0) == DEFAULT_TILE_POINTS
    with pytest.raises(ValueError):
        tile_target(1_000, 0)
    with pytest.raises(ValueError):
        tile_target(-1)
    # a 2 km line along x of 1.1 M points in 100 m cells: one tile at the default size, two
    # when the small-survey target is used
    grid = Grid(0.0, 0.0, 100.0)
    counts = {(i, 3): 55_000 for i in range(20)}
    assert len(plan_tiles(counts, grid, DEFAULT_TILE_POINTS, 40.0)) == 1
    tiles = plan_tiles(counts, grid, tile_target(sum(counts.values())), 40.0)
    assert len(tiles) == 2 and max(t.n_points for t in tiles) <= 660_000


@pytest.mark.parametrize("spread", [3, 40, 100_000])
def test_route_by_cell_equals_the_stable_sort(spread):
    # reference: numpy's stable argsort of the cell numbers and a gather of the records
    # (the routing before the counting sort); the widest spread takes the sort path itself
    from clearaudit.tiling import RECORD, make_records, route_by_cell

    rng = np.random.default_rng(spread)
    n = 20_000
    xyz = rng.normal(size=(n, 3)) * 100
    cls = rng.integers(0, 20, n).astype(np.uint8)
    key = (np.int64(3) << 40) | np.arange(n, dtype=np.int64)
    ci = rng.integers(-spread, spread, n)
    cj = rng.integers(-5, spread // 3 + 1, n)
    rec, cell_i, cell_j, starts, stops = route_by_cell(xyz, cls, key, ci, cj)
    order = np.lexsort((cj, ci))  # stable: by ci, then cj, ties in input order
    ref = make_records(xyz, cls, key)[order]
    assert rec.dtype == RECORD and rec.tobytes() == ref.tobytes()
    pairs = np.unique(np.c_[ci, cj], axis=0)
    np.testing.assert_array_equal(np.c_[cell_i, cell_j], pairs)
    assert starts[0] == 0 and stops[-1] == n and np.array_equal(starts[1:], stops[:-1])
    for i, j, a, b in zip(cell_i[:50], cell_j[:50], starts[:50], stops[:50], strict=True):
        assert np.all(rec["key"][a:b] == key[(ci == i) & (cj == j)])
    empty = route_by_cell(xyz[:0], cls[:0], key[:0], ci[:0], cj[:0])
    assert len(empty[0]) == 0 and empty[0].dtype == RECORD


def test_route_records_rejects_bad_input():
    from clearaudit.classify.kernels import route_records

    xyz = np.zeros((4, 3))
    out = np.zeros((4, 33), np.uint8)
    ok = dict(xyz=xyz, cls=np.zeros(4, np.uint8), key=np.zeros(4, np.int64), out=out,
              first=np.zeros(3, np.int64))
    route_records(np.array([0, 1, 1, 0]), 2, **ok)
    np.testing.assert_array_equal(ok["first"], [0, 2, 4])
    with pytest.raises(IndexError):
        route_records(np.array([0, 2, 1, 0]), 2, **ok)
    with pytest.raises(ValueError):
        route_records(np.array([0, 1, 1]), 2, **ok)
    with pytest.raises(ValueError):
        route_records(np.array([0, 1, 1, 0]), 3, **ok)


def test_small_pages_turns_numpy_huge_page_requests_off_and_restores_them():
    # numpy's own switch (the NUMPY_MADVISE_HUGEPAGE setting) is the reference
    from clearaudit.tiling import numpy_huge_page_requests, small_pages

    before = numpy_huge_page_requests()
    if before is None:
        pytest.skip("this numpy has no huge-page switch")
    with small_pages():
        assert numpy_huge_page_requests() is False
        assert np.ones(1 << 20).sum() == 1 << 20  # arrays still work
    assert numpy_huge_page_requests() == before
    with pytest.raises(RuntimeError), small_pages():
        raise RuntimeError("restored on errors too")
    assert numpy_huge_page_requests() == before


def test_route_by_cell_names_the_cells_of_far_apart_points():
    # the sort path names each cell from its first point: cell numbers that wrap around
    # int64 for absurd extents must not rename a cell (reference: the input's own cells)
    from clearaudit.tiling import route_by_cell

    ci = np.array([0, 2 ** 32, 1], dtype=np.int64)
    cj = np.array([2 ** 32 - 1, 0, 0], dtype=np.int64)
    xyz = np.zeros((3, 3))
    rec, cell_i, cell_j, starts, stops = route_by_cell(
        xyz, np.zeros(3, np.uint8), np.arange(3, dtype=np.int64), ci, cj)
    got = {(int(i), int(j)): sorted(rec["key"][a:b].tolist())
           for i, j, a, b in zip(cell_i, cell_j, starts, stops, strict=True)}
    assert got == {(0, 2 ** 32 - 1): [0], (2 ** 32, 0): [1], (1, 0): [2]}


def test_small_pages_of_overlapping_tasks_restore_once_the_last_ends():
    # two tasks of one worker on two threads: the setting stays off while either runs and
    # comes back when the last one ends (reference: numpy's own switch)
    import threading

    from clearaudit.tiling import numpy_huge_page_requests, small_pages

    before = numpy_huge_page_requests()
    if before is None:
        pytest.skip("this numpy has no huge-page switch")
    a_in, b_in, a_out = threading.Event(), threading.Event(), threading.Event()
    seen = {}

    def task_a():
        with small_pages():
            a_in.set()
            b_in.wait(10)
        a_out.set()

    def task_b():
        a_in.wait(10)
        with small_pages():
            b_in.set()
            a_out.wait(10)
            seen["while b runs"] = numpy_huge_page_requests()

    threads = [threading.Thread(target=task_a), threading.Thread(target=task_b)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(20)
    assert seen["while b runs"] is False
    assert numpy_huge_page_requests() == before


def test_sparse_model_labels_equal_the_dense_arrays(tmp_path):
    # The line model's labels are kept for its own points only; read back, owned and as
    # another tile's context, they equal the dense arrays (-1 everywhere else). Reference:
    # plain numpy fancy indexing of the dense array.
    from clearaudit.tiling import TileSpec, _labels_at, _load, write_model_labels

    (tmp_path / "tiles").mkdir()
    rng = np.random.default_rng(5)
    n = 5000
    at = np.sort(rng.choice(n, size=300, replace=False))
    wire, other = rng.integers(-1, 40, size=300), rng.integers(-1, 3, size=300)
    tile = TileSpec("t0_0", ((0, 0),), (0.0, 0.0, 100.0, 100.0), 40.0, (), n)
    write_model_labels(tmp_path, tile, at, wire, other)
    table = _load(tmp_path, "t0_0", "labels")
    for row, values in ((1, wire), (2, other)):
        dense = np.full(n, -1, dtype=np.int64)
        dense[at] = values
        ask = np.concatenate([rng.integers(0, n, size=2000), at[:5], [0, n - 1]])
        got = _labels_at(table, row, ask)
        assert got.dtype == np.int64
        np.testing.assert_array_equal(got, dense[ask])
    write_model_labels(tmp_path, tile, at[:0], wire[:0], other[:0])  # no model points
    assert np.all(_labels_at(_load(tmp_path, "t0_0", "labels"), 1, np.arange(10)) == -1)
    with pytest.raises(ValueError, match="ascending"):
        write_model_labels(tmp_path, tile, at[::-1], wire, other)


def test_tile_results_look_up_interleaved_keys_cell_by_cell(tmp_path):
    # A tile's owned points are its cells' points one cell after the other, so its keys
    # ascend within each cell and interleave across cells; the writer's lookups by point
    # range search each cell's run and equal a plain scatter of the arrays (reference: numpy
    # fancy indexing).
    import pickle

    from clearaudit.tiling import KEY_SHIFT, TileResults, TileSpec

    (tmp_path / "tiles").mkdir()
    rng = np.random.default_rng(8)
    n_file = 20_000
    owner = rng.integers(0, 2, size=n_file)           # which tile owns each point of file 1
    cell_of = rng.integers(0, 3, size=n_file)         # and in which of its 3 cells
    cls_all = rng.integers(0, 20, size=n_file).astype(np.uint8)
    hag_all = rng.normal(size=n_file).astype(np.float32)
    tiles = []
    for k in range(2):
        runs = [np.flatnonzero((owner == k) & (cell_of == c)) for c in (2, 0, 1)]
        owned = np.concatenate(runs)
        offsets = np.cumsum([0] + [len(r) for r in runs])[:-1]
        cells = ((k, 2), (k, 0), (k, 1))
        with open(tmp_path / "tiles" / f"t{k}.cells.pkl", "wb") as fh:
            pickle.dump({c: int(o) for c, o in zip(cells, offsets, strict=True)}, fh)
        np.save(tmp_path / "tiles" / f"t{k}.key.npy", (np.int64(1) << KEY_SHIFT) | owned)
        np.save(tmp_path / "tiles" / f"t{k}.rcls.npy", cls_all[owned])
        np.save(tmp_path / "tiles" / f"t{k}.hag.npy", hag_all[owned])
        tiles.append(TileSpec(f"t{k}", cells, (0.0, 0.0, 1.0, 1.0), 0.0, (), len(owned)))
    lookup = TileResults(tmp_path, tiles)
    for start, stop in ((0, n_file), (123, 4567), (19_990, 20_000), (5000, 5001)):
        has, codes, extra = lookup.values(1, start, stop)
        assert has.all()
        np.testing.assert_array_equal(codes, cls_all[start:stop])
        np.testing.assert_array_equal(extra["height_above_ground"], hag_all[start:stop])
    has, _, extra = lookup.values(0, 0, 100)           # another file: nothing owned
    assert not has.any() and np.isnan(extra["height_above_ground"]).all()
    # keys out of order within a cell are refused, not looked up wrongly
    bad = np.load(tmp_path / "tiles" / "t0.key.npy")
    bad[[1, 2]] = bad[[2, 1]]
    np.save(tmp_path / "tiles" / "t0.key.npy", bad)
    with pytest.raises(RuntimeError, match="do not ascend"):
        TileResults(tmp_path, tiles)


def test_raster_state_equals_the_numpy_form():
    # reference: the numpy expression near_points used before the kernel (same roundings)
    from clearaudit.classify.kernels import raster_state

    rng = np.random.default_rng(11)
    xy = rng.uniform([5.2e5, 4.1e6], [5.2e5 + 900.0, 4.1e6 + 250.0], size=(40_000, 2))
    xy[:50] = np.floor(xy[:50] / 2.5) * 2.5                 # on cell edges
    lo, size = xy.min(axis=0), 2.5
    shape = (int((xy[:, 0].max() - lo[0]) // size), int((xy[:, 1].max() - lo[1]) // size))
    state = rng.integers(0, 3, size=shape[0] * shape[1]).astype(np.uint8)
    at = np.minimum(((xy[:, 0] - lo[0]) / size).astype(np.int64), shape[0] - 1) * shape[1] \
        + np.minimum(((xy[:, 1] - lo[1]) / size).astype(np.int64), shape[1] - 1)
    for view in (xy, np.asfortranarray(xy), np.column_stack([xy, xy[:, :1]])[:, :2]):
        out = np.empty(len(xy), np.uint8)
        raster_state(view, float(lo[0]), float(lo[1]), size, shape[0], shape[1], state, out)
        np.testing.assert_array_equal(out, state[at])
    out = np.empty(len(xy), np.uint8)
    with pytest.raises(ValueError, match="below the raster"):
        raster_state(xy, float(lo[0]) + 1.0, float(lo[1]), size, shape[0], shape[1], state, out)
    bad = xy.copy()
    bad[7, 1] = np.nan
    with pytest.raises(ValueError, match="not finite"):
        raster_state(bad, float(lo[0]), float(lo[1]), size, shape[0], shape[1], state, out)
    with pytest.raises(ValueError, match="shapes"):
        raster_state(xy, float(lo[0]), float(lo[1]), size, shape[0], shape[1], state[:-1], out)


_KEPT_HEAP_CHECK = """
import ctypes, platform, sys
import numpy as np
from clearaudit.tiling import heap_kept, kept_heap

try:
    info = ctypes.CDLL("libc.so.6").mallinfo2
except (OSError, AttributeError):
    sys.exit(3)

class Mallinfo2(ctypes.Structure):
    _fields_ = [(n, ctypes.c_size_t) for n in (
        "arena", "ordblks", "smblks", "hblks", "hblkhd", "usmblks", "fsmblks",
        "uordblks", "fordblks", "keepcost")]

info.restype = Mallinfo2
size = 48 << 20

def grows_mapped(size=size):
    before = info().hblkhd
    block = np.empty(size, np.uint8)
    grown = info().hblkhd - before >= size
    del block
    return grown

seen = [grows_mapped(), grows_mapped(16 << 20)]
with kept_heap() as kept:
    if not kept:
        sys.exit(4)  # this glibc refuses the threshold
    seen.append(heap_kept())
    with kept_heap() as inner:  # an overlapping block leaves the setting to the outermost one
        assert inner
    seen.append(heap_kept())
    seen.append(grows_mapped())
    seen.append(float(np.ones(1 << 20).sum()))
seen.append(heap_kept())
seen.append(grows_mapped())
seen.append(grows_mapped(16 << 20))  # from the heap: the threshold is 32 MB now
try:
    with kept_heap():
        raise RuntimeError("restored on errors too")
except RuntimeError:
    pass
seen.append(heap_kept())
print(seen)
"""


def test_kept_heap_serves_large_arrays_from_the_heap_and_restores_glibc():
    # reference: glibc's mallinfo2 (hblkhd: bytes in separately mapped blocks) in a fresh
    # process, so the heap's layout is known: a 48 MB array is a separate mapping under
    # glibc's defaults (its adaptive threshold stops at 32 MB, mallopt(3)) and after the
    # block, and a heap block while the heap is kept; a 16 MB array is mapped in a fresh
    # process (the adaptive threshold starts at 128 KiB) and a heap block after the block
    # (the threshold left at 32 MB)
    import platform
    import subprocess
    import sys

    if platform.libc_ver()[0] != "glibc":
        pytest.skip("glibc only")
    env = {k: v for k, v in os.environ.items()
           if not k.startswith("MALLOC_") and k not in ("GLIBC_TUNABLES", "CLEARAUDIT_KEEP_HEAP")}
    proc = subprocess.run([sys.executable, "-c", _KEPT_HEAP_CHECK], env=env,
                          capture_output=True, text=True, check=False)
    if proc.returncode == 3:
        pytest.skip("needs glibc 2.33+ (mallinfo2)")
    if proc.returncode == 4:
        pytest.skip("this glibc caps the mmap threshold (kept_heap changes nothing)")
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == str([True, True, True, True, False, float(1 << 20), False,
                                       True, False, False])


def test_kept_heap_leaves_malloc_alone_when_the_environment_sets_it(monkeypatch):
    from clearaudit.tiling import heap_kept, kept_heap

    monkeypatch.setenv("MALLOC_ARENA_MAX", "2")  # the user's choice: not ours to undo
    with kept_heap() as kept:
        assert not kept and not heap_kept()
    monkeypatch.delenv("MALLOC_ARENA_MAX")
    monkeypatch.setenv("CLEARAUDIT_KEEP_HEAP", "0")  # turned off outright
    with kept_heap() as kept:
        assert not kept and not heap_kept()


@pytest.mark.parametrize("n_centres", [1, 40, 3000])
def test_near_points_boxes_around_the_centres_and_the_whole_raster(n_centres):
    # reference: cKDTree.query with distance_upper_bound over every point. Few centres are
    # looked up through the raster cells around them; thousands (boxes holding more than 32
    # cells for each cell of the raster) through the whole raster: the same points either way
    from clearaudit.arrays import _cells_near

    rng = np.random.default_rng(n_centres)
    xy = rng.uniform([0, 0], [300, 80], size=(30_000, 2)) + 4.1e5
    centres = rng.uniform([-30, -30], [330, 110], size=(n_centres, 2)) + 4.1e5
    radius = 6.5
    d, _ = cKDTree(centres).query(xy, distance_upper_bound=radius)
    np.testing.assert_array_equal(near_points(xy, centres, radius), np.flatnonzero(np.isfinite(d)))
    # the cells chosen hold every cell centre within the bound of a centre (Chebyshev box)
    lo, size, shape, bound = xy.min(axis=0), radius / 8.0, np.array([300, 90]), radius + 1.0
    cells = _cells_near(centres[:5], lo, size, shape, bound)
    iu, iv = np.divmod(np.arange(shape[0] * shape[1]), shape[1])
    centre_xy = np.column_stack([lo[0] + (iu + 0.5) * size, lo[1] + (iv + 0.5) * size])
    dd, _ = cKDTree(centres[:5]).query(centre_xy, distance_upper_bound=bound)
    assert set(np.flatnonzero(np.isfinite(dd))) <= set(cells)
    assert np.all(np.diff(cells) > 0)
    # boxes holding more than 32 cells for each cell of the raster: the whole raster
    assert _cells_near(centres, lo, size, np.array([2, 2]), bound) is None


def test_corridor_keep_is_built_once_per_corridor_and_equals_the_mask():
    # reference: clearaudit.io.las.corridor_mask built afresh (tested against the brute-force
    # segment distance in test_io_las); the shared test must be the same function of the points
    import threading

    from clearaudit.io.las import corridor_mask
    from clearaudit.tiling import Corridor, corridor_keep

    line = np.array([[5.0e5, 4.2e6], [5.004e5, 4.2003e6], [5.009e5, 4.2001e6]])
    a = corridor_keep(Corridor(line, 30.0))
    b = corridor_keep(Corridor(line.copy(), 30.0))
    assert a is b
    assert corridor_keep(Corridor(line, 31.0)) is not a
    rng = np.random.default_rng(5)
    xy = rng.uniform([4.999e5, 4.1995e6], [5.010e5, 4.2008e6], size=(20_000, 2))
    np.testing.assert_array_equal(a(xy), corridor_mask(line, 30.0)(xy))
    # tasks starting together share one build
    got = []
    other = line + [0.0, 1.0]
    threads = [threading.Thread(target=lambda: got.append(corridor_keep(Corridor(other, 30.0))))
               for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert len(got) == 4 and all(g is got[0] for g in got)


def test_hypot_within_is_numpys_hypot_compared():
    # reference: numpy.hypot(x, y) <= limit, element for element, on random values, values
    # on and one ulp either side of the circle (where only libm's hypot decides), NaN, inf,
    # tiny and huge values, strided input and limits the kernel passes to numpy
    from clearaudit.arrays import hypot_within

    rng = np.random.default_rng(41)
    limit = 0.35
    x, y = rng.normal(scale=0.3, size=(2, 20_000))
    theta = rng.uniform(0, 2 * np.pi, 4_000)
    cx, cy = limit * np.cos(theta), limit * np.sin(theta)
    edge_x = np.concatenate([cx, np.nextafter(cx, 1.0), np.nextafter(cx, -1.0), [limit, -limit, 0.0]])
    edge_y = np.concatenate([cy, cy, cy, [0.0, 0.0, limit]])
    odd_x = np.array([np.nan, 1.0, np.inf, -np.inf, np.inf, 1e-200, 1e200, 0.0, -0.2, np.nan])
    odd_y = np.array([0.0, np.nan, np.nan, 0.0, np.inf, 1e-200, 0.0, 0.0, 0.3, np.nan])
    for a, b in ((x, y), (edge_x, edge_y), (odd_x, odd_y)):
        got = hypot_within(a, b, limit)
        assert got.dtype == bool
        np.testing.assert_array_equal(got, np.hypot(a, b) <= limit)
    pairs = rng.normal(size=(5_000, 2))  # columns of a 2-D array: strided
    np.testing.assert_array_equal(hypot_within(pairs[:, 0], pairs[:, 1], 1.0),
                                  np.hypot(pairs[:, 0], pairs[:, 1]) <= 1.0)
    for odd_limit in (0.0, -1.0, np.nan, np.inf, 1e-160, 1e160):
        np.testing.assert_array_equal(hypot_within(odd_x, odd_y, odd_limit),
                                      np.hypot(odd_x, odd_y) <= odd_limit)
    assert len(hypot_within(np.zeros(0), np.zeros(0), limit)) == 0


def test_cell_files_are_the_glob_in_name_order(tmp_path):
    # reference: pathlib's sorted(folder.glob("p*.bin")), which the directory scan replaced
    from clearaudit.tiling import _cell_dir, _cell_files

    folder = _cell_dir(tmp_path, 3, 4)
    folder.mkdir(parents=True)
    for name in ("p0.bin", "p10.bin", "p2.bin", "p.bin", "copies.npy", "q1.bin", "p3.binx",
                 ".p4.bin", "P5.bin"):
        (folder / name).write_bytes(b"")
    assert _cell_files(tmp_path, (3, 4)) == sorted(folder.glob("p*.bin"))
    assert _cell_files(tmp_path, (9, 9)) == []


def test_code_counts_equal_numpys_bincount_on_any_order_and_stride():
    # reference: numpy.bincount (general-purpose library); the kernel's four partial tables
    # must add up alike on runs of one code, sorted codes, random codes and strided views
    from clearaudit.arrays import code_counts

    rng = np.random.default_rng(8)
    codes = rng.integers(0, 256, 100_003).astype(np.uint8)
    for case in (codes, np.sort(codes), np.full(1_001, 255, np.uint8), codes[::7], codes[:3],
                 np.zeros(0, np.uint8)):
        np.testing.assert_array_equal(code_counts(case), np.bincount(case, minlength=256))
    with pytest.raises(TypeError, match="uint8"):
        code_counts(codes.astype(np.int32))


def test_files_written_in_pieces_are_the_bytes_numpy_writes(tmp_path, monkeypatch):
    # reference: numpy.save and a plain file write (general-purpose library, the standard
    # library): the same bytes, whatever the size of the pieces
    import io

    from clearaudit.io import files

    monkeypatch.setattr(files, "PIECE_BYTES", 1000)  # many pieces on small arrays
    rng = np.random.default_rng(4)
    for a in (rng.integers(0, 1 << 40, 12_345), rng.random((777, 3)).astype(np.float32),
              np.zeros(0, np.uint8), rng.integers(0, 9, (3, 2_001)).astype(np.int64),
              np.asfortranarray(rng.random((50, 40)))):
        np.save(tmp_path / "ref.npy", np.ascontiguousarray(a))
        files.save_array(tmp_path / "got.npy", a)
        assert (tmp_path / "got.npy").read_bytes() == (tmp_path / "ref.npy").read_bytes()
        np.testing.assert_array_equal(np.load(tmp_path / "got.npy"), a)
    raw = rng.integers(0, 256, 5_555).astype(np.uint8)
    for data in (raw, raw.tobytes(), bytearray(raw.tobytes())):
        buf = io.BytesIO()
        assert files.write_pieces(buf, data) == 5_555
        assert buf.getvalue() == raw.tobytes()
    with pytest.raises(ValueError, match="contiguous"):
        files.write_pieces(io.BytesIO(), raw.reshape(55, 101)[:, ::2])
    text = "span 12 — sag 3.4 m, ±0.1 m\n" * 500
    files.write_text(tmp_path / "t.json", text)
    (tmp_path / "ref.json").write_text(text, encoding="utf-8")
    assert (tmp_path / "t.json").read_bytes() == (tmp_path / "ref.json").read_bytes()
    with pytest.raises(ValueError, match="object"):
        files.save_array(tmp_path / "o.npy", np.array([None, 1], dtype=object))

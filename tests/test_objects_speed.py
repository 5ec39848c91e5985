"""Fast paths of the object and feature steps give the same answers as the plain forms.

The sparse cell-set morphology of ``classify.objects`` is checked against scipy.ndimage
(general-purpose reference library from PyPI) on random grids, borders included; the chunked,
threaded eigen features against themselves at other thread counts and against
numpy.linalg.eigh of the neighbourhood covariance (reference library from PyPI).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage
from scipy.spatial import cKDTree

from clearaudit.classify import features
from clearaudit.classify.features import eigen_features, feature_threads
from clearaudit.classify.grid import GridFrame
from clearaudit.classify.objects import (
    _cell_components,
    _disk,
    _erode_cells,
    _grow_cells,
    _square,
    anchored_frame,
    column_grid,
)


def _random_sets(seed: int, count: int = 12):
    rng = np.random.default_rng(seed)
    for _ in range(count):
        shape = (int(rng.integers(5, 60)), int(rng.integers(5, 40)))
        grid = rng.random(shape) < rng.uniform(0.02, 0.6)
        grid[0, rng.integers(shape[1])] = True  # something on the border
        yield grid


def test_sparse_dilation_closing_and_distance_match_scipy():
    # reference: scipy.ndimage binary_dilation / binary_closing / distance_transform_edt
    square = np.ones((3, 3), bool)
    for grid in _random_sets(1):
        shape = grid.shape
        cells = np.flatnonzero(grid)
        dil = np.zeros(grid.size, bool)
        dil[_grow_cells(cells, shape, _square(1))] = True
        assert np.array_equal(dil.reshape(shape), ndimage.binary_dilation(grid, square))
        wide = np.zeros(grid.size, bool)
        wide[_grow_cells(cells, shape, _square(3))] = True
        assert np.array_equal(wide.reshape(shape),
                              ndimage.binary_dilation(grid, np.ones((7, 7), bool)))
        closed = np.zeros(grid.size, bool)
        closed[_erode_cells(_grow_cells(cells, shape, _square(1)), shape)] = True
        assert np.array_equal(closed.reshape(shape), ndimage.binary_closing(grid, square))
        near = np.zeros(grid.size, bool)
        near[_grow_cells(cells, shape, _disk(4))] = True
        assert np.array_equal(near.reshape(shape), ndimage.distance_transform_edt(~grid) <= 4)


def test_sparse_components_match_scipy_label():
    # reference: scipy.ndimage.label with 8-connectivity; the same partition of the cells
    for grid in _random_sets(2):
        cells = np.flatnonzero(grid)
        ours = _cell_components(cells, grid.shape)
        ref, _ = ndimage.label(grid, np.ones((3, 3)))
        pairs = np.unique(np.c_[ours, ref.ravel()[cells]], axis=0)
        assert len(pairs) == len(np.unique(ours)) == len(np.unique(ref.ravel()[cells]))


def _rotated_flat_index(frame: GridFrame, xy: np.ndarray) -> np.ndarray:
    """The cell index through the full rotation to (u, v), for every frame."""
    f = (frame.to_uv(xy) - frame.corner) / frame.cell
    i = np.clip(np.floor(f[:, 0]).astype(np.int64), 0, frame.shape[0] - 1)
    j = np.clip(np.floor(f[:, 1]).astype(np.int64), 0, frame.shape[1] - 1)
    return i * frame.shape[1] + j


def test_flat_index_of_anchored_frames_matches_grid_frame():
    # GridFrame.index skips the rotation for anchored frames: the same cells as rotating
    rng = np.random.default_rng(4)
    xy = rng.uniform(-300, 900, (5000, 2))
    for cell in (0.5, 1.0, 2.0):
        frame = anchored_frame(xy, cell)
        assert np.array_equal(frame.flat_index(xy), _rotated_flat_index(frame, xy))
    rotated = GridFrame.fit(xy, 1.0)
    assert np.array_equal(rotated.flat_index(xy), _rotated_flat_index(rotated, xy))


@pytest.mark.parametrize("itype", [np.int32, np.int64])
def test_cell_offsets_equal_the_numpy_form(itype):
    # reference: the roof search's former numpy form (numpy.floor of u / cell cast and
    # clipped, then u - (i + 0.5) cell): the same cells and offsets, value for value, for
    # points on cell edges, one ulp either side of them, beyond the grid and not finite
    from clearaudit.classify.kernels import cell_offsets

    rng = np.random.default_rng(17)
    for cell, (n_u, n_v) in ((1.0, (40, 31)), (0.7, (9, 1)), (2.5, (1, 1)), (1.0 / 3, (50, 7))):
        u = rng.uniform(-2 * cell, (n_u + 2) * cell, 5000)
        v = rng.uniform(-2 * cell, (n_v + 2) * cell, 5000)
        edges = np.arange(n_u + 1) * cell
        u[:len(edges)] = edges
        u[len(edges):2 * len(edges)] = np.nextafter(edges, -np.inf)
        u[2 * len(edges):3 * len(edges)] = np.nextafter(edges, np.inf)
        u[-3:], v[-3:] = [np.nan, -0.0, 1e300], [1.5, np.nan, -1e300]
        # (floored values are first brought within one cell of the grid: numpy's cast of a
        # value beyond the integers, or of NaN, is undefined; the kernel counts NaN as 0)
        i = np.clip(np.clip(np.nan_to_num(np.floor(u / cell)), -1, n_u).astype(np.int64), 0,
                    n_u - 1)
        j = np.clip(np.clip(np.nan_to_num(np.floor(v / cell)), -1, n_v).astype(np.int64), 0,
                    n_v - 1)
        want_flat = (i * n_v + j).astype(itype)
        want_u, want_v = u - (i + 0.5) * cell, v - (j + 0.5) * cell
        got_u, got_v, flat = u.copy(), v.copy(), np.empty(len(u), itype)
        cell_offsets(got_u, got_v, cell, n_u, n_v, flat)
        np.testing.assert_array_equal(flat, want_flat)
        np.testing.assert_array_equal(got_u, want_u)
        np.testing.assert_array_equal(got_v, want_v)
    with pytest.raises(ValueError):
        cell_offsets(np.zeros(2), np.zeros(3), 1.0, 2, 2, np.empty(2, itype))


def test_column_fill_counts_occupied_slices():
    # reference: numpy.unique of (cell, 1 m slice) pairs, the plain form of the count
    rng = np.random.default_rng(5)
    xy = rng.uniform(0, 40, (4000, 2))
    hag = rng.uniform(2, 30, 4000)
    frame = anchored_frame(xy, 2.0)
    cols = column_grid(xy, hag, frame)
    flat = frame.flat_index(xy)
    pairs = np.unique(np.c_[flat, np.floor(hag)], axis=0)
    occupied = np.bincount(pairs[:, 0].astype(int), minlength=frame.size)
    count = np.bincount(flat, minlength=frame.size)
    top = np.full(frame.size, -np.inf)
    np.maximum.at(top, flat, hag)
    bottom = np.full(frame.size, np.inf)
    np.minimum.at(bottom, flat, hag)
    with np.errstate(invalid="ignore"):
        fill = np.where(count > 0, occupied / (np.floor(top) - np.floor(bottom) + 1), 0.0)
    assert np.array_equal(cols.fill.ravel(), fill)


def test_feature_threads_rule(monkeypatch):
    monkeypatch.setenv("CLEARAUDIT_THREADS", "1")
    assert feature_threads() == 1
    monkeypatch.setenv("CLEARAUDIT_THREADS", "3")
    assert feature_threads() == 3
    assert feature_threads(2) == 2
    monkeypatch.delenv("CLEARAUDIT_THREADS")
    assert feature_threads() >= 1
    with pytest.raises(ValueError):
        feature_threads(0)
    from clearaudit.threads import thread_limit

    with thread_limit(1):  # a tile thread of the in-process engine
        monkeypatch.setenv("CLEARAUDIT_THREADS", "3")
        assert feature_threads() == 1


def _cloud(seed: int = 6) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t = rng.uniform(0, 200, 4000)
    wire = np.c_[t, 0.2 * t, 20 + 0.001 * (t - 100) ** 2 + 0.01 * rng.normal(size=t.size)]
    u, v = rng.uniform(0, 30, (2, 6000))
    roof = np.c_[u + 20, v - 40, 8 + 0.3 * u]
    crown = rng.normal([120, 60, 10], 2.0, (6000, 3))
    sparse_pts = np.c_[rng.uniform(0, 200, 300), rng.uniform(100, 110, 300), rng.uniform(20, 25, 300)]
    return np.vstack([wire, roof, crown, sparse_pts])


def test_features_do_not_depend_on_threads_or_chunks(monkeypatch):
    xyz = _cloud()
    monkeypatch.setattr(features, "_CHUNK", 1500)  # many chunks from a small cloud
    runs = [eigen_features(xyz, 1.25, 20, workers=w, sparse_radius=3.0) for w in (1, 2, 3)]
    monkeypatch.setattr(features, "_CHUNK", 65_536)
    runs.append(eigen_features(xyz, 1.25, 20, workers=1, sparse_radius=3.0))
    for other in runs[1:]:
        for name in ("linearity", "planarity", "scattering", "verticality", "direction",
                     "normal", "count"):
            assert np.array_equal(getattr(runs[0], name), getattr(other, name)), name


def test_features_match_eigh_of_the_neighbourhood_covariance():
    # reference: numpy.linalg.eigh of the biased covariance (numpy.cov, bias=True) of the
    # k nearest neighbours within the radius found by scipy's cKDTree
    xyz = _cloud(7)
    f = eigen_features(xyz, 1.25, 20, workers=2)
    rng = np.random.default_rng(8)
    pick = rng.choice(len(xyz), 300, replace=False)
    _, idx = cKDTree(xyz).query(xyz[pick], k=20, distance_upper_bound=1.25)
    for row, point in enumerate(pick):
        nb = xyz[idx[row][idx[row] < len(xyz)]]
        assert f.count[point] == len(nb)
        if len(nb) < 3:
            continue
        vals, vecs = np.linalg.eigh(np.cov(nb.T, bias=True))
        l3, l2, l1 = np.maximum(vals, 0.0)
        assert f.linearity[point] == pytest.approx((l1 - l2) / l1, abs=1e-7)
        assert f.scattering[point] == pytest.approx(l3 / l1, abs=1e-7)
        if (l1 - l2) / l1 > 1e-3:
            assert abs(f.direction[point] @ vecs[:, 2]) == pytest.approx(1.0, abs=1e-6)


def test_column_grid_top_bottom_count_match_direct_reductions():
    # reference: numpy ufunc.at reductions and bincount over the whole grid (plain form)
    rng = np.random.default_rng(6)
    xy = np.concatenate([rng.uniform(0, 30, (3000, 2)), rng.uniform(200, 230, (500, 2))])
    hag = rng.uniform(0.5, 40, len(xy))
    frame = anchored_frame(xy, 2.0)
    cols = column_grid(xy, hag, frame)
    flat = frame.flat_index(xy)
    top = np.full(frame.size, -np.inf)
    np.maximum.at(top, flat, hag)
    bottom = np.full(frame.size, np.inf)
    np.minimum.at(bottom, flat, hag)
    count = np.bincount(flat, minlength=frame.size)
    empty = count == 0
    np.testing.assert_array_equal(cols.count.ravel(), count)
    np.testing.assert_array_equal(cols.top.ravel()[~empty], top[~empty])
    np.testing.assert_array_equal(cols.bottom.ravel()[~empty], bottom[~empty])
    assert np.isnan(cols.top.ravel()[empty]).all() and np.isnan(cols.bottom.ravel()[empty]).all()
    assert (cols.fill.ravel()[empty] == 0).all()

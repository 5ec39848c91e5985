"""Exact neighbourhood moments on a cell grid (``classify.neighbours``, compiled kernel).

Reference: scipy's ``cKDTree.query(k, distance_upper_bound)`` (a general-purpose k-d tree from
PyPI) for the neighbour sets, and numpy reductions over those neighbours for the moments —
the computation the eigen features ran before the kernel existed.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial import cKDTree

from clearaudit.classify.features import eigen_features
from clearaudit.classify.neighbours import NeighbourGrid
from clearaudit.threads import run_chunks


def _reference(pts: np.ndarray, rows: np.ndarray, radius: float, k: int):
    """Counts and moments from cKDTree neighbours, reduced by numpy over the (k, m) blocks."""
    n = len(pts)
    k = min(k, n)
    _, idx = cKDTree(pts).query(pts[rows], k=k, distance_upper_bound=radius)
    idx = idx.reshape(len(rows), k)
    valid = idx < n
    cnt = valid.sum(axis=1)
    near = np.where(valid, idx, rows[:, None]).T.copy()
    d = [pts[near, c] - pts[rows, c] for c in range(3)]
    mean = [g.sum(axis=0) / cnt for g in d]
    pairs = ((0, 0), (0, 1), (0, 2), (1, 1), (1, 2), (2, 2))
    cov = np.stack([np.einsum("km,km->m", d[a], d[b]) / cnt - mean[a] * mean[b]
                    for a, b in pairs], axis=1)
    return cnt, cov


def _grid_moments(pts, rows, radius, k, cell=None):
    grid = NeighbourGrid(pts, radius if cell is None else cell)
    positions, dest = grid.walk(rows)
    cnt, cov = grid.moments(positions, radius, min(k, len(pts)))
    out_cnt = np.empty_like(cnt)
    out_cov = np.empty_like(cov)
    out_cnt[dest] = cnt
    out_cov[dest] = cov
    return out_cnt, out_cov


def _corridor_like(rng: np.random.Generator, n: int) -> np.ndarray:
    # crowns (blobs), a wire (a line) and a wall (a plane): the shapes the features sort
    crowns = rng.normal(size=(n // 2, 3)) * [2.0, 2.0, 3.0] + rng.uniform(0, 40, (n // 2, 1))
    t = rng.uniform(0, 60, n // 4)
    wire = np.c_[t, 0.5 * t, 15 + 0.001 * (t - 30) ** 2]
    u, v = rng.uniform(0, 8, (2, n - n // 2 - n // 4))
    wall = np.c_[u + 70, np.full_like(u, 5.0), v]
    return np.vstack([crowns, wire, wall])


@pytest.mark.parametrize("radius,k,cell", [(1.25, 20, None), (3.0, 20, 1.25), (0.7, 5, None),
                                           (2.0, 64, 0.5)])
def test_moments_equal_the_kd_tree_neighbourhoods(radius, k, cell):
    rng = np.random.default_rng(7)
    pts = _corridor_like(rng, 6000)
    pts -= pts.mean(axis=0)
    rows = np.arange(len(pts))
    cnt, cov = _grid_moments(pts, None, radius, k, cell)
    ref_cnt, ref_cov = _reference(pts, rows, radius, k)
    assert np.array_equal(cnt, ref_cnt)
    # the same neighbours summed in the same order: the same numbers, not just close ones
    assert np.array_equal(cov, ref_cov)


def test_quantised_coordinates_with_ties_and_duplicates():
    # LAS coordinates are integers times a scale: equal distances and repeated points are
    # common. Ties at the k-th distance may pick a different (equally near) point than the
    # k-d tree; the count and every distance-determined moment must still agree
    rng = np.random.default_rng(11)
    pts = np.round(rng.uniform(0, 6, (3000, 3)), 1)
    pts = np.vstack([pts, pts[:200]])  # exact duplicates
    pts -= pts.mean(axis=0)
    cnt, cov = _grid_moments(pts, None, 1.0, 12)
    ref_cnt, ref_cov = _reference(pts, np.arange(len(pts)), 1.0, 12)
    assert np.array_equal(cnt, ref_cnt)
    same = np.all(cov == ref_cov, axis=1)
    assert same.mean() > 0.9
    # where a tie was broken differently the neighbourhood is another, equally valid one
    np.testing.assert_allclose(cov, ref_cov, atol=0.1)


def test_tie_at_the_kth_distance_goes_to_the_lower_index():
    # four points at distance 1 from the origin: with k = 3 the origin and the two lowest
    # indices among them are kept (worked by hand)
    pts = np.array([[0.0, 0.0, 0.0], [0.0, 0.0, 1.0], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0],
                    [-1.0, 0.0, 0.0]])
    cnt, cov = _grid_moments(pts, np.array([0]), 1.5, 3)
    assert cnt[0] == 3
    kept = pts[[0, 1, 2]]
    c = kept - kept.mean(axis=0)
    expected = (c.T @ c) / 3
    np.testing.assert_allclose(cov[0], expected[[0, 0, 0, 1, 1, 2], [0, 1, 2, 1, 2, 2]],
                               atol=1e-15)


def test_strictly_within_the_radius():
    # a neighbour exactly at the radius is not within it (the k-d tree's rule)
    pts = np.array([[0.0, 0.0, 0.0], [1.25, 0.0, 0.0], [0.0, 1.2, 0.0]])
    cnt, _ = _grid_moments(pts, np.array([0]), 1.25, 10)
    assert cnt[0] == 2
    _, idx = cKDTree(pts).query(pts[:1], k=3, distance_upper_bound=1.25)
    assert (idx < 3).sum() == 2


def test_subsets_any_order_threads_and_chunks_do_not_change_results():
    rng = np.random.default_rng(5)
    pts = _corridor_like(rng, 8000)
    pts -= pts.mean(axis=0)
    rows = rng.permutation(len(pts))[:3000]
    cnt, cov = _grid_moments(pts, rows, 1.25, 20)
    all_cnt, all_cov = _grid_moments(pts, None, 1.25, 20)
    assert np.array_equal(cnt, all_cnt[rows]) and np.array_equal(cov, all_cov[rows])
    # unsorted positions and chunked calls on threads give the same rows
    grid = NeighbourGrid(pts, 1.25)
    positions, _ = grid.walk(rows)
    shuffled = rng.permutation(positions)
    c1, m1 = grid.moments(shuffled, 1.25, 20)
    c2 = np.zeros_like(c1)
    m2 = np.zeros_like(m1)

    def work(a, b):
        c2[a:b], m2[a:b] = grid.moments(shuffled[a:b], 1.25, 20)

    run_chunks(work, len(shuffled), 97, threads=3)
    assert np.array_equal(c1, c2) and np.array_equal(m1, m2)
    order = np.argsort(shuffled)
    assert np.array_equal(c1[order], grid.moments(np.sort(shuffled), 1.25, 20)[0])


def test_eigen_features_of_a_subset_equal_those_of_all_points():
    rng = np.random.default_rng(2)
    pts = _corridor_like(rng, 5000) + [5.0e5, 6.0e6, 80.0]  # survey-sized coordinates
    which = np.sort(rng.choice(len(pts), 700, replace=False))
    full = eigen_features(pts, 1.25, 20, sparse_radius=3.0, workers=2)
    part = eigen_features(pts, 1.25, 20, sparse_radius=3.0, which=which, workers=1)
    for name in ("linearity", "planarity", "scattering", "verticality", "direction", "normal",
                 "count"):
        assert np.array_equal(getattr(full, name)[which], getattr(part, name)), name
    empty = eigen_features(pts, 1.25, 20, which=np.zeros(0, dtype=np.int64))
    assert len(empty.count) == 0 and empty.direction.shape == (0, 3)


def test_small_and_bad_inputs():
    one = NeighbourGrid(np.array([[1.0, 2.0, 3.0]]), 1.0)
    cnt, cov = one.moments(np.array([0]), 1.0, 20)
    assert cnt[0] == 1 and np.all(cov == 0)
    none = NeighbourGrid(np.zeros((0, 3)), 1.0)
    assert none.moments(np.zeros(0, dtype=np.int64), 1.0, 5)[0].shape == (0,)
    with pytest.raises(ValueError, match="finite"):
        NeighbourGrid(np.array([[0.0, 0.0, np.nan]]), 1.0)
    with pytest.raises(ValueError, match="positive"):
        NeighbourGrid(np.zeros((2, 3)), 0.0)
    with pytest.raises(ValueError, match="too large"):
        NeighbourGrid(np.array([[0.0, 0.0, 0.0], [1e12, 1e12, 1e9]]), 0.01)
    with pytest.raises(ValueError):
        one.moments(np.array([0]), -1.0, 5)
    with pytest.raises(IndexError):
        one.moments(np.array([1]), 1.0, 5)
    # an extent past the int64 cell numbers is refused, not wrapped round
    with pytest.raises(ValueError, match="too large"):
        NeighbourGrid(np.array([[0.0, 0.0, 0.0], [1e19, 0.0, 0.0], [0.5, 0.0, 0.0]]), 1.0)
    # a radius far beyond the grid scans the grid once (the k-d tree finds every point)
    pts = np.array([[0.0, 0.0, 0.0], [3.0, 0.0, 0.0], [0.0, 4.0, 1.0]])
    wide = NeighbourGrid(pts, 1e-3)
    cnt, _ = wide.moments(wide.walk(None)[0], 100.0, 5)
    assert np.array_equal(cnt, [3, 3, 3])


def test_raw_kernel_rejects_inconsistent_arrays():
    from clearaudit.classify.kernels import moments

    grid = NeighbourGrid(np.random.default_rng(1).uniform(0, 5, (50, 3)), 1.0)
    rows = np.arange(3, dtype=np.int64)
    count, out = np.zeros(3, np.int32), np.zeros((3, 6))
    args = [grid.key, grid.order, grid.x, grid.y, grid.z, grid.dims, 1, rows, 5, 1.0, count, out]
    short = list(args)
    short[2] = grid.x[:1]
    with pytest.raises(ValueError, match="same length"):
        moments(*short)
    flat = list(args)
    flat[5] = np.array([1, 1, 0], np.int64)
    with pytest.raises(ValueError, match="positive"):
        moments(*flat)


def test_equal_distances_are_summed_by_point_index():
    # seven points, six of them at 0.5 m from the first (a 3-4-5 construction): the kernel
    # orders equal distances by point index (the k-d tree by its own traversal); the moments
    # then equal numpy's reduction over the neighbours in (distance, index) order exactly
    pts = np.array([[0, 0, 0], [.3, .4, 0], [.4, -.3, 0], [-.3, 0, .4], [0, -.4, -.3],
                    [0, .3, -.4], [-.4, .3, 0]])
    grid = NeighbourGrid(pts, 0.6)
    cnt, cov = grid.moments(grid.walk(np.array([0]))[0], 0.6, 7)
    d = [pts[[0, 1, 2, 3, 4, 5, 6], c] - pts[0, c] for c in range(3)]
    mean = [g.sum() / 7 for g in d]
    expected = [np.sum(d[a] * d[b]) / 7 - mean[a] * mean[b]
                for a, b in ((0, 0), (0, 1), (0, 2), (1, 1), (1, 2), (2, 2))]
    assert cnt[0] == 7
    assert np.array_equal(cov[0], expected)

"""Exact neighbourhood moments: the ``k`` nearest points within a radius, on a grid of cells.

The points are sorted once by the number of the cubic cell they fall in (edge ``cell_m``); the
cells of one x-y column and a run of z are then one contiguous range of the sorted arrays,
found by a search from where the same column's range started for the previous cell (the
queries walk the cells in order). A compiled kernel (Cython, ``_neighbours.pyx``; it releases the GIL, so
chunks run on threads) scans the ranges around each query point,
keeps the ``k`` nearest within the radius (the cell's own column first, then its sides, then
its corners: the k-th distance tightens early, and one integer compare of a distance's bits
drops what is beyond the radius or farther than the k-th) and reduces the covariance moments of that
neighbourhood in the same pass — no (k, m) index or coordinate blocks are materialised.

The neighbour sets are those of scipy's ``cKDTree.query(k=k, distance_upper_bound=radius)``:
the squared distance is summed over x, y, z in that order and a point counts when it is
strictly closer than the radius. The neighbours are ordered by distance and, among equal
distances, by point index (the k-d tree's order among equal distances is its own): so a tie
at the k-th distance goes to the lower point index. The sums run over the neighbours in that
order, as numpy's reductions over the neighbour axis of the former (k, m) blocks did, so the
moments are the same numbers wherever no two neighbours of a point lie at exactly the same
distance (where they do, the last bit may differ, or at the k-th place another equally near
neighbour is taken; on the survey corridors and real crops tested, no output changed).
"""
from __future__ import annotations

import math

import numpy as np

from ..arrays import column_bounds, take_columns
from .kernels import moments as _moments

_MAX_CELLS = 2 ** 62  # cell numbers are int64


class NeighbourGrid:
    """Points sorted by cubic cells, for exact k-nearest-within-radius neighbourhoods.

    Parameters
    ----------
    pts
        Points (small local coordinates: the caller centres them). [m], shape (n, 3)
    cell_m
        Cell edge; a search of radius r scans ``ceil(r / cell_m)`` cells each way. [m]
    """

    def __init__(self, pts: np.ndarray, cell_m: float):
        pts = np.asarray(pts, dtype=np.float64)
        if pts.ndim != 2 or pts.shape[1] != 3:
            raise ValueError("points must have shape (n, 3)")
        if not cell_m > 0 or not math.isfinite(cell_m):
            raise ValueError("cell size must be positive and finite")
        self.n = len(pts)
        # a hair larger than asked: two points closer than r are at most one cell apart in
        # each axis after rounding of the cell numbers
        self.cell_m = float(cell_m) * (1.0 + 1e-9)
        if self.n == 0:
            lo = np.zeros(3)
            dims = np.ones(3, dtype=np.int64)
            cells = np.zeros((0, 3), dtype=np.int64)
        else:
            lo, hi = column_bounds(pts)  # min/max per column (exact in any order)
            if not (np.isfinite(lo).all() and np.isfinite(hi).all()):
                raise ValueError("points must have finite coordinates")
            span = np.floor((hi - lo) / self.cell_m) + 1.0  # float: no overflow before the test
            if not np.isfinite(span).all() or float(np.prod(span)) >= _MAX_CELLS:
                raise ValueError("the points' extent is too large for the neighbour grid")
            dims = span.astype(np.int64)
            cells = np.floor((pts - lo) / self.cell_m).astype(np.int64)
            np.minimum(cells, dims - 1, out=cells)
        key = (cells[:, 0] * dims[1] + cells[:, 1]) * dims[2] + cells[:, 2]
        del cells
        order = np.argsort(key, kind="stable")
        self.dims = dims
        self.order = order  # sorted position → point index
        self.key = key[order]
        self.x, self.y, self.z = take_columns(pts, order)  # one gather, straight into columns

    def walk(self, rows: np.ndarray | None) -> tuple[np.ndarray, np.ndarray | None]:
        """The order to visit the points ``rows`` (None: all) in: cell by cell.

        Returns
        -------
        positions, dest
            Sorted positions (ascending) to pass to :meth:`moments`, and for each the row
            of ``rows`` (or the point index when ``rows`` is None) its result belongs to.
        """
        if rows is None:
            return np.arange(self.n, dtype=np.int64), self.order
        rank = np.empty(self.n, dtype=np.int64)
        rank[self.order] = np.arange(self.n, dtype=np.int64)
        positions = rank[np.asarray(rows, dtype=np.int64)]
        del rank
        dest = np.argsort(positions, kind="stable")
        return positions[dest], dest

    def moments(self, positions: np.ndarray, radius: float, k: int
                ) -> tuple[np.ndarray, np.ndarray]:
        """Neighbourhood size and covariance moments of the points at sorted ``positions``.

        Parameters
        ----------
        positions
            Sorted positions (from :meth:`walk`; ascending order is fastest, any order is
            correct).
        radius
            Neighbours are strictly closer than this. [m]
        k
            Largest neighbourhood (the point itself included), at least 1.

        Returns
        -------
        count, cov
            ``count`` (m,) int32; ``cov`` (m, 6): the covariance upper triangle
            (xx, xy, xz, yy, yz, zz) of each neighbourhood about its mean.
        """
        if not radius > 0 or not math.isfinite(radius) or k < 1:
            raise ValueError("radius must be positive and finite and k at least 1")
        positions = np.ascontiguousarray(positions, dtype=np.int64)
        if len(positions) and (positions.min() < 0 or positions.max() >= self.n):
            raise IndexError("positions out of range")
        m = len(positions)
        count = np.zeros(m, dtype=np.int32)
        cov = np.zeros((m, 6))
        if m:
            # cells scanned each way (no more than the grid has: the kernel clips to it)
            ratio = radius / self.cell_m * (1.0 + 1e-12)
            widest = int(self.dims.max())
            reach = int(math.ceil(ratio)) if ratio < widest else widest
            r = float(radius)
            _moments(self.key, self.order, self.x, self.y, self.z, self.dims, reach, positions,
                     int(k), r * r, count, cov)
        return count, cov


__all__ = ["NeighbourGrid"]

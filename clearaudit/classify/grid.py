"""Regular 2D grids over a cloud: binning, per-cell reductions, inpainting, bilinear sampling.

The grid axes are aligned with the principal horizontal direction of the cloud, so a corridor
that runs diagonally through its bounding box does not produce a grid that is mostly empty.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from ..arrays import column_bounds, positions
from ..threads import run_chunks
from .kernels import bilinear as _bilinear
from .kernels import bilinear_residual as _bilinear_residual
from .kernels import cell_extreme as _cell_extreme
from .kernels import flat_cells as _flat_cells
from .kernels import free_boxes, occupied_ranks
from .kernels import jacobi_sweep as _jacobi_sweep
from .kernels import locate_cells as _locate_cells
from .kernels import sampler_weights as _sampler_weights

# points per chunk of the per-point passes (locating, bilinear weights, sampling): the passes
# run about twice as fast when a chunk's temporaries stay in the processor's cache, and the
# Python overhead of a chunk is nil at this size
_CHUNK = 1 << 16


@dataclass(frozen=True)
class GridFrame:
    """A rotated regular grid in the local horizontal plane.

    Attributes
    ----------
    centre
        Rotation centre, local coordinates. [m], shape (2,)
    axes
        Rows are the unit vectors of the grid's u and v axes in local xy, shape (2, 2).
    corner
        (u, v) of the grid's lower corner. [m]
    cell
        Cell edge. [m]
    shape
        Number of cells along u and v.
    """

    centre: np.ndarray
    axes: np.ndarray
    corner: np.ndarray
    cell: float
    shape: tuple[int, int]

    @classmethod
    def fit(cls, xy: np.ndarray, cell: float, margin: float = 0.0,
            axes: np.ndarray | None = None, centre: np.ndarray | None = None) -> GridFrame:
        """Grid aligned with the principal direction of ``xy`` covering all points.

        Parameters
        ----------
        xy
            Horizontal coordinates. [m], shape (n, 2)
        cell
            Cell edge. [m]
        margin
            Extra border around the points. [m]
        axes, centre
            Reuse the orientation of another frame (optional).
        """
        xy = np.asarray(xy, dtype=np.float64)
        _check_fit(len(xy), cell)
        centre, axes = _orientation(xy, axes, centre)
        dx = xy[:, 0] - centre[0]
        dy = xy[:, 1] - centre[1]
        uv = np.stack([dx * axes[0, 0] + dy * axes[0, 1], dx * axes[1, 0] + dy * axes[1, 1]], axis=1)
        lo, hi = column_bounds(uv)
        lo, hi = lo - margin, hi + margin
        shape = tuple(int(s) for s in np.maximum(np.ceil((hi - lo) / cell + 1e-9), 1))
        return cls(centre, axes, lo, float(cell), shape)

    @classmethod
    def fit_locate(cls, xy: np.ndarray, cell: float, margin: float = 0.0
                   ) -> tuple[GridFrame, PointLocation]:
        """:meth:`fit` and :meth:`locate` in one pass over the points.

        Parameters
        ----------
        xy
            Horizontal coordinates. [m], shape (n, 2)
        cell
            Cell edge. [m]
        margin
            Extra border around the points. [m]
        """
        # a row-major sample is copied: numpy reduces a strided (n, 2) view of a row-major
        # array over its rows about four times slower than a contiguous copy, with the same
        # values (a column-major view is summed in another order: left as it is)
        sample = xy[:: max(1, len(xy) // 200_000)]
        if sample.ndim == 2 and sample.strides[0] >= sample.strides[1]:
            sample = np.ascontiguousarray(sample)
        _check_fit(len(sample), cell)
        # the orientation :meth:`fit` gives the sample (its corner and shape are not needed)
        centre, axes = _orientation(np.asarray(sample, dtype=np.float64))
        # cell coordinates relative to the centre, then shifted to the fitted corner
        loc = GridFrame(centre, axes, np.zeros(2), float(cell), (1, 1)).locate(xy)
        fu, fv = loc.fu, loc.fv
        lo = np.array([fu.min(), fv.min()], np.float64) * cell - margin
        hi = np.array([fu.max(), fv.max()], np.float64) * cell + margin
        shape = tuple(int(s) for s in np.maximum(np.ceil((hi - lo) / cell + 1e-6), 1))
        frame = cls(centre, axes, lo, float(cell), shape)
        shift_u, shift_v = np.float32(lo[0] / cell), np.float32(lo[1] / cell)

        def work(start: int, stop: int) -> None:
            np.subtract(fu[start:stop], shift_u, out=fu[start:stop])
            np.subtract(fv[start:stop], shift_v, out=fv[start:stop])

        run_chunks(work, len(fu), _CHUNK)
        return frame, PointLocation(fu, fv, shape)

    def with_cell(self, cell: float) -> GridFrame:
        """Same orientation and extent, another cell size."""
        extent = np.asarray(self.shape) * self.cell
        shape = tuple(int(s) for s in np.maximum(np.ceil(extent / cell - 1e-9), 1))
        return GridFrame(self.centre, self.axes, self.corner, float(cell), shape)

    def to_uv(self, xy: np.ndarray) -> np.ndarray:
        """Local xy [m] → grid coordinates (u, v) [m]."""
        xy = np.asarray(xy, dtype=np.float64)
        dx = xy[:, 0] - self.centre[0]
        dy = xy[:, 1] - self.centre[1]
        a = self.axes
        return np.stack([dx * a[0, 0] + dy * a[0, 1], dx * a[1, 0] + dy * a[1, 1]], axis=1)

    def index(self, xy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(i, j) cell indices of points, clipped into the grid.

        An axis-aligned frame through the local origin (:func:`objects.anchored_frame`) skips
        the rotation: there :meth:`to_uv` gives ``u = x·1 + y·0``, exactly ``x``.
        """
        xy = np.asarray(xy, dtype=np.float64)
        if not np.any(self.centre) and np.array_equal(self.axes, np.eye(2)):
            u, v = xy[:, 0], xy[:, 1]
        else:
            uv = self.to_uv(xy)
            u, v = uv[:, 0], uv[:, 1]
        fu = (u - self.corner[0]) / self.cell
        i = np.clip(np.floor(fu, out=fu).astype(np.int64), 0, self.shape[0] - 1)
        fv = (v - self.corner[1]) / self.cell
        j = np.clip(np.floor(fv, out=fv).astype(np.int64), 0, self.shape[1] - 1)
        return i, j

    def flat_index(self, xy: np.ndarray) -> np.ndarray:
        i, j = self.index(xy)
        return i * self.shape[1] + j

    @property
    def size(self) -> int:
        return self.shape[0] * self.shape[1]

    def sample(self, grid: np.ndarray, xy: np.ndarray) -> np.ndarray:
        """Bilinear interpolation of cell-centre values at ``xy``; NaN outside the grid.

        Parameters
        ----------
        grid
            Values at the cell centres, shape ``self.shape``.
        xy
            Query points, local coordinates. [m], shape (n, 2)
        """
        return self.sampler(xy)(grid)

    def sampler(self, xy: np.ndarray) -> BilinearSampler:
        """Precomputed bilinear weights of ``xy`` (sample many grids at the same points)."""
        return self.locate(xy).sampler()

    def locate(self, xy: np.ndarray) -> PointLocation:
        """Cell coordinates of points, computed once and shared by every grid of this frame.

        Parameters
        ----------
        xy
            Local horizontal coordinates. [m], shape (n, 2)
        """
        xy = np.asarray(xy, dtype=np.float64).reshape(-1, 2)
        a = self.axes
        cu, cv = a[0, 0] / self.cell, a[0, 1] / self.cell
        du, dv = a[1, 0] / self.cell, a[1, 1] / self.cell
        su, sv = self.corner[0] / self.cell, self.corner[1] / self.cell
        fu = np.empty(len(xy), np.float32)
        fv = np.empty(len(xy), np.float32)

        c0, c1 = float(self.centre[0]), float(self.centre[1])

        def work(lo: int, hi: int) -> None:
            # fu = dx·a00/c + dy·a01/c - u0/c in float64, rounded to float32 once: one
            # compiled pass (the numpy form's operations in its order)
            _locate_cells(xy[lo:hi], c0, c1, float(cu), float(cv), float(du), float(dv),
                          float(su), float(sv), fu[lo:hi], fv[lo:hi])

        run_chunks(work, len(xy), _CHUNK)
        return PointLocation(fu, fv, self.shape)


def _check_fit(n: int, cell: float) -> None:
    """The checks of :meth:`GridFrame.fit`: a positive cell and at least one point."""
    if cell <= 0:
        raise ValueError("grid cell size must be positive")
    if n == 0:
        raise ValueError("cannot fit a grid to no points")


def _orientation(xy: np.ndarray, axes: np.ndarray | None = None,
                 centre: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Centre and axes of :meth:`GridFrame.fit`: the points' mean and the principal
    direction of a regular sample of at most about 200 000 of them (the major axis first,
    pointing to +x, or +y when it is vertical), unless given."""
    if centre is None:
        centre = xy.mean(axis=0)
    if axes is None:
        sample = xy[:: max(1, len(xy) // 200_000)] - centre
        cov = sample.T @ sample
        _, vecs = np.linalg.eigh(cov)
        major = vecs[:, 1]
        if major[0] < 0 or (major[0] == 0 and major[1] < 0):
            major = -major
        axes = np.array([major, [-major[1], major[0]]])
    return np.asarray(centre, float), np.asarray(axes, float)


@dataclass(frozen=True)
class PointLocation:
    """Fractional cell coordinates of points in a :class:`GridFrame` (float32, cells).

    ``fu = (u - u0) / cell`` and ``fv = (v - v0) / cell``; float32 keeps better than 1 mm
    within 4 km of the grid corner at a 1 m cell (24-bit mantissa).

    The bilinear weights (:meth:`sampler`) are computed once and kept with the location, so
    every stage that samples a grid of this frame at these points shares them; a
    :meth:`subset` inherits the weights of its points when they are already known.
    """

    fu: np.ndarray
    fv: np.ndarray
    shape: tuple[int, int]
    _cache: dict = field(default_factory=dict, init=False, compare=False, repr=False)

    def __len__(self) -> int:
        return len(self.fu)

    def subset(self, which: np.ndarray) -> PointLocation:
        """The locations of some of the points (index array or boolean mask)."""
        which = positions(which, len(self.fu))  # np.take: faster than fancy indexing
        part = PointLocation(np.take(self.fu, which), np.take(self.fv, which), self.shape)
        sampler = self._cache.get("sampler")
        if sampler is not None:
            part._cache["sampler"] = sampler.subset(which)
        return part

    @property
    def flat(self) -> np.ndarray:
        """Flat cell index of every point, clipped into the grid (int32 or int64)."""
        n_u, n_v = self.shape
        itype = np.int32 if n_u * n_v < 2**31 else np.int64
        out = np.empty(len(self.fu), itype)

        fu, fv = np.ascontiguousarray(self.fu), np.ascontiguousarray(self.fv)

        def work(lo: int, hi: int) -> None:
            # i = clip(fu, 0, n_u - 1) cast, the same for j, i * n_v + j: one compiled pass
            _flat_cells(fu[lo:hi], fv[lo:hi], n_u, n_v, out[lo:hi])

        run_chunks(work, len(out), _CHUNK)
        return out

    def sampler(self) -> BilinearSampler:
        """Bilinear weights of the points with respect to the cell centres (computed once)."""
        sampler = self._cache.get("sampler")
        if sampler is None:
            sampler = self._cache["sampler"] = self._make_sampler()
        return sampler

    def release_sampler(self) -> None:
        """Forget the cached bilinear weights (13 bytes a point) until they are needed again."""
        self._cache.pop("sampler", None)

    def _make_sampler(self) -> BilinearSampler:
        n_u, n_v = self.shape
        n = len(self.fu)
        m_u, m_v = max(n_u, 2), max(n_v, 2)  # grids of one cell across are padded to two
        itype = np.int32 if m_u * m_v < 2**31 else np.int64
        outside = np.empty(n, bool)
        k00 = np.empty(n, itype)
        wa = np.empty(n, np.float32)
        wb = np.empty(n, np.float32)

        fu, fv = np.ascontiguousarray(self.fu), np.ascontiguousarray(self.fv)
        flags = outside.view(np.uint8)

        def work(lo: int, hi: int) -> None:
            # outside = fu < 0 | fu > n_u | fv < 0 | fv > n_v; u = clip(fu - 0.5, 0, n_u - 1),
            # i0 = min(int(u), m_u - 2), a = u - i0 (likewise v, j0, b), k00 = i0 m_v + j0, in
            # float32: one compiled pass (the numpy form's operations)
            _sampler_weights(fu[lo:hi], fv[lo:hi], n_u, n_v, m_u, m_v, flags[lo:hi],
                             k00[lo:hi], wa[lo:hi], wb[lo:hi])

        run_chunks(work, n, _CHUNK)
        return BilinearSampler(k00, wa, wb, outside, (n_u, n_v), m_v)


@dataclass(frozen=True)
class BilinearSampler:
    """Flat index of the lower cell centre and the bilinear weights (float32) of points."""

    k00: np.ndarray
    a: np.ndarray
    b: np.ndarray
    outside: np.ndarray
    shape: tuple[int, int]
    row: int

    def subset(self, which: np.ndarray) -> BilinearSampler:
        """The weights of some of the points (index array or boolean mask)."""
        which = positions(which, len(self.k00))
        return BilinearSampler(np.take(self.k00, which), np.take(self.a, which),
                               np.take(self.b, which), np.take(self.outside, which),
                               self.shape, self.row)

    def _flat_grid(self, grid: np.ndarray) -> np.ndarray:
        """The grid as the kernels read it: contiguous, flat, float32 or float64, padded to
        two cells across."""
        g = np.asarray(grid)
        if g.shape != self.shape:
            raise ValueError("grid shape does not match the sampler's frame")
        if g.shape[0] < 2 or g.shape[1] < 2:
            g = np.pad(g, ((0, max(0, 2 - g.shape[0])), (0, max(0, 2 - g.shape[1]))), mode="edge")
        g = g.ravel()
        dtype = g.dtype if g.dtype in (np.float32, np.float64) else np.float64
        if g.dtype != dtype:
            g = g.astype(dtype)
        return np.ascontiguousarray(g)

    def residual(self, grid: np.ndarray, z: np.ndarray, inside: np.ndarray
                 ) -> tuple[np.ndarray, np.ndarray]:
        """``z - self(grid)`` for a float32 grid and float32 ``z``, and those residuals where
        ``inside`` is set, in point order (``numpy.compress``), in one compiled pass."""
        g = self._flat_grid(np.asarray(grid, dtype=np.float32))
        n = len(self.k00)
        resid, picked = np.empty(n, np.float32), np.empty(n, np.float32)
        k00, wa, wb = (np.ascontiguousarray(v) for v in (self.k00, self.a, self.b))
        m = _bilinear_residual(g, k00, wa, wb, np.ascontiguousarray(self.outside).view(np.uint8),
                               self.row, np.ascontiguousarray(z, dtype=np.float32),
                               np.ascontiguousarray(inside, dtype=bool).view(np.uint8), resid,
                               picked)
        return resid, picked[:m]

    def __call__(self, grid: np.ndarray) -> np.ndarray:
        """Grid values at the points, in the grid's dtype (float32 grids: half the traffic)."""
        g = self._flat_grid(grid)
        out = np.empty(len(self.k00), g.dtype)
        row = self.row

        k00, wa, wb = (np.ascontiguousarray(v) for v in (self.k00, self.a, self.b))
        outside = np.ascontiguousarray(self.outside).view(np.uint8)

        def work(lo: int, hi: int) -> None:
            # lower = (v01 - v00) b + v00, upper = (v11 - v10) b + v10,
            # value = (upper - lower) a + lower: one compiled pass, in the grid's precision
            _bilinear(g, k00[lo:hi], wa[lo:hi], wb[lo:hi], outside[lo:hi], row, out[lo:hi])

        run_chunks(work, len(out), _CHUNK)
        return out


def _reflect(index: np.ndarray, n: int) -> np.ndarray:
    """Indices outside ``0 … n-1`` mirrored about the edges (``d c b a | a b c d | d c b a``,
    scipy.ndimage's ``reflect`` mode), for indices at most ``n`` outside."""
    index = np.where(index < 0, -index - 1, index)
    return np.where(index >= n, 2 * n - 1 - index, index)


def _window_extreme(op: np.ufunc, padded: np.ndarray, width: int, axis: int,
                    out: np.ndarray | None = None) -> np.ndarray:
    """``op`` (minimum or maximum) over every run of ``width`` consecutive entries along
    ``axis`` (0 or 1) of ``padded`` (the output is ``width - 1`` shorter along that axis).

    Doubling: after step ``s`` each entry holds ``op`` over ``s`` consecutive entries, so
    ``op`` over ``width`` is that of two overlapping runs of the largest power of two
    ``s <= width`` (a minimum or maximum is exact in any grouping: identical values to a
    sliding filter).
    """
    def cut(a: np.ndarray, start: int, stop: int) -> np.ndarray:
        return a[start:stop] if axis == 0 else a[:, start:stop]

    current, s = padded, 1
    while 2 * s <= width:
        length = current.shape[axis]
        current = op(cut(current, 0, length - s), cut(current, s, length))
        s *= 2
    length = padded.shape[axis] - width + 1
    return op(cut(current, 0, length), cut(current, width - s, width - s + length), out=out)


def _square_filter(op: np.ufunc, source: np.ndarray, out: np.ndarray, lo: int, hi: int,
                   radius: int) -> None:
    """Rows ``lo:hi`` of the ``(2 radius + 1)``-square minimum or maximum filter of the whole
    ``source`` (``op`` = ``np.minimum`` or ``np.maximum``), written into ``out[lo:hi]``.

    The same values as ``scipy.ndimage.minimum_filter`` / ``maximum_filter`` with
    ``size = 2 radius + 1`` and the default ``reflect`` edges: the square window is separable
    (a 1D pass along the rows, then along the columns), each pass is :func:`_window_extreme`
    on mirrored edges. A window wider than the grid is left to scipy.
    """
    n_u, n_v = source.shape
    if radius > n_u or radius > n_v:
        filt = ndimage.minimum_filter if op is np.minimum else ndimage.maximum_filter
        a, b = max(0, lo - radius), min(n_u, hi + radius)
        out[lo:hi] = filt(source[a:b], size=2 * radius + 1)[lo - a:hi - a]
        return
    width = 2 * radius + 1
    # the pass along the rows writes into the middle of the column-padded buffer; the
    # mirrored columns are copied after it. Rows whose window reaches past the grid's edge
    # (at most ``radius`` at either end) read a small block with mirrored rows; the others
    # read the source in place.
    padded = np.empty((hi - lo, n_v + 2 * radius), source.dtype)
    middle = (max(lo, radius), min(hi, n_u - radius))
    if middle[0] < middle[1]:
        parts = [(lo, middle[0]), (middle[1], hi)]
        _window_extreme(op, source[middle[0] - radius:middle[1] + radius], width, 0,
                        out=padded[middle[0] - lo:middle[1] - lo, radius:radius + n_v])
    else:
        parts = [(lo, hi)]
    for a, b in parts:
        if a < b:
            rows = source[_reflect(np.arange(a - radius, b + radius), n_u)]
            _window_extreme(op, rows, width, 0, out=padded[a - lo:b - lo, radius:radius + n_v])
    padded[:, :radius] = padded[:, 2 * radius - 1:radius - 1:-1]
    padded[:, radius + n_v:] = padded[:, radius + n_v - 1:n_v - 1:-1]
    _window_extreme(op, padded, width, 1, out=out[lo:hi])


def occupied_cells(flat: np.ndarray, size: int, *, lookup: bool = False
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """The cells holding points, for per-cell work on those cells only.

    A grid over a corridor's bounding box is mostly empty; a map over the grid finds the
    occupied cells without sorting the points (``kernels.occupied_ranks``: mark, rank and
    gather in one compiled kernel, where numpy's scatter, scan, scatter, gather and cast
    took 11-14 ms on a 1.2-1.4 M-point tile).

    Parameters
    ----------
    flat
        Flat cell index of every point.
    size
        Cells in the grid.
    lookup
        Also return the grid-sized array of positions (-1 where a cell is empty).

    Returns
    -------
    cells, k, position
        Sorted flat indices of the occupied cells; each point's position in ``cells``
        (intp, what ``np.bincount`` counts without a cast); the lookup array or None.
    """
    flat = _cell_index(flat)
    # ranks fit the position array's type: there are no more occupied cells than cells
    position = np.empty(size, np.int32 if size < 2**31 - 1 else np.int64)
    k = np.empty(len(flat), np.int64)
    # marks, ranks and each point's rank in one compiled kernel (three passes, no sort)
    m = occupied_ranks(flat, position, k)
    cells = np.flatnonzero(position >= 0) if m else np.zeros(0, np.intp)
    k = k.view(np.intp) if np.dtype(np.intp).itemsize == 8 else k.astype(np.intp)
    return cells, k, (position if lookup else None)


def _cell_index(flat: np.ndarray) -> np.ndarray:
    """Cell numbers as contiguous int32 or int64 (the kernels' index types; no copy if they are)."""
    flat = np.asarray(flat)
    return np.ascontiguousarray(flat, dtype=flat.dtype if flat.dtype in (np.int32, np.int64)
                                else np.int64)


def cell_min(flat: np.ndarray, values: np.ndarray, size: int) -> np.ndarray:
    """Minimum of ``values`` per flat cell index; NaN where a cell is empty."""
    out = np.full(size, np.inf)
    # numpy.minimum.at's rule in one compiled pass (the same values, NaN and signed zeros too)
    _cell_extreme(_cell_index(flat), np.asarray(values, dtype=np.float64), out, False)
    out[np.isinf(out)] = np.nan
    return out


def cell_max(flat: np.ndarray, values: np.ndarray, size: int) -> np.ndarray:
    """Maximum of ``values`` per flat cell index; NaN where a cell is empty."""
    out = np.full(size, -np.inf)
    # numpy.maximum.at's rule in one compiled pass (the same values, NaN and signed zeros too)
    _cell_extreme(_cell_index(flat), np.asarray(values, dtype=np.float64), out, True)
    out[np.isinf(out)] = np.nan
    return out


def inpaint(grid: np.ndarray, max_cells: int = 60, sweeps: int = 8, *,
            plan: InpaintPlan | None = None) -> np.ndarray:
    """Fill NaN cells with a smooth (near-harmonic) interpolant of the known cells.

    Cells farther than ``max_cells`` (Chebyshev distance) from any known cell first take the
    value of the nearest known cell (found on blocks of about ``max_cells / 15`` cells, see
    :class:`InpaintPlan`); the cells in between are filled coarse-to-fine: the grid is
    averaged down by 2 × 2 blocks (known cells only) until every block is known, then on the
    way back up each level takes the coarser solution as a start and relaxes the unknown cells
    with ``sweeps`` Jacobi sweeps of the Laplace equation (a cascadic multigrid, in float32;
    known cells keep their values exactly).

    Parameters
    ----------
    grid
        2D array with NaN where unknown.
    max_cells
        Distance limit of the smooth fill. [cells]
    sweeps
        Jacobi sweeps per level.
    plan
        The work that depends only on where the grid is unknown, ``InpaintPlan(np.isnan(grid), max_cells)``
        (reuse it for several grids with the same unknown cells). Computed when ``None`` or
        when it does not match the grid.

    Returns
    -------
    numpy.ndarray
        A copy without NaN (an all-NaN input returns zeros).

    Notes
    -----
    Unknown cells approach the solution of the discrete Laplace equation
    :math:`4u_{ij} - \\sum u_{nb} = 0` with the known cells fixed, the "springs" inpainting
    that SMRF uses for empty and object cells (Pingel et al., 2013).

    References
    ----------
    Pingel, T. J., Clarke, K. C., McBride, W. A. (2013). An improved simple morphological
    filter for the terrain classification of airborne LIDAR data. ISPRS Journal of
    Photogrammetry and Remote Sensing 77, 21-30.
    """
    out = np.array(grid, dtype=np.float64, copy=True)
    if out.ndim != 2:
        raise ValueError("inpaint expects a 2D grid")
    unknown = np.isnan(out)
    if plan is None or not plan.matches(unknown, max_cells):
        plan = InpaintPlan(unknown, max_cells)
    if not plan.any_unknown:
        return out
    if plan.all_unknown:
        return np.zeros_like(out)
    plan.fill_far(out)
    # the fill is computed in float32 (half the memory traffic; rounding < 0.1 mm below
    # 1 km of local height), the known cells keep their exact values
    values = np.where(plan.known, out, 0.0).astype(np.float32)
    filled = _cascade(values, plan.levels, sweeps)
    np.copyto(out, filled, where=plan.free)
    return out


class InpaintPlan:
    """What :func:`inpaint` computes from the unknown cells alone, reusable across grids.

    Parameters
    ----------
    unknown
        True where the grid is unknown (NaN), shape (n_u, n_v).
    max_cells
        Distance limit of the smooth fill. [cells]

    Notes
    -----
    The far cells (farther than ``max_cells`` from any known cell, Chebyshev distance, by two
    separable 1D max filters) take the mean of the known cells of the ``b × b`` block
    (``b = max(1, max_cells // 15)``) nearest to their own block (Euclidean distance transform
    of the block grid): with ``b = 1`` this is the nearest known cell; with larger blocks the
    position of the nearest data is found within ``b`` cells of a distance of more than
    ``max_cells``. The plan holds the far cells, the nearest non-empty block of every block, the
    block counts,
    and per level of the cascade the known cells, the block weights and the strips of rows that
    hold free cells (the Jacobi sweeps only visit those).
    """

    def __init__(self, unknown: np.ndarray, max_cells: int = 60) -> None:
        unknown = np.asarray(unknown, bool)
        if unknown.ndim != 2:
            raise ValueError("the unknown mask of an inpainting plan must be 2D")
        self.unknown = unknown
        self.max_cells = int(max_cells)
        self.any_unknown = bool(unknown.any())
        self.all_unknown = self.any_unknown and bool(unknown.all())
        self.far: np.ndarray | None = None
        if not self.any_unknown or self.all_unknown:
            self.known = ~unknown
            self.free = unknown
            self.levels: list[_Level] = []
            return
        # cells within max_cells of a known cell (a square maximum filter of the known mask;
        # for a maximum of booleans the mirrored edges add nothing: outside counts as empty)
        near_data = np.empty_like(unknown)
        _square_filter(np.maximum, ~unknown, near_data, 0, unknown.shape[0], self.max_cells)
        far = unknown & ~near_data
        del near_data
        self.block = b = max(1, self.max_cells // 15)
        n_u, n_v = unknown.shape
        self.padded = (n_u + (-n_u) % b, n_v + (-n_v) % b)
        if far.any():
            w = np.zeros(self.padded)
            w[:n_u, :n_v] = ~unknown
            self.block_count = _block_sum(w, b)
            del w
            _, (ii, jj) = ndimage.distance_transform_edt(self.block_count == 0, return_indices=True)
            self.nearest = ii * self.block_count.shape[1] + jj
            del ii, jj
            self.far = far
        self.known = ~unknown | far
        self.free = ~self.known
        self.levels = _levels(self.known)

    def matches(self, unknown: np.ndarray, max_cells: int) -> bool:
        """Whether the plan was made for these unknown cells and distance limit."""
        return (int(max_cells) == self.max_cells and unknown.shape == self.unknown.shape
                and np.array_equal(unknown, self.unknown))

    def fill_far(self, out: np.ndarray) -> None:
        """Set the far cells of ``out`` (NaN where unknown) to their nearest block's mean."""
        if self.far is None:
            return
        n_u, n_v = out.shape
        b = self.block
        v = np.zeros(self.padded)
        np.copyto(v[:n_u, :n_v], out, where=~self.unknown)
        total = _block_sum(v, b)
        del v
        block_value = total / np.maximum(self.block_count, 1.0)
        # per block the mean of its nearest non-empty block, spread over the block's cells
        source = block_value.ravel()[self.nearest]
        if b > 1:
            source = np.repeat(np.repeat(source, b, axis=0), b, axis=1)
        np.copyto(out, source[:n_u, :n_v], where=self.far)


def _block_sum(values: np.ndarray, b: int) -> np.ndarray:
    """Sums over ``b × b`` blocks (shape divisible by ``b``), in the order of
    ``values.reshape(m, b, n, b).sum(axis=(1, 3))``: rows of a block one after the other, each
    row's ``b`` cells summed first (bit-identical, and faster than the 4D reduction)."""
    x = values.reshape(values.shape[0] // b, b, values.shape[1] // b, b)
    total = None
    for i in range(b):
        part = x[:, i, :, 0].copy()
        for j in range(1, b):
            part += x[:, i, :, j]
        if total is None:
            total = part
        else:
            total += part
    return total


@dataclass
class _Level:
    """One level of the cascade: its known cells, the weights of its 2 × 2 coarsening and
    the boxes (rows r0:r1, columns c0:c1) that hold all its free cells."""

    known: np.ndarray
    free: np.ndarray
    weight: np.ndarray | None  # max(known cells per 2 × 2 block, 1), float32; None at the last level
    boxes: list[tuple[int, int, int, int]]


def _levels(known: np.ndarray) -> list[_Level]:
    levels: list[_Level] = []
    while True:
        n_u, n_v = known.shape
        if known.all() or (n_u == 1 and n_v == 1):
            levels.append(_Level(known, ~known, None, []))
            return levels
        w = np.zeros((n_u + n_u % 2, n_v + n_v % 2), np.float32)
        w[:n_u, :n_v] = known
        wsum = w[0::2, 0::2] + w[1::2, 0::2]
        wsum += w[0::2, 1::2]
        wsum += w[1::2, 1::2]
        free = ~known
        levels.append(_Level(known, free, np.maximum(wsum, np.float32(1)), _free_boxes(free)))
        known = wsum > 0


def _free_boxes(free: np.ndarray, strip_cells: int = 1 << 16, min_gap: int = 16
                ) -> list[tuple[int, int, int, int]]:
    """Boxes (rows r0:r1, columns c0:c1) that together hold every free cell.

    The rows are cut into strips of about ``strip_cells`` cells; in each strip the columns
    with a free cell form runs, and runs less than ``min_gap`` columns apart are merged.
    One compiled pass per strip (``free_boxes``; its test holds the numpy form it replaced,
    the same boxes): that form's loop over strips held the GIL for a few milliseconds a
    tile.
    """
    n_u, n_v = free.shape
    height = int(min(n_u, max(8, strip_cells // max(n_v, 1))))
    return free_boxes(np.asarray(free, dtype=bool).view(np.uint8), height, int(min_gap))


def _cascade(values: np.ndarray, levels: list[_Level], sweeps: int, depth: int = 0) -> np.ndarray:
    """Cascadic multigrid fill of the free cells of ``values`` (float32, zero where free)."""
    level = levels[depth]
    if level.weight is None:
        return values
    n_u, n_v = values.shape
    if n_u % 2 or n_v % 2:
        v = np.zeros((n_u + n_u % 2, n_v + n_v % 2), values.dtype)
        v[:n_u, :n_v] = values
    else:
        v = values
    # 2 × 2 block means of the known cells (free cells hold zero)
    vsum = v[0::2, 0::2] + v[1::2, 0::2]
    vsum += v[0::2, 1::2]
    vsum += v[1::2, 1::2]
    del v
    vsum /= level.weight
    coarse = _cascade(vsum, levels, sweeps, depth + 1)
    del vsum
    # start: the known values, the coarse solution (repeated 2 × 2) in the free cells; the
    # buffer has a one-cell border that repeats the edge cells (edge padding)
    buf = np.empty((n_u + 2, n_v + 2), values.dtype)
    inner = buf[1:-1, 1:-1]
    hu, hv = (n_u + 1) // 2, (n_v + 1) // 2
    inner[0::2, 0::2] = coarse[:hu, :hv]
    inner[1::2, 0::2] = coarse[:n_u // 2, :hv]
    inner[0::2, 1::2] = coarse[:hu, :n_v // 2]
    inner[1::2, 1::2] = coarse[:n_u // 2, :n_v // 2]
    del coarse
    np.copyto(inner, values, where=level.known)
    _edges(buf)
    if sweeps > 0 and level.boxes:
        # Jacobi sweeps u = (up + down + left + right) / 4 on the free cells only, reading one
        # buffer and writing the other (only the boxes that hold free cells are visited)
        # (one compiled pass per sweep: ((up + down) + left) + right, times 0.25, as numpy did)
        nxt = buf.copy()
        free = np.ascontiguousarray(level.free).view(np.uint8)
        boxes = np.asarray(level.boxes, dtype=np.int64).reshape(-1, 4)
        for _ in range(sweeps):
            _jacobi_sweep(buf, nxt, free, boxes)
            _edges(nxt)
            buf, nxt = nxt, buf
    return buf[1:-1, 1:-1]


def _edges(buf: np.ndarray) -> None:
    """Copy the edge cells of the inside of ``buf`` onto its one-cell border."""
    buf[0, 1:-1] = buf[1, 1:-1]
    buf[-1, 1:-1] = buf[-2, 1:-1]
    buf[1:-1, 0] = buf[1:-1, 1]
    buf[1:-1, -1] = buf[1:-1, -2]

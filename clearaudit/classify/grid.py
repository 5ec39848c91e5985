"""Regular 2D grids over a cloud: binning, per-cell reductions, inpainting, bilinear sampling.

The grid axes are aligned with the principal horizontal direction of the cloud, so a corridor
that runs diagonally through its bounding box does not produce a grid that is mostly empty.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage


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
        if cell <= 0:
            raise ValueError("grid cell size must be positive")
        xy = np.asarray(xy, dtype=np.float64)
        if len(xy) == 0:
            raise ValueError("cannot fit a grid to no points")
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
        axes = np.asarray(axes, float)
        dx = xy[:, 0] - centre[0]
        dy = xy[:, 1] - centre[1]
        uv = np.stack([dx * axes[0, 0] + dy * axes[0, 1], dx * axes[1, 0] + dy * axes[1, 1]], axis=1)
        lo = uv.min(axis=0) - margin
        hi = uv.max(axis=0) + margin
        shape = tuple(int(s) for s in np.maximum(np.ceil((hi - lo) / cell + 1e-9), 1))
        return cls(np.asarray(centre, float), np.asarray(axes, float), lo, float(cell), shape)

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
        probe = cls.fit(xy[:: max(1, len(xy) // 200_000)], cell)
        # cell coordinates relative to the centre, then shifted to the fitted corner
        loc = GridFrame(probe.centre, probe.axes, np.zeros(2), float(cell), (1, 1)).locate(xy)
        lo = np.array([loc.fu.min(), loc.fv.min()], np.float64) * cell - margin
        hi = np.array([loc.fu.max(), loc.fv.max()], np.float64) * cell + margin
        shape = tuple(int(s) for s in np.maximum(np.ceil((hi - lo) / cell + 1e-6), 1))
        frame = cls(probe.centre, probe.axes, lo, float(cell), shape)
        np.subtract(loc.fu, np.float32(lo[0] / cell), out=loc.fu)
        np.subtract(loc.fv, np.float32(lo[1] / cell), out=loc.fv)
        return frame, PointLocation(loc.fu, loc.fv, shape)

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
        """(i, j) cell indices of points, clipped into the grid."""
        f = (self.to_uv(xy) - self.corner) / self.cell
        i = np.clip(np.floor(f[:, 0]).astype(np.int64), 0, self.shape[0] - 1)
        j = np.clip(np.floor(f[:, 1]).astype(np.int64), 0, self.shape[1] - 1)
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
        dx = xy[:, 0] - self.centre[0]
        dy = xy[:, 1] - self.centre[1]
        # in place, same operations and order as fu = dx·a00/c + dy·a01/c - u0/c
        fu = dx * (a[0, 0] / self.cell)
        term = np.multiply(dy, a[0, 1] / self.cell)
        fu += term
        fu -= self.corner[0] / self.cell
        fv = np.multiply(dx, a[1, 0] / self.cell, out=dx)
        np.multiply(dy, a[1, 1] / self.cell, out=term)
        fv += term
        fv -= self.corner[1] / self.cell
        del dy, term
        return PointLocation(fu.astype(np.float32), fv.astype(np.float32), self.shape)


@dataclass(frozen=True)
class PointLocation:
    """Fractional cell coordinates of points in a :class:`GridFrame` (float32, cells).

    ``fu = (u - u0) / cell`` and ``fv = (v - v0) / cell``; float32 keeps better than 1 mm
    within 4 km of the grid corner at a 1 m cell (24-bit mantissa).
    """

    fu: np.ndarray
    fv: np.ndarray
    shape: tuple[int, int]

    def __len__(self) -> int:
        return len(self.fu)

    def subset(self, which: np.ndarray) -> PointLocation:
        """The locations of some of the points (index array or boolean mask)."""
        return PointLocation(self.fu[which], self.fv[which], self.shape)

    @property
    def flat(self) -> np.ndarray:
        """Flat cell index of every point, clipped into the grid (int32 or int64)."""
        n_u, n_v = self.shape
        itype = np.int32 if n_u * n_v < 2**31 else np.int64
        i = np.clip(self.fu, 0, n_u - 1).astype(itype)
        j = np.clip(self.fv, 0, n_v - 1).astype(itype)
        i *= n_v
        i += j
        return i

    def sampler(self) -> BilinearSampler:
        """Bilinear weights of the points with respect to the cell centres."""
        n_u, n_v = self.shape
        outside = (self.fu < 0) | (self.fu > n_u) | (self.fv < 0) | (self.fv > n_v)
        m_u, m_v = max(n_u, 2), max(n_v, 2)  # grids of one cell across are padded to two
        fu = np.clip(self.fu - np.float32(0.5), 0, n_u - 1)
        fv = np.clip(self.fv - np.float32(0.5), 0, n_v - 1)
        itype = np.int32 if m_u * m_v < 2**31 else np.int64
        i0 = np.minimum(fu.astype(itype), m_u - 2)
        j0 = np.minimum(fv.astype(itype), m_v - 2)
        fu -= i0
        fv -= j0
        i0 *= m_v
        i0 += j0
        return BilinearSampler(i0, fu, fv, outside, (n_u, n_v), m_v)


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
        return BilinearSampler(self.k00[which], self.a[which], self.b[which],
                               self.outside[which], self.shape, self.row)

    def __call__(self, grid: np.ndarray) -> np.ndarray:
        """Grid values at the points, in the grid's dtype (float32 grids: half the traffic)."""
        g = np.asarray(grid)
        if g.shape != self.shape:
            raise ValueError("grid shape does not match the sampler's frame")
        if g.shape[0] < 2 or g.shape[1] < 2:
            g = np.pad(g, ((0, max(0, 2 - g.shape[0])), (0, max(0, 2 - g.shape[1]))), mode="edge")
        g = g.ravel()
        dtype = g.dtype if g.dtype in (np.float32, np.float64) else np.float64
        a = self.a.astype(dtype, copy=False)
        b = self.b.astype(dtype, copy=False)
        k = self.k00
        v00 = g[k]
        lower = g[k + 1]
        lower -= v00
        lower *= b
        lower += v00
        k = k + self.row
        v00 = g[k]
        upper = g[k + 1]
        upper -= v00
        upper *= b
        upper += v00
        upper -= lower
        upper *= a
        upper += lower
        if self.outside.any():
            upper = upper.astype(np.result_type(dtype, np.float32), copy=False)
            upper[self.outside] = np.nan
        return upper


def cell_min(flat: np.ndarray, values: np.ndarray, size: int) -> np.ndarray:
    """Minimum of ``values`` per flat cell index; NaN where a cell is empty."""
    out = np.full(size, np.inf)
    # same dtype on both sides keeps ufunc.at on its fast path
    np.minimum.at(out, flat, np.asarray(values, dtype=np.float64))
    out[np.isinf(out)] = np.nan
    return out


def cell_max(flat: np.ndarray, values: np.ndarray, size: int) -> np.ndarray:
    """Maximum of ``values`` per flat cell index; NaN where a cell is empty."""
    out = np.full(size, -np.inf)
    # same dtype on both sides keeps ufunc.at on its fast path
    np.maximum.at(out, flat, np.asarray(values, dtype=np.float64))
    out[np.isinf(out)] = np.nan
    return out


def cell_mean(flat: np.ndarray, values: np.ndarray, size: int,
              count: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(mean, count) of ``values`` per flat cell index; mean is NaN where a cell is empty.

    ``count`` (points per cell, from an earlier call with the same ``flat``) saves a pass.
    """
    if count is None:
        count = np.bincount(flat, minlength=size)
    total = np.bincount(flat, weights=values, minlength=size)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = total / count
    return mean, count


def inpaint(grid: np.ndarray, max_cells: int = 60, sweeps: int = 8) -> np.ndarray:
    """Fill NaN cells with a smooth (near-harmonic) interpolant of the known cells.

    Cells farther than ``max_cells`` (Chebyshev distance) from any known cell first take the
    value of the nearest known cell (found on blocks of about ``max_cells / 15`` cells, see
    :func:`_nearest_block_value`); the cells in between are filled coarse-to-fine: the grid is
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
    unknown = np.isnan(out)
    if not unknown.any():
        return out
    if unknown.all():
        return np.zeros_like(out)
    # cells more than max_cells from data (Chebyshev distance: two separable 1D max filters,
    # far cheaper than a distance transform); only when there are any, find their nearest
    near_data = ndimage.maximum_filter(~unknown, size=2 * max_cells + 1, mode="constant")
    far = unknown & ~near_data
    if far.any():
        out[far] = _nearest_block_value(out, unknown, far, max_cells)
    known = ~unknown | far
    # the fill is computed in float32 (half the memory traffic; rounding < 0.1 mm below
    # 1 km of local height), the known cells keep their exact values
    filled = _cascade(np.where(known, out, 0.0).astype(np.float32), known, sweeps)
    return np.where(known, out, filled)


def _nearest_block_value(values: np.ndarray, unknown: np.ndarray, which: np.ndarray,
                         max_cells: int) -> np.ndarray:
    """Value near the nearest known cell for the cells in ``which`` (all farther than
    ``max_cells`` from any known cell).

    The grid is cut into blocks of ``b × b`` cells (``b ≈ max_cells / 15``, at least 1); a
    block is known when it holds a known cell and takes the mean of its known cells; each
    queried cell takes the value of the block nearest to its own block (Euclidean distance
    transform of the block grid). With ``b = 1`` this is the nearest known cell; with larger
    blocks the position of the nearest data is found within ``b`` cells of a distance of
    more than ``max_cells`` — a far cheaper transform, as good for a gap far from data.
    """
    b = max(1, max_cells // 15)
    n_u, n_v = values.shape
    pu, pv = (-n_u) % b, (-n_v) % b
    w = np.pad((~unknown).astype(np.float64), ((0, pu), (0, pv)))
    v = np.pad(np.where(unknown, 0.0, values), ((0, pu), (0, pv)))
    shape = (w.shape[0] // b, b, w.shape[1] // b, b)
    count = w.reshape(shape).sum(axis=(1, 3))
    total = v.reshape(shape).sum(axis=(1, 3))
    block_value = total / np.maximum(count, 1.0)
    _, (ii, jj) = ndimage.distance_transform_edt(count == 0, return_indices=True)
    qi, qj = np.nonzero(which)
    qi //= b
    qj //= b
    return block_value[ii[qi, qj], jj[qi, qj]]


def _cascade(values: np.ndarray, known: np.ndarray, sweeps: int) -> np.ndarray:
    if known.all():
        return values
    n_u, n_v = values.shape
    if n_u == 1 and n_v == 1:
        return values
    pu, pv = n_u % 2, n_v % 2
    w = np.pad(known.astype(values.dtype), ((0, pu), (0, pv)))
    v = np.pad(np.where(known, values, values.dtype.type(0)), ((0, pu), (0, pv)))
    # 2 × 2 block sums by strided slices (faster than a reduction over reshaped axes)
    wsum = w[0::2, 0::2] + w[1::2, 0::2]
    wsum += w[0::2, 1::2]
    wsum += w[1::2, 1::2]
    vsum = v[0::2, 0::2] + v[1::2, 0::2]
    vsum += v[0::2, 1::2]
    vsum += v[1::2, 1::2]
    del w, v
    coarse_known = wsum > 0
    vsum /= np.maximum(wsum, 1)
    coarse = _cascade(np.where(coarse_known, vsum, vsum.dtype.type(0)), coarse_known, sweeps)
    out = np.where(known, values, coarse.repeat(2, axis=0).repeat(2, axis=1)[:n_u, :n_v])
    del coarse
    free = ~known
    # Jacobi sweeps in place: ``out`` is the inside of a buffer whose one-cell border repeats
    # the edge cells (edge padding), so no array is allocated per sweep
    buf = np.pad(out, 1, mode="edge")
    out = buf[1:-1, 1:-1]
    avg = np.empty_like(out)
    for _ in range(sweeps):
        np.add(buf[:-2, 1:-1], buf[2:, 1:-1], out=avg)
        avg += buf[1:-1, :-2]
        avg += buf[1:-1, 2:]
        avg *= avg.dtype.type(0.25)
        np.copyto(out, avg, where=free)
        buf[0, 1:-1] = out[0]
        buf[-1, 1:-1] = out[-1]
        buf[1:-1, 0] = out[:, 0]
        buf[1:-1, -1] = out[:, -1]
    return np.ascontiguousarray(out)

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
        xy = np.asarray(xy, dtype=np.float64).reshape(-1, 2)
        f = (self.to_uv(xy) - self.corner) / self.cell
        n_u, n_v = self.shape
        outside = (f[:, 0] < 0) | (f[:, 0] > n_u) | (f[:, 1] < 0) | (f[:, 1] > n_v)
        fu = np.clip(f[:, 0] - 0.5, 0, n_u - 1)
        fv = np.clip(f[:, 1] - 0.5, 0, n_v - 1)
        i0 = np.minimum(np.floor(fu).astype(np.int64), max(n_u - 2, 0))
        j0 = np.minimum(np.floor(fv).astype(np.int64), max(n_v - 2, 0))
        i1 = np.minimum(i0 + 1, n_u - 1)
        j1 = np.minimum(j0 + 1, n_v - 1)
        itype = np.int32 if n_u * n_v < 2**31 else np.int64
        k00 = (i0 * n_v + j0).astype(itype)
        dj = (j1 - j0).astype(itype)
        di = ((i1 - i0) * n_v).astype(itype)
        return BilinearSampler(k00, dj, di, (fu - i0).astype(np.float32),
                               (fv - j0).astype(np.float32), outside)


@dataclass(frozen=True)
class BilinearSampler:
    """Flat index of the lower cell centre, steps to the next ones and the bilinear weights."""

    k00: np.ndarray
    dj: np.ndarray
    di: np.ndarray
    a: np.ndarray
    b: np.ndarray
    outside: np.ndarray

    def __call__(self, grid: np.ndarray) -> np.ndarray:
        g = grid.ravel()
        a = self.a.astype(np.float64)
        b = self.b.astype(np.float64)
        k01 = self.k00 + self.dj
        lower = g[self.k00] * (1 - b) + g[k01] * b
        upper = g[self.k00 + self.di] * (1 - b) + g[k01 + self.di] * b
        out = lower * (1 - a) + upper * a
        out[self.outside] = np.nan
        return out


def cell_min(flat: np.ndarray, values: np.ndarray, size: int) -> np.ndarray:
    """Minimum of ``values`` per flat cell index; NaN where a cell is empty."""
    out = np.full(size, np.inf)
    np.minimum.at(out, flat, values)
    out[np.isinf(out)] = np.nan
    return out


def cell_max(flat: np.ndarray, values: np.ndarray, size: int) -> np.ndarray:
    """Maximum of ``values`` per flat cell index; NaN where a cell is empty."""
    out = np.full(size, -np.inf)
    np.maximum.at(out, flat, values)
    out[np.isinf(out)] = np.nan
    return out


def cell_mean(flat: np.ndarray, values: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """(mean, count) of ``values`` per flat cell index; mean is NaN where a cell is empty."""
    count = np.bincount(flat, minlength=size)
    total = np.bincount(flat, weights=values, minlength=size)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = total / count
    return mean, count


def inpaint(grid: np.ndarray, max_cells: int = 60, sweeps: int = 8) -> np.ndarray:
    """Fill NaN cells with a smooth (near-harmonic) interpolant of the known cells.

    Cells farther than ``max_cells`` from any known cell first take the value of the nearest
    known cell; the cells in between are filled coarse-to-fine: the grid is averaged down by
    2 × 2 blocks (known cells only) until every block is known, then on the way back up each
    level takes the coarser solution as a start and relaxes the unknown cells with
    ``sweeps`` Jacobi sweeps of the Laplace equation (a cascadic multigrid).

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
    dist, (ii, jj) = ndimage.distance_transform_edt(unknown, return_indices=True)
    far = unknown & (dist > max_cells)
    out[far] = out[ii[far], jj[far]]
    known = ~unknown | far
    return _cascade(np.where(known, out, 0.0), known, sweeps)


def _cascade(values: np.ndarray, known: np.ndarray, sweeps: int) -> np.ndarray:
    if known.all():
        return values
    n_u, n_v = values.shape
    if n_u == 1 and n_v == 1:
        return values
    pu, pv = n_u % 2, n_v % 2
    w = np.pad(known.astype(np.float64), ((0, pu), (0, pv)))
    v = np.pad(np.where(known, values, 0.0), ((0, pu), (0, pv)))
    wsum = w.reshape(w.shape[0] // 2, 2, w.shape[1] // 2, 2).sum(axis=(1, 3))
    vsum = (v * w).reshape(w.shape[0] // 2, 2, w.shape[1] // 2, 2).sum(axis=(1, 3))
    coarse_known = wsum > 0
    coarse = _cascade(np.where(coarse_known, vsum / np.maximum(wsum, 1e-300), 0.0),
                      coarse_known, sweeps)
    out = np.where(known, values, coarse.repeat(2, axis=0).repeat(2, axis=1)[:n_u, :n_v])
    free = ~known
    for _ in range(sweeps):
        p = np.pad(out, 1, mode="edge")
        avg = 0.25 * (p[:-2, 1:-1] + p[2:, 1:-1] + p[1:-1, :-2] + p[1:-1, 2:])
        out[free] = avg[free]
    return out

"""Noise tests: isolated points (voxel-block counts) and single-cell pits of the minimum surface.

Isolation is counted in a block of 3 × 3 × 3 voxels around each point's voxel, a fast
stand-in for a radius search: a point is isolated when fewer than ``min_neighbours`` other
points share its block. Wires are sparse but *linear*: at any point spacing along a wire up
to one voxel edge, a wire point has a neighbour inside the block (on both sides, or on one
side at the wire's end or the survey's edge), so with ``min_neighbours = 1`` wires are not
isolated (tested with a 2.8 m spacing). Two birds side by side are not found by this test.
"""
from __future__ import annotations

import numpy as np
from scipy import ndimage

_BITS = 21
_OFFSET = 1 << (_BITS - 1)


def voxel_keys(xyz: np.ndarray, voxel: float) -> np.ndarray:
    """Packed int64 key of each point's voxel (21 bits per axis, ±1 M voxels)."""
    xyz = np.asarray(xyz, dtype=np.float64).reshape(-1, 3)
    keys = np.zeros(len(xyz), dtype=np.int64)
    for axis, shift in ((0, 2 * _BITS), (1, _BITS), (2, 0)):  # one axis at a time: no (n, 3) temporaries
        column = np.floor(xyz[:, axis] / voxel)
        if column.min() + _OFFSET < 0 or column.max() + _OFFSET >= (1 << _BITS):
            raise ValueError("cloud too large for the voxel size (more than a million voxels across)")
        index = column.astype(np.int64)
        del column
        index += _OFFSET
        index <<= shift
        keys |= index
    return keys


def neighbour_offsets() -> np.ndarray:
    """Key differences of the 26 neighbouring voxels and the voxel itself."""
    d = np.array([-1, 0, 1], dtype=np.int64)
    di, dj, dk = np.meshgrid(d, d, d, indexing="ij")
    return ((di << (2 * _BITS)) + (dj << _BITS) + dk).ravel()


def isolated_points(xyz: np.ndarray, voxel: float, min_neighbours: int) -> np.ndarray:
    """Boolean mask of points with fewer than ``min_neighbours`` others in their voxel block.

    Parameters
    ----------
    xyz
        Points. [m], shape (n, 3)
    voxel
        Voxel edge. [m]
    min_neighbours
        Least number of other points in the 3 × 3 × 3 block for a point not to be isolated.
    """
    if len(xyz) == 0:
        return np.zeros(0, bool)
    keys = voxel_keys(xyz, voxel)
    uniq, inverse, counts = np.unique(keys, return_inverse=True, return_counts=True)
    # only voxels that are themselves sparse need their block counted
    sparse_voxels = np.flatnonzero(counts - 1 < min_neighbours)
    block = counts.copy()
    if len(sparse_voxels):
        k = uniq[sparse_voxels]
        total = np.zeros(len(k), dtype=np.int64)
        for off in neighbour_offsets():
            target = k + off
            pos = np.clip(np.searchsorted(uniq, target), 0, len(uniq) - 1)
            found = uniq[pos] == target
            total += np.where(found, counts[pos], 0)
        block[sparse_voxels] = total
    return (block[inverse] - 1) < min_neighbours


def pit_cells(zmin: np.ndarray, depth: float) -> tuple[np.ndarray, np.ndarray]:
    """Cells of a minimum surface lower than all 8 neighbours by more than ``depth``.

    Returns the pit mask and the lowest neighbour elevation of every cell. [m]
    """
    filled = np.where(np.isnan(zmin), np.inf, zmin)
    footprint = np.ones((3, 3), bool)
    footprint[1, 1] = False
    lowest_neighbour = ndimage.minimum_filter(filled, footprint=footprint, mode="nearest")
    pits = ~np.isnan(zmin) & np.isfinite(lowest_neighbour) & (zmin < lowest_neighbour - depth)
    return pits, lowest_neighbour

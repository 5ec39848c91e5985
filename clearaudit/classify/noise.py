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

from ..arrays import column_bounds
from ..threads import run_chunks

_CHUNK = 1 << 16  # points per chunk of the per-point passes (cache-sized temporaries)
#: Below this many voxels in the block (or ``_DENSE_VOXELS_PER_POINT`` times the points), the
#: isolation test counts every voxel of the block (one byte a voxel) instead of sorting the
#: points' voxel numbers.
_DENSE_MIN_VOXELS = 1 << 24
_DENSE_VOXELS_PER_POINT = 16
#: The most neighbours the dense count answers for (its counts are bytes that stop at 255).
_DENSE_MAX_NEIGHBOURS = 254


def compact_voxel_keys(xyz: np.ndarray, voxel: float) -> tuple[np.ndarray, tuple[int, int, int]]:
    """Dense voxel number of each point and the voxel counts along x, y, z (with a border).

    The voxel of a point is :math:`(\\lfloor x/e \\rfloor, \\lfloor y/e \\rfloor,
    \\lfloor z/e \\rfloor)` for the voxel edge :math:`e`, numbered ``(i * n_y + j) * n_z + k``
    from one voxel below the lowest occupied one on each
    axis, so that the 26 neighbours of every occupied voxel have numbers too. The numbers are
    int32 when they fit, else int64.

    Parameters
    ----------
    xyz
        Points. [m], shape (n, 3)
    voxel
        Voxel edge. [m]
    """
    if voxel <= 0:
        raise ValueError("the voxel edge must be positive")
    xyz = np.asarray(xyz, dtype=np.float64).reshape(-1, 3)
    # floor and division by a positive edge are monotonic: the lowest voxel is that of the minimum
    low, high = column_bounds(xyz) if len(xyz) else (np.zeros(3), np.zeros(3))
    lowest = np.floor(low / voxel) - 1.0
    dims = np.floor(high / voxel) - lowest + 2.0
    total = float(dims[0]) * float(dims[1]) * float(dims[2])
    if total >= 2.0**53:
        raise ValueError("cloud too large for the voxel size (voxel numbers exceed 53 bits)")
    itype = np.int32 if total < 2**31 else np.int64
    n_y, n_z = float(dims[1]), float(dims[2])
    keys = np.empty(len(xyz), itype)

    def work(lo: int, hi: int) -> None:
        # integers below 2**53: every float operation here is exact
        acc = None
        for axis, scale in ((0, n_y), (1, n_z), (2, None)):
            index = xyz[lo:hi, axis] / voxel
            np.floor(index, out=index)
            index -= lowest[axis]
            if acc is None:
                acc = index
            else:
                acc += index
            if scale is not None:
                acc *= scale
        keys[lo:hi] = acc

    run_chunks(work, len(keys), _CHUNK)
    return keys, (int(dims[0]), int(dims[1]), int(dims[2]))


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

    Notes
    -----
    When the block of voxels around the points is small (at most sixteen times as many voxels
    as points, as in a tile of a corridor, bends included), the points per voxel are counted
    over the whole block (one byte a voxel) and looked up directly. Otherwise (or with more
    than 254 neighbours asked for) the voxel numbers are sorted once (no
    inverse permutation): the sorted run lengths are the points per voxel, only voxels with
    fewer than ``min_neighbours + 1`` points have their block counted (binary search of the
    26 neighbours among the occupied voxels), and the points of the few isolated voxels are
    found through a hashed bit table followed by an exact test.
    """
    n = len(xyz)
    isolated = np.zeros(n, bool)
    if n == 0 or min_neighbours <= 0:
        return isolated
    keys, (n_x, n_y, n_z) = compact_voxel_keys(xyz, voxel)
    n_voxels = n_x * n_y * n_z
    if n_voxels <= max(_DENSE_VOXELS_PER_POINT * n, _DENSE_MIN_VOXELS) \
            and min_neighbours <= _DENSE_MAX_NEIGHBOURS:
        return _isolated_dense(keys, n_voxels, n_y, n_z, min_neighbours)
    ordered = np.sort(keys)
    first = np.empty(n, bool)
    first[0] = True
    np.not_equal(ordered[1:], ordered[:-1], out=first[1:])
    start = np.flatnonzero(first)
    del first
    occupied = ordered[start]
    del ordered
    counts = np.diff(np.append(start, n))
    del start
    # only voxels that are themselves sparse need their block counted
    sparse = np.flatnonzero(counts - 1 < min_neighbours)
    if len(sparse) == 0:
        return isolated
    k = occupied[sparse].astype(np.int64)
    total = np.zeros(len(k), dtype=np.int64)
    for off in _block_offsets(n_y, n_z):
        target = k + off
        pos = np.clip(np.searchsorted(occupied, target), 0, len(occupied) - 1)
        found = occupied[pos] == target
        total += np.where(found, counts[pos], 0)
    lonely = np.sort(k[total - 1 < min_neighbours])
    if len(lonely) == 0:
        return isolated
    # points of the lonely voxels: a hashed bit table passes a few candidates, tested exactly
    bits = int(min(24, max(10, np.ceil(np.log2(64 * len(lonely))))))
    mask = (1 << bits) - 1
    table = np.zeros(1 << bits, bool)
    table[lonely & mask] = True
    candidate = np.empty(n, bool)

    def work(lo: int, hi: int) -> None:
        np.take(table, keys[lo:hi] & keys.dtype.type(mask), out=candidate[lo:hi])

    run_chunks(work, n, _CHUNK)
    cand = np.flatnonzero(candidate)
    pos = np.clip(np.searchsorted(lonely, keys[cand]), 0, len(lonely) - 1)
    isolated[cand[lonely[pos] == keys[cand]]] = True
    return isolated


def _block_offsets(n_y: int, n_z: int) -> np.ndarray:
    """Voxel-number offsets of the 27 voxels of a 3 x 3 x 3 block (the centre's 0 included),
    for numbers ``(i * n_y + j) * n_z + k`` (:func:`compact_voxel_keys`)."""
    d = np.array([-1, 0, 1], dtype=np.int64)
    di, dj, dk = np.meshgrid(d, d, d, indexing="ij")
    return ((di * n_y + dj) * n_z + dk).ravel()


def _isolated_dense(keys: np.ndarray, n_voxels: int, n_y: int, n_z: int,
                    min_neighbours: int) -> np.ndarray:
    """:func:`isolated_points` on a block of few voxels: a count per voxel of the whole block.

    The same answers as the sorted form, from one counting pass over every voxel number (the
    block's numbers have a border voxel on each side, so every neighbour number is valid);
    each point of a sparse voxel then sums its block (compiled: ``isolated_in_block``, byte
    counts that stop at 255, so ``min_neighbours`` at most 254; the numpy form of
    ``bincount``, the sparse voxels' 27 shifted sums and a lookup per point took 28 ms on a
    1.6 M-point tile). On the tiles of a bent line the block holds 7-12 voxels a point: the
    sorted form took 75-83 ms on such a 1.5 M-point tile, this one 20-35 ms.
    """
    from .kernels import isolated_in_block

    keys = np.ascontiguousarray(keys)
    if keys.dtype not in (np.int32, np.int64):
        keys = keys.astype(np.int64)
    isolated = np.empty(len(keys), np.uint8)
    isolated_in_block(keys, int(n_voxels), int(n_y), int(n_z), int(min_neighbours), isolated)
    return isolated.view(bool)


def pit_cells(zmin: np.ndarray, depth: float) -> tuple[np.ndarray, np.ndarray]:
    """Cells of a minimum surface lower than all 8 neighbours by more than ``depth``.

    Returns the pit mask and the lowest neighbour elevation of every cell (edge cells repeat
    across the border, as scipy's ``nearest`` mode). [m]
    """
    empty = np.isnan(zmin)
    filled = np.where(empty, np.inf, zmin)
    padded = np.pad(filled, 1, mode="edge")
    n_u, n_v = filled.shape
    lowest_neighbour = np.minimum(padded[0:n_u, 0:n_v], padded[0:n_u, 1:n_v + 1])
    for du, dv in ((0, 2), (1, 0), (1, 2), (2, 0), (2, 1), (2, 2)):
        np.minimum(lowest_neighbour, padded[du:du + n_u, dv:dv + n_v], out=lowest_neighbour)
    del padded
    pits = ~empty & np.isfinite(lowest_neighbour) & (zmin < lowest_neighbour - depth)
    return pits, lowest_neighbour

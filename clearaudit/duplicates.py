"""Points delivered twice: input tiles whose buffers overlap.

Survey tiles are often delivered with a buffer: the points near a tile's edge are also in its
neighbour. Read together, such points would count twice: denser clouds change what the
classifier sees (neighbour counts, isolated points), the catenary fits would weigh those
stretches double and report tighter confidence intervals than the data support, and a
clearance finding would be listed once per copy. A point of a later input file whose
coordinates equal those of a point of an earlier file is therefore counted once: it is left
out of the analysis and, in ``classified.laz``, gets the class and height above ground of its
twin.

Coordinates are compared after rounding to :func:`compare_step_m` (1 mm, or the coarsest
coordinate scale of the inputs when that is coarser); two different laser returns within a
millimetre in all three axes are not told apart. Points repeated within one file are left as
they are (a file is taken as delivered). Only files whose header boxes meet are compared, so a
survey of tiles that do not overlap costs nothing.
"""
from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

#: The finest step coordinates are compared at. [m]
COMPARE_STEP_M = 0.001
#: Files' header boxes are grown by this much before they are tested for overlap: bounds
#: written before rounding to the coordinate scale, or a little off. [m]
BOX_SLACK_M = 1.0


def compare_step_m(sources: Sequence[Any], unit_m: Sequence[float]) -> float:
    """Step the coordinates of points from these files are compared at:
    :data:`COMPARE_STEP_M`, or the coarsest coordinate scale when coarser. [m]

    Parameters
    ----------
    sources
        The files (:class:`~clearaudit.cloud.SourceInfo`: ``scales`` in CRS units).
    unit_m
        Metres per CRS unit for x, y, z. [m/unit]
    """
    scales = [np.asarray(info.scales, dtype=np.float64) * unit_m for info in sources]
    return max(COMPARE_STEP_M, max((float(s.max()) for s in scales), default=0.0))


def overlapping_files(lo: np.ndarray, hi: np.ndarray, slack_m: float = 0.0) -> list[tuple[int, int]]:
    """Pairs ``(i, j)``, ``i < j``, of files whose boxes meet (in x, y and z).

    Parameters
    ----------
    lo, hi
        Each file's box, shape (n_files, 3). [m]
    slack_m
        Grown by this much on every side (rounding of the header bounds). [m]
    """
    lo = np.asarray(lo, dtype=np.float64).reshape(-1, 3) - slack_m
    hi = np.asarray(hi, dtype=np.float64).reshape(-1, 3) + slack_m
    meet = np.all((lo[:, None, :] <= hi[None, :, :]) & (lo[None, :, :] <= hi[:, None, :]), axis=2)
    i, j = np.nonzero(np.triu(meet, k=1))
    return list(zip(i.tolist(), j.tolist(), strict=True))


def later_copies(xyz: np.ndarray, file_id: np.ndarray, step_m: float
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Points that repeat a point of an earlier file, and the point each repeats.

    Parameters
    ----------
    xyz
        Points in input order (file after file, each file's points in order). [m], shape (n, 3)
    file_id
        Each point's file (ascending with the input order).
    step_m
        Coordinates are compared after rounding to this step. [m]

    Returns
    -------
    copy, twin
        Positions (ascending) of the points whose rounded coordinates equal those of a point
        of an earlier file, and for each the position of the first point (input order) with
        those coordinates, which is kept.
    """
    xyz = np.asarray(xyz, dtype=np.float64).reshape(-1, 3)
    file_id = np.asarray(file_id).reshape(-1)
    n = len(xyz)
    none = np.zeros(0, dtype=np.int64)
    if n < 2 or file_id.min() == file_id.max():
        return none, none
    q = np.floor(xyz / float(step_m) + 0.5).astype(np.int64)
    q -= q.min(axis=0)
    bits = [int(v).bit_length() for v in q.max(axis=0)]
    if sum(bits) <= 63:
        # the three steps packed into one integer (a cell of the tiled run: 17 + 17 bits in
        # plan and the heights): a sort of the values tells whether anything repeats at all
        packed = (q[:, 0] << (bits[1] + bits[2])) | (q[:, 1] << bits[2]) | q[:, 2]
        values = np.sort(packed)
        if not np.any(values[1:] == values[:-1]):
            return none, none
        order = np.argsort(packed)  # not stable: each group's first point is found below
        sorted_key = packed[order]
        new = np.concatenate([[True], sorted_key[1:] != sorted_key[:-1]])
        del packed, values, sorted_key
    else:
        order = np.lexsort((q[:, 2], q[:, 1], q[:, 0]))
        qs = q[order]
        new = np.concatenate([[True], np.any(qs[1:] != qs[:-1], axis=1)])
        del qs
        if new.all():
            return none, none
    starts = np.flatnonzero(new)
    # each group's first point in input order (the least position), for each sorted item
    first = np.minimum.reduceat(order, starts)[np.cumsum(new) - 1]
    later = np.flatnonzero(file_id[order] > file_id[first])
    copy, twin = order[later], first[later]
    arrange = np.argsort(copy, kind="stable")
    return copy[arrange].astype(np.int64), twin[arrange].astype(np.int64)


def cloud_copies(xyz: np.ndarray, source_id: np.ndarray, step_m: float
                 ) -> tuple[np.ndarray, np.ndarray, int]:
    """:func:`later_copies` over a whole cloud read file after file, where files overlap.

    Only the points inside the common box of two files whose point boxes meet are compared.

    Parameters
    ----------
    xyz
        Points, in input order. [m], shape (n, 3)
    source_id
        Each point's file (ascending).
    step_m
        Coordinates are compared after rounding to this step. [m]

    Returns
    -------
    copy, twin, pairs
        As :func:`later_copies` (positions in the cloud), and the number of file pairs whose
        boxes meet.
    """
    none = np.zeros(0, dtype=np.int64)
    source_id = np.asarray(source_id).reshape(-1)
    if len(source_id) < 2 or source_id[0] == source_id[-1]:
        return none, none, 0
    files = np.unique(source_id)
    bounds = np.searchsorted(source_id, np.append(files, files[-1] + 1))
    lo = np.array([xyz[a:b].min(axis=0) for a, b in zip(bounds[:-1], bounds[1:], strict=True)])
    hi = np.array([xyz[a:b].max(axis=0) for a, b in zip(bounds[:-1], bounds[1:], strict=True)])
    pairs = overlapping_files(lo, hi)
    if not pairs:
        return none, none, 0
    candidate = np.zeros(len(xyz), dtype=bool)
    for i, j in pairs:
        box_lo, box_hi = np.maximum(lo[i], lo[j]), np.minimum(hi[i], hi[j])
        for k in (i, j):
            a, b = bounds[k], bounds[k + 1]
            candidate[a:b] |= np.all((xyz[a:b] >= box_lo) & (xyz[a:b] <= box_hi), axis=1)
    at = np.flatnonzero(candidate)
    copy, twin = later_copies(xyz[at], source_id[at], step_m)
    return at[copy], at[twin], len(pairs)


__all__ = ["BOX_SLACK_M", "COMPARE_STEP_M", "cloud_copies", "compare_step_m", "later_copies", "overlapping_files"]

"""Small array helpers shared by the stages."""
from __future__ import annotations

import math

import numpy as np


def column_bounds(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Least and greatest value of every column of a 2-D array.

    The same values as ``a.min(axis=0)`` and ``a.max(axis=0)``, one 1-D reduction per column:
    numpy reduces a tall, narrow C-ordered array over its rows element by element, about
    twenty times slower for an (n, 2) array.
    """
    a = np.asarray(a)
    if a.ndim != 2 or len(a) == 0:
        return a.min(axis=0), a.max(axis=0)
    lo = np.array([a[:, c].min() for c in range(a.shape[1])], dtype=a.dtype)
    hi = np.array([a[:, c].max() for c in range(a.shape[1])], dtype=a.dtype)
    return lo, hi


def positions(index: np.ndarray, n: int) -> np.ndarray:
    """An integer index array as it is, a boolean mask over ``n`` rows as its positions."""
    index = np.asarray(index)
    if index.dtype != bool:
        return index
    if index.shape != (n,):
        raise IndexError(f"boolean index of shape {index.shape} for {n} rows")
    return np.flatnonzero(index)


def take_rows(a: np.ndarray, index: np.ndarray) -> np.ndarray:
    """``a[index]`` along the first axis (an integer index array or a boolean mask), by
    :func:`numpy.take`: the same values in the same order, a new C-ordered array.

    numpy's fancy indexing gathers the rows of a 2-D array element by element: for an (n, 3)
    float64 cloud ``np.take`` is 3-5 times faster, and a boolean mask with scattered points
    (ground among vegetation, say) indexes about 6 times slower than its positions do.
    """
    return np.take(a, positions(index, len(a)), axis=0)


def take_columns(xyz: np.ndarray, index: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``xyz[index, 0]``, ``xyz[index, 1]``, ``xyz[index, 2]`` of an (n, 3) float64 array (row
    positions from 0 to n - 1, or a boolean mask): three new contiguous columns, the same
    values.

    One compiled pass gathers each row's three values straight into the columns (numpy would
    gather the rows into an (m, 3) array and then copy each strided column out of it: on
    1.2 M ground points of a tile 32 ms against about 5).
    """
    from .classify.kernels import gather_columns

    xyz = np.asarray(xyz)
    if xyz.ndim != 2 or xyz.shape[1] != 3:
        raise ValueError(f"take_columns expects an (n, 3) array, not shape {xyz.shape}")
    rows = positions(index, len(xyz))
    if xyz.dtype != np.float64 or rows.dtype.kind not in "iu":
        return tuple(np.ascontiguousarray(xyz[rows, c]) for c in range(3))  # type: ignore[return-value]
    if rows.dtype not in (np.int32, np.int64):
        rows = rows.astype(np.int64)
    out = tuple(np.empty(len(rows)) for _ in range(3))
    gather_columns(xyz, np.ascontiguousarray(rows), *out)  # IndexError for a row outside
    return out  # type: ignore[return-value]


def unique_rows(a: np.ndarray, *, return_index: bool = False, return_inverse: bool = False
                ) -> np.ndarray | tuple[np.ndarray, ...]:
    """``numpy.unique(a, axis=0, ...)`` for a 2-D integer array: the same rows, first
    positions and inverse (1-D), by one int64 key per row where the columns' ranges allow.

    numpy finds unique rows by sorting them as opaque items (a comparison of bytes), 20-30
    times slower than sorting one integer per row. The key is the row's mixed-radix number
    over the columns' ranges (column minus its least value, radix its span): keys order as the
    rows do lexicographically, so the unique rows come in numpy's order, and ``return_index``
    gives the first occurrence as numpy's stable sort does. Rows whose key would not fit in
    int64 go to numpy itself.
    """
    a = np.asarray(a)
    if a.ndim != 2 or a.dtype.kind not in "iu" or a.dtype == np.uint64 or len(a) == 0 \
            or a.shape[1] == 0:
        return _numpy_unique_rows(a, return_index, return_inverse)
    lo, hi = column_bounds(a)
    span = [int(h) - int(low) + 1 for low, h in zip(lo.tolist(), hi.tolist(), strict=True)]
    if math.prod(span) >= 2**63:
        return _numpy_unique_rows(a, return_index, return_inverse)
    key = np.zeros(len(a), dtype=np.int64)
    for c, s in enumerate(span):
        key *= s
        key += a[:, c].astype(np.int64) - np.int64(lo[c])
    res = np.unique(key, return_index=True, return_inverse=return_inverse)
    first = res[1]
    out: list[np.ndarray] = [a[first]]
    if return_index:
        out.append(first)
    if return_inverse:
        out.append(res[2])
    return out[0] if len(out) == 1 else tuple(out)


def _numpy_unique_rows(a: np.ndarray, return_index: bool, return_inverse: bool
                       ) -> np.ndarray | tuple[np.ndarray, ...]:
    out = np.unique(a, axis=0, return_index=return_index, return_inverse=return_inverse)
    if return_inverse:
        out = (*out[:-1], np.asarray(out[-1]).reshape(-1))
    return out


def code_counts(codes: np.ndarray) -> np.ndarray:
    """Number of points per uint8 class code (length 256).

    One compiled pass (``classify.kernels.byte_counts``, without the GIL): ``np.bincount``
    widens its input to intp, a temporary eight times the size of the codes, and holds the
    GIL; counted in chunks it took 2.4 ms for a tile's 1.6 M codes (integer counts: the same
    in any order).
    """
    from .classify.kernels import byte_counts

    codes = np.asarray(codes)
    if codes.dtype != np.uint8 or codes.ndim != 1:
        raise TypeError("code_counts needs a 1-D uint8 array")
    counts = np.zeros(256, np.int64)
    byte_counts(codes, counts)
    return counts


def class_counts(codes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``numpy.unique(codes, return_counts=True)``, by :func:`code_counts` for uint8 codes."""
    codes = np.asarray(codes)
    if codes.dtype != np.uint8:
        return np.unique(codes, return_counts=True)
    counts = code_counts(codes)
    present = np.flatnonzero(counts)
    return present.astype(np.uint8), counts[present]


def class_mask(classes: np.ndarray, codes) -> np.ndarray:
    """``numpy.isin(classes, codes)`` for uint8 class codes, by a 256-entry lookup table."""
    classes = np.asarray(classes)
    if classes.dtype != np.uint8:
        return np.isin(classes, np.asarray(codes))
    table = np.zeros(256, dtype=bool)
    table[[c for c in np.asarray(codes, dtype=np.int64).ravel().tolist() if 0 <= c < 256]] = True
    return np.take(table, classes)  # table[classes], twice as fast for uint8 codes


def median_1d(values: np.ndarray) -> float:
    """Median of a 1-D array: the value :func:`numpy.median` gives (the middle order
    statistic, or the mean of the two middle ones; NaN when any value is NaN or the array is
    empty), without its general-axis overhead."""
    n = values.size
    if n == 0:
        return float("nan")
    if n % 2:
        part = np.partition(values, [(n - 1) // 2, -1])
        middle = part[(n - 1) // 2]
    else:
        part = np.partition(values, [n // 2 - 1, n // 2, -1])
        middle = (part[n // 2 - 1] + part[n // 2]) / 2.0
    return float("nan") if np.isnan(part[-1]) else float(middle)


def _raster_cells(extent: np.ndarray, size: float, most: int) -> tuple[float, np.ndarray]:
    """Cell size (``size`` or a power-of-two multiple of it) and shape of a raster over
    ``extent`` with at most ``most`` cells."""
    while True:
        shape = np.floor(extent / size).astype(np.int64) + 1
        if int(shape[0]) * int(shape[1]) <= most:
            return size, shape
        size *= 2.0


def _cells_near(centres: np.ndarray, lo: np.ndarray, size: float, shape: np.ndarray,
                bound: float) -> np.ndarray | None:
    """Flat indices (ascending, row-major over ``shape``) of the raster cells whose centre
    ``lo + (i + 0.5) * size`` may lie within ``bound`` of a centre on both axes (a superset:
    one more cell on each side), or None when marking those boxes would cost more than
    querying every cell of the raster.

    Centres whose boxes start in the same cell share one box. A box's cells are marked in a
    few nanoseconds each and a cell's query takes about 0.4 µs, so the boxes are marked
    while they hold fewer than 32 cells for each cell of the raster (and at most 2 M: their
    index arrays take about 20 bytes a cell): a tile's ground around its towers' 200-330
    anchor cells queried 1 400-2 000 cells instead of 48 000-71 000 (near_points 17-24 →
    8-11 ms on 1.0-1.1 M points).
    """
    nu, nv = int(shape[0]), int(shape[1])
    first = np.floor((centres - lo - bound) / size - 0.5).astype(np.int64) - 1
    if len(first) > 1:
        first = np.unique(first, axis=0)
    width = int(np.ceil(2.0 * bound / size)) + 4
    if len(first) * width * width > min(32 * nu * nv, 1 << 21):
        return None
    step = np.arange(width, dtype=np.int64)
    iu = (first[:, 0, None] + step)[:, :, None]          # (centre, width, 1)
    iv = (first[:, 1, None] + step)[:, None, :]          # (centre, 1, width)
    inside = (iu >= 0) & (iu < nu) & (iv >= 0) & (iv < nv)
    mark = np.zeros(nu * nv, dtype=bool)
    mark[(iu * nv + iv)[inside]] = True
    return np.flatnonzero(mark)


def hypot_within(x: np.ndarray, y: np.ndarray, limit: float) -> np.ndarray:
    """``numpy.hypot(x, y) <= limit``, the same booleans, about ten times faster.

    The sum of squares decides wherever it is clearly below or above ``limit ** 2``; libm's
    hypot (numpy's) only in a band of 1e-12 around it and for NaN
    (``classify.kernels.hypot_within``). Limits whose square would underflow or overflow, or
    that are not positive and finite, go to numpy.
    """
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    limit = float(limit)
    if x.ndim != 1 or x.shape != y.shape or not 1e-150 <= limit <= 1e150:
        return np.hypot(x, y) <= limit
    from .classify.kernels import hypot_within as _kernel

    out = np.empty(len(x), dtype=np.uint8)
    _kernel(x, y, limit, out)
    return out.view(bool)


def near_points(xy: np.ndarray, centres: np.ndarray, radius: float) -> np.ndarray:
    r"""Positions (ascending) of the points of ``xy`` closer than ``radius`` to a centre.

    The same points as a k-d tree query with ``distance_upper_bound=radius`` over all of
    ``xy`` (``radius`` finite and positive). A raster of cells of ``radius / 8`` (coarser
    when that would exceed four cells per point) over the points' box is classified by the
    distance :math:`d_c` of each cell's centre to the nearest centre: a point lies within
    :math:`h` (half the cell's diagonal) of its cell's centre, so a cell with
    :math:`d_c + h \le r - \epsilon` holds only points within the radius and a cell with
    :math:`d_c - h > r + \epsilon` none (the distance to a set changes no faster than the
    position); only the points of the cells in between are queried. Where the cells would
    be wider than half the radius (few points in a large box), or a coordinate is not finite,
    every point is queried.
    """
    from scipy.spatial import cKDTree

    if not (np.isfinite(radius) and radius > 0):
        raise ValueError(f"near_points needs a finite positive radius, not {radius}")
    xy = np.asarray(xy, dtype=np.float64).reshape(-1, 2)
    centres = np.asarray(centres, dtype=np.float64).reshape(-1, 2)
    if len(xy) == 0 or len(centres) == 0:
        return np.zeros(0, dtype=np.intp)
    lo, hi = column_bounds(xy)
    if not (np.all(np.isfinite(lo)) and np.all(np.isfinite(hi))):
        cKDTree(centres).query(xy)  # rejects the non-finite points, as a plain query does
    # only the centres within the radius of the points' box can be within it of a point
    centres = centres[np.all((centres >= lo - radius) & (centres <= hi + radius), axis=1)]
    if len(centres) == 0:
        return np.zeros(0, dtype=np.intp)
    tree = cKDTree(centres)

    def query(which: np.ndarray | slice) -> np.ndarray:
        d, _ = tree.query(xy[which] if isinstance(which, slice) else take_rows(xy, which),
                          distance_upper_bound=radius)
        return np.isfinite(d)

    size, shape = _raster_cells(hi - lo, radius / 8.0, max(4 * len(xy), 1 << 12))
    if size > radius / 2.0:
        return np.flatnonzero(query(slice(None)))
    # far above the round-off of the distances (≈ 1e-16 of the coordinates' magnitude)
    tol = 1e-12 * (float(np.max(np.abs(np.concatenate([lo, hi])))) + radius) + 1e-12
    half = size * np.sqrt(0.5) + tol
    bound = radius + half + tol
    # only the cells whose centre lies within ``bound`` of a centre (on each axis: a box
    # around each centre, one cell wider on each side) can be nearer than the query's bound;
    # the others are beyond it (state 0, as the query would find). The boxes are queried
    # alone unless they hold more cells than the raster.
    cells = _cells_near(centres, lo, size, shape, bound)
    if cells is None:
        cells = np.arange(int(shape[0]) * int(shape[1]), dtype=np.int64)
    iu, iv = np.divmod(cells, int(shape[1]))
    d_cell, _ = tree.query(np.column_stack([lo[0] + (iu + 0.5) * size,
                                            lo[1] + (iv + 0.5) * size]),
                           distance_upper_bound=bound)
    del iu, iv
    state = np.zeros(int(shape[0]) * int(shape[1]), dtype=np.uint8)
    near_state = np.full(len(d_cell), 2, dtype=np.uint8)   # 2: test each point
    near_state[d_cell + half <= radius - tol] = 1          # every point within the radius
    near_state[d_cell - half > radius + tol] = 0           # none (also beyond the query: inf)
    state[cells] = near_state
    del d_cell, near_state, cells
    from .classify.kernels import raster_state

    # each point's cell state in one compiled pass: min(int((x - lo) / size), last) per axis
    point_state = np.empty(len(xy), dtype=np.uint8)
    raster_state(xy, float(lo[0]), float(lo[1]), float(size), int(shape[0]), int(shape[1]),
                 state, point_state)
    keep = point_state == 1
    test = np.flatnonzero(point_state == 2)
    if len(test):
        keep[test[query(test)]] = True
    return np.flatnonzero(keep)

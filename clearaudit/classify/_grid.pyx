# cython: language_level=3, boundscheck=False, wraparound=False, cdivision=True, initializedcheck=False
"""Compiled per-point kernels of :mod:`clearaudit.classify.grid`.

Built with ``-ffp-contract=off``: every product and sum is rounded on its own in the grid's
precision, in the order the numpy form of the same formula used, so the values are the same.
"""
from libc.float cimport DBL_MAX
from libc.math cimport NAN, fabsf
from libc.stdint cimport int32_t, int64_t, uint32_t
from libc.stdlib cimport free, malloc

ctypedef fused real:
    float
    double

ctypedef fused index:
    int32_t
    int64_t


def bilinear(const real[::1] grid, const index[::1] k00, const float[::1] wa,
             const float[::1] wb, const unsigned char[::1] outside, Py_ssize_t row,
             real[::1] out):
    """``out[i]``: the grid (flat, rows of ``row`` cells) at point ``i`` — lower cell centre
    ``k00[i]``, weights ``wa[i]`` (across rows) and ``wb[i]`` (along a row); NaN outside.

    ``lower = (v01 - v00) b + v00``, ``upper = (v11 - v10) b + v10``,
    ``value = (upper - lower) a + lower``, in the grid's precision.
    """
    cdef Py_ssize_t n = k00.shape[0]
    if wa.shape[0] != n or wb.shape[0] != n or outside.shape[0] != n or out.shape[0] != n:
        raise ValueError("the point arrays must have the same length")
    cdef Py_ssize_t size = grid.shape[0]
    cdef Py_ssize_t i, k
    cdef real a, b, v00, lower, upper
    for i in range(n):
        if k00[i] < 0 or k00[i] + row + 1 >= size:
            raise IndexError("a point's cell is outside the grid")
    with nogil:
        for i in range(n):
            if outside[i]:
                out[i] = NAN
                continue
            k = k00[i]
            a = <real> wa[i]
            b = <real> wb[i]
            v00 = grid[k]
            lower = grid[k + 1] - v00
            lower = lower * b
            lower = lower + v00
            v00 = grid[k + row]
            upper = grid[k + row + 1] - v00
            upper = upper * b
            upper = upper + v00
            upper = upper - lower
            upper = upper * a
            out[i] = upper + lower


cdef inline uint32_t _order_key(float v) noexcept nogil:
    """A key whose unsigned order is the order of the float32 values (-0 before +0)."""
    cdef uint32_t bits = (<uint32_t *> &v)[0]
    if bits & 0x80000000u:
        return ~bits
    return bits | 0x80000000u


cdef inline float _from_key(uint32_t key) noexcept nogil:
    cdef uint32_t bits
    if key & 0x80000000u:
        bits = key & 0x7FFFFFFFu
    else:
        bits = ~key
    return (<float *> &bits)[0]


cdef uint32_t _select(const float[::1] v, float center, bint centred, Py_ssize_t rank,
                      int64_t *high, int64_t *low) noexcept nogil:
    """Key of the value of 0-based ``rank`` in sorted order (``high``: the histogram of the
    keys' upper 16 bits, filled; ``low``: 65536 counts of scratch)."""
    cdef Py_ssize_t n = v.shape[0], i
    cdef int64_t seen = 0
    cdef uint32_t bucket = 0, key
    cdef float x
    while seen + high[bucket] <= rank:
        seen += high[bucket]
        bucket += 1
    for i in range(65536):
        low[i] = 0
    for i in range(n):
        x = v[i]
        if centred:
            x = fabsf(x - center)
        key = _order_key(x)
        if (key >> 16) == bucket:
            low[key & 0xFFFFu] += 1
    i = 0
    while seen + low[i] <= rank:
        seen += low[i]
        i += 1
    return (bucket << 16) | <uint32_t> i


def median_f32(const float[::1] v, float center=0.0, bint centred=False):
    """``numpy.median`` of float32 values (of ``|v - center|`` when ``centred``), exactly:
    the middle value, or for an even count the two middle values added and halved in
    float32 (numpy's mean of the two); NaN when any value is NaN or there are none.

    Two counting passes over 16-bit halves of an order-preserving key (a radix select)
    instead of a partition of a copy.
    """
    cdef Py_ssize_t n = v.shape[0], i
    if n == 0:
        return float("nan")
    cdef int64_t *high = <int64_t *> malloc(65536 * sizeof(int64_t))
    cdef int64_t *low = <int64_t *> malloc(65536 * sizeof(int64_t))
    if not high or not low:
        free(high)
        free(low)
        raise MemoryError()
    cdef bint nan = False
    cdef float x, a, b, result
    with nogil:
        for i in range(65536):
            high[i] = 0
        for i in range(n):
            x = v[i]
            if centred:
                x = fabsf(x - center)
            if x != x:
                nan = True
                break
            high[_order_key(x) >> 16] += 1
        if not nan:
            a = _from_key(_select(v, center, centred, (n - 1) // 2, high, low))
            if n % 2:
                result = a
            else:
                b = _from_key(_select(v, center, centred, n // 2, high, low))
                result = a + b
                result = result / 2
    free(high)
    free(low)
    if nan:
        return float("nan")
    return result


def window_sums(const float[::1] resid, const float[::1] limit, const int64_t[::1] cell,
                const double[::1] values, unsigned char[::1] inside, double[::1] total,
                int64_t[::1] count):
    """Points within a window of a model, summed per cell.

    ``inside[i] = |resid[i]| <= limit[i]`` (``limit`` of length 1: one limit for all; NaN
    is outside); for the points inside, ``values[i]`` is added to ``total[cell[i]]`` and 1
    to ``count[cell[i]]``, in point order (``numpy.bincount``'s order: the same sums).
    """
    cdef Py_ssize_t n = resid.shape[0], m = total.shape[0], i
    if cell.shape[0] != n or values.shape[0] != n or inside.shape[0] != n:
        raise ValueError("the point arrays must have the same length")
    if limit.shape[0] != 1 and limit.shape[0] != n:
        raise ValueError("limit must hold one value or one per point")
    if count.shape[0] != m:
        raise ValueError("total and count must have the same length")
    for i in range(n):
        if cell[i] < 0 or cell[i] >= m:
            raise IndexError("a point's cell is outside the cells")
    cdef bint one = limit.shape[0] == 1
    cdef float lim = limit[0] if n else 0.0
    cdef int64_t c
    with nogil:
        for i in range(n):
            if not one:
                lim = limit[i]
            if fabsf(resid[i]) <= lim:
                inside[i] = 1
                c = cell[i]
                total[c] += values[i]
                count[c] += 1
            else:
                inside[i] = 0



def plane_sums(const int64_t[::1] cell, const double[:] dx, const double[:] dy,
               const double[:] z, const double[::1] z0, double[:, ::1] out):
    """Per-cell sums for least-squares planes ``z - z0 = a + b dx + c dy``.

    ``out[c]`` receives the sums over the points of cell ``c`` of
    ``dx, dy, zr, dx², dy², dx·dy, dx·zr, dy·zr`` with ``zr = z - z0[c]``, each added in
    point order from zero (``numpy.bincount``'s order: the same sums).
    """
    cdef Py_ssize_t n = cell.shape[0], m = out.shape[0], i
    if dx.shape[0] != n or dy.shape[0] != n or z.shape[0] != n:
        raise ValueError("the point arrays must have the same length")
    if z0.shape[0] != m or out.shape[1] != 8:
        raise ValueError("z0 needs one value and out 8 columns per cell")
    for i in range(n):
        if cell[i] < 0 or cell[i] >= m:
            raise IndexError("a point's cell is outside the cells")
    cdef int64_t c
    cdef double x, y, zr
    with nogil:
        for i in range(m):
            for c in range(8):
                out[i, c] = 0.0
        for i in range(n):
            c = cell[i]
            x = dx[i]
            y = dy[i]
            zr = z[i] - z0[c]
            out[c, 0] += x
            out[c, 1] += y
            out[c, 2] += zr
            out[c, 3] += x * x
            out[c, 4] += y * y
            out[c, 5] += x * y
            out[c, 6] += x * zr
            out[c, 7] += y * zr


def plane_residual_sums(const int64_t[::1] cell, const double[:] dx, const double[:] dy,
                        const double[:] z, const double[::1] z0, const double[::1] a,
                        const double[::1] b, const double[::1] c, double[::1] out):
    """Per-cell sums of squared residuals from the planes of :func:`plane_sums`.

    ``r = (z - z0[k]) - ((b[k] dx + a[k]) + c[k] dy)`` per point (NaN counted as 1e3 and
    infinities as the largest finite values, ``numpy.nan_to_num``), ``out[k] += r²`` in
    point order from zero.
    """
    cdef Py_ssize_t n = cell.shape[0], m = out.shape[0], i
    if dx.shape[0] != n or dy.shape[0] != n or z.shape[0] != n:
        raise ValueError("the point arrays must have the same length")
    if z0.shape[0] != m or a.shape[0] != m or b.shape[0] != m or c.shape[0] != m:
        raise ValueError("z0, a, b and c need one value per cell")
    for i in range(n):
        if cell[i] < 0 or cell[i] >= m:
            raise IndexError("a point's cell is outside the cells")
    cdef int64_t k
    cdef double r, fit
    with nogil:
        for i in range(m):
            out[i] = 0.0
        for i in range(n):
            k = cell[i]
            fit = b[k] * dx[i]
            fit = fit + a[k]
            fit = fit + c[k] * dy[i]
            r = (z[i] - z0[k]) - fit
            if r != r:
                r = 1e3
            elif r > DBL_MAX:
                r = DBL_MAX
            elif r < -DBL_MAX:
                r = -DBL_MAX
            out[k] += r * r

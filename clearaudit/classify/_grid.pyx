# cython: language_level=3, boundscheck=False, wraparound=False, cdivision=True, initializedcheck=False
"""Compiled per-point kernels of :mod:`clearaudit.classify.grid`.

Built with ``-ffp-contract=off``: every product and sum is rounded on its own in the grid's
precision, in the order the numpy form of the same formula used, so the values are the same.
"""
from libc.float cimport DBL_MAX
from libc.math cimport NAN, fabs, fabsf, hypot, sqrt
from libc.stdint cimport int32_t, int64_t, uint32_t
from libc.stdlib cimport calloc, free, malloc
from libc.string cimport memcpy

ctypedef fused real:
    float
    double

ctypedef fused index:
    int32_t
    int64_t


cdef int _check_cells(const index[::1] cell, Py_ssize_t m) except -1:
    """Raise ``IndexError`` unless every cell number lies in ``0 … m - 1`` (the kernels
    index without bounds checks). The scan leaves the GIL (a tile's 1.6 M cells take 1-2
    ms, in which the other tile threads' Python could not run)."""
    cdef Py_ssize_t i, n = cell.shape[0]
    cdef bint bad = False
    with nogil:
        for i in range(n):
            if cell[i] < 0 or cell[i] >= m:
                bad = True
                break
    if bad:
        raise IndexError("a point's cell is outside the cells")
    return 0


cdef int _check_corners(const index[::1] k00, Py_ssize_t row, Py_ssize_t size) except -1:
    """Raise unless every lower cell centre ``k00`` has its three neighbours of the bilinear
    interpolation inside a flat grid of ``size`` cells in rows of ``row`` (the kernels below
    index without bounds checks)."""
    cdef Py_ssize_t i, n = k00.shape[0]
    cdef bint bad = False
    if row < 1:
        raise ValueError("a grid row holds at least one cell")
    with nogil:
        for i in range(n):
            if k00[i] < 0 or k00[i] + row + 1 >= size:
                bad = True
                break
    if bad:
        raise IndexError("a point's cell is outside the grid")
    return 0


cdef inline real _bilinear_at(const real *grid, Py_ssize_t k, Py_ssize_t row, real a,
                              real b) noexcept nogil:
    """The flat grid's value at weights ``a`` (across rows) and ``b`` (along a row) from the
    lower cell centre ``k``: ``lower = (v01 - v00) b + v00``, ``upper = (v11 - v10) b +
    v10``, ``(upper - lower) a + lower``, each operation rounded in the grid's precision."""
    cdef real v00, lower, upper
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
    return upper + lower


def bilinear(const real[::1] grid, const index[::1] k00, const float[::1] wa,
             const float[::1] wb, const unsigned char[::1] outside, Py_ssize_t row,
             real[::1] out):
    """``out[i]``: the grid (flat, rows of ``row`` cells) at point ``i`` — lower cell centre
    ``k00[i]``, weights ``wa[i]`` (across rows) and ``wb[i]`` (along a row); NaN outside
    (:func:`_bilinear_at`, in the grid's precision)."""
    cdef Py_ssize_t n = k00.shape[0], i
    if wa.shape[0] != n or wb.shape[0] != n or outside.shape[0] != n or out.shape[0] != n:
        raise ValueError("the point arrays must have the same length")
    _check_corners(k00, row, grid.shape[0])
    if n == 0:
        return
    cdef const real *g = &grid[0]
    with nogil:
        for i in range(n):
            if outside[i]:
                out[i] = NAN
            else:
                out[i] = _bilinear_at(g, k00[i], row, <real> wa[i], <real> wb[i])


def bilinear_residual(const float[::1] grid, const index[::1] k00, const float[::1] wa,
                      const float[::1] wb, const unsigned char[::1] outside, Py_ssize_t row,
                      const float[::1] z, const unsigned char[::1] inside, float[::1] resid,
                      float[::1] picked):
    """``resid = z - bilinear(grid)`` (float32, NaN outside: :func:`bilinear`'s values, then
    one float32 subtraction) and, in point order, the residuals of the points with
    ``inside`` set copied to the front of ``picked`` (``numpy.compress``); returns how many
    were picked."""
    cdef Py_ssize_t n = k00.shape[0], i, m = 0
    cdef float value
    if wa.shape[0] != n or wb.shape[0] != n or outside.shape[0] != n or z.shape[0] != n \
            or inside.shape[0] != n or resid.shape[0] != n or picked.shape[0] < n:
        raise ValueError("the point arrays must have the same length")
    _check_corners(k00, row, grid.shape[0])
    if n == 0:
        return 0
    cdef const float *g = &grid[0]
    with nogil:
        for i in range(n):
            value = NAN if outside[i] else _bilinear_at(g, k00[i], row, wa[i], wb[i])
            value = z[i] - value
            resid[i] = value
            # written every time, kept by the count (no branch on the points' order)
            picked[m] = value
            m += inside[i] != 0
    return m


cdef inline uint32_t _order_key(float v) noexcept nogil:
    """A key whose unsigned order is the order of the float32 values (-0 before +0)."""
    cdef uint32_t bits
    memcpy(&bits, &v, 4)  # the float's bits (a copy: no aliasing through a cast pointer)
    if bits & 0x80000000u:
        return ~bits
    return bits | 0x80000000u


cdef inline float _from_key(uint32_t key) noexcept nogil:
    cdef uint32_t bits
    if key & 0x80000000u:
        bits = key & 0x7FFFFFFFu
    else:
        bits = ~key
    cdef float value
    memcpy(&value, &bits, 4)
    return value


cdef inline float _value(const float[::1] v, Py_ssize_t i, float center,
                         bint centred) noexcept nogil:
    """The value the median is taken of: ``v[i]``, or ``|v[i] - center|`` when ``centred``."""
    if centred:
        return fabsf(v[i] - center)
    return v[i]


cdef uint32_t _select(const float[::1] v, float center, bint centred, Py_ssize_t rank,
                      int64_t *high, int64_t *low) noexcept nogil:
    """Key of the value of 0-based ``rank`` in sorted order (``high``: the histogram of the
    keys' upper 16 bits, filled; ``low``: 65536 counts of scratch)."""
    cdef Py_ssize_t n = v.shape[0], i
    cdef int64_t seen = 0
    cdef uint32_t bucket = 0, key
    while seen + high[bucket] <= rank:
        seen += high[bucket]
        bucket += 1
    for i in range(65536):
        low[i] = 0
    for i in range(n):
        key = _order_key(_value(v, i, center, centred))
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
    float32 (numpy's mean of the one or two, summed from +0.0: a median of -0.0 is +0.0);
    NaN when any value is NaN or there are none.

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
            x = _value(v, i, center, centred)
            if x != x:
                nan = True
                break
            high[_order_key(x) >> 16] += 1
        if not nan:
            # numpy's mean of the middle value(s): a sum from +0.0, then the division
            a = _from_key(_select(v, center, centred, (n - 1) // 2, high, low))
            result = <float> 0.0
            result = result + a
            if n % 2 == 0:
                b = _from_key(_select(v, center, centred, n // 2, high, low))
                result = result + b
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
    _check_cells(cell, m)
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
    _check_cells(cell, m)
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
    _check_cells(cell, m)
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


def jacobi_sweep(const real[:, ::1] buf, real[:, ::1] nxt, const unsigned char[:, ::1] free,
                 const int64_t[:, ::1] boxes):
    """One Jacobi sweep of the Laplace equation on the free cells inside ``boxes``.

    ``buf`` and ``nxt`` carry a one-cell border (shape of ``free`` + 2); for every free cell
    (i, j) of a box (rows r0:r1, columns c0:c1) ``nxt[i+1, j+1]`` becomes
    ``(((up + down) + left) + right) * 0.25`` of ``buf``, in the grids' precision — the numpy
    form's operations in its order.
    """
    cdef Py_ssize_t n_u = free.shape[0], n_v = free.shape[1], b, i, j
    if buf.shape[0] != n_u + 2 or buf.shape[1] != n_v + 2 or nxt.shape[0] != n_u + 2 \
            or nxt.shape[1] != n_v + 2:
        raise ValueError("buf and nxt must be the free mask's shape plus a one-cell border")
    if boxes.shape[1] != 4:
        raise ValueError("boxes must have 4 columns (r0, r1, c0, c1)")
    for b in range(boxes.shape[0]):
        if not (0 <= boxes[b, 0] <= boxes[b, 1] <= n_u and 0 <= boxes[b, 2] <= boxes[b, 3] <= n_v):
            raise IndexError("a box lies outside the grid")
    cdef real quarter = 0.25
    cdef real avg
    cdef Py_ssize_t r0, r1, c0, c1
    with nogil:
        for b in range(boxes.shape[0]):
            r0 = boxes[b, 0]
            r1 = boxes[b, 1]
            c0 = boxes[b, 2]
            c1 = boxes[b, 3]
            for i in range(r0, r1):
                for j in range(c0, c1):
                    if free[i, j]:
                        avg = buf[i, j + 1] + buf[i + 2, j + 1]
                        avg = avg + buf[i + 1, j]
                        avg = avg + buf[i + 1, j + 2]
                        nxt[i + 1, j + 1] = avg * quarter


def sym3_prepare(const double[:, ::1] cov, double[::1] q, double[::1] p, double[::1] c):
    """First half of the closed-form eigenvalues of symmetric 3 × 3 matrices (Smith 1961).

    ``cov`` rows hold (xx, xy, xz, yy, yz, zz). Per row: ``q = tr A / 3``,
    ``p = sqrt(|A - q I|_F² / 6)`` and ``c = clip(det((A - q I) / p) / 2, -1, 1)`` (``p`` taken
    as 1 where it is 0). :func:`clearaudit.classify.features.sym3_eigen` takes
    ``phi = arccos(c) / 3`` and the cosines with numpy, then :func:`sym3_pairs`.
    """
    cdef Py_ssize_t m = cov.shape[0], i
    if cov.shape[1] != 6 or q.shape[0] != m or p.shape[0] != m or c.shape[0] != m:
        raise ValueError("cov must be (m, 6) and q, p, c of length m")
    cdef double xx, xy, xz, yy, yz, zz, qq, axx, ayy, azz, pp, inv
    cdef double bxx, byy, bzz, bxy, bxz, byz, det
    with nogil:
        for i in range(m):
            xx = cov[i, 0]
            xy = cov[i, 1]
            xz = cov[i, 2]
            yy = cov[i, 3]
            yz = cov[i, 4]
            zz = cov[i, 5]
            qq = ((xx + yy) + zz) / 3.0
            axx = xx - qq
            ayy = yy - qq
            azz = zz - qq
            pp = sqrt((((axx * axx + ayy * ayy) + azz * azz)
                       + 2.0 * ((xy * xy + xz * xz) + yz * yz)) / 6.0)
            inv = 1.0 / (pp if pp > 0 else 1.0)
            bxx = axx * inv
            byy = ayy * inv
            bzz = azz * inv
            bxy = xy * inv
            bxz = xz * inv
            byz = yz * inv
            det = ((bxx * (byy * bzz - byz * byz) - bxy * (bxy * bzz - byz * bxz))
                   + bxz * (bxy * byz - byy * bxz))
            det = det / 2.0
            if det < -1.0:
                det = -1.0
            elif det > 1.0:
                det = 1.0
            q[i] = qq
            p[i] = pp
            c[i] = det


cdef inline void _longer_cross(double u0, double u1, double u2, double w0, double w1,
                               double w2, double *best, bint first) noexcept nogil:
    """``u × w`` into ``best[0:3]`` (its squared length into ``best[3]``) when it is the
    ``first`` or longer than the vector already there (the first longest stays on ties)."""
    cdef double x0 = u1 * w2 - u2 * w1
    cdef double x1 = u2 * w0 - u0 * w2
    cdef double x2 = u0 * w1 - u1 * w0
    cdef double n2 = (x0 * x0 + x2 * x2) + x1 * x1
    if first or n2 > best[3]:
        best[0] = x0
        best[1] = x1
        best[2] = x2
        best[3] = n2


cdef inline bint _vector(double xx, double xy, double xz, double yy, double yz, double zz,
                         double lam, double *out) noexcept nogil:
    """Unit eigenvector of ``lam``: the longest cross product of two rows of ``A - lam I``
    (rows a × b, a × c, b × c in that order; the first longest on ties); False where it is
    not resolved."""
    cdef double a0 = xx - lam, a1 = xy, a2 = xz
    cdef double b0 = xy, b1 = yy - lam, b2 = yz
    cdef double c0 = xz, c1 = yz, c2 = zz - lam
    cdef double best[4]
    _longer_cross(a0, a1, a2, b0, b1, b2, best, True)
    _longer_cross(a0, a1, a2, c0, c1, c2, best, False)
    _longer_cross(b0, b1, b2, c0, c1, c2, best, False)
    cdef double scale = ((((a0 * a0 + a2 * a2) + a1 * a1) + ((b0 * b0 + b2 * b2) + b1 * b1))
                         + ((c0 * c0 + c2 * c2) + c1 * c1))
    cdef bint ok = best[3] > (1e-18 * scale) * scale + 1e-300
    cdef double norm = sqrt(best[3] if ok else 1.0)
    out[0] = best[0] / norm
    out[1] = best[1] / norm
    out[2] = best[2] / norm
    return ok


def sym3_pairs(const double[:, ::1] cov, const double[::1] q, const double[::1] p,
               const double[::1] cos_large, const double[::1] cos_small, double[:, ::1] values,
               double[:, ::1] v_small, double[:, ::1] v_large, unsigned char[::1] bad):
    """Second half: the eigenvalues (ascending) and the unit eigenvectors of the extreme ones.

    Per row: the largest and smallest eigenvalues ``q + 2 p cos``, the middle one
    ``3 q - large - small``, and the eigenvectors of the extreme ones (:func:`_vector`);
    ``bad`` where a vector is not resolved (a repeated extreme eigenvalue or a zero matrix:
    the caller redoes those rows with a general solver).
    """
    cdef Py_ssize_t m = cov.shape[0], i
    if cov.shape[1] != 6 or q.shape[0] != m or p.shape[0] != m or cos_large.shape[0] != m \
            or cos_small.shape[0] != m or bad.shape[0] != m:
        raise ValueError("the row arrays must have the same length")
    if values.shape[0] != m or v_small.shape[0] != m or v_large.shape[0] != m \
            or values.shape[1] != 3 or v_small.shape[1] != 3 or v_large.shape[1] != 3:
        raise ValueError("values and vectors must be (m, 3)")
    cdef double two_p, large, small
    cdef bint ok_s, ok_l
    with nogil:
        for i in range(m):
            two_p = 2.0 * p[i]
            large = q[i] + two_p * cos_large[i]
            small = q[i] + two_p * cos_small[i]
            values[i, 0] = small
            values[i, 1] = (3.0 * q[i] - large) - small
            values[i, 2] = large
            ok_s = _vector(cov[i, 0], cov[i, 1], cov[i, 2], cov[i, 3], cov[i, 4], cov[i, 5],
                           small, &v_small[i, 0])
            ok_l = _vector(cov[i, 0], cov[i, 1], cov[i, 2], cov[i, 3], cov[i, 4], cov[i, 5],
                           large, &v_large[i, 0])
            bad[i] = not (ok_s and ok_l)

def cell_sums3(const int64_t[::1] cell, const double[:] z, const float[:] fu, const float[:] fv,
               double[::1] sum_z, double[::1] sum_u, double[::1] sum_v, int64_t[::1] count):
    """Points per cell and the per-cell sums of ``z``, ``fu`` and ``fv`` in one pass.

    Each sum starts at zero and adds the points in point order (``numpy.bincount``'s order,
    the float32 values widened to float64 as bincount widens them): the same sums as three
    weighted bincounts and a count.
    """
    cdef Py_ssize_t n = cell.shape[0], m = count.shape[0], i
    if z.shape[0] != n or fu.shape[0] != n or fv.shape[0] != n:
        raise ValueError("the point arrays must have the same length")
    if sum_z.shape[0] != m or sum_u.shape[0] != m or sum_v.shape[0] != m:
        raise ValueError("the per-cell arrays must have the same length")
    _check_cells(cell, m)
    cdef int64_t c
    with nogil:
        for i in range(m):
            sum_z[i] = 0.0
            sum_u[i] = 0.0
            sum_v[i] = 0.0
            count[i] = 0
        for i in range(n):
            c = cell[i]
            sum_z[c] += z[i]
            sum_u[c] += <double> fu[i]
            sum_v[c] += <double> fv[i]
            count[c] += 1


def cell_extreme(const index[::1] cell, const double[:] values, double[::1] out, bint largest):
    """``numpy.minimum.at(out, cell, values)`` (or ``maximum.at`` when ``largest``) in one pass.

    numpy's scalar rule, point by point in order: the current value stays when it is smaller
    (larger) or NaN, else the point's value takes its place — so NaN propagates and, among
    equal values, the later one is kept, as with numpy.
    """
    cdef Py_ssize_t n = cell.shape[0], m = out.shape[0], i
    if values.shape[0] != n:
        raise ValueError("cell and values must have the same length")
    _check_cells(cell, m)
    cdef Py_ssize_t c
    cdef double v, cur, keep
    # the rule written as selects, not branches (the compiler makes them conditional moves):
    # a branch on data in no order was mispredicted so often that a tile's minimum of 1.6 M
    # heights over 160 000 cells took 6.1 ms, the selects 1.6 ms; every cell is stored to
    # (with its own value where it stays)
    with nogil:
        for i in range(n):
            c = cell[i]
            v = values[i]
            cur = out[c]
            keep = v
            if (cur > v) if largest else (cur < v):  # loop-invariant: well predicted
                keep = cur
            if cur != cur:
                keep = cur
            out[c] = keep


ctypedef fused rank:
    int32_t
    int64_t


def occupied_ranks(const index[::1] flat, rank[::1] position, int64_t[::1] k):
    """Rank the cells holding points and give every point its cell's rank, in three passes.

    ``position`` (one entry per cell of the grid) receives each occupied cell's rank among
    the occupied cells in cell order (0, 1, …) and -1 elsewhere; ``k[i]`` the rank of the
    cell of point ``i`` (``flat[i]``). Returns the number of occupied cells. The same as
    marking ``occupied[flat] = True``, ranking ``flatnonzero(occupied)`` and gathering
    ``position[flat]`` with numpy; raises ``IndexError`` for a cell number outside the grid.
    """
    cdef Py_ssize_t n = flat.shape[0], size = position.shape[0], i, c
    cdef int64_t m = 0
    cdef bint outside = False
    if k.shape[0] != n:
        raise ValueError("occupied_ranks: k needs one entry per point")
    with nogil:
        for c in range(size):
            position[c] = 0
        for i in range(n):
            c = flat[i]
            if c < 0 or c >= size:
                outside = True
                break
            position[c] = 1
        if not outside:
            for c in range(size):
                if position[c]:
                    position[c] = <rank> m
                    m += 1
                else:
                    position[c] = -1
            for i in range(n):
                k[i] = position[flat[i]]
    if outside:
        raise IndexError("a point's cell is outside the cells")
    return m


def hypot_within(const double[:] x, const double[:] y, double limit, unsigned char[::1] out):
    """``out = numpy.hypot(x, y) <= limit`` without the hypotenuse where it cannot matter.

    numpy's hypot is libm's ``hypot`` (16 ns an element here). The sum of squares decides
    wherever it lies more than 1e-12 (relative) from ``limit ** 2``: its rounding error is a
    few 1e-16 and libm's hypot is within one ulp, so the answer is the same there; in the
    band between, and for NaN, libm's ``hypot`` itself decides. ``limit`` must lie in
    [1e-150, 1e150] (its square neither underflows nor overflows; the caller passes other
    limits to numpy).
    """
    cdef Py_ssize_t n = x.shape[0], i
    if y.shape[0] != n or out.shape[0] != n:
        raise ValueError("hypot_within: x, y and out must have the same length")
    if not (1e-150 <= limit <= 1e150):
        raise ValueError("hypot_within: the limit must lie in [1e-150, 1e150]")
    cdef double lo2 = limit * limit * (1.0 - 1e-12), hi2 = limit * limit * (1.0 + 1e-12), q
    with nogil:
        for i in range(n):
            q = x[i] * x[i] + y[i] * y[i]
            if q <= lo2:
                out[i] = 1
            elif q > hi2:
                out[i] = 0
            else:
                out[i] = hypot(x[i], y[i]) <= limit
    return None


cdef Py_ssize_t _record_count(const unsigned char[::1] raw, Py_ssize_t m, double[:, ::1] xyz,
                              unsigned char[::1] cls, int64_t[::1] key, Py_ssize_t at
                              ) except -1:
    """Records in ``raw`` (whole 33-byte records), after checking that ``m`` rows from
    ``at`` fit ``xyz``, ``cls`` and ``key``."""
    cdef Py_ssize_t n = raw.shape[0] // 33
    if raw.shape[0] != n * 33:
        raise ValueError("the bytes are not whole 33-byte tile records")
    if xyz.shape[1] != 3 or at < 0 or at + m > xyz.shape[0] or at + m > cls.shape[0] \
            or at + m > key.shape[0]:
        raise ValueError("the tile records do not fit the arrays")
    return n


cdef inline void _split_record(const unsigned char *q, double[:, ::1] xyz,
                               unsigned char[::1] cls, int64_t[::1] key,
                               Py_ssize_t row) noexcept nogil:
    """One packed record's x, y, z, class and key into row ``row`` of the arrays."""
    memcpy(&xyz[row, 0], q, 24)
    cls[row] = q[24]
    memcpy(&key[row], q + 25, 8)


def unpack_records(const unsigned char[::1] raw, double[:, ::1] xyz, unsigned char[::1] cls,
                   int64_t[::1] key, Py_ssize_t at):
    """Split packed 33-byte tile records (x, y, z float64, class uint8, key int64, little
    endian, no padding: ``tiling.RECORD``) into ``xyz[at:]``, ``cls[at:]`` and ``key[at:]``
    in one pass (numpy copies a structured array's fields one after the other, each with
    its own strided walk). The bytes are copied as they lie, as numpy's copies of the opaque
    fields did (little endian records into native arrays: the x86-64 and ARM64 hosts
    clearaudit runs on)."""
    cdef Py_ssize_t n = _record_count(raw, raw.shape[0] // 33, xyz, cls, key, at), i
    with nogil:
        for i in range(n):
            _split_record(&raw[i * 33], xyz, cls, key, at + i)
    return None


def unpack_records_at(const unsigned char[::1] raw, const int64_t[::1] positions,
                      double[:, ::1] xyz, unsigned char[::1] cls, int64_t[::1] key,
                      Py_ssize_t at):
    """``unpack_records`` of the records at ``positions`` (record numbers within ``raw``)
    only: the picked records gathered and split in one pass, without a gathered copy of
    them between."""
    cdef Py_ssize_t m = positions.shape[0], i
    cdef Py_ssize_t n = _record_count(raw, m, xyz, cls, key, at)
    cdef int64_t p
    cdef bint bad = False
    with nogil:
        for i in range(m):
            p = positions[i]
            if p < 0 or p >= n:
                bad = True
                break
            _split_record(&raw[p * 33], xyz, cls, key, at + i)
    if bad:
        raise IndexError("unpack_records_at: a position beyond the records")
    return None


cdef inline double _maximum(double a, double b) noexcept nogil:
    """numpy.maximum's rule: ``a`` when it is above ``b`` or is NaN, else ``b`` (so of
    -0.0 and 0.0 the second, as numpy gives)."""
    return a if (a > b or a != a) else b


def eigen_rows(const double[:, ::1] vals, const double[:, ::1] v_small,
               const double[:, ::1] v_large, const int32_t[::1] cnt, const int64_t[::1] at,
               double[::1] lin, double[::1] pla, double[::1] sca, double[::1] ver,
               double[:, ::1] direction, double[:, ::1] normal, int32_t[::1] count):
    """The eigen features of a chunk of neighbourhoods, written to their rows ``at``.

    With ``l1 = vals[:, 2]``, ``l2, l3 = maximum(vals[:, 1], 0), maximum(vals[:, 0], 0)``
    and ``ok = l1 > 1e-12``: linearity ``(l1 - l2) / l1``, planarity ``(l2 - l3) / l1``,
    scattering ``l3 / l1``, verticality ``1 - |v_small[:, 2]|`` (0 where not ``ok``), the
    direction ``v_large``, the normal ``v_small`` and the count — the operations of the
    numpy form (``features._features``) in its order, one pass instead of fifteen.
    """
    cdef Py_ssize_t n = vals.shape[0], i, r, m = lin.shape[0]
    cdef double l1, l2, l3, safe
    cdef bint ok
    if vals.shape[1] != 3 or v_small.shape[0] != n or v_large.shape[0] != n \
            or v_small.shape[1] != 3 or v_large.shape[1] != 3 or cnt.shape[0] != n \
            or at.shape[0] != n:
        raise ValueError("eigen_rows: one row of values, vectors, count and place per point")
    if pla.shape[0] != m or sca.shape[0] != m or ver.shape[0] != m or count.shape[0] != m \
            or direction.shape[0] != m or normal.shape[0] != m or direction.shape[1] != 3 \
            or normal.shape[1] != 3:
        raise ValueError("eigen_rows: the output arrays must have the same rows")
    _check_cells(at, m)
    with nogil:
        for i in range(n):
            r = at[i]
            l1 = vals[i, 2]
            l2 = _maximum(vals[i, 1], 0.0)
            l3 = _maximum(vals[i, 0], 0.0)
            ok = l1 > 1e-12
            safe = l1 if ok else 1.0
            lin[r] = (l1 - l2) / safe if ok else 0.0
            pla[r] = (l2 - l3) / safe if ok else 0.0
            sca[r] = l3 / safe if ok else 0.0
            direction[r, 0] = v_large[i, 0]
            direction[r, 1] = v_large[i, 1]
            direction[r, 2] = v_large[i, 2]
            normal[r, 0] = v_small[i, 0]
            normal[r, 1] = v_small[i, 1]
            normal[r, 2] = v_small[i, 2]
            ver[r] = 1.0 - fabs(v_small[i, 2]) if ok else 0.0
            count[r] = cnt[i]
    return None


def gather_columns(const double[:, :] xyz, const index[::1] rows, double[::1] x,
                   double[::1] y, double[::1] z):
    """``x, y, z = xyz[rows, 0], xyz[rows, 1], xyz[rows, 2]`` in one pass: the rows' three
    columns gathered straight into their own arrays (no gathered (n, 3) array between).

    ``rows`` holds row numbers in ``[0, len(xyz))``; ``x``, ``y``, ``z`` one entry per row.
    """
    cdef Py_ssize_t n = rows.shape[0], m = xyz.shape[0], i, r
    if xyz.shape[1] != 3:
        raise ValueError("gather_columns: xyz must have three columns")
    if x.shape[0] != n or y.shape[0] != n or z.shape[0] != n:
        raise ValueError("gather_columns: x, y and z need one entry per row")
    _check_cells(rows, m)
    with nogil:
        for i in range(n):
            r = rows[i]
            x[i] = xyz[r, 0]
            y[i] = xyz[r, 1]
            z[i] = xyz[r, 2]


def isolated_in_block(const index[::1] keys, Py_ssize_t n_voxels, Py_ssize_t n_y,
                      Py_ssize_t n_z, Py_ssize_t min_neighbours, unsigned char[::1] out):
    """For every point of voxel number ``keys[i]`` (``(i * n_y + j) * n_z + k`` with a border
    voxel on every side of the occupied ones), whether fewer than ``min_neighbours`` other
    points lie in its 3 × 3 × 3 block of voxels: the points of every voxel counted in one
    pass, then each point of a voxel that is itself sparse sums its block's 27 counts (the
    counts and sums of ``noise._isolated_dense``'s numpy form, per point).

    The counts are bytes that stop at 255 (one byte a voxel; the pages of voxels no point
    comes near are never touched): a voxel or a block that reaches 255 holds at least 255
    points, more than ``min_neighbours`` (at most 254), so the answers are those of exact
    counts."""
    cdef Py_ssize_t n = keys.shape[0], i, a, b, c
    cdef int64_t k, total
    cdef int64_t off[27]
    if out.shape[0] != n or n_voxels < 1 or n_y < 3 or n_z < 3:
        raise ValueError("isolated_in_block: mismatched shapes")
    if min_neighbours > 254:
        raise ValueError("isolated_in_block: at most 254 neighbours (byte counts)")
    c = 0
    for a in range(-1, 2):
        for b in range(-1, 2):
            for i in range(-1, 2):
                off[c] = (a * n_y + b) * n_z + i
                c += 1
    for i in range(n):  # every neighbour number valid: the occupied voxels lie off the border
        if keys[i] + off[0] < 0 or keys[i] + off[26] >= n_voxels:
            raise IndexError("isolated_in_block: a voxel lies on the border of the block")
    cdef unsigned char *counts = <unsigned char *> calloc(n_voxels, 1)
    if not counts:
        raise MemoryError()
    with nogil:
        for i in range(n):
            k = keys[i]
            if counts[k] != 255:
                counts[k] += 1
        for i in range(n):
            k = keys[i]
            if counts[k] - 1 >= min_neighbours:
                out[i] = 0
                continue
            total = 0
            for c in range(27):
                total += counts[k + off[c]]
            out[i] = total - 1 < min_neighbours
    free(counts)


def locate_cells(const double[:, :] xy, double c0, double c1, double cu, double cv,
                 double du, double dv, double su, double sv, float[::1] fu, float[::1] fv):
    """Fractional cell coordinates of points in a rotated grid frame (``GridFrame.locate``):
    ``fu = dx cu + dy cv - su`` and ``fv = dx du + dy dv - sv`` with ``dx = x - c0``,
    ``dy = y - c1``, in float64 in that order, each rounded to float32 once."""
    cdef Py_ssize_t n = xy.shape[0], i
    cdef double dx, dy, acc
    if xy.shape[1] < 2 or fu.shape[0] != n or fv.shape[0] != n:
        raise ValueError("locate_cells: mismatched shapes")
    with nogil:
        for i in range(n):
            dx = xy[i, 0] - c0
            dy = xy[i, 1] - c1
            acc = dx * cu
            acc = acc + dy * cv
            acc = acc - su
            fu[i] = <float>acc
            acc = dx * du
            acc = acc + dy * dv
            acc = acc - sv
            fv[i] = <float>acc


cdef inline float _clip_f32(float t, float top) noexcept nogil:
    """numpy.clip(t, 0, top) of a float32 (NaN stays NaN)."""
    if t < 0:
        t = 0
    if t > top:
        t = top
    return t


def flat_cells(const float[::1] fu, const float[::1] fv, int64_t n_u, int64_t n_v,
               index[::1] out):
    """``PointLocation.flat``: ``i * n_v + j`` with ``i = int(clip(fu, 0, n_u - 1))`` and
    ``j = int(clip(fv, 0, n_v - 1))`` (float32 clips, truncation); a NaN coordinate counts
    as 0 (numpy's cast of NaN is undefined)."""
    cdef Py_ssize_t n = fu.shape[0], p
    cdef float top_u = <float>(n_u - 1), top_v = <float>(n_v - 1)
    cdef index i, j
    if fv.shape[0] != n or out.shape[0] != n or n_u < 1 or n_v < 1:
        raise ValueError("flat_cells: mismatched shapes")
    with nogil:
        for p in range(n):
            i = <index>_clip_f32(fu[p], top_u) if fu[p] == fu[p] else 0
            j = <index>_clip_f32(fv[p], top_v) if fv[p] == fv[p] else 0
            out[p] = i * <index>n_v + j


def cell_offsets(double[::1] u, double[::1] v, double cell, int64_t n_u, int64_t n_v,
                 index[::1] flat):
    """The cells of an axis-aligned grid (``n_u`` × ``n_v`` cells of ``cell`` metres, ``u``
    and ``v`` measured from its corner) and each point's offsets from its cell's centre, in
    one pass: ``flat = i n_v + j`` with ``i = clip(int(floor(u / cell)), 0, n_u - 1)``
    (likewise ``j``), then ``u`` and ``v`` overwritten with ``u - (i + 0.5) cell`` and ``v -
    (j + 0.5) cell`` (float64, each operation as numpy rounds it). A coordinate that is not a
    number counts as cell 0 (numpy's cast of NaN is undefined)."""
    cdef Py_ssize_t n = u.shape[0], p
    cdef int64_t i, j
    if v.shape[0] != n or flat.shape[0] != n or n_u < 1 or n_v < 1 or not cell > 0:
        raise ValueError("cell_offsets: mismatched shapes or a cell that is not positive")
    with nogil:
        for p in range(n):
            i = _floor_cell(u[p] / cell, n_u - 1)
            j = _floor_cell(v[p] / cell, n_v - 1)
            flat[p] = <index>(i * n_v + j)
            u[p] = u[p] - (<double>i + 0.5) * cell
            v[p] = v[p] - (<double>j + 0.5) * cell


def sampler_weights(const float[::1] fu, const float[::1] fv, int64_t n_u, int64_t n_v,
                    int64_t m_u, int64_t m_v, unsigned char[::1] outside, index[::1] k00,
                    float[::1] wa, float[::1] wb):
    """``PointLocation._make_sampler``'s bilinear weights in one pass: ``outside`` (a
    coordinate below 0 or above the grid's count), the lower cell centre ``k00 = i0 m_v +
    j0`` and the weights ``wa = u - i0``, ``wb = v - j0`` with ``u = clip(fu - 0.5, 0,
    n_u - 1)``, ``i0 = min(int(u), m_u - 2)`` (likewise ``v``, ``j0``), in float32 as numpy
    computes them. A point with a NaN coordinate is outside (numpy's cast of NaN is
    undefined; its weights here are 0 and its cell 0)."""
    cdef Py_ssize_t n = fu.shape[0], p
    cdef float u, v, fu_p, fv_p, top_u = <float>(n_u - 1), top_v = <float>(n_v - 1)
    cdef float count_u = <float>n_u, count_v = <float>n_v
    cdef index i0, j0, last_i = <index>(m_u - 2), last_j = <index>(m_v - 2)
    if fv.shape[0] != n or outside.shape[0] != n or k00.shape[0] != n or wa.shape[0] != n \
            or wb.shape[0] != n or n_u < 1 or n_v < 1 or m_u < 2 or m_v < 2:
        raise ValueError("sampler_weights: mismatched shapes")
    with nogil:
        for p in range(n):
            fu_p = fu[p]
            fv_p = fv[p]
            if fu_p != fu_p or fv_p != fv_p:
                outside[p] = 1
                k00[p] = 0
                wa[p] = 0
                wb[p] = 0
                continue
            outside[p] = (fu_p < 0) | (fu_p > count_u) | (fv_p < 0) | (fv_p > count_v)
            u = _clip_f32(fu_p - <float>0.5, top_u)
            v = _clip_f32(fv_p - <float>0.5, top_v)
            i0 = <index>u
            if i0 > last_i:
                i0 = last_i
            j0 = <index>v
            if j0 > last_j:
                j0 = last_j
            wa[p] = u - <float>i0
            wb[p] = v - <float>j0
            k00[p] = i0 * <index>m_v + j0


def route_records(const int64_t[::1] cell, Py_ssize_t n_cells, const double[:, ::1] xyz,
                  const unsigned char[::1] cls, const int64_t[::1] key,
                  unsigned char[:, ::1] out, int64_t[::1] first):
    """Tile records (33 bytes: x, y, z float64, class uint8, key int64, packed) of the
    points, cell after cell, each cell's points in input order: the records numpy's
    ``records[argsort(cell, kind="stable")]`` gives, by a counting sort in two passes.

    ``cell`` holds each point's cell number in ``[0, n_cells)``; ``first`` (``n_cells + 1``)
    receives where each cell's records start in ``out`` (the last entry: the point count).
    """
    cdef Py_ssize_t n = cell.shape[0], i, c
    if xyz.shape[0] != n or xyz.shape[1] != 3 or cls.shape[0] != n or key.shape[0] != n:
        raise ValueError("cell, xyz (n, 3), cls and key must describe the same points")
    if out.shape[0] != n or out.shape[1] != 33:
        raise ValueError("out must hold one 33-byte record per point")
    if n_cells < 1 or first.shape[0] != n_cells + 1:
        raise ValueError("first must hold n_cells + 1 entries")
    for i in range(n):
        if cell[i] < 0 or cell[i] >= n_cells:
            raise IndexError("cell number out of range")
    cdef int64_t total = 0, m
    cdef int64_t *at = <int64_t *> malloc(n_cells * sizeof(int64_t))
    if not at:
        raise MemoryError()
    with nogil:
        for c in range(n_cells + 1):
            first[c] = 0
        for i in range(n):
            first[cell[i] + 1] += 1
        for c in range(n_cells):
            total += first[c + 1]
            first[c + 1] = total
            at[c] = first[c]
        for i in range(n):
            c = cell[i]
            m = at[c]
            at[c] = m + 1
            memcpy(&out[m, 0], &xyz[i, 0], 24)
            out[m, 24] = cls[i]
            memcpy(&out[m, 25], &key[i], 8)
    free(at)


def plane_solve(const double[:, ::1] sums, const double[::1] cnt, double min_points,
                double[:, ::1] coef):
    """Least-squares plane coefficients (a, b, c) per cell from :func:`plane_sums`' sums.

    The normal equations ``[[n, sx, sy], [sx, sxx, sxy], [sy, sxy, syy]] (a, b, c) =
    (sz, sxz, syz)`` are solved by Gaussian elimination with partial pivoting (the first
    largest pivot, as LAPACK's dgetf2 chooses it). The values are not always LAPACK's: on
    well-spread cells within about 1e-11 relative, on nearly collinear ones up to about
    1e-10. A cell with fewer than ``min_points`` points, or whose system's determinant (the
    product of the pivots) is at most 1e-9 in magnitude, gets NaN; numpy computes the
    determinant another way (from the logarithms of the pivots), so a cell whose
    determinant lies within rounding of 1e-9 may fall on the other side of it.
    """
    cdef Py_ssize_t m = sums.shape[0], t, i, r, c, p
    if sums.shape[1] != 8 or cnt.shape[0] != m or coef.shape[0] != m or coef.shape[1] != 3:
        raise ValueError("sums (m, 8), cnt (m,) and coef (m, 3) must describe the same cells")
    cdef double a[3][4]
    cdef double f, det, tmp
    with nogil:
        for t in range(m):
            if not (cnt[t] >= min_points):
                coef[t, 0] = NAN
                coef[t, 1] = NAN
                coef[t, 2] = NAN
                continue
            a[0][0] = cnt[t]
            a[0][1] = sums[t, 0]
            a[0][2] = sums[t, 1]
            a[0][3] = sums[t, 2]
            a[1][0] = sums[t, 0]
            a[1][1] = sums[t, 3]
            a[1][2] = sums[t, 5]
            a[1][3] = sums[t, 6]
            a[2][0] = sums[t, 1]
            a[2][1] = sums[t, 5]
            a[2][2] = sums[t, 4]
            a[2][3] = sums[t, 7]
            det = 1.0
            for c in range(3):
                p = c
                for r in range(c + 1, 3):
                    if fabs(a[r][c]) > fabs(a[p][c]):
                        p = r
                if p != c:
                    for i in range(4):
                        tmp = a[c][i]
                        a[c][i] = a[p][i]
                        a[p][i] = tmp
                    det = -det
                det = det * a[c][c]
                if a[c][c] == 0.0:
                    break
                for r in range(c + 1, 3):
                    f = a[r][c] / a[c][c]
                    for i in range(c + 1, 4):
                        a[r][i] = a[r][i] - f * a[c][i]
            if not (fabs(det) > 1e-9):
                coef[t, 0] = NAN
                coef[t, 1] = NAN
                coef[t, 2] = NAN
                continue
            coef[t, 2] = a[2][3] / a[2][2]
            coef[t, 1] = (a[1][3] - a[1][2] * coef[t, 2]) / a[1][1]
            coef[t, 0] = (a[0][3] - a[0][1] * coef[t, 1] - a[0][2] * coef[t, 2]) / a[0][0]


cdef inline int64_t _raster_cell(double t, double u, int64_t n0, int64_t n1) noexcept nogil:
    """The raster cell of a point at ``t``, ``u`` cells (>= 0) from the corner:
    ``min(int(t), n0 - 1) * n1 + min(int(u), n1 - 1)``, numpy's truncation and clamp."""
    cdef int64_t i = <int64_t>t, j = <int64_t>u
    if i > n0 - 1:
        i = n0 - 1
    if j > n1 - 1:
        j = n1 - 1
    return i * n1 + j


def byte_counts(const unsigned char[:] codes, int64_t[::1] counts):
    """Add to ``counts`` (256 entries) the number of each byte value in ``codes``: the same
    integers as ``numpy.bincount(codes, minlength=256)``, without its intp copy of the codes
    and without holding the GIL.

    Four partial tables, one for each of four points in turn, so that a run of equal codes
    does not make each increment wait for the one before it.
    """
    if counts.shape[0] != 256:
        raise ValueError("counts must have 256 entries")
    cdef Py_ssize_t n = codes.shape[0], i, c
    cdef int64_t part[4][256]
    with nogil:
        for i in range(4):
            for c in range(256):
                part[i][c] = 0
        i = 0
        while i + 4 <= n:
            part[0][codes[i]] += 1
            part[1][codes[i + 1]] += 1
            part[2][codes[i + 2]] += 1
            part[3][codes[i + 3]] += 1
            i += 4
        while i < n:
            part[0][codes[i]] += 1
            i += 1
        for c in range(256):
            counts[c] += part[0][c] + part[1][c] + part[2][c] + part[3][c]


def free_boxes(const unsigned char[:, :] is_free, Py_ssize_t height, Py_ssize_t min_gap):
    """``grid._free_boxes``' boxes (rows r0:r1, columns c0:c1, as tuples, in the same order):
    per strip of ``height`` rows the columns holding a free cell (nonzero), their runs, and
    runs less than ``min_gap`` columns apart merged; one pass over the cells without the GIL
    per strip, the runs then read from the strip's column flags."""
    cdef Py_ssize_t n_u = is_free.shape[0], n_v = is_free.shape[1], r0, r1, r, c, c0, last_end, start
    if height < 1:
        raise ValueError("height must be positive")
    cdef unsigned char *column = <unsigned char *> malloc(max(n_v, 1))
    if column == NULL:
        raise MemoryError()
    boxes = []
    try:
        r0 = 0
        while r0 < n_u:
            r1 = min(n_u, r0 + height)
            with nogil:
                for c in range(n_v):
                    column[c] = 0
                for r in range(r0, r1):
                    for c in range(n_v):
                        column[c] |= is_free[r, c] != 0
            # runs [c0, end) of flagged columns; a run that begins min_gap or more columns
            # after the previous run's end opens a new box, else it extends the box
            c = 0
            c0 = -1
            last_end = 0
            while c < n_v:
                if not column[c]:
                    c += 1
                    continue
                start = c
                while c < n_v and column[c]:
                    c += 1
                if c0 < 0:
                    c0 = start
                elif start - last_end >= min_gap:
                    boxes.append((r0, r1, c0, last_end))
                    c0 = start
                last_end = c
            if c0 >= 0:
                boxes.append((r0, r1, c0, last_end))
            r0 = r1
    finally:
        free(column)
    return boxes


def raster_state(const double[:, :] xy, double lo0, double lo1, double size, Py_ssize_t n0,
                 Py_ssize_t n1, const unsigned char[::1] state, unsigned char[::1] out):
    """``out[i] = state[c]`` for the raster cell ``c`` of point ``i`` (one pass).

    The cell is ``min(int((x - lo0) / size), n0 - 1) * n1 + min(int((y - lo1) / size),
    n1 - 1)``, the numpy form of :func:`clearaudit.arrays.near_points` (the same two
    roundings per coordinate). Points below ``lo`` or not finite are refused.
    """
    cdef Py_ssize_t n = xy.shape[0], k
    cdef double t, u
    if xy.shape[1] < 2 or out.shape[0] != n or n0 < 1 or n1 < 1 or state.shape[0] != n0 * n1:
        raise ValueError("raster_state: mismatched array shapes")
    if not size > 0:
        raise ValueError("raster_state: the cell size must be positive")
    cdef bint bad = False
    with nogil:
        for k in range(n):
            t = (xy[k, 0] - lo0) / size
            u = (xy[k, 1] - lo1) / size
            if not (t >= 0 and u >= 0 and t < 9.0e18 and u < 9.0e18):
                bad = True
                break
            out[k] = state[_raster_cell(t, u, n0, n1)]
    if bad:
        raise ValueError("raster_state: a point lies below the raster's corner or is not finite")


cdef inline int64_t _floor_int(double t) noexcept nogil:
    """``int64(floor(t))`` for a finite ``t`` within int64's range, without libm's call:
    the truncation, one less below a negative non-integer."""
    cdef int64_t i = <int64_t>t
    if t < <double>i:
        i -= 1
    return i


cdef inline int64_t _floor_cell(double t, int64_t top) noexcept nogil:
    """``clip(int(floor(t)), 0, top)`` as numpy computes it for a finite ``t`` (the floored
    double cast to an integer, then clipped; :func:`_floor_int` once ``t`` lies in the
    cells, so a value beyond int64's range is never cast); not a number counts as 0."""
    if not t >= 0:  # negative, or not a number
        return 0
    if t >= <double>(top + 1):
        return top
    return _floor_int(t)


cdef inline bint _near_polyline(double px, double py, const double[:, ::1] seg, double b2,
                                int axis, double lo_axis, double per_unit, int64_t n_buckets,
                                const int64_t[::1] bucket_start,
                                const int64_t[::1] bucket_seg) noexcept nogil:
    """Whether the point (``px``, ``py``) lies within ``sqrt(b2)`` of a segment of the
    polyline: the segments listed for its bucket along the sweep axis, each only if the
    point is inside its box grown by the buffer (``seg`` rows: a0, a1, ab0, ab1,
    ab0 * ab0 + ab1 * ab1, box lo0, lo1, hi0, hi1). With ``t = clip(((p0 - a0) ab0 +
    (p1 - a1) ab1) / |ab|^2, 0, 1)``, ``d^2 = (p0 - (a0 + t ab0))^2 + (p1 - (a1 + t ab1))^2``
    (``p - a`` for a segment of zero length) — each operation rounded as the numpy form."""
    cdef double s = ((px if axis == 0 else py) - lo_axis) * per_unit
    cdef int64_t b = <int32_t>s  # numpy's astype(int32): truncation (s >= 0 in the box)
    cdef int64_t q, k
    cdef double t, dx, dy
    if b > n_buckets - 1:
        b = n_buckets - 1
    for q in range(bucket_start[b], bucket_start[b + 1]):
        k = bucket_seg[q]
        if not (px >= seg[k, 5] and px <= seg[k, 7] and py >= seg[k, 6] and py <= seg[k, 8]):
            continue
        if seg[k, 4] > 0.0:
            t = ((px - seg[k, 0]) * seg[k, 2] + (py - seg[k, 1]) * seg[k, 3]) / seg[k, 4]
            if t < 0.0:
                t = 0.0
            elif t > 1.0:
                t = 1.0
            dx = px - (seg[k, 0] + t * seg[k, 2])
            dy = py - (seg[k, 1] + t * seg[k, 3])
        else:
            dx = px - seg[k, 0]
            dy = py - seg[k, 1]
        dx = dx * dx
        dy = dy * dy
        if dx + dy <= b2:
            return True
    return False


cdef int _check_polyline(const double[:, ::1] seg, int axis, int64_t n_buckets,
                         const int64_t[::1] bucket_start, const int64_t[::1] bucket_seg,
                         str name) except -1:
    cdef Py_ssize_t q
    if seg.shape[1] != 9 or axis not in (0, 1) or n_buckets < 1 or \
            bucket_start.shape[0] != n_buckets + 1 or bucket_start[0] != 0 or \
            bucket_start[n_buckets] != bucket_seg.shape[0]:
        raise ValueError(f"{name}: mismatched polyline arrays")
    for q in range(n_buckets):
        if bucket_start[q + 1] < bucket_start[q]:
            raise ValueError(f"{name}: bucket starts must not decrease")
    for q in range(bucket_seg.shape[0]):
        if bucket_seg[q] < 0 or bucket_seg[q] >= seg.shape[0]:
            raise IndexError(f"{name}: a bucket lists a segment that does not exist")
    return 0


def corridor_exact(const double[:, :] xy, const int64_t[::1] at, const double[:, ::1] seg,
                   double b2, int axis, double lo_axis, double per_unit, int64_t n_buckets,
                   const int64_t[::1] bucket_start, const int64_t[::1] bucket_seg,
                   unsigned char[::1] out):
    """``out[i]``: whether point ``xy[at[i]]`` [CRS unit] (inside the corridor's box) lies
    within the buffer of the polyline (:func:`_near_polyline`; the polyline's data as
    :func:`clearaudit.io.las.corridor_mask` prepares them)."""
    cdef Py_ssize_t n = at.shape[0], i, m = xy.shape[0]
    _check_polyline(seg, axis, n_buckets, bucket_start, bucket_seg, "corridor_exact")
    if out.shape[0] != n or xy.shape[1] < 2:
        raise ValueError("corridor_exact: mismatched array shapes")
    for i in range(n):
        if at[i] < 0 or at[i] >= m:
            raise IndexError("corridor_exact: a position beyond the points")
    with nogil:
        for i in range(n):
            out[i] = _near_polyline(xy[at[i], 0], xy[at[i], 1], seg, b2, axis, lo_axis,
                                    per_unit, n_buckets, bucket_start, bucket_seg)


def chunk_points(const int32_t[:] X, const int32_t[:] Y, const int32_t[:] Z,
                 const unsigned char[:] cls, const unsigned char[:] withheld,
                 const int64_t[::1] k, const double[::1] scale, const double[::1] r,
                 const double[::1] unit, double ox, double oy, int64_t position,
                 bint corridor, double lo0, double lo1, double hi0, double hi1, double cell,
                 int64_t n0, int64_t n1, const unsigned char[::1] cell_state,
                 const double[:, ::1] seg, double b2, int axis, double lo_axis,
                 double per_unit, int64_t n_buckets, const int64_t[::1] bucket_start,
                 const int64_t[::1] bucket_seg, double gx0, double gy0, double grid_cell,
                 double[:, ::1] xyz, unsigned char[::1] out_cls, int64_t[::1] index,
                 int64_t[::1] ci, int64_t[::1] cj):
    """One decoded chunk's kept points in local metres with their class, point index and
    grid cell, in one pass (the streaming reader's chunk step, see
    :func:`clearaudit.io.las.read_range`).

    Per point: ``local = (X - k) * scale (+ r)`` per axis (:meth:`clearaudit.io.las._Shift.
    local`). With ``corridor``, the CRS position ``local + origin`` is kept only inside the
    corridor's box (:func:`clearaudit.io.las.corridor_mask`), in a kept raster cell, or in a
    cell straddling the buffer's edge and within the buffer (:func:`corridor_exact`'s test).
    A point flagged ``withheld`` (an empty array: none) is never kept. A kept point's
    ``xyz`` is ``local * unit`` per axis, its ``index`` ``position + i``, its cell
    ``floor((x - gx0) / grid_cell)``, ``floor((y - gy0) / grid_cell)``
    (:meth:`clearaudit.tiling.Grid.cells`). Returns ``(kept, withheld)``: the points written
    (in input order) and the points the corridor kept that were withheld.
    """
    cdef Py_ssize_t n = X.shape[0], i, m = 0, held = 0
    cdef double x, y, z, cx, cy
    cdef unsigned char st
    cdef bint any_held = withheld.shape[0] != 0
    if Y.shape[0] != n or Z.shape[0] != n or cls.shape[0] != n or \
            (any_held and withheld.shape[0] != n):
        raise ValueError("chunk_points: mismatched point arrays")
    if k.shape[0] != 3 or scale.shape[0] != 3 or r.shape[0] != 3 or unit.shape[0] != 3:
        raise ValueError("chunk_points: k, scale, r and unit hold three values")
    if xyz.shape[0] < n or xyz.shape[1] != 3 or out_cls.shape[0] < n or index.shape[0] < n \
            or ci.shape[0] < n or cj.shape[0] < n:
        raise ValueError("chunk_points: the outputs are shorter than the chunk")
    if not grid_cell > 0:
        raise ValueError("chunk_points: the grid's cell size must be positive")
    if corridor:
        if n0 < 1 or n1 < 1 or cell_state.shape[0] != n0 * n1 or not cell > 0:
            raise ValueError("chunk_points: mismatched corridor raster")
        _check_polyline(seg, axis, n_buckets, bucket_start, bucket_seg, "chunk_points")
    with nogil:
        for i in range(n):
            x = <double>(<int64_t>X[i] - k[0]) * scale[0]
            if r[0] != 0.0:
                x = x + r[0]
            y = <double>(<int64_t>Y[i] - k[1]) * scale[1]
            if r[1] != 0.0:
                y = y + r[1]
            if corridor:
                cx = x + ox
                cy = y + oy
                if not (cx >= lo0 and cx <= hi0 and cy >= lo1 and cy <= hi1):
                    continue
                st = cell_state[_raster_cell((cx - lo0) / cell, (cy - lo1) / cell, n0, n1)]
                if st == 0:
                    continue
                if st == 2 and not _near_polyline(cx, cy, seg, b2, axis, lo_axis, per_unit,
                                                   n_buckets, bucket_start, bucket_seg):
                    continue
            if any_held and withheld[i]:
                held += 1
                continue
            z = <double>(<int64_t>Z[i] - k[2]) * scale[2]
            if r[2] != 0.0:
                z = z + r[2]
            x = x * unit[0]
            y = y * unit[1]
            xyz[m, 0] = x
            xyz[m, 1] = y
            xyz[m, 2] = z * unit[2]
            out_cls[m] = cls[i]
            index[m] = position + i
            ci[m] = _floor_int((x - gx0) / grid_cell)
            cj[m] = _floor_int((y - gy0) / grid_cell)
            m += 1
    return m, held


def record_int_bounds(const unsigned char[::1] raw, Py_ssize_t itemsize, int64_t[::1] lo,
                      int64_t[::1] hi):
    """Smallest and largest of the integer X, Y, Z (int32 at bytes 0, 4 and 8 of each
    ``itemsize``-byte LAS point record, every point format) of packed records, written to
    ``lo`` and ``hi`` (length 3); one pass, read in place. No records: ``lo`` > ``hi``."""
    cdef Py_ssize_t n, i, a
    cdef int32_t v[3]
    cdef int64_t mn[3]
    cdef int64_t mx[3]
    if itemsize < 12 or raw.shape[0] % itemsize != 0:
        raise ValueError("record_int_bounds: the bytes are not whole records of X, Y, Z, ...")
    if lo.shape[0] != 3 or hi.shape[0] != 3:
        raise ValueError("record_int_bounds: lo and hi hold three values")
    n = raw.shape[0] // itemsize
    for a in range(3):
        mn[a] = 2147483647
        mx[a] = -2147483648
    with nogil:
        for i in range(n):
            memcpy(&v[0], &raw[i * itemsize], 12)
            for a in range(3):
                if v[a] < mn[a]:
                    mn[a] = v[a]
                if v[a] > mx[a]:
                    mx[a] = v[a]
    for a in range(3):
        lo[a] = mn[a]
        hi[a] = mx[a]


def records_in_box(const unsigned char[::1] raw, Py_ssize_t itemsize, double lo0, double lo1,
                   double hi0, double hi1, int64_t[::1] out):
    """Positions of the packed records whose x, y (float64 at bytes 0 and 8 of each
    ``itemsize``-byte record) satisfy ``lo0 <= x < hi0`` and ``lo1 <= y < hi1``, ascending,
    written to ``out``; returns how many. The records are read in place (a memory-mapped
    file), with no copy of their coordinates."""
    cdef Py_ssize_t n, i, m = 0
    cdef double x, y
    if itemsize < 16 or raw.shape[0] % itemsize != 0:
        raise ValueError("records_in_box: the bytes are not whole records of x, y, ...")
    n = raw.shape[0] // itemsize
    if out.shape[0] < n:
        raise ValueError("records_in_box: the output is shorter than the records")
    with nogil:
        for i in range(n):
            memcpy(&x, &raw[i * itemsize], 8)
            memcpy(&y, &raw[i * itemsize + 8], 8)
            # written every time, kept by the count (no branch on the points' order)
            out[m] = i
            m += (x >= lo0) & (x < hi0) & (y >= lo1) & (y < hi1)
    return m

# cython: language_level=3, boundscheck=False, wraparound=False, cdivision=True, initializedcheck=False
"""Compiled kernel of :mod:`clearaudit.classify.neighbours` (see there for the method).

Built with ``-ffp-contract=off``: every product and sum is rounded on its own, as numpy and
scipy round them, so the moments are the same numbers as numpy's reductions give.
"""
from libc.stdint cimport int32_t, int64_t, uint64_t
from libc.stdlib cimport free, malloc
from libc.string cimport memcpy


cdef inline Py_ssize_t _lower(const int64_t[::1] a, int64_t v, Py_ssize_t lo,
                              Py_ssize_t hi) noexcept nogil:
    """First position in ``a[lo:hi]`` (sorted) whose value is not below ``v``."""
    cdef Py_ssize_t mid
    while lo < hi:
        mid = (lo + hi) >> 1
        if a[mid] < v:
            lo = mid + 1
        else:
            hi = mid
    return lo


cdef inline Py_ssize_t _seek(const int64_t[::1] a, int64_t v, Py_ssize_t hint,
                             Py_ssize_t n) noexcept nogil:
    """First position in ``a[:n]`` (sorted) whose value is not below ``v``, searched from
    ``hint``: by doubling steps forward when the answer lies at or after it (a few steps
    when it is near), by bisection before it otherwise. The same position as ``_lower``."""
    cdef Py_ssize_t lo, hi, step
    if hint > n:
        hint = n
    if hint > 0 and a[hint - 1] >= v:
        return _lower(a, v, 0, hint)
    # every position before ``lo`` holds a value below v; the answer is in [lo, hi]
    lo = hint
    hi = hint
    step = 1
    while hi < n and a[hi] < v:
        lo = hi + 1
        hi = hi + step
        step <<= 1
    if hi > n:
        hi = n
    return _lower(a, v, lo, hi)


cdef struct Best:
    # a kept neighbour: its squared distance's bits and its sorted position, side by side
    # so that the insertion moves one 16-byte item (2-3 % of the kernel's time against two
    # arrays)
    uint64_t d
    Py_ssize_t j


def moments(const int64_t[::1] key, const int64_t[::1] index, const double[::1] sx,
            const double[::1] sy, const double[::1] sz, const int64_t[::1] dims, Py_ssize_t reach,
            const int64_t[::1] rows, int k, double r2, int32_t[::1] count,
            double[:, ::1] out):
    """Neighbourhood moments of the sorted positions ``rows`` (ascending is fastest).

    ``out[t]`` receives the covariance upper triangle (xx, xy, xz, yy, yz, zz) of the
    neighbourhood of ``rows[t]`` about its mean, ``count[t]`` the neighbourhood size: the
    ``k`` points nearest to it (itself included) strictly within ``sqrt(r2)``, ordered by
    distance and, among equal distances, by ``index`` (so a tie at the k-th distance goes to
    the lower ``index``).
    """
    if k < 1 or reach < 1:
        raise ValueError("k and reach must be at least 1")
    if not (0.0 < r2 < float("inf")):
        raise ValueError("r2 must be positive and finite")
    if out.shape[0] != rows.shape[0] or count.shape[0] != rows.shape[0] or out.shape[1] != 6:
        raise ValueError("count and out must have one row per query (out: 6 columns)")
    if dims.shape[0] != 3 or dims[0] < 1 or dims[1] < 1 or dims[2] < 1:
        raise ValueError("dims must hold 3 positive cell counts")
    if index.shape[0] != key.shape[0] or sx.shape[0] != key.shape[0] \
            or sy.shape[0] != key.shape[0] or sz.shape[0] != key.shape[0]:
        raise ValueError("key, index and the coordinates must have the same length")
    cdef Py_ssize_t n = key.shape[0]
    cdef Py_ssize_t nq = rows.shape[0]
    cdef Py_ssize_t t
    for t in range(nq):
        if rows[t] < 0 or rows[t] >= n:
            raise IndexError("query position out of range")
    # the columns scanned around a cell: at most the grid's own columns
    cdef Py_ssize_t side_x = min(2 * reach + 1, <Py_ssize_t> dims[0])
    cdef Py_ssize_t side_y = min(2 * reach + 1, <Py_ssize_t> dims[1])
    cdef Py_ssize_t side = side_x * side_y
    cdef Best *best = <Best *> malloc(k * sizeof(Best))
    cdef Py_ssize_t *starts = <Py_ssize_t *> malloc(side * sizeof(Py_ssize_t))
    cdef Py_ssize_t *stops = <Py_ssize_t *> malloc(side * sizeof(Py_ssize_t))
    # per column of the block around a cell (its offset from the cell's column), where that
    # column's range started for the previous cell: queries walk the cells in key order, so
    # the next start is at or a little after it
    cdef Py_ssize_t *hints = <Py_ssize_t *> malloc(side * sizeof(Py_ssize_t))
    cdef Py_ssize_t *rank = <Py_ssize_t *> malloc(side * sizeof(Py_ssize_t))
    if not best or not starts or not stops or not hints or not rank:
        free(best); free(starts); free(stops); free(hints); free(rank)
        raise MemoryError()
    for t in range(side):
        hints[t] = 0
    cdef int64_t nx = dims[0], ny = dims[1], nz = dims[2]
    cdef int64_t previous = -1, cell, cx, cy, cz, a, b, base, p
    cdef Py_ssize_t ranges = 0, g, j, s, e, q, u, w
    cdef Py_ssize_t capacity = 4096
    cdef double *buf = <double *> malloc(capacity * sizeof(double))
    cdef Py_ssize_t *cand = <Py_ssize_t *> malloc(capacity * sizeof(Py_ssize_t))
    cdef Py_ssize_t nc, c
    cdef uint64_t bits, limit, below_r2
    cdef bint failed = False
    if not buf or not cand:
        free(buf); free(cand)
        free(best); free(starts); free(stops); free(hints); free(rank)
        raise MemoryError()
    cdef int m
    # strictly closer than the radius: bits below those of r2 (checked positive and finite)
    memcpy(&below_r2, &r2, 8)
    below_r2 -= 1
    cdef double qx, qy, qz, dx, dy, dz, d2, ex, ey, ez
    cdef double s0, s1, s2, p00, p01, p02, p11, p12, p22, mx, my, mz
    with nogil:
        for t in range(nq):
            q = rows[t]
            cell = key[q]
            if cell != previous:  # the ranges are the same for every point of one cell
                previous = cell
                cz = cell % nz
                cy = (cell // nz) % ny
                cx = cell // nz // ny
                ranges = 0
                for a in range(max(cx - reach, 0), min(cx + reach + 1, nx)):
                    for b in range(max(cy - reach, 0), min(cy + reach + 1, ny)):
                        base = (a * ny + b) * nz
                        # the block's column slot: offset from the cell's column, wrapped
                        # into the block's side (slots differ for the columns of one cell)
                        u = ((a - cx + reach) % side_x) * side_y + (b - cy + reach) % side_y
                        s = _seek(key, base + max(cz - reach, 0), hints[u], n)
                        hints[u] = s
                        e = _seek(key, base + min(cz + reach, nz - 1) + 1, s, n)
                        if e > s:
                            # nearer columns first (the cell's own, then the sides, then
                            # the corners): the k-th distance tightens early and fewer
                            # farther points are inserted; the result does not depend on
                            # the order the ranges are scanned in
                            w = (a - cx if a >= cx else cx - a) + (b - cy if b >= cy else cy - b)
                            g = ranges
                            while g > 0 and rank[g - 1] > w:
                                starts[g] = starts[g - 1]
                                stops[g] = stops[g - 1]
                                rank[g] = rank[g - 1]
                                g -= 1
                            starts[g] = s
                            stops[g] = e
                            rank[g] = w
                            ranges += 1
            qx = sx[q]
            qy = sy[q]
            qz = sz[q]
            m = 0
            limit = below_r2
            for g in range(ranges):
                s = starts[g]
                e = stops[g] - s
                if e > capacity:
                    capacity = 2 * e
                    free(buf)
                    free(cand)
                    buf = <double *> malloc(capacity * sizeof(double))
                    cand = <Py_ssize_t *> malloc(capacity * sizeof(Py_ssize_t))
                    if not buf or not cand:
                        failed = True
                        break
                # squared distances of the range first (a loop without branches that the
                # compiler can vectorise), then the candidates: d2 >= 0, so its bits order as
                # the values do and integers compare cheaply; one test drops what is beyond
                # the radius and, once k are kept, what is farther than the k-th (equal to
                # it: the index decides). The candidates are listed without branches, then
                # taken in turn (the limit may tighten meanwhile)
                for u in range(e):
                    dx = sx[s + u] - qx
                    dy = sy[s + u] - qy
                    dz = sz[s + u] - qz
                    buf[u] = dx * dx + dy * dy + dz * dz
                nc = 0
                for u in range(e):
                    memcpy(&bits, &buf[u], 8)
                    cand[nc] = u
                    nc += bits <= limit
                for c in range(nc):
                    u = cand[c]
                    memcpy(&bits, &buf[u], 8)
                    if bits > limit:
                        continue
                    j = s + u
                    if m == k and bits == best[k - 1].d and index[j] > index[best[k - 1].j]:
                        continue
                    w = m if m < k else k - 1
                    while w > 0 and (best[w - 1].d > bits
                                     or (best[w - 1].d == bits
                                         and index[best[w - 1].j] > index[j])):
                        best[w] = best[w - 1]
                        w -= 1
                    best[w].d = bits
                    best[w].j = j
                    if m < k:
                        m += 1
                    if m == k:
                        limit = best[k - 1].d
            if failed:
                break
            count[t] = m
            if m == 0:  # only for a query that is not finite (never for grid points)
                for u in range(6):
                    out[t, u] = 0.0
                continue
            # first moments: the running sum starts at the nearest neighbour (numpy's order)
            j = best[0].j
            s0 = sx[j] - qx
            s1 = sy[j] - qy
            s2 = sz[j] - qz
            for u in range(1, m):
                j = best[u].j
                s0 = s0 + (sx[j] - qx)
                s1 = s1 + (sy[j] - qy)
                s2 = s2 + (sz[j] - qz)
            p00 = 0.0
            p01 = 0.0
            p02 = 0.0
            p11 = 0.0
            p12 = 0.0
            p22 = 0.0
            for u in range(m):
                j = best[u].j
                ex = sx[j] - qx
                ey = sy[j] - qy
                ez = sz[j] - qz
                p00 = p00 + ex * ex
                p01 = p01 + ex * ey
                p02 = p02 + ex * ez
                p11 = p11 + ey * ey
                p12 = p12 + ey * ez
                p22 = p22 + ez * ez
            mx = s0 / m
            my = s1 / m
            mz = s2 / m
            out[t, 0] = p00 / m - mx * mx
            out[t, 1] = p01 / m - mx * my
            out[t, 2] = p02 / m - mx * mz
            out[t, 3] = p11 / m - my * my
            out[t, 4] = p12 / m - my * mz
            out[t, 5] = p22 / m - mz * mz
    free(buf)
    free(cand)
    free(best)
    free(starts)
    free(stops)
    free(hints)
    free(rank)
    if failed:
        raise MemoryError()

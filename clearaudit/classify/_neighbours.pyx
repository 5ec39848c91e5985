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
    cdef uint64_t *best_d = <uint64_t *> malloc(k * sizeof(uint64_t))
    cdef int64_t *best_i = <int64_t *> malloc(k * sizeof(int64_t))
    cdef Py_ssize_t *best_j = <Py_ssize_t *> malloc(k * sizeof(Py_ssize_t))
    cdef Py_ssize_t *starts = <Py_ssize_t *> malloc(side * sizeof(Py_ssize_t))
    cdef Py_ssize_t *stops = <Py_ssize_t *> malloc(side * sizeof(Py_ssize_t))
    if not best_d or not best_i or not best_j or not starts or not stops:
        free(best_d); free(best_i); free(best_j); free(starts); free(stops)
        raise MemoryError()
    cdef int64_t nx = dims[0], ny = dims[1], nz = dims[2]
    cdef int64_t previous = -1, cell, cx, cy, cz, a, b, base, p
    cdef Py_ssize_t ranges = 0, g, j, s, e, q, u, w
    cdef Py_ssize_t capacity = 4096
    cdef double *buf = <double *> malloc(capacity * sizeof(double))
    cdef uint64_t bits
    cdef bint failed = False
    if not buf:
        free(best_d); free(best_i); free(best_j); free(starts); free(stops)
        raise MemoryError()
    cdef int m
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
                        s = _lower(key, base + max(cz - reach, 0), 0, n)
                        e = _lower(key, base + min(cz + reach, nz - 1) + 1, s, n)
                        if e > s:
                            starts[ranges] = s
                            stops[ranges] = e
                            ranges += 1
            qx = sx[q]
            qy = sy[q]
            qz = sz[q]
            m = 0
            for g in range(ranges):
                s = starts[g]
                e = stops[g] - s
                if e > capacity:
                    capacity = 2 * e
                    free(buf)
                    buf = <double *> malloc(capacity * sizeof(double))
                    if not buf:
                        failed = True
                        break
                # squared distances of the range first (a loop without branches that the
                # compiler can vectorise), then the selection
                for u in range(e):
                    dx = sx[s + u] - qx
                    dy = sy[s + u] - qy
                    dz = sz[s + u] - qz
                    buf[u] = dx * dx + dy * dy + dz * dz
                for u in range(e):
                    d2 = buf[u]
                    if d2 >= r2:
                        continue
                    # d2 >= 0: its bits order as the values do, and integers compare cheaply
                    memcpy(&bits, &buf[u], 8)
                    j = s + u
                    p = index[j]
                    if m == k and (bits > best_d[k - 1]
                                   or (bits == best_d[k - 1] and p > best_i[k - 1])):
                        continue
                    w = m if m < k else k - 1
                    while w > 0 and (best_d[w - 1] > bits
                                     or (best_d[w - 1] == bits and best_i[w - 1] > p)):
                        best_d[w] = best_d[w - 1]
                        best_i[w] = best_i[w - 1]
                        best_j[w] = best_j[w - 1]
                        w -= 1
                    best_d[w] = bits
                    best_i[w] = p
                    best_j[w] = j
                    if m < k:
                        m += 1
            if failed:
                break
            count[t] = m
            if m == 0:  # only for a query that is not finite (never for grid points)
                for u in range(6):
                    out[t, u] = 0.0
                continue
            # first moments: the running sum starts at the nearest neighbour (numpy's order)
            j = best_j[0]
            s0 = sx[j] - qx
            s1 = sy[j] - qy
            s2 = sz[j] - qz
            for u in range(1, m):
                j = best_j[u]
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
                j = best_j[u]
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
    free(best_d)
    free(best_i)
    free(best_j)
    free(starts)
    free(stops)
    if failed:
        raise MemoryError()

# cython: language_level=3, boundscheck=False, wraparound=False, cdivision=True, initializedcheck=False
"""Nearest point of a polyline to each of many points, in one compiled pass.

The same arithmetic as the numpy form (``clearance._nearest_segment_numpy``, its reference
in tests/test_audit_clearance.py), in the same order and without fused multiply-add (see
setup.py), so in plan the distances, nearest points and parameters are the same numbers
(numpy sums three products in an order of its own, so the package keeps the numpy form for
3-D); the loops leave the GIL.
"""
from libc.math cimport floor, sqrt, INFINITY
from libc.stdint cimport int32_t, int64_t

ctypedef fused cell_t:
    int32_t
    int64_t


def nearest_segment(const double[:, :] pts, const double[:, :] verts,
                    const int64_t[::1] nearest, double[::1] dist, double[:, ::1] closest,
                    double[::1] param, const double[::1] vz=None, int64_t[::1] seg=None,
                    double[::1] wz=None):
    """For every point, the nearest point on the polyline through ``verts`` among the two
    segments at its nearest vertex.

    Parameters
    ----------
    pts
        Points, shape (n, d).
    verts
        Vertices, shape (k, d), k >= 2.
    nearest
        Each point's nearest vertex (shape (n,)), or an empty array: then the vertices are
        scanned and the first of equally near ones is taken.
    dist, closest, param
        Out: distance, nearest point (n, d) and vertex index plus fraction along its
        segment.
    vz, seg, wz
        Optional: a value per vertex (a wire's heights), and out the segment
        ``clip(floor(param), 0, k - 2)`` and the value there, ``vz[s] + (param - s) *
        (vz[s + 1] - vz[s])`` (the polyline's height over a point seen in plan).

    Notes
    -----
    Segments ``(v - 1, v)`` and ``(v, v + 1)`` of the nearest vertex ``v`` (indices clipped
    to ``0 .. k - 2``), in that order; a later segment wins only when strictly nearer. Per
    segment: ``t = clip(((p - a) . e) / (e . e or 1), 0, 1)`` with ``e = b - a``, the point
    ``a + t e`` and its distance ``sqrt(sum((p - c)^2))``, each sum taken left to right.
    """
    cdef Py_ssize_t n = pts.shape[0], d = pts.shape[1], k = verts.shape[0]
    cdef Py_ssize_t i, j, c, v, off, i0
    cdef double best, s, u, dd, t, diff, e, q
    cdef double cbuf[8]
    if verts.shape[1] != d or d < 1 or d > 8 or k < 2:
        raise ValueError("nearest_segment: points and vertices need the same 1-8 columns, "
                         "and at least two vertices")
    if dist.shape[0] != n or param.shape[0] != n or closest.shape[0] != n \
            or closest.shape[1] != d or (nearest.shape[0] != 0 and nearest.shape[0] != n):
        raise ValueError("nearest_segment: mismatched output shapes")
    cdef bint with_z = vz is not None
    if with_z and (vz.shape[0] != k or seg is None or wz is None or seg.shape[0] != n
                   or wz.shape[0] != n):
        raise ValueError("nearest_segment: mismatched vertex values or their outputs")
    if nearest.shape[0] != 0:
        for i in range(n):
            if nearest[i] < 0 or nearest[i] >= k:
                raise ValueError("nearest_segment: a nearest vertex is out of range")
    with nogil:
        for i in range(n):
            if nearest.shape[0] != 0:
                v = nearest[i]
            else:
                v = 0
                best = INFINITY
                for j in range(k):
                    s = 0.0
                    for c in range(d):
                        diff = pts[i, c] - verts[j, c]
                        s = s + diff * diff
                    if s < best:
                        best = s
                        v = j
            dist[i] = INFINITY
            param[i] = 0.0
            for c in range(d):
                closest[i, c] = 0.0
            for off in range(-1, 1):
                i0 = v + off
                if i0 < 0:
                    i0 = 0
                if i0 > k - 2:
                    i0 = k - 2
                dd = 0.0
                u = 0.0
                for c in range(d):
                    e = verts[i0 + 1, c] - verts[i0, c]
                    dd = dd + e * e
                    u = u + (pts[i, c] - verts[i0, c]) * e
                t = u / (dd if dd > 0 else 1.0)
                if t < 0.0:
                    t = 0.0
                elif t > 1.0:
                    t = 1.0
                s = 0.0
                for c in range(d):
                    e = verts[i0 + 1, c] - verts[i0, c]
                    cbuf[c] = verts[i0, c] + t * e
                    q = pts[i, c] - cbuf[c]
                    s = s + q * q
                s = sqrt(s)
                if s < dist[i]:
                    dist[i] = s
                    for c in range(d):
                        closest[i, c] = cbuf[c]
                    param[i] = <double>i0 + t
            if with_z:
                i0 = <Py_ssize_t>floor(param[i])
                if i0 < 0:
                    i0 = 0
                if i0 > k - 2:
                    i0 = k - 2
                seg[i] = i0
                t = param[i] - <double>i0
                wz[i] = vz[i0] + t * (vz[i0 + 1] - vz[i0])


def frame_points(const double[::1] a, const double[::1] ex, const double[::1] ez,
                 const double[::1] x, const double[::1] z, double[:, ::1] out):
    """``out = a + x[:, None] * ex + z[:, None] * ez``: points given in a plane's frame
    (origin ``a``, unit axes ``ex``, ``ez``), each sum and product rounded on its own in
    numpy's order (see setup.py), so the same numbers as the numpy expression."""
    cdef Py_ssize_t n = x.shape[0], i, c
    cdef double t
    if a.shape[0] != 3 or ex.shape[0] != 3 or ez.shape[0] != 3 or z.shape[0] != n \
            or out.shape[0] != n or out.shape[1] != 3:
        raise ValueError("frame_points: mismatched shapes")
    with nogil:
        for i in range(n):
            for c in range(3):
                t = a[c] + x[i] * ex[c]
                out[i, c] = t + z[i] * ez[c]


def plan_cells(const double[:, :] xy, double lo0, double lo1, double inv_cell,
               int64_t nx, int64_t ny, cell_t[::1] key, unsigned char[::1] occupied):
    """Cell number ``i * ny + j`` of every point on a plan grid, and the occupied cells.

    ``i = trunc(clip((x - lo0) * inv_cell, 0, nx - 1))`` (``j`` likewise with ``y``, ``lo1``,
    ``ny``): the operations of the numpy form (``audit.engine._PlanGrid``), each rounded on
    its own, so the same cells; ``occupied[k]`` is set to 1 for every cell ``k`` holding a
    point. NaN coordinates go to cell 0 (numpy's cast of NaN is undefined). ``key`` is
    int32 when every cell number fits, else int64.
    """
    cdef Py_ssize_t n = xy.shape[0], p
    cdef double t, top_i = <double>(nx - 1), top_j = <double>(ny - 1)
    cdef int64_t k
    if xy.shape[1] != 2 or key.shape[0] != n or occupied.shape[0] != nx * ny or nx < 1 \
            or ny < 1:
        raise ValueError("plan_cells: mismatched shapes")
    if cell_t is int32_t and nx * ny > 2147483647:
        raise ValueError("plan_cells: cell numbers beyond int32")
    with nogil:
        for p in range(n):
            t = (xy[p, 0] - lo0) * inv_cell
            if not t > 0.0:  # NaN too
                t = 0.0
            elif t > top_i:
                t = top_i
            k = <int64_t>t * ny
            t = (xy[p, 1] - lo1) * inv_cell
            if not t > 0.0:
                t = 0.0
            elif t > top_j:
                t = top_j
            k += <int64_t>t
            key[p] = <cell_t>k
            occupied[k] = 1

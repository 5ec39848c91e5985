# cython: language_level=3, boundscheck=False, wraparound=False, cdivision=True, initializedcheck=False
"""Nearest point of a polyline to each of many points, in one compiled pass.

The same arithmetic as the numpy form (``clearance._nearest_segment_numpy``, its reference
in tests/test_audit_clearance.py), in the same order and without fused multiply-add (see
setup.py), so in plan the distances, nearest points and parameters are the same numbers
(numpy sums three products in an order of its own, so the package keeps the numpy form for
3-D); the loops leave the GIL.
"""
from libc.math cimport fabs, floor, isfinite, sqrt, INFINITY
from libc.stdint cimport int32_t, int64_t
from libc.stdlib cimport free, malloc

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


def nearest_vertices(const double[:, :] pts, const double[:, :] verts,
                     const int64_t[::1] order, const double[::1] station, double ox, double oy,
                     double ax, double ay, int64_t[::1] out):
    """Each point's nearest vertex in plan, exactly as the compiled pass's own scan picks it
    (the squared distance ``dx * dx + dy * dy``; the first of equally near vertices), without
    visiting every vertex.

    ``station`` holds the vertices' stations ``(x - ox) * ax + (y - oy) * ay`` along a unit
    axis ``(ax, ay)``, ascending, and ``order`` the vertex of each. A point's distance to a
    vertex is at least the difference of their stations, so the vertices are visited outward
    from the point's station, nearest station first, until that difference alone (less a
    rounding margin) exceeds the nearest distance found.
    """
    cdef Py_ssize_t n = pts.shape[0], k = verts.shape[0], i, lo, hi, mid, left, right, j
    cdef double px, py, sp, best, gap, gl, gr, dx, dy, s, tol
    cdef int64_t v
    if pts.shape[1] != 2 or verts.shape[1] != 2 or k < 1 or order.shape[0] != k \
            or station.shape[0] != k or out.shape[0] != n:
        raise ValueError("nearest_vertices: mismatched shapes")
    for j in range(k):
        if order[j] < 0 or order[j] >= k:
            raise ValueError("nearest_vertices: a vertex number is out of range")
    with nogil:
        for i in range(n):
            px = pts[i, 0]
            py = pts[i, 1]
            sp = (px - ox) * ax + (py - oy) * ay
            # the margin covers the rounding of both stations (a few ulps of the offsets)
            tol = 1e-9 + 1e-12 * (fabs(px - ox) + fabs(py - oy))
            lo = 0
            hi = k
            while lo < hi:  # the first station not below the point's
                mid = (lo + hi) // 2
                if station[mid] < sp:
                    lo = mid + 1
                else:
                    hi = mid
            left = lo - 1
            right = lo
            best = INFINITY
            v = 0
            while left >= 0 or right < k:
                gl = sp - station[left] if left >= 0 else INFINITY
                gr = station[right] - sp if right < k else INFINITY
                if gl <= gr:
                    j = order[left]
                    gap = gl
                    left -= 1
                else:
                    j = order[right]
                    gap = gr
                    right += 1
                gap = gap - tol
                if gap > 0.0 and gap * gap > best:
                    break  # every vertex left is at least this far along the axis
                dx = px - verts[j, 0]
                dy = py - verts[j, 1]
                s = 0.0
                s = s + dx * dx
                s = s + dy * dy
                if s < best or (s == best and j < v):
                    best = s
                    v = j
            out[i] = v


def in_box(const double[:, :] xy, double x0, double y0, double x1, double y1,
           unsigned char[::1] out):
    """``out = (x >= x0) & (x < x1) & (y >= y0) & (y < y1)`` for the points ``xy`` (n, 2+)
    in one pass (a coordinate that is NaN fails every comparison, as in numpy)."""
    cdef Py_ssize_t n = xy.shape[0], i
    cdef double x, y
    if xy.shape[1] < 2 or out.shape[0] != n:
        raise ValueError("in_box: mismatched shapes")
    with nogil:
        for i in range(n):
            x = xy[i, 0]
            y = xy[i, 1]
            out[i] = (x >= x0) & (x < x1) & (y >= y0) & (y < y1)


def cell_order(const cell_t[::1] key, int64_t[::1] start, int64_t[::1] order):
    """The points sorted by cell, stably (``numpy.argsort(key, kind="stable")``), into
    ``order``, and where each cell's points start in it into ``start`` (``ncell + 1``
    entries: numpy's ``cumsum`` of the cell counts after a leading 0), by a counting sort.
    Every key must lie in ``0 .. ncell - 1``."""
    cdef Py_ssize_t n = key.shape[0], ncell = start.shape[0] - 1, i, c
    cdef int64_t total, m
    if ncell < 0 or order.shape[0] != n:
        raise ValueError("cell_order: mismatched shapes")
    for i in range(n):
        if key[i] < 0 or key[i] >= ncell:
            raise IndexError("cell_order: a cell number is out of range")
    with nogil:
        for c in range(ncell + 1):
            start[c] = 0
        for i in range(n):
            start[key[i] + 1] += 1
        total = 0
        for c in range(ncell + 1):
            total += start[c]
            start[c] = total
        # start[c] is now where cell c begins; each point goes to its cell's next slot,
        # which leaves start[c] at the end of cell c, i.e. the beginning of cell c + 1
        for i in range(n):
            c = key[i]
            m = start[c]
            order[m] = i
            start[c] = m + 1
        for c in range(ncell, 0, -1):
            start[c] = start[c - 1]
        start[0] = 0


def window_near(const int64_t[::1] ub, int64_t b0, const double[:] v, const double[:] z,
                const double[::1] v_min, const double[::1] v_max, const double[::1] z_min,
                const double[::1] z_max, double r, unsigned char[::1] out):
    """The station-binned window test of points in one pass: ``out[i]`` is 1 when the
    point's bin ``b = ub[i] - b0`` lies in ``0 .. nb - 1`` and ``v_min[b] - r <= v[i] <=
    v_max[b] + r`` (and the same for ``z`` against ``z_min``, ``z_max`` unless ``z`` is
    empty): the comparisons of the numpy form it replaced (the clipped bins and the window's
    bounds, ``tests/test_audit_clearance.py``)."""
    cdef Py_ssize_t n = ub.shape[0], nb = v_min.shape[0], i
    cdef int64_t b
    cdef double x
    cdef bint use_z = z.shape[0] != 0, near
    if v.shape[0] != n or out.shape[0] != n or (use_z and z.shape[0] != n) \
            or v_max.shape[0] != nb or z_min.shape[0] != nb or z_max.shape[0] != nb:
        raise ValueError("window_near: mismatched shapes")
    with nogil:
        for i in range(n):
            b = ub[i] - b0
            if b < 0 or b >= nb:
                out[i] = 0
                continue
            x = v[i]
            near = (x >= v_min[b] - r) & (x <= v_max[b] + r)
            if use_z:
                x = z[i]
                near = near & (x >= z_min[b] - r) & (x <= z_max[b] + r)
            out[i] = near


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


def curve_frame(const double[:, :] pts, const int64_t[::1] starts, double ox, double oy,
                double ax, double ay, double bin_m, double[::1] u, double[::1] v,
                int64_t[::1] b):
    """Station ``u`` and offset ``v`` of curve vertices along and across a plan axis, their
    station bins ``b = floor(u / bin_m)``, and the longest segment of the curves.

    ``pts`` holds several curves one after the other, curve ``k`` from row ``starts[k]``
    (``starts[0] == 0``, ascending); segments join the rows of one curve only. The
    operations of the numpy form (``audit.engine._frame``, ``numpy.linalg.norm`` of
    ``numpy.diff``), each rounded on its own, so the same numbers.

    Returns
    -------
    (longest segment [m], smallest bin, largest bin), or None when a vertex is not finite
    (nothing else is then computed)
    """
    cdef Py_ssize_t n = pts.shape[0], i, k = 1, nk = starts.shape[0]
    cdef double dx, dy, dz, s, seg = 0.0
    cdef int64_t lo = 0, hi = 0
    cdef bint finite = True
    if pts.shape[1] != 3 or u.shape[0] != n or v.shape[0] != n or b.shape[0] != n or n < 1 \
            or nk < 1 or starts[0] != 0:
        raise ValueError("curve_frame: mismatched shapes")
    with nogil:
        for i in range(n):
            if not (isfinite(pts[i, 0]) and isfinite(pts[i, 1]) and isfinite(pts[i, 2])):
                finite = False
                break
        if not finite:
            with gil:
                return None
        for i in range(n):
            dx = pts[i, 0] - ox
            dy = pts[i, 1] - oy
            u[i] = dx * ax + dy * ay
            v[i] = dy * ax - dx * ay
            b[i] = <int64_t>floor(u[i] / bin_m)
            if i == 0 or b[i] < lo:
                lo = b[i]
            if i == 0 or b[i] > hi:
                hi = b[i]
            while k < nk and starts[k] <= i:
                k += 1
            if i > starts[k - 1]:  # a segment within curve k - 1
                dx = pts[i, 0] - pts[i - 1, 0]
                dy = pts[i, 1] - pts[i - 1, 1]
                dz = pts[i, 2] - pts[i - 1, 2]
                s = sqrt(dx * dx + dy * dy + dz * dz)
                if s > seg:
                    seg = s
    return seg, lo, hi


cdef void _slide(const double *src, Py_ssize_t nb, Py_ssize_t r, bint largest, double *out,
                 double *pad, double *fwd, double *bwd) noexcept nogil:
    """``out[i]`` = the least (``largest``: the greatest) of ``src[i - r .. i + r]``, the
    values beyond both ends counting as +inf (-inf): van Herk's and Gil & Werman's running
    extremes over blocks of the window's width (linear in ``nb`` whatever ``r``)."""
    cdef Py_ssize_t w = 2 * r + 1, m = nb + 2 * r, k, i
    cdef double edge = -INFINITY if largest else INFINITY
    for k in range(m):
        pad[k] = src[k - r] if r <= k < nb + r else edge
    for k in range(m):
        if k % w == 0 or (fwd[k - 1] < pad[k] if largest else fwd[k - 1] > pad[k]):
            fwd[k] = pad[k]
        else:
            fwd[k] = fwd[k - 1]
    for k in range(m - 1, -1, -1):
        if k == m - 1 or (k + 1) % w == 0 \
                or (bwd[k + 1] < pad[k] if largest else bwd[k + 1] > pad[k]):
            bwd[k] = pad[k]
        else:
            bwd[k] = bwd[k + 1]
    for i in range(nb):
        # the window pad[i .. i + w - 1] spans the end of one block and the start of the next
        if largest:
            out[i] = bwd[i] if bwd[i] > fwd[i + w - 1] else fwd[i + w - 1]
        else:
            out[i] = bwd[i] if bwd[i] < fwd[i + w - 1] else fwd[i + w - 1]


def curve_window(const int64_t[::1] b, const double[::1] v, const double[:] z, int64_t b0,
                 Py_ssize_t ring, double[::1] v_min, double[::1] v_max, double[::1] z_min,
                 double[::1] z_max):
    """Per bin the range of the vertices' ``v`` and ``z`` over the bins within ``ring`` of
    it (vertex bins ``b - b0``; ``inf`` / ``-inf`` where there is none): the values of
    ``numpy.minimum.at`` into the bins followed by ``scipy.ndimage.minimum_filter1d`` of
    size ``2 * ring + 1`` with an infinite border (maxima likewise), for finite ``v``, ``z``.
    """
    cdef Py_ssize_t n = b.shape[0], nb = v_min.shape[0], i, j, m
    if v.shape[0] != n or z.shape[0] != n or v_max.shape[0] != nb or z_min.shape[0] != nb \
            or z_max.shape[0] != nb or ring < 0 or nb < 1:
        raise ValueError("curve_window: mismatched shapes")
    for i in range(n):
        if b[i] - b0 < 0 or b[i] - b0 >= nb:
            raise ValueError("curve_window: a vertex outside the bins")
    m = nb + 2 * ring
    cdef double *ext = <double *> malloc((4 * nb + 3 * m) * sizeof(double))
    if ext == NULL:
        raise MemoryError()
    cdef double *lo_v = ext
    cdef double *hi_v = ext + nb
    cdef double *lo_z = ext + 2 * nb
    cdef double *hi_z = ext + 3 * nb
    cdef double *pad = ext + 4 * nb
    cdef double *fwd = pad + m
    cdef double *bwd = fwd + m
    with nogil:
        for j in range(nb):
            lo_v[j] = INFINITY
            hi_v[j] = -INFINITY
            lo_z[j] = INFINITY
            hi_z[j] = -INFINITY
        for i in range(n):
            j = b[i] - b0
            if v[i] < lo_v[j]:
                lo_v[j] = v[i]
            if v[i] > hi_v[j]:
                hi_v[j] = v[i]
            if z[i] < lo_z[j]:
                lo_z[j] = z[i]
            if z[i] > hi_z[j]:
                hi_z[j] = z[i]
        _slide(lo_v, nb, ring, False, &v_min[0], pad, fwd, bwd)
        _slide(hi_v, nb, ring, True, &v_max[0], pad, fwd, bwd)
        _slide(lo_z, nb, ring, False, &z_min[0], pad, fwd, bwd)
        _slide(hi_z, nb, ring, True, &z_max[0], pad, fwd, bwd)
    free(ext)

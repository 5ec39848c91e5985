"""Clearance engine: exact distances from classified points to the wires' condition curves.

* **3-D radial** clearance (vegetation, other wires): the exact distance from each point to the
  densely sampled curve, i.e. to its polyline segments (nearest vertex by a k-d tree, then the
  two adjacent segments);
* **vertical** clearance to ground: for ground points within ``lateral_m`` horizontally of the
  wire, the wire's height above the point where the wire passes over it;
* **buildings**: a box envelope — a point violates when it is closer than the horizontal
  requirement sideways *and* closer than the vertical requirement above/below the wire. A
  violated building's deficit is the smaller of two whole-building moves of the wire: the rise
  that clears every point within the horizontal requirement, and the sideways shift that
  clears every point within the vertical requirement (:func:`building_envelope`).

Candidates are found with one :class:`scipy.spatial.cKDTree` per obstacle group (built once over
the corridor points of that group), queried with a thinned copy of the curve samples
(:func:`points_near_curves`, radius padded by half the thinned spacing so no candidate is lost).
Points are grouped into obstacles by the engine (one building, one tree crown, one patch of
ground, one crossing wire); :func:`group_obstacles` is the single-linkage grouping used for
buildings (no extent cap) and for vegetation and ground patches that belong to no tree (cut into
tiles a crew can find).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from itertools import chain

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

from ..arrays import column_bounds, take_rows, unique_rows
from ._polyline import nearest_segment as _nearest_segment_pass
from ._polyline import nearest_vertices as _nearest_vertices_pass

__all__ = [
    "Findings",
    "building_envelope",
    "clearing_shift",
    "group_obstacles",
    "link_components",
    "points_near_curves",
    "polyline_distance",
    "polyline_offsets",
    "polyline_overhead",
    "radial_findings",
    "reduce_findings",
]


def _segments(polyline: np.ndarray):
    p = np.asarray(polyline, dtype=float)
    if p.ndim != 2 or len(p) < 2:
        raise ValueError("A polyline needs at least two vertices.")
    return p


#: Polylines with more vertices than this find each point's nearest vertex with a k-d tree;
#: shorter ones (the audit's curves have 101) are scanned in the compiled pass.
_SCAN_VERTICES = 256


def _nearest_segment(points: np.ndarray, vertices: np.ndarray, tree: cKDTree | None):
    """Nearest point on the polyline through ``vertices``: the distance, the point and the
    parameter (vertex index plus fraction), from the two segments at each point's nearest
    vertex. In plan (two columns) by the compiled pass
    (:func:`clearaudit.audit._polyline.nearest_segment`, the same numbers as the numpy form
    below); in 3-D by the numpy form, whose sums of three products numpy takes in an order
    of its own."""
    pts = np.asarray(points, dtype=np.float64)
    verts = np.asarray(vertices, dtype=np.float64)
    if pts.ndim != 2 or pts.shape[1] != 2:
        return _nearest_segment_numpy(pts, verts, tree)
    n = len(pts)
    dist, closest, param = np.empty(n), np.empty((n, 2)), np.empty(n)
    _nearest_segment_pass(pts, verts, _nearest_vertices(pts, verts, tree), dist, closest, param)
    return dist, closest, param


def _nearest_vertices(pts_xy: np.ndarray, verts_xy: np.ndarray, tree: cKDTree | None
                      ) -> np.ndarray:
    """Each point's nearest vertex by the k-d tree given; for a long polyline by a search
    outward along the stations of its vertices (:func:`_station_nearest`); else an empty
    array: the compiled pass then scans the vertices itself."""
    if tree is not None:
        return np.ascontiguousarray(tree.query(pts_xy)[1], dtype=np.int64)
    if len(verts_xy) > _SCAN_VERTICES:
        return _station_nearest(pts_xy, verts_xy)
    return np.zeros(0, dtype=np.int64)


def _station_nearest(pts_xy: np.ndarray, verts_xy: np.ndarray) -> np.ndarray:
    """Each point's nearest vertex in plan, the one the compiled pass's scan would pick (the
    first of equally near vertices), by :func:`clearaudit.audit._polyline.nearest_vertices`:
    the vertices sorted by their station along the chord from the first to the last vertex,
    each point's search starting at its own station and stopping where the station gap alone
    exceeds the nearest distance found. A wire curve is nearly straight in plan, so a point
    visits a few vertices: the audit's ground candidates of one curve (a median of 256
    points, 732 vertices) took 0.22 ms with a k-d tree built and queried, against ≈ 0.03 ms.
    """
    verts = np.ascontiguousarray(verts_xy, dtype=np.float64)
    pts = np.asarray(pts_xy, dtype=np.float64)
    ox, oy = float(verts[0, 0]), float(verts[0, 1])
    dx, dy = float(verts[-1, 0]) - ox, float(verts[-1, 1]) - oy
    length = math.hypot(dx, dy)
    ax, ay = (dx / length, dy / length) if length > 0 and math.isfinite(length) else (1.0, 0.0)
    station = (verts[:, 0] - ox) * ax + (verts[:, 1] - oy) * ay
    order = np.argsort(station, kind="stable")
    out = np.empty(len(pts), dtype=np.int64)
    _nearest_vertices_pass(pts, verts, order, np.ascontiguousarray(station[order]), ox, oy, ax, ay,
                           out)
    return out


def _nearest_segment_numpy(points: np.ndarray, vertices: np.ndarray, tree: cKDTree | None):
    """:func:`_nearest_segment` in numpy (any dimension): the nearest vertex by a k-d tree,
    then segments ``(k - 1, k)`` and ``(k, k + 1)``, each by orthogonal projection clipped to
    the segment; the later one wins only when strictly nearer."""
    tree = tree or cKDTree(vertices)
    _, k = tree.query(points)
    n = len(vertices)
    best_d = np.full(len(points), np.inf)
    best_c = np.zeros_like(points)
    best_param = np.zeros(len(points))
    for offset in (-1, 0):  # segments (k-1, k) and (k, k+1)
        i0 = np.clip(k + offset, 0, n - 2)
        # np.take: the rows vertices[i0], faster than a fancy index
        p0, p1 = np.take(vertices, i0, axis=0), np.take(vertices, i0 + 1, axis=0)
        d = p1 - p0
        dd = np.einsum("ij,ij->i", d, d)
        t = np.clip(np.einsum("ij,ij->i", points - p0, d) / np.where(dd > 0, dd, 1.0), 0.0, 1.0)
        c = p0 + t[:, None] * d
        dist = np.linalg.norm(points - c, axis=1)
        better = dist < best_d
        best_d = np.where(better, dist, best_d)
        np.copyto(best_c, c, where=better[:, None])  # best_c[better] = c[better]
        best_param = np.where(better, i0 + t, best_param)
    return best_d, best_c, best_param


def polyline_distance(points: np.ndarray, polyline: np.ndarray,
                      tree: cKDTree | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exact 3-D distance from points to a polyline.

    Parameters
    ----------
    points
        Shape (n, 3). [m]
    polyline
        Vertices, shape (k, 3), k >= 2. [m]
    tree
        A :class:`scipy.spatial.cKDTree` of the vertices, when already built.

    Returns
    -------
    distance : (n,) [m]
    closest : (n, 3) nearest point on the polyline. [m]
    parameter : (n,) vertex index plus fraction along the segment (0 .. k-1). [-]

    Notes
    -----
    The nearest vertex :math:`k` is found with the tree; the nearest point lies on segment
    :math:`(k-1, k)` or :math:`(k, k+1)`, each solved by orthogonal projection clipped to the
    segment. Exact when the polyline's segments are shorter than the distance to the point's
    second-nearest vertex neighbourhood (true for a smooth, densely sampled curve).
    """
    pts = np.asarray(points, dtype=float).reshape(-1, 3)
    poly = _segments(polyline)
    if len(pts) == 0:
        return np.zeros(0), np.zeros((0, 3)), np.zeros(0)
    return _nearest_segment(pts, poly, tree)


def polyline_offsets(points: np.ndarray, polyline: np.ndarray
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Where a polyline passes over points: signed horizontal offset and the wire's height.

    Parameters
    ----------
    points
        Shape (n, 3). [m]
    polyline
        Vertices, shape (k, 3), k >= 2. [m]

    Returns
    -------
    offset : (n,) signed horizontal distance from the polyline's plan to the point, positive
        to the left of the direction from the first to the last vertex. [m]
    wire_z : (n,) height of the polyline at the nearest plan position. [m]
    parameter : (n,) vertex index plus fraction (0 .. k-1). [-]

    Notes
    -----
    The sign is that of the cross product :math:`d_x (p_y - c_y) - d_y (p_x - c_x)` of the
    nearest segment's direction :math:`d` and the vector from the nearest plan point :math:`c`
    to the point :math:`p`.
    """
    pts = np.asarray(points, dtype=float).reshape(-1, 3)
    if len(pts) == 0:
        return np.zeros(0), np.zeros(0), np.zeros(0)
    poly, lateral, closest, param, i0, wire_z = _plan_projection(pts, polyline, None)
    d = poly[i0 + 1, :2] - poly[i0, :2]
    rel = pts[:, :2] - closest
    cross = d[:, 0] * rel[:, 1] - d[:, 1] * rel[:, 0]
    return np.where(cross < 0, -lateral, lateral), wire_z, param


def _plan_projection(pts: np.ndarray, polyline: np.ndarray, tree_xy: cKDTree | None):
    """Nearest plan position on the polyline: (vertices, lateral, closest xy, parameter,
    segment index, polyline height there)."""
    poly = _segments(polyline)
    n = len(pts)
    # one compiled pass: the nearest plan point, then the segment and the polyline's height
    # there, i0 = clip(floor(param), 0, k - 2) and z[i0] + (param - i0) (z[i0 + 1] - z[i0])
    lateral, closest, param = np.empty(n), np.empty((n, 2)), np.empty(n)
    i0, wire_z = np.empty(n, dtype=np.int64), np.empty(n)
    _nearest_segment_pass(pts[:, :2], poly[:, :2],
                          _nearest_vertices(pts[:, :2], poly[:, :2], tree_xy),
                          lateral, closest, param, np.ascontiguousarray(poly[:, 2]), i0, wire_z)
    return poly, lateral, closest, param, i0, wire_z


def polyline_overhead(points: np.ndarray, polyline: np.ndarray, tree_xy: cKDTree | None = None
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Where a polyline passes over points: horizontal offset and the wire's height there.

    Parameters
    ----------
    points
        Shape (n, 3). [m]
    polyline
        Vertices, shape (k, 3). [m]
    tree_xy
        A k-d tree of the vertices' xy, when already built.

    Returns
    -------
    lateral : (n,) horizontal distance from the point to the polyline's plan. [m]
    wire_z : (n,) height of the polyline at the nearest plan position. [m]
    parameter : (n,) vertex index plus fraction (0 .. k-1). [-]
    """
    pts = np.asarray(points, dtype=float).reshape(-1, 3)
    if len(pts) == 0:
        return np.zeros(0), np.zeros(0), np.zeros(0)
    _, lateral, _, param, _, wire_z = _plan_projection(pts, polyline, tree_xy)
    return lateral, wire_z, param


def points_near_curves(tree: cKDTree, curves: list[np.ndarray], radius_m: float, *,
                       two_d: bool = False, step_m: float = 2.0) -> np.ndarray:
    """Indices of the tree's points within ``radius_m`` of any curve (a superset).

    Parameters
    ----------
    tree
        k-d tree of the obstacle points (3-D, or xy when ``two_d``).
    curves
        Densely sampled curves, each (k, 3). [m]
    radius_m
        Search distance from the curves. [m]
    two_d
        Search in plan (the tree holds xy).
    step_m
        Spacing of the thinned samples the tree is queried with. [m]

    Returns
    -------
    index : sorted unique int64 indices into the tree's points.

    Notes
    -----
    The curves are thinned to samples at most :math:`s` = ``step_m`` apart along each polyline;
    a point within :math:`r` of the polyline lies within :math:`r + s/2` of a thinned sample,
    so querying with that radius loses no candidate while each point is returned only a few
    times (instead of once per dense sample).
    """
    if radius_m <= 0 or tree is None or tree.n == 0 or not curves:
        return np.zeros(0, dtype=np.int64)
    thinned, pad = [], 0.0
    for curve in curves:
        c = np.asarray(curve, dtype=float)
        if len(c) == 0:
            continue
        seg = np.linalg.norm(np.diff(c, axis=0), axis=1) if len(c) > 1 else np.zeros(0)
        along = np.concatenate([[0.0], np.cumsum(seg)])
        total = float(along[-1])
        n = max(2, int(np.ceil(total / step_m)) + 1)
        at = np.linspace(0.0, total, n) if total > 0 else np.zeros(1)
        thinned.append(np.column_stack([np.interp(at, along, c[:, j]) for j in range(3)]))
        if total > 0:
            pad = max(pad, 0.5 * total / (n - 1))
    if not thinned:
        return np.zeros(0, dtype=np.int64)
    queries = np.concatenate(thinned)
    if two_d:
        queries = queries[:, :2]
    hits = tree.query_ball_point(queries, radius_m + pad + 1e-9, return_sorted=False)
    flat = np.fromiter(chain.from_iterable(hits), dtype=np.int64)
    return np.unique(flat)


def group_obstacles(xyz: np.ndarray, link_m: float = 1.5, max_extent_m: float | None = 15.0,
                    *, thin_m: float | None = None) -> np.ndarray:
    """Group points into obstacles (single linkage), optionally cutting long groups into tiles.

    Parameters
    ----------
    xyz
        Shape (n, 3). [m]
    link_m
        Two points closer than this belong to the same obstacle. [m]
    max_extent_m
        Groups whose horizontal extent exceeds this are cut into ``max_extent_m`` square tiles
        (a hedge row or a forest edge becomes several obstacles a crew can find); ``None``:
        never cut (one building is one obstacle however long). [m]
    thin_m
        Dense clouds: link the first point of every ``thin_m`` voxel instead of every point,
        with the link distance widened by the voxel diagonal so no link is lost (groups may
        join points up to ``link_m + 2 sqrt(3) thin_m`` apart). ``None``: exact. [m]

    Returns
    -------
    labels : (n,) int, 0 .. n_obstacles-1.
    """
    pts = np.asarray(xyz, dtype=float).reshape(-1, 3)
    n = len(pts)
    if not link_m > 0 or not (max_extent_m is None or max_extent_m > 0) or \
            not (thin_m is None or thin_m > 0):
        raise ValueError("The link distance, the largest extent and the voxel size must be "
                         "positive.")
    if n == 0:
        return np.zeros(0, dtype=int)
    if thin_m is not None:
        vox = np.floor((pts - column_bounds(pts)[0]) / thin_m).astype(np.int64)
        _, first, rep_of = unique_rows(vox, return_index=True, return_inverse=True)
        rep_labels = group_obstacles(pts[first], link_m + 2.0 * math.sqrt(3.0) * thin_m, None)
        labels = rep_labels[rep_of.reshape(-1)]
    else:
        labels = link_components(pts, link_m)
    if max_extent_m is None:
        return labels
    lo = np.full((labels.max() + 1, 2), np.inf)
    hi = np.full((labels.max() + 1, 2), -np.inf)
    np.minimum.at(lo, labels, pts[:, :2])
    np.maximum.at(hi, labels, pts[:, :2])
    long = np.max(hi - lo, axis=1) > max_extent_m
    if np.any(long[labels]):
        tile = np.floor((pts[:, :2] - lo[labels]) / max_extent_m).astype(np.int64)
        tile[~long[labels]] = 0
        key = np.column_stack([labels, tile])
        _, labels = unique_rows(key, return_inverse=True)
        labels = labels.reshape(-1)
    return labels


def link_components(xyz: np.ndarray, link_m: float, chunk_points: int = 4096) -> np.ndarray:
    r"""Connected components of the points under "at most ``link_m`` apart" (single linkage).

    Parameters
    ----------
    xyz
        Points, shape (n, d), d = 2 or 3. [m]
    link_m
        Two points at most this far apart are linked. [m]
    chunk_points
        Points whose links are listed at once (bounds the memory of the pair lists).

    Returns
    -------
    labels : (n,) int
        Component of every point, numbered in the order of each component's first point
        (the numbering :func:`scipy.sparse.csgraph.connected_components` gives over the whole
        pair graph; tests compare both).

    Notes
    -----
    Listing all pairs at once (``cKDTree.query_pairs``) costs 16 bytes per pair: on dense
    ground, with over a hundred neighbours per point within 3 m, 110 000 points took 440 MB.
    Here (1) points sharing a cube of edge :math:`\ell/\sqrt d` are joined without a test
    (any two of them are closer than :math:`\ell`); (2) the points are taken in chunks
    along their longer horizontal axis; each chunk's pairs with all points
    (``cKDTree.sparse_distance_matrix``, the same ``<=`` test as ``query_pairs``) are mapped
    to the sets found so far, and only the distinct links between different sets are joined
    (union-find; every set is named by its smallest point index).
    """
    pts = np.asarray(xyz, dtype=float)
    n = len(pts)
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    if int(chunk_points) < 1:
        raise ValueError("chunk_points must be a positive number of points")
    d = pts.shape[1]
    # (1) cubes whose diagonal is shorter than the link distance
    side = link_m / math.sqrt(d) * (1.0 - 1e-9)
    cube = np.floor((pts - column_bounds(pts)[0]) / side).astype(np.int64)
    key = cube[:, 0]
    for k in range(1, d):
        key = key * (int(cube[:, k].max()) + 1) + cube[:, k]
    _, first, inverse = np.unique(key, return_index=True, return_inverse=True)
    parent = first[inverse.reshape(-1)]  # smallest index of the point's cube
    del cube, key, first, inverse

    def roots(x: np.ndarray) -> np.ndarray:
        r = parent[x]
        while True:
            up = parent[r]
            if np.array_equal(up, r):
                return r
            r = up

    # (2) links between sets, chunk by chunk
    tree = cKDTree(pts)
    axis = int(np.argmax(np.ptp(pts[:, :2], axis=0))) if d >= 2 else 0
    order = np.argsort(pts[:, axis], kind="stable")  # chunks are compact slabs
    for lo in range(0, n, int(chunk_points)):                 # a loop over chunks of points
        chunk = order[lo:lo + int(chunk_points)]
        pairs = cKDTree(pts[chunk]).sparse_distance_matrix(tree, link_m, output_type="ndarray")
        i, j = chunk[pairs["i"]], pairs["j"]
        del pairs
        a, b = roots(i), roots(j)
        parent[i], parent[j] = a, b  # path compression of the nodes visited
        cross = a != b
        if not cross.any():
            continue
        edge = np.unique(np.minimum(a[cross], b[cross]) * n + np.maximum(a[cross], b[cross]))
        ends, node = np.unique(np.concatenate([edge // n, edge % n]), return_inverse=True)
        node = node.reshape(-1)
        graph = coo_matrix((np.ones(len(edge), dtype=np.int8), (node[:len(edge)],
                                                                  node[len(edge):])),
                           shape=(len(ends), len(ends)))
        _, cc = connected_components(graph, directed=False)
        _, smallest = np.unique(cc, return_index=True)  # ``ends`` ascends
        parent[ends] = ends[smallest][cc]
    # components numbered in the order of their smallest (first) point
    _, labels = np.unique(roots(np.arange(n)), return_inverse=True)
    return labels.reshape(-1).astype(np.int64)


def clearing_shift(offsets: np.ndarray, half_width_m: float) -> tuple[float, int]:
    r"""Smallest sideways shift of a wire that clears every point by ``half_width_m``.

    Parameters
    ----------
    offsets
        Signed horizontal offsets of the points from the wire (positive: left). [m]
    half_width_m
        Horizontal clearance required. [m]

    Returns
    -------
    shift : the smallest shift (either side) after which every point is at least
        ``half_width_m`` away; negative when no point is within ``half_width_m``: minus the
        distance the wire could move before the nearest point is. [m]
    index : the point that sets the shift (the last point cleared, or the nearest one).

    Notes
    -----
    The forbidden wire positions are the union of the intervals
    :math:`(o_i - h, o_i + h)`. Sorted offsets whose gaps are shorter than :math:`2h` form
    one connected block; if the block :math:`[o_{lo}, o_{hi}]` covers 0 the shift is
    :math:`\min(o_{hi} + h, h - o_{lo})`.
    """
    o = np.asarray(offsets, dtype=float).reshape(-1)
    if o.size == 0:
        return -math.inf, -1
    h = float(half_width_m)
    order = np.argsort(o)
    so = o[order]
    nearest = int(np.argmin(np.abs(so)))
    if abs(so[nearest]) >= h:
        return float(h - abs(so[nearest])), int(order[nearest])
    block = np.concatenate([[0], np.cumsum(np.diff(so) >= 2.0 * h)])
    members = np.flatnonzero(block == block[nearest])
    lo, hi = members[0], members[-1]
    to_left = so[hi] + h       # shift towards positive offsets, past the block's last point
    to_right = h - so[lo]      # shift towards negative offsets, past its first point
    if to_left <= to_right:
        return float(to_left), int(order[hi])
    return float(to_right), int(order[lo])


def building_envelope(points: np.ndarray, curve: np.ndarray, horizontal_m: float,
                      vertical_m: float) -> dict:
    r"""Box-envelope clearance of one building to one wire curve.

    Parameters
    ----------
    points
        Every point of the building, shape (n, 3). [m]
    curve
        The wire's sampled curve, shape (k, 3). [m]
    horizontal_m, vertical_m
        Horizontal and vertical requirement. [m]

    Returns
    -------
    dict
        ``violated`` (some point is inside the box envelope), ``rise_m`` (the wire's rise that
        clears every point within ``horizontal_m`` sideways; negative: the vertical margin),
        ``rise_point``, ``shift_m`` (the sideways shift that clears every point within
        ``vertical_m`` above/below; negative: the horizontal margin), ``shift_point``, and the
        per-point ``offset`` [m], ``wire_z`` [m] and ``parameter`` [-].

    Notes
    -----
    A point :math:`i` violates when :math:`|o_i| < h` and :math:`|z_w - z_i| < v`. Raising the
    wire by :math:`\delta_v = \max_{|o_i| < h}(z_i + v - z_w)` clears every point sideways
    closer than :math:`h`; shifting it by :math:`\delta_h` from :func:`clearing_shift` over the
    points with :math:`|z_w - z_i| < v` clears the rest. The building's deficit is
    :math:`\min(\delta_v, \delta_h)` and the governing direction the one that needs the
    smaller move (the wire is moved rigidly, its shape unchanged).
    """
    pts = np.asarray(points, dtype=float).reshape(-1, 3)
    offset, wire_z, param = polyline_offsets(pts, curve)
    h, v = float(horizontal_m), float(vertical_m)
    side = np.abs(offset) < h
    band = np.abs(wire_z - pts[:, 2]) < v
    out = {"violated": bool(np.any(side & band)), "offset": offset, "wire_z": wire_z,
           "parameter": param}
    if np.any(side):
        need = pts[:, 2] + v - wire_z
        cand = np.flatnonzero(side)
        j = cand[int(np.argmax(need[cand]))]
        out["rise_m"], out["rise_point"] = float(need[j]), int(j)
    else:
        out["rise_m"], out["rise_point"] = -math.inf, -1
    cand = np.flatnonzero(band)
    shift, k = clearing_shift(offset[cand], h)
    out["shift_m"], out["shift_point"] = shift, (int(cand[k]) if k >= 0 else -1)
    return out


@dataclass
class Findings:
    """Candidate findings of one obstacle kind: one entry per (point, wire, condition).

    Attributes
    ----------
    point
        Index into the kind's corridor points.
    state
        Index of the wire state (span, wire).
    condition
        Condition name per entry.
    clearance_m, required_m, ci95_m
        Clearance, requirement and the clearance's 95 % half-width. [m]
    fraction
        Position of the nearest wire point along the span, 0..1. [-]
    key
        Ground surface / building direction / ``value`` / ``any``.
    other_deficit_m
        Buildings: the deficit in the other direction (the move that is not governing); NaN
        for other kinds. ``None``: all NaN. [m]
    """

    point: np.ndarray
    state: np.ndarray
    condition: np.ndarray
    clearance_m: np.ndarray
    required_m: np.ndarray
    ci95_m: np.ndarray
    fraction: np.ndarray
    key: np.ndarray
    other_deficit_m: np.ndarray | None = None

    def __post_init__(self) -> None:
        if self.other_deficit_m is None:
            self.other_deficit_m = np.full(len(self.point), np.nan)

    @property
    def deficit_m(self) -> np.ndarray:
        """Requirement minus clearance (positive: violation). [m]"""
        return self.required_m - self.clearance_m

    @classmethod
    def empty(cls) -> Findings:
        z = np.zeros(0)
        return cls(z.astype(int), z.astype(int), z.astype(object), z, z, z, z, z.astype(object))

    @classmethod
    def concat(cls, parts: list[Findings]) -> Findings:
        parts = [p for p in parts if len(p.point)]
        if not parts:
            return cls.empty()
        return cls(*(np.concatenate([getattr(p, f) for p in parts]) for f in (
            "point", "state", "condition", "clearance_m", "required_m", "ci95_m", "fraction",
            "key", "other_deficit_m")))

    def select(self, mask: np.ndarray) -> Findings:
        return Findings(self.point[mask], self.state[mask], self.condition[mask],
                        self.clearance_m[mask], self.required_m[mask], self.ci95_m[mask],
                        self.fraction[mask], self.key[mask], self.other_deficit_m[mask])


def reduce_findings(findings: Findings, groups: np.ndarray, labels: np.ndarray
                    ) -> list[int]:
    """The worst entry of each (obstacle, condition group).

    Parameters
    ----------
    findings
        Candidate entries.
    groups
        Condition group per entry (``survey``, ``mot``, ``wind``, ``ice``).
    labels
        Obstacle label per entry.

    Returns
    -------
    rows : list of int
        Indices of the entries kept: largest deficit, then smallest clearance.
    """
    if len(findings.point) == 0:
        return []
    _, g = np.unique(groups, return_inverse=True)
    order = np.lexsort((findings.clearance_m, -findings.deficit_m, g, labels))
    key = np.column_stack([labels[order], g[order]])
    first = np.ones(len(order), dtype=bool)
    first[1:] = np.any(key[1:] != key[:-1], axis=1)
    return [int(i) for i in order[first]]


def radial_findings(points: np.ndarray, tree: cKDTree, curve: np.ndarray,
                    fraction: np.ndarray, required_m: float, ci_along: np.ndarray,
                    margin_m: float) -> tuple[np.ndarray, ...]:
    """Points of ``tree`` within reach of a curve, with their 3-D clearance and half-width.

    Parameters
    ----------
    points
        The corridor points the tree was built on, (n, 3). [m]
    tree
        k-d tree of ``points``.
    curve, fraction
        Curve samples (k, 3) [m] and their position along the span (k,) [-].
    required_m
        Requirement. [m]
    ci_along
        Position half-width at each curve sample (k,). [m]
    margin_m
        Extra search distance beyond the requirement. [m]

    Returns
    -------
    index, clearance, ci95, fraction : arrays over the points whose clearance minus half-width
        is below the requirement.
    """
    radius = required_m + margin_m
    if radius <= 0 or len(points) == 0:
        empty = np.zeros(0)
        return empty.astype(int), empty, empty, empty
    idx = points_near_curves(tree, [curve], radius)
    if idx.size == 0:
        empty = np.zeros(0)
        return empty.astype(int), empty, empty, empty
    p = take_rows(points, idx)
    d, closest, param = polyline_distance(p, curve)
    frac = np.interp(param, np.arange(len(curve)), fraction)
    ci = np.interp(param, np.arange(len(curve)), ci_along)
    # The curve's uncertainty is vertical; project it on the point-to-wire direction.
    nz = np.abs(closest[:, 2] - p[:, 2]) / np.maximum(d, 1e-9)
    ci = ci * np.where(d > 1e-9, nz, 1.0)
    keep = d - ci < required_m
    return idx[keep], d[keep], ci[keep], frac[keep]

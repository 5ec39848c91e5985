"""Clearance engine: exact distances from classified points to the wires' condition curves.

* **3-D radial** clearance (vegetation, other wires): the exact distance from each point to the
  densely sampled curve, i.e. to its polyline segments (nearest vertex by a k-d tree, then the
  two adjacent segments);
* **vertical** clearance to ground: for ground points within ``lateral_m`` horizontally of the
  wire, the wire's height above the point where the wire passes over it;
* **buildings**: a box envelope — a point violates when it is closer than the horizontal
  requirement sideways *and* closer than the vertical requirement above/below the wire; the
  deficit is the smaller move that clears it.

Candidates are found with one :class:`scipy.spatial.cKDTree` per obstacle group (built once over
the corridor points of that group), queried with every curve's samples. Violating points are then
grouped into obstacles (single linkage at ``link_m``; components longer than ``max_extent_m`` are
cut into tiles of that size), and each obstacle gives one finding per condition: its point
nearest to violating, with clearance, requirement and deficit.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

__all__ = [
    "Findings",
    "group_obstacles",
    "polyline_distance",
    "polyline_overhead",
    "reduce_findings",
]


def _segments(polyline: np.ndarray):
    p = np.asarray(polyline, dtype=float)
    if p.ndim != 2 or len(p) < 2:
        raise ValueError("A polyline needs at least two vertices.")
    return p


def _project(points: np.ndarray, p0: np.ndarray, p1: np.ndarray):
    d = p1 - p0
    dd = np.einsum("ij,ij->i", d, d)
    t = np.einsum("ij,ij->i", points - p0, d) / np.where(dd > 0, dd, 1.0)
    t = np.clip(t, 0.0, 1.0)
    closest = p0 + t[:, None] * d
    return t, closest


def _nearest_segment(points: np.ndarray, vertices: np.ndarray, tree: cKDTree | None):
    """Nearest point on the polyline through ``vertices`` (any dimension)."""
    tree = tree or cKDTree(vertices)
    _, k = tree.query(points)
    n = len(vertices)
    best_d = np.full(len(points), np.inf)
    best_c = np.zeros_like(points)
    best_param = np.zeros(len(points))
    for offset in (-1, 0):  # segments (k-1, k) and (k, k+1)
        i0 = np.clip(k + offset, 0, n - 2)
        t, c = _project(points, vertices[i0], vertices[i0 + 1])
        d = np.linalg.norm(points - c, axis=1)
        better = d < best_d
        best_d = np.where(better, d, best_d)
        best_c[better] = c[better]
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
    poly = _segments(polyline)
    if len(pts) == 0:
        return np.zeros(0), np.zeros(0), np.zeros(0)
    lateral, _, param = _nearest_segment(pts[:, :2], poly[:, :2], tree_xy)
    i0 = np.clip(np.floor(param).astype(int), 0, len(poly) - 2)
    t = param - i0
    wire_z = poly[i0, 2] + t * (poly[i0 + 1, 2] - poly[i0, 2])
    return lateral, wire_z, param


def group_obstacles(xyz: np.ndarray, link_m: float = 1.5, max_extent_m: float = 15.0
                    ) -> np.ndarray:
    """Group points into obstacles (single linkage), cutting long groups into tiles.

    Parameters
    ----------
    xyz
        Shape (n, 3). [m]
    link_m
        Two points closer than this belong to the same obstacle. [m]
    max_extent_m
        Groups whose horizontal extent exceeds this are cut into ``max_extent_m`` square tiles
        (a hedge row or a forest edge becomes several obstacles a crew can find). [m]

    Returns
    -------
    labels : (n,) int, 0 .. n_obstacles-1.
    """
    pts = np.asarray(xyz, dtype=float).reshape(-1, 3)
    n = len(pts)
    if n == 0:
        return np.zeros(0, dtype=int)
    if not link_m > 0 or not max_extent_m > 0:
        raise ValueError("The link distance and the largest extent must be positive.")
    pairs = cKDTree(pts).query_pairs(link_m, output_type="ndarray")
    graph = coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(n, n))
    _, labels = connected_components(graph, directed=False)
    lo = np.full((labels.max() + 1, 2), np.inf)
    hi = np.full((labels.max() + 1, 2), -np.inf)
    np.minimum.at(lo, labels, pts[:, :2])
    np.maximum.at(hi, labels, pts[:, :2])
    long = np.max(hi - lo, axis=1) > max_extent_m
    if np.any(long[labels]):
        tile = np.floor((pts[:, :2] - lo[labels]) / max_extent_m).astype(np.int64)
        tile[~long[labels]] = 0
        key = np.column_stack([labels, tile])
        _, labels = np.unique(key, axis=0, return_inverse=True)
        labels = labels.reshape(-1)
    return labels


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
    """

    point: np.ndarray
    state: np.ndarray
    condition: np.ndarray
    clearance_m: np.ndarray
    required_m: np.ndarray
    ci95_m: np.ndarray
    fraction: np.ndarray
    key: np.ndarray

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
            "key")))

    def select(self, mask: np.ndarray) -> Findings:
        return Findings(self.point[mask], self.state[mask], self.condition[mask],
                        self.clearance_m[mask], self.required_m[mask], self.ci95_m[mask],
                        self.fraction[mask], self.key[mask])


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
    hits = tree.query_ball_point(curve, radius, return_sorted=False)
    idx = np.unique(np.fromiter((i for lst in hits for i in lst), dtype=np.int64))
    if idx.size == 0:
        empty = np.zeros(0)
        return empty.astype(int), empty, empty, empty
    p = points[idx]
    d, closest, param = polyline_distance(p, curve)
    frac = np.interp(param, np.arange(len(curve)), fraction)
    ci = np.interp(param, np.arange(len(curve)), ci_along)
    # The curve's uncertainty is vertical; project it on the point-to-wire direction.
    nz = np.abs(closest[:, 2] - p[:, 2]) / np.maximum(d, 1e-9)
    ci = ci * np.where(d > 1e-9, nz, 1.0)
    keep = d - ci < required_m
    return idx[keep], d[keep], ci[keep], frac[keep]

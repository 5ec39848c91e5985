"""Structures (towers, poles) of a line: detection from the cloud, snapping to a given list,
ordering along the line, line angles and the suspension / dead-end decision.

Everything here works in local metres (``Cloud.xyz``). The functions are vectorised over
points; the only Python loops run over structures or grid components.
"""
from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components, minimum_spanning_tree, shortest_path
from scipy.spatial import cKDTree

from ..arrays import column_bounds

SUSPENSION = "suspension"
DEADEND = "deadend"
STRUCTURE_KINDS = (SUSPENSION, DEADEND)


@dataclass(eq=False)
class Structure:
    """One tower or pole of the line.

    Attributes
    ----------
    id
        Identifier: from the structures file, or ``"S001"``, ``"S002"`` … in line order when
        detected.
    xy
        Horizontal position of the structure's vertical axis, shape (2,). [m, local]
    z_top
        Highest structure (or attached wire) point. [m, local]
    z_ground
        Ground height at the structure (median of nearby ground points), ``None`` when no
        ground points are near. [m, local]
    kind
        ``"suspension"`` or ``"deadend"``.
    source
        ``"detected"`` (found in the cloud) or ``"given"`` (from the structures file).
    line_angle_deg
        Deviation of the line direction at this structure (0 on a straight line). [deg]
    kind_reason
        Why the kind was chosen (``"given"``, ``"line angle 23.1 deg"``, ``"end of wires"``,
        ``"horizontal insulator strings"``, ``"default"``).
    footprint_radius_m
        Radius of the detected structure footprint (0 when not detected). [m]
    n_points
        Number of cloud points attributed to the structure (0 when not detected).
    matched_detection
        For a given structure: whether a detected structure was found near it.
    """

    id: str
    xy: np.ndarray
    z_top: float | None = None
    z_ground: float | None = None
    kind: str = SUSPENSION
    source: str = "detected"
    line_angle_deg: float = 0.0
    kind_reason: str = "default"
    footprint_radius_m: float = 0.0
    n_points: int = 0
    matched_detection: bool = True
    point_indices: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64),
                                      repr=False)

    def to_json(self) -> dict:
        """JSON-serialisable dictionary (SI units, local metres)."""
        return {
            "id": self.id,
            "x_m": float(self.xy[0]), "y_m": float(self.xy[1]),
            "z_top_m": _opt(self.z_top), "z_ground_m": _opt(self.z_ground),
            "kind": self.kind, "kind_reason": self.kind_reason, "source": self.source,
            "line_angle_deg": float(self.line_angle_deg),
            "footprint_radius_m": float(self.footprint_radius_m),
            "n_points": int(self.n_points), "matched_detection": bool(self.matched_detection),
        }


def _opt(value: float | None) -> float | None:
    return None if value is None or not np.isfinite(value) else float(value)


@dataclass(eq=False)
class DetectedColumn:
    """A tall vertical column of points found by :func:`detect_columns`."""

    xy: np.ndarray
    z_top: float
    z_bottom: float
    radius_m: float
    point_indices: np.ndarray  # indices into the array given to detect_columns


# --------------------------------------------------------------------------- detection
def detect_columns(
    xyz: np.ndarray,
    *,
    cell_m: float = 1.0,
    z_bin_m: float = 0.5,
    min_levels: int = 6,
    min_height_m: float = 6.0,
    merge_distance_m: float = 3.0,
    min_points: int = 30,
) -> list[DetectedColumn]:
    """Find tall vertical columns of points (towers, poles) in a set of points.

    Parameters
    ----------
    xyz
        Candidate points, shape (n, 3). [m]
    cell_m
        Horizontal grid cell size. [m]
    z_bin_m
        Vertical bin size used to count occupied levels in a cell. [m]
    min_levels
        A cell is a column cell when at least this many vertical bins are occupied. [-]
    min_height_m
        Smallest vertical extent of a structure's points. [m]
    merge_distance_m
        Column cells closer than this belong to one structure (lattice legs, arms). [m]
    min_points
        Smallest number of points of a structure. [-]

    Returns
    -------
    list of DetectedColumn
        Position = mean of the mid-points of the 5–95, 10–90, 20–80 and 30–70 % ranges of
        the lower half of the column's points (the body and legs, which are symmetric about
        the axis even when the arms are not; mid-ranges of inner percentiles are less noisy
        than the extremes).

    Notes
    -----
    A wire crossing a cell occupies one or two vertical bins; a lattice tower or a pole
    occupies many. Counting occupied (cell, bin) pairs separates the two without eigen
    features. Common practice (no source).

    Only occupied cells are stored (sorted integer keys), so memory follows the number of
    points, not the bounding box of a long or bent line; column cells are grown by
    ``ceil(merge_distance_m / cell_m)`` cells (Manhattan distance, as repeated 4-neighbour
    dilation) and joined by 8-connected components of a sparse neighbour graph.
    """
    xyz = np.asarray(xyz, dtype=float).reshape(-1, 3)
    if cell_m <= 0 or z_bin_m <= 0 or merge_distance_m < 0:
        raise ValueError("cell size, bin size and merge distance must be positive")
    if len(xyz) < min_points:
        return []
    # Sparse grid: only occupied cells are stored, so memory follows the number of points,
    # not the bounding box of the line (a long or bent line spans a huge box).
    lo = column_bounds(xyz[:, :2])[0]
    ij = np.floor((xyz[:, :2] - lo) / cell_m).astype(np.int64)
    nx, ny = column_bounds(ij)[1] + 1
    flat = ij[:, 0] * ny + ij[:, 1]
    del ij
    cells, point_cell = np.unique(flat, return_inverse=True)
    del flat
    zb = np.floor(xyz[:, 2] / z_bin_m).astype(np.int64)
    zb -= zb.min()
    occupied_bins = np.unique(point_cell * (zb.max() + 1) + zb) // (zb.max() + 1)
    del zb
    levels = np.bincount(occupied_bins, minlength=len(cells))
    column = cells[levels >= min_levels]
    if len(column) == 0:
        return []
    r = max(int(np.ceil(merge_distance_m / cell_m)), 0)
    grown = _dilate_cells(column, nx, ny, r)
    member = _dilate_cells(column, nx, ny, min(r, 1))  # column cells + 4-neighbours
    comp = _label_cells(grown, nx, ny)
    n_lab = int(comp.max()) + 1
    # label of each occupied cell (0 = not a member), then of each point
    cell_lab = np.zeros(len(cells), dtype=np.int64)
    pos = np.searchsorted(cells, member)
    hit = pos < len(cells)
    hit[hit] = cells[pos[hit]] == member[hit]
    cell_lab[pos[hit]] = comp[np.searchsorted(grown, member[hit])] + 1
    point_lab = cell_lab[point_cell]
    del point_cell
    out: list[DetectedColumn] = []
    order = np.argsort(point_lab, kind="stable")
    bounds = np.searchsorted(point_lab[order], np.arange(n_lab + 2))
    for k in range(1, n_lab + 1):
        idx = order[bounds[k]:bounds[k + 1]]
        if len(idx) < min_points:
            continue
        z = xyz[idx, 2]
        z_bottom, z_top = float(z.min()), float(z.max())
        if z_top - z_bottom < min_height_m:
            continue
        lower = idx[z <= z_bottom + 0.5 * (z_top - z_bottom)]
        if len(lower) < 5:
            lower = idx
        q = np.percentile(xyz[lower, :2], [5, 10, 20, 30, 70, 80, 90, 95], axis=0)
        centre = np.mean(0.5 * (q[:4] + q[::-1][:4]), axis=0)
        radius = float(np.percentile(np.hypot(*(xyz[idx, :2] - centre).T), 95))
        out.append(DetectedColumn(xy=centre, z_top=z_top, z_bottom=z_bottom,
                                  radius_m=radius, point_indices=idx))
    return out


def _dilate_cells(cells: np.ndarray, nx: int, ny: int, radius: int) -> np.ndarray:
    """Sorted flat keys (``i * ny + j``) of the cells within Manhattan distance ``radius``
    of ``cells``, clipped to the ``nx`` × ``ny`` box.

    Same cells as ``ndimage.binary_dilation`` of the dense mask with the default cross
    structure iterated ``radius`` times (a box is convex in the Manhattan metric, so
    clipping after dilating equals dilating inside the box).
    """
    if radius <= 0:
        return np.unique(cells)
    di, dj = np.meshgrid(np.arange(-radius, radius + 1), np.arange(-radius, radius + 1),
                         indexing="ij")
    keep = np.abs(di) + np.abs(dj) <= radius
    di, dj = di[keep], dj[keep]
    i = cells // ny
    j = cells % ny
    gi = (i[:, None] + di[None, :]).ravel()
    gj = (j[:, None] + dj[None, :]).ravel()
    inside = (gi >= 0) & (gi < nx) & (gj >= 0) & (gj < ny)
    return np.unique(gi[inside] * ny + gj[inside])


def _label_cells(cells: np.ndarray, nx: int, ny: int) -> np.ndarray:
    """8-connected components of a sorted set of occupied cells (flat keys ``i * ny + j``).

    Returns the component of each cell, numbered from 0 in the order of each component's
    first cell in row-major order (the numbering of ``ndimage.label`` on the dense grid).
    """
    n = len(cells)
    i = cells // ny
    j = cells % ny
    rows, cols = [np.arange(n)], [np.arange(n)]
    for di, dj in ((0, 1), (1, -1), (1, 0), (1, 1)):  # half of the 8 neighbours
        ni, nj = i + di, j + dj
        ok = (ni < nx) & (nj >= 0) & (nj < ny)
        key = ni[ok] * ny + nj[ok]
        pos = np.searchsorted(cells, key)
        found = pos < n
        found[found] = cells[pos[found]] == key[found]
        rows.append(np.flatnonzero(ok)[found])
        cols.append(pos[found])
    r = np.concatenate(rows)
    c = np.concatenate(cols)
    graph = coo_matrix((np.ones(len(r), dtype=np.int8), (r, c)), shape=(n, n)).tocsr()
    _, comp = connected_components(graph, directed=False)
    # renumber by first cell in row-major order (cells are sorted, so by first index)
    first = np.full(comp.max() + 1, n, dtype=np.int64)
    np.minimum.at(first, comp, np.arange(n))
    rank = np.empty_like(first)
    rank[np.argsort(first)] = np.arange(len(first))
    return rank[comp]


def ground_height_at(ground_xyz: np.ndarray, xy: np.ndarray, radius_m: float = 10.0) -> float | None:
    """Median height of ground points within ``radius_m`` of ``xy``. [m] (None when none)."""
    if ground_xyz is None or len(ground_xyz) == 0:
        return None
    xy = np.asarray(xy)
    # cheap pre-selection on x alone: hypot(dx, dy) >= |dx| for the same rounded dx, so no
    # point within the radius is left out
    cand = np.flatnonzero(np.abs(ground_xyz[:, 0] - xy[0]) <= radius_m)
    if len(cand) == 0:
        return None
    sub = np.take(ground_xyz, cand, axis=0)
    d = np.hypot(*(sub[:, :2] - xy[None, :]).T)
    near = d <= radius_m
    if not near.any():
        return None
    return float(np.median(sub[near, 2]))


def ground_heights_at(
    xyz: np.ndarray, xy: np.ndarray, radius_m: Sequence[float] | np.ndarray,
    which: np.ndarray | None = None,
) -> list[float | None]:
    """:func:`ground_height_at` for several places at once, with one pass over the points.

    Parameters
    ----------
    xyz
        Points, shape (n, 3). [m]
    xy
        Places, shape (m, 2). [m]
    radius_m
        Search radius of each place, shape (m,). [m]
    which
        Optional boolean mask, shape (n,), of the ground points among ``xyz`` (default: all).

    Returns
    -------
    list of float or None
        Median ground height near each place (None where there is none), the same values
        :func:`ground_height_at` gives. [m]

    Notes
    -----
    Only points whose coordinate along the places' longer extent (x or y) falls in a cell
    of a coarse 1-D grid overlapping a window ``[c_i - r_i - e, c_i + r_i + e]`` (``e`` a
    round-off allowance) are passed on; every point within ``r_i`` of place ``i`` lies in
    its window because ``hypot(dx, dy) >= max(|dx|, |dy|)``.
    """
    xy = np.asarray(xy, dtype=np.float64).reshape(-1, 2)
    radii = np.broadcast_to(np.asarray(radius_m, dtype=np.float64), (len(xy),))
    if len(xy) == 0:
        return []
    axis = int(np.argmax(np.ptp(xy, axis=0)))
    c = xy[:, axis]
    allowance = 1e-9 * (np.abs(c) + radii) + 1e-9
    start, end = c - radii - allowance, c + radii + allowance
    lo = float(start.min())
    width = max(float(radii.min()) / 2.0, float(end.max() - lo) / 1e6, 1e-6)
    n_cells = int((end.max() - lo) / width) + 2
    cell_lo = np.floor((start - lo) / width).astype(np.int64)
    cell_hi = np.floor((end - lo) / width).astype(np.int64)
    marked = np.zeros(n_cells + 1, dtype=np.int32)
    np.add.at(marked, np.clip(cell_lo, 0, n_cells), 1)
    np.add.at(marked, np.clip(cell_hi + 1, 0, n_cells), -1)
    table = np.cumsum(marked[:-1]) > 0
    t = xyz[:, axis] - lo
    t /= width  # the same rounded steps as for the cells above, so the mapping is monotone
    np.clip(t, -1.0, n_cells, out=t)
    cell = np.floor(t).astype(np.int64)
    del t
    keep = (cell >= 0) & (cell < n_cells)
    np.minimum(cell, n_cells - 1, out=cell)
    np.maximum(cell, 0, out=cell)
    keep &= np.take(table, cell)
    del cell
    if which is not None:
        keep &= which
    near = np.take(xyz, np.flatnonzero(keep), axis=0)
    return [ground_height_at(near, p, r) for p, r in zip(xy, radii, strict=True)]


def snap_to_given(
    detected: list[DetectedColumn], given_xy: np.ndarray, snap_radius_m: float
) -> tuple[np.ndarray, np.ndarray]:
    """Match detected columns to given structure positions.

    Parameters
    ----------
    detected
        Detected columns.
    given_xy
        Given positions, shape (m, 2). [m]
    snap_radius_m
        Largest distance of a match. [m]

    Returns
    -------
    match : (m,) int
        Index of the detected column matched to each given structure, -1 when none.
    unmatched : (k,) int
        Indices of detected columns matched to no given structure.
    """
    given_xy = np.asarray(given_xy, dtype=float).reshape(-1, 2)
    match = np.full(len(given_xy), -1, dtype=np.int64)
    if not detected or len(given_xy) == 0:
        return match, np.arange(len(detected))
    det_xy = np.array([d.xy for d in detected])
    dist = np.hypot(det_xy[None, :, 0] - given_xy[:, None, 0],
                    det_xy[None, :, 1] - given_xy[:, None, 1])
    used = np.zeros(len(detected), dtype=bool)
    # greedy on increasing distance: each detection matches at most one given structure
    for flat in np.argsort(dist, axis=None):
        gi, di = np.unravel_index(flat, dist.shape)
        if dist[gi, di] > snap_radius_m:
            break
        if match[gi] < 0 and not used[di]:
            match[gi] = di
            used[di] = True
    return match, np.flatnonzero(~used)


# --------------------------------------------------------------------------- ordering
def order_along_line(
    xy: np.ndarray,
    wire_xy: np.ndarray | None = None,
    *,
    support_radius_m: float = 15.0,
    unsupported_penalty: float = 2.0,
    max_offset_m: float | None = None,
) -> np.ndarray:
    """Order structure positions along the line.

    Parameters
    ----------
    xy
        Structure positions, shape (n, 2). [m]
    wire_xy
        Horizontal positions of wire points (may be subsampled), shape (k, 2), or ``None``. [m]
    support_radius_m
        A sample on the segment between two structures is "supported" when a wire point lies
        within this horizontal distance. [m]
    unsupported_penalty
        Edge weight = length × (1 + penalty × unsupported fraction). [-]
    max_offset_m
        When given, structures off the main path farther than this from it (poles of a
        crossing line, masts) are left out of the order. [m]

    Returns
    -------
    order : (k,) int
        Indices of ``xy`` from one end of the line to the other (k = n unless structures
        were left out).

    Notes
    -----
    A minimum spanning tree over candidate edges (each structure to its nearest neighbours)
    weighted by length and by how much of the segment is accompanied by wire points; the
    longest path of the tree is the line, and structures off that path are inserted where
    they lengthen it least. This follows bends and angle points, unlike sorting by x.
    Common practice (no source).
    """
    xy = np.asarray(xy, dtype=float).reshape(-1, 2)
    n = len(xy)
    if n <= 2:
        order = np.arange(n)
        return order
    k = min(n - 1, 6)
    tree = cKDTree(xy)
    dist, nbr = tree.query(xy, k=k + 1)
    rows = np.repeat(np.arange(n), k)
    cols = nbr[:, 1:].ravel()
    lengths = dist[:, 1:].ravel()
    weights = lengths.copy()
    if wire_xy is not None and len(wire_xy) > 0:
        wtree = cKDTree(np.asarray(wire_xy, dtype=float).reshape(-1, 2))
        fr = np.linspace(0.1, 0.9, 9)
        pts = xy[rows][:, None, :] + fr[None, :, None] * (xy[cols] - xy[rows])[:, None, :]
        d, _ = wtree.query(pts.reshape(-1, 2), k=1, distance_upper_bound=support_radius_m)
        unsupported = np.isinf(d).reshape(len(rows), -1).mean(axis=1)
        weights = lengths * (1.0 + unsupported_penalty * unsupported)
    weights = np.maximum(weights, 1e-9)
    graph = coo_matrix((weights, (rows, cols)), shape=(n, n)).tocsr()
    graph = graph.maximum(graph.T)
    mst = minimum_spanning_tree(graph)
    mst = mst.maximum(mst.T)
    d0 = shortest_path(mst, directed=False, indices=0)
    d0[~np.isfinite(d0)] = -1
    a = int(np.argmax(d0))
    da, pred = shortest_path(mst, directed=False, indices=a, return_predecessors=True)
    da[~np.isfinite(da)] = -1
    b = int(np.argmax(da))
    path = [b]
    while path[-1] != a:
        path.append(int(pred[path[-1]]))
        if path[-1] < 0:
            break
    path = [p for p in path if p >= 0]
    rest = [i for i in range(n) if i not in set(path)]
    if max_offset_m is not None and len(path) >= 2:
        main = xy[path]
        a, b = main[:-1], main[1:]
        keep = []
        for i in rest:
            d = b - a
            f = np.clip(np.sum((xy[i] - a) * d, axis=1) / np.maximum(np.sum(d * d, axis=1),
                                                                     1e-12), 0.0, 1.0)
            off = np.min(np.hypot(*(a + f[:, None] * d - xy[i]).T))
            if off <= max_offset_m:
                keep.append(i)
        rest = keep
    # cheapest insertion of the structures off the main path
    for i in sorted(rest, key=lambda j: float(np.min(np.hypot(*(xy[path] - xy[j]).T)))):
        p = xy[path]
        cost_mid = (np.hypot(*(p[:-1] - xy[i]).T) + np.hypot(*(p[1:] - xy[i]).T)
                    - np.hypot(*(p[1:] - p[:-1]).T))
        cost_ends = [np.hypot(*(p[0] - xy[i])), np.hypot(*(p[-1] - xy[i]))]
        options = np.concatenate([[cost_ends[0]], cost_mid, [cost_ends[1]]])
        pos = int(np.argmin(options))
        path.insert(pos, i)
    order = np.asarray(path, dtype=np.int64)
    # deterministic direction: start at the end with the smaller x (then y)
    if tuple(xy[order[-1]]) < tuple(xy[order[0]]):
        order = order[::-1]
    return order


def line_angles_deg(xy_ordered: np.ndarray, before_xy: np.ndarray | None = None,
                    after_xy: np.ndarray | None = None) -> np.ndarray:
    """Deviation angle of the line at each structure. [deg]

    Parameters
    ----------
    xy_ordered
        Structure positions in line order, shape (n, 2). [m]
    before_xy, after_xy
        Optional virtual points before the first and after the last structure (far ends of
        partial spans), shape (2,). [m]

    Returns
    -------
    angles : (n,) float
        Angle between the incoming and the outgoing span directions, 0 on a straight line and
        at line ends without a partial span. [deg]
    """
    p = np.asarray(xy_ordered, dtype=float).reshape(-1, 2)
    pts = p
    if before_xy is not None:
        pts = np.vstack([before_xy, pts])
    if after_xy is not None:
        pts = np.vstack([pts, after_xy])
    off = 1 if before_xy is not None else 0
    angles = np.zeros(len(p))
    if len(pts) < 3:
        return angles
    d = np.diff(pts, axis=0)
    d /= np.maximum(np.linalg.norm(d, axis=1, keepdims=True), 1e-12)
    cosang = np.clip(np.sum(d[:-1] * d[1:], axis=1), -1.0, 1.0)
    inner = np.degrees(np.arccos(cosang))  # at pts[1:-1]
    for j, ang in enumerate(inner):
        i = j + 1 - off
        if 0 <= i < len(p):
            angles[i] = ang
    return angles


def insulators_horizontal(
    insulator_xyz: np.ndarray,
    centre_xy: np.ndarray,
    line_dir: np.ndarray,
    *,
    radius_m: float,
    voxel_m: float = 0.5,
    min_points: int = 8,
) -> tuple[bool, int, int]:
    """Whether the insulator strings at a structure hang horizontally (dead-end strings).

    Parameters
    ----------
    insulator_xyz
        Insulator / hardware points (ASPRS class 16), shape (n, 3). [m]
    centre_xy
        Structure position, shape (2,). [m]
    line_dir
        Unit horizontal line direction at the structure, shape (2,). [-]
    radius_m
        Search radius around the structure. [m]
    voxel_m
        Voxel size used to split the points into strings. [m]
    min_points
        Smallest number of points of one string. [-]

    Returns
    -------
    horizontal : bool
        More than half of the strings are longer along the line than they are tall.
    n_horizontal, n_strings : int

    Notes
    -----
    Suspension strings hang plumb (tall, short along the line); dead-end (strain) strings
    lie in the line direction. Common practice (no source).
    """
    if insulator_xyz is None or len(insulator_xyz) < min_points:
        return False, 0, 0
    rel = insulator_xyz[:, :2] - np.asarray(centre_xy)[None, :]
    near = np.hypot(*rel.T) <= radius_m
    pts = insulator_xyz[near]
    if len(pts) < min_points:
        return False, 0, 0
    vox = np.floor((pts - column_bounds(pts)[0]) / voxel_m).astype(np.int64)
    shape = column_bounds(vox)[1] + 1
    grid = np.zeros(shape, dtype=bool)
    grid[tuple(vox.T)] = True
    labels, n_lab = ndimage.label(grid, structure=np.ones((3, 3, 3)))
    lab = labels[tuple(vox.T)]
    along = (pts[:, :2] - np.asarray(centre_xy)[None, :]) @ np.asarray(line_dir)
    n_h = n_s = 0
    for k in range(1, n_lab + 1):
        m = lab == k
        if m.sum() < min_points:
            continue
        n_s += 1
        a_ext = np.ptp(along[m])
        z_ext = np.ptp(pts[m, 2])
        if a_ext > 1.5 * z_ext and a_ext > 1.0:
            n_h += 1
    return (n_s > 0 and n_h > n_s / 2), n_h, n_s

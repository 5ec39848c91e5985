"""Vegetation work priorities: trees, fall-in risk, grow-in time and the ranking of findings.

Trees are found on a canopy grid: the highest vegetation point of each ``cell_m`` cell, and a
tree top where a cell is the highest within ``window_m`` (local-maximum filtering, Popescu &
Wynne 2004). Crowns are delineated by steepest ascent on the canopy grid: every cell climbs to
its highest neighbour until it reaches a local maximum (the flow-path form of the watershed
segmentation of a canopy height model, Koch, Heyder & Weinacker 2006); a local maximum that is
not a tree top joins the nearest top within the window. One crown is one tree, hence one
obstacle. A tree's height is its top's height above ground; its trunk base is the ground point
under the top.

**Fall-in risk** (common practice (no source)): a tree can reach the line if it falls when the
3-D distance from its trunk base to the nearest wire point (survey or MOT curve) is shorter than
its height.

**Grow-in time** to the requirement: ``max(0, clearance - required) / growth rate``; 0 when the
tree already violates.

**Ranking** (1 = most urgent), tiers in this order, then the largest deficit, then fall-in risk,
then the shortest grow-in time:

1. violations already present at survey;
2. violations at MOT or in wind (operating conditions);
3. violations under ice;
4. possible violations (the clearance meets the requirement but its 95 % interval does not);
5. fall-in risks that violate no clearance (reported as separate vegetation rows with
   ``finding = "fall_in"``, condition ``survey``, a negative deficit).

References
----------
Popescu, S. C. and Wynne, R. H. (2004). Seeing the trees in the forest: using lidar and
multispectral data fusion with local filtering and variable window size for estimating tree
height. Photogrammetric Engineering & Remote Sensing 70(5), 589-604 (from memory).

Koch, B., Heyder, U. and Weinacker, H. (2006). Detection of individual tree crowns in airborne
lidar data. Photogrammetric Engineering & Remote Sensing 72(4), 357-363 (from memory).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

__all__ = ["TreeTops", "find_tree_tops", "rank_findings", "fall_in_distance"]

_CONDITION_WORDS = {"survey": "at survey", "mot": "at MOT", "wind": "in wind",
                    "ice": "under ice"}


_NEIGHBOURS = ((-1, -1), (-1, 0), (-1, 1), (0, -1), (0, 1), (1, -1), (1, 0), (1, 1))


@dataclass
class TreeTops:
    """Tree tops and crowns found on the canopy grid.

    Attributes
    ----------
    xy
        Top positions, shape (n, 2). [m]
    top_z
        Top heights (local z). [m]
    height_m
        Tree heights above ground. [m]
    cell_xyz
        The canopy grid's cell tops (highest vegetation point per cell), shape (m, 3). [m]
    cell_tree
        Index of the tree each cell belongs to (its crown, by steepest ascent), -1 none.
    cell_key
        Sorted integer key of each cell (see :meth:`cell_of`).
    grid
        ``(cell_m, ix0, iy0, stride)``: the key of cell (ix, iy) is
        ``(ix - ix0) * stride + (iy - iy0)``.
    """

    xy: np.ndarray
    top_z: np.ndarray
    height_m: np.ndarray
    cell_xyz: np.ndarray
    cell_tree: np.ndarray
    cell_key: np.ndarray | None = None
    grid: tuple[float, int, int, int] | None = None

    @property
    def base_xyz(self) -> np.ndarray:
        """Trunk bases (under the tops, on the ground), shape (n, 3). [m]"""
        return np.column_stack([self.xy, self.top_z - self.height_m])

    def __len__(self) -> int:
        return len(self.top_z)

    def cell_of(self, xyz: np.ndarray) -> np.ndarray:
        """Index of the canopy cell under each point (-1 outside the grid's cells).

        Parameters
        ----------
        xyz
            Points, shape (n, 2) or (n, 3). [m]
        """
        pts = np.asarray(xyz, dtype=float)
        pts = pts.reshape(-1, pts.shape[-1] if pts.ndim > 1 else 3)
        if self.grid is None or self.cell_key is None or len(self.cell_key) == 0:
            return np.full(len(pts), -1)
        cell_m, ix0, iy0, stride = self.grid
        ix = np.floor(pts[:, 0] / cell_m).astype(np.int64) - ix0
        iy = np.floor(pts[:, 1] / cell_m).astype(np.int64) - iy0
        ok = (ix >= 0) & (iy >= 0) & (iy < stride)
        key = np.where(ok, ix * stride + iy, -1)
        at = np.clip(np.searchsorted(self.cell_key, key), 0, len(self.cell_key) - 1)
        return np.where(ok & (self.cell_key[at] == key), at, -1)

    def tree_of(self, xyz: np.ndarray) -> np.ndarray:
        """Index of the tree whose crown holds each point (-1: none).

        Parameters
        ----------
        xyz
            Points, shape (n, 3). [m]
        """
        cell = self.cell_of(xyz)
        return np.where(cell >= 0, self.cell_tree[np.maximum(cell, 0)], -1) \
            if len(self.cell_tree) else np.full(len(cell), -1)


def _highest_per_cell(key: np.ndarray, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The occupied cells (ascending keys) and the index of each one's highest point.

    Of equal heights the last point in input order. With a key range of at most 2 per point
    (or 1 M) two ``maximum.at`` passes over a table of the keys (12 bytes per key: no more
    memory than the sort); otherwise a stable sort by key (input order within a cell) and the
    highest of each run. Both give the same cells and points for finite heights (the caller
    drops the others).
    """
    n = len(key)
    span = int(key.max()) + 1
    if span <= max(2 * n, 1 << 20):
        best = np.full(span, -np.inf)
        np.maximum.at(best, key, z)
        idx = np.flatnonzero(z == best[key])
        del best
        itype = np.int32 if n < 2**31 else np.int64
        last = np.full(span, -1, dtype=itype)
        np.maximum.at(last, key[idx], idx.astype(itype))
        cell_key = np.flatnonzero(last >= 0)
        return cell_key, last[cell_key].astype(np.intp)
    order = np.argsort(key, kind="stable")
    skey = key[order]
    first = np.ones(n, dtype=bool)
    first[1:] = skey[1:] != skey[:-1]
    starts = np.flatnonzero(first)
    z_sorted = z[order]
    run = np.cumsum(first) - 1
    highest = z_sorted == np.maximum.reduceat(z_sorted, starts)[run]
    at = np.maximum.reduceat(np.where(highest, np.arange(n), -1), starts)
    return skey[starts], order[at]


def find_tree_tops(xyz: np.ndarray, height_above_ground_m: np.ndarray, *, cell_m: float = 1.0,
                   window_m: float = 5.0, min_height_m: float = 2.0) -> TreeTops:
    r"""Tree tops as local maxima of the vegetation canopy, and their crowns.

    Parameters
    ----------
    xyz
        Vegetation points, shape (n, 3). [m]
    height_above_ground_m
        Their heights above ground, shape (n,). [m]
    cell_m
        Canopy grid cell. [m]
    window_m
        Diameter of the neighbourhood in which a top must be the highest. [m]
    min_height_m
        Lowest tree height reported. [m]

    Returns
    -------
    tops : :class:`TreeTops`

    Notes
    -----
    A cell is a top when its highest point is the highest within ``window_m / 2`` and stands at
    least ``min_height_m`` above ground (Popescu & Wynne 2004, fixed window). Crowns: each cell
    points to the highest of itself and its 8 neighbours; following the pointers (pointer
    jumping, :math:`O(\log n)` vectorised passes) leads every cell to a local maximum, which
    is a top or joins the nearest top within ``window_m``; maxima lower than ``min_height_m``
    with no top are not trees (Koch et al. 2006, flow-path watershed).
    """
    pts = np.asarray(xyz, dtype=float).reshape(-1, 3)
    hag = np.asarray(height_above_ground_m, dtype=float).reshape(-1)
    if len(pts) != len(hag):
        raise ValueError("Give one height above ground per point.")
    if not (cell_m > 0 and window_m > 0):
        raise ValueError("The cell size and the window must be positive.")
    ok = np.isfinite(hag) & np.isfinite(pts[:, 2])
    if not ok.all():
        pts, hag = pts[ok], hag[ok]
    if len(pts) == 0:
        return TreeTops(np.zeros((0, 2)), np.zeros(0), np.zeros(0), np.zeros((0, 3)),
                        np.zeros(0, dtype=int))
    ixy = np.floor(pts[:, :2] / cell_m).astype(np.int64)
    ix0, iy0 = int(ixy[:, 0].min()), int(ixy[:, 1].min())
    stride = int(ixy[:, 1].max()) - iy0 + 2
    key = (ixy[:, 0] - ix0) * stride + (ixy[:, 1] - iy0)
    del ixy
    cell_key, top_idx = _highest_per_cell(key, pts[:, 2])
    del key
    cell_xyz = pts[top_idx]
    cell_h = hag[top_idx]
    del top_idx  # from here on everything is per cell
    n_cells = len(cell_key)
    grid = (float(cell_m), ix0, iy0, stride)

    # ---- steepest ascent on the 8-neighbourhood
    parent = np.arange(n_cells)
    best_z = cell_xyz[:, 2].copy()
    # Cell of a key: a dense table when the grid is not much larger than the points, else a
    # binary search (the same cells either way).
    span = int(cell_key[-1]) + stride + 2
    table = None
    if span <= max(8 * len(pts), 1 << 22):
        table = np.full(span + stride + 2, -1, dtype=np.int32 if n_cells < 2 ** 31 else np.int64)
        table[cell_key] = np.arange(n_cells)
    for dx, dy in _NEIGHBOURS:
        nk = cell_key + dx * stride + dy
        if table is not None:
            found = table[np.maximum(nk, 0)]
            exists = (found >= 0) & (nk >= 0)
            at = np.where(exists, found, 0)
        else:
            at = np.clip(np.searchsorted(cell_key, nk), 0, n_cells - 1)
            exists = cell_key[at] == nk
        higher = exists & (cell_xyz[at, 2] > best_z)
        parent = np.where(higher, at, parent)
        best_z = np.where(higher, cell_xyz[at, 2], best_z)
    while True:
        nxt = parent[parent]
        if np.array_equal(nxt, parent):
            break
        parent = nxt
    roots = np.flatnonzero(parent == np.arange(n_cells))

    # ---- tops: highest within window_m / 2 and tall enough
    # Only the highest cell within the window is used, so the tree's shape does not matter:
    # the faster unbalanced build.
    tree = cKDTree(cell_xyz[:, :2], balanced_tree=False, compact_nodes=False)
    k = min(n_cells, int(np.ceil(np.pi * (window_m / 2 / cell_m + 1) ** 2)) + 1)
    cand = roots[cell_h[roots] >= min_height_m]    # a top is always a 3x3 local maximum
    tops = np.zeros(0, dtype=int)
    if cand.size:
        dist, nbr = tree.query(cell_xyz[cand, :2], k=k, distance_upper_bound=window_m / 2)
        dist = np.asarray(dist).reshape(len(cand), -1)
        nbr = np.asarray(nbr).reshape(len(cand), -1)
        nbr_z = np.where(np.isfinite(dist), cell_xyz[np.minimum(nbr, n_cells - 1), 2], -np.inf)
        tops = cand[cell_xyz[cand, 2] >= nbr_z.max(axis=1)]
    if tops.size:
        # Ties (flat tops): keep the first of equal neighbours only.
        dup = cKDTree(cell_xyz[tops, :2]).query_pairs(cell_m * 1.5, output_type="ndarray")
        drop = np.zeros(tops.size, dtype=bool)
        if len(dup):
            drop[np.maximum(dup[:, 0], dup[:, 1])] = True
        tops = tops[~drop]
    if tops.size == 0:
        return TreeTops(np.zeros((0, 2)), np.zeros(0), np.zeros(0), cell_xyz,
                        np.full(n_cells, -1), cell_key, grid)

    # ---- crowns: every root to a tree
    root_tree = np.full(n_cells, -1)
    root_tree[tops] = np.arange(tops.size)
    minor = roots[root_tree[roots] < 0]
    if minor.size:
        d_top, which = cKDTree(cell_xyz[tops, :2]).query(cell_xyz[minor, :2],
                                                          distance_upper_bound=window_m)
        joins = np.isfinite(d_top) & (cell_h[minor] >= min_height_m)
        root_tree[minor[joins]] = which[joins]
    cell_tree = root_tree[parent]
    return TreeTops(cell_xyz[tops, :2].copy(), cell_xyz[tops, 2].copy(), cell_h[tops].copy(),
                    cell_xyz, cell_tree, cell_key, grid)


def fall_in_distance(base_xyz: np.ndarray, wire_samples: np.ndarray) -> np.ndarray:
    """Distance from trunk bases to the nearest wire sample.

    Parameters
    ----------
    base_xyz
        Trunk bases, shape (n, 3). [m]
    wire_samples
        Points of every wire curve considered (densely sampled), shape (k, 3). [m]

    Returns
    -------
    distance : (n,) [m]; ``inf`` without wires.

    Notes
    -----
    A tree of height :math:`h` can fall into the line when :math:`d < h` (it pivots about its
    base; common practice (no source)).
    """
    base = np.asarray(base_xyz, dtype=float).reshape(-1, 3)
    wires = np.asarray(wire_samples, dtype=float).reshape(-1, 3)
    if len(wires) == 0 or len(base) == 0:
        return np.full(len(base), np.inf)
    d, _ = cKDTree(wires).query(base)
    return d


def _tier(row: dict) -> int:
    if row.get("finding") == "fall_in":
        return 4
    if row["deficit_m"] <= 0:
        return 3
    return {"survey": 0, "mot": 1, "wind": 1, "ice": 2}.get(row["condition"], 2)


def finding_key(row: dict) -> tuple:
    """Urgency order of a finding (smaller first): violations now, then at MOT and in wind,
    then under ice, then findings within their requirement, then fall-in risks; within a
    tier the larger deficit (to the millimetre) first, then fall-in risks before the others,
    the sooner grow-in first; then span and wire."""
    grow = row.get("grow_in_years")
    return (_tier(row), -round(float(row["deficit_m"]), 3), not bool(row.get("fall_in")),
            np.inf if grow is None else float(grow), str(row.get("span_id")),
            str(row.get("wire_id")))


def rank_findings(rows: list[dict]) -> list[dict]:
    """Give every finding a priority (1 = most urgent) and a reason sentence.

    Parameters
    ----------
    rows
        Findings with ``kind``, ``condition``, ``clearance_m``, ``required_m``, ``deficit_m``,
        ``fall_in``, ``grow_in_years`` (vegetation), ``finding``, ``span_id``, ``wire_id``,
        ``certainty``; optional ``tree_height_m``, ``fall_in_distance_m``,
        ``violated_at_survey``.

    Returns
    -------
    rows : list of dict
        The same rows sorted by priority, with ``priority`` and ``reason`` filled.
    """
    ranked = sorted(rows, key=finding_key)
    for i, row in enumerate(ranked, start=1):
        row["priority"] = i
        row["reason"] = _reason(row)
    return ranked


def _reason(row: dict) -> str:
    where = f"wire {row['wire_id']} in span {row['span_id']}"
    cond = _CONDITION_WORDS.get(row["condition"], row["condition"])
    if row.get("finding") == "fall_in":
        reach = row.get("fall_in_wire_id", row["wire_id"])
        role = row.get("fall_in_wire_role", row.get("role", ""))
        reach_span = row.get("fall_in_span_id", row["span_id"])
        text = (f"fall-in risk: tree {row.get('tree_height_m', float('nan')):.1f} m tall, trunk "
                f"{row.get('fall_in_distance_m', float('nan')):.1f} m from wire {reach}"
                f"{' (shield)' if role == 'shield' else ''} in span {reach_span}; its crown is "
                f"{row['clearance_m']:.2f} m from {where}, outside the {row['required_m']:.2f} m "
                f"vegetation requirement by {-row['deficit_m']:.2f} m")
    elif row["kind"] == "building" and row.get("direction"):
        direction = row["direction"]
        dv, dh = row.get("deficit_vertical_m"), row.get("deficit_horizontal_m")
        measure = "vertically" if direction == "vertical" else "sideways"
        head = ("building inside the box envelope" if row["deficit_m"] > 0
                else "possible building violation")
        text = (f"{head} {cond} ({where}): {row['clearance_m']:.2f} m {measure} against the "
                f"{row['required_m']:.2f} m {direction} requirement, deficit "
                f"{row['deficit_m']:.2f} m ({direction} governs")
        if dv is not None and dh is not None and row["deficit_m"] > 0:
            text += (f": the wire must rise {dv:.2f} m or move {dh:.2f} m sideways to clear "
                     "the whole building")
        text += ")"
        if row["condition"] != "survey" and row.get("violated_at_survey"):
            text += "; also violated at survey"
    elif row["deficit_m"] > 0:
        text = (f"{row['kind']} {row['deficit_m']:.2f} m inside the {row['required_m']:.2f} m "
                f"requirement {cond} ({where})")
        if row["condition"] != "survey" and row.get("violated_at_survey"):
            text += "; also violated at survey"
    else:
        text = (f"possible {row['kind']} violation {cond}: clearance {row['clearance_m']:.2f} m "
                f"± {row.get('clearance_ci95_m', 0.0):.2f} m against {row['required_m']:.2f} m "
                f"({where})")
    if row.get("certainty") == "uncertain" and row.get("finding") != "fall_in" \
            and row["deficit_m"] > 0:
        text += "; uncertain (the 95 % interval reaches the requirement)"
    if row.get("fall_in") and row.get("finding") != "fall_in":
        text += (f"; tree {row.get('tree_height_m', float('nan')):.1f} m tall can fall into "
                 f"the line (reaches wire {row.get('fall_in_wire_id', row['wire_id'])})")
    grow = row.get("grow_in_years")
    if row["kind"] == "vegetation" and grow is not None and grow > 0:
        text += f"; grows into the requirement in {grow:.1f} years"
    return text

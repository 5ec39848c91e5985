"""Vegetation work priorities: trees, fall-in risk, grow-in time and the ranking of findings.

Trees are found on a canopy grid: the highest vegetation point of each ``cell_m`` cell, and a
tree top where a cell is the highest within ``window_m``. A tree's height is its top's height
above ground; its trunk base is the ground point under the top.

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
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

__all__ = ["TreeTops", "find_tree_tops", "rank_findings", "fall_in_distance"]

_CONDITION_WORDS = {"survey": "at survey", "mot": "at MOT", "wind": "in wind",
                    "ice": "under ice"}


@dataclass
class TreeTops:
    """Tree tops found on the canopy grid.

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
        Index of the tree each cell belongs to (nearest top within the window), -1 none.
    """

    xy: np.ndarray
    top_z: np.ndarray
    height_m: np.ndarray
    cell_xyz: np.ndarray
    cell_tree: np.ndarray

    @property
    def base_xyz(self) -> np.ndarray:
        """Trunk bases (under the tops, on the ground), shape (n, 3). [m]"""
        return np.column_stack([self.xy, self.top_z - self.height_m])

    def __len__(self) -> int:
        return len(self.top_z)


def find_tree_tops(xyz: np.ndarray, height_above_ground_m: np.ndarray, *, cell_m: float = 1.0,
                   window_m: float = 5.0, min_height_m: float = 2.0) -> TreeTops:
    """Tree tops as local maxima of the vegetation canopy.

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
    """
    pts = np.asarray(xyz, dtype=float).reshape(-1, 3)
    hag = np.asarray(height_above_ground_m, dtype=float).reshape(-1)
    if len(pts) != len(hag):
        raise ValueError("Give one height above ground per point.")
    if not (cell_m > 0 and window_m > 0):
        raise ValueError("The cell size and the window must be positive.")
    empty = TreeTops(np.zeros((0, 2)), np.zeros(0), np.zeros(0), np.zeros((0, 3)),
                     np.zeros(0, dtype=int))
    ok = np.isfinite(hag)
    pts, hag = pts[ok], hag[ok]
    if len(pts) == 0:
        return empty
    cells = np.floor(pts[:, :2] / cell_m).astype(np.int64)
    _, cell_of = np.unique(cells, axis=0, return_inverse=True)
    cell_of = cell_of.reshape(-1)
    # Highest point per cell: sort by z, last per cell wins.
    order = np.lexsort((pts[:, 2], cell_of))
    last = np.ones(len(order), dtype=bool)
    last[:-1] = cell_of[order][1:] != cell_of[order][:-1]
    top_idx = order[last]
    cell_xyz = pts[top_idx]
    cell_h = hag[top_idx]
    tree = cKDTree(cell_xyz[:, :2])
    k = min(len(cell_xyz), int(np.ceil(np.pi * (window_m / 2 / cell_m + 1) ** 2)) + 1)
    dist, nbr = tree.query(cell_xyz[:, :2], k=k, distance_upper_bound=window_m / 2)
    dist = np.asarray(dist).reshape(len(cell_xyz), -1)
    nbr = np.asarray(nbr).reshape(len(cell_xyz), -1)
    valid = np.isfinite(dist)
    nbr_z = np.where(valid, cell_xyz[np.minimum(nbr, len(cell_xyz) - 1), 2], -np.inf)
    is_top = (cell_xyz[:, 2] >= nbr_z.max(axis=1)) & (cell_h >= min_height_m)
    # Ties (flat tops): keep the first of equal neighbours only.
    tops = np.flatnonzero(is_top)
    if tops.size == 0:
        return TreeTops(np.zeros((0, 2)), np.zeros(0), np.zeros(0), cell_xyz,
                        np.full(len(cell_xyz), -1))
    top_tree = cKDTree(cell_xyz[tops, :2])
    dup = top_tree.query_pairs(cell_m * 1.5, output_type="ndarray")
    drop = np.zeros(tops.size, dtype=bool)
    if len(dup):
        drop[np.maximum(dup[:, 0], dup[:, 1])] = True
    tops = tops[~drop]
    top_tree = cKDTree(cell_xyz[tops, :2])
    d_cell, which = top_tree.query(cell_xyz[:, :2], distance_upper_bound=window_m)
    cell_tree = np.where(np.isfinite(d_cell), which, -1)
    return TreeTops(cell_xyz[tops, :2].copy(), cell_xyz[tops, 2].copy(), cell_h[tops].copy(),
                    cell_xyz, cell_tree)


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
    def key(row):
        grow = row.get("grow_in_years")
        return (_tier(row), -round(float(row["deficit_m"]), 3), not bool(row.get("fall_in")),
                np.inf if grow is None else float(grow), str(row.get("span_id")),
                str(row.get("wire_id")))

    ranked = sorted(rows, key=key)
    for i, row in enumerate(ranked, start=1):
        row["priority"] = i
        row["reason"] = _reason(row)
    return ranked


def _reason(row: dict) -> str:
    where = f"wire {row['wire_id']} in span {row['span_id']}"
    cond = _CONDITION_WORDS.get(row["condition"], row["condition"])
    if row.get("finding") == "fall_in":
        text = (f"fall-in risk: tree {row.get('tree_height_m', float('nan')):.1f} m tall, trunk "
                f"{row.get('fall_in_distance_m', float('nan')):.1f} m from {where}; clears the "
                f"{row['required_m']:.2f} m requirement by {-row['deficit_m']:.2f} m")
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
                 "the line")
    grow = row.get("grow_in_years")
    if row["kind"] == "vegetation" and grow is not None and grow > 0:
        text += f"; grows into the requirement in {grow:.1f} years"
    return text

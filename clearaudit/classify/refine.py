"""Refinement of the classification with the line model (structures and fitted wires known).

The classifier labels structures from the cloud alone; once the line model exists, the places
where the line's structures stand and where its wires attach are known. This step, run after
:func:`clearaudit.model.build_line_model`, corrects three kinds of error:

1. **structure points away from every structure** (a tall tree under a span taken for a
   tower) become vegetation by height above ground (3/4/5) when they are scattered (foliage),
   unclassified (1) otherwise;
2. **vegetation points on a structure** (crossarm tips, members next to the body) become
   structure (15) when they lie inside the structure's extent, above the lowest crossarm region
   when outside the body, are 3D-connected to the structure's points and are not scattered;
3. **wire points on a structure** that the model assigned to no wire become structure (15), and
   wire-class points between a strain attachment and its structure, or above a suspension
   clamp, become insulator/hardware (16).

The extent of a structure is a vertical cylinder around its axis: radius = the larger of its
footprint radius and its crossarm reach (the horizontal distance from the axis to the farthest
fitted wire attachment at it), plus ``margin_m``.
"""
from __future__ import annotations

from typing import Any

import numpy as np
from scipy import ndimage
from scipy.spatial import cKDTree

from ..arrays import class_counts, class_mask, column_bounds, near_points
from ..cloud import (
    HIGH_VEGETATION,
    LOW_VEGETATION,
    MEDIUM_VEGETATION,
    TRANSMISSION_TOWER,
    UNCLASSIFIED,
    WIRE_CONDUCTOR,
    WIRE_CONNECTOR,
    WIRE_GUARD,
    Cloud,
)
from .features import eigen_features
from .objects import voxel_components

_VEGETATION = (LOW_VEGETATION, MEDIUM_VEGETATION, HIGH_VEGETATION)
_STRUCTURE = (TRANSMISSION_TOWER, WIRE_CONNECTOR)
_WIRE = (WIRE_GUARD, WIRE_CONDUCTOR)


def _attachments(model: Any) -> dict[str, list[tuple[str, np.ndarray, np.ndarray]]]:
    """Per structure id: (wire id, attachment xyz [m], unit horizontal direction into the span)."""
    out: dict[str, list[tuple[str, np.ndarray, np.ndarray]]] = {}
    for span in getattr(model, "spans", []):
        a_xy = np.asarray(span.a_xy, float)
        b_xy = np.asarray(span.b_xy, float)
        length = float(np.hypot(*(b_xy - a_xy)))
        if length <= 0:
            continue
        d = (b_xy - a_xy) / length
        for wire in span.wires:
            fit = wire.fit
            if fit is None or not getattr(fit, "ok", False):
                continue
            try:
                ends = ((span.from_structure, np.asarray(fit.attachment_a, float), d),
                        (span.to_structure, np.asarray(fit.attachment_b, float), -d))
            except Exception:  # noqa: BLE001 - a partial fit may lack attachments
                continue
            for sid, point, inward in ends:
                if sid is not None and np.all(np.isfinite(point)):
                    out.setdefault(sid, []).append((wire.wire_id, point, inward))
    return out


def structure_extents(model: Any, margin_m: float = 1.5, default_radius_m: float = 4.0
                      ) -> dict[str, dict[str, Any]]:
    """Horizontal extent and attachment heights of every model structure.

    Parameters
    ----------
    model
        The line model (``structures``, ``spans`` with fitted wires).
    margin_m
        Added to the reach. [m]
    default_radius_m
        Body radius of a structure without a detected footprint. [m]

    Returns
    -------
    dict
        Per structure id: ``xy`` [m], ``body_radius_m`` [m], ``radius_m`` (body or crossarm
        reach, plus margin) [m], ``lowest_attachment_z_m`` [m, None without fitted wires],
        ``z_top_m`` [m or None], ``attachments`` (wire id, xyz [m], inward direction).
    """
    att = _attachments(model)
    out: dict[str, dict[str, Any]] = {}
    for s in model.structures:
        xy = np.asarray(s.xy, float)
        body = float(s.footprint_radius_m) if s.footprint_radius_m and s.footprint_radius_m > 0 \
            else default_radius_m
        items = att.get(s.id, [])
        reach = max((float(np.hypot(*(p[:2] - xy))) for _, p, _ in items), default=0.0)
        out[s.id] = {
            "xy": xy,
            "body_radius_m": body + margin_m,
            "radius_m": max(body, reach) + margin_m,
            "lowest_attachment_z_m": min((float(p[2]) for _, p, _ in items), default=None),
            "z_top_m": None if s.z_top is None or not np.isfinite(s.z_top) else float(s.z_top),
            "attachments": items,
        }
    return out


def _scattering(xyz_all: np.ndarray, which: np.ndarray, radius: float = 1.25,
                k: int = 20) -> np.ndarray:
    """Scattering λ3/λ1 of the points ``which`` with neighbours among ``xyz_all``."""
    if len(which) == 0:
        return np.zeros(0)
    tree_pts = xyz_all - xyz_all[which].mean(axis=0)
    return eigen_features(tree_pts, radius, k, sparse_radius=3.0, which=which).scattering


def refine_with_model(cloud: Cloud, result: Any, model: Any, *, margin_m: float = 1.5,
                      arm_depth_m: float = 5.0, top_margin_m: float = 3.0,
                      voxel_m: float = 1.0, max_member_scattering: float = 0.1,
                      min_foliage_scattering: float = 0.05, isolated_radius_m: float = 1.5,
                      isolated_max_points: int = 2, wire_reach_m: float = 1.0,
                      extents: dict[str, dict[str, Any]] | None = None) -> dict[str, int]:
    """Correct structure, vegetation and wire labels with the line model (in place).

    Parameters
    ----------
    cloud
        The classified cloud (same points and order as ``result``).
    result
        The :class:`~clearaudit.classify.ClassificationResult`; ``result.classification`` is
        changed in place, ``result.counts`` and ``result.info["refine_with_model"]`` updated.
    model
        The :class:`~clearaudit.model.LineModel` built from this cloud.
    margin_m
        Added to a structure's body radius and crossarm reach. [m]
    arm_depth_m
        Outside the body, vegetation points become structure only above the lowest fitted
        attachment minus this depth (crossarm and insulator region). [m]
    top_margin_m
        Structure points higher than the structure top plus this are outside its extent. [m]
    voxel_m
        Voxel edge of the 3D connectivity to the structure's points. [m]
    max_member_scattering
        Vegetation points with a larger scattering λ3/λ1 stay vegetation (foliage).
    min_foliage_scattering
        Groups of stray structure points with a median scattering at least this become
        vegetation; less scattered groups become unclassified.
    isolated_radius_m, isolated_max_points
        A vegetation point 2 m or more above ground with at most this many vegetation points
        (itself included) within this radius is isolated. [m], [-]
    wire_reach_m
        An isolated vegetation point this close to a wire or insulator point takes that
        point's class. [m]
    extents
        ``structure_extents(model, margin_m)`` when already known: it depends on the model
        alone, so the tiles of a line share one (computed once instead of once per tile).

    Returns
    -------
    dict
        Number of points changed per ``"old->new"`` class pair (e.g. ``{"15->5": 189}``).

    Notes
    -----
    Extent of structure *s* (a vertical cylinder): :math:`r \\le \\max(R_f, R_a) + m` with
    :math:`R_f` the detected footprint radius and :math:`R_a` the largest horizontal distance
    of a fitted attachment from the axis, and :math:`z \\le z_{top} + m_t`. The scattering
    λ3/λ1 of the local covariance separates lattice members and pole surfaces (median 0.03 on
    the synthetic towers) from foliage (0.09); common practice in point-cloud labelling
    (Weinmann et al., 2015).

    References
    ----------
    Weinmann, M., Jutzi, B., Hinz, S., Mallet, C. (2015). Semantic point cloud interpretation
    based on optimal neighborhoods, relevant features and efficient classifiers. ISPRS Journal
    of Photogrammetry and Remote Sensing 105, 286-304.
    """
    cls = result.classification
    if len(cls) != cloud.n_points:
        raise ValueError("the classification result and the cloud have different point counts")
    labels = np.asarray(model.wire_point_labels)
    if len(labels) != cloud.n_points:
        raise ValueError("the line model was built from another cloud (wire labels differ in length)")
    xyz = cloud.xyz
    hag = np.asarray(result.height_above_ground_m, np.float64)
    before = cls.copy()
    if extents is None:
        extents = structure_extents(model, margin_m)
    ids = list(extents)
    interesting = np.flatnonzero(class_mask(cls, _STRUCTURE + _VEGETATION + _WIRE) & (hag > 0.3))
    if not ids:
        near = np.full(len(interesting), -1)
        inside = np.zeros(len(interesting), bool)
    else:
        centres = np.array([extents[i]["xy"] for i in ids])
        radius = np.array([extents[i]["radius_m"] for i in ids])
        top = np.array([np.inf if extents[i]["z_top_m"] is None else extents[i]["z_top_m"]
                        for i in ids])
        # only points within the largest radius of a structure can be inside its extent:
        # the nearest structure is looked up for those (their nearest is the same as in a
        # query of every point), the others are inside none
        near = np.full(len(interesting), -1)
        inside = np.zeros(len(interesting), bool)
        # np.take: same values as xyz[interesting], several times faster on rows
        xyz_i = np.take(xyz, interesting, axis=0)
        reach = float(radius.max()) * (1.0 + 1e-9) + 1e-9
        cand = near_points(xyz_i[:, :2], centres, reach)
        if len(cand):
            xyz_c = np.take(xyz_i, cand, axis=0)
            dist, near_c = cKDTree(centres).query(xyz_c[:, :2])
            near[cand] = near_c
            inside[cand] = (dist <= radius[near_c]) & (xyz_c[:, 2] <= top[near_c] + top_margin_m)
            del xyz_c
        del xyz_i

    # 1. structure points outside every structure's extent
    stray = interesting[np.isin(cls[interesting], _STRUCTURE) & ~inside]
    if len(stray):
        comp = voxel_components(xyz[stray], 2.0 * voxel_m)  # a crown: one group
        lo = xyz[stray].min(axis=0) - 2.0
        hi = xyz[stray].max(axis=0) + 2.0
        box = np.flatnonzero(np.all((xyz >= lo) & (xyz <= hi), axis=1) & (hag > 0.3))
        pos = np.searchsorted(box, stray)
        scat = _scattering(xyz[box], pos)
        median = np.asarray(ndimage.median(scat, comp, np.arange(int(comp.max()) + 1)))
        foliage = median[comp] >= min_foliage_scattering
        h = hag[stray]
        veg = np.where(h < 0.5, LOW_VEGETATION, np.where(h < 2.0, MEDIUM_VEGETATION,
                                                          HIGH_VEGETATION)).astype(np.uint8)
        cls[stray] = np.where(foliage, veg, UNCLASSIFIED)

    # 2. vegetation on a structure, 3. unassigned wire points on a structure
    # (each structure's points inside its extent, in ascending order: one stable sort)
    held = np.flatnonzero(inside)
    held = held[np.argsort(near[held], kind="stable")]
    cuts = np.searchsorted(near[held], np.arange(len(ids) + 1))
    for k, sid in enumerate(ids):
        ext = extents[sid]
        mine = interesting[held[cuts[k]:cuts[k + 1]]]
        if len(mine) == 0:
            continue
        r = np.hypot(*(xyz[mine, :2] - ext["xy"]).T)
        in_body = r <= ext["body_radius_m"]
        low_arm = ext["lowest_attachment_z_m"]
        in_arm = in_body if low_arm is None else (in_body | (xyz[mine, 2] >= low_arm - arm_depth_m))
        c = cls[mine]
        structure_pts = mine[np.isin(c, _STRUCTURE)]
        veg_cand = mine[np.isin(c, _VEGETATION) & in_arm & (hag[mine] >= 0.5)]
        wire_cand = mine[np.isin(c, _WIRE) & (labels[mine] < 0) & in_arm]
        cand = np.concatenate([veg_cand, wire_cand])
        if len(cand) and len(structure_pts):
            pts = np.concatenate([structure_pts, cand])
            comp = voxel_components(xyz[pts], voxel_m)
            touching = np.zeros(int(comp.max()) + 1, bool)
            touching[comp[: len(structure_pts)]] = True
            joined = cand[touching[comp[len(structure_pts):]]]
            if len(joined):
                is_veg = np.isin(cls[joined], _VEGETATION)
                veg_joined = joined[is_veg]
                if len(veg_joined):
                    pos = np.searchsorted(mine, veg_joined)
                    scat = _scattering(xyz[mine], pos)
                    cls[veg_joined[scat <= max_member_scattering]] = TRANSMISSION_TOWER
                cls[joined[~is_veg]] = TRANSMISSION_TOWER
        # wire-class points between a strain attachment and the structure, or above a clamp
        wires_here = mine[np.isin(cls[mine], _WIRE)]
        if len(wires_here) == 0 or not ext["attachments"]:
            continue
        by_wire: dict[str, list[tuple[np.ndarray, np.ndarray]]] = {}
        for wid, point, inward in ext["attachments"]:
            by_wire.setdefault(wid, []).append((point, inward))
        hardware = np.zeros(len(wires_here), bool)
        p = xyz[wires_here]
        for ends in by_wire.values():
            behind_all = np.ones(len(wires_here), bool)
            near_any = np.zeros(len(wires_here), bool)
            above_clamp = np.zeros(len(wires_here), bool)
            for point, inward in ends:
                rel = p - point
                along = rel[:, :2] @ inward
                across = np.abs(rel[:, 0] * inward[1] - rel[:, 1] * inward[0])
                behind_all &= along < -0.3
                near_any |= (across <= 1.0) & (np.linalg.norm(rel, axis=1) <= 6.0)
                above_clamp |= (np.hypot(*rel[:, :2].T) <= 1.0) & (rel[:, 2] > 0.3) & (rel[:, 2] <= 6.0)
            hardware |= near_any & (behind_all | above_clamp)
        cls[wires_here[hardware]] = WIRE_CONNECTOR

    # 4. isolated "vegetation" returns among wire points: a tree gives a crown of returns, a
    # lone return next to a conductor, insulator or crossarm tip is part of the wire hardware
    _absorb_isolated_vegetation(xyz, cls, hag, isolated_radius_m, isolated_max_points,
                                wire_reach_m)

    changed = np.flatnonzero(cls != before)
    counts: dict[str, int] = {}
    if len(changed):
        pairs, n = np.unique(before[changed].astype(np.int32) * 256 + cls[changed], return_counts=True)
        counts = {f"{p // 256}->{p % 256}": int(c) for p, c in zip(pairs, n, strict=True)}
    codes, totals = class_counts(cls)  # numpy.unique's values, by a table of counts
    result.counts = {int(a): int(b) for a, b in zip(codes, totals, strict=True)}
    if isinstance(getattr(result, "info", None), dict):
        result.info["refine_with_model"] = counts
    return counts


def _absorb_isolated_vegetation(xyz: np.ndarray, cls: np.ndarray, hag: np.ndarray,
                                radius_m: float, max_points: int, reach_m: float) -> None:
    """Give isolated high vegetation points next to wire/insulator points the wire's class.

    A tree returns a crown of points; a single "vegetation" return among conductor or
    insulator returns (at a crossarm tip, on a jumper) is hardware, and left as vegetation it
    would be reported as a tree touching the line.
    """
    veg = np.flatnonzero(np.isin(cls, _VEGETATION) & (hag >= 2.0))
    wire = np.flatnonzero(np.isin(cls, _WIRE + (WIRE_CONNECTOR,)))
    if len(veg) == 0 or len(wire) == 0:
        return
    # only vegetation points within reach of a wire point can change, so the (costly)
    # neighbour count is done for those alone; their neighbours all lie within
    # reach + radius of a wire point, so the counting tree holds only those
    wire_xyz = np.take(xyz, wire, axis=0)
    wire_tree = cKDTree(wire_xyz)
    pad = 0.01 * (reach_m + radius_m) + 1e-6  # [m] round-off allowance; only widens the set
    bound = reach_m + radius_m + pad
    # only the vegetation in plan cells next to a wire point's cell can be within the bound
    # (cells a little wider than it): the k-d tree measures those alone, and keeps the same
    # points as a query of every vegetation point
    veg_xyz = np.take(xyz, veg, axis=0)
    next_to = np.flatnonzero(_next_to(veg_xyz[:, :2], wire_xyz[:, :2], bound))
    near_any, _ = wire_tree.query(np.take(veg_xyz, next_to, axis=0), distance_upper_bound=bound)
    around = veg[next_to[np.isfinite(near_any)]]
    del veg_xyz
    if len(around) == 0:
        return
    dist, nearest = wire_tree.query(xyz[around], distance_upper_bound=reach_m)
    hit = np.isfinite(dist)
    cand, wire_of = around[hit], wire[nearest[hit]]
    if len(cand) == 0:
        return
    neighbours = cKDTree(xyz[around]).query_ball_point(xyz[cand], radius_m, return_length=True)
    lone = np.asarray(neighbours) <= max_points
    cls[cand[lone]] = cls[wire_of[lone]]


def _next_to(xy: np.ndarray, anchors: np.ndarray, reach_m: float,
             max_cells: int = 50_000_000) -> np.ndarray:
    """Whether each point lies in a plan cell next to (or in) a cell holding an anchor, with
    cells 1.001 times ``reach_m`` wide: a superset of the points within ``reach_m`` of an
    anchor in plan (or in 3-D). All True when the cells would be too many."""
    if len(xy) == 0 or len(anchors) == 0:
        return np.zeros(len(xy), dtype=bool)
    cell = 1.001 * float(reach_m)
    (xlo, xhi), (alo, ahi) = column_bounds(xy), column_bounds(anchors)
    lo = np.minimum(xlo, alo) - 2.0 * cell
    hi = np.maximum(xhi, ahi) + 2.0 * cell
    if not (np.all(np.isfinite(lo)) and np.all(np.isfinite(hi))):
        return np.ones(len(xy), dtype=bool)
    span = np.floor((hi - lo) / cell) + 1.0
    if float(span[0]) * float(span[1]) > max_cells:
        return np.ones(len(xy), dtype=bool)
    n1 = int(span[1])

    def flat(pts: np.ndarray) -> np.ndarray:  # cell number, a cell or more from every edge
        i = np.floor((pts[:, 0] - lo[0]) / cell).astype(np.int64)
        j = np.floor((pts[:, 1] - lo[1]) / cell).astype(np.int64)
        i *= n1
        i += j
        return i

    a = flat(anchors)
    marked = np.zeros(int(span[0]) * n1, dtype=bool)
    for step in (-n1 - 1, -n1, -n1 + 1, -1, 0, 1, n1 - 1, n1, n1 + 1):
        marked[a + step] = True
    return np.take(marked, flat(xy))

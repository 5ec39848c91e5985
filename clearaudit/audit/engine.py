"""The clearance audit orchestrator: :func:`audit_line` -> :class:`AuditResult`.

The audit has three public halves that the in-memory run and the tiled run
(:mod:`clearaudit.tiling`) share: :func:`prepare_wire_states` (steps 1-2, once per line),
:func:`point_findings` (steps 3-4 on one block of points: the whole cloud, or one tile with its
overlap) and :func:`merge_findings` (steps 4-6 over all blocks). ``audit_line`` is the three
with a single block.

Order of work:

1. conductor temperature at survey time (:mod:`.temperature`);
2. conditions: every fitted wire's curve at survey, MOT, wind (both sides) and ice
   (:mod:`.conditions`);
3. the corridor: classified points within reach of any curve — a 2 m plan grid with, per
   cell, bounds of the distance to the thinned curves (:class:`_PlanGrid`), so whole cells are
   kept or dropped and only points in straddling cells meet the k-d tree of the thinned
   curves; every obstacle group's points sorted by cell (:class:`_CellIndex`), built once;
   obstacles: buildings as connected footprints, trees as crowns
   (:func:`.priority.find_tree_tops`), crossing wires by wire;
4. clearances per wire and condition (:mod:`.clearance`): candidates per wire from the cells
   near its curves, cut per condition by station-binned bounds of the curve
   (:class:`_CurveWindow`; ground: only points that can violate or hold the lowest
   clearance, :func:`_ground_candidates`), exact distances on what is left; one finding per
   obstacle per condition group;
5. fall-in risk of every tree, grow-in time and priorities (:mod:`.priority`);
6. span rows, curves for the model file and ground profiles.
"""
from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.ndimage import maximum_filter
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

from clearaudit.arrays import class_mask, column_bounds, take_columns, take_rows
from clearaudit.cloud import (
    BUILDING,
    HIGH_VEGETATION,
    LOW_VEGETATION,
    MEDIUM_VEGETATION,
    Cloud,
)
from clearaudit.errors import InputError

from ._polyline import cell_order, curve_frame, curve_window, in_box, plan_cells, window_near
from .clearance import (
    Findings,
    building_envelope,
    group_obstacles,
    points_near_curves,
    polyline_distance,
    polyline_offsets,
    polyline_overhead,
    reduce_findings,
)
from .conditions import CONDITION_GROUP, WireState, project_conditions, resolve_conditions
from .priority import TreeTops, fall_in_distance, find_tree_tops, rank_findings
from .temperature import survey_conductor_temperature

__all__ = ["AuditOptions", "AuditResult", "BlockFindings", "WireStates", "audit_line",
           "default_insulator_length_m", "merge_findings", "point_findings",
           "prepare_wire_states", "survey_latitude"]

VEGETATION_CLASSES = (LOW_VEGETATION, MEDIUM_VEGETATION, HIGH_VEGETATION)
CURVE_VERTICES = 101


@dataclass
class AuditOptions:
    """Options of the clearance audit (each with its default and unit).

    Attributes
    ----------
    spacing_m
        Largest sample spacing along every condition curve. [m]
    ground_lateral_m
        Ground points within this horizontal distance of a wire's plan count as "under" it. [m]
    link_m
        Violating vegetation points outside any tree crown that are closer than this form one
        obstacle (low vegetation, hedges). [m]
    max_obstacle_extent_m
        Such vegetation obstacles longer than this are cut into tiles of this size. [m]
    building_link_m
        Building points closer than this in plan belong to one building (never cut). [m]
    building_context_m
        Building points this far beyond the search buffer are kept, so a building reaching
        into the corridor is grouped whole. [m]
    ground_link_m
        Violating ground points closer than this in plan form one patch. [m]
    ground_patch_m
        Longer ground patches are cut into pieces of this size. [m]
    tree_window_m
        Window in which a tree top is the highest canopy cell (crowns, fall-in). [m]
    search_margin_m
        Extra search distance beyond each requirement (room for the uncertainty). [m]
    growth_rate_m_per_year
        Vegetation growth rate for the grow-in time (0.5 m/year: a fast-growing broadleaf;
        common practice (no source) — set it for the species of the corridor). [m/year]
    fall_in
        Find trees that can fall into the line.
    fall_in_buffer_m
        Horizontal distance from the wires within which trees are examined for fall-in. [m]
    min_tree_height_m
        Lowest vegetation counted as a tree. [m]
    report_fall_in_only
        Report fall-in trees that violate no clearance as their own rows.
    insulator_length_m
        Suspension insulator string length; ``None``: estimated from the voltage
        (:func:`default_insulator_length_m`). [m]
    strain_model
        ``"auto"``, ``"linear"`` or ``"two-material"`` for the change of state.
    creep_shift_c
        Equivalent temperature for future creep added to projected conditions. [°C]
    """

    spacing_m: float = 0.5
    ground_lateral_m: float = 1.0
    link_m: float = 1.5
    max_obstacle_extent_m: float = 15.0
    building_link_m: float = 1.5
    building_context_m: float = 20.0
    ground_link_m: float = 3.0
    ground_patch_m: float = 30.0
    tree_window_m: float = 5.0
    search_margin_m: float = 1.0
    growth_rate_m_per_year: float = 0.5
    fall_in: bool = True
    fall_in_buffer_m: float = 40.0
    min_tree_height_m: float = 2.0
    report_fall_in_only: bool = True
    insulator_length_m: float | None = None
    strain_model: str = "auto"
    creep_shift_c: float = 0.0

    def __post_init__(self) -> None:
        for name in ("spacing_m", "ground_lateral_m", "link_m", "max_obstacle_extent_m",
                     "building_link_m", "building_context_m", "ground_link_m", "ground_patch_m",
                     "tree_window_m", "growth_rate_m_per_year", "fall_in_buffer_m"):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and value > 0 and math.isfinite(value)):
                raise ValueError(f"The audit option {name} must be a positive number.")
        if self.spacing_m > 0.5:
            raise ValueError("The curve sample spacing must be 0.5 m or less.")


@dataclass
class AuditResult:
    """Everything the audit found (local metres; the writer converts to CRS units).

    Attributes
    ----------
    survey_temperature
        ``{"value_c", "ci95_c", "method", "note"}``: conductor temperature at survey. [°C]
    conditions
        Condition name -> ``{"description", "temperature_c", "ice_radial_m",
        "wind_pressure_pa", "source", ...}``.
    span_rows
        One dict per wire per span: every ``spans.csv`` column; attachment points as
        ``attachment_a_local`` / ``attachment_b_local`` (numpy (3,), local m).
    violations
        One dict per obstacle per condition: ``violations.csv`` columns, position as
        ``point_local`` (numpy (3,), local m), priority filled (1 = most urgent).
    curves
        (span_id, wire_id) -> {condition: (k, 3) local m}, ~101 vertices from A to B.
    ground_profiles
        span_id -> (k, 2) [station from A (m), ground z (local m)].
    summary
        Counts and notes for the terminal and the report.
    rules
        The rule set name, path and overrides used.
    hazard_trees
        Trees clear of every requirement but tall enough to fall into the line (same columns
        as violations, ``finding = "fall_in"``), ranked among themselves.
    """

    survey_temperature: dict
    conditions: dict[str, dict]
    span_rows: list[dict]
    violations: list[dict]
    curves: dict[tuple[str, str], dict[str, np.ndarray]]
    ground_profiles: dict[str, np.ndarray]
    summary: dict
    rules: dict = field(default_factory=dict)
    hazard_trees: list[dict] = field(default_factory=list)


def default_insulator_length_m(voltage_kv: float) -> float:
    """Rough suspension insulator string length for a voltage.

    Parameters
    ----------
    voltage_kv
        Nominal phase-to-phase voltage. [kV]

    Returns
    -------
    length : ``0.3 + 0.009 V`` (about 1.3 m at 115 kV, 2.4 m at 230 kV, 4.8 m at 500 kV;
        common practice (no source) — give the real length when known). [m]
    """
    return 0.3 + 0.009 * float(voltage_kv)


# ------------------------------------------------------------------------------ helpers
def _latitude(cloud: Cloud) -> float | None:
    if cloud.crs is None or cloud.n_points == 0:
        return None
    try:
        from pyproj import Transformer

        centre = cloud.to_crs(np.mean(cloud.xyz[:: max(1, cloud.n_points // 1000)], axis=0))
        transformer = Transformer.from_crs(cloud.crs, "EPSG:4326", always_xy=True)
        _, lat = transformer.transform(centre[0], centre[1])
        return float(lat) if math.isfinite(lat) else None
    except Exception:  # noqa: BLE001 - a CRS that cannot go to WGS 84 only loses the sun
        return None


def _downsample(curve: np.ndarray, n: int = CURVE_VERTICES) -> np.ndarray:
    if len(curve) <= n:
        return curve.copy()
    idx = np.unique(np.round(np.linspace(0, len(curve) - 1, n)).astype(int))
    return curve[idx]


@dataclass
class _Group:
    kind: str
    index: np.ndarray        # cloud indices
    xyz: np.ndarray
    tree: cKDTree | None
    two_d: bool = False

    def search_tree(self) -> cKDTree | None:
        """The k-d tree of the points (xy when ``two_d``), built on first use; None if empty."""
        if self.tree is None and len(self.xyz):
            self.tree = cKDTree(self.xyz[:, :2] if self.two_d else self.xyz)
        return self.tree


# ------------------------------------------------------------------------------ the halves
#: Tree labels are the tree top's canopy cell (ix, iy), coded in one int64 so that every block
#: that sees a tree names it the same: ``(ix + 2**30) * 2**31 + (iy + 2**30)``.
_CELL_OFFSET = 2 ** 30
_CELL_STRIDE = 2 ** 31


def _cell_code(xy: np.ndarray, cell_m: float) -> np.ndarray:
    ij = np.floor(np.asarray(xy, dtype=float).reshape(-1, 2) / cell_m).astype(np.int64)
    return (ij[:, 0] + _CELL_OFFSET) * _CELL_STRIDE + (ij[:, 1] + _CELL_OFFSET)


def _in_box(xy: np.ndarray, box: tuple[float, float, float, float] | None) -> np.ndarray:
    xy = np.asarray(xy, dtype=float).reshape(-1, 2)
    if box is None:
        return np.ones(len(xy), dtype=bool)
    x0, y0, x1, y1 = box
    out = np.empty(len(xy), dtype=np.uint8)
    in_box(xy, float(x0), float(y0), float(x1), float(y1), out)  # one compiled pass
    return out.view(bool)


@dataclass
class WireStates:
    """The audit's preparation: survey temperature, conditions and every wire's curves.

    Made once per line (:func:`prepare_wire_states`) and shared by every block of points.

    Attributes
    ----------
    voltage_kv
        Nominal voltage. [kV]
    altitude_m
        Altitude for the vegetation rules, or None. [m]
    altitude_note
        Where the altitude comes from.
    survey_temperature
        ``{"value_c", "ci95_c", "method", "note"}``. [°C]
    specs
        Condition name -> condition spec.
    insulator_length_m
        Suspension insulator string length used. [m]
    states
        One :class:`~clearaudit.audit.conditions.WireState` per fitted wire.
    notes
        Notes for the summary.
    buffer_m
        Search distance around the curves (largest requirement + margin + 2 m). [m]
    pad_m
        Half the largest gap between the thinned plan samples of all curves. [m]
    options
        The :class:`AuditOptions`.
    state_boxes
        (n, 4) plan box ``xmin, ymin, xmax, ymax`` of each state's curves. [m]
    """

    voltage_kv: float
    altitude_m: float | None
    altitude_note: str
    survey_temperature: dict
    specs: dict
    insulator_length_m: float
    states: list[WireState]
    notes: list[str]
    buffer_m: float
    pad_m: float
    options: AuditOptions
    state_boxes: np.ndarray


def survey_latitude(cloud: Cloud) -> float | None:
    """Latitude of the survey's centre (WGS 84), or None without a usable CRS. [°]"""
    return _latitude(cloud)


def prepare_wire_states(model: Any, config: Any, conductors: dict[str, Any], rules: Any, *,
                        latitude_deg: float | None, ground_z_m: np.ndarray,
                        origin_z_m: float = 0.0, options: AuditOptions | None = None
                        ) -> WireStates:
    """Survey conductor temperature, conditions and the curves of every fitted wire.

    Parameters
    ----------
    model
        :class:`clearaudit.model.line.LineModel`.
    config
        :class:`clearaudit.config.LineConfig`.
    conductors
        ``{"phase": Conductor, "shield": Conductor}``.
    rules
        :class:`clearaudit.audit.rules.RuleSet`.
    latitude_deg
        Latitude of the survey (the sun's position), None if unknown. [°]
    ground_z_m
        Heights of the ground points (all, or a sample), local z; their median plus
        ``origin_z_m`` is the altitude when the line file gives none. [m]
    origin_z_m
        Height of the local origin (vertical unit applied). [m]
    options
        :class:`AuditOptions`.

    Returns
    -------
    WireStates

    Raises
    ------
    InputError
        When the line voltage is unknown.
    """
    opts = options or AuditOptions()
    voltage = getattr(config.line, "voltage_kv", None)
    if voltage is None or not voltage > 0:
        raise InputError(getattr(config, "source", None) or "--voltage-kv",
                         "the line voltage is needed for the clearance audit "
                         "(give [line] voltage_kv or --voltage-kv)")
    voltage = float(voltage)
    notes: list[str] = []
    ground_z_m = np.asarray(ground_z_m, dtype=float).reshape(-1)
    altitude = getattr(config.line, "altitude_m", None)
    if altitude is None and len(ground_z_m):
        altitude = float(np.median(ground_z_m)) + float(origin_z_m)
        altitude_note = "from the cloud's ground heights (assumed above sea level)"
    else:
        altitude_note = "from the line file" if altitude is not None else "unknown"
    wire_fits = [w for s in model.spans for w in s.wires
                 if w.fit is not None and getattr(w.fit, "ok", False)]
    azimuth = 90.0
    if wire_fits:
        d = np.mean([w.fit.direction for w in wire_fits], axis=0)
        azimuth = float(np.degrees(np.arctan2(d[0], d[1])) % 360.0)
    survey_t = survey_conductor_temperature(
        config.survey, conductors["phase"], latitude_deg=latitude_deg,
        elevation_m=float(altitude) if altitude is not None and math.isfinite(altitude) else 0.0,
        line_azimuth_deg=azimuth)
    if survey_t["method"] == "default":
        notes.append(survey_t["note"])
    specs = resolve_conditions(rules, config.line.max_operating_temperature_c,
                               survey_t["value_c"])
    insulator = (opts.insulator_length_m if opts.insulator_length_m is not None
                 else default_insulator_length_m(voltage))
    states = project_conditions(model, conductors, specs, survey_t["ci95_c"],
                                insulator_length_m=insulator, strain_model=opts.strain_model,
                                creep_shift_c=opts.creep_shift_c, spacing_m=opts.spacing_m)
    for st in states:
        notes.extend(f"{st.span_id} {st.wire_id}: {n}" for n in st.notes)
    # the states keep recipes, not samples: evaluate one state at a time for the pad and
    # the plan boxes (the driver's memory does not grow with the line's curves)
    pad = 0.0
    boxes = np.zeros((len(states), 4))
    for k, st in enumerate(states):
        plan_xy = [c[:, :2] for c in st.curves.values()]
        pad = max([pad] + [_thin_curve(c)[1] for c in plan_xy])
        lo, hi = column_bounds(np.concatenate(plan_xy))  # numpy's min / max per column
        boxes[k] = [*lo, *hi]
    return WireStates(voltage_kv=voltage, altitude_m=altitude, altitude_note=altitude_note,
                      survey_temperature=survey_t, specs=specs, insulator_length_m=insulator,
                      states=states, notes=notes,
                      buffer_m=rules.max_required_m(voltage, altitude) + opts.search_margin_m
                      + 2.0, pad_m=pad, options=opts, state_boxes=boxes)


@dataclass
class BlockFindings:
    """What :func:`point_findings` found in one block of points (picklable, small).

    Per obstacle kind (``vegetation``, ``building``, ``ground``, ``wire``): ``findings``
    (:class:`~clearaudit.audit.clearance.Findings`, ``point`` indexing the kind's table),
    and the table: ``xyz`` (local m), ``key`` (the point's key: cloud index or file key) and
    ``label`` (the obstacle the point belongs to: vegetation the tree top's cell code, building
    a block-unique footprint id, wire the other wire's index; -1 grouped later by linkage).

    Attributes
    ----------
    members
        Building footprint id -> the keys of all its points the block saw (``(ids, keys)``
        pairs), so footprints cut by a block edge are joined where they share points.
    ground_min
        ``{(state index, condition): m}`` lowest ground clearance under the block's part of
        each curve. [m]
    trees
        Trees whose top lies in the block: ``code``, ``xy`` [m], ``top_z`` [m], ``height_m``
        [m], ``cell_xyz`` (crown cells of the trees within fall-in reach) [m], ``cell_tree``
        (their tree, index into this block's trees).
    profiles
        span id -> (station indices, ground z [m]) for the stations in the block.
    """

    findings: dict[str, Findings] = field(default_factory=dict)
    xyz: dict[str, np.ndarray] = field(default_factory=dict)
    key: dict[str, np.ndarray] = field(default_factory=dict)
    label: dict[str, np.ndarray] = field(default_factory=dict)
    members: tuple[np.ndarray, np.ndarray] = field(
        default_factory=lambda: (np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)))
    ground_min: dict[tuple[int, str], float] = field(default_factory=dict)
    trees: dict[str, np.ndarray] = field(default_factory=dict)
    profiles: dict[str, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)


def point_findings(xyz: np.ndarray, classes: np.ndarray, hag: np.ndarray, plan: WireStates,
                   model: Any, rules: Any, *, keys: np.ndarray | None = None,
                   owned_box: tuple[float, float, float, float] | None = None,
                   ground_model: Any = None, other_wire: np.ndarray | None = None,
                   state_indices: np.ndarray | None = None, label_base: int = 0,
                   progress: Callable[[int, int], None] | None = None) -> BlockFindings:
    """Clearance tests of one block of points against the wire curves.

    Parameters
    ----------
    xyz
        The block's points (owned and context), (n, 3), local. [m]
    classes
        Their ASPRS classes, (n,).
    hag
        Their heights above ground, (n,); NaN where unknown. [m]
    plan
        From :func:`prepare_wire_states`.
    model
        The line model (span ends for the ground profiles).
    rules
        :class:`clearaudit.audit.rules.RuleSet`.
    keys
        Key of every point (the cloud index by default), (n,).
    owned_box
        ``xmin, ymin, xmax, ymax``: only points (curve samples, tree tops, profile stations)
        inside are the block's own; the rest is context (crowns, building footprints). None:
        everything is owned. [m]
    ground_model
        The ground model (``height_at(xy)``) or None.
    other_wire
        Index of the other (crossing) wire of every point, -1 none, (n,).
    state_indices
        The wire states near the block (all by default).
    label_base
        Added to the building footprint ids (unique across blocks).
    progress
        Called as ``progress(done, total)`` over the wire states.

    Returns
    -------
    BlockFindings

    Notes
    -----
    Vegetation and other wires: 3-D distance to each condition curve, kept where
    :math:`d - u < r` (:math:`u` the curve's 95 % half-width projected on the point-to-wire
    direction, :math:`r` the requirement). Buildings: the box envelope of the whole footprint
    (:func:`~clearaudit.audit.clearance.building_envelope`), horizontal :math:`r_h` and vertical
    :math:`r_v`. Ground: vertical distance under the wire within ``ground_lateral_m`` in plan,
    against the requirement of the surface the point's class maps to. Requirements from the rule
    set (``rules.required``), only where it applies to the wire's role (``rules.applies``).

    References
    ----------
    See :mod:`clearaudit.audit.clearance` and the rule set's sources (clearaudit/data).
    """
    opts = plan.options
    xyz = np.asarray(xyz, dtype=float).reshape(-1, 3)
    classes = np.asarray(classes)
    hag = np.asarray(hag, dtype=float)
    n = len(xyz)
    if len(classes) != n or len(hag) != n:
        raise ValueError("Give one class and one height above ground per point.")
    keys = np.arange(n, dtype=np.int64) if keys is None else np.asarray(keys, dtype=np.int64)
    owned = _in_box(xyz[:, :2], owned_box)
    voltage, altitude = plan.voltage_kv, plan.altitude_m
    index = (np.arange(len(plan.states)) if state_indices is None
             else np.asarray(state_indices, dtype=np.int64))
    # the block's states with their samples evaluated once (the plan keeps recipes only)
    states = {int(i): plan.states[int(i)].materialized() for i in index}
    out = BlockFindings()
    kinds = ("vegetation", "building", "ground", "wire")
    parts: dict[str, list[Findings]] = {k: [] for k in kinds}
    samples = [c for i in index for c in states[i].curves.values()]
    groups: dict[str, _Group] = {}
    labels: dict[str, np.ndarray] = {}
    exact_ground = None
    if samples:
        plan_tree, _ = _plan_samples(samples)
        pad = plan.pad_m
        buffer_m = plan.buffer_m
        ground_classes = np.array(sorted(rules.surfaces), dtype=np.uint8) if rules.surfaces \
            else np.array([2], dtype=np.uint8)
        is_ground = class_mask(classes, ground_classes)
        is_veg = class_mask(classes, VEGETATION_CLASSES)
        context_m = (max(opts.fall_in_buffer_m, buffer_m) if opts.fall_in
                     else buffer_m + opts.tree_window_m)
        reach = {"vegetation": context_m + pad,
                 "building": buffer_m + opts.building_context_m + pad,
                 "ground": opts.ground_lateral_m + 1.0 + pad, "wire": buffer_m + pad}
        grid = _PlanGrid(xyz[:, :2], plan_tree, max(reach.values()))

        def mine(mask: np.ndarray) -> np.ndarray:
            return mask if owned_box is None else mask & owned

        # Vegetation: the context (crowns, fall-in) exactly; the corridor group by whole cells
        # (a superset: the findings are measured point by point), exactly when a curve's 95 %
        # half-width could reach past the corridor (buffer_m holds 2 m + the search margin).
        ci_of_state = {int(i): {c: states[int(i)].position_ci95(c, states[int(i)].fractions[c])
                                for c in states[int(i)].curves} for i in index}
        ci_top = max((float(np.max(ci)) for by_cond in ci_of_state.values()
                      for ci in by_cond.values()), default=0.0)
        veg_ctx, corridor = grid.near(xyz[:, :2], is_veg, reach["vegetation"],
                                      inner_m=buffer_m + pad,
                                      inner_exact=ci_top >= opts.search_margin_m + 2.0)
        corridor &= owned[veg_ctx]
        groups["vegetation"] = _make_group("vegetation", xyz, veg_ctx[corridor])
        building_idx, _ = grid.near(xyz[:, :2], classes == BUILDING, reach["building"])
        groups["building"] = _make_group("building", xyz, building_idx, two_d=True, tree=True)
        # Ground: whole cells (a superset: the findings are measured point by point); the
        # exact set only if the profiles need it (:func:`_exact_ground`).
        ground_idx, _ = grid.near(xyz[:, :2], mine(is_ground), reach["ground"], exact=False)
        groups["ground"] = _make_group("ground", xyz, ground_idx, two_d=True)
        exact_ground = (grid, reach["ground"])
        if other_wire is None:
            other = np.zeros(0, dtype=np.int64)
            wire_idx = np.zeros(0, dtype=np.int64)
        else:
            other = np.asarray(other_wire, dtype=np.int64)
            wire_idx, _ = grid.near(xyz[:, :2], mine(other >= 0), reach["wire"])
        groups["wire"] = _make_group("wire", xyz, wire_idx)
        cells = {kind: _CellIndex(grid, groups[kind].index)
                 for kind in ("vegetation", "wire", "ground")}

        # ---- obstacles: one building (whole footprint), one tree crown, one crossing wire
        g = groups["building"]
        # One building = one connected footprint in plan (walls under the eaves, roof planes
        # and chimneys join however they are spaced vertically), never cut.
        labels["building"] = group_obstacles(
            np.column_stack([g.xyz[:, :2], np.zeros(len(g.xyz))]), opts.building_link_m, None,
            thin_m=opts.building_link_m / 3.0 if len(g.xyz) > 50_000 else None)
        labels["wire"] = other[groups["wire"].index]
        heights = hag[veg_ctx]
        if not np.all(np.isfinite(heights)) and ground_model is not None:
            missing = ~np.isfinite(heights)
            heights = heights.copy()
            heights[missing] = xyz[veg_ctx[missing], 2] - ground_model.height_at(
                xyz[veg_ctx[missing], :2])
        tops = find_tree_tops(take_rows(xyz, veg_ctx), heights, window_m=opts.tree_window_m,
                              min_height_m=opts.min_tree_height_m)
        cell_m = tops.grid[0] if tops.grid is not None else 1.0
        top_code = _cell_code(tops.xy, cell_m)
        t = tops.tree_of(groups["vegetation"].xyz)
        labels["vegetation"] = np.where(t >= 0, top_code[np.maximum(t, 0)] if len(top_code)
                                        else -1, -1)
        by_label = _members(labels["building"])

        # the required ground clearance of every class code: one rule lookup per distinct
        # surface (a few), not per code (256 lookups, each formatting its detail, took 7.5 ms
        # of every tile)
        surface_of = [rules.surface_of_class(c) for c in range(256)]
        ground_req_by_class = {}
        for role in {states[i].role for i in index}:
            surface = [s if s in rules.ground[role] else "land" for s in surface_of]
            value = {k: rules.required("ground", role, voltage, key=k).value_m
                     for k in set(surface)}
            ground_req_by_class[role] = np.array([value[k] for k in surface])
        surface_lookup = np.array(surface_of, dtype=object)
        lateral_m = opts.ground_lateral_m
        ground_cls = classes[groups["ground"].index]

        for done, i in enumerate(index):
            i = int(i)
            st = states[i]
            applies = {kind: rules.applies(kind, st.role) for kind in ("vegetation", "wire")}
            req = {kind: rules.required(kind, st.role, voltage, altitude_m=altitude).value_m
                   for kind in ("vegetation", "wire")}
            b_v = rules.required("building", st.role, voltage, key="vertical").value_m
            b_h = rules.required("building", st.role, voltage, key="horizontal").value_m
            conds = list(st.curves)
            ci_of = ci_of_state[i]
            ci_max = {c: float(np.max(ci_of[c])) for c in conds}
            margin = opts.search_margin_m + max(ci_max.values())
            curves = [st.curves[c] for c in conds]
            origin, axis = _state_axis(curves)
            # Candidates of the state (whole plan cells near its curves), then per condition
            # only the points that can be within reach of that curve (:class:`_CurveWindow`);
            # the exact distances are those of :mod:`.clearance`, on fewer points.
            near = {}
            for kind in ("vegetation", "wire"):
                g = groups[kind]
                if applies[kind] and len(g.index):
                    sub = cells[kind].near_curves(curves, req[kind] + margin)
                    near[kind] = _state_points(
                        g.xyz, sub, curves, origin, axis,
                        req[kind] + max(ci_max.values()), three_d=True)
            g = groups["ground"]
            if len(g.index):
                sub = cells["ground"].near_curves(curves, lateral_m)
                near["ground"] = _state_points(g.xyz, sub, curves, origin, axis, lateral_m)
                near["ground"] += (ground_req_by_class[st.role][ground_cls[near["ground"][0]]],)
            cand = {"building": points_near_curves(groups["building"].tree, curves,
                                                   b_h + margin, two_d=True)}
            for cond, curve in st.curves.items():
                frac = st.fractions[cond]
                ci_along = ci_of[cond]
                for kind in ("vegetation", "wire"):
                    if kind not in near:
                        continue
                    sub, u, v, z = near[kind]
                    window = _CurveWindow(curve, origin, axis, req[kind] + ci_max[cond])
                    idx = np.sort(sub[window.maybe_near(u, v, z)])
                    if idx.size:
                        f = _radial(groups[kind].xyz, idx, i, cond, curve, frac, ci_along,
                                    req[kind], "any" if kind == "wire" else "value")
                        if len(f.point):
                            parts[kind].append(f)
                if cand["building"].size:
                    f = _building(groups["building"].xyz, cand["building"], labels["building"],
                                  by_label, i, cond, curve, frac, ci_along, b_h, b_v)
                    if len(f.point):
                        parts["building"].append(f)
                # ground: vertical clearance under the wire (the block's own part)
                model_min = _ground_model_clearance(ground_model, curve, owned_box)
                idx = np.zeros(0, dtype=np.int64)
                if "ground" in near:
                    idx, (lateral, wire_z, param) = _ground_candidates(
                        g.xyz, near["ground"], curve, origin, axis, lateral_m, ci_max[cond])
                if idx.size:
                    keep_near = lateral <= lateral_m
                    idx, wire_z, param = idx[keep_near], wire_z[keep_near], param[keep_near]
                    dz = wire_z - g.xyz[idx, 2]
                    point_min = float(np.min(dz)) if dz.size else math.inf
                    out.ground_min[(i, cond)] = min(point_min, model_min)
                    cls_here = ground_cls[idx]
                    required = ground_req_by_class[st.role][cls_here]
                    ci = np.interp(param, np.arange(len(curve)), ci_along)
                    keep = dz - ci < required
                    if np.any(keep):
                        fr = np.interp(param[keep], np.arange(len(curve)), frac)
                        m = int(keep.sum())
                        parts["ground"].append(Findings(
                            idx[keep], np.full(m, i), np.full(m, cond, dtype=object), dz[keep],
                            required[keep], ci[keep], fr, surface_lookup[cls_here[keep]]))
                elif math.isfinite(model_min):
                    out.ground_min[(i, cond)] = model_min
            if progress is not None:
                progress(done + 1, len(index))

        # ---- buildings: only footprints with a point of the block's own
        g = groups["building"]
        lab = labels["building"]
        has_own = np.zeros(int(lab.max()) + 1 if len(lab) else 0, dtype=bool)
        if len(lab):
            has_own[lab[owned[g.index]]] = True
            parts["building"] = [p.select(has_own[lab[p.point]]) for p in parts["building"]]
            hit = np.unique(np.concatenate([lab[p.point] for p in parts["building"]] or
                                           [np.zeros(0, dtype=np.int64)]))
            at = np.flatnonzero(np.isin(lab, hit))
            out.members = (lab[at].astype(np.int64) + int(label_base),
                           keys[g.index[at]].astype(np.int64))
            labels["building"] = lab.astype(np.int64) + int(label_base)

        # ---- trees whose top is the block's own
        mine = np.flatnonzero(_in_box(tops.xy, owned_box)) if len(tops) else np.zeros(0, int)
        wire_samples = [states[i].curves[c] for i in index for c in ("survey", "mot")
                        if c in states[i].curves]
        dist = fall_in_distance(tops.base_xyz[mine], np.concatenate(wire_samples)) \
            if wire_samples else np.full(len(mine), np.inf)
        renumber = np.full(len(tops) + 1, -1)
        renumber[mine] = np.arange(len(mine))
        risky = np.zeros(len(mine) + 1, dtype=bool)
        risky[:-1] = dist < tops.height_m[mine]
        cell_tree = renumber[np.where(tops.cell_tree >= 0, tops.cell_tree, len(tops))] \
            if len(tops.cell_tree) else np.zeros(0, dtype=int)
        crown = np.flatnonzero((cell_tree >= 0) & risky[cell_tree])
        out.trees = {"code": top_code[mine], "xy": tops.xy[mine], "top_z": tops.top_z[mine],
                     "height_m": tops.height_m[mine], "cell_xyz": tops.cell_xyz[crown],
                     "cell_tree": cell_tree[crown]}

    # ---- per kind: the finding points' table
    for kind in kinds:
        f = Findings.concat([Findings.empty(), *parts[kind]])
        g = groups.get(kind)
        if g is None or len(f.point) == 0:
            out.findings[kind] = Findings.empty()
            out.xyz[kind] = np.zeros((0, 3))
            out.key[kind] = np.zeros(0, dtype=np.int64)
            out.label[kind] = np.zeros(0, dtype=np.int64)
            continue
        used = np.unique(f.point)
        f.point = np.searchsorted(used, f.point)
        out.findings[kind] = f
        out.xyz[kind] = g.xyz[used]
        out.key[kind] = keys[g.index[used]]
        out.label[kind] = (np.asarray(labels[kind], dtype=np.int64)[used] if kind in labels
                           else np.full(len(used), -1, dtype=np.int64))

    # ---- ground profile stations in the block
    for span in getattr(model, "spans", []):
        a, b = np.asarray(span.a_xy, float), np.asarray(span.b_xy, float)
        length = float(np.linalg.norm(b - a))
        if not length > 0:
            continue
        stations = np.linspace(0.0, length, max(2, int(math.ceil(length)) + 1))
        sxy = a + np.outer(stations / length, b - a)
        inside = np.flatnonzero(_in_box(sxy, owned_box))
        if inside.size == 0:
            continue
        z = np.full(len(inside), np.nan)
        if ground_model is not None:
            try:
                z = np.asarray(ground_model.height_at(sxy[inside]), dtype=float)
            except Exception:  # noqa: BLE001 - fall back to the points
                z = np.full(len(inside), np.nan)
        g = groups.get("ground")
        if np.any(~np.isfinite(z)) and g is not None and exact_ground is not None:
            groups["ground"] = g = _exact_ground(g, *exact_ground)
            exact_ground = None
        if np.any(~np.isfinite(z)) and g is not None and g.search_tree() is not None:
            d, j = g.tree.query(sxy[inside], distance_upper_bound=3.0)
            fill = ~np.isfinite(z) & np.isfinite(d)
            z[fill] = g.xyz[j[fill], 2]
        out.profiles[span.id] = (inside, z)
    return out


def _join_footprints(blocks: list[BlockFindings]) -> dict[int, int]:
    """Footprint id -> building number, joining footprints of different blocks that share a
    point (a building cut by a block edge)."""
    ids = np.concatenate([b.members[0] for b in blocks]) if blocks else np.zeros(0, np.int64)
    keys = np.concatenate([b.members[1] for b in blocks]) if blocks else np.zeros(0, np.int64)
    if len(ids) == 0:
        return {}
    uid, node = np.unique(ids, return_inverse=True)
    node = node.reshape(-1)
    order = np.lexsort((node, keys))
    same = np.flatnonzero(keys[order][1:] == keys[order][:-1])
    a, b = node[order][same], node[order][same + 1]
    graph = coo_matrix((np.ones(len(a)), (a, b)), shape=(len(uid), len(uid)))
    _, comp = connected_components(graph, directed=False)
    # number the buildings by their first footprint id (stable across runs)
    first = np.full(int(comp.max()) + 1, len(uid))
    np.minimum.at(first, comp, np.arange(len(uid)))
    rank = np.argsort(np.argsort(first))
    return {int(u): int(rank[c]) for u, c in zip(uid, comp, strict=True)}


def merge_findings(plan: WireStates, model: Any, conductors: dict[str, Any], rules: Any,
                   blocks: list[BlockFindings]) -> AuditResult:
    """Group the blocks' findings into obstacles and finish the audit.

    Parameters
    ----------
    plan
        From :func:`prepare_wire_states`.
    model
        The line model.
    conductors
        ``{"phase": Conductor, "shield": Conductor}``.
    rules
        :class:`clearaudit.audit.rules.RuleSet`.
    blocks
        From :func:`point_findings`, one per block (in a fixed order).

    Returns
    -------
    AuditResult

    Notes
    -----
    One row per obstacle per condition group (the worst entry). Obstacles: a tree crown (by its
    top's canopy cell, the same in every block), a building footprint (footprints of different
    blocks sharing a point are one building), a crossing wire; other violating vegetation and
    ground points by single linkage over all blocks together (:func:`_obstacle_rows`). Then the
    fall-in risk of every tree, grow-in time and priorities (:mod:`.priority`), span rows,
    curves and ground profiles.
    """
    opts = plan.options
    states = plan.states
    notes = list(plan.notes)

    # ---- the tree table, in canopy cell order
    tree_parts = [b.trees for b in blocks if b.trees and len(b.trees["code"])]
    tops = None
    if tree_parts:
        code = np.concatenate([t["code"] for t in tree_parts])
        offsets = np.cumsum([0] + [len(t["code"]) for t in tree_parts])
        order = np.argsort(code, kind="stable")
        new_of = np.empty(len(order), dtype=np.int64)
        new_of[order] = np.arange(len(order))
        cell_tree = np.concatenate([new_of[t["cell_tree"] + o] for t, o in
                                    zip(tree_parts, offsets, strict=False)]).astype(np.int64)
        tops = TreeTops(np.concatenate([t["xy"] for t in tree_parts]).reshape(-1, 2)[order],
                        np.concatenate([t["top_z"] for t in tree_parts])[order],
                        np.concatenate([t["height_m"] for t in tree_parts])[order],
                        np.concatenate([t["cell_xyz"] for t in tree_parts]).reshape(-1, 3),
                        cell_tree)
        tree_code = code[order]
    elif any(b.trees for b in blocks):
        tops = TreeTops(np.zeros((0, 2)), np.zeros(0), np.zeros(0), np.zeros((0, 3)),
                        np.zeros(0, dtype=np.int64))
        tree_code = np.zeros(0, dtype=np.int64)
    building_of = _join_footprints(blocks)

    # ---- 4. obstacles and rows
    rows: list[dict] = []
    for kind in ("vegetation", "building", "ground", "wire"):
        f_parts, xyz_parts, key_parts, label_parts, offset = [], [], [], [], 0
        for b in blocks:
            f = b.findings.get(kind)
            if f is None or len(f.point) == 0:
                continue
            f_parts.append(Findings(f.point + offset, f.state, f.condition, f.clearance_m,
                                    f.required_m, f.ci95_m, f.fraction, f.key,
                                    f.other_deficit_m))
            xyz_parts.append(b.xyz[kind])
            key_parts.append(b.key[kind])
            label_parts.append(b.label[kind])
            offset += len(b.xyz[kind])
        if not f_parts:
            continue
        label = np.concatenate(label_parts)
        if kind == "vegetation":
            if tops is not None and len(tree_code):
                at = np.clip(np.searchsorted(tree_code, label), 0, len(tree_code) - 1)
                label = np.where((label >= 0) & (tree_code[at] == label), at, -1)
            else:
                label = np.full(len(label), -1)
        elif kind == "building":
            label = np.array([building_of.get(int(v), -1) for v in label], dtype=np.int64) \
                if len(label) else label
        group = _Group(kind, np.concatenate(key_parts), np.concatenate(xyz_parts), None)
        rows.extend(_obstacle_rows(kind, Findings.concat(f_parts), group, states, opts,
                                   labels=label))
    ground_min: dict[tuple[int, str], float] = {}
    for b in blocks:
        for k, v in b.ground_min.items():
            ground_min[k] = min(ground_min.get(k, math.inf), v)

    # ---- 5. trees, fall-in, priorities
    trees_info = {"trees": 0, "fall_in_trees": 0}
    # the outputs' downsampled curves of the curves the fall-in search samples anyway
    # (each curve is sampled from its recipe once here, not again for the outputs)
    downsampled: dict[tuple[int, str], np.ndarray] = {}
    if tops is not None:
        trees_info["trees"] = len(tops)
        if opts.fall_in and states:
            _fall_in(rows, tops, states, rules, plan.voltage_kv, plan.altitude_m, opts,
                     trees_info, downsampled)
    for row in rows:
        if row["kind"] == "vegetation":
            gap = max(0.0, row["clearance_m"] - row["required_m"])
            row["grow_in_years"] = gap / opts.growth_rate_m_per_year
        else:
            row["grow_in_years"] = None
    # Clearance violations (found or possible) and hazard trees (tall enough to fall into the
    # line but clear of every requirement) are ranked separately: a hazard tree is a work item
    # for the vegetation crews, not a clearance violation.
    hazard_trees = rank_findings([r for r in rows if r["finding"] == "fall_in"])
    rows = rank_findings([r for r in rows if r["finding"] != "fall_in"])
    for n, row in enumerate(rows, start=1):
        row["id"] = n
    for n, row in enumerate(hazard_trees, start=1):
        row["id"] = n

    # ---- 6. span rows, curves, profiles
    survey_t = plan.survey_temperature
    span_rows = _span_rows(model, states, survey_t, ground_min, conductors)
    curves = {(st.span_id, st.wire_id): {c: downsampled[(k, c)] if (k, c) in downsampled
                                         else _downsample(st.curves[c]) for c in st.recipes}
              for k, st in enumerate(states)}
    del downsampled
    profiles = {}
    for span in model.spans:
        length = float(np.linalg.norm(np.asarray(span.b_xy, float) - np.asarray(span.a_xy,
                                                                                  float)))
        if not length > 0:
            continue
        stations = np.linspace(0.0, length, max(2, int(math.ceil(length)) + 1))
        z = np.full(len(stations), np.nan)
        for b in blocks:
            got = b.profiles.get(span.id)
            if got is not None:
                z[got[0]] = got[1]
        profiles[span.id] = np.column_stack([stations, z])

    summary = _summary(rows + hazard_trees, states, span_rows, survey_t, notes, trees_info,
                       rules, plan.voltage_kv, plan.altitude_m, plan.altitude_note,
                       plan.insulator_length_m)
    return AuditResult(
        survey_temperature={k: survey_t[k] for k in ("value_c", "ci95_c", "method", "note")},
        conditions={name: spec.as_dict() for name, spec in plan.specs.items()},
        span_rows=span_rows, violations=rows, curves=curves, ground_profiles=profiles,
        summary=summary, rules=rules.describe(), hazard_trees=hazard_trees)


# ------------------------------------------------------------------------------ main
def audit_line(cloud: Cloud, classification: Any, model: Any, config: Any,
               conductors: dict[str, Any], rules: Any, *,
               progress: Callable[[int, int], None] | None = None,
               options: AuditOptions | None = None) -> AuditResult:
    """Audit the clearances of a fitted line (the whole cloud as one block).

    ``audit_line`` = :func:`prepare_wire_states` + :func:`point_findings` on every point +
    :func:`merge_findings`; the tiled run (:mod:`clearaudit.tiling`) calls the same three with
    one block per tile.

    Parameters
    ----------
    cloud
        The point cloud (local metres).
    classification
        :class:`clearaudit.classify.ClassificationResult` (``classification``,
        ``height_above_ground_m``, ``ground`` with ``height_at``); ``None``: the cloud's own
        classes, no ground model, HAG from the points.
    model
        :class:`clearaudit.model.line.LineModel`.
    config
        :class:`clearaudit.config.LineConfig`.
    conductors
        ``{"phase": Conductor, "shield": Conductor}``.
    rules
        :class:`clearaudit.audit.rules.RuleSet`.
    progress
        Called as ``progress(done, total)`` over the wire states.
    options
        :class:`AuditOptions`.

    Returns
    -------
    AuditResult

    Raises
    ------
    InputError
        When the line voltage is unknown.
    """
    classes = (np.asarray(classification.classification) if classification is not None
               else np.asarray(cloud.classification))
    hag = (np.asarray(classification.height_above_ground_m, dtype=float)
           if classification is not None and getattr(classification, "height_above_ground_m",
                                                    None) is not None
           else np.asarray(cloud.fields.get("height_above_ground",
                                            np.full(cloud.n_points, np.nan)), dtype=float))
    ground_model = getattr(classification, "ground", None) if classification is not None else None
    xyz = cloud.xyz
    ground_classes = np.array(sorted(rules.surfaces), dtype=np.uint8) if rules.surfaces else \
        np.array([2], dtype=np.uint8)
    is_ground = class_mask(classes, ground_classes)
    plan = prepare_wire_states(
        model, config, conductors, rules, latitude_deg=_latitude(cloud),
        ground_z_m=xyz[is_ground, 2],
        origin_z_m=float(cloud.origin[2]) * float(cloud.vertical_unit_m), options=options)
    other = None                                     # None: no crossing wire points
    for k, ow in enumerate(getattr(model, "other_wires", []) or []):
        if other is None:
            other = np.full(cloud.n_points, -1, dtype=np.int64)
        other[np.asarray(ow.point_indices, dtype=np.int64)] = k
    block = point_findings(xyz, classes, hag, plan, model, rules, ground_model=ground_model,
                           other_wire=other, progress=progress)
    return merge_findings(plan, model, conductors, rules, [block])



def _findings(idx, state, cond, d, required, ci, frac, key) -> Findings:
    n = len(idx)
    return Findings(idx, np.full(n, state), np.full(n, cond, dtype=object), d,
                    np.full(n, float(required)), ci, frac, np.full(n, key, dtype=object))


def _ground_model_clearance(ground_model, curve: np.ndarray, box=None) -> float:
    if ground_model is None:
        return math.inf
    curve = curve[_in_box(curve[:, :2], box)]
    if len(curve) == 0:
        return math.inf
    try:
        z = np.asarray(ground_model.height_at(curve[:, :2]), dtype=float)
    except Exception:  # noqa: BLE001 - a model that cannot be sampled adds nothing
        return math.inf
    dz = curve[:, 2] - z
    dz = dz[np.isfinite(dz)]
    return float(dz.min()) if dz.size else math.inf


def _thin_curve(c: np.ndarray, step_m: float = 4.0) -> tuple[np.ndarray, float]:
    """A curve's plan samples thinned to about ``step_m`` apart, and half the largest gap. [m]"""
    if len(c) < 2:
        return c[:, :2], 0.0
    every = max(1, int(step_m / max(float(np.max(np.linalg.norm(np.diff(c[:, :2], axis=0),
                                                                 axis=1))), 1e-6)))
    idx = np.arange(0, len(c), every)
    if idx[-1] != len(c) - 1:
        idx = np.append(idx, len(c) - 1)
    gaps = np.linalg.norm(np.diff(c[idx, :2], axis=0), axis=1)
    return c[idx, :2], (0.5 * float(gaps.max()) if gaps.size else 0.0)


def _plan_samples(curves: list[np.ndarray], step_m: float = 4.0) -> tuple[cKDTree, float]:
    """A plan k-d tree of the curves thinned to ``step_m``, and half the largest gap. [m]"""
    thinned = [_thin_curve(c, step_m) for c in curves]
    return (cKDTree(np.concatenate([t for t, _ in thinned])),
            max((p for _, p in thinned), default=0.0))


# ------------------------------------------------------------------------------ fast search
#: Slack added to every geometric bound below so rounding can never drop a point. [m]
_EPS_M = 1e-6
#: Station bin of :class:`_CurveWindow`. [m]
_BIN_M = 0.5
#: :func:`curve_frame`'s curve starts for a single curve
_ONE_CURVE = np.zeros(1, dtype=np.int64)
#: No heights: the plan window test of :meth:`_CurveWindow.maybe_near`
_NO_Z = np.zeros(0)


class _PlanGrid:
    r"""Plan grid over the block: every point's cell, and per occupied cell bounds of the plan
    distance to the nearest thinned curve sample.

    A point ``p`` in a cell with centre ``c`` and half-diagonal ``h`` has
    :math:`d(c) - h \le d(p) \le d(c) + h` (triangle inequality), so whole cells are kept or
    dropped for a search distance and only points in cells that straddle it are measured
    exactly (with the same k-d tree query as a point-by-point search, so the kept set is the
    same).
    """

    def __init__(self, xy: np.ndarray, plan_tree: cKDTree, reach_m: float,
                 cell_m: float = 2.0, max_cells: int = 16_000_000):
        self.tree = plan_tree
        samples = plan_tree.data
        # The samples' box widened by the reach and two cells; points outside are clamped
        # into the outermost cells, which are farther than the reach from every sample.
        margin = reach_m + 2.0 * cell_m
        lo = samples.min(axis=0) - margin
        extent = samples.max(axis=0) + margin - lo
        cell_m = max(float(cell_m), math.sqrt(float(extent[0] * extent[1]) / max_cells))
        margin = reach_m + 2.0 * cell_m
        lo = samples.min(axis=0) - margin
        extent = samples.max(axis=0) + margin - lo
        self.cell_m, self.lo = cell_m, lo
        self.nx = int(extent[0] // cell_m) + 1
        self.ny = int(extent[1] // cell_m) + 1
        ncell = self.nx * self.ny
        # every point's cell (clipped into the grid; >= 0, so truncation is the floor) and
        # the occupied cells, in one compiled pass (plan_cells: the numpy form's operations)
        key = np.empty(len(xy), dtype=np.int32 if ncell < 2 ** 31 - 1 else np.int64)
        occupied = np.zeros(ncell, dtype=np.uint8)
        plan_cells(np.asarray(xy, dtype=np.float64), float(lo[0]), float(lo[1]), 1.0 / cell_m,
                   self.nx, self.ny, key, occupied)
        self.key = key
        cells = np.flatnonzero(occupied)
        half = 0.5 * math.sqrt(2.0) * cell_m
        centre = np.column_stack([lo[0] + (cells // self.ny + 0.5) * cell_m,
                                  lo[1] + (cells % self.ny + 0.5) * cell_m])
        d, _ = plan_tree.query(centre, distance_upper_bound=reach_m + half + 1.0)
        border = ((cells // self.ny) == 0) | ((cells // self.ny) == self.nx - 1) | \
            ((cells % self.ny) == 0) | ((cells % self.ny) == self.ny - 1)
        d[border] = np.inf                              # clamped points: beyond the reach
        self.cells = cells
        self.d_lo = d - half - _EPS_M
        self.d_hi = d + half + _EPS_M
        self.ncell = ncell

    def _code(self, bound_m: float) -> np.ndarray:
        """Per cell: 0 beyond ``bound_m``, 1 surely within, 2 straddling it."""
        code = np.zeros(self.ncell, dtype=np.uint8)
        code[self.cells] = np.where(self.d_hi < bound_m, 1,
                                    np.where(self.d_lo <= bound_m, 2, 0))
        return code

    def near(self, xy: np.ndarray, mask: np.ndarray | None, bound_m: float,
             inner_m: float | None = None, exact: bool = True, inner_exact: bool = False
             ) -> tuple[np.ndarray, np.ndarray | None]:
        """Indices of the masked points within ``bound_m`` in plan of a thinned sample (as a
        k-d tree query with ``distance_upper_bound=bound_m``); with ``inner_m``, also whether
        each may be within ``inner_m`` (its cell reaches within ``inner_m``: a superset;
        ``inner_exact``: whether it is, ``<=``). ``exact=False``: a superset of the points too (whole cells that reach within
        ``bound_m``), no ``inner_m``."""
        code = self._code(bound_m)
        if mask is not None and np.count_nonzero(mask) < len(mask) // 4:
            idx = np.flatnonzero(mask)               # few points: look up their cells only
            state = code[self.key[idx]]
            inside = np.flatnonzero(state)
            idx, state = idx[inside], state[inside]
        else:
            state = code[self.key]
            if mask is not None:
                state *= mask
            idx = np.flatnonzero(state)
            state = state[idx]
        if not exact:
            return idx, None
        check = np.flatnonzero(state == 2)
        d_check, _ = self.tree.query(xy[idx[check]], distance_upper_bound=bound_m)
        keep = np.ones(len(idx), dtype=bool)
        keep[check] = np.isfinite(d_check)
        inner = None
        if inner_m is not None and not inner_exact:        # whole cells: a superset
            inner = (self._code(inner_m) != 0)[self.key[idx[keep]]]
        elif inner_m is not None:
            inner = (self._code(inner_m) == 1)[self.key[idx]]
            inner[check] = d_check <= inner_m              # measured: the exact comparison
            other = np.flatnonzero((self._code(inner_m) == 2)[self.key[idx]] & (state == 1))
            if other.size:                                 # straddling inner_m only
                d_other, _ = self.tree.query(xy[idx[other]], distance_upper_bound=bound_m)
                inner[other] = d_other <= inner_m
            inner = inner[keep]
        return idx[keep], inner


class _CellIndex:
    """The points of one obstacle group sorted by their :class:`_PlanGrid` cell, to gather the
    points near a wire's curves by cell ranges."""

    def __init__(self, grid: _PlanGrid, cloud_index: np.ndarray):
        key = np.ascontiguousarray(grid.key[cloud_index])
        # the points in cell order, each cell's in group order (a compiled counting sort:
        # numpy's argsort of ~1 M cell numbers took 7.7 ms a group, this ≈ 1); start[c]: first
        # position of cell c in that order (start[c + 1]: its end)
        self.order = np.empty(len(key), dtype=np.int64)
        self.start = np.empty(grid.ncell + 1, dtype=np.int64)
        cell_order(key, self.start, self.order)
        self.grid = grid

    def near_curves(self, curves: list[np.ndarray], reach_m: float) -> np.ndarray:
        """Group-local indices (cell order) of every point within ``reach_m`` in plan of a
        curve vertex (a superset: whole cells, Chebyshev ring ``floor(reach / cell) + 1``)."""
        if len(self.order) == 0:
            return np.zeros(0, dtype=np.int64)
        g = self.grid
        xy = np.concatenate([c[:, :2] for c in curves])
        # The same arithmetic as the points' cells (rounding is monotone).
        ix = np.floor((xy[:, 0] - g.lo[0]) * (1.0 / g.cell_m)).astype(np.int64)
        iy = np.floor((xy[:, 1] - g.lo[1]) * (1.0 / g.cell_m)).astype(np.int64)
        ring = int((reach_m + _EPS_M) // g.cell_m) + 1
        x0, y0 = ix.min() - ring, iy.min() - ring
        shape = (int(ix.max() - x0) + ring + 1, int(iy.max() - y0) + ring + 1)
        raster = np.zeros(shape, dtype=bool)
        raster[ix - x0, iy - y0] = True
        raster = maximum_filter(raster, size=2 * ring + 1, mode="constant", cval=False)
        rx, ry = np.nonzero(raster)
        gx, gy = rx + x0, ry + y0
        ok = (gx >= 0) & (gx < g.nx) & (gy >= 0) & (gy < g.ny)
        cells = gx[ok] * g.ny + gy[ok]                  # increasing (row-major raster)
        if cells.size == 0:
            return np.zeros(0, dtype=np.int64)
        brk = np.flatnonzero(np.diff(cells) != 1) + 1
        first = cells[np.concatenate([[0], brk])]
        last = cells[np.concatenate([brk - 1, [len(cells) - 1]])]
        start = self.start[first]
        stop = self.start[last + 1]
        length = stop - start
        total = int(length.sum())
        if total == 0:
            return np.zeros(0, dtype=np.int64)
        run = np.repeat(np.arange(len(start)), length)
        pos = np.arange(total) - np.repeat(np.cumsum(length) - length, length) + start[run]
        return self.order[pos]


class _CurveWindow:
    """Bounds of a curve near a station: for each bin of the station along a fixed plan axis,
    the range of the curve's across-axis offset and height over every vertex within reach.

    A point :math:`p` within :math:`R` of the polyline (3-D or plan) is within :math:`R` of a
    point :math:`c` on a segment whose two vertices are within :math:`R + s` of :math:`p`
    (:math:`s` the longest segment); along and across any fixed plan axis, and in height,
    :math:`|p - c|` bounds each coordinate difference. So :math:`p` is out of reach when its
    offset or height lies more than :math:`R` outside the range of those vertices (the curve
    between two vertices lies within their range).
    """

    def __init__(self, curve: np.ndarray | list[np.ndarray], origin: np.ndarray,
                 axis: np.ndarray, reach_m: float, bin_m: float = _BIN_M):
        bin_m = float(bin_m)
        curves = curve if isinstance(curve, list) else [curve]
        # several curves: the union of their windows
        curve = np.ascontiguousarray(curves[0] if len(curves) == 1 else np.concatenate(curves),
                                     dtype=np.float64)
        self.bin_m = bin_m
        self.reach_m = reach_m
        # one compiled pass for the vertices' stations, offsets and bins and the longest
        # segment, one for the ranges per bin (the numbers of numpy.ufunc.at into the bins
        # and scipy.ndimage's 1-D filters: tests/test_audit_clearance.py)
        n = len(curve)
        u, v, b = np.empty(n), np.empty(n), np.empty(n, dtype=np.int64)
        starts = _ONE_CURVE if len(curves) == 1 else \
            np.cumsum([0] + [len(c) for c in curves[:-1]], dtype=np.int64)
        got = curve_frame(curve, starts, float(origin[0]), float(origin[1]), float(axis[0]),
                          float(axis[1]), bin_m, u, v, b)
        if got is None:
            raise ValueError("a wire curve has a vertex that is not finite")
        seg, b_lo, b_hi = got
        ring = int(math.ceil((reach_m + seg + _EPS_M) / bin_m)) + 1
        self.b0 = int(b_lo) - ring - 1
        self.nb = int(b_hi) - self.b0 + ring + 2
        self.v_min, self.v_max = np.empty(self.nb), np.empty(self.nb)
        self.z_min, self.z_max = np.empty(self.nb), np.empty(self.nb)
        curve_window(b, v, curve[:, 2], self.b0, ring, self.v_min, self.v_max, self.z_min,
                     self.z_max)

    def maybe_near(self, ub: np.ndarray, v: np.ndarray, z: np.ndarray | None = None
                   ) -> np.ndarray:
        """Points possibly within the reach (plan when ``z`` is None, else 3-D), from their
        whole station bins ``ub = floor(u / bin_m)`` (int64), offsets ``v`` and heights ``z``:
        in a bin of the curve, with ``v`` (and ``z``) no more than the reach outside its
        range there (one compiled pass, ``window_near``). [m]"""
        out = np.empty(len(ub), dtype=np.uint8)
        window_near(np.ascontiguousarray(ub, dtype=np.int64), self.b0,
                    np.asarray(v, dtype=np.float64),
                    _NO_Z if z is None else np.asarray(z, dtype=np.float64),
                    self.v_min, self.v_max, self.z_min, self.z_max, self.reach_m + _EPS_M, out)
        return out.view(bool)


def _state_points(points: np.ndarray, sub: np.ndarray, curves: list[np.ndarray],
                  origin: np.ndarray, axis: np.ndarray, reach_m: float, three_d: bool = False
                  ) -> tuple[np.ndarray, ...]:
    """The candidates ``sub`` of one wire state that can be within ``reach_m`` of any of its
    curves (plan, or 3-D with ``three_d``), with their station bins, offsets and heights."""
    x, y, z = take_columns(points, sub)  # the rows' columns, gathered in one pass
    dx, dy = x - origin[0], y - origin[1]
    # station along and offset across the plan axis (unit vector) from the origin [m]
    u, v = dx * axis[0] + dy * axis[1], dy * axis[0] - dx * axis[1]
    ub = np.floor(u / _BIN_M).astype(np.int64)
    window = _CurveWindow(curves, origin, axis, reach_m)
    keep = np.flatnonzero(window.maybe_near(ub, v, z if three_d else None))
    return sub[keep], ub[keep], v[keep], z[keep]


def _state_axis(curves: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Origin and unit plan axis of a wire state (its first curve's chord)."""
    c = curves[0]
    origin = c[0, :2].copy()
    d = c[-1, :2] - c[0, :2]
    n = float(np.hypot(d[0], d[1]))
    return origin, (d / n if n > 0 else np.array([1.0, 0.0]))


def _ground_candidates(points: np.ndarray, near: tuple, curve: np.ndarray, origin: np.ndarray,
                       axis: np.ndarray, lateral_m: float, ci_max_m: float
                       ) -> tuple[np.ndarray, tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """The ground points that decide the ground findings of one curve, measured.

    Every point that can be within ``lateral_m`` of the curve's plan and violate (a lower
    bound of its clearance minus the largest half-width is below its requirement), and every
    point whose clearance can be the lowest (lower bound not above the lowest measured one).
    Clearances and findings over these points equal those over all points.

    Returns
    -------
    index : sorted group-local indices.
    lateral, wire_z, parameter : :func:`~clearaudit.audit.clearance.polyline_overhead` of
        those points.
    """
    sub, u, v, z, required = near
    empty = np.zeros(0, dtype=np.int64)
    none = (empty, (np.zeros(0), np.zeros(0), np.zeros(0)))
    if len(sub) == 0:
        return none
    window = _CurveWindow(curve, origin, axis, lateral_m)
    at = np.flatnonzero(window.maybe_near(u, v))
    if at.size == 0:
        return none
    # wire height above the point, at least (a point kept lies in a bin of the window)
    low = window.z_min[u[at] - window.b0] - z[at] - _EPS_M
    pick = low - ci_max_m - _EPS_M < required[at]
    # The lowest clearance: measure the points with the lowest bounds too, until one is under
    # the wire; no point whose bound is above the lowest clearance measured can be lower.
    take = min(256, len(low))
    measured = np.zeros(len(at), dtype=bool)
    idx, result = empty, none[1]
    while True:
        want = pick.copy()
        want[np.argpartition(low, take - 1)[:take]] = True
        if measured.any():
            want |= measured
        if not np.array_equal(want, measured):
            measured = want
            idx = np.sort(sub[at[measured]])
            result = polyline_overhead(take_rows(points, idx), curve)
        lateral, wire_z, _ = result
        under = lateral <= lateral_m
        if np.any(under):
            lowest = float(np.min(wire_z[under] - points[idx[under], 2]))
            more = ~measured & (low <= lowest)
            if not np.any(more):
                return idx, result
            pick |= more
        elif take >= len(low):
            return idx, result
        else:
            take = min(4 * take, len(low))


def _exact_ground(group: _Group, grid: _PlanGrid, bound_m: float) -> _Group:
    """The ground group cut to the points within ``bound_m`` in plan of a thinned sample (the
    same k-d tree query as :meth:`_PlanGrid.near`)."""
    if len(group.index) == 0:
        return group
    d, _ = grid.tree.query(group.xyz[:, :2], distance_upper_bound=bound_m)
    keep = np.flatnonzero(np.isfinite(d))
    return _Group(group.kind, group.index[keep], group.xyz[keep], None, group.two_d)


def _make_group(kind: str, xyz: np.ndarray, idx: np.ndarray, two_d: bool = False,
                tree: bool = False) -> _Group:
    """The group's points; its k-d tree (xy when ``two_d``) now with ``tree``, else on demand
    (:meth:`_Group.search_tree`)."""
    pts = take_rows(xyz, idx)
    group = _Group(kind, idx, pts, None, two_d)
    if tree:
        group.search_tree()
    return group


def _members(labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Point order sorted by label and the start of every label in it."""
    order = np.argsort(labels, kind="stable")
    n = int(labels.max()) + 1 if len(labels) else 0
    starts = np.searchsorted(labels[order], np.arange(n + 1))
    return order, starts


def _radial(points, idx, state, cond, curve, frac, ci_along, required, key) -> Findings:
    """3-D clearance of candidate points ``idx`` to one curve; entries within reach."""
    p = take_rows(points, idx)
    d, closest, param = polyline_distance(p, curve)
    ci = np.interp(param, np.arange(len(curve)), ci_along)
    # The curve's uncertainty is vertical; project it on the point-to-wire direction.
    ci = ci * np.where(d > 1e-9, np.abs(closest[:, 2] - p[:, 2]) / np.maximum(d, 1e-9), 1.0)
    keep = d - ci < required
    fr = np.interp(param[keep], np.arange(len(curve)), frac)
    return _findings(idx[keep], state, cond, d[keep], required, ci[keep], fr, key)


def _building(points, idx, labels, by_label, state, cond, curve, frac, ci_along, b_h, b_v
              ) -> Findings:
    """One entry per building inside (or, within the 95 % interval, near) the box envelope."""
    p = take_rows(points, idx)
    offset, wire_z, param = polyline_offsets(p, curve)
    ci = np.interp(param, np.arange(len(curve)), ci_along)
    d_v = np.abs(wire_z - p[:, 2])  # the gathered rows' heights: points[idx, 2]
    flagged = (np.abs(offset) < b_h) & (d_v - ci < b_v)
    if not np.any(flagged):
        return Findings.empty()
    order, starts = by_label
    out = {k: [] for k in ("point", "clearance", "required", "ci", "frac", "key", "other")}
    for label in np.unique(labels[idx[flagged]]):          # a loop over buildings
        members = order[starts[label]:starts[label + 1]]
        env = building_envelope(points[members], curve, b_h, b_v)
        m_ci = np.interp(env["parameter"], np.arange(len(curve)), ci_along)
        if env["violated"]:
            rise, shift = env["rise_m"], env["shift_m"]
            vertical = rise <= shift
            j = env["rise_point"] if vertical else env["shift_point"]
            deficit, other = (rise, shift) if vertical else (shift, rise)
        else:
            # Only the 95 % interval reaches the envelope: the point nearest to violating.
            near = idx[flagged]
            pos = np.minimum(np.searchsorted(members, near), len(members) - 1)
            lookup = pos[members[pos] == near]       # members are sorted (stable argsort)
            move_v = b_v - np.abs(env["wire_z"][lookup] - points[members[lookup], 2])
            move_h = b_h - np.abs(env["offset"][lookup])
            best = int(np.argmax(np.minimum(move_v, move_h)))
            vertical = move_v[best] <= move_h[best]
            j = int(lookup[best])
            deficit, other = ((move_v[best], move_h[best]) if vertical
                              else (move_h[best], move_v[best]))
        required = b_v if vertical else b_h
        out["point"].append(int(members[j]))
        out["clearance"].append(required - deficit)
        out["required"].append(required)
        out["ci"].append(float(m_ci[j]) if vertical else 0.0)
        out["frac"].append(float(np.interp(env["parameter"][j], np.arange(len(curve)), frac)))
        out["key"].append("vertical" if vertical else "horizontal")
        out["other"].append(other)
    n = len(out["point"])
    return Findings(np.array(out["point"], dtype=np.int64), np.full(n, state),
                    np.full(n, cond, dtype=object), np.array(out["clearance"]),
                    np.array(out["required"]), np.array(out["ci"]), np.array(out["frac"]),
                    np.array(out["key"], dtype=object), np.array(out["other"], dtype=float))


def _obstacle_rows(kind: str, f: Findings, group: _Group | None, states: list[WireState],
                   opts: AuditOptions, labels: np.ndarray | None = None) -> list[dict]:
    """One row per obstacle per condition group.

    ``labels`` gives the obstacle of every point of the group (buildings: connected
    components; vegetation: tree crowns, -1 outside any crown; wires: the crossing wire).
    Without labels, and for vegetation outside crowns, the violating points are grouped by
    single linkage (vegetation: ``link_m``, cut into ``max_obstacle_extent_m`` tiles; ground:
    ``ground_link_m`` in plan per surface type, cut into ``ground_patch_m`` tiles; buildings:
    ``building_link_m``, never cut).
    """
    if group is None or len(f.point) == 0:
        return []
    unique, inverse = np.unique(f.point, return_inverse=True)
    inverse = inverse.reshape(-1)
    prefix = {"vegetation": "V", "building": "B", "ground": "G", "wire": "W"}[kind]
    name_u = np.empty(len(unique), dtype=object)
    known = (np.asarray(labels)[unique] if labels is not None
             else np.full(len(unique), -1, dtype=np.int64))
    has = known >= 0
    if kind == "vegetation":
        name_u[has] = [f"T{int(t) + 1:04d}" for t in known[has]]
    else:
        name_u[has] = [f"{prefix}{int(t) + 1:04d}" for t in known[has]]
    rest = np.flatnonzero(~has)
    if rest.size:
        pts = group.xyz[unique[rest]]
        if kind == "ground":
            flat = pts.copy()
            flat[:, 2] = 0.0
            sub = group_obstacles(flat, opts.ground_link_m, opts.ground_patch_m)
            # Different surfaces (road, land ...) are different patches.
            first = np.zeros(len(unique), dtype=np.int64)
            first[inverse[::-1]] = np.arange(len(f.point))[::-1]
            surface = f.key[first[rest]].astype(str)
            _, sub = np.unique(np.column_stack([sub, np.unique(surface, return_inverse=True)[1]
                                                .reshape(-1)]), axis=0, return_inverse=True)
            sub = sub.reshape(-1)
        elif kind == "building":
            flat = np.column_stack([pts[:, :2], np.zeros(len(pts))])
            sub = group_obstacles(flat, opts.building_link_m, None)
        else:
            sub = group_obstacles(pts, opts.link_m, opts.max_obstacle_extent_m)
        name_u[rest] = [f"{prefix}{int(t) + 1:04d}" for t in sub]
    names = name_u[inverse]
    _, label_codes = np.unique(names.astype(str), return_inverse=True)
    label_codes = label_codes.reshape(-1)
    cond_group = np.array([CONDITION_GROUP[c] for c in f.condition], dtype=object)
    keep = reduce_findings(f, cond_group, label_codes)
    survey_bad = set(names[(cond_group == "survey") & (f.deficit_m > 0)].tolist())
    rows = []
    for j in keep:
        st = states[int(f.state[j])]
        clearance = float(f.clearance_m[j])
        required = float(f.required_m[j])
        ci = float(f.ci95_m[j])
        cond = str(f.condition[j])
        row = {
            "kind": kind, "condition": CONDITION_GROUP[cond], "condition_detail": cond,
            "span_id": st.span_id, "wire_id": st.wire_id, "role": st.role,
            "point_local": group.xyz[int(f.point[j])].copy(),
            "cloud_index": int(group.index[int(f.point[j])]),
            "clearance_m": clearance, "required_m": required,
            "deficit_m": required - clearance, "clearance_ci95_m": ci,
            "certainty": "certain" if clearance + ci < required else "uncertain",
            "finding": "clearance" if clearance < required else "possible",
            "station_m": float(f.fraction[j]) * float(st.fit.span_length_m),
            "obstacle_id": str(names[j]),
            "fall_in": False, "violated_at_survey": str(names[j]) in survey_bad,
            "surface": str(f.key[j]) if kind == "ground" else "",
            "direction": str(f.key[j]) if kind == "building" else "",
        }
        if kind == "building":
            other = float(f.other_deficit_m[j])
            row["deficit_vertical_m"] = row["deficit_m"] if row["direction"] == "vertical" \
                else other
            row["deficit_horizontal_m"] = row["deficit_m"] if row["direction"] == \
                "horizontal" else other
        rows.append(row)
    return rows


def _fall_in(rows: list[dict], tops, states: list[WireState], rules, voltage: float,
             altitude: float | None, opts: AuditOptions, info: dict,
             downsampled: dict[tuple[int, str], np.ndarray] | None = None) -> None:
    """Fall-in risk of every tree; rows for risky trees that violate no clearance.

    The reach is checked against every wire (shield wires included: a tree on a shield wire
    is a reliability and fire risk); the clearance of a fall-in-only row is the crown's
    distance to the nearest wire whose vegetation rule applies (the energised phases).
    ``downsampled`` (when given) receives ``(state index, condition) -> _downsample(curve)``
    of the curves sampled here.
    """
    if len(tops) == 0:
        return
    curves, owner = [], []
    survey_samples: dict[int, tuple[np.ndarray, np.ndarray]] = {}
    for k, st in enumerate(states):
        for c in ("survey", "mot"):
            if c in st.curves:
                sample = st.sample(c)  # evaluated once (the states keep recipes)
                curve = sample[0]
                if c == "survey":
                    survey_samples[k] = sample
                if downsampled is not None:
                    downsampled[(k, c)] = _downsample(curve)
                curves.append(curve)
                owner.append(np.full(len(curve), k))
    wires = np.concatenate(curves)
    owner = np.concatenate(owner)
    dist, nearest = cKDTree(wires).query(tops.base_xyz)
    reach_state = owner[np.minimum(nearest, len(owner) - 1)]
    risk = dist < tops.height_m
    info["fall_in_trees"] = int(risk.sum())
    matched = np.zeros(len(tops), dtype=bool)
    for row in rows:                                      # a loop over findings
        oid = str(row.get("obstacle_id", ""))
        if row["kind"] != "vegetation" or not oid.startswith("T"):
            continue
        t = int(oid[1:]) - 1
        matched[t] = True
        _tree_fields(row, tops, t, dist, risk, states[int(reach_state[t])])
    if not opts.report_fall_in_only:
        return
    only = np.flatnonzero(risk & ~matched)
    targets = [k for k, st in enumerate(states) if rules.applies("vegetation", st.role)
               and "survey" in st.curves]
    if only.size == 0 or not targets:
        return
    cells = np.flatnonzero(np.isin(tops.cell_tree, only))
    cell_xyz = tops.cell_xyz[cells]
    survey = [survey_samples[k] for k in targets]  # (curve, fractions), sampled above
    best_d, which, param = nearest_curve(cell_xyz, [curve for curve, _ in survey])
    best_state = np.asarray(targets)[which]
    best_frac = np.zeros(len(cells))
    for j, (curve, fractions) in enumerate(survey):
        mine = which == j
        best_frac[mine] = np.interp(param[mine], np.arange(len(curve)), fractions)
    tree_of_cell = tops.cell_tree[cells]
    order = np.lexsort((best_d, tree_of_cell))
    first = np.ones(len(order), dtype=bool)
    first[1:] = tree_of_cell[order][1:] != tree_of_cell[order][:-1]
    for j in order[first]:                               # one per tree
        t = int(tree_of_cell[j])
        st = states[int(best_state[j])]
        required = rules.required("vegetation", st.role, voltage, altitude_m=altitude).value_m
        clearance = float(best_d[j])
        row = {
            "kind": "vegetation", "condition": "survey", "condition_detail": "survey",
            "span_id": st.span_id, "wire_id": st.wire_id, "role": st.role,
            "point_local": cell_xyz[j].copy(), "cloud_index": -1,
            "clearance_m": clearance, "required_m": required, "deficit_m": required - clearance,
            "clearance_ci95_m": float(st.position_ci95("survey", np.array([best_frac[j]]))[0]),
            "certainty": "certain", "finding": "fall_in",
            "station_m": float(best_frac[j]) * float(st.fit.span_length_m),
            "obstacle_id": f"T{t + 1:04d}", "fall_in": True, "violated_at_survey": False,
            "surface": "", "direction": "",
        }
        _tree_fields(row, tops, t, dist, risk, states[int(reach_state[t])])
        rows.append(row)


def nearest_curve(points: np.ndarray, curves: list[np.ndarray]
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Nearest of several polylines for every point: distance, curve index, vertex parameter.

    Parameters
    ----------
    points
        Shape (n, 3). [m]
    curves
        Polylines, each of shape (k_i, 3) with k_i >= 2. [m]

    Returns
    -------
    distance : (n,) [m]
    curve : (n,) index into ``curves`` (the first of equally near curves)
    parameter : (n,) vertex index plus fraction on that curve (see
        :func:`~clearaudit.audit.clearance.polyline_distance`)

    Notes
    -----
    The same result as measuring every point from every curve, in time about proportional
    to the number of points rather than points × curves: the distance to the nearest vertex of
    any curve bounds each point's distance from above, and a curve whose bounding box lies
    farther than that bound is not measured from that point.
    """
    pts = np.asarray(points, dtype=float).reshape(-1, 3)
    best_d = np.full(len(pts), np.inf)
    best_curve = np.zeros(len(pts), dtype=np.int64)
    best_param = np.zeros(len(pts))
    if len(pts) == 0 or not curves:
        return best_d, best_curve, best_param
    bound, _ = cKDTree(np.concatenate(curves)).query(pts)
    # the points that can be near a curve's box: within the box's half-diagonal plus the
    # largest bound of its centre (a superset of those the exact box test below keeps)
    reach = float(np.max(bound)) + 1e-9
    point_tree = cKDTree(pts) if np.isfinite(reach) else None
    for j, curve in enumerate(curves):                   # a loop over curves
        lo, hi = curve.min(axis=0), curve.max(axis=0)
        if np.isfinite(reach):
            some = np.asarray(point_tree.query_ball_point(
                0.5 * (lo + hi), 0.5 * float(np.sqrt(np.sum((hi - lo) ** 2))) * (1 + 1e-12)
                + reach + 1e-9), dtype=np.int64)
        else:
            some = np.arange(len(pts))
        if some.size == 0:
            continue
        some.sort()
        sub = pts[some]
        gap = np.maximum(np.maximum(lo - sub, sub - hi), 0.0)
        near = some[np.sqrt(np.einsum("ij,ij->i", gap, gap)) <= bound[some] + 1e-9]
        if near.size == 0:
            continue
        d, _, param = polyline_distance(pts[near], curve)
        better = d < best_d[near]
        sel = near[better]
        best_d[sel] = d[better]
        best_curve[sel] = j
        best_param[sel] = param[better]
    return best_d, best_curve, best_param


def _tree_fields(row: dict, tops, t: int, dist: np.ndarray, risk: np.ndarray,
                 reach: WireState) -> None:
    row["tree_height_m"] = float(tops.height_m[t])
    row["fall_in_distance_m"] = float(dist[t])
    row["fall_in"] = bool(risk[t])
    row["fall_in_span_id"] = reach.span_id
    row["fall_in_wire_id"] = reach.wire_id
    row["fall_in_wire_role"] = reach.role


def _num(x) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def _span_rows(model, states: list[WireState], survey_t: dict, ground_min: dict,
               conductors: dict) -> list[dict]:
    index = {(st.span_id, st.wire_id): k for k, st in enumerate(states)}
    rows = []
    for span in model.spans:
        for wire in span.wires:
            if wire.role not in ("phase", "shield"):
                continue
            fit = wire.fit
            ok = fit is not None and getattr(fit, "ok", False)
            k = index.get((span.id, wire.wire_id))
            st = states[k] if k is not None else None
            rbs = getattr(conductors.get(wire.role), "rated_strength_n", None)
            h = st.horizontal_tension_n.get("survey") if st else None
            row = {
                "span_id": span.id, "wire_id": wire.wire_id, "role": wire.role,
                "from_structure": span.from_structure or "", "to_structure": span.to_structure
                or "", "section_id": span.section_id,
                "attachment_a_local": fit.attachment_a if ok else np.full(3, np.nan),
                "attachment_b_local": fit.attachment_b if ok else np.full(3, np.nan),
                "span_length_m": _num(fit.span_length_m) if ok else _num(span.length_m),
                "n_points": int(wire.n_points),
                "coverage": _num(fit.coverage) if ok else None,
                "rms_m": _num(fit.rms_m) if ok else None,
                "catenary_constant_m": _num(fit.catenary_constant_m) if ok else None,
                "catenary_constant_ci95_m": _num(fit.catenary_constant_ci95_m) if ok else None,
                "horizontal_tension_n": _num(h),
                "horizontal_tension_ci95_n": _num(st.horizontal_tension_ci95_n.get("survey"))
                if st else None,
                "bundle_count": int(getattr(wire, "bundle_count", 1) or 1),
                "conductor_temperature_c": survey_t["value_c"],
                "conductor_temperature_ci95_c": survey_t["ci95_c"],
                "sag_survey_m": _num(fit.sag_m) if ok else None,
                "sag_survey_ci95_m": _num(fit.sag_ci95_m) if ok else None,
                "largest_gap_m": _num(fit.largest_gap_m) if ok else None,
                "rated_strength_pct": (100.0 * h / rbs if h is not None and rbs
                                       and math.isfinite(rbs) else None),
                "status": wire.status, "note": wire.note,
            }
            for cond in ("mot", "wind_left", "wind_right", "ice"):
                tag = {"wind_left": "wind_left", "wind_right": "wind_right"}.get(cond, cond)
                row[f"horizontal_tension_{tag}_n"] = _num(st.horizontal_tension_n.get(cond)) \
                    if st else None
                row[f"sag_{tag}_m"] = _num(st.sag_m.get(cond)) if st else None
                row[f"sag_{tag}_ci95_m"] = _num(st.sag_ci95_m.get(cond)) if st else None
            for cond in ("survey", "mot", "wind_left", "wind_right", "ice"):
                value = ground_min.get((k, cond)) if k is not None else None
                row[f"min_ground_clearance_{cond}_m"] = _num(value)
            if st and st.notes:
                row["note"] = "; ".join([row["note"], *st.notes]) if row["note"] else \
                    "; ".join(st.notes)
            rows.append(row)
    return rows


def _summary(rows, states, span_rows, survey_t, notes, trees_info, rules, voltage, altitude,
             altitude_note, insulator) -> dict:
    counts: dict[str, dict[str, int]] = {}
    for row in rows:
        if row["finding"] == "fall_in":
            continue
        counts.setdefault(row["kind"], {}).setdefault(row["condition"], 0)
        counts[row["kind"]][row["condition"]] += 1
    violations = [r for r in rows if r["deficit_m"] > 0]
    return {
        "findings": len(rows),
        "violations": len(violations),
        "violations_certain": sum(r["certainty"] == "certain" for r in violations),
        "violations_uncertain": sum(r["certainty"] == "uncertain" for r in violations),
        "possible_violations": sum(r["finding"] == "possible" for r in rows),
        "fall_in_only": sum(r["finding"] == "fall_in" for r in rows),
        "by_kind_and_condition": counts,
        "wires_projected": len(states),
        "spans": len({r["span_id"] for r in span_rows}),
        "survey_temperature": {k: survey_t[k] for k in ("value_c", "ci95_c", "method", "note")},
        "voltage_kv": voltage,
        "altitude_m": altitude, "altitude_source": altitude_note,
        "insulator_length_m": insulator,
        "rule_set": rules.name,
        "trees_examined": trees_info["trees"], "fall_in_trees": trees_info["fall_in_trees"],
        "notes": notes,
    }

"""Synthetic power-line corridors with exact, known physics (demo data and test truth).

:func:`generate_corridor` builds a point cloud of an overhead line corridor whose every wire is
an exact catenary with a known horizontal tension, over an analytic terrain, with structures,
insulators, vegetation, a building, a road, an optional under-build distribution line and noise,
and returns it with a complete, JSON-serialisable *truth* record: what a perfect
classification, line model and clearance audit should find.

Everything is deterministic from ``seed`` (independent ``numpy.random.Generator`` streams per
component, spawned from one ``SeedSequence``), vectorised, and in local metres; the CRS unit
only enters through the cloud's origin and unit lengths, so the same seed gives the same local
geometry in metres for metre, foot and US-survey-foot clouds.
"""
from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.spatial import cKDTree

from .. import __version__
from .. import cloud as C
from ..cloud import Cloud
from ..physics import catenary as cat
from ..units import FOOT_M, US_SURVEY_FOOT_M
from . import scene
from .scene import Building, Region, Road, TreeSet
from .structures import (
    ARRANGEMENTS,
    STRUCTURE_KINDS,
    Layout,
    insulator_length_m,
    lattice_members,
    make_layout,
    pole_members,
    segment_points,
)
from .terrain import TERRAIN_KINDS, Terrain, random_terrain
from .wires import CurveSet, WireSpan, sample_wire

UNITS_M = {"m": 1.0, "ft": FOOT_M, "us_ft": US_SURVEY_FOOT_M}
#: Default CRS for each unit (real projected CRSs; positions inside their area of use).
DEFAULT_CRS = {"m": "EPSG:32617", "ft": "EPSG:2222", "us_ft": "EPSG:2264"}
#: Longitude, latitude of the first structure for the default CRSs (rural inland areas).
_ANCHORS = {32617: (-80.93, 35.62), 2264: (-80.93, 35.62), 2222: (-110.45, 34.28)}
VEGETATION_LEVELS = ("none", "sparse", "mixed", "dense")
# Trees per hectare outside the cleared right-of-way, shrubs per hectare, grass cover fraction.
_VEGETATION = {"none": (0.0, 0.0, 0.0), "sparse": (8.0, 30.0, 0.15),
               "mixed": (30.0, 80.0, 0.35), "dense": (90.0, 160.0, 0.5)}
#: Half width of the cleared right-of-way (no random tall trees inside). [m]
ROW_HALF_WIDTH_M = 17.0
#: Structure body extension step. [m]
EXTENSION_STEP_M = 3.0
#: Under-build conductor: about 336.4 kcmil 26/7 ACSR, 0.463 lb/ft (from memory). [N/m]
UNDERBUILD_WEIGHT_N_PER_M = 6.76
UNDERBUILD_CONSTANT_M = 700.0


@dataclass
class SyntheticCorridor:
    """A generated corridor and its truth.

    Attributes
    ----------
    cloud
        The point cloud; ``xyz`` in local metres, ``origin`` in CRS units. Its classification
        is the truth (``classified=True``) or all 1 (``classified=False``).
    truth_classification
        uint8 ASPRS truth class per point (always filled).
    truth
        JSON-serialisable truth record (see :func:`generate_corridor`, Returns).
    line_config
        The line file content (TOML-able dict) for this corridor.
    structures
        Rows for the structures CSV: ``id``, ``x``, ``y`` (CRS units), ``type``.
    terrain
        The analytic ground surface (``terrain.height(x, y)`` in local metres).
    wires
        Every main-line wire in every span (true curves), in ``truth["wire_index"]`` order.
    truth_labels
        Per-point truth indices, -1 where not applicable: ``"wire"`` (into
        ``truth["wire_index"]``), ``"tree"`` (the ``index`` of a tree record), ``"structure"``
        (index of the structure, under-build poles after the line's structures).
    """

    cloud: Cloud
    truth_classification: np.ndarray
    truth: dict
    line_config: dict
    structures: list[dict]
    terrain: Terrain | None = None
    wires: list[WireSpan] = field(default_factory=list)
    truth_labels: dict[str, np.ndarray] = field(default_factory=dict)

    def ground_height(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """True ground height at local (x, y). [m]"""
        if self.terrain is None:
            raise ValueError("this corridor has no terrain attached")
        return self.terrain.height(x, y)


@dataclass
class _Structure:
    index: int
    id: str
    xy: np.ndarray
    ground_z: float
    deadend: bool
    d_in: np.ndarray
    d_out: np.ndarray
    extension_m: float = 0.0

    @property
    def along(self) -> np.ndarray:
        e = self.d_in + self.d_out
        return e / np.hypot(*e)

    @property
    def lateral(self) -> np.ndarray:
        e = self.along
        return np.array([-e[1], e[0]])

    def tip(self, p) -> np.ndarray:
        """Arm tip of layout position ``p`` (stretched across the line at angle structures)."""
        txy = self.xy + self.lateral * p.lateral_m * self.stretch
        return np.array([txy[0], txy[1], self.ground_z + p.arm_height_m + self.extension_m])

    def attachment(self, p, toward: np.ndarray, suspension_m: float,
                   deadend_m: float) -> np.ndarray:
        """Where the wire of position ``p`` leaving toward ``toward`` hangs: the arm tip for a
        shield wire, the end of a suspension string below it, or of a strain string."""
        t = self.tip(p)
        if p.role != "phase":
            return t
        if self.deadend:
            return t + np.array([toward[0], toward[1], 0.0]) * deadend_m
        return t - np.array([0.0, 0.0, suspension_m])

    @property
    def line_angle_deg(self) -> float:
        c = float(np.clip(self.d_in @ self.d_out, -1.0, 1.0))
        return float(np.degrees(np.arccos(c)))

    @property
    def stretch(self) -> float:
        return 1.0 / np.cos(np.radians(self.line_angle_deg) / 2.0)


def _left(d: np.ndarray) -> np.ndarray:
    return np.array([-d[1], d[0]])


def _bundle_offsets(bundle: int, spacing: float) -> list[tuple[float, float]]:
    """(lateral, vertical) offsets of sub-conductors from the phase attachment point. [m]"""
    if bundle == 1:
        return [(0.0, 0.0)]
    if bundle == 2:
        return [(spacing / 2.0, 0.0), (-spacing / 2.0, 0.0)]
    radius = spacing / (2.0 * np.sin(np.pi / bundle))
    ang = -np.pi / 2.0 + np.pi / bundle + 2.0 * np.pi * np.arange(bundle) / bundle
    return [(float(radius * np.cos(a)), float(radius * np.sin(a))) for a in ang]


def _tensions(spec: Any, n_sections: int, w_phase: float, w_shield: float,
              rng: np.random.Generator) -> list[dict[str, float]]:
    """Horizontal tension per wire role per tension section. [N]"""
    def default_pair(h_phase=None):
        c_phase = (h_phase / w_phase) if h_phase is not None else 1750.0 * rng.uniform(0.94, 1.06)
        h_p = float(h_phase) if h_phase is not None else float(round(w_phase * c_phase))
        return {"phase": h_p, "shield": float(round(w_shield * 1.15 * c_phase))}

    if spec is None:
        return [default_pair() for _ in range(n_sections)]
    items = list(spec) if isinstance(spec, (list, tuple)) else [spec] * n_sections
    if len(items) != n_sections:
        raise ValueError(f"horizontal_tension_n lists {len(items)} sections but the line has "
                         f"{n_sections} tension sections")
    out = []
    for item in items:
        if isinstance(item, dict):
            unknown = set(item) - {"phase", "shield"}
            if unknown:
                raise ValueError(f"horizontal_tension_n keys must be 'phase' and 'shield', "
                                 f"not {sorted(unknown)}")
            pair = default_pair(float(item["phase"]) if "phase" in item else None)
            if "shield" in item:
                pair["shield"] = float(item["shield"])
        else:
            pair = default_pair(float(item))
        if not (pair["phase"] > 0 and pair["shield"] > 0):
            raise ValueError("horizontal tensions must be positive")
        out.append(pair)
    return out


def _resolve_crs(crs: str | None, unit: str, anchor: tuple[float, float] | None):
    """The pyproj CRS (or None), metres per unit and the origin in CRS units."""
    unit_m = UNITS_M[unit]
    if crs is None:
        return None, unit_m, np.array([10000.0, 20000.0, 0.0])
    import pyproj

    from ..errors import InputError
    from ..io.crs import crs_units_m, parse_crs_option

    if crs == DEFAULT_CRS["m"] and unit != "m":
        crs = DEFAULT_CRS[unit]
    try:
        crs_obj = parse_crs_option(crs, option="crs")
        h_unit, _ = crs_units_m(crs_obj, source="crs")
    except InputError as exc:
        raise ValueError(f"crs {crs!r} cannot be used: {exc.problem}") from None
    if abs(h_unit - unit_m) > 1e-12:
        raise ValueError(f"crs {crs!r} has units of {h_unit} m, which does not match unit={unit!r}")
    epsg = crs_obj.to_epsg()
    if anchor is None:
        anchor = _ANCHORS.get(epsg) if epsg is not None else None
    if anchor is None:
        area = crs_obj.area_of_use
        if area is None:
            raise ValueError(f"crs {crs!r} has no area of use; pass anchor_lonlat")
        anchor = ((area.west + area.east) / 2.0, (area.south + area.north) / 2.0)
    tr = pyproj.Transformer.from_crs("EPSG:4326", crs_obj, always_xy=True)
    e, n = tr.transform(*anchor)
    return crs_obj, unit_m, np.array([round(e / 100.0) * 100.0, round(n / 100.0) * 100.0, 0.0])


def check_line_args(terrain: str, circuit: str, bundle: int, n_shield: int,
                    structure_kind: str, vegetation: str, noise_m: float, gap_fraction: float,
                    outliers: float) -> None:
    """The arguments both generators share (terrain, line layout, vegetation, sampling).

    Raises ValueError with a plain sentence for the first bad one: terrain kind, circuit
    ("single"/"double"), conductors per bundle (1–8), shield wires (0–2), structure kind,
    vegetation level, point noise [m] (≥ 0), share of wire length in gaps (0 to < 0.6) and
    share of outliers (0 to < 0.05).
    """
    if terrain not in TERRAIN_KINDS:
        raise ValueError(f"terrain must be one of {', '.join(TERRAIN_KINDS)}, not {terrain!r}")
    if circuit not in ("single", "double"):
        raise ValueError(f"circuit must be 'single' or 'double', not {circuit!r}")
    if not (isinstance(bundle, (int, np.integer)) and 1 <= bundle <= 8):
        raise ValueError("bundle must be a whole number from 1 to 8")
    if n_shield not in (0, 1, 2):
        raise ValueError("n_shield must be 0, 1 or 2")
    if structure_kind not in STRUCTURE_KINDS:
        raise ValueError(f"structure_kind must be one of {', '.join(STRUCTURE_KINDS)}")
    if vegetation not in VEGETATION_LEVELS:
        raise ValueError(f"vegetation must be one of {', '.join(VEGETATION_LEVELS)}")
    if not noise_m >= 0:
        raise ValueError("noise_m must not be negative")
    if not 0.0 <= gap_fraction < 0.6:
        raise ValueError("gap_fraction must be from 0 to below 0.6")
    if not 0.0 <= outliers < 0.05:
        raise ValueError("outliers must be a fraction from 0 to below 0.05")


def _check_args(terrain, n_spans, span_length_m, circuit, bundle, n_shield, structure_kind,
                vegetation, unit, density_per_m2, noise_m, gap_fraction, outliers, arrangement,
                weights):
    check_line_args(terrain, circuit, bundle, n_shield, structure_kind, vegetation, noise_m,
                    gap_fraction, outliers)
    if not (isinstance(n_spans, (int, np.integer)) and n_spans >= 1):
        raise ValueError("n_spans must be a whole number of at least 1")
    lo, hi = span_length_m
    if not (20.0 <= lo <= hi):
        raise ValueError("span_length_m must be (shortest, longest) with 20 m <= shortest <= longest")
    if unit not in UNITS_M:
        raise ValueError(f"unit must be one of {', '.join(UNITS_M)}, not {unit!r}")
    if not density_per_m2 > 0:
        raise ValueError("density_per_m2 must be positive")
    if arrangement not in ARRANGEMENTS:
        raise ValueError(f"phase_arrangement must be one of {', '.join(ARRANGEMENTS)}")
    if not all(w > 0 for w in weights):
        raise ValueError("conductor and shield weights and diameters must be positive")


def generate_corridor(
    seed: int = 0,
    *,
    terrain: str = "rolling",
    n_spans: int = 4,
    span_length_m: tuple[float, float] = (280.0, 420.0),
    bend_deg: float = 0.0,
    circuit: str = "single",
    bundle: int = 1,
    bundle_spacing_m: float = 0.45,
    n_shield: int = 1,
    structure_kind: str = "lattice",
    conductor_weight_n_per_m: float = 15.97,
    conductor_diameter_m: float = 0.02814,
    conductor_name: str = "795 26/7 ACSR",
    shield_name: str = "3/8 EHS",
    shield_weight_n_per_m: float = 4.00,
    horizontal_tension_n: float | dict | Sequence | None = None,
    conductor_temperature_c: float = 25.0,
    vegetation: str = "mixed",
    planted_trees: list[dict] | None = None,
    building: bool = True,
    road: bool = True,
    underbuild: bool = False,
    density_per_m2: float = 12.0,
    noise_m: float = 0.03,
    gap_fraction: float = 0.1,
    outliers: float = 2e-4,
    unit: str = "m",
    crs: str | None = "EPSG:32617",
    classified: bool = True,
    # ----- extensions
    phase_arrangement: str = "horizontal",
    heading_deg: float | None = None,
    deadend_structures: Sequence[int] | None = None,
    voltage_kv: float = 230.0,
    max_operating_temperature_c: float = 100.0,
    line_name: str = "Synthetic 230 kV line",
    owner: str = "",
    rule_set: str = "na-transmission",
    shield_diameter_m: float = 0.009144,
    corridor_width_m: float = 100.0,
    min_ground_clearance_m: float = 9.0,
    building_offset_m: float = 6.0,
    building_clearance_m: float | None = None,
    building_span: int = 0,
    building_position: float = 0.5,
    min_random_tree_clearance_m: float = 7.0,
    anchor_lonlat: tuple[float, float] | None = None,
    name: str = "synthetic",
) -> SyntheticCorridor:
    """Generate a synthetic line corridor with exact catenary wires and its truth.

    Parameters
    ----------
    seed
        Seed of all random choices; the same arguments give identical output.
    terrain
        "flat", "rolling" or "steep" (see :func:`clearaudit.synth.terrain.random_terrain`).
    n_spans
        Number of spans (structures = spans + 1).
    span_length_m
        Range (shortest, longest) of structure-to-structure horizontal span lengths. [m]
    bend_deg
        Line angle at each interior dead-end (positive turns left). [°]
    circuit
        "single" (3 phases) or "double" (6 phases on three levels).
    bundle
        Sub-conductors per phase (1–8; 2 side by side, 3+ a regular polygon with flat bottom).
    bundle_spacing_m
        Distance between neighbouring sub-conductors. [m]
    n_shield
        Shield wires: 0, 1 or 2.
    structure_kind
        "lattice" (tapered square lattice towers) or "pole" (tubular poles; a two-pole H-frame
        for the horizontal single-circuit arrangement).
    conductor_weight_n_per_m, conductor_diameter_m
        Phase conductor weight per unit length [N/m] and diameter [m].
    conductor_name, shield_name
        Conductor names written to the line file.
    shield_weight_n_per_m
        Shield wire weight per unit length. [N/m]
    horizontal_tension_n
        Horizontal tension of each (sub-)conductor at survey: ``None`` (default, a catenary
        constant of 1,750 m ± 6 % per tension section for the phases — about 20 % of rated
        strength for ACSR — and 1.15 times that constant for shield wires), one number (phase
        tension in every section), ``{"phase": H, "shield": H}``, or a list with one number or
        dict per tension section. [N]
    conductor_temperature_c
        Conductor temperature at survey (recorded; the tensions given are at this
        temperature). [°C]
    vegetation
        "none", "sparse", "mixed" or "dense".
    planted_trees
        Trees at known clearances. ``None`` gives the defaults (1.0 m, 3.0 m and 6.0 m below
        phases at their sag points, and a tall tree beside the corridor that could fall into
        the line); ``[]`` gives none. Each dict may hold ``id``, ``kind`` ("under" or
        "fall_in"), ``span`` (0-based index), ``wire`` (phase id, default: an outer or the
        middle phase), ``position`` (fraction of the span, default the wire's sag point),
        ``clearance_m`` (target 3D clearance of the tree's points to the nearest wire,
        "under" trees) [m], ``lateral_m`` (horizontal offset square to the span: from the
        wire for "under", from the centreline for "fall_in", positive left) [m], ``height_m``
        ("fall_in"; default 1.12 times the distance from its base to the nearest wire) [m],
        ``crown_radius_m`` [m] and ``shape`` ("ellipsoid" or "cone").
    building, road, underbuild
        Add a gable-roofed building beside one span, a paved road crossing one span, and a
        three-wire distribution line crossing under one span.
    density_per_m2
        Ground point density (open ground). [1/m²]
    noise_m
        Standard deviation of the measurement noise. [m]
    gap_fraction
        Fraction of every wire's span length without points (one to three gaps). [-]
    outliers
        Fraction of extra noise points (half high noise class 18, half low noise class 7). [-]
    unit
        CRS unit: "m", "ft" (international foot) or "us_ft" (US survey foot).
    crs
        A projected CRS whose unit matches ``unit``; with a non-metre unit and the default value
        the unit's default is used (EPSG:2222 for ft, EPSG:2264 for us_ft). ``None``: no CRS.
    classified
        True: ``cloud.classification`` is the truth; False: all points class 1.
    phase_arrangement
        "horizontal" or "delta" (single circuit).
    heading_deg
        Direction of the first span, counter-clockwise from local +x (east); default random. [°]
    deadend_structures
        Indices of interior dead-end structures; default the middle structure when
        ``bend_deg`` is not zero, else none.
    voltage_kv, max_operating_temperature_c, line_name, owner, rule_set
        Written to the line file ([kV], [°C]); the voltage also sets insulator lengths.
    shield_diameter_m
        Shield wire diameter. [m]
    corridor_width_m
        Width of the scanned corridor. [m]
    min_ground_clearance_m
        Structures are raised in 3 m body extensions until every phase clears the ground by
        this much at survey. [m]
    building_offset_m
        Horizontal distance from the outer phase's crossarm tip line to the building wall. [m]
    building_clearance_m
        When given, the building's eave and ridge are raised or lowered together until the
        roof's true clearance to the nearest wire is this value (default: eaves 4–5 m, ridge
        7–8 m). [m]
    building_span, building_position
        Span index and fraction of its length where the building stands (left side).
    min_random_tree_clearance_m
        Randomly placed trees closer than this to any wire are removed (only planted trees
        encroach). [m]
    anchor_lonlat
        Longitude, latitude of the first structure. [°]
    name
        Base name used in the line file's structures file reference.

    Returns
    -------
    SyntheticCorridor
        ``truth`` holds (SI units, local metres and CRS units for positions): ``generator``
        (all arguments, seed, version), ``crs``, ``origin_crs``, ``unit_m``, ``terrain``,
        ``structures``, ``tension_sections``, ``spans`` (per wire: attachment points, H, w,
        C, sag, arc length, gaps, min ground clearance), ``wire_index``, ``planted_trees``,
        ``other_trees``, ``building``, ``road``, ``underbuild``, ``classes``,
        ``point_counts``.

    Notes
    -----
    Wire curve (Irvine 1981):
    :math:`z(x) = z_A + C[\\cosh((x - x_0)/C) - \\cosh(x_0/C)]`, :math:`C = H/w`, evaluated by
    :func:`clearaudit.physics.catenary.catenary_height`. Suspension strings hang plumb: all
    spans of a tension section share one H per wire role, so the horizontal pulls balance.

    References
    ----------
    .. [1] Irvine, H. M. (1981). *Cable Structures*. MIT Press, ch. 1.
    .. [2] ASPRS (2019). *LAS Specification 1.4 R15*, Table 17 (class codes).
    """
    params = {k: v for k, v in locals().items()}
    _check_args(terrain, n_spans, span_length_m, circuit, bundle, n_shield, structure_kind,
                vegetation, unit, density_per_m2, noise_m, gap_fraction, outliers,
                phase_arrangement, (conductor_weight_n_per_m, conductor_diameter_m,
                                    shield_weight_n_per_m, shield_diameter_m))
    crs_obj, unit_m, origin = _resolve_crs(crs, unit, anchor_lonlat)
    streams = np.random.SeedSequence(int(seed)).spawn(12)
    rng = {k: np.random.default_rng(s) for k, s in zip(
        ("line", "terrain", "tension", "wires", "structures", "ground", "vegetation",
         "planted", "objects", "noise", "fields", "misc"), streams, strict=True)}
    arrangement = phase_arrangement if circuit == "single" else "horizontal"

    # ------------------------------------------------------------------ line geometry
    heading = (np.radians(heading_deg) if heading_deg is not None
               else float(rng["line"].uniform(0.0, 2.0 * np.pi)))
    lengths = rng["line"].uniform(span_length_m[0], span_length_m[1], n_spans)
    if deadend_structures is None:
        interior = [n_spans // 2] if (bend_deg != 0.0 and n_spans >= 2) else []
    else:
        interior = sorted({int(i) for i in deadend_structures})
        if any(i <= 0 or i >= n_spans for i in interior):
            raise ValueError(f"deadend_structures must be interior structure indices 1..{n_spans - 1}")
    deadends = sorted({0, n_spans, *interior})
    angles = np.empty(n_spans)
    a = heading
    for j in range(n_spans):
        if j in interior:
            a += np.radians(bend_deg)
        angles[j] = a
    dirs = np.column_stack([np.cos(angles), np.sin(angles)])
    xy = np.vstack([[0.0, 0.0], np.cumsum(dirs * lengths[:, None], axis=0)])
    ground = random_terrain(rng["terrain"], terrain, heading)
    gz = ground.height(xy[:, 0], xy[:, 1])
    structures = []
    for i in range(n_spans + 1):
        d_in = dirs[max(i - 1, 0)]
        d_out = dirs[min(i, n_spans - 1)]
        structures.append(_Structure(i, f"S{i + 1:02d}", xy[i], float(gz[i]), i in deadends,
                                     d_in, d_out))
    layout = make_layout(structure_kind, circuit, arrangement, n_shield)
    l_sus, l_de = insulator_length_m(voltage_kv)
    sections = [list(range(deadends[k], deadends[k + 1])) for k in range(len(deadends) - 1)]
    tensions = _tensions(horizontal_tension_n, len(sections), conductor_weight_n_per_m,
                         shield_weight_n_per_m, rng["tension"])
    section_of_span = np.zeros(n_spans, dtype=int)
    for k, spans in enumerate(sections):
        section_of_span[spans] = k
    offsets = _bundle_offsets(int(bundle), bundle_spacing_m)
    span_ids = [f"{structures[j].id}-{structures[j + 1].id}" for j in range(n_spans)]

    def build_wires() -> list[WireSpan]:
        out = []
        for j in range(n_spans):
            sa, sb = structures[j], structures[j + 1]
            d = dirs[j]
            n_left = _left(d)
            pair = tensions[section_of_span[j]]
            for p in layout.positions:
                a0 = sa.attachment(p, d, l_sus, l_de)
                b0 = sb.attachment(p, -d, l_sus, l_de)
                subs = offsets if p.role == "phase" else [(0.0, 0.0)]
                w = conductor_weight_n_per_m if p.role == "phase" else shield_weight_n_per_m
                for k, (dl, dz) in enumerate(subs):
                    off = np.array([n_left[0] * dl, n_left[1] * dl, dz])
                    wid = p.wire_id if len(subs) == 1 else f"{p.wire_id}/{k + 1}"
                    out.append(WireSpan(j, span_ids[j], wid, p.wire_id, p.role, a0 + off,
                                        b0 + off, pair[p.role], w))
        return out

    # Raise structures in body extensions until the phases clear the ground.
    for _ in range(10):
        wires = build_wires()
        low = np.full(n_spans, np.inf)
        for w in wires:
            if w.role != "phase":
                continue
            pts = w.xyz(np.linspace(0.0, w.span_length_m, 120))
            low[w.span_index] = min(low[w.span_index],
                                    float(np.min(pts[:, 2] - ground.height(pts[:, 0], pts[:, 1]))))
        bad = np.flatnonzero(low < min_ground_clearance_m)
        if len(bad) == 0:
            break
        for j in bad:
            structures[j].extension_m += EXTENSION_STEP_M
            structures[j + 1].extension_m += EXTENSION_STEP_M
    wires = build_wires()
    curves = CurveSet(wires)
    region_vertices = np.vstack([xy[0] - dirs[0] * 30.0, xy[1:-1], xy[-1] + dirs[-1] * 30.0]) \
        if n_spans > 1 else np.vstack([xy[0] - dirs[0] * 30.0, xy[-1] + dirs[-1] * 30.0])
    region = Region(region_vertices, corridor_width_m / 2.0)

    def on_span(j: int, frac: float, lateral: float) -> np.ndarray:
        return xy[j] + dirs[j] * lengths[j] * frac + _left(dirs[j]) * lateral

    phases = [p for p in layout.positions if p.role == "phase"]
    lowest = min(p.arm_height_m for p in phases)
    low_phases = sorted([p for p in phases if p.arm_height_m == lowest], key=lambda p: p.lateral_m)
    max_lat = max(p.lateral_m for p in phases)
    min_lat = min(p.lateral_m for p in phases)

    # ------------------------------------------------------------------ objects
    obj_rng = rng["objects"]
    bld = None
    if building:
        b_span = int(building_span)
        if not 0 <= b_span < n_spans:
            raise ValueError(f"building_span must be a span index 0..{n_spans - 1}")
        if not 0.05 <= building_position <= 0.95:
            raise ValueError("building_position must be a fraction from 0.05 to 0.95")
        length, width = 22.0, 12.0
        centre = on_span(b_span, building_position, max_lat + building_offset_m + width / 2.0)
        rot = np.radians(obj_rng.uniform(-8.0, 8.0))
        d = dirs[b_span]
        axis = np.array([d[0] * np.cos(rot) - d[1] * np.sin(rot),
                         d[0] * np.sin(rot) + d[1] * np.cos(rot)])
        tmp = Building(centre, axis, length, width, 0.0, 4.5, 7.5)
        corners = tmp.corners()
        base = float(np.min(ground.height(corners[:, 0], corners[:, 1])))
        bld = Building(centre, axis, length, width, base, float(obj_rng.uniform(4.0, 5.0)),
                       float(obj_rng.uniform(7.0, 8.0)))
        if building_clearance_m is not None:
            bld = _fit_building(bld, curves, float(building_clearance_m))
    rd = None
    if road:
        r_span = 3 % n_spans if n_spans >= 4 else n_spans - 1
        frac = 0.3 if n_spans >= 4 else 0.88
        d = dirs[r_span]
        ang = np.radians(75.0)
        axis = np.array([d[0] * np.cos(ang) - d[1] * np.sin(ang),
                         d[0] * np.sin(ang) + d[1] * np.cos(ang)])
        rd = Road(on_span(r_span, frac, 0.0), axis, corridor_width_m / 2.0 / np.sin(ang) + 10.0, 7.3)
    ub = None
    if underbuild:
        ub = _underbuild(n_spans, on_span, dirs, ground, curves, obj_rng, noise_m)

    # ------------------------------------------------------------------ planted trees
    if planted_trees is None:
        planted_specs = _default_planted(n_spans, low_phases, phases)
    else:
        planted_specs = [dict(s) for s in planted_trees]
    p_rng = rng["planted"]
    planted = []
    for k, spec in enumerate(planted_specs):
        planted.append(_plant(k, spec, wires, curves, ground, dirs, lengths, on_span, p_rng,
                              density_per_m2, noise_m, phases, max_lat, min_lat))

    # ------------------------------------------------------------------ wire points
    w_rng = rng["wires"]
    wire_pts, wire_lab, wire_gaps, wire_spacing = [], [], [], []
    for i, w in enumerate(wires):
        keep_clear = []
        for t in planted:
            if t["span_index"] != w.span_index:
                continue
            x_t = float((t["xy"] - w.a[:2]) @ w.direction)
            keep_clear.append((x_t - t["crown_radius_m"] - 10.0, x_t + t["crown_radius_m"] + 10.0))
        spacing = float(w_rng.uniform(0.3, 0.8) if w.role == "phase" else w_rng.uniform(0.5, 1.0))
        pts, gaps = sample_wire(w_rng, w, spacing, noise_m, gap_fraction, keep_clear)
        wire_pts.append(pts)
        wire_lab.append(np.full(len(pts), i))
        wire_gaps.append(gaps)
        wire_spacing.append(spacing)

    # ------------------------------------------------------------------ structure points
    s_rng = rng["structures"]
    st_pts, st_lab, ins_pts = [], [], []
    for s in structures:
        p0, p1, rad = _structure_members(layout, s, ground)
        pts = segment_points(s_rng, p0, p1, rad, 0.3 if structure_kind == "lattice" else 0.15,
                             noise_m)
        st_pts.append(pts)
        st_lab.append(np.full(len(pts), s.index))
        a0, a1 = [], []
        for p in phases:
            t = s.tip(p)
            if s.deadend:
                for j, toward in ((s.index, dirs[min(s.index, n_spans - 1)]),
                                  (s.index - 1, -dirs[max(s.index - 1, 0)])):
                    if 0 <= j < n_spans:
                        a0.append(t)
                        a1.append(t + np.array([toward[0], toward[1], 0.0]) * l_de)
            else:
                a0.append(t)
                a1.append(t - np.array([0.0, 0.0, l_sus]))
        ins_pts.append(segment_points(s_rng, np.array(a0), np.array(a1),
                                      np.full(len(a0), 0.13), 0.12, noise_m))

    # ------------------------------------------------------------------ vegetation
    v_rng = rng["vegetation"]
    trees_per_ha, shrubs_per_ha, grass_cover = _VEGETATION[vegetation]
    exclusions = _Exclusions(xy, bld, rd, ub, planted)
    random_set, random_unit = None, None
    if trees_per_ha > 0:
        cand = region.random_points(v_rng, trees_per_ha / 1e4)
        _, _, off, _ = region.locate(cand)
        inner = np.abs(off) < ROW_HALF_WIDTH_M
        keep = ~inner | (v_rng.random(len(cand)) < 0.03)
        if vegetation in ("mixed", "dense"):
            field_ = _smooth_field(v_rng, cand)
            keep &= field_ > np.quantile(field_, 0.5 if vegetation == "mixed" else 0.15)
        keep &= exclusions.clear(cand, 3.0)
        cand = cand[keep]
        inner = np.abs(region.locate(cand)[2]) < ROW_HALF_WIDTH_M
        edge = scene.random_trees(v_rng, cand, ground, (7.0, 24.0),
                                  0.6 if vegetation == "dense" else 0.35)
        edge.height_m[inner] = v_rng.uniform(3.0, 7.0, int(inner.sum()))
        edge.crown_radius_m[inner] = 0.25 * edge.height_m[inner] + 0.4
        edge.crown_length_m[inner] = 0.6 * edge.height_m[inner]
        random_set = edge
        random_unit = edge.draw_unit_samples(v_rng, density_per_m2)
    tree_pts, tree_lab, other_records = _random_tree_points(
        random_set, random_unit, v_rng, noise_m, curves, min_random_tree_clearance_m,
        len(planted), wires)
    shrub_pts = np.zeros((0, 3))
    if shrubs_per_ha > 0:
        cand = region.random_points(v_rng, shrubs_per_ha / 1e4)
        cand = cand[exclusions.clear(cand, 1.5)]
        h = v_rng.uniform(0.6, 2.5, len(cand))
        shrubs = TreeSet(cand[:, 0].copy(), cand[:, 1].copy(), ground.height(cand[:, 0], cand[:, 1]),
                         h, v_rng.uniform(0.5, 1.8, len(cand)), h, np.zeros(len(cand), bool))
        su = shrubs.draw_unit_samples(v_rng, density_per_m2, trunk=False)
        shrub_pts = shrubs.points(su)
        shrub_pts += v_rng.normal(0.0, noise_m, shrub_pts.shape)
    grass_pts = np.zeros((0, 3))
    if grass_cover > 0:
        cand = region.random_points(v_rng, 0.35 * density_per_m2)
        f = _smooth_field(v_rng, cand)
        cand = cand[(f > np.quantile(f, 1.0 - grass_cover)) & exclusions.clear(cand, 0.5, trees=False)]
        grass_pts = np.column_stack([cand, ground.height(cand[:, 0], cand[:, 1])
                                     + v_rng.uniform(0.05, 0.45, len(cand))])

    # ------------------------------------------------------------------ ground, road, building
    g_rng = rng["ground"]
    gxy = region.random_points(g_rng, density_per_m2)
    all_crowns = _crowns(planted, other_records)
    shadow = np.zeros(len(gxy), dtype=bool)
    if len(all_crowns):
        d, idx = cKDTree(all_crowns[:, :2]).query(gxy)
        shadow = d < all_crowns[idx, 2]
    keep = ~shadow | (g_rng.random(len(gxy)) < 0.45)
    if bld is not None:
        keep &= ~bld.inside(gxy)
    gxy = gxy[keep]
    shadow = shadow[keep]
    ground_pts = np.column_stack([gxy, ground.height(gxy[:, 0], gxy[:, 1])
                                  + g_rng.normal(0.0, noise_m, len(gxy))])
    ground_cls = np.full(len(gxy), C.GROUND, dtype=np.uint8)
    if rd is not None:
        ground_cls[rd.inside(gxy)] = C.ROAD
    bld_pts = bld.points(g_rng, density_per_m2, ground, noise_m) if bld is not None \
        else np.zeros((0, 3))

    # ------------------------------------------------------------------ assemble
    parts: list[tuple[np.ndarray, Any, dict[str, Any]]] = []
    wire_pts_all = np.vstack(wire_pts)
    wire_lab_all = np.concatenate(wire_lab)
    wire_cls = np.where(np.array([w.role for w in wires])[wire_lab_all] == "shield",
                        C.WIRE_GUARD, C.WIRE_CONDUCTOR).astype(np.uint8)
    parts.append((wire_pts_all, wire_cls, {"wire": wire_lab_all}))
    parts.append((np.vstack(st_pts), C.TRANSMISSION_TOWER,
                  {"structure": np.concatenate(st_lab)}))
    parts.append((np.vstack(ins_pts), C.WIRE_CONNECTOR, {}))
    for t in planted:
        parts.append((t["points"], None, {"tree": np.full(len(t["points"]), t["index"])}))
    parts.append((tree_pts, None, {"tree": tree_lab}))
    parts.append((shrub_pts, None, {}))
    parts.append((grass_pts, C.LOW_VEGETATION, {}))
    parts.append((ground_pts, ground_cls, {"shadow": shadow}))
    parts.append((bld_pts, C.BUILDING, {}))
    n_wires = len(wires)
    if ub is not None:
        parts.append((ub["wire_points"], C.WIRE_CONDUCTOR,
                      {"wire": ub["wire_labels"] + n_wires}))
        parts.append((ub["pole_points"], C.TRANSMISSION_TOWER,
                      {"structure": ub["pole_labels"] + len(structures)}))
    n_before = sum(len(p[0]) for p in parts)
    n_noise = int(rng["noise"].binomial(n_before, outliers)) if outliers > 0 else 0
    high, low_n = scene.noise_points(rng["noise"], gxy, ground, (n_noise + 1) // 2, n_noise // 2)
    parts.append((high, C.HIGH_NOISE, {}))
    parts.append((low_n, C.LOW_NOISE, {}))

    xyz = np.vstack([p[0] for p in parts])
    n = len(xyz)
    cls = np.empty(n, dtype=np.uint8)
    labels = {k: np.full(n, -1, dtype=np.int32) for k in ("wire", "tree", "structure")}
    shadow_all = np.zeros(n, dtype=bool)
    start = 0
    for pts, c, lab in parts:
        sl = slice(start, start + len(pts))
        if c is None:
            hag = pts[:, 2] - ground.height(pts[:, 0], pts[:, 1])
            cls[sl] = scene.vegetation_class(hag)
        else:
            cls[sl] = c
        for k, v in lab.items():
            if k == "shadow":
                shadow_all[sl] = v
            else:
                labels[k][sl] = v
        start += len(pts)

    fields = _fields(rng["fields"], xyz, cls, shadow_all, region, seed)
    order = np.argsort(fields["gps_time"], kind="stable")
    xyz = xyz[order]
    cls = cls[order]
    fields = {k: v[order] for k, v in fields.items()}
    labels = {k: v[order] for k, v in labels.items()}

    unit_vec = np.array([unit_m, unit_m, unit_m])
    cloud = Cloud(xyz=xyz, origin=origin, crs=crs_obj, horizontal_unit_m=unit_m,
                  vertical_unit_m=unit_m,
                  classification=cls.copy() if classified else np.ones(n, dtype=np.uint8),
                  fields=fields)

    def to_crs(p):
        p = np.asarray(p, dtype=float)
        return (p / unit_vec[: p.shape[-1]] + origin[: p.shape[-1]]).tolist()

    # ------------------------------------------------------------------ truth
    truth = _truth(params, seed, crs_obj, unit, unit_m, origin, ground, structures, layout,
                   l_sus, l_de, sections, tensions, span_ids, lengths, dirs, wires,
                   wire_lab_all, wire_gaps, wire_spacing, planted, other_records, bld, rd, ub,
                   curves, cls, to_crs, conductor_temperature_c)
    line_config = line_file_config(
        line_name=line_name, voltage_kv=voltage_kv,
        max_operating_temperature_c=max_operating_temperature_c, rule_set=rule_set,
        owner=owner, conductor_temperature_c=conductor_temperature_c,
        conductor_name=conductor_name, bundle=bundle, bundle_spacing_m=bundle_spacing_m,
        conductor_weight_n_per_m=conductor_weight_n_per_m,
        conductor_diameter_m=conductor_diameter_m, shield_name=shield_name,
        shield_weight_n_per_m=shield_weight_n_per_m, shield_diameter_m=shield_diameter_m,
        structures_file=f"{name}.structures.csv")
    rows = [{"id": s.id, "x": to_crs(s.xy)[0], "y": to_crs(s.xy)[1],
             "type": "deadend" if s.deadend else "suspension"} for s in structures]
    return SyntheticCorridor(cloud=cloud, truth_classification=cls, truth=truth,
                             line_config=line_config, structures=rows, terrain=ground,
                             wires=wires, truth_labels=labels)


# ================================================================================ helpers
def line_file_config(*, line_name: str, voltage_kv: float, max_operating_temperature_c: float,
                     rule_set: str, owner: str | None, conductor_temperature_c: float,
                     conductor_name: str, bundle: int, bundle_spacing_m: float,
                     conductor_weight_n_per_m: float, conductor_diameter_m: float,
                     shield_name: str, shield_weight_n_per_m: float, shield_diameter_m: float,
                     structures_file: str) -> dict[str, Any]:
    """The line file of a generated line (see docs/line-file.md); units as in the names."""
    return {
        "line": {"name": line_name, "voltage_kv": float(voltage_kv),
                 "max_operating_temperature_c": float(max_operating_temperature_c),
                 "rule_set": rule_set, **({"owner": owner} if owner else {})},
        "survey": {"conductor_temperature_c": float(conductor_temperature_c),
                   "conductor_temperature_uncertainty_c": 2.0},
        "conductors": {
            "phase": {"name": conductor_name, "bundle": int(bundle),
                      "bundle_spacing_m": float(bundle_spacing_m),
                      "weight_n_per_m": float(conductor_weight_n_per_m),
                      "diameter_m": float(conductor_diameter_m)},
            "shield": {"name": shield_name, "weight_n_per_m": float(shield_weight_n_per_m),
                       "diameter_m": float(shield_diameter_m)},
        },
        "structures": {"file": structures_file},
    }


def _structure_members(layout: Layout, s: _Structure, ground: Terrain):
    """Members of structure ``s`` in local coordinates (p0, p1, radius)."""
    e, t, k = s.along, s.lateral, s.stretch
    if layout.kind == "lattice":
        w0 = max(3.0, 0.11 * (layout.top_m + s.extension_m))
        feet = np.array([[1, 1], [1, -1], [-1, -1], [-1, 1]], dtype=float) * w0
        fxy = s.xy + feet[:, :1] * e + feet[:, 1:] * t
        foot_z = ground.height(fxy[:, 0], fxy[:, 1]) - s.ground_z
        p0, p1 = lattice_members(layout, s.extension_m, foot_z)
        rad = np.full(len(p0), 0.08)
    else:
        p0, p1, rad = pole_members(layout, s.extension_m)

    def world(p):
        xy_ = s.xy + p[:, :1] * e + (p[:, 1:2] * k) * t
        return np.column_stack([xy_, s.ground_z + p[:, 2]])

    return world(p0), world(p1), rad


def _fit_building(bld: Building, curves: CurveSet, target: float) -> Building:
    """Shift the roof up or down until its true clearance to the wires is ``target``."""
    if not target > 0:
        raise ValueError("building_clearance_m must be positive")
    shift, prev = 0.0, None
    for _ in range(30):
        b = Building(bld.centre, bld.axis, bld.length_m, bld.width_m, bld.base_z_m,
                     bld.eave_height_m + shift, bld.ridge_height_m + shift)
        err = float(curves.nearest(b.surface_samples(0.1))[0].min()) - target
        if abs(err) < 1e-5:
            break
        slope = 1.0 if prev is None or prev[0] == shift else (prev[1] - err) / (shift - prev[0])
        slope = min(max(abs(slope), 0.2), 2.0)
        prev = (shift, err)
        shift += err / slope
    if b.eave_height_m < 2.5 or b.ridge_height_m > 30.0:
        raise ValueError(f"building_clearance_m={target} needs eaves {b.eave_height_m:.1f} m and "
                         f"a ridge {b.ridge_height_m:.1f} m high; choose another clearance or "
                         "building_offset_m")
    return b


def _default_planted(n_spans, low_phases, phases) -> list[dict]:
    left, right = low_phases[-1], low_phases[0]
    middle = sorted(phases, key=lambda p: abs(p.lateral_m))[0]
    specs = [
        {"id": "PT1", "kind": "under", "span": 1 % n_spans, "wire": left.wire_id,
         "clearance_m": 1.0},
        {"id": "PT2", "kind": "under", "span": 2 % n_spans, "wire": right.wire_id,
         "clearance_m": 3.0},
        {"id": "PT3", "kind": "under", "span": 0, "wire": middle.wire_id, "clearance_m": 6.0},
        {"id": "PT4", "kind": "fall_in", "span": 1 % n_spans, "position": 0.3, "side": -1},
    ]
    if n_spans < 3:
        specs[2]["position"] = 0.35
    if n_spans < 2:
        specs[0]["position"] = 0.62
    return specs


def _plant(k, spec, wires, curves, ground, dirs, lengths, on_span, rng, density, noise_m,
           phases, max_lat, min_lat) -> dict:
    """Place one planted tree; 'under' trees are sized to an exact clearance."""
    allowed = {"id", "kind", "span", "wire", "position", "clearance_m", "lateral_m", "height_m",
               "crown_radius_m", "shape", "side"}
    unknown = set(spec) - allowed
    if unknown:
        raise ValueError(f"planted tree keys {sorted(unknown)} are not known "
                         f"(allowed: {', '.join(sorted(allowed))})")
    kind = spec.get("kind", "under")
    if kind not in ("under", "fall_in"):
        raise ValueError("planted tree kind must be 'under' or 'fall_in'")
    n_spans = len(lengths)
    j = int(spec.get("span", 0))
    if not 0 <= j < n_spans:
        raise ValueError(f"planted tree span {j} is not a span index 0..{n_spans - 1}")
    tid = str(spec.get("id", f"PT{k + 1}"))
    shape = spec.get("shape", "ellipsoid" if kind == "under" else "cone")
    if shape not in ("ellipsoid", "cone"):
        raise ValueError("planted tree shape must be 'ellipsoid' or 'cone'")
    radius = float(spec.get("crown_radius_m", 2.5 if kind == "under" else 3.0))
    span_wires = [w for w in wires if w.span_index == j and w.role == "phase"]
    wire_name = spec.get("wire") or sorted(phases, key=lambda p: abs(p.lateral_m))[0].wire_id
    chosen = [w for w in span_wires if w.phase_id == wire_name or w.wire_id == wire_name]
    if not chosen:
        raise ValueError(f"planted tree {tid}: no phase wire {wire_name!r} in span {j}")
    ref = chosen[0]
    if spec.get("position") is None:
        x_ref = float(cat.sag_location(ref.span_length_m, ref.height_difference_m,
                                       ref.catenary_constant_m))
        x_ref = min(max(x_ref, 0.1 * ref.span_length_m), 0.9 * ref.span_length_m)
    else:
        frac = float(spec["position"])
        if not 0.0 < frac < 1.0:
            raise ValueError(f"planted tree {tid}: position must be a fraction between 0 and 1")
        x_ref = frac * ref.span_length_m
    centre = np.mean([w.xyz(np.array([x_ref]))[0] for w in chosen], axis=0)
    n_left = _left(dirs[j])
    if kind == "under":
        base = centre[:2] + n_left * float(spec.get("lateral_m", 0.0))
    else:
        side = float(np.sign(spec.get("side", -1)) or -1)
        default_lat = (max_lat if side > 0 else min_lat) + side * 12.0
        frac = x_ref / ref.span_length_m
        base = on_span(j, frac, float(spec.get("lateral_m", default_lat)))
    gz = float(ground.height(base[0], base[1]))
    one = TreeSet(np.array([base[0]]), np.array([base[1]]), np.array([gz]), np.array([10.0]),
                  np.array([radius]), np.array([5.0]), np.array([shape == "cone"]))
    unit = one.draw_unit_samples(rng, density)
    noise = rng.normal(0.0, noise_m, (len(unit["tree"]), 3))
    base_dist = float(curves.nearest(np.array([[base[0], base[1], gz]]))[0][0])

    def grow(height):
        one.height_m[0] = height
        one.crown_length_m[0] = float(np.clip(0.55 * height, 2.0, 9.0))
        pts = one.points(unit) + noise
        d, wi, q = curves.nearest(pts)
        return pts, d, wi, q

    if kind == "under":
        if "clearance_m" not in spec:
            raise ValueError(f"planted tree {tid}: 'under' trees need clearance_m")
        target = float(spec["clearance_m"])
        if not target > 0:
            raise ValueError(f"planted tree {tid}: clearance_m must be positive")
        h = float(centre[2] - gz - target)
        if h < 2.5:
            raise ValueError(f"planted tree {tid}: the wire is only {centre[2] - gz:.1f} m above "
                             f"ground there, too low for a tree {target} m below it")
        prev = None
        for _ in range(30):
            pts, d, wi, q = grow(h)
            err = float(d.min()) - target
            if abs(err) < 1e-5:
                break
            slope = 1.0 if prev is None or prev[0] == h else (prev[1] - err) / (h - prev[0])
            slope = min(max(abs(slope), 0.2), 2.0)
            prev = (h, err)
            h += err / slope
    else:
        h = float(spec.get("height_m", 1.12 * base_dist))
        pts, d, wi, q = grow(h)
        target = None
    i = int(np.argmin(d))
    nearest_wire = wires[int(wi[i])]
    return {
        "id": tid, "kind": kind, "index": k, "span_index": j, "xy": base, "ground_z_m": gz,
        "height_m": float(h), "crown_radius_m": radius,
        "crown_length_m": float(one.crown_length_m[0]), "shape": shape,
        "target_clearance_m": target, "clearance_m": float(d[i]),
        "nearest_span_id": nearest_wire.span_id, "nearest_wire_id": nearest_wire.wire_id,
        "closest_tree_point": pts[i], "closest_wire_point": q[i],
        "base_to_wire_distance_m": base_dist, "points": pts,
    }


def _random_tree_points(trees, unit, rng, noise_m, curves, min_clear, index0, wires):
    """Points of the random trees, dropping those closer than ``min_clear`` to a wire."""
    if trees is None or len(trees) == 0:
        return np.zeros((0, 3)), np.zeros(0, dtype=int), []
    pts = trees.points(unit) + rng.normal(0.0, noise_m, (len(unit["tree"]), 3))
    d, wi, _ = curves.nearest(pts)
    per_tree = np.full(len(trees), np.inf)
    np.minimum.at(per_tree, unit["tree"], d)
    keep_tree = per_tree >= min_clear
    new_index = np.full(len(trees), -1)
    new_index[keep_tree] = index0 + np.arange(int(keep_tree.sum()))
    keep_pt = keep_tree[unit["tree"]]
    labels = new_index[unit["tree"][keep_pt]]
    # Nearest wire per kept tree (arg-min over its points).
    order = np.lexsort((d, unit["tree"]))
    first = np.ones(len(order), dtype=bool)
    first[1:] = unit["tree"][order][1:] != unit["tree"][order][:-1]
    arg = order[first]
    tree_of_arg = unit["tree"][arg]
    base_xyz = np.column_stack([trees.x, trees.y, trees.ground_z])
    base_d = curves.nearest(base_xyz)[0]
    records = []
    for t, a in zip(tree_of_arg, arg, strict=True):
        if not keep_tree[t]:
            continue
        w = wires[int(wi[a])]
        records.append({
            "id": f"T{int(new_index[t]) - index0 + 1:04d}", "kind": "random",
            "index": int(new_index[t]), "xy": np.array([trees.x[t], trees.y[t]]),
            "ground_z_m": float(trees.ground_z[t]), "height_m": float(trees.height_m[t]),
            "crown_radius_m": float(trees.crown_radius_m[t]),
            "crown_length_m": float(trees.crown_length_m[t]),
            "shape": "cone" if trees.cone[t] else "ellipsoid", "target_clearance_m": None,
            "clearance_m": float(d[a]), "nearest_span_id": w.span_id,
            "nearest_wire_id": w.wire_id, "closest_tree_point": pts[a],
            "base_to_wire_distance_m": float(base_d[t]), "points": None,
        })
    return pts[keep_pt], labels, records


def _crowns(planted, others) -> np.ndarray:
    rows = [[t["xy"][0], t["xy"][1], t["crown_radius_m"]] for t in planted + others]
    return np.array(rows) if rows else np.zeros((0, 3))


class _Exclusions:
    """Places where random vegetation may not stand."""

    def __init__(self, structure_xy, bld, rd, ub, planted):
        self.structure_xy = structure_xy
        self.bld, self.rd, self.ub = bld, rd, ub
        self.planted = planted

    def clear(self, xy: np.ndarray, margin: float, trees: bool = True) -> np.ndarray:
        ok = np.ones(len(xy), dtype=bool)
        if len(xy) == 0:
            return ok
        d, _ = cKDTree(self.structure_xy).query(xy)
        ok &= d > (12.0 if trees else 6.0)
        if self.bld is not None:
            ok &= ~self.bld.inside(xy, margin + 2.0)
        if self.rd is not None:
            ok &= ~self.rd.inside(xy, margin + 1.5)
        if self.ub is not None:
            r = xy - self.ub["centre"]
            axis = self.ub["axis"]
            ok &= ~((np.abs(r @ np.array([-axis[1], axis[0]])) < margin + 4.0)
                    & (np.abs(r @ axis) < self.ub["half_length_m"] + 3.0))
        for t in self.planted:
            ok &= np.hypot(*(xy - t["xy"]).T) > t["crown_radius_m"] + margin + 1.0
        return ok


def _smooth_field(rng: np.random.Generator, xy: np.ndarray) -> np.ndarray:
    """A smooth random field (sum of cosines, wavelengths 60–160 m) for patchiness."""
    f = np.zeros(len(xy))
    for _ in range(5):
        wl = rng.uniform(60.0, 160.0)
        a = rng.uniform(0.0, 2.0 * np.pi)
        f += np.cos(2.0 * np.pi / wl * (xy[:, 0] * np.cos(a) + xy[:, 1] * np.sin(a))
                    + rng.uniform(0.0, 2.0 * np.pi))
    return f


def _underbuild(n_spans, on_span, dirs, ground, curves, rng, noise_m) -> dict:
    """A three-wire distribution line crossing under one span on single wood poles."""
    j = 2 % n_spans if n_spans >= 3 else 0
    frac = 0.22 if n_spans >= 3 else 0.12
    centre = on_span(j, frac, 0.0)
    d = dirs[j]
    ang = np.radians(85.0)
    axis = np.array([d[0] * np.cos(ang) - d[1] * np.sin(ang), d[0] * np.sin(ang) + d[1] * np.cos(ang)])
    half = 42.0
    poles = np.array([centre - axis * half, centre + axis * half])
    pole_gz = ground.height(poles[:, 0], poles[:, 1])
    # Height of the main line above ground along the crossing (to keep >= 4 m separation).
    near = np.abs((curves.points[:, :2] - centre) @ np.array([-axis[1], axis[0]])) < 1.0
    near &= np.abs((curves.points[:, :2] - centre) @ axis) < half
    cp = curves.points[near]
    line_hag = float(np.min(cp[:, 2] - ground.height(cp[:, 0], cp[:, 1]))) if len(cp) else 20.0
    top = float(min(12.4, line_hag - 4.0))
    if top < 6.0:
        top = 6.0
    arm = top - 1.1
    n_ax = np.array([-axis[1], axis[0]])
    layout = [(-1.1, arm), (0.0, top), (1.1, arm)]
    wires = []
    for k, (lat, hz) in enumerate(layout):
        a = np.array([*(poles[0] + n_ax * lat), pole_gz[0] + hz])
        b = np.array([*(poles[1] + n_ax * lat), pole_gz[1] + hz])
        wires.append(WireSpan(-1, "underbuild", f"UB-{k + 1}", f"UB-{k + 1}", "other", a, b,
                              UNDERBUILD_WEIGHT_N_PER_M * UNDERBUILD_CONSTANT_M,
                              UNDERBUILD_WEIGHT_N_PER_M))
    w_pts, w_lab = [], []
    for k, w in enumerate(wires):
        pts, _ = sample_wire(rng, w, 0.5, noise_m, 0.0, [])
        w_pts.append(pts)
        w_lab.append(np.full(len(pts), k))
    p0, p1, rad = [], [], []
    for i in range(2):
        p0 += [[*poles[i], pole_gz[i]], [*(poles[i] - n_ax * 1.3), pole_gz[i] + arm]]
        p1 += [[*poles[i], pole_gz[i] + top + 0.3], [*(poles[i] + n_ax * 1.3), pole_gz[i] + arm]]
        rad += [0.14, 0.05]
    pole_pts = segment_points(rng, np.array(p0), np.array(p1), np.array(rad), 0.12, noise_m)
    pole_lab = np.repeat([0, 0, 1, 1], np.maximum(1, np.round(
        np.linalg.norm(np.array(p1) - np.array(p0), axis=1) / 0.12)).astype(int))
    # Closest approach between the under-build wires and the main line (true curves).
    dense = np.vstack([w.xyz(np.arange(0.0, w.span_length_m, 0.05)) for w in wires])
    d, wi, q = curves.nearest(dense)
    i = int(np.argmin(d))
    return {"centre": centre, "axis": axis, "half_length_m": half, "span_index": j,
            "poles": poles, "pole_ground_z": pole_gz, "pole_height_m": top + 0.3, "wires": wires,
            "wire_points": np.vstack(w_pts), "wire_labels": np.concatenate(w_lab),
            "pole_points": pole_pts, "pole_labels": pole_lab,
            "min_clearance_m": float(d[i]), "nearest_main_wire": curves.wires[int(wi[i])],
            "closest_underbuild_point": dense[i], "closest_main_point": q[i]}


def _fields(rng, xyz, cls, shadow, region, seed) -> dict[str, np.ndarray]:
    """Intensity, return numbers and GPS time (one flight line along the corridor)."""
    _, chain, off, _ = region.locate(xyz[:, :2])
    return scan_fields(rng, cls, shadow, chain, off, region.half_width_m, seed)


def scan_fields(rng: np.random.Generator, cls: np.ndarray, shadow: np.ndarray,
                chain: np.ndarray, offset: np.ndarray, half_width_m: float, seed: int,
                first_scan: float | None = None) -> dict[str, np.ndarray]:
    """Intensity, return numbers and GPS time of generated points.

    Parameters
    ----------
    rng
        Random generator (draws: intensity, then return counts, then return numbers).
    cls
        ASPRS class per point.
    shadow
        Points that are the last return under a crown.
    chain, offset
        Position along the flight line and across it (left positive). [m]
    half_width_m
        Half-width swept by the scanner. [m]
    seed
        Scene seed (sets the start time).
    first_scan
        Scan line that starts the clock; ``None``: the first scan line of these points (one
        corridor), 0: the start of the line (tiles of one long line share one clock).

    Notes
    -----
    One flight line: 60 m/s, 150 scan lines per second (0.4 m apart), each sweeping the
    corridor from one side to the other, alternating (zig-zag scanner). Sorting by this time
    puts points in scan order, as in a real delivery.
    """
    n = len(cls)
    mean = np.full(n, 900.0)
    spread = np.full(n, 250.0)
    for codes, m, s in (((C.GROUND,), 1100.0, 250.0), ((C.ROAD,), 450.0, 80.0),
                        ((C.BUILDING,), 1400.0, 200.0), (C.VEGETATION_CLASSES, 650.0, 250.0),
                        (C.WIRE_CLASSES, 350.0, 100.0), ((C.TRANSMISSION_TOWER,), 1000.0, 250.0),
                        ((C.WIRE_CONNECTOR,), 1200.0, 200.0), (C.NOISE_CLASSES, 300.0, 250.0)):
        sel = np.isin(cls, codes)
        mean[sel], spread[sel] = m, s
    intensity = np.clip(rng.normal(mean, spread), 20, 65535).astype(np.uint16)
    n_ret = np.ones(n, dtype=np.uint8)
    ret = np.ones(n, dtype=np.uint8)
    veg = np.isin(cls, C.VEGETATION_CLASSES) & (cls != C.LOW_VEGETATION)
    k = rng.integers(2, 5, n).astype(np.uint8)
    n_ret[veg] = k[veg]
    ret[veg] = (1 + rng.integers(0, 8, n) % np.maximum(k - 1, 1)).astype(np.uint8)[veg]
    n_ret[shadow] = k[shadow]
    ret[shadow] = k[shadow]
    n_ret[np.isin(cls, C.WIRE_CLASSES)] = 2
    scan = np.floor(chain / 0.4)
    frac = np.clip((offset + half_width_m) / (2.0 * half_width_m), 0.0, 1.0)
    frac = np.where(scan % 2 == 0, frac, 1.0 - frac)
    t0 = 4.0e8 + (int(seed) % 10000) * 1000.0
    start = scan.min() if first_scan is None else first_scan
    gps = t0 + (scan - start + 0.98 * frac) / 150.0
    return {"intensity": intensity, "return_number": ret, "number_of_returns": n_ret,
            "gps_time": gps}


def _jsonify(v):
    if isinstance(v, dict):
        return {str(k): _jsonify(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_jsonify(x) for x in v]
    if isinstance(v, np.ndarray):
        return _jsonify(v.tolist())
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, (np.floating,)):
        return float(v)
    if isinstance(v, (np.bool_,)):
        return bool(v)
    return v


def _truth(params, seed, crs_obj, unit, unit_m, origin, ground, structures, layout, l_sus, l_de,
           sections, tensions, span_ids, lengths, dirs, wires, wire_lab, wire_gaps,
           wire_spacing, planted, others, bld, rd, ub, curves, cls, to_crs,
           conductor_temperature_c) -> dict:
    n_spans = len(lengths)
    gen = {k: v for k, v in params.items()}
    gen["seed"] = int(seed)
    gen["clearaudit_version"] = __version__
    st_records = []
    for s in structures:
        arms = []
        for p in layout.positions:
            t = s.tip(p)
            ins = ("none" if p.role != "phase" else "deadend" if s.deadend else "suspension")
            arms.append({"wire_id": p.wire_id, "role": p.role, "circuit": p.circuit,
                         "lateral_m": p.lateral_m, "lateral_stretched_m": p.lateral_m * s.stretch,
                         "arm_height_m": p.arm_height_m + s.extension_m,
                         "tip_local_m": t, "tip_crs": to_crs(t), "insulator": ins,
                         "insulator_length_m": {"none": 0.0, "deadend": l_de,
                                                "suspension": l_sus}[ins]})
        st_records.append({
            "id": s.id, "index": s.index, "type": "deadend" if s.deadend else "suspension",
            "kind": layout.kind, "arrangement": layout.arrangement, "circuit": layout.circuit,
            "xy_local_m": s.xy, "xy_crs": to_crs(s.xy), "ground_z_m": s.ground_z,
            "ground_z_crs": s.ground_z / unit_m, "height_m": layout.top_m + s.extension_m,
            "extension_m": s.extension_m, "line_angle_deg": s.line_angle_deg,
            "along_direction": s.along, "lateral_direction": s.lateral, "crossarms": arms,
        })
    sec_records = []
    for k, spans in enumerate(sections):
        L = lengths[spans]
        ruling = float(np.sqrt(np.sum(L**3) / np.sum(L)))
        w_ph = next((w.unit_weight_n_per_m for w in wires if w.role == "phase"), None)
        w_sh = next((w.unit_weight_n_per_m for w in wires if w.role == "shield"), None)
        # Ruling span of the conductors themselves (horizontal distance between attachment
        # points, i.e. without dead-end strain strings), per role: what the change of state uses.
        by_role = {}
        for role in ("phase", "shield"):
            lr = np.array([np.mean([w.span_length_m for w in wires
                                    if w.role == role and w.span_index == j] or [np.nan])
                           for j in spans])
            if np.all(np.isfinite(lr)):
                by_role[role] = float(np.sqrt(np.sum(lr**3) / np.sum(lr)))
        sec_records.append({
            "id": f"TS{k + 1}", "span_ids": [span_ids[j] for j in spans],
            "structures": [structures[spans[0]].id, structures[spans[-1] + 1].id],
            "ruling_span_m": ruling, "ruling_span_by_role_m": by_role,
            "horizontal_tension_n": dict(tensions[k]),
            "catenary_constant_m": {"phase": tensions[k]["phase"] / w_ph,
                                    **({"shield": tensions[k]["shield"] / w_sh} if w_sh else {})},
        })
    counts = np.bincount(wire_lab, minlength=len(wires))
    span_records = []
    for j in range(n_spans):
        ws = []
        for i, w in enumerate(wires):
            if w.span_index != j:
                continue
            pts = w.xyz(np.arange(0.0, w.span_length_m, 0.25))
            hag = pts[:, 2] - ground.height(pts[:, 0], pts[:, 1])
            m = int(np.argmin(hag))
            rec = {"wire_id": w.wire_id, "phase_id": w.phase_id, "role": w.role,
                   "attachment_a_local_m": w.a, "attachment_a_crs": to_crs(w.a),
                   "attachment_b_local_m": w.b, "attachment_b_crs": to_crs(w.b),
                   "horizontal_tension_n": w.horizontal_tension_n,
                   "unit_weight_n_per_m": w.unit_weight_n_per_m,
                   **w.summary(), "conductor_temperature_c": conductor_temperature_c,
                   "min_ground_clearance_m": float(hag[m]),
                   "min_ground_clearance_point_local_m": pts[m],
                   "n_points": int(counts[i]), "point_spacing_m": wire_spacing[i],
                   "gaps_m": [list(g) for g in wire_gaps[i]], "wire_index": i}
            ws.append(rec)
        k = next(i for i, s in enumerate(sections) if j in s)
        span_records.append({
            "id": span_ids[j], "index": j, "from_structure": structures[j].id,
            "to_structure": structures[j + 1].id, "horizontal_length_m": float(lengths[j]),
            "direction": dirs[j], "tension_section": f"TS{k + 1}", "wires": ws})

    def tree_record(t):
        rec = {k: v for k, v in t.items() if k not in ("points", "xy", "closest_tree_point",
                                                         "closest_wire_point", "span_index")}
        rec["xy_local_m"] = t["xy"]
        rec["xy_crs"] = to_crs(t["xy"])
        rec["closest_tree_point_local_m"] = t["closest_tree_point"]
        rec["closest_tree_point_crs"] = to_crs(t["closest_tree_point"])
        if t.get("closest_wire_point") is not None:
            rec["closest_wire_point_local_m"] = t["closest_wire_point"]
        rec["can_fall_into_line"] = bool(t["height_m"] > t["base_to_wire_distance_m"])
        if "span_index" in t:
            rec["span_id"] = span_ids[t["span_index"]]
        if t.get("points") is not None:
            rec["n_points"] = len(t["points"])
        return rec

    bld_rec = None
    if bld is not None:
        bpts = bld.surface_samples(0.1)
        d, wi, q = curves.nearest(bpts)
        i = int(np.argmin(d))
        corners = bld.corners()
        bld_rec = {"footprint_local_m": corners, "footprint_crs": to_crs(corners),
                   "base_z_m": bld.base_z_m, "eave_z_m": bld.base_z_m + bld.eave_height_m,
                   "ridge_z_m": bld.base_z_m + bld.ridge_height_m, "length_m": bld.length_m,
                   "width_m": bld.width_m, "ridge_direction": bld.axis,
                   "min_clearance_roof_m": float(d[i]),
                   "nearest_span_id": curves.wires[int(wi[i])].span_id,
                   "nearest_wire_id": curves.wires[int(wi[i])].wire_id,
                   "closest_roof_point_local_m": bpts[i], "closest_roof_point_crs": to_crs(bpts[i]),
                   "note": "clearance from the true roof surface (0.1 m samples) to the nearest "
                           "wire; walls lie below the roof edges"}
    road_rec = None
    if rd is not None:
        inside = rd.inside(curves.points[:, :2])
        cp = curves.points[inside]
        rec = {"centreline_local_m": [rd.centre - rd.axis * rd.half_length_m,
                                      rd.centre + rd.axis * rd.half_length_m],
               "width_m": rd.width_m, "footprint_local_m": rd.corners(),
               "surface": "true ground (terrain) height"}
        rec["centreline_crs"] = to_crs(np.array(rec["centreline_local_m"]))
        rec["footprint_crs"] = to_crs(rd.corners())
        if len(cp):
            vc = cp[:, 2] - ground.height(cp[:, 0], cp[:, 1])
            m = int(np.argmin(vc))
            w = curves.wires[int(curves.wire_index[np.flatnonzero(inside)[m]])]
            rec.update({"min_vertical_clearance_m": float(vc[m]), "nearest_span_id": w.span_id,
                        "nearest_wire_id": w.wire_id, "closest_wire_point_local_m": cp[m]})
        road_rec = rec
    ub_rec = None
    if ub is not None:
        ub_rec = {
            "crossing_span_id": span_ids[ub["span_index"]],
            "poles": [{"id": f"UBP{i + 1}", "xy_local_m": ub["poles"][i],
                       "xy_crs": to_crs(ub["poles"][i]), "ground_z_m": ub["pole_ground_z"][i],
                       "height_m": ub["pole_height_m"]} for i in range(2)],
            "wires": [{"wire_id": w.wire_id, "role": "other", "class_code": C.WIRE_CONDUCTOR,
                       "attachment_a_local_m": w.a, "attachment_a_crs": to_crs(w.a),
                       "attachment_b_local_m": w.b, "attachment_b_crs": to_crs(w.b),
                       "horizontal_tension_n": w.horizontal_tension_n,
                       "unit_weight_n_per_m": w.unit_weight_n_per_m, **w.summary(),
                       "wire_index": len(wires) + k} for k, w in enumerate(ub["wires"])],
            "min_clearance_to_line_m": ub["min_clearance_m"],
            "nearest_span_id": ub["nearest_main_wire"].span_id,
            "nearest_wire_id": ub["nearest_main_wire"].wire_id,
            "closest_underbuild_point_local_m": ub["closest_underbuild_point"],
            "closest_line_point_local_m": ub["closest_main_point"],
            "note": "distribution line crossing under the span; its wires are class 14 and its "
                    "poles class 15 in the truth classification",
        }
    wire_index = [{"span_id": w.span_id, "wire_id": w.wire_id} for w in wires]
    if ub is not None:
        wire_index += [{"span_id": "underbuild", "wire_id": w.wire_id} for w in ub["wires"]]
    codes, cnt = np.unique(cls, return_counts=True)
    truth = {
        "format": "clearaudit-synthetic-truth", "format_version": 1,
        "units": "SI (m, N, N/m, °C); *_local_m in local metres relative to origin_crs; "
                 "*_crs in CRS units",
        "generator": gen, "crs": None if crs_obj is None else crs_obj.to_string(),
        "crs_name": None if crs_obj is None else crs_obj.name, "unit": unit, "unit_m": unit_m,
        "origin_crs": origin, "terrain": ground.to_dict(),
        "structures": st_records, "tension_sections": sec_records, "spans": span_records,
        "wire_index": wire_index,
        "planted_trees": [tree_record(t) for t in planted],
        "other_trees": [tree_record(t) for t in others],
        "building": bld_rec, "road": road_rec, "underbuild": ub_rec,
        "classes": {"codes": {str(k): v for k, v in C.CLASS_NAMES.items()},
                    "vegetation_bands_m": {"low": [0.0, scene.LOW_VEGETATION_MAX_M],
                                           "medium": [scene.LOW_VEGETATION_MAX_M,
                                                      scene.MEDIUM_VEGETATION_MAX_M],
                                           "high": [scene.MEDIUM_VEGETATION_MAX_M, None]}},
        "point_counts": {str(int(c)): int(k) for c, k in zip(codes, cnt, strict=True)},
        "n_points": int(len(cls)),
        "notes": [
            "Every wire is an exact catenary z = zA + C[cosh((x-x0)/C) - cosh(x0/C)], C = H/w, "
            "in the vertical plane through its attachment points; points scatter around the "
            "wire axis with noise_m in each direction square to the wire.",
            "Tree clearance_m is the 3D distance from the tree's generated points (noise "
            "included) to the nearest true wire curve of the line at survey.",
            "Suspension strings hang plumb; dead-end strings lie horizontal along the span; "
            "no jumpers are modelled.",
        ],
    }
    return _jsonify(truth)

"""Long synthetic corridors written tile by tile, with memory independent of the line length.

:func:`write_long_corridor` lays out a whole line first — structures, tension sections, every
wire's exact catenary and the analytic terrain, all O(number of spans) — and then generates the
points in *batches* of consecutive spans, one after another, writing each batch as its own
LAZ tile. Peak memory is that of one batch (set by ``tile_points``), whatever the line length,
so corridors of 50 km or 100 million points can be generated on a small machine.

The line is continuous across tiles: one terrain, one structure and wire layout, one flight
line (GPS time follows the chainage of the whole line). Tile seams lie in the middle of a span,
square to it: the points of every batch beyond its seam (the second half of its last span,
wires included) are carried over into the next tile, so a wire crossing a seam has points in
two tiles that lie on one catenary, and the ground is sampled once, without gap or overlap.

Compared with :func:`~clearaudit.synth.generate_corridor` the scene is simpler: no building,
road, under-build line or planted trees, no per-point truth labels, and only metre CRSs. The
truth record keeps the structures, tension sections, every wire's true curve and the tiles.
"""
from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from statistics import NormalDist
from typing import Any

import numpy as np
from scipy.spatial import cKDTree

from .. import __version__
from .. import cloud as C
from ..cloud import Cloud
from . import scene
from .corridor import (
    _VEGETATION,
    EXTENSION_STEP_M,
    ROW_HALF_WIDTH_M,
    _bundle_offsets,
    _jsonify,
    _left,
    _resolve_crs,
    _Structure,
    _structure_members,
    _tensions,
    check_line_args,
    line_file_config,
    scan_fields,
)
from .output import toml_dumps, write_structures_csv
from .structures import insulator_length_m, make_layout, segment_points
from .terrain import Terrain, random_terrain
from .wires import CurveSet, WireSpan, sample_wire

#: Points per span = FIXED + PER_DENSITY x density for a 100 m corridor with mixed vegetation
#: and spans of 280–420 m, measured on this generator (wires and structures do not scale with
#: the density): 78 000 at 1.5 /m², 185 000 at 4 /m², 528 000 at 12 /m².
POINTS_PER_SPAN_FIXED = 13_000.0
POINTS_PER_SPAN_PER_DENSITY = 42_900.0

#: Standard deviation of a sum of five unit cosines with random phases, sqrt(5/2). [-]
_FIELD_SD = float(np.sqrt(2.5))
#: Largest total rise or fall of the terrain's tilted plane along the whole line. [m]
_MAX_PLANE_RISE_M = 60.0
def points_per_span(density_per_m2: float) -> float:
    """Expected points per span of :func:`write_long_corridor` (default scene). [-]

    Parameters
    ----------
    density_per_m2
        Ground point density. [1/m²]
    """
    return POINTS_PER_SPAN_FIXED + POINTS_PER_SPAN_PER_DENSITY * float(density_per_m2)


@dataclass
class LongCorridor:
    """A long corridor written as tiles.

    Attributes
    ----------
    tiles
        The LAZ tiles, in line order (all in ``tile_folder``).
    tile_folder
        Folder holding the tiles only (give it to the pipeline as the cloud input).
    line, structures, truth
        Line file (TOML), structures table (CSV) and truth record (JSON) of the whole line.
    n_points
        Points written, all tiles. [-]
    tile_point_counts
        Points in each tile. [-]
    terrain
        The analytic ground surface (local metres).
    wires
        Every main-line wire in every span (true curves), span by span.
    seams
        For each seam between tile k and k+1: ``{"point_local_m", "direction", "span_index"}``;
        points with ``(p - point) . direction >= 0`` near the seam are in tile k+1.
    origin
        Local origin in CRS units. [m]
    line_length_m
        Sum of the horizontal span lengths. [m]
    """

    tiles: list[Path]
    tile_folder: Path
    line: Path
    structures: Path
    truth: Path
    n_points: int
    tile_point_counts: list[int]
    terrain: Terrain
    wires: list[WireSpan]
    seams: list[dict[str, Any]]
    origin: np.ndarray
    line_length_m: float
    structure_rows: list[dict] = field(default_factory=list)


@dataclass
class _Line:
    """The whole line's layout (everything except points)."""

    xy: np.ndarray
    dirs: np.ndarray
    lengths: np.ndarray
    structures: list[_Structure]
    wires_by_span: list[list[WireSpan]]
    ground: Terrain
    region: scene.Region
    layout: Any
    l_sus: float
    l_de: float
    sections: list[list[int]]
    tensions: list[dict[str, float]]
    span_ids: list[str]
    field_waves: np.ndarray  # (5, 3): wavelength, angle, phase of the patchiness field


def _check(n_spans, density_per_m2, tile_points, terrain, span_length_m, section_spans,
           vegetation, noise_m, gap_fraction, outliers, structure_kind, circuit, bundle,
           n_shield, corridor_width_m) -> None:
    if not (isinstance(n_spans, (int, np.integer)) and n_spans >= 1):
        raise ValueError("n_spans must be a whole number of at least 1")
    if not density_per_m2 > 0:
        raise ValueError("density_per_m2 must be positive")
    if not (isinstance(tile_points, (int, np.integer)) and tile_points >= 10_000):
        raise ValueError("tile_points must be a whole number of at least 10,000")
    check_line_args(terrain, circuit, bundle, n_shield, structure_kind, vegetation, noise_m,
                    gap_fraction, outliers)
    lo, hi = span_length_m
    if not 60.0 <= lo <= hi:
        raise ValueError("span_length_m must be (shortest, longest) with 60 m <= shortest <= longest")
    if not (isinstance(section_spans, (int, np.integer)) and section_spans >= 1):
        raise ValueError("section_spans must be a whole number of at least 1")
    if not 40.0 <= corridor_width_m <= 400.0:
        raise ValueError("corridor_width_m must be from 40 m to 400 m")


def _layout_line(rng: np.random.Generator, n_spans: int, terrain: str,
                 span_length_m: tuple[float, float], section_spans: int, bend_deg: float,
                 heading_deg: float | None, structure_kind: str, circuit: str, n_shield: int,
                 bundle: int, bundle_spacing_m: float, voltage_kv: float,
                 conductor_weight_n_per_m: float, shield_weight_n_per_m: float,
                 min_ground_clearance_m: float, corridor_width_m: float) -> _Line:
    """Structures, wires and terrain of the whole line (no points)."""
    heading = (np.radians(heading_deg) if heading_deg is not None
               else float(rng.uniform(0.0, 2.0 * np.pi)))
    lengths = rng.uniform(span_length_m[0], span_length_m[1], n_spans)
    interior = list(range(section_spans, n_spans, section_spans))
    deadends = sorted({0, n_spans, *interior})
    # Bends alternate left and right so that a long line meanders about its first heading.
    turn = np.zeros(n_spans)
    for m, i in enumerate(interior):
        turn[i] = np.radians(bend_deg) * (1.0 if m % 2 == 0 else -1.0)
    angles = heading + np.cumsum(turn)
    dirs = np.column_stack([np.cos(angles), np.sin(angles)])
    xy = np.vstack([[0.0, 0.0], np.cumsum(dirs * lengths[:, None], axis=0)])
    ground = random_terrain(rng, terrain, heading)
    # Limit the tilted plane's total rise along the line (a 1 % grade over 50 km is 500 m).
    g = np.asarray(ground.plane_gradient)
    rise = float(np.max(np.abs((xy - xy[0]) @ g)))
    if rise > _MAX_PLANE_RISE_M:
        g = g * (_MAX_PLANE_RISE_M / rise)
        ground = Terrain(kind=ground.kind, base_z_m=ground.base_z_m,
                         plane_gradient=(float(g[0]), float(g[1])),
                         amplitudes_m=ground.amplitudes_m,
                         wavevectors_rad_per_m=ground.wavevectors_rad_per_m,
                         phases_rad=ground.phases_rad)
    gz = ground.height(xy[:, 0], xy[:, 1])
    structures = [_Structure(i, f"S{i + 1:03d}", xy[i], float(gz[i]), i in deadends,
                             dirs[max(i - 1, 0)], dirs[min(i, n_spans - 1)])
                  for i in range(n_spans + 1)]
    arrangement = "horizontal"
    layout = make_layout(structure_kind, circuit, arrangement, n_shield)
    l_sus, l_de = insulator_length_m(voltage_kv)
    sections = [list(range(deadends[k], deadends[k + 1])) for k in range(len(deadends) - 1)]
    tensions = _tensions(None, len(sections), conductor_weight_n_per_m, shield_weight_n_per_m,
                         rng)
    section_of_span = np.zeros(n_spans, dtype=int)
    for k, spans in enumerate(sections):
        section_of_span[spans] = k
    offsets = _bundle_offsets(int(bundle), bundle_spacing_m)
    span_ids = [f"{structures[j].id}-{structures[j + 1].id}" for j in range(n_spans)]

    def span_wires(j: int) -> list[WireSpan]:
        sa, sb, d = structures[j], structures[j + 1], dirs[j]
        n_left = _left(d)
        pair = tensions[section_of_span[j]]
        out = []
        for p in layout.positions:
            a0, b0 = sa.attachment(p, d, l_sus, l_de), sb.attachment(p, -d, l_sus, l_de)
            subs = offsets if p.role == "phase" else [(0.0, 0.0)]
            w = conductor_weight_n_per_m if p.role == "phase" else shield_weight_n_per_m
            for k, (dl, dz) in enumerate(subs):
                off = np.array([n_left[0] * dl, n_left[1] * dl, dz])
                wid = p.wire_id if len(subs) == 1 else f"{p.wire_id}/{k + 1}"
                out.append(WireSpan(j, span_ids[j], wid, p.wire_id, p.role, a0 + off, b0 + off,
                                    pair[p.role], w))
        return out

    def lowest_clearance(j: int) -> float:
        low = np.inf
        for w in span_wires(j):
            if w.role == "phase":
                pts = w.xyz(np.linspace(0.0, w.span_length_m, 120))
                low = min(low, float(np.min(pts[:, 2] - ground.height(pts[:, 0], pts[:, 1]))))
        return low

    # Raise structures in body extensions until every phase clears the ground (as the
    # in-memory generator does), span by span.
    bad = list(range(n_spans))
    for _ in range(10):
        bad = [j for j in bad if lowest_clearance(j) < min_ground_clearance_m]
        if not bad:
            break
        for j in bad:
            structures[j].extension_m += EXTENSION_STEP_M
            structures[j + 1].extension_m += EXTENSION_STEP_M
        bad = sorted({max(j - 1, 0) for j in bad} | set(bad)
                     | {min(j + 1, n_spans - 1) for j in bad})
    wires_by_span = [span_wires(j) for j in range(n_spans)]
    vertices = np.vstack([xy[0] - dirs[0] * 30.0, xy[1:-1], xy[-1] + dirs[-1] * 30.0])
    region = scene.Region(vertices, corridor_width_m / 2.0)
    waves = np.column_stack([rng.uniform(60.0, 160.0, 5), rng.uniform(0.0, 2.0 * np.pi, 5),
                             rng.uniform(0.0, 2.0 * np.pi, 5)])
    return _Line(xy, dirs, lengths, structures, wires_by_span, ground, region, layout, l_sus,
                 l_de, sections, tensions, span_ids, waves)


def _field(waves: np.ndarray, xy: np.ndarray) -> np.ndarray:
    """One smooth random field for the whole line (sum of five cosines, 60–160 m)."""
    f = np.zeros(len(xy))
    for wl, a, p in waves:
        f += np.cos(2.0 * np.pi / wl * (xy[:, 0] * np.cos(a) + xy[:, 1] * np.sin(a)) + p)
    return f


def _segment_points(region: scene.Region, rng: np.random.Generator, density: float,
                    k: int) -> tuple[np.ndarray, np.ndarray]:
    """Uniform points of the part of the corridor nearest to segment ``k`` and their offsets.

    The parts of neighbouring segments do not overlap and leave no gap (each point belongs to
    its nearest segment), so segments can be generated one batch at a time.
    """
    hw = region.half_width_m
    n = int(rng.poisson(density * (region.seg_len[k] + 2.0 * hw) * 2.0 * hw))
    t = rng.uniform(-hw, region.seg_len[k] + hw, n)
    o = rng.uniform(-hw, hw, n)
    u = region.seg_u[k]
    xy = region.seg_a[k] + t[:, None] * u + o[:, None] * np.array([-u[1], u[0]])
    near = [i for i in range(k - 2, k + 3) if 0 <= i < len(region.seg_a)]
    seg, _, off, dist = region.locate(xy, near)
    keep = (seg == k) & (dist <= hw)
    return xy[keep], off[keep]


def _batch(line: _Line, rng: np.random.Generator, spans: range, density: float,
           vegetation: str, noise_m: float, gap_fraction: float, outliers: float,
           structure_kind: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Points of spans ``spans`` (and their first structures): xyz, truth class, shadow flag."""
    n_spans = len(line.lengths)
    region, ground = line.region, line.ground
    j0, j1 = spans.start, spans.stop
    near_spans = range(max(j0 - 1, 0), min(j1 + 1, n_spans))
    near_wires = [w for j in near_spans for w in line.wires_by_span[j]]
    curves = CurveSet(near_wires, step_m=0.5)
    st_here = list(range(j0, j1 + (1 if j1 == n_spans else 0)))
    st_near = np.array([line.structures[i].xy for i in
                        range(max(j0 - 1, 0), min(j1 + 2, n_spans + 1))])
    st_tree = cKDTree(st_near)
    trees_per_ha, shrubs_per_ha, grass_cover = _VEGETATION[vegetation]
    parts: list[tuple[np.ndarray, Any]] = []

    # ---------------------------------------------------------------- wires
    for j in spans:
        for w in line.wires_by_span[j]:
            spacing = float(rng.uniform(0.3, 0.8) if w.role == "phase" else rng.uniform(0.5, 1.0))
            pts, _ = sample_wire(rng, w, spacing, noise_m, gap_fraction, [])
            parts.append((pts, C.WIRE_GUARD if w.role == "shield" else C.WIRE_CONDUCTOR))

    # ---------------------------------------------------------------- structures
    phases = [p for p in line.layout.positions if p.role == "phase"]
    for i in st_here:
        s = line.structures[i]
        p0, p1, rad = _structure_members(line.layout, s, ground)
        parts.append((segment_points(rng, p0, p1, rad,
                                     0.3 if structure_kind == "lattice" else 0.15, noise_m),
                      C.TRANSMISSION_TOWER))
        a0, a1 = [], []
        for p in phases:
            txy = s.xy + s.lateral * p.lateral_m * s.stretch
            t = np.array([txy[0], txy[1], s.ground_z + p.arm_height_m + s.extension_m])
            if s.deadend:
                for j, toward in ((i, line.dirs[min(i, n_spans - 1)]),
                                  (i - 1, -line.dirs[max(i - 1, 0)])):
                    if 0 <= j < n_spans:
                        a0.append(t)
                        a1.append(t + np.array([toward[0], toward[1], 0.0]) * line.l_de)
            else:
                a0.append(t)
                a1.append(t - np.array([0.0, 0.0, line.l_sus]))
        parts.append((segment_points(rng, np.array(a0), np.array(a1), np.full(len(a0), 0.13),
                                     0.12, noise_m), C.WIRE_CONNECTOR))

    # ---------------------------------------------------------------- vegetation
    crowns = np.zeros((0, 3))
    if trees_per_ha > 0:
        cand, off = [], []
        for k in spans:
            c, o = _segment_points(region, rng, trees_per_ha / 1e4, k)
            cand.append(c)
            off.append(o)
        cand, off = np.vstack(cand), np.concatenate(off)
        inner = np.abs(off) < ROW_HALF_WIDTH_M
        keep = ~inner | (rng.random(len(cand)) < 0.03)
        if vegetation in ("mixed", "dense"):
            # Patchy woods: the in-memory generator keeps trees above the field's median
            # (mixed) or 15 % quantile (dense) of the drawn candidates; here one field covers
            # the whole line, so its quantiles come from its normal approximation.
            q = 0.5 if vegetation == "mixed" else 0.15
            keep &= _field(line.field_waves, cand) > _FIELD_SD * NormalDist().inv_cdf(q)
        keep &= st_tree.query(cand)[0] > 12.0
        cand, inner = cand[keep], inner[keep]
        trees = scene.random_trees(rng, cand, ground, (7.0, 24.0),
                                   0.6 if vegetation == "dense" else 0.35)
        trees.height_m[inner] = rng.uniform(3.0, 7.0, int(inner.sum()))
        trees.crown_radius_m[inner] = 0.25 * trees.height_m[inner] + 0.4
        trees.crown_length_m[inner] = 0.6 * trees.height_m[inner]
        if len(trees):
            unit = trees.draw_unit_samples(rng, density)
            pts = trees.points(unit) + rng.normal(0.0, noise_m, (len(unit["tree"]), 3))
            d = curves.nearest(pts)[0]
            per_tree = np.full(len(trees), np.inf)
            np.minimum.at(per_tree, unit["tree"], d)
            ok = per_tree >= 7.0  # random trees closer than 7 m to a wire are dropped
            parts.append((pts[ok[unit["tree"]]], None))
            crowns = np.column_stack([trees.x, trees.y, trees.crown_radius_m])[ok]
    if shrubs_per_ha > 0:
        cand = np.vstack([_segment_points(region, rng, shrubs_per_ha / 1e4, k)[0]
                          for k in spans])
        cand = cand[st_tree.query(cand)[0] > 12.0] if len(cand) else cand
        h = rng.uniform(0.6, 2.5, len(cand))
        shrubs = scene.TreeSet(cand[:, 0].copy(), cand[:, 1].copy(),
                               ground.height(cand[:, 0], cand[:, 1]), h,
                               rng.uniform(0.5, 1.8, len(cand)), h, np.zeros(len(cand), bool))
        if len(shrubs):
            su = shrubs.draw_unit_samples(rng, density, trunk=False)
            parts.append((shrubs.points(su) + rng.normal(0.0, noise_m, (len(su["tree"]), 3)),
                          None))
    if grass_cover > 0:
        cand = np.vstack([_segment_points(region, rng, 0.35 * density, k)[0] for k in spans])
        f = _field(line.field_waves[::-1], cand)  # another field: waves in reverse order
        cand = cand[(f > _FIELD_SD * NormalDist().inv_cdf(1.0 - grass_cover))
                    & (st_tree.query(cand)[0] > 6.0)]
        parts.append((np.column_stack([cand, ground.height(cand[:, 0], cand[:, 1])
                                       + rng.uniform(0.05, 0.45, len(cand))]), C.LOW_VEGETATION))

    # ---------------------------------------------------------------- ground and noise
    gxy = np.vstack([_segment_points(region, rng, density, k)[0] for k in spans])
    shadow = np.zeros(len(gxy), dtype=bool)
    if len(crowns):
        d, idx = cKDTree(crowns[:, :2]).query(gxy)
        shadow = d < crowns[idx, 2]
    keep = ~shadow | (rng.random(len(gxy)) < 0.45)
    gxy, shadow = gxy[keep], shadow[keep]
    parts.append((np.column_stack([gxy, ground.height(gxy[:, 0], gxy[:, 1])
                                   + rng.normal(0.0, noise_m, len(gxy))]), C.GROUND))
    n_before = sum(len(p[0]) for p in parts)
    n_noise = int(rng.binomial(n_before, outliers)) if outliers > 0 else 0
    high, low = scene.noise_points(rng, gxy, ground, (n_noise + 1) // 2, n_noise // 2)
    parts += [(high, C.HIGH_NOISE), (low, C.LOW_NOISE)]

    xyz = np.vstack([p[0] for p in parts])
    cls = np.empty(len(xyz), dtype=np.uint8)
    shadow_all = np.zeros(len(xyz), dtype=bool)
    start = 0
    for pts, code in parts:
        sl = slice(start, start + len(pts))
        if code is None:
            cls[sl] = scene.vegetation_class(pts[:, 2] - ground.height(pts[:, 0], pts[:, 1]))
        else:
            cls[sl] = code
        if code == C.GROUND:
            shadow_all[sl] = shadow
        start += len(pts)
    return xyz, cls, shadow_all


def _point_fields(rng: np.random.Generator, xyz: np.ndarray, cls: np.ndarray,
                  shadow: np.ndarray, line: _Line, segments: range, seed: int,
                  ) -> dict[str, np.ndarray]:
    """Intensity, returns and GPS time (one flight line along the whole line's chainage, so
    GPS time runs on continuously from tile to tile)."""
    _, chain, off, _ = line.region.locate(xyz[:, :2], segments)
    return scan_fields(rng, cls, shadow, chain, off, line.region.half_width_m, seed,
                       first_scan=0.0)


def write_long_corridor(
    out_dir: str | Path,
    name: str,
    *,
    n_spans: int,
    seed: int = 0,
    density_per_m2: float = 12.0,
    tile_points: int = 2_000_000,
    terrain: str = "rolling",
    span_length_m: tuple[float, float] = (280.0, 420.0),
    section_spans: int = 8,
    bend_deg: float = 6.0,
    heading_deg: float | None = None,
    vegetation: str = "mixed",
    noise_m: float = 0.03,
    gap_fraction: float = 0.1,
    outliers: float = 2e-4,
    structure_kind: str = "lattice",
    circuit: str = "single",
    bundle: int = 1,
    bundle_spacing_m: float = 0.45,
    n_shield: int = 1,
    conductor_weight_n_per_m: float = 15.97,
    conductor_diameter_m: float = 0.02814,
    conductor_name: str = "795 26/7 ACSR",
    shield_name: str = "3/8 EHS",
    shield_weight_n_per_m: float = 4.00,
    shield_diameter_m: float = 0.009144,
    conductor_temperature_c: float = 25.0,
    voltage_kv: float = 230.0,
    max_operating_temperature_c: float = 100.0,
    line_name: str = "Synthetic long 230 kV line",
    rule_set: str = "na-transmission",
    corridor_width_m: float = 100.0,
    min_ground_clearance_m: float = 9.0,
    crs: str | None = "EPSG:32617",
    anchor_lonlat: Sequence[float] | None = None,
    classified: bool = False,
) -> LongCorridor:
    """Generate a long line corridor batch by batch and write it as LAZ tiles.

    Parameters
    ----------
    out_dir
        Folder for ``<name>.line.toml``, ``<name>.structures.csv``, ``<name>.truth.json`` and
        the tile folder ``<name>.tiles/`` (``<name>_t0000.laz`` ...). Created if missing.
    name
        Base file name (no folders).
    n_spans
        Number of spans (structures = spans + 1).
    seed
        Seed of every random choice; the same arguments give identical files.
    density_per_m2
        Ground point density on open ground. [1/m²]
    tile_points
        Target points per tile; sets the spans per batch and so the peak memory (measured:
        about 180 B per point of the batch above a base of about 100 MB; 450 MB for
        2 million-point tiles, whatever the line length). [-]
    terrain
        "flat", "rolling" or "steep" (:func:`clearaudit.synth.terrain.random_terrain`); the
        tilted plane is flattened so that it rises or falls at most 60 m along the line.
    span_length_m
        Range (shortest, longest) of horizontal span lengths. [m]
    section_spans
        Spans per tension section; interior dead-ends every ``section_spans`` structures.
    bend_deg
        Line angle at each interior dead-end, alternately left and right. [°]
    heading_deg
        Direction of the first span, counter-clockwise from local +x; default random. [°]
    vegetation
        "none", "sparse", "mixed" or "dense" (as :func:`~clearaudit.synth.generate_corridor`).
    noise_m
        Standard deviation of the measurement noise. [m]
    gap_fraction
        Fraction of each wire's span length without points (one to three gaps). [-]
    outliers
        Fraction of extra noise points (half high noise, half low noise). [-]
    structure_kind, circuit, bundle, bundle_spacing_m, n_shield
        As :func:`~clearaudit.synth.generate_corridor` (horizontal phase arrangement).
    conductor_weight_n_per_m, conductor_diameter_m, shield_weight_n_per_m, shield_diameter_m
        Weights per unit length [N/m] and diameters [m] of the phase conductor and shield wire.
    conductor_name, shield_name
        Names written to the line file.
    conductor_temperature_c
        Conductor temperature at survey (the tensions are at this temperature). [°C]
    voltage_kv, max_operating_temperature_c, line_name, rule_set
        Written to the line file ([kV], [°C]); the voltage also sets insulator lengths.
    corridor_width_m
        Width of the scanned corridor. [m]
    min_ground_clearance_m
        Structures are raised in 3 m body extensions until every phase clears the ground by
        this much. [m]
    crs
        A projected CRS in metres (default UTM 17N), or None.
    anchor_lonlat
        Longitude, latitude of the first structure. [°]
    classified
        True: the tiles carry the truth classification; False: every point class 1.

    Returns
    -------
    LongCorridor
        Paths, point counts, the terrain, every wire's true curve and the tile seams.

    Notes
    -----
    Every wire is an exact catenary (Irvine 1981)
    :math:`z(x) = z_A + C[\\cosh((x - x_0)/C) - \\cosh(x_0/C)]`, :math:`C = H/w`, with one H
    per wire role in each tension section. Memory: the layout is O(``n_spans``); points exist
    only for the current batch (about ``tile_points``) and the half span carried over a seam.

    References
    ----------
    .. [1] Irvine, H. M. (1981). *Cable Structures*. MIT Press, ch. 1.
    .. [2] ASPRS (2019). *LAS Specification 1.4 R15*, Table 17 (class codes).
    """
    from ..io.las import write_cloud

    params = {k: v for k, v in locals().items() if k not in ("write_cloud", "out_dir")}
    if not name or any(c in name for c in "/\\"):
        raise ValueError("name must be a plain file name without folders")
    _check(n_spans, density_per_m2, tile_points, terrain, span_length_m, section_spans,
           vegetation, noise_m, gap_fraction, outliers, structure_kind, circuit, bundle,
           n_shield, corridor_width_m)
    if not (conductor_weight_n_per_m > 0 and shield_weight_n_per_m > 0):
        raise ValueError("conductor and shield weights must be positive")
    crs_obj, unit_m, origin = _resolve_crs(crs, "m", None if anchor_lonlat is None
                                           else tuple(anchor_lonlat))
    layout_seq, batch_seq = np.random.SeedSequence(int(seed)).spawn(2)
    line = _layout_line(np.random.default_rng(layout_seq), int(n_spans), terrain,
                        tuple(span_length_m), int(section_spans), float(bend_deg), heading_deg,
                        structure_kind, circuit, n_shield, bundle, bundle_spacing_m, voltage_kv,
                        conductor_weight_n_per_m, shield_weight_n_per_m, min_ground_clearance_m,
                        corridor_width_m)

    per_batch = max(1, int(round(tile_points / points_per_span(density_per_m2))))
    starts = list(range(0, n_spans, per_batch))
    batches = [range(s, min(s + per_batch, n_spans)) for s in starts]
    out = Path(out_dir)
    tile_dir = out / f"{name}.tiles"
    tile_dir.mkdir(parents=True, exist_ok=True)
    for old in tile_dir.glob(f"{name}_t*.laz"):
        old.unlink()
    tiles: list[Path] = []
    counts: list[int] = []
    seams: list[dict[str, Any]] = []
    tile_records = []
    carry: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None
    for b, (spans, ss) in enumerate(zip(batches, batch_seq.spawn(len(batches)), strict=True)):
        rng = np.random.default_rng(ss)
        xyz, cls, shadow = _batch(line, rng, spans, density_per_m2, vegetation, noise_m,
                                  gap_fraction, outliers, structure_kind)
        seam_in = seams[-1] if seams else None
        if b < len(batches) - 1:
            j = spans.stop - 1
            d = line.dirs[j]
            p = line.xy[j] + d * line.lengths[j] / 2.0
            r = xyz[:, :2] - p
            beyond = (r @ d >= 0.0) & (np.hypot(r[:, 0], r[:, 1]) < line.lengths[j] + 100.0)
            seams.append({"point_local_m": p, "direction": d, "span_index": j,
                          "span_id": line.span_ids[j]})
            nxt = (xyz[beyond], cls[beyond], shadow[beyond])
            xyz, cls, shadow = xyz[~beyond], cls[~beyond], shadow[~beyond]
        else:
            nxt = None
        if carry is not None:
            xyz = np.vstack([carry[0], xyz])
            cls = np.concatenate([carry[1], cls])
            shadow = np.concatenate([carry[2], shadow])
        carry = nxt
        segments = range(max(spans.start - 1, 0), spans.stop)
        fields = _point_fields(rng, xyz, cls, shadow, line, segments, seed)
        order = np.argsort(fields["gps_time"], kind="stable")
        xyz, cls = xyz[order], cls[order]
        fields = {k: v[order] for k, v in fields.items()}
        cloud = Cloud(xyz=xyz, origin=origin, crs=crs_obj, horizontal_unit_m=unit_m,
                      vertical_unit_m=unit_m,
                      classification=cls if classified else np.ones(len(xyz), dtype=np.uint8),
                      fields=fields)
        path = tile_dir / f"{name}_t{b:04d}.laz"
        write_cloud(cloud, path)
        tiles.append(path)
        counts.append(len(xyz))
        tile_records.append({"file": path.name, "n_points": len(xyz),
                             "spans": [spans.start, spans.stop],
                             "seam_before": seam_in, "seam_after": seams[-1] if nxt else None})
        del xyz, cls, shadow, fields, cloud, order

    def to_crs(p):
        p = np.asarray(p, dtype=float)
        return (p / unit_m + origin[: p.shape[-1]]).tolist()

    rows = [{"id": s.id, "x": to_crs(s.xy)[0], "y": to_crs(s.xy)[1],
             "type": "deadend" if s.deadend else "suspension"} for s in line.structures]
    paths = {"line": out / f"{name}.line.toml", "structures": out / f"{name}.structures.csv",
             "truth": out / f"{name}.truth.json"}
    config = line_file_config(
        line_name=line_name, voltage_kv=voltage_kv,
        max_operating_temperature_c=max_operating_temperature_c, rule_set=rule_set, owner=None,
        conductor_temperature_c=conductor_temperature_c, conductor_name=conductor_name,
        bundle=bundle, bundle_spacing_m=bundle_spacing_m,
        conductor_weight_n_per_m=conductor_weight_n_per_m,
        conductor_diameter_m=conductor_diameter_m, shield_name=shield_name,
        shield_weight_n_per_m=shield_weight_n_per_m, shield_diameter_m=shield_diameter_m,
        structures_file=paths["structures"].name)
    paths["line"].write_text(toml_dumps(config), encoding="utf-8")
    write_structures_csv(paths["structures"], rows)
    wires = [w for ws in line.wires_by_span for w in ws]
    truth = {
        "format": "clearaudit-synthetic-long-truth", "format_version": 1,
        "units": "SI (m, N, N/m, °C); *_local_m in local metres relative to origin_crs",
        "generator": {**params, "clearaudit_version": __version__},
        "crs": None if crs_obj is None else crs_obj.to_string(), "unit_m": unit_m,
        "origin_crs": origin, "terrain": line.ground.to_dict(),
        "line_length_m": float(line.lengths.sum()),
        "structures": [{"id": s.id, "index": s.index, "xy_local_m": s.xy, "xy_crs": to_crs(s.xy),
                        "ground_z_m": s.ground_z, "extension_m": s.extension_m,
                        "type": "deadend" if s.deadend else "suspension",
                        "line_angle_deg": s.line_angle_deg} for s in line.structures],
        "tension_sections": [{"id": f"TS{k + 1}", "span_ids": [line.span_ids[j] for j in sp],
                              "ruling_span_m": float(np.sqrt(np.sum(line.lengths[sp] ** 3)
                                                             / np.sum(line.lengths[sp]))),
                              "horizontal_tension_n": dict(line.tensions[k])}
                             for k, sp in enumerate(line.sections)],
        "spans": [{"id": line.span_ids[j], "index": j, "horizontal_length_m": line.lengths[j],
                   "from_structure": line.structures[j].id,
                   "to_structure": line.structures[j + 1].id,
                   "wires": [{"wire_id": w.wire_id, "role": w.role,
                              "attachment_a_local_m": w.a, "attachment_b_local_m": w.b,
                              "horizontal_tension_n": w.horizontal_tension_n,
                              "unit_weight_n_per_m": w.unit_weight_n_per_m, **w.summary()}
                             for w in line.wires_by_span[j]]} for j in range(n_spans)],
        "tiles": tile_records, "n_points": int(sum(counts)),
        "notes": ["Tile seams are square to a span at its middle; the scene has no building, "
                  "road, under-build line or planted trees."],
    }
    paths["truth"].write_text(json.dumps(_jsonify(truth), indent=1, ensure_ascii=False) + "\n",
                              encoding="utf-8")
    return LongCorridor(tiles=tiles, tile_folder=tile_dir, line=paths["line"],
                        structures=paths["structures"], truth=paths["truth"],
                        n_points=int(sum(counts)), tile_point_counts=counts,
                        terrain=line.ground, wires=wires, seams=seams, origin=origin,
                        line_length_m=float(line.lengths.sum()), structure_rows=rows)

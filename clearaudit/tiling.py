"""Tiled audits in bounded memory: split once, classify per tile, audit per tile, merge.

The survey is never held in memory. Its points are streamed once and routed to a grid of
square *cells* (``cell_m`` wide, in local metres) as small binary bucket files in a work
folder; cells are grouped into square *tiles* of ``k x k`` cells so each tile holds about
``tile_points`` points. Every point belongs to exactly one cell, hence to exactly one tile
(its *owner*); a tile task also reads the points of neighbouring cells within ``overlap_m``
of its box as context (ground filter windows, wire following, tree crowns), but writes
results for its owned points only. A grid handles lines that bend or double back: only
occupied cells make tiles.

Stages (each a plain function that runs in-process or as a Dask task; only paths, tile specs
and small summaries cross process boundaries):

:func:`split_part`     decode one point range of one input file, cull to the corridor, append
                       each point to its cell's bucket file;
:func:`plan_tiles`     group occupied cells into tiles from the cell counts;
:func:`classify_tile`  classify a tile with its overlap; keep owned classes and heights above
                       ground on disk (``.npy``); return the small set of points the line model
                       needs (wires, structures, insulators, ground near structures);
:func:`audit_tile`     clearances of a tile's owned points to the curves of the spans near it;
                       return the raw per-point findings, ground minima, tree tops and ground
                       profile samples;
:func:`merge_findings` (driver) group findings into obstacles across tile seams, rank.

The classified copy is then streamed in input order from the tiles' owned results
(:class:`TileResults`), whose point keys are sorted within each tile.
"""
from __future__ import annotations

import math
import os
import pickle
import resource
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .cloud import (
    GROUND,
    TRANSMISSION_TOWER,
    WIRE_CONDUCTOR,
    WIRE_CONNECTOR,
    WIRE_GUARD,
    Cloud,
)
from .errors import InputError
from .io.las import ReadSetup, corridor_mask, read_range

#: One bucket record: local metres, the file's class code, ``file_id << KEY_SHIFT | index``.
RECORD = np.dtype([("xyz", "<f8", (3,)), ("cls", "u1"), ("key", "<i8")])
KEY_SHIFT = 40
MODEL_CLASSES = (WIRE_GUARD, WIRE_CONDUCTOR, TRANSMISSION_TOWER, WIRE_CONNECTOR)
#: Ground points within this horizontal distance of structure points go to the line model,
#: (used for the ground height under each structure: median within 10 m or its footprint) [m]
STRUCTURE_GROUND_RADIUS_M = 20.0
#: ... decimated to one point per cell of this size. [m]
STRUCTURE_GROUND_CELL_M = 0.5
#: A tile with at most this many owned points may fail to classify (no ground) without
#: stopping the run; its points keep their own classes.
SCRAP_TILE_POINTS = 20_000


def peak_rss_mb() -> float:
    """Peak resident memory of this process so far. [MB]

    Linux ``VmHWM`` (reset when a program starts), else ``getrusage`` ``ru_maxrss`` (which
    on Linux also carries the peak of a forked parent).
    """
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except (OSError, ValueError, IndexError):
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


# =============================================================================== splitting
@dataclass(frozen=True)
class Grid:
    """The cell grid: cell (i, j) covers ``x0 + i*cell_m <= x < x0 + (i+1)*cell_m`` (local m)."""

    x0: float
    y0: float
    cell_m: float

    def cells(self, xy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        i = np.floor((xy[:, 0] - self.x0) / self.cell_m).astype(np.int64)
        j = np.floor((xy[:, 1] - self.y0) / self.cell_m).astype(np.int64)
        return i, j


@dataclass(frozen=True)
class SplitPart:
    """One split task: points ``start:stop`` of file ``file_id``, written as part ``part``."""

    part: int
    file_id: int
    start: int
    stop: int


@dataclass(frozen=True)
class Corridor:
    """Corridor kept while splitting: a polyline (CRS units) and a half-width (CRS units)."""

    polyline_crs: np.ndarray
    buffer_crs_units: float


def plan_parts(setup: ReadSetup, part_points: int) -> list[SplitPart]:
    """Cut the input files into point ranges of at most ``part_points`` points."""
    if part_points < 1:
        raise ValueError("part_points must be a positive number of points")
    parts = []
    for file_id, count in enumerate(setup.point_counts):
        for start in range(0, count, part_points):
            parts.append(SplitPart(len(parts), file_id, start, min(count, start + part_points)))
    return parts


def _cell_dir(work: Path, i: int, j: int) -> Path:
    return work / "cells" / f"c{i}_{j}"


def split_part(work: str | Path, setup: ReadSetup, part: SplitPart, grid: Grid,
               corridor: Corridor | None = None, *, flush_points: int = 1_000_000,
               chunk_size: int = 1_000_000) -> dict[str, Any]:
    """Decode one point range and append every kept point to its cell's bucket file.

    Parameters
    ----------
    work
        Work folder (shared by all tasks).
    setup
        From :func:`clearaudit.io.las.read_setup`.
    part
        The range to decode.
    grid
        The cell grid.
    corridor
        Optional corridor; points outside are dropped while streaming.
    flush_points
        Points buffered before they are appended to the bucket files (bounds memory). [points]
    chunk_size
        Points decoded per step. [points]

    Returns
    -------
    dict
        ``cells`` {(i, j): points}, ``decoded``, ``kept``, ``seconds``, ``peak_rss_mb``.
    """
    t0 = time.perf_counter()
    work = Path(work)
    keep = (corridor_mask(corridor.polyline_crs, corridor.buffer_crs_units)
            if corridor is not None else None)
    buffers: dict[tuple[int, int], list[np.ndarray]] = {}
    counts: dict[tuple[int, int], int] = {}
    buffered = 0
    decoded = kept = 0

    def flush() -> None:
        for (i, j), arrays in buffers.items():
            folder = _cell_dir(work, i, j)
            folder.mkdir(parents=True, exist_ok=True)
            with open(folder / f"p{part.part:06d}.bin", "ab") as fh:
                for a in arrays:
                    a.tofile(fh)
        buffers.clear()

    for xyz, cls, index, n in read_range(setup, part.file_id, part.start, part.stop, keep=keep,
                                         chunk_size=chunk_size):
        decoded += n
        if len(xyz) == 0:
            continue
        rec = np.empty(len(xyz), dtype=RECORD)
        rec["xyz"] = xyz
        rec["cls"] = cls
        rec["key"] = (np.int64(part.file_id) << KEY_SHIFT) | index
        ci, cj = grid.cells(xyz)
        # stable sort keeps the input order inside every cell
        cell_key = (ci - ci.min()) * (int(cj.max() - cj.min()) + 1) + (cj - cj.min())
        order = np.argsort(cell_key, kind="stable")
        ck = cell_key[order]
        cuts = np.flatnonzero(np.diff(ck)) + 1
        for seg in np.split(np.arange(len(order)), cuts):
            first = order[seg[0]]
            key = (int(ci[first]), int(cj[first]))
            buffers.setdefault(key, []).append(rec[order[seg]])
            counts[key] = counts.get(key, 0) + len(seg)
        kept += len(xyz)
        buffered += len(xyz)
        if buffered >= flush_points:
            flush()
            buffered = 0
    flush()
    return {"cells": counts, "decoded": decoded, "kept": kept,
            "seconds": time.perf_counter() - t0, "peak_rss_mb": peak_rss_mb()}


# =============================================================================== planning
@dataclass(frozen=True)
class TileSpec:
    """One tile: the cells it owns, its box, and the neighbouring cells read as context.

    Attributes
    ----------
    id
        ``"t{I}_{J}"``.
    cells
        Owned cells (i, j).
    box
        Owned box (xmin, ymin, xmax, ymax) in local metres. [m]
    overlap_m
        Context read around the box. [m]
    context_cells
        Cells (not owned) intersecting the box grown by ``overlap_m``.
    n_points
        Owned points.
    """

    id: str
    cells: tuple[tuple[int, int], ...]
    box: tuple[float, float, float, float]
    overlap_m: float
    context_cells: tuple[tuple[int, int], ...]
    n_points: int

    def owns(self, xy: np.ndarray) -> np.ndarray:
        x0, y0, x1, y1 = self.box
        return (xy[:, 0] >= x0) & (xy[:, 0] < x1) & (xy[:, 1] >= y0) & (xy[:, 1] < y1)

    def near(self, xy: np.ndarray, margin_m: float) -> np.ndarray:
        x0, y0, x1, y1 = self.box
        return ((xy[:, 0] >= x0 - margin_m) & (xy[:, 0] < x1 + margin_m)
                & (xy[:, 1] >= y0 - margin_m) & (xy[:, 1] < y1 + margin_m))


def plan_tiles(cell_counts: dict[tuple[int, int], int], grid: Grid, tile_points: int,
               overlap_m: float, max_cells_per_side: int = 32) -> list[TileSpec]:
    """Group occupied cells into square blocks of ``k x k`` cells (largest ``k`` that fits).

    Parameters
    ----------
    cell_counts
        Points per occupied cell.
    grid
        The cell grid.
    tile_points
        Largest number of owned points wanted per tile (a single cell may hold more). [points]
    overlap_m
        Context read around each tile. [m]
    max_cells_per_side
        Largest ``k``.

    Returns
    -------
    list of TileSpec
        Ordered by block (i, j).
    """
    if tile_points < 1 or overlap_m < 0:
        raise ValueError("tile_points must be positive and overlap_m non-negative")
    occupied = {c: n for c, n in cell_counts.items() if n > 0}
    if not occupied:
        return []
    ij = np.array(list(occupied), dtype=np.int64)
    n = np.array(list(occupied.values()), dtype=np.int64)
    k_best = 1
    for k in range(max_cells_per_side, 0, -1):
        blocks, inverse = np.unique(ij // k, axis=0, return_inverse=True)
        sums = np.bincount(inverse.reshape(-1), weights=n)
        if sums.max() <= tile_points:
            k_best = k
            break
    blocks, inverse = np.unique(ij // k_best, axis=0, return_inverse=True)
    inverse = inverse.reshape(-1)
    reach = int(math.ceil(overlap_m / grid.cell_m))
    tiles = []
    for b, (bi, bj) in enumerate(blocks):
        mine = np.flatnonzero(inverse == b)
        cells = tuple(sorted((int(ij[m, 0]), int(ij[m, 1])) for m in mine))
        i0, j0 = int(bi) * k_best, int(bj) * k_best
        box = (grid.x0 + i0 * grid.cell_m, grid.y0 + j0 * grid.cell_m,
               grid.x0 + (i0 + k_best) * grid.cell_m, grid.y0 + (j0 + k_best) * grid.cell_m)
        context = tuple(sorted(
            c for c in occupied
            if i0 - reach <= c[0] < i0 + k_best + reach and j0 - reach <= c[1] < j0 + k_best + reach
            and not (i0 <= c[0] < i0 + k_best and j0 <= c[1] < j0 + k_best)))
        tiles.append(TileSpec(id=f"t{int(bi)}_{int(bj)}", cells=cells, box=box,
                              overlap_m=float(overlap_m), context_cells=context,
                              n_points=int(n[mine].sum())))
    return tiles


# =============================================================================== tile I/O
def _cell_files(work: Path, cell: tuple[int, int]) -> list[Path]:
    folder = _cell_dir(work, *cell)
    return sorted(folder.glob("p*.bin")) if folder.is_dir() else []


def read_cells(work: str | Path, cells: tuple[tuple[int, int], ...]) -> np.ndarray:
    """All records of the given cells, cell after cell, each in input order (keys sorted)."""
    arrays = [np.fromfile(f, dtype=RECORD) for c in cells for f in _cell_files(Path(work), c)]
    return np.concatenate(arrays) if arrays else np.zeros(0, dtype=RECORD)


def read_context(work: str | Path, tile: TileSpec, margin_m: float | None = None,
                 block: int = 1_000_000) -> tuple[np.ndarray, list[tuple[tuple[int, int], np.ndarray]]]:
    """Records of the context cells within ``margin_m`` of the tile box (read in blocks).

    Returns the records and, per context cell, the positions (within that cell's records)
    of the points kept, so per-point results of neighbouring tiles can be looked up.
    """
    margin = tile.overlap_m if margin_m is None else float(margin_m)
    parts, where = [], []
    for cell in tile.context_cells:
        offset = 0
        picked = []
        for f in _cell_files(Path(work), cell):
            mm = np.memmap(f, dtype=RECORD, mode="r")
            for s in range(0, len(mm), block):
                rec = np.asarray(mm[s:s + block])
                sel = np.flatnonzero(tile.near(rec["xyz"][:, :2], margin))
                if len(sel):
                    parts.append(rec[sel])
                    picked.append(sel + offset + s)
            offset += len(mm)
            del mm
        if picked:
            where.append((cell, np.concatenate(picked)))
    records = np.concatenate(parts) if parts else np.zeros(0, dtype=RECORD)
    return records, where


def _tile_file(work: Path, tile_id: str, what: str) -> Path:
    return work / "tiles" / f"{tile_id}.{what}"


@dataclass
class TileContext:
    """What a tile task needs besides its spec (picklable, small)."""

    origin: np.ndarray
    crs: Any
    horizontal_unit_m: float
    vertical_unit_m: float


def _cloud(ctx: TileContext, xyz: np.ndarray, cls: np.ndarray) -> Cloud:
    return Cloud(xyz=xyz, origin=ctx.origin, crs=ctx.crs, horizontal_unit_m=ctx.horizontal_unit_m,
                 vertical_unit_m=ctx.vertical_unit_m, classification=cls)


# =============================================================================== task A: classify
def classify_tile(work: str | Path, tile: TileSpec, ctx: TileContext, classify_options: Any,
                  given_structures_xy: np.ndarray | None = None) -> dict[str, Any]:
    """Classify one tile (owned points + context) and keep the owned results on disk.

    Parameters
    ----------
    work
        Work folder.
    tile
        The tile.
    ctx
        Origin, CRS and units.
    classify_options
        :class:`clearaudit.classify.ClassifyOptions`.
    given_structures_xy
        Structure positions from the structures file (local m), shape (k, 2), or None. [m]

    Returns
    -------
    dict
        ``n_owned``, ``counts`` {class: points}, ``model_xyz`` / ``model_cls`` /
        ``model_local`` (owned wire, structure, insulator points and owned ground near
        structures; ``model_local`` indexes the tile's owned points), ``ground_z_sample``,
        ``timings_s``, ``info``, ``seconds``, ``peak_rss_mb``.
    """
    from .classify import classify

    t0 = time.perf_counter()
    work = Path(work)
    own = read_cells(work, tile.cells)
    ctx_rec, _ = read_context(work, tile)
    n_own = len(own)
    xyz = np.concatenate([own["xyz"], ctx_rec["xyz"]])
    vendor = np.concatenate([own["cls"], ctx_rec["cls"]])
    note = None
    try:
        result = classify(_cloud(ctx, xyz, vendor), classify_options)
    except InputError as exc:
        # a scrap of a tile (a corner cell with a few points and no ground): its points keep
        # their own classes and get no height above ground; the run goes on
        if n_own > SCRAP_TILE_POINTS:
            raise
        note = f"tile {tile.id}: {exc.problem}; its {n_own} points keep their own classes"
        result = None
    if result is None:
        cls = own["cls"].copy()
        hag = np.full(n_own, np.nan, dtype=np.float32)
        full_cls = vendor
        ground_model, timings, info, used = None, {}, {"note": note}, classify_options.to_dict()
    else:
        cls = result.classification[:n_own]
        hag = result.height_above_ground_m[:n_own]
        full_cls = result.classification
        ground_model, timings, info = result.ground, result.timings_s, result.info
        used = result.options
    folder = work / "tiles"
    folder.mkdir(parents=True, exist_ok=True)
    np.save(_tile_file(work, tile.id, "cls.npy"), cls)
    np.save(_tile_file(work, tile.id, "hag.npy"), hag.astype(np.float32))
    np.save(_tile_file(work, tile.id, "key.npy"), own["key"])
    with open(_tile_file(work, tile.id, "ground.pkl"), "wb") as fh:
        pickle.dump(ground_model, fh, protocol=pickle.HIGHEST_PROTOCOL)

    # the line model's points: wires, structures, insulators, ground near structures
    model_mask = np.isin(cls, MODEL_CLASSES)
    ground_own = np.flatnonzero(cls == GROUND)
    anchors = [xyz[np.isin(full_cls, (TRANSMISSION_TOWER, WIRE_CONNECTOR)), :2]]
    if given_structures_xy is not None and len(given_structures_xy):
        anchors.append(np.asarray(given_structures_xy, dtype=float).reshape(-1, 2))
    anchor_xy = np.concatenate(anchors)
    if len(anchor_xy) and len(ground_own):
        from scipy.spatial import cKDTree

        anchor_xy = np.unique(np.floor(anchor_xy), axis=0) + 0.5  # 1 m cells: a small tree
        d, _ = cKDTree(anchor_xy).query(xyz[ground_own, :2],
                                        distance_upper_bound=STRUCTURE_GROUND_RADIUS_M + 1.0)
        near = ground_own[np.isfinite(d)]
        # one ground point per STRUCTURE_GROUND_CELL_M cell: the median height under a
        # structure needs a sample, not every point
        cell = np.floor(xyz[near, :2] / STRUCTURE_GROUND_CELL_M).astype(np.int64)
        _, first = np.unique(cell, axis=0, return_index=True)
        model_mask[near[np.sort(first)]] = True
    local = np.flatnonzero(model_mask)
    codes, counts = np.unique(cls, return_counts=True)
    ground_z = xyz[ground_own[::97], 2] if len(ground_own) else np.zeros(0)
    return {"tile": tile.id, "n_owned": n_own, "n_context": len(ctx_rec),
            "counts": {int(c): int(k) for c, k in zip(codes, counts, strict=True)},
            "model_xyz": xyz[local], "model_cls": cls[local], "model_local": local,
            "ground_z_sample": ground_z, "timings_s": timings, "info": info, "note": note,
            "options": used,
            "seconds": time.perf_counter() - t0, "peak_rss_mb": peak_rss_mb()}


# =============================================================================== task B: audit
@dataclass
class AuditTileInput:
    """What :func:`audit_tile` needs besides the tile (the states near the tile only)."""

    states: list[tuple[int, Any]]  # (global state index, WireState)
    other_wire_local: np.ndarray  # owned point indices that belong to other wires
    requirements: list[dict]  # per listed state: vegetation, wire, ground{}, b_v, b_h
    ground_classes: np.ndarray
    surface_lookup: np.ndarray
    buffer_m: float
    options: Any  # clearaudit.audit.engine.AuditOptions
    profile_spans: list[tuple[str, np.ndarray, np.ndarray]]  # (span id, stations, xy)
    fall_in: bool = True


@dataclass
class TileFindings:
    """Per kind: the finding points (xyz, key) and their Findings (point indexes them)."""

    xyz: dict[str, np.ndarray] = field(default_factory=dict)
    key: dict[str, np.ndarray] = field(default_factory=dict)
    findings: dict[str, Any] = field(default_factory=dict)


def _load_tile_results(work: Path, tile_id: str) -> tuple[np.ndarray, np.ndarray]:
    return (np.load(_tile_file(work, tile_id, "cls.npy")),
            np.load(_tile_file(work, tile_id, "hag.npy")))


def audit_tile(work: str | Path, tile: TileSpec, tiles_by_cell: dict[tuple[int, int], str],
               job: AuditTileInput) -> dict[str, Any]:
    """Clearances of one tile's owned points to the condition curves of the nearby spans.

    Parameters
    ----------
    work
        Work folder (holds the split cells and the classified tiles).
    tile
        The tile.
    tiles_by_cell
        Owner tile id of every occupied cell (to look up context points' classes).
    job
        The nearby wire states, requirements and options.

    Returns
    -------
    dict
        ``findings`` (:class:`TileFindings`), ``ground_min`` {(state, condition): m},
        ``tops`` (tree tops owned by the tile: xy, top_z, height_m, dist_m, crown cells of
        fall-in trees), ``profiles`` {span id: (station indices, z)}, ``seconds``,
        ``peak_rss_mb``.

    Notes
    -----
    The per-point tests are those of :func:`clearaudit.audit.engine.audit_line` (radial
    clearance to vegetation and other wires, box envelope to buildings, vertical clearance
    to ground under the wire); the grouping of points into obstacles is left to the driver
    (:func:`merge_findings`), so an obstacle cut by a tile seam becomes one obstacle.
    """
    from scipy.spatial import cKDTree

    from .audit.clearance import Findings, polyline_overhead, radial_findings
    from .audit.engine import VEGETATION_CLASSES, _findings, _within
    from .audit.priority import fall_in_distance, find_tree_tops
    from .cloud import BUILDING

    t0 = time.perf_counter()
    work = Path(work)
    opts = job.options
    own = read_cells(work, tile.cells)
    cls, hag = _load_tile_results(work, tile.id)
    xyz = own["xyz"]
    keys = own["key"]
    with open(_tile_file(work, tile.id, "ground.pkl"), "rb") as fh:
        ground_model = pickle.load(fh)
    out = TileFindings()
    ground_min: dict[tuple[int, str], float] = {}
    states = job.states
    profiles: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    tops_out: dict[str, np.ndarray] = {}
    if states:
        samples = np.concatenate([c for _, st in states for c in st.curves.values()])
        samples_tree = cKDTree(samples[:, :2])

        def group(mask, buffer_m, two_d=False):
            idx = np.flatnonzero(mask)
            if idx.size:
                idx = idx[_within(xyz[idx, :2], samples_tree, buffer_m)]
            g_xyz = xyz[idx]
            tree = cKDTree(g_xyz[:, :2] if two_d else g_xyz) if len(idx) else None
            return idx, g_xyz, tree

        is_ground = np.isin(cls, job.ground_classes)
        other = np.zeros(len(xyz), dtype=bool)
        other[np.asarray(job.other_wire_local, dtype=np.int64)] = True
        groups = {"vegetation": group(np.isin(cls, VEGETATION_CLASSES), job.buffer_m),
                  "building": group(cls == BUILDING, job.buffer_m),
                  "ground": group(is_ground, opts.ground_lateral_m + 1.0, two_d=True),
                  "wire": group(other, job.buffer_m)}
        parts: dict[str, list[Any]] = {k: [] for k in groups}
        for (i, st), req in zip(states, job.requirements, strict=True):
            for cond, curve in st.curves.items():
                frac = st.fractions[cond]
                ci_along = st.position_ci95(cond, frac)
                margin = opts.search_margin_m + float(np.max(ci_along))
                for kind in ("vegetation", "wire"):
                    _, g_xyz, tree = groups[kind]
                    if tree is None:
                        continue
                    idx, d, ci, fr = radial_findings(g_xyz, tree, curve, frac, req[kind],
                                                     ci_along, margin)
                    if idx.size:
                        parts[kind].append(_findings(idx, i, cond, d, req[kind], ci, fr,
                                                     "any" if kind == "wire" else "value"))
                _, g_xyz, tree = groups["building"]
                b_h, b_v = req["b_h"], req["b_v"]
                if tree is not None:
                    hits = tree.query_ball_point(curve, math.hypot(b_h, b_v) + margin,
                                                 return_sorted=False)
                    idx = np.unique(np.fromiter((j for lst in hits for j in lst), dtype=np.int64))
                    if idx.size:
                        lateral, wire_z, param = polyline_overhead(g_xyz[idx], curve)
                        d_v = np.abs(wire_z - g_xyz[idx, 2])
                        ci = np.interp(param, np.arange(len(curve)), ci_along)
                        fr = np.interp(param, np.arange(len(curve)), frac)
                        keep = (lateral < b_h) & (d_v - ci < b_v)
                        vertical = (b_v - d_v) <= (b_h - lateral)
                        clearance = np.where(vertical, d_v, lateral)
                        required = np.where(vertical, b_v, b_h)
                        ci = np.where(vertical, ci, 0.0)
                        key = np.where(vertical, "vertical", "horizontal").astype(object)
                        if np.any(keep):
                            m = int(keep.sum())
                            parts["building"].append(Findings(
                                idx[keep], np.full(m, i), np.full(m, cond, dtype=object),
                                clearance[keep], required[keep], ci[keep], fr[keep], key[keep]))
                g_idx, g_xyz, tree = groups["ground"]
                # ground model under the owned part of the curve
                inside = tile.owns(curve[:, :2])
                model_min = math.inf
                if inside.any() and ground_model is not None:
                    z = np.asarray(ground_model.height_at(curve[inside, :2]), dtype=float)
                    dz = curve[inside, 2] - z
                    dz = dz[np.isfinite(dz)]
                    model_min = float(dz.min()) if dz.size else math.inf
                point_min = math.inf
                if tree is not None:
                    hits = tree.query_ball_point(curve[:, :2], opts.ground_lateral_m,
                                                 return_sorted=False)
                    idx = np.unique(np.fromiter((j for lst in hits for j in lst), dtype=np.int64))
                    if idx.size:
                        lateral, wire_z, param = polyline_overhead(g_xyz[idx], curve)
                        near = lateral <= opts.ground_lateral_m
                        idx, wire_z, param = idx[near], wire_z[near], param[near]
                        dz = wire_z - g_xyz[idx, 2]
                        point_min = float(np.min(dz)) if dz.size else math.inf
                        surf = job.surface_lookup[cls[g_idx[idx]]]
                        ground_req = req["ground"]
                        required = np.array([ground_req.get(s, ground_req["land"]) for s in surf])
                        ci = np.interp(param, np.arange(len(curve)), ci_along)
                        fr = np.interp(param, np.arange(len(curve)), frac)
                        keep = dz - ci < required
                        if np.any(keep):
                            m = int(keep.sum())
                            parts["ground"].append(Findings(
                                idx[keep], np.full(m, i), np.full(m, cond, dtype=object),
                                dz[keep], required[keep], ci[keep], fr[keep], surf[keep]))
                best = min(point_min, model_min)
                if math.isfinite(best):
                    ground_min[(i, cond)] = best
        for kind, (g_idx, g_xyz, _) in groups.items():
            f = Findings.concat([Findings.empty(), *parts[kind]])
            used = np.unique(f.point)
            remap = np.searchsorted(used, f.point)
            f.point = remap
            out.xyz[kind] = g_xyz[used]
            out.key[kind] = keys[g_idx[used]]
            out.findings[kind] = f

        # tree tops owned by this tile (crowns read across the seam from the context)
        if job.fall_in:
            survey_mot = [st.curves[c] for _, st in states for c in ("survey", "mot")
                          if c in st.curves]
            veg_xyz, veg_hag = _vegetation_with_context(work, tile, tiles_by_cell, xyz, cls, hag)
            if len(veg_xyz) and survey_mot:
                wires = np.concatenate(survey_mot)
                sel = _within(veg_xyz[:, :2], cKDTree(wires[:, :2]), opts.fall_in_buffer_m)
                heights = veg_hag[sel].astype(float)
                tops = find_tree_tops(veg_xyz[sel], heights, min_height_m=opts.min_tree_height_m)
                if len(tops):
                    mine = np.flatnonzero(tile.owns(tops.xy))
                    dist = fall_in_distance(tops.base_xyz[mine], wires)
                    renumber = np.full(len(tops), -1)
                    renumber[mine] = np.arange(len(mine))
                    cell_tree = renumber[np.maximum(tops.cell_tree, 0)]
                    cell_tree[tops.cell_tree < 0] = -1
                    risky = np.zeros(len(mine) + 1, dtype=bool)
                    risky[:-1] = dist < tops.height_m[mine]
                    crown = np.flatnonzero((cell_tree >= 0) & risky[cell_tree])
                    tops_out = {"xy": tops.xy[mine], "top_z": tops.top_z[mine],
                                "height_m": tops.height_m[mine], "dist_m": dist,
                                "cell_xyz": tops.cell_xyz[crown], "cell_tree": cell_tree[crown]}
    # ground profile samples inside the owned box
    for span_id, _stations, sxy in job.profile_spans:
        inside = np.flatnonzero(tile.owns(sxy))
        if inside.size and ground_model is not None:
            z = np.asarray(ground_model.height_at(sxy[inside]), dtype=float)
            profiles[span_id] = (inside, z)
    return {"tile": tile.id, "findings": out, "ground_min": ground_min, "tops": tops_out,
            "profiles": profiles, "n_owned": len(xyz),
            "seconds": time.perf_counter() - t0, "peak_rss_mb": peak_rss_mb()}


def _vegetation_with_context(work: Path, tile: TileSpec, tiles_by_cell, xyz, cls, hag):
    """Owned vegetation points plus the neighbours' vegetation within the overlap."""
    from .audit.engine import VEGETATION_CLASSES

    veg = np.isin(cls, VEGETATION_CLASSES)
    xyz_parts, hag_parts = [xyz[veg]], [hag[veg]]
    records, where = read_context(work, tile)
    if len(records):
        offset = 0
        cache: dict[str, tuple[np.ndarray, np.ndarray, dict]] = {}
        for cell, positions in where:
            tile_id = tiles_by_cell.get(cell)
            n = len(positions)
            if tile_id is None:
                offset += n
                continue
            if tile_id not in cache:
                n_cls, n_hag = _load_tile_results(work, tile_id)
                cache[tile_id] = (n_cls, n_hag, _cell_offsets(work, tile_id))
            n_cls, n_hag, offsets = cache[tile_id]
            at = offsets[cell] + positions
            rec = records[offset:offset + n]
            v = np.isin(n_cls[at], VEGETATION_CLASSES)
            xyz_parts.append(rec["xyz"][v])
            hag_parts.append(n_hag[at][v])
            offset += n
    return np.concatenate(xyz_parts), np.concatenate(hag_parts)


def _cell_offsets(work: Path, tile_id: str) -> dict[tuple[int, int], int]:
    with open(_tile_file(work, tile_id, "cells.pkl"), "rb") as fh:
        return pickle.load(fh)


def write_cell_offsets(work: str | Path, tile: TileSpec) -> None:
    """Record where each owned cell's records start among the tile's owned records."""
    offsets, at = {}, 0
    for cell in tile.cells:
        offsets[cell] = at
        at += sum(os.path.getsize(f) // RECORD.itemsize for f in _cell_files(Path(work), cell))
    folder = Path(work) / "tiles"
    folder.mkdir(parents=True, exist_ok=True)
    with open(_tile_file(Path(work), tile.id, "cells.pkl"), "wb") as fh:
        pickle.dump(offsets, fh)


# =============================================================================== classified copy
class TileResults:
    """Per-point results of all tiles, looked up by (file, point range) for the writer.

    Each tile's owned keys are sorted within every cell but not across its cells, so the
    keys, classes and heights are re-sorted once per tile (memory-mapped on disk).
    """

    def __init__(self, work: str | Path, tiles: list[TileSpec]):
        self.work = Path(work)
        self.parts = []
        for t in tiles:
            key = np.load(_tile_file(self.work, t.id, "key.npy"))
            if len(key) and np.any(np.diff(key) < 0):
                order = np.argsort(key, kind="stable")
                np.save(_tile_file(self.work, t.id, "key.npy"), key[order])
                for what in ("cls.npy", "hag.npy"):
                    arr = np.load(_tile_file(self.work, t.id, what))
                    np.save(_tile_file(self.work, t.id, what), arr[order])
            del key
            self.parts.append(tuple(np.load(_tile_file(self.work, t.id, w), mmap_mode="r")
                                    for w in ("key.npy", "cls.npy", "hag.npy")))

    def values(self, file_id: int, start: int, stop: int):
        """``(has_new, codes, {"height_above_ground": hag})`` for points start:stop."""
        n = stop - start
        has_new = np.zeros(n, dtype=bool)
        codes = np.zeros(n, dtype=np.uint8)
        hag = np.full(n, np.nan, dtype=np.float32)
        lo = (np.int64(file_id) << KEY_SHIFT) | np.int64(start)
        hi = (np.int64(file_id) << KEY_SHIFT) | np.int64(stop)
        for key, cls, h in self.parts:
            a, b = np.searchsorted(key, [lo, hi])
            if b > a:
                at = np.asarray(key[a:b]) - lo
                has_new[at] = True
                codes[at] = cls[a:b]
                hag[at] = h[a:b]
        return has_new, codes, {"height_above_ground": hag}


__all__ = ["AuditTileInput", "Corridor", "Grid", "RECORD", "SplitPart", "TileContext",
           "TileFindings", "TileResults", "TileSpec", "audit_tile", "classify_tile",
           "peak_rss_mb", "plan_parts", "plan_tiles", "read_cells", "read_context",
           "split_part", "write_cell_offsets"]


# =============================================================================== driver: audit
@dataclass
class AuditPlan:
    """The driver's part of the audit before the tiles: temperature, conditions, states."""

    voltage: float
    altitude: float | None
    altitude_note: str
    survey_t: dict
    specs: dict
    insulator_m: float
    states: list
    notes: list[str]
    buffer_m: float
    requirements: list[dict]
    ground_classes: np.ndarray
    surface_lookup: np.ndarray
    options: Any
    state_boxes: np.ndarray  # (n, 4) xmin, ymin, xmax, ymax of each state's curves [m]


def prepare_audit(model: Any, config: Any, conductors: dict, rules: Any, model_cloud: Cloud,
                  ground_z_sample: np.ndarray, options: Any = None) -> AuditPlan:
    """Survey temperature, conditions and the wire states, as in ``audit_line`` steps 1-2.

    Parameters
    ----------
    model
        The line model.
    config, conductors, rules
        As for :func:`clearaudit.audit.audit_line`.
    model_cloud
        The cloud the model was built from (for the latitude of the survey).
    ground_z_sample
        A sample of ground heights of the whole survey (local m) for the altitude. [m]
    options
        :class:`clearaudit.audit.engine.AuditOptions`.
    """
    from .audit.conditions import project_conditions, resolve_conditions
    from .audit.engine import AuditOptions, _latitude, default_insulator_length_m
    from .audit.temperature import survey_conductor_temperature
    from .errors import InputError

    opts = options or AuditOptions()
    voltage = getattr(config.line, "voltage_kv", None)
    if voltage is None or not voltage > 0:
        raise InputError(getattr(config, "source", None) or "--voltage-kv",
                         "the line voltage is needed for the clearance audit "
                         "(give [line] voltage_kv or --voltage-kv)")
    voltage = float(voltage)
    notes: list[str] = []
    altitude = getattr(config.line, "altitude_m", None)
    if altitude is None and len(ground_z_sample):
        altitude = float(np.median(ground_z_sample)) + float(model_cloud.origin[2]) * float(
            model_cloud.vertical_unit_m)
        altitude_note = "from the cloud's ground heights (assumed above sea level)"
    else:
        altitude_note = "from the line file" if altitude is not None else "unknown"
    latitude = _latitude(model_cloud)
    wire_fits = [w for s in model.spans for w in s.wires
                 if w.fit is not None and getattr(w.fit, "ok", False)]
    azimuth = 90.0
    if wire_fits:
        d = np.mean([w.fit.direction for w in wire_fits], axis=0)
        azimuth = float(np.degrees(np.arctan2(d[0], d[1])) % 360.0)
    survey_t = survey_conductor_temperature(
        config.survey, conductors["phase"], latitude_deg=latitude,
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
    max_req = rules.max_required_m(voltage, altitude)
    requirements = []
    for st in states:
        req = {kind: rules.required(kind, st.role, voltage, altitude_m=altitude).value_m
               for kind in ("vegetation", "wire")}
        req["ground"] = {key: rules.required("ground", st.role, voltage, key=key).value_m
                         for key in rules.ground[st.role]}
        req["b_v"] = rules.required("building", st.role, voltage, key="vertical").value_m
        req["b_h"] = rules.required("building", st.role, voltage, key="horizontal").value_m
        requirements.append(req)
    boxes = np.array([[*np.min(np.concatenate(list(st.curves.values()))[:, :2], axis=0),
                       *np.max(np.concatenate(list(st.curves.values()))[:, :2], axis=0)]
                      for st in states]).reshape(-1, 4)
    ground_classes = (np.array(sorted(rules.surfaces), dtype=np.uint8) if rules.surfaces
                      else np.array([GROUND], dtype=np.uint8))
    surface_lookup = np.array([rules.surface_of_class(c) for c in range(256)], dtype=object)
    return AuditPlan(voltage=voltage, altitude=altitude, altitude_note=altitude_note,
                     survey_t=survey_t, specs=specs, insulator_m=insulator, states=states,
                     notes=notes, buffer_m=max_req + opts.search_margin_m + 2.0,
                     requirements=requirements, ground_classes=ground_classes,
                     surface_lookup=surface_lookup, options=opts, state_boxes=boxes)


def tile_audit_input(plan: AuditPlan, model: Any, tile: TileSpec,
                     other_wire_local: np.ndarray) -> AuditTileInput:
    """The states, spans and other-wire points that concern one tile."""
    opts = plan.options
    margin = max(plan.buffer_m, opts.fall_in_buffer_m + 60.0) + tile.overlap_m
    x0, y0, x1, y1 = tile.box
    b = plan.state_boxes
    near = np.flatnonzero((b[:, 0] <= x1 + margin) & (b[:, 2] >= x0 - margin)
                          & (b[:, 1] <= y1 + margin) & (b[:, 3] >= y0 - margin)) \
        if len(b) else np.zeros(0, dtype=int)
    spans = []
    for span in model.spans:
        a, e = np.asarray(span.a_xy, float), np.asarray(span.b_xy, float)
        length = float(np.linalg.norm(e - a))
        if not length > 0:
            continue
        if (max(a[0], e[0]) < x0 or min(a[0], e[0]) >= x1 or max(a[1], e[1]) < y0
                or min(a[1], e[1]) >= y1):
            continue
        stations = np.linspace(0.0, length, max(2, int(math.ceil(length)) + 1))
        spans.append((span.id, stations, a + np.outer(stations / length, e - a)))
    return AuditTileInput(states=[(int(i), plan.states[i]) for i in near],
                          other_wire_local=np.asarray(other_wire_local, dtype=np.int64),
                          requirements=[plan.requirements[i] for i in near],
                          ground_classes=plan.ground_classes,
                          surface_lookup=plan.surface_lookup, buffer_m=plan.buffer_m,
                          options=opts, profile_spans=spans, fall_in=bool(opts.fall_in))


def finish_audit(plan: AuditPlan, model: Any, conductors: dict, rules: Any,
                 tile_results: list[dict]) -> Any:
    """Merge the tiles' findings into one :class:`~clearaudit.audit.engine.AuditResult`.

    Findings of all tiles (in tile order) are grouped into obstacles together, so an obstacle
    cut by a seam is one obstacle; then fall-in trees, grow-in, priorities, span rows, curves,
    ground profiles and the summary follow ``audit_line`` steps 4-6.
    """
    from scipy.spatial import cKDTree

    from .audit.clearance import Findings, polyline_distance
    from .audit.engine import (
        AuditResult,
        _downsample,
        _Group,
        _obstacle_rows,
        _span_rows,
        _summary,
    )
    from .audit.priority import rank_findings

    opts = plan.options
    states = plan.states
    rows: list[dict] = []
    for kind in ("vegetation", "building", "ground", "wire"):
        xyz_parts, key_parts, f_parts, offset = [], [], [], 0
        for res in tile_results:
            tf = res["findings"]
            if kind not in tf.findings:
                continue
            f = tf.findings[kind]
            if len(f.point):
                f_parts.append(Findings(f.point + offset, f.state, f.condition, f.clearance_m,
                                        f.required_m, f.ci95_m, f.fraction, f.key))
            xyz_parts.append(tf.xyz[kind])
            key_parts.append(tf.key[kind])
            offset += len(tf.xyz[kind])
        if not f_parts:
            continue
        group = _Group(kind, np.concatenate(key_parts), np.concatenate(xyz_parts), None)
        rows.extend(_obstacle_rows(kind, Findings.concat(f_parts), group, states, opts))
    ground_min: dict[tuple[int, str], float] = {}
    for res in tile_results:
        for k, v in res["ground_min"].items():
            ground_min[k] = min(ground_min.get(k, math.inf), v)

    # ---- fall-in trees (tops found per tile, each top owned by one tile)
    trees_info = {"trees": 0, "fall_in_trees": 0}
    tops = [r["tops"] for r in tile_results if r["tops"]]
    if opts.fall_in and states and tops:
        xy = np.concatenate([t["xy"] for t in tops])
        top_z = np.concatenate([t["top_z"] for t in tops])
        height = np.concatenate([t["height_m"] for t in tops])
        dist = np.concatenate([t["dist_m"] for t in tops])
        offsets = np.cumsum([0] + [len(t["xy"]) for t in tops])
        cell_xyz = np.concatenate([t["cell_xyz"] for t in tops]).reshape(-1, 3)
        cell_tree = np.concatenate([t["cell_tree"] + o for t, o in zip(tops, offsets,
                                                                          strict=False)])
        risk = dist < height
        trees_info = {"trees": len(xy), "fall_in_trees": int(risk.sum())}
        matched = np.zeros(len(xy), dtype=bool)
        top_tree = cKDTree(xy) if len(xy) else None
        for row in rows:
            if row["kind"] != "vegetation" or top_tree is None:
                continue
            near = top_tree.query_ball_point(row["point_local"][:2], 4.0)
            if not near:
                continue
            best = max(near, key=lambda t: top_z[t])
            matched[best] = True
            row["tree_height_m"] = float(height[best])
            row["fall_in_distance_m"] = float(dist[best])
            row["fall_in"] = bool(risk[best])
        only = np.flatnonzero(risk & ~matched)
        if opts.report_fall_in_only and only.size:
            cells = np.flatnonzero(np.isin(cell_tree, only))
            cxyz = cell_xyz[cells]
            best_d = np.full(len(cells), np.inf)
            best_state = np.zeros(len(cells), dtype=int)
            best_frac = np.zeros(len(cells))
            for k, st in enumerate(states):
                d, _, param = polyline_distance(cxyz, st.curves["survey"])
                better = d < best_d
                best_d = np.where(better, d, best_d)
                best_state = np.where(better, k, best_state)
                best_frac = np.where(better, np.interp(param, np.arange(len(st.curves["survey"])),
                                                       st.fractions["survey"]), best_frac)
            for t in only:
                mine = np.flatnonzero(cell_tree[cells] == t)
                if mine.size == 0:
                    continue
                j = mine[np.argmin(best_d[mine])]
                st = states[int(best_state[j])]
                required = rules.required("vegetation", st.role, plan.voltage,
                                          altitude_m=plan.altitude).value_m
                clearance = float(best_d[j])
                rows.append({
                    "kind": "vegetation", "condition": "survey", "condition_detail": "survey",
                    "span_id": st.span_id, "wire_id": st.wire_id, "role": st.role,
                    "point_local": cxyz[j].copy(), "cloud_index": -1,
                    "clearance_m": clearance, "required_m": required,
                    "deficit_m": required - clearance,
                    "clearance_ci95_m": float(st.position_ci95("survey",
                                                               np.array([best_frac[j]]))[0]),
                    "certainty": "certain", "finding": "fall_in",
                    "station_m": float(best_frac[j]) * float(st.fit.span_length_m),
                    "obstacle_id": f"T{int(t) + 1:04d}", "fall_in": True,
                    "violated_at_survey": False, "surface": "", "direction": "",
                    "tree_height_m": float(height[t]), "fall_in_distance_m": float(dist[t]),
                })
    for row in rows:
        if row["kind"] == "vegetation":
            gap = max(0.0, row["clearance_m"] - row["required_m"])
            row["grow_in_years"] = gap / opts.growth_rate_m_per_year
        else:
            row["grow_in_years"] = None
    rows = rank_findings(rows)
    for n, row in enumerate(rows, start=1):
        row["id"] = n

    survey_t = plan.survey_t
    span_rows = _span_rows(model, states, survey_t, ground_min, conductors)
    curves = {(st.span_id, st.wire_id): {c: _downsample(v) for c, v in st.curves.items()}
              for st in states}
    profiles = {}
    for span in model.spans:
        length = float(np.linalg.norm(np.asarray(span.b_xy, float) - np.asarray(span.a_xy, float)))
        if not length > 0:
            continue
        stations = np.linspace(0.0, length, max(2, int(math.ceil(length)) + 1))
        z = np.full(len(stations), np.nan)
        for res in tile_results:
            got = res["profiles"].get(span.id)
            if got is not None:
                z[got[0]] = got[1]
        profiles[span.id] = np.column_stack([stations, z])
    summary = _summary(rows, states, span_rows, survey_t, list(plan.notes), trees_info, rules,
                       plan.voltage, plan.altitude, plan.altitude_note, plan.insulator_m)
    return AuditResult(
        survey_temperature={k: survey_t[k] for k in ("value_c", "ci95_c", "method", "note")},
        conditions={name: spec.as_dict() for name, spec in plan.specs.items()},
        span_rows=span_rows, violations=rows, curves=curves, ground_profiles=profiles,
        summary=summary, rules=rules.describe())

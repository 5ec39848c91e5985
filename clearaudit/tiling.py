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
:func:`refine_tile`    correct a tile's classes with the line model (built on the driver from
                       the gathered points), the context's classes from the classify stage;
:func:`audit_tile`     :func:`clearaudit.audit.engine.point_findings` on the tile's owned points
                       with their context (crowns and building footprints whole); the driver
                       prepares the wire states (:func:`~clearaudit.audit.engine.prepare_wire_states`)
                       and merges the tiles' findings across the seams
                       (:func:`~clearaudit.audit.engine.merge_findings`) — the same three steps
                       as the in-memory ``audit_line``.

The classified copy is then streamed in input order from the tiles' owned results
(:class:`TileResults`), whose point keys are sorted within each tile.
"""
from __future__ import annotations

import ctypes
import ctypes.util
import functools
import math
import os
import pickle
import platform
import resource
import threading
import time
from collections.abc import Iterable, Sequence
from contextlib import contextmanager, nullcontext
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .arrays import class_counts, class_mask, column_bounds, near_points, take_rows
from .cloud import (
    GROUND,
    TRANSMISSION_TOWER,
    WIRE_CONDUCTOR,
    WIRE_CONNECTOR,
    WIRE_GUARD,
    Cloud,
)
from .errors import InputError
from .io.files import save_array, write_pieces
from .io.las import ReadSetup, RecordScratch, corridor_mask, read_range
from .threads import SharedSetting

#: One bucket record: local metres, the file's class code, ``file_id << KEY_SHIFT | index``.
RECORD = np.dtype([("xyz", "<f8", (3,)), ("cls", "u1"), ("key", "<i8")])
# the routing kernel (classify/_grid.pyx route_records) writes this packed layout
if RECORD.itemsize != 33 or [RECORD.fields[f][1] for f in ("xyz", "cls", "key")] != [0, 24, 25]:
    raise RuntimeError("tile records must be packed as x, y, z, class, key (33 bytes)")
#: The same bytes as one opaque item: numpy copies a packed structured item field by field,
#: an opaque one in one piece (concatenating records ~15x faster, gathering them ~4x)
_RAW = np.dtype((np.void, RECORD.itemsize))
#: RECORD's layout with opaque fields, for filling records (a packed float64 field is written
#: element by element, an opaque one in one piece)
_FILL = np.dtype({"names": ["xyz", "cls", "key"],
                  "formats": [(np.void, 24), "u1", (np.void, 8)],
                  "offsets": [RECORD.fields[f][1] for f in ("xyz", "cls", "key")],
                  "itemsize": RECORD.itemsize})
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


def release_free_memory() -> None:
    """Give the heap's free pages back to the system (glibc ``malloc_trim``; a no-op elsewhere).

    numpy arrays below glibc's mmap threshold (adaptive up to 32 MB; 32 MB fixed once a
    :func:`kept_heap` block has run, 1 GiB inside one) live in the malloc arenas, one per
    thread; after a stage frees them the pages stay in the process's resident set
    and the next stage's peak stacks on top of them. Called after every stage and after every
    task of a Dask worker: a few milliseconds (not after the tasks of in-process tile threads,
    see :func:`clearaudit.distributed._task`).
    """
    trim = _malloc_trim()
    if trim is not None:
        trim(0)


def small_pages():
    """numpy's large arrays on ordinary pages while the block runs (restored after it;
    overlapping blocks — tasks of one Dask worker on several threads — share the setting).

    numpy asks the kernel for transparent huge pages (``madvise(MADV_HUGEPAGE)``) for every
    array from 4 MB up. Where huge pages are given on request (``madvise``, Ubuntu's and
    Debian's default), each fresh 2 MB page is compacted for and zeroed whole, and this
    pipeline allocates and frees arrays of many megabytes tile after tile: on p10M in
    memory the kernel's time fell from 4.5-5.5 to 2.6-2.8 CPU s and the run from 13.8-15.1
    to 12.1-12.5 s without the request (same peak); tiled, 0.5 CPU s and 50 MB of peak less.
    The same as ``NUMPY_MADVISE_HUGEPAGE=0``; a no-op where numpy lacks the switch.
    """
    return _SMALL_PAGES.hold()


def _pages_off() -> tuple[Any, bool] | None:
    """numpy's huge-page requests off: (the switch, the setting before), None without it."""
    switch = _hugepage_switch()
    return None if switch is None else (switch, bool(switch(False)))


_SMALL_PAGES = SharedSetting(_pages_off, lambda state: state[0](state[1]))


def numpy_huge_page_requests() -> bool | None:
    """Whether numpy asks for transparent huge pages now (None: numpy has no switch)."""
    read = _numpy_multiarray_attr("_get_madvise_hugepage")
    return None if read is None or _hugepage_switch() is None else bool(read())


def _hugepage_switch():
    return _numpy_multiarray_attr("_set_madvise_hugepage")


@functools.cache
def _numpy_multiarray_attr(name: str):
    """numpy's private ``multiarray`` function ``name`` (numpy 2 or 1.x), or None."""
    for module_name in ("numpy._core.multiarray", "numpy.core.multiarray"):
        try:
            module = __import__(module_name, fromlist=[name])
        except ImportError:
            continue
        if hasattr(module, name):
            return getattr(module, name)
    return None


#: glibc ``mallopt`` parameter numbers (malloc.h), and the values glibc's adaptive rule
#: reaches in a process that frees large arrays (mmap threshold at its 32 MB ceiling, trim
#: threshold twice that): what :func:`kept_heap` leaves behind, since any ``mallopt`` call
#: turns the rule off for good (leaving glibc's 128 KiB starting values instead mapped and
#: unmapped every array: the tile stages after a kept read stage took 40 % more CPU time)
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3
_GLIBC_AFTER = {_M_TRIM_THRESHOLD: 64 << 20, _M_MMAP_THRESHOLD: 32 << 20}
#: While a run lasts: blocks up to this size come from the heap, not from fresh mappings
#: (the main thread's; other threads' arenas grow in heaps of at most 64 MB, and a larger
#: block of theirs is still mapped afresh) [B]
KEPT_HEAP_MMAP_THRESHOLD = 1 << 30
#: ... and the heap's free top is kept up to this size (the stages' trims still empty it) [B]
KEPT_HEAP_TRIM_THRESHOLD = (1 << 31) - 1  # mallopt takes an int


@contextmanager
def kept_heap():
    """glibc keeps the blocks a run frees for its next arrays while the block runs (overlapping
    blocks share the setting); yields whether it does.

    By default glibc serves every block above its mmap threshold (adaptive, at most 32 MB)
    from a fresh mapping and unmaps it when freed, and gives the heap's free top back at
    once, so every page of the large arrays a run allocates and frees again and again is
    faulted in and zeroed by the kernel anew (on a virtual machine that hands freed pages
    back to its host, each fault costs far more). With the blocks served from the heap and
    its top kept, p10M in memory took 9.4-9.9 instead of 10.8-12.5 s (kernel time 1.3-1.6
    instead of 2.6-4.1 CPU s) with the same peak.

    Used for the whole in-memory run and for the tiled run's read stage, not for the tile
    stages: there each tile thread's arena kept what its tiles left free until the stage's
    trim, and the tiled peaks grew with the survey (100 M points: 809 MB against 628-652)
    for at most ≈ 5 % of speed; trimming whenever more than 128 MB lay free kept the peaks
    but lost the speed.

    On leaving, the free blocks go back to the system and glibc's thresholds are set where
    its adaptive rule would have brought them (see ``_GLIBC_AFTER``). These are process-wide
    settings: a program that calls clearaudit as a library and set its own thresholds with
    ``mallopt`` finds them replaced. ``CLEARAUDIT_KEEP_HEAP=0`` turns this off; so do
    glibc's own malloc options in the environment (``MALLOC_*`` or ``GLIBC_TUNABLES``): the
    user's choice wins. A no-op without glibc, and where glibc refuses the threshold (older
    versions cap it at 32 MB; then nothing is changed, nor set on leaving).
    """
    with _KEPT_HEAP.hold() as mallopt:
        yield mallopt is not None


def heap_kept() -> bool:
    """Whether :func:`kept_heap` holds glibc's heap policy now."""
    return _KEPT_HEAP.state is not None


def _keep_heap() -> Any:
    """The thresholds of :func:`kept_heap` set; ``mallopt`` to restore them, or None when
    nothing was changed (no glibc, the user's choice, or the threshold refused: a refused
    threshold leaves glibc as it was, its adaptive rule included)."""
    mallopt = _mallopt()
    if mallopt is None or not mallopt(_M_MMAP_THRESHOLD, KEPT_HEAP_MMAP_THRESHOLD):
        return None
    mallopt(_M_TRIM_THRESHOLD, KEPT_HEAP_TRIM_THRESHOLD)
    return mallopt


def _give_heap_back(mallopt: Any) -> None:
    for param, value in _GLIBC_AFTER.items():
        mallopt(param, value)
    release_free_memory()  # and the free blocks kept go back


_KEPT_HEAP = SharedSetting(_keep_heap, _give_heap_back)


def _mallopt():
    """glibc's ``mallopt``, or None (not glibc, turned off with ``CLEARAUDIT_KEEP_HEAP=0``, or
    the environment sets malloc's options)."""
    if platform.libc_ver()[0] != "glibc" or "malloc" in os.environ.get("GLIBC_TUNABLES", "") \
            or any(k.startswith("MALLOC_") for k in os.environ) \
            or os.environ.get("CLEARAUDIT_KEEP_HEAP", "").strip() == "0":
        return None
    fn = getattr(_libc(), "mallopt", None)
    if fn is not None:
        fn.argtypes, fn.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    return fn


@functools.cache
def _libc():
    """The C library (ctypes), or None."""
    try:
        return ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
    except OSError:
        return None


def _malloc_trim():
    return getattr(_libc(), "malloc_trim", None)


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


_CORRIDOR_KEEPS: dict[tuple[bytes, tuple[int, ...], float], Any] = {}
_CORRIDOR_LOCK = threading.Lock()


def corridor_keep(corridor: Corridor) -> Any:
    """The corridor's ``keep`` test (:func:`~clearaudit.io.las.corridor_mask`), built once per
    process and corridor and shared by the split tasks that run there.

    Building it rasterises the corridor over the polyline's box and sorts its segments into
    buckets, a cost that grows with the line; every split task had paid it again (0.037 s a
    part on the 10 km line's six parts), and longer lines have more parts. The test is a
    pure function of the polyline and the half-width, so the tasks of a run may share it;
    the last four corridors are kept.
    """
    line = np.ascontiguousarray(corridor.polyline_crs, dtype=np.float64)
    key = (line.tobytes(), line.shape, float(corridor.buffer_crs_units))
    with _CORRIDOR_LOCK:  # one build per corridor, also when two tasks start together
        keep = _CORRIDOR_KEEPS.get(key)
        if keep is None:
            keep = corridor_mask(line, corridor.buffer_crs_units)
            while len(_CORRIDOR_KEEPS) >= 4:
                _CORRIDOR_KEEPS.pop(next(iter(_CORRIDOR_KEEPS)))
            _CORRIDOR_KEEPS[key] = keep
    return keep


def plan_parts(setup: ReadSetup, part_points: int) -> list[SplitPart]:
    """Cut the input files into point ranges of at most ``part_points`` points (a file of
    ``setup.whole_files`` is one range: it cannot be sought in)."""
    if part_points < 1:
        raise ValueError("part_points must be a positive number of points")
    parts = []
    for file_id, count in enumerate(setup.point_counts):
        step = max(count, 1) if file_id in setup.whole_files else part_points
        for start in range(0, count, step):
            parts.append(SplitPart(len(parts), file_id, start, min(count, start + step)))
    return parts


def _cell_dir(work: Path, i: int, j: int) -> Path:
    return work / "cells" / f"c{i}_{j}"


#: Points decoded per step of a split part. Each decoded point costs about 250 bytes of
#: temporaries (records, coordinates, cell keys, sort order) until its chunk is bucketed:
#: with 250 000 points the read stage of the 50 km line peaked at 334-350 MB instead of
#: 648 MB with 1 000 000, and was no slower (7.0 s against 7.4-7.7 s).
SPLIT_CHUNK_POINTS = 250_000


def make_records(xyz: np.ndarray, cls: np.ndarray, key: np.ndarray) -> np.ndarray:
    """:data:`RECORD` array of points ``xyz`` [m], classes ``cls`` and keys ``key``."""
    rec = np.empty(len(xyz), dtype=_FILL)
    rec["xyz"] = np.ascontiguousarray(xyz, dtype="<f8").reshape(-1, 3).view(_FILL["xyz"])[:, 0]
    rec["cls"] = cls
    rec["key"] = np.ascontiguousarray(key, dtype="<i8").view(_FILL["key"])
    return rec.view(RECORD)


def record_xyz(*records: np.ndarray) -> np.ndarray:
    """The points of one or more record arrays, one after the other, as one contiguous
    (n, 3) float64 array (each point's coordinates copied as one 24-byte item). [m]"""
    parts = [_records(r).view(_FILL)["xyz"] for r in records]
    xyz = np.ascontiguousarray(parts[0]) if len(parts) == 1 else np.concatenate(parts)
    return xyz.view("<f8").reshape(-1, 3)


def record_keys(records: np.ndarray) -> np.ndarray:
    """The records' keys as one contiguous int64 array."""
    _records(records)
    return np.ascontiguousarray(records.view(_FILL)["key"]).view("<i8")


def _records(a: np.ndarray) -> np.ndarray:
    """``a`` seen as opaque items, after checking that it holds :data:`RECORD` items."""
    if a.dtype != RECORD:
        raise TypeError(f"expected tile records ({RECORD}), not {a.dtype}")
    return a.view(_RAW)


def take_records(records: np.ndarray, index: np.ndarray) -> np.ndarray:
    """``records[index]`` (positions or a mask) for :data:`RECORD` arrays, copied whole."""
    return _records(records)[index].view(RECORD)


def concat_records(parts: list[np.ndarray]) -> np.ndarray:
    """``numpy.concatenate(parts)`` for :data:`RECORD` arrays, copied whole."""
    if not parts:
        return np.zeros(0, dtype=RECORD)
    return np.concatenate([_records(p) for p in parts]).view(RECORD)


def route_by_cell(xyz: np.ndarray, cls: np.ndarray, key: np.ndarray, ci: np.ndarray,
                  cj: np.ndarray) -> tuple[np.ndarray, ...]:
    """:data:`RECORD` records of the points cell after cell, each cell's in input order.

    Parameters
    ----------
    xyz, cls, key
        Points [m], classes and keys.
    ci, cj
        Each point's cell (:meth:`Grid.cells`).

    Returns
    -------
    records, cell_i, cell_j, starts, stops
        The records, and per occupied cell (ascending ``(ci, cj)``) its cell and the slice
        of its records.
    """
    n = len(xyz)
    if n == 0:
        none = np.zeros(0, dtype=np.int64)
        return np.zeros(0, dtype=RECORD), none, none, none, none
    i0, j0 = int(ci.min()), int(cj.min())
    width = int(cj.max()) - j0 + 1
    n_cells = (int(ci.max()) - i0 + 1) * width
    cell = (ci - i0) * width + (cj - j0)
    if n_cells > 4 * n + 4096:  # cells spread far apart: a stable sort instead of counting
        rec = make_records(xyz, cls, key)
        order = np.argsort(cell, kind="stable")
        rec = take_records(rec, order)
        starts = np.flatnonzero(np.diff(cell[order], prepend=-1))
        stops = np.append(starts[1:], n)
        # each cell read from its first point: the cell number may wrap for absurd extents
        first = order[starts]
        return rec, ci[first], cj[first], starts, stops
    from .classify.kernels import route_records

    rec = np.empty(n, dtype=RECORD)
    first = np.empty(n_cells + 1, dtype=np.int64)
    route_records(np.ascontiguousarray(cell, dtype=np.int64), n_cells,
                  np.ascontiguousarray(xyz, dtype="<f8").reshape(-1, 3),
                  np.ascontiguousarray(cls, dtype=np.uint8), np.ascontiguousarray(key, dtype="<i8"),
                  rec.view(np.uint8).reshape(n, RECORD.itemsize), first)
    occupied = np.flatnonzero(first[1:] != first[:-1])
    return rec, occupied // width + i0, occupied % width + j0, first[occupied], first[occupied + 1]


def split_part(work: str | Path, setup: ReadSetup, part: SplitPart, grid: Grid,
               corridor: Corridor | None = None, *, flush_points: int = 1_000_000,
               chunk_size: int = SPLIT_CHUNK_POINTS,
               records: RecordScratch | None = None) -> dict[str, Any]:
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
    records
        Optional :class:`~clearaudit.io.las.RecordScratch` (in the work folder): the raw
        point records of every decoded point of the range, culled or not, go to the range's
        own scratch file, for the classified copy.

    Returns
    -------
    dict
        ``cells`` {(i, j): points}, ``decoded``, ``kept``, ``withheld`` (points in the
        corridor flagged withheld, not kept), ``seconds``, ``peak_rss_mb``.
    """
    t0 = time.perf_counter()
    work = Path(work)
    keep = corridor_keep(corridor) if corridor is not None else None
    buffers: dict[tuple[int, int], list[np.ndarray]] = {}
    counts: dict[tuple[int, int], int] = {}
    buffered = 0
    decoded = kept = 0
    tally: dict[str, int] = {}  # points flagged withheld, never kept (read_range)

    # the folders made one level at a time, never the work folder itself: a task still
    # running after its run was cancelled (a Dask worker's) must not bring back a work folder
    # the driver has removed (FileNotFoundError instead)
    (work / "cells").mkdir(exist_ok=True)

    made: set[tuple[int, int]] = set()  # the cells' folders this task made or found

    def flush() -> None:
        for (i, j), arrays in buffers.items():
            folder = _cell_dir(work, i, j)
            if (i, j) not in made:
                folder.mkdir(exist_ok=True)
                made.add((i, j))
            with open(folder / f"p{part.part:06d}.bin", "ab") as fh:
                for a in arrays:
                    # in pieces of at most 1 MiB (io.files: larger writes are several times
                    # slower per byte); not ndarray.tofile: its OSError on a full disk has no
                    # errno
                    write_pieces(fh, a)
        buffers.clear()

    with (records.writer(part.file_id, part.start) if records is not None
          else nullcontext()) as sink:
        for xyz, cls, index, n, ci, cj in read_range(
                setup, part.file_id, part.start, part.stop, keep=keep, chunk_size=chunk_size,
                records_to=sink, tally=tally, cells=(grid.x0, grid.y0, grid.cell_m)):
            decoded += n
            if len(xyz) == 0:
                continue
            index |= np.int64(part.file_id) << KEY_SHIFT  # the key
            rec, cell_i, cell_j, starts, stops = route_by_cell(xyz, cls, index, ci, cj)
            for i, j, a, b in zip(cell_i.tolist(), cell_j.tolist(), starts.tolist(),
                                  stops.tolist(), strict=True):
                buffers.setdefault((i, j), []).append(rec[a:b])
                counts[(i, j)] = counts.get((i, j), 0) + (b - a)
            kept += len(xyz)
            buffered += len(xyz)
            if buffered >= flush_points:
                flush()
                buffered = 0
    flush()
    return {"cells": counts, "decoded": decoded, "kept": kept,
            "withheld": tally.get("withheld", 0),
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

    def near_box(self, margin_m: float) -> tuple[float, float, float, float]:
        """The box grown by ``margin_m``: (x, y) with ``lo <= . < hi`` is near. [m]"""
        x0, y0, x1, y1 = self.box
        return x0 - margin_m, y0 - margin_m, x1 + margin_m, y1 + margin_m

    def near(self, xy: np.ndarray, margin_m: float) -> np.ndarray:
        lo0, lo1, hi0, hi1 = self.near_box(margin_m)
        return (xy[:, 0] >= lo0) & (xy[:, 0] < hi0) & (xy[:, 1] >= lo1) & (xy[:, 1] < hi1)


#: The most points a tile owns when none is asked (``--tile-points``) ... [points]
DEFAULT_TILE_POINTS = 1_500_000
#: ... but a smaller survey is still cut in tiles owning at most this share of its points
#: (two or three tiles), so that tile tasks run side by side ...
SMALL_SURVEY_TILE_SHARE = 0.6
#: ... once that leaves each at least this many points: below, a tile's 40 m of context and
#: its fixed costs outweigh what a second thread gains. [points]
SMALL_SURVEY_MIN_TILE_POINTS = 400_000


def tile_target(kept_points: int, asked: int | None = None) -> int:
    """The most points a tile may own in a survey of ``kept_points`` (after the corridor cull).

    ``asked`` when given (``--tile-points``). Else ``DEFAULT_TILE_POINTS``, or less for a
    small survey: at most ``SMALL_SURVEY_TILE_SHARE`` of its points, when that is at least
    ``SMALL_SURVEY_MIN_TILE_POINTS``. A 2 km line of 1.1 M points then makes two tiles
    instead of one, and its tile stages use two threads (2 cores: 1.88 → 1.65 s, alternating
    runs). Only the survey decides, never the engine, so a Dask run cuts the same tiles as an
    in-process one. An even half would not do: :func:`plan_tiles` keeps square blocks
    aligned to the grid, and the 2 km line's halves fell into three tiles.
    """
    if asked is not None:
        if asked < 1:
            raise ValueError("tile_points must be positive")
        return int(asked)
    if kept_points < 0:
        raise ValueError("kept_points must not be negative")
    small = math.ceil(SMALL_SURVEY_TILE_SHARE * kept_points)
    if small < SMALL_SURVEY_MIN_TILE_POINTS:
        return DEFAULT_TILE_POINTS
    return min(DEFAULT_TILE_POINTS, small)


def plan_tiles(cell_counts: dict[tuple[int, int], int], grid: Grid, tile_points: int,
               overlap_m: float, max_cells_per_side: int = 32) -> list[TileSpec]:
    """Group occupied cells into square blocks of ``k x k`` cells (largest ``k`` that fits);
    a scrap block (under a quarter of ``tile_points``) joins a side neighbour when both fit.

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
        Ordered by block (i, j); a joined pair is one tile named after its larger block, and
        its box is the two blocks' rectangle.
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
    block_points = np.bincount(inverse, weights=n).astype(np.int64)
    # a line crossing a block corner leaves scraps: blocks of a few points whose context
    # (the overlap all around them) is many times what they own. Each scrap joins a block
    # next to it (sharing a side: the union is a 2k x k rectangle) when both together stay
    # within ``tile_points``; a block takes at most one scrap, so every tile stays a rectangle
    partner = _scrap_partners(blocks, block_points, tile_points)
    reach = int(math.ceil(overlap_m / grid.cell_m))
    tiles = []
    for b, (bi, bj) in enumerate(blocks):
        if partner[b] >= 0 and (block_points[b], b) < (block_points[partner[b]], partner[b]):
            continue  # the smaller of a joined pair: its cells belong to its partner's tile
        members = [b] if partner[b] < 0 else [b, int(partner[b])]
        mine = np.flatnonzero(np.isin(inverse, members))
        cells = tuple(sorted((int(ij[m, 0]), int(ij[m, 1])) for m in mine))
        i0 = int(blocks[members, 0].min()) * k_best
        j0 = int(blocks[members, 1].min()) * k_best
        i1 = (int(blocks[members, 0].max()) + 1) * k_best
        j1 = (int(blocks[members, 1].max()) + 1) * k_best
        box = (grid.x0 + i0 * grid.cell_m, grid.y0 + j0 * grid.cell_m,
               grid.x0 + i1 * grid.cell_m, grid.y0 + j1 * grid.cell_m)
        context = tuple(sorted(
            c for c in occupied
            if i0 - reach <= c[0] < i1 + reach and j0 - reach <= c[1] < j1 + reach
            and not (i0 <= c[0] < i1 and j0 <= c[1] < j1)))
        tiles.append(TileSpec(id=f"t{int(bi)}_{int(bj)}", cells=cells, box=box,
                              overlap_m=float(overlap_m), context_cells=context,
                              n_points=int(n[mine].sum())))
    return tiles


def _scrap_partners(blocks: np.ndarray, points: np.ndarray, tile_points: int,
                    scrap_share: float = 0.25) -> np.ndarray:
    """For every block the block it is joined with (-1: none).

    A scrap is a block owning less than ``scrap_share`` of ``tile_points``. Scraps are taken
    from the smallest up (ties in block order); each joins the side neighbour (same row or
    column, next block) with the fewest points among those not yet joined whose points and
    its own together are at most ``tile_points``.
    """
    partner = np.full(len(blocks), -1, dtype=np.int64)
    where = {(int(i), int(j)): b for b, (i, j) in enumerate(blocks)}
    for b in sorted(range(len(blocks)), key=lambda q: (int(points[q]), q)):
        if partner[b] >= 0 or points[b] >= scrap_share * tile_points:
            continue
        i, j = int(blocks[b, 0]), int(blocks[b, 1])
        options = [q for q in (where.get((i - 1, j)), where.get((i + 1, j)),
                               where.get((i, j - 1)), where.get((i, j + 1)))
                   if q is not None and partner[q] < 0 and points[q] + points[b] <= tile_points]
        if options:
            q = min(options, key=lambda o: (int(points[o]), o))
            partner[b], partner[q] = q, b
    return partner


# =============================================================================== tile I/O
def _cell_files(work: Path, cell: tuple[int, int]) -> list[Path]:
    """A cell's record files (``p*.bin``) in name order, as ``sorted(folder.glob(...))``
    gives them; one directory scan (pathlib's glob took 0.17 ms a cell, 22 ms of a p10M
    run's context reads)."""
    folder = _cell_dir(work, *cell)
    try:
        with os.scandir(folder) as entries:
            names = sorted(e.name for e in entries
                           if e.name.startswith("p") and e.name.endswith(".bin"))
    except (FileNotFoundError, NotADirectoryError):
        return []
    return [folder / name for name in names]


def drop_cell_records(work: str | Path) -> int:
    """Remove every cell's point records (its ``p*.bin`` files) once no task will read them
    (after the audit tasks); the cells' other files stay (``copies.npy`` is read by the
    classified copy). Files that cannot be removed are left for the work folder's removal.
    Returns the number of files removed."""
    removed = 0
    cells = Path(work) / "cells"
    if not cells.is_dir():
        return 0
    for folder in cells.iterdir():
        for f in folder.glob("p*.bin"):
            try:
                f.unlink()
            except OSError:
                continue
            removed += 1
    return removed


def read_cells(work: str | Path, cells: tuple[tuple[int, int], ...],
               then: np.ndarray | None = None) -> np.ndarray:
    """All records of the given cells, cell after cell, each in input order (keys sorted).

    The files are read straight into one array; ``then`` (records) is appended after them.
    """
    return _read_record_files([f for c in cells for f in _cell_files(Path(work), c)], then)


#: Records read per step by :func:`read_points`: a reused buffer of 4.3 MB (below glibc's mmap
#: threshold, so its pages stay in the thread's heap from tile to tile)
READ_STEP_RECORDS = 1 << 17


@dataclass(frozen=True)
class TilePoints:
    """The fields of tile records, each one contiguous array: points ``xyz`` [m] (n, 3),
    the file's class codes ``cls`` and the keys ``key``."""

    xyz: np.ndarray
    cls: np.ndarray
    key: np.ndarray

    def __len__(self) -> int:
        return len(self.cls)


class _PointsFill:
    """Uninitialised :class:`TilePoints` for ``n`` records, filled from records in order
    (their bytes split into the three arrays by one compiled pass, ``unpack_records``: with
    the arrays' first touch 7.1 ms for 1.5 M records, numpy's three field copies 11.2 ms)."""

    def __init__(self, n: int):
        self.points = TilePoints(np.empty((n, 3)), np.empty(n, np.uint8), np.empty(n, np.int64))
        self.at = 0

    def put(self, fill: np.ndarray) -> None:
        """Copy the fields of ``fill`` (records in any 33-byte dtype; a strided view is copied
        first) to the next rows."""
        from .classify.kernels import unpack_records

        raw = np.ascontiguousarray(fill).view(np.uint8).reshape(-1)
        unpack_records(raw, self.points.xyz, self.points.cls, self.points.key, self.at)
        self.at += len(fill)


def points_of(records: np.ndarray) -> TilePoints:
    """The fields of a :data:`RECORD` array (copies)."""
    out = _PointsFill(len(records))
    out.put(_records(records).view(_FILL))
    return out.points


def read_points(work: str | Path, cells: tuple[tuple[int, int], ...],
                then: np.ndarray | None = None) -> TilePoints:
    """The fields of ``read_cells(work, cells, then)``, the same values in the same order.

    The files are read in steps of :data:`READ_STEP_RECORDS` records into one small buffer
    and each step's fields are copied out at once: the tile's records are never held whole
    (on a 1.4 M-point tile 47 MB less, and its fresh pages, in every classify and audit
    task).
    """
    files = [f for c in cells for f in _cell_files(Path(work), c)]
    sizes = [f.stat().st_size // RECORD.itemsize for f in files]
    out = _PointsFill(sum(sizes) + (0 if then is None else len(then)))
    buf = np.empty(min(READ_STEP_RECORDS, max(sizes, default=0)), dtype=_FILL)
    raw = buf.view(np.uint8)
    for f, m in zip(files, sizes, strict=True):
        with open(f, "rb") as fh:
            for start in range(0, m, len(buf)):
                k = min(len(buf), m - start)
                got = fh.readinto(raw[:k * RECORD.itemsize])
                if got != k * RECORD.itemsize:
                    raise OSError(f"{f}: expected {m * RECORD.itemsize} bytes, read "
                                  f"{start * RECORD.itemsize + got}")
                out.put(buf[:k])
    if then is not None and len(then):
        out.put(_records(then).view(_FILL))
    return out.points


def read_points_at(work: str | Path, cells: tuple[tuple[int, int], ...],
                   positions: np.ndarray, then: np.ndarray | None = None,
                   then_at: np.ndarray | None = None) -> TilePoints:
    """The fields of ``concat_records([read_cells(work, cells)[positions], then[then_at]])``
    (``positions`` ascending) without reading the cells whole: the picked records split
    straight from the memory-mapped cell files and from ``then`` (``unpack_records_at``),
    with no gathered records between (a p10M tile's refinement 10 → 7 ms)."""
    from .classify.kernels import unpack_records_at

    positions = np.asarray(positions, dtype=np.int64)
    extra = np.zeros(0, dtype=np.int64) if then is None or then_at is None \
        else np.asarray(then_at, dtype=np.int64)
    out = _PointsFill(len(positions) + len(extra))
    files = [f for c in cells for f in _cell_files(Path(work), c)]
    sizes = np.array([f.stat().st_size // RECORD.itemsize for f in files], dtype=np.int64)
    starts = np.concatenate([[0], np.cumsum(sizes)])
    if len(positions) and (positions[0] < 0 or positions[-1] >= starts[-1]):
        raise IndexError("record positions beyond the cells' records")
    cuts = np.searchsorted(positions, starts)
    fields = (out.points.xyz, out.points.cls, out.points.key)
    for k, f in enumerate(files):
        a, b = int(cuts[k]), int(cuts[k + 1])
        if a == b:
            continue
        raw = np.memmap(f, dtype=np.uint8, mode="r")
        unpack_records_at(raw, positions[a:b] - starts[k], *fields, out.at)
        out.at += b - a
        del raw
    if len(extra):
        raw = np.ascontiguousarray(_records(then)).view(np.uint8).reshape(-1)
        unpack_records_at(raw, extra, *fields, out.at)
    return out.points


def _read_record_files(files: list[Path], then: np.ndarray | None = None) -> np.ndarray:
    """The records of these bucket files, one after the other, then ``then``."""
    sizes = [f.stat().st_size // RECORD.itemsize for f in files]
    n = sum(sizes)
    out = np.empty(n + (0 if then is None else len(then)), dtype=RECORD)
    at = 0
    for f, m in zip(files, sizes, strict=True):
        with open(f, "rb") as fh:
            got = fh.readinto(out[at:at + m].view(np.uint8))
        if got != m * RECORD.itemsize:
            raise OSError(f"{f}: expected {m * RECORD.itemsize} bytes, read {got}")
        at += m
    if then is not None and len(then):
        out.view(_RAW)[n:] = _records(then)
    return out


def read_context(work: str | Path, tile: TileSpec, margin_m: float | None = None
                 ) -> tuple[np.ndarray, list[tuple[tuple[int, int], np.ndarray]]]:
    """Records of the context cells within ``margin_m`` of the tile box.

    Returns the records and, per context cell, the positions (within that cell's records)
    of the points kept, so per-point results of neighbouring tiles can be looked up.
    """
    from .classify.kernels import records_in_box

    lo0, lo1, hi0, hi1 = tile.near_box(tile.overlap_m if margin_m is None else float(margin_m))
    parts, where = [], []
    for cell in tile.context_cells:
        offset = 0
        picked = []
        for f in _cell_files(Path(work), cell):
            size = f.stat().st_size
            if size == 0:
                continue
            raw = np.memmap(f, dtype=np.uint8, mode="r")
            # the records' x, y tested where they lie (one compiled pass, no copy of the
            # coordinates: TileSpec.near's test), then the kept records gathered
            pos = np.empty(size // RECORD.itemsize, dtype=np.int64)
            sel = pos[:records_in_box(raw, RECORD.itemsize, lo0, lo1, hi0, hi1, pos)]
            records = raw.view(RECORD)
            if len(sel):
                parts.append(take_records(records, sel))
                picked.append(sel + offset)
            offset += len(records)
            del raw, records
        if picked:
            where.append((cell, np.concatenate(picked)))
    return concat_records(parts), where


def _tile_file(work: Path, tile_id: str, what: str) -> Path:
    return work / "tiles" / f"{tile_id}.{what}"


def _make_tiles_folder(work: Path) -> None:
    """The work folder's ``tiles`` folder, made if missing, never the work folder itself (a
    task running after its run failed must not bring back a folder the driver removed)."""
    (work / "tiles").mkdir(exist_ok=True)


# =============================================================================== copies
def cells_of_several_files(work: str | Path, cells: Iterable[tuple[int, int]],
                           part_files: Sequence[int]) -> list[tuple[int, int]]:
    """The cells holding points of two input files or more (``part_files``: the input file
    of every split part, by part number)."""
    work = Path(work)
    return [cell for cell in cells
            if len({part_files[int(f.stem[1:])] for f in _cell_files(work, cell)}) > 1]


def drop_later_copies(work: str | Path, cells: Sequence[tuple[int, int]], step_m: float
                      ) -> dict[str, Any]:
    """Take out of these cells the points that repeat a point of an earlier input file
    (tiles delivered with overlapping buffers, see :mod:`clearaudit.duplicates`).

    A point and its repeat lie in one cell, so cells are independent: the tasks of a run get
    disjoint cells. Runs before the tiles are planned. Each cell's copies are kept in its
    ``copies.npy`` (rows: copy key, ascending; the twin's position among the cell's records
    left), for the classified copy (:class:`TileResults`).

    Parameters
    ----------
    work
        Work folder.
    cells
        The cells (each holding points of two files or more).
    step_m
        Coordinates are compared after rounding to this step. [m]

    Returns
    -------
    dict
        ``dropped`` {cell: points}, ``by_file`` {file id: points}, ``seconds``.
    """
    from .duplicates import later_copies

    t0 = time.perf_counter()
    work = Path(work)
    dropped: dict[tuple[int, int], int] = {}
    by_file: dict[int, int] = {}
    for cell in cells:
        files = _cell_files(work, cell)
        rec = _read_record_files(files)
        key = record_keys(rec)
        copy, twin = later_copies(record_xyz(rec), key >> KEY_SHIFT, step_m)
        if len(copy) == 0:
            continue
        keep = np.ones(len(rec), dtype=bool)
        keep[copy] = False
        place = np.cumsum(keep) - 1  # a kept record's position once the copies are out
        table = np.stack([key[copy], place[twin]])  # copy keys ascend: positions ascend
        # everything written aside first, then put in place (a task that dies midway leaves
        # the cell as it was, or the window of a few renames)
        done = []
        at = 0
        for f in files:
            m = f.stat().st_size // RECORD.itemsize
            part = rec[at:at + m][keep[at:at + m]]
            at += m
            if len(part) < m:
                tmp = f.with_name(f.name + ".tmp")
                with open(tmp, "wb") as fh:
                    write_pieces(fh, part)  # a copy (masked), contiguous
                done.append((tmp, f))
        copies = _cell_dir(work, *cell) / "copies.npy"
        with open(copies.with_name("copies.tmp"), "wb") as fh:
            save_array(fh, table)
        done.append((copies.with_name("copies.tmp"), copies))
        for tmp, f in done:
            os.replace(tmp, f)
        dropped[cell] = len(copy)
        per_file = np.bincount(key[copy] >> KEY_SHIFT)
        for fid in np.flatnonzero(per_file).tolist():
            by_file[fid] = by_file.get(fid, 0) + int(per_file[fid])
    return {"dropped": dropped, "by_file": by_file, "seconds": time.perf_counter() - t0}


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
    ctx_rec, _ = read_context(work, tile)
    points = read_points(work, tile.cells, then=ctx_rec)
    n_own = len(points) - len(ctx_rec)
    xyz, vendor = points.xyz, points.cls
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
        cls = vendor[:n_own].copy()
        hag = np.full(n_own, np.nan, dtype=np.float32)
        full_cls = vendor
        ground_model, timings, info, used = None, {}, {"note": note}, classify_options.to_dict()
    else:
        cls = result.classification[:n_own]
        hag = result.height_above_ground_m[:n_own]
        full_cls = result.classification
        ground_model, timings, info = result.ground, result.timings_s, result.info
        used = result.options
    _make_tiles_folder(work)
    # (save_array: np.save with the data written 1 MiB at a time, io.files; the keys took
    # 18 ms a tile in one call)
    save_array(_tile_file(work, tile.id, "cls.npy"), cls)
    save_array(_tile_file(work, tile.id, "hag.npy"), hag.astype(np.float32))
    save_array(_tile_file(work, tile.id, "key.npy"), points.key[:n_own])
    with open(_tile_file(work, tile.id, "ground.pkl"), "wb") as fh:
        write_pieces(fh, pickle.dumps(ground_model, protocol=pickle.HIGHEST_PROTOCOL))

    # the line model's points: wires, structures, insulators, ground near structures
    model_mask = class_mask(cls, MODEL_CLASSES)
    ground_own = np.flatnonzero(cls == GROUND)
    anchors = [take_rows(xyz, class_mask(full_cls, (TRANSMISSION_TOWER, WIRE_CONNECTOR)))[:, :2]]
    if given_structures_xy is not None and len(given_structures_xy):
        anchors.append(np.asarray(given_structures_xy, dtype=float).reshape(-1, 2))
    anchor_xy = np.concatenate(anchors)
    if len(anchor_xy) and len(ground_own):
        anchor_xy = np.unique(np.floor(anchor_xy), axis=0) + 0.5  # 1 m cells: a small tree
        near = ground_own[near_points(take_rows(xyz, ground_own)[:, :2], anchor_xy,
                                      STRUCTURE_GROUND_RADIUS_M + 1.0)]
        # one ground point per STRUCTURE_GROUND_CELL_M cell: the median height under a
        # structure needs a sample, not every point
        cell = np.floor(take_rows(xyz, near)[:, :2] / STRUCTURE_GROUND_CELL_M).astype(np.int64)
        if len(cell):
            # one number per cell (the rows' order): unique over one column, not over rows
            cell -= column_bounds(cell)[0]
            flat = cell[:, 0] * (int(cell[:, 1].max()) + 1) + cell[:, 1]
            _, first = np.unique(flat, return_index=True)
            model_mask[near[np.sort(first)]] = True
    local = np.flatnonzero(model_mask)
    codes, counts = class_counts(cls)
    ground_z = xyz[ground_own[::97], 2] if len(ground_own) else np.zeros(0)
    return {"tile": tile.id, "n_owned": n_own, "n_context": len(ctx_rec),
            "counts": {int(c): int(k) for c, k in zip(codes, counts, strict=True)},
            "model_xyz": take_rows(xyz, local), "model_cls": cls[local], "model_local": local,
            "ground_z_sample": ground_z, "timings_s": timings, "info": info, "note": note,
            "options": used,
            "seconds": time.perf_counter() - t0, "peak_rss_mb": peak_rss_mb()}


# =============================================================================== task B: refine
def _load(work: Path, tile_id: str, what: str) -> np.ndarray:
    return np.load(_tile_file(work, tile_id, f"{what}.npy"))


#: Per-point labels of the line model, kept sparse on disk (the model labels a few per cent
#: of a tile's points): their row in the tile's ``labels.npy`` table (see
#: :func:`write_model_labels`).
_SPARSE_ROWS = {"wire": 1, "other": 2}


def _labels_at(table: np.ndarray, row: int, positions: np.ndarray) -> np.ndarray:
    """Label ``row`` of a tile's ``labels.npy`` table at owned-point ``positions`` (-1: none)."""
    out = np.full(len(positions), -1, dtype=np.int64)
    m = table.shape[1]
    if m and len(positions):
        i = np.minimum(np.searchsorted(table[0], positions), m - 1)
        hit = np.flatnonzero(table[0][i] == positions)
        out[hit] = table[row][i[hit]]
    return out


def _view(work: Path, tile: TileSpec, tiles_by_cell: dict[tuple[int, int], str],
          names: tuple[str, ...], select: Any = None
          ) -> tuple[TilePoints, int, dict[str, np.ndarray]]:
    """The tile's owned points followed by its context points, and per-point arrays.

    ``names`` are per-point arrays the tiles keep on disk (``cls``, ``rcls``, ``hag``,
    ``wire``, ``other``): the owned points' from this tile, the context points' from the tiles
    that own them.

    ``select(arrays)``, when given, picks points by their arrays (a mask over owned + context
    points): only their records are read (the owned ones gathered from the memory-mapped
    cell files, not read whole) and only their values returned, in the same order; the
    arrays then also hold ``"_owned_at"``, the picked owned points' positions among the
    tile's owned points.

    Returns
    -------
    points, n_owned, {name: array over owned + context points}
    """
    records, where = read_context(work, tile)
    dense = [name for name in names if name not in _SPARSE_ROWS]
    sparse = [name for name in names if name in _SPARSE_ROWS]
    arrays: dict[str, list] = {name: [_load(work, tile.id, name)] for name in dense}
    arrays.update({name: [None] for name in sparse})  # the owned part once its size is known
    offset = 0
    cache: dict[str, tuple[dict[str, np.ndarray], dict]] = {}
    keep = np.ones(len(records), dtype=bool)
    for cell, positions in where:
        n = len(positions)
        tile_id = tiles_by_cell.get(cell)
        if tile_id is None:          # not owned by any tile (never happens for planned cells)
            keep[offset:offset + n] = False
            offset += n
            continue
        if tile_id not in cache:
            data = {name: np.load(_tile_file(work, tile_id, f"{name}.npy"), mmap_mode="r")
                    for name in dense}
            if sparse:
                data["labels"] = _load(work, tile_id, "labels")
            cache[tile_id] = (data, _cell_offsets(work, tile_id))
        data, offsets = cache[tile_id]
        at = offsets[cell] + positions
        for name in dense:
            arrays[name].append(np.asarray(data[name][at]))
        for name in sparse:
            arrays[name].append(_labels_at(data["labels"], _SPARSE_ROWS[name], at))
        offset += n
    if not keep.all():
        records = take_records(records, keep)
    if select is None:
        both = read_points(work, tile.cells, then=records)
        n_own = len(both) - len(records)
    else:  # the owned count from the tile's own files, the records once the points are picked
        n_own = sum(os.path.getsize(f) // RECORD.itemsize for c in tile.cells
                    for f in _cell_files(work, c))
    if sparse:
        table = _load(work, tile.id, "labels")
        for name in sparse:
            own = np.full(n_own, -1, dtype=np.int64)
            own[table[0]] = table[_SPARSE_ROWS[name]]
            arrays[name][0] = own
    out = {name: np.concatenate(parts) for name, parts in arrays.items()}
    if select is None:
        return both, n_own, out
    # the picked points' positions once (about a fifth of the points): each array is then
    # gathered, not masked again over all of them
    picked = np.flatnonzero(np.asarray(select(out), dtype=bool))
    cut = int(np.searchsorted(picked, n_own))
    owned_at = picked[:cut]
    both = read_points_at(work, tile.cells, owned_at, records, picked[cut:] - n_own)
    out = {name: a[picked] for name, a in out.items()}
    out["_owned_at"] = owned_at
    return both, len(owned_at), out


def write_model_labels(work: str | Path, tile: TileSpec, at: np.ndarray, wire: np.ndarray,
                       other: np.ndarray) -> None:
    """Keep the line model's labels of a tile's owned points on disk (sparse: the points the
    model was built from, a few per cent of the tile's points).

    Parameters
    ----------
    work
        Work folder.
    tile
        The tile.
    at
        Positions among the tile's owned points of the points given, ascending.
    wire
        Their wire labels (``LineModel.wire_point_labels``; -1 none). Every other owned point
        has none.
    other
        Their indices of the other (crossing) wire (-1 none).
    """
    at = np.asarray(at, dtype=np.int64)
    if len(at) > 1 and np.any(np.diff(at) <= 0):
        raise ValueError("the positions of the labelled points must be strictly ascending")
    table = np.empty((3, len(at)), dtype=np.int64)
    table[0], table[1], table[2] = at, wire, other
    save_array(_tile_file(Path(work), tile.id, "labels.npy"), table)


@dataclass
class _ViewResult:
    classification: np.ndarray
    height_above_ground_m: np.ndarray
    counts: dict = field(default_factory=dict)
    info: dict = field(default_factory=dict)


@dataclass
class _ViewModel:
    structures: list
    spans: list
    wire_point_labels: np.ndarray


def refine_tile(work: str | Path, tile: TileSpec, tiles_by_cell: dict[tuple[int, int], str],
                ctx: TileContext, line: Any) -> dict[str, Any]:
    """Correct a tile's classes with the line model (:func:`clearaudit.classify.refine_with_model`).

    The tile's owned points and their context (the classes of the classify stage, so the result
    does not depend on the order the tiles run in) are refined together; the owned points'
    corrected classes are kept (``rcls``) for the audit and the classified copy.

    Parameters
    ----------
    work
        Work folder.
    tile
        The tile.
    tiles_by_cell
        Owner tile id of every occupied cell.
    ctx
        Origin, CRS and units.
    line
        What the tiles need of the line model: ``structures`` and ``spans``
        (``LineModel.structures`` and ``LineModel.spans``), and optionally ``extents``
        (:func:`clearaudit.classify.refine.structure_extents` of the model with the default
        margin, computed once for all tiles; without it each tile computes them: on the
        50 km line 36 ms a tile, every tile going through every span's wires).

    Returns
    -------
    dict
        ``changes`` {"old->new": points}, ``counts`` {class: owned points}, ``seconds``,
        ``peak_rss_mb``.
    """
    from .classify import refine_with_model

    t0 = time.perf_counter()
    work = Path(work)
    # only the points the corrections can read or change (refine_with_model: more than
    # 0.3 m above ground, or of a wire or hardware class) are read: the same classes as a
    # view of every point, for about a fifth of the records on a vegetated corridor
    points, n_pick, arrays = _view(work, tile, tiles_by_cell, ("cls", "hag", "wire"),
                                   select=_refine_reads)
    owned_at = arrays.pop("_owned_at")
    cls = _load(work, tile.id, "cls").astype(np.uint8)
    before = cls.copy()
    result = _ViewResult(arrays["cls"].astype(np.uint8), arrays["hag"].astype(np.float64))
    if len(points):
        refine_with_model(_cloud(ctx, points.xyz, result.classification), result,
                          _ViewModel(line.structures, line.spans, arrays["wire"]),
                          extents=getattr(line, "extents", None))
    cls[owned_at] = result.classification[:n_pick]
    n_own = len(cls)
    save_array(_tile_file(work, tile.id, "rcls.npy"), cls)
    changed = np.flatnonzero(cls != before)
    changes: dict[str, int] = {}
    if len(changed):
        pairs, n = np.unique(before[changed].astype(np.int32) * 256 + cls[changed],
                             return_counts=True)
        changes = {f"{p // 256}->{p % 256}": int(c) for p, c in zip(pairs, n, strict=True)}
    codes, counts = class_counts(cls)
    return {"tile": tile.id, "n_owned": n_own, "changes": changes,
            "counts": {int(c): int(k) for c, k in zip(codes, counts, strict=True)},
            "seconds": time.perf_counter() - t0, "peak_rss_mb": peak_rss_mb()}


def _refine_reads(arrays: dict[str, np.ndarray]) -> np.ndarray:
    """The points :func:`clearaudit.classify.refine_with_model` reads or changes: those more
    than 0.3 m above ground (every step works among them) and those of a wire or hardware
    class at any height (isolated vegetation next to them takes their class)."""
    # compared in float64 as refine_with_model compares (a float32 0.3 lies above 0.3)
    return (arrays["hag"].astype(np.float64) > 0.3) | class_mask(
        arrays["cls"], (WIRE_GUARD, WIRE_CONDUCTOR, WIRE_CONNECTOR))


# =============================================================================== task C: audit
def tile_states(plan: Any, tile: TileSpec) -> np.ndarray:
    """Indices of the wire states whose curves come near a tile (within the search distances
    plus the tile's overlap)."""
    opts = plan.options
    margin = max(plan.buffer_m, opts.fall_in_buffer_m) + plan.pad_m + 10.0 + tile.overlap_m
    x0, y0, x1, y1 = tile.box
    b = plan.state_boxes
    if len(b) == 0:
        return np.zeros(0, dtype=np.int64)
    return np.flatnonzero((b[:, 0] <= x1 + margin) & (b[:, 2] >= x0 - margin)
                          & (b[:, 1] <= y1 + margin) & (b[:, 3] >= y0 - margin))


def audit_tile(work: str | Path, tile: TileSpec, tiles_by_cell: dict[tuple[int, int], str],
               plan: Any, model: Any, rules: Any, label_base: int = 0) -> dict[str, Any]:
    """The clearance findings of one tile (:func:`clearaudit.audit.engine.point_findings`).

    The tile's owned points and its context (refined classes, heights above ground, other
    wires) make one block; findings are kept for the owned points, while tree crowns and
    building footprints are formed with the context, so the driver
    (:func:`clearaudit.audit.engine.merge_findings`) can join obstacles across the seams.

    Parameters
    ----------
    work
        Work folder (holds the split cells and the tiles' per-point results).
    tile
        The tile.
    tiles_by_cell
        Owner tile id of every occupied cell.
    plan
        :class:`clearaudit.audit.engine.WireStates`.
    model
        The line model (span ends for the ground profiles).
    rules
        The rule set.
    label_base
        Makes the tile's building footprint ids unique across tiles.

    Returns
    -------
    dict
        ``block`` (:class:`~clearaudit.audit.engine.BlockFindings`), ``n_owned``,
        ``seconds``, ``peak_rss_mb``.
    """
    from .audit.engine import point_findings

    t0 = time.perf_counter()
    work = Path(work)
    points, n_own, arrays = _view(work, tile, tiles_by_cell, ("rcls", "hag", "other"))
    with open(_tile_file(work, tile.id, "ground.pkl"), "rb") as fh:
        ground_model = pickle.load(fh)
    block = point_findings(points.xyz, arrays["rcls"], arrays["hag"].astype(np.float64), plan,
                           model, rules, keys=points.key, owned_box=tile.box,
                           ground_model=ground_model, other_wire=arrays["other"],
                           state_indices=tile_states(plan, tile), label_base=label_base)
    return {"tile": tile.id, "block": block, "n_owned": n_own,
            "seconds": time.perf_counter() - t0, "peak_rss_mb": peak_rss_mb()}



def _cell_offsets(work: Path, tile_id: str) -> dict[tuple[int, int], int]:
    with open(_tile_file(work, tile_id, "cells.pkl"), "rb") as fh:
        return pickle.load(fh)


def write_cell_offsets(work: str | Path, tile: TileSpec) -> None:
    """Record where each owned cell's records start among the tile's owned records."""
    offsets, at = {}, 0
    for cell in tile.cells:
        offsets[cell] = at
        at += sum(os.path.getsize(f) // RECORD.itemsize for f in _cell_files(Path(work), cell))
    _make_tiles_folder(Path(work))
    with open(_tile_file(Path(work), tile.id, "cells.pkl"), "wb") as fh:
        pickle.dump(offsets, fh)


# =============================================================================== classified copy
class TileResults:
    """Per-point results of all tiles, looked up by (file, point range) for the writer.

    A tile's owned points are its cells' points one cell after the other, each cell's in input
    order: the keys ascend within each cell (a run) and interleave across cells. A lookup
    searches each run whose key range meets the asked range, and reads the results of that
    run's slice, so nothing is re-sorted or rewritten. Lookups memory-map a tile's files only
    while they read from it: pages read stay counted in the resident memory only while
    mapped, so the writer's memory does not grow with the survey.
    """

    def __init__(self, work: str | Path, tiles: list[TileSpec],
                 cells_with_copies: Iterable[tuple[int, int]] = ()):
        self.work = Path(work)
        self.parts: list[tuple[tuple[Path, ...], np.ndarray, int, int]] = []
        self.copies: list[tuple[Path, tuple[Path, ...], int, int, int]] = []
        cells_with_copies = set(cells_with_copies)
        for t in tiles:
            # the classes refined with the line model when that stage ran
            cls_name = "rcls.npy" if _tile_file(self.work, t.id, "rcls.npy").exists() \
                else "cls.npy"
            paths = tuple(_tile_file(self.work, t.id, w) for w in ("key.npy", cls_name, "hag.npy"))
            key = np.load(paths[0], mmap_mode="r")
            n = len(key)
            if n:
                starts = sorted(set(_cell_offsets(self.work, t.id).values()) | {0})
                bounds = np.array([s for s in starts if s < n] + [n], dtype=np.int64)
                # per run: start, stop, first and last key
                runs = np.column_stack([bounds[:-1], bounds[1:], key[bounds[:-1]],
                                        key[bounds[1:] - 1]])
                # the keys may only fall back where a cell's run starts
                falls = np.flatnonzero(key[1:] <= key[:-1]) + 1
                if not np.all(np.isin(falls, bounds)):
                    raise RuntimeError(f"tile {t.id}: its keys do not ascend within a cell")
                self.parts.append((paths, runs, int(runs[:, 2].min()), int(runs[:, 3].max())))
                # points left out as repeats of another file's points (drop_later_copies):
                # their twin's results, found by the twin's place in the cell
                repeats = [c for c in t.cells if c in cells_with_copies]
                if repeats:
                    offsets = _cell_offsets(self.work, t.id)
                    for c in repeats:
                        path = _cell_dir(self.work, *c) / "copies.npy"
                        table = np.load(path, mmap_mode="r")
                        self.copies.append((path, paths, offsets[c], int(table[0, 0]),
                                            int(table[0, -1])))
                        del table
            del key

    def values(self, file_id: int, start: int, stop: int):
        """``(has_new, codes, {"height_above_ground": hag})`` for points start:stop."""
        n = stop - start
        has_new = np.zeros(n, dtype=bool)
        codes = np.zeros(n, dtype=np.uint8)
        hag = np.full(n, np.nan, dtype=np.float32)
        lo = (np.int64(file_id) << KEY_SHIFT) | np.int64(start)
        hi = (np.int64(file_id) << KEY_SHIFT) | np.int64(stop)
        for paths, runs, kmin, kmax in self.parts:
            if kmax < lo or kmin >= hi:
                continue
            meet = runs[(runs[:, 3] >= lo) & (runs[:, 2] < hi)]
            if len(meet) == 0:
                continue
            key = np.load(paths[0], mmap_mode="r")
            cls = np.load(paths[1], mmap_mode="r")
            height = np.load(paths[2], mmap_mode="r")
            for r0, r1, _, _ in meet.tolist():
                a, b = (r0 + int(v) for v in np.searchsorted(key[r0:r1], [lo, hi]))
                if b > a:
                    at = np.array(key[a:b]) - lo
                    has_new[at] = True
                    codes[at] = cls[a:b]
                    hag[at] = height[a:b]
            del key, cls, height  # unmapped here: their pages leave the resident set
        for copies, paths, start, kmin, kmax in self.copies:
            if kmax < lo or kmin >= hi:
                continue
            table = np.load(copies, mmap_mode="r")
            a, b = (int(v) for v in np.searchsorted(table[0], [lo, hi]))
            if b > a:
                at = np.array(table[0, a:b]) - lo
                twin = start + np.asarray(table[1, a:b])
                has_new[at] = True
                codes[at] = np.load(paths[1], mmap_mode="r")[twin]
                hag[at] = np.load(paths[2], mmap_mode="r")[twin]
            del table
        return has_new, codes, {"height_above_ground": hag}


__all__ = ["Corridor", "Grid", "RECORD", "SplitPart", "TileContext", "TileResults", "TileSpec",
           "audit_tile", "cells_of_several_files", "classify_tile", "drop_cell_records",
           "drop_later_copies", "peak_rss_mb", "plan_parts", "plan_tiles",
           "read_cells", "read_context", "refine_tile", "split_part", "tile_states",
           "write_cell_offsets", "write_model_labels"]

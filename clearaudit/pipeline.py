"""The audit as a chain of named stages, with progress, a run record and atomic outputs.

Stages (each timed, with the process's peak memory recorded after it):

``validate``  read the line file, structures, rule set and conductors; check the inputs exist —
              everything that can fail on bad input fails here, before heavy work;
``read``      read the clouds (chunked, culled to the corridor around the structures if known);
              the raw point records of compressed inputs go to a scratch folder as they are
              decoded (when the disk has room; ``run.json`` ``classified_copy``), so the
              classified copy does not decode them again;
``classify``  ground, height above ground, noise, wires, structures, vegetation, buildings;
``model``     structures, spans, tension sections, wire separation and catenary fits;
``audit``     survey temperature, conditions (survey, MOT, wind, ice), clearances, priorities;
``tolerance`` construction check against design sags (only with design values);
``write``     spans.csv, violations.csv/.geojson, line.gpkg, model.json, classified.laz, run.json,
              report.html — into a temporary folder renamed to ``--out`` only when complete.
"""
from __future__ import annotations

import datetime as _dt
import json
import os
import platform
import shutil
import sys
import tempfile
import time
from collections.abc import Callable, Iterable
from contextlib import contextmanager, nullcontext
from dataclasses import dataclass, field, replace
from functools import partial
from importlib import import_module
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import numpy as np

from . import CAUTION, __version__
from .errors import ClearauditError, InputError, StageError, StorageError, is_disk_full

OUTPUT_SCHEMA_VERSION = "1.0"


@dataclass
class AuditOptions:
    """Options of one audit run (recorded in run.json)."""

    clouds: list[Path]
    out: Path
    line_file: Path | None = None
    crs: str | None = None
    voltage_kv: float | None = None
    units: str = "metric"
    trust_classes: bool = False
    survey_temperature_c: float | None = None
    max_operating_temperature_c: float | None = None
    structures_file: str | Path | None = None
    overwrite: bool = False
    workers: int = 0
    scheduler: str | None = None
    #: Threads of the in-process run (0: every core); see clearaudit/threads.py.
    threads: int = 0
    corridor_buffer_m: float = 60.0
    skip_report: bool = False
    #: Tiled (bounded-memory) run: None = automatic (:func:`choose_mode`), True / False to
    #: force it.
    tiled: bool | None = None
    #: The most points a tile owns; None: 1 500 000, or fewer so that a small survey still
    #: makes two or three tiles (:func:`clearaudit.tiling.tile_target`).
    tile_points: int | None = None
    tile_cell_m: float = 100.0
    tile_overlap_m: float = 40.0
    #: With two threads or more, a survey above this many points (header count) runs tiled:
    #: the most points that make one tile (:func:`clearaudit.tiling.tile_target`: 60 % of a
    #: small survey's points a tile, at least 400 000); above them its two or more tiles run
    #: in parallel, and the line's modules are imported beside its read stage. On 2 cores
    #: the tiled run was the faster from the real crops of 0.70 and 0.89 M points (3-5 %) to
    #: the demo line and the 2 km line of 1.1-1.2 M (15-17 %) and on to p10M
    #: (docs/scaling.md, "Which run"). A number here, not computed from tiling's constants:
    #: importing clearaudit.tiling loads laspy, which these options must not (a test holds
    #: the two together).
    tiled_min_points: int = 666_665
    in_memory_max_points: int = 20_000_000
    in_memory_max_footprint_m2: float = 25e6  # 25 km² of bounding box (5 km × 5 km)
    work_dir: Path | None = None
    #: Where the output folder will be once its caller moves it into place (a network run
    #: keeps each line beside its own folder until the last line has run); None: ``out``.
    #: Recorded in run.json as ``output_folder`` and named by the report.
    final_out: Path | None = None

    def to_dict(self) -> dict[str, Any]:
        return {k: (str(v) if isinstance(v, Path) else
                    [str(x) for x in v] if isinstance(v, list) else v)
                for k, v in self.__dict__.items()}


@dataclass
class RunRecord:
    """What the run did: inputs with hashes, options, versions, stage timings."""

    command: list[str]
    started: str
    options: dict[str, Any]
    stages: list[dict[str, Any]] = field(default_factory=list)
    inputs: list[dict[str, Any]] = field(default_factory=list)
    missing_stages: list[str] = field(default_factory=list)
    extra: dict[str, Any] = field(default_factory=dict)

    @contextmanager
    def stage(self, name: str, engine=None):
        from .distributed import check_stop

        check_stop()  # lines of a network side by side: one stopped, all stop
        t0 = time.perf_counter()
        c0 = time.process_time()
        entry: dict[str, Any] = {"name": name}
        try:
            yield entry
        finally:
            from .tiling import peak_rss_mb, release_free_memory

            release_free_memory()
            # CPU time of this process (all its threads; not of Dask worker processes): on a
            # shared machine it follows the work done more closely than the wall time
            entry.update({"seconds": round(time.perf_counter() - t0, 3),
                          "cpu_seconds": round(time.process_time() - c0, 3),
                          "peak_rss_mb": round(peak_rss_mb(), 1)})
            if engine is not None and engine.name != "in-process":
                entry["worker_peak_rss_mb"] = engine.worker_peak_memory_mb()
            self.stages.append(entry)

    def to_dict(self) -> dict[str, Any]:
        return {
            "schema": f"clearaudit.run/{OUTPUT_SCHEMA_VERSION}",
            "clearaudit_version": __version__, "command": self.command, "started": self.started,
            "finished": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
            "machine": {"python": sys.version.split()[0], "platform": platform.platform()},
            "versions": package_versions(), "inputs": self.inputs, "options": self.options,
            "stages": self.stages, "missing_stages": self.missing_stages, "caution": CAUTION,
            **self.extra,
        }


def package_versions() -> dict[str, str]:
    from importlib import metadata

    out = {}
    for name in ("numpy", "scipy", "laspy", "lazrs", "open3d", "pyvista", "pyproj", "matplotlib",
                 "dask", "distributed", "rich"):
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


# ------------------------------------------------------------------------------ output folder

#: Files that mark a folder as an earlier output (of ``audit`` or of ``network``).
OUTPUT_MARKERS = ("run.json", "network.json")


def refuse_out_over_inputs(out: Path, inputs: Iterable[str | Path]) -> None:
    """The output folder is replaced whole (``--overwrite``): refuse one that is, or holds,
    an input (InputError naming ``--out``)."""
    target = Path(out).resolve()
    for p in inputs:
        q = Path(p).resolve()
        if q == target or target in q.parents:
            raise InputError("--out", f"{out} holds the input {p}; write the results to "
                                      "another folder")


@contextmanager
def atomic_output_dir(out: Path, overwrite: bool):
    """Yield a temporary folder beside ``out``; move it into place only on success."""
    out = Path(out).resolve()  # "." or "dir/.." name their folder
    if out.exists() and not out.is_dir():
        raise InputError(out, "output path exists and is not a folder")
    if out.exists() and any(out.iterdir()):
        if not overwrite:
            raise InputError(out, "output folder already exists and is not empty "
                                  "(use --overwrite to replace it)")
        # --overwrite replaces the folder whole: only an earlier output of this tool
        if not any((out / name).is_file() for name in OUTPUT_MARKERS):
            raise InputError(out, "is not an earlier clearaudit output folder (it holds no "
                                  f"{' or '.join(OUTPUT_MARKERS)}), and --overwrite replaces "
                                  "the whole folder: choose a new or empty folder")
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    except OSError as exc:
        raise InputError(out, f"cannot be created ({exc.strerror or exc})") from None
    try:
        yield tmp
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    if out.exists():
        old = out.with_name(f".{out.name}.old-{int(time.time())}")
        out.rename(old)
        tmp.rename(out)
        shutil.rmtree(old, ignore_errors=True)
    else:
        tmp.rename(out)


# ----------------------------------------------------------------------------------- the run

def _progress_bar(console):
    from rich.progress import BarColumn, Progress, TaskProgressColumn, TextColumn, TimeElapsedColumn

    return Progress(TextColumn("[bold]{task.description:<10}"), BarColumn(),
                    TaskProgressColumn(), TextColumn("{task.fields[rate]}"),
                    TimeElapsedColumn(), console=console, transient=False,
                    disable=console is None)


def _stage_progress(bar, task) -> Callable[[Any, float], None]:
    """A progress callback for one stage.

    Accepts ``(done, total)`` counts (points, spans, wires) or ``(step_name, fraction)``.
    """
    t0 = time.perf_counter()

    def update(done: Any, total: float) -> None:
        if isinstance(done, str):
            bar.update(task, completed=float(total) * 100.0, total=100.0, rate=done)
            return
        dt = max(time.perf_counter() - t0, 1e-9)
        bar.update(task, completed=done, total=max(total, 1),
                   rate=f"{done / dt / 1e6:.2f} M pts/s" if total > 1000 else "")
    return update


def run_audit(options: AuditOptions, console=None, *, show_summary: bool = True):
    """Run the whole audit; returns the output folder path.

    ``console``: progress bars and (with ``show_summary``) the closing summary go there."""
    from .distributed import check_engine
    from .threads import blas_one_thread, fewer_gc_passes, run_threads
    from .tiling import small_pages

    check_engine(options)  # threads, workers, scheduler (it must answer) before any work
    try:
        with run_threads(options.threads), small_pages(), blas_one_thread(), fewer_gc_passes():
            return _run_audit(options, console, show_summary)
    except ClearauditError:
        raise
    except Exception as exc:
        if not is_disk_full(exc):
            raise
        out_parent = Path(options.out).absolute().parent
        work = Path(options.work_dir).absolute() if options.work_dir else out_parent
        raise StorageError(list(dict.fromkeys((out_parent, work))),
                           "no space left on the device") from exc


def _run_audit(options: AuditOptions, console=None, show_summary: bool = True):
    record = RunRecord(command=sys.argv[:], options=options.to_dict(),
                       started=_dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"))
    cluster = None
    if options.workers:
        # a local cluster starts (workers spawn and import) while the inputs are validated
        from .distributed import LocalClusterStart

        cluster = LocalClusterStart(options.workers)
    try:
        return _validate_and_run(options, record, cluster, console, show_summary)
    finally:
        if cluster is not None:
            cluster.close()


def refuse_unwritable(folder: Path, option: str) -> None:
    """Raise :class:`InputError` naming ``option`` when ``folder`` (or, where it does not exist
    yet, the nearest folder above it, in which it would be made) cannot take new files: a
    read-only file system, missing permission, or a file in the way. Nothing is created."""
    probe = folder
    while not probe.exists() and probe != probe.parent:
        probe = probe.parent
    if not probe.is_dir():
        raise InputError(option, f"{folder} cannot be created: {probe} is a file, not a folder")
    if not os.access(probe, os.W_OK | os.X_OK):
        reason = "read-only file system" if _read_only(probe) else "no permission to write"
        raise InputError(option, f"cannot write in {probe} ({reason})")


def _read_only(folder: Path) -> bool:
    try:
        return bool(os.statvfs(folder).f_flag & os.ST_RDONLY)
    except OSError:
        return False


def _validate_and_run(options: AuditOptions, record: RunRecord, cluster: Any, console=None,
                      show_summary: bool = True):
    from .config import load_line_file, read_structures_csv
    from .io.las import file_sha256, resolve_inputs

    # ---- validate: all input checks before heavy work
    with record.stage("validate"):
        paths = resolve_inputs(options.clouds)
        config = load_line_file(options.line_file)
        if options.voltage_kv is not None:
            config.line.voltage_kv = float(options.voltage_kv)
        if options.max_operating_temperature_c is not None:
            config.line.max_operating_temperature_c = float(options.max_operating_temperature_c)
        if options.survey_temperature_c is not None:
            config.survey.conductor_temperature_c = float(options.survey_temperature_c)
        if options.trust_classes:
            config.trust_classes = True
        if options.structures_file:
            config.structures_file = Path(options.structures_file)
        if config.line.voltage_kv is None:
            raise InputError(options.line_file or "--voltage-kv",
                             "the line voltage is unknown: give --voltage-kv or [line] voltage_kv")
        structures_rows = (read_structures_csv(config.structures_file)
                           if config.structures_file else None)
        conductors = resolve_conductors(config)
        from .audit.rules import load_rule_set

        rules = load_rule_set(config.line.rule_set, config.clearance,
                              base_dir=config.source.parent if config.source else None)
        # the output folder's and the work folder's places must take files (before any work)
        refuse_unwritable(Path(options.out).absolute().parent, "--out")
        if options.work_dir:
            refuse_unwritable(Path(options.work_dir).absolute(), "--work-dir")
        refuse_out_over_inputs(options.out, [*paths, *([config.source] if config.source else []),
                                             *([config.structures_file]
                                               if config.structures_file else [])])
        record.inputs = [{"path": str(p), "bytes": p.stat().st_size} for p in paths]
        if config.source:
            record.inputs.append({"path": str(config.source), "sha256": file_sha256(config.source),
                                  "role": "line file"})
        if config.structures_file:
            record.inputs.append({"path": str(config.structures_file), "role": "structures",
                                  "sha256": file_sha256(Path(config.structures_file))})
        record.options["line_config"] = config.to_dict()
        record.options["rule_set"] = rules.describe()

    total_points, footprint_m2 = _header_extent(paths, options.crs)
    from .threads import blas_threads, inner_threads
    from .tiling import numpy_huge_page_requests

    threads = inner_threads()
    tiled, mode_reason = choose_mode(options, total_points, footprint_m2, threads,
                                     available_memory_bytes())
    record.extra["execution"] = {"mode": "tiled" if tiled else "in-memory",
                                 "mode_reason": mode_reason,
                                 "threads": threads,
                                 # numpy's transparent-huge-page requests (tiling.small_pages)
                                 "numpy_huge_page_requests": numpy_huge_page_requests(),
                                 # BLAS / LAPACK threads (threads.blas_one_thread)
                                 "blas_threads": blas_threads(),
                                 # the stages run with glibc's freed blocks kept for
                                 # reuse (tiling.kept_heap): "all", "read" or "none"
                                 "heap_kept": "none",
                                 "header_points": total_points,
                                 "header_footprint_km2": round(footprint_m2 / 1e6, 3)}
    if tiled:
        summary = _run_tiled(options, record, paths, config, structures_rows, conductors, rules,
                             console, cluster)
        if console is not None and show_summary:
            from .outputs import print_summary

            print_summary(console, summary, options.out, options.units)
        return options.out

    # the raw point records of compressed inputs are kept in a scratch folder beside the
    # output (never inside it) while they are read, for classified.laz; removed whatever happens
    scratch_parent = Path(options.work_dir) if options.work_dir else Path(options.out).parent
    scratch_parent.mkdir(parents=True, exist_ok=True)
    scratch = Path(tempfile.mkdtemp(prefix=".clearaudit-records-", dir=scratch_parent))
    from .tiling import kept_heap

    try:
        with kept_heap() as kept:
            if kept:
                record.extra["execution"]["heap_kept"] = "all"
            return _run_in_memory(options, record, paths, config, structures_rows, conductors,
                                  rules, total_points, scratch, console, show_summary)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)


def _run_in_memory(options: AuditOptions, record: RunRecord, paths: list[Path], config: Any,
                   structures_rows: list[dict] | None, conductors: dict, rules: Any,
                   total_points: int, scratch: Path, console=None, show_summary: bool = True):
    """The in-memory run: read every (corridor) point, classify, model, audit, write."""
    from .cloud import Cloud
    from .duplicates import cloud_copies, compare_step_m
    from .io.las import corridor_mask, inputs_crs, plan_record_scratch, read_cloud

    with atomic_output_dir(options.out, options.overwrite) as tmp, _progress_bar(console) as bar:
        # ---- read
        with record.stage("read"):
            task = bar.add_task("read", total=None, rate="")
            keep = None
            if structures_rows and options.corridor_buffer_m > 0:
                _, unit_m, _ = inputs_crs(paths, crs=options.crs)
                poly = np.array([[r["x"], r["y"]] for r in structures_rows])
                keep = corridor_mask(poly, options.corridor_buffer_m / unit_m)
            records, record.extra["classified_copy"] = plan_record_scratch(
                paths, scratch / "records",
                reserve_bytes=_reserve_bytes(paths, total_points, tiled=False))
            cloud = read_cloud(paths, crs=options.crs, keep=keep, fields=(),
                               progress=_stage_progress(bar, task), records=records)
            for info, entry in zip(cloud.sources, record.inputs, strict=False):
                entry.update({"sha256": info.sha256, "point_count": info.point_count,
                              "point_format": info.point_format, "las_version": info.version,
                              "crs": info.crs_origin, "withheld_points": info.withheld_points})
            record.extra["withheld_points"] = sum(i.withheld_points for i in cloud.sources)
            # points delivered twice (tiles with overlapping buffers) counted once; the
            # whole read's bookkeeping (``read``) kept for classified.laz, where a copy gets
            # its twin's results (``twin_of``: every point's place in the cloud analysed)
            read, twin_of = cloud, None
            step = compare_step_m(cloud.sources, cloud.unit_m)
            copy, twin, n_pairs = cloud_copies(cloud.xyz, cloud.source_id, step)
            record.extra["repeated_points"] = {"files_overlapping": n_pairs,
                                               "points": int(len(copy)), "by_file": {},
                                               "compare_step_m": step}
            if len(copy):
                keep = np.ones(cloud.n_points, dtype=bool)
                keep[copy] = False
                twin_of = np.cumsum(keep) - 1
                twin_of[copy] = twin_of[twin]
                files, counts = np.unique(cloud.source_id[copy], return_counts=True)
                record.extra["repeated_points"]["by_file"] = {
                    cloud.sources[int(f)].path: int(c)
                    for f, c in zip(files, counts, strict=True)}
                # the writer needs the points' files and places, not their coordinates:
                # the whole read's coordinates are not kept (an unwritten array holds no
                # memory)
                read = Cloud(xyz=np.empty((cloud.n_points, 3)), origin=cloud.origin,
                             crs=cloud.crs, horizontal_unit_m=cloud.horizontal_unit_m,
                             vertical_unit_m=cloud.vertical_unit_m,
                             classification=np.zeros(cloud.n_points, dtype=np.uint8),
                             source_id=cloud.source_id, source_index=cloud.source_index,
                             sources=cloud.sources)
                cloud = cloud.subset(keep)
                del keep
            del copy, twin
            record.extra["points_read"] = cloud.n_points
            record.extra["crs"] = None if cloud.crs is None else cloud.crs.to_string()
            record.extra["horizontal_unit_m"] = cloud.horizontal_unit_m
            record.extra["vertical_unit_m"] = cloud.vertical_unit_m

        # ---- classify
        from .classify import ClassifyOptions, classify

        with record.stage("classify"):
            task = bar.add_task("classify", total=None, rate="")
            cls = classify(cloud, ClassifyOptions(trust_classes=config.trust_classes),
                           progress=_stage_progress(bar, task))
            cloud.classification = cls.classification
            record.extra["class_counts"] = {str(k): v for k, v in sorted(cls.counts.items())}
            record.extra["classification"] = {"options": cls.options, "timings_s": cls.timings_s}

        # ---- model
        from .model import build_line_model

        with record.stage("model"):
            task = bar.add_task("model", total=None, rate="")
            structures_local = None
            if structures_rows:
                structures_local = [
                    {**r, "xy": cloud.from_crs(np.array([r["x"], r["y"], cloud.origin[2]]))[:2]}
                    for r in structures_rows]
            from .distributed import InProcessEngine
            from .model.line import fit_jobs
            from .threads import inner_threads

            # the catenary fits on this run's threads (their loop runs without the GIL)
            model = build_line_model(
                cloud, structures=structures_local,
                unit_weight_n_per_m={"phase": conductors["phase"].unit_weight_n_per_m,
                                     "shield": conductors["shield"].unit_weight_n_per_m},
                bundle=config.phase.bundle, progress=_stage_progress(bar, task),
                map_fits=partial(InProcessEngine(inner_threads()).map_batches, fit_jobs))

            # Classes the line model can settle: trees under wires that looked like towers,
            # tower parts that looked like foliage or wire (see docs/classification.md).
            from .classify import refine_with_model

            record.extra["classification"]["refine_with_model"] = refine_with_model(
                cloud, cls, model)
            cloud.classification = cls.classification
            record.extra["class_counts"] = {str(k): v for k, v in sorted(cls.counts.items())}

        # ---- classified.laz: the classes are final once the model has refined them. When the
        # inputs' compressed layers are copied (little of the GIL needed) it is written on a
        # thread of its own while the audit runs (as in the tiled run)
        background: _Background | None = None
        copy_writer = None
        if (records is not None and records.layers) or twin_of is not None:
            from .io.las import write_classified

            codes = cls.classification.copy()
            hag = cls.height_above_ground_m.astype(np.float32)
            if twin_of is not None:  # every point read, a copy with its twin's results
                codes, hag = codes[twin_of], hag[twin_of]
            copy_writer = partial(write_classified, read, classification=codes,
                                  extra_dims={"height_above_ground": (
                                      hag, "height above ground [m]")},
                                  records=records, report=record.extra.get("classified_copy"))
        if records is not None and records.layers:
            background = _Background(partial(copy_writer, path=tmp / "classified.laz"),
                                     name="clearaudit-classified-copy")

        def classified_beside(path: Path) -> None:
            _wait_for_copy(background, record)

        try:
            # ---- audit
            from .audit import audit_line

            with record.stage("audit"):
                task = bar.add_task("audit", total=None, rate="")
                audit = audit_line(cloud, cls, model, config, conductors, rules,
                                   progress=_stage_progress(bar, task))

            # ---- tolerance (construction check) when design values are given
            tolerance_rows = None
            if config.design:
                from .audit.tolerance import check_tolerance

                with record.stage("tolerance"):
                    tolerance_rows = check_tolerance(model, audit, config, conductors)

            # ---- write
            with record.stage("write"):
                task = bar.add_task("write", total=None, rate="")
                from .outputs import write_outputs

                summary = write_outputs(tmp, cloud, cls, model, audit, config, conductors, rules,
                                        record, tolerance_rows=tolerance_rows,
                                        progress=_stage_progress(bar, task), records=records,
                                        classified_writer=(
                                            classified_beside if background is not None
                                            else copy_writer))
        finally:
            if background is not None:
                background.stop()  # an error: let it finish before the folders go
        _finish_record_and_report(tmp, record, options)
    if console is not None and show_summary:
        from .outputs import print_summary

        print_summary(console, summary, options.out, options.units)
    return options.out


#: Points of repeated-point search per task (:func:`clearaudit.tiling.drop_later_copies`).
COPY_TASK_POINTS = 2_000_000


def _cell_groups(shared: list[tuple[int, int]], counts: dict[tuple[int, int], int]
                 ) -> list[list[tuple[int, int]]]:
    """The cells to search for repeated points, in groups of about
    :data:`COPY_TASK_POINTS` points (one task each)."""
    groups: list[list[tuple[int, int]]] = []
    size = COPY_TASK_POINTS
    for cell in shared:
        if size >= COPY_TASK_POINTS:
            groups.append([])
            size = 0
        groups[-1].append(cell)
        size += counts[cell]
    return groups


def _reserve_bytes(paths: list[Path], total_points: int, tiled: bool) -> int:
    """Disk the run writes besides the record scratch, roughly: classified.laz (about the
    inputs' size plus the height above ground, 4 B/point) and, tiled, the cell buckets and the
    tiles' per-point files. [bytes]"""
    per_point = 4
    if tiled:
        from .tiling import RECORD

        # buckets, then key (8), cls (1), hag (4), rcls (1), wire (8), other (8) per tile point
        per_point += RECORD.itemsize + 30
    return sum(p.stat().st_size for p in paths) + per_point * int(total_points)


def _finish_record_and_report(tmp: Path, record: RunRecord, options: AuditOptions,
                              map_profiles: Callable[[list], list] | None = None) -> None:
    """Write run.json, then the report (which reads it), then run.json again with the report's
    stage time. The report names the final output folder, not the temporary one."""
    record.extra["output_folder"] = str(options.final_out or options.out)

    def dump() -> None:
        (tmp / "run.json").write_text(json.dumps(record.to_dict(), indent=1,
                                                 default=_json_default), encoding="utf-8")

    if options.skip_report:
        record.missing_stages.append("report (skipped by --no-report)")
        dump()
        return
    dump()
    from .report import build_report

    with record.stage("report"):
        build_report(tmp, units=options.units, map_profiles=map_profiles)
    dump()


def profiles_on_engine(engine: Any) -> Callable[[list], list]:
    """The report's span profiles drawn by an engine's workers (a Dask engine: each worker
    draws its share; matplotlib holds the GIL, so threads of this process would not). The
    saved outputs the profiles read are sent to the workers once."""
    from .report.plots import render_profiles

    def run(jobs: list) -> list:
        if not jobs:
            return []
        handle = engine.share(jobs[0][0])
        try:
            return engine.map_batches(render_profiles, [(handle, *job[1:]) for job in jobs])
        finally:
            engine.release(handle)

    return run


#: Peak resident memory of the in-memory run per point of the headers, to foresee whether a
#: survey fits: 135-137 B/point measured on p10M (docs/scaling.md), the bound of the scaling
#: targets 150. [bytes]
IN_MEMORY_BYTES_PER_POINT = 150
#: The most of the memory still available to the process an in-memory run may plan to take.
IN_MEMORY_SHARE = 0.6


def available_memory_bytes(meminfo: str | Path = "/proc/meminfo",
                           cgroup: str | Path = "/sys/fs/cgroup",
                           own_cgroup: str | Path = "/proc/self/cgroup") -> int | None:
    """Memory this process can still take: Linux ``MemAvailable``, and where its memory
    control group or one above it sets a limit (cgroup v2 ``memory.max``, v1
    ``memory.limit_in_bytes``: containers, batch jobs) no more than that limit less the
    group's working set (its usage less its inactive file pages, which the kernel drops
    first). None where none of these is known. [bytes]

    ``meminfo``, ``cgroup`` (the cgroup file system's mount) and ``own_cgroup`` (the
    process's groups) are the files read.
    """
    found: list[int] = []
    try:
        with open(meminfo, encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    found.append(int(line.split()[1]) * 1024)
                    break
    except (OSError, ValueError, IndexError):
        pass
    groups: dict[str, str] = {}  # "v1" / "v2": the process's group, relative to its hierarchy
    try:
        for line in Path(own_cgroup).read_text(encoding="ascii").splitlines():
            number, controllers, path = line.split(":", 2)
            if number == "0" and controllers == "":
                groups["v2"] = path
            elif "memory" in controllers.split(","):
                groups["v1"] = path
    except (OSError, ValueError):
        pass
    for version, mount, limit_file, usage_file, inactive in (
            ("v2", Path(cgroup), "memory.max", "memory.current", "inactive_file"),
            ("v1", Path(cgroup) / "memory", "memory.limit_in_bytes", "memory.usage_in_bytes",
             "total_inactive_file")):
        rel = groups.get(version, "/").strip("/")
        # the process's group and every group above it, up to the hierarchy's root
        folders = [mount / rel] if rel else []
        folders += [mount / p for p in Path(rel).parents if str(p) != "."] + [mount]
        for folder in dict.fromkeys(folders):
            try:
                text = (folder / limit_file).read_text(encoding="ascii").strip()
                if text == "max" or int(text) >= 1 << 60:  # no limit here
                    continue
                usage = int((folder / usage_file).read_text(encoding="ascii").strip())
                dropped = 0
                for line in (folder / "memory.stat").read_text(encoding="ascii").splitlines():
                    key, _, value = line.partition(" ")
                    if key == inactive:
                        dropped = int(value)
                        break
                found.append(max(0, int(text) - (usage - dropped)))
            except (OSError, ValueError):
                continue
    return min(found) if found else None


def choose_mode(options: AuditOptions, total_points: int, footprint_m2: float,
                threads: int, available_bytes: int | None = None) -> tuple[bool, str]:
    """Tiled or in-memory run, and why (recorded in ``run.json`` ``execution.mode_reason``).

    ``--tiled`` / ``tiled=False`` decide; otherwise a run is tiled on Dask, for a survey
    whose points or bounding box are too large to hold at once (a long diagonal or bent line
    grids over a box far larger than its corridor), and, with two threads or more, for a
    survey of more than ``tiled_min_points`` points: its tiles are then the run's parallel
    work, which the in-memory run's whole-cloud passes do not share out. On one thread the
    in-memory run stays the faster up to ``in_memory_max_points`` (docs/scaling.md, "Which
    run"). With ``available_bytes`` (:func:`available_memory_bytes`) a survey whose in-memory
    run would take more than ``IN_MEMORY_SHARE`` of it (``IN_MEMORY_BYTES_PER_POINT`` per
    header point) runs tiled too: a laptop busy with other work, or a container's limit.
    """
    if options.tiled is not None:
        return bool(options.tiled), ("asked for (--tiled)" if options.tiled
                                     else "asked for (in memory)")
    if options.workers or options.scheduler:
        return True, "a Dask engine (--workers / --scheduler) runs tiles"
    if total_points > options.in_memory_max_points:
        return True, (f"{total_points} points in the headers, more than the "
                      f"{options.in_memory_max_points} held in memory at once")
    if footprint_m2 > options.in_memory_max_footprint_m2:
        return True, (f"a bounding box of {footprint_m2 / 1e6:.1f} km², more than the "
                      f"{options.in_memory_max_footprint_m2 / 1e6:g} km² gridded in memory")
    need = total_points * IN_MEMORY_BYTES_PER_POINT
    if available_bytes is not None and need > IN_MEMORY_SHARE * available_bytes:
        return True, (f"{total_points} points in the headers would need up to "
                      f"{need / 1e9:.1f} GB in memory, more than {IN_MEMORY_SHARE:.0%} of the "
                      f"{available_bytes / 1e9:.1f} GB available")
    if total_points > options.tiled_min_points:
        if threads >= 2:
            return True, (f"{total_points} points in the headers, more than "
                          f"{options.tiled_min_points}, on {threads} threads: the tiles run "
                          f"in parallel")
        return False, (f"{total_points} points in the headers on one thread: in memory (the "
                       f"faster run without parallel tiles)")
    return False, (f"{total_points} points in the headers, at most {options.tiled_min_points}: "
                   f"in memory")


def _header_extent(paths: list[Path], crs: str | None = None) -> tuple[int, float]:
    """Total point count and the area of the inputs' joint bounding box from the headers.

    Returns
    -------
    (points, area) : number of points, plan area of the bounding box. [-], [m²]
    """
    import laspy

    from .io.las import _las_errors, header_gives_bounds, inputs_crs

    _, unit_m, _ = inputs_crs(paths, crs=crs)
    total, lo, hi = 0, np.full(2, np.inf), np.full(2, -np.inf)
    for path in paths:
        with _las_errors(path, "open"), laspy.open(str(path)) as reader:
            header = reader.header
            total += int(header.point_count)
            # a header without bounds (every value 0) says nothing of the box
            if header.point_count and header_gives_bounds(header):
                lo = np.minimum(lo, np.asarray(header.mins[:2], dtype=float))
                hi = np.maximum(hi, np.asarray(header.maxs[:2], dtype=float))
    area = float(np.prod(np.maximum(hi - lo, 0.0))) * unit_m**2 if total else 0.0
    return total, area


#: Least and most points per split task of a tiled run (a range of one input file); see
#: :func:`split_part_points`.
SPLIT_PART_MIN_POINTS = 1_000_000
SPLIT_PART_MAX_POINTS = 8_000_000
#: The LASzip writers' default chunk: ranges start on a chunk's first point where they can.
_LAZ_CHUNK_POINTS = 50_000


def split_part_points(total_points: int, workers: int) -> int:
    """Points per split task: about two ranges per worker or thread, rounded up to whole
    LAZ chunks of 50 000 points, at least :data:`SPLIT_PART_MIN_POINTS` and at most
    :data:`SPLIT_PART_MAX_POINTS` (the read stage's progress advances task by task).

    Few ranges, because every task opens its range with lazrs's parallel decoder, which
    spends 15-19 ms holding the GIL on the seek and the first read (p10M's read stage:
    2.24-2.45 s in ten ranges of a million points, 1.94-2.15 s in two to four). The split's
    memory does not grow with a range (its chunks and buffers are of fixed size), and the
    outputs do not depend on the ranges: a cell's points follow the input order whatever
    the cut (tested).
    """
    per_task = -(-int(total_points) // (2 * max(1, int(workers))))
    per_task = -(-per_task // _LAZ_CHUNK_POINTS) * _LAZ_CHUNK_POINTS
    return int(min(max(per_task, SPLIT_PART_MIN_POINTS), SPLIT_PART_MAX_POINTS))


#: Points per chunk of the tiled run's classified copy (its buffers are ≈ 90 bytes a point:
#: the run's peak when the tiles are small; a multiple of the LAZ chunk, 50 000 points).
WRITE_CHUNK_POINTS = 1_000_000


def _run_tiled(options: AuditOptions, record: RunRecord, paths: list[Path], config: Any,
               structures_rows: list[dict] | None, conductors: dict, rules: Any,
               console=None, cluster: Any = None) -> dict:
    """The bounded-memory run: split once, classify and audit per tile, merge, stream out.

    See docs/scaling.md. Each stage's tasks run on the engine (in-process or Dask); only
    paths, tile specs and small summaries go to and from the tasks. ``cluster``: a local
    Dask cluster already starting (:class:`clearaudit.distributed.LocalClusterStart`).
    """
    from .classify import ClassifyOptions
    from .cloud import Cloud
    from .distributed import engine_for
    from .duplicates import BOX_SLACK_M, compare_step_m, overlapping_files
    from .io.las import plan_record_scratch, read_setup, write_classified_stream
    from .threads import inner_threads
    from .tiling import (
        Corridor,
        Grid,
        TileContext,
        TileResults,
        audit_tile,
        cells_of_several_files,
        classify_tile,
        drop_cell_records,
        drop_later_copies,
        kept_heap,
        plan_parts,
        plan_tiles,
        refine_tile,
        release_free_memory,
        split_part,
        tile_target,
        write_cell_offsets,
        write_model_labels,
    )

    work_parent = Path(options.work_dir) if options.work_dir else Path(options.out).parent
    work_parent.mkdir(parents=True, exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix=".clearaudit-work-", dir=work_parent))
    dropping: _Background | None = None  # the cells' point records, removed after the audit
    try:
        with engine_for(options.workers, options.scheduler, inner_threads(),
                        started=cluster) as engine, \
                atomic_output_dir(options.out, options.overwrite) as tmp, \
                _progress_bar(console) as bar:
            record.extra["execution"].update(engine.describe())
            if engine.name != "in-process":
                # workers read the inputs and the tiles themselves: absolute paths, checked
                # on every worker before any work is sent
                paths = [p.absolute() for p in paths]
                work = work.absolute()
            engine.check_access(paths, work)
            # the classifier's modules (scipy.ndimage, scipy.sparse ...) imported on a thread
            # of their own while the inputs are read, not by the first tiles of the classify
            # stage; the line model's (scipy.optimize ...) while the tiles are classified:
            # the read stage's decoder holds the GIL nearly all the time (1.6 of its 1.75 s
            # on p10M), the classify tiles less than half of theirs
            warm = _Background(partial(_import_all, ("clearaudit.classify.core",)))
            # ---- read: split every input once into cell buckets (parallel over ranges)
            # (glibc's freed blocks kept for reuse while this process splits: the tile
            # stages' peaks would grow with the survey, see tiling.kept_heap)
            in_process = engine.name == "in-process"
            with record.stage("read", engine=engine) as entry, \
                    (kept_heap() if in_process else nullcontext(False)) as kept:
                if kept:
                    record.extra["execution"]["heap_kept"] = "read"
                # the inputs' SHA-256 (for the run record) on a thread of its own while they
                # are split: hashlib leaves the GIL for large blocks, and the split reads the
                # same files
                setup = read_setup(paths, crs=options.crs, hashes=False)
                hashing = _Background(partial(_hash_files, setup.files))
                corridor = None
                if structures_rows and options.corridor_buffer_m > 0:
                    poly = np.array([[r["x"], r["y"]] for r in structures_rows])
                    corridor = Corridor(poly, options.corridor_buffer_m / setup.horizontal_unit_m)
                grid = Grid(float(setup.header_min[0]), float(setup.header_min[1]),
                            float(options.tile_cell_m))
                # the tiles never depend on the engine: a Dask run equals the in-process run.
                # The ranges split in parallel do (two per worker, split_part_points), but
                # not what comes of them: a cell's points follow the input order whatever
                # the cut. A part's task holds its decode buffers and its cells' append
                # buffers (of fixed size), so the split's memory is that of the parts in
                # flight whatever the survey's size.
                parts = plan_parts(setup, split_part_points(setup.total_points,
                                                            engine.n_workers))
                # each part also keeps what classified.laz needs of its points (compressed
                # inputs) in the work folder: 3 bytes a point when the compressed layers of
                # layered inputs are copied, else the raw point records
                records, record.extra["classified_copy"] = plan_record_scratch(
                    paths, work / "records",
                    reserve_bytes=_reserve_bytes(paths, setup.total_points, tiled=True))
                keep_records = {} if records is None else {"records": records}
                task = bar.add_task("read", total=setup.total_points, rate="")
                progress = _stage_progress(bar, task)
                cells: dict[tuple[int, int], int] = {}
                decoded = kept = 0
                withheld = [0] * len(setup.files)
                for k, res in engine.run([(split_part, (str(work), setup, p, grid, corridor),
                                           keep_records) for p in parts]):
                    for c, n in res["cells"].items():
                        cells[c] = cells.get(c, 0) + n
                    decoded += res["decoded"]
                    kept += res["kept"]
                    withheld[parts[k].file_id] += res["withheld"]
                    progress(decoded, setup.total_points)
                setup = replace(setup, sources=tuple(
                    replace(info, sha256=digest)
                    for info, digest in zip(setup.sources, hashing.result(), strict=True)))
                for info, rec_in, n_withheld in zip(setup.sources, record.inputs, withheld,
                                                    strict=False):
                    rec_in.update({"sha256": info.sha256, "point_count": info.point_count,
                                   "point_format": info.point_format, "las_version": info.version,
                                   "crs": info.crs_origin, "withheld_points": n_withheld})
                record.extra["withheld_points"] = sum(withheld)
                if kept == 0:
                    label = str(paths[0]) if len(paths) == 1 else \
                        f"{paths[0]} (+{len(paths) - 1} more files)"
                    also = f"; {sum(withheld)} flagged withheld" if sum(withheld) else ""
                    raise InputError(label, "contains no points inside the area kept "
                                            f"(0 of {decoded} points kept{also})")
                # points delivered twice (tiles with overlapping buffers) counted once: only
                # where the files' header boxes meet, in the cells holding points of two
                # files or more, before the tiles are planned
                pairs = overlapping_files(setup.file_min, setup.file_max, slack_m=BOX_SLACK_M)
                step = compare_step_m(setup.sources, setup.unit_m)
                copies = {"files_overlapping": len(pairs), "points": 0, "by_file": {},
                          "compare_step_m": step}
                cells_with_copies: set[tuple[int, int]] = set()
                if pairs:
                    shared = cells_of_several_files(work, sorted(cells),
                                                    [p.file_id for p in parts])
                    copies["cells_compared"] = len(shared)
                    copies["seconds"] = 0.0
                    for _, res in engine.run([(drop_later_copies, (str(work), group, step), {})
                                              for group in _cell_groups(shared, cells)]):
                        copies["seconds"] = round(copies["seconds"] + res["seconds"], 3)
                        for c, n in res["dropped"].items():
                            cells[c] -= n
                            kept -= n
                            copies["points"] += n
                            cells_with_copies.add(c)
                        for fid, n in res["by_file"].items():
                            name = str(setup.files[fid])
                            copies["by_file"][name] = copies["by_file"].get(name, 0) + n
                record.extra["repeated_points"] = copies
                tile_points = tile_target(kept, options.tile_points)
                tiles = plan_tiles(cells, grid, tile_points, options.tile_overlap_m)
                # a tile's work follows the points it reads (owned and context): the tasks of
                # each stage start largest first, so no large tile starts last
                tile_costs = [t.n_points + sum(cells.get(c, 0) for c in t.context_cells)
                              for t in tiles]
                for t in tiles:
                    write_cell_offsets(work, t)
                record.extra["points_read"] = kept
                record.extra["crs"] = None if setup.crs is None else setup.crs.to_string()
                record.extra["horizontal_unit_m"] = setup.horizontal_unit_m
                record.extra["vertical_unit_m"] = setup.vertical_unit_m
                entry["parts"] = len(parts)
                entry["tiles"] = len(tiles)
                record.extra["tiles"] = {
                    "count": len(tiles), "cell_m": options.tile_cell_m,
                    "overlap_m": options.tile_overlap_m, "target_points": tile_points,
                    "asked_points": options.tile_points,
                    "largest_points": max(t.n_points for t in tiles)}
            ctx = TileContext(origin=setup.origin, crs=setup.crs,
                              horizontal_unit_m=setup.horizontal_unit_m,
                              vertical_unit_m=setup.vertical_unit_m)
            frame = Cloud(xyz=np.zeros((0, 3)), origin=setup.origin, crs=setup.crs,
                          horizontal_unit_m=setup.horizontal_unit_m,
                          vertical_unit_m=setup.vertical_unit_m, sources=list(setup.sources))
            given_xy = None
            if structures_rows:
                given_xy = np.array([frame.from_crs(np.array([r["x"], r["y"], setup.origin[2]]))[:2]
                                     for r in structures_rows])

            # ---- classify: one task per tile
            warm.result()
            # the line model's modules are imported once fewer tiles remain than the engine
            # runs at once (a slot would be idle): not beside the first tiles of this process,
            # whose threads then wait for the GIL the imports hold (a cluster's tiles run in
            # its workers: then at once)
            warm_model: list[_Background] = []

            def warm_model_when(remaining: int) -> None:
                if not warm_model and (engine.name != "in-process"
                                       or remaining < max(1, engine.n_workers)):
                    warm_model.append(_Background(partial(_import_all, ("clearaudit.model.line",))))

            warm_model_when(len(tiles))
            with record.stage("classify", engine=engine):
                task = bar.add_task("classify", total=kept, rate="")
                progress = _stage_progress(bar, task)
                copts = ClassifyOptions(trust_classes=config.trust_classes)
                results: list[dict | None] = [None] * len(tiles)
                done = 0
                for n_done, (k, res) in enumerate(engine.run(
                        [(classify_tile, (str(work), t, ctx, copts, given_xy), {})
                         for t in tiles], costs=tile_costs), start=1):
                    results[k] = res
                    done += res["n_owned"]
                    progress(done, kept)
                    warm_model_when(len(tiles) - n_done)
                warm_model_when(0)
                counts: dict[int, int] = {}
                timings: dict[str, float] = {}
                for res in results:
                    for c, n in res["counts"].items():
                        counts[c] = counts.get(c, 0) + n
                    for name, sec in res["timings_s"].items():
                        timings[name] = round(timings.get(name, 0.0) + sec, 4)
                record.extra["class_counts"] = {str(k): v for k, v in sorted(counts.items())}
                notes = [r["note"] for r in results if r.get("note")]
                if notes:
                    record.extra["tile_notes"] = notes
                record.extra["classification"] = {"options": results[0]["options"],
                                                  "timings_s": timings,
                                                  "context_points": sum(r["n_context"]
                                                                        for r in results)}

            # ---- model: from the gathered wire / structure / insulator points
            warm_model[0].result()
            with record.stage("model", engine=engine):
                from .model import build_line_model
                from .model.line import fit_jobs

                task = bar.add_task("model", total=None, rate="")
                model_cloud = Cloud(
                    xyz=np.concatenate([r["model_xyz"] for r in results]).reshape(-1, 3),
                    origin=setup.origin, crs=setup.crs,
                    horizontal_unit_m=setup.horizontal_unit_m,
                    vertical_unit_m=setup.vertical_unit_m,
                    classification=np.concatenate([r["model_cls"] for r in results]),
                    sources=list(setup.sources))
                # the tiles' model points follow one another in tile order
                model_start = np.cumsum([0] + [len(r["model_local"]) for r in results])
                model_local = [r["model_local"] for r in results]
                ground_sample = np.concatenate([r["ground_z_sample"] for r in results])
                for r in results:  # the points now live in model_cloud only
                    for name in ("model_xyz", "model_cls", "model_local", "ground_z_sample"):
                        r.pop(name, None)
                structures_local = None
                if structures_rows:
                    structures_local = [{**r, "xy": xy} for r, xy in zip(structures_rows, given_xy,
                                                                        strict=True)]
                model = build_line_model(
                    model_cloud, structures=structures_local,
                    unit_weight_n_per_m={"phase": conductors["phase"].unit_weight_n_per_m,
                                         "shield": conductors["shield"].unit_weight_n_per_m},
                    bundle=config.phase.bundle, progress=_stage_progress(bar, task),
                    # the catenary fits go to the engine's workers or threads (their
                    # least-squares loop runs without the GIL: 580 fits of a 50 km line took
                    # 1.05-1.12 s on two threads against 1.58-1.64 s on one)
                    map_fits=partial(engine.map_batches, fit_jobs))
                record.extra["model_points"] = model_cloud.n_points
                # what the audit needs of the gathered points; they go before the refine
                # tasks so the driver does not hold them through the rest of the run: the
                # survey's latitude comes from every k-th of them (the points
                # audit.engine.survey_latitude averages)
                n_model_points = model_cloud.n_points
                latitude_probe = model_cloud.subset(
                    np.arange(0, n_model_points, max(1, n_model_points // 1000)))
                del model_cloud

                # Classes the line model can settle (as in the in-memory run): one task per
                # tile with the context's classify-stage classes; the refined classes go to
                # the audit and to classified.laz.
                wire_labels = np.asarray(model.wire_point_labels, dtype=np.int64)
                other_of = np.full(n_model_points, -1, dtype=np.int64)
                for k, ow in enumerate(getattr(model, "other_wires", []) or []):
                    other_of[np.asarray(ow.point_indices, dtype=np.int64)] = k
                for k, t in enumerate(tiles):
                    mine = slice(model_start[k], model_start[k + 1])
                    write_model_labels(work, t, model_local[k], wire_labels[mine], other_of[mine])
                del model_local, wire_labels, other_of
                release_free_memory()  # the model build's freed pages, before the refine tasks
                # what every refine and audit task needs: sent once per worker for both
                # stages, not pickled into every task (a long line's spans are megabytes)
                by_cell = engine.share({c: t.id for t in tiles for c in t.cells})
                # the structures' extents depend on the model alone: computed here once,
                # not by every refine task (each went through every span's wires)
                from .classify.refine import structure_extents

                line = engine.share(SimpleNamespace(structures=model.structures,
                                                    spans=model.spans,
                                                    extents=structure_extents(model)))
                # the audit's wire states (survey temperature, conditions, curves) need the
                # model, not the refined classes: prepared on a thread of its own while the
                # refine tasks run (it only reads the model)
                # (the audit engine is imported there too, off the driver's own path)
                def prepare() -> Any:
                    from .audit.engine import prepare_wire_states, survey_latitude

                    return prepare_wire_states(
                        model, config, conductors, rules,
                        latitude_deg=survey_latitude(latitude_probe), ground_z_m=ground_sample,
                        origin_z_m=float(setup.origin[2]) * float(setup.vertical_unit_m))

                prepared = _Background(prepare)
                changes: dict[str, int] = {}
                counts = {}
                for _, res in engine.run([(refine_tile, (str(work), t, by_cell, ctx, line), {})
                                          for t in tiles], costs=tile_costs):
                    for pair, n in res["changes"].items():
                        changes[pair] = changes.get(pair, 0) + n
                    for c, n in res["counts"].items():
                        counts[c] = counts.get(c, 0) + n
                release_free_memory()  # the refine tasks' freed pages, before the audit
                record.extra["classification"]["refine_with_model"] = dict(sorted(changes.items()))
                record.extra["class_counts"] = {str(k): v for k, v in sorted(counts.items())}

            # ---- classified.laz: the classes are final once the refine tasks have run. When
            # the inputs' compressed layers are copied (two layers coded per chunk, the GIL
            # held little) it is written on a thread of its own while the audit runs, and the
            # write stage waits for it. Re-compressing every point holds the GIL throughout:
            # then it is written in the write stage (overlapping it gained nothing).
            lookup = TileResults(work, tiles, cells_with_copies)
            max_code = max(counts) if counts else 0
            write_task = bar.add_task("write", total=setup.total_points, rate="")
            write_progress = _stage_progress(bar, write_task)
            written = [0]
            background: _Background | None = None

            def values(file_id: int, start: int, stop: int):
                if background is not None and background.cancelled:
                    raise _Cancelled
                written[0] += stop - start
                write_progress(written[0], setup.total_points)
                return lookup.values(file_id, start, stop)

            def write_classified(path: Path) -> None:
                write_classified_stream(
                    setup.sources, path, values, crs=setup.crs, max_code=max_code,
                    extra_dims={"height_above_ground": (np.float32, "height above ground [m]")},
                    records=records, chunk_size=WRITE_CHUNK_POINTS,
                    report=record.extra.get("classified_copy"))

            if records is not None and records.layers:
                background = _Background(partial(write_classified, tmp / "classified.laz"),
                                         name="clearaudit-classified-copy")
            try:
                # ---- audit: driver prepares the states; one task per tile; driver merges
                with record.stage("audit", engine=engine):
                    task = bar.add_task("audit", total=kept, rate="")
                    progress = _stage_progress(bar, task)
                    plan = prepared.result()
                    # a building footprint id is unique across tiles: tile number * 2**32 + its id
                    blocks: list[Any] = [None] * len(tiles)
                    done = 0
                    states = engine.share(plan)
                    for k, res in engine.run([(audit_tile, (str(work), t, by_cell, states, line,
                                                            rules, k << 32), {})
                                              for k, t in enumerate(tiles)], costs=tile_costs):
                        blocks[k] = res["block"]
                        done += res["n_owned"]
                        progress(done, kept)
                    for handle in (by_cell, line, states):
                        engine.release(handle)
                    # the last tasks have run: a local cluster shuts down while the driver
                    # merges and writes; unless its workers are to draw the report's profiles
                    report_on_engine = engine.name != "in-process" and not options.skip_report
                    if not report_on_engine:
                        engine.finish()
                    # no task reads the cells' point records any more: they are removed on
                    # a thread of its own while the driver merges and writes (unlinking
                    # them is kernel work, 1.5 s for the 50 km line's 1 358 files, that
                    # would otherwise wait for the end of the run)
                    dropping = _Background(partial(drop_cell_records, work),
                                           name="clearaudit-work-removal")
                    release_free_memory()  # the audit tasks' freed pages, before the merge
                    from .audit.engine import merge_findings

                    audit = merge_findings(plan, model, conductors, rules, blocks)

                tolerance_rows = None
                if config.design:
                    from .audit.tolerance import check_tolerance

                    with record.stage("tolerance"):
                        tolerance_rows = check_tolerance(model, audit, config, conductors)

                # ---- write: the other outputs; classified.laz if not written beside the audit
                with record.stage("write", engine=engine):
                    from .outputs import write_outputs

                    def classified_writer(path: Path) -> None:
                        if background is None:
                            write_classified(path)
                            return
                        _wait_for_copy(background, record)  # written beside the audit

                    cls_summary = _ClassCounts(dict(sorted(counts.items())))  # completion order: sorted
                    summary = write_outputs(tmp, frame, cls_summary, model, audit, config, conductors,
                                            rules, record, tolerance_rows=tolerance_rows,
                                            classified_writer=classified_writer)
            finally:
                if background is not None:
                    background.stop()  # on an error: stop it before the work folder goes
            _finish_record_and_report(tmp, record, options,
                                      profiles_on_engine(engine) if report_on_engine else None)
            if report_on_engine:
                engine.finish()
    finally:
        if dropping is not None:
            dropping.stop()  # finished, or finishing: the folder's removal follows
        remove_settled(work)
    return summary


#: How long a failed run keeps removing its work folder while tasks still running on a Dask
#: cluster write into it. [s]
WORK_REMOVAL_WAIT_S = 15.0


def remove_settled(folder: Path, wait_s: float = WORK_REMOVAL_WAIT_S) -> bool:
    """Remove ``folder`` and everything in it; returns whether it is gone.

    After a failed run on a Dask cluster, tasks already running go on (a worker cannot be
    interrupted) and may still add files while the folder is being removed, so that one pass
    leaves it behind (70 MB of cell buckets after a truncated input on a local cluster). The
    folder is renamed first, so tasks find no folder under its name (they make folders one
    level at a time under it, never the folder itself, and fail instead); the renamed tree
    is removed, again until it stays gone or ``wait_s`` has passed (a task may still write
    to a file it holds open).
    """
    deadline = time.monotonic() + max(float(wait_s), 0.0)
    target = folder
    if folder.exists():
        # renamed first (one atomic step): a task's paths under the old name then lead
        # nowhere, so it can no longer add entries while the tree is removed
        moved = folder.with_name(folder.name + ".removing")
        try:
            os.replace(folder, moved)
            target = moved
        except OSError:
            pass
    while True:
        shutil.rmtree(target, ignore_errors=True)
        if not target.exists() and not folder.exists():
            return True
        if time.monotonic() >= deadline:
            return False
        time.sleep(0.1)


def _hash_files(paths: Iterable[Path]) -> list[str]:
    from .io.las import file_sha256

    return [file_sha256(p) for p in paths]


def _import_all(names: Iterable[str]) -> None:
    for name in names:
        import_module(name)


def _wait_for_copy(background: _Background, record: RunRecord) -> None:
    """Wait for classified.laz written beside the audit (re-raising its error) and record
    its thread's time in ``run.json`` ``classified_copy.written_beside_audit``."""
    background.result()
    record.extra["classified_copy"]["written_beside_audit"] = {
        "seconds": round(background.seconds, 3),
        "thread_cpu_seconds": round(background.cpu_seconds, 3)}


class _Cancelled(Exception):
    """Raised inside a background writer asked to stop."""


class _Background:
    """``fn()`` on a thread of its own; :meth:`result` waits and re-raises its error."""

    def __init__(self, fn: Callable[[], Any], name: str = "clearaudit-background"):
        import threading

        self._error: BaseException | None = None
        self._value: Any = None
        self._stop = threading.Event()
        self.seconds = self.cpu_seconds = 0.0
        self._thread = threading.Thread(target=self._run, args=(fn,), daemon=True, name=name)
        self._thread.start()

    def _run(self, fn: Callable[[], Any]) -> None:
        t0, c0 = time.perf_counter(), time.thread_time()
        try:
            self._value = fn()
        except BaseException as exc:  # handed to the waiting thread
            self._error = exc
        finally:
            self.seconds = time.perf_counter() - t0
            self.cpu_seconds = time.thread_time() - c0

    @property
    def cancelled(self) -> bool:
        return self._stop.is_set()

    def result(self) -> Any:
        """Wait for ``fn`` and return its value (or raise its error)."""
        self._thread.join()
        if self._error is not None:
            raise self._error
        return self._value

    def stop(self) -> None:
        """Ask the thread to stop at its next chunk and wait for it (its error, if any, is
        dropped: the run is failing for another reason)."""
        self._stop.set()
        self._thread.join()


@dataclass
class _ClassCounts:
    """Stand-in for a ClassificationResult when the points stay in their tiles."""

    counts: dict[int, int]


def _json_default(o):
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, Path):
        return str(o)
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


def resolve_conductors(config) -> dict[str, Any]:
    """Conductor properties per role from the line file (library name + explicit overrides)."""
    from .physics.conductors import conductor_from_config

    out = {}
    for role, settings in (("phase", config.phase), ("shield", config.shield)):
        table = dict(settings.overrides)
        if settings.name:
            table["name"] = settings.name
        try:
            out[role] = conductor_from_config(table)
        except ValueError as exc:
            raise InputError(config.source or "line file", f"[conductors.{role}]: {exc}") from None
    return out


__all__ = ["AuditOptions", "RunRecord", "StageError", "choose_mode", "run_audit"]

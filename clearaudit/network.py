"""Audit a network of lines in one run: every line of a manifest, one after the other, on the
same engine (in this process, one local Dask cluster, or an existing cluster), then one
network-wide work list.

Each line gets its own complete audit folder (the output contract, as ``clearaudit audit``
writes it); the network folder adds ``lines.csv`` (one row per line: status and counts),
``work_list.csv`` / ``work_list.geojson`` (every violation and hazard tree of every line,
ranked across the network) and ``network.json`` (the run record). A line whose input is bad
is listed as failed with its one-line error and the other lines go on; the exit code is then 2
(1 when a stage could not finish for another reason). The lines finished so far are kept
beside the output folder until the last line has run, so that an interrupted run can be
resumed (``--resume``) without auditing them again (:func:`reuse_problem`).

Manifest (TOML; paths relative to the manifest)::

    [network]
    name = "Velloran district, 2026 flights"     # optional

    [[line]]
    name = "tarnwick-velloran-230"               # the line's folder name
    clouds = ["tiles/tarnwick/"]                 # LAS/LAZ files or folders of tiles
    line_file = "tarnwick_velloran_230kv.line.toml"
    structures = "tarnwick_structures.csv"      # optional
    # optional: voltage_kv, crs, trust_classes, tiled
"""
from __future__ import annotations

import csv
import datetime as _dt
import heapq
import json
import math
import re
import shutil
import sys
import time
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from . import CAUTION, __version__
from .errors import ClearauditError, InputError
from .io.las import file_sha256, resolve_inputs

#: Keys a ``[[line]]`` table may hold.
LINE_KEYS = ("name", "clouds", "line_file", "structures", "voltage_kv", "crs", "trust_classes",
             "tiled")
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,99}$")
#: The network's own files: no line may be named like one of them.
NETWORK_FILES = ("lines.csv", "work_list.csv", "work_list.geojson", "network.json")


@dataclass
class NetworkLine:
    """One line of the manifest, its paths resolved against the manifest's folder."""

    name: str
    clouds: list[Path]
    line_file: Path | None = None
    structures: Path | None = None
    voltage_kv: float | None = None
    crs: str | None = None
    trust_classes: bool = False
    tiled: bool | None = None


@dataclass
class Manifest:
    path: Path
    name: str
    lines: list[NetworkLine] = field(default_factory=list)


def load_manifest(path: str | Path) -> Manifest:
    """Read and check a network manifest; every problem is an :class:`InputError` naming the
    manifest and the line, raised before any line is audited."""
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        raise InputError(path, "does not exist") from exc
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(path, f"cannot be read ({exc})") from exc
    except tomllib.TOMLDecodeError as exc:
        raise InputError(path, f"is not valid TOML ({exc})") from exc
    base = path.parent
    unknown = sorted(set(data) - {"network", "line"})
    if unknown:
        raise InputError(path, f"unknown table(s) {', '.join(unknown)} (expected [network] and "
                               "[[line]])")
    tables = data.get("line")
    if isinstance(tables, dict):
        raise InputError(path, "line must be an array of tables: write [[line]], not [line]")
    if not isinstance(tables, list) or not tables:
        raise InputError(path, "lists no [[line]] tables")
    network = data.get("network", {})
    if not isinstance(network, dict):
        raise InputError(path, "network must be a table: [network] with name = \"...\"")
    if set(network) - {"name"}:
        raise InputError(path, f"[network]: unknown key(s) "
                               f"{', '.join(sorted(set(network) - {'name'}))} (allowed: name)")
    name = network.get("name", path.stem)
    if not isinstance(name, str) or not name.strip():
        raise InputError(path, "[network]: name must be non-empty text")
    lines: list[NetworkLine] = []
    seen: set[str] = set()
    for k, t in enumerate(tables, start=1):
        where = f"[[line]] number {k}"
        if not isinstance(t, dict):
            raise InputError(path, f"{where} is not a table")
        bad = sorted(set(t) - set(LINE_KEYS))
        if bad:
            raise InputError(path, f"{where}: unknown key(s) {', '.join(bad)} (allowed: "
                                   f"{', '.join(LINE_KEYS)})")
        line_name = t.get("name")
        if not isinstance(line_name, str) or not _NAME.match(line_name):
            raise InputError(path, f"{where}: name must be 1-100 letters, digits, '.', '_' or "
                                   f"'-' starting with a letter or digit, not {line_name!r}")
        where = f"line {line_name!r}"
        if line_name.lower() in NETWORK_FILES:
            raise InputError(path, f"{where}: the name of one of the network's own files "
                                   f"({', '.join(NETWORK_FILES)}); choose another")
        if line_name.lower() in seen:
            raise InputError(path, f"{where} is listed twice (names must differ, ignoring case)")
        seen.add(line_name.lower())
        clouds = t.get("clouds")
        if isinstance(clouds, str):
            clouds = [clouds]
        if not isinstance(clouds, list) or not clouds or \
                not all(isinstance(c, str) for c in clouds):
            raise InputError(path, f"{where}: clouds must be a file or folder, or a list of them")
        cloud_paths = [base / c for c in clouds]
        for c in cloud_paths:
            if not c.exists():
                raise InputError(path, f"{where}: cloud {c} does not exist")
        try:  # the files themselves (a folder holds LAS/LAZ files, each starts like one)
            resolve_inputs(cloud_paths)
        except InputError as exc:
            raise InputError(path, f"{where}: {exc}") from None
        entry = NetworkLine(name=line_name, clouds=cloud_paths)
        for key in ("line_file", "structures"):
            value = t.get(key)
            if value is None:
                continue
            if not isinstance(value, str) or not (base / value).is_file():
                raise InputError(path, f"{where}: {key} {base / str(value)} is not a file")
            setattr(entry, key, base / value)
        if "voltage_kv" in t:
            v = t["voltage_kv"]
            if isinstance(v, bool) or not isinstance(v, int | float) or not v > 0 or \
                    not math.isfinite(v):
                raise InputError(path, f"{where}: voltage_kv must be a positive, finite "
                                       "number [kV]")
            entry.voltage_kv = float(v)
        if entry.line_file is None and entry.voltage_kv is None:
            raise InputError(path, f"{where}: give line_file or voltage_kv")
        for key in ("trust_classes", "tiled"):
            if key in t:
                if not isinstance(t[key], bool):
                    raise InputError(path, f"{where}: {key} must be true or false")
                setattr(entry, key, t[key])
        if "crs" in t:
            if not isinstance(t["crs"], str):
                raise InputError(path, f"{where}: crs must be text such as \"EPSG:32617\"")
            from pyproj import CRS
            from pyproj.exceptions import CRSError

            try:
                CRS.from_user_input(t["crs"])
            except CRSError:
                raise InputError(path, f"{where}: crs {t['crs']!r} is not a coordinate "
                                       "reference system pyproj knows") from None
            entry.crs = t["crs"]
        lines.append(entry)
    return Manifest(path=path, name=str(name), lines=lines)


# ------------------------------------------------------------------------------- the work list
def _float(text: str | None) -> float | None:
    try:
        return float(text) if text not in (None, "") else None
    except ValueError:
        return None


def work_key(row: dict[str, str]) -> tuple:
    """Urgency of a finding across lines: the key of
    :func:`clearaudit.audit.priority.rank_findings` (violations now, then at MOT and in wind,
    then under ice, then findings within their requirement, then fall-in risks; the larger
    deficit first; ...), read from a ``violations.csv`` / ``hazard_trees.csv`` row."""
    from .audit.priority import finding_key

    deficit = _float(row.get("deficit_m"))
    return finding_key({
        "finding": row.get("finding"), "condition": row.get("condition"),
        "deficit_m": deficit if deficit is not None else float("-inf"),
        "fall_in": str(row.get("fall_in", "")).lower() == "true",
        "grow_in_years": _float(row.get("grow_in_years")),
        "span_id": row.get("span_id"), "wire_id": row.get("wire_id")})


def _read_rows(path: Path) -> tuple[list[str], list[dict[str, str]]]:
    if not path.exists():
        return [], []
    with open(path, newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        return list(reader.fieldnames or []), list(reader)


#: One line's findings as read from its folder: the files' columns, violations, hazard trees.
Findings = tuple[list[str], list[dict[str, str]], list[dict[str, str]]]


def read_findings(folder: Path) -> Findings:
    """A line folder's violations.csv and hazard_trees.csv (read once for both network files)."""
    columns, violations = _read_rows(folder / "violations.csv")
    more, trees = _read_rows(folder / "hazard_trees.csv")
    return columns + [c for c in more if c not in columns], violations, trees


def network_work_list(findings: dict[str, Findings]) -> tuple[list[str], list[dict[str, str]]]:
    """Every line's violations and hazard trees in one list, ranked across the network.

    Each line's findings keep their own order (its ``priority``): the lists are merged, and
    between lines the more urgent finding (:func:`work_key`; then the line name) comes first.
    Returns the columns (``network_priority``, ``line``, then the lines' own columns) and rows.
    """
    from .outputs import VIOLATION_COLUMNS, VIOLATION_EXTRA_COLUMNS

    columns: list[str] = list(VIOLATION_COLUMNS + VIOLATION_EXTRA_COLUMNS)
    per_line = []
    for name, (cols, violations, trees) in sorted(findings.items()):
        columns += [c for c in cols if c not in columns]
        parts = []
        for got in (violations, trees):
            got = sorted(got, key=lambda r: int(r.get("priority") or 0))  # the line's own order
            parts.append([(work_key(r), r) for r in got])
        # the line's two files merged (each keeps its order), then tagged for the network merge
        merged = heapq.merge(*parts, key=lambda e: e[0])
        per_line.append([((key, name), i, name, row) for i, (key, row) in enumerate(merged)])
    rows = []
    for k, (_, _, name, row) in enumerate(heapq.merge(*per_line, key=lambda e: (e[0], e[1])),
                                          start=1):
        rows.append({"network_priority": str(k), "line": name, **row})
    return ["network_priority", "line"] + columns, rows


def _write_csv(path: Path, columns: list[str], rows: list[dict[str, Any]]) -> None:
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=columns, extrasaction="ignore")
        w.writeheader()
        w.writerows(rows)


def _work_geojson(path: Path, rows: list[dict[str, str]]) -> None:
    features = []
    for r in rows:
        lon, lat = _float(r.get("longitude")), _float(r.get("latitude"))
        geometry = None if lon is None or lat is None else {"type": "Point",
                                                            "coordinates": [lon, lat]}
        features.append({"type": "Feature", "geometry": geometry, "properties": dict(r)})
    path.write_text(json.dumps({"type": "FeatureCollection", "features": features}),
                    encoding="utf-8")


def _line_row(line: NetworkLine, status: str, seconds: float, folder: Path | None,
              error: str = "", findings: Findings = ([], [], []), reused: bool = False
              ) -> dict[str, Any]:
    """A row of lines.csv: ``folder`` and its ``findings`` (:func:`read_findings`) for a
    line that ran (``reused``: kept from an interrupted run), None and the ``error`` for one
    that failed."""
    row: dict[str, Any] = {"line": line.name, "status": status, "seconds": round(seconds, 1),
                           "folder": "" if folder is None else line.name, "error": error,
                           "reused": "yes" if reused else ""}
    if folder is None:
        return row
    run = json.loads((folder / "run.json").read_text(encoding="utf-8"))
    cfg = run.get("options", {}).get("line_config", {}).get("line", {})
    _, spans = _read_rows(folder / "spans.csv")
    _, viol, trees = findings
    deficits = [d for d in (_float(r.get("deficit_m")) for r in viol) if d is not None]
    row.update({"line_name": cfg.get("name", ""), "voltage_kv": cfg.get("voltage_kv", ""),
                "spans": len({r.get("span_id") for r in spans}), "wire_spans": len(spans),
                "violations": len(viol),
                "violations_at_survey": sum(r.get("condition") == "survey" for r in viol),
                "hazard_trees": len(trees),
                "largest_deficit_m": "" if not deficits else f"{max(deficits):.3f}"})
    return row


LINE_COLUMNS = ["line", "status", "line_name", "voltage_kv", "spans", "wire_spans", "violations",
                "violations_at_survey", "hazard_trees", "largest_deficit_m", "seconds", "folder",
                "error", "reused"]


# ------------------------------------------------------------------------------------- the run
@dataclass
class _LineResult:
    """What one line of a network run gave: its row of lines.csv, its findings (None when it
    failed), its error, whether it was kept from an interrupted run, a note for the console."""

    row: dict[str, Any]
    findings: Findings | None
    error: ClearauditError | None = None
    reused: bool = False
    note: str | None = None


def _each_line(one: Any, lines: list[NetworkLine], at_once: int):
    """``(k, one(k + 1, lines[k]))`` for every line, in the order they finish: one after
    the other, or ``at_once`` side by side on threads of this process.

    Side by side, a stop (Ctrl-C, an error) asks the lines still running to stop at their
    engine's next step (:func:`clearaudit.distributed.stop_runs`) and waits for them, so each
    removes its own partial folders before the stop goes on.
    """
    if at_once <= 1 or len(lines) <= 1:
        for k, line in enumerate(lines):
            yield k, one(k + 1, line)
        return
    from concurrent.futures import ThreadPoolExecutor

    from .distributed import as_done, stop_runs

    pool = ThreadPoolExecutor(min(at_once, len(lines)), thread_name_prefix="clearaudit-line")
    futures = {pool.submit(one, k + 1, line): k for k, line in enumerate(lines)}
    try:
        yield from as_done(futures)
    except BaseException:
        with stop_runs():
            pool.shutdown(wait=True, cancel_futures=True)
        raise
    pool.shutdown(wait=True)


def kept_lines_folder(out: str | Path) -> Path:
    """Where a network run keeps the lines it has finished until the last line has run:
    ``.<out name>.lines`` beside ``out``. An interrupted run leaves them there for
    ``--resume``."""
    out = Path(out).resolve()
    return out.parent / f".{out.name}.lines"


#: Options of a line's audit not compared as text when a kept line is reused: the files are
#: compared by their contents (:func:`reuse_problem`), and the engine changes no result but
#: the run's mode (tiled or in memory), which is compared itself.
_NOT_COMPARED = ("clouds", "out", "final_out", "line_file", "structures_file", "work_dir",
                 "overwrite", "workers", "scheduler", "threads", "line_config", "rule_set")


def reuse_problem(folder: Path, options: Any) -> str | None:
    """Why the audit folder ``folder`` (kept by an interrupted network run) cannot stand for
    the audit ``options`` would run now; None when it can.

    It can when it was written by this version of clearaudit, with the same options (the
    engine aside), the same input files (the same list of clouds, and every input's SHA-256
    as recorded in its run.json) and the same mode (tiled or in memory) as
    :func:`clearaudit.pipeline.choose_mode` would choose now.
    """
    from .pipeline import _header_extent, available_memory_bytes, choose_mode
    from .threads import inner_threads, run_threads

    try:
        run = json.loads((folder / "run.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return "its run record cannot be read"
    if run.get("clearaudit_version") != __version__:
        return f"it was written by clearaudit {run.get('clearaudit_version')}, this is {__version__}"
    was = {k: v for k, v in run.get("options", {}).items() if k not in _NOT_COMPARED}
    now = {k: v for k, v in options.to_dict().items() if k not in _NOT_COMPARED}
    if was != now:
        changed = sorted(k for k in set(was) | set(now) if was.get(k) != now.get(k))
        return f"its options differ ({', '.join(changed)})"
    inputs = run.get("inputs", [])
    paths = resolve_inputs(options.clouds)
    if [i.get("path") for i in inputs if not i.get("role")] != [str(p) for p in paths]:
        return "the list of its point cloud files has changed"
    line_files = [i.get("path") for i in inputs if i.get("role") == "line file"]
    if line_files != ([] if options.line_file is None else [str(options.line_file)]):
        return "its line file is another"
    for item in inputs:
        path = item.get("path")
        try:
            same = path is not None and file_sha256(path) == item.get("sha256")
        except OSError:
            same = False
        if not same:
            return f"{path} has changed or is missing"
    total, footprint = _header_extent(paths, options.crs)
    with run_threads(options.threads):
        tiled, _ = choose_mode(options, total, footprint, inner_threads(),
                               available_memory_bytes())
    mode = "tiled" if tiled else "in-memory"
    if run.get("execution", {}).get("mode") != mode:
        return f"it ran {run.get('execution', {}).get('mode')}, this run would be {mode}"
    return None


def _finished_lines(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.is_dir() and not p.name.startswith("."))


def run_network(manifest_path: str | Path, out: str | Path, *, workers: int = 0,
                scheduler: str | None = None, threads: int = 0, skip_report: bool = False,
                overwrite: bool = False, units: str = "metric", work_dir: str | Path | None = None,
                resume: bool = False, lines_at_once: int = 1, console: Any = None) -> dict:
    """Audit every line of a manifest into ``out/<line name>/`` and write the network files.

    Returns a dict with ``lines`` (the rows of lines.csv), ``failed`` (names; ``bad_input``
    those whose input was at fault), ``reused`` (names), ``work_list`` and ``out``.
    Lines run one after the other, each with all of the engine's workers; with ``workers``
    one local Dask cluster serves every line.

    ``lines_at_once`` lines run side by side on a Dask engine (a line alone leaves most of a
    large cluster idle: its few tiles, and its driver's own steps between the stages); each
    line's results are the same as when it runs alone (:func:`_each_line`).

    Each finished line is kept in :func:`kept_lines_folder` until the last line has run; an
    interrupted run leaves them there. With ``resume`` a kept line is taken as it is when
    :func:`reuse_problem` finds nothing against it (else it is audited again); without
    ``resume`` kept lines stop the run before any work, so none is thrown away unasked.
    """
    from types import SimpleNamespace

    from .distributed import check_engine
    from .pipeline import (
        AuditOptions,
        atomic_output_dir,
        package_versions,
        refuse_out_over_inputs,
        refuse_unwritable,
        run_audit,
    )

    manifest = load_manifest(manifest_path)
    out = Path(out)
    if isinstance(lines_at_once, bool) or not isinstance(lines_at_once, int) or lines_at_once < 1:
        raise InputError("--lines-at-once", f"must be a positive count, not {lines_at_once}")
    if lines_at_once > 1 and not (workers or scheduler):
        raise InputError("--lines-at-once", "runs lines side by side on a Dask engine: give "
                                            "--workers or --scheduler (in this process each "
                                            "line already uses every core)")
    # the engine's options once, before anything is written (not once per line)
    check_engine(SimpleNamespace(threads=threads, workers=workers, scheduler=scheduler))
    refuse_out_over_inputs(out, [manifest.path] + [p for line in manifest.lines for p in
                                                   (*line.clouds, line.line_file, line.structures)
                                                   if p is not None])
    refuse_unwritable(out.absolute().parent, "--out")
    if work_dir is not None:
        refuse_unwritable(Path(work_dir).absolute(), "--work-dir")
    kept = kept_lines_folder(out)
    if kept.exists() and not kept.is_dir():
        raise InputError(kept, "is in the way of the folder that keeps the finished lines "
                               "(not a folder): remove it")
    earlier = _finished_lines(kept) if kept.is_dir() else []
    if earlier and not resume:
        raise InputError(kept, f"holds {len(earlier)} line(s) an interrupted run of this "
                               "network finished: add --resume to reuse them, or remove the "
                               "folder")
    started = _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds")
    cluster = None
    rows: list[dict[str, Any]] = []
    findings: dict[str, Findings] = {}
    failed: list[str] = []
    bad_input: list[str] = []
    reused: list[str] = []
    with atomic_output_dir(out, overwrite) as tmp:
        kept.mkdir(exist_ok=True)
        # a kept line that the manifest no longer lists is not part of this network
        listed = {line.name for line in manifest.lines}
        for name in earlier:
            if name not in listed:
                shutil.rmtree(kept / name)
        try:
            address = scheduler
            if workers:
                from .distributed import LocalClusterStart

                cluster = LocalClusterStart(workers)
                address = cluster.client().scheduler.address
            # progress bars of lines side by side would overwrite one another
            quiet = lines_at_once > 1 and len(manifest.lines) > 1

            def one(k: int, line: NetworkLine) -> _LineResult:
                """Audit (or take from the kept lines) one line; its result for the table."""
                if console is not None and not quiet:
                    console.print(f"[bold]line {k} of {len(manifest.lines)}: {line.name}[/]")
                t0 = time.perf_counter()
                folder = kept / line.name
                options = AuditOptions(
                    clouds=line.clouds, out=folder, line_file=line.line_file,
                    crs=line.crs, voltage_kv=line.voltage_kv, units=units,
                    trust_classes=line.trust_classes, structures_file=line.structures,
                    scheduler=address, threads=0 if address else threads,
                    skip_report=skip_report, tiled=line.tiled,
                    work_dir=None if work_dir is None else Path(work_dir),
                    final_out=out / line.name)
                note = None
                if folder.is_dir():
                    try:
                        problem = reuse_problem(folder, options)
                    except ClearauditError as exc:  # an input gone bad: the audit will say
                        problem = str(exc)
                    if problem is None:
                        run = json.loads((folder / "run.json").read_text(encoding="utf-8"))
                        found = read_findings(folder)
                        row = _line_row(line, "ok", sum(s.get("seconds", 0.0)
                                                        for s in run.get("stages", [])),
                                        folder, findings=found, reused=True)
                        return _LineResult(row, found, reused=True,
                                           note=f"{line.name}: kept from the interrupted run")
                    note = f"{line.name}: audited again: {problem}"
                    if console is not None and not quiet:
                        console.print(note)
                        note = None
                    shutil.rmtree(folder)
                try:
                    run_audit(options, console=None if quiet else console, show_summary=False)
                except ClearauditError as exc:  # bad input, or a stage that cannot finish
                    return _LineResult(_line_row(line, "failed", time.perf_counter() - t0,
                                                 None, str(exc)),
                                       None, error=exc, note=note)
                found = read_findings(folder)
                return _LineResult(_line_row(line, "ok", time.perf_counter() - t0, folder,
                                             findings=found), found, note=note)

            results: list[_LineResult | None] = [None] * len(manifest.lines)
            for k, res in _each_line(one, manifest.lines, lines_at_once):
                results[k] = res
                line = manifest.lines[k]
                if res.note and console is not None:
                    console.print(res.note)
                if res.error is not None:
                    print(f"clearaudit: error: line {line.name!r}: {res.error}", file=sys.stderr)
                elif console is not None and not res.reused:
                    r = res.row
                    console.print(f"{line.name}: {r['spans']} spans, {r['violations']} "
                                  f"violations, {r['hazard_trees']} hazard trees "
                                  f"({r['seconds']:.1f} s)")
            for line, res in zip(manifest.lines, results, strict=True):
                rows.append(res.row)
                if res.findings is not None:
                    findings[line.name] = res.findings
                if res.reused:
                    reused.append(line.name)
                if res.error is not None:
                    failed.append(line.name)
                    if isinstance(res.error, InputError):
                        bad_input.append(line.name)
        except BaseException:
            done = _finished_lines(kept)
            if done:
                print(f"clearaudit: {len(done)} finished line(s) kept in {kept}: run the same "
                      "command again with --resume to reuse them", file=sys.stderr)
            else:
                shutil.rmtree(kept, ignore_errors=True)
            raise
        finally:
            if cluster is not None:
                cluster.close()
        columns, work = network_work_list(findings)
        _write_csv(tmp / "lines.csv", LINE_COLUMNS, rows)
        _write_csv(tmp / "work_list.csv", columns, work)
        _work_geojson(tmp / "work_list.geojson", work)
        record = {
            "tool": "clearaudit", "version": __version__, "command": sys.argv[:],
            "caution": CAUTION, "started": started,
            "finished": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
            "manifest": {"path": str(manifest.path), "name": manifest.name,
                         "sha256": file_sha256(manifest.path)},
            "options": {"workers": workers, "scheduler": scheduler, "threads": threads,
                        "skip_report": skip_report, "units": units,
                        "work_dir": None if work_dir is None else str(work_dir),
                        "resume": resume, "lines_at_once": lines_at_once},
            "packages": package_versions(), "python": sys.version.split()[0],
            "lines": rows, "failed": failed, "reused": reused, "work_list_rows": len(work),
            "ranking": "each line's findings in their own priority order, merged across lines "
                       "by the same urgency key (clearaudit.audit.priority.finding_key)"}
        (tmp / "network.json").write_text(json.dumps(record, indent=1), encoding="utf-8")
        # the finished lines join the network's folder last (renames on one file system); a
        # failure among the renames puts them back, so they stay kept for --resume
        moved: list[str] = []
        try:
            for name in _finished_lines(kept):
                (kept / name).rename(tmp / name)
                moved.append(name)
        except BaseException:
            for name in moved:
                (tmp / name).rename(kept / name)
            raise
    shutil.rmtree(kept, ignore_errors=True)
    return {"out": out, "lines": rows, "failed": failed, "bad_input": bad_input,
            "reused": reused, "work_list": work, "name": manifest.name}


def print_network_summary(console: Any, result: dict, units: str = "metric") -> None:
    from rich.table import Table

    from .units import FOOT_M

    f, u = (1.0, "m") if units == "metric" else (1.0 / FOOT_M, "ft")

    def length(text: Any) -> str:
        value = _float(str(text)) if text not in (None, "") else None
        return "" if value is None else f"{value * f:.2f}"

    table = Table(title=f"{result['name']}: {len(result['lines'])} lines", title_justify="left")
    for col, justify in (("line", "left"), ("status", "left"), ("spans", "right"),
                         ("violations", "right"), ("now", "right"), ("hazard trees", "right"),
                         (f"largest deficit {u}", "right")):
        table.add_column(col, justify=justify, no_wrap=True)
    for r in result["lines"]:
        table.add_row(r["line"], r["status"], str(r.get("spans", "")), str(r.get("violations", "")),
                      str(r.get("violations_at_survey", "")), str(r.get("hazard_trees", "")),
                      length(r.get("largest_deficit_m")))
    console.print(table)
    work = result["work_list"]
    if work:
        t = Table(title=f"{len(work)} findings across the network, most urgent first (all in "
                        "work_list.csv)", title_justify="left")
        for col in ("#", "line", "kind", "case", "span", "wire", f"short {u}", "finding"):
            t.add_column(col, no_wrap=True)
        for r in work[:10]:
            t.add_row(r["network_priority"], r["line"], r.get("kind", ""), r.get("condition", ""),
                      r.get("span_id", ""), r.get("wire_id", ""), length(r.get("deficit_m")),
                      r.get("finding", ""))
        console.print(t)
    console.print(f"Results in {result['out']}/ (lines.csv, work_list.csv, work_list.geojson, "
                  "network.json, one audit folder per line)")
    console.print(f"[italic]{CAUTION}[/]")

"""Scale benchmark: audit time vs plain LAZ decompression, memory per point, time per km, Dask.

Run on demand (minutes to an hour; generated corridors are cached under --cache)::

    .venv/bin/python benchmarks/bench_scale.py --points 10e6 30e6 --km 2 10 50 --dask
    .venv/bin/python benchmarks/bench_scale.py --stream-points 100e6   # tiles, streamed
    .venv/bin/python benchmarks/bench_scale.py --tiny          # seconds; used by the test

``--points`` cases are generated in memory as one LAZ (:func:`clearaudit.synth.generate_corridor`).
``--stream-points`` and ``--km`` cases are generated span batch by span batch as a folder of
LAZ tiles (:func:`clearaudit.synth.write_long_corridor`, memory independent of the line length;
one generator for every line length, so the time-per-km table compares like with like); the
audit reads the folder.

For every case it prints: the time laspy+lazrs need merely to decompress the LAZ (timed
before the case's first audit and after each, each audit's ratios using the mean of the two
timings around it: a shared host's speed drifts), the end-to-end audit time and their
ratio (target <= 4), classification alone vs decompression (target <= 1.5), the peak resident memory per input point (target <= 150 B/point in memory;
flat for tiled runs), the time per km of line, and with --dask the speed-up of a local
2-worker Dask cluster over the in-process tiled run on one thread and over the same cluster
engine with one worker, each with a check that the outputs are identical, the tiled peaks
by survey size (flat-memory target), and the time laspy+lazrs need to decode only the
layers the audit reads (x/y with the returns, z, class: the read floor of the run, whose
classified.laz copies the other layers of these layered inputs instead of re-compressing
every point). Every audit runs in its own child process so its peak memory is its own, and
every timing starts on a settled disk (``os.sync`` first: no timing pays for the writeback
of the one before; the writeback each audit leaves is timed and printed beside it). On a
shared machine the wall times vary with the load; the CPU times (audit process and its
workers; decompression in the parent) are printed beside them.
The ``--km`` lines and the ``--points`` corridors' tiled runs are audited ``--repeat``
times (default 3) and their imports timed as often: a 2 km line takes about 2 s, which a
shared host moves by as much as the lengths differ per km, and single p10M runs moved by
15 % within the hour; the run of the median time stands in the tables (its ratios use the
decompression timed around it), and every time is printed.
The modules a tiled audit imports after its clock starts (scipy's, laspy's, pyproj's,
clearaudit's) are timed apart in a fresh process: a cost every run pays once, whatever the
line's length, so the time-per-km table is printed with and without it.
Generation is not part of any measurement; its time and peak memory are printed.
The audits run without the HTML report (``--no-report``); the report a default run adds is
timed separately on each tiled run's output (``report …`` lines: seconds, per span profile,
and against the audit and the decompression).
"""
from __future__ import annotations

import argparse
import csv
import json
import os
import platform
import statistics
import subprocess
import sys
import time
from pathlib import Path

#: Points per span per (point/m2) of density, measured on the generator (100 m corridor,
#: spans of 280-420 m): about 50 000.
POINTS_PER_SPAN_PER_DENSITY = 50_000.0
MEAN_SPAN_M = 350.0


def generate(cache: Path, name: str, n_spans: int, density: float) -> dict[str, Path]:
    """A cached synthetic corridor (generation is not part of any measurement)."""
    from clearaudit.synth import generate_corridor, write_corridor

    paths = {"cloud": cache / f"{name}.laz", "line": cache / f"{name}.line.toml"}
    if paths["cloud"].exists() and paths["line"].exists():
        return paths
    corridor = generate_corridor(seed=7, n_spans=n_spans, density_per_m2=density,
                                 bend_deg=12.0, classified=False, name=name)
    return write_corridor(corridor, cache, name)


def generate_tiles(cache: Path, name: str, n_spans: int, density: float,
                   tile_points: int = 2_000_000) -> dict[str, Path]:
    """A cached tiled corridor from the bounded-memory generator, made in a child process.

    Prints the generation time and the generator's peak memory (not part of any measurement).
    """
    paths = {"cloud": cache / f"{name}.tiles", "line": cache / f"{name}.line.toml"}
    done = cache / f"{name}.done"
    if done.exists() and paths["line"].exists():
        return paths
    cmd = [sys.executable, __file__, "_generate", str(cache), name, str(n_spans), str(density),
           str(tile_points)]
    proc = subprocess.run(cmd, capture_output=True, text=True, check=False)
    if proc.returncode != 0:
        raise RuntimeError(f"generation failed: {proc.stderr[-2000:]}")
    info = json.loads(proc.stdout.strip().splitlines()[-1])
    print(f"generated {name}: {info['points']:,} points, {info['tiles']} tiles, "
          f"{info['line_km']:.2f} km, {info['seconds']:.0f} s, generator peak RSS "
          f"{info['peak_rss_mb']:.0f} MB (not measured in the table)", flush=True)
    done.write_text(json.dumps(info))
    return paths


def _generate_child(argv: list[str]) -> None:
    cache, name, n_spans, density, tile_points = argv
    from clearaudit.synth import write_long_corridor
    from clearaudit.tiling import peak_rss_mb

    t0 = time.perf_counter()
    lc = write_long_corridor(cache, name, n_spans=int(n_spans), seed=7,
                             density_per_m2=float(density), tile_points=int(tile_points))
    print(json.dumps({"seconds": time.perf_counter() - t0, "peak_rss_mb": peak_rss_mb(),
                      "points": lc.n_points, "tiles": len(lc.tiles),
                      "line_km": lc.line_length_m / 1000.0}))


def cloud_files(path: Path) -> list[Path]:
    """The LAZ file itself, or the tiles of a folder in name order."""
    return sorted(path.glob("*.laz")) if path.is_dir() else [path]


def settle_disk() -> float:
    """Write back every dirty page of the page cache (``os.sync``) before a timing starts, so
    that no timing pays for the writing an earlier one left behind; the seconds it took. [s]

    Without it the case after a large one ran under that one's writeback: the 2 km line
    audited right after the 100 M points took 3.5-3.8 s against 2.2-2.8 s on a settled disk
    (and 3.2 s with 1.7 GB of dirty pages made by ``dd`` just before it)."""
    t0 = time.perf_counter()
    os.sync()
    return time.perf_counter() - t0


def decompress_seconds(path: Path) -> tuple[float, int, float]:
    """Wall and CPU time for laspy + lazrs to decode every point of a file or folder. [s]"""
    import laspy
    import numpy as np

    settle_disk()
    t0 = time.perf_counter()
    c0 = time.process_time()
    n = 0
    for f in cloud_files(path):
        with laspy.open(str(f)) as reader:
            for chunk in reader.chunk_iterator(2_000_000):
                np.asarray(chunk.X)  # touch the coordinates
                n += len(chunk)
    return time.perf_counter() - t0, n, time.process_time() - c0


def layers_seconds(path: Path) -> float:
    """Wall time for laspy + lazrs (parallel) to decode only the layers the audit reads of
    every point (x/y with the returns, z, class, and the flags for the withheld flag; laspy's
    ``decompression_selection``): the read floor of the run. [s]"""
    import laspy
    import numpy as np

    wanted = (laspy.DecompressionSelection.XY_RETURNS_CHANNEL | laspy.DecompressionSelection.Z
              | laspy.DecompressionSelection.CLASSIFICATION
              | laspy.DecompressionSelection.FLAGS)
    settle_disk()
    t0 = time.perf_counter()
    for f in cloud_files(path):
        with laspy.open(str(f), decompression_selection=wanted) as reader:
            for chunk in reader.chunk_iterator(2_000_000):
                np.asarray(chunk.X)  # touch the coordinates
    return time.perf_counter() - t0


def run_child(cloud: Path, line: Path, out: Path, extra: list[str]) -> dict:
    """Run one audit in a child process; its wall time, peak RSS and stage timings."""
    cmd = [sys.executable, __file__, "_child", str(cloud), str(line), str(out), *extra]
    settle_disk()
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, capture_output=True, text=True, check=False)
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        raise RuntimeError(f"audit failed: {proc.stderr[-2000:]}")
    # what the audit left for the disk to write (outputs, classified.laz): not in its time,
    # as for a user whose run ends when the files are closed; printed beside it
    writeback = settle_disk()
    child = json.loads(proc.stdout.strip().splitlines()[-1])
    run = json.loads((out / "run.json").read_text())
    return {"wall_s": wall, "audit_s": child["seconds"], "peak_rss_mb": child["peak_rss_mb"],
            "writeback_s": writeback, "loaded_modules": child.get("loaded_modules", []),
            "cpu_s": child.get("cpu_s", float("nan")),
            "stages": {s["name"]: s for s in run["stages"]}, "run": run}


def _child(argv: list[str]) -> None:
    cloud, line, out, *extra = argv
    from clearaudit.threads import one_blas_thread_from_start

    one_blas_thread_from_start()  # as the command line does, before numpy is loaded
    from clearaudit.pipeline import AuditOptions, run_audit

    kw: dict = {}
    for item in extra:
        key, value = item.split("=", 1)
        kw[key] = {"tiled": lambda v: v == "1", "workers": int, "tile_points": int,
                   "threads": int}[key](value)
    before = set(sys.modules)
    t0 = time.perf_counter()
    run_audit(AuditOptions(clouds=[Path(cloud)], out=Path(out), line_file=Path(line),
                           overwrite=True, skip_report=True, **kw))
    seconds = time.perf_counter() - t0
    # the modules the run loaded as it went (timed apart by imports_seconds)
    loaded = [name for name in sys.modules if name not in before]
    from clearaudit.tiling import peak_rss_mb

    peak = peak_rss_mb()  # VmHWM: this child's own peak, not its parent's
    # CPU time of the audit (this process and any worker processes it waited for): on a
    # shared machine it tracks the work done better than the wall time does.
    import resource

    cpu = sum(getattr(resource.getrusage(who), f) for who in
              (resource.RUSAGE_SELF, resource.RUSAGE_CHILDREN) for f in ("ru_utime", "ru_stime"))
    print(json.dumps({"seconds": seconds, "peak_rss_mb": peak, "cpu_s": cpu,
                      "loaded_modules": loaded}))


def _imports_child(argv: list[str]) -> None:
    """Import the modules listed in a file (one name a line) in this fresh process, after
    what an audit child imports before its clock starts; print the seconds they took."""
    import importlib

    (names,) = argv
    from clearaudit.threads import one_blas_thread_from_start

    one_blas_thread_from_start()
    import clearaudit.pipeline  # noqa: F401  (imported before the audit child's clock too)

    t0 = time.perf_counter()
    skipped = 0
    for name in Path(names).read_text().split():
        try:
            importlib.import_module(name)
        except Exception:  # noqa: BLE001 - a module made at run time, not importable alone
            skipped += 1
    print(json.dumps({"seconds": time.perf_counter() - t0, "skipped": skipped}))


def imports_seconds(modules: list[str], scratch: Path) -> tuple[float, int]:
    """Seconds a fresh process takes to import ``modules`` (the ones an audit loaded after
    its clock started: scipy's, laspy's, pyproj's and clearaudit's own): a cost every run
    pays once, whatever the line's length (a ``clearaudit network`` run once for all its
    lines). Timed in a child process on a settled disk, the files in the page cache; also
    how many of them could not be imported on their own (made at run time), and so were
    not timed. [s], [-]"""
    scratch.write_text("\n".join(modules))
    settle_disk()
    proc = subprocess.run([sys.executable, __file__, "_imports", str(scratch)],
                          capture_output=True, text=True, check=False)
    if proc.returncode != 0:
        raise RuntimeError(f"imports failed: {proc.stderr[-2000:]}")
    child = json.loads(proc.stdout.strip().splitlines()[-1])
    return float(child["seconds"]), int(child["skipped"])


def _report_child(argv: list[str]) -> None:
    """Build the HTML report of an audit's output folder, timed as in a run (imports too)."""
    (out,) = argv
    from clearaudit.threads import one_blas_thread_from_start

    one_blas_thread_from_start()
    t0 = time.perf_counter()
    from clearaudit.report.html import build_report

    build_report(out)
    print(json.dumps({"seconds": time.perf_counter() - t0}))


def report_seconds(out: Path) -> float:
    """Wall time of the HTML report of an output folder, in a child process. [s]"""
    settle_disk()
    proc = subprocess.run([sys.executable, __file__, "_report", str(out)], capture_output=True,
                          text=True, check=False)
    if proc.returncode != 0:
        raise RuntimeError(f"report failed: {proc.stderr[-2000:]}")
    return float(json.loads(proc.stdout.strip().splitlines()[-1])["seconds"])


def same_outputs(a: Path, b: Path) -> bool:
    import laspy
    import numpy as np

    for name in ("spans.csv", "violations.csv", "hazard_trees.csv", "model.json"):
        if (a / name).exists() != (b / name).exists() or \
                (a / name).exists() and (a / name).read_bytes() != (b / name).read_bytes():
            return False
    ca, cb = laspy.read(a / "classified.laz"), laspy.read(b / "classified.laz")
    return bool(np.array_equal(np.asarray(ca.classification), np.asarray(cb.classification))
                and np.array_equal(np.asarray(ca.height_above_ground),
                                   np.asarray(cb.height_above_ground), equal_nan=True))


def machine() -> str:
    cpu = platform.processor() or platform.machine()
    try:
        for ln in Path("/proc/cpuinfo").read_text().splitlines():
            if ln.startswith("model name"):
                cpu = ln.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mem = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    return (f"{cpu}, {os.cpu_count()} cores, {mem:.0f} GiB RAM, Python "
            f"{platform.python_version()}, {platform.system()} {platform.release()}")


#: the runs of a case, in the order they are made and printed: in memory; tiled in-process on
#: one thread and on every core; on a local Dask cluster with one worker and with two
MODES = ("memory", "serial", "tiled", "dask1", "dask")


def case(cache: Path, work: Path, label: str, n_spans: int, density: float, modes: list[str],
         tile_points: int | None, tiles: int | None = None, repeat: int = 1) -> dict:
    """Generate (cached) and audit one case; ``tiles``: generator tile size, or one LAZ;
    ``repeat``: audits of the tiled mode (and timings of its imports), the median kept."""
    if tiles:
        paths = generate_tiles(cache, f"{label}-tiles", n_spans, density, tiles)
    else:
        paths = generate(cache, label, n_spans, density)
    timings = [decompress_seconds(paths["cloud"])]  # (wall s, points, CPU s)
    n = timings[0][1]
    result = {"case": label, "points": n, "spans": n_spans, "density": density,
              "line_km": None,
              "layers_s": layers_seconds(paths["cloud"]),
              "files": len(cloud_files(paths["cloud"]))}
    for mode in modes:
        extra = ["tiled=0"] if mode == "memory" else ["tiled=1"]
        if tile_points and mode != "memory":
            extra.append(f"tile_points={tile_points}")
        if mode == "dask":
            extra.append("workers=2")
        if mode == "dask1":  # the same engine on one worker: what the second worker adds
            extra.append("workers=1")
        if mode == "serial":  # tiled, in-process, one tile after the other on one thread
            extra.append("threads=1")
        runs = []
        for _ in range(max(1, repeat) if mode == "tiled" else 1):
            r = run_child(paths["cloud"], paths["line"], work / f"{label}-{mode}", extra)
            # the decompression again right after each audit: a shared host's speed drifts
            # over a case's minutes, so each audit is compared with the two timings around it
            # (the one before it and the one after it), not with timings taken minutes away
            timings.append(decompress_seconds(paths["cloud"]))
            r["around"] = (timings[-2], timings[-1])
            runs.append(r)
            print(f"audited {label} {mode}: {r['audit_s']:.1f} s (wall {r['wall_s']:.1f} s, "
                  f"CPU {r['cpu_s']:.1f} s), peak RSS {r['peak_rss_mb']:.0f} MB, writeback "
                  f"after it {r['writeback_s']:.2f} s", flush=True)
        # repeated (a shared host moves a run by more than the steps measured): the run of
        # the median time stands for the mode, every figure its own
        r = median_run(runs)
        before, after = r["around"]
        spans = list(csv.DictReader(open(work / f"{label}-{mode}" / "spans.csv")))
        km = sum(float(s["span_length_m"] or 0) for s in spans
                 if s["wire_id"] == spans[0]["wire_id"]) / 1000.0 if spans else 0.0
        result["line_km"] = km
        if mode == "tiled":
            # the audits here run without the report (--no-report); what the report adds to
            # a default run, timed on this output (one profile per span)
            result["report_s"] = report_seconds(work / f"{label}-{mode}")
            took = [imports_seconds(r["loaded_modules"], work / f"{label}-imports.txt")
                    for _ in range(max(1, repeat))]
            result["imports_runs_s"] = [t for t, _ in took]
            result["imports_s"] = float(statistics.median(result["imports_runs_s"]))
            result["imports_skipped"] = max(k for _, k in took)
            result["imports_modules"] = len(r["loaded_modules"])
            result["report_spans"] = len({row["span_id"] for row in spans})
        result[mode] = {"audit_s": r["audit_s"], "peak_rss_mb": r["peak_rss_mb"],
                        "classify_s": r["stages"]["classify"]["seconds"],
                        "bytes_per_point": r["peak_rss_mb"] * 2**20 / n,
                        "s_per_km": r["audit_s"] / km if km else None,
                        "cpu_s": r["cpu_s"], "cpu_s_per_km": r["cpu_s"] / km if km else None,
                        "writeback_s": r["writeback_s"],
                        "workers_peak_mb": r["stages"]["classify"].get("worker_peak_rss_mb"),
                        "audit_runs_s": [x["audit_s"] for x in runs],
                        "decompress_around_s": (before[0], after[0]),
                        "decompress_s": (before[0] + after[0]) / 2.0,
                        "decompress_cpu_s": (before[2] + after[2]) / 2.0}
    result["decompress_timings_s"] = [t[0] for t in timings]
    result["decompress_s"] = sum(t[0] for t in timings) / len(timings)
    result["decompress_cpu_s"] = sum(t[2] for t in timings) / len(timings)
    for mode in modes:
        m = result[mode]
        m["ratio_audit"] = m["audit_s"] / m["decompress_s"]
        m["ratio_classify"] = m["classify_s"] / m["decompress_s"]
        m["ratio_audit_cpu"] = m["cpu_s"] / m["decompress_cpu_s"]
    if "serial" in modes and "dask" in modes:
        result["dask_speedup"] = result["serial"]["audit_s"] / result["dask"]["audit_s"]
        result["dask_identical"] = same_outputs(work / f"{label}-serial", work / f"{label}-dask")
    if "dask1" in modes and "dask" in modes:
        result["dask_scaling"] = result["dask1"]["audit_s"] / result["dask"]["audit_s"]
        result["dask_scaling_identical"] = same_outputs(work / f"{label}-dask1",
                                                        work / f"{label}-dask")
    if "tiled" in modes and "dask" in modes:
        result["dask_vs_threads"] = result["tiled"]["audit_s"] / result["dask"]["audit_s"]
        result["dask_threads_identical"] = same_outputs(work / f"{label}-tiled",
                                                        work / f"{label}-dask")
    if "serial" in modes and "tiled" in modes:
        result["threads_speedup"] = result["serial"]["audit_s"] / result["tiled"]["audit_s"]
        result["threads_identical"] = same_outputs(work / f"{label}-serial",
                                                   work / f"{label}-tiled")
    return result


def median_run(runs: list[dict]) -> dict:
    """The run of the median audit time (of an even number, the lower middle one)."""
    ordered = sorted(runs, key=lambda r: r["audit_s"])
    return ordered[(len(ordered) - 1) // 2]


def km_scaling(results: list[dict]) -> list[str]:
    """The time-per-km table's lines for the ``--km`` lines (tiled, in-process): seconds per km
    at each length, the marginal seconds per km between consecutive lengths, and the
    least-squares line ``t = fixed + slope * km`` (numpy.polyfit). Time per km is constant
    when the marginal values are alike and the fixed part is small against the shortest
    line's time; the fixed part is what a run costs whatever the line's length (start-up,
    imports, the stages' ends). With the imports timed apart, the same without them; with
    each line's points and spans, its points per km, mean span and time per million points
    (a short line's spans, drawn at random, may be shorter: more points per km)."""
    import numpy as np

    cases = sorted((r for r in results
                    if r.get("km_case") and r.get("tiled") and r.get("line_km")),
                   key=lambda r: float(r["line_km"]))
    rows = [(float(r["line_km"]), float(r["tiled"]["audit_s"])) for r in cases]
    if len(rows) < 2:
        return []
    km = np.array([k for k, _ in rows])
    t = np.array([s for _, s in rows])
    slope, fixed = np.polyfit(km, t, 1)
    each = ", ".join(f"{k:.1f} km {s / k:.2f}" for k, s in rows)
    marginal = ", ".join(f"{k0:.1f}-{k1:.1f} km {(s1 - s0) / (k1 - k0):.2f}"
                         for (k0, s0), (k1, s1) in zip(rows[:-1], rows[1:], strict=True))
    lines = [f"time per km (tiled): {each} s/km; marginal between lengths: {marginal} s/km",
             f"time per km (tiled): least-squares line over the lengths: {fixed:.2f} s fixed "
             f"+ {slope:.3f} s/km (the fixed part is {fixed / rows[0][1] * 100:.0f} % of the "
             f"{rows[0][0]:.1f} km line's time)"]
    if all(r.get("imports_s") is not None for r in cases):
        # the same without the imports each run pays once (timed apart, imports_seconds)
        imp = np.array([float(r["imports_s"]) for r in cases])
        slope2, fixed2 = np.polyfit(km, t - imp, 1)
        each2 = ", ".join(f"{k:.1f} km {(s - i) / k:.2f}" for (k, s), i in zip(rows, imp,
                                                                              strict=True))
        took = ", ".join(f"{i:.2f}" for i in imp)
        lines.append(f"time per km (tiled) without the modules each run imports once ({took} "
                     f"s, timed apart): {each2} s/km; least-squares line {fixed2:.2f} s fixed "
                     f"+ {slope2:.3f} s/km")
    if all(r.get("points") and r.get("spans") for r in cases):
        # what each length carries per km: the generator draws every span's length, so a
        # short line's few spans need not average MEAN_SPAN_M, and the points per span hardly
        # depend on its length (wires, structures): shorter spans, more points per km
        per_km, per_mpt, per_mpt2 = [], [], []
        for (k, s), r in zip(rows, cases, strict=True):
            mpt = float(r["points"]) / 1e6
            per_km.append(f"{k:.1f} km {mpt / k:.3f} M ({k * 1000.0 / r['spans']:.0f} m)")
            per_mpt.append(f"{k:.1f} km {s / mpt:.3f}")
            if r.get("imports_s") is not None:
                per_mpt2.append(f"{k:.1f} km {(s - float(r['imports_s'])) / mpt:.3f}")
        line = (f"points per km (mean span): {', '.join(per_km)}; time per million points "
                f"(tiled): {', '.join(per_mpt)} s")
        if len(per_mpt2) == len(rows):
            line += f", without the imports {', '.join(per_mpt2)} s"
        lines.append(line)
    return lines


def print_results(results: list[dict]) -> None:
    print(f"machine: {machine()}")
    print("| case | points | files | line km | mode | decompress s | audit s | audit/decompress "
          "(target <= 4) | classify/decompress (target <= 1.5) | peak RSS MB | "
          "B/point (target <= 150 in memory) | s per km | audit CPU s | CPU s per km | "
          "audit CPU / decompress CPU |")
    print("|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|")
    for r in results:
        for mode in MODES:
            m = r.get(mode)
            if not m:
                continue
            print(f"| {r['case']} | {r['points']:,} | {r.get('files', 1)} | {r['line_km']:.2f} | "
                  f"{mode} | "
                  f"{m['decompress_s']:.2f} | {m['audit_s']:.1f} | {m['ratio_audit']:.2f} | "
                  f"{m['ratio_classify']:.2f} | {m['peak_rss_mb']:.0f} | "
                  f"{m['bytes_per_point']:.0f} | {m['s_per_km'] or float('nan'):.1f} | "
                  f"{m['cpu_s']:.1f} | {m['cpu_s_per_km'] or float('nan'):.1f} | "
                  f"{m['ratio_audit_cpu']:.2f} |")
    for r in results:
        if "decompress_timings_s" in r:
            times = ", ".join(f"{t:.2f}" for t in r["decompress_timings_s"])
            print(f"decompress {r['case']}: {times} s, before its first audit and after each "
                  "(each audit's ratios use the mean of the two timings around it)")
    for r in results:
        runs = (r.get("tiled") or {}).get("audit_runs_s", [])
        if len(runs) > 1:
            imports = ", ".join(f"{t:.2f}" for t in r.get("imports_runs_s", []))
            print(f"repeated {r['case']} tiled: {', '.join(f'{t:.2f}' for t in runs)} s, the "
                  f"median run stands in the tables; its imports {imports} s, the median "
                  "taken")
    for r in results:
        # the read floor: the layers the audit decodes (classified.laz copies the others)
        print(f"floor {r['case']}: decoding the layers the audit reads (x/y, z, class, flags) "
              f"takes {r['layers_s']:.2f} s = {r['layers_s'] / r['decompress_s']:.2f} x the full "
              "decompression; classified.laz copies the other layers")
    for r in results:
        if "threads_speedup" in r:
            print(f"in-process threads on {r['case']}: speed-up {r['threads_speedup']:.2f} x "
                  f"over one thread; identical outputs: {r['threads_identical']}")
        if "dask_speedup" in r:
            print(f"dask 2 workers on {r['case']}: speed-up {r['dask_speedup']:.2f} x over "
                  f"in-process tiled on one thread; identical outputs: {r['dask_identical']}")
        if "dask_scaling" in r:
            print(f"dask 2 workers on {r['case']}: speed-up {r['dask_scaling']:.2f} x over the "
                  f"same cluster engine with 1 worker; identical outputs: "
                  f"{r['dask_scaling_identical']}")
        if "dask_vs_threads" in r:
            print(f"dask 2 workers on {r['case']}: {r['dask_vs_threads']:.2f} x the speed of "
                  f"in-process tiles (one thread per core), driver peak {r['dask']['peak_rss_mb']:.0f} "
                  f"MB; identical outputs: {r['dask_threads_identical']}")
    # flat memory: the peaks of the tiled runs on the default threads, smallest to largest
    # survey (a one-tile case has no second tile in flight and is listed apart)
    tiled = sorted((r for r in results if r.get("tiled")), key=lambda r: r["points"])
    if len(tiled) > 1:
        peaks = ", ".join(f"{r['case']} {r['tiled']['peak_rss_mb']:.0f}" for r in tiled)
        many = [r["tiled"]["peak_rss_mb"] for r in tiled if r["points"] >= 2e6]
        spread = f"{max(many) / min(many):.2f}" if len(many) > 1 else "n/a"
        print(f"tiled peak RSS MB by survey size: {peaks}; largest / smallest of the "
              f"multi-tile cases = {spread} (target: flat)")
    for line in km_scaling(results):
        print(line)
    for r in results:
        if r.get("imports_s") is not None:
            print(f"imports {r['case']}: the {r['imports_modules']} modules the tiled run "
                  f"loaded after its clock started take {r['imports_s']:.2f} s to import in a "
                  f"fresh process ({r['imports_skipped']} made at run time not timed), "
                  f"{r['imports_s'] / r['tiled']['audit_s'] * 100:.0f} % of its time (paid "
                  "once a run, whatever the line's length)")
    for r in results:
        if r.get("report_s") is not None and r.get("tiled"):
            n = max(1, int(r.get("report_spans") or 0))
            print(f"report {r['case']}: the HTML report of the tiled run took "
                  f"{r['report_s']:.1f} s ({r['report_s'] / n:.2f} s per span profile, "
                  f"{n} spans), {r['report_s'] / r['tiled']['audit_s']:.2f} x the audit and "
                  f"{r['report_s'] / r['decompress_s']:.2f} x the decompression (the audits "
                  f"above ran without it: --no-report)")
    for r in results:
        for mode in MODES:
            if r.get(mode):
                m = r[mode]
                print(f"ratio {r['case']} {mode}: audit/decompress = {m['ratio_audit']:.2f}, "
                      f"classify/decompress = {m['ratio_classify']:.2f}, "
                      f"peak RSS per point = {m['bytes_per_point']:.0f} B")


def compile_package() -> None:
    """Compile clearaudit's bytecode before the timed runs, as an installed package has it.

    Python caches bytecode on first import; where that is switched off
    (``PYTHONDONTWRITEBYTECODE``, as on the benchmark machine) every child run would compile
    the package's modules again (about 0.2 s), a cost no installed copy pays.
    """
    import compileall

    import clearaudit

    compileall.compile_dir(str(Path(clearaudit.__file__).parent), quiet=1)


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if argv and argv[0] == "_child":
        _child(argv[1:])
        return 0
    if argv and argv[0] == "_report":
        _report_child(argv[1:])
        return 0
    if argv and argv[0] == "_imports":
        _imports_child(argv[1:])
        return 0
    if argv and argv[0] == "_generate":
        _generate_child(argv[1:])
        return 0
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--points", type=float, nargs="*", default=[],
                   help="corridor sizes [points] (density 12 /m2), in memory and tiled")
    p.add_argument("--km", type=float, nargs="*", default=[],
                   help="line lengths [km] (density 4 /m2) for the time-per-km table (tiled; "
                        "generated as tiles by the bounded-memory generator)")
    p.add_argument("--stream-points", type=float, nargs="*", default=[],
                   help="corridor sizes [points] (density 12 /m2) generated as tiles by the "
                        "bounded-memory generator and audited tiled (e.g. 100e6)")
    p.add_argument("--dask", action="store_true",
                   help="also run the first --points case tiled on one thread and on a local "
                        "Dask cluster of 1 and of 2 workers (speed-ups of the 2 workers over "
                        "the one-thread run and over the 1-worker cluster), and the "
                        "longest --km line on the cluster (against 2 in-process threads)")
    p.add_argument("--repeat", type=int, default=3,
                   help="audits of each --km line and of each --points corridor (tiled) "
                        "and timings of their imports; the median run stands in the "
                        "tables, all are printed")
    p.add_argument("--tiled-only-above", type=float, default=20e6,
                   help="skip the in-memory run above this many points")
    p.add_argument("--tiny", action="store_true", help="a seconds-long smoke run")
    p.add_argument("--cache", default="/tmp/clearaudit-bench", help="generated corridors")
    p.add_argument("--json", help="write the results to this JSON file")
    args = p.parse_args(argv)
    compile_package()
    cache = Path(args.cache)
    cache.mkdir(parents=True, exist_ok=True)
    work = cache / "runs"
    work.mkdir(exist_ok=True)
    results = []
    if args.tiny:
        results.append(case(cache, work, "tiny", 2, 1.5, list(MODES), 100_000))
        results.append(case(cache, work, "tiny-stream", 3, 1.0, ["tiled"], 100_000,
                            tiles=50_000, repeat=2))
    for pts in args.points:
        density = 12.0
        spans = max(2, round(pts / (POINTS_PER_SPAN_PER_DENSITY * density)))
        modes = (["memory"] if pts <= args.tiled_only_above else []) + ["tiled"]
        if args.dask and pts == args.points[0]:
            modes += ["serial", "dask1", "dask"]
        results.append(case(cache, work, f"p{pts / 1e6:g}M", spans, density, modes, None,
                            repeat=args.repeat))
    for pts in args.stream_points:
        from clearaudit.synth import points_per_span

        density = 12.0
        spans = max(2, round(pts / points_per_span(density)))
        results.append(case(cache, work, f"s{pts / 1e6:g}M", spans, density, ["tiled"], None,
                            tiles=2_000_000))
    for km in dict.fromkeys(args.km):  # each length once, in the order given
        spans = max(2, round(km * 1000.0 / MEAN_SPAN_M))
        # with --dask the longest line also runs on the local cluster (the shared model and
        # wire states of a long line, the workers' own reads)
        modes = ["tiled"] + (["dask"] if args.dask and km == max(args.km) else [])
        results.append(case(cache, work, f"k{km:g}km", spans, 4.0, modes, None,
                            tiles=2_000_000, repeat=args.repeat))
        results[-1]["km_case"] = True
    print_results(results)
    if args.json:
        Path(args.json).write_text(json.dumps(results, indent=1, default=str))
    return 0


if __name__ == "__main__":
    sys.exit(main())

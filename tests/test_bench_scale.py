"""The scale benchmark runs on a tiny case and prints its ratios (no timing is asserted)."""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

SCRIPT = Path(__file__).resolve().parents[1] / "benchmarks" / "bench_scale.py"


def test_bench_scale_tiny_prints_ratios(tmp_path):
    pytest.importorskip("distributed")
    proc = subprocess.run([sys.executable, str(SCRIPT), "--tiny", "--cache", str(tmp_path)],
                          capture_output=True, text=True, timeout=600, check=False)
    assert proc.returncode == 0, proc.stderr[-3000:]
    out = proc.stdout
    assert "machine:" in out
    for mode in ("memory", "serial", "tiled", "dask1", "dask"):
        assert f"ratio tiny {mode}: audit/decompress = " in out
    assert "classify/decompress = " in out and "peak RSS per point = " in out
    # every audit on a settled disk, the writeback it left timed beside it
    assert out.count("writeback after it ") == 7  # the streamed case's tiled run twice
    # a repeated run (as the --km lines are): every time printed, the median standing
    line = next(t for t in out.splitlines() if t.startswith("repeated tiny-stream tiled: "))
    assert len(line.split(" s, ")[0].split(": ")[1].split(", ")) == 2
    assert "the median run stands in the tables" in line
    # the Dask runs (1 and 2 workers) and the threaded in-process run must reproduce the
    # one-thread run exactly
    assert "in-process threads on tiny: speed-up " in out
    assert out.count("identical outputs: True") == 4
    assert "dask 2 workers on tiny: speed-up " in out and "cluster engine with 1 worker" in out
    assert "dask 2 workers on tiny: " in out and "the speed of in-process tiles" in out
    # the streamed case: generated as tiles (bounded-memory generator), audited tiled
    assert "generated tiny-stream-tiles: " in out and " 3 tiles, " in out
    assert "ratio tiny-stream tiled: audit/decompress = " in out
    assert "| tiny-stream | " in out and " | 3 | " in out
    assert "tiled peak RSS MB by survey size: tiny" in out and "(target: flat)" in out
    # what the report adds to a default run, timed on the tiled run's output
    assert "report tiny: the HTML report of the tiled run took " in out
    assert "report tiny-stream: the HTML report of the tiled run took " in out
    # the modules the tiled run imported as it went, timed apart in a fresh process
    line = next(t for t in out.splitlines() if t.startswith("imports tiny: the "))
    assert "modules the tiled run loaded after its clock started take " in line
    assert " made at run time not timed), " in line
    assert "floor tiny: decoding the layers the audit reads (x/y, z, class, flags) takes " in out
    # the decompression timed before the first audit and after each of the five
    line = next(t for t in out.splitlines() if t.startswith("decompress tiny: "))
    assert len(line.split(" s, ")[0].split(", ")) == 6 and "the two timings around it" in line


def test_km_scaling_lines_match_numpy_polyfit():
    # reference: numpy.polyfit's straight line through the same (km, seconds) points, and the
    # differences of consecutive rows by hand
    import importlib.util

    import numpy as np

    spec = importlib.util.spec_from_file_location("bench_scale", SCRIPT)
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    rows = [(50.18, 57.6), (2.03, 4.0), (10.22, 13.6)]
    results = [{"km_case": True, "line_km": k, "tiled": {"audit_s": s}} for k, s in rows]
    results.append({"line_km": 6.0, "tiled": {"audit_s": 99.0}})  # not a --km line
    lines = bench.km_scaling(results)
    assert len(lines) == 2
    assert "2.0 km 1.97, 10.2 km 1.33, 50.2 km 1.15 s/km" in lines[0]
    assert f"2.0-10.2 km {(13.6 - 4.0) / (10.22 - 2.03):.2f}" in lines[0]
    assert f"10.2-50.2 km {(57.6 - 13.6) / (50.18 - 10.22):.2f}" in lines[0]
    slope, fixed = np.polyfit([2.03, 10.22, 50.18], [4.0, 13.6, 57.6], 1)
    assert f"{fixed:.2f} s fixed + {slope:.3f} s/km" in lines[1]
    assert bench.km_scaling(results[:1]) == []
    # with the imports each run pays once, timed apart: the same line fitted to t - imports
    imports = {50.18: 0.7, 2.03: 0.6, 10.22: 0.65}
    for r in results:
        r["imports_s"] = imports.get(r["line_km"])
    lines = bench.km_scaling(results)
    assert len(lines) == 3
    assert "(0.60, 0.65, 0.70 s, timed apart): " in lines[2]
    assert f"2.0 km {(4.0 - 0.6) / 2.03:.2f}, 10.2 km {(13.6 - 0.65) / 10.22:.2f}" in lines[2]
    slope, fixed = np.polyfit([2.03, 10.22, 50.18], [3.4, 12.95, 56.9], 1)
    assert f"{fixed:.2f} s fixed + {slope:.3f} s/km" in lines[2]
    # with the points and spans of each line: points per km, mean span, time per million
    # points (with and without the imports), by hand
    for r, (n, spans) in zip(results[:3], [(28.0e6, 143), (1.15e6, 6), (5.5e6, 29)],
                                 strict=True):
        r["points"], r["spans"] = n, spans
    lines = bench.km_scaling(results)
    assert len(lines) == 4
    assert lines[3].startswith(f"points per km (mean span): 2.0 km {1.15 / 2.03:.3f} M "
                               f"({2030 / 6:.0f} m), 10.2 km {5.5 / 10.22:.3f} M ")
    assert f"time per million points (tiled): 2.0 km {4.0 / 1.15:.3f}, " in lines[3]
    assert f"50.2 km {57.6 / 28.0:.3f} s, without the imports 2.0 km {3.4 / 1.15:.3f}, " \
        in lines[3]


def test_median_run_is_the_middle_run_by_time():
    # reference: statistics.median_low over the audit times (the lower middle of an even count)
    import importlib.util
    import statistics

    spec = importlib.util.spec_from_file_location("bench_scale", SCRIPT)
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    for times in ([2.6, 1.9, 2.1], [3.0], [1.2, 0.9, 1.5, 1.1]):
        runs = [{"audit_s": t, "id": k} for k, t in enumerate(times)]
        chosen = bench.median_run(runs)
        assert chosen["audit_s"] == statistics.median_low(times)
        assert chosen is runs[times.index(chosen["audit_s"])]

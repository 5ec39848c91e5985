"""Tiled, bounded-memory audits in-process and on a local Dask cluster (docs/scaling.md).

The reference for the point bookkeeping is laspy itself (the file's own scaled coordinates
and point order); the reference for the Dask run is the in-process run of the same stage
functions, which must give identical outputs.
"""
from __future__ import annotations

import csv
import os
import time
from pathlib import Path

import laspy
import numpy as np
import pytest

from clearaudit.errors import InputError
from clearaudit.io.las import read_cloud, read_range, read_setup
from clearaudit.pipeline import AuditOptions, run_audit
from clearaudit.synth import generate_corridor, write_corridor
from clearaudit.tiling import Grid, plan_parts, plan_tiles, read_cells, split_part


@pytest.fixture(scope="module")
def corridor(tmp_path_factory) -> dict[str, Path]:
    # a small bent corridor (3 spans): cut into several tiles with a small tile budget
    c = generate_corridor(seed=11, n_spans=3, density_per_m2=3.0, bend_deg=25.0,
                          span_length_m=(250.0, 300.0), classified=False, name="tiles")
    return write_corridor(c, tmp_path_factory.mktemp("corridor"), "tiles")


def _run(paths: dict[str, Path], out: Path, **kw) -> Path:
    opts = AuditOptions(**{"clouds": [paths["cloud"]], "out": out, "line_file": paths["line"],
                           "overwrite": True, "skip_report": True, "tiled": True,
                           "tile_points": 120_000, "tile_cell_m": 100.0, **kw})
    return run_audit(opts)


def _rows(path: Path) -> list[dict]:
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def test_read_range_matches_laspy_and_read_cloud(corridor):
    # reference: laspy's own scaled coordinates, in file order
    las = laspy.read(corridor["cloud"])
    setup = read_setup(corridor["cloud"], hashes=False)
    n = setup.total_points
    start, stop = n // 3, n // 3 + 250_000
    chunks = list(read_range(setup, 0, start, stop, chunk_size=70_000))
    xyz = np.concatenate([c[0] for c in chunks])
    index = np.concatenate([c[2] for c in chunks])
    np.testing.assert_array_equal(index, np.arange(start, stop))
    ref = np.column_stack([las.x, las.y, las.z])[start:stop] - setup.origin
    np.testing.assert_allclose(xyz, ref, atol=1e-6)
    cloud = read_cloud(corridor["cloud"])  # same origin, bit-identical coordinates
    np.testing.assert_array_equal(cloud.xyz[start:stop], xyz)


def test_split_gives_every_point_exactly_one_tile(corridor, tmp_path, monkeypatch):
    setup = read_setup(corridor["cloud"], hashes=False)
    grid = Grid(float(setup.header_min[0]), float(setup.header_min[1]), 100.0)
    cells: dict = {}
    for part in plan_parts(setup, 300_000):
        for c, k in split_part(tmp_path, setup, part, grid, flush_points=50_000)["cells"].items():
            cells[c] = cells.get(c, 0) + k
    tiles = plan_tiles(cells, grid, 120_000, 40.0)
    assert len(tiles) > 2
    keys = np.concatenate([read_cells(tmp_path, t.cells)["key"] for t in tiles])
    # every input point once, none twice (point order from laspy: 0..n-1)
    np.testing.assert_array_equal(np.sort(keys), np.arange(setup.total_points))
    assert sum(t.n_points for t in tiles) == setup.total_points
    for t in tiles:
        rec = read_cells(tmp_path, t.cells)
        assert t.owns(rec["xyz"][:, :2]).all()
    for c in cells:  # inside a cell the points keep the input order
        assert np.all(np.diff(read_cells(tmp_path, (c,))["key"]) > 0)
    # records appended after the cells' own: the same bytes as numpy's concatenation
    first, second = read_cells(tmp_path, tiles[0].cells), read_cells(tmp_path, tiles[1].cells)
    both = read_cells(tmp_path, tiles[0].cells, then=second[::7])
    assert both.tobytes() == np.concatenate([first, second[::7]]).tobytes()
    assert read_cells(tmp_path, tiles[0].cells, then=second[:0]).tobytes() == first.tobytes()
    # records picked by position without reading the cells whole (and picked ones of
    # records given after them): numpy's fancy indexing of the records' fields
    from clearaudit.tiling import read_points_at

    rng = np.random.default_rng(3)
    for pick in (np.sort(rng.choice(len(first), len(first) // 5, replace=False)),
                 np.arange(len(first)), np.zeros(0, dtype=np.int64), np.array([len(first) - 1])):
        for then_at in (None, np.zeros(0, dtype=np.int64), np.sort(rng.choice(
                len(second), len(second) // 3, replace=False))):
            got = read_points_at(tmp_path, tiles[0].cells, pick, second, then_at)
            ref = first[pick] if then_at is None else np.concatenate([first[pick],
                                                                      second[then_at]])
            assert len(got) == len(ref) and got.cls.dtype == np.uint8
            np.testing.assert_array_equal(got.xyz, ref["xyz"])
            np.testing.assert_array_equal(got.cls, ref["cls"])
            np.testing.assert_array_equal(got.key, ref["key"])
    with pytest.raises(IndexError):
        read_points_at(tmp_path, tiles[0].cells, np.array([len(first)]))
    with pytest.raises(IndexError):
        read_points_at(tmp_path, tiles[0].cells, np.array([0]), second, np.array([len(second)]))
    # the records' fields read in steps without the records (read_points): numpy's field
    # views of read_cells, in steps smaller than a file, of one record and of whole files
    import clearaudit.tiling as tiling

    for step in (1000, 1, tiling.READ_STEP_RECORDS):
        monkeypatch.setattr(tiling, "READ_STEP_RECORDS", step)
        for then in (None, second[::7], second[:0]):
            ref = read_cells(tmp_path, tiles[0].cells, then=then)
            got = tiling.read_points(tmp_path, tiles[0].cells, then=then)
            assert len(got) == len(ref) and got.xyz.flags.c_contiguous
            assert got.xyz.shape == (len(ref), 3) and got.cls.dtype == np.uint8
            np.testing.assert_array_equal(got.xyz, ref["xyz"])
            np.testing.assert_array_equal(got.cls, ref["cls"])
            np.testing.assert_array_equal(got.key, ref["key"])
        if step == 1:
            break  # one record a step: the first tile's first cells are enough
    for rec in (second, second[:0], second[::3]):
        got = tiling.points_of(rec)
        np.testing.assert_array_equal(got.xyz, rec["xyz"])
        np.testing.assert_array_equal(got.cls, rec["cls"])
        np.testing.assert_array_equal(got.key, rec["key"])
    assert len(tiling.read_points(tmp_path, ())) == 0
    # the compiled split refuses bytes that are not whole records, or rows beyond the arrays
    from clearaudit.classify.kernels import unpack_records

    raw = second[:4].view(np.uint8).reshape(-1)
    xyz, cls, key = np.empty((4, 3)), np.empty(4, np.uint8), np.empty(4, np.int64)
    with pytest.raises(ValueError):
        unpack_records(raw[:-1], xyz, cls, key, 0)
    with pytest.raises(ValueError):
        unpack_records(raw, xyz, cls, key, 1)
    unpack_records(raw, xyz, cls, key, 0)
    np.testing.assert_array_equal(xyz, second[:4]["xyz"])
    np.testing.assert_array_equal(key, second[:4]["key"])


def test_tasks_never_bring_back_a_removed_work_folder(corridor, tmp_path):
    # a Dask worker's task still running after the driver was interrupted and removed the
    # work folder must fail, not make the folder again (it was left behind, 18-104 MB, when
    # a run on a local cluster was interrupted with Ctrl-C)
    from clearaudit.tiling import write_cell_offsets

    setup = read_setup(corridor["cloud"], hashes=False)
    grid = Grid(float(setup.header_min[0]), float(setup.header_min[1]), 100.0)
    gone = tmp_path / "gone"
    part = plan_parts(setup, 300_000)[0]
    with pytest.raises(FileNotFoundError):
        split_part(gone, setup, part, grid, flush_points=50_000)
    assert not gone.exists()
    cells = split_part(tmp_path, setup, part, grid, flush_points=50_000)["cells"]
    tile = plan_tiles(cells, grid, 120_000, 40.0)[0]
    with pytest.raises(FileNotFoundError):
        write_cell_offsets(gone, tile)
    assert not gone.exists()


def test_the_cut_into_ranges_changes_no_cell(corridor, tmp_path):
    # reference: the same split in one range; cut into ranges of any size (chunk-aligned or
    # not) every cell holds the same records in the same order, byte for byte
    from clearaudit.pipeline import split_part_points

    setup = read_setup(corridor["cloud"], hashes=False)
    grid = Grid(float(setup.header_min[0]), float(setup.header_min[1]), 100.0)
    made = {}
    for size in (setup.total_points, 300_000, 123_457):
        work = tmp_path / f"cut{size}"
        work.mkdir()  # the driver makes the work folder; tasks never do (see below)
        cells: dict = {}
        for part in plan_parts(setup, size):
            for c, k in split_part(work, setup, part, grid, flush_points=50_000)["cells"].items():
                cells[c] = cells.get(c, 0) + k
        made[size] = {c: read_cells(work, (c,)).tobytes() for c in sorted(cells)}
    whole = made.pop(setup.total_points)
    assert len(whole) > 2
    for cut in made.values():
        assert cut == whole
    # about two ranges per worker, in whole 50 000-point chunks, within the bounds
    assert split_part_points(9_222_369, 2) == 2_350_000
    assert split_part_points(9_222_369, 1) == 4_650_000
    assert split_part_points(100_000, 2) == 1_000_000
    assert split_part_points(10**10, 4) == 8_000_000
    assert split_part_points(0, 0) == 1_000_000


def test_dask_run_identical_to_in_process(corridor, tmp_path):
    # reference: the in-process run on one thread, tile after tile; the same tiles on two
    # threads of this process and on a local Dask cluster must give identical outputs
    pytest.importorskip("distributed")
    a = _run(corridor, tmp_path / "inproc", threads=1)
    t = _run(corridor, tmp_path / "threads", threads=2)
    b = _run(corridor, tmp_path / "dask", workers=2)
    for other in (t, b):
        for name in ("spans.csv", "violations.csv", "model.json"):
            assert (a / name).read_bytes() == (other / name).read_bytes(), (other, name)
        ca, cb = laspy.read(a / "classified.laz"), laspy.read(other / "classified.laz")
        np.testing.assert_array_equal(np.asarray(ca.classification),
                                      np.asarray(cb.classification))
        np.testing.assert_array_equal(np.asarray(ca.height_above_ground),
                                      np.asarray(cb.height_above_ground))
    # every input point is written, in input order (reference: the input file via laspy)
    src = laspy.read(corridor["cloud"])
    np.testing.assert_array_equal(np.asarray(ca.X), np.asarray(src.X))
    assert len(_rows(a / "spans.csv")) > 0
    import json

    run = json.loads((b / "run.json").read_text())
    assert run["execution"]["mode"] == "tiled" and run["execution"]["engine"] == "dask"
    assert run["execution"]["heap_kept"] == "none"  # the workers' heaps are glibc's own
    classify_stage = next(s for s in run["stages"] if s["name"] == "classify")
    assert len(classify_stage["worker_peak_rss_mb"]) == 2


def test_tiled_run_matches_truth_and_in_memory_classes(corridor, tmp_path):
    # reference: the generator's exact truth (wires per span and their sag)
    import json

    truth = json.loads(corridor["truth"].read_text())
    # the automatic choice on two threads: tiled above tiled_min_points (header count)
    a = _run(corridor, tmp_path / "tiled", tiled=None, tiled_min_points=1000, threads=2)
    execution = json.loads((a / "run.json").read_text())["execution"]
    assert execution["mode"] == "tiled" and "the tiles run in parallel" in \
        execution["mode_reason"]
    rows = {(r["span_id"], r["wire_id"]): r for r in _rows(a / "spans.csv")}
    opts = AuditOptions(clouds=[corridor["cloud"]], out=tmp_path / "mem",
                        line_file=corridor["line"], overwrite=True, skip_report=True,
                        tiled=False)
    b = run_audit(opts)
    execution = json.loads((b / "run.json").read_text())["execution"]
    assert (execution["mode"], execution["mode_reason"]) == ("in-memory",
                                                             "asked for (in memory)")
    mem = {(r["span_id"], r["wire_id"]): r for r in _rows(b / "spans.csv")}
    err_tiled, err_mem = [], []
    for span in truth["spans"]:
        for w in span["wires"]:
            row = rows.get((span["id"], w["wire_id"]))
            assert row is not None, (span["id"], w["wire_id"])  # every true wire is found
            other = mem.get((span["id"], w["wire_id"]))
            if row["sag_survey_m"] and other and other["sag_survey_m"]:
                err_tiled.append(abs(float(row["sag_survey_m"]) - w["sag_m"]))
                err_mem.append(abs(float(other["sag_survey_m"]) - w["sag_m"]))
    # tiling must not make the sags worse than the in-memory run (same fitting code)
    assert err_tiled and np.median(err_tiled) <= np.median(err_mem) + 0.02
    # classes differ only where a tile's context differs from the whole survey's (the
    # ground filter estimates its slope threshold per tile)
    ca, cb = laspy.read(a / "classified.laz"), laspy.read(b / "classified.laz")
    agree = np.mean(np.asarray(ca.classification) == np.asarray(cb.classification))
    assert agree > 0.98


def test_bad_scheduler_address_is_one_line_input_error(corridor, tmp_path):
    pytest.importorskip("distributed")
    import clearaudit.distributed as d

    saved, d.CONNECT_TIMEOUT_S = d.CONNECT_TIMEOUT_S, 2.0
    try:
        with pytest.raises(InputError) as err:
            _run(corridor, tmp_path / "bad", scheduler="tcp://127.0.0.1:1")
    finally:
        d.CONNECT_TIMEOUT_S = saved
    assert "--scheduler" in str(err.value) and "\n" not in str(err.value)
    assert not (tmp_path / "bad").exists()


def test_negative_workers_rejected(corridor, tmp_path):
    with pytest.raises(InputError):
        _run(corridor, tmp_path / "neg", workers=-1)


@pytest.mark.parametrize("kw", [{"threads": -1}, {"threads": 2, "workers": 2}])
def test_bad_thread_options_rejected(corridor, tmp_path, kw):
    with pytest.raises(InputError) as err:
        _run(corridor, tmp_path / "bad-threads", **kw)
    assert "--threads" in str(err.value) and "\n" not in str(err.value)
    assert not (tmp_path / "bad-threads").exists()


def test_header_extent_chooses_tiled_for_sprawling_surveys(tmp_path):
    # Two points 6 km apart on a diagonal: few points, but a 36 km² bounding box, which the
    # in-memory run would grid whole; the pipeline sends such surveys to the tiled run.
    import laspy

    from clearaudit.pipeline import AuditOptions, _header_extent

    header = laspy.LasHeader(point_format=6, version="1.4")
    header.scales = np.array([0.01, 0.01, 0.01])
    las = laspy.LasData(header)
    las.x = np.array([500000.0, 506000.0])
    las.y = np.array([4000000.0, 4006000.0])
    las.z = np.array([100.0, 120.0])
    path = tmp_path / "sprawl.las"
    las.write(path)
    points, area = _header_extent([path])
    assert points == 2 and area == pytest.approx(36e6)
    assert area > AuditOptions(clouds=[path], out=tmp_path / "o").in_memory_max_footprint_m2


def test_choose_mode_rules(tmp_path):
    # The policy of docs/scaling.md, "Which run" (common practice, no source: tiles are the
    # parallel work of a run; a survey too large to hold runs tiled whatever the cores).
    from clearaudit.pipeline import choose_mode

    base = AuditOptions(clouds=[], out=tmp_path / "o")
    small, mid, huge = 500_000, base.tiled_min_points + 1, base.in_memory_max_points + 1
    cases = [
        ({}, small, 1e6, 2, False, "at most"),
        ({}, base.tiled_min_points, 1e6, 2, False, "at most"),
        ({}, mid, 1e6, 2, True, "the tiles run in parallel"),
        ({}, mid, 1e6, 1, False, "on one thread"),
        ({}, huge, 1e6, 1, True, "held in memory at once"),
        ({}, small, base.in_memory_max_footprint_m2 * 1.01, 1, True, "km²"),
        ({"workers": 2}, small, 1e6, 2, True, "Dask"),
        ({"scheduler": "tcp://x:1"}, small, 1e6, 2, True, "Dask"),
        ({"tiled": True}, small, 1e6, 1, True, "asked for (--tiled)"),
        ({"tiled": False}, huge, 1e9, 2, False, "asked for (in memory)"),
    ]
    for kw, points, area, threads, tiled, why in cases:
        opts = AuditOptions(clouds=[], out=tmp_path / "o", **kw)
        got, reason = choose_mode(opts, points, area, threads)
        assert got is tiled and why in reason, (kw, points, area, threads, reason)
    # with the memory still available: 150 B a header point may take at most 60 % of it
    # (the in-memory run's measured 135-137 B/point, docs/scaling.md)
    gb = 1e9
    for kw, points, threads, available, tiled, why in (
            ({}, 500_000, 1, 1.0 * gb, False, "at most"),             # 0.075 GB of 0.6
            ({}, 1_000_000, 1, 0.2 * gb, True, "0.2 GB available"),   # 0.15 GB > 0.12
            ({}, 4_000_000, 1, 0.99 * gb, True, "up to 0.6 GB"),      # 0.6 GB > 0.594
            ({}, 4_000_000, 1, 1.01 * gb, False, "on one thread"),    # 0.6 GB < 0.606
            ({"tiled": False}, 4_000_000, 1, 0.1 * gb, False, "asked for"),  # the user decides
            ({}, 500_000, 2, None, False, "at most")):                       # not known
        opts = AuditOptions(clouds=[], out=tmp_path / "o", **kw)
        got, reason = choose_mode(opts, points, 1e6, threads, available)
        assert got is tiled and why in reason, (kw, points, available, reason)


def test_tiled_from_the_smallest_survey_that_makes_two_tiles(tmp_path):
    # The automatic tiled run starts where a survey's points make two tiles (tile_target:
    # a share of the points a tile, with a smallest tile): its tiles are then parallel work.
    # Common practice (no source); the measurements behind it are in docs/scaling.md,
    # "Which run".
    import math

    from clearaudit.tiling import (
        DEFAULT_TILE_POINTS,
        SMALL_SURVEY_MIN_TILE_POINTS,
        SMALL_SURVEY_TILE_SHARE,
        tile_target,
    )

    most = AuditOptions(clouds=[], out=tmp_path / "o").tiled_min_points  # runs in memory
    assert tile_target(most) == DEFAULT_TILE_POINTS >= most       # one tile
    assert tile_target(most + 1) < DEFAULT_TILE_POINTS            # two tiles from here on
    assert tile_target(most + 1) == math.ceil(SMALL_SURVEY_TILE_SHARE * (most + 1)) \
        >= SMALL_SURVEY_MIN_TILE_POINTS


def test_available_memory_is_the_least_of_the_machines_and_the_containers(tmp_path):
    from clearaudit.pipeline import available_memory_bytes

    got = available_memory_bytes()
    assert got is None or 0 <= got <= os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    meminfo = tmp_path / "meminfo"
    meminfo.write_text("MemTotal: 100 kB\nMemAvailable: 8000000 kB\n")
    # a cgroup v2 limit of 2 GiB with 1.5 GiB used, 0.25 GiB of it inactive file pages
    v2 = tmp_path / "v2"
    v2.mkdir()
    (v2 / "memory.max").write_text(f"{2 << 30}\n")
    (v2 / "memory.current").write_text(f"{3 << 29}\n")
    (v2 / "memory.stat").write_text(f"anon 1\ninactive_file {1 << 28}\nactive_file 5\n")
    # min(8 000 000 kB, 2 GiB - (1.5 GiB - 0.25 GiB)) = 0.75 GiB
    none = tmp_path / "none"
    assert available_memory_bytes(meminfo, v2, none) == (2 << 30) - ((3 << 29) - (1 << 28))
    (v2 / "memory.max").write_text("max\n")
    assert available_memory_bytes(meminfo, v2, none) == 8_000_000 * 1024
    # the process's own group (/proc/self/cgroup) and the groups above it: the least counts
    own = tmp_path / "self-cgroup"
    own.write_text("0::/jobs/audit-7\n")
    job = v2 / "jobs" / "audit-7"
    job.mkdir(parents=True)
    (job / "memory.max").write_text(f"{1 << 30}\n")
    (job / "memory.current").write_text(f"{1 << 28}\n")
    (job / "memory.stat").write_text("inactive_file 0\n")
    assert available_memory_bytes(meminfo, v2, own) == 3 << 28
    (v2 / "jobs" / "memory.max").write_text(f"{1 << 29}\n")   # a tighter limit above it
    (v2 / "jobs" / "memory.current").write_text(f"{1 << 28}\n")
    (v2 / "jobs" / "memory.stat").write_text("inactive_file 0\n")
    assert available_memory_bytes(meminfo, v2, own) == 1 << 28
    # cgroup v1: no limit is a huge number
    v1 = tmp_path / "v1" / "memory"
    v1.mkdir(parents=True)
    (v1 / "memory.limit_in_bytes").write_text("9223372036854771712\n")
    (v1 / "memory.usage_in_bytes").write_text("4099342336\n")
    (v1 / "memory.stat").write_text("total_inactive_file 0\n")
    assert available_memory_bytes(meminfo, v1.parent, none) == 8_000_000 * 1024
    (v1 / "memory.limit_in_bytes").write_text(f"{1 << 30}\n")
    (v1 / "memory.usage_in_bytes").write_text(f"{1 << 29}\n")
    assert available_memory_bytes(meminfo, v1.parent, none) == 1 << 29
    assert available_memory_bytes(none, none, none) is None


def test_in_memory_flag(corridor, tmp_path, capsys):
    # --in-memory forces the in-memory run; with a Dask engine or --tiled it is a usage error
    # (exit 2, nothing written)
    from clearaudit.cli import main

    common = [str(corridor["cloud"]), "--line", str(corridor["line"]), "--no-report"]
    assert main(["audit", *common, "--out", str(tmp_path / "a"), "--in-memory",
                 "--workers", "2"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("clearaudit: error: --in-memory:") and "\n" not in err
    with pytest.raises(SystemExit) as stop:
        main(["audit", *common, "--out", str(tmp_path / "b"), "--in-memory", "--tiled"])
    assert stop.value.code == 2
    assert "not allowed with argument" in capsys.readouterr().err
    assert not (tmp_path / "a").exists() and not (tmp_path / "b").exists()


def test_tasks_release_freed_heap_pages(monkeypatch):
    # A Dask worker hands the heap's free pages back (glibc malloc_trim) after each task, a
    # run after each stage; the result and errors of the task are unchanged, and a system
    # without malloc_trim is fine.
    from clearaudit import tiling
    from clearaudit.distributed import _task
    from clearaudit.pipeline import RunRecord

    calls = []
    monkeypatch.setattr(tiling, "_malloc_trim", lambda: calls.append)
    assert _task(np.add, (2, 1), {}) == 3 and calls == [0]

    def boom():
        raise RuntimeError("task failed")

    with pytest.raises(RuntimeError, match="task failed"):
        _task(boom, (), {})
    assert len(calls) == 2  # released after the failed task too
    record = RunRecord(command=[], started="", options={})
    with record.stage("read"):
        pass
    assert len(calls) == 3 and record.stages[0]["name"] == "read"
    monkeypatch.setattr(tiling, "_malloc_trim", lambda: None)
    tiling.release_free_memory()  # no malloc_trim: nothing to do


def test_local_cluster_started_in_background(monkeypatch):
    # The local cluster starts on a thread while the driver validates; the engine takes it,
    # finish() lets it shut down while the driver writes (the workers' memory figures are
    # kept), and a failed start is raised where the client is needed.
    import os

    from clearaudit import distributed as dist

    for key in ("CLEARAUDIT_THREADS", "OPENBLAS_NUM_THREADS"):
        monkeypatch.delenv(key, raising=False)
    with dist.LocalClusterStart(1) as started, \
            dist.engine_for(1, None, 1, started=started) as engine:
        assert dict(engine.run([(np.add, (2, 3), {})])) == {0: 5}
        # the workers run with one inner thread and one BLAS thread; the driver's own
        # environment is left as it was (Dask's nanny sets them in it before each spawn)
        # (os.getenv, a function: os.environ.get would carry the driver's mapping along)
        assert dict(engine.run([(os.getenv, ("CLEARAUDIT_THREADS",), {}),
                                (os.getenv, ("OPENBLAS_NUM_THREADS",), {})])) \
            == {0: "1", 1: "1"}
        assert "CLEARAUDIT_THREADS" not in os.environ
        assert "OPENBLAS_NUM_THREADS" not in os.environ
        # costs only order the start: every result comes back at its own position
        assert dict(engine.run([(np.add, (k, 1), {}) for k in range(4)],
                               costs=[0, 9, 3, 9])) == {k: k + 1 for k in range(4)}
        engine.finish()
        memory = engine.worker_peak_memory_mb()
        assert len(memory) == 1 and all(v > 0 for v in memory.values())
        with pytest.raises(RuntimeError, match="finished"):
            list(engine.run([(np.add, (1, 1), {})]))
        assert engine.worker_peak_memory_mb() == memory
    started.close()  # closing twice is harmless

    def no_start(workers):
        raise OSError("no ports left")

    monkeypatch.setattr(dist, "_start_local_cluster", no_start)
    with dist.LocalClusterStart(2) as failed, pytest.raises(OSError, match="no ports"):
        failed.client()
    with pytest.raises(ValueError):
        dist.LocalClusterStart(0)


def _shared_identity(shared: tuple, k: int) -> tuple[int, int, float]:
    import os
    import sys

    values, = shared
    # keep every object a task received alive in the worker, so that two copies can never
    # share an address
    seen = sys.__dict__.setdefault("_clearaudit_test_shared", [])
    seen.append(values)
    return os.getpid(), id(values), float(values[k])


def test_shared_values_go_to_each_worker_once():
    # Engine.share: in this process the value itself; on Dask one copy per worker, which
    # every task reads (the same object in a worker), instead of a copy pickled per task.
    from clearaudit.distributed import InProcessEngine, engine_for

    values = np.arange(200_000, dtype=np.float64)
    assert InProcessEngine(2).share(values) is values
    with engine_for(workers=2) as engine:
        shared = engine.share((values,))
        out = [r for _, r in engine.run([(_shared_identity, (shared, k), {})
                                         for k in range(12)])]
        # released: the workers drop it (the scheduler forgets the key)
        key = shared.key
        engine.release(shared)
        del shared
        for _ in range(100):
            if not any(key in keys for keys in engine.client.has_what().values()):
                break
            time.sleep(0.05)
        assert not any(key in keys for keys in engine.client.has_what().values())
        engine.finish()
        with pytest.raises(RuntimeError):
            engine.share(values)
    assert sorted(v for *_, v in out) == [float(k) for k in range(12)]
    copies = {(pid, ident) for pid, ident, _ in out}
    assert len(copies) == len({pid for pid, _, _ in out}) <= 2


def test_worker_access_names_what_a_worker_cannot_use(tmp_path):
    # Workers read the inputs and the tiles themselves: an input missing, of another size or
    # a work folder that is not the driver's is named before any work is sent.
    from clearaudit.distributed import worker_access

    cloud = tmp_path / "a.laz"
    cloud.write_bytes(b"LASF" + bytes(96))
    work = tmp_path / "work"
    work.mkdir()
    probe = work / ".probe"
    probe.write_text("t0k3n")
    assert worker_access([str(cloud)], [100], str(probe), "t0k3n") == []
    assert list(work.iterdir()) == [probe]                  # its own test file is gone
    got = worker_access([str(tmp_path / "b.laz"), str(cloud)], [100, 99], str(probe), "t0k3n")
    assert got[0][0].endswith("b.laz") and "No such file" in got[0][1]
    assert got[1] == (str(cloud), "100 bytes there, 99 on the driver")
    assert worker_access([], [], str(probe), "other") == \
        [(f"--work-dir {work}", "another folder of the same name")]
    missing = worker_access([], [], str(tmp_path / "gone" / ".probe"), "t0k3n")
    assert missing[0][0] == f"--work-dir {tmp_path / 'gone'}" and "No such file" in missing[0][1]


def test_dask_engine_checks_every_worker_sees_inputs_and_work_folder(tmp_path, monkeypatch):
    from clearaudit.distributed import InProcessEngine, engine_for
    from clearaudit.errors import InputError

    cloud = tmp_path / "a.laz"
    cloud.write_bytes(b"LASF" + bytes(96))
    InProcessEngine(2).check_access([cloud], tmp_path)  # this process sees what the driver sees
    with engine_for(workers=1) as engine:
        engine.check_access([cloud], tmp_path)          # a local cluster shares the files
        assert not any(p.name.startswith(".workers-probe") for p in tmp_path.iterdir())
        # a worker elsewhere that lacks the file: one line naming the file and the worker
        monkeypatch.setattr(engine.client, "run", lambda *a, **k: {
            "tcp://10.0.0.7:4000": [(str(cloud), "No such file or directory")],
            "tcp://10.0.0.8:4000": []})
        with pytest.raises(InputError) as info:
            engine.check_access([cloud], tmp_path)
        assert info.value.source == str(cloud)
        assert "tcp://10.0.0.7:4000 cannot use it (No such file or directory)" in str(info.value)
        assert "\n" not in str(info.value)
        assert not any(p.name.startswith(".workers-probe") for p in tmp_path.iterdir())
        monkeypatch.undo()
        engine.finish()


def test_errors_survive_pickling():
    # reference: the standard library's pickle round trip (how a Dask worker's error comes
    # back to the driver): the same class, file or folders, and message
    import pickle

    from clearaudit.errors import EngineError, StageError, StorageError

    for exc in (InputError("a.laz", "is truncated or corrupt"), InputError(None, "no input"),
                StageError("model", "no spans"), StorageError(["/tmp", "/w"], "no space left"),
                EngineError("tcp://h:8786", "KilledWorker: x")):
        back = pickle.loads(pickle.dumps(exc))
        assert type(back) is type(exc) and str(back) == str(exc)
        assert back.problem == exc.problem


def test_a_full_disk_is_one_clear_error_and_leaves_nothing(corridor, tmp_path, monkeypatch):
    # a full disk while the tiles are written (simulated: errno ENOSPC from the split, as a
    # 20 MB tmpfs gave it) becomes a StorageError naming the folders; the partial output
    # folder and the work folder are gone
    import errno

    import clearaudit.tiling as tiling
    from clearaudit.errors import StorageError, is_disk_full

    def full(*args, **kwargs):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(tiling, "split_part", full)
    out = tmp_path / "out" / "audit"
    with pytest.raises(StorageError) as err:
        _run(corridor, out, work_dir=tmp_path / "work")
    assert "no space left on the device" in str(err.value)
    assert str(tmp_path / "work") in str(err.value) and str(out.parent) in str(err.value)
    assert not out.exists() and not [p for p in (tmp_path / "out").iterdir()]
    assert not [p for p in (tmp_path / "work").iterdir()]
    assert not is_disk_full(RuntimeError("not a disk"))
    try:
        try:
            full()
        except OSError as exc:
            raise RuntimeError("a library's own error") from exc
    except RuntimeError as wrapped:
        assert is_disk_full(wrapped)


def test_task_errors_come_back_as_values():
    # an expected error (bad input, full disk) is returned by the task wrapper, not raised on
    # the worker (where Dask would log its traceback on the console); others still raise
    import errno

    from clearaudit.distributed import _task, _TaskFailure

    def bad_input():
        raise InputError("x.laz", "is truncated or corrupt")

    def full_disk():
        raise OSError(errno.ENOSPC, "No space left on device")

    def bug():
        raise ZeroDivisionError("a bug")

    for fn, kind in ((bad_input, InputError), (full_disk, OSError)):
        result = _task(fn, (), {})
        assert isinstance(result, _TaskFailure) and isinstance(result.exc, kind)
    with pytest.raises(ZeroDivisionError):
        _task(bug, (), {})


def _raise_input_error(k):
    raise InputError(f"tile{k}.laz", "is truncated or corrupt")


def test_a_workers_input_error_reaches_the_driver_quietly(capfd):
    # on a local cluster a task's input error is raised on the driver (the same class and
    # message), and no worker prints Dask's "Compute Failed" report with its traceback
    from clearaudit.distributed import engine_for

    with engine_for(workers=1) as engine:
        with pytest.raises(InputError) as err:
            list(engine.run([(_raise_input_error, (k,), {}) for k in range(3)]))
    assert err.value.problem == "is truncated or corrupt"
    assert err.value.source.startswith("tile")
    assert "Compute Failed" not in capfd.readouterr().err


def _die(k):
    import os

    os._exit(3)  # the worker process dies (as if the system killed it for memory)


def test_a_failing_cluster_is_one_engine_error(capfd):
    # a task that kills its worker (Dask then gives up on it: KilledWorker) ends the run with
    # one EngineError naming the cluster, and the tasks' own errors are not taken for it
    import dask

    from clearaudit.distributed import _cluster_failure, engine_for
    from clearaudit.errors import EngineError

    with dask.config.set({"distributed.scheduler.allowed-failures": 0}):
        with engine_for(workers=1) as engine:
            with pytest.raises(EngineError) as err:
                list(engine.run([(_die, (0,), {})]))
    assert "KilledWorker" in err.value.problem and "nothing was written" in str(err.value)
    assert str(err.value).startswith("the Dask cluster at tcp://")
    assert "Traceback" not in capfd.readouterr().err
    assert not _cluster_failure(ValueError("a task's own error"))
    assert not _cluster_failure(InputError("a.laz", "is truncated or corrupt"))


def test_work_folder_removal_outlasts_tasks_still_writing(tmp_path):
    # a task still running after a failed run keeps adding cell files while the driver removes
    # the work folder (as Dask workers did after a truncated input: 70 MB left behind); the
    # removal is repeated until the folder stays gone, and the task then fails to write
    import threading

    from clearaudit.pipeline import remove_settled

    work = tmp_path / "work"
    (work / "cells").mkdir(parents=True)
    started, failed = threading.Event(), []

    def straggler():
        k = 0
        while True:
            try:
                cell = work / "cells" / f"c{k % 50}"
                cell.mkdir(exist_ok=True)  # one level at a time, as split_part does
                with open(cell / f"p{k:06d}.bin", "ab") as fh:
                    fh.write(b"x" * 4096)
            except FileNotFoundError:
                failed.append(k)
                return
            k += 1
            started.set()

    t = threading.Thread(target=straggler)
    t.start()
    started.wait(5)
    assert remove_settled(work, wait_s=10.0)
    t.join(10)
    assert failed and not work.exists()
    assert remove_settled(tmp_path / "never-made", wait_s=0.0)


def test_a_truncated_input_on_dask_leaves_no_work_folder(corridor, tmp_path):
    # the error of one split task ends the run while the other tasks still write: one
    # InputError naming the file, and neither the output nor the work folder left behind
    import shutil

    bad = tmp_path / "in" / corridor["cloud"].name
    bad.parent.mkdir()
    shutil.copy(corridor["cloud"], bad)
    with open(bad, "r+b") as fh:
        fh.truncate(int(bad.stat().st_size * 0.6))
    work = tmp_path / "work"
    work.mkdir()
    with pytest.raises(InputError) as err:
        _run({**corridor, "cloud": bad}, tmp_path / "out", workers=2, work_dir=work)
    assert err.value.source == str(bad.absolute()) or err.value.source == str(bad)
    assert list(work.iterdir()) == [] and not (tmp_path / "out").exists()


def test_cell_records_dropped_after_the_audit_keep_the_cells_other_files(tmp_path):
    # after the audit tasks the cells' point records go (on a thread beside the merge); the
    # repeated points' tables (copies.npy) stay for the classified copy
    from clearaudit.tiling import drop_cell_records

    work = tmp_path / "work"
    for cell in ("c0_0", "c0_1", "c3_-2"):
        (work / "cells" / cell).mkdir(parents=True)
        for part in range(3):
            (work / "cells" / cell / f"p{part:04d}.bin").write_bytes(b"\0" * 33)
    np.save(work / "cells" / "c0_1" / "copies.npy", np.zeros((2, 1), dtype=np.int64))
    (work / "tiles").mkdir()
    (work / "tiles" / "t0.cls").write_bytes(b"\2")
    assert drop_cell_records(work) == 9
    left = sorted(p.relative_to(work).as_posix() for p in work.rglob("*") if p.is_file())
    assert left == ["cells/c0_1/copies.npy", "tiles/t0.cls"]
    assert drop_cell_records(work) == 0
    assert drop_cell_records(tmp_path / "never-made") == 0

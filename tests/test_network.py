"""`clearaudit network`: every line of a manifest audited into its own contract folder (checked
with ../shared/tools/check_outputs.py), one work list ranked across the lines, bad lines
reported without stopping the others, bad manifests refused before any work."""
from __future__ import annotations

import csv
import json
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from clearaudit.cli import main

ROOT = Path(__file__).resolve().parent.parent
SAMPLE = ROOT / "sample_clouds"
NAME = "tarnwick_velloran_230kv"


def _copy_sample(folder: Path, stem: str) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    for suffix in (".laz", ".line.toml"):
        shutil.copy(SAMPLE / f"{NAME}{suffix}", folder / f"{stem}{suffix}")
    # the line file names its structures file
    shutil.copy(SAMPLE / f"{NAME}.structures.csv", folder / f"{NAME}.structures.csv")


def _rows(path: Path) -> list[dict[str, str]]:
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def _manifest(tmp: Path, extra: str = "") -> Path:
    _copy_sample(tmp / "north", "north")
    _copy_sample(tmp / "south", "south")
    path = tmp / "network.toml"
    path.write_text(f'''
[network]
name = "Velloran district test flights"

[[line]]
name = "north-230"
clouds = ["north/north.laz"]
line_file = "north/north.line.toml"
tiled = false

[[line]]
name = "south-230"
clouds = "south"
line_file = "south/south.line.toml"
tiled = true
{extra}''')
    return path


@pytest.fixture(scope="module")
def network_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("network")
    manifest = _manifest(tmp)
    out = tmp / "out"
    r = subprocess.run([sys.executable, "-m", "clearaudit.cli", "network", str(manifest),
                        "--out", str(out)], capture_output=True, text=True, timeout=900)
    assert r.returncode == 0, r.stderr[-3000:]
    return out, r.stdout


def test_each_line_gets_a_contract_folder_and_a_row(network_run):
    out, stdout = network_run
    from test_end_to_end import _checker

    checker = _checker()
    for name in ("north-230", "south-230"):
        assert (out / name / "spans.csv").exists()
        # the run record and the report name the line's folder where it ends up
        run = json.loads((out / name / "run.json").read_text())
        assert run["output_folder"] == str(out / name)
        if checker is not None:
            r = subprocess.run([sys.executable, str(checker), str(out / name)],
                               capture_output=True, text=True, timeout=120)
            assert "outputs ok" in r.stdout, r.stdout + r.stderr
    lines = _rows(out / "lines.csv")
    assert [r["line"] for r in lines] == ["north-230", "south-230"]
    assert all(r["status"] == "ok" and r["error"] == "" for r in lines)
    for r in lines:
        assert int(r["spans"]) == 5 and float(r["voltage_kv"]) == 230.0
        assert int(r["violations"]) == len(_rows(out / r["line"] / "violations.csv"))
        assert int(r["hazard_trees"]) == len(_rows(out / r["line"] / "hazard_trees.csv"))
    record = json.loads((out / "network.json").read_text())
    assert len(record["manifest"]["sha256"]) == 64 and record["failed"] == []
    assert record["caution"] and record["packages"]["numpy"]
    assert "licensed engineer" in stdout


def test_work_list_ranks_across_lines_and_keeps_each_lines_order(network_run):
    out, _ = network_run
    from clearaudit.network import work_key

    work = _rows(out / "work_list.csv")
    assert [int(r["network_priority"]) for r in work] == list(range(1, len(work) + 1))
    for name in ("north-230", "south-230"):
        mine = [r for r in work if r["line"] == name]
        for file in ("violations.csv", "hazard_trees.csv"):
            own = _rows(out / name / file)
            got = [r for r in mine if (r["finding"] == "fall_in") == (file == "hazard_trees.csv")]
            # the line's own priority order survives the merge, row for row
            assert [r["priority"] for r in got] == [r["priority"] for r in own]
            assert [r["x"] for r in got] == [r["x"] for r in own]
    # across lines the more urgent comes first (the same key as each line's own ranking)
    keys = [work_key(r) for r in work]
    assert keys == sorted(keys)
    geo = json.loads((out / "work_list.geojson").read_text())
    assert len(geo["features"]) == len(work)
    first = geo["features"][0]
    assert first["geometry"]["type"] == "Point"
    assert first["properties"]["network_priority"] == "1"


def test_a_bad_line_is_reported_and_the_others_go_on(tmp_path, capsys):
    # a file that starts like LAS but is cut short: found only when the line is read
    bad = tmp_path / "west"
    _copy_sample(bad, "west")
    data = (bad / "west.laz").read_bytes()
    (bad / "west.laz").write_bytes(data[:len(data) // 3])
    manifest = _manifest(tmp_path, '''
[[line]]
name = "west-230"
clouds = ["west/west.laz"]
line_file = "west/west.line.toml"
''')
    out = tmp_path / "out"
    rc = main(["network", str(manifest), "--out", str(out), "--no-report"])
    assert rc == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("clearaudit: error: line 'west-230': ")
    assert "west.laz" in err[0]
    lines = {r["line"]: r for r in _rows(out / "lines.csv")}
    assert lines["west-230"]["status"] == "failed" and "west.laz" in lines["west-230"]["error"]
    assert lines["north-230"]["status"] == lines["south-230"]["status"] == "ok"
    assert not (out / "west-230").exists()
    assert {r["line"] for r in _rows(out / "work_list.csv")} == {"north-230", "south-230"}


@pytest.mark.parametrize("extra, problem", [
    ('[[line]]\nname = "north-230"\nclouds = "north"\nvoltage_kv = 115\n', "listed twice"),
    ('[[line]]\nname = "east"\nclouds = "nowhere.laz"\nvoltage_kv = 115\n', "does not exist"),
    ('[[line]]\nname = "east"\nclouds = "north"\n', "give line_file or voltage_kv"),
    ('[[line]]\nname = "east"\nclouds = "north"\nvoltage = 115\n', "unknown key(s) voltage"),
    ('[[line]]\nname = "../east"\nclouds = "north"\nvoltage_kv = 115\n', "name must be"),
    ('[[line]]\nname = "east"\nclouds = "north"\nvoltage_kv = -5\n', "positive, finite"),
    ('[[line]]\nname = "east"\nclouds = "north"\nvoltage_kv = 115\ntiled = "yes"\n',
     "true or false"),
    ('[[line]\n', "is not valid TOML"),
    ('[[line]]\nname = "Lines.csv"\nclouds = "north"\nvoltage_kv = 115\n', "own files"),
    ('[[line]]\nname = "east"\nclouds = "north"\nvoltage_kv = inf\n', "positive, finite"),
    ('[[line]]\nname = "east"\nclouds = "empty"\nvoltage_kv = 115\n', "no .las or .laz"),
    ('[[line]]\nname = "east"\nclouds = "north"\nvoltage_kv = 115\ncrs = "EPSG:0"\n',
     "not a coordinate reference system"),
    ('[network.more]\nx = 1\n', "[network]: unknown key(s) more"),
])
def test_bad_manifests_are_refused_before_any_work(tmp_path, capsys, extra, problem):
    (tmp_path / "empty").mkdir()
    manifest = _manifest(tmp_path, extra)
    out = tmp_path / "out"
    assert main(["network", str(manifest), "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and str(manifest) in err[0] and problem in err[0], err
    assert not out.exists()
    assert main(["network", str(tmp_path / "missing.toml"), "--out", str(out)]) == 2
    assert "does not exist" in capsys.readouterr().err


def test_one_local_cluster_serves_every_line_with_the_same_results(network_run, tmp_path):
    out_threads, _ = network_run
    manifest = _manifest(tmp_path)
    # a line with tiled = false (north) runs in memory in this process, the cluster
    # notwithstanding
    out = tmp_path / "out"
    work = tmp_path / "shared-work"
    assert main(["network", str(manifest), "--out", str(out), "--no-report",
                 "--workers", "1", "--work-dir", str(work)]) == 0
    record = json.loads((out / "network.json").read_text())
    assert record["options"]["workers"] == 1 and record["options"]["work_dir"] == str(work)
    assert work.is_dir() and list(work.iterdir()) == []  # each line's tile files removed
    for name in ("north-230", "south-230"):
        run = json.loads((out / name / "run.json").read_text())
        assert run["options"]["scheduler"]  # the one cluster's address, shared by the lines
    north = json.loads((out / "north-230" / "run.json").read_text())["execution"]
    assert (north["mode"], north["mode_reason"]) == ("in-memory", "asked for (in memory)")
    assert json.loads((out / "south-230" / "run.json").read_text())["execution"]["engine"] \
        == "dask"
    south = json.loads((out / "south-230" / "run.json").read_text())
    north = json.loads((out / "north-230" / "run.json").read_text())
    assert south["options"]["scheduler"] == north["options"]["scheduler"]
    # the tiled line equals its in-process run; the work list too, where the tiled
    # line's findings come from
    for f in ("violations.csv", "hazard_trees.csv", "spans.csv"):
        assert (out / "south-230" / f).read_bytes() == (out_threads / "south-230" / f).read_bytes()


def test_engine_options_and_out_are_checked_once_before_any_work(tmp_path, capsys):
    manifest = _manifest(tmp_path)
    out = tmp_path / "out"
    for args, problem in (
            (["--threads", "-3"], "--threads: must be 0"),
            (["--workers", "1", "--threads", "2"], "--threads: applies to the in-process"),
            (["--workers", "1", "--scheduler", "tcp://127.0.0.1:9"], "not both")):
        assert main(["network", str(manifest), "--out", str(out), *args]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and problem in err[0], err
        assert not out.exists()
    # --overwrite replaces the whole folder: never one that holds the inputs
    assert main(["network", str(manifest), "--out", str(tmp_path), "--overwrite"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--out:" in err[0] and "holds the input" in err[0]
    assert manifest.exists() and (tmp_path / "north" / "north.laz").exists()
    # the same guard for a single audit
    assert main(["audit", str(tmp_path / "north" / "north.laz"), "--line",
                 str(tmp_path / "north" / "north.line.toml"), "--out", str(tmp_path / "north"),
                 "--overwrite"]) == 2
    assert "holds the input" in capsys.readouterr().err
    assert (tmp_path / "north" / "north.laz").exists()
    # an output folder that cannot be made (its parent is a file): one line, no traceback
    (tmp_path / "afile").write_text("x")
    assert main(["network", str(manifest), "--out", str(tmp_path / "afile" / "out")]) == 2
    assert "cannot be created" in capsys.readouterr().err


def test_work_list_keeps_its_columns_when_no_line_has_findings(tmp_path):
    from clearaudit.network import network_work_list
    from clearaudit.outputs import VIOLATION_COLUMNS

    columns, rows = network_work_list({})
    assert rows == [] and columns[:2] == ["network_priority", "line"]
    assert columns[2:2 + len(VIOLATION_COLUMNS)] == VIOLATION_COLUMNS


# ------------------------------------------------------------------- an interrupted run resumed
@pytest.fixture
def interrupted(tmp_path_factory):
    """The sample network stopped (as by Ctrl-C) when its second line starts: the first line
    is finished (made for each test: the resumed run uses it up)."""
    import contextlib
    import io

    import clearaudit.pipeline as pipeline
    from clearaudit.network import run_network

    tmp = tmp_path_factory.mktemp("interrupted")
    manifest = _manifest(tmp)
    out = tmp / "out"
    real = pipeline.run_audit

    def stop_at_south(options, **kw):
        if Path(options.out).name == "south-230":
            raise KeyboardInterrupt
        return real(options, **kw)

    patch = pytest.MonkeyPatch()
    patch.setattr(pipeline, "run_audit", stop_at_south)
    err = io.StringIO()
    try:
        with contextlib.redirect_stderr(err), pytest.raises(KeyboardInterrupt):
            run_network(manifest, out)
    finally:
        patch.undo()
    return tmp, manifest, out, err.getvalue()


def _audit_options(tmp: Path, **changes):
    """The options run_network gives the north line of :func:`_manifest` (in this process)."""
    from dataclasses import replace

    from clearaudit.network import kept_lines_folder
    from clearaudit.pipeline import AuditOptions

    options = AuditOptions(clouds=[tmp / "north" / "north.laz"],
                           out=kept_lines_folder(tmp / "out") / "north-230",
                           line_file=tmp / "north" / "north.line.toml", tiled=False)
    return replace(options, **changes)


def test_a_kept_line_is_reused_only_with_the_same_inputs_options_version_and_mode(
        interrupted, monkeypatch):
    import clearaudit.network as network
    import clearaudit.pipeline as pipeline
    from clearaudit.network import kept_lines_folder, reuse_problem

    tmp, _, out, _ = interrupted
    folder = kept_lines_folder(out) / "north-230"
    assert reuse_problem(folder, _audit_options(tmp)) is None
    assert reuse_problem(folder, _audit_options(tmp, voltage_kv=115.0)) == \
        "its options differ (voltage_kv)"
    assert "tiled" in reuse_problem(folder, _audit_options(tmp, tiled=True))
    # the engine changes no result: its options are not compared
    assert reuse_problem(folder, _audit_options(tmp, threads=1, scheduler=None)) is None
    extra = _audit_options(tmp, clouds=[tmp / "north" / "north.laz",
                                        tmp / "south" / "south.laz"])
    assert reuse_problem(folder, extra) == "the list of its point cloud files has changed"
    line_file = tmp / "north" / "north.line.toml"
    text = line_file.read_bytes()
    try:
        line_file.write_bytes(text + b"\n# a comment\n")
        assert reuse_problem(folder, _audit_options(tmp)) == f"{line_file} has changed or is missing"
    finally:
        line_file.write_bytes(text)
    assert reuse_problem(folder, _audit_options(tmp)) is None
    monkeypatch.setattr(pipeline, "choose_mode", lambda *a: (True, "test"))
    assert reuse_problem(folder, _audit_options(tmp)) == \
        "it ran in-memory, this run would be tiled"
    monkeypatch.undo()
    monkeypatch.setattr(network, "__version__", "0.0.1")
    assert reuse_problem(folder, _audit_options(tmp)).startswith("it was written by clearaudit")


def test_an_interrupted_network_run_resumes_with_the_lines_it_finished(interrupted, network_run,
                                                                      monkeypatch, capsys):
    import clearaudit.pipeline as pipeline
    from clearaudit.network import kept_lines_folder

    tmp, manifest, out, err = interrupted
    kept = kept_lines_folder(out)
    # the interrupted run wrote no network folder; the finished line waits beside it
    assert not out.exists()
    assert sorted(p.name for p in kept.iterdir()) == ["north-230"]
    assert (kept / "north-230" / "run.json").exists()
    assert "1 finished line(s) kept in" in err and "--resume" in err
    # without --resume the kept line stops the run before any work, and nothing is lost
    assert main(["network", str(manifest), "--out", str(out)]) == 2
    lines = capsys.readouterr().err.strip().splitlines()
    assert len(lines) == 1 and "--resume" in lines[0] and str(kept) in lines[0]
    assert not out.exists() and (kept / "north-230" / "run.json").exists()
    # with --resume only the line left is audited
    real = pipeline.run_audit
    audited = []

    def counting(options, **kw):
        audited.append(Path(options.out).name)
        return real(options, **kw)

    monkeypatch.setattr(pipeline, "run_audit", counting)
    assert main(["network", str(manifest), "--out", str(out), "--resume"]) == 0
    assert audited == ["south-230"]
    assert not kept.exists()
    rows = {r["line"]: r for r in _rows(out / "lines.csv")}
    assert rows["north-230"]["reused"] == "yes" and rows["south-230"]["reused"] == ""
    assert all(r["status"] == "ok" for r in rows.values())
    assert json.loads((out / "network.json").read_text())["reused"] == ["north-230"]
    # the same results as the run that was never interrupted
    whole, _ = network_run
    for name in ("north-230", "south-230"):
        for f in ("spans.csv", "violations.csv", "hazard_trees.csv"):
            assert (out / name / f).read_bytes() == (whole / name / f).read_bytes()
    assert (out / "work_list.csv").read_bytes() == (whole / "work_list.csv").read_bytes()
    for column in ("spans", "violations", "hazard_trees", "largest_deficit_m"):
        assert [r[column] for r in rows.values()] == \
            [r[column] for r in _rows(whole / "lines.csv")]


def test_a_run_stopped_before_any_line_finished_leaves_nothing(tmp_path, monkeypatch, capsys):
    import clearaudit.pipeline as pipeline
    from clearaudit.network import kept_lines_folder

    manifest = _manifest(tmp_path)
    out = tmp_path / "out"

    def stop(options, **kw):
        raise KeyboardInterrupt

    monkeypatch.setattr(pipeline, "run_audit", stop)
    assert main(["network", str(manifest), "--out", str(out)]) == 130
    assert capsys.readouterr().err.strip().splitlines() == ["clearaudit: interrupted"]
    assert not out.exists() and not kept_lines_folder(out).exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["network.toml", "north", "south"]


# ----------------------------------------------------------------------- lines side by side
def test_lines_side_by_side_on_a_cluster_give_each_lines_own_results(network_run, tmp_path,
                                                                     monkeypatch):
    import threading

    import clearaudit.pipeline as pipeline

    whole, _ = network_run
    manifest = _manifest(tmp_path)
    # north in memory in this process (the manifest's tiled = false, as in network_run),
    # south's tiles on the cluster, both at once
    real = pipeline.run_audit
    running, most = set(), [0]
    lock = threading.Lock()

    def watched(options, **kw):
        with lock:
            running.add(Path(options.out).name)
            most[0] = max(most[0], len(running))
        try:
            return real(options, **kw)
        finally:
            with lock:
                running.discard(Path(options.out).name)

    monkeypatch.setattr(pipeline, "run_audit", watched)
    out = tmp_path / "out"
    assert main(["network", str(manifest), "--out", str(out), "--workers", "2",
                 "--lines-at-once", "2"]) == 0
    assert most[0] == 2  # the two lines did run at once
    rows = _rows(out / "lines.csv")
    assert [r["line"] for r in rows] == ["north-230", "south-230"]  # the manifest's order
    for name in ("north-230", "south-230"):
        for f in ("spans.csv", "violations.csv", "hazard_trees.csv"):
            assert (out / name / f).read_bytes() == (whole / name / f).read_bytes(), (name, f)
    assert (out / "work_list.csv").read_bytes() == (whole / "work_list.csv").read_bytes()
    assert json.loads((out / "network.json").read_text())["options"]["lines_at_once"] == 2


def test_lines_at_once_needs_a_cluster_and_a_positive_count(tmp_path, capsys):
    manifest = _manifest(tmp_path)
    out = tmp_path / "out"
    for args, problem in ((["--lines-at-once", "2"], "Dask engine"),
                          (["--lines-at-once", "0", "--workers", "1"], "positive count")):
        assert main(["network", str(manifest), "--out", str(out), *args]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and err[0].startswith("clearaudit: error: --lines-at-once: ")
        assert problem in err[0]
        assert not out.exists()


def test_a_stop_reaches_every_run_of_the_process_at_its_engines_next_step():
    from clearaudit.distributed import InProcessEngine, check_stop, stop_runs

    def square(x):
        return x * x

    engine = InProcessEngine(2)
    assert sorted(r for _, r in engine.run([(square, (k,), {}) for k in range(4)])) == [0, 1, 4, 9]
    with stop_runs():
        with pytest.raises(KeyboardInterrupt):
            check_stop()
        with pytest.raises(KeyboardInterrupt):
            list(engine.run([(square, (k,), {}) for k in range(4)]))
        with pytest.raises(KeyboardInterrupt):
            list(InProcessEngine(1).run([(square, (k,), {}) for k in range(4)]))
    check_stop()  # cleared when the block ends
    assert [r for _, r in InProcessEngine(1).run([(square, (3,), {})])] == [9]

"""Command line: subcommands, the field calculator and bad-input handling (exit 2, one line,
no traceback, nothing written)."""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import laspy
import numpy as np
import pytest

from clearaudit.cli import main

SAMPLE = Path(__file__).parent.parent / "sample_clouds"
REAL = Path(__file__).parent / "data" / "real"


def run_cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "clearaudit.cli", *args],
                          capture_output=True, text=True, timeout=300)


def test_help_of_every_subcommand():
    for sub in ("audit", "info", "sample", "report", "view", "sag", "conductors"):
        r = run_cli(sub, "--help")
        assert r.returncode == 0, r.stderr
        assert "usage" in r.stdout


def test_info_on_sample(capsys):
    assert main(["info", str(SAMPLE / "tarnwick_velloran_230kv.laz")]) == 0
    out = capsys.readouterr().out
    assert "WGS 84 / UTM zone 17N" in out
    assert "unclassified" in out


def test_info_names_overlapping_files(capsys, tmp_path):
    # two copies of the sample: their boxes meet (the box test is checked against a double
    # loop in test_repeated_points)
    import shutil

    for name in ("a.laz", "b.laz"):
        shutil.copy(SAMPLE / "tarnwick_velloran_230kv.laz", tmp_path / name)
    assert main(["info", str(tmp_path)]) == 0
    out = " ".join(capsys.readouterr().out.split())
    assert "1 pair(s) of files overlap: a.laz & b.laz" in out


def test_conductors_listing(capsys):
    assert main(["conductors", "drake"]) == 0
    assert "795" in capsys.readouterr().out


def test_sag_calculator_handbook_level_span(capsys):
    # Level span 600 ft, 795 kcmil 26/7 ACSR (1.094 lb/ft), H = 6,300 lb at the reference:
    # sag 7.81 ft (from memory, handbook worked example). The library weight of Drake is
    # 1.0937 lb/ft, so the reference row must reproduce 7.81 ft to the quoted precision.
    assert main(["sag", "--conductor", "Drake", "--span", "600", "--units", "imperial",
                 "--tension", "6300", "--at", "60", "--temperatures", "60,120"]) == 0
    out = capsys.readouterr().out
    row = next(line for line in out.splitlines() if "│    60.0 │" in line)
    assert "7.8" in row and "6,300.0" in row


def test_sag_calculator_measured_temperature_and_csv(tmp_path, capsys):
    csv_path = tmp_path / "table.csv"
    assert main(["sag", "--conductor", "795 26/7 ACSR", "--span", "300,350,420",
                 "--percent-rbs", "20", "--at", "15", "--measured", "31", "--district", "heavy",
                 "--csv", str(csv_path)]) == 0
    out = capsys.readouterr().out
    assert "set each span to" in out
    text = csv_path.read_text().splitlines()
    assert text[0].startswith("temperature_c,load_case")
    assert any("heavy district" in line for line in text)


@pytest.mark.parametrize("make, fragment", [
    (lambda d: d / "missing.laz", "does not exist"),
    (lambda d: (d / "text.laz").write_text("hello") and d / "text.laz", "not a las"),
    (lambda d: _truncated(d), "truncated or corrupt"),
    (lambda d: _empty(d), "no points"),
    (lambda d: _beyond_bounds(d), "beyond the bounds in its header"),
])
@pytest.mark.parametrize("mode", [[], ["--tiled"]])
def test_audit_bad_cloud_exit_2_nothing_written(tmp_path, make, fragment, mode):
    cloud = make(tmp_path)
    out = tmp_path / "out"
    r = run_cli("audit", str(cloud), "--voltage-kv", "230", "--out", str(out), *mode)
    assert r.returncode == 2, r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in r.stderr
    assert str(cloud.name) in lines[0] and fragment in lines[0].lower()
    assert not out.exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".out")]


def test_audit_bad_crs_and_existing_output(tmp_path):
    laz = REAL / "ahn4_powerline_07CZ2_14.laz"
    r = run_cli("audit", str(laz), "--voltage-kv", "150", "--crs", "EPSG:nonsense",
                "--out", str(tmp_path / "o"))
    assert r.returncode == 2 and "--crs" in r.stderr and "Traceback" not in r.stderr
    existing = tmp_path / "existing"
    existing.mkdir()
    (existing / "keep.txt").write_text("mine")
    r = run_cli("audit", str(laz), "--voltage-kv", "150", "--out", str(existing))
    assert r.returncode == 2 and "already exists" in r.stderr
    assert (existing / "keep.txt").read_text() == "mine"
    # --overwrite replaces a folder whole: only an earlier output (run.json), never a folder
    # of the user's own files (e.g. --out . in a working folder)
    r = run_cli("audit", str(laz), "--voltage-kv", "150", "--out", str(existing), "--overwrite")
    assert r.returncode == 2 and "is not an earlier clearaudit output folder" in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    assert (existing / "keep.txt").read_text() == "mine"


def test_audit_needs_voltage(tmp_path):
    r = run_cli("audit", str(REAL / "ahn4_powerline_07CZ2_14.laz"), "--out", str(tmp_path / "o"))
    assert r.returncode == 2 and "voltage" in r.stderr


def _truncated(d: Path) -> Path:
    src = (SAMPLE / "tarnwick_velloran_230kv.laz").read_bytes()
    p = d / "cut.laz"
    p.write_bytes(src[: len(src) // 2])
    return p


def _beyond_bounds(d: Path) -> Path:
    """The sample with a header whose x bounds end 50 m past the smallest x: most points lie
    beyond them (as after damage that still decodes, or a stale header)."""
    p = d / "bounds.laz"
    p.write_bytes((SAMPLE / "tarnwick_velloran_230kv.laz").read_bytes())
    with laspy.open(p) as f:
        lo = float(f.header.mins[0])
    with open(p, "r+b") as fh:  # ASPRS LAS 1.2-1.4 header: max x at byte 179, min x at 187
        fh.seek(179)
        fh.write(np.array([lo + 50.0], dtype="<f8").tobytes())
    return p


def _empty(d: Path) -> Path:
    header = laspy.LasHeader(point_format=6, version="1.4")
    las = laspy.LasData(header)
    las.x = np.zeros(0)
    las.y = np.zeros(0)
    las.z = np.zeros(0)
    p = d / "empty.las"
    las.write(p)
    return p


def test_audit_unwritable_out_or_work_dir_exit_2_before_any_work(tmp_path):
    # a file where a folder must be: refused during validation, one line naming the option
    blocker = tmp_path / "blocker"
    blocker.write_text("a file, not a folder")
    cloud = SAMPLE / "tarnwick_velloran_230kv.laz"
    for option, args in (("--out", ["--out", str(blocker / "sub" / "o")]),
                         ("--work-dir", ["--out", str(tmp_path / "o"), "--tiled",
                                         "--work-dir", str(blocker / "w")])):
        r = run_cli("audit", str(cloud), "--voltage-kv", "230", *args)
        assert r.returncode == 2, r.stderr
        lines = r.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith(f"clearaudit: error: {option}: ")
        assert "cannot be created" in lines[0] and "is a file, not a folder" in lines[0]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["blocker"]


def test_unwritable_folders_are_named_with_the_reason(tmp_path, monkeypatch):
    # read-only file systems and missing permissions (simulated: the tests may run as root,
    # for whom permission bits do not apply, and cannot mount a read-only file system)
    import clearaudit.pipeline as pipeline
    from clearaudit.errors import InputError

    target = tmp_path / "not" / "yet"
    pipeline.refuse_unwritable(target, "--out")  # nothing made, nothing refused
    assert not (tmp_path / "not").exists()
    monkeypatch.setattr(pipeline.os, "access", lambda *a, **k: False)
    with pytest.raises(InputError, match=r"cannot write in .* \(no permission to write\)"):
        pipeline.refuse_unwritable(target, "--out")
    monkeypatch.setattr(pipeline, "_read_only", lambda folder: True)
    with pytest.raises(InputError) as err:
        pipeline.refuse_unwritable(target, "--work-dir")
    assert err.value.source == "--work-dir"
    assert err.value.problem == f"cannot write in {tmp_path} (read-only file system)"


def test_out_of_memory_is_one_line_and_leaves_nothing(tmp_path, monkeypatch, capsys):
    # a tile that runs out of memory (simulated): one line with what to try, exit code 1, no
    # output folder, no partial or work folder left beside it
    import clearaudit.tiling as tiling

    def no_memory(*args, **kwargs):
        raise MemoryError

    monkeypatch.setattr(tiling, "classify_tile", no_memory)
    out = tmp_path / "o"
    assert main(["audit", str(SAMPLE / "tarnwick_velloran_230kv.laz"), "--line",
                 str(SAMPLE / "tarnwick_velloran_230kv.line.toml"), "--out", str(out),
                 "--tiled", "--no-report"]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("clearaudit: error: out of memory")
    assert "--tiled" in err[0] and "--tile-points" in err[0]
    assert list(tmp_path.iterdir()) == []

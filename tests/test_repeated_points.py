"""Points delivered twice (input tiles with overlapping buffers) are counted once.

References: the duplicate search is checked against ``numpy.unique`` over rows (the reference
library's own grouping of equal coordinates) and the box test against a plain double loop; end
to end, a survey delivered as two tiles with a 30 m buffer each side of the cut, and a file
passed twice, are compared with the same survey read once, with laspy reading the classified
copies. Tiles delivered with buffers are common practice (no source).
"""
from __future__ import annotations

import csv
import shutil
from pathlib import Path
from types import SimpleNamespace

import laspy
import numpy as np
import pytest

from clearaudit.duplicates import cloud_copies, compare_step_m, later_copies, overlapping_files
from clearaudit.pipeline import AuditOptions, run_audit
from clearaudit.synth import generate_corridor, write_corridor

#: Clearances of a survey read in another point order: the classifier and the fits see the
#: same points in another order, so ties and sums may round differently. [m]
ORDER_TOL_M = 0.01


def _reference_copies(xyz, file_id, step):
    """The same answer from numpy.unique over rows: the first point of each group of equal
    rounded coordinates is kept; the group's points of later files are copies of it."""
    q = np.floor(xyz / step + 0.5).astype(np.int64)
    _, first, inverse = np.unique(q, axis=0, return_index=True, return_inverse=True)
    twin = first[inverse.reshape(-1)]
    copy = np.flatnonzero(file_id > file_id[twin])
    return copy, twin[copy]


@pytest.mark.parametrize("stretch", [1.0, 1e6])  # one packed key; three keys (wide extent)
def test_later_copies_match_numpy_unique(stretch):
    rng = np.random.default_rng(5)
    base = np.round(rng.uniform(0, 50, (4000, 3)), 3)
    base[:, 0] = np.round(base[:, 0] * stretch, 3)
    # three files: the second repeats part of the first, the third part of both and itself
    files = [base[:2000], np.concatenate([base[1500:2500], base[1500:1600]]),
             np.concatenate([base[2400:3000], base[100:200], base[2400:2450]])]
    xyz = np.concatenate(files)
    file_id = np.repeat(np.arange(3), [len(f) for f in files])
    # sub-millimetre jitter on some copies: still the same point at a 1 mm step
    jitter = rng.uniform(-0.0004, 0.0004, xyz.shape)
    xyz = xyz + np.where(file_id[:, None] > 0, jitter, 0.0)
    copy, twin = later_copies(xyz, file_id, 0.001)
    ref_copy, ref_twin = _reference_copies(xyz, file_id, 0.001)
    np.testing.assert_array_equal(copy, ref_copy)
    np.testing.assert_array_equal(twin, ref_twin)
    # file 1: 500 + 100 repeats of file 0; file 2: 100 of file 1, 100 of file 0 and its own
    # 50 points twice, both of them repeats of file 1
    assert len(copy) == 600 + 250
    assert np.all(file_id[twin] < file_id[copy])
    # a point repeated inside one file only is kept twice (a file is taken as delivered)
    own = np.concatenate([base[:10], base[:10], base[10:20]])
    assert len(later_copies(own, np.repeat([0, 0, 1], 10), 0.001)[0]) == 0


def test_one_file_or_no_repeat_finds_nothing():
    xyz = np.zeros((10, 3))
    assert len(later_copies(xyz, np.zeros(10, int), 0.001)[0]) == 0  # one file
    xyz = np.arange(30.0).reshape(10, 3)
    assert len(later_copies(xyz, np.repeat([0, 1], 5), 0.001)[0]) == 0


def test_overlapping_files_match_a_double_loop():
    rng = np.random.default_rng(2)
    lo = rng.uniform(0, 100, (12, 3))
    hi = lo + rng.uniform(1, 30, (12, 3))
    want = [(i, j) for i in range(12) for j in range(i + 1, 12)
            if all(lo[i, a] <= hi[j, a] and lo[j, a] <= hi[i, a] for a in range(3))]
    assert overlapping_files(lo, hi) == want
    assert 0 < len(want) < 66


def test_compare_step_is_a_millimetre_or_the_coarsest_scale():
    def files(*scales):
        return [SimpleNamespace(scales=s) for s in scales]

    metres = (1.0, 1.0, 1.0)
    assert compare_step_m(files((0.001, 0.001, 0.001), (0.0001,) * 3), metres) == 0.001
    assert compare_step_m(files((0.001,) * 3, (0.01, 0.01, 0.01)), metres) == 0.01
    # a file in feet (0.01 ft = 3.048 mm; the international foot, from memory)
    assert compare_step_m(files((0.01,) * 3), (0.3048,) * 3) == pytest.approx(0.003048)


def test_cloud_copies_only_where_files_meet():
    # two files side by side sharing a 10 m strip, a third far away repeating nothing
    rng = np.random.default_rng(9)
    a = np.round(rng.uniform([0, 0, 0], [60, 20, 5], (3000, 3)), 3)
    strip = a[a[:, 0] >= 50]
    b = np.concatenate([strip, np.round(rng.uniform([60, 0, 0], [110, 20, 5], (2000, 3)), 3)])
    c = np.round(rng.uniform([500, 0, 0], [520, 20, 5], (500, 3)), 3)
    xyz = np.concatenate([a, b, c])
    sid = np.repeat([0, 1, 2], [len(a), len(b), len(c)])
    copy, twin, pairs = cloud_copies(xyz, sid, 0.001)
    assert pairs == 1
    np.testing.assert_array_equal(copy, len(a) + np.arange(len(strip)))
    np.testing.assert_array_equal(xyz[twin], strip)


# ------------------------------------------------------------------------------ end to end
def _buffered_tiles(src: Path, folder: Path, buffer_m: float) -> tuple[int, int]:
    """``src`` cut at its median x into tiles ``a.laz`` and ``b.laz`` in ``folder``, each
    with ``buffer_m`` of the other's side; (points of ``src``, points in both tiles)."""
    las = laspy.read(src)
    x = np.asarray(las.x)
    cut = float(np.median(x))
    folder.mkdir()
    for name, keep in (("a", x < cut + buffer_m), ("b", x >= cut - buffer_m)):
        out = laspy.LasData(las.header.copy())
        out.points = las.points[keep]
        out.write(folder / f"{name}.laz")
    return len(x), int(np.count_nonzero((x < cut + buffer_m) & (x >= cut - buffer_m)))


@pytest.fixture(scope="module")
def delivery(tmp_path_factory) -> dict[str, Path]:
    """A small corridor as one file, as two buffered tiles, and as one file passed twice."""
    base = tmp_path_factory.mktemp("repeated")
    c = generate_corridor(seed=23, n_spans=3, density_per_m2=3.0,
                          span_length_m=(250.0, 300.0), classified=False, name="buffers")
    paths = write_corridor(c, base, "buffers")
    tiles = base / "tiles"
    points, buffer_points = _buffered_tiles(paths["cloud"], tiles, 30.0)
    twice = base / "twice"
    twice.mkdir()
    for name in ("a", "b"):
        shutil.copy(paths["cloud"], twice / f"{name}.laz")
    return {"cloud": paths["cloud"], "line": paths["line"], "tiles": tiles, "twice": twice,
            "buffer_points": buffer_points, "points": points, "base": base}


def _audit(d, clouds, name, **kw) -> Path:
    return run_audit(AuditOptions(clouds=[clouds], out=d["base"] / name, line_file=d["line"],
                                  overwrite=True, skip_report=True, **kw))


def _rows(path: Path) -> list[dict]:
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def _record(out: Path) -> dict:
    import json

    return json.loads((out / "run.json").read_text())


@pytest.mark.parametrize("mode", [{"tiled": False}, {"tiled": True, "tile_points": 120_000}])
def test_a_file_passed_twice_gives_the_results_of_one(delivery, mode):
    label = "memory" if not mode["tiled"] else "tiled"
    once = _audit(delivery, delivery["cloud"], f"once-{label}", **mode)
    twice = _audit(delivery, delivery["twice"], f"twice-{label}", **mode)
    rec = _record(twice)["repeated_points"]
    assert rec["points"] == _record(once)["points_read"]
    assert rec["by_file"] == {str(delivery["twice"] / "b.laz"): rec["points"]}
    for name in ("spans.csv", "violations.csv", "hazard_trees.csv"):
        assert (once / name).read_bytes() == (twice / name).read_bytes(), name
    # the classified copy: both copies of every point with the single run's class and height
    a = laspy.read(once / "classified.laz")
    b = laspy.read(twice / "classified.laz")
    n = len(a)
    assert len(b) == 2 * n
    for half in (slice(0, n), slice(n, 2 * n)):
        np.testing.assert_array_equal(np.asarray(b.classification[half]),
                                      np.asarray(a.classification))
        np.testing.assert_array_equal(np.asarray(b["height_above_ground"][half]),
                                      np.asarray(a["height_above_ground"]))


def test_buffered_tiles_count_the_buffer_once(delivery):
    # no corridor cull: every point is read, so the whole buffer must be found
    kw = {"tiled": True, "tile_points": 120_000, "corridor_buffer_m": 0.0}
    once = _audit(delivery, delivery["cloud"], "once-buffer", **kw)
    tiles = _audit(delivery, delivery["tiles"], "tiles-buffer", **kw)
    rec = _record(tiles)
    assert rec["repeated_points"]["files_overlapping"] == 1
    assert rec["points_read"] == _record(once)["points_read"] == delivery["points"]
    assert rec["repeated_points"]["points"] == delivery["buffer_points"]
    # the same points in another order: the same findings, clearances within rounding
    va, vb = _rows(once / "violations.csv"), _rows(tiles / "violations.csv")
    assert [(r["kind"], r["condition"], r["span_id"], r["wire_id"]) for r in va] == \
        [(r["kind"], r["condition"], r["span_id"], r["wire_id"]) for r in vb]
    for ra, rb in zip(va, vb, strict=True):
        assert abs(float(ra["clearance_m"]) - float(rb["clearance_m"])) <= ORDER_TOL_M
    sa, sb = _rows(once / "spans.csv"), _rows(tiles / "spans.csv")
    assert [(r["span_id"], r["wire_id"], r["status"]) for r in sa] == \
        [(r["span_id"], r["wire_id"], r["status"]) for r in sb]
    # the buffer's points in both tiles' classified copies carry one and the same class
    las = laspy.read(tiles / "classified.laz")
    xyz = np.column_stack([las.X, las.Y, las.Z])
    _, first, inverse = np.unique(xyz, axis=0, return_index=True, return_inverse=True)
    codes = np.asarray(las.classification)
    np.testing.assert_array_equal(codes, codes[first[inverse.reshape(-1)]])


def test_real_crop_in_buffered_tiles(tmp_path):
    # A real survey crop (AHN4, CC0; tests/data/real) cut into two tiles with a 20 m buffer
    # on each side of the cut: the same findings as the crop in one file. Before repeated
    # points were counted once, the crop cut this way gave 8 violations instead of 4.
    real = Path(__file__).parent / "data" / "real" / "ahn4_powerline_12BZ1_21.laz"
    tiles = tmp_path / "tiles"
    _, buffer = _buffered_tiles(real, tiles, 20.0)

    def audit(clouds, name):
        return run_audit(AuditOptions(clouds=[clouds], out=tmp_path / name, voltage_kv=150.0,
                                      overwrite=True, skip_report=True, tiled=False))

    once, split = audit(real, "once"), audit(tiles, "split")
    assert _record(split)["repeated_points"]["points"] == buffer
    assert _record(split)["points_read"] == _record(once)["points_read"]
    va, vb = _rows(once / "violations.csv"), _rows(split / "violations.csv")
    assert va  # the crop has findings to compare
    assert [(r["kind"], r["condition"], r["span_id"], r["wire_id"]) for r in va] == \
        [(r["kind"], r["condition"], r["span_id"], r["wire_id"]) for r in vb]
    for ra, rb in zip(va, vb, strict=True):
        assert abs(float(ra["clearance_m"]) - float(rb["clearance_m"])) <= ORDER_TOL_M
    sa, sb = _rows(once / "spans.csv"), _rows(split / "spans.csv")
    assert len(sa) == len(sb) > 0
    for ra, rb in zip(sa, sb, strict=True):
        assert (ra["span_id"], ra["wire_id"], ra["status"]) == \
            (rb["span_id"], rb["wire_id"], rb["status"])
        for name in ("sag_survey_m", "horizontal_tension_n"):
            if ra[name]:
                assert float(rb[name]) == pytest.approx(float(ra[name]), rel=1e-6)


def test_a_header_without_bounds_is_compared_with_every_file(delivery, tmp_path):
    # some writers leave the header's bounds at 0: such a file's box is unknown, so it must
    # be searched for repeats like a file whose box meets every other (LAS 1.4 R15, Table 3:
    # the bounds are the header's Max/Min X, Y, Z, eight-byte doubles from byte 179)
    import struct

    from clearaudit.io.las import read_setup

    folder = tmp_path / "nobounds"
    folder.mkdir()
    for name in ("a.laz", "b.laz"):
        shutil.copy(delivery["cloud"], folder / name)
    with open(folder / "b.laz", "r+b") as fh:
        fh.seek(179)
        fh.write(struct.pack("<6d", *([0.0] * 6)))
    b = laspy.read(folder / "b.laz")
    assert list(b.header.mins) == [0.0, 0.0, 0.0] and list(b.header.maxs) == [0.0, 0.0, 0.0]
    setup = read_setup(folder, hashes=False)
    assert np.all(np.isinf(setup.file_min[1])) and overlapping_files(
        setup.file_min, setup.file_max) == [(0, 1)]
    out = _audit(delivery, folder, "nobounds", tiled=True, tile_points=120_000)
    once = _audit(delivery, delivery["cloud"], "once-nobounds", tiled=True, tile_points=120_000)
    assert _record(out)["repeated_points"]["points"] == _record(once)["points_read"]
    assert (out / "violations.csv").read_bytes() == (once / "violations.csv").read_bytes()

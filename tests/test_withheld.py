"""Points flagged withheld are read but never analysed.

Reference: ASPRS, LAS Specification 1.4 R15 (2019), Tables 8 and 16 — a point with the
withheld flag "should not be included in processing (synonymous with Deleted)"; laspy reads
and writes the flag (the reference for which points carry it). End to end, a survey with
extra points flagged withheld must give the results of the survey without them, while the
same extra points unflagged change them (the control).
"""
from __future__ import annotations

import json
from pathlib import Path

import laspy
import numpy as np
import pytest

from clearaudit.io.las import describe, read_cloud, read_range, read_setup
from clearaudit.pipeline import AuditOptions, run_audit
from clearaudit.synth import generate_corridor, write_corridor


def _flagged_copy(src: Path, dst: Path, point_format: int, every: int = 7) -> np.ndarray:
    """``src`` rewritten in ``point_format`` with every ``every``-th point withheld."""
    las = laspy.read(src)
    out = laspy.convert(las, point_format_id=point_format,
                        file_version="1.4" if point_format >= 6 else "1.2")
    flags = np.zeros(len(out), dtype=np.uint8)
    flags[::every] = 1
    out.withheld = flags
    out.write(dst)
    return flags.astype(bool)


@pytest.fixture(scope="module")
def corridor(tmp_path_factory) -> dict[str, Path]:
    c = generate_corridor(seed=31, n_spans=3, density_per_m2=3.0,
                          span_length_m=(250.0, 300.0), classified=False, name="withheld")
    return write_corridor(c, tmp_path_factory.mktemp("withheld"), "withheld")


@pytest.mark.parametrize("point_format", [1, 6])
def test_read_leaves_withheld_points_out(corridor, tmp_path, point_format):
    path = tmp_path / f"flagged{point_format}.laz"
    flagged = _flagged_copy(corridor["cloud"], path, point_format)
    las = laspy.read(path)
    assert np.array_equal(np.asarray(las.withheld).astype(bool), flagged)  # laspy: the flags
    cloud = read_cloud(path)
    assert cloud.n_points == int((~flagged).sum())
    assert cloud.sources[0].withheld_points == int(flagged.sum())
    np.testing.assert_array_equal(cloud.source_index, np.flatnonzero(~flagged))
    ref = np.column_stack([las.x, las.y, las.z])[~flagged] - cloud.origin
    np.testing.assert_allclose(cloud.xyz, ref, rtol=0, atol=1e-6)
    # every point when asked; the info command's count
    assert read_cloud(path, skip_withheld=False).n_points == len(las)
    assert describe(path)[0]["withheld_points"] == int(flagged.sum())
    # the streamed reader: the same points, the withheld ones counted
    setup = read_setup(path, hashes=False)
    tally: dict[str, int] = {}
    index = np.concatenate([c[2] for c in read_range(setup, 0, chunk_size=50_000, tally=tally)])
    np.testing.assert_array_equal(index, np.flatnonzero(~flagged))
    assert tally["withheld"] == int(flagged.sum())
    # with a corridor: the compiled chunk pass against the numpy form (a plain callable)
    from clearaudit.io.las import corridor_mask

    lo, hi = setup.header_min[:2] + setup.origin[:2], setup.header_max[:2] + setup.origin[:2]
    keep = corridor_mask(np.array([lo + [30.0, 20.0], hi - [40.0, 10.0]]), 25.0)
    got = {}
    for name, k in (("compiled", keep), ("numpy", lambda xy: keep(xy))):
        t: dict[str, int] = {}
        chunks = list(read_range(setup, 0, keep=k, chunk_size=30_000, tally=t,
                                 cells=(0.0, 0.0, 40.0)))
        got[name] = ([np.concatenate([c[i] for c in chunks]) for i in (0, 1, 2, 4, 5)], t)
    for u, v in zip(got["compiled"][0], got["numpy"][0], strict=True):
        np.testing.assert_array_equal(u, v)
    assert got["compiled"][1] == got["numpy"][1]
    assert 0 < got["compiled"][1]["withheld"] < int(flagged.sum())
    assert not flagged[got["compiled"][0][2]].any()


def _with_extra_points(src: Path, dst: Path, withheld: bool) -> tuple[int, np.ndarray]:
    """``src`` with 4 000 extra points appended: copies of its points raised 6-20 m (a
    scatter of false returns over the corridor), flagged withheld or not."""
    las = laspy.read(src)
    n = len(las)
    rng = np.random.default_rng(4)
    pick = np.sort(rng.choice(n, 4000, replace=False))
    out = laspy.LasData(las.header.copy())
    out.points = las.points[np.concatenate([np.arange(n), pick])]
    z = np.asarray(out.z).copy()
    z[n:] += rng.uniform(6.0, 20.0, 4000)
    out.z = z
    flags = np.zeros(n + 4000, dtype=np.uint8)
    flags[n:] = 1 if withheld else 0
    out.withheld = flags
    out.write(dst)
    return n, pick


def _audit(cloud: Path, line: Path, out: Path, **kw) -> Path:
    return run_audit(AuditOptions(clouds=[cloud], out=out, line_file=line, overwrite=True,
                                  skip_report=True, **kw))


@pytest.mark.parametrize("mode", [{"tiled": False}, {"tiled": True, "tile_points": 120_000}])
def test_withheld_points_change_nothing(corridor, tmp_path, mode):
    base = _audit(corridor["cloud"], corridor["line"], tmp_path / "base", **mode)
    n, pick = _with_extra_points(corridor["cloud"], tmp_path / "flagged.laz", withheld=True)
    flagged = _audit(tmp_path / "flagged.laz", corridor["line"], tmp_path / "flagged", **mode)
    las = laspy.read(flagged / "classified.laz")
    ref = laspy.read(base / "classified.laz")
    # counted among the points the corridor keeps: an extra point lies over the point it was
    # raised from, which the first run kept when it has a height above ground
    inside = int(np.count_nonzero(~np.isnan(np.asarray(ref["height_above_ground"])[pick])))
    assert 3000 < inside <= 4000
    record = json.loads((flagged / "run.json").read_text())
    assert record["withheld_points"] == inside
    assert record["inputs"][0]["withheld_points"] == inside
    for name in ("spans.csv", "violations.csv", "hazard_trees.csv"):
        assert (base / name).read_bytes() == (flagged / name).read_bytes(), name
    # the classified copy: the withheld points as they were (class, flag), no height
    np.testing.assert_array_equal(np.asarray(las.classification[:n]),
                                  np.asarray(ref.classification))
    src = laspy.read(tmp_path / "flagged.laz")
    np.testing.assert_array_equal(np.asarray(las.classification[n:]),
                                  np.asarray(src.classification[n:]))
    assert np.all(np.asarray(las.withheld[n:]) == 1)
    assert np.all(np.isnan(np.asarray(las["height_above_ground"][n:])))


def test_the_same_points_unflagged_change_the_audit(corridor, tmp_path):
    # the control: without the flag the extra points are analysed
    base = _audit(corridor["cloud"], corridor["line"], tmp_path / "base", tiled=False)
    _with_extra_points(corridor["cloud"], tmp_path / "plain.laz", withheld=False)
    plain = _audit(tmp_path / "plain.laz", corridor["line"], tmp_path / "plain", tiled=False)
    assert json.loads((plain / "run.json").read_text())["withheld_points"] == 0
    assert any((base / name).read_bytes() != (plain / name).read_bytes()
               for name in ("spans.csv", "violations.csv", "hazard_trees.csv"))

"""The classified copy from the record scratch (clearaudit.io.las.RecordScratch).

The raw point records of compressed inputs are kept in uncompressed scratch files while they
are decoded the first time; the classified copy reads them instead of decoding the inputs a
second time (for layered LAZ inputs whose compressed layers the copy keeps, only 3 bytes a
point: tests/test_lazcopy.py). The reference for every check is the copy written by decoding the inputs again
(the path that existed before the scratch): the two files must be identical byte for byte.
laspy 2.7 (an independent reader) supplies the input records that are compared with the output.
ASPRS LAS Specification 1.4 R15 (2019): point formats 0-10 (Tables 7-16), formats 0-5 in
LAS 1.2/1.3 files, 6-10 in LAS 1.4 files.
"""
from __future__ import annotations

import json
from collections import namedtuple
from pathlib import Path

import laspy
import numpy as np
import pyproj
import pytest
from las_fixture import random_las

import clearaudit.io.las as las_mod
from clearaudit.io.las import (
    corridor_mask,
    plan_record_scratch,
    read_cloud,
    read_range,
    read_setup,
    write_classified,
    write_classified_stream,
)
from clearaudit.pipeline import AuditOptions, run_audit
from clearaudit.synth import generate_corridor, write_corridor
from clearaudit.tiling import Grid, plan_parts, split_part


def random_file(path: Path, fmt: int, n: int, seed: int, x0: float = 0.0) -> Path:
    """A LAS/LAZ file of point format ``fmt`` with random bytes in every field."""
    return random_las(path, fmt, n, np.random.default_rng(seed), x0=x0)


@pytest.fixture
def no_decoding(monkeypatch):
    """Arm a guard: decoding a compressed input again is an error (the scratch must be used);
    uncompressed LAS inputs are still read from their files."""
    def arm():
        for name in ("_record_bytes", "_chunks"):
            original = getattr(las_mod, name)

            def guarded(reader, path, chunk_size, original=original):
                if Path(path).suffix.lower() == ".laz":
                    raise AssertionError(f"{path} was decoded a second time")
                return original(reader, path, chunk_size)
            monkeypatch.setattr(las_mod, name, guarded)
    return arm


def codes_and_extras(cloud, seed):
    rng = np.random.default_rng(seed)
    codes = rng.integers(1, 20, cloud.n_points).astype(np.uint8)
    hag = rng.uniform(0, 30, cloud.n_points).astype(np.float32)
    return codes, {"height_above_ground": (hag, "height above ground [m]")}


# ------------------------------------------------------------------------- in-memory read
@pytest.mark.parametrize("fmt", range(11))
def test_in_memory_copy_identical_with_scratch(tmp_path, no_decoding, fmt):
    # two compressed inputs of one format (raw record copy) plus an uncompressed LAS input
    # (read directly, never put in the scratch); a corridor culls points from the cloud, and
    # the culled points must still be copied from the scratch
    a = random_file(tmp_path / "a.laz", fmt, 1500, fmt)
    b = random_file(tmp_path / "b.laz", fmt, 1100, fmt + 20, x0=300.0)
    c = random_file(tmp_path / "c.las", fmt, 700, fmt + 40, x0=600.0)
    keep = corridor_mask(np.array([[500_000.0, 4_400_100.0], [501_200.0, 4_400_200.0]]), 60.0)
    records, info = plan_record_scratch([a, b, c], tmp_path / "scratch")
    assert info["records_from"] == "scratch" and info["scratch_files"] == [0, 1]
    cloud = read_cloud([a, b, c], keep=keep, chunk_size=400, records=records)
    assert 0 < cloud.n_points < 3300
    kept = sorted(p.name for p in (tmp_path / "scratch").iterdir())
    assert kept == ["f000000_0000000000000.rec", "f000001_0000000000000.rec"]
    codes, extras = codes_and_extras(cloud, fmt)
    reference = write_classified(cloud, tmp_path / "decoded.laz", codes, extras, chunk_size=450)
    no_decoding()
    scratch_copy = write_classified(cloud, tmp_path / "scratch.laz", codes, extras,
                                    chunk_size=450, records=records)
    assert scratch_copy.read_bytes() == reference.read_bytes()
    # reference library: every input record, in input order, as laspy reads the inputs
    out = laspy.read(scratch_copy)
    inputs = [laspy.read(p) for p in (a, b, c)]
    for axis in "xyz":
        np.testing.assert_allclose(np.asarray(out[axis]),
                                   np.concatenate([np.asarray(i[axis]) for i in inputs]),
                                   rtol=0, atol=1e-6)
    names = ["intensity", "return_number", "point_source_id"]
    names += ["gps_time"] if "gps_time" in out.point_format.dimension_names else []
    for name in names:
        np.testing.assert_array_equal(np.asarray(out[name]),
                                      np.concatenate([np.asarray(i[name]) for i in inputs]))


@pytest.mark.parametrize("formats", [(0, 2), (1, 6), (3, 7), (4, 9), (8, 10)])
def test_format_conversion_from_scratch(tmp_path, no_decoding, formats):
    # inputs of two point formats: the output format differs from both, so records are
    # converted dimension by dimension (laspy point records rebuilt from the scratch bytes)
    a = random_file(tmp_path / "a.laz", formats[0], 900, 1)
    b = random_file(tmp_path / "b.laz", formats[1], 800, 2, x0=200.0)
    records, _ = plan_record_scratch([a, b], tmp_path / "scratch")
    cloud = read_cloud([a, b], chunk_size=333, records=records)
    codes, extras = codes_and_extras(cloud, 3)
    reference = write_classified(cloud, tmp_path / "decoded.laz", codes, extras, chunk_size=250)
    no_decoding()
    copy = write_classified(cloud, tmp_path / "scratch.laz", codes, extras, chunk_size=250,
                            records=records)
    assert copy.read_bytes() == reference.read_bytes()


# ------------------------------------------------------------------------- tiled split
@pytest.mark.parametrize("fmt", [1, 3, 6, 8])
def test_split_ranges_copy_identical(tmp_path, no_decoding, fmt):
    # the tiled run's split: every point range of every file keeps its own scratch file
    # (parts of 700 points, chunks of 256); the writer reads the ranges in order, in chunks
    # of its own size that straddle the ranges
    a = random_file(tmp_path / "a.laz", fmt, 2500, 5)
    b = random_file(tmp_path / "b.laz", fmt, 1200, 6, x0=300.0)
    setup = read_setup([a, b])
    records, _ = plan_record_scratch([a, b], tmp_path / "work" / "records")
    grid = Grid(float(setup.header_min[0]), float(setup.header_min[1]), 100.0)
    parts = plan_parts(setup, 700)
    from clearaudit.tiling import Corridor

    corridor = Corridor(np.array([[500_000.0, 4_400_100.0], [500_400.0, 4_400_150.0]]), 50.0)
    for part in parts:
        split_part(tmp_path / "work", setup, part, grid, corridor, records=records,
                   chunk_size=256)
    names = sorted(p.name for p in (tmp_path / "work" / "records").iterdir())
    assert len(names) == len(parts) == 4 + 2
    assert not any(n.endswith(".part") for n in names)

    def values(file_id, start, stop):
        k = np.arange(start, stop) + 10_000 * file_id
        return (k % 3 > 0, (k % 17).astype(np.uint8),
                {"height_above_ground": (k % 50).astype(np.float32)})

    kw = dict(crs=pyproj.CRS("EPSG:32617"), max_code=16, chunk_size=900,
              extra_dims={"height_above_ground": (np.float32, "height above ground [m]")})
    reference = write_classified_stream(setup.sources, tmp_path / "decoded.laz", values, **kw)
    no_decoding()
    copy = write_classified_stream(setup.sources, tmp_path / "scratch.laz", values,
                                   records=records, **kw)
    assert copy.read_bytes() == reference.read_bytes()
    # the kept bytes are the input records laspy reads (reference library)
    raw = b"".join((tmp_path / "work" / "records" / n).read_bytes() for n in names)
    assert raw == b"".join(laspy.read(p).points.array.tobytes() for p in (a, b))


@pytest.mark.parametrize("layered_output", [False, True])
def test_read_range_keeps_every_decoded_record(tmp_path, layered_output):
    # a layered LAZ input (format 7): whole records when the copy re-compresses them, else
    # (layers copied) the return, flags and class bytes of each point and the range's bounds
    a = random_file(tmp_path / "a.laz", 7, 1000, 9)
    setup = read_setup(a)
    records, info = plan_record_scratch([a], tmp_path / "s", layered_output=layered_output)
    assert records.layers == layered_output
    assert info["copy"] == ("layers" if layered_output else "records")
    with records.writer(0, 300) as sink:
        n = sum(c[3] for c in read_range(setup, 0, 300, 800, chunk_size=128, records_to=sink,
                                         keep=lambda xy: xy[:, 0] < 0))  # keeps none
    assert n == 500
    src = laspy.read(a).points.array  # laspy decodes every field (reference library)
    size = src.dtype.itemsize
    raw = src.view(np.uint8).reshape(len(src), size)[300:800]
    if layered_output:
        assert records.path(0, 300).read_bytes() == raw[:, 14:17].tobytes()
        lo, hi = records.bounds([(records.path(0, 300), 500)])
        for axis, name in enumerate("XYZ"):
            assert (lo[axis], hi[axis]) == (src[name][300:800].min(), src[name][300:800].max())
    else:
        assert records.path(0, 300).read_bytes() == raw.tobytes()
    # an incomplete scratch (points 0-300 missing) is not used: the input is decoded
    assert records.ranges(0, records.record_size(size), 1000) is None


def test_plan_falls_back_without_room_or_without_laz(tmp_path, monkeypatch):
    a = random_file(tmp_path / "a.laz", 6, 100, 1)
    las = random_file(tmp_path / "b.las", 6, 100, 2)
    records, info = plan_record_scratch([las], tmp_path / "s")
    assert records is None and info["records_from"] == "inputs"
    assert "no compressed input" in info["reason"]
    usage = namedtuple("usage", "total used free")
    monkeypatch.setattr(las_mod.shutil, "disk_usage", lambda p: usage(10**9, 10**9 - 10**6, 10**6))
    records, info = plan_record_scratch([a], tmp_path / "s")
    assert records is None and "not enough free disk" in info["reason"]
    assert not (tmp_path / "s").exists()
    # the margin: 1 GiB at least on top of the scratch and the reserve
    # (a layered input whose layers the copy keeps: 3 bytes a point)
    monkeypatch.setattr(las_mod.shutil, "disk_usage",
                        lambda p: usage(10**12, 0, 100 * 3 + 5000 + (1 << 30)))
    assert plan_record_scratch([a], tmp_path / "s", reserve_bytes=5000)[0] is not None
    assert plan_record_scratch([a], tmp_path / "s", reserve_bytes=5001)[0] is None


def test_failed_read_leaves_no_partial_scratch(tmp_path):
    a = random_file(tmp_path / "a.laz", 6, 1000, 1)
    records, _ = plan_record_scratch([a], tmp_path / "s")
    calls = []

    def keep(xy):
        calls.append(1)
        if len(calls) == 2:
            raise RuntimeError("stop")
        return np.ones(len(xy), dtype=bool)

    with pytest.raises(RuntimeError):
        read_cloud(a, keep=keep, chunk_size=300, records=records)
    assert list((tmp_path / "s").iterdir()) == []


# ------------------------------------------------------------------------- whole runs
@pytest.fixture(scope="module")
def corridor(tmp_path_factory) -> dict[str, Path]:
    """A small corridor written as two inputs (LAZ, LAS 1.4 format 6), with structures (the
    corridor cull is on)."""
    c = generate_corridor(seed=5, n_spans=2, density_per_m2=2.0, bend_deg=20.0,
                          span_length_m=(200.0, 240.0), classified=False, name="scr")
    folder = tmp_path_factory.mktemp("scratch_corridor")
    paths = write_corridor(c, folder, "scr")
    las = laspy.read(paths["cloud"])
    half = len(las.points) // 2
    first, second = folder / "scr_a.laz", folder / "scr_b.laz"
    for target, sl in ((first, slice(0, half)), (second, slice(half, None))):
        part = laspy.LasData(las.header)
        part.points = las.points[sl]
        part.write(target)
    return {**paths, "clouds": [first, second]}


def _audit(corridor, out, **kw):
    run_audit(AuditOptions(clouds=corridor["clouds"], out=out, line_file=corridor["line"],
                           overwrite=True, skip_report=True, tile_points=60_000, **kw))
    return json.loads((out / "run.json").read_text())["classified_copy"]


def _no_room(monkeypatch):
    usage = namedtuple("usage", "total used free")
    monkeypatch.setattr(las_mod.shutil, "disk_usage", lambda p: usage(10**9, 10**9, 1000))


def _same_points(a: Path, b: Path) -> None:
    one, other = laspy.read(a), laspy.read(b)
    assert one.points.array.tobytes() == other.points.array.tobytes()
    for name in ("point_count", "mins", "maxs", "number_of_points_by_return", "scales",
                 "offsets"):
        np.testing.assert_array_equal(getattr(one.header, name), getattr(other.header, name))


def _leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith(".clearaudit-"))


@pytest.mark.parametrize("tiled", [False, True])
def test_run_scratch_equals_decoding_again(corridor, tmp_path, monkeypatch, tiled):
    with monkeypatch.context() as m:
        # the writer's decoder (inputs and output share point format 6: raw record copy)
        m.setattr(las_mod, "_record_bytes", lambda *a: pytest.fail("decoded a second time"))
        with_scratch = _audit(corridor, tmp_path / "scratch" / "out", tiled=tiled)
    assert with_scratch["records_from"] == "scratch" and with_scratch["copy"] == "layers"
    assert with_scratch["scratch_files"] == [0, 1]
    assert _leftovers(tmp_path / "scratch") == []  # scratch removed after success
    with monkeypatch.context() as m:
        _no_room(m)
        fallback = _audit(corridor, tmp_path / "decoded" / "out", tiled=tiled)
    assert fallback["records_from"] == "inputs" and "not enough free disk" in fallback["reason"]
    # the layers of the two inputs are copied chunk by chunk, so the chunking differs from
    # the re-compressed copy: the same points and header statistics (laspy decodes both)
    _same_points(tmp_path / "scratch" / "out" / "classified.laz",
                 tmp_path / "decoded" / "out" / "classified.laz")
    # every input point in input order (laspy reads the inputs: reference library)
    out = laspy.read(tmp_path / "scratch" / "out" / "classified.laz")
    src = np.concatenate([laspy.read(p).points.array for p in corridor["clouds"]])
    np.testing.assert_array_equal(np.asarray(out.X), src["X"])
    np.testing.assert_array_equal(np.asarray(out.gps_time), src["gps_time"])


def test_dask_run_with_scratch_equals_in_process(corridor, tmp_path, monkeypatch):
    pytest.importorskip("distributed")
    with monkeypatch.context() as m:
        _no_room(m)
        _audit(corridor, tmp_path / "decoded", tiled=True)
    info = _audit(corridor, tmp_path / "dask", tiled=True, workers=2)
    assert info["records_from"] == "scratch"
    _same_points(tmp_path / "dask" / "classified.laz", tmp_path / "decoded" / "classified.laz")
    assert _leftovers(tmp_path) == []


@pytest.mark.parametrize("tiled", [False, True])
def test_scratch_removed_after_an_error(corridor, tmp_path, monkeypatch, tiled):
    seen = []

    def failing_writer(*args, **kwargs):
        records = kwargs["records"]
        seen.extend(records.folder.iterdir())  # the scratch exists while the run writes
        raise RuntimeError("disk full (simulated)")

    name = "write_classified_stream" if tiled else "write_classified"
    monkeypatch.setattr(las_mod, name, failing_writer)
    if not tiled:  # the in-memory run writes through clearaudit.outputs
        import clearaudit.outputs as outputs_mod

        monkeypatch.setattr(outputs_mod, name, failing_writer)
    with pytest.raises(RuntimeError, match="simulated"):
        _audit(corridor, tmp_path / "out", tiled=tiled)
    # two point ranges, each with its bytes (.rec) and coordinate bounds (.box)
    assert len(seen) == 4 and not any(p.exists() for p in seen)
    assert _leftovers(tmp_path) == []
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("tiled", [False, True])
def test_audit_error_stops_the_classified_copy_beside_it(corridor, tmp_path, monkeypatch,
                                                         tiled):
    # classified.laz is written on its own thread while the audit runs (the inputs' layers
    # are copied); an audit error stops it before the work folder and the output go
    import clearaudit.audit as audit_mod
    import clearaudit.tiling as tiling_mod

    started = []
    name = "write_classified_stream" if tiled else "write_classified"
    original = getattr(las_mod, name)

    def tracking_writer(*args, **kwargs):
        started.append(kwargs["records"].layers)
        return original(*args, **kwargs)

    def failing_audit(*args, **kwargs):
        raise RuntimeError("audit failed (simulated)")

    monkeypatch.setattr(las_mod, name, tracking_writer)
    monkeypatch.setattr(tiling_mod, "audit_tile", failing_audit)
    monkeypatch.setattr(audit_mod, "audit_line", failing_audit)
    with pytest.raises(RuntimeError, match="simulated"):
        _audit(corridor, tmp_path / "out", tiled=tiled)
    assert started == [True]
    assert _leftovers(tmp_path) == []
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("tiled", [False, True])
def test_classified_copy_beside_the_audit_is_recorded(corridor, tmp_path, tiled):
    info = _audit(corridor, tmp_path / "out", tiled=tiled)
    beside = info["written_beside_audit"]
    assert beside["seconds"] > 0 and beside["thread_cpu_seconds"] > 0

"""The classified copy of layered LAZ inputs by copying their compressed layers
(clearaudit.io.lazcopy, the kernel clearaudit.io._lazlayers).

Reference for every check: the classified copy written the other way — the inputs decoded
and every point re-compressed by laspy 2.7 with the lazrs 0.8 LAZ backend (an independent
implementation of the LAZ format, laz-rs). For one input written by that implementation the
two files must be the same bytes: the new classification and extra-byte layers are then
coded exactly as lazrs codes them. For several inputs (the copy keeps each input's chunks,
so the chunking differs) and for real survey data written by another LAZ implementation,
laspy must decode the same points from both.
LAS 1.4 R15 (ASPRS 2019): point formats 6-8, extra bytes (section 2.6).
"""
from __future__ import annotations

import struct
from pathlib import Path

import laspy
import numpy as np
import pyproj
import pytest
from las_fixture import random_las

from clearaudit.errors import InputError
from clearaudit.io import _lazlayers, lazcopy
from clearaudit.io.las import (
    plan_record_scratch,
    read_range,
    read_setup,
    write_classified_stream,
)
from clearaudit.tiling import plan_parts

REAL = Path(__file__).parent / "data" / "real"  # the AHN4 crops (CC0), bundled
HAG = {"height_above_ground": (np.float32, "height above ground [m]")}


def layered_file(path: Path, fmt: int, n: int, seed: int, *, channel: int | None = 0,
                 own_extra: bool = False) -> Path:
    """A LAS 1.4 LAZ file of format ``fmt``: random bytes in every field, classes in runs
    (so some chunks keep one class), one scanner channel (None: random channels)."""
    rng = np.random.default_rng(seed)
    header = laspy.LasHeader(point_format=fmt, version="1.4")
    if own_extra:
        header.add_extra_dims([laspy.ExtraBytesParams("sensor_gain", np.uint16)])
    header.scales = np.array([0.01, 0.01, 0.01])
    header.offsets = np.array([500_000.0, 4_400_000.0, 0.0])
    dtype = header.point_format.dtype()
    records = rng.integers(0, 256, n * dtype.itemsize, dtype=np.uint8).view(dtype).copy()
    records["X"] = np.cumsum(rng.integers(-40, 41, n)) + 15_000
    records["Y"] = np.cumsum(rng.integers(-40, 41, n)) + 15_000
    records["Z"] = rng.integers(0, 5_000, n)
    records["gps_time"] = np.cumsum(rng.uniform(0, 1e-4, n)) + 3e5
    raw = records.view(np.uint8).reshape(n, dtype.itemsize)
    if channel is not None:
        raw[:, 15] = (raw[:, 15] & 0xCF) | (channel << 4)
    runs = np.repeat(rng.integers(0, 20, n // 500 + 1), 500)[:n]
    raw[:, 16] = runs
    las = laspy.LasData(header)
    las.points = laspy.ScaleAwarePointRecord(records, header.point_format, header.scales,
                                             header.offsets)
    las.header.add_crs(pyproj.CRS("EPSG:32617"))
    las.write(path)
    return path


def split_into_scratch(paths, folder: Path, part: int = 70_000):
    """Read the inputs in point ranges as the tiled run does, keeping the scratch."""
    setup = read_setup(paths)
    records, info = plan_record_scratch(paths, folder)
    for file_id, count in enumerate(setup.point_counts):
        for start in range(0, count, part):
            with records.writer(file_id, start) as sink:
                for _ in read_range(setup, file_id, start, min(start + part, count),
                                    records_to=sink, chunk_size=30_000):
                    pass
    return setup, records, info


def make_values(seed: int, flat_first_chunk: bool = True):
    """``values(file_id, start, stop)``: the same codes and heights for a point whatever
    range it is asked in."""
    rng = np.random.default_rng(seed)
    table_codes = rng.integers(1, 25, 4_000_000).astype(np.uint8)
    table_hag = np.round(rng.uniform(-1, 40, 4_000_000), 2).astype(np.float32)

    def values(file_id, start, stop):
        k = np.arange(start, stop) + 1_000_000 * file_id
        has_new = (k % 7) > 0
        codes = table_codes[k].copy()
        codes[k % 1000 < 400] = 2
        if flat_first_chunk:  # every point of the first chunk becomes ground
            has_new[k < 50_000] = True
            codes[k < 50_000] = 2
        hag = table_hag[k].copy()
        hag[k % 11 == 0] = np.nan
        return has_new, codes, {"height_above_ground": hag}
    return values


def write_both(tmp_path, paths, values, max_code=24):
    setup, records, info = split_into_scratch(paths, tmp_path / "work")
    kw = dict(crs=setup.crs, max_code=max_code, extra_dims=HAG, chunk_size=40_000)
    reference = write_classified_stream(setup.sources, tmp_path / "decoded.laz", values, **kw)
    report = dict(info)
    copy = write_classified_stream(setup.sources, tmp_path / "copy.laz", values,
                                   records=records, report=report, **kw)
    return reference, copy, info, report


@pytest.mark.parametrize("fmt, own_extra", [(6, False), (7, False), (8, True)])
def test_copy_is_the_bytes_lazrs_writes(tmp_path, fmt, own_extra, monkeypatch):
    # one input written by laspy + lazrs, 120 001 points (chunks of 50 000, the last of one
    # point); the copy must not decode the input a second time
    src = layered_file(tmp_path / "in.laz", fmt, 120_001, fmt, own_extra=own_extra)
    setup, records, info = split_into_scratch([src], tmp_path / "work")
    assert info["copy"] == "layers" and records.layers
    assert info["scratch_bytes"] == 3 * 120_001
    kw = dict(crs=setup.crs, max_code=24, extra_dims=HAG, chunk_size=40_000)
    values = make_values(1)
    reference = write_classified_stream(setup.sources, tmp_path / "decoded.laz", values, **kw)
    import clearaudit.io.las as las_mod

    monkeypatch.setattr(las_mod, "_record_bytes",
                        lambda *a: pytest.fail("input decoded a second time"))
    report = dict(info)
    copy = write_classified_stream(setup.sources, tmp_path / "copy.laz", values,
                                   records=records, report=report, **kw)
    assert report["copy"] == "layers" and report["chunks"] == "fixed"
    if not own_extra:
        assert copy.read_bytes() == reference.read_bytes()
        return
    # the input's own extra dimension keeps the statistics of the input's header (its layer
    # is copied, not decoded; laspy's are recomputed): all else is the same bytes
    with laspy.open(reference) as r:
        start = r.header.offset_to_point_data
    assert copy.read_bytes()[start:] == reference.read_bytes()[start:]
    ref, out = laspy.read(reference), laspy.read(copy)
    assert out.points.array.tobytes() == ref.points.array.tobytes()
    for name in ("point_count", "mins", "maxs", "number_of_points_by_return"):
        np.testing.assert_array_equal(getattr(out.header, name), getattr(ref.header, name))


def test_several_inputs_decode_to_the_same_points(tmp_path):
    a = layered_file(tmp_path / "a.laz", 6, 61_234, 11)
    b = layered_file(tmp_path / "b.laz", 6, 50_000, 12)
    c = layered_file(tmp_path / "c.laz", 6, 7_777, 13)
    reference, copy, info, report = write_both(tmp_path, [a, b, c], make_values(2, False))
    assert report["copy"] == "layers" and report["chunks"] == "variable"
    assert report["chunk_count"] == 4
    ref, out = laspy.read(reference), laspy.read(copy)
    assert out.points.array.tobytes() == ref.points.array.tobytes()
    for name in ("point_count", "mins", "maxs", "number_of_points_by_return"):
        np.testing.assert_array_equal(getattr(out.header, name), getattr(ref.header, name))
    with laspy.open(copy) as reader:  # the chunks of the three inputs, as they were
        vlr = reader.header.vlrs.get("LasZipVlr")[0]
        assert struct.unpack_from("<I", vlr.record_data, 12)[0] == 0xFFFFFFFF  # variable
    import lazrs

    with open(copy, "rb") as fh:
        fh.seek(ref.header.offset_to_point_data)
        table = lazrs.read_chunk_table(fh, lazrs.LazVlr(vlr.record_data))
    assert [n for n, _ in table] == [50_000, 11_234, 50_000, 7_777]


def test_classified_copy_read_again(tmp_path):
    # a classified copy of two inputs (variable-size chunks, height above ground already an
    # extra dimension of the same name and layout) classified again: its height layers are
    # coded anew, not copied
    a = layered_file(tmp_path / "a.laz", 7, 30_000, 21)
    b = layered_file(tmp_path / "b.laz", 7, 55_000, 22)
    first = tmp_path / "first"
    first.mkdir()
    _, copy, _, report = write_both(first, [a, b], make_values(5, False))
    assert report["copy"] == "layers"
    again = tmp_path / "again"
    again.mkdir()
    reference, copy2, _, report2 = write_both(again, [copy], make_values(6))
    assert report2["copy"] == "layers"
    ref, out = laspy.read(reference), laspy.read(copy2)
    assert out.points.array.tobytes() == ref.points.array.tobytes()
    assert not np.array_equal(np.asarray(out.height_above_ground),
                              np.asarray(laspy.read(copy).height_above_ground), equal_nan=True)


def test_variable_chunk_files_are_read_without_seeking(tmp_path):
    # the copy of two inputs has chunks of varying size; lazrs 0.8 seeks to wrong points past
    # the first chunk of such a file, so read_range decodes it from its start and the tiled
    # split reads it in one range
    a = layered_file(tmp_path / "a.laz", 6, 30_000, 31)
    b = layered_file(tmp_path / "b.laz", 6, 45_000, 32)
    _, copy, _, _ = write_both(tmp_path, [a, b], make_values(7, False))
    setup = read_setup(copy)
    assert setup.whole_files == {0}
    assert [(p.start, p.stop) for p in plan_parts(setup, 10_000)] == [(0, 75_000)]
    assert read_setup([a, b]).whole_files == frozenset()
    whole = list(read_range(setup, 0, 0, None, chunk_size=9_000))
    xyz = np.concatenate([c[0] for c in whole])
    cls = np.concatenate([c[1] for c in whole])
    index = np.concatenate([c[2] for c in whole])
    # (random flag bytes: the points flagged withheld are never yielded, by either read)
    assert 0 < len(index) < 75_000
    sel = (index >= 31_000) & (index < 70_000)
    part = list(read_range(setup, 0, 31_000, 70_000, chunk_size=9_000))
    np.testing.assert_array_equal(np.concatenate([c[0] for c in part]), xyz[sel])
    np.testing.assert_array_equal(np.concatenate([c[1] for c in part]), cls[sel])
    np.testing.assert_array_equal(np.concatenate([c[2] for c in part]), index[sel])


def test_chunks_that_change_channel_are_recompressed(tmp_path):
    # two LAZ implementations differ on extra-byte contexts across scanner channels: such
    # inputs fall back to the full re-compression, and the run record says so
    src = layered_file(tmp_path / "in.laz", 6, 20_000, 3, channel=None)
    reference, copy, info, report = write_both(tmp_path, [src], make_values(3))
    assert info["copy"] == "layers"
    assert report["copy"] == "records" and "changes scanner channel" in report["reason"]
    assert copy.read_bytes() == reference.read_bytes()


def test_real_survey_crop_decodes_to_the_same_points(tmp_path):
    # AHN4 crop (CC0, written by another LAZ implementation; its intensity and GPS-time
    # layers are empty)
    src = REAL / "ahn4_powerline_07CZ2_14.laz"
    if not src.exists():
        pytest.skip("real survey crops not found")
    reference, copy, info, report = write_both(tmp_path, [src], make_values(4))
    assert report["copy"] == "layers"
    ref, out = laspy.read(reference), laspy.read(copy)
    assert len(out.points) == 699_634
    assert out.points.array.tobytes() == ref.points.array.tobytes()
    for name in ("mins", "maxs", "number_of_points_by_return"):
        np.testing.assert_array_equal(getattr(out.header, name), getattr(ref.header, name))


def test_damaged_chunk_is_an_input_error(tmp_path):
    src = layered_file(tmp_path / "in.laz", 6, 60_000, 5)
    setup, records, info = split_into_scratch([src], tmp_path / "work")
    with laspy.open(src) as reader:
        start = reader.header.offset_to_point_data + 8
        size = reader.header.point_format.dtype().itemsize
    data = bytearray(src.read_bytes())
    struct.pack_into("<I", data, start + size, 49_999)  # the first chunk's own point count
    src.write_bytes(bytes(data))
    with pytest.raises(InputError, match="in.laz.*chunk of 49999 points"):
        write_classified_stream(setup.sources, tmp_path / "copy.laz", make_values(5),
                                crs=setup.crs, extra_dims=HAG, records=records)
    assert not (tmp_path / "copy.laz").exists()
    assert [p.name for p in tmp_path.iterdir() if p.name.endswith(".part")] == []


def test_blocker_names_what_cannot_be_copied(tmp_path):
    a = layered_file(tmp_path / "a.laz", 6, 1000, 1)
    b = layered_file(tmp_path / "b.laz", 7, 1000, 2)
    headers = [laspy.open(p).header for p in (a, b)]
    assert lazcopy.blocker(headers[:1]) is None
    assert "point format" in lazcopy.blocker(headers)
    legacy = random_las(tmp_path / "c.laz", 1, 500, np.random.default_rng(3))
    assert "layered" in lazcopy.blocker([laspy.open(legacy).header])
    _, info = plan_record_scratch([a, legacy], tmp_path / "s")
    assert info["copy"] == "records" and "layered" in info["reason"]


def test_kernel_checks_its_buffers():
    n = 10
    ret = np.ones(n, np.uint8)
    cls = np.arange(n, dtype=np.uint8)
    extra = np.zeros((n, 2), np.uint8)
    with pytest.raises(ValueError, match="too small"):
        _lazlayers.code_chunk_layers(ret, cls, extra, np.empty(_lazlayers.layer_capacity(n), np.uint8),
                          np.empty(3, np.int64))
    sizes = np.empty(3, np.int64)
    assert _lazlayers.code_chunk_layers(ret, cls, extra, np.empty(3 * _lazlayers.layer_capacity(n), np.uint8), sizes)
    assert not _lazlayers.code_chunk_layers(ret, np.full(n, 5, np.uint8), extra,
                                 np.empty(3 * _lazlayers.layer_capacity(n), np.uint8), sizes)


def test_short_laszip_record_is_not_read_as_layers():
    # a damaged laszip record is left to the reader's own error, not misread here
    from types import SimpleNamespace

    def header(data):
        vlr = SimpleNamespace(record_data=data)
        return SimpleNamespace(are_points_compressed=True,
                               vlrs=SimpleNamespace(get=lambda name: [vlr]))

    assert lazcopy.laszip_items(header(b"\x03\x00" * 10)) is None
    whole = bytes(lazrs_vlr_record())
    assert lazcopy.laszip_items(header(whole))[0] == 3
    assert lazcopy.laszip_items(header(whole[:-2])) is None


def lazrs_vlr_record() -> bytes:
    import lazrs

    return lazrs.LazVlr.new_for_compression(6, 4).record_data()

"""The classified output (clearaudit.io.las.write_classified).

Reference: laspy 2.7 reads the input and output files independently of clearaudit, so every
check below compares clearaudit's output with the original points as laspy sees them.
ASPRS LAS Specification 1.4 R15 (2019): class codes (Table 17); scan angle of formats 6-10
in steps of 0.006 degrees (Table 16); legacy formats 0-5 hold 5-bit class codes (0-31).
"""
from __future__ import annotations

from pathlib import Path

import laspy
import numpy as np
import pyproj
import pytest
from las_fixture import random_las

from clearaudit.cloud import Cloud
from clearaudit.errors import InputError
from clearaudit.io.las import corridor_mask, read_cloud, write_classified, write_cloud

DATA = Path(__file__).parent / "data" / "laspy"
REAL = Path(__file__).resolve().parents[1].parent / "shared" / "real-clouds"


def make_cloud(n, seed, origin=(500_000.0, 4_400_000.0, 0.0), crs="EPSG:32617"):
    rng = np.random.default_rng(seed)
    xyz = np.round(rng.uniform(0, 300, (n, 3)), 3)
    return Cloud(xyz=xyz, origin=np.array(origin), crs=pyproj.CRS(crs),
                 classification=rng.integers(1, 10, n).astype(np.uint8),
                 fields={"intensity": rng.integers(0, 4000, n).astype(np.uint16),
                         "gps_time": rng.uniform(0, 1e6, n)})


def xyz_of(las):
    return np.column_stack([las.x, las.y, las.z])


@pytest.mark.skipif(not REAL.is_dir(), reason="shared real-cloud crops not present")
def test_real_crops_culled_then_written_whole(tmp_path):
    files = sorted(REAL.glob("*.laz"))
    first = laspy.read(files[0])
    # a corridor along the first crop's long axis
    x0, x1 = float(first.x.min()), float(first.x.max())
    y0, y1 = float(first.y.min()), float(first.y.max())
    keep = corridor_mask(np.array([[x0, y0], [x1, y1]]), 8.0)
    cloud = read_cloud(files, keep=keep, chunk_size=250_000)
    total = sum(laspy.open(f).header.point_count for f in files)
    assert 0 < cloud.n_points < total
    codes = np.where(cloud.xyz[:, 2] > 10.0, 14, 2).astype(np.uint8)
    hag = cloud.xyz[:, 2] - 1.0
    out = write_classified(cloud, tmp_path / "classified.laz", codes,
                           {"height_above_ground": (hag, "height above ground [m]")},
                           chunk_size=300_000)
    result = laspy.read(out)
    originals = [laspy.read(f) for f in files]
    assert len(result) == total == 699_634 + 893_073
    # every input point, file after file, in input order, with its original dimensions
    np.testing.assert_allclose(xyz_of(result), np.vstack([xyz_of(o) for o in originals]),
                               rtol=0, atol=1e-9)
    for name in ("intensity", "gps_time", "return_number", "point_source_id"):
        np.testing.assert_array_equal(np.asarray(result[name]),
                                      np.concatenate([np.asarray(o[name]) for o in originals]))
    old_codes = np.concatenate([np.asarray(o.classification) for o in originals])
    offsets = np.cumsum([0] + [len(o) for o in originals])
    row = offsets[cloud.source_id] + cloud.source_index
    kept = np.zeros(total, dtype=bool)
    kept[row] = True
    got = np.asarray(result.classification)
    np.testing.assert_array_equal(got[row], codes)
    np.testing.assert_array_equal(got[~kept], old_codes[~kept])
    h = np.asarray(result.height_above_ground)
    np.testing.assert_array_equal(h[row], hag.astype(np.float32))
    assert np.isnan(h[~kept]).all()
    assert result.header.parse_crs().to_epsg() == 7415
    assert result.header.point_format.id == 6


def test_mixed_point_formats_are_converted(tmp_path):
    a = make_cloud(200, 1)
    b = make_cloud(300, 2, origin=(500_400.0, 4_400_000.0, 0.0))
    c = make_cloud(100, 3, origin=(500_800.0, 4_400_000.0, 0.0))
    rng = np.random.default_rng(9)
    pa = write_cloud(a, tmp_path / "a.las", point_format=1, version="1.2")
    pb = write_cloud(b, tmp_path / "b.laz", point_format=2, version="1.2")
    # give file a a scan angle rank [deg] (legacy formats)
    las_a = laspy.read(pa)
    las_a.scan_angle_rank = rng.integers(-30, 31, len(las_a)).astype(np.int8)
    las_a.write(pa)
    cloud = read_cloud([pa, pb])
    out = write_classified(cloud, tmp_path / "ab.las", np.full(cloud.n_points, 5), {})
    res = laspy.read(out)
    assert res.header.point_format.id == 3  # gps_time (format 1) + RGB (format 2)
    assert str(res.header.version) == "1.2"
    np.testing.assert_allclose(xyz_of(res), np.vstack([a.to_crs(a.xyz), b.to_crs(b.xyz)]),
                               atol=1e-9)
    np.testing.assert_array_equal(np.asarray(res.gps_time[:200]), a.fields["gps_time"])
    np.testing.assert_array_equal(np.asarray(res.scan_angle_rank[:200]),
                                  np.asarray(las_a.scan_angle_rank))
    assert (np.asarray(res.classification) == 5).all()

    pc = write_cloud(c, tmp_path / "c.laz", point_format=6, version="1.4")
    cloud2 = read_cloud([pa, pc])
    out2 = write_classified(cloud2, tmp_path / "ac.laz", cloud2.classification,
                            {"z_m": (cloud2.xyz[:, 2], "z")})
    res2 = laspy.read(out2)
    assert res2.header.point_format.id == 6 and str(res2.header.version) == "1.4"
    # LAS 1.4 R15 Table 16: scan angle in 0.006 degree steps
    np.testing.assert_allclose(np.asarray(res2.scan_angle[:200]) * 0.006,
                               np.asarray(las_a.scan_angle_rank), atol=0.003)
    np.testing.assert_array_equal(np.asarray(res2.classification),
                                  np.concatenate([a.classification, c.classification]))


def test_input_extra_bytes_and_finer_scale_are_kept(tmp_path):
    # extrabytes.las (laspy test data, LAS 1.4 format 3) has five extra-bytes dimensions.
    src = DATA / "extrabytes.las"
    las = laspy.read(src)
    cloud = read_cloud(src, crs="EPSG:32617")
    half = cloud.subset(np.arange(0, cloud.n_points, 2))
    out = write_classified(half, tmp_path / "eb.laz", np.full(half.n_points, 13),
                           {"hag": (np.ones(half.n_points), "height")})
    res = laspy.read(out)
    assert len(res) == len(las)
    for name in las.point_format.extra_dimension_names:
        np.testing.assert_array_equal(np.asarray(res[name]), np.asarray(las[name]))
    np.testing.assert_allclose(xyz_of(res), xyz_of(las), atol=1e-9)
    cls = np.asarray(res.classification)
    assert (cls[::2] == 13).all()
    np.testing.assert_array_equal(cls[1::2], np.asarray(las.classification)[1::2])
    assert np.isnan(np.asarray(res.hag)[1::2]).all()

    # two files with different scales: output takes the finer one, coordinates unchanged
    a = make_cloud(100, 4)
    pa = write_cloud(a, tmp_path / "s1.las", scale_crs_units=0.001)
    pb = write_cloud(a, tmp_path / "s2.las", scale_crs_units=0.0001)
    both = read_cloud([pa, pb])
    res2 = laspy.read(write_classified(both, tmp_path / "s.las", both.classification, {}))
    np.testing.assert_allclose(res2.header.scales, [0.0001] * 3)
    np.testing.assert_allclose(xyz_of(res2), np.vstack([a.to_crs(a.xyz)] * 2), atol=1e-9)


def test_codes_above_31_raise_legacy_format(tmp_path):
    a = make_cloud(50, 5)
    pa = write_cloud(a, tmp_path / "a.las", point_format=1, version="1.2")
    cloud = read_cloud(pa)
    codes = np.full(cloud.n_points, 64)  # user-definable range 64-255 (LAS 1.4 Table 17)
    res = laspy.read(write_classified(cloud, tmp_path / "o.las", codes, {}))
    assert res.header.point_format.id == 6
    assert (np.asarray(res.classification) == 64).all()
    np.testing.assert_array_equal(np.asarray(res.gps_time), a.fields["gps_time"])


def test_bad_arguments_leave_nothing_behind(tmp_path):
    a = make_cloud(50, 6)
    pa = write_cloud(a, tmp_path / "a.laz")
    cloud = read_cloud(pa)
    target = tmp_path / "out.laz"
    with pytest.raises(ValueError, match="one code per point"):
        write_classified(cloud, target, np.ones(3), {})
    bad = cloud.subset(np.arange(10))
    bad.source_index = bad.source_index + 45  # runs past the 50 points of the file
    with pytest.raises(ValueError, match="out of range"):
        write_classified(bad, target, np.ones(10, dtype=np.uint8), {})
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.laz"]
    no_books = Cloud(xyz=a.xyz, origin=a.origin)
    with pytest.raises(ValueError, match="source bookkeeping"):
        write_classified(no_books, target, np.ones(50, dtype=np.uint8), {})


def test_changed_or_missing_source(tmp_path):
    pa = write_cloud(make_cloud(50, 7), tmp_path / "a.laz")
    cloud = read_cloud(pa)
    write_cloud(make_cloud(40, 8), pa)  # replaced by a different file
    with pytest.raises(InputError, match="changed since"):
        write_classified(cloud, tmp_path / "o.laz", cloud.classification, {})
    pa.unlink()
    with pytest.raises(InputError) as err:
        write_classified(cloud, tmp_path / "o.laz", cloud.classification, {})
    assert err.value.source == str(pa)


@pytest.mark.parametrize("fmt", range(11))
def test_raw_copy_equals_copy_by_name(tmp_path, monkeypatch, fmt):
    # The writer copies input records byte for byte when they are a prefix of the output
    # records; the copy field by field (laspy's own record API, the reference here) must give
    # the same file. Random bytes in every field make every flag bit vary.
    import clearaudit.io.las as las_mod

    rng = np.random.default_rng(fmt)
    n = 2000
    src = random_las(tmp_path / f"in{fmt}.laz", fmt, n, rng, version="1.4", crs="EPSG:32617")
    cloud = read_cloud(src, skip_withheld=False)  # every point, withheld or not
    codes = rng.integers(1, 20, n).astype(np.uint8)
    extras = {"height_above_ground": (rng.uniform(0, 30, n).astype(np.float32), "height")}
    raw = laspy.read(write_classified(cloud, tmp_path / "raw.laz", codes, extras))
    monkeypatch.setattr(las_mod, "_is_record_prefix", lambda *a: False)
    by_name = laspy.read(write_classified(cloud, tmp_path / "by_name.laz", codes, extras))
    assert raw.points.array.tobytes() == by_name.points.array.tobytes()
    np.testing.assert_array_equal(np.asarray(raw.classification), codes)

"""LAS/LAZ reading and writing (clearaudit.io.las).

External references used here:
- laspy 2.7 (the reference LAS reader: ``laspy.read`` gives the file's scaled coordinates,
  classes and fields directly, independent of clearaudit's integer-shift arithmetic);
- pyproj / the EPSG registry (unit of each CRS axis);
- NIST Handbook 44 (2023), Appendix C: international foot = 0.3048 m exactly,
  US survey foot = 1200/3937 m exactly;
- ASPRS LAS Specification 1.4 R15 (2019): point formats 0-10, version/format pairs;
- shapely 2 (GEOS) point-to-line distance for the corridor buffer.
"""
from __future__ import annotations

import hashlib
import shutil
from pathlib import Path

import laspy
import numpy as np
import pyproj
import pytest

from clearaudit.cloud import Cloud
from clearaudit.errors import InputError
from clearaudit.io.las import (
    corridor_mask,
    describe,
    read_cloud,
    read_range,
    read_setup,
    resolve_inputs,
    write_cloud,
)

DATA = Path(__file__).parent / "data" / "laspy"
REAL = Path(__file__).resolve().parents[1].parent / "shared" / "real-clouds"

# NIST Handbook 44 (2023), Appendix C, section 4: exact definitions.
US_FT_NIST = 1200.0 / 3937.0
FT_NIST = 0.3048

# Smallest LAS version for each point format: ASPRS LAS 1.2 (formats 0-3), 1.3 (4-5),
# 1.4 R15 (6-10).
VERSION_FOR_FORMAT = {0: "1.2", 1: "1.2", 2: "1.2", 3: "1.2", 4: "1.3", 5: "1.3",
                      6: "1.4", 7: "1.4", 8: "1.4", 9: "1.4", 10: "1.4"}


def make_cloud(n=2000, seed=0, crs="EPSG:32617", origin=(500_000.0, 4_400_000.0, 0.0),
               unit=(1.0, 1.0), scale=0.001, span=800.0):
    """A random cloud whose CRS coordinates sit exactly on the ``scale`` grid."""
    rng = np.random.default_rng(seed)
    ints = rng.integers(0, int(span / scale), size=(n, 3))
    ints[:, 2] = rng.integers(int(50 / scale), int(120 / scale), size=n)
    local_crs = ints * scale
    xyz = local_crs * np.array([unit[0], unit[0], unit[1]])
    returns = rng.integers(1, 6, n).astype(np.uint8)
    fields = {
        "intensity": rng.integers(0, 65536, n).astype(np.uint16),
        "number_of_returns": returns,
        "return_number": np.minimum(rng.integers(1, 6, n), returns).astype(np.uint8),
        "gps_time": rng.uniform(1e8, 2e8, n),
    }
    return Cloud(xyz=xyz, origin=np.array(origin), crs=None if crs is None else pyproj.CRS(crs),
                 horizontal_unit_m=unit[0], vertical_unit_m=unit[1],
                 classification=rng.integers(0, 19, n).astype(np.uint8), fields=fields)


# ----------------------------------------------------------------------------- round trips
@pytest.mark.parametrize("point_format", range(11))
@pytest.mark.parametrize("suffix", [".las", ".laz"])
def test_round_trip_every_point_format(tmp_path, point_format, suffix):
    cloud = make_cloud(seed=point_format)
    version = VERSION_FOR_FORMAT[point_format]
    hag = np.random.default_rng(1).uniform(0, 40, cloud.n_points)
    flag = (hag > 20).astype(np.uint8)
    out = write_cloud(cloud, tmp_path / f"f{point_format}{suffix}", point_format=point_format,
                      version=version, extra_dims={"hag": (hag, "height above ground"),
                                                   "flag": (flag, "above 20 m")})
    # Reference: laspy reads the file by itself.
    las = laspy.read(out)
    assert las.header.point_format.id == point_format
    assert str(las.header.version) == version
    expected_crs = cloud.to_crs(cloud.xyz)
    for axis, name in enumerate("xyz"):
        np.testing.assert_allclose(np.asarray(las[name]), expected_crs[:, axis], rtol=0,
                                   atol=1e-6)  # well below the 1 mm scale
    np.testing.assert_array_equal(np.asarray(las.classification), cloud.classification)
    dims = set(las.point_format.dimension_names)
    for name, values in cloud.fields.items():
        if name in dims:
            np.testing.assert_array_equal(np.asarray(las[name]), values)
    np.testing.assert_array_equal(np.asarray(las.hag), hag.astype(np.float32))
    np.testing.assert_array_equal(np.asarray(las.flag), flag)
    assert las.header.parse_crs().to_epsg() == 32617

    back = read_cloud(out, fields=("intensity", "gps_time", "return_number",
                                   "number_of_returns", "hag", "flag"))
    np.testing.assert_array_equal(back.classification, cloud.classification)
    # Coordinates at scale: integer records equal, so CRS coordinates agree to rounding.
    np.testing.assert_allclose(back.to_crs(back.xyz), expected_crs, rtol=1e-15, atol=1e-9)
    assert np.array_equal(np.rint((back.to_crs(back.xyz) - las.header.offsets) / 0.001),
                          np.column_stack([las.X, las.Y, las.Z]))
    for name, values in cloud.fields.items():
        if name in dims:
            np.testing.assert_array_equal(back.fields[name], values)
        else:
            assert name not in back.fields
    np.testing.assert_array_equal(back.fields["hag"], hag.astype(np.float32))
    np.testing.assert_array_equal(back.source_index, np.arange(cloud.n_points))
    assert back.sources[0].point_format == point_format
    assert back.sources[0].crs_origin == "file-wkt" or (
        version < "1.4" and back.sources[0].crs_origin in ("file-geotiff", "file-wkt"))
    # the streamed reader's compiled chunk pass: the same points as read_cloud's numpy form
    setup = read_setup(out, hashes=False)
    got = list(read_range(setup, 0, chunk_size=700, cells=(0.0, 0.0, 25.0)))
    np.testing.assert_array_equal(np.concatenate([g[0] for g in got]), back.xyz)
    np.testing.assert_array_equal(np.concatenate([g[1] for g in got]), back.classification)
    np.testing.assert_array_equal(np.concatenate([g[2] for g in got]), back.source_index)


def test_write_is_atomic(tmp_path):
    cloud = make_cloud(n=50)
    target = tmp_path / "out.laz"
    target.write_bytes(b"old content")
    with pytest.raises(ValueError, match="one value per point"):
        write_cloud(cloud, target, extra_dims={"bad": (np.zeros(3), "wrong length")})
    assert target.read_bytes() == b"old content"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.laz"]
    with pytest.raises(ValueError, match=".las or .laz"):
        write_cloud(cloud, tmp_path / "out.txt")
    with pytest.raises(ValueError, match="cannot hold point format"):
        write_cloud(cloud, tmp_path / "x.las", point_format=6, version="1.2")


def test_default_scale_is_centimetre_for_foot_crs(tmp_path):
    cloud = make_cloud(crs="EPSG:2264", unit=(US_FT_NIST, US_FT_NIST), scale=0.01,
                       origin=(2_000_000.0, 600_000.0, 0.0))
    las = laspy.read(write_cloud(cloud, tmp_path / "ft.las"))
    np.testing.assert_array_equal(las.header.scales, [0.01, 0.01, 0.01])
    np.testing.assert_allclose(np.asarray(las.x), cloud.to_crs(cloud.xyz)[:, 0], atol=1e-6)


# ----------------------------------------------------------------------------- CRS and units
def test_metre_crs(tmp_path):
    path = write_cloud(make_cloud(), tmp_path / "m.laz")
    cloud = read_cloud(path)
    assert cloud.crs.to_epsg() == 32617
    assert (cloud.horizontal_unit_m, cloud.vertical_unit_m) == (1.0, 1.0)


def test_us_survey_foot_crs_gives_metres(tmp_path):
    # EPSG:2264 NAD83 / North Carolina (ftUS): both axes in US survey feet (EPSG registry).
    cloud_ft = make_cloud(crs="EPSG:2264", unit=(US_FT_NIST, US_FT_NIST), scale=0.01,
                          origin=(2_000_000.0, 600_000.0, 0.0))
    path = write_cloud(cloud_ft, tmp_path / "ft.laz")
    cloud = read_cloud(path)
    assert cloud.horizontal_unit_m == US_FT_NIST  # exact, NIST HB44 App. C
    assert cloud.vertical_unit_m == US_FT_NIST  # no vertical CRS: heights in the same feet
    las = laspy.read(path)
    crs_xyz = np.column_stack([las.x, las.y, las.z])
    expected_m = (crs_xyz - cloud.origin) * US_FT_NIST
    np.testing.assert_allclose(cloud.xyz, expected_m, rtol=0, atol=1e-9)
    # 1000 US survey feet = 304.8006096... m (NIST HB44 App. C).
    # (the distance in feet from the integer records, exact at 0.01 ft steps)
    i, j = 0, 1
    ints = np.column_stack([las.X, las.Y]).astype(np.int64)
    d_ft = np.hypot(*((ints[i] - ints[j]) * 0.01))
    d_m = np.hypot(*(cloud.xyz[i, :2] - cloud.xyz[j, :2]))
    assert d_m == pytest.approx(d_ft * 1200 / 3937, rel=1e-14)
    # the streamed reader (compiled chunk pass, the units applied in it): the same metres,
    # and with a corridor (in the file's feet) the points of read_cloud's keep
    setup = read_setup(path, hashes=False)
    got = list(read_range(setup, 0, chunk_size=300))
    np.testing.assert_array_equal(np.concatenate([g[0] for g in got]), cloud.xyz)
    line = cloud.origin[:2] + np.array([[100.0, 50.0], [700.0, 600.0]])
    keep = corridor_mask(line, 150.0)
    kept = read_cloud(path, keep=keep)
    got = list(read_range(setup, 0, chunk_size=300, keep=keep))
    np.testing.assert_array_equal(np.concatenate([g[0] for g in got]), kept.xyz)
    assert 0 < kept.n_points < cloud.n_points


def test_compound_crs_with_metre_height(tmp_path):
    # EPSG:2264 (ftUS) + EPSG:5703 NAVD88 height (metre): horizontal and vertical differ.
    crs = "EPSG:2264+5703"
    cloud_in = make_cloud(crs=crs, unit=(US_FT_NIST, 1.0), scale=0.01,
                          origin=(2_000_000.0, 600_000.0, 0.0))
    path = write_cloud(cloud_in, tmp_path / "compound.laz")
    las = laspy.read(path)
    np.testing.assert_array_equal(las.header.scales, [0.01, 0.01, 0.001])
    cloud = read_cloud(path)
    assert cloud.crs.is_compound
    assert cloud.horizontal_unit_m == US_FT_NIST
    assert cloud.vertical_unit_m == 1.0
    np.testing.assert_allclose(cloud.xyz[:, 2], np.asarray(las.z) - cloud.origin[2], atol=1e-9)
    np.testing.assert_allclose(cloud.xyz[:, 0], (np.asarray(las.x) - cloud.origin[0])
                               * US_FT_NIST, atol=1e-9)


def test_file_without_crs_plus_override(tmp_path):
    path = write_cloud(make_cloud(crs=None), tmp_path / "nocrs.las")
    assert laspy.read(path).header.parse_crs() is None
    plain = read_cloud(path)
    assert plain.crs is None and plain.sources[0].crs_origin == "none"
    cloud = read_cloud(path, crs="EPSG:2264")
    assert cloud.crs.to_epsg() == 2264
    assert cloud.horizontal_unit_m == US_FT_NIST
    assert cloud.sources[0].crs_origin == "override"
    assert cloud.sources[0].crs_wkt is None


def test_override_wins_over_file_crs(tmp_path):
    path = write_cloud(make_cloud(crs="EPSG:32617"), tmp_path / "utm.laz")
    cloud = read_cloud(path, crs=pyproj.CRS("EPSG:32618"))
    assert cloud.crs.to_epsg() == 32618
    assert cloud.sources[0].crs_origin == "override"
    assert "UTM zone 17N" in cloud.sources[0].crs_wkt  # the file's own CRS is kept


def test_unparseable_crs_option(tmp_path):
    path = write_cloud(make_cloud(crs=None), tmp_path / "a.las")
    with pytest.raises(InputError) as err:
        read_cloud(path, crs="EPSG:not-a-code")
    assert err.value.source == "--crs"


def test_geographic_crs_is_refused(tmp_path):
    path = write_cloud(make_cloud(crs=None), tmp_path / "a.las")
    with pytest.raises(InputError, match="geographic"):
        read_cloud(path, crs="EPSG:4326")


# ----------------------------------------------------------------------------- precision
def test_round_trip_precision_against_laspy_on_large_offsets(tmp_path):
    # UTM northings of 4.4e6 m with 0.1 mm scale and an offset that is not on the origin grid.
    cloud = make_cloud(scale=0.0001, origin=(712_345.6789, 4_412_345.4321, 0.0), span=300)
    path = write_cloud(cloud, tmp_path / "p.las", scale_crs_units=0.0001)
    las = laspy.read(path)
    back = read_cloud(path)
    crs_xyz = np.column_stack([las.x, las.y, las.z])
    rel = np.abs(back.to_crs(back.xyz) - crs_xyz) / np.abs(crs_xyz)
    assert rel.max() < 1e-9
    assert np.abs(back.to_crs(back.xyz) - crs_xyz).max() < 1e-6 * 0.0001 * 1e3  # << scale


def test_real_sample_with_odd_scales_keeps_precision():
    # test1_4.las: scales ~1.16e-6 ftUS, offsets 1692500.352 / 1817499.596 (written by others).
    path = DATA / "test1_4.las"
    las = laspy.read(path)
    cloud = read_cloud(path)
    crs_xyz = np.column_stack([las.x, las.y, las.z])
    rel = np.abs(cloud.to_crs(cloud.xyz) - crs_xyz) / np.abs(crs_xyz)
    assert rel.max() < 1e-9
    assert cloud.horizontal_unit_m == US_FT_NIST
    assert cloud.sources[0].crs_origin == "file-wkt"


# ----------------------------------------------------------------------------- real sample files
def test_laspy_samples_read_like_laspy():
    for name, epsg_unit in [("simple.laz", None), ("autzen.las", FT_NIST),
                            ("1_4_w_evlr.laz", US_FT_NIST), ("extrabytes.las", None)]:
        path = DATA / name
        las = laspy.read(path)
        cloud = read_cloud(path, crs=None if epsg_unit else "EPSG:32617")
        assert cloud.n_points == las.header.point_count
        crs_xyz = np.column_stack([las.x, las.y, las.z])
        np.testing.assert_allclose(cloud.to_crs(cloud.xyz), crs_xyz, rtol=1e-12)
        np.testing.assert_array_equal(cloud.classification, np.asarray(las.classification))
        np.testing.assert_array_equal(cloud.fields["intensity"], np.asarray(las.intensity))
        if epsg_unit:
            assert cloud.horizontal_unit_m == epsg_unit
    autzen = read_cloud(DATA / "autzen.las")
    assert autzen.sources[0].crs_origin == "file-geotiff"
    assert autzen.crs.to_epsg() == 2994  # NAD83(HARN) / Oregon GIC Lambert (ft)
    sha = hashlib.sha256((DATA / "autzen.las").read_bytes()).hexdigest()
    assert autzen.sources[0].sha256 == sha


def test_real_crops_point_counts():
    # Counts from /work/shared/real-clouds/README.md (AHN4 crops, CC0).
    if not REAL.is_dir():
        pytest.skip("shared real-cloud crops not present")
    cloud = read_cloud(REAL, fields=("intensity",))
    counts = [s.point_count for s in cloud.sources]
    assert counts == [699_634, 893_073]
    assert cloud.n_points == 699_634 + 893_073
    assert cloud.crs.to_epsg() == 7415
    assert (cloud.horizontal_unit_m, cloud.vertical_unit_m) == (1.0, 1.0)
    np.testing.assert_array_equal(np.bincount(cloud.source_id), counts)
    # Coordinates agree with laspy's own scaling of the second file.
    las = laspy.read(REAL / "ahn4_powerline_12BZ1_21.laz")
    second = cloud.source_id == 1
    np.testing.assert_allclose(cloud.to_crs(cloud.xyz[second]),
                               np.column_stack([las.x, las.y, las.z]), rtol=1e-15, atol=1e-9)
    assert set(np.unique(cloud.classification)) == {1, 2, 9}


# ----------------------------------------------------------------------------- several files
def test_multi_file_and_folder_input(tmp_path):
    a = make_cloud(n=300, seed=1)
    b = make_cloud(n=500, seed=2, origin=(500_900.0, 4_400_100.0, 0.0))
    folder = tmp_path / "tiles"
    folder.mkdir()
    write_cloud(b, folder / "tile_b.LAZ")
    write_cloud(a, folder / "tile_a.las", scale_crs_units=0.0005)
    (folder / "notes.txt").write_text("not a tile")
    files = resolve_inputs(folder)
    assert [f.name for f in files] == ["tile_a.las", "tile_b.LAZ"]
    cloud = read_cloud(folder)
    assert cloud.n_points == 800
    assert [Path(s.path).name for s in cloud.sources] == ["tile_a.las", "tile_b.LAZ"]
    np.testing.assert_array_equal(cloud.source_id, np.repeat([0, 1], [300, 500]))
    np.testing.assert_array_equal(cloud.source_index[300:], np.arange(500))
    for sid, src in enumerate((a, b)):
        sel = cloud.source_id == sid
        np.testing.assert_allclose(cloud.to_crs(cloud.xyz[sel]), src.to_crs(src.xyz),
                                   rtol=1e-15, atol=1e-9)
    # the same two files listed explicitly, in the other order
    cloud2 = read_cloud([folder / "tile_b.LAZ", folder / "tile_a.las"])
    assert [Path(s.path).name for s in cloud2.sources] == ["tile_b.LAZ", "tile_a.las"]


def test_multi_file_with_different_crs_is_refused(tmp_path):
    write_cloud(make_cloud(n=10, crs="EPSG:32617"), tmp_path / "a.las")
    write_cloud(make_cloud(n=10, crs="EPSG:32618"), tmp_path / "b.las")
    with pytest.raises(InputError) as err:
        read_cloud(tmp_path)
    assert err.value.source.endswith("b.las")
    # an override makes them one
    assert read_cloud(tmp_path, crs="EPSG:32617").n_points == 20


# ----------------------------------------------------------------------------- culling
def test_chunked_culling_equals_in_memory_filter(tmp_path):
    cloud = make_cloud(n=20_000, seed=5)
    path = write_cloud(cloud, tmp_path / "c.laz")
    line = np.array([[500_050.0, 4_400_050.0], [500_400.0, 4_400_500.0],
                     [500_750.0, 4_400_450.0]])
    keep = corridor_mask(line, 40.0)
    seen = []
    culled = read_cloud(path, chunk_size=1_500, keep=keep,
                        progress=lambda done, total: seen.append((done, total)))
    full = read_cloud(path)
    mask = keep(full.to_crs(full.xyz)[:, :2])
    assert 0 < mask.sum() < full.n_points
    np.testing.assert_array_equal(culled.xyz, full.xyz[mask])
    np.testing.assert_array_equal(culled.source_index, np.flatnonzero(mask))
    np.testing.assert_array_equal(culled.fields["gps_time"], full.fields["gps_time"][mask])
    assert seen[-1] == (20_000, 20_000) and len(seen) == 14
    assert all(a[0] < b[0] for a, b in zip(seen, seen[1:], strict=False))


def test_decode_steps_keep_the_parallel_decoders_threads_busy(tmp_path):
    # common practice (no source): LASzip writers' default chunk is 50 000 points; a
    # step of whole chunks, a multiple of the decoder's threads, changes no point read
    from clearaudit.io.las import balanced_step

    cloud = make_cloud(n=130_000, seed=9)
    laz = write_cloud(cloud, tmp_path / "c.laz")
    las = write_cloud(cloud, tmp_path / "c.las")
    with laspy.open(laz) as reader:
        header = reader.header
    assert balanced_step(250_000, header, threads=2) == 200_000
    assert balanced_step(250_000, header, threads=4) == 200_000
    assert balanced_step(250_000, header, threads=8) == 400_000
    assert balanced_step(250_000, header, threads=3) == 300_000
    assert balanced_step(250_000, header, threads=1) == 250_000
    assert balanced_step(250_000, header, threads=64) == 1_000_000  # at most four times
    assert balanced_step(70_000, header, threads=2) == 100_000
    assert balanced_step(20_000, header, threads=2) == 20_000  # less than a chunk: as asked
    with laspy.open(las) as reader:
        assert balanced_step(250_000, reader.header, threads=2) == 250_000
    setup = read_setup(laz, hashes=False)
    ref = read_cloud(laz)
    for size in (7_000, 60_000, 250_000):
        got = list(read_range(setup, 0, 10_000, 125_000, chunk_size=size))
        np.testing.assert_array_equal(np.concatenate([g[2] for g in got]),
                                      np.arange(10_000, 125_000))
        np.testing.assert_array_equal(np.concatenate([g[0] for g in got]),
                                      ref.xyz[10_000:125_000])


def test_corridor_mask_matches_shapely_distance():
    shapely = pytest.importorskip("shapely")
    rng = np.random.default_rng(3)
    line = np.array([[0.0, 0.0], [100.0, 20.0], [150.0, 120.0], [150.0, 120.0], [40.0, 200.0]])
    pts = rng.uniform(-60, 220, size=(50_000, 2))
    buffer = 25.0
    mask = corridor_mask(line, buffer)(pts)
    dist = shapely.distance(shapely.points(pts), shapely.LineString(line))
    clear = np.abs(dist - buffer) > 1e-9
    np.testing.assert_array_equal(mask[clear], (dist <= buffer)[clear])
    # one vertex: a disc
    disc = corridor_mask(line[:1], 10.0)(pts)
    np.testing.assert_array_equal(disc, np.hypot(pts[:, 0], pts[:, 1]) <= 10.0)
    with pytest.raises(ValueError):
        corridor_mask(np.zeros((3, 3)), 1.0)
    with pytest.raises(ValueError):
        corridor_mask(line, -1.0)


def _corridor_numpy(line: np.ndarray, buffer: float, xy: np.ndarray) -> np.ndarray:
    """The corridor test in plain numpy, every point against every segment: within the
    buffer of a segment's box grown by it and ``d^2 <= buffer^2`` with ``t = clip(((p - a) .
    (b - a)) / |b - a|^2, 0, 1)``, each product and sum rounded on its own (the compiled
    kernel's order)."""
    keep = np.zeros(len(xy), dtype=bool)
    px, py = xy[:, 0], xy[:, 1]
    for a, b in zip(line[:-1], line[1:], strict=True):
        lo, hi = np.minimum(a, b) - buffer, np.maximum(a, b) + buffer
        ab0, ab1 = float(b[0] - a[0]), float(b[1] - a[1])
        denom = ab0 * ab0 + ab1 * ab1
        if denom > 0.0:
            t = np.clip(((px - a[0]) * ab0 + (py - a[1]) * ab1) / denom, 0.0, 1.0)
            dx, dy = px - (a[0] + t * ab0), py - (a[1] + t * ab1)
        else:
            dx, dy = px - a[0], py - a[1]
        inside = (px >= lo[0]) & (px <= hi[0]) & (py >= lo[1]) & (py <= hi[1])
        keep |= inside & (dx * dx + dy * dy <= buffer * buffer)
    return keep


def test_corridor_exact_kernel_equals_the_numpy_form_on_the_edge():
    # The compiled exact test (the points of raster cells that straddle the buffer's edge)
    # against every segment tested in plain numpy, value for value; points placed on the
    # buffer's edge to the last bit and one ulp either side, and many points of a long bent
    # line whose raster cells are coarse (most of its corridor straddles). Reference also:
    # shapely's distances away from the edge (GEOS, a general-purpose geometry library).
    shapely = pytest.importorskip("shapely")
    rng = np.random.default_rng(11)
    line = np.array([[503_000.0, 4_100_000.0], [503_400.0, 4_100_090.0],
                     [503_400.0, 4_100_090.0], [503_950.0, 4_100_700.0],
                     [504_100.0, 4_101_900.0], [503_000.0, 4_103_000.0]])
    buffer = 45.0
    keep = corridor_mask(line, buffer)
    # points on the edge: foot on a segment, out along the normal by exactly the buffer
    k = rng.integers(0, len(line) - 1, 40_000)
    a, b = line[k], line[k + 1]
    ab = b - a
    length = np.hypot(ab[:, 0], ab[:, 1])
    ok = length > 0
    a, ab, length = a[ok], ab[ok], length[ok]
    u = rng.uniform(0, 1, len(a))[:, None]
    normal = np.column_stack((-ab[:, 1], ab[:, 0])) / length[:, None]
    side = rng.choice([-1.0, 1.0], len(a))[:, None]
    edge = a + u * ab + side * buffer * normal
    around = np.concatenate([edge, np.nextafter(edge, edge + 1), np.nextafter(edge, edge - 1)])
    box_lo, box_hi = line.min(axis=0) - buffer, line.max(axis=0) + buffer
    spread = rng.uniform(box_lo, box_hi, size=(200_000, 2))
    pts = np.concatenate([around, spread])
    want = _corridor_numpy(line, buffer, pts)
    got = keep(pts)
    np.testing.assert_array_equal(got, want)
    assert 0.2 < want[:len(around)].mean() < 0.8  # the edge points fall on both sides
    # the kernel alone, on every point (not only those of straddling cells)
    from clearaudit.classify.kernels import corridor_exact

    at = np.flatnonzero(np.all((pts >= box_lo) & (pts <= box_hi), axis=1))
    out = np.empty(len(at), dtype=np.uint8)
    corridor_exact(pts, at, *keep.raster[8:], out)
    np.testing.assert_array_equal(out.view(bool), want[at])
    dist = shapely.distance(shapely.points(spread), shapely.LineString(line))
    clear = np.abs(dist - buffer) > 1e-9
    np.testing.assert_array_equal(got[len(around):][clear], (dist <= buffer)[clear])
    with pytest.raises(IndexError):
        corridor_exact(pts, np.array([len(pts)], dtype=np.int64), *keep.raster[8:],
                       np.empty(1, dtype=np.uint8))


def test_read_range_compiled_corridor_pass_equals_the_numpy_form():
    # reference: the same corridor through the numpy path (a keep callable without the
    # compiled raster), and shapely's distances for the kept points. Local origin away from
    # the files' offsets (a shift with a remainder), a corridor that cuts through the points.
    shapely = pytest.importorskip("shapely")
    path = Path(__file__).resolve().parents[1] / "sample_clouds" / "tarnwick_velloran_230kv.laz"
    setup = read_setup([path], origin=(506_300.123, 3_942_000.456, 200.0))
    lo, hi = setup.header_min, setup.header_max
    mid = 0.5 * (lo + hi)
    line = np.array([[lo[0] + 40.0, mid[1] - 100.0], [mid[0], mid[1] + 30.0],
                     [hi[0] - 30.0, mid[1] - 10.0]]) + setup.origin[:2]
    keep = corridor_mask(line, 35.0)
    assert keep.raster is not None

    def plain(xy):  # the same test, by the numpy form
        return keep(xy)

    def everything(xy):  # no corridor, by the numpy form
        return np.ones(len(xy), dtype=bool)

    cells = (-312.5, -87.25, 50.0)  # a grid (x0, y0, cell) [m]: Grid.cells' formula below
    for chunk in (1000, 37_000):
        for compiled, numpy_form in ((keep, plain), (None, everything)):
            fast = list(read_range(setup, 0, 5, None, keep=compiled, chunk_size=chunk,
                                   cells=cells))
            slow = list(read_range(setup, 0, 5, None, keep=numpy_form, chunk_size=chunk,
                                   cells=cells))
            assert len(fast) == len(slow) > 1
            for a, b in zip(fast, slow, strict=True):
                assert len(a) == len(b) == 6
                for u, v in zip(a[:3] + a[4:], b[:3] + b[4:], strict=True):
                    assert u.dtype == v.dtype
                    np.testing.assert_array_equal(u, v)
                assert a[3] == b[3]
                np.testing.assert_array_equal(a[4], np.floor((a[0][:, 0] + 312.5) / 50.0))
                np.testing.assert_array_equal(a[5], np.floor((a[0][:, 1] + 87.25) / 50.0))
        # without cells: the first four of the same
        plain4 = list(read_range(setup, 0, 5, None, keep=keep, chunk_size=chunk))
        assert all(len(a) == 4 for a in plain4)
        with_cells = list(read_range(setup, 0, 5, None, keep=keep, chunk_size=chunk,
                                     cells=cells))
        for a, b in zip(plain4, with_cells, strict=True):
            for u, v in zip(a[:3], b[:3], strict=True):
                np.testing.assert_array_equal(u, v)
            assert a[3] == b[3]
    fast = list(read_range(setup, 0, 5, None, keep=keep, chunk_size=37_000))
    xyz = np.concatenate([c[0] for c in fast])
    assert 0 < len(xyz) < setup.total_points
    dist = shapely.distance(shapely.points(xyz[:, :2] + setup.origin[:2]),
                            shapely.LineString(line))
    assert np.all(dist <= 35.0 + 1e-9)


# ----------------------------------------------------------------------------- bad inputs
def test_missing_file(tmp_path):
    with pytest.raises(InputError) as err:
        read_cloud(tmp_path / "nope.laz")
    assert err.value.source.endswith("nope.laz") and "does not exist" in err.value.problem


def test_empty_folder_and_wrong_suffix(tmp_path):
    with pytest.raises(InputError, match="no .las or .laz"):
        resolve_inputs(tmp_path)
    (tmp_path / "a.xyz").write_text("1 2 3")
    with pytest.raises(InputError, match="not a LAS/LAZ"):
        resolve_inputs(tmp_path / "a.xyz")
    with pytest.raises(InputError):
        resolve_inputs([])


def test_text_file_named_laz(tmp_path):
    fake = tmp_path / "fake.laz"
    fake.write_text("x,y,z\n1,2,3\n")
    with pytest.raises(InputError) as err:
        read_cloud(fake)
    assert err.value.source == str(fake) and "not a LAS/LAZ" in err.value.problem


def test_truncated_laz(tmp_path):
    src = REAL / "ahn4_powerline_07CZ2_14.laz" if REAL.is_dir() else DATA / "simple.laz"
    data = src.read_bytes()
    cut = tmp_path / "half.laz"
    cut.write_bytes(data[: len(data) // 2])
    with pytest.raises(InputError) as err:
        read_cloud(cut)
    assert err.value.source == str(cut)
    assert "truncated or corrupt" in err.value.problem
    with pytest.raises(InputError, match="truncated or corrupt"):
        describe(cut)


def test_truncated_las_and_cut_header(tmp_path):
    data = (DATA / "autzen.las").read_bytes()
    for name, size in [("half.las", len(data) // 2), ("head.las", 100)]:
        cut = tmp_path / name
        cut.write_bytes(data[:size])
        with pytest.raises(InputError) as err:
            read_cloud(cut)
        assert err.value.source == str(cut)


def test_corrupt_laz_body(tmp_path):
    data = bytearray((DATA / "simple.laz").read_bytes())
    with laspy.open(DATA / "simple.laz") as r:
        start = r.header.offset_to_point_data
    rng = np.random.default_rng(0)
    data[start + 200: start + 4000] = rng.integers(0, 256, 3800, dtype=np.uint8).tobytes()
    bad = tmp_path / "garbled.laz"
    bad.write_bytes(bytes(data))
    try:
        cloud = read_cloud(bad, crs="EPSG:32617")
    except InputError as err:
        assert err.source == str(bad)
    else:  # LAZ has no checksums: garbage may decode; it must at least be the right count
        assert cloud.n_points == 1065


def _set_header_bounds(path: Path, mins, maxs) -> None:
    """Overwrite the bounds in a LAS/LAZ header in place (ASPRS LAS 1.2-1.4: max x, min x,
    max y, min y, max z, min z as little-endian doubles from byte 179)."""
    values = np.array([maxs[0], mins[0], maxs[1], mins[1], maxs[2], mins[2]], dtype="<f8")
    with open(path, "r+b") as fh:
        fh.seek(179)
        fh.write(values.tobytes())


@pytest.mark.parametrize("suffix", [".laz", ".las"])
def test_points_beyond_the_header_bounds(tmp_path, suffix):
    # LAZ has no checksums: damaged chunks can decode to points anywhere. A point beyond the
    # header's bounds by more than HEADER_BOUNDS_SLACK (1 unit of length) stops the read with
    # an error naming the file, in memory and streamed alike. Reference: laspy's scaled
    # coordinates of the same file (which point is the first one beyond the bound).
    from clearaudit.io.las import HEADER_BOUNDS_SLACK

    path = write_cloud(make_cloud(n=3000), tmp_path / f"c{suffix}")
    las = laspy.read(path)
    x = np.asarray(las.x)
    mins = np.array(las.header.mins, dtype=float)
    maxs = np.array(las.header.maxs, dtype=float)
    # a header whose bounds were rounded (within the slack) still reads, the same points
    _set_header_bounds(path, mins + 0.6 * HEADER_BOUNDS_SLACK, maxs - 0.6 * HEADER_BOUNDS_SLACK)
    cloud = read_cloud(path, crs="EPSG:32617")
    assert cloud.n_points == 3000
    assert describe(path)[0]["beyond_header_bounds"] is False
    setup = read_setup(path, hashes=False)
    assert sum(len(c[0]) for c in read_range(setup, 0, chunk_size=1000)) == 3000
    # a header with no bounds at all (every value 0) is not tested
    _set_header_bounds(path, np.zeros(3), np.zeros(3))
    assert read_cloud(path, crs="EPSG:32617").n_points == 3000
    # bounds that leave points out: the first such point is named, with its x
    cut = float(np.quantile(x, 0.5))
    _set_header_bounds(path, mins, [cut, maxs[1], maxs[2]])
    first = int(np.flatnonzero(x > cut + HEADER_BOUNDS_SLACK)[0])
    assert describe(path)[0]["beyond_header_bounds"] is True  # `info` shows, not refuses
    for read in (lambda: read_cloud(path, crs="EPSG:32617"),
                 lambda: list(read_range(read_setup(path, hashes=False), 0, chunk_size=1000))):
        with pytest.raises(InputError) as err:
            read()
        assert err.value.source == str(path)
        problem = err.value.problem
        assert "beyond the bounds in its header" in problem and f"point {first}," in problem
        assert f"x = {x[first]:.3f}" in problem and "corrupt" in problem
    # beyond on two axes: the first point that is beyond on either is named
    y = np.asarray(las.y)
    cut_y = float(np.quantile(y, 0.5))
    _set_header_bounds(path, mins, [cut, cut_y, maxs[2]])
    over_x = np.flatnonzero(x > cut + HEADER_BOUNDS_SLACK)
    over_y = np.flatnonzero(y > cut_y + HEADER_BOUNDS_SLACK)
    first = int(min(over_x[0], over_y[0]))
    axis = "x" if over_x[0] <= over_y[0] else "y"
    value = (x if axis == "x" else y)[first]
    with pytest.raises(InputError) as err:
        read_cloud(path, crs="EPSG:32617")
    assert f"point {first}, {axis} = {value:.3f}" in err.value.problem


def test_empty_cloud(tmp_path):
    empty = Cloud(xyz=np.empty((0, 3)), origin=np.zeros(3), crs=pyproj.CRS("EPSG:32617"))
    path = write_cloud(empty, tmp_path / "empty.laz")
    with pytest.raises(InputError) as err:
        read_cloud(path)
    assert err.value.source == str(path) and "contains no points" in err.value.problem
    full = write_cloud(make_cloud(n=100), tmp_path / "full.laz")
    with pytest.raises(InputError, match="no points inside"):
        read_cloud(full, keep=corridor_mask(np.array([[0.0, 0.0], [1.0, 1.0]]), 1.0))


# ----------------------------------------------------------------------------- describe
def test_describe_matches_laspy(tmp_path):
    shutil.copy(DATA / "autzen.las", tmp_path / "autzen.las")
    info = describe(tmp_path)[0]
    las = laspy.read(DATA / "autzen.las")
    codes, counts = np.unique(np.asarray(las.classification), return_counts=True)
    assert info["class_counts"] == {int(c): int(k) for c, k in zip(codes, counts, strict=True)}
    assert info["point_count"] == 106 and info["point_format"] == 1 and info["version"] == "1.2"
    np.testing.assert_allclose(info["bounds_min"], [las.x.min(), las.y.min(), las.z.min()])
    np.testing.assert_allclose(info["bounds_max"], [las.x.max(), las.y.max(), las.z.max()])
    assert info["crs_epsg"] == 2994 and info["horizontal_unit"] == "foot"
    assert info["crs_origin"] == "file-geotiff"
    no_crs = describe(DATA / "simple.laz", crs="EPSG:2264")[0]
    assert no_crs["horizontal_unit"] == "US survey foot" and no_crs["crs_origin"] == "override"


def test_keep_errors_are_not_blamed_on_the_file(tmp_path):
    path = write_cloud(make_cloud(n=100), tmp_path / "k.laz")
    with pytest.raises(ValueError, match="boolean array"):
        read_cloud(path, keep=lambda xy: np.ones(3, dtype=bool))
    with pytest.raises(ValueError, match="chunk_size"):
        read_cloud(path, chunk_size=0)


def test_unparseable_crs_record_needs_override(tmp_path):
    from laspy.vlrs.known import WktCoordinateSystemVlr

    path = write_cloud(make_cloud(n=20, crs=None), tmp_path / "badcrs.las")
    las = laspy.read(path)
    las.header.vlrs.append(WktCoordinateSystemVlr("PROJCS[this is not WKT"))
    las.write(path)
    with pytest.raises(InputError) as err:
        read_cloud(path)
    assert err.value.source == str(path) and "CRS record" in err.value.problem
    cloud = read_cloud(path, crs="EPSG:32617")
    assert cloud.crs.to_epsg() == 32617 and cloud.sources[0].crs_origin == "override"


def test_field_values_must_fit_the_format(tmp_path):
    cloud = make_cloud(n=10)
    cloud.fields["return_number"] = np.full(10, 9, dtype=np.uint8)  # 3 bits in formats 0-5
    with pytest.raises(ValueError, match="return_number"):
        write_cloud(cloud, tmp_path / "r.las", point_format=1, version="1.2")
    assert write_cloud(cloud, tmp_path / "r.laz", point_format=6).exists()  # 4 bits in 6-10
    cloud.classification[:] = 40
    with pytest.raises(ValueError, match="class code 40"):
        write_cloud(cloud, tmp_path / "c.las", point_format=3, version="1.2")


@pytest.mark.parametrize("point_format", range(11))
def test_reused_decode_buffer_gives_laspys_records(tmp_path, point_format):
    # reference: laspy's own LasReader.read_points (general-purpose library) on the same file,
    # every point format, all layers and the audit's layers of a layered file
    from las_fixture import random_las

    from clearaudit.io.las import _XYZ_CLASS_LAYERS, _reusing_reader

    path = random_las(tmp_path / f"f{point_format}.laz", point_format, 12_345,
                      np.random.default_rng(point_format))
    for selection in (None, _XYZ_CLASS_LAYERS):
        kw = {} if selection is None else {"decompression_selection": selection}
        with laspy.open(path, **kw) as ref, laspy.open(path, **kw) as got:
            read = _reusing_reader(got, path)
            buffers = set()
            for n in (5_000, 5_000, 1_000, 5_000, 5_000):
                a, b = ref.read_points(n), read(n)
                assert len(a) == len(b) and got.points_read == ref.points_read
                assert a.array.tobytes() == b.array.tobytes()
                np.testing.assert_array_equal(a.x, b.x)
                if len(b):
                    buffers.add(b.array.__array_interface__["data"][0])
            assert len(buffers) == 1  # one buffer, reused
    las_path = random_las(tmp_path / "plain.las", point_format, 10, np.random.default_rng(0))
    with laspy.open(las_path) as reader:
        assert _reusing_reader(reader, las_path) is None  # laspy's own reads

"""CSV, GeoJSON and GeoPackage exports.

The GeoPackage is read back with GDAL/OGR through `pyogrio` (PyPI; an independent, widely used
reader) — if GDAL accepts our file, GIS users will too.
"""
from __future__ import annotations

import csv
import json
import sqlite3

import numpy as np
import pytest
from pyproj import CRS, Transformer

from clearaudit.io.exports import Layer, to_wgs84, write_csv, write_geojson_points, write_geopackage


def test_csv_roundtrip_and_blanks(tmp_path):
    rows = [{"a": 1.23456789, "b": "x", "c": float("nan")}, {"a": 2, "b": None}]
    path = write_csv(tmp_path / "t.csv", rows, ["a", "b", "c"])
    with open(path, newline="") as f:
        got = list(csv.DictReader(f))
    assert got[0] == {"a": "1.234568", "b": "x", "c": ""}
    assert got[1] == {"a": "2", "b": "", "c": ""}


def test_to_wgs84_matches_pyproj_reference():
    # Reference: pyproj's own UTM zone 17N transform (EPSG:32617 → EPSG:4326).
    xy = np.array([[500000.0, 4000000.0], [510000.0, 4010000.0]])
    ref = Transformer.from_crs(32617, 4326, always_xy=True).transform(xy[:, 0], xy[:, 1])
    got = to_wgs84(xy, CRS.from_epsg(32617))
    np.testing.assert_allclose(got, np.column_stack(ref), atol=1e-12)
    # Central meridian of zone 17 is 81° W (UTM definition).
    assert got[0, 0] == pytest.approx(-81.0, abs=1e-9)
    assert to_wgs84(xy, None) is None


def test_geojson_points(tmp_path):
    rows = [{"id": 1, "kind": "vegetation", "clearance_m": 2.5}]
    path = write_geojson_points(tmp_path / "v.geojson", rows, ["id", "kind", "clearance_m"],
                                np.array([[-81.0, 36.1]]), np.array([210.0]))
    doc = json.loads(path.read_text())
    assert doc["type"] == "FeatureCollection"
    assert doc["features"][0]["geometry"]["coordinates"] == [-81.0, 36.1, 210.0]
    assert doc["features"][0]["properties"]["kind"] == "vegetation"


def test_geopackage_read_by_gdal(tmp_path):
    pyogrio = pytest.importorskip("pyogrio")
    crs = CRS.from_epsg(32617)
    pts = Layer("structures", "POINT", {"structure_id": "TEXT", "height_m": "REAL"},
                [(np.array([500000.0, 4000000.0, 120.0]), {"structure_id": "T1", "height_m": 38.5}),
                 (np.array([500300.0, 4000010.0, 125.0]), {"structure_id": "T2", "height_m": 40.0})])
    line = np.column_stack([np.linspace(500000, 500300, 5), np.linspace(4e6, 4e6 + 10, 5),
                            [150.0, 140.0, 137.0, 141.0, 152.0]])
    wires = Layer("wires", "LINESTRING", {"wire_id": "TEXT", "sag_m": "REAL"},
                  [(line, {"wire_id": "C1-A", "sag_m": 9.1})])
    path = write_geopackage(tmp_path / "line.gpkg", [pts, wires], crs)
    layers = {row[0]: row[1] for row in pyogrio.list_layers(path)}
    assert layers == {"structures": "Point Z", "wires": "LineString Z"}
    info = pyogrio.read_info(path, layer="wires")
    assert CRS.from_user_input(info["crs"]).to_epsg() == 32617
    meta, fids, geoms, fields = pyogrio.raw.read(path, layer="structures")
    assert list(fields[0]) == ["T1", "T2"]
    # WKB from GDAL: decode the first point (ISO WKB Point Z = 1001, or 2.5D flag variant).
    import struct
    wkb = bytes(geoms[0])
    x, y, z = struct.unpack("<3d", wkb[5:29])
    assert (x, y, z) == (500000.0, 4000000.0, 120.0)
    # Required GeoPackage metadata (OGC 12-128r18, Requirement 2: application_id 'GPKG').
    con = sqlite3.connect(path)
    assert con.execute("PRAGMA application_id").fetchone()[0] == 0x47504B47
    con.close()


@pytest.mark.parametrize("scale", [1.0, 1e3, 5e6, 1e8])
def test_array_rounding_is_pythons_round(scale):
    # reference: Python's built-in round (correctly rounded decimal, ties to even)
    from clearaudit.outputs import round_like_python

    rng = np.random.default_rng(int(scale) % 97)
    v = rng.normal(size=(20_000, 3)) * scale
    v[:500, 0] = np.round(rng.normal(size=500) * scale, 4) + 0.00005  # next to a half
    v[500:1000, 1] = np.arange(500) * 0.00005                          # decimal halves
    v[1000, :] = [np.nan, np.inf, -0.00001]
    v[1001, :] = [1e17, -3e15, 2.0 ** 60]                               # no fraction left
    ref = [[round(x, 4) for x in row] for row in v.tolist()]
    got = round_like_python(v, 4).tolist()
    assert json.dumps(got) == json.dumps(ref)

"""Tabular and GIS exports: CSV, GeoJSON (RFC 7946) and GeoPackage (OGC 12-128r18).

The GeoPackage writer uses only the standard library's sqlite3: it writes the required metadata
tables (``gpkg_spatial_ref_sys``, ``gpkg_contents``, ``gpkg_geometry_columns``) and geometry blobs
in the GeoPackage binary format (a ``GP`` header with an envelope, followed by ISO WKB), so the
file opens in any GIS without GDAL being installed here.
"""
from __future__ import annotations

import csv
import datetime as _dt
import json
import math
import sqlite3
import struct
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .files import write_text

# ------------------------------------------------------------------------------------------ CSV


def _cell(value: Any) -> Any:
    if value is None:
        return ""
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if not math.isfinite(v):
            return ""
        return repr(round(v, 6)) if abs(v) < 1e15 else repr(v)
    if isinstance(value, (np.integer,)):
        return int(value)
    return value


def write_csv(path: str | Path, rows: Iterable[dict[str, Any]], columns: Sequence[str]) -> Path:
    """Write rows as CSV with the given column order (missing values → empty cells).

    Floats are rounded to 6 decimals (µm for lengths), non-finite values are left empty.
    """
    path = Path(path)
    with open(path, "w", newline="", encoding="utf-8") as f:
        writer = csv.writer(f)
        writer.writerow(columns)
        for row in rows:
            writer.writerow([_cell(row.get(c)) for c in columns])
    return path


# -------------------------------------------------------------------------------------- GeoJSON


def to_wgs84(xyz_crs: np.ndarray, crs: Any) -> np.ndarray | None:
    """CRS coordinates (n, 2+) → (n, 2) longitude/latitude in WGS 84, or None without a CRS."""
    if crs is None:
        return None
    from pyproj import CRS, Transformer

    src = CRS.from_user_input(crs)
    if src.is_compound:
        src = src.sub_crs_list[0]
    transformer = Transformer.from_crs(src, CRS.from_epsg(4326), always_xy=True)
    xyz = np.atleast_2d(np.asarray(xyz_crs, dtype=float))
    if len(xyz) == 0:
        return np.empty((0, 2))
    lon, lat = transformer.transform(xyz[:, 0], xyz[:, 1])
    return np.column_stack([lon, lat])


def write_geojson_points(path: str | Path, rows: Sequence[dict[str, Any]], columns: Sequence[str],
                         lonlat: np.ndarray | None, z_m: np.ndarray | None = None,
                         name: str = "") -> Path:
    """Write point features (RFC 7946: WGS 84 longitude/latitude, height in metres).

    Without a CRS (``lonlat`` None) features get a null geometry; their CRS coordinates stay in
    the properties.
    """
    features = []
    for i, row in enumerate(rows):
        geometry = None
        if lonlat is not None:
            coords = [round(float(lonlat[i, 0]), 9), round(float(lonlat[i, 1]), 9)]
            if z_m is not None and math.isfinite(float(z_m[i])):
                coords.append(round(float(z_m[i]), 3))
            geometry = {"type": "Point", "coordinates": coords}
        props = {c: _json_value(row.get(c)) for c in columns}
        features.append({"type": "Feature", "id": props.get("id", i + 1), "geometry": geometry,
                         "properties": props})
    doc = {"type": "FeatureCollection", "name": name, "features": features}
    path = Path(path)
    write_text(path, json.dumps(doc, indent=1, allow_nan=False))  # 1 MiB a call (io.files)
    return path


def _json_value(v: Any) -> Any:
    if isinstance(v, (np.bool_,)):
        return bool(v)
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        v = float(v)
        return round(v, 6) if math.isfinite(v) else None
    return v


# ----------------------------------------------------------------------------------- GeoPackage


@dataclass
class Layer:
    """One GeoPackage feature layer.

    ``geometry_type`` is ``POINT`` or ``LINESTRING`` (always 3D, coordinates in CRS units);
    ``features`` holds (coordinates, properties) pairs: coordinates (3,) for points, (k, 3) for
    line strings.
    """

    name: str
    geometry_type: str
    columns: dict[str, str]  # column name → SQL type: TEXT, REAL, INTEGER
    features: list[tuple[np.ndarray, dict[str, Any]]] = field(default_factory=list)
    description: str = ""


_WKB_TYPES = {"POINT": 1001, "LINESTRING": 1002}  # ISO WKB, Z variants


def _gpkg_geometry(geometry_type: str, coords: np.ndarray, srs_id: int) -> bytes:
    coords = np.asarray(coords, dtype="<f8")
    pts = coords.reshape(-1, 3)
    env = np.concatenate([[pts[:, 0].min(), pts[:, 0].max(), pts[:, 1].min(), pts[:, 1].max(),
                           pts[:, 2].min(), pts[:, 2].max()]])
    flags = 0b0000_0101  # little endian (bit 0), envelope type 2 = xyz (bits 1-3)
    header = b"GP" + bytes([0, flags]) + struct.pack("<i", srs_id) + env.astype("<f8").tobytes()
    wkb_type = _WKB_TYPES[geometry_type]
    if geometry_type == "POINT":
        body = struct.pack("<BI", 1, wkb_type) + pts[0].tobytes()
    else:
        body = struct.pack("<BII", 1, wkb_type, len(pts)) + pts.tobytes()
    return header + body


def _srs_row(crs: Any) -> tuple[int, str, str, int, str]:
    """(srs_id, organization, srs_name, org_id, definition) for the cloud CRS."""
    if crs is None:
        return (-1, "NONE", "Undefined cartesian SRS", -1, "undefined")
    from pyproj import CRS

    c = CRS.from_user_input(crs)
    epsg = c.to_epsg(min_confidence=90)
    wkt = c.to_wkt(version="WKT1_GDAL") or c.to_wkt()
    if epsg is not None:
        return (int(epsg), "EPSG", c.name, int(epsg), wkt)
    return (100000, "NONE", c.name, 100000, wkt)


def write_geopackage(path: str | Path, layers: Sequence[Layer], crs: Any) -> Path:
    """Write feature layers into a new GeoPackage (an existing file is replaced)."""
    path = Path(path)
    if path.exists():
        path.unlink()
    srs_id, org, srs_name, org_id, definition = _srs_row(crs)
    now = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")[:-4] + "Z"
    con = sqlite3.connect(path)
    try:
        cur = con.cursor()
        cur.execute("PRAGMA application_id = 1196444487")  # 'GPKG'
        cur.execute("PRAGMA user_version = 10300")  # GeoPackage 1.3.0
        cur.execute("""CREATE TABLE gpkg_spatial_ref_sys (srs_name TEXT NOT NULL,
            srs_id INTEGER PRIMARY KEY, organization TEXT NOT NULL,
            organization_coordsys_id INTEGER NOT NULL, definition TEXT NOT NULL,
            description TEXT)""")
        base_rows = [
            ("Undefined cartesian SRS", -1, "NONE", -1, "undefined", "undefined cartesian"),
            ("Undefined geographic SRS", 0, "NONE", 0, "undefined", "undefined geographic"),
            ("WGS 84 geodetic", 4326, "EPSG", 4326,
             'GEOGCS["WGS 84",DATUM["WGS_1984",SPHEROID["WGS 84",6378137,298.257223563,'
             'AUTHORITY["EPSG","7030"]],AUTHORITY["EPSG","6326"]],PRIMEM["Greenwich",0,'
             'AUTHORITY["EPSG","8901"]],UNIT["degree",0.0174532925199433,AUTHORITY["EPSG",'
             '"9122"]],AXIS["Latitude",NORTH],AXIS["Longitude",EAST],AUTHORITY["EPSG","4326"]]',
             "longitude/latitude coordinates in decimal degrees on the WGS 84 spheroid"),
        ]
        cur.executemany("INSERT INTO gpkg_spatial_ref_sys VALUES (?,?,?,?,?,?)", base_rows)
        if srs_id not in (-1, 0, 4326):
            cur.execute("INSERT INTO gpkg_spatial_ref_sys VALUES (?,?,?,?,?,?)",
                        (srs_name, srs_id, org, org_id, definition, "cloud CRS"))
        cur.execute("""CREATE TABLE gpkg_contents (table_name TEXT NOT NULL PRIMARY KEY,
            data_type TEXT NOT NULL, identifier TEXT UNIQUE, description TEXT DEFAULT '',
            last_change DATETIME NOT NULL DEFAULT (strftime('%Y-%m-%dT%H:%M:%fZ','now')),
            min_x DOUBLE, min_y DOUBLE, max_x DOUBLE, max_y DOUBLE, srs_id INTEGER,
            CONSTRAINT fk_gc_r_srs_id FOREIGN KEY (srs_id) REFERENCES gpkg_spatial_ref_sys(srs_id))""")
        cur.execute("""CREATE TABLE gpkg_geometry_columns (table_name TEXT NOT NULL,
            column_name TEXT NOT NULL, geometry_type_name TEXT NOT NULL, srs_id INTEGER NOT NULL,
            z TINYINT NOT NULL, m TINYINT NOT NULL,
            CONSTRAINT pk_geom_cols PRIMARY KEY (table_name, column_name),
            CONSTRAINT fk_gc_tn FOREIGN KEY (table_name) REFERENCES gpkg_contents(table_name),
            CONSTRAINT fk_gc_srs FOREIGN KEY (srs_id) REFERENCES gpkg_spatial_ref_sys(srs_id))""")
        for layer in layers:
            if layer.geometry_type not in _WKB_TYPES:
                raise ValueError(f"unsupported geometry type {layer.geometry_type!r}")
            cols = ", ".join(f'"{c}" {t}' for c, t in layer.columns.items())
            cur.execute(f'CREATE TABLE "{layer.name}" (fid INTEGER PRIMARY KEY AUTOINCREMENT, '
                        f'geom {layer.geometry_type}{", " + cols if cols else ""})')
            names = list(layer.columns)
            placeholders = ", ".join("?" * (len(names) + 1))
            col_sql = ", ".join(["geom"] + [f'"{c}"' for c in names])
            bounds = [math.inf, math.inf, -math.inf, -math.inf]
            rows = []
            for coords, props in layer.features:
                pts = np.asarray(coords, dtype=float).reshape(-1, 3)
                if not np.all(np.isfinite(pts)):
                    continue
                bounds = [min(bounds[0], pts[:, 0].min()), min(bounds[1], pts[:, 1].min()),
                          max(bounds[2], pts[:, 0].max()), max(bounds[3], pts[:, 1].max())]
                rows.append([_gpkg_geometry(layer.geometry_type, pts, srs_id)]
                            + [_sql_value(props.get(c)) for c in names])
            cur.executemany(f'INSERT INTO "{layer.name}" ({col_sql}) VALUES ({placeholders})', rows)
            bbox = bounds if rows else [None] * 4
            cur.execute("INSERT INTO gpkg_contents VALUES (?,?,?,?,?,?,?,?,?,?)",
                        (layer.name, "features", layer.name, layer.description, now, *bbox, srs_id))
            cur.execute("INSERT INTO gpkg_geometry_columns VALUES (?,?,?,?,?,?)",
                        (layer.name, "geom", layer.geometry_type, srs_id, 1, 0))
        con.commit()
    finally:
        con.close()
    return path


def _sql_value(v: Any) -> Any:
    if v is None:
        return None
    if isinstance(v, (bool, np.bool_)):
        return int(bool(v))
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        v = float(v)
        return v if math.isfinite(v) else None
    return v

"""Turn the line model and the audit into the output files (docs/outputs.md).

Everything inside is local metres; this module converts to the cloud's CRS units (and WGS 84
longitude/latitude for field crews) at the edge.
"""
from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from . import CAUTION, __version__
from .cloud import Cloud
from .io.exports import Layer, to_wgs84, write_csv, write_geojson_points, write_geopackage
from .io.files import write_text
from .io.las import write_classified

SPAN_COLUMNS = [
    "span_id", "wire_id", "role", "from_structure", "to_structure",
    "x1", "y1", "z1", "x2", "y2", "z2", "span_length_m", "n_points", "coverage", "rms_m",
    "catenary_constant_m", "horizontal_tension_n", "horizontal_tension_ci95_n",
    "conductor_temperature_c", "sag_survey_m", "horizontal_tension_mot_n", "sag_mot_m",
    "min_ground_clearance_survey_m", "min_ground_clearance_mot_m", "status", "note",
]
SPAN_EXTRA_COLUMNS = [
    "section_id", "ruling_span_m", "catenary_constant_ci95_m", "sag_survey_ci95_m",
    "sag_mot_ci95_m", "rated_strength_pct", "largest_gap_m", "bundle_count",
]
VIOLATION_COLUMNS = [
    "id", "kind", "condition", "span_id", "wire_id", "x", "y", "z",
    "clearance_m", "required_m", "deficit_m", "priority", "longitude", "latitude",
]
VIOLATION_EXTRA_COLUMNS = [
    "clearance_ci95_m", "certainty", "finding", "direction", "condition_detail", "reason",
    "grow_in_years", "fall_in", "tree_height_m", "fall_in_distance_m", "station_m",
    "obstacle_id", "surface",
]
MODEL_SCHEMA = "clearaudit.model/1.0"


def _f(x: Any) -> float | None:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def _crs_list(cloud: Cloud, xyz_local: np.ndarray) -> list:
    return [round(float(v), 4) for v in cloud.to_crs(np.asarray(xyz_local, dtype=float))]


def _crs_polyline(cloud: Cloud, xyz_local: Any) -> list:
    """Points (k, 3) in local metres → [[x, y, z], …] in CRS units rounded to 0.1 mm.

    The same numbers as :func:`_crs_list` point by point (``to_crs`` is elementwise), in one
    array operation.
    """
    points = np.asarray(xyz_local, dtype=float)
    if points.ndim != 2:
        return [_crs_list(cloud, p) for p in points]
    return round_like_python(cloud.to_crs(points), 4).tolist()


def round_like_python(values: np.ndarray, digits: int) -> np.ndarray:
    """``round(v, digits)`` of every value, as Python rounds (to the nearest decimal, ties to
    even, on the value's exact binary expansion), computed as arrays.

    ``numpy.round`` scales, rounds to an integer and divides back: the divided value is the
    double nearest to that decimal, as Python's is; the two can pick different integers only
    when the scaled value lies next to a half. Those few values are rounded by Python.
    """
    v = np.asarray(values, dtype=np.float64)
    out = np.round(v, digits)
    scaled = v * 10.0 ** digits
    with np.errstate(invalid="ignore"):
        near_half = np.abs(scaled - np.floor(scaled) - 0.5) < 1e-3
    near_half &= np.isfinite(v)
    near_half |= np.abs(scaled) >= 2.0 ** 52  # no fraction left to round: Python decides
    if near_half.any():
        at = np.flatnonzero(near_half.ravel())
        flat = out.reshape(-1)
        flat[at] = [round(x, digits) for x in v.reshape(-1)[at].tolist()]
    return out


def span_rows_crs(cloud: Cloud, rows: list[dict]) -> list[dict]:
    """spans.csv rows: attachment points converted from local metres to CRS units."""
    out = []
    for row in rows:
        r = {k: v for k, v in row.items() if not k.endswith("_local")}
        for key, cols in (("attachment_a_local", ("x1", "y1", "z1")),
                          ("attachment_b_local", ("x2", "y2", "z2"))):
            p = row.get(key)
            if p is not None and np.all(np.isfinite(p)):
                r.update(dict(zip(cols, cloud.to_crs(np.asarray(p, dtype=float)), strict=True)))
        out.append(r)
    return out


def violation_rows_crs(cloud: Cloud, rows: list[dict]) -> tuple[list[dict], np.ndarray | None]:
    """violations rows with CRS x, y, z and WGS 84 longitude/latitude."""
    pts = np.array([np.asarray(r["point_local"], dtype=float) for r in rows]).reshape(-1, 3)
    crs_xyz = cloud.to_crs(pts) if len(pts) else np.empty((0, 3))
    lonlat = to_wgs84(crs_xyz, cloud.crs) if len(pts) else None
    out = []
    for i, row in enumerate(rows):
        r = {k: v for k, v in row.items() if k != "point_local"}
        r["x"], r["y"], r["z"] = (float(v) for v in crs_xyz[i])
        if lonlat is not None:
            r["longitude"], r["latitude"] = float(lonlat[i, 0]), float(lonlat[i, 1])
        out.append(r)
    return out, lonlat


def build_model_json(cloud: Cloud, model: Any, audit: Any, config: Any, rules: Any) -> dict:
    """The model.json document (docs/outputs.md)."""
    rows_by_key = {(r["span_id"], r["wire_id"]): r for r in audit.span_rows}
    structures = []
    for s in model.structures:
        z_ground = _f(s.z_ground)
        xyz = cloud.to_crs(np.array([s.xy[0], s.xy[1], z_ground if z_ground is not None else 0.0]))
        z_top = _f(s.z_top)
        structures.append({
            "id": s.id, "x": float(xyz[0]), "y": float(xyz[1]),
            "z_ground": None if z_ground is None else float(xyz[2]),
            "z_top": None if z_top is None else float(cloud.to_crs(np.array([0, 0, z_top]))[2]),
            "kind": s.kind, "kind_reason": s.kind_reason, "source": s.source,
            "line_angle_deg": _f(s.line_angle_deg)})
    spans = []
    for span in model.spans:
        wires = []
        for w in span.wires:
            row = rows_by_key.get((span.id, w.wire_id), {})
            curves = audit.curves.get((span.id, w.wire_id), {})
            wires.append({
                "wire_id": w.wire_id, "role": w.role, "status": row.get("status", w.status),
                "note": row.get("note", w.note), "bundle_count": int(w.bundle_count),
                "n_points": int(len(w.point_indices)),
                **{k: _f(row.get(k)) for k in (
                    "coverage", "rms_m", "catenary_constant_m", "catenary_constant_ci95_m",
                    "horizontal_tension_n", "horizontal_tension_ci95_n", "sag_survey_m",
                    "sag_survey_ci95_m", "sag_mot_m", "sag_mot_ci95_m", "horizontal_tension_mot_n",
                    "min_ground_clearance_survey_m", "min_ground_clearance_mot_m",
                    "rated_strength_pct", "largest_gap_m", "conductor_temperature_c")},
                "curves": {name: _crs_polyline(cloud, c) for name, c in curves.items()},
            })
        spans.append({
            "span_id": span.id, "from_structure": span.from_structure,
            "to_structure": span.to_structure, "span_length_m": _f(span.length_m),
            "section_id": span.section_id, "partial_at": span.partial_at,
            "status": "partial" if span.partial_at else (
                "fitted" if any(w.status == "fitted" for w in span.wires) else "not_fitted"),
            "wires": wires,
        })
    profiles = {}
    for span_id, prof in audit.ground_profiles.items():
        prof = np.asarray(prof, dtype=float)
        if len(prof):
            z = prof[:, 1] / cloud.vertical_unit_m + cloud.origin[2]
            # stations beyond the survey (a span running off the data) have no ground: null
            profiles[span_id] = [[round(s, 3), round(zz, 4) if math.isfinite(zz) else None]
                                 for s, zz in zip(prof[:, 0].tolist(), z.tolist(), strict=True)]
    requirements = {}
    if hasattr(rules, "summary_requirements"):
        requirements = rules.summary_requirements(config.line.voltage_kv)
    return {
        "schema": MODEL_SCHEMA, "clearaudit_version": __version__, "caution": CAUTION,
        "line": {"name": config.line.name, "voltage_kv": config.line.voltage_kv,
                 "owner": config.line.owner,
                 "max_operating_temperature_c": config.line.max_operating_temperature_c,
                 "rule_set": config.line.rule_set, "clearance": requirements},
        "crs_wkt": None if cloud.crs is None else cloud.crs.to_wkt(),
        "crs_name": None if cloud.crs is None else cloud.crs.name,
        "horizontal_unit_m": cloud.horizontal_unit_m, "vertical_unit_m": cloud.vertical_unit_m,
        "origin": [float(v) for v in cloud.origin],
        "survey_temperature": audit.survey_temperature,
        "conditions": audit.conditions,
        "structures": structures,
        "sections": [{"id": s.id, "span_ids": list(s.span_ids),
                      "ruling_span_m": _f(s.ruling_span_m), "note": s.note}
                     for s in model.sections],
        "spans": spans,
        "other_wires": [{"id": o.id, "span_id": o.span_id, "reason": o.reason,
                         "angle_to_span_deg": _f(o.angle_to_span_deg),
                         "n_points": int(len(o.point_indices))} for o in model.other_wires],
        "tension_checks": model.tension_checks,
        "ground_profile": profiles,
        "warnings": list(model.warnings) + list(audit.summary.get("notes", [])),
        "summary": audit.summary,
    }


_ONE_LINE = json.JSONEncoder(allow_nan=False)  # no indent: the C encoder, ", " and ": "
_SCALARS = (str, int, float, type(None))


def json_text(value: Any, indent: int = 1) -> str:
    """JSON text of ``value``, indented like ``json.dumps(value, indent=indent)`` except that
    a list of numbers and strings is written on one line, and a list of lists of numbers one
    inner list per line (a polyline: one point per line).

    Parameters
    ----------
    value
        dicts, lists, tuples, strings, numbers, booleans and None (as ``json.dumps``
        accepts); NaN and infinity are refused.
    indent
        Spaces per nesting level. [characters]

    Returns
    -------
    str
        Text whose parsed value equals that of ``json.dumps(value, indent=indent)``: every
        key, string and number is encoded by the standard library's encoder, only whitespace
        differs.

    Raises
    ------
    ValueError
        NaN or infinite numbers.
    TypeError
        Values JSON cannot hold.

    Notes
    -----
    The standard encoder runs in pure Python when asked to indent; here only the nesting of
    dicts and lists is walked in Python, and every flat list (or list of number rows) goes
    through the C encoder in one call: 0.2–0.25 s → 0.07–0.12 s for the 1.8 MB model of a
    9.2 M-point corridor, with 43 thousand lines instead of 199 thousand.

    References
    ----------
    T. Bray (ed.), The JavaScript Object Notation (JSON) Data Interchange Format, RFC 8259
    (2017).
    """
    if not isinstance(indent, int) or isinstance(indent, bool) or indent < 0:
        raise ValueError("indent must be a whole number of spaces, 0 or more")
    parts: list[str] = []
    _json_parts(value, 0, " " * indent, parts)
    return "".join(parts)


def _json_key(key: Any) -> str:
    if isinstance(key, str):
        return _ONE_LINE.encode(key)
    text = _ONE_LINE.encode({key: 0})  # the standard rules for int, float, bool, None keys
    return text[1:-4]


def _json_parts(value: Any, level: int, step: str, parts: list[str]) -> None:
    if isinstance(value, dict):
        if not value:
            parts.append("{}")
            return
        pad = "\n" + step * (level + 1)
        parts.append("{")
        for i, (key, item) in enumerate(value.items()):
            parts.append(("," if i else "") + pad + _json_key(key) + ": ")
            _json_parts(item, level + 1, step, parts)
        parts.append("\n" + step * level + "}")
    elif isinstance(value, (list, tuple)):
        if not value:
            parts.append("[]")
        elif all(isinstance(v, _SCALARS) for v in value):
            parts.append(_ONE_LINE.encode(value))
        else:
            pad = "\n" + step * (level + 1)
            if all(isinstance(v, (list, tuple)) for v in value):
                text = _ONE_LINE.encode(value)
                if '"' not in text and text.count("[") == len(value) + 1:
                    # Rows of numbers: no strings, no deeper lists, so "], [" only occurs
                    # between rows.
                    rows = text[1:-1].replace("], [", "]," + pad + "[")
                    parts.append("[" + pad + rows + "\n" + step * level + "]")
                    return
            parts.append("[")
            for i, item in enumerate(value):
                parts.append(("," if i else "") + pad)
                _json_parts(item, level + 1, step, parts)
            parts.append("\n" + step * level + "]")
    else:
        parts.append(_ONE_LINE.encode(value))


def _wire_layers(cloud: Cloud, model_doc: dict) -> Layer:
    layer = Layer("wires", "LINESTRING",
                  {"span_id": "TEXT", "wire_id": "TEXT", "role": "TEXT", "condition": "TEXT",
                   "status": "TEXT", "sag_survey_m": "REAL", "sag_mot_m": "REAL",
                   "horizontal_tension_n": "REAL"},
                  description="fitted wires, one feature per wire per span per condition")
    for span in model_doc["spans"]:
        for w in span["wires"]:
            for cond, coords in w["curves"].items():
                if len(coords) >= 2:
                    layer.features.append((np.asarray(coords), {
                        "span_id": span["span_id"], "wire_id": w["wire_id"], "role": w["role"],
                        "condition": cond, "status": w["status"],
                        "sag_survey_m": w.get("sag_survey_m"), "sag_mot_m": w.get("sag_mot_m"),
                        "horizontal_tension_n": w.get("horizontal_tension_n")}))
    return layer


_REAL_COLUMNS = {"clearance_m", "required_m", "deficit_m", "longitude", "latitude",
                 "clearance_ci95_m", "grow_in_years", "station_m", "tree_height_m",
                 "fall_in_distance_m"}
_INTEGER_COLUMNS = {"id", "priority"}


def _write_point_rows(out: Path, name: str, cloud: Cloud, rows: list[dict], columns: list[str],
                      title: str, description: str) -> tuple[list[dict], Layer]:
    """``<name>.csv`` and ``<name>.geojson`` from audit rows, and their GeoPackage layer."""
    rows_crs, lonlat = violation_rows_crs(cloud, rows)
    write_csv(out / f"{name}.csv", rows_crs, columns)
    z_m = (np.array([r["z"] for r in rows_crs]) * cloud.vertical_unit_m) if rows_crs else None
    write_geojson_points(out / f"{name}.geojson", rows_crs, columns, lonlat, z_m, name=title)
    layer = Layer(name, "POINT",
                  {c: ("REAL" if c in _REAL_COLUMNS else
                       "INTEGER" if c in _INTEGER_COLUMNS else "TEXT")
                   for c in columns if c not in ("x", "y", "z")}, description=description)
    for r in rows_crs:
        layer.features.append((np.array([r["x"], r["y"], r["z"]]),
                               {**r, "fall_in": None if r.get("fall_in") is None
                                else str(bool(r.get("fall_in"))).lower()}))
    return rows_crs, layer


def write_outputs(out: Path, cloud: Cloud, cls: Any, model: Any, audit: Any, config: Any,
                  conductors: dict, rules: Any, record: Any, *, tolerance_rows=None,
                  progress=None, classified_writer=None, records=None) -> dict:
    """Write every output file into ``out``; returns the summary for the terminal.

    ``classified_writer(path)``, when given, writes ``classified.laz`` instead of
    :func:`~clearaudit.io.las.write_classified` (the tiled run streams it from its tiles; then
    ``cloud`` may hold no points and ``cls`` only needs ``counts``). ``records``: the raw point
    records kept while reading (:class:`~clearaudit.io.las.RecordScratch`), passed on to
    :func:`~clearaudit.io.las.write_classified`.
    """
    out = Path(out)
    span_rows = span_rows_crs(cloud, audit.span_rows)
    write_csv(out / "spans.csv", span_rows, SPAN_COLUMNS + SPAN_EXTRA_COLUMNS)
    columns = VIOLATION_COLUMNS + VIOLATION_EXTRA_COLUMNS
    violations, viol_layer = _write_point_rows(
        out, "violations", cloud, audit.violations, columns,
        f"{config.line.name} — clearance violations",
        "clearance violations (one per obstacle per condition)")
    hazards, hazard_layer = _write_point_rows(
        out, "hazard_trees", cloud, getattr(audit, "hazard_trees", []), columns,
        f"{config.line.name} — hazard trees",
        "trees clear of every requirement but tall enough to fall into the line")
    model_doc = build_model_json(cloud, model, audit, config, rules)
    write_text(out / "model.json", json_text(model_doc))  # 1 MiB a call (io.files)
    structures = Layer("structures", "POINT",
                       {"structure_id": "TEXT", "kind": "TEXT", "source": "TEXT",
                        "line_angle_deg": "REAL"}, description="towers and poles")
    for s in model_doc["structures"]:
        z = s["z_ground"] if s["z_ground"] is not None else float("nan")
        structures.features.append((np.array([s["x"], s["y"], z if math.isfinite(z) else 0.0]),
                                    {"structure_id": s["id"], "kind": s["kind"],
                                     "source": s["source"],
                                     "line_angle_deg": s["line_angle_deg"]}))
    write_geopackage(out / "line.gpkg", [structures, _wire_layers(cloud, model_doc), viol_layer,
                                         hazard_layer], cloud.crs)
    if tolerance_rows is not None:
        from .audit.tolerance import TOLERANCE_COLUMNS

        write_csv(out / "tolerance.csv", tolerance_rows, TOLERANCE_COLUMNS)
    if classified_writer is not None:
        classified_writer(out / "classified.laz")
    else:
        write_classified(cloud, out / "classified.laz", cls.classification,
                         {"height_above_ground": (cls.height_above_ground_m.astype(np.float32),
                                                  "height above ground [m]")},
                         records=records,
                         report=getattr(record, "extra", {}).get("classified_copy"))
    return {"line": config.line.name, "spans": len(model.spans),
            "wires": len(span_rows),
            "fitted": sum(r.get("status") == "fitted" for r in span_rows),
            "partial": sum(r.get("status") == "partial" for r in span_rows),
            "not_fitted": sum(r.get("status") == "not_fitted" for r in span_rows),
            "violations": violations, "hazard_trees": hazards,
            "survey_temperature": audit.survey_temperature,
            "class_counts": cls.counts,
            "repeated_points": getattr(record, "extra", {}).get("repeated_points"),
            "withheld_points": getattr(record, "extra", {}).get("withheld_points")}


def print_summary(console: Any, summary: dict, out: Path, units: str = "metric") -> None:
    """A short terminal summary: counts, the worst violations, where the files are."""
    from rich.table import Table

    from .cloud import CLASS_NAMES
    from .units import FOOT_M

    f = 1.0 if units == "metric" else 1.0 / FOOT_M
    u = "m" if units == "metric" else "ft"
    table = Table(title="points per class", title_justify="left")
    table.add_column("class")
    table.add_column("points", justify="right")
    for code, n in sorted(summary["class_counts"].items()):
        table.add_row(f"{code} {CLASS_NAMES.get(int(code), '')}", f"{n:,}")
    console.print(table)
    if summary.get("withheld_points"):
        console.print(f"{summary['withheld_points']:,} points flagged withheld in the input files "
                      "were not analysed (classified.laz keeps them as they were).")
    repeated = summary.get("repeated_points") or {}
    if repeated.get("points"):
        console.print(f"{repeated['points']:,} points repeated in overlapping input files were "
                      "counted once (classified.laz gives each copy its twin's class).")
    st = summary["survey_temperature"]
    console.print(f"[bold]{summary['line']}[/]: {summary['spans']} spans, {summary['wires']} wires "
                  f"({summary['fitted']} fitted, {summary['partial']} partial, "
                  f"{summary['not_fitted']} not fitted); conductor at survey "
                  f"{st.get('value_c', float('nan')):.1f} ± {st.get('ci95_c', float('nan')):.1f} °C "
                  f"({st.get('method', '')})")
    viol = summary["violations"]
    if viol:
        t = Table(title=f"{len(viol)} clearance violations, most urgent first (all in "
                        "violations.csv)", title_justify="left")
        for col, justify in (("#", "right"), ("kind", "left"), ("case", "left"),
                             ("span", "left"), ("wire", "left"), (f"found {u}", "right"),
                             (f"need {u}", "right"), (f"short {u}", "right"), ("sure", "left")):
            t.add_column(col, justify=justify, no_wrap=True)
        for r in sorted(viol, key=lambda r: r.get("priority") or 1e9)[:10]:
            t.add_row(str(r.get("priority")), r["kind"], r["condition"], str(r["span_id"]),
                      str(r["wire_id"]), f"{r['clearance_m'] * f:.2f}", f"{r['required_m'] * f:.2f}",
                      f"{r['deficit_m'] * f:.2f}",
                      "yes" if r.get("certainty", "certain") == "certain" else "no")
        console.print(t)
    else:
        console.print("No clearance violations found.")
    hazards = summary.get("hazard_trees") or []
    if hazards:
        console.print(f"{len(hazards)} hazard trees (clear today, tall enough to fall into the "
                      "line) in hazard_trees.csv.")
    console.print(f"Results in {out}/ (report.html, spans.csv, violations.csv, line.gpkg …)")
    console.print(f"[italic]{CAUTION}[/]")

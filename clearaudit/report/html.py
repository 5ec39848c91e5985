"""The HTML audit report: one self-contained file built from a saved output folder.

:func:`build_report` reads only the files of the output contract (model.json, spans.csv,
violations.csv, run.json, classified.laz), so a report can be rebuilt at any time, in either
unit system, without recomputing. Images are embedded as base64 PNG and the style sheet is
inline: the file opens offline and can be mailed as it is. Every text that comes from the
inputs (line names, file names, notes, options) is HTML-escaped.
"""
from __future__ import annotations

import base64
import datetime as _dt
import math
import re
from collections import Counter
from collections.abc import Callable, Iterable
from html import escape
from pathlib import Path

import numpy as np

from clearaudit import CAUTION, __version__, theme
from clearaudit.io.files import write_text
from clearaudit.report import plots
from clearaudit.report.format import (
    MISSING,
    DisplayUnits,
    crs_unit_name,
    fmt_number,
    fmt_percent,
)
from clearaudit.report.outputs import OutputFolder, read_outputs, to_number

RULES_NOTE = ("This includes every required distance to ground, vegetation, buildings and "
              "other wires used in this audit (shown as \u201crequired\u201d with each "
              "violation): check them against the code in force for this line before any "
              "result is acted on.")
STATUSES = ("fitted", "partial", "not_fitted")
KINDS = ("vegetation", "ground", "building", "wire")
CONDITIONS = ("survey", "mot", "wind", "ice")
CONDITION_LABELS = {"survey": "at survey", "mot": "at MOT", "wind": "in wind", "ice": "under ice"}
#: Above this many points, the report reads a random subset of classified.laz for its profiles.
MAX_REPORT_POINTS = 4_000_000


def esc(value) -> str:
    """HTML-escape any value for text and attribute content (``None`` becomes an empty string)."""
    return escape("" if value is None else str(value), quote=True)


def _table(headers: Iterable[str], rows: Iterable[Iterable[str]], *, numeric: set[int] = frozenset(),
           row_classes: Iterable[str] | None = None, css: str = "") -> str:
    """An HTML table; cells are escaped here."""
    head = "".join(f"<th>{esc(h)}</th>" for h in headers)
    body = []
    classes = list(row_classes) if row_classes is not None else None
    for i, row in enumerate(rows):
        cells = "".join(
            f'<td class="num">{esc(c)}</td>' if j in numeric else f"<td>{esc(c)}</td>"
            for j, c in enumerate(row))
        cls = f' class="{esc(classes[i])}"' if classes else ""
        body.append(f"<tr{cls}>{cells}</tr>")
    cls = f' class="{esc(css)}"' if css else ""
    return (f'<div class="table-wrap"><table{cls}><thead><tr>{head}</tr></thead>'
            f"<tbody>{''.join(body)}</tbody></table></div>")


def _kv_table(pairs: Iterable[tuple[str, object]]) -> str:
    rows = "".join(f"<tr><th>{esc(k)}</th><td>{esc(v)}</td></tr>" for k, v in pairs)
    return f'<table class="kv"><tbody>{rows}</tbody></table>'


def _img(png: bytes, alt: str, **data: str) -> str:
    attrs = "".join(f' data-{esc(k)}="{esc(v)}"' for k, v in data.items())
    b64 = base64.b64encode(png).decode("ascii")
    return f'<img{attrs} alt="{esc(alt)}" src="data:image/png;base64,{b64}">'


def _badge(status) -> str:
    s = str(status or "").strip().lower()
    cls = s if s in STATUSES else ""
    return f'<span class="badge {esc(cls)}">{esc(s.replace("_", " ") or MISSING)}</span>'


def _crs_name(wkt: str | None) -> str:
    if not wkt:
        return "unknown"
    try:
        import pyproj

        return pyproj.CRS.from_wkt(wkt).name
    except Exception:  # noqa: BLE001 - any unparsable WKT: show its start instead
        return str(wkt)[:80] + ("…" if len(str(wkt)) > 80 else "")


def _as_text(value) -> str:
    if isinstance(value, float) and math.isnan(value):
        return MISSING
    if isinstance(value, (dict, list)):
        import json

        return json.dumps(value, ensure_ascii=False)
    return str(value)


# ---- sections -------------------------------------------------------------------------------
def _run_section(folder: OutputFolder, units: DisplayUnits) -> str:
    run, line = folder.run, folder.model.get("line") or {}
    conditions = folder.model.get("conditions") or {}
    mot_c = to_number(line.get("max_operating_temperature_c"))
    if not math.isfinite(mot_c):
        mot_c = to_number((conditions.get("mot") or {}).get("temperature_c"))
    survey_t = [to_number(r.get("conductor_temperature_c")) for r in folder.spans]
    survey_t = [t for t in survey_t if math.isfinite(t)]
    pairs = [
        ("Line", folder.line_name or MISSING),
        ("Voltage", fmt_number(line.get("voltage_kv"), 0, "kV")),
        ("Maximum operating temperature (MOT)", units.fmt_temperature(mot_c)),
        ("Conductor temperature at survey",
         MISSING if not survey_t else (units.fmt_temperature(min(survey_t)) if
                                       min(survey_t) == max(survey_t) else
                                       f"{units.fmt_temperature(min(survey_t))} to "
                                       f"{units.fmt_temperature(max(survey_t))}")),
        ("Coordinate reference system", _crs_name(folder.model.get("crs_wkt"))),
        ("CRS linear units", f"horizontal {crs_unit_name(folder.horizontal_unit_m)}, "
                             f"vertical {crs_unit_name(folder.vertical_unit_m)}"),
        ("clearaudit version (audit run)", run.get("clearaudit_version", MISSING)),
        ("Command", run.get("command", MISSING)),
        ("Run started", run.get("started", MISSING)),
        ("Output folder", run.get("output_folder") or folder.path.name),
    ]
    parts = ['<section id="run"><h2>Survey and run</h2>', _kv_table(pairs)]
    inputs = run.get("inputs") or []
    if inputs:
        parts.append("<h3>Input files</h3>")
        parts.append(_table(
            ["File", "SHA-256", "Points", "Withheld (not analysed)", "Point format", "CRS"],
            [[i.get("path", ""), i.get("sha256", ""), fmt_number(i.get("point_count")),
              fmt_number(i.get("withheld_points")),
              _as_text(i.get("point_format", MISSING)), _as_text(i.get("crs") or MISSING)]
             for i in inputs], numeric={2, 3}))
    repeated = run.get("repeated_points") or {}
    if repeated.get("points"):
        files = "; ".join(f"{name}: {fmt_number(n)}"
                          for name, n in (repeated.get("by_file") or {}).items())
        parts.append(
            f"<p>{esc(fmt_number(repeated['points']))} points of later input files repeat points "
            f"of earlier files (overlapping tiles; coordinates compared to "
            f"{esc(fmt_number(1000.0 * float(repeated.get('compare_step_m') or 0.0), 1))} mm) "
            f"and were counted once; in classified.laz each copy has its twin's class "
            f"({esc(files)}).</p>")
    options = run.get("options") or {}
    if options:
        # Plain options here; the line file and the rule set (long nested tables) are listed by
        # name — run.json keeps every value with its source.
        simple = [(k, _as_text(v)) for k, v in options.items()
                  if not isinstance(v, (dict, list)) or k == "clouds"]
        line_cfg = options.get("line_config") or {}
        rule_set = options.get("rule_set") or {}
        if line_cfg:
            simple.append(("line file", _as_text(line_cfg.get("source") or "none (defaults)")))
        if rule_set:
            simple.append(("rule set", _as_text(rule_set.get("name") or rule_set.get("path")
                                                or MISSING)
                           + " — every value and its source are recorded in run.json"))
        parts.append("<h3>Options</h3>")
        parts.append(_kv_table(simple))
    stages = run.get("stages") or []
    if stages:
        parts.append("<h3>Stages</h3>")
        parts.append(_table(["Stage", "Time", "Peak memory"],
                            [[s.get("name", ""), fmt_number(s.get("seconds"), 1, "s"),
                              fmt_number(s.get("peak_memory_mb", s.get("peak_rss_mb")), 0, "MB")] for s in stages],
                            numeric={1, 2}))
    counts = run.get("class_counts") or {}
    if counts:
        from clearaudit.cloud import CLASS_NAMES

        def _name(k):
            try:
                return CLASS_NAMES.get(int(k), str(k))
            except (TypeError, ValueError):
                return str(k)

        parts.append("<h3>Points per class</h3>")
        parts.append(_table(["Class", "Name", "Points"],
                            [[k, _name(k), fmt_number(v)] for k, v in counts.items()],
                            numeric={2}))
    missing_stages = run.get("missing_stages") or []
    notes = []
    if missing_stages:
        notes.append("Stages not run: " + ", ".join(map(str, missing_stages)) + ".")
    if folder.missing:
        notes.append("Files missing from the output folder: " + ", ".join(folder.missing) + ".")
    if not run:
        notes.append("run.json is missing: inputs, options and versions are unknown.")
    for n in notes:
        parts.append(f'<p class="muted">{esc(n)}</p>')
    versions = run.get("versions") or {}
    if versions:
        parts.append("<h3>Software versions</h3>")
        parts.append('<p class="mono">' + esc(", ".join(f"{k} {v}" for k, v in versions.items()))
                     + "</p>")
    parts.append("</section>")
    return "".join(parts)


def _summary_section(folder: OutputFolder, units: DisplayUnits) -> str:
    span_ids = folder.span_ids()
    wire_status = Counter()
    n_wires = 0
    for sid in span_ids:
        for w in folder.wires_of(sid):
            n_wires += 1
            wire_status[str(w.get("status", "")).strip().lower()] += 1
    span_status = Counter(str(folder.span_record(s).get("status", "")).strip().lower()
                          for s in span_ids)
    pairs = [
        ("Spans", f"{len(span_ids)} (fitted {span_status['fitted']}, partial "
                  f"{span_status['partial']}, not fitted {span_status['not_fitted']})"),
        ("Wires (one per wire per span)",
         f"{n_wires} (fitted {wire_status['fitted']}, partial {wire_status['partial']}, "
         f"not fitted {wire_status['not_fitted']})"),
        ("Structures", str(len(folder.structures))),
        ("Violations", str(len(folder.violations))),
    ]
    parts = ['<section id="summary"><h2>Summary</h2>', _kv_table(pairs)]
    if folder.violations:
        kinds = [k for k in KINDS if any(v.get("kind") == k for v in folder.violations)]
        kinds += sorted({str(v.get("kind")) for v in folder.violations} - set(kinds))
        conds = [c for c in CONDITIONS if any(v.get("condition") == c for v in folder.violations)]
        conds += sorted({str(v.get("condition")) for v in folder.violations} - set(conds))
        rows = []
        for k in kinds:
            row = [k]
            for c in conds:
                sel = [v for v in folder.violations if v.get("kind") == k and v.get("condition") == c]
                if sel:
                    worst = max(np.nan_to_num(to_number(v.get("deficit_m"))) for v in sel)
                    row.append(f"{len(sel)} (worst deficit {units.fmt_length(worst)})")
                else:
                    row.append("0")
            rows.append(row)
        parts.append("<h3>Violations by kind and condition</h3>")
        parts.append(_table(["Kind"] + [CONDITION_LABELS.get(c, c) for c in conds], rows))
    else:
        parts.append("<p>No clearance violations were recorded.</p>")
    parts.append("</section>")
    return "".join(parts)


def _span_table(folder: OutputFolder, wires: list[dict], units: DisplayUnits) -> str:
    headers = [
        "Wire", "Role", "Status", "Horizontal tension at survey (± 95 %)",
        "% of rated strength", "Sag at survey (± 95 %)", "Sag at MOT (± 95 %)",
        "Horizontal tension at MOT", "Min. ground clearance at survey / at MOT",
        "Fit: coverage, points, RMS residual", "Note",
    ]
    rows, classes = [], []
    for w in wires:
        status = str(w.get("status", "")).strip().lower()
        rows.append([
            w.get("wire_id", ""), w.get("role", ""), status.replace("_", " "),
            units.fmt_force(w.get("horizontal_tension_n"), w.get("horizontal_tension_ci95_n")),
            fmt_percent(w.get("rated_strength_pct")),
            units.fmt_length(w.get("sag_survey_m"), 2, w.get("sag_survey_ci95_m")),
            units.fmt_length(w.get("sag_mot_m"), 2, w.get("sag_mot_ci95_m")),
            units.fmt_force(w.get("horizontal_tension_mot_n")),
            f"{units.fmt_length(w.get('min_ground_clearance_survey_m'))} / "
            f"{units.fmt_length(w.get('min_ground_clearance_mot_m'))}",
            f"{fmt_percent(w.get('coverage'), 0, fraction=True)}, "
            f"{fmt_number(w.get('n_points'))} points, {units.fmt_length(w.get('rms_m'), 3)}",
            _as_text(w.get("note") or ""),
        ])
        classes.append(f"status-{status}")
    return _table(headers, rows, numeric=set(range(3, 9)), row_classes=classes)


#: How far from a span's axis segment the points of its profile can lie: the vegetation
#: drawn (20 m across, 5 m beyond the ends) and the ground line (3 m across). [m]
_PROFILE_REACH_M = plots.PROFILE_HALF_WIDTH_M + plots.PROFILE_BEYOND_ENDS_M


def profile_jobs(folder: OutputFolder, units: DisplayUnits) -> list[tuple]:
    """What each span's profile draws: ``(folder, units, span_id, vegetation_xyz,
    ground_xyz)`` per span (:func:`clearaudit.report.plots.render_profiles`).

    The vegetation and ground points (a sample of at most :data:`MAX_REPORT_POINTS` of
    classified.laz) are cut to the box each span's profile can reach, in the points' order,
    so a profile draws the same points whether it gets them all or only these.
    """
    span_ids = folder.span_ids()
    need_ground = any(sid not in (folder.model.get("ground_profile") or {}) for sid in span_ids)
    veg = ground = None
    n = folder.point_count()
    if n:
        classes = plots.VEGETATION + ((plots.GROUND,) if need_ground else ())
        xyz, cls = folder.read_points(classes=classes, keep_fraction=min(1.0, MAX_REPORT_POINTS / n))
        is_veg = np.isin(cls, plots.VEGETATION)
        veg, ground = plots.PointsByCell(xyz[is_veg]), plots.PointsByCell(xyz[~is_veg])
    jobs = []
    for sid in span_ids:
        axis = folder.span_axis(folder.span_record(sid))
        v = g = None
        if veg is not None and axis is not None:
            v = veg.xyz[veg.near_span(axis, _PROFILE_REACH_M)]
            g = ground.xyz[ground.near_span(axis, _PROFILE_REACH_M)]
        jobs.append((folder, units.system, sid, v, g))
    return jobs


def _spans_section(folder: OutputFolder, units: DisplayUnits,
                   map_profiles: Callable[[list], list] | None = None) -> str:
    span_ids = folder.span_ids()
    jobs = profile_jobs(folder, units)
    # the profiles are the report's longest part: an engine's workers may draw them
    pngs = (map_profiles or plots.render_profiles)(jobs)
    if len(pngs) != len(span_ids):
        raise RuntimeError("the profile renderer returned a different number of images")
    parts = ['<section id="spans"><h2>Spans</h2>',
             f'<p class="muted">Profiles: elevation against distance along the span, in '
             f'{esc(units.length_unit)}. Wires at survey are solid, at MOT dashed; the dotted line '
             f'is the required ground clearance below the lowest phase at MOT. Violation markers '
             f'are coloured by clearance deficit (darker = larger deficit).</p>']
    for k, sid in enumerate(span_ids):
        span = folder.span_record(sid)
        wires = folder.wires_of(sid)
        length = to_number(span.get("span_length_m"))
        if not math.isfinite(length) and folder.span_axis(span) is not None:
            length = folder.span_axis(span)[2]
        png = pngs[k]
        anchor = "span-" + "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in sid)
        parts.append(f'<div class="span" id="{esc(anchor)}">')
        parts.append(f"<h3>Span {esc(sid)} {_badge(span.get('status'))}</h3>")
        meta = [f"{esc(span.get('from_structure'))} → {esc(span.get('to_structure'))}",
                f"length {esc(units.fmt_length(length, 1))}"]
        if span.get("section_id"):
            meta.append(f"tension section {esc(span.get('section_id'))}")
        temps = sorted({round(t, 1) for t in (to_number(w.get("conductor_temperature_c"))
                                               for w in wires) if math.isfinite(t)})
        if temps:
            shown = temps[:1] if len(temps) == 1 else [temps[0], temps[-1]]
            meta.append("conductor at survey "
                        + " to ".join(units.fmt_temperature(t) for t in shown))
        n_viol = sum(1 for v in folder.violations if str(v.get("span_id")) == sid)
        meta.append(f"{n_viol} violation{'s' if n_viol != 1 else ''}")
        parts.append(f'<p class="muted">{" · ".join(meta)}</p>')
        if span.get("note"):
            parts.append(f"<p>{esc(span.get('note'))}</p>")
        parts.append(f"<figure>{_img(png, f'Profile of span {sid}', span=sid)}"
                     f"<figcaption>Profile of span {esc(sid)}.</figcaption></figure>")
        if wires:
            parts.append(_span_table(folder, wires, units))
        parts.append("</div>")
    parts.append("</section>")
    return "".join(parts)


_METRES_IN_TEXT = re.compile(r"(-?\d+(?:\.\d+)?) m\b")


def _reason_in_units(text: str, units: DisplayUnits) -> str:
    """The audit writes reasons in SI; show their lengths in the report's unit system."""
    if not text or units.system == "metric":
        return text
    return _METRES_IN_TEXT.sub(lambda m: units.fmt_length(float(m.group(1))), text)


def _violation_rows(folder: OutputFolder, rows: list[dict], units: DisplayUnits):
    cu = crs_unit_name(folder.horizontal_unit_m)
    cz = crs_unit_name(folder.vertical_unit_m)
    out = []
    for r in rows:
        lon, lat = to_number(r.get("longitude")), to_number(r.get("latitude"))
        grow = to_number(r.get("grow_in_years"))
        out.append([
            fmt_number(r.get("priority")), r.get("id", ""), r.get("kind", ""), r.get("span_id", ""),
            r.get("wire_id", ""), CONDITION_LABELS.get(r.get("condition"), r.get("condition", "")),
            _reason_in_units(r.get("reason", ""), units) or MISSING,
            units.fmt_length(r.get("clearance_m"), 2, r.get("clearance_ci95_m")),
            units.fmt_length(r.get("required_m")), units.fmt_length(r.get("deficit_m")),
            r.get("certainty", "") or MISSING,
            fmt_number(grow, 1, "years") if math.isfinite(grow) else MISSING,
            r.get("fall_in", "") or MISSING,
            f"{fmt_number(r.get('x'), 2)}, {fmt_number(r.get('y'), 2)} {cu}; "
            f"z {fmt_number(r.get('z'), 2)} {cz}",
            f"{lat:.6f}°, {lon:.6f}°" if math.isfinite(lon) and math.isfinite(lat) else MISSING,
        ])
    return out


VIOLATION_HEADERS = [
    "Priority", "Id", "Kind", "Span", "Wire", "Condition", "Reason", "Clearance (± 95 %)",
    "Required", "Deficit", "Certainty", "Grow-in", "Fall-in", "Position (CRS)",
    "Latitude, longitude (WGS 84)",
]


def _vegetation_section(folder: OutputFolder, units: DisplayUnits) -> str:
    rows = [v for v in folder.violations if v.get("kind") == "vegetation"]
    parts = ['<section id="vegetation"><h2>Vegetation work list</h2>']
    if not rows:
        parts.append("<p>No vegetation violations were recorded.</p>"
                     + _hazard_trees_part(folder, units) + "</section>")
        return "".join(parts)
    parts.append('<p class="muted">Ranked by priority (1 = most urgent). Positions are the '
                 'vegetation point closest to the wire, in the survey\'s coordinate reference '
                 'system and in WGS 84.</p>')
    parts.append(_table(VIOLATION_HEADERS, _violation_rows(folder, rows, units),
                        numeric={0, 7, 8, 9, 11}, css="findings"))
    parts.append(_hazard_trees_part(folder, units))
    parts.append("</section>")
    return "".join(parts)


def _hazard_trees_part(folder: OutputFolder, units: DisplayUnits) -> str:
    rows = folder.hazard_trees
    if not rows:
        return ""
    return ('<h3 id="hazard-trees">Hazard trees</h3><p class="muted">Trees that clear every '
            'requirement today but are tall enough to reach a wire if they fall (trunk base '
            'closer to the wire than the tree is tall), ranked among themselves '
            '(hazard_trees.csv).</p>'
            + _table(VIOLATION_HEADERS, _violation_rows(folder, rows, units),
                     numeric={0, 7, 8, 9, 11}, css="findings"))


def _other_violations_section(folder: OutputFolder, units: DisplayUnits) -> str:
    rows = [v for v in folder.violations if v.get("kind") != "vegetation"]
    if not rows:
        return ""
    return ('<section id="other-violations"><h2>Other clearance violations</h2>'
            + _table(VIOLATION_HEADERS, _violation_rows(folder, rows, units),
                     numeric={0, 7, 8, 9, 11}, css="findings")
            + "</section>")


def _not_fitted_section(folder: OutputFolder) -> str:
    rows = []
    for sid in folder.span_ids():
        span = folder.span_record(sid)
        span_status = str(span.get("status", "")).strip().lower()
        if span_status == "not_fitted":
            rows.append([sid, "(whole span)", "not fitted", _as_text(span.get("note") or MISSING)])
        for w in folder.wires_of(sid):
            st = str(w.get("status", "")).strip().lower()
            if st in ("not_fitted", "partial"):
                rows.append([sid, w.get("wire_id", ""), st.replace("_", " "),
                             _as_text(w.get("note") or MISSING)])
    parts = ['<section id="not-fitted"><h2>Spans and wires not fully fitted</h2>']
    if rows:
        parts.append('<p class="muted">"Partial": the wire runs off the survey and was fitted '
                     'from the part that is there. "Not fitted": no catenary could be fitted; '
                     'no sag, tension or clearance is reported for it.</p>')
        parts.append(_table(["Span", "Wire", "Status", "Reason"], rows))
    else:
        parts.append("<p>Every wire of every span was fitted.</p>")
    parts.append("</section>")
    return "".join(parts)


TOLERANCE_STATUS_LABELS = {"ok": "ok", "out_of_tolerance": "out of tolerance",
                           "uncertain": "uncertain", "not_checked": "not checked"}


def _tolerance_span_rows(rows: list[dict], units: DisplayUnits) -> list[list[str]]:
    out = []
    for r in rows:
        pct = to_number(r.get("sag_difference_percent"))
        out.append([
            r.get("section_id", "") or MISSING, r.get("span_id", "") or MISSING,
            r.get("wire_id", "") or MISSING,
            TOLERANCE_STATUS_LABELS.get(r.get("status"), r.get("status", "")),
            units.fmt_length(r.get("sag_survey_m"), 2, r.get("sag_survey_ci95_m")),
            units.fmt_length(r.get("sag_corrected_m"), 2, r.get("sag_corrected_ci95_m")),
            units.fmt_length(r.get("design_sag_m")),
            units.fmt_length(r.get("sag_difference_m"))
            + (f" ({pct:+.1f} %)" if math.isfinite(pct) else ""),
            units.fmt_length(r.get("tolerance_m")), r.get("deviation", "") or MISSING,
            _as_text(r.get("note") or r.get("design_source") or MISSING)])
    return out


def _tolerance_structure_rows(rows: list[dict], units: DisplayUnits) -> list[list[str]]:
    out = []
    for r in rows:
        swing = to_number(r.get("swing_deg"))
        swing_ci = to_number(r.get("swing_ci95_deg"))
        out.append([
            r.get("section_id", "") or MISSING, r.get("structure_id", "") or MISSING,
            r.get("wire_id", "") or MISSING,
            TOLERANCE_STATUS_LABELS.get(r.get("status"), r.get("status", "")),
            units.fmt_force(r.get("imbalance_n"), r.get("imbalance_ci95_n")),
            units.fmt_force(r.get("allowed_imbalance_n")),
            (f"{swing:+.1f}°" + (f" ± {swing_ci:.1f}°" if math.isfinite(swing_ci) else ""))
            if math.isfinite(swing) else MISSING,
            units.fmt_length(r.get("clamp_offset_m"), 3, r.get("clamp_offset_ci95_m")),
            r.get("offset_method", "") or MISSING, _as_text(r.get("note") or MISSING)])
    return out


def _construction_section(folder: OutputFolder, units: DisplayUnits) -> str:
    """Construction check from tolerance.csv; empty when the file is absent."""
    rows = folder.tolerance
    if not rows:
        return ""
    spans = [r for r in rows if r.get("kind") == "span"]
    structures = [r for r in rows if r.get("kind") == "structure"]
    counts = Counter(str(r.get("status", "")) for r in spans)
    s_counts = Counter(str(r.get("status", "")) for r in structures)
    ref = next((to_number(r.get("reference_temperature_c")) for r in spans
                if math.isfinite(to_number(r.get("reference_temperature_c")))), math.nan)
    parts = ['<section id="construction"><h2>Construction check</h2>',
             '<p class="muted">Each measured sag is corrected from the survey conductor '
             'temperature to the design reference temperature'
             + (f" ({esc(units.fmt_temperature(ref))})" if math.isfinite(ref) else "")
             + " by the ruling-span change of state of its tension section and compared with "
             "the design sag. “Uncertain”: the 95 % interval straddles the tolerance "
             "limit. See docs/construction-check.md.</p>",
             _kv_table([
                 ("spans out of tolerance", counts.get("out_of_tolerance", 0)),
                 ("spans uncertain", counts.get("uncertain", 0)),
                 ("spans within tolerance", counts.get("ok", 0)),
                 ("spans not checked", counts.get("not_checked", 0)),
                 ("suspension clamps out of plumb", s_counts.get("out_of_tolerance", 0)),
                 ("suspension clamps uncertain", s_counts.get("uncertain", 0))])]
    if spans:
        parts.append("<h3>Sags at the design reference temperature</h3>")
        parts.append(_table(
            ["Section", "Span", "Wire", "Status", "Sag at survey (± 95 %)",
             "Corrected sag (± 95 %)", "Design sag", "Difference", "Tolerance", "Deviation",
             "Note / design"], _tolerance_span_rows(spans, units), numeric={4, 5, 6, 7, 8}))
    if structures:
        parts.append("<h3>Suspension structures: tension imbalance and clamp offsets</h3>")
        parts.append('<p class="muted">Imbalance = back-span minus ahead-span horizontal '
                     'tension; swing from plumb along the line (positive towards the back '
                     'span); clamp offset = conductor to move through the clamp from the ahead '
                     'span into the back span (positive: move the clamp towards the ahead '
                     'span) so that every string hangs plumb.</p>')
        parts.append(_table(
            ["Section", "Structure", "Wire", "Status", "Imbalance (± 95 %)", "Allowed",
             "Swing", "Clamp offset (± 95 %)", "Method", "Note"],
            _tolerance_structure_rows(structures, units), numeric={4, 5, 6, 7}))
    parts.append("</section>")
    return "".join(parts)


def render_report(folder: OutputFolder, units: str = "metric",
                  map_profiles: Callable[[list], list] | None = None) -> str:
    """The report as an HTML string (see :func:`build_report`)."""
    du = DisplayUnits(units)
    name = folder.line_name or "unnamed line"
    voltage = to_number((folder.model.get("line") or {}).get("voltage_kv"))
    generated = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    subtitle = [f"{voltage:g} kV" if math.isfinite(voltage) else None,
                f"report generated {generated} by clearaudit {__version__}",
                f"units: {units} (lengths in {du.length_unit}, forces in {du.force_unit}, "
                f"temperatures in {du.temperature_unit})"]
    plan = plots.plan_view(folder, du)
    sections = [
        _run_section(folder, du), _summary_section(folder, du),
        '<section id="plan"><h2>Plan view</h2><figure>'
        + _img(plan, "Plan view of the line", figure="plan")
        + f"<figcaption>Structures, fitted wires at survey and violations coloured by "
          f"clearance deficit. Coordinates relative to the local origin "
          f"({esc(fmt_number(folder.origin[0], 1))}, {esc(fmt_number(folder.origin[1], 1))}) "
          f"in CRS units, shown in {esc(du.length_unit)}.</figcaption></figure></section>",
        _spans_section(folder, du, map_profiles), _vegetation_section(folder, du),
        _other_violations_section(folder, du), _construction_section(folder, du),
        _not_fitted_section(folder),
    ]
    toc = ("<nav><ol>"
           + "".join(f'<li><a href="#{a}">{esc(t)}</a></li>' for a, t in [
               ("run", "Survey and run"), ("summary", "Summary"), ("plan", "Plan view"),
               ("spans", "Spans"), ("vegetation", "Vegetation work list"),
               *([("construction", "Construction check")] if folder.tolerance else []),
               ("not-fitted", "Spans and wires not fully fitted")])
           + "</ol></nav>")
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>Clearance audit — {esc(name)}</title>"
        f"<style>{theme.REPORT_CSS}</style></head><body>"
        f"<header><h1>Clearance audit — {esc(name)}</h1>"
        f'<p class="subtitle">{" · ".join(esc(s) for s in subtitle if s)}</p></header>'
        f'<div class="caution" role="note" id="caution"><p>{esc(CAUTION)}</p>'
        f'<p class="note">{esc(RULES_NOTE)}</p></div>'
        + toc + "".join(sections)
        + f"<footer>clearaudit {esc(__version__)} · built from the saved outputs in "
          f"{esc(folder.path.name)} · {esc(CAUTION)}</footer></body></html>\n"
    )


def build_report(out_dir: str | Path, *, units: str = "metric",
                 out_path: str | Path | None = None,
                 map_profiles: Callable[[list], list] | None = None) -> Path:
    """Write the HTML audit report of a saved output folder.

    Parameters
    ----------
    out_dir
        Folder written by ``clearaudit audit --out DIR``.
    units
        ``"metric"`` (m, kN, °C) or ``"imperial"`` (ft, lbf, °F); display only.
    out_path
        Where to write the report; default ``out_dir/report.html``.
    map_profiles
        Draws the span profiles: called with :func:`profile_jobs`'s list, returns one PNG
        per job in order, as :func:`clearaudit.report.plots.render_profiles` does (the
        default, in this process). A run on Dask passes its workers' map.

    Returns
    -------
    Path of the written report.

    Raises
    ------
    ValueError
        For an unknown unit system.
    clearaudit.errors.InputError
        When the folder or its model.json is missing or unreadable.
    """
    DisplayUnits(units)  # validate before reading anything
    folder = read_outputs(out_dir)
    html_text = render_report(folder, units, map_profiles)
    target = Path(out_path) if out_path is not None else folder.path / "report.html"
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = target.with_name(target.name + ".tmp")
    write_text(tmp, html_text)  # 1 MiB a call (io.files)
    tmp.replace(target)
    return target

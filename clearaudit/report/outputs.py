"""Read a saved audit output folder (the output contract of ``clearaudit audit --out DIR``).

The report and the 3D viewer read only these files, so both can be rebuilt later without
recomputing anything. Coordinates in the files are in the cloud's CRS units; this module
converts them to local metres (relative to the model's origin) for plotting and display.
"""
from __future__ import annotations

import csv
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from clearaudit.errors import InputError

MODEL_FILE = "model.json"
SPANS_FILE = "spans.csv"
VIOLATIONS_FILE = "violations.csv"
RUN_FILE = "run.json"
CLOUD_FILE = "classified.laz"
#: Construction check (only when the line file has a [design] table).
TOLERANCE_FILE = "tolerance.csv"
HAZARD_FILE = "hazard_trees.csv"

#: Columns of spans.csv / violations.csv that are not numbers.
TEXT_COLUMNS = {
    "span_id", "wire_id", "role", "from_structure", "to_structure", "status", "note",
    "section_id", "id", "kind", "condition", "certainty", "reason", "fall_in",
}
#: Columns of tolerance.csv that are not numbers.
TOLERANCE_TEXT_COLUMNS = TEXT_COLUMNS | {
    "structure_id", "back_span_id", "ahead_span_id", "deviation", "design_source",
    "offset_method",
}


def to_number(value: Any) -> float:
    """A float from a CSV/JSON value; NaN when empty, missing or not a number."""
    if value is None or isinstance(value, bool):
        return math.nan
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan


def _read_json(path: Path) -> dict:
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except OSError as e:
        raise InputError(path, f"cannot be read ({e.strerror or e}).") from e
    except ValueError as e:
        raise InputError(path, f"is not valid JSON ({e}).") from e
    if not isinstance(doc, dict):
        raise InputError(path, "does not hold a JSON object.")
    return doc


def _read_csv(path: Path, text_columns: set[str] = TEXT_COLUMNS) -> list[dict[str, Any]]:
    try:
        with open(path, newline="", encoding="utf-8") as f:
            rows = list(csv.DictReader(f))
    except OSError as e:
        raise InputError(path, f"cannot be read ({e.strerror or e}).") from e
    out = []
    for r in rows:
        rec: dict[str, Any] = {}
        for k, v in r.items():
            if k is None:
                continue
            k = k.strip()
            v = "" if v is None else v.strip()
            rec[k] = v if k in text_columns else (to_number(v) if v != "" else math.nan)
        out.append(rec)
    return out


@dataclass
class OutputFolder:
    """The saved results of one audit run.

    Attributes
    ----------
    path
        The output folder.
    model
        Contents of model.json.
    run
        Contents of run.json (empty when the file is missing).
    spans
        Rows of spans.csv (numbers as float, NaN when empty).
    violations
        Rows of violations.csv, sorted by priority (1 first).
    horizontal_unit_m, vertical_unit_m
        Metres per CRS unit. [m/unit]
    origin
        Local origin in CRS units, shape (3,). [CRS unit]
    missing
        Names of contract files not found in the folder.
    tolerance
        Rows of tolerance.csv (construction check; empty when the file is absent).
    """

    path: Path
    model: dict
    run: dict
    spans: list[dict[str, Any]]
    violations: list[dict[str, Any]]
    horizontal_unit_m: float
    vertical_unit_m: float
    origin: np.ndarray
    missing: list[str] = field(default_factory=list)
    tolerance: list[dict[str, Any]] = field(default_factory=list)
    hazard_trees: list[dict[str, Any]] = field(default_factory=list)

    # ---- geometry ---------------------------------------------------------------------------
    @property
    def structures(self) -> dict[str, dict]:
        """Structures of the model by id."""
        return {str(s.get("id")): s for s in self.model.get("structures", []) or []}

    @property
    def model_spans(self) -> list[dict]:
        """The spans of model.json in line order."""
        return list(self.model.get("spans", []) or [])

    @property
    def line_name(self) -> str:
        """The line's name (empty when not given)."""
        return str((self.model.get("line") or {}).get("name") or "")

    @property
    def cloud_path(self) -> Path:
        """Path of classified.laz."""
        return self.path / CLOUD_FILE

    def to_local_m(self, xyz_crs) -> np.ndarray:
        """CRS coordinates to metres relative to the origin.

        Parameters
        ----------
        xyz_crs
            Coordinates, shape (n, 3) or (n, 2). [CRS unit]

        Returns
        -------
        Local coordinates, same shape. [m]
        """
        a = np.asarray(xyz_crs, dtype=float)
        if a.size == 0:
            return np.zeros((0, a.shape[-1] if a.ndim == 2 else 3))
        a = np.atleast_2d(a)
        k = a.shape[1]
        unit = np.array([self.horizontal_unit_m, self.horizontal_unit_m, self.vertical_unit_m][:k])
        return (a - self.origin[:k]) * unit

    def elevation_m(self, z_crs) -> np.ndarray:
        """Absolute elevation in metres from CRS heights. [m]"""
        return np.asarray(z_crs, dtype=float) * self.vertical_unit_m

    def span_axis(self, span: dict) -> tuple[np.ndarray, np.ndarray, float] | None:
        """Plan-view axis of a span in local metres.

        Returns
        -------
        (start, unit_direction, length) or ``None`` when the span's structures are unknown:
        start is structure A in local metres (x, y) [m], unit_direction (2,) [-], length [m].
        """
        st = self.structures
        a = st.get(str(span.get("from_structure")))
        b = st.get(str(span.get("to_structure")))
        ends = self._curve_ends(span)
        if (a is None or b is None) and ends is None:
            return None
        # A partial span has a virtual end where it runs off the survey: take that end from the
        # fitted curves (their first/last vertices, averaged over the span's wires).
        pa = (self.to_local_m([[to_number(a.get("x")), to_number(a.get("y"))]])[0]
              if a is not None else ends[0])
        pb = (self.to_local_m([[to_number(b.get("x")), to_number(b.get("y"))]])[0]
              if b is not None else ends[1])
        d = pb - pa
        length = float(np.hypot(*d))
        if not np.isfinite(length) or length <= 0:
            return None
        return pa, d / length, length

    def _curve_ends(self, span: dict) -> tuple[np.ndarray, np.ndarray] | None:
        """Mean first and last plan vertices of the span's survey curves (local m), if any."""
        firsts, lasts = [], []
        for w in span.get("wires", []) or []:
            curve = (w.get("curves") or {}).get("survey")
            if curve and len(curve) >= 2:
                firsts.append(curve[0][:2])
                lasts.append(curve[-1][:2])
        if not firsts:
            return None
        xy = self.to_local_m(np.array([np.mean(firsts, axis=0), np.mean(lasts, axis=0)]))
        return xy[0], xy[1]

    def station_offset(self, span: dict, xy_local_m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Station along and offset across a span for points in local metres.

        Returns
        -------
        station : distance along the span from structure A. [m]
        offset : signed horizontal distance from the span axis (left positive). [m]
        """
        axis = self.span_axis(span)
        xy = np.asarray(xy_local_m, dtype=float).reshape(-1, 2)
        if axis is None:
            nan = np.full(len(xy), np.nan)
            return nan, nan
        start, u, _ = axis
        rel = xy - start
        return rel @ u, rel @ np.array([-u[1], u[0]])

    def wires_of(self, span_id: str) -> list[dict]:
        """The wires of a span: model.json wire records updated with their spans.csv row."""
        span = next((s for s in self.model_spans if str(s.get("span_id")) == span_id), None)
        rows = {str(r.get("wire_id")): r for r in self.spans if str(r.get("span_id")) == span_id}
        wires: list[dict] = []
        seen = set()
        for w in (span or {}).get("wires", []) or []:
            rec = dict(w)
            wid = str(w.get("wire_id"))
            for k, v in rows.get(wid, {}).items():
                if k not in rec or rec[k] in (None, "") or (
                    isinstance(rec[k], float) and math.isnan(rec[k])
                ):
                    rec[k] = v
            wires.append(rec)
            seen.add(wid)
        for wid, r in rows.items():
            if wid not in seen:
                wires.append(dict(r))
        return wires

    def span_ids(self) -> list[str]:
        """Span ids in line order (model.json first, then any only found in spans.csv)."""
        ids = [str(s.get("span_id")) for s in self.model_spans]
        for r in self.spans:
            sid = str(r.get("span_id"))
            if sid not in ids:
                ids.append(sid)
        return ids

    def span_record(self, span_id: str) -> dict:
        """The model.json span record (or one built from spans.csv when missing)."""
        for s in self.model_spans:
            if str(s.get("span_id")) == span_id:
                return s
        row = next((r for r in self.spans if str(r.get("span_id")) == span_id), {})
        return {
            "span_id": span_id, "from_structure": row.get("from_structure"),
            "to_structure": row.get("to_structure"), "span_length_m": row.get("span_length_m"),
            "status": row.get("status"), "note": row.get("note", ""), "wires": [],
        }

    def required_clearance_m(self, kind: str) -> float:
        """Required clearance to ``kind`` (ground, vegetation, building, wire) if recorded. [m]

        Looked up, in order, in model.json ``line.clearance.{kind}_m``, model.json
        ``clearance.{kind}_m``, run.json ``options.clearance.{kind}_m`` or
        ``options.clearance_{kind}_m``, and finally the largest ``required_m`` of the
        violations of that kind. NaN when none is found.
        """
        key = f"{kind}_m"
        line = self.model.get("line") or {}
        options = self.run.get("options") or {}
        candidates = [
            (line.get("clearance") or {}).get(key),
            (self.model.get("clearance") or {}).get(key),
            (options.get("clearance") or {}).get(key) if isinstance(options.get("clearance"), dict)
            else None,
            options.get(f"clearance_{key}"),
        ]
        for c in candidates:
            v = to_number(c)
            if math.isfinite(v) and v > 0:
                return v
        req = [to_number(r.get("required_m")) for r in self.violations if r.get("kind") == kind]
        req = [v for v in req if math.isfinite(v)]
        return max(req) if req else math.nan

    # ---- point cloud --------------------------------------------------------------------------
    def point_count(self) -> int:
        """Number of points in classified.laz (0 when missing)."""
        if not self.cloud_path.exists():
            return 0
        import laspy

        with laspy.open(self.cloud_path) as reader:
            return int(reader.header.point_count)

    def read_points(
        self,
        *,
        classes: tuple[int, ...] | None = None,
        keep_fraction: float = 1.0,
        always_keep: tuple[int, ...] = (),
        bbox_local_m: tuple[float, float, float, float] | None = None,
        seed: int = 0,
        chunk_size: int = 2_000_000,
    ) -> tuple[np.ndarray, np.ndarray]:
        """Stream classified.laz and return a filtered, optionally thinned subset.

        Parameters
        ----------
        classes
            Keep only these ASPRS classes (all when ``None``).
        keep_fraction
            Random fraction of points kept (0–1]; classes in ``always_keep`` are all kept. [-]
        always_keep
            Classes never thinned (e.g. wires).
        bbox_local_m
            (xmin, ymin, xmax, ymax) in local metres; points outside are dropped. [m]
        seed
            Random seed of the thinning (reproducible output).
        chunk_size
            Points read at a time (bounds memory).

        Returns
        -------
        xyz_local : local coordinates (n, 3). [m]
        classification : ASPRS codes (n,), uint8.
        """
        if not 0.0 < keep_fraction <= 1.0:
            raise ValueError("keep_fraction must be in (0, 1].")
        if not self.cloud_path.exists():
            return np.zeros((0, 3)), np.zeros(0, dtype=np.uint8)
        import laspy

        from clearaudit.arrays import class_mask

        rng = np.random.default_rng(seed)
        parts_xyz, parts_cls = [], []
        # only the layers read here are decoded (x, y and the returns, z, class: laspy's
        # decompression selection; other point formats decode whole), and only the kept
        # points are scaled, as laspy scales them (integer * scale + offset)
        wanted = (laspy.DecompressionSelection.XY_RETURNS_CHANNEL
                  | laspy.DecompressionSelection.Z | laspy.DecompressionSelection.CLASSIFICATION)
        try:
            with laspy.open(self.cloud_path, decompression_selection=wanted) as reader:
                scale, offset = reader.header.scales, reader.header.offsets
                for chunk in reader.chunk_iterator(chunk_size):
                    cls = np.asarray(chunk.classification, dtype=np.uint8)
                    mask = np.ones(len(cls), dtype=bool) if classes is None else \
                        class_mask(cls, classes)
                    if keep_fraction < 1.0:
                        mask &= (rng.random(len(cls)) < keep_fraction) | class_mask(cls, always_keep)
                    if not mask.any():
                        continue
                    at = np.flatnonzero(mask)
                    xyz = np.column_stack([np.asarray(chunk[name])[at] * scale[k] + offset[k]
                                           for k, name in enumerate(("X", "Y", "Z"))])
                    xyz = self.to_local_m(xyz)
                    c = cls[at]
                    if bbox_local_m is not None:
                        x0, y0, x1, y1 = bbox_local_m
                        inside = ((xyz[:, 0] >= x0) & (xyz[:, 0] <= x1)
                                  & (xyz[:, 1] >= y0) & (xyz[:, 1] <= y1))
                        xyz, c = xyz[inside], c[inside]
                    parts_xyz.append(xyz)
                    parts_cls.append(c)
        except (OSError, laspy.errors.LaspyException) as e:
            raise InputError(self.cloud_path, f"cannot be read as LAS/LAZ ({e}).") from e
        if not parts_xyz:
            return np.zeros((0, 3)), np.zeros(0, dtype=np.uint8)
        return np.concatenate(parts_xyz), np.concatenate(parts_cls)

    # ---- curves and violations ----------------------------------------------------------------
    def curve_local_m(self, wire: dict, condition: str) -> np.ndarray | None:
        """A wire's polyline for a condition in local metres, or ``None`` when absent. [m]"""
        curve = (wire.get("curves") or {}).get(condition)
        if not curve:
            return None
        a = np.asarray(curve, dtype=float)
        if a.ndim != 2 or a.shape[1] != 3 or len(a) < 2:
            return None
        return self.to_local_m(a)

    def violation_xyz_local_m(self, rows: list[dict] | None = None) -> np.ndarray:
        """Violation positions in local metres, shape (n, 3). [m]"""
        rows = self.violations if rows is None else rows
        if not rows:
            return np.zeros((0, 3))
        a = np.array([[to_number(r.get("x")), to_number(r.get("y")), to_number(r.get("z"))]
                      for r in rows])
        return self.to_local_m(a)


def read_outputs(out_dir: str | Path) -> OutputFolder:
    """Read an audit output folder.

    Parameters
    ----------
    out_dir
        Folder written by ``clearaudit audit --out DIR``.

    Returns
    -------
    OutputFolder

    Raises
    ------
    InputError
        When the folder or its model.json is missing or unreadable.
    """
    path = Path(out_dir)
    if not path.is_dir():
        raise InputError(path, "is not a folder of audit outputs.")
    model_path = path / MODEL_FILE
    if not model_path.exists():
        raise InputError(path, f"has no {MODEL_FILE}; run the audit first.")
    model = _read_json(model_path)
    missing = [n for n in (SPANS_FILE, VIOLATIONS_FILE, RUN_FILE, CLOUD_FILE)
               if not (path / n).exists()]
    run = _read_json(path / RUN_FILE) if (path / RUN_FILE).exists() else {}
    spans = _read_csv(path / SPANS_FILE) if (path / SPANS_FILE).exists() else []
    violations = _read_csv(path / VIOLATIONS_FILE) if (path / VIOLATIONS_FILE).exists() else []
    violations.sort(key=lambda r: (to_number(r.get("priority")) if math.isfinite(
        to_number(r.get("priority"))) else math.inf, -np.nan_to_num(to_number(r.get("deficit_m")))))
    hu = to_number(model.get("horizontal_unit_m"))
    vu = to_number(model.get("vertical_unit_m"))
    hu = hu if math.isfinite(hu) and hu > 0 else 1.0
    vu = vu if math.isfinite(vu) and vu > 0 else hu
    origin = np.asarray(model.get("origin") or [0.0, 0.0, 0.0], dtype=float).reshape(-1)
    if origin.size != 3 or not np.all(np.isfinite(origin)):
        raise InputError(model_path, "'origin' must be three numbers [x, y, z].")
    tolerance = (_read_csv(path / TOLERANCE_FILE, TOLERANCE_TEXT_COLUMNS)
                 if (path / TOLERANCE_FILE).exists() else [])
    hazards = _read_csv(path / HAZARD_FILE) if (path / HAZARD_FILE).exists() else []
    hazards.sort(key=lambda r: to_number(r.get("priority")) if math.isfinite(
        to_number(r.get("priority"))) else math.inf)
    return OutputFolder(path=path, model=model, run=run, spans=spans, violations=violations,
                        horizontal_unit_m=hu, vertical_unit_m=vu, origin=origin, missing=missing,
                        tolerance=tolerance, hazard_trees=hazards)

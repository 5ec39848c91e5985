"""The line file (TOML) → validated settings.

A line file describes what the cloud alone cannot tell: the line's voltage and maximum operating
temperature, the conductors, the conductor temperature (or weather and load) at survey time, the
clearance rule set and overrides, and optionally the structures and design values. Every key has a
default, so ``clearaudit audit cloud.laz --voltage-kv 230`` runs without a line file. Unknown keys
are rejected (a typo must not silently fall back to a default). The full schema is documented in
``docs/line-file.md``.
"""
from __future__ import annotations

import dataclasses
import datetime as _dt
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import InputError

DEFAULT_RULE_SET = "na-transmission"


@dataclass
class LineSettings:
    name: str = "Unnamed line"
    """Line name shown in reports."""
    voltage_kv: float | None = None
    """Nominal phase-to-phase voltage. [kV]"""
    max_operating_temperature_c: float = 100.0
    """Maximum operating temperature (MOT) of the phase conductors. [°C]"""
    rule_set: str = DEFAULT_RULE_SET
    """Built-in clearance rule set name, or a path to a rule set TOML file."""
    owner: str = ""
    """Line owner (free text, for the report)."""
    altitude_m: float | None = None
    """Line altitude above sea level, used by altitude-dependent rules; default from the cloud. [m]"""


@dataclass
class SurveySettings:
    conductor_temperature_c: float | None = None
    """Conductor temperature during the flight, if measured or known. [°C]"""
    conductor_temperature_uncertainty_c: float = 5.0
    """Uncertainty (95 %) of the survey conductor temperature. [°C]"""
    ambient_temperature_c: float | None = None
    """Air temperature during the flight (to estimate the conductor temperature). [°C]"""
    wind_speed_m_s: float = 0.61
    """Wind speed during the flight. [m/s]"""
    wind_angle_deg: float = 90.0
    """Angle between wind and line axis. [°]"""
    current_a: float | None = None
    """Phase current during the flight. [A]"""
    datetime: str | None = None
    """Local solar date-time of the flight, ISO 8601 (e.g. 2026-07-14T11:00). Used for solar gain."""
    latitude_deg: float | None = None
    """Latitude; default from the cloud's CRS. [°]"""
    solar_absorptivity: float = 0.8
    """Conductor solar absorptivity. [-]"""
    emissivity: float = 0.8
    """Conductor emissivity. [-]"""


@dataclass
class ConductorSettings:
    name: str | None = None
    """Library name or code word (see ``clearaudit conductors``)."""
    bundle: int = 1
    """Sub-conductors per phase."""
    bundle_spacing_m: float = 0.45
    """Spacing of bundle sub-conductors. [m]"""
    overrides: dict[str, float] = field(default_factory=dict)
    """Explicit properties that override the library (diameter_m, area_m2, weight_n_per_m, ...)."""


@dataclass
class LineConfig:
    line: LineSettings = field(default_factory=LineSettings)
    survey: SurveySettings = field(default_factory=SurveySettings)
    phase: ConductorSettings = field(default_factory=lambda: ConductorSettings(name="795 26/7 ACSR"))
    shield: ConductorSettings = field(default_factory=lambda: ConductorSettings(name="3/8 EHS"))
    clearance: dict[str, float] = field(default_factory=dict)
    """Clearance overrides in metres (e.g. vegetation_m, ground_m, building_m)."""
    structures_file: Path | None = None
    """CSV with id, x, y[, type] in the cloud's CRS units."""
    trust_classes: bool = False
    """Use the cloud's own classes and only fill in what is missing."""
    design: dict[str, Any] = field(default_factory=dict)
    """Design values for the construction check (see docs/line-file.md)."""
    source: Path | None = None
    """The line file this came from (None when built from defaults and options)."""

    def to_dict(self) -> dict[str, Any]:
        """A JSON-serialisable view (for the run record)."""
        def conv(v):
            if isinstance(v, Path):
                return str(v)
            if dataclasses.is_dataclass(v):
                return {f.name: conv(getattr(v, f.name)) for f in dataclasses.fields(v)}
            if isinstance(v, dict):
                return {k: conv(x) for k, x in v.items()}
            return v
        return conv(self)


_CONDUCTOR_OVERRIDE_KEYS = {
    "diameter_m", "area_m2", "weight_n_per_m", "rated_strength_n", "modulus_pa",
    "thermal_expansion_per_c", "resistance_25c_ohm_per_m", "resistance_75c_ohm_per_m",
}


_FIELD_KINDS = {"float": "number", "str": "text", "int": "whole number"}


def _fill(cls, table: dict[str, Any], where: str, path: Path):
    names = {f.name: f for f in dataclasses.fields(cls)}
    kwargs = {}
    for key, value in table.items():
        if key not in names:
            raise InputError(path, f"unknown key {key!r} in [{where}] (allowed: "
                             f"{', '.join(sorted(names))})")
        kwargs[key] = value
    try:
        obj = cls(**kwargs)
    except TypeError as exc:  # pragma: no cover - guarded by the key check
        raise InputError(path, f"[{where}]: {exc}") from None
    for f in dataclasses.fields(cls):
        value = getattr(obj, f.name)
        kind = _FIELD_KINDS.get(str(f.type).split(" |")[0])
        if value is None or kind is None:
            continue
        ok = {"number": isinstance(value, (int, float)) and not isinstance(value, bool),
              "text": isinstance(value, str),
              "whole number": isinstance(value, int) and not isinstance(value, bool)}[kind]
        if not ok:
            raise InputError(path, f"[{where}] {f.name} must be a {kind}, got {value!r}")
    return obj


def _conductor(table: dict[str, Any], where: str, path: Path, default_name: str | None):
    table = dict(table)
    overrides = {k: float(table.pop(k)) for k in list(table) if k in _CONDUCTOR_OVERRIDE_KEYS}
    settings = _fill(ConductorSettings, table, where, path)
    if settings.name is None and not overrides:
        settings.name = default_name
    settings.overrides = overrides
    if settings.bundle < 1:
        raise InputError(path, f"[{where}] bundle must be at least 1")
    return settings


def load_line_file(path: str | Path | None) -> LineConfig:
    """Read and validate a line file; ``None`` gives the defaults.

    Raises
    ------
    InputError
        When the file is missing, not valid TOML, or holds unknown keys or wrong types.
    """
    if path is None:
        return LineConfig()
    path = Path(path)
    if not path.is_file():
        raise InputError(path, "line file not found")
    try:
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise InputError(path, f"is not a valid TOML line file ({exc})") from None
    allowed = {"line", "survey", "conductors", "clearance", "structures", "classification", "design"}
    unknown = set(doc) - allowed
    if unknown:
        raise InputError(path, f"unknown section(s) {', '.join(sorted(unknown))} "
                               f"(allowed: {', '.join(sorted(allowed))})")
    cfg = LineConfig(source=path)
    cfg.line = _fill(LineSettings, doc.get("line", {}), "line", path)
    cfg.survey = _fill(SurveySettings, doc.get("survey", {}), "survey", path)
    if cfg.survey.datetime is not None:
        try:
            _dt.datetime.fromisoformat(str(cfg.survey.datetime))
        except ValueError:
            raise InputError(path, f"[survey] datetime {cfg.survey.datetime!r} is not ISO 8601") from None
    conductors = doc.get("conductors", {})
    unknown = set(conductors) - {"phase", "shield"}
    if unknown:
        raise InputError(path, f"unknown conductor role(s) {', '.join(sorted(unknown))} "
                               "(allowed: phase, shield)")
    cfg.phase = _conductor(conductors.get("phase", {}), "conductors.phase", path, "795 26/7 ACSR")
    cfg.shield = _conductor(conductors.get("shield", {}), "conductors.shield", path, "3/8 EHS")
    clearance = doc.get("clearance", {})
    for key, value in clearance.items():
        if not isinstance(value, (int, float)) or isinstance(value, bool) or value < 0:
            raise InputError(path, f"[clearance] {key} must be a non-negative number of metres")
    cfg.clearance = {k: float(v) for k, v in clearance.items()}
    structures = doc.get("structures", {})
    unknown = set(structures) - {"file"}
    if unknown:
        raise InputError(path, f"unknown key(s) {', '.join(sorted(unknown))} in [structures]")
    if "file" in structures:
        sfile = Path(structures["file"])
        cfg.structures_file = sfile if sfile.is_absolute() else path.parent / sfile
    classification = doc.get("classification", {})
    unknown = set(classification) - {"trust_classes"}
    if unknown:
        raise InputError(path, f"unknown key(s) {', '.join(sorted(unknown))} in [classification]")
    cfg.trust_classes = bool(classification.get("trust_classes", False))
    cfg.design = dict(doc.get("design", {}))
    if cfg.design:
        from .audit.tolerance import parse_design

        parse_design(cfg.design, path)  # design mistakes surface now, before the heavy stages
    return cfg


def read_structures_csv(path: str | Path) -> list[dict[str, Any]]:
    """Read a structures CSV: columns id, x, y and optional type (suspension|deadend).

    Coordinates are in the cloud's CRS units. A missing or empty type gives ``None`` so the
    line model can infer the kind (line angle, horizontal insulator strings, end of wires).
    """
    import csv

    path = Path(path)
    if not path.is_file():
        raise InputError(path, "structures file not found")
    try:
        with open(path, newline="", encoding="utf-8") as f:
            reader = csv.DictReader(f)
            fields = [c.strip().lower() for c in (reader.fieldnames or [])]
            missing = {"id", "x", "y"} - set(fields)
            if missing:
                raise InputError(path, f"structures file lacks column(s) {', '.join(sorted(missing))}")
            rows = []
            for i, raw in enumerate(reader, start=2):
                row = {k.strip().lower(): (v or "").strip() for k, v in raw.items() if k}
                try:
                    x, y = float(row["x"]), float(row["y"])
                except ValueError:
                    raise InputError(path, f"line {i}: x and y must be numbers") from None
                raw_kind = (row.get("type") or "").lower().replace("-", "").replace(" ", "")
                kind = raw_kind or None  # None: not given, the line model infers it
                if raw_kind in ("deadend", "dead_end", "tension", "angle", "strain"):
                    kind = "deadend"
                elif raw_kind not in ("", "suspension"):
                    raise InputError(path, f"line {i}: type {row.get('type')!r} is not "
                                           "suspension or deadend")
                rows.append({"id": row["id"], "x": x, "y": y, "type": kind})
    except UnicodeDecodeError:
        raise InputError(path, "structures file is not UTF-8 text") from None
    if len(rows) < 2:
        raise InputError(path, "structures file needs at least two structures")
    ids = [r["id"] for r in rows]
    if len(set(ids)) != len(ids):
        raise InputError(path, "structure ids are not unique")
    return rows

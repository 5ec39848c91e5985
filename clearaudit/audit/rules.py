"""Clearance rule sets: required clearances and load cases, as data.

A rule set is a TOML file (built-in ones live in ``clearaudit/data/rules/``; the format is
documented in ``docs/rule-sets.md``). It gives

* the required clearance by obstacle kind (``ground`` by surface type, ``building`` as a
  vertical/horizontal envelope, ``vegetation`` by voltage and altitude, ``wire``), separately for
  energised phases and grounded shield wires;
* the voltage adder for lines above a threshold voltage;
* the load cases (conditions) in which the clearances are checked: ``survey``, ``mot``, ``wind``
  (pressure and temperature) and ``ice`` (radial thickness and temperature);
* the source of every value (standard, edition, table or clause).

User overrides (the line file's ``[clearance]`` table) replace final values; their source
becomes "line file override".
"""
from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np

from clearaudit.errors import InputError

__all__ = [
    "KINDS",
    "ROLES",
    "LoadCase",
    "Requirement",
    "RuleSet",
    "builtin_rule_sets",
    "load_rule_set",
    "max_operating_voltage_kv",
]

KINDS = ("ground", "vegetation", "building", "wire")
ROLES = ("phase", "shield")
GROUND_SURFACES = ("land", "road", "rail", "water", "pedestrian")
OVERRIDE_SOURCE = "line file override"

# Override keys of the line file's [clearance] table -> (kind, key inside the kind).
_OVERRIDE_KEYS: dict[str, tuple[str, tuple[str, ...]]] = {
    "ground_m": ("ground", GROUND_SURFACES),
    "land_m": ("ground", ("land",)),
    "road_m": ("ground", ("road",)),
    "rail_m": ("ground", ("rail",)),
    "water_m": ("ground", ("water",)),
    "pedestrian_m": ("ground", ("pedestrian",)),
    "building_m": ("building", ("vertical", "horizontal")),
    "building_vertical_m": ("building", ("vertical",)),
    "building_horizontal_m": ("building", ("horizontal",)),
    "vegetation_m": ("vegetation", ("value",)),
    "wire_m": ("wire", ("any",)),
}


@dataclass(frozen=True)
class Requirement:
    """One required clearance, with its provenance.

    Attributes
    ----------
    value_m
        Required clearance, adder and altitude factor included. [m]
    kind
        ``ground``, ``vegetation``, ``building`` or ``wire``.
    role
        ``phase`` (energised) or ``shield`` (grounded).
    key
        Surface (ground), direction (building: vertical/horizontal), ``value`` (vegetation) or
        ``any`` (wire).
    source
        Standard, edition, table or clause the base value comes from.
    detail
        How the value was built (base, adder, altitude factor), in words.
    """

    value_m: float
    kind: str
    role: str
    key: str
    source: str
    detail: str


@dataclass(frozen=True)
class LoadCase:
    """One named condition in which clearances are checked.

    Attributes
    ----------
    name
        ``survey``, ``mot``, ``wind`` or ``ice``.
    description
        One sentence.
    temperature_c
        Conductor temperature; ``None`` for ``survey`` (measured) and ``mot`` (from the line). [°C]
    wind_pressure_pa
        Wind pressure on the conductor's projected area. [Pa]
    radial_ice_m
        Radial ice thickness. [m]
    min_temperature_c
        Lowest temperature accepted for the case (``mot``: the rules' floor). [°C]
    source
        Where the case comes from.
    """

    name: str
    description: str
    temperature_c: float | None = None
    wind_pressure_pa: float = 0.0
    radial_ice_m: float = 0.0
    min_temperature_c: float | None = None
    source: str = ""


@dataclass(frozen=True)
class _Entry:
    value_m: float
    adder: bool
    source: str
    original: str = ""


@dataclass(frozen=True)
class _VegetationTable:
    voltages_kv: np.ndarray
    values_m: np.ndarray
    band_top_altitude_m: float
    source: str
    applies: bool = True
    reason: str = ""


@dataclass
class RuleSet:
    """A loaded clearance rule set (see :func:`load_rule_set`).

    Attributes
    ----------
    name, title, description
        Identification.
    path
        The TOML file it was read from.
    surfaces
        ASPRS class code of a ground point -> ground surface key (``land``, ``road`` ...).
    load_cases
        Conditions by name (``survey``, ``mot``, ``wind``, ``ice``).
    overrides
        The user overrides applied (line file [clearance] keys). [m]
    """

    name: str
    title: str
    description: str
    path: str
    surfaces: dict[int, str]
    load_cases: dict[str, LoadCase]
    adder_threshold_kv: float
    adder_m_per_kv: float
    adder_source: str
    max_voltage_above_kv: float
    max_voltage_factor: float
    max_operating_kv: dict[float, float]
    ground: dict[str, dict[str, _Entry]]
    building: dict[str, dict[str, _Entry]]
    wire: dict[str, dict[str, _Entry]]
    vegetation: dict[str, _VegetationTable]
    altitude_m: np.ndarray
    altitude_factors: np.ndarray
    altitude_source: str
    overrides: dict[str, float] = field(default_factory=dict)

    # ------------------------------------------------------------------ voltage adder
    def adder_voltage_kv(self, voltage_kv: float) -> float:
        """Voltage the adder is computed on: phase-to-ground, maximum operating above the limit.

        Parameters
        ----------
        voltage_kv
            Nominal phase-to-phase voltage of the line. [kV]

        Returns
        -------
        v : Phase-to-ground voltage used by the adder. [kV]
        """
        v = float(voltage_kv)
        if v > self.max_voltage_above_kv:
            v = max_operating_voltage_kv(v, self.max_operating_kv, self.max_voltage_factor)
        return v / math.sqrt(3.0)

    def voltage_adder_m(self, voltage_kv: float) -> float:
        """Clearance adder for an energised conductor.

        Parameters
        ----------
        voltage_kv
            Nominal phase-to-phase voltage. [kV]

        Returns
        -------
        adder : :math:`a\\,\\max(0, V_{pg} - V_0)`. [m]
        """
        return self.adder_m_per_kv * max(0.0, self.adder_voltage_kv(voltage_kv)
                                         - self.adder_threshold_kv)

    # ------------------------------------------------------------------ lookups
    def surface_of_class(self, asprs_class: int) -> str:
        """Ground surface key of an ASPRS class (``land`` when the class is not mapped)."""
        return self.surfaces.get(int(asprs_class), "land")

    def altitude_factor(self, altitude_m: float | None) -> float:
        """Altitude factor of the vegetation distance (1 at or below the first altitude). [-]"""
        if altitude_m is None or not np.isfinite(altitude_m) or len(self.altitude_m) == 0:
            return 1.0
        return float(np.interp(altitude_m, self.altitude_m, self.altitude_factors,
                               left=1.0, right=float(self.altitude_factors[-1])))

    def applies(self, kind: str, role: str) -> bool:
        """Whether the rule set requires a clearance of this kind for this wire role.

        Only vegetation can be switched off (``applies = false`` in
        ``[clearance.vegetation.<role>]``, e.g. grounded shield wires); a line file override
        (``shield_vegetation_m``) switches it back on.
        """
        if kind != "vegetation":
            return True
        prefix = "" if role == "phase" else "shield_"
        table = self.vegetation[role]
        return table.applies or self._override("vegetation", "value", prefix) is not None

    def not_applicable_reason(self, kind: str, role: str) -> str:
        """The rule set's reason for not requiring a clearance (empty when it applies)."""
        if self.applies(kind, role):
            return ""
        return self.vegetation[role].reason

    def required(self, kind: str, role: str, voltage_kv: float, *, key: str | None = None,
                 altitude_m: float | None = None) -> Requirement:
        """Required clearance for one obstacle kind, wire role and line voltage.

        Parameters
        ----------
        kind
            ``ground``, ``vegetation``, ``building`` or ``wire``.
        role
            ``phase`` or ``shield``.
        voltage_kv
            Nominal phase-to-phase voltage of the line. [kV]
        key
            Ground: surface (default ``land``); building: ``vertical`` (default) or
            ``horizontal``.
        altitude_m
            Altitude above sea level (vegetation only). [m]

        Returns
        -------
        requirement : :class:`Requirement`
        """
        if kind not in KINDS:
            raise ValueError(f"The obstacle kind must be one of {', '.join(KINDS)}, not {kind!r}.")
        if role not in ROLES:
            raise ValueError(f"The wire role must be 'phase' or 'shield', not {role!r}.")
        if not (voltage_kv is not None and np.isfinite(voltage_kv) and voltage_kv > 0):
            raise ValueError("The line voltage must be a positive number of kV.")
        prefix = "" if role == "phase" else "shield_"
        if kind == "vegetation":
            return self._vegetation(role, float(voltage_kv), altitude_m, prefix)
        table = {"ground": self.ground, "building": self.building, "wire": self.wire}[kind][role]
        key = key or {"ground": "land", "building": "vertical", "wire": "any"}[kind]
        if key not in table:
            raise ValueError(f"The rule set {self.name!r} has no {role} {kind} clearance for "
                             f"{key!r} (has {', '.join(sorted(table))}).")
        entry = table[key]
        override = self._override(kind, key, prefix)
        if override is not None:
            return Requirement(override[1], kind, role, key, OVERRIDE_SOURCE,
                               f"{override[0]} = {override[1]:.2f} m (line file)")
        adder = self.voltage_adder_m(voltage_kv) if (entry.adder and role == "phase") else 0.0
        detail = f"{entry.value_m:.2f} m" + (f" ({entry.original})" if entry.original else "")
        if adder > 0:
            detail += (f" + {adder:.2f} m voltage adder ({self.adder_m_per_kv * 1000:.0f} mm/kV "
                       f"× ({self.adder_voltage_kv(voltage_kv):.1f} − "
                       f"{self.adder_threshold_kv:.0f}) kV phase-to-ground)")
        return Requirement(entry.value_m + adder, kind, role, key, entry.source, detail)

    def _override(self, kind: str, key: str, prefix: str) -> tuple[str, float] | None:
        # The most specific override wins (e.g. road_m before ground_m).
        found = None
        for name, (okind, keys) in _OVERRIDE_KEYS.items():
            full = prefix + name
            if okind == kind and key in keys and full in self.overrides:
                if found is None or len(keys) < found[2]:
                    found = (full, self.overrides[full], len(keys))
        return None if found is None else (found[0], found[1])

    def _vegetation(self, role: str, voltage_kv: float, altitude_m: float | None,
                    prefix: str) -> Requirement:
        override = self._override("vegetation", "value", prefix)
        if override is not None:
            return Requirement(override[1], "vegetation", role, "value", OVERRIDE_SOURCE,
                               f"{override[0]} = {override[1]:.2f} m (line file)")
        table = self.vegetation[role]
        if not table.applies:
            return Requirement(0.0, "vegetation", role, "value", table.source,
                               f"no requirement ({table.reason})")
        index = int(np.searchsorted(table.voltages_kv, voltage_kv - 1e-9))
        beyond = index >= len(table.voltages_kv)
        index = min(index, len(table.voltages_kv) - 1)
        base = float(table.values_m[index])
        detail = f"{base:.2f} m for {table.voltages_kv[index]:g} kV"
        if beyond:
            detail += f" (the table's highest voltage; the line is {voltage_kv:g} kV)"
        value = base
        if altitude_m is not None and altitude_m > table.band_top_altitude_m and base > 0:
            factor = self.altitude_factor(altitude_m)
            value = base * factor
            detail += (f" × altitude factor {factor:.2f} at {altitude_m:.0f} m "
                       f"({self.altitude_source})")
        return Requirement(value, "vegetation", role, "value", table.source, detail)

    def max_required_m(self, voltage_kv: float, altitude_m: float | None = None) -> float:
        """Largest required clearance of any kind and role (to size the search buffer). [m]"""
        values = []
        for role in ROLES:
            values.append(self.required("vegetation", role, voltage_kv,
                                        altitude_m=altitude_m).value_m)
            for key in self.ground[role]:
                values.append(self.required("ground", role, voltage_kv, key=key).value_m)
            for key in self.building[role]:
                values.append(self.required("building", role, voltage_kv, key=key).value_m)
            values.append(self.required("wire", role, voltage_kv).value_m)
        return float(max(values))

    def describe(self) -> dict[str, Any]:
        """A JSON-serialisable summary (name, path, overrides, load cases)."""
        return {"name": self.name, "title": self.title, "path": self.path,
                "overrides": dict(self.overrides),
                "load_cases": {k: vars(v) for k, v in self.load_cases.items()}}


def max_operating_voltage_kv(nominal_kv: float, table: dict[float, float] | None = None,
                             factor: float = 1.05) -> float:
    """Maximum operating (system) voltage for a nominal phase-to-phase voltage.

    Parameters
    ----------
    nominal_kv
        Nominal phase-to-phase voltage. [kV]
    table
        Nominal -> maximum voltage for standard voltages. [kV]
    factor
        Ratio used for voltages not in the table. [-]

    Returns
    -------
    v_max : Maximum phase-to-phase voltage. [kV]
    """
    for nominal, maximum in (table or {}).items():
        if abs(nominal - nominal_kv) < 1e-6:
            return float(maximum)
    return float(nominal_kv) * factor


# ---------------------------------------------------------------------------------- loading
def builtin_rule_sets() -> list[str]:
    """Names of the rule sets shipped with clearaudit."""
    folder = resources.files("clearaudit").joinpath("data/rules")
    return sorted(p.name[:-5] for p in folder.iterdir() if p.name.endswith(".toml"))


def _number(value: Any, where: str, path: str, *, positive: bool = False) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise InputError(path, f"{where} must be a number, got {value!r}")
    if value < 0 or (positive and value == 0):
        raise InputError(path, f"{where} must be {'positive' if positive else 'zero or positive'}")
    return float(value)


def _text(table: dict, key: str, where: str, path: str) -> str:
    value = table.get(key)
    if not isinstance(value, str) or not value.strip():
        raise InputError(path, f"{where} needs a '{key}' text (every value must name its source)")
    return value


def _entries(doc: dict, kind: str, path: str, required: tuple[str, ...]) -> dict[str, dict]:
    out: dict[str, dict[str, _Entry]] = {}
    section = doc.get("clearance", {}).get(kind)
    if not isinstance(section, dict):
        raise InputError(path, f"[clearance.{kind}] is missing")
    for role in ROLES:
        table = section.get(role)
        if not isinstance(table, dict) or not table:
            raise InputError(path, f"[clearance.{kind}.{role}] is missing")
        out[role] = {}
        for key, raw in table.items():
            where = f"[clearance.{kind}.{role}] {key}"
            if not isinstance(raw, dict):
                raise InputError(path, f"{where} must be a table with value_m and source")
            out[role][key] = _Entry(_number(raw.get("value_m"), f"{where} value_m", path),
                                    bool(raw.get("adder", False)), _text(raw, "source", where, path),
                                    str(raw.get("original", "")))
        missing = [k for k in required if k not in out[role]]
        if missing:
            raise InputError(path, f"[clearance.{kind}.{role}] lacks {', '.join(missing)}")
    return out


def _vegetation_tables(doc: dict, path: str) -> tuple[dict[str, _VegetationTable], dict]:
    section = doc.get("clearance", {}).get("vegetation")
    if not isinstance(section, dict):
        raise InputError(path, "[clearance.vegetation] is missing")
    tables = {}
    for role in ROLES:
        raw = section.get(role)
        where = f"[clearance.vegetation.{role}]"
        if not isinstance(raw, dict):
            raise InputError(path, f"{where} is missing")
        applies = raw.get("applies", True)
        if not isinstance(applies, bool):
            raise InputError(path, f"{where} applies must be true or false")
        if not applies:
            tables[role] = _VegetationTable(np.zeros(1), np.zeros(1), 1e9,
                                            _text(raw, "source", where, path), False,
                                            _text(raw, "reason", where, path))
            continue
        volts = raw.get("voltages_kv")
        values = raw.get("values_m")
        if (not isinstance(volts, list) or not isinstance(values, list) or not volts
                or len(volts) != len(values)):
            raise InputError(path, f"{where} needs voltages_kv and values_m lists of equal length")
        v = np.array([_number(x, f"{where} voltages_kv", path) for x in volts])
        m = np.array([_number(x, f"{where} values_m", path) for x in values])
        if np.any(np.diff(v) <= 0):
            raise InputError(path, f"{where} voltages_kv must increase")
        tables[role] = _VegetationTable(v, m, _number(raw.get("band_top_altitude_m", 1e9),
                                                      f"{where} band_top_altitude_m", path),
                                        _text(raw, "source", where, path))
    return tables, section.get("altitude", {})


def _load_cases(doc: dict, path: str) -> dict[str, LoadCase]:
    section = doc.get("load_cases")
    if not isinstance(section, dict):
        raise InputError(path, "[load_cases] is missing")
    cases = {}
    for name in ("survey", "mot", "wind", "ice"):
        raw = section.get(name)
        where = f"[load_cases.{name}]"
        if not isinstance(raw, dict):
            raise InputError(path, f"{where} is missing")
        source = _text(raw, "source", where, path)
        description = _text(raw, "description", where, path)
        if name == "wind":
            cases[name] = LoadCase(name, description, _number_signed(raw, "temperature_c", where,
                                                                     path),
                                   wind_pressure_pa=_number(raw.get("wind_pressure_pa"),
                                                            f"{where} wind_pressure_pa", path,
                                                            positive=True), source=source)
        elif name == "ice":
            cases[name] = LoadCase(name, description, _number_signed(raw, "temperature_c", where,
                                                                     path),
                                   radial_ice_m=_number(raw.get("radial_ice_m"),
                                                        f"{where} radial_ice_m", path),
                                   source=source)
        elif name == "mot":
            floor = raw.get("min_temperature_c")
            cases[name] = LoadCase(name, description, None,
                                   min_temperature_c=None if floor is None else
                                   _number_signed(raw, "min_temperature_c", where, path),
                                   source=source)
        else:
            cases[name] = LoadCase(name, description, None, source=source)
    return cases


def _number_signed(raw: dict, key: str, where: str, path: str) -> float:
    value = raw.get(key)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise InputError(path, f"{where} {key} must be a number, got {value!r}")
    return float(value)


def _resolve(name_or_path: str | Path, base_dir: str | Path | None = None) -> Path:
    text = str(name_or_path)
    candidate = Path(text).expanduser()
    if base_dir is not None and not candidate.is_absolute():
        relative = Path(base_dir) / candidate
        if relative.is_file():
            candidate = relative
    if candidate.suffix.lower() == ".toml" or candidate.is_file() or "/" in text or "\\" in text:
        if not candidate.is_file():
            raise InputError(candidate, "rule set file not found")
        return candidate
    folder = resources.files("clearaudit").joinpath("data/rules")
    builtin = folder.joinpath(f"{text}.toml")
    if not builtin.is_file():
        raise InputError(None, f"unknown rule set {text!r} (built-in: "
                               f"{', '.join(builtin_rule_sets())}; or give a path to a .toml file)")
    return Path(str(builtin))


def load_rule_set(name_or_path: str | Path, overrides: dict[str, float] | None = None, *,
                  base_dir: str | Path | None = None) -> RuleSet:
    """Load a clearance rule set by built-in name or file path, and apply user overrides.

    Parameters
    ----------
    name_or_path
        Built-in name (e.g. ``"na-transmission"``) or a path to a rule set TOML file.
    overrides
        Final clearances that replace the rule set's values [m], keyed as in the line file's
        ``[clearance]`` table: ``ground_m`` (every ground surface), ``land_m``, ``road_m``,
        ``rail_m``, ``water_m``, ``pedestrian_m``, ``building_m`` (vertical and horizontal),
        ``building_vertical_m``, ``building_horizontal_m``, ``vegetation_m``, ``wire_m``; the
        same keys prefixed with ``shield_`` apply to shield wires (unprefixed keys apply to the
        energised phases).
    base_dir
        Folder that a relative rule set path is resolved against first (the line file's folder).

    Returns
    -------
    rules : :class:`RuleSet`

    Raises
    ------
    InputError
        When the file is missing or invalid, or an override key or value is not valid.
    """
    path = _resolve(name_or_path, base_dir)
    where = str(path)
    try:
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise InputError(where, f"is not a valid TOML rule set ({exc})") from None
    meta = doc.get("rule_set")
    if not isinstance(meta, dict):
        raise InputError(where, "[rule_set] (name, title) is missing")
    name = _text(meta, "name", "[rule_set]", where)
    adder = doc.get("voltage_adder")
    if not isinstance(adder, dict):
        raise InputError(where, "[voltage_adder] is missing")
    max_table = {}
    for key, value in (adder.get("max_operating_kv") or {}).items():
        if key == "source":
            continue
        try:
            max_table[float(key)] = _number(value, f"[voltage_adder.max_operating_kv] {key}", where)
        except ValueError:
            raise InputError(where, f"[voltage_adder.max_operating_kv] key {key!r} is not a "
                                    "voltage") from None
    surfaces = {}
    for key, value in (doc.get("surfaces") or {}).items():
        if not (key.isdigit() and isinstance(value, str) and value in GROUND_SURFACES):
            raise InputError(where, f"[surfaces] {key} = {value!r}: keys are ASPRS class codes, "
                                    f"values one of {', '.join(GROUND_SURFACES)}")
        surfaces[int(key)] = value
    vegetation, altitude = _vegetation_tables(doc, where)
    alt = np.array([_number(x, "[clearance.vegetation.altitude] altitudes_m", where)
                    for x in altitude.get("altitudes_m", [])])
    fac = np.array([_number(x, "[clearance.vegetation.altitude] factors", where, positive=True)
                    for x in altitude.get("factors", [])])
    if len(alt) != len(fac) or np.any(np.diff(alt) < 0):
        raise InputError(where, "[clearance.vegetation.altitude] needs increasing altitudes_m "
                                "and as many factors")
    rules = RuleSet(
        name=name, title=str(meta.get("title", name)),
        description=str(meta.get("description", "")), path=where, surfaces=surfaces,
        load_cases=_load_cases(doc, where),
        adder_threshold_kv=_number(adder.get("threshold_kv"), "[voltage_adder] threshold_kv",
                                   where),
        adder_m_per_kv=_number(adder.get("adder_m_per_kv"), "[voltage_adder] adder_m_per_kv",
                               where),
        adder_source=_text(adder, "source", "[voltage_adder]", where),
        max_voltage_above_kv=_number(adder.get("max_voltage_above_kv", 0.0),
                                     "[voltage_adder] max_voltage_above_kv", where),
        max_voltage_factor=_number(adder.get("max_voltage_factor", 1.0),
                                   "[voltage_adder] max_voltage_factor", where, positive=True),
        max_operating_kv=max_table,
        ground=_entries(doc, "ground", where, ("land",)),
        building=_entries(doc, "building", where, ("vertical", "horizontal")),
        wire=_entries(doc, "wire", where, ("any",)),
        vegetation=vegetation, altitude_m=alt, altitude_factors=fac,
        altitude_source=str(altitude.get("source", "")),
    )
    rules.overrides = _check_overrides(overrides or {})
    return rules


def _check_overrides(overrides: dict[str, float]) -> dict[str, float]:
    allowed = set(_OVERRIDE_KEYS) | {"shield_" + k for k in _OVERRIDE_KEYS}
    out = {}
    for key, value in overrides.items():
        if key not in allowed:
            raise InputError("[clearance]", f"unknown clearance key {key!r} (allowed: "
                                            f"{', '.join(sorted(allowed))})")
        out[key] = _number(value, f"[clearance] {key}", "[clearance]")
    return out

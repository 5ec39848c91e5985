"""Construction check: sags against design, tension imbalance and clamp offsets.

After a line is strung, sagged and clipped in, the owner checks that every span hangs as
designed. :func:`check_tolerance` compares each fitted wire of each span with the design and
checks every suspension structure for unequal horizontal tension:

1. **Design values** (:func:`parse_design`) come from the line file's ``[design]`` table (and
   an optional CSV file): per line, tension section or span, a design horizontal tension, a
   design sag, a ruling-span sag, or tension limits in per cent of the rated breaking strength
   (RBS) from which the design tension is computed by the ruling-span change of state — all at
   one reference conductor temperature (the stringing-table temperature).
2. **Sag comparison**: the measured sag at the survey conductor temperature is corrected to the
   reference temperature by the exact ruling-span change of state of its tension section
   (:meth:`clearaudit.physics.state_change.ConductorMechanics.final_tension`) applied to the
   span's own measured tension, and compared with the design sag of the same span (its
   surveyed span length and height difference). The 95 % half-width of the corrected sag
   combines the fit's sag half-width and the survey temperature's half-width (central
   differences, in quadrature). Status ``ok`` (the whole interval within tolerance),
   ``out_of_tolerance`` (the whole interval outside), ``uncertain`` (the interval straddles
   the limit) or ``not_checked`` (with the reason).
3. **Tension imbalance** at every suspension structure inside a tension section: the
   longitudinal imbalance :math:`\\Delta H = H_{back} - H_{ahead}`, the vertical load at the
   clamp from both spans (exact catenary end shears: the weight of conductor from each span's
   low point to the clamp), the insulator swing from plumb along the line it implies
   (:func:`insulator_swing_along_line_deg`) and the clamp offset along the conductor that
   brings every insulator of the section plumb with equal horizontal tension
   (:func:`equalising_clamp_offsets`, the hillside clipping-offset correction).

Both kinds of row go to one file, ``tolerance.csv``, told apart by the ``kind`` column
(``span`` or ``structure``); :data:`TOLERANCE_COLUMNS` lists the columns,
:data:`SPAN_CHECK_COLUMNS` and :data:`STRUCTURE_CHECK_COLUMNS` which of them each kind fills.
See ``docs/construction-check.md``.

References
----------
.. [1] IEEE Std 524-2016, *Guide for the Installation of Overhead Transmission Line
   Conductors*: sagging, the ruling span, and clipping offsets for suspension structures in
   inclined spans.
.. [2] CIGRE TB 324 (2007), *Sag-tension calculation methods for overhead lines*: change of
   state, unstressed length.
.. [3] Irvine, H. M. (1981). *Cable Structures*. MIT Press, ch. 1 (catenary, elastic
   catenary lengths).
.. [4] ASCE Manual of Practice 74 (2020): insulator swing from a moment balance of the string
   (common practice).
"""
from __future__ import annotations

import csv
import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import ArrayLike
from scipy import optimize

from clearaudit.errors import InputError
from clearaudit.physics import catenary, loading
from clearaudit.physics.state_change import ConductorMechanics, ruling_span

from .conditions import conductor_mechanics

log = logging.getLogger(__name__)

__all__ = [
    "DEFAULT_SWING_TOLERANCE_DEG",
    "DEFAULT_TOLERANCE_M",
    "DEFAULT_TOLERANCE_PERCENT",
    "SPAN_CHECK_COLUMNS",
    "STRUCTURE_CHECK_COLUMNS",
    "TOLERANCE_COLUMNS",
    "DesignSpec",
    "DesignValue",
    "TensionLimit",
    "check_tolerance",
    "clamp_vertical_load_n",
    "design_horizontal_tension",
    "equalising_clamp_offsets",
    "insulator_swing_along_line_deg",
    "parse_design",
    "sag_tolerance_m",
    "unstressed_length_m",
]

#: Default sag tolerance as a percentage of the design sag. Common practice (no source), from
#: memory: construction specifications allow a few per cent of the design sag. [%]
DEFAULT_TOLERANCE_PERCENT = 3.0
#: Default absolute sag tolerance; the larger of the two applies. Common practice (no source),
#: from memory: a floor of about 0.1-0.15 m so short spans are not held to millimetres. [m]
DEFAULT_TOLERANCE_M = 0.15
#: Insulator swing from plumb along the line accepted at a suspension structure. Common
#: practice (no source). [deg]
DEFAULT_SWING_TOLERANCE_DEG = 2.0

SPAN_CHECK_COLUMNS = [
    "kind", "section_id", "span_id", "wire_id", "role", "status", "deviation",
    "design_source", "reference_temperature_c", "survey_temperature_c",
    "survey_temperature_ci95_c", "span_length_m", "height_difference_m",
    "ruling_span_m", "design_horizontal_tension_n", "design_sag_m",
    "horizontal_tension_survey_n", "horizontal_tension_corrected_n",
    "sag_survey_m", "sag_survey_ci95_m", "sag_corrected_m", "sag_corrected_ci95_m",
    "sag_difference_m", "sag_difference_percent", "tolerance_m", "note",
]
STRUCTURE_CHECK_COLUMNS = [
    "kind", "section_id", "structure_id", "wire_id", "role", "status", "back_span_id",
    "ahead_span_id", "bundle_count", "horizontal_tension_back_n", "horizontal_tension_ahead_n",
    "imbalance_n", "imbalance_ci95_n", "allowed_imbalance_n", "vertical_load_n",
    "weight_span_m", "insulator_length_m", "insulator_weight_n", "swing_deg",
    "swing_ci95_deg", "clamp_displacement_m", "clamp_offset_m", "clamp_offset_ci95_m",
    "equalised_tension_n", "offset_method", "note",
]
#: Columns of ``tolerance.csv`` (span rows first, then structure rows; empty where a column
#: does not apply to the row's kind).
TOLERANCE_COLUMNS = list(dict.fromkeys(SPAN_CHECK_COLUMNS + STRUCTURE_CHECK_COLUMNS))

_ROLES = ("phase", "shield")
_LINE_VALUE_KEYS = ("horizontal_tension_n", "ruling_span_sag_m", "percent_rbs")
_SPAN_VALUE_KEYS = ("horizontal_tension_n", "sag_m", "percent_rbs")
_TOP_KEYS = {"reference_temperature_c", "tolerance_percent", "tolerance_m", "tolerance_rule",
             "swing_tolerance_deg", "insulator_length_m", "insulator_weight_n", "strain_model",
             "file", "sections", "spans", "limits", "shield", *_LINE_VALUE_KEYS}
_ROLE_KEYS = {"sections", "spans", "limits", *_LINE_VALUE_KEYS}
_LIMIT_KEYS = {"temperature_c", "percent_rbs", "radial_ice_m", "wind_pressure_pa"}
_CSV_VALUE_KEYS = ("horizontal_tension_n", "sag_m", "ruling_span_sag_m", "percent_rbs")


# ============================================================================ design input
@dataclass(frozen=True)
class TensionLimit:
    """A design tension limit: horizontal tension at most ``percent_rbs`` of RBS in a condition.

    Attributes
    ----------
    temperature_c
        Conductor temperature of the condition. [°C]
    percent_rbs
        Largest horizontal tension as a percentage of the rated breaking strength. [%]
    radial_ice_m
        Radial ice thickness of the condition. [m]
    wind_pressure_pa
        Wind pressure on the (iced) conductor of the condition. [Pa]
    """

    temperature_c: float
    percent_rbs: float
    radial_ice_m: float = 0.0
    wind_pressure_pa: float = 0.0


@dataclass(frozen=True)
class DesignValue:
    """The design of one line, section or span for one wire role.

    Attributes
    ----------
    kind
        ``"horizontal_tension"`` (value in N), ``"sag"`` (the span's own design sag, m),
        ``"ruling_span_sag"`` (sag of the level ruling span, m) or ``"limits"``.
    value
        The number (unused for ``"limits"``). [N or m]
    limits
        Tension limits (``kind == "limits"``).
    where
        Where it was given, for the ``design_source`` column (e.g. ``"section TS1"``).
    """

    kind: str
    value: float = math.nan
    limits: tuple[TensionLimit, ...] = ()
    where: str = ""

    def describe(self) -> str:
        if self.kind == "limits":
            text = ", ".join(f"{lim.percent_rbs:g} % RBS at {lim.temperature_c:g} °C"
                             + (f" with {lim.radial_ice_m * 1000:g} mm ice"
                                if lim.radial_ice_m else "")
                             + (f" and {lim.wind_pressure_pa:g} Pa wind"
                                if lim.wind_pressure_pa else "")
                             for lim in self.limits)
            return f"{self.where}: limits {text}"
        unit = "N" if self.kind == "horizontal_tension" else "m"
        return f"{self.where}: {self.kind} {self.value:g} {unit}"


@dataclass
class RoleDesign:
    """Design values of one wire role at line, section and span level."""

    line: DesignValue | None = None
    sections: dict[str, DesignValue] = field(default_factory=dict)
    spans: dict[str, DesignValue] = field(default_factory=dict)

    def lookup(self, section_id: str, span_id: str) -> DesignValue | None:
        """The most specific design value: span, then section, then line."""
        return self.spans.get(span_id) or self.sections.get(section_id) or self.line


@dataclass
class DesignSpec:
    """The parsed ``[design]`` table.

    Attributes
    ----------
    reference_temperature_c
        Conductor temperature of the design sags and tensions. [°C]
    tolerance_percent, tolerance_m
        Sag tolerance as a percentage of the design sag [%] and in metres [m]; ``None`` when
        not used.
    tolerance_rule
        ``"larger"`` (default) or ``"smaller"`` of the two when both are used.
    swing_tolerance_deg
        Accepted insulator swing from plumb along the line. [deg]
    insulator_length_m
        Suspension string length, pivot to clamp; ``None``: from the audit. [m]
    insulator_weight_n
        Weight of the string and hardware. [N]
    strain_model
        Change-of-state strain model (``"auto"``, ``"linear"``, ``"two-material"``).
    roles
        ``"phase"`` and/or ``"shield"`` -> :class:`RoleDesign`.
    """

    reference_temperature_c: float
    tolerance_percent: float | None = DEFAULT_TOLERANCE_PERCENT
    tolerance_m: float | None = DEFAULT_TOLERANCE_M
    tolerance_rule: str = "larger"
    swing_tolerance_deg: float = DEFAULT_SWING_TOLERANCE_DEG
    insulator_length_m: float | None = None
    insulator_weight_n: float = 0.0
    strain_model: str = "auto"
    roles: dict[str, RoleDesign] = field(default_factory=dict)

    def tolerance_for(self, design_sag_m: float) -> float:
        """Sag tolerance for a design sag (:func:`sag_tolerance_m`). [m]"""
        return sag_tolerance_m(design_sag_m, self.tolerance_percent, self.tolerance_m,
                               self.tolerance_rule)


def sag_tolerance_m(design_sag_m: float, tolerance_percent: float | None,
                    tolerance_m: float | None, rule: str = "larger") -> float:
    """Allowed sag difference for a span.

    Parameters
    ----------
    design_sag_m
        Design sag of the span. [m]
    tolerance_percent
        Tolerance as a percentage of the design sag, or ``None``. [%]
    tolerance_m
        Absolute tolerance, or ``None``. [m]
    rule
        ``"larger"`` or ``"smaller"`` of the two when both are given.

    Returns
    -------
    tolerance : float
        :math:`\\max` (or :math:`\\min`) of :math:`p\\,D_d/100` and :math:`t`. [m]
    """
    if rule not in ("larger", "smaller"):
        raise ValueError("The tolerance rule must be 'larger' or 'smaller'.")
    parts = []
    if tolerance_percent is not None:
        parts.append(abs(float(design_sag_m)) * float(tolerance_percent) / 100.0)
    if tolerance_m is not None:
        parts.append(float(tolerance_m))
    if not parts:
        raise ValueError("Give a percentage or an absolute tolerance.")
    return max(parts) if rule == "larger" else min(parts)


def _number(value: Any, name: str, source, *, low: float | None = None,
            high: float | None = None, strict_low: bool = True) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(source, f"[design] {name} must be a number, got {value!r}")
    x = float(value)
    if not math.isfinite(x):
        raise InputError(source, f"[design] {name} must be finite, got {value!r}")
    if low is not None and (x <= low if strict_low else x < low):
        word = "greater than" if strict_low else "at least"
        raise InputError(source, f"[design] {name} must be {word} {low:g}, got {value!r}")
    if high is not None and x > high:
        raise InputError(source, f"[design] {name} must be at most {high:g}, got {value!r}")
    return x


def _limits(raw: Any, where: str, source, reference_c: float) -> tuple[TensionLimit, ...]:
    if not isinstance(raw, list) or not raw:
        raise InputError(source, f"[design] {where} limits must be a non-empty array of tables "
                                 "([[design.limits]])")
    out = []
    for k, item in enumerate(raw, start=1):
        if not isinstance(item, dict):
            raise InputError(source, f"[design] {where} limit {k} must be a table")
        unknown = set(item) - _LIMIT_KEYS
        if unknown:
            raise InputError(source, f"[design] {where} limit {k}: unknown key(s) "
                                     f"{', '.join(sorted(unknown))} (allowed: "
                                     f"{', '.join(sorted(_LIMIT_KEYS))})")
        if "percent_rbs" not in item:
            raise InputError(source, f"[design] {where} limit {k} needs percent_rbs")
        out.append(TensionLimit(
            _number(item.get("temperature_c", reference_c), f"{where} limit {k} temperature_c",
                    source, low=-80.0, high=300.0),
            _number(item["percent_rbs"], f"{where} limit {k} percent_rbs", source, low=0.0,
                    high=100.0),
            _number(item.get("radial_ice_m", 0.0), f"{where} limit {k} radial_ice_m", source,
                    low=0.0, high=0.2, strict_low=False),
            _number(item.get("wind_pressure_pa", 0.0), f"{where} limit {k} wind_pressure_pa",
                    source, low=0.0, high=5000.0, strict_low=False)))
    return tuple(out)


def _value(table: dict, keys: Sequence[str], where: str, source,
           reference_c: float) -> DesignValue | None:
    given = [k for k in keys if k in table]
    has_limits = "limits" in table
    if len(given) > 1 or (has_limits and given and given[0] != "percent_rbs"):
        raise InputError(source, f"[design] {where}: give only one of "
                                 f"{', '.join(keys)}{' or limits' if has_limits else ''}, "
                                 f"not {', '.join(given + (['limits'] if has_limits else []))}")
    limits: tuple[TensionLimit, ...] = ()
    if has_limits:
        limits = _limits(table["limits"], where, source, reference_c)
    if given and given[0] == "percent_rbs":
        pct = _number(table["percent_rbs"], f"{where} percent_rbs", source, low=0.0, high=100.0)
        limits = (TensionLimit(reference_c, pct), *limits)
    if limits:
        return DesignValue("limits", limits=limits, where=where)
    if not given:
        return None
    key = given[0]
    value = _number(table[key], f"{where} {key}", source, low=0.0)
    kind = {"horizontal_tension_n": "horizontal_tension", "sag_m": "sag",
            "ruling_span_sag_m": "ruling_span_sag"}[key]
    return DesignValue(kind, value, where=where)


def _sub_tables(table: Any, level: str, keys: Sequence[str], role: str, source,
                reference_c: float) -> dict[str, DesignValue]:
    if table is None:
        return {}
    if not isinstance(table, dict):
        raise InputError(source, f"[design] {level} must be a table of tables")
    out = {}
    singular = level[:-1]
    allowed = set(keys) | ({"limits"} if level == "sections" else set())
    for name, sub in table.items():
        if not isinstance(sub, dict):
            raise InputError(source, f"[design] {level}.{name} must be a table")
        unknown = set(sub) - allowed
        if unknown:
            raise InputError(source, f"[design] {level}.{name}: unknown key(s) "
                                     f"{', '.join(sorted(unknown))} (allowed: "
                                     f"{', '.join(sorted(allowed))})")
        where = f"{singular} {name}" + (" (shield)" if role == "shield" else "")
        value = _value(sub, keys, where, source, reference_c)
        if value is None:
            raise InputError(source, f"[design] {level}.{name} gives no design value "
                                     f"(one of {', '.join(sorted(allowed))})")
        out[str(name)] = value
    return out


def _role(table: dict, role: str, source, reference_c: float) -> RoleDesign:
    where = "line" + (" (shield)" if role == "shield" else "")
    return RoleDesign(
        line=_value(table, _LINE_VALUE_KEYS, where, source, reference_c),
        sections=_sub_tables(table.get("sections"), "sections", _LINE_VALUE_KEYS, role, source,
                             reference_c),
        spans=_sub_tables(table.get("spans"), "spans", _SPAN_VALUE_KEYS, role, source,
                          reference_c))


def _read_design_csv(path: Path, spec: DesignSpec) -> None:
    """Add the rows of a design CSV to ``spec`` (duplicates of the TOML tables are errors)."""
    if not path.is_file():
        raise InputError(path, "design file not found")
    try:
        with open(path, newline="", encoding="utf-8") as f:
            reader = csv.DictReader(f)
            columns = [c.strip().lower() for c in (reader.fieldnames or []) if c]
            values = [c for c in _CSV_VALUE_KEYS if c in columns]
            if not ({"span_id", "section_id"} & set(columns)) or not values:
                raise InputError(path, "design file needs a span_id or section_id column and "
                                       f"a value column ({', '.join(_CSV_VALUE_KEYS)})")
            for i, raw in enumerate(reader, start=2):
                row = {(k or "").strip().lower(): (v or "").strip() for k, v in raw.items()}
                role = row.get("role") or "phase"
                if role not in _ROLES:
                    raise InputError(path, f"line {i}: role {role!r} is not phase or shield")
                span_id, section_id = row.get("span_id", ""), row.get("section_id", "")
                if bool(span_id) == bool(section_id):
                    raise InputError(path, f"line {i}: give exactly one of span_id and "
                                           "section_id")
                given = {k: row[k] for k in values if row.get(k)}
                if len(given) != 1:
                    raise InputError(path, f"line {i}: give exactly one design value "
                                           f"({', '.join(values)})")
                key, text = next(iter(given.items()))
                if (span_id and key == "ruling_span_sag_m") or (section_id and key == "sag_m"):
                    raise InputError(path, f"line {i}: {key} is for "
                                           f"{'sections' if span_id else 'spans'}")
                try:
                    number = float(text)
                except ValueError:
                    raise InputError(path, f"line {i}: {key} must be a number") from None
                ident = span_id or section_id
                where = f"{'span' if span_id else 'section'} {ident}" + (
                    " (shield)" if role == "shield" else "") + f" ({path.name})"
                value = _value({key: number}, (key,), where, path, spec.reference_temperature_c)
                rd = spec.roles.setdefault(role, RoleDesign())
                target = rd.spans if span_id else rd.sections
                if ident in target:
                    raise InputError(path, f"line {i}: {role} design for {ident} is given "
                                           "twice")
                target[ident] = value
    except UnicodeDecodeError:
        raise InputError(path, "design file is not UTF-8 text") from None


def parse_design(design: dict[str, Any], source: str | Path | None = None) -> DesignSpec:
    """Validate the ``[design]`` table of a line file.

    Parameters
    ----------
    design
        The raw table (``LineConfig.design``).
    source
        The line file (for error messages and to resolve ``file`` relative to it).

    Returns
    -------
    DesignSpec

    Raises
    ------
    clearaudit.errors.InputError
        For unknown keys, missing reference temperature, values that are not positive numbers,
        two design values at one level, or a bad design CSV.

    Notes
    -----
    Schema in ``docs/construction-check.md``. Top-level value keys and ``[design.sections.*]``
    / ``[design.spans.*]`` apply to phase wires; ``[design.shield]`` holds the same keys for
    shield wires. The most specific value wins: span, then section, then line.
    """
    if not isinstance(design, dict):
        raise InputError(source, "[design] must be a table")
    unknown = set(design) - _TOP_KEYS
    if unknown:
        raise InputError(source, f"unknown key(s) {', '.join(sorted(unknown))} in [design] "
                                 f"(allowed: {', '.join(sorted(_TOP_KEYS))})")
    if "reference_temperature_c" not in design:
        raise InputError(source, "[design] needs reference_temperature_c, the conductor "
                                 "temperature of the design sags and tensions")
    t_ref = _number(design["reference_temperature_c"], "reference_temperature_c", source,
                    low=-80.0, high=300.0)
    pct = design.get("tolerance_percent")
    tol = design.get("tolerance_m")
    if pct is None and tol is None:
        pct, tol = DEFAULT_TOLERANCE_PERCENT, DEFAULT_TOLERANCE_M
    else:
        pct = None if pct is None else _number(pct, "tolerance_percent", source, low=0.0,
                                               high=50.0, strict_low=False)
        tol = None if tol is None else _number(tol, "tolerance_m", source, low=0.0, high=10.0,
                                               strict_low=False)
        if not ((pct or 0.0) > 0 or (tol or 0.0) > 0):
            raise InputError(source, "[design] tolerance_percent and tolerance_m cannot both "
                                     "be zero")
    rule = design.get("tolerance_rule", "larger")
    if rule not in ("larger", "smaller"):
        raise InputError(source, f"[design] tolerance_rule must be 'larger' or 'smaller', "
                                 f"got {rule!r}")
    strain = design.get("strain_model", "auto")
    if strain not in ("auto", "linear", "two-material"):
        raise InputError(source, f"[design] strain_model must be 'auto', 'linear' or "
                                 f"'two-material', got {strain!r}")
    spec = DesignSpec(
        reference_temperature_c=t_ref, tolerance_percent=pct, tolerance_m=tol,
        tolerance_rule=rule,
        swing_tolerance_deg=_number(design.get("swing_tolerance_deg",
                                               DEFAULT_SWING_TOLERANCE_DEG),
                                    "swing_tolerance_deg", source, low=0.0, high=45.0),
        insulator_length_m=(None if design.get("insulator_length_m") is None else _number(
            design["insulator_length_m"], "insulator_length_m", source, low=0.0, high=20.0,
            strict_low=False)),
        insulator_weight_n=_number(design.get("insulator_weight_n", 0.0), "insulator_weight_n",
                                   source, low=0.0, high=1e5, strict_low=False),
        strain_model=strain)
    phase = _role(design, "phase", source, t_ref)
    if phase.line or phase.sections or phase.spans:
        spec.roles["phase"] = phase
    if "shield" in design:
        shield_table = design["shield"]
        if not isinstance(shield_table, dict):
            raise InputError(source, "[design.shield] must be a table")
        unknown = set(shield_table) - _ROLE_KEYS
        if unknown:
            raise InputError(source, f"unknown key(s) {', '.join(sorted(unknown))} in "
                                     f"[design.shield] (allowed: {', '.join(sorted(_ROLE_KEYS))})")
        spec.roles["shield"] = _role(shield_table, "shield", source, t_ref)
    if "file" in design:
        if not isinstance(design["file"], str) or not design["file"]:
            raise InputError(source, "[design] file must be a file name")
        path = Path(design["file"])
        if not path.is_absolute() and source is not None:
            path = Path(source).parent / path
        _read_design_csv(path, spec)
    if not spec.roles:
        raise InputError(source, "[design] gives no design value (horizontal_tension_n, "
                                 "ruling_span_sag_m, percent_rbs, limits, or per-section / "
                                 "per-span tables, or a file)")
    return spec


# ============================================================================ physics
def design_horizontal_tension(value: DesignValue, mechanics: ConductorMechanics,
                              ruling_span_m: float, reference_temperature_c: float,
                              diameter_m: float = 0.0) -> float:
    """Design horizontal tension at the reference temperature from a design value.

    Parameters
    ----------
    value
        A :class:`DesignValue` of kind ``horizontal_tension``, ``ruling_span_sag`` or
        ``limits`` (``sag`` is per span and has no section tension).
    mechanics
        Conductor numbers (bare weight, RBS, strain model).
    ruling_span_m
        Ruling span of the tension section. [m]
    reference_temperature_c
        Design reference conductor temperature. [°C]
    diameter_m
        Conductor diameter, for ice and wind in limit conditions. [m]

    Returns
    -------
    H_d : float
        Horizontal tension of the bare conductor at the reference temperature. [N]

    Notes
    -----
    ``ruling_span_sag``: :math:`H_d = w\\,C` with C the catenary constant of the level ruling
    span with that sag. ``limits``: each limit gives :math:`H_j = p_j\\,\\mathrm{RBS}/100` at
    its own temperature and load; the ruling-span change of state carries it to the
    reference condition; the smallest result satisfies every limit (the governing limit) —
    the stringing-table method of IEEE Std 524 and CIGRE TB 324.
    """
    w = mechanics.weight_n_per_m
    if value.kind == "horizontal_tension":
        return float(value.value)
    if value.kind == "ruling_span_sag":
        return w * float(catenary.catenary_constant_from_sag(ruling_span_m, 0.0, value.value))
    if value.kind == "limits":
        rbs = mechanics.rated_strength_n
        if rbs is None or not rbs > 0:
            raise ValueError("The conductor has no rated breaking strength for percent_rbs.")
        best = math.inf
        for lim in value.limits:
            ice = loading.ice_weight_n_per_m(diameter_m, lim.radial_ice_m) \
                if lim.radial_ice_m else 0.0
            wind = loading.wind_force_n_per_m(diameter_m, lim.radial_ice_m,
                                              lim.wind_pressure_pa) \
                if lim.wind_pressure_pa else 0.0
            w_lim = math.hypot(w + float(ice), float(wind))
            h_lim = lim.percent_rbs / 100.0 * rbs
            h_ref = float(np.asarray(mechanics.final_tension(
                ruling_span_m, h_lim, w_lim, lim.temperature_c, w,
                reference_temperature_c)).reshape(-1)[0])
            best = min(best, h_ref)
        return best
    raise ValueError(f"A design value of kind {value.kind!r} has no section tension.")


def unstressed_length_m(span_length_m: ArrayLike, height_difference_m: ArrayLike,
                        horizontal_tension_n: ArrayLike, unit_weight_n_per_m: ArrayLike,
                        axial_stiffness_n: ArrayLike) -> np.ndarray:
    """Unstressed length of the conductor in a span (at the span's own temperature).

    Parameters
    ----------
    span_length_m
        Horizontal span length, L. [m]
    height_difference_m
        z_B - z_A, h. [m]
    horizontal_tension_n
        Horizontal tension, H. [N]
    unit_weight_n_per_m
        Weight per unit length, w. [N/m]
    axial_stiffness_n
        Modulus times area, EA. [N]

    Returns
    -------
    S0 : numpy.ndarray
        :math:`S_0 = S / (1 + \\bar T / EA)`. [m]

    Notes
    -----
    :math:`S = \\sqrt{h^2 + (2C\\sinh(L/2C))^2}` is the catenary arc length and
    :math:`\\bar T` the arc-averaged tension (:func:`clearaudit.physics.catenary.average_tension`);
    the same small-strain relation as the change of state ([2]_, [3]_ of the module).
    """
    H = np.asarray(horizontal_tension_n, dtype=float)
    w = np.asarray(unit_weight_n_per_m, dtype=float)
    length = catenary.arc_length(span_length_m, height_difference_m, H / w)
    mean = catenary.average_tension(H, w, span_length_m, height_difference_m)
    return length / (1.0 + mean / np.asarray(axial_stiffness_n, dtype=float))


def equalising_clamp_offsets(span_lengths_m: ArrayLike, height_differences_m: ArrayLike,
                             horizontal_tensions_n: ArrayLike, unit_weight_n_per_m: float,
                             axial_stiffness_n: float, *,
                             final_span_lengths_m: ArrayLike | None = None,
                             final_height_differences_m: ArrayLike | None = None
                             ) -> tuple[np.ndarray, float, np.ndarray]:
    """Clamp offsets that give every span of a run of suspension spans one horizontal tension.

    Parameters
    ----------
    span_lengths_m, height_differences_m
        Surveyed span lengths and height differences z_B - z_A, in line order, between two
        fixed ends (dead-ends, or clamps held where they are). [m]
    horizontal_tensions_n
        Surveyed horizontal tension of each span. [N]
    unit_weight_n_per_m
        Conductor weight per unit length. [N/m]
    axial_stiffness_n
        EA of the conductor. [N]
    final_span_lengths_m, final_height_differences_m
        Span geometry with the clamps where they will be (insulators plumb); default the
        surveyed geometry. [m]

    Returns
    -------
    offsets : numpy.ndarray
        Shape (n - 1,): at each interior clamp k (between span k - 1 and span k), the length
        of conductor to move from the ahead span (k) into the back span (k - 1); positive:
        move the clamp point along the conductor towards the ahead span. Unstressed length
        (the stressed length differs by the strain, below 0.1 %). [m]
    H_eq : float
        The common horizontal tension after the offsets. [N]
    delta : numpy.ndarray
        Shape (n,): change of each span's unstressed length. [m]

    Notes
    -----
    All spans are at one temperature, so only the elastic strain enters. The surveyed state
    fixes each span's unstressed length :math:`S_{0,i}` (:func:`unstressed_length_m`). Moving
    conductor through the clamps conserves :math:`\\sum_i S_{0,i}` between the fixed ends;
    the common tension solves

    .. math:: \\sum_i S_0(L_i', h_i', H_{eq}) = \\sum_i S_{0,i}

    (monotone in :math:`H_{eq}`; Brent's method), then
    :math:`\\delta_i = S_0(L_i', h_i', H_{eq}) - S_{0,i}` and the offset at clamp k is
    :math:`m_k = \\sum_{i<k}\\delta_i` (conductor length passed through clamp k from the
    ahead span to the back span; :math:`m_n = 0` by construction). This is the clipping-offset
    correction for inclined spans of IEEE Std 524 ([1]_ of the module), here from the exact
    elastic catenary instead of tables or the parabola.
    """
    L = np.atleast_1d(np.asarray(span_lengths_m, dtype=float))
    h = np.atleast_1d(np.asarray(height_differences_m, dtype=float))
    H = np.atleast_1d(np.asarray(horizontal_tensions_n, dtype=float))
    if L.size < 2 or L.shape != h.shape or L.shape != H.shape:
        raise ValueError("Give at least two spans, with one height difference and one tension "
                         "per span.")
    if np.any(~(L > 0)) or np.any(~(H > 0)) or np.any(~np.isfinite(h)):
        raise ValueError("Span lengths and tensions must be positive and finite.")
    w = float(unit_weight_n_per_m)
    ea = float(axial_stiffness_n)
    if not (w > 0 and ea > 0):
        raise ValueError("The unit weight and axial stiffness must be positive.")
    L2 = L if final_span_lengths_m is None else np.atleast_1d(
        np.asarray(final_span_lengths_m, dtype=float))
    h2 = h if final_height_differences_m is None else np.atleast_1d(
        np.asarray(final_height_differences_m, dtype=float))
    if L2.shape != L.shape or h2.shape != h.shape or np.any(~(L2 > 0)):
        raise ValueError("The final geometry must have one positive length and one height "
                         "difference per span.")
    s0 = unstressed_length_m(L, h, H, w, ea)
    total = float(np.sum(s0))

    def residual(log_h: float) -> float:
        return float(np.sum(unstressed_length_m(L2, h2, math.exp(log_h), w, ea))) - total

    lo, hi = math.log(0.05 * float(H.min())), math.log(20.0 * float(H.max()))
    lo = max(lo, math.log(w * 0.5 * float(L2.max())))  # C >= L/2
    if residual(lo) * residual(hi) > 0:
        raise ValueError("No common tension conserves the conductor length (check the "
                         "geometry).")
    h_eq = math.exp(optimize.brentq(residual, lo, hi, xtol=1e-14, rtol=1e-14, maxiter=200))
    delta = unstressed_length_m(L2, h2, h_eq, w, ea) - s0
    return np.cumsum(delta)[:-1], h_eq, delta


def clamp_vertical_load_n(back_span_m: float, back_height_m: float, ahead_span_m: float,
                          ahead_height_m: float, back_tension_n: float, ahead_tension_n: float,
                          unit_weight_n_per_m: float) -> tuple[float, float]:
    """Vertical load of the conductor at a suspension clamp, from both spans.

    Parameters
    ----------
    back_span_m, back_height_m
        Back span (ends at the clamp): horizontal length and z_B - z_A. [m]
    ahead_span_m, ahead_height_m
        Ahead span (starts at the clamp): horizontal length and z_B - z_A. [m]
    back_tension_n, ahead_tension_n
        Horizontal tensions of the two spans. [N]
    unit_weight_n_per_m
        Weight per unit length. [N/m]

    Returns
    -------
    (V, weight_span) : tuple of float
        Vertical load [N] and weight span, the horizontal distance between the two spans'
        low points [m] (negative under uplift).

    Notes
    -----
    The vertical component of the catenary tension at an end is
    :math:`H\\sinh((x - x_0)/C)`: the weight of the conductor between the low point and
    the end (Irvine 1981, ch. 1). :math:`V = H_b\\sinh((L_b - x_{0b})/C_b)
    + H_a\\sinh(x_{0a}/C_a)`; weight span :math:`L_v = (L_b - x_{0b}) + x_{0a}`.
    """
    w = float(unit_weight_n_per_m)
    cb, ca = back_tension_n / w, ahead_tension_n / w
    x0b = float(catenary.low_point_offset(back_span_m, back_height_m, cb))
    x0a = float(catenary.low_point_offset(ahead_span_m, ahead_height_m, ca))
    vertical = (back_tension_n * math.sinh((back_span_m - x0b) / cb)
                + ahead_tension_n * math.sinh(x0a / ca))
    return vertical, (back_span_m - x0b) + x0a


def insulator_swing_along_line_deg(imbalance_n: ArrayLike, vertical_load_n: ArrayLike,
                                   insulator_weight_n: ArrayLike = 0.0) -> np.ndarray:
    """Swing of a suspension string from plumb along the line under a tension imbalance.

    Parameters
    ----------
    imbalance_n
        Longitudinal imbalance at the clamp, :math:`\\Delta H = H_{back} - H_{ahead}` (whole
        bundle). [N]
    vertical_load_n
        Conductor vertical load at the clamp (whole bundle). [N]
    insulator_weight_n
        Weight of the string and hardware. [N]

    Returns
    -------
    phi : numpy.ndarray
        Swing angle; positive: the clamp is pulled towards the back span. [deg]

    Notes
    -----
    Moment balance of a rigid string about its pivot, its own weight at mid-length:
    :math:`\\tan\\phi = \\Delta H / (V + W_{ins}/2)` — the same balance as the transverse
    wind swing (:func:`clearaudit.physics.loading.insulator_swing_angle_deg`, ASCE MOP 74),
    with the imbalance in place of the wind force.
    """
    dh = np.asarray(imbalance_n, dtype=float)
    vertical = np.asarray(vertical_load_n, dtype=float) + 0.5 * np.asarray(insulator_weight_n,
                                                                           dtype=float)
    if np.any(~(vertical > 0)):
        raise ValueError("The vertical load on the insulator must be positive (uplift: the "
                         "string cannot hang).")
    return np.degrees(np.arctan2(dh, vertical))


# ============================================================================ orchestration
def _num(x: Any) -> float:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return math.nan
    return v


def _ok(x: Any) -> bool:
    return math.isfinite(_num(x))


def _out(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def _status(difference: float, half_width: float, limit: float) -> str:
    d = abs(difference)
    if d + half_width <= limit:
        return "ok"
    if d - half_width > limit:
        return "out_of_tolerance"
    return "uncertain"


@dataclass
class _Context:
    spec: DesignSpec
    t_survey: float
    t_ci: float
    mechanics: dict[str, ConductorMechanics]
    diameters: dict[str, float]
    insulator_length_m: float


def _usable(row: dict | None) -> str:
    """'' when a span row can be checked, else the reason."""
    if row is None:
        return "no fitted wire"
    status = str(row.get("status", ""))
    if status == "not_fitted":
        return "wire not fitted" + (f" ({row.get('note')})" if row.get("note") else "")
    if status == "partial":
        return "partial span (runs off the survey): no complete sag"
    a, b = row.get("attachment_a_local"), row.get("attachment_b_local")
    if a is None or b is None or not np.all(np.isfinite(a)) or not np.all(np.isfinite(b)):
        return "no attachment points"
    for key in ("sag_survey_m", "horizontal_tension_n"):
        if not (_num(row.get(key)) > 0):
            return f"no {key.replace('_', ' ')}"
    return ""


def _geometry(row: dict) -> tuple[float, float]:
    a = np.asarray(row["attachment_a_local"], dtype=float)
    b = np.asarray(row["attachment_b_local"], dtype=float)
    length = _num(row.get("span_length_m"))
    if not length > 0:
        length = float(np.hypot(*(b[:2] - a[:2])))
    return length, float(b[2] - a[2])


def _span_check(row: dict, section_id: str, rs: float, ctx: _Context,
                design: DesignValue | None, h_design: float | None) -> dict:
    spec = ctx.spec
    out: dict[str, Any] = {
        "kind": "span", "section_id": section_id, "span_id": row["span_id"],
        "wire_id": row["wire_id"], "role": row["role"], "status": "not_checked",
        "reference_temperature_c": spec.reference_temperature_c,
        "survey_temperature_c": _out(ctx.t_survey), "survey_temperature_ci95_c": _out(ctx.t_ci),
        "ruling_span_m": _out(rs), "sag_survey_m": _out(_num(row.get("sag_survey_m"))),
        "sag_survey_ci95_m": _out(_num(row.get("sag_survey_ci95_m"))),
        "horizontal_tension_survey_n": _out(_num(row.get("horizontal_tension_n"))),
        "design_source": design.describe() if design else "", "note": "",
    }
    reason = _usable(row)
    if not reason and design is None:
        reason = f"no design value for {row['role']} wires in this span"
    if not reason and not math.isfinite(ctx.t_survey):
        reason = "no survey conductor temperature"
    if not reason and row["role"] not in ctx.mechanics:
        reason = f"no conductor data for {row['role']} wires"
    if reason:
        out["note"] = reason
        return out
    mech = ctx.mechanics[row["role"]]
    w = mech.weight_n_per_m
    length, height = _geometry(row)
    out["span_length_m"], out["height_difference_m"] = length, height
    sag_s = _num(row["sag_survey_m"])
    sag_ci = _num(row.get("sag_survey_ci95_m"))
    sag_ci = sag_ci if math.isfinite(sag_ci) and sag_ci >= 0 else 0.0
    sag_ci = min(sag_ci, 0.5 * sag_s)
    t_ci = ctx.t_ci if math.isfinite(ctx.t_ci) and ctx.t_ci >= 0 else 0.0
    t_ref = spec.reference_temperature_c
    try:
        sags = np.array([sag_s, sag_s + sag_ci, sag_s - sag_ci, sag_s, sag_s])
        temps = np.array([ctx.t_survey] * 3 + [ctx.t_survey + t_ci, ctx.t_survey - t_ci])
        c_s = np.asarray(catenary.catenary_constant_from_sag(length, height, sags), dtype=float)
        h_ref = np.asarray(mech.final_tension(rs, w * c_s, w, temps, w, t_ref), dtype=float)
        sag_ref = np.asarray(catenary.sag(length, height, h_ref / w), dtype=float)
    except ValueError as exc:
        out["note"] = f"change of state failed ({exc})"
        return out
    half = math.hypot(0.5 * (sag_ref[1] - sag_ref[2]), 0.5 * (sag_ref[3] - sag_ref[4]))
    if design.kind == "sag":
        sag_d = float(design.value)
        h_d = w * float(catenary.catenary_constant_from_sag(length, height, sag_d))
    else:
        if h_design is None or not math.isfinite(h_design):
            out["note"] = "design tension could not be computed"
            return out
        h_d = h_design
        sag_d = float(catenary.sag(length, height, h_d / w))
    tol = spec.tolerance_for(sag_d)
    diff = float(sag_ref[0]) - sag_d
    status = _status(diff, half, tol)
    out.update({
        "status": status, "design_horizontal_tension_n": h_d, "design_sag_m": sag_d,
        "horizontal_tension_corrected_n": float(h_ref[0]),
        "sag_corrected_m": float(sag_ref[0]), "sag_corrected_ci95_m": half,
        "sag_difference_m": diff, "sag_difference_percent": 100.0 * diff / sag_d,
        "tolerance_m": tol,
        "deviation": "" if status == "ok" else ("slack" if diff > 0 else "tight"),
    })
    if status == "out_of_tolerance":
        out["note"] = (f"sag {abs(diff):.2f} m {'above' if diff > 0 else 'below'} design at "
                       f"{t_ref:g} °C (tolerance {tol:.2f} m)")
    elif status == "uncertain":
        out["note"] = "the 95 % interval of the corrected sag straddles the tolerance limit"
    return out


def _structure_row(section_id: str, structure_id: str, wire_id: str, role: str,
                   back: str, ahead: str) -> dict:
    return {"kind": "structure", "section_id": section_id, "structure_id": structure_id,
            "wire_id": wire_id, "role": role, "status": "not_checked", "back_span_id": back,
            "ahead_span_id": ahead, "note": ""}


def _direction(row: dict) -> np.ndarray:
    d = np.asarray(row["attachment_b_local"], dtype=float)[:2] - np.asarray(
        row["attachment_a_local"], dtype=float)[:2]
    return d / np.hypot(*d)


def _section_structures(model: Any, section: Any, rows: dict[tuple[str, str], dict],
                        wire_id: str, ctx: _Context) -> list[dict]:
    """Imbalance, swing and offsets at every suspension structure of one section, one wire."""
    spans = [model.span(sid) for sid in section.span_ids]
    spans = [s for s in spans if s is not None]
    role = next((rows[(s.id, wire_id)]["role"] for s in spans if (s.id, wire_id) in rows), "")
    out: list[dict] = []
    joints = []
    for k in range(1, len(spans)):
        back, ahead = spans[k - 1], spans[k]
        sid = back.to_structure
        if sid is None or sid != ahead.from_structure:
            continue
        structure = model.structure(sid)
        if structure is None or getattr(structure, "kind", "") != "suspension":
            continue
        joints.append((k, sid))
    if not joints or role not in ctx.mechanics:
        return out
    mech = ctx.mechanics[role]
    w = mech.weight_n_per_m
    ea = mech.modulus_pa * mech.area_m2
    spec = ctx.spec
    ell = ctx.insulator_length_m if role == "phase" else 0.0
    w_ins = spec.insulator_weight_n if role == "phase" else 0.0
    srows = [rows.get((s.id, wire_id)) for s in spans]
    usable = [not _usable(r) for r in srows]
    per_joint: dict[int, dict] = {}
    for k, sid in joints:
        rb, ra = srows[k - 1], srows[k]
        row = _structure_row(section.id, sid, wire_id, role, spans[k - 1].id, spans[k].id)
        per_joint[k] = row
        out.append(row)
        reason = _usable(rb) or _usable(ra)
        if reason:
            row["note"] = f"{'back' if _usable(rb) else 'ahead'} span: {reason}"
            continue
        n = int(rb.get("bundle_count") or 1)
        hb, ha = _num(rb["horizontal_tension_n"]), _num(ra["horizontal_tension_n"])
        cib = _num(rb.get("horizontal_tension_ci95_n"))
        cia = _num(ra.get("horizontal_tension_ci95_n"))
        ci = math.hypot(cib if math.isfinite(cib) else 0.0, cia if math.isfinite(cia) else 0.0)
        lb, zb = _geometry(rb)
        la, za = _geometry(ra)
        vertical, weight_span = clamp_vertical_load_n(lb, zb, la, za, hb, ha, w)
        dh = hb - ha
        f_v = n * vertical + 0.5 * w_ins
        row.update({"bundle_count": n, "horizontal_tension_back_n": hb,
                    "horizontal_tension_ahead_n": ha, "imbalance_n": dh,
                    "imbalance_ci95_n": ci, "vertical_load_n": n * vertical,
                    "weight_span_m": weight_span, "insulator_length_m": ell,
                    "insulator_weight_n": w_ins})
        if not f_v > 0:
            row["note"] = "uplift: the vertical load at the clamp is not downwards"
            continue
        allowed = math.tan(math.radians(spec.swing_tolerance_deg)) * f_v / n
        phi = float(insulator_swing_along_line_deg(n * dh, n * vertical, w_ins))
        phi_ci = math.degrees(n * ci * f_v / ((n * dh) ** 2 + f_v**2))
        row.update({"allowed_imbalance_n": allowed, "swing_deg": phi, "swing_ci95_deg": phi_ci,
                    "clamp_displacement_m": -ell * math.sin(math.radians(phi)),
                    "status": _status(dh, ci, allowed)})
        if row["status"] == "out_of_tolerance":
            row["note"] = (f"horizontal tension {abs(dh):.0f} N higher in the "
                           f"{'back' if dh > 0 else 'ahead'} span; insulator pulled "
                           f"{abs(phi):.1f}° towards it")
        elif row["status"] == "uncertain":
            row["note"] = "the 95 % interval of the imbalance straddles the allowed imbalance"
    # ---- offsets: whole section when every span is usable, else two spans per structure
    checked = [k for k in per_joint if per_joint[k].get("swing_deg") is not None]
    if not checked:
        return out
    whole = (all(usable) and len(spans) >= 2 and len(joints) == len(spans) - 1)
    try:
        if whole:
            _offsets(range(len(spans)), [k for k, _ in joints], srows, per_joint, w, ea, ell,
                     w_ins, "section")
        else:
            for k in checked:
                _offsets([k - 1, k], [k], srows, per_joint, w, ea, ell, w_ins, "two_span")
    except ValueError as exc:
        for k in checked:
            per_joint[k]["note"] = "; ".join(
                p for p in (per_joint[k]["note"], f"no clamp offset ({exc})") if p)
    return out


def _plumb_geometry(span_idx: Sequence[int], joints: Sequence[int], srows: list[dict],
                    tensions: np.ndarray, w: float, ell: float, w_ins: float
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Surveyed (L, h) and (L', h') with the joints' clamps moved back under their pivots."""
    idx = list(span_idx)
    a = [np.asarray(srows[i]["attachment_a_local"], dtype=float).copy() for i in idx]
    b = [np.asarray(srows[i]["attachment_b_local"], dtype=float).copy() for i in idx]
    lengths = np.array([_geometry(srows[i])[0] for i in idx])
    heights = np.array([_geometry(srows[i])[1] for i in idx])
    pos = {i: j for j, i in enumerate(idx)}
    a2 = [p.copy() for p in a]
    b2 = [p.copy() for p in b]
    for k in joints:
        jb, ja = pos[k - 1], pos[k]
        rb, ra = srows[k - 1], srows[k]
        n = int(rb.get("bundle_count") or 1)
        lb, zb = lengths[jb], heights[jb]
        la, za = lengths[ja], heights[ja]
        vertical, _ = clamp_vertical_load_n(lb, zb, la, za, tensions[jb], tensions[ja], w)
        phi = math.radians(float(insulator_swing_along_line_deg(
            n * (tensions[jb] - tensions[ja]), n * vertical, w_ins)))
        along = _direction(rb) + _direction(ra)
        along /= np.hypot(*along)
        clamp = 0.5 * (b[jb] + a[ja])
        plumb = clamp + np.array([ell * math.sin(phi) * along[0],
                                  ell * math.sin(phi) * along[1],
                                  ell * (math.cos(phi) - 1.0)])
        b2[jb], a2[ja] = plumb, plumb
    l2 = np.array([np.hypot(*(q[:2] - p[:2])) for p, q in zip(a2, b2, strict=True)])
    h2 = np.array([q[2] - p[2] for p, q in zip(a2, b2, strict=True)])
    return lengths, heights, l2, h2


def _offsets(span_idx: Sequence[int], joints: Sequence[int], srows: list[dict],
             per_joint: dict[int, dict], w: float, ea: float, ell: float, w_ins: float,
             method: str) -> None:
    idx = list(span_idx)
    tensions = np.array([_num(srows[i]["horizontal_tension_n"]) for i in idx])
    cis = np.array([_num(srows[i].get("horizontal_tension_ci95_n")) for i in idx])
    cis = np.where(np.isfinite(cis), cis, 0.0)

    def solve(h_values: np.ndarray) -> tuple[np.ndarray, float]:
        lengths, heights, l2, h2 = _plumb_geometry(idx, joints, srows, h_values, w, ell, w_ins)
        offsets, h_eq, _ = equalising_clamp_offsets(lengths, heights, h_values, w, ea,
                                                    final_span_lengths_m=l2,
                                                    final_height_differences_m=h2)
        return offsets, h_eq

    offsets, h_eq = solve(tensions)
    var = np.zeros_like(offsets)
    for j in range(len(idx)):
        if cis[j] <= 0:
            continue
        up, down = tensions.copy(), tensions.copy()
        up[j] += cis[j]
        down[j] -= min(cis[j], 0.5 * tensions[j])
        var += (0.5 * (solve(up)[0] - solve(down)[0])) ** 2
    pos = {i: j for j, i in enumerate(idx)}
    for k in joints:
        m = pos[k] - 1          # offsets[m] is at the clamp between spans idx[m] and idx[m+1]
        row = per_joint[k]
        row.update({"clamp_offset_m": float(offsets[m]),
                    "clamp_offset_ci95_m": float(math.sqrt(var[m])),
                    "equalised_tension_n": h_eq, "offset_method": method})


def check_tolerance(model: Any, audit: Any, config: Any,
                    conductors: dict[str, Any]) -> list[dict]:
    """Construction check of a strung line against its design.

    Parameters
    ----------
    model
        :class:`clearaudit.model.line.LineModel` (sections, spans, structure kinds).
    audit
        :class:`clearaudit.audit.engine.AuditResult`: ``span_rows`` (fitted attachment points
        in local metres, sag and tension at survey with 95 % half-widths, status) and
        ``survey_temperature`` (``value_c``, ``ci95_c``). [m, N, °C]
    config
        :class:`clearaudit.config.LineConfig`; ``config.design`` is the ``[design]`` table,
        ``config.source`` the line file.
    conductors
        ``{"phase": Conductor, "shield": Conductor}``.

    Returns
    -------
    rows : list of dict
        ``tolerance.csv`` rows (:data:`TOLERANCE_COLUMNS`): one ``kind = "span"`` row per wire
        per span (model order), then one ``kind = "structure"`` row per wire per suspension
        structure inside a tension section (line order).

    Raises
    ------
    clearaudit.errors.InputError
        For a bad ``[design]`` table or design file (:func:`parse_design`).

    Notes
    -----
    Spans: module notes, step 2. The design sag of a span follows from the design tension with
    the surveyed span length and height difference (the design of a span hanging where it was
    built). Structures: module notes, step 3; the offsets are solved for the whole tension
    section when every span of it is fitted (``offset_method = "section"``), else for the two
    spans at each structure with the neighbouring clamps held (``"two_span"``). The survey is
    taken as calm (wire plane vertical). Shield wires are clamped without a string
    (insulator length and weight zero).
    """
    spec = parse_design(config.design, getattr(config, "source", None))
    survey = getattr(audit, "survey_temperature", None) or {}
    t_s, t_ci = _num(survey.get("value_c")), _num(survey.get("ci95_c"))
    mechanics, diameters = {}, {}
    for role, conductor in (conductors or {}).items():
        if conductor is None:
            continue
        try:
            mechanics[role] = conductor_mechanics(conductor, spec.strain_model)
        except ValueError as exc:
            raise InputError(getattr(config, "source", None),
                             f"[design] strain_model: {exc}") from None
        diameters[role] = float(getattr(conductor, "diameter_m", 0.0) or 0.0)
    ell = spec.insulator_length_m
    if ell is None:
        ell = _num((getattr(audit, "summary", None) or {}).get("insulator_length_m"))
    if not math.isfinite(ell):
        from .engine import default_insulator_length_m

        voltage = getattr(getattr(config, "line", None), "voltage_kv", None)
        ell = default_insulator_length_m(voltage) if voltage else 0.0
    ctx = _Context(spec, t_s, t_ci, mechanics, diameters, float(ell))
    rows = {(r["span_id"], r["wire_id"]): r for r in audit.span_rows}
    section_of = {sid: sec for sec in model.sections for sid in sec.span_ids}
    span_out: list[dict] = []
    h_cache: dict[tuple[str, str, str], float | None] = {}
    rs_of: dict[str, float] = {}
    for sec in model.sections:
        rs = getattr(sec, "ruling_span_m", None)
        if not rs:
            lengths = [_num(r.get("span_length_m")) for r in audit.span_rows
                       if r["span_id"] in sec.span_ids and _num(r.get("span_length_m")) > 0]
            rs = ruling_span(lengths) if lengths else math.nan
        rs_of[sec.id] = float(rs)
    for span in model.spans:
        sec = section_of.get(span.id)
        section_id = sec.id if sec is not None else (span.section_id or "")
        rs = rs_of.get(section_id, math.nan)
        for wire in span.wires:
            row = rows.get((span.id, wire.wire_id))
            if row is None or row.get("role") not in _ROLES:
                continue
            role = row["role"]
            design = spec.roles[role].lookup(section_id, span.id) if role in spec.roles \
                else None
            h_design = None
            if design is not None and design.kind != "sag" and role in mechanics:
                key = (role, section_id, design.where)
                if key not in h_cache:
                    try:
                        h_cache[key] = design_horizontal_tension(
                            design, mechanics[role], rs if math.isfinite(rs) else
                            _geometry(row)[0], spec.reference_temperature_c, diameters[role])
                    except ValueError as exc:
                        log.warning("design tension for %s: %s", design.where, exc)
                        h_cache[key] = None
                h_design = h_cache[key]
            span_out.append(_span_check(row, section_id, rs, ctx, design, h_design))
    known_spans = {s.id for s in model.spans}
    known_sections = {s.id for s in model.sections}
    for role, rd in spec.roles.items():
        for sid in rd.spans:
            if sid not in known_spans:
                span_out.append({"kind": "span", "span_id": sid, "role": role,
                                 "status": "not_checked", "design_source": rd.spans[sid].where,
                                 "note": f"design value given for span {sid}, which is not in "
                                         "the line model"})
        for sid in rd.sections:
            if sid not in known_sections:
                span_out.append({"kind": "span", "section_id": sid, "role": role,
                                 "status": "not_checked",
                                 "design_source": rd.sections[sid].where,
                                 "note": f"design value given for section {sid}, which is not "
                                         "in the line model"})
    structure_out: list[dict] = []
    wire_ids = list(dict.fromkeys(r["wire_id"] for r in audit.span_rows
                                  if r.get("role") in _ROLES))
    order = {s.id: i for i, s in enumerate(model.structures)}
    for sec in model.sections:
        found: list[dict] = []
        for wire_id in wire_ids:
            found.extend(_section_structures(model, sec, rows, wire_id, ctx))
        found.sort(key=lambda r: (order.get(r["structure_id"], 0),
                                  wire_ids.index(r["wire_id"])))
        structure_out.extend(found)
    return span_out + structure_out

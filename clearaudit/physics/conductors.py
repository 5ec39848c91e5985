"""Conductor library: properties of common bare overhead conductors, in SI units.

The library lives in ``clearaudit/data/conductors.csv`` (one row per conductor, the unit in each
column name, the provenance of every row in its ``source`` column). This module reads it into
frozen :class:`Conductor` records, looks conductors up by the names engineers use ("795 26/7
ACSR", "795 kcmil 26/7", "795-26/7", "Drake") and builds conductors from a line file's
``[conductors.*]`` table, where explicit keys override the library.

Resistance at any temperature is interpolated (or extrapolated) linearly between the tabulated
25 °C and 75 °C AC resistances, as IEEE Std 738 recommends.

References
----------
.. [1] IEEE Std 738-2012, *Standard for Calculating the Current-Temperature Relationship of
   Bare Overhead Conductors*, clause 4.4.4 (resistance, linear interpolation).
.. [2] Aluminum Association, *Aluminum Electrical Conductor Handbook*, 3rd ed. (1989):
   conductor tables (ACSR, AAC, AAAC) — the library's memory values follow its layout.
"""
from __future__ import annotations

import csv
import difflib
import math
import re
from dataclasses import dataclass, fields, replace
from functools import lru_cache
from importlib import resources
from typing import Any

import numpy as np

__all__ = [
    "Conductor",
    "conductor_from_config",
    "list_conductors",
    "lookup_conductor",
    "resistance_at_temperature",
]

_KINDS = ("acsr", "acss", "aac", "aaac", "ehs", "acs")


@dataclass(frozen=True)
class Conductor:
    """Properties of one bare overhead conductor (SI units; the unit is in each field name).

    Attributes
    ----------
    name : str
        Library name, e.g. ``"795 kcmil 26/7 ACSR"``; ``"custom"`` for a user-defined one.
    code_word : str
        Trade code word (``"Drake"``), empty when there is none.
    kind : str
        ``ACSR``, ``ACSS``, ``AAC``, ``AAAC``, ``EHS`` (galvanised steel strand), ``ACS``
        (aluminium-clad steel) or ``custom``.
    size_kcmil : float
        Aluminium area in kcmil (NaN for steel and ACS). [kcmil]
    stranding : str
        ``"26/7"`` (aluminium/steel strands) or the strand count ``"37"``.
    diameter_m : float
        Overall diameter. [m]
    area_total_m2 : float
        Total metallic cross-section. [m²]
    area_outer_m2, area_core_m2 : float
        Cross-section of the outer (aluminium) strands and of the core (steel); the core is 0
        for homogeneous conductors. [m²]
    unit_weight_n_per_m : float
        Weight per length of bare conductor. [N/m]
    rated_strength_n : float
        Rated breaking strength. [N]
    modulus_final_pa : float
        Final (after-creep, linear composite) modulus of elasticity of the whole conductor. [Pa]
    modulus_outer_pa, modulus_core_pa : float
        Per-material moduli (core NaN when there is no core). [Pa]
    thermal_expansion_per_c : float
        Composite coefficient of linear thermal expansion. [1/°C]
    thermal_expansion_outer_per_c, thermal_expansion_core_per_c : float
        Per-material coefficients (core NaN when there is no core). [1/°C]
    resistance_ac_25c_ohm_per_m, resistance_ac_75c_ohm_per_m : float
        60 Hz AC resistance at 25 °C and 75 °C. [Ω/m]
    max_operating_temperature_c : float
        Typical maximum operating temperature (NaN for shield wires). [°C]
    source : str
        Where each value comes from.
    """

    name: str
    code_word: str
    kind: str
    size_kcmil: float
    stranding: str
    diameter_m: float
    area_total_m2: float
    area_outer_m2: float
    area_core_m2: float
    unit_weight_n_per_m: float
    rated_strength_n: float
    modulus_final_pa: float
    modulus_outer_pa: float
    modulus_core_pa: float
    thermal_expansion_per_c: float
    thermal_expansion_outer_per_c: float
    thermal_expansion_core_per_c: float
    resistance_ac_25c_ohm_per_m: float
    resistance_ac_75c_ohm_per_m: float
    max_operating_temperature_c: float
    source: str

    @property
    def has_core(self) -> bool:
        """True when separate core properties are known (two-material model possible)."""
        return (
            self.area_core_m2 > 0
            and math.isfinite(self.modulus_core_pa)
            and math.isfinite(self.thermal_expansion_core_per_c)
        )

    @property
    def unit_mass_kg_per_m(self) -> float:
        """Mass per length, weight / standard gravity. [kg/m]"""
        return self.unit_weight_n_per_m / 9.80665

    def resistance_ohm_per_m(self, temperature_c):
        """AC resistance at a conductor temperature, see :func:`resistance_at_temperature`.

        Parameters
        ----------
        temperature_c
            Conductor temperature. [°C]

        Returns
        -------
        resistance : AC resistance per length. [Ω/m]
        """
        return resistance_at_temperature(
            temperature_c, self.resistance_ac_25c_ohm_per_m, self.resistance_ac_75c_ohm_per_m
        )


def resistance_at_temperature(
    temperature_c,
    resistance_low_ohm_per_m,
    resistance_high_ohm_per_m,
    temperature_low_c: float = 25.0,
    temperature_high_c: float = 75.0,
):
    """Resistance at a temperature by linear interpolation between two tabulated values.

    Parameters
    ----------
    temperature_c
        Conductor temperature. [°C]
    resistance_low_ohm_per_m
        Resistance at ``temperature_low_c``. [Ω/m]
    resistance_high_ohm_per_m
        Resistance at ``temperature_high_c``. [Ω/m]
    temperature_low_c, temperature_high_c
        The two temperatures of the tabulated values. [°C]

    Returns
    -------
    resistance : Resistance at ``temperature_c`` (extrapolated outside the two values). [Ω/m]

    Notes
    -----
    .. math:: R(T) = R_{low} + \\frac{R_{high} - R_{low}}{T_{high} - T_{low}} (T - T_{low})

    References
    ----------
    .. [1] IEEE Std 738-2012, clause 4.4.4, Eq. (10).
    """
    if temperature_high_c == temperature_low_c:
        raise ValueError("The two reference temperatures of the resistance must differ.")
    t = np.asarray(temperature_c, dtype=float)
    slope = (resistance_high_ohm_per_m - resistance_low_ohm_per_m) / (
        temperature_high_c - temperature_low_c
    )
    r = resistance_low_ohm_per_m + slope * (t - temperature_low_c)
    return float(r) if r.ndim == 0 else r


# --------------------------------------------------------------------------- library file
_STRING_FIELDS = {"name", "code_word", "kind", "stranding", "source"}


def _to_float(text: str) -> float:
    text = text.strip()
    return float("nan") if text == "" else float(text)


@lru_cache(maxsize=1)
def _library() -> tuple[Conductor, ...]:
    path = resources.files("clearaudit").joinpath("data/conductors.csv")
    with path.open("r", encoding="utf-8", newline="") as fh:
        lines = [line for line in fh if not line.startswith("#")]
    rows = list(csv.DictReader(lines))
    names = [f.name for f in fields(Conductor)]
    out = []
    for row in rows:
        values = {
            k: (row[k].strip() if k in _STRING_FIELDS else _to_float(row[k])) for k in names
        }
        out.append(Conductor(**values))
    return tuple(out)


def list_conductors() -> list[Conductor]:
    """All conductors of the built-in library, in file order.

    Returns
    -------
    conductors : list of :class:`Conductor`
    """
    return list(_library())


# --------------------------------------------------------------------------- name lookup
def _normalise(text: str) -> str:
    s = text.lower().replace("no.", "no ")
    s = re.sub(r"[\"“”″']", " ", s)
    s = re.sub(r"[-_,;()]", " ", s)
    s = re.sub(r"\b(kcmil|mcm|awg|inch|in|strand|strands|steel)\b", " ", s)
    return " ".join(s.split())


def _size_tokens(size_kcmil: float, name: str) -> set[str]:
    tokens = set()
    m = re.match(r"^\s*([1-4]/0)\s+awg", name.lower())
    if m:
        tokens.add(m.group(1))
    if math.isfinite(size_kcmil):
        tokens.add(f"{size_kcmil:g}")
        tokens.add(str(int(size_kcmil)))  # "336" for 336.4, "1033" for 1033.5
    return tokens


def _tokens(conductor: Conductor) -> set[str]:
    tokens = set(_normalise(conductor.name).split())
    tokens |= _size_tokens(conductor.size_kcmil, conductor.name)
    tokens.add(conductor.kind.lower())
    if conductor.code_word:
        tokens.add(conductor.code_word.lower())
    return tokens


def _query_tokens(query: str) -> list[str]:
    out = []
    for tok in _normalise(query).split():
        if re.fullmatch(r"\d+\.0+", tok):
            tok = tok.split(".")[0]
        out.append(tok)
    return out


def lookup_conductor(name: str) -> Conductor:
    """Find a library conductor by name, size and stranding, or code word.

    Accepted forms (case-insensitive) include ``"795 kcmil 26/7 ACSR"``, ``"795 26/7 ACSR"``,
    ``"795 kcmil 26/7"``, ``"795-26/7"``, ``"Drake"``, ``"Drake ACSS"``, ``"1/0 6/1"``,
    ``"3/8 EHS"`` and ``"7 No. 8 ACS"``. When the words match several conductors that differ
    only in kind (ACSR and ACSS share sizes and code words), ACSR is chosen.

    Parameters
    ----------
    name
        Conductor description.

    Returns
    -------
    conductor : :class:`Conductor`

    Raises
    ------
    ValueError
        If no conductor matches (the message lists close matches), or several match.
    """
    if not isinstance(name, str) or not name.strip():
        raise ValueError("A conductor name must be a non-empty string.")
    library = _library()
    query_norm = _normalise(name)
    exact = [c for c in library if _normalise(c.name) == query_norm]
    if len(exact) == 1:
        return exact[0]
    words = _query_tokens(name)
    candidates = [c for c in library if set(words) <= _tokens(c)]
    if len(candidates) > 1:
        acsr = [c for c in candidates if c.kind == "ACSR"]
        if len(acsr) == 1 and not (set(words) & set(_KINDS)):
            return acsr[0]
        listing = "; ".join(c.name + (f" ({c.code_word})" if c.code_word else "") for c in candidates)
        raise ValueError(f"Conductor {name!r} is ambiguous; it matches: {listing}.")
    if len(candidates) == 1:
        return candidates[0]
    choices = {}
    for c in library:
        choices[_normalise(c.name)] = c.name
        if c.code_word:
            choices.setdefault(c.code_word.lower(), f"{c.code_word} ({c.name})")
    close = difflib.get_close_matches(query_norm, list(choices), n=5, cutoff=0.5)
    hint = (
        " Close matches: " + "; ".join(choices[k] for k in close) + "."
        if close
        else " See list_conductors() for the names in the library."
    )
    raise ValueError(f"Conductor {name!r} is not in the library.{hint}")


# --------------------------------------------------------------------------- config
_CONFIG_KEYS = {
    "diameter_m": "diameter_m",
    "area_m2": "area_total_m2",
    "weight_n_per_m": "unit_weight_n_per_m",
    "rated_strength_n": "rated_strength_n",
    "modulus_pa": "modulus_final_pa",
    "thermal_expansion_per_c": "thermal_expansion_per_c",
    "resistance_25c_ohm_per_m": "resistance_ac_25c_ohm_per_m",
    "resistance_75c_ohm_per_m": "resistance_ac_75c_ohm_per_m",
    "max_operating_temperature_c": "max_operating_temperature_c",
}
_REQUIRED_CUSTOM = ("diameter_m", "area_m2", "weight_n_per_m", "modulus_pa", "thermal_expansion_per_c")
_NAME_KEYS = ("name", "conductor", "library")
# Overriding any of these makes the per-material (two-material model) data inconsistent.
_COMPOSITE_KEYS = {"area_m2", "modulus_pa", "thermal_expansion_per_c"}


def conductor_from_config(table: dict[str, Any]) -> Conductor:
    """Build a conductor from a line file's ``[conductors.*]`` table.

    Parameters
    ----------
    table
        Mapping with an optional library name (key ``name``; ``conductor`` and ``library`` are
        accepted too) and optional explicit values: ``diameter_m`` [m], ``area_m2`` [m²],
        ``weight_n_per_m`` [N/m], ``rated_strength_n`` [N], ``modulus_pa`` [Pa],
        ``thermal_expansion_per_c`` [1/°C], ``resistance_25c_ohm_per_m`` and
        ``resistance_75c_ohm_per_m`` [Ω/m], ``max_operating_temperature_c`` [°C].

    Returns
    -------
    conductor : :class:`Conductor`
        The library conductor with the explicit values applied. Explicit keys always win.
        Without a name, ``diameter_m``, ``area_m2``, ``weight_n_per_m``, ``modulus_pa`` and
        ``thermal_expansion_per_c`` are required; missing optional values are NaN. When
        ``area_m2``, ``modulus_pa`` or ``thermal_expansion_per_c`` override a library value, the
        per-material (outer/core) values are set to NaN so that they cannot be mixed with the
        overridden composite values.

    Raises
    ------
    ValueError
        Unknown keys, non-numeric or non-positive values, an unknown name, or too few keys for a
        custom conductor.
    """
    if not isinstance(table, dict):
        raise ValueError("A conductor definition must be a table of keys and values.")
    unknown = set(table) - set(_CONFIG_KEYS) - set(_NAME_KEYS)
    if unknown:
        raise ValueError(
            f"Unknown conductor key(s): {', '.join(sorted(unknown))}. "
            f"Known keys: {', '.join(_NAME_KEYS[:1] + tuple(_CONFIG_KEYS))}."
        )
    names = [table[k] for k in _NAME_KEYS if k in table]
    if len(names) > 1:
        raise ValueError("Give the conductor's library name once (use the key 'name').")
    overrides: dict[str, float] = {}
    for key, field_name in _CONFIG_KEYS.items():
        if key not in table:
            continue
        value = table[key]
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise ValueError(f"Conductor key {key!r} must be a number, got {value!r}.")
        value = float(value)
        if key != "max_operating_temperature_c" and not (value > 0 and math.isfinite(value)):
            raise ValueError(f"Conductor key {key!r} must be positive and finite, got {value!r}.")
        overrides[field_name] = value

    if names:
        base = lookup_conductor(str(names[0]))
        changes: dict[str, Any] = dict(overrides)
        if overrides:
            changes["source"] = (
                base.source
                + "; overridden by the line file: "
                + ", ".join(k for k in _CONFIG_KEYS if k in table)
            )
        if _COMPOSITE_KEYS & set(table):
            nan = float("nan")
            changes.update(
                area_outer_m2=nan, area_core_m2=nan, modulus_outer_pa=nan, modulus_core_pa=nan,
                thermal_expansion_outer_per_c=nan, thermal_expansion_core_per_c=nan,
            )
        return replace(base, **changes)

    missing = [k for k in _REQUIRED_CUSTOM if k not in table]
    if missing:
        raise ValueError(
            "A conductor without a library name needs explicit values for "
            + ", ".join(missing)
            + "."
        )
    nan = float("nan")
    area = overrides["area_total_m2"]
    return Conductor(
        name="custom",
        code_word="",
        kind="custom",
        size_kcmil=nan,
        stranding="",
        diameter_m=overrides["diameter_m"],
        area_total_m2=area,
        area_outer_m2=nan,
        area_core_m2=nan,
        unit_weight_n_per_m=overrides["unit_weight_n_per_m"],
        rated_strength_n=overrides.get("rated_strength_n", nan),
        modulus_final_pa=overrides["modulus_final_pa"],
        modulus_outer_pa=nan,
        modulus_core_pa=nan,
        thermal_expansion_per_c=overrides["thermal_expansion_per_c"],
        thermal_expansion_outer_per_c=nan,
        thermal_expansion_core_per_c=nan,
        resistance_ac_25c_ohm_per_m=overrides.get("resistance_ac_25c_ohm_per_m", nan),
        resistance_ac_75c_ohm_per_m=overrides.get("resistance_ac_75c_ohm_per_m", nan),
        max_operating_temperature_c=overrides.get("max_operating_temperature_c", nan),
        source="custom conductor defined in the line file",
    )

"""Display units and number formatting for the report and the viewer.

Values are SI inside (m, N, °C); they are converted only here, at display, with the exact factors
of :mod:`clearaudit.units`. Every formatted number carries its unit.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from clearaudit.units import UNIT_SYSTEMS, c_to_f

MISSING = "—"


def _finite(value) -> float | None:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


@dataclass(frozen=True)
class DisplayUnits:
    """One unit system for display (``metric`` or ``imperial``).

    Parameters
    ----------
    system
        ``"metric"`` (m, kN, °C) or ``"imperial"`` (ft, lbf, °F).
    """

    system: str = "metric"

    def __post_init__(self):
        if self.system not in UNIT_SYSTEMS:
            raise ValueError(
                f"units must be one of {', '.join(sorted(UNIT_SYSTEMS))}, not {self.system!r}.")

    @property
    def length_unit(self) -> str:
        """Symbol of the display length unit."""
        return UNIT_SYSTEMS[self.system]["length"][0]

    @property
    def length_factor(self) -> float:
        """Display length units per metre. [unit/m]"""
        return UNIT_SYSTEMS[self.system]["length"][1]

    @property
    def force_unit(self) -> str:
        """Symbol of the display force unit."""
        return UNIT_SYSTEMS[self.system]["force"][0]

    @property
    def force_factor(self) -> float:
        """Display force units per newton. [unit/N]"""
        return UNIT_SYSTEMS[self.system]["force"][1]

    @property
    def temperature_unit(self) -> str:
        """Symbol of the display temperature unit."""
        return UNIT_SYSTEMS[self.system]["temperature"]

    def length(self, value_m):
        """Convert metres to the display length unit (arrays too)."""
        return value_m * self.length_factor

    def temperature(self, value_c: float) -> float:
        """Convert °C to the display temperature unit."""
        return value_c if self.system == "metric" else c_to_f(value_c)

    # ---- formatting -----------------------------------------------------------------------------
    def fmt_length(self, value_m, digits: int = 2, ci95_m=None) -> str:
        """A length with its unit, e.g. ``"12.34 ± 0.06 m"``; ``"—"`` when missing."""
        v = _finite(value_m)
        if v is None:
            return MISSING
        text = f"{self.length(v):,.{digits}f}"
        ci = _finite(ci95_m)
        if ci is not None:
            text += f" ± {self.length(ci):,.{digits}f}"
        return f"{text} {self.length_unit}"

    def fmt_force(self, value_n, ci95_n=None) -> str:
        """A force with its unit, e.g. ``"20.8 ± 0.2 kN"``; ``"—"`` when missing."""
        v = _finite(value_n)
        if v is None:
            return MISSING
        digits = 1 if self.system == "metric" else 0
        ci = _finite(ci95_n)
        if ci is not None and ci > 0:
            # show the interval with two significant digits (never "± 0.0")
            digits = max(digits, min(4, 1 - int(math.floor(math.log10(ci * self.force_factor)))))
        text = f"{v * self.force_factor:,.{digits}f}"
        if ci is not None:
            text += f" ± {ci * self.force_factor:,.{digits}f}"
        return f"{text} {self.force_unit}"

    def fmt_temperature(self, value_c, digits: int = 1) -> str:
        """A temperature with its unit; ``"—"`` when missing."""
        v = _finite(value_c)
        if v is None:
            return MISSING
        return f"{self.temperature(v):.{digits}f} {self.temperature_unit}"


def fmt_percent(value, digits: int = 1, *, fraction: bool = False) -> str:
    """A percentage (``fraction=True`` when the value is 0–1); ``"—"`` when missing."""
    v = _finite(value)
    if v is None:
        return MISSING
    return f"{v * 100 if fraction else v:.{digits}f} %"


def fmt_number(value, digits: int = 0, unit: str = "") -> str:
    """A plain number with an optional unit; ``"—"`` when missing."""
    v = _finite(value)
    if v is None:
        return MISSING
    text = f"{v:,.{digits}f}"
    return f"{text} {unit}" if unit else text


def crs_unit_name(unit_m: float) -> str:
    """Name of a CRS linear unit from its length in metres."""
    if abs(unit_m - 1.0) < 1e-12:
        return "m"
    if abs(unit_m - 0.3048) < 1e-12:
        return "ft"
    if abs(unit_m - 1200.0 / 3937.0) < 1e-12:
        return "US ft"
    return f"{unit_m:g} m"

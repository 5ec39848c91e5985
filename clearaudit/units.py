"""Unit conversions at the edges. Everything inside clearaudit is SI (m, N, Pa, °C).

Conversion factors are exact by definition:
international foot = 0.3048 m; US survey foot = 1200/3937 m (NIST Handbook 44, Appendix C);
pound-force = 4.4482216152605 N; pound-mass = 0.45359237 kg.
"""
from __future__ import annotations

FOOT_M = 0.3048
US_SURVEY_FOOT_M = 1200.0 / 3937.0
POUND_FORCE_N = 4.4482216152605
STANDARD_GRAVITY = 9.80665  # m/s², CGPM 1901 (exact)

LB_PER_FT_TO_N_PER_M = POUND_FORCE_N / FOOT_M
LB_PER_FT2_TO_PA = POUND_FORCE_N / FOOT_M**2
INCH_M = 0.0254


def c_to_f(t_c: float) -> float:
    """Convert °C to °F."""
    return t_c * 9.0 / 5.0 + 32.0


def f_to_c(t_f: float) -> float:
    """Convert °F to °C."""
    return (t_f - 32.0) * 5.0 / 9.0


# Unit systems for the report and viewer.
UNIT_SYSTEMS = {
    "metric": {"length": ("m", 1.0), "force": ("kN", 1e-3), "temperature": "°C"},
    "imperial": {"length": ("ft", 1.0 / FOOT_M), "force": ("lbf", 1.0 / POUND_FORCE_N),
                 "temperature": "°F"},
}

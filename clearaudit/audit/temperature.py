"""Conductor temperature during the survey flight, with its uncertainty.

Three ways, in order of preference:

1. **given** — the line file's ``[survey] conductor_temperature_c`` (± its stated uncertainty);
2. **heat balance (IEEE 738)** — from the weather and the current during the flight
   (:func:`clearaudit.physics.thermal.conductor_temperature`); the uncertainty is the quadrature
   sum of the temperature changes for plausible errors in the inputs (ambient ±2 °C, wind speed
   ×0.5 and ×1.5, current ±10 %, solar gain on/off when the time is unknown) plus a 2 °C model
   allowance (common practice (no source)). Without a current, 0 A is assumed and the
   uncertainty includes the rise at a typical 30 % of the conductor's 75 °C rating;
3. **default** — the ambient temperature, or 25 °C, with a wide uncertainty (±20 °C), clearly
   labelled: every MOT projection then carries a large uncertainty.

References
----------
.. [1] IEEE Std 738-2012, clause 4 (steady-state heat balance).
"""
from __future__ import annotations

import datetime as _dt
import math
from typing import Any

import numpy as np

from clearaudit.physics import thermal

__all__ = ["DEFAULT_TEMPERATURE_C", "DEFAULT_UNCERTAINTY_C", "survey_conductor_temperature"]

DEFAULT_TEMPERATURE_C = 25.0
DEFAULT_UNCERTAINTY_C = 20.0
MODEL_ALLOWANCE_C = 2.0


def survey_conductor_temperature(survey: Any, conductor: Any, *,
                                 latitude_deg: float | None = None,
                                 elevation_m: float = 0.0,
                                 line_azimuth_deg: float = 90.0) -> dict[str, Any]:
    """Conductor temperature at survey time.

    Parameters
    ----------
    survey
        :class:`clearaudit.config.SurveySettings` (conductor_temperature_c and its uncertainty,
        or ambient_temperature_c, wind_speed_m_s, wind_angle_deg, current_a, datetime,
        latitude_deg, solar_absorptivity, emissivity).
    conductor
        The phase :class:`~clearaudit.physics.conductors.Conductor` (diameter, resistances).
    latitude_deg
        Latitude of the line when the survey settings give none (from the CRS). [deg]
    elevation_m
        Line elevation above sea level. [m]
    line_azimuth_deg
        Azimuth of the line, clockwise from north. [deg]

    Returns
    -------
    result : dict
        ``value_c`` [°C], ``ci95_c`` (95 % half-width) [°C], ``method`` (``"given"``,
        ``"heat balance (IEEE 738)"`` or ``"default"``), ``note`` (a sentence), ``inputs``.
    """
    given = getattr(survey, "conductor_temperature_c", None)
    if given is not None:
        ci = float(getattr(survey, "conductor_temperature_uncertainty_c", 5.0))
        return {"value_c": float(given), "ci95_c": ci, "method": "given",
                "note": f"given in the line file: {float(given):.1f} ± {ci:.1f} °C",
                "inputs": {}}
    ambient = getattr(survey, "ambient_temperature_c", None)
    if ambient is None:
        return {"value_c": DEFAULT_TEMPERATURE_C, "ci95_c": DEFAULT_UNCERTAINTY_C,
                "method": "default",
                "note": (f"DEFAULT: no conductor temperature, weather or current given; "
                         f"{DEFAULT_TEMPERATURE_C:.0f} ± {DEFAULT_UNCERTAINTY_C:.0f} °C assumed. "
                         "Give [survey] conductor_temperature_c or the weather and current."),
                "inputs": {}}
    ambient = float(ambient)
    current = getattr(survey, "current_a", None)
    wind = max(float(getattr(survey, "wind_speed_m_s", 0.61)), 0.0)
    angle = float(getattr(survey, "wind_angle_deg", 90.0))
    lat = getattr(survey, "latitude_deg", None)
    lat = latitude_deg if lat is None else lat
    day = hour = None
    when = getattr(survey, "datetime", None)
    if when is not None:
        stamp = _dt.datetime.fromisoformat(str(when))
        day = stamp.timetuple().tm_yday
        hour = stamp.hour + stamp.minute / 60.0 + stamp.second / 3600.0
    solar_known = lat is not None and day is not None
    common = dict(conductor=conductor, line_azimuth_deg=line_azimuth_deg,
                  elevation_m=elevation_m,
                  emissivity=float(getattr(survey, "emissivity", 0.8)),
                  absorptivity=float(getattr(survey, "solar_absorptivity", 0.8)))
    solar = dict(latitude_deg=lat, day_of_year=day, solar_hour=hour) if solar_known else {}

    def temp(i, ta, v, **extra):
        kwargs = {**common, **solar, **extra}
        return float(thermal.conductor_temperature(i, ta, v, angle, **kwargs))

    i0 = 0.0 if current is None else float(current)
    value = temp(i0, ambient, wind)
    spreads = [0.5 * (temp(i0, ambient + 2.0, wind) - temp(i0, ambient - 2.0, wind)),
               0.5 * (temp(i0, ambient, 0.5 * wind) - temp(i0, ambient, 1.5 * wind))]
    notes = []
    if current is not None:
        spreads.append(0.5 * (temp(1.1 * i0, ambient, wind) - temp(0.9 * i0, ambient, wind)))
    else:
        typical = 0.3 * _rating_75c(conductor, ambient, wind, angle)
        spreads.append(temp(typical, ambient, wind) - value)
        notes.append(f"current unknown: 0 A assumed (a typical {typical:.0f} A would add "
                     f"{spreads[-1]:.1f} °C)")
    if not solar_known:
        # Unknown time/place: bracket between no sun and a clear-sky noon sun at 40° N in June.
        sunny = temp(i0, ambient, wind, latitude_deg=40.0, day_of_year=172, solar_hour=12.0)
        value = 0.5 * (value + sunny)
        spreads.append(0.5 * (sunny - temp(i0, ambient, wind)))
        notes.append("solar gain unknown (no date-time or latitude): midway between none and a "
                     "clear summer noon")
    ci = math.sqrt(sum(s * s for s in spreads) + MODEL_ALLOWANCE_C**2)
    note = (f"IEEE 738 heat balance: ambient {ambient:.1f} °C, wind {wind:.2f} m/s at "
            f"{angle:.0f}°, current {'unknown' if current is None else f'{i0:.0f} A'}")
    if notes:
        note += "; " + "; ".join(notes)
    return {"value_c": value, "ci95_c": ci, "method": "heat balance (IEEE 738)", "note": note,
            "inputs": {"ambient_c": ambient, "wind_speed_m_s": wind, "wind_angle_deg": angle,
                       "current_a": current, "latitude_deg": lat, "day_of_year": day,
                       "solar_hour": hour}}


def _rating_75c(conductor, ambient, wind, angle) -> float:
    """Current that heats the conductor to 75 °C in the survey weather (no sun). [A]"""
    try:
        value = float(np.asarray(thermal.ampacity(75.0, ambient, wind, angle,
                                                  conductor=conductor)))
    except (ValueError, TypeError):
        return 0.0
    return value if math.isfinite(value) and value > 0 else 0.0

"""Steady-state heat balance of a bare overhead conductor: temperature from current and weather.

Two published methods:

* IEEE Std 738-2012 (default): forced convection (low- and high-wind formulas with the wind
  direction factor, larger one taken), natural convection, air properties at the film
  temperature, air density with elevation, radiative cooling, solar heat gain from the sun's
  position (latitude, day of year, solar hour), clear or industrial atmosphere, elevation
  correction and line azimuth, resistance linear in temperature.
* CIGRE Technical Brochure 601 (2014): Nusselt-number convection with conductor roughness,
  angle of attack and inclination, Stefan–Boltzmann radiation, direct/diffuse/reflected solar
  radiation with a clearness ratio and ground albedo.

The heat balance is :math:`I^2 R(T_c) + q_s = q_c(T_c) + q_r(T_c)`. :func:`ampacity` solves it
for the current at a given conductor temperature (closed form); :func:`conductor_temperature`
solves it for the temperature at a given current (Brent's method). Angles are in degrees;
every other quantity is SI. The functions broadcast over numpy arrays.

References
----------
.. [1] IEEE Std 738-2012, *IEEE Standard for Calculating the Current-Temperature Relationship
   of Bare Overhead Conductors*, clause 4 and Annex B (sample calculation).
.. [2] CIGRE Technical Brochure 601 (2014), *Guide for Thermal Rating Calculations of Overhead
   Lines*, WG B2.43, chapter 3 and Annex E (worked examples).
"""
from __future__ import annotations

import math
from datetime import UTC, datetime

import numpy as np
from scipy import optimize

from clearaudit.physics.conductors import Conductor, resistance_at_temperature

__all__ = [
    "air_density_kg_per_m3",
    "air_dynamic_viscosity_pa_s",
    "air_thermal_conductivity_w_per_m_c",
    "ampacity",
    "conductor_temperature",
    "convective_cooling_cigre601_w_per_m",
    "convective_cooling_w_per_m",
    "day_of_year_and_solar_hour",
    "forced_convection_w_per_m",
    "joule_heating_w_per_m",
    "natural_convection_w_per_m",
    "radiative_cooling_cigre601_w_per_m",
    "radiative_cooling_w_per_m",
    "solar_altitude_deg",
    "solar_azimuth_deg",
    "solar_declination_deg",
    "solar_heat_flux_w_per_m2",
    "solar_heat_gain_cigre601_w_per_m",
    "solar_heat_gain_w_per_m",
    "wind_direction_factor",
]

STEFAN_BOLTZMANN = 5.670374419e-8  # W/(m² K⁴), CODATA 2018 (exact in the 2019 SI)

# IEEE Std 738-2012 Table 4: total heat flux density Q_s vs solar altitude H_c [deg] (sea level).
_QS_CLEAR = (-42.2391, 63.8044, -1.9220, 3.46921e-2, -3.61118e-4, 1.94318e-6, -4.07608e-9)
_QS_INDUSTRIAL = (53.1821, 14.2110, 6.6138e-1, -3.1658e-2, 5.4654e-4, -4.3446e-6, 1.3236e-8)


def _out(x):
    x = np.asarray(x, dtype=float)
    return float(x) if x.ndim == 0 else x


def _excess(conductor_temperature_c, ambient_c):
    """Conductor temperature above ambient, clipped at zero (no cooling below ambient)."""
    return np.maximum(
        np.asarray(conductor_temperature_c, float) - np.asarray(ambient_c, float), 0.0
    )


# =========================================================================== IEEE Std 738
def air_density_kg_per_m3(film_temperature_c, elevation_m=0.0):
    """Density of air at the film temperature and the conductor's elevation (IEEE 738).

    Parameters
    ----------
    film_temperature_c
        Film temperature, the mean of conductor and ambient temperatures, T_film. [°C]
    elevation_m
        Elevation of the conductor above sea level, H_e. [m]

    Returns
    -------
    density : Air density, ρ_f. [kg/m³]

    Notes
    -----
    .. math:: \\rho_f = \\frac{1.293 - 1.525\\times10^{-4} H_e + 6.379\\times10^{-9} H_e^2}
                              {1 + 0.00367\\,T_{film}}

    References
    ----------
    .. [1] IEEE Std 738-2012, Eq. (14a).
    """
    t = np.asarray(film_temperature_c, float)
    h = np.asarray(elevation_m, float)
    return _out((1.293 - 1.525e-4 * h + 6.379e-9 * h**2) / (1.0 + 0.00367 * t))


def air_dynamic_viscosity_pa_s(film_temperature_c):
    """Dynamic viscosity of air at the film temperature (IEEE 738).

    Parameters
    ----------
    film_temperature_c
        Film temperature, T_film. [°C]

    Returns
    -------
    viscosity : Dynamic viscosity, μ_f. [Pa·s]

    Notes
    -----
    .. math:: \\mu_f = \\frac{1.458\\times10^{-6} (T_{film} + 273)^{1.5}}{T_{film} + 383.4}

    References
    ----------
    .. [1] IEEE Std 738-2012, Eq. (13a).
    """
    t = np.asarray(film_temperature_c, float)
    return _out(1.458e-6 * (t + 273.0) ** 1.5 / (t + 383.4))


def air_thermal_conductivity_w_per_m_c(film_temperature_c):
    """Thermal conductivity of air at the film temperature (IEEE 738).

    Parameters
    ----------
    film_temperature_c
        Film temperature, T_film. [°C]

    Returns
    -------
    conductivity : Thermal conductivity, k_f. [W/(m·°C)]

    Notes
    -----
    .. math:: k_f = 2.424\\times10^{-2} + 7.477\\times10^{-5} T_{film}
                    - 4.407\\times10^{-9} T_{film}^2

    References
    ----------
    .. [1] IEEE Std 738-2012, Eq. (15a).
    """
    t = np.asarray(film_temperature_c, float)
    return _out(2.424e-2 + 7.477e-5 * t - 4.407e-9 * t**2)


def wind_direction_factor(wind_angle_deg):
    """Wind direction factor K_angle of forced convection (IEEE 738).

    Parameters
    ----------
    wind_angle_deg
        Angle between the wind direction and the conductor axis, φ (90 = perpendicular). [deg]

    Returns
    -------
    factor : K_angle (1 for a perpendicular wind, 0.388 for a parallel wind). [-]

    Notes
    -----
    .. math:: K_{angle} = 1.194 - \\cos\\phi + 0.194\\cos 2\\phi + 0.368 \\sin 2\\phi

    The formula is written for 0 ≤ φ ≤ 90°; other angles are folded into that range.

    References
    ----------
    .. [1] IEEE Std 738-2012, Eq. (4a).
    """
    phi = np.radians(_fold_angle(wind_angle_deg))
    return _out(1.194 - np.cos(phi) + 0.194 * np.cos(2 * phi) + 0.368 * np.sin(2 * phi))


def _fold_angle(angle_deg):
    """Fold an angle between a wind and a line axis into [0, 90] degrees."""
    a = np.mod(np.asarray(angle_deg, float), 180.0)
    return np.minimum(a, 180.0 - a)


def forced_convection_w_per_m(
    conductor_temperature_c,
    ambient_c,
    wind_speed_m_s,
    wind_angle_deg,
    diameter_m,
    elevation_m=0.0,
):
    """Forced convective cooling per length (IEEE 738, larger of the low/high-wind formulas).

    Parameters
    ----------
    conductor_temperature_c
        Conductor surface temperature, T_s. [°C]
    ambient_c
        Ambient air temperature, T_a. [°C]
    wind_speed_m_s
        Wind speed at the conductor, V_w. [m/s]
    wind_angle_deg
        Angle between wind and conductor axis, φ (90 = perpendicular). [deg]
    diameter_m
        Conductor outside diameter, D_0. [m]
    elevation_m
        Conductor elevation above sea level, H_e. [m]

    Returns
    -------
    cooling : Forced convection heat loss, max(q_c1, q_c2). [W/m]

    Notes
    -----
    With :math:`N_{Re} = D_0 \\rho_f V_w / \\mu_f` (air properties at the film temperature):

    .. math::
        q_{c1} = K_{angle} [1.01 + 1.35 N_{Re}^{0.52}] k_f (T_s - T_a)

        q_{c2} = K_{angle}\\, 0.754\\, N_{Re}^{0.6} k_f (T_s - T_a)

    References
    ----------
    .. [1] IEEE Std 738-2012, Eqs. (3a), (3b), (4a), (2c).
    """
    dt = _excess(conductor_temperature_c, ambient_c)
    film = 0.5 * (np.asarray(conductor_temperature_c, float) + np.asarray(ambient_c, float))
    rho = air_density_kg_per_m3(film, elevation_m)
    mu = air_dynamic_viscosity_pa_s(film)
    k = air_thermal_conductivity_w_per_m_c(film)
    v = np.asarray(wind_speed_m_s, float)
    if np.any(v < 0):
        raise ValueError("Wind speed must be zero or positive.")
    reynolds = np.asarray(diameter_m, float) * rho * v / mu
    k_angle = wind_direction_factor(wind_angle_deg)
    q1 = k_angle * (1.01 + 1.35 * reynolds**0.52) * k * dt
    q2 = k_angle * 0.754 * reynolds**0.6 * k * dt
    return _out(np.maximum(q1, q2))


def natural_convection_w_per_m(conductor_temperature_c, ambient_c, diameter_m, elevation_m=0.0):
    """Natural (zero-wind) convective cooling per length (IEEE 738).

    Parameters
    ----------
    conductor_temperature_c
        Conductor surface temperature, T_s. [°C]
    ambient_c
        Ambient air temperature, T_a. [°C]
    diameter_m
        Conductor outside diameter, D_0. [m]
    elevation_m
        Conductor elevation above sea level, H_e. [m]

    Returns
    -------
    cooling : Natural convection heat loss, q_cn. [W/m]

    Notes
    -----
    .. math:: q_{cn} = 3.645\\, \\rho_f^{0.5} D_0^{0.75} (T_s - T_a)^{1.25}

    References
    ----------
    .. [1] IEEE Std 738-2012, Eq. (5a).
    """
    dt = _excess(conductor_temperature_c, ambient_c)
    film = 0.5 * (np.asarray(conductor_temperature_c, float) + np.asarray(ambient_c, float))
    rho = air_density_kg_per_m3(film, elevation_m)
    return _out(3.645 * np.sqrt(rho) * np.asarray(diameter_m, float) ** 0.75 * dt**1.25)


def convective_cooling_w_per_m(
    conductor_temperature_c,
    ambient_c,
    wind_speed_m_s,
    wind_angle_deg,
    diameter_m,
    elevation_m=0.0,
):
    """Convective cooling per length: the larger of forced and natural convection (IEEE 738).

    Parameters
    ----------
    conductor_temperature_c, ambient_c, wind_speed_m_s, wind_angle_deg, diameter_m, elevation_m
        See :func:`forced_convection_w_per_m`. [°C, °C, m/s, deg, m, m]

    Returns
    -------
    cooling : q_c = max(q_c1, q_c2, q_cn). [W/m]

    References
    ----------
    .. [1] IEEE Std 738-2012, clause 4.4.3 ("use the larger").
    """
    forced = forced_convection_w_per_m(
        conductor_temperature_c, ambient_c, wind_speed_m_s, wind_angle_deg, diameter_m,
        elevation_m,
    )
    natural = natural_convection_w_per_m(conductor_temperature_c, ambient_c, diameter_m, elevation_m)
    return _out(np.maximum(forced, natural))


def radiative_cooling_w_per_m(conductor_temperature_c, ambient_c, diameter_m, emissivity=0.8):
    """Radiated heat loss per length (IEEE 738).

    Parameters
    ----------
    conductor_temperature_c
        Conductor surface temperature, T_s. [°C]
    ambient_c
        Ambient air temperature, T_a. [°C]
    diameter_m
        Conductor outside diameter, D_0. [m]
    emissivity
        Emissivity of the conductor surface, ε (0.23 new to 0.91 weathered). [-]

    Returns
    -------
    cooling : Radiated heat loss, q_r. [W/m]

    Notes
    -----
    .. math:: q_r = 17.8\\, D_0\\, \\varepsilon
              \\left[\\left(\\frac{T_s + 273}{100}\\right)^4
                   - \\left(\\frac{T_a + 273}{100}\\right)^4\\right]

    (17.8 = π σ 10⁸ rounded.)

    References
    ----------
    .. [1] IEEE Std 738-2012, Eq. (7a).
    """
    ts = (np.asarray(conductor_temperature_c, float) + 273.0) / 100.0
    ta = (np.asarray(ambient_c, float) + 273.0) / 100.0
    return _out(17.8 * np.asarray(diameter_m, float) * emissivity * (ts**4 - ta**4))


def solar_declination_deg(day_of_year, amplitude_deg: float = 23.46):
    """Solar declination from the day of the year.

    Parameters
    ----------
    day_of_year
        Day of the year, N (1 = 1 January; 161 = 10 June in a common year). [-]
    amplitude_deg
        Amplitude of the declination: 23.46 (IEEE 738) or 23.3 (CIGRE TB 601). [deg]

    Returns
    -------
    declination : δ. [deg]

    Notes
    -----
    .. math:: \\delta = 23.46 \\sin\\left(\\frac{284 + N}{365} 360°\\right)

    References
    ----------
    .. [1] IEEE Std 738-2012, Eq. (16b).
    """
    n = np.asarray(day_of_year, float)
    return _out(amplitude_deg * np.sin(np.radians((284.0 + n) / 365.0 * 360.0)))


def _hour_angle_deg(solar_hour):
    return (np.asarray(solar_hour, float) - 12.0) * 15.0


def solar_altitude_deg(latitude_deg, day_of_year, solar_hour, declination_amplitude_deg=23.46):
    """Altitude of the sun above the horizon.

    Parameters
    ----------
    latitude_deg
        Latitude, north positive. [deg]
    day_of_year
        Day of the year, N. [-]
    solar_hour
        Local solar time (12 = solar noon). [h]
    declination_amplitude_deg
        See :func:`solar_declination_deg`. [deg]

    Returns
    -------
    altitude : H_c (negative at night). [deg]

    Notes
    -----
    .. math:: H_c = \\arcsin[\\cos L \\cos\\delta \\cos\\omega + \\sin L \\sin\\delta],
              \\quad \\omega = 15°\\,(t_{solar} - 12)

    References
    ----------
    .. [1] IEEE Std 738-2012, Eq. (16a).
    """
    lat = np.radians(np.asarray(latitude_deg, float))
    dec = np.radians(solar_declination_deg(day_of_year, declination_amplitude_deg))
    omega = np.radians(_hour_angle_deg(solar_hour))
    s = np.cos(lat) * np.cos(dec) * np.cos(omega) + np.sin(lat) * np.sin(dec)
    return _out(np.degrees(np.arcsin(np.clip(s, -1.0, 1.0))))


def solar_azimuth_deg(latitude_deg, day_of_year, solar_hour, declination_amplitude_deg=23.46):
    """Azimuth of the sun, clockwise from north.

    Parameters
    ----------
    latitude_deg
        Latitude, north positive. [deg]
    day_of_year
        Day of the year, N. [-]
    solar_hour
        Local solar time (12 = solar noon). [h]
    declination_amplitude_deg
        See :func:`solar_declination_deg`. [deg]

    Returns
    -------
    azimuth : Z_c, 0–360 clockwise from north. [deg]

    Notes
    -----
    .. math:: Z_c = C + \\arctan\\chi, \\quad
              \\chi = \\frac{\\sin\\omega}{\\sin L \\cos\\omega - \\cos L \\tan\\delta}

    with the constant C = 0 or 180 before noon and 180 or 360 after noon, for χ ≥ 0 or χ < 0.

    References
    ----------
    .. [1] IEEE Std 738-2012, Eqs. (17a), (17b), Table 3.
    """
    lat = np.radians(np.asarray(latitude_deg, float))
    dec = np.radians(solar_declination_deg(day_of_year, declination_amplitude_deg))
    omega_deg = _hour_angle_deg(solar_hour)
    omega = np.radians(omega_deg)
    with np.errstate(divide="ignore", invalid="ignore"):
        chi = np.sin(omega) / (np.sin(lat) * np.cos(omega) - np.cos(lat) * np.tan(dec))
    morning = np.mod(omega_deg + 180.0, 360.0) < 180.0  # ω in [-180, 0)
    c = np.where(morning, np.where(chi >= 0, 0.0, 180.0), np.where(chi >= 0, 180.0, 360.0))
    return _out(c + np.degrees(np.arctan(chi)))


def solar_heat_flux_w_per_m2(solar_altitude_deg, elevation_m=0.0, atmosphere: str = "clear"):
    """Total solar and sky heat flux on a surface normal to the sun, at the conductor elevation.

    Parameters
    ----------
    solar_altitude_deg
        Altitude of the sun, H_c. [deg]
    elevation_m
        Elevation above sea level, H_e. [m]
    atmosphere
        ``"clear"`` or ``"industrial"``.

    Returns
    -------
    flux : Q_se = K_solar Q_s (0 when the sun is below the horizon). [W/m²]

    Notes
    -----
    :math:`Q_s = A + B H_c + C H_c^2 + \\dots + G H_c^6` (IEEE 738 Table 4 coefficients) and
    :math:`K_{solar} = 1 + 1.148\\times10^{-4} H_e - 1.108\\times10^{-8} H_e^2`.

    References
    ----------
    .. [1] IEEE Std 738-2012, Eqs. (18), (19), (20), Tables 4 and 5.
    """
    if atmosphere not in ("clear", "industrial"):
        raise ValueError("Atmosphere must be 'clear' or 'industrial'.")
    coefficients = _QS_CLEAR if atmosphere == "clear" else _QS_INDUSTRIAL
    hc = np.asarray(solar_altitude_deg, float)
    qs = np.polynomial.polynomial.polyval(hc, coefficients)
    qs = np.where(hc > 0, np.maximum(qs, 0.0), 0.0)
    h = np.asarray(elevation_m, float)
    k_solar = 1.0 + 1.148e-4 * h - 1.108e-8 * h**2
    return _out(k_solar * qs)


def solar_heat_gain_w_per_m(
    diameter_m,
    latitude_deg,
    day_of_year,
    solar_hour,
    line_azimuth_deg=90.0,
    elevation_m=0.0,
    absorptivity=0.8,
    atmosphere: str = "clear",
):
    """Solar heat gain per length of conductor (IEEE 738).

    Parameters
    ----------
    diameter_m
        Conductor outside diameter, D_0 (projected area per length). [m]
    latitude_deg
        Latitude, north positive. [deg]
    day_of_year
        Day of the year. [-]
    solar_hour
        Local solar time. [h]
    line_azimuth_deg
        Azimuth of the line, Z_l, clockwise from north (90 = east–west line). [deg]
    elevation_m
        Conductor elevation above sea level. [m]
    absorptivity
        Solar absorptivity of the conductor surface, α (0.23 new to 0.91 weathered). [-]
    atmosphere
        ``"clear"`` or ``"industrial"``.

    Returns
    -------
    gain : q_s. [W/m]

    Notes
    -----
    .. math:: q_s = \\alpha\\, Q_{se} \\sin\\theta\\, D_0, \\quad
              \\theta = \\arccos[\\cos H_c \\cos(Z_c - Z_l)]

    References
    ----------
    .. [1] IEEE Std 738-2012, Eqs. (8), (9).
    """
    hc = solar_altitude_deg(latitude_deg, day_of_year, solar_hour)
    zc = solar_azimuth_deg(latitude_deg, day_of_year, solar_hour)
    cos_theta = np.cos(np.radians(hc)) * np.cos(np.radians(zc - np.asarray(line_azimuth_deg, float)))
    sin_theta = np.sqrt(np.clip(1.0 - cos_theta**2, 0.0, 1.0))
    q = solar_heat_flux_w_per_m2(hc, elevation_m, atmosphere)
    return _out(absorptivity * q * sin_theta * np.asarray(diameter_m, float))


def joule_heating_w_per_m(
    current_a,
    conductor_temperature_c,
    resistance_25c_ohm_per_m,
    resistance_75c_ohm_per_m,
):
    """Joule (resistive) heating per length, resistance linear in temperature.

    Parameters
    ----------
    current_a
        RMS current per conductor. [A]
    conductor_temperature_c
        Conductor (average) temperature. [°C]
    resistance_25c_ohm_per_m, resistance_75c_ohm_per_m
        AC resistance at 25 °C and 75 °C. [Ω/m]

    Returns
    -------
    heating : I² R(T). [W/m]

    References
    ----------
    .. [1] IEEE Std 738-2012, Eqs. (10), (1a).
    """
    r = resistance_at_temperature(
        conductor_temperature_c, resistance_25c_ohm_per_m, resistance_75c_ohm_per_m
    )
    return _out(np.asarray(current_a, float) ** 2 * r)


def day_of_year_and_solar_hour(when: datetime, longitude_deg: float) -> tuple[int, float]:
    """Day of the year and local apparent solar time from a date-time and a longitude.

    Parameters
    ----------
    when
        Date-time; naive values are taken as UTC.
    longitude_deg
        Longitude, east positive. [deg]

    Returns
    -------
    day_of_year : 1 … 366. [-]
    solar_hour : Apparent solar time, 0–24 (12 = the sun crosses the meridian). [h]

    Notes
    -----
    :math:`t_{solar} = t_{UTC} + \\lambda / 15 + E/60`, with the equation of time :math:`E`
    [min] from Spencer's Fourier series.

    References
    ----------
    .. [1] Spencer, J. W. (1971). Fourier series representation of the position of the sun.
       *Search* 2(5), 172.
    """
    if when.tzinfo is not None:
        when = when.astimezone(UTC).replace(tzinfo=None)
    day = when.timetuple().tm_yday
    gamma = 2.0 * math.pi * (day - 1) / 365.0
    eot_min = 229.18 * (
        0.000075 + 0.001868 * math.cos(gamma) - 0.032077 * math.sin(gamma)
        - 0.014615 * math.cos(2 * gamma) - 0.040849 * math.sin(2 * gamma)
    )
    hour = when.hour + when.minute / 60.0 + when.second / 3600.0
    return day, (hour + longitude_deg / 15.0 + eot_min / 60.0) % 24.0


# =========================================================================== CIGRE TB 601
def _cigre_air(film_c, elevation_m):
    lam = 2.368e-2 + 7.23e-5 * film_c - 2.763e-8 * film_c**2
    mu = (17.239 + 4.635e-2 * film_c - 2.03e-5 * film_c**2) * 1e-6
    rho = (1.293 - 1.525e-4 * elevation_m + 6.379e-9 * elevation_m**2) / (1.0 + 0.00367 * film_c)
    return lam, mu, rho


def _nusselt_perpendicular(reynolds, roughness):
    """TB 601 Table 4: Nu_90 = B Re^n; below the table's lowest Re the first row is used."""
    smooth = ~(roughness > 0)
    b = np.where(
        smooth,
        np.where(reynolds < 5000, 0.583, np.where(reynolds < 50000, 0.148, 0.0208)),
        np.where(reynolds < 2650, 0.641, np.where(roughness <= 0.05, 0.178, 0.048)),
    )
    n = np.where(
        smooth,
        np.where(reynolds < 5000, 0.471, np.where(reynolds < 50000, 0.633, 0.814)),
        np.where(reynolds < 2650, 0.471, np.where(roughness <= 0.05, 0.633, 0.800)),
    )
    return b * reynolds**n


def _direction_factor_cigre(attack_deg, roughness):
    delta = np.radians(_fold_angle(attack_deg))
    s = np.sin(delta)
    smooth = ~(roughness > 0)
    stranded = np.where(
        np.degrees(delta) <= 24.0, 0.42 + 0.68 * s**1.08, 0.42 + 0.58 * s**0.90
    )
    return np.where(smooth, (s**2 + 0.0169 * np.cos(delta) ** 2) ** 0.225, stranded)


def convective_cooling_cigre601_w_per_m(
    conductor_temperature_c,
    ambient_c,
    wind_speed_m_s,
    wind_angle_deg,
    diameter_m,
    outer_strand_diameter_m=None,
    elevation_m=0.0,
    inclination_deg=0.0,
    specific_heat_air_j_per_kg_k: float = 1005.0,
    gravity_m_per_s2: float = 9.807,
):
    """Convective cooling per length by CIGRE TB 601 (forced, natural, low wind).

    Parameters
    ----------
    conductor_temperature_c
        Conductor surface temperature, T_s. [°C]
    ambient_c
        Ambient air temperature, T_a. [°C]
    wind_speed_m_s
        Wind speed, V. [m/s]
    wind_angle_deg
        Angle of attack between wind and conductor axis, δ (90 = perpendicular). [deg]
    diameter_m
        Conductor outside diameter, D. [m]
    outer_strand_diameter_m
        Diameter of the outer-layer strands, d (``None``: smooth conductor). [m]
    elevation_m
        Elevation above sea level, y. [m]
    inclination_deg
        Inclination of the conductor to the horizontal, β (natural convection only). [deg]
    specific_heat_air_j_per_kg_k
        Specific heat of air, c_f. [J/(kg·K)]
    gravity_m_per_s2
        Gravitational acceleration (TB 601 uses 9.807). [m/s²]

    Returns
    -------
    cooling : P_c. [W/m]

    Notes
    -----
    :math:`P_c = \\pi \\lambda_f (T_s - T_a) Nu`, with Nu the largest of the forced
    :math:`Nu_\\delta = Nu_{90}\\,f(\\delta)`, :math:`Nu_{90} = B\\,Re^n` (roughness
    :math:`R_s = d / [2(D - d)]`) and the natural :math:`Nu = A (Gr\\,Pr)^m` corrected for
    inclination. Below 0.5 m/s the forced value is the larger of :math:`Nu_{45}` and
    :math:`0.55\\,Nu_{90}` (TB 601 low-wind rule, recalled from memory — verify).

    References
    ----------
    .. [1] CIGRE TB 601 (2014), clause 3.2, Eqs. (5)–(16), Tables 4 and 5.
    """
    ts = np.asarray(conductor_temperature_c, float)
    ta = np.asarray(ambient_c, float)
    d_out = np.asarray(diameter_m, float)
    v = np.asarray(wind_speed_m_s, float)
    if np.any(v < 0):
        raise ValueError("Wind speed must be zero or positive.")
    film = 0.5 * (ts + ta)
    dt = _excess(ts, ta)
    lam, mu, rho = _cigre_air(film, np.asarray(elevation_m, float))
    nu = mu / rho
    if outer_strand_diameter_m is None:
        roughness = np.zeros_like(d_out)
    else:
        d = np.asarray(outer_strand_diameter_m, float)
        if np.any(d >= d_out) or np.any(d <= 0):
            raise ValueError("Outer strand diameter must be positive and below the conductor diameter.")
        roughness = d / (2.0 * (d_out - d))
    reynolds = v * d_out / nu
    nu90 = _nusselt_perpendicular(reynolds, roughness)
    forced = nu90 * _direction_factor_cigre(wind_angle_deg, roughness)
    low_wind = np.maximum(nu90 * _direction_factor_cigre(45.0, roughness), 0.55 * nu90)
    forced = np.where(v < 0.5, low_wind, forced)
    grashof = d_out**3 * dt * gravity_m_per_s2 / ((film + 273.15) * nu**2)
    prandtl = specific_heat_air_j_per_kg_k * mu / lam
    gp = grashof * prandtl
    a = np.select([gp >= 1e4, gp >= 1e2], [0.480, 0.850], default=1.020)
    m = np.select([gp >= 1e4, gp >= 1e2], [0.250, 0.188], default=0.148)
    a = np.where(gp >= 1e6, 0.125, a)  # 10⁶ ≤ Gr·Pr < 10¹²
    m = np.where(gp >= 1e6, 0.333, m)
    natural = a * gp**m
    beta = np.asarray(inclination_deg, float)
    natural = natural * np.where(roughness > 0, 1.0 - 1.76e-6 * beta**2.5, 1.0 - 1.58e-4 * beta**1.5)
    nusselt = np.maximum(forced, natural)
    return _out(np.pi * lam * dt * nusselt)


def radiative_cooling_cigre601_w_per_m(conductor_temperature_c, ambient_c, diameter_m, emissivity=0.8):
    """Radiative cooling per length by CIGRE TB 601 (Stefan–Boltzmann).

    Parameters
    ----------
    conductor_temperature_c
        Conductor surface temperature, T_s. [°C]
    ambient_c
        Ambient air temperature, T_a. [°C]
    diameter_m
        Conductor outside diameter, D. [m]
    emissivity
        Emissivity, ε_s. [-]

    Returns
    -------
    cooling : P_r. [W/m]

    Notes
    -----
    .. math:: P_r = \\pi D \\sigma_B \\varepsilon_s [(T_s + 273)^4 - (T_a + 273)^4]

    References
    ----------
    .. [1] CIGRE TB 601 (2014), clause 3.3, Eq. (27).
    """
    ts = np.asarray(conductor_temperature_c, float) + 273.0
    ta = np.asarray(ambient_c, float) + 273.0
    return _out(np.pi * np.asarray(diameter_m, float) * STEFAN_BOLTZMANN * emissivity * (ts**4 - ta**4))


def solar_heat_gain_cigre601_w_per_m(
    diameter_m,
    latitude_deg,
    day_of_year,
    solar_hour,
    line_azimuth_deg=90.0,
    elevation_m=0.0,
    absorptivity=0.8,
    albedo=0.1,
    clearness_ratio=1.0,
):
    """Solar heat gain per length by CIGRE TB 601 (direct, diffuse and reflected radiation).

    Parameters
    ----------
    diameter_m
        Conductor outside diameter, D. [m]
    latitude_deg
        Latitude, north positive. [deg]
    day_of_year
        Day of the year. [-]
    solar_hour
        Local solar time. [h]
    line_azimuth_deg
        Azimuth of the line, clockwise from north. [deg]
    elevation_m
        Elevation above sea level, y. [m]
    absorptivity
        Solar absorptivity, α_s. [-]
    albedo
        Ground albedo, F (0.1 typical ground, up to 0.6–0.8 for snow). [-]
    clearness_ratio
        Clearness ratio of the atmosphere, N_s (1 clear; 0.5 hazy). [-]

    Returns
    -------
    gain : P_s. [W/m]

    Notes
    -----
    Declination :math:`\\delta_s = 23.3° \\sin[2\\pi(284 + N)/365]`; direct beam
    :math:`I_{B(0)} = N_s\\,1280 \\sin H_s / (\\sin H_s + 0.314)`, corrected for elevation
    :math:`I_B = I_{B(0)}[1 + 1.4\\times10^{-4} y (1367/I_{B(0)} - 1)]`; diffuse
    :math:`I_d = (430.5 - 0.3288 I_B)\\sin H_s`; on the conductor

    .. math:: I_T = I_B(\\sin\\eta + \\tfrac{\\pi}{2} F \\sin H_s) + I_d(1 + \\tfrac{\\pi}{2} F),
              \\quad P_s = \\alpha_s I_T D

    with :math:`\\cos\\eta = \\cos H_s \\cos(\\gamma_s - \\gamma_c)`.

    References
    ----------
    .. [1] CIGRE TB 601 (2014), clause 3.4, Eqs. (19)–(26).
    """
    hs = solar_altitude_deg(latitude_deg, day_of_year, solar_hour, declination_amplitude_deg=23.3)
    zs = solar_azimuth_deg(latitude_deg, day_of_year, solar_hour, declination_amplitude_deg=23.3)
    sin_hs = np.maximum(np.sin(np.radians(hs)), 0.0)
    y = np.asarray(elevation_m, float)
    ib0 = clearness_ratio * 1280.0 * sin_hs / (sin_hs + 0.314)
    ib = ib0 * (1.0 - 1.4e-4 * y) + 1367.0 * 1.4e-4 * y  # = I_B0 [1 + 1.4e-4 y (1367/I_B0 - 1)]
    ib = np.where(sin_hs > 0, ib, 0.0)
    idiff = np.maximum(430.5 - 0.3288 * ib, 0.0) * sin_hs
    cos_eta = np.cos(np.radians(hs)) * np.cos(np.radians(zs - np.asarray(line_azimuth_deg, float)))
    sin_eta = np.sqrt(np.clip(1.0 - cos_eta**2, 0.0, 1.0))
    half_pi_f = 0.5 * np.pi * albedo
    total = ib * (sin_eta + half_pi_f * sin_hs) + idiff * (1.0 + half_pi_f)
    return _out(absorptivity * total * np.asarray(diameter_m, float))


# =========================================================================== solvers
def _outer_strand_diameter(conductor: Conductor) -> float | None:
    parts = conductor.stranding.split("/")
    try:
        n_outer = int(parts[0])
    except ValueError:
        return None
    area = conductor.area_outer_m2 if math.isfinite(conductor.area_outer_m2) else conductor.area_total_m2
    if not (n_outer > 0 and area > 0):
        return None
    return math.sqrt(4.0 * area / (math.pi * n_outer))


def _resolve(conductor, diameter_m, r25, r75, outer_strand_diameter_m):
    if conductor is not None:
        diameter_m = conductor.diameter_m if diameter_m is None else diameter_m
        r25 = conductor.resistance_ac_25c_ohm_per_m if r25 is None else r25
        r75 = conductor.resistance_ac_75c_ohm_per_m if r75 is None else r75
        if outer_strand_diameter_m is None:
            outer_strand_diameter_m = _outer_strand_diameter(conductor)
    if diameter_m is None or r25 is None or r75 is None:
        raise ValueError(
            "Give a conductor, or diameter_m, resistance_25c_ohm_per_m and resistance_75c_ohm_per_m."
        )
    if not (np.all(np.isfinite(r25)) and np.all(np.isfinite(r75))):
        raise ValueError("The conductor's resistances at 25 °C and 75 °C are needed for a heat balance.")
    return diameter_m, r25, r75, outer_strand_diameter_m


def _solar_gain(method, diameter_m, given_gain, latitude_deg, day_of_year, solar_hour,
                line_azimuth_deg, elevation_m, absorptivity, atmosphere, albedo, clearness_ratio):
    if given_gain is not None:
        return np.asarray(given_gain, float)
    if latitude_deg is None or day_of_year is None or solar_hour is None:
        if not (latitude_deg is None and day_of_year is None and solar_hour is None):
            raise ValueError("Solar heating needs latitude_deg, day_of_year and solar_hour together.")
        return np.asarray(0.0)
    if method == "ieee738":
        return np.asarray(solar_heat_gain_w_per_m(
            diameter_m, latitude_deg, day_of_year, solar_hour, line_azimuth_deg, elevation_m,
            absorptivity, atmosphere))
    return np.asarray(solar_heat_gain_cigre601_w_per_m(
        diameter_m, latitude_deg, day_of_year, solar_hour, line_azimuth_deg, elevation_m,
        absorptivity, albedo, clearness_ratio))


def _cooling(method, temperature_c, ambient_c, wind_speed, wind_angle, diameter_m, elevation_m,
             emissivity, outer_strand_diameter_m, inclination_deg):
    if method == "ieee738":
        return convective_cooling_w_per_m(
            temperature_c, ambient_c, wind_speed, wind_angle, diameter_m, elevation_m
        ) + radiative_cooling_w_per_m(temperature_c, ambient_c, diameter_m, emissivity)
    return convective_cooling_cigre601_w_per_m(
        temperature_c, ambient_c, wind_speed, wind_angle, diameter_m, outer_strand_diameter_m,
        elevation_m, inclination_deg,
    ) + radiative_cooling_cigre601_w_per_m(temperature_c, ambient_c, diameter_m, emissivity)


def _check_method(method: str) -> str:
    m = method.lower().replace(" ", "").replace("-", "").replace("_", "")
    if m in ("ieee738", "ieee"):
        return "ieee738"
    if m in ("cigre601", "cigretb601", "tb601", "cigre"):
        return "cigre601"
    raise ValueError(f"Unknown heat balance method {method!r}; use 'ieee738' or 'cigre601'.")


_SOLAR_DOC = """
    conductor
        Library or custom conductor: supplies the diameter, the resistances and (CIGRE) the
        outer strand diameter unless they are given explicitly.
    diameter_m
        Conductor outside diameter. [m]
    resistance_25c_ohm_per_m, resistance_75c_ohm_per_m
        AC resistance at 25 °C and 75 °C. [Ω/m]
    solar_heat_gain_w_per_m
        Solar heat gain, if known; otherwise computed from the sun's position, or 0 when
        ``latitude_deg``, ``day_of_year`` and ``solar_hour`` are all omitted. [W/m]
    latitude_deg
        Latitude, north positive. [deg]
    day_of_year
        Day of the year (see :func:`day_of_year_and_solar_hour`). [-]
    solar_hour
        Local solar time. [h]
    line_azimuth_deg
        Azimuth of the line, clockwise from north. [deg]
    elevation_m
        Conductor elevation above sea level. [m]
    emissivity, absorptivity
        Surface emissivity and solar absorptivity. [-]
    atmosphere
        ``"clear"`` or ``"industrial"`` (IEEE 738).
    method
        ``"ieee738"`` (default) or ``"cigre601"``.
    outer_strand_diameter_m
        Outer strand diameter for the CIGRE roughness. [m]
    inclination_deg
        Conductor inclination (CIGRE natural convection). [deg]
    albedo, clearness_ratio
        Ground albedo and clearness ratio (CIGRE solar). [-]
"""


def ampacity(
    conductor_temperature_c,
    ambient_c,
    wind_speed_m_s,
    wind_angle_deg,
    *,
    conductor: Conductor | None = None,
    diameter_m=None,
    resistance_25c_ohm_per_m=None,
    resistance_75c_ohm_per_m=None,
    solar_heat_gain_w_per_m=None,
    latitude_deg=None,
    day_of_year=None,
    solar_hour=None,
    line_azimuth_deg=90.0,
    elevation_m=0.0,
    emissivity=0.8,
    absorptivity=0.8,
    atmosphere: str = "clear",
    method: str = "ieee738",
    outer_strand_diameter_m=None,
    inclination_deg=0.0,
    albedo=0.1,
    clearness_ratio=1.0,
):
    """Steady-state current that holds the conductor at a given temperature (thermal rating).

    Parameters
    ----------
    conductor_temperature_c
        Conductor temperature, e.g. the maximum operating temperature. [°C]
    ambient_c
        Ambient air temperature. [°C]
    wind_speed_m_s
        Wind speed. [m/s]
    wind_angle_deg
        Angle between wind and conductor axis (90 = perpendicular). [deg]
    {common_parameters}
    Returns
    -------
    current : Steady-state current per conductor; 0 where the sun alone heats the conductor
        beyond the temperature. [A]

    Notes
    -----
    .. math:: I = \\sqrt{\\frac{q_c + q_r - q_s}{R(T_c)}}

    References
    ----------
    .. [1] IEEE Std 738-2012, Eq. (1b).
    .. [2] CIGRE TB 601 (2014), Eq. (1).
    """
    method = _check_method(method)
    d, r25, r75, d_strand = _resolve(conductor, diameter_m, resistance_25c_ohm_per_m,
                                     resistance_75c_ohm_per_m, outer_strand_diameter_m)
    qs = _solar_gain(method, d, solar_heat_gain_w_per_m, latitude_deg, day_of_year, solar_hour,
                     line_azimuth_deg, elevation_m, absorptivity, atmosphere, albedo, clearness_ratio)
    cooling = _cooling(method, conductor_temperature_c, ambient_c, wind_speed_m_s,
                       wind_angle_deg, d, elevation_m, emissivity, d_strand, inclination_deg)
    r = resistance_at_temperature(conductor_temperature_c, r25, r75)
    return _out(np.sqrt(np.maximum(cooling - qs, 0.0) / r))


def conductor_temperature(
    current_a,
    ambient_c,
    wind_speed_m_s,
    wind_angle_deg,
    *,
    conductor: Conductor | None = None,
    diameter_m=None,
    resistance_25c_ohm_per_m=None,
    resistance_75c_ohm_per_m=None,
    solar_heat_gain_w_per_m=None,
    latitude_deg=None,
    day_of_year=None,
    solar_hour=None,
    line_azimuth_deg=90.0,
    elevation_m=0.0,
    emissivity=0.8,
    absorptivity=0.8,
    atmosphere: str = "clear",
    method: str = "ieee738",
    outer_strand_diameter_m=None,
    inclination_deg=0.0,
    albedo=0.1,
    clearness_ratio=1.0,
    tolerance_c: float = 1e-6,
):
    """Steady-state conductor temperature for a current and weather (heat balance solved).

    Parameters
    ----------
    current_a
        RMS current per conductor. [A]
    ambient_c
        Ambient air temperature. [°C]
    wind_speed_m_s
        Wind speed. [m/s]
    wind_angle_deg
        Angle between wind and conductor axis (90 = perpendicular). [deg]
    {common_parameters}
    tolerance_c
        Absolute tolerance of the root. [°C]

    Returns
    -------
    temperature : Conductor temperature T_c solving
        :math:`I^2 R(T_c) + q_s = q_c(T_c) + q_r(T_c)`; inputs broadcast together. [°C]

    Notes
    -----
    The heat balance is monotonic in :math:`T_c` wherever the cooling grows faster than the
    Joule heating, so the root is bracketed between the ambient temperature (no cooling) and
    an upper bound that is doubled until the balance turns negative, then found with Brent's
    method (``scipy.optimize.brentq``) for each weather case.

    References
    ----------
    .. [1] IEEE Std 738-2012, clause 4.
    .. [2] CIGRE TB 601 (2014), chapter 3.
    """
    method = _check_method(method)
    d, r25, r75, d_strand = _resolve(conductor, diameter_m, resistance_25c_ohm_per_m,
                                     resistance_75c_ohm_per_m, outer_strand_diameter_m)
    current = np.asarray(current_a, float)
    if np.any(current < 0):
        raise ValueError("Current must be zero or positive.")
    qs = _solar_gain(method, d, solar_heat_gain_w_per_m, latitude_deg, day_of_year, solar_hour,
                     line_azimuth_deg, elevation_m, absorptivity, atmosphere, albedo, clearness_ratio)
    arrays = np.broadcast_arrays(
        current, np.asarray(ambient_c, float), np.asarray(wind_speed_m_s, float),
        np.asarray(wind_angle_deg, float), np.asarray(d, float), np.asarray(r25, float),
        np.asarray(r75, float), qs, np.asarray(elevation_m, float), np.asarray(emissivity, float),
        np.asarray(np.nan if d_strand is None else d_strand, float),
        np.asarray(inclination_deg, float),
    )
    shape = arrays[0].shape
    flat = [a.ravel() for a in arrays]
    result = np.empty(flat[0].size)
    for i in range(result.size):  # one root per weather case (not per point)
        cur, ta, v, ang, di, ra, rb, q, el, em, ds, inc = (a[i] for a in flat)
        strand = None if not np.isfinite(ds) else ds

        def balance(t, cur=cur, ta=ta, v=v, ang=ang, di=di, ra=ra, rb=rb, q=q, el=el, em=em,
                    strand=strand, inc=inc):
            joule = cur**2 * resistance_at_temperature(t, ra, rb)
            return joule + q - _cooling(method, t, ta, v, ang, di, el, em, strand, inc)

        if balance(ta) <= 0.0:
            result[i] = ta
            continue
        step = 50.0
        while balance(ta + step) > 0.0:
            step *= 2.0
            if step > 5000.0:
                raise ValueError("No steady-state temperature below ambient + 5000 °C: "
                                 "check the current and the resistances.")
        result[i] = optimize.brentq(balance, ta, ta + step, xtol=tolerance_c)
    return _out(result.reshape(shape))


ampacity.__doc__ = ampacity.__doc__.replace("    {common_parameters}\n", _SOLAR_DOC.lstrip("\n"))
conductor_temperature.__doc__ = conductor_temperature.__doc__.replace(
    "    {common_parameters}\n", _SOLAR_DOC.lstrip("\n")
)

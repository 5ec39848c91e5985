"""Mechanical loads on overhead conductors: ice, wind, resultant, blowout and insulator swing.

All functions take and return SI quantities (m, N/m, Pa, degrees for angles as named) and
broadcast over numpy arrays. Standard loading districts (radial ice, wind pressure,
temperature and constant adder) are data in ``clearaudit/data/loading_districts.toml``.

References
----------
.. [1] NESC (ANSI C2), Rule 250B: combined ice and wind district loading (loads per unit
   length: conductor weight plus radial ice, wind on the iced diameter, vector resultant plus a
   constant).
.. [2] IEEE Std 524-2016, *Guide for the Installation of Overhead Transmission Line
   Conductors* (conductor loading, sag and tension background).
.. [3] ASCE Manuals and Reports on Engineering Practice No. 74, *Guidelines for Electrical
   Transmission Line Structural Loading* (wind pressure q = ½ρV²·C_d, insulator swing).
"""
from __future__ import annotations

import tomllib
from dataclasses import dataclass
from functools import lru_cache
from importlib import resources

import numpy as np

__all__ = [
    "ConductorLoad",
    "LoadingDistrict",
    "blowout_angle_deg",
    "conductor_load",
    "ice_weight_n_per_m",
    "insulator_swing_angle_deg",
    "list_loading_districts",
    "loading_district",
    "resultant_load_n_per_m",
    "strength_to_weight_ratio_m",
    "wind_force_n_per_m",
    "wind_pressure_pa",
]

STANDARD_GRAVITY = 9.80665  # m/s², exact (CGPM 1901)
ICE_DENSITY_KG_PER_M3 = 913.0  # glaze ice, ≈ 57 lb/ft³ (NESC practice)
AIR_DENSITY_KG_PER_M3 = 1.225  # ISA sea level, 15 °C


def _scalar_or_array(x):
    x = np.asarray(x, dtype=float)
    return float(x) if x.ndim == 0 else x


def _nonnegative(name: str, value) -> np.ndarray:
    v = np.asarray(value, dtype=float)
    if np.any(~(v >= 0)):
        raise ValueError(f"{name} must be zero or positive.")
    return v


def ice_weight_n_per_m(
    diameter_m,
    radial_ice_m,
    ice_density_kg_per_m3: float = ICE_DENSITY_KG_PER_M3,
    gravity_m_per_s2: float = STANDARD_GRAVITY,
):
    """Weight per length of a uniform radial ice coat on a conductor.

    Parameters
    ----------
    diameter_m
        Bare conductor diameter, D. [m]
    radial_ice_m
        Radial ice thickness, t. [m]
    ice_density_kg_per_m3
        Ice density, ρ_i (913 kg/m³ glaze ice by default). [kg/m³]
    gravity_m_per_s2
        Gravitational acceleration. [m/s²]

    Returns
    -------
    weight : Ice weight per length of conductor. [N/m]

    Notes
    -----
    The ice annulus between diameters D and D + 2t has area π t (D + t):

    .. math:: w_i = \\rho_i g \\pi t (D + t)

    References
    ----------
    .. [1] NESC (ANSI C2), Rule 250B.
    """
    d = _nonnegative("Conductor diameter", diameter_m)
    t = _nonnegative("Radial ice thickness", radial_ice_m)
    if not ice_density_kg_per_m3 > 0:
        raise ValueError("Ice density must be positive.")
    return _scalar_or_array(ice_density_kg_per_m3 * gravity_m_per_s2 * np.pi * t * (d + t))


def wind_pressure_pa(
    wind_speed_m_s,
    air_density_kg_per_m3: float = AIR_DENSITY_KG_PER_M3,
    drag_coefficient: float = 1.0,
):
    """Wind pressure on a conductor's projected area from a wind speed.

    Parameters
    ----------
    wind_speed_m_s
        Wind speed, V. [m/s]
    air_density_kg_per_m3
        Air density, ρ (1.225 kg/m³: ISA sea level, 15 °C). [kg/m³]
    drag_coefficient
        Drag (shape) factor of the conductor, C_d (1.0 common for stranded conductors). [-]

    Returns
    -------
    pressure : Wind pressure on the projected area. [Pa]

    Notes
    -----
    .. math:: p = C_d \\cdot \\tfrac12 \\rho V^2

    References
    ----------
    .. [1] ASCE MOP 74, wind loading chapter (velocity pressure times force coefficient).
    """
    v = np.asarray(wind_speed_m_s, dtype=float)
    if not (air_density_kg_per_m3 > 0 and drag_coefficient > 0):
        raise ValueError("Air density and drag coefficient must be positive.")
    return _scalar_or_array(drag_coefficient * 0.5 * air_density_kg_per_m3 * v**2)


def wind_force_n_per_m(diameter_m, radial_ice_m, wind_pressure_pa):
    """Horizontal wind force per length on the (iced) conductor.

    Parameters
    ----------
    diameter_m
        Bare conductor diameter, D. [m]
    radial_ice_m
        Radial ice thickness, t (0 for a bare conductor). [m]
    wind_pressure_pa
        Wind pressure on the projected area, p (see :func:`wind_pressure_pa`). [Pa]

    Returns
    -------
    force : Wind force per length, perpendicular to the conductor. [N/m]

    Notes
    -----
    .. math:: w_w = p (D + 2t)

    References
    ----------
    .. [1] NESC (ANSI C2), Rule 250B.
    """
    d = _nonnegative("Conductor diameter", diameter_m)
    t = _nonnegative("Radial ice thickness", radial_ice_m)
    p = _nonnegative("Wind pressure", wind_pressure_pa)
    return _scalar_or_array(p * (d + 2.0 * t))


def resultant_load_n_per_m(weight_n_per_m, ice_weight_n_per_m=0.0, wind_force_n_per_m=0.0,
                           constant_n_per_m=0.0):
    """Resultant load per length: vector sum of vertical and wind loads plus a constant.

    Parameters
    ----------
    weight_n_per_m
        Bare conductor weight per length, w_c. [N/m]
    ice_weight_n_per_m
        Ice weight per length, w_i. [N/m]
    wind_force_n_per_m
        Horizontal wind force per length, w_w. [N/m]
    constant_n_per_m
        Constant adder of the loading district, K (0 outside district loading). [N/m]

    Returns
    -------
    load : Resultant load per length. [N/m]

    Notes
    -----
    .. math:: w_r = \\sqrt{(w_c + w_i)^2 + w_w^2} + K

    References
    ----------
    .. [1] NESC (ANSI C2), Rule 250B.
    """
    w = _nonnegative("Conductor weight", weight_n_per_m)
    wi = _nonnegative("Ice weight", ice_weight_n_per_m)
    ww = np.asarray(wind_force_n_per_m, dtype=float)
    k = _nonnegative("Constant adder", constant_n_per_m)
    return _scalar_or_array(np.hypot(w + wi, ww) + k)


def strength_to_weight_ratio_m(rated_strength_n, load_n_per_m):
    """Strength-to-weight ratio: rated strength over the load per length of a load case.

    Parameters
    ----------
    rated_strength_n
        Rated breaking strength of the conductor. [N]
    load_n_per_m
        Load per length of the load case (e.g. the resultant). [N/m]

    Returns
    -------
    ratio : Length of conductor whose loaded weight equals its strength. [m]

    Notes
    -----
    .. math:: \\mathrm{SWR} = \\mathrm{RBS} / w_r

    Handbooks quote it in thousands of feet (RBS in lb over load in lb per 1000 ft).
    """
    load = np.asarray(load_n_per_m, dtype=float)
    if np.any(~(load > 0)):
        raise ValueError("Load per length must be positive.")
    return _scalar_or_array(np.asarray(rated_strength_n, dtype=float) / load)


def blowout_angle_deg(wind_force_n_per_m, weight_n_per_m, ice_weight_n_per_m=0.0):
    """Angle of the conductor's plane from the vertical under a transverse wind (blowout).

    Parameters
    ----------
    wind_force_n_per_m
        Horizontal wind force per length, w_w. [N/m]
    weight_n_per_m
        Bare conductor weight per length, w_c. [N/m]
    ice_weight_n_per_m
        Ice weight per length, w_i. [N/m]

    Returns
    -------
    angle : Swing of the conductor plane from vertical. [deg]

    Notes
    -----
    .. math:: \\phi = \\arctan\\frac{w_w}{w_c + w_i}
    """
    vertical = _nonnegative("Conductor weight", weight_n_per_m) + _nonnegative(
        "Ice weight", ice_weight_n_per_m
    )
    if np.any(~(vertical > 0)):
        raise ValueError("Conductor weight plus ice weight must be positive.")
    return _scalar_or_array(np.degrees(np.arctan2(np.asarray(wind_force_n_per_m, float), vertical)))


def insulator_swing_angle_deg(
    wind_force_n_per_m,
    wind_span_m,
    weight_n_per_m,
    weight_span_m,
    insulator_weight_n: float = 0.0,
    insulator_wind_area_m2: float = 0.0,
    wind_pressure_pa: float = 0.0,
    tension_n: float = 0.0,
    line_angle_deg: float = 0.0,
):
    """Swing of a suspension insulator string from vertical under transverse wind.

    Parameters
    ----------
    wind_force_n_per_m
        Wind force per length on the conductor (bundle), w_w. [N/m]
    wind_span_m
        Wind (horizontal) span: half the sum of the adjacent span lengths, L_h. [m]
    weight_n_per_m
        Vertical load per length on the conductor (bundle), bare plus ice, w_v. [N/m]
    weight_span_m
        Weight (vertical) span: distance between the low points of the adjacent spans, L_v
        (may be negative on uplift). [m]
    insulator_weight_n
        Weight of the insulator string and hardware, W_ins. [N]
    insulator_wind_area_m2
        Projected area of the string exposed to the wind, A_ins. [m²]
    wind_pressure_pa
        Wind pressure on the insulator string, p. [Pa]
    tension_n
        Horizontal conductor tension, used for the line-angle pull. [N]
    line_angle_deg
        Deflection angle of the line at the structure (0 on tangents); its pull acts with the
        wind. [deg]

    Returns
    -------
    angle : Swing of the insulator string from vertical. [deg]

    Notes
    -----
    Moment balance of a rigid string about its attachment point, with the string's own wind
    force and weight acting at mid-length (half of each counted at the conductor end):

    .. math::
        \\phi = \\arctan\\frac{w_w L_h + 2T\\sin(\\theta/2) + p A_{ins}/2}
                              {w_v L_v + W_{ins}/2}

    References
    ----------
    .. [1] ASCE MOP 74, insulator swing (common practice).
    """
    horizontal = (
        np.asarray(wind_force_n_per_m, float) * np.asarray(wind_span_m, float)
        + 2.0 * np.asarray(tension_n, float) * np.sin(np.radians(np.asarray(line_angle_deg, float)) / 2.0)
        + 0.5 * np.asarray(wind_pressure_pa, float) * np.asarray(insulator_wind_area_m2, float)
    )
    vertical = (
        np.asarray(weight_n_per_m, float) * np.asarray(weight_span_m, float)
        + 0.5 * np.asarray(insulator_weight_n, float)
    )
    if np.any(~(vertical > 0)):
        raise ValueError(
            "The vertical load on the insulator must be positive (uplift: the string cannot hang)."
        )
    return _scalar_or_array(np.degrees(np.arctan2(horizontal, vertical)))


# --------------------------------------------------------------------------- load cases
@dataclass(frozen=True)
class ConductorLoad:
    """Loads per length of one conductor under one load case (all [N/m] except the angle).

    Attributes
    ----------
    weight_n_per_m : Bare conductor weight. [N/m]
    ice_weight_n_per_m : Ice weight. [N/m]
    wind_force_n_per_m : Horizontal wind force on the iced diameter. [N/m]
    constant_n_per_m : Constant adder of the load case. [N/m]
    resultant_n_per_m : Vector resultant plus the constant. [N/m]
    blowout_angle_deg : Swing of the conductor plane from vertical. [deg]
    """

    weight_n_per_m: float
    ice_weight_n_per_m: float
    wind_force_n_per_m: float
    constant_n_per_m: float
    resultant_n_per_m: float
    blowout_angle_deg: float


def conductor_load(
    diameter_m,
    weight_n_per_m,
    radial_ice_m=0.0,
    wind_pressure_pa=0.0,
    constant_n_per_m=0.0,
    ice_density_kg_per_m3: float = ICE_DENSITY_KG_PER_M3,
) -> ConductorLoad:
    """Loads per length of a conductor under one load case (ice, wind, constant).

    Parameters
    ----------
    diameter_m
        Bare conductor diameter. [m]
    weight_n_per_m
        Bare conductor weight per length. [N/m]
    radial_ice_m
        Radial ice thickness. [m]
    wind_pressure_pa
        Wind pressure on the iced projected area. [Pa]
    constant_n_per_m
        Constant adder (loading districts). [N/m]
    ice_density_kg_per_m3
        Ice density. [kg/m³]

    Returns
    -------
    load : :class:`ConductorLoad`
    """
    wi = ice_weight_n_per_m(diameter_m, radial_ice_m, ice_density_kg_per_m3)
    ww = wind_force_n_per_m(diameter_m, radial_ice_m, wind_pressure_pa)
    return ConductorLoad(
        weight_n_per_m=_scalar_or_array(weight_n_per_m),
        ice_weight_n_per_m=wi,
        wind_force_n_per_m=ww,
        constant_n_per_m=_scalar_or_array(constant_n_per_m),
        resultant_n_per_m=resultant_load_n_per_m(weight_n_per_m, wi, ww, constant_n_per_m),
        blowout_angle_deg=blowout_angle_deg(ww, weight_n_per_m, wi),
    )


@dataclass(frozen=True)
class LoadingDistrict:
    """A standard combined ice-and-wind loading district.

    Attributes
    ----------
    name : District name (``heavy``, ``medium``, ``light``).
    description : One line in the original units.
    radial_ice_m : Radial ice thickness. [m]
    wind_pressure_pa : Wind pressure on the iced conductor. [Pa]
    temperature_c : Conductor temperature of the load case. [°C]
    constant_n_per_m : Constant added to the resultant. [N/m]
    source : Where the values come from.
    """

    name: str
    description: str
    radial_ice_m: float
    wind_pressure_pa: float
    temperature_c: float
    constant_n_per_m: float
    source: str

    def load(self, diameter_m, weight_n_per_m,
             ice_density_kg_per_m3: float = ICE_DENSITY_KG_PER_M3) -> ConductorLoad:
        """Loads of a conductor under this district (see :func:`conductor_load`).

        Parameters
        ----------
        diameter_m
            Bare conductor diameter. [m]
        weight_n_per_m
            Bare conductor weight per length. [N/m]
        ice_density_kg_per_m3
            Ice density. [kg/m³]

        Returns
        -------
        load : :class:`ConductorLoad`
        """
        return conductor_load(diameter_m, weight_n_per_m, self.radial_ice_m,
                              self.wind_pressure_pa, self.constant_n_per_m, ice_density_kg_per_m3)


@lru_cache(maxsize=1)
def _districts() -> dict[str, LoadingDistrict]:
    path = resources.files("clearaudit").joinpath("data/loading_districts.toml")
    with path.open("rb") as fh:
        data = tomllib.load(fh)
    return {
        name: LoadingDistrict(
            name=name,
            description=str(entry.get("description", "")),
            radial_ice_m=float(entry["radial_ice_m"]),
            wind_pressure_pa=float(entry["wind_pressure_pa"]),
            temperature_c=float(entry["temperature_c"]),
            constant_n_per_m=float(entry["constant_n_per_m"]),
            source=str(entry["source"]),
        )
        for name, entry in data.items()
    }


def list_loading_districts() -> list[LoadingDistrict]:
    """All standard loading districts in the data file.

    Returns
    -------
    districts : list of :class:`LoadingDistrict`
    """
    return list(_districts().values())


def loading_district(name: str) -> LoadingDistrict:
    """Look up a standard loading district by name (case-insensitive).

    Parameters
    ----------
    name
        ``heavy``, ``medium`` or ``light``.

    Returns
    -------
    district : :class:`LoadingDistrict`

    Raises
    ------
    ValueError
        If the name is not a known district.
    """
    key = str(name).strip().lower()
    districts = _districts()
    if key not in districts:
        raise ValueError(
            f"Unknown loading district {name!r}; known districts: {', '.join(districts)}."
        )
    return districts[key]

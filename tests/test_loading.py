"""Tests of conductor loads (clearaudit/physics/loading.py, data/loading_districts.toml)."""
from __future__ import annotations

import math

import numpy as np
import pytest

from clearaudit.physics.conductors import lookup_conductor
from clearaudit.physics.loading import (
    blowout_angle_deg,
    conductor_load,
    ice_weight_n_per_m,
    insulator_swing_angle_deg,
    list_loading_districts,
    loading_district,
    resultant_load_n_per_m,
    strength_to_weight_ratio_m,
    wind_force_n_per_m,
    wind_pressure_pa,
)
from clearaudit.units import FOOT_M, INCH_M, LB_PER_FT2_TO_PA, LB_PER_FT_TO_N_PER_M, POUND_FORCE_N

LB_PER_KFT = LB_PER_FT_TO_N_PER_M / 1000.0  # 1 lb per 1,000 ft in N/m
# The worked figures below give ice weights that imply an ice density of 57.3 lb/ft³
# (1.25 lb/ft per in² of t(D+t)); with it they are reproduced to the last digit.
SOURCE_ICE_DENSITY = 1.25 * 144.0 / math.pi * 0.45359237 / FOOT_M**3  # ≈ 917.8 kg/m³


def _lb_per_kft(n_per_m):
    return n_per_m / LB_PER_KFT


# Common practice (no source): 795 kcmil 26/7 ACSR, D = 1.108 in, 1,098 lb per 1,000 ft;
# 500 kcmil hard-drawn copper, D = 0.813 in, 1,544 lb per 1,000 ft; wind 8 lb/ft².
ACSR = dict(d=1.108 * INCH_M, w=1098 * LB_PER_KFT, rbs=31200 * POUND_FORCE_N)
COPPER = dict(d=0.813 * INCH_M, w=1544 * LB_PER_KFT, rbs=22510 * POUND_FORCE_N)
WIND = 8 * LB_PER_FT2_TO_PA


# Tolerances [lb per 1,000 ft]: the 795 ACSR figures are reproduced within one unit of their
# last digit (computed: ice 1,005.0, wind 1,405.3, resultant 2,529.3, 1-inch 4,269.5 vs 4,270).
# The copper figures are NOT reproduced to the last digit: recomputed with the stated
# D = 0.813 in they come out 1.25–1.4 lb/kft (0.05–0.17 %) lower (ice 820.6 vs 822, wind
# 1,208.7 vs 1,210, resultant 2,655.6 vs 2,657, 1-inch 4,246.8 vs 4,248), and no single ice
# density fits both the ACSR and the copper ice figures. They are checked to ±1.5 lb/kft.
ACSR_TOL = 1.0
COPPER_TOL = 1.5


@pytest.mark.parametrize("cond, ice, wind, resultant, tol", [
    (ACSR, 1005, 1405, 2529, ACSR_TOL),
    (COPPER, 822, 1210, 2657, COPPER_TOL),
])
def test_half_inch_ice_case(cond, ice, wind, resultant, tol):
    # Common practice (no source): ½-inch radial ice, 8 lb/ft² wind on the iced diameter.
    t = 0.5 * INCH_M
    wi = ice_weight_n_per_m(cond["d"], t, SOURCE_ICE_DENSITY)
    ww = wind_force_n_per_m(cond["d"], t, WIND)
    assert _lb_per_kft(wi) == pytest.approx(ice, abs=tol)
    assert _lb_per_kft(ww) == pytest.approx(wind, abs=tol)
    r = resultant_load_n_per_m(cond["w"], wi, ww)
    assert _lb_per_kft(r) == pytest.approx(resultant, abs=tol)
    # From the quoted (rounded) components the quoted resultant follows to the last digit.
    r_quoted = resultant_load_n_per_m(cond["w"], ice * LB_PER_KFT, wind * LB_PER_KFT)
    assert _lb_per_kft(r_quoted) == pytest.approx(resultant, abs=0.5)


@pytest.mark.parametrize("cond, resultant, swr_kft, tol", [
    (ACSR, 4270, 7.3, ACSR_TOL), (COPPER, 4248, 5.3, COPPER_TOL)])
def test_one_inch_ice_case_and_strength_to_weight(cond, resultant, swr_kft, tol):
    # Common practice (no source): 1-inch ice, 8 lb/ft² wind; strength-to-weight ratio with
    # 31,200 lb and 22,510 lb rated strength, quoted in thousands of feet.
    load = conductor_load(cond["d"], cond["w"], 1.0 * INCH_M, WIND,
                          ice_density_kg_per_m3=SOURCE_ICE_DENSITY)
    assert _lb_per_kft(load.resultant_n_per_m) == pytest.approx(resultant, abs=tol)
    swr_m = strength_to_weight_ratio_m(cond["rbs"], load.resultant_n_per_m)
    assert swr_m / FOOT_M / 1000.0 == pytest.approx(swr_kft, abs=0.05)


def test_default_ice_density_is_57_lb_per_ft3():
    # NESC practice (from memory): glaze ice 57 lb/ft³ = 913 kg/m³; the worked example's
    # 1,005 lb/kft (57.3 lb/ft³) is 0.5 % above what the default density gives.
    wi = ice_weight_n_per_m(ACSR["d"], 0.5 * INCH_M)
    assert _lb_per_kft(wi) == pytest.approx(1005, rel=0.006)
    assert 913.0 / (0.45359237 / FOOT_M**3) == pytest.approx(57.0, abs=0.01)


def test_heavy_loading_district_795_acsr():
    # Handbook worked example (from memory): heavy district, 795 kcmil 26/7 ACSR:
    # 2.509 lb/ft including the 0.30 lb/ft constant.
    drake = lookup_conductor("795 26/7 ACSR")
    heavy = loading_district("Heavy")
    load = heavy.load(drake.diameter_m, drake.unit_weight_n_per_m)
    assert load.resultant_n_per_m / LB_PER_FT_TO_N_PER_M == pytest.approx(2.509, abs=0.0005)
    assert load.constant_n_per_m == pytest.approx(0.30 * LB_PER_FT_TO_N_PER_M, rel=1e-6)


def test_districts_data():
    # NESC Table 250-1 (from memory — verify): heavy ½ in / 4 psf / 0 °F / 0.30 lb/ft;
    # medium ¼ in / 4 psf / 15 °F / 0.20; light 0 / 9 psf / 30 °F / 0.05.
    expected = {"heavy": (0.5, 4, 0.0, 0.30), "medium": (0.25, 4, 15.0, 0.20),
                "light": (0.0, 9, 30.0, 0.05)}
    districts = {d.name: d for d in list_loading_districts()}
    assert set(districts) == set(expected)
    for name, (ice_in, psf, temp_f, k) in expected.items():
        d = districts[name]
        assert d.radial_ice_m == pytest.approx(ice_in * INCH_M, abs=1e-9)
        assert d.wind_pressure_pa == pytest.approx(psf * LB_PER_FT2_TO_PA, rel=1e-8)
        assert d.temperature_c == pytest.approx((temp_f - 32) * 5 / 9, abs=1e-6)
        assert d.constant_n_per_m == pytest.approx(k * LB_PER_FT_TO_N_PER_M, rel=1e-8)
        assert "verify" in d.source
    with pytest.raises(ValueError, match="known districts"):
        loading_district("arctic")


def test_wind_pressure_from_speed():
    # q = ½ρV² (definition); 1.225 kg/m³ ISA sea level: 30 m/s → 551.25 Pa.
    assert wind_pressure_pa(30.0) == pytest.approx(551.25)
    assert wind_pressure_pa(30.0, drag_coefficient=1.2) == pytest.approx(661.5)
    # Common practice (no source): 4 lb/ft² ≈ 40 mi/h on a cylinder (0.00256 V² rule).
    v = 40 * 0.44704
    psf = wind_pressure_pa(v, air_density_kg_per_m3=1.2255) / LB_PER_FT2_TO_PA
    assert psf == pytest.approx(0.00256 * 40**2, rel=0.01)


def test_blowout_angle():
    # Definition: atan(wind / (weight + ice)).
    assert blowout_angle_deg(1.0, 1.0) == pytest.approx(45.0)
    assert blowout_angle_deg(np.array([0.0, 3.0]), 2.0, 2.0) == pytest.approx([0.0, math.degrees(math.atan(0.75))])
    load = conductor_load(ACSR["d"], ACSR["w"], 0.0, WIND)
    assert load.blowout_angle_deg == pytest.approx(math.degrees(math.atan(load.wind_force_n_per_m / ACSR["w"])))
    with pytest.raises(ValueError):
        blowout_angle_deg(1.0, 0.0)


def test_insulator_swing():
    # Common practice (no source): conductor alone, equal wind and weight spans → blowout angle.
    assert insulator_swing_angle_deg(5.0, 300.0, 15.0, 300.0) == pytest.approx(blowout_angle_deg(5.0, 15.0))
    # Insulator weight reduces the swing, its wind area increases it; hand computation:
    # tan φ = (5·300 + 0.5·400·0.2) / (15·250 + 0.5·800) = 1540 / 4150.
    phi = insulator_swing_angle_deg(5.0, 300.0, 15.0, 250.0, insulator_weight_n=800.0,
                                    insulator_wind_area_m2=0.2, wind_pressure_pa=400.0)
    assert phi == pytest.approx(math.degrees(math.atan(1540.0 / 4150.0)))
    # A 2° line angle with 30 kN tension adds 2·T·sin(1°) of transverse pull.
    phi = insulator_swing_angle_deg(0.0, 300.0, 15.0, 300.0, tension_n=30e3, line_angle_deg=2.0)
    assert phi == pytest.approx(math.degrees(math.atan(2 * 30e3 * math.sin(math.radians(1)) / 4500.0)))
    with pytest.raises(ValueError, match="uplift"):
        insulator_swing_angle_deg(5.0, 300.0, 15.0, -100.0)


def test_input_checks():
    with pytest.raises(ValueError):
        ice_weight_n_per_m(0.02, -0.01)
    with pytest.raises(ValueError):
        strength_to_weight_ratio_m(1e5, 0.0)
    with pytest.raises(ValueError):
        wind_force_n_per_m(0.02, 0.0, -5.0)


def test_vectorised():
    d = np.array([0.01, 0.02, 0.03])
    wi = ice_weight_n_per_m(d, 0.0127)
    assert wi.shape == (3,) and np.all(np.diff(wi) > 0)

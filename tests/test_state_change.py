"""Tests of clearaudit.physics.state_change.

The main reference is an independent calculation written here: the conductor's unstressed
length is obtained by integrating ds / (1 + strain(s)) along the catenary with
scipy.integrate.quad, the local strain coming from the local tension T = H cosh((x - x0)/C)
(low point by scipy.optimize.brentq), and the final tension is found by brentq so that the
unstressed length is conserved. It shares no code with clearaudit beyond numpy/scipy.
"""
from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from scipy import integrate, optimize

from clearaudit.physics import catenary as cat
from clearaudit.physics import state_change as sc
from clearaudit.units import FOOT_M

# 795 kcmil 26/7 ACSR, typical values from memory (inputs only, not checked against anything):
# weight 15.97 N/m, total area 468.6 mm² (aluminium 402.8 mm², steel 65.8 mm²),
# composite final modulus 74 GPa, composite expansion 18.9e-6 /°C, aluminium 55 GPa and
# 23.0e-6 /°C, steel 200 GPa and 11.5e-6 /°C, rated strength 140 kN.
W = 15.97
AREA, MODULUS, ALPHA = 468.6e-6, 74e9, 18.9e-6
AL = dict(outer_area=402.8e-6, outer_modulus=55e9, outer_thermal_expansion=23.0e-6)
ST = dict(core_area=65.8e-6, core_modulus=200e9, core_thermal_expansion=11.5e-6)
LAYERS = {**AL, **ST}


# ----------------------------------------------------------------------------- reference
def _low_point(span, h, constant):
    def mismatch(x0):
        return constant * (np.cosh((span - x0) / constant) - np.cosh(x0 / constant)) - h
    return optimize.brentq(mismatch, -span - 20 * constant, span + 20 * constant, xtol=1e-12)


def reference_unstressed_length(tension, weight, span, h, strain_of_tension):
    """integral of ds / (1 + strain(T(s))) along the catenary (scipy.integrate.quad)."""
    constant = tension / weight
    x0 = _low_point(span, h, constant)

    def integrand(x):
        c = np.cosh((x - x0) / constant)  # ds/dx = cosh, T = H cosh
        return c / (1.0 + strain_of_tension(tension * c))

    value, _ = integrate.quad(integrand, 0.0, span, epsabs=1e-11, epsrel=1e-13, limit=200)
    return value


def reference_change_of_state(span, h, h1, w1, w2, strain1, strain2):
    """Final tension conserving the unstressed length; strain functions of local tension."""
    s0 = reference_unstressed_length(h1, w1, span, h, strain1)
    return optimize.brentq(
        lambda t: reference_unstressed_length(t, w2, span, h, strain2) - s0,
        w2 * span / 2, w2 * 1e6, xtol=1e-9, rtol=1e-13)


def linear_strain(ea, alpha, dt):
    return lambda t: t / ea + alpha * dt


def two_material_strain(dt, compression_limit=0.0):
    """Total strain carrying local tension t: k_s (e - a_s dt) + k_a max(e - a_a dt, e_min)."""
    k_a = AL["outer_area"] * AL["outer_modulus"]
    k_s = ST["core_area"] * ST["core_modulus"]
    a_a, a_s = AL["outer_thermal_expansion"], ST["core_thermal_expansion"]
    e_min = -compression_limit / AL["outer_modulus"]

    def carried(e):
        return k_s * (e - a_s * dt) + k_a * max(e - a_a * dt, e_min)

    return lambda t: optimize.brentq(lambda e: carried(e) - t, -0.5, 10.0, xtol=1e-15)


# ----------------------------------------------------------------------------- ruling span
def test_ruling_span_formula():
    # Formula sqrt(sum L^3 / sum L) (IEEE Std 524, ruling span): 600/800/1000 ft -> 848.5 ft.
    spans = np.array([600.0, 800.0, 1000.0]) * FOOT_M
    assert sc.ruling_span(spans) / FOOT_M == pytest.approx(848.5, abs=0.05)
    assert sc.ruling_span([350.0, 350.0]) == pytest.approx(350.0)
    with pytest.raises(ValueError):
        sc.ruling_span([])
    with pytest.raises(ValueError):
        sc.ruling_span([300.0, -1.0])


# ----------------------------------------------------------------------------- linear model
@pytest.mark.parametrize("span,h,t2,w2", [
    (300.0, 0.0, 75.0, W), (300.0, 0.0, -20.0, W), (450.0, 40.0, 100.0, W),
    (250.0, -30.0, -5.0, 2.8 * W), (400.0, 0.0, 0.0, 1.6 * W)])
def test_linear_change_of_state_against_strain_integration(span, h, t2, w2):
    # Reference: independent numerical integration of the strain along the curve (module doc).
    h1, t1 = 28000.0, 15.0
    ea = AREA * MODULUS
    expected = reference_change_of_state(span, h, h1, W, w2, linear_strain(ea, ALPHA, 0.0),
                                         linear_strain(ea, ALPHA, t2 - t1))
    got = sc.change_of_state(span, h1, W, t1, w2, t2, AREA, MODULUS, ALPHA,
                             height_difference=h)
    assert got == pytest.approx(expected, rel=1e-6)


def _parabolic_state_change(span, h1, w1, t1, w2, t2, ea, alpha):
    """Classic parabolic change-of-state cubic (from memory; IEEE Std 524 annex, CIGRE TB 324):
    H2^2 [H2 - H1 + w1^2 L^2 EA / (24 H1^2) + EA alpha (t2 - t1)] = w2^2 L^2 EA / 24."""
    k = -h1 + w1**2 * span**2 * ea / (24 * h1**2) + ea * alpha * (t2 - t1)
    roots = np.roots([1.0, k, 0.0, -(w2**2) * span**2 * ea / 24])
    real = roots[np.abs(roots.imag) < 1e-6 * np.abs(roots)].real
    return float(real[real > 0].max())


@pytest.mark.parametrize("span", [150.0, 300.0, 500.0, 800.0])
@pytest.mark.parametrize("t2,w2", [(-20.0, W), (50.0, W), (100.0, W), (0.0, 2.5 * W)])
def test_linear_change_of_state_agrees_with_parabolic_cubic(span, t2, w2):
    # Classic parabolic state-change equation agrees within 0.5 % when sag/span < 5 %.
    h1 = W * span / (8 * 0.025)  # initial sag 2.5 % of the span
    ea = AREA * MODULUS
    got = float(sc.change_of_state(span, h1, W, 15.0, w2, t2, AREA, MODULUS, ALPHA))
    sag_ratio = float(cat.sag(span, 0.0, got / w2)) / span
    assert sag_ratio < 0.05
    assert got == pytest.approx(_parabolic_state_change(span, h1, W, 15.0, w2, t2, ea, ALPHA),
                                rel=0.005)


def test_change_of_state_identities():
    # Same condition returns the same tension; creep shift = a hotter final temperature;
    # the result is vectorised over final temperatures (common practice, no source).
    h1 = 30000.0
    same = sc.change_of_state(350.0, h1, W, 10.0, W, 10.0, AREA, MODULUS, ALPHA)
    assert same == pytest.approx(h1, rel=1e-12)
    crept = sc.change_of_state(350.0, h1, W, 10.0, W, 40.0, AREA, MODULUS, ALPHA,
                               creep_shift=12.0)
    hotter = sc.change_of_state(350.0, h1, W, 10.0, W, 52.0, AREA, MODULUS, ALPHA)
    assert crept == pytest.approx(hotter, rel=1e-12)
    many = sc.change_of_state(350.0, h1, W, 10.0, W, np.array([0.0, 40.0, 80.0]), AREA,
                              MODULUS, ALPHA)
    assert many.shape == (3,) and np.all(np.diff(many) < 0)  # hotter -> lower tension


# ----------------------------------------------------------------------------- two materials
@pytest.mark.parametrize("t2", [-20.0, 40.0, 160.0, 200.0])
def test_two_material_against_strain_integration(t2):
    # Reference: local two-material strain integrated along the curve (module doc), away from
    # the knee (the model clips the span-average strain, the reference the local strain).
    span, h, h1, t1 = 320.0, 25.0, 30000.0, 15.0
    expected = reference_change_of_state(span, h, h1, W, W, two_material_strain(0.0),
                                         two_material_strain(t2 - t1))
    got = sc.change_of_state_two_material(span, h1, W, t1, W, t2, **LAYERS,
                                          height_difference=h)
    assert got == pytest.approx(expected, rel=1e-6)


def test_two_material_below_knee_equals_composite():
    # Below the knee both layers carry tension: the model is the linear composite with
    # EA = Ea Aa + Es As and alpha = (alpha_a Ea Aa + alpha_s Es As) / EA (composite
    # properties, CIGRE TB 324 / common practice).
    k_a = AL["outer_area"] * AL["outer_modulus"]
    k_s = ST["core_area"] * ST["core_modulus"]
    ea = k_a + k_s
    alpha = (AL["outer_thermal_expansion"] * k_a + ST["core_thermal_expansion"] * k_s) / ea
    temps = np.array([-30.0, 0.0, 30.0, 60.0])
    two = sc.change_of_state_two_material(300.0, 30000.0, W, 15.0, W, temps, **LAYERS)
    composite = sc.change_of_state(300.0, 30000.0, W, 15.0, W, temps, AREA, ea / AREA, alpha)
    np.testing.assert_allclose(two, composite, rtol=1e-10)


def test_knee_temperature_behaviour():
    # Knee point (CIGRE TB 324): above it the aluminium carries no tension and the core alone
    # sets the sag-temperature slope; below it the composite does.
    span, h1, t1 = 300.0, 30000.0, 15.0
    knee = float(sc.knee_temperature(span, h1, W, t1, *AL.values(), *ST.values()))
    assert 40.0 < knee < 250.0
    # just above and below the knee the aluminium strain changes sign: check via the tension
    # the independent two-material strain function assigns to the aluminium
    k_a = AL["outer_area"] * AL["outer_modulus"]

    def aluminium_tension(t):
        h2 = float(sc.change_of_state_two_material(span, h1, W, t1, W, t, **LAYERS))
        s = cat.arc_length(span, 0.0, h2 / W)
        s0_ref = reference_unstressed_length(h1, W, span, 0.0, two_material_strain(0.0))
        strain = s / s0_ref - 1.0
        return k_a * (strain - AL["outer_thermal_expansion"] * (t - t1))

    assert aluminium_tension(knee - 5.0) > 0 > aluminium_tension(knee + 5.0)
    assert aluminium_tension(knee) == pytest.approx(0.0, abs=1.0)  # [N], of ~30 kN
    # above the knee: a steel-only linear model restarted at the knee gives the same tension,
    # up to the second-order term of restarting the strain reference at the knee (strain
    # products ~ alpha dt * T/EA ~ 1e-6, worth ~1e-4 in H here)
    h_knee = float(sc.change_of_state_two_material(span, h1, W, t1, W, knee, **LAYERS))
    hot = np.array([knee + 20.0, knee + 60.0])
    two = sc.change_of_state_two_material(span, h1, W, t1, W, hot, **LAYERS)
    steel = sc.change_of_state(span, h_knee, W, knee, W, hot, ST["core_area"],
                               ST["core_modulus"], ST["core_thermal_expansion"])
    np.testing.assert_allclose(two, steel, rtol=5e-4)
    # sag grows more slowly with temperature above the knee than below it
    sag = [float(cat.sag(span, 0.0, float(sc.change_of_state_two_material(
        span, h1, W, t1, W, t, **LAYERS)) / W)) for t in (knee - 40, knee, knee + 40)]
    assert sag[2] - sag[1] < 0.8 * (sag[1] - sag[0])


def test_compression_limit_raises_knee():
    # An outer layer that resists some compression goes slack later (CIGRE TB 324).
    base = float(sc.knee_temperature(300.0, 30000.0, W, 15.0, *AL.values(), *ST.values()))
    limited = float(sc.knee_temperature(300.0, 30000.0, W, 15.0, *AL.values(), *ST.values(),
                                        outer_compression_limit=10e6))
    assert limited > base
    hot = base + 30.0
    expected = reference_change_of_state(300.0, 0.0, 30000.0, W, W, two_material_strain(0.0),
                                         two_material_strain(hot - 15.0, 10e6))
    got = sc.change_of_state_two_material(300.0, 30000.0, W, 15.0, W, hot, **LAYERS,
                                          outer_compression_limit=10e6)
    assert got == pytest.approx(expected, rel=1e-6)


# ----------------------------------------------------------------------------- section, table
def test_section_sags_and_stringing_table():
    spans = [250.0, 320.0, 410.0]
    heights = [0.0, 12.0, -20.0]
    conductor = sc.ConductorMechanics(W, AREA, MODULUS, ALPHA, rated_strength_n=140e3)
    rs = sc.ruling_span(spans)
    rows = sc.stringing_table(spans, conductor, [0.0, 15.0, 75.0], reference_temperature=15.0,
                              reference_sag=7.0, load_cases={"bare": W, "ice": 2.5 * W},
                              height_differences=heights)
    assert len(rows) == 6
    reference = next(r for r in rows if r.temperature_c == 15.0 and r.load_case == "bare")
    # the reference condition reproduces the given ruling-span sag (level catenary)
    assert reference.ruling_span_sag_m == pytest.approx(7.0, rel=1e-9)
    for row in rows:
        np.testing.assert_allclose(row.sags_m, cat.sag(np.array(spans), np.array(heights),
                                                       row.horizontal_tension_n
                                                       / row.unit_weight_n_per_m))
        assert row.percent_rbs == pytest.approx(100 * row.horizontal_tension_n / 140e3)
        expected = sc.change_of_state(rs, reference.horizontal_tension_n, W, 15.0,
                                      row.unit_weight_n_per_m, row.temperature_c, AREA,
                                      MODULUS, ALPHA)
        assert row.horizontal_tension_n == pytest.approx(float(expected), rel=1e-9)
        assert row.as_dict()["sag_span_3_m"] == row.sags_m[2]
    by_tension = sc.stringing_table(rs, conductor, [15.0], reference_temperature=15.0,
                                    reference_tension=reference.horizontal_tension_n)
    assert by_tension[0].ruling_span_sag_m == pytest.approx(7.0, rel=1e-9)
    sags = sc.section_sags_at_condition(spans, None, 30000.0, W)
    np.testing.assert_allclose(sags, cat.sag(np.array(spans), 0.0, 30000.0 / W))


def test_conductor_mechanics_dispatch_and_validation():
    two = sc.ConductorMechanics(
        W, AREA, MODULUS, ALPHA, outer_area_m2=AL["outer_area"],
        outer_modulus_pa=AL["outer_modulus"],
        outer_thermal_expansion_per_c=AL["outer_thermal_expansion"],
        core_area_m2=ST["core_area"], core_modulus_pa=ST["core_modulus"],
        core_thermal_expansion_per_c=ST["core_thermal_expansion"])
    assert two.two_material
    assert two.final_tension(300.0, 30000.0, W, 15.0, W, 120.0) == pytest.approx(
        float(sc.change_of_state_two_material(300.0, 30000.0, W, 15.0, W, 120.0, **LAYERS)))
    duck = SimpleNamespace(weight_n_per_m=W, area_m2=AREA, modulus_pa=MODULUS,
                           thermal_expansion_per_c=ALPHA, rated_strength_n=None, name="x")
    assert not sc.ConductorMechanics.from_object(duck).two_material
    with pytest.raises(ValueError):
        sc.ConductorMechanics(W, AREA, MODULUS, ALPHA, core_area_m2=1e-4)
    with pytest.raises(ValueError):
        sc.change_of_state(300.0, -1.0, W, 15.0, W, 20.0, AREA, MODULUS, ALPHA)
    with pytest.raises(ValueError):
        sc.stringing_table([300.0], two, [15.0], reference_temperature=15.0)
    with pytest.raises(ValueError):
        sc.section_sags_at_condition([300.0, 200.0], [1.0], 30000.0, W)

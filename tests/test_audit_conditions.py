"""Conditions: condition curves, section tension, change of state (worked example and an
independent strain-integration reference), uncertainty propagation."""
from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest
from scipy import integrate, optimize

from clearaudit.audit.conditions import (
    catenary_curve,
    conductor_mechanics,
    project_conditions,
    resolve_conditions,
    section_tension,
)
from clearaudit.audit.rules import load_rule_set
from clearaudit.physics.conductors import lookup_conductor
from clearaudit.physics.fit import fit_catenary


def test_vertical_curve_is_the_catenary():
    # z(x) = zA + C[cosh((x - x0)/C) - cosh(x0/C)] (Irvine 1981, ch. 1), written out here.
    a, b, c = np.array([0.0, 0.0, 20.0]), np.array([0.0, 250.0, 26.0]), 1200.0
    curve, frac, span, h = catenary_curve(a, b, c, spacing_m=0.5)
    assert span == pytest.approx(250.0) and h == pytest.approx(6.0)
    x0 = 125.0 - c * math.asinh(6.0 / (2 * c * math.sinh(125.0 / c)))
    x = curve[:, 1]
    assert np.allclose(curve[:, 2], 20.0 + c * (np.cosh((x - x0) / c) - math.cosh(x0 / c)),
                       atol=1e-9)
    assert np.allclose(curve[:, 0], 0.0) and frac[0] == 0.0 and frac[-1] == 1.0
    assert np.max(np.linalg.norm(np.diff(curve, axis=0), axis=1)) <= 0.5


def test_wind_curve_hangs_in_the_swung_plane():
    # Level span: the mid-span displacement from the chord points along the resultant load
    # (ASCE MOP 74 blowout: angle atan(wind / weight)).
    a, b = np.array([0.0, 0.0, 30.0]), np.array([300.0, 0.0, 30.0])
    w, f = 15.0, 8.0
    phi = math.atan2(f, w)
    g = np.array([0.0, math.sin(phi), -math.cos(phi)])
    curve, _, span, h = catenary_curve(a, b, 1500.0, g)
    mid = curve[np.argmin(np.abs(curve[:, 0] - 150.0))] - np.array([150.0, 0.0, 30.0])
    assert math.atan2(mid[1], -mid[2]) == pytest.approx(phi, abs=1e-9)
    assert np.linalg.norm(mid) == pytest.approx(1500.0 * (math.cosh(150 / 1500) - 1), rel=1e-6)
    assert span == pytest.approx(300.0) and h == pytest.approx(0.0, abs=1e-12)


def test_section_tension_is_the_inverse_variance_mean():
    # Reference: numpy.average with weights 1/sigma² (Taylor, Error Analysis, ch. 7).
    h = np.array([27000.0, 27100.0, 26950.0])
    ci = np.array([50.0, 80.0, 60.0])
    mean, half = section_tension(h, ci)
    assert mean == pytest.approx(np.average(h, weights=1 / ci**2))
    assert half >= 1 / math.sqrt(np.sum(1 / ci**2))


def test_mot_floor_and_shield_temperature():
    rules = load_rule_set("na-transmission")
    specs = resolve_conditions(rules, 40.0, 20.0)
    assert specs["mot"].temperature_c == 50.0           # NESC Rule 232A floor (from memory)
    assert specs["mot"].shield_temperature_c == 50.0
    assert specs["wind_left"].side == 1 and specs["wind_right"].side == -1
    assert specs["ice"].radial_ice_m == pytest.approx(0.0127)


def test_change_of_state_worked_example_chakrabarti():
    # Source: Chakrabarti, Soni, Gupta, Bhatnagar, "A Textbook on Power System Engineering",
    # 2nd ed., Dhanpat Rai, Example 5.9 (p. 201): 300 m span, A = 226 mm², d = 19.53 mm,
    # w = 0.844 kg/m, E = 9320 kg/mm², alpha = 18.44e-6 /°C; worst case -5 °C with 9.5 mm
    # ice (915 kg/m³) and 39 kg/m² wind at half the 7950 kg strength; erection 45 °C still air.
    # The book's parabolic state equation T²(T + B) = D has the root 1644.8 kg (the printed
    # 1710 kg does not satisfy it); the exact catenary must agree with the parabolic root to
    # the parabola's error, of order (sag/span)² ≈ 4e-4.
    d, t = 1.953, 0.95                                  # cm
    w_ice = 915.0 * math.pi * t * (d + t) * 1e-4
    w_wind = 39.0 * (d + 2 * t) * 1e-2
    w1 = math.hypot(0.844 + w_ice, w_wind)
    conductor = SimpleNamespace(unit_weight_n_per_m=0.844, area_total_m2=226.0,
                                modulus_final_pa=9320.0, thermal_expansion_per_c=18.44e-6,
                                rated_strength_n=7950.0, has_core=False)
    mech = conductor_mechanics(conductor, "linear")
    h2 = float(mech.final_tension(300.0, 7950.0 / 2, w1, -5.0, 0.844, 45.0))
    a, e, alpha, half = 226.0, 9320.0, 18.44e-6, 150.0
    coef_b = a * e * (alpha * 50.0 + (w1 * half / 3975.0) ** 2 / 6) - 3975.0
    coef_d = -(0.844**2 * half**2 * a * e / 6)
    roots = np.roots([1.0, coef_b, 0.0, coef_d])
    parabolic = float(max(r.real for r in roots if abs(r.imag) < 1e-9))
    assert parabolic == pytest.approx(1644.8, abs=0.1)
    assert h2 == pytest.approx(parabolic, rel=1e-3)


def _reference_h(span, h1, w1, t1, w2, t2, ea, alpha):
    """Equal unstressed lengths by integrating ds/(1+eps) (scipy quad + brentq)."""
    def s0(h, w, temp):
        c = h / w
        f = lambda x: math.cosh(x / c) / (1 + h * math.cosh(x / c) / ea + alpha * temp)  # noqa: E731
        return integrate.quad(f, -span / 2, span / 2, epsabs=1e-12, epsrel=1e-13)[0]
    target = s0(h1, w1, t1)
    return optimize.brentq(lambda h: s0(h, w2, t2) - target, 0.05 * h1, 20 * h1, xtol=1e-8)


@pytest.fixture(scope="module")
def section():
    """Two suspension spans of one section, wires fitted from exact catenary points."""
    conductor = lookup_conductor("795 26/7 ACSR")
    w = conductor.unit_weight_n_per_m
    h = 27000.0
    rng = np.random.default_rng(2)
    towers = [np.array([0.0, 0.0]), np.array([320.0, 0.0]), np.array([700.0, 30.0])]
    heights = [40.0, 44.0, 41.0]
    spans, fits = [], []
    for i in range(2):
        a = np.array([*towers[i], heights[i]])
        b = np.array([*towers[i + 1], heights[i + 1]])
        curve, _, _, _ = catenary_curve(a, b, h / w, spacing_m=0.3)
        pts = curve + rng.normal(0, 0.03, curve.shape)
        fit = fit_catenary(pts, towers[i], towers[i + 1])
        wire = SimpleNamespace(wire_id="P1", role="phase", bundle_count=1, fit=fit,
                               status="fitted", note="", n_points=len(pts))
        spans.append(SimpleNamespace(id=f"S{i}", section_id="TS1", wires=[wire],
                                     from_structure=f"T{i}", to_structure=f"T{i + 1}",
                                     a_xy=towers[i], b_xy=towers[i + 1],
                                     length_m=float(np.hypot(*(towers[i + 1] - towers[i])))))
        fits.append(fit)
    lengths = [s.length_m for s in spans]
    rs = math.sqrt(sum(x**3 for x in lengths) / sum(lengths))
    kinds = {"T0": "deadend", "T1": "suspension", "T2": "deadend"}
    model = SimpleNamespace(spans=spans, sections=[SimpleNamespace(id="TS1", span_ids=["S0", "S1"],
                                                                   ruling_span_m=rs)],
                            structure=lambda sid: SimpleNamespace(kind=kinds.get(sid, "")))
    return SimpleNamespace(model=model, conductor=conductor, h=h, w=w, rs=rs)


def test_mot_change_of_state_matches_strain_integration(section):
    rules = load_rule_set("na-transmission")
    specs = resolve_conditions(rules, 100.0, 20.0)
    states = project_conditions(section.model, {"phase": section.conductor}, specs, 2.0,
                                strain_model="linear")
    assert len(states) == 2
    c = section.conductor
    ref = _reference_h(section.rs, section.h, section.w, 20.0, section.w, 100.0,
                       c.area_total_m2 * c.modulus_final_pa, c.thermal_expansion_per_c)
    for st in states:
        # The fitted survey tension carries the fit noise (~0.1 %); MOT H follows it.
        assert st.horizontal_tension_n["mot"] == pytest.approx(ref, rel=3e-3)
        L = st.fit.span_length_m
        hdiff = st.fit.z_b_m - st.fit.z_a_m
        cm = ref / section.w
        x0 = L / 2 - cm * math.asinh(hdiff / (2 * cm * math.sinh(L / (2 * cm))))
        xs = x0 + cm * math.asinh(hdiff / L)
        sag = hdiff * xs / L - cm * (math.cosh((xs - x0) / cm) - math.cosh(x0 / cm))
        assert st.sag_m["mot"] == pytest.approx(sag, abs=0.05)


def test_uncertainty_includes_temperature_sensitivity(section):
    # dS/dT × ΔT by a finite difference of the reference, compared with the half-width of a
    # run where the fit is near-exact (the temperature term dominates).
    rules = load_rule_set("na-transmission")
    specs = resolve_conditions(rules, 100.0, 20.0)
    wide = project_conditions(section.model, {"phase": section.conductor}, specs, 10.0,
                              strain_model="linear")
    narrow = project_conditions(section.model, {"phase": section.conductor}, specs, 0.0,
                                strain_model="linear")
    c = section.conductor
    ea, alpha = c.area_total_m2 * c.modulus_final_pa, c.thermal_expansion_per_c
    h_hi = _reference_h(section.rs, section.h, section.w, 20.0, section.w, 110.0, ea, alpha)
    h_lo = _reference_h(section.rs, section.h, section.w, 20.0, section.w, 90.0, ea, alpha)
    L = section.rs
    dsag = 0.5 * abs(L**2 / 8 * section.w * (1 / h_hi - 1 / h_lo))   # parabolic, level span
    for st_w, st_n in zip(wide, narrow, strict=True):
        temp_part = math.sqrt(max(st_w.sag_ci95_m["mot"] ** 2 - st_n.sag_ci95_m["mot"] ** 2, 0))
        scale = (st_w.fit.span_length_m / L) ** 2
        assert temp_part == pytest.approx(dsag * scale, rel=0.05)


def test_wind_and_ice_conditions_and_insulator_swing(section):
    rules = load_rule_set("na-transmission")
    specs = resolve_conditions(rules, 100.0, 20.0)
    still = project_conditions(section.model, {"phase": section.conductor}, specs, 2.0)
    swung = project_conditions(section.model, {"phase": section.conductor}, specs, 2.0,
                               insulator_length_m=2.0)
    st, sw = still[0], swung[0]
    assert set(st.curves) == {"survey", "mot", "wind_left", "wind_right", "ice"}
    # Ice adds weight: more sag than at survey temperature without ice would give.
    assert st.sag_m["ice"] > 0 and st.horizontal_tension_n["ice"] > st.horizontal_tension_n[
        "survey"]
    # Span S0 ends at a suspension structure (T1): its end moves leeward with insulator swing.
    left = np.array([-st.fit.direction[1], st.fit.direction[0]])
    moved = (sw.curves["wind_left"][-1, :2] - st.curves["wind_left"][-1, :2]) @ left
    assert moved > 0.5
    assert np.allclose(sw.curves["wind_left"][0], st.curves["wind_left"][0])  # dead-end A


def test_states_keep_recipes_not_samples(section):
    # The states hold how each curve is sampled, not the samples: evaluating twice gives the
    # same numbers, the materialized copy holds exactly those, and a state pickles to a
    # small fraction of its samples' size (what a Dask task ships). Each curve still hangs
    # at its catenary: the mid-span sag from the samples equals the state's sag (the chord
    # minus the curve, vertical load). Common practice (no source) for the sag definition;
    # the sag values themselves are checked against the change-of-state reference above.
    import pickle

    rules = load_rule_set("na-transmission")
    specs = resolve_conditions(rules, 100.0, 20.0)
    states = project_conditions(section.model, {"phase": section.conductor}, specs, 2.0)
    st = states[0]
    assert list(st.curves) == list(st.recipes) == list(st.fractions)
    full = st.materialized()
    samples_bytes = 0
    for c in st.recipes:
        again = st.sample(c)
        assert np.array_equal(st.curves[c], again[0])
        assert np.array_equal(full.curves[c], st.curves[c])
        assert np.array_equal(full.fractions[c], st.fractions[c])
        samples_bytes += st.curves[c].nbytes + st.fractions[c].nbytes
    assert len(pickle.dumps(st)) < 0.25 * samples_bytes
    assert full._samples is not None and st._samples is None
    assert not st.curves["mot"].flags.writeable and not full.fractions["mot"].flags.writeable
    probe = project_conditions(section.model, {"phase": section.conductor}, specs, 2.0)[0]
    probe.sample = None  # membership must not evaluate a curve
    assert "mot" in probe.curves and "nothing" not in probe.fractions
    curve, frac = st.curves["mot"], st.fractions["mot"]
    a, b = curve[0], curve[-1]
    chord = a[2] + frac * (b[2] - a[2])
    assert float(np.max(chord - curve[:, 2])) == pytest.approx(st.sag_m["mot"], rel=2e-3)


def test_frame_points_equal_the_numpy_expression():
    # reference: numpy's a + x[:, None] * ex + z[:, None] * ez, bit for bit
    from clearaudit.audit._polyline import frame_points

    rng = np.random.default_rng(4)
    for n in (1, 2, 7, 801):
        a = rng.normal(size=3) * 1e4
        ex = rng.normal(size=3)
        ex /= np.linalg.norm(ex)
        ez = rng.normal(size=3)
        x = np.sort(rng.uniform(0, 400, n))
        z = rng.normal(size=n) * 30
        out = np.empty((n, 3))
        frame_points(a, ex, ez, x, z, out)
        np.testing.assert_array_equal(out, a + x[:, None] * ex + z[:, None] * ez)
    with pytest.raises(ValueError):
        frame_points(a, ex, ez, x, z[:-1], out)


def _two_sections_two_roles(section):
    """The fixture's two spans as two sections, each with a phase and a shield wire."""
    spans = []
    for k, sp in enumerate(section.model.spans):
        fit = sp.wires[0].fit
        wires = [SimpleNamespace(wire_id="P1", role="phase", bundle_count=1, fit=fit),
                 SimpleNamespace(wire_id="SW1", role="shield", bundle_count=1, fit=fit)]
        spans.append(SimpleNamespace(**{**vars(sp), "section_id": f"TS{k}", "wires": wires}))
    sections = [SimpleNamespace(id=f"TS{k}", span_ids=[sp.id], ruling_span_m=sp.length_m)
                for k, sp in enumerate(spans)]
    return SimpleNamespace(spans=spans, sections=sections, structure=section.model.structure)


@pytest.mark.parametrize("strain_model", ["linear", "auto"])
def test_changes_of_state_solved_together_equal_each_solved_alone(section, strain_model):
    # reference: ConductorMechanics.final_tension called for one wire, section and load at a
    # time (the form before the solves were gathered), value for value
    from clearaudit.audit import conditions as cond

    model = _two_sections_two_roles(section)
    conductors = {"phase": section.conductor, "shield": lookup_conductor("7 No. 8 ACS")}
    rules = load_rule_set("na-transmission")
    specs = resolve_conditions(rules, 100.0, 20.0)
    from clearaudit.physics.state_change import ConductorMechanics

    solves = []
    real_solve = ConductorMechanics.final_tension

    def counted(self, *args, **kw):
        solves.append(np.size(args[0]))
        return real_solve(self, *args, **kw)

    ConductorMechanics.final_tension = counted
    try:
        states = project_conditions(model, conductors, specs, 2.0, strain_model=strain_model,
                                    creep_shift_c=5.0)
    finally:
        ConductorMechanics.final_tension = real_solve
    assert len(states) == 4
    # one solve per role, for both sections and every distinct load (three: MOT, wind with
    # both sides sharing one, ice) in five variants each
    assert solves == [2 * 3 * 5, 2 * 3 * 5]
    for st in states:
        mech = conductor_mechanics(conductors[st.role], strain_model)
        w = mech.weight_n_per_m
        span = next(s for s in model.spans if s.id == st.span_id)
        rs = next(s for s in model.sections if s.id == span.section_id).ruling_span_m
        h, ci = cond._fit_tension(st.fit, w)
        h_survey, h_ci = section_tension(np.array([h]), np.array([ci]))
        h_var, t_var = cond._variants(h_survey, h_ci, specs["survey"].temperature_c, 2.0)
        for name, spec in specs.items():
            if name == "survey":
                continue
            t_final, _, _, w_final = cond._final_load(spec, st.role,
                                                       float(conductors[st.role].diameter_m), w)
            alone = mech.final_tension(rs, h_var, w, t_var, w_final, t_final, creep_shift=5.0)
            assert st.horizontal_tension_n[name] == float(alone[0])
            assert st.horizontal_tension_ci95_n[name] == math.hypot(
                0.5 * (alone[1] - alone[2]), 0.5 * (alone[3] - alone[4]))


def test_a_failed_change_of_state_is_noted_on_its_own_wires_only(section, monkeypatch):
    # One section's solve fails: the gathered solve falls back to solving wire and section
    # one at a time, so only that section's wires carry the note and lack the conditions.
    from clearaudit.audit import conditions as cond

    model = _two_sections_two_roles(section)
    bad_rs = model.sections[1].ruling_span_m
    real = cond.conductor_mechanics

    class Failing:
        def __init__(self, mech):
            self.mech = mech
            self.weight_n_per_m = mech.weight_n_per_m

        def final_tension(self, rs, *args, **kw):
            if np.any(np.asarray(rs) == bad_rs):
                raise ValueError("the conductor would hang slacker than C = L/2")
            return self.mech.final_tension(rs, *args, **kw)

    monkeypatch.setattr(cond, "conductor_mechanics", lambda c, m: Failing(real(c, m)))
    rules = load_rule_set("na-transmission")
    specs = resolve_conditions(rules, 100.0, 20.0)
    states = project_conditions(model, {"phase": section.conductor, "shield": section.conductor},
                                specs, 2.0)
    for st in states:
        failed = st.section_id == "TS1"
        assert ("mot" in st.horizontal_tension_n) is not failed
        assert any("change of state failed" in n for n in st.notes) is failed

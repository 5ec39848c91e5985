"""audit_line end to end on a small hand-built scene: every obstacle kind and the result."""
from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest

from clearaudit.audit import AuditOptions, AuditResult, audit_line
from clearaudit.audit.conditions import catenary_curve
from clearaudit.audit.rules import load_rule_set
from clearaudit.cloud import Cloud
from clearaudit.config import LineConfig
from clearaudit.errors import InputError
from clearaudit.physics.conductors import lookup_conductor
from clearaudit.physics.fit import fit_catenary

W = 15.97
H = 27000.0


@pytest.fixture(scope="module")
def scene():
    rng = np.random.default_rng(5)
    conductor = lookup_conductor("795 26/7 ACSR")
    a, b = np.array([0.0, 0.0, 30.0]), np.array([300.0, 0.0, 30.0])
    wire_curve, _, _, _ = catenary_curve(a, b, H / W, spacing_m=0.3)
    wire_pts = wire_curve + rng.normal(0, 0.02, wire_curve.shape)
    low_z = float(wire_curve[:, 2].min())                     # ~23.0 m at mid-span
    gx, gy = np.meshgrid(np.arange(0, 300, 1.0), np.arange(-20, 20, 1.0))
    ground = np.column_stack([gx.ravel(), gy.ravel(), np.zeros(gx.size)])
    ground[(ground[:, 0] > 140) & (ground[:, 0] < 160) & (np.abs(ground[:, 1]) < 3), 2] = \
        low_z - 5.0                                          # a mound 5 m under the wire
    tree = np.array([100.0, 0.0, 0.0]) + rng.normal(0, 0.3, (200, 3))
    z100 = float(np.interp(100.0, wire_curve[:, 0], wire_curve[:, 2]))
    tree[:, 2] = z100 - 0.8 - np.abs(rng.normal(0, 0.5, 200))  # crown top 0.8 m under wire
    roof = np.column_stack([rng.uniform(220, 230, 300), rng.uniform(-4, 4, 300),
                            np.full(300, low_z + 2.0 - 4.0)])  # 4 m under the wire there
    # Walls under the eaves, 1.6 m or more below the roof: the same building.
    wall_x, wall_z = np.meshgrid(np.arange(220.0, 230.0, 0.5), np.arange(0.0, 3.0, 0.5))
    walls = np.column_stack([np.tile(wall_x.ravel(), 2), np.repeat([-4.2, 4.2], wall_x.size),
                             np.tile(low_z + 2.0 - 4.0 - 1.6 - wall_z.ravel(), 2)])
    roof = np.concatenate([roof, walls])
    other = np.column_stack([np.full(60, 60.0), np.linspace(-15, 15, 60),
                             np.full(60, float(np.interp(60.0, wire_curve[:, 0],
                                                         wire_curve[:, 2])) - 1.0)])
    xyz = np.concatenate([wire_pts, ground, tree, roof, other])
    classes = np.concatenate([np.full(len(wire_pts), 14), np.full(len(ground), 2),
                              np.full(len(tree), 5), np.full(len(roof), 6),
                              np.full(len(other), 14)]).astype(np.uint8)
    cloud = Cloud(xyz=xyz, origin=np.zeros(3), classification=classes)
    fit = fit_catenary(wire_pts, a[:2], b[:2])
    n_wire = len(wire_pts)
    other_idx = np.arange(len(xyz) - len(other), len(xyz))
    wire = SimpleNamespace(wire_id="P1", role="phase", bundle_count=1, fit=fit, status="fitted",
                           note="", n_points=n_wire, point_indices=np.arange(n_wire))
    span = SimpleNamespace(id="S1-S2", section_id="TS1", wires=[wire], from_structure="S1",
                           to_structure="S2", a_xy=a[:2], b_xy=b[:2], length_m=300.0)
    model = SimpleNamespace(
        spans=[span], sections=[SimpleNamespace(id="TS1", span_ids=["S1-S2"],
                                                ruling_span_m=300.0)],
        other_wires=[SimpleNamespace(id="X01", point_indices=other_idx)],
        structure=lambda sid: SimpleNamespace(kind="deadend"))
    hag = xyz[:, 2] - np.where(classes == 2, xyz[:, 2], 0.0)
    classification = SimpleNamespace(classification=classes, height_above_ground_m=hag,
                                     ground=None)
    config = LineConfig()
    config.line.voltage_kv = 230.0
    config.line.altitude_m = 100.0
    config.survey.conductor_temperature_c = 20.0
    rules = load_rule_set("na-transmission")
    conductors = {"phase": conductor, "shield": lookup_conductor("3/8 EHS")}
    result = audit_line(cloud, classification, model, config, conductors, rules,
                        options=AuditOptions(fall_in=False))
    return SimpleNamespace(result=result, rules=rules, low_z=low_z, z100=z100,
                           inputs=(cloud, classification, model, config, conductors))


def test_result_shape(scene):
    r = scene.result
    assert isinstance(r, AuditResult)
    assert r.survey_temperature["method"] == "given"
    assert set(r.conditions) == {"survey", "mot", "wind_left", "wind_right", "ice"}
    row = r.span_rows[0]
    for column in ("span_id", "wire_id", "role", "from_structure", "to_structure",
                   "span_length_m", "n_points", "coverage", "rms_m", "catenary_constant_m",
                   "horizontal_tension_n", "horizontal_tension_ci95_n", "conductor_temperature_c",
                   "sag_survey_m", "horizontal_tension_mot_n", "sag_mot_m",
                   "min_ground_clearance_survey_m", "min_ground_clearance_mot_m", "status",
                   "note", "section_id", "sag_survey_ci95_m", "sag_mot_ci95_m",
                   "catenary_constant_ci95_m", "rated_strength_pct", "largest_gap_m"):
        assert column in row, column
    assert row["attachment_a_local"].shape == (3,)
    assert row["horizontal_tension_n"] == pytest.approx(H, rel=5e-3)
    # Mound 5 m under the lowest point: survey ground clearance 5 m.
    assert row["min_ground_clearance_survey_m"] == pytest.approx(5.0, abs=0.1)
    assert row["sag_mot_m"] > row["sag_survey_m"]
    curves = r.curves[("S1-S2", "P1")]
    assert set(curves) == set(r.conditions) and len(curves["mot"]) <= 101
    assert ("S1-S2" in r.ground_profiles) and r.ground_profiles["S1-S2"].shape[1] == 2


def test_output_curves_are_the_same_with_the_fall_in_search(scene):
    # the fall-in search samples the survey and MOT curves and hands their downsampled
    # copies to the outputs: the same vertices as sampling them for the outputs alone
    cloud, classification, model, config, conductors = scene.inputs
    with_fall_in = audit_line(cloud, classification, model, config, conductors, scene.rules,
                              options=AuditOptions(fall_in=True))
    assert with_fall_in.summary["trees_examined"] > 0  # the search ran
    assert with_fall_in.curves.keys() == scene.result.curves.keys()
    for key, curves in scene.result.curves.items():
        assert list(with_fall_in.curves[key]) == list(curves)
        for condition, vertices in curves.items():
            np.testing.assert_array_equal(with_fall_in.curves[key][condition], vertices)


def test_every_kind_is_found_once_per_condition(scene):
    rows = scene.result.violations
    kinds = {(r["kind"], r["condition"]) for r in rows}
    assert ("vegetation", "survey") in kinds and ("vegetation", "mot") in kinds
    assert ("ground", "mot") in kinds        # 6.78 m required, 5 m at survey already
    assert ("ground", "survey") in kinds
    assert ("building", "mot") in kinds      # 4 m under the wire, 4.98 m required
    assert ("wire", "mot") in kinds          # crossing 1 m under, 1.78 m required
    # One row per obstacle per condition group.
    keys = [(r["obstacle_id"], r["condition"]) for r in rows]
    assert len(keys) == len(set(keys))
    veg = next(r for r in rows if r["kind"] == "vegetation" and r["condition"] == "survey")
    assert veg["clearance_m"] == pytest.approx(0.8, abs=0.1)
    assert veg["required_m"] == pytest.approx(1.22)
    assert veg["deficit_m"] == pytest.approx(veg["required_m"] - veg["clearance_m"])
    assert veg["certainty"] == "certain" and veg["grow_in_years"] == 0.0
    ground = next(r for r in rows if r["kind"] == "ground" and r["condition"] == "survey")
    assert ground["surface"] == "land"
    assert ground["required_m"] == pytest.approx(
        scene.rules.required("ground", "phase", 230.0).value_m)
    assert ground["station_m"] == pytest.approx(150.0, abs=10.5)
    building = next(r for r in rows if r["kind"] == "building" and r["condition"] == "survey")
    assert building["direction"] in ("vertical", "horizontal")
    assert [r["priority"] for r in rows] == list(range(1, len(rows) + 1))


def test_missing_voltage_is_an_input_error(scene):
    config = LineConfig()
    with pytest.raises(InputError, match="voltage"):
        audit_line(Cloud(xyz=np.zeros((1, 3)), origin=np.zeros(3)), None,
                   SimpleNamespace(spans=[], sections=[]), config, {}, scene.rules)


def test_bad_options():
    with pytest.raises(ValueError):
        AuditOptions(spacing_m=1.0)
    with pytest.raises(ValueError):
        AuditOptions(growth_rate_m_per_year=0.0)
    assert math.isfinite(AuditOptions().link_m)


def test_one_building_is_one_obstacle(scene):
    # "Points are grouped into obstacles (one tree, one roof, one patch of ground), and each
    # obstacle gives one violation per condition": the roof and its walls are one building.
    rows = [r for r in scene.result.violations if r["kind"] == "building"]
    assert len({r["obstacle_id"] for r in rows}) == 1
    assert len(rows) == len({r["condition"] for r in rows})
    for r in rows:
        # The governing direction is named in the row and in the reason, with both moves.
        assert r["direction"] in r["reason"]
        assert r["deficit_m"] == pytest.approx(min(r["deficit_vertical_m"],
                                                   r["deficit_horizontal_m"]))
        req = scene.rules.required("building", "phase", 230.0, key=r["direction"]).value_m
        assert r["required_m"] == pytest.approx(req)

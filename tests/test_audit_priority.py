"""Tree tops, fall-in geometry, ranking; survey temperature."""
from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest

from clearaudit.audit.priority import fall_in_distance, find_tree_tops, rank_findings
from clearaudit.audit.temperature import survey_conductor_temperature


def _cone(rng, x, y, height, radius, n=400):
    r = radius * np.sqrt(rng.uniform(0, 1, n))
    t = rng.uniform(0, 2 * np.pi, n)
    z = height * (1 - r / radius)
    return np.column_stack([x + r * np.cos(t), y + r * np.sin(t), z])


def test_tree_tops_found_on_separate_cones():
    rng = np.random.default_rng(0)
    trees = [(0.0, 0.0, 20.0), (12.0, 3.0, 15.0), (30.0, -5.0, 8.0)]
    pts = np.concatenate([_cone(rng, x, y, h, 3.0) for x, y, h in trees])
    tops = find_tree_tops(pts, pts[:, 2])
    assert len(tops) == 3
    order = np.argsort(-tops.height_m)
    assert tops.height_m[order] == pytest.approx([20.0, 15.0, 8.0], abs=0.6)
    assert np.allclose(tops.base_xyz[:, 2], 0.0, atol=1e-9)


def test_fall_in_geometry():
    # A tree pivoting about its base reaches points within its height (common practice).
    wire = np.column_stack([np.linspace(-50, 50, 201), np.full(201, 10.0), np.full(201, 15.0)])
    base = np.array([[0.0, 0.0, 0.0], [0.0, -10.0, 0.0]])
    d = fall_in_distance(base, wire)
    assert d == pytest.approx([math.hypot(10, 15), math.hypot(20, 15)])
    assert list(d < 20.0) == [True, False]


def test_ranking_tiers_and_reasons():
    base = dict(span_id="S1", wire_id="P1", clearance_ci95_m=0.05, certainty="certain",
                grow_in_years=0.0, fall_in=False, finding="clearance")
    rows = [
        dict(base, kind="vegetation", condition="mot", clearance_m=0.2, required_m=1.2,
             deficit_m=1.0),
        dict(base, kind="vegetation", condition="survey", clearance_m=1.1, required_m=1.2,
             deficit_m=0.1),
        dict(base, kind="ground", condition="ice", clearance_m=6.0, required_m=6.8,
             deficit_m=0.8, grow_in_years=None),
        dict(base, kind="vegetation", condition="survey", clearance_m=9.0, required_m=1.2,
             deficit_m=-7.8, finding="fall_in", fall_in=True, tree_height_m=25.0,
             fall_in_distance_m=20.0, grow_in_years=15.6),
        dict(base, kind="vegetation", condition="mot", clearance_m=0.9, required_m=1.2,
             deficit_m=0.3, fall_in=True, tree_height_m=18.0, fall_in_distance_m=12.0),
    ]
    ranked = rank_findings(rows)
    assert [r["priority"] for r in ranked] == [1, 2, 3, 4, 5]
    assert [(r["condition"], r["deficit_m"]) for r in ranked] == [
        ("survey", 0.1), ("mot", 1.0), ("mot", 0.3), ("ice", 0.8), ("survey", -7.8)]
    assert "inside the 1.20 m requirement at survey" in ranked[0]["reason"]
    assert "can fall into the line" in ranked[2]["reason"]
    assert ranked[4]["reason"].startswith("fall-in risk")


def test_survey_temperature_given_and_default():
    given = survey_conductor_temperature(
        SimpleNamespace(conductor_temperature_c=31.0, conductor_temperature_uncertainty_c=3.0),
        None)
    assert (given["value_c"], given["ci95_c"], given["method"]) == (31.0, 3.0, "given")
    default = survey_conductor_temperature(SimpleNamespace(conductor_temperature_c=None,
                                                           ambient_temperature_c=None), None)
    assert default["method"] == "default" and default["ci95_c"] >= 15.0
    assert "DEFAULT" in default["note"]


def test_survey_temperature_heat_balance():
    # Physical identity of the IEEE 738 heat balance (IEEE Std 738-2012, clause 4): with no
    # current and no sun the conductor sits at the ambient temperature; current heats it.
    from clearaudit.physics.conductors import lookup_conductor

    conductor = lookup_conductor("795 26/7 ACSR")
    survey = SimpleNamespace(conductor_temperature_c=None, ambient_temperature_c=20.0,
                             wind_speed_m_s=2.0, wind_angle_deg=90.0, current_a=0.0,
                             datetime=None, latitude_deg=None, emissivity=0.8,
                             solar_absorptivity=0.0)
    cold = survey_conductor_temperature(survey, conductor)
    assert cold["method"] == "heat balance (IEEE 738)"
    assert cold["value_c"] == pytest.approx(20.0, abs=1e-3)
    survey.current_a = 800.0
    warm = survey_conductor_temperature(survey, conductor)
    assert warm["value_c"] > 25.0 and warm["ci95_c"] > 2.0


def test_crowns_follow_the_trees_that_made_them():
    # Reference: the generating tree of every point (synthetic truth). Two touching cones of
    # different height and a wide 18 m crown that a fixed 15 m tile would have cut in two.
    rng = np.random.default_rng(4)
    trees = [(0.0, 0.0, 20.0, 4.0), (7.0, 0.0, 12.0, 4.0), (40.0, 0.0, 25.0, 9.0)]
    parts = [_cone(rng, x, y, h, r, n=1500) for x, y, h, r in trees]
    pts = np.concatenate(parts)
    truth = np.repeat(np.arange(3), [len(p) for p in parts])
    tops = find_tree_tops(pts, pts[:, 2])
    assert len(tops) == 3
    label = tops.tree_of(pts)
    # Map each found tree to the generating tree under its top.
    top_owner = np.array([truth[np.argmin(np.hypot(*(pts[:, :2] - xy).T))] for xy in tops.xy])
    agree = top_owner[label[label >= 0]] == truth[label >= 0]
    assert np.mean(agree) > 0.95
    # The wide crown is one tree: every point of it that belongs to a tree has one label.
    wide = label[(truth == 2) & (label >= 0)]
    assert len(np.unique(wide)) == 1 and len(wide) > 0.95 * np.sum(truth == 2)


def test_tree_of_points_off_the_grid_is_minus_one():
    rng = np.random.default_rng(1)
    pts = _cone(rng, 0.0, 0.0, 15.0, 3.0)
    tops = find_tree_tops(pts, pts[:, 2])
    assert list(tops.tree_of(np.array([[100.0, 100.0, 0.0], [-50.0, 3.0, 1.0]]))) == [-1, -1]


def test_highest_point_per_cell_table_and_sort_paths_agree():
    # reference: a plain loop over the cells (the highest point, the last of equal heights)
    from clearaudit.audit.priority import _highest_per_cell

    rng = np.random.default_rng(21)
    key = rng.integers(0, 3000, 20_000)
    z = np.round(rng.uniform(0, 5, 20_000), 1)  # many equal heights within a cell
    ref_cells = np.unique(key)
    ref_top = np.array([np.flatnonzero((key == c) & (z == z[key == c].max()))[-1]
                        for c in ref_cells])
    for scale in (1, 10_000_000):  # a table, then a key range too wide for one
        cells, top = _highest_per_cell(key * scale, z)
        np.testing.assert_array_equal(cells, ref_cells * scale)
        np.testing.assert_array_equal(top, ref_top)


def test_tree_tops_ignore_points_without_a_height():
    # a point with no elevation (NaN) is not a tree top and does not move another cell's top
    rng = np.random.default_rng(3)
    xy = rng.uniform(-2, 2, size=(400, 2))
    pts = np.column_stack([xy, 12.0 - np.hypot(xy[:, 0], xy[:, 1])])
    with_nan = np.vstack([pts, [[0.2, 0.2, np.nan]], [[30.0, 30.0, np.nan]]])
    hag = with_nan[:, 2].copy()
    hag[-2:] = 5.0
    a, b = find_tree_tops(pts, pts[:, 2]), find_tree_tops(with_nan, hag)
    np.testing.assert_array_equal(a.xy, b.xy)
    np.testing.assert_array_equal(a.height_m, b.height_m)

"""Tests of the synthetic corridor generator (clearaudit.synth).

The generator is the truth for every other stage, so its physics is checked against
implementations written here from the textbook formulas (not clearaudit's), against scipy
(brentq, quad, cKDTree), pyproj and laspy.
"""
from __future__ import annotations

import csv
import json
import tomllib

import laspy
import numpy as np
import pyproj
import pytest
from scipy import integrate, optimize
from scipy.spatial import cKDTree

from clearaudit import cloud as C
from clearaudit.physics import catenary as cat
from clearaudit.synth import (
    TERRAIN_KINDS,
    Terrain,
    generate_corridor,
    toml_dumps,
    vegetation_class,
    write_corridor,
)
from clearaudit.units import FOOT_M, US_SURVEY_FOOT_M

SMALL = {"n_spans": 2, "density_per_m2": 3.0, "vegetation": "sparse", "underbuild": True}


@pytest.fixture(scope="module")
def corridor():
    return generate_corridor(3, density_per_m2=5.0, bend_deg=10.0, underbuild=True)


# ----------------------------------------------------------------- independent catenary
def _low_point(L, h, C_):
    """x0 of the catenary through (0, 0) and (L, h), found numerically (scipy brentq).

    Irvine (1981), Cable Structures, ch. 1: z(x) = C[cosh((x - x0)/C) - cosh(x0/C)].
    """
    f = lambda x0: C_ * (np.cosh((L - x0) / C_) - np.cosh(x0 / C_)) - h  # noqa: E731
    return optimize.brentq(f, -20.0 * L, 21.0 * L, xtol=1e-12)


def _curve(x, L, h, C_):
    x0 = _low_point(L, h, C_)
    return C_ * (np.cosh((x - x0) / C_) - np.cosh(x0 / C_))


def _wire_geometry(w):
    a = np.array(w["attachment_a_local_m"])
    b = np.array(w["attachment_b_local_m"])
    L = float(np.hypot(*(b[:2] - a[:2])))
    return a, b, L, float(b[2] - a[2]), (b[:2] - a[:2]) / L


def _all_wires(truth):
    return [w for s in truth["spans"] for w in s["wires"]]


# ----------------------------------------------------------------------- determinism
def test_same_seed_gives_identical_corridor():
    a = generate_corridor(11, **SMALL)
    b = generate_corridor(11, **SMALL)
    np.testing.assert_array_equal(a.cloud.xyz, b.cloud.xyz)
    np.testing.assert_array_equal(a.truth_classification, b.truth_classification)
    for k in a.cloud.fields:
        np.testing.assert_array_equal(a.cloud.fields[k], b.cloud.fields[k])
    assert json.dumps(a.truth, sort_keys=True) == json.dumps(b.truth, sort_keys=True)
    assert a.line_config == b.line_config and a.structures == b.structures
    c = generate_corridor(12, **SMALL)
    assert c.cloud.n_points != a.cloud.n_points or not np.array_equal(c.cloud.xyz, a.cloud.xyz)


def test_truth_is_json_serialisable(corridor):
    text = json.dumps(corridor.truth)
    assert json.loads(text)["generator"]["seed"] == 3


# ----------------------------------------------------------------------- wires
def test_wire_points_lie_on_their_catenary_within_noise(corridor):
    truth, xyz, lab = corridor.truth, corridor.cloud.xyz, corridor.truth_labels["wire"]
    noise = truth["generator"]["noise_m"]
    dists = []
    for w in _all_wires(truth):
        pts = xyz[lab == w["wire_index"]]
        assert len(pts) == w["n_points"] > 50
        a, b, L, h, u = _wire_geometry(w)
        x = (pts[:, :2] - a[:2]) @ u
        lateral = (pts[:, :2] - a[:2]) @ np.array([-u[1], u[0]])
        dz = pts[:, 2] - (a[2] + _curve(x, L, h, w["catenary_constant_m"]))
        x0 = _low_point(L, h, w["catenary_constant_m"])
        cos_t = 1.0 / np.cosh((x - x0) / w["catenary_constant_m"])  # 1/sqrt(1 + z'^2)
        dists.append(np.hypot(lateral, dz * cos_t))
    d = np.concatenate(dists)
    # Noise is N(0, s) in two directions square to the wire: distance is Rayleigh(s),
    # RMS = s*sqrt(2) (textbook property of the Rayleigh distribution).
    rms = float(np.sqrt(np.mean(d**2)))
    assert rms == pytest.approx(noise * np.sqrt(2.0), rel=0.05)
    assert d.max() < 6.0 * noise  # P(R > 6 s) = exp(-18) ~ 1.5e-8 per point


def test_truth_sag_and_constant_match_physics_and_independent_check(corridor):
    for w in _all_wires(corridor.truth):
        a, b, L, h, _ = _wire_geometry(w)
        C_ = w["catenary_constant_m"]
        assert C_ == pytest.approx(w["horizontal_tension_n"] / w["unit_weight_n_per_m"], rel=1e-12)
        assert w["horizontal_length_m"] == pytest.approx(L, abs=1e-9)
        assert w["sag_m"] == pytest.approx(float(cat.sag(L, h, C_)), abs=1e-9)
        # Independent: numerical maximum of chord minus curve on a 1 mm grid, refined.
        x = np.linspace(0.0, L, int(L / 0.001) + 1)
        dev = h * x / L - _curve(x, L, h, C_)
        i = int(np.argmax(dev))
        def deviation(t, L=L, h=h, C_=C_):
            return -(h * t / L - _curve(t, L, h, C_))

        res = optimize.minimize_scalar(deviation,
                                       bounds=(x[max(i - 1, 0)], x[min(i + 1, len(x) - 1)]),
                                       method="bounded", options={"xatol": 1e-10})
        assert w["sag_m"] == pytest.approx(-res.fun, abs=1e-7)
        assert w["sag_location_m"] == pytest.approx(res.x, abs=1e-3)
        # Parabolic approximation L^2/(8C) within 1 % for these spans (IEEE 524 sag annex).
        assert w["sag_m"] == pytest.approx(L**2 / (8.0 * C_), rel=0.01)
        # Arc length against numerical integration of sqrt(1 + z'^2) (scipy quad).
        x0 = _low_point(L, h, C_)
        s, _ = integrate.quad(lambda t, x0=x0, C_=C_: np.cosh((t - x0) / C_), 0.0, L,
                              epsabs=1e-10)
        assert w["arc_length_m"] == pytest.approx(s, rel=1e-10)


def test_tension_sections_share_one_tension_per_role_and_ruling_span(corridor):
    truth = corridor.truth
    spans = {s["id"]: s for s in truth["spans"]}
    for sec in truth["tension_sections"]:
        lengths = np.array([spans[i]["horizontal_length_m"] for i in sec["span_ids"]])
        # Ruling span sqrt(sum L^3 / sum L) (IEEE 524-2016, sag-tension annex).
        assert sec["ruling_span_m"] == pytest.approx(np.sqrt((lengths**3).sum() / lengths.sum()))
        for sid in sec["span_ids"]:
            for w in spans[sid]["wires"]:
                assert w["horizontal_tension_n"] == sec["horizontal_tension_n"][w["role"]]
    # 230 kV ACSR at ~20 % of rated strength: C roughly 1,600-1,900 m (common practice).
    for sec in truth["tension_sections"]:
        assert 1600.0 < sec["catenary_constant_m"]["phase"] < 1900.0


def test_structures_and_attachments_are_consistent(corridor):
    truth = corridor.truth
    by_id = {s["id"]: s for s in truth["structures"]}
    assert by_id["S01"]["type"] == "deadend" and truth["structures"][-1]["type"] == "deadend"
    bends = [s for s in truth["structures"] if s["line_angle_deg"] > 1e-6]
    assert bends and all(s["type"] == "deadend" for s in bends)
    assert bends[0]["line_angle_deg"] == pytest.approx(10.0)
    spans = truth["spans"]
    for s0, s1 in zip(spans[:-1], spans[1:], strict=True):
        mid = by_id[s0["to_structure"]]
        w1 = {w["wire_id"]: w for w in s1["wires"]}
        for w in s0["wires"]:
            b = np.array(w["attachment_b_local_m"])
            a_next = np.array(w1[w["wire_id"]]["attachment_a_local_m"])
            if mid["type"] == "suspension" or w["role"] == "shield":
                np.testing.assert_allclose(b, a_next, atol=1e-9)  # one clamp, plumb string
            else:
                assert np.hypot(*(b - a_next)[:2]) > 4.0  # two dead-end strings
    # Attachments of phases sit below (suspension) or level with (dead-end) the crossarm tip.
    for s in spans:
        st = by_id[s["from_structure"]]
        arms = {a["wire_id"]: a for a in st["crossarms"]}
        for w in s["wires"]:
            arm = arms[w["phase_id"]]
            a = np.array(w["attachment_a_local_m"])
            drop = arm["tip_local_m"][2] - a[2]
            expect = arm["insulator_length_m"] if arm["insulator"] == "suspension" else 0.0
            assert drop == pytest.approx(expect, abs=1e-9)
    # Structures CSV rows carry CRS coordinates of the structure centres.
    for row, st in zip(corridor.structures, truth["structures"], strict=True):
        assert (row["id"], row["type"]) == (st["id"], st["type"])
        np.testing.assert_allclose([row["x"], row["y"]], st["xy_crs"])


def test_minimum_ground_clearance_of_phases(corridor):
    target = corridor.truth["generator"]["min_ground_clearance_m"]
    for w in _all_wires(corridor.truth):
        if w["role"] == "phase":
            assert w["min_ground_clearance_m"] >= target
            p = np.array(w["min_ground_clearance_point_local_m"])
            assert w["min_ground_clearance_m"] == pytest.approx(
                p[2] - corridor.ground_height(p[0], p[1]), abs=1e-9)


# ----------------------------------------------------------------------- trees
def test_planted_tree_clearances_recomputed_with_ckdtree(corridor):
    truth, xyz = corridor.truth, corridor.cloud.xyz
    wires = _all_wires(truth)
    planted = truth["planted_trees"]
    assert [t["target_clearance_m"] for t in planted[:3]] == [1.0, 3.0, 6.0]
    for t in planted:
        pts = xyz[corridor.truth_labels["tree"] == t["index"]]
        assert len(pts) == t["n_points"] > 50
        centre = np.array(t["xy_local_m"])
        # Densely sampled true curves (2 cm steps) of every wire passing within 60 m.
        samples = []
        for w in wires:
            a, b, L, h, u = _wire_geometry(w)
            x_c = float((centre - a[:2]) @ u)
            lo, hi = max(0.0, x_c - 60.0), min(L, x_c + 60.0)
            if hi <= lo:
                continue
            x = np.arange(lo, hi, 0.02)
            samples.append(np.column_stack([a[:2] + x[:, None] * u,
                                            a[2] + _curve(x, L, h, w["catenary_constant_m"])]))
        d, _ = cKDTree(np.vstack(samples)).query(pts)
        assert t["clearance_m"] == pytest.approx(d.min(), abs=2e-4)
        if t["target_clearance_m"] is not None:
            assert t["clearance_m"] == pytest.approx(t["target_clearance_m"], abs=1e-3)
        # The closest tree point is one of the tree's points.
        assert np.min(np.linalg.norm(pts - np.array(t["closest_tree_point_local_m"]), axis=1)) < 1e-9
    fall = [t for t in planted if t["kind"] == "fall_in"]
    assert len(fall) == 1 and fall[0]["can_fall_into_line"]
    assert fall[0]["height_m"] > fall[0]["base_to_wire_distance_m"]
    # No wire gap at a planted tree: wire points exist within 5 m of the closest wire point.
    wire_xyz = xyz[corridor.truth_labels["wire"] >= 0]
    for t in planted[:3]:
        q = np.array(t["closest_wire_point_local_m"])
        assert np.min(np.linalg.norm(wire_xyz - q, axis=1)) < 5.0


def test_random_trees_keep_their_distance(corridor):
    others = corridor.truth["other_trees"]
    assert others
    limit = corridor.truth["generator"]["min_random_tree_clearance_m"]
    assert min(t["clearance_m"] for t in others) >= limit


# ----------------------------------------------------------------------- classes
def test_class_codes_are_valid_asprs_and_vegetation_bands(corridor):
    cls = corridor.truth_classification
    present = set(np.unique(cls).tolist())
    # ASPRS LAS 1.4 R15 Table 17: standard codes 0-18; 12 (overlap) is deprecated.
    assert present <= set(C.CLASS_NAMES) - {0, 8, 12}
    for code in (2, 3, 4, 5, 6, 11, 13, 14, 15, 16):
        assert code in present, code
    np.testing.assert_array_equal(corridor.cloud.classification, cls)
    veg = np.isin(cls, C.VEGETATION_CLASSES)
    p = corridor.cloud.xyz[veg]
    hag = p[:, 2] - corridor.ground_height(p[:, 0], p[:, 1])
    np.testing.assert_array_equal(vegetation_class(hag), cls[veg])
    assert vegetation_class(np.array([0.49, 0.5, 1.99, 2.0])).tolist() == [3, 4, 4, 5]
    ground = corridor.cloud.xyz[cls == C.GROUND]
    resid = ground[:, 2] - corridor.ground_height(ground[:, 0], ground[:, 1])
    assert np.std(resid) == pytest.approx(corridor.truth["generator"]["noise_m"], rel=0.05)


def test_unclassified_delivery_and_counts():
    c = generate_corridor(5, classified=False, **SMALL)
    assert set(np.unique(c.cloud.classification).tolist()) == {1}
    assert c.truth["point_counts"] == {str(k): v for k, v in
                                       zip(*np.unique(c.truth_classification, return_counts=True),
                                           strict=True)}
    assert sum(c.truth["point_counts"].values()) == c.cloud.n_points
    # Outliers: both noise classes present in about the requested share.
    n_noise = int(np.isin(c.truth_classification, C.NOISE_CLASSES).sum())
    assert 0 < n_noise < 4 * 2e-4 * c.cloud.n_points


# ----------------------------------------------------------------------- units
def test_foot_clouds_have_the_same_geometry_in_metres():
    base = generate_corridor(7, **SMALL)
    for unit, factor, epsg in (("ft", FOOT_M, 2222), ("us_ft", US_SURVEY_FOOT_M, 2264)):
        c = generate_corridor(7, unit=unit, **SMALL)
        np.testing.assert_array_equal(c.cloud.xyz, base.cloud.xyz)
        assert c.cloud.horizontal_unit_m == factor and c.cloud.vertical_unit_m == factor
        assert c.cloud.crs.to_epsg() == epsg
        # pyproj reports the CRS axis unit length (EPSG registry).
        assert c.cloud.crs.axis_info[0].unit_conversion_factor == pytest.approx(factor, rel=1e-12)
        s0 = np.array(c.truth["structures"][1]["xy_local_m"])
        np.testing.assert_allclose(c.truth["structures"][1]["xy_crs"], s0 / factor + c.cloud.origin[:2])
        # Truth in SI: identical physics in every unit system.
        for wm, wf in zip(_all_wires(base.truth), _all_wires(c.truth), strict=True):
            assert wf["sag_m"] == wm["sag_m"]
            assert wf["catenary_constant_m"] == wm["catenary_constant_m"]
            np.testing.assert_allclose(np.array(wf["attachment_a_crs"]) * factor,
                                       np.array(wf["attachment_a_local_m"]) + c.cloud.origin * factor)


def test_positions_are_inside_the_crs_area():
    for unit in ("m", "us_ft"):
        c = generate_corridor(7, unit=unit, **SMALL)
        to_geo = pyproj.Transformer.from_crs(c.cloud.crs, "EPSG:4326", always_xy=True)
        lon, lat = to_geo.transform(c.structures[-1]["x"], c.structures[-1]["y"])
        area = c.cloud.crs.area_of_use
        assert area.west <= lon <= area.east and area.south <= lat <= area.north
        # Both default CRSs anchor the line near the same invented rural spot.
        assert lon == pytest.approx(-80.93, abs=0.02) and lat == pytest.approx(35.62, abs=0.02)


def test_crs_and_unit_must_agree():
    with pytest.raises(ValueError, match="does not match"):
        generate_corridor(0, unit="ft", crs="EPSG:2264", **SMALL)
    c = generate_corridor(0, crs=None, unit="us_ft", **SMALL)
    assert c.cloud.crs is None and c.cloud.horizontal_unit_m == US_SURVEY_FOOT_M


@pytest.mark.parametrize("kwargs", [
    {"terrain": "alpine"}, {"n_spans": 0}, {"circuit": "triple"}, {"n_shield": 3},
    {"structure_kind": "tree"}, {"vegetation": "jungle"}, {"unit": "yd"}, {"bundle": 0},
    {"span_length_m": (400, 300)}, {"horizontal_tension_n": [30000.0] * 5},
    {"planted_trees": [{"kind": "under", "span": 9, "clearance_m": 1.0}]},
    {"planted_trees": [{"kind": "under", "span": 0}]},
    {"planted_trees": [{"colour": "green"}]},
])
def test_bad_arguments_raise_value_error(kwargs):
    with pytest.raises(ValueError):
        generate_corridor(0, **{**SMALL, **kwargs})


# ----------------------------------------------------------------------- variants
def test_bundles_double_circuit_and_explicit_tension():
    c = generate_corridor(2, circuit="double", bundle=2, bundle_spacing_m=0.45, n_shield=2,
                          horizontal_tension_n={"phase": 26000.0, "shield": 9000.0},
                          structure_kind="pole", terrain="flat", **SMALL)
    ids = {w["wire_id"] for w in c.truth["spans"][0]["wires"]}
    phases = {f"C{k}-{p}/{i}" for k in (1, 2) for p in "ABC" for i in (1, 2)}
    assert ids == phases | {"SW1", "SW2"}
    w = {x["wire_id"]: x for x in c.truth["spans"][0]["wires"]}
    d = np.array(w["C1-A/1"]["attachment_a_local_m"]) - np.array(w["C1-A/2"]["attachment_a_local_m"])
    assert np.linalg.norm(d) == pytest.approx(0.45) and d[2] == pytest.approx(0.0)
    assert w["C1-A/1"]["horizontal_tension_n"] == 26000.0
    assert w["SW1"]["catenary_constant_m"] == pytest.approx(9000.0 / 4.0)
    assert c.line_config["conductors"]["phase"]["bundle"] == 2


@pytest.mark.parametrize("kind", TERRAIN_KINDS)
def test_terrain_gradient_and_grades(kind):
    c = generate_corridor(4, terrain=kind, n_spans=3, density_per_m2=1.0, vegetation="none",
                          building=False, road=False, planted_trees=[])
    t = Terrain.from_dict(c.truth["terrain"])
    g = c.cloud.xyz[c.truth_classification == C.GROUND][::50]
    np.testing.assert_array_equal(t.height(g[:, 0], g[:, 1]), c.ground_height(g[:, 0], g[:, 1]))
    eps = 1e-3  # central differences (exact gradient check)
    gx, gy = t.gradient(g[:, 0], g[:, 1])
    nx = (t.height(g[:, 0] + eps, g[:, 1]) - t.height(g[:, 0] - eps, g[:, 1])) / (2 * eps)
    ny = (t.height(g[:, 0], g[:, 1] + eps) - t.height(g[:, 0], g[:, 1] - eps)) / (2 * eps)
    np.testing.assert_allclose(gx, nx, atol=1e-6)
    np.testing.assert_allclose(gy, ny, atol=1e-6)
    grade = np.percentile(np.hypot(gx, gy), [10, 90])
    lo, hi = {"flat": (0.0, 0.01), "rolling": (0.005, 0.15), "steep": (0.15, 0.40)}[kind]
    assert lo <= grade[0] and grade[1] <= hi


# ----------------------------------------------------------------------- files
def test_toml_writer_round_trip():
    data = {"line": {"name": 'A "quoted" name', "voltage_kv": 230.0, "n": 3, "ok": True},
            "conductors": {"phase": {"name": "x", "bundle": 2}, "shield": {"name": "y"}},
            "list": {"values": [1.5, 2.5]}}
    assert tomllib.loads(toml_dumps(data)) == data


def test_write_corridor_round_trip(tmp_path):
    c = generate_corridor(9, classified=False, **SMALL)
    paths = write_corridor(c, tmp_path, "demo", truth_dims=True)
    assert {p.name for p in paths.values()} == {"demo.laz", "demo.truth.json", "demo.line.toml",
                                                "demo.structures.csv"}
    las = laspy.read(paths["cloud"])
    assert len(las.points) == c.cloud.n_points
    xyz_crs = np.column_stack([las.x, las.y, las.z])
    expect = c.cloud.to_crs(c.cloud.xyz)
    assert np.max(np.abs(xyz_crs - expect)) <= 0.0005 + 1e-9  # half the 1 mm scale
    np.testing.assert_array_equal(np.asarray(las.classification), 1)
    np.testing.assert_array_equal(np.asarray(las.truth_class), c.truth_classification)
    np.testing.assert_array_equal(np.asarray(las.intensity), c.cloud.fields["intensity"])
    assert pyproj.CRS(las.header.parse_crs()).to_epsg() == 32617
    truth = json.loads(paths["truth"].read_text(encoding="utf-8"))
    assert truth["spans"] == c.truth["spans"]
    line = tomllib.loads(paths["line"].read_text(encoding="utf-8"))
    assert line["structures"]["file"] == "demo.structures.csv"
    assert line["line"]["voltage_kv"] == 230.0
    assert line["conductors"]["phase"]["name"] == "795 26/7 ACSR"
    with paths["structures"].open(encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["id"] for r in rows] == [s["id"] for s in c.structures]
    assert float(rows[0]["x"]) == pytest.approx(c.structures[0]["x"], abs=1e-3)


def test_line_file_loads_with_the_project_reader(tmp_path):
    from clearaudit.config import load_line_file

    c = generate_corridor(9, **SMALL)
    paths = write_corridor(c, tmp_path, "demo")
    cfg = load_line_file(paths["line"])
    assert cfg.line.voltage_kv == 230.0
    assert cfg.phase.overrides["weight_n_per_m"] == 15.97
    assert cfg.structures_file == paths["structures"]

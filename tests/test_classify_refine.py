"""Tests of the structure/tree discrimination and of ``refine_with_model``.

External reference: the truth classes and planted-tree records of corridors built by
``clearaudit.synth.generate_corridor`` (exact geometry: trees at a known clearance under the
wires, lattice towers with crossarms and insulators). A tree standing under a span must end up
as vegetation (its points are what the clearance audit measures), towers as structure.
"""
from __future__ import annotations

import numpy as np
import pytest

from clearaudit.classify import classify
from clearaudit.classify.refine import refine_with_model, structure_extents
from clearaudit.model import build_line_model
from clearaudit.synth import generate_corridor

VEGETATION = (3, 4, 5)


@pytest.fixture(scope="module")
def corridor():
    scene = generate_corridor(3, terrain="flat", n_spans=2, density_per_m2=4.0,
                              vegetation="sparse", building=False, road=False,
                              planted_trees=[{"kind": "under", "span": 0, "clearance_m": 0.5},
                                             {"kind": "under", "span": 1, "clearance_m": 1.0}])
    cloud = scene.cloud
    result = classify(cloud)
    cloud.classification = result.classification.copy()
    given = [{"id": s["id"], "xy": np.asarray(s["xy_local_m"], float), "type": s["type"]}
             for s in scene.truth["structures"]]
    model = build_line_model(cloud, structures=given, unit_weight_n_per_m={"phase": 15.97,
                                                                           "shield": 4.0})
    return scene, cloud, result, model


def _tree_points(scene, tree):
    """Truth vegetation points inside the planted tree's crown cylinder."""
    xyz = scene.cloud.xyz
    xy = np.asarray(tree["xy_local_m"])
    near = np.hypot(*(xyz[:, :2] - xy).T) <= tree["crown_radius_m"]
    return np.flatnonzero(near & np.isin(scene.truth_classification, VEGETATION)
                          & (xyz[:, 2] > tree["ground_z_m"] + 0.5))


def test_trees_under_wires_are_vegetation(corridor):
    """Trees 0.5 m and 1.0 m under a phase (generator truth) are vegetation, not structure:
    the 1.0 m tree by the classifier alone, both after the refinement with the model."""
    scene, cloud, result, model = corridor
    saved = result.classification.copy()
    try:
        for refined in (False, True):
            if refined:
                refine_with_model(cloud, result, model)
            for tree in scene.truth["planted_trees"]:
                if not refined and tree["clearance_m"] < 0.9:
                    continue
                idx = _tree_points(scene, tree)
                assert len(idx) > 50
                share = np.mean(np.isin(result.classification[idx], VEGETATION))
                assert share >= 0.95, (tree["id"], refined, share)
    finally:
        result.classification[:] = saved


def test_towers_are_structure(corridor):
    """Structure recall on the generator's towers (truth 15 and 16) stays high."""
    scene, _, result, _ = corridor
    truth = np.isin(scene.truth_classification, (15, 16))
    found = np.isin(result.classification, (15, 16))
    assert np.sum(truth & found) / truth.sum() >= 0.9


def test_refine_turns_false_structure_back_into_vegetation(corridor):
    """Tree points forced to class 15 away from every structure return to vegetation."""
    scene, cloud, result, model = corridor
    tree = scene.truth["planted_trees"][0]
    idx = _tree_points(scene, tree)
    saved = result.classification.copy()
    try:
        result.classification[idx] = 15
        counts = refine_with_model(cloud, result, model)
        assert np.mean(np.isin(result.classification[idx], VEGETATION)) >= 0.95
        assert counts.get("15->5", 0) + counts.get("15->4", 0) >= 0.95 * len(idx) - 1
        assert result.counts[15] == int(np.sum(result.classification == 15))
    finally:
        result.classification[:] = saved


def test_refine_keeps_towers_and_improves_structure_recall(corridor):
    """Refinement never loses tower points and does not lower structure recall (truth)."""
    scene, cloud, result, model = corridor
    saved = result.classification.copy()
    truth = np.isin(scene.truth_classification, (15, 16))
    try:
        before = np.sum(truth & np.isin(result.classification, (15, 16)))
        refine_with_model(cloud, result, model)
        after = np.sum(truth & np.isin(result.classification, (15, 16)))
        assert after >= before
        veg_truth = np.isin(scene.truth_classification, VEGETATION)
        assert np.sum(veg_truth & np.isin(result.classification, (15, 16))) <= \
            np.sum(veg_truth & np.isin(saved, (15, 16)))
    finally:
        result.classification[:] = saved


def test_structure_extents_reach_the_crossarm_tips(corridor):
    """The extent radius covers the generator's crossarm tips (truth) at every structure."""
    scene, _, _, model = corridor
    ext = structure_extents(model)
    for s in scene.truth["structures"]:
        tips = np.array([arm["tip_local_m"][:2] for arm in s["crossarms"]])
        reach = np.max(np.hypot(*(tips - np.asarray(s["xy_local_m"])).T))
        assert ext[s["id"]]["radius_m"] >= reach


def test_refine_with_extents_given_equals_refine_computing_them(corridor):
    """The extents computed once for all tiles give the same classes as each computing its own
    (common practice, no source: the same function of the same model)."""
    scene, cloud, result, model = corridor
    saved = result.classification.copy()
    tree = scene.truth["planted_trees"][0]
    idx = _tree_points(scene, tree)
    try:
        outcomes = []
        for extents in (None, structure_extents(model)):
            result.classification[:] = saved
            result.classification[idx] = 15  # something for the refinement to correct
            counts = refine_with_model(cloud, result, model, extents=extents)
            outcomes.append((counts, result.classification.copy()))
        assert outcomes[0][0] == outcomes[1][0] and outcomes[0][0]
        np.testing.assert_array_equal(outcomes[0][1], outcomes[1][1])
    finally:
        result.classification[:] = saved


def test_refine_rejects_mismatched_inputs(corridor):
    _, cloud, result, model = corridor

    class Fake:
        classification = result.classification[:10].copy()
        height_above_ground_m = result.height_above_ground_m[:10]

    with pytest.raises(ValueError):
        refine_with_model(cloud, Fake(), model)


def test_isolated_vegetation_return_among_wire_points_is_absorbed():
    # A lone "vegetation" return 0.3 m from a conductor is hardware, not a tree; a crown of
    # returns near the same wire stays vegetation (common practice (no source): a tree gives
    # many returns per square metre of crown at airborne densities).
    from clearaudit.classify.refine import _absorb_isolated_vegetation

    wire = np.column_stack([np.linspace(0, 50, 101), np.zeros(101), np.full(101, 20.0)])
    lone = np.array([[10.0, 0.3, 20.0]])
    rng = np.random.default_rng(1)
    crown = rng.normal([40.0, 1.5, 19.0], 0.6, size=(60, 3))
    xyz = np.vstack([wire, lone, crown])
    cls = np.concatenate([np.full(101, 14), [5], np.full(60, 5)]).astype(np.uint8)
    hag = xyz[:, 2].copy()
    _absorb_isolated_vegetation(xyz, cls, hag, 1.5, 2, 1.0)
    assert cls[101] == 14
    assert np.all(cls[102:] == 5)


def test_cells_next_to_anchors_hold_every_point_within_reach():
    # reference: brute-force plan distances (numpy); the cell test must keep every point
    # within the reach of an anchor (a superset: the k-d tree measures the kept ones)
    from clearaudit.classify.refine import _next_to

    rng = np.random.default_rng(8)
    for reach in (0.3, 2.5, 7.0):
        xy = rng.uniform(-50, 250, size=(20_000, 2)) + 1.0e5
        anchors = rng.uniform(0, 200, size=(300, 2)) + 1.0e5
        anchors[:20] = xy[:20] + rng.uniform(-reach, reach, size=(20, 2)) * 0.999
        kept = _next_to(xy, anchors, reach)
        d = np.min(np.hypot(xy[:, None, 0] - anchors[None, :, 0],
                            xy[:, None, 1] - anchors[None, :, 1]), axis=1)
        assert np.all(kept[d < reach])
        assert kept.sum() < len(xy)             # a prefilter, not everything
    assert not _next_to(xy[:0], anchors, 1.0).any()
    assert not _next_to(xy, anchors[:0], 1.0).any()
    assert _next_to(xy, anchors, 1e-6, max_cells=1000).all()   # too many cells: no test


def test_refine_of_the_points_a_tile_reads_equals_refine_of_every_point(corridor):
    """A tile's refine task reads only the points above 0.3 m or of a wire or hardware class
    (tiling._refine_reads): refine_with_model on those alone gives them the classes it gives
    them among every point, and leaves every other point as it was."""
    from types import SimpleNamespace

    from clearaudit.tiling import _refine_reads

    _, cloud, result, model = corridor
    cls0 = result.classification.copy()
    hag = np.asarray(result.height_above_ground_m)
    full = SimpleNamespace(classification=cls0.copy(), height_above_ground_m=hag, counts={},
                           info={})
    refine_with_model(cloud, full, model)
    assert np.any(full.classification != cls0)  # the refinement does change classes here
    pick = _refine_reads({"hag": hag, "cls": cls0})
    assert 0 < pick.sum() < len(pick)
    sub = SimpleNamespace(classification=cls0[pick].copy(), height_above_ground_m=hag[pick],
                          counts={}, info={})
    labels = np.asarray(model.wire_point_labels)[pick]
    refine_with_model(cloud.subset(np.flatnonzero(pick)), sub,
                      SimpleNamespace(structures=model.structures, spans=model.spans,
                                      wire_point_labels=labels))
    np.testing.assert_array_equal(sub.classification, full.classification[pick])
    np.testing.assert_array_equal(full.classification[~pick], cls0[~pick])

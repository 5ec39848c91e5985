"""Buildings: roofs that the ground filter keeps as ground (``objects.find_ground_roofs``).

Checks are against geometry known by construction (analytic planes, boxes, ridges and
cuts) and against the generator's truth classes; targets are the task's (no source).
"""
from __future__ import annotations

import numpy as np
import pytest

from clearaudit.classify import classify
from clearaudit.classify.objects import find_ground_roofs
from clearaudit.synth import generate_corridor

DENSITY = 12.0  # points per m2, as the synthetic corridors (common practice, no source)


def _sample(rng, x0, x1, y0, y1):
    n = int((x1 - x0) * (y1 - y0) * DENSITY)
    return np.c_[rng.uniform(x0, x1, n), rng.uniform(y0, y1, n)]


def _slope_with_roof(grade: float, roof_height: float, rng):
    """Terrain z = grade·x (a 15-40 % slope) with a flat 10 m x 8 m roof ``roof_height``
    above its highest (uphill) corner; the ground under the roof is not seen (as from the
    air)."""
    xy = _sample(rng, 0.0, 60.0, 0.0, 60.0)
    inside = (xy[:, 0] >= 25) & (xy[:, 0] < 35) & (xy[:, 1] >= 26) & (xy[:, 1] < 34)
    z = grade * xy[:, 0]
    z[inside] = grade * 35.0 + roof_height
    z += rng.normal(0.0, 0.03, len(z))
    return np.c_[xy, z], inside


@pytest.mark.parametrize("grade", [0.15, 0.4])
def test_low_roof_on_a_slope_is_found(grade):
    # geometry by construction: the roof stands 2.5 m above the slope on its uphill side
    # and 2.5 + 10·grade on its downhill side (4 m at 15 %, 6.5 m at 40 %)
    rng = np.random.default_rng(4)
    xyz, truth = _slope_with_roof(grade, 2.5, rng)
    roofs = find_ground_roofs(xyz)
    recall = roofs.is_roof[truth].mean()
    false = roofs.is_roof[~truth].sum()
    assert roofs.patches >= 1
    assert recall >= 0.8
    assert false == 0


@pytest.mark.parametrize("form", ["ridge", "plane", "cut"])
def test_terrain_forms_are_not_roofs(form):
    # a ridge with 30 % flanks, a 40 % plane, and a road cut: a 2.5 m vertical face with a
    # flat 8 m road bench on a 20 % slope (geometry by construction); none stands on step
    # edges all around
    rng = np.random.default_rng(5)
    xy = _sample(rng, 0.0, 60.0, 0.0, 60.0)
    x, y = xy[:, 0], xy[:, 1]
    if form == "ridge":
        z = 20.0 - 0.3 * np.abs(x - 30.0)
    elif form == "plane":
        z = 0.4 * x
    else:
        z = 0.2 * y + np.where(y >= 30.0, 2.5, 0.0)
        bench = (y >= 30.0) & (y < 38.0)
        z[bench] = 0.2 * 30.0 + 2.5
    z = z + rng.normal(0, 0.03, len(x))
    roofs = find_ground_roofs(np.c_[xy, z])
    assert roofs.patches == 0
    assert not roofs.is_roof.any()


def test_bad_arguments():
    with pytest.raises(ValueError):
        find_ground_roofs(np.zeros((10, 3)), cell_m=0.0)
    with pytest.raises(ValueError):
        find_ground_roofs(np.zeros((10, 3)), min_area_m2=50.0, max_area_m2=20.0)


@pytest.fixture(scope="module")
def steep():
    scene = generate_corridor(seed=1, terrain="steep", vegetation="sparse", classified=False)
    result = classify(scene.cloud)
    truth = np.asarray(scene.truth_classification)
    return scene, result, truth


def _recall_precision(truth, cls):
    t, p = truth == 6, cls == 6
    return (t & p).sum() / max(t.sum(), 1), (t & p).sum() / max(p.sum(), 1)


def test_steep_corridor_building_precision_and_regression(steep):
    # truth: the generator's classes. Measured 2 Dec: recall 67.4 %, precision 100 %
    # (before the ground-roof step: 21.3 % / 100 %). 60 % is a regression bound below the
    # measured value, not the target (the target test is below).
    _, result, truth = steep
    recall, precision = _recall_precision(truth, result.classification)
    assert precision >= 0.95
    assert recall >= 0.60
    # the roof points left the ground set: HAG of the detected roof is a building height
    roof = (truth == 6) & (result.classification == 6)
    assert np.median(result.height_above_ground_m[roof]) >= 2.0


@pytest.mark.xfail(strict=True, reason="target not met: steep building recall 67.4 % "
                   "(a roof half that meets the uphill slope at equal height and pitch is "
                   "continuous with the terrain)")
def test_steep_corridor_building_recall_target(steep):
    _, result, truth = steep
    recall, _ = _recall_precision(truth, result.classification)
    assert recall >= 0.70

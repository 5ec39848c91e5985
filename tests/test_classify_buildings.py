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
#: Sparse ground, as many state-wide surveys (common practice, no source): the roof search
#: runs on 1.5 m cells there (find_ground_roofs, Notes)
SPARSE = 3.0


def _sample(rng, x0, x1, y0, y1, density=DENSITY):
    n = int((x1 - x0) * (y1 - y0) * density)
    return np.c_[rng.uniform(x0, x1, n), rng.uniform(y0, y1, n)]


def _slope_with_roof(grade: float, roof_height: float, rng, density=DENSITY):
    """Terrain z = grade·x (a 15-40 % slope) with a flat 10 m x 8 m roof ``roof_height``
    above its highest (uphill) corner; the ground under the roof is not seen (as from the
    air)."""
    xy = _sample(rng, 0.0, 60.0, 0.0, 60.0, density)
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


@pytest.mark.parametrize("grade", [0.15, 0.4])
def test_low_roof_on_sparse_ground_is_found_on_wider_cells(grade):
    # the same roof at 3 points per m2 (geometry by construction): on 1 m cells fewer than
    # the percolation threshold of cells hold the four points a plane needs, the roof falls
    # apart and is missed; the search moves to 1.5 m cells and finds it
    xyz, truth = _slope_with_roof(grade, 2.5, np.random.default_rng(4), SPARSE)
    fine = find_ground_roofs(xyz, min_cell_points=0)
    assert fine.grid.cell == 1.0 and fine.patches == 0
    roofs = find_ground_roofs(xyz)
    assert roofs.grid.cell == 1.5 and roofs.patches >= 1
    assert roofs.is_roof[truth].mean() >= 0.8
    assert not roofs.is_roof[~truth].any()
    # dense ground keeps the finest cell
    dense, _ = _slope_with_roof(grade, 2.5, np.random.default_rng(4))
    assert find_ground_roofs(dense).grid.cell == 1.0


@pytest.mark.parametrize("density", [DENSITY, SPARSE])
@pytest.mark.parametrize("form", ["ridge", "plane", "cut"])
def test_terrain_forms_are_not_roofs(form, density):
    # a ridge with 30 % flanks, a 40 % plane, and a road cut: a 2.5 m vertical face with a
    # flat 8 m road bench on a 20 % slope (geometry by construction); none stands on step
    # edges all around
    rng = np.random.default_rng(5)
    xy = _sample(rng, 0.0, 60.0, 0.0, 60.0, density)
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



def _slope_with_gable(grade: float, ridge_along_fall_line: bool, rotation_deg: float, rng,
                      density=DENSITY):
    """Terrain z = grade·x with a 22 m x 12 m gable-roofed building centred at (35, 35):
    eaves 4.5 m and ridge 7.5 m above the lowest ground at its corners (the generator's
    building, ``clearaudit.synth``). The uphill eave stands 4.5 - 12·grade m (ridge across
    the fall line) or the uphill gable end 7.5 - 22·grade m above the slope: at a 30-45 %
    grade the uphill side meets the hillside at about its own height or lies below it (a
    building set into the slope). Only the roof is seen (as from the air)."""
    xy = _sample(rng, 0.0, 70.0, 0.0, 70.0, density)
    ang = np.radians(rotation_deg)
    along = np.array([np.cos(ang), np.sin(ang)])
    if not ridge_along_fall_line:
        along = np.array([-along[1], along[0]])
    across = np.array([-along[1], along[0]])
    r = xy - 35.0
    a, b = r @ along, r @ across
    inside = (np.abs(a) < 11.0) & (np.abs(b) < 6.0)
    corners = 35.0 + np.array([s * 11.0 * along + t * 6.0 * across
                               for s in (-1, 1) for t in (-1, 1)])
    base = grade * corners[:, 0].min()
    z = grade * xy[:, 0]
    z[inside] = base + 4.5 + 3.0 * (1.0 - np.abs(b[inside]) / 6.0)
    z += rng.normal(0.0, 0.03, len(z))
    outside_m = np.maximum(np.abs(a) - 11.0, np.abs(b) - 6.0)  # distance beyond the walls
    return np.c_[xy, z], inside, outside_m


@pytest.mark.parametrize("density", [DENSITY, SPARSE])
@pytest.mark.parametrize("grade", [0.3, 0.45])
@pytest.mark.parametrize("ridge_along_fall_line", [False, True])
def test_gable_roof_meeting_the_slope_is_found(grade, ridge_along_fall_line, density):
    # geometry by construction (see _slope_with_gable); a roof plane that meets the slope
    # at its own height, or dips below it, is found with the other half of the gable.
    # Ground points taken with the roof may only lie where roof and slope meet at equal
    # height (within one cell of the wall line: 1 m, or 1.5 m on sparse ground).
    rng = np.random.default_rng(6)
    xyz, truth, outside_m = _slope_with_gable(grade, ridge_along_fall_line, 20.0, rng,
                                              density)
    roofs = find_ground_roofs(xyz)
    # on sparse ground the coarser cells lose more of the roof's rim: measured 0.899-0.98 at
    # 3 points per m2 (0 on 1 m cells), 0.93-0.98 at 12
    assert roofs.is_roof[truth].mean() >= (0.9 if density == DENSITY else 0.85)
    false = roofs.is_roof & ~truth
    assert np.all(outside_m[false] <= roofs.grid.cell + 0.05)
    assert false.sum() <= 0.001 * (~truth).sum()


@pytest.mark.parametrize("density", [DENSITY, SPARSE])
@pytest.mark.parametrize("grade", [0.0, 0.3])
@pytest.mark.parametrize("pitch", [0.5, 0.8])
def test_earth_mound_is_not_a_roof(grade, pitch, density):
    # a hipped earth mound 4 m high (a crest and four planar flanks that meet the ground
    # at their toes, no walls) on a level or 30 % slope (geometry by construction): its
    # flanks meet at convex creases like a roof's planes, but nothing stands on step edges.
    # (A known limit, in find_ground_roofs' notes: over 18 scenes of mounds with flanks up
    # to 1.0 rise/run, 0-3 pass as roofs at 1.5-5.5 points per m2 on 1.5 m cells, 2-3 at
    # 6-8 points per m2 on 1 m cells; at 4 points per m2 this seed's 0.8 flanks are among
    # them.)
    rng = np.random.default_rng(5)
    xy = _sample(rng, 0.0, 70.0, 0.0, 70.0, density)
    x, y = xy[:, 0], xy[:, 1]
    mound = np.maximum(0.0, 4.0 - pitch * np.maximum(np.abs(y - 35.0), np.abs(x - 35.0) - 4.0))
    z = grade * x + mound + rng.normal(0.0, 0.03, len(x))
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
    # truth: the generator's classes. Measured 2 Dec: recall 90.1 %, precision 99.9 %
    # (before the gable-roof judgement: 67.4 % / 100 %; before the ground-roof step:
    # 21.3 % / 100 %). 85 % is a regression bound below the measured value.
    _, result, truth = steep
    recall, precision = _recall_precision(truth, result.classification)
    assert precision >= 0.95
    assert recall >= 0.85
    # the roof points left the ground set: HAG of the detected roof is a building height
    roof = (truth == 6) & (result.classification == 6)
    assert np.median(result.height_above_ground_m[roof]) >= 2.0


def test_steep_corridor_building_recall_target(steep):
    # the task's target (no source): at least 70 % of the building points on the steep
    # corridor (seed 1, measured 90.1 %; benchmarks/bench_buildings.py: steep seeds 1-8
    # 74.8-90.1 %, mean 82.1 %, before 0-88.4 %, mean 38.7 %)
    _, result, truth = steep
    recall, _ = _recall_precision(truth, result.classification)
    assert recall >= 0.70


def test_building_set_into_the_slope():
    # seed 5: the building's uphill corner is 8.2 m above its lowest corner, above its
    # eaves (4.2 m): most of the roof lies at or below the hillside around it (truth:
    # median 1.25 m above the true ground). Measured 2 Dec: recall 75.0 %, precision
    # 99.9 % (before the gable-roof judgement: 0 % / none found). 70 % is a regression
    # bound below the measured value.
    scene = generate_corridor(seed=5, terrain="steep", vegetation="sparse", classified=False)
    result = classify(scene.cloud)
    truth = np.asarray(scene.truth_classification)
    recall, precision = _recall_precision(truth, result.classification)
    assert precision >= 0.95
    assert recall >= 0.70
    # a roof below the ground surface interpolated across it is not low noise
    assert not np.any((truth == 6) & (result.classification == 7))


def test_low_plane_matches_the_plain_refit_loop():
    # _low_plane stops once the kept cells no longer change (the next fits would be the
    # same fit); reference: the loop with numpy.linalg.lstsq run all four passes.
    from clearaudit.classify.objects import _low_plane

    rng = np.random.default_rng(5)
    cases = []
    for trial in range(80):
        # half of the rings small and heavily contaminated: the refit can run out of cells
        # (fewer than 6 kept) or still be changing after the fourth pass
        n = int(rng.integers(6, 11)) if trial % 2 else int(rng.integers(6, 120))
        share = 0.6 if trial % 2 else 0.25
        u, v = rng.uniform(0, 30, n), rng.uniform(0, 30, n)
        z = 100 + 0.2 * u - 0.1 * v + rng.normal(0, 0.1, n)
        bumps = rng.random(n) < share
        z[bumps] += rng.uniform(0.6, 8.0, int(bumps.sum()))
        cases.append((u, v, z))
    # a trough: each refit drops the highest cells left at both ends, so the kept cells
    # change at every pass (no early exit; all four passes run)
    u = np.repeat(np.arange(40.0), 2)
    v = np.tile([0.0, 1.0], 40)
    cases.append((u, v, 100.0 + 0.1 * (u - 20.0) ** 2))
    paths = {"too few": 0, "no repeat": 0}
    for u, v, z in cases:
        n = len(z)
        use = np.ones(n, bool)
        ref = None
        changed = 0
        for _ in range(4):
            if use.sum() < 6:
                paths["too few"] += 1
                break
            ref = np.linalg.lstsq(np.c_[np.ones(use.sum()), u[use], v[use]], z[use], rcond=None)[0]
            kept = z - (ref[0] + ref[1] * u + ref[2] * v) <= 0.5
            changed += not np.array_equal(kept, use)
            use = kept
        paths["no repeat"] += changed == 4
        got = _low_plane(u, v, z)
        assert (got is None) == (ref is None)
        if ref is not None:
            assert np.array_equal(got, ref)
    assert paths["too few"] > 0 and paths["no repeat"] > 0  # both rare paths were run


def test_square_ring_by_one_maximum_filter_equals_repeated_dilation():
    # The roof ring (_ring): four dilations by the 3 x 3 square, less one, equal the ring
    # from one 9 x 9 maximum filter with a False border, on any mask in a rectangular window
    # (reference: scipy.ndimage.binary_dilation).
    from scipy import ndimage

    from clearaudit.classify.objects import _ring

    rng = np.random.default_rng(9)
    near = np.ones((3, 3), bool)
    for _ in range(30):
        shape = tuple(int(k) for k in rng.integers(3, 40, 2))
        mask = rng.random(shape) < rng.uniform(0.01, 0.3)
        ref_inner = ndimage.binary_dilation(mask, near)
        ref = ndimage.binary_dilation(mask, near, iterations=4) & ~ref_inner
        inner, got = _ring(mask, 4)
        assert np.array_equal(ref, got) and np.array_equal(inner, ref_inner)


def test_cell_planes_fit_exact_planes_and_match_numpy_sums():
    # reference: numpy.linalg.lstsq per cell (LAPACK), and planes built exactly: a cell whose
    # points lie on z = 3 + 0.2 dx - 0.1 dy gets those coefficients and zero residual
    from clearaudit.classify.grid import occupied_cells
    from clearaudit.classify.kernels import plane_residual_sums, plane_sums
    from clearaudit.classify.objects import _cell_planes

    rng = np.random.default_rng(12)
    m_cells, per = 60, 25
    k = np.repeat(np.arange(m_cells), per)
    rng.shuffle(k)
    dx, dy = rng.uniform(-0.5, 0.5, (2, len(k)))
    a, b, c = rng.normal(size=(3, m_cells)) * [[10.0], [0.3], [0.3]]
    z = a[k] + b[k] * dx + c[k] * dy + rng.normal(scale=0.02, size=len(k)) * (k % 2)
    cells, kk, _ = occupied_cells(k, m_cells)
    zc, gu, gv, rms, cnt = _cell_planes(z, dx, dy, None, cells, kk)
    for cell in range(m_cells):
        at = k == cell
        design = np.c_[np.ones(at.sum()), dx[at], dy[at]]
        coef, *_ = np.linalg.lstsq(design, z[at], rcond=None)
        np.testing.assert_allclose([zc[cell], gu[cell], gv[cell]], coef, atol=1e-9)
        res = z[at] - design @ coef
        np.testing.assert_allclose(rms[cell], np.sqrt(np.mean(res ** 2)), atol=1e-9)
        if cell % 2 == 0:
            assert rms[cell] < 1e-9
    # the compiled sums equal numpy.bincount's (the same additions in the same order)
    z0 = np.full(m_cells, 1.5)
    sums = np.empty((m_cells, 8))
    plane_sums(kk, dx, dy, z, z0, sums)
    zr = z - z0[kk]
    for j, w in enumerate((dx, dy, zr, dx * dx, dy * dy, dx * dy, dx * zr, dy * zr)):
        assert np.array_equal(sums[:, j], np.bincount(kk, w, minlength=m_cells))
    coef = rng.normal(size=(3, m_cells))
    coef[:, 3] = np.nan  # a cell without a plane: its residuals count as 1e3 (nan_to_num)
    sq = np.empty(m_cells)
    plane_residual_sums(kk, dx, dy, z, z0, *coef, sq)
    res = np.nan_to_num(zr - ((coef[1][kk] * dx + coef[0][kk]) + coef[2][kk] * dy), nan=1e3)
    assert np.array_equal(sq, np.bincount(kk, res * res, minlength=m_cells))


def test_plane_solve_matches_lapack_and_rejects_degenerate_cells():
    # reference: numpy.linalg.det and numpy.linalg.solve (LAPACK) on each cell's normal
    # equations, as _cell_planes solved them before the compiled pass; the elimination may
    # differ from LAPACK in the last bits only
    from clearaudit.classify.kernels import plane_solve

    rng = np.random.default_rng(4)
    m, most = 20_000, 30
    n = rng.integers(1, most, m).astype(np.float64)
    dx, dy = rng.uniform(-0.5, 0.5, (2, m, most))
    dz = 0.3 * dx - 0.2 * dy + rng.normal(0.0, 0.05, (m, most))
    dy[:50] = 0.25 * dx[:50]  # collinear points: a singular system, no plane
    use = np.arange(most)[None, :] < n[:, None]
    total = lambda a: (a * use).sum(axis=1)  # noqa: E731
    sums = np.stack([total(dx), total(dy), total(dz), total(dx * dx), total(dy * dy),
                     total(dx * dy), total(dx * dz), total(dy * dz)], axis=1)
    coef = np.empty((m, 3))
    plane_solve(sums, n, 4.0, coef)
    ok = np.flatnonzero(n >= 4)
    sx, sy, sz, sxx, syy, sxy, sxz, syz = sums[ok].T
    a_mat = np.empty((len(ok), 3, 3))
    for r, row in enumerate(((n[ok], sx, sy), (sx, sxx, sxy), (sy, sxy, syy))):
        for c, col in enumerate(row):
            a_mat[:, r, c] = col
    good = np.abs(np.linalg.det(a_mat)) > 1e-9
    ref = np.full((m, 3), np.nan)
    ref[ok[good]] = np.linalg.solve(a_mat[good], np.stack([sz, sxz, syz], -1)[good][..., None])[..., 0]
    assert np.array_equal(np.isnan(coef), np.isnan(ref))
    assert np.isnan(coef[:50][n[:50] >= 4]).all() and np.isnan(coef[n < 4]).all()
    np.testing.assert_allclose(coef[~np.isnan(ref)], ref[~np.isnan(ref)], rtol=1e-9, atol=1e-11)
    with pytest.raises(ValueError):
        plane_solve(sums[:, :7].copy(), n, 4.0, coef)

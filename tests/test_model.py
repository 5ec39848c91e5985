"""Line model on small hand-built corridors with exact catenary wires.

The corridors are built here, independently of the project's physics code: each wire is the
catenary :math:`z = z_0 + C\\cosh((x - x_0)/C)` through its two attachment points, with the low
point :math:`x_0` solved by ``scipy.optimize.brentq`` (Irvine, *Cable Structures*, 1981,
ch. 1); the sag is found numerically as the largest chord-to-curve distance
(``scipy.optimize.minimize_scalar``). The model must recover structures, attachments, H = w·C
and sag from the noisy points.
"""
from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import optimize

from clearaudit.cloud import Cloud
from clearaudit.model import (
    ModelOptions,
    build_line_model,
    order_along_line,
    ruling_span,
    tension_checks,
)
from clearaudit.model.line import Span, TensionSection, WireFit

W_PHASE = 15.97  # N/m, a 26/7 ACSR "Drake"-size conductor, from memory (only a scale here)
W_SHIELD = 5.0   # N/m, invented


# --------------------------------------------------------------------------- fixture
def _low_point(L, h, C):
    """x0 with C cosh((L - x0)/C) - C cosh(-x0/C) = h (Irvine 1981, eq. 1.x)."""
    f = lambda x0: C * (np.cosh((L - x0) / C) - np.cosh(x0 / C)) - h  # noqa: E731
    return optimize.brentq(f, -50 * L, 50 * L, xtol=1e-12)


def _wire_z(s, L, za, zb, C):
    x0 = _low_point(L, zb - za, C)
    return za + C * (np.cosh((s - x0) / C) - np.cosh(x0 / C))


def _sag(L, za, zb, C):
    x0 = _low_point(L, zb - za, C)
    gap = lambda s: -((za + (zb - za) * s / L) - (za + C * (np.cosh((s - x0) / C)  # noqa: E731
                                                       - np.cosh(x0 / C))))
    r = optimize.minimize_scalar(gap, bounds=(0, L), method="bounded",
                                 options={"xatol": 1e-9})
    return -r.fun


def make_corridor(seed=0, n_towers=3, bend_deg=0.0, spacing=220.0, noise=0.03, bundle=1,
                  double=False, partial=True, density=5.0, crossing=False, thin=None):
    """Exact-catenary corridor; returns (cloud, truth).

    ``truth`` has ``structures`` (n, 2) and ``wires``: one dict per wire per complete span
    with attachment points ``a``, ``b`` (3,), ``C``, ``H`` and ``sag``.
    """
    rng = np.random.default_rng(seed)
    heading = np.zeros(n_towers - 1)
    heading[(n_towers - 1) // 2:] = np.radians(bend_deg)
    xy = [np.array([10.0, 20.0])]
    for h in heading:
        xy.append(xy[-1] + spacing * rng.uniform(0.85, 1.15) * np.array([np.cos(h), np.sin(h)]))
    xy = np.array(xy)

    def ground(x, y):
        return 50.0 + 0.03 * x - 0.01 * y

    if double:
        slots = [(-6, 30, "phase"), (-7, 24, "phase"), (-6, 18, "phase"), (6, 30, "phase"),
                 (7, 24, "phase"), (6, 18, "phase"), (-4, 36, "shield"), (4, 36, "shield")]
    else:
        slots = [(-6, 22, "phase"), (0, 22, "phase"), (6, 22, "phase"), (0, 28, "shield")]
    ext = []
    if partial:
        d0 = (xy[0] - xy[1]) / np.linalg.norm(xy[0] - xy[1])
        d1 = (xy[-1] - xy[-2]) / np.linalg.norm(xy[-1] - xy[-2])
        ext = [xy[0] + 180 * d0, xy[-1] + 180 * d1]
    chain = np.array(([ext[0]] if ext else []) + list(xy) + ([ext[1]] if ext else []))
    pts, cls, wires = [], [], []
    H_phase = rng.uniform(20000, 26000)   # one tension per wire and section (equal spans' H)
    # crossarms on the bisector of the line angle, offsets stretched by 1/cos(angle/2) so
    # that the spacing square to each span stays the same (common practice (no source))
    normals = []
    for k in range(len(chain)):
        vs = []
        for j in (k - 1, k):
            if 0 <= j < len(chain) - 1:
                dd = (chain[j + 1] - chain[j]) / np.linalg.norm(chain[j + 1] - chain[j])
                vs.append(np.array([dd[1], -dd[0]]))
        n = np.sum(vs, axis=0)
        normals.append(n / np.linalg.norm(n))
    for i in range(len(chain) - 1):
        a0, b0 = chain[i], chain[i + 1]
        d0 = (b0 - a0) / np.linalg.norm(b0 - a0)
        v0 = np.array([d0[1], -d0[0]])
        first_partial = partial and i == 0
        last_partial = partial and i == len(chain) - 2
        for k, (lat, hgt, role) in enumerate(slots):
            w = W_PHASE if role == "phase" else W_SHIELD
            H = (H_phase if role == "phase" else 9000.0) * (1 + 0.01 * k)
            C = H / w
            for sdx in ([0.0] if (role == "shield" or bundle == 1) else [-0.225, 0.225]):
                off = lat + sdx
                a = a0 + off * normals[i] / (normals[i] @ v0)
                b = b0 + off * normals[i + 1] / (normals[i + 1] @ v0)
                L = float(np.linalg.norm(b - a))
                d = (b - a) / L
                za, zb = ground(*a0) + hgt, ground(*b0) + hgt
                if sdx <= 0 and not (first_partial or last_partial):
                    ac = a0 + lat * normals[i] / (normals[i] @ v0)
                    bc = b0 + lat * normals[i + 1] / (normals[i + 1] @ v0)
                    Lc = float(np.linalg.norm(bc - ac))
                    wires.append(dict(span=i - (1 if partial else 0), lat=lat, height=hgt,
                                      role=role, a=np.r_[ac, za], b=np.r_[bc, zb], C=C, H=H,
                                      L=Lc, sag=_sag(Lc, za, zb, C)))
                n = int(L * density * (0.6 if role == "shield" else 1.0))
                s = np.sort(rng.uniform(0, L, n))
                if first_partial:
                    s = s[s > 0.45 * L]
                if last_partial:
                    s = s[s < 0.55 * L]
                if thin is not None and thin == (i - (1 if partial else 0), k):
                    s = s[:10]
                z = _wire_z(s, L, za, zb, C)
                p = a[None] + s[:, None] * d[None]
                pts.append(np.c_[p, z] + rng.normal(0, noise, (len(s), 3)))
                cls.append(np.full(len(s), 13 if role == "shield" else 14))
    for p in xy:  # lattice-like tower: tapered column of structure points, arms on top
        zg = ground(*p)
        n = 1500
        z = rng.uniform(zg, zg + max(h for _, h, _ in slots) + 2, n)
        half = np.where(z < zg + 15, 3.0 - (z - zg) / 15 * 2, 1.0)
        pts.append(np.c_[p[0] + rng.uniform(-1, 1, n) * half, p[1] + rng.uniform(-1, 1, n) * half, z])
        cls.append(np.full(n, 15))
    gx, gy = np.meshgrid(np.arange(chain[:, 0].min() - 30, chain[:, 0].max() + 30, 4.0),
                         np.arange(chain[:, 1].min() - 30, chain[:, 1].max() + 30, 4.0))
    pts.append(np.c_[gx.ravel(), gy.ravel(), ground(gx.ravel(), gy.ravel())])
    cls.append(np.full(gx.size, 2))
    if crossing:  # a lower line crossing the first span at about 80 degrees
        c0 = 0.5 * (xy[0] + xy[1])
        d = (xy[1] - xy[0]) / np.linalg.norm(xy[1] - xy[0])
        v = np.array([d[1], -d[0]])
        s = np.linspace(-60, 60, 500)
        p = c0[None] + s[:, None] * v[None] + 0.18 * s[:, None] * d[None]
        pts.append(np.c_[p, ground(*c0) + 11 + s**2 / 1600.0])
        cls.append(np.full(len(s), 14))
    cloud = Cloud(xyz=np.vstack(pts), origin=np.array([1000.0, 2000.0, 0.0]),
                  classification=np.concatenate(cls).astype(np.uint8))
    return cloud, {"structures": xy, "wires": wires, "slots": slots}


def _match(model, truth):
    """Pair each true wire with the model wire of its span nearest in attachment A."""
    complete = [s for s in model.spans if s.partial_at is None]
    out = []
    for tw in truth["wires"]:
        span = complete[tw["span"]]
        best, dist = None, np.inf
        for w in span.wires:
            if w.fit is None or not w.fit.ok:
                continue
            dd = np.linalg.norm(w.fit.attachment_a - tw["a"])
            if dd < dist:
                best, dist = w, dd
        out.append((tw, span, best))
    return out


def _check_accuracy(model, truth):
    for tw, span, w in _match(model, truth):
        assert w is not None, f"wire at lateral {tw['lat']} in {span.id} not fitted"
        assert w.status == "fitted", (span.id, w.wire_id, w.note)
        # targets of the brief: attachments 0.15 m, H 2 %, sag 0.10 m (coverage >= 60 %)
        assert np.linalg.norm(w.fit.attachment_a - tw["a"]) < 0.15
        assert np.linalg.norm(w.fit.attachment_b - tw["b"]) < 0.15
        assert w.horizontal_tension_n == pytest.approx(tw["H"], rel=0.02)
        if w.fit.coverage >= 0.6:
            assert abs(w.fit.sag_m - tw["sag"]) < 0.10


# --------------------------------------------------------------------------- tests
@pytest.fixture(scope="module")
def single():
    cloud, truth = make_corridor(seed=1)
    model = build_line_model(cloud, unit_weight_n_per_m={"phase": W_PHASE, "shield": W_SHIELD})
    return cloud, truth, model


def test_structures_detected(single):
    _, truth, model = single
    got = np.array([s.xy for s in model.structures])
    assert len(got) == len(truth["structures"])  # no phantom structure
    d = np.hypot(*(got[:, None, :] - truth["structures"][None, :, :]).T)
    assert np.all(d.min(axis=0) < 1.0)
    assert [s.id for s in model.structures] == ["S001", "S002", "S003"]
    assert all(s.source == "detected" for s in model.structures)


def test_spans_partial_and_sections(single):
    _, _, model = single
    assert [s.id for s in model.spans] == ["START-S001", "S001-S002", "S002-S003", "S003-END"]
    assert [s.partial_at for s in model.spans] == ["start", None, None, "end"]
    for sp in (model.spans[0], model.spans[-1]):
        assert {w.status for w in sp.wires} == {"partial"}
    # wires run on at both ends: no end-of-wire dead-end, one section
    assert [s.kind for s in model.structures] == ["suspension"] * 3
    assert len(model.sections) == 1
    # ruling span, IEEE Std 524-2016: sqrt(sum L^3 / sum L), over the complete spans' conductor
    # lengths (between the phase attachments); the structure-to-structure one for reference
    L = [s.conductor_length_m for s in model.spans[1:3]]
    assert model.sections[0].ruling_span_m == pytest.approx(np.sqrt(sum(x**3 for x in L) / sum(L)))
    L = [s.length_m for s in model.spans[1:3]]
    assert model.sections[0].structure_ruling_span_m == pytest.approx(
        np.sqrt(sum(x**3 for x in L) / sum(L)))


def test_wires_fitted_accurately(single):
    _, truth, model = single
    _check_accuracy(model, truth)
    ids = [[w.wire_id for w in sp.wires] for sp in model.spans]
    assert all(i == ["C1-A", "C1-B", "C1-C", "SW1"] for i in ids)
    for sp in model.spans:
        roles = {w.wire_id: w.role for w in sp.wires}
        assert roles["SW1"] == "shield"


def test_labels_and_json(single):
    cloud, _, model = single
    assert model.wire_point_labels.shape == (cloud.n_points,)
    wire_pts = np.isin(cloud.classification, (13, 14))
    assert np.mean(model.wire_point_labels[wire_pts] >= 0) > 0.95
    assert np.all(model.wire_point_labels[cloud.classification == 2] == -1)
    doc = json.loads(json.dumps(model.to_json()))
    assert doc["format"] == "clearaudit-line-model"
    w = doc["spans"][1]["wires"][0]
    assert w["fit"]["catenary_constant_m"] > 0 and w["horizontal_tension_n"] > 0
    checks = doc["tension_checks"]
    assert {c["wire_id"] for c in checks} == {"C1-A", "C1-B", "C1-C", "SW1"}
    # equal H in every span of the section: the spread is the fit error only
    assert max(c["max_relative_difference"] for c in checks) < 0.04


def test_given_structures_are_used():
    cloud, truth = make_corridor(seed=2, partial=False)
    given = [{"id": f"T{k}", "xy": p + 0.3, "type": "deadend" if k in (10, 12) else "suspension"}
             for k, p in zip((10, 11, 12), truth["structures"], strict=True)]
    model = build_line_model(cloud, structures=given[::-1],
                             unit_weight_n_per_m={"phase": W_PHASE, "shield": W_SHIELD})
    assert [s.id for s in model.structures] == ["T12", "T11", "T10"]  # file order kept
    assert all(s.source == "given" and s.matched_detection for s in model.structures)
    assert [s.kind for s in model.structures] == ["deadend", "suspension", "deadend"]
    assert [s.partial_at for s in model.spans] == [None, None]
    assert [s.id for s in model.spans] == ["T12-T11", "T11-T10"]


def test_double_circuit_bundles_bend_and_crossing():
    cloud, truth = make_corridor(seed=3, n_towers=4, double=True, bundle=2, bend_deg=25.0,
                                    partial=False, crossing=True, density=4.0)
    model = build_line_model(cloud, unit_weight_n_per_m={"phase": W_PHASE, "shield": W_SHIELD},
                             bundle=2)
    assert len(model.structures) == 4
    kinds = [s.kind for s in model.structures]
    # ends of wires and the 25 degree angle are dead-ends; the straight-line tower is not
    assert kinds == ["deadend", "deadend", "suspension", "deadend"]
    assert model.structures[1].line_angle_deg == pytest.approx(25.0, abs=0.5)
    assert [len(s.span_ids) for s in model.sections] == [1, 2]
    expect = ["C1-A", "C1-B", "C1-C", "C2-A", "C2-B", "C2-C", "SW1", "SW2"]
    for sp in model.spans:
        assert [w.wire_id for w in sp.wires] == expect
        for w in sp.wires:
            assert w.bundle_count == (2 if w.role == "phase" else 1)
            if w.role == "phase":
                assert len(w.sub_conductors) == 2
                spacing = abs(w.sub_conductors[0].lateral_offset_m
                              - w.sub_conductors[1].lateral_offset_m)
                assert spacing == pytest.approx(0.45, abs=0.03)
    _check_accuracy(model, truth)
    # the crossing wire is an obstacle, not a phase
    assert len(model.other_wires) == 1
    assert model.other_wires[0].span_id == model.spans[0].id
    assert model.other_wires[0].angle_to_span_deg > 60


def test_too_few_points_not_fitted():
    cloud, _ = make_corridor(seed=4, partial=False, thin=(1, 0))
    model = build_line_model(cloud, unit_weight_n_per_m={"phase": W_PHASE})
    w = model.spans[1].wire("C1-A")
    assert w is not None and w.status == "not_fitted"
    assert "points" in w.note and w.horizontal_tension_n is None
    assert model.spans[0].wire("C1-A").status == "fitted"
    # no unit weight for shield wires: fitted, but no tension
    sw = model.spans[0].wire("SW1")
    assert sw.status == "fitted" and sw.horizontal_tension_n is None


def test_order_follows_a_winding_line():
    # a line that turns through 200 degrees: sorting by x would interleave the legs
    ang = np.radians(np.linspace(0, 200, 15))
    xy = np.c_[300 * np.cos(ang), 300 * np.sin(ang)]
    perm = np.random.default_rng(0).permutation(len(xy))
    order = order_along_line(xy[perm])
    walked = perm[order]
    assert list(walked) in (list(range(15)), list(range(14, -1, -1)))


def test_ruling_span_and_tension_checks():
    # IEEE Std 524-2016 ruling span: spans 300, 400, 500 m -> sqrt(216e6 / 1200) = 424.26 m
    assert ruling_span([300.0, 400.0, 500.0]) == pytest.approx(424.264, abs=1e-3)
    with pytest.raises(ValueError):
        ruling_span([])
    spans = [Span(id=f"P{i}", from_structure=None, to_structure=None, a_xy=np.zeros(2),
                  b_xy=np.ones(2), length_m=1.0) for i in range(2)]
    for sp, h in zip(spans, (20000.0, 21000.0), strict=True):
        sp.wires.append(WireFit(wire_id="C1-A", role="phase", bundle_count=1, status="fitted",
                                note="", point_indices=np.zeros(0, int), horizontal_tension_n=h))
    rows = tension_checks(spans, [TensionSection("TS1", ["P0", "P1"], 1.0)])
    assert rows[0]["max_relative_difference"] == pytest.approx(1000.0 / 20500.0)


def test_bad_arguments():
    cloud, _ = make_corridor(seed=5, n_towers=2, partial=False, density=1.0)
    with pytest.raises(ValueError):
        build_line_model(cloud, unit_weight_n_per_m={"phase": -1.0})
    with pytest.raises(ValueError):
        build_line_model(cloud, unit_weight_n_per_m={"neutral": 3.0})
    with pytest.raises(ValueError):
        build_line_model(cloud, structures=[{"id": "A", "xy": (0, 0), "type": "angle"}])
    with pytest.raises(ValueError):
        build_line_model(cloud.xyz)
    with pytest.raises(ValueError):
        build_line_model(cloud, bundle=0)
    assert ModelOptions().to_dict()["separation"]["cluster_cell_m"] > 0


# ----------------------------------------------------------------------------- column detection
def _towers_and_wires(centres: np.ndarray, seed: int) -> np.ndarray:
    """Four-legged towers (30 m, 6 m base tapering to 2 m) at ``centres`` and a sagging
    wire between consecutive towers (invented geometry)."""
    rng = np.random.default_rng(seed)
    parts = []
    for c in centres:
        z = rng.uniform(0.0, 30.0, 1500)
        half = 3.0 - 2.0 * z / 30.0
        legs = np.array([[1, 1], [1, -1], [-1, 1], [-1, -1]])[rng.integers(0, 4, len(z))]
        xy = c + legs * half[:, None] + rng.normal(0, 0.1, (len(z), 2))
        parts.append(np.c_[xy, z])
    for a, b in zip(centres[:-1], centres[1:], strict=True):
        f = rng.uniform(0, 1, 4000)
        xy = a + f[:, None] * (b - a)
        parts.append(np.c_[xy, 28.0 - 40.0 * 4 * f * (1 - f) * 0.25])
    return np.vstack(parts)


def _dense_reference_columns(xyz: np.ndarray, cell_m: float = 1.0, z_bin_m: float = 0.5,
                             min_levels: int = 6, merge_distance_m: float = 3.0) -> list:
    """Member points of each column from a dense grid over the bounding box, with
    scipy.ndimage (reference library): occupied levels per cell, column cells dilated
    ``ceil(merge / cell)`` times (cross), 8-connected labels, members = column cells and
    their 4-neighbours; labels in raster order."""
    from scipy import ndimage

    ij = np.floor((xyz[:, :2] - xyz[:, :2].min(axis=0)) / cell_m).astype(np.int64)
    nx, ny = ij.max(axis=0) + 1
    zb = np.floor(xyz[:, 2] / z_bin_m).astype(np.int64)
    zb -= zb.min()
    occ = np.zeros((nx, ny, zb.max() + 1), bool)
    occ[ij[:, 0], ij[:, 1], zb] = True
    column = occ.sum(axis=2) >= min_levels
    r = int(np.ceil(merge_distance_m / cell_m))
    grown = ndimage.binary_dilation(column, iterations=r)
    labels, n = ndimage.label(grown, structure=np.ones((3, 3)))
    member = ndimage.binary_dilation(column) & grown
    lab = np.where(member, labels, 0)[ij[:, 0], ij[:, 1]]
    return [np.flatnonzero(lab == k) for k in range(1, n + 1)]


def test_detect_columns_sparse_grid_matches_dense_reference():
    """The sparse (occupied cells only) grid finds exactly the columns of a dense grid."""
    from clearaudit.model import detect_columns

    # a bent line: 6 towers east, then 5 north-east; two towers 4 m apart merge into one
    east = np.c_[np.arange(6) * 300.0, np.zeros(6)]
    ne = east[-1] + np.c_[np.arange(1, 6) * 210.0, np.arange(1, 6) * 210.0]
    centres = np.vstack([east, ne, ne[-1] + [[4.0, 0.0]]])
    xyz = _towers_and_wires(centres, seed=11)
    found = detect_columns(xyz, min_points=30, min_height_m=6.0)
    reference = [idx for idx in _dense_reference_columns(xyz)
                 if len(idx) >= 30 and np.ptp(xyz[idx, 2]) >= 6.0]
    assert len(found) == len(reference) == len(centres) - 1
    for col, idx in zip(found, reference, strict=True):
        np.testing.assert_array_equal(col.point_indices, idx)


def test_detect_columns_memory_follows_points_not_extent():
    """Two towers 140 km apart: a dense 1 m grid over their box would need 10^10 cells; the
    sparse grid needs memory in proportion to the points only (peak well under 50 MB)."""
    import tracemalloc

    from clearaudit.model import detect_columns

    centres = np.array([[0.0, 0.0], [100_000.0, 100_000.0]])
    xyz = _towers_and_wires(centres, seed=12)[:3000]  # the towers, no wire
    tracemalloc.start()
    try:
        found = detect_columns(xyz)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert len(found) == 2
    for col, c in zip(found, centres, strict=True):
        assert np.hypot(*(col.xy - c)) < 0.3
    assert peak < 50e6


def test_ground_heights_at_batch_matches_single():
    # The batch form must give exactly what the one-structure form gives (it only pre-selects
    # candidate points).
    from clearaudit.model.structures import ground_height_at, ground_heights_at

    rng = np.random.default_rng(3)
    ground = np.column_stack([rng.uniform(0, 500, 20000), rng.uniform(0, 80, 20000),
                              rng.normal(100.0, 2.0, 20000)])
    places = np.column_stack([rng.uniform(-20, 520, 25), rng.uniform(-20, 100, 25)])
    radii = rng.uniform(3.0, 15.0, 25)
    batch = ground_heights_at(ground, places, radii)
    single = [ground_height_at(ground, p, r) for p, r in zip(places, radii, strict=True)]
    assert batch == single


def test_fits_run_anywhere_with_the_same_model():
    # The catenary fits (wires and resolved sub-conductors) are independent jobs: run in
    # reverse order, in batches on a 2-worker engine-like mapper, the model is the same.
    from clearaudit.distributed import InProcessEngine
    from clearaudit.model.line import _fit_json, fit_jobs

    cloud, _ = make_corridor(seed=3, n_towers=3, bundle=2, partial=False, density=4.0)
    kw = dict(unit_weight_n_per_m={"phase": W_PHASE, "shield": W_SHIELD}, bundle=2)
    seen = []

    def reversed_map(jobs):
        seen.append(len(jobs))
        return fit_jobs(jobs[::-1])[::-1]

    def rows(model):
        return [(s.id, w.wire_id, w.status, _fit_json(w.fit),
                 [_fit_json(sc.fit) for sc in w.sub_conductors])
                for s in model.spans for w in s.wires]

    plain = rows(build_line_model(cloud, **kw))
    assert rows(build_line_model(cloud, **kw, map_fits=reversed_map)) == plain
    # 2 spans x 3 phases x (1 wire + 2 sub-conductors) + the shield wires
    assert seen and seen[0] >= 18
    engine = InProcessEngine(2)
    assert rows(build_line_model(cloud, **kw, map_fits=lambda jobs: engine.map_batches(
        fit_jobs, jobs))) == plain
    with pytest.raises(ValueError, match="number of fits"):
        build_line_model(cloud, **kw, map_fits=lambda jobs: jobs[:-1])


def test_engine_map_batches_keeps_item_order():
    from clearaudit.distributed import InProcessEngine

    for threads in (1, 2):
        engine = InProcessEngine(threads)
        assert engine.map_batches(lambda b: [x * x for x in b], range(11)) == \
            [x * x for x in range(11)]
        assert engine.map_batches(lambda b: b, []) == []
        with pytest.raises(RuntimeError, match="number of results"):
            engine.map_batches(lambda b: b[:-1], range(5))


def _whole_grid_peaks(dt, dz, opts):
    """The sub-conductor peaks as found on the whole histogram grid: numpy's histogram2d and
    scipy's filters over every cell (the reference for the occupied-part search)."""
    from scipy import ndimage

    half = opts.max_bundle_spacing_m * 1.5
    keep = (np.abs(dt) < half) & (np.abs(dz) < half)
    nb = int(np.ceil(2 * half / opts.fine_cell_m))
    hist, te, ze = np.histogram2d(dt[keep], dz[keep], bins=nb, range=[[-half, half], [-half, half]])
    sm = ndimage.gaussian_filter(hist, opts.fine_smoothing_m / opts.fine_cell_m)
    size = max(int(round(opts.min_subconductor_spacing_m / opts.fine_cell_m)), 3)
    peak = (sm == ndimage.maximum_filter(sm, size=size, mode="constant")) & (
        sm >= opts.peak_fraction * sm.max()) & (sm > 0)
    pi, pj = np.nonzero(peak)
    centres = np.c_[0.5 * (te[pi] + te[pi + 1]), 0.5 * (ze[pj] + ze[pj + 1])]
    centres = centres[np.argsort(-sm[pi, pj])]
    kept = []
    for c in centres:
        if all(np.hypot(*(c - q)) >= opts.min_subconductor_spacing_m for q in kept):
            kept.append(c)
    return np.array(kept)


@pytest.mark.parametrize("seed", range(6))
def test_sub_conductor_peaks_equal_the_whole_grid_search(seed):
    # reference: numpy.histogram2d and scipy.ndimage's filters over the whole grid
    from clearaudit.model.wires import SeparationOptions, _find_peaks

    opts = SeparationOptions()
    half = opts.max_bundle_spacing_m * 1.5
    rng = np.random.default_rng(seed)
    for n_sub in (1, 2, 3, 4):
        for centre in ((0.0, 0.0), (half - 0.05, -half + 0.03), (-half + 0.01, 0.4)):
            angle = rng.uniform(0, np.pi)
            ring = 0.225 * np.c_[np.cos(angle + 2 * np.pi * np.arange(n_sub) / n_sub),
                                 np.sin(angle + 2 * np.pi * np.arange(n_sub) / n_sub)]
            pts = np.vstack([c + rng.normal(0, 0.03, (rng.integers(20, 400), 2))
                             for c in np.asarray(centre) + ring * (n_sub > 1)])
            # outliers, values on the range's edges and on bin edges
            pts = np.vstack([pts, rng.uniform(-2 * half, 2 * half, (10, 2)),
                             [[-half, 0.1], [0.2, -half], [0.0, 0.0], [0.02, -0.04]]])
            dt, dz = pts[:, 0], pts[:, 1]
            np.testing.assert_array_equal(_find_peaks(dt, dz, opts),
                                          _whole_grid_peaks(dt, dz, opts))

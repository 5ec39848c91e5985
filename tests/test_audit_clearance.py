"""Distance engine and obstacle grouping, checked against scipy references."""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize
from scipy.cluster.hierarchy import fcluster, linkage
from scipy.spatial import cKDTree

from clearaudit.audit.clearance import (
    Findings,
    building_envelope,
    clearing_shift,
    group_obstacles,
    points_near_curves,
    polyline_distance,
    polyline_overhead,
    radial_findings,
    reduce_findings,
)
from clearaudit.audit.conditions import catenary_curve

A = np.array([0.0, 0.0, 30.0])
B = np.array([300.0, 40.0, 36.0])
C = 1500.0


def _exact_catenary_distance(p):
    """Distance from p to the continuous catenary, by scipy bounded minimisation."""
    d = B[:2] - A[:2]
    span = np.hypot(*d)
    u = d / span
    h = B[2] - A[2]
    x0 = span / 2 - C * math.asinh(h / (2 * C * math.sinh(span / (2 * C))))

    def dist(x):
        q = np.array([*(A[:2] + x * u), A[2] + C * (math.cosh((x - x0) / C) - math.cosh(x0 / C))])
        return float(np.linalg.norm(p - q))

    res = optimize.minimize_scalar(dist, bounds=(0, span), method="bounded",
                                   options={"xatol": 1e-9})
    return res.fun


def test_polyline_distance_matches_continuous_minimum():
    # Reference: scipy.optimize.minimize_scalar on the analytic curve (Irvine 1981 catenary).
    curve, _, _, _ = catenary_curve(A, B, C, spacing_m=0.5)
    rng = np.random.default_rng(3)
    pts = np.column_stack([rng.uniform(10, 290, 40), rng.uniform(-10, 50, 40),
                           rng.uniform(15, 40, 40)])
    d, closest, param = polyline_distance(pts, curve)
    ref = np.array([_exact_catenary_distance(p) for p in pts])
    # Chord error of 0.5 m segments on C = 1500 m: 0.5²/(8C) = 2e-5 m.
    assert np.max(np.abs(d - ref)) < 1e-4
    assert np.allclose(np.linalg.norm(pts - closest, axis=1), d)
    assert np.all((param >= 0) & (param <= len(curve) - 1))


def test_polyline_overhead_vertical_clearance():
    curve = np.array([[0.0, 0.0, 10.0], [10.0, 0.0, 20.0]])
    pts = np.array([[5.0, 0.5, 1.0], [2.0, -1.0, 0.0]])
    lateral, wire_z, _ = polyline_overhead(pts, curve)
    assert lateral == pytest.approx([0.5, 1.0])
    assert wire_z == pytest.approx([15.0, 12.0])


def test_group_obstacles_equals_single_linkage():
    # Reference: scipy.cluster.hierarchy single linkage cut at the link distance.
    rng = np.random.default_rng(7)
    centres = rng.uniform(0, 60, (6, 3))
    pts = np.concatenate([c + rng.normal(0, 0.4, (30, 3)) for c in centres])
    labels = group_obstacles(pts, link_m=1.5, max_extent_m=1e6)
    ref = fcluster(linkage(pts, method="single"), t=1.5, criterion="distance")
    # Same partition (labels may differ): pairs in the same group agree.
    same = labels[:, None] == labels[None, :]
    same_ref = ref[:, None] == ref[None, :]
    # fcluster keeps merges at distance <= t, query_pairs uses <= r as well.
    assert np.array_equal(same, same_ref)


@pytest.mark.parametrize("chunk", [1, 7, 64, 100_000])
def test_link_components_equals_single_linkage_in_chunks(chunk):
    # Reference: scipy.cluster.hierarchy single linkage cut at the link distance (partition),
    # and scipy's connected_components over every pair (numbering). Points on a 1 cm lattice
    # with some pairs exactly one link distance apart: ties are links in both.
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    from clearaudit.audit.clearance import link_components

    rng = np.random.default_rng(11)
    grid = np.mgrid[0:12, 0:5].reshape(2, -1).T * 1.5          # spacing == link distance
    blobs = np.round(rng.uniform(0, 40, (400, 3)) * 100) / 100
    for pts in (np.column_stack([grid, np.zeros(len(grid))]), blobs, blobs[:, :2]):
        labels = link_components(pts, 1.5, chunk_points=chunk)
        ref = fcluster(linkage(pts, method="single"), t=1.5, criterion="distance")
        assert np.array_equal(labels[:, None] == labels[None, :], ref[:, None] == ref[None, :])
        pairs = cKDTree(pts).query_pairs(1.5, output_type="ndarray")
        graph = coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])),
                           shape=(len(pts), len(pts)))
        assert np.array_equal(labels, connected_components(graph, directed=False)[1])
    assert len(np.unique(link_components(np.column_stack([grid, np.zeros(len(grid))]), 1.5,
                                         chunk_points=chunk))) == 1
    assert link_components(np.zeros((0, 3)), 1.0).shape == (0,)


def test_long_groups_are_cut_into_tiles():
    x = np.arange(0.0, 60.0, 0.5)
    pts = np.column_stack([x, np.zeros_like(x), np.zeros_like(x)])
    labels = group_obstacles(pts, link_m=1.0, max_extent_m=15.0)
    assert len(np.unique(labels)) == 4
    assert len(np.unique(group_obstacles(pts, link_m=1.0, max_extent_m=100.0))) == 1


def test_radial_findings_keeps_only_points_within_requirement():
    curve, frac, _, _ = catenary_curve(A, B, C, spacing_m=0.5)
    mid = curve[len(curve) // 2]
    normal = np.array([-40.0, 300.0, 0.0]) / math.hypot(40.0, 300.0)   # level, square to span
    pts = np.array([mid - [0, 0, 1.0], mid - [0, 0, 3.0], mid + 2.0 * normal])
    idx, d, ci, fr = radial_findings(pts, cKDTree(pts), curve, frac, 2.5,
                                     np.full(len(curve), 0.1), 1.0)
    assert sorted(idx.tolist()) == [0, 2]
    assert d[np.argsort(idx)] == pytest.approx([1.0, 2.0], abs=1e-3)
    # The vertical position uncertainty projects fully on a point straight below and not at
    # all on a point level with the wire.
    assert ci[np.argsort(idx)] == pytest.approx([0.1, 0.0], abs=2e-3)


def test_reduce_findings_keeps_worst_per_obstacle_and_condition():
    f = Findings(np.array([0, 1, 2, 0]), np.array([0, 0, 1, 1]),
                 np.array(["survey", "survey", "mot", "wind_left"], dtype=object),
                 np.array([1.0, 0.5, 0.7, 0.2]), np.full(4, 1.2), np.zeros(4), np.zeros(4),
                 np.full(4, "value", dtype=object))
    groups = np.array(["survey", "survey", "mot", "wind"], dtype=object)
    keep = reduce_findings(f, groups, np.zeros(4, dtype=int))
    assert sorted(keep) == [1, 2, 3]


def test_bad_arguments():
    with pytest.raises(ValueError):
        polyline_distance(np.zeros((1, 3)), np.zeros((1, 3)))
    with pytest.raises(ValueError):
        group_obstacles(np.zeros((2, 3)), link_m=0.0)


def test_group_obstacles_without_cap_and_thinned_is_a_coarsening():
    # A 60 m long roof stays one obstacle without a cap; the voxel-thinned linkage never
    # splits what exact single linkage (scipy.cluster.hierarchy, the reference) joins.
    rng = np.random.default_rng(3)
    roof = np.column_stack([rng.uniform(0, 60, 3000), rng.uniform(0, 10, 3000),
                            np.full(3000, 8.0)])
    assert len(np.unique(group_obstacles(roof, 1.5, None))) == 1
    pts = np.concatenate([c + rng.normal(0, 0.5, (80, 3)) for c in rng.uniform(0, 80, (8, 3))])
    ref = fcluster(linkage(pts, method="single"), t=1.5, criterion="distance")
    thin = group_obstacles(pts, 1.5, None, thin_m=0.5)
    same_ref = ref[:, None] == ref[None, :]
    same = thin[:, None] == thin[None, :]
    assert np.all(same[same_ref])


def test_points_near_curves_is_a_superset_of_the_exact_search():
    # Reference: exact polyline distance of every point (brute force, no thinning).
    curve, _, _, _ = catenary_curve(A, B, C, spacing_m=0.5)
    rng = np.random.default_rng(11)
    pts = np.column_stack([rng.uniform(-10, 310, 20000), rng.uniform(-20, 60, 20000),
                           rng.uniform(10, 40, 20000)])
    d, _, _ = polyline_distance(pts, curve)
    got = points_near_curves(cKDTree(pts), [curve], 4.0, step_m=3.0)
    exact = np.flatnonzero(d < 4.0)
    assert set(exact.tolist()) <= set(got.tolist())
    # ... and not much more: at most the thinning pad (half of 3 m) further out.
    assert np.all(d[got] < 4.0 + 1.5 + 1e-9)


def _brute_force_moves(points, curve, h, v):
    """Smallest rise and smallest sideways shift of a rigid wire that empty the box envelope.

    Reference by brute force over 1 mm steps (no closed form): the wire (a straight level
    line here) is moved and every point re-tested with |offset| < h and |dz| < v.
    """
    y_wire, z_wire = curve[0, 1], curve[0, 2]

    def inside(dy, dz):
        return np.any((np.abs(points[:, 1] - (y_wire + dy)) < h)
                      & (np.abs(points[:, 2] - (z_wire + dz)) < v))

    steps = np.arange(0.0, 40.0, 0.001)
    rise = next(s for s in steps if not inside(0.0, s))
    shift = min(next(s for s in steps if not inside(s, 0.0)),
                next(s for s in steps if not inside(-s, 0.0)))
    return rise, shift


@pytest.mark.parametrize("case", ["edge", "straddle", "beside"])
def test_building_envelope_matches_brute_force_moves(case):
    # A level wire along x at y = 0, z = 20; a box house 10 m wide (y), roof at 15-17 m.
    curve = np.column_stack([np.linspace(-50, 50, 201), np.zeros(201), np.full(201, 20.0)])
    gx, gy = np.meshgrid(np.linspace(-5, 5, 21), np.linspace(0, 10, 21))
    roof_z = 17.0 - 0.2 * np.abs(gy - 5.0)                   # gable roof, ridge along x
    y0 = {"edge": 3.0, "straddle": -5.0, "beside": -14.0}[case]
    pts = np.column_stack([gx.ravel(), gy.ravel() + y0, roof_z.ravel()])
    h, v = 3.48, 4.98
    env = building_envelope(pts, curve, h, v)
    rise, shift = _brute_force_moves(pts, curve, h, v)
    if case == "beside":
        assert not env["violated"]
        return
    assert env["violated"]
    assert env["rise_m"] == pytest.approx(rise, abs=2e-3)
    assert env["shift_m"] == pytest.approx(shift, abs=2e-3)


def test_clearing_shift_hand_example():
    # Offsets -1, 0.5 and 6 m, 2 m required: the block [-1, 0.5] must be passed on either
    # side, 0.5 + 2 = 2.5 m to the left (but 6 - 2 = 4 > 2.5 is clear) or 2 + 1 = 3 m to the
    # right: 2.5 m, set by the point at 0.5 m (hand calculation).
    shift, j = clearing_shift(np.array([-1.0, 0.5, 6.0]), 2.0)
    assert shift == pytest.approx(2.5) and j == 1
    # Points 1 m apart in a row from 0 to 10: the block has no gap, so the shift is 2 m to
    # the right (past the point at 0).
    assert clearing_shift(np.arange(0.0, 10.5, 1.0), 2.0)[0] == pytest.approx(2.0)
    # Nothing within 2 m: negative, the room left.
    assert clearing_shift(np.array([3.0, -5.0]), 2.0)[0] == pytest.approx(-1.0)


def test_nearest_curve_equals_every_point_against_every_segment():
    # Reference: brute force over every segment of every curve (point-to-segment distance by
    # clipped orthogonal projection, common practice (no source)), independent of the
    # bounding-box pruning of nearest_curve.
    from clearaudit.audit.engine import nearest_curve

    rng = np.random.default_rng(5)
    curves = []
    for k in range(12):  # twelve sagging wires in a row along x, at three heights
        x = np.linspace(300.0 * (k // 3), 300.0 * (k // 3 + 1), 61)
        y = np.full_like(x, 4.0 * (k % 3))
        z = 20.0 + 0.0004 * (x - x.mean()) ** 2 + 3.0 * (k % 3)
        curves.append(np.c_[x, y, z])
    pts = np.c_[rng.uniform(-50, 1250, 4000), rng.uniform(-60, 60, 4000), rng.uniform(0, 40, 4000)]
    d, which, param = nearest_curve(pts, curves)
    best = np.full(len(pts), np.inf)
    for c in curves:
        p0, p1 = c[:-1], c[1:]
        seg = p1 - p0
        t = np.clip(np.einsum("nsk,sk->ns", pts[:, None, :] - p0[None], seg)
                    / np.einsum("sk,sk->s", seg, seg), 0.0, 1.0)
        dist = np.linalg.norm(pts[:, None, :] - (p0[None] + t[..., None] * seg[None]), axis=2)
        best = np.minimum(best, dist.min(axis=1))
    np.testing.assert_allclose(d, best, rtol=0, atol=1e-9)
    # the reported curve and parameter give back that distance
    for j, c in enumerate(curves):
        mine = which == j
        i0 = np.minimum(np.floor(param[mine]).astype(int), len(c) - 2)
        f = param[mine] - i0
        on = c[i0] + f[:, None] * (c[i0 + 1] - c[i0])
        np.testing.assert_allclose(np.linalg.norm(pts[mine] - on, axis=1), d[mine], atol=1e-9)
    empty = nearest_curve(np.zeros((0, 3)), curves)
    assert all(len(a) == 0 for a in empty)


def test_compiled_nearest_segment_equals_the_numpy_form():
    # reference: the numpy form (clearance._nearest_segment_numpy); in plan the compiled pass
    # gives the same numbers bit for bit (no fused multiply-add, sums in numpy's order)
    from clearaudit.audit.clearance import (
        _SCAN_VERTICES,
        _nearest_segment,
        _nearest_segment_numpy,
    )

    def _numpy_nearest_segment(points, vertices):
        return _nearest_segment_numpy(points, vertices, None)

    dims = 2
    rng = np.random.default_rng(17 + dims)
    for case in range(40):
        k = int(rng.integers(2, 140)) if case % 10 else _SCAN_VERTICES + 40  # tree path
        s = np.sort(rng.uniform(0, 400, k))
        curve = np.column_stack([s, 0.02 * s + rng.normal(0, 0.3, k),
                                 25 + 0.002 * (s - 200) ** 2])[:, :dims]
        pts = np.column_stack([rng.uniform(-50, 450, 800), rng.uniform(-40, 40, 800),
                               rng.uniform(0, 40, 800)])[:, :dims] * 1.0
        pts[:3] = curve[:3]                             # on vertices
        d, c, p = _nearest_segment(pts, curve, None)
        rd, rc, rp = _numpy_nearest_segment(pts, curve)
        np.testing.assert_array_equal(d, rd)
        np.testing.assert_array_equal(c, rc)
        np.testing.assert_array_equal(p, rp)
    # a given tree and a strided view of the points give the same
    view = np.column_stack([pts, pts[:, :1]])[:, :dims]
    for got, want in zip(_nearest_segment(view, curve, cKDTree(curve)),
                         _numpy_nearest_segment(pts, curve), strict=True):
        np.testing.assert_array_equal(got, want)
    d, c, p = _nearest_segment(pts[:0], curve, None)
    assert d.shape == (0,) and c.shape == (0, dims) and p.shape == (0,)
    # the wire's height over each point (polyline_overhead, polyline_offsets): the numpy
    # form's segment and interpolation from the numpy form's parameter
    from clearaudit.audit.clearance import polyline_offsets, polyline_overhead

    wire = np.column_stack([curve, 30 + 0.01 * (curve[:, 0] - 180) ** 2])
    cloud = np.column_stack([pts, rng.uniform(0, 20, len(pts))])
    lateral, wire_z, param = polyline_overhead(cloud, wire)
    rd, _, rp = _numpy_nearest_segment(pts, curve)
    i0 = np.clip(np.floor(rp).astype(int), 0, len(wire) - 2)
    want_z = wire[i0, 2] + (rp - i0) * (wire[i0 + 1, 2] - wire[i0, 2])
    np.testing.assert_array_equal(lateral, rd)
    np.testing.assert_array_equal(param, rp)
    np.testing.assert_array_equal(wire_z, want_z)
    offset, wire_z2, _ = polyline_offsets(cloud, wire)
    np.testing.assert_array_equal(np.abs(offset), rd)
    np.testing.assert_array_equal(wire_z2, want_z)
    # a repeated vertex (a zero-length segment; the two equally near vertices may be taken
    # either way): the point found lies on the polyline at its parameter, no farther than
    # the nearest vertex
    curve = curve[:60].copy()
    curve[5] = curve[4]
    d, c, p = _nearest_segment(pts, curve, None)
    i0 = np.minimum(np.floor(p).astype(int), len(curve) - 2)
    on = curve[i0] + (p - i0)[:, None] * (curve[i0 + 1] - curve[i0])
    np.testing.assert_allclose(c, on, atol=1e-9)
    np.testing.assert_allclose(d, np.linalg.norm(pts - c, axis=1), atol=1e-9)
    vertex = np.min(np.linalg.norm(pts[:, None, :] - curve[None], axis=2), axis=1)
    assert np.all(d <= vertex + 1e-12)


def test_station_search_finds_the_nearest_vertex_as_a_scan_of_every_vertex():
    # reference: brute force, every point against every vertex with numpy (argmin: the first
    # of equally near vertices, the compiled scan's rule); on near-straight wires, random
    # walks that turn back, closed loops and lattice points with many exact ties
    from clearaudit.audit.clearance import _station_nearest

    rng = np.random.default_rng(23)
    for case in range(200):
        k = int(rng.integers(2, 700))
        kind = case % 4
        if kind == 0:
            t = np.linspace(0.0, rng.uniform(50, 600), k)
            verts = np.column_stack([t, 0.01 * rng.normal(size=k)])
        elif kind == 1:
            verts = np.cumsum(rng.normal(size=(k, 2)), axis=0)
        elif kind == 2:
            verts = rng.integers(0, 20, size=(k, 2)).astype(float)
        else:
            a = np.linspace(0.0, 2 * np.pi, k)
            verts = 30.0 * np.column_stack([np.cos(a), np.sin(a)])
        th = rng.uniform(0, 2 * np.pi)
        rot = np.array([[np.cos(th), -np.sin(th)], [np.sin(th), np.cos(th)]])
        verts = verts @ rot.T + rng.uniform(-1e4, 1e4, 2)
        pts = verts[rng.integers(0, k, 200)] + rng.normal(size=(200, 2)) * rng.choice([0, 1, 30])
        if kind == 2:
            pts = np.round(pts * 2) / 2
        d = (pts[:, None, :] - verts[None, :, :]) ** 2
        want = np.argmin(d[..., 0] + d[..., 1], axis=1)
        np.testing.assert_array_equal(_station_nearest(pts, verts), want)
    # a point that is not finite takes vertex 0, as the scan leaves it; no points, no result
    got = _station_nearest(np.array([[np.nan, 0.0], [1.0, 1.0]]), verts)
    assert got[0] == 0 and got[1] == np.argmin(((verts - [1.0, 1.0]) ** 2).sum(axis=1))
    assert _station_nearest(np.zeros((0, 2)), verts).shape == (0,)


@pytest.mark.parametrize("dtype", [np.int32, np.int64])
def test_cell_order_is_numpys_stable_argsort_and_cumulative_counts(dtype):
    # reference: numpy.argsort(kind="stable") and numpy.cumsum of numpy.bincount
    from clearaudit.audit._polyline import cell_order

    rng = np.random.default_rng(29)
    for n, ncell in ((0, 5), (1, 1), (1_000, 7), (50_000, 3_000), (200, 100_000)):
        key = rng.integers(0, ncell, n).astype(dtype)
        start, order = np.empty(ncell + 1, np.int64), np.empty(n, np.int64)
        cell_order(key, start, order)
        np.testing.assert_array_equal(order, np.argsort(key, kind="stable"))
        want = np.zeros(ncell + 1, np.int64)
        np.cumsum(np.bincount(key, minlength=ncell), out=want[1:])
        np.testing.assert_array_equal(start, want)
    with pytest.raises(IndexError):
        cell_order(np.array([0, 5], dtype=dtype), np.empty(6, np.int64), np.empty(2, np.int64))
    with pytest.raises(IndexError):
        cell_order(np.array([-1], dtype=dtype), np.empty(6, np.int64), np.empty(1, np.int64))


def test_in_box_equals_the_numpy_comparisons():
    # reference: numpy's four comparisons; NaN coordinates fail them all, box edges half open
    from clearaudit.audit.engine import _in_box

    rng = np.random.default_rng(31)
    xy = np.round(rng.uniform(-5, 15, size=(20_000, 2)), 1)
    xy[::97, 0] = np.nan
    xy[::89, 1] = np.nan
    for box in ((0.0, 0.0, 10.0, 10.0), (2.5, -1.0, 2.6, 3.0), (5.0, 5.0, 5.0, 5.0)):
        x0, y0, x1, y1 = box
        want = (xy[:, 0] >= x0) & (xy[:, 0] < x1) & (xy[:, 1] >= y0) & (xy[:, 1] < y1)
        for view in (xy, np.column_stack([xy, xy[:, :1]])[:, :2], np.asfortranarray(xy)):
            got = _in_box(view, box)
            assert got.dtype == bool
            np.testing.assert_array_equal(got, want)
    assert _in_box(xy, None).all() and len(_in_box(xy[:0], (0, 0, 1, 1))) == 0


def _plan_cells_numpy(xy, lo, cell_m, nx, ny, dtype):
    """The plan grid's cells as numpy computes them (the form the compiled pass replaced)."""
    t = np.subtract(xy[:, 0], lo[0])
    t *= 1.0 / cell_m
    np.clip(t, 0.0, nx - 1, out=t)
    key = t.astype(dtype)
    key *= ny
    np.subtract(xy[:, 1], lo[1], out=t)
    t *= 1.0 / cell_m
    np.clip(t, 0.0, ny - 1, out=t)
    key += t.astype(dtype)
    occupied = np.zeros(nx * ny, dtype=bool)
    occupied[key] = True
    return key, occupied


@pytest.mark.parametrize("dtype", [np.int32, np.int64])
def test_plan_cells_equal_the_numpy_form(dtype):
    # reference: numpy's subtract, multiply, clip and cast, value for value, with points on
    # cell edges, one ulp either side, and beyond the grid on every side (clamped)
    from clearaudit.audit._polyline import plan_cells

    rng = np.random.default_rng(8)
    lo, cell_m, nx, ny = np.array([-1234.5678, 987.25]), 2.0, 173, 61
    xy = lo + rng.uniform(-30.0, [nx * cell_m + 30.0, ny * cell_m + 30.0], (200_000, 2))
    edges = lo + cell_m * rng.integers(0, [nx, ny], (20_000, 2))
    xy = np.vstack([xy, edges, np.nextafter(edges, -np.inf), np.nextafter(edges, np.inf)])
    key = np.empty(len(xy), dtype=dtype)
    occupied = np.zeros(nx * ny, dtype=np.uint8)
    plan_cells(xy, float(lo[0]), float(lo[1]), 1.0 / cell_m, nx, ny, key, occupied)
    ref_key, ref_occupied = _plan_cells_numpy(xy, lo, cell_m, nx, ny, dtype)
    np.testing.assert_array_equal(key, ref_key)
    np.testing.assert_array_equal(occupied.view(bool), ref_occupied)
    with pytest.raises(ValueError):
        plan_cells(xy, 0.0, 0.0, 1.0, nx, ny, key[:-1], occupied)


def _curve_window_numpy(curves, origin, axis, reach_m, bin_m):
    """The station-bin windows as numpy and scipy compute them (the form the compiled passes
    replaced): longest 3-D segment, stations and offsets, numpy.minimum.at into the bins and
    scipy.ndimage's sliding extremes with an infinite border."""
    from scipy.ndimage import maximum_filter1d, minimum_filter1d

    seg = max((float(np.max(np.linalg.norm(np.diff(c, axis=0), axis=1)))
               for c in curves if len(c) > 1), default=0.0)
    curve = np.concatenate(curves)
    dx, dy = curve[:, 0] - origin[0], curve[:, 1] - origin[1]
    u, v = dx * axis[0] + dy * axis[1], dy * axis[0] - dx * axis[1]
    ring = int(math.ceil((reach_m + seg + 1e-6) / bin_m)) + 1
    b = np.floor(u / bin_m).astype(np.int64)
    b0 = int(b.min()) - ring - 1
    nb = int(b.max()) - b0 + ring + 2
    out = []
    for values in (v, curve[:, 2]):
        lo, hi = np.full(nb, np.inf), np.full(nb, -np.inf)
        np.minimum.at(lo, b - b0, values)
        np.maximum.at(hi, b - b0, values)
        out += [minimum_filter1d(lo, 2 * ring + 1, mode="constant", cval=np.inf),
                maximum_filter1d(hi, 2 * ring + 1, mode="constant", cval=-np.inf)]
    return b0, nb, ring, b - b0, out


def test_curve_windows_equal_the_numpy_form():
    # reference: numpy's ufunc.at and scipy.ndimage's minimum/maximum_filter1d (the form the
    # compiled passes replaced), value for value, for one and several curves (their
    # segments never join two curves), single-vertex curves, bins of several widths and
    # windows from none to wider than the curve; and the sliding extremes by brute force
    from clearaudit.audit.engine import _EPS_M, _CurveWindow

    assert _EPS_M == 1e-6
    rng = np.random.default_rng(17)
    for trial in range(400):
        curves = []
        for _ in range(int(rng.integers(1, 4))):
            m = int(rng.integers(1, 200))
            x = np.cumsum(rng.uniform(0.0, 2.0, m)) + rng.uniform(-50.0, 50.0)
            c = np.column_stack([x, rng.normal(0.0, 3.0, m) + 0.1 * x,
                                 20.0 + rng.normal(0.0, 2.0, m)])
            curves.append(c[:, [1, 0, 2]] if trial % 3 == 0 else c)
        angle = rng.uniform(0.0, 2.0 * np.pi)
        origin, axis = rng.normal(0.0, 20.0, 2), np.array([math.cos(angle), math.sin(angle)])
        reach, bin_m = float(rng.choice([0.0, 0.3, 2.0, 10.0, 45.0])), \
            float(rng.choice([0.1, 0.5, 1.0]))
        w = _CurveWindow(curves if len(curves) > 1 else curves[0], origin, axis, reach, bin_m)
        b0, nb, ring, bins, ref = _curve_window_numpy(curves, origin, axis, reach, bin_m)
        assert (w.b0, w.nb) == (b0, nb)
        for got, want in zip((w.v_min, w.v_max, w.z_min, w.z_max), ref, strict=True):
            np.testing.assert_array_equal(got, want)
        # the window test of points (compiled): numpy's comparisons on the clipped bins,
        # for bins inside, before and after the window, in plan and in 3-D
        ub = rng.integers(b0 - 5, b0 + nb + 5, 300)
        pv, pz = rng.normal(0.0, 8.0, 300), rng.normal(20.0, 4.0, 300)
        r = reach + _EPS_M
        ok = (ub - b0 >= 0) & (ub - b0 < nb)
        b = np.where(ok, ub - b0, 0)
        plan = ok & (pv >= ref[0][b] - r) & (pv <= ref[1][b] + r)
        np.testing.assert_array_equal(w.maybe_near(ub, pv), plan)
        np.testing.assert_array_equal(w.maybe_near(ub, pv, pz),
                                      plan & (pz >= ref[2][b] - r) & (pz <= ref[3][b] + r))
        if trial % 40 == 0:  # the sliding extremes by their definition
            v = np.concatenate([c for c in curves])
            dx, dy = v[:, 0] - origin[0], v[:, 1] - origin[1]
            off = dy * axis[0] - dx * axis[1]
            near = np.abs(np.arange(nb)[:, None] - bins[None, :]) <= ring
            np.testing.assert_array_equal(
                w.v_min, np.where(near.any(1), np.where(near, off, np.inf).min(1), np.inf))
            np.testing.assert_array_equal(
                w.z_max, np.where(near.any(1), np.where(near, v[:, 2], -np.inf).max(1),
                                  -np.inf))
    # a vertex that is not finite: the compiled pass declines and the window says so
    from clearaudit.audit._polyline import curve_frame

    bad = np.array([[0.0, 0.0, 1.0], [1.0, np.nan, 1.0]])
    assert curve_frame(bad, np.zeros(1, dtype=np.int64), 0.0, 0.0, 1.0, 0.0, 0.5, np.empty(2),
                       np.empty(2), np.empty(2, dtype=np.int64)) is None
    with pytest.raises(ValueError, match="not finite"):
        _CurveWindow(bad, np.zeros(2), np.array([1.0, 0.0]), 1.0)

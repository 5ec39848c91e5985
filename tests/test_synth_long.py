"""The bounded-memory long-corridor generator: one continuous line across LAZ tiles.

A five-span line in three tiles (seams in the middle of spans 2 and 4). Checked against
sources outside the generator:

- the catenary z = z0 + C[cosh((x - x0)/C) - 1] (Irvine, H. M., 1981, *Cable Structures*,
  MIT Press, eq. 1.7), fitted with scipy's least squares separately to a wire's points on each
  side of a seam: the two fits must describe one curve;
- horizontal tension H = w C (Irvine 1981, ch. 1) against the tension recorded in the truth;
- Poisson counting statistics (standard deviation sqrt(n)) for the ground density on the two
  sides of a seam (no gap, no double sampling);
- the audit pipeline itself, reading the tile folder in memory, must find and fit every span.
"""
from __future__ import annotations

import csv
import json

import laspy
import numpy as np
import pytest
from scipy.optimize import least_squares

from clearaudit.synth import write_long_corridor

N_SPANS = 5
DENSITY = 1.5  # [1/m²]


@pytest.fixture(scope="module")
def long_line(tmp_path_factory):
    out = tmp_path_factory.mktemp("long")
    # Two spans per batch: tile_points = 2 spans x 50 000 x 1.5 /m².
    lc = write_long_corridor(out, "lng", n_spans=N_SPANS, seed=11, density_per_m2=DENSITY,
                             tile_points=150_000, bend_deg=8.0, section_spans=3)
    tiles = []
    for path in lc.tiles:
        las = laspy.read(path)
        xyz = np.column_stack([las.x, las.y, las.z]) - lc.origin  # metre CRS: local metres
        tiles.append({"xyz": xyz, "gps": np.asarray(las.gps_time)})
    return lc, tiles


def _catenary_fit(x: np.ndarray, z: np.ndarray, c0: float) -> np.ndarray:
    """Least-squares (C, x0, z0) of z = z0 + C (cosh((x - x0)/C) - 1) (Irvine 1981, eq. 1.7)."""
    def resid(p):
        c, x0, z0 = p
        return z0 + c * (np.cosh((x - x0) / c) - 1.0) - z

    x0 = x[np.argmin(z)]
    return least_squares(resid, [c0, x0, z.min()], x_scale=[100.0, 10.0, 1.0]).x


def test_tiles_and_files(long_line):
    lc, tiles = long_line
    truth = json.loads(lc.truth.read_text())
    assert len(lc.tiles) == 3 and len(lc.seams) == 2
    assert sum(len(t["xyz"]) for t in tiles) == lc.n_points == truth["n_points"]
    # Peak memory follows the batch: no tile is much larger than the requested size.
    assert max(lc.tile_point_counts) < 1.6 * 150_000
    # The structures table covers every structure of the whole line, ends are dead-ends.
    with lc.structures.open() as fh:
        rows = list(csv.DictReader(fh))
    assert [r["id"] for r in rows] == [s["id"] for s in truth["structures"]]
    assert len(rows) == N_SPANS + 1
    assert rows[0]["type"] == rows[-1]["type"] == "deadend"
    assert rows[3]["type"] == "deadend"  # section_spans=3
    # Every structure has points (its tower) in some tile near its CSV position.
    allpts = np.vstack([t["xyz"] for t in tiles])
    for r in rows:
        xy = np.array([float(r["x"]), float(r["y"])]) - lc.origin[:2]
        near = np.hypot(*(allpts[:, :2] - xy).T) < 3.0
        ground = lc.terrain.height(xy[0], xy[1])
        assert np.sum(near & (allpts[:, 2] > ground + 15.0)) > 50, r["id"]


def test_seams_are_square_cuts_without_gap_or_overlap(long_line):
    lc, tiles = long_line
    hw = 50.0  # half of the default 100 m corridor [m]
    for k, seam in enumerate(lc.seams):
        p, d = np.asarray(seam["point_local_m"]), np.asarray(seam["direction"])
        for side, t in ((-1, tiles[k]), (1, tiles[k + 1])):
            r = t["xyz"][:, :2] - p
            along = r @ d
            near = np.hypot(r[:, 0], r[:, 1]) < 120.0
            # Each tile holds only its own side of the cut near the seam.
            if side < 0:
                assert np.all(along[near] < 1e-3)  # LAS scale 1 mm
            else:
                assert np.all(along[near] > -1e-3)
        # Ground density in 10 m strips on both sides: Poisson counts agree (4 sigma).
        counts = []
        for side, t in ((-1, tiles[k]), (1, tiles[k + 1])):
            xyz = t["xyz"]
            r = xyz[:, :2] - p
            along, across = r @ d, r @ np.array([-d[1], d[0]])
            dz = xyz[:, 2] - lc.terrain.height(xyz[:, 0], xyz[:, 1])
            strip = (side * along > 0) & (side * along < 10.0) & (np.abs(across) < hw - 1.0) \
                & (np.abs(dz) < 0.15)
            counts.append(int(strip.sum()))
        expected = DENSITY * 10.0 * 2.0 * (hw - 1.0)  # open ground; shadows only lower it
        for c in counts:
            assert c <= expected + 4.0 * np.sqrt(expected)
            assert c >= 0.6 * expected  # tree shadows keep at least ~45 % below crowns
        assert abs(counts[0] - counts[1]) < 4.0 * np.sqrt(counts[0] + counts[1])
        # GPS time runs on from one tile into the next (one flight line, 150 lines/s).
        assert tiles[k]["gps"].max() <= tiles[k + 1]["gps"].min() + 1.0 / 150.0


def test_wire_across_a_seam_is_one_catenary(long_line):
    lc, tiles = long_line
    truth = json.loads(lc.truth.read_text())
    for k, seam in enumerate(lc.seams):
        span = truth["spans"][seam["span_index"]]
        for wire in span["wires"]:
            if wire["wire_id"] not in ("C1-A", "C1-C"):  # outer phases: nothing else above
                continue
            a = np.asarray(wire["attachment_a_local_m"])
            b = np.asarray(wire["attachment_b_local_m"])
            u = (b - a)[:2] / np.hypot(*(b - a)[:2])
            n = np.array([-u[1], u[0]])
            fits, sides = [], []
            for t in (tiles[k], tiles[k + 1]):
                r = t["xyz"][:, :2] - a[:2]
                x, lat = r @ u, r @ n
                hag = t["xyz"][:, 2] - lc.terrain.height(t["xyz"][:, 0], t["xyz"][:, 1])
                sel = (np.abs(lat) < 0.25) & (x > 15.0) & (x < wire["horizontal_length_m"] - 15.0) \
                    & (hag > 6.0)
                assert sel.sum() > 60
                fits.append(_catenary_fit(x[sel], t["xyz"][sel, 2], 1500.0))
                sides.append((x[sel], t["xyz"][sel, 2]))
            x_seam = float((np.asarray(seam["point_local_m"]) - a[:2]) @ u)
            (c1, x01, z01), (c2, x02, z02) = fits

            def z_of(c, x0, z0, x):
                return z0 + c * (np.cosh((x - x0) / c) - 1.0)

            # The two halves meet at the seam and share one catenary constant.
            assert abs(z_of(c1, x01, z01, x_seam) - z_of(c2, x02, z02, x_seam)) < 0.05
            assert abs(c1 - c2) / wire["catenary_constant_m"] < 0.03
            # One catenary through both halves fits to the noise (0.03 m per axis).
            xa, za = np.concatenate([s[0] for s in sides]), np.concatenate([s[1] for s in sides])
            c, x0, z0 = _catenary_fit(xa, za, 1500.0)
            assert np.sqrt(np.mean((z_of(c, x0, z0, xa) - za) ** 2)) < 0.06
            # H = w C (Irvine 1981) reproduces the recorded tension.
            h_fit = wire["unit_weight_n_per_m"] * c
            assert abs(h_fit / wire["horizontal_tension_n"] - 1.0) < 0.01


def test_audit_of_the_tiles_finds_every_span(long_line, tmp_path):
    from clearaudit.pipeline import AuditOptions, run_audit

    lc, _ = long_line
    truth = json.loads(lc.truth.read_text())
    run_audit(AuditOptions(clouds=[lc.tile_folder], out=tmp_path / "out", line_file=lc.line,
                           tiled=False, overwrite=True, skip_report=True))
    with (tmp_path / "out" / "spans.csv").open() as fh:
        rows = list(csv.DictReader(fh))
    found = {r["span_id"] for r in rows}
    assert found == {s["id"] for s in truth["spans"]}
    # every span lists exactly the line's wires under the same ids, across the dead-ends of
    # the 3-span tension sections (ids are carried from span to span by the model)
    ids: dict[str, set[str]] = {}
    for r in rows:
        ids.setdefault(r["span_id"], set()).add(r["wire_id"])
    for s in truth["spans"]:
        assert ids[s["id"]] == {w["wire_id"] for w in s["wires"]}, s["id"]
    tension = {(s["id"], w["wire_id"]): w["horizontal_tension_n"]
               for s in truth["spans"] for w in s["wires"]}
    for r in rows:
        if r["role"] != "phase":
            continue
        assert r["status"] == "fitted", (r["span_id"], r["wire_id"], r["note"])
        # Fitted H = w C against the generator's exact tension (Irvine 1981, H = w C).
        assert abs(float(r["horizontal_tension_n"]) / tension[(r["span_id"], r["wire_id"])]
                   - 1.0) < 0.03, (r["span_id"], r["wire_id"])


def test_bad_arguments(tmp_path):
    with pytest.raises(ValueError, match="n_spans"):
        write_long_corridor(tmp_path, "x", n_spans=0)
    with pytest.raises(ValueError, match="tile_points"):
        write_long_corridor(tmp_path, "x", n_spans=2, tile_points=10)
    with pytest.raises(ValueError, match="name"):
        write_long_corridor(tmp_path, "a/b", n_spans=2)


def test_same_seed_same_tiles(tmp_path):
    runs = [write_long_corridor(tmp_path / f"r{i}", "d", n_spans=2, seed=5, density_per_m2=0.5,
                                tile_points=10_000, vegetation="sparse") for i in range(2)]
    assert len(runs[0].tiles) == len(runs[1].tiles) == 2
    for a, b in zip(runs[0].tiles, runs[1].tiles, strict=True):
        la, lb = laspy.read(a), laspy.read(b)
        assert np.array_equal(np.asarray(la.X), np.asarray(lb.X))
        assert np.array_equal(np.asarray(la.gps_time), np.asarray(lb.gps_time))

"""Building recall and precision of clearaudit.classify on synthetic corridors.

Usage::

    .venv/bin/python benchmarks/bench_buildings.py                      # seeds 1-6, all terrains
    .venv/bin/python benchmarks/bench_buildings.py --seeds 1 2 --terrains steep
    .venv/bin/python benchmarks/bench_buildings.py --timing /tmp/clearaudit-bench/p10M.laz

For every seed and terrain a corridor from ``clearaudit.synth.generate_corridor`` (sparse
vegetation, no classes in the file) is classified and scored against the generator's truth
classes: building recall and precision (truth class 6), the number of roof points taken out
of the ground set by :func:`clearaudit.classify.objects.find_ground_roofs`, and the overall
class agreement (share of all points whose class equals the truth class, with the ground-level
road surface 11 counted as ground 2 and the vegetation height bands 3/4/5 as one class).

``--timing FILE`` also times ``find_ground_roofs`` on the ground points of a large cloud
(the SMRF ground set of :func:`classify` is rebuilt once, then the roof step is run
``--repeat`` times) and prints the number of points the roof step takes out of the ground.

Run on demand (minutes); not part of the test suite.
"""
from __future__ import annotations

import argparse
import time

import numpy as np

from clearaudit.classify import ClassifyOptions, classify
from clearaudit.synth import TERRAIN_KINDS, generate_corridor


def _merge(codes: np.ndarray) -> np.ndarray:
    """Class codes with road (11) as ground (2) and vegetation bands 4, 5 as 3."""
    out = np.asarray(codes, dtype=np.uint8).copy()
    out[out == 11] = 2
    out[np.isin(out, (4, 5))] = 3
    return out


def score_case(seed: int, terrain: str) -> dict[str, float]:
    """Classify one generated corridor and score buildings and overall agreement."""
    scene = generate_corridor(seed=seed, terrain=terrain, vegetation="sparse", classified=False)
    t0 = time.perf_counter()
    result = classify(scene.cloud)
    elapsed = time.perf_counter() - t0
    truth = np.asarray(scene.truth_classification)
    cls = result.classification
    t6, p6 = truth == 6, cls == 6
    tp = float(np.sum(t6 & p6))
    return {
        "seed": seed, "terrain": terrain, "n": len(cls),
        "bld_truth": int(t6.sum()),
        "recall": tp / max(t6.sum(), 1),
        "precision": tp / p6.sum() if p6.any() else float("nan"),  # nothing labelled 6
        "roof_patches": int(result.info.get("ground_roof_patches", 0) or 0),
        "roof_points": int(result.info.get("ground_roof_points", 0) or 0),
        "agreement": float(np.mean(_merge(truth) == _merge(cls))),
        "time_s": elapsed,
    }


def time_ground_roofs(path: str, repeat: int) -> None:
    """Time find_ground_roofs on the ground set of a large file (isolated points left out of
    the ground filter as in classify; its pit step is skipped)."""
    from clearaudit.classify.core import ground_filter
    from clearaudit.classify.grid import GridFrame, cell_min
    from clearaudit.classify.noise import isolated_points
    from clearaudit.classify.objects import find_ground_roofs
    from clearaudit.io.las import read_cloud

    cloud = read_cloud(path)
    opts = ClassifyOptions()
    xyz = cloud.xyz
    frame, location = GridFrame.fit_locate(xyz[:, :2], opts.smrf_cell_m, margin=opts.smrf_cell_m)
    use = ~isolated_points(xyz, opts.noise_voxel_m, opts.noise_min_neighbours)
    zmin = cell_min(location.flat, np.where(use, xyz[:, 2], np.inf),
                    frame.size).reshape(frame.shape)
    is_ground, _, _ = ground_filter(xyz, frame, location, use, zmin, opts)
    ground_idx = np.flatnonzero(is_ground)
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        roofs = find_ground_roofs(xyz, ground_idx, cell_m=opts.building_cell_m,
                                  min_height_m=opts.building_min_hag_m,
                                  min_area_m2=opts.building_min_area_m2)
        times.append(time.perf_counter() - t0)
    print(f"{path}: {cloud.n_points} points, {len(ground_idx)} ground points")
    print(f"find_ground_roofs: best {min(times):.3f} s, median {np.median(times):.3f} s "
          f"over {repeat} runs; patches {roofs.patches}, roof points {int(roofs.is_roof.sum())}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seeds", type=int, nargs="+", default=[1, 2, 3, 4, 5, 6])
    parser.add_argument("--terrains", nargs="+", default=list(TERRAIN_KINDS),
                        choices=TERRAIN_KINDS)
    parser.add_argument("--timing", metavar="FILE", default=None,
                        help="also time find_ground_roofs on the ground points of FILE")
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--no-table", action="store_true", help="only the timing")
    args = parser.parse_args()
    if not args.no_table:
        head = (f"{'terrain':8s} {'seed':>4s} {'points':>8s} {'bld pts':>7s} {'recall':>7s} "
                f"{'precis.':>7s} {'patches':>7s} {'roof pts':>8s} {'agree':>8s} {'time s':>6s}")
        print(head)
        print("-" * len(head))
        rows = []
        for terrain in args.terrains:
            for seed in args.seeds:
                r = score_case(seed, terrain)
                rows.append(r)
                precision = ("      -" if np.isnan(r["precision"])
                             else f"{100 * r['precision']:6.1f}%")
                print(f"{terrain:8s} {seed:4d} {r['n']:8d} {r['bld_truth']:7d} "
                      f"{100 * r['recall']:6.1f}% {precision} "
                      f"{r['roof_patches']:7d} {r['roof_points']:8d} "
                      f"{100 * r['agreement']:7.3f}% {r['time_s']:6.1f}", flush=True)
        for terrain in args.terrains:
            sel = [r for r in rows if r["terrain"] == terrain]
            rec = np.mean([r["recall"] for r in sel])
            pre = np.nanmean([r["precision"] for r in sel])
            worst = min(r["recall"] for r in sel)
            print(f"{terrain:8s} mean recall {100 * rec:.1f} %, worst {100 * worst:.1f} %, "
                  f"mean precision {100 * pre:.1f} % (cases with buildings found)")
    if args.timing:
        time_ground_roofs(args.timing, args.repeat)


if __name__ == "__main__":
    main()

"""Accuracy and speed of clearaudit.classify.

Usage::

    .venv/bin/python benchmarks/bench_classify.py            # everything (several minutes)
    .venv/bin/python benchmarks/bench_classify.py --only synthetic|real|speed
    .venv/bin/python benchmarks/bench_classify.py --only speed --points 10000000

Sections
--------
synthetic
    Corridors from ``clearaudit.synth.generate_corridor`` (terrain × vegetation), scored
    against their truth classes: ground total error (type I + type II over all points; truth
    ground = classes 2 and 11, road surface being ground level), wire / structure recall and
    precision (structure = 15 and 16), vegetation F1 (3, 4, 5 together), building, noise.
    The cloth simulation filter (PyPI ``cloth-simulation-filter``) is scored the same way.
real
    The two AHN4 crops in tests/data/real, classified with their classes ignored; agreement
    with the producer's ground (2 and 9: water is a ground-level surface) and with CSF.
speed
    A corridor of about 10 million points made of shifted copies of the real crops, written as
    LAZ; the raw LAZ read (laspy + lazrs decompression) and the classification are timed and
    reported in points per second.
"""
from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

import laspy
import numpy as np

from clearaudit.classify import ClassifyOptions, classify
from clearaudit.cloud import Cloud

ROOT = Path(__file__).resolve().parents[1]
REAL = ROOT / "tests" / "data" / "real"
CROPS = ("ahn4_powerline_07CZ2_14.laz", "ahn4_powerline_12BZ1_21.laz")


def recall_precision(truth: np.ndarray, found: np.ndarray) -> tuple[float, float, float]:
    tp = float(np.sum(truth & found))
    recall = tp / max(truth.sum(), 1)
    precision = tp / max(found.sum(), 1)
    f1 = 2 * recall * precision / max(recall + precision, 1e-12)
    return recall, precision, f1


def csf_ground(xyz: np.ndarray, resolution: float = 1.0, threshold: float = 0.5) -> np.ndarray:
    import CSF

    csf = CSF.CSF()
    csf.params.bSloopSmooth = False
    csf.params.cloth_resolution = resolution
    csf.params.rigidness = 3
    csf.params.class_threshold = threshold
    csf.setPointCloud(np.ascontiguousarray(xyz))
    ground, other = CSF.VecInt(), CSF.VecInt()
    csf.do_filtering(ground, other, False)
    mask = np.zeros(len(xyz), bool)
    mask[np.asarray(ground, dtype=np.int64)] = True
    return mask


def score(truth: np.ndarray, cls: np.ndarray) -> dict[str, float]:
    tg = np.isin(truth, (2, 9, 11))
    og = cls == 2
    out = {"ground_type1": float(np.mean(tg & ~og)), "ground_type2": float(np.mean(~tg & og))}
    out["ground_total"] = out["ground_type1"] + out["ground_type2"]
    for name, codes in (("wire", (13, 14)), ("structure", (15, 16)), ("vegetation", (3, 4, 5)),
                        ("building", (6,)), ("noise", (7, 18))):
        r, p, f = recall_precision(np.isin(truth, codes), np.isin(cls, codes))
        out[f"{name}_recall"], out[f"{name}_precision"], out[f"{name}_f1"] = r, p, f
    veg = np.isin(truth, (3, 4, 5)) & np.isin(cls, (3, 4, 5))
    out["vegetation_band_agreement"] = float(np.mean(truth[veg] == cls[veg])) if veg.any() else 1.0
    shield = truth == 13
    out["shield_recall"] = float(np.mean(cls[shield] == 13)) if shield.any() else float("nan")
    return out


def synthetic(seeds: list[int]) -> None:
    from clearaudit.synth import generate_corridor

    print("\n## Synthetic corridors (generate_corridor, classified=False)\n")
    head = ("terrain", "vegetation", "seed", "points", "ground err %", "wire R %", "wire P %",
            "struct R %", "struct P %", "veg F1 %", "bldg R %", "noise R %", "CSF ground err %",
            "s")
    print("| " + " | ".join(head) + " |")
    print("|" + "---|" * len(head))
    for terrain in ("flat", "rolling", "steep"):
        for vegetation in ("sparse", "mixed", "dense"):
            for seed in seeds:
                scene = generate_corridor(seed, terrain=terrain, vegetation=vegetation,
                                          classified=False)
                truth = np.asarray(scene.truth_classification)
                t = time.perf_counter()
                result = classify(scene.cloud)
                dt = time.perf_counter() - t
                s = score(truth, result.classification)
                c = csf_ground(scene.cloud.xyz)
                tg = np.isin(truth, (2, 9, 11))
                csf_err = float(np.mean(tg != c))
                row = (terrain, vegetation, str(seed), f"{scene.cloud.n_points:,}",
                       f"{100 * s['ground_total']:.2f}", f"{100 * s['wire_recall']:.2f}",
                       f"{100 * s['wire_precision']:.2f}", f"{100 * s['structure_recall']:.2f}",
                       f"{100 * s['structure_precision']:.2f}", f"{100 * s['vegetation_f1']:.2f}",
                       f"{100 * s['building_recall']:.1f}", f"{100 * s['noise_recall']:.1f}",
                       f"{100 * csf_err:.2f}", f"{dt:.1f}")
                print("| " + " | ".join(row) + " |", flush=True)


def load_crop(path: Path) -> tuple[Cloud, np.ndarray]:
    las = laspy.read(path)
    xyz = np.c_[las.x, las.y, las.z]
    origin = np.floor(xyz.min(axis=0))
    return Cloud(xyz=xyz - origin, origin=origin), np.asarray(las.classification)


def real() -> None:
    print("\n## Real AHN4 crops (file classes ignored; reference ground = classes 2 and 9)\n")
    head = ("crop", "points", "agreement %", "type I %", "type II %", "CSF vs ref %",
            "ours vs CSF %", "wire pts", "tower pts", "s")
    print("| " + " | ".join(head) + " |")
    print("|" + "---|" * len(head))
    for name in CROPS:
        cloud, ref = load_crop(REAL / name)
        t = time.perf_counter()
        result = classify(cloud)
        dt = time.perf_counter() - t
        rg = np.isin(ref, (2, 9))
        og = result.classification == 2
        c = csf_ground(cloud.xyz)
        row = (name, f"{cloud.n_points:,}", f"{100 * np.mean(rg == og):.2f}",
               f"{100 * np.mean(rg & ~og):.2f}", f"{100 * np.mean(~rg & og):.2f}",
               f"{100 * np.mean(c == rg):.2f}", f"{100 * np.mean(c == og):.2f}",
               str(result.counts.get(13, 0) + result.counts.get(14, 0)),
               str(result.counts.get(15, 0)), f"{dt:.2f}")
        print("| " + " | ".join(row) + " |", flush=True)


def speed(target_points: int) -> None:
    print(f"\n## Speed (about {target_points:,} points, {os.cpu_count()} cores)\n")
    parts = []
    offset = 0.0
    while sum(len(p) for p in parts) < target_points:
        for name in CROPS:
            las = laspy.read(REAL / name)
            xyz = np.c_[las.x, las.y, las.z]
            xyz = xyz - xyz.min(axis=0)
            xyz[:, 0] += offset
            offset += np.ptp(xyz[:, 0]) + 50.0
            parts.append(xyz)
    xyz = np.vstack(parts)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "corridor.laz"
        header = laspy.LasHeader(point_format=6, version="1.4")
        header.scales = np.array([0.001, 0.001, 0.001])
        header.offsets = np.floor(xyz.min(axis=0))
        las = laspy.LasData(header)
        las.x, las.y, las.z = xyz[:, 0], xyz[:, 1], xyz[:, 2]
        las.write(path)
        t = time.perf_counter()
        back = laspy.read(path)
        coords = np.c_[back.x, back.y, back.z]
        read_s = time.perf_counter() - t
    n = len(coords)
    origin = np.floor(coords.min(axis=0))
    cloud = Cloud(xyz=coords - origin, origin=origin)
    t = time.perf_counter()
    result = classify(cloud, ClassifyOptions())
    classify_s = time.perf_counter() - t
    print(f"points: {n:,}")
    print(f"LAZ read (laspy+lazrs): {read_s:.2f} s = {n / read_s:,.0f} points/s")
    print(f"classify:               {classify_s:.2f} s = {n / classify_s:,.0f} points/s")
    print("steps (s):", {k: round(v, 2) for k, v in result.timings_s.items()})


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--only", choices=("synthetic", "real", "speed"))
    parser.add_argument("--seeds", type=int, nargs="+", default=[1])
    parser.add_argument("--points", type=int, default=10_000_000)
    args = parser.parse_args()
    if args.only in (None, "real"):
        real()
    if args.only in (None, "synthetic"):
        synthetic(args.seeds)
    if args.only in (None, "speed"):
        speed(args.points)


if __name__ == "__main__":
    main()

"""Read throughput of clearaudit.io.las.read_cloud (points per second).

Generates a ~5-million-point LAS 1.4 / format 6 file of an invented corridor (ground plane,
noise, a few hundred thousand wire-like points) in a temporary folder, writes it as LAS and
as LAZ, and times:

- ``read_cloud`` on each (all default fields);
- ``read_cloud`` with a 30 m corridor ``keep`` (culling while streaming);
- ``laspy.read`` alone, as the floor that decoding costs;
- ``read_cloud`` on the real AHN4 crops in ../shared/real-clouds when present.

Run: ``python benchmarks/bench_read.py [N_POINTS]``.
"""
from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import laspy
import numpy as np
import pyproj

from clearaudit.cloud import Cloud
from clearaudit.io.las import corridor_mask, read_cloud, write_cloud

REAL = Path(__file__).resolve().parents[1].parent / "shared" / "real-clouds"


def synthetic_cloud(n: int, seed: int = 0) -> Cloud:
    rng = np.random.default_rng(seed)
    length, width = 2000.0, 120.0
    x = rng.uniform(0, length, n)
    y = rng.uniform(-width / 2, width / 2, n)
    z = 0.02 * x + rng.normal(0, 0.05, n)
    wires = rng.random(n) < 0.05
    y[wires] = rng.choice([-6.0, 0.0, 6.0], wires.sum()) + rng.normal(0, 0.03, wires.sum())
    span = np.mod(x[wires], 300.0)
    z[wires] += 25 + (span - 150.0) ** 2 / (2 * 1500.0) - 150.0**2 / (2 * 1500.0) + 7.5
    xyz = np.round(np.column_stack([x, y + 500.0, z + 100.0]), 3)
    cls = np.where(wires, 1, 2).astype(np.uint8)
    returns = rng.integers(1, 4, n).astype(np.uint8)
    return Cloud(
        xyz=xyz, origin=np.array([610_000.0, 4_210_000.0, 0.0]),
        crs=pyproj.CRS("EPSG:32617"), classification=cls,
        fields={"intensity": rng.integers(0, 4000, n).astype(np.uint16),
                "return_number": np.ones(n, dtype=np.uint8), "number_of_returns": returns,
                "gps_time": np.sort(rng.uniform(3e8, 3e8 + 600, n))},
    )


def timed(label: str, n_points: int, fn, repeat: int = 2) -> float:
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    rate = n_points / best
    print(f"{label:<46s} {n_points:>10,d} pts  {best:7.2f} s  {rate / 1e6:6.2f} M pts/s")
    return rate


def main(n: int = 5_000_000) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        cloud = synthetic_cloud(n)
        las_path = write_cloud(cloud, tmp / "corridor.las")
        laz_path = write_cloud(cloud, tmp / "corridor.laz")
        print(f"synthetic file: {n:,d} points; LAS {las_path.stat().st_size / 1e6:.0f} MB, "
              f"LAZ {laz_path.stat().st_size / 1e6:.0f} MB")
        origin = cloud.origin
        line = np.array([[origin[0], origin[1] + 500.0], [origin[0] + 2000.0, origin[1] + 500.0]])
        keep = corridor_mask(line, 30.0)
        for path, kind in ((las_path, "LAS"), (laz_path, "LAZ")):
            timed(f"laspy.read ({kind})", n, lambda p=path: laspy.read(p))
            timed(f"read_cloud ({kind})", n, lambda p=path: read_cloud(p))
            timed(f"read_cloud + 30 m corridor keep ({kind})", n,
                  lambda p=path: read_cloud(p, keep=keep))
    if REAL.is_dir():
        files = sorted(REAL.glob("*.laz"))
        total = sum(laspy.open(f).header.point_count for f in files)
        timed("read_cloud (real AHN4 crops, LAZ)", total, lambda: read_cloud(files))
    else:
        print("real crops not found; skipped")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 5_000_000)

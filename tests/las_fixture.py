"""Small LAS/LAZ files with random bytes in every field, for the classified-copy tests."""
from __future__ import annotations

from pathlib import Path

import laspy
import numpy as np
import pyproj

# LAS 1.4 R15 section 2.1: formats 0-3 exist since LAS 1.2, 4-5 since 1.3, 6-10 since 1.4
VERSION = {**dict.fromkeys(range(4), "1.2"), 4: "1.3", 5: "1.3", **dict.fromkeys(range(6, 11),
                                                                                "1.4")}


def random_las(path: Path, fmt: int, n: int, rng: np.random.Generator, *,
               version: str | None = None, x0: float = 0.0, crs: str | None = None) -> Path:
    """Write ``n`` points of format ``fmt`` with random bytes in every field (so every flag
    bit varies), coordinates on a 0.01 m grid within 300 m × 300 m × 50 m, GPS times when the
    format has them; ``version`` defaults to the oldest LAS version with the format."""
    header = laspy.LasHeader(point_format=fmt, version=version or VERSION[fmt])
    header.scales = np.array([0.01, 0.01, 0.01])
    header.offsets = np.array([500_000.0 + x0, 4_400_000.0, 0.0])
    dtype = header.point_format.dtype()
    records = rng.integers(0, 256, n * dtype.itemsize, dtype=np.uint8).view(dtype).copy()
    records["X"] = rng.integers(0, 30_000, n)
    records["Y"] = rng.integers(0, 30_000, n)
    records["Z"] = rng.integers(0, 5_000, n)
    if "gps_time" in dtype.names:
        records["gps_time"] = rng.uniform(0, 1e6, n)
    las = laspy.LasData(header)
    las.points = laspy.ScaleAwarePointRecord(records, header.point_format, header.scales,
                                             header.offsets)
    if crs is not None:
        las.header.add_crs(pyproj.CRS(crs))
    las.write(path)
    return path

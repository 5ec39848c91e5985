"""The in-memory point cloud every stage works on.

Coordinates are float64 **metres relative to a local origin**: ``xyz = (crs_coordinate -
origin) * unit_m``. The origin is kept in the CRS's own units, so converting back to CRS
coordinates is exact to well below the LAS scale (float64 keeps ~15 significant digits; a
local coordinate of 10 km at 1 mm scale uses 8 of them).

Per-point bookkeeping (``source_id``, ``source_index``) lets the writer put every result back
onto the original points of the original files, in input order.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .arrays import column_bounds

# ASPRS class codes, LAS 1.4 R15 Table 17.
UNCLASSIFIED_NEVER = 0
UNCLASSIFIED = 1
GROUND = 2
LOW_VEGETATION = 3
MEDIUM_VEGETATION = 4
HIGH_VEGETATION = 5
BUILDING = 6
LOW_NOISE = 7
WATER = 9
RAIL = 10
ROAD = 11
WIRE_GUARD = 13  # shield / earth wire
WIRE_CONDUCTOR = 14
TRANSMISSION_TOWER = 15
WIRE_CONNECTOR = 16  # insulators and attachment hardware
BRIDGE_DECK = 17
HIGH_NOISE = 18

CLASS_NAMES: dict[int, str] = {
    0: "never classified", 1: "unclassified", 2: "ground", 3: "low vegetation",
    4: "medium vegetation", 5: "high vegetation", 6: "building", 7: "low noise",
    8: "model key point", 9: "water", 10: "rail", 11: "road surface", 12: "overlap",
    13: "wire - guard (shield)", 14: "wire - conductor (phase)", 15: "transmission tower",
    16: "wire-structure connector (insulator)", 17: "bridge deck", 18: "high noise",
}

VEGETATION_CLASSES = (LOW_VEGETATION, MEDIUM_VEGETATION, HIGH_VEGETATION)
WIRE_CLASSES = (WIRE_GUARD, WIRE_CONDUCTOR)
NOISE_CLASSES = (LOW_NOISE, HIGH_NOISE)


@dataclass(frozen=True)
class SourceInfo:
    """What was read from one input file (kept for the run record and for writing back)."""

    path: str
    version: str
    point_format: int
    point_count: int
    scales: tuple[float, float, float]
    offsets: tuple[float, float, float]
    crs_wkt: str | None
    crs_origin: str  # "file-wkt", "file-geotiff", "override", "none"
    sha256: str | None = None
    #: points flagged withheld (not analysed) among those the read kept
    withheld_points: int = 0


@dataclass
class Cloud:
    """A point cloud in local metric coordinates.

    Attributes
    ----------
    xyz
        Point coordinates relative to ``origin``. [m], shape (n, 3), float64.
    origin
        Local origin in CRS units (x, y, z). [CRS unit]
    crs
        The horizontal/compound CRS (``pyproj.CRS``) or ``None`` when unknown.
    horizontal_unit_m, vertical_unit_m
        Metres per CRS unit (1.0, 0.3048 or 1200/3937). [m/unit]
    classification
        ASPRS class code per point, uint8, shape (n,).
    fields
        Other per-point dimensions by name (intensity, return_number, number_of_returns,
        gps_time, height_above_ground ...).
    source_id, source_index
        For each point, the index of its file in ``sources`` and its index in that file.
    sources
        One :class:`SourceInfo` per input file.
    """

    xyz: np.ndarray
    origin: np.ndarray
    crs: Any = None
    horizontal_unit_m: float = 1.0
    vertical_unit_m: float = 1.0
    classification: np.ndarray | None = None
    fields: dict[str, np.ndarray] = field(default_factory=dict)
    source_id: np.ndarray | None = None
    source_index: np.ndarray | None = None
    sources: list[SourceInfo] = field(default_factory=list)

    def __post_init__(self) -> None:
        self.xyz = np.ascontiguousarray(self.xyz, dtype=np.float64).reshape(-1, 3)
        self.origin = np.asarray(self.origin, dtype=np.float64).reshape(3)
        n = len(self.xyz)
        if self.classification is None:
            self.classification = np.ones(n, dtype=np.uint8)
        else:
            self.classification = np.asarray(self.classification, dtype=np.uint8)
        if len(self.classification) != n:
            raise ValueError("classification length differs from the number of points")
        for name, values in self.fields.items():
            if len(values) != n:
                raise ValueError(f"field {name!r} length differs from the number of points")

    # ------------------------------------------------------------------ basics
    @property
    def n_points(self) -> int:
        return int(len(self.xyz))

    def __len__(self) -> int:
        return self.n_points

    @property
    def unit_m(self) -> np.ndarray:
        """Metres per CRS unit for x, y, z. [m/unit]"""
        return np.array([self.horizontal_unit_m, self.horizontal_unit_m, self.vertical_unit_m])

    @property
    def unit_name(self) -> str:
        return unit_name(self.horizontal_unit_m)

    def to_crs(self, xyz_local: np.ndarray) -> np.ndarray:
        """Local metres → CRS coordinates (CRS units). Accepts shape (..., 3)."""
        return np.asarray(xyz_local, dtype=np.float64) / self.unit_m + self.origin

    def from_crs(self, xyz_crs: np.ndarray) -> np.ndarray:
        """CRS coordinates (CRS units) → local metres. Accepts shape (..., 3)."""
        return (np.asarray(xyz_crs, dtype=np.float64) - self.origin) * self.unit_m

    def subset(self, mask_or_index: np.ndarray) -> Cloud:
        """A new Cloud with the selected points (boolean mask or integer index)."""
        sel = mask_or_index
        return Cloud(
            xyz=self.xyz[sel], origin=self.origin.copy(), crs=self.crs,
            horizontal_unit_m=self.horizontal_unit_m, vertical_unit_m=self.vertical_unit_m,
            classification=self.classification[sel],
            fields={k: v[sel] for k, v in self.fields.items()},
            source_id=None if self.source_id is None else self.source_id[sel],
            source_index=None if self.source_index is None else self.source_index[sel],
            sources=list(self.sources),
        )

    def class_counts(self) -> dict[int, int]:
        """Number of points per class code present."""
        codes, counts = np.unique(self.classification, return_counts=True)
        return {int(c): int(k) for c, k in zip(codes, counts, strict=True)}

    def bounds_crs(self) -> tuple[np.ndarray, np.ndarray]:
        """(min, max) corners in CRS units."""
        if self.n_points == 0:
            raise ValueError("empty cloud has no bounds")
        lo, hi = column_bounds(self.xyz)
        return self.to_crs(lo), self.to_crs(hi)

    @staticmethod
    def concatenate(clouds: list[Cloud]) -> Cloud:
        """Join clouds that share origin, CRS and units (as produced by one reader call)."""
        if not clouds:
            raise ValueError("nothing to concatenate")
        first = clouds[0]
        names = set(first.fields)
        for c in clouds[1:]:
            if not np.allclose(c.origin, first.origin) or c.unit_m.tolist() != first.unit_m.tolist():
                raise ValueError("clouds differ in origin or units")
            names &= set(c.fields)

        def cat(get):
            parts = [get(c) for c in clouds]
            return None if any(p is None for p in parts) else np.concatenate(parts)

        return Cloud(
            xyz=np.concatenate([c.xyz for c in clouds]), origin=first.origin.copy(),
            crs=first.crs, horizontal_unit_m=first.horizontal_unit_m,
            vertical_unit_m=first.vertical_unit_m,
            classification=np.concatenate([c.classification for c in clouds]),
            fields={k: np.concatenate([c.fields[k] for c in clouds]) for k in sorted(names)},
            source_id=cat(lambda c: c.source_id), source_index=cat(lambda c: c.source_index),
            sources=list(first.sources),
        )


def unit_name(metres_per_unit: float) -> str:
    """Human name of a linear unit from its length in metres."""
    from .units import FOOT_M, US_SURVEY_FOOT_M

    if abs(metres_per_unit - 1.0) < 1e-12:
        return "metre"
    if abs(metres_per_unit - FOOT_M) < 1e-12:
        return "foot"
    if abs(metres_per_unit - US_SURVEY_FOOT_M) < 1e-12:
        return "US survey foot"
    return f"{metres_per_unit:g} m"


def as_path(p: str | Path) -> Path:
    return p if isinstance(p, Path) else Path(p)

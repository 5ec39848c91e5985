"""Synthetic line corridors with exact physics: demo data and test truth.

>>> from clearaudit.synth import generate_corridor, write_corridor
>>> corridor = generate_corridor(seed=1, terrain="steep", n_spans=3)   # doctest: +SKIP
>>> write_corridor(corridor, "out", "steep3")                          # doctest: +SKIP
>>> from clearaudit.synth import write_long_corridor      # 50 km as LAZ tiles, bounded memory
>>> write_long_corridor("out", "long", n_spans=143, density_per_m2=4.0)   # doctest: +SKIP
"""
from __future__ import annotations

from .corridor import (
    DEFAULT_CRS,
    UNITS_M,
    VEGETATION_LEVELS,
    SyntheticCorridor,
    generate_corridor,
)
from .long import LongCorridor, points_per_span, write_long_corridor
from .output import SAMPLE_ARGS, SAMPLE_NAME, regenerate_samples, toml_dumps, write_corridor
from .scene import LOW_VEGETATION_MAX_M, MEDIUM_VEGETATION_MAX_M, vegetation_class
from .terrain import TERRAIN_KINDS, Terrain
from .wires import CurveSet, WireSpan

__all__ = [
    "DEFAULT_CRS", "LOW_VEGETATION_MAX_M", "LongCorridor", "MEDIUM_VEGETATION_MAX_M", "SAMPLE_ARGS",
    "SAMPLE_NAME", "TERRAIN_KINDS", "UNITS_M", "VEGETATION_LEVELS", "CurveSet",
    "SyntheticCorridor", "Terrain", "WireSpan", "generate_corridor", "regenerate_samples",
    "points_per_span", "toml_dumps", "vegetation_class", "write_corridor", "write_long_corridor",
]

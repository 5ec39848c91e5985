"""The 3-D line model: structures, spans, tension sections and each wire's fitted catenary.

>>> from clearaudit.model import build_line_model, ModelOptions
>>> model = build_line_model(cloud, unit_weight_n_per_m={"phase": 15.9, "shield": 3.8})
>>> model.to_json()  # model.json

See ``docs/line-model.md`` for the algorithm and the JSON fields.
"""
from __future__ import annotations

from .line import (
    LineModel,
    ModelOptions,
    OtherWire,
    Span,
    SubConductorFit,
    TensionSection,
    WireFit,
    build_line_model,
    ruling_span,
    tension_checks,
)
from .structures import Structure, detect_columns, line_angles_deg, order_along_line
from .wires import SeparationOptions, separate_wires

__all__ = [
    "LineModel", "ModelOptions", "OtherWire", "SeparationOptions", "Span", "Structure",
    "SubConductorFit", "TensionSection", "WireFit", "build_line_model", "detect_columns",
    "line_angles_deg", "order_along_line", "ruling_span", "separate_wires", "tension_checks",
]

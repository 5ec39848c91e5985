"""Point classification: noise, ground (SMRF), height above ground, wires, structures,
buildings and vegetation (ASPRS class codes).

>>> from clearaudit.classify import classify, ClassifyOptions
>>> result = classify(cloud)                       # doctest: +SKIP
>>> result.classification, result.height_above_ground_m  # doctest: +SKIP
"""
from __future__ import annotations

from .core import ClassificationResult, classify
from .ground import GroundModel, smrf
from .options import ClassifyOptions
from .refine import refine_with_model

__all__ = ["classify", "ClassifyOptions", "ClassificationResult", "GroundModel", "smrf",
           "refine_with_model"]

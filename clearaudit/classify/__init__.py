"""Point classification: noise, ground (SMRF), height above ground, wires, structures,
buildings and vegetation (ASPRS class codes).

>>> from clearaudit.classify import classify, ClassifyOptions
>>> result = classify(cloud)                       # doctest: +SKIP
>>> result.classification, result.height_above_ground_m  # doctest: +SKIP
"""
from __future__ import annotations

from importlib import import_module

__all__ = ["classify", "ClassifyOptions", "ClassificationResult", "GroundModel", "smrf",
           "refine_with_model"]

#: Where each name lives: imported on first use (PEP 562), so the compiled kernels
#: (:mod:`clearaudit.classify.kernels`, used while the inputs are read) come without the
#: classifier and its scipy modules (≈ 0.15 s of imports).
_HOME = {"classify": "core", "ClassificationResult": "core", "GroundModel": "ground",
         "smrf": "ground", "ClassifyOptions": "options", "refine_with_model": "refine"}


def __getattr__(name: str):
    if name in _HOME:
        return getattr(import_module(f".{_HOME[name]}", __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")

"""Point-cloud input and output (LAS/LAZ via laspy + lazrs).

``exports`` (CSV, GeoJSON, GeoPackage) lives beside this package's LAS module and is imported
from ``clearaudit.io.exports`` directly.
"""
from __future__ import annotations

from .las import (
    corridor_mask,
    describe,
    file_sha256,
    read_cloud,
    resolve_inputs,
    write_classified,
    write_cloud,
)

__all__ = [
    "corridor_mask",
    "describe",
    "file_sha256",
    "read_cloud",
    "resolve_inputs",
    "write_classified",
    "write_cloud",
]

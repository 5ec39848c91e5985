"""Writing synthetic corridors to disk, and the bundled demo data.

:func:`write_corridor` writes the four files of a corridor (cloud, truth, line file, structures
table); :func:`regenerate_samples` rebuilds ``sample_clouds/`` deterministically; :func:`toml_dumps`
is a small TOML writer for the nested tables of a line file (``tomllib`` only reads).
"""
from __future__ import annotations

import csv
import json
import math
from pathlib import Path
from typing import Any

from .corridor import SyntheticCorridor, generate_corridor

#: Name of the bundled demo corridor (files ``<name>.laz`` ...).
SAMPLE_NAME = "tarnwick_velloran_230kv"

#: Arguments of the bundled demo corridor (an invented 230 kV line; see sample_clouds/README.md).
SAMPLE_ARGS: dict[str, Any] = {
    "seed": 20260704, "terrain": "rolling", "n_spans": 5, "span_length_m": (290.0, 390.0),
    "bend_deg": 14.0, "circuit": "single", "bundle": 1, "n_shield": 2,
    "structure_kind": "lattice", "vegetation": "mixed", "building": True, "road": True,
    "underbuild": True, "density_per_m2": 5.0, "noise_m": 0.03, "gap_fraction": 0.08,
    "unit": "m", "crs": "EPSG:32617", "classified": False, "conductor_temperature_c": 31.0,
    "line_name": "Tarnwick - Velloran Hollow 230 kV No. 2",
    "owner": "Quillon Valley Transmission Cooperative (invented)",
    "max_operating_temperature_c": 100.0, "heading_deg": 62.0,
    "building_span": 4, "building_position": 0.55, "building_offset_m": -2.0,
    "building_clearance_m": 4.5,
}


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if not math.isfinite(v):
            raise ValueError("TOML cannot hold non-finite numbers here")
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    raise ValueError(f"cannot write a {type(v).__name__} value to TOML")


def toml_dumps(data: dict[str, Any]) -> str:
    """Nested dict of scalars, lists and tables → TOML text.

    Parameters
    ----------
    data
        Keys are strings; values are bool, int, float, str, lists of those, or dicts (tables).

    Returns
    -------
    str
        TOML text that ``tomllib.loads`` reads back to ``data`` (tuples become lists).
    """
    lines: list[str] = []

    def key(k: str) -> str:
        return k if k.replace("_", "").replace("-", "").isalnum() and k.isascii() else json.dumps(k)

    def table(prefix: list[str], d: dict[str, Any]) -> None:
        scalars = {k: v for k, v in d.items() if not isinstance(v, dict) and v is not None}
        tables = {k: v for k, v in d.items() if isinstance(v, dict)}
        if prefix and (scalars or not tables):
            lines.append(f"[{'.'.join(key(p) for p in prefix)}]")
        for k, v in scalars.items():
            lines.append(f"{key(k)} = {_toml_value(v)}")
        if prefix and (scalars or not tables):
            lines.append("")
        for k, v in tables.items():
            table(prefix + [k], v)

    table([], data)
    return "\n".join(lines).rstrip() + "\n"


def write_corridor(corridor: SyntheticCorridor, out_dir: str | Path, name: str, *,
                   truth_dims: bool = False) -> dict[str, Path]:
    """Write a corridor as ``<name>.laz``, ``.truth.json``, ``.line.toml``, ``.structures.csv``.

    Parameters
    ----------
    corridor
        From :func:`~clearaudit.synth.generate_corridor`.
    out_dir
        Folder (created if missing).
    name
        Base file name.
    truth_dims
        Also store the truth as extra dimensions in the LAZ (``truth_class``, ``truth_wire``,
        ``truth_tree``); off for delivery-like files.

    Returns
    -------
    dict
        ``{"cloud", "truth", "line", "structures"}`` → written paths.
    """
    from ..io.las import write_cloud

    if not name or any(c in name for c in "/\\"):
        raise ValueError("name must be a plain file name without folders")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths = {"cloud": out / f"{name}.laz", "truth": out / f"{name}.truth.json",
             "line": out / f"{name}.line.toml", "structures": out / f"{name}.structures.csv"}
    extra = None
    if truth_dims:
        extra = {"truth_class": (corridor.truth_classification, "truth ASPRS class"),
                 "truth_wire": (corridor.truth_labels["wire"], "truth wire index or -1"),
                 "truth_tree": (corridor.truth_labels["tree"], "truth tree index or -1")}
    write_cloud(corridor.cloud, paths["cloud"], extra_dims=extra)
    truth = dict(corridor.truth)
    truth["files"] = {k: p.name for k, p in paths.items()}
    paths["truth"].write_text(json.dumps(truth, indent=1, ensure_ascii=False) + "\n",
                              encoding="utf-8")
    config = json.loads(json.dumps(corridor.line_config))
    config.setdefault("structures", {})["file"] = paths["structures"].name
    paths["line"].write_text(toml_dumps(config), encoding="utf-8")
    write_structures_csv(paths["structures"], corridor.structures)
    return paths


def write_structures_csv(path: Path, rows: list[dict[str, Any]]) -> None:
    """The structures file: ``id, x, y, type`` (CRS units, 3 decimals)."""
    with Path(path).open("w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(["id", "x", "y", "type"])
        for row in rows:
            writer.writerow([row["id"], f"{row['x']:.3f}", f"{row['y']:.3f}", row["type"]])


def regenerate_samples(out_dir: str | Path) -> dict[str, Path]:
    """Rebuild the bundled demo corridor (deterministic).

    Parameters
    ----------
    out_dir
        Folder to write to (``sample_clouds/`` in the repository).

    Returns
    -------
    dict
        Written paths, as from :func:`write_corridor`.
    """
    corridor = generate_corridor(**SAMPLE_ARGS, name=SAMPLE_NAME)
    return write_corridor(corridor, out_dir, SAMPLE_NAME)

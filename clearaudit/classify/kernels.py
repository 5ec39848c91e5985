"""The compiled kernels (Cython: ``_grid.pyx``, ``_neighbours.pyx``), imported in one place.

They are built by the package's install (``bash scripts/setup.sh``, or ``pip install -e .``).
A source tree whose kernels were not built, or were built for another Python, fails here with
a message saying how to build them, not deep inside a classification.
"""
from __future__ import annotations

try:
    from ._grid import (
        bilinear,
        bilinear_residual,
        byte_counts,
        cell_extreme,
        cell_offsets,
        cell_sums3,
        chunk_points,
        corridor_exact,
        eigen_rows,
        flat_cells,
        free_boxes,
        gather_columns,
        hypot_within,
        isolated_in_block,
        jacobi_sweep,
        locate_cells,
        median_f32,
        occupied_ranks,
        plane_residual_sums,
        plane_solve,
        plane_sums,
        raster_state,
        record_int_bounds,
        records_in_box,
        route_records,
        sampler_weights,
        sym3_pairs,
        sym3_prepare,
        unpack_records,
        unpack_records_at,
        window_sums,
    )
    from ._neighbours import moments
except ImportError as exc:  # pragma: no cover - a source tree without its build
    raise ImportError(
        f"clearaudit's compiled kernels are missing or were built for another Python ({exc}); "
        "build them with `bash scripts/setup.sh` or `pip install -e .`") from exc

__all__ = ["bilinear", "bilinear_residual", "byte_counts", "cell_extreme", "cell_offsets", "cell_sums3", "chunk_points", "corridor_exact", "eigen_rows", "flat_cells", "free_boxes", "gather_columns", "hypot_within", "isolated_in_block", "jacobi_sweep", "locate_cells", "median_f32", "moments", "occupied_ranks",
           "plane_residual_sums", "plane_solve", "plane_sums", "raster_state", "record_int_bounds",
           "records_in_box",
           "route_records", "sampler_weights", "sym3_pairs", "sym3_prepare", "unpack_records", "unpack_records_at",
           "window_sums"]

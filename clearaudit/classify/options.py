"""Options of the classification stage: every option has a default and a one-line description.

The options of a run are written into the run record (``ClassificationResult.options``), so
every classified cloud can be traced to the settings that produced it.
"""
from __future__ import annotations

from dataclasses import asdict, dataclass, field, fields


def _opt(default, description: str):
    return field(default=default, metadata={"description": description})


@dataclass(frozen=True)
class ClassifyOptions:
    """Settings of :func:`clearaudit.classify.classify`.

    Lengths are metres, heights are metres above the ground model (HAG), slopes are
    rise over run (0.40 = 40 % grade). :meth:`describe` returns one line per option.
    """

    # --- use of the file's own classes
    trust_classes: bool = _opt(
        False, "Keep the file's classes and only fill in groups missing from it (HAG always).")

    # --- noise
    noise_voxel_m: float = _opt(
        3.0, "Voxel edge of the isolation test; neighbours are counted in the 3x3x3 voxel block. [m]")
    noise_min_neighbours: int = _opt(
        1, "A point with fewer other points than this in its voxel block is isolated.")
    noise_low_depth_m: float = _opt(
        1.0, "Points this far below the ground model (and not ground) are low noise (7). [m]")
    noise_high_min_hag_m: float = _opt(
        1.5, "Isolated points higher than this above ground are high noise (18). [m]")
    noise_max_hag_m: float = _opt(
        150.0, "Every point higher than this above ground is high noise (18). [m]")

    # --- ground (SMRF, Pingel et al. 2013)
    smrf_cell_m: float = _opt(1.0, "SMRF minimum-surface cell size. [m]")
    smrf_window_m: float = _opt(
        18.0, "Largest radius of the progressive morphological opening (larger buildings survive). [m]")
    smrf_slope: float | None = _opt(
        None, "SMRF slope threshold (rise/run); None = estimated from the terrain (see docs).")
    smrf_slope_min: float = _opt(0.15, "Lower bound of the estimated slope threshold (rise/run).")
    smrf_slope_max: float = _opt(0.8, "Upper bound of the estimated slope threshold (rise/run).")
    smrf_elevation_threshold_m: float = _opt(
        0.5, "Largest distance of a ground point from the provisional surface on flat ground. [m]")
    smrf_elevation_scaler: float = _opt(
        1.25, "Extra elevation threshold per unit of local surface slope. [m per (m/m)]")
    ground_refine: bool = _opt(
        True, "Tighten the SMRF ground from above to drop a low grass/crop layer (see docs).")
    ground_refine_sigma_factor: float = _opt(
        3.0, "Refinement keeps points up to this many noise standard deviations above ground.")
    ground_refine_min_m: float = _opt(0.08, "Least refinement threshold above the ground model. [m]")
    ground_cell_m: float = _opt(1.0, "Cell size of the ground model grid used for HAG. [m]")
    inpaint_max_cells: int = _opt(
        60, "Empty cells farther than this many cells from data take the nearest value.")

    # --- neighbourhood features (only points above object_min_hag_m)
    object_min_hag_m: float = _opt(
        0.5, "Only points higher than this above ground get neighbourhood (object) work. [m]")
    feature_radius_m: float = _opt(1.25, "Radius of the eigen-feature neighbourhood. [m]")
    feature_sparse_radius_m: float = _opt(
        3.0, "Radius used again for points with fewer than 3 neighbours in feature_radius_m. [m]")
    feature_max_neighbours: int = _opt(20, "Most neighbours used for the eigen features (k).")

    # --- wires
    wire_min_hag_m: float = _opt(3.0, "Wire points are at least this high above ground. [m]")
    wire_min_linearity: float = _opt(0.8, "Least linearity (l1-l2)/l1 of a wire seed point.")
    wire_max_direction_dip: float = _opt(
        0.6, "Largest |z component| of the principal direction of a wire seed point.")
    wire_link_m: float = _opt(1.5, "Voxel edge used to chain wire seed points into segments. [m]")
    wire_sparse_link_m: float = _opt(
        3.5, "Second, wider chaining for sparse wires (earth wires), on seeds left over. [m]")
    wire_min_length_m: float = _opt(8.0, "Shortest wire segment kept. [m]")
    wire_max_width_m: float = _opt(0.8, "Largest across-track standard deviation of a segment. [m]")
    wire_max_rms_m: float = _opt(0.35, "Largest vertical RMS of a segment about its fitted curve. [m]")
    wire_gap_m: float = _opt(15.0, "How far a wire segment is followed past its ends. [m]")
    wire_tolerance_xy_m: float = _opt(0.6, "Horizontal tolerance of points on a followed wire. [m]")
    wire_tolerance_z_m: float = _opt(0.5, "Vertical tolerance of points on a followed wire. [m]")
    detect_shield_wires: bool = _opt(
        True, "Label the topmost wires above at least one lower wire level as shield wires (13).")
    shield_min_gap_m: float = _opt(2.0, "Least height of a shield wire above the next wire level. [m]")

    # --- columns, structures
    column_cell_m: float = _opt(2.0, "Cell size of the 2D column grid for structures. [m]")
    column_min_fill: float = _opt(
        0.5, "Least share of occupied 1 m height slices for a filled (tall) column.")
    structure_min_height_m: float = _opt(12.0, "Least top height of a transmission structure. [m]")
    structure_max_footprint_m2: float = _opt(600.0, "Largest footprint of one structure. [m2]")
    structure_min_slenderness: float = _opt(
        1.6, "Least ratio of structure height to footprint width (sqrt of the area).")
    structure_max_scattering: float = _opt(
        0.08, "Largest median scattering l3/l1 of a structure's points (tree crowns scatter more).")
    structure_wire_over_m: float = _opt(
        0.2, "A column whose wires all pass this far above its top is not a structure (a tree). [m]")
    structure_wire_search_m: float = _opt(
        4.0, "A structure must have wire points within this horizontal distance (if wires exist). [m]")

    # --- buildings
    building_min_hag_m: float = _opt(2.0, "Least height of building points. [m]")
    building_min_planarity: float = _opt(0.6, "Least planarity (l2-l3)/l1 of a roof point.")
    building_min_area_m2: float = _opt(20.0, "Smallest building footprint. [m2]")
    building_cell_m: float = _opt(1.0, "Cell size of the roof grid. [m]")
    building_max_roof_spread_m: float = _opt(
        0.5, "Largest standard deviation of z about the local plane in a roof cell. [m]")

    # --- vegetation bands (HAG)
    low_vegetation_max_m: float = _opt(0.5, "Vegetation below this height is low vegetation (3). [m]")
    medium_vegetation_max_m: float = _opt(
        2.0, "Vegetation below this height (and above the low band) is medium vegetation (4). [m]")

    def __post_init__(self) -> None:
        positive = [f.name for f in fields(self)
                    if f.name.endswith(("_m", "_m2")) and f.name not in ("noise_low_depth_m",)]
        for name in positive:
            value = getattr(self, name)
            if not value > 0:
                raise ValueError(f"option {name} must be a positive number, got {value!r}")
        if self.noise_low_depth_m <= 0:
            raise ValueError("option noise_low_depth_m must be a positive depth in metres")
        if self.smrf_slope is not None and not self.smrf_slope > 0:
            raise ValueError("option smrf_slope must be positive (rise over run) or None")
        if self.smrf_slope_min > self.smrf_slope_max:
            raise ValueError("option smrf_slope_min must not exceed smrf_slope_max")
        for name in ("wire_min_linearity", "building_min_planarity", "column_min_fill",
                     "wire_max_direction_dip"):
            value = getattr(self, name)
            if not 0 <= value <= 1:
                raise ValueError(f"option {name} must lie between 0 and 1, got {value!r}")
        if self.low_vegetation_max_m > self.medium_vegetation_max_m:
            raise ValueError("low_vegetation_max_m must not exceed medium_vegetation_max_m")
        if self.feature_max_neighbours < 3 or self.noise_min_neighbours < 1:
            raise ValueError("feature_max_neighbours must be >= 3 and noise_min_neighbours >= 1")
        if self.inpaint_max_cells < 1:
            raise ValueError("inpaint_max_cells must be at least 1")

    @classmethod
    def describe(cls) -> dict[str, tuple[object, str]]:
        """Every option with its default and its one-line description."""
        return {f.name: (f.default, f.metadata["description"]) for f in fields(cls)}

    def to_dict(self) -> dict[str, object]:
        """The option values (for the run record)."""
        return asdict(self)

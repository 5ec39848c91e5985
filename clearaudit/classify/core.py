"""The classification stage: noise → ground (SMRF) → HAG → above-ground objects."""
from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from ..arrays import class_mask, code_counts, take_rows
from ..cloud import (
    BUILDING,
    GROUND,
    HIGH_NOISE,
    LOW_NOISE,
    TRANSMISSION_TOWER,
    UNCLASSIFIED,
    UNCLASSIFIED_NEVER,
    WATER,
    WIRE_CONNECTOR,
    Cloud,
)
from ..errors import InputError
from .features import eigen_features
from .grid import GridFrame, PointLocation, cell_max, cell_min
from .ground import GroundModel, build_ground_model, refine_ground, smrf
from .kernels import cell_extreme
from .noise import isolated_points, pit_cells
from .objects import (
    GroundRoofs,
    anchored_frame,
    classify_objects,
    find_ground_roofs,
    vegetation_class,
)
from .options import ClassifyOptions

Progress = Callable[[str, float], None]

#: Class groups used by ``trust_classes``: a group present in the file is kept as it is.
CLASS_GROUPS: dict[str, tuple[int, ...]] = {
    "ground": (GROUND,),
    "noise": (LOW_NOISE, HIGH_NOISE),
    "vegetation": (3, 4, 5),
    "building": (6,),
    "wire": (13, 14),
    "structure": (TRANSMISSION_TOWER, WIRE_CONNECTOR),
}


@dataclass
class ClassificationResult:
    """Result of :func:`classify`.

    Attributes
    ----------
    classification
        ASPRS class code per point of the input cloud, same order, uint8.
    height_above_ground_m
        Height above the ground model per point. [m], float32
    ground
        The ground model (``height_at(xy)`` in local metres).
    counts
        Number of points per class code.
    timings_s
        Wall time per step. [s]
    options
        The option values of the run.
    info
        Derived values of the run (SMRF slope threshold used, ground source, segments found).
    """

    classification: np.ndarray
    height_above_ground_m: np.ndarray
    ground: GroundModel
    counts: dict[int, int]
    timings_s: dict[str, float]
    options: dict
    info: dict = field(default_factory=dict)


def _walls_under_roofs(xyz: np.ndarray, hag: np.ndarray, classes: np.ndarray,
                       opts: ClassifyOptions) -> None:
    """Vegetation-labelled points under a building's roof become building 6 (in place).

    The building footprint is every roof-grid cell (anchored, ``building_cell_m``) holding a
    class-6 point, dilated by one cell; a point of class 1/3/4/5 in it that is at least
    ``object_min_hag_m`` above ground and not above the highest building point of the
    surrounding 3 x 3 cells (+ 0.3 m) is a wall, eave or wall base.
    """
    b = np.flatnonzero(classes == BUILDING)
    grid = anchored_frame(xyz[b, :2], opts.building_cell_m, margin_cells=2)
    lo = grid.corner
    hi = lo + np.array(grid.shape) * grid.cell
    # one table lookup, not four comparisons
    cand = np.flatnonzero(class_mask(classes, (UNCLASSIFIED, 3, 4, 5))
                          & (hag >= opts.object_min_hag_m))
    # then inside the roof grid (the test on the candidates only: the same points)
    xy = xyz[cand, :2]
    cand = cand[(xy[:, 0] >= lo[0]) & (xy[:, 0] < hi[0]) & (xy[:, 1] >= lo[1]) & (xy[:, 1] < hi[1])]
    del xy
    if len(cand) == 0:
        return
    top = cell_max(grid.flat_index(xyz[b, :2]), xyz[b, 2], grid.size).reshape(grid.shape)
    top = ndimage.maximum_filter(np.nan_to_num(top, nan=-np.inf), size=3).ravel()
    cell = grid.flat_index(xyz[cand, :2])
    wall = xyz[cand, 2] <= top[cell] + 0.3
    classes[cand[wall]] = BUILDING


def _source_name(cloud: Cloud) -> str | None:
    return cloud.sources[0].path if cloud.sources else None


def ground_filter(xyz: np.ndarray, frame: GridFrame, location: PointLocation, use: np.ndarray,
                  minimum_surface: np.ndarray | None, opts: ClassifyOptions
                  ) -> tuple[np.ndarray, float, float | None]:
    """SMRF and the refinement from above: the ground mask of :func:`classify` step 2.

    Parameters
    ----------
    xyz
        Points. [m], shape (n, 3)
    frame, location
        The 1 m grid and the points' cell coordinates in it (the sampler of ``location`` is
        released after SMRF, for memory).
    use
        Points the ground filter may use (isolated points and pits left out).
    minimum_surface
        Lowest used point per cell when already known, else None. [m]
    opts
        The classification options.

    Returns
    -------
    is_ground, smrf_slope, refine_threshold_m
        The mask, SMRF's slope threshold and the refinement's threshold (None when off). [m]
    """
    result = smrf(xyz, frame, slope=opts.smrf_slope, window_m=opts.smrf_window_m,
                  elevation_threshold_m=opts.smrf_elevation_threshold_m,
                  elevation_scaler=opts.smrf_elevation_scaler,
                  slope_min=opts.smrf_slope_min, slope_max=opts.smrf_slope_max,
                  use=use, max_cells=opts.inpaint_max_cells, location=location,
                  minimum_surface=minimum_surface)
    is_ground, slope_threshold = result.is_ground, result.slope_threshold
    del result
    # the weights of every point are not kept through the ground steps (memory); the
    # refinement samples the ground points only, HAG builds them again
    location.release_sampler()
    refine_threshold = None
    if opts.ground_refine:
        is_ground, refine_threshold = refine_ground(
            xyz, is_ground, frame.with_cell(opts.ground_cell_m),
            sigma_factor=opts.ground_refine_sigma_factor,
            min_threshold_m=opts.ground_refine_min_m,
            max_threshold_m=opts.smrf_elevation_threshold_m,
            max_cells=opts.inpaint_max_cells,
            location=location if opts.ground_cell_m == opts.smrf_cell_m else None)
    return is_ground, float(slope_threshold), refine_threshold


def classify(cloud: Cloud, options: ClassifyOptions | None = None, *,
             progress: Progress | None = None) -> ClassificationResult:
    """Classify every point of a cloud into ASPRS classes and compute its height above ground.

    Parameters
    ----------
    cloud
        The point cloud (local metric coordinates).
    options
        Settings; defaults when ``None`` (see :meth:`ClassifyOptions.describe`).
    progress
        Optional callback ``progress(step_name, fraction_done)`` with fraction in [0, 1].

    Returns
    -------
    ClassificationResult

    Notes
    -----
    Steps: (1) isolated points and single-cell pits of the minimum surface are kept out of the
    ground filter; (2) SMRF ground filter (Pingel et al., 2013) and a ground grid; (3) height
    above ground (HAG) for every point; (4) noise labels: isolated points high above ground →
    18, non-ground points more than ``noise_low_depth_m`` below ground → 7; (5) points above
    ``object_min_hag_m`` get eigen features and are split into wires, structures, buildings and
    vegetation (see :mod:`clearaudit.classify.objects`); (6) lower non-ground points are low
    vegetation. With ``trust_classes`` the file's classes are kept and only groups missing
    from the file are filled in (HAG is always computed).

    References
    ----------
    Pingel, T. J., Clarke, K. C., McBride, W. A. (2013). An improved simple morphological
    filter for the terrain classification of airborne LIDAR data. ISPRS J. Photogramm. Remote
    Sens. 77, 21-30.
    """
    opts = ClassifyOptions() if options is None else options
    if not isinstance(opts, ClassifyOptions):
        raise ValueError("options must be a ClassifyOptions instance or None")
    if not isinstance(cloud, Cloud):
        raise ValueError("classify expects a clearaudit Cloud")
    if cloud.n_points == 0:
        raise InputError(_source_name(cloud), "the point cloud has no points to classify")
    xyz = cloud.xyz
    if not np.isfinite(xyz).all():
        raise InputError(_source_name(cloud), "the point cloud has non-finite coordinates")
    timings: dict[str, float] = {}
    info: dict[str, object] = {}

    def step(name: str, fraction: float, started: float) -> float:
        now = time.perf_counter()
        timings[name] = round(now - started, 4)
        if progress is not None:
            progress(name, fraction)
        return now

    t = time.perf_counter()
    vendor = np.asarray(cloud.classification, dtype=np.uint8)
    # points per class code of the file, one pass (not one membership test per group)
    in_file = code_counts(vendor) > 0
    present = {name: bool(in_file[list(codes)].any()) for name, codes in CLASS_GROUPS.items()}
    # cell coordinates of every point, computed once (float32) and shared by all 1 m grids
    frame, location = GridFrame.fit_locate(xyz[:, :2], opts.smrf_cell_m, margin=opts.smrf_cell_m)
    z = np.ascontiguousarray(xyz[:, 2])

    # 1. noise candidates kept out of the ground filter
    isolated = isolated_points(xyz, opts.noise_voxel_m, opts.noise_min_neighbours)
    use = ~isolated
    flat = location.flat
    # minimum surface of the ``use`` points; excluded points count as +inf: cells with only
    # excluded points stay empty (NaN)
    zmin = cell_min(flat, np.where(use, z, np.inf), frame.size).reshape(frame.shape)
    for _ in range(2):
        pits, lowest = pit_cells(zmin, opts.noise_low_depth_m)
        if not pits.any():
            break
        pit_points = np.flatnonzero(pits.ravel()[flat])
        in_pit = z[pit_points] < lowest.ravel()[flat[pit_points]] - opts.noise_low_depth_m
        use[pit_points[in_pit]] = False
        # only the pit cells' minima can change (no other point changed): they are taken
        # again from their own points, the same values as a pass over every point
        pit_cells_flat = np.flatnonzero(pits.ravel())
        surface = zmin.reshape(-1)
        surface[pit_cells_flat] = np.inf
        still = pit_points[use[pit_points]]
        cell_extreme(flat[still], np.asarray(z[still], dtype=np.float64), surface, False)
        gone = pit_cells_flat[np.isinf(surface[pit_cells_flat])]
        surface[gone] = np.nan
        del pit_points, in_pit, still, pit_cells_flat, gone
    del flat, pits, lowest
    t = step("noise_candidates", 0.1, t)

    # 2. ground
    if opts.trust_classes and present["ground"]:
        is_ground = vendor == GROUND
        model_points = np.isin(vendor, (GROUND, WATER))
        info["ground_source"] = "file classes 2 and 9"
        info["smrf_slope"] = None
    else:
        is_ground, slope_threshold, refine_threshold = ground_filter(xyz, frame, location,
                                                                     use, zmin, opts)
        info["ground_source"] = "SMRF"
        info["smrf_slope"] = slope_threshold
        if refine_threshold is not None:
            info["ground_refine_threshold_m"] = refine_threshold
        model_points = is_ground
    del use, zmin
    # roofs the ground filter kept as ground (low roofs on steep terrain): out of the ground
    # set before the ground model is built, so the model passes under them and HAG is right
    roofs: GroundRoofs | None = None
    if not (opts.trust_classes and present["ground"]) and is_ground.any():
        ground_idx = np.flatnonzero(is_ground)
        roofs = find_ground_roofs(xyz, ground_idx, cell_m=opts.building_cell_m,
                                  min_height_m=opts.building_min_hag_m,
                                  min_area_m2=opts.building_min_area_m2)
        roof_idx = ground_idx[roofs.is_roof]
        info["ground_roof_patches"] = roofs.patches
        info["ground_roof_cell_m"] = float(roofs.grid.cell)
        info["ground_roof_points"] = int(len(roof_idx))
        if len(roof_idx):
            model_roof_mask = np.zeros(cloud.n_points, bool)
            model_roof_mask[roof_idx] = True
            is_ground = is_ground.copy()
            is_ground[roof_idx] = False
            model_points = is_ground
        else:
            roofs = None
        del ground_idx
    if not model_points.any():
        raise InputError(_source_name(cloud), "no ground points were found; cannot build a ground model")
    t = step("ground", 0.35, t)

    ground_frame = frame.with_cell(opts.ground_cell_m)
    ground_location = location if opts.ground_cell_m == opts.smrf_cell_m else \
        ground_frame.locate(xyz[:, :2])
    del location
    model_idx = np.flatnonzero(model_points)
    ground = build_ground_model(take_rows(xyz, model_idx), ground_frame, opts.inpaint_max_cells,
                                location=ground_location.subset(model_idx))
    del model_idx
    # HAG: one vectorised bilinear pass of the float32 ground grid over all points
    hag = ground_location.sampler()(ground.elevation_m.astype(np.float32))
    del ground_location
    np.subtract(z, hag, out=hag, casting="same_kind")
    hag = np.nan_to_num(hag, copy=False, nan=0.0)
    t = step("height_above_ground", 0.45, t)

    # 3. noise labels
    low_noise = ~is_ground & (hag < -opts.noise_low_depth_m)
    if roofs is not None:
        # a roof below the ground surface interpolated across it is a building set into
        # the slope (its uphill side meets the hillside), not a pit of noise
        low_noise &= ~model_roof_mask
    high_noise = ~low_noise & ((isolated & (hag > opts.noise_high_min_hag_m))
                               | (hag > opts.noise_max_hag_m))
    classes = np.full(cloud.n_points, UNCLASSIFIED, dtype=np.uint8)
    classes[is_ground] = GROUND
    rest = ~is_ground & ~low_noise & ~high_noise
    low = rest & (hag < opts.object_min_hag_m)
    classes[low] = vegetation_class(hag[low], opts)
    classes[low_noise] = LOW_NOISE
    classes[high_noise] = HIGH_NOISE

    # 4. above-ground objects
    above = np.flatnonzero(rest & (hag >= opts.object_min_hag_m))
    info["object_points"] = int(len(above))
    if len(above):
        xyz_above = take_rows(xyz, above)
        feats = eigen_features(xyz_above, opts.feature_radius_m, opts.feature_max_neighbours,
                               sparse_radius=opts.feature_sparse_radius_m)
        t = step("features", 0.75, t)
        object_classes, object_info = classify_objects(xyz_above, np.take(hag, above), feats,
                                                       frame, opts)
        del xyz_above
        classes[above] = object_classes
        info.update(object_info)
        # low parts of structures (footings, leg bases) below the object height threshold
        tower = above[(object_classes == TRANSMISSION_TOWER) & (hag[above] < 2.0)]
        if len(tower) and low.any():
            cells = frame.with_cell(opts.column_cell_m)
            has_tower = np.zeros(cells.size, bool)
            has_tower[cells.flat_index(xyz[tower, :2])] = True
            low_idx = np.flatnonzero(low)
            classes[low_idx[has_tower[cells.flat_index(xyz[low_idx, :2])]]] = TRANSMISSION_TOWER
    if roofs is not None:
        # roofs taken out of the ground set are building unless wire, structure or noise
        roof_pts = np.flatnonzero(~is_ground & model_roof_mask)
        keep = ~np.isin(classes[roof_pts], (LOW_NOISE, HIGH_NOISE, TRANSMISSION_TOWER,
                                            WIRE_CONNECTOR, 13, 14))
        classes[roof_pts[keep]] = BUILDING
    if (classes == BUILDING).any():
        _walls_under_roofs(xyz, hag, classes, opts)
    t = step("objects", 0.95, t)

    # 5. trusted file classes: keep them, fill in only the missing groups
    if opts.trust_classes:
        open_points = np.isin(vendor, (UNCLASSIFIED_NEVER, UNCLASSIFIED))
        allowed = np.zeros(256, bool)
        for name, codes in CLASS_GROUPS.items():
            if not present[name]:
                allowed[list(codes)] = True
        take = open_points & allowed[classes]
        final = vendor.copy()
        final[take] = classes[take]
        classes = final
    step("merge", 1.0, t)

    per_code = code_counts(classes)  # uint8 codes: a count, not a sort
    codes = np.flatnonzero(per_code)
    counts = per_code[codes]
    return ClassificationResult(
        classification=classes,
        height_above_ground_m=hag.astype(np.float32, copy=False),
        ground=ground,
        counts={int(c): int(k) for c, k in zip(codes, counts, strict=True)},
        timings_s=timings,
        options=opts.to_dict(),
        info=info,
    )

"""Ground filtering (SMRF) and the ground model used for height above ground (HAG).

SMRF, the simple morphological filter of Pingel, Clarke & McBride (2013):

1. minimum surface: the lowest point per cell; empty cells inpainted;
2. progressive morphological opening with windows of radius 1, 2, … cells up to the
   largest window; a cell whose surface drops by more than ``slope · radius · cell`` in one
   step is an object cell;
3. provisional surface: the minimum surface without object cells, inpainted;
4. a point is ground when it lies within ``elevation_threshold + scaler · local slope`` of the
   provisional surface (bilinear).

Deviations from the paper (documented in docs/classification.md): square windows (separable
min/max filters, fast at any size) instead of disks; the slope threshold may be estimated from
the terrain (upper percentile of the slope of the fully opened surface, with bounds), which
keeps ridges and convex breaks of 15–40 % grades as ground; low outliers are removed before the
filter by the noise step (isolation and single-cell pits).
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import partial

import numpy as np

from ..threads import inner_threads, run_chunks
from .grid import (
    GridFrame,
    InpaintPlan,
    PointLocation,
    _square_filter,
    cell_min,
    inpaint,
    occupied_cells,
)
from .kernels import cell_sums3, median_f32, window_sums


@dataclass
class GroundModel:
    """Ground elevation grid with bilinear interpolation.

    Attributes
    ----------
    frame
        The grid geometry (rotated to the cloud's principal direction).
    elevation_m
        Ground elevation at the cell centres, local z. [m], shape ``frame.shape``
    filled
        True where a cell had no ground point and was inpainted.
    """

    frame: GridFrame
    elevation_m: np.ndarray
    filled: np.ndarray

    @property
    def cell_size_m(self) -> float:
        """Cell edge of the grid. [m]"""
        return self.frame.cell

    @property
    def grid(self) -> np.ndarray:
        """Ground elevation at the cell centres (alias of ``elevation_m``). [m]"""
        return self.elevation_m

    def height_at(self, xy: np.ndarray) -> np.ndarray:
        """Ground elevation at horizontal positions; NaN outside the grid.

        Parameters
        ----------
        xy
            Local horizontal coordinates. [m], shape (n, 2)

        Returns
        -------
        numpy.ndarray
            Ground elevation in local z. [m], shape (n,)
        """
        return self.frame.sample(self.elevation_m, xy)

    def cell_centres(self) -> np.ndarray:
        """Local xy of every cell centre. [m], shape (n_u, n_v, 2)"""
        n_u, n_v = self.frame.shape
        u = self.frame.corner[0] + (np.arange(n_u) + 0.5) * self.frame.cell
        v = self.frame.corner[1] + (np.arange(n_v) + 0.5) * self.frame.cell
        uu, vv = np.meshgrid(u, v, indexing="ij")
        uv = np.stack([uu, vv], axis=-1)
        return uv @ self.frame.axes + self.frame.centre


def build_ground_model(xyz_ground: np.ndarray, frame: GridFrame,
                       max_cells: int = 60, location: PointLocation | None = None) -> GroundModel:
    """Ground model grid from ground points: per-cell mean moved to the cell centre.

    Parameters
    ----------
    xyz_ground
        Ground points, local coordinates. [m], shape (n, 3)
    frame
        Grid geometry (its cell size is the model's resolution).
    max_cells
        Distance limit of the inpainting (see :func:`~clearaudit.classify.grid.inpaint`).
    location
        The points' cell coordinates in ``frame`` when already known (saves a pass).

    Notes
    -----
    The mean of the points of a cell lies at their mean position, not at the cell centre; on a
    slope that offset biases the cell value. The value at the centre is
    :math:`\\bar z - \\nabla Z \\cdot (\\bar{\\mathbf u} - \\mathbf u_c)` with the gradient
    taken from the grid itself (two passes); empty cells are inpainted.
    """
    if len(xyz_ground) == 0:
        raise ValueError("the ground model needs at least one ground point")
    loc = frame.locate(xyz_ground[:, :2]) if location is None else location
    flat = np.ascontiguousarray(loc.flat, dtype=np.int64)
    # the count and the sums of z, u and v per cell in one compiled pass (bincount's order)
    sums = np.empty((3, frame.size))
    count = np.empty(frame.size, np.int64)
    cell_sums3(flat, xyz_ground[:, 2], loc.fu, loc.fv, sums[0], sums[1], sums[2], count)
    with np.errstate(invalid="ignore", divide="ignore"):
        np.divide(sums, count, out=sums)  # the means (NaN where a cell is empty)
    mean_z, mean_u, mean_v = sums
    n_u, n_v = frame.shape
    du = (mean_u.reshape(frame.shape) - (np.arange(n_u) + 0.5)[:, None]) * frame.cell
    dv = (mean_v.reshape(frame.shape) - (np.arange(n_v) + 0.5)[None, :]) * frame.cell
    raw = mean_z.reshape(frame.shape)
    plan = InpaintPlan(np.isnan(raw), max_cells)  # the same empty cells in all three passes
    grid = inpaint(raw, max_cells, plan=plan)
    for _ in range(2):
        gu, gv = np.gradient(grid, frame.cell)
        grid = inpaint(raw - gu * du - gv * dv, max_cells, plan=plan)
    filled = (count == 0).reshape(frame.shape)
    return GroundModel(frame, grid, filled)


def morphological_slope_ratio(surface: np.ndarray, max_radius: int, cell: float
                              ) -> tuple[np.ndarray, np.ndarray]:
    """Progressive opening of a surface; largest drop per step relative to the window.

    Parameters
    ----------
    surface
        Gap-free minimum surface. [m]
    max_radius
        Largest window radius. [cells]
    cell
        Cell edge. [m]

    Returns
    -------
    ratio
        Per cell, :math:`\\max_r (S_{r-1} - S_r) / (r c)` (dimensionless slope): a cell is an
        object cell for every slope threshold below this value.
    opened
        The surface after the largest opening. [m]

    Notes
    -----
    :math:`S_0` is the minimum surface and :math:`S_r` the grey opening of :math:`S_{r-1}` with a
    square window of half width :math:`r` cells (Pingel et al., 2013, Eq. 1 with a square
    structuring element). Because the openings do not depend on the slope threshold, the
    per-cell ratio lets the threshold be chosen afterwards.

    Two identities of flat morphology make this cheap and leave every value unchanged
    (minimum and maximum only select values): the square :math:`B_r` of half width
    :math:`r` is open with respect to :math:`B_{r-1}`, so the openings form a granulometry,
    :math:`\\gamma_r\\gamma_{r-1} = \\gamma_r` and :math:`S_r = \\gamma_r(S_0)`; and
    :math:`B_r = B_{r-1} \\oplus B_1`, so the erosion :math:`E_r = \\varepsilon_r(S_0)` is
    :math:`\\varepsilon_1(E_{r-1})`, one 3 × 3 minimum per step. Then
    :math:`S_r = \\delta_r(E_r)`. The mirrored grid edges (scipy's ``reflect``) commute with
    these symmetric windows, so the identities hold on the finite grid too (Serra, 1982).

    References
    ----------
    Pingel, T. J., Clarke, K. C., McBride, W. A. (2013). An improved simple morphological
    filter for the terrain classification of airborne LIDAR data. ISPRS J. Photogramm.
    Remote Sens. 77, 21-30.
    Serra, J. (1982). Image Analysis and Mathematical Morphology. Academic Press (openings,
    granulometries, decomposition of structuring elements).
    """
    # float32: min and max are exact in any precision, and rounding the surface to float32
    # (< 0.1 mm below 1 km of local height) halves the memory traffic of the filters
    surface = np.asarray(surface, dtype=np.float32)
    n_u = surface.shape[0]
    threads = min(inner_threads(), max(1, n_u // 256))
    # row bands, filtered on separate threads: each band reads ``radius`` extra rows on each
    # side, which gives exactly the rows of a filter of the whole grid
    band_rows = -(-n_u // threads)
    previous = surface
    buffers = [np.empty_like(surface), np.empty_like(surface)]
    erosions = [np.empty_like(surface), np.empty_like(surface)]
    eroded = surface  # E_0
    ratio = np.zeros_like(surface)

    def erode(source: np.ndarray, eroded: np.ndarray, lo: int, hi: int) -> None:
        _square_filter(np.minimum, source, eroded, lo, hi, 1)  # E_r = ε_1(E_{r-1})

    def dilate(radius: int, eroded: np.ndarray, source: np.ndarray, opened: np.ndarray,
               lo: int, hi: int) -> None:
        _square_filter(np.maximum, eroded, opened, lo, hi, radius)  # S_r = δ_r(E_r)
        drop = source[lo:hi] - opened[lo:hi]
        drop *= np.float32(1.0 / (radius * cell))
        np.maximum(ratio[lo:hi], drop, out=ratio[lo:hi])

    for radius in range(1, max_radius + 1):
        opened = buffers[radius % 2]
        before, eroded = eroded, erosions[radius % 2]
        # every band is eroded before any is dilated (a dilation reads neighbouring bands)
        run_chunks(partial(erode, before, eroded), n_u, band_rows, threads)
        run_chunks(partial(dilate, radius, eroded, previous, opened), n_u, band_rows, threads)
        previous = opened
    return ratio, previous


def estimate_slope_threshold(opened: np.ndarray, occupied: np.ndarray, cell: float,
                             low: float, high: float) -> float:
    """Slope threshold from the terrain: 1.2 × the 90th percentile slope of the opened surface.

    The fully opened surface has lost every object smaller than the largest window, so its
    slope is the terrain's (it is flattened on narrow ridges, which only lowers the estimate).
    This estimate is our addition to SMRF, bounded to ``[low, high]`` (rise/run).
    """
    gu, gv = np.gradient(opened, cell)
    slope = np.hypot(gu, gv)[occupied]
    if slope.size == 0:
        return low
    return float(np.clip(1.2 * float(np.percentile(slope, 90)), low, high))


@dataclass
class SmrfResult:
    """Output of :func:`smrf`."""

    is_ground: np.ndarray   # bool per input point
    provisional: np.ndarray  # provisional surface grid. [m]
    slope_threshold: float   # the slope threshold used (rise/run)
    frame: GridFrame


def smrf(xyz: np.ndarray, frame: GridFrame, *, slope: float | None = None,
         window_m: float = 18.0, elevation_threshold_m: float = 0.5,
         elevation_scaler: float = 1.25, slope_min: float = 0.15, slope_max: float = 0.8,
         use: np.ndarray | None = None, max_cells: int = 60,
         location: PointLocation | None = None,
         minimum_surface: np.ndarray | None = None) -> SmrfResult:
    """Simple morphological filter (SMRF) ground classification.

    Parameters
    ----------
    xyz
        Points, local coordinates. [m], shape (n, 3)
    frame
        Grid geometry; its cell is the SMRF cell size. [m]
    slope
        Slope threshold (rise/run); ``None`` estimates it from the terrain.
    window_m
        Largest window radius. [m]
    elevation_threshold_m
        Elevation threshold on flat ground. [m]
    elevation_scaler
        Elevation threshold added per unit of provisional-surface slope. [m]
    slope_min, slope_max
        Bounds of the estimated slope threshold (rise/run).
    use
        Boolean mask of points allowed into the minimum surface (e.g. without noise).
    max_cells
        Distance limit of the inpainting. [cells]
    location
        Cell coordinates of all points in ``frame`` when already known (saves a pass).
    minimum_surface
        The lowest ``use`` point per cell (NaN where a cell has none), shape ``frame.shape``,
        when already computed (saves a pass). [m]

    Returns
    -------
    SmrfResult
        ``is_ground`` for every input point (points outside ``use`` are never ground).

    Notes
    -----
    A point is ground when :math:`|z - Z_{prov}(x, y)| \\le t_e + s_e\\,\\lVert\\nabla
    Z_{prov}\\rVert` with :math:`t_e` the elevation threshold and :math:`s_e` the scaler.

    References
    ----------
    Pingel, T. J., Clarke, K. C., McBride, W. A. (2013). An improved simple morphological
    filter for the terrain classification of airborne LIDAR data. ISPRS Journal of
    Photogrammetry and Remote Sensing 77, 21-30. doi:10.1016/j.isprsjprs.2012.12.002
    """
    if window_m <= 0 or elevation_threshold_m < 0 or elevation_scaler < 0:
        raise ValueError("SMRF window must be positive and thresholds non-negative")
    xyz = np.asarray(xyz, dtype=np.float64)
    use = np.ones(len(xyz), bool) if use is None else np.asarray(use, bool)
    cell = frame.cell
    loc = frame.locate(xyz[:, :2]) if location is None else location
    z = xyz[:, 2]
    if minimum_surface is None:
        # points outside ``use`` count as +inf: a cell with none of the others stays empty
        zmin = cell_min(loc.flat, np.where(use, z, np.inf), frame.size).reshape(frame.shape)
    else:
        zmin = np.asarray(minimum_surface, dtype=np.float64)
        if zmin.shape != frame.shape:
            raise ValueError("the minimum surface must have the shape of the SMRF grid")
    occupied = ~np.isnan(zmin)
    surface = inpaint(zmin, max_cells)
    max_radius = max(1, int(np.ceil(window_m / cell)))
    ratio, opened = morphological_slope_ratio(surface, max_radius, cell)
    if slope is None:
        slope = estimate_slope_threshold(opened, occupied, cell, slope_min, slope_max)
    is_object = ratio > slope
    provisional = np.where(is_object | ~occupied, np.nan, zmin)
    provisional = inpaint(provisional, max_cells)
    gu, gv = np.gradient(provisional, cell)
    # threshold grid t_e + s_e * slope and the surface, sampled once per point (float32:
    # sub-millimetre at survey elevations, half the memory traffic)
    threshold_grid = (elevation_threshold_m + elevation_scaler * np.hypot(gu, gv)).astype(np.float32)
    at = loc.sampler()
    z_prov = at(provisional.astype(np.float32))
    z_prov -= z
    np.abs(z_prov, out=z_prov)
    # the threshold grid is sampled only where it decides: between its smallest and largest
    # value (bilinear values stay within the grid's range)
    is_ground = use & (z_prov <= threshold_grid.min())
    undecided = np.flatnonzero(use & ~is_ground & (z_prov <= threshold_grid.max()))
    if len(undecided):
        is_ground[undecided] = z_prov[undecided] <= at.subset(undecided)(threshold_grid)
    return SmrfResult(is_ground, provisional, float(slope), frame)


def refine_ground(xyz: np.ndarray, is_ground: np.ndarray, frame: GridFrame, *,
                  sigma_factor: float = 3.0, min_threshold_m: float = 0.08,
                  max_threshold_m: float = 0.5, slope_scaler: float = 0.0,
                  iterations: int = 3, max_cells: int = 60,
                  location: PointLocation | None = None) -> tuple[np.ndarray, float]:
    """Tighten a ground classification from above: drop a low layer (grass, crops) over it.

    SMRF accepts everything within its elevation threshold (0.5 m) of a surface built from the
    lowest point per cell, which includes a low-vegetation layer. This step, our addition,
    seeks the lowest dense layer per cell: starting from the lowest point per cell, the model
    becomes the mean z of the points within a window :math:`\\pm w` of the current model
    (per cell, inpainted, bilinear), the noise is estimated as
    :math:`\\hat\\sigma = 1.4826\\,\\mathrm{MAD}` of the residuals in the window, and the
    window shrinks to :math:`w = 2.5\\hat\\sigma`; a point stays ground when
    :math:`r \\le k\\hat\\sigma + s\\,\\lVert\\nabla Z\\rVert` (bounded).

    Parameters
    ----------
    xyz
        Points. [m], shape (n, 3)
    is_ground
        Initial ground mask (e.g. from :func:`smrf`).
    frame
        Grid geometry of the model.
    sigma_factor
        Multiple ``k`` of the estimated noise standard deviation accepted above the model.
    min_threshold_m, max_threshold_m
        Bounds of the threshold above the model (and of the window). [m]
    slope_scaler
        Extra threshold per unit slope of the model. [m]
    iterations
        Number of passes.
    max_cells
        Inpainting distance limit. [cells]
    location
        Cell coordinates of all points in ``frame`` when already known (saves a pass).

    Returns
    -------
    is_ground, threshold_m
        The refined mask (a subset of the input) and the threshold used. [m]
    """
    ground = np.asarray(is_ground, bool).copy()
    idx = np.flatnonzero(ground)
    if len(idx) < 10:
        return ground, max_threshold_m
    loc = frame.locate(xyz[idx, :2]) if location is None else location.subset(idx)
    # float32: rounding < 0.1 mm below 1 km local height (the column rounded, then gathered:
    # the same values, 30 % faster than a gather of the float64 column then rounded)
    z = np.take(xyz[:, 2].astype(np.float32), idx)
    z64 = z.astype(np.float64)  # the same values as the float64 weights of the cell sums
    # the cells holding ground points and each point's position among them: the cell sums
    # below run over these cells only, not over the grid of the bounding box (for a long or
    # bent corridor several times as many cells, mostly empty); then scattered into the grid
    cells, k, _ = occupied_cells(loc.flat, frame.size)
    m = len(cells)

    def on_grid(per_cell: np.ndarray) -> np.ndarray:
        grid = np.full(frame.size, np.nan)
        grid[cells] = per_cell
        return grid.reshape(frame.shape)

    model = inpaint(on_grid(cell_min(k, z64, m)), max_cells)
    window = 0.5 * max_threshold_m
    sigma = window
    slope = np.zeros(1, np.float32)
    at = loc.sampler()
    del loc
    resid = at(model.astype(np.float32))
    np.subtract(z, resid, out=resid)
    plan: InpaintPlan | None = None
    for _ in range(iterations):
        # one compiled pass: the window test and the per-cell sums of the points inside (no
        # compaction of the points; each cell sums its points in point order)
        limit = np.ascontiguousarray(window + slope_scaler * slope, dtype=np.float32)
        inside = np.empty(len(resid), np.uint8)
        total = np.zeros(m)
        count = np.zeros(m, np.int64)
        window_sums(resid, limit, k, z64, inside, total, count)
        inside = inside.view(bool)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = on_grid(total / count)
        del total, count
        unknown = np.isnan(mean)
        if plan is None or not plan.matches(unknown, max_cells):
            plan = InpaintPlan(unknown, max_cells)
        model = inpaint(mean, max_cells, plan=plan)
        del mean, unknown
        if slope_scaler > 0:
            gu, gv = np.gradient(model, frame.cell)
            slope = at(np.hypot(gu, gv).astype(np.float32))
        # resid = z - model at the points, and resid[inside] (one compiled pass)
        resid, r = at.residual(model.astype(np.float32), z, inside)
        if len(r) > 2_000_000:  # the MAD of a regular one-in-k sample is as good
            r = r[:: len(r) // 1_000_000]
        r = np.ascontiguousarray(r, dtype=np.float32)
        # numpy.median's values, by a radix select instead of partitions of copies
        sigma = 1.4826 * median_f32(r, np.float32(median_f32(r)), True)
        window = float(np.clip(2.5 * sigma, min_threshold_m, max_threshold_m))
    threshold = float(np.clip(sigma_factor * sigma, min_threshold_m, max_threshold_m))
    keep = resid <= threshold + slope_scaler * slope
    ground[np.compress(~keep, idx)] = False
    return ground, threshold

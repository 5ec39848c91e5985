"""Separating the wire points of one span into individual wires and sub-conductors.

The points of one span are expressed in the span frame: station ``s`` along the chord from
structure A towards structure B, lateral offset ``t`` (positive to the right looking from A to
B) and height ``z``. Every wire of the line is then a smooth curve ``z(s)`` at a nearly
constant ``t``; after removing a rough per-span curve, each wire is a compact blob in the
(``t``, detrended height) plane and a bundle is a blob made of a few sub-blobs a few
decimetres apart.

Algorithm (common practice (no source); the clustering is a grid form of DBSCAN [1]_):

1. Per point, the horizontal direction of its neighbourhood (principal axis of the points in
   its 2 m voxel). Points whose direction leaves the span axis by more than the allowed angle
   belong to crossing wires; they are grouped on a voxel grid and returned as crossings.
2. The remaining points: a robust (Tukey-weighted) quadratic ``z(s)`` and ``t(s)`` over all of
   them removes the common sag and blowout shape; the (``t``, detrended ``z``) plane is
   gridded and its connected occupied cells are the coarse wire groups.
3. Per group: its own robust quadratics, then a finely smoothed 2-D histogram of the residuals;
   its peaks are the sub-conductors. Peaks further apart than a bundle are split into separate
   wires. Groups that are not thin curves (vegetation, structure remains) are dropped.

References
----------
.. [1] Ester, M., Kriegel, H.-P., Sander, J., Xu, X. (1996). A density-based algorithm for
   discovering clusters in large spatial databases with noise. KDD-96, 226–231.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from ..arrays import column_bounds, median_1d, unique_rows
from ._irls import irls_polyfit


@dataclass
class SeparationOptions:
    """Parameters of the wire separation (lengths in metres)."""

    cluster_cell_m: float = 0.4          # grid cell of the coarse (t, detrended z) clustering
    min_cluster_points: int = 8          # smaller coarse groups are noise
    max_wire_angle_deg: float = 15.0     # larger direction change from the span axis: crossing
    direction_voxel_m: float = 2.0       # voxel of the per-point direction estimate
    direction_min_points: int = 6        # voxels with fewer points give no direction
    fine_cell_m: float = 0.02            # grid cell of the sub-conductor histogram
    fine_smoothing_m: float = 0.04       # Gaussian smoothing of that histogram
    min_subconductor_spacing_m: float = 0.15
    max_bundle_spacing_m: float = 0.9    # peaks further apart are separate wires
    peak_fraction: float = 0.2           # peaks lower than this × the highest are ignored
    inlier_distance_m: float = 0.35      # point to sub-conductor centre, for clutter tests
    min_inlier_fraction: float = 0.6     # a wire group has at least this share of inliers
    min_extent_m: float = 8.0            # a wire group spans at least this along the span
    occupancy_bin_m: float = 2.0         # station bins of the continuity test
    min_occupancy: float = 0.25          # share of occupied bins over the station range


@dataclass(eq=False)
class WireCluster:
    """One wire (possibly a bundle) of one span, as found by :func:`separate_wires`.

    Attributes
    ----------
    index
        Indices of the wire's points into the arrays given to :func:`separate_wires`.
    sub_label
        Sub-conductor of each point (0 … n_sub − 1), -1 for points far from every
        sub-conductor (kept in ``index`` but not given to sub-conductor fits).
    sub_offsets
        (n_sub, 2) lateral and vertical offset of each sub-conductor from the bundle centre
        (the mean of the sub-conductor centres). [m]
    lateral_m, height_m
        Lateral offset (right positive) and height of the bundle centre at the middle of the
        wire's station range. [m]
    lateral_slope
        d(lateral)/d(station) of the wire. [-]
    station_min_m, station_max_m
        Station range of the points. [m]
    kind
        ``"line"`` or ``"crossing"``.
    reason
        Why a group was classed as a crossing.
    """

    index: np.ndarray
    sub_label: np.ndarray
    sub_offsets: np.ndarray
    lateral_m: float
    height_m: float
    lateral_slope: float
    station_min_m: float
    station_max_m: float
    kind: str = "line"
    reason: str = ""
    extra: dict = field(default_factory=dict)

    @property
    def n_sub(self) -> int:
        return int(len(self.sub_offsets))


def span_frame(a_xy: np.ndarray, b_xy: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """Unit along-span vector ``u``, unit right-hand lateral vector ``v`` and length.

    Parameters
    ----------
    a_xy, b_xy
        Horizontal positions of the span ends, shape (2,). [m]

    Returns
    -------
    u, v : (2,) unit vectors; ``v`` = ``u`` turned 90° clockwise (to the right). [-]
    length : horizontal span length. [m]
    """
    d = np.asarray(b_xy, dtype=float) - np.asarray(a_xy, dtype=float)
    length = float(np.hypot(*d))
    if not length > 0:
        raise ValueError("the two ends of a span coincide")
    u = d / length
    return u, np.array([u[1], -u[0]]), length


def to_span_frame(xyz: np.ndarray, a_xy: np.ndarray, b_xy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Station and lateral offset of points in a span frame. [m] (see :func:`span_frame`)."""
    u, v, _ = span_frame(a_xy, b_xy)
    rel = np.asarray(xyz, dtype=float)[:, :2] - np.asarray(a_xy, dtype=float)[None, :]
    return rel @ u, rel @ v


def robust_polyfit(x: np.ndarray, y: np.ndarray, degree: int, *, iterations: int = 10,
                   tuning: float = 4.685, min_scale: float = 0.02) -> tuple[np.ndarray, np.ndarray]:
    """Polynomial fit with Tukey biweight iteratively reweighted least squares.

    Parameters
    ----------
    x, y
        Samples. [any]
    degree
        Polynomial degree (lowered automatically when there are too few distinct x).
    iterations
        IRLS iterations.
    tuning
        Biweight tuning constant in units of the robust scale (4.685 gives 95 % efficiency
        for Gaussian errors [2]_).
    min_scale
        Floor of the robust scale (1.4826 × MAD of the residuals), in the unit of ``y``.

    Returns
    -------
    coef : polynomial coefficients, highest power first (``np.polyval`` order).
    weights : final biweights in [0, 1].

    References
    ----------
    .. [2] Holland, P. W., Welsch, R. E. (1977). Robust regression using iteratively
       reweighted least-squares. Communications in Statistics – Theory and Methods 6(9).
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    degree = int(min(degree, max(_distinct_count(np.round(x, 3), degree + 1) - 1, 0)))
    if len(x) == 0:
        raise ValueError("robust_polyfit needs at least one sample")
    xm = x.mean()
    xs = max(np.ptp(x) / 2.0, 1e-9)
    xn = (x - xm) / xs
    if degree <= 3 and np.isfinite(xn).all() and np.isfinite(y).all():
        # compiled: every iteration in one call (a singular system falls back below)
        coef_n, w = np.zeros(degree + 1), np.ones_like(x)
        status = irls_polyfit(np.ascontiguousarray(xn), np.ascontiguousarray(y), degree,
                              int(iterations), float(tuning), float(min_scale), coef_n, w)
        if status != 2:
            return _compose_linear(coef_n, 1.0 / xs, -xm / xs), \
                (np.ones_like(x) if status == 1 else w)
    return _irls_lstsq(x, xn, y, degree, iterations, tuning, min_scale, xm, xs)


def _irls_lstsq(x, xn, y, degree, iterations, tuning, min_scale, xm, xs):
    """The IRLS loop of :func:`robust_polyfit` with numpy's least squares (minimum-norm
    solutions of singular systems; non-finite samples)."""
    coef_n = np.zeros(degree + 1)
    w = np.ones_like(x)
    A = np.vander(xn, degree + 1)
    for _ in range(iterations):
        sw = np.sqrt(w)
        coef_n, *_ = np.linalg.lstsq(A * sw[:, None], y * sw, rcond=None)
        r = y - A @ coef_n
        scale = max(1.4826 * median_1d(np.abs(r[w > 0] if np.any(w > 0) else r)), min_scale)
        u = r / (tuning * scale)
        w = np.where(np.abs(u) < 1.0, (1.0 - u**2) ** 2, 0.0)
        if w.sum() < degree + 1:
            w = np.ones_like(x)
            break
    # back to polynomial in x
    return _compose_linear(coef_n, 1.0 / xs, -xm / xs), w


def _trimmed(c: np.ndarray) -> np.ndarray:
    """Coefficients without leading zeros (at least one), as :class:`numpy.poly1d` keeps them."""
    c = np.atleast_1d(c)
    first = 0
    while first < len(c) and c[first] == 0:
        first += 1
    return c[first:] if first < len(c) else np.array([0], dtype=c.dtype)


def _compose_linear(coef: np.ndarray, a: float, b: float) -> np.ndarray:
    """Coefficients of ``p(a x + b)`` for ``p`` with coefficients ``coef`` (highest first).

    Horner's scheme on coefficient arrays with the operations, in the same order, that
    ``np.poly1d(coef)(np.poly1d([a, b]))`` performs (``np.polyval`` with a poly1d argument:
    ``np.convolve`` products, zero-padded sums, leading zeros dropped), without building
    poly1d objects.
    """
    shift = _trimmed(np.array([a, b], dtype=float))
    y = _trimmed(0 * shift)
    for k, pv in enumerate(_trimmed(np.asarray(coef, dtype=float))):
        if k:
            y = _trimmed(np.convolve(y, shift))
        term = _trimmed(np.atleast_1d(pv))
        diff = len(term) - len(y)
        if diff > 0:
            y = np.concatenate((np.zeros(diff, y.dtype), y))
        elif diff < 0:
            term = np.concatenate((np.zeros(-diff, term.dtype), term))
        y = _trimmed(y + term)
    return np.asarray(y, dtype=float)


def _distinct_count(values: np.ndarray, at_most: int) -> int:
    """``min(at_most, number of distinct values)`` without sorting for small ``at_most``."""
    if at_most > 4 or np.isnan(values).any():
        return min(at_most, len(np.unique(values)))
    count = 0
    rest = values
    while rest.size and count < at_most:
        rest = rest[rest != rest[0]]
        count += 1
    return count


def point_directions(xyz: np.ndarray, voxel_m: float = 2.0, min_points: int = 4) -> np.ndarray:
    """Unit principal direction of the points in each point's voxel, shape (n, 3). [-]

    Parameters
    ----------
    xyz
        Points, shape (n, 3). [m]
    voxel_m
        Voxel edge; large compared with a bundle's spacing so that the sub-conductors of a
        bundle show their common direction. [m]
    min_points
        Voxels with fewer points get a NaN direction.

    Notes
    -----
    The direction is the eigenvector of the largest eigenvalue of the covariance of the
    points in the voxel (principal component analysis, common practice (no source)); the
    sums are accumulated with ``np.bincount`` so the cost is linear in the number of points.
    """
    xyz = np.asarray(xyz, dtype=float).reshape(-1, 3)
    n = len(xyz)
    if n == 0:
        return np.zeros((0, 3))
    ijk = np.floor((xyz - column_bounds(xyz)[0]) / voxel_m).astype(np.int64)
    _, vox = unique_rows(ijk, return_inverse=True)
    nv = int(vox.max()) + 1
    cnt = np.bincount(vox, minlength=nv).astype(float)
    centred = xyz - xyz.mean(axis=0)
    mean = np.stack([np.bincount(vox, centred[:, i], nv) for i in range(3)], axis=1)
    mean /= cnt[:, None]
    cov = np.empty((nv, 3, 3))
    for i in range(3):
        for j in range(i, 3):
            sij = np.bincount(vox, centred[:, i] * centred[:, j], nv) / cnt
            cov[:, i, j] = cov[:, j, i] = sij - mean[:, i] * mean[:, j]
    _, vec = np.linalg.eigh(cov)
    direction = vec[:, :, -1]
    direction[cnt < min_points] = np.nan
    return direction[vox]


def _grid_components(coords: np.ndarray, cell: float, min_points: int) -> np.ndarray:
    """Connected components (8/26-connected) of occupied grid cells; -1 for small groups."""
    ij = np.floor((coords - column_bounds(coords)[0]) / cell).astype(np.int64)
    shape = tuple(column_bounds(ij)[1] + 1)
    grid = np.zeros(shape, dtype=bool)
    grid[tuple(ij.T)] = True
    labels, _ = ndimage.label(grid, structure=np.ones((3,) * coords.shape[1]))
    lab = labels[tuple(ij.T)] - 1
    counts = np.bincount(lab)
    lab = np.where(counts[lab] >= min_points, lab, -1)
    return lab


def _gaussian_radius(sigma: float, truncate: float = 4.0) -> int:
    """Half width of scipy's Gaussian kernel for ``sigma`` (``ndimage.gaussian_filter``'s
    default truncation): ``int(truncate * sigma + 0.5)``. [cells]"""
    return int(truncate * float(sigma) + 0.5)


def _occupied_histogram(a: np.ndarray, b: np.ndarray, half: float, bins: int, margin: int
                        ) -> tuple[np.ndarray, tuple[int, int], np.ndarray]:
    """The part of ``numpy.histogram2d(a, b, bins, range=[[-half, half]] * 2)`` around its
    occupied cells: the counts over the rows and columns of the occupied cells widened by
    ``margin`` (within the grid), the first row and column of that part, and the bin edges
    of the whole grid (the same on both axes).

    The edges are numpy's (``linspace`` over the range) and a value goes to the bin numpy
    gives it (``searchsorted`` on the edges, the last edge in the last bin), so the part
    holds numpy's counts, as floats. A separable filter whose kernel is shorter than the
    margin gives the same values over the part as over the whole grid: beyond the occupied
    cells the grid holds zeros, and mirroring at an edge of the part reads zeros as well.
    """
    edges = np.linspace(-half, half, bins + 1)

    def bin_of(v: np.ndarray) -> np.ndarray:
        k = np.searchsorted(edges, v, side="right")
        k[v == edges[-1]] -= 1
        k -= 1
        if k.size and (k.min() < 0 or k.max() >= bins):
            raise ValueError("histogram values outside the range")
        return k

    i, j = bin_of(a), bin_of(b)
    i0, i1 = max(int(i.min()) - margin, 0), min(int(i.max()) + margin, bins - 1)
    j0, j1 = max(int(j.min()) - margin, 0), min(int(j.max()) + margin, bins - 1)
    rows, cols = i1 - i0 + 1, j1 - j0 + 1
    counts = np.bincount((i - i0) * cols + (j - j0), minlength=rows * cols)
    return counts.reshape(rows, cols).astype(float), (i0, j0), edges


def _find_peaks(dt: np.ndarray, dz: np.ndarray, opts: SeparationOptions) -> np.ndarray:
    """Sub-conductor centres as peaks of the smoothed (dt, dz) histogram, shape (m, 2)."""
    half = opts.max_bundle_spacing_m * 1.5
    keep = (np.abs(dt) < half) & (np.abs(dz) < half)
    if keep.sum() < 3:
        return np.array([[np.median(dt), np.median(dz)]])
    nb = int(np.ceil(2 * half / opts.fine_cell_m))
    sigma = opts.fine_smoothing_m / opts.fine_cell_m
    # the histogram and its filters over the occupied rows and columns and a margin wider
    # than the smoothing kernel: outside, the smoothed histogram of the whole grid is exactly
    # zero, so no peak lies there and the filters give the same values inside (see
    # _occupied_histogram)
    hist, (i0, j0), edges = _occupied_histogram(dt[keep], dz[keep], half, nb,
                                                margin=2 * _gaussian_radius(sigma) + 1)
    sm = ndimage.gaussian_filter(hist, sigma)
    size = max(int(round(opts.min_subconductor_spacing_m / opts.fine_cell_m)), 3)
    peak = (sm == ndimage.maximum_filter(sm, size=size, mode="constant")) & (
        sm >= opts.peak_fraction * sm.max()) & (sm > 0)
    pi, pj = np.nonzero(peak)
    strength = sm[pi, pj]
    pi, pj = pi + i0, pj + j0
    centres = np.c_[0.5 * (edges[pi] + edges[pi + 1]), 0.5 * (edges[pj] + edges[pj + 1])]
    order = np.argsort(-strength)
    centres = centres[order]
    # merge peaks closer than the minimum spacing (plateaus)
    kept: list[np.ndarray] = []
    for c in centres:
        if all(np.hypot(*(c - q)) >= opts.min_subconductor_spacing_m for q in kept):
            kept.append(c)
    return np.array(kept)


def _single_link(points: np.ndarray, distance: float) -> np.ndarray:
    """Single-linkage groups of a few points (labels 0..g-1)."""
    n = len(points)
    lab = np.arange(n)
    for i in range(n):
        for j in range(i + 1, n):
            if np.hypot(*(points[i] - points[j])) <= distance:
                lab[lab == lab[j]] = lab[i]
    _, lab = np.unique(lab, return_inverse=True)
    return lab


def _describe(index, s, t, z, sub_label, centres, coef_z, coef_t, kind="line", reason=""):
    smin, smax = float(s[index].min()), float(s[index].max())
    smid = 0.5 * (smin + smax)
    centre = centres.mean(axis=0) if len(centres) else np.zeros(2)
    offsets = centres - centre[None, :] if len(centres) else np.zeros((1, 2))
    lat = float(np.polyval(coef_t, smid) + centre[0])
    hgt = float(np.polyval(coef_z, smid) + centre[1])
    slope = float(np.polyval(np.polyder(coef_t), smid)) if len(coef_t) > 1 else 0.0
    ct = np.array(coef_t, dtype=float)
    ct[-1] += centre[0]
    cz = np.array(coef_z, dtype=float)
    cz[-1] += centre[1]
    return WireCluster(index=index, sub_label=sub_label, sub_offsets=offsets, lateral_m=lat,
                       height_m=hgt, lateral_slope=slope, station_min_m=smin,
                       station_max_m=smax, kind=kind, reason=reason,
                       extra={"coef_z": cz, "coef_t": ct})


def _analyse_group(idx, s, t, z, opts: SeparationOptions, depth: int = 0) -> list[WireCluster]:
    """Stage 3 of the module algorithm for one coarse group."""
    if len(idx) < opts.min_cluster_points:
        return []
    ss = s[idx]
    extent = float(np.ptp(ss))
    deg = 2 if extent > 30.0 else 1
    coef_z, _ = robust_polyfit(ss, z[idx], deg)
    coef_t, _ = robust_polyfit(ss, t[idx], deg)
    dt = t[idx] - np.polyval(coef_t, ss)
    dz = z[idx] - np.polyval(coef_z, ss)
    centres = _find_peaks(dt, dz, opts)
    groups = _single_link(centres, opts.max_bundle_spacing_m)
    d = np.hypot(dt[:, None] - centres[None, :, 0], dz[:, None] - centres[None, :, 1])
    nearest = np.argmin(d, axis=1)
    dmin = d[np.arange(len(idx)), nearest]
    if groups.max() > 0 and depth < 2:
        out: list[WireCluster] = []
        g_of_point = groups[nearest]
        for g in range(groups.max() + 1):
            out.extend(_analyse_group(idx[g_of_point == g], s, t, z, opts, depth + 1))
        return out
    inlier = dmin <= opts.inlier_distance_m
    # drop weak peaks (fewer than 10 % of the points of an even share)
    share = np.bincount(nearest[inlier], minlength=len(centres))
    strong = share >= max(0.1 * inlier.sum() / len(centres), 3)
    if not strong.all() and strong.any():
        centres = centres[strong]
        d = d[:, strong]
        nearest = np.argmin(d, axis=1)
        dmin = d[np.arange(len(idx)), nearest]
        inlier = dmin <= opts.inlier_distance_m
    if inlier.mean() < opts.min_inlier_fraction or extent < opts.min_extent_m:
        return []
    # a wire is a continuous curve: its points occupy a good share of its station range
    width = max(opts.occupancy_bin_m, extent / 50.0)
    bins = np.floor((ss - ss.min()) / width).astype(np.int64)
    occupied = np.zeros(int(bins.max()) + 1, dtype=bool)
    occupied[bins] = True
    if occupied.mean() < opts.min_occupancy:
        return []
    sub_label = np.where(inlier, nearest, -1)
    return [_describe(idx, s, t, z, sub_label, centres, coef_z, coef_t)]


def separate_wires(
    xyz: np.ndarray,
    a_xy: np.ndarray,
    b_xy: np.ndarray,
    options: SeparationOptions | None = None,
) -> list[WireCluster]:
    """Split the wire points of one span into wires, bundles and crossing wires.

    Parameters
    ----------
    xyz
        Wire points of the span corridor, shape (n, 3). [m]
    a_xy, b_xy
        Horizontal positions of the span ends, shape (2,). [m]
    options
        Separation parameters (:class:`SeparationOptions`).

    Returns
    -------
    list of WireCluster
        Line wires (``kind == "line"``) and crossing wires (``kind == "crossing"``), their
        ``index`` pointing into ``xyz``. Points in no cluster are noise or clutter.
    """
    opts = options or SeparationOptions()
    xyz = np.asarray(xyz, dtype=float).reshape(-1, 3)
    if len(xyz) < opts.min_cluster_points:
        return []
    s, t = to_span_frame(xyz, a_xy, b_xy)
    z = xyz[:, 2]
    clusters: list[WireCluster] = []
    # 1. crossing wires by local direction
    u, v, _ = span_frame(a_xy, b_xy)
    dirs = point_directions(xyz, opts.direction_voxel_m, opts.direction_min_points)
    horiz = np.hypot(dirs[:, 0], dirs[:, 1])
    along = np.abs(dirs[:, :2] @ u)
    cosmax = np.cos(np.radians(opts.max_wire_angle_deg))
    with np.errstate(invalid="ignore"):
        crossing = (horiz > 0.5) & (along < cosmax * horiz)
    if crossing.sum() >= opts.min_cluster_points:
        cidx = np.flatnonzero(crossing)
        lab = _grid_components(xyz[cidx], 2.5, opts.min_cluster_points)
        confirmed = np.zeros(len(xyz), dtype=bool)
        for k in np.unique(lab[lab >= 0]):
            idx = cidx[lab == k]
            # confirm with the direction of the whole group (voxels of a sparse bundle can
            # point across it)
            rel = xyz[idx, :2] - xyz[idx, :2].mean(axis=0)
            axis = np.linalg.eigh(rel.T @ rel)[1][:, -1]
            angle = np.degrees(np.arccos(min(abs(float(axis @ u)), 1.0)))
            if angle <= opts.max_wire_angle_deg:
                continue
            if np.hypot(*np.ptp(xyz[idx, :2], axis=0)) < opts.min_extent_m:
                continue
            confirmed[idx] = True
            coef_t = np.array([np.tan(np.radians(angle)), 0.0])
            coef_z = np.array([np.median(z[idx])])
            c = _describe(idx, s, t, z, np.zeros(len(idx), dtype=np.int64),
                          np.zeros((1, 2)), coef_z, coef_t, kind="crossing",
                          reason="direction not parallel to the span")
            c.lateral_m = float(np.median(t[idx]))
            c.extra["angle_deg"] = angle
            clusters.append(c)
        crossing = confirmed
    rest = np.flatnonzero(~crossing)
    if len(rest) < opts.min_cluster_points:
        return clusters
    # 2. coarse groups in (t, detrended z)
    deg = 2 if np.ptp(s[rest]) > 30.0 else 1
    cz, _ = robust_polyfit(s[rest], z[rest], deg)
    ct, _ = robust_polyfit(s[rest], t[rest], deg)
    plane = np.c_[t[rest] - np.polyval(ct, s[rest]) + np.polyval(ct, 0.0),
                  z[rest] - np.polyval(cz, s[rest])]
    lab = _grid_components(plane, opts.cluster_cell_m, opts.min_cluster_points)
    for k in np.unique(lab[lab >= 0]):
        idx = rest[lab == k]
        for c in _analyse_group(idx, s, t, z, opts):
            if abs(c.lateral_slope) > np.tan(np.radians(opts.max_wire_angle_deg)):
                c.kind, c.reason = "crossing", "direction not parallel to the span"
            clusters.append(c)
    return clusters

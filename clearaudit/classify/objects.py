"""Above-ground objects: wires, transmission structures, buildings, vegetation.

Only points higher than ``object_min_hag_m`` above the ground model come here. The order is:

1. **columns** — a 2D grid of vertical columns; a column is *filled* when most 1 m height
   slices between its lowest and highest point hold points (trees, towers, walls), *sparse*
   when it only holds a few levels (wires stacked on crossarms).
2. **wires** — seed points are linear, near-horizontal, high and outside filled columns; seeds
   are chained (voxel connectivity) into segments; a segment that is long, thin and follows a
   smooth curve (a parabola in its vertical plane, a close approximation of the catenary over
   one span) is a wire. Each wire segment is then *followed* along its fitted curve past its
   ends: every point within a tight tolerance of the curve becomes wire, which keeps the wire
   where it passes through or just above tree crowns and next to structures.
3. **structures** — connected filled columns that are tall, slender and touch wires; their
   points (and all points 3D-connected to them near the column) are class 15; wire points
   inside the structure's footprint become 15 too (crossarms, insulators).
4. **buildings** — connected cells of planar, level-ish points (roofs) of sufficient area;
   all points above them higher than ``building_min_hag_m`` are class 6. Roofs the ground
   filter kept as ground are found before the ground model by :func:`find_ground_roofs`.
5. **vegetation** — everything else by height bands (3/4/5).

References
----------
Irvine, H. M. (1981). Cable Structures. MIT Press (the parabola as the shallow-sag form of
the catenary, used here only to follow a wire over short gaps).
Weinmann, M., Jutzi, B., Hinz, S., Mallet, C. (2015). Semantic point cloud interpretation
based on optimal neighborhoods, relevant features and efficient classifiers. ISPRS Journal
of Photogrammetry and Remote Sensing 105, 286-304 (eigen features).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage, sparse
from scipy.sparse.csgraph import connected_components

from ..arrays import hypot_within, take_columns
from ..cloud import (
    BUILDING,
    HIGH_VEGETATION,
    LOW_VEGETATION,
    MEDIUM_VEGETATION,
    TRANSMISSION_TOWER,
    WIRE_CONDUCTOR,
    WIRE_GUARD,
)
from .features import EigenFeatures
from .grid import GridFrame, cell_max, cell_min, occupied_cells
from .kernels import cell_offsets, plane_residual_sums, plane_solve, plane_sums
from .options import ClassifyOptions


def voxel_components(xyz: np.ndarray, voxel: float, group: np.ndarray | None = None) -> np.ndarray:
    """Connected components of points through face/edge/corner-adjacent occupied voxels.

    Parameters
    ----------
    xyz
        Points. [m], shape (n, 3)
    voxel
        Voxel edge; points up to one voxel apart are always linked. [m]
    group
        Optional integer group per point; points of different groups are never linked.

    Returns
    -------
    numpy.ndarray
        Component label per point (0 … m-1).
    """
    n = len(xyz)
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    ijk = np.floor(np.asarray(xyz) / voxel).astype(np.int64)
    if group is None:
        group = np.zeros(n, dtype=np.int64)
    _, group = np.unique(group, return_inverse=True)
    lo = np.full((int(group.max()) + 1, 3), np.iinfo(np.int64).max)
    np.minimum.at(lo, group, ijk)
    ijk = ijk - lo[group] + 1  # local to the group, with a free voxel below
    bits = max(int(ijk.max()).bit_length() + 1, 2)
    gbits = max(int(group.max()).bit_length(), 1)
    if 3 * bits + gbits > 63:
        raise ValueError("cloud too large for the voxel size (keys exceed 63 bits)")
    keys = (group << (3 * bits)) | (ijk[:, 0] << (2 * bits)) | (ijk[:, 1] << bits) | ijk[:, 2]
    uniq, inverse = np.unique(keys, return_inverse=True)
    m = len(uniq)
    rows, cols = [np.arange(m)], [np.arange(m)]
    d = np.array([-1, 0, 1], dtype=np.int64)
    di, dj, dk = np.meshgrid(d, d, d, indexing="ij")
    offsets = ((di << (2 * bits)) + (dj << bits) + dk).ravel()
    for off in offsets[offsets > 0]:
        target = uniq + off
        pos = np.clip(np.searchsorted(uniq, target), 0, m - 1)
        found = np.flatnonzero(uniq[pos] == target)
        rows.append(found)
        cols.append(pos[found])
    r = np.concatenate(rows)
    c = np.concatenate(cols)
    graph = sparse.coo_matrix((np.ones(len(r), dtype=np.int8), (r, c)), shape=(m, m))
    _, labels = connected_components(graph, directed=False)
    return labels[inverse].astype(np.int64)


def _grow_cells(cells: np.ndarray, shape: tuple[int, int], offsets: np.ndarray) -> np.ndarray:
    """Flat cells within ``offsets`` (rows of (di, dj)) of the flat ``cells``, inside the grid.

    The binary dilation of a sparse cell set by the footprint ``offsets`` (sorted, unique),
    in work proportional to the set, not to the grid (outside the grid counts as empty, as
    ``scipy.ndimage.binary_dilation`` with ``border_value=0``).
    """
    cells = np.asarray(cells, dtype=np.int64)
    if len(cells) == 0:
        return cells
    ci, cj = np.divmod(cells, shape[1])
    parts = []
    for di, dj in offsets:
        i, j = ci + di, cj + dj
        ok = (i >= 0) & (i < shape[0]) & (j >= 0) & (j < shape[1])
        parts.append(i[ok] * shape[1] + j[ok])
    return np.unique(np.concatenate(parts))


def _square(reach: int) -> np.ndarray:
    """Offsets (di, dj) of a (2·reach + 1)² square footprint."""
    d = np.arange(-reach, reach + 1)
    return np.stack(np.meshgrid(d, d, indexing="ij"), -1).reshape(-1, 2)


def _disk(radius: float) -> np.ndarray:
    """Offsets (di, dj) with di² + dj² ≤ radius² (cells within a Euclidean distance)."""
    sq = _square(int(np.floor(radius)))
    return sq[(sq**2).sum(axis=1) <= radius * radius]


def _erode_cells(cells: np.ndarray, shape: tuple[int, int]) -> np.ndarray:
    """Cells of the sorted flat set ``cells`` whose 3 × 3 neighbourhood lies wholly in the set.

    The binary erosion by a 3 × 3 square with outside-the-grid empty (``border_value=0``).
    """
    inside = np.zeros(shape[0] * shape[1], bool)
    inside[cells] = True
    ci, cj = np.divmod(cells, shape[1])
    keep = (ci > 0) & (ci < shape[0] - 1) & (cj > 0) & (cj < shape[1] - 1)
    cand = cells[keep]
    for di, dj in _square(1):
        if di or dj:
            cand = cand[inside[cand + di * shape[1] + dj]]
    return cand


def _cell_components(cells: np.ndarray, shape: tuple[int, int]) -> np.ndarray:
    """8-connected component label (0 … c-1) of every cell of the sorted flat set ``cells``."""
    m = len(cells)
    if m == 0:
        return np.zeros(0, np.int32)
    ci, cj = np.divmod(cells, shape[1])
    rows, cols = [np.arange(m)], [np.arange(m)]
    for di, dj in ((0, 1), (1, -1), (1, 0), (1, 1)):
        i, j = ci + di, cj + dj
        ok = np.flatnonzero((i < shape[0]) & (j >= 0) & (j < shape[1]))
        # the neighbour's position in the sorted set by binary search (no lookup array over
        # the whole grid, which spans the bounding box of a bent corridor)
        target = i[ok] * shape[1] + j[ok]
        other = np.minimum(np.searchsorted(cells, target), m - 1)
        hit = cells[other] == target
        rows.append(ok[hit])
        cols.append(other[hit])
    r, c = np.concatenate(rows), np.concatenate(cols)
    graph = sparse.coo_matrix((np.ones(len(r), np.int8), (r, c)), shape=(m, m))
    return connected_components(graph, directed=False)[1]


@dataclass
class ColumnGrid:
    """Vertical columns of above-ground points on a 2D grid."""

    frame: GridFrame
    top: np.ndarray     # highest HAG per cell [m] (NaN empty)
    bottom: np.ndarray  # lowest HAG per cell [m]
    fill: np.ndarray    # share of occupied 1 m slices between bottom and top
    count: np.ndarray


def _column_stats(flat: np.ndarray, hag: np.ndarray, size: int
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Column statistics on the occupied cells only (the grid spans the bounding box of a
    corridor, mostly empty).

    Returns ``cells`` (sorted flat indices of the occupied cells), ``k`` (each point's
    position in ``cells``) and per occupied cell the highest and lowest HAG [m], the share of
    occupied 1 m slices between them and the point count.
    """
    cells, k, _ = occupied_cells(flat, size)
    m = len(cells)
    top = cell_max(k, hag, m)
    bottom = cell_min(k, hag, m)
    count = np.bincount(k, minlength=m)
    slices = np.floor(hag).astype(np.int64)
    slices -= slices.min() if len(slices) else 0
    levels = int(slices.max(initial=0)) + 1
    pair = k.astype(np.int64) * levels + slices
    if m * levels <= 1 << 26:
        # occupied (cell, 1 m slice) pairs marked on a bit grid: no sort of the points
        mark = np.zeros(m * levels, bool)
        mark[pair] = True
        occupied = np.count_nonzero(mark.reshape(m, levels), axis=1)
    else:
        occupied = np.bincount(np.unique(pair) // levels, minlength=m)
    fill = occupied / (np.floor(top) - np.floor(bottom) + 1)
    return cells, k, top, bottom, fill, count


def column_grid(xy: np.ndarray, hag: np.ndarray, frame: GridFrame) -> ColumnGrid:
    """Per-cell top, bottom, point count and vertical fill of points (HAG in metres)."""
    size = frame.size
    cells, _, top_c, bottom_c, fill_c, count_c = _column_stats(frame.flat_index(xy), hag, size)
    top = np.full(size, np.nan)
    top[cells] = top_c
    bottom = np.full(size, np.nan)
    bottom[cells] = bottom_c
    fill = np.zeros(size)
    fill[cells] = fill_c
    count = np.zeros(size, np.int64)
    count[cells] = count_c
    shape = frame.shape
    return ColumnGrid(frame, top.reshape(shape), bottom.reshape(shape), fill.reshape(shape),
                      count.reshape(shape))


@dataclass
class WireSegment:
    """A wire segment: straight in plan, a polynomial z(s) in its vertical plane."""

    centre: np.ndarray     # xy of the segment's mean [m]
    direction: np.ndarray  # unit xy direction
    s_range: tuple[float, float]  # along-track extent [m]
    z_coef: np.ndarray     # polynomial coefficients of z(s), highest power first [m]
    rms_m: float


def _segment_geometry(xy: np.ndarray, labels: np.ndarray, m: int):
    """Vectorised per-label principal direction, along-track range and across-track spread."""
    n = np.bincount(labels, minlength=m).astype(np.float64)
    mx = np.bincount(labels, xy[:, 0], m) / n
    my = np.bincount(labels, xy[:, 1], m) / n
    dx = xy[:, 0] - mx[labels]
    dy = xy[:, 1] - my[labels]
    cxx = np.bincount(labels, dx * dx, m) / n
    cyy = np.bincount(labels, dy * dy, m) / n
    cxy = np.bincount(labels, dx * dy, m) / n
    theta = 0.5 * np.arctan2(2 * cxy, cxx - cyy)
    c, s = np.cos(theta), np.sin(theta)
    along = dx * c[labels] + dy * s[labels]
    across = -dx * s[labels] + dy * c[labels]
    smin = np.full(m, np.inf)
    smax = np.full(m, -np.inf)
    np.minimum.at(smin, labels, along)
    np.maximum.at(smax, labels, along)
    width = np.sqrt(np.bincount(labels, across * across, m) / n)
    return n, np.c_[mx, my], np.c_[c, s], smin, smax, width, along


def _chain_segments(xyz: np.ndarray, direction: np.ndarray, seed_idx: np.ndarray, link: float,
                    opts: ClassifyOptions, is_wire: np.ndarray, segment_id: np.ndarray,
                    segments: list[WireSegment]) -> None:
    """Chain seed points into wire segments (updates ``is_wire``, ``segment_id``, ``segments``).

    Rounds: whole chains first, then chains cut into 60 m and 20 m pieces along their
    principal direction (bends at angle structures, chains joined through crossarms) and
    re-chained inside each piece. A piece is a wire segment when it is long, thin and close to
    a straight line (pieces under 40 m) or a parabola in its vertical plane.
    """
    pts = xyz[seed_idx]
    labels = voxel_components(pts, link)
    for chunk in (None, 60.0, 20.0):
        if chunk is not None:
            pending = np.flatnonzero(labels >= 0)
            if len(pending) == 0:
                break
            lab = labels[pending]
            _, lab = np.unique(lab, return_inverse=True)
            m = int(lab.max()) + 1
            *_, smin, _, _, along = _segment_geometry(pts[pending, :2], lab, m)
            piece = np.floor((along - smin[lab]) / chunk).astype(np.int64)
            sub = voxel_components(pts[pending], link, group=lab * 1_000_000 + piece)
            labels = np.full(len(pts), -1, dtype=np.int64)
            labels[pending] = sub
        live = np.flatnonzero(labels >= 0)
        if len(live) == 0:
            break
        _, lab = np.unique(labels[live], return_inverse=True)
        m = int(lab.max()) + 1
        count, centre, direction_xy, smin, smax, width, along = _segment_geometry(
            pts[live, :2], lab, m)
        long_enough = (smax - smin >= opts.wire_min_length_m) & (count >= 5)
        candidate = long_enough & (width <= opts.wire_max_width_m)
        order = np.argsort(lab, kind="stable")
        bounds = np.searchsorted(lab[order], np.arange(m + 1))
        done = ~long_enough  # too short: dropped in every round
        for label in np.flatnonzero(candidate):
            members = order[bounds[label]:bounds[label + 1]]
            # members must run along the segment (drops crossarms and insulator strings)
            local = direction[seed_idx[live[members]], :2]
            run = np.abs(local @ direction_xy[label]) / np.maximum(np.hypot(*local.T), 1e-9)
            members = members[run >= 0.9]
            if len(members) < 5:
                continue
            s = along[members]
            z = pts[live[members], 2]
            degree = 2 if smax[label] - smin[label] >= 40.0 else 1
            coef = np.polyfit(s, z, degree)
            resid = z - np.polyval(coef, s)
            rms = float(np.sqrt(np.mean(resid**2)))
            if rms > opts.wire_max_rms_m:
                continue
            keep = np.abs(resid) <= max(4 * rms, 0.15)
            sid = len(segments)
            segments.append(WireSegment(centre[label], direction_xy[label],
                                        (float(smin[label]), float(smax[label])), coef, rms))
            target = seed_idx[live[members[keep]]]
            is_wire[target] = True
            segment_id[target] = sid
            done[label] = True
        finished = done[lab]
        labels[live[finished]] = -1


def anchored_frame(xy: np.ndarray, cell: float, margin_cells: int = 2) -> GridFrame:
    """An axis-aligned grid whose cell edges lie on multiples of ``cell`` in local coordinates.

    Cell boundaries then do not depend on which points are present (the whole survey or a
    tile with its overlap), so per-cell decisions are the same in both.

    Parameters
    ----------
    xy
        Points the grid must cover. [m], shape (n, 2)
    cell
        Cell edge. [m]
    margin_cells
        Empty cells added on every side.
    """
    if cell <= 0:
        raise ValueError("grid cell size must be positive")
    xy = np.asarray(xy, dtype=np.float64)
    return _anchored_frame(xy[:, 0], xy[:, 1], cell, margin_cells)


def _anchored_frame(x: np.ndarray, y: np.ndarray, cell: float, margin_cells: int) -> GridFrame:
    """:func:`anchored_frame` from the x and y columns (reduced one column at a time)."""
    if len(x) == 0:
        return GridFrame(np.zeros(2), np.eye(2), np.zeros(2), float(cell), (1, 1))
    lo = np.floor(np.array([x.min(), y.min()]) / cell) - margin_cells
    hi = np.floor(np.array([x.max(), y.max()]) / cell) + margin_cells + 1
    return GridFrame(np.zeros(2), np.eye(2), lo * cell, float(cell),
                     tuple(int(v) for v in hi - lo))


def frame_for_points(xy: np.ndarray, cell: float) -> GridFrame:
    """An axis-aligned bucket grid over ``xy`` (for gathering points near a curve)."""
    # reduced one column at a time (a reduction over the long axis of an (n, 2) array runs
    # element by element); the same minima and maxima
    lo = np.array([xy[:, 0].min(), xy[:, 1].min()])
    hi = np.array([xy[:, 0].max(), xy[:, 1].max()])
    return GridFrame(np.zeros(2), np.eye(2), lo - cell, cell,
                     tuple(int(v) for v in np.ceil((hi - lo) / cell) + 3))


def find_wires(xyz: np.ndarray, hag: np.ndarray, feats: EigenFeatures, filled_column: np.ndarray,
               opts: ClassifyOptions) -> tuple[np.ndarray, np.ndarray, list[WireSegment]]:
    """Wire points among above-ground points.

    Parameters
    ----------
    xyz
        Above-ground points. [m], shape (n, 3)
    hag
        Their height above ground. [m]
    feats
        Their eigen features.
    filled_column
        True for points in filled columns (not used as seeds).
    opts
        Options.

    Returns
    -------
    is_wire, segment_id, segments
        Wire mask, the segment each wire point belongs to (-1 elsewhere), the segments.
    """
    n = len(xyz)
    is_wire = np.zeros(n, bool)
    segment_id = np.full(n, -1, dtype=np.int64)
    seed = ((hag >= opts.wire_min_hag_m) & (feats.linearity >= opts.wire_min_linearity)
            & (np.abs(feats.direction[:, 2]) <= opts.wire_max_direction_dip)
            & (feats.count >= 2) & ~filled_column)
    seed_idx = np.flatnonzero(seed)
    segments: list[WireSegment] = []
    if len(seed_idx) < 3:
        return is_wire, segment_id, segments
    for link in (opts.wire_link_m, opts.wire_sparse_link_m):
        left = np.flatnonzero(~is_wire[seed_idx])
        if len(left) < 3:
            break
        _chain_segments(xyz, feats.direction, seed_idx[left], link, opts, is_wire, segment_id,
                        segments)
    if not segments:
        return is_wire, segment_id, segments
    # follow every segment along its curve past its ends
    eligible = np.flatnonzero(hag >= opts.wire_min_hag_m - opts.wire_tolerance_z_m)
    if len(eligible) == 0:
        return is_wire, segment_id, segments
    bucket = frame_for_points(xyz[eligible, :2], 2.0)
    cell_of = bucket.flat_index(xyz[eligible, :2])
    order = np.argsort(cell_of, kind="stable")
    # start of every cell's run in the sorted order (a count per cell, accumulated)
    first = np.zeros(bucket.size + 1, np.int64)
    np.cumsum(np.bincount(cell_of, minlength=bucket.size), out=first[1:])
    ring = np.array([(a, b) for a in (-1, 0, 1) for b in (-1, 0, 1)])
    for sid, seg in enumerate(segments):
        s0 = seg.s_range[0] - opts.wire_gap_m
        s1 = seg.s_range[1] + opts.wire_gap_m
        stations = np.arange(s0, s1 + 1.0, 1.0)
        centres = seg.centre + stations[:, None] * seg.direction
        ci, cj = bucket.index(centres)
        ci = (ci[:, None] + ring[:, 0]).ravel()
        cj = (cj[:, None] + ring[:, 1]).ravel()
        ok = (ci >= 0) & (ci < bucket.shape[0]) & (cj >= 0) & (cj < bucket.shape[1])
        cells = np.unique(ci[ok] * bucket.shape[1] + cj[ok])
        lens = first[cells + 1] - first[cells]
        if lens.sum() == 0:
            continue
        offsets = np.repeat(first[cells] - np.cumsum(lens) + lens, lens)
        cand = order[offsets + np.arange(lens.sum())]
        pts = xyz[eligible[cand]]
        d = pts[:, :2] - seg.centre
        s = d @ seg.direction
        t = d @ np.array([-seg.direction[1], seg.direction[0]])
        on = ((s >= s0) & (s <= s1) & (np.abs(t) <= opts.wire_tolerance_xy_m)
              & (np.abs(pts[:, 2] - np.polyval(seg.z_coef, s)) <= opts.wire_tolerance_z_m))
        idx = eligible[cand[on]]
        # not points that clearly run another way (insulator strings, crossarms, bracing)
        dirs = feats.direction[idx]
        run = np.abs(dirs[:, :2] @ seg.direction)
        idx = idx[(feats.linearity[idx] < opts.wire_min_linearity) | (run >= 0.9)]
        new = idx[~is_wire[idx]]
        is_wire[new] = True
        segment_id[new] = sid
    return is_wire, segment_id, segments


def shield_wires(segments: list[WireSegment], opts: ClassifyOptions,
                 lateral_m: float = 15.0) -> np.ndarray:
    """Which wire segments are shield (earth) wires: topmost, above at least one lower wire.

    Each segment is sampled at 9 stations; every other segment whose plan line passes within
    ``lateral_m`` of a station (inside its along-track range) gives its fitted height there.
    A segment is a shield wire when no other segment is higher than it by more than 0.5 m at
    any station and some other segment is lower by at least ``shield_min_gap_m``.

    Returns
    -------
    numpy.ndarray
        Boolean per segment.
    """
    m = len(segments)
    if m < 2:
        return np.zeros(m, bool)
    centre = np.array([g.centre for g in segments])
    direction = np.array([g.direction for g in segments])
    s0 = np.array([g.s_range[0] for g in segments])
    s1 = np.array([g.s_range[1] for g in segments])
    coef = np.zeros((m, 3))
    for i, g in enumerate(segments):
        coef[i, 3 - len(g.z_coef):] = g.z_coef
    frac = np.linspace(0.05, 0.95, 9)
    st = s0[:, None] + frac[None, :] * (s1 - s0)[:, None]                 # (m, 9)
    xy = centre[:, None, :] + st[..., None] * direction[:, None, :]       # (m, 9, 2)
    z = coef[:, 0, None] * st**2 + coef[:, 1, None] * st + coef[:, 2, None]
    d = xy[:, :, None, :] - centre[None, None, :, :]                        # (m, 9, m, 2)
    sb = np.einsum("aikx,kx->aik", d, direction)
    tb = np.einsum("aikx,kx->aik", d, np.c_[-direction[:, 1], direction[:, 0]])
    zb = coef[None, None, :, 0] * sb**2 + coef[None, None, :, 1] * sb + coef[None, None, :, 2]
    overlap = (sb >= s0[None, None, :]) & (sb <= s1[None, None, :]) & (np.abs(tb) <= lateral_m)
    overlap &= ~np.eye(m, dtype=bool)[:, None, :]
    dz = z[:, :, None] - zb
    higher_other = (overlap & (dz < -0.5)).any(axis=(1, 2))
    lower_other = (overlap & (dz >= opts.shield_min_gap_m)).any(axis=(1, 2))
    return lower_other & ~higher_other


def find_structures(xyz: np.ndarray, hag: np.ndarray, is_wire: np.ndarray,
                    scattering: np.ndarray, frame: GridFrame, opts: ClassifyOptions,
                    flat: np.ndarray | None = None) -> np.ndarray:
    """Transmission-structure points (towers, poles, their crossarms) among above-ground points.

    A structure is a connected group of tall filled columns that is slender, near wires and
    made of members (lattice bars, pole surfaces) rather than foliage: the median scattering
    :math:`\\lambda_3/\\lambda_1` of its points is low (tree crowns scatter in 3D).
    ``flat`` is the points' flat cell index in ``frame`` when already known.
    Returns a boolean mask over ``xyz``.
    """
    n = len(xyz)
    structure = np.zeros(n, bool)
    other = np.flatnonzero(~is_wire)
    if len(other) == 0:
        return structure
    if flat is None:
        flat = frame.flat_index(xyz[:, :2])
    flat_other = flat[other]
    # tall filled columns, computed on the occupied cells; an empty cell counts with top,
    # extent and fill 0 (tall only with thresholds of 0)
    cells, _, top_c, bottom_c, fill_c, _ = _column_stats(flat_other, hag[other], frame.size)
    tall_c = ((top_c >= opts.structure_min_height_m) & (fill_c >= opts.column_min_fill)
              & (top_c - bottom_c >= 0.5 * top_c))
    top = np.zeros(frame.size)
    top[cells] = top_c
    tall = np.full(frame.size, opts.structure_min_height_m <= 0 and opts.column_min_fill <= 0)
    tall[cells] = tall_c
    tall = tall.reshape(frame.shape)
    top = top.reshape(frame.shape)
    del cells, top_c, bottom_c, fill_c, tall_c
    labels, m = ndimage.label(tall, structure=np.ones((3, 3)))
    if m == 0:
        return structure
    index = np.arange(1, m + 1)
    cell_area = frame.cell**2
    # per-label sums and maxima over the labelled cells only (exact: counts and a maximum)
    label_flat = labels.ravel()
    tall_cells = np.flatnonzero(label_flat)
    tall_label = label_flat[tall_cells]
    area = np.bincount(tall_label, minlength=m + 1)[1:].astype(np.float64) * cell_area
    height = np.full(m + 1, -np.inf)
    np.maximum.at(height, tall_label, top.ravel()[tall_cells])
    height = height[1:]
    accept = ((height >= opts.structure_min_height_m) & (area <= opts.structure_max_footprint_m2)
              & (height / np.sqrt(area) >= opts.structure_min_slenderness))
    if is_wire.any():
        # a label is near wires when one of its cells lies within the square reach of a wire
        # cell (the binary dilation of the wire cells, done on the occupied cells only)
        wire_cells = np.unique(flat[is_wire])
        reach = max(1, int(np.ceil(opts.structure_wire_search_m / frame.cell)))
        near = np.zeros(frame.size, bool)
        near[_grow_cells(wire_cells, frame.shape, _square(reach))] = True
        accept &= np.bincount(tall_label[near[tall_cells]], minlength=m + 1)[1:] > 0
    point_label = label_flat[flat_other]
    labelled = point_label > 0
    if labelled.any():
        median_scatter = ndimage.median(scattering[other[labelled]], point_label[labelled], index)
        accept &= np.nan_to_num(np.asarray(median_scatter, float), nan=1.0) <= opts.structure_max_scattering
    if is_wire.any() and labelled.any():
        # a tree under a span has the wires passing OVER it: every wire point above its
        # footprint is higher than its highest point; at a structure the wires attach at or
        # below its top (shield wires at the peak, phases on the crossarms / insulators)
        wire_idx = np.flatnonzero(is_wire)
        wire_label = label_flat[flat[wire_idx]]
        over = wire_label > 0
        if over.any():
            lowest_wire = np.full(m + 1, np.inf)
            np.minimum.at(lowest_wire, wire_label[over], xyz[wire_idx[over], 2])
            body_top = np.full(m + 1, -np.inf)
            np.maximum.at(body_top, point_label[labelled], xyz[other[labelled], 2])
            # only foliage-like columns (median scattering above half the structure limit):
            # the wire-following step may take the top of a real tower as wire
            leafy = np.nan_to_num(np.asarray(median_scatter, float), nan=1.0) \
                >= 0.5 * opts.structure_max_scattering
            accept &= ~((lowest_wire[1:] > body_top[1:] + opts.structure_wire_over_m) & leafy)
    if not accept.any():
        return structure
    keep_label = np.zeros(m + 1, bool)
    keep_label[1:] = accept
    core = keep_label[label_flat]
    # the base of a lattice tower is wider than its body: grow through 3D-connected points
    # that stay within a few cells of the tall core (cells within a Euclidean distance of
    # ``spread`` cells of a core cell: the threshold of a distance transform, done on the
    # core cells only)
    spread = max(1, int(np.ceil(8.0 / frame.cell)))
    region = np.zeros(frame.size, bool)
    region[_grow_cells(np.flatnonzero(core), frame.shape, _disk(spread))] = True
    in_region = region[flat_other]
    in_core = core[flat_other]
    cand = other[in_region]
    if len(cand):
        comp = voxel_components(xyz[cand], 1.0)
        touching = np.unique(comp[in_core[in_region]])
        structure[cand[np.isin(comp, touching)]] = True
    # wire points inside the tall core (crossarms, insulators, attachment hardware)
    wire_idx = np.flatnonzero(is_wire)
    structure[wire_idx[core[flat[wire_idx]]]] = True
    return structure


def find_buildings(xyz: np.ndarray, hag: np.ndarray, feats: EigenFeatures, free: np.ndarray,
                   frame: GridFrame, opts: ClassifyOptions) -> np.ndarray:
    """Building points among ``free`` above-ground points (planar roofs of enough area)."""
    building = np.zeros(len(xyz), bool)
    high = np.flatnonzero(free & (hag >= opts.building_min_hag_m))
    if len(high) == 0:
        return building
    xy_high = xyz[high, :2]
    grid = anchored_frame(xy_high, opts.building_cell_m)
    flat = grid.flat_index(xy_high)
    del xy_high
    # statistics on occupied cells only (the grid spans the bounding box of the points)
    cells, k = np.unique(flat, return_inverse=True)
    m = len(cells)
    roof_like = ((feats.planarity[high] >= opts.building_min_planarity)
                 & (np.abs(feats.normal[high, 2]) >= 0.5))
    count = np.bincount(k, minlength=m)
    roof_count = np.bincount(k, weights=roof_like, minlength=m)
    # vertical spread of a roof cell: noise plus the tilt of the roof plane across the cell
    # (tan of the roof pitch from the normal); foliage spreads much more
    nz = np.abs(feats.normal[high, 2])
    zz = xyz[high, 2]
    mean = np.bincount(k, zz, m) / count
    var = np.bincount(k, zz * zz, m) / count - mean**2
    pitch = np.bincount(k, np.sqrt(np.maximum(1 - nz**2, 0)) / np.maximum(nz, 0.5), m) / count
    allowed = opts.building_max_roof_spread_m + 0.5 * grid.cell * pitch
    spread = np.sqrt(np.maximum(var, 0))
    roof_cells = cells[(count >= 2) & (roof_count >= 0.6 * count) & (spread <= allowed)]
    # binary closing (3 × 3), 8-connected labelling and the final 3 × 3 dilation, all on the
    # sparse set of roof cells: the same cells as scipy.ndimage on the whole grid, in work
    # proportional to the roof cells (the grid spans the bounding box of a bent corridor)
    shape = grid.shape
    roof_cells = _erode_cells(_grow_cells(roof_cells, shape, _square(1)), shape)
    if len(roof_cells) == 0:
        return building
    label = _cell_components(roof_cells, shape)
    area = np.bincount(label) * grid.cell**2
    big_cells = roof_cells[area[label] >= opts.building_min_area_m2]
    footprint = np.zeros(grid.size, bool)
    footprint[_grow_cells(big_cells, shape, _square(1))] = True
    building[high[footprint[flat]]] = True
    return building


@dataclass
class GroundRoofs:
    """Roofs found among the points the ground filter kept (:func:`find_ground_roofs`).

    Attributes
    ----------
    is_roof
        Per input point: the point is on a detected roof (not ground).
    grid
        The anchored roof grid (:func:`anchored_frame`).
    footprint
        Flat indices into ``grid`` of the cells of detected roof footprints (dilated by one
        cell for the eaves), sorted.
    ring_z
        Per footprint cell: height of the ground surface interpolated from the roof's
        surrounding ring. [m]
    top_z
        Per footprint cell: highest roof point in the cell (NaN where the cell is empty). [m]
    patches
        Number of roofs accepted (the planes of a gable roof judged together count once).
    """

    is_roof: np.ndarray
    grid: GridFrame
    footprint: np.ndarray
    ring_z: np.ndarray
    top_z: np.ndarray
    patches: int



def _cell_planes(z: np.ndarray, dx: np.ndarray, dy: np.ndarray, grid: GridFrame,
                 cells: np.ndarray, k: np.ndarray, min_points: int = 4,
                 cnt: np.ndarray | None = None):
    """Least-squares plane z = a + b·dx + c·dy per occupied cell (dx, dy from the cell centre).

    ``dx``, ``dy`` are the points' offsets from their cell centres [m], ``cells`` the
    occupied flat cell indices (sorted) and ``k`` each point's position in ``cells``. Returns, per occupied cell, the height at the cell centre, the gradient (b, c),
    the RMS residual [m] and the point count; cells with fewer than ``min_points`` points get
    NaN. Work and memory scale with the points and occupied cells, not the grid's extent.
    """
    m = len(cells)
    if cnt is None:  # points per cell (float) when the caller has not counted them
        cnt = np.bincount(k, minlength=m).astype(np.float64)
    z0 = cell_min(k, z, m)  # reference height per cell keeps the moments well conditioned
    k = np.ascontiguousarray(k, dtype=np.int64)
    # the eight sums of dx, dy, z - z0 and their products per cell, in one compiled pass
    # (bincount's order: the same sums as eight bincounts of the products)
    sums = np.empty((m, 8))
    plane_sums(k, dx, dy, z, z0, sums)
    # the 3 x 3 normal equations of every cell solved in one compiled pass (Gaussian
    # elimination with partial pivoting; not LAPACK's last bits, see plane_solve); NaN for
    # cells below min_points or with a determinant of at most 1e-9 (collinear points)
    coef = np.empty((m, 3))
    plane_solve(sums, np.ascontiguousarray(cnt, dtype=np.float64), float(min_points), coef)
    # squared residuals z - z0 - ((b·dx + a) + c·dy) summed per cell in one compiled pass
    a0, b0, c0 = (np.ascontiguousarray(coef[:, j]) for j in range(3))
    sq = np.empty(m)
    plane_residual_sums(k, dx, dy, z, z0, a0, b0, c0, sq)
    with np.errstate(invalid="ignore", divide="ignore"):
        rms = np.sqrt(sq / cnt)
    rms[cnt < min_points] = np.nan
    return coef[:, 0] + z0, coef[:, 1], coef[:, 2], rms, cnt


def _low_plane(u: np.ndarray, v: np.ndarray, z: np.ndarray, passes: int = 4,
               keep_m: float = 0.5) -> np.ndarray | None:
    """Plane through the lower cells of a ring: refit after dropping cells above it."""
    use = np.ones(len(z), bool)
    coef = None
    design = np.empty((len(z), 3))  # the rows [1, u, v], built once (same values each pass)
    design[:, 0] = 1.0
    design[:, 1] = u
    design[:, 2] = v
    for _ in range(passes):
        if use.sum() < 6:
            return coef
        coef = np.linalg.lstsq(design[use], z[use], rcond=None)[0]
        kept = z - (coef[0] + coef[1] * u + coef[2] * v) <= keep_m
        if np.array_equal(kept, use):  # the next passes would fit the same cells again
            return coef
        use = kept
    return coef


def _label_planes(label: np.ndarray, x: np.ndarray, y: np.ndarray, z: np.ndarray,
                  n_labels: int) -> np.ndarray:
    """Least-squares plane through the cells of every label, all labels at once.

    ``x``, ``y`` are cell-centre coordinates in cell units and ``z`` the cells' plane heights
    [m]. Returns per label the centroid ``(x_m, y_m, z_m)`` and the rises per cell ``(b, c)``
    of :math:`z = z_m + b(x - x_m) + c(y - y_m)`, shape (n_labels, 5); NaN for labels
    without cells or with collinear cells.
    """
    cnt = np.bincount(label, minlength=n_labels).astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        xm = np.bincount(label, x, n_labels) / cnt
        ym = np.bincount(label, y, n_labels) / cnt
        zm = np.bincount(label, z, n_labels) / cnt
        dx, dy, dz = x - xm[label], y - ym[label], z - zm[label]
        sxx = np.bincount(label, dx * dx, n_labels)
        syy = np.bincount(label, dy * dy, n_labels)
        sxy = np.bincount(label, dx * dy, n_labels)
        sxz = np.bincount(label, dx * dz, n_labels)
        syz = np.bincount(label, dy * dz, n_labels)
        det = sxx * syy - sxy * sxy
        ok = det > 1e-9 * np.maximum(cnt, 1.0) ** 2
        b = np.where(ok, (sxz * syy - syz * sxy) / np.where(ok, det, 1.0), np.nan)
        c = np.where(ok, (syz * sxx - sxz * sxy) / np.where(ok, det, 1.0), np.nan)
    return np.stack([xm, ym, zm, b, c], axis=-1)


def _plane_at(plane: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Height of :func:`_label_planes` rows ``plane`` (broadcast) at cell coordinates. [m]"""
    return plane[..., 2] + plane[..., 3] * (x - plane[..., 0]) + plane[..., 4] * (y - plane[..., 1])


def _gable_groups(cand_cells: np.ndarray, lab_c: np.ndarray, ci: np.ndarray, cj: np.ndarray,
                  cid: np.ndarray, label_x: np.ndarray, plane: np.ndarray,
                  shape: tuple[int, int], cell: float, link_m: float,
                  reach: int = 3, min_contact: int = 3) -> list[np.ndarray]:
    """Groups of candidate patches joined pairwise by a convex crease (a roof ridge).

    Two patches A and B whose cells come within ``reach`` cells of each other meet at a
    convex crease when each one's plane, extended over the other's contact cells, passes
    above that patch: :math:`P_B - P_A > 0` on A's contact cells and :math:`P_A - P_B > 0`
    on B's, each mean no larger than the rise the pitch difference gives over the gap,
    :math:`|\\mathbf g_A - \\mathbf g_B|\\,(r + 1)\\,c + ` ``link_m``, so that the crease
    line lies between them. A step (one patch above the other), a valley (concave) or two
    patches far apart are not joined. Returns the label arrays of groups of two or more.
    """
    n_lab = len(plane)
    src_parts, dst_parts = [], []
    # per occupied cell its patch label where that patch has a plane, else -1 (one lookup
    # per neighbour instead of a label and then its plane); the cells' rows and columns once
    with_plane = np.append(np.isfinite(plane[:, 3]), False)  # label -1 → the last entry
    label_p = np.where(with_plane[label_x], label_x, -1)
    cci, ccj = ci[cand_cells], cj[cand_cells]
    for di, dj in _square(reach):  # a loop over the (2·reach + 1)² offsets, not over cells
        if di == 0 and dj == 0:
            continue
        i, j = cci + di, ccj + dj
        inside = (i >= 0) & (i < shape[0]) & (j >= 0) & (j < shape[1])
        other = np.full(len(cand_cells), -1, np.int64)
        other[inside] = label_p[cid[i[inside] * shape[1] + j[inside]]]
        ok = (other >= 0) & (other != lab_c)
        src_parts.append(np.flatnonzero(ok))
        dst_parts.append(other[ok])
    src = np.concatenate(src_parts)
    dst = np.concatenate(dst_parts)
    if len(src) == 0:
        return []
    # one record per (contact cell, other patch)
    key = np.unique(src.astype(np.int64) * n_lab + dst)
    src, dst = key // n_lab, key % n_lab
    own = lab_c[src]
    x, y = ci[cand_cells[src]] + 0.5, cj[cand_cells[src]] + 0.5
    rise = _plane_at(plane[dst], x, y) - _plane_at(plane[own], x, y)
    pair, inverse = np.unique(own * n_lab + dst, return_inverse=True)
    count = np.bincount(inverse)
    mean = np.bincount(inverse, rise) / count
    a, b = pair // n_lab, pair % n_lab
    kink = np.hypot(plane[a, 3] - plane[b, 3], plane[a, 4] - plane[b, 4])  # rise per cell
    good = (count >= min_contact) & (mean > 0) & (mean <= kink * (reach + 1) + link_m)
    good_keys = pair[good]
    # both directions convex
    back = np.isin(b[good] * n_lab + a[good], good_keys)
    a, b = a[good][back], b[good][back]
    if len(a) == 0:
        return []
    nodes, idx = np.unique(np.r_[a, b], return_inverse=True)
    na = len(nodes)
    graph = sparse.coo_matrix((np.ones(len(a), bool), (idx[:len(a)], idx[len(a):])),
                              shape=(na, na))
    _, comp = connected_components(graph, directed=False)
    order = np.argsort(comp, kind="stable")
    bounds = np.searchsorted(comp[order], np.arange(comp.max() + 2))
    groups = [nodes[order[bounds[g]:bounds[g + 1]]] for g in range(comp.max() + 1)]
    return [g for g in groups if len(g) >= 2]


@dataclass
class _RoofLookups:
    """Per-cell arrays of :func:`find_ground_roofs` shared by the patch judgements."""

    cid2: np.ndarray     # grid → occupied cell index (-1 empty), grid shape
    label_x: np.ndarray  # patch label per occupied cell (-1 not planar), sentinel last
    low_x: np.ndarray    # lowest point per occupied cell [m], sentinel NaN
    zc_x: np.ndarray     # cell plane height at the centre [m], sentinel NaN
    gu_x: np.ndarray     # cell plane gradient, sentinel NaN
    gv_x: np.ndarray
    plane: np.ndarray    # per patch label, :func:`_label_planes`
    lo_i: np.ndarray     # per patch label: bounding box of its cells
    hi_i: np.ndarray
    lo_j: np.ndarray
    hi_j: np.ndarray
    shape: tuple[int, int]
    cell: float


@dataclass
class _RoofTests:
    """Thresholds of :func:`find_ground_roofs` (see its parameters)."""

    min_height_m: float
    min_step_m: float
    min_area_m2: float
    max_area_m2: float
    ring_cells: int
    min_step_share: float
    min_ring_share: float
    max_cell_rms_m: float
    max_gradient_change: float


@dataclass
class _RoofUnit:
    """An accepted roof: its patch labels, footprint cells (flat) with their ring surface
    height [m], and the cells on its roof planes (flat)."""

    members: np.ndarray
    cells: np.ndarray
    ring_z: np.ndarray
    surface: np.ndarray


def _ring(patch: np.ndarray, ring_cells: int) -> tuple[np.ndarray, np.ndarray]:
    """The cells next to a patch (3 x 3 dilation) and its ring: the cells within
    ``ring_cells`` (Chebyshev) of it, less those next to it; outside the window is empty.

    ``ring_cells`` dilations by the 3 x 3 square are one dilation by the square of side
    2 ``ring_cells`` + 1 (a separable maximum filter; the window is a rectangle, so no path
    between two of its cells needs to leave it: the same cells).
    """
    inner = ndimage.binary_dilation(patch, np.ones((3, 3), bool))
    outer = ndimage.maximum_filter(patch, size=2 * ring_cells + 1, mode="constant", cval=False)
    return inner, outer & ~inner


def _judge_roof(members: np.ndarray, lk: _RoofLookups, t: _RoofTests) -> _RoofUnit | None:
    """Judge one candidate patch, or the halves of a gable roof together (see
    :func:`find_ground_roofs`, Notes); the accepted roof, or None."""
    joint = len(members) > 1
    gap = 2 if joint else 0  # cells closed between the halves (the ridge strip)
    pad = t.ring_cells + 1 + gap
    shape = lk.shape
    i0, i1 = max(lk.lo_i[members].min() - pad, 0), min(lk.hi_i[members].max() + 1 + pad, shape[0])
    j0, j1 = max(lk.lo_j[members].min() - pad, 0), min(lk.hi_j[members].max() + 1 + pad, shape[1])
    win = lk.cid2[i0:i1, j0:j1]
    lab_w = lk.label_x[win]
    on_plane = np.isin(lab_w, members) if joint else lab_w == members[0]
    near = np.ones((3, 3), bool)
    patch = on_plane
    if joint:
        patch = ndimage.binary_closing(on_plane, near, iterations=gap) | on_plane
        if patch.sum() * lk.cell**2 > t.max_area_m2:
            return None
    inner, ring = _ring(patch, t.ring_cells)
    ring_at = np.nonzero(ring)
    n_ring = len(ring_at[0])
    ring_low = lk.low_x[win[ring_at]]
    finite = np.isfinite(ring_low)
    # a patch at the edge of the data has no ring there: no evidence of step edges
    if finite.sum() < max(6, t.min_ring_share * n_ring):
        return None
    # window cells' grid coordinates (i0 + row, j0 + column), taken where a mask is set
    coef = _low_plane((ring_at[0][finite] + i0) + 0.5, (ring_at[1][finite] + j0) + 0.5,
                      ring_low[finite])
    if coef is None:
        return None

    def base(mask: np.ndarray) -> np.ndarray:
        at_i, at_j = np.nonzero(mask)
        return coef[0] + coef[1] * ((at_i + i0) + 0.5) + coef[2] * ((at_j + j0) + 0.5)

    height = lk.zc_x[win[on_plane]] - base(on_plane)
    # the height test first: most candidates (ground between two creases) fail it, and
    # then the boundary need not be looked at
    typical = np.percentile(height, 90) if joint else np.median(height)
    if typical < t.min_height_m:
        return None
    edge = patch & ~ndimage.binary_erosion(patch, near)
    edge_base = base(edge)
    edge_h = lk.zc_x[win[edge]] - edge_base
    known = np.isfinite(edge_h)
    if not joint:
        step_share = np.mean(edge_h[known] >= t.min_step_m) if known.any() else 0.0
        if step_share < t.min_step_share:
            return None
    else:
        # downhill half of the boundary: where the ring surface lies below its value at the
        # patch centroid
        centre = base(patch).mean()
        down = known & (edge_base <= centre)
        down_share = np.mean(edge_h[down] >= t.min_step_m) if down.any() else 0.0
        if down_share < t.min_step_share:
            return None
    # grow each roof plane over the coplanar planar cells joined to it
    surface = on_plane.copy()
    planar_w = lab_w >= 0
    wi, wj = np.mgrid[i0:i1, j0:j1]
    cu, cv = wi + 0.5, wj + 0.5
    for lab in members:  # one iteration per roof plane
        p = lk.plane[lab]
        dz = np.abs(lk.zc_x[win] - _plane_at(p, cu, cv))
        dg = np.hypot(lk.gu_x[win] - p[3] / lk.cell, lk.gv_x[win] - p[4] / lk.cell)
        coplanar = planar_w & (dz <= 2.0 * t.max_cell_rms_m) & (dg <= 0.5 * t.max_gradient_change)
        own = lab_w == lab
        grown, _ = ndimage.label(coplanar | own, near)
        # components touching the plane's own cells, or within two cells of them (a strip
        # of mixed cells, e.g. a dormer or chimney, between two parts of one roof plane)
        reach = ndimage.binary_dilation(own, near, iterations=2)
        keep = np.unique(grown[reach])
        surface |= np.isin(grown, keep[keep > 0])
    inner |= ndimage.binary_dilation(surface, near)
    flat = wi[inner] * shape[1] + wj[inner]
    return _RoofUnit(members, flat, base(inner), wi[surface] * shape[1] + wj[surface])


#: The roof grid of sparse ground, as a multiple of the finest cell (see find_ground_roofs).
_SPARSE_ROOF_CELL = 1.5


def _coarser_roof_cell(cell_m: float, points_per_cell: float,
                       min_cell_points: float) -> float | None:
    """The roof cell for ground with ``points_per_cell`` per occupied ``cell_m`` cell: None
    to keep ``cell_m`` (dense enough, or no minimum), else the sparse ground's cell. [m]"""
    if not min_cell_points > 0 or points_per_cell >= min_cell_points:
        return None
    return cell_m * _SPARSE_ROOF_CELL


def find_ground_roofs(xyz: np.ndarray, which: np.ndarray | None = None, *,
                      cell_m: float = 1.0, min_height_m: float = 2.0,
                      min_step_m: float = 1.5, min_area_m2: float = 20.0,
                      max_area_m2: float = 5000.0, max_cell_rms_m: float = 0.15,
                      link_m: float = 0.5, ring_cells: int = 4, min_step_share: float = 0.5,
                      min_roof_hag_m: float = 1.0,
                      max_cell_gradient: float = 1.2,
                      max_gradient_change: float = 0.35,
                      min_ring_share: float = 0.5,
                      min_cell_points: float = 6.0) -> GroundRoofs:
    """Building roofs among the points a ground filter labelled ground.

    On steep terrain a morphological ground filter with a slope threshold fitted to the
    terrain keeps low roofs as ground. Roofs are found here as planar patches that stand on
    step edges above the ground surface around them.

    Parameters
    ----------
    xyz
        The ground points, or all points with ``which``. [m], shape (n, 3)
    which
        Indices of the ground points in ``xyz`` (saves a copy of them); ``is_roof`` is then
        per index.
    cell_m
        Cell edge of the roof grid (anchored to multiples of it). [m]
    min_height_m
        Least median height of a patch above the ground surface of its ring. [m]
    min_step_m
        Least height jump at a patch boundary cell (above the ring surface). [m]
    min_area_m2, max_area_m2
        Area bounds of a roof patch. [m2]
    max_cell_rms_m
        Largest RMS residual of a cell's points about the cell's plane. [m]
    link_m
        Two neighbouring planar cells are one surface when their heights differ from the
        difference their planes predict by at most this. [m]
    ring_cells
        Width of the ring of cells around a patch used for the ground surface (one cell next
        to the patch is skipped: eaves and wall bases).
    min_step_share
        Least share of a patch's boundary cells that stand ``min_step_m`` above the ring.
    min_roof_hag_m
        Points of an accepted footprint at least this high above the ring surface are roof
        points. [m]
    max_cell_gradient
        Steepest cell plane (rise/run) taken as a surface; steeper cells (walls, cliffs)
        separate patches.
    max_gradient_change
        Largest difference of the plane gradients (rise/run) of two linked cells: a roof
        meeting the slope behind it at the same height still breaks there (a crest of the
        terrain breaks too and is then rejected by the step test).
    min_ring_share
        Least share of the ring cells holding ground points (a patch at the edge of the
        data, or ringed by gaps, is not judged).
    min_cell_points
        Least mean number of points per occupied cell. Sparser ground is searched on cells
        1.5 times ``cell_m`` wide, with the ring kept about as wide in metres and
        ``min_step_m`` grown in proportion (0: always ``cell_m``).

    Returns
    -------
    GroundRoofs

    Notes
    -----
    Per cell a least-squares plane :math:`z = a + b\\,\\delta x + c\\,\\delta y` is fitted;
    cells with RMS residual :math:`\\le` ``max_cell_rms_m`` are planar. Neighbouring planar
    cells i, j (centre offset **d**) are linked when
    :math:`|a_j - a_i - \\tfrac12(\\mathbf g_i + \\mathbf g_j)\\cdot\\mathbf d| \\le`
    ``link_m`` and their gradients differ by at most ``max_gradient_change``, both between
    i and j and between the cells one further out on either side (a 3-cell baseline: a
    cell holding both a roof edge and the slope it meets has an intermediate gradient and
    would otherwise bridge the crease). A wall or a change of pitch between a roof and the
    ground breaks the link, smooth terrain does not.

    A cell's plane needs at least four points, and a patch is planar cells linked edge to
    edge. When fewer than about 60 % of the cells hold four points (site percolation on
    the square grid), a roof falls apart into fragments below the least area and is
    missed. With 1 m cells that happens below about 5 ground points per m².

    The scene: a flat 10 m × 8 m roof 2.5 m above a level, 15 % or 40 % slope, 24 scenes
    at each density. With 1 m cells the roof was found in all of them at 5 points per m²,
    in 96 % at 4.5, in 42 % at 4, and in none at 3 or 2.

    Below ``min_cell_points`` per occupied cell (the density is the points per occupied
    cell of the ``cell_m`` grid), the search runs on cells 1.5 times as wide. Its step
    test then asks 1.5 times ``min_step_m``, because a boundary cell's centre lies further
    up a slope: a slope steep enough to pass as a step edge at 1 m would otherwise pass at
    a lower gradient. Measured with the same 24 roof scenes at each density, and 18 scenes
    of hipped earth mounds 4 m high (flanks of 0.5, 0.8 and 1.0 rise/run, level or on a 30 %
    slope):
    - the roof is found in all scenes from 3 to 5.5 points per m², in 88 % at 2.5, 62 % at
      2 and 12 % at 1.5;
    - mounds pass as roofs in 0–3 of 18 scenes from 1.5 to 5.5 points per m², as on 1 m
      cells over denser ground (2 of 18 at 6 points per m², 3 at 8).

    Sparse ground also breaks up into many small patches, and each is judged on its own:
    a tile of a 10 km line at 4 points per m² had 1385 candidate patches and no roof, and
    its classification took 0.83 s; with the wider cells it takes 0.60–0.64 s.

    A connected patch is a roof when its area lies within the bounds, its median height
    above a plane fitted to the lower cells of the surrounding ring is :math:`\\ge`
    ``min_height_m`` and at least ``min_step_share`` of its boundary cells stand
    ``min_step_m`` above that plane (step edges all around, unlike the upper edge of a cut
    or a crest).

    On a hillside one half of a gable roof often meets the uphill slope at about its own
    height, or the building is set into the slope and the roof's uphill part lies below
    the ground around it; that half alone fails these tests. Candidate patches that meet
    at a convex crease (each plane, extended over the other's cells next to it, passes
    above them, by no more than the pitch difference gives over the gap between them:
    a ridge) are therefore also judged together, the gap between them (the ridge strip,
    whose points stand above the ground filter's surface) closed by two cells. A group is a
    roof when its upper decile stands ``min_height_m`` above the ring plane and at least
    ``min_step_share`` of the *downhill* half of its boundary (cells where the ring plane
    is below its mean over the roof) stands ``min_step_m`` above it: walls where the
    ground falls away, whatever the uphill side does. A single plane (a road bench cut
    into a slope) or a crest without walls below it is not such a group.

    Each accepted roof plane then takes in the planar cells joined to it (directly or
    across at most two cells) that lie on its plane within 2 ``max_cell_rms_m`` with a
    gradient within ``max_gradient_change`` / 2 of it: parts of the same plane cut off by
    mixed cells. Every point of a roof-plane cell is a roof point (a planar cell holds one
    surface); in the cells around the roof (eaves, wall tops) points at least
    ``min_roof_hag_m`` above the ring plane are.

    References
    ----------
    Pingel, T. J., Clarke, K. C., McBride, W. A. (2013). An improved simple morphological
    filter for the terrain classification of airborne LIDAR data. ISPRS J. Photogramm.
    Remote Sens. 77, 21-30 (the slope-threshold trade-off that leaves low roofs as ground).
    """
    given = dict(locals())  # the arguments, for the search on a coarser grid below
    if cell_m <= 0 or min_area_m2 <= 0 or max_area_m2 < min_area_m2 or ring_cells < 2:
        raise ValueError("find_ground_roofs needs a positive cell, 0 < min_area <= max_area "
                         "and a ring of at least 2 cells")
    xyz = np.asarray(xyz, dtype=np.float64)
    # the chosen rows' columns gathered in one pass (arrays.take_columns); x and y are
    # copies, shifted in place below
    x, y, z = (take_columns(xyz, which) if which is not None
               else (np.array(xyz[:, c]) for c in range(3)))
    n = len(z)
    grid = _anchored_frame(x, y, cell_m, ring_cells + 2)
    none = np.zeros(0, np.int64)
    empty = GroundRoofs(np.zeros(n, bool), grid, none, np.zeros(0), np.zeros(0), 0)
    if n < 4:
        return empty
    shape = grid.shape
    # grid coordinates: the anchored grid is axis-aligned through the local origin, so its
    # (u, v) are x and y less the corner (the same values and cells as grid.flat_index),
    # in place on the columns' own copies (x and y are not needed again); then each point's
    # cell and its offsets from the cell's centre in one compiled pass (cell_offsets: the
    # operations of the numpy form, ``floor(u / cell)`` clipped, ``u - (i + 0.5) cell``)
    u = np.subtract(x, grid.corner[0], out=x)
    v = np.subtract(y, grid.corner[1], out=y)
    del x, y
    flat = np.empty(n, np.int32 if grid.size < 2**31 else np.int64)
    cell_offsets(u, v, float(grid.cell), int(shape[0]), int(shape[1]), flat)
    # occupied cells only: the grid spans the survey's bounding box, which for a long or bent
    # corridor is many times the area holding points (``cid``: grid → occupied cell, -1 empty)
    cells, k, cid = occupied_cells(flat, grid.size, lookup=True)
    m = len(cells)
    del flat
    coarser = _coarser_roof_cell(cell_m, n / m, min_cell_points)
    if coarser is not None:  # sparse ground: the same search on the coarser grid
        return find_ground_roofs(**{
            **given, "cell_m": coarser, "min_step_m": min_step_m * coarser / cell_m,
            "ring_cells": max(2, round(ring_cells * cell_m / coarser)),
            "min_cell_points": 0.0})
    cnt = np.bincount(k, minlength=m).astype(np.float64)
    ci, cj = np.divmod(cells, shape[1])
    zc, gu, gv, rms, _ = _cell_planes(z, u, v, grid, cells, k, cnt=cnt)  # u, v: offsets
    del u, v
    # a near-vertical plane (wall points in a cell) also fits well: planar cells are those
    # no steeper than max_cell_gradient (a roof pitch or a steep bank, not a wall)
    planar = np.isfinite(zc) & (rms <= max_cell_rms_m) & hypot_within(gu, gv, max_cell_gradient)
    rows, cols = [], []
    pc = np.flatnonzero(planar)
    for step, axis_grad, inside in ((shape[1], gu, ci[pc] < shape[0] - 1),
                                    (1, gv, cj[pc] < shape[1] - 1)):
        a = pc[inside]
        b = cid[cells[a] + step]
        both = b >= 0
        a, b = a[both], b[both]
        keep = planar[b]
        a, b = a[keep], b[keep]
        pred = 0.5 * (axis_grad[a] + axis_grad[b]) * grid.cell
        link = ((np.abs(zc[b] - zc[a] - pred) <= link_m)
                & hypot_within(gu[b] - gu[a], gv[b] - gv[a], max_gradient_change))
        # the same gradient test one cell further out on both sides (a 3-cell baseline): a
        # cell mixing a roof edge and the slope it meets has an intermediate gradient and
        # would otherwise bridge the crease in two small steps
        a_out = cid[np.maximum(cells[a] - step, 0)]
        b_out = cid[np.minimum(cells[b] + step, grid.size - 1)]
        wide = (a_out >= 0) & (b_out >= 0)
        wide[wide] = planar[a_out[wide]] & planar[b_out[wide]]
        w = np.flatnonzero(wide & link)
        link[w] = hypot_within(gu[b_out[w]] - gu[a_out[w]], gv[b_out[w]] - gv[a_out[w]],
                               max_gradient_change)
        rows.append(a[link])
        cols.append(b[link])
    r, c = np.concatenate(rows), np.concatenate(cols)
    graph = sparse.coo_matrix((np.ones(len(r), bool), (r, c)), shape=(m, m))
    _, label = connected_components(graph, directed=False)
    label = np.where(planar, label, -1)
    n_lab = int(label.max()) + 1 if planar.any() else 0
    area = np.bincount(label[planar], minlength=n_lab) * grid.cell**2
    candidates = np.flatnonzero((area >= min_area_m2) & (area <= max_area_m2))
    if len(candidates) == 0:
        return empty
    low = cell_min(k, z, m)  # ring: lowest point per cell
    # per-cell lookups with a sentinel for empty cells (index -1 → the appended last entry)
    label_x = np.append(label, -1)
    low_x = np.append(low, np.nan)
    zc_x = np.append(zc, np.nan)
    gu_x = np.append(gu, np.nan)
    gv_x = np.append(gv, np.nan)
    is_candidate = np.zeros(n_lab, bool)
    is_candidate[candidates] = True
    cand_cells = np.flatnonzero(label >= 0)
    cand_cells = cand_cells[is_candidate[label[cand_cells]]]
    lab_c = label[cand_cells]
    lo_i = np.full(n_lab, shape[0])
    hi_i = np.full(n_lab, -1)
    lo_j = np.full(n_lab, shape[1])
    hi_j = np.full(n_lab, -1)
    np.minimum.at(lo_i, lab_c, ci[cand_cells])
    np.maximum.at(hi_i, lab_c, ci[cand_cells])
    np.minimum.at(lo_j, lab_c, cj[cand_cells])
    np.maximum.at(hi_j, lab_c, cj[cand_cells])
    plane = _label_planes(lab_c, ci[cand_cells] + 0.5, cj[cand_cells] + 0.5, zc[cand_cells], n_lab)
    lookups = _RoofLookups(cid.reshape(shape), label_x, low_x, zc_x, gu_x, gv_x, plane, lo_i,
                           hi_i, lo_j, hi_j, shape, grid.cell)
    tests = _RoofTests(min_height_m, min_step_m, min_area_m2, max_area_m2, ring_cells,
                       min_step_share, min_ring_share, max_cell_rms_m, max_gradient_change)
    units: list[_RoofUnit] = []
    single = np.zeros(n_lab, bool)
    for lab in candidates:  # one iteration per candidate patch (few), not per point
        unit = _judge_roof(np.array([lab]), lookups, tests)
        if unit is not None:
            units.append(unit)
            single[lab] = True
    # the halves of a gable roof, judged together (a half meeting the slope uphill at the
    # same height has no step edges there, and a roof dug into the slope stands lower above
    # the ring than a free-standing one)
    for members in _gable_groups(cand_cells, lab_c, ci, cj, cid, label_x, plane, shape,
                                 grid.cell, link_m):
        if single[members].all():
            continue
        unit = _judge_roof(members, lookups, tests)
        if unit is None:
            continue
        units = [u for u in units if not np.isin(u.members, members).any()]
        units.append(unit)
        single[members] = True
    if not units:
        return empty
    # a cell in two roofs' eaves keeps the later roof's ring surface
    take = np.concatenate([u.cells for u in units])[::-1]
    ring_all = np.concatenate([u.ring_z for u in units])[::-1]
    fp_cells, first = np.unique(take, return_index=True)
    fp_ring = ring_all[first]
    surface = np.zeros(m + 1, bool)  # occupied cells on a roof plane (sentinel last)
    surface_cells = cid[np.concatenate([u.surface for u in units])]
    surface[surface_cells[surface_cells >= 0]] = True
    # ring surface sampled at each point (the plane, evaluated at the point's own position)
    ring_by_cell = np.full(m + 1, np.nan)
    fp_occ = cid[fp_cells]
    ring_by_cell[fp_occ[fp_occ >= 0]] = fp_ring[fp_occ >= 0]
    zpt = ring_by_cell[k]
    pts = np.flatnonzero(np.isfinite(zpt))
    is_roof = np.zeros(n, bool)
    # every point of a roof-plane cell is roof (a planar cell: one surface); in the eave cells
    # around it only points standing above the ring surface
    is_roof[pts] = (z[pts] - zpt[pts] >= min_roof_hag_m) | surface[k[pts]]
    top = cell_max(k, z, m)
    fp_top = np.where(fp_occ >= 0, np.append(top, np.nan)[fp_occ], np.nan)
    return GroundRoofs(is_roof, grid, fp_cells, fp_ring, fp_top, len(units))


def vegetation_class(hag: np.ndarray, opts: ClassifyOptions) -> np.ndarray:
    """ASPRS vegetation class by height above ground (bands documented in the options)."""
    return np.where(hag < opts.low_vegetation_max_m, LOW_VEGETATION,
                    np.where(hag < opts.medium_vegetation_max_m, MEDIUM_VEGETATION,
                             HIGH_VEGETATION)).astype(np.uint8)


def classify_objects(xyz: np.ndarray, hag: np.ndarray, feats: EigenFeatures, frame: GridFrame,
                     opts: ClassifyOptions) -> tuple[np.ndarray, dict[str, int]]:
    """ASPRS class of every above-ground point (wires, structures, buildings, vegetation).

    Parameters
    ----------
    xyz
        Above-ground points. [m], shape (n, 3)
    hag
        Their height above ground. [m]
    feats
        Their eigen features.
    frame
        The ground grid of the cloud; not used for the object grids, which are anchored to
        the local coordinates (:func:`anchored_frame`) so that the result for a point does
        not depend on the extent of the cloud (whole survey or a tile with its overlap).
    opts
        Options.

    Returns
    -------
    classes, info
        uint8 ASPRS class per point; counts of segments found (for the run record).
    """
    # grids anchored to the local coordinates (not to the cloud's extent or principal
    # direction): a tile with its overlap sees the same cells as the whole survey
    col_frame = anchored_frame(xyz[:, :2], opts.column_cell_m)
    col_flat = col_frame.flat_index(xyz[:, :2])
    # filled columns on the occupied cells (an empty cell is never filled: its extent is 0)
    _, col_k, top, bottom, fill, _ = _column_stats(col_flat, hag, col_frame.size)
    filled_point = ((fill >= opts.column_min_fill) & (top - bottom >= 4.0))[col_k]
    del col_k, top, bottom, fill
    is_wire, segment_id, segments = find_wires(xyz, hag, feats, filled_point, opts)
    structure = find_structures(xyz, hag, is_wire, feats.scattering, col_frame, opts,
                                flat=col_flat)
    is_wire &= ~structure
    if structure.any() and is_wire.any() and segments:
        # short "wire" segments lying mostly on a structure are its members (bracing, arms)
        structure_cells = np.unique(col_flat[structure])
        footprint = np.zeros(col_frame.size, bool)
        footprint[_grow_cells(structure_cells, col_frame.shape, _square(1))] = True
        w = np.flatnonzero(is_wire & (segment_id >= 0))
        on = footprint[col_flat[w]]
        m = len(segments)
        share = (np.bincount(segment_id[w], weights=on, minlength=m)
                 / np.maximum(np.bincount(segment_id[w], minlength=m), 1))
        length = np.array([seg.s_range[1] - seg.s_range[0] for seg in segments])
        member = (share >= 0.5) & (length < 15.0)
        moved = w[member[segment_id[w]]]
        structure[moved] = True
        is_wire[moved] = False
    del col_flat
    free = ~is_wire & ~structure
    building = find_buildings(xyz, hag, feats, free, frame, opts)
    classes = vegetation_class(hag, opts)
    classes[building] = BUILDING
    classes[structure] = TRANSMISSION_TOWER
    classes[is_wire] = WIRE_CONDUCTOR
    if opts.detect_shield_wires and segments:
        shield_segment = shield_wires(segments, opts)
        shield = is_wire & (segment_id >= 0)
        shield[shield] = shield_segment[segment_id[shield]]
        classes[shield] = WIRE_GUARD
    info = {"wire_segments": len(segments)}
    return classes, info

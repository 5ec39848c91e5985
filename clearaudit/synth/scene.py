"""Corridor region, ground, vegetation, building, road and noise points for synthetic corridors.

All functions work in local metres and are vectorised over points. Vegetation classes follow
the height-above-ground bands used throughout clearaudit's synthetic data (common practice,
no source; ASPRS LAS 1.4 R15 Table 17 names the classes but not the bands):
low vegetation (3) below 0.5 m, medium vegetation (4) from 0.5 m to below 2.0 m, high
vegetation (5) from 2.0 m up.
"""
from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from .. import cloud as C
from .terrain import Terrain

#: Upper limits of the low and medium vegetation height bands. [m]
LOW_VEGETATION_MAX_M = 0.5
MEDIUM_VEGETATION_MAX_M = 2.0


def vegetation_class(height_above_ground_m: np.ndarray) -> np.ndarray:
    """ASPRS vegetation class (3, 4 or 5) from height above ground.

    Parameters
    ----------
    height_above_ground_m
        Height of each point above the true ground. [m]

    Returns
    -------
    numpy.ndarray
        uint8 class codes: 3 below 0.5 m, 4 below 2.0 m, 5 otherwise.
    """
    h = np.asarray(height_above_ground_m, dtype=float)
    out = np.full(h.shape, C.HIGH_VEGETATION, dtype=np.uint8)
    out[h < MEDIUM_VEGETATION_MAX_M] = C.MEDIUM_VEGETATION
    out[h < LOW_VEGETATION_MAX_M] = C.LOW_VEGETATION
    return out


@dataclass
class Region:
    """Points within ``half_width_m`` of a polyline (the corridor), chainage and offset.

    Attributes
    ----------
    vertices
        Polyline vertices, shape (k, 2), already extended past the end structures. [m]
    half_width_m
        Half the corridor width. [m]
    """

    vertices: np.ndarray
    half_width_m: float

    def __post_init__(self) -> None:
        v = np.asarray(self.vertices, dtype=float)
        self.vertices = v
        self.seg_a = v[:-1]
        self.seg_d = v[1:] - v[:-1]
        self.seg_len = np.hypot(self.seg_d[:, 0], self.seg_d[:, 1])
        self.seg_u = self.seg_d / self.seg_len[:, None]
        self.seg_start = np.concatenate([[0.0], np.cumsum(self.seg_len)[:-1]])

    @property
    def area_m2(self) -> float:
        """Approximate area of the region (segments' rectangles). [m²]"""
        return float(self.seg_len.sum() * 2.0 * self.half_width_m)

    def locate(self, xy: np.ndarray, segments: Sequence[int] | None = None,
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Nearest segment, chainage and signed offset (positive left) of points.

        Parameters
        ----------
        xy
            Points, shape (n, 2). [m]
        segments
            Only consider these segments (default all).

        Returns
        -------
        (segment, chainage_m, offset_m, distance_m)
            Index of the nearest segment, distance along the polyline of the foot point
            (unclipped on that segment) [m], signed offset from the segment's line [m],
            distance to the segment [m].
        """
        xy = np.asarray(xy, dtype=float).reshape(-1, 2)
        px, py = xy[:, 0], xy[:, 1]
        best = np.full(len(xy), np.inf)
        seg = np.zeros(len(xy), dtype=int)
        along = np.zeros(len(xy))
        off = np.zeros(len(xy))
        for k in (range(len(self.seg_a)) if segments is None else segments):
            ux, uy = self.seg_u[k]
            rx = px - self.seg_a[k, 0]
            ry = py - self.seg_a[k, 1]
            t = rx * ux + ry * uy
            o = ry * ux - rx * uy
            excess = np.maximum(t - self.seg_len[k], 0.0) + np.minimum(t, 0.0)
            d2 = excess * excess + o * o
            better = d2 < best
            best = np.where(better, d2, best)
            seg[better] = k
            along = np.where(better, self.seg_start[k] + t, along)
            off = np.where(better, o, off)
        return seg, along, off, np.sqrt(best)

    def random_points(self, rng: np.random.Generator, density_per_m2: float) -> np.ndarray:
        """Uniform (Poisson) points over the region. [m], shape (n, 2)."""
        out = []
        hw = self.half_width_m
        n_seg = len(self.seg_a)
        for k in range(n_seg):
            length = self.seg_len[k] + 2.0 * hw
            n = int(rng.poisson(density_per_m2 * length * 2.0 * hw))
            t = rng.uniform(-hw, self.seg_len[k] + hw, n)
            o = rng.uniform(-hw, hw, n)
            u = self.seg_u[k]
            xy = self.seg_a[k] + t[:, None] * u + o[:, None] * np.array([-u[1], u[0]])
            near = [i for i in range(k - 2, k + 3) if 0 <= i < n_seg]
            seg, _, _, dist = self.locate(xy, near)
            out.append(xy[(seg == k) & (dist <= hw)])
        return np.vstack(out) if out else np.zeros((0, 2))


# ----------------------------------------------------------------------------------- trees
@dataclass
class TreeSet:
    """Trees (or shrubs) as crowns on trunks.

    Attributes
    ----------
    x, y
        Trunk position. [m]
    ground_z
        Ground height at the trunk. [m]
    height_m
        Total height above ground (top of crown). [m]
    crown_radius_m
        Horizontal crown radius. [m]
    crown_length_m
        Vertical extent of the crown. [m]
    cone
        True for a conical (conifer) crown, False for an ellipsoid (broadleaf) crown.
    """

    x: np.ndarray
    y: np.ndarray
    ground_z: np.ndarray
    height_m: np.ndarray
    crown_radius_m: np.ndarray
    crown_length_m: np.ndarray
    cone: np.ndarray

    def __len__(self) -> int:
        return len(self.x)

    def draw_unit_samples(self, rng: np.random.Generator, density_per_m2: float,
                          trunk: bool = True) -> dict[str, np.ndarray]:
        """Per-point random numbers that fix where each point falls on its tree.

        Keeping them apart from the tree's size lets a tree be resized (planted trees are
        adjusted to an exact clearance) without re-drawing its points.
        """
        r = self.crown_radius_m
        area = np.pi * r**2 + np.pi * r * self.crown_length_m
        n = (0.55 * density_per_m2 * area).astype(int) + 25
        idx = np.repeat(np.arange(len(self)), n)
        m = len(idx)
        part = rng.random(m)
        kind = np.where(part < 0.70, 0, np.where(part < 0.93, 1, 2))
        if not trunk:
            kind[kind == 2] = 1
        v = rng.normal(size=(m, 3))
        v /= np.linalg.norm(v, axis=1)[:, None]
        up = rng.random(m) < 0.7  # airborne view: more returns from the upper crown
        v[:, 2] = np.where(up, np.abs(v[:, 2]), v[:, 2])
        return {"tree": idx, "kind": kind, "v": v, "u1": rng.random(m), "u2": rng.random(m),
                "ang": rng.uniform(0.0, 2.0 * np.pi, m)}

    def points(self, s: dict[str, np.ndarray]) -> np.ndarray:
        """Points of all trees from their unit samples. [m], shape (n, 3), noise-free."""
        i = s["tree"]
        kind, v, u1, u2, ang = s["kind"], s["v"], s["u1"], s["u2"], s["ang"]
        x, y, g = self.x[i], self.y[i], self.ground_z[i]
        ht, rad, lc, cone = self.height_m[i], self.crown_radius_m[i], self.crown_length_m[i], \
            self.cone[i]
        pts = np.zeros((len(i), 3))
        # Ellipsoid crowns: shell (kind 0) or interior (kind 1).
        rr = np.where(kind == 0, 1.0 - 0.06 * u1, 0.95 * np.cbrt(u1))
        ell = np.column_stack([x + rr * rad * v[:, 0], y + rr * rad * v[:, 1],
                               g + ht - lc / 2.0 + rr * lc / 2.0 * v[:, 2]])
        # Cone crowns: shell or interior; fraction f of the crown length below the apex.
        f = np.sqrt(u2)
        rc = rad * f * np.where(kind == 0, 1.0, np.sqrt(u1))
        con = np.column_stack([x + rc * np.cos(ang), y + rc * np.sin(ang), g + ht - f * lc])
        pts[:] = np.where(cone[:, None], con, ell)
        # Trunk points below the crown.
        tr = kind == 2
        pts[tr] = np.column_stack([x[tr] + 0.15 * np.cos(ang[tr]), y[tr] + 0.15 * np.sin(ang[tr]),
                                   g[tr] + u2[tr] * np.maximum(ht[tr] - lc[tr], 0.3)])
        return pts


def random_trees(rng: np.random.Generator, xy: np.ndarray, terrain: Terrain,
                 height_range_m: tuple[float, float], conifer_fraction: float) -> TreeSet:
    """Tree sizes for given trunk positions.

    Parameters
    ----------
    rng
        Random generator.
    xy
        Trunk positions, shape (n, 2). [m]
    terrain
        Ground surface.
    height_range_m
        Range of total heights. [m]
    conifer_fraction
        Share of conical crowns. [-]
    """
    n = len(xy)
    h = rng.uniform(*height_range_m, n)
    cone = rng.random(n) < conifer_fraction
    radius = np.where(cone, rng.uniform(0.12, 0.2, n), rng.uniform(0.18, 0.3, n)) * h + 0.4
    crown = np.where(cone, rng.uniform(0.55, 0.8, n), rng.uniform(0.4, 0.65, n)) * h
    return TreeSet(x=xy[:, 0].copy(), y=xy[:, 1].copy(), ground_z=terrain.height(xy[:, 0], xy[:, 1]),
                   height_m=h, crown_radius_m=radius, crown_length_m=crown, cone=cone)


# ------------------------------------------------------------------------------- building
@dataclass
class Building:
    """A gable-roofed building.

    Attributes
    ----------
    centre
        Footprint centre, shape (2,). [m]
    axis
        Unit vector along the ridge, shape (2,). [-]
    length_m, width_m
        Footprint size along and across the ridge. [m]
    base_z_m
        Lowest ground height at the footprint corners. [m]
    eave_height_m, ridge_height_m
        Heights of eaves and ridge above ``base_z_m``. [m]
    """

    centre: np.ndarray
    axis: np.ndarray
    length_m: float
    width_m: float
    base_z_m: float
    eave_height_m: float
    ridge_height_m: float

    @property
    def across(self) -> np.ndarray:
        return np.array([-self.axis[1], self.axis[0]])

    def corners(self) -> np.ndarray:
        """Footprint corners, counter-clockwise, shape (4, 2). [m]"""
        a, c = self.axis * self.length_m / 2.0, self.across * self.width_m / 2.0
        return np.array([self.centre - a - c, self.centre + a - c, self.centre + a + c,
                         self.centre - a + c])

    def inside(self, xy: np.ndarray, margin_m: float = 0.0) -> np.ndarray:
        """True for points within the footprint grown by ``margin_m``."""
        r = np.asarray(xy, dtype=float).reshape(-1, 2) - self.centre
        return ((np.abs(r @ self.axis) <= self.length_m / 2.0 + margin_m)
                & (np.abs(r @ self.across) <= self.width_m / 2.0 + margin_m))

    def roof_z(self, xy: np.ndarray) -> np.ndarray:
        """Roof height at points inside the footprint. [m]"""
        v = np.abs((np.asarray(xy, dtype=float).reshape(-1, 2) - self.centre) @ self.across)
        frac = np.clip(1.0 - v / (self.width_m / 2.0), 0.0, 1.0)
        return self.base_z_m + self.eave_height_m + (self.ridge_height_m - self.eave_height_m) * frac

    def points(self, rng: np.random.Generator, density_per_m2: float, terrain: Terrain,
               noise_m: float) -> np.ndarray:
        """Roof points at full density and wall points at a fifth of it. [m], (n, 3)."""
        n_roof = int(rng.poisson(density_per_m2 * self.length_m * self.width_m))
        a = rng.uniform(-0.5, 0.5, n_roof) * self.length_m
        c = rng.uniform(-0.5, 0.5, n_roof) * self.width_m
        xy = self.centre + a[:, None] * self.axis + c[:, None] * self.across
        roof = np.column_stack([xy, self.roof_z(xy)])
        corners = self.corners()
        walls = []
        for k in range(4):
            p, q = corners[k], corners[(k + 1) % 4]
            length = float(np.hypot(*(q - p)))
            n = int(rng.poisson(0.2 * density_per_m2 * length * self.ridge_height_m))
            t = rng.random(n)
            wxy = p + t[:, None] * (q - p)
            top = self.roof_z(wxy)
            bottom = terrain.height(wxy[:, 0], wxy[:, 1])
            wz = bottom + rng.random(n) * np.maximum(top - bottom, 0.0)
            walls.append(np.column_stack([wxy, wz]))
        pts = np.vstack([roof] + walls)
        return pts + rng.normal(0.0, noise_m, pts.shape)

    def surface_samples(self, step_m: float = 0.1) -> np.ndarray:
        """Noise-free dense samples of the roof (the part of the building nearest to wires)."""
        a = np.arange(-self.length_m / 2.0, self.length_m / 2.0 + 1e-9, step_m)
        c = np.arange(-self.width_m / 2.0, self.width_m / 2.0 + 1e-9, step_m)
        aa, cc = np.meshgrid(a, c)
        xy = self.centre + aa.reshape(-1, 1) * self.axis + cc.reshape(-1, 1) * self.across
        return np.column_stack([xy, self.roof_z(xy)])


# ----------------------------------------------------------------------------------- road
@dataclass
class Road:
    """A straight paved road (surface on the true ground).

    Attributes
    ----------
    centre
        A point on the road centreline, shape (2,). [m]
    axis
        Unit vector along the road, shape (2,). [-]
    half_length_m
        Half the modelled length (the road is cut to the corridor). [m]
    width_m
        Paved width. [m]
    """

    centre: np.ndarray
    axis: np.ndarray
    half_length_m: float
    width_m: float

    def inside(self, xy: np.ndarray, margin_m: float = 0.0) -> np.ndarray:
        """True for points on the paved surface (grown by ``margin_m``)."""
        r = np.asarray(xy, dtype=float).reshape(-1, 2) - self.centre
        n = np.array([-self.axis[1], self.axis[0]])
        return ((np.abs(r @ n) <= self.width_m / 2.0 + margin_m)
                & (np.abs(r @ self.axis) <= self.half_length_m + margin_m))

    def corners(self) -> np.ndarray:
        """Paved footprint corners, shape (4, 2). [m]"""
        a = self.axis * self.half_length_m
        c = np.array([-self.axis[1], self.axis[0]]) * self.width_m / 2.0
        return np.array([self.centre - a - c, self.centre + a - c, self.centre + a + c,
                         self.centre - a + c])


def noise_points(rng: np.random.Generator, region_xy: np.ndarray, terrain: Terrain,
                 n_high: int, n_low: int) -> tuple[np.ndarray, np.ndarray]:
    """High (in the air) and low (below ground) noise points.

    Returns
    -------
    (high, low)
        Points, shapes (n_high, 3) and (n_low, 3). [m]
    """
    out = []
    for n, lo, hi in ((n_high, 30.0, 120.0), (n_low, -12.0, -1.5)):
        if len(region_xy) == 0 or n == 0:
            out.append(np.zeros((0, 3)))
            continue
        xy = region_xy[rng.integers(0, len(region_xy), n)] + rng.normal(0.0, 2.0, (n, 2))
        z = terrain.height(xy[:, 0], xy[:, 1]) + rng.uniform(lo, hi, n)
        out.append(np.column_stack([xy, z]))
    return out[0], out[1]

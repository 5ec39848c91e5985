"""Structure layouts (where each wire is attached) and structure / insulator points.

A structure's geometry is described as a set of straight members (segments with a radius);
points are sampled along every member at a fixed spacing and scattered over its surface. A
lattice tower is a tapered square body (four legs with cross-bracing) with crossarms; a pole
structure is one tubular pole (or an H-frame of two) with crossarms.

Frame of a structure: ``along`` is the mean line direction through it, ``lateral`` points to
the left of the line direction (looking from the first structure towards the last), ``z`` is
height above the ground at the structure centre. At a bend the crossarm lies on the bisector of
the line angle and lateral offsets are stretched by ``1 / cos(angle / 2)`` so that the phase
spacing measured square to each leg stays the same (common practice, no source).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

STRUCTURE_KINDS = ("lattice", "pole")
ARRANGEMENTS = ("horizontal", "delta")

# Base height of the lowest crossarm above ground before body extensions. [m]
# Common practice (no source): typical 230 kV structure proportions.
_BASE_ARM_HEIGHT_M = {("lattice", "single"): 24.0, ("lattice", "double"): 22.0,
                      ("pole", "single"): 20.0, ("pole", "double"): 18.0}


@dataclass
class Position:
    """One wire position on a structure (a phase or a shield wire).

    Attributes
    ----------
    wire_id
        Phase or shield label ("C1-A", "SW1").
    role
        "phase" or "shield".
    circuit
        Circuit number (1 or 2; 0 for shield wires).
    lateral_m
        Offset of the crossarm tip from the structure axis, positive to the left of the line
        direction, square to the line (before the bend stretch). [m]
    arm_height_m
        Height of the crossarm (or shield peak) above the ground at the structure centre,
        before the body extension. [m]
    """

    wire_id: str
    role: str
    circuit: int
    lateral_m: float
    arm_height_m: float


@dataclass
class Layout:
    """Where the wires sit on one family of structures, plus the outline of the body.

    Attributes
    ----------
    kind, arrangement, circuit
        Structure kind, phase arrangement, "single" or "double".
    positions
        One :class:`Position` per phase and shield wire.
    top_m
        Height of the structure top above ground, before the body extension. [m]
    waist_m
        Height where the tapered lattice body ends (horizontal lattice) or the lowest arm. [m]
    pole_laterals_m
        Lateral positions of the pole(s) of a pole structure. [m]
    """

    kind: str
    arrangement: str
    circuit: str
    positions: list[Position]
    top_m: float
    waist_m: float
    pole_laterals_m: tuple[float, ...] = (0.0,)
    arm_levels: list[tuple[float, float, float]] = field(default_factory=list)
    """Crossarms as (height [m], lateral from [m], lateral to [m])."""


def make_layout(kind: str, circuit: str, arrangement: str, n_shield: int) -> Layout:
    """Crossarm layout of one structure family.

    Parameters
    ----------
    kind
        "lattice" or "pole".
    circuit
        "single" (3 phases) or "double" (6 phases on 3 levels; circuit 1 on the left).
    arrangement
        "horizontal" or "delta" (single circuit only).
    n_shield
        Number of shield wires, 0, 1 or 2.

    Returns
    -------
    Layout
        Phase labels run A, B, C from the left (horizontal) or from the top (delta, double).
    """
    h = _BASE_ARM_HEIGHT_M[(kind, circuit)]
    ph: list[tuple[str, int, float, float]] = []  # (letter, circuit, lateral, height)
    shields: list[tuple[float, float]] = []
    poles: tuple[float, ...] = (0.0,)
    arms: list[tuple[float, float, float]] = []
    if kind == "lattice" and circuit == "single" and arrangement == "horizontal":
        ph = [("A", 1, 7.5, h), ("B", 1, 0.0, h), ("C", 1, -7.5, h)]
        arms = [(h, -8.5, 8.5)]
        shields = {0: [], 1: [(0.0, h + 7.0)], 2: [(4.5, h + 6.5), (-4.5, h + 6.5)]}[n_shield]
        top = {0: h + 1.5, 1: h + 7.0, 2: h + 6.5}[n_shield]
        waist = h - 7.0
    elif kind == "lattice" and circuit == "single":
        ph = [("A", 1, 6.0, h + 7.0), ("B", 1, 7.0, h), ("C", 1, -7.0, h)]
        arms = [(h, -7.0, 7.0), (h + 7.0, 0.0, 6.0)]
        shields = {0: [], 1: [(0.0, h + 13.0)], 2: [(4.0, h + 12.0), (-4.0, h + 12.0)]}[n_shield]
        top = {0: h + 8.0, 1: h + 13.0, 2: h + 12.0}[n_shield]
        waist = h
        if n_shield == 2:
            arms.append((h + 12.0, -4.0, 4.0))
    elif kind == "lattice":
        for letter, dz, arm in (("A", 16.0, 7.0), ("B", 8.0, 8.5), ("C", 0.0, 7.0)):
            ph += [(letter, 1, arm, h + dz), (letter, 2, -arm, h + dz)]
            arms.append((h + dz, -arm, arm))
        shields = {0: [], 1: [(0.0, h + 23.0)], 2: [(5.0, h + 22.0), (-5.0, h + 22.0)]}[n_shield]
        top = {0: h + 17.0, 1: h + 23.0, 2: h + 22.0}[n_shield]
        waist = h
        if n_shield == 2:
            arms.append((h + 22.0, -5.0, 5.0))
    elif circuit == "single" and arrangement == "horizontal":  # H-frame of two poles
        poles = (3.0, -3.0)
        ph = [("A", 1, 6.0, h), ("B", 1, 0.0, h), ("C", 1, -6.0, h)]
        arms = [(h, -7.5, 7.5)]
        shields = {0: [], 1: [(3.0, h + 4.5)], 2: [(3.0, h + 4.5), (-3.0, h + 4.5)]}[n_shield]
        top = h + 4.5 if n_shield else h + 0.5
        waist = h
    elif circuit == "single":  # single pole, delta
        ph = [("A", 1, 1.2, h + 3.0), ("B", 1, 2.8, h), ("C", 1, -2.8, h)]
        arms = [(h, -2.8, 2.8), (h + 3.0, 0.0, 1.2)]
        shields = {0: [], 1: [(0.0, h + 6.0)], 2: [(1.5, h + 6.0), (-1.5, h + 6.0)]}[n_shield]
        top = h + 6.0 if n_shield else h + 3.5
        waist = h
        if n_shield == 2:
            arms.append((h + 6.0, -1.5, 1.5))
    else:  # single pole, double circuit
        for letter, dz, arm in (("A", 9.0, 3.2), ("B", 4.5, 3.6), ("C", 0.0, 3.2)):
            ph += [(letter, 1, arm, h + dz), (letter, 2, -arm, h + dz)]
            arms.append((h + dz, -arm, arm))
        shields = {0: [], 1: [(0.0, h + 13.0)], 2: [(1.5, h + 13.0), (-1.5, h + 13.0)]}[n_shield]
        top = h + 13.0 if n_shield else h + 10.0
        waist = h
        if n_shield == 2:
            arms.append((h + 13.0, -1.5, 1.5))
    positions = [Position(f"C{c}-{letter}", "phase", c, lat, z) for letter, c, lat, z in ph]
    positions.sort(key=lambda p: (p.circuit, p.wire_id))
    positions += [Position(f"SW{i + 1}", "shield", 0, lat, z) for i, (lat, z) in enumerate(shields)]
    return Layout(kind=kind, arrangement=arrangement, circuit=circuit, positions=positions,
                  top_m=top, waist_m=waist, pole_laterals_m=poles, arm_levels=arms)


def insulator_length_m(voltage_kv: float) -> tuple[float, float]:
    """Suspension and dead-end insulator string lengths for a nominal voltage.

    Parameters
    ----------
    voltage_kv
        Nominal phase-to-phase voltage. [kV]

    Returns
    -------
    (suspension, deadend)
        String lengths. [m]

    Notes
    -----
    :math:`L_s = \\max(1.0, 0.0105\\,U + 0.2)`, :math:`L_d = L_s + 0.5`: about 2.6 m for a
    230 kV suspension string (15–16 standard 146 mm discs plus hardware). Common practice
    (no source); only used to place points and attachment heights plausibly.
    """
    suspension = max(1.0, 0.0105 * float(voltage_kv) + 0.2)
    return suspension, suspension + 0.5


def segment_points(rng: np.random.Generator, p0: np.ndarray, p1: np.ndarray,
                   radius_m: np.ndarray, spacing_m: float, noise_m: float) -> np.ndarray:
    """Points along straight members, scattered over their surface.

    Parameters
    ----------
    rng
        Random generator.
    p0, p1
        Member end points, shape (m, 3). [m]
    radius_m
        Member radius (points lie on a cylinder of this radius), shape (m,). [m]
    spacing_m
        Mean spacing of points along a member. [m]
    noise_m
        Standard deviation of the added isotropic noise. [m]

    Returns
    -------
    numpy.ndarray
        Points, shape (n, 3). [m]
    """
    p0 = np.asarray(p0, dtype=float).reshape(-1, 3)
    p1 = np.asarray(p1, dtype=float).reshape(-1, 3)
    d = p1 - p0
    length = np.linalg.norm(d, axis=1)
    n = np.maximum(1, np.round(length / spacing_m)).astype(int)
    idx = np.repeat(np.arange(len(p0)), n)
    t = rng.random(len(idx))
    unit = d / np.maximum(length, 1e-12)[:, None]
    e1 = np.cross(unit, [0.0, 0.0, 1.0])
    small = np.linalg.norm(e1, axis=1) < 1e-6
    e1[small] = [1.0, 0.0, 0.0]
    e1 /= np.linalg.norm(e1, axis=1)[:, None]
    e2 = np.cross(unit, e1)
    ang = rng.uniform(0.0, 2.0 * np.pi, len(idx))
    r = np.asarray(radius_m, dtype=float).reshape(-1)[idx]
    pts = (p0[idx] + t[:, None] * d[idx]
           + (r * np.cos(ang))[:, None] * e1[idx] + (r * np.sin(ang))[:, None] * e2[idx])
    return pts + rng.normal(0.0, noise_m, pts.shape)


def lattice_members(layout: Layout, extension_m: float, foot_z: np.ndarray,
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Members of a lattice tower in its own frame (along, lateral, z above centre ground).

    Parameters
    ----------
    layout
        Structure family.
    extension_m
        Body extension added to every height. [m]
    foot_z
        Height of the ground at the four leg feet relative to the centre, order
        (+a,+b), (+a,-b), (-a,-b), (-a,+b), shape (4,). [m]

    Returns
    -------
    (p0, p1)
        Member end points, each shape (m, 3). [m]
    """
    top = layout.top_m + extension_m
    waist = layout.waist_m + extension_m
    w0 = max(3.0, 0.11 * top)
    w1 = 1.0
    corners = np.array([[1, 1], [1, -1], [-1, -1], [-1, 1]], dtype=float)
    p0: list[np.ndarray] = []
    p1: list[np.ndarray] = []

    def half(z):
        return np.where(z <= waist, w0 + (w1 - w0) * z / waist, w1)

    # Legs, in panels so the cross-bracing shares their nodes.
    n_panel = max(3, int(np.ceil(waist / 3.5)))
    zs = np.linspace(0.0, waist, n_panel + 1)
    zs_feet = zs[None, :] + foot_z[:, None] * (1.0 - zs[None, :] / waist)
    for c in range(4):
        nodes = np.column_stack([corners[c, 0] * half(zs), corners[c, 1] * half(zs), zs_feet[c]])
        p0.append(nodes[:-1])
        p1.append(nodes[1:])
    # Cross-bracing on each face (an X per panel).
    for c in range(4):
        a, b = corners[c], corners[(c + 1) % 4]
        za, zb = zs_feet[c], zs_feet[(c + 1) % 4]
        lo_a = np.column_stack([a[0] * half(zs[:-1]), a[1] * half(zs[:-1]), za[:-1]])
        hi_b = np.column_stack([b[0] * half(zs[1:]), b[1] * half(zs[1:]), zb[1:]])
        lo_b = np.column_stack([b[0] * half(zs[:-1]), b[1] * half(zs[:-1]), zb[:-1]])
        hi_a = np.column_stack([a[0] * half(zs[1:]), a[1] * half(zs[1:]), za[1:]])
        p0 += [lo_a, lo_b]
        p1 += [hi_b, hi_a]
    if layout.arrangement == "horizontal" and layout.circuit == "single":
        # Window: members from the waist corners out to the bridge, bridge, shield peaks.
        h = layout.arm_levels[0][0] + extension_m
        spread = 4.5
        for sa in (1.0, -1.0):
            for sb in (1.0, -1.0):
                p0.append(np.array([[sa * w1, sb * w1, waist]]))
                p1.append(np.array([[sa * w1, sb * spread, h]]))
        for sa in (0.8, -0.8):
            p0.append(np.array([[sa, -spread, h]]))
            p1.append(np.array([[sa, spread, h]]))
        shield_tops = [p.lateral_m for p in layout.positions if p.role == "shield"]
        if len(shield_tops) == 1:
            for sb in (1.0, -1.0):
                p0.append(np.array([[0.0, sb * spread, h]]))
                p1.append(np.array([[0.0, 0.0, top]]))
        else:
            for lat in shield_tops:
                p0.append(np.array([[0.0, lat, h]]))
                p1.append(np.array([[0.0, lat, top]]))
    else:
        # Upper body: square column of half-width w1 up to the top, tapering to 0.4 m.
        for c in range(4):
            p0.append(np.array([[corners[c, 0] * w1, corners[c, 1] * w1, waist]]))
            p1.append(np.array([[corners[c, 0] * 0.4, corners[c, 1] * 0.4, top]]))
    # Crossarms: two bottom chords and a top chord from the body to the tip.
    for z_arm, lat_lo, lat_hi in layout.arm_levels:
        z_arm = z_arm + extension_m
        for tip in (lat_lo, lat_hi):
            if abs(tip) < 1e-9:
                continue
            s = np.sign(tip)
            root = s * w1
            p0.append(np.array([[0.8, root, z_arm], [-0.8, root, z_arm], [0.0, root, z_arm + 2.0]]))
            p1.append(np.array([[0.15, tip, z_arm], [-0.15, tip, z_arm], [0.0, tip, z_arm + 0.3]]))
    return np.vstack(p0), np.vstack(p1)


def pole_members(layout: Layout, extension_m: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Members of a pole structure in its own frame, with their radii.

    Returns
    -------
    (p0, p1, radius)
        Member end points, each shape (m, 3) [m], and member radius, shape (m,) [m].
    """
    top = layout.top_m + extension_m
    p0, p1, rad = [], [], []
    # A tapered pole as stacked 2 m sections, radius 0.40 m at the base to 0.20 m at the top.
    zs = np.arange(0.0, top + 1e-9, 2.0)
    if zs[-1] < top:
        zs = np.append(zs, top)
    for lat in layout.pole_laterals_m:
        p0.append(np.column_stack([np.zeros(len(zs) - 1), np.full(len(zs) - 1, lat), zs[:-1]]))
        p1.append(np.column_stack([np.zeros(len(zs) - 1), np.full(len(zs) - 1, lat), zs[1:]]))
        rad.append(0.40 - 0.20 * (zs[:-1] + zs[1:]) / (2.0 * top))
    for z_arm, lat_lo, lat_hi in layout.arm_levels:
        z_arm = z_arm + extension_m
        p0.append(np.array([[0.0, lat_lo, z_arm]]))
        p1.append(np.array([[0.0, lat_hi, z_arm]]))
        rad.append(np.array([0.10]))
    return np.vstack(p0), np.vstack(p1), np.concatenate(rad)

"""Analytic terrain for synthetic corridors: exact ground height and slope at any point.

The ground is a sum of a mean level, a tilted plane and a few cosine relief waves,

.. math:: z(x, y) = z_0 + g_x x + g_y y + \\sum_k a_k \\cos(k_{x,k} x + k_{y,k} y + \\varphi_k)

in local metres. It is smooth, cheap to evaluate for millions of points and its gradient is
exact, so every other part of the generator (tree bases, structure feet, ground clearance of
the wires) can use the true ground height rather than an interpolated one.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

TERRAIN_KINDS = ("flat", "rolling", "steep")


@dataclass(frozen=True)
class Terrain:
    """Analytic ground surface in local metres.

    Attributes
    ----------
    kind
        "flat", "rolling" or "steep".
    base_z_m
        Mean ground level. [m]
    plane_gradient
        Slope of the tilted plane (dz/dx, dz/dy). [-]
    amplitudes_m
        Amplitude of each relief wave. [m]
    wavevectors_rad_per_m
        Wave vector (k_x, k_y) of each relief wave, shape (k, 2). [rad/m]
    phases_rad
        Phase of each relief wave. [rad]
    """

    kind: str
    base_z_m: float
    plane_gradient: tuple[float, float] = (0.0, 0.0)
    amplitudes_m: tuple[float, ...] = ()
    wavevectors_rad_per_m: tuple[tuple[float, float], ...] = ()
    phases_rad: tuple[float, ...] = ()
    _k: np.ndarray = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        k = np.asarray(self.wavevectors_rad_per_m, dtype=float).reshape(-1, 2)
        if not (len(k) == len(self.amplitudes_m) == len(self.phases_rad)):
            raise ValueError("terrain waves need one amplitude, wave vector and phase each")
        object.__setattr__(self, "_k", k)

    def height(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Ground height at local (x, y).

        Parameters
        ----------
        x, y
            Local coordinates. [m]

        Returns
        -------
        numpy.ndarray
            Ground height, same shape as the broadcast inputs. [m]
        """
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        z = self.base_z_m + self.plane_gradient[0] * x + self.plane_gradient[1] * y
        for a, (kx, ky), p in zip(self.amplitudes_m, self._k, self.phases_rad, strict=True):
            z = z + a * np.cos(kx * x + ky * y + p)
        return z

    def gradient(self, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Exact ground slope (dz/dx, dz/dy) at local (x, y). [-]"""
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        gx = np.full(np.broadcast(x, y).shape, self.plane_gradient[0])
        gy = np.full(gx.shape, self.plane_gradient[1])
        for a, (kx, ky), p in zip(self.amplitudes_m, self._k, self.phases_rad, strict=True):
            s = -a * np.sin(kx * x + ky * y + p)
            gx = gx + s * kx
            gy = gy + s * ky
        return gx, gy

    def to_dict(self) -> dict[str, Any]:
        """JSON-serialisable description from which :meth:`height` can be re-evaluated."""
        return {
            "kind": self.kind,
            "formula": "z = base_z_m + gx*x + gy*y + sum_k a_k*cos(kx_k*x + ky_k*y + phase_k), "
                       "x, y, z in local metres",
            "base_z_m": self.base_z_m,
            "plane_gradient": list(self.plane_gradient),
            "amplitudes_m": list(self.amplitudes_m),
            "wavevectors_rad_per_m": [list(k) for k in self.wavevectors_rad_per_m],
            "phases_rad": list(self.phases_rad),
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Terrain:
        """Rebuild a terrain from :meth:`to_dict` output."""
        return cls(
            kind=data["kind"], base_z_m=float(data["base_z_m"]),
            plane_gradient=tuple(float(v) for v in data["plane_gradient"]),
            amplitudes_m=tuple(float(v) for v in data["amplitudes_m"]),
            wavevectors_rad_per_m=tuple((float(a), float(b))
                                        for a, b in data["wavevectors_rad_per_m"]),
            phases_rad=tuple(float(v) for v in data["phases_rad"]),
        )


def random_terrain(rng: np.random.Generator, kind: str, heading_rad: float) -> Terrain:
    """Draw a terrain of the given kind.

    Parameters
    ----------
    rng
        Random generator (consumed deterministically).
    kind
        "flat" (grades below 1 %), "rolling" (smooth relief, grades mostly below 12 %) or
        "steep" (a ridge and valley across the line with along-line grades up to 24–28 %
        and a cross-slope of 15–18 %; combined grades 15–40 % over most of the corridor).
    heading_rad
        Direction of the line's first leg, counter-clockwise from local +x; the steep relief
        is oriented so that the ridge and valley cross the line. [rad]

    Returns
    -------
    Terrain
    """
    if kind not in TERRAIN_KINDS:
        raise ValueError(f"terrain must be one of {', '.join(TERRAIN_KINDS)}, not {kind!r}")
    base = float(rng.uniform(120.0, 260.0))
    along = np.array([np.cos(heading_rad), np.sin(heading_rad)])
    across = np.array([-along[1], along[0]])

    def waves(n, amp_lo, amp_hi, wl_lo, wl_hi):
        amps = rng.uniform(amp_lo, amp_hi, n)
        wl = rng.uniform(wl_lo, wl_hi, n)
        ang = rng.uniform(0.0, 2.0 * np.pi, n)
        k = (2.0 * np.pi / wl)[:, None] * np.column_stack([np.cos(ang), np.sin(ang)])
        return list(amps), [tuple(v) for v in k], list(rng.uniform(0.0, 2.0 * np.pi, n))

    if kind == "flat":
        g = rng.uniform(-0.003, 0.003, 2)
        a, k, p = waves(3, 0.05, 0.15, 150.0, 400.0)
    elif kind == "rolling":
        g = rng.uniform(-0.01, 0.01, 2)
        a, k, p = waves(5, 1.5, 4.0, 350.0, 1000.0)
    else:
        # Ridge/valley across the line: along-line wave with grade amplitude 2*pi*A/P ~ 0.24-0.28.
        period = float(rng.uniform(800.0, 950.0))
        amp = float(rng.uniform(0.24, 0.28)) * period / (2.0 * np.pi)
        cross = float(rng.uniform(0.15, 0.18)) * rng.choice([-1.0, 1.0])
        g = cross * across
        a, k, p = waves(3, 0.5, 1.5, 200.0, 400.0)
        a.insert(0, amp)
        k.insert(0, tuple(2.0 * np.pi / period * along))
        p.insert(0, float(rng.uniform(0.0, 2.0 * np.pi)))
    return Terrain(kind=kind, base_z_m=base, plane_gradient=(float(g[0]), float(g[1])),
                   amplitudes_m=tuple(float(v) for v in a),
                   wavevectors_rad_per_m=tuple((float(u), float(v)) for u, v in k),
                   phases_rad=tuple(float(v) for v in p))

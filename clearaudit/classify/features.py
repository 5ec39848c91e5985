"""Per-point eigen features of local neighbourhoods (covariance eigenvalues and vectors).

Neighbourhoods are hybrid: the ``k`` nearest points within a radius (scipy ``cKDTree`` queries
run in C on all cores; covariances are formed in vectorised chunks with ``einsum``).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

_CHUNK = 200_000


@dataclass
class EigenFeatures:
    """Eigen features per point.

    Attributes
    ----------
    linearity, planarity, scattering
        :math:`(\\lambda_1-\\lambda_2)/\\lambda_1`, :math:`(\\lambda_2-\\lambda_3)/\\lambda_1`,
        :math:`\\lambda_3/\\lambda_1` with :math:`\\lambda_1 \\ge \\lambda_2 \\ge \\lambda_3`.
    verticality
        :math:`1 - |n_z|` with :math:`n` the normal (smallest eigenvector): 0 on a level
        surface, 1 on a wall.
    direction
        Principal direction (largest eigenvector), unit vectors, shape (n, 3).
    normal
        Smallest eigenvector, shape (n, 3).
    count
        Number of points in the neighbourhood (the point included).
    """

    linearity: np.ndarray
    planarity: np.ndarray
    scattering: np.ndarray
    verticality: np.ndarray
    direction: np.ndarray
    normal: np.ndarray
    count: np.ndarray


def eigen_features(xyz: np.ndarray, radius: float, k: int, workers: int = -1,
                   sparse_radius: float | None = None) -> EigenFeatures:
    """Eigen features of the ``k`` nearest neighbours within ``radius`` of every point.

    Parameters
    ----------
    xyz
        Points. [m], shape (n, 3)
    radius
        Neighbourhood radius. [m]
    k
        Largest number of neighbours (the point itself included).
    workers
        Threads of the tree query (-1 = all cores).
    sparse_radius
        If given, points with fewer than 3 neighbours within ``radius`` are computed again
        with this larger radius (sparse wires, e.g. earth wires). [m]

    Notes
    -----
    Neighbourhoods of two points are perfectly linear (linearity 1); a lone point gets all
    features 0 and ``count`` 1.

    References
    ----------
    Weinmann, M., Jutzi, B., Hinz, S., Mallet, C. (2015). Semantic point cloud interpretation
    based on optimal neighborhoods, relevant features and efficient classifiers. ISPRS Journal
    of Photogrammetry and Remote Sensing 105, 286-304.
    """
    if radius <= 0 or k < 2:
        raise ValueError("feature radius must be positive and k at least 2")
    xyz = np.asarray(xyz, dtype=np.float64)
    n = len(xyz)
    if n == 0:
        z1, z3 = np.zeros(0), np.zeros((0, 3))
        return EigenFeatures(z1, z1, z1, z1, z3, z3, np.zeros(0, np.int32))
    pts = xyz - xyz.mean(axis=0)
    tree = cKDTree(pts)
    k = min(k, n)
    result = _features(pts, tree, np.arange(n), radius, k, workers)
    if sparse_radius is not None and sparse_radius > radius:
        again = np.flatnonzero(result.count < 3)
        if len(again):
            redo = _features(pts, tree, again, sparse_radius, k, workers)
            for name in ("linearity", "planarity", "scattering", "verticality", "direction",
                         "normal", "count"):
                getattr(result, name)[again] = getattr(redo, name)
    return result


def _features(pts: np.ndarray, tree: cKDTree, which: np.ndarray, radius: float, k: int,
              workers: int) -> EigenFeatures:
    """Eigen features of the points ``which`` (vectorised in chunks)."""
    n_all = len(pts)
    n = len(which)
    lin = np.zeros(n)
    pla = np.zeros(n)
    sca = np.zeros(n)
    ver = np.zeros(n)
    direction = np.zeros((n, 3))
    normal = np.zeros((n, 3))
    count = np.zeros(n, dtype=np.int32)
    padded = np.vstack([pts, np.zeros((1, 3))])
    for start in range(0, n, _CHUNK):
        stop = min(n, start + _CHUNK)
        dist, idx = tree.query(pts[which[start:stop]], k=k, distance_upper_bound=radius,
                               workers=workers)
        if k == 1:
            dist, idx = dist[:, None], idx[:, None]
        valid = np.isfinite(dist)
        cnt = valid.sum(axis=1)
        nb = padded[np.where(valid, idx, n_all)]  # (m, k, 3); padding rows are masked
        w = valid[..., None].astype(np.float64)
        mean = (nb * w).sum(axis=1) / cnt[:, None]
        d = (nb - mean[:, None, :]) * w
        cov = np.einsum("mki,mkj->mij", d, d) / cnt[:, None, None]
        vals, vecs = np.linalg.eigh(cov)  # ascending
        l1 = vals[:, 2]
        l2 = np.maximum(vals[:, 1], 0.0)
        l3 = np.maximum(vals[:, 0], 0.0)
        ok = l1 > 1e-12
        safe = np.where(ok, l1, 1.0)
        sl = slice(start, stop)
        lin[sl] = np.where(ok, (l1 - l2) / safe, 0.0)
        pla[sl] = np.where(ok, (l2 - l3) / safe, 0.0)
        sca[sl] = np.where(ok, l3 / safe, 0.0)
        direction[sl] = vecs[:, :, 2]
        normal[sl] = vecs[:, :, 0]
        ver[sl] = np.where(ok, 1.0 - np.abs(vecs[:, 2, 0]), 0.0)
        count[sl] = cnt
    return EigenFeatures(lin, pla, sca, ver, direction, normal, count)

"""Per-point eigen features of local neighbourhoods (covariance eigenvalues and vectors).

Neighbourhoods are hybrid: the ``k`` nearest points within a radius. Their covariance moments
come from one compiled pass over a grid of cells (:class:`clearaudit.classify.neighbours.
NeighbourGrid`: the neighbour sets of scipy's ``cKDTree`` query, the moments reduced in the
same pass); the eigen pairs come in closed form. Both run in chunks on a thread pool (the
kernel and numpy release the GIL) when more than one thread is allowed; every value is computed
per point, so the result does not depend on the thread count or the chunk size.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..threads import inner_threads, run_chunks
from .kernels import sym3_finish, sym3_prepare
from .neighbours import NeighbourGrid

_CHUNK = 65_536  # points per chunk of the eigen pass (cache friendly temporaries)


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


def feature_threads(workers: int = -1) -> int:
    """Threads the eigen features may use (always ≥ 1).

    Parameters
    ----------
    workers
        A positive count is used as given; -1 means :func:`clearaudit.threads.inner_threads`
        (one inside a tile thread of the in-process engine; else the run's ``--threads``, the
        ``CLEARAUDIT_THREADS`` environment variable — a local Dask cluster sets 1 in each
        worker — or every core this process may run on).
    """
    if workers == 0 or workers < -1:
        raise ValueError("workers must be -1 (automatic) or a positive thread count")
    if workers > 0:
        return int(workers)
    return inner_threads()


def eigen_features(xyz: np.ndarray, radius: float, k: int, workers: int = -1,
                   sparse_radius: float | None = None,
                   which: np.ndarray | None = None) -> EigenFeatures:
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
        Threads (-1 = automatic, see :func:`feature_threads`). With 1 everything runs in the calling thread;
        the result is the same for every thread count.
    sparse_radius
        If given, points with fewer than 3 neighbours within ``radius`` are computed again
        with this larger radius (sparse wires, e.g. earth wires). [m]
    which
        If given, the features of these points only (indices into ``xyz``; their
        neighbours are taken among all points); the result has one row per index.

    Notes
    -----
    Neighbourhoods of two points are perfectly linear (linearity 1); a lone point gets all
    features 0 and ``count`` 1. The covariance of a neighbourhood is taken about its query
    point :math:`\\mathbf q` (small numbers, no cancellation):
    :math:`C = \\tfrac1n\\sum_i \\mathbf d_i\\mathbf d_i^T - \\bar{\\mathbf d}\\bar{\\mathbf d}^T`
    with :math:`\\mathbf d_i = \\mathbf p_i - \\mathbf q`.

    References
    ----------
    Weinmann, M., Jutzi, B., Hinz, S., Mallet, C. (2015). Semantic point cloud interpretation
    based on optimal neighborhoods, relevant features and efficient classifiers. ISPRS Journal
    of Photogrammetry and Remote Sensing 105, 286-304.
    """
    if radius <= 0 or k < 2:
        raise ValueError("feature radius must be positive and k at least 2")
    threads = feature_threads(workers)
    xyz = np.asarray(xyz, dtype=np.float64)
    n = len(xyz)
    rows = None if which is None else np.asarray(which, dtype=np.int64)
    m = n if rows is None else len(rows)
    if n == 0 or m == 0:
        z1, z3 = np.zeros(m), np.zeros((m, 3))
        return EigenFeatures(z1, z1.copy(), z1.copy(), z1.copy(), z3, z3.copy(),
                             np.zeros(m, np.int32))
    pts = xyz - xyz.mean(axis=0)
    # cells of the feature radius: one cell each way for it, a few for the sparse radius
    grid = NeighbourGrid(pts, radius)
    del pts
    k = min(k, n)
    result = _features(grid, rows, radius, k, threads)
    if sparse_radius is not None and sparse_radius > radius:
        again = np.flatnonzero(result.count < 3)
        if len(again):
            redo = _features(grid, again if rows is None else rows[again], sparse_radius, k,
                             threads)
            for name in ("linearity", "planarity", "scattering", "verticality", "direction",
                         "normal", "count"):
                getattr(result, name)[again] = getattr(redo, name)
    return result


def _features(grid: NeighbourGrid, rows: np.ndarray | None, radius: float, k: int,
              threads: int) -> EigenFeatures:
    """Eigen features of the points ``rows`` (None: all) of ``grid``.

    The points are visited cell by cell (:meth:`NeighbourGrid.walk`) in chunks on
    ``threads``; per chunk the neighbourhood moments come from :meth:`NeighbourGrid.moments`
    (about each neighbourhood's mean, reduced relative to its query point) and the eigen pairs
    from the closed form of :func:`sym3_eigen`, computed by two compiled passes around numpy's
    ``arccos`` and ``cos`` (``kernels.sym3_prepare`` / ``sym3_finish``: the same numbers);
    rows it cannot resolve fall back to ``numpy.linalg.eigh``. Every output row depends on
    its own point only.
    """
    positions, dest = grid.walk(rows)
    n = len(positions)
    lin = np.zeros(n)
    pla = np.zeros(n)
    sca = np.zeros(n)
    ver = np.zeros(n)
    direction = np.zeros((n, 3))
    normal = np.zeros((n, 3))
    count = np.zeros(n, dtype=np.int32)

    def write(rows: np.ndarray, vals: np.ndarray, v_small: np.ndarray,
              v_large: np.ndarray) -> None:
        """The features of eigen pairs (ascending values) into the rows ``rows``."""
        l1 = vals[:, 2]
        l2 = np.maximum(vals[:, 1], 0.0)
        l3 = np.maximum(vals[:, 0], 0.0)
        ok = l1 > 1e-12
        safe = np.where(ok, l1, 1.0)
        lin[rows] = np.where(ok, (l1 - l2) / safe, 0.0)
        pla[rows] = np.where(ok, (l2 - l3) / safe, 0.0)
        sca[rows] = np.where(ok, l3 / safe, 0.0)
        direction[rows] = v_large
        normal[rows] = v_small
        ver[rows] = np.where(ok, 1.0 - np.abs(v_small[:, 2]), 0.0)

    def chunk(start: int, stop: int) -> None:
        cnt, cov = grid.moments(positions[start:stop], radius, k)
        at = dest[start:stop]  # the rows these results belong to
        m = len(cnt)
        # sym3_eigen's closed form in two compiled passes around numpy's arccos and cosines;
        # the second writes the features of every row straight into place
        q, p, c = np.empty(m), np.empty(m), np.empty(m)
        sym3_prepare(cov, q, p, c)
        phi = np.arccos(c) / 3.0
        bad = np.empty(m, np.uint8)
        sym3_finish(cov, q, p, np.cos(phi), np.cos(phi + 2.0 * np.pi / 3.0), at, lin, pla,
                    sca, ver, direction, normal, bad)
        bad = bad.view(bool)
        if bad.any():  # a repeated extreme eigenvalue or a zero matrix: the general solver
            full = cov[bad][:, [0, 1, 2, 1, 3, 4, 2, 4, 5]].reshape(-1, 3, 3)
            bvals, bvecs = np.linalg.eigh(full)  # ascending
            write(at[bad], bvals, bvecs[:, :, 0], bvecs[:, :, 2])
        count[at] = cnt

    run_chunks(chunk, n, _CHUNK, threads)
    return EigenFeatures(lin, pla, sca, ver, direction, normal, count)


def sym3_eigen(cov: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    r"""Eigenvalues and the extreme eigenvectors of many symmetric 3 × 3 matrices, closed form.

    Parameters
    ----------
    cov
        Upper triangles ``(xx, xy, xz, yy, yz, zz)``, shape (m, 6).

    Returns
    -------
    values, v_small, v_large, unresolved
        Eigenvalues in ascending order (m, 3); unit eigenvectors of the smallest and of the
        largest eigenvalue (m, 3) each; rows whose eigenvectors are not resolved (a repeated
        extreme eigenvalue or a zero matrix — use a general solver there).

    Notes
    -----
    With :math:`q = \operatorname{tr}A/3`, :math:`p = \sqrt{\lVert A - qI\rVert_F^2/6}`,
    :math:`B = (A - qI)/p` and :math:`\varphi = \arccos(\det B / 2)/3`, the eigenvalues are
    :math:`q + 2p\cos\varphi` (largest), :math:`q + 2p\cos(\varphi + 2\pi/3)` (smallest)
    and the trace remainder. An eigenvector of :math:`\lambda` is the longest cross product of
    two rows of :math:`A - \lambda I`.

    References
    ----------
    Smith, O. K. (1961). Eigenvalues of a symmetric 3 × 3 matrix. Communications of the ACM
    4(4), 168.
    """
    cov = np.asarray(cov, dtype=np.float64)
    return _sym3_eigen(*(np.ascontiguousarray(cov[:, i]) for i in range(6)))


def _sym3_eigen(xx: np.ndarray, xy: np.ndarray, xz: np.ndarray, yy: np.ndarray,
                yz: np.ndarray, zz: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """:func:`sym3_eigen` on the six moments as separate 1D arrays (component-wise)."""
    q = (xx + yy + zz) / 3.0
    axx, ayy, azz = xx - q, yy - q, zz - q
    p = np.sqrt((axx * axx + ayy * ayy + azz * azz + 2.0 * (xy * xy + xz * xz + yz * yz)) / 6.0)
    inv = 1.0 / np.where(p > 0, p, 1.0)
    bxx, byy, bzz, bxy, bxz, byz = axx * inv, ayy * inv, azz * inv, xy * inv, xz * inv, yz * inv
    del axx, ayy, azz, inv
    det = (bxx * (byy * bzz - byz * byz) - bxy * (bxy * bzz - byz * bxz)
           + bxz * (bxy * byz - byy * bxz))
    del bxx, byy, bzz, bxy, bxz, byz
    phi = np.arccos(np.clip(det / 2.0, -1.0, 1.0)) / 3.0
    large = q + 2.0 * p * np.cos(phi)
    small = q + 2.0 * p * np.cos(phi + 2.0 * np.pi / 3.0)
    values = np.stack([small, 3.0 * q - large - small, large], axis=1)

    def vector(lam: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        # rows r0 = (a0, a1, a2), r1 = (b0, b1, b2), r2 = (c0, c1, c2) of A - lam I; squared
        # norms summed as (x0² + x2²) + x1², the order numpy's einsum uses for three terms, so
        # the vectors equal those of the former einsum form bit for bit
        a0, a1, a2 = xx - lam, xy, xz
        b0, b1, b2 = xy, yy - lam, yz
        c0, c1, c2 = xz, yz, zz - lam
        best = None
        for u, w in (((a0, a1, a2), (b0, b1, b2)), ((a0, a1, a2), (c0, c1, c2)),
                     ((b0, b1, b2), (c0, c1, c2))):
            cross = (u[1] * w[2] - u[2] * w[1], u[2] * w[0] - u[0] * w[2],
                     u[0] * w[1] - u[1] * w[0])
            norm2 = (cross[0] * cross[0] + cross[2] * cross[2]) + cross[1] * cross[1]
            if best is None:
                best, best_norm2 = list(cross), norm2
            else:  # the first longest candidate wins ties
                longer = norm2 > best_norm2
                for j in range(3):
                    np.copyto(best[j], cross[j], where=longer)
                np.copyto(best_norm2, norm2, where=longer)
        scale = (((a0 * a0 + a2 * a2) + a1 * a1) + ((b0 * b0 + b2 * b2) + b1 * b1)
                 + ((c0 * c0 + c2 * c2) + c1 * c1))
        ok = best_norm2 > 1e-18 * scale * scale + 1e-300
        norm = np.sqrt(np.where(ok, best_norm2, 1.0))
        return np.stack([best[0] / norm, best[1] / norm, best[2] / norm], axis=1), ok

    v_small, ok_small = vector(small)
    v_large, ok_large = vector(large)
    return values, v_small, v_large, ~(ok_small & ok_large)

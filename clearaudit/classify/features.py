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
from .kernels import eigen_rows, sym3_pairs, sym3_prepare
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
        (inside a tile thread of the in-process engine its share of the pool: one while
        tiles wait, more at the end of a stage; else the run's ``--threads``, the
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
    from the closed form of :func:`sym3_eigen` (rows it cannot resolve fall back to
    ``numpy.linalg.eigh``). Every output row depends on its own point only.
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

    def chunk(start: int, stop: int) -> None:
        cnt, cov = grid.moments(positions[start:stop], radius, k)
        at = dest[start:stop]  # the rows these results belong to
        vals, v_small, v_large, bad = sym3_eigen(cov)
        if bad.any():  # a repeated extreme eigenvalue or a zero matrix: the general solver
            full = cov[bad][:, [0, 1, 2, 1, 3, 4, 2, 4, 5]].reshape(-1, 3, 3)
            bvals, bvecs = np.linalg.eigh(full)  # ascending
            vals[bad] = bvals
            v_small[bad] = bvecs[:, :, 0]
            v_large[bad] = bvecs[:, :, 2]
        # l1 >= l2 >= l3 (l2, l3 at least 0); where l1 > 1e-12: linearity (l1 - l2) / l1,
        # planarity (l2 - l3) / l1, scattering l3 / l1, verticality 1 - |n_z| (else 0),
        # written with the vectors and counts to their rows in one compiled pass
        eigen_rows(vals, v_small, v_large, cnt, np.ascontiguousarray(at, dtype=np.int64),
                   lin, pla, sca, ver, direction, normal, count)

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

    The arithmetic runs in two compiled passes (``kernels.sym3_prepare``, before the arccos,
    and ``kernels.sym3_pairs``, after the cosines), each operation in the order of the former
    numpy form (the same numbers); ``arccos`` and ``cos`` are numpy's own.

    References
    ----------
    Smith, O. K. (1961). Eigenvalues of a symmetric 3 × 3 matrix. Communications of the ACM
    4(4), 168.
    """
    cov = np.ascontiguousarray(cov, dtype=np.float64).reshape(-1, 6)
    m = len(cov)
    q, p, c = np.empty(m), np.empty(m), np.empty(m)
    sym3_prepare(cov, q, p, c)
    phi = np.arccos(c) / 3.0
    values, v_small, v_large = np.empty((m, 3)), np.empty((m, 3)), np.empty((m, 3))
    bad = np.empty(m, np.uint8)
    sym3_pairs(cov, q, p, np.cos(phi), np.cos(phi + 2.0 * np.pi / 3.0), values, v_small,
               v_large, bad)
    return values, v_small, v_large, bad.view(bool)

"""Closed-form eigen pairs of the neighbourhood covariances (``classify.features``)."""
from __future__ import annotations

import numpy as np
import pytest

from clearaudit.classify.features import eigen_features, sym3_eigen


def _random_covariances(rng: np.random.Generator, m: int) -> np.ndarray:
    # shapes met in a corridor: lines (one large eigenvalue), planes (two), blobs (three)
    axes = rng.normal(size=(m, 3, 3))
    q, _ = np.linalg.qr(axes)
    scales = rng.choice([1e-4, 1e-2, 1.0], size=(m, 3)) * rng.uniform(0.5, 2.0, (m, 3))
    a = np.einsum("mij,mj,mkj->mik", q, scales, q)
    return a[:, [0, 0, 0, 1, 1, 2], [0, 1, 2, 1, 2, 2]], a


def test_sym3_eigen_matches_lapack():
    # reference: numpy.linalg.eigh (LAPACK syevd), a general-purpose solver from PyPI
    rng = np.random.default_rng(3)
    upper, full = _random_covariances(rng, 20_000)
    vals, v_small, v_large, bad = sym3_eigen(upper)
    ref_vals, ref_vecs = np.linalg.eigh(full)
    ok = ~bad
    assert ok.mean() > 0.999
    scale = ref_vals[:, 2:3]
    assert np.max(np.abs(vals[ok] - ref_vals[ok]) / scale[ok]) < 1e-7
    # eigenvectors agree up to sign wherever the eigenvalue is separated from its neighbour
    gap_small = (ref_vals[:, 1] - ref_vals[:, 0]) / scale[:, 0] > 1e-6
    gap_large = (ref_vals[:, 2] - ref_vals[:, 1]) / scale[:, 0] > 1e-6
    dot_s = np.abs(np.einsum("mj,mj->m", v_small, ref_vecs[:, :, 0]))
    dot_l = np.abs(np.einsum("mj,mj->m", v_large, ref_vecs[:, :, 2]))
    assert dot_s[ok & gap_small].min() > 1 - 1e-9
    assert dot_l[ok & gap_large].min() > 1 - 1e-9
    assert np.allclose(np.linalg.norm(v_small[ok], axis=1), 1.0)


def test_sym3_eigen_textbook_example():
    # A = [[2, 1, 0], [1, 2, 0], [0, 0, 3]] has eigenvalues 1, 3, 3 — worked by hand
    # (characteristic polynomial (3 - l)((2 - l)^2 - 1)), eigenvector of 1: (1, -1, 0)/sqrt 2;
    # the repeated eigenvalue 3 has a plane of eigenvectors: any returned one must lie in it
    a = np.array([[2.0, 1.0, 0.0], [1.0, 2.0, 0.0], [0.0, 0.0, 3.0]])
    vals, v_small, v_large, bad = sym3_eigen(np.array([[2.0, 1.0, 0.0, 2.0, 0.0, 3.0]]))
    assert np.allclose(vals, [[1.0, 3.0, 3.0]])
    assert np.allclose(np.abs(v_small), [[np.sqrt(0.5), np.sqrt(0.5), 0.0]])
    assert bad[0] or np.allclose(a @ v_large[0], 3.0 * v_large[0], atol=1e-6)
    # a zero matrix (a lone point) has no defined vectors: flagged
    assert sym3_eigen(np.zeros((1, 6)))[3][0]


def test_features_of_a_line_a_plane_and_a_lone_point():
    # geometry by construction: points on a straight wire are linear, on a roof planar
    rng = np.random.default_rng(1)
    t = np.linspace(0, 20, 80)
    line = np.c_[t, 0.3 * t, 10 + 0.01 * rng.normal(size=80)]
    u, v = rng.uniform(0, 6, (2, 400))
    plane = np.c_[u + 50, v, 5 + 0.2 * u]
    lone = np.array([[200.0, 200.0, 0.0]])
    f = eigen_features(np.vstack([line, plane, lone]), radius=1.25, k=20)
    assert np.median(f.linearity[:80]) > 0.95
    d = f.direction[5:75]
    assert np.all(np.abs(d @ (np.array([1.0, 0.3, 0.0]) / np.hypot(1, 0.3))) > 0.99)
    # 20 random points of a plane: lambda2/lambda1 scatters about 0.6, lambda3 is ~0
    assert np.median(f.planarity[80:480]) > 0.4
    assert np.median(f.scattering[80:480]) < 1e-3
    n = np.array([-0.2, 0.0, 1.0]) / np.hypot(0.2, 1.0)
    assert np.median(np.abs(f.normal[80:480] @ n)) > 0.99
    assert f.count[-1] == 1 and f.linearity[-1] == 0.0


def _numpy_closed_form(cov):
    """The closed form as numpy arrays: the implementation the compiled passes replaced,
    kept here as the reference for their exactness (same operations, same order)."""
    xx, xy, xz, yy, yz, zz = (np.ascontiguousarray(cov[:, i]) for i in range(6))
    q = (xx + yy + zz) / 3.0
    axx, ayy, azz = xx - q, yy - q, zz - q
    p = np.sqrt((axx * axx + ayy * ayy + azz * azz + 2.0 * (xy * xy + xz * xz + yz * yz)) / 6.0)
    inv = 1.0 / np.where(p > 0, p, 1.0)
    bxx, byy, bzz, bxy, bxz, byz = axx * inv, ayy * inv, azz * inv, xy * inv, xz * inv, yz * inv
    det = (bxx * (byy * bzz - byz * byz) - bxy * (bxy * bzz - byz * bxz)
           + bxz * (bxy * byz - byy * bxz))
    phi = np.arccos(np.clip(det / 2.0, -1.0, 1.0)) / 3.0
    large = q + 2.0 * p * np.cos(phi)
    small = q + 2.0 * p * np.cos(phi + 2.0 * np.pi / 3.0)
    values = np.stack([small, 3.0 * q - large - small, large], axis=1)

    def vector(lam):
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


def test_compiled_eigen_passes_equal_the_numpy_closed_form():
    # reference: the numpy closed form above (itself checked against LAPACK in the first
    # test of this file, before the compiled passes existed): the same numbers, row by row
    rng = np.random.default_rng(21)
    upper, _ = _random_covariances(rng, 5000)
    special = np.array([[0.0] * 6,                          # a lone point
                        [1.0, 0.0, 0.0, 1.0, 0.0, 1.0],     # a sphere: all equal
                        [2.0, 1.0, 0.0, 2.0, 0.0, 3.0],     # repeated largest eigenvalue
                        [1e-20, 0.0, 0.0, 0.0, 0.0, 0.0],   # a tiny line
                        [np.nan, 0.0, 0.0, 1.0, 0.0, 1.0]])  # not a number
    cov = np.ascontiguousarray(np.vstack([upper, special]))
    vals, v_small, v_large, bad = sym3_eigen(cov)
    ref_vals, ref_small, ref_large, ref_bad = _numpy_closed_form(cov)
    assert np.array_equal(bad, ref_bad) and ref_bad[-5:-3].all()
    assert np.array_equal(vals, ref_vals, equal_nan=True)
    assert np.array_equal(v_small, ref_small, equal_nan=True)
    assert np.array_equal(v_large, ref_large, equal_nan=True)


def test_compiled_feature_rows_equal_the_numpy_form():
    # reference: the numpy form the kernel replaced (features._features before it), byte for
    # byte: negative and NaN eigenvalues, l1 at and below 1e-12, -0.0, rows written scattered
    from clearaudit.classify.kernels import eigen_rows

    rng = np.random.default_rng(8)
    n, m = 3000, 4000
    vals = np.sort(rng.normal(size=(n, 3)), axis=1)
    vals[:50] = [-1e-3, -0.0, 2.0]
    vals[50:60, 2] = 1e-12
    vals[60:70, 2] = 1e-13
    vals[70:75] = np.nan
    vals[75:80, 1] = np.nan
    v_small = rng.normal(size=(n, 3))
    v_small[80:90, 2] = -0.0
    v_large = rng.normal(size=(n, 3))
    cnt = rng.integers(0, 21, n).astype(np.int32)
    at = rng.permutation(m)[:n].astype(np.int64)
    got = [np.zeros(m) for _ in range(4)] + [np.zeros((m, 3)), np.zeros((m, 3)),
                                             np.zeros(m, np.int32)]
    eigen_rows(vals, v_small, v_large, cnt, at, *got)
    ref = [np.zeros(m) for _ in range(4)] + [np.zeros((m, 3)), np.zeros((m, 3)),
                                             np.zeros(m, np.int32)]
    lin, pla, sca, ver, direction, normal, count = ref
    with np.errstate(invalid="ignore"):
        l1 = vals[:, 2]
        l2 = np.maximum(vals[:, 1], 0.0)
        l3 = np.maximum(vals[:, 0], 0.0)
        ok = l1 > 1e-12
        safe = np.where(ok, l1, 1.0)
        lin[at] = np.where(ok, (l1 - l2) / safe, 0.0)
        pla[at] = np.where(ok, (l2 - l3) / safe, 0.0)
        sca[at] = np.where(ok, l3 / safe, 0.0)
        direction[at] = v_large
        normal[at] = v_small
        ver[at] = np.where(ok, 1.0 - np.abs(v_small[:, 2]), 0.0)
        count[at] = cnt
    for a, b in zip(got, ref, strict=True):
        assert a.tobytes() == b.tobytes()
    with pytest.raises(IndexError):
        eigen_rows(vals, v_small, v_large, cnt, np.full(n, m, np.int64), *got)

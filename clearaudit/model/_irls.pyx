# cython: boundscheck=False, wraparound=False, cdivision=True, initializedcheck=False
"""Compiled Tukey-biweight IRLS polynomial fit (:func:`clearaudit.model.wires.robust_polyfit`).

The wire separation fits two low-degree polynomials per group of points, ten reweighting
iterations each: in numpy every iteration was a handful of small-array calls and a
least-squares solve, a millisecond a fit in Python overhead. Here one call runs all
iterations without the GIL. Each iteration solves the weighted normal equations by Cholesky
(the design is a Vandermonde matrix of stations scaled to [-1, 1], degree <= 3: well
conditioned); a (near) singular system is reported, and the caller falls back to numpy's
least squares, which returns the minimum-norm solution there.
"""
from libc.math cimport fabs, sqrt
from libc.stdlib cimport free, malloc


cdef double _select(double *a, Py_ssize_t n, Py_ssize_t k) noexcept nogil:
    """The k-th smallest of a[0:n] (0-based), a partitioned around it (Hoare quickselect):
    a[:k] <= a[k] <= a[k+1:]."""
    cdef Py_ssize_t lo = 0, hi = n - 1, i, j, mid
    cdef double pivot, t
    while lo < hi:
        mid = lo + (hi - lo) // 2
        # median of three as the pivot
        if a[mid] < a[lo]:
            t = a[mid]; a[mid] = a[lo]; a[lo] = t
        if a[hi] < a[lo]:
            t = a[hi]; a[hi] = a[lo]; a[lo] = t
        if a[hi] < a[mid]:
            t = a[hi]; a[hi] = a[mid]; a[mid] = t
        pivot = a[mid]
        i = lo
        j = hi
        while i <= j:
            while a[i] < pivot:
                i += 1
            while a[j] > pivot:
                j -= 1
            if i <= j:
                t = a[i]; a[i] = a[j]; a[j] = t
                i += 1
                j -= 1
        if k <= j:
            hi = j
        elif k >= i:
            lo = i
        else:
            return a[k]
    return a[k]


cdef double _median(double *a, Py_ssize_t n) noexcept nogil:
    """numpy.median of a[0:n] (n >= 1, no NaN): the middle value, or the mean of the two
    middle ones computed as numpy does ((lower + upper) / 2); a is reordered."""
    cdef double lower, upper
    cdef Py_ssize_t i, h
    if n % 2:
        return _select(a, n, (n - 1) // 2)
    h = n // 2
    lower = _select(a, n, h - 1)
    upper = a[h]
    for i in range(h + 1, n):
        if a[i] < upper:
            upper = a[i]
    return (lower + upper) / 2.0


def irls_polyfit(const double[::1] xn, const double[::1] y, int degree, int iterations,
                 double tuning, double min_scale, double[::1] coef, double[::1] w) -> int:
    """Tukey-biweight IRLS fit of y by a polynomial in xn (coefficients highest power first).

    ``coef`` (degree + 1) and ``w`` (len(xn)) receive the last solution and weights; ``w``
    starts at one. Returns 0 when the iterations ran, 1 when the weights summed below
    degree + 1 (``coef`` holds the last solution; the caller resets the weights), 2 when a
    system was singular (the caller refits with least squares).
    """
    cdef Py_ssize_t n = xn.shape[0], i, a, b, m
    cdef int k = degree + 1, it, status = 0
    if degree < 0 or degree > 3 or y.shape[0] != n or w.shape[0] != n or coef.shape[0] != k:
        raise ValueError("irls_polyfit: degree 0..3 and matching lengths")
    if n == 0:
        raise ValueError("irls_polyfit needs at least one sample")
    cdef double M[4][4]
    cdef double L[4][4]
    cdef double rhs[4]
    cdef double p[4]
    cdef double wi, s, r, u, scale, total, diag_max
    cdef double *res = <double *> malloc(n * sizeof(double))
    cdef double *work = <double *> malloc(n * sizeof(double))
    if not res or not work:
        free(res); free(work)
        raise MemoryError()
    with nogil:
        for i in range(n):
            w[i] = 1.0
        for it in range(iterations):
            for a in range(k):
                rhs[a] = 0.0
                for b in range(k):
                    M[a][b] = 0.0
            for i in range(n):
                wi = w[i]
                if wi == 0.0:
                    continue
                # p = (xn^degree, ..., xn, 1): numpy.vander's column order
                p[k - 1] = 1.0
                for a in range(k - 2, -1, -1):
                    p[a] = p[a + 1] * xn[i]
                for a in range(k):
                    s = wi * p[a]
                    rhs[a] += s * y[i]
                    for b in range(a + 1):
                        M[a][b] += s * p[b]
            # Cholesky M = L L^T; a pivot below 1e-12 of the largest diagonal: singular
            diag_max = 0.0
            for a in range(k):
                if M[a][a] > diag_max:
                    diag_max = M[a][a]
            for a in range(k):
                for b in range(a + 1):
                    s = M[a][b]
                    for m in range(b):
                        s -= L[a][m] * L[b][m]
                    if a == b:
                        if not (s > 1e-12 * diag_max):
                            status = 2
                            break
                        L[a][a] = sqrt(s)
                    else:
                        L[a][b] = s / L[b][b]
                if status:
                    break
            if status:
                break
            for a in range(k):  # L z = rhs
                s = rhs[a]
                for m in range(a):
                    s -= L[a][m] * p[m]
                p[a] = s / L[a][a]
            for a in range(k - 1, -1, -1):  # L^T c = z
                s = p[a]
                for m in range(a + 1, k):
                    s -= L[m][a] * coef[m]
                coef[a] = s / L[a][a]
            # residuals; the robust scale from those of the points still weighted
            m = 0
            for i in range(n):
                s = coef[0]
                for a in range(1, k):
                    s = s * xn[i] + coef[a]
                r = y[i] - s
                res[i] = r
                if w[i] > 0.0:
                    work[m] = fabs(r)
                    m += 1
            if m == 0:
                for i in range(n):
                    work[i] = fabs(res[i])
                m = n
            scale = 1.4826 * _median(work, m)
            if scale < min_scale:
                scale = min_scale
            total = 0.0
            for i in range(n):
                u = res[i] / (tuning * scale)
                if fabs(u) < 1.0:
                    w[i] = (1.0 - u * u) * (1.0 - u * u)
                else:
                    w[i] = 0.0
                total += w[i]
            if total < k:
                status = 1
                break
    free(res)
    free(work)
    return status

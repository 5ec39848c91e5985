# cython: boundscheck=False, wraparound=False, cdivision=True, initializedcheck=False
"""Compiled residuals and least-squares loop of the catenary fit (:mod:`clearaudit.physics.fit`).

``catenary_residuals``: the model of :func:`clearaudit.physics.fit._curve` (tilted catenary in
its span frame) and the first-order normal distances of the points from it, for several
parameter vectors in one call. ``minimise``: the damped Gauss-Newton loop described in
``fit._minimise`` (steps, tests and termination), whole in compiled code.
Both run without the GIL, so fits on several threads share the cores. The operations of the
model and their order are those of ``_curve``; the transcendental functions are the C
library's.
"""
from libc.math cimport asinh, atan, cos, exp, fabs, hypot, INFINITY, isfinite, log1p, sin, sinh, sqrt
from libc.stdlib cimport free, malloc
from libc.string cimport memcpy


cdef void _row(const double *s, const double *v, const double *z, Py_ssize_t n, double span,
               const double *p, double lateral_weight, double *out) noexcept nogil:
    """Residuals of one parameter vector p = (z_a, z_b, ln C, y_a, y_b, tilt): out[:n]
    lateral (times lateral_weight), out[n:] vertical."""
    cdef Py_ssize_t i
    cdef double z_a = p[0], z_b = p[1], constant = exp(p[2]), y_a = p[3], y_b = p[4]
    cdef double tilt = p[5]
    cdef double h = z_b - z_a
    cdef double sin_t = sin(tilt), cos_t = cos(tilt)
    cdef double plane_span = hypot(span, h * sin_t)
    cdef double plane_h = h * cos_t
    cdef double scale = plane_span / span
    cdef double half = 0.5 / constant
    cdef double x0 = 0.5 * plane_span - constant * asinh(plane_h * half / sinh(plane_span * half))
    cdef double dy = y_b - y_a
    cdef double xi, height, deflection, lateral, zc, d_slope, dv, dz
    for i in range(n):
        xi = s[i] * scale
        height = 2.0 * constant * sinh((xi - 2.0 * x0) * half) * sinh(xi * half)
        deflection = plane_h * xi / plane_span - height
        lateral = y_a + dy * s[i] / span + deflection * sin_t
        zc = z_a + h * s[i] / span - deflection * cos_t
        d_slope = (plane_h / plane_span - sinh((xi - x0) / constant)) * scale
        dv = dy / span + d_slope * sin_t
        dz = h / span - d_slope * cos_t
        out[i] = lateral_weight * ((v[i] - lateral) / sqrt(1.0 + dv * dv))
        out[n + i] = (z[i] - zc) / sqrt(1.0 + dz * dz)


def catenary_residuals(const double[::1] s, const double[::1] v, const double[::1] z,
                       double span, const double[:, ::1] params, double lateral_weight,
                       double[:, ::1] out) -> None:
    """``out[r, :n]`` lateral and ``out[r, n:]`` vertical residuals of parameter row ``r``
    ``(z_a, z_b, ln C, y_a, y_b, tilt)`` at the points (station s, lateral v, height z); the
    lateral ones times ``lateral_weight``."""
    cdef Py_ssize_t n = s.shape[0], k = params.shape[0], r
    if v.shape[0] != n or z.shape[0] != n or params.shape[1] != 6 \
            or out.shape[0] != k or out.shape[1] != 2 * n:
        raise ValueError("catenary_residuals: mismatched shapes")
    if n == 0:
        return
    with nogil:
        for r in range(k):
            _row(&s[0], &v[0], &z[0], n, span, &params[r, 0], lateral_weight, &out[r, 0])


#: the robust losses of scipy.optimize.least_squares, by number
LOSSES = {"linear": 0, "soft_l1": 1, "huber": 2, "cauchy": 3, "arctan": 4}


cdef inline void _loss(int loss, double zz, double *rho0, double *rho1, double *rho2) noexcept nogil:
    cdef double t, root
    if loss == 1:
        t = 1.0 + zz
        root = sqrt(t)
        rho0[0] = 2.0 * (root - 1.0)
        rho1[0] = 1.0 / root
        rho2[0] = -0.5 / (t * root)
    elif loss == 2:
        if zz <= 1.0:
            rho0[0] = zz
            rho1[0] = 1.0
            rho2[0] = 0.0
        else:
            root = sqrt(zz)
            rho0[0] = 2.0 * root - 1.0
            rho1[0] = 1.0 / root
            rho2[0] = -0.5 / (zz * root)
    elif loss == 3:
        t = 1.0 + zz
        rho0[0] = log1p(zz)
        rho1[0] = 1.0 / t
        rho2[0] = -1.0 / (t * t)
    elif loss == 4:
        t = 1.0 + zz * zz
        rho0[0] = atan(zz)
        rho1[0] = 1.0 / t
        rho2[0] = -2.0 * zz / (t * t)
    else:
        rho0[0] = zz
        rho1[0] = 1.0
        rho2[0] = 0.0


cdef struct _Fit:
    const double *s
    const double *v
    const double *z
    Py_ssize_t n
    double span
    double lateral_weight
    int k            # parameters fitted (5, or 6 with the tilt)
    int loss
    double f_scale


cdef double _evaluate(_Fit *f, const double *x, double *r, double *psi, double *weight
                      ) noexcept nogil:
    """Residuals, psi = rho' r and the Gauss-Newton weights at x; returns the cost (inf when
    not finite)."""
    cdef double p[6]
    cdef Py_ssize_t i, m = 2 * f.n
    cdef double zz, rho0, rho1, rho2, w, total = 0.0, q
    cdef double eps = 2.220446049250313e-16
    for i in range(6):
        p[i] = x[i] if i < f.k else 0.0
    _row(f.s, f.v, f.z, f.n, f.span, p, f.lateral_weight, r)
    for i in range(m):
        q = r[i] / f.f_scale
        zz = q * q
        _loss(f.loss, zz, &rho0, &rho1, &rho2)
        total += rho0
        psi[i] = rho1 * r[i]
        w = rho1 + 2.0 * rho2 * zz
        weight[i] = w if w > eps else eps   # np.maximum(w, eps); NaN -> eps is never used
    total = 0.5 * f.f_scale * f.f_scale * total
    return total if isfinite(total) else INFINITY


cdef void _jacobian(_Fit *f, const double *x, const double *r, const double *upper,
                    double *jac, double *work) noexcept nogil:
    """Forward differences (scipy's rule): jac[j * m + i] = d r_i / d x_j."""
    cdef double p[6]
    cdef Py_ssize_t i, m = 2 * f.n
    cdef int j, a
    cdef double step, ax, shifted
    cdef double sqrt_eps = 1.4901161193847656e-08
    for j in range(f.k):
        for a in range(6):
            p[a] = x[a] if a < f.k else 0.0
        ax = fabs(x[j])
        step = sqrt_eps * (ax if ax > 1.0 else 1.0)
        if not (x[j] + step <= upper[j]):
            step = -step
        shifted = x[j] + step
        step = shifted - x[j]
        p[j] = shifted
        _row(f.s, f.v, f.z, f.n, f.span, p, f.lateral_weight, work)
        for i in range(m):
            jac[j * m + i] = (work[i] - r[i]) / step


cdef int _cholesky_solve(double *A, int k, double *b) noexcept nogil:
    """Solve A y = b in place (A symmetric, k x k row-major, overwritten); 0 ok, 1 not positive
    definite."""
    cdef int a, c, m
    cdef double s
    for a in range(k):
        for c in range(a + 1):
            s = A[a * k + c]
            for m in range(c):
                s -= A[a * k + m] * A[c * k + m]
            if a == c:
                if not (s > 0.0):
                    return 1
                A[a * k + a] = sqrt(s)
            else:
                A[a * k + c] = s / A[c * k + c]
    for a in range(k):
        s = b[a]
        for m in range(a):
            s -= A[a * k + m] * b[m]
        b[a] = s / A[a * k + a]
    for a in range(k - 1, -1, -1):
        s = b[a]
        for m in range(a + 1, k):
            s -= A[m * k + a] * b[m]
        b[a] = s / A[a * k + a]
    return 0


def minimise(const double[::1] s, const double[::1] v, const double[::1] z, double span,
             double lateral_weight, double[::1] x, const double[::1] lower,
             const double[::1] upper, const double[::1] scales, int loss, double f_scale,
             double ftol, double xtol, double gtol, int max_nfev):
    """The loop of ``fit._minimise`` on x (updated in place; 5 or 6 parameters).

    Returns (status, cost, nfev, njev): status 1 gradient small, 2 cost change small, 3 step
    small, 0 evaluations exhausted.
    """
    cdef int k = x.shape[0]
    cdef Py_ssize_t n = s.shape[0], m = 2 * n, i
    if k < 1 or k > 6 or lower.shape[0] != k or upper.shape[0] != k or scales.shape[0] != k \
            or v.shape[0] != n or z.shape[0] != n or n == 0 or loss < 0 or loss > 4:
        raise ValueError("minimise: mismatched arguments")
    cdef _Fit f
    f.s = &s[0]
    f.v = &v[0]
    f.z = &z[0]
    f.n = n
    f.span = span
    f.lateral_weight = lateral_weight
    f.k = k
    f.loss = loss
    f.f_scale = f_scale
    cdef double *buf = <double *> malloc((7 * m + k * m) * sizeof(double))
    if not buf:
        raise MemoryError()
    cdef double *r = buf
    cdef double *psi = buf + m
    cdef double *weight = buf + 2 * m
    cdef double *r_new = buf + 3 * m
    cdef double *psi_new = buf + 4 * m
    cdef double *weight_new = buf + 5 * m
    cdef double *work = buf + 6 * m
    cdef double *jac = buf + 7 * m
    cdef double gradient[6]
    cdef double hessian[36]
    cdef double system[36]
    cdef double rhs[6]
    cdef double dx[6]
    cdef double x_new[6]
    cdef int free_idx[6]
    cdef int nfree, a, c, status = 0, nfev, njev
    cdef bint stepped, small_step, usable
    cdef double cost, cost_new, damping = -1.0, growth = 2.0, g, gmax, dmax, t
    cdef double norm_dx, norm_x, predicted, actual, ratio, previous, factor
    with nogil:
        for a in range(k):
            if x[a] < lower[a]:
                x[a] = lower[a]
            if x[a] > upper[a]:
                x[a] = upper[a]
        cost = _evaluate(&f, &x[0], r, psi, weight)
        nfev = 1
        njev = 1
        _jacobian(&f, &x[0], r, &upper[0], jac, work)
        while nfev < max_nfev and isfinite(cost):  # a start that does not evaluate: status 0
            usable = True
            for a in range(k):
                g = 0.0
                for i in range(m):
                    g += jac[a * m + i] * psi[i]
                gradient[a] = g
                usable = usable and isfinite(g)
                for c in range(a + 1):
                    t = 0.0
                    for i in range(m):
                        t += jac[a * m + i] * weight[i] * jac[c * m + i]
                    hessian[a * 6 + c] = t
                    hessian[c * 6 + a] = t
                    usable = usable and isfinite(t)
            if not usable:  # no usable slope or curvature: not converged (status 0)
                break
            nfree = 0
            gmax = 0.0
            for a in range(k):
                if (x[a] <= lower[a] and gradient[a] > 0) or (x[a] >= upper[a] and gradient[a] < 0):
                    continue
                free_idx[nfree] = a
                nfree += 1
                g = fabs(gradient[a] * scales[a])
                if g > gmax:
                    gmax = g
            if gmax < gtol:
                status = 1
                break
            if damping < 0:
                dmax = 0.0
                for a in range(nfree):
                    t = hessian[free_idx[a] * 6 + free_idx[a]] * scales[free_idx[a]] \
                        * scales[free_idx[a]]
                    if t > dmax:
                        dmax = t
                damping = 1e-3 * (dmax if dmax > 1e-12 else 1e-12)
            stepped = False
            while nfev < max_nfev:
                for a in range(nfree):
                    rhs[a] = -(gradient[free_idx[a]] * scales[free_idx[a]])
                    for c in range(nfree):
                        system[a * nfree + c] = hessian[free_idx[a] * 6 + free_idx[c]] \
                            * scales[free_idx[a]] * scales[free_idx[c]]
                    system[a * nfree + a] += damping
                if _cholesky_solve(system, nfree, rhs):
                    damping *= growth
                    growth *= 2.0
                    if not isfinite(damping):  # no damping makes the system solvable
                        break
                    continue
                for a in range(k):
                    dx[a] = 0.0
                for a in range(nfree):
                    dx[free_idx[a]] = rhs[a] * scales[free_idx[a]]
                norm_dx = 0.0
                norm_x = 0.0
                for a in range(k):
                    t = x[a] + dx[a]
                    if t < lower[a]:
                        t = lower[a]
                    if t > upper[a]:
                        t = upper[a]
                    x_new[a] = t
                    dx[a] = t - x[a]
                    norm_dx += dx[a] * dx[a]
                    norm_x += x[a] * x[a]
                small_step = sqrt(norm_dx) <= xtol * (xtol + sqrt(norm_x))
                predicted = 0.0
                for a in range(k):
                    t = 0.0
                    for c in range(k):
                        t += hessian[a * 6 + c] * dx[c]
                    predicted += gradient[a] * dx[a] + 0.5 * dx[a] * t
                predicted = -predicted
                cost_new = _evaluate(&f, x_new, r_new, psi_new, weight_new)
                nfev += 1
                actual = cost - cost_new
                if predicted > 0 and actual > 1e-4 * predicted:
                    ratio = actual / predicted
                    factor = 1.0 - (2.0 * ratio - 1.0) ** 3
                    damping *= factor if factor > 1.0 / 3.0 else 1.0 / 3.0
                    growth = 2.0
                    for a in range(k):
                        x[a] = x_new[a]
                    memcpy(r, r_new, m * sizeof(double))
                    memcpy(psi, psi_new, m * sizeof(double))
                    memcpy(weight, weight_new, m * sizeof(double))
                    previous = cost
                    cost = cost_new
                    stepped = True
                    if actual < ftol * previous:
                        status = 2
                    elif small_step:
                        status = 3
                    break
                if small_step:
                    status = 3
                    break
                damping *= growth
                growth *= 2.0
            if status or not stepped:
                break
            _jacobian(&f, &x[0], r, &upper[0], jac, work)
            njev += 1
    free(buf)
    return status, cost, nfev, njev

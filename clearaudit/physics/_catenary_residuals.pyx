# cython: boundscheck=False, wraparound=False, cdivision=True, initializedcheck=False
"""Compiled residuals of the catenary fit (:class:`clearaudit.physics.fit._Problem`).

The model of :func:`clearaudit.physics.fit._curve` (tilted catenary in its span frame) and
the first-order normal distances of the points from it, for several parameter vectors in one
call and without the GIL: the least-squares loop evaluates the residuals and their
finite-difference Jacobian a few times per span, and in numpy each evaluation was some
twenty array operations with their temporaries. The operations and their order are those of
``_curve``; the transcendental functions are the C library's.
"""
from libc.math cimport asinh, cos, exp, hypot, sin, sinh, sqrt


def catenary_residuals(const double[::1] s, const double[::1] v, const double[::1] z,
                       double span, const double[:, ::1] params, double lateral_weight,
                       double[:, ::1] out) -> None:
    """``out[r, :n]`` lateral and ``out[r, n:]`` vertical residuals of parameter row ``r``
    ``(z_a, z_b, ln C, y_a, y_b, tilt)`` at the points (station s, lateral v, height z); the
    lateral ones times ``lateral_weight``."""
    cdef Py_ssize_t n = s.shape[0], k = params.shape[0], r, i
    if v.shape[0] != n or z.shape[0] != n or params.shape[1] != 6 \
            or out.shape[0] != k or out.shape[1] != 2 * n:
        raise ValueError("catenary_residuals: mismatched shapes")
    cdef double z_a, z_b, constant, y_a, y_b, tilt, h, sin_t, cos_t, plane_span, plane_h
    cdef double scale, half, x0, xi, height, deflection, lateral, zc, d_slope, dv, dz
    cdef double dy
    with nogil:
        for r in range(k):
            z_a = params[r, 0]
            z_b = params[r, 1]
            constant = exp(params[r, 2])
            y_a = params[r, 3]
            y_b = params[r, 4]
            tilt = params[r, 5]
            h = z_b - z_a
            sin_t = sin(tilt)
            cos_t = cos(tilt)
            plane_span = hypot(span, h * sin_t)
            plane_h = h * cos_t
            scale = plane_span / span
            half = 0.5 / constant
            x0 = 0.5 * plane_span - constant * asinh(plane_h * half / sinh(plane_span * half))
            dy = y_b - y_a
            for i in range(n):
                xi = s[i] * scale
                height = 2.0 * constant * sinh((xi - 2.0 * x0) * half) * sinh(xi * half)
                deflection = plane_h * xi / plane_span - height
                lateral = y_a + dy * s[i] / span + deflection * sin_t
                zc = z_a + h * s[i] / span - deflection * cos_t
                d_slope = (plane_h / plane_span - sinh((xi - x0) / constant)) * scale
                dv = dy / span + d_slope * sin_t
                dz = h / span - d_slope * cos_t
                out[r, i] = lateral_weight * ((v[i] - lateral) / sqrt(1.0 + dv * dv))
                out[r, n + i] = (z[i] - zc) / sqrt(1.0 + dz * dz)

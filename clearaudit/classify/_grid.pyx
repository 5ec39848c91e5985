# cython: language_level=3, boundscheck=False, wraparound=False, cdivision=True, initializedcheck=False
"""Compiled per-point kernels of :mod:`clearaudit.classify.grid`.

Built with ``-ffp-contract=off``: every product and sum is rounded on its own in the grid's
precision, in the order the numpy form of the same formula used, so the values are the same.
"""
from libc.math cimport NAN
from libc.stdint cimport int32_t, int64_t

ctypedef fused real:
    float
    double

ctypedef fused index:
    int32_t
    int64_t


def bilinear(const real[::1] grid, const index[::1] k00, const float[::1] wa,
             const float[::1] wb, const unsigned char[::1] outside, Py_ssize_t row,
             real[::1] out):
    """``out[i]``: the grid (flat, rows of ``row`` cells) at point ``i`` — lower cell centre
    ``k00[i]``, weights ``wa[i]`` (across rows) and ``wb[i]`` (along a row); NaN outside.

    ``lower = (v01 - v00) b + v00``, ``upper = (v11 - v10) b + v10``,
    ``value = (upper - lower) a + lower``, in the grid's precision.
    """
    cdef Py_ssize_t n = k00.shape[0]
    if wa.shape[0] != n or wb.shape[0] != n or outside.shape[0] != n or out.shape[0] != n:
        raise ValueError("the point arrays must have the same length")
    cdef Py_ssize_t size = grid.shape[0]
    cdef Py_ssize_t i, k
    cdef real a, b, v00, lower, upper
    for i in range(n):
        if k00[i] < 0 or k00[i] + row + 1 >= size:
            raise IndexError("a point's cell is outside the grid")
    with nogil:
        for i in range(n):
            if outside[i]:
                out[i] = NAN
                continue
            k = k00[i]
            a = <real> wa[i]
            b = <real> wb[i]
            v00 = grid[k]
            lower = grid[k + 1] - v00
            lower = lower * b
            lower = lower + v00
            v00 = grid[k + row]
            upper = grid[k + row + 1] - v00
            upper = upper * b
            upper = upper + v00
            upper = upper - lower
            upper = upper * a
            out[i] = upper + lower

# cython: language_level=3, boundscheck=False, wraparound=False, cdivision=True, initializedcheck=False
"""Entropy coding of single layers of a LAZ 1.4 chunk (point formats 6-10, layered chunks).

A layered LAZ chunk stores each attribute of its points in its own arithmetic-coded layer, so
a copy of a compressed file that changes only the class codes and appends extra bytes can
keep every other layer's bytes as they are and code just these:

* the classification layer of the point record (item POINT14, version 3), and
* one layer per extra byte (item BYTE14, version 3).

The coder is the adaptive multi-symbol range coder of the LAZ format (32-bit base and length,
15-bit distributions, 256-symbol models updated on a growing cycle, halved past 2**15
counts), with the contexts the format defines for these two layers. Chunks whose points
change scanner channel are not handled here (the copy then re-compresses every point).

References
----------
ASPRS, LAS Specification 1.4 R15 (2019): point formats 6-10, extra bytes.
M. Isenburg, "LASzip: lossless compression of LiDAR data", Photogrammetric Engineering &
Remote Sensing 79(2), 2013, 209-217 (the LAZ format and its layered chunks).
A. Said, "Introduction to arithmetic coding - theory and practice", HP Labs HPL-2004-76
(the range coder with periodic model updates that the LAZ format adopts).
"""
from libc.stdint cimport uint8_t, uint32_t
from libc.stdlib cimport free, malloc
from libc.string cimport memset

import numpy as np

cdef enum:
    SYMBOLS = 256
    LENGTH_SHIFT = 15           # bits of the length dropped before the product
    MAX_COUNT = 1 << 15         # counts are halved past this total
    MIN_LENGTH = 0x01000000     # renormalise below this length


cdef struct Model:
    uint32_t distribution[SYMBOLS]
    uint32_t symbol_count[SYMBOLS]
    uint32_t total_count
    uint32_t update_cycle
    uint32_t symbols_until_update


cdef struct Encoder:
    uint8_t* out
    Py_ssize_t pos
    uint32_t base
    uint32_t length


cdef void _model_update(Model* m) noexcept nogil:
    cdef uint32_t k, total = 0, acc = 0, scale
    m.total_count += m.update_cycle
    if m.total_count > MAX_COUNT:
        for k in range(SYMBOLS):
            m.symbol_count[k] = (m.symbol_count[k] + 1) >> 1
            total += m.symbol_count[k]
        m.total_count = total
    scale = 0x80000000U // m.total_count
    for k in range(SYMBOLS):
        m.distribution[k] = (scale * acc) >> (31 - LENGTH_SHIFT)
        acc += m.symbol_count[k]
    m.update_cycle = (5 * m.update_cycle) >> 2
    if m.update_cycle > ((SYMBOLS + 6) << 3):
        m.update_cycle = (SYMBOLS + 6) << 3
    m.symbols_until_update = m.update_cycle


cdef void _model_init(Model* m) noexcept nogil:
    cdef uint32_t k
    for k in range(SYMBOLS):
        m.symbol_count[k] = 1
    m.total_count = 0
    m.update_cycle = SYMBOLS
    _model_update(m)
    m.update_cycle = (SYMBOLS + 6) >> 1
    m.symbols_until_update = m.update_cycle


cdef inline void _carry(Encoder* e) noexcept nogil:
    cdef Py_ssize_t p = e.pos - 1
    while e.out[p] == 0xFF:
        e.out[p] = 0
        p -= 1
    e.out[p] += 1


cdef inline void _renormalise(Encoder* e) noexcept nogil:
    while True:
        e.out[e.pos] = <uint8_t>(e.base >> 24)
        e.pos += 1
        e.base <<= 8
        e.length <<= 8
        if e.length >= MIN_LENGTH:
            break


cdef inline void _encode(Encoder* e, Model* m, uint32_t sym) noexcept nogil:
    cdef uint32_t x, before = e.base
    if sym == SYMBOLS - 1:
        x = m.distribution[sym] * (e.length >> LENGTH_SHIFT)
        e.base += x
        e.length -= x
    else:
        e.length >>= LENGTH_SHIFT
        x = m.distribution[sym] * e.length
        e.base += x
        e.length = m.distribution[sym + 1] * e.length - x
    if before > e.base:
        _carry(e)
    if e.length < MIN_LENGTH:
        _renormalise(e)
    m.symbol_count[sym] += 1
    m.symbols_until_update -= 1
    if m.symbols_until_update == 0:
        _model_update(m)


cdef void _finish(Encoder* e) noexcept nogil:
    cdef uint32_t before = e.base
    cdef bint another = True
    if e.length > 2 * <uint32_t>MIN_LENGTH:
        e.base += MIN_LENGTH
        e.length = MIN_LENGTH >> 1
    else:
        e.base += MIN_LENGTH >> 1
        e.length = MIN_LENGTH >> 9
        another = False
    if before > e.base:
        _carry(e)
    _renormalise(e)
    e.out[e.pos] = 0
    e.out[e.pos + 1] = 0
    e.pos += 2
    if another:
        e.out[e.pos] = 0
        e.pos += 1


cdef inline void _start(Encoder* e, uint8_t* out) noexcept nogil:
    e.out = out
    e.pos = 0
    e.base = 0
    e.length = 0xFFFFFFFFU


cdef Py_ssize_t _class_layer(const uint8_t* returns, const uint8_t* classes, Py_ssize_t n,
                             Model* models, uint8_t* ready, uint8_t* out,
                             bint* changed) noexcept nogil:
    """Code classes 1 ... n-1 (point 0 is stored raw) into ``out``; its length."""
    cdef Encoder e
    cdef Py_ssize_t i
    cdef uint32_t last = classes[0], r, k, ccc
    cdef bint single
    _start(&e, out)
    changed[0] = False
    memset(ready, 0, 64)
    for i in range(1, n):
        r = returns[i] & 0x0F
        k = returns[i] >> 4
        single = r == 1 and r >= k        # first and last return of its pulse
        ccc = ((last & 0x1F) << 1) + single
        if not ready[ccc]:
            _model_init(&models[ccc])
            ready[ccc] = 1
        _encode(&e, &models[ccc], classes[i])
        if classes[i] != last:
            changed[0] = True
        last = classes[i]
    _finish(&e)
    return e.pos


cdef Py_ssize_t _byte_layer(const uint8_t* column, Py_ssize_t stride, Py_ssize_t n,
                            Model* model, uint8_t* out) noexcept nogil:
    """Code the differences of one extra byte from point to point into ``out``."""
    cdef Encoder e
    cdef Py_ssize_t i
    cdef uint8_t last = column[0], value
    _start(&e, out)
    _model_init(model)
    for i in range(1, n):
        value = column[i * stride]
        _encode(&e, model, <uint8_t>(value - last))
        last = value
    _finish(&e)
    return e.pos


def layer_capacity(Py_ssize_t n):
    """Bytes that always hold one coded layer of ``n`` points (at most two bytes a symbol,
    one symbol a point, and the closing bytes)."""
    return 2 * n + 16


def code_chunk_layers(const uint8_t[::1] returns, const uint8_t[::1] classes,
                      const uint8_t[:, ::1] extra, uint8_t[::1] out, long long[::1] sizes):
    """Code the classification layer and one layer per column of ``extra`` for one chunk.

    Parameters
    ----------
    returns
        Each point's return byte of point formats 6-10 (return number in bits 0-3, number of
        returns in bits 4-7), shape (n,).
    classes
        The class code each point gets, shape (n,). Point 0 is the chunk's raw first point.
    extra
        The extra bytes each point gets, (n, k) (k layers, may be 0).
    out
        Output buffer of at least ``(k + 1) * layer_capacity(n)`` bytes; the layers are
        written one after the other.
    sizes
        (k + 1,) output: each layer's length in bytes, the classification layer first.

    Returns
    -------
    bool
        Whether any point's class differs from the class before it; when not, the format
        stores the classification layer with length 0 (the first point's class holds for
        all) and ``sizes[0]`` is still the coded length.
    """
    cdef Py_ssize_t n = classes.shape[0], k = extra.shape[1], j, at, cap
    cdef bint changed = False
    cdef Model* models
    cdef uint8_t ready[64]
    if returns.shape[0] != n or (extra.shape[0] != n and k > 0) or n < 1:
        raise ValueError("returns, classes and extra need one row per point (at least one)")
    cap = layer_capacity(n)
    if out.shape[0] < (k + 1) * cap or sizes.shape[0] != k + 1:
        raise ValueError("output buffer or sizes too small")
    models = <Model*>malloc(64 * sizeof(Model))
    if models == NULL:
        raise MemoryError()
    try:
        with nogil:
            sizes[0] = _class_layer(&returns[0], &classes[0], n, models, ready, &out[0],
                                    &changed)
            at = sizes[0]
            for j in range(k):
                sizes[j + 1] = _byte_layer(&extra[0, j], k, n, &models[0], &out[at])
                at += sizes[j + 1]
    finally:
        free(models)
    return bool(changed)

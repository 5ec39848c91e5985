"""Large buffers written to files in pieces of at most :data:`PIECE_BYTES`.

On the Linux machines the benchmarks ran on (ext4, kernel 6.18), one ``write`` call of more
than 1 MiB to a new file took about seven times as long per byte as the same bytes written
1 MiB at a time: 10.4 MB in 16-22 ms against 2.4-3.3 ms (pieces of 64 KiB to 1 MiB alike,
2 MiB and more as slow as one call; the cause was not established). The work folder's files
(the cells' point records, the raw-record scratch, the tiles' per-point arrays) and the
larger outputs (classified.laz's chunks, model.json, the GeoJSON layers, the report) are
written that way; reading is not affected (10 GB/s from the page cache whatever the read
size).
"""
from __future__ import annotations

from pathlib import Path
from typing import Any, BinaryIO

import numpy as np

#: The largest piece handed to one ``write`` call. [bytes]
PIECE_BYTES = 1 << 20


def write_pieces(fh: BinaryIO, data: Any) -> int:
    """Write the bytes of ``data`` (a contiguous array, ``bytes`` or another buffer) to the
    binary file ``fh`` in pieces of at most :data:`PIECE_BYTES`; returns the bytes written.

    The same bytes as ``fh.write(data)``; an error of the file (a full disk) is raised as
    ``fh.write`` raises it.
    """
    if isinstance(data, np.ndarray):
        if not data.flags.c_contiguous:
            raise ValueError("write_pieces needs a C-contiguous array")
        data = data.reshape(-1).view(np.uint8)
    view = memoryview(data).cast("B")
    n = len(view)
    for start in range(0, n, PIECE_BYTES):
        fh.write(view[start:start + PIECE_BYTES])
    return n


def save_array(target: str | Path | BinaryIO, array: np.ndarray) -> None:
    """``numpy.save(target, array)`` for an array of plain values, its data written in pieces
    (:func:`write_pieces`): the same ``.npy`` file (format 1.0), read back by ``numpy.load``.

    ``target`` is a path (``.npy`` is not appended) or an open binary file.
    """
    a = np.ascontiguousarray(array)
    if a.dtype.hasobject:
        raise ValueError("save_array does not write object arrays")
    if isinstance(target, (str, Path)):
        with open(target, "wb") as fh:
            _write_npy(fh, a)
    else:
        _write_npy(target, a)


def write_text(path: str | Path, text: str, encoding: str = "utf-8") -> None:
    """``Path(path).write_text(text, encoding=encoding)`` with the encoded bytes written in
    pieces (:func:`write_pieces`): a model.json of 20 MB (the 100 M-point survey's) went to
    the file in one call."""
    with open(path, "wb") as fh:
        write_pieces(fh, text.encode(encoding))


def _write_npy(fh: BinaryIO, a: np.ndarray) -> None:
    np.lib.format.write_array_header_1_0(fh, np.lib.format.header_data_from_array_1_0(a))
    write_pieces(fh, a)


__all__ = ["PIECE_BYTES", "save_array", "write_pieces", "write_text"]

"""The classified copy of layered LAZ inputs, made without decoding or re-coding their points.

A LAZ 1.4 file of point format 6, 7 or 8 is cut into chunks whose points are stored
attribute by attribute, each attribute in its own arithmetic-coded layer (x/y with the
returns and scanner channel, z, classification, flags, intensity, scan angle, user data,
point source, GPS time, colours, one layer per extra byte). The classified copy changes
only the class codes and appends new extra dimensions (height above ground), so each chunk
of the output is the input chunk with

* the first point's raw record carrying its new class and extra bytes,
* the classification layer coded anew,
* one layer per byte of the new extra dimensions coded anew (appended, or in place of
  those of an input dimension with the same name and layout: a classified copy read again),

and every other layer's bytes copied as they are. What the new layers need of the points —
their return byte (the classification layer's context) and their original class (kept where
no new class is given) — is kept in the record scratch while the inputs are read, with the
integer bounds of their coordinates for the header (see :class:`~clearaudit.io.las.RecordScratch`).
The result decodes to the same points as a full re-compression, and for inputs written by
the same LAZ implementation as laspy's backend it is the same bytes
(``tests/test_lazcopy.py``).

Used when every input is such a file with the same point format, extra bytes, scales and
offsets, and the output holds the inputs' records as a byte prefix; a chunk whose points
change scanner channel makes the writer fall back to decoding the inputs (two LAZ
implementations differ in how they carry extra-byte contexts across channels).

References
----------
ASPRS, LAS Specification 1.4 R15 (2019), point formats 6-10 and extra bytes (section 2.6).
M. Isenburg, "LASzip: lossless compression of LiDAR data", Photogrammetric Engineering &
Remote Sensing 79(2), 2013, 209-217.
"""
from __future__ import annotations

import struct
from collections.abc import Callable, Iterator, Sequence
from copy import deepcopy
from dataclasses import dataclass
from pathlib import Path
from typing import Any, BinaryIO

import laspy
import numpy as np

from ..errors import InputError
from .files import write_pieces

#: Byte positions (in a point format 6-10 record) of the return byte, the flags byte (the
#: scanner channel in bits 4-5) and the class code: what the scratch keeps of each point.
SIDE_BYTES = slice(14, 17)
SIDE_SIZE = 3
#: LAZ item types (laszip.org) of the point formats this copy handles, version 3 (layered):
#: point 14, RGB 14, RGB + NIR 14, extra bytes 14.
_POINT14, _RGB14, _RGBNIR14, _BYTE14 = 10, 11, 12, 14
#: Layers of each item type (point 14: x/y/returns/channel, z, classification, flags,
#: intensity, scan angle, user data, point source, GPS time; RGB + NIR: colour, NIR).
_ITEM_LAYERS = {_POINT14: 9, _RGB14: 1, _RGBNIR14: 2}
#: Position of the classification layer among a chunk's layers.
_CLASS_LAYER = 2
#: Layered chunked compression (the LAZ compressor id of point formats 6-10).
_LAYERED_CHUNKED = 3
#: The chunk size a laszip record gives for chunks of varying size.
VARIABLE_CHUNKS = 0xFFFFFFFF


class ChannelsChange(ValueError):
    """A chunk's points change scanner channel (the copy leaves such inputs to a full
    re-compression)."""


def laszip_items(header: Any) -> tuple[int, int, list[tuple[int, int, int]]] | None:
    """(compressor, chunk size, [(item type, size, version)]) of a LAZ header's laszip
    record, or None for an uncompressed file or a laszip record too short to hold them (the
    reader then reports the file)."""
    if not header.are_points_compressed:
        return None
    found = header.vlrs.get("LasZipVlr")
    if not found:
        return None
    data = bytes(found[0].record_data)
    if len(data) < 34 or len(data) < 34 + 6 * struct.unpack_from("<H", data, 32)[0]:
        return None
    compressor, = struct.unpack_from("<H", data, 0)
    chunk_size, = struct.unpack_from("<I", data, 12)
    count, = struct.unpack_from("<H", data, 32)
    items = [struct.unpack_from("<3H", data, 34 + 6 * i) for i in range(count)]
    return compressor, chunk_size, items


def blocker(headers: Sequence[Any]) -> str | None:
    """Why the compressed layers of these inputs cannot be copied (None: they can).

    Every input must be a LAZ file of point format 6, 7 or 8 with layered chunks, all with
    the same point format, extra bytes, scales and offsets.
    """
    if not headers:
        return "no input"
    first = headers[0]
    for header in headers:
        if int(header.point_count) == 0:
            return "an input holds no points"
        laz = laszip_items(header)
        if laz is None:
            return "an input is not compressed"
        compressor, _, items = laz
        if compressor != _LAYERED_CHUNKED:
            return "an input is not a layered LAZ (point formats 6-10)"
        if any(version != 3 or kind not in (*_ITEM_LAYERS, _BYTE14)
               for kind, _, version in items):
            return "an input has LAZ items this copy does not handle (e.g. waveforms)"
        if header.point_format.id not in (6, 7, 8):
            return f"point format {header.point_format.id} (the copy handles 6, 7 and 8)"
        if (header.point_format.id != first.point_format.id
                or header.point_format.dtype() != first.point_format.dtype()):
            return "the inputs differ in point format or extra bytes"
        if (np.any(np.asarray(header.scales) != np.asarray(first.scales))
                or np.any(np.asarray(header.offsets) != np.asarray(first.offsets))):
            return "the inputs differ in scale or offset"
    return None


def _chunk_layer_count(items: list[tuple[int, int, int]]) -> int:
    """Layers per chunk for the laszip items (extra bytes: one layer per byte)."""
    return sum(_ITEM_LAYERS.get(kind, size if kind == _BYTE14 else 0) for kind, size, _ in items)


class _SideReader:
    """Reads the scratch's kept bytes of one input, point range after point range."""

    def __init__(self, ranges: list[tuple[Path, int]]):
        self._files = iter(ranges)
        self._fh: BinaryIO | None = None

    def read(self, m: int) -> np.ndarray:
        out = np.empty(m * SIDE_SIZE, dtype=np.uint8)
        view = memoryview(out)
        filled = 0
        while filled < len(view):
            if self._fh is None:
                path, _ = next(self._files)
                self._fh = open(path, "rb", buffering=0)  # noqa: SIM115 - closed in close()
            got = self._fh.readinto(view[filled:])
            if not got:
                self._fh.close()
                self._fh = None
                continue
            filled += got
        return out.reshape(m, SIDE_SIZE)

    def close(self) -> None:
        if self._fh is not None:
            self._fh.close()
            self._fh = None


def _chunk_table(fh: BinaryIO, header: Any, path: Path
                 ) -> tuple[list[int], int, list[int]]:
    """Byte sizes of an input's chunks, where the first chunk starts, and the point counts
    the table gives (the chunk size each, unless the chunks vary in size)."""
    import lazrs

    fh.seek(header.offset_to_point_data)
    try:
        vlr = lazrs.LazVlr(bytes(header.vlrs.get("LasZipVlr")[0].record_data))
        table = lazrs.read_chunk_table(fh, vlr)
    except Exception as exc:  # lazrs raises its own error types
        raise InputError(path, f"its LAZ chunk table cannot be read ({exc})") from None
    if table is None:
        raise InputError(path, "has no LAZ chunk table")
    return [int(nbytes) for _, nbytes in table], fh.tell(), [int(n) for n, _ in table]


def _region_dtype(start: int, out_dtype: np.dtype, names: set[str]) -> np.dtype:
    """The named fields of the output record from byte ``start`` on, as a record of their own
    (the other bytes of the region left as padding)."""
    chosen = sorted(names, key=lambda n: out_dtype.fields[n][1])
    return np.dtype({"names": chosen,
                     "formats": [out_dtype.fields[n][0] for n in chosen],
                     "offsets": [out_dtype.fields[n][1] - start for n in chosen],
                     "itemsize": out_dtype.itemsize - start})


@dataclass(frozen=True)
class _ChunkShape:
    """Record sizes of a copy: input, output, standard part (before the extra bytes), the
    input's layers per chunk, the output record bytes coded anew (extra bytes), and for each
    extra byte of the output record where its layer comes from: ``(True, k)`` the k-th
    layer coded anew (0 is the classification), ``(False, i)`` the input chunk's i-th."""

    in_size: int
    out_size: int
    std_size: int
    n_layers: int
    coded: list[int]
    extra_from: tuple[tuple[bool, int], ...]


class _Fields(dict):
    """Field lookup for the extra-bytes statistics (a missing field is a ValueError, as for a
    point record)."""

    def __missing__(self, key):
        raise ValueError(key)


def mixed_channels(side: np.ndarray, counts: Sequence[int]) -> bool:
    """Whether any chunk's points (``counts`` consecutive rows of ``side``) change scanner
    channel."""
    channel = side[:, 1] & np.uint8(0x30)
    at = 0
    for m in counts:
        part = channel[at:at + m]
        if m and np.any(part != part[0]):
            return True
        at += m
    return False


def write_copy(fh: BinaryIO, header: Any, metas: Sequence[Any],
               values: Sequence[Callable[[int, int], tuple]], new_names: set[str],
               side_ranges: Sequence[list[tuple[Path, int]]],
               bounds: Sequence[tuple[np.ndarray, np.ndarray]],
               block_points: int = 1_000_000,
               layout: tuple[list, list[list[int]]] | None = None) -> dict[str, Any]:
    """Write the classified copy of layered LAZ inputs into the open file ``fh``.

    Parameters
    ----------
    fh
        Binary file open for writing, positioned at 0.
    header
        The output header (laspy), with the inputs' point format plus the new extra
        dimensions, the inputs' scales and offsets; its statistics are filled here.
    metas
        The inputs (``path``, ``header``, ``point_count``), written in this order.
    values
        Per input, ``values(start, stop) -> (has_new, codes, extras)`` as for the
        streaming writer.
    new_names
        The extra dimensions ``values`` gives: their bytes are coded anew, also where an
        input already has a dimension of that name and layout (a classified copy read
        again); the inputs' other extra bytes are copied.
    side_ranges
        Per input, its scratch files of kept bytes (:data:`SIDE_SIZE` per point) in point
        order, with their point counts.
    bounds
        Per input, the (3,) minimum and maximum integer coordinates of its points.
    block_points
        Points asked of ``values`` at a time (whole chunks). [points]
    layout
        :func:`chunk_layout` of the inputs, when already read.

    Returns
    -------
    dict
        ``chunks``: ``"fixed"`` (one chunk size, the last chunk may be shorter) or
        ``"variable"`` (the inputs' chunks do not line up to one size: several inputs);
        ``chunk_count``.

    Raises
    ------
    InputError
        An input's chunks do not hold its header's point count, or it cannot be read.
    ChannelsChange
        A chunk's points change scanner channel (the caller decodes the inputs instead).
    """
    import lazrs

    from ._lazlayers import code_chunk_layers, layer_capacity

    out_format = header.point_format
    out_dtype = out_format.dtype()
    in_size = metas[0].header.point_format.dtype().itemsize
    out_size = out_dtype.itemsize
    std_size = laspy.PointFormat(out_format.id).dtype().itemsize  # before the extra bytes
    new_names = {n for n in new_names if n in out_dtype.names}
    # the extra-byte columns coded anew: those of the new dimensions, and every byte beyond
    # the input's records
    coded = sorted({off for n in new_names
                    for off in range(out_dtype.fields[n][1],
                                     out_dtype.fields[n][1] + out_dtype.fields[n][0].itemsize)}
                   | set(range(in_size, out_size)))
    region_dtype = _region_dtype(std_size, out_dtype, new_names)
    columns = np.asarray(coded, dtype=np.int64) - std_size
    n_coded = len(coded)
    _, _, items = laszip_items(metas[0].header)
    n_layers = _chunk_layer_count(items)

    header = deepcopy(header)  # statistics filled below; written at the start and at the end
    header.partial_reset()
    header.are_points_compressed = True
    while header.vlrs.get("LasZipVlr"):
        header.vlrs.pop(header.vlrs.index("LasZipVlr"))
    vlr = lazrs.LazVlr.new_for_compression(out_format.id, out_format.num_extra_bytes)
    tables, counts = layout if layout is not None else chunk_layout(metas)
    flat = [m for per_file in counts for m in per_file]
    fixed = all(m == flat[0] for m in flat[:-1]) and flat and flat[-1] <= flat[0]
    record = bytearray(vlr.record_data())
    struct.pack_into("<I", record, 12, flat[0] if fixed else VARIABLE_CHUNKS)
    vlr = lazrs.LazVlr(bytes(record))
    header.vlrs.append(laspy.vlrs.known.LasZipVlr(bytes(record)))
    header.write_to(fh, encoding_errors="strict")
    table_offset_at = fh.tell()
    fh.write(struct.pack("<q", -1))

    scales = np.asarray(header.scales, dtype=np.float64)
    offsets = np.asarray(header.offsets, dtype=np.float64)
    by_return = header.number_of_points_by_return
    extra_bytes = header.vlrs.get("ExtraBytesVlr")
    chunk_table: list[tuple[int, int]] = []
    capacity_points = max(flat) if flat else 1
    buffer = np.empty((n_coded + 1) * layer_capacity(capacity_points), dtype=np.uint8)
    sizes = np.empty(n_coded + 1, dtype=np.int64)
    shape = _ChunkShape(in_size=in_size, out_size=out_size, std_size=std_size,
                        n_layers=n_layers, coded=coded,
                        extra_from=_extra_layer_sources(coded, std_size, in_size, out_size,
                                                        n_layers))
    total = 0
    for meta, (chunk_bytes, first_at), file_counts, ranges, (lo, hi), file_values in zip(
            metas, tables, counts, side_ranges, bounds, values, strict=True):
        side = _SideReader(ranges)
        try:
            with open(meta.path, "rb") as src:
                src.seek(first_at)
                chunk_iter = iter(zip(chunk_bytes, file_counts, strict=True))
                start = 0
                for block in _blocks(file_counts, block_points):
                    m = sum(block)
                    kept = side.read(m)
                    if mixed_channels(kept, block):
                        raise ChannelsChange(f"a LAZ chunk of {meta.path.name} changes "
                                             "scanner channel")
                    has_new, codes, extras = file_values(start, start + m)
                    classes = np.where(has_new, codes, kept[:, 2]).astype(np.uint8)
                    region = np.zeros((m, out_size - std_size), dtype=np.uint8)
                    if new_names:
                        fields = region.reshape(-1).view(region_dtype)
                        for name in new_names:
                            fields[name] = extras[name]
                    coded_bytes = np.ascontiguousarray(region[:, columns])
                    returns = np.ascontiguousarray(kept[:, 0])
                    by_return += np.bincount(returns & np.uint8(0x0F), minlength=16)[
                        1:len(by_return) + 1].astype(by_return.dtype)
                    if extra_bytes:
                        extra_bytes[0].grow(_Fields(extras))
                    at = 0
                    for _ in block:
                        nbytes, count = next(chunk_iter)
                        data = src.read(nbytes)
                        if len(data) != nbytes:
                            raise InputError(meta.path, "is truncated (a LAZ chunk ends early)")
                        sl = slice(at, at + count)
                        out = _copy_chunk(data, count, shape, returns[sl], classes[sl],
                                          coded_bytes[sl], buffer, sizes, code_chunk_layers,
                                          meta.path)
                        write_pieces(fh, out)  # 1 MiB a call (io.files)
                        chunk_table.append((count, len(out)))
                        at += count
                    start += m
        finally:
            side.close()
        total += meta.point_count
        if meta.point_count:
            for axis, name in enumerate("xyz"):
                top = (float(hi[axis]) * scales[axis]) + offsets[axis]
                bottom = (float(lo[axis]) * scales[axis]) + offsets[axis]
                setattr(header, f"{name}_max", max(getattr(header, f"{name}_max"), top))
                setattr(header, f"{name}_min", min(getattr(header, f"{name}_min"), bottom))
    if extra_bytes:
        _inputs_extra_statistics(extra_bytes[0], metas, new_names)
    table_at = fh.tell()
    lazrs.write_chunk_table(fh, chunk_table, vlr)
    end = fh.tell()
    fh.seek(table_offset_at)
    fh.write(struct.pack("<q", table_at))
    header.point_count = total
    if total == 0:
        header.maxs = [0.0, 0.0, 0.0]
        header.mins = [0.0, 0.0, 0.0]
    fh.seek(0)
    header.write_to(fh, ensure_same_size=True, encoding_errors="strict")
    fh.seek(end)
    return {"chunks": "fixed" if fixed else "variable", "chunk_count": len(chunk_table)}


def _inputs_extra_statistics(out_vlr: Any, metas: Sequence[Any], new: set[str]) -> None:
    """Minimum and maximum of the inputs' own extra dimensions (their layers are copied, not
    decoded): those of the inputs' extra-bytes records, combined."""
    for out in out_vlr.extra_bytes_structs:
        name = out.format_name()
        if name in new or out.data_type == 0:
            continue
        for meta in metas:
            found = meta.header.vlrs.get("ExtraBytesVlr")
            for other in (found[0].extra_bytes_structs if found else []):
                if other.format_name() != name:
                    continue
                if out.min_is_relevant() and other.min_is_relevant():
                    low = out._raw_min()
                    low[:] = np.minimum(low, other._raw_min())
                if out.max_is_relevant() and other.max_is_relevant():
                    high = out._raw_max()
                    high[:] = np.maximum(high, other._raw_max())


def chunk_layout(metas: Sequence[Any]) -> tuple[list[tuple[list[int], int]], list[list[int]]]:
    """Per input, its chunks' byte sizes with where the first chunk starts, and its chunks'
    point counts (from the chunk tables; each chunk's own count is checked when it is
    copied).

    Raises
    ------
    InputError
        An input's chunk table cannot be read or does not hold its points.
    """
    tables, counts = [], []
    for meta in metas:
        with open(meta.path, "rb") as src:
            chunk_bytes, first_at, listed = _chunk_table(src, meta.header, meta.path)
        n = meta.point_count
        _, in_chunk, _ = laszip_items(meta.header)
        if in_chunk == VARIABLE_CHUNKS:
            file_counts = listed
        else:  # a table of equal chunks lists the chunk size for the last one too
            file_counts = [in_chunk] * (n // in_chunk) + ([n % in_chunk] if n % in_chunk else [])
        if len(file_counts) != len(chunk_bytes) or sum(file_counts) != n:
            raise InputError(meta.path, f"its LAZ chunks do not hold its {n} points")
        tables.append((chunk_bytes, first_at))
        counts.append(file_counts)
    return tables, counts


def _blocks(counts: Sequence[int], block_points: int) -> Iterator[list[int]]:
    """Runs of whole chunks of about ``block_points`` points."""
    block: list[int] = []
    size = 0
    for m in counts:
        if block and size + m > block_points:
            yield block
            block, size = [], 0
        block.append(m)
        size += m
    if block:
        yield block


def _extra_layer_sources(coded: list[int], std_size: int, in_size: int, out_size: int,
                         n_layers: int) -> tuple[tuple[bool, int], ...]:
    """Where each extra-byte layer of an output chunk comes from (see :class:`_ChunkShape`)."""
    new_of = {off: k + 1 for k, off in enumerate(coded)}
    base = n_layers - (in_size - std_size)  # the input chunk's first extra-byte layer
    return tuple((True, new_of[std_size + j]) if std_size + j in new_of else (False, base + j)
                 for j in range(out_size - std_size))


def _copy_chunk(data: bytes, count: int, shape: _ChunkShape, returns: np.ndarray,
                classes: np.ndarray, coded_bytes: np.ndarray, buffer: np.ndarray,
                sizes: np.ndarray, code: Callable, path: Path) -> bytes:
    """One output chunk from one input chunk (see the module notes)."""
    in_size, n_layers = shape.in_size, shape.n_layers
    head = in_size + 4 + 4 * n_layers
    if len(data) < head:
        raise InputError(path, "has a damaged LAZ chunk")
    stored, = struct.unpack_from("<I", data, in_size)
    if stored != count:
        raise InputError(path, f"has a LAZ chunk of {stored} points where {count} were expected")
    layer_sizes = struct.unpack_from(f"<{n_layers}I", data, in_size + 4)
    if head + sum(layer_sizes) != len(data):
        raise InputError(path, "has a damaged LAZ chunk (its layers do not fill it)")
    changed = code(returns, classes, coded_bytes, buffer, sizes)
    ends = np.cumsum(sizes).tolist()
    new = [buffer[e - s:e] for s, e in zip(sizes.tolist(), ends, strict=True)]
    view = memoryview(data)
    starts = np.concatenate(([head], head + np.cumsum(layer_sizes))).tolist()
    old = [view[starts[i]:starts[i + 1]] for i in range(n_layers)]
    # the layers: the point's own (x/y ... GPS time, colours) with the classification coded
    # anew, then one per extra byte of the output record, copied or coded anew
    layers: list[Any] = old[:n_layers - (in_size - shape.std_size)]
    layers[_CLASS_LAYER] = new[0] if changed else b""
    layers.extend(new[i] if anew else old[i] for anew, i in shape.extra_from)
    first = bytearray(shape.out_size)
    first[:in_size] = data[:in_size]
    first[16] = int(classes[0])
    for k, off in enumerate(shape.coded):
        first[off] = int(coded_bytes[0, k])
    return b"".join([bytes(first), struct.pack("<I", count),
                     struct.pack(f"<{len(layers)}I", *[len(x) for x in layers]), *layers])

"""Read and write LAS/LAZ point clouds (laspy 2.7 with the lazrs LAZ backend).

Verbs
-----
- :func:`resolve_inputs` — files and folders of tiles → sorted list of LAS/LAZ files.
- :func:`read_cloud` — stream one or many files (chunk by chunk, optionally culled to a
  corridor) into a :class:`~clearaudit.cloud.Cloud` in local metres.
- :func:`corridor_mask` — a ``keep`` callable: points within a buffer of a polyline.
- :func:`describe` — per-file facts for the ``info`` command.
- :func:`write_cloud` — a Cloud as a new LAS/LAZ file.
- :func:`write_classified` — every point of the original inputs, in input order, with new
  class codes and extra dimensions.
- :func:`read_setup`, :func:`read_range` — the streaming reader behind tiled audits: the
  common CRS, units and local origin of the inputs from their headers, then any range of one
  file's points as local-metre chunks (LAZ chunk tables let a range start mid-file).
- :func:`write_classified_stream` — like :func:`write_classified`, with the new codes asked
  for chunk by chunk (memory bounded by the chunk, not the survey).
- :func:`plan_record_scratch`, :class:`RecordScratch` — keep the raw point records of
  compressed inputs in uncompressed scratch files while they are decoded, so the classified
  copy is written without decoding them a second time.

Precision
---------
Coordinates are computed from the integer LAS records, never from scaled CRS coordinates:
``local = (X - k) * scale + r`` where ``k`` is an integer shift that brings the file offset
to the local origin and ``r`` the (usually zero) remainder. The result is multiplied by the
unit length to give metres. Converting back with ``Cloud.to_crs`` reproduces ``X * scale +
offset`` to float64 rounding (about 1e-16 relative).

Every exception laspy or lazrs raises on a bad file is turned into
:class:`~clearaudit.errors.InputError` naming the file.
"""
from __future__ import annotations

import hashlib
import logging
import os
import shutil
import tempfile
from collections.abc import Callable, Iterable, Iterator, Sequence
from contextlib import contextmanager, nullcontext
from dataclasses import dataclass
from pathlib import Path
from typing import Any, BinaryIO

import laspy
import numpy as np

from .. import __version__
from ..cloud import Cloud, SourceInfo
from ..errors import InputError
from .crs import crs_label, crs_to_wkt, crs_unit_names, crs_units_m, parse_crs_option, same_crs
from .files import write_pieces
from .lazcopy import SIDE_BYTES as _LAYER_SIDE_BYTES
from .lazcopy import SIDE_SIZE as _LAYER_SIDE_SIZE

logger = logging.getLogger(__name__)

LAS_SUFFIXES = (".las", ".laz")
DEFAULT_FIELDS = ("intensity", "return_number", "number_of_returns", "gps_time")
DEFAULT_CHUNK_SIZE = 2_000_000
#: Round the automatic local origin down to a multiple of this many CRS units.
ORIGIN_ROUNDING = 100.0

_INT32_MIN, _INT32_MAX = -(2**31), 2**31 - 1


# =============================================================================== inputs
def resolve_inputs(paths: str | Path | Iterable[str | Path]) -> list[Path]:
    """Expand files and folders of tiles into the list of LAS/LAZ files to read.

    Parameters
    ----------
    paths
        One path or several: LAS/LAZ files, or folders whose ``*.las``/``*.laz`` files (any
        letter case, not recursive) are taken in sorted name order.

    Returns
    -------
    list of Path
        Files in the order given (each folder's files sorted); duplicates removed.

    Raises
    ------
    InputError
        A path does not exist, a folder holds no LAS/LAZ file, a file is not LAS/LAZ (by
        suffix, or by its first four bytes not being ``LASF``), or nothing was given.
    """
    if isinstance(paths, (str, Path)):
        paths = [paths]
    items = [Path(p) for p in paths]
    if not items:
        raise InputError(None, "no input point cloud was given")
    files: list[Path] = []
    for item in items:
        if not item.exists():
            raise InputError(item, "does not exist")
        if item.is_dir():
            found = sorted(
                (p for p in item.iterdir() if p.is_file() and p.suffix.lower() in LAS_SUFFIXES),
                key=lambda p: p.name,
            )
            if not found:
                raise InputError(item, "folder contains no .las or .laz files")
            files.extend(found)
        else:
            if item.suffix.lower() not in LAS_SUFFIXES:
                raise InputError(item, "is not a LAS/LAZ file (expected a .las or .laz name)")
            files.append(item)
    seen: set[Path] = set()
    unique: list[Path] = []
    for f in files:
        key = f.resolve()
        if key not in seen:
            seen.add(key)
            unique.append(f)
    for f in unique:
        _check_signature(f)
    return unique


def _check_signature(path: Path) -> None:
    try:
        with open(path, "rb") as fh:
            magic = fh.read(4)
    except OSError as exc:
        raise InputError(path, f"cannot be opened ({exc.strerror or exc})") from exc
    if magic != b"LASF":
        raise InputError(path, "is not a LAS/LAZ file (it does not start with 'LASF')")


@contextmanager
def _las_errors(path: Path, action: str = "read"):
    """Turn every exception raised while reading a file into an InputError naming it."""
    try:
        yield
    except InputError:
        raise
    except MemoryError:
        raise
    except Exception as exc:  # noqa: BLE001 - laspy, lazrs, numpy and OS errors alike
        detail = str(exc).strip().splitlines()[0][:200] if str(exc).strip() else type(exc).__name__
        raise InputError(path, f"is truncated or corrupt ({detail}); could not {action} it") from exc


def _chunks(reader: laspy.LasReader, path: Path, chunk_size: int):
    """Yield the point chunks of an open file; decoding errors become InputError(path)."""
    iterator = reader.chunk_iterator(chunk_size)
    while True:
        with _las_errors(path):
            try:
                chunk = next(iterator)
            except StopIteration:
                return
        if len(chunk) == 0:
            return
        yield chunk


#: The LAZ layers :func:`read_range` uses (x, y with the returns and channel, z, class, and
#: the flags for the withheld flag); the others of a layered file (point formats 6-10) are
#: not decoded.
_XYZ_CLASS_LAYERS = (laspy.DecompressionSelection.XY_RETURNS_CHANNEL
                     | laspy.DecompressionSelection.Z
                     | laspy.DecompressionSelection.CLASSIFICATION
                     | laspy.DecompressionSelection.FLAGS)


#: Fields decoded with the x/y layer of a layered LAZ file.
_XY_LAYER_FIELDS = frozenset({"return_number", "number_of_returns", "scanner_channel"})


def _open_reader(path: Path, selection: Any = None) -> laspy.LasReader:
    """Open a LAS/LAZ file; ``selection`` (a ``laspy.DecompressionSelection``) limits the
    layers decoded from a layered LAZ file (None: all)."""
    with _las_errors(path, "open"):
        if selection is None:
            return laspy.open(str(path), mode="r")
        return laspy.open(str(path), mode="r", decompression_selection=selection)


def file_sha256(path: str | Path, block_size: int = 1 << 20) -> str:
    """SHA-256 of a file, read in blocks (constant memory). Hex digest."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while True:
            block = fh.read(block_size)
            if not block:
                break
            h.update(block)
    return h.hexdigest()


# =============================================================================== CRS per file
@dataclass
class _FileMeta:
    path: Path
    header: Any
    crs: Any  # pyproj.CRS or None as found in the file
    crs_origin: str  # "file-wkt", "file-geotiff", "none"

    @property
    def point_count(self) -> int:
        return int(self.header.point_count)


def _file_crs(path: Path, header: Any, tolerate_bad: bool = False) -> tuple[Any, str]:
    """CRS stated in a file's VLRs and where it came from.

    With ``tolerate_bad`` (a CRS override was given) an unparseable record is logged and the
    file is treated as having none.
    """
    from laspy.vlrs.known import GeoKeyDirectoryVlr, WktCoordinateSystemVlr

    records = list(header.vlrs)
    if header.evlrs is not None:
        records += list(header.evlrs)
    has_wkt = any(isinstance(r, WktCoordinateSystemVlr) for r in records)
    has_geotiff = any(isinstance(r, GeoKeyDirectoryVlr) for r in records)
    if not (has_wkt or has_geotiff):
        return None, "none"
    try:
        crs = header.parse_crs(prefer_wkt=True)
        problem = None if crs is not None else "cannot be understood"
    except Exception as exc:  # noqa: BLE001
        crs, problem = None, f"cannot be parsed ({str(exc)[:160]})"
    if problem is not None:
        if tolerate_bad:
            logger.warning("%s: CRS record %s; using --crs", path, problem)
            return None, "none"
        raise InputError(path, f"has a CRS record that {problem}; give --crs")
    wkt_crs = None
    if has_wkt:
        for r in records:
            if isinstance(r, WktCoordinateSystemVlr):
                try:
                    wkt_crs = r.parse_crs()
                except Exception:  # noqa: BLE001
                    wkt_crs = None
    return crs, ("file-wkt" if wkt_crs is not None else "file-geotiff")


def _scan_headers(files: Sequence[Path], tolerate_bad_crs: bool = False) -> list[_FileMeta]:
    metas = []
    for path in files:
        with _open_reader(path) as reader:
            header = reader.header
        crs, origin = _file_crs(path, header, tolerate_bad_crs)
        metas.append(_FileMeta(path=path, header=header, crs=crs, crs_origin=origin))
    return metas


def _resolve_crs(metas: Sequence[_FileMeta], override: Any) -> Any:
    """The CRS of the whole read: the override, or the files' common CRS."""
    if override is not None:
        for m in metas:
            if m.crs is not None and not same_crs(m.crs, override):
                logger.warning("%s: file CRS %r overridden by --crs %r", m.path, m.crs.name,
                               override.name)
        return override
    first = metas[0]
    for m in metas[1:]:
        if not same_crs(m.crs, first.crs):
            a = "no CRS" if first.crs is None else f"CRS {first.crs.name!r}"
            b = "no CRS" if m.crs is None else f"CRS {m.crs.name!r}"
            raise InputError(
                m.path,
                f"has {b} but {first.path.name} has {a}; all inputs must share one CRS "
                "(give --crs to set it for all)",
            )
    if first.crs is None:
        logger.warning("%s: no CRS in the file(s); coordinates are taken as metres", first.path)
    return first.crs


def inputs_crs(paths: str | Path | Iterable[str | Path], crs: Any = None) -> tuple[Any, float, float]:
    """The CRS the inputs will be read in and its units, from the headers alone (cheap).

    Returns
    -------
    (crs, horizontal_unit_m, vertical_unit_m)
        ``crs`` may be None (coordinates taken as metres). [m/unit]
    """
    files = resolve_inputs(paths)
    override = parse_crs_option(crs) if crs is not None else None
    metas = _scan_headers(files, tolerate_bad_crs=override is not None)
    resolved = _resolve_crs(metas, override)
    hu, vu = crs_units_m(resolved, str(files[0]))
    return resolved, hu, vu


# =============================================================================== coordinates
def header_gives_bounds(header: Any) -> bool:
    """Whether a LAS header gives the bounds of its points: some writers leave every value
    0, and such a header says nothing of where the points are."""
    return bool(np.any(np.asarray(header.mins, dtype=np.float64) != 0.0)
                or np.any(np.asarray(header.maxs, dtype=np.float64) != 0.0))


def _with_bounds(metas: Sequence[_FileMeta]) -> list[_FileMeta]:
    """The files whose headers give bounds; all of them when none does."""
    known = [m for m in metas if header_gives_bounds(m.header)]
    return known or list(metas)


def _auto_origin(metas: Sequence[_FileMeta]) -> np.ndarray:
    """Local origin: header minimum x, y rounded down (z = 0), snapped to the first file's grid.

    The origin is ``offset + k * scale`` of the first file, with integer ``k``, so the first
    file's coordinates convert with a pure integer shift. Heights stay relative to the
    vertical datum (origin z near 0) so local z reads as an elevation.
    """
    mins = np.min([np.asarray(m.header.mins, dtype=np.float64) for m in _with_bounds(metas)],
                  axis=0)
    target = np.floor(mins / ORIGIN_ROUNDING) * ORIGIN_ROUNDING
    target[2] = 0.0
    target = np.where(np.isfinite(target), target, 0.0)
    h = metas[0].header
    scales = np.asarray(h.scales, dtype=np.float64)
    offsets = np.asarray(h.offsets, dtype=np.float64)
    k = np.round((target - offsets) / scales)
    return offsets + k * scales


@dataclass(frozen=True)
class _Shift:
    """local_crs = (X - k) * scale + r, per axis (CRS units)."""

    k: np.ndarray  # int64, (3,)
    scale: np.ndarray  # float64, (3,)
    r: np.ndarray  # float64, (3,)

    @staticmethod
    def between(scales: Any, offsets: Any, origin: np.ndarray) -> _Shift:
        scales = np.asarray(scales, dtype=np.float64)
        offsets = np.asarray(offsets, dtype=np.float64)
        k = np.round((origin - offsets) / scales)
        r = (offsets - origin) + k * scales
        return _Shift(k=k.astype(np.int64), scale=scales, r=r)

    def local(self, ints: np.ndarray, axis: int) -> np.ndarray:
        out = (ints.astype(np.int64) - self.k[axis]).astype(np.float64) * self.scale[axis]
        if self.r[axis] != 0.0:
            out += self.r[axis]
        return out

    def local_into(self, ints: np.ndarray, axis: int, out: np.ndarray) -> np.ndarray:
        """:meth:`local` written into ``out``, with the same values bit for bit.

        ``X - k`` is an integer below 2**53 in magnitude, so it is exact in float64 and the
        subtraction can be done there, without an int64 temporary.
        """
        np.subtract(ints, np.float64(self.k[axis]), out=out, dtype=np.float64)
        out *= self.scale[axis]
        if self.r[axis] != 0.0:
            out += self.r[axis]
        return out


class _HeaderBox:
    """The bounds a file's header gives, as integer record values, to test decoded points.

    LAZ carries no checksums: a damaged chunk may decode to points without an error, and
    such points land almost anywhere. A point more than :data:`HEADER_BOUNDS_SLACK` units of
    length (1 m, or 1 ft in a file in feet) beyond the header's bounds is taken as a sign of
    damage or of a wrong header, and the file is refused (see :meth:`check`). The slack also
    covers a header whose bounds were computed before the coordinates were rounded to the
    scale. A header with no bounds at all (every value 0) is not tested.
    """

    def __init__(self, header: Any) -> None:
        mins = np.asarray(header.mins, dtype=np.float64)
        maxs = np.asarray(header.maxs, dtype=np.float64)
        scales = np.asarray(header.scales, dtype=np.float64)
        offsets = np.asarray(header.offsets, dtype=np.float64)
        self.active = header_gives_bounds(header)
        slack = 1.0 + HEADER_BOUNDS_SLACK / np.abs(scales)  # [record steps]
        self.lo = np.floor((mins - offsets) / scales - slack)
        self.hi = np.ceil((maxs - offsets) / scales + slack)
        self.mins, self.maxs, self.scales, self.offsets = mins, maxs, scales, offsets

    def holds(self, lo: np.ndarray, hi: np.ndarray) -> bool:
        """Whether integer record bounds ``lo``, ``hi`` (X, Y, Z) lie within the header's
        bounds and the slack (always, for a header with no bounds)."""
        return not self.active or bool((lo >= self.lo).all() and (hi <= self.hi).all())

    def check(self, path: Path, chunk: Any, first: int,
              bounds: tuple[np.ndarray, np.ndarray] | None = None) -> None:
        """Raise :class:`InputError` naming ``path`` if a point of ``chunk`` (whose first point
        is point ``first`` of the file) lies beyond the header's bounds. ``bounds``: the
        chunk's :func:`_int_bounds`, when already known."""
        if not self.active or len(chunk) == 0:
            return
        records = chunk.array
        lo, hi = _int_bounds(chunk) if bounds is None else bounds
        if self.holds(lo, hi):
            return
        # the chunk's first point beyond the bounds, and the first of its axes that is
        firsts = []
        for axis, name in enumerate("XYZ"):
            if lo[axis] < self.lo[axis] or hi[axis] > self.hi[axis]:
                ints = np.asarray(records[name])
                beyond = (ints < self.lo[axis]) | (ints > self.hi[axis])
                firsts.append((int(np.argmax(beyond)), axis, ints))
        i, axis, ints = min(firsts, key=lambda f: (f[0], f[1]))
        value = float(ints[i]) * self.scales[axis] + self.offsets[axis]
        label = "xyz"[axis]
        raise InputError(path, f"has points beyond the bounds in its header (the first: "
                               f"point {first + i}, {label} = {value:.3f}; header {label} "
                               f"{self.mins[axis]:.3f} to {self.maxs[axis]:.3f}): the file is "
                               f"corrupt, or its header's bounds are wrong")


def _int_bounds(chunk: Any) -> tuple[np.ndarray, np.ndarray]:
    """Smallest and largest integer X, Y, Z (int64, (3,) each) of a decoded chunk (not
    empty): one compiled pass over contiguous records (X, Y, Z lead every point format)."""
    from ..classify.kernels import record_int_bounds

    records = chunk.array
    lo, hi = np.empty(3, np.int64), np.empty(3, np.int64)
    if records.flags.c_contiguous:
        record_int_bounds(records.view(np.uint8).reshape(-1), records.dtype.itemsize, lo, hi)
    else:
        for axis, name in enumerate("XYZ"):
            lo[axis], hi[axis] = records[name].min(), records[name].max()
    return lo, hi


#: How far beyond its header's bounds a point may lie before the file is refused, in the
#: file's units of length (m or ft). See :class:`_HeaderBox`.
HEADER_BOUNDS_SLACK = 1.0


# =============================================================================== record scratch
#: Free disk space left over after the scratch and what the run itself writes: at least this
#: much, and at least a tenth of the scratch. [bytes]
SCRATCH_MARGIN_BYTES = 1 << 30
_SCRATCH_SUFFIX = ".rec"
_BOUNDS_SUFFIX = ".box"


@dataclass(frozen=True)
class RecordScratch:
    """What the classified copy needs of the inputs' points, kept while they are decoded.

    A compressed input is decoded once when it is read. What the classified copy needs of
    its points (every point, before any culling) is appended to scratch files, so the copy
    is written without decoding the input again. A file is kept as one or more point ranges,
    each in its own scratch file (the tiled run decodes ranges in parallel tasks, possibly
    on other machines sharing the folder).

    Two kinds:

    * ``layers`` (layered LAZ inputs of point formats 6-8, see :mod:`clearaudit.io.lazcopy`):
      the copy keeps the inputs' compressed layers and codes only the classification and the
      new extra bytes, so the scratch holds 3 bytes per point (return byte, flags byte,
      class) and, per range, the integer bounds of the coordinates (a ``.box`` file); the
      reader then decodes only the layers it uses (x, y, z and class) where it can;
    * otherwise the raw point records (the bytes of each point as the file stores them),
      which the copy re-compresses.

    Attributes
    ----------
    folder
        Folder of the scratch files (the run's work folder or a temporary folder).
    file_ids
        Inputs (index in read order) that are kept; the others (uncompressed LAS, as cheap
        to read as a scratch file) are read from the input file itself.
    layers
        The kind (see above).
    """

    folder: Path
    file_ids: frozenset[int]
    layers: bool = False

    def path(self, file_id: int, start: int = 0) -> Path:
        """Scratch file of the point range of file ``file_id`` that begins at ``start``."""
        return Path(self.folder) / f"f{int(file_id):06d}_{int(start):013d}{_SCRATCH_SUFFIX}"

    def record_size(self, file_record_size: int) -> int:
        """Bytes kept per point of a file whose point records have this size."""
        return _LAYER_SIDE_SIZE if self.layers else int(file_record_size)

    @contextmanager
    def writer(self, file_id: int, start: int = 0) -> Iterator[_ScratchSink | None]:
        """Open the scratch file of one point range for writing (None: file not kept).

        Yields a sink whose ``keep(chunk)`` appends a decoded chunk. The bytes go to a
        ``.part`` file renamed on success (after the range's bounds, for ``layers``), so a
        scratch file that exists is complete; on any error the partial file is removed.
        """
        if int(file_id) not in self.file_ids:
            yield None
            return
        final = self.path(file_id, start)
        partial = final.with_name(final.name + ".part")
        try:
            with open(partial, "wb") as fh:
                sink = _ScratchSink(fh, self.layers)
                yield sink
            if self.layers:
                final.with_suffix(_BOUNDS_SUFFIX).write_bytes(sink.bounds().tobytes())
            os.replace(partial, final)
        except BaseException:
            partial.unlink(missing_ok=True)
            raise

    def ranges(self, file_id: int, record_size: int, point_count: int
               ) -> list[tuple[Path, int]] | None:
        """The scratch files of one input in point order, with their point counts.

        ``record_size`` is the bytes kept per point (:meth:`record_size`). Returns None when
        the file is not kept or its scratch files do not hold exactly ``point_count`` points,
        one range after the other from point 0 (then the input is decoded instead).
        """
        if int(file_id) not in self.file_ids:
            return None
        prefix = f"f{int(file_id):06d}_"
        found = []
        for entry in Path(self.folder).glob(f"{prefix}*{_SCRATCH_SUFFIX}"):
            try:
                start = int(entry.name[len(prefix):-len(_SCRATCH_SUFFIX)])
            except ValueError:
                continue
            found.append((start, entry))
        found.sort()
        out, at = [], 0
        for start, entry in found:
            size = entry.stat().st_size
            if start != at or size % record_size:
                return None
            out.append((entry, size // record_size))
            at += size // record_size
        return out if at == int(point_count) else None

    def bounds(self, ranges: list[tuple[Path, int]]) -> tuple[np.ndarray, np.ndarray] | None:
        """(3,) minimum and maximum integer coordinates over the ranges (``layers`` only);
        None when a range's bounds are missing."""
        lo = np.full(3, np.iinfo(np.int64).max, dtype=np.int64)
        hi = np.full(3, np.iinfo(np.int64).min, dtype=np.int64)
        for path, _ in ranges:
            box = path.with_suffix(_BOUNDS_SUFFIX)
            if not box.exists():
                return None
            values = np.fromfile(box, dtype="<i8")
            if values.shape != (6,):
                return None
            lo = np.minimum(lo, values[:3])
            hi = np.maximum(hi, values[3:])
        return lo, hi


class _ScratchSink:
    """Appends decoded chunks to one scratch file (see :class:`RecordScratch`)."""

    def __init__(self, fh: BinaryIO, layers: bool):
        self.fh = fh
        self.layers = layers
        self._lo = np.full(3, np.iinfo(np.int64).max, dtype=np.int64)
        self._hi = np.full(3, np.iinfo(np.int64).min, dtype=np.int64)

    def keep(self, chunk: Any, bounds: tuple[np.ndarray, np.ndarray] | None = None) -> None:
        """Append the chunk's records (or their side bytes, ``layers``); ``bounds``: the
        chunk's :func:`_int_bounds`, when already known."""
        records = np.ascontiguousarray(chunk.array)
        if not self.layers:
            write_pieces(self.fh, records.view(np.uint8))  # 1 MiB a call (io.files)
            return
        m = len(records)
        if not m:
            return
        # the side bytes as one opaque 3-byte item per record (copied item by item, ~2x
        # faster than a (m, 3) byte slice)
        side = np.dtype({"names": ["s"], "formats": [(np.void, _LAYER_SIDE_BYTES.stop
                                                      - _LAYER_SIDE_BYTES.start)],
                         "offsets": [_LAYER_SIDE_BYTES.start],
                         "itemsize": records.dtype.itemsize})
        write_pieces(self.fh, np.ascontiguousarray(records.view(side)["s"]))
        lo, hi = _int_bounds(chunk) if bounds is None else bounds
        np.minimum(self._lo, lo, out=self._lo)
        np.maximum(self._hi, hi, out=self._hi)

    def bounds(self) -> np.ndarray:
        return np.concatenate((self._lo, self._hi)).astype("<i8")


def plan_record_scratch(paths: str | Path | Iterable[str | Path], folder: str | Path, *,
                        reserve_bytes: int = 0, layered_output: bool = True
                        ) -> tuple[RecordScratch | None, dict[str, Any]]:
    """Decide what of the inputs' points is kept in scratch files for the classified copy.

    Parameters
    ----------
    paths
        The inputs (see :func:`resolve_inputs`), in read order.
    folder
        Folder for the scratch files; created when the scratch is used. Its free space (or
        that of its nearest existing parent) is checked with ``shutil.disk_usage``.
    reserve_bytes
        Disk space the run writes besides the scratch (work files, outputs). [bytes]
    layered_output
        The classified copy is compressed (LAZ), so layered inputs can have their layers
        copied (:mod:`clearaudit.io.lazcopy`).

    Returns
    -------
    (RecordScratch or None, dict)
        The scratch (None: every input is decoded again for the classified copy) and what
        was decided, for the run record: ``records_from`` (``"scratch"`` or ``"inputs"``),
        ``copy`` (``"layers"``: compressed layers copied, only the classes and new extra
        bytes coded; ``"records"``: points re-compressed), ``reason``, ``scratch_files``
        (input indices kept), ``scratch_bytes``, ``disk_free_bytes``, ``disk_needed_bytes``.

    Notes
    -----
    Only compressed (LAZ) inputs are kept: an uncompressed LAS input is read as cheaply as a
    scratch file would be. When every input is a layered LAZ file that
    :func:`clearaudit.io.lazcopy.blocker` accepts, the scratch holds 3 bytes per point;
    otherwise ``point_count x record_length`` bytes per kept input (the uncompressed LAS size
    less its header). It is used when

    .. math:: free \\ge scratch + reserve + \\max(1\\,GiB,\\ 0.1\\, scratch)
    """
    files = resolve_inputs(paths)
    folder = Path(folder)
    kept: list[int] = []
    headers = []
    for file_id, path in enumerate(files):
        with _open_reader(path) as reader:
            header = reader.header
        headers.append(header)
        if header.are_points_compressed and header.point_count > 0:
            kept.append(file_id)
    from .lazcopy import blocker

    why_not = blocker(headers) if layered_output else "the classified copy is not compressed"
    layers = why_not is None
    scratch_bytes = sum(int(headers[i].point_count)
                        * (_LAYER_SIDE_SIZE if layers else headers[i].point_format.dtype().itemsize)
                        for i in kept)
    info: dict[str, Any] = {"records_from": "inputs", "copy": "records",
                            "reason": "", "scratch_files": kept,
                            "scratch_bytes": scratch_bytes, "disk_free_bytes": None,
                            "disk_needed_bytes": None}
    if not kept:
        info["reason"] = "no compressed input: the inputs are read again directly"
        info["scratch_files"] = []
        return None, info
    probe = folder.absolute()
    while not probe.exists() and probe != probe.parent:
        probe = probe.parent  # the folder is created only when used
    free = int(shutil.disk_usage(probe).free)
    needed = scratch_bytes + max(int(reserve_bytes), 0) + max(SCRATCH_MARGIN_BYTES,
                                                              scratch_bytes // 10)
    info.update(disk_free_bytes=free, disk_needed_bytes=needed)
    if free < needed:
        info["reason"] = (f"not enough free disk for the scratch ({free / 1e9:.2f} GB free, "
                          f"{needed / 1e9:.2f} GB wanted): the inputs are decoded again")
        info["scratch_files"] = []
        logger.info("%s: %s", probe, info["reason"])
        return None, info
    folder.mkdir(parents=True, exist_ok=True)
    info["records_from"] = "scratch"
    if layers:
        info["copy"] = "layers"
        info["reason"] = ("layered LAZ inputs: the classified copy keeps their compressed "
                          "layers and codes only the classes and new extra bytes, with the "
                          "return byte and class of each point kept while they were decoded")
    else:
        info["reason"] = ("raw point records of the compressed inputs kept while they were "
                          f"decoded ({why_not}, so their layers are not copied); the "
                          "classified copy reads them instead of decoding again")
    return RecordScratch(folder=folder, file_ids=frozenset(kept), layers=layers), info


def _record_sink(records: RecordScratch | None, file_id: int, start: int = 0):
    """``records.writer(file_id, start)``, or a context that yields None."""
    return nullcontext(None) if records is None else records.writer(file_id, start)


def _keep_records(sink: _ScratchSink | None, chunk: Any,
                  bounds: tuple[np.ndarray, np.ndarray] | None = None) -> None:
    """Append what the scratch keeps of a decoded chunk (see :class:`RecordScratch`)."""
    if sink is not None:
        sink.keep(chunk, bounds)


def _withheld(chunk: Any) -> np.ndarray | None:
    """The chunk's points flagged withheld, or None when there are none.

    ASPRS, LAS Specification 1.4 R15 (2019), Tables 8 and 16: a withheld point "should not
    be included in processing (synonymous with Deleted)". Withheld points are read (and
    copied into the classified copy as they are) but never analysed.
    """
    flags = np.asarray(chunk.withheld)
    return flags.astype(bool) if flags.any() else None


def _leave_out(kept: np.ndarray | None, withheld: np.ndarray | None
               ) -> tuple[np.ndarray | None, int]:
    """The mask ``kept`` (None: every point) without the ``withheld`` points (None: none),
    and how many of the points it kept were withheld."""
    if withheld is None:
        return kept, 0
    count = int(np.count_nonzero(withheld if kept is None else withheld & kept))
    return (~withheld if kept is None else kept & ~withheld), count


# =============================================================================== reading
def read_cloud(
    paths: str | Path | Iterable[str | Path],
    *,
    crs: Any = None,
    fields: Sequence[str] = DEFAULT_FIELDS,
    chunk_size: int = DEFAULT_CHUNK_SIZE,
    keep: Callable[[np.ndarray], np.ndarray] | None = None,
    progress: Callable[[int, int], Any] | None = None,
    origin: Sequence[float] | None = None,
    records: RecordScratch | None = None,
    skip_withheld: bool = True,
) -> Cloud:
    """Read LAS/LAZ files into one :class:`~clearaudit.cloud.Cloud` in local metres.

    Parameters
    ----------
    paths
        Files and/or folders of tiles (see :func:`resolve_inputs`).
    crs
        CRS override ("EPSG:2264", WKT, ``pyproj.CRS``). Wins over the files' own CRS; the
        override is recorded as ``crs_origin="override"`` in each ``SourceInfo`` (whose
        ``crs_wkt`` keeps the file's own CRS, ``None`` when it had none).
    fields
        Per-point dimensions to keep besides coordinates and classification (standard or
        extra-bytes names). Fields missing from any of the files are left out.
    chunk_size
        Points decoded per step. [points]
    keep
        Optional ``keep(xy_crs) -> bool mask`` applied to every chunk while streaming:
        ``xy_crs`` is an (n, 2) float64 array of CRS coordinates. [CRS unit]
    progress
        Optional ``progress(points_done, points_total)`` called after each chunk.
    origin
        Local origin (x, y, z) in CRS units; default is the minimum header x, y rounded
        down to 100 units and z = 0, snapped to the first file's coordinate grid. [CRS unit]
    records
        Optional :class:`RecordScratch` (from :func:`plan_record_scratch`): the raw point
        records of every point of its files, ``keep`` or not, are appended to scratch files
        chunk by chunk as they are decoded, for :func:`write_classified`.
    skip_withheld
        Leave out the points flagged withheld (LAS 1.4 R15, Tables 8 and 16: such a point
        "should not be included in processing"); each file's count of them (among the points
        ``keep`` keeps) is in its ``SourceInfo.withheld_points``. Their records are still kept
        in ``records``, so the classified copy holds them as they were.

    Returns
    -------
    Cloud
        ``xyz`` in metres relative to ``origin``; ``source_id``/``source_index`` give every
        point's file (index into ``sources``) and its index in that file.

    Raises
    ------
    InputError
        Missing, non-LAS, truncated or corrupt files; files with different CRSs; a
        geographic CRS; an unparseable ``crs``; no points at all (or none left by ``keep``).

    Notes
    -----
    For a file with integer records ``X``, scale ``s`` and offset ``o`` and local origin
    ``O`` (CRS units), with ``k = round((O - o) / s)`` and ``r = o + k s - O``:

    .. math:: x_{local} = ((X - k)\\,s + r)\\,u_h

    where ``u_h`` is the length of the horizontal CRS unit in metres (``u_v`` for z).

    References
    ----------
    ASPRS, LAS Specification 1.4 R15 (2019), section 2.4 (scale factors and offsets).
    """
    if chunk_size < 1:
        raise ValueError("chunk_size must be a positive number of points")
    files = resolve_inputs(paths)
    override = parse_crs_option(crs)
    metas = _scan_headers(files, tolerate_bad_crs=override is not None)
    the_crs = _resolve_crs(metas, override)
    h_unit, v_unit = crs_units_m(the_crs, str(files[0]) if override is None else "--crs")
    unit = np.array([h_unit, h_unit, v_unit])
    if origin is None:
        origin_arr = _auto_origin(metas)
    else:
        origin_arr = np.asarray(origin, dtype=np.float64).reshape(3)
    wanted = _common_fields(metas, fields)

    total = sum(m.point_count for m in metas)
    done = 0
    # outputs are allocated once for every point in the headers and filled chunk by chunk
    # (no per-chunk lists and final concatenation); points dropped by ``keep`` are trimmed
    # off the end at the end
    dtypes = {name: _field_dtype(metas, name) for name in wanted}
    xyz_out = np.empty((total, 3), dtype=np.float64)
    cls_out = np.empty(total, dtype=np.uint8)
    # bookkeeping in the narrowest types that hold it (bytes per point count at scale)
    sid_out = np.empty(total, dtype=np.uint16 if len(metas) <= 2**16 else np.int32)
    sidx_out = np.empty(total, dtype=np.uint32 if max((m.point_count for m in metas),
                                                      default=0) < 2**32 else np.int64)
    fields_out = {name: np.empty(total, dtype=dtypes[name]) for name in wanted}
    n_points = 0
    sources: list[SourceInfo] = []
    # a layered LAZ file decodes only the layers used: x, y (with the returns and the
    # channel), z and class, unless other fields are asked for or whole records are kept
    selection = (_XYZ_CLASS_LAYERS if set(wanted) <= _XY_LAYER_FIELDS
                 and (records is None or records.layers) else None)
    for file_id, meta in enumerate(metas):
        header = meta.header
        shift = _Shift.between(header.scales, header.offsets, origin_arr)
        n_file = 0
        withheld_file = 0
        box = _HeaderBox(header)
        with _open_reader(meta.path, selection) as reader, \
                _record_sink(records, file_id) as sink:
            for chunk in _chunks(reader, meta.path, chunk_size):
                m = len(chunk)
                if n_points + m > total:
                    raise InputError(
                        meta.path,
                        f"is truncated or corrupt (header says {meta.point_count} points, "
                        f"more could be read)",
                    )
                # the integer bounds once, for the header test and the scratch
                bounds = _int_bounds(chunk) if box.active or sink is not None else None
                box.check(meta.path, chunk, n_file, bounds)
                _keep_records(sink, chunk, bounds)
                lx = shift.local_into(np.asarray(chunk.X), 0, np.empty(m))
                ly = shift.local_into(np.asarray(chunk.Y), 1, np.empty(m))
                mask = None
                k = m
                if keep is not None:
                    xy_crs = np.empty((m, 2), dtype=np.float64)
                    np.add(lx, origin_arr[0], out=xy_crs[:, 0])
                    np.add(ly, origin_arr[1], out=xy_crs[:, 1])
                    mask = _call_keep(keep, xy_crs)
                    del xy_crs
                mask, left_out = _leave_out(mask, _withheld(chunk) if skip_withheld else None)
                withheld_file += left_out
                if mask is not None:
                    k = int(np.count_nonzero(mask))
                    if k == m:
                        mask = None
                stop = n_points + k

                lz = shift.local_into(np.asarray(chunk.Z), 2, np.empty(m))
                for axis, values in enumerate((lx, ly, lz)):
                    if unit[axis] != 1.0:
                        values *= unit[axis]
                    _put(values, xyz_out[n_points:stop, axis], mask)
                del lx, ly, lz
                _put(chunk.classification, cls_out[n_points:stop], mask)
                sid_out[n_points:stop] = file_id
                if mask is None:
                    sidx_out[n_points:stop] = np.arange(n_file, n_file + m, dtype=np.int64)
                else:
                    np.add(np.flatnonzero(mask), n_file, out=sidx_out[n_points:stop],
                           casting="unsafe")
                for name in wanted:
                    _put(chunk[name], fields_out[name][n_points:stop], mask)
                n_points = stop
                n_file += m
                done += m
                if progress is not None:
                    progress(done, total)
        if n_file != meta.point_count:
            raise InputError(
                meta.path,
                f"is truncated or corrupt (header says {meta.point_count} points, "
                f"{n_file} could be read)",
            )
        sources.append(
            SourceInfo(
                path=str(meta.path), version=str(header.version),
                point_format=int(header.point_format.id), point_count=meta.point_count,
                scales=tuple(float(s) for s in header.scales),
                offsets=tuple(float(o) for o in header.offsets),
                crs_wkt=None if meta.crs is None else meta.crs.to_wkt(),
                crs_origin="override" if override is not None else meta.crs_origin,
                # own pass over the file: LAZ decoding reads through laspy; hashing 57 MB
                # takes about 0.05 s, so it is not worth threading through the decoder
                sha256=file_sha256(meta.path),
                withheld_points=withheld_file,
            )
        )

    label = str(files[0]) if len(files) == 1 else f"{files[0]} (+{len(files) - 1} more files)"
    if total == 0:
        raise InputError(label, "contains no points")
    if n_points == 0:
        withheld = sum(i.withheld_points for i in sources)
        also = f"; {withheld} flagged withheld" if withheld else ""
        raise InputError(
            label, f"contains no points inside the area kept (0 of {total} points kept{also})"
        )

    def trim(a: np.ndarray) -> np.ndarray:
        if len(a) != n_points:  # shrink in place (no copy of the kept points)
            a.resize((n_points, *a.shape[1:]), refcheck=False)
        return a

    return Cloud(
        xyz=trim(xyz_out), origin=origin_arr, crs=the_crs,
        horizontal_unit_m=h_unit, vertical_unit_m=v_unit,
        classification=trim(cls_out),
        fields={name: trim(fields_out[name]) for name in wanted},
        source_id=trim(sid_out), source_index=trim(sidx_out),
        sources=sources,
    )


def _put(values: Any, dest: np.ndarray, mask: np.ndarray | None) -> None:
    """Write ``values`` (all of them, or those where ``mask`` is true) into ``dest``."""
    values = np.asarray(values, dtype=dest.dtype)
    if mask is None:
        dest[...] = values
    else:
        np.compress(mask, values, out=dest)


def _field_dtype(metas: Sequence[_FileMeta], name: str) -> np.dtype:
    """The dtype the concatenation of the files' ``name`` arrays would have."""
    kinds = []
    for m in metas:
        dims = m.header.point_format.dtype()
        if name in dims.names:
            kinds.append(np.dtype(dims[name]))
        else:  # sub-byte fields (return_number, ...) and others laspy unpacks itself
            kinds.append(np.asarray(laspy.ScaleAwarePointRecord.zeros(
                1, header=m.header)[name]).dtype)
    return np.result_type(*kinds)


@dataclass(frozen=True)
class ReadSetup:
    """What a streaming read of several files shares: files, CRS, units, local origin.

    Attributes
    ----------
    files
        The input files in read order.
    point_counts
        Points per file (from the headers).
    crs
        The common CRS (``pyproj.CRS``) or None.
    horizontal_unit_m, vertical_unit_m
        Metres per CRS unit. [m/unit]
    origin
        Local origin (x, y, z). [CRS unit]
    sources
        One :class:`~clearaudit.cloud.SourceInfo` per file (``sha256`` filled when asked).
    header_min, header_max
        Bounds of all files from the headers, in local metres. [m]
    whole_files
        Files read in one range from their first point: LAZ files with variable-size chunks,
        in which lazrs 0.8 does not seek to the right point (see :func:`read_range`).
    file_min, file_max
        Each file's bounds from its header, in local metres, shape (n_files, 3); infinite
        for a header with no bounds (every value 0). [m]
    """

    files: tuple[Path, ...]
    point_counts: tuple[int, ...]
    crs: Any
    horizontal_unit_m: float
    vertical_unit_m: float
    origin: np.ndarray
    sources: tuple[SourceInfo, ...]
    header_min: np.ndarray
    header_max: np.ndarray
    whole_files: frozenset[int] = frozenset()
    file_min: np.ndarray | None = None
    file_max: np.ndarray | None = None

    @property
    def total_points(self) -> int:
        return int(sum(self.point_counts))

    @property
    def unit_m(self) -> np.ndarray:
        return np.array([self.horizontal_unit_m, self.horizontal_unit_m, self.vertical_unit_m])


def read_setup(paths: str | Path | Iterable[str | Path], *, crs: Any = None,
               origin: Sequence[float] | None = None, hashes: bool = True) -> ReadSetup:
    """Prepare a streaming read from the headers alone (plus file hashes when asked).

    Parameters
    ----------
    paths
        Files and/or folders of tiles (see :func:`resolve_inputs`).
    crs
        CRS override, as in :func:`read_cloud`.
    origin
        Local origin in CRS units; default as in :func:`read_cloud` (the same origin, so a
        streamed read and an in-memory read give identical local coordinates). [CRS unit]
    hashes
        Compute each file's SHA-256 (one pass over the file bytes, no decompression).

    Returns
    -------
    ReadSetup

    Raises
    ------
    InputError
        As :func:`read_cloud` for missing files, CRS disagreements and empty inputs.
    """
    files = resolve_inputs(paths)
    override = parse_crs_option(crs)
    metas = _scan_headers(files, tolerate_bad_crs=override is not None)
    the_crs = _resolve_crs(metas, override)
    h_unit, v_unit = crs_units_m(the_crs, str(files[0]) if override is None else "--crs")
    origin_arr = (_auto_origin(metas) if origin is None
                  else np.asarray(origin, dtype=np.float64).reshape(3))
    if sum(m.point_count for m in metas) == 0:
        label = str(files[0]) if len(files) == 1 else f"{files[0]} (+{len(files) - 1} more files)"
        raise InputError(label, "contains no points")
    unit = np.array([h_unit, h_unit, v_unit])
    mins = np.array([np.asarray(m.header.mins, dtype=np.float64) for m in metas])
    maxs = np.array([np.asarray(m.header.maxs, dtype=np.float64) for m in metas])
    no_bounds = np.array([not header_gives_bounds(m.header) for m in metas])[:, None]
    bounded = _with_bounds(metas)  # the survey's bounds from the headers that give them
    lo = np.min([np.asarray(m.header.mins, dtype=np.float64) for m in bounded], axis=0)
    hi = np.max([np.asarray(m.header.maxs, dtype=np.float64) for m in bounded], axis=0)
    sources = tuple(
        SourceInfo(path=str(m.path), version=str(m.header.version),
                   point_format=int(m.header.point_format.id), point_count=m.point_count,
                   scales=tuple(float(v) for v in m.header.scales),
                   offsets=tuple(float(v) for v in m.header.offsets),
                   crs_wkt=None if m.crs is None else m.crs.to_wkt(),
                   crs_origin="override" if override is not None else m.crs_origin,
                   sha256=file_sha256(m.path) if hashes else None)
        for m in metas)
    return ReadSetup(files=tuple(files), point_counts=tuple(m.point_count for m in metas),
                     crs=the_crs, horizontal_unit_m=h_unit, vertical_unit_m=v_unit,
                     origin=origin_arr, sources=sources, header_min=(lo - origin_arr) * unit,
                     header_max=(hi - origin_arr) * unit,
                     whole_files=frozenset(i for i, m in enumerate(metas)
                                           if variable_chunks(m.header)),
                     # a header with no bounds (every value 0): a box that meets every box
                     file_min=np.where(no_bounds, -np.inf, (mins - origin_arr) * unit),
                     file_max=np.where(no_bounds, np.inf, (maxs - origin_arr) * unit))


def variable_chunks(header: Any) -> bool:
    """Whether a LAZ file's chunks vary in size (LAZ 1.4 allows it for point formats 6-10;
    a file with one fixed chunk size, and an uncompressed file, give False)."""
    from .lazcopy import VARIABLE_CHUNKS, laszip_items

    laz = laszip_items(header)
    return laz is not None and laz[1] == VARIABLE_CHUNKS


def decoder_threads() -> int:
    """Threads of lazrs's parallel decoder (rayon's pool: the CPUs this process may use,
    or ``RAYON_NUM_THREADS``)."""
    from ..threads import available_cores

    fixed = os.environ.get("RAYON_NUM_THREADS", "")
    if fixed.isdigit() and int(fixed) > 0:
        return int(fixed)
    return available_cores()


def balanced_step(points: int, header: Any, threads: int | None = None) -> int:
    """Points to decode per call near ``points`` that keep the parallel decoder's threads
    equally busy: a whole number of the file's LAZ chunks, a multiple of the threads where
    that costs at most four times ``points`` (``points`` itself when it is less than a LAZ
    chunk, for an uncompressed file and for variable-size chunks).

    lazrs decodes the chunks of one call in parallel and holds the GIL meanwhile, so a
    call's last round of chunks leaves threads idle that nothing else can use: 250 000
    points (five chunks of 50 000) on two threads decoded p10M's layers in 1.18-1.21 s,
    200 000 or 300 000 in 0.99-1.17 s. The points decoded per call change no result.
    """
    from .lazcopy import VARIABLE_CHUNKS, laszip_items

    laz = laszip_items(header)
    if laz is None or laz[1] == VARIABLE_CHUNKS or laz[1] <= 0:
        return points
    chunk = int(laz[1])
    if points < chunk:
        return points
    threads = decoder_threads() if threads is None else max(1, int(threads))
    per_round = chunk * threads
    if per_round <= 4 * points:
        return per_round * max(1, round(points / per_round))
    return chunk * max(1, (4 * points) // chunk)


#: :func:`read_range`'s compiled chunk step without a corridor: an empty raster and polyline
_NO_CORRIDOR = (0.0, 0.0, 0.0, 0.0, 1.0, 1, 1, np.zeros(1, dtype=np.uint8),
                np.zeros((0, 9)), 0.0, 0, 0.0, 0.0, 1, np.zeros(2, dtype=np.int64),
                np.zeros(0, dtype=np.int64))
#: ... and without withheld points
_NO_FLAGS = np.zeros(0, dtype=np.uint8)


def read_range(setup: ReadSetup, file_id: int, start: int = 0, stop: int | None = None, *,
               keep: Callable[[np.ndarray], np.ndarray] | None = None,
               chunk_size: int = DEFAULT_CHUNK_SIZE, records_to: _ScratchSink | None = None,
               tally: dict[str, int] | None = None,
               cells: tuple[float, float, float] | None = None):
    """Stream points ``start:stop`` of one input file as local-metre chunks.

    Parameters
    ----------
    setup
        From :func:`read_setup`.
    file_id
        Index of the file in ``setup.files``.
    start, stop
        Point range (``stop`` None: to the end). LAZ files seek through their chunk table,
        so a range is decompressed from its start, not from the start of the file. [points]
    keep
        Optional ``keep(xy_crs) -> bool mask``, as in :func:`read_cloud`.
    chunk_size
        Points decoded per step, rounded to whole LAZ chunks for the parallel decoder
        (:func:`balanced_step`). [points]
    records_to
        Optional sink (``RecordScratch.writer``) that keeps what the classified copy needs
        of every decoded point, ``keep`` or not, chunk by chunk. Unless it keeps whole
        records, only the x, y, z, class and flags layers of a layered LAZ file are decoded.
    tally
        Optional dict; ``tally["withheld"]`` is increased by the points that ``keep`` would
        keep but that are flagged withheld, which are never yielded (see :func:`read_cloud`).
    cells
        Optional grid ``(x0, y0, cell)`` [m]: each kept point's grid cell is yielded too,
        ``floor((x - x0) / cell)``, ``floor((y - y0) / cell)`` (``clearaudit.tiling.Grid``).

    Yields
    ------
    (xyz, classification, index, n_decoded) or, with ``cells``, (..., cell_i, cell_j)
        ``xyz`` (m, 3) float64 local metres, ``classification`` uint8, ``index`` int64 point
        index in the file, ``n_decoded`` the points decoded for this chunk (before ``keep``),
        ``cell_i``, ``cell_j`` int64.

    Notes
    -----
    Coordinates are computed from the integer records exactly as in :func:`read_cloud`, so
    a point read here and read there has bit-identical local coordinates.
    """
    if chunk_size < 1:
        raise ValueError("chunk_size must be a positive number of points")
    path = setup.files[file_id]
    count = setup.point_counts[file_id]
    stop = count if stop is None else min(int(stop), count)
    start = int(start)
    if not 0 <= start <= stop:
        raise ValueError("start must lie between 0 and stop")
    unit = setup.unit_m
    origin = setup.origin
    whole = records_to is not None and not records_to.layers
    with _open_reader(path, None if whole else _XYZ_CLASS_LAYERS) as reader:
        shift = _Shift.between(reader.header.scales, reader.header.offsets, origin)
        box = _HeaderBox(reader.header)
        chunk_size = balanced_step(chunk_size, reader.header)
        raster = getattr(keep, "raster", None)
        compiled = keep is None or raster is not None
        if compiled:
            # what the compiled chunk pass needs besides the chunk, prepared once
            from ..classify.kernels import chunk_points

            fixed = (shift.k.astype(np.int64), shift.scale.astype(np.float64),
                     shift.r.astype(np.float64), np.asarray(unit, dtype=np.float64),
                     float(origin[0]), float(origin[1]))
            corridor = (raster is not None, *(raster if raster is not None else _NO_CORRIDOR),
                        *(cells if cells is not None else (0.0, 0.0, 1.0)))
        if start and variable_chunks(reader.header):
            # lazrs 0.8 mispositions a seek past the first chunk of a file whose chunks vary
            # in size (it takes the point's chunk and offset as if the chunks were equal):
            # such a file is decoded from its start and the points before ``start`` dropped
            # (the tiled run reads it in one range, ReadSetup.whole_files)
            skip = start
            while skip:
                with _las_errors(path):
                    got = len(reader.read_points(min(chunk_size, skip)))
                if got == 0:
                    raise InputError(path, f"is truncated or corrupt (header says {count} "
                                           f"points, {start - skip} could be read)")
                skip -= got
        elif start:
            with _las_errors(path):
                reader.seek(start)
        position = start
        read_points = _reusing_reader(reader, path) or reader.read_points
        while position < stop:
            with _las_errors(path):
                chunk = read_points(min(chunk_size, stop - position))
            m = len(chunk)
            if m == 0:
                raise InputError(path, f"is truncated or corrupt (header says {count} points, "
                                       f"{position} could be read)")
            # the integer bounds once, for the header test and the scratch
            bounds = _int_bounds(chunk) if box.active or records_to is not None else None
            box.check(path, chunk, position, bounds)
            _keep_records(records_to, chunk, bounds)
            withheld = _withheld(chunk)
            if compiled:
                # one compiled pass: local coordinates, the corridor (its raster, then the
                # exact test for the points of straddling cells), the withheld flag, the kept
                # points' units, indices and grid cells (the same values and the same kept
                # points as the numpy form below)
                xyz = np.empty((m, 3), dtype=np.float64)
                cls = np.empty(m, dtype=np.uint8)
                index = np.empty(m, dtype=np.int64)
                ci, cj = np.empty(m, dtype=np.int64), np.empty(m, dtype=np.int64)
                kept, left_out = chunk_points(
                    np.asarray(chunk.X), np.asarray(chunk.Y), np.asarray(chunk.Z),
                    np.asarray(chunk.classification, dtype=np.uint8),
                    _NO_FLAGS if withheld is None else withheld.view(np.uint8),
                    *fixed, position, *corridor, xyz, cls, index, ci, cj)
                if tally is not None and left_out:
                    tally["withheld"] = tally.get("withheld", 0) + left_out
                out = (xyz[:kept], cls[:kept], index[:kept], m)
                yield out + (ci[:kept], cj[:kept]) if cells is not None else out
                position += m
                continue
            index = np.arange(position, position + m, dtype=np.int64)
            local_x = shift.local(np.asarray(chunk.X), 0)
            local_y = shift.local(np.asarray(chunk.Y), 1)
            xy_crs = np.column_stack((local_x + origin[0], local_y + origin[1]))
            inside = np.asarray(_call_keep(keep, xy_crs), dtype=bool)
            inside, left_out = _leave_out(inside, withheld)
            if tally is not None and left_out:
                tally["withheld"] = tally.get("withheld", 0) + left_out
            sel = np.flatnonzero(inside)
            local_z = shift.local(np.asarray(chunk.Z)[sel], 2)
            xyz = np.empty((len(local_z), 3), dtype=np.float64)
            xyz[:, 0] = local_x[sel] * unit[0]
            xyz[:, 1] = local_y[sel] * unit[1]
            xyz[:, 2] = local_z * unit[2]
            out = (xyz, np.asarray(chunk.classification, dtype=np.uint8)[sel], index[sel], m)
            if cells is not None:
                x0, y0, size = cells
                out += (np.floor((xyz[:, 0] - x0) / size).astype(np.int64),
                        np.floor((xyz[:, 1] - y0) / size).astype(np.int64))
            yield out
            position += m


def _common_fields(metas: Sequence[_FileMeta], fields: Sequence[str]) -> list[str]:
    wanted = []
    for name in fields:
        if name in ("X", "Y", "Z", "x", "y", "z", "classification"):
            continue
        missing = [m.path.name for m in metas
                   if name not in m.header.point_format.dimension_names]
        if missing:
            logger.info("field %r left out: not in %s", name, ", ".join(missing[:3]))
            continue
        wanted.append(name)
    return wanted


def _call_keep(keep: Callable[[np.ndarray], np.ndarray], xy: np.ndarray) -> np.ndarray:
    mask = np.asarray(keep(xy))
    if mask.dtype != bool or mask.shape != (len(xy),):
        raise ValueError("keep must return a boolean array with one value per point")
    return mask


# =============================================================================== corridor
def corridor_mask(
    polyline_crs: np.ndarray, buffer_crs_units: float
) -> Callable[[np.ndarray], np.ndarray]:
    """A ``keep`` callable selecting points within a horizontal buffer of a polyline.

    Parameters
    ----------
    polyline_crs
        Polyline vertices (x, y), shape (k, 2), k >= 1. [CRS unit]
    buffer_crs_units
        Buffer half-width: largest horizontal distance from the polyline kept. [CRS unit]

    Returns
    -------
    callable
        ``keep(xy_crs) -> mask``; ``xy_crs`` shape (n, 2) [CRS unit], mask shape (n,) bool.

    Notes
    -----
    Distance from point p to segment a–b: with ``t = clip((p - a)·(b - a) / |b - a|², 0, 1)``,
    ``d = |p - (a + t (b - a))|``. The mask is ``min over segments of d <= buffer``. Each
    segment only tests the points inside its bounding box grown by the buffer.
    """
    line = np.asarray(polyline_crs, dtype=np.float64)
    if line.ndim != 2 or line.shape[1] != 2 or len(line) < 1:
        raise ValueError("polyline_crs must be an array of shape (k, 2) with k >= 1")
    if not np.all(np.isfinite(line)):
        raise ValueError("polyline_crs must contain finite coordinates")
    buffer = float(buffer_crs_units)
    if not np.isfinite(buffer) or buffer < 0:
        raise ValueError("buffer_crs_units must be a finite non-negative distance")
    if len(line) == 1:
        line = np.vstack([line, line])
    starts, ends = line[:-1], line[1:]
    lo = np.minimum(starts, ends) - buffer
    hi = np.maximum(starts, ends) + buffer
    all_lo, all_hi = lo.min(axis=0), hi.max(axis=0)
    b2 = buffer * buffer

    # sweep axis: the longer side of the polyline's box; the points are bucketed along it
    # (a linear-time counting sort on the bucket number) and each segment only looks at the
    # buckets its own slab covers, so the cost is about n + n * (segments overlapping a
    # slab), not n * segments
    axis = int(np.argmax(all_hi - all_lo))
    n_buckets = 4096
    width = float(all_hi[axis] - all_lo[axis])
    per_unit = n_buckets / width if width > 0 else 0.0
    # floor((v - lo) * per_unit) never decreases with v, so the buckets of a slab's ends
    # bound the buckets of every point inside it
    seg_b0 = np.clip(np.floor((lo[:, axis] - all_lo[axis]) * per_unit), 0, n_buckets - 1)
    seg_b1 = np.clip(np.floor((hi[:, axis] - all_lo[axis]) * per_unit), 0, n_buckets - 1)
    seg_b0, seg_b1 = seg_b0.astype(np.int64), seg_b1.astype(np.int64)

    # coarse raster over the box: a cell whose centre is at distance d_c from the polyline
    # holds only points at distance <= d_c + half its diagonal (distance to a set changes no
    # faster than position), so cells with d_c + h <= buffer - tol are wholly kept and cells
    # with d_c - h > buffer + tol wholly dropped; only the points of the cells in between get
    # the exact per-segment test. ``tol`` is far above the round-off of the exact test.
    tol = 1e-6 * (float(np.max(np.abs(line))) + buffer) + 1e-9
    extent = all_hi - all_lo
    cell = max(buffer / 4.0, float(np.sqrt(extent[0] * extent[1] / 1e6)), 1e-9)
    n_cells = np.maximum(np.ceil(extent / cell).astype(np.int64), 1)
    cx = all_lo[0] + (np.arange(n_cells[0]) + 0.5) * cell
    cy = all_lo[1] + (np.arange(n_cells[1]) + 0.5) * cell
    gx, gy = np.meshgrid(cx, cy, indexing="ij")
    d_cell = np.full(gx.shape, np.inf)
    half = cell * np.sqrt(0.5) + tol
    # a cell centre outside every segment's box grown by the buffer and ``half`` is farther
    # than buffer + half from the polyline (dropped whatever its exact distance), so each
    # segment only measures the cells of its own grown box: the cost follows the corridor's
    # area, not (cells of the whole box) x (segments)
    pad = half + tol
    for a, b, l0, h0 in zip(starts, ends, lo, hi, strict=True):
        i0, j0 = np.maximum(np.floor((l0 - pad - all_lo) / cell).astype(np.int64), 0)
        i1, j1 = np.minimum(np.ceil((h0 + pad - all_lo) / cell).astype(np.int64) + 1, n_cells)
        if i1 <= i0 or j1 <= j0:
            continue
        sx, sy = gx[i0:i1, j0:j1], gy[i0:i1, j0:j1]
        ab = b - a
        denom = float(ab @ ab)
        t = 0.0 if denom == 0.0 else np.clip(((sx - a[0]) * ab[0] + (sy - a[1]) * ab[1]) / denom,
                                             0.0, 1.0)
        sub = d_cell[i0:i1, j0:j1]
        np.minimum(sub, np.hypot(sx - (a[0] + t * ab[0]), sy - (a[1] + t * ab[1])), out=sub)
    # 0: all dropped, 1: all kept, 2: test each point
    cell_state = np.full(gx.shape, 2, dtype=np.uint8)
    cell_state[d_cell + half <= buffer - tol] = 1
    cell_state[d_cell - half > buffer + tol] = 0
    cell_state = cell_state.ravel()
    del gx, gy, d_cell

    def keep(xy_crs: np.ndarray) -> np.ndarray:
        xy = np.asarray(xy_crs, dtype=np.float64)
        x, y = xy[:, 0], xy[:, 1]
        box = (x >= all_lo[0]) & (x <= all_hi[0])
        box &= y >= all_lo[1]
        box &= y <= all_hi[1]
        inside = np.flatnonzero(box)
        mask = box
        if len(inside) == 0:
            return mask
        ix = np.take(x, inside)
        ix -= all_lo[0]
        ix /= cell
        jx = np.minimum(ix.astype(np.int64), n_cells[0] - 1)  # >= 0 inside the box
        iy = np.take(y, inside)
        iy -= all_lo[1]
        iy /= cell
        jx *= n_cells[1]
        jx += np.minimum(iy.astype(np.int64), n_cells[1] - 1)
        del ix, iy
        state = np.take(cell_state, jx)
        del jx
        mask[inside] = state == 1
        inside = inside[state == 2]
        del state
        if len(inside) == 0:
            return mask
        mask[inside] = exact(xy, inside)
        return mask

    # the exact test's polyline (:func:`clearaudit.classify.kernels.corridor_exact`): per
    # segment its start, direction, squared length and box grown by the buffer, and per
    # bucket along the sweep axis the segments whose slab covers it (in segment order)
    ab = ends - starts
    seg = np.ascontiguousarray(np.column_stack(
        (starts, ab, ab[:, 0] * ab[:, 0] + ab[:, 1] * ab[:, 1], lo, hi)), dtype=np.float64)
    span = seg_b1 - seg_b0 + 1
    bucket_seg = np.repeat(np.arange(len(seg), dtype=np.int64), span)
    bucket_of = (np.arange(int(span.sum()), dtype=np.int64)
                 - np.repeat(np.cumsum(span) - span, span) + np.repeat(seg_b0, span))
    order = np.argsort(bucket_of, kind="stable")  # each bucket's segments in segment order
    bucket_seg = np.ascontiguousarray(bucket_seg[order])
    bucket_start = np.concatenate(([0], np.cumsum(np.bincount(bucket_of, minlength=n_buckets))))
    polyline = (seg, float(b2), axis, float(all_lo[axis]), float(per_unit), int(n_buckets),
                bucket_start.astype(np.int64), bucket_seg)

    def exact(xy: np.ndarray, inside: np.ndarray) -> np.ndarray:
        """Whether each point ``xy[inside]`` (inside the box) lies within the buffer: the
        per-segment distances (compiled), for the points of the raster cells that straddle
        it."""
        from ..classify.kernels import corridor_exact

        out = np.empty(len(inside), dtype=np.uint8)
        corridor_exact(xy, np.ascontiguousarray(inside, dtype=np.int64), *polyline, out)
        return out.view(bool)

    # for readers that test the corridor in a compiled pass (read_range): the box, the raster
    # and the polyline of the straddling cells' exact test
    keep.raster = (float(all_lo[0]), float(all_lo[1]), float(all_hi[0]), float(all_hi[1]),
                   float(cell), int(n_cells[0]), int(n_cells[1]), cell_state, *polyline)
    return keep


# =============================================================================== describe
def describe(paths: str | Path | Iterable[str | Path], crs: Any = None,
             chunk_size: int = DEFAULT_CHUNK_SIZE) -> list[dict[str, Any]]:
    """Facts about each input file, for the ``info`` command.

    Parameters
    ----------
    paths
        Files and/or folders (see :func:`resolve_inputs`).
    crs
        Optional CRS override (as in :func:`read_cloud`); files are not required to agree.
    chunk_size
        Points decoded per step while counting classes and bounds. [points]

    Returns
    -------
    list of dict
        One per file: ``path, file_size_bytes, compressed, version, point_format,
        point_count, bounds_min, bounds_max`` (from the points, CRS units),
        ``header_bounds_min, header_bounds_max, scales, offsets, crs_name, crs_epsg,
        crs_origin, horizontal_unit, vertical_unit, horizontal_unit_m, vertical_unit_m,
        class_counts`` ({code: count}), ``withheld_points`` (flagged withheld: an audit
        leaves them out), ``extra_dimensions``.
    """
    files = resolve_inputs(paths)
    override = parse_crs_option(crs)
    out = []
    for meta in _scan_headers(files, tolerate_bad_crs=override is not None):
        header = meta.header
        the_crs = override if override is not None else meta.crs
        h_m, v_m = crs_units_m(the_crs, str(meta.path))
        h_name, v_name = crs_unit_names(the_crs)
        counts = np.zeros(256, dtype=np.int64)
        box = _HeaderBox(header)
        lo = np.full(3, np.inf)
        hi = np.full(3, -np.inf)
        n = withheld = 0
        with _open_reader(meta.path) as reader:
            for chunk in _chunks(reader, meta.path, chunk_size):
                n += len(chunk)
                withheld += int(np.count_nonzero(np.asarray(chunk.withheld)))
                counts += np.bincount(np.asarray(chunk.classification, dtype=np.uint8),
                                      minlength=256)
                for axis, name in enumerate("XYZ"):
                    ints = np.asarray(chunk[name])
                    lo[axis] = min(lo[axis], ints.min())
                    hi[axis] = max(hi[axis], ints.max())
        if n != meta.point_count:
            raise InputError(meta.path, f"is truncated or corrupt (header says "
                                        f"{meta.point_count} points, {n} could be read)")
        scales = np.asarray(header.scales, dtype=np.float64)
        offsets = np.asarray(header.offsets, dtype=np.float64)
        info = {
            "path": str(meta.path),
            "file_size_bytes": meta.path.stat().st_size,
            "compressed": bool(header.are_points_compressed),
            "version": str(header.version),
            "point_format": int(header.point_format.id),
            "point_count": meta.point_count,
            "bounds_min": (lo * scales + offsets).tolist() if n else None,
            "bounds_max": (hi * scales + offsets).tolist() if n else None,
            "header_bounds_min": [float(v) for v in header.mins],
            "header_bounds_max": [float(v) for v in header.maxs],
            # points more than HEADER_BOUNDS_SLACK beyond the header's bounds: an audit
            # refuses the file (damage that still decodes, or a wrong header)
            "beyond_header_bounds": bool(n) and not box.holds(lo, hi),
            "scales": scales.tolist(),
            "offsets": offsets.tolist(),
            **crs_label(the_crs),
            "crs_origin": "override" if override is not None else meta.crs_origin,
            "horizontal_unit": h_name,
            "vertical_unit": v_name,
            "horizontal_unit_m": h_m,
            "vertical_unit_m": v_m,
            "class_counts": {int(c): int(counts[c]) for c in np.flatnonzero(counts)},
            "withheld_points": withheld,
            "extra_dimensions": list(header.point_format.extra_dimension_names),
        }
        out.append(info)
    return out


# =============================================================================== writing
ExtraDims = dict[str, tuple[np.ndarray, str]]


def write_cloud(
    cloud: Cloud,
    path: str | Path,
    *,
    extra_dims: ExtraDims | None = None,
    point_format: int = 6,
    version: str = "1.4",
    scale_crs_units: float | Sequence[float] | None = None,
) -> Path:
    """Write a Cloud as a new LAS or LAZ file (chosen by the suffix).

    Parameters
    ----------
    cloud
        Points to write; coordinates go back to CRS units with ``cloud.to_crs``.
    path
        Output file, ``.las`` or ``.laz``. Written to a temporary file in the same folder and
        renamed on success.
    extra_dims
        ``{name: (values, description)}``, one value per point. Floating-point values are
        stored as float32; integer and boolean arrays keep their integer type (bool → uint8).
    point_format
        LAS point data record format 0–10.
    version
        LAS version "1.2", "1.3" or "1.4" (must support ``point_format``).
    scale_crs_units
        Coordinate scale (one number or x, y, z). Default 0.001 for metre axes and 0.01 for
        foot axes. [CRS unit]

    Returns
    -------
    Path
        The written file.

    Raises
    ------
    ValueError
        Bad suffix, format/version mismatch, wrong array lengths, class codes or coordinates
        that do not fit the format.

    Notes
    -----
    Integer records are ``X = round((x_local / u + (O - o)) / s)`` with local metres
    ``x_local``, unit length ``u``, origin ``O``, header offset ``o`` (``O`` rounded to the
    scale grid) and scale ``s``; when ``O`` is on the grid this is exact for coordinates that
    were read at the same scale. The CRS goes into a WKT VLR (LAS 1.4), or GeoTIFF keys for
    older versions when pyproj can express it that way (WKT VLR otherwise).

    References
    ----------
    ASPRS, LAS Specification 1.4 R15 (2019).
    """
    path = Path(path)
    compress = _suffix_compression(path)
    point_format = int(point_format)
    version = str(version)
    if point_format not in range(11):
        raise ValueError("point_format must be an integer from 0 to 10")
    if not laspy.point.dims.is_point_fmt_compatible_with_version(point_format, version):
        raise ValueError(f"LAS version {version} cannot hold point format {point_format}")
    n = cloud.n_points
    header = laspy.LasHeader(point_format=point_format, version=version)
    header.system_identifier = "clearaudit"
    header.generating_software = f"clearaudit {__version__}"[:32]
    unit = cloud.unit_m
    if scale_crs_units is None:
        scales = np.where(np.isclose(unit, 1.0), 0.001, 0.01)
    else:
        scales = np.broadcast_to(np.asarray(scale_crs_units, dtype=np.float64), (3,)).copy()
    if not np.all(np.isfinite(scales) & (scales > 0)):
        raise ValueError("scale_crs_units must be positive")
    offsets = np.round(cloud.origin / scales) * scales
    header.scales = scales
    header.offsets = offsets
    if cloud.crs is not None:
        _add_crs(header, cloud.crs)
    extras = _prepare_extra_dims(extra_dims, n, header.point_format.dimension_names)
    if extras:
        header.add_extra_dims([laspy.ExtraBytesParams(name=k, type=v.dtype, description=d)
                               for k, (v, d) in extras.items()])
    ints = _to_int_records(cloud.xyz, unit, cloud.origin - offsets, scales)
    dims = set(header.point_format.dimension_names)
    cls = np.asarray(cloud.classification)
    if point_format < 6 and n and int(cls.max()) > 31:
        raise ValueError(f"class code {int(cls.max())} does not fit point format {point_format} "
                         "(codes above 31 need format 6-10)")
    fields = {k: v for k, v in cloud.fields.items() if k in dims and k not in ("X", "Y", "Z")}
    skipped = sorted(set(cloud.fields) - set(fields))
    if skipped:
        logger.info("fields not in point format %d, not written: %s", point_format, skipped)

    def fill(record: Any, sl: slice) -> None:
        record.X = ints[sl, 0]
        record.Y = ints[sl, 1]
        record.Z = ints[sl, 2]
        record.classification = cls[sl]
        for k, v in fields.items():
            record[k] = _fit_dim(k, np.asarray(v[sl]), header.point_format)
        for k, (v, _) in extras.items():
            record[k] = v[sl]

    def produce(writer: Any) -> None:
        for start in range(0, n, DEFAULT_CHUNK_SIZE):
            stop = min(n, start + DEFAULT_CHUNK_SIZE)
            record = laspy.ScaleAwarePointRecord.zeros(stop - start, header=writer.header)
            fill(record, slice(start, stop))
            writer.write_points(record)

    _write_atomically(path, header, compress, produce)
    return path


def _suffix_compression(path: Path) -> bool:
    suffix = path.suffix.lower()
    if suffix not in LAS_SUFFIXES:
        raise ValueError(f"output file must end in .las or .laz, not {path.name!r}")
    return suffix == ".laz"


def _add_crs(header: Any, crs: Any) -> None:
    from laspy.vlrs.known import WktCoordinateSystemVlr

    if header.version.minor >= 4:
        header.vlrs.append(WktCoordinateSystemVlr(crs_to_wkt(crs)))
        header.global_encoding.wkt = True
        return
    try:
        header.add_crs(crs)  # GeoTIFF keys for LAS < 1.4 with formats 0-5
    except Exception as exc:  # noqa: BLE001 - CRS not expressible as GeoTIFF keys
        logger.info("CRS %r written as a WKT VLR (no GeoTIFF keys: %s)", crs.name, exc)
        header.vlrs.append(WktCoordinateSystemVlr(crs_to_wkt(crs)))


def _to_int_records(xyz_local_m: np.ndarray, unit_m: np.ndarray, origin_minus_offset: np.ndarray,
                    scales: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore"):
        values = np.rint((xyz_local_m / unit_m + origin_minus_offset) / scales)
    if len(values) and not np.all(np.isfinite(values)):
        raise ValueError("coordinates must be finite to be written")
    if len(values) and (values.min() < _INT32_MIN or values.max() > _INT32_MAX):
        raise ValueError("coordinates do not fit 32-bit LAS records at this scale; "
                         "use a coarser scale_crs_units")
    return values.astype(np.int32)


def _fit_dim(name: str, values: np.ndarray, point_format: Any) -> np.ndarray:
    """Check that integer field values fit the dimension (or bit field) of the format."""
    info = point_format.dimension_by_name(name)
    integer_dim = info.kind != laspy.point.dims.DimensionKind.FloatingPoint
    if values.size and integer_dim and not info.is_scaled:
        vmin, vmax = values.min(), values.max()
        if vmin < info.min or vmax > info.max:
            raise ValueError(f"field {name!r} has values outside [{info.min}, {info.max}] "
                             f"allowed by point format {point_format.id}")
    return values


def _prepare_extra_dims(extra_dims: ExtraDims | None, n: int,
                        taken: Iterable[str]) -> dict[str, tuple[np.ndarray, str]]:
    if not extra_dims:
        return {}
    taken = {t.lower() for t in taken}
    out: dict[str, tuple[np.ndarray, str]] = {}
    for name, item in extra_dims.items():
        if not isinstance(item, tuple) or len(item) != 2:
            raise ValueError(f"extra dimension {name!r} must be given as (values, description)")
        values, description = item
        if not name or len(name.encode("ascii", "replace")) > 32:
            raise ValueError(f"extra dimension name {name!r} must have 1 to 32 characters")
        if name.lower() in taken:
            raise ValueError(f"extra dimension name {name!r} clashes with a standard dimension")
        values = np.asarray(values)
        if values.shape != (n,):
            raise ValueError(f"extra dimension {name!r} needs one value per point "
                             f"({n}), got shape {values.shape}")
        if values.dtype == bool:
            values = values.astype(np.uint8)
        elif np.issubdtype(values.dtype, np.floating):
            values = values.astype(np.float32, copy=False)
        elif not np.issubdtype(values.dtype, np.integer):
            raise ValueError(f"extra dimension {name!r} must be numeric or boolean")
        out[name] = (values, str(description)[:31])
    return out


def _write_atomically(path: Path, header: Any, compress: bool,
                      produce: Callable[[Any], None]) -> None:
    """Create ``path`` through a temporary file in the same folder (renamed on success).

    ``produce(writer)`` writes the points with ``writer.write_points``; on any exception the
    temporary file is removed and ``path`` is left untouched.
    """
    def write(fh: BinaryIO) -> None:
        with laspy.LasWriter(fh, header=header, do_compress=compress, closefd=False) as w:
            produce(w)

    _write_file_atomically(path, write)


def _write_file_atomically(path: Path, write: Callable[[BinaryIO], None]) -> None:
    """``write(fh)`` into a temporary file in the folder of ``path``, renamed to ``path`` on
    success; on any exception the temporary file is removed and ``path`` left untouched."""
    folder = path.parent
    if not folder.is_dir():
        raise InputError(folder, "output folder does not exist")
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=f"{path.suffix}.part",
                                    dir=folder)
    tmp = Path(tmp_name)
    try:
        with os.fdopen(fd, "wb") as fh:
            write(fh)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp creates 0600; give the file normal permissions
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def _copy_layers(path: Path, header: Any, metas: Sequence[_FileMeta],
                 file_values: Sequence[Callable[[int, int], tuple]], new_names: set[str],
                 records: RecordScratch | None, report: dict[str, Any] | None) -> bool:
    """Write the classified copy by copying the inputs' compressed layers
    (:mod:`clearaudit.io.lazcopy`) when the scratch was kept for it; False when it cannot
    (then the caller re-compresses the points, decoding the inputs again)."""
    from . import lazcopy

    if records is None or not records.layers:
        return False
    why = (None if _suffix_compression(path) else "the classified copy is not compressed")
    why = why or lazcopy.blocker([m.header for m in metas])
    first = metas[0].header
    if why is None and (header.point_format.id != first.point_format.id
                        or not _is_record_prefix(first.point_format, header.point_format)
                        or _axes_to_rescale(first, header)):
        why = "the output records do not extend the inputs' records"
    ranges, bounds = [], []
    for file_id, meta in enumerate(metas):
        if why is not None:
            break
        found = records.ranges(file_id, lazcopy.SIDE_SIZE, meta.point_count)
        box = records.bounds(found) if found is not None else None
        if box is None:
            why = f"the scratch of {meta.path.name} is incomplete"
            break
        ranges.append(found)
        bounds.append(box)
    layout = None
    if why is None:
        try:  # an input without a usable chunk table is decoded point by point instead
            layout = lazcopy.chunk_layout(metas)
        except InputError as exc:
            why = str(exc)
    if why is None:
        written: dict[str, Any] = {}
        try:
            _write_file_atomically(path, lambda fh: written.update(lazcopy.write_copy(
                fh, header, metas, file_values, new_names, ranges, bounds, layout=layout)))
            if report is not None:
                report.update(written)
            return True
        except lazcopy.ChannelsChange as exc:
            why = str(exc)
    logger.info("%s: compressed layers not copied (%s); decoding the inputs again",
                path.name, why)
    if report is not None:
        report["copy"] = "records"
        report["records_from"] = "inputs"
        report["reason"] = f"{why}: the inputs were decoded again and re-compressed"
    return False


# =============================================================================== classified output
def write_classified(
    cloud: Cloud,
    path: str | Path,
    classification: np.ndarray,
    extra_dims: ExtraDims | None = None,
    *,
    chunk_size: int = DEFAULT_CHUNK_SIZE,
    records: RecordScratch | None = None,
    report: dict[str, Any] | None = None,
) -> Path:
    """Write every point of the original input files with new class codes and extra dims.

    Parameters
    ----------
    cloud
        The cloud that was classified (possibly a culled subset of its input files);
        ``cloud.sources``, ``cloud.source_id`` and ``cloud.source_index`` map its points back.
    path
        Output file, ``.las`` or ``.laz`` (temporary file in the same folder, renamed on
        success).
    classification
        New ASPRS class code for each point of ``cloud``, shape (n,). Codes above 31 need an
        output point format of 6 or more (the format is raised to 6+ when needed).
    extra_dims
        ``{name: (values, description)}`` per point of ``cloud``. Floating-point values are
        stored as float32; points of the input files that are not in ``cloud`` get NaN (0 for
        integer dimensions).
    chunk_size
        Points streamed per step. [points]
    records
        The :class:`RecordScratch` the cloud was read with: the point records of its files
        are read from the scratch files instead of being decoded again (same output bytes),
        or, for layered LAZ inputs, their compressed layers are copied
        (:mod:`clearaudit.io.lazcopy`; the same points).
    report
        The run record's ``classified_copy`` (from :func:`plan_record_scratch`), updated
        when the copy falls back to decoding the inputs again.

    Returns
    -------
    Path
        The written file.

    Raises
    ------
    ValueError
        Wrong array shapes, a cloud without source bookkeeping, codes outside 0–255.
    InputError
        A source file is missing, changed since it was read, or unreadable.

    Notes
    -----
    Points are written file after file in ``cloud.sources`` order, each file in its own point
    order, with all of its dimensions (extra bytes included). Inputs of different point
    formats are converted to the lowest format that holds every input's dimensions
    (``scan_angle_rank`` [deg] becomes ``scan_angle`` in units of 0.006° for formats 6–10).
    Coordinates keep the inputs' precision: the output scale is the finest input scale, and
    an input whose scale equals it is shifted by whole integers. An input whose point records
    are a byte prefix of the output's (the usual case: one point format, the new extra
    dimensions appended) is copied record by record as raw bytes before the class codes and
    extra dimensions are set; the result is the same as copying dimension by dimension.

    References
    ----------
    ASPRS, LAS Specification 1.4 R15 (2019), Table 17 (class codes), section 2.6 (extra
    bytes).
    """
    path = Path(path)
    compress = _suffix_compression(path)
    if chunk_size < 1:
        raise ValueError("chunk_size must be a positive number of points")
    n = cloud.n_points
    if not cloud.sources or cloud.source_id is None or cloud.source_index is None:
        raise ValueError("cloud has no source bookkeeping (sources, source_id, source_index); "
                         "read it with read_cloud")
    codes = np.asarray(classification)
    if codes.shape != (n,):
        raise ValueError(f"classification needs one code per point ({n}), got {codes.shape}")
    if n and (not np.issubdtype(codes.dtype, np.integer) or codes.min() < 0 or codes.max() > 255):
        raise ValueError("classification codes must be integers from 0 to 255")
    codes = codes.astype(np.uint8)
    source_id = np.asarray(cloud.source_id)  # kept in its own (narrow) integer type
    source_index = np.asarray(cloud.source_index)
    if n and (source_id.min() < 0 or source_id.max() >= len(cloud.sources)):
        raise ValueError("cloud.source_id refers to files not in cloud.sources")

    metas = _source_metas(cloud.sources)
    max_code = int(codes.max()) if n else 0
    new_extras = _prepare_extra_dims(extra_dims, n, laspy.PointFormat(
        _common_point_format([m.header.point_format.id for m in metas], max_code)
    ).dimension_names)
    header = _classified_header(metas, cloud.crs, max_code,
                                {k: (v.dtype, d) for k, (v, d) in new_extras.items()})

    # Points of a cloud read whole come file after file: no sort, every file's rows a slice.
    in_file_order = n < 2 or bool(np.all(source_id[1:] >= source_id[:-1]))
    order = None if in_file_order else np.argsort(source_id, kind="stable")
    bounds = np.searchsorted(source_id if order is None else source_id[order],
                             np.arange(len(metas) + 1))

    def prepare(file_id: int) -> Callable[[int, int], tuple]:
        """``values(start, stop)`` of one input file (arrays over the file when the cloud
        holds only part of it)."""
        meta = metas[file_id]
        lo, hi = int(bounds[file_id]), int(bounds[file_id + 1])
        rows = slice(lo, hi) if order is None else order[lo:hi]
        count = meta.point_count
        idx = source_index[rows]
        if len(idx) and (idx.min() < 0 or idx.max() >= count):
            raise ValueError(f"cloud.source_index is out of range for {meta.path.name}")
        if (order is None and len(idx) == count
                and np.array_equal(idx, np.arange(count, dtype=idx.dtype))):
            # Every point of the file, in file order: the cloud's arrays as they are.
            file_codes = codes[rows]
            file_extras = {k: v[rows] for k, (v, _) in new_extras.items()}

            def whole(start: int, stop: int):
                sl = slice(start, stop)
                return (np.ones(stop - start, dtype=bool), file_codes[sl],
                        {k: a[sl] for k, a in file_extras.items()})

            return whole
        has_new = np.zeros(count, dtype=bool)
        has_new[idx] = True
        if int(has_new.sum()) != len(idx):
            raise ValueError(f"cloud.source_index repeats points of {meta.path.name}")
        new_codes = np.zeros(count, dtype=np.uint8)
        new_codes[idx] = codes[rows]
        full_extras = {}
        for k, (v, _) in new_extras.items():
            fill = np.nan if np.issubdtype(v.dtype, np.floating) else 0
            arr = np.full(count, fill, dtype=v.dtype)
            arr[idx] = v[rows]
            full_extras[k] = arr

        def values(start: int, stop: int):
            sl = slice(start, stop)
            return has_new[sl], new_codes[sl], {k: a[sl] for k, a in full_extras.items()}

        return values

    prepared: dict[int, Callable[[int, int], tuple]] = {}  # the file being written only

    def file_values(file_id: int) -> Callable[[int, int], tuple]:
        def values(start: int, stop: int):
            if file_id not in prepared:
                prepared.clear()
                prepared[file_id] = prepare(file_id)
            return prepared[file_id](start, stop)

        return values

    per_file = [file_values(file_id) for file_id in range(len(metas))]
    if _copy_layers(path, header, metas, per_file, set(new_extras), records, report):
        return path
    prepared.clear()

    def produce(writer: Any) -> None:
        for file_id, meta in enumerate(metas):
            _stream_file(writer, meta, per_file[file_id], chunk_size,
                         _kept(records, file_id, meta))

    _write_atomically(path, header, compress, produce)
    return path


def _source_metas(sources: Sequence[SourceInfo]) -> list[_FileMeta]:
    """Re-open the input files of a read; they must still hold the points that were read."""
    metas = []
    for info in sources:
        src = Path(info.path)
        if not src.exists():
            raise InputError(src, "input file no longer exists; cannot write the classified copy")
        with _open_reader(src) as reader:
            header = reader.header
        if int(header.point_count) != info.point_count:
            raise InputError(src, f"has changed since it was read ({header.point_count} points "
                                  f"now, {info.point_count} before)")
        metas.append(_FileMeta(path=src, header=header, crs=None, crs_origin=""))
    return metas


def _classified_header(metas: Sequence[_FileMeta], crs: Any, max_code: int,
                       new_extras: dict[str, tuple[Any, str]]) -> Any:
    """Header of the classified copy: common point format, finest scale, old + new extras."""
    out_format = _common_point_format([m.header.point_format.id for m in metas], max_code)
    version = max([str(m.header.version) for m in metas]
                  + [laspy.point.dims.preferred_file_version_for_point_format(out_format)])
    point_format = laspy.PointFormat(out_format)
    for dim in _union_extra_dims(metas, set(new_extras)):
        point_format.dimensions.append(dim)
    header = laspy.LasHeader(point_format=point_format, version=version)
    header.system_identifier = "clearaudit"
    header.generating_software = f"clearaudit {__version__}"[:32]
    first = metas[0].header
    header.global_encoding.gps_time_type = first.global_encoding.gps_time_type
    scales = np.min([np.asarray(m.header.scales, dtype=np.float64) for m in metas], axis=0)
    header.scales = scales
    header.offsets = np.asarray(first.offsets, dtype=np.float64)
    if crs is not None:
        _add_crs(header, crs)
    if new_extras:
        header.add_extra_dims([laspy.ExtraBytesParams(name=k, type=dtype, description=d)
                               for k, (dtype, d) in new_extras.items()])
    return header


ChunkValues = Callable[[int, int, int], tuple[np.ndarray, np.ndarray, dict[str, np.ndarray]]]


def write_classified_stream(
    sources: Sequence[SourceInfo],
    path: str | Path,
    values: ChunkValues,
    *,
    crs: Any = None,
    max_code: int = 255,
    extra_dims: dict[str, tuple[Any, str]] | None = None,
    chunk_size: int = DEFAULT_CHUNK_SIZE,
    records: RecordScratch | None = None,
    report: dict[str, Any] | None = None,
) -> Path:
    """Write every point of the input files with new codes asked for chunk by chunk.

    Parameters
    ----------
    sources
        The input files (as in ``Cloud.sources``), written in this order, each in its own
        point order.
    path
        Output ``.las`` or ``.laz`` (temporary file in the same folder, renamed on success).
    values
        ``values(file_id, start, stop) -> (has_new, codes, extras)`` for the points
        ``start:stop`` of file ``file_id``: ``has_new`` bool (stop - start,) marks points that
        get a new code from ``codes`` (uint8, same shape); the others keep their own class.
        ``extras`` maps each name of ``extra_dims`` to one value per point.
    crs
        CRS written into the header (None: no CRS record).
    max_code
        Largest class code that ``values`` can return (codes above 31 need point format 6+).
    extra_dims
        ``{name: (numpy dtype, description)}`` of the new extra dimensions.
    chunk_size
        Points streamed per step. [points]
    records
        The :class:`RecordScratch` the inputs were split with (:func:`read_range`
        ``records_to``): point records are read from its files instead of being decoded,
        or, for layered LAZ inputs, their compressed layers are copied
        (:mod:`clearaudit.io.lazcopy`).
    report
        The run record's ``classified_copy``, updated when the copy falls back to decoding
        the inputs again.

    Returns
    -------
    Path
        The written file.

    Notes
    -----
    Memory is bounded by ``chunk_size`` and what ``values`` holds; the output is the same as
    :func:`write_classified` given the same codes.

    References
    ----------
    ASPRS, LAS Specification 1.4 R15 (2019), Table 17 (class codes), section 2.6 (extra
    bytes).
    """
    path = Path(path)
    compress = _suffix_compression(path)
    if chunk_size < 1:
        raise ValueError("chunk_size must be a positive number of points")
    if not sources:
        raise ValueError("sources must name at least one input file")
    metas = _source_metas(sources)
    extras = {k: (np.dtype(t), str(d)[:31]) for k, (t, d) in (extra_dims or {}).items()}
    header = _classified_header(metas, crs, int(max_code), extras)

    def file_values(file_id: int) -> Callable[[int, int], tuple]:
        def chunk_values(start: int, stop: int):
            has_new, codes, more = values(file_id, start, stop)
            return (np.asarray(has_new, dtype=bool), np.asarray(codes, dtype=np.uint8),
                    {k: np.asarray(more[k], dtype=extras[k][0]) for k in extras})

        return chunk_values

    per_file = [file_values(file_id) for file_id in range(len(metas))]
    if _copy_layers(path, header, metas, per_file, set(extras), records, report):
        return path

    def produce(writer: Any) -> None:
        for file_id, meta in enumerate(metas):
            _stream_file(writer, meta, per_file[file_id], chunk_size,
                         _kept(records, file_id, meta))

    _write_atomically(path, header, compress, produce)
    return path


def _kept(records: RecordScratch | None, file_id: int,
          meta: _FileMeta) -> list[tuple[Path, int]] | None:
    """The scratch files holding the records of input ``file_id`` (None: decode the input)."""
    if records is None or records.layers or file_id not in records.file_ids:
        return None
    ranges = records.ranges(file_id, meta.header.point_format.dtype().itemsize,
                            meta.point_count)
    if ranges is None:
        logger.warning("%s: its scratch records are incomplete; decoding the input again",
                       meta.path)
    return ranges


def _stream_file(writer: Any, meta: _FileMeta, values: Callable[[int, int], tuple],
                 chunk_size: int, kept: list[tuple[Path, int]] | None = None) -> None:
    """Stream one input file into ``writer`` with new class codes and extra dimensions.

    When the input's point records are a byte prefix of the output's (same point format,
    same extra dimensions first — the usual case), each chunk is copied as raw bytes;
    otherwise the dimensions are copied by name (format conversion). The records come from
    the scratch files ``kept`` (path, points) when given, else from decoding the input.
    """
    prefix = _is_record_prefix(meta.header.point_format, writer.header.point_format)
    if kept is not None:
        raw = _scratch_record_bytes(kept, meta, chunk_size)
        if prefix:
            start = _stream_raw(writer, meta, raw, values, chunk_size)
        else:
            start = _stream_by_name(writer, meta, (_as_points(b, meta.header) for b in raw),
                                    values)
    else:
        with _open_reader(meta.path) as reader:
            if prefix:
                start = _stream_raw(writer, meta, _record_bytes(reader, meta.path, chunk_size),
                                    values, chunk_size)
            else:
                start = _stream_by_name(writer, meta, _chunks(reader, meta.path, chunk_size),
                                        values)
    if start != meta.point_count:
        raise InputError(meta.path, f"is truncated or corrupt (header says {meta.point_count} "
                                    f"points, {start} could be read)")


def _scratch_record_bytes(kept: list[tuple[Path, int]], meta: _FileMeta,
                          chunk_size: int) -> Iterator[np.ndarray]:
    """Yield the records kept in scratch files as (m, record size) uint8 arrays, in chunks of
    ``chunk_size`` points whatever the files' ranges (the chunks the decoder would give),
    read into one reused buffer (overwritten by the next chunk)."""
    size = meta.header.point_format.dtype().itemsize
    total = sum(n for _, n in kept)
    buffer = np.empty(min(chunk_size, max(total, 0)) * size, dtype=np.uint8)
    files = iter(kept)
    fh = None
    done = 0
    try:
        while done < total:
            m = min(chunk_size, total - done)
            view = memoryview(buffer)[:m * size]
            filled = 0
            while filled < len(view):
                if fh is None:
                    scratch_path, _ = next(files)
                    fh = open(scratch_path, "rb", buffering=0)  # noqa: SIM115 - closed below
                got = fh.readinto(view[filled:])
                if not got:
                    fh.close()
                    fh = None
                    continue
                filled += got
            done += m
            yield buffer[:m * size].reshape(m, size)
    except StopIteration:  # pragma: no cover - sizes are checked by RecordScratch.ranges
        raise InputError(meta.path, "its scratch records ended early") from None
    finally:
        if fh is not None:
            fh.close()


def _as_points(chunk_bytes: np.ndarray, header: Any) -> laspy.ScaleAwarePointRecord:
    """Raw records of a file as the laspy point record its reader would give."""
    array = chunk_bytes.reshape(-1).view(header.point_format.dtype())
    return laspy.ScaleAwarePointRecord(array, header.point_format, header.scales,
                                       header.offsets)


def _is_record_prefix(in_format: Any, out_format: Any) -> bool:
    """True when every input dimension sits at the same byte offset, with the same type (and
    the same extra-bytes scale and offset), in the output record: then copying the input
    record bytes equals copying the dimensions by name."""
    in_dtype, out_dtype = in_format.dtype(), out_format.dtype()
    if (in_format.id < 6) != (out_format.id < 6) or in_dtype.itemsize > out_dtype.itemsize:
        return False
    out_dims = {d.name: d for d in out_format.dimensions}
    for dim in in_format.dimensions:
        other = out_dims.get(dim.name)
        if other is None or any(not np.array_equal(np.asarray(a, dtype=object),
                                                   np.asarray(b, dtype=object))
                                for a, b in zip(dim, other, strict=True)):
            return False
    for name, field in in_dtype.fields.items():
        if out_dtype.fields.get(name) != field:
            return False
    return True


def _stream_raw(writer: Any, meta: _FileMeta, raw: Iterable[np.ndarray],
                values: Callable[[int, int], tuple], chunk_size: int) -> int:
    """Chunks of one file whose records are a byte prefix of the output records; ``raw``
    yields the input records of each chunk as (m, record size) uint8 arrays."""
    out_header = writer.header
    out_format = out_header.point_format
    in_size = meta.header.point_format.dtype().itemsize
    out_size = out_format.dtype().itemsize
    rescale = _axes_to_rescale(meta.header, out_header)
    legacy = out_format.id < 6
    # One zeroed buffer per file: every chunk overwrites the input bytes and the new extra
    # dimensions; the extra dimensions of other inputs stay zero, as when copied by name.
    buffer = np.zeros(min(chunk_size, max(meta.point_count, 1)), dtype=out_format.dtype())
    buffer_bytes = buffer.view(np.uint8).reshape(len(buffer), out_size)
    start = 0
    for chunk_bytes in raw:
        m = len(chunk_bytes)
        if m > len(buffer):  # pragma: no cover - chunks hold at most chunk_size points
            buffer = np.zeros(m, dtype=out_format.dtype())
            buffer_bytes = buffer.view(np.uint8).reshape(m, out_size)
        records = buffer[:m]
        buffer_bytes[:m, :in_size] = chunk_bytes
        for name, s_in, o_in, s_out, o_out in rescale:
            records[name] = _rescale_ints(records[name], s_in, o_in, s_out, o_out)
        has_new, new_codes, extras = values(start, start + m)
        _set_classification(records, has_new, new_codes, legacy)
        for k, arr in extras.items():
            records[k] = arr
        _write_records(writer, laspy.PackedPointRecord(records, out_format))
        start += m
    return start


def _record_bytes(reader: laspy.LasReader, path: Path, chunk_size: int):
    """Yield the point records of an open file chunk by chunk as (m, record size) uint8
    arrays; LAZ chunks are decoded into one reused buffer (:func:`_reusing_reader`, no fresh
    allocation per chunk).

    The yielded array is overwritten by the next chunk. Decoding errors become
    InputError(path).
    """
    size = reader.header.point_format.dtype().itemsize
    read = _reusing_reader(reader, path)
    if read is None:
        for chunk in _chunks(reader, path, chunk_size):
            yield np.asarray(chunk.array).view(np.uint8).reshape(len(chunk), size)
        return
    while int(reader.points_read) < int(reader.header.point_count):
        with _las_errors(path):
            chunk = read(chunk_size)
        yield np.asarray(chunk.array).view(np.uint8).reshape(len(chunk), size)


def _reusing_reader(reader: laspy.LasReader, path: Path) -> Callable[[int], Any] | None:
    """``reader.read_points`` with a LAZ file's chunks decoded into one buffer reused from call
    to call (read_range's chunks and the classified copy's :func:`_record_bytes`): the
    records a call returns are overwritten by the next call, so the caller must be done with
    them (read_range's loop copies what it keeps).

    laspy allocates a fresh zeroed ``bytearray`` for every call (7.5 MB for 250 000 points of
    format 6, its pages faulted in while the GIL is held); the buffer here is zeroed once, so
    bytes of layers left undecoded stay zero as in laspy's. None for other readers (LAS,
    another record size): the caller reads them with laspy's own calls.
    """
    from laspy._compression.lazrsbackend import LazrsPointReader
    from laspy.point.record import PackedPointRecord, ScaleAwarePointRecord

    fmt = reader.header.point_format
    size = fmt.dtype().itemsize
    with _las_errors(path):
        source = reader.point_source  # created on first use: may fail on a damaged file
    if not isinstance(source, LazrsPointReader) or source.vlr.item_size() != size:
        return None
    scratch: list[np.ndarray] = []

    def read_points(n: int) -> Any:
        m = min(int(n), int(reader.header.point_count) - int(reader.points_read))
        if m <= 0:
            return reader.read_points(n)  # laspy's empty record
        if not scratch or len(scratch[0]) < m * size:
            scratch[:] = [np.zeros(m * size, dtype=np.uint8)]
        view = scratch[0][:m * size]
        source.decompressor.decompress_many(view)
        reader.points_read += m
        packed = PackedPointRecord.from_buffer(view, fmt)
        return ScaleAwarePointRecord(packed.array, fmt, reader.header.scales,
                                     reader.header.offsets)

    return read_points


def _write_records(writer: Any, points: Any) -> None:
    """``writer.write_points(points)`` for records already in the writer's scale/offset
    system, with the header statistics computed without sorting.

    ``LasHeader.grow`` (laspy 2.7) counts points per return number with ``np.unique`` (a sort
    of every chunk); a ``bincount`` gives the same counts. Bounds, GPS-time range, point
    count and extra-bytes statistics are updated with the same expressions as laspy's.
    """
    header = writer.header
    point_writer = getattr(writer, "point_writer", None)
    if (type(writer) is not laspy.LasWriter or point_writer is None or writer.done
            or points.point_format != header.point_format
            or header.max_point_count() - header.point_count < len(points)):
        writer.write_points(points)  # laspy's own checks and messages
        return
    if len(points) == 0:
        return
    records = points.array
    for axis in "xyz":
        ints = records[axis.upper()]
        scale, offset = getattr(header, f"{axis}_scale"), getattr(header, f"{axis}_offset")
        setattr(header, f"{axis}_max",
                max(getattr(header, f"{axis}_max"), (ints.max() * scale) + offset))
        setattr(header, f"{axis}_min",
                min(getattr(header, f"{axis}_min"), (ints.min() * scale) + offset))
    if "gps_time" in records.dtype.names:
        gps_time = records["gps_time"]
        header.max_gps_time = max(header.max_gps_time, gps_time.max())
        header.min_gps_time = min(header.min_gps_time, gps_time.min())
    composed, sub_field = points.sub_fields_dict["return_number"]
    mask = int(sub_field.mask)
    lsb = (mask & -mask).bit_length() - 1
    return_number = (records[composed] & np.uint8(mask)) >> np.uint8(lsb)
    by_return = header.number_of_points_by_return
    counts = np.bincount(return_number, minlength=len(by_return) + 1)
    by_return += counts[1:len(by_return) + 1].astype(by_return.dtype)
    header.point_count += len(points)
    extra_bytes = header.vlrs.get("ExtraBytesVlr")
    if extra_bytes:
        extra_bytes[0].grow(points)
    point_writer.write_points(points)


def _axes_to_rescale(in_header: Any, out_header: Any) -> list[tuple]:
    """(name, in scale, in offset, out scale, out offset) of the axes whose integer
    records change between the input and output scale/offset systems."""
    in_scales = np.asarray(in_header.scales, dtype=np.float64)
    in_offsets = np.asarray(in_header.offsets, dtype=np.float64)
    out_scales = np.asarray(out_header.scales, dtype=np.float64)
    out_offsets = np.asarray(out_header.offsets, dtype=np.float64)
    return [(name, in_scales[axis], in_offsets[axis], out_scales[axis], out_offsets[axis])
            for axis, name in enumerate("XYZ")
            if not (in_scales[axis] == out_scales[axis] and in_offsets[axis] == out_offsets[axis])]


def _set_classification(records: np.ndarray, has_new: np.ndarray, new_codes: np.ndarray,
                        legacy: bool) -> None:
    """New class codes where ``has_new``; formats 0-5 keep the flag bits of their byte.

    LAS 1.4 R15 Table 8: in formats 0-5 the class is the low 5 bits of the classification
    byte, the synthetic, key-point and withheld flags its high 3 bits.
    """
    has_new = np.asarray(has_new, dtype=bool)
    new_codes = np.asarray(new_codes, dtype=np.uint8)
    every = bool(has_new.all())
    if not legacy:
        if every:
            records["classification"] = new_codes
        else:
            records["classification"][has_new] = new_codes[has_new]
        return
    codes = new_codes if every else new_codes[has_new]
    if codes.size and int(codes.max()) > 31:
        raise OverflowError(f"value {int(codes.max())} is greater than allowed (max: 31)")
    raw = records["raw_classification"]
    if every:
        raw[:] = (raw & np.uint8(0xE0)) | codes
    else:
        raw[has_new] = (raw[has_new] & np.uint8(0xE0)) | codes


def _stream_by_name(writer: Any, meta: _FileMeta, chunks: Iterable[Any],
                    values: Callable[[int, int], tuple]) -> int:
    """Chunks of one file (laspy point records) converted to another point format, dimension
    by dimension."""
    out_header = writer.header
    out_scales = np.asarray(out_header.scales, dtype=np.float64)
    out_offsets = np.asarray(out_header.offsets, dtype=np.float64)
    in_scales = np.asarray(meta.header.scales, dtype=np.float64)
    in_offsets = np.asarray(meta.header.offsets, dtype=np.float64)
    legacy_in = meta.header.point_format.id < 6
    legacy_out = out_header.point_format.id < 6
    start = 0
    for chunk in chunks:
        m = len(chunk)
        out = laspy.ScaleAwarePointRecord.zeros(m, header=out_header)
        out.copy_fields_from(chunk)
        for axis, name in enumerate("XYZ"):
            out[name] = _rescale_ints(np.asarray(chunk[name]), in_scales[axis],
                                      in_offsets[axis], out_scales[axis],
                                      out_offsets[axis])
        if legacy_in and not legacy_out:
            # LAS 1.4 R15 Table 16: scan angle in 0.006 degree steps.
            out.scan_angle = np.rint(
                np.asarray(chunk.scan_angle_rank, dtype=np.float64) / 0.006
            ).astype(np.int16)
        has_new, new_codes, extras = values(start, start + m)
        cls = np.array(chunk.classification, dtype=np.uint8)
        cls[has_new] = new_codes[has_new]
        out.classification = cls
        for k, arr in extras.items():
            out[k] = arr
        writer.write_points(out)
        start += m
    return start


def _rescale_ints(ints: np.ndarray, s_in: float, o_in: float, s_out: float,
                  o_out: float) -> np.ndarray:
    """Integer records from one scale/offset system to another, exactly when possible."""
    if s_in == s_out:
        shift = (o_in - o_out) / s_out
        k = round(shift)
        if abs(shift - k) < 1e-6:
            out = ints.astype(np.int64) + k
            if len(out) and (out.min() < _INT32_MIN or out.max() > _INT32_MAX):
                raise ValueError("coordinates do not fit 32-bit LAS records in the output")
            return out.astype(np.int32)
    values = np.rint((ints.astype(np.float64) * s_in + (o_in - o_out)) / s_out)
    if len(values) and (values.min() < _INT32_MIN or values.max() > _INT32_MAX):
        raise ValueError("coordinates do not fit 32-bit LAS records in the output")
    return values.astype(np.int32)


def _common_point_format(formats: Sequence[int], max_code: int = 0) -> int:
    """Lowest point format that holds every input format's dimensions (and the class codes)."""
    formats = sorted(set(int(f) for f in formats))
    need_new = max_code > 31
    if len(formats) == 1 and not (need_new and formats[0] < 6):
        return formats[0]
    for candidate in range(6 if need_new else 0, 11):
        names = set(laspy.PointFormat(candidate).dimension_names)
        ok = True
        for f in formats:
            lost = set(laspy.point.format.lost_dimensions(f, candidate))
            if "scan_angle" in names:
                lost.discard("scan_angle_rank")
            if lost:
                ok = False
                break
        if ok:
            return candidate
    return 10  # pragma: no cover - format 10 holds every dimension


def _union_extra_dims(metas: Sequence[_FileMeta], replaced: set[str]) -> list[Any]:
    """Extra-bytes dimensions of all inputs (first definition wins; clashes raise)."""
    dims: dict[str, Any] = {}
    for meta in metas:
        for dim in meta.header.point_format.extra_dimensions:
            if dim.name in replaced:
                logger.info("%s: extra dimension %r replaced by the new one", meta.path, dim.name)
                continue
            seen = dims.get(dim.name)
            if seen is None:
                dims[dim.name] = dim
            elif (seen.kind, seen.num_bits, seen.num_elements) != (
                dim.kind, dim.num_bits, dim.num_elements
            ):
                raise InputError(meta.path, f"extra dimension {dim.name!r} has a different type "
                                            "than in the other inputs")
    return list(dims.values())

"""The 3-D line model: structures, spans, tension sections and fitted wires.

:func:`build_line_model` is the orchestrator; the result object :class:`LineModel` documents
every field with its unit and serialises to ``model.json`` with :meth:`LineModel.to_json`.

Conventions
-----------
- Coordinates are local metres of the cloud (``Cloud.xyz``); the JSON says so in its header.
- Span frame: station along the chord from the first structure to the second, lateral offset
  positive to the right looking along the line, height = local z.
- Wire ids are positional and stable along the line: phases ``C<k>-<A|B|C>`` (circuits
  numbered left to right looking along the line, phases A, B, C top to bottom and then left
  to right within a circuit), shield wires ``SW1``, ``SW2`` … left to right. Ids are assigned
  in the span with the most wires and carried to the neighbouring spans by matching wire ends
  at the shared structure, so a wire missing in one span does not shift the others.
- A bundle is one phase. Its representative fit (``WireFit.fit``) is a fit to all its points
  after removing each sub-conductor's offset from the bundle centre (sub-conductors are
  parallel curves, so the shifted points lie on the centre curve); each sub-conductor also
  gets its own fit. ``horizontal_tension_n`` is per sub-conductor (unit weight of one
  sub-conductor times the catenary constant); ``phase_horizontal_tension_n`` is the bundle
  total.
"""
from __future__ import annotations

import dataclasses
import importlib
import logging
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.optimize import linear_sum_assignment

from ..cloud import (
    GROUND,
    TRANSMISSION_TOWER,
    WIRE_CONDUCTOR,
    WIRE_CONNECTOR,
    WIRE_GUARD,
    Cloud,
)
from .attachments import (
    _median_offset,
    deadend_axis_shift,
    pool_stations,
    regular_start,
    sag_ci95_with_stations,
    uniform_end,
)
from .structures import (
    DEADEND,
    STRUCTURE_KINDS,
    SUSPENSION,
    DetectedColumn,
    Structure,
    detect_columns,
    ground_heights_at,
    insulators_horizontal,
    line_angles_deg,
    order_along_line,
    snap_to_given,
)
from .wires import SeparationOptions, WireCluster, separate_wires, span_frame, to_span_frame

log = logging.getLogger(__name__)

MODEL_JSON_VERSION = "1.1"
_Z95 = 1.959963984540054  # two-sided 95 % quantile of the standard normal distribution
STATUS_FITTED = "fitted"
STATUS_PARTIAL = "partial"
STATUS_NOT_FITTED = "not_fitted"


# =========================================================================== options
@dataclass
class ModelOptions:
    """Parameters of :func:`build_line_model` (lengths in metres, angles in degrees).

    Attributes
    ----------
    structure_cell_m
        Grid cell of the structure column search. [m]
    structure_min_levels
        Occupied 0.5 m levels that make a grid cell a column, for structure/insulator points.
    structure_min_levels_wire
        The same for wire-class points (towers mislabelled as wire); higher because stacked
        wires also occupy several levels.
    structure_min_height_m
        Smallest vertical extent of a structure. [m]
    structure_merge_m
        Column cells closer than this are one structure. [m]
    structure_max_wire_distance_m
        A detected structure must have wire points within this horizontal distance (when the
        cloud has wire points at all). [m]
    structure_max_offset_m
        Detected structures farther than this from the line through the others (poles of a
        crossing line) are left out. [m]
    snap_radius_m
        A detected structure within this distance of a given one is the same structure. [m]
    corridor_half_width_m
        Lateral half-width of a span's corridor for wire points. [m]
    deadend_angle_deg
        Line angles above this make a structure a dead-end (without a structures file). [deg]
    min_partial_length_m
        Wires running at least this far beyond the last structure make a partial span. [m]
    min_fit_points
        Fewer points: the wire is not fitted (passed to the fit as ``min_points``).
    max_fit_rms_m
        A fit with a larger residual RMS is rejected (``not_fitted``). [m]
    fit_loss, fit_f_scale_m, fit_tilt
        Passed to :func:`clearaudit.physics.fit.fit_catenary`.
    infer_shield_from_geometry
        When the cloud has no shield-wire class (13) points, call the top level of one or two
        thin, unbundled wires well above the phases shield wires.
    separation
        Wire separation parameters.
    """

    structure_cell_m: float = 1.0
    structure_min_levels: int = 6
    structure_min_levels_wire: int = 14
    structure_min_height_m: float = 6.0
    structure_merge_m: float = 3.0
    structure_min_points: int = 30
    structure_max_wire_distance_m: float = 30.0
    snap_radius_m: float = 10.0
    structure_max_offset_m: float = 15.0
    corridor_half_width_m: float = 25.0
    deadend_angle_deg: float = 10.0
    min_partial_length_m: float = 15.0
    min_fit_points: int = 15
    max_fit_rms_m: float = 0.3
    fit_loss: str = "soft_l1"
    fit_f_scale_m: float = 0.05
    fit_tilt: bool = True
    infer_shield_from_geometry: bool = True
    link_tolerance_m: float = 1.5
    separation: SeparationOptions = field(default_factory=SeparationOptions)

    def to_dict(self) -> dict[str, Any]:
        """Options as a JSON-serialisable dictionary (for the run record)."""
        d = {k: v for k, v in self.__dict__.items() if k != "separation"}
        d["separation"] = dict(self.separation.__dict__)
        return d


# =========================================================================== results
@dataclass(eq=False)
class SubConductorFit:
    """One sub-conductor of a bundle.

    Attributes
    ----------
    index
        0 … n − 1, ordered by lateral offset then height.
    lateral_offset_m, vertical_offset_m
        Offset from the bundle centre (right positive, up positive). [m]
    point_indices
        Indices of its points into the cloud.
    fit
        Its catenary fit (``CatenaryFit``) or ``None``.
    horizontal_tension_n, horizontal_tension_ci95_n
        H = w·C of this sub-conductor and its 95 % half-width. [N]
    """

    index: int
    lateral_offset_m: float
    vertical_offset_m: float
    point_indices: np.ndarray
    fit: Any = None
    horizontal_tension_n: float | None = None
    horizontal_tension_ci95_n: float | None = None

    def to_json(self) -> dict:
        return {
            "index": self.index, "lateral_offset_m": self.lateral_offset_m,
            "vertical_offset_m": self.vertical_offset_m,
            "n_points": int(len(self.point_indices)),
            "fit": _fit_json(self.fit),
            "horizontal_tension_n": self.horizontal_tension_n,
            "horizontal_tension_ci95_n": self.horizontal_tension_ci95_n,
        }


@dataclass(eq=False)
class WireFit:
    """One wire (a single conductor or a bundle) in one span.

    Attributes
    ----------
    wire_id
        Positional id, stable along the line (see the module notes).
    role
        ``"phase"``, ``"shield"`` or ``"other"``.
    bundle_count
        Number of sub-conductors (detected, or the bundle hint when they are not resolved).
    sub_conductors
        Per sub-conductor fits (empty for a single conductor or an unresolved bundle).
    fit
        The representative ``CatenaryFit`` (bundle centre) or ``None`` when not attempted.
    horizontal_tension_n, horizontal_tension_ci95_n
        H = w·C per (sub-)conductor and its 95 % half-width; ``None`` without unit weight or
        fit. [N]
    phase_horizontal_tension_n
        ``bundle_count`` × ``horizontal_tension_n``. [N]
    unit_weight_n_per_m
        Unit weight used. [N/m]
    status
        ``"fitted"``, ``"partial"`` (span runs off the survey; fitted from what is there) or
        ``"not_fitted"``.
    note
        Reason for the status, and warnings.
    point_indices
        Indices of the wire's points into the cloud.
    lateral_offset_m, height_m
        Lateral offset (right positive) and height at the middle of the wire's data. [m]
    attachment_methods
        How each attachment (A, B) was placed: ``"plumb string"`` (median of the suspension
        insulator points), ``"strain string"`` / ``"strain strings"`` (far end of the dead-end
        strain string, alone / pooled over the strings of that structure side), ``"wire end"``
        (where the wire's points begin), ``"crossarm line"`` (through the structure position),
        ``"strain-string axis"`` (a wire without a string at a dead-end: the crossarm line
        through the structure axis found from the phases' strain strings) or ``"span end"``
        (virtual end of a partial span).
    attachment_along_ci95_m
        95 % half-widths of the along-span positions of attachments A and B; they are included
        in ``fit.sag_ci95_m``. [m]
    """

    wire_id: str
    role: str
    bundle_count: int
    status: str
    note: str
    point_indices: np.ndarray
    fit: Any = None
    sub_conductors: list[SubConductorFit] = field(default_factory=list)
    horizontal_tension_n: float | None = None
    horizontal_tension_ci95_n: float | None = None
    phase_horizontal_tension_n: float | None = None
    unit_weight_n_per_m: float | None = None
    lateral_offset_m: float = 0.0
    height_m: float = 0.0
    majority_class: int = 0
    attachment_methods: tuple[str, str] = ("", "")
    attachment_along_ci95_m: tuple[float, float] | None = None
    cluster: WireCluster | None = field(default=None, repr=False)

    @property
    def n_points(self) -> int:
        return int(len(self.point_indices))

    def to_json(self) -> dict:
        return {
            "wire_id": self.wire_id, "role": self.role, "bundle_count": self.bundle_count,
            "status": self.status, "note": self.note, "n_points": self.n_points,
            "lateral_offset_m": self.lateral_offset_m, "height_m": self.height_m,
            "unit_weight_n_per_m": self.unit_weight_n_per_m,
            "horizontal_tension_n": self.horizontal_tension_n,
            "horizontal_tension_ci95_n": self.horizontal_tension_ci95_n,
            "phase_horizontal_tension_n": self.phase_horizontal_tension_n,
            "attachment_a_method": self.attachment_methods[0] or None,
            "attachment_b_method": self.attachment_methods[1] or None,
            "attachment_a_along_ci95_m": (None if self.attachment_along_ci95_m is None
                                          else float(self.attachment_along_ci95_m[0])),
            "attachment_b_along_ci95_m": (None if self.attachment_along_ci95_m is None
                                          else float(self.attachment_along_ci95_m[1])),
            "fit": _fit_json(self.fit),
            "sub_conductors": [s.to_json() for s in self.sub_conductors],
        }


@dataclass(eq=False)
class Span:
    """The wires between two consecutive structures.

    Attributes
    ----------
    id
        ``"<from>-<to>"``; partial spans ``"START-<id>"`` / ``"<id>-END"``; a line with no
        structure in the cloud gives one span ``"SP01"``.
    from_structure, to_structure
        Structure ids; ``None`` at a virtual far end.
    a_xy, b_xy
        Horizontal positions of the two ends (structure or virtual end). [m]
    length_m
        Horizontal length between the ends (structure axes or virtual ends); the frame in
        which the span's wire points are collected. [m]
    conductor_length_m
        Horizontal distance between the actual attachment points of the span's conductors:
        the median ``fit.span_length_m`` of its fitted phase wires (of its shield wires when
        no phase is fitted); shorter than ``length_m`` next to a dead-end by the strain
        string. ``None`` when no wire is fitted. Each wire's own value is its
        ``fit.span_length_m`` (``span_length_m`` in ``spans.csv``). [m]
    conductor_length_by_role_m
        The same per role (``"phase"``, ``"shield"``). [m]
    section_id
        Tension section.
    partial_at
        ``None``, ``"start"`` (virtual first end), ``"end"`` (virtual second end) or
        ``"both"``.
    wires
        One :class:`WireFit` per line wire (other circuits and crossings are in
        ``LineModel.other_wires``).
    """

    id: str
    from_structure: str | None
    to_structure: str | None
    a_xy: np.ndarray
    b_xy: np.ndarray
    length_m: float
    section_id: str = ""
    partial_at: str | None = None
    wires: list[WireFit] = field(default_factory=list)
    conductor_length_m: float | None = None
    conductor_length_by_role_m: dict[str, float] = field(default_factory=dict)

    @property
    def direction(self) -> np.ndarray:
        """Unit horizontal vector from the first end to the second. [-]"""
        return span_frame(self.a_xy, self.b_xy)[0]

    def wire(self, wire_id: str) -> WireFit | None:
        return next((w for w in self.wires if w.wire_id == wire_id), None)

    def to_json(self) -> dict:
        return {
            "id": self.id, "from_structure": self.from_structure,
            "to_structure": self.to_structure,
            "a_x_m": float(self.a_xy[0]), "a_y_m": float(self.a_xy[1]),
            "b_x_m": float(self.b_xy[0]), "b_y_m": float(self.b_xy[1]),
            "length_m": self.length_m, "conductor_length_m": self.conductor_length_m,
            "conductor_length_by_role_m": dict(self.conductor_length_by_role_m),
            "section_id": self.section_id,
            "partial_at": self.partial_at, "wires": [w.to_json() for w in self.wires],
        }


@dataclass(eq=False)
class TensionSection:
    """Spans between two dead-end structures.

    Attributes
    ----------
    id
        ``"TS1"``, ``"TS2"`` … in line order.
    span_ids
        Spans of the section in line order (partial spans included).
    ruling_span_m
        :math:`\\sqrt{\\sum L^3 / \\sum L}` over the complete spans with :math:`L` the
        conductor length of each span (between the phase conductors' attachment points,
        :attr:`Span.conductor_length_m`; the structure-to-structure length for a span without
        a fitted phase); ``None`` when the section has only partial spans. [m]
    note
        E.g. which spans were left out of the ruling span.
    ruling_span_by_role_m
        The ruling span of each role's conductors (``"phase"``, ``"shield"``): a shield wire
        without a strain string spans the full structure-to-structure length. [m]
    structure_ruling_span_m
        The ruling span of the structure-to-structure lengths, for reference. [m]
    """

    id: str
    span_ids: list[str]
    ruling_span_m: float | None
    note: str = ""
    ruling_span_by_role_m: dict[str, float] = field(default_factory=dict)
    structure_ruling_span_m: float | None = None

    def to_json(self) -> dict:
        return {"id": self.id, "span_ids": list(self.span_ids),
                "ruling_span_m": self.ruling_span_m,
                "ruling_span_by_role_m": dict(self.ruling_span_by_role_m),
                "structure_ruling_span_m": self.structure_ruling_span_m, "note": self.note}


@dataclass(eq=False)
class OtherWire:
    """A wire in a span corridor that is not one of this line's wires (crossing line,
    under-build on other supports), kept as an obstacle.

    Attributes
    ----------
    id
        ``"X01"``, ``"X02"`` …
    span_id
        The span in whose corridor it was found.
    reason
        Why it is not a wire of this line.
    angle_to_span_deg
        Horizontal angle between the wire and the span. [deg]
    point_indices
        Indices into the cloud.
    fit
        A free catenary fit (no supports) when one succeeded, else ``None``.
    """

    id: str
    span_id: str
    reason: str
    angle_to_span_deg: float
    point_indices: np.ndarray
    fit: Any = None

    def to_json(self) -> dict:
        xyz_fit = _fit_json(self.fit)
        return {"id": self.id, "span_id": self.span_id, "reason": self.reason,
                "angle_to_span_deg": self.angle_to_span_deg,
                "n_points": int(len(self.point_indices)), "fit": xyz_fit}


@dataclass(eq=False)
class LineModel:
    """The fitted line.

    Attributes
    ----------
    structures
        In line order.
    spans
        In line order, partial spans included.
    sections
        Tension sections in line order.
    other_wires
        Wires that do not belong to the line (obstacles).
    wire_point_labels
        Per cloud point: index into ``wire_labels`` of the wire it belongs to, -1 otherwise.
    wire_labels
        Names indexed by ``wire_point_labels``: the line's wire ids, then other wire ids.
    tension_checks
        Per tension section and wire: the spans' horizontal tensions and their largest
        relative difference (see :func:`tension_checks`).
    warnings
        Plain sentences about anything the engineer should look at.
    options
        The options used.
    """

    structures: list[Structure]
    spans: list[Span]
    sections: list[TensionSection]
    other_wires: list[OtherWire]
    wire_point_labels: np.ndarray
    wire_labels: list[str]
    tension_checks: list[dict] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    options: ModelOptions = field(default_factory=ModelOptions)
    unit_weight_n_per_m: dict = field(default_factory=dict)

    def structure(self, structure_id: str) -> Structure | None:
        return next((s for s in self.structures if s.id == structure_id), None)

    def span(self, span_id: str) -> Span | None:
        return next((s for s in self.spans if s.id == span_id), None)

    def wire_ids(self) -> list[str]:
        """Distinct line wire ids in a stable order."""
        return [w for w in self.wire_labels if not w.startswith("X")]

    def to_json(self) -> dict:
        """The model as a JSON-serialisable dictionary (``model.json``).

        Top-level keys: ``format`` ("clearaudit-line-model"), ``version``, ``coordinates``
        (a sentence: local metres of the cloud), ``units`` (a table of the unit of each
        suffix), ``structures``, ``spans`` (each with its ``wires`` and their fits),
        ``sections``, ``other_wires``, ``tension_checks``, ``warnings``, ``options``,
        ``unit_weight_n_per_m``. All values are SI: metres, newtons, radians (angles named
        ``_deg`` are degrees). See ``docs/line-model.md``.
        """
        return {
            "format": "clearaudit-line-model",
            "version": MODEL_JSON_VERSION,
            "coordinates": "local metres relative to the cloud origin (x east, y north, z up "
                           "in the cloud CRS axes)",
            "units": {"_m": "metre", "_n": "newton", "_n_per_m": "newton per metre",
                      "_rad": "radian", "_deg": "degree", "coverage": "fraction 0..1"},
            "structures": [s.to_json() for s in self.structures],
            "spans": [s.to_json() for s in self.spans],
            "sections": [s.to_json() for s in self.sections],
            "other_wires": [o.to_json() for o in self.other_wires],
            "tension_checks": self.tension_checks,
            "warnings": list(self.warnings),
            "unit_weight_n_per_m": dict(self.unit_weight_n_per_m),
            "options": self.options.to_dict(),
        }


def _num(x) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if np.isfinite(x) else None


def _fit_json(fit) -> dict | None:
    """The scalar fields of a ``CatenaryFit`` (arrays as lists)."""
    if fit is None:
        return None
    out: dict[str, Any] = {"ok": bool(fit.ok), "reason": str(fit.reason)}
    for name in ("n_points", "n_inliers"):
        out[name] = int(getattr(fit, name, 0))
    for name in ("span_length_m", "tilt_rad", "tilt_ci95_rad", "catenary_constant_m",
                 "catenary_constant_ci95_m", "z_a_m", "z_a_ci95_m", "z_b_m", "z_b_ci95_m",
                 "sag_m", "sag_ci95_m", "rms_m", "coverage", "largest_gap_m",
                 "station_min_m", "station_max_m"):
        out[name] = _num(getattr(fit, name, None))
    for name in ("origin_xy", "direction"):
        v = getattr(fit, name, None)
        out[name] = None if v is None else [float(a) for a in np.asarray(v).ravel()]
    if fit.ok:
        try:
            out["attachment_a_m"] = [float(a) for a in fit.attachment_a]
            out["attachment_b_m"] = [float(a) for a in fit.attachment_b]
        except Exception:  # noqa: BLE001 - a partial fit object may lack them
            pass
    return out


# =========================================================================== helpers
def _fit_module():
    """The catenary fit module (imported lazily so the model imports without it)."""
    return importlib.import_module("clearaudit.physics.fit")


def ruling_span(lengths_m: Sequence[float]) -> float:
    """Ruling (equivalent) span of a tension section.

    Parameters
    ----------
    lengths_m
        Horizontal span lengths of the section. [m]

    Returns
    -------
    float
        :math:`L_r = \\sqrt{\\sum L_i^3 / \\sum L_i}`. [m]

    Notes
    -----
    The span whose tension changes with temperature and load like the whole section with
    suspension insulators free to swing.

    References
    ----------
    .. [1] IEEE Std 524-2016, *Guide for the Installation of Overhead Transmission Line
       Conductors*, clause on ruling span.
    """
    L = np.asarray(lengths_m, dtype=float)
    if L.size == 0 or np.any(~(L > 0)):
        raise ValueError("ruling span needs at least one positive span length")
    return float(np.sqrt(np.sum(L**3) / np.sum(L)))


def tension_checks(model_spans: list[Span], sections: list[TensionSection]) -> list[dict]:
    """Horizontal tension differences between the spans of each tension section, per wire.

    Parameters
    ----------
    model_spans
        Spans with fitted wires.
    sections
        Tension sections.

    Returns
    -------
    list of dict
        One row per section and wire with at least two spans with a tension:
        ``section_id, wire_id, span_ids, horizontal_tension_n`` (list, per span),
        ``mean_horizontal_tension_n``, ``max_relative_difference`` = (max − min) / mean.

    Notes
    -----
    With suspension insulators free to swing, the horizontal tension is equal in every span
    of a section; a large difference points at a restrained insulator, a mis-fit or a
    mis-identified dead-end. Common practice (no source).
    """
    by_id = {s.id: s for s in model_spans}
    rows = []
    for sec in sections:
        per_wire: dict[str, list[tuple[str, float]]] = {}
        for sid in sec.span_ids:
            for w in by_id[sid].wires:
                if w.horizontal_tension_n is not None and w.status in (STATUS_FITTED,
                                                                       STATUS_PARTIAL):
                    per_wire.setdefault(w.wire_id, []).append((sid, w.horizontal_tension_n))
        for wid in sorted(per_wire):
            vals = per_wire[wid]
            if len(vals) < 2:
                continue
            h = np.array([v for _, v in vals])
            mean = float(h.mean())
            rows.append({
                "section_id": sec.id, "wire_id": wid, "span_ids": [s for s, _ in vals],
                "horizontal_tension_n": [float(v) for v in h],
                "mean_horizontal_tension_n": mean,
                "max_relative_difference": float((h.max() - h.min()) / mean) if mean > 0 else None,
            })
    return rows


def _given_structures(structures, cloud: Cloud) -> list[dict]:
    """Normalise the given structures list (dicts or objects with id, xy or x/y, type)."""
    out = []
    for i, s in enumerate(structures):
        get = (s.get if isinstance(s, dict) else lambda k, d=None, s=s: getattr(s, k, d))
        sid = get("id")
        if sid is None or str(sid).strip() == "":
            raise ValueError(f"given structure number {i + 1} has no id")
        xy = get("xy")
        if xy is None:
            x, y = get("x"), get("y")
            if x is None or y is None:
                raise ValueError(f"given structure {sid!r} has no position (xy or x, y)")
            xy = (x, y)
        xy = np.asarray(xy, dtype=float).reshape(-1)[:2]
        if not np.all(np.isfinite(xy)):
            raise ValueError(f"given structure {sid!r} has a non-finite position")
        kind = get("type") or get("kind")
        kind = None if kind in (None, "") else str(kind).lower()
        if kind is not None and kind not in STRUCTURE_KINDS:
            raise ValueError(f"given structure {sid!r} has type {kind!r}, not suspension or "
                             "deadend")
        out.append({"id": str(sid), "xy": xy, "type": kind})
    if len({g["id"] for g in out}) != len(out):
        raise ValueError("given structure ids are not unique")
    return out


class _Progress:
    def __init__(self, callback, total):
        self.cb, self.total, self.done = callback, total, 0

    def step(self, n: int = 1):
        self.done += n
        if self.cb is not None:
            self.cb(min(self.done, self.total), self.total)


# =========================================================================== builder
def build_line_model(
    cloud: Cloud,
    *,
    structures: Sequence[dict] | None = None,
    unit_weight_n_per_m: dict[str, float] | None = None,
    bundle: int | dict[str, int] | None = None,
    options: ModelOptions | None = None,
    progress: Callable[[int, int], None] | None = None,
    map_fits: Callable[[list[FitJob]], list[Any]] | None = None,
) -> LineModel:
    """Build the line model from a classified cloud.

    Parameters
    ----------
    cloud
        Classified cloud (ASPRS classes: 13 shield wire, 14 conductor, 15 structure,
        16 insulator/hardware, 2 ground). Coordinates in local metres.
    structures
        Optional given structures: dicts (or objects) with ``id``, ``xy`` (local metres,
        shape (2,)) or ``x``, ``y`` (local metres), and optional ``type``
        (``"suspension"``/``"deadend"``). Without it, structures are detected.
    unit_weight_n_per_m
        ``{"phase": w, "shield": w_s}`` weight per unit length of one (sub-)conductor, used
        for H = w·C; a missing role gives no tension. [N/m]
    bundle
        Hint of the number of sub-conductors per phase (int) or per role (dict); used when
        the sub-conductors cannot be resolved in the points.
    options
        :class:`ModelOptions`.
    progress
        Called as ``progress(done, total)`` with the number of spans processed.
    map_fits
        Runs a list of :class:`FitJob` and returns their fits in the same order (e.g. on
        Dask workers, ``partial(engine.map_batches, fit_jobs)``); ``None``: one after the
        other here (:func:`fit_jobs`). The catenary fits of all wires and sub-conductors are independent and
        are most of the model's time; the result does not depend on where they run.

    Returns
    -------
    LineModel

    Raises
    ------
    ValueError
        On bad arguments (non-positive unit weight, malformed structure list, wrong types).
    """
    if not isinstance(cloud, Cloud):
        raise ValueError("cloud must be a clearaudit.cloud.Cloud")
    opts = options or ModelOptions()
    weights: dict[str, float] = {}
    for role, w in (unit_weight_n_per_m or {}).items():
        if role not in ("phase", "shield"):
            raise ValueError(f"unit weight role must be 'phase' or 'shield', not {role!r}")
        if w is None:
            continue
        if not (float(w) > 0 and np.isfinite(float(w))):
            raise ValueError(f"unit weight of the {role} conductor must be positive and finite")
        weights[role] = float(w)
    bundle_hint = _bundle_hint(bundle)
    given = _given_structures(structures, cloud) if structures is not None else None

    xyz = cloud.xyz
    cls = cloud.classification
    wire_mask = np.isin(cls, (WIRE_GUARD, WIRE_CONDUCTOR))
    wire_idx = np.flatnonzero(wire_mask)
    is_ground = cls == GROUND
    insulator_xyz = xyz[cls == WIRE_CONNECTOR]
    has_shield_class = bool(np.any(cls == WIRE_GUARD))
    warnings: list[str] = []

    # ---- 1. structure columns
    struct_idx = np.flatnonzero(np.isin(cls, (TRANSMISSION_TOWER, WIRE_CONNECTOR)))
    columns: list[DetectedColumn] = []
    col_kw = dict(cell_m=opts.structure_cell_m, min_height_m=opts.structure_min_height_m,
                  merge_distance_m=opts.structure_merge_m, min_points=opts.structure_min_points)
    for c in detect_columns(xyz[struct_idx], min_levels=opts.structure_min_levels, **col_kw):
        c.point_indices = struct_idx[c.point_indices]
        columns.append(c)
    # towers mislabelled as wire: tall columns inside the wire points
    excluded = np.zeros(len(xyz), dtype=bool)
    for c in detect_columns(xyz[wire_idx], min_levels=opts.structure_min_levels_wire, **col_kw):
        c.point_indices = wire_idx[c.point_indices]
        excluded[c.point_indices] = True
        near = [o for o in columns if np.hypot(*(o.xy - c.xy)) < max(o.radius_m, 5.0)]
        if near:
            near[0].point_indices = np.union1d(near[0].point_indices, c.point_indices)
            near[0].z_top = max(near[0].z_top, c.z_top)
        else:
            columns.append(c)
    wire_idx = wire_idx[~excluded[wire_idx]]
    wire_xy = xyz[wire_idx, :2]
    if len(wire_idx) and columns:
        sub = wire_xy[:: max(1, len(wire_xy) // 50000)]
        from scipy.spatial import cKDTree

        dmin, _ = cKDTree(sub).query(np.array([c.xy for c in columns]), k=1)
        far = dmin > opts.structure_max_wire_distance_m
        for c, f in zip(columns, far, strict=True):
            if f:
                warnings.append(f"a structure-like column at ({c.xy[0]:.1f}, {c.xy[1]:.1f}) m "
                                "has no wire nearby and was left out")
        columns = [c for c, f in zip(columns, far, strict=True) if not f]

    # ---- 2. structures (given or detected), in line order
    structs: list[Structure] = []
    if given is not None:
        match, unmatched = snap_to_given(columns, np.array([g["xy"] for g in given]),
                                         opts.snap_radius_m)
        for g, m in zip(given, match, strict=True):
            c = columns[m] if m >= 0 else None
            st = Structure(id=g["id"], xy=g["xy"].copy(), source="given",
                           z_top=None if c is None else c.z_top,
                           footprint_radius_m=0.0 if c is None else c.radius_m,
                           n_points=0 if c is None else len(c.point_indices),
                           matched_detection=c is not None,
                           point_indices=(np.zeros(0, np.int64) if c is None
                                          else c.point_indices))
            st.kind = g["type"] or SUSPENSION
            st.kind_reason = "given" if g["type"] else "default"
            if c is None:
                warnings.append(f"given structure {g['id']} was not found in the cloud")
            structs.append(st)
        for k in unmatched:
            c = columns[k]
            warnings.append(f"a structure was detected at ({c.xy[0]:.1f}, {c.xy[1]:.1f}) m "
                            "that is not in the structures file")
        order = order_along_line(np.array([s.xy for s in structs]), wire_xy[::7])
        # keep the direction of the file: its first structure first
        if len(order) > 1 and int(np.flatnonzero(order == 0)[0]) > len(order) // 2:
            order = order[::-1]
        structs = [structs[i] for i in order]
    else:
        if columns:
            order = order_along_line(np.array([c.xy for c in columns]), wire_xy[::7],
                                     max_offset_m=opts.structure_max_offset_m)
            for i in sorted(set(range(len(columns))) - set(order.tolist())):
                c = columns[i]
                warnings.append(f"a structure at ({c.xy[0]:.1f}, {c.xy[1]:.1f}) m lies off "
                                "the line and was left out (another line's support?)")
            for n, i in enumerate(order, start=1):
                c = columns[i]
                structs.append(Structure(id=f"S{n:03d}", xy=c.xy.copy(), z_top=c.z_top,
                                         footprint_radius_m=c.radius_m,
                                         n_points=len(c.point_indices),
                                         point_indices=c.point_indices))
    if structs:
        z_grounds = ground_heights_at(
            xyz, np.array([st.xy for st in structs], dtype=np.float64),
            [max(10.0, st.footprint_radius_m) for st in structs], which=is_ground)
        for st, z_ground in zip(structs, z_grounds, strict=True):
            st.z_ground = z_ground

    # ---- 3. spans, partial spans, angles, kinds, sections
    spans = _make_spans(structs, xyz, wire_idx, opts)
    before = spans[0].a_xy if spans and spans[0].partial_at in ("start",) else None
    after = spans[-1].b_xy if spans and spans[-1].partial_at in ("end",) else None
    if structs:
        angles = line_angles_deg(np.array([s.xy for s in structs]), before, after)
        for st, ang in zip(structs, angles, strict=True):
            st.line_angle_deg = float(ang)
    _decide_kinds(structs, spans, insulator_xyz, opts, given is not None)
    _refine_along_line(structs, spans, insulator_xyz)
    sections = _make_sections(structs, spans)

    # ---- 4. wires per span
    prog = _Progress(progress, max(len(spans), 1))
    struct_by_id = {s.id: s for s in structs}
    wire_grid = _PointGrid(xyz[wire_idx, :2])
    for span in spans:
        _span_wires(span, xyz, cls, wire_idx, opts, struct_by_id, wire_grid)
        prog.step()
    if opts.infer_shield_from_geometry and not has_shield_class:
        for span in spans:
            _infer_shield(span)

    # ---- 5. ids, fits, other wires
    others: list[OtherWire] = []
    _assign_ids(spans, opts)
    fitmod = _fit_module()
    arm_normals = _arm_normals(spans)
    all_stations = {id(span): _attachment_stations(span, [w for w in span.wires
                                                          if w.role != "other"],
                                                   xyz, insulator_xyz, struct_by_id,
                                                   arm_normals)
                    for span in spans}
    _deadend_axes(spans, all_stations, struct_by_id, arm_normals, insulator_xyz)
    # every wire's and sub-conductor's fit at once (independent of one another)
    jobs, where = [], []
    for span in spans:
        stations = all_stations[id(span)]
        for w in span.wires:
            if w.role != "other":
                for key, job in _wire_fit_jobs(span, w, xyz, opts, _supports(span,
                                                                               stations[id(w)])):
                    jobs.append(job)
                    where.append((id(w), key))
    fitted_all = (map_fits or fit_jobs)(jobs)
    if len(fitted_all) != len(jobs):
        raise ValueError("map_fits returned a different number of fits than jobs")
    fitted: dict[int, dict] = {}
    for (wid, key), fit in zip(where, fitted_all, strict=True):
        fitted.setdefault(wid, {})[key] = fit
    del jobs, where, fitted_all
    for span in spans:
        line_wires = []
        stations = all_stations[id(span)]
        for w in span.wires:
            if w.role == "other":
                ang = (w.cluster.extra.get("angle_deg") if w.cluster is not None else None)
                if ang is None and w.cluster is not None:
                    ang = float(np.degrees(np.arctan(abs(w.cluster.lateral_slope))))
                others.append(OtherWire(id="", span_id=span.id, reason=w.note,
                                        angle_to_span_deg=float(ang or 0.0),
                                        point_indices=w.point_indices))
                continue
            _fit_wire(span, w, xyz, opts, weights, bundle_hint, fitmod, stations[id(w)],
                      fitted.get(id(w), {}))
            if w.role == "other":  # rejected by the fit: attachments not at our structures
                others.append(OtherWire(id="", span_id=span.id, reason=w.note,
                                        angle_to_span_deg=0.0, point_indices=w.point_indices,
                                        fit=w.fit))
                continue
            line_wires.append(w)
        span.wires = line_wires
    _add_missing_wires(spans)
    _conductor_ruling_spans(spans, sections)
    for k, o in enumerate(others, start=1):
        o.id = f"X{k:02d}"
        if o.fit is None and len(o.point_indices) >= opts.min_fit_points:
            try:
                f = fitmod.fit_catenary(xyz[o.point_indices], None, None, loss=opts.fit_loss,
                                        f_scale_m=opts.fit_f_scale_m, fit_tilt=False,
                                        min_points=opts.min_fit_points)
                o.fit = f if f.ok else None
            except Exception as exc:  # noqa: BLE001 - an obstacle without a fit is still kept
                log.debug("free fit of other wire failed: %s", exc)

    # ---- 6. labels, checks
    line_ids = _ordered_ids({w.wire_id for s in spans for w in s.wires})
    labels_list = line_ids + [o.id for o in others]
    lab_index = {name: i for i, name in enumerate(labels_list)}
    point_labels = np.full(len(xyz), -1, dtype=np.int32)  # few labels; 4 bytes per point
    for span in spans:
        for w in span.wires:
            point_labels[w.point_indices] = lab_index[w.wire_id]
    for o in others:
        point_labels[o.point_indices] = lab_index[o.id]
    checks = tension_checks(spans, sections)
    for row in checks:
        if row["max_relative_difference"] is not None and row["max_relative_difference"] > 0.05:
            warnings.append(f"section {row['section_id']} wire {row['wire_id']}: horizontal "
                            f"tension differs by {100 * row['max_relative_difference']:.0f} % "
                            "between spans")
    if not structs:
        warnings.append("no structure was found; the wires form one span with virtual ends")
    return LineModel(structures=structs, spans=spans, sections=sections, other_wires=others,
                     wire_point_labels=point_labels, wire_labels=labels_list,
                     tension_checks=checks, warnings=warnings, options=opts,
                     unit_weight_n_per_m=weights)


# =========================================================================== steps
def _bundle_hint(bundle) -> dict[str, int]:
    if bundle is None:
        return {}
    if isinstance(bundle, dict):
        out = {}
        for k, v in bundle.items():
            if int(v) < 1:
                raise ValueError("bundle counts must be at least 1")
            out[str(k)] = int(v)
        return out
    if int(bundle) < 1:
        raise ValueError("bundle count must be at least 1")
    return {"phase": int(bundle)}


def _far_end(end_xy, inward_dir, xyz, wire_idx, opts: ModelOptions, radius_m: float):
    """Virtual far end of the wires running off beyond an end structure, or None."""
    if len(wire_idx) == 0:
        return None
    rel = xyz[wire_idx, :2] - end_xy[None, :]
    along = rel @ (-inward_dir)
    beyond = along > max(radius_m, 2.0)
    if beyond.sum() < opts.min_fit_points:
        return None
    r = np.hypot(*rel.T)
    near = beyond & (r < 120.0)
    if near.sum() < opts.min_fit_points:
        near = beyond
    # direction of the wires beyond the structure: principal axis of their positions
    p = rel[near]
    cov = np.cov(p.T) if len(p) > 2 else np.eye(2)
    d = np.linalg.eigh(cov)[1][:, -1]
    if d @ (-inward_dir) < 0:
        d = -d
    lat = rel @ np.array([d[1], -d[0]])
    st = rel @ d
    corridor = (np.abs(lat) <= opts.corridor_half_width_m) & (st > max(radius_m, 2.0))
    if corridor.sum() < opts.min_fit_points:
        return None
    reach = float(np.percentile(st[corridor], 99.5))
    if reach < opts.min_partial_length_m:
        return None
    return end_xy + d * reach


def _make_spans(structs: list[Structure], xyz, wire_idx, opts: ModelOptions) -> list[Span]:
    spans: list[Span] = []
    if not structs:
        if len(wire_idx) < opts.min_fit_points:
            return []
        p = xyz[wire_idx, :2]
        c = p.mean(axis=0)
        d = np.linalg.eigh(np.cov((p - c).T))[1][:, -1]
        if d[0] < 0 or (d[0] == 0 and d[1] < 0):
            d = -d
        st = (p - c) @ d
        a, b = c + d * st.min(), c + d * st.max()
        return [Span(id="SP01", from_structure=None, to_structure=None, a_xy=a, b_xy=b,
                     length_m=float(np.hypot(*(b - a))), partial_at="both")]
    for s0, s1 in zip(structs[:-1], structs[1:], strict=True):
        spans.append(Span(id=f"{s0.id}-{s1.id}", from_structure=s0.id, to_structure=s1.id,
                          a_xy=s0.xy.copy(), b_xy=s1.xy.copy(),
                          length_m=float(np.hypot(*(s1.xy - s0.xy)))))
    first, last = structs[0], structs[-1]
    if len(structs) >= 2:
        in_first = span_frame(first.xy, structs[1].xy)[0]
        in_last = span_frame(last.xy, structs[-2].xy)[0]
    else:
        # a single structure: the wire direction through it
        rel = xyz[wire_idx, :2] - first.xy
        if len(rel) < 3:
            return []
        d = np.linalg.eigh(np.cov(rel.T))[1][:, -1]
        if d[0] < 0 or (d[0] == 0 and d[1] < 0):
            d = -d
        in_first, in_last = d, -d
    start = _far_end(first.xy, in_first, xyz, wire_idx, opts, first.footprint_radius_m)
    end = _far_end(last.xy, in_last, xyz, wire_idx, opts, last.footprint_radius_m)
    if start is not None:
        spans.insert(0, Span(id=f"START-{first.id}", from_structure=None,
                             to_structure=first.id, a_xy=start, b_xy=first.xy.copy(),
                             length_m=float(np.hypot(*(first.xy - start))), partial_at="start"))
    if end is not None:
        spans.append(Span(id=f"{last.id}-END", from_structure=last.id, to_structure=None,
                          a_xy=last.xy.copy(), b_xy=end,
                          length_m=float(np.hypot(*(end - last.xy))), partial_at="end"))
    return spans


def _decide_kinds(structs, spans, insulator_xyz, opts: ModelOptions, given: bool) -> None:
    if not structs:
        return
    any_given_deadend = given and any(s.kind == DEADEND and s.kind_reason == "given"
                                      for s in structs)
    for i, st in enumerate(structs):
        if st.kind_reason == "given" and (any_given_deadend or st.kind == DEADEND):
            continue
        # end of wires: a line end without a partial span beyond it
        if i == 0 and not (spans and spans[0].partial_at == "start"):
            st.kind, st.kind_reason = DEADEND, "end of wires"
            continue
        if i == len(structs) - 1 and not (spans and spans[-1].partial_at == "end"):
            st.kind, st.kind_reason = DEADEND, "end of wires"
            continue
        if st.line_angle_deg > opts.deadend_angle_deg:
            st.kind, st.kind_reason = DEADEND, f"line angle {st.line_angle_deg:.1f} deg"
            continue
        # line direction at the structure: mean of the adjacent span directions
        dirs = [sp.direction for sp in spans if st.id in (sp.from_structure, sp.to_structure)]
        d = np.sum(dirs, axis=0) if dirs else np.array([1.0, 0.0])
        d = d / max(np.hypot(*d), 1e-12)
        horizontal, n_h, n_s = insulators_horizontal(
            insulator_xyz, st.xy, d, radius_m=max(st.footprint_radius_m, 3.0) + 8.0)
        if horizontal:
            st.kind, st.kind_reason = DEADEND, (f"horizontal insulator strings ({n_h} of "
                                                f"{n_s})")
            continue
        st.kind = SUSPENSION
        st.kind_reason = (f"insulator strings hang plumb ({n_s})" if n_s else
                          "default (no dead-end evidence)") if st.kind_reason != "given" \
            else "given"


def _refine_along_line(structs, spans: list[Span], insulator_xyz) -> None:
    """Move a detected suspension structure along the line onto its insulator strings.

    Suspension strings hang plumb from crossarms that cross the structure's axis square to
    the line, so the median along-line offset of its insulator points is the axis position;
    it is better defined than the centre of the body's points. Span ends follow.
    """
    if insulator_xyz is None or len(insulator_xyz) < 10:
        return
    for st in structs:
        if st.kind != SUSPENSION or st.source != "detected":
            continue
        adj = [sp for sp in spans if st.id in (sp.from_structure, sp.to_structure)]
        if not adj:
            continue
        d = np.sum([sp.direction for sp in adj], axis=0)
        d = d / max(np.hypot(*d), 1e-12)
        rel = insulator_xyz[:, :2] - st.xy[None, :]
        near = np.hypot(*rel.T) < max(st.footprint_radius_m, 3.0) + 12.0
        if near.sum() < 10:
            continue
        shift = float(np.median(rel[near] @ d))
        if abs(shift) > 2.0:
            continue
        st.xy = st.xy + d * shift
        for sp in adj:
            if sp.from_structure == st.id:
                sp.a_xy = st.xy.copy()
            if sp.to_structure == st.id:
                sp.b_xy = st.xy.copy()
            sp.length_m = float(np.hypot(*(sp.b_xy - sp.a_xy)))


def _make_sections(structs, spans: list[Span]) -> list[TensionSection]:
    kinds = {s.id: s.kind for s in structs}
    sections: list[TensionSection] = []
    current: list[Span] = []

    def close():
        if not current:
            return
        complete = [s.length_m for s in current if s.partial_at is None]
        note = ""
        if len(complete) < len(current):
            note = "partial spans left out of the ruling span"
        rs = ruling_span(complete) if complete else None
        sid = f"TS{len(sections) + 1}"
        for s in current:
            s.section_id = sid
        sections.append(TensionSection(id=sid, span_ids=[s.id for s in current],
                                       ruling_span_m=rs, note=note,
                                       structure_ruling_span_m=rs))

    for sp in spans:
        current.append(sp)
        if sp.to_structure is not None and kinds.get(sp.to_structure) == DEADEND:
            close()
            current = []
    close()
    return sections


def _conductor_ruling_spans(spans: list[Span], sections: list[TensionSection]) -> None:
    """Conductor lengths of the spans and the sections' ruling spans from them.

    The conductor of a span ends at its attachment points: next to a dead-end at the far end
    of the strain string, so the conductor span is shorter than the structure span by the
    string. The ruling span :math:`\\sqrt{\\sum L^3/\\sum L}` (IEEE Std 524-2016) of a
    section uses these conductor lengths, per role.
    """
    for sp in spans:
        by_role: dict[str, float] = {}
        for role in ("phase", "shield"):
            lengths = [w.fit.span_length_m for w in sp.wires
                       if w.role == role and w.fit is not None and w.fit.ok]
            if lengths:
                by_role[role] = float(np.median(lengths))
        sp.conductor_length_by_role_m = by_role
        sp.conductor_length_m = by_role.get("phase", by_role.get("shield"))
    by_id = {sp.id: sp for sp in spans}
    for sec in sections:
        complete = [by_id[i] for i in sec.span_ids if i in by_id and by_id[i].partial_at is None]
        if not complete:
            continue
        roles = sorted({r for sp in complete for r in sp.conductor_length_by_role_m})
        sec.ruling_span_by_role_m = {
            role: ruling_span([sp.conductor_length_by_role_m.get(role, sp.length_m)
                               for sp in complete]) for role in roles}
        sec.ruling_span_m = sec.ruling_span_by_role_m.get(
            "phase", sec.ruling_span_by_role_m.get("shield", sec.structure_ruling_span_m))


class _PointGrid:
    """Points binned on a coarse horizontal grid, to find the points near one span without
    going over every point of the line.

    The points are sorted by cell once; :meth:`candidates` returns, in ascending order, the
    positions of the points in the cells that overlap a rectangle (a superset of the points
    inside it).
    """

    def __init__(self, xy: np.ndarray, cell_m: float = 50.0):
        self.cell = float(cell_m)
        self.n = len(xy)
        if self.n == 0:
            return
        self.lo = xy.min(axis=0)
        ij = np.floor((xy - self.lo) / self.cell).astype(np.int64)
        self.n_j = int(ij[:, 1].max()) + 1
        self.n_i = int(ij[:, 0].max()) + 1
        key = ij[:, 0] * self.n_j + ij[:, 1]
        self.order = np.argsort(key, kind="stable")
        self.sorted_key = key[self.order]

    def candidates(self, corners_xy: np.ndarray, margin_m: float = 1.0) -> np.ndarray:
        """Ascending positions of the points in the cells overlapping the bounding box of
        ``corners_xy`` (shape (k, 2)) widened by ``margin_m``. [m]"""
        if self.n == 0:
            return np.zeros(0, dtype=np.int64)
        lo = np.floor((corners_xy.min(axis=0) - margin_m - self.lo) / self.cell).astype(np.int64)
        hi = np.floor((corners_xy.max(axis=0) + margin_m - self.lo) / self.cell).astype(np.int64)
        lo = np.maximum(lo, 0)
        hi = np.minimum(hi, [self.n_i - 1, self.n_j - 1])
        if np.any(hi < lo):
            return np.zeros(0, dtype=np.int64)
        # one run of keys per grid column i: cells (i, lo_j .. hi_j)
        rows = np.arange(lo[0], hi[0] + 1) * self.n_j
        first = np.searchsorted(self.sorted_key, rows + lo[1], side="left")
        last = np.searchsorted(self.sorted_key, rows + hi[1], side="right")
        if not np.any(last > first):
            return np.zeros(0, dtype=np.int64)
        pos = np.concatenate([self.order[f:e] for f, e in zip(first, last, strict=True)])
        pos.sort()
        return pos


def _span_wires(span: Span, xyz, cls, wire_idx, opts: ModelOptions, struct_by_id,
                wire_grid: _PointGrid | None = None) -> None:
    """Collect the span's wire points and separate them into clusters (WireFit stubs)."""
    if len(wire_idx) == 0:
        return
    if wire_grid is not None and np.isfinite(opts.corridor_half_width_m):
        # only the wire points near the span's corridor rectangle (1 m margin for round-off)
        u, v, _ = span_frame(span.a_xy, span.b_xy)
        half = opts.corridor_half_width_m
        corners = np.array([span.a_xy + v * half, span.a_xy - v * half,
                            span.b_xy + v * half, span.b_xy - v * half])
        wire_idx = wire_idx[wire_grid.candidates(corners)]
    s, t = to_span_frame(xyz[wire_idx], span.a_xy, span.b_xy)
    sel = (s >= 0.0) & (s <= span.length_m) & (np.abs(t) <= opts.corridor_half_width_m)
    idx = wire_idx[sel]
    if len(idx) < opts.separation.min_cluster_points:
        return
    clusters = separate_wires(xyz[idx], span.a_xy, span.b_xy, opts.separation)
    for c in clusters:
        pts = idx[c.index]
        c.index = pts  # now cloud indices
        mc = int(np.bincount(cls[pts]).argmax())
        if c.kind == "crossing":
            role, note = "other", c.reason
        else:
            role = "shield" if mc == WIRE_GUARD else "phase"
            note = ""
        span.wires.append(WireFit(wire_id="", role=role, bundle_count=c.n_sub, status="",
                                  note=note, point_indices=pts, lateral_offset_m=c.lateral_m,
                                  height_m=c.height_m, majority_class=mc, cluster=c))


def _infer_shield(span: Span) -> None:
    """Without class 13: top-level thin wires well above the phases are shield wires."""
    line = [w for w in span.wires if w.role == "phase"]
    if len(line) < 4:
        return
    z = np.array([w.height_m for w in line])
    order = np.argsort(-z)
    top = [line[order[0]]]
    for k in order[1:]:
        if z[order[0]] - z[k] < 1.5:
            top.append(line[k])
        else:
            break
    rest = [w for w in line if w not in top]
    if len(top) > 2 or len(rest) < 3:
        return
    gap = min(w.height_m for w in top) - max(w.height_m for w in rest)
    if gap < 2.0:
        return
    dens = lambda w: len(w.point_indices) / max(  # noqa: E731
        w.cluster.station_max_m - w.cluster.station_min_m, 1.0)
    rest_bundle = np.median([w.bundle_count for w in rest])
    rest_dens = np.median([dens(w) for w in rest])
    for w in top:
        if w.bundle_count < rest_bundle or dens(w) < 0.6 * rest_dens:
            w.role = "shield"
            w.note = "shield wire inferred from its position above the phases"


def _positional_ids(wires: list[WireFit]) -> list[str]:
    """Ids by position within one span (see the module notes)."""
    ids = [""] * len(wires)
    shields = [i for i, w in enumerate(wires) if w.role == "shield"]
    phases = [i for i, w in enumerate(wires) if w.role == "phase"]
    for k, i in enumerate(sorted(shields, key=lambda i: wires[i].lateral_offset_m), start=1):
        ids[i] = f"SW{k}"
    if not phases:
        return ids
    lat = np.array([wires[i].lateral_offset_m for i in phases])
    n = len(phases)
    n_circuits = n // 3 if n % 3 == 0 and n >= 3 else 1
    # circuits: left to right = increasing lateral offset (right positive)
    by_lat = [phases[j] for j in np.argsort(lat, kind="stable")]
    size = n // n_circuits
    letters = "ABCDEFGHIJKLMNOPQRSTUVWXYZ"
    for c in range(n_circuits):
        members = by_lat[c * size:(c + 1) * size] if c < n_circuits - 1 else by_lat[c * size:]
        members.sort(key=lambda i: (-round(wires[i].height_m / 1.0), wires[i].lateral_offset_m))
        for k, i in enumerate(members):
            ids[i] = f"C{c + 1}-{letters[k % 26]}"
    return ids


def _end_point(span: Span, w: WireFit, at_end: str) -> np.ndarray | None:
    """Rough 3-D position of a wire at one end of its span (from its cluster polynomials)."""
    c = w.cluster
    if c is None:
        return None
    u, v, L = span_frame(span.a_xy, span.b_xy)
    st = 0.0 if at_end == "a" else L
    coef_z = c.extra.get("coef_z")
    coef_t = c.extra.get("coef_t")
    if coef_z is None or coef_t is None:
        return None
    lat = np.polyval(coef_t, st)
    z = np.polyval(coef_z, st)
    xy = span.a_xy + u * st + v * lat
    return np.array([xy[0], xy[1], z])


def _assign_ids(spans: list[Span], opts: ModelOptions) -> None:
    """Positional ids in the fullest span, carried along the line by matching wire ends."""
    line_spans = [sp for sp in spans if any(w.role != "other" for w in sp.wires)]
    if not line_spans:
        return
    for sp in spans:
        for w, wid in zip(sp.wires, _positional_ids(sp.wires), strict=True):
            w.wire_id = wid
    # reference: a span with the line's usual number of wires (the most frequent count) and
    # the most wire points among those — not simply the span with the most wires, where one
    # spurious piece would shift every positional id of the line
    counts = [sum(w.role != "other" for w in sp.wires) for sp in spans]
    seen_counts = [c for c in counts if c > 0]
    freq = {c: seen_counts.count(c) for c in set(seen_counts)}
    usual = max(freq, key=lambda c: (freq[c], c))
    ref = max((k for k, c in enumerate(counts) if c == usual),
              key=lambda k: sum(len(w.point_indices) for w in spans[k].wires
                                if w.role != "other"))

    def carry(src: Span, dst: Span, src_end: str, dst_end: str):
        a = [w for w in src.wires if w.role != "other"]
        b = [w for w in dst.wires if w.role != "other"]
        if not a or not b:
            return
        pa = [_end_point(src, w, src_end) for w in a]
        pb = [_end_point(dst, w, dst_end) for w in b]
        # distance across the line and vertically (dead-end strings shift along the line)
        d_line = src.direction + dst.direction
        d_line = d_line / max(np.hypot(*d_line), 1e-12)
        cost = np.full((len(a), len(b)), 1e6)
        for i, p in enumerate(pa):
            for j, q in enumerate(pb):
                if p is None or q is None or a[i].role != b[j].role:
                    continue
                dxy = (q - p)[:2]
                across = dxy - d_line * (dxy @ d_line)
                cost[i, j] = np.hypot(np.hypot(*across), (q - p)[2])
        # of two candidates about as close (a wire and a stray piece beside it), the one
        # with more points carries the id: up to 0.5 m added for a candidate sparse among
        # the wires of its role
        penalty = 0.5 * ((1.0 - _point_share(a))[:, None] + (1.0 - _point_share(b))[None, :])
        # the link tolerance below applies to the distance itself, not to the penalised cost
        ri, ci = linear_sum_assignment(np.where(cost < 1e6, cost + penalty, cost))
        taken = set()
        matched_b = set()
        for i, j in zip(ri, ci, strict=True):
            if cost[i, j] <= opts.link_tolerance_m:
                b[j].wire_id = a[i].wire_id
                taken.add(a[i].wire_id)
                matched_b.add(j)
        # unmatched wires keep their positional id unless it is taken
        for j, w in enumerate(b):
            if j in matched_b:
                continue
            if w.wire_id in taken:
                w.wire_id = w.wire_id + "?"
                w.note = (w.note + "; " if w.note else "") + "id not matched to the next span"

    for k in range(ref + 1, len(spans)):
        carry(spans[k - 1], spans[k], "b", "a")
    for k in range(ref - 1, -1, -1):
        carry(spans[k + 1], spans[k], "a", "b")


def _point_share(wires: list[WireFit]) -> np.ndarray:
    """Each wire's points as a share of the most points of a wire of the same role."""
    n = np.array([len(w.point_indices) for w in wires], dtype=float)
    roles = np.array([w.role for w in wires])
    top = np.ones(len(wires))
    for role in set(roles.tolist()):
        top[roles == role] = max(float(n[roles == role].max()), 1.0)
    return n / top


def _ordered_ids(ids: set[str]) -> list[str]:
    def key(wid: str):
        if wid.startswith("C"):
            return (0, wid)
        if wid.startswith("SW"):
            return (1, wid)
        return (2, wid)
    return sorted((i for i in ids if i), key=key)


def _fit_kwargs(opts: ModelOptions) -> dict:
    return dict(loss=opts.fit_loss, f_scale_m=opts.fit_f_scale_m, fit_tilt=opts.fit_tilt,
                min_points=opts.min_fit_points)


def _tension(fit, w) -> tuple[float | None, float | None]:
    if fit is None or not fit.ok or w is None:
        return None, None
    h, ci = fit.horizontal_tension_n(w)
    return _num(h), _num(ci)


# Standard deviation along the span of an attachment placed on the crossarm line through the
# structure position (no insulator evidence): the along-line uncertainty of a detected
# structure's position. Measured p95 0.11 m over the synthetic sweep; common practice (no
# source) for a conservative value.
_CROSSARM_STATION_SD_M = 0.10


def _suspension_station(span: Span, w: WireFit, end: str, insulator_xyz):
    """Station of a wire's clamp at a suspension structure and its standard deviation: the
    median station of the insulator points hanging above the wire's end (plumb strings).
    ``None`` without them."""
    c = w.cluster
    if c is None or "coef_t" not in c.extra or insulator_xyz is None or not len(insulator_xyz):
        return None
    u, v, L = span_frame(span.a_xy, span.b_xy)
    base = 0.0 if end == "a" else L
    rel = insulator_xyz[:, :2] - span.a_xy[None, :]
    st = rel @ u
    near = np.abs(st - base) < 3.0
    if not near.any():
        return None
    stn = st[near]
    dt = np.abs(rel[near] @ v - np.polyval(c.extra["coef_t"], stn))
    dz = insulator_xyz[near, 2] - np.polyval(c.extra["coef_z"], np.full(len(stn), base))
    ok = (dt < 1.0) & (dz > -1.0) & (dz < 5.0)
    if ok.sum() < 5:
        return None
    q = stn[ok]
    med = float(np.median(q))
    # standard error of a median: sqrt(pi/2) sigma / sqrt(n), sigma from the MAD
    sigma = 1.4826 * float(np.median(np.abs(q - med)))
    return med, max(1.2533 * sigma / np.sqrt(len(q)), 0.01)


def _wire_start(span: Span, w: WireFit, end: str, xyz):
    """Station where the wire's points begin at one end and its standard deviation
    (:func:`~clearaudit.model.attachments.regular_start`, averaged over the sub-conductors of
    a bundle), or ``None`` when its first points are not within 10 m of the end."""
    c = w.cluster
    if c is None:
        return None
    u, _, L = span_frame(span.a_xy, span.b_xy)
    sign = 1.0 if end == "a" else -1.0
    base = 0.0 if end == "a" else L
    inward = sign * ((xyz[w.point_indices, :2] - span.a_xy[None, :]) @ u - base)
    labels = (c.sub_label if c.n_sub > 1 and len(c.sub_label) == len(inward)
              else np.zeros(len(inward), dtype=int))
    starts = []
    for k in np.unique(labels[labels >= 0]):
        q = inward[(labels == k) & (inward > -1.0)]
        if len(q) >= 5 and q.min() < 10.0:
            starts.append(regular_start(q)[:2])
    if not starts:
        return None
    return (base + sign * float(np.mean([x[0] for x in starts])),
            float(np.mean([x[1] for x in starts])))


def _deadend_station(span: Span, w: WireFit, end: str, xyz, insulator_xyz):
    """Station of a wire's attachment at a dead-end (the far end of its strain string) and
    its standard deviation, or ``None``.

    The strain insulator lies along the line from the crossarm tip; the conductor starts at its
    far end, inside the span. Two estimates: the far end of the insulator points near the
    wire's extrapolated curve (:func:`~clearaudit.model.attachments.uniform_end` on the top
    points), and where the wire's points begin
    (:func:`~clearaudit.model.attachments.regular_start`, averaged over the sub-conductors of a
    bundle). Their inverse-variance weighted mean when both exist and agree within 1 m, else
    the insulator estimate; the wire's alone only when it lies more than 1.5 m inside (a wire
    starting at the structure has no strain string). Returns ``(station, sd, has_string)``.
    """
    c = w.cluster
    if c is None or "coef_t" not in c.extra:
        return None
    u, v, L = span_frame(span.a_xy, span.b_xy)
    sign = 1.0 if end == "a" else -1.0
    base = 0.0 if end == "a" else L
    est_ins = est_wire = None
    if insulator_xyz is not None and len(insulator_xyz):
        rel = insulator_xyz[:, :2] - span.a_xy[None, :]
        st = rel @ u
        inward = sign * (st - base)
        near = (inward > -2.0) & (inward < 10.0)
        if near.any():
            stn = st[near]
            dt = np.abs(rel[near] @ v - np.polyval(c.extra["coef_t"], stn))
            dz = np.abs(insulator_xyz[near, 2] - np.polyval(c.extra["coef_z"], stn))
            ok = (dt < 1.0) & (dz < 2.5)
            if ok.sum() >= 3:
                est_ins = uniform_end(inward[near][ok], top=20)
    own = _wire_start(span, w, end, xyz)
    if own is not None:
        est_wire = (sign * (own[0] - base), own[1])
    if est_ins is not None and est_wire is not None and abs(est_ins[0] - est_wire[0]) < 1.0:
        wi, ww = est_ins[1] ** -2, est_wire[1] ** -2
        value = (wi * est_ins[0] + ww * est_wire[0]) / (wi + ww)
        return base + sign * value, (wi + ww) ** -0.5, True
    if est_ins is not None:
        return base + sign * est_ins[0], est_ins[1], True
    if est_wire is not None and est_wire[0] > 1.5:
        return base + sign * est_wire[0], est_wire[1], False
    return None


def _arm_normals(spans: list[Span]) -> dict[str, np.ndarray]:
    """Direction of the crossarms at each structure: the bisector of the right-hand normals
    of the spans on either side (square to the line on a straight line). Common practice
    (no source): crossarms of angle structures lie on the bisector of the line angle."""
    acc: dict[str, np.ndarray] = {}
    for sp in spans:
        v = span_frame(sp.a_xy, sp.b_xy)[1]
        for sid in (sp.from_structure, sp.to_structure):
            if sid is not None:
                acc[sid] = acc.get(sid, np.zeros(2)) + v
    return {k: n / max(np.hypot(*n), 1e-12) for k, n in acc.items()}


@dataclass
class _Station:
    """Along-span station of one attachment (span frame of the structures), its lateral offset
    and standard deviation [m], and how it was found."""

    station_m: float
    lateral_m: float
    sd_m: float
    method: str


def _crossarm_station(span: Span, sid: str, end: str, lateral: float, arm_normals) -> float:
    """Station where a wire at ``lateral`` meets the crossarm line through the structure."""
    u, v, L = span_frame(span.a_xy, span.b_xy)
    base = 0.0 if end == "a" else L
    n = (arm_normals or {}).get(sid)
    if n is not None and abs(float(n @ v)) > 0.2:
        s_att = base + lateral * float(n @ u) / float(n @ v)
        if abs(s_att - base) < 10.0:
            return s_att
    return base


def _attachment_stations(span: Span, wires: list[WireFit], xyz, insulator_xyz,
                         struct_by_id, arm_normals) -> dict[int, tuple[_Station, _Station]]:
    """Both attachments of every wire of a span (see :func:`_supports`), dead-end strain
    strings pooled per structure side (:func:`~clearaudit.model.attachments.pool_stations`)."""
    u, v, L = span_frame(span.a_xy, span.b_xy)
    out: dict[int, list[_Station]] = {}
    strings: dict[str, list[int]] = {"a": [], "b": []}
    for w in wires:
        c = w.cluster
        pair = []
        for end, sid in (("a", span.from_structure), ("b", span.to_structure)):
            base = 0.0 if end == "a" else L
            st = struct_by_id.get(sid) if sid is not None else None
            if st is None or c is None or "coef_t" not in c.extra:
                pair.append(_Station(base, 0.0, _CROSSARM_STATION_SD_M, "span end"))
                continue
            lateral = float(np.polyval(c.extra["coef_t"], base))
            if st.kind == DEADEND:
                found = _deadend_station(span, w, end, xyz, insulator_xyz)
                if found is not None:
                    s_att, sd, has_string = found
                    pair.append(_Station(s_att, float(np.polyval(c.extra["coef_t"], s_att)),
                                         sd, "strain string" if has_string else "wire end"))
                    if has_string:
                        strings[end].append(len(out))
                    continue
            else:
                found = _suspension_station(span, w, end, insulator_xyz)
                if found is not None:
                    s_att, sd = found
                    pair.append(_Station(s_att, float(np.polyval(c.extra["coef_t"], s_att)),
                                         sd, "plumb string"))
                    continue
            s_att = _crossarm_station(span, sid, end, lateral, arm_normals)
            # a wire without a strain string (shield wire) starts at the structure, where the
            # tower hides its first points: the crossarm line through the structure position
            pair.append(_Station(s_att, lateral, _CROSSARM_STATION_SD_M, "crossarm line"))
        out[len(out)] = pair
    # strain strings of one structure side: one assembly, far ends parallel to the crossarm line
    for k, end in ((0, "a"), (1, "b")):
        members = strings[end]
        if len(members) < 2:
            continue
        sid = span.from_structure if end == "a" else span.to_structure
        n = (arm_normals or {}).get(sid)
        slope = float(n @ u) / float(n @ v) if n is not None and abs(float(n @ v)) > 0.2 else 0.0
        rows = [out[i][k] for i in members]
        pooled_s, pooled_sd, used = pool_stations([r.station_m for r in rows],
                                                  [r.lateral_m for r in rows],
                                                  [max(r.sd_m, 1e-3) for r in rows], slope)
        for r, s_new, sd_new, ok in zip(rows, pooled_s, pooled_sd, used, strict=True):
            if ok:
                r.station_m, r.sd_m, r.method = float(s_new), float(sd_new), "strain strings"
    return {id(w): (out[i][0], out[i][1]) for i, w in enumerate(wires)}


def _arm_slope(span: Span, sid: str, arm_normals) -> float:
    """d(station)/d(lateral) of the crossarm line of structure ``sid`` in the span frame."""
    u, v, _ = span_frame(span.a_xy, span.b_xy)
    n = (arm_normals or {}).get(sid)
    return float(n @ u) / float(n @ v) if n is not None and abs(float(n @ v)) > 0.2 else 0.0


def _deadend_axes(spans: list[Span], all_stations: dict, struct_by_id, arm_normals,
                  insulator_xyz) -> None:
    """Place the attachments without a strain string (shield wires) at a dead-end on the
    structure axis found from the phases' strain strings.

    Per side of a dead-end structure, the pooled far end of the strings (measured from the
    crossarm line through the detected position) is the axis shift plus the string length;
    :func:`~clearaudit.model.attachments.deadend_axis_shift` separates the two with strings
    on two sides, and uses the line's string length (inverse-variance mean over the
    two-sided dead-ends) at a structure with strings on one side only (a line end). The
    detected position is the prior (:data:`_CROSSARM_STATION_SD_M`). Stations are changed in
    place; the method becomes ``"strain-string axis"``.
    """
    sides: dict[str, list] = {}
    for span in spans:
        stations = all_stations[id(span)]
        u, _, L = span_frame(span.a_xy, span.b_xy)
        for k, (end, sid) in enumerate((("a", span.from_structure), ("b", span.to_structure))):
            st = struct_by_id.get(sid) if sid is not None else None
            if st is None or st.kind != DEADEND:
                continue
            sign, base = (1.0, 0.0) if end == "a" else (-1.0, L)
            slope = _arm_slope(span, sid, arm_normals)
            rows = [pair[k] for pair in stations.values()]
            strung = [r for r in rows if r.method == "strain strings"] or \
                [r for r in rows if r.method == "strain string"]
            bare = [r for r in rows if r.method == "crossarm line"]
            if not strung:
                continue
            near, near_sd = _near_ends(span, end, [w for w in span.wires
                                                   if id(w) in stations
                                                   and stations[id(w)][k].method.startswith(
                                                       "strain string")],
                                       insulator_xyz, slope)
            far = np.array([sign * (r.station_m - base - slope * r.lateral_m) for r in strung])
            sd = np.array([max(r.sd_m, 1e-3) for r in strung])
            # pooled rows share one value; a lone string keeps its own
            far_m = float(np.median(far))
            sd_far = float(np.min(sd)) if strung[0].method == "strain strings" else float(sd[0])
            sides.setdefault(sid, []).append((sign * u, far_m, sd_far, sign, bare, near,
                                              near_sd))
    if not sides:
        return
    def known(items):  # strings on two sides, or their near ends seen
        return len(items) >= 2 or any(np.isfinite(i[5]) for i in items)

    def solve(items, **given):
        return deadend_axis_shift([i[0] for i in items], [i[1] for i in items],
                                  [i[2] for i in items], near_ends_m=[i[5] for i in items],
                                  near_sd_m=[i[6] for i in items],
                                  prior_sd_m=_CROSSARM_STATION_SD_M, **given)

    lengths = []
    for items in sides.values():
        if known(items):
            lengths.append(solve(items)[2:])
    if lengths:
        wl = np.array([x[1] for x in lengths]) ** -2.0
        line_length = float(np.sum(wl * [x[0] for x in lengths]) / wl.sum())
        line_length_sd = float(wl.sum() ** -0.5)
    for items in sides.values():
        if not known(items) and not lengths:
            continue
        given = {} if known(items) else dict(string_length_m=line_length,
                                              string_length_sd_m=line_length_sd)
        shift, shift_sd, _, _ = solve(items, **given)
        for (_, _, _, sign, bare, _, _), d, d_sd in zip(items, shift, shift_sd, strict=True):
            if abs(d) > 2.0:  # not a believable detection error: keep the structure position
                continue
            for r in bare:
                r.station_m += sign * float(d)
                r.sd_m = float(d_sd)
                r.method = "strain-string axis"


def _near_ends(span: Span, end: str, wires: list[WireFit], insulator_xyz,
               slope: float) -> tuple[float, float]:
    """Pooled near end (at the crossarm tips) of the strain strings of ``wires`` at one end,
    measured into the span from the crossarm line through the structure position, and its
    standard deviation; ``(nan, nan)`` when not seen.

    Per string, the lowest insulator points near the wire's extrapolated curve give the near
    end (:func:`~clearaudit.model.attachments.uniform_end` mirrored); the strings' median
    (standard error as in :func:`~clearaudit.model.attachments.pool_stations`). A string that
    continues past the structure (strings on the other side) has no near end within 1 m of the
    crossarm line and is left out.
    """
    if insulator_xyz is None or not len(insulator_xyz) or not wires:
        return math.nan, math.nan
    u, v, L = span_frame(span.a_xy, span.b_xy)
    sign, base = (1.0, 0.0) if end == "a" else (-1.0, L)
    rel = insulator_xyz[:, :2] - span.a_xy[None, :]
    st = rel @ u
    lat = rel @ v
    inward = sign * (st - base - slope * lat)
    near = (inward > -2.0) & (inward < 10.0)
    if not near.any():
        return math.nan, math.nan
    stn, latn, inn, zn = st[near], lat[near], inward[near], insulator_xyz[near, 2]
    values, sds = [], []
    for w in wires:
        c = w.cluster
        if c is None or "coef_t" not in c.extra:
            continue
        ok = ((np.abs(latn - np.polyval(c.extra["coef_t"], stn)) < 1.0)
              & (np.abs(zn - np.polyval(c.extra["coef_z"], stn)) < 2.5))
        if ok.sum() < 3:
            continue
        low, sd = uniform_end(-inn[ok], top=20)
        if abs(low) < 1.0:
            values.append(-low)
            sds.append(max(sd, 1e-3))
    if len(values) < 2:
        return math.nan, math.nan
    r, sd_r = _median_offset(np.array(values), np.array(sds))
    return r, sd_r


def _supports(span: Span, stations: tuple[_Station, _Station]):
    """Horizontal support positions for the fit of one wire.

    The wire's attachment lies where its (horizontal) line meets the crossarm line through
    the structure (on a straight line: the structure's projection on the wire); at a
    suspension structure at the clamp below the plumb insulator string; at a dead-end at the
    far end of the strain string (see :func:`_deadend_station`), not at the structure axis.
    """
    u, v, _ = span_frame(span.a_xy, span.b_xy)
    a, b = stations
    return (span.a_xy + u * a.station_m + v * a.lateral_m,
            span.a_xy + u * b.station_m + v * b.lateral_m)


def _with_station_uncertainty(fit, stations):
    """The fit with its sag half-width widened by the attachment stations' uncertainty."""
    if stations is None or fit is None or not fit.ok:
        return fit
    ci = sag_ci95_with_stations(fit, stations[0].sd_m, stations[1].sd_m)
    return dataclasses.replace(fit, sag_ci95_m=ci)


@dataclass(frozen=True)
class FitJob:
    """One catenary fit: points and horizontal supports (local metres), fit settings."""

    points: np.ndarray
    support_a_xy: np.ndarray
    support_b_xy: np.ndarray
    settings: dict


def fit_jobs(jobs: Sequence[FitJob]) -> list[Any]:
    """Run fit jobs one after the other (here, or as a task of an engine)."""
    fitmod = _fit_module()
    return [fitmod.fit_catenary(j.points, j.support_a_xy, j.support_b_xy, **j.settings)
            for j in jobs]


def _representative_points(w: WireFit, xyz, a_xy, b_xy) -> np.ndarray:
    """The wire's points with the sub-conductor offsets removed (one line per phase)."""
    c = w.cluster
    pts = xyz[w.point_indices].copy()
    _, v, _ = span_frame(a_xy, b_xy)
    if c is not None and c.n_sub > 1:
        lab = c.sub_label
        off = c.sub_offsets  # (n_sub, 2) lateral, vertical
        ok = lab >= 0
        pts[ok, :2] -= off[lab[ok], 0][:, None] * v[None, :]
        pts[ok, 2] -= off[lab[ok], 1]
    return pts


def _wire_fit_jobs(span: Span, w: WireFit, xyz, opts: ModelOptions, supports):
    """The fits :func:`_fit_wire` will need for one wire, as ``(key, FitJob)`` pairs: the
    wire (``"wire"``) and, for a resolved bundle, each sub-conductor (``("sub", j)``)."""
    if len(w.point_indices) < opts.min_fit_points:
        return []
    a_xy, b_xy = supports
    kw = _fit_kwargs(opts)
    out = [("wire", FitJob(_representative_points(w, xyz, a_xy, b_xy), a_xy, b_xy, kw))]
    c = w.cluster
    if c is not None and c.n_sub > 1:
        for j in range(c.n_sub):
            sidx = w.point_indices[c.sub_label == j]
            if len(sidx) >= opts.min_fit_points:
                out.append((("sub", j), FitJob(xyz[sidx], a_xy, b_xy, kw)))
    return out


def _fit_wire(span: Span, w: WireFit, xyz, opts: ModelOptions, weights, bundle_hint,
              fitmod, stations, fitted: dict) -> None:
    """Set a wire's fit (and its sub-conductors') and its status.

    ``fitted`` holds the fits of the jobs of :func:`_wire_fit_jobs` (keys ``"wire"`` and
    ``("sub", j)``); only the free fit of a wire rejected between our structures is made here.
    """
    c = w.cluster
    if stations is not None:
        w.attachment_methods = (stations[0].method, stations[1].method)
        w.attachment_along_ci95_m = (_Z95 * stations[0].sd_m, _Z95 * stations[1].sd_m)
    pts_idx = w.point_indices
    unit_w = weights.get(w.role)
    w.unit_weight_n_per_m = unit_w
    partial = span.partial_at is not None
    kw = _fit_kwargs(opts)
    if len(pts_idx) < opts.min_fit_points:
        w.status = STATUS_NOT_FITTED
        w.note = f"too few points ({len(pts_idx)} < {opts.min_fit_points})"
        w.bundle_count = max(w.bundle_count, bundle_hint.get(w.role, 1))
        return
    n_sub = c.n_sub if c is not None else 1
    fit = _with_station_uncertainty(fitted["wire"], stations)
    w.fit = fit
    hint = bundle_hint.get(w.role, 1)
    if n_sub > 1:
        w.bundle_count = n_sub
        if hint > 1 and hint != n_sub:
            w.note = _join(w.note, f"{n_sub} sub-conductors found, bundle hint {hint}")
    else:
        w.bundle_count = hint
        if hint > 1:
            w.note = _join(w.note, "sub-conductors not resolved; fitted as one")
    if not fit.ok:
        # a wire that is not a catenary between our structures but is one on its own
        # supports belongs to another line
        if "catenary" in fit.reason or fit.rms_m > opts.max_fit_rms_m:
            free = fitmod.fit_catenary(xyz[pts_idx], None, None, **kw)
            if free.ok and free.rms_m <= opts.max_fit_rms_m:
                w.role = "other"
                w.fit = free
                w.note = "attachments not at this line's structures"
                return
        w.status = STATUS_NOT_FITTED
        w.note = _join(w.note, fit.reason)
        return
    if fit.rms_m > opts.max_fit_rms_m:
        w.status = STATUS_NOT_FITTED
        w.note = _join(w.note, f"not a catenary (rms {fit.rms_m:.2f} m)")
        return
    w.status = STATUS_PARTIAL if partial else STATUS_FITTED
    if partial:
        w.note = _join(w.note, "span runs off the survey; fitted from the points present")
    w.horizontal_tension_n, w.horizontal_tension_ci95_n = _tension(fit, unit_w)
    if w.horizontal_tension_n is not None:
        w.phase_horizontal_tension_n = w.bundle_count * w.horizontal_tension_n
    # sub-conductors
    if c is not None and n_sub > 1:
        order = np.lexsort((c.sub_offsets[:, 1], c.sub_offsets[:, 0]))
        for k, j in enumerate(order):
            sidx = pts_idx[c.sub_label == j]
            sub = SubConductorFit(index=k, lateral_offset_m=float(c.sub_offsets[j, 0]),
                                  vertical_offset_m=float(c.sub_offsets[j, 1]),
                                  point_indices=sidx)
            if len(sidx) >= opts.min_fit_points:
                sub.fit = _with_station_uncertainty(fitted[("sub", j)], stations)
                sub.horizontal_tension_n, sub.horizontal_tension_ci95_n = _tension(sub.fit,
                                                                                   unit_w)
            w.sub_conductors.append(sub)


def _join(a: str, b: str) -> str:
    return b if not a else (a if not b else f"{a}; {b}")


def _add_missing_wires(spans: list[Span]) -> None:
    """A wire of the tension section not seen in one of its spans is listed there as not fitted.

    A wire id counts as a wire of a section when it is found in at least half of the
    section's spans; an id found in fewer spans (a stray piece, a short length of another
    line) is kept where it was found, with a note, and is not added to the other spans.
    """
    groups: dict[str, list[Span]] = {}
    for sp in spans:
        groups.setdefault(sp.section_id, []).append(sp)
    for group in groups.values():
        found: dict[str, list[str]] = {}
        for sp in group:
            for w in sp.wires:
                if w.wire_id and not w.wire_id.endswith("?"):
                    found.setdefault(w.wire_id, []).append(w.role)
        section_ids = {wid: roles[0] for wid, roles in found.items()
                       if len(roles) >= 0.5 * len(group)}
        for sp in group:
            have = {w.wire_id for w in sp.wires}
            for w in sp.wires:
                if w.wire_id in found and w.wire_id not in section_ids:
                    w.note = _join(w.note, f"found in {len(found[w.wire_id])} of {len(group)} "
                                           "spans of the tension section; check it is a wire "
                                           "of this line")
            for wid, role in section_ids.items():
                if wid in have:
                    continue
                sp.wires.append(WireFit(wire_id=wid, role=role, bundle_count=1,
                                        status=STATUS_NOT_FITTED,
                                        note="no points of this wire found in the span",
                                        point_indices=np.zeros(0, dtype=np.int64)))
            sp.wires.sort(key=lambda w: (0 if w.wire_id.startswith("C") else 1, w.wire_id))

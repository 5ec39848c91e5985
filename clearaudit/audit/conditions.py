"""Conditions: each fitted wire's curve as surveyed, at MOT, blown out by wind, and iced.

For every tension section and wire:

1. the section's horizontal tension at survey is the inverse-variance weighted mean of the spans'
   fitted tensions :math:`H_i = w C_i` (weights :math:`1/\\sigma_i^2` from the fits' 95 %
   half-widths), its half-width inflated by the Birge ratio when the spans disagree;
2. the ruling-span change of state (:mod:`clearaudit.physics.state_change`) gives the section's
   tension in every condition (temperature, load per unit length);
3. each span hangs with that tension between its own fitted attachment points, in the plane of
   its load: vertical for ``mot`` and ``ice``, swung about the chord by the blowout angle for
   ``wind_left`` / ``wind_right`` (suspension insulators swing and move the attachment point).

``survey`` is the fitted curve itself. Curves are sampled at most ``spacing_m`` apart (arc
length).

Uncertainty: each condition's sag half-width combines the section tension's half-width and the
survey-temperature half-width (two change-of-state evaluations each, central differences), in
quadrature; the position half-width along the curve adds the attachment heights' half-widths
(:meth:`WireState.position_ci95`).

References
----------
.. [1] IEEE Std 524-2016, annex on sag-tension calculation and the ruling span.
.. [2] CIGRE TB 324 (2007), sag-tension calculation methods (change of state).
.. [3] ASCE Manual of Practice 74 (2020), *Guidelines for Electrical Transmission Line
   Structural Loading*: conductor blowout and insulator swing (common practice).
"""
from __future__ import annotations

import math
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field, replace
from typing import Any, NamedTuple

import numpy as np

from clearaudit.physics import catenary, loading
from clearaudit.physics.state_change import ConductorMechanics, ruling_span

from ._polyline import frame_points

__all__ = [
    "CONDITION_GROUP",
    "ConditionSpec",
    "WireState",
    "catenary_curve",
    "conductor_mechanics",
    "fit_curve",
    "load_frame",
    "project_conditions",
    "resolve_conditions",
]

CONDITION_NAMES = ("survey", "mot", "wind_left", "wind_right", "ice")
CONDITION_GROUP = {"survey": "survey", "mot": "mot", "wind_left": "wind", "wind_right": "wind",
                   "ice": "ice"}


@dataclass(frozen=True)
class ConditionSpec:
    """One resolved condition.

    Attributes
    ----------
    name
        ``survey``, ``mot``, ``wind_left``, ``wind_right`` or ``ice``.
    group
        Output condition: ``survey``, ``mot``, ``wind`` or ``ice``.
    description, source
        From the rule set.
    temperature_c
        Phase conductor temperature (``survey``: the survey temperature). [°C]
    shield_temperature_c
        Shield wire temperature (shield wires carry no load current). [°C]
    wind_pressure_pa
        Wind pressure on the bare conductor. [Pa]
    radial_ice_m
        Radial ice thickness. [m]
    side
        +1: conductor blown to the left of A -> B (wind from the right); -1: to the right; 0.
    """

    name: str
    group: str
    description: str
    source: str
    temperature_c: float
    shield_temperature_c: float
    wind_pressure_pa: float = 0.0
    radial_ice_m: float = 0.0
    side: int = 0

    def as_dict(self) -> dict[str, Any]:
        return {"description": self.description, "temperature_c": self.temperature_c,
                "shield_temperature_c": self.shield_temperature_c,
                "ice_radial_m": self.radial_ice_m, "wind_pressure_pa": self.wind_pressure_pa,
                "source": self.source, "group": self.group}


def resolve_conditions(rules, max_operating_temperature_c: float,
                       survey_temperature_c: float) -> dict[str, ConditionSpec]:
    """The five conditions with their temperatures and loads.

    Parameters
    ----------
    rules
        :class:`clearaudit.audit.rules.RuleSet`.
    max_operating_temperature_c
        MOT of the phase conductors (line file). [°C]
    survey_temperature_c
        Conductor temperature during the flight. [°C]

    Returns
    -------
    conditions : dict
        Name -> :class:`ConditionSpec`.

    Notes
    -----
    ``mot`` uses ``max(MOT, rule floor)`` for phases. Shield wires carry no load current; at
    ``mot`` they are taken at ``max(survey temperature, rule floor)`` (the floor, e.g. 50 °C, is a
    hot-day temperature of an unloaded wire in the sun; common practice (no source)).
    """
    cases = rules.load_cases
    ts = float(survey_temperature_c)
    mot = cases["mot"]
    floor = mot.min_temperature_c
    t_mot = float(max_operating_temperature_c)
    mot_text = mot.description
    if floor is not None and t_mot < floor:
        mot_text += f" The line's MOT {t_mot:g} °C is below the rule floor; {floor:g} °C used."
        t_mot = floor
    shield_mot = max(ts, floor) if floor is not None else ts
    out = {
        "survey": ConditionSpec("survey", "survey", cases["survey"].description,
                                cases["survey"].source, ts, ts),
        "mot": ConditionSpec("mot", "mot", mot_text, mot.source, t_mot, min(shield_mot, t_mot)),
    }
    wind = cases["wind"]
    for name, side, words in (("wind_left", 1, "blown to the left of the line direction"),
                              ("wind_right", -1, "blown to the right of the line direction")):
        out[name] = ConditionSpec(name, "wind", f"{wind.description} Here: {words}.",
                                  wind.source, float(wind.temperature_c),
                                  float(wind.temperature_c), wind_pressure_pa=wind.wind_pressure_pa,
                                  side=side)
    ice = cases["ice"]
    out["ice"] = ConditionSpec("ice", "ice", ice.description, ice.source,
                               float(ice.temperature_c), float(ice.temperature_c),
                               radial_ice_m=ice.radial_ice_m)
    return out


def conductor_mechanics(conductor: Any, model: str = "auto") -> ConductorMechanics:
    """Sag-tension numbers of a :class:`clearaudit.physics.conductors.Conductor`.

    Parameters
    ----------
    conductor
        Library or custom conductor.
    model
        ``"auto"`` (two-material when core and outer properties are known), ``"linear"`` or
        ``"two-material"``.

    Returns
    -------
    mechanics : :class:`clearaudit.physics.state_change.ConductorMechanics`
    """
    if model not in ("auto", "linear", "two-material"):
        raise ValueError("The strain model must be 'auto', 'linear' or 'two-material'.")
    values = dict(weight_n_per_m=float(conductor.unit_weight_n_per_m),
                  area_m2=float(conductor.area_total_m2),
                  modulus_pa=float(conductor.modulus_final_pa),
                  thermal_expansion_per_c=float(conductor.thermal_expansion_per_c),
                  rated_strength_n=_finite_or_none(getattr(conductor, "rated_strength_n", None)))
    layered = [getattr(conductor, n, float("nan")) for n in (
        "area_outer_m2", "modulus_outer_pa", "thermal_expansion_outer_per_c", "area_core_m2",
        "modulus_core_pa", "thermal_expansion_core_per_c")]
    has_core = bool(getattr(conductor, "has_core", False)) and all(
        v is not None and math.isfinite(v) and v > 0 for v in layered)
    if model == "two-material" and not has_core:
        raise ValueError("The two-material model needs the conductor's core and outer-layer "
                         "properties.")
    if has_core and model != "linear":
        values.update(outer_area_m2=layered[0], outer_modulus_pa=layered[1],
                      outer_thermal_expansion_per_c=layered[2], core_area_m2=layered[3],
                      core_modulus_pa=layered[4], core_thermal_expansion_per_c=layered[5])
    return ConductorMechanics(**values)


def _finite_or_none(x):
    return float(x) if x is not None and math.isfinite(x) else None


# ------------------------------------------------------------------------------- geometry
def _n_samples(length_m: float, max_slope: float, spacing_m: float) -> int:
    return max(3, int(math.ceil(length_m * math.sqrt(1.0 + max_slope**2) / spacing_m)) + 1)


def load_frame(attachment_a: np.ndarray, attachment_b: np.ndarray,
               load_direction: np.ndarray | None = None
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray, float, float]:
    """The load frame of a span (see :func:`catenary_curve`): the attachment A, the frame's
    horizontal and up axes ``e_x``, ``e_z``, and the span and height difference in it. [m]"""
    a = np.asarray(attachment_a, dtype=float).reshape(3)
    b = np.asarray(attachment_b, dtype=float).reshape(3)
    g = np.array([0.0, 0.0, -1.0]) if load_direction is None else np.asarray(
        load_direction, dtype=float).reshape(3)
    norm = np.linalg.norm(g)
    if not norm > 0:
        raise ValueError("The load direction must be a non-zero vector.")
    ez = -g / norm
    d = b - a
    h = float(d @ ez)
    ex = d - h * ez
    span = float(np.linalg.norm(ex))
    if not span > 1e-6:
        raise ValueError("The attachments are aligned with the load direction (no span).")
    ex /= span
    return a, ex, ez, span, h


def catenary_curve(attachment_a: np.ndarray, attachment_b: np.ndarray, constant_m: float,
                   load_direction: np.ndarray | None = None, spacing_m: float = 0.5
                   ) -> tuple[np.ndarray, np.ndarray, float, float]:
    """A catenary between two 3-D points, hanging in the direction of its load.

    Parameters
    ----------
    attachment_a, attachment_b
        End points, shape (3,). [m]
    constant_m
        Catenary constant :math:`C = H/w` in the load plane (H: tension component normal to the
        load, w: load per unit length). [m]
    load_direction
        Direction of the distributed load (default straight down); with wind it is the
        resultant of weight and wind force. [-]
    spacing_m
        Largest distance between samples along the curve. [m]

    Returns
    -------
    curve : numpy.ndarray
        Shape (k, 3). [m]
    fraction : numpy.ndarray
        Position of each sample along the span, 0 at A to 1 at B (in the load frame). [-]
    span_m, height_m
        Span length and height difference in the load frame (normal to / along the load). [m]

    Notes
    -----
    With :math:`\\hat g` the unit load direction and :math:`d = B - A`, the load frame's "up" axis
    is :math:`e_z = -\\hat g` and its "horizontal" axis :math:`e_x \\propto d - (d\\cdot e_z)e_z`.
    The curve is :math:`A + x\\,e_x + z(x)\\,e_z` with :math:`z` the catenary of
    :func:`clearaudit.physics.catenary.catenary_height` over span :math:`d\\cdot e_x` and height
    difference :math:`d\\cdot e_z`. For a vertical load this is the ordinary catenary; for wind
    it is the catenary in the swung plane (ASCE MOP 74 blowout).
    """
    if not spacing_m > 0:
        raise ValueError("The sample spacing must be positive.")
    a, ex, ez, span, h = load_frame(attachment_a, attachment_b, load_direction)
    slope_end = max(abs(float(catenary.catenary_slope(0.0, span, h, constant_m))),
                    abs(float(catenary.catenary_slope(span, span, h, constant_m))))
    n = _n_samples(span, slope_end, spacing_m)
    x = np.linspace(0.0, span, n)
    z = catenary.catenary_height(x, span, h, constant_m)
    curve = np.empty((n, 3))
    frame_points(np.ascontiguousarray(a), np.ascontiguousarray(ex), np.ascontiguousarray(ez),
                 x, np.ascontiguousarray(z, dtype=float), curve)  # a + x ex + z ez
    return curve, x / span, span, h


def fit_curve(fit: Any, spacing_m: float = 0.5) -> tuple[np.ndarray, np.ndarray]:
    """The fitted (survey) curve sampled at most ``spacing_m`` apart.

    Parameters
    ----------
    fit
        A successful :class:`clearaudit.physics.fit.CatenaryFit`.
    spacing_m
        Largest distance between samples along the curve. [m]

    Returns
    -------
    curve, fraction : (k, 3) [m] and (k,) position along the span 0..1 [-].
    """
    span = float(fit.span_length_m)
    h = float(fit.z_b_m - fit.z_a_m)
    c = float(fit.catenary_constant_m)
    slope = max(abs(float(catenary.catenary_slope(0.0, span, h, c))),
                abs(float(catenary.catenary_slope(span, span, h, c))))
    n = _n_samples(span, slope, spacing_m)
    s = np.linspace(0.0, span, n)
    return fit.point_at(s), s / span


# ------------------------------------------------------------------------------ states
@dataclass
class WireState:
    """One wire of one span in every condition.

    Attributes
    ----------
    span_id, wire_id, role, section_id
        Identification.
    bundle_count
        Sub-conductors of the phase.
    fit
        The survey :class:`~clearaudit.physics.fit.CatenaryFit`.
    unit_weight_n_per_m
        Bare weight of one (sub-)conductor. [N/m]
    recipes
        Condition name -> how its curve is sampled: ``("fit", spacing_m)`` (the survey fit)
        or ``("catenary", a, b, constant_m, load_direction, spacing_m)`` (see
        :func:`catenary_curve`). The samples themselves are not kept: :attr:`curves` and
        :attr:`fractions` evaluate the recipe on access (the same numbers every time), so a
        line's states take kilobytes, not megabytes, and ship cheaply to Dask workers.
        :meth:`materialized` gives a copy holding the samples, for repeated use.
    curves
        Condition name -> sampled curve, shape (k, 3) (read-only mapping). [m, local]
    fractions
        Condition name -> position of each sample along the span, 0..1 (read-only mapping). [-]
    sag_m, sag_ci95_m
        Condition name -> sag in the load plane and its 95 % half-width. [m]
    horizontal_tension_n, horizontal_tension_ci95_n
        Condition name -> tension normal to the load per (sub-)conductor and half-width. [N]
    notes
        Plain sentences (conditions that could not be computed, and why).
    """

    span_id: str
    wire_id: str
    role: str
    section_id: str
    bundle_count: int
    fit: Any
    unit_weight_n_per_m: float
    recipes: dict[str, tuple] = field(default_factory=dict)
    sag_m: dict[str, float] = field(default_factory=dict)
    sag_ci95_m: dict[str, float] = field(default_factory=dict)
    horizontal_tension_n: dict[str, float] = field(default_factory=dict)
    horizontal_tension_ci95_n: dict[str, float] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    _samples: dict[str, tuple[np.ndarray, np.ndarray]] | None = field(
        default=None, init=False, repr=False, compare=False)

    def sample(self, condition: str) -> tuple[np.ndarray, np.ndarray]:
        """The curve of ``condition`` and the position of its samples along the span.

        Returns
        -------
        curve, fraction : (k, 3) [m, local] and (k,) [-].
        """
        if self._samples is not None:
            return self._samples[condition]
        recipe = self.recipes[condition]
        if recipe[0] == "fit":
            curve, fraction = fit_curve(self.fit, recipe[1])
        else:
            _, a, b, constant, load_direction, spacing = recipe
            curve, fraction, _, _ = catenary_curve(a, b, constant, load_direction, spacing)
        # read-only: an edit would stick on a materialized copy and vanish on a lazy state
        curve.flags.writeable = False
        fraction.flags.writeable = False
        return curve, fraction

    @property
    def curves(self) -> _Samples:
        return _Samples(self, 0)

    @property
    def fractions(self) -> _Samples:
        return _Samples(self, 1)

    def materialized(self) -> WireState:
        """A shallow copy holding every condition's samples (evaluated once).

        The copy shares ``fit`` and ``recipes`` with this state; both are fixed once the
        conditions are projected (the samples depend on nothing else).
        """
        copy = replace(self)
        copy._samples = {c: self.sample(c) for c in self.recipes}
        return copy

    def position_ci95(self, condition: str, fraction: np.ndarray) -> np.ndarray:
        """95 % half-width of the curve's position at positions along the span.

        Parameters
        ----------
        condition
            Condition name.
        fraction
            Position along the span, 0 at A to 1 at B. [-]

        Returns
        -------
        ci : numpy.ndarray
            :math:`\\sqrt{(4f(1-f)\\,\\delta_D)^2 + ((1-f)\\delta_{zA})^2 + (f\\,\\delta_{zB})^2}`
            with :math:`\\delta_D` the sag half-width, :math:`\\delta_{zA}, \\delta_{zB}` the
            attachment heights' half-widths (the sag shape is parabolic to first order). [m]
        """
        f = np.clip(np.asarray(fraction, dtype=float), 0.0, 1.0)
        sag_ci = self.sag_ci95_m.get(condition, 0.0)
        za = _nan0(getattr(self.fit, "z_a_ci95_m", 0.0))
        zb = _nan0(getattr(self.fit, "z_b_ci95_m", 0.0))
        return np.sqrt((4.0 * f * (1.0 - f) * sag_ci) ** 2 + ((1.0 - f) * za) ** 2
                       + (f * zb) ** 2)


class _Samples(Mapping):
    """Read-only condition -> samples view of a :class:`WireState` (curves or fractions)."""

    __slots__ = ("_state", "_part")

    def __init__(self, state: WireState, part: int):
        self._state, self._part = state, part

    def __getitem__(self, condition: str) -> np.ndarray:
        return self._state.sample(condition)[self._part]

    def __iter__(self) -> Iterator[str]:
        return iter(self._state.recipes)

    def __len__(self) -> int:
        return len(self._state.recipes)

    def __contains__(self, condition: object) -> bool:  # without evaluating the curve
        return condition in self._state.recipes


def _nan0(x) -> float:
    x = float(x) if x is not None else 0.0
    return x if math.isfinite(x) else 0.0


def _fit_tension(fit, w: float) -> tuple[float, float]:
    """H (normal to the load) and half-width from a fit, correcting a wind-tilted plane."""
    tilt = _nan0(fit.tilt_rad)
    tilt_ci = _nan0(fit.tilt_ci95_rad)
    w_plane = w / math.cos(tilt) if abs(tilt) > max(tilt_ci, math.radians(1.0)) else w
    c_ci = _nan0(fit.catenary_constant_ci95_m)
    return w_plane * fit.catenary_constant_m, w_plane * c_ci


def section_tension(tensions: np.ndarray, half_widths: np.ndarray) -> tuple[float, float]:
    """Inverse-variance weighted mean of span tensions, half-width with Birge inflation.

    Parameters
    ----------
    tensions
        Fitted horizontal tensions of the spans. [N]
    half_widths
        Their 95 % half-widths. [N]

    Returns
    -------
    (H, H_ci95) : [N]

    Notes
    -----
    :math:`\\bar H = \\sum H_i/\\sigma_i^2 / \\sum 1/\\sigma_i^2`,
    :math:`\\sigma_{\\bar H} = (\\sum 1/\\sigma_i^2)^{-1/2}\\max(1, \\sqrt{\\chi^2/(n-1)})`
    (Birge ratio; Taylor, *An Introduction to Error Analysis*, 2nd ed., ch. 7).
    """
    h = np.asarray(tensions, dtype=float)
    ci = np.asarray(half_widths, dtype=float)
    if h.size == 0:
        raise ValueError("Give at least one tension.")
    floor = 1e-4 * np.abs(h) + 1e-9
    ci = np.where(np.isfinite(ci) & (ci > floor), ci, np.maximum(floor, 1e-3 * np.abs(h)))
    weights = 1.0 / ci**2
    mean = float(np.sum(weights * h) / np.sum(weights))
    half = float(1.0 / math.sqrt(np.sum(weights)))
    if h.size > 1:
        chi2 = float(np.sum(weights * (h - mean) ** 2))
        half *= max(1.0, math.sqrt(chi2 / (h.size - 1)))
    return mean, half


def project_conditions(model: Any, conductors: dict[str, Any], specs: dict[str, ConditionSpec],
                       survey_temperature_ci95_c: float, *, insulator_length_m: float = 0.0,
                       strain_model: str = "auto", creep_shift_c: float = 0.0,
                       spacing_m: float = 0.5) -> list[WireState]:
    """Every fitted wire of every span in every condition.

    Parameters
    ----------
    model
        :class:`clearaudit.model.line.LineModel`.
    conductors
        ``{"phase": Conductor, "shield": Conductor}``.
    specs
        From :func:`resolve_conditions`.
    survey_temperature_ci95_c
        95 % half-width of the survey conductor temperature. [°C]
    insulator_length_m
        Suspension insulator string length (attachment swing under wind). [m]
    strain_model
        ``"auto"``, ``"linear"`` or ``"two-material"`` (:func:`conductor_mechanics`).
    creep_shift_c
        Equivalent temperature shift for future creep, added to every projected condition. [°C]
    spacing_m
        Largest sample spacing along the curves. [m]

    Returns
    -------
    states : list of :class:`WireState`
        One per fitted wire per span, in model order.
    """
    mechanics = {role: conductor_mechanics(c, strain_model) for role, c in conductors.items()
                 if c is not None}
    spans = {s.id: s for s in model.spans}
    section_of = {}
    for section in model.sections:
        for sid in section.span_ids:
            section_of[sid] = section
    states: list[WireState] = []
    # Group wires by (section, wire id).
    groups: dict[tuple[str, str], list[tuple[Any, Any]]] = {}
    for span in model.spans:
        for wire in span.wires:
            if wire.role not in mechanics or wire.fit is None or not getattr(wire.fit, "ok", False):
                continue
            key = (span.section_id or (section_of[span.id].id if span.id in section_of
                                       else span.id), wire.wire_id)
            groups.setdefault(key, []).append((span, wire))
    ts = specs["survey"].temperature_c
    dt = max(float(survey_temperature_ci95_c), 0.0)
    plans = []
    for (section_id, _wire_id), members in groups.items():
        role = members[0][1].role
        w = mechanics[role].weight_n_per_m
        fits = [m[1].fit for m in members]
        tens = np.array([_fit_tension(f, w) for f in fits])
        h_survey, h_ci = section_tension(tens[:, 0], tens[:, 1])
        section = next((s for s in model.sections if s.id == section_id), None)
        # The ruling span of this wire's role (phases end at strain strings, shield wires at
        # the structure), falling back to the section's phase ruling span.
        rs = (getattr(section, "ruling_span_by_role_m", None) or {}).get(role) \
            or getattr(section, "ruling_span_m", None)
        if not rs:
            rs = ruling_span([f.span_length_m for f in fits])
        # The change of state depends only on the section's ruling span, the wire's survey
        # tension and the final load and temperature: solved once per wire and section for
        # every distinct load (both wind sides share one), not once per span.
        plans.append(_SectionWire(section_id, members, role, rs, h_survey, h_ci, {}))
    _solve_changes_of_state(plans, mechanics, conductors, specs, ts, dt, creep_shift_c)
    for p in plans:
        for span, wire in p.members:
            states.append(_wire_state(span, wire, p.section_id, mechanics[p.role], specs, p.rs,
                                      p.h_survey, p.h_ci, ts, dt, model, spans,
                                      insulator_length_m, creep_shift_c, spacing_m,
                                      conductors[p.role], p.cache))
    order = {(s.id, w.wire_id): i for i, s in enumerate(model.spans)
             for w in s.wires}
    states.sort(key=lambda st: (order.get((st.span_id, st.wire_id), 0),
                                [w.wire_id for w in spans[st.span_id].wires].index(st.wire_id)))
    return states


def _is_suspension(model, structure_id) -> bool:
    if structure_id is None:
        return False
    structure = model.structure(structure_id) if hasattr(model, "structure") else None
    return structure is not None and getattr(structure, "kind", "") == "suspension"


class _SectionWire(NamedTuple):
    """One wire of one tension section: its spans' (span, wire) pairs, the ruling span [m],
    the section's survey tension and its half-width [N], and the final tensions of the
    changes of state solved so far (``(w_final, t_final) -> H`` of the five variants)."""

    section_id: str
    members: list
    role: str
    rs: float
    h_survey: float
    h_ci: float
    cache: dict


def _load_key(w_final: float, t_final: float) -> tuple[float, float]:
    """The key of a change of state's final condition (both wind sides share one)."""
    return float(w_final), float(t_final)


def _variants(h_survey: float, h_ci: float, ts: float, dt: float
              ) -> tuple[np.ndarray, np.ndarray]:
    """Initial conditions of a change of state, for its uncertainty: nominal, H +/- its
    half-width, survey temperature +/- its half-width. ([N], [°C])"""
    return (np.array([h_survey, h_survey + h_ci, max(h_survey - h_ci, 0.5 * h_survey),
                      h_survey, h_survey]),
            np.array([ts, ts, ts, ts + dt, ts - dt]))


def _final_load(spec: ConditionSpec, role: str, diameter: float, w: float
                ) -> tuple[float, float, float, float]:
    """A condition's conductor temperature [°C], vertical load (weight and ice), wind force
    and their resultant [N/m], for a wire of ``role``."""
    t_final = spec.temperature_c if role == "phase" else spec.shield_temperature_c
    ice_w = loading.ice_weight_n_per_m(diameter, spec.radial_ice_m) if spec.radial_ice_m else 0.0
    wind_f = (loading.wind_force_n_per_m(diameter, spec.radial_ice_m, spec.wind_pressure_pa)
              if spec.wind_pressure_pa else 0.0)
    vertical = w + ice_w
    return t_final, vertical, wind_f, math.hypot(vertical, wind_f)


def _solve_changes_of_state(plans: list[_SectionWire], mechanics: dict[str, Any],
                            conductors: dict[str, Any], specs: dict[str, ConditionSpec],
                            ts: float, dt: float, creep_shift_c: float) -> None:
    """Fill the plans' caches (``load -> final H of the five variants``) with every change of
    state of a role in one vectorised solve.

    Each element of the solve is the same sequence of operations as a solve of its wire and
    section alone (the solver works element by element; its bisection stops once every
    bracket has stopped changing, which leaves a finished element as it is), so the tensions
    are the same numbers. When any element fails the caches are left empty and
    :func:`_wire_state` solves group by group, so each failure is noted on its own wires.
    """
    for role, mech in mechanics.items():
        w = mech.weight_n_per_m
        diameter = float(conductors[role].diameter_m)
        finals = [_final_load(spec, role, diameter, w) for name, spec in specs.items()
                  if name != "survey"]
        loads = sorted({_load_key(w_final, t_final) for t_final, _, _, w_final in finals})
        mine = [p for p in plans if p.role == role]
        if not mine or not loads:
            continue
        rows = [(p, load) for p in mine for load in loads]
        h_var, t_var = zip(*(_variants(p.h_survey, p.h_ci, ts, dt) for p, _ in rows),
                           strict=True)
        rs = np.repeat([float(p.rs) for p, _ in rows], 5)
        w_final = np.repeat([load[0] for _, load in rows], 5)
        t_final = np.repeat([load[1] for _, load in rows], 5)
        try:
            h_final = mech.final_tension(rs, np.concatenate(h_var), w, np.concatenate(t_var),
                                         w_final, t_final, creep_shift=creep_shift_c)
        except ValueError:
            continue
        h_final = np.asarray(h_final, dtype=float).reshape(len(rows), 5)
        for (p, load), h in zip(rows, h_final, strict=True):
            p.cache[load] = h


def _wire_state(span, wire, section_id, mech, specs, rs, h_survey, h_ci, ts, dt, model, spans,
                insulator_length_m, creep_shift_c, spacing_m, conductor,
                cache: dict | None = None) -> WireState:
    fit = wire.fit
    w = mech.weight_n_per_m
    state = WireState(span.id, wire.wire_id, wire.role, section_id,
                      int(getattr(wire, "bundle_count", 1) or 1), fit, w)
    state.recipes["survey"] = ("fit", spacing_m)
    state.sag_m["survey"] = float(fit.sag_m)
    state.sag_ci95_m["survey"] = _nan0(fit.sag_ci95_m)
    h_own, h_own_ci = _fit_tension(fit, w)
    state.horizontal_tension_n["survey"] = h_own
    state.horizontal_tension_ci95_n["survey"] = h_own_ci
    a, b = fit.attachment_a, fit.attachment_b
    normal_left = np.array([-fit.direction[1], fit.direction[0], 0.0])
    diameter = float(conductor.diameter_m)
    # Variants for the uncertainty: nominal, H +/-, survey temperature +/-.
    h_var, t_var = _variants(h_survey, h_ci, ts, dt)
    for name, spec in specs.items():
        if name == "survey":
            continue
        t_final, vertical, wind_f, w_final = _final_load(spec, wire.role, diameter, w)
        load = _load_key(w_final, t_final)
        if cache is not None and load in cache:
            h_final = cache[load]
        else:
            try:
                h_final = mech.final_tension(rs, h_var, w, t_var, w_final, t_final,
                                             creep_shift=creep_shift_c)
            except ValueError as exc:
                h_final = exc
            if cache is not None:
                cache[load] = h_final
        if isinstance(h_final, ValueError):
            state.notes.append(f"{name}: change of state failed ({h_final})")
            continue
        angle = math.atan2(wind_f, vertical)
        side = spec.side
        g = np.array([0.0, 0.0, -1.0]) * math.cos(angle) + side * math.sin(angle) * normal_left
        a_c, b_c = a.copy(), b.copy()
        if side and insulator_length_m > 0:
            # Suspension string swing ~ conductor blowout angle (equal wind and weight spans,
            # insulator weight neglected: the larger, conservative swing).
            shift = insulator_length_m * (math.sin(angle) * side * normal_left
                                          + np.array([0.0, 0.0, 1.0 - math.cos(angle)]))
            if _is_suspension(model, span.from_structure):
                a_c = a_c + shift
            if _is_suspension(model, span.to_structure):
                b_c = b_c + shift
        constants = h_final / w_final
        recipe = ("catenary", a_c, b_c, float(constants[0]), g, spacing_m)
        # the span and height difference in the load frame (the curve itself is sampled
        # when it is needed: WireState.sample)
        _, _, _, span_m, height_m = load_frame(a_c, b_c, g)
        sags = catenary.sag(span_m, height_m, constants)
        state.recipes[name] = recipe
        state.sag_m[name] = float(sags[0])
        state.sag_ci95_m[name] = float(math.hypot(0.5 * (sags[1] - sags[2]),
                                                  0.5 * (sags[3] - sags[4])))
        state.horizontal_tension_n[name] = float(h_final[0])
        state.horizontal_tension_ci95_n[name] = float(
            math.hypot(0.5 * (h_final[1] - h_final[2]), 0.5 * (h_final[3] - h_final[4])))
    return state

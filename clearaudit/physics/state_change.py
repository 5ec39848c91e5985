"""Change of state of a conductor: tension and sag at a new temperature and load.

The conductor's unstressed length is conserved between two conditions. Its length in the span is
the exact catenary arc length :math:`S`; the stretched length is the unstressed length
:math:`S_0` (at the reference temperature :math:`t_e`) plus elastic and thermal strain:

.. math:: S = S_0\\,(1 + \\varepsilon),\\qquad
          \\varepsilon = \\frac{\\bar T}{EA} + \\alpha\\,(t - t_e)

(small-strain, additive form). :math:`\\bar T` is the tension averaged along the arc length,
computed exactly for the catenary (:func:`clearaudit.physics.catenary.average_tension`). Using
the average tension in place of integrating :math:`ds/(1 + \\varepsilon(s))` along the arc
changes :math:`S_0` by :math:`S\\,\\operatorname{Var}_s(\\varepsilon)`, below 1e-8 m for
conductors (tension varies by a few per cent along a span).

Two models of the strain:

* **linear composite**: one area, modulus and expansion coefficient;
* **two-material**: an outer (aluminium) layer and a core (steel), each with its own area,
  modulus and expansion coefficient, sharing the same total strain. The layers have equal
  unstressed lengths at ``equal_strain_temperature`` (by default the initial temperature). As the
  temperature rises the outer layer's mechanical strain falls; above the *knee* it reaches zero
  (or ``-outer_compression_limit / outer_modulus``) and the core alone carries further tension
  changes.

Creep is an equivalent temperature shift added to the final temperature. The load per unit
length ``w`` is taken per unit of stretched conductor length (as in common practice); this
ignores a relative effect of the order of the strain (< 0.2 %) on the catenary constant.

For a tension section of several suspension spans, the state change is solved for the ruling
span :math:`\\sqrt{\\sum L^3/\\sum L}` (level) and the horizontal tension is applied to every span.

References
----------
.. [1] IEEE Std 524-2016, *Guide for the Installation of Overhead Transmission Line
   Conductors*, annex on sag-tension calculation (change of state, ruling span).
.. [2] CIGRE Technical Brochure 324 (2007), *Sag-tension calculation methods for overhead
   lines*, sections on the strain summation method, the knee point and creep as an equivalent
   temperature.
.. [3] Irvine, H. M. (1981). *Cable Structures*. MIT Press, ch. 1.
"""
from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np
from numpy.typing import ArrayLike

from clearaudit.physics import catenary

__all__ = [
    "ConductorMechanics",
    "StringingRow",
    "change_of_state",
    "change_of_state_two_material",
    "knee_temperature",
    "ruling_span",
    "section_sags_at_condition",
    "stringing_table",
]

_BISECTION_STEPS = 90
_MIN_CONSTANT_PER_SPAN = 0.5   # C >= L/2: sag up to ~27 % of the span, beyond any conductor
_MAX_CONSTANT_M = 1e9


def ruling_span(span_lengths: ArrayLike) -> float:
    """Ruling (equivalent) span of a tension section.

    Parameters
    ----------
    span_lengths
        Horizontal lengths of the suspension spans between two dead-ends. [m]

    Returns
    -------
    L_r : float
        :math:`\\sqrt{\\sum L_i^3 / \\sum L_i}`. [m]

    References
    ----------
    .. [1] IEEE Std 524-2016, annex on the ruling span.
    """
    spans = np.atleast_1d(np.asarray(span_lengths, dtype=float))
    if spans.size == 0 or np.any(~(spans > 0)) or np.any(~np.isfinite(spans)):
        raise ValueError("Span lengths must be a non-empty list of positive numbers.")
    return float(np.sqrt(np.sum(spans**3) / np.sum(spans)))


@dataclass(frozen=True)
class _StrainModel:
    """Total strain <-> average tension of a core plus an optional outer layer (k = E A)."""

    core_stiffness: np.ndarray
    core_expansion: np.ndarray
    outer_stiffness: np.ndarray
    outer_expansion: np.ndarray
    outer_min_strain: np.ndarray

    def tension(self, strain: np.ndarray, temperature_shift: np.ndarray) -> np.ndarray:
        outer = np.maximum(strain - self.outer_expansion * temperature_shift,
                           self.outer_min_strain)
        return (self.core_stiffness * (strain - self.core_expansion * temperature_shift)
                + self.outer_stiffness * outer)

    def strain(self, tension: np.ndarray, temperature_shift: np.ndarray) -> np.ndarray:
        both = ((tension + (self.core_stiffness * self.core_expansion
                            + self.outer_stiffness * self.outer_expansion) * temperature_shift)
                / (self.core_stiffness + self.outer_stiffness))
        core_only = ((tension - self.outer_stiffness * self.outer_min_strain)
                     / self.core_stiffness + self.core_expansion * temperature_shift)
        outer_ok = both - self.outer_expansion * temperature_shift >= self.outer_min_strain
        return np.where(outer_ok, both, core_only)


def _positive(name: str, value: ArrayLike) -> np.ndarray:
    array = np.asarray(value, dtype=float)
    if np.any(~(array > 0)) or np.any(~np.isfinite(array)):
        raise ValueError(f"{name} must be positive and finite.")
    return array


def _finite(name: str, value: ArrayLike) -> np.ndarray:
    array = np.asarray(value, dtype=float)
    if np.any(~np.isfinite(array)):
        raise ValueError(f"{name} must be finite.")
    return array


def _unstressed_length(span_length, height_difference, horizontal_tension, unit_weight,
                       temperature_shift, model: _StrainModel) -> np.ndarray:
    """S0 at the reference temperature from a known condition (H, w, t - t_e)."""
    constant = horizontal_tension / unit_weight
    length = catenary.arc_length(span_length, height_difference, constant)
    mean_tension = catenary.average_tension(horizontal_tension, unit_weight, span_length,
                                            height_difference)
    return length / (1.0 + model.strain(mean_tension, temperature_shift))


def _bisect(residual, lo: np.ndarray, hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``_BISECTION_STEPS`` halvings of the brackets [lo, hi] (``residual`` < 0 at lo).

    A step is a function of (lo, hi) alone, so once a step leaves both unchanged (every
    bracket down to adjacent floats, about 55 steps in log C) the remaining steps would too:
    they are skipped, with the same result bit for bit.
    """
    for _ in range(_BISECTION_STEPS):
        mid = 0.5 * (lo + hi)
        below = residual(mid) < 0
        new_lo = np.where(below, mid, lo)
        new_hi = np.where(below, hi, mid)
        if np.array_equal(new_lo, lo) and np.array_equal(new_hi, hi):
            break
        lo, hi = new_lo, new_hi
    return lo, hi


def _solve_horizontal_tension(span_length, height_difference, unstressed_length, unit_weight,
                              temperature_shift, model: _StrainModel) -> np.ndarray:
    """H such that the catenary's average tension matches the strain of its arc length.

    Vectorised bisection in log C on r(C) = T_avg(C) - T_material(S(C)/S0 - 1), which increases
    monotonically with C for C >= L/2 (catenary tension rises, conductor length falls).
    """
    L, h, S0, w, dt = np.broadcast_arrays(span_length, height_difference, unstressed_length,
                                          unit_weight, temperature_shift)
    # the inner loop calls the catenary functions' unchecked forms (the same operations):
    # their checks are made here once, by the catenary module's own checks (L > 0, and
    # w > 0 so that C = H / w > 0 for every C = exp(log C) tried)
    Lf = catenary._check_span(L)
    wf = catenary._positive(w, "The unit weight must be positive.")
    hf = np.asarray(h, dtype=float)

    def residual(log_constant):
        constant = np.exp(log_constant)
        strain = catenary._arc_length(Lf, hf, constant) / S0 - 1.0
        return (catenary._average_tension(wf * constant, wf, Lf, hf)
                - model.tension(strain, dt))

    lo = np.log(_MIN_CONSTANT_PER_SPAN * L)
    hi = np.full_like(lo, np.log(_MAX_CONSTANT_M))
    r_lo, r_hi = residual(lo), residual(hi)
    if np.any(r_lo > 0):
        raise ValueError("The conductor would hang slacker than C = L/2 in the final "
                         "condition; check the inputs (units, temperature, load).")
    if np.any(r_hi < 0):
        raise ValueError("The conductor would be tighter than C = 1e9 m in the final "
                         "condition; check the inputs (units, temperature, load).")
    lo, hi = _bisect(residual, lo, hi)
    return w * np.exp(0.5 * (lo + hi))


def change_of_state(span_length: ArrayLike, horizontal_tension: ArrayLike,
                    unit_weight: ArrayLike, temperature: ArrayLike,
                    final_unit_weight: ArrayLike, final_temperature: ArrayLike,
                    area: ArrayLike, modulus: ArrayLike, thermal_expansion: ArrayLike, *,
                    height_difference: ArrayLike = 0.0,
                    creep_shift: ArrayLike = 0.0) -> np.ndarray:
    """Horizontal tension in a new condition, linear composite conductor model.

    Parameters
    ----------
    span_length
        Horizontal span length (the ruling span of a tension section). [m]
    horizontal_tension
        Horizontal tension in the initial condition, H1. [N]
    unit_weight
        Load per unit length in the initial condition, w1. [N/m]
    temperature
        Conductor temperature in the initial condition, t1. [°C]
    final_unit_weight
        Load per unit length in the final condition (weight, or the resultant with ice and
        wind), w2. [N/m]
    final_temperature
        Conductor temperature in the final condition, t2. [°C]
    area
        Total cross-sectional area, A. [m²]
    modulus
        Composite (final) modulus of elasticity, E. [Pa]
    thermal_expansion
        Composite coefficient of linear thermal expansion, α. [1/°C]
    height_difference
        z_B - z_A of the span; 0 for a ruling span. [m]
    creep_shift
        Equivalent temperature shift for creep elongation, added to ``final_temperature``. [°C]

    Returns
    -------
    H2 : numpy.ndarray
        Horizontal tension in the final condition. [N]

    Notes
    -----
    Solves :math:`S(H_2/w_2)\\,/\\,(1 + \\bar T_2/EA + \\alpha(t_2 + \\Delta t_c - t_1))
    = S(H_1/w_1)\\,/\\,(1 + \\bar T_1/EA)` for :math:`H_2`, with :math:`S` the exact catenary
    arc length and :math:`\\bar T` the exact arc-averaged catenary tension (module notes).

    References
    ----------
    .. [1] IEEE Std 524-2016, annex on sag-tension calculation.
    .. [2] CIGRE TB 324 (2007), strain summation method.
    """
    L = _positive("The span length", span_length)
    H1 = _positive("The horizontal tension", horizontal_tension)
    w1 = _positive("The unit weight", unit_weight)
    w2 = _positive("The final unit weight", final_unit_weight)
    t1 = _finite("The temperature", temperature)
    t2 = _finite("The final temperature", final_temperature)
    h = _finite("The height difference", height_difference)
    shift = _finite("The creep shift", creep_shift)
    stiffness = _positive("The area", area) * _positive("The modulus", modulus)
    alpha = _finite("The thermal expansion coefficient", thermal_expansion)
    zero = np.zeros_like(stiffness)
    model = _StrainModel(stiffness, alpha, zero, zero, zero)
    S0 = _unstressed_length(L, h, H1, w1, 0.0, model)
    return _solve_horizontal_tension(L, h, S0, w2, t2 + shift - t1, model)


def _two_material_model(outer_area, outer_modulus, outer_thermal_expansion, core_area,
                        core_modulus, core_thermal_expansion, outer_compression_limit):
    outer_modulus = _positive("The outer layer modulus", outer_modulus)
    limit = _finite("The outer compression limit", outer_compression_limit)
    if np.any(limit < 0):
        raise ValueError("The outer compression limit must be zero or positive.")
    return _StrainModel(
        _positive("The core area", core_area) * _positive("The core modulus", core_modulus),
        _finite("The core thermal expansion coefficient", core_thermal_expansion),
        _positive("The outer layer area", outer_area) * outer_modulus,
        _finite("The outer layer thermal expansion coefficient", outer_thermal_expansion),
        -limit / outer_modulus)


def change_of_state_two_material(
        span_length: ArrayLike, horizontal_tension: ArrayLike, unit_weight: ArrayLike,
        temperature: ArrayLike, final_unit_weight: ArrayLike, final_temperature: ArrayLike,
        outer_area: ArrayLike, outer_modulus: ArrayLike, outer_thermal_expansion: ArrayLike,
        core_area: ArrayLike, core_modulus: ArrayLike, core_thermal_expansion: ArrayLike, *,
        height_difference: ArrayLike = 0.0, creep_shift: ArrayLike = 0.0,
        equal_strain_temperature: ArrayLike | None = None,
        outer_compression_limit: ArrayLike = 0.0) -> np.ndarray:
    """Horizontal tension in a new condition, two-material (outer layer + core) model.

    Parameters
    ----------
    span_length
        Horizontal span length (the ruling span of a tension section). [m]
    horizontal_tension
        Horizontal tension in the initial condition, H1. [N]
    unit_weight
        Load per unit length in the initial condition, w1. [N/m]
    temperature
        Conductor temperature in the initial condition, t1. [°C]
    final_unit_weight
        Load per unit length in the final condition, w2. [N/m]
    final_temperature
        Conductor temperature in the final condition, t2. [°C]
    outer_area, outer_modulus, outer_thermal_expansion
        Outer (aluminium) layer: area [m²], modulus [Pa], expansion coefficient [1/°C].
    core_area, core_modulus, core_thermal_expansion
        Core (steel): area [m²], modulus [Pa], expansion coefficient [1/°C].
    height_difference
        z_B - z_A of the span; 0 for a ruling span. [m]
    creep_shift
        Equivalent temperature shift for creep elongation, added to ``final_temperature``. [°C]
    equal_strain_temperature
        Temperature at which both materials have the same unstressed length (no built-in stress
        difference between them); default: the initial temperature. [°C]
    outer_compression_limit
        Largest compressive stress the outer layer can carry; 0 means it goes slack. [Pa]

    Returns
    -------
    H2 : numpy.ndarray
        Horizontal tension in the final condition. [N]

    Notes
    -----
    Both materials share the total strain :math:`\\varepsilon = S/S_0 - 1`; each one's mechanical
    strain is :math:`e_i = \\varepsilon - \\alpha_i (t - t_e)`, the outer one clipped below at
    :math:`-\\sigma_c/E_a`. The average tension is
    :math:`\\bar T = E_s A_s e_s + E_a A_a \\max(e_a, -\\sigma_c/E_a)`. The initial condition
    fixes :math:`S_0`; the final :math:`H_2` solves :math:`\\bar T_{catenary}(H_2) =
    \\bar T_{material}(S(H_2)/S_0 - 1)`. The clipping uses the span-average strain.

    References
    ----------
    .. [1] CIGRE TB 324 (2007), two-material (core and outer layer) model and knee point.
    .. [2] IEEE Std 524-2016, annex on sag-tension calculation.
    """
    L = _positive("The span length", span_length)
    H1 = _positive("The horizontal tension", horizontal_tension)
    w1 = _positive("The unit weight", unit_weight)
    w2 = _positive("The final unit weight", final_unit_weight)
    t1 = _finite("The temperature", temperature)
    t2 = _finite("The final temperature", final_temperature)
    h = _finite("The height difference", height_difference)
    shift = _finite("The creep shift", creep_shift)
    te = t1 if equal_strain_temperature is None else _finite(
        "The equal-strain temperature", equal_strain_temperature)
    model = _two_material_model(outer_area, outer_modulus, outer_thermal_expansion, core_area,
                                core_modulus, core_thermal_expansion, outer_compression_limit)
    S0 = _unstressed_length(L, h, H1, w1, t1 - te, model)
    return _solve_horizontal_tension(L, h, S0, w2, t2 + shift - te, model)


def knee_temperature(
        span_length: ArrayLike, horizontal_tension: ArrayLike, unit_weight: ArrayLike,
        temperature: ArrayLike,
        outer_area: ArrayLike, outer_modulus: ArrayLike, outer_thermal_expansion: ArrayLike,
        core_area: ArrayLike, core_modulus: ArrayLike, core_thermal_expansion: ArrayLike, *,
        final_unit_weight: ArrayLike | None = None, height_difference: ArrayLike = 0.0,
        creep_shift: ArrayLike = 0.0, equal_strain_temperature: ArrayLike | None = None,
        outer_compression_limit: ArrayLike = 0.0) -> np.ndarray:
    """Temperature above which the core alone carries the tension (the knee point).

    Parameters
    ----------
    span_length, horizontal_tension, unit_weight, temperature
        Span [m] and initial condition: H1 [N], w1 [N/m], t1 [°C].
    outer_area, outer_modulus, outer_thermal_expansion, core_area, core_modulus, \
core_thermal_expansion
        As in :func:`change_of_state_two_material`. [m², Pa, 1/°C]
    final_unit_weight
        Load per unit length at which the knee is sought; default ``unit_weight``. [N/m]
    height_difference, creep_shift, equal_strain_temperature, outer_compression_limit
        As in :func:`change_of_state_two_material`. [m, °C, °C, Pa]

    Returns
    -------
    t_knee : numpy.ndarray
        Conductor temperature at which the outer layer's mechanical strain reaches its lower
        limit (zero stress by default). [°C]

    Notes
    -----
    At the knee :math:`e_a = e_{min}`, so :math:`\\varepsilon = e_{min} + \\alpha_a\\Delta t`
    and :math:`\\bar T = E_sA_s(\\varepsilon - \\alpha_s\\Delta t) + E_aA_a e_{min}`.
    Eliminating :math:`\\Delta t` leaves one monotone equation in C, solved by bisection.
    Requires :math:`\\alpha_a > \\alpha_s`.
    """
    L = _positive("The span length", span_length)
    H1 = _positive("The horizontal tension", horizontal_tension)
    w1 = _positive("The unit weight", unit_weight)
    w2 = w1 if final_unit_weight is None else _positive("The final unit weight",
                                                        final_unit_weight)
    t1 = _finite("The temperature", temperature)
    h = _finite("The height difference", height_difference)
    shift = _finite("The creep shift", creep_shift)
    te = t1 if equal_strain_temperature is None else _finite(
        "The equal-strain temperature", equal_strain_temperature)
    model = _two_material_model(outer_area, outer_modulus, outer_thermal_expansion, core_area,
                                core_modulus, core_thermal_expansion, outer_compression_limit)
    if np.any(model.outer_expansion <= model.core_expansion):
        raise ValueError("The outer layer must expand more than the core for a knee to exist.")
    S0 = _unstressed_length(L, h, H1, w1, t1 - te, model)
    L, h, S0, w2 = np.broadcast_arrays(L, h, S0, w2)
    a_out, a_core = model.outer_expansion, model.core_expansion
    e_min = model.outer_min_strain

    def residual(log_constant):
        constant = np.exp(log_constant)
        strain = catenary.arc_length(L, h, constant) / S0 - 1.0
        shift_t = (strain - e_min) / a_out
        material = (model.core_stiffness * (strain - a_core * shift_t)
                    + model.outer_stiffness * e_min)
        return catenary.average_tension(w2 * constant, w2, L, h) - material

    lo = np.log(_MIN_CONSTANT_PER_SPAN * L)
    hi = np.full_like(lo, np.log(_MAX_CONSTANT_M))
    if np.any(residual(lo) > 0) or np.any(residual(hi) < 0):
        raise ValueError("No knee point found for these inputs.")
    lo, hi = _bisect(residual, lo, hi)
    constant = np.exp(0.5 * (lo + hi))
    strain = catenary.arc_length(L, h, constant) / S0 - 1.0
    return te + (strain - e_min) / a_out - shift


def section_sags_at_condition(span_lengths: ArrayLike, height_differences: ArrayLike | None,
                              horizontal_tension: ArrayLike, unit_weight: ArrayLike
                              ) -> np.ndarray:
    """Sag of every span of a tension section at a given horizontal tension and load.

    Parameters
    ----------
    span_lengths
        Horizontal span lengths. [m]
    height_differences
        z_B - z_A per span; ``None`` for level spans. [m]
    horizontal_tension
        Horizontal tension of the section (from the ruling-span change of state). [N]
    unit_weight
        Load per unit length. [N/m]

    Returns
    -------
    sags : numpy.ndarray
        Sag per span (largest vertical chord-to-conductor distance). [m]

    Notes
    -----
    Suspension insulators equalise the horizontal tension along a section, so every span hangs
    with the same :math:`C = H/w` (ruling-span assumption, [1]_).

    References
    ----------
    .. [1] IEEE Std 524-2016, annex on the ruling span.
    """
    spans = _positive("Span lengths", np.atleast_1d(np.asarray(span_lengths, dtype=float)))
    heights = (np.zeros_like(spans) if height_differences is None
               else _finite("Height differences",
                            np.atleast_1d(np.asarray(height_differences, dtype=float))))
    if heights.shape != spans.shape:
        raise ValueError("Give one height difference per span.")
    constant = _positive("The horizontal tension", horizontal_tension) / _positive(
        "The unit weight", unit_weight)
    return catenary.sag(spans, heights, constant)


@dataclass(frozen=True)
class ConductorMechanics:
    """Mechanical numbers of a conductor for sag-tension work (plain SI numbers).

    Attributes
    ----------
    weight_n_per_m
        Bare conductor weight per unit length. [N/m]
    area_m2
        Total cross-sectional area. [m²]
    modulus_pa
        Composite final modulus of elasticity. [Pa]
    thermal_expansion_per_c
        Composite coefficient of linear thermal expansion. [1/°C]
    rated_strength_n
        Rated breaking strength, optional. [N]
    outer_area_m2, outer_modulus_pa, outer_thermal_expansion_per_c
        Outer (aluminium) layer, optional; with the three core values they select the
        two-material model. [m², Pa, 1/°C]
    core_area_m2, core_modulus_pa, core_thermal_expansion_per_c
        Core (steel), optional. [m², Pa, 1/°C]
    outer_compression_limit_pa
        Largest compressive stress of the outer layer (two-material model). [Pa]
    """

    weight_n_per_m: float
    area_m2: float
    modulus_pa: float
    thermal_expansion_per_c: float
    rated_strength_n: float | None = None
    outer_area_m2: float | None = None
    outer_modulus_pa: float | None = None
    outer_thermal_expansion_per_c: float | None = None
    core_area_m2: float | None = None
    core_modulus_pa: float | None = None
    core_thermal_expansion_per_c: float | None = None
    outer_compression_limit_pa: float = 0.0

    _LAYER_FIELDS: ClassVar[tuple[str, ...]] = ("outer_area_m2", "outer_modulus_pa", "outer_thermal_expansion_per_c",
                     "core_area_m2", "core_modulus_pa", "core_thermal_expansion_per_c")

    def __post_init__(self) -> None:
        for name in ("weight_n_per_m", "area_m2", "modulus_pa"):
            _positive(name, getattr(self, name))
        _finite("thermal_expansion_per_c", self.thermal_expansion_per_c)
        given = [getattr(self, name) is not None for name in self._LAYER_FIELDS]
        if any(given) and not all(given):
            raise ValueError("Give all six outer-layer and core values, or none of them.")

    @property
    def two_material(self) -> bool:
        """True when outer-layer and core properties are given."""
        return self.core_area_m2 is not None

    @classmethod
    def from_object(cls, conductor: Any) -> ConductorMechanics:
        """Read the attributes of the same names from any conductor-like object."""
        names = ("weight_n_per_m", "area_m2", "modulus_pa", "thermal_expansion_per_c",
                 "rated_strength_n", *cls._LAYER_FIELDS, "outer_compression_limit_pa")
        values = {n: getattr(conductor, n) for n in names
                  if getattr(conductor, n, None) is not None}
        return cls(**values)

    def final_tension(self, span_length: ArrayLike, horizontal_tension: ArrayLike,
                      unit_weight: ArrayLike, temperature: ArrayLike,
                      final_unit_weight: ArrayLike, final_temperature: ArrayLike, *,
                      height_difference: ArrayLike = 0.0, creep_shift: ArrayLike = 0.0,
                      equal_strain_temperature: ArrayLike | None = None) -> np.ndarray:
        """Change of state with this conductor's model; arguments as :func:`change_of_state`.

        Returns the final horizontal tension. [N]
        """
        if self.two_material:
            return change_of_state_two_material(
                span_length, horizontal_tension, unit_weight, temperature, final_unit_weight,
                final_temperature, self.outer_area_m2, self.outer_modulus_pa,
                self.outer_thermal_expansion_per_c, self.core_area_m2, self.core_modulus_pa,
                self.core_thermal_expansion_per_c, height_difference=height_difference,
                creep_shift=creep_shift, equal_strain_temperature=equal_strain_temperature,
                outer_compression_limit=self.outer_compression_limit_pa)
        return change_of_state(span_length, horizontal_tension, unit_weight, temperature,
                               final_unit_weight, final_temperature, self.area_m2,
                               self.modulus_pa, self.thermal_expansion_per_c,
                               height_difference=height_difference, creep_shift=creep_shift)


@dataclass(frozen=True)
class StringingRow:
    """One row of a stringing (sag-tension) table.

    Attributes
    ----------
    temperature_c
        Conductor temperature. [°C]
    load_case
        Name of the load case.
    unit_weight_n_per_m
        Load per unit length of the case. [N/m]
    horizontal_tension_n
        Horizontal tension of the section. [N]
    ruling_span_sag_m
        Sag of the (level) ruling span. [m]
    sags_m
        Sag of each span, in the order given. [m]
    max_support_tension_n
        Largest support tension over the spans. [N]
    percent_rbs
        Horizontal tension as a percentage of the rated breaking strength, when known. [%]
    """

    temperature_c: float
    load_case: str
    unit_weight_n_per_m: float
    horizontal_tension_n: float
    ruling_span_sag_m: float
    sags_m: tuple[float, ...]
    max_support_tension_n: float
    percent_rbs: float | None = None

    def as_dict(self) -> dict[str, Any]:
        """Flat dictionary with one ``sag_span_<i>_m`` key per span."""
        row = {"temperature_c": self.temperature_c, "load_case": self.load_case,
               "unit_weight_n_per_m": self.unit_weight_n_per_m,
               "horizontal_tension_n": self.horizontal_tension_n,
               "ruling_span_sag_m": self.ruling_span_sag_m,
               "max_support_tension_n": self.max_support_tension_n,
               "percent_rbs": self.percent_rbs}
        row.update({f"sag_span_{i + 1}_m": s for i, s in enumerate(self.sags_m)})
        return row


def _load_cases(load_cases, bare_weight) -> list[tuple[str, float]]:
    if load_cases is None:
        return [("bare", float(bare_weight))]
    items = load_cases.items() if isinstance(load_cases, Mapping) else load_cases
    cases = [(str(name), float(weight)) for name, weight in items]
    if not cases:
        raise ValueError("Give at least one load case.")
    return cases


def stringing_table(span_lengths: ArrayLike, conductor: ConductorMechanics,
                    temperatures: Iterable[float], *, reference_temperature: float,
                    reference_tension: float | None = None,
                    reference_sag: float | None = None,
                    reference_unit_weight: float | None = None,
                    load_cases: Mapping[str, float] | Sequence[tuple[str, float]] | None = None,
                    height_differences: ArrayLike | None = None,
                    creep_shift: float = 0.0) -> list[StringingRow]:
    """Sag and tension of a tension section over a list of temperatures and load cases.

    Parameters
    ----------
    span_lengths
        Horizontal span lengths of the section, or a single ruling span. [m]
    conductor
        Conductor numbers (:class:`ConductorMechanics`).
    temperatures
        Conductor temperatures of the table. [°C]
    reference_temperature
        Temperature of the reference condition. [°C]
    reference_tension
        Horizontal tension at the reference condition (give this or ``reference_sag``). [N]
    reference_sag
        Sag of the level ruling span at the reference condition. [m]
    reference_unit_weight
        Load per unit length at the reference condition; default the bare weight. [N/m]
    load_cases
        ``{name: unit load}`` or ``[(name, unit load), ...]``, the load per unit length
        (resultant of weight, ice and wind); default one case "bare" with the bare weight.
        [N/m]
    height_differences
        z_B - z_A per span for the sag of each span; ``None`` for level spans. [m]
    creep_shift
        Equivalent temperature shift for creep, added to every table temperature. [°C]

    Returns
    -------
    rows : list of StringingRow
        One row per (temperature, load case), temperatures outermost.

    Notes
    -----
    The change of state is solved for the level ruling span; every span then hangs with the
    section's horizontal tension (:func:`section_sags_at_condition`). For a tilted (wind) load
    case the sag is measured in the plane of the resultant load.
    """
    spans = _positive("Span lengths", np.atleast_1d(np.asarray(span_lengths, dtype=float)))
    rs = ruling_span(spans)
    temps = _finite("Temperatures", np.atleast_1d(np.asarray(list(temperatures), dtype=float)))
    if temps.size == 0:
        raise ValueError("Give at least one temperature.")
    w_ref = conductor.weight_n_per_m if reference_unit_weight is None else reference_unit_weight
    w_ref = float(_positive("The reference unit weight", w_ref))
    if (reference_tension is None) == (reference_sag is None):
        raise ValueError("Give exactly one of reference_tension and reference_sag.")
    if reference_tension is not None:
        h_ref = float(_positive("The reference tension", reference_tension))
    else:
        sag_ref = float(_positive("The reference sag", reference_sag))
        h_ref = w_ref * float(catenary.catenary_constant_from_sag(rs, 0.0, sag_ref))
    heights = (np.zeros_like(spans) if height_differences is None
               else np.atleast_1d(np.asarray(height_differences, dtype=float)))
    if heights.shape != spans.shape:
        raise ValueError("Give one height difference per span.")
    rows: list[StringingRow] = []
    cases = _load_cases(load_cases, conductor.weight_n_per_m)
    tensions = {name: conductor.final_tension(rs, h_ref, w_ref, reference_temperature,
                                              weight, temps, creep_shift=creep_shift)
                for name, weight in cases}
    for i, t in enumerate(temps):
        for name, weight in cases:
            tension = float(tensions[name][i])
            sags = section_sags_at_condition(spans, heights, tension, weight)
            t_a, t_b = catenary.support_tensions(tension, weight, spans, heights)
            rbs = conductor.rated_strength_n
            rows.append(StringingRow(
                temperature_c=float(t), load_case=name, unit_weight_n_per_m=weight,
                horizontal_tension_n=tension,
                ruling_span_sag_m=float(catenary.sag(rs, 0.0, tension / weight)),
                sags_m=tuple(float(s) for s in sags),
                max_support_tension_n=float(np.max(np.maximum(t_a, t_b))),
                percent_rbs=None if rbs is None else 100.0 * tension / rbs))
    return rows

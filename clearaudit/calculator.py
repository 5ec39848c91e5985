"""``clearaudit sag``: the field calculator (sag and tension, stringing table).

For a conductor strung over one span or a tension section, it prints the horizontal tension,
percent of rated strength and the sag of every span over a list of conductor temperatures and
load cases, from one reference condition (a tension, a percent of rated strength or a sag at a
temperature). With ``--measured`` it also prints the sag each span must be set to at the
conductor temperature measured on site, so a crew can re-sag a span.

Inputs and outputs are in the chosen unit system (``--units``); everything inside is SI.
"""
from __future__ import annotations

import argparse
import csv
import math
from pathlib import Path
from typing import Any

from . import CAUTION
from .errors import InputError
from .units import FOOT_M, POUND_FORCE_N, c_to_f, f_to_c


def _numbers(text: str) -> list[float]:
    try:
        return [float(v) for v in text.replace(";", ",").split(",") if v.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a comma-separated list of numbers: {text!r}") from None


def add_sag_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--conductor", required=True,
                   help="library name or code word (see `clearaudit conductors`)")
    p.add_argument("--span", type=_numbers, metavar="L[,L...]", required=True,
                   help="span length(s) of the tension section (ft with --units imperial)")
    p.add_argument("--height-differences", type=_numbers, metavar="H[,H...]",
                   help="support height differences per span (far minus near), default level")
    ref = p.add_mutually_exclusive_group(required=True)
    ref.add_argument("--tension", type=float,
                     help="reference horizontal tension (kN, or lbf with --units imperial)")
    ref.add_argument("--percent-rbs", type=float,
                     help="reference horizontal tension as percent of rated breaking strength")
    ref.add_argument("--sag", type=float,
                     help="reference sag of the ruling span (m, or ft with --units imperial)")
    p.add_argument("--at", type=float, required=True, metavar="TEMP",
                   help="conductor temperature of the reference condition (°C, or °F imperial)")
    p.add_argument("--temperatures", type=_numbers, default=None, metavar="T[,T...]",
                   help="temperatures of the table (default -20,0,15,25,50,75,100 °C)")
    p.add_argument("--district", choices=("heavy", "medium", "light"),
                   help="add the standard loading district's ice-and-wind case")
    p.add_argument("--ice", type=float, default=0.0,
                   help="radial ice of a custom load case (mm, or in imperial)")
    p.add_argument("--wind", type=float, default=0.0,
                   help="wind pressure of a custom load case (Pa, or lb/ft² imperial)")
    p.add_argument("--load-temperature", type=float, default=None,
                   help="temperature of the custom ice/wind case (°C/°F; default -20 °C)")
    p.add_argument("--measured", type=float, metavar="TEMP",
                   help="conductor temperature measured on site: print the sag to set per span")
    p.add_argument("--creep", type=float, default=0.0,
                   help="creep as an equivalent temperature shift (°C, or °F imperial)")
    p.add_argument("--model", choices=("auto", "linear", "two-material"), default="auto",
                   help="strain model (auto: two-material when core properties are known)")
    p.add_argument("--units", choices=("metric", "imperial"), default="metric")
    p.add_argument("--csv", metavar="FILE", help="also write the table as CSV (SI units)")


def compute_table(args: argparse.Namespace) -> dict[str, Any]:
    """The stringing table in SI units from parsed arguments (unit conversion at the edge)."""
    from .audit.conditions import conductor_mechanics
    from .physics.conductors import lookup_conductor
    from .physics.loading import conductor_load, loading_district
    from .physics.state_change import ruling_span, stringing_table

    imperial = args.units == "imperial"
    length = FOOT_M if imperial else 1.0
    force = POUND_FORCE_N if imperial else 1e3

    def temp(t):
        return None if t is None else (f_to_c(t) if imperial else t)

    try:
        conductor = lookup_conductor(args.conductor)
    except ValueError as exc:
        raise InputError("--conductor", str(exc)) from None
    mech = conductor_mechanics(conductor, args.model)
    spans = [v * length for v in args.span]
    if any(not (s > 0) for s in spans):
        raise InputError("--span", "span lengths must be positive")
    heights = None
    if args.height_differences:
        if len(args.height_differences) != len(spans):
            raise InputError("--height-differences", "give one height difference per span")
        heights = [v * length for v in args.height_differences]
    temperatures = ([temp(t) for t in args.temperatures] if args.temperatures
                    else [-20.0, 0.0, 15.0, 25.0, 50.0, 75.0, 100.0])
    if args.measured is not None:
        temperatures = sorted(set(temperatures) | {temp(args.measured)})
    reference = {}
    if args.tension is not None:
        reference["reference_tension"] = args.tension * force
    elif args.percent_rbs is not None:
        if mech.rated_strength_n is None:
            raise InputError("--percent-rbs", f"{conductor.name} has no rated strength")
        reference["reference_tension"] = args.percent_rbs / 100.0 * mech.rated_strength_n
    else:
        reference["reference_sag"] = args.sag * length
    cases: list[tuple[str, float, float | None]] = [("bare", mech.weight_n_per_m, None)]
    if args.district:
        d = loading_district(args.district)
        load = d.load(conductor.diameter_m, conductor.unit_weight_n_per_m)
        cases.append((f"{d.name} district", float(load.resultant_n_per_m), d.temperature_c))
    if args.ice or args.wind:
        ice_m = args.ice * (0.0254 if imperial else 1e-3)
        wind_pa = args.wind * (POUND_FORCE_N / FOOT_M**2 if imperial else 1.0)
        load = conductor_load(conductor.diameter_m, conductor.unit_weight_n_per_m, ice_m, wind_pa)
        t_load = temp(args.load_temperature) if args.load_temperature is not None else -20.0
        cases.append((f"ice {ice_m * 1e3:.1f} mm, wind {wind_pa:.0f} Pa",
                      float(load.resultant_n_per_m), t_load))
    rows = []
    common = dict(reference_temperature=temp(args.at), height_differences=heights,
                  creep_shift=(args.creep * (5.0 / 9.0) if imperial else args.creep))
    rows += [r.as_dict() for r in stringing_table(
        spans, mech, temperatures, load_cases=[cases[0][:2]], **reference, **common)]
    for name, w, t in cases[1:]:
        rows += [r.as_dict() for r in stringing_table(
            spans, mech, [t], load_cases=[(name, w)], **reference, **common)]
    measured = None
    if args.measured is not None:
        tm = temp(args.measured)
        measured = next(r for r in rows if r["load_case"] == "bare"
                        and math.isclose(r["temperature_c"], tm, abs_tol=1e-9))
    return {"conductor": conductor, "spans_m": spans, "ruling_span_m": ruling_span(spans),
            "rows": rows, "measured": measured}


def run_sag_calculator(args: argparse.Namespace, console) -> int:
    from rich.table import Table

    result = compute_table(args)
    imperial = args.units == "imperial"
    lu, lf = ("ft", 1.0 / FOOT_M) if imperial else ("m", 1.0)
    fu, ff = ("lbf", 1.0 / POUND_FORCE_N) if imperial else ("kN", 1e-3)
    tu = "°F" if imperial else "°C"

    def t_out(t):
        return round(c_to_f(t) if imperial else t, 6) + 0.0  # no "-0.0"

    c = result["conductor"]
    spans = result["spans_m"]
    console.print(f"[bold]{c.name}[/] ({c.code_word or c.kind}), ruling span "
                  f"{result['ruling_span_m'] * lf:.1f} {lu}, spans "
                  + ", ".join(f"{s * lf:.1f}" for s in spans) + f" {lu}")
    table = Table(title="Sag and tension (stringing table)", title_justify="left")
    for col in (f"temp {tu}", "load case", f"H {fu}", "% RBS", f"RS sag {lu}"):
        table.add_column(col, justify="right")
    for i in range(len(spans)):
        table.add_column(f"sag span {i + 1} {lu}", justify="right")
    for r in result["rows"]:
        pct = r.get("percent_rbs")
        table.add_row(f"{t_out(r['temperature_c']):.1f}", r["load_case"],
                      f"{r['horizontal_tension_n'] * ff:,.1f}" if imperial
                      else f"{r['horizontal_tension_n'] * ff:,.2f}",
                      "" if pct is None else f"{pct:.1f}",
                      f"{r['ruling_span_sag_m'] * lf:.2f}",
                      *(f"{r[f'sag_span_{i + 1}_m'] * lf:.2f}" for i in range(len(spans))))
    console.print(table)
    m = result["measured"]
    if m is not None:
        console.print(f"At the measured conductor temperature {t_out(m['temperature_c']):.1f} {tu} "
                      "set each span to: " + "; ".join(
                          f"span {i + 1}: {m[f'sag_span_{i + 1}_m'] * lf:.2f} {lu}"
                          for i in range(len(spans))))
    if args.csv:
        rows = result["rows"]
        path = Path(args.csv)
        with open(path, "w", newline="", encoding="utf-8") as f:
            writer = csv.DictWriter(f, fieldnames=list(rows[0]))
            writer.writeheader()
            writer.writerows(rows)
        console.print(f"wrote {path} (SI units)")
    console.print(f"[italic]{CAUTION}[/]")
    return 0

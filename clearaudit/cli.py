"""Command line: ``clearaudit audit | network | info | sample | report | view | sag | conductors``.

Every user-input problem ends as one line on stderr naming the file and the problem, exit code 2,
no traceback, nothing half-written (outputs go to a temporary folder renamed at the end).
"""
from __future__ import annotations

import argparse
import logging
import sys
from pathlib import Path

from . import CAUTION, __version__
from .errors import ClearauditError, InputError

log = logging.getLogger("clearaudit")

EXIT_INPUT = 2


def _console():
    from rich.console import Console

    return Console(stderr=False, highlight=False)


# ----------------------------------------------------------------------------------- commands

def cmd_info(args: argparse.Namespace) -> int:
    from rich.table import Table

    from .cloud import CLASS_NAMES
    from .io.las import describe

    console = _console()
    described = describe(args.clouds, crs=args.crs)
    for d in described:
        table = Table(title=str(d["path"]), show_header=False, title_justify="left")
        table.add_column("key", style="bold")
        table.add_column("value")
        table.add_row("points", f"{d['point_count']:,}")
        table.add_row("LAS version / point format", f"{d['version']} / {d['point_format']}")
        table.add_row("CRS", str(d.get("crs_name") or "none (use --crs)"))
        table.add_row("horizontal / vertical unit",
                      f"{d.get('horizontal_unit')} / {d.get('vertical_unit')}")
        lo, hi = d["bounds_min"], d["bounds_max"]
        table.add_row("bounds min (x, y, z)", ", ".join(f"{v:.3f}" for v in lo))
        table.add_row("bounds max (x, y, z)", ", ".join(f"{v:.3f}" for v in hi))
        if d.get("beyond_header_bounds"):
            table.add_row("[bold red]warning[/]", "points lie beyond the bounds in the header "
                          "(header: " + ", ".join(f"{v:.3f}" for v in d["header_bounds_min"])
                          + " to " + ", ".join(f"{v:.3f}" for v in d["header_bounds_max"])
                          + "): the file is corrupt or its header is wrong; an audit refuses it")
        if d.get("withheld_points"):
            table.add_row("withheld", f"{d['withheld_points']:,} points flagged withheld "
                          "(an audit leaves them out)")
        hist = d.get("class_counts", {})
        table.add_row("classes", "\n".join(
            f"{int(c):>3} {CLASS_NAMES.get(int(c), 'user defined'):<38} {n:>12,}"
            for c, n in sorted(hist.items(), key=lambda kv: int(kv[0]))))
        console.print(table)
    boxed = [d for d in described if d["bounds_min"] is not None]
    if len(boxed) > 1:
        import numpy as np

        from .duplicates import BOX_SLACK_M, overlapping_files

        # the files' point boxes in metres, grown as the audit grows the header boxes
        lo = np.array([np.asarray(d["bounds_min"]) * _unit_scale(d) for d in boxed])
        hi = np.array([np.asarray(d["bounds_max"]) * _unit_scale(d) for d in boxed])
        pairs = overlapping_files(lo, hi, slack_m=BOX_SLACK_M)
        if pairs:
            names = [Path(d["path"]).name for d in boxed]
            console.print(f"{len(pairs)} pair(s) of files overlap: "
                          + ", ".join(f"{names[i]} & {names[j]}" for i, j in pairs[:10])
                          + (" …" if len(pairs) > 10 else "")
                          + ". An audit counts a point repeated between two files once.")
    return 0


def _unit_scale(d: dict) -> list[float]:
    """Metres per file unit for x, y, z of one :func:`describe` entry. [m/unit]"""
    return [d["horizontal_unit_m"], d["horizontal_unit_m"], d["vertical_unit_m"]]


def cmd_sample(args: argparse.Namespace) -> int:
    from .synth import regenerate_samples

    paths = regenerate_samples(Path(args.out))
    console = _console()
    for p in (paths.values() if isinstance(paths, dict) else paths):
        console.print(f"wrote {p}")
    return 0


def cmd_audit(args: argparse.Namespace) -> int:
    from .pipeline import AuditOptions, run_audit

    if args.in_memory and (args.workers or args.scheduler):
        # (a library caller or a network line may ask for both: the line then runs in memory
        # in this process and the engine serves the other lines)
        raise InputError("--in-memory", "runs in this process; a Dask engine (--workers, "
                                        "--scheduler) runs tiles")
    options = AuditOptions(
        clouds=[Path(p) for p in args.clouds], out=Path(args.out),
        line_file=Path(args.line) if args.line else None, crs=args.crs,
        voltage_kv=args.voltage_kv, units=args.units, trust_classes=args.trust_classes,
        survey_temperature_c=args.survey_temperature_c,
        max_operating_temperature_c=args.mot_c, structures_file=args.structures,
        overwrite=args.overwrite, workers=args.workers, scheduler=args.scheduler,
        threads=args.threads, corridor_buffer_m=args.corridor_buffer_m, skip_report=args.no_report,
        tiled=True if args.tiled else False if args.in_memory else None,
        work_dir=Path(args.work_dir) if args.work_dir else None,
        **({"tile_points": args.tile_points} if args.tile_points else {}),
        **({"tile_overlap_m": args.tile_overlap_m} if args.tile_overlap_m is not None else {}),
    )
    result = run_audit(options, console=_console())
    return 0 if result is not None else 1


def cmd_network(args: argparse.Namespace) -> int:
    from .network import print_network_summary, run_network

    console = _console()
    result = run_network(args.manifest, args.out, workers=args.workers, scheduler=args.scheduler,
                         threads=args.threads, skip_report=args.no_report,
                         overwrite=args.overwrite, units=args.units, work_dir=args.work_dir,
                         resume=args.resume, lines_at_once=args.lines_at_once,
                         console=console)
    print_network_summary(console, result, args.units)
    # the lines that failed were named on stderr as they failed; the others are complete
    if result["bad_input"]:
        return EXIT_INPUT
    return 1 if result["failed"] else 0


def cmd_report(args: argparse.Namespace) -> int:
    from .report import build_report

    out = Path(args.out_dir)
    if not (out / "model.json").exists():
        raise InputError(out, "is not an audit output folder (no model.json)")
    if not (args.workers or args.scheduler):
        path = build_report(out, units=args.units)
    else:
        # the span profiles drawn by a Dask cluster's workers (the saved outputs are sent to
        # them: they need not see the folder)
        from types import SimpleNamespace

        from .distributed import check_engine, engine_for
        from .pipeline import profiles_on_engine

        check_engine(SimpleNamespace(threads=0, workers=args.workers, scheduler=args.scheduler))
        with engine_for(args.workers, args.scheduler) as engine:
            path = build_report(out, units=args.units, map_profiles=profiles_on_engine(engine))
            engine.finish()
    _console().print(f"wrote {path}")
    return 0


def cmd_view(args: argparse.Namespace) -> int:
    from . import viewer

    out = Path(args.out_dir)
    if not (out / "model.json").exists():
        raise InputError(out, "is not an audit output folder (no model.json)")
    if args.screenshot:
        viewer.screenshot(out, Path(args.screenshot))
        _console().print(f"wrote {args.screenshot}")
    elif args.html:
        viewer.export_html(out, Path(args.html))
        _console().print(f"wrote {args.html}")
    else:
        viewer.show(out)
    return 0


def cmd_conductors(args: argparse.Namespace) -> int:
    from rich.table import Table

    from .physics.conductors import list_conductors

    table = Table(title="Conductor library (SI units; see the source column)")
    for col in ("name", "code word", "kind", "diameter mm", "weight N/m", "RBS kN", "source"):
        table.add_column(col)
    for c in list_conductors():
        if args.filter and args.filter.lower() not in (c.name + " " + (c.code_word or "")).lower():
            continue
        table.add_row(c.name, c.code_word or "", c.kind, f"{c.diameter_m * 1e3:.2f}",
                      f"{c.unit_weight_n_per_m:.3f}", f"{c.rated_strength_n / 1e3:.1f}", c.source)
    _console().print(table)
    return 0


def cmd_sag(args: argparse.Namespace) -> int:
    from .calculator import run_sag_calculator

    return run_sag_calculator(args, _console())


# ------------------------------------------------------------------------------------- parser

def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="clearaudit",
        description="Overhead power line audits from airborne laser scans. " + CAUTION)
    parser.add_argument("--version", action="version", version=f"clearaudit {__version__}")
    parser.add_argument("-v", "--verbose", action="store_true", help="log progress details")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("audit", help="audit a line corridor (the main job)",
                       description="Classify the cloud, fit every wire, project sag to MOT, wind "
                                   "and ice, and check clearances. " + CAUTION)
    p.add_argument("clouds", nargs="+", metavar="CLOUD", help="LAS/LAZ files or folders of tiles")
    p.add_argument("--line", metavar="LINE.toml", help="line file (see docs/line-file.md)")
    p.add_argument("--out", required=True, metavar="DIR", help="output folder (created)")
    p.add_argument("--crs", help="CRS of the cloud when the file has none (e.g. EPSG:32617)")
    p.add_argument("--voltage-kv", type=float, help="nominal voltage [kV] (overrides the line file)")
    p.add_argument("--mot-c", type=float, help="maximum operating temperature [°C] (overrides)")
    p.add_argument("--survey-temperature-c", type=float,
                   help="conductor temperature during the flight [°C] (overrides)")
    p.add_argument("--structures", metavar="CSV", help="structures CSV (id, x, y[, type])")
    p.add_argument("--trust-classes", action="store_true",
                   help="use the cloud's own classes; only fill in what is missing")
    p.add_argument("--units", choices=("metric", "imperial"), default="metric",
                   help="unit system of the report and terminal summary")
    p.add_argument("--corridor-buffer-m", type=float, default=60.0,
                   help="half-width of the corridor kept around the structures [m] (default 60)")
    p.add_argument("--workers", type=int, default=0,
                   help="run on a local Dask cluster with N workers (0: in-process)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="run on an existing Dask cluster")
    p.add_argument("--threads", type=int, default=0, metavar="N",
                   help="threads of the in-process run (default 0: every core; tiles of a "
                        "tiled run go to threads, one tile each)")
    mode = p.add_mutually_exclusive_group()
    mode.add_argument("--tiled", action="store_true",
                      help="bounded-memory run in tiles even for a small survey (automatic "
                           "above 0.67 million points with two or more threads, above 20 "
                           "million points, or with --workers/--scheduler)")
    mode.add_argument("--in-memory", action="store_true",
                      help="hold the whole survey in memory even where a tiled run is "
                           "automatic (not with --workers/--scheduler)")
    p.add_argument("--tile-points", type=int, metavar="N",
                   help="largest number of points owned by one tile (default 1500000, "
                        "or 60 %% of a smaller survey's points so that it makes two or three "
                        "tiles)")
    p.add_argument("--tile-overlap-m", type=float, metavar="M",
                   help="context read around each tile [m] (default 40)")
    p.add_argument("--work-dir", metavar="DIR",
                   help="folder for the temporary tile files (default: beside --out; must be "
                        "reachable by every Dask worker)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    p.add_argument("--no-report", action="store_true", help="skip the HTML report")
    p.set_defaults(func=cmd_audit)

    p = sub.add_parser("network", help="audit every line of a network manifest and rank the "
                                       "work across the lines",
                       description="Audit each line listed in a manifest (TOML, see "
                                   "docs/network.md) into its own folder, one after the other on "
                                   "the same engine, then write lines.csv and one work list "
                                   "ranked across the network. " + CAUTION)
    p.add_argument("manifest", metavar="NETWORK.toml", help="the manifest of the lines")
    p.add_argument("--out", required=True, metavar="DIR", help="output folder (created)")
    p.add_argument("--workers", type=int, default=0,
                   help="one local Dask cluster with N workers for every line (0: in-process)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="run on an existing Dask cluster")
    p.add_argument("--threads", type=int, default=0, metavar="N",
                   help="threads of the in-process runs (default 0: every core)")
    p.add_argument("--units", choices=("metric", "imperial"), default="metric",
                   help="unit system of the reports and terminal summaries")
    p.add_argument("--work-dir", metavar="DIR",
                   help="folder for the lines' temporary tile files (default: beside the "
                        "lines' folders while they are written, see --resume; with "
                        "--scheduler, storage every worker shares)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    p.add_argument("--no-report", action="store_true", help="skip the HTML reports")
    p.add_argument("--lines-at-once", type=int, default=1, metavar="N",
                   help="with --workers or --scheduler, audit N lines side by side (each "
                        "line's results are those it has alone; a large cluster is kept busy "
                        "between one line's stages and by lines of few tiles)")
    p.add_argument("--resume", action="store_true",
                   help="reuse the lines an interrupted run of the same command finished (kept "
                        "beside --out until the last line has run) when their inputs, options "
                        "and clearaudit version are the same; the others are audited again")
    p.set_defaults(func=cmd_network)

    p = sub.add_parser("info", help="describe LAS/LAZ files (points, bounds, CRS, classes)")
    p.add_argument("clouds", nargs="+", metavar="CLOUD")
    p.add_argument("--crs", help="CRS to assume when a file has none")
    p.set_defaults(func=cmd_info)

    p = sub.add_parser("sample", help="regenerate the bundled sample corridor")
    p.add_argument("--out", default="sample_clouds", metavar="DIR")
    p.set_defaults(func=cmd_sample)

    p = sub.add_parser("report", help="rebuild report.html from a saved audit folder")
    p.add_argument("out_dir", metavar="OUT_DIR")
    p.add_argument("--units", choices=("metric", "imperial"), default="metric")
    p.add_argument("--workers", type=int, default=0,
                   help="draw the span profiles on a local Dask cluster with N workers "
                        "(0: in this process)")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="draw the span profiles on an existing Dask cluster")
    p.set_defaults(func=cmd_report)

    p = sub.add_parser("view", help="3D viewer of a saved audit folder")
    p.add_argument("out_dir", metavar="OUT_DIR")
    p.add_argument("--screenshot", metavar="FILE.png", help="render off-screen to a PNG")
    p.add_argument("--html", metavar="FILE.html", help="export an interactive HTML scene")
    p.set_defaults(func=cmd_view)

    p = sub.add_parser("conductors", help="list the conductor library")
    p.add_argument("filter", nargs="?", help="show names containing this text")
    p.set_defaults(func=cmd_conductors)

    p = sub.add_parser("sag", help="field calculator: sag and tension, stringing table",
                       description="Sag and tension of a conductor for a span or ruling span at "
                                   "a list of temperatures and load cases. " + CAUTION)
    from .calculator import add_sag_arguments

    add_sag_arguments(p)
    p.set_defaults(func=cmd_sag)
    return parser


def main(argv: list[str] | None = None) -> int:
    from .threads import one_blas_thread_from_start

    one_blas_thread_from_start()  # before numpy is loaded (see there)
    parser = build_parser()
    args = parser.parse_args(argv)
    # Without -v only the final one-line error reaches stderr; notes and warnings of a run are
    # kept in run.json and the report. Third-party libraries (laspy logs decoding errors that
    # we turn into InputError) stay quiet unless -v.
    logging.basicConfig(level=logging.INFO if args.verbose else logging.ERROR,
                        format="%(levelname)s %(name)s: %(message)s")
    # libraries that set their own loggers' levels (Dask's scheduler and workers log at INFO)
    # reach this handler too: it drops what is below the chosen level
    for handler in logging.getLogger().handlers:
        handler.setLevel(logging.INFO if args.verbose else logging.ERROR)
    if not args.verbose:
        logging.getLogger("laspy").setLevel(logging.CRITICAL)
        logging.getLogger("clearaudit").setLevel(logging.CRITICAL)
    try:
        return int(args.func(args) or 0)
    except InputError as exc:
        print(f"clearaudit: error: {exc}", file=sys.stderr)
        return EXIT_INPUT
    except ClearauditError as exc:
        print(f"clearaudit: error: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("clearaudit: interrupted", file=sys.stderr)
        return 130
    except MemoryError:
        # the partial output folder and the work folder are gone already (as for any error)
        print("clearaudit: error: out of memory; nothing was written. Run it in tiles "
              "(--tiled) or with smaller tiles (--tile-points), or on a Dask cluster "
              "(--workers, --scheduler)", file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

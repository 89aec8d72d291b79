"""Command line: ``potfield new | check | run | stages | demo | report | batch``.

Thin: parse arguments, call the library, print. A user's mistake (any PotfieldError) is printed
as one line on stderr with exit code 2 and no traceback.
"""

from __future__ import annotations

import argparse
import sys
from importlib import resources
from pathlib import Path

from . import __version__
from .errors import ConfigError, PotfieldError

RAW_README = {
    "magnetic": """Put the raw survey files here (potfield reads them, never writes them):
- the magnetometer readings as delimited text (CSV, semicolon, tab or whitespace; .gz allowed),
  one or several files, with time, position (longitude/latitude or easting/northing), height,
  line and total field columns; map their column names in ../survey.toml [input.columns];
- base-station records (delimited text or IAGA-2002 files) named in [[diurnal.bases]].
""",
    "gravity": """Put the raw survey files here (potfield reads them, never writes them):
- the gravimeter readings as delimited text: station, time, position, height, reading
  (mGal or counter units), instrument height and loop; map the columns in ../survey.toml;
- the meter's calibration (interval) table when readings are in counter units ([drift]);
- a digital elevation grid (NetCDF, GeoTIFF or x,y,z table) for the terrain correction ([reference]).
""",
    "observatory": """Put the observatory files here (potfield reads them, never writes them):
- IAGA-2002 minute files, one or more per station (e.g. abc20240501dmin.min); the station
  position is read from each file's header.
""",
}


def _template(kind: str) -> str:
    return (resources.files("potfield") / "data" / "configs" / f"{kind}.toml").read_text(encoding="utf-8")


def cmd_new(args) -> int:
    root = Path(args.directory)
    if (root / "survey.toml").exists():
        raise ConfigError(
            f"{root / 'survey.toml'} already exists",
            fix="choose a new folder or edit the existing survey.toml",
        )
    (root / "raw").mkdir(parents=True, exist_ok=True)
    name = root.resolve().name
    text = _template(args.kind).replace('name = "my survey"', f'name = "{name}"')
    from .io.atomic import write_text

    write_text(root / "survey.toml", text)
    write_text(root / "raw" / "README.md", f"# raw/\n\n{RAW_README[args.kind]}")
    print(f"created {root}/survey.toml and {root}/raw/ for a {args.kind} survey")
    print(f"next: put your files in raw/, map their columns in survey.toml, then run 'potfield check {root}'")
    return 0


def cmd_check(args) -> int:
    from .pipeline import check_survey

    info = check_survey(args.directory)
    print(f"survey   {info['survey']} ({info['kind']})")
    for path, rows in info["files"].items():
        print(f"file     {path}: {rows:,} readings")
    print(f"readings {info['readings']:,}")
    if info["time_span"][0] is None:
        print("time     none (no time column: no diurnal correction or drift)")
    else:
        print(f"time     {info['time_span'][0]} .. {info['time_span'][1]} UTC")
    lo = info["extent_lonlat"]
    print(f"extent   longitude {lo[0]:.5f} .. {lo[1]:.5f}, latitude {lo[2]:.5f} .. {lo[3]:.5f}")
    r = info["region_m"]
    print(f"region   easting {r[0]:.0f} .. {r[1]:.0f} m, northing {r[2]:.0f} .. {r[3]:.0f} m")
    print(f"crs      input {info['input_crs']}, output {info['output_crs']}")
    spacing = info["line_spacing_m"]
    print(
        f"lines    {info['lines']} ({info['traverse_lines']} traverse, {info['tie_lines']} tie)"
        + (f", spacing {spacing:.0f} m" if spacing else "")
    )
    print(f"stages   {', '.join(info['stages'])}")
    print("ok: configuration and inputs are valid")
    return 0


from .logs import FINAL_WORDS  # noqa: E402


def _outcome(summary) -> tuple[str, bool]:
    """The last line of ``potfield run``: failed checks and skipped/degraded steps, and whether
    anything is not as specified (for --strict)."""
    failed = summary.failed_checks
    skipped, degraded = summary.skipped_steps, summary.degraded_steps
    parts = []
    if failed:
        parts.append(f"{len(failed)} failed spec check(s): " + ", ".join(c["check"] for c in failed))
    if skipped:
        parts.append("skipped: " + ", ".join(s["stage"] for s in skipped))
    if degraded:
        parts.append("degraded: " + ", ".join(sorted({s["stage"] for s in degraded})))
    if not parts:
        return "all spec checks passed; no step skipped or degraded", False
    return "; ".join(parts), True


def cmd_run(args) -> int:
    from . import logs
    from .pipeline import KIND_ORDER, run_survey
    from .survey import Survey

    survey = Survey(Path(args.directory))
    config = survey.load_config()
    verbosity = -1 if getattr(args, "quiet", False) else getattr(args, "verbose", 0)
    log_file = survey.root / "out" / "run.log"
    try:
        logger = logs.setup(verbosity, log_file)
    except OSError:  # out/ not writable: the run itself will say so
        logger = logs.setup(verbosity)
    progress = logs.Progress(list(KIND_ORDER[config.kind]), logs.previous_seconds(survey.root / "out"))
    try:
        if sys.stdout.isatty() and verbosity == 0:
            from rich.console import Console

            console = Console(stderr=False, highlight=False)
            with console.status("starting") as status:

                def show(message: str) -> None:
                    message = logs.dedupe(message)
                    if any(word in message for word in FINAL_WORDS):
                        progress(message)
                    else:
                        status.update(message)
                        logger.debug(message)

                summary = run_survey(
                    args.directory,
                    until=args.until,
                    only=args.only,
                    start=args.start,
                    force=args.force,
                    progress=show,
                )
        else:
            summary = run_survey(
                args.directory,
                until=args.until,
                only=args.only,
                start=args.start,
                force=args.force,
                progress=progress,
            )
        failed = summary.failed_checks
        text = f"outputs in {summary.survey / 'out'}; {len(summary.checks)} spec checks, {len(failed)} failed"
        if failed:
            logger.warning(text)
        else:
            logger.info(text)
        for check in failed:
            logger.warning(
                f"  FAIL {check['check']}: {check['value']:.4g} (tolerance "
                f"{check['tolerance']:.4g} {check['unit']})"
            )
        for step in summary.steps:
            logger.warning(f"  WARNING {step['stage']} {step['result']}: {step['detail']}")
        last, bad = _outcome(summary)
        (logger.warning if bad else logger.info)(last)  # the last line: what is not as specified
    finally:
        logs.close()
    return 1 if (bad and args.strict) else 0


def cmd_stages(args) -> int:
    from .pipeline import KIND_ORDER, load_stage

    kinds = [args.kind] if args.kind else list(KIND_ORDER)
    for kind in kinds:
        print(f"{kind}:")
        for name in KIND_ORDER[kind]:
            stage = load_stage(name)
            text = stage.summary if kind in stage.kinds else f"does nothing for {kind} surveys"
            print(f"  {name:<10} {text}")
    return 0


def cmd_demo(args) -> int:
    try:
        from .demo import make_demo
    except ModuleNotFoundError:
        raise ConfigError("demo scenarios are not available in this version of potfield") from None
    path = make_demo(args.kind, Path(args.directory), readings=args.readings, seed=args.seed)
    print(f"wrote the {args.kind} demo survey to {path} (truth in {Path(path) / 'truth'})")
    return 0


def cmd_report(args) -> int:
    try:
        from .qc.report import rebuild_report
    except ModuleNotFoundError:
        raise ConfigError("the report is not available in this version of potfield") from None
    path = rebuild_report(Path(args.directory))
    print(f"wrote {path}")
    return 0


def cmd_batch(args) -> int:
    try:
        from .batch import run_batch
    except ModuleNotFoundError:
        raise ConfigError("batch processing is not available in this version of potfield") from None
    failures = run_batch(
        [Path(d) for d in args.directories], workers=args.workers, scheduler=args.scheduler, force=args.force
    )
    return 1 if failures else 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="potfield",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Potential-field survey processing: magnetic, gravity and observatory readings "
        "to checked grids, tables, maps and a report.",
        epilog="example:\n  potfield demo gravity demo-gravity && potfield run demo-gravity\n\n"
        "Results need review by a qualified geophysicist; local regulations prevail.",
    )
    parser.add_argument("--version", action="version", version=f"potfield {__version__}")
    _verbosity(parser, None)
    sub = parser.add_subparsers(dest="command", required=True)

    p = sub.add_parser("new", help="create a survey folder with a commented survey.toml")
    p.add_argument("directory")
    p.add_argument("--kind", required=True, choices=["magnetic", "gravity", "observatory"])
    p.set_defaults(func=cmd_new)

    p = sub.add_parser("check", help="validate config and inputs without processing")
    p.add_argument("directory")
    p.set_defaults(func=cmd_check)

    p = sub.add_parser("run", help="run the stages of a survey")
    p.add_argument("directory")
    p.add_argument("--until", metavar="STAGE", help="stop after this stage")
    p.add_argument("--only", metavar="STAGE", help="run only this stage (earlier ones must be up to date)")
    p.add_argument("--from", dest="start", metavar="STAGE", help="start at this stage")
    p.add_argument("--force", action="store_true", help="recompute even unchanged stages")
    p.add_argument(
        "--strict",
        action="store_true",
        help="exit with code 1 when a spec check fails or a step was skipped or degraded",
    )
    _verbosity(p, argparse.SUPPRESS)
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("stages", help="list the stages of each survey kind")
    p.add_argument("--kind", choices=["magnetic", "gravity", "observatory"])
    p.set_defaults(func=cmd_stages)

    p = sub.add_parser("demo", help="write a demo survey with known truth")
    p.add_argument("kind", choices=["magnetic", "gravity", "observatory"])
    p.add_argument("directory")
    p.add_argument("--readings", type=int, default=None, help="magnetic: number of readings")
    p.add_argument("--seed", type=int, default=0)
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("report", help="rebuild out/report.html from out/ without recomputing")
    p.add_argument("directory")
    p.set_defaults(func=cmd_report)

    p = sub.add_parser("batch", help="process many survey folders in parallel on Dask")
    p.add_argument("directories", nargs="+")
    p.add_argument("--workers", type=int, default=2)
    p.add_argument("--scheduler", default=None, help="address of an existing Dask scheduler")
    p.add_argument("--force", action="store_true")
    p.set_defaults(func=cmd_batch)
    for name, sp in sub.choices.items():
        description, example = COMMAND_HELP[name]
        sp.description = description
        sp.epilog = f"example:\n  {example}"
        sp.formatter_class = argparse.RawDescriptionHelpFormatter
    return parser


#: Description and one example per command (shown by ``potfield COMMAND --help``).
COMMAND_HELP = {
    "new": (
        "Create a survey folder with a commented survey.toml for the kind and an empty raw/.",
        "potfield new my-survey --kind magnetic",
    ),
    "check": (
        "Validate survey.toml and read the inputs without processing: files, readings, "
        "time span, extent, CRS, lines.",
        "potfield check my-survey",
    ),
    "run": (
        "Run the stages of a survey in order; unchanged stages are reused from out/cache. "
        "Writes out/tables, out/grids, out/maps, out/report.html, out/manifest.json and "
        "out/run.log.",
        "potfield run my-survey --from grid -v",
    ),
    "stages": ("List the stages of each survey kind and what they do.", "potfield stages --kind gravity"),
    "demo": (
        "Write a demo survey (invented data with known truth) to a folder.",
        "potfield demo magnetic demo-magnetic --seed 0",
    ),
    "report": (
        "Rebuild out/maps and out/report.html from out/ without recomputing.",
        "potfield report my-survey",
    ),
    "batch": (
        "Process many survey folders in parallel on Dask; one survey's error never stops the others.",
        "potfield batch surveys/* --workers 2",
    ),
}


def _verbosity(parser, default) -> None:
    """-v/--verbose (every progress message) and -q/--quiet (warnings and errors only)."""
    parser.add_argument(
        "-v",
        "--verbose",
        action="count",
        default=0 if default is None else default,
        help="show every progress message",
    )
    parser.add_argument(
        "-q",
        "--quiet",
        action="store_true",
        default=False if default is None else default,
        help="show only warnings and errors",
    )


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.func(args)
    except PotfieldError as err:
        print(f"potfield: error: {err}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("potfield: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

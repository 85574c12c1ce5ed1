"""The command-line entry point: the parser and the one place where errors become exit codes."""

from __future__ import annotations

import argparse
import json
import sys

from optreserve import __version__, interrupt, progress
from optreserve.cli.common import (
    EXIT_INFEASIBLE,
    EXIT_INPUT,
    EXIT_OK,
    EXIT_OTHER,
    STRICT_HELP,
    clean,
)
from optreserve.cli.importing import add_import_parser
from optreserve.cli.snapshot import _add_report_parser, cmd_check, cmd_generate, cmd_solve
from optreserve.cli.studies import _add_retune_parser, _add_simulate_parser, _add_study_parsers
from optreserve.errors import CaseError, InfeasibleError, OptreserveError
from optreserve.output.results import CAUTION
from optreserve.progress import TerminalStatus


# ------------------------------------------------------------------ entry point
def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="optreserve",
        description="Least-cost primary reserve headroom and governor droop so that every "
                    "listed disturbance settles inside the permitted frequency deviation "
                    "without overloading a tie line.",
        epilog=CAUTION)
    p.add_argument("--version", action="version", version=f"optreserve {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    c = sub.add_parser("check", help="validate a case and screen each event",
                       description="Validate a case folder and show, per event, the gain the "
                                   "settled limit needs against the most the case can offer.")
    c.add_argument("case", metavar="CASE", help="case folder (case.toml, units.csv, ...)")
    c.add_argument("--quiet", action="store_true", help="no warnings")
    c.add_argument("--json", action="store_true", help="print a JSON document (for scripts)")
    c.add_argument("--strict", action="store_true", help=STRICT_HELP)
    c.set_defaults(func=cmd_check)

    s = sub.add_parser("solve", help="optimise droop and headroom",
                       description="Optimise every unit's droop and headroom; print a summary "
                                   "and, with --out, write allocation.csv, events.csv, "
                                   "links.csv and summary.json.")
    s.add_argument("case", metavar="CASE", help="case folder")
    s.add_argument("--out", metavar="DIR", help="folder for the result files")
    s.add_argument("--force", action="store_true",
                   help="write into a non-empty --out folder (only optreserve's files change)")
    s.add_argument("--engine", choices=["auto", "pyomo", "highspy"], default="auto",
                   help="how HiGHS receives the model: Pyomo model, bulk highspy load, or auto "
                        "(the bulk load); default auto")
    s.add_argument("--time-limit", type=float, metavar="S", help="solver time limit, seconds "
                   "(overrides case.toml)")
    s.add_argument("--mip-gap", type=float, metavar="G", help="relative MIP gap (overrides "
                   "case.toml)")
    s.add_argument("--relax", action="store_true", help="solve the LP relaxation (no integer "
                   "participation or droop steps)")
    s.add_argument("--workers", type=int, metavar="N", help="solve the droop blocks of a "
                   "separable horizon ([droop] hold_periods) on N local Dask worker processes "
                   "(default: one after the other in this process)")
    s.add_argument("--scheduler", metavar="ADDR", help="...or on the Dask cluster at ADDR")
    s.add_argument("--verbose", action="store_true", help="show the HiGHS log")
    s.add_argument("--quiet", action="store_true", help="print nothing on success")
    s.add_argument("--strict", action="store_true", help=STRICT_HELP)
    s.add_argument("--json", action="store_true", help="print the summary and events as JSON "
                   "instead of tables (for scripts)")
    s.add_argument("--report", action="store_true", help="also write report.html into --out "
                   "(see the report command)")
    s.add_argument("--compare", choices=["uniform"], help="also cost the uniform-droop policy "
                   "(one droop for every capable unit) and today's settings (droop_now_pct), "
                   "list the limits each breaks and the saving of the optimum; with --out "
                   "writes comparison.csv, comparison.json and uniform_allocation.csv")
    s.add_argument("--price-step", type=float, metavar="MW", help="growth of each event (and "
                   "own-reserve requirement) for its incremental cost (default max(1 MW, 1 %% "
                   "of its size))")
    s.add_argument("--no-incremental", action="store_true", help="skip the re-solves behind "
                   "incremental_cost_per_mw_h (faster; only the fixed-step marginal prices)")
    s.set_defaults(func=cmd_solve)

    g = sub.add_parser("generate", help="write a synthetic day-ahead case",
                       description="Write a synthetic but plausible day-ahead case (mixed "
                                   "technologies, daily load shape, merit-order outputs, meshed "
                                   "areas); the same files for the same seed.")
    g.add_argument("--units", type=int, default=300, metavar="N", help="units (default 300)")
    g.add_argument("--areas", type=int, default=5, metavar="A", help="areas (default 5)")
    g.add_argument("--links", type=int, default=8, metavar="L", help="links (default 8)")
    g.add_argument("--periods", type=int, default=96, metavar="T", help="periods in the day "
                   "(default 96, quarter-hours)")
    g.add_argument("--events", type=int, default=10, metavar="E", help="events, each applying "
                   "in every period (default 10)")
    g.add_argument("--seed", type=int, default=1, metavar="S", help="random seed (default 1)")
    g.add_argument("--days", type=int, default=1, metavar="D", help="days of --periods each "
                   "(default 1): a season and weekends shape the load from day to day")
    g.add_argument("--hold-periods", type=int, metavar="H", help="write [droop] hold_periods "
                   "= H (e.g. --periods: droop held per day)")
    g.add_argument("--parquet", action="store_true", help="write the time series as "
                   "*_by_period.parquet instead of CSV")
    g.add_argument("--out", required=True, metavar="DIR", help="folder to write the case into")
    g.add_argument("--force", action="store_true", help="write into a non-empty folder")
    g.add_argument("--quiet", action="store_true", help="print nothing on success")
    g.set_defaults(func=cmd_generate)
    _add_report_parser(sub)
    _add_retune_parser(sub)
    _add_simulate_parser(sub)
    _add_study_parsers(sub)
    add_import_parser(sub)
    return p


def run() -> None:
    """The console command (and `python -m optreserve`): main(), then the process ends at
    once with its exit code. Everything a command does is finished by then (result files in
    place, Dask clusters closed, solver logs removed); what is skipped is the interpreter's
    own teardown, freeing every module of pandas, numpy and scipy (about 0.1 s, measured in
    docs/performance.md, "Snapshot latency"). A tracer or profiler gets the normal exit."""
    import os

    rc = main()
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):  # a closed pipe: nothing more can be said there
            pass
    if sys.gettrace() is None and sys.getprofile() is None:
        os._exit(rc)
    raise SystemExit(rc)


def main(argv: list[str] | None = None) -> int:
    # SIGINT -> 130, SIGTERM -> 143: HiGHS is asked to stop, nothing is written
    from optreserve.output.staging import forget_committed

    forget_committed()
    with interrupt.handling():
        return _main(argv)


def _main(argv: list[str] | None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help()
        return EXIT_INPUT
    as_json = bool(getattr(args, "json", False))
    try:
        if getattr(args, "quiet", False) or as_json:
            return args.func(args)
        with TerminalStatus() as status, progress.listening(status):
            return args.func(args)
    except CaseError as exc:
        for p in exc.problems:
            print(clean(f"error: {p}"), file=sys.stderr)
        if as_json:
            print(json.dumps({"status": "input_error", "errors": [
                {"file": p.file, "row": p.row, "column": p.column, "message": p.message}
                for p in exc.problems]}, indent=2))
        return EXIT_INPUT
    except InfeasibleError as exc:
        print(clean(f"infeasible: {exc}"), file=sys.stderr)
        for line in exc.shortfalls:
            print(clean(f"  {line}"), file=sys.stderr)
        if as_json:
            print(json.dumps({"status": "infeasible", "shortfalls": exc.shortfalls}, indent=2))
        return EXIT_INFEASIBLE
    except OptreserveError as exc:
        print(clean(f"error: {exc}"), file=sys.stderr)
        return exc.exit_code
    except BrokenPipeError:  # output piped into head & co.
        return EXIT_OK
    except KeyboardInterrupt as exc:
        return _interrupted(exc)
    except Exception as exc:  # last line of defence: one line, no traceback
        print(clean(f"error: unexpected {type(exc).__name__}: {exc}"), file=sys.stderr)
        return EXIT_OTHER


def _interrupted(exc: KeyboardInterrupt) -> int:
    """Exit code 128 + signal; say whether an output folder had been completed before it."""
    from optreserve.output.staging import committed

    code = getattr(exc, "exit_code", 130)
    name = {130: "Ctrl-C", 143: "SIGTERM"}.get(code, f"signal {code - 128}")
    done = committed()
    if done:
        print(f"interrupted ({name}) after {done[-1]} was written", file=sys.stderr)
    else:
        print(f"interrupted ({name}); no output written", file=sys.stderr)
    return code

"""Study commands: retune, simulate, sweep and batch."""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

from optreserve.case.nodal import area_equivalent
from optreserve.case.reader import load_case
from optreserve.cli.common import (
    EXIT_CASES_FAILED,
    EXIT_INCOMPLETE,
    EXIT_INPUT,
    EXIT_OK,
    EXIT_OTHER,
    STRICT_HELP,
    _pct,
    _table,
    _warn,
    clean,
    num,
    plural,
)
from optreserve.cli.snapshot import _write_diagnosis
from optreserve.errors import InfeasibleError
from optreserve.output.results import CAUTION
from optreserve.output.staging import check_out


# ------------------------------------------------------------------ retune
def cmd_retune(args) -> int:
    from optreserve.studies.retune import retune

    out_dir = Path(args.out) if args.out else None
    if out_dir is not None:
        check_out(out_dir, args.force, inputs=[args.case], command="retune")
    case = load_case(args.case)
    _warn(case, args.quiet, getattr(args, "strict", False))
    keep = tuple(u.strip() for u in (args.keep or "").split(",") if u.strip())
    try:
        prop = retune(case, max_changes=args.max_changes, keep=keep,
                      survive_provider_loss=args.survive_provider_loss,
                      reduce_cost=args.reduce_cost, engine=args.engine,
                      time_limit=args.time_limit, mip_gap=args.mip_gap)
    except InfeasibleError as exc:
        if out_dir is not None and exc.diagnosis is not None:
            _write_diagnosis(exc, out_dir, args.force)
        raise
    if out_dir is not None:
        prop.write(out_dir, force=args.force)
    if getattr(args, "json", False):
        doc = prop.summary()
        doc["proposal"] = json.loads(prop.changed.to_json(orient="records"))
        print(json.dumps(doc, indent=2))
        return EXIT_OK
    if args.quiet:
        return EXIT_OK
    if prop.already_safe:
        print("today's settings already meet every limit"
              + (": no change proposed" if prop.changed.empty else
                 "; cost-saving changes proposed (--reduce-cost)"))
    else:
        print("today's settings break these limits:")
        for v in prop.violations_before[:12]:
            print(clean(f"  {v}"))
        if len(prop.violations_before) > 12:
            print(f"  ... and {len(prop.violations_before) - 12} more")
    ch = prop.changed
    if len(ch):
        rows = [[str(r.unit), str(r.area), _pct(r.droop_now_pct), _pct(r.droop_proposed_pct),
                 str(r.change), str(r.reason)] for r in ch.itertuples()]
        print(f"{plural(len(ch), 'unit')} to change, total droop change "
              f"{prop.proposal['droop_change_pct'].sum():.2f} percentage points:")
        print(_table(["unit", "area", "droop now %", "proposed %", "change", "reason"], rows,
                     {2, 3}))
    ba = prop.before_after
    rows = [[str(r.event), f"{r.settled_frequency_before_hz:.4f}",
             f"{r.settled_frequency_after_hz:.4f}", num(r.margin_before_hz * 1000),
             num(r.margin_after_hz * 1000)]
            + ([f"{r.loading_before_pct:.1f}", f"{r.loading_after_pct:.1f}"]
               if "loading_before_pct" in ba.columns else [])
            for r in ba.itertuples()]
    head = ["event", "before Hz", "after Hz", "margin before mHz", "margin after mHz"] + (
        ["worst link before %", "after %"] if "loading_before_pct" in ba.columns else [])
    print(_table(head, rows, set(range(1, len(head)))))
    print(f"headroom cost per hour: before {prop.cost_before_per_h:.2f}, after "
          f"{prop.cost_after_per_h:.2f}")
    if out_dir is not None:
        print(f"wrote {out_dir}: proposal.csv before_after.csv retune.json and the allocation "
              "files")
    print(CAUTION)
    return EXIT_OK


def _add_retune_parser(sub) -> None:
    r = sub.add_parser("retune", help="propose the fewest droop changes that meet the limits",
                       description="From today's settings (droop_now_pct), propose droop "
                                   "settings inside bands and steps that meet every limit "
                                   "with, in order, the fewest units changed, the least total "
                                   "droop change and the least headroom cost; each change "
                                   "comes with the limit that needs it.")
    r.add_argument("case", metavar="CASE", help="case folder")
    r.add_argument("--out", metavar="DIR", help="folder for proposal.csv, before_after.csv, "
                   "retune.json and the allocation files")
    r.add_argument("--force", action="store_true", help="write into a non-empty --out folder")
    r.add_argument("--max-changes", type=int, metavar="N", help="change at most N units")
    r.add_argument("--keep", metavar="UNIT,...", help="units whose setting must not change")
    r.add_argument("--survive-provider-loss", action="store_true",
                   help="every limit must also hold with any one reserve provider unavailable")
    r.add_argument("--reduce-cost", action="store_true",
                   help="propose cost-saving changes even when today's settings are safe")
    r.add_argument("--engine", choices=["auto", "pyomo", "highspy"], default="auto",
                   help="how HiGHS receives the model (default auto)")
    r.add_argument("--time-limit", type=float, metavar="S", help="solver time limit per stage")
    r.add_argument("--mip-gap", type=float, metavar="G", help="relative MIP gap")
    r.add_argument("--quiet", action="store_true", help="print nothing on success")
    r.add_argument("--json", action="store_true", help="print the proposal as JSON")
    r.add_argument("--strict", action="store_true", help=STRICT_HELP)
    r.set_defaults(func=cmd_retune)


# ------------------------------------------------------------------ simulate
def cmd_simulate(args) -> int:
    from optreserve.dynamics.simulate import read_allocation, simulate

    out_dir = Path(args.out)
    check_out(out_dir, args.force, inputs=[args.case], command="simulate")
    if args.duration is not None and not args.duration > 0.5:
        print("error: --duration must be more than 0.5 s", file=sys.stderr)
        return EXIT_INPUT
    case = load_case(args.case)
    _warn(case, args.quiet, getattr(args, "strict", False))
    allocation = read_allocation(args.allocation, case)
    case = area_equivalent(case) if case.is_nodal else case  # one frequency per area
    sim = simulate(case, allocation, events=None if args.all else args.event,
                   period=args.period, duration_s=args.duration)
    sim.write(out_dir, force=args.force)
    if args.quiet:
        return EXIT_OK
    for w in sim.warnings:
        print(clean(f"warning: {w}"), file=sys.stderr)
    sm = sim.summary
    ok = {True: "ok", False: "NO", None: "-"}
    rows = [[str(r.event), f"{r.size_mw:+.1f}", f"{r.nadir_hz:.3f}", f"{r.nadir_time_s:.2f}",
             f"{r.rocof_hz_per_s:.3f}", f"{r.rocof_estimate_hz_per_s:.3f}",
             f"{r.settled_frequency_hz:.4f}", ok[r.settled_ok], ok[r.nadir_ok], ok[r.rocof_ok]]
            for r in sm.itertuples()]
    print(f"case {case.name!r}" + (f", period {sim.period}" if sim.period else "")
          + f": {plural(len(sm), 'event')} simulated")
    print(_table(["event", "size MW", "nadir Hz", "at s", "RoCoF Hz/s", "dP fn/2H",
                  "settles Hz", "settled", "nadir", "RoCoF"], rows, set(range(1, 7))))
    for note in sim.overloaded_links():  # transient tie loading (simulation_links.csv)
        print(f"note: {note}", file=sys.stderr)
    broken = int(sm[["settled_ok", "nadir_ok", "rocof_ok"]].eq(False).any(axis=1).sum())
    if broken:
        verb = "breaks" if broken == 1 else "break"
        print(f"{plural(broken, 'event')} {verb} a limit in the simulation", file=sys.stderr)
    print(f"wrote {out_dir}: simulation_summary.csv simulation.json and per event series_*.csv "
          "plot_*.png")
    print(CAUTION)
    return EXIT_OK


def _add_simulate_parser(sub) -> None:
    r = sub.add_parser("simulate", help="simulate frequency and tie flows after each event",
                       description="Time-domain check of an allocation: per-area swing "
                                   "equations, each unit's governor model (lag, reheat, hydro "
                                   "or inverter) with its dead band and response limit, "
                                   "tie-line synchronising power and transient tie loading. "
                                   "Writes per event a time series and a plot, and "
                                   "simulation_summary.csv (nadir, RoCoF, settled frequency, "
                                   "limits).")
    r.add_argument("case", metavar="CASE", help="case folder")
    r.add_argument("--allocation", required=True, metavar="DIR",
                   help="folder written by solve --out (its allocation.csv is read)")
    which = r.add_mutually_exclusive_group(required=True)
    which.add_argument("--event", action="append", metavar="NAME",
                       help="event to simulate (repeat for more)")
    which.add_argument("--all", action="store_true", help="simulate every event")
    r.add_argument("--period", metavar="LABEL", help="period of a horizon case")
    r.add_argument("--out", required=True, metavar="DIR", help="folder for the outputs")
    r.add_argument("--duration", type=float, metavar="S", help="seconds to simulate (default: "
                   "60, doubled until the end of the run is flat, at most 480)")
    r.add_argument("--force", action="store_true", help="write into a non-empty --out folder "
                   "(only optreserve's files change)")
    r.add_argument("--quiet", action="store_true", help="print nothing on success")
    r.add_argument("--strict", action="store_true", help=STRICT_HELP)
    r.set_defaults(func=cmd_simulate)


# ------------------------------------------------------------------ sweep and batch
def cmd_sweep(args) -> int:
    from optreserve.studies.sweep import grid, parse_vary, run_sweep

    check_out(Path(args.out), args.force, inputs=[args.case], command="sweep")
    case = load_case(args.case)
    _warn(case, args.quiet)
    varies = [parse_vary(spec, case) for spec in args.vary]
    grid(varies)  # a bad combination fails here, before any cluster starts
    return _run_study(args, "sweep", case.name, [v.key for v in varies],
                      lambda w, sch, prog: run_sweep(case, varies, workers=w, scheduler=sch,
                                                     progress=prog,
                                                     point_timeout_s=args.point_timeout),
                      {"case_path": str(case.path), "vary": list(args.vary)})


def cmd_batch(args) -> int:
    from optreserve.studies.batch import case_writer, run_cases
    from optreserve.studies.sweep import case_folders

    folders = case_folders(Path(args.folder))
    check_out(Path(args.out), args.force, inputs=[args.folder, *folders], command="batch")
    kept = {}

    def run(w, sch, prog):
        table, payloads = run_cases(Path(args.folder), workers=w, scheduler=sch, progress=prog,
                                    point_timeout_s=args.point_timeout)
        kept.update(payloads)
        return table

    return _run_study(args, "batch", str(args.folder), ["case"], run,
                      {"cases": [p.name for p in folders]}, extra=case_writer(kept))


def _run_study(args, name, title, keys, run, meta, extra=None) -> int:
    from optreserve.studies.sweep import ENGINE, LOST, default_workers, write_study

    if args.workers is not None and args.workers < 1:
        print("error: --workers must be at least 1", file=sys.stderr)
        return EXIT_INPUT
    workers = None if args.scheduler else (args.workers or default_workers())
    t0 = time.perf_counter()
    table = run(workers, args.scheduler, sys.stderr.isatty() and not args.quiet)
    wall = time.perf_counter() - t0
    meta = {"command": name, "case": title, **meta, "engine": ENGINE,
            "workers": workers, "scheduler": args.scheduler, "wall_s": round(wall, 3)}
    files = write_study(table, Path(args.out), name, keys, meta, force=args.force,
                        extra=extra)
    counts = table["status"].value_counts()
    what = "case" if name == "batch" else "point"
    if not args.quiet:
        where = f"on {args.scheduler}" if args.scheduler else (
            "serially" if workers == 1 else f"on {workers} local workers")
        print(f"{name}: {len(table)} {what}{'s' if len(table) != 1 else ''} ("
              + ", ".join(f"{int(n)} {k}" for k, n in counts.items()) + f") in {wall:.1f} s "
              f"{where}")
        print(clean(f"wrote {args.out}: " + " ".join(files)))
        print(CAUTION)
    if name == "batch":  # every case is a case someone needs: one failure is a failure
        bad = table[~table["status"].isin(("optimal", "time_limit"))]
        if len(bad):
            print(f"{len(bad)} case{'s' if len(bad) != 1 else ''} did not solve: "
                  + ", ".join(clean(f"{r.case} ({r.status})") for r in bad.itertuples()),
                  file=sys.stderr)
            return EXIT_CASES_FAILED
        return EXIT_OK
    if (table["status"] == LOST).any():  # a point that could not be delivered
        return EXIT_INCOMPLETE
    return EXIT_OK if (table["status"] != "error").any() else EXIT_OTHER


def _add_study_parsers(sub) -> None:
    def engine_args(p, out_help):
        g = p.add_mutually_exclusive_group()
        g.add_argument("--workers", type=int, metavar="N", help="local worker processes (Dask "
                       "LocalCluster, one thread each); default: the number of CPU cores; 1 "
                       "runs serially in this process")
        g.add_argument("--scheduler", metavar="ADDRESS", help="run on an existing Dask "
                       "cluster, e.g. tcp://10.0.0.5:8786 (its workers need optreserve)")
        p.add_argument("--out", required=True, metavar="DIR", help=out_help)
        p.add_argument("--force", action="store_true", help="write into a non-empty --out "
                       "folder (only optreserve's files change)")
        p.add_argument("--quiet", action="store_true", help="print nothing on success")
        p.add_argument("--point-timeout", type=float, metavar="S", help="on Dask: a point "
                       "not back after S seconds on its worker is run again elsewhere (at "
                       "most 3 tries, then a 'lost' row and exit code 5); default 600")

    w = sub.add_parser("sweep", help="solve a case over a grid of limits, sizes or prices",
                       description="Solve the case at every point of a grid and write "
                                   "sweep.csv (one row per point), sweep.png (cost curve, one "
                                   "or two varied keys) and sweep.json. Infeasible or failing "
                                   "points are rows with their status; the rest go on.")
    w.add_argument("case", metavar="CASE", help="case folder")
    w.add_argument("--vary", action="append", required=True, metavar="KEY=START:STOP:STEP",
                   help="a [limits] key (max_settled_deviation_hz, full_activation_deviation_hz,"
                        " max_nadir_deviation_hz), event:NAME.size_mw, link:NAME.limit_mw, "
                        "area:NAME.min_own_reserve_mw or price_scale; a range (STOP included) or "
                        "KEY=V1,V2,...; repeat for a grid")
    engine_args(w, "folder for sweep.csv, the cost plot sweep.png (one or two varied keys) "
                "and sweep.json")
    w.set_defaults(func=cmd_sweep)

    b = sub.add_parser("batch", help="solve every case folder inside a folder (e.g. one per day)",
                       description="Solve every sub-folder holding a case.toml (sorted by name) "
                                   "and write, inside --out, one result folder per case (what "
                                   "solve --out writes; diagnosis.csv for an infeasible case), "
                                   "batch.csv (one row per case) and batch.json; each worker "
                                   "reads its case from the folder. Exit code 5 when a case "
                                   "did not solve.")
    b.add_argument("folder", metavar="DIR", help="folder of case folders")
    engine_args(b, "folder for batch.csv, batch.json and one result folder per case")
    b.set_defaults(func=cmd_batch)

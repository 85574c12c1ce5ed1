"""Command line: a thin shell over the Python API. Only here do errors become exit codes."""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

from optreserve import __version__
from optreserve import progress
from optreserve.errors import CaseError, InfeasibleError, OptreserveError
from optreserve.progress import TerminalStatus, use_colour
from optreserve.case.reader import load_case
from optreserve.output.results import CAUTION, Result, write_table
from optreserve.output.staging import check_out, staged_output
from optreserve.solver.screen import event_capability

EXIT_OK, EXIT_OTHER, EXIT_INPUT, EXIT_INFEASIBLE = 0, 1, 2, 3


def _table(headers: list[str], rows: list[list[str]], right: set[int] | None = None) -> str:
    """Aligned plain-text table; columns in `right` are right-aligned (numbers)."""
    right = right or set()
    widths = [max(len(h), *(len(r[k]) for r in rows)) if rows else len(h)
              for k, h in enumerate(headers)]

    def fmt(cells):
        return "  ".join(c.rjust(w) if k in right else c.ljust(w)
                         for k, (c, w) in enumerate(zip(cells, widths))).rstrip()

    return "\n".join([fmt(headers), fmt(["-" * w for w in widths])] + [fmt(r) for r in rows])


def _warn(case, quiet: bool) -> None:
    if not quiet:
        for w in case.warnings:
            print(f"warning: {w}", file=sys.stderr)


# ------------------------------------------------------------------ check
def cmd_check(args) -> int:
    case = load_case(args.case)
    _warn(case, args.quiet)
    if getattr(args, "json", False):
        cap = event_capability(case)
        short = bool((cap["short_mw"] > 0).any())
        print(json.dumps({
            "status": "short" if short else "valid", "case": case.name,
            "units": len(case.units), "areas": len(case.areas), "links": len(case.links),
            "events": len(case.events), "periods": case.n_periods,
            "warnings": list(case.warnings),
            "screening": json.loads(cap.to_json(orient="records"))}, indent=2))
        return EXIT_INFEASIBLE if short else EXIT_OK
    u, ev = case.units, case.events
    n_under = int((ev["size_mw"] > 0).sum())
    n_over = int((ev["size_mw"] < 0).sum())
    print(f"case {case.name!r}: {len(u)} units ({int(u['provides'].sum())} may provide), "
          f"{len(case.areas)} areas, {len(case.links)} links, {len(ev)} events "
          f"({n_under} under-frequency, {n_over} over-frequency)")
    lim = case.limits
    print(f"limits: settled deviation {lim.max_settled_deviation_hz * 1000:.0f} mHz, full "
          f"activation at {lim.full_activation_deviation_hz * 1000:.0f} mHz; droop "
          + ("steps " + ", ".join(f"{s:g}" for s in case.droop.steps_pct) + " %"
             if case.droop.steps_pct else "continuous inside each band"))
    cap = event_capability(case)
    if "period" in cap.columns:  # one line per event: its tightest period
        cap = cap.assign(_r=cap["offered_gain_mw_per_hz"] / cap["needed_gain_mw_per_hz"]
                         .where(cap["needed_gain_mw_per_hz"] > 0))
        cap = cap.loc[cap.groupby("event", sort=False)["_r"].idxmin().fillna(0).astype(int)]
        print(f"{case.n_periods} periods ({case.hours().sum():g} h), droop "
              + ("fixed over the horizon" if case.hold_periods is None else
                 f"held for {case.hold_periods} period(s)") + "; per event its tightest period:")
    rows = []
    for r in cap.itertuples():
        ratio = r.offered_gain_mw_per_hz / r.needed_gain_mw_per_hz if r.needed_gain_mw_per_hz \
            else float("inf")
        rows.append([str(r.event) + (f" @ {r.period}" if hasattr(r, "period") else ""),
                     f"{r.size_mw:.1f}", f"{r.needed_gain_mw_per_hz:.1f}",
                     f"{r.offered_gain_mw_per_hz:.1f}",
                     "ok" if r.short_mw <= 0 else f"SHORT {r.short_mw:.1f} MW",
                     f"{ratio:.2f}"])
    print(_table(["event", "size MW", "needs MW/Hz", "can offer MW/Hz", "", "ratio"], rows,
                 {1, 2, 3, 5}))
    short = cap[cap["short_mw"] > 0]
    if len(short):
        print(f"{len(short)} event(s) cannot be met even with every provider at its highest "
              "gain", file=sys.stderr)
        return EXIT_INFEASIBLE
    print("case is valid")
    return EXIT_OK


# ------------------------------------------------------------------ solve
def cmd_solve(args) -> int:
    from optreserve.solver.run import solve

    t0 = time.perf_counter()
    out_dir = Path(args.out) if args.out else None
    if out_dir is not None:
        check_out(out_dir, args.force)
    if getattr(args, "report", False) and out_dir is None:
        print("error: --report needs --out DIR (the report is written next to the results)",
              file=sys.stderr)
        return EXIT_INPUT
    case = load_case(args.case)
    _warn(case, args.quiet)
    try:
        result = solve(case, engine=args.engine, time_limit=args.time_limit,
                       mip_gap=args.mip_gap, relax=args.relax, verbose=args.verbose)
    except InfeasibleError as exc:
        if out_dir is not None and exc.diagnosis is not None:
            _write_diagnosis(exc, out_dir, args.force)
            if getattr(args, "report", False):
                path = _solve_report(out_dir, args)
                if not args.quiet:
                    print(f"wrote {path}", file=sys.stderr)
        raise
    if not args.quiet:
        for w in result.solver_warnings:
            print(f"warning: HiGHS: {w}", file=sys.stderr)
    comparison = _compare(case, result) if getattr(args, "compare", None) else None
    report = None
    if out_dir is not None:
        result.write(out_dir, force=args.force)
        report = _solve_report(out_dir, args) if getattr(args, "report", False) else None
    result.timings_s["total"] = time.perf_counter() - t0
    if getattr(args, "json", False):
        doc = dict(result.summary)
        doc["events"] = json.loads(result.events.to_json(orient="records"))
        if comparison is not None:
            doc["comparison"] = comparison.to_json()
        print(json.dumps(doc, indent=2))
    elif not args.quiet:
        _print_result(result, out_dir)
        if comparison is not None:
            print("\n".join(comparison.lines()))
        if report is not None:
            print(f"wrote {report}")
    return EXIT_OK


def _compare(case, result):
    """--compare uniform: the uniform-droop policy against the optimum (compare.py); its
    tables are written with the result."""
    from optreserve.studies.compare import compare_uniform

    cmp = compare_uniform(case, result)
    result.extra_files.update({"comparison.csv": cmp.summary, "comparison.json": cmp.to_json(),
                               "uniform_allocation.csv": cmp.allocation})
    return cmp


def _solve_report(out_dir: Path, args) -> Path:
    from optreserve.output.report import build_report

    return build_report(out_dir, case_dir=args.case)


def _write_diagnosis(exc: InfeasibleError, out_dir: Path, force: bool) -> None:
    """diagnosis.csv, the only file an infeasible run writes (the folder was checked before
    solving, so force only matters for a folder that already holds earlier results)."""
    with staged_output(out_dir, force=True) as tmp:
        write_table(exc.diagnosis, tmp / "diagnosis.csv")


def _paint(text: str, code: str) -> str:
    """ANSI colour on a terminal only (and never with NO_COLOR set)."""
    return f"\033[{code}m{text}\033[0m" if use_colour() else text


def _print_result(result: Result, out_dir: Path | None) -> None:
    s = result.summary
    gap = f", gap {s['mip_gap'] * 100:.3f} %" if s["mip_gap"] is not None else ""
    if s["objective_total"] is not None:
        cost = (f"cost {s['objective_total']:.2f} over {s['periods']} periods "
                f"({s['horizon_hours']:g} h)")
    else:
        cost = f"cost {s['objective_per_h']:.2f} per hour"
    status = _paint(s["status"], "32" if s["status"] == "optimal" else "33")
    print(f"case {s['case']!r}: {status}, {cost}{gap}")
    print(f"{s['units_providing']} of {len(result.case.units)} units provide; peak headroom "
          f"{s['headroom_up_mw']:.1f} MW up, {s['headroom_down_mw']:.1f} MW down")
    ev = result.events.assign(
        margin_hz=result.events["limit_hz"] - result.events["settled_deviation_hz"].abs())
    horizon = "period" in ev.columns
    if horizon:  # one line per event: its tightest period
        ev = ev.loc[ev.groupby("event", sort=False)["margin_hz"].idxmin()]
        print("per event, the period with the least margin:")
    rows = []
    for r in ev.itertuples():
        price = r.marginal_cost_per_mw_h
        rows.append([str(r.event)] + ([str(r.period)] if horizon else []) + [
            str(r.kind), f"{r.size_mw:.1f}", f"{r.settled_frequency_hz:.4f}",
            f"{r.settled_deviation_hz * 1000:+.1f}", f"{r.margin_hz * 1000:.1f}",
            "yes" if r.binding else "", "" if price != price else f"{price:.3f}"])
    head = ["event"] + (["period"] if horizon else []) + [
        "kind", "size MW", "settles Hz", "dev mHz", "margin mHz", "binding", "price /MW/h"]
    off = 1 if horizon else 0
    print(_table(head, rows, {k + off for k in (2, 3, 4, 5, 7)}))
    bl = result.binding_links
    if len(bl):
        shown = [f"{r.link} after {r.event}" + (f" in {r.period}" if horizon else "")
                 + f" ({r.flow_after_mw:+.1f} of {r.limit_mw:.0f} MW)"
                 for r in bl.head(8).itertuples()]
        more = f"; and {len(bl) - 8} more" if len(bl) > 8 else ""
        print("binding links: " + "; ".join(shown) + more)
    else:
        lk = result.links
        if len(lk):
            top = lk.loc[lk["loading_pct"].idxmax()]
            print(f"no link at its limit; highest loading {top['loading_pct']:.1f} % "
                  f"({top['link']} after {top['event']})")
    t = s["timings_s"]
    print("time: " + ", ".join(f"{k} {v:.2f} s" for k, v in t.items()))
    if out_dir is not None:
        extra = " schedule_wide.csv" if result.case.is_horizon else ""
        extra += (" prices.csv" if result.prices is not None else "") + "".join(
            f" {name}" for name in result.extra_files)
        print(f"wrote {out_dir}: allocation.csv events.csv links.csv{extra} summary.json")
    print(CAUTION)


# ------------------------------------------------------------------ generate
def cmd_generate(args) -> int:
    from optreserve.studies.generate import Spec, generate

    out = Path(args.out)
    check_out(out, args.force)
    try:
        spec = Spec(units=args.units, areas=args.areas, links=args.links, periods=args.periods,
                    events=args.events, seed=args.seed)
        generate(spec, out)
    except ValueError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_INPUT
    if not args.quiet:
        print(f"wrote synthetic case to {out} ({args.units} units, {args.areas} areas, "
              f"{args.links} links, {args.periods} periods, {args.events} events, seed "
              f"{args.seed})")
    return EXIT_OK


# ------------------------------------------------------------------ report
def cmd_report(args) -> int:
    from optreserve.output.report import build_report

    path = build_report(args.result, case_dir=args.case)
    if not args.quiet:
        print(f"wrote {path}")
        print(CAUTION)
    return EXIT_OK


def _add_report_parser(sub) -> None:
    r = sub.add_parser("report", help="write a self-contained HTML report of a result folder",
                       description="Write report.html into a result folder: case summary, "
                                   "cost and prices, droop and headroom per unit, droop "
                                   "characteristics, settled frequency and link loading per "
                                   "event, horizon heat maps and any simulation plots. One "
                                   "file, no external assets; it opens offline.")
    r.add_argument("result", metavar="RESULT_DIR", help="folder written by solve --out")
    r.add_argument("--case", metavar="DIR", help="the case folder the result was solved from "
                   "(adds dead bands, load self-regulation and the case settings)")
    r.add_argument("--quiet", action="store_true", help="print nothing on success")
    r.set_defaults(func=cmd_report)


# ------------------------------------------------------------------ retune
def cmd_retune(args) -> int:
    from optreserve.studies.retune import retune

    out_dir = Path(args.out) if args.out else None
    if out_dir is not None:
        check_out(out_dir, args.force)
    case = load_case(args.case)
    _warn(case, args.quiet)
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
            print(f"  {v}")
        if len(prop.violations_before) > 12:
            print(f"  ... and {len(prop.violations_before) - 12} more")
    ch = prop.changed
    if len(ch):
        rows = [[str(r.unit), str(r.area), _pct(r.droop_now_pct), _pct(r.droop_proposed_pct),
                 str(r.change), str(r.reason)] for r in ch.itertuples()]
        print(f"{len(ch)} unit(s) to change, total droop change "
              f"{prop.proposal['droop_change_pct'].sum():.2f} percentage points:")
        print(_table(["unit", "area", "droop now %", "proposed %", "change", "reason"], rows,
                     {2, 3}))
    ba = prop.before_after
    rows = [[str(r.event), f"{r.settled_frequency_before_hz:.4f}",
             f"{r.settled_frequency_after_hz:.4f}", f"{r.margin_before_hz * 1000:.1f}",
             f"{r.margin_after_hz * 1000:.1f}"]
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


def _pct(v) -> str:
    return "off" if v != v else f"{v:g}"


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
    r.set_defaults(func=cmd_retune)


# ------------------------------------------------------------------ simulate
def cmd_simulate(args) -> int:
    from optreserve.dynamics.simulate import read_allocation, simulate

    out_dir = Path(args.out)
    check_out(out_dir, args.force)
    if args.duration is not None and not args.duration > 0.5:
        print("error: --duration must be more than 0.5 s", file=sys.stderr)
        return EXIT_INPUT
    case = load_case(args.case)
    _warn(case, args.quiet)
    allocation = read_allocation(args.allocation, case)
    sim = simulate(case, allocation, events=None if args.all else args.event,
                   period=args.period, duration_s=args.duration)
    sim.write(out_dir, force=args.force)
    if args.quiet:
        return EXIT_OK
    for w in sim.warnings:
        print(f"warning: {w}", file=sys.stderr)
    sm = sim.summary
    ok = {True: "ok", False: "NO", None: "-"}
    rows = [[str(r.event), f"{r.size_mw:+.1f}", f"{r.nadir_hz:.3f}", f"{r.nadir_time_s:.2f}",
             f"{r.rocof_hz_per_s:.3f}", f"{r.rocof_estimate_hz_per_s:.3f}",
             f"{r.settled_frequency_hz:.4f}", ok[r.settled_ok], ok[r.nadir_ok], ok[r.rocof_ok]]
            for r in sm.itertuples()]
    print(f"case {case.name!r}" + (f", period {sim.period}" if sim.period else "")
          + f": {len(sm)} event(s) simulated")
    print(_table(["event", "size MW", "nadir Hz", "at s", "RoCoF Hz/s", "dP fn/2H",
                  "settles Hz", "settled", "nadir", "RoCoF"], rows, set(range(1, 7))))
    broken = int(sm[["settled_ok", "nadir_ok", "rocof_ok"]].eq(False).any(axis=1).sum())
    if broken:
        print(f"{broken} event(s) break a limit in the simulation", file=sys.stderr)
    print(f"wrote {out_dir}: simulation_summary.csv simulation.json and per event series_*.csv "
          "plot_*.png")
    print(CAUTION)
    return EXIT_OK


def _add_simulate_parser(sub) -> None:
    r = sub.add_parser("simulate", help="simulate frequency and tie flows after each event",
                       description="Time-domain check of an allocation: per-area swing "
                                   "equations, a first-order governor lag per unit with dead "
                                   "band and headroom limits, tie-line synchronising power. "
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
    r.set_defaults(func=cmd_simulate)


# ------------------------------------------------------------------ sweep and batch
def cmd_sweep(args) -> int:
    from optreserve.studies.sweep import grid, parse_vary, run_sweep

    check_out(Path(args.out), args.force)
    case = load_case(args.case)
    _warn(case, args.quiet)
    varies = [parse_vary(spec, case) for spec in args.vary]
    grid(varies)  # a bad combination fails here, before any cluster starts
    return _run_study(args, "sweep", case.name, [v.key for v in varies],
                      lambda w, sch, prog: run_sweep(case, varies, workers=w, scheduler=sch,
                                                     progress=prog),
                      {"case_path": str(case.path), "vary": list(args.vary)})


def cmd_batch(args) -> int:
    from optreserve.studies.sweep import case_folders, run_batch

    check_out(Path(args.out), args.force)
    folders = case_folders(Path(args.folder))
    return _run_study(args, "batch", str(args.folder), ["case"],
                      lambda w, sch, prog: run_batch(Path(args.folder), workers=w, scheduler=sch,
                                                     progress=prog),
                      {"cases": [p.name for p in folders]})


def _run_study(args, name, title, keys, run, meta) -> int:
    from optreserve.studies.sweep import ENGINE, default_workers, write_study

    if args.workers is not None and args.workers < 1:
        print("error: --workers must be at least 1", file=sys.stderr)
        return EXIT_INPUT
    workers = None if args.scheduler else (args.workers or default_workers())
    t0 = time.perf_counter()
    table = run(workers, args.scheduler, sys.stderr.isatty() and not args.quiet)
    wall = time.perf_counter() - t0
    meta = {"command": name, "case": title, **meta, "engine": ENGINE,
            "workers": workers, "scheduler": args.scheduler, "wall_s": round(wall, 3)}
    files = write_study(table, Path(args.out), name, keys, meta, force=args.force)
    counts = table["status"].value_counts()
    if not args.quiet:
        where = f"on {args.scheduler}" if args.scheduler else (
            "serially" if workers == 1 else f"on {workers} local workers")
        print(f"{name}: {len(table)} points ("
              + ", ".join(f"{int(n)} {k}" for k, n in counts.items()) + f") in {wall:.1f} s "
              f"{where}")
        print(f"wrote {args.out}: " + " ".join(files))
        print(CAUTION)
    return EXIT_OK if (table["status"] != "error").any() else EXIT_OTHER


def _add_study_parsers(sub) -> None:
    def engine_args(p):
        g = p.add_mutually_exclusive_group()
        g.add_argument("--workers", type=int, metavar="N", help="local worker processes (Dask "
                       "LocalCluster, one thread each); default: the number of CPU cores; 1 "
                       "runs serially in this process")
        g.add_argument("--scheduler", metavar="ADDRESS", help="run on an existing Dask "
                       "cluster, e.g. tcp://10.0.0.5:8786 (its workers need optreserve)")
        p.add_argument("--out", required=True, metavar="DIR", help="folder for the table, the "
                       "plot and the JSON summary")
        p.add_argument("--force", action="store_true", help="write into a non-empty --out "
                       "folder (only optreserve's files change)")
        p.add_argument("--quiet", action="store_true", help="print nothing on success")

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
    engine_args(w)
    w.set_defaults(func=cmd_sweep)

    b = sub.add_parser("batch", help="solve every case folder inside a folder (e.g. one per day)",
                       description="Solve every sub-folder holding a case.toml (sorted by name) "
                                   "and write batch.csv (one row per case) and batch.json; each "
                                   "worker reads its case from the folder.")
    b.add_argument("folder", metavar="DIR", help="folder of case folders")
    engine_args(b)
    b.set_defaults(func=cmd_batch)


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
                        "(Pyomo for small models); default auto")
    s.add_argument("--time-limit", type=float, metavar="S", help="solver time limit, seconds "
                   "(overrides case.toml)")
    s.add_argument("--mip-gap", type=float, metavar="G", help="relative MIP gap (overrides "
                   "case.toml)")
    s.add_argument("--relax", action="store_true", help="solve the LP relaxation (no integer "
                   "participation or droop steps)")
    s.add_argument("--verbose", action="store_true", help="show the HiGHS log")
    s.add_argument("--quiet", action="store_true", help="print nothing on success")
    s.add_argument("--json", action="store_true", help="print the summary and events as JSON "
                   "instead of tables (for scripts)")
    s.add_argument("--report", action="store_true", help="also write report.html into --out "
                   "(see the report command)")
    s.add_argument("--compare", choices=["uniform"], help="also cost the uniform-droop policy "
                   "(one droop for every capable unit; droop_now_pct where given), list the "
                   "limits it breaks and the saving of the optimum; with --out writes "
                   "comparison.csv, comparison.json and uniform_allocation.csv")
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
    g.add_argument("--out", required=True, metavar="DIR", help="folder to write the case into")
    g.add_argument("--force", action="store_true", help="write into a non-empty folder")
    g.add_argument("--quiet", action="store_true", help="print nothing on success")
    g.set_defaults(func=cmd_generate)
    _add_report_parser(sub)
    _add_retune_parser(sub)
    _add_simulate_parser(sub)
    _add_study_parsers(sub)
    return p


def main(argv: list[str] | None = None) -> int:
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
            print(f"error: {p}", file=sys.stderr)
        if as_json:
            print(json.dumps({"status": "input_error", "errors": [
                {"file": p.file, "row": p.row, "column": p.column, "message": p.message}
                for p in exc.problems]}, indent=2))
        return EXIT_INPUT
    except InfeasibleError as exc:
        print(f"infeasible: {exc}", file=sys.stderr)
        for line in exc.shortfalls:
            print(f"  {line}", file=sys.stderr)
        if as_json:
            print(json.dumps({"status": "infeasible", "shortfalls": exc.shortfalls}, indent=2))
        return EXIT_INFEASIBLE
    except OptreserveError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return exc.exit_code
    except BrokenPipeError:  # output piped into head & co.
        return EXIT_OK
    except KeyboardInterrupt:
        print("interrupted; no output written", file=sys.stderr)
        return 130
    except Exception as exc:  # last line of defence: one line, no traceback
        print(f"error: unexpected {type(exc).__name__}: {exc}", file=sys.stderr)
        return EXIT_OTHER

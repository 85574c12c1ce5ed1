"""Commands on one case: check, solve (with --compare and --report), generate, report."""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

from optreserve.case.reader import load_case
from optreserve.cli.common import (
    EXIT_INFEASIBLE,
    EXIT_INPUT,
    EXIT_OK,
    _paint,
    _table,
    _warn,
    clean,
    num,
    plural,
)
from optreserve.errors import InfeasibleError
from optreserve.output.results import CAUTION, Result, write_table
from optreserve.output.staging import check_out, register, staged_output
from optreserve.solver.screen import event_capability, screening_scope
from optreserve.solver.timing import close_total


# ------------------------------------------------------------------ check
def cmd_check(args) -> int:
    case = load_case(args.case)
    _warn(case, args.quiet, getattr(args, "strict", False))
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
    print(f"case {case.name!r}: {plural(len(u), 'unit')} ({int(u['provides'].sum())} may "
          f"provide), {plural(len(case.areas), 'area')}, {plural(len(case.links), 'link')}, "
          f"{plural(len(ev), 'event')} ({n_under} under-frequency, {n_over} over-frequency)")
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
                 f"held for {plural(case.hold_periods, 'period')}") + "; per event its tightest period:")
    rows = []
    for r in cap.itertuples():
        ratio = r.offered_gain_mw_per_hz / r.needed_gain_mw_per_hz if r.needed_gain_mw_per_hz \
            else float("inf")
        rows.append([str(r.event) + (f" @ {r.period}" if hasattr(r, "period") else ""),
                     f"{r.size_mw:.1f}", f"{r.needed_gain_mw_per_hz:.1f}",
                     f"{r.offered_gain_mw_per_hz:.1f}",
                     "ok" if r.short_mw <= 0 else f"SHORT {r.short_mw:.1f} MW",
                     f"{ratio:.2f}"])
    print(_table(["event", "size MW", "needs MW/Hz", "can offer MW/Hz", "status", "ratio"], rows,
                 {1, 2, 3, 5}))
    short = cap[cap["short_mw"] > 0]
    if len(short):
        print(f"{plural(len(short), 'event')} cannot be met even with every provider at its highest "
              "gain", file=sys.stderr)
        return EXIT_INFEASIBLE
    print("case is valid" + screening_scope(case))
    return EXIT_OK


# ------------------------------------------------------------------ solve
def cmd_solve(args) -> int:
    from optreserve.solver.run import solve

    t0 = time.perf_counter()
    out_dir = Path(args.out) if args.out else None
    if out_dir is not None:
        check_out(out_dir, args.force, inputs=[args.case], command="solve")
    if getattr(args, "report", False) and out_dir is None:
        print("error: --report needs --out DIR (the report is written next to the results)",
              file=sys.stderr)
        return EXIT_INPUT
    step = getattr(args, "price_step", None)
    if step is not None and not (step > 0 and step < float("inf")):
        print(f"error: --price-step must be a positive number of MW, got {step:g}",
              file=sys.stderr)
        return EXIT_INPUT
    if getattr(args, "workers", None) is not None and args.workers < 1:
        print("error: --workers must be at least 1", file=sys.stderr)
        return EXIT_INPUT
    case = load_case(args.case)
    _warn(case, args.quiet, getattr(args, "strict", False))
    try:
        result = solve(case, engine=args.engine, time_limit=args.time_limit,
                       mip_gap=args.mip_gap, relax=args.relax, verbose=args.verbose,
                       incremental=not (getattr(args, "no_incremental", False) or args.relax),
                       price_step=getattr(args, "price_step", None),
                       workers=getattr(args, "workers", None),
                       scheduler=getattr(args, "scheduler", None))
    except InfeasibleError as exc:
        if out_dir is not None and exc.diagnosis is not None:
            _write_diagnosis(exc, out_dir, args.force)
            if getattr(args, "report", False):
                path = _solve_report(out_dir, args)
                if not args.quiet and path is not None:
                    print(f"wrote {path}", file=sys.stderr)
        raise
    if not args.quiet:
        for w in result.solver_warnings:
            print(clean(f"warning: HiGHS: {w}"), file=sys.stderr)
    comparison = None
    if getattr(args, "compare", None):
        t_cmp = time.perf_counter()
        comparison = _compare(case, result)
        result.timings_s["compare"] = time.perf_counter() - t_cmp
    # the command's own wall time is the total summary.json records and `time:` prints
    close_total(result.timings_s, time.perf_counter() - t0)
    report = None
    if out_dir is not None:
        result.write(out_dir, force=args.force)
        report = _solve_report(out_dir, args) if getattr(args, "report", False) else None
    if getattr(args, "json", False):
        doc = dict(result.summary)
        doc["events"] = json.loads(result.events.to_json(orient="records"))
        if comparison is not None:
            doc["comparison"] = comparison.to_json()
        print(json.dumps(doc, indent=2))
    elif not args.quiet:
        _print_result(result, out_dir)
        if comparison is not None:
            print(clean("\n".join(comparison.lines())))
        if report is not None:
            print(f"wrote {report}")
    if result.status == "nadir_unconfirmed":  # exit 6: the allocation is not confirmed
        from optreserve.cli.common import EXIT_NADIR_UNCONFIRMED
        print(f"warning: nadir not confirmed: the allocation's worst simulated dip is "
              f"{result.nadir_check['worst_hz']:.3f} Hz against the limit of "
              f"{case.limits.max_nadir_deviation_hz:g} Hz", file=sys.stderr)
        return EXIT_NADIR_UNCONFIRMED
    return EXIT_OK


def _compare(case, result):
    """--compare uniform: the uniform-droop policy against the optimum (compare.py); its
    tables are written with the result."""
    from optreserve.studies.compare import compare_uniform

    cmp = compare_uniform(case, result)
    result.extra_files.update({"comparison.csv": cmp.summary, "comparison.json": cmp.to_json(),
                               "uniform_allocation.csv": cmp.allocation})
    return cmp


def _solve_report(out_dir: Path, args) -> Path | None:
    """report.html beside the results; a report that fails is a warning (the result files
    are complete without it)."""
    from optreserve.output.plot_style import literal_text
    from optreserve.output.report import REPORT_NAME, build_report

    try:
        with literal_text():
            path = build_report(out_dir, case_dir=args.case)
    except Exception as exc:
        print(f"warning: report.html not written: {type(exc).__name__}: {exc}".splitlines()[0],
              file=sys.stderr)
        return None
    register(out_dir, [REPORT_NAME])
    return path


def _write_diagnosis(exc: InfeasibleError, out_dir: Path, force: bool) -> None:
    """diagnosis.csv, the only file an infeasible run writes (the folder was checked before
    solving, so force only matters for a folder that already holds earlier results)."""
    with staged_output(out_dir, force=True) as tmp:
        write_table(exc.diagnosis, tmp / "diagnosis.csv")


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
    print(f"{s['units_providing']} of {plural(len(result.case.units), 'unit')} provide; peak "
          "headroom "
          f"{s['headroom_up_mw']:.1f} MW up, {s['headroom_down_mw']:.1f} MW down")
    ev = result.events.assign(
        margin_hz=result.events["limit_hz"] - result.events["settled_deviation_hz"].abs())
    horizon = "period" in ev.columns
    if horizon:  # one line per event: its tightest period
        ev = ev.loc[ev.groupby("event", sort=False)["margin_hz"].idxmin()]
        print("per event, the period with the least margin:")
    rows = []
    inc = "incremental_cost_per_mw_h" in ev.columns
    for r in ev.itertuples():
        price = r.marginal_cost_per_mw_h
        rows.append([str(r.event)] + ([str(r.period)] if horizon else []) + [
            str(r.kind), f"{r.size_mw:.1f}", f"{r.settled_frequency_hz:.4f}",
            num(r.settled_deviation_hz * 1000, 1, sign=True), num(r.margin_hz * 1000),
            "yes" if r.binding else "", "n/a" if price != price else f"{price:.3f}"]
            + ([_price_text(r.incremental_cost_per_mw_h)] if inc else []))
    head = ["event"] + (["period"] if horizon else []) + [
        "kind", "size MW", "settles Hz", "dev mHz", "margin mHz", "binding", "marginal /MW/h"
    ] + (["incremental /MW/h"] if inc else [])
    off = 1 if horizon else 0
    print(_table(head, rows, {k + off for k in (2, 3, 4, 5, 7, 8)}))
    print(_price_legend(ev, inc))
    bl = result.binding_links
    if len(bl):
        shown = [f"{r.link} after {r.event}" + (f" in {r.period}" if horizon else "")
                 + f" ({r.flow_after_mw:+.1f} of {r.limit_mw:.0f} MW)"
                 for r in bl.head(8).itertuples()]
        more = f"; and {len(bl) - 8} more" if len(bl) > 8 else ""
        print(clean("binding links: " + "; ".join(shown) + more))
    else:
        lk = result.links
        if len(lk):
            top = lk.loc[lk["loading_pct"].idxmax()]
            print(clean(f"no link at its limit; highest loading {top['loading_pct']:.1f} % "
                        f"({top['link']} after {top['event']})"))
    t = s["timings_s"]
    print("time: " + ", ".join(f"{k} {v:.2f} s" for k, v in t.items()))
    if out_dir is not None:
        extra = " schedule_wide.csv" if result.case.is_horizon else ""
        extra += (" prices.csv" if result.prices is not None else "") + "".join(
            f" {name}" for name in result.extra_files)
        print(f"wrote {out_dir}: allocation.csv events.csv links.csv{extra} summary.json")
    print(CAUTION)


def _price_text(v: float) -> str:
    return "n/a" if v != v else ("no allocation" if v == float("inf") else f"{v:.3f}")


def _price_legend(ev, inc: bool) -> str:
    """Which price is which (docs/formulation.md, "Two prices on droop-step cases")."""
    text = ("marginal: dual of the event's rows with every participation and droop step held "
            "(one more MW at today's steps)")
    if ev["marginal_cost_per_mw_h"].isna().any():
        text += "; n/a: no row of that event is tight, so the dual says nothing"
    if inc:
        text += ("; incremental: cost of a larger event (+price step) with steps re-optimised, "
                 "per MW and hour")
    return text


# ------------------------------------------------------------------ generate
def cmd_generate(args) -> int:
    from optreserve.studies.generate import Spec, generate

    out = Path(args.out)
    check_out(out, args.force)
    try:
        spec = Spec(units=args.units, areas=args.areas, links=args.links, periods=args.periods,
                    events=args.events, seed=args.seed, days=getattr(args, "days", 1),
                    hold_periods=getattr(args, "hold_periods", None),
                    parquet=getattr(args, "parquet", False))
        with staged_output(out, args.force, group="case") as tmp:  # all files or none
            generate(spec, tmp)
    except ValueError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_INPUT
    if not args.quiet:
        days = f" x {plural(spec.days, 'day')}" if spec.days > 1 else ""
        print(f"wrote synthetic case to {out} ({plural(args.units, 'unit')}, "
              f"{plural(args.areas, 'area')}, {plural(args.links, 'link')}, "
              f"{plural(args.periods, 'period')}{days}, {plural(args.events, 'event')}, seed "
              f"{args.seed})")
    return EXIT_OK


# ------------------------------------------------------------------ report
def cmd_report(args) -> int:
    from optreserve.output.plot_style import literal_text
    from optreserve.output.report import REPORT_NAME, build_report

    with literal_text():
        path = build_report(args.result, case_dir=args.case)
    try:  # the report is complete; a read-only manifest only means a later --force keeps it
        register(args.result, [REPORT_NAME])
    except OSError:
        pass
    if not args.quiet:
        print(f"wrote {path}")
        print(CAUTION)
    return EXIT_OK


def _add_report_parser(sub) -> None:
    r = sub.add_parser("report", help="write a self-contained HTML report of a result folder",
                       description="Write report.html into a result folder: case summary, "
                                   "cost and prices, droop and headroom per unit, droop "
                                   "characteristics, settled frequency and link loading per "
                                   "event, horizon heat maps, a retune folder's proposal and "
                                   "any simulation results (with transient tie loading). One "
                                   "file, no external assets; it opens offline.")
    r.add_argument("result", metavar="RESULT_DIR", help="folder written by solve --out")
    r.add_argument("--case", metavar="DIR", help="the case folder the result was solved from "
                   "(adds dead bands, load self-regulation and the case settings)")
    r.add_argument("--quiet", action="store_true", help="print nothing on success")
    r.set_defaults(func=cmd_report)

"""What the report shows, prepared in Python: the header tiles, and per section its facts,
tables and figures (plain values and text; the template does all markup and escaping).

Sections: case, retune proposal (a retune folder), cost and prices, units, droop
characteristics, events, tie lines, horizon, simulation, diagnosis (an infeasible folder).
page() assembles them in page order; templates/report.html.j2 lays them out.
"""

from __future__ import annotations

from datetime import UTC, datetime

import numpy as np
import pandas as pd
from markupsafe import Markup

from optreserve import __version__
from optreserve.output import plots
from optreserve.output.curves import damping_mw_per_hz, uniq
from optreserve.output.folder import ResultFolder
from optreserve.output.report_sections import (
    section_events,
    section_links,
    section_retune,
    section_simulation,
    section_units,
)
from optreserve.output.report_tables import Col, fmt, generic_cols, table
from optreserve.output.results import CAUTION

LONG_CAUTION = ("The results depend on the data and on the simplifications stated in "
                "docs/formulation.md (a quasi-steady-state settled point, DC tie flows). The "
                "applicable grid code, the system operator and licensed engineers decide the "
                "actual governor settings, reserve holdings and operating limits.")


def _figure(svg_cap, fid: str) -> dict | None:
    if svg_cap is None:
        return None
    svg, cap = svg_cap
    return {"id": fid, "svg": Markup(svg), "caption": cap}  # our own SVG: inlined as it is


def _tile(label: str, value: str, sub=(), tone: str = "") -> dict:
    """sub: (text, breakable) parts; breakable text may wrap after _ and - (long ids)."""
    return {"label": label, "value": value, "sub": list(sub), "tone": tone}


def _title(rf: ResultFolder) -> str:
    s = rf.summary or {}
    return s.get("case") or (rf.case.name if rf.case is not None else rf.folder.name)


def header(rf: ResultFolder) -> dict:
    s = rf.summary or {}
    tiles = []
    if rf.solved:
        status = str(s.get("status"))
        gap = s.get("mip_gap")
        tiles.append(_tile("status", status, [(f"MIP gap {gap * 100:.3f} %", False)]
                           if gap is not None else [], "good" if status == "optimal"
                           else "warn"))
        if s.get("objective_total") is not None:
            tiles.append(_tile("headroom cost", f"{s['objective_total']:,.2f}",
                               [((f"over {s.get('periods')} periods "
                                 f"({s.get('horizon_hours', 0):g} h)"), False)]))
        elif s.get("objective_per_h") is not None:
            tiles.append(_tile("headroom cost", f"{s['objective_per_h']:,.2f}",
                               [("per hour", False)]))
        tiles.append(_tile("peak headroom", f"{fmt(s.get('headroom_up_mw'), ',.0f')} / "
                           f"{fmt(s.get('headroom_down_mw'), ',.0f')}",
                           [("MW up / down", False)]))
        n_units = rf.allocation["unit"].nunique()
        tiles.append(_tile("units providing", f"{s.get('units_providing', '–')} / {n_units}"))
        ev = rf.events
        if len(ev):
            margin = (ev["limit_hz"] - ev["settled_deviation_hz"].abs()) * 1000
            k = int(np.argmin(margin.to_numpy()))
            tiles.append(_tile("least margin", f"{margin.iloc[k]:.1f} mHz",
                               [(ev["event"].iloc[k], True)]
                               + ([(f" @ {ev['period'].iloc[k]}", False)] if rf.horizon
                                  else []), "warn" if ev["binding"].any() else ""))
        lk = rf.links
        if len(lk):
            k = int(np.argmax(lk["loading_pct"].to_numpy()))
            top = lk["loading_pct"].iloc[k]
            tiles.append(_tile("highest link loading", f"{top:.1f} %",
                               [(lk["link"].iloc[k], True), (" after ", False),
                                (lk["event"].iloc[k], True)], "warn" if top >= 99.99 else ""))
    else:
        tiles.append(_tile("status", "infeasible", [("no allocation meets the limits", False)],
                           "bad"))
    sim = rf.simulation
    if sim is not None and "max_link_loading_pct" in sim.columns and len(sim) \
            and pd.api.types.is_numeric_dtype(sim["max_link_loading_pct"]) \
            and sim["max_link_loading_pct"].notna().any():
        k = int(np.nanargmax(sim["max_link_loading_pct"].to_numpy(float)))
        top = float(sim["max_link_loading_pct"].iloc[k])
        sub = ([(str(sim["max_loading_link"].iloc[k]), True), (" during ", False)]
               if "max_loading_link" in sim.columns else [])
        tiles.append(_tile("transient tie loading", f"{top:.1f} %",
                           sub + [(str(sim["event"].iloc[k]) if "event" in sim.columns
                                   else "", True)], "bad" if top > 100 else ""))
    return {"name": _title(rf), "folder": str(rf.folder),
            "case_dir": str(rf.case_dir) if rf.case_dir is not None else None,
            "when": datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC"), "tiles": tiles}


def _facts(pairs: list) -> list:
    return [(k, str(v)) for k, v in pairs if v not in (None, "")]


def section_case(rf: ResultFolder) -> dict:
    s = rf.summary or {}
    pairs = [("case", s.get("case") or (rf.case.name if rf.case else ""))]
    if rf.solved:
        a, ev, lk = rf.allocation, rf.events, rf.links
        first = ev.drop_duplicates("event")["size_mw"]
        pairs += [("units", f"{a['unit'].nunique()} ({s.get('units_providing', '–')} provide)"),
                  ("areas", str(a["area"].nunique())),
                  ("links", str(lk["link"].nunique())),
                  ("events", (f"{ev['event'].nunique()} ({int((first > 0).sum())} "
                             f"under-frequency, {int((first < 0).sum())} over-frequency)")),
                  ("periods", f"{s.get('periods', 1)} ({s.get('horizon_hours', 1):g} h)"
                   if rf.horizon else "snapshot")]
    c = rf.case
    if c is not None:
        lim = c.limits
        pairs += [("nominal frequency", f"{c.nominal_frequency_hz:g} Hz"),
                  ("settled limit", f"±{lim.max_settled_deviation_hz * 1000:g} mHz"),
                  ("full activation at", f"±{lim.full_activation_deviation_hz * 1000:g} mHz"),
                  ("droop", "steps " + ", ".join(f"{x:g}" for x in c.droop.steps_pct) + " %"
                   if c.droop.steps_pct else "continuous inside each unit's band"),
                  ("change penalty", f"{c.droop.change_penalty_per_unit:g} per unit"
                   if c.droop.change_penalty_per_unit else "")]
        if c.is_horizon:
            pairs.append(("droop held for", "the whole horizon" if c.hold_periods is None
                          else f"{c.hold_periods} period(s)"))
    elif rf.solved:
        lim = float(rf.events["limit_hz"].max()) * 1000 if len(rf.events) else None
        pairs += [("nominal frequency", f"{rf.nominal_hz:g} Hz (from events.csv)"),
                  ("settled limit", f"±{lim:g} mHz" if lim is not None else "")]
    if s:
        solver = s.get("solver") or {}
        pairs += [("solver", (f"{solver.get('name', s.get('solver_name', ''))} "
                             f"{solver.get('version', s.get('solver_version', ''))} via "
                             f"{solver.get('interface', '?')}")),
                  ("dead-band iterations", s.get("dead_band_iterations", "")),
                  ("verification", _verification_text(s.get("verification") or {})),
                  ("timings", ", ".join(f"{k} {v:.2f} s" for k, v in
                                        (s.get("timings_s") or {}).items()
                                        if isinstance(v, (int, float)))),
                  ("written by", f"optreserve {s.get('optreserve_version', '?')}")]
    warnings = [str(w) for w in (s.get("warnings") or []) + (s.get("solver_warnings") or [])]
    return {"facts": _facts(pairs), "areas": _areas_table(rf) if rf.solved else None,
            "warnings": warnings}


def _verification_text(v: dict) -> str:
    fz = v.get("max_frequency_disagreement_hz")
    fl = v.get("max_flow_disagreement_mw")
    if fz is None and fl is None:
        return ""
    return (f"independent recalculation agrees to {fmt(fz, '.1e')} Hz and {fmt(fl, '.1e')} MW "
            "(tolerance 0.5 mHz, 0.5 MW)")


def _areas_table(rf: ResultFolder) -> dict:
    a = rf.allocation
    areas = uniq(a["area"])
    g = a.assign(n=a["provides"].astype(int))
    keys = ["period", "area"] if rf.horizon else ["area"]
    per = g.groupby(keys, sort=False)[["n", "gain_mw_per_hz", "headroom_up_mw",
                                       "headroom_down_mw", "cost_per_h"]].sum()
    if rf.horizon:
        agg = per.groupby(level="area", sort=False).agg(
            {"n": "max", "gain_mw_per_hz": "max", "headroom_up_mw": "max",
             "headroom_down_mw": "max", "cost_per_h": "mean"})
    else:
        agg = per
    df = agg.reindex(areas).reset_index()
    pk = "peak " if rf.horizon else ""
    cols = [Col("area", "area"), Col("n", pk + "units providing", "d"),
            Col("gain_mw_per_hz", pk + "gain", ",.1f", "MW/Hz"),
            Col("headroom_up_mw", pk + "headroom up", ",.1f", "MW"),
            Col("headroom_down_mw", pk + "headroom down", ",.1f", "MW"),
            Col("cost_per_h", ("mean " if rf.horizon else "") + "cost", ",.2f", "per h")]
    if rf.case is not None:
        ca = rf.case.areas.set_index("area")
        df["load_mw"] = df["area"].map(ca["load_mw"])
        df["damping"] = df["area"].map(damping_mw_per_hz(rf, None))
        cols += [Col("load_mw", "load" + (" (base)" if rf.horizon else ""), ",.0f", "MW"),
                 Col("damping", "load self-regulation", ",.1f", "MW/Hz")]
    return table(df, cols, "areas-table")


INCREMENTAL = "incremental_cost_per_mw_h"


def section_cost(rf: ResultFolder) -> dict:
    s = rf.summary or {}
    ev = rf.events
    pairs = []
    if s.get("objective_total") is not None:
        pairs.append(("headroom cost", f"{s['objective_total']:,.2f} over the horizon"))
    elif s.get("objective_per_h") is not None:
        pairs.append(("headroom cost", f"{s['objective_per_h']:,.2f} per hour"))
    if s.get("change_penalty"):
        pairs.append(("droop change penalty", f"{s['change_penalty']:,.2f}"))
        if s.get("objective_with_penalty") is not None:
            pairs.append(("objective with penalty", f"{s['objective_with_penalty']:,.2f}"))
    price = ev["marginal_cost_per_mw_h"]
    has_inc = INCREMENTAL in ev.columns
    shown = (price.fillna(0) != 0) | ev["binding"]
    if has_inc:
        shown |= ev[INCREMENTAL].fillna(0) != 0
    priced = ev[shown]
    why = ("The marginal cost is the extra headroom cost per hour if the event were 1 MW "
           "larger, with participation and droop steps held as chosen. It is zero when the "
           "event is not at its limit, and always zero when droop is restricted to steps.")
    if has_inc:
        why = ("Two prices. The marginal cost is the extra headroom cost per hour if the event "
               "were 1 MW larger, with participation and droop steps held as chosen (the dual "
               "of the problem with those integer choices fixed); it is zero when the event is "
               "not at its limit, and blank where that fixed problem says nothing, as with "
               "droop steps. The incremental cost re-solves the whole problem, participation "
               "and steps free, with the event grown by the price step: what one more MW of "
               "the event costs per hour when the allocation may change to carry it.")
    elif price.isna().any():
        why += (" A blank marginal cost means the problem with participation and droop steps "
                "fixed says nothing about that event.")
    elif rf.case is not None and rf.case.droop.steps_pct:
        why += " This case uses droop steps, so every price here is zero."
    prices = None
    if len(priced):
        cols = [Col("event", "event")] + ([Col("period", "period")] if rf.horizon else []) + [
            Col("size_mw", "size", ",.1f", "MW"), Col("binding", "binding", "bool"),
            Col("marginal_cost_per_mw_h", "marginal cost", ",.3f", "per MW·h")]
        if has_inc:
            cols.append(Col(INCREMENTAL, "incremental cost", ",.3f", "per MW·h"))
        prices = table(priced.reset_index(drop=True), cols, "prices-table")
    area_prices = None
    if rf.prices is not None and len(rf.prices):
        pr = rf.prices
        area_prices = {"table": table(pr, generic_cols(pr), "area-prices-table", tall=True),
                       "rows": len(pr), "fold": len(pr) > 12}
    return {"facts": _facts(pairs), "figure": _figure(plots.plot_area_costs(rf), "fig-areas"),
            "why": why, "prices": prices, "area_prices": area_prices}


def section_horizon(rf: ResultFolder) -> dict:
    return {"figures": [f for f in (_figure(plots.plot_heatmap(rf), "fig-heatmap"),
                                    _figure(plots.plot_period_costs(rf), "fig-period-costs"))
                        if f is not None]}


def section_diagnosis(rf: ResultFolder) -> dict:
    d = rf.diagnosis
    cols = [Col("family", "family"), Col("element", "element"), Col("event", "event")] + (
        [Col("period", "period")] if "period" in d.columns else []) + [
        Col("short_mw", "short", ",.2f", "MW"), Col("excess_hz", "beyond limit", ".4f", "Hz"),
        Col("over_mw", "over limit", ",.3f", "MW")]
    return {"table": table(d, cols, "diagnosis-table")}


def page(rf: ResultFolder) -> dict:
    """Everything the template needs, in page order."""
    sections = []

    def add(kind, title, data, warn=False):
        sections.append({"kind": kind, "title": title, "data": data, "warn": warn})

    if rf.solved:
        add("case", "Case", section_case(rf))
        if rf.proposal is not None:
            add("retune", "Retune proposal", section_retune(rf))
        add("cost", "Cost and prices", section_cost(rf))
        add("units", "Units", section_units(rf))
        add("droop", "Droop characteristics",
            {"figure": _figure(plots.plot_characteristics(rf), "fig-droop")})
        add("events", "Events", section_events(rf, _figure(plots.plot_events(rf),
                                                            "fig-events")))
        add("links", "Tie lines", section_links(rf, _figure(plots.plot_links(rf),
                                                             "fig-links")))
        if rf.horizon:
            add("horizon", "Over the horizon", section_horizon(rf))
    else:
        add("diagnosis", "Diagnosis", section_diagnosis(rf), warn=True)
        add("case", "Case", section_case(rf))
    if rf.simulation is not None or rf.sim_images:
        add("simulation", "Simulation", section_simulation(rf))
    add("caution", "Caution", {"text": LONG_CAUTION}, warn=True)
    return {"title": _title(rf), "header": header(rf), "notes": list(rf.notes),
            "sections": sections, "version": __version__, "caution": CAUTION}

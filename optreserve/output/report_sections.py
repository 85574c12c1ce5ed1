"""The report's row-heavy sections, prepared in Python (plain values; the template does the
markup): units, events, tie lines, simulation and a retune folder's proposal."""

from __future__ import annotations

import pandas as pd

from optreserve.output.folder import ResultFolder
from optreserve.output.report_tables import Col, generic_cols, table

# Tables longer than this are summarised on the page (the CSV holds every row).
FULL_TABLE_MAX_ROWS = 3000


def _unit_table_frame(rf: ResultFolder) -> tuple[pd.DataFrame, list]:
    a = rf.allocation
    if not rf.horizon:
        df = a.copy()
        cols = [Col("unit", "unit"), Col("area", "area"), Col("provides", "provides", "bool"),
                Col("droop_pct", "droop", ".2f", "%"),
                Col("gain_mw_per_hz", "gain", ",.1f", "MW/Hz"),
                Col("headroom_up_mw", "headroom up", ",.1f", "MW"),
                Col("headroom_down_mw", "headroom down", ",.1f", "MW"),
                Col("cost_per_h", "cost", ",.2f", "per h")]
    else:
        g = a.groupby("unit", sort=False)
        df = pd.DataFrame({"unit": a["unit"].drop_duplicates().to_numpy()})
        agg = g.agg(area=("area", "first"), periods_on=("provides", "sum"),
                    droop_min=("droop_pct", "min"), droop_max=("droop_pct", "max"),
                    gain_max=("gain_mw_per_hz", "max"), up=("headroom_up_mw", "max"),
                    dn=("headroom_down_mw", "max"), cost=("cost_per_h", "mean"))
        df = agg.reindex(df["unit"]).reset_index()
        df["droop_text"] = [("" if pd.isna(lo) else f"{lo:.2f}" if abs(hi - lo) < 1e-9
                             else f"{lo:.2f}–{hi:.2f}")
                            for lo, hi in zip(df["droop_min"], df["droop_max"])]
        T = len(rf.periods)
        cols = [Col("unit", "unit"), Col("area", "area"),
                Col("periods_on", "periods providing", "d", f"of {T}"),
                Col("droop_text", "droop range", "text", "%"),
                Col("gain_max", "peak gain", ",.1f", "MW/Hz"),
                Col("up", "peak headroom up", ",.1f", "MW"),
                Col("dn", "peak headroom down", ",.1f", "MW"),
                Col("cost", "mean cost", ",.2f", "per h")]
        if rf.case is not None:
            hours = dict(zip([str(p) for p in rf.case.periods], rf.case.hours()))
            w = a["period"].map(lambda p: hours[str(p)]).to_numpy(float)
            tot = (a.assign(c=a["cost_per_h"].to_numpy(float) * w)
                   .groupby("unit", sort=False)["c"].sum())
            df["cost_total"] = df["unit"].map(tot)
            cols.append(Col("cost_total", "cost over horizon", ",.2f"))
    if rf.case is not None:
        cu = rf.case.units.set_index("unit")
        df["capacity_mw"] = df["unit"].map(cu["capacity_mw"])
        df["band"] = [f"{lo:g}–{hi:g}" for lo, hi in
                      zip(df["unit"].map(cu["droop_min_pct"]), df["unit"].map(cu["droop_max_pct"]))]
        df["droop_now_pct"] = df["unit"].map(cu["droop_now_pct"])
        df["deadband_mhz"] = df["unit"].map(cu["deadband_mhz"])
        cols += [Col("capacity_mw", "capacity", ",.0f", "MW", True),
                 Col("band", "droop band", "text", "%", True)]
        if df["droop_now_pct"].notna().any():  # optional in the case: only when given
            cols.append(Col("droop_now_pct", "droop now", ".2f", "%", True))
        cols.append(Col("deadband_mhz", "dead band", ".0f", "mHz", True))
    return df, cols


def section_units(rf: ResultFolder) -> dict:
    df, cols = _unit_table_frame(rf)
    lead = ("Per generating unit: the droop setting and the headroom it holds back for primary "
            "response. Click a column heading to sort; type to filter."
            + (" Shaded headings are inputs from the case folder." if rf.case is not None
               else ""))
    if rf.horizon:
        lead += (" For a horizon each row sums up the unit's periods; the full per-period "
                 "schedule is below the table and in allocation.csv.")
    out = {"lead": lead, "table": table(df, cols, "units-table", on=df["provides"]
                                        if "provides" in df else df["periods_on"] > 0,
                                        tall=True),
           "full": None, "full_rows": 0}
    if rf.horizon:
        a = rf.allocation
        out["full_rows"] = len(a)
        if len(a) <= FULL_TABLE_MAX_ROWS:
            full = [Col("unit", "unit"), Col("area", "area"), Col("period", "period"),
                    Col("provides", "provides", "bool"), Col("droop_pct", "droop", ".2f", "%"),
                    Col("gain_mw_per_hz", "gain", ",.1f", "MW/Hz"),
                    Col("headroom_up_mw", "headroom up", ",.1f", "MW"),
                    Col("headroom_down_mw", "headroom down", ",.1f", "MW"),
                    Col("cost_per_h", "cost", ",.2f", "per h")]
            out["full"] = table(a, full, "alloc-table", on=a["provides"], tall=True)
    return out


def section_events(rf: ResultFolder, figure: dict | None) -> dict:
    ev = rf.events.assign(
        dev_mhz=rf.events["settled_deviation_hz"] * 1000,
        limit_mhz=rf.events["limit_hz"] * 1000,
        margin_mhz=(rf.events["limit_hz"] - rf.events["settled_deviation_hz"].abs()) * 1000)
    cols = [Col("event", "event")] + ([Col("period", "period")] if rf.horizon else []) + [
        Col("kind", "kind"), Col("area", "area"), Col("size_mw", "size", ",.1f", "MW"),
        Col("settled_frequency_hz", "settles at", ".4f", "Hz"),
        Col("dev_mhz", "deviation", "+.1f", "mHz"), Col("limit_mhz", "limit", ".0f", "mHz"),
        Col("margin_mhz", "margin", ".1f", "mHz"), Col("binding", "binding", "bool"),
        Col("marginal_cost_per_mw_h", "marginal cost", ",.3f", "per MW·h")]
    if "incremental_cost_per_mw_h" in ev.columns:
        cols.append(Col("incremental_cost_per_mw_h", "incremental cost", ",.3f", "per MW·h"))
    out = {"figure": figure, "horizon": rf.horizon, "all": None, "all_rows": len(ev)}
    if rf.horizon:
        worst = ev.loc[ev.groupby("event", sort=False)["margin_mhz"].idxmin()]
        out["table"] = table(worst.reset_index(drop=True), cols, "events-table",
                             hot=worst["binding"])
        if len(ev) <= FULL_TABLE_MAX_ROWS:
            out["all"] = table(ev, cols, "events-all", hot=ev["binding"], tall=True)
    else:
        out["table"] = table(ev, cols, "events-table", hot=ev["binding"])
    return out


def section_links(rf: ResultFolder, figure: dict | None) -> dict:
    lk = rf.links
    if not len(lk):
        return {"none": True}
    cols = [Col("link", "link"), Col("event", "event")] + (
        [Col("period", "period")] if rf.horizon else []) + [
        Col("flow_before_mw", "flow before", ",.1f", "MW"),
        Col("flow_after_mw", "flow after", ",.1f", "MW"),
        Col("limit_mw", "limit", ",.0f", "MW"), Col("loading_pct", "loading", ".1f", "%")]
    at = (lk["limit_mw"] - lk["flow_after_mw"].abs()) <= 1e-2
    out = {"none": False, "figure": figure, "horizon": rf.horizon, "all": None,
           "all_rows": len(lk)}
    if rf.horizon:
        worst = lk.loc[lk.groupby(["link", "event"], sort=False)["loading_pct"].idxmax()]
        wat = (worst["limit_mw"] - worst["flow_after_mw"].abs()) <= 1e-2
        out["table"] = table(worst.reset_index(drop=True), cols, "links-table", hot=wat,
                             warm=worst["loading_pct"] >= 90, tall=True)
        if len(lk) <= FULL_TABLE_MAX_ROWS:
            out["all"] = table(lk, cols, "links-all", hot=at, warm=lk["loading_pct"] >= 90,
                               tall=True)
    else:
        out["table"] = table(lk, cols, "links-table", hot=at, warm=lk["loading_pct"] >= 90,
                             tall=True)
    return out


def _transient_ties(sim: pd.DataFrame) -> dict | None:
    """The highest tie loading each simulated event reaches during the swing, when the
    simulation summary has it (max_link_loading_pct; link_ok when the simulator flags it)."""
    if "max_link_loading_pct" not in sim.columns \
            or not pd.api.types.is_numeric_dtype(sim["max_link_loading_pct"]):
        return None
    keep = [c for c in ("event", "period", "max_loading_link", "max_link_loading_pct",
                        "link_ok") if c in sim.columns]
    df = sim[keep].reset_index(drop=True)
    over = df["max_link_loading_pct"].to_numpy(float) > 100.0
    if "link_ok" in df.columns and pd.api.types.is_bool_dtype(df["link_ok"]):
        over |= ~df["link_ok"].to_numpy(bool)
    heads = {"event": Col("event", "event"), "period": Col("period", "period"),
             "max_loading_link": Col("max_loading_link", "most loaded link"),
             "max_link_loading_pct": Col("max_link_loading_pct", "highest loading", ".1f",
                                         "%"),
             "link_ok": Col("link_ok", "within limit", "yesno")}
    cols = [heads[c] if c != "link_ok" or pd.api.types.is_bool_dtype(df[c])
            else Col(c, "within limit") for c in keep]
    return {"table": table(df, cols, "transient-ties-table", hot=over,
                           warm=df["max_link_loading_pct"].to_numpy(float) >= 90),
            "over": int(over.sum())}


def _transient_links(lk: pd.DataFrame | None) -> dict | None:
    """simulation_links.csv: every link after every simulated event, red above its limit."""
    if lk is None or not len(lk) or "max_loading_pct" not in lk.columns \
            or not pd.api.types.is_numeric_dtype(lk["max_loading_pct"]):
        return None
    over = lk["max_loading_pct"].to_numpy(float) > 100.0
    if "link_ok" in lk.columns and pd.api.types.is_bool_dtype(lk["link_ok"]):
        over |= ~lk["link_ok"].to_numpy(bool)
    return {"table": table(lk, generic_cols(lk), "transient-links-table", hot=over,
                           warm=lk["max_loading_pct"].to_numpy(float) >= 90, tall=True),
            "rows": len(lk)}


def section_simulation(rf: ResultFolder) -> dict:
    out = {"table": None, "checks": [], "images": [], "ties": None, "links": None,
           "file": rf.simulation_file}
    if rf.simulation is not None:
        sim = rf.simulation
        checks = [c for c in sim.columns
                  if str(c).endswith("_ok") and pd.api.types.is_bool_dtype(sim[c])]
        failed = ~sim[checks].all(axis=1).to_numpy() if checks else None
        out["table"] = table(sim, generic_cols(sim), "simulation-table", hot=failed)
        out["checks"] = [str(c) for c in checks]
        out["ties"] = _transient_ties(sim)
    out["links"] = _transient_links(rf.simulation_links)
    out["images"] = [(name, data) for name, data in rf.sim_images]
    return out


def section_retune(rf: ResultFolder) -> dict:
    """proposal.csv (every unit, changed ones marked) and the figures of retune.json."""
    pr = rf.proposal
    r = rf.retune or {}
    facts = []
    if "already_safe" in r:
        facts.append(("today's settings", "meet every limit" if r["already_safe"]
                      else "break a limit"))
    if r.get("units_changed") is not None:
        facts.append(("units changed", f"{int(r['units_changed'])} of {len(pr)}"))
    if r.get("total_droop_change_pct") is not None:
        facts.append(("total droop change", (f"{r['total_droop_change_pct']:.2f} "
                                             "percentage points")))
    if r.get("cost_before_per_h") is not None and r.get("cost_after_per_h") is not None:
        facts.append(("headroom cost", (f"{r['cost_before_per_h']:,.2f} today, "
                                       f"{r['cost_after_per_h']:,.2f} as proposed")))
    cols = [Col("unit", "unit"), Col("area", "area"), Col("change", "change"),
            Col("droop_now_pct", "droop now", ".2f", "%"),
            Col("droop_proposed_pct", "droop proposed", ".2f", "%"),
            Col("droop_change_pct", "droop change", ".2f", "points"),
            Col("headroom_up_now_mw", "headroom up now", ",.1f", "MW"),
            Col("headroom_up_proposed_mw", "headroom up proposed", ",.1f", "MW"),
            Col("headroom_down_now_mw", "headroom down now", ",.1f", "MW"),
            Col("headroom_down_proposed_mw", "headroom down proposed", ",.1f", "MW"),
            Col("reason", "reason")]
    changed = (pr["change"] != "unchanged").to_numpy()
    return {"facts": facts, "violations": [str(v) for v in r.get("violations_before") or []],
            "table": table(pr, cols, "proposal-table", on=changed, tall=True),
            "changed": int(changed.sum()), "units": len(pr),
            "before_after": _before_after(rf.before_after)}


def _before_after(ba: pd.DataFrame | None) -> dict | None:
    """before_after.csv: per event (and period) the settled frequency and margin with today's
    and with the proposed settings; red where today's settings break the limit."""
    if ba is None or not len(ba):
        return None
    df = ba.assign(margin_before_mhz=ba["margin_before_hz"] * 1000,
                   margin_after_mhz=ba["margin_after_hz"] * 1000)
    cols = [Col("event", "event")] + ([Col("period", "period")] if "period" in df else []) + [
        Col("settled_frequency_before_hz", "settled today", ".4f", "Hz"),
        Col("settled_frequency_after_hz", "settled as proposed", ".4f", "Hz"),
        Col("margin_before_mhz", "margin today", ".1f", "mHz"),
        Col("margin_after_mhz", "margin as proposed", ".1f", "mHz")]
    if "worst_link_after" in df:
        cols += [Col("worst_link_before", "most loaded link today"),
                 Col("loading_before_pct", "loading today", ".1f", "%"),
                 Col("worst_link_after", "most loaded link as proposed"),
                 Col("loading_after_pct", "loading as proposed", ".1f", "%")]
    broken = (df["margin_before_hz"].isna() | (df["margin_before_hz"] < 0)).to_numpy()
    return table(df, cols, "before-after-table", hot=broken, tall=True)

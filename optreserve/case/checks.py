"""Checks across the columns and tables of a case (after each cell has been typed and bounded
by csvio.py): references between tables, unit output ranges, event definitions, trip sizes
a unit can lose, the spread of link reactances, connectivity, and the inertia the nadir check
needs. Vectorised; Python loops run over the failing rows only (or over events and links,
which are few)."""

from __future__ import annotations

import math
from collections import deque

import numpy as np
import pandas as pd

from optreserve.case.columns import EVENT_KINDS, REACTANCE_SPREAD
from optreserve.case.data import Case
from optreserve.case.problems import _Collector, suggest
from optreserve.case.products import trip_lookup

# Common practice: governor droop settings between 2 % and 12 %; dead bands above 50 mHz are
# far outside what grid codes accept for frequency-containment providers.
DROOP_WARN_LOW_PCT, DROOP_WARN_HIGH_PCT = 2.0, 12.0
DEADBAND_WARN_MHZ = 50.0


def _unknown(what: str, name: str, known, file: str) -> str:
    return f"unknown {what} '{name}' (not in {file}){suggest(name, known)}"


def _check_units(u: pd.DataFrame, file: str, area_ids: set[str] | None, col: _Collector):
    """Cross-column checks, vectorised; a loop only over the rows that fail."""
    line = u["_line"].to_numpy()
    area = u["area"].to_numpy(object)
    cap, out, mn = (u[c].to_numpy(float) for c in ("capacity_mw", "output_mw", "min_output_mw"))
    lo, hi = u["droop_min_pct"].to_numpy(float), u["droop_max_pct"].to_numpy(float)
    db = u["deadband_mhz"].to_numpy(float)
    if area_ids is not None:
        for k in np.nonzero((area != "") & ~pd.Series(area).isin(area_ids).to_numpy())[0]:
            col.error(file, _unknown("area", area[k], area_ids, "areas.csv"), int(line[k]),
                      "area")
    with np.errstate(invalid="ignore"):
        over = mn > cap
        outside = ~over & ~np.isnan(cap + out + mn) & ~((mn <= out) & (out <= cap))
        crossed = (lo > 0) & (hi > 0) & (lo > hi)
        unusual = (lo > 0) & (hi > 0) & ~crossed & ((lo < DROOP_WARN_LOW_PCT)
                                                     | (hi > DROOP_WARN_HIGH_PCT))
        wide = db > DEADBAND_WARN_MHZ
    for k in np.nonzero(over)[0]:
        col.error(file, f"min_output_mw {mn[k]:g} exceeds capacity_mw {cap[k]:g}", int(line[k]),
                  "min_output_mw")
    for k in np.nonzero(outside)[0]:
        col.error(file, f"output_mw {out[k]:g} outside [min_output_mw {mn[k]:g}, capacity_mw "
                  f"{cap[k]:g}]", int(line[k]), "output_mw")
    for k in np.nonzero(crossed)[0]:
        col.error(file, f"droop_min_pct {lo[k]:g} exceeds droop_max_pct {hi[k]:g}", int(line[k]),
                  "droop_min_pct")
    for k in np.nonzero(unusual)[0]:
        col.warn(file, f"droop band {lo[k]:g}-{hi[k]:g} % lies outside the usual 2-12 %",
                 int(line[k]), "droop_min_pct" if lo[k] < DROOP_WARN_LOW_PCT else "droop_max_pct")
    for k in np.nonzero(wide)[0]:
        col.warn(file, f"dead band {db[k]:g} mHz is over 50 mHz", int(line[k]), "deadband_mhz")


def _check_links(lk: pd.DataFrame, file: str, area_ids: set[str] | None, col: _Collector):
    for _, r in lk.iterrows():
        line = int(r["_line"])
        for c in ("from_area", "to_area"):
            if area_ids is not None and r[c] and r[c] not in area_ids:
                col.error(file, _unknown("area", r[c], area_ids, "areas.csv"), line, c)
        if r["from_area"] and r["from_area"] == r["to_area"]:
            col.error(file, "from_area and to_area must differ", line, "to_area")
        if r["limit_mw"] > 0 and abs(r["flow_mw"]) > r["limit_mw"]:
            col.warn(file, f"pre-event flow {r['flow_mw']:g} MW already exceeds the limit", line,
                     "flow_mw")


def check_reactance_spread(x: np.ndarray, lines: np.ndarray, file: str, col: _Collector,
                           static: tuple[float, float] | None = None) -> None:
    """No two reactances (static and per period) more than REACTANCE_SPREAD apart: the DC
    power-flow factors would lose every digit of the small one's flow. `static`: the smallest
    (or largest) reactance of links.csv, to compare a time series against."""
    x = np.asarray(x, float)
    ok = np.isfinite(x) & (x > 0)
    if not ok.any():
        return
    lo, hi = float(x[ok].min()), float(x[ok].max())
    if static is not None:
        lo, hi = min(lo, static[0]), max(hi, static[1])
    if hi > REACTANCE_SPREAD * lo:
        k = int(np.nonzero(ok & ((x == lo) | (x == hi)))[0][0]) if (
            ok & ((x == lo) | (x == hi))).any() else 0
        col.error(file, f"reactances range from {lo:g} to {hi:g} pu, more than "
                  f"{REACTANCE_SPREAD:g} times apart: the flow split cannot be computed "
                  "reliably", int(lines[k]) if len(lines) else None, "reactance_pu")


def _check_events(ev: pd.DataFrame, file: str, units: pd.DataFrame, area_ids: set[str],
                  col: _Collector):
    unit_area, unit_out = trip_lookup(ev, units, file, col)  # case/products.py (G1+G2)
    unit_cap = dict(zip(units["unit"], units["capacity_mw"]))
    unit_min = dict(zip(units["unit"], units["min_output_mw"]))
    areas_out, sizes = [], []
    from_output = np.zeros(len(ev), dtype=bool)
    for _, r in ev.iterrows():
        line = int(r["_line"])
        kind, size, area = r["kind"], r["size_mw"], r["area"]
        if kind not in EVENT_KINDS:
            if kind:
                col.error(file, f"kind must be unit_trip or load_step, got '{kind}'"
                          + suggest(kind, EVENT_KINDS), line, "kind")
        elif kind == "unit_trip":
            u = r["unit"]
            if not u:
                col.error(file, "a unit_trip needs a unit", line, "unit")
            elif u not in unit_area:
                col.error(file, _unknown("unit", u, unit_area, "units.csv"), line, "unit")
            else:
                if area and area != unit_area[u]:
                    col.error(file, f"area '{area}' differs from the unit's area "
                              f"'{unit_area[u]}'", line, "area")
                area = unit_area[u]
                if math.isnan(size):
                    size = unit_out[u]
                    from_output[len(sizes)] = True
                elif u in unit_cap:  # (a common-mode trip of several units is checked apart)
                    _check_trip_size(size, u, unit_cap[u], unit_min[u], file, line, col)
                if size == 0:
                    col.warn(file, f"unit '{u}' trips at zero output: no disturbance", line,
                             "size_mw")
        else:
            if r["unit"]:
                col.warn(file, "unit is ignored for a load_step", line, "unit")
            if not area:
                col.error(file, "a load_step needs an area", line, "area")
            elif area not in area_ids:
                col.error(file, _unknown("area", area, area_ids, "areas.csv"), line, "area")
            if math.isnan(size):
                col.error(file, "a load_step needs size_mw", line, "size_mw")
            elif size == 0:
                col.error(file, "size_mw must not be zero (> 0 demand rises, < 0 drops)", line,
                          "size_mw")
        areas_out.append(area)
        sizes.append(size)
    ev["area"] = areas_out
    ev["size_mw"] = np.asarray(sizes, float)
    ev["size_from_output"] = from_output


def _check_trip_size(size: float, u: str, cap: float, mn: float, file: str, line: int,
                     col: _Collector) -> None:
    """A trip loses what the unit produces (at most its capacity) or, for storage that is
    charging, what it absorbs (at most -min_output_mw)."""
    if size > cap:
        col.error(file, f"a trip of {size:g} MW exceeds the capacity_mw {cap:g} of unit '{u}'",
                  line, "size_mw")
    elif size < min(0.0, mn):
        col.error(file, f"a trip of {size:g} MW is more than unit '{u}' can absorb "
                  f"(min_output_mw {mn:g})", line, "size_mw")


def check_trip_signs(case: Case, lines: np.ndarray, file: str, col: _Collector) -> None:
    """A given trip size must have the sign of the unit's output in every period the event
    applies to (losing a generating unit cannot raise the frequency); vectorised over the
    event instances."""
    ev = case.events
    upos = {u: k for k, u in enumerate(case.units["unit"])}
    trip = ((ev["kind"] == "unit_trip").to_numpy() & ~ev["size_from_output"].to_numpy(bool)
            & ev["unit"].isin(upos).to_numpy())
    if not trip.any():
        return
    inst = case.instances()
    e = inst["event_index"].to_numpy()
    t = inst["t"].to_numpy()
    j = np.array([upos.get(u, 0) for u in ev["unit"]], dtype=np.int64)[e]
    out = case.unit_matrix("output_mw").astype(float)[t, j]
    size = inst["size_mw"].to_numpy(float)
    bad = trip[e] & (size * out < 0)
    seen: set[int] = set()
    for m in np.nonzero(bad)[0]:
        k = int(e[m])
        if k in seen:
            continue
        seen.add(k)
        when = f" in period '{case.periods[t[m]]}'" if case.is_horizon else ""
        col.error(file, f"size_mw {size[m]:g} has the opposite sign to the output_mw "
                  f"{out[m]:g} of unit '{ev['unit'].iloc[k]}'{when}: a trip loses the unit's "
                  "output", int(lines[k]), "size_mw")


def check_nadir_inertia(case: Case, col: _Collector) -> None:
    """The nadir check of `solve` simulates every event with its areas' own swing equations
    (dynamics/simulate.py): each area needs online inertia after the event. The same test,
    with the same message, before anything is solved (so `check` says it too)."""
    from optreserve.solver.nadir_loop import NADIR_SIM_MAX_INSTANCES

    u = case.units
    H = np.nan_to_num(u["inertia_s"].to_numpy(float)) * u["capacity_mw"].to_numpy(float)
    if case.limits.max_nadir_deviation_hz is None or not (H > 0).any():
        return  # no nadir requirement (the reader warns when inertia is missing)
    inst = case.instances()
    if len(inst) > NADIR_SIM_MAX_INSTANCES:
        return  # solve does not simulate then (run.py)
    online = (case.unit_matrix("output_mw").astype(float) != 0) | case.unit_matrix(
        "provides").astype(bool)
    area = case.unit_area_index()
    A = len(case.areas)
    E = online * H[None, :]  # (T, N) stored energy of the online units
    per_area = np.stack([np.bincount(area, weights=row, minlength=A) for row in E])  # (T, A)
    ev = case.events
    upos = {x: k for k, x in enumerate(u["unit"])}
    trip = np.array([upos.get(x, -1) if k == "unit_trip" else -1
                     for x, k in zip(ev["unit"], ev["kind"])], dtype=np.int64)
    e, t = inst["event_index"].to_numpy(), inst["t"].to_numpy()
    tr = trip[e]
    left = per_area[t].copy()  # (M, A)
    has = tr >= 0
    left[np.nonzero(has)[0], area[tr[has]]] -= E[t[has], tr[has]]
    live = (inst["size_mw"].to_numpy(float) != 0) & (left.sum(axis=1) > 0)
    bad = live & (left <= 0).any(axis=1)
    if bad.any():
        m = int(np.nonzero(bad)[0][0])
        a = case.areas["area"].iloc[int(np.nonzero(left[m] <= 0)[0][0])]
        units_file = str(case.path / "units.csv") if case.path else "units.csv"
        col.error(units_file, f"area '{a}' has no online inertia"
                  + (" once the tripped unit is gone" if tr[m] >= 0 else "")
                  + ": the per-area swing equation needs inertia_s on some online unit of "
                  "every area", None, "inertia_s")


def _check_connected(areas: pd.DataFrame, links: pd.DataFrame, file: str, col: _Collector):
    ids = list(areas["area"])
    adj: dict[str, set[str]] = {a: set() for a in ids}
    for f, t in zip(links["from_area"], links["to_area"]):
        if f in adj and t in adj:
            adj[f].add(t)
            adj[t].add(f)
    seen = {ids[0]}
    todo = deque([ids[0]])
    while todo:
        for b in adj[todo.popleft()]:
            if b not in seen:
                seen.add(b)
                todo.append(b)
    missing = [a for a in ids if a not in seen]
    if missing:
        col.error(file, "areas are not all connected by links (one synchronous system is "
                  f"required): no path from '{ids[0]}' to {', '.join(repr(m) for m in missing)}")

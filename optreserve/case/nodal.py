"""Nodal cases (contract version 2, "Nodal networks: buses.csv"): buses grouped into areas,
units and load steps at buses, branches between buses, and interface (flowgate) limits.

The reader (case/reader.py) calls `nodal_columns` for the column lists of a nodal folder and
`read_nodal` once the tables are typed. `read_nodal` fills what the area-level model and
checks expect (each unit's and event's area, each area's load, from_area/to_area and `tie`
per link) and returns a `NodalNetwork` with the bus-level data the flow rows and the
independent flow check use. The DC grid itself (network/grid) is built here once to check it,
and again lazily wherever it is needed (the factorisation is not kept in pickles).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import scipy.sparse as sp

from optreserve.errors import CaseError

# An area's load_mw, if given, must equal the sum of its buses' load within this [MW].
AREA_LOAD_TOL_MW = 0.1


@dataclass(frozen=True)
class NodalNetwork:
    """Bus-level data of a nodal case (numpy inside, ids kept for the output tables).

    buses: bus, area, load_mw. bus_area: area index per bus. from_bus, to_bus: bus index per
    link (order of case.links). unit_bus: bus index per unit. event_share: (events x buses)
    CSR, the share of each event's power at each bus (a trip: 1 at the unit's bus; a load
    step at a bus: 1 there; a load step of an area: the area's buses by load). monitor:
    (monitored elements x links) CSR of weights (a limited link: one 1; an interface: its
    weights), monitor_limit_mw, monitor_ids, monitor_is_link (True: the row is a link)."""

    buses: pd.DataFrame
    bus_area: np.ndarray
    from_bus: np.ndarray
    to_bus: np.ndarray
    reactance_pu: np.ndarray
    unit_bus: np.ndarray
    event_share: sp.csr_matrix
    monitor: sp.csr_matrix
    monitor_limit_mw: np.ndarray
    monitor_ids: np.ndarray
    monitor_is_link: np.ndarray
    _cache: dict = field(default_factory=dict, compare=False, repr=False)

    @property
    def n_buses(self) -> int:
        return len(self.buses)

    def grid(self):
        """The factorised DC grid (built on first use, then kept)."""
        if "grid" not in self._cache:
            from optreserve.network.grid import Grid

            self._cache["grid"] = Grid(self.buses["bus"], self.from_bus, self.to_bus,
                                       self.reactance_pu)
        return self._cache["grid"]

    def __getstate__(self):  # SuperLU factors do not pickle: rebuild after unpickling
        state = dict(self.__dict__)
        state["_cache"] = {}
        return state

    def __setstate__(self, state):
        self.__dict__.update(state)


def nodal_columns(name: str, cols: list) -> list:
    """Column lists of a nodal folder: units get `bus` (area optional), links go between
    buses (reactance nonzero, limit optional, flow optional), areas' load optional, events
    may name a `bus`."""
    from optreserve.case.columns import MW_MAX, MW_MIN, REACTANCE_MAX_PU, REACTANCE_MIN_PU, Col

    def nonzero(v: float) -> str | None:
        if v == 0:
            return "must not be zero (negative is allowed: series compensation)"
        if not REACTANCE_MIN_PU <= abs(v) <= REACTANCE_MAX_PU:
            return (f"must be {REACTANCE_MIN_PU:g} to {REACTANCE_MAX_PU:g} pu in size (either "
                    f"sign), got {v:g}")
        return None

    if name == "units.csv":
        out = [Col("area", "text", False, "") if c.name == "area" else c for c in cols]
        return out[:1] + [Col("bus", "text", True)] + out[1:]
    if name == "areas.csv":
        return [Col("load_mw", "float", False, math.nan, lo=0.0, hi=MW_MAX, unit="MW")
                if c.name == "load_mw" else c
                for c in cols]
    if name == "links.csv":
        return [Col("link", "id", True), Col("from_bus", "text", True),
                Col("to_bus", "text", True), Col("reactance_pu", "float", True, check=nonzero),
                Col("limit_mw", "float", False, math.nan, lo=MW_MIN, hi=MW_MAX, unit="MW"),
                Col("flow_mw", "float", False, math.nan, lo=-MW_MAX, hi=MW_MAX, unit="MW")]
    if name == "events.csv":
        return cols + [Col("bus", "text", False, "")]
    return cols


BUS_COLS_SPEC = (("bus", "id", True, None), ("area", "text", True, None),
                 ("load_mw", "float", False, 0.0))
INTERFACE_COLS_SPEC = (("interface", "text", True, None), ("link", "text", True, None),
                       ("weight", "float", False, 1.0), ("limit_mw", "float", True, None))


def _cols(spec):
    from optreserve.case.columns import MW_MAX, MW_MIN, Col

    bounds = {("bus", "load_mw"): {"lo": 0.0, "hi": MW_MAX},
              ("interface", "limit_mw"): {"lo": MW_MIN, "hi": MW_MAX},
              ("interface", "weight"): {"lo": -1e3, "hi": 1e3}}
    key = "bus" if spec is BUS_COLS_SPEC else "interface"
    return [Col(n, k, r, d, **bounds.get((key, n), {})) for n, k, r, d in spec]


def read_nodal(folder: Path, tables: dict, col, has_series: bool, settings: dict
               ) -> NodalNetwork | None:
    """Read buses.csv (and interfaces.csv), check the nodal tables against it, and fill the
    area-level columns in place (tables: the typed units/areas/links/events frames with
    their _line column). Problems go to the reader's collector; returns None when any."""
    from optreserve.case.csvio import _read_csv, _typed_table

    lab = lambda n: str(folder / n)
    t = _read_csv(folder / "buses.csv", lab("buses.csv"), col)
    buses = _typed_table(t, _cols(BUS_COLS_SPEC), col) if t is not None else None
    units, areas = tables["units.csv"], tables["areas.csv"]
    links, events = tables["links.csv"], tables["events.csv"]
    if has_series:
        col.error(lab("buses.csv"), "time series (*_by_period.csv) are not supported on nodal "
                  "cases yet: solve one snapshot per period")
    if settings.get("energy.co_optimise"):
        col.error(lab("case.toml"), "[energy] co_optimise is not supported on nodal cases yet",
                  None, "energy.co_optimise")
    if buses is None or units is None or areas is None or events is None:
        return None
    if links is None:
        col.error(lab("links.csv"), "is missing (a nodal case needs its branches)")
        return None
    n_err = len(col.problems)
    area_ids = list(areas["area"])
    apos = pd.Index(area_ids)
    bpos = pd.Index(list(buses["bus"]))
    b_area = apos.get_indexer(list(buses["area"]))
    for k in np.flatnonzero(b_area < 0):
        col.error(lab("buses.csv"), f"unknown area '{buses['area'].iat[k]}' (not in areas.csv)",
                  int(buses["_line"].iat[k]), "area")
    if len(buses) == 0:
        col.error(lab("buses.csv"), "has no rows: at least one bus is required", 1)

    # units: the bus places the unit, its area follows
    ub = bpos.get_indexer(list(units["bus"]))
    ua = units["area"].to_numpy(object)
    uline = units["_line"].to_numpy(np.int64)
    own = np.where(ub >= 0, buses["area"].to_numpy(object)[np.maximum(ub, 0)], "")
    for k in np.flatnonzero(ub < 0):
        col.error(lab("units.csv"), f"unknown bus '{units['bus'].iat[k]}' (not in "
                  "buses.csv)", int(uline[k]), "bus")
    for k in np.flatnonzero((ub >= 0) & (ua != "") & (ua != own)):
        col.error(lab("units.csv"), f"area '{ua[k]}' differs from the area '{own[k]}' of bus "
                  f"'{units['bus'].iat[k]}'", int(uline[k]), "area")
    units["area"] = np.where(ub >= 0, own, ua)

    # areas: load is the sum of the buses' load
    bus_load = buses["load_mw"].to_numpy(float)
    sums = np.bincount(np.maximum(b_area, 0), weights=np.where(b_area >= 0, bus_load, 0.0),
                       minlength=len(area_ids))
    given = areas["load_mw"].to_numpy(float)
    for k in np.flatnonzero(np.isfinite(given) & (np.abs(given - sums) > AREA_LOAD_TOL_MW)):
        col.error(lab("areas.csv"), f"load_mw {given[k]:g} differs from the sum of the area's "
                  f"bus loads {sums[k]:.3f} MW (buses.csv) by more than {AREA_LOAD_TOL_MW} MW",
                  int(areas["_line"].iat[k]), "load_mw")
    areas["load_mw"] = sums

    # links: branches between buses
    lf = bpos.get_indexer(list(links["from_bus"]))
    lt = bpos.get_indexer(list(links["to_bus"]))
    for c, idx in (("from_bus", lf), ("to_bus", lt)):
        for k in np.flatnonzero(idx < 0):
            col.error(lab("links.csv"), f"unknown bus '{links[c].iat[k]}' (not in buses.csv)",
                      int(links["_line"].iat[k]), c)
    for k in np.flatnonzero((lf == lt) & (lf >= 0)):
        col.error(lab("links.csv"), "from_bus and to_bus must differ", int(links["_line"].iat[k]),
                  "to_bus")
    flow = links["flow_mw"].to_numpy(float)
    if np.isfinite(flow).any() and not np.isfinite(flow).all():
        k = int(np.flatnonzero(~np.isfinite(flow))[0])
        col.error(lab("links.csv"), "flow_mw must be given for every link or for none",
                  int(links["_line"].iat[k]), "flow_mw")

    # events: a load step may name a bus
    ev_bus = bpos.get_indexer([b if b else None for b in events["bus"]])
    ev_area = events["area"].to_numpy(object).copy()
    for k in range(len(events)):
        b = events["bus"].iat[k]
        line = int(events["_line"].iat[k])
        if not b:
            continue
        if events["kind"].iat[k] != "load_step":
            col.warn(lab("events.csv"), "bus is ignored for a unit_trip (the unit's bus counts)",
                     line, "bus")
            ev_bus[k] = -1
        elif ev_bus[k] < 0:
            col.error(lab("events.csv"), f"unknown bus '{b}' (not in buses.csv)", line, "bus")
        else:
            own = buses["area"].iat[ev_bus[k]]
            if ev_area[k] and ev_area[k] != own:
                col.error(lab("events.csv"), f"area '{ev_area[k]}' differs from the area "
                          f"'{own}' of bus '{b}'", line, "area")
            ev_area[k] = own
    events["area"] = ev_area
    if len(col.problems) > n_err:
        return None

    # the grid: connected and nonsingular (errors name buses and branches)
    from optreserve.network.grid import Grid

    x = links["reactance_pu"].to_numpy(float)
    try:
        grid = Grid(list(buses["bus"]), lf, lt, x, branch_ids=list(links["link"]),
                    file=lab("links.csv"), rows=list(links["_line"].astype(int)))
        if not np.isfinite(flow).all():
            flow = grid.dc_flow(ub, units["output_mw"].to_numpy(float), bus_load,
                                file=lab("units.csv"))
    except CaseError as exc:
        for p in exc.problems:
            col.problems.append(p)
        return None
    links["flow_mw"] = flow
    fa = buses["area"].to_numpy(object)[lf]
    ta = buses["area"].to_numpy(object)[lt]
    links["from_area"], links["to_area"] = fa, ta
    links["tie"] = fa != ta
    lim = links["limit_mw"].to_numpy(float)
    for k in np.flatnonzero(np.isfinite(lim) & (np.abs(flow) > lim)):
        col.warn(lab("links.csv"), f"pre-event flow {flow[k]:.3f} MW already exceeds the limit",
                 int(links["_line"].iat[k]), "flow_mw")

    share = _event_share(events, ev_bus, ub, units, buses, b_area, apos, col, lab("events.csv"))
    mon = _monitor(folder, links, lim, col, lab)
    if share is None or mon is None:
        return None
    net = NodalNetwork(
        buses=buses.drop(columns="_line").reset_index(drop=True), bus_area=b_area,
        from_bus=lf.astype(np.int64), to_bus=lt.astype(np.int64), reactance_pu=x,
        unit_bus=ub.astype(np.int64), event_share=share, monitor=mon[0],
        monitor_limit_mw=mon[1], monitor_ids=mon[2], monitor_is_link=mon[3])
    net._cache["grid"] = grid
    return net


def _event_share(events, ev_bus, ub, units, buses, b_area, apos, col, file):
    """(events x buses) share of each event's power at each bus."""
    upos = pd.Index(list(units["unit"]))
    rows, cols, vals = [], [], []
    load = buses["load_mw"].to_numpy(float)
    for k in range(len(events)):
        kind = events["kind"].iat[k]
        if kind == "unit_trip":
            j = upos.get_indexer([events["unit"].iat[k]])[0]
            if j < 0:
                continue  # the reader reports the unknown unit
            rows.append(k), cols.append(int(ub[j])), vals.append(1.0)
        elif ev_bus[k] >= 0:
            rows.append(k), cols.append(int(ev_bus[k])), vals.append(1.0)
        else:
            a = apos.get_indexer([events["area"].iat[k]])[0]
            if a < 0:
                continue
            members = np.flatnonzero((b_area == a) & (load > 0))
            tot = load[members].sum()
            if tot <= 0:
                col.error(file, f"load step in area '{events['area'].iat[k]}' whose buses carry "
                          "no load: name a bus", int(events["_line"].iat[k]), "bus")
                return None
            rows += [k] * len(members)
            cols += list(members)
            vals += list(load[members] / tot)
    return sp.csr_matrix((vals, (rows, cols)), shape=(len(events), len(buses)))


def _monitor(folder: Path, links, lim, col, lab):
    """Monitored elements: every link with a limit, then every interface of interfaces.csv."""
    from optreserve.case.csvio import _read_csv, _typed_table

    L = len(links)
    mon_links = np.flatnonzero(np.isfinite(lim))
    rows = list(range(len(mon_links)))
    cols = list(mon_links)
    vals = [1.0] * len(mon_links)
    limits = list(lim[mon_links])
    ids = list(links["link"].to_numpy(object)[mon_links])
    p = folder / "interfaces.csv"
    if p.is_file():
        t = _read_csv(p, lab("interfaces.csv"), col)
        itab = _typed_table(t, _cols(INTERFACE_COLS_SPEC), col) if t is not None else None
        if itab is None:
            return None
        lpos = pd.Index(list(links["link"]))
        li = lpos.get_indexer(list(itab["link"]))
        n0 = len(col.problems)
        seen: dict[str, tuple[int, float]] = {}
        for k in range(len(itab)):
            line = int(itab["_line"].iat[k])
            name, lm = itab["interface"].iat[k], float(itab["limit_mw"].iat[k])
            if li[k] < 0:
                col.error(lab("interfaces.csv"), f"unknown link '{itab['link'].iat[k]}' (not in "
                          "links.csv)", line, "link")
                continue
            if name in ids and name not in seen:
                col.error(lab("interfaces.csv"), f"interface '{name}' has the id of a link",
                          line, "interface")
                continue
            if name not in seen:
                seen[name] = (len(limits), lm)
                limits.append(lm)
                ids.append(name)
            elif abs(seen[name][1] - lm) > 1e-9:
                col.error(lab("interfaces.csv"), f"limit_mw {lm:g} differs from {seen[name][1]:g} "
                          f"given for interface '{name}' before", line, "limit_mw")
            rows.append(seen[name][0]), cols.append(int(li[k]))
            vals.append(float(itab["weight"].iat[k]))
        if len(col.problems) > n0:
            return None
    n_m = len(limits)
    S = sp.csr_matrix((vals, (rows, cols)), shape=(n_m, L))
    S.sum_duplicates()
    is_link = np.zeros(n_m, dtype=bool)
    is_link[:len(mon_links)] = True
    return S, np.asarray(limits, float), np.asarray(ids, dtype=object), is_link


def area_level(case):
    """The case for the area-level rows and checks (units, areas, events; no link rows): a
    nodal case's flows are rows of their own (model/nodal_flows.py, verify/nodal.py)."""
    return case.replace(links=case.links.iloc[0:0]) if case.is_nodal else case


def area_equivalent(case):
    """The case at area level, for the time-domain simulation (which models one frequency
    per area): one node per area, and per area pair with ties one link whose susceptance is
    the sum of its ties' (parallel branches), whose limit is the sum of the ties' limits
    (an unmonitored tie counts as 1e6 MW) and whose pre-event flow is the net interchange.
    Inertia and droop stay with the units, so they add up per area; buses.csv is dropped.
    The internal impedances of the areas are not in this view: it is for frequency, not
    for branch flows (those come from the nodal solve)."""
    net = case.nodal
    lk = case.links
    a_f, a_t = net.bus_area[net.from_bus], net.bus_area[net.to_bus]
    tie = a_f != a_t
    lo, hi = np.minimum(a_f, a_t)[tie], np.maximum(a_f, a_t)[tie]
    sign = np.where(a_f[tie] == lo, 1.0, -1.0)
    n_a = len(case.areas)
    key, pair = np.unique(lo * n_a + hi, return_inverse=True)
    b = np.bincount(pair, weights=1.0 / lk["reactance_pu"].to_numpy(float)[tie],
                    minlength=len(key))
    lim = np.nan_to_num(lk["limit_mw"].to_numpy(float)[tie], nan=1e6)
    flow = np.bincount(pair, weights=sign * lk["flow_mw"].to_numpy(float)[tie],
                       minlength=len(key))
    ids = case.areas["area"].to_numpy(object)
    fa, ta = ids[key // n_a], ids[key % n_a]
    links = pd.DataFrame({
        "link": [f"{f}-{t}" for f, t in zip(fa, ta)], "from_area": fa, "to_area": ta,
        "reactance_pu": 1.0 / np.abs(b),  # series compensation cannot make a pair capacitive
        "limit_mw": np.bincount(pair, weights=lim, minlength=len(key)), "flow_mw": flow})
    return case.replace(links=links, nodal=None)

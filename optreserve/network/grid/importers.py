"""Open case formats (MATPOWER `.m`, pandapower JSON) into the tables of a nodal case folder
(contract, "Version 2 additions / Nodal networks").

Everything goes through a pandapower network and pandapower's own DC power flow, so that the
reactances, tap ratios and phase shifts written to links.csv are exactly those pandapower's
DC model uses: after `pandapower.rundcpp`, each in-service line or two-winding transformer is
one row of `net._ppc["branch"]`, whose x (system base) times the tap ratio is its DC
reactance (pypower's makeBdc divides b by the tap). pandapower `impedance` elements (what
from_ppc makes of a MATPOWER branch joining two voltage levels at ratio 1) are branches too.

pandapower is imported lazily: only the importers need it.

The settings the source formats do not carry (droop band, load damping, headroom prices,
events) come from `ImportDefaults`, invented planning defaults meant to be edited.
"""

from __future__ import annotations

import contextlib
import logging
import math
import os
import shutil
import tempfile
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ...errors import CaseError, Problem
from .matpower import parse_matpower
from .sparse import Grid

# pandapower's from_ppc stands in 99999 (kA or MVA) for "no rating" (MATPOWER rate_a = 0).
PANDAPOWER_NO_RATING = 99999.0
# Elements the DC branch model here does not cover; a network using them is refused rather
# than imported with a silently different grid.
UNSUPPORTED = ("trafo3w", "dcline", "ward", "xward", "tcsc", "ssc", "svc", "vsc")
CASE_FILES = ("case.toml", "buses.csv", "units.csv", "links.csv", "areas.csv", "events.csv")


@dataclass(frozen=True)
class ImportDefaults:
    """Settings an imported case needs and the source formats lack. All editable."""

    droop_min_pct: float = 3.0  # a droop band of 3-6 %: common practice for governors
    droop_max_pct: float = 6.0
    load_damping_pct_per_hz: float = 1.0  # 1 %/Hz: common planning assumption (from memory)
    price_up_per_mw_h: float = 8.0  # invented flat prices, to be replaced by real ones
    price_down_per_mw_h: float = 4.0
    nominal_frequency_hz: float | None = None  # None: the network's f_hz
    max_settled_deviation_hz: float = 0.2  # 200 mHz, common practice in large systems
    load_step_mw: float | None = None  # None: as large as the largest unit trip
    single_area: str = "A1"  # the area of every bus when the source gives none


@dataclass(frozen=True)
class Overload:
    """A branch whose pre-event flow already exceeds its limit."""

    link: str
    flow_mw: float
    limit_mw: float


@dataclass
class NodalTables:
    """The tables of one nodal case folder, plus what the import found."""

    name: str
    buses: pd.DataFrame  # bus, area, load_mw
    units: pd.DataFrame  # unit, bus, area, capacity_mw, output_mw, min_output_mw, droop..., prices, provides
    links: pd.DataFrame  # link, from_bus, to_bus, reactance_pu, limit_mw (NaN = unmonitored), flow_mw
    areas: pd.DataFrame  # area, load_mw, load_damping_pct_per_hz
    events: pd.DataFrame  # event, kind, unit, area, size_mw
    case_toml: str
    overloads: list[Overload] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    shift_rad: np.ndarray | None = None  # per link; phase shifts are in flow_mw only

    def csv_tables(self) -> dict[str, pd.DataFrame]:
        return {"buses.csv": self.buses, "units.csv": self.units, "links.csv": self.links,
                "areas.csv": self.areas, "events.csv": self.events}


def read_matpower(path: str | Path, *, defaults: ImportDefaults | None = None,
                  drop_overloaded_limits: bool = False) -> NodalTables:
    """A MATPOWER version 2 `.m` file (parsed here, see matpower.py; converted by pandapower's
    from_ppc). Buses keep their MATPOWER numbers, areas come from the bus `area` column,
    links are named br<row> and units g<row> after their rows in the file."""
    _, from_ppc = _pandapower()
    ppc = parse_matpower(path)
    area_col = ppc["bus"][:, 6].copy()
    with warnings.catch_warnings(), _quiet_pandapower():
        warnings.simplefilter("ignore")
        net = from_ppc(ppc, f_hz=50.0)
    # from_ppc (pandapower 3.5) creates `impedance` branches in service whatever the file's
    # status column says: set every branch's status from the file.
    lk = net._from_ppc_lookups["branch"]
    status = ppc["branch"][:, 10] > 0
    for el in ("line", "trafo", "impedance"):
        mine = (lk.element_type == el).to_numpy()
        if mine.any():
            net[el].loc[lk.element[mine].astype(np.int64).to_numpy(), "in_service"] = \
                status[mine]
    # Bus index of the network = MATPOWER bus number (from_ppc indexes buses by BUS_I).
    bus_area = pd.Series([_label(a) for a in area_col], index=net.bus.index)
    names = _ppc_names(net, ppc)
    # MATPOWER's branch is a pi model: with trafo_model="pi" pandapower's DC branch data are
    # the file's own x times tap (with "t" a transformer's magnetising branch would shift its
    # series reactance slightly in the conversion).
    tables = from_pandapower(net, name=Path(path).stem, bus_area=bus_area, defaults=defaults,
                             drop_overloaded_limits=drop_overloaded_limits, trafo_model="pi",
                             **names)
    if (defaults or ImportDefaults()).nominal_frequency_hz is None:
        tables.notes.append("nominal frequency 50 Hz assumed: MATPOWER files do not give it "
                            "(ImportDefaults.nominal_frequency_hz)")
    pg = pd.Series(ppc["gen"][:, 1], index=[f"g{k + 1}" for k in range(len(ppc["gen"]))])
    moved = tables.units.set_index("unit").output_mw - pg.reindex(tables.units.unit).to_numpy()
    for unit, dp in moved[moved.abs() > 0.1].items():
        tables.notes.append(f"unit {unit}: output {pg[unit] + dp:.3f} MW from the DC load flow "
                            f"(slack), {pg[unit]:.3f} MW in the file")
    return tables


def read_pandapower_json(path: str | Path, *, defaults: ImportDefaults | None = None,
                         drop_overloaded_limits: bool = False) -> NodalTables:
    """A pandapower network saved as JSON (read by pandapower.from_json). Areas come from the
    bus `zone` column when it is filled."""
    pp, _ = _pandapower()
    try:
        net = pp.from_json(str(path))
    except Exception as exc:  # noqa: BLE001 - pandapower raises many kinds on a bad file
        raise CaseError([Problem(Path(path).name, f"is not a pandapower network: {exc}")]) \
            from None
    return from_pandapower(net, name=Path(path).stem, defaults=defaults,
                           drop_overloaded_limits=drop_overloaded_limits)


def from_pandapower(net, *, name: str = "imported", bus_area: pd.Series | None = None,
                    defaults: ImportDefaults | None = None, drop_overloaded_limits: bool = False,
                    link_names: dict | None = None, unit_names: dict | None = None,
                    link_limits: dict | None = None, trafo_model: str = "t") -> NodalTables:
    """The tables of a pandapower network (which is run with rundcpp and otherwise left
    alone). link_names / unit_names map (element, index) to ids; link_limits maps
    (element, index) to MW (NaN = unmonitored) where the source gives them directly.
    trafo_model is passed to rundcpp ("t", pandapower's default, or "pi")."""
    pp, _ = _pandapower()
    d = defaults or ImportDefaults()
    src = f"{name} (pandapower network)"
    _refuse_unsupported(net, src)
    notes: list[str] = []
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            # numba=False: a DC power flow gains nothing from it and pandapower would warn.
            pp.rundcpp(net, trafo_model=trafo_model, numba=False)
    except Exception as exc:  # noqa: BLE001 - any failure of the flow is the input's
        raise CaseError([Problem(src, f"pandapower's DC power flow failed: {exc}")]) from None
    from pandapower.pypower.idx_brch import BR_STATUS, BR_X, F_BUS, SHIFT, T_BUS, TAP

    ppc = net._ppc
    lookup = net._pd2ppc_lookups["bus"]
    alive = net.bus.index[net.bus.in_service.to_numpy(bool)
                          & net.res_bus.vm_pu.reindex(net.bus.index).notna().to_numpy()]
    if len(alive) < len(net.bus):
        notes.append(f"{len(net.bus) - len(alive)} buses out of service or isolated "
                     "(pandapower gives them no result) are left out")
    ppc_row = lookup[alive.to_numpy()]
    bus_of_row = dict(zip(ppc_row.tolist(), alive.tolist()))

    # --- branches: pandapower's own DC branch data
    rows_br, ids, elem_keys = [], [], []
    for element in ("line", "trafo", "impedance"):
        span = net._pd2ppc_lookups["branch"].get(element)
        if span is None:
            continue
        start, stop = span
        idx = net[element].index.to_numpy()
        rows_br.append(np.arange(start, stop))
        elem_keys += [(element, int(i)) for i in idx]
    rows_br = np.concatenate(rows_br) if rows_br else np.zeros(0, np.int64)
    br = ppc["branch"][rows_br]
    f_row = br[:, F_BUS].real.astype(np.int64)
    t_row = br[:, T_BUS].real.astype(np.int64)
    on = (br[:, BR_STATUS].real > 0) & np.isin(f_row, ppc_row) & np.isin(t_row, ppc_row)
    keys = [k for k, o in zip(elem_keys, on) if o]
    br, f_row, t_row = br[on], f_row[on], t_row[on]
    tap = br[:, TAP].real
    x = br[:, BR_X].real * np.where(tap == 0, 1.0, tap)
    shift = np.deg2rad(br[:, SHIFT].real)
    names = link_names or {}
    ids = [names.get(k, f"{k[0]}{k[1]}") for k in keys]
    limits = _limits(net, keys, link_limits or {})
    if np.any(shift != 0):
        notes.append(f"{int(np.sum(shift != 0))} phase-shifting transformers: links.csv has no "
                     "shift column, so their shift is only in flow_mw (pre-event flows); "
                     "flow changes of events do not depend on it")

    # --- bus loads: loads, shunts (P at 1 pu in the DC model), storage (charging > 0)
    load = pd.Series(0.0, index=alive)
    for element in ("load", "shunt", "storage"):
        if len(net[element]) and f"res_{element}" in net:
            p = net[f"res_{element}"].p_mw.reindex(net[element].index).fillna(0.0)
            load = load.add(p.groupby(net[element].bus).sum(), fill_value=0.0)
    load = load.reindex(alive).fillna(0.0)

    units = _units(net, alive, unit_names or {}, load, notes, d)
    area = (bus_area.reindex(alive) if bus_area is not None else _zones(net, alive, d))
    area = area.fillna(d.single_area).astype(str)
    buses = pd.DataFrame({"bus": alive.to_numpy(), "area": area.to_numpy(),
                          "load_mw": load.to_numpy()})
    units.insert(2, "area", area.reindex(units["bus"]).to_numpy())

    grid = Grid.from_ids(buses["bus"], [bus_of_row[r] for r in f_row],
                         [bus_of_row[r] for r in t_row], x, limits, branch_ids=ids)
    inj = grid.balanced_injections(grid.bus_index(units["bus"]), units["output_mw"],
                                   buses["load_mw"])
    flow = grid.flows(inj, shift_rad=shift, base_mva=float(net.sn_mva))
    links = pd.DataFrame({"link": ids, "from_bus": grid.bus_ids[grid.from_idx],
                          "to_bus": grid.bus_ids[grid.to_idx], "reactance_pu": x,
                          "limit_mw": limits, "flow_mw": flow})
    overloads = [Overload(ids[k], float(flow[k]), float(limits[k]))
                 for k in np.flatnonzero(np.abs(flow) > limits * (1 + 1e-9))]
    if overloads:
        if drop_overloaded_limits:
            links.loc[np.abs(flow) > limits * (1 + 1e-9), "limit_mw"] = np.nan
            notes += [f"link {o.link}: pre-event flow {o.flow_mw:.1f} MW exceeds its limit "
                      f"{o.limit_mw:.1f} MW; limit dropped (unmonitored)" for o in overloads]
        else:
            notes.append(f"{len(overloads)} links exceed their limit before any event "
                         "(see overloads); drop_overloaded_limits=True leaves them unmonitored")

    areas = buses.groupby("area", sort=True)["load_mw"].sum().rename("load_mw").reset_index()
    areas["load_damping_pct_per_hz"] = d.load_damping_pct_per_hz
    events = _events(units, areas, d)
    f_hz = d.nominal_frequency_hz or float(net.f_hz)
    label = name.replace("\\", "\\\\").replace('"', '\\"')
    toml = (f'name = "{label} (imported; check the defaults)"\n'
            f"nominal_frequency_hz = {f_hz:g}\n\n[limits]\n"
            f"max_settled_deviation_hz = {d.max_settled_deviation_hz:g}\n")
    return NodalTables(name, buses, units, links, areas, events, toml, overloads, notes, shift)


def _pandapower():
    try:
        import pandapower as pp
        from pandapower.converter.pypower import from_ppc
    except ImportError:  # pragma: no cover - depends on the installation
        raise CaseError([Problem("importer", "needs pandapower: pip install pandapower")]) \
            from None
    return pp, from_ppc


@contextlib.contextmanager
def _quiet_pandapower():
    """pandapower logs conversion remarks at warning level; the import reports its own."""
    log = logging.getLogger("pandapower")
    old = log.level
    log.setLevel(logging.ERROR)
    try:
        yield
    finally:
        log.setLevel(old)


def _label(v) -> str:
    """Area label of a number (1.0 -> '1')."""
    f = float(v)
    return str(int(f)) if math.isfinite(f) and f == int(f) else str(v)


def _refuse_unsupported(net, src: str) -> None:
    problems = []
    for element in UNSUPPORTED:
        if element in net and len(net[element]) and net[element].get(
                "in_service", pd.Series(True, index=net[element].index)).any():
            problems.append(Problem(src, f"has in-service '{element}' elements, which the "
                                    "nodal import does not model"))
    sw = net.switch
    if len(sw) and (((sw.et == "b") & sw.closed).any() or ((sw.et != "b") & ~sw.closed).any()):
        problems.append(Problem(src, "has bus-bus switches closed or branch switches open: "
                                "fuse or drop those buses and branches first"))
    if problems:
        raise CaseError(problems)


def _ppc_names(net, ppc) -> dict:
    """Ids after the rows of the MATPOWER file, and rate_a as the limits (0 = none)."""
    lk = net._from_ppc_lookups
    link_names, link_limits, unit_names = {}, {}, {}
    rate_a = ppc["branch"][:, 5]
    for row, (el, idx) in enumerate(zip(lk["branch"].element_type, lk["branch"].element)):
        if not el or pd.isna(idx):
            continue
        key = (el, int(idx))
        link_names[key] = f"br{row + 1}"
        link_limits[key] = rate_a[row] if rate_a[row] > 0 else np.nan
    for row, (el, idx) in enumerate(zip(lk["gen"].element_type, lk["gen"].element)):
        if el and pd.notna(idx):
            unit_names[(el, int(idx))] = f"g{row + 1}"
    return {"link_names": link_names, "unit_names": unit_names, "link_limits": link_limits}


def _limits(net, keys, given: dict) -> np.ndarray:
    """limit_mw per branch: a line's thermal current at its voltage, a transformer's rating,
    times max_loading_percent; MVA taken as MW (DC). NaN where there is no rating, and for
    pandapower impedance elements (their sn_mva is the base of their per-unit values, not a
    rating)."""
    out = np.full(len(keys), np.nan)
    for k, (el, i) in enumerate(keys):
        if (el, i) in given:
            out[k] = given[(el, i)]
            continue
        row = net[el].loc[i]
        pct = float(row.get("max_loading_percent", 100.0))
        pct = 100.0 if not math.isfinite(pct) else pct
        par = float(row.get("parallel", 1))
        if el == "line":
            ika = float(row.max_i_ka)
            if math.isfinite(ika) and 0 < ika < PANDAPOWER_NO_RATING:
                vn = float(net.bus.vn_kv.at[row.from_bus])
                out[k] = ika * vn * math.sqrt(3) * par * float(row.get("df", 1.0)) * pct / 100
        elif el == "trafo":
            sn = float(row.sn_mva)
            if math.isfinite(sn) and 0 < sn < PANDAPOWER_NO_RATING:
                out[k] = sn * par * pct / 100
    return out


def _zones(net, alive, d: ImportDefaults) -> pd.Series:
    if "zone" in net.bus and net.bus.zone.reindex(alive).notna().any():
        return net.bus.zone.reindex(alive).map(lambda z: _label(z) if pd.notna(z) else None)
    return pd.Series(d.single_area, index=alive)


def _units(net, alive, names: dict, load: pd.Series, notes: list[str],
           d: ImportDefaults) -> pd.DataFrame:
    """Generators, the external grid and static generators in service, at live buses."""
    parts = []
    for el in ("gen", "ext_grid", "sgen"):
        t = net[el]
        if not len(t):
            continue
        t = t[t.in_service.to_numpy(bool) & t.bus.isin(alive).to_numpy()]
        out = net[f"res_{el}"].p_mw.reindex(t.index).fillna(0.0).to_numpy()
        cap = t.get("max_p_mw", pd.Series(np.nan, index=t.index)).to_numpy(float)
        low = t.get("min_p_mw", pd.Series(np.nan, index=t.index)).to_numpy(float)
        if el == "sgen":
            ctl = t.get("controllable", pd.Series(False, index=t.index))
            provides = ctl.fillna(False).astype(bool).to_numpy()
        else:
            provides = np.ones(len(t), bool)
        ids = [names.get((el, int(i)), f"{el}{i}") for i in t.index]
        parts.append(pd.DataFrame({"unit": ids, "bus": t.bus.to_numpy(), "output_mw": out,
                                   "cap": cap, "low": low, "provides": provides}))
    u = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(
        columns=["unit", "bus", "output_mw", "cap", "low", "provides"])
    cap = np.where(np.isfinite(u.cap), u.cap, u.output_mw).astype(float)
    raised = cap < u.output_mw
    if raised.any():
        notes.append(f"{int(raised.sum())} units run above their max_p_mw: capacity set to "
                     "their output")
    u["capacity_mw"] = np.maximum(cap, u.output_mw)
    # A unit with no positive capacity is a consumer in the DC balance: fold it into the
    # bus load (capacity_mw > 0 is required of a unit).
    consumer = u.capacity_mw <= 0
    if consumer.any():
        dl = (-u.output_mw[consumer]).groupby(u.bus[consumer]).sum()
        load.update(load.add(dl, fill_value=0.0))
        notes.append(f"{int(consumer.sum())} units with max_p_mw <= 0 counted as bus load "
                     f"({float(dl.sum()):.1f} MW)")
        u = u[~consumer].reset_index(drop=True)
    neg = load < 0
    if neg.any():
        # A net negative bus load (load below local infeed) becomes a non-providing unit.
        extra = pd.DataFrame({"unit": [f"netinfeed_{b}" for b in load.index[neg]],
                              "bus": load.index[neg], "output_mw": -load[neg].to_numpy(),
                              "cap": np.nan, "low": np.nan, "provides": False})
        extra["capacity_mw"] = extra.output_mw
        u = pd.concat([u, extra], ignore_index=True)
        notes.append(f"{int(neg.sum())} buses with negative net load: their infeed is a unit "
                     "netinfeed_BUS that does not provide")
        load[neg] = 0.0
    low = np.where(np.isfinite(u.low.astype(float)), u.low.astype(float), 0.0)
    return pd.DataFrame({
        "unit": u.unit, "bus": u.bus, "capacity_mw": u.capacity_mw, "output_mw": u.output_mw,
        "min_output_mw": np.minimum(low, u.output_mw), "droop_min_pct": d.droop_min_pct,
        "droop_max_pct": d.droop_max_pct, "price_up_per_mw_h": d.price_up_per_mw_h,
        "price_down_per_mw_h": d.price_down_per_mw_h,
        "provides": np.where(u.provides.astype(bool), "true", "false")})


def _events(units: pd.DataFrame, areas: pd.DataFrame, d: ImportDefaults) -> pd.DataFrame:
    """The largest unit trip, and a load step of the same size (or load_step_mw) spread over
    the area with the most load."""
    real = units[~units.unit.astype(str).str.startswith("netinfeed_")]
    rows = []
    if len(real) and real.output_mw.max() > 0:
        big = real.loc[real.output_mw.idxmax()]
        rows.append({"event": f"trip_{big.unit}", "kind": "unit_trip", "unit": big.unit,
                     "area": big.area, "size_mw": float(big.output_mw)})
    step = d.load_step_mw if d.load_step_mw is not None else (
        rows[0]["size_mw"] if rows else 0.0)
    if step and len(areas):
        a = areas.loc[areas.load_mw.idxmax(), "area"]
        rows.append({"event": f"load_step_{a}", "kind": "load_step", "unit": "", "area": a,
                     "size_mw": float(step)})
    return pd.DataFrame(rows, columns=["event", "kind", "unit", "area", "size_mw"])


def write_case_folder(tables: NodalTables, out_dir: str | Path) -> Path:
    """Write the case folder atomically: into a temporary folder beside out_dir, renamed into
    place at the end. An existing non-empty out_dir is refused (a user's files are never
    touched); an empty one is replaced."""
    out = Path(out_dir)
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise CaseError([Problem(str(out), "exists and is not empty: choose a new folder")])
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.", dir=out.parent))
    try:
        (tmp / "case.toml").write_text(tables.case_toml, encoding="utf-8")
        for fname, df in tables.csv_tables().items():
            df.to_csv(tmp / fname, index=False, float_format="%.10g", na_rep="")
        if out.exists():
            out.rmdir()  # empty, checked above
        os.replace(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return out

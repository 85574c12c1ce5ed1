"""Nodal cases (buses.csv): reading, the lazy flow rows against independent calculations.

Outside sources:
- pandapower's DC power flow (pandapower.rundcpp) on its case118 and case300 (the latter has
  series-compensated branches, negative reactance): post-event flows from optreserve's own
  written allocation, re-applied as injections in pandapower, equal links.csv within 0.01 MW.
- an independent dense MILP written here with scipy.optimize.milp and a dense numpy PTDF:
  the optimum equals optreserve's on small nodal cases.
- the DC power-flow rules (lossless, flat voltage: flow = (theta_f - theta_t) / x) for the
  lumped-versus-nodal case, common practice.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from optreserve.case.reader import load_case
from optreserve.cli.app import main
from optreserve.errors import CaseError
from optreserve.solver.run import solve

TOML = 'name = "{name}"\nnominal_frequency_hz = 50\n\n[limits]\nmax_settled_deviation_hz = 0.2\n'


def write_case(folder: Path, buses, units, links, areas, events, interfaces=None, name="n"):
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "case.toml").write_text(TOML.format(name=name))
    for fname, rows in (("buses.csv", buses), ("units.csv", units), ("links.csv", links),
                        ("areas.csv", areas), ("events.csv", events),
                        ("interfaces.csv", interfaces)):
        if rows is not None:
            pd.DataFrame(rows).to_csv(folder / fname, index=False)
    return folder


def small_case(folder: Path, **over):
    """Two invented areas (Wend, Osterby) of three buses each, meshed, with two ties and a
    series-compensated branch (x < 0)."""
    buses = [{"bus": b, "area": a, "load_mw": l} for b, a, l in
             [("w1", "W", 100), ("w2", "W", 150), ("w3", "W", 50),
              ("o1", "O", 120), ("o2", "O", 200), ("o3", "O", 80)]]
    units = [{"unit": u, "bus": b, "capacity_mw": c, "output_mw": o, "droop_min_pct": 3,
              "droop_max_pct": 6, "price_up_per_mw_h": p} for u, b, c, o, p in
             [("Wa", "w1", 400, 250, 2.0), ("Wb", "w3", 200, 100, 5.0),
              ("Oa", "o2", 300, 270, 9.0), ("Ob", "o3", 250, 80, 6.0)]]
    links = [{"link": k, "from_bus": f, "to_bus": t, "reactance_pu": x, "limit_mw": lim}
             for k, f, t, x, lim in
             [("w12", "w1", "w2", 0.05, 400), ("w23", "w2", "w3", 0.04, ""),
              ("w13", "w1", "w3", 0.06, 300), ("o12", "o1", "o2", 0.05, 300),
              ("o23", "o2", "o3", 0.03, 300), ("o13", "o1", "o3", 0.08, 300),
              ("o13c", "o1", "o3", -0.02, ""),  # series capacitor beside o13 in parallel
              ("t1", "w2", "o1", 0.10, 60), ("t2", "w3", "o3", 0.12, 80)]]
    areas = [{"area": "W", "load_damping_pct_per_hz": 1.0},
             {"area": "O", "load_damping_pct_per_hz": 1.0}]
    events = [{"event": "trip_Ob", "kind": "unit_trip", "unit": "Ob", "bus": "", "area": "",
               "size_mw": ""},
              {"event": "step_o2", "kind": "load_step", "unit": "", "bus": "o2", "area": "",
               "size_mw": 120}]
    parts = {"buses": buses, "units": units, "links": links, "areas": areas,
             "events": events}
    parts.update(over)
    return write_case(folder, **parts)


# ------------------------------------------------------------------ reader
def test_reader_fills_area_level_columns(tmp_path):
    """Contract "Nodal networks": unit area from its bus, area load = sum of bus loads, ties
    are branches between areas; without flow_mw the pre-event flows are a DC load flow
    (checked against the DC rules: flows balance at every bus)."""
    case = load_case(small_case(tmp_path / "c"))
    assert list(case.units["area"]) == ["W", "W", "O", "O"]
    assert case.areas.set_index("area")["load_mw"].to_dict() == {"W": 300.0, "O": 400.0}
    assert list(case.links.loc[case.links["tie"], "link"]) == ["t1", "t2"]
    lk = case.links
    net = case.nodal
    # Kirchhoff at every bus: net injection = outputs - load = outflow (DC rules)
    inj = np.zeros(6)
    np.add.at(inj, net.unit_bus, case.units["output_mw"].to_numpy(float))
    inj -= net.buses["load_mw"].to_numpy(float)
    out = np.zeros(6)
    np.add.at(out, net.from_bus, lk["flow_mw"].to_numpy())
    np.add.at(out, net.to_bus, -lk["flow_mw"].to_numpy())
    assert np.allclose(out, inj, atol=1e-9)
    assert np.isnan(lk.set_index("link").loc["w23", "limit_mw"])  # empty = unmonitored
    assert "w23" not in set(net.monitor_ids)
    assert case.events.set_index("event").loc["step_o2", "area"] == "O"


@pytest.mark.parametrize("change, where", [
    (lambda p: p["links"][0].update(reactance_pu=0.0), ("links.csv", "reactance_pu")),
    (lambda p: p["links"][0].update(to_bus="nowhere"), ("links.csv", "to_bus")),
    (lambda p: p["units"][0].update(bus="nowhere"), ("units.csv", "bus")),
    (lambda p: p["units"][0].update(area="O"), ("units.csv", "area")),
    (lambda p: p["buses"][0].update(area="X"), ("buses.csv", "area")),
    (lambda p: p["events"][1].update(bus="nowhere"), ("events.csv", "bus")),
    (lambda p: p["areas"][0].update(load_mw=310), ("areas.csv", "load_mw")),
    (lambda p: p["units"][0].update(output_mw=300), ("units.csv", "output_mw")),
])
def test_reader_errors_name_file_and_column(tmp_path, change, where):
    """Bad nodal input: an error naming file and column (contract: general rules)."""
    parts = {"buses": None, "units": None, "links": None, "areas": None, "events": None}
    small_case(tmp_path / "ref")
    for k in parts:
        parts[k] = pd.read_csv(tmp_path / "ref" / f"{k}.csv", keep_default_na=False).to_dict(
            "records")
    for rows in parts.values():  # every record needs every key for the CSV header
        keys = set().union(*rows)
        for r in rows:
            for k in keys:
                r.setdefault(k, "")
    change(parts)
    folder = write_case(tmp_path / "bad", **parts)
    with pytest.raises(CaseError) as exc:
        load_case(folder)
    probs = exc.value.problems
    assert any(p.file.endswith(where[0]) and p.column == where[1] for p in probs), probs


def test_area_load_agrees_within_tolerance(tmp_path):
    """areas.csv load_mw may be given; within 0.1 MW of the bus sum it is accepted."""
    small_case(tmp_path / "c", areas=[
        {"area": "W", "load_mw": 300.05, "load_damping_pct_per_hz": 1.0},
        {"area": "O", "load_mw": 400.0, "load_damping_pct_per_hz": 1.0}])
    assert load_case(tmp_path / "c").areas["load_mw"].tolist() == [300.0, 400.0]


def test_cli_bad_nodal_input_exits_2_and_writes_nothing(tmp_path, capsys):
    """Exit code 2 and no output folder on an input error (docs/case-format.md)."""
    folder = small_case(tmp_path / "c")
    lk = pd.read_csv(folder / "links.csv")
    lk.loc[3, "reactance_pu"] = 0
    lk.to_csv(folder / "links.csv", index=False)
    assert main(["solve", str(folder), "--out", str(tmp_path / "o"), "--quiet"]) == 2
    assert not (tmp_path / "o").exists()
    assert "links.csv" in capsys.readouterr().err


# ------------------------------------------------------------------ independent dense MILP
def dense_reference(case):
    """The allocation problem written directly: per-unit gains K, participation u (binary),
    headroom r; droop band u K_lo <= K <= u K_hi; headroom r >= K F_act; settled rows
    sum K F + D F >= dP; every limited link and interface after every event in the
    multiply-by-beta form, with a dense PTDF from numpy (slack bus 0). Returns the optimum
    cost per hour (scipy.optimize.milp / HiGHS). No dead bands, no own-area reserve."""
    from scipy.optimize import Bounds, LinearConstraint, milp

    u, lk, net = case.units, case.links, case.nodal
    f_n = case.nominal_frequency_hz
    F = case.limits.max_settled_deviation_hz
    cap, out = u["capacity_mw"].to_numpy(float), u["output_mw"].to_numpy(float)
    K_lo = cap / (u["droop_max_pct"].to_numpy(float) / 100 * f_n)
    K_hi = np.minimum(cap / (u["droop_min_pct"].to_numpy(float) / 100 * f_n), (cap - out) / F)
    N = len(u)
    nb = len(net.buses)
    # dense DC PTDF: B = A' diag(1/x) A, reduced at bus 0
    A = np.zeros((len(lk), nb))
    A[np.arange(len(lk)), net.from_bus] = 1
    A[np.arange(len(lk)), net.to_bus] = -1
    b = 1 / lk["reactance_pu"].to_numpy(float)
    B = A.T @ (b[:, None] * A)
    X = np.zeros((nb, nb))
    X[1:, 1:] = np.linalg.inv(B[1:, 1:])
    PTDF = (b[:, None] * A) @ X
    S = net.monitor.toarray()
    PhiM = S @ PTDF
    F0 = S @ lk["flow_mw"].to_numpy(float)
    lim = net.monitor_limit_mw
    load = net.buses["load_mw"].to_numpy(float)
    pct = case.areas["load_damping_pct_per_hz"].to_numpy(float)[net.bus_area]
    Db = load * pct / 100
    D = Db.sum()
    Phi_u = PhiM[:, net.unit_bus]  # (K, N)
    # columns: K (N), u (N), r (N)
    c = np.r_[np.zeros(2 * N), u["price_up_per_mw_h"].to_numpy(float)]
    Arows, lo, hi = [], [], []

    def row(kc, uc, rc, lo_, hi_):
        Arows.append(np.r_[kc, uc, rc])
        lo.append(lo_)
        hi.append(hi_)

    I = np.eye(N)
    for i in range(N):
        row(I[i], -K_hi[i] * I[i], 0 * I[i], -np.inf, 0)
        row(I[i], -K_lo[i] * I[i], 0 * I[i], 0, np.inf)
        row(-F * I[i], 0 * I[i], I[i], 0, np.inf)
    for e, ev in case.events.iterrows():
        dP = float(ev["size_mw"])
        on = np.ones(N)
        if ev["kind"] == "unit_trip":
            on[list(u["unit"]).index(ev["unit"])] = 0
        row(F * on, np.zeros(N), np.zeros(N), dP - F * D, np.inf)
        w = net.event_share[e].toarray().ravel()
        Pw = PhiM @ w
        Pv = PhiM @ (Db - D * w)
        for k in range(len(lim)):
            for sgn in (1, -1):
                coef = (F0[k] - sgn * lim[k] + dP * (Phi_u[k] - Pw[k])) * on
                const = (F0[k] - sgn * lim[k]) * D + dP * Pv[k]
                if sgn > 0:
                    row(coef, np.zeros(N), np.zeros(N), -np.inf, -const)
                else:
                    row(coef, np.zeros(N), np.zeros(N), -const, np.inf)
    res = milp(c, constraints=LinearConstraint(np.array(Arows), lo, hi),
               integrality=np.r_[np.zeros(N), np.ones(N), np.zeros(N)],
               bounds=Bounds(np.zeros(3 * N), np.r_[np.full(N, np.inf), np.ones(N),
                                                    cap - out]))
    assert res.success, res.message
    return res.fun


@pytest.mark.parametrize("tight, engine", [(False, "highspy"), (True, "highspy"),
                                           (True, "pyomo")])
def test_optimum_equals_independent_dense_milp(tmp_path, tight, engine):
    """optreserve's optimum on the small meshed nodal case equals the dense MILP written
    above (scipy.optimize.milp), with loose and with binding tie limits, through both
    emitters (HiGHS bulk load and Pyomo)."""
    over = {}
    if tight:
        lk = pd.read_csv(small_case(tmp_path / "ref") / "links.csv", keep_default_na=False)
        lk.loc[lk.link == "t1", "limit_mw"] = 45
        over["links"] = lk.to_dict("records")
    case = load_case(small_case(tmp_path / "c", **over))
    res = solve(case, engine=engine)
    ref = dense_reference(case)
    assert res.objective_per_h == pytest.approx(ref, rel=1e-5, abs=1e-4)
    lk = res.links
    assert (lk["flow_after_mw"].abs() <= lk["limit_mw"] + 1e-3).all()
    if tight:
        assert res.verification["flow_rows"] > 0


def test_interface_limit_binds(tmp_path):
    """interfaces.csv: the weighted sum of the two ties is held within its limit (checked on
    the independently recomputed flows in links.csv)."""
    iface = [{"interface": "WO", "link": "t1", "weight": 1.0, "limit_mw": 115},
             {"interface": "WO", "link": "t2", "weight": 1.0, "limit_mw": 115}]
    case = load_case(small_case(tmp_path / "c", interfaces=iface))
    res = solve(case, engine="highspy")
    lk = res.links.set_index(["link", "event"])
    for ev in ("trip_Ob", "step_o2"):
        t = lk.loc[("t1", ev), "flow_after_mw"] + lk.loc[("t2", ev), "flow_after_mw"]
        assert t == pytest.approx(lk.loc[("WO", ev), "flow_after_mw"], abs=1e-6)
        assert abs(t) <= 115 + 1e-3
    assert lk.loc[("WO", "trip_Ob"), "interface"]
    assert dense_reference(case) == pytest.approx(res.objective_per_h, rel=1e-5, abs=1e-4)


def test_interchange_is_net_tie_flow(tmp_path):
    """interchange.csv: net flow W -> O = sum of the tie flows (t1, t2 both from W)."""
    res = solve(load_case(small_case(tmp_path / "c")), engine="highspy")
    out = res.write(tmp_path / "o")
    ic = pd.read_csv(out / "interchange.csv")
    lk = pd.read_csv(out / "links.csv")
    for _, r in ic.iterrows():
        ties = lk[(lk.event == r.event) & lk.link.isin(["t1", "t2"])]
        assert r.net_flow_after_mw == pytest.approx(ties.flow_after_mw.sum(), abs=1e-6)
    assert set(lk.loc[lk.tie, "link"]) == {"t1", "t2"}


# ------------------------------------------------------------------ lumped vs nodal
def test_lumped_area_model_picks_a_link_violating_allocation(tmp_path):
    """The same system entered at area level (version 1: areas as nodes, each tie a link
    between them, no internal branches) splits the import over the ties by the ties'
    reactances alone; the DC rules on the full meshed grid split it differently. The lumped
    optimum then overloads tie t2 on the nodal grid, while the nodal optimum differs and
    keeps every monitored flow within its limit."""
    lk = pd.read_csv(small_case(tmp_path / "ref") / "links.csv", keep_default_na=False)
    nodal = load_case(small_case(tmp_path / "n", links=lk.to_dict("records")))
    # version 1 case: the two areas as nodes
    v1 = tmp_path / "v1"
    v1.mkdir()
    (v1 / "case.toml").write_text(TOML.format(name="lumped"))
    u = pd.read_csv(tmp_path / "n" / "units.csv")
    u["area"] = ["W", "W", "O", "O"]
    u.drop(columns="bus").to_csv(v1 / "units.csv", index=False)
    pd.DataFrame({"area": ["W", "O"], "load_mw": [300, 400],
                  "load_damping_pct_per_hz": [1.0, 1.0]}).to_csv(v1 / "areas.csv", index=False)
    ties = nodal.links[nodal.links.tie]
    pd.DataFrame({"link": ties.link, "from_area": "W", "to_area": "O",
                  "reactance_pu": ties.reactance_pu, "limit_mw": ties.limit_mw,
                  "flow_mw": ties.flow_mw}).to_csv(v1 / "links.csv", index=False)
    pd.DataFrame({"event": ["trip_Ob", "step_o2"], "kind": ["unit_trip", "load_step"],
                  "unit": ["Ob", ""], "area": ["O", "O"], "size_mw": ["", 120]}).to_csv(
        v1 / "events.csv", index=False)
    lumped = solve(load_case(v1), engine="highspy")
    res = solve(nodal, engine="highspy")
    # the lumped allocation, applied to the nodal grid: independent settled points + DC flows
    from optreserve.verify.nodal import monitored, nodal_flows_after
    from optreserve.verify.settle import settle_case

    a = lumped.allocation
    pts = settle_case(nodal, a["gain_mw_per_hz"], a["headroom_up_mw"], a["headroom_down_mw"])
    size = nodal.events["size_mw"].to_numpy(float)
    flows = nodal_flows_after(nodal, np.array([p.deviation_hz for p in pts]),
                              np.array([p.response_mw for p in pts]), size, np.arange(2))
    mon = monitored(nodal, flows)
    excess = np.abs(mon) - nodal.nodal.monitor_limit_mw[None, :]
    assert excess.max() > 1.0  # the lumped choice overloads a branch of the real grid
    assert not np.allclose(a["gain_mw_per_hz"], res.allocation["gain_mw_per_hz"], atol=1e-3)
    lkr = res.links
    assert (lkr["flow_after_mw"].abs() <= lkr["limit_mw"] + 1e-3).all()
    assert res.objective_per_h >= lumped.objective_per_h - 1e-6


# ------------------------------------------------------------------ pandapower DC flow
def _response(alloc, events_out, units, ev):
    """Per-unit settled response from the written allocation and settled deviation:
    min(K (|df| - d)^+, headroom), the tripped unit 0."""
    x = abs(float(events_out.loc[ev.event, "settled_deviation_hz"]))
    K = alloc["gain_mw_per_hz"].to_numpy(float)
    d = units["deadband_mhz"].to_numpy(float) / 1000 if "deadband_mhz" in units else 0.0
    r = np.minimum(K * np.maximum(x - d, 0.0), alloc["headroom_up_mw"].to_numpy(float))
    if ev.kind == "unit_trip":
        r[list(units.unit).index(ev.unit)] = 0.0
    return x, r


@pytest.mark.parametrize("name", ["case118", "case300"])
def test_post_event_flows_equal_pandapower_rundcpp(tmp_path, name):
    """pandapower's rundcpp on the same network with the injections of optreserve's written
    allocation (units' settled response as extra generation, load self-regulation as reduced
    load at each bus, the tripped unit out of service, the load step as extra load) gives
    every branch flow of links.csv within 0.01 MW."""
    pp = pytest.importorskip("pandapower")
    import pandapower.networks as pn

    from optreserve.network.grid.importers import ImportDefaults, from_pandapower, write_case_folder

    net = getattr(pn, name)()
    tables = from_pandapower(net, name=name, drop_overloaded_limits=True,
                             defaults=ImportDefaults(load_step_mw=500.0))
    # events of about 500 MW: the unit whose output is nearest trips (the largest unit of
    # case300, 1973 MW, cannot be covered within these invented limits)
    run = tables.units[tables.units.output_mw > 0]
    big = run.loc[(run.output_mw - 500).abs().idxmin()]
    tables.events.loc[0, ["event", "unit", "area", "size_mw"]] = [
        f"trip_{big.unit}", big.unit, big.area, big.output_mw]
    # invented tighter limits so that flow rows bind: base flow + 100 MW
    lk = tables.links
    lk["limit_mw"] = (lk["flow_mw"].abs() + 100).round(3)
    tables.units["deadband_mhz"] = np.where(np.arange(len(tables.units)) % 4 == 0, 10.0, 0.0)
    folder = write_case_folder(tables, tmp_path / "case")
    case = load_case(folder)
    res = solve(case, engine="highspy")
    assert res.verification["flow_rows"] > 0  # the limits bind: rows were generated
    out = res.write(tmp_path / "out")
    alloc = pd.read_csv(out / "allocation.csv").set_index("unit").loc[case.units.unit]
    events_out = pd.read_csv(out / "events.csv").set_index("event")
    links_out = pd.read_csv(out / "links.csv")
    units = pd.read_csv(folder / "units.csv")
    buses = pd.read_csv(folder / "buses.csv", dtype={"area": str})
    areas = pd.read_csv(folder / "areas.csv", dtype={"area": str}).set_index("area")
    base = tables.links.set_index("link")
    assert len(links_out) > 0
    worst = 0.0
    for ev in pd.read_csv(folder / "events.csv", keep_default_na=False,
                          dtype={"area": str}).itertuples():
        x, resp = _response(alloc, events_out, units, ev)
        n2 = getattr(pn, name)()
        with pd.option_context("mode.chained_assignment", None):
            for b, p in zip(units.bus, resp):
                if p:
                    pp.create_sgen(n2, int(b), p_mw=float(p))
            damp = buses.load_mw * areas.loc[buses.area.astype(str), "load_damping_pct_per_hz"
                                             ].to_numpy() / 100 * x
            for b, p in zip(buses.bus, damp):
                if p:
                    pp.create_sgen(n2, int(b), p_mw=float(p))
            if ev.kind == "unit_trip":
                kind, idx = _element(ev.unit)
                if kind == "ext_grid":  # the slack trips: keep it as angle reference only
                    pp.create_sgen(n2, int(n2.ext_grid.bus.at[idx]),
                                   p_mw=-float(units.set_index("unit").output_mw[ev.unit]))
                else:
                    n2[kind].loc[idx, "in_service"] = False
            else:
                share = buses.load_mw.where(buses.area.astype(str) == str(ev.area), 0.0)
                share = share / share.sum()
                for b, s in zip(buses.bus, share):
                    if s:
                        pp.create_load(n2, int(b), p_mw=float(ev.size_mw) * s)
        pp.rundcpp(n2)
        mine = links_out[links_out.event == ev.event].set_index("link")["flow_after_mw"]
        theirs = _branch_flows(n2)
        common = mine.index.intersection(theirs.index)
        assert len(common) == len(mine)
        # flows before the event: pandapower's rundcpp of the unchanged network (phase shifts
        # sit in flow_mw), so the comparison is of the flow changes plus the base flow
        worst = max(worst, float((mine[common] - theirs[common]).abs().max()))
        assert (mine.abs() <= base.loc[mine.index, "limit_mw"] + 1e-3).all()
    assert worst <= 0.01


def _element(unit: str):
    """pandapower element of an imported unit id (gen<k>, ext_grid<k>, sgen<k>)."""
    for kind in ("ext_grid", "sgen", "gen"):
        if unit.startswith(kind) and unit[len(kind):].isdigit():
            return kind, int(unit[len(kind):])
    raise AssertionError(unit)


def _branch_flows(net) -> pd.Series:
    """pandapower DC flows keyed as the importer names the links (line<k>, trafo<k>,
    impedance<k>)."""
    parts = []
    for kind, res, col in (("line", "res_line", "p_from_mw"), ("trafo", "res_trafo", "p_hv_mw"),
                           ("impedance", "res_impedance", "p_from_mw")):
        if len(net[res]):
            s = net[res][col]
            parts.append(pd.Series(s.to_numpy(), index=[f"{kind}{k}" for k in s.index]))
    return pd.concat(parts)


def test_import_cli_writes_a_solvable_case(tmp_path, capsys):
    """`optreserve import` on the hand-written MATPOWER file of the grid tests writes a case
    folder that reads back; a second import into the same folder is refused (exit 2)."""
    src = Path(__file__).parent / "data" / "fernholt6.m"
    out = tmp_path / "imp"
    assert main(["import", str(src), "--out", str(out), "--quiet"]) == 0
    case = load_case(out)
    assert case.is_nodal and len(case.nodal.buses) == 6
    assert main(["import", str(src), "--out", str(out), "--quiet"]) == 2
    assert json.loads(json.dumps(list(case.links.columns)))  # columns plain strings


def test_simulate_and_nadir_on_a_nodal_case(tmp_path):
    """simulate aggregates per area (case.nodal.area_equivalent): inertia is needed per area,
    not per bus; its settled frequency equals the static settled point (the swing equation
    at rest is the power balance, common practice)."""
    folder = small_case(tmp_path / "c")
    u = pd.read_csv(folder / "units.csv")
    u.loc[u.unit.isin(["Wa", "Oa"]), "inertia_s"] = 5.0  # one machine with inertia per area
    u.to_csv(folder / "units.csv", index=False)
    assert main(["solve", str(folder), "--out", str(tmp_path / "o"), "--quiet"]) == 0
    assert main(["simulate", str(folder), "--allocation", str(tmp_path / "o"), "--all",
                 "--out", str(tmp_path / "s"), "--quiet"]) == 0
    sim = pd.read_csv(tmp_path / "s" / "simulation_summary.csv", comment="#").set_index("event")
    ev = pd.read_csv(tmp_path / "o" / "events.csv").set_index("event")
    assert np.allclose(sim.loc[ev.index, "steady_state_frequency_hz"],
                       ev["settled_frequency_hz"], atol=2e-3)


def test_event_price_equals_finite_difference_with_binding_flow_rows(tmp_path):
    """The event price (envelope theorem over the settled and the nodal flow rows) equals
    the change of the optimum cost when the load step grows by 0.01 MW (a finite
    difference of two independent solves, integer choices unchanged), with tie t1 binding."""
    lk = pd.read_csv(small_case(tmp_path / "ref") / "links.csv", keep_default_na=False)
    lk.loc[lk.link == "t1", "limit_mw"] = 45
    ev = pd.read_csv(tmp_path / "ref" / "events.csv", keep_default_na=False).to_dict("records")
    costs, prices = [], []
    for k, size in enumerate((120.0, 120.01)):
        ev[1]["size_mw"] = size
        res = solve(load_case(small_case(tmp_path / f"c{k}", links=lk.to_dict("records"),
                                         events=ev)), engine="highspy")
        assert res.verification["flow_rows"] > 0
        costs.append(res.objective_per_h)
        prices.append(res.events.set_index("event").loc["step_o2", "marginal_cost_per_mw_h"])
    assert prices[0] == pytest.approx((costs[1] - costs[0]) / 0.01, rel=1e-4)


def test_own_area_reserve_and_area_prices_on_a_nodal_case(tmp_path):
    """Own-area reserve stays a per-area rule on nodal cases (contract: areas.csv
    min_own_reserve_mw): the units at the buses of area O hold at least 90 MW of up
    headroom, and prices.csv has one row per area."""
    areas = [{"area": "W", "load_damping_pct_per_hz": 1.0, "min_own_reserve_mw": 0},
             {"area": "O", "load_damping_pct_per_hz": 1.0, "min_own_reserve_mw": 90}]
    case = load_case(small_case(tmp_path / "c", areas=areas))
    res = solve(case, engine="highspy")
    a = res.allocation.set_index("unit")
    assert a.loc[["Oa", "Ob"], "headroom_up_mw"].sum() >= 90 - 1e-6
    free = solve(load_case(small_case(tmp_path / "f")), engine="highspy")
    assert free.allocation.set_index("unit").loc[["Oa", "Ob"], "headroom_up_mw"].sum() < 90
    assert sorted(res.prices["area"]) == ["O", "W"]


def test_interfaces_file_errors_and_pickle(tmp_path):
    """interfaces.csv errors name file, row and column; a nodal case survives pickling (the
    studies send cases to worker processes) and rebuilds its grid."""
    import pickle

    bad = [{"interface": "WO", "link": "t1", "weight": 1.0, "limit_mw": 100},
           {"interface": "WO", "link": "t9", "weight": 1.0, "limit_mw": 100},
           {"interface": "WO", "link": "t2", "weight": 1.0, "limit_mw": 90}]
    with pytest.raises(CaseError) as exc:
        load_case(small_case(tmp_path / "b", interfaces=bad))
    got = {(p.row, p.column) for p in exc.value.problems if p.file.endswith("interfaces.csv")}
    assert got == {(3, "link"), (4, "limit_mw")}
    case = load_case(small_case(tmp_path / "c"))
    again = pickle.loads(pickle.dumps(case))
    P = np.zeros(6)
    P[0], P[5] = 10.0, -10.0
    assert np.allclose(again.nodal.grid().flows(P), case.nodal.grid().flows(P))


def test_case300_with_series_compensation_solves_to_the_dense_optimum(tmp_path):
    """pandapower's case300 (one branch of negative reactance) imported, invented limits of
    base flow + 100 MW, two events of about 500 MW, no dead bands: optreserve's optimum
    equals the dense MILP written above (scipy.optimize.milp on a numpy PTDF)."""
    pytest.importorskip("pandapower")
    import pandapower.networks as pn

    from optreserve.network.grid.importers import ImportDefaults, from_pandapower, write_case_folder

    tables = from_pandapower(pn.case300(), name="case300", drop_overloaded_limits=True,
                             defaults=ImportDefaults(load_step_mw=500.0))
    run = tables.units[tables.units.output_mw > 0]
    big = run.loc[(run.output_mw - 500).abs().idxmin()]
    tables.events.loc[0, ["event", "unit", "area", "size_mw"]] = [
        f"trip_{big.unit}", big.unit, big.area, big.output_mw]
    tables.links["limit_mw"] = (tables.links["flow_mw"].abs() + 100).round(3)
    tables.case_toml += "\n[solver]\nmip_gap = 1e-9\n"
    case = load_case(write_case_folder(tables, tmp_path / "c300"))
    assert (case.nodal.reactance_pu < 0).any()
    res = solve(case, engine="highspy")
    assert res.verification["flow_rows"] > 0
    assert res.objective_per_h == pytest.approx(dense_reference(case), rel=1e-6)


def test_retune_on_a_nodal_case_keeps_the_flows(tmp_path):
    """retune on a nodal case (same row generation inside): the proposal's flows, recomputed
    independently on the grid, stay within every limit (contract: limits after every event)."""
    lk = pd.read_csv(small_case(tmp_path / "ref") / "links.csv", keep_default_na=False)
    lk.loc[lk.link == "t1", "limit_mw"] = 45
    folder = small_case(tmp_path / "c", links=lk.to_dict("records"))
    u = pd.read_csv(folder / "units.csv")
    u["droop_now_pct"] = 5.0
    u.to_csv(folder / "units.csv", index=False)
    assert main(["retune", str(folder), "--out", str(tmp_path / "o"), "--quiet"]) == 0
    out = pd.read_csv(tmp_path / "o" / "links.csv")
    assert (out.flow_after_mw.abs() <= out.limit_mw + 1e-3).all()
    assert {"t1", "t2"} <= set(out.link)


def test_over_frequency_and_area_steps_with_dead_bands_match_a_dense_dc_flow(tmp_path):
    """Load drops (over-frequency, down headroom), a step spread over an area by load and
    dead bands: links.csv equals a dense DC power flow written here (numpy inverse of the
    reduced susceptance matrix, DC rules, common practice) of the injections rebuilt from
    the written allocation and settled deviations, and stays within every limit."""
    lk = pd.read_csv(small_case(tmp_path / "ref") / "links.csv", keep_default_na=False)
    lk.loc[lk.link == "t1", "limit_mw"] = 45
    ev = pd.read_csv(tmp_path / "ref" / "events.csv", keep_default_na=False).to_dict("records")
    ev += [{"event": "drop_w2", "kind": "load_step", "unit": "", "bus": "w2", "area": "",
            "size_mw": -100},
           {"event": "drop_O", "kind": "load_step", "unit": "", "bus": "", "area": "O",
            "size_mw": -90}]
    units = pd.read_csv(tmp_path / "ref" / "units.csv").to_dict("records")
    for r in units:
        r.update(min_output_mw=20, price_down_per_mw_h=3,
                 deadband_mhz=10 if r["unit"] in ("Wa", "Oa") else 0)
    folder = small_case(tmp_path / "c", links=lk.to_dict("records"), events=ev, units=units)
    case = load_case(folder)
    out = solve(case, engine="highspy").write(tmp_path / "o")
    alloc = pd.read_csv(out / "allocation.csv").set_index("unit").loc[case.units.unit]
    evo = pd.read_csv(out / "events.csv").set_index("event")
    got = pd.read_csv(out / "links.csv")
    net = case.nodal
    nb = len(net.buses)
    A = np.zeros((len(case.links), nb))
    A[np.arange(len(A)), net.from_bus] = 1
    A[np.arange(len(A)), net.to_bus] = -1
    b = 1 / case.links.reactance_pu.to_numpy(float)
    Bm = A.T @ (b[:, None] * A)
    load = net.buses.load_mw.to_numpy(float)
    damp = load * 0.01  # 1 %/Hz in both areas
    d = np.array([r["deadband_mhz"] for r in units]) / 1000
    for e, r in enumerate(ev):
        x = float(evo.loc[r["event"], "settled_deviation_hz"])  # signed
        s = -np.sign(x)  # +1: frequency fell, units raise output
        room = alloc["headroom_up_mw" if s > 0 else "headroom_down_mw"].to_numpy(float)
        resp = s * np.minimum(alloc.gain_mw_per_hz.to_numpy() * np.maximum(abs(x) - d, 0), room)
        if r["kind"] == "unit_trip":
            resp[list(case.units.unit).index(r["unit"])] = 0
        inj = np.zeros(nb)
        np.add.at(inj, net.unit_bus, resp)
        inj += s * damp * abs(x)
        size = float(evo.loc[r["event"], "size_mw"])
        if r["bus"]:
            inj[list(net.buses.bus).index(r["bus"])] -= size
        elif r["kind"] == "unit_trip":
            inj[net.unit_bus[list(case.units.unit).index(r["unit"])]] -= size
        else:
            sel = (net.buses.area == r["area"]).to_numpy()
            inj[sel] -= size * load[sel] / load[sel].sum()
        theta = np.zeros(nb)
        theta[1:] = np.linalg.solve(Bm[1:, 1:], inj[1:])
        flow = case.links.flow_mw.to_numpy(float) + b * (A @ theta)
        mine = got[got.event == r["event"]].set_index("link").flow_after_mw
        ref = pd.Series(flow, index=case.links.link)[mine.index]
        assert np.allclose(mine, ref, atol=1e-4), (r["event"], (mine - ref).abs().max())
        assert (mine.abs() <= case.links.set_index("link").limit_mw[mine.index] + 1e-3).all()


def test_nodal_time_series_refused(tmp_path):
    """Nodal cases are snapshots for now (docs/case-format.md): a *_by_period.csv is an
    input error naming buses.csv."""
    folder = small_case(tmp_path / "c")
    pd.DataFrame({"period": ["p1"], "unit": ["Wa"], "output_mw": [240]}).to_csv(
        folder / "units_by_period.csv", index=False)
    with pytest.raises(CaseError) as exc:
        load_case(folder)
    assert any(p.file.endswith("buses.csv") and "time series" in p.message
               for p in exc.value.problems)

"""Importers of open case formats into nodal case tables (optreserve.network.grid.importers) against
outside references: pandapower's DC power flow (pandapower.rundcpp res_line / res_trafo),
MATPOWER's DC branch model (b = 1 / (x * tap), makeBdc in the MATPOWER manual) solved here
with numpy, pandapower's own MATPOWER export (pandapower.converter.matpower.to_mpc), and the
case-format contract (/work/shared/design/case-format.md, "Version 2 additions")."""

from __future__ import annotations

import tomllib
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from optreserve.errors import CaseError
from optreserve.network.grid.importers import (
    ImportDefaults,
    from_pandapower,
    read_matpower,
    read_pandapower_json,
    write_case_folder,
)
from optreserve.network.grid.matpower import parse_matpower

pp = pytest.importorskip("pandapower")
pn = pytest.importorskip("pandapower.networks")
from pandapower.converter.matpower import to_mpc

DATA = Path(__file__).parent / "data"


def _pp_flows(net) -> pd.Series:
    """pandapower's DC branch flows keyed like the importer's links (line<i>, trafo<i>)."""
    s = pd.Series(net.res_line.p_from_mw.to_numpy(), index=[f"line{i}" for i in net.line.index])
    if len(net.trafo):
        s = pd.concat([s, pd.Series(net.res_trafo.p_hv_mw.to_numpy(),
                                    index=[f"trafo{i}" for i in net.trafo.index])])
    return s


def _run(net):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        pp.rundcpp(net, numba=False)


def _matpower_dc_flows(bus, gen, branch) -> np.ndarray:
    """MATPOWER's DC model written here: b = status / (x * tap) (tap 0 means 1), injections
    Pg of in-service generators minus Pd + Gs, slack = the type-3 bus (which takes any
    mismatch, as in MATPOWER's dcpf). Flows of in-service branches, in file order."""
    n = len(bus)
    pos = {int(b): k for k, b in enumerate(bus[:, 0])}
    on = branch[:, 10] > 0
    br = branch[on]
    f = np.array([pos[int(v)] for v in br[:, 0]])
    t = np.array([pos[int(v)] for v in br[:, 1]])
    tap = np.where(br[:, 8] == 0, 1.0, br[:, 8])
    b = 1.0 / (br[:, 3] * tap)
    C = np.zeros((len(br), n))
    C[np.arange(len(br)), f] = 1.0
    C[np.arange(len(br)), t] = -1.0
    B = C.T @ (b[:, None] * C)
    P = -(bus[:, 2] + bus[:, 4])
    g = gen[gen[:, 7] > 0]
    np.add.at(P, [pos[int(v)] for v in g[:, 0]], g[:, 1])
    slack = int(np.flatnonzero(bus[:, 1] == 3)[0])
    keep = [k for k in range(n) if k != slack]
    theta = np.zeros(n)
    theta[keep] = np.linalg.solve(B[np.ix_(keep, keep)], P[keep])
    return b * (C @ theta)


def _write_m(mpc: dict, path: Path) -> None:
    """A MATPOWER .m file of the standard columns of an mpc dict (test-side writer)."""
    widths = {"bus": 13, "gen": 21, "branch": 13}
    lines = [f"function mpc = {path.stem}", "mpc.version = '2';",
             f"mpc.baseMVA = {float(mpc['baseMVA'])!r};"]
    for key, w in widths.items():
        a = np.asarray(mpc[key], float)[:, :w]
        lines.append(f"mpc.{key} = [")
        lines += ["\t" + "\t".join(repr(float(v)) for v in r) + ";" for r in a]
        lines.append("];")
    path.write_text("\n".join(lines) + "\n")


@pytest.mark.parametrize("name", ["case9", "case14", "case39", "case118", "case300"])
def test_pandapower_network_flows_and_counts(name):
    """flow_mw equals pandapower.rundcpp within 0.01 MW; one bus row per bus, one link per
    in-service line and transformer; units and loads balance (contract: within 0.1 %)."""
    net = getattr(pn, name)()
    t = from_pandapower(net, name=name)
    ref = _pp_flows(net)  # from_pandapower ran rundcpp on net itself
    assert len(t.buses) == len(net.bus) and len(t.links) == len(ref)
    np.testing.assert_allclose(t.links.set_index("link").flow_mw.reindex(ref.index),
                               ref.to_numpy(), atol=0.01)
    total_load = t.buses.load_mw.sum()
    assert abs(t.units.output_mw.sum() - total_load) <= 0.001 * total_load
    assert t.buses.load_mw.min() >= 0 and t.units.capacity_mw.min() > 0
    assert (t.units.min_output_mw <= t.units.output_mw).all()
    assert (t.units.output_mw <= t.units.capacity_mw + 1e-9).all()
    if name == "case300":
        assert (t.links.reactance_pu < 0).any()


def test_zones_become_areas_and_events_follow_the_largest_unit():
    """case39's buses carry zones 1-3 (pandapower.networks.case39): three areas whose loads
    are the sums of their buses'; the trip is the unit of largest output (contract:
    unit_trip size defaults to the output) and the load step sits in the area of most load."""
    net = pn.case39()
    t = from_pandapower(net, name="case39")
    zone_load = (net.res_load.p_mw.groupby(net.load.bus).sum()
                 .groupby(net.bus.zone).sum())
    assert sorted(t.areas.area) == ["1", "2", "3"]
    got = t.areas.set_index("area").load_mw
    np.testing.assert_allclose([got["1"], got["2"], got["3"]],
                               [zone_load[1.0], zone_load[2.0], zone_load[3.0]], atol=1e-9)
    trip = t.events[t.events.kind == "unit_trip"].iloc[0]
    assert trip.size_mw == pytest.approx(t.units.output_mw.max())
    step = t.events[t.events.kind == "load_step"].iloc[0]
    assert step.area == got.idxmax()
    ties = t.links.merge(t.buses[["bus", "area"]], left_on="from_bus", right_on="bus") \
        .merge(t.buses[["bus", "area"]], left_on="to_bus", right_on="bus")
    assert (ties.area_x != ties.area_y).any()


def test_hand_written_matpower_file():
    """tests/data/fernholt6.m (invented) against MATPOWER's DC model solved here: bus ids are
    the file's numbers, areas its area column, rate_a 0 leaves a link unmonitored, the
    out-of-service branch and generator are left out, the transformer's reactance is x * tap,
    and the slack takes the 10 MW the file's Pg leaves unbalanced."""
    t = read_matpower(DATA / "fernholt6.m")
    assert list(t.buses.bus) == [10, 20, 30, 35, 40, 50]
    assert list(t.buses.area) == ["1", "1", "2", "2", "2", "2"]
    links = t.links.set_index("link")
    assert list(links.index) == [f"br{k}" for k in range(1, 8)]  # br8 is out of service
    assert np.isnan(links.limit_mw["br3"]) and links.limit_mw["br1"] == pytest.approx(300)
    assert links.reactance_pu["br6"] == pytest.approx(-0.04)
    assert links.reactance_pu["br7"] == pytest.approx(0.08 * 0.975)
    assert sorted(t.units.unit) == ["g1", "g2", "g3"]
    assert t.units.set_index("unit").output_mw["g1"] == pytest.approx(300.0)
    assert any("g1" in n and "290.000 MW in the file" in n for n in t.notes)
    # Reference: the file's numbers, transcribed (not read through the importer).
    bus = np.array([[10, 3, 0, 0, 0], [20, 2, 150, 30, 0], [30, 2, 200, 40, 0],
                    [35, 1, 0, 0, 0], [40, 1, 120, 20, 0], [50, 1, 80, 15, 0]], float)
    gen = np.zeros((4, 10))
    gen[:, [0, 1, 7]] = [[10, 290, 1], [20, 200, 1], [30, 50, 1], [40, 0, 0]]
    branch = np.zeros((8, 11))
    branch[:, [0, 1, 3, 8, 10]] = [[10, 20, 0.06, 0, 1], [10, 30, 0.08, 0, 1],
                                   [20, 30, 0.05, 0, 1], [20, 40, 0.10, 0, 1],
                                   [30, 35, 0.12, 0, 1], [35, 40, -0.04, 0, 1],
                                   [40, 50, 0.08, 0.975, 1], [30, 50, 0.20, 0, 0]]
    np.testing.assert_allclose(links.flow_mw.to_numpy(), _matpower_dc_flows(bus, gen, branch),
                               atol=1e-6)
    # The series-compensated path carries one flow through both sections.
    assert links.flow_mw["br5"] == pytest.approx(links.flow_mw["br6"])


@pytest.mark.parametrize("name", ["case14", "case300"])
def test_matpower_round_trip_through_pandapower_export(name, tmp_path):
    """pandapower.converter.matpower.to_mpc writes the network as MATPOWER data; read back,
    the counts match and the flows equal MATPOWER's DC model of the written numbers (numpy,
    1e-6 MW) and, for case14, pandapower's own rundcpp of the original network (0.01 MW).
    (case300's transformers carry magnetising susceptance, which pandapower's default "t"
    transformer model and the MATPOWER pi model treat slightly differently.)"""
    net = getattr(pn, name)()
    _run(net)  # to_mpc initialises from results
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        mpc = to_mpc(net)["mpc"]
    path = tmp_path / f"{name}.m"
    _write_m(mpc, path)
    t = read_matpower(path)
    assert len(t.buses) == len(net.bus)
    assert len(t.links) == len(net.line) + len(net.trafo)
    flows = t.links.set_index("link").flow_mw
    order = [f"br{k + 1}" for k in range(len(mpc["branch"]))]
    ref = _matpower_dc_flows(np.asarray(mpc["bus"], float), np.asarray(mpc["gen"], float),
                             np.asarray(mpc["branch"], float))
    np.testing.assert_allclose(flows.reindex(order).to_numpy(), ref, atol=1e-6)
    if name == "case14":
        np.testing.assert_allclose(flows.reindex(order).to_numpy(),
                                   _pp_flows(net).to_numpy(), atol=0.01)


def test_pandapower_json_equals_the_network(tmp_path):
    """pandapower.to_json / from_json (pandapower's own format) gives the same tables."""
    net = pn.case14()
    path = tmp_path / "case14.json"
    pp.to_json(net, str(path))
    a = read_pandapower_json(path)
    b = from_pandapower(pn.case14(), name="case14")
    for key in ("buses", "units", "links", "areas", "events"):
        pd.testing.assert_frame_equal(getattr(a, key), getattr(b, key))


def test_base_case_overloads_are_reported_and_can_be_dropped():
    """A line's limit (pandapower: max_i_ka x vn_kv x sqrt 3 x max_loading_percent) set below
    its pandapower DC flow must be reported with flow and limit; with drop_overloaded_limits
    the link is left unmonitored and a note says so."""
    net = pn.case9()
    _run(net)
    line = int(np.argmax(np.abs(net.res_line.p_from_mw.to_numpy())))
    flow = float(net.res_line.p_from_mw.iloc[line])
    vn = float(net.bus.vn_kv.at[net.line.from_bus.iloc[line]])
    net.line.loc[net.line.index[line], "max_i_ka"] = 0.5 * abs(flow) / (vn * np.sqrt(3))
    t = from_pandapower(net, name="case9")
    assert len(t.overloads) == 1
    o = t.overloads[0]
    assert o.link == f"line{net.line.index[line]}"
    assert o.flow_mw == pytest.approx(flow, abs=0.01)
    assert o.limit_mw == pytest.approx(0.5 * abs(flow))
    assert t.links.set_index("link").limit_mw[o.link] == pytest.approx(0.5 * abs(flow))
    d = from_pandapower(net, name="case9", drop_overloaded_limits=True)
    assert np.isnan(d.links.set_index("link").limit_mw[o.link])
    assert any(o.link in n and "limit dropped" in n for n in d.notes)


def test_defaults_are_written_and_editable(tmp_path):
    defaults = ImportDefaults(droop_min_pct=4.0, droop_max_pct=5.0, load_step_mw=50.0)
    t = read_matpower(DATA / "fernholt6.m", defaults=defaults)
    assert set(t.units.droop_min_pct) == {4.0} and set(t.units.droop_max_pct) == {5.0}
    assert t.events.set_index("kind").size_mw["load_step"] == 50.0
    assert set(t.areas.load_damping_pct_per_hz) == {1.0}


def test_write_case_folder_atomic_and_never_over_a_users_files(tmp_path):
    t = read_matpower(DATA / "fernholt6.m")
    out = write_case_folder(t, tmp_path / "case")
    assert sorted(p.name for p in out.iterdir()) == sorted(
        ["case.toml", "buses.csv", "units.csv", "links.csv", "areas.csv", "events.csv"])
    toml = tomllib.loads((out / "case.toml").read_text())
    assert toml["limits"]["max_settled_deviation_hz"] == 0.2
    links = pd.read_csv(out / "links.csv", keep_default_na=False)
    assert links.limit_mw[2] == ""  # unmonitored: an empty cell (contract)
    np.testing.assert_allclose(links.flow_mw, t.links.flow_mw, atol=1e-6)
    users = tmp_path / "mine"
    users.mkdir()
    (users / "notes.txt").write_text("keep")
    with pytest.raises(CaseError, match="exists and is not empty"):
        write_case_folder(t, users)
    assert [p.name for p in users.iterdir()] == ["notes.txt"]
    assert (users / "notes.txt").read_text() == "keep"
    empty = tmp_path / "empty"
    empty.mkdir()
    write_case_folder(t, empty)
    assert (empty / "case.toml").exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temp left


def test_matpower_format_errors_name_file_line_and_field(tmp_path):
    text = (DATA / "fernholt6.m").read_text()
    bad = tmp_path / "bad.m"  # line 18 of the file holds bus 20
    bad.write_text(text.replace("\t20\t2\t150\t30", "\t20\t2\t1x50\t30"))
    with pytest.raises(CaseError, match=r"bad\.m row 18 column bus: mpc\.bus: not a number: "
                                        r"'1x50'"):
        parse_matpower(bad)
    old = tmp_path / "old.m"
    old.write_text(text.replace("mpc.version = '2';", "mpc.version = '1';"))
    with pytest.raises(CaseError, match="only version 2"):
        parse_matpower(old)
    none = tmp_path / "none.m"
    none.write_text("function mpc = none\nmpc.baseMVA = 100;\n")
    with pytest.raises(CaseError, match="has no mpc.bus"):
        parse_matpower(none)


def test_consumers_and_negative_loads_keep_the_balance_and_the_flows():
    """A generator with max_p_mw <= 0 drawing 20 MW becomes bus load, and a bus whose net
    load is negative (a -30 MW load) gets a non-providing infeed unit; flows still equal
    pandapower.rundcpp within 0.01 MW and the contract's rules hold (load_mw >= 0,
    capacity_mw > 0)."""
    net = pn.case9()
    g = net.gen.index[0]
    net.gen.loc[g, ["p_mw", "max_p_mw", "min_p_mw"]] = [-20.0, 0.0, -50.0]
    free_bus = int(net.bus.index[~net.bus.index.isin(net.load.bus)
                                 & ~net.bus.index.isin(net.gen.bus)
                                 & ~net.bus.index.isin(net.ext_grid.bus)][0])
    pp.create_load(net, free_bus, p_mw=-30.0)
    t = from_pandapower(net, name="case9")
    ref = _pp_flows(net)
    np.testing.assert_allclose(t.links.set_index("link").flow_mw.reindex(ref.index),
                               ref.to_numpy(), atol=0.01)
    buses = t.buses.set_index("bus")
    assert buses.load_mw[int(net.gen.bus[g])] == pytest.approx(20.0 + float(
        net.load.p_mw[net.load.bus == net.gen.bus[g]].sum()))
    infeed = t.units.set_index("unit").loc[f"netinfeed_{free_bus}"]
    assert infeed.output_mw == pytest.approx(30.0) and infeed.provides == "false"
    assert buses.load_mw[free_bus] == 0.0
    assert t.buses.load_mw.min() >= 0 and t.units.capacity_mw.min() > 0
    assert not (t.events.unit == f"netinfeed_{free_bus}").any()

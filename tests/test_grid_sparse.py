"""The sparse nodal DC grid (optreserve.network.grid.sparse) against outside references:
pandapower's DC power flow (pandapower.rundcpp, res_line / res_trafo p_from_mw), pandapower's
PTDF (pandapower.pypower.makePTDF, the PYPOWER/MATPOWER routine), a dense numpy solve written
in the test, and hand calculations from the DC power-flow rules."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from optreserve.network.grid import Grid, GridError

try:  # pandapower is the outside reference of most tests here; the hand checks run without
    import pandapower as pp
    import pandapower.networks as pn
    from pandapower.pypower.idx_brch import BR_STATUS, BR_X, F_BUS, SHIFT, T_BUS, TAP
    from pandapower.pypower.idx_bus import BUS_TYPE, REF
    from pandapower.pypower.makePTDF import makePTDF
except ImportError:  # pragma: no cover - depends on the installation
    pp = None
needs_pp = pytest.mark.skipif(pp is None, reason="pandapower is not installed")


def _solved(name: str):
    net = getattr(pn, name)()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        pp.rundcpp(net, numba=False)
    return net


def _grid_of(net, **kw) -> Grid:
    """A Grid from pandapower's own DC branch data: x on the system base times the tap
    (PYPOWER's makeBdc divides the series susceptance by the tap)."""
    br = net._ppc["branch"]
    on = br[:, BR_STATUS].real > 0
    br = br[on]
    n = net._ppc["bus"].shape[0]
    return Grid(range(n), br[:, F_BUS].real.astype(int), br[:, T_BUS].real.astype(int),
                (br[:, BR_X] * br[:, TAP]).real, **kw)


def _injections(net) -> np.ndarray:
    """pandapower's bus injections (res_bus p_mw is consumption, so the injection is minus)."""
    inj = np.zeros(net._ppc["bus"].shape[0])
    np.add.at(inj, net._pd2ppc_lookups["bus"][net.bus.index], -net.res_bus.p_mw.to_numpy())
    return inj


def _pp_branch_flows(net) -> np.ndarray:
    parts = [net.res_line.p_from_mw.to_numpy()]
    if len(net.trafo):
        parts.append(net.res_trafo.p_hv_mw.to_numpy())
    return np.concatenate(parts)


@needs_pp
@pytest.mark.parametrize("name", ["case9", "case14", "case39", "case118", "case300"])
def test_flows_equal_pandapower_dc_power_flow(name):
    """Source: pandapower.rundcpp (res_line.p_from_mw, res_trafo.p_hv_mw), within 0.01 MW."""
    net = _solved(name)
    grid = _grid_of(net)
    if name == "case300":
        assert (grid.reactance_pu < 0).any()  # the series-compensated branch is in the test
    assert not np.any(net._ppc["branch"][:, SHIFT].real)  # no phase shifters in these cases
    flows = grid.flows(_injections(net))
    np.testing.assert_allclose(flows, _pp_branch_flows(net), rtol=0, atol=0.01)


@needs_pp
def test_phase_shift_base_case_equals_pandapower():
    """Source: pandapower.rundcpp with a phase-shifting transformer (case14 with a 5 degree
    shift put on one transformer), within 0.01 MW."""
    net = pn.case14()
    net.trafo.loc[net.trafo.index[0], "shift_degree"] = 5.0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        pp.rundcpp(net, numba=False)
    br = net._ppc["branch"]
    shift = np.deg2rad(br[:, SHIFT].real)
    assert np.count_nonzero(shift) == 1
    flows = _grid_of(net).flows(_injections(net), shift_rad=shift, base_mva=net.sn_mva)
    np.testing.assert_allclose(flows, _pp_branch_flows(net), rtol=0, atol=0.01)


@needs_pp
def test_batch_of_columns_equals_single_solves_and_slack_does_not_matter():
    """DC power-flow rules (common practice): flows of balanced injections do not depend on
    the slack bus; one batched solve equals column-by-column solves. Reference: pandapower
    injections of case118 plus seeded random balanced patterns."""
    net = _solved("case118")
    rng = np.random.default_rng(7)
    P = rng.normal(size=(118, 5)) * 50
    P -= P.mean(axis=0)
    P[:, 0] = _injections(net)
    g0, g1 = _grid_of(net), _grid_of(net, slack=77)
    F = g0.flows(P)
    assert F.shape == (g0.n_branches, 5)
    for k in range(5):
        np.testing.assert_allclose(F[:, k], g0.flows(P[:, k]), atol=1e-8)
    np.testing.assert_allclose(g1.flows(P), F, atol=1e-8)
    np.testing.assert_allclose(F[:, 0], _pp_branch_flows(net), atol=0.01)


@needs_pp
def test_ptdf_rows_equal_pandapower_ptdf_and_dense_reference():
    """Sources: pandapower.pypower.makePTDF (dense PTDF of the PYPOWER routine, slack = the
    reference bus) and a dense inverse of the reduced B written here with numpy, on case14."""
    net = _solved("case14")
    ppc = net._ppc
    slack = int(np.flatnonzero(ppc["bus"][:, BUS_TYPE].real == REF)[0])
    grid = _grid_of(net, slack=slack)
    ref_pp = makePTDF(ppc["baseMVA"], ppc["bus"].real, ppc["branch"].real, slack)
    # Own dense reference: Phi = diag(b) C [B_r^-1 with a zero slack row/column].
    n = grid.n_buses
    C = grid.incidence.toarray()
    b = 1.0 / grid.reactance_pu
    B = C.T @ (b[:, None] * C)
    keep = [k for k in range(n) if k != slack]
    X = np.zeros((n, n))
    X[np.ix_(keep, keep)] = np.linalg.inv(B[np.ix_(keep, keep)])
    ref_np = (b[:, None] * C) @ X
    rows = [0, 6, 12, 17, 19]
    got = grid.ptdf_rows(rows)
    assert got.shape == (5, n)
    np.testing.assert_allclose(got, ref_np[rows], atol=1e-10)
    np.testing.assert_allclose(got, ref_pp[rows], atol=1e-10)
    cols = [1, 2, 5, slack, 7]
    sub = grid.ptdf_rows(rows, cols=cols)
    assert sub.shape == (5, 5)
    np.testing.assert_allclose(sub, ref_pp[np.ix_(rows, cols)], atol=1e-10)
    assert np.all(sub[:, 3] == 0)  # the slack column


@needs_pp
def test_ptdf_rows_times_injections_equal_flows_on_case300():
    """PTDF rows applied to pandapower's injections give pandapower's flows on those branches
    (source: pandapower.rundcpp; case300 has a negative reactance), within 0.01 MW."""
    net = _solved("case300")
    grid = _grid_of(net)
    rows = np.r_[np.flatnonzero(grid.reactance_pu < 0), 3, 100, 300, 410]
    phi = grid.ptdf_rows(rows)
    np.testing.assert_allclose(phi @ _injections(net), _pp_branch_flows(net)[rows], atol=0.01)


def test_series_compensation_current_divider():
    """Hand calculation from the DC rules: two parallel branches x = 0.2 and x = -0.1 share
    100 MW as b_k / sum(b): b = 5 and -10, sum -5, so -100 MW and +200 MW."""
    g = Grid(["Amberfold", "Brackwater"], [0, 0], [1, 1], [0.2, -0.1])
    np.testing.assert_allclose(g.flows([100.0, -100.0]), [-100.0, 200.0], atol=1e-9)
    np.testing.assert_allclose(g.ptdf_rows([0, 1], cols=[1]), [[100 / 100], [-200 / 100]])


@needs_pp
def test_island_is_named():
    """Two buses cut off from the rest (case14 without the branches joining buses 12 and 13
    to the others, by ppc index) must be reported by name; connected_components decides."""
    net = _solved("case14")
    br = net._ppc["branch"].real
    f, t = br[:, F_BUS].astype(int), br[:, T_BUS].astype(int)
    island = {12, 13}
    cut = np.isin(f, list(island)) ^ np.isin(t, list(island))
    assert cut.any()
    ids = [f"bus{k}" for k in range(14)]
    with pytest.raises(GridError) as exc:
        Grid(ids, f[~cut], t[~cut], br[~cut, BR_X])
    msg = str(exc.value)
    assert "bus12, bus13" in msg and "island" in msg


def test_bad_branches_name_file_row_and_column():
    """Zero reactance and unknown buses are input errors naming file, row and column."""
    with pytest.raises(GridError) as exc:
        Grid.from_ids(["a", "b", "c"], ["a", "b"], ["b", "c"], [0.1, 0.0],
                      branch_ids=["L1", "L2"], rows=[2, 3])
    assert str(exc.value) == ("links.csv row 3 column reactance_pu: branch L2: is zero (a DC "
                              "branch needs a reactance; merge the two buses instead)")
    with pytest.raises(GridError, match="links.csv row 2 column to_bus: branch L1: bus 'z'"):
        Grid.from_ids(["a", "b"], ["a"], ["z"], [0.1], branch_ids=["L1"], rows=[2])


def test_singular_susceptance_names_the_negative_branch():
    """b = 1/0.1 + 1/(-0.1) = 0 between two buses: B is singular although connected."""
    with pytest.raises(GridError) as exc:
        Grid(["x", "y", "z"], [0, 1, 1], [1, 2, 2], [0.1, 0.1, -0.1],
             branch_ids=["T1", "SC1", "SC2"])
    msg = str(exc.value)
    assert "singular" in msg and "SC2" in msg


def test_unbalanced_injections_are_refused():
    g = Grid(["a", "b"], [0], [1], [0.1])
    with pytest.raises(ValueError, match="sum to"):
        g.flows(np.array([[10.0, 5.0], [-10.0, 0.0]]))


def test_dc_flow_balance_rule():
    """Contract (case-format.md, version 2): outputs and loads must balance within 0.1 % of
    the load, else an input error giving the mismatch. Inside the band the rest is shared by
    the loads in proportion to load; the flow is checked by hand: a 3-bus ring of equal
    reactances, 300 MW in at bus a, loads 100 and 200.3 MW at b and c (mismatch -0.3 MW,
    within 0.3003): loads served are 100 s and 200.3 s with s = 300 / 300.3."""
    g = Grid(["a", "b", "c"], [0, 1, 2], [1, 2, 0], [0.1, 0.1, 0.1])
    flows = g.dc_flow([0], [300.0], [0.0, 100.0, 200.3])
    s = 300.0 / 300.3
    lb, lc = 100.0 * s, 200.3 * s
    # Ring a->b->c->a of equal reactances: the three flows sum to zero (KVL), and
    # F_bc = F_ab - lb, F_ca = F_bc - lc, so F_ab = (2 lb + lc) / 3.
    ab = (2 * lb + lc) / 3
    np.testing.assert_allclose(flows, [ab, ab - lb, ab - 300.0], atol=1e-9)
    with pytest.raises(GridError, match=r"mismatch -1\.000 MW is more than 0\.1 %"):
        g.dc_flow([0], [299.3], [0.0, 100.0, 200.3])


@needs_pp
def test_from_tables_equals_index_form():
    """The table form (buses.csv / links.csv columns of the contract) builds the same grid:
    checked on pandapower's case39 flows (pandapower.rundcpp, 0.01 MW)."""
    import pandas as pd

    net = _solved("case39")
    g = _grid_of(net)
    buses = pd.DataFrame({"bus": [f"N{k}" for k in range(g.n_buses)]})
    links = pd.DataFrame({"link": [f"L{k}" for k in range(g.n_branches)],
                          "from_bus": [f"N{k}" for k in g.from_idx],
                          "to_bus": [f"N{k}" for k in g.to_idx],
                          "reactance_pu": g.reactance_pu, "limit_mw": np.nan})
    h = Grid.from_tables(buses, links, slack_bus="N5")
    assert h.slack == 5 and not h.monitored.any()
    np.testing.assert_allclose(h.flows(_injections(net)), _pp_branch_flows(net), atol=0.01)
    with pytest.raises(GridError, match="bus id 'N1' is not unique"):
        Grid.from_tables(pd.concat([buses, buses.iloc[[1]]]), links)

"""PTDF and the flows of a whole solve against an independent DC load flow written in the
tests (numpy.linalg.lstsq on the full, singular area Laplacian; refcalc.dc_flows)."""

from __future__ import annotations

import numpy as np
import pytest
from conftest import build_case, settings, unit
from refcalc import dc_flows, event_response

import optreserve
from optreserve.network.ptdf import ptdf

AREAS = ["Hollin", "Quarrow", "Skelby", "Tarnmouth"]


def network_case(folder, pairs, reactances, limits=None, flows=None, units=None, events=None,
                 areas=AREAS, **kw):
    limits = limits or [9000.0] * len(pairs)
    flows = flows or [0.0] * len(pairs)
    links = [{"link": f"L{k}", "from_area": areas[i], "to_area": areas[j],
              "reactance_pu": x, "limit_mw": lim, "flow_mw": f0}
             for k, ((i, j), x, lim, f0) in enumerate(zip(pairs, reactances, limits, flows))]
    units = units or [unit(f"{a}_G", a, 1000, 600, 2, 10) for a in areas]
    events = events or [{"event": "e", "kind": "load_step", "area": areas[0], "size_mw": 100}]
    ar = [{"area": a, "load_mw": 1000, "load_damping_pct_per_hz": 1.0} for a in areas]
    return build_case(folder, settings(**kw), units, ar, events, links)


MESH = [(0, 1), (1, 2), (2, 3), (3, 0), (0, 2), (1, 3)]


@pytest.mark.parametrize("seed", range(5))
def test_ptdf_matches_independent_dc_load_flow(case_dir, seed):
    """Independent DC load flow via numpy.linalg.lstsq on the full Laplacian: for random
    balanced injections, Phi @ P equals the flows it gives, on a meshed four-area case
    (including two parallel links between the same pair of areas)."""
    rng = np.random.default_rng(seed)
    pairs = MESH + [(0, 1)]
    x = list(rng.uniform(0.005, 0.2, len(pairs)))
    case = network_case(case_dir(), pairs, x)
    Phi = ptdf(case)
    assert Phi.shape == (len(pairs), len(AREAS))
    for _ in range(5):
        P = rng.normal(0, 500, len(AREAS))
        P -= P.mean()
        ref = dc_flows(AREAS, [(AREAS[i], AREAS[j], xx) for (i, j), xx in zip(pairs, x)], P)
        np.testing.assert_allclose(Phi @ P, ref, atol=1e-8)


@pytest.mark.parametrize("seed", range(3))
def test_ptdf_independent_of_slack(case_dir, seed):
    """DC power-flow theory: for injections that sum to zero the flows do not depend on the
    slack (reference angle) chosen."""
    rng = np.random.default_rng(10 + seed)
    case = network_case(case_dir(), MESH, list(rng.uniform(0.01, 0.1, len(MESH))))
    P = rng.normal(0, 300, len(AREAS))
    P -= P.mean()
    base = ptdf(case, slack=0) @ P
    for s in range(1, len(AREAS)):
        Phi_s = ptdf(case, slack=s)
        assert np.allclose(Phi_s[:, s], 0.0)  # the slack itself absorbs its injection
        np.testing.assert_allclose(Phi_s @ P, base, atol=1e-8)


def test_radial_flows_follow_kirchhoff_current_law(case_dir):
    """Kirchhoff's current law: on a radial (tree) network each link carries exactly the net
    injection on its far side, whatever the reactances (chain Hollin-Quarrow-Skelby-Tarnmouth)."""
    pairs = [(0, 1), (1, 2), (2, 3)]
    case = network_case(case_dir(), pairs, [0.01, 0.3, 0.07])
    P = np.array([120.0, -20.0, 50.0, -150.0])
    flows = ptdf(case) @ P
    # link 0 carries what Hollin injects; link 1 what Hollin+Quarrow inject; link 2 = -Tarnmouth
    np.testing.assert_allclose(flows, [120.0, 100.0, 150.0], atol=1e-9)


def test_parallel_links_split_inversely_to_reactance(case_dir):
    """DC rules (common practice): two parallel lines between two areas share a transfer in
    inverse proportion to their reactances: 300 MW over x = 0.01 and 0.02 -> 200 and 100 MW."""
    areas = AREAS[:2]
    case = network_case(case_dir(), [(0, 1), (0, 1)], [0.01, 0.02], areas=areas)
    np.testing.assert_allclose(ptdf(case) @ np.array([300.0, -300.0]), [200.0, 100.0],
                               atol=1e-9)


def solved_meshed_case(folder, seed, deadbands):
    rng = np.random.default_rng(seed)
    units = []
    for a in AREAS:
        for k in range(3):
            cap = float(rng.uniform(200, 900))
            units.append(unit(f"{a}_{k}", a, cap, 0.75 * cap, 2.0, 10.0,
                              price_up=float(rng.uniform(1, 20)),
                              price_down_per_mw_h=float(rng.uniform(0.5, 5)),
                              deadband_mhz=float(rng.choice([0, 10, 20])) if deadbands else 0))
    events = [{"event": "trip_big", "kind": "unit_trip", "unit": units[4]["unit"]},
              {"event": "step_up", "kind": "load_step", "area": "Tarnmouth", "size_mw": 300},
              {"event": "step_down", "kind": "load_step", "area": "Hollin", "size_mw": -250}]
    lims = list(rng.uniform(400, 800, len(MESH)))
    f0 = list(rng.uniform(-100, 100, len(MESH)))
    return network_case(folder, MESH, list(rng.uniform(0.01, 0.1, len(MESH))), lims, f0, units,
                        events)


@pytest.mark.parametrize("seed,deadbands", [(0, False), (1, False), (2, True), (3, True)])
def test_solve_flows_match_independent_dc_flow(case_dir, seed, deadbands):
    """result.links flow_after_mw equals the flow recomputed here from result.allocation's
    gains and headroom: own settled balance (scipy.optimize.brentq) + own DC load flow
    (numpy.linalg.lstsq on the full Laplacian)."""
    case = solved_meshed_case(case_dir(), seed, deadbands)
    res = optreserve.solve(case, engine="highspy")
    al = res.allocation.set_index("unit").loc[list(case.units["unit"])]
    K = al["gain_mw_per_hz"].to_numpy()
    for _, e in case.events.iterrows():
        dev, _, flows = event_response(case, K, al["headroom_up_mw"], al["headroom_down_mw"], e)
        got = res.links[res.links["event"] == e["event"]].set_index("link")
        got = got.loc[list(case.links["link"])]
        np.testing.assert_allclose(got["flow_after_mw"], flows, atol=1e-4)
        np.testing.assert_allclose(got["flow_before_mw"], case.links["flow_mw"], atol=1e-9)
        ev = res.events.set_index("event").loc[e["event"]]
        assert ev["settled_deviation_hz"] == pytest.approx(dev, abs=1e-7)

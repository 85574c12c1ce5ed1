"""Outside check of the simulator against ANDES (a general-purpose open power-system dynamics
simulator; pinned in pyproject's test extra): its shipped IEEE 14-bus case with GENROU
machines and TGOV1 turbine-governors, a generator trip (the case's own Toggle of GENROU_2,
40 MW) and a load drop (a Toggle of load PQ_6, 29.5 MW, added here).

Equivalent optreserve case: one area (network and voltage dynamics are what optreserve leaves
out), one unit per machine with stored energy M/2 · Sn (ANDES M = 2H on the machine base Sn),
gain Sn / (R f_n) from the TGOV1 droop R, and the reheat model from TGOV1's blocks:
TGOV1 is 1/(1 + sT1) · (1 + sT2)/(1 + sT3), which is optreserve's reheat transfer function
with T_g = T1, T_rh = T3, F_hp = T2/T3. Valve limits are far from reached (the largest change
is 10 MW against at least 23 MW of room), so response_limit = "room".

Loads are made constant power in ANDES (PQ p2p = 1) so that the frequency alone sets the
balance, as in optreserve (load damping 0). Network losses, which optreserve leaves out,
change when the flows move after the event; they are accounted for by giving the optreserve
event the size ANDES's surviving machines actually replaced: Σ_i (Pe_i(end) − Pe_i(0)), the
loss change included (here 0.3 MW of 40). Tolerances: nadir within 5 % of ANDES's
centre-of-inertia nadir (the issue's target; what is left out, GENROU's flux dynamics,
exciters and the network swing, acts in the first second), the settled frequency within
1 mHz once losses are accounted for (both then solve the same power balance), the 0.5 s mean
RoCoF within 5 %. Measured: trip nadir 0.4309 Hz against ANDES 0.4334 Hz (−0.6 %), settled
within 1 µHz, RoCoF −1.3 %; load drop peak 0.3444 against 0.3467 Hz (−0.6 %), settled within
1 µHz, RoCoF −0.3 %.

ANDES runs take a few seconds each (the first run on a machine compiles ANDES's code, about
30 s, once)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from conftest import build_case, settings, unit

andes = pytest.importorskip("andes")

from optreserve.dynamics.simulate import simulate

pytestmark = pytest.mark.slow

T_EVENT = 1.0
T_END = 30.0


def _run_andes(toggle_pq: str | None):
    """ieee14_gentrip.xlsx as shipped (its Toggle trips GENROU_2 at 1 s), or ieee14_full.xlsx
    (the same system without events) with a Toggle disconnecting load toggle_pq at 1 s."""
    andes.config_logger(stream_level=40)
    name = "ieee14/ieee14_gentrip.xlsx" if toggle_pq is None else "ieee14/ieee14_full.xlsx"
    ss = andes.load(andes.get_case(name), setup=False, no_output=True, default_config=True)
    if toggle_pq is not None:
        ss.add("Toggle", {"model": "PQ", "dev": toggle_pq, "t": T_EVENT})
    ss.PQ.config.p2p, ss.PQ.config.p2z = 1.0, 0.0
    ss.PQ.config.q2q, ss.PQ.config.q2z = 1.0, 0.0
    ss.setup()
    ss.PFlow.run()
    ss.TDS.config.tf, ss.TDS.config.no_tqdm, ss.TDS.config.criteria = T_END, 1, 0
    ss.TDS.run()
    g = ss.GENROU
    t = np.asarray(ss.dae.ts.t)
    om = np.asarray(ss.dae.ts.x[:, g.omega.a])
    pe = np.asarray(ss.dae.ts.y[:, g.Pe.a])
    alive = np.ones(g.n, bool)
    if toggle_pq is None:
        alive[list(g.idx.v).index(ss.Toggle.dev.v[0])] = False
    M = np.where(alive, np.asarray(g.M.v, float), 0.0)
    f_n = float(g.fn.v[0])
    coi = ((om * M).sum(axis=1) / M.sum() - 1.0) * f_n
    tg = ss.TGOV1
    info = pd.DataFrame({"syn": tg.syn.v, "R": tg.R.v, "T1": tg.T1.v, "T2": tg.T2.v,
                         "T3": tg.T3.v, "VMAX": tg.VMAX.v, "VMIN": tg.VMIN.v})
    gen = pd.DataFrame({"idx": g.idx.v, "Sn": g.Sn.v, "M": g.M.v, "P0": pe[0],
                        "dPe": pe[-1] - pe[0], "alive": alive}).merge(
        info, left_on="idx", right_on="syn")
    after = t >= T_EVENT
    return {"t": t[after] - T_EVENT, "coi": coi[after], "gen": gen, "f_n": f_n,
            "replaced_mw": float((gen["dPe"] * gen["Sn"])[gen["alive"]].sum()),
            "loads": pd.DataFrame({"idx": ss.PQ.idx.v, "p0": ss.PQ.p0.v}),
            "base": float(ss.config.mva)}


@pytest.fixture(scope="module")
def andes_trip():
    return _run_andes(None)


@pytest.fixture(scope="module")
def andes_load_drop():
    return _run_andes("PQ_6")


def _equivalent(case_dir, ref, event):
    gen = ref["gen"]
    f_n = ref["f_n"]
    units = []
    for r in gen.itertuples():
        # the valve limits VMIN..VMAX (per unit of Sn) as min output and capacity, so that
        # "room" is what the valve allows; stored energy M/2 Sn on that capacity
        cap = r.VMAX * r.Sn
        units.append(unit(r.idx, "ieee14", cap, r.P0 * r.Sn, 1.0, 100.0,
                          min_output_mw=r.VMIN * r.Sn, inertia_s=r.M / 2 * r.Sn / cap,
                          governor="reheat", governor_lag_s=r.T1, reheat_time_s=r.T3,
                          hp_fraction=r.T2 / r.T3, activation_time_s=10.0))
    case = build_case(case_dir(), settings(f_n=f_n, max_dev=1.0,
                                           dynamics={"response_limit": "room"}),
                      units, [{"area": "ieee14", "load_mw": 259.0}], [event])
    K = (gen["Sn"] / (gen["R"] * f_n)).to_numpy(float)
    alloc = pd.DataFrame({"unit": gen["idx"], "area": "ieee14", "gain_mw_per_hz": K,
                          "headroom_up_mw": 0.0, "headroom_down_mw": 0.0})  # room decides
    return case, alloc


def _compare(ref, sim_row, series, f_n):
    nadir_andes = float(np.max(np.abs(ref["coi"][ref["t"] <= 15.0])))
    nadir_ours = abs(sim_row["nadir_hz"] - f_n)
    settled_andes = float(ref["coi"][-1])
    rate_andes = abs(np.interp(0.5, ref["t"], ref["coi"])) / 0.5
    return nadir_andes, nadir_ours, settled_andes, rate_andes


def test_ieee14_generator_trip_matches_andes(case_dir, andes_trip):
    """Trip of GENROU_2 (40 MW, M = 13 s): nadir, settled frequency and RoCoF against ANDES."""
    ref = andes_trip
    f_n = ref["f_n"]
    event = {"event": "trip_g2", "kind": "unit_trip", "unit": "GENROU_2", "area": "ieee14",
             "size_mw": ref["replaced_mw"]}
    case, alloc = _equivalent(case_dir, ref, event)
    sim = simulate(case, alloc, duration_s=T_END - T_EVENT)
    row = sim.summary.iloc[0]
    nadir_a, nadir_o, settled_a, rate_a = _compare(ref, row, sim.series["trip_g2"], f_n)
    assert 0.3 < nadir_a < 0.6  # sanity: the case is the one described (0.433 Hz)
    assert nadir_o == pytest.approx(nadir_a, rel=0.05)
    # settled: both solve Σ K_i Δf = replaced power (losses included in the event size)
    assert row["settled_frequency_hz"] - f_n == pytest.approx(settled_a, abs=1e-3)
    assert row["rocof_hz_per_s"] == pytest.approx(rate_a, rel=0.05)
    assert abs(ref["replaced_mw"] - 40.0) < 1.0  # the loss change is small but not zero


def test_ieee14_load_drop_matches_andes(case_dir, andes_load_drop):
    """Load PQ_6 (29.5 MW) disconnected: an over-frequency event, same checks."""
    ref = andes_load_drop
    f_n = ref["f_n"]
    # size: what the machines replaced, negative (they gave power back), losses included
    event = {"event": "drop_pq6", "kind": "load_step", "area": "ieee14",
             "size_mw": ref["replaced_mw"]}
    case, alloc = _equivalent(case_dir, ref, event)
    sim = simulate(case, alloc, duration_s=T_END - T_EVENT)
    row = sim.summary.iloc[0]
    nadir_a, nadir_o, settled_a, rate_a = _compare(ref, row, sim.series["drop_pq6"], f_n)
    assert ref["replaced_mw"] < -25.0
    assert row["nadir_hz"] > f_n  # a peak
    assert nadir_o == pytest.approx(nadir_a, rel=0.05)
    assert row["settled_frequency_hz"] - f_n == pytest.approx(settled_a, abs=1e-3)
    assert row["rocof_hz_per_s"] == pytest.approx(rate_a, rel=0.05)

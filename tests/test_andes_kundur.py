"""Outside check of the two-area simulator against ANDES (a general-purpose open power-system
dynamics simulator; pinned in pyproject's test extra): its shipped Kundur two-area case
(kundur/kundur_full.xlsx: four 900 MVA GENROU machines at 60 Hz, TGOV1 turbine-governors,
EXDC2 exciters; buses tagged AREA1 / AREA2), with the case's own Toggle (a tie-line trip at
2 s) switched off and one constant-power load of 100 MW added at 1 s:
- a load step: +100 MW at bus 8 (area 2, the importing side), off in the power flow and
  switched on by a Toggle;
- a load drop: -100 MW at bus 7 (area 1, the exporting side), on in the power flow and
  switched off by a Toggle.

No generator trip: every Kundur machine carries 700 MW (a quarter of the generation). With
constant-power loads ANDES stops at the trip instant ("Time step reduced to zero", any of the
four machines); with its default constant-impedance loads the run goes through, but the
loads fall with the voltage and the survivors replace only 389 of the 700 MW, a voltage-
dependent case optreserve does not represent (the centre-of-inertia nadir then differs by
12 %), so it is not a fair check.

Equivalent optreserve case: two areas (the buses' ANDES areas; the network inside each area
and voltage dynamics are what optreserve leaves out), one unit per machine, and one link for
the three parallel 230 kV tie lines 7-8 (reactance 1 / Σ 1/x_l = 0.0733 pu on ANDES's 100 MVA
system base, optreserve's BASE_MVA too). The mapping is the IEEE 14 test's
(tests/test_andes_reference.py): stored energy M/2 · S (ANDES M = 2H), gain S / (R f_n),
valve limits VMIN..VMAX as min output and capacity, and TGOV1 = 1/(1 + sT1) · (1 + sT2)/
(1 + sT3) as optreserve's reheat model with T_g = T1, T_rh = T3, F_hp = T2/T3 (the same
transfer function, so the mapping is exact; TGOV1's Dt and GENROU's D are 0 here). ANDES
converts M, R and the valve limits to the system base at setup; they are used on that base
throughout (M/2 · S_b, S_b / (R f_n)), which equals the machine-base values (H = 6.5 and
6.175 s, R = 5 % on 900 MVA).

Loads are constant power (PQ p2p = 1), as in optreserve (load damping 0). Losses: ANDES's
machines end up replacing Σ_i ΔPe_i, the loss change included, and that is the optreserve
event's size, as in the IEEE 14 test (+111.3 MW for the +100 MW step at the far end of the
tie; -106.0 MW for the -100 MW drop).

Compared, with tolerances:
- the centre-of-inertia nadir (M-weighted over the machines in ANDES, stored-energy weighted
  over the areas in optreserve) within 5 % (the issue's target for IEEE 14; what is left
  out, flux and exciter dynamics and the network inside the areas, acts mostly in the first
  second, the nadir comes about 2 s after the event);
- each area's nadir within 5 % (the area models swing against each other through the tie
  only, but the two areas' nadirs are within 3 % of each other in both simulators);
- the settled frequency within 1 mHz (both then solve the same power balance);
- the 0.5 s mean centre-of-inertia RoCoF within 8 %: ANDES's machines deliver transiently
  more electrical power than the final replaced power (on the step Σ ΔPe is 111.8 MW at 0+
  and 123 MW at 0.5 s against 111.3 MW at the end: losses change while the tie swings and the
  exciters act, measured from ANDES's own Pe), which an event of constant size cannot
  follow, so ANDES falls faster by about that share. Each area's RoCoF is not compared: the
  inter-area mode of the area model (tie reactance only) is quicker than ANDES's (which adds
  the machines' reactances and the lines inside the areas), and the 0.5 s window sees its
  phase (measured: 13-33 % apart per area).

Measured (ANDES 2.0.0, runs to 30 s):
- step +100 MW at bus 8: centre-of-inertia nadir 0.2221 Hz against ANDES 0.2190 Hz
  (+1.4 %); area 1 0.2284 against 0.2295 Hz (-0.5 %), area 2 0.2299 against 0.2269 Hz
  (+1.3 %); settled within 2 µHz (-0.09277 Hz); RoCoF 0.1415 against 0.1488 Hz/s (-4.9 %).
- drop -100 MW at bus 7: centre-of-inertia peak 0.2115 Hz against 0.2115 Hz (0.0 %);
  area 1 0.2181 against 0.2123 Hz (+2.8 %), area 2 0.2174 against 0.2154 Hz (+0.9 %);
  settled within 1 µHz (+0.08831 Hz); RoCoF 0.1348 against 0.1384 Hz/s (-2.6 %).

Each ANDES run takes about 2 s (the first run on a machine compiles ANDES's code, once)."""

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
TIE = (7, 8)  # the three parallel lines between the areas' load buses


def _run_andes(bus: int, step_pu: float):
    """kundur_full.xlsx with its shipped line trip off and a constant-power load of |step_pu|
    (100 MVA base) at `bus`: switched on at 1 s (step_pu > 0, off in the power flow), or on in
    the power flow and switched off at 1 s (step_pu < 0)."""
    andes.config_logger(stream_level=40)
    ss = andes.load(andes.get_case("kundur/kundur_full.xlsx"), setup=False, no_output=True,
                    default_config=True)
    ss.add("PQ", {"idx": "PQ_step", "bus": bus, "p0": abs(step_pu), "q0": 0.0,
                  "u": 0 if step_pu > 0 else 1, "Vn": 230.0})
    ss.add("Toggle", {"model": "PQ", "dev": "PQ_step", "t": T_EVENT})
    ss.PQ.config.p2p, ss.PQ.config.p2z = 1.0, 0.0
    ss.PQ.config.q2q, ss.PQ.config.q2z = 1.0, 0.0
    ss.setup()
    shipped = [i for i, m in enumerate(ss.Toggle.model.v) if m == "Line"]
    ss.Toggle.u.v[shipped] = 0.0  # the case's own tie-line trip at 2 s: not this test's event
    ss.PFlow.run()
    base = float(ss.config.mva)
    bus_area = dict(zip(ss.Bus.idx.v, ss.Bus.area.v))
    area = np.array([f"area{bus_area[b]}" for b in ss.GENROU.bus.v], object)
    loads = pd.DataFrame({"bus": ss.PQ.bus.v, "p0": ss.PQ.p0.v, "u": ss.PQ.u.v})
    load_mw = {a: float(base * loads.loc[(loads["u"] > 0) & (loads["bus"].map(bus_area)
                                                             == int(a[4:])), "p0"].sum())
               for a in sorted(set(area))}
    ss.TDS.config.tf, ss.TDS.config.no_tqdm, ss.TDS.config.criteria = T_END, 1, 0
    ss.TDS.run()
    assert ss.exit_code == 0
    g = ss.GENROU
    f_n = float(g.fn.v[0])
    t = np.asarray(ss.dae.ts.t)
    om = np.asarray(ss.dae.ts.x[:, g.omega.a])
    pe = np.asarray(ss.dae.ts.y[:, g.Pe.a])
    M = np.asarray(g.M.v, float)  # system base (ANDES converts at setup)

    def coi(mask):
        return ((om[:, mask] * M[mask]).sum(axis=1) / M[mask].sum() - 1.0) * f_n

    after = t >= T_EVENT
    freq = {"coi": coi(np.ones(g.n, bool))[after]}
    for a in sorted(set(area)):
        freq[a] = coi(area == a)[after]
    tg = ss.TGOV1
    info = pd.DataFrame({"syn": tg.syn.v, "R": tg.R.v, "T1": tg.T1.v, "T2": tg.T2.v,
                         "T3": tg.T3.v, "VMAX": tg.VMAX.v, "VMIN": tg.VMIN.v, "Dt": tg.Dt.v})
    gen = pd.DataFrame({"idx": g.idx.v, "area": area, "M": g.M.v, "D": g.D.v, "P0": pe[0],
                        "dPe": pe[-1] - pe[0]}).merge(
        info, left_on="idx", right_on="syn")
    ln = ss.Line
    tie = np.array([{int(a), int(b)} == set(TIE) for a, b in zip(ln.bus1.v, ln.bus2.v)])
    return {"t": t[after] - T_EVENT, "freq": freq, "gen": gen, "f_n": f_n, "base": base,
            "replaced_mw": float(base * gen["dPe"].sum()),
            "tie_x_pu": float(1.0 / np.sum(1.0 / np.asarray(ln.x.v, float)[tie])),
            "n_tie": int(tie.sum()), "load_mw": load_mw}


@pytest.fixture(scope="module")
def andes_step():
    return _run_andes(8, 1.0)  # +100 MW at bus 8 (area 2, the importing side)


@pytest.fixture(scope="module")
def andes_drop():
    return _run_andes(7, -1.0)  # -100 MW at bus 7 (area 1, the exporting side)


def _equivalent(case_dir, ref, event):
    gen, f_n, base = ref["gen"], ref["f_n"], ref["base"]
    assert (gen["D"] == 0).all() and (gen["Dt"] == 0).all()  # no damping on either side
    units = []
    for r in gen.itertuples():
        cap = r.VMAX * base  # the valve limit (system base) as capacity, so "room" is the valve's
        units.append(unit(f"G{r.idx}", r.area, cap, r.P0 * base, 1.0, 100.0,
                          min_output_mw=r.VMIN * base, inertia_s=r.M / 2 * base / cap,
                          governor="reheat", governor_lag_s=r.T1, reheat_time_s=r.T3,
                          hp_fraction=r.T2 / r.T3, activation_time_s=10.0))
    areas = [{"area": a, "load_mw": mw} for a, mw in ref["load_mw"].items()]
    # pre-event tie flow from area 1's balance (losses inside area 1 left in): only the
    # link loading uses it, which is not compared here
    gen1 = base * gen.loc[gen["area"] == "area1", "P0"].sum()
    links = [{"link": "tie_7_8", "from_area": "area1", "to_area": "area2",
              "reactance_pu": ref["tie_x_pu"], "limit_mw": 5000.0,
              "flow_mw": round(gen1 - ref["load_mw"]["area1"], 3)}]
    case = build_case(case_dir(), settings(f_n=f_n, max_dev=2.0,
                                           dynamics={"response_limit": "room"}),
                      units, areas, [event], links)
    K = (base / (gen["R"] * f_n)).to_numpy(float)
    alloc = pd.DataFrame({"unit": [u["unit"] for u in units], "area": gen["area"],
                          "gain_mw_per_hz": K, "headroom_up_mw": 0.0,
                          "headroom_down_mw": 0.0})  # room decides
    return case, alloc


def _ours(sim, name, ref):
    """Per-area and centre-of-inertia deviations of optreserve's run (Hz from nominal)."""
    s = sim.series[name]
    f_n = ref["f_n"]
    gen = ref["gen"]
    h = gen.groupby("area")["M"].sum()  # stored energy per area ∝ Σ M
    dev = {a: s[f"frequency_hz:{a}"].to_numpy(float) - f_n for a in h.index}
    dev["coi"] = sum(h[a] * dev[a] for a in h.index) / h.sum()
    return s["time_s"].to_numpy(float), dev


def _nadir(t, x):
    return float(np.max(np.abs(x[t <= 15.0])))


def _rate(t, x):
    return abs(float(np.interp(0.5, t, x))) / 0.5


def _check(sim, name, ref):
    t_o, ours = _ours(sim, name, ref)
    t_a, theirs = ref["t"], ref["freq"]
    for key in ("coi", "area1", "area2"):
        assert _nadir(t_o, ours[key]) == pytest.approx(_nadir(t_a, theirs[key]), rel=0.05), key
    row = sim.summary.iloc[0]
    # settled: both solve Σ K_i Δf = replaced power (losses included in the event size)
    assert row["settled_frequency_hz"] - ref["f_n"] == pytest.approx(
        float(theirs["coi"][-1]), abs=1e-3)
    assert _rate(t_o, ours["coi"]) == pytest.approx(_rate(t_a, theirs["coi"]), rel=0.08)
    return row


def test_kundur_load_step_matches_andes(case_dir, andes_step):
    """+100 MW at bus 8 (area 2): both areas' nadirs, the centre of inertia's nadir and
    RoCoF, and the settled frequency against ANDES."""
    ref = andes_step
    assert ref["n_tie"] == 3 and ref["tie_x_pu"] == pytest.approx(0.0733, abs=1e-3)
    assert 0.15 < _nadir(ref["t"], ref["freq"]["coi"]) < 0.3  # sanity: the described case
    assert 105.0 < ref["replaced_mw"] < 120.0  # 100 MW plus the loss change (not zero)
    event = {"event": "step_bus8", "kind": "load_step", "area": "area2",
             "size_mw": ref["replaced_mw"]}
    case, alloc = _equivalent(case_dir, ref, event)
    sim = simulate(case, alloc, duration_s=T_END - T_EVENT)
    row = _check(sim, "step_bus8", ref)
    assert row["nadir_hz"] < ref["f_n"]


def test_kundur_load_drop_matches_andes(case_dir, andes_drop):
    """-100 MW at bus 7 (area 1): an over-frequency event in the other area, same checks."""
    ref = andes_drop
    assert -120.0 < ref["replaced_mw"] < -85.0  # 100 MW given back, less the loss change
    event = {"event": "drop_bus7", "kind": "load_step", "area": "area1",
             "size_mw": ref["replaced_mw"]}
    case, alloc = _equivalent(case_dir, ref, event)
    sim = simulate(case, alloc, duration_s=T_END - T_EVENT)
    row = _check(sim, "drop_bus7", ref)
    assert row["nadir_hz"] > ref["f_n"]  # a peak

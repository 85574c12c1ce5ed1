"""Time-domain simulation (optreserve.simulate) against outside checks: closed forms of the
swing equation (ramp-model nadir, RoCoF at t = 0+, the second-order step response of one area
with one first-order governor), scipy.signal's step response of the same transfer function, a
textbook two-area example (references.md), the tests' own settled balance + DC load flow
(refcalc), and the independent steady-state answer of a solve on the demo case."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from conftest import build_case, csv_text, settings, unit, write_case
from refcalc import event_response
from scipy import signal

import optreserve
from optreserve import cli
from optreserve.dynamics.integrate import swing_response
from optreserve.dynamics.simulate import simulate

DEMO = Path(__file__).resolve().parents[1] / "instances" / "demo-tri-valley"


def allocation_frame(rows):
    """An allocation table as `optreserve solve --out` writes it (allocation.csv columns)."""
    return pd.DataFrame([{"unit": u, "area": a, "provides": k > 0, "droop_pct": s,
                          "gain_mw_per_hz": k, "headroom_up_mw": up, "headroom_down_mw": dn,
                          "cost_per_h": 0.0} for u, a, s, k, up, dn in rows])


# ------------------------------------------------------------------ 4(a) ramp-model nadir
def test_ramp_response_nadir_matches_closed_form():
    """Ramp model, closed form: a step loss dP met by a response ramping linearly to R over
    T_d, inertia H (MW s), no damping, R >= dP: |df_nadir| = f_n dP^2 T_d / (4 H R) at
    t* = T_d dP / R. Badesa, Teng & Strbac, IEEE Trans. Power Systems 34(5), 2019 (from
    memory; references.md, Dynamics). Test point: f_n = 50, dP = R = 1000 MW, T_d = 10 s,
    H = 100 000 MW s -> 1.25 Hz at t* = 10 s. Before t* the swing equation integrates to
    df(t) = -f_n/(2H) (dP t - R t^2 / (2 T_d)) (hand integration)."""
    f_n, dP, R, T_d, H = 50.0, 1000.0, 1000.0, 10.0, 100_000.0
    t = np.arange(0.0, 20.0005, 0.001)
    df = swing_response(H, dP, lambda s: R * min(s / T_d, 1.0), f_n, duration_s=20.0, times=t)
    f = df["frequency_hz"].to_numpy()
    assert f.min() == pytest.approx(f_n - 1.25, abs=1e-6)
    assert f[np.searchsorted(t, 10.0)] == pytest.approx(f_n - 1.25, abs=1e-6)
    before = t <= 9.8
    assert np.all(f[before] > f_n - 1.25 + 1e-4)  # still falling until t* = 10 s
    hand = f_n - f_n / (2 * H) * (dP * t[before] - R * t[before] ** 2 / (2 * T_d))
    np.testing.assert_allclose(f[before], hand, atol=1e-6)


def test_ramp_response_nadir_time_when_reserve_exceeds_loss():
    """Same closed form (from memory, references.md) with R = 2 dP: nadir
    f_n dP^2 T_d / (4 H R) = 50 * 1000^2 * 10 / (4 * 1e5 * 2000) = 0.625 Hz at
    t* = T_d dP / R = 5 s, after which the frequency recovers."""
    f_n, dP, R, T_d, H = 50.0, 1000.0, 2000.0, 10.0, 100_000.0
    t = np.arange(0.0, 15.0005, 0.001)
    df = swing_response(H, dP, lambda s: R * min(s / T_d, 1.0), f_n, duration_s=15.0, times=t)
    f = df["frequency_hz"].to_numpy()
    k = int(np.argmin(f))
    assert f[k] == pytest.approx(f_n - 0.625, abs=1e-6)
    assert t[k] == pytest.approx(5.0, abs=0.002)
    assert f[-1] > f[k] + 0.1


# ------------------------------------------------------------------ 4(b) one governor
def _one_governor_case(case_dir, H_s=5.0, t_act=20.0):
    """Fenholt: one 1000 MW unit at 2 % droop (K = 1000/(0.02*50) = 1000 MW/Hz), inertia
    constant 5 s (H = 5000 MW s), activation 20 s (lag T = 20/4 = 5 s); 5000 MW of load at
    1 %/Hz (D = 50 MW/Hz); a 100 MW load step."""
    return build_case(
        case_dir(), settings(max_dev=0.2),
        [unit("Marrowby_G", "Fenholt", 1000, 500, 2.0, 2.0, inertia_s=H_s,
              activation_time_s=t_act, deadband_mhz=0)],
        [{"area": "Fenholt", "load_mw": 5000, "load_damping_pct_per_hz": 1.0}],
        [{"event": "feeder_step", "kind": "load_step", "area": "Fenholt", "size_mw": 100}])


def test_single_governor_matches_second_order_step_response(case_dir):
    """Control textbook (any): 2H/f_n dx/dt = -dP + p - D x, T dp/dt = -K x - p gives
    x(s) = -dP (T s + 1) / (s [M T s^2 + (M + D T) s + (D + K)]), M = 2H/f_n; with
    alpha = (M + D T)/(2 M T), w_n^2 = (D + K)/(M T), w_d = sqrt(w_n^2 - alpha^2):
    x(t) = x_ss [1 - e^(-alpha t) (cos w_d t + c sin w_d t)], x_ss = -dP/(D + K),
    c = (alpha - (D + K)/M) / w_d (from x(0) = 0, x'(0) = -dP/M). Second reference:
    scipy.signal.step of the same transfer function."""
    case = _one_governor_case(case_dir)
    f_n, H, D, K, T, dP = 50.0, 5000.0, 50.0, 1000.0, 5.0, 100.0
    alloc = allocation_frame([("Marrowby_G", "Fenholt", 2.0, K, 500.0, 500.0)])
    sim = simulate(case, alloc, duration_s=60.0)
    s = sim.series["feeder_step"]
    t = s["time_s"].to_numpy()
    x = s["frequency_hz:Fenholt"].to_numpy() - f_n
    M = 2 * H / f_n
    alpha = (M + D * T) / (2 * M * T)
    w_d = math.sqrt((D + K) / (M * T) - alpha ** 2)
    c = (alpha - (D + K) / M) / w_d
    x_ss = -dP / (D + K)
    closed = x_ss * (1 - np.exp(-alpha * t) * (np.cos(w_d * t) + c * np.sin(w_d * t)))
    # 5 µHz on a 0.27 Hz swing: the simulator holds the droop demand over each 10 ms step
    # (second-order error in the step, integrate.py)
    np.testing.assert_allclose(x, closed, atol=5e-6)
    grid = np.arange(0.0, 60.005, 0.01)  # signal.step wants equal steps; ours are multiples
    _, y = signal.step(signal.lti([-dP * T, -dP], [M * T, M + D * T, D + K]), T=grid)
    np.testing.assert_allclose(x, np.interp(t, grid, y), atol=5e-6)
    row = sim.summary.iloc[0]
    assert row["nadir_hz"] == pytest.approx(f_n + closed.min(), abs=1e-5)
    # the governor ends at K |x_ss| (settled power balance)
    assert s["response_mw:Marrowby_G"].iloc[-1] == pytest.approx(K * dP / (D + K), abs=1e-3)


# ------------------------------------------------------------------ 4(c) RoCoF at t = 0+
def test_rocof_at_start_is_loss_over_twice_the_remaining_inertia(case_dir):
    """Swing equation at t = 0+ (references.md, Dynamics): RoCoF = dP f_n / (2 H) with the
    tripped unit's inertia removed: 1000 MW lost, H = 10 000 MW * 10 s = 100 000 MW s left
    -> 0.25 Hz/s (0.240 if the tripped unit's 4000 MW s were wrongly kept)."""
    case = build_case(
        case_dir(), settings(max_dev=0.2),
        [unit("Brackwater_Main", "Brackwater", 10000, 8000, 4.0, 4.0, inertia_s=10.0,
              activation_time_s=30.0),
         unit("Gullhaven_T", "Brackwater", 1000, 1000, 4.0, 4.0, inertia_s=4.0,
              activation_time_s=30.0, provides=False)],
        [{"area": "Brackwater", "load_mw": 9000}],
        [{"event": "trip_gullhaven", "kind": "unit_trip", "unit": "Gullhaven_T"}])
    alloc = allocation_frame([("Brackwater_Main", "Brackwater", 4.0, 5000.0, 2000.0, 0.0),
                              ("Gullhaven_T", "Brackwater", None, 0.0, 0.0, 0.0)])
    sim = simulate(case, alloc, duration_s=30.0)
    s = sim.series["trip_gullhaven"]
    k = int(np.searchsorted(s["time_s"], 0.01))
    slope = (s["frequency_hz:Brackwater"].iloc[k] - 50.0) / s["time_s"].iloc[k]
    assert slope == pytest.approx(-0.25, rel=1e-3)
    row = sim.summary.iloc[0]
    assert row["rocof_estimate_hz_per_s"] == pytest.approx(0.25, rel=1e-12)
    # the 500 ms average can only be lower: governors and damping start to act
    assert 0.0 < row["rocof_hz_per_s"] <= 0.25


def test_rocof_at_start_is_local_to_the_event_area(case_dir):
    """Per-area swing equation at t = 0+: only the event area sees the imbalance,
    RoCoF_1 = dP f_n / (2 H_1) = 300 * 50 / (2 * 20 000) = 0.375 Hz/s; the other area starts
    flat (hand arithmetic)."""
    case = build_case(
        case_dir(), settings(max_dev=0.5),
        [unit("Oxley_G", "Oxley", 4000, 3000, 5.0, 5.0, inertia_s=5.0, activation_time_s=20),
         unit("Pennock_G", "Pennock", 6000, 4000, 5.0, 5.0, inertia_s=5.0,
              activation_time_s=20)],
        [{"area": "Oxley", "load_mw": 3000}, {"area": "Pennock", "load_mw": 4000}],
        [{"event": "oxley_step", "kind": "load_step", "area": "Oxley", "size_mw": 300}],
        [{"link": "Oxley-Pennock", "from_area": "Oxley", "to_area": "Pennock",
          "reactance_pu": 0.05, "limit_mw": 2000}])
    K1, K2 = 4000 / (0.05 * 50), 6000 / (0.05 * 50)
    alloc = allocation_frame([("Oxley_G", "Oxley", 5.0, K1, 800.0, 800.0),
                              ("Pennock_G", "Pennock", 5.0, K2, 1200.0, 1200.0)])
    sim = simulate(case, alloc, duration_s=30.0)
    s = sim.series["oxley_step"]
    k = int(np.searchsorted(s["time_s"], 0.01))
    t = s["time_s"].iloc[k]
    assert (s["frequency_hz:Oxley"].iloc[k] - 50) / t == pytest.approx(-0.375, rel=1e-2)
    assert abs(s["frequency_hz:Pennock"].iloc[k] - 50) / t < 0.01 * 0.375


# ------------------------------------------------------------------ settled point
def test_two_area_textbook_example_settles_at_the_textbook_point(case_dir):
    """Saadat, Power System Analysis, ch. 12 two-area example (recomputed, references.md):
    60 Hz, 1000 MVA base, R1 = 0.05, D1 = 0.6, R2 = 0.0625, D2 = 0.9 pu, +187.5 MW in area 1
    -> df = -0.3 Hz, dPm1 = +100 MW, dPm2 = +80 MW, dP12 = -84.5 MW. Unit conversions as in
    references.md (gain S/(R f_n), D pu -> D S / f_n MW/Hz). The inertia (H = 5 s on the
    base) and the governor lag only shape the transient, not the settled point."""
    S, f_n = 1000.0, 60.0
    case = build_case(
        case_dir(), settings(f_n=f_n, max_dev=1.0),
        [unit("Ardmoor_G", "Ardmoor", S, 0.5 * S, 5.0, 5.0, inertia_s=5.0,
              activation_time_s=2.0),
         unit("Belcrest_G", "Belcrest", S, 0.5 * S, 6.25, 6.25, inertia_s=5.0,
              activation_time_s=2.0)],
        [{"area": "Ardmoor", "load_mw": S, "load_damping_pct_per_hz": 100 * (0.6 * S / f_n) / S},
         {"area": "Belcrest", "load_mw": S,
          "load_damping_pct_per_hz": 100 * (0.9 * S / f_n) / S}],
        [{"event": "step1", "kind": "load_step", "area": "Ardmoor", "size_mw": 187.5}],
        [{"link": "Ardmoor-Belcrest", "from_area": "Ardmoor", "to_area": "Belcrest",
          "reactance_pu": 0.1, "limit_mw": 10 * S}])
    K = [S / (0.05 * f_n), S / (0.0625 * f_n)]
    alloc = allocation_frame([("Ardmoor_G", "Ardmoor", 5.0, K[0], 500.0, 500.0),
                              ("Belcrest_G", "Belcrest", 6.25, K[1], 500.0, 500.0)])
    sim = simulate(case, alloc)
    row = sim.summary.iloc[0]
    s = sim.series["step1"].iloc[-1]
    assert row["flat_at_end"]
    assert row["settled_frequency_hz"] == pytest.approx(f_n - 0.3, abs=1e-4)
    assert s["frequency_hz:Belcrest"] == pytest.approx(f_n - 0.3, abs=1e-4)
    assert s["response_mw:Ardmoor_G"] == pytest.approx(100.0, abs=0.05)
    assert s["response_mw:Belcrest_G"] == pytest.approx(80.0, abs=0.05)
    assert s["flow_mw:Ardmoor-Belcrest"] == pytest.approx(-84.5, abs=0.05)


def test_tie_damping_leaves_centre_of_inertia_and_settled_point_alone(case_dir):
    """Newton's third law for the areas (swing equation, hand argument): the inter-area
    damping power leaves one area and enters the other. With no governor and no load
    self-regulation the centre-of-inertia frequency sum_a H_a f_a / sum_a H_a then falls at
    exactly dP f_n / (2 sum_a H_a) with or without it, while the areas swing against each
    other less with it; with governors the settled point does not depend on it."""
    def case_with(damping_pct):
        return build_case(
            case_dir(), settings(max_dev=0.5),
            [unit("Oxley_G", "Oxley", 4000, 3000, 5.0, 5.0, inertia_s=5.0,
                  activation_time_s=8),
             unit("Pennock_G", "Pennock", 6000, 4000, 5.0, 5.0, inertia_s=3.0,
                  activation_time_s=20, deadband_mhz=20)],
            [{"area": "Oxley", "load_mw": 3000, "load_damping_pct_per_hz": damping_pct},
             {"area": "Pennock", "load_mw": 4000, "load_damping_pct_per_hz": damping_pct}],
            [{"event": "oxley_step", "kind": "load_step", "area": "Oxley", "size_mw": 300}],
            [{"link": "Oxley-Pennock", "from_area": "Oxley", "to_area": "Pennock",
              "reactance_pu": 0.05, "limit_mw": 2000}])

    H = np.array([4000 * 5.0, 6000 * 3.0])
    cols = ["frequency_hz:Oxley", "frequency_hz:Pennock"]
    off = allocation_frame([("Oxley_G", "Oxley", None, 0.0, 0.0, 0.0),
                            ("Pennock_G", "Pennock", None, 0.0, 0.0, 0.0)])
    case = case_with(0.0)
    swings = []
    for ratio in (0.0, 0.2):
        s = simulate(case, off, duration_s=5.0, damping_ratio=ratio).series["oxley_step"]
        f = s[cols].to_numpy()
        coi = f @ H / H.sum()
        np.testing.assert_allclose(coi, 50.0 - 300 * 50 / (2 * H.sum()) * s["time_s"],
                                   atol=1e-6)
        late = s["time_s"].to_numpy() >= 3.0
        swings.append(np.abs(f[late, 0] - f[late, 1]).max())
    assert swings[1] < 0.5 * swings[0]

    case = case_with(1.0)
    on = allocation_frame([("Oxley_G", "Oxley", 5.0, 1600.0, 800.0, 800.0),
                           ("Pennock_G", "Pennock", 5.0, 2400.0, 1200.0, 1200.0)])
    ends = [simulate(case, on, damping_ratio=r).series["oxley_step"].iloc[-1]
            for r in (0.02, 0.2)]
    assert ends[0]["frequency_hz:Oxley"] == pytest.approx(ends[1]["frequency_hz:Oxley"],
                                                          abs=1e-5)
    assert ends[0]["flow_mw:Oxley-Pennock"] == pytest.approx(ends[1]["flow_mw:Oxley-Pennock"],
                                                             abs=0.01)


# ------------------------------------------------------------------ the demo case
@pytest.fixture(scope="module")
def demo():
    case = optreserve.load_case(DEMO)
    result = optreserve.solve(case, engine="highspy")
    return case, result, simulate(case, result.allocation)


def test_demo_settles_where_the_steady_state_calculation_says(demo):
    """Every event of the demo: the end of the simulated run agrees with the solve's
    independent settled point within 1 mHz and every link flow within 1 MW, and with the
    tests' own settled balance + DC load flow (refcalc) as well."""
    case, result, sim = demo
    sm = sim.summary.set_index("event")
    ev = result.events.set_index("event")
    al = result.allocation.set_index("unit").loc[list(case.units["unit"])]
    assert sm["flat_at_end"].all()
    for _, e in case.events.iterrows():
        name = e["event"]
        assert abs(sm.loc[name, "settled_frequency_hz"] - ev.loc[name, "settled_frequency_hz"]
                   ) <= 1e-3
        end = sim.series[name].iloc[-1]
        lk = result.links[result.links["event"] == name]
        for r in lk.itertuples():
            assert abs(end[f"flow_mw:{r.link}"] - r.flow_after_mw) <= 1.0
        dev, _, flows = event_response(case, al["gain_mw_per_hz"], al["headroom_up_mw"],
                                       al["headroom_down_mw"], e)
        for a in case.areas["area"]:
            assert abs(end[f"frequency_hz:{a}"] - (50.0 + dev)) <= 1e-3
        for k, link in enumerate(case.links["link"]):
            assert abs(end[f"flow_mw:{link}"] - flows[k]) <= 1.0
        assert sm.loc[name, "settled_ok"]


def _demo_events():
    return list(pd.read_csv(DEMO / "events.csv", comment="#")["event"])


@pytest.mark.parametrize("name", _demo_events())
def test_demo_nadir_within_the_nadir_limit(demo, name):
    """max_nadir_deviation_hz = 0.8 Hz (case.toml; the instantaneous-deviation limit of
    Continental Europe, EU 2017/1485 Annex III, from memory in references.md): the simulated
    frequency of every area stays within it after every event."""
    case, _, sim = demo
    row = sim.summary.set_index("event").loc[name]
    assert abs(row["nadir_hz"] - case.nominal_frequency_hz) <= \
        case.limits.max_nadir_deviation_hz
    assert row["nadir_ok"]


def test_demo_rocof_and_ramp_estimates_by_hand(demo):
    """Per event, computed here from units.csv: stored energy H = sum inertia_s * capacity_mw
    of the online units (output not zero, or may provide) without the tripped unit; RoCoF
    estimate dP f_n / (2 H) (swing equation at t = 0+, references.md); ramp-model nadir
    f_n dP^2 / (4 H rho) with rho = sum headroom / activation_time_s of the responding units
    (references.md, ramp model) -- the optimiser's nadir row keeps it within 0.8 Hz. The
    simulated 500 ms RoCoF stays below the case's 1 Hz/s."""
    case, result, sim = demo
    u = case.units.set_index("unit")
    online = (u["output_mw"] != 0) | u["provides"]
    stored = (u["inertia_s"].fillna(0) * u["capacity_mw"]).where(online, 0.0)
    al = result.allocation.set_index("unit")
    sm = sim.summary.set_index("event")
    for _, e in case.events.iterrows():
        size = e["size_mw"]
        H = stored.sum() - (stored[e["unit"]] if e["kind"] == "unit_trip" else 0.0)
        row = sm.loc[e["event"]]
        assert row["rocof_estimate_hz_per_s"] == pytest.approx(abs(size) * 50 / (2 * H),
                                                               rel=1e-9)
        assert row["rocof_hz_per_s"] <= case.limits.max_rocof_hz_per_s
        assert row["rocof_ok"]
        head = al["headroom_up_mw" if size > 0 else "headroom_down_mw"]
        resp = (al["gain_mw_per_hz"] > 0) & (al.index != e["unit"])
        rho = (head[resp] / u.loc[head[resp].index, "activation_time_s"]).sum()
        ramp_dev = 50 * size ** 2 / (4 * H * rho)
        assert abs(row["nadir_ramp_estimate_hz"] - 50) == pytest.approx(ramp_dev, rel=1e-9)
        assert ramp_dev <= case.limits.max_nadir_deviation_hz * (1 + 1e-6)


# ------------------------------------------------------------------ horizon periods
def test_horizon_period_uses_that_periods_data(case_dir):
    """A two-period case whose load (and so load self-regulation) differs by period: the
    simulated settled point of period 2 is that period's balance (refcalc, tests' own
    calculation on the period-2 snapshot); without --period a multi-period case is refused."""
    folder = write_case(
        case_dir(), settings(max_dev=0.3),
        [unit("Marrowby_G", "Fenholt", 1000, 500, 2.0, 2.0, inertia_s=5.0,
              activation_time_s=8.0)],
        [{"area": "Fenholt", "load_mw": 5000, "load_damping_pct_per_hz": 1.0}],
        [{"event": "feeder_step", "kind": "load_step", "area": "Fenholt", "size_mw": 100}])
    (folder / "areas_by_period.csv").write_text(csv_text([
        {"period": "1", "area": "Fenholt", "load_mw": 5000},
        {"period": "2", "area": "Fenholt", "load_mw": 20000}]))
    case = optreserve.load_case(folder)
    alloc = allocation_frame([("Marrowby_G", "Fenholt", 2.0, 1000.0, 500.0, 500.0)] * 2)
    alloc.insert(2, "period", ["1", "2"])
    sim = simulate(case, alloc, period="2")
    snap = case.snapshots()[1]
    dev, _, _ = event_response(snap, [1000.0], [500.0], [500.0], snap.events.iloc[0])
    assert dev == pytest.approx(-100 / (1000 + 200), rel=1e-9)  # D = 20000 * 1 % = 200 MW/Hz
    assert sim.summary.iloc[0]["settled_frequency_hz"] == pytest.approx(50 + dev, abs=1e-5)
    assert sim.summary.iloc[0]["period"] == "2"
    with pytest.raises(optreserve.CaseError, match="choose one with --period"):
        simulate(case, alloc)


# ------------------------------------------------------------------ command line
def _cli_case(case_dir):
    folder = write_case(
        case_dir("case"), settings(max_dev=0.2, limits={"max_nadir_deviation_hz": 0.8}),
        [unit("Marrowby_G", "Fenholt", 1000, 500, 2.0, 2.0, inertia_s=5.0,
              activation_time_s=20.0),
         unit("Sedge_W", "Fenholt", 300, 200, 4.0, 8.0, provides=False)],
        [{"area": "Fenholt", "load_mw": 5000, "load_damping_pct_per_hz": 1.0}],
        [{"event": "feeder_step", "kind": "load_step", "area": "Fenholt", "size_mw": 100},
         {"event": "trip_sedge", "kind": "unit_trip", "unit": "Sedge_W"}])
    alloc = case_dir("alloc")
    alloc.mkdir()
    (alloc / "allocation.csv").write_text(
        "unit,area,provides,droop_pct,gain_mw_per_hz,headroom_up_mw,headroom_down_mw,"
        "cost_per_h\n"
        "Marrowby_G,Fenholt,true,2.000000,1000.000000,500.000000,500.000000,0.000000\n"
        "Sedge_W,Fenholt,false,,0.000000,0.000000,0.000000,0.000000\n")
    return folder, alloc


def test_cli_writes_series_plots_and_summary_with_caution(case_dir, capsys):
    """The command writes one series and one PNG per event and a summary whose first line is
    its header (plain pandas.read_csv reads it; the caution is printed and in
    simulation.json); a second run into the same folder needs --force."""
    folder, alloc = _cli_case(case_dir)
    out = case_dir("out")
    argv = ["simulate", str(folder), "--allocation", str(alloc), "--all", "--out", str(out),
            "--duration", "30"]
    assert cli.main(argv) == 0
    text = capsys.readouterr().out
    assert "Planning study only" in text
    lines = (out / "simulation_summary.csv").read_text().splitlines()
    assert lines[0].startswith("event,")
    assert "Planning study only" in json.loads((out / "simulation.json").read_text())["caution"]
    sm = pd.read_csv(out / "simulation_summary.csv")
    assert list(sm["event"]) == ["feeder_step", "trip_sedge"]
    for ev in sm["event"]:
        assert (out / f"plot_{ev}.png").read_bytes()[:4] == b"\x89PNG"
        series = pd.read_csv(out / f"series_{ev}.csv")
        assert {"time_s", "frequency_hz:Fenholt", "response_mw:Marrowby_G"} <= set(series)
        assert series["time_s"].iloc[-1] == pytest.approx(30.0)
    before = sorted(p.name for p in out.iterdir())
    assert cli.main(argv) == 2
    assert "not empty" in capsys.readouterr().err
    assert cli.main(argv[:2] + ["--allocation", str(alloc), "--event", "trip_sedge", "--out",
                                str(out), "--force"]) == 0
    # whole-set replacement: the earlier simulation's files go, the new set is complete
    after = sorted(p.name for p in out.iterdir())
    assert after == sorted(n for n in before if "feeder_step" not in n)


@pytest.mark.parametrize("line, where", [
    ("Marrowby_Q,Fenholt,true,2.0,1000,500,500,0", "row 2 column unit"),
    ("Marrowby_G,Fenholt,true,2.0,lots,500,500,0", "row 2 column gain_mw_per_hz"),
    ("Marrowby_G,Westmere,true,2.0,1000,500,500,0", "row 2 column area"),
    ("Marrowby_G,Fenholt,true,2.0,1000,-5,500,0", "row 2 column headroom_up_mw"),
    ("Marrowby_G,Fenholt,true,4.0,1000,500,500,0", "row 2 column droop_pct"),
])
def test_cli_bad_allocation_is_one_line_with_file_row_column(case_dir, capsys, line, where):
    """Bad input (project rule): exit code 2, one line naming file, row and column, nothing
    written."""
    folder, alloc = _cli_case(case_dir)
    text = (alloc / "allocation.csv").read_text().splitlines()
    (alloc / "allocation.csv").write_text("\n".join([text[0], line, text[2]]) + "\n")
    out = case_dir("out")
    code = cli.main(["simulate", str(folder), "--allocation", str(alloc), "--all", "--out",
                     str(out)])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len(err) == 1 and "allocation.csv" in err[0] and where in err[0]
    assert not out.exists()


def test_cli_missing_unit_and_unknown_event_are_input_errors(case_dir, capsys):
    """A unit of the case without an allocation row, and an event the case does not list:
    exit code 2, nothing written."""
    folder, alloc = _cli_case(case_dir)
    out = case_dir("out")
    code = cli.main(["simulate", str(folder), "--allocation", str(alloc), "--event", "nope",
                     "--out", str(out)])
    assert code == 2 and "no event named 'nope'" in capsys.readouterr().err
    text = (alloc / "allocation.csv").read_text().splitlines()
    (alloc / "allocation.csv").write_text("\n".join(text[:2]) + "\n")
    code = cli.main(["simulate", str(folder), "--allocation", str(alloc), "--all", "--out",
                     str(out)])
    err = capsys.readouterr().err
    assert code == 2 and "no row for unit 'Sedge_W'" in err and "column unit" in err
    assert not out.exists()


def test_area_without_inertia_is_an_input_error(case_dir, capsys):
    """The per-area swing equation needs stored energy in every area: an area whose only
    unit has no inertia_s is refused (exit code 2, file and column named)."""
    folder, alloc = _cli_case(case_dir)
    units = (folder / "units.csv").read_text().replace(",5.0,20.0", ",,20.0")
    (folder / "units.csv").write_text(units)
    out = case_dir("out")
    code = cli.main(["simulate", str(folder), "--allocation", str(alloc), "--all", "--out",
                     str(out)])
    err = capsys.readouterr().err
    assert code == 2
    assert "units.csv column inertia_s: area 'Fenholt' has no online inertia" in err
    assert not out.exists()

"""The simulator with the version 2 governor models (lag, reheat, hydro, inverter), the
response limit (headroom | room), blocked directions and transient tie loading, each against
an integration that shares no code with optreserve: scipy.signal on the closed-loop transfer
function, scipy.integrate.solve_ivp on the state-space form built here from the contract's
transfer functions (case-format "Governor models"), and textbook closed forms."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from conftest import build_case, settings, unit
from scipy import signal
from scipy.integrate import solve_ivp

from optreserve.dynamics.simulate import simulate

F_N = 50.0
# Typical governor parameters (Kundur, Power System Stability and Control, ch. 9 and 11,
# from memory): steam with reheat T_g 0.2 s, T_rh 7 s, F_hp 0.3; hydro T_g 0.5 s, T_w 1.5 s
# (with the ideal penstock 1/(1+sT_g)(1-sT_w)/(1+sT_w/2)); a battery T_g 0.05 s, delay 0.2 s.
MIXED = [
    dict(name="Lagmoor", cap=400, act=12.0, gov={}),
    dict(name="Reheatby", cap=600, gov=dict(governor="reheat", governor_lag_s=0.2,
                                             reheat_time_s=7.0, hp_fraction=0.3)),
    dict(name="Hydrofoss", cap=300, gov=dict(governor="hydro", governor_lag_s=0.5,
                                              water_time_s=1.5)),
]


def _tf(u):
    """(num, den) of a unit's transfer function from the contract (no delay)."""
    g = u["gov"]
    model = g.get("governor", "lag")
    if model == "lag":
        return [1.0], [u["act"] / 4, 1.0]
    tg = g["governor_lag_s"]
    if model == "reheat":
        f, trh = g["hp_fraction"], g["reheat_time_s"]
        return [f * trh, 1.0], np.polymul([tg, 1.0], [trh, 1.0])
    if model == "hydro":
        tw = g["water_time_s"]
        return [-tw, 1.0], np.polymul([tg, 1.0], [tw / 2, 1.0])
    return [1.0], [tg, 1.0]


def _case(case_dir, units, droop=4.0, deadband_mhz=0.0, H_s=5.0, load=3000.0, damp=1.0,
          dP=150.0, **sections):
    rows = []
    for u in units:
        rows.append(unit(u["name"], "Tarn", u["cap"], 0.5 * u["cap"], droop, droop,
                         inertia_s=H_s, activation_time_s=u.get("act", 10.0),
                         deadband_mhz=deadband_mhz, **u["gov"]))
    return build_case(case_dir(), settings(max_dev=0.5, **sections), rows,
                      [{"area": "Tarn", "load_mw": load, "load_damping_pct_per_hz": damp}],
                      [{"event": "step", "kind": "load_step", "area": "Tarn", "size_mw": dP}])


def _alloc(case, head, droop=4.0):
    u = case.units
    K = u["capacity_mw"].to_numpy(float) / (droop / 100 * F_N)
    return pd.DataFrame({"unit": u["unit"], "area": u["area"], "provides": True,
                         "droop_pct": droop, "gain_mw_per_hz": K, "headroom_up_mw": head,
                         "headroom_down_mw": head, "cost_per_h": 0.0})


def test_mixed_governors_match_closed_loop_transfer_function(case_dir):
    """Linear range (no dead band, headroom never reached): Δf(s) = −ΔP / (s 2H/f_n + D +
    Σ K_i G_i(s)) / s, evaluated by scipy.signal.step on the polynomial form (control
    textbook algebra). The issue asks 2 mHz; a fixed 10 ms step holds far less."""
    case = _case(case_dir, MIXED)
    sim = simulate(case, _alloc(case, 500.0), duration_s=40.0)
    s = sim.series["step"]
    t = s["time_s"].to_numpy()
    x = s["frequency_hz:Tarn"].to_numpy() - F_N
    H = 5.0 * sum(u["cap"] for u in MIXED)
    D, dP = 3000.0 * 0.01, 150.0
    # common denominator: den = prod den_i; total = (2H/f_n s + D) den + sum K_i num_i prod_j!=i
    dens = [_tf(u)[1] for u in MIXED]
    den = np.array([1.0])
    for d in dens:
        den = np.polymul(den, d)
    total = np.polymul([2 * H / F_N, D], den)
    for i, u in enumerate(MIXED):
        K = u["cap"] / (0.04 * F_N)
        other = np.array([1.0])
        for j, d in enumerate(dens):
            if j != i:
                other = np.polymul(other, d)
        total = np.polyadd(total, K * np.polymul(_tf(u)[0], other))
    grid = np.arange(0.0, 40.0 + 1e-9, 0.01)
    _, y = signal.step(signal.lti(-dP * den, total), T=grid)
    err = np.abs(x - np.interp(t, grid, y)).max()
    assert err < 2e-4, err  # measured 3.6e-5 Hz
    assert sim.summary["nadir_hz"].iloc[0] == pytest.approx(F_N + y.min(), abs=2e-4)


def _reference_ivp(units, K, d_hz, up, H, D, dP, t_end, times):
    """solve_ivp of area swing + each unit's transfer function in controllable canonical form
    (scipy.signal.tf2ss), with the droop demand clip(K (−Δf − d)^+, 0, up) (a deficit only)."""
    ss = [signal.tf2ss(*_tf(u)) for u in units]
    sizes = [a.shape[0] for a, *_ in ss]
    offs = np.cumsum([1] + sizes)

    def rhs(t, y):
        df = y[0]
        dem = np.minimum(K * np.maximum(-df - d_hz, 0.0), up)
        p, dy = 0.0, [0.0]
        for i, (a, b, c, dd) in enumerate(ss):
            xi = y[offs[i]:offs[i + 1]]
            dy.extend(a @ xi + b[:, 0] * dem[i])
            p += float((c @ xi)[0] + dd[0, 0] * dem[i])
        dy[0] = F_N / (2 * H) * (p - dP - D * df)
        return dy

    sol = solve_ivp(rhs, (0, t_end), np.zeros(offs[-1]), method="LSODA", rtol=1e-10,
                    atol=1e-12, t_eval=times, max_step=0.01)
    return sol.y[0]


def test_mixed_governors_with_dead_band_and_limits_match_adaptive_integration(case_dir):
    """Nonlinear case (20 mHz dead band, headroom 25 MW per unit reached during the dip):
    against solve_ivp (LSODA, rtol 1e-10) of the same equations written here from the
    contract's transfer functions. The issue's acceptance: within 2 mHz."""
    case = _case(case_dir, MIXED, deadband_mhz=20.0, dP=120.0)
    head = np.array([25.0, 25.0, 25.0])
    sim = simulate(case, _alloc(case, head), duration_s=30.0)
    s = sim.series["step"]
    t = s["time_s"].to_numpy()
    x = s["frequency_hz:Tarn"].to_numpy() - F_N
    K = np.array([u["cap"] / (0.04 * F_N) for u in MIXED])
    H = 5.0 * sum(u["cap"] for u in MIXED)
    ref = _reference_ivp(MIXED, K, 0.02, head, H, 30.0, 120.0, 30.0, t)
    err = np.abs(x - ref).max()
    assert err < 2e-3, err
    assert err < 2e-4, err  # measured 3.3e-6 Hz


def test_inverter_delay_with_saturated_demand_matches_closed_form(case_dir):
    """A battery whose droop saturates at once (gain 10^6 MW/Hz, headroom 100 MW: saturated
    once Δf passes 0.1 mHz, 0.5 ms after the event) delivers r (1 − e^(−(t−D)/T_g)) after its
    delay D; with no damping the swing equation integrates by hand to
    Δf(t) = −f_n/(2H) (ΔP t − r [τ − T_g (1 − e^(−τ/T_g))]), τ = (t − D)^+. The 0.5 ms before
    saturation cost at most r · 0.5 ms of energy, f_n/(2H) · 0.05 MW s = 0.13 mHz."""
    units = [dict(name="Cellbank", cap=200, gov=dict(governor="inverter", governor_lag_s=0.05,
                                                       delay_s=0.23))]
    case = _case(case_dir, units, load=3000.0, damp=0.0, dP=80.0, H_s=50.0)
    alloc = _alloc(case, 100.0)
    alloc["gain_mw_per_hz"] = 1e6
    alloc["droop_pct"] = np.nan
    sim = simulate(case, alloc, duration_s=1.2)
    s = sim.series["step"]
    t = s["time_s"].to_numpy()
    H = 50.0 * 200
    tau = np.maximum(t - 0.23, 0.0)
    closed = -F_N / (2 * H) * (80.0 * t - 100.0 * (tau - 0.05 * (1 - np.exp(-tau / 0.05))))
    err = np.abs(s["frequency_hz:Tarn"].to_numpy() - F_N - closed).max()
    assert err < 1.5e-4, err
    resp = s["response_mw:Cellbank"].to_numpy()
    assert np.all(resp[t < 0.23 - 1e-9] == 0.0)  # nothing before the delay
    assert resp[-1] == pytest.approx(100.0 * (1 - np.exp(-(1.2 - 0.23) / 0.05)), abs=1e-6)


def test_room_lets_the_response_go_past_the_headroom(case_dir):
    """response_limit = "room": a unit holding 5 MW of headroom but 150 MW of room settles at
    the unlimited droop point Δf = −ΔP/(D + K) (power balance); with "headroom" it stops at
    5 MW and the rest falls on load damping, Δf = −(ΔP − 5)/D (hand calculation)."""
    units = [dict(name="Lagmoor", cap=300, act=8.0, gov={})]
    K, D, dP = 300 / (0.04 * F_N), 30.0, 60.0
    for mode, expect in (("room", -dP / (D + K)), ("headroom", -(dP - 5.0) / D)):
        case = _case(case_dir, units, dP=dP, dynamics={"response_limit": mode})
        sim = simulate(case, _alloc(case, 5.0), duration_s=240.0)
        row = sim.summary.iloc[0]
        assert row["settled_frequency_hz"] - F_N == pytest.approx(expect, abs=2e-3), mode
        assert row["steady_state_frequency_hz"] - F_N == pytest.approx(expect, abs=1e-6), mode


def test_blocked_direction_gives_no_response(case_dir):
    """provides_up = false (the agreed representation of provides = down): an under-frequency
    event gets nothing from the unit (contract: in the blocked direction its response is
    blocked); the other unit still responds."""
    units = [dict(name="Lagmoor", cap=300, act=8.0, gov={}),
             dict(name="Downley", cap=300, act=8.0, gov={})]
    case = _case(case_dir, units)
    u = case.units.copy()
    u["provides_up"] = [True, False]
    u["provides_down"] = [True, True]
    case = case.replace(units=u)
    sim = simulate(case, _alloc(case, 50.0), duration_s=10.0)
    s = sim.series["step"]
    assert np.all(s["response_mw:Downley"].to_numpy() == 0.0)
    assert s["response_mw:Lagmoor"].iloc[-1] > 10.0


def test_two_area_tie_overshoot_is_twice_the_inertial_share(case_dir, capsys):
    """Two areas, no governors, no load damping, no tie damping: a step ΔP in area 1 sends
    ΔP H2/(H1 + H2) over the tie on average, oscillating as (1 − cos ω t), so the peak
    transient flow is twice that (undamped second-order system, textbook), ω² = 2π T f_n/2
    (1/H1 + 1/H2) with T = 100 MW/rad / x_pu. A tie limited below that peak is flagged
    (link_ok false) even though the mean flow fits."""
    rows = [unit("Westa", "W", 1000, 500, inertia_s=4.0, provides=False),
            unit("Easta", "E", 3000, 1500, inertia_s=5.0, provides=False)]
    H1, H2, dP, x = 4000.0, 15000.0, 100.0, 0.2
    case = build_case(case_dir(), settings(max_dev=0.5), rows,
                      [{"area": "W", "load_mw": 500.0}, {"area": "E", "load_mw": 1500.0}],
                      [{"event": "step", "kind": "load_step", "area": "W", "size_mw": dP}],
                      [{"link": "WE", "from_area": "W", "to_area": "E", "reactance_pu": x,
                        "limit_mw": 500.0, "transient_limit_mw": 120.0}])
    alloc = pd.DataFrame({"unit": ["Westa", "Easta"], "area": ["W", "E"], "provides": False,
                          "gain_mw_per_hz": 0.0, "headroom_up_mw": 0.0,
                          "headroom_down_mw": 0.0})
    omega = np.sqrt(2 * np.pi * (100.0 / x) * F_N / 2 * (1 / H1 + 1 / H2))
    T_end = 1.5 * 2 * np.pi / omega
    sim = simulate(case, alloc, duration_s=T_end, damping_ratio=0.0)
    share = dP * H2 / (H1 + H2)
    s = sim.series["step"]
    t = s["time_s"].to_numpy()
    np.testing.assert_allclose(s["flow_mw:WE"].to_numpy(), -share * (1 - np.cos(omega * t)),
                               atol=0.05)
    lk = sim.links.iloc[0]
    assert lk["max_flow_mw"] == pytest.approx(2 * share, rel=1e-3)
    assert lk["limit_mw"] == 120.0 and not lk["link_ok"]
    assert not sim.summary["link_ok"].iloc[0]
    assert sim.overloaded_links() and "WE" in sim.overloaded_links()[0]
    # the command prints a note and writes the per-link table
    from optreserve import cli
    alloc_file = case_dir("alloc") / "allocation.csv"
    alloc_file.parent.mkdir()
    alloc.to_csv(alloc_file, index=False)
    out = case_dir("out")
    assert cli.main(["simulate", str(case.path), "--allocation", str(alloc_file), "--all",
                     "--out", str(out), "--duration", "5"]) == 0
    assert "note: event step: link WE reaches" in capsys.readouterr().err
    links = pd.read_csv(out / "simulation_links.csv", comment="#")
    assert list(links.columns) == ["event", "link", "limit_mw", "max_flow_mw",
                                   "max_loading_pct", "at_time_s", "link_ok"]
    assert not links["link_ok"].iloc[0]


def test_reheat_unit_step_matches_second_order_closed_form(case_dir):
    """One reheat unit (T_g at its 10 ms floor, T_rh 7 s, F_hp 0.3), gain K, load damping D,
    stored energy H, load step ΔP. With T_g -> 0 (control textbook algebra, as for the lag
    in test_simulate): x(s) = −ΔP (1 + sT) / (s Q(s)), Q = M T s² + (M + D T + K F T) s + D + K,
    M = 2H/f_n, so x(t) = x_ss [1 − e^(−αt)(cos ω_d t + c sin ω_d t)], x_ss = −ΔP/(D + K),
    α = (M + D T + K F T)/(2 M T), ω_d² = (D + K)/(M T) − α², c = (α − (D + K)/M)/ω_d
    (x(0) = 0, x'(0) = −ΔP/M). The 10 ms governor lag the model keeps delays the HP share
    K F_hp x by 10 ms against that limit (1.6 mHz measured): 2.5 mHz allowed. Second, strict
    reference: scipy.signal.step of the exact third-order system with T_g."""
    units = [dict(name="Reheatby", cap=1000, gov=dict(governor="reheat", governor_lag_s=0.01,
                                                       reheat_time_s=7.0, hp_fraction=0.3))]
    case = _case(case_dir, units, H_s=5.0, load=5000.0, damp=1.0, dP=100.0)
    K, D, dP, T, Fh, Tg = 1000 / (0.04 * F_N), 50.0, 100.0, 7.0, 0.3, 0.01
    sim = simulate(case, _alloc(case, 500.0), duration_s=40.0)
    s = sim.series["step"]
    t = s["time_s"].to_numpy()
    x = s["frequency_hz:Tarn"].to_numpy() - F_N
    M = 2 * 5.0 * 1000 / F_N
    alpha = (M + D * T + K * Fh * T) / (2 * M * T)
    w_d = np.sqrt((D + K) / (M * T) - alpha ** 2)
    c = (alpha - (D + K) / M) / w_d
    closed = -dP / (D + K) * (1 - np.exp(-alpha * t) * (np.cos(w_d * t) + c * np.sin(w_d * t)))
    assert np.abs(x - closed).max() < 2.5e-3
    assert sim.summary["nadir_hz"].iloc[0] - F_N == pytest.approx(closed.min(), abs=2.5e-3)
    den = np.polyadd(np.polymul([M, D], np.polymul([Tg, 1.0], [T, 1.0])), K * np.array([Fh * T, 1.0]))
    grid = np.arange(0.0, 40.0 + 1e-9, 0.01)
    _, y = signal.step(signal.lti(-dP * np.polymul([Tg, 1.0], [T, 1.0]), den), T=grid)
    assert np.abs(x - np.interp(t, grid, y)).max() < 5e-5


def test_expm_matches_scipy_linalg():
    """integrate.expm (numpy Pade 13 with scaling and squaring) against scipy.linalg.expm
    (outside reference) on stacks of the simulator's Van Loan matrices and on random
    matrices over six orders of magnitude of norm, and exp(0) = I (to one rounding)."""
    from scipy.linalg import expm as reference

    from optreserve.dynamics.integrate import expm

    rng = np.random.default_rng(7)
    for scale in (1e-4, 1e-2, 1.0, 10.0, 100.0):
        Z = rng.normal(size=(6, 12, 12)) * scale / 12
        Z -= 0.5 * scale * np.eye(12)  # stable, like a swing and governor system
        want = reference(Z)
        got = expm(Z)
        assert np.allclose(got, want, rtol=1e-12, atol=1e-14 * np.abs(want).max())
    assert np.allclose(expm(np.zeros((2, 3, 3))), np.eye(3), rtol=0.0, atol=1e-15)

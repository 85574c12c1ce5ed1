"""Governor models (optreserve.dynamics) against outside references.

Outside references: scipy.signal (lti, step, impulse, lsim, ss2tf, cont2discrete) built from
the contract's transfer-function polynomials (case-format.md "Governor models"), never from our
state space; textbook partial fractions for the lag and reheat steps; the ramp nadir formula of
Badesa, Teng & Strbac (IEEE TPWRS 2019, from memory, references.md) with its test point
1.25 Hz; the swing equation's initial RoCoF (references.md).

Tolerances: scipy's step/lsim integrate with matrix exponentials on the grid (exact for the
inputs used, up to rounding ~1e-12), so closed forms agree to 1e-9 absolute on O(1) values
and 1e-9 relative on energies; numerical quadrature/interpolation tests state their own.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.signal as sg
from scipy.integrate import solve_ivp

from optreserve.dynamics import response as R
from optreserve.dynamics.governors import (BOUNDS, HYDRO, GovernorInputError, GovernorSet,
                                           check_table)

RNG_SEED = 20261202


def random_units(n_per_model: int = 6, seed: int = RNG_SEED):
    """Random parameters inside typical ranges (Kundur ch. 9/11 from memory), every model, plus
    the confluent cases (T_g = T_rh, T_g = T_w / 2) that break naive partial fractions."""
    rng = np.random.default_rng(seed)
    n = n_per_model
    kind = ["lag"] * n + ["reheat"] * n + ["hydro"] * n + ["inverter"] * n + ["reheat", "hydro"]
    tau = np.r_[rng.uniform(0.5, 10, n), np.full(3 * n + 2, np.nan)]
    tg = np.r_[np.full(n, np.nan), rng.uniform(0.05, 0.5, n), rng.uniform(0.2, 1.0, n),
               rng.uniform(0.02, 1.0, n), 3.0, 1.25]
    trh = np.r_[np.full(n, np.nan), rng.uniform(3, 10, n), np.full(2 * n, np.nan), 3.0, np.nan]
    fhp = np.r_[np.full(n, np.nan), rng.uniform(0.2, 1.0, n), np.full(2 * n, np.nan), 0.3, np.nan]
    tw = np.r_[np.full(2 * n, np.nan), rng.uniform(0.5, 4, n), np.full(n, np.nan), np.nan, 2.5]
    dl = np.r_[np.zeros(3 * n), rng.uniform(0, 0.5, n), 0, 0]
    gov = GovernorSet.from_arrays(kind, tau, tg, trh, fhp, tw, dl)
    return gov, kind, tau, tg, trh, fhp, tw, dl


def contract_tf(kind, tau, tg, trh, fhp, tw):
    """(num, den) of the contract's rational part, as written in case-format.md."""
    if kind == "lag":
        return [1.0], [tau, 1.0]
    if kind == "reheat":
        return [fhp * trh, 1.0], np.polymul([tg, 1.0], [trh, 1.0])
    if kind == "hydro":
        return [-tw, 1.0], np.polymul([tg, 1.0], [tw / 2, 1.0])
    return [1.0], [tg, 1.0]  # inverter, without its delay


def tf_list(params):
    gov, kind, tau, tg, trh, fhp, tw, dl = params
    return gov, dl, [contract_tf(k, *p) for k, *p in zip(kind, tau, tg, trh, fhp, tw)]


def test_step_energy_impulse_match_scipy_lti():
    """g, E = integral g and h against scipy.signal.step/impulse of the contract TF and of
    TF/s (energy); delays: scipy has none, so the grid is shifted by the delay."""
    gov, dl, tfs = tf_list(random_units())
    for i, (num, den) in enumerate(tfs):
        t = dl[i] + np.linspace(0.0, 60.0, 1201)
        tr = t - dl[i]
        _, y = sg.step(sg.lti(num, den), T=tr)
        _, e = sg.step(sg.lti(num, np.polymul(den, [1.0, 0.0])), T=tr)
        _, h = sg.impulse(sg.lti(num, den), T=tr[1:])  # h(0) of a relative-degree-1 TF
        assert np.allclose(R.step_response(gov, t)[:, i], y, rtol=0, atol=1e-9), i
        assert np.allclose(R.step_energy(gov, t)[:, i], e, rtol=1e-9, atol=1e-9), i
        assert np.allclose(R.impulse_response(gov, t[1:])[:, i], h, rtol=1e-8, atol=1e-9), i
        assert np.all(R.step_response(gov, t[:1] - 1e-3)[:, i] == 0.0)  # nothing before D


def test_ramp_response_and_energy_match_lsim():
    """Demand min(t/T_r, 1): power and energy against scipy.signal.lsim (linear interpolation
    between samples is exact for this piecewise-linear input when T_r is a grid point)."""
    gov, dl, tfs = tf_list(random_units(seed=RNG_SEED + 1))
    rng = np.random.default_rng(RNG_SEED + 2)
    for i, (num, den) in enumerate(tfs):
        Tr = float(rng.choice([0.5, 2.0, 7.5, 10.0]))
        tr = np.linspace(0.0, 50.0, 2001)  # step 0.025 s: every T_r above is a grid point
        u = np.minimum(tr / Tr, 1.0)
        _, y, _ = sg.lsim(sg.lti(num, den), u, tr)
        _, e, _ = sg.lsim(sg.lti(num, np.polymul(den, [1.0, 0.0])), u, tr)
        t = tr + dl[i]
        assert np.allclose(R.ramp_response(gov, t, Tr)[:, i], y, atol=1e-9), i
        assert np.allclose(R.ramp_energy(gov, t, Tr)[:, i], e, rtol=1e-9, atol=1e-9), i
    # T_r = 0 is the step
    t = np.linspace(0, 20, 11)
    assert np.allclose(R.ramp_response(gov, t, 0.0), R.step_response(gov, t), atol=1e-14)


def test_state_space_realises_contract_tf_and_zoh_matches_cont2discrete():
    """Our (A, B, C) realise the contract TF (scipy.signal.ss2tf), and the closed-form ZOH
    equals scipy.signal.cont2discrete(method='zoh') for an undelayed unit."""
    gov, dl, tfs = tf_list(random_units(seed=RNG_SEED + 3))
    A, B, C, _ = gov.state_space()
    h = 0.137
    z = gov.zoh(h)
    for i, (num, den) in enumerate(tfs):
        n_ss, d_ss = sg.ss2tf(A[i], B[i][:, None], C[i][None, :], np.zeros((1, 1)))
        n_c, d_c = np.polymul(num, [1.0]) / den[0], np.asarray(den) / den[0]
        lead = np.trim_zeros(n_ss[0], "f") if np.any(n_ss) else n_ss[0]
        # compare the TFs by their frequency response (robust to cancelled pole-zero pairs)
        w = np.logspace(-3, 2, 50)
        _, r_ss = sg.freqs(lead, d_ss, worN=w)
        _, r_c = sg.freqs(n_c, d_c, worN=w)
        assert np.allclose(r_ss, r_c, rtol=1e-10, atol=1e-12), i
        if dl[i] == 0:
            Ad, Bd, *_ = sg.cont2discrete((A[i], B[i][:, None], C[i][None, :], [[0.0]]), h,
                                          method="zoh")
            assert np.allclose(z.phi[i], Ad, rtol=1e-12, atol=1e-15), i
            assert np.allclose(z.g_now[i] + z.g_prev[i], Bd[:, 0], rtol=1e-12, atol=1e-15), i


def test_zoh_simulation_exact_for_piecewise_constant_demand_with_delay():
    """Random demand held over steps of h = 0.1 s, delays off the step grid (0.37 s ...):
    our advance() against scipy.signal.lsim (interp=False, zero-order hold) of the contract
    TF on a 0.01 s grid carrying the delayed demand u(t - D) (Laplace shift theorem)."""
    gov, dl, tfs = tf_list(random_units(seed=RNG_SEED + 4))
    rng = np.random.default_rng(RNG_SEED + 5)
    dl_cs = rng.integers(0, 80, gov.n) * (np.asarray(dl) > 0)  # delays in 0.01 s
    gov = GovernorSet(gov.kind, gov.t1, gov.t2, gov.z, dl_cs * 0.01)
    h, steps = 0.1, 300
    u = rng.uniform(-1, 1, (steps, gov.n))
    st = gov.initial_state(h)
    z = gov.zoh(h)
    ys = [gov.output(st)]
    for k in range(steps):
        st = z.advance(st, u[k])
        ys.append(gov.output(st))
    ys = np.array(ys)
    j = np.arange(steps * 10 + 1)  # fine grid index, 0.01 s
    for i, (num, den) in enumerate(tfs):
        idx = (j - dl_cs[i]) // 10
        v = np.where(idx >= 0, u[np.clip(idx, 0, steps - 1), i], 0.0)
        _, y, _ = sg.lsim(sg.lti(num, den), v, j * 0.01, interp=False)
        assert np.allclose(ys[:, i], y[::10], atol=1e-9), i
    # the same through GovernorSet.advance(state, u, h)
    st2 = gov.advance(gov.initial_state(h), u[0], h)
    assert np.allclose(st2.x, z.advance(z.initial_state(), u[0]).x)


def test_inverter_delay_exact_under_step():
    """A unit step through e^(-sD)/(1+sT_g): zero until D, then 1 - exp(-(t-D)/T_g) (shift
    theorem), at every step of a ZOH simulation whose step does not divide D."""
    gov = GovernorSet.from_arrays(["inverter"] * 3, governor_lag_s=[0.05, 0.2, 1.0],
                                  delay_s=[0.37, 0.0, 1.234])
    h = 0.1
    st, z = gov.initial_state(h), gov.zoh(h)
    for k in range(1, 51):
        st = z.advance(st, np.ones(3))
        t = k * h
        want = np.where(t > gov.delay_s, -np.expm1(-(t - gov.delay_s) / gov.t1), 0.0)
        assert np.allclose(gov.output(st), want, atol=1e-12), k
    t = np.array([0.2, 0.37, 0.5, 2.0])
    assert np.allclose(R.step_response(gov, t)[:, 0],
                       np.where(t > 0.37, 1 - np.exp(-(t - 0.37) / 0.05), 0.0), atol=1e-14)


def test_closed_forms_lag_and_reheat_textbook():
    """First-order lag: g = 1 - e^(-t/tau), E = t - tau (1 - e^(-t/tau)). Reheat, partial
    fractions of 1/(1+sT_g) (1+sF T_rh)/(1+sT_rh) / s (textbook algebra):
    g = 1 - T_rh (1-F)/(T_rh-T_g) e^(-t/T_rh) - (T_g - F T_rh)/(T_g - T_rh) e^(-t/T_g).
    Kundur's typical reheat unit (T_g 0.2, T_rh 7, F_hp 0.3, from memory) gives about the
    HP share within a second, which a single lag of the same activation would not."""
    tau, tg, trh, F = 7.5, 0.2, 7.0, 0.3
    gov = GovernorSet.from_arrays(["lag", "reheat"], tau_s=tau, governor_lag_s=tg,
                                  reheat_time_s=trh, hp_fraction=F)
    t = np.linspace(0, 60, 601)
    g, E = R.step_response(gov, t), R.step_energy(gov, t)
    assert np.allclose(g[:, 0], 1 - np.exp(-t / tau), atol=1e-14)
    assert np.allclose(E[:, 0], t - tau * (1 - np.exp(-t / tau)), atol=1e-12)
    g_rh = (1 - trh * (1 - F) / (trh - tg) * np.exp(-t / trh)
            - (tg - F * trh) / (tg - trh) * np.exp(-t / tg))
    assert np.allclose(g[:, 1], g_rh, atol=1e-14)
    g1 = R.step_response(gov, np.array([1.0]))[0, 1]
    assert F < g1 < F + (1 - F) * (1 - np.exp(-1 / trh)) + 1e-9


def test_hydro_reverse_response():
    """Ideal hydro (1 - sT_w)/(1 + sT_w/2): scipy.signal.step gives g(0+) = -2 (its D term).
    With T_g -> 0 our model's dip tends to -2 and its step to scipy's ideal one; with
    T_g > 0 it dips negative first and crosses zero where scipy's step does."""
    tw = 2.0
    ideal = sg.lti([-tw, 1.0], [tw / 2, 1.0])
    t = np.linspace(0, 20, 2001)
    _, y_ideal = sg.step(ideal, T=t)
    assert y_ideal[0] == pytest.approx(-2.0, abs=1e-12)
    fast = GovernorSet.from_arrays(["hydro"], governor_lag_s=1e-6, water_time_s=tw)
    assert R.min_step_response(fast)[0] == pytest.approx(-2.0, abs=1e-4)
    assert np.allclose(R.step_response(fast, t[10:])[:, 0], y_ideal[10:], atol=1e-5)
    gov = GovernorSet.from_arrays(["hydro"] * 3, governor_lag_s=[0.1, 0.5, 1.0],
                                  water_time_s=[1.0, 2.0, 2.0])
    tc, gmin = R.reverse_crossing_s(gov), R.min_step_response(gov)
    for i, (tg, w) in enumerate([(0.1, 1.0), (0.5, 2.0), (1.0, 2.0)]):
        tt = np.linspace(0, 10, 100001)
        _, y = sg.step(sg.lti([-w, 1.0], np.polymul([tg, 1.0], [w / 2, 1.0])), T=tt)
        first_pos = tt[np.argmax(y > 0)]
        assert tc[i] == pytest.approx(first_pos, abs=2e-4)  # grid step 1e-4 s
        assert gmin[i] == pytest.approx(y.min(), abs=1e-6)
        assert np.all(y[(tt > 0) & (tt < tc[i] - 1e-4)] < 0)
        assert np.all(y[tt > tc[i] + 1e-4] > 0)


def lsim_energy(num, den, u, t):
    """Energy delivered by t[-1]: scipy.signal.lsim of TF/s with the demand samples u."""
    _, e, _ = sg.lsim(sg.lti(num, np.polymul(den, [1.0, 0.0])), u, t)
    return e[-1]


def test_energy_lower_bound_holds_and_is_attained():
    """For demands between a lower ramp envelope and an upper one, the energy by t (scipy
    lsim of TF/s) is never below energy_lower_bound, and the worst demand (lo where g(t-s) >=
    0, hi where g(t-s) < 0) attains it (up to the 1 ms interpolation of its jump, 2e-3)."""
    gov, dl, tfs = tf_list(random_units(n_per_model=3, seed=RNG_SEED + 6))
    rng = np.random.default_rng(RNG_SEED + 7)
    t_end = 6.0
    s = np.linspace(0.0, t_end, 6001)
    lo = R.Envelope(0.6, 1.0, 3.0)
    hi = R.Envelope(1.0, 0.0, 0.5)
    env = lambda e, x: e.amplitude * np.clip((x - e.start_s) / e.ramp_s, 0, 1)
    u_lo, u_hi = env(lo, s), env(hi, s)
    bound = R.energy_lower_bound(gov, np.array(t_end), lo, hi)
    tc = R.reverse_crossing_s(gov)
    for i, (num, den) in enumerate(tfs):
        ss = s - dl[i]  # scipy has no delay: the unit sees u(s - D)
        for _ in range(5):  # random demands inside the envelopes
            w = np.clip(np.cumsum(rng.normal(0, 0.05, s.size)) + rng.uniform(), 0, 1)
            u = u_lo + w * (u_hi - u_lo)
            ud = np.interp(ss, s, u, left=0.0)
            assert lsim_energy(num, den, ud, s) >= bound[i] - 1e-9, i
        worst = np.where(t_end - s < dl[i] + tc[i], u_hi, u_lo) if tc[i] > 0 else u_lo
        e_w = lsim_energy(num, den, np.interp(ss, s, worst, left=0.0), s)
        assert e_w == pytest.approx(bound[i], abs=2e-3), i
    hyd = gov.kind == HYDRO
    assert np.all(bound[hyd] < R.energy_lower_bound(gov, np.array(t_end), lo, lo)[hyd])


def test_ramp_nadir_formula_badesa():
    """|df_nadir| = f_n dP^2 T_d / (4 H R) at t* = T_d dP / R (Badesa et al. 2019, from
    memory; references.md test point 1.25 Hz) by integrating the swing equation
    2H/f_n df/dt = -(dP - P(t)) with a ramp-limited response P = R min(t/T_d, 1) through a
    lag of tau: (a) closed-form ramp energy, tau -> 0; (b) our ZOH stepping (h = 10 ms,
    midpoint demand, trapezoid swing), tau = 50 ms. A lag delays a ramp by tau, adding
    f_n dP tau / (2H) to the dip (swing-equation algebra). Initial RoCoF dP f_n / (2H)."""
    f_n, dP, R_mw, T_d, H = 50.0, 1000.0, 1000.0, 10.0, 100_000.0
    gov = GovernorSet.from_arrays(["lag"], tau_s=1e-4)
    t = np.linspace(0, 30, 30001)
    df = f_n / (2 * H) * (dP * t - R_mw * R.ramp_energy(gov, t, T_d)[:, 0])
    assert df.max() == pytest.approx(1.25 + f_n * dP * 1e-4 / (2 * H), abs=1e-6)
    # R = dP leaves the deviation flat after T_d; with R = 2 dP the formula gives a distinct
    # nadir of 0.625 Hz at t* = 5 s
    df2 = f_n / (2 * H) * (dP * t - 2 * R_mw * R.ramp_energy(gov, t, T_d)[:, 0])
    assert df2.max() == pytest.approx(f_n * dP ** 2 * T_d / (4 * H * 2 * R_mw)
                                      + f_n * dP * 1e-4 / (2 * H), abs=1e-6)
    assert t[df2.argmax()] == pytest.approx(T_d * dP / (2 * R_mw) + 1e-4, abs=2e-3)
    tau, h = 0.05, 0.01
    gov = GovernorSet.from_arrays(["lag"], tau_s=tau)
    z, st = gov.zoh(h), gov.initial_state(h)
    dev, y_old, devs = 0.0, 0.0, [0.0]
    for k in range(3000):
        st = z.advance(st, R_mw * min((k + 0.5) * h / T_d, 1.0))
        y_new = gov.output(st)[0]
        dev += f_n / (2 * H) * h * (dP - 0.5 * (y_old + y_new))
        y_old = y_new
        devs.append(dev)
    assert max(devs) == pytest.approx(1.25 + f_n * dP * tau / (2 * H), abs=1e-4)
    assert devs[1] / h == pytest.approx(dP * f_n / (2 * H), rel=1e-2)  # 0.25 Hz/s


@pytest.mark.parametrize("H", [20_000.0, 60_000.0, 200_000.0])  # t_N about 0.4, 1.4, 5.4 s
def test_nadir_coefficient_is_a_lower_bound_on_a_closed_loop_trajectory(H):
    """Closed loop (swing equation, droop with dead band and headroom limiter, mixed models
    incl. hydro), integrated by scipy.integrate.solve_ivp on scipy.signal.tf2ss realisations
    of the contract TFs (not ours). At the first time t_N the deviation reaches N, every
    unit's delivered energy is >= q_i e_i(t_N) with e_i = nadir_energy_coef and rho the RoCoF
    bound of the module docstring (swing-equation argument)."""
    f_n, dP, N = 50.0, 900.0, 0.5
    kinds = ["lag", "reheat", "hydro", "inverter", "hydro"]
    gov = GovernorSet.from_arrays(kinds, tau_s=5.0, governor_lag_s=[0, 0.2, 0.5, 0.3, 0.3],
                                  reheat_time_s=7.0, hp_fraction=0.3, water_time_s=2.0)
    K = np.array([400.0, 500.0, 300.0, 600.0, 200.0])  # MW/Hz
    d = np.array([0.0, 0.01, 0.02, 0.0, 0.01])  # Hz
    r = np.array([150.0, 200.0, 100.0, 80.0, 150.0])  # MW
    q = np.minimum(r, K * np.maximum(N - d, 0))
    sys_ = [sg.tf2ss(*contract_tf(k, 5.0, tg, 7.0, 0.3, 2.0))
            for k, tg in zip(kinds, [0, 0.2, 0.5, 0.3, 0.3])]
    ns = [s[0].shape[0] for s in sys_]
    off = np.r_[0, np.cumsum(ns)]

    def rhs(_t, x):
        dev = x[0]
        u = np.minimum(K * np.maximum(dev - d, 0.0), r)
        dx, p = np.zeros_like(x), np.zeros(len(K))
        for i, (A, B, C, D) in enumerate(sys_):
            xi = x[1 + off[i]:1 + off[i + 1]]
            dx[1 + off[i]:1 + off[i + 1]] = A @ xi + B[:, 0] * u[i]
            p[i] = C[0] @ xi + D[0, 0] * u[i]
        dx[0] = f_n / (2 * H) * (dP - p.sum())
        dx[1 + off[-1]:] = p  # energies
        return dx

    hit = lambda t, x: x[0] - N
    hit.terminal = True
    sol = solve_ivp(rhs, (0, 60), np.zeros(1 + off[-1] + len(K)), events=hit, rtol=1e-10,
                    atol=1e-10, max_step=0.05)
    assert sol.t_events[0].size == 1  # the case is built to cross N: sum q < dP
    tN, xN = sol.t_events[0][0], sol.y_events[0][0]
    energy = xN[1 + off[-1]:]
    rho = f_n / (2 * H) * (dP + np.sum(q * np.abs(R.min_step_response(gov))))
    e = R.nadir_energy_coef(gov, tN, np.maximum(N - d, 0), rho)
    assert np.all(energy >= q * e - 1e-6), (energy, q * e)
    assert np.all(e[gov.kind != HYDRO] > 0)


def units_table(**cols):
    return pd.DataFrame(cols)


def test_validation_rejects_out_of_range_and_missing():
    """Contract bounds (0 < F_hp <= 1, delay inverter only, required columns per model) and
    our documented floors/ceilings (BOUNDS): a 1e-30 s lag, T_w = 20 s, a 6 s delay."""
    good = units_table(governor=["lag", "reheat", "hydro", "inverter", None],
                       activation_time_s=[30.0, np.nan, np.nan, np.nan, 10.0],
                       governor_lag_s=[np.nan, 0.2, 0.5, 0.05, np.nan],
                       reheat_time_s=[np.nan, 7.0, np.nan, np.nan, np.nan],
                       hp_fraction=[np.nan, 0.3, np.nan, np.nan, np.nan],
                       water_time_s=[np.nan, np.nan, 2.0, np.nan, np.nan],
                       delay_s=[np.nan, np.nan, np.nan, 0.2, np.nan])
    assert check_table(good) == []
    gs = GovernorSet.from_table(good)
    assert list(gs.kind) == [0, 1, 2, 3, 0] and gs.t1[0] == 7.5 and gs.delay_s[3] == 0.2
    cases = [("governor_lag_s", 1, 1e-30), ("hp_fraction", 1, 0.0), ("hp_fraction", 1, 1.5),
             ("water_time_s", 2, 20.0), ("delay_s", 3, 6.0), ("delay_s", 1, 0.1),
             ("reheat_time_s", 1, np.nan), ("activation_time_s", 0, np.nan),
             ("governor_lag_s", 3, np.inf), ("activation_time_s", 4, 1e-30)]
    for col, row, val in cases:
        bad = good.copy()
        bad.loc[row, col] = val
        probs = check_table(bad)
        assert [(p.unit, p.column) for p in probs] == [(row, col)], (col, row, probs)
        with pytest.raises(GovernorInputError):
            GovernorSet.from_table(bad)
    bad = good.copy()
    bad.loc[0, "governor"] = "steam"
    assert [(p.unit, p.column) for p in check_table(bad)] == [(0, "governor")]
    # a missing lag activation time is filled by the caller's default, and mask limits the
    # completeness check to the units that must respond
    bad = good.copy()
    bad.loc[0, "activation_time_s"] = np.nan
    assert GovernorSet.from_table(bad, default_activation_time_s=30.0).t1[0] == 7.5
    assert check_table(bad, mask=np.array([False, True, True, True, True])) == []
    assert BOUNDS["hp_fraction"][:3] == (0.0, 1.0, False)
    # a version 1 table (no governor columns): every unit a lag of activation_time_s / 4
    v1 = GovernorSet.from_table(units_table(activation_time_s=[30.0, 8.0]))
    assert list(v1.kind) == [0, 0] and list(v1.t1) == [7.5, 2.0]
    with pytest.raises(ValueError):
        GovernorSet.from_arrays(["lag"], tau_s=0.0)


def test_nadir_coefficient_shapes_broadcast_like_the_rows():
    """(events M, points K) times with per-event RoCoF (M, 1) and per-unit reach (N,) give the
    rows' (M, K, N) array, equal entry by entry to one-point calls (shape contract only; the
    values are checked against the closed-loop simulation above)."""
    gov = random_units(n_per_model=2)[0]
    rng = np.random.default_rng(RNG_SEED + 8)
    times = rng.uniform(0.5, 30, (3, 4))
    rocof = rng.uniform(0.05, 1.0, (3, 1))
    reach = rng.uniform(0.0, 0.8, gov.n)
    coef = R.nadir_energy_coef(gov, times, reach, rocof)
    assert coef.shape == (3, 4, gov.n)
    for m, k in [(0, 0), (2, 3), (1, 2)]:
        one = R.nadir_energy_coef(gov, times[m, k], reach, rocof[m, 0])
        assert np.allclose(coef[m, k], one, rtol=1e-13, atol=1e-13)
    with pytest.raises(ValueError):
        R.nadir_energy_coef(gov, times, reach, 0.0)


def test_exprel_matches_scipy_special():
    """governors.exprel replaces scipy.special.exprel (outside reference: scipy) on the
    non-positive arguments decay_dd gives it, from 1e-20 to 1e3 in magnitude, and at 0."""
    from scipy.special import exprel as reference

    from optreserve.dynamics.governors import exprel

    x = np.r_[-np.logspace(-20, 3, 2001), 0.0]
    assert np.allclose(exprel(x), reference(x), rtol=1e-15, atol=0.0)
    assert exprel(0.0) == 1.0

"""Nadir requirement rows: energy delivered by each provider at time points after an event,
against the energy the inertia cannot cover (docs/formulation.md, nadir)."""

from __future__ import annotations

import numpy as np

from optreserve.case.data import Case
from optreserve.model.horizon import ELASTIC_PENALTY, Horizon, out_pairs, responds_in

# Nadir rows: time points per event (fewer for long horizons to keep the model small) and
# the governor model shared with the simulator: a first-order lag of time constant
# LAG_PER_ACTIVATION x activation_time_s (DEFAULT_ACTIVATION_TIME_S when not given).
NADIR_POINTS, NADIR_POINTS_HORIZON = 24, 8
NADIR_HORIZON_S = 60.0


LAG_PER_ACTIVATION = 0.25


DEFAULT_ACTIVATION_TIME_S = 30.0


def nadir_terms(case: Case, hz: Horizon, scale=None):
    """Energy form of the nadir limit, per event instance m and time point t_k.

    With the system's stored energy H (MW s), no load self-regulation (conservative), the
    centre-of-inertia deviation is |df(t)| = f_n / (2H) (dP t - E(t)), E the energy the
    response has delivered by t. |df| <= N at all t  <=>  E(t_k) >= dP t_k - 2 H N / f_n.
    Each provider's response is taken as a first-order lag (tau = T/4) towards its full
    headroom r, starting after the time the frequency needs to reach the full-activation
    deviation at the initial RoCoF (delay = 2 H F_act / (f_n dP): before it the droop asks
    for less than the headroom): E_i(t) = r_i e_i(t - delay), e(s) = s - tau (1 - exp(-s/tau)).
    Returns (coef (M, K, N) per MW of headroom, need (M, K) MW s); scale (M,) tightens N."""
    M = len(hz.dP)
    f_n = case.nominal_frequency_hz
    N_max = case.limits.max_nadir_deviation_hz
    scale = np.ones(M) if scale is None else np.asarray(scale, float)
    dP = hz.dP
    if hz.co_opt and hz.dP_var is not None:  # a dispatched trip: its capacity, to stay linear
        dP = np.where(hz.dP_var >= 0, hz.cap[np.maximum(hz.dP_var, 0)], dP)
    H = np.maximum(hz.H_sys, 1e-9)
    K = NADIR_POINTS_HORIZON if case.is_horizon else NADIR_POINTS
    with np.errstate(divide="ignore", invalid="ignore"):
        t0 = np.where(dP > 0, 2 * H * N_max * scale / (f_n * dP), np.inf)
        delay = np.where(dP > 0, 2 * H * case.limits.full_activation_deviation_hz
                         / (f_n * dP), 0.0)
    lo = np.clip(t0, 1e-3, NADIR_HORIZON_S / 2)
    times = lo[:, None] * (NADIR_HORIZON_S / lo[:, None]) ** (np.arange(K)[None, :] / (K - 1))
    need = dP[:, None] * times - 2 * H[:, None] * N_max * scale[:, None] / f_n
    T_act = np.where(np.isfinite(hz.T_act) & (hz.T_act > 0), hz.T_act,
                     DEFAULT_ACTIVATION_TIME_S)
    tau = LAG_PER_ACTIVATION * T_act  # (N,)
    s_ = np.maximum(times - delay[:, None], 0.0)[:, :, None]  # (M, K, 1)
    coef = s_ - tau[None, None, :] * (1.0 - np.exp(-s_ / tau[None, None, :]))
    # without stored-energy data (no inertia_s) the requirement cannot be stated: skipped
    # (the reader warns), rather than declaring every event impossible
    return coef, np.where((dP[:, None] > 0) & (hz.H_sys[:, None] > 0), need, -np.inf)


def nadir_shortfall(case: Case, hz: Horizon, r_up, r_dn, scale=None) -> np.ndarray:
    """Per instance the largest energy shortfall (MW s) of an allocation against the nadir
    rows (<= 0: the limit holds by this measure)."""
    coef, need = nadir_terms(case, hz, scale)
    r = np.where((hz.sigma > 0)[:, None], np.asarray(r_up)[hz.inst_t],
                 np.asarray(r_dn)[hz.inst_t])
    m, j = out_pairs(hz)  # every lost unit (all of a common-mode trip) and any absent one
    r[m, j] = 0.0
    have = np.einsum("mkn,mn->mk", coef, r)
    return (need - have).max(axis=1)


def _rows_nadir(lp, case, hz: Horizon, r_up, r_dn, elastic, scale=None):
    """Nadir limit as energy rows (nadir_terms): sum_i e_i(t_k) r_i >= dP t_k - 2 H N / f_n
    for each event instance and time point, over the providers that respond in it."""
    N, M = hz.N, len(hz.dP)
    coef, need = nadir_terms(case, hz, scale)
    K = coef.shape[1]
    live = responds_in(hz).copy()  # (M, N) who responds in each instance's direction
    m, j = out_pairs(hz)
    live[m, j] = False
    mm, ii = np.nonzero(live)
    kk = np.arange(K)
    rows = (mm[:, None] * K + kk[None, :]).reshape(-1)
    up = hz.sigma[mm] > 0
    # what a provider can deliver by the nadir: its headroom, but no more than its droop asks
    # for at the nadir limit, q <= r and q <= K (N - d)^+ (held headroom beyond that is not
    # reached before the frequency has fallen past the limit)
    T = hz.T
    Kv = lp.var_blocks["K"]
    tt, uu = np.nonzero(hz.avail)
    reach = np.maximum(case.limits.max_nadir_deviation_hz - hz.d_hz[uu], 0.0)
    q = {}
    for name, r in (("up", r_up), ("dn", r_dn)):
        Q = lp.add_vars(f"nadir_q_{name}", T * N, 0.0, np.inf)
        n = len(tt)
        k = np.arange(n)
        lp.add_rows(f"nadir_q_{name}_r", n, np.r_[k, k], np.r_[Q.idx(tt * N + uu),
                    r.idx(tt * N + uu)], np.r_[np.ones(n), -np.ones(n)], hi=0.0)
        lp.add_rows(f"nadir_q_{name}_k", n, np.r_[k, k], np.r_[Q.idx(tt * N + uu),
                    Kv.idx(hz.block[tt] * N + uu)], np.r_[np.ones(n), -reach], hi=0.0)
        q[name] = Q
    col = np.where(up, q["up"].idx(hz.inst_t[mm] * N + ii), q["dn"].idx(hz.inst_t[mm] * N + ii))
    cols = np.repeat(col, K)
    vals = coef[mm[:, None], kk[None, :], ii[:, None]].reshape(-1)
    lo = need.reshape(-1)
    if elastic:
        S = lp.add_vars("slack_nadir", M, 0.0, np.inf, cost=ELASTIC_PENALTY)
        rows = np.r_[rows, np.arange(M * K)]
        cols = np.r_[cols, np.repeat(S.idx(), K)]
        vals = np.r_[vals, np.ones(M * K)]
    # a row whose need is not positive holds trivially: left free (HiGHS drops it)
    lp.add_rows("nadir", M * K, rows, cols, vals, lo=np.where(lo > 1e-6, lo, -np.inf))

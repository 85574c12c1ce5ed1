"""Tie-flow rows in the multiply-by-beta form (exact settled flows without bilinear terms),
for fixed outputs and for energy co-optimisation."""

from __future__ import annotations

import numpy as np

from optreserve.model.horizon import (
    ELASTIC_PENALTY,
    Horizon,
    _removed,
    direction_key,
    effective_factor,
)


def flow_weights(hz: Horizon, inst=None):
    """Per (instance, link, area) the weights of beta'_a in the flow rows multiplied by
    beta' (then divided by the link limit, which keeps coefficients near one):
      upper: sum_a [F0 - Fmax + s dP (Phi_la - Phi_l,ae)] beta'_a <= 0
      lower: sum_a [F0 + Fmax + s dP (Phi_la - Phi_l,ae)] beta'_a >= 0"""
    inst = np.arange(len(hz.dP)) if inst is None else inst
    t = hz.inst_t[inst]
    Phi = hz.Phi[t]  # (M, L, A)
    ae = hz.inst_area[inst]
    Phi_e = np.take_along_axis(Phi, ae[:, None, None], axis=2)  # (M, L, 1)
    shift = (hz.sigma[inst] * hz.dP[inst])[:, None, None] * (Phi - Phi_e)
    F0, Fmax = hz.F0[t][:, :, None], hz.Fmax[t][:, :, None]
    return (F0 - Fmax + shift) / Fmax, (F0 + Fmax + shift) / Fmax


def _response_terms(hz: Horizon, K, G, ginfo, x_hat, live):
    """What the flow rows of the given instances need of the responding gains: the effective
    factors c (instance x class), the aggregate columns of each instance's group, and the
    providers out of each instance (tripped or absent) with their factor and gain column."""
    group_of_t, n_a, n_k, classes = ginfo
    c = effective_factor(classes, x_hat[live])  # (E', K)
    g = group_of_t[direction_key(hz, live)]
    gcols = G.idx((g[:, None] * n_a * n_k + np.arange(n_a * n_k)[None, :]))  # (E', A*K)
    te_abs, j = _removed(hz, live)
    te = np.searchsorted(live, te_abs)
    cj = np.clip(1.0 - hz.d_hz[j] / np.where(x_hat[te_abs] > 0, x_hat[te_abs], np.inf), 0, 1)
    kcol = K.idx(hz.block[hz.inst_t[te_abs]] * hz.N + j)
    return c, gcols, te, j, cj, kcol


def _rows_beta(lp, hz: Horizon, terms, ne, n_a, n_k) -> np.ndarray:
    """beta'_ea = sum_k c_ek G_gak - c_j K_j (providers out, in their area), one auxiliary
    column per (instance, area); returns the columns as (E', A)."""
    c, gcols, te, j, cj, kcol = terms
    Bv = lp.add_vars("beta", ne * n_a, -np.inf, np.inf)
    rows = np.r_[np.arange(ne * n_a), np.repeat(np.arange(ne * n_a), n_k), te * n_a + hz.area[j]]
    cols = np.r_[Bv.idx(), gcols.reshape(-1), kcol]
    vals = np.r_[np.ones(ne * n_a), -np.repeat(c, n_a, axis=0).reshape(-1), cj]
    lp.add_rows("beta_def", ne * n_a, rows, cols, vals, lo=0.0, hi=0.0)
    return Bv.idx().reshape(ne, n_a)


def _rows_flows(lp, hz: Horizon, K, G, ginfo, x_hat, elastic):
    """Exact post-event link limits in the multiply-by-beta' form, beta'_a = sum_k c_k G_ak
    (- c_j K_j for a tripped or absent provider j, in j's area) + D_a, with c = (1 - d/x)^+
    at the settled guess x."""
    _, n_a, n_k, _ = ginfo
    n_l = hz.F0.shape[1]
    live = np.nonzero(hz.dP > 0)[0]
    ne = len(live)
    W_up, W_lo = flow_weights(hz, live)
    D = hz.D_a[hz.inst_t[live]]  # (E', A)
    terms = _response_terms(hz, K, G, ginfo, x_hat, live)
    c, gcols, te, j, cj, kcol = terms
    if n_k > 1:
        # several dead-band classes: one auxiliary beta'_ea per (event, area) keeps each flow
        # row at A terms instead of A x classes (the dominant block of the model)
        bcols = _rows_beta(lp, hz, terms, ne, n_a, n_k)
    for name, W, sense in (("flow_hi", W_up, "hi"), ("flow_lo", W_lo, "lo")):
        rhs = -(W * D[:, None, :]).sum(axis=2).reshape(-1)
        if n_k > 1:
            rows = np.repeat(np.arange(ne * n_l), n_a)
            cols = np.repeat(bcols, n_l, axis=0).reshape(-1)
            vals = W.reshape(-1)
        else:
            coef = W[:, :, :, None] * c[:, None, None, :]  # (E', L, A, K)
            rows = np.repeat(np.arange(ne * n_l), n_a * n_k)
            cols = np.repeat(gcols, n_l, axis=0).reshape(-1)
            vals = coef.reshape(-1)
            if len(te):
                tv = -W[te, :, hz.area[j]] * cj[:, None]  # (T', L)
                rows = np.r_[rows, (te[:, None] * n_l + np.arange(n_l)[None, :]).reshape(-1)]
                cols = np.r_[cols, np.repeat(kcol, n_l)]
                vals = np.r_[vals, tv.reshape(-1)]
        if elastic:
            S = lp.add_vars("slack_" + name, ne * n_l, 0.0, np.inf, cost=ELASTIC_PENALTY)
            rows = np.r_[rows, np.arange(ne * n_l)]
            cols = np.r_[cols, S.idx()]
            vals = np.r_[vals, np.full(ne * n_l, -1.0 if sense == "hi" else 1.0)]
        if sense == "hi":
            lp.add_rows(name, ne * n_l, rows, cols, vals, hi=rhs)
        else:
            lp.add_rows(name, ne * n_l, rows, cols, vals, lo=rhs)


def _rows_dispatch(lp, hz: Horizon, r_up, r_dn, elastic) -> np.ndarray:
    """Energy-reserve co-optimisation: output p_ti of dispatchable units between minimum
    output and capacity at its energy price; headroom competes with energy
    (r_up + p <= capacity, p - r_dn >= minimum); the system balances in every period and
    pre-event link flows F0 = Phi (P_a - L_a) stay within limits. Returns the column of p
    per (t, i) (-1 where the output is fixed)."""
    N, T = hz.N, hz.T
    n_a = hz.load.shape[1]
    tt, ii = np.nonzero(np.broadcast_to(hz.disp, (T, N)))
    nd = len(tt)
    P = lp.add_vars("p", nd, hz.mn[tt, ii], hz.cap[ii], cost=hz.e_price[tt, ii] * hz.hours[tt])
    pcol = np.full((T, N), -1, dtype=np.int64)
    pcol[tt, ii] = P.idx()
    k = np.arange(nd)
    one = np.ones(nd)
    lp.add_rows("room_up", nd, np.r_[k, k], np.r_[r_up.idx(tt * N + ii), P.idx()],
                np.r_[one, one], hi=hz.cap[ii])
    lp.add_rows("room_dn", nd, np.r_[k, k], np.r_[P.idx(), r_dn.idx(tt * N + ii)],
                np.r_[one, -one], lo=hz.mn[tt, ii])
    PA = lp.add_vars("p_area", T * n_a, -np.inf, np.inf)
    lp.add_rows("p_area_def", T * n_a, np.r_[np.arange(T * n_a), tt * n_a + hz.area[ii]],
                np.r_[PA.idx(), P.idx()], np.r_[np.ones(T * n_a), -one], lo=0.0, hi=0.0)
    fixed_a = fixed_area_output(hz)
    rhs = hz.load.sum(axis=1) - fixed_a.sum(axis=1)
    rows, cols, vals = np.repeat(np.arange(T), n_a), PA.idx(), np.ones(T * n_a)
    if elastic:  # unserved or spilled energy
        S = lp.add_vars("slack_balance", 2 * T, 0.0, np.inf, cost=ELASTIC_PENALTY)
        rows = np.r_[rows, np.arange(T), np.arange(T)]
        cols = np.r_[cols, S.idx()]
        vals = np.r_[vals, np.ones(T), -np.ones(T)]
    lp.add_rows("balance", T, rows, cols, vals, lo=rhs, hi=rhs)
    L = hz.F0.shape[1]
    if L:
        W = hz.Phi / hz.Fmax[:, :, None]  # (T, L, A)
        c = (hz.Phi * (fixed_a - hz.load)[:, None, :]).sum(axis=2)  # (T, L)
        rows = np.repeat(np.arange(T * L), n_a)
        cols = PA.idx((np.arange(T)[:, None, None] * n_a + np.arange(n_a)[None, None, :]
                       + 0 * np.arange(L)[None, :, None]).reshape(-1))
        vals = W.reshape(-1)
        if elastic:
            S = lp.add_vars("slack_pre_flow", 2 * T * L, 0.0, np.inf, cost=ELASTIC_PENALTY)
            rows = np.r_[rows, np.arange(T * L), np.arange(T * L)]
            cols = np.r_[cols, S.idx()]
            vals = np.r_[vals, -np.ones(T * L), np.ones(T * L)]
        lp.add_rows("pre_flow", T * L, rows, cols, vals,
                    lo=((-hz.Fmax - c) / hz.Fmax).reshape(-1),
                    hi=((hz.Fmax - c) / hz.Fmax).reshape(-1))
    return pcol


def fixed_area_output(hz: Horizon) -> np.ndarray:
    """(T, A) output of the units whose output is not a decision."""
    fixed = np.where(hz.disp[None, :], 0.0, hz.out)
    n_a = hz.load.shape[1]
    onehot = np.zeros((hz.N, n_a))
    onehot[np.arange(hz.N), hz.area] = 1.0
    return fixed @ onehot


def _rows_flows_dispatch(lp, hz: Horizon, K, G, ginfo, x_hat, elastic, pcol):
    """Post-event link limits when outputs are decisions. The pre-event flow F0 = Phi (P - L)
    is then a variable, so the multiply-by-beta' form would be bilinear; instead the area
    responses are written at the settled guess x:  F0 + s (x sum_a Phi_la beta'_a
    - dP Phi_l,ae)  within +-Fmax, linear in the gains, outputs and dP, and exact once the
    guess equals the independently computed settled deviation (the same fixed point as for
    dead bands)."""
    _, n_a, n_k, _ = ginfo
    L = hz.F0.shape[1]
    live = np.nonzero((hz.dP > 0) | (hz.dP_var >= 0))[0]
    ne = len(live)
    t = hz.inst_t[live]
    bcols = _rows_beta(lp, hz, _response_terms(hz, K, G, ginfo, x_hat, live), ne, n_a, n_k)
    PA = lp.var_blocks["p_area"]
    Phi = hz.Phi[t]  # (E, L, A)
    Fmax = hz.Fmax[t]  # (E, L)
    sig = hz.sigma[live]
    xh = x_hat[live]
    ae = hz.inst_area[live]
    Phi_e = np.take_along_axis(Phi, ae[:, None, None], axis=2)[:, :, 0]  # (E, L)
    fixed_a = fixed_area_output(hz)[t]
    c0 = (Phi * (fixed_a - hz.load[t])[:, None, :]).sum(axis=2)  # (E, L)
    damp = (Phi * hz.D_a[t][:, None, :]).sum(axis=2)  # (E, L)
    const = c0 + sig[:, None] * xh[:, None] * damp  # moves to the bounds
    const_dp = -sig[:, None] * Phi_e * np.where(hz.dP_var[live] >= 0, 0.0, hz.dP[live])[:, None]
    k = np.arange(ne * L)
    rows = np.r_[np.repeat(k, n_a), np.repeat(k, n_a)]
    cols = np.r_[PA.idx((t[:, None, None] * n_a + np.arange(n_a)[None, None, :]
                         + 0 * np.arange(L)[None, :, None]).reshape(-1)),
                 np.repeat(bcols, L, axis=0).reshape(-1)]
    vals = np.r_[(Phi / Fmax[:, :, None]).reshape(-1),
                 (sig[:, None, None] * xh[:, None, None] * Phi / Fmax[:, :, None]).reshape(-1)]
    mv = np.nonzero(hz.dP_var[live] >= 0)[0]
    if len(mv):
        rows = np.r_[rows, (mv[:, None] * L + np.arange(L)[None, :]).reshape(-1)]
        cols = np.r_[cols, np.repeat(pcol[t[mv], hz.dP_var[live][mv]], L)]
        vals = np.r_[vals, (-sig[mv, None] * Phi_e[mv] / Fmax[mv]).reshape(-1)]
    shift = ((const + const_dp) / Fmax).reshape(-1)
    if elastic:
        S = lp.add_vars("slack_flow_hi", ne * L, 0.0, np.inf, cost=ELASTIC_PENALTY)
        S2 = lp.add_vars("slack_flow_lo", ne * L, 0.0, np.inf, cost=ELASTIC_PENALTY)
        rows = np.r_[rows, k, k]
        cols = np.r_[cols, S.idx(), S2.idx()]
        vals = np.r_[vals, -np.ones(ne * L), np.ones(ne * L)]
    lp.add_rows("flow_x", ne * L, rows, cols, vals, lo=-1.0 - shift, hi=1.0 - shift)

"""Nadir requirement rows: energy delivered by each provider at time points after an event,
against the energy the inertia cannot cover (docs/formulation.md, section 15), with each
unit's governor model (dynamics/governors.py), and the simulation-guided cuts of the solve
loop (solver/run.py, `_nadir_round`)."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from optreserve.case.data import Case
from optreserve.dynamics.response import (
    FULL,
    Envelope,
    _conv,
    energy_lower_bound,
    min_step_response,
)
from optreserve.dynamics.system import governor_set
from optreserve.model.horizon import ELASTIC_PENALTY, Horizon, out_pairs, responds_in

# Nadir rows: time points per event (fewer for long horizons to keep the model small)
NADIR_POINTS, NADIR_POINTS_HORIZON = 24, 8
NADIR_HORIZON_S = 60.0


@dataclass
class NadirGuide:
    """What the solve loop passes to the nadir rows (build_model's nadir_scale).

    scale (M,): tightens the limit in the rows of each instance (1 = as given);
    relaxed: the rows are left free and only the cuts bind (after the rows alone were
    infeasible: the simulation then decides, see solver/run.py);
    cuts: (instance m, coefficient (N,) MW s per MW of q, right-hand side MW s) rows
    sum_i c_i q_i >= rhs from simulating a candidate."""

    scale: np.ndarray | None = None
    relaxed: bool = False
    cuts: list = field(default_factory=list)

    def copy(self) -> NadirGuide:
        """The guide as it stands (the solve loop goes on changing its own)."""
        return NadirGuide(None if self.scale is None else np.array(self.scale, copy=True),
                          self.relaxed, list(self.cuts))


def _guide(scale) -> NadirGuide:
    if isinstance(scale, NadirGuide):
        return scale
    return NadirGuide(scale=None if scale is None else np.asarray(scale, float))


def reach_hz(case: Case, hz: Horizon):
    """Per unit (N,) the two stretches of deviation over which the demand is credited:
    (F_a - d)^+ for q_a (F_a = min(F_act, N): reached by then, as the full-activation rule
    holds r >= K (F_act - d)), and N - max(F_a, d) for q_b (what more headroom gives
    between F_a and the limit)."""
    N = case.limits.max_nadir_deviation_hz
    F_a = min(case.limits.full_activation_deviation_hz, N)
    return np.maximum(F_a - hz.d_hz, 0.0), np.maximum(N - np.maximum(F_a, hz.d_hz), 0.0)


def q_upper(case: Case, hz: Horizon):
    """(T, N) each, the most q_a and q_b can be (highest gain, most headroom; the larger
    direction)."""
    ra, rb = reach_hz(case, hz)
    R = np.maximum(hz.R_up, hz.R_dn) * hz.avail
    qa = np.minimum(R, hz.K_hi_t * ra[None, :])
    return qa, np.minimum(R - qa, hz.K_hi_t * rb[None, :])


def _terms(case: Case, hz: Horizon, scale=None):
    """Nadir limit as linear rows, per event instance m and time point t_k.

    Centre of inertia, stored energy H (MW s), no load self-regulation (it only helps):
    x(t) = f_n / (2H) (dP t - E(t)), E the energy the response has delivered by t.
    Suppose x first reaches the limit N at t_k. Before t_k every demand is non-decreasing
    (x rises), so for the models whose step response g rises monotonically (lag, reheat,
    inverter) the response power is non-decreasing and x is concave: x(s) >= N s / t_k (the
    chord). Provider i's demand min(K_i (x - d_i)^+, r_i) is then at least
        q_a clip((x - d) / (F_a - d), 0, 1) + q_b clip((x - b) / (N - b), 0, 1),  b = max(F_a, d)
    for any q_a <= K (F_a - d)^+, q_b <= K (N - b), q_a + q_b <= r (F_a = min(F_act, N);
    the full-activation rule holds r >= K (F_act - d)): two ramps in time along the chord.
    A first crossing at t_k needs both
        energy:  E(t_k) <= dP t_k - 2 H N / f_n        and
        power:   P(t_k) <= dP                           (x' >= 0 at a first crossing),
    so either row excludes it:
        sum_i (e_a,i q_a,i + e_b,i q_b,i) >= dP t_k - 2 H N / f_n
        sum_i (p_a,i q_a,i + p_b,i q_b,i) >= dP
    e: least energy by t_k under demand between those ramps and its upper bound
    (response.energy_lower_bound: exact for the worst demand; hydro's reverse response
    included), p: least power (the ramps' response; for hydro its deepest dip min g). Per
    (m, k) the row kept is the one the most capable allocation meets with the larger relative
    margin: early points take the energy row, late ones the power row.
    Returns (coef_a, coef_b (M, K, N) per MW, need (M, K): MW s or MW); scale (M,) tightens
    N in the need."""
    g = _guide(scale)
    M = len(hz.dP)
    f_n = case.nominal_frequency_hz
    N_max = case.limits.max_nadir_deviation_hz
    sc = np.ones(M) if g.scale is None else np.asarray(g.scale, float)
    dP = hz.dP
    if hz.co_opt and hz.dP_var is not None:  # a dispatched trip: its capacity, to stay linear
        dP = np.where(hz.dP_var >= 0, hz.cap[np.maximum(hz.dP_var, 0)], dP)
    H = np.maximum(hz.H_sys, 1e-9)
    K = NADIR_POINTS_HORIZON if case.is_horizon else NADIR_POINTS
    N_eff = N_max * sc
    with np.errstate(divide="ignore", invalid="ignore"):
        t0 = np.where(dP > 0, 2 * H * N_eff / (f_n * dP), np.inf)
    lo = np.clip(t0, 1e-3, NADIR_HORIZON_S / 2)
    times = lo[:, None] * (NADIR_HORIZON_S / lo[:, None]) ** (np.arange(K)[None, :] / (K - 1))
    need_e = dP[:, None] * times - 2 * H[:, None] * N_max / f_n
    gov = governor_set(case)
    F_a = min(case.limits.full_activation_deviation_hz, N_max)
    d = hz.d_hz[None, None, :]
    b = np.maximum(F_a, d)
    tN = times[..., None] / N_max  # (M, K, 1) s per Hz along the chord
    envs = (Envelope(1.0, tN * d, tN * np.maximum(F_a - d, 0.0)),
            Envelope(1.0, tN * b, tN * np.maximum(N_max - b, 0.0)))
    rev = min_step_response(gov)[None, None, :]
    coef_e = [energy_lower_bound(gov, times, env, FULL) for env in envs]
    coef_p = [np.where(gov.z < 0, rev, _conv(gov, times[..., None], env, 0)) for env in envs]
    # the row each (m, k) keeps: the larger relative margin of the most capable allocation
    qa, qb = (q[hz.inst_t] for q in q_upper(case, hz))  # (M, N)
    m, j = out_pairs(hz)  # every lost unit (all of a common-mode trip) and any absent one
    qa[m, j] = qb[m, j] = 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        marg_e = (np.einsum("mkn,mn->mk", coef_e[0], qa)
                  + np.einsum("mkn,mn->mk", coef_e[1], qb)) / need_e - 1.0
        marg_p = (np.einsum("mkn,mn->mk", coef_p[0], qa)
                  + np.einsum("mkn,mn->mk", coef_p[1], qb)) / dP[:, None] - 1.0
    power = (need_e > 0) & (marg_p > np.where(np.isnan(marg_e), -np.inf, marg_e))
    coef_a, coef_b = (np.where(power[..., None], p, e) for e, p in zip(coef_e, coef_p))
    need = np.where(power, dP[:, None], need_e)
    # the limit tightened by scale (the rows then ask for the energy of the lower limit)
    need = need + np.where(power, 0.0, 2 * H[:, None] * N_max * (1 - sc[:, None]) / f_n)
    # without stored-energy data (no inertia_s) the requirement cannot be stated: skipped
    # (the reader warns), rather than declaring every event impossible
    need = np.where((dP[:, None] > 0) & (hz.H_sys[:, None] > 0), need, -np.inf)
    if g.relaxed:
        need = np.full_like(need, -np.inf)
    return coef_a, coef_b, need


def fresh_coef(case: Case, hz: Horizon, m: int, t: float) -> np.ndarray:
    """(N,) the energy row's coefficient of q_a for instance m at time t (_terms), for the
    units a cut credits that the simulated candidate did not use."""
    N_max = case.limits.max_nadir_deviation_hz
    F_a = min(case.limits.full_activation_deviation_hz, N_max)
    d = hz.d_hz
    tN = float(t) / N_max
    env = Envelope(1.0, tN * d, tN * np.maximum(F_a - d, 0.0))
    return energy_lower_bound(governor_set(case), np.asarray(float(t)), env, FULL)


def nadir_terms(case: Case, hz: Horizon, scale=None):
    """(coef (M, K, N), need (M, K)) of the rows for a provider whose headroom is all reached
    by F_a (q_a only: the full-activation rule's headroom); see _terms."""
    coef_a, _, need = _terms(case, hz, scale)
    return coef_a, need


def nadir_shortfall(case: Case, hz: Horizon, r_up, r_dn, scale=None) -> np.ndarray:
    """Per instance the largest shortfall (MW s or MW) of an allocation against the nadir rows,
    its headroom credited as reached by F_a (<= 0: the limit holds by this measure)."""
    coef, need = nadir_terms(case, hz, scale)
    r = np.where((hz.sigma > 0)[:, None], np.asarray(r_up)[hz.inst_t],
                 np.asarray(r_dn)[hz.inst_t])
    m, j = out_pairs(hz)  # every lost unit (all of a common-mode trip) and any absent one
    r[m, j] = 0.0
    have = np.einsum("mkn,mn->mk", coef, r)
    return (need - have).max(axis=1)


def _rows_nadir(lp, case, hz: Horizon, r_up, r_dn, elastic, scale=None):
    """Nadir limit as rows (_terms) over the providers that respond in each instance, plus
    the solve loop's cuts (NadirGuide). Variables per period, unit and direction: q_a, q_b."""
    g = _guide(scale)
    N, M = hz.N, len(hz.dP)
    coef_a, coef_b, need = _terms(case, hz, g)
    K = coef_a.shape[1]
    live = responds_in(hz).copy()  # (M, N) who responds in each instance's direction
    m, j = out_pairs(hz)  # every lost unit (all of a common-mode trip) and absent provider
    live[m, j] = False
    mm, ii = np.nonzero(live)
    kk = np.arange(K)
    up = hz.sigma[mm] > 0
    # q_a <= K (F_a - d)^+, q_b <= K (N - max(F_a, d)), q_a + q_b <= r (the headroom; with
    # [dynamics] response_limit = "room", the physical room R instead)
    T = hz.T
    Kv = lp.var_blocks["K"]
    tt, uu = np.nonzero(hz.avail)
    ra, rb = (x[uu] for x in reach_hz(case, hz))
    room = getattr(case, "response_limit", "headroom") == "room"
    n = len(tt)
    k = np.arange(n)
    q = {}
    for name, r, R in (("up", r_up, hz.R_up), ("dn", r_dn, hz.R_dn)):
        Qa = lp.add_vars(f"nadir_q_{name}", T * N, 0.0, np.inf)
        Qb = lp.add_vars(f"nadir_qb_{name}", T * N, 0.0, np.inf)
        cols_a, cols_b = Qa.idx(tt * N + uu), Qb.idx(tt * N + uu)
        if room:
            lp.add_rows(f"nadir_q_{name}_r", n, np.r_[k, k], np.r_[cols_a, cols_b],
                        np.ones(2 * n), hi=R[tt, uu])
        else:
            lp.add_rows(f"nadir_q_{name}_r", n, np.r_[k, k, k], np.r_[cols_a, cols_b,
                        r.idx(tt * N + uu)], np.r_[np.ones(2 * n), -np.ones(n)], hi=0.0)
        kcol = Kv.idx(hz.block[tt] * N + uu)
        lp.add_rows(f"nadir_q_{name}_k", n, np.r_[k, k], np.r_[cols_a, kcol],
                    np.r_[np.ones(n), -ra], hi=0.0)
        lp.add_rows(f"nadir_qb_{name}_k", n, np.r_[k, k], np.r_[cols_b, kcol],
                    np.r_[np.ones(n), -rb], hi=0.0)
        q[name], q[name + "_b"] = Qa, Qb
    pos = hz.inst_t[mm] * N + ii
    col_a = np.where(up, q["up"].idx(pos), q["dn"].idx(pos))
    col_b = np.where(up, q["up_b"].idx(pos), q["dn_b"].idx(pos))
    rows = (mm[:, None] * K + kk[None, :]).reshape(-1)
    rows = np.r_[rows, rows]
    cols = np.r_[np.repeat(col_a, K), np.repeat(col_b, K)]
    vals = np.r_[coef_a[mm[:, None], kk[None, :], ii[:, None]].reshape(-1),
                 coef_b[mm[:, None], kk[None, :], ii[:, None]].reshape(-1)]
    lo = need.reshape(-1)
    if elastic:
        S = lp.add_vars("slack_nadir", M, 0.0, np.inf, cost=ELASTIC_PENALTY)
        rows = np.r_[rows, np.arange(M * K)]
        cols = np.r_[cols, np.repeat(S.idx(), K)]
        vals = np.r_[vals, np.ones(M * K)]
    # a row whose need is not positive holds trivially: left free (HiGHS drops it)
    lp.add_rows("nadir", M * K, rows, cols, vals, lo=np.where(lo > 1e-6, lo, -np.inf))
    if g.cuts:
        _rows_cuts(lp, hz, q, live, g.cuts)


def _rows_cuts(lp, hz: Horizon, q: dict, live: np.ndarray, cuts: list) -> None:
    """Simulation-guided cuts: sum_i c_i (q_a,i + q_b,i) >= rhs for the cut's instance
    (solver/run.py)."""
    N = hz.N
    m = np.array([c[0] for c in cuts], np.int64)
    C = np.stack([np.asarray(c[1], float) for c in cuts]) * live[m]  # (n_cuts, N)
    rhs = np.array([float(c[2]) for c in cuts])
    rr, ii = np.nonzero(C > 0)
    mi = m[rr]
    pos = hz.inst_t[mi] * N + ii
    up = hz.sigma[mi] > 0
    cols = np.r_[np.where(up, q["up"].idx(pos), q["dn"].idx(pos)),
                 np.where(up, q["up_b"].idx(pos), q["dn_b"].idx(pos))]
    lp.add_rows("nadir_cuts", len(cuts), np.r_[rr, rr], cols, np.r_[C[rr, ii], C[rr, ii]],
                lo=rhs)

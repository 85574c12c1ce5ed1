"""The optimisation model in gain space, one small function per constraint family.

Symbols follow docs/formulation.md: K unit gain [MW/Hz] (one per droop block b), u
participation, z droop-step choice, r_up/r_dn headroom [MW] (per period t), G per-area
per-dead-band-class gain aggregate [MW/Hz], F settled limit, F_act full-activation deviation,
D_a load self-regulation [MW/Hz], Phi the PTDF. A single snapshot is a horizon of one period.
Every family is added as whole arrays; no Python loop runs over units or periods.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from optreserve.case.data import Case
from optreserve.model.flows import _rows_dispatch, _rows_flows, _rows_flows_dispatch
from optreserve.model.horizon import (
    ELASTIC_PENALTY,
    Events,
    Horizon,
    _removed,
    direction_key,
    prepare,
    responds,
)
from optreserve.model.nadir import _rows_nadir
from optreserve.model.program import LinearProgram

TIE_BREAK_PER_MW_H = 1.0e-6


@dataclass
class ModelInfo:
    """What it takes to read a solution of the program back in engineering terms."""

    case: Case
    hz: Horizon
    F_model: float  # settled-deviation bound the rows enforce
    x_hat: np.ndarray  # per instance: settled |df| guess used for dead-band-reduced gains
    classes: np.ndarray  # dead-band values [Hz] of the aggregate classes
    unit_class: np.ndarray
    group_of_t: np.ndarray  # (2T,) aggregate group of each period, up (t) and down (T + t)
    steps_gain: np.ndarray | None  # per step-choice column: gain [MW/Hz]
    steps_unit: np.ndarray | None  # per step-choice column: unit index
    steps_block: np.ndarray | None
    steps_pct: np.ndarray | None
    change_cols: np.ndarray  # (block, unit) flat indices that carry a change indicator
    elastic: bool
    flows: bool = True  # the program has post-event flow rows (which depend on x_hat)
    guide: object = None  # the nadir rows' guide (model/nadir.py) this program was built with

    @property
    def ev(self) -> Events:  # instances in the Events shape
        hz = self.hz
        return Events(hz.inst_name, hz.dP, hz.sigma, hz.inst_area, hz.trip)


def build_model(case: Case, x_hat: np.ndarray | None = None, elastic: bool = False,
                relax: bool = False, hz: Horizon | None = None, nadir_scale=None,
                flows: bool = True) -> tuple[LinearProgram, ModelInfo]:
    """Describe the whole allocation problem as sparse blocks. flows=False leaves out the
    post-event flow rows of fixed-output cases (the solve loop adds them only when the
    allocation without them overloads a link: solver/run.py)."""
    hz = hz if hz is not None else prepare(case)
    N, T, B = hz.N, hz.T, hz.n_blocks
    n_a = len(case.areas)
    M = len(hz.dP)
    F = case.limits.max_settled_deviation_hz
    F_model = min(F, case.limits.full_activation_deviation_hz)
    x_hat = np.full(M, F_model) if x_hat is None else np.asarray(x_hat, float)
    lp = LinearProgram()

    # dead-band classes: units sharing a dead band share an aggregate per area
    classes, unit_class = np.unique(np.round(hz.d_hz, 12), return_inverse=True)
    n_k = len(classes)
    # aggregate groups: periods and directions with the same droop block and the same
    # responding units (up in rows t, down in rows T + t; one group when both agree)
    resp_up, resp_dn = responds(hz)
    resp2 = np.concatenate([resp_up, resp_dn])
    block2 = np.r_[hz.block, hz.block]
    sig = np.concatenate([block2[:, None], resp2.astype(np.int64)], axis=1)
    _, first, group_of_t = np.unique(sig, axis=0, return_index=True, return_inverse=True)
    group_of_t = group_of_t.reshape(-1)

    K = lp.add_vars("K", B * N, 0.0, hz.K_hi_b.reshape(-1))
    steps = case.droop.steps_pct
    st = (None, None, None, None)
    if steps is not None:
        s = np.asarray(steps, float)
        g = case.gain_from_droop(np.ones(N))[:, None] / s[None, :]  # (N, S)
        band = (s[None, :] >= case.units["droop_min_pct"].to_numpy(float)[:, None] - 1e-9) & (
            s[None, :] <= case.units["droop_max_pct"].to_numpy(float)[:, None] + 1e-9)
        ok = (hz.capable_b[:, :, None] & band[None] & (g[None] <= hz.K_hi_b[:, :, None] *
                                                        (1 + 1e-9)))
        zb, zu, zk = np.nonzero(ok)
        Z = lp.add_vars("z", len(zu), 0.0, 1.0, integer=not relax)
        st = (g[zu, zk], zu, zb, s[zk])
        _rows_steps(lp, K, Z, zb * N + zu, g[zu, zk], B * N, _always(hz, ok.any(axis=2)))
        part_cols, part_of = Z.idx(), zb * N + zu
    else:
        U = lp.add_vars("u", B * N, _always(hz, hz.capable_b).reshape(-1).astype(float),
                        hz.capable_b.reshape(-1).astype(float), integer=not relax)
        _rows_band(lp, K, U, np.tile(hz.K_lo, B), hz.K_hi_b.reshape(-1))
        part_cols, part_of = U.idx(), np.arange(B * N)

    # a tiny tie-break price on headroom: free providers report the headroom their droop needs,
    # not an arbitrary amount up to their room (the reported cost uses the real prices)
    eps = TIE_BREAK_PER_MW_H
    hold_up = resp_up & (hz.need_up[:, None] | (hz.own[:, hz.area] > 0))
    hold_dn = resp_dn & hz.need_dn[:, None]
    r_up = lp.add_vars("r_up", T * N, 0.0, np.where(hold_up, hz.R_up, 0.0).reshape(-1),
                       cost=((hz.price_up + eps) * hz.hours[:, None]).reshape(-1))
    r_dn = lp.add_vars("r_dn", T * N, 0.0, np.where(hold_dn, hz.R_dn, 0.0).reshape(-1),
                       cost=((hz.price_dn + eps) * hz.hours[:, None]).reshape(-1))
    n_g = len(first)
    G = lp.add_vars("G", n_g * n_a * n_k, 0.0, np.inf)

    P = _rows_dispatch(lp, hz, r_up, r_dn, elastic) if hz.co_opt else None
    _rows_aggregate(lp, hz, K, G, first, unit_class, n_a, n_k, resp2, block2)
    tt, ii = np.nonzero(resp_up & hz.need_up[:, None])
    _rows_headroom(lp, "headroom_up", hz, K, r_up, tt, ii)
    tt, ii = np.nonzero(resp_dn & hz.need_dn[:, None])
    _rows_headroom(lp, "headroom_dn", hz, K, r_dn, tt, ii)
    if (hz.own > 0).any():
        _rows_own_reserve(lp, hz, r_up, part_cols, part_of, elastic)
    ginfo = (group_of_t, n_a, n_k, classes)
    _rows_settled(lp, hz, K, G, ginfo, F_model, elastic, P)
    if case.limits.max_nadir_deviation_hz is not None:
        _rows_nadir(lp, case, hz, r_up, r_dn, elastic, nadir_scale)
    if len(case.links) and hz.co_opt:
        _rows_flows_dispatch(lp, hz, K, G, ginfo, x_hat, elastic, P)
    elif len(case.links) and flows:
        _rows_flows(lp, hz, K, G, ginfo, x_hat, elastic)
    change_cols = _rows_change(lp, case, hz, K, st, relax)

    info = ModelInfo(case, hz, F_model, x_hat, classes, unit_class, group_of_t,
                     st[0], st[1], st[2], st[3], change_cols, elastic,
                     flows=bool(len(case.links)) and (flows or hz.co_opt))
    return lp, info


# ------------------------------------------------------------------ constraint families
def _rows_band(lp, K, U, K_lo, K_hi):
    """u K_lo <= K <= u K_hi (semi-continuous gain: off, or inside the band)."""
    n = K.size
    i = np.arange(n)
    lp.add_rows("band_hi", n, np.r_[i, i], np.r_[K.idx(), U.idx()], np.r_[np.ones(n), -K_hi],
                hi=0.0)
    lp.add_rows("band_lo", n, np.r_[i, i], np.r_[K.idx(), U.idx()], np.r_[np.ones(n), -K_lo],
                lo=0.0)


def _rows_steps(lp, K, Z, z_of, zg, n, always=None):
    """K = sum_k g_k z_k and sum_k z_k <= 1 per (block, unit): one setting, or off; exactly
    one setting for an always-on governor (`always`, flat (block, unit) mask)."""
    lp.add_rows("step_gain", n, np.r_[np.arange(n), z_of], np.r_[K.idx(), Z.idx()],
                np.r_[np.ones(n), -zg], lo=0.0, hi=0.0)
    lo = -np.inf if always is None or not always.any() else np.where(always.reshape(-1), 1.0,
                                                                   -np.inf)
    lp.add_rows("step_one", n, z_of, Z.idx(), np.ones(len(z_of)), lo=lo, hi=1.0)


def _always(hz: Horizon, possible: np.ndarray) -> np.ndarray:
    """(B, N) governors on by obligation (`provides = always`) where a setting is possible:
    their participation is fixed on (the droop is still chosen)."""
    if hz.always_b is None:
        return np.zeros_like(possible, dtype=bool)
    return hz.always_b & possible


def _rows_aggregate(lp, hz: Horizon, K, G, first, unit_class, n_a, n_k, resp2, block2):
    """G_gak - sum K_bi over units i responding in group g (a period and direction), in area
    a, dead-band class k = 0: settled and flow rows then see a few aggregates instead of
    every unit."""
    N = hz.N
    n_g = len(first)
    gg, ii = np.nonzero(resp2[first])  # members of each group
    b = block2[first][gg]
    n_rows = n_g * n_a * n_k
    row_of = gg * n_a * n_k + hz.area[ii] * n_k + unit_class[ii]
    lp.add_rows("aggregate", n_rows, np.r_[np.arange(n_rows), row_of],
                np.r_[G.idx(), K.idx(b * N + ii)], np.r_[np.ones(n_rows), -np.ones(len(ii))],
                lo=0.0, hi=0.0)


def _rows_headroom(lp, name, hz: Horizon, K, r, tt, ii):
    """r_ti >= K_bi (F_act - d_i)^+: the full droop response at F_act fits in the headroom."""
    m = len(tt)
    if m == 0:
        return
    N = hz.N
    rows = np.arange(m)
    lp.add_rows(name, m, np.r_[rows, rows], np.r_[r.idx(tt * N + ii), K.idx(hz.block[tt] * N + ii)],
                np.r_[np.ones(m), -hz.a_act[ii]], lo=0.0)


def _rows_own_reserve(lp, hz: Horizon, r_up, part_cols, part_of, elastic):
    """sum_{i in a} r_up_ti >= min_own_ta; only participating providers hold headroom."""
    N, T = hz.N, hz.T
    # r_up_ti - R_up_ti * (participation of unit i in block b(t)) <= 0
    n_part = len(part_of)
    tt = np.repeat(np.arange(T), n_part)
    pb, pu = np.divmod(np.tile(part_of, T), N)
    sel = pb == hz.block[tt]
    tt, pu, pc = tt[sel], pu[sel], np.tile(part_cols, T)[sel]
    lp.add_rows("hold_if_part", T * N, np.r_[np.arange(T * N), tt * N + pu],
                np.r_[r_up.idx(), pc], np.r_[np.ones(T * N), -hz.R_up[tt, pu]], hi=0.0)
    ta, aa = np.nonzero(hz.own > 0)
    n_rows = len(ta)
    local = np.full(hz.own.shape, -1)
    local[ta, aa] = np.arange(n_rows)
    t2, i2 = np.nonzero(local[:, hz.area] >= 0)
    rows, cols, vals = local[t2, hz.area[i2]], r_up.idx(t2 * N + i2), np.ones(len(t2))
    if elastic:
        S = lp.add_vars("slack_own", n_rows, 0.0, np.inf, cost=ELASTIC_PENALTY)
        rows, cols, vals = np.r_[rows, np.arange(n_rows)], np.r_[cols, S.idx()], np.r_[
            vals, np.ones(n_rows)]
    lp.add_rows("own_reserve", n_rows, rows, cols, vals, lo=hz.own[ta, aa])


def _rows_settled(lp, hz: Horizon, K, G, ginfo, F_m, elastic, P=None):
    """sum_i K_i (F - d_i)^+ + F sum_a D_a >= |dP| per event instance (tripped unit out);
    under co-optimisation a trip's dP is the tripped unit's dispatched output p_tj."""
    group_of_t, n_a, n_k, classes = ginfo
    M, N = len(hz.dP), hz.N
    w = np.tile(np.maximum(F_m - classes, 0.0), n_a)  # per (a, k)
    g = group_of_t[direction_key(hz)]
    rows = np.repeat(np.arange(M), n_a * n_k)
    cols = G.idx((g[:, None] * n_a * n_k + np.arange(n_a * n_k)[None, :]).reshape(-1))
    vals = np.tile(w, M)
    te, j = _removed(hz, np.arange(M))
    rows = np.r_[rows, te]
    cols = np.r_[cols, K.idx(hz.block[hz.inst_t[te]] * N + j)]
    vals = np.r_[vals, -np.maximum(F_m - hz.d_hz[j], 0.0)]
    lo = hz.dP - F_m * hz.D_a[hz.inst_t].sum(axis=1)
    if P is not None:
        mv = np.nonzero(hz.dP_var >= 0)[0]
        rows = np.r_[rows, mv]
        cols = np.r_[cols, P[hz.inst_t[mv], hz.dP_var[mv]]]
        vals = np.r_[vals, -np.ones(len(mv))]
        lo[mv] = -F_m * hz.D_a[hz.inst_t[mv]].sum(axis=1)
    if elastic:
        S = lp.add_vars("slack_settled", M, 0.0, np.inf, cost=ELASTIC_PENALTY)
        rows, cols, vals = np.r_[rows, np.arange(M)], np.r_[cols, S.idx()], np.r_[
            vals, np.ones(M)]
    lp.add_rows("settled", M, rows, cols, vals, lo=lo)




def _rows_change(lp, case, hz: Horizon, K, st, relax):
    """Indicator c_bi = 1 when unit i leaves its droop_now setting in block b (only with a
    penalty)."""
    pen = case.droop.change_penalty_per_unit
    N, B = hz.N, hz.n_blocks
    # only units that could provide in the block: a unit that cannot carry reserve keeps
    # whatever setting it has, and that is no change proposed by the study
    has_now = (~np.isnan(hz.K_now))[None, :] & hz.capable_b
    if pen <= 0 or not has_now.any():
        return np.zeros(0, np.int64)
    bb, ii = np.nonzero(has_now)
    flat = bb * N + ii
    m = len(flat)
    C = lp.add_vars("changed", m, 0.0, 1.0, cost=pen, integer=not relax)
    zg, zu, zb, zs = st
    units = flat % N
    if zg is not None:
        now = case.units["droop_now_pct"].to_numpy(float)
        local = np.full(B * N, -1)
        local[flat] = np.arange(m)
        zflat = zb * N + zu
        sel = np.isclose(zs, now[zu], rtol=0, atol=1e-9) & (local[zflat] >= 0)
        rows = np.r_[np.arange(m), local[zflat[sel]]]
        cols = np.r_[C.idx(), lp.var_blocks["z"].idx()[sel]]
        lp.add_rows("change", m, rows, cols, np.ones(len(rows)), lo=1.0)
    else:
        Kn = hz.K_now[units]
        up = np.maximum(hz.K_hi_b.reshape(-1)[flat] - Kn, 0.0)
        i = np.arange(m)
        lp.add_rows("change_up", m, np.r_[i, i], np.r_[K.idx(flat), C.idx()],
                    np.r_[np.ones(m), -up], hi=Kn)
        lp.add_rows("change_dn", m, np.r_[i, i], np.r_[K.idx(flat), C.idx()],
                    np.r_[np.ones(m), Kn], lo=Kn)
    return flat

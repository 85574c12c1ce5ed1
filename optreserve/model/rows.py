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
from optreserve.network.ptdf import ptdf
from optreserve.model.program import LinearProgram

# Penalty of the elastic (diagnosis) slacks: large against any headroom price so that a
# relaxation is used only when nothing else can meet the limits.
ELASTIC_PENALTY = 1.0e6
TIE_BREAK_PER_MW_H = 1.0e-6


@dataclass(frozen=True)
class Events:
    """Events of one snapshot: magnitude dP [MW] >= 0, direction sigma (+1 deficit /
    under-frequency, -1 surplus / over-frequency), area index, tripped unit (-1: load step)."""

    names: list[str]
    dP: np.ndarray
    sigma: np.ndarray
    area: np.ndarray
    trip: np.ndarray

    @classmethod
    def of(cls, case: Case) -> "Events":
        ev = case.events
        apos = {a: k for k, a in enumerate(case.areas["area"])}
        upos = {u: k for k, u in enumerate(case.units["unit"])}
        size = ev["size_mw"].to_numpy(float)
        return cls(
            names=[str(e) for e in ev["event"]],
            dP=np.abs(size),
            sigma=np.where(size < 0, -1.0, 1.0),
            area=np.array([apos[a] for a in ev["area"]], dtype=np.int64),
            trip=np.array([upos.get(u, -1) if k == "unit_trip" else -1
                           for k, u in zip(ev["kind"], ev["unit"])], dtype=np.int64),
        )


@dataclass(frozen=True)
class UnitData:
    """What one snapshot's units can give (static settings and that period's headroom)."""

    K_lo: np.ndarray
    K_hi: np.ndarray  # highest gain inside band and headroom (0 if it cannot provide)
    capable: np.ndarray  # bool: may participate
    d_hz: np.ndarray
    R_up: np.ndarray  # most up headroom it may hold [MW]
    R_dn: np.ndarray
    a_act: np.ndarray  # (F_act - d)^+: headroom per MW/Hz of gain
    area: np.ndarray
    K_now: np.ndarray  # NaN where droop_now_pct not given


def capability(case: Case, room_up, room_dn, up_cap, dn_cap, provides, need_up, need_dn):
    """What each unit can give, broadcast over leading period axes: (K_hi, capable, R_up,
    R_dn). room_up/room_dn: physical room above/below the output (for a dispatchable unit
    under co-optimisation, its whole range). need_up/need_dn say whether up/down headroom is
    required (scalars or (T, 1))."""
    u = case.units
    f_n = case.nominal_frequency_hz
    cap = u["capacity_mw"].to_numpy(float)
    d = u["deadband_mhz"].to_numpy(float) / 1000.0
    K_lo = cap / (u["droop_max_pct"].to_numpy(float) / 100.0 * f_n)
    K_band = cap / (u["droop_min_pct"].to_numpy(float) / 100.0 * f_n)
    R_up = np.maximum(0.0, np.fmin(room_up, np.where(np.isnan(up_cap), np.inf, up_cap)))
    R_dn = np.maximum(0.0, np.fmin(room_dn, np.where(np.isnan(dn_cap), np.inf, dn_cap)))
    a_act = np.maximum(case.limits.full_activation_deviation_hz - d, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        lim_up = np.where(need_up & (a_act > 0), R_up / a_act, np.inf)
        lim_dn = np.where(need_dn & (a_act > 0), R_dn / a_act, np.inf)
    K_hi = np.minimum(K_band, np.minimum(lim_up, lim_dn))
    capable = provides & (K_hi >= K_lo * (1 - 1e-12))
    K_hi = np.where(capable, K_hi, 0.0)
    return K_hi, capable, np.where(provides, R_up, 0.0), np.where(provides, R_dn, 0.0)


def unit_data(case: Case, need_up: bool, need_dn: bool) -> UnitData:
    """UnitData of a single snapshot."""
    u = case.units
    f_n = case.nominal_frequency_hz
    cap = u["capacity_mw"].to_numpy(float)
    d = u["deadband_mhz"].to_numpy(float) / 1000.0
    out, mn = u["output_mw"].to_numpy(float), u["min_output_mw"].to_numpy(float)
    K_hi, capable, R_up, R_dn = capability(
        case, cap - out, out - mn,
        u["reserve_up_max_mw"].to_numpy(float), u["reserve_down_max_mw"].to_numpy(float),
        u["provides"].to_numpy(bool), need_up, need_dn)
    with np.errstate(divide="ignore", invalid="ignore"):
        K_now = cap / (u["droop_now_pct"].to_numpy(float) / 100.0 * f_n)
    return UnitData(
        K_lo=cap / (u["droop_max_pct"].to_numpy(float) / 100.0 * f_n), K_hi=K_hi,
        capable=capable, d_hz=d, R_up=R_up, R_dn=R_dn,
        a_act=np.maximum(case.limits.full_activation_deviation_hz - d, 0.0),
        area=case.unit_area_index(), K_now=K_now)


@dataclass
class Horizon:
    """Everything the model needs, stacked over periods (T) and event instances (M).

    Arrays shaped (T, N) are per period and unit; instances are the events of every period.
    Built once per solve and reused by every dead-band iteration."""

    case: Case
    T: int
    hours: np.ndarray  # (T,)
    block: np.ndarray  # (T,) droop block of each period
    n_blocks: int
    # units, static
    K_lo: np.ndarray
    K_band: np.ndarray
    d_hz: np.ndarray
    a_act: np.ndarray
    area: np.ndarray
    K_now: np.ndarray
    # units, per period
    K_hi_t: np.ndarray
    avail: np.ndarray  # bool: can respond in that period
    R_up: np.ndarray
    R_dn: np.ndarray
    price_up: np.ndarray
    price_dn: np.ndarray
    need_up: np.ndarray  # (T,) under-frequency events in that period
    need_dn: np.ndarray
    # areas / links per period
    D_a: np.ndarray  # (T, A)
    own: np.ndarray  # (T, A)
    F0: np.ndarray  # (T, L)
    Fmax: np.ndarray  # (T, L)
    Phi: np.ndarray  # (T, L, A)
    # event instances
    inst_name: list[str]
    inst_t: np.ndarray
    dP: np.ndarray
    sigma: np.ndarray
    inst_area: np.ndarray
    trip: np.ndarray
    absent: np.ndarray  # (M,) a provider that gives no response in this instance (-1: none)
    inst_event: np.ndarray  # (M,) row of case.events the instance comes from
    H_sys: np.ndarray  # (M,) system inertia after the event [MW s], tripped unit's removed
    T_act: np.ndarray  # (N,) activation time [s] (NaN: not given)
    # droop blocks
    K_hi_b: np.ndarray  # (B, N)
    capable_b: np.ndarray  # (B, N)
    # energy-reserve co-optimisation ([energy] co_optimise): outputs become decisions
    co_opt: bool = False
    disp: np.ndarray | None = None  # (N,) dispatchable units (an energy price is given)
    e_price: np.ndarray | None = None  # (T, N) energy price per MWh
    cap: np.ndarray | None = None  # (N,)
    mn: np.ndarray | None = None  # (T, N) minimum output
    out: np.ndarray | None = None  # (T, N) output (the dispatch, once solved)
    load: np.ndarray | None = None  # (T, A)
    dP_var: np.ndarray | None = None  # (M,) unit whose (dispatched) output is the event size

    @property
    def N(self) -> int:
        return len(self.K_lo)


def prepare(case: Case) -> Horizon:
    """Stack the case over periods and event instances (no per-period DataFrames)."""
    T = case.n_periods
    N = len(case.units)
    apos = {a: k for k, a in enumerate(case.areas["area"])}
    upos = {u: k for k, u in enumerate(case.units["unit"])}
    ev = case.events
    inst = case.instances()
    e = inst["event_index"].to_numpy()
    size = inst["size_mw"].to_numpy(float)
    inst_t = inst["t"].to_numpy().astype(np.int64)
    dP = np.abs(size)
    sigma = np.where(size < 0, -1.0, 1.0)
    ev_area = np.array([apos[a] for a in ev["area"]], dtype=np.int64)
    ev_trip = np.array([upos.get(u, -1) if k == "unit_trip" else -1
                        for k, u in zip(ev["kind"], ev["unit"])], dtype=np.int64)
    need_up = np.bincount(inst_t, weights=(sigma > 0) & (dP > 0), minlength=T) > 0
    need_dn = np.bincount(inst_t, weights=(sigma < 0) & (dP > 0), minlength=T) > 0
    um = case.unit_matrix
    cap = case.units["capacity_mw"].to_numpy(float)
    out_t, mn_t = um("output_mw").astype(float), um("min_output_mw").astype(float)
    e_price = um("energy_price_per_mwh").astype(float) if "energy_price_per_mwh" in \
        case.units.columns else np.full((T, N), np.nan)
    disp = np.zeros(N, dtype=bool)
    if case.co_optimise and "energy_price_per_mwh" in case.units.columns:
        disp = np.isfinite(case.units["energy_price_per_mwh"].to_numpy(float))
    room_up = np.where(disp, cap - mn_t, cap - out_t)
    room_dn = np.where(disp, cap - mn_t, out_t - mn_t)
    K_hi_t, avail, R_up, R_dn = capability(
        case, room_up, room_dn,
        um("reserve_up_max_mw").astype(float), um("reserve_down_max_mw").astype(float),
        um("provides").astype(bool), need_up[:, None], need_dn[:, None])
    u0 = unit_data(case, bool(need_up.any()), bool(need_dn.any()))
    block = case.blocks()
    B = int(block.max()) + 1
    K_hi_b = np.full((B, N), np.inf)
    np.minimum.at(K_hi_b, block, np.where(avail, K_hi_t, np.inf))
    capable_b = np.isfinite(K_hi_b)
    K_hi_b = np.where(capable_b, K_hi_b, 0.0)
    # Phi once per distinct set of reactances
    X = case.link_matrix("reactance_pu").astype(float)
    n_l, n_a = X.shape[1], len(case.areas)
    Phi = np.zeros((T, n_l, n_a))
    if n_l:
        keys, first, inv = np.unique(X, axis=0, return_index=True, return_inverse=True)
        for k, t0 in enumerate(first):
            links = case.links.assign(reactance_pu=X[t0])
            Phi[inv.reshape(-1) == k] = ptdf(case.replace(links=links))
    damping = case.area_matrix("load_mw").astype(float) * case.area_matrix(
        "load_damping_pct_per_hz").astype(float) / 100.0
    return Horizon(
        case=case, T=T, hours=case.hours(), block=block, n_blocks=B,
        K_lo=u0.K_lo, K_band=case.gain_from_droop(case.units["droop_min_pct"]),
        d_hz=u0.d_hz, a_act=u0.a_act, area=u0.area, K_now=u0.K_now,
        K_hi_t=K_hi_t, avail=avail, R_up=R_up, R_dn=R_dn,
        price_up=um("price_up_per_mw_h").astype(float),
        price_dn=um("price_down_per_mw_h").astype(float),
        H_sys=system_inertia(case, inst_t, ev_trip[e]),
        T_act=case.units["activation_time_s"].to_numpy(float),
        need_up=need_up, need_dn=need_dn, D_a=damping,
        own=case.area_matrix("min_own_reserve_mw").astype(float),
        F0=case.link_matrix("flow_mw").astype(float).reshape(T, n_l),
        Fmax=case.link_matrix("limit_mw").astype(float).reshape(T, n_l), Phi=Phi,
        inst_name=[str(x) for x in ev["event"].to_numpy(object)[e]], inst_t=inst_t,
        dP=dP, sigma=sigma, inst_area=ev_area[e], trip=ev_trip[e],
        absent=np.full(len(e), -1, dtype=np.int64), inst_event=e.astype(np.int64),
        K_hi_b=K_hi_b, capable_b=capable_b,
        co_opt=bool(disp.any()), disp=disp, e_price=np.nan_to_num(e_price), cap=cap,
        mn=mn_t, out=out_t, load=case.area_matrix("load_mw").astype(float),
        dP_var=np.where(_from_output(case, e) & (ev_trip[e] >= 0) & disp[np.maximum(
            ev_trip[e], 0)], ev_trip[e], -1).astype(np.int64),
    )


def _from_output(case: Case, e: np.ndarray) -> np.ndarray:
    ev = case.events
    if "size_from_output" not in ev.columns:
        return np.zeros(len(e), dtype=bool)
    return ev["size_from_output"].to_numpy(bool)[e]


def system_inertia(case: Case, inst_t: np.ndarray, trip: np.ndarray) -> np.ndarray:
    """Stored kinetic energy H_i * capacity_i [MW s] of the units online in each instance's
    period, minus the tripped unit's. A unit counts as online when it runs (output not zero)
    or may provide reserve; a missing inertia_s counts as zero."""
    cap = case.units["capacity_mw"].to_numpy(float)
    H = np.nan_to_num(case.units["inertia_s"].to_numpy(float)) * cap  # (N,)
    online = (case.unit_matrix("output_mw").astype(float) != 0) | case.unit_matrix(
        "provides").astype(bool)
    per_t = (online * H[None, :]).sum(axis=1)  # (T,)
    lost = np.where(trip >= 0, H[np.maximum(trip, 0)] * online[inst_t, np.maximum(trip, 0)],
                    0.0)
    return per_t[inst_t] - lost


@dataclass
class ModelInfo:
    """What it takes to read a solution of the program back in engineering terms."""

    case: Case
    hz: Horizon
    F_model: float  # settled-deviation bound the rows enforce
    x_hat: np.ndarray  # per instance: settled |df| guess used for dead-band-reduced gains
    classes: np.ndarray  # dead-band values [Hz] of the aggregate classes
    unit_class: np.ndarray
    group_of_t: np.ndarray  # (T,) aggregate group of each period
    steps_gain: np.ndarray | None  # per step-choice column: gain [MW/Hz]
    steps_unit: np.ndarray | None  # per step-choice column: unit index
    steps_block: np.ndarray | None
    steps_pct: np.ndarray | None
    change_cols: np.ndarray  # (block, unit) flat indices that carry a change indicator
    elastic: bool

    @property
    def ev(self) -> Events:  # instances in the Events shape
        hz = self.hz
        return Events(hz.inst_name, hz.dP, hz.sigma, hz.inst_area, hz.trip)


def effective_factor(d_hz, x_hat) -> np.ndarray:
    """(1 - d / x)^+ for every (x, d) pair: unit response K (x - d)^+ = K x (1 - d/x)^+."""
    x = np.asarray(x_hat, float)[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        c = np.where(x > 0, 1.0 - np.asarray(d_hz, float)[None, :] / x, 0.0)
    return np.clip(c, 0.0, 1.0)


def build_model(case: Case, x_hat: np.ndarray | None = None, elastic: bool = False,
                relax: bool = False, hz: Horizon | None = None, nadir_scale=None
                ) -> tuple[LinearProgram, ModelInfo]:
    """Describe the whole allocation problem as sparse blocks."""
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
    # aggregate groups: periods with the same droop block and the same available units
    sig = np.concatenate([hz.block[:, None], hz.avail.astype(np.int64)], axis=1)
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
        _rows_steps(lp, K, Z, zb * N + zu, g[zu, zk], B * N)
        part_cols, part_of = Z.idx(), zb * N + zu
    else:
        U = lp.add_vars("u", B * N, 0.0, hz.capable_b.reshape(-1).astype(float),
                        integer=not relax)
        _rows_band(lp, K, U, np.tile(hz.K_lo, B), hz.K_hi_b.reshape(-1))
        part_cols, part_of = U.idx(), np.arange(B * N)

    # a tiny tie-break price on headroom: free providers report the headroom their droop needs,
    # not an arbitrary amount up to their room (the reported cost uses the real prices)
    eps = TIE_BREAK_PER_MW_H
    hold_up = hz.avail & (hz.need_up[:, None] | (hz.own[:, hz.area] > 0))
    hold_dn = hz.avail & hz.need_dn[:, None]
    r_up = lp.add_vars("r_up", T * N, 0.0, np.where(hold_up, hz.R_up, 0.0).reshape(-1),
                       cost=((hz.price_up + eps) * hz.hours[:, None]).reshape(-1))
    r_dn = lp.add_vars("r_dn", T * N, 0.0, np.where(hold_dn, hz.R_dn, 0.0).reshape(-1),
                       cost=((hz.price_dn + eps) * hz.hours[:, None]).reshape(-1))
    n_g = len(first)
    G = lp.add_vars("G", n_g * n_a * n_k, 0.0, np.inf)

    P = _rows_dispatch(lp, hz, r_up, r_dn, elastic) if hz.co_opt else None
    _rows_aggregate(lp, hz, K, G, first, unit_class, n_a, n_k)
    tt, ii = np.nonzero(hz.avail & hz.need_up[:, None])
    _rows_headroom(lp, "headroom_up", hz, K, r_up, tt, ii)
    tt, ii = np.nonzero(hz.avail & hz.need_dn[:, None])
    _rows_headroom(lp, "headroom_dn", hz, K, r_dn, tt, ii)
    if (hz.own > 0).any():
        _rows_own_reserve(lp, hz, r_up, part_cols, part_of, elastic)
    ginfo = (group_of_t, n_a, n_k, classes)
    _rows_settled(lp, hz, K, G, ginfo, F_model, elastic, P)
    if case.limits.max_nadir_deviation_hz is not None:
        _rows_nadir(lp, case, hz, r_up, r_dn, elastic, nadir_scale)
    if len(case.links) and hz.co_opt:
        _rows_flows_dispatch(lp, hz, K, G, ginfo, x_hat, elastic, P)
    elif len(case.links):
        _rows_flows(lp, hz, K, G, ginfo, x_hat, elastic)
    change_cols = _rows_change(lp, case, hz, K, st, relax)

    info = ModelInfo(case, hz, F_model, x_hat, classes, unit_class, group_of_t,
                     st[0], st[1], st[2], st[3], change_cols, elastic)
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


def _rows_steps(lp, K, Z, z_of, zg, n):
    """K = sum_k g_k z_k and sum_k z_k <= 1 per (block, unit): one setting, or off."""
    lp.add_rows("step_gain", n, np.r_[np.arange(n), z_of], np.r_[K.idx(), Z.idx()],
                np.r_[np.ones(n), -zg], lo=0.0, hi=0.0)
    lp.add_rows("step_one", n, z_of, Z.idx(), np.ones(len(z_of)), hi=1.0)


def _rows_aggregate(lp, hz: Horizon, K, G, first, unit_class, n_a, n_k):
    """G_gak - sum K_bi over units i available in group g, in area a, dead-band class k = 0:
    settled and flow rows then see a few aggregates instead of every unit."""
    N = hz.N
    n_g = len(first)
    gg, ii = np.nonzero(hz.avail[first])  # members of each group
    b = hz.block[first][gg]
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


def _removed(hz: Horizon, inst):
    """(instance, unit) pairs, for the instances given, of providers that respond in their
    period but not in the instance: the tripped unit and any absent provider."""
    out_m, out_j = [], []
    for arr in (hz.trip, hz.absent):
        j = arr[inst]
        ok = j >= 0
        ok[ok] = hz.avail[hz.inst_t[inst][ok], j[ok]]
        out_m.append(inst[ok])
        out_j.append(j[ok])
    return np.concatenate(out_m), np.concatenate(out_j)


def _rows_settled(lp, hz: Horizon, K, G, ginfo, F_m, elastic, P=None):
    """sum_i K_i (F - d_i)^+ + F sum_a D_a >= |dP| per event instance (tripped unit out);
    under co-optimisation a trip's dP is the tripped unit's dispatched output p_tj."""
    group_of_t, n_a, n_k, classes = ginfo
    M, N = len(hz.dP), hz.N
    w = np.tile(np.maximum(F_m - classes, 0.0), n_a)  # per (a, k)
    g = group_of_t[hz.inst_t]
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
    for arr in (hz.trip, hz.absent):
        m = np.nonzero(arr >= 0)[0]
        r[m, arr[m]] = 0.0
    have = np.einsum("mkn,mn->mk", coef, r)
    return (need - have).max(axis=1)


def _rows_nadir(lp, case, hz: Horizon, r_up, r_dn, elastic, scale=None):
    """Nadir limit as energy rows (nadir_terms): sum_i e_i(t_k) r_i >= dP t_k - 2 H N / f_n
    for each event instance and time point, over the providers that respond in it."""
    N, M = hz.N, len(hz.dP)
    coef, need = nadir_terms(case, hz, scale)
    K = coef.shape[1]
    live = hz.avail[hz.inst_t].copy()  # (M, N)
    for arr in (hz.trip, hz.absent):
        m = np.nonzero(arr >= 0)[0]
        live[m, arr[m]] = False
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
    g = group_of_t[hz.inst_t[live]]
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

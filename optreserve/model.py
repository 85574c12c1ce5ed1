"""The optimisation model in gain space, one small function per constraint family.

Symbols follow docs/formulation.md: K unit gain [MW/Hz], u participation, z droop-step choice,
r_up/r_dn headroom [MW], G per-area per-dead-band-class gain aggregate [MW/Hz], F settled
limit, F_act full-activation deviation, D_a load self-regulation [MW/Hz], Phi the PTDF.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .case import Case
from .network import ptdf
from .program import LinearProgram

# Penalties of the elastic (diagnosis) variant: large against any headroom price so that a
# relaxation is used only when nothing else can meet the limits.
ELASTIC_PENALTY = 1.0e6


@dataclass(frozen=True)
class Events:
    """Per event: magnitude dP [MW] > 0 or 0, direction sigma (+1 deficit / under-frequency,
    -1 surplus / over-frequency), area index and tripped unit index (-1 for a load step)."""

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
            names=list(ev["event"]),
            dP=np.abs(size),
            sigma=np.where(size < 0, -1.0, 1.0),
            area=np.array([apos[a] for a in ev["area"]], dtype=np.int64),
            trip=np.array([upos.get(u, -1) if k == "unit_trip" else -1
                           for k, u in zip(ev["kind"], ev["unit"])], dtype=np.int64),
        )


@dataclass(frozen=True)
class UnitData:
    """Per-unit numbers the model needs, after the presolve of what each unit can give."""

    K_lo: np.ndarray
    K_hi: np.ndarray  # highest gain inside band and headroom (0 if it cannot provide)
    capable: np.ndarray  # bool: may participate
    d_hz: np.ndarray
    R_up: np.ndarray  # most up headroom it may hold [MW]
    R_dn: np.ndarray
    a_act: np.ndarray  # (F_act - d)^+: headroom per MW/Hz of gain
    area: np.ndarray
    K_now: np.ndarray  # NaN where droop_now_pct not given


def unit_data(case: Case, need_up: bool, need_dn: bool) -> UnitData:
    u = case.units
    f_n = case.nominal_frequency_hz
    cap = u["capacity_mw"].to_numpy(float)
    out = u["output_mw"].to_numpy(float)
    mn = u["min_output_mw"].to_numpy(float)
    d = u["deadband_mhz"].to_numpy(float) / 1000.0
    K_lo = cap / (u["droop_max_pct"].to_numpy(float) / 100.0 * f_n)
    K_band = cap / (u["droop_min_pct"].to_numpy(float) / 100.0 * f_n)
    up_cap = u["reserve_up_max_mw"].to_numpy(float)
    dn_cap = u["reserve_down_max_mw"].to_numpy(float)
    R_up = np.maximum(0.0, np.fmin(cap - out, np.where(np.isnan(up_cap), np.inf, up_cap)))
    R_dn = np.maximum(0.0, np.fmin(out - mn, np.where(np.isnan(dn_cap), np.inf, dn_cap)))
    provides = u["provides"].to_numpy(bool)
    a_act = np.maximum(case.limits.full_activation_deviation_hz - d, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        lim_up = np.where(a_act > 0, R_up / a_act, np.inf) if need_up else np.full_like(cap, np.inf)
        lim_dn = np.where(a_act > 0, R_dn / a_act, np.inf) if need_dn else np.full_like(cap, np.inf)
    K_hi = np.minimum(K_band, np.minimum(lim_up, lim_dn))
    capable = provides & (K_hi >= K_lo * (1 - 1e-12))
    K_hi = np.where(capable, K_hi, 0.0)
    now = u["droop_now_pct"].to_numpy(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        K_now = cap / (now / 100.0 * f_n)
    area = case.unit_area_index()
    R_up = np.where(provides, R_up, 0.0)
    R_dn = np.where(provides, R_dn, 0.0)
    return UnitData(K_lo, K_hi, capable, d, R_up, R_dn, a_act, area, K_now)


@dataclass
class ModelInfo:
    """What it takes to read a solution of the program back in engineering terms."""

    case: Case
    ev: Events
    ud: UnitData
    F_model: float  # settled-deviation bound the rows enforce
    x_hat: np.ndarray  # per event: settled |df| guess used for dead-band-reduced gains
    classes: np.ndarray  # dead-band values [Hz] of the aggregate classes
    unit_class: np.ndarray
    steps_gain: np.ndarray | None  # per step-choice column: gain [MW/Hz]
    steps_unit: np.ndarray | None  # per step-choice column: unit index
    steps_pct: np.ndarray | None
    change_units: np.ndarray  # unit indices that carry a change indicator
    Phi: np.ndarray
    need_up: bool
    need_dn: bool
    elastic: bool


def effective_factor(d_hz: np.ndarray, x_hat: np.ndarray) -> np.ndarray:
    """(1 - d / x)^+ for every (event, d): unit response K (x - d)^+ = K x (1 - d/x)^+."""
    x = np.asarray(x_hat, float)[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        c = np.where(x > 0, 1.0 - np.asarray(d_hz, float)[None, :] / x, 0.0)
    return np.clip(c, 0.0, 1.0)


def build_model(case: Case, x_hat: np.ndarray | None = None, elastic: bool = False,
                relax: bool = False) -> tuple[LinearProgram, ModelInfo]:
    """Describe the whole allocation problem as sparse blocks."""
    ev = Events.of(case)
    need_up = bool((ev.dP[ev.sigma > 0] > 0).any())
    need_dn = bool((ev.dP[ev.sigma < 0] > 0).any())
    ud = unit_data(case, need_up, need_dn)
    F = case.limits.max_settled_deviation_hz
    F_model = min(F, case.limits.full_activation_deviation_hz)
    if x_hat is None:
        x_hat = np.full(len(ev.names), F_model)
    n = len(case.units)
    n_a = len(case.areas)
    lp = LinearProgram()

    # dead-band classes: units sharing a dead band share an aggregate per area
    classes, unit_class = np.unique(np.round(ud.d_hz, 12), return_inverse=True)
    n_k = len(classes)

    K = lp.add_vars("K", n, 0.0, ud.K_hi)
    steps = case.droop.steps_pct
    info_steps = (None, None, None)
    if steps is not None:
        s = np.asarray(steps, float)
        g = case.gain_from_droop(np.ones(n))[:, None] / s[None, :]  # K for each (unit, step)
        ok = ud.capable[:, None] & (g >= ud.K_lo[:, None] * (1 - 1e-9)) & (
            g <= ud.K_hi[:, None] * (1 + 1e-9)) & (
            s[None, :] >= case.units["droop_min_pct"].to_numpy(float)[:, None] - 1e-9) & (
            s[None, :] <= case.units["droop_max_pct"].to_numpy(float)[:, None] + 1e-9)
        zu, zk = np.nonzero(ok)
        zg = g[zu, zk]
        Z = lp.add_vars("z", len(zu), 0.0, 1.0, integer=not relax)
        info_steps = (zg, zu, s[zk])
        _rows_steps(lp, K, Z, zu, zg, n)
        part_cols, part_unit, part_coef = Z.idx(), zu, np.ones(len(zu))
    else:
        U = lp.add_vars("u", n, 0.0, ud.capable.astype(float), integer=not relax)
        _rows_band(lp, K, U, ud)
        part_cols, part_unit, part_coef = U.idx(), np.arange(n), np.ones(n)

    own = case.areas["min_own_reserve_mw"].to_numpy(float)
    hold_up = need_up | (own[ud.area] > 0)
    r_up = lp.add_vars("r_up", n, 0.0, np.where(hold_up, ud.R_up, 0.0),
                       cost=case.units["price_up_per_mw_h"].to_numpy(float))
    r_dn = lp.add_vars("r_dn", n, 0.0, np.where(need_dn, ud.R_dn, 0.0),
                       cost=case.units["price_down_per_mw_h"].to_numpy(float))
    G = lp.add_vars("G", n_a * n_k, 0.0, np.inf)

    _rows_aggregate(lp, K, G, ud.area * n_k + unit_class, n_a * n_k)
    if need_up:
        _rows_headroom(lp, "headroom_up", K, r_up, ud)
    if need_dn:
        _rows_headroom(lp, "headroom_dn", K, r_dn, ud)
    if (own > 0).any():
        _rows_own_reserve(lp, r_up, ud, own, part_cols, part_unit, part_coef, elastic)
    _rows_settled(lp, case, ev, K, G, ud, classes, n_k, F_model, elastic)
    Phi = ptdf(case)
    if len(case.links):
        _rows_flows(lp, case, ev, K, G, ud, classes, unit_class, n_k, Phi, x_hat, elastic)
    change_units = _rows_change(lp, case, K, ud, info_steps, part_cols, part_unit, relax)

    info = ModelInfo(case, ev, ud, F_model, np.asarray(x_hat, float), classes, unit_class,
                     info_steps[0], info_steps[1], info_steps[2], change_units, Phi,
                     need_up, need_dn, elastic)
    return lp, info


# ------------------------------------------------------------------ constraint families
def _rows_band(lp, K, U, ud: UnitData):
    """u K_lo <= K <= u K_hi (semi-continuous gain: off, or inside the band)."""
    n = K.size
    i = np.arange(n)
    lp.add_rows("band_hi", n, np.r_[i, i], np.r_[K.idx(), U.idx()], np.r_[np.ones(n), -ud.K_hi],
                hi=0.0)
    lp.add_rows("band_lo", n, np.r_[i, i], np.r_[K.idx(), U.idx()], np.r_[np.ones(n), -ud.K_lo],
                lo=0.0)


def _rows_steps(lp, K, Z, zu, zg, n):
    """K_i = sum_k g_ik z_ik and sum_k z_ik <= 1 (one setting, or off)."""
    lp.add_rows("step_gain", n, np.r_[np.arange(n), zu], np.r_[K.idx(), Z.idx()],
                np.r_[np.ones(n), -zg], lo=0.0, hi=0.0)
    lp.add_rows("step_one", n, zu, Z.idx(), np.ones(len(zu)), hi=1.0)


def _rows_aggregate(lp, K, G, group, n_groups):
    """G_ak - sum_{i in a, class k} K_i = 0: flow and settled rows see a few aggregates."""
    n = K.size
    lp.add_rows("aggregate", n_groups, np.r_[np.arange(n_groups), group],
                np.r_[G.idx(), K.idx()], np.r_[np.ones(n_groups), -np.ones(n)], lo=0.0, hi=0.0)


def _rows_headroom(lp, name, K, r, ud: UnitData):
    """r_i >= K_i (F_act - d_i)^+: full droop response at F_act fits in the headroom."""
    n = K.size
    i = np.arange(n)
    lp.add_rows(name, n, np.r_[i, i], np.r_[r.idx(), K.idx()], np.r_[np.ones(n), -ud.a_act],
                lo=0.0)


def _rows_own_reserve(lp, r_up, ud, own, part_cols, part_unit, part_coef, elastic):
    """sum_{i in a} r_up_i >= min_own_a, and only participating providers hold headroom."""
    n = r_up.size
    lp.add_rows("hold_if_part", n, np.r_[np.arange(n), part_unit],
                np.r_[r_up.idx(), part_cols], np.r_[np.ones(n), -ud.R_up[part_unit] * part_coef],
                hi=0.0)
    areas = np.nonzero(own > 0)[0]
    local = {a: k for k, a in enumerate(areas)}
    sel = np.isin(ud.area, areas)
    rows = np.array([local[a] for a in ud.area[sel]], dtype=np.int64)
    cols, vals = r_up.idx()[sel], np.ones(int(sel.sum()))
    if elastic:
        S = lp.add_vars("slack_own", len(areas), 0.0, np.inf, cost=ELASTIC_PENALTY)
        rows, cols, vals = np.r_[rows, np.arange(len(areas))], np.r_[cols, S.idx()], np.r_[
            vals, np.ones(len(areas))]
    lp.add_rows("own_reserve", len(areas), rows, cols, vals, lo=own[areas])


def _trip_terms(ev: Events, ud: UnitData, coef_of_event):
    """Entries removing each tripped provider's own gain from its event's rows."""
    e = np.nonzero((ev.trip >= 0))[0]
    e = e[ud.capable[ev.trip[e]]]
    return e, ev.trip[e], coef_of_event(e, ev.trip[e])


def _rows_settled(lp, case, ev: Events, K, G, ud, classes, n_k, F_m, elastic):
    """sum_i K_i (F - d_i)^+ + F sum_a D_a >= |dP| for every event (tripped unit excluded)."""
    n_e, n_a = len(ev.names), len(case.areas)
    D = case.load_damping_mw_per_hz().sum()
    w = np.maximum(F_m - classes, 0.0)  # per class
    rows = np.repeat(np.arange(n_e), n_a * n_k)
    cols = np.tile(G.idx(), n_e)
    vals = np.tile(np.tile(w, n_a), n_e)
    te, tu, tv = _trip_terms(ev, ud, lambda e, j: -np.maximum(F_m - ud.d_hz[j], 0.0))
    rows, cols, vals = np.r_[rows, te], np.r_[cols, K.idx(tu)], np.r_[vals, tv]
    if elastic:
        S = lp.add_vars("slack_settled", n_e, 0.0, np.inf, cost=ELASTIC_PENALTY)
        rows, cols, vals = np.r_[rows, np.arange(n_e)], np.r_[cols, S.idx()], np.r_[
            vals, np.ones(n_e)]
    lp.add_rows("settled", n_e, rows, cols, vals, lo=ev.dP - F_m * D)


def flow_weights(case: Case, ev: Events, Phi: np.ndarray):
    """Per (event, link, area) the weights of beta'_a in the flow rows multiplied by beta'
    (then divided by the link limit to keep coefficients near one):
      upper: sum_a [F0 - Fmax + s dP (Phi_la - Phi_l,ae)] beta'_a <= 0
      lower: sum_a [F0 + Fmax + s dP (Phi_la - Phi_l,ae)] beta'_a >= 0"""
    F0 = case.links["flow_mw"].to_numpy(float)
    Fmax = case.links["limit_mw"].to_numpy(float)
    shift = (ev.sigma * ev.dP)[:, None, None] * (Phi[None, :, :] - Phi[:, ev.area].T[:, :, None])
    W_up = (F0 - Fmax)[None, :, None] + shift
    W_lo = (F0 + Fmax)[None, :, None] + shift
    return W_up / Fmax[None, :, None], W_lo / Fmax[None, :, None]


def _rows_flows(lp, case, ev: Events, K, G, ud, classes, unit_class, n_k, Phi, x_hat, elastic):
    """Exact post-event link limits in the multiply-by-beta' form, beta'_a = sum_k c_k G_ak
    (- c_j K_j for the tripped unit) + D_a, with c = (1 - d/x)^+ at the settled guess x."""
    n_e, n_l, n_a = len(ev.names), len(case.links), len(case.areas)
    live = np.nonzero(ev.dP > 0)[0]
    W_up, W_lo = flow_weights(case, ev, Phi)
    c = effective_factor(classes, x_hat)  # (E, K)
    D_a = case.load_damping_mw_per_hz()
    for name, W, sense in (("flow_hi", W_up, "hi"), ("flow_lo", W_lo, "lo")):
        W = W[live]  # (E', L, A)
        ne = len(live)
        # coefficient of G_ak in row (e, l): W[e, l, a] * c[e, k]
        coef = W[:, :, :, None] * c[live][:, None, None, :]  # (E', L, A, K)
        rows = np.repeat(np.arange(ne * n_l), n_a * n_k)
        cols = np.tile(G.idx(), ne * n_l)
        vals = coef.reshape(-1)
        rhs = -(W * D_a[None, None, :]).sum(axis=2).reshape(-1)
        # tripped providers: -W[e, l, a_e] c_j K_j
        te = np.nonzero((ev.trip[live] >= 0))[0]
        te = te[ud.capable[ev.trip[live][te]]]
        if len(te):
            j = ev.trip[live][te]
            cj = effective_factor(ud.d_hz[j], x_hat[live][te]).diagonal()
            tv = -W[te, :, ev.area[live][te]] * cj[:, None]  # (T, L)
            rows = np.r_[rows, (te[:, None] * n_l + np.arange(n_l)[None, :]).reshape(-1)]
            cols = np.r_[cols, np.repeat(K.idx(j), n_l)]
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


def _rows_change(lp, case, K, ud, info_steps, part_cols, part_unit, relax):
    """Indicator c_i = 1 when unit i leaves its droop_now setting (only with a penalty)."""
    pen = case.droop.change_penalty_per_unit
    has_now = ~np.isnan(ud.K_now)
    units = np.nonzero(has_now)[0] if pen > 0 else np.zeros(0, np.int64)
    if len(units) == 0:
        return units
    m = len(units)
    C = lp.add_vars("changed", m, 0.0, 1.0, cost=pen, integer=not relax)
    zg, zu, zs = info_steps
    if zg is not None:
        now = case.units["droop_now_pct"].to_numpy(float)
        match = np.isclose(zs, now[zu], rtol=0, atol=1e-9)
        local = {u: k for k, u in enumerate(units)}
        sel = match & np.isin(zu, units)
        rows = np.r_[np.arange(m), [local[u] for u in zu[sel]]].astype(np.int64)
        cols = np.r_[C.idx(), lp.var_blocks["z"].idx()[sel]]
        lp.add_rows("change", m, rows, cols, np.ones(len(rows)), lo=1.0)
    else:
        Kn = ud.K_now[units]
        up = np.maximum(ud.K_hi[units] - Kn, 0.0)
        i = np.arange(m)
        lp.add_rows("change_up", m, np.r_[i, i], np.r_[K.idx(units), C.idx()],
                    np.r_[np.ones(m), -up], hi=Kn)
        lp.add_rows("change_dn", m, np.r_[i, i], np.r_[K.idx(units), C.idx()],
                    np.r_[np.ones(m), Kn], lo=Kn)
    return units

"""Horizon data: the case turned into per-period, per-unit arrays the row families read
(capability, headroom room, events as instances, droop blocks). A snapshot is a horizon of one
period."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from optreserve.case.data import Case
from optreserve.case.nodal import area_level
from optreserve.case.products import ENERGY_COLS, energy_caps, trip_members, unit_flags
from optreserve.network.ptdf import ptdf


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
        size = ev["size_mw"].to_numpy(float)
        return cls(
            names=[str(e) for e in ev["event"]],
            dP=np.abs(size),
            sigma=np.where(size < 0, -1.0, 1.0),
            area=np.array([apos[a] for a in ev["area"]], dtype=np.int64),
            trip=first_lost(trip_members(case.units, ev)),
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


def capability(case: Case, room_up, room_dn, up_cap, dn_cap, provides, need_up, need_dn,
               prov_up=None, prov_dn=None):
    """What each unit can give, broadcast over leading period axes: (K_hi, capable, R_up,
    R_dn). room_up/room_dn: physical room above/below the output (for a dispatchable unit
    under co-optimisation, its whole range). need_up/need_dn say whether up/down headroom is
    required (scalars or (T, 1)). prov_up/prov_dn (default: provides): directions in which
    the unit may respond at all (`provides = up | down`); see directions()."""
    K_hi, capable, _, _, R_up, R_dn = directions(case, room_up, room_dn, up_cap, dn_cap,
                                                 provides, need_up, need_dn, prov_up, prov_dn)
    return K_hi, capable, R_up, R_dn


def directions(case: Case, room_up, room_dn, up_cap, dn_cap, provides, need_up, need_dn,
               prov_up=None, prov_dn=None):
    """Capability per direction: (K_hi, capable, resp_up, resp_dn, R_up, R_dn).

    A direction is usable when the unit may respond in it and, if the period has events in
    that direction, its headroom there holds the band's lowest gain at full activation. A
    unit is capable when some needed direction is usable (any direction when the period has
    no event); its highest gain is bounded by the headroom of the usable directions only, so
    a unit at full output still gives downward response (and one at minimum output upward).
    resp_up/resp_dn: the unit responds in that direction (the other is blocked: no headroom,
    no credit)."""
    u = case.units
    f_n = case.nominal_frequency_hz
    provides = np.asarray(provides, bool)
    prov_up = provides if prov_up is None else provides & np.asarray(prov_up, bool)
    prov_dn = provides if prov_dn is None else provides & np.asarray(prov_dn, bool)
    cap = u["capacity_mw"].to_numpy(float)
    d = u["deadband_mhz"].to_numpy(float) / 1000.0
    K_lo = cap / (u["droop_max_pct"].to_numpy(float) / 100.0 * f_n)
    K_band = cap / (u["droop_min_pct"].to_numpy(float) / 100.0 * f_n)
    R_up = np.maximum(0.0, np.fmin(room_up, np.where(np.isnan(up_cap), np.inf, up_cap)))
    R_dn = np.maximum(0.0, np.fmin(room_dn, np.where(np.isnan(dn_cap), np.inf, dn_cap)))
    a_act = np.maximum(case.limits.full_activation_deviation_hz - d, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        lim_up = np.where(a_act > 0, R_up / a_act, np.inf)
        lim_dn = np.where(a_act > 0, R_dn / a_act, np.inf)
    need_up, need_dn = np.asarray(need_up, bool), np.asarray(need_dn, bool)
    tol = K_lo * (1 - 1e-12)
    ok_up = prov_up & (~need_up | (np.minimum(K_band, lim_up) >= tol))
    ok_dn = prov_dn & (~need_dn | (np.minimum(K_band, lim_dn) >= tol))
    use_up, use_dn = ok_up & need_up, ok_dn & need_dn
    capable = np.where(need_up | need_dn, use_up | use_dn, ok_up | ok_dn)
    K_hi = np.minimum(K_band, np.minimum(np.where(use_up, lim_up, np.inf),
                                         np.where(use_dn, lim_dn, np.inf)))
    K_hi = np.where(capable, K_hi, 0.0)
    resp_up = capable & np.where(need_up, use_up, ok_up)
    resp_dn = capable & np.where(need_dn, use_dn, ok_dn)
    return (K_hi, capable, resp_up, resp_dn, np.where(prov_up, R_up, 0.0),
            np.where(prov_dn, R_dn, 0.0))


def reserve_caps(case: Case, get) -> tuple[np.ndarray, np.ndarray]:
    """Capability caps on up and down headroom (NaN: none): reserve_*_max_mw and, for an
    energy-limited provider, what it can sustain for min_sustain_minutes. get(column) gives
    the column's values (static, or per period)."""
    up, dn = get("reserve_up_max_mw"), get("reserve_down_max_mw")
    if not any(c in case.units.columns for c in ENERGY_COLS):
        return up, dn
    e_up, e_dn = energy_caps(case, get("energy_up_mwh"), get("energy_down_mwh"))
    return np.fmin(up, e_up), np.fmin(dn, e_dn)


def unit_flag_matrix(case: Case, name: str) -> np.ndarray:
    """(T, N) per-period product flag (case/products.py columns), defaulting to `provides`
    (no unit always on) for tables built without them."""
    if name in case.units.columns:
        return case.unit_matrix(name).astype(bool)
    if name == "provides_always":
        return np.zeros((case.n_periods, len(case.units)), dtype=bool)
    return case.unit_matrix("provides").astype(bool)


def unit_data(case: Case, need_up: bool, need_dn: bool) -> UnitData:
    """UnitData of a single snapshot."""
    u = case.units
    f_n = case.nominal_frequency_hz
    cap = u["capacity_mw"].to_numpy(float)
    d = u["deadband_mhz"].to_numpy(float) / 1000.0
    out, mn = u["output_mw"].to_numpy(float), u["min_output_mw"].to_numpy(float)
    K_hi, capable, R_up, R_dn = capability(
        case, cap - out, out - mn, *reserve_caps(case, lambda c: u[c].to_numpy(float)),
        u["provides"].to_numpy(bool), need_up, need_dn,
        *(unit_flags(u)[k] for k in ("provides_up", "provides_down")))
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
    # reserve products (case/products.py): directions each unit responds in per period (a
    # blocked direction holds no headroom and gets no credit) and always-on governors per
    # droop block (participation fixed on). None: every available unit both ways, none fixed.
    resp_up: np.ndarray | None = None  # (T, N)
    resp_dn: np.ndarray | None = None  # (T, N)
    always_b: np.ndarray | None = None  # (B, N)
    # (M, N) sparse 0/1: the units each instance loses (several for a common-mode trip);
    # `trip` keeps the first of them. None: `trip` alone.
    lost: sp.csr_matrix | None = None

    @property
    def N(self) -> int:
        return len(self.K_lo)


def prepare(case: Case) -> Horizon:
    """Stack the case over periods and event instances (no per-period DataFrames)."""
    case = area_level(case)  # a nodal case's branches have rows of their own (nodal_flows)
    T = case.n_periods
    N = len(case.units)
    apos = {a: k for k, a in enumerate(case.areas["area"])}
    ev = case.events
    inst = case.instances()
    e = inst["event_index"].to_numpy()
    size = inst["size_mw"].to_numpy(float)
    inst_t = inst["t"].to_numpy().astype(np.int64)
    dP = np.abs(size)
    sigma = np.where(size < 0, -1.0, 1.0)
    ev_area = np.array([apos[a] for a in ev["area"]], dtype=np.int64)
    members = trip_members(case.units, ev)  # (E, N): all units of a common-mode trip
    ev_trip = first_lost(members)
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
    K_hi_t, avail, resp_up, resp_dn, R_up, R_dn = directions(
        case, room_up, room_dn, *reserve_caps(case, lambda c: um(c).astype(float)),
        um("provides").astype(bool), need_up[:, None], need_dn[:, None],
        unit_flag_matrix(case, "provides_up"), unit_flag_matrix(case, "provides_down"))
    u0 = unit_data(case, bool(need_up.any()), bool(need_dn.any()))
    block = case.blocks()
    B = int(block.max()) + 1
    K_hi_b = np.full((B, N), np.inf)
    np.minimum.at(K_hi_b, block, np.where(avail, K_hi_t, np.inf))
    capable_b = np.isfinite(K_hi_b)
    K_hi_b = np.where(capable_b, K_hi_b, 0.0)
    always_b = np.zeros((B, N), dtype=bool)
    np.logical_or.at(always_b, block, unit_flag_matrix(case, "provides_always") & avail)
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
        H_sys=system_inertia(case, inst_t, members[e]),
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
        # a single dispatched unit's trip follows its output; a common-mode trip keeps the
        # sum of the scheduled outputs (one output variable per event size only)
        dP_var=np.where(_from_output(case, e) & (ev_trip[e] >= 0) & disp[np.maximum(
            ev_trip[e], 0)] & (np.diff(members.tocsr().indptr)[e] == 1), ev_trip[e],
            -1).astype(np.int64),
        resp_up=resp_up, resp_dn=resp_dn, always_b=always_b & capable_b,
        lost=members[e].tocsr(),
    )


def _from_output(case: Case, e: np.ndarray) -> np.ndarray:
    ev = case.events
    if "size_from_output" not in ev.columns:
        return np.zeros(len(e), dtype=bool)
    return ev["size_from_output"].to_numpy(bool)[e]


def system_inertia(case: Case, inst_t: np.ndarray, trip) -> np.ndarray:
    """Stored kinetic energy H_i * capacity_i [MW s] of the units online in each instance's
    period, minus the tripped units' (trip: (M,) unit or -1, or an (M, N) sparse matrix of
    lost units). A unit counts as online when it runs (output not zero) or may provide
    reserve; a missing inertia_s counts as zero."""
    cap = case.units["capacity_mw"].to_numpy(float)
    H = np.nan_to_num(case.units["inertia_s"].to_numpy(float)) * cap  # (N,)
    online = (case.unit_matrix("output_mw").astype(float) != 0) | case.unit_matrix(
        "provides").astype(bool)
    per_t = (online * H[None, :]).sum(axis=1)  # (T,)
    if sp.issparse(trip):
        m, j = trip.nonzero()
        lost = np.bincount(m, weights=H[j] * online[inst_t[m], j], minlength=len(inst_t))
    else:
        lost = np.where(trip >= 0, H[np.maximum(trip, 0)] * online[inst_t, np.maximum(trip, 0)],
                        0.0)
    return per_t[inst_t] - lost


def first_lost(members: sp.csr_matrix) -> np.ndarray:
    """(E,) the first unit each event loses, -1 for none."""
    m = members.tocsr()
    if m.nnz == 0:
        return np.full(m.shape[0], -1, dtype=np.int64)
    has = np.diff(m.indptr) > 0
    return np.where(has, m.indices[np.minimum(m.indptr[:-1], m.nnz - 1)], -1).astype(np.int64)


def lost_pairs(hz: Horizon, inst=None) -> tuple[np.ndarray, np.ndarray]:
    """(instance, unit) pairs of every unit lost in the instances given (all units of a
    common-mode trip), instance-ordered."""
    inst = np.arange(len(hz.dP)) if inst is None else np.asarray(inst)
    if hz.lost is None:
        j = hz.trip[inst]
        return inst[j >= 0], j[j >= 0]
    m, j = hz.lost[inst].nonzero()
    order = np.lexsort((j, m))
    return inst[m[order]], j[order].astype(np.int64)


def out_pairs(hz: Horizon, inst=None) -> tuple[np.ndarray, np.ndarray]:
    """(instance, unit) pairs of providers that give no response in the instances given:
    every lost unit, then any absent provider."""
    inst = np.arange(len(hz.dP)) if inst is None else np.asarray(inst)
    m1, j1 = lost_pairs(hz, inst)
    j2 = hz.absent[inst]
    return np.r_[m1, inst[j2 >= 0]], np.r_[j1, j2[j2 >= 0]].astype(np.int64)


# Penalty of the elastic (diagnosis) slacks: large against any headroom price so that a
# relaxation is used only when nothing else can meet the limits.
ELASTIC_PENALTY = 1.0e6


def effective_factor(d_hz, x_hat) -> np.ndarray:
    """(1 - d / x)^+ for every (x, d) pair: unit response K (x - d)^+ = K x (1 - d/x)^+."""
    x = np.asarray(x_hat, float)[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        c = np.where(x > 0, 1.0 - np.asarray(d_hz, float)[None, :] / x, 0.0)
    return np.clip(c, 0.0, 1.0)


def responds(hz: Horizon) -> tuple[np.ndarray, np.ndarray]:
    """(resp_up, resp_dn), each (T, N): who responds in each direction in each period."""
    up = hz.avail if hz.resp_up is None else hz.resp_up
    dn = hz.avail if hz.resp_dn is None else hz.resp_dn
    return up, dn


def direction_key(hz: Horizon, inst=None) -> np.ndarray:
    """Per instance the row of the stacked (resp_up; resp_dn) table, (2T, N): t for
    under-frequency events, T + t for over-frequency ones."""
    inst = np.arange(len(hz.dP)) if inst is None else np.asarray(inst)
    return hz.inst_t[inst] + hz.T * (hz.sigma[inst] < 0)


def responds_in(hz: Horizon, inst=None) -> np.ndarray:
    """(M', N) who responds in each instance's direction and period (before any loss)."""
    up, dn = responds(hz)
    return np.concatenate([up, dn])[direction_key(hz, inst)]


def _removed(hz: Horizon, inst):
    """(instance, unit) pairs, for the instances given, of providers that respond in their
    period and direction but not in the instance: the tripped unit and any absent provider."""
    up, dn = responds(hz)
    both = np.concatenate([up, dn])
    m, j = out_pairs(hz, np.asarray(inst))
    ok = both[direction_key(hz, m), j]
    return m[ok], j[ok]

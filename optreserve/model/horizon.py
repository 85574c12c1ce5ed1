"""Horizon data: the case turned into per-period, per-unit arrays the row families read
(capability, headroom room, events as instances, droop blocks). A snapshot is a horizon of one
period."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from optreserve.case.data import Case
from optreserve.case.nodal import area_level
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
    case = area_level(case)  # a nodal case's branches have rows of their own (nodal_flows)
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


# Penalty of the elastic (diagnosis) slacks: large against any headroom price so that a
# relaxation is used only when nothing else can meet the limits.
ELASTIC_PENALTY = 1.0e6


def effective_factor(d_hz, x_hat) -> np.ndarray:
    """(1 - d / x)^+ for every (x, d) pair: unit response K (x - d)^+ = K x (1 - d/x)^+."""
    x = np.asarray(x_hat, float)[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        c = np.where(x > 0, 1.0 - np.asarray(d_hz, float)[None, :] / x, 0.0)
    return np.clip(c, 0.0, 1.0)


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

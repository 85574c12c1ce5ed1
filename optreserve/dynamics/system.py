"""One period of a case under an allocation, as the arrays the time-domain model needs: per
area a swing equation, per link a synchronising tie, per unit a governor model and the limits
of its response (docs/formulation.md, "Time-domain simulation").

Swing equation per area a (Δf_a in Hz, stored energy H_a in MW s, load damping D_a MW/Hz):
    2 H_a / f_n · dΔf_a/dt = ΔPm_a − ΔP_e,a − D_a Δf_a − ΔP_exp,a
with the tripped unit's stored energy gone at t = 0+. A tie l is a synchronising link,
ΔP_l = T_l δ_l + B_l (Δf_from − Δf_to), T_l = S_base / x_l MW/rad, dδ_l/dt = 2π (Δf_from −
Δf_to); B_l gives each inter-area swing a damping ratio (tie_damping) and vanishes when the
areas swing together, so it changes neither the settled point nor the centre of inertia.

The swing part is linear and the same for every governor model: `swing_matrices` returns it
as x' = F x + E (p_mech − P_e) per event, for the exact discretisation in integrate.py.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from optreserve.case.data import Case
from optreserve.dynamics.governors import LAG_PER_ACTIVATION, MODELS, GovernorSet

# EU 2017/1485 Annex V: FCR full activation time 30 s (Continental Europe). Used for a
# responding lag unit without activation_time_s, with a warning.
DEFAULT_ACTIVATION_TIME_S = 30.0
# Common practice: tie-line reactances in per unit on a 100 MVA system base.
BASE_MVA = 100.0
# Damping ratio given to each tie line's inter-area swing: stands in for the damper windings
# and stabilisers an area model does not have. Common practice: planners ask inter-area modes
# for a damping ratio of at least 3-5 %.
INTER_AREA_DAMPING_RATIO = 0.05


@dataclass(frozen=True)
class System:
    """One period of a case with an allocation, as arrays (case order)."""

    f_n: float
    area_ids: list
    unit_ids: list
    link_ids: list
    unit_area: np.ndarray  # (N,)
    stored_energy_mw_s: np.ndarray  # (N,) H_i * capacity_i of online units (0 offline)
    gain: np.ndarray  # (N,) MW/Hz
    deadband_hz: np.ndarray
    r_up: np.ndarray  # (N,) headroom held (allocation)
    r_dn: np.ndarray
    lim_up: np.ndarray  # (N,) where the response stops: headroom or physical room, 0 blocked
    lim_dn: np.ndarray
    gov: GovernorSet  # (N,) governor models
    damping: np.ndarray  # (A,) MW/Hz
    incidence: np.ndarray  # (L, A)
    reactance: np.ndarray  # (L,)
    sync_mw_per_rad: np.ndarray  # (L,)
    flow0: np.ndarray
    limit: np.ndarray  # (L,) limit_mw
    transient_limit: np.ndarray  # (L,) transient_limit_mw, or limit_mw when not given
    response_limit: str = "headroom"
    units_file: str = "units.csv"  # where inertia_s comes from, for error messages

    @property
    def tau_s(self) -> np.ndarray:
        """First time constant of each governor (the lag's tau for version 1 units)."""
        return self.gov.t1

    def area_inertia(self, trip: int = -1) -> np.ndarray:
        """Stored energy per area [MW s] after the event (the tripped unit's removed)."""
        H = self.stored_energy_mw_s
        if trip >= 0:
            H = H.copy()
            H[trip] = 0.0
        return np.bincount(self.unit_area, weights=H, minlength=len(self.area_ids))

    def area_inertia_after(self, trip: np.ndarray) -> np.ndarray:
        """(M, A) stored energy per area after each of M events (trip -1: none)."""
        trip = np.asarray(trip, np.int64)
        base = self.area_inertia()
        out = np.repeat(base[None, :], len(trip), axis=0)
        m = np.nonzero(trip >= 0)[0]
        np.subtract.at(out, (m, self.unit_area[trip[m]]), self.stored_energy_mw_s[trip[m]])
        return np.maximum(out, 0.0)


def governor_set(case: Case, warnings: list | None = None, respond=None) -> GovernorSet:
    """The units' governor models (case order). A lag unit without activation_time_s gets
    DEFAULT_ACTIVATION_TIME_S (warned for the units in `respond`, when given)."""
    u = case.units
    n = len(u)
    t_act = u["activation_time_s"].to_numpy(float)
    names = (u["governor"].astype(str).str.strip().str.lower().to_numpy(object)
             if "governor" in u.columns else np.full(n, "lag", dtype=object))
    names = np.where(np.isin(names, MODELS), names, "lag")
    no_t = (names == "lag") & ~(np.isfinite(t_act) & (t_act > 0))
    if respond is not None and warnings is not None and (no_t & respond).any():
        w = no_t & respond
        listed = ", ".join(list(u["unit"][w])[:5]) + (" ..." if w.sum() > 5 else "")
        warnings.append(f"{int(w.sum())} responding unit(s) without activation_time_s "
                        f"({listed}): {DEFAULT_ACTIVATION_TIME_S:g} s assumed")
    t_act = np.where(no_t, DEFAULT_ACTIVATION_TIME_S, t_act)

    def col(c, fill=np.nan):
        return u[c].to_numpy(float) if c in u.columns else np.full(n, fill)
    return GovernorSet.from_arrays(names, LAG_PER_ACTIVATION * t_act, col("governor_lag_s"),
                                   col("reheat_time_s"), col("hp_fraction"),
                                   col("water_time_s"), np.nan_to_num(col("delay_s", 0.0)))


def response_limits(case: Case, r_up, r_dn, t: int = 0, mode: str | None = None):
    """(lim_up, lim_dn) [MW]: where each unit's response stops. "headroom": the headroom the
    allocation holds; "room": the physical room (capacity - output up, output - min_output
    down, within reserve_*_max_mw). A direction the unit does not provide in
    (provides_up / provides_down false) gives no response at all."""
    mode = mode or getattr(case, "response_limit", "headroom")
    u = case.units
    um = case.unit_matrix
    if mode == "room":
        out = um("output_mw")[t].astype(float)
        up = np.maximum(u["capacity_mw"].to_numpy(float) - out, 0.0)
        dn = np.maximum(out - um("min_output_mw")[t].astype(float), 0.0)
        cap_up = um("reserve_up_max_mw")[t].astype(float)
        cap_dn = um("reserve_down_max_mw")[t].astype(float)
        up = np.where(np.isfinite(cap_up), np.minimum(up, cap_up), up)
        dn = np.where(np.isfinite(cap_dn), np.minimum(dn, cap_dn), dn)
        # never less than the allocation holds (a limiter set to the reserve would allow it)
        up, dn = np.maximum(up, r_up), np.maximum(dn, r_dn)
    else:
        up, dn = np.asarray(r_up, float).copy(), np.asarray(r_dn, float).copy()
    for c, lim in (("provides_up", up), ("provides_down", dn)):
        if c in u.columns:
            lim[~np.asarray(um(c)[t], bool)] = 0.0
    return up, dn


def build_system(case: Case, gain, r_up, r_dn, t: int = 0, base_mva: float = BASE_MVA,
                 warnings: list | None = None, response_limit: str | None = None) -> System:
    """Arrays of period t: the online units' stored energy (a unit is online when its output
    is not zero or it may provide; a missing inertia_s counts as zero, as in the nadir row of
    the optimiser), governor models, response limits and tie-line synchronising coefficients
    T_l = base_mva / x_l [MW/rad]."""
    u = case.units
    um = case.unit_matrix
    cap = u["capacity_mw"].to_numpy(float)
    online = (um("output_mw")[t].astype(float) != 0) | um("provides")[t].astype(bool)
    H = np.nan_to_num(u["inertia_s"].to_numpy(float)) * cap * online
    gain = np.asarray(gain, float)
    mode = response_limit or getattr(case, "response_limit", "headroom")
    r_up, r_dn = np.asarray(r_up, float), np.asarray(r_dn, float)
    lim_up, lim_dn = response_limits(case, r_up, r_dn, t, mode)
    apos = {a: k for k, a in enumerate(case.areas["area"])}
    lk = case.links
    n_l, n_a = len(lk), len(case.areas)
    C = np.zeros((n_l, n_a))
    C[np.arange(n_l), [apos[a] for a in lk["from_area"]]] += 1.0
    C[np.arange(n_l), [apos[a] for a in lk["to_area"]]] -= 1.0
    X = case.link_matrix("reactance_pu")[t].astype(float) if n_l else np.zeros(0)
    damping = (case.area_matrix("load_mw")[t].astype(float)
               * case.area_matrix("load_damping_pct_per_hz")[t].astype(float) / 100.0)
    limit = case.link_matrix("limit_mw")[t].astype(float) if n_l else np.zeros(0)
    transient = limit
    if n_l and "transient_limit_mw" in lk.columns:
        tl = lk["transient_limit_mw"].to_numpy(float)
        transient = np.where(np.isfinite(tl) & (tl > 0), tl, limit)
    return System(
        f_n=case.nominal_frequency_hz, area_ids=list(case.areas["area"]),
        unit_ids=list(u["unit"]), link_ids=list(lk["link"]),
        unit_area=case.unit_area_index(), stored_energy_mw_s=H, gain=gain,
        deadband_hz=u["deadband_mhz"].to_numpy(float) / 1000.0,
        r_up=r_up, r_dn=r_dn, lim_up=lim_up, lim_dn=lim_dn,
        gov=governor_set(case, warnings, respond=gain > 0),
        damping=damping, incidence=C, reactance=X,
        sync_mw_per_rad=base_mva / X if n_l else np.zeros(0),
        flow0=case.link_matrix("flow_mw")[t].astype(float) if n_l else np.zeros(0),
        limit=limit, transient_limit=transient, response_limit=mode,
        units_file=str(case.path / "units.csv") if case.path else "units.csv")


def tie_damping(f_n, inertia_mw_s, incidence, sync_mw_per_rad, ratio) -> np.ndarray:
    """B_l [MW/Hz] giving the two-area swing across link l the damping ratio `ratio`.
    Two areas joined by one link: x = Δf_from − Δf_to obeys x'' + a B x' + 2π a T x = 0 with
    a = f_n/2 (1/H_from + 1/H_to), so ω² = 2π a T and 2 ζ ω = a B. inertia_mw_s (A,) or
    (M, A) gives (L,) or (M, L)."""
    C = np.asarray(incidence, float)
    H = np.asarray(inertia_mw_s, float)
    if C.size == 0 or ratio <= 0:
        return np.zeros(H.shape[:-1] + (C.shape[0],))
    a = 0.5 * f_n * ((1.0 / H) @ np.abs(C).T)
    omega = np.sqrt(2.0 * np.pi * a * np.asarray(sync_mw_per_rad, float))
    return 2.0 * ratio * omega / a


def swing_matrices(f_n: float, inertia_mw_s, damping_mw_per_hz, incidence, sync_mw_per_rad,
                   tie_damping_mw_per_hz):
    """Per event (leading axis M) the linear swing model x' = F x + E (p_mech − P_e) on the
    state x = [Δf (A) Hz, δ (L) rad], p_mech and P_e per area in MW.

    inertia_mw_s (M, A), tie_damping_mw_per_hz (M, L); returns F (M, S, S), E (M, S, A)."""
    H = np.asarray(inertia_mw_s, float)
    M, A = H.shape
    C = np.asarray(incidence, float).reshape(-1, A)
    L = C.shape[0]
    T = np.asarray(sync_mw_per_rad, float)
    B = np.asarray(tie_damping_mw_per_hz, float).reshape(M, L)
    c = f_n / (2.0 * H)  # (M, A) Hz/s per MW
    S = A + L
    F = np.zeros((M, S, S))
    LB = np.einsum("la,ml,lb->mab", C, B, C)  # damping export per Hz
    F[:, :A, :A] = -c[:, :, None] * (np.diag(np.asarray(damping_mw_per_hz, float))[None] + LB)
    F[:, :A, A:] = -c[:, :, None] * (C.T * T[None, :])[None]
    F[:, A:, :A] = 2.0 * np.pi * C[None]
    E = np.zeros((M, S, A))
    E[:, np.arange(A), np.arange(A)] = c
    return F, E


def link_power(sysm: System, df, delta, tie_b) -> np.ndarray:
    """Change of each link's flow [MW] from Δf (..., M, A), δ (..., M, L) and B (M, L)."""
    return sysm.sync_mw_per_rad * delta + tie_b * (df @ sysm.incidence.T)

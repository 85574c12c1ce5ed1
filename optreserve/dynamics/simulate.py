"""Time-domain check of an allocation: what frequency and tie flows do in the first minute
after each listed disturbance, not only where they settle.

Model (docs/formulation.md, "Time-domain simulation"), per period of a case:

* one swing equation per area, 2 H_a / f_n · dΔf_a/dt = ΔPm_a − ΔP_e,a − D_a Δf_a − ΔP_exp,a,
  with H_a the stored energy (inertia_s × capacity_mw, MW s) of the area's online units;
  the tripped unit's share leaves at t = 0+;
* one first-order governor-turbine lag per responding unit,
  τ_i dΔPm_i/dt = clip(−sgn(Δf_a) K_i (|Δf_a| − d_i)^+, −r_dn,i, r_up,i) − ΔPm_i,
  τ_i = activation_time_s / 4 (98 % of a step delivered at the activation time);
* tie lines as synchronising links, ΔP_l = T_l δ_l with T_l = S_base / x_l MW/rad and
  dδ_l/dt = 2π (Δf_from − Δf_to).

The integrator is scipy.integrate.solve_ivp with a stiff method and an analytic sparse
Jacobian; the right-hand side is whole-array numpy. Independent of model.py: the optimiser's
assumptions are what this module checks. settle.py gives the steady-state point reported
next to the simulated end of run.

Results are planning studies, not operating instructions.
"""

from __future__ import annotations

import json
import math
import re
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy.integrate import solve_ivp
from scipy.optimize import minimize_scalar

from optreserve.case.data import Case
from optreserve.case.reader import Col, _Collector, _read_csv, _typed_table
from optreserve.errors import CaseError, OptreserveError, Problem
from optreserve.output.plotstyle import plot_or_warn
from optreserve.output.results import CAUTION, write_table
from optreserve.output.staging import staged_output
from optreserve.verify.settle import settle_instances

# A first-order lag delivers 1 - exp(-4) = 98.2 % of a step at four time constants: the
# activation time is read as the time to (nearly) full delivery.
LAG_PER_ACTIVATION = 0.25
# EU 2017/1485 Annex V: FCR full activation time 30 s (Continental Europe). Used for a
# responding unit without activation_time_s, with a warning.
DEFAULT_ACTIVATION_TIME_S = 30.0
# Common practice: tie-line reactances in per unit on a 100 MVA system base.
BASE_MVA = 100.0
# Damping ratio given to each tie line's inter-area swing (see _Swing): stands in for the
# damper windings and stabilisers an area model does not have. Common practice: planners ask
# inter-area modes for a damping ratio of at least 3-5 %.
INTER_AREA_DAMPING_RATIO = 0.05
DURATION_S = 60.0
# Without an explicit duration a run that has not settled is repeated with twice the length,
# up to this many seconds (load self-regulation alone can take minutes to finish the job once
# every provider sits at its headroom).
MAX_AUTO_DURATION_S = 480.0
ROCOF_WINDOW_S = 0.5
# End of run counts as settled when, over the last FLAT_WINDOW_S, no area frequency moves more
# than FLAT_HZ and no link flow more than FLAT_MW.
FLAT_WINDOW_S = 5.0
FLAT_HZ = 0.1e-3
FLAT_MW = 0.1
# Warn when the end of run and the steady-state calculation differ by more than this.
AGREE_HZ = 1.0e-3
AGREE_MW = 1.0
# Numerical allowance on limit checks.
LIMIT_TOL_HZ = 1.0e-5
METHODS = ("auto", "LSODA", "Radau", "BDF")
# "auto": LSODA (dense Jacobian, cheapest per step) up to this many states, BDF with the sparse
# Jacobian above it (measured in benchmarks/simulate_speed.py: with ~270 governor states BDF
# is about three times faster than LSODA, with ~20 LSODA about three times faster than BDF).
AUTO_DENSE_STATES = 100

ALLOCATION_FILE = "allocation.csv"
SUMMARY_FILE = "simulation_summary.csv"
SETTINGS_FILE = "simulation.json"


class SimulationError(OptreserveError):
    """The integrator failed (exit code 1)."""

    exit_code = 1


# ------------------------------------------------------------------ allocation input
_ALLOC_COLS = [
    Col("unit", "text", True),
    Col("area", "text", True),
    Col("period", "text", False, ""),
    Col("provides", "bool", False, None),
    Col("droop_pct", "float", False, math.nan, check=lambda v: None if v > 0 else "must be > 0"),
    Col("gain_mw_per_hz", "float", True, check=lambda v: None if v >= 0 else "must be >= 0"),
    Col("headroom_up_mw", "float", True, check=lambda v: None if v >= 0 else "must be >= 0"),
    Col("headroom_down_mw", "float", True, check=lambda v: None if v >= 0 else "must be >= 0"),
    Col("cost_per_h", "float", False, math.nan),
]


def read_allocation(path: str | Path, case: Case) -> pd.DataFrame:
    """Read allocation.csv (a folder written by `optreserve solve --out`, or the file itself)
    and check it against the case. Raises CaseError naming file, row and column."""
    p = Path(path)
    if p.is_dir():
        p = p / ALLOCATION_FILE
    col = _Collector()
    if not p.is_file():
        col.error(str(p), "is missing (expected the allocation written by optreserve solve "
                  "--out)")
        col.raise_if_any()
    t = _read_csv(p, str(p), col)
    df = _typed_table(t, _ALLOC_COLS, col) if t is not None else None
    col.raise_if_any()
    df.attrs["file"] = str(p)
    df.attrs["warnings"] = list(col.warnings)
    _check_allocation(case, df, str(p), col)
    col.raise_if_any()
    return df


def _check_allocation(case: Case, df: pd.DataFrame, file: str, col: _Collector) -> None:
    """Cross-check an allocation table against the case (collects problems, raises nothing)."""
    lines = (df["_line"].to_numpy() if "_line" in df.columns
             else np.arange(len(df), dtype=np.int64) + 2)
    for c in ("unit", "area", "gain_mw_per_hz", "headroom_up_mw", "headroom_down_mw"):
        if c not in df.columns:
            col.error(file, "required column is missing", 1, c)
    if col.problems:
        return
    u = case.units
    upos = {x: k for k, x in enumerate(u["unit"])}
    units = df["unit"].astype(str).to_numpy(object)
    i = np.array([upos.get(x, -1) for x in units])
    for r in np.nonzero(i < 0)[0][:50]:
        col.error(file, f"unknown unit '{units[r][:40]}' (not in units.csv of the case)",
                  int(lines[r]), "unit")
    ok = i >= 0
    areas = df["area"].astype(str).to_numpy(object)
    case_area = u["area"].to_numpy(object)
    for r in np.nonzero(ok)[0][areas[ok] != case_area[i[ok]]][:50]:
        col.error(file, f"unit '{units[r]}' is in area '{case_area[i[r]]}' in the case, not "
                  f"'{areas[r][:40]}'", int(lines[r]), "area")
    per = (df["period"].fillna("").astype(str).to_numpy(object) if "period" in df.columns
           else np.full(len(df), "", dtype=object))
    labels = [str(p) for p in case.periods]
    if case.is_horizon and (per == "").all():
        col.error(file, "the case has periods: a period column with the case's period labels "
                  "is required", 1, "period")
        return
    if case.is_horizon:
        known = set(labels)
        for r in np.nonzero(~pd.Series(per).isin(known).to_numpy())[0][:50]:
            col.error(file, f"period '{per[r][:40]}' is not a period of the case", int(lines[r]),
                      "period")
    else:
        for r in np.nonzero(per != "")[0][:1]:
            col.error(file, "the case is a single snapshot: the allocation must not have "
                      "periods", int(lines[r]), "period")
    key = pd.Series(units + "\x00" + per)
    dup = key.duplicated().to_numpy() & ok
    for r in np.nonzero(dup)[0][:50]:
        col.error(file, f"unit '{units[r]}' appears twice" + (f" for period '{per[r]}'"
                  if per[r] else ""), int(lines[r]), "unit")
    gain = df["gain_mw_per_hz"].to_numpy(float)
    if "provides" in df.columns:
        prov = df["provides"].to_numpy(object)
        said_no = prov == False  # elementwise on an object array: a blank (None) is not "no"
        for r in np.nonzero(said_no & (gain > 0))[0][:50]:
            col.error(file, f"provides is false but gain_mw_per_hz is {gain[r]:g}",
                      int(lines[r]), "provides")
    if "droop_pct" in df.columns:
        droop = df["droop_pct"].to_numpy(float)
        cap = u["capacity_mw"].to_numpy(float)[np.maximum(i, 0)]
        with np.errstate(divide="ignore", invalid="ignore"):
            expect = cap / (droop / 100.0 * case.nominal_frequency_hz)
        bad = ok & (gain > 0) & np.isfinite(droop) & (
            np.abs(expect - gain) > 1e-4 * np.maximum(gain, 1.0))
        for r in np.nonzero(bad)[0][:50]:
            col.error(file, f"droop_pct {droop[r]:g} on capacity {cap[r]:g} MW gives "
                      f"{expect[r]:.6g} MW/Hz, not gain_mw_per_hz {gain[r]:.6g}: allocation "
                      "of another case?", int(lines[r]), "droop_pct")
    if col.problems:
        return
    need = [(x, p) for p in (labels or [""]) for x in u["unit"]]
    have = set(zip(units, per))
    missing = [(x, p) for x, p in need if (x, p) not in have]
    for x, p in missing[:50]:
        col.error(file, f"no row for unit '{x}'" + (f" in period '{p}'" if p else ""), None,
                  "unit")


def allocation_arrays(case: Case, allocation: pd.DataFrame, t: int):
    """Per unit (case order) gain, up and down headroom of period t of a checked allocation."""
    df = allocation
    if case.is_horizon:
        df = df[df["period"].astype(str) == str(case.periods[t])]
    df = df.set_index("unit").loc[list(case.units["unit"])]
    return (df["gain_mw_per_hz"].to_numpy(float), df["headroom_up_mw"].to_numpy(float),
            df["headroom_down_mw"].to_numpy(float))


# ------------------------------------------------------------------ the swing equations
class _Swing:
    """Per-area swing equations and tie-line angle differences: the part shared by the
    governor simulation and the prescribed-response integrator.

    State: Δf (A,) in Hz, then δ (L,) in rad. The power on link l is T_l δ_l plus a damping
    part B_l (Δf_from − Δf_to): it vanishes when the areas swing together, so it changes
    neither the settled point nor the centre-of-inertia frequency, only how fast the areas
    stop swinging against each other."""

    def __init__(self, f_n, inertia_mw_s, damping_mw_per_hz, event_mw, incidence,
                 sync_mw_per_rad, tie_damping_mw_per_hz=None):
        self.f_n = float(f_n)
        self.H = np.asarray(inertia_mw_s, float)
        self.c = self.f_n / (2.0 * self.H)  # Hz/s per MW of imbalance
        self.D = np.asarray(damping_mw_per_hz, float)
        self.P_e = np.asarray(event_mw, float)
        self.C = np.asarray(incidence, float).reshape(-1, len(self.H))  # (L, A)
        self.T = np.asarray(sync_mw_per_rad, float)
        self.A, self.L = len(self.H), len(self.T)
        self.B = (np.zeros(self.L) if tie_damping_mw_per_hz is None
                  else np.asarray(tie_damping_mw_per_hz, float))
        self.CtT = self.C.T * self.T[None, :]  # (A, L): export of each area per rad
        self.LB = self.C.T @ (self.B[:, None] * self.C)  # (A, A): damping export per Hz

    def link_power(self, df, delta):
        """Change of each link's flow [MW] (rows of states in columns are allowed)."""
        return self.T.reshape(-1, *[1] * (np.ndim(delta) - 1)) * delta + (
            self.B.reshape(-1, *[1] * (np.ndim(df) - 1)) * (self.C @ df))

    def derivatives(self, df, delta, p_mech_a):
        export = self.CtT @ delta + self.LB @ df
        ddf = self.c * (p_mech_a - self.P_e - self.D * df - export)
        ddelta = 2.0 * np.pi * (self.C @ df)
        return ddf, ddelta

    def jacobian_triplets(self):
        """(rows, cols, values) of the constant Jacobian of [Δf, δ] on themselves."""
        A = self.A
        J_ff = -self.c[:, None] * (np.diag(self.D) + self.LB)
        fa, fb = np.nonzero(J_ff)
        la, aa = np.nonzero(self.C)
        rows = np.r_[fa, aa, A + la]
        cols = np.r_[fb, A + la, aa]
        vals = np.r_[J_ff[fa, fb], -self.c[aa] * self.C[la, aa] * self.T[la],
                     2.0 * np.pi * self.C[la, aa]]
        return rows, cols, vals


def tie_damping(f_n, inertia_mw_s, incidence, sync_mw_per_rad, ratio) -> np.ndarray:
    """B_l [MW/Hz] giving the two-area swing across link l the damping ratio `ratio`.
    Two areas joined by one link: x = Δf_from − Δf_to obeys x'' + a B x' + 2π a T x = 0 with
    a = f_n/2 (1/H_from + 1/H_to), so ω² = 2π a T and 2 ζ ω = a B."""
    C = np.asarray(incidence, float)
    if C.size == 0 or ratio <= 0:
        return np.zeros(C.shape[0])
    inv_h = 1.0 / np.asarray(inertia_mw_s, float)
    a = 0.5 * f_n * (np.abs(C) @ inv_h)
    omega = np.sqrt(2.0 * np.pi * a * np.asarray(sync_mw_per_rad, float))
    return 2.0 * ratio * omega / a


def swing_response(inertia_mw_s, event_mw, response_mw: Callable[[float], float],
                   nominal_frequency_hz: float, damping_mw_per_hz: float = 0.0,
                   duration_s: float = 30.0, times=None, method: str = "LSODA",
                   max_step_s: float = 0.05) -> pd.DataFrame:
    """One area's swing equation driven by a prescribed response (a callable t -> MW added by
    the providers), with the simulator's own integrator: for checking against closed forms.

    Returns time_s, frequency_hz and response_mw on `times` (default: every 10 ms)."""
    sw = _Swing(nominal_frequency_hz, [inertia_mw_s], [damping_mw_per_hz], [event_mw],
                np.zeros((0, 1)), np.zeros(0))

    def fun(t, y):
        ddf, _ = sw.derivatives(y[:1], y[1:], np.array([float(response_mw(t))]))
        return ddf

    r, c, v = sw.jacobian_triplets()
    jac = sp.csc_matrix((v, (r, c)), shape=(1, 1))
    sol = solve_ivp(fun, (0.0, duration_s), np.zeros(1), method=method, jac=_jac_for(method, jac),
                    rtol=1e-9, atol=1e-12, dense_output=True, max_step=max_step_s)
    if not sol.success:
        raise SimulationError(f"integration failed: {sol.message}")
    t = np.arange(0.0, duration_s + 1e-12, 0.01) if times is None else np.asarray(times, float)
    return pd.DataFrame({"time_s": t,
                         "frequency_hz": nominal_frequency_hz + sol.sol(t)[0],
                         "response_mw": [float(response_mw(x)) for x in t]})


def _jac_for(method, J):
    if method == "LSODA":  # LSODA takes only dense Jacobians
        return J.toarray() if sp.issparse(J) else J
    return J


# ------------------------------------------------------------------ one period of a case
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
    r_up: np.ndarray
    r_dn: np.ndarray
    tau_s: np.ndarray  # (N,) governor-turbine lag
    damping: np.ndarray  # (A,) MW/Hz
    incidence: np.ndarray  # (L, A)
    reactance: np.ndarray  # (L,)
    sync_mw_per_rad: np.ndarray  # (L,)
    flow0: np.ndarray
    limit: np.ndarray
    units_file: str = "units.csv"  # where inertia_s comes from, for error messages

    def area_inertia(self, trip: int = -1) -> np.ndarray:
        """Stored energy per area [MW s] after the event (the tripped unit's removed)."""
        H = self.stored_energy_mw_s
        if trip >= 0:
            H = H.copy()
            H[trip] = 0.0
        return np.bincount(self.unit_area, weights=H, minlength=len(self.area_ids))


def build_system(case: Case, gain, r_up, r_dn, t: int = 0, base_mva: float = BASE_MVA,
                 warnings: list | None = None) -> System:
    """Arrays of period t: the online units' stored energy (a unit is online when its output
    is not zero or it may provide; a missing inertia_s counts as zero, as in the nadir row of
    the optimiser), governor lags from activation_time_s, and tie-line synchronising
    coefficients T_l = base_mva / x_l [MW/rad]."""
    u = case.units
    um = case.unit_matrix
    cap = u["capacity_mw"].to_numpy(float)
    online = (um("output_mw")[t].astype(float) != 0) | um("provides")[t].astype(bool)
    H = np.nan_to_num(u["inertia_s"].to_numpy(float)) * cap * online
    gain = np.asarray(gain, float)
    t_act = u["activation_time_s"].to_numpy(float)
    no_t = (gain > 0) & ~(np.isfinite(t_act) & (t_act > 0))
    if no_t.any() and warnings is not None:
        names = ", ".join(list(u["unit"][no_t])[:5]) + (" ..." if no_t.sum() > 5 else "")
        warnings.append(f"{int(no_t.sum())} responding unit(s) without activation_time_s "
                        f"({names}): {DEFAULT_ACTIVATION_TIME_S:g} s assumed")
    t_act = np.where(no_t | ~np.isfinite(t_act), DEFAULT_ACTIVATION_TIME_S, t_act)
    apos = {a: k for k, a in enumerate(case.areas["area"])}
    lk = case.links
    n_l, n_a = len(lk), len(case.areas)
    C = np.zeros((n_l, n_a))
    C[np.arange(n_l), [apos[a] for a in lk["from_area"]]] += 1.0
    C[np.arange(n_l), [apos[a] for a in lk["to_area"]]] -= 1.0
    X = case.link_matrix("reactance_pu")[t].astype(float) if n_l else np.zeros(0)
    damping = (case.area_matrix("load_mw")[t].astype(float)
               * case.area_matrix("load_damping_pct_per_hz")[t].astype(float) / 100.0)
    return System(
        f_n=case.nominal_frequency_hz, area_ids=list(case.areas["area"]),
        unit_ids=list(u["unit"]), link_ids=list(lk["link"]),
        unit_area=case.unit_area_index(), stored_energy_mw_s=H, gain=gain,
        deadband_hz=u["deadband_mhz"].to_numpy(float) / 1000.0,
        r_up=np.asarray(r_up, float), r_dn=np.asarray(r_dn, float),
        tau_s=LAG_PER_ACTIVATION * t_act, damping=damping, incidence=C, reactance=X,
        sync_mw_per_rad=base_mva / X if n_l else np.zeros(0),
        flow0=case.link_matrix("flow_mw")[t].astype(float) if n_l else np.zeros(0),
        limit=case.link_matrix("limit_mw")[t].astype(float) if n_l else np.zeros(0),
        units_file=str(case.path / "units.csv") if case.path else "units.csv")


@dataclass
class Trajectory:
    """One simulated event: outputs on a time grid, and what the summary reads from them."""

    time_s: np.ndarray
    frequency_hz: np.ndarray  # (n_t, A)
    flow_mw: np.ndarray  # (n_t, L)
    response_mw: np.ndarray  # (n_t, N) signed: power each unit adds
    nadir_hz: float
    nadir_time_s: float
    nadir_area: int
    rocof_hz_per_s: float  # largest |mean rate| over the first ROCOF_WINDOW_S among areas
    rocof_area: int
    end_frequency_hz: np.ndarray  # (A,)
    end_flow_mw: np.ndarray  # (L,)
    flat: bool
    inertia_mw_s: float  # system stored energy after the event


def output_times(duration_s: float) -> np.ndarray:
    """10 ms steps for the first 2 s (RoCoF, the fast part of the dip), 50 ms to 20 s, then
    250 ms: enough to plot and to read loadings without writing megabytes per event."""
    D = float(duration_s)
    t = np.r_[np.arange(0.0, min(2.0, D), 0.01), np.arange(2.0, min(20.0, D), 0.05),
              np.arange(20.0, D, 0.25), D]
    return np.unique(np.round(t, 9))


def simulate_event(sysm: System, size_mw: float, area: int, trip: int = -1,
                   duration_s: float = DURATION_S, method: str = "auto", times=None,
                   damping_ratio: float = INTER_AREA_DAMPING_RATIO) -> Trajectory:
    """Integrate one event: size_mw > 0 is a deficit (frequency falls) in `area`; `trip` is the
    tripped unit (its inertia and response are lost) or -1 for a load step. damping_ratio:
    inter-area damping of each tie line (tie_damping; 0 = synchronising power only)."""
    if method not in METHODS:
        raise ValueError(f"method must be one of {', '.join(METHODS)}")
    A, L = len(sysm.area_ids), len(sysm.link_ids)
    H_a = sysm.area_inertia(trip)
    if (H_a <= 0).any():
        a = sysm.area_ids[int(np.nonzero(H_a <= 0)[0][0])]
        raise CaseError([Problem(sysm.units_file, f"area '{a}' has no online inertia"
                                 + (" once the tripped unit is gone" if trip >= 0 else "")
                                 + ": the per-area swing equation needs inertia_s on some "
                                 "online unit of every area", None, "inertia_s")])
    P_e = np.zeros(A)
    P_e[area] = size_mw
    B = tie_damping(sysm.f_n, H_a, sysm.incidence, sysm.sync_mw_per_rad, damping_ratio)
    sw = _Swing(sysm.f_n, H_a, sysm.damping, P_e, sysm.incidence, sysm.sync_mw_per_rad, B)
    # only units that can respond carry a governor state; the others add nothing, ever
    live = (sysm.gain > 0) & ((sysm.r_up > 0) | (sysm.r_dn > 0))
    if trip >= 0:
        live[trip] = False
    g = np.nonzero(live)[0]
    K, d = sysm.gain[g], sysm.deadband_hz[g]
    r_up, r_dn, tau = sysm.r_up[g], sysm.r_dn[g], sysm.tau_s[g]
    ga = sysm.unit_area[g]
    n = A + L + len(g)
    if method == "auto":
        method = "LSODA" if n <= AUTO_DENSE_STATES else "BDF"

    def targets(df_unit):
        raw = K * np.maximum(np.abs(df_unit) - d, 0.0)
        return np.where(df_unit < 0, np.minimum(raw, r_up), -np.minimum(raw, r_dn)), raw

    def fun(t, y):
        df, delta, pm = y[:A], y[A:A + L], y[A + L:]
        p_a = np.bincount(ga, weights=pm, minlength=A)
        ddf, ddelta = sw.derivatives(df, delta, p_a)
        target, _ = targets(df[ga])
        return np.concatenate([ddf, ddelta, (target - pm) / tau])

    sr, sc, sv = sw.jacobian_triplets()
    gi = A + L + np.arange(len(g))
    rows0 = np.r_[sr, ga, gi, gi]  # d(Δf_a)/dPm_i, d(Pm_i)/dPm_i, d(Pm_i)/dΔf_a
    cols0 = np.r_[sc, gi, gi, ga]
    fixed = np.r_[sv, sw.c[ga], -1.0 / tau]

    def jac(t, y):
        df_u = y[:A][ga]
        _, raw = targets(df_u)
        room = np.where(df_u < 0, r_up, r_dn)
        slope = np.where((np.abs(df_u) > d) & (raw < room), -K, 0.0) / tau
        J = sp.csc_matrix((np.r_[fixed, slope], (rows0, cols0)), shape=(n, n))
        return _jac_for(method, J)

    atol = np.r_[np.full(A, 1e-8), np.full(L, 1e-9), np.full(len(g), 1e-6)]
    sol = solve_ivp(fun, (0.0, float(duration_s)), np.zeros(n), method=method, jac=jac,
                    rtol=1e-7, atol=atol, dense_output=True)
    if not sol.success:
        raise SimulationError(f"integration failed: {sol.message}")

    t_out = output_times(duration_s) if times is None else np.asarray(times, float)
    Y = sol.sol(t_out)
    freq = sysm.f_n + Y[:A].T
    flows = sysm.flow0[None, :] + sw.link_power(Y[:A], Y[A:A + L]).T
    resp = np.zeros((len(t_out), len(sysm.unit_ids)))
    resp[:, g] = Y[A + L:].T

    # nadir: the largest deviation in the event's direction over every step the solver took,
    # refined on its dense output between the neighbouring steps
    sigma = 1.0 if size_mw >= 0 else -1.0
    dev = -sigma * sol.y[:A]  # (A, steps) positive in the event's direction
    k_a, k_t = np.unravel_index(int(np.argmax(dev)), dev.shape)
    t_n, v_n = float(sol.t[k_t]), float(dev[k_a, k_t])
    if 0 < k_t < len(sol.t) - 1 and v_n > 0:
        res = minimize_scalar(lambda s: sigma * float(sol.sol(s)[k_a]),
                              bounds=(sol.t[k_t - 1], sol.t[k_t + 1]), method="bounded",
                              options={"xatol": 1e-6})
        if -res.fun > v_n:
            t_n, v_n = float(res.x), float(-res.fun)
    if v_n <= 0:
        t_n, v_n = 0.0, 0.0
    w = min(ROCOF_WINDOW_S, float(duration_s))
    rate = sol.sol(w)[:A] / w
    ra = int(np.argmax(np.abs(rate)))
    # flatness over the end of the run, on the solver's dense output
    t_flat = np.linspace(max(0.0, duration_s - min(FLAT_WINDOW_S, duration_s / 4)),
                         duration_s, 101)
    Yf = sol.sol(t_flat)
    spread_f = np.ptp(Yf[:A], axis=1).max(initial=0.0)
    spread_p = (np.ptp(sw.link_power(Yf[:A], Yf[A:A + L]), axis=1).max(initial=0.0)
                if L else 0.0)
    y_end = sol.y[:, -1]
    return Trajectory(
        time_s=t_out, frequency_hz=freq, flow_mw=flows, response_mw=resp,
        nadir_hz=sysm.f_n - sigma * v_n, nadir_time_s=t_n, nadir_area=int(k_a),
        rocof_hz_per_s=float(abs(rate[ra])), rocof_area=ra,
        end_frequency_hz=sysm.f_n + y_end[:A],
        end_flow_mw=sysm.flow0 + sw.link_power(y_end[:A], y_end[A:A + L]),
        flat=bool(spread_f <= FLAT_HZ and spread_p <= FLAT_MW),
        inertia_mw_s=float(H_a.sum()))


# ------------------------------------------------------------------ a whole case
@dataclass
class Simulation:
    """Simulated events of one period: summary (one row per event), series (one DataFrame per
    event: time_s, frequency_hz:<area>, flow_mw:<link>, response_mw:<unit>)."""

    case: Case
    period: str | None
    summary: pd.DataFrame
    series: dict
    link_limit_mw: dict = field(default_factory=dict)
    warnings: list = field(default_factory=list)
    settings: dict = field(default_factory=dict)
    timings_s: dict = field(default_factory=dict)

    def write(self, out_dir: str | Path, force: bool = False, plots: bool = True) -> Path:
        """simulation_summary.csv, series_<event>.csv, plot_<event>.png, simulation.json,
        written to a temporary folder and then moved in; a non-empty folder only with force
        (and then only these files are replaced)."""
        t0 = time.perf_counter()
        out = Path(out_dir)
        with staged_output(out, force, group="simulation") as tmp:
            write_table(self.summary, tmp / SUMMARY_FILE)
            text = (tmp / SUMMARY_FILE).read_text(encoding="utf-8")
            (tmp / SUMMARY_FILE).write_text(f"# {CAUTION}\n" + text, encoding="utf-8")
            names = file_names(list(self.series))
            for ev, stem in names.items():
                write_table(self.series[ev], tmp / f"series_{stem}.csv")
                if plots:  # a failing plot is a warning; the tables are still written
                    png = tmp / f"plot_{stem}.png"
                    plot_or_warn(lambda ev=ev, png=png: plot_event(self, ev, png), png,
                                 self.warnings)
            self.timings_s["write"] = time.perf_counter() - t0
            doc = {"case": self.case.name, "period": self.period, "settings": self.settings,
                   "files": {ev: {"series": f"series_{s}.csv",
                                  "plot": f"plot_{s}.png" if (tmp / f"plot_{s}.png")
                                  .exists() else None}
                             for ev, s in names.items()},
                   "warnings": list(self.warnings),
                   "timings_s": {k: round(float(v), 4) for k, v in self.timings_s.items()},
                   "caution": CAUTION}
            (tmp / SETTINGS_FILE).write_text(json.dumps(doc, indent=2) + "\n")
        return out


def file_names(events: list[str]) -> dict:
    """A file-name-safe stem per event, unique even when sanitising makes two alike."""
    out, used = {}, set()
    for ev in events:
        stem = re.sub(r"[^A-Za-z0-9._-]", "_", str(ev))[:80] or "event"
        base, k = stem, 2
        while stem.lower() in used:
            stem, k = f"{base}_{k}", k + 1
        used.add(stem.lower())
        out[ev] = stem
    return out


def simulate(case: Case, allocation: pd.DataFrame, events: list[str] | None = None,
             period: str | None = None, duration_s: float | None = None,
             base_mva: float = BASE_MVA, method: str = "auto",
             damping_ratio: float = INTER_AREA_DAMPING_RATIO) -> Simulation:
    """Simulate the listed events (default: all of the period) of one period of a case under
    an allocation (result.allocation, or read_allocation(...)).

    duration_s: None runs DURATION_S and doubles the run until it ends flat (at most
    MAX_AUTO_DURATION_S); a number runs exactly that long and only warns when the end is not
    flat. Raises CaseError for an allocation that does not fit the case, an unknown event or
    period."""
    t_start = time.perf_counter()
    if duration_s is not None and not duration_s > ROCOF_WINDOW_S:
        raise ValueError(f"duration must exceed {ROCOF_WINDOW_S} s")
    if method not in METHODS:
        raise ValueError(f"method must be one of {', '.join(METHODS)}")
    file = allocation.attrs.get("file", ALLOCATION_FILE)
    col = _Collector()
    _check_allocation(case, allocation, file, col)
    col.raise_if_any()
    warnings = list(allocation.attrs.get("warnings", []))
    t, label = _period_index(case, period)
    gain, r_up, r_dn = allocation_arrays(case, allocation, t)
    _warn_room(case, t, gain, r_up, r_dn, warnings)
    sysm = build_system(case, gain, r_up, r_dn, t, base_mva, warnings)

    inst = case.instances()
    inst = inst[inst["t"] == t]
    ev = case.events
    names = ev["event"].astype(str).to_numpy(object)
    if events is not None:
        where = str(case.path / "events.csv") if case.path else "events.csv"
        known = set(names[inst["event_index"]])
        bad = [e for e in events if e not in known]
        if bad:
            also = " in this period" if case.is_horizon and bad[0] in set(names) else ""
            raise CaseError([Problem(where, f"no event named '{bad[0]}'{also} (--event)", None,
                                     "event")])
        order = {e: k for k, e in enumerate(events)}
        inst = inst[pd.Series(names[inst["event_index"]], index=inst.index).isin(order)]
    upos = {x: k for k, x in enumerate(case.units["unit"])}
    apos = {a: k for k, a in enumerate(case.areas["area"])}
    e_idx = inst["event_index"].to_numpy()
    size = inst["size_mw"].to_numpy(float)
    kinds = ev["kind"].to_numpy(object)[e_idx]
    area = np.array([apos[a] for a in ev["area"].to_numpy(object)[e_idx]], dtype=np.int64)
    trip = np.array([upos.get(x, -1) if k == "unit_trip" else -1
                     for k, x in zip(kinds, ev["unit"].to_numpy(object)[e_idx])], dtype=np.int64)
    steady = _steady_points(sysm, size, area, trip)

    lim = case.limits
    rows, series = [], {}
    t_sim = 0.0
    for m, e in enumerate(e_idx):
        t0 = time.perf_counter()
        run = DURATION_S if duration_s is None else float(duration_s)
        while True:
            tr = simulate_event(sysm, size[m], area[m], trip[m], run, method,
                                damping_ratio=damping_ratio)
            if tr.flat or duration_s is not None or run >= MAX_AUTO_DURATION_S:
                break
            run = min(2.0 * run, MAX_AUTO_DURATION_S)
        t_sim += time.perf_counter() - t0
        name = str(names[e])
        series[name] = _series_frame(sysm, tr)
        sigma = 1.0 if size[m] >= 0 else -1.0
        end_dev = tr.end_frequency_hz - sysm.f_n
        settled = sysm.f_n + end_dev[int(np.argmax(np.abs(end_dev)))]
        ss_f = sysm.f_n + steady.deviation_hz[m]
        gap_f = float(np.max(np.abs(tr.end_frequency_hz - ss_f)))
        gap_p = float(np.max(np.abs(tr.end_flow_mw - steady.flow_after_mw[m]), initial=0.0))
        if not tr.flat:
            warnings.append(f"event {name}: still moving over the last seconds of the "
                            f"{run:g} s run; run longer (--duration) for the settled "
                            "frequency")
        elif gap_f > AGREE_HZ or gap_p > AGREE_MW:
            warnings.append(f"event {name}: end of run differs from the steady-state point by "
                            f"{gap_f * 1000:.2f} mHz and {gap_p:.2f} MW")
        ramp = _ramp_rate(case, sysm, trip[m], sigma)
        with np.errstate(divide="ignore", invalid="ignore"):
            ramp_nadir = (sysm.f_n * size[m] ** 2 / (4.0 * tr.inertia_mw_s * ramp)
                          if ramp > 0 else math.inf)
        loading = (np.abs(series[name][[f"flow_mw:{x}" for x in sysm.link_ids]].to_numpy())
                   / sysm.limit[None, :] * 100.0) if len(sysm.link_ids) else np.zeros((1, 0))
        worst = np.unravel_index(int(np.argmax(loading)), loading.shape) if loading.size else None
        rows.append({
            "event": name, "period": label, "kind": str(kinds[m]),
            "area": sysm.area_ids[area[m]], "size_mw": size[m],
            "nadir_hz": tr.nadir_hz, "nadir_time_s": tr.nadir_time_s,
            "nadir_area": sysm.area_ids[tr.nadir_area],
            "rocof_hz_per_s": tr.rocof_hz_per_s, "rocof_area": sysm.area_ids[tr.rocof_area],
            "rocof_estimate_hz_per_s": abs(size[m]) * sysm.f_n / (2.0 * tr.inertia_mw_s),
            "nadir_ramp_estimate_hz": sysm.f_n - sigma * ramp_nadir,
            "settled_frequency_hz": settled, "steady_state_frequency_hz": ss_f,
            "duration_s": run, "flat_at_end": tr.flat,
            "max_link_loading_pct": float(loading[worst]) if worst else math.nan,
            "max_loading_link": sysm.link_ids[worst[1]] if worst else "",
            "settled_ok": bool(abs(settled - sysm.f_n)
                               <= lim.max_settled_deviation_hz + LIMIT_TOL_HZ),
            "nadir_ok": (None if lim.max_nadir_deviation_hz is None else bool(
                abs(tr.nadir_hz - sysm.f_n) <= lim.max_nadir_deviation_hz + LIMIT_TOL_HZ)),
            "rocof_ok": (None if lim.max_rocof_hz_per_s is None else bool(
                tr.rocof_hz_per_s <= lim.max_rocof_hz_per_s + LIMIT_TOL_HZ)),
        })
    summary = pd.DataFrame(rows, columns=list(rows[0]) if rows else ["event"])
    if not case.is_horizon:
        summary = summary.drop(columns="period")
    settings = {"duration_s": "automatic" if duration_s is None else float(duration_s),
                "method": method, "base_mva": base_mva,
                "inter_area_damping_ratio": damping_ratio,
                "governor_lag": f"first order, time constant = {LAG_PER_ACTIVATION:g} x "
                                "activation_time_s",
                "default_activation_time_s": DEFAULT_ACTIVATION_TIME_S,
                "rocof_window_s": ROCOF_WINDOW_S, "flat_window_s": FLAT_WINDOW_S,
                "flat_hz": FLAT_HZ, "flat_mw": FLAT_MW}
    return Simulation(case, label, summary, series, dict(zip(sysm.link_ids, sysm.limit)),
                      warnings, settings,
                      {"simulate": t_sim, "total": time.perf_counter() - t_start})


def _period_index(case: Case, period) -> tuple[int, str | None]:
    if not case.is_horizon:
        if period is not None:
            raise CaseError([Problem(str(case.path or "case"), "the case is a single snapshot: "
                                     "--period does not apply", None, "period")])
        return 0, None
    labels = [str(p) for p in case.periods]
    if period is None:
        if len(labels) == 1:
            return 0, labels[0]
        raise CaseError([Problem(str(case.path or "case"), f"the case has {len(labels)} "
                                 "periods: choose one with --period", None, "period")])
    if str(period) not in labels:
        raise CaseError([Problem(str(case.path or "case"), f"'{period}' is not a period of the "
                                 "case", None, "period")])
    return labels.index(str(period)), str(period)


def _warn_room(case: Case, t, gain, r_up, r_dn, warnings) -> None:
    """Headroom beyond a unit's physical room, or gain on a unit that may not provide, is
    simulated as given, but the planner should know."""
    um = case.unit_matrix
    out = um("output_mw")[t].astype(float)
    cap = case.units["capacity_mw"].to_numpy(float)
    mn = um("min_output_mw")[t].astype(float)
    over = (r_up > cap - out + 1e-6) | (r_dn > out - mn + 1e-6)
    if over.any():
        warnings.append(f"{int(over.sum())} unit(s) hold more headroom than their output "
                        f"allows (first: {case.units['unit'].iloc[int(np.argmax(over))]})")
    bad = (gain > 0) & ~um("provides")[t].astype(bool)
    if bad.any():
        warnings.append(f"{int(bad.sum())} unit(s) respond although provides = false in the "
                        f"case (first: {case.units['unit'].iloc[int(np.argmax(bad))]})")


def _steady_points(sysm: System, size, area, trip):
    """The independent settled point (settle.py) of each simulated event."""
    M = len(size)
    L = len(sysm.link_ids)
    return settle_instances(
        np.abs(size), np.where(size < 0, -1.0, 1.0), np.zeros(M, np.int64), area, trip,
        sysm.gain[None, :], sysm.r_up[None, :], sysm.r_dn[None, :], sysm.deadband_hz,
        sysm.unit_area, sysm.damping[None, :], sysm.flow0.reshape(1, L),
        np.nonzero(sysm.incidence > 0)[1], np.nonzero(sysm.incidence < 0)[1],
        sysm.reactance.reshape(1, L))


def _ramp_rate(case: Case, sysm: System, trip: int, sigma: float) -> float:
    """Aggregate ramp the optimiser's nadir row credits: sum of headroom / activation time
    over responding units that have an activation time (the tripped unit excluded)."""
    t_act = case.units["activation_time_s"].to_numpy(float)
    ok = (sysm.gain > 0) & np.isfinite(t_act) & (t_act > 0)
    if trip >= 0:
        ok[trip] = False
    r = sysm.r_up if sigma > 0 else sysm.r_dn
    return float((r[ok] / t_act[ok]).sum())


def _series_frame(sysm: System, tr: Trajectory) -> pd.DataFrame:
    cols = {"time_s": tr.time_s}
    cols.update({f"frequency_hz:{a}": tr.frequency_hz[:, k] for k, a in enumerate(sysm.area_ids)})
    cols.update({f"flow_mw:{x}": tr.flow_mw[:, k] for k, x in enumerate(sysm.link_ids)})
    cols.update({f"response_mw:{x}": tr.response_mw[:, k] for k, x in enumerate(sysm.unit_ids)})
    return pd.DataFrame(cols)


# ------------------------------------------------------------------ plots
def plot_event(sim: Simulation, event: str, path: str | Path) -> Path:
    """Three panels: area frequencies with the limits, link flows with their limits, and the
    response per area; the caution under the figure. Agg canvas: no display, no global state."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    df = sim.series[event]
    row = sim.summary.set_index("event").loc[event]
    case = sim.case
    f_n = case.nominal_frequency_hz
    lim = case.limits
    t = df["time_s"].to_numpy()
    fig = Figure(figsize=(9.0, 9.5), dpi=100)
    FigureCanvasAgg(fig)
    ax_f, ax_p, ax_r = fig.subplots(3, 1, sharex=True)
    for c in [c for c in df.columns if c.startswith("frequency_hz:")]:
        ax_f.plot(t, df[c], label=c.split(":", 1)[1])
    sign = -1.0 if row["size_mw"] >= 0 else 1.0
    ax_f.axhline(f_n + sign * lim.max_settled_deviation_hz, color="k", ls="--", lw=0.8,
                 label="settled limit")
    if lim.max_nadir_deviation_hz is not None:
        ax_f.axhline(f_n + sign * lim.max_nadir_deviation_hz, color="r", ls=":", lw=0.8,
                     label="nadir limit")
    ax_f.plot([row["nadir_time_s"]], [row["nadir_hz"]], "kv" if sign < 0 else "k^")
    ax_f.set_ylabel("frequency [Hz]")
    ax_f.legend(loc="best", fontsize=7)
    ax_f.grid(alpha=0.3)
    flows = [c for c in df.columns if c.startswith("flow_mw:")]
    for c in flows:
        link = c.split(":", 1)[1]
        line, = ax_p.plot(t, df[c], label=link)
        ax_p.axhline(np.sign(df[c].iloc[-1] or 1.0) * sim.link_limit_mw[link],
                     color=line.get_color(), ls="--", lw=0.6)
    if flows:
        ax_p.legend(loc="best", fontsize=7)
    ax_p.set_ylabel("tie-line flow [MW]")
    ax_p.grid(alpha=0.3)
    resp = df[[c for c in df.columns if c.startswith("response_mw:")]].to_numpy()
    area_of = case.units["area"].to_numpy(object)
    for a in case.areas["area"]:
        ax_r.plot(t, resp[:, area_of == a].sum(axis=1), label=f"{a} governors")
    ax_r.plot(t, resp.sum(axis=1), "k", lw=1.2, label="all governors")
    ax_r.axhline(row["size_mw"], color="gray", ls="--", lw=0.8, label="event size")
    ax_r.set_ylabel("governor response [MW]")
    ax_r.set_xlabel("time after the event [s]")
    ax_r.legend(loc="best", fontsize=7)
    ax_r.grid(alpha=0.3)
    when = f", period {sim.period}" if sim.period else ""
    fig.suptitle(f"{case.name}\nevent {event} ({row['size_mw']:+.0f} MW{when}): nadir "
                 f"{row['nadir_hz']:.3f} Hz at {row['nadir_time_s']:.2f} s, settles "
                 f"{row['settled_frequency_hz']:.4f} Hz", fontsize=9)
    # the caution on two lines under the figure; fixed margins (tight layout is slow)
    cut = CAUTION.find(": ") + 1
    fig.text(0.5, 0.01, CAUTION[:cut] + "\n" + CAUTION[cut:].strip(), ha="center",
             va="bottom", fontsize=7)
    fig.subplots_adjust(left=0.09, right=0.98, top=0.92, bottom=0.1, hspace=0.12)
    fig.savefig(path)
    return Path(path)

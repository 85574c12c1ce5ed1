"""Simulating the events of one period together (integrate.EventBatch) and reading from the
trajectories what the summary needs: nadir (refined between steps), RoCoF, end of run,
flatness, and the largest transient flow on each link.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from optreserve.dynamics.integrate import EventBatch
from optreserve.dynamics.system import INTER_AREA_DAMPING_RATIO, System, link_power
from optreserve.errors import CaseError, Problem

DURATION_S = 60.0
# Without an explicit duration a run that has not settled goes on to twice the length, up to
# this many seconds (load self-regulation alone can take minutes to finish the job once every
# provider sits at its limit).
MAX_AUTO_DURATION_S = 480.0
ROCOF_WINDOW_S = 0.5
# End of run counts as settled when, over the last FLAT_WINDOW_S, no area frequency moves more
# than FLAT_HZ and no link flow more than FLAT_MW.
FLAT_WINDOW_S = 5.0
FLAT_HZ = 0.1e-3
FLAT_MW = 0.1
# "exact": fixed step with exact discretisations (integrate.py); "auto" is the same.
METHODS = ("auto", "exact")


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
    duration_s: float = DURATION_S
    max_abs_flow_mw: np.ndarray | None = None  # (L,) over every step
    max_flow_time_s: np.ndarray | None = None  # (L,)


def output_times(duration_s: float) -> np.ndarray:
    """10 ms steps for the first 2 s (RoCoF, the fast part of the dip), 50 ms to 20 s, then
    250 ms: enough to plot and to read loadings without writing megabytes per event."""
    D = float(duration_s)
    t = np.r_[np.arange(0.0, min(2.0, D), 0.01), np.arange(2.0, min(20.0, D), 0.05),
              np.arange(20.0, D, 0.25), D]
    return np.unique(np.round(t, 9))


def nadirs(dev: np.ndarray, h: float):
    """Largest deviation (n+1, M, A) -> per event (value, time, area), refined between grid
    points by the parabola through the extreme sample and its neighbours."""
    n1, M, A = dev.shape
    flat = dev.reshape(n1, M * A)
    k = np.argmax(flat, axis=0).reshape(M, A)
    v = np.take_along_axis(dev, k[None], axis=0)[0]  # (M, A)
    inner = (k > 0) & (k < n1 - 1)
    km, kp = np.clip(k - 1, 0, n1 - 1), np.clip(k + 1, 0, n1 - 1)
    vm = np.take_along_axis(dev, km[None], axis=0)[0]
    vp = np.take_along_axis(dev, kp[None], axis=0)[0]
    curv = vm - 2 * v + vp
    with np.errstate(divide="ignore", invalid="ignore"):
        off = np.where(inner & (curv < 0), 0.5 * (vm - vp) / curv, 0.0)
    off = np.clip(off, -0.5, 0.5)
    val = v - 0.25 * (vm - vp) * off
    tim = (k + off) * h
    a = np.argmax(val, axis=1)
    r = np.arange(M)
    best, when = val[r, a], tim[r, a]
    none = best <= 0
    return np.where(none, 0.0, best), np.where(none, 0.0, when), a


def flat_at(df, flows, h: float, D: float):
    """(M,) whether the run counts as settled at time D (on the step grid)."""
    n = round(D / h)
    w = max(1, round(min(FLAT_WINDOW_S, D / 4) / h))
    seg = df[n - w:n + 1]
    spread_f = np.ptp(seg, axis=0).max(axis=-1, initial=0.0)
    spread_p = (np.ptp(flows[n - w:n + 1], axis=0).max(axis=-1, initial=0.0)
                if flows.shape[-1] else np.zeros(df.shape[1]))
    return (spread_f <= FLAT_HZ) & (spread_p <= FLAT_MW)


def _check_inertia(sysm: System, H_a: np.ndarray, trip: np.ndarray) -> None:
    bad = H_a <= 0
    if bad.any():
        m, a = np.argwhere(bad)[0]
        raise CaseError([Problem(sysm.units_file, f"area '{sysm.area_ids[a]}' has no online "
                                 "inertia" + (" once the tripped unit is gone" if trip[m] >= 0
                                              else "") + ": the per-area swing equation "
                                 "needs inertia_s on some online unit of every area", None,
                                 "inertia_s")])


def simulate_events(sysm: System, size_mw, area, trip, duration_s: float | None = DURATION_S,
                    damping_ratio: float = INTER_AREA_DAMPING_RATIO, blocked=None,
                    record_units: bool = True, times=None) -> list[Trajectory]:
    """Integrate M events of one system together: size_mw > 0 is a deficit (frequency falls)
    in `area`; `trip` the tripped unit (its inertia and response are lost) or -1 for a load
    step; `blocked` a unit that does not respond (an unavailable provider) or -1.
    duration_s None: DURATION_S, doubled for the events not yet flat, up to
    MAX_AUTO_DURATION_S."""
    size = np.atleast_1d(np.asarray(size_mw, float))
    M = len(size)
    trip = np.broadcast_to(np.asarray(trip, np.int64), (M,))
    area = np.broadcast_to(np.asarray(area, np.int64), (M,))
    H_a = sysm.area_inertia_after(trip)
    _check_inertia(sysm, H_a, trip)
    batch = EventBatch(sysm, size, area, trip, blocked, damping_ratio, record_units)
    h = batch.h
    run = DURATION_S if duration_s is None else float(duration_s)
    batch.run_to(run)
    while duration_s is None and run < MAX_AUTO_DURATION_S:
        df, delta, _ = batch.rec.arrays()
        fl = link_power(sysm, df, delta, batch.tie_b)
        if flat_at(df, fl, h, run).all():
            break
        run = min(2.0 * run, MAX_AUTO_DURATION_S)
        batch.run_to(run)
    df, delta, resp = batch.rec.arrays()
    flows = link_power(sysm, df, delta, batch.tie_b)  # (n+1, M, L) change of flow
    # per event: the first of 60, 120, ... s at which it is flat (or the whole run)
    dur = np.full(M, run)
    if duration_s is None:
        D, done = DURATION_S, np.zeros(M, bool)
        while D <= run + 1e-9:
            ok = flat_at(df, flows, h, D) & ~done
            dur[ok], done = D, done | ok
            D *= 2.0
    sigma = np.where(size >= 0, 1.0, -1.0)
    out = []
    t_grid = np.arange(df.shape[0]) * h
    for m in range(M):  # per event only slicing and bookkeeping; the numbers are above
        n = round(dur[m] / h)
        dev = -sigma[m] * df[:n + 1, m:m + 1, :]
        v_n, t_n, a_n = nadirs(dev, h)
        w = min(ROCOF_WINDOW_S, dur[m])
        rate = df[round(w / h), m] / w
        ra = int(np.argmax(np.abs(rate)))
        tt = output_times(dur[m]) if times is None else np.asarray(times, float)
        idx = np.clip(np.round(tt / h).astype(int), 0, n)
        resp_full = np.zeros((len(tt), len(sysm.unit_ids)))
        if resp is not None:
            resp_full[:, batch.g] = resp[idx, m]
        abs_flow = np.abs(sysm.flow0[None, :] + flows[:n + 1, m])
        kmax = np.argmax(abs_flow, axis=0) if abs_flow.shape[1] else np.zeros(0, int)
        out.append(Trajectory(
            time_s=tt, frequency_hz=sysm.f_n + df[idx, m], flow_mw=sysm.flow0 + flows[idx, m],
            response_mw=resp_full, nadir_hz=float(sysm.f_n - sigma[m] * v_n[0]),
            nadir_time_s=float(t_n[0]), nadir_area=int(a_n[0]),
            rocof_hz_per_s=float(abs(rate[ra])), rocof_area=ra,
            end_frequency_hz=sysm.f_n + df[n, m], end_flow_mw=sysm.flow0 + flows[n, m],
            flat=bool(flat_at(df[:, m:m + 1], flows[:, m:m + 1], h, dur[m])[0]),
            inertia_mw_s=float(H_a[m].sum()), duration_s=float(dur[m]),
            max_abs_flow_mw=abs_flow[kmax, np.arange(len(kmax))],
            max_flow_time_s=t_grid[kmax]))
    return out


def event_nadirs(sysm: System, size_mw, area, trip, duration_s: float, blocked=None,
                 damping_ratio: float = INTER_AREA_DAMPING_RATIO):
    """Only the nadirs of simulate_events(..., duration_s, record_units=False): per event
    (M,) nadir_hz, nadir_time_s, nadir_area, the same numbers, without the flows, RoCoF and
    series the nadir does not need (the solve's check runs this for every candidate)."""
    size = np.atleast_1d(np.asarray(size_mw, float))
    M = len(size)
    trip = np.broadcast_to(np.asarray(trip, np.int64), (M,))
    area = np.broadcast_to(np.asarray(area, np.int64), (M,))
    _check_inertia(sysm, sysm.area_inertia_after(trip), trip)
    batch = EventBatch(sysm, size, area, trip, blocked, damping_ratio, record_units=False)
    batch.run_to(float(duration_s))
    df, _, _ = batch.rec.arrays()
    sigma = np.where(size >= 0, 1.0, -1.0)
    v_n, t_n, a_n = nadirs(-sigma[None, :, None] * df, batch.h)
    return sysm.f_n - sigma * v_n, t_n, a_n


def simulate_event(sysm: System, size_mw: float, area: int, trip: int = -1,
                   duration_s: float = DURATION_S, method: str = "auto", times=None,
                   damping_ratio: float = INTER_AREA_DAMPING_RATIO) -> Trajectory:
    """One event (simulate_events with M = 1) for a fixed duration."""
    if method not in METHODS:
        raise ValueError(f"method must be one of {', '.join(METHODS)}")
    return simulate_events(sysm, [size_mw], [area], [trip], float(duration_s), damping_ratio,
                           times=times)[0]

"""Independent exact settled point: scalar power balance with dead bands and headroom
saturation, then a DC load flow between areas.

Deliberately shares no code with the optimisation model: it starts from the unit gains and
headroom of an allocation and recomputes the physics, so that it can check the optimiser.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from optreserve.case.data import Case
from optreserve.verify.roundoff import covers  # the one place solver round-off is absorbed


def settle_deviation(dP: float, gain, deadband_hz, headroom, damping_mw_per_hz: float) -> float:
    """Solve sum_i min(K_i (x - d_i)^+, r_i) + D x = dP for x >= 0 (dP >= 0, MW).

    The left side is continuous, piecewise linear and non-decreasing in x, so the root is
    found exactly by locating the segment between breakpoints. Returns inf when the
    response saturates below dP (no settled point)."""
    if dP <= 0:
        return 0.0
    K = np.asarray(gain, float)
    d = np.asarray(deadband_hz, float)
    r = np.asarray(headroom, float)
    act = (K > 0) & (r > 0)
    K, d, r = K[act], d[act], r[act]
    D = float(damping_mw_per_hz)
    sat = d + r / K  # deviation at which each unit reaches its headroom
    pts = np.unique(np.r_[0.0, d, sat])

    def total(x):
        x = np.atleast_1d(x)[:, None]
        return (np.minimum(K[None, :] * np.maximum(x - d[None, :], 0.0), r[None, :]).sum(1)
                + D * x[:, 0])

    vals = total(pts)
    k = int(np.searchsorted(vals, dP, side="left"))
    if k >= len(pts):
        slope = D  # beyond the last breakpoint only load self-regulation grows
        if slope <= 0:
            if covers(vals[-1], dP):
                return float(pts[-1])  # covered to within round-off: settles at saturation
            return float("inf")
        return float(pts[-1] + (dP - vals[-1]) / slope)
    if k == 0:
        return 0.0
    x0, x1, v0, v1 = pts[k - 1], pts[k], vals[k - 1], vals[k]
    return float(x0 + (dP - v0) * (x1 - x0) / (v1 - v0))


def dc_flows(n_areas: int, from_idx, to_idx, reactance, injection) -> np.ndarray:
    """DC load flow: B theta = P with theta_0 = 0; flow_l = (theta_f - theta_t) / x_l."""
    inj = np.asarray(injection, float)[None, :]
    return _dc_flows_many(n_areas, from_idx, to_idx, reactance, inj)[0]


@dataclass(frozen=True)
class SettledPoint:
    event: str
    deviation_hz: float  # signed: negative for under-frequency
    response_mw: np.ndarray  # per unit, signed like the power it adds
    injection_mw: np.ndarray  # per area change of net injection
    flow_after_mw: np.ndarray  # per link


def settle_case(case: Case, gain, headroom_up, headroom_down) -> list[SettledPoint]:
    """Settled point of every event of the case for the given per-unit gains and headroom."""
    K = np.asarray(gain, float)
    d = case.units["deadband_mhz"].to_numpy(float) / 1000.0
    unit_ids = list(case.units["unit"])
    area_ids = list(case.areas["area"])
    apos = {a: k for k, a in enumerate(area_ids)}
    unit_area = np.array([apos[a] for a in case.units["area"]])
    D_a = (case.areas["load_mw"].to_numpy(float)
           * case.areas["load_damping_pct_per_hz"].to_numpy(float) / 100.0)
    lk = case.links
    f_idx = [apos[a] for a in lk["from_area"]]
    t_idx = [apos[a] for a in lk["to_area"]]
    F0 = lk["flow_mw"].to_numpy(float)
    out = []
    for _, e in case.events.iterrows():
        size = float(e["size_mw"])
        sign = 1.0 if size >= 0 else -1.0  # +1: deficit, frequency falls
        r = np.asarray(headroom_up if sign > 0 else headroom_down, float).copy()
        Ke = K.copy()
        if e["kind"] == "unit_trip":
            j = unit_ids.index(e["unit"])
            Ke[j] = 0.0
        x = settle_deviation(abs(size), Ke, d, r, D_a.sum())
        if np.isfinite(x):
            resp = np.minimum(Ke * np.maximum(x - d, 0.0), np.where(Ke > 0, r, 0.0))
        else:
            resp = np.where(Ke > 0, r, 0.0)
        inj = np.bincount(unit_area, weights=resp, minlength=len(area_ids)) + D_a * (
            x if np.isfinite(x) else 0.0)
        inj[apos[e["area"]]] -= abs(size)
        flows = F0 + (dc_flows(len(area_ids), f_idx, t_idx, lk["reactance_pu"], sign * inj)
                      if len(lk) else np.zeros(0))
        out.append(SettledPoint(str(e["event"]), -sign * x, sign * resp, sign * inj, flows))
    return out


# ------------------------------------------------------------------ many events at once
BISECTION_STEPS = 48  # bracket ~1e-14 of its start; the last piece is then solved exactly


def settle_batch(dP, gain, deadband_hz, headroom, damping_mw_per_hz) -> np.ndarray:
    """Vectorised settle_deviation for M events at once: dP (M,), gain and headroom (M, N),
    dead bands (N,), total load self-regulation (M,). Brackets the root by bisection on the
    same piecewise-linear balance, then solves the linear piece that holds it exactly."""
    dP = np.asarray(dP, float)
    K = np.asarray(gain, float)
    r = np.asarray(headroom, float)
    d = np.asarray(deadband_hz, float)[None, :]
    D = np.asarray(damping_mw_per_hz, float)
    act = (K > 0) & (r > 0)
    K = np.where(act, K, 0.0)
    r = np.where(act, r, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        sat = np.where(act, d + r / np.where(act, K, 1.0), 0.0)
        hi = np.maximum(sat.max(axis=1, initial=0.0), np.where(D > 0, dP / D, 0.0)) + 1e-9

    def total(x):
        return np.minimum(K * np.maximum(x[:, None] - d, 0.0), r).sum(axis=1) + D * x

    # a response that covers dP only to within round-off still settles (at full headroom)
    no_point = (D <= 0) & ~covers(r.sum(axis=1), dP)
    lo = np.zeros_like(dP)
    for _ in range(BISECTION_STEPS):
        mid = 0.5 * (lo + hi)
        above = total(mid) >= dP
        hi = np.where(above, mid, hi)
        lo = np.where(above, lo, mid)
    m = 0.5 * (lo + hi)[:, None]
    linear = act & (m > d) & (m < sat)
    satd = act & (m >= sat)
    num = dP - np.where(satd, r, 0.0).sum(axis=1) + np.where(linear, K * d, 0.0).sum(axis=1)
    den = np.where(linear, K, 0.0).sum(axis=1) + D
    with np.errstate(divide="ignore", invalid="ignore"):
        x = np.where(den > 0, num / den, 0.5 * (lo + hi))
    x = np.where(dP <= 0, 0.0, x)
    return np.where(no_point & (dP > 0), np.inf, x)


@dataclass(frozen=True)
class BatchPoints:
    deviation_hz: np.ndarray  # (M,) signed: negative for under-frequency
    flow_after_mw: np.ndarray  # (M, L)
    injection_mw: np.ndarray  # (M, A)
    response_mw: np.ndarray  # (M, N) signed like the power each unit adds


def settle_instances(dP, sigma, t, area_e, trip, gain, r_up, r_dn, d_hz, unit_area, D_a,
                     F0, from_idx, to_idx, reactance, absent=None, lost=None
                     ) -> BatchPoints:
    """Settled points of M event instances: instance m happens in period t[m] with per-period
    gains and headroom (T, N), per-period load self-regulation D_a (T, A), pre-event flows
    F0 (T, L) and reactances (T, L); trip[m] is the tripped unit or -1; absent[m] a unit that
    gives no response in instance m (its output is not lost) or -1 (a direction a unit does
    not provide in holds no headroom, r = 0 there, so it gives no response in it);
    lost = (instances, units) pairs of every unit an instance loses (a common-mode trip loses
    several; default: trip alone). The lost output is dP itself; the lost units respond not."""
    M = len(dP)
    gain = np.asarray(gain, float)
    # only units that respond in some period matter; the rest would only cost time
    live = np.nonzero((gain > 0).any(axis=0))[0]
    col_of = np.full(gain.shape[1], -1)
    col_of[live] = np.arange(len(live))
    K = gain[t][:, live]
    for out in (trip, absent if absent is not None else np.full(M, -1)):
        tr = np.nonzero((out >= 0) & (col_of[np.maximum(out, 0)] >= 0))[0]
        K[tr, col_of[out[tr]]] = 0.0
    if lost is not None:
        lm, lj = (np.asarray(a, dtype=np.int64) for a in lost)
        keep = col_of[lj] >= 0
        K[lm[keep], col_of[lj[keep]]] = 0.0
    r = np.where((sigma > 0)[:, None], np.asarray(r_up, float)[t][:, live],
                 np.asarray(r_dn, float)[t][:, live])
    d_hz = np.asarray(d_hz, float)[live]
    unit_area = np.asarray(unit_area)[live]
    Dm = np.asarray(D_a, float)[t]
    x = settle_batch(dP, K, d_hz, r, Dm.sum(axis=1))
    xf = np.where(np.isfinite(x), x, 0.0)
    resp = np.minimum(K * np.maximum(xf[:, None] - d_hz[None, :], 0.0), r)
    resp = np.where(np.isfinite(x)[:, None], resp, np.where(K > 0, r, 0.0))
    n_a = Dm.shape[1]
    onehot = np.zeros((len(unit_area), n_a))
    onehot[np.arange(len(unit_area)), unit_area] = 1.0
    inj = resp @ onehot + Dm * xf[:, None]
    inj[np.arange(M), area_e] -= dP
    inj *= sigma[:, None]
    X = np.asarray(reactance, float)
    n_l = X.shape[1] if X.ndim == 2 else 0
    flows = np.asarray(F0, float)[t].reshape(M, n_l).copy()
    if n_l and M:
        Xm = X[t]
        keys, inv = np.unique(Xm, axis=0, return_inverse=True)
        inv = inv.reshape(-1)
        for k in range(len(keys)):
            sel = inv == k
            flows[sel] += _dc_flows_many(n_a, from_idx, to_idx, keys[k], inj[sel])
    full = np.zeros((M, gain.shape[1]))
    full[:, live] = sigma[:, None] * resp
    return BatchPoints(-sigma * x, flows, inj, full)


def _dc_flows_many(n_areas, from_idx, to_idx, reactance, injections) -> np.ndarray:
    """dc_flows for many injection vectors (rows) sharing one network."""
    f = np.asarray(from_idx, int)
    t = np.asarray(to_idx, int)
    b = 1.0 / np.asarray(reactance, float)
    B = np.zeros((n_areas, n_areas))
    np.add.at(B, (f, f), b)
    np.add.at(B, (t, t), b)
    np.add.at(B, (f, t), -b)
    np.add.at(B, (t, f), -b)
    theta = np.zeros((n_areas, injections.shape[0]))
    if n_areas > 1:
        theta[1:] = np.linalg.solve(B[1:, 1:], injections[:, 1:].T)
    return (b[:, None] * (theta[f] - theta[t])).T

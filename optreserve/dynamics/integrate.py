"""Fixed-step integration of the area swing equations with the units' governor models, for
several events of one period at once (the leading axis M of every array).

Everything is linear except the droop demand, u_i = ±min(K_i (|Δf_a| − d_i)^+, limit_i), so
each step of length h is solved exactly for the linear parts and the demand is held over it:
* governors: the exact zero-order-hold step of governors.ZOH (lag, reheat, hydro, inverter;
  a delay that is not a multiple of h is split exactly) for the held demand;
* swing and ties: the exact step of x' = F x + E (p − P_e) with the mechanical power p taken
  linear over the step between its exact values at both ends (first-order hold, from
  expm of the augmented matrix, Van Loan's method);
* the demand is held at its value for the frequency predicted at the middle of the step,
  Δf_k + h/2 · dΔf/dt_k.
The only approximation is that hold (second order in h; measured against an adaptive
integration of the same equations in tests/test_dynamics_models.py). The step is 10 ms, made
smaller when the droop loop of an area is fast (see step_size), and always divides 10 ms so
that the output times fall on the grid.

Per step this costs a few whole-array operations on (M, G) arrays (G responding units): no
Jacobian, no step-size control, no Python loop over units or events.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import expm

from optreserve.dynamics.system import System, swing_matrices, tie_damping

STEP_S = 0.01
# The explicit hold of the demand is a sampled feedback loop: keep its loop gain per step
# small. kappa = f_n/(2 H_a) * sum K_a (1/s) is how fast an area's droop alone pulls Δf back;
# sqrt(kappa / t1) the frequency of the loop through the fastest governor.
MAX_KAPPA_STEP = 0.2
MAX_OMEGA_STEP = 0.1


def step_size(sysm: System, live: np.ndarray, H_a: np.ndarray) -> float:
    """The step: STEP_S / n for the smallest whole n keeping the droop loop resolved."""
    K_a = np.bincount(sysm.unit_area[live], weights=sysm.gain[live],
                      minlength=len(sysm.area_ids))
    kappa = float((sysm.f_n / (2.0 * np.min(H_a, axis=0)) * K_a).max(initial=0.0))
    t1 = float(np.min(sysm.gov.t1[live], initial=np.inf))
    omega = np.sqrt(kappa / t1) if np.isfinite(t1) else 0.0
    h = min(STEP_S, MAX_KAPPA_STEP / kappa if kappa > 0 else STEP_S,
            MAX_OMEGA_STEP / omega if omega > 0 else STEP_S)
    return STEP_S / int(np.ceil(STEP_S / h - 1e-9))


def foh_blocks(F: np.ndarray, E: np.ndarray, h: float):
    """Exact step of x' = F x + E w(t) for w linear over the step (leading axis M):
    x_{k+1} = Phi x_k + G0 w_k + G1 (w_{k+1} - w_k). Van Loan: expm of
    [[F, E, 0], [0, 0, I], [0, 0, 0]] h holds Phi, G0 and h G1 in its first block row."""
    M, S, A = E.shape
    Z = np.zeros((M, S + 2 * A, S + 2 * A))
    Z[:, :S, :S] = F * h
    Z[:, :S, S:S + A] = E * h
    Z[:, S:S + A, S + A:] = np.eye(A) * h
    X = expm(Z)
    return X[:, :S, :S], X[:, :S, S:S + A], X[:, :S, S + A:] / h


@dataclass
class Records:
    """Samples on the step grid t_k = k h (k = 0..n): Δf (n+1, M, A), δ (n+1, M, L), and the
    responding units' power (n+1, M, G) when recorded."""

    h: float
    df: list
    delta: list
    resp: list

    def arrays(self):
        df = np.stack(self.df)
        delta = np.stack(self.delta)
        resp = np.stack(self.resp) if self.resp else None
        return df, delta, resp


class EventBatch:
    """M events of one system integrated together; `run_to(duration)` extends the run
    (the state is kept, so a run that has not settled can simply go on)."""

    def __init__(self, sysm: System, size_mw, area, trip, blocked=None,
                 damping_ratio: float = 0.05, record_units: bool = True,
                 step_s: float | None = None):
        size = np.atleast_1d(np.asarray(size_mw, float))
        M = len(size)
        area = np.broadcast_to(np.asarray(area, np.int64), (M,))
        trip = np.broadcast_to(np.asarray(trip, np.int64), (M,))
        blocked = (np.full(M, -1, np.int64) if blocked is None
                   else np.broadcast_to(np.asarray(blocked, np.int64), (M,)))
        A, L = len(sysm.area_ids), len(sysm.link_ids)
        self.sysm, self.M, self.A, self.L = sysm, M, A, L
        self.H_a = sysm.area_inertia_after(trip)  # (M, A)
        self.tie_b = tie_damping(sysm.f_n, self.H_a, sysm.incidence, sysm.sync_mw_per_rad,
                                 damping_ratio)  # (M, L)
        F, E = swing_matrices(sysm.f_n, self.H_a, sysm.damping, sysm.incidence,
                              sysm.sync_mw_per_rad, self.tie_b)
        self.F, self.E = F, E
        self.P_e = np.zeros((M, A))
        self.P_e[np.arange(M), area] = size
        # only units that can respond carry a governor state; the others add nothing, ever
        live = (sysm.gain > 0) & ((sysm.lim_up > 0) | (sysm.lim_dn > 0))
        self.g = g = np.nonzero(live)[0]
        active = np.ones((M, len(g)))  # the tripped and the unavailable unit do not respond
        pos = np.full(len(sysm.gain), -1)
        pos[g] = np.arange(len(g))
        for arr in (trip, blocked):
            m = np.nonzero((arr >= 0) & (pos[np.maximum(arr, 0)] >= 0))[0]
            active[m, pos[arr[m]]] = 0.0
        self.active = active
        self.h = h = step_s or step_size(sysm, live, self.H_a)
        self.Phi, self.G0, self.G1 = foh_blocks(F, E, h)
        self.K = sysm.gain[g]
        self.d = sysm.deadband_hz[g]
        self.up, self.dn = sysm.lim_up[g], sysm.lim_dn[g]
        self.ga = sysm.unit_area[g]
        self.agg = np.zeros((len(g), A))
        self.agg[np.arange(len(g)), self.ga] = 1.0
        gov = sysm.gov
        self.gov = gov.subset(g)
        zoh = self.gov.zoh(h)
        self.phi = zoh.phi
        self.gn, self.gp = zoh.g_now, zoh.g_prev
        self.lag = zoh.lag_steps
        self.delayed = bool(len(g) and (self.lag.max() > 0 or np.abs(self.gp).max() > 0))
        self.ring = int(self.lag.max(initial=0)) + 2
        self.a_out, self.b_out = self.gov.a, self.gov.b
        # state
        self.k = 0
        self.z = np.zeros((M, A + L))
        self.x = np.zeros((M, len(g), 2))
        self.p = np.zeros((M, A))
        self.u_hist = np.zeros((self.ring, M, len(g)))
        self.rate_prev = None
        self.record_units = record_units
        self.rec = Records(h, [self.z[:, :A].copy()], [self.z[:, A:].copy()],
                           [np.zeros((M, len(g)))] if record_units else [])

    def run_to(self, duration_s: float) -> None:
        n_end = round(duration_s / self.h)
        A = self.A
        Phi, G0, G1 = self.Phi, self.G0, self.G1
        FA, EA = self.F[:, :A, :], self.E[:, :A, :]
        K, d, up, dn, ga, act = self.K, self.d, self.up, self.dn, self.ga, self.active
        p00, p10, p11 = self.phi[:, 0, 0], self.phi[:, 1, 0], self.phi[:, 1, 1]
        gn0, gn1, gp0, gp1 = self.gn[:, 0], self.gn[:, 1], self.gp[:, 0], self.gp[:, 1]
        a_out, b_out, agg = self.a_out, self.b_out, self.agg
        cols = np.arange(len(self.g))
        z, x1, x2, p = self.z, self.x[:, :, 0].copy(), self.x[:, :, 1].copy(), self.p
        P_e, half, eighth = self.P_e, 0.5 * self.h, 0.125 * self.h
        rec = self.rec
        rate_prev = self.rate_prev
        for k in range(self.k, n_end):
            # demand held over the step: droop on the frequency predicted at mid-step (Taylor
            # to second order, the curvature from the last two rates)
            rate = np.einsum("mas,ms->ma", FA, z) + np.einsum("mab,mb->ma", EA, p - P_e)
            if rate_prev is None:
                rate_prev = rate
            f_mid = (z[:, :A] + half * rate + eighth * (rate - rate_prev))[:, ga]
            rate_prev = rate
            raw = K * np.maximum(np.abs(f_mid) - d, 0.0)
            u = np.where(f_mid < 0, np.minimum(raw, up), -np.minimum(raw, dn)) * act
            if self.delayed:
                self.u_hist[k % self.ring] = u
                # slots of times before 0 still hold zeros (ring > largest lag + 1)
                u_now = self.u_hist[(k - self.lag) % self.ring, :, cols].T
                u_prev = self.u_hist[(k - self.lag - 1) % self.ring, :, cols].T
                x1, x2 = (p00 * x1 + gn0 * u_now + gp0 * u_prev,
                          p10 * x1 + p11 * x2 + gn1 * u_now + gp1 * u_prev)
            else:
                x1, x2 = p00 * x1 + gn0 * u, p10 * x1 + p11 * x2 + gn1 * u
            y = a_out * x1 + b_out * x2
            p_new = y @ agg
            z = (np.einsum("mij,mj->mi", Phi, z) + np.einsum("mia,ma->mi", G0, p - P_e)
                 + np.einsum("mia,ma->mi", G1, p_new - p))
            p = p_new
            rec.df.append(z[:, :A])
            rec.delta.append(z[:, A:])
            if self.record_units:
                rec.resp.append(y)
        self.k = max(self.k, n_end)
        self.z, self.p, self.rate_prev = z, p, rate_prev
        self.x = np.stack([x1, x2], axis=-1)

    @property
    def duration_s(self) -> float:
        return self.k * self.h


def swing_response(inertia_mw_s, event_mw, response_mw, nominal_frequency_hz: float,
                   damping_mw_per_hz: float = 0.0, duration_s: float = 30.0, times=None,
                   step_s: float = 0.001):
    """One area's swing equation driven by a prescribed response (a callable t -> MW added by
    the providers), stepped with the simulator's own exact swing step (first-order hold of
    the response between grid points): for checking against closed forms.

    Returns a DataFrame: time_s, frequency_hz and response_mw on `times` (default: every
    10 ms), read off the grid by linear interpolation."""
    import pandas as pd

    f_n = float(nominal_frequency_hz)
    F, E = swing_matrices(f_n, np.array([[float(inertia_mw_s)]]), [damping_mw_per_hz],
                          np.zeros((0, 1)), np.zeros(0), np.zeros((1, 0)))
    Phi, G0, G1 = foh_blocks(F, E, step_s)
    n = int(np.ceil(duration_s / step_s - 1e-9))
    grid = np.arange(n + 1) * step_s
    w = np.array([float(response_mw(s)) for s in grid]) - float(event_mw)
    phi, g0, g1 = float(Phi[0, 0, 0]), float(G0[0, 0, 0]), float(G1[0, 0, 0])
    x = np.zeros(n + 1)
    for k in range(n):  # a scalar recursion: the test helper's only loop
        x[k + 1] = phi * x[k] + g0 * w[k] + g1 * (w[k + 1] - w[k])
    t = np.arange(0.0, duration_s + 1e-12, 0.01) if times is None else np.asarray(times, float)
    return pd.DataFrame({"time_s": t, "frequency_hz": f_n + np.interp(t, grid, x),
                         "response_mw": [float(response_mw(s)) for s in t]})

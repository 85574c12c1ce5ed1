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

Per step this costs about a dozen whole-array calls on (M, G) arrays (G responding units): no
Jacobian, no step-size control, no Python loop over units or events.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cache

import numpy as np
from threadpoolctl import ThreadpoolController

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


# Pade (13, 13) coefficients of exp and the 1-norm up to which it is accurate in double
# precision without scaling (Higham, "The scaling and squaring method for the matrix
# exponential revisited", SIAM J. Matrix Anal. Appl. 26 (2005), table 2.3 and eq. 2.5).
_PADE13 = (64764752532480000.0, 32382376266240000.0, 7771770303897600.0,
           1187353796428800.0, 129060195264000.0, 10559470521600.0, 670442572800.0,
           33522128640.0, 1323241920.0, 40840800.0, 960960.0, 16380.0, 182.0, 1.0)
_THETA13 = 5.371920351148152


def expm(Z: np.ndarray) -> np.ndarray:
    """exp of each matrix of the stack Z (..., n, n): Pade (13, 13) after scaling each by
    2^-s to a 1-norm within _THETA13, then squared s times (Higham 2005, algorithm 2.3 with
    the degree-13 branch only). numpy only: scipy.linalg's import alone cost a snapshot
    solve 30-60 ms; tests/test_dynamics_models.py checks it against scipy.linalg.expm."""
    A = np.asarray(Z, float)
    n = A.shape[-1]
    norm = np.abs(A).sum(axis=-2).max(axis=-1)
    with np.errstate(divide="ignore"):
        s = np.maximum(0, np.ceil(np.log2(norm / _THETA13))).astype(np.int64)
    s = np.where(norm > 0, s, 0)
    A = A / np.ldexp(1.0, s)[..., None, None]
    b = _PADE13
    eye = np.broadcast_to(np.eye(n), A.shape)
    A2 = A @ A
    A4 = A2 @ A2
    A6 = A4 @ A2
    U = A @ (A6 @ (b[13] * A6 + b[11] * A4 + b[9] * A2)
             + b[7] * A6 + b[5] * A4 + b[3] * A2 + b[1] * eye)
    V = (A6 @ (b[12] * A6 + b[10] * A4 + b[8] * A2)
         + b[6] * A6 + b[4] * A4 + b[2] * A2 + b[0] * eye)
    X = np.linalg.solve(V - U, V + U)
    for k in range(int(s.max(initial=0))):  # each matrix squared its own s times
        sq = (s > k)[..., None, None]
        X = np.where(sq, X @ X, X)
    return X


@cache
def _blas() -> ThreadpoolController:
    """The BLAS libraries loaded (numpy's): found once,
    a search of every loaded library takes a few milliseconds."""
    return ThreadpoolController()


def foh_blocks(F: np.ndarray, E: np.ndarray, h: float):
    """Exact step of x' = F x + E w(t) for w linear over the step (leading axis M):
    x_{k+1} = Phi x_k + G0 w_k + G1 (w_{k+1} - w_k). Van Loan: expm of
    [[F, E, 0], [0, 0, I], [0, 0, 0]] h holds Phi, G0 and h G1 in its first block row."""
    M, S, A = E.shape
    Z = np.zeros((M, S + 2 * A, S + 2 * A))
    Z[:, :S, :S] = F * h
    Z[:, :S, S:S + A] = E * h
    Z[:, S:S + A, S + A:] = np.eye(A) * h
    # One BLAS thread: on these ~12 x 12 matrices scipy's threaded BLAS only waits for its
    # second thread, which on a machine whose other core is busy took 5-10 ms per matrix
    # (against 0.01 ms single-threaded; the result is the same bit for bit).
    with _blas().limit(limits=1, user_api="blas"):
        X = expm(Z)
    return X[:, :S, :S], X[:, :S, S:S + A], X[:, :S, S + A:] / h


@dataclass
class Records:
    """Samples on the step grid t_k = k h (k = 0..n): the state [p, Δf, δ, 1, q] of every step
    (EventBatch._fuse) in blocks, one per run_to, and the responding units' power when
    recorded."""

    h: float
    A: int
    L: int
    states: list  # blocks (n_i, M, n_s)
    resp: list  # blocks (n_i, M, G)

    def arrays(self):
        """Δf (n+1, M, A), δ (n+1, M, L), responding units' power (n+1, M, G) or None."""
        H = self.states[0] if len(self.states) == 1 else np.concatenate(self.states)
        A, L = self.A, self.L
        # contiguous copies: the flows and nadirs computed from them as before, bit for bit
        df = np.ascontiguousarray(H[:, :, A:2 * A])
        delta = np.ascontiguousarray(H[:, :, 2 * A:2 * A + L])
        if not self.resp:
            return df, delta, None
        return df, delta, (self.resp[0] if len(self.resp) == 1 else np.concatenate(self.resp))


class EventBatch:
    """M events of one system integrated together; `run_to(duration)` extends the run
    (the state is kept, so a run that has not settled can simply go on).

    A step is a dozen whole-array calls. On the small arrays of one period's events each costs
    about a microsecond whatever its size, so their number sets the cost: everything linear
    in the swing state is one batched matrix-vector product (B in _fuse), the new mechanical
    power one matrix product, the governors a few elementwise calls, all into preallocated
    buffers; the samples go straight into one array per run_to."""

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
        self.record_units = record_units
        self._fuse()
        # state: s (see _fuse), the governor states x = [x1, x2] (x1 only when no unit's
        # output sees x2), and the ring of past demands (slots of times before 0 hold zeros:
        # ring > largest lag + 1)
        self.k = 0
        self.s = np.zeros((M, self.n_s))
        self.s[:, self.i_one] = 1.0
        self.x = np.zeros((M, self.n_x, len(g)))
        self.u_hist = np.zeros((M, self.ring, len(g)))
        self.rec = Records(h, A, L, [], [])

    def _fuse(self) -> None:
        """The per-step linear algebra as one batched matrix-vector product B s and one
        matrix product for the new mechanical power.

        The stacked state is s = [p (A), z~ (A + L), 1, q (A)] with z~ = z − G1 p (z = [Δf, δ])
        and q = h/8 · the rate of Δf at the last step. B (M, A + n_s, n_s) maps s_k to
        [−Δf at mid-step (A); s_{k+1} with p_{k+1} = 0]:
        * the mid-step frequency Δf + h/2 rate + h/8 (rate − last rate) = Δf + 5h/8 rate − q;
        * the swing step z_{k+1} = Φ z + G0 (p − P_e) + G1 (p_{k+1} − p): its G1 p_{k+1} is
          the part z~ leaves out, so z~_{k+1} is linear in s_k (the constant on the entry 1);
        * q_{k+1} = h/8 · rate at step k.
        p_{k+1} = [x1, x2] @ agg2 then fills the first A entries. Only the order of the
        additions differs from the step written out term by term."""
        M, A, L = self.M, self.A, self.L
        S, h = A + L, self.h
        ip, iz, one, iq = slice(0, A), slice(A, A + S), A + S, slice(A + S + 1, 2 * A + S + 1)
        n_s = 2 * A + S + 1
        self.n_s, self.i_one = n_s, one
        FA, EA = self.F[:, :A, :], self.E[:, :A, :]
        # T: s~ -> [p, z, 1, q] (z = z~ + G1 p)
        T = np.broadcast_to(np.eye(n_s), (M, n_s, n_s)).copy()
        T[:, iz, ip] = self.G1
        rate = np.zeros((M, A, n_s))  # rate of Δf as a function of [p, z, 1, q]
        rate[:, :, iz], rate[:, :, ip] = FA, EA
        rate[:, :, one] = -np.einsum("mab,mb->ma", EA, self.P_e)
        B = np.zeros((M, A + n_s, n_s))
        B[:, :A] = -0.625 * h * rate
        B[:, :A, A:2 * A] -= np.eye(A)
        B[:, :A, iq] += np.eye(A)
        nxt = B[:, A:]
        nxt[:, iz, iz] = self.Phi
        nxt[:, iz, ip] = self.G0 - self.G1
        nxt[:, iz, one] = -np.einsum("mia,ma->mi", self.G0, self.P_e)
        nxt[:, one, one] = 1.0
        nxt[:, iq] = 0.125 * h * rate
        self.B = B @ T
        # p_new = sum over the area's units of a x1 + b x2
        # lag and inverter governors leave x2 unobserved (b = 0): a batch of only those
        # steps x1 alone (x1 never sees x2), the same numbers in fewer calls
        self.n_x = n_x = 2 if np.any(self.b_out != 0) else 1
        self.agg2 = np.concatenate([self.a_out[:, None] * self.agg,
                                    self.b_out[:, None] * self.agg][:n_x])
        # governor step on x = [x1, x2] (M, n_x, G); phi is lower triangular (x1 never sees x2).
        # Every coefficient is spread to the full shape of what it multiplies: numpy's loop
        # over two equal contiguous arrays is the fast one (broadcasting costs more than the
        # arithmetic on arrays this small).
        G = len(self.g)
        full = lambda a, *shape: np.ascontiguousarray(np.broadcast_to(a, (M,) + shape))
        self.P_d = full(np.stack([self.phi[:, 0, 0], self.phi[:, 1, 1]])[:n_x], n_x, G)
        self.p10 = full(self.phi[:, 1, 0], G)
        self.gn2, self.gp2 = full(self.gn.T[:n_x], n_x, G), full(self.gp.T[:n_x], n_x, G)
        self.K_full = full(self.K, G)
        # the demand K (−Δf − dead band)^± clipped to the limits; a unit out of the event
        # (tripped, unavailable) is clipped to zero
        self.lo = -self.dn * self.active
        self.hi = self.up * self.active
        self.has_deadband = bool(np.any(self.d > 0))
        self.d_full = full(self.d, G)
        # ring slots of the demands u[k − m] and u[k − m − 1], per step modulo the ring, as
        # flat (slot, unit) indices of one take
        slots, cols = np.arange(self.ring)[:, None], np.arange(G)
        now = ((slots - self.lag) % self.ring) * G + cols
        prev = ((slots - self.lag - 1) % self.ring) * G + cols
        self.i_ring = np.concatenate([now, prev], axis=1)

    def run_to(self, duration_s: float) -> None:
        n_end = round(duration_s / self.h)
        n = n_end - self.k
        if n <= 0:
            return
        M, A, G, n_s = self.M, self.A, len(self.g), self.n_s
        B, agg2, K, ga, lo, hi = self.B, self.agg2, self.K_full, self.ga, self.lo, self.hi
        d, neg_d, deadband, delayed = self.d_full, -self.d_full, self.has_deadband, self.delayed
        P_d, p10, gn, gp = self.P_d, self.p10, self.gn2, self.gp2
        x, two = self.x, self.n_x == 2  # x (M, n_x, G), updated in place
        x1, x2, x_flat = x[:, 0], x[:, -1], x.reshape(M, self.n_x * G)  # x2 used if two
        ring, n_ring = self.u_hist, self.ring
        ring_flat, i_ring = ring.reshape(M, n_ring * G), self.i_ring
        # u[k − m], then u[k − m − 1] (each for x1 and x2 as broadcast views)
        u_both = np.empty((M, 2, G))
        u_now, u_prev, u_both_flat = u_both[:, :1], u_both[:, 1:], u_both.reshape(M, 2 * G)
        if self.k == 0:  # no last rate yet: q = h/8 · the rate now (no curvature term)
            self.s[:, self.i_one + 1:] = (B[:, A + self.i_one + 1:] @ self.s[..., None])[..., 0]
        # rows of work: [−Δf at mid-step (A), s (n_s)]; step i's s in hist[i, :, A:]
        hist = np.empty((n + 1, M, A + n_s, 1))
        hist[0, :, A:, 0] = self.s
        resp = np.empty((n, M, G)) if self.record_units else None
        f, t, u = np.empty((M, G)), np.empty((M, G)), np.empty((M, G))
        u_b, t2 = u[:, None], np.empty(x.shape)  # u_b: u for x1 and x2 (a broadcast view)
        for i in range(n):
            k = self.k + i
            nxt = hist[i + 1]
            np.matmul(B, hist[i, :, A:], out=nxt)
            # demand held over the step: droop on the frequency predicted at mid-step
            nxt[:, :A, 0].take(ga, axis=1, out=f, mode="clip")
            if deadband:
                np.minimum(np.maximum(f, neg_d, out=t), d, out=t)
                np.subtract(f, t, out=f)
            np.multiply(f, K, out=f)
            np.maximum(f, lo, out=f)
            # governors: x1 <- p00 x1 + gn0 u, x2 <- p10 x1 + p11 x2 + gn1 u
            if two:
                np.multiply(p10, x1, out=t)
                np.multiply(P_d, x, out=x)
                np.add(x2, t, out=x2)
            else:
                np.multiply(P_d, x, out=x)
            if delayed:
                np.minimum(f, hi, out=ring[:, k % n_ring])
                ring_flat.take(i_ring[k % n_ring], axis=1, out=u_both_flat, mode="clip")
                np.add(x, np.multiply(gn, u_now, out=t2), out=x)
                np.add(x, np.multiply(gp, u_prev, out=t2), out=x)
            else:
                np.minimum(f, hi, out=u)
                np.add(x, np.multiply(gn, u_b, out=t2), out=x)
            np.matmul(x_flat, agg2, out=nxt[:, A:2 * A, 0])
            if resp is not None:  # y = a x1 + b x2 (b = 0 when x2 is not kept)
                np.multiply(self.a_out, x1, out=resp[i])
                if two:
                    np.add(resp[i], np.multiply(self.b_out, x2, out=t), out=resp[i])
        self.s = hist[-1, :, A:, 0].copy()  # the state to go on from
        states = hist[:, :, A:, 0]
        # z = z~ + G1 p, as the swing step adds it
        # (one matrix product per event over all steps: einsum's loop here cost milliseconds)
        states[:, :, A:self.i_one] += np.matmul(states[:, :, :A].transpose(1, 0, 2),
                                                self.G1.transpose(0, 2, 1)).transpose(1, 0, 2)
        if not self.rec.states:  # the samples at t = 0
            self.rec.states.append(states[:1])
            if resp is not None:
                self.rec.resp.append(np.zeros((1, M, G)))
        self.rec.states.append(states[1:])
        if resp is not None:
            self.rec.resp.append(resp)
        self.k = n_end

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

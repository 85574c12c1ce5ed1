"""Closed-form responses of the governor models (governors.py) and the energy lower bound
used by the nadir rows.

Shapes: a time argument t of shape S gives results of shape S + (N,), units on the last axis;
other per-unit arguments broadcast against S + (N,) (an (N,) array, or a scalar).

Closed forms. With T1 >= T2 the two time constants of a unit sorted, c = T2 - z, e_i =
e^(-tau/T_i) and dd = (e1 - e2) / (T1 - T2) (governors.decay_dd, stable when T1 = T2), the
unit-step response and its first two integrals at tau = t - D (all zero for tau <= 0) are
    g(tau)  = 1 - e1 - c dd
    G1(tau) = tau - T1 (1 - e1) - c (1 - T1 dd - e2)                 delivered energy
    G2(tau) = tau^2/2 - T1 tau + T1^2 (1 - e1) - c (tau - (T1 + T2)(1 - e2) + T1^2 dd)
(the divided differences of T(1 - e^(-tau/T)) and of its integral reduce to dd exactly, so
no formula divides by T1 - T2). Any demand that is a sum of delayed steps and ramps then has
an exact response: a ramp that reaches 1 in T_r gives y = (G1(t) - G1(t - T_r)) / T_r and
energy (G2(t) - G2(t - T_r)) / T_r. Accuracy (checked against 50-digit arithmetic): g to
~1e-15 absolute, G1 and G2 to ~1e-15 relative once t is a fair fraction of T1; for t << T1 the
terms (of size T1, T1^2) cancel, so the error stays absolute, ~1e-16 T1^2 (1e-13 MW s^2 per MW
at T1 = 30 s): far below any solver tolerance, though not relative. A ramp shorter than ~1e-9 s
loses digits to the difference quotient (give T_r = 0 for a step).

Hydro: the zero at +1/T_w makes g dip below zero before it rises to 1 (g(0+) = -2 for the
ideal model, T_g -> 0; with T_g > 0, g'(0+) = -2/T_g). g is 1 plus two decaying exponentials,
so it has at most two zeros: t = 0 and one crossing t_c (reverse_crossing_s); it is negative
on (0, t_c) and positive after. For lag, inverter and reheat (0 < F_hp <= 1) the impulse
response is non-negative, so g rises monotonically from 0 to 1 and t_c = 0. No step response
overshoots 1 (the impulse response changes sign at most once), so a demand that only rises,
limited to r, gives a mechanical response <= r; for lag, reheat and inverter any demand in
[0, r] does (h >= 0, integral 1), while hydro's output leaves [0, r] when its demand falls
(the reverse response works both ways).

Energy lower bound (energy_lower_bound). The energy delivered by t under a demand u(s) with
u(s) = 0 for s < 0 is E(t) = integral_0^t g(t - s) u(s) ds (swap the order of integration in
integral_0^t (h * u)). E is linear in u with kernel g(t - s). Where g >= 0 more demand never
delivers less energy; where g < 0 (hydro, before t_c) more demand delivers less. So for any
demand between two envelopes, lo(s) <= u(s) <= hi(s),
    E(t) >= integral g+(t - s) lo(s) ds - integral g-(t - s) hi(s) ds
          = conv(g, lo) - conv(g-, hi - lo),     g+ = max(g, 0), g- = max(-g, 0),
and this is attained (so it is the best bound) by the demand equal to lo where g(t - s) >= 0
and to hi where it is negative. conv(g-, .) has closed forms through G1, G2 at t_c.

How a planner's linear nadir row uses it (nadir_energy_coef). Swing equation on the system's
stored energy H (MW s), deviation x = |df| in the event's direction, step dP, no load damping
(damping only lowers x, so leaving it out is conservative):
    (2 H / f_n) x(t) = dP t - sum_i E_i(t).
x(t) <= N for all t  <=>  sum_i E_i(t) >= dP t - 2 H N / f_n  (the required energy) for all t.
Suppose x first reaches N at t_N. Before t_N, unit i's demand u_i = min(K_i (x - d_i)^+, r_i)
(gain K_i MW/Hz, dead band d_i, headroom r_i) is at most q_i = min(r_i, K_i (N - d_i)^+): hi
= q_i. And x cannot have risen faster than a bound rho >= dx/dt (the initial RoCoF
f_n dP / (2 H) when no response is negative; with hydro add f_n / (2 H) sum_i q_i |min g_i|,
using any upper bound of q_i), so x(s) >= N - rho (t_N - s): unit i's demand is at least q_i
times a ramp that starts at t_N - (N - d_i)/rho and reaches 1 at t_N (when r_i caps q_i the
true lower envelope reaches r_i sooner, so this ramp is still below it): lo. Then
E_i(t_N) >= q_i e_i(t_N) with e_i = nadir_energy_coef(t_N), linear in q_i, and the row
    sum_i q_i e_i(t_k) >= dP t_k - 2 H N / f_n          (q_i <= r_i, q_i <= K_i (N - d_i)^+)
held (with a margin) at the candidate times t_k leaves no first crossing there (x <= rho t, so
no row is needed before N / rho; from 2 H N / (f_n dP) >= N / rho on, the ramps start at or
after 0). Between the rows' time points the bound is not enforced: the rows are a
conservative filter and the simulation of the allocation decides (formulation.md).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from optreserve.dynamics.governors import GovernorSet, decay_dd


class Envelope(NamedTuple):
    """Demand amplitude * clip((s - start_s) / ramp_s, 0, 1) for s >= 0 (ramp_s = 0: a step
    at start_s); zero before t = 0. Fields broadcast against S + (N,)."""

    amplitude: object = 1.0
    start_s: object = 0.0
    ramp_s: object = 0.0


FULL = Envelope(1.0, 0.0, 0.0)  # demand at its bound from t = 0
ZERO = Envelope(0.0, 0.0, 0.0)


def _sorted(gov: GovernorSet):
    T1, T2 = np.maximum(gov.t1, gov.t2), np.minimum(gov.t1, gov.t2)
    return T1, T2, T2 - gov.z


def _integral(gov: GovernorSet, t, k: int) -> np.ndarray:
    """g (k=0), G1 (k=1) or G2 (k=2) at t (broadcast against (N,)), delay included."""
    T1, T2, c = _sorted(gov)
    tau = np.maximum(np.asarray(t, float) - gov.delay_s, 0.0)
    e1, dd = np.exp(-tau / T1), decay_dd(tau, T1, T2)
    if k == 0:
        return 1.0 - e1 - c * dd
    om1, om2 = -np.expm1(-tau / T1), -np.expm1(-tau / T2)
    if k == 1:
        return tau - T1 * om1 - c * (om2 - T1 * dd)
    return (0.5 * tau ** 2 - T1 * tau + T1 ** 2 * om1
            - c * (tau - (T1 + T2) * om2 + T1 ** 2 * dd))


def step_response(gov: GovernorSet, t) -> np.ndarray:
    """g(t): mechanical power change per MW of a demand step at t = 0; S + (N,)."""
    return _integral(gov, np.asarray(t, float)[..., None], 0)


def step_energy(gov: GovernorSet, t) -> np.ndarray:
    """E(t) = integral_0^t g, MW s per MW of demand step; S + (N,)."""
    return _integral(gov, np.asarray(t, float)[..., None], 1)


def _impulse(gov: GovernorSet, t) -> np.ndarray:
    tt = np.asarray(t, float) - gov.delay_s
    tau = np.maximum(tt, 0.0)
    h = gov.a / gov.t1 * np.exp(-tau / gov.t1) + gov.b * decay_dd(tau, gov.t1, gov.t2)
    return np.where(tt >= 0, h, 0.0)


def impulse_response(gov: GovernorSet, t) -> np.ndarray:
    """h(t) = g'(t) = C e^(A tau) B = (a/t1) e^(-tau/t1) + b dd(tau; t1, t2) for
    tau = t - D >= 0 (zero before); S + (N,)."""
    return _impulse(gov, np.asarray(t, float)[..., None])


def _conv(gov: GovernorSet, t, env: Envelope, k: int, F=_integral) -> np.ndarray:
    """Response to the envelope's demand: power (k=0) or energy (k=1), F the step response's
    integrals (_integral, or those of g- from _neg_part). t broadcasts with (N,)."""
    amp, start, ramp = (np.asarray(x, float) for x in env)
    t = np.asarray(t, float)
    safe = np.where(ramp > 0, ramp, 1.0)
    a = np.maximum(start, 0.0)
    e = np.maximum(start + ramp, 0.0)
    u0 = np.where(ramp > 0, np.clip(-start / safe, 0.0, 1.0), start <= 0)  # demand at t = 0
    # for s >= 0 the demand is u0 + [(s - a)^+ - (s - e)^+] / ramp (a step when ramp = 0)
    ramp_part = np.where(ramp > 0, (F(gov, t - a, k + 1) - F(gov, t - e, k + 1)) / safe,
                         np.where(start > 0, F(gov, t - start, k), 0.0))
    return amp * (u0 * F(gov, t, k) + ramp_part)


def ramp_response(gov: GovernorSet, t, ramp_s) -> np.ndarray:
    """Power per MW for the demand u(t) = min(t / ramp_s, 1) (ramp_s = 0: a step); S + (N,)."""
    return _conv(gov, np.asarray(t, float)[..., None], Envelope(1.0, 0.0, ramp_s), 0)


def ramp_energy(gov: GovernorSet, t, ramp_s) -> np.ndarray:
    """Energy (MW s per MW) delivered by t for the demand min(t / ramp_s, 1); S + (N,)."""
    return _conv(gov, np.asarray(t, float)[..., None], Envelope(1.0, 0.0, ramp_s), 1)


def reverse_crossing_s(gov: GovernorSet) -> np.ndarray:
    """(N,) time after the delay at which g first turns positive: t_c > 0 for hydro (a zero
    z < 0), 0 for the models without reverse response. Bisection on the closed form
    (g < 0 on (0, t_c), > 0 after, see the module docstring), to machine precision."""
    nm = gov.z < 0
    g0 = GovernorSet(gov.kind, gov.t1, gov.t2, gov.z, np.zeros(gov.n))  # delay out
    lo = np.zeros(gov.n)
    hi = np.where(nm, 2.0 * (gov.t1 + gov.t2 - gov.z), 0.0)
    for _ in range(64):  # widen until g(hi) > 0 (doubles; a few passes in practice)
        short = nm & (_integral(g0, hi, 0) <= 0)
        if not short.any():
            break
        lo, hi = np.where(short, hi, lo), np.where(short, 2.0 * hi, hi)
    for _ in range(100):  # bisection; stops when no interval shrinks any more
        mid = 0.5 * (lo + hi)
        neg = _integral(g0, mid, 0) <= 0
        lo2, hi2 = np.where(nm & neg, mid, lo), np.where(nm & ~neg, mid, hi)
        if np.array_equal(lo2, lo) and np.array_equal(hi2, hi):
            break
        lo, hi = lo2, hi2
    return np.where(nm, hi, 0.0)


def min_step_response(gov: GovernorSet) -> np.ndarray:
    """(N,) min over t of g(t) (<= 0; -|reverse dip| for hydro, 0 otherwise): found where the
    impulse response changes sign inside (0, t_c)."""
    tc = reverse_crossing_s(gov)
    g0 = GovernorSet(gov.kind, gov.t1, gov.t2, gov.z, np.zeros(gov.n))
    lo, hi = np.zeros(gov.n), tc.copy()
    for _ in range(100):
        mid = 0.5 * (lo + hi)
        falling = _impulse(g0, mid) < 0
        lo2, hi2 = np.where(falling, mid, lo), np.where(falling, hi, mid)
        if np.array_equal(lo2, lo) and np.array_equal(hi2, hi):
            break
        lo, hi = lo2, hi2
    return np.minimum(_integral(g0, 0.5 * (lo + hi), 0), 0.0)


def _neg_part(gov: GovernorSet):
    """Integrals of g- = max(-g, 0) as a function like _integral: g- itself (k=0),
    N1 = -G1(min(tau, t_c)) (k=1), N2 = -G2(min(tau, t_c)) - G1(t_c) (tau - t_c)^+ (k=2)."""
    tc = reverse_crossing_s(gov) + gov.delay_s  # in t; zero width for the monotone models
    g1_tc = _integral(gov, tc, 1)

    def F(_gov, t, k):
        t = np.asarray(t, float)
        tm = np.minimum(t, tc)
        if k == 0:
            return np.maximum(-_integral(gov, t, 0), 0.0) * (t < tc)
        if k == 1:
            return -_integral(gov, tm, 1)
        return -_integral(gov, tm, 2) - g1_tc * np.maximum(t - tc, 0.0)
    return F


def energy_lower_bound(gov: GovernorSet, t, lo: Envelope = ZERO,
                       hi: Envelope = FULL) -> np.ndarray:
    """Per unit, the least energy (MW s per unit of demand) delivered by t under any demand u
    with lo(s) <= u(s) <= hi(s): conv(g, lo) - conv(g-, hi - lo); S + (N,). Exact for the
    worst demand (see the module docstring); equals conv(g, lo) for the models whose g >= 0."""
    tt = np.asarray(t, float)[..., None]
    out = _conv(gov, tt, lo, 1)
    rev = np.nonzero(gov.z < 0)[0]  # only these have a negative part (module docstring)
    if rev.size:
        sub = gov.subset(rev)
        shape = out.shape
        pick = lambda e: Envelope(*(np.broadcast_to(np.asarray(x, float), shape)[..., rev]
                                    for x in e))
        neg = _neg_part(sub)
        out[..., rev] += (_conv(sub, tt, pick(lo), 1, neg) - _conv(sub, tt, pick(hi), 1, neg))
    return out


def nadir_energy_coef(gov: GovernorSet, t, reach_hz, rocof_hz_per_s) -> np.ndarray:
    """Coefficient e_i(t) of the nadir row sum_i q_i e_i(t) >= dP t - 2 H N / f_n: the least
    energy per MW of q_i delivered by t if the deviation first reaches the limit at t, given
    reach_hz = (N - d_i)^+ (limit minus dead band, (N,) or S + (N,)) and rocof_hz_per_s an
    upper bound of the rate of change of frequency before t (broadcast with t to S). Demand
    envelopes: lo = ramp from t - reach/rocof to t, hi = 1 (module docstring)."""
    t = np.asarray(t, float)
    rocof = np.asarray(rocof_hz_per_s, float)
    if np.any(~(rocof > 0)):
        raise ValueError("rocof_hz_per_s must be positive (an upper bound of the RoCoF)")
    t, rocof = np.broadcast_arrays(t, rocof)
    ramp = np.asarray(reach_hz, float) / rocof[..., None]
    lo = Envelope(1.0, t[..., None] - ramp, ramp)
    return energy_lower_bound(gov, t, lo, FULL)

"""Governor-turbine models of the case format (version 2), vectorised over units.

Each unit's mechanical power change follows its droop demand u(t) through one of four linear
systems (case-format "Governor models"):

    lag       1 / (1 + s tau)                                  tau = activation_time_s / 4
    reheat    1 / (1 + s T_g) * (1 + s F_hp T_rh) / (1 + s T_rh)
    hydro     1 / (1 + s T_g) * (1 - s T_w) / (1 + s T_w / 2)
    inverter  e^(-s delay) / (1 + s T_g)

All four are one family, H(s) = e^(-s D) (1 + s z) / ((1 + s t1)(1 + s t2)), held per unit as
the arrays t1 (first stage: tau or T_g), t2 (second stage: T_rh, T_w/2; = t1 for lag and
inverter), z (the zero: F_hp T_rh, -T_w; = t2 for lag and inverter, so it cancels the second
pole) and D (delay_s, inverter only). One family means one state-space form, one exact
discretisation and one set of closed forms (response.py) with no branch per model in the hot
paths, which stay loops over neither units nor models.

State space (cascade, two states per unit; lag and inverter leave x2 unobserved):
    t1 x1' = u(t - D) - x1        (governor / valve / converter control)
    t2 x2' = x1 - x2              (reheater, or the water column's lag)
    y      = a x1 + b x2,   a = z / t2, b = 1 - z / t2
(reheat: a = F_hp, b = 1 - F_hp; hydro: a = -2, b = 3, because (1 - sT_w)/(1 + sT_w/2) =
-2 + 3/(1 + sT_w/2)). A simulator's limiter belongs on the demand u: no step response
overshoots, so a rising demand limited to the headroom keeps the mechanical response within
it (response.py says when hydro does not).

The exact zero-order-hold step (ZOH) makes a simulator with demand held constant over each
step of length h exact, including a delay that is not a multiple of h (the step is split at
the delay's fraction; see ZOH).

Parameter bounds are in BOUNDS, one table for the reader, the docs and the tests.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import pandas as pd

MODELS = ("lag", "reheat", "hydro", "inverter")
LAG, REHEAT, HYDRO, INVERTER = range(4)
# tau = activation_time_s / 4: a first-order lag delivers 1 - e^-4 = 98.2 % of a step by the
# activation time (as version 1 and simulate.py)
LAG_PER_ACTIVATION = 0.25

# Accepted range per column: (low, high, low included, why). Time constants have a floor
# because the simulator's integrator must resolve them: a 1e-30 s lag is a stiff mode that makes
# a variable-step solver crawl or hang, while a real governor loop is never faster than about
# half a cycle (10 ms). Ceilings reject unit mistakes (ms typed as s) with a wide margin over
# typical values (Kundur, Power System Stability and Control, ch. 9 and 11, from memory:
# T_g 0.1-0.3 s, T_rh 4-10 s, F_hp about 0.3, T_w 0.5-4 s at full load).
BOUNDS: dict[str, tuple[float, float, bool, str]] = {
    "activation_time_s": (0.04, 120.0, True, "tau = activation_time_s/4 in [0.01, 30] s"),
    "governor_lag_s": (0.01, 30.0, True, ("faster than 10 ms is no governor loop; "
                                          "slower than 30 s is no primary response")),
    "reheat_time_s": (0.1, 50.0, True, "typical 4-10 s"),
    "hp_fraction": (0.0, 1.0, False, "0 < F_hp <= 1 (share of the HP stage)"),
    "water_time_s": (0.05, 10.0, True, "typical 0.5-4 s at full load"),
    "delay_s": (0.0, 5.0, True, "measurement and control delay; > 5 s is no primary response"),
}
# which columns each model needs (delay_s is optional: 0)
REQUIRED = {"lag": ("activation_time_s",), "reheat": ("governor_lag_s", "reheat_time_s",
            "hp_fraction"), "hydro": ("governor_lag_s", "water_time_s"),
            "inverter": ("governor_lag_s",)}


class GovernorProblem(NamedTuple):
    """One input finding: positional unit index (0-based), column, message."""

    unit: int
    column: str
    message: str


class GovernorInputError(ValueError):
    """Raised by GovernorSet.from_table(strict=True); carries every problem found."""

    def __init__(self, problems: list[GovernorProblem]):
        self.problems = list(problems)
        p = self.problems[0]
        more = f" (+{len(self.problems) - 1} more)" if len(self.problems) > 1 else ""
        super().__init__(f"unit {p.unit} column {p.column}: {p.message}{more}")


def _range_problems(column: str, values: np.ndarray, needed: np.ndarray) -> list[GovernorProblem]:
    lo, hi, lo_in, why = BOUNDS[column]
    v = np.asarray(values, float)
    given = ~np.isnan(v)
    bad_lo = given & ((v < lo) if lo_in else (v <= lo))
    bad = given & (bad_lo | (v > hi) | ~np.isfinite(v))
    out = [GovernorProblem(int(i), column, f"{v[i]:g} outside {'[' if lo_in else '('}{lo:g}, "
                           f"{hi:g}] ({why})") for i in np.nonzero(bad)[0]]
    out += [GovernorProblem(int(i), column, "missing (needed by the unit's governor model)")
            for i in np.nonzero(needed & ~given)[0]]
    return out


def check_table(units: pd.DataFrame, mask: np.ndarray | None = None) -> list[GovernorProblem]:
    """Every problem of the governor columns of a units table (absent column = all NaN).

    mask (N,) bool: units whose parameters must be complete (e.g. the responding ones);
    out-of-range values are reported for every unit. Problems are sorted by unit, then column."""
    n = len(units)
    mask = np.ones(n, bool) if mask is None else np.asarray(mask, bool)
    names = _names(units)
    known = np.isin(names, MODELS)
    probs = [GovernorProblem(int(i), "governor", f"unknown model {names[i]!r} (one of "
                             f"{', '.join(MODELS)})") for i in np.nonzero(~known)[0]]
    for col in BOUNDS:
        need = np.zeros(n, bool)
        for model, cols in REQUIRED.items():
            if col in cols:
                need |= names == model
        probs += _range_problems(col, _col(units, col), need & mask)
    d = _col(units, "delay_s")
    for i in np.nonzero((names != "inverter") & known & (np.nan_to_num(d) != 0))[0]:
        probs.append(GovernorProblem(int(i), "delay_s", f"applies to inverter only "
                                     f"(unit's governor is {names[i]})"))
    return sorted(probs)


def _col(units: pd.DataFrame, col: str) -> np.ndarray:
    if col not in units:
        return np.full(len(units), np.nan)
    return pd.to_numeric(units[col], errors="coerce").to_numpy(float)


def _names(units: pd.DataFrame) -> np.ndarray:
    if "governor" not in units:
        return np.full(len(units), "lag", dtype=object)
    s = units["governor"].astype("string").str.strip().str.lower()
    return s.fillna("lag").replace("", "lag").to_numpy(object)


@dataclass(frozen=True)
class GovernorSet:
    """Governor models of N units (arrays of shape (N,)), in the common form
    e^(-s D) (1 + s z) / ((1 + s t1)(1 + s t2)); kind holds the model code (LAG...INVERTER)."""

    kind: np.ndarray  # (N,) int8
    t1: np.ndarray  # (N,) s, first stage: tau (lag) or T_g
    t2: np.ndarray  # (N,) s, second stage: T_rh, T_w/2, or = t1 (lag, inverter)
    z: np.ndarray  # (N,) s, zero: F_hp T_rh, -T_w, or = t2 (cancels: lag, inverter)
    delay_s: np.ndarray  # (N,) s, pure input delay (inverter; 0 otherwise)

    def __post_init__(self):
        for f in ("t1", "t2", "z", "delay_s"):
            object.__setattr__(self, f, np.asarray(getattr(self, f), float).reshape(-1))
        object.__setattr__(self, "kind", np.asarray(self.kind, np.int8).reshape(-1))
        if not (np.all((self.kind >= 0) & (self.kind < len(MODELS)))
                and all(len(getattr(self, f)) == self.n for f in ("t1", "t2", "z", "delay_s"))):
            raise ValueError("kind must be model codes 0..3 and all arrays of one length")
        # the closed forms and the ZOH divide by t1 and t2: refuse what no bound would pass
        if not (np.all(self.t1 > 0) and np.all(self.t2 > 0) and np.all(np.isfinite(self.z))
                and np.all(self.delay_s >= 0) and np.all(np.isfinite(self.delay_s))):
            raise ValueError("governor time constants must be positive and finite, delay >= 0")

    @property
    def n(self) -> int:
        return len(self.kind)

    @property
    def a(self) -> np.ndarray:
        """Direct share of the first stage in the output (F_hp, -2, or 1)."""
        return self.z / self.t2

    @property
    def b(self) -> np.ndarray:
        """Share of the second stage (1 - F_hp, 3, or 0)."""
        return 1.0 - self.z / self.t2

    @classmethod
    def from_arrays(cls, kind, tau_s=np.nan, governor_lag_s=np.nan, reheat_time_s=np.nan,
                    hp_fraction=np.nan, water_time_s=np.nan, delay_s=0.0) -> GovernorSet:
        """From per-unit arrays (scalars broadcast); kind: model names or codes. tau_s is the
        lag model's time constant (activation_time_s / 4). Unused entries may be NaN."""
        k = np.asarray(kind).reshape(-1)
        if k.dtype.kind in "OUS":
            codes = np.full(len(k), -1, np.int8)
            for code, name in enumerate(MODELS):
                codes[k == name] = code
            if np.any(codes < 0):
                raise ValueError(f"unknown governor model(s) {set(k[codes < 0])}")
            k = codes
        k = np.asarray(k, np.int8)
        n = len(k)
        tau, tg, trh, fhp, tw, dl = (np.broadcast_to(np.asarray(x, float), (n,)) for x in
                                     (tau_s, governor_lag_s, reheat_time_s, hp_fraction,
                                      water_time_s, delay_s))
        t1 = np.where(k == LAG, tau, tg)
        t2 = np.select([k == REHEAT, k == HYDRO], [trh, 0.5 * tw], t1)
        z = np.select([k == REHEAT, k == HYDRO], [fhp * trh, -tw], t2)
        return cls(k, t1, t2, z, np.where(k == INVERTER, np.nan_to_num(dl), 0.0))

    @classmethod
    def from_table(cls, units: pd.DataFrame, default_activation_time_s: float | None = None,
                   mask: np.ndarray | None = None, strict: bool = True) -> GovernorSet:
        """From a units table with the case-format columns (NaN or absent = not given).

        default_activation_time_s fills a lag unit's missing activation_time_s (the caller
        warns); mask as in check_table. strict: raise GovernorInputError on any problem;
        otherwise units with problems (or outside mask) get a harmless 1 s lag."""
        u = units
        if default_activation_time_s is not None:
            u = units.copy()
            act = _col(units, "activation_time_s")
            u["activation_time_s"] = np.where(np.isnan(act), default_activation_time_s, act)
        probs = check_table(u, mask)
        if strict and probs:
            raise GovernorInputError(probs)
        names = _names(u)
        bad = np.zeros(len(u), bool)
        bad[[p.unit for p in probs]] = True
        if mask is not None:
            bad |= ~np.asarray(mask, bool)
        names = np.where(bad, "lag", names)
        act = np.where(bad, 4.0, _col(u, "activation_time_s"))
        return cls.from_arrays(names, LAG_PER_ACTIVATION * act, _col(u, "governor_lag_s"),
                               _col(u, "reheat_time_s"), _col(u, "hp_fraction"),
                               _col(u, "water_time_s"), np.nan_to_num(_col(u, "delay_s")))

    def subset(self, idx) -> GovernorSet:
        """The units idx (index or boolean array), in that order."""
        return GovernorSet(self.kind[idx], self.t1[idx], self.t2[idx], self.z[idx],
                           self.delay_s[idx])

    def state_space(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Continuous-time (A (N,2,2), B (N,2), C (N,2), delay_s (N,)); D = 0 and the delay
        acts on the input: x' = A x + B u(t - delay), y = C x."""
        n = self.n
        A = np.zeros((n, 2, 2))
        A[:, 0, 0] = -1.0 / self.t1
        A[:, 1, 0] = 1.0 / self.t2
        A[:, 1, 1] = -1.0 / self.t2
        B = np.zeros((n, 2))
        B[:, 0] = 1.0 / self.t1
        return A, B, np.stack([self.a, self.b], axis=1), self.delay_s.copy()

    def zoh(self, h: float) -> ZOH:
        """Exact zero-order-hold discretisation for the fixed step h (s)."""
        return ZOH.build(self, h)

    def initial_state(self, h: float) -> GovernorState:
        """At rest (no demand before t = 0), with room for the delay's input history."""
        return self.zoh(h).initial_state()

    def advance(self, state: GovernorState, u: np.ndarray, h: float) -> GovernorState:
        """One exact step of length h with demand u (N,) held over it (see ZOH.advance)."""
        return self.zoh(h).advance(state, u)

    def output(self, state: GovernorState) -> np.ndarray:
        """Mechanical power change (N,) at the state's time, per MW of demand: y = C x."""
        return self.a * state.x[:, 0] + self.b * state.x[:, 1]


def exprel(x):
    """(e^x - 1) / x, 1 at x = 0, from numpy's expm1 (accurate for small x; within 2 ulp of
    scipy.special.exprel, whose import alone costs a snapshot solve about 0.1 s)."""
    x = np.asarray(x, float)
    with np.errstate(invalid="ignore", divide="ignore"):
        r = np.expm1(x) / x
    return np.where(x == 0.0, 1.0, r)


def decay_dd(t, t1, t2):
    """(e^(-t/t1) - e^(-t/t2)) / (t1 - t2), the divided difference in the time constant,
    stable when t1 and t2 coincide (limit t e^(-t/t)/t^2) and free of overflow: the larger
    constant goes first so exprel sees a non-positive argument."""
    ta, tb = np.maximum(t1, t2), np.minimum(t1, t2)
    y = t * (tb - ta) / (ta * tb)
    return np.exp(-t / ta) * exprel(y) * t / (ta * tb)


class GovernorState(NamedTuple):
    """x (N,2) the two states; u_past (L,N) the last L held demands, newest first
    (only what the delays need; L >= 1)."""

    x: np.ndarray
    u_past: np.ndarray


@dataclass(frozen=True)
class ZOH:
    """Exact step of length h for demand held constant over each step.

    With the delay D = m h + delta (0 <= delta < h), the delayed demand over step k is
    u[k-m-1] for the first delta and u[k-m] for the rest, so
        x[k+1] = Phi x[k] + Gamma(h - delta) u[k-m] + Phi(h - delta) Gamma(delta) u[k-m-1],
    which is exact (a D that is a multiple of h gives delta = 0 and the second term vanishes).
    """

    h: float
    phi: np.ndarray  # (N,2,2)
    g_now: np.ndarray  # (N,2) weight of u[k-m]
    g_prev: np.ndarray  # (N,2) weight of u[k-m-1]
    lag_steps: np.ndarray  # (N,) int, m

    @staticmethod
    def _blocks(t1, t2, h):
        """Phi(h) (N,2,2) and Gamma(h) (N,2) of the cascade in closed form (lower
        triangular: Phi21 = t1 dd, Gamma2 = the two-lag step response 1 - e1 - t2 dd)."""
        e1, e2 = np.exp(-h / t1), np.exp(-h / t2)
        dd = decay_dd(h, t1, t2)
        phi = np.zeros(np.shape(t1) + (2, 2))
        phi[..., 0, 0], phi[..., 1, 0], phi[..., 1, 1] = e1, t1 * dd, e2
        gam = np.stack([-np.expm1(-h / t1), -np.expm1(-h / t1) - t2 * dd], axis=-1)
        return phi, gam

    @classmethod
    def build(cls, gov: GovernorSet, h: float) -> ZOH:
        if not h > 0:
            raise ValueError("step h must be positive")
        m = np.floor(gov.delay_s / h + 1e-12).astype(int)  # 1e-12: D = k h exactly -> m = k
        delta = np.clip(gov.delay_s - m * h, 0.0, h)
        phi, _ = cls._blocks(gov.t1, gov.t2, h)
        phi_r, g_r = cls._blocks(gov.t1, gov.t2, h - delta)
        _, g_d = cls._blocks(gov.t1, gov.t2, delta)
        return cls(float(h), phi, g_r, np.einsum("nij,nj->ni", phi_r, g_d), m)

    def initial_state(self) -> GovernorState:
        n = len(self.lag_steps)
        L = int(self.lag_steps.max(initial=0)) + 1
        return GovernorState(np.zeros((n, 2)), np.zeros((L, n)))

    def advance(self, state: GovernorState, u: np.ndarray) -> GovernorState:
        """State one step later; u (N,) the demand (per unit, MW or per MW) held over the
        step. Inputs before t = 0 are zero (system at rest)."""
        u = np.broadcast_to(np.asarray(u, float), (len(self.lag_steps),))
        full = np.vstack([u[None, :], state.u_past])  # row j: u[k-j]
        idx = np.arange(len(u))
        u_now, u_prev = full[self.lag_steps, idx], full[self.lag_steps + 1, idx]
        x = (np.einsum("nij,nj->ni", self.phi, state.x) + self.g_now * u_now[:, None]
             + self.g_prev * u_prev[:, None])
        return GovernorState(x, full[:-1])

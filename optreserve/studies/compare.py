"""Uniform-droop comparison: what a simple policy would cost and which limits it would break.

The policy: every capable provider runs at one droop, its headroom sized by the full-activation
rule (`r = (F_act - d)^+ K`, capped at the room it has). Units with `droop_now_pct` keep
today's setting; the others share one droop `s`, the largest inside every one of their bands
that meets all limits (settled deviation, links, own reserve, nadir, full activation). If no
such droop exists, the one breaking the fewest limits is taken, the largest among equals.

Settled points and flows come from the independent calculation (settle.py), not from the
optimiser. docs/formulation.md ("Uniform-droop comparison") says the same in maths.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from optreserve.case.data import Case
from optreserve.model.horizon import Horizon, prepare
from optreserve.model.nadir import nadir_shortfall
from optreserve.output.results import CAUTION, Result

# grid of the common droop when the case has no steps_pct
GRID_STEP_PCT = 0.01
MAX_CANDIDATES = 400
# a limit counts as broken beyond these (the same as solve's verification)
SETTLED_TOL_HZ = 1e-5
LINK_TOL_MW = 1e-3
RESERVE_TOL_MW = 1e-6


@dataclass
class Comparison:
    """summary: one row per policy (uniform, optimum); violations: one row per broken limit of
    the uniform policy; allocation: the uniform policy per unit (and period)."""

    summary: pd.DataFrame
    violations: pd.DataFrame
    allocation: pd.DataFrame
    uniform_droop_pct: float | None  # the shared droop (None: every unit kept droop_now_pct)
    rule: str

    def to_json(self) -> dict:
        s = self.summary.set_index("policy")
        cost = "cost_per_h" if "cost_per_h" in s.columns else "cost_total"
        return {
            "rule": self.rule,
            "uniform_droop_pct": self.uniform_droop_pct,
            "cost_column": cost,
            "uniform_cost": _f(s.loc["uniform", cost]),
            "optimum_cost": _f(s.loc["optimum", cost]),
            "saving": _f(s.loc["optimum", "saving"]),
            "saving_pct": _f(s.loc["optimum", "saving_pct"]),
            "uniform_limits_broken": int(s.loc["uniform", "limits_broken"]),
            "violations": [{k: (_f(v) if isinstance(v, float) else v) for k, v in r.items()}
                           for r in self.violations.to_dict(orient="records")],
            "caution": CAUTION,
        }

    def lines(self) -> list[str]:
        """A short plain-text report."""
        j = self.to_json()
        unit = " per hour" if j["cost_column"] == "cost_per_h" else " in total"
        out = [f"uniform droop: {self.rule}; cost {j['uniform_cost']:.2f}{unit}"]
        v = self.violations
        if len(v):
            out.append(f"  breaks {len(v)} limit(s):")
            for r in v.head(10).itertuples():
                when = f" in {r.period}" if "period" in v.columns and r.period else ""
                after = f" after {r.event}" if r.event and r.event != r.element else ""
                what = (f"{r.value:.4g} {r.quantity_unit}" if r.limit == "nadir_energy" else
                        f"{r.value:.4g} against {r.limit_value:.4g} {r.quantity_unit}")
                out.append(f"    {r.limit} {r.element}{after}{when}: {what}")
            if len(v) > 10:
                out.append(f"    ... and {len(v) - 10} more (comparison.json)")
        else:
            out.append("  meets every limit")
        pct = "" if j["saving_pct"] is None else f" ({j['saving_pct']:.1f} %)"
        out.append(f"optimum: cost {j['optimum_cost']:.2f}{unit}; saving {j['saving']:.2f}"
                   f"{unit}{pct} against the uniform droop")
        return out


def _f(v):
    v = float(v)
    return v if np.isfinite(v) else None


def compare_uniform(case: Case, result: Result | None = None, **solve_kw) -> Comparison:
    """Cost and broken limits of the uniform-droop policy against the optimum (`result`, or a
    fresh solve with `solve_kw`)."""
    if result is None:
        from optreserve.solver.run import solve

        result = solve(case, **solve_kw)
    hz = prepare(case)
    u = case.units
    capable = hz.capable_b.any(axis=0)
    now = u["droop_now_pct"].to_numpy(float)
    fixed = capable & np.isfinite(now)
    free = capable & ~np.isfinite(now)
    lo_b, hi_b = u["droop_min_pct"].to_numpy(float), u["droop_max_pct"].to_numpy(float)

    def droops(s: float) -> np.ndarray:
        d = np.where(fixed, now, np.nan)
        return np.where(free, np.clip(s, lo_b, hi_b), d)

    best_s = None
    if free.any():
        lo, hi = lo_b[free].max(), hi_b[free].min()
        if lo > hi:  # the bands do not overlap: the shared droop is clipped into each band
            lo, hi = lo_b[free].min(), hi_b[free].max()
        cands = _candidates(case, lo, hi)
        scores = [_evaluate(case, hz, droops(s), capable)[4] for s in cands]
        # fewest broken limits, then the largest droop (the cheapest headroom)
        k = min(range(len(cands)), key=lambda i: (len(scores[i]), -cands[i]))
        best_s = float(cands[k])
        rule = f"{best_s:g} % on every capable unit" + (
            " without droop_now_pct (today's setting elsewhere)" if fixed.any() else "")
    else:
        rule = "droop_now_pct on every capable unit"
    s_units = droops(best_s if best_s is not None else np.nan)
    gain, r_up, r_dn, cost_t, viol = _evaluate(case, hz, s_units, capable)
    hours = hz.hours
    uni_cost = float((cost_t * hours[:, None]).sum())
    opt_cost = result.objective_total if case.is_horizon else result.objective_per_h
    cost_col = "cost_total" if case.is_horizon else "cost_per_h"
    def peak(r):
        return float(r.sum(axis=1).max(initial=0.0))

    opt_alloc = result.allocation
    if case.is_horizon:
        opt_up = float(opt_alloc.groupby("period", sort=False)["headroom_up_mw"].sum().max())
        opt_dn = float(opt_alloc.groupby("period", sort=False)["headroom_down_mw"].sum().max())
    else:
        opt_up, opt_dn = float(opt_alloc["headroom_up_mw"].sum()), float(
            opt_alloc["headroom_down_mw"].sum())
    saving = uni_cost - opt_cost
    summary = pd.DataFrame({
        "policy": ["uniform", "optimum"],
        "droop_rule": [rule, "optimised per unit"],
        cost_col: [uni_cost, opt_cost],
        "units_providing": [int((gain > 0).any(axis=0).sum()),
                            int(opt_alloc.loc[opt_alloc["provides"], "unit"].nunique())],
        "headroom_up_mw": [peak(r_up), opt_up],
        "headroom_down_mw": [peak(r_dn), opt_dn],
        "limits_broken": [len(viol), 0],
        "saving": [0.0, saving],
        "saving_pct": [0.0, saving / uni_cost * 100.0 if uni_cost > 0 else np.nan],
    })
    cols = ["limit", "element", "event", "period", "value", "limit_value", "quantity_unit"]
    violations = pd.DataFrame(viol, columns=cols)
    T, N = gain.shape
    alloc = {"unit": np.tile(u["unit"].to_numpy(object), T),
             "area": np.tile(u["area"].to_numpy(object), T)}
    if case.is_horizon:
        alloc["period"] = np.repeat(np.array(case.periods, dtype=object), N)
    else:
        violations = violations.drop(columns="period")
    alloc.update({"provides": (gain > 0).reshape(-1),
                  "droop_pct": np.where(gain > 0, np.broadcast_to(s_units, (T, N)),
                                        np.nan).reshape(-1),
                  "gain_mw_per_hz": gain.reshape(-1), "headroom_up_mw": r_up.reshape(-1),
                  "headroom_down_mw": r_dn.reshape(-1), "cost_per_h": cost_t.reshape(-1)})
    return Comparison(summary, violations, pd.DataFrame(alloc), best_s, rule)


def _candidates(case: Case, lo: float, hi: float) -> np.ndarray:
    """Droops to try for the shared setting, largest first: the steps inside [lo, hi], or a
    grid of GRID_STEP_PCT (coarser when the range is wide) with both ends included."""
    if case.droop.steps_pct is not None:
        s = np.asarray(case.droop.steps_pct, float)
        s = s[(s >= lo - 1e-9) & (s <= hi + 1e-9)]
        if len(s):
            return s[::-1]
        return np.array([lo])  # no step fits: the band edge (reported like any other droop)
    step = max(GRID_STEP_PCT, (hi - lo) / MAX_CANDIDATES)
    grid = np.round(hi - step * np.arange(int(np.floor((hi - lo) / step + 1e-9)) + 1), 9)
    return np.unique(np.r_[grid, lo])[::-1]


def _evaluate(case: Case, hz: Horizon, droop_pct: np.ndarray, capable: np.ndarray):
    """Gains, headroom (T, N), cost per hour (T, N) and broken limits of one set of droops
    (NaN = no response), recalculated independently (settle.py)."""
    with np.errstate(invalid="ignore"):
        K = np.where(capable & np.isfinite(droop_pct),
                     case.gain_from_droop(np.where(np.isfinite(droop_pct), droop_pct, 1.0)), 0.0)
    gain = K[None, :] * hz.avail  # (T, N)
    want = hz.a_act[None, :] * gain  # full-activation headroom
    r_up = np.where(hz.need_up[:, None], np.minimum(want, hz.R_up), 0.0)
    r_dn = np.where(hz.need_dn[:, None], np.minimum(want, hz.R_dn), 0.0)
    cost = hz.price_up * r_up + hz.price_dn * r_dn
    from optreserve.solver.readback import (
        evaluate_allocation,  # settle.py: scalar balance and DC flows
    )

    pts = evaluate_allocation(case, hz, gain, r_up, r_dn)
    labels = [str(p) for p in case.periods] if case.is_horizon else [""] * hz.T
    units, areas = case.units["unit"].to_numpy(object), case.areas["area"].to_numpy(object)
    links = case.links["link"].to_numpy(object)
    F = case.limits.max_settled_deviation_hz
    viol = []
    dev = np.abs(pts.deviation_hz)
    for m in np.nonzero(~(dev <= F + SETTLED_TOL_HZ) & (hz.dP > 0))[0]:
        viol.append(("settled_deviation", hz.inst_name[m], hz.inst_name[m],
                     labels[hz.inst_t[m]], float(dev[m]), F, "Hz"))
    lim = hz.Fmax[hz.inst_t]
    over = np.abs(pts.flow_after_mw) - lim > LINK_TOL_MW * np.maximum(1.0, lim / 100.0)
    for m, li in zip(*np.nonzero(over)):
        viol.append(("link", links[li], hz.inst_name[m], labels[hz.inst_t[m]],
                     float(abs(pts.flow_after_mw[m, li])), float(lim[m, li]), "MW"))
    held = np.zeros_like(hz.own)
    np.add.at(held.T, hz.area, r_up.T)
    for t, a in zip(*np.nonzero(held < hz.own - RESERVE_TOL_MW)):
        viol.append(("own_reserve", areas[a], "", labels[t], float(held[t, a]),
                     float(hz.own[t, a]), "MW"))
    short = (want > hz.R_up + RESERVE_TOL_MW) & hz.need_up[:, None] | (
        want > hz.R_dn + RESERVE_TOL_MW) & hz.need_dn[:, None]
    for t, i in zip(*np.nonzero(short & (gain > 0))):
        viol.append(("full_activation", units[i], "", labels[t], float(want[t, i]),
                     float(min(hz.R_up[t, i] if hz.need_up[t] else np.inf,
                               hz.R_dn[t, i] if hz.need_dn[t] else np.inf)), "MW"))
    if case.limits.max_nadir_deviation_hz is not None:
        viol += _nadir_violations(case, hz, gain, r_up, r_dn, labels)
    return gain, r_up, r_dn, cost, viol


def _nadir_violations(case, hz, gain, r_up, r_dn, labels):
    """The nadir energy rows of the model (formulation.md section 15): what a provider
    delivers by the nadir is its headroom, but no more than its droop asks for at the nadir
    limit, K (N - d)^+. A row short by more than round-off is a broken limit (MW s short)."""
    reach = gain * np.maximum(case.limits.max_nadir_deviation_hz - hz.d_hz, 0.0)[None, :]
    short = nadir_shortfall(case, hz, np.minimum(r_up, reach), np.minimum(r_dn, reach))
    out = []
    for m in np.nonzero(np.isfinite(short) & (hz.dP > 0) & (short > 1e-6))[0]:
        out.append(("nadir_energy", hz.inst_name[m], hz.inst_name[m], labels[hz.inst_t[m]],
                    float(short[m]), 0.0, "MW s short"))
    return out

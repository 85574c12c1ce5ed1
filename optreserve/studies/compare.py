"""Uniform-droop comparison: what a simple policy would cost and which limits it would break,
with today's settings reported beside it.

The policy: every capable provider runs at one droop `s` (clipped into a unit's band where the
bands do not overlap), its headroom sized by the full-activation rule (`r = (F_act - d)^+ K`,
capped at the room it has). `s` is the least-cost candidate that meets all limits (settled
deviation, links, own reserve, nadir, full activation); if none does, the one breaking the
fewest limits, the cheapest among equals. Today's settings (droop_now_pct, the allocation
retune starts from: studies/today.py) are a separate row, never mixed into the policy.

Broken limits come from the one evaluation of verify/breaks.py (independent settled points
and DC flows, not the optimiser). docs/formulation.md ("Uniform-droop comparison") says the
same in maths.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from optreserve.case.data import Case
from optreserve.model.horizon import Horizon, prepare
from optreserve.model.nadir import nadir_shortfall
from optreserve.output.results import CAUTION, Result
from optreserve.studies.today import today
from optreserve.verify.breaks import evaluate, what_breaks

# grid of the common droop when the case has no steps_pct
GRID_STEP_PCT = 0.01
MAX_CANDIDATES = 400
# headroom the full-activation rule asks for beyond the room counts from this (MW)
RESERVE_TOL_MW = 1e-6
TODAY_RULE = "droop_now_pct as the case states it, headroom by the full-activation rule"


@dataclass
class Comparison:
    """summary: one row per policy (uniform, today when the case gives droop_now_pct,
    optimum); violations: one row per broken limit of the uniform policy; allocation: the
    uniform policy per unit (and period); today_violations: those of today's settings."""

    summary: pd.DataFrame
    violations: pd.DataFrame
    allocation: pd.DataFrame
    uniform_droop_pct: float | None  # the shared droop (None: no capable unit)
    rule: str
    today_violations: pd.DataFrame | None = None

    def to_json(self) -> dict:
        s = self.summary.set_index("policy")
        cost = "cost_per_h" if "cost_per_h" in s.columns else "cost_total"
        doc = {
            "rule": self.rule,
            "uniform_droop_pct": self.uniform_droop_pct,
            "cost_column": cost,
            "uniform_cost": _f(s.loc["uniform", cost]),
            "optimum_cost": _f(s.loc["optimum", cost]),
            "saving": _f(s.loc["optimum", "saving"]),
            "saving_pct": _f(s.loc["optimum", "saving_pct"]),
            "uniform_limits_broken": int(s.loc["uniform", "limits_broken"]),
            "violations": _records(self.violations),
            "today": None,
            "caution": CAUTION,
        }
        if self.today_violations is not None:
            doc["today"] = {"rule": TODAY_RULE, "cost": _f(s.loc["today", cost]),
                            "limits_broken": int(s.loc["today", "limits_broken"]),
                            "violations": _records(self.today_violations)}
        return doc

    def lines(self) -> list[str]:
        """A short plain-text report."""
        j = self.to_json()
        unit = " per hour" if j["cost_column"] == "cost_per_h" else " in total"
        out = [f"uniform droop: {self.rule}; cost {j['uniform_cost']:.2f}{unit}"]
        out += _broken_lines(self.violations)
        if j["today"] is not None:
            out.append(f"today's settings ({TODAY_RULE}): cost {j['today']['cost']:.2f}"
                       f"{unit}")
            out += _broken_lines(self.today_violations)
        pct = "" if j["saving_pct"] is None else f" ({j['saving_pct']:.1f} %)"
        out.append(f"optimum: cost {j['optimum_cost']:.2f}{unit}; saving {j['saving']:.2f}"
                   f"{unit}{pct} against the uniform droop")
        return out


def _records(v: pd.DataFrame) -> list[dict]:
    return [{k: (_f(x) if isinstance(x, float) else x) for k, x in r.items()}
            for r in v.to_dict(orient="records")]


def _broken_lines(v: pd.DataFrame) -> list[str]:
    if not len(v):
        return ["  meets every limit"]
    out = [f"  breaks {len(v)} limit{'s' if len(v) != 1 else ''}:"]
    for r in v.head(10).itertuples():
        when = f" in {r.period}" if "period" in v.columns and r.period else ""
        after = f" after {r.event}" if r.event and r.event != r.element else ""
        what = (f"{r.value:.4g} {r.quantity_unit}" if r.limit == "nadir_energy" else
                f"{r.value:.4g} against {r.limit_value:.4g} {r.quantity_unit}")
        out.append(f"    {r.limit} {r.element}{after}{when}: {what}")
    if len(v) > 10:
        out.append(f"    ... and {len(v) - 10} more (comparison.json)")
    return out


def _f(v):
    v = float(v)
    return v if np.isfinite(v) else None


def compare_uniform(case: Case, result: Result | None = None, **solve_kw) -> Comparison:
    """Cost and broken limits of the uniform-droop policy and of today's settings against the
    optimum (`result`, or a fresh solve with `solve_kw`)."""
    if result is None:
        from optreserve.solver.run import solve

        result = solve(case, **solve_kw)
    hz = prepare(case)
    u = case.units
    capable = hz.capable_b.any(axis=0)
    lo_b, hi_b = u["droop_min_pct"].to_numpy(float), u["droop_max_pct"].to_numpy(float)

    def droops(s: float) -> np.ndarray:
        return np.where(capable, np.clip(s, lo_b, hi_b), np.nan)

    best_s = None
    if capable.any():
        lo, hi = lo_b[capable].max(), hi_b[capable].min()
        if lo > hi:  # the bands do not overlap: the shared droop is clipped into each band
            lo, hi = lo_b[capable].min(), hi_b[capable].max()
        cands = _candidates(case, lo, hi)
        scores = []
        for c in cands:
            g, ru, rd, want = _from_droop(case, hz, droops(c), capable)
            scores.append((len(_violations(case, hz, g, ru, rd, want)),
                           _cost(hz, ru, rd)))
        # fewest broken limits, then the least cost (then the largest droop)
        k = min(range(len(cands)), key=lambda i: (scores[i][0], scores[i][1], -cands[i]))
        best_s = float(cands[k])
        rule = f"{best_s:g} % on every capable unit"
    else:
        rule = "no capable unit"
    gain, r_up, r_dn, want = _from_droop(case, hz, droops(best_s if best_s is not None
                                                          else np.nan), capable)
    viol = _violations(case, hz, gain, r_up, r_dn, want)
    s_units = droops(best_s if best_s is not None else np.nan)
    now = today(case, hz)
    has_today = bool(np.isfinite(now.droop_pct).any())
    now_viol = _violations(case, hz, now.gain, now.r_up, now.r_dn,
                           now.gain * hz.a_act[None, :]) if has_today else []
    uni_cost = _cost(hz, r_up, r_dn)
    now_cost = _cost(hz, now.r_up, now.r_dn)
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
    rows = [("uniform", rule, uni_cost, int((gain > 0).any(axis=0).sum()), peak(r_up),
             peak(r_dn), len(viol), 0.0, 0.0)]
    if has_today:
        rows.append(("today", TODAY_RULE, now_cost, int((now.gain > 0).any(axis=0).sum()),
                     peak(now.r_up), peak(now.r_dn), len(now_viol), np.nan, np.nan))
    rows.append(("optimum", "optimised per unit", opt_cost,
                 int(opt_alloc.loc[opt_alloc["provides"], "unit"].nunique()), opt_up, opt_dn,
                 0, saving, saving / uni_cost * 100.0 if uni_cost > 0 else np.nan))
    summary = pd.DataFrame(rows, columns=["policy", "droop_rule", cost_col, "units_providing",
                                          "headroom_up_mw", "headroom_down_mw",
                                          "limits_broken", "saving", "saving_pct"])
    cols = ["limit", "element", "event", "period", "value", "limit_value", "quantity_unit"]
    violations = pd.DataFrame(viol, columns=cols)
    today_violations = pd.DataFrame(now_viol, columns=cols)
    T, N = gain.shape
    alloc = {"unit": np.tile(u["unit"].to_numpy(object), T),
             "area": np.tile(u["area"].to_numpy(object), T)}
    if case.is_horizon:
        alloc["period"] = np.repeat(np.array(case.periods, dtype=object), N)
    else:
        violations = violations.drop(columns="period")
        today_violations = today_violations.drop(columns="period")
    alloc.update({"provides": (gain > 0).reshape(-1),
                  "droop_pct": np.where(gain > 0, np.broadcast_to(s_units, (T, N)),
                                        np.nan).reshape(-1),
                  "gain_mw_per_hz": gain.reshape(-1), "headroom_up_mw": r_up.reshape(-1),
                  "headroom_down_mw": r_dn.reshape(-1),
                  "cost_per_h": (hz.price_up * r_up + hz.price_dn * r_dn).reshape(-1)})
    return Comparison(summary, violations, pd.DataFrame(alloc), best_s, rule,
                      today_violations if has_today else None)


def _cost(hz: Horizon, r_up, r_dn) -> float:
    """Headroom cost over the horizon (per hour for a snapshot), like the optimum's."""
    return float(((hz.price_up * r_up + hz.price_dn * r_dn) * hz.hours[:, None]).sum())


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


def _from_droop(case: Case, hz: Horizon, droop_pct: np.ndarray, capable: np.ndarray):
    """Gains and headroom (T, N) of one set of droops (NaN = no response), headroom by the
    full-activation rule capped at the room; also what the rule asks for (`want`)."""
    with np.errstate(invalid="ignore"):
        K = np.where(capable & np.isfinite(droop_pct),
                     case.gain_from_droop(np.where(np.isfinite(droop_pct), droop_pct, 1.0)), 0.0)
    gain = K[None, :] * hz.avail  # (T, N)
    want = hz.a_act[None, :] * gain  # full-activation headroom
    r_up = np.where(hz.need_up[:, None], np.minimum(want, hz.R_up), 0.0)
    r_dn = np.where(hz.need_dn[:, None], np.minimum(want, hz.R_dn), 0.0)
    return gain, r_up, r_dn, want


# verify/breaks.py families under the names this comparison has always reported
_LIMIT = {"event": "settled_deviation", "link": "link", "area": "own_reserve",
          "nadir": "nadir_energy"}


def _violations(case: Case, hz: Horizon, gain, r_up, r_dn, want) -> list[tuple]:
    """Broken limits of one allocation (verify/breaks.py, with F = the settled limit) plus the
    full-activation rule, as rows (limit, element, event, period, value, limit_value, unit)."""
    F = case.limits.max_settled_deviation_hz
    nadir = None
    if case.limits.max_nadir_deviation_hz is not None:
        # what a provider delivers by the nadir: its headroom, but no more than its droop asks
        # for at the nadir limit, K (N - d)^+ (the model's nadir rows, formulation section 15)
        reach = gain * np.maximum(case.limits.max_nadir_deviation_hz - hz.d_hz, 0.0)[None, :]
        nadir = nadir_shortfall(case, hz, np.minimum(r_up, reach), np.minimum(r_dn, reach))
    pts = evaluate(case, hz, gain, r_up, r_dn)
    br = what_breaks(case, hz, gain, r_up, r_dn, F, nadir, pts)
    link_pos = {str(x): k for k, x in enumerate(case.links["link"])}
    area_pos = {str(x): k for k, x in enumerate(case.areas["area"])}
    periods = [str(p) for p in case.periods] if case.is_horizon else [""]
    t_of = {p: k for k, p in enumerate(periods)}
    out = []
    for r in br.itertuples():
        t = t_of[r.period]
        if r.family == "event":
            out.append((_LIMIT["event"], r.element, r.event, r.period, float(r.excess_hz + F),
                        F, "Hz"))
        elif r.family == "link":
            lim = float(hz.Fmax[t, link_pos[r.element]])
            out.append(("link", r.element, r.event, r.period, float(r.over_mw + lim), lim,
                        "MW"))
        elif r.family == "area":
            own = float(hz.own[t, area_pos[r.element]])
            out.append(("own_reserve", r.element, "", r.period, own - float(r.short_mw), own,
                        "MW"))
        else:
            out.append(("nadir_energy", r.element, r.event, r.period, float(r.short_mw), 0.0,
                        "MW s short"))
    units = case.units["unit"].to_numpy(object)
    short = (want > hz.R_up + RESERVE_TOL_MW) & hz.need_up[:, None] | (
        want > hz.R_dn + RESERVE_TOL_MW) & hz.need_dn[:, None]
    for t, i in zip(*np.nonzero(short & (gain > 0))):
        out.append(("full_activation", units[i], "", periods[t], float(want[t, i]),
                    float(min(hz.R_up[t, i] if hz.need_up[t] else np.inf,
                              hz.R_dn[t, i] if hz.need_dn[t] else np.inf)), "MW"))
    # the order this comparison has always used: settled, links, own reserve, full
    # activation, nadir
    order = {"settled_deviation": 0, "link": 1, "own_reserve": 2, "full_activation": 3,
             "nadir_energy": 4}
    return sorted(out, key=lambda v: order[v[0]])

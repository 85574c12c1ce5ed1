"""Droop retune proposals: the fewest, smallest changes from today's settings that make every
listed event safe, each with the reason that needs it.

Staged (lexicographic) optimisation over the same model as `solve`, each stage's optimum
fixed before the next: (1) fewest units changed, (2) least total droop change, (3) least
headroom cost. With `survive_provider_loss`, every event must also be met with any one
reserve provider unavailable: extra event instances (and own-reserve rows) inside the model.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd
import scipy.sparse as sp

from optreserve.case.data import Case, DroopSettings
from optreserve.errors import CaseError, OptreserveError, Problem
from optreserve.model.build import TIE_BREAK_PER_MW_H, ModelInfo
from optreserve.model.horizon import Horizon, lost_pairs, prepare
from optreserve.model.nadir import nadir_shortfall
from optreserve.model.program import LinearProgram
from optreserve.output.results import Result
from optreserve.solver.readback import evaluate_allocation
from optreserve.solver.run import solve
from optreserve.studies.today import Today, today
from optreserve.verify.breaks import describe, what_breaks

# Continuous droop bands are searched on this grid (plus today's setting) in a retune.
GRID_PCT = 0.1
# Each stage's optimum is held to within this (relative) in the later stages.
STAGE_TOL = 1e-6


class RetuneError(OptreserveError):
    exit_code = 2


@dataclass
class Proposal:
    """What retune returns: the proposal table, before/after per event, and the Result of
    the proposed settings (its tables are what `solve` writes)."""

    case: Case
    already_safe: bool
    proposal: pd.DataFrame
    before_after: pd.DataFrame
    result: Result
    cost_before_per_h: float | None
    cost_after_per_h: float | None
    violations_before: list[str] = field(default_factory=list)
    stages: list[dict] = field(default_factory=list)

    @property
    def changed(self) -> pd.DataFrame:
        return self.proposal[self.proposal["change"] != "unchanged"]

    def summary(self) -> dict:
        return {
            "already_safe": self.already_safe,
            "units_changed": int(len(self.changed)),
            "total_droop_change_pct": float(self.proposal["droop_change_pct"].sum()),
            "cost_before_per_h": self.cost_before_per_h,
            "cost_after_per_h": self.cost_after_per_h,
            "violations_before": self.violations_before,
            "stages": self.stages,
        }

    def write(self, out_dir, force: bool = False):
        self.result.extra_files["proposal.csv"] = self.proposal
        self.result.extra_files["before_after.csv"] = self.before_after
        self.result.extra_files["retune.json"] = self.summary()
        return self.result.write(out_dir, force=force)


# ------------------------------------------------------------------ what breaks
def violations(case: Case, hz: Horizon, gain, r_up, r_dn, limit_hz: float) -> list[str]:
    """Every limit the allocation breaks, recomputed independently, in words (the one
    evaluation of verify/breaks.py, as `solve`'s diagnosis and `check` use)."""
    nadir = (nadir_shortfall(case, hz, r_up, r_dn)
             if case.limits.max_nadir_deviation_hz is not None else None)
    return describe(what_breaks(case, hz, gain, r_up, r_dn, limit_hz, nadir), limit_hz)


# ------------------------------------------------------------------ the staged model
def _retune_case(case: Case) -> Case:
    """The case a retune searches: droop steps as given, or a fine grid (GRID_PCT) inside
    the bands plus today's settings; no change penalty (changes are an objective here)."""
    steps = case.droop.steps_pct
    if steps is None:
        lo = float(case.units["droop_min_pct"].min())
        hi = float(case.units["droop_max_pct"].max())
        grid = np.round(np.arange(lo, hi + GRID_PCT / 2, GRID_PCT), 6)
        now = case.units["droop_now_pct"].dropna().to_numpy(float)
        steps = tuple(sorted(set(grid.tolist()) | set(np.round(now, 6).tolist())))
    return case.replace(droop=DroopSettings(steps_pct=tuple(steps), change_penalty_per_unit=0.0))


def with_provider_loss(case: Case, hz: Horizon) -> Horizon:
    """Every event instance again with each responding provider unavailable in turn."""
    cand = hz.capable_b[hz.block[hz.inst_t]]  # (M, N) providers that could respond
    cand[lost_pairs(hz)] = False  # every lost unit (all of a common-mode trip)
    mm, jj = np.nonzero(cand)
    names = np.array(hz.inst_name, dtype=object)
    units = case.units["unit"].to_numpy(object)
    new_names = [f"{n} | without {u}" for n, u in zip(names[mm], units[jj])]
    cat = np.concatenate
    return replace(
        hz, inst_name=list(hz.inst_name) + new_names, inst_t=cat([hz.inst_t, hz.inst_t[mm]]),
        dP=cat([hz.dP, hz.dP[mm]]), sigma=cat([hz.sigma, hz.sigma[mm]]),
        inst_area=cat([hz.inst_area, hz.inst_area[mm]]), trip=cat([hz.trip, hz.trip[mm]]),
        absent=cat([hz.absent, jj]), inst_event=cat([hz.inst_event, hz.inst_event[mm]]),
        H_sys=cat([hz.H_sys, hz.H_sys[mm]]),
        lost=None if hz.lost is None else sp.vstack([hz.lost, hz.lost[mm]]).tocsr())


@dataclass
class _Stage:
    objective: str  # "changes" | "droop" | "cost"
    caps: dict  # objective name -> value held from earlier stages


def _extension(case: Case, now: Today, stage: _Stage, keep: np.ndarray,
               max_changes: int | None, survive: bool):
    """Blocks a retune adds to the allocation model (called on every model built)."""
    now_pct = case.units["droop_now_pct"].to_numpy(float)
    band_max = case.units["droop_max_pct"].to_numpy(float)

    def extend(lp: LinearProgram, info: ModelInfo) -> None:
        hz = info.hz
        N = hz.N
        zu, zs = info.steps_unit, info.steps_pct
        Z = lp.var_blocks["z"]
        providing = ~np.isnan(now.droop_pct)
        cand = hz.capable_b[0] | providing
        units = np.nonzero(cand)[0]
        local = np.full(N, -1)
        local[units] = np.arange(len(units))
        # changed_i: providing today at a step it may keep -> c_i + z_(i,now) >= 1;
        # providing today at a setting it cannot keep -> c_i = 1; not providing -> c_i >= z_i.
        at_now = np.isclose(zs, now_pct[zu], rtol=0, atol=1e-9) & providing[zu]
        has_now = np.zeros(N, dtype=bool)
        has_now[zu[at_now]] = True
        forced = (providing & ~has_now)[units].astype(float)
        ub = np.where(keep[units], 0.0, 1.0)
        if (forced > ub).any():
            bad = case.units["unit"].iloc[units[forced > ub][0]]
            raise RetuneError(f"--keep {bad}: today's setting of {bad} cannot be kept (outside "
                              "its band or steps, or more headroom than the unit has)")
        C = lp.add_vars("retune_changed", len(units), forced, ub, integer=True)
        keepable = providing[units] & has_now[units]
        rows = np.r_[np.arange(len(units)), local[zu[at_now]]]
        cols = np.r_[C.idx(), Z.idx(np.nonzero(at_now)[0])]
        lp.add_rows("retune_keep_link", len(units), rows, cols, np.ones(len(rows)),
                    lo=np.where(keepable, 1.0, -np.inf))
        new_units = units[~providing[units]]
        loc2 = np.full(N, -1)
        loc2[new_units] = np.arange(len(new_units))
        zsel = np.nonzero(loc2[zu] >= 0)[0]
        rows = np.r_[np.arange(len(new_units)), loc2[zu[zsel]]]
        cols = np.r_[C.idx(local[new_units]), Z.idx(zsel)]
        vals = np.r_[np.ones(len(new_units)), -np.ones(len(zsel))]
        lp.add_rows("retune_start_link", len(new_units), rows, cols, vals, lo=0.0)
        # total droop change = const + sum_z coef_z z (switching on/off measured from the
        # weakest setting of the band, droop_max_pct)
        ref = np.where(providing, now_pct, band_max)
        coef = np.abs(zs - ref[zu])
        coef = np.where(providing[zu], coef - np.abs(band_max[zu] - now_pct[zu]), coef)
        const = float(np.abs(band_max - now_pct)[providing & cand].sum())
        if max_changes is not None:
            lp.add_rows("retune_max_changes", 1, np.zeros(len(units), np.int64), C.idx(),
                        np.ones(len(units)), hi=float(max_changes))
        caps = stage.caps
        if "changes" in caps:
            lp.add_rows("retune_hold_changes", 1, np.zeros(len(units), np.int64), C.idx(),
                        np.ones(len(units)), hi=caps["changes"] + 1e-6)
        if "droop" in caps:
            lp.add_rows("retune_hold_droop", 1, np.zeros(len(coef), np.int64), Z.idx(), coef,
                        hi=caps["droop"] - const + STAGE_TOL * max(1.0, caps["droop"]))
        cost = lp.cost.copy()
        hours = np.repeat(hz.hours, N)
        for name in ("r_up", "r_dn"):  # the real prices: without the model's tie-break
            cost[lp.var_blocks[name].slice] -= TIE_BREAK_PER_MW_H * hours
        if "cost" in caps:
            nz = np.nonzero(cost)[0]
            lp.add_rows("retune_hold_cost", 1, np.zeros(len(nz), np.int64), nz, cost[nz],
                        hi=caps["cost"] * (1 + STAGE_TOL) + 1e-6)
        if survive and (hz.own > 0).any():
            _own_reserve_with_loss(lp, hz)
        if stage.objective != "cost":
            lp.zero_costs()
            if stage.objective == "changes":
                lp.set_cost("retune_changed", 1.0)
            else:
                lp.set_cost("z", coef)
                lp.objective_offset = const

    return extend


def _own_reserve_with_loss(lp: LinearProgram, hz: Horizon) -> None:
    """sum_{i in a} r_up_ti - r_up_tj >= min_own_ta for every provider j of area a."""
    N = hz.N
    R = lp.var_blocks["r_up"]
    rows, cols, vals, lo = [], [], [], []
    k = 0
    for t, a in zip(*np.nonzero(hz.own > 0)):
        members = np.nonzero((hz.area == a) & hz.avail[t])[0]
        for j in members:
            others = members[members != j]
            rows.append(np.full(len(others), k))
            cols.append(R.idx(t * N + others))
            vals.append(np.ones(len(others)))
            lo.append(hz.own[t, a])
            k += 1
    if k:
        lp.add_rows("own_reserve_loss", k, np.concatenate(rows), np.concatenate(cols),
                    np.concatenate(vals), lo=np.array(lo))


# ------------------------------------------------------------------ the study
def retune(case: Case, max_changes: int | None = None, keep: tuple[str, ...] = (),
           survive_provider_loss: bool = False, reduce_cost: bool = False,
           engine: str = "auto", time_limit: float | None = None,
           mip_gap: float | None = None) -> Proposal:
    """Propose droop settings from today's (droop_now_pct) that meet every limit."""
    if case.is_horizon and case.hold_periods is not None:
        raise RetuneError("retune proposes one setting per unit: remove [droop] hold_periods")
    unknown = [u for u in keep if u not in set(case.units["unit"])]
    if unknown:
        raise CaseError([Problem("--keep", f"unknown unit '{unknown[0]}' (not in units.csv)")])
    if max_changes is not None and max_changes < 0:
        raise RetuneError("--max-changes must be >= 0")
    rcase = _retune_case(case)
    base = prepare(rcase)
    hz = with_provider_loss(rcase, base) if survive_provider_loss else base
    now = today(rcase, hz)
    F_model = min(case.limits.max_settled_deviation_hz, case.limits.full_activation_deviation_hz)
    viol_now = violations(rcase, hz, now.gain, now.r_up, now.r_dn, F_model)
    # today's headroom may not cover its own droop at F_act: that breaks the headroom rule
    short = (now.gain * hz.a_act[None, :] > np.maximum(hz.R_up, 0) + 1e-6) & (
        hz.need_up[:, None])
    for i in np.nonzero(short.any(axis=0))[0]:
        viol_now.append(f"unit {case.units['unit'].iloc[i]}: today's droop needs more up "
                        "headroom than the unit has")
    keep_mask = case.units["unit"].isin(set(keep)).to_numpy()
    opts = dict(engine=engine, time_limit=time_limit, mip_gap=mip_gap, hz=hz)

    order = ["cost", "changes", "droop"] if reduce_cost else ["changes", "droop", "cost"]
    if not viol_now and not reduce_cost:
        order = ["changes", "droop", "cost"]
    caps: dict = {}
    stages = []
    result = None
    for obj in order:
        ext = _extension(rcase, now, _Stage(obj, dict(caps)), keep_mask, max_changes,
                         survive_provider_loss)
        result = solve(rcase, extend=ext, **opts)
        value = _stage_value(obj, rcase, result, now)
        caps[obj] = value
        stages.append({"objective": obj, "value": value, "status": result.status})
    assert result is not None
    proposal = _proposal_table(rcase, hz, now, result, F_model, survive_provider_loss)
    before_after = _before_after(rcase, hz, now, result)
    cost_before = float((hz.price_up * now.r_up + hz.price_dn * now.r_dn).sum(axis=1).mean())
    cost_after = float(result.allocation.groupby(
        "period" if case.is_horizon else "unit", sort=False)["cost_per_h"].sum().mean()) \
        if case.is_horizon else float(result.allocation["cost_per_h"].sum())
    if not case.is_horizon:
        cost_before = float((hz.price_up * now.r_up + hz.price_dn * now.r_dn).sum())
    return Proposal(case, not viol_now, proposal, before_after, result, cost_before,
                    cost_after, viol_now, stages)


def _proposed(case: Case, result: Result) -> np.ndarray:
    a = result.allocation
    if "period" in a.columns:
        a = a.groupby("unit", sort=False).first().reindex(case.units["unit"]).reset_index()
    return a["droop_pct"].to_numpy(float)


def _stage_value(obj: str, case: Case, result: Result, now: Today) -> float:
    prop = _proposed(case, result)
    if obj == "changes":
        return float(_changed(now.droop_pct, prop).sum())
    if obj == "droop":
        return float(_droop_change(case, now.droop_pct, prop).sum())
    a = result.allocation
    if case.is_horizon:
        hours = dict(zip([str(p) for p in case.periods], case.hours()))
        return float((a["cost_per_h"] * a["period"].astype(str).map(hours)).sum())
    return float(a["cost_per_h"].sum())


def _changed(now_pct, prop_pct) -> np.ndarray:
    a, b = np.isnan(now_pct), np.isnan(prop_pct)
    return (a != b) | (~a & ~b & ~np.isclose(now_pct, prop_pct, rtol=0, atol=1e-9))


def _droop_change(case: Case, now_pct, prop_pct) -> np.ndarray:
    band_max = case.units["droop_max_pct"].to_numpy(float)
    a = np.where(np.isnan(now_pct), band_max, now_pct)
    b = np.where(np.isnan(prop_pct), band_max, prop_pct)
    return np.where(_changed(now_pct, prop_pct), np.abs(a - b), 0.0)


def _period_arrays(case: Case, hz: Horizon, result: Result):
    a = result.allocation
    T, N = hz.T, hz.N
    return (a["gain_mw_per_hz"].to_numpy(float).reshape(T, N),
            a["headroom_up_mw"].to_numpy(float).reshape(T, N),
            a["headroom_down_mw"].to_numpy(float).reshape(T, N))


def _proposal_table(case, hz, now: Today, result, F_model, survive) -> pd.DataFrame:
    prop = _proposed(case, result)
    gain, r_up, r_dn = _period_arrays(case, hz, result)
    changed = _changed(now.droop_pct, prop)
    units = case.units["unit"].to_numpy(object)
    reasons = []
    for i in range(hz.N):
        if not changed[i]:
            reasons.append("")
            continue
        # revert this one change, keep the others as proposed: what breaks?
        g, ru, rd = gain.copy(), r_up.copy(), r_dn.copy()
        g[:, i], ru[:, i], rd[:, i] = now.gain[:, i], now.r_up[:, i], now.r_dn[:, i]
        broken = violations(case, hz, g, ru, rd, F_model)
        if (now.gain[:, i] * hz.a_act[i] > hz.R_up[:, i] + 1e-6).any() and hz.need_up.any():
            broken.insert(0, "today's setting needs more up headroom than the unit has")
        if broken:
            extra = f" (and {len(broken) - 1} more)" if len(broken) > 1 else ""
            reasons.append("without this change: " + broken[0] + extra)
        else:
            reasons.append("lowers the headroom cost; no limit needs it on its own")
    kind = np.where(~changed, "unchanged",
                    np.where(np.isnan(now.droop_pct), "starts",
                             np.where(np.isnan(prop), "stops", "retuned")))
    return pd.DataFrame({
        "unit": units, "area": case.units["area"].to_numpy(object),
        "droop_now_pct": now.droop_pct, "droop_proposed_pct": prop, "change": kind,
        "droop_change_pct": _droop_change(case, now.droop_pct, prop),
        "headroom_up_now_mw": now.r_up.max(axis=0), "headroom_up_proposed_mw": r_up.max(axis=0),
        "headroom_down_now_mw": now.r_dn.max(axis=0),
        "headroom_down_proposed_mw": r_dn.max(axis=0), "reason": reasons,
    })


def _before_after(case, hz, now: Today, result) -> pd.DataFrame:
    gain, r_up, r_dn = _period_arrays(case, hz, result)
    before = evaluate_allocation(case, hz, now.gain, now.r_up, now.r_dn)
    after = evaluate_allocation(case, hz, gain, r_up, r_dn)
    base = hz.absent < 0
    F = min(case.limits.max_settled_deviation_hz, case.limits.full_activation_deviation_hz)
    f_n = case.nominal_frequency_hz
    df = pd.DataFrame({"event": np.array(hz.inst_name, dtype=object)[base]})
    if case.is_horizon:
        df["period"] = np.array([str(p) for p in case.periods], dtype=object)[hz.inst_t[base]]
    # no settled point (the response saturates below the event): reported as empty
    before_dev = np.where(np.isfinite(before.deviation_hz), before.deviation_hz, np.nan)
    df["settled_frequency_before_hz"] = f_n + before_dev[base]
    df["settled_frequency_after_hz"] = f_n + after.deviation_hz[base]
    df["margin_before_hz"] = F - np.abs(before_dev[base])
    df["margin_after_hz"] = F - np.abs(after.deviation_hz[base])
    if hz.F0.shape[1]:
        lim = hz.Fmax[hz.inst_t[base]]
        lb = np.abs(before.flow_after_mw[base]) / lim * 100
        la = np.abs(after.flow_after_mw[base]) / lim * 100
        links = case.links["link"].to_numpy(object)
        df["worst_link_before"] = links[lb.argmax(axis=1)]
        df["loading_before_pct"] = lb.max(axis=1)
        df["worst_link_after"] = links[la.argmax(axis=1)]
        df["loading_after_pct"] = la.max(axis=1)
    return df

"""Incremental prices: the change of the optimal cost when an event (or an area's own-reserve
requirement) grows by a price step, from re-solving the mixed-integer problem, and which
fixed-integer duals say nothing (docs/formulation.md, "Two prices on droop-step cases").

On a case with droop steps the dual of an event's row with every step fixed is the cost of one
more MW *at the chosen steps*; when the steps overshoot (the usual case) no row of the event
is tight and that dual is 0 although a larger event costs real money. The incremental cost

    (cost*(dP + step) - cost*(dP)) / step / h_t

re-solves the whole problem, steps included, once per event instance (without a start, so
that re-solves run in threads or begun ahead give the same values). Both optima are taken at a tight gap (the solve's own optimum is the base when
HiGHS proved it to that gap, as it does when its search tree closes) of the model's own
objective, and the difference of their real costs (headroom cost plus any change penalty,
without the tie-break price on headroom) is reported. The tie-break can move each real cost
by at most TIE_BREAK_PER_MW_H x the headroom it could hold (a trade between allocations
whose real costs differ by less than that), i.e. the price by at most that over the step.
"""

from __future__ import annotations

import os
import sys
import time
from copy import copy
from dataclasses import replace

import numpy as np

from optreserve import progress
from optreserve.model.build import ModelInfo, build_model
from optreserve.model.horizon import Horizon
from optreserve.model.program import LinearProgram
from optreserve.solver.backends import solve_program

# Default step: max(PRICE_STEP_MIN_MW, PRICE_STEP_SHARE x the event's size).
PRICE_STEP_MIN_MW = 1.0


PRICE_STEP_SHARE = 0.01


# Relative MIP gap of the re-solves: far below the step's share of the cost, so the
# difference of two optima is not lost in the gap.
PRICE_MIP_GAP = 1e-9


# Dead-band fixed point of a re-solve (cases with links and dead bands): a few passes from
# the base solve's settled guesses.
PRICE_FIXED_POINT_ITER = 10


PRICE_FIXED_POINT_TOL_HZ = 1e-7


# A row counts as tight within this relative distance of its bound.
TIGHT_REL = 1e-6


# Nadir rows of a grown event count as met within this (relative; HiGHS' own feasibility
# tolerance is 1e-7).
FEASIBLE_REL = 1e-6


def price_steps(size_mw: np.ndarray, step_mw: float | None = None) -> np.ndarray:
    """The step of each event (or requirement) of the given sizes [MW]."""
    size = np.abs(np.asarray(size_mw, float))
    if step_mw is not None:
        if not (np.isfinite(step_mw) and step_mw > 0):
            raise ValueError(f"the price step must be a positive number of MW, got {step_mw}")
        return np.full(size.shape, float(step_mw))
    return np.maximum(PRICE_STEP_MIN_MW, PRICE_STEP_SHARE * size)


def tight_rows(lp: LinearProgram, x: np.ndarray, name: str) -> np.ndarray:
    """Per row of a block: activity at one of its bounds (within TIGHT_REL)."""
    b = lp.row_blocks[name].slice
    act = lp.A[b] @ np.asarray(x)
    lo, hi = lp.row_lo[b], lp.row_hi[b]
    with np.errstate(invalid="ignore"):
        at_lo = np.isfinite(lo) & (np.abs(act - lo) <= TIGHT_REL * np.maximum(1.0, np.abs(lo)))
        at_hi = np.isfinite(hi) & (np.abs(act - hi) <= TIGHT_REL * np.maximum(1.0, np.abs(hi)))
    return at_lo | at_hi


def tight_events(lp: LinearProgram, info: ModelInfo, x: np.ndarray) -> np.ndarray:
    """(M,) instances whose settled row or one of whose flow rows is tight at x: the rows
    whose duals make the event's marginal cost. Where none is, that dual says nothing."""
    hz = info.hz
    M = len(hz.dP)
    tight = tight_rows(lp, x, "settled").copy()
    n_l = hz.F0.shape[1]
    for names, live in ((("flow_hi", "flow_lo"), np.nonzero(hz.dP > 0)[0]),
                        (("flow_x",), np.nonzero((hz.dP > 0) | ((hz.dP_var is not None)
                                                               & (hz.dP_var >= 0)))[0])):
        for name in names:
            if name in lp.row_blocks and n_l:
                t = tight_rows(lp, x, name).reshape(len(live), n_l).any(axis=1)
                tight[live[t]] = True
    return tight[:M]


def real_cost(lp: LinearProgram, hz: Horizon, x: np.ndarray) -> float:
    """The cost of x at the real headroom prices (the program's objective without the
    tie-break price on headroom)."""
    out = copy(lp)
    out._cost = list(lp._cost)
    out.set_cost("r_up", (hz.price_up * hz.hours[:, None]).reshape(-1))
    out.set_cost("r_dn", (hz.price_dn * hz.hours[:, None]).reshape(-1))
    return float(out.objective(x))


def optimal_cost(case, hz: Horizon, info: ModelInfo, start: np.ndarray | None,
                 time_limit: float | None = None, nadir_scale=None, base_lp=None,
                 on_highs=None) -> tuple[float, np.ndarray | None, float, bool]:
    """Real cost of the optimum of the case stacked as hz at PRICE_MIP_GAP (flow rows left
    out while no link overloads, as in the solve; the dead-band fixed point re-run from the
    base solve's guesses). Returns (cost, solution, solver seconds, whether the solution's
    program has the flow rows); cost NaN when no allocation is found (inf when the problem
    is infeasible)."""
    from optreserve.solver.readback import dispatch_view, exact_points
    from optreserve.solver.run import carry_start, settle_pass

    x_hat = np.asarray(info.x_hat, float).copy()
    flows = info.flows
    solve_s = 0.0
    out = None
    last = (base_lp, start) if base_lp is not None and start is not None else None
    for _ in range(PRICE_FIXED_POINT_ITER):
        lp, inf = build_model(case, x_hat=x_hat, hz=hz, nadir_scale=nadir_scale, flows=flows)
        st = carry_start(*last, lp) if last is not None else None
        out = solve_program(lp, engine="highspy", start=st, mip_gap=PRICE_MIP_GAP,
                            time_limit=time_limit, on_highs=on_highs)
        solve_s += out.solve_time_s
        if out.status == "infeasible":
            return float("inf"), None, solve_s, flows
        if out.x is None:
            return float("nan"), None, solve_s, flows
        last = (lp, out.x)
        inf.hz = dispatch_view(inf.hz, lp, out.x)
        verdict, x_hat = settle_pass(inf, exact_points(inf, lp, out.x),
                                     PRICE_FIXED_POINT_TOL_HZ)  # as the solve's passes
        if verdict == "settled":
            break
        flows = flows or verdict == "overload"
    return real_cost(lp, hz, out.x), out.x, solve_s, flows


def events_still_met(case, hz: Horizon, info: ModelInfo, lp: LinearProgram, x: np.ndarray,
                     grown_dP: np.ndarray, nadir_scale=None) -> np.ndarray:
    """(M,) whether the allocation x (a solution of the base program lp) still meets each
    instance m of the case stacked as hz with its size grown to grown_dP[m]: its
    independently recalculated settled deviation and flows (verify/settle.py) within the
    limits, and its nadir rows (model/nadir.py) held. The other rows do not depend on the
    instance's size, and an instance's settled point and rows depend on its own size only,
    so every instance is judged grown at once."""
    from optreserve.model.horizon import out_pairs, responds_in
    from optreserve.model.nadir import nadir_terms
    from optreserve.solver.readback import evaluate_allocation, period_values

    grown = replace(hz, dP=np.asarray(grown_dP, float))
    gain, r_up, r_dn = period_values(lp, info, x)
    pts = evaluate_allocation(case, grown, gain, r_up, r_dn)
    ok = np.abs(pts.deviation_hz) <= info.F_model  # NaN (no settled point): not met
    if hz.F0.shape[1]:
        ok &= np.all(np.abs(pts.flow_after_mw) <= hz.Fmax[hz.inst_t], axis=1)
    rows_free = getattr(nadir_scale, "relaxed", False)  # the simulation decided, not rows
    if case.limits.max_nadir_deviation_hz is not None and not rows_free:
        coef, need = nadir_terms(case, grown, nadir_scale)  # (M, K, N), (M, K)
        live = responds_in(hz).copy()
        mm, jj = out_pairs(hz)
        live[mm, jj] = False
        K = lp.value(x, "K").reshape(hz.n_blocks, hz.N)[hz.block[hz.inst_t]]  # (M, N)
        reach = np.maximum(case.limits.max_nadir_deviation_hz - hz.d_hz, 0.0)
        r = np.where((hz.sigma > 0)[:, None], r_up[hz.inst_t], r_dn[hz.inst_t])
        q = np.where(live, np.minimum(r, K * reach[None, :]), 0.0)
        have = np.einsum("mkn,mn->mk", coef, q)
        ok &= np.all(have >= need - FEASIBLE_REL * np.maximum(1.0, np.abs(need)), axis=1)
    return ok


def incremental_prices(case, hz: Horizon, info: ModelInfo, x: np.ndarray,
                       step_mw: float | None = None, time_limit: float | None = None,
                       nadir_scale=None, lp: LinearProgram | None = None, out=None,
                       ahead: dict | None = None):
    """Incremental cost per MW and hour of each event instance and of each area's own-reserve
    requirement (where it has one), by re-solving with that one quantity grown by its step.
    Returns (event (M,), reserve (T, A), seconds spent solving, seconds in all); NaN where
    not computed (a trip whose size is a dispatch decision, an area without requirement, a
    re-solve without answer), inf where the grown problem has no allocation. lp/out: the
    solve's program and outcome; its optimum is the base when HiGHS proved it within
    PRICE_MIP_GAP, else the base is solved again at that gap. ahead: {instance: started
    re-solve} begun while the solve ran (solver/ahead.py), used instead of solving again."""
    t0 = time.perf_counter()
    M = len(hz.dP)
    T, A = hz.own.shape
    event = np.full(M, np.nan)
    reserve = np.full((T, A), np.nan)
    progress.step("re-solving for incremental prices")
    if lp is not None and out is not None and base_is_proven(out):
        base, x0, solve_s, flows = real_cost(lp, hz, x), x, 0.0, info.flows
    else:
        base, x0, solve_s, flows = optimal_cost(case, hz, info, x, time_limit, nadir_scale, lp)
    if not np.isfinite(base):
        return event, reserve, solve_s, time.perf_counter() - t0
    fixed = hz.dP_var < 0 if hz.dP_var is not None else np.ones(M, bool)
    # Every limit tightens as an event or requirement grows (the settled and nadir rows need
    # more; at fixed gains a flow's shift grows in proportion), so the optimal cost does not
    # fall: if the base optimum still meets the grown case, the grown optimum costs the same,
    # 0, and no re-solve is run. (With dead bands on linked areas the responses' shares move
    # with the deviation; that flows then still only tighten is assumed. Co-optimised
    # outputs move the pre-event flows: always re-solved.)
    shortcut = not hz.co_opt and x0 is not None
    lp0, info0 = build_model(case, x_hat=info.x_hat, hz=hz, nadir_scale=nadir_scale,
                             flows=flows)
    steps = price_steps(hz.dP, step_mw)
    jobs = []  # (array, index, grown stacking, step): the re-solves still needed
    priced = (hz.dP > 0) & fixed
    met = (events_still_met(case, hz, info0, lp0, x0, np.where(priced, hz.dP + steps, hz.dP),
                            nadir_scale) if shortcut else np.zeros(M, bool))
    for m in np.nonzero(priced)[0]:  # one re-solve per instance
        if met[m]:
            event[m] = 0.0
            continue
        dP = hz.dP.copy()
        dP[m] += steps[m]
        jobs.append((event, m, replace(hz, dP=dP), steps[m] * hz.hours[hz.inst_t[m]]))
    ta, aa = np.nonzero(hz.own > 0)
    r_steps = price_steps(hz.own[ta, aa], step_mw)
    for k in range(len(ta)):
        own = hz.own.copy()
        own[ta[k], aa[k]] += r_steps[k]
        grown = replace(hz, own=own)
        held = lp0.value(x0, "r_up").reshape(hz.T, hz.N)[ta[k]][hz.area == aa[k]].sum()
        if shortcut and held >= own[ta[k], aa[k]]:
            reserve[ta[k], aa[k]] = 0.0
            continue
        jobs.append((reserve, (ta[k], aa[k]), grown, r_steps[k] * hz.hours[ta[k]]))

    ahead = ahead or {}
    done = {m: ahead[m].result() for m in [j[1] for j in jobs if j[0] is event]
            if m in ahead}  # begun while the solve ran: the same program, no start

    def resolve(job):
        if job[0] is event and job[1] in done:
            return done[job[1]]
        return optimal_cost(case, job[2], info0, None, time_limit, nadir_scale)

    for job, (cost, _, s, _) in zip(jobs, _map(resolve, jobs)):
        solve_s += s
        job[0][job[1]] = (cost - base) / job[3]
    clean = np.where(np.abs(event) < 1e-9, 0.0, event)
    return clean, np.where(np.abs(reserve) < 1e-9, 0.0, reserve), solve_s, \
        time.perf_counter() - t0


# Re-solves run side by side in this many threads (HiGHS releases the GIL while it solves;
# each re-solve is its own single-threaded HiGHS, so the values do not depend on it). Inside
# a Dask worker the points or blocks already fill the cores: one. OPTRESERVE_PRICE_THREADS
# overrides.
def price_threads() -> int:
    env = os.environ.get("OPTRESERVE_PRICE_THREADS", "").strip()
    if env.isdigit():  # anything else: the default below
        return max(1, int(env))
    if "distributed" in sys.modules:
        try:
            sys.modules["distributed"].get_worker()
            return 1
        except (ValueError, AttributeError):
            pass
    return max(1, min(2, os.cpu_count() or 1))


def _map(fn, jobs: list) -> list:
    """fn over jobs, in order; in price_threads() threads when there are several."""
    n = min(price_threads(), len(jobs))
    if n <= 1:
        return [fn(j) for j in jobs]
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=n, thread_name_prefix="optreserve-price") as pool:
        return list(pool.map(fn, jobs))


def base_is_proven(out) -> bool:
    """Whether HiGHS proved the solve's optimum within PRICE_MIP_GAP (relative)."""
    return (out.status == "optimal" and out.mip_gap is not None
            and out.mip_gap <= PRICE_MIP_GAP)


def attach_incremental(result, case, hz: Horizon, info: ModelInfo, x: np.ndarray,
                       step_mw: float | None = None, time_limit: float | None = None,
                       nadir_scale=None, lp: LinearProgram | None = None, out=None,
                       ahead: dict | None = None):
    """Add incremental_cost_per_mw_h to the result's events and
    reserve_incremental_cost_per_mw_h to its prices; returns (build s, solve s)."""
    event, reserve, solve_s, total_s = incremental_prices(case, hz, info, x, step_mw,
                                                          time_limit, nadir_scale, lp, out,
                                                          ahead)
    result.events["incremental_cost_per_mw_h"] = event
    if result.prices is not None:
        result.prices["reserve_incremental_cost_per_mw_h"] = reserve.reshape(-1)
    return total_s - solve_s, solve_s

"""Solve a case: build the model, run HiGHS, settle dead-band fixed points, verify
independently, read prices, and return a Result of pandas tables."""

from __future__ import annotations

import time
from dataclasses import replace
from typing import Callable

import numpy as np

from optreserve import progress
from optreserve.case.data import Case
from optreserve.errors import SolverError
from optreserve.model.build import ModelInfo, build_model
from optreserve.model.horizon import Horizon, lost_pairs, prepare
from optreserve.model.program import LinearProgram
from optreserve.output.results import Result
from optreserve.solver.backends import Outcome, solve_program
from optreserve.solver.diagnose import diagnose
from optreserve.solver.outcome import TIME_STATUSES, NoAllocationYet, best_verified, failed_pass
from optreserve.solver.prices import _attach_prices
from optreserve.solver.readback import _make_result, dispatch_view, exact_points, period_values
from optreserve.solver.timing import Clock, close_total

# Dead-band fixed point: stop when every settled guess moves less than this.
FIXED_POINT_TOL_HZ = 1e-7


FIXED_POINT_MAX_ITER = 30


def solve(case: Case, engine: str = "auto", time_limit: float | None = None,
          mip_gap: float | None = None, relax: bool = False, verbose: bool = False,
          extend: Callable[[LinearProgram, ModelInfo], None] | None = None,
          hz: Horizon | None = None, incremental: bool = False,
          price_step: float | None = None) -> Result:
    """Least-cost droop and headroom allocation meeting every event's limits.

    engine: "pyomo" (Pyomo model on Pyomo's HiGHS interface), "highspy" (bulk load), or
    "auto" (Pyomo for small models, bulk above backends.AUTO_BULK_NONZEROS nonzeros).
    extend: called on every model built (lp, info) to add blocks or change the objective
      (studies such as retune proposals); the result's cost is always the headroom cost.
    hz: the stacked case (model.prepare), e.g. with extra event instances.
    incremental: also re-solve once per event instance (and own-reserve requirement) grown
      by price_step MW (default max(1 MW, 1 %)) for incremental prices (solver/incremental.py;
      not with extend, whose objective is not the cost).
    Raises InfeasibleError (with a diagnosis) when no allocation meets the limits."""
    if case.is_nodal:  # buses.csv: lazy sparse flow rows (solver/rowgen.py)
        from optreserve.solver.rowgen import solve_nodal

        return solve_nodal(case, engine, time_limit, mip_gap, relax, verbose, extend, hz)
    t_start = time.perf_counter()
    clock = Clock()  # verify, nadir_check, prices: timings_s keys beside build and solve
    time_limit = time_limit if time_limit is not None else case.solver.time_limit_s
    mip_gap = mip_gap if mip_gap is not None else case.solver.mip_gap
    opts = dict(time_limit=time_limit, mip_gap=mip_gap, verbose=verbose)

    t0 = time.perf_counter()
    progress.step("preparing the model data")
    hz = prepare(case) if hz is None else hz
    t_build = time.perf_counter() - t0
    t_solve = 0.0
    x_hat = None
    iterations = 0
    history = []
    retried = False
    timed_out = False  # stopped by the time budget before the passes converged
    nadir = {"scale": None, "rounds": 0, "checked": False, "worst_hz": None}
    while True:
        iterations += 1
        t0 = time.perf_counter()
        progress.step("building the model" + (f" (dead-band pass {iterations})"
                                               if iterations > 1 else ""))
        lp, info = build_model(case, x_hat=x_hat, relax=relax, hz=hz,
                               nadir_scale=nadir["scale"])
        if extend is not None:
            extend(lp, info)
        t_build += time.perf_counter() - t0
        if time_limit is not None:  # the dead-band iterations share one time budget
            left = time_limit - (time.perf_counter() - t_start)
            if history and left <= 0:
                lp, info, out, points = best_verified(case, history, time_limit)
                timed_out = True
                break
            opts["time_limit"] = max(left, 0.01)
        start = history[-1][2].x if history and history[-1][0].n_cols == lp.n_cols else None
        out = solve_program(lp, engine=engine, want_duals=not lp.is_mip, start=start, **opts)
        t_build += out.emit_time_s
        t_solve += out.solve_time_s
        if out.status == "infeasible":
            if iterations == 1 and _needs_fixed_point(info) and not retried:
                # the first guess (every event at the limit) can misjudge dead-band flows:
                # take the settled points of the least-violating allocation and try again
                retried = True
                e_lp, e_info = build_model(case, elastic=True, hz=hz)
                if extend is not None:
                    extend(e_lp, e_info)
                e_out = solve_program(e_lp, engine="highspy")
                if e_out.x is not None:
                    guess = np.abs(exact_points(e_info, e_lp, e_out.x).deviation_hz)
                    x_hat = np.where((hz.dP > 0) & np.isfinite(guess) & (guess > 0), guess,
                                     info.x_hat)
                    iterations = 0
                    continue
            if not history:
                raise diagnose(case, hz, extend)
            # the dead-band guess moved into an infeasible corner: keep the last good answer
            lp, info, out = history[-1]
            points = None
            break
        if out.x is None:
            if out.status not in TIME_STATUSES:  # HiGHS failed: say so, in any pass
                raise failed_pass(out, iterations) if history else SolverError(
                    f"HiGHS stopped without a usable allocation ({out.status}: {out.message})")
            if history:  # a later dead-band pass ran out of time: the best verified answer
                lp, info, out, points = best_verified(case, history, time_limit)
                timed_out = True
                break
            raise NoAllocationYet.within(time_limit, out.message)
        info.hz = dispatch_view(info.hz, lp, out.x)
        history.append((lp, info, out))
        progress.step("recomputing settled points independently")
        with clock("verify"):
            points = exact_points(info, lp, out.x)
        exact = np.abs(points.deviation_hz)
        live = info.hz.dP > 0
        if not _needs_fixed_point(info):
            # no row depends on the settled guess: the exact deviation is the model's own
            info.x_hat = np.where(live, exact, info.x_hat)
            if clock.run("nadir_check", _nadir_round, case, info, lp, out, nadir):
                continue
            break
        if np.all(np.abs(exact - info.x_hat)[live] <= FIXED_POINT_TOL_HZ) or (
                iterations >= FIXED_POINT_MAX_ITER):
            if clock.run("nadir_check", _nadir_round, case, info, lp, out, nadir):
                x_hat = np.where(live & np.isfinite(exact), exact, info.x_hat)
                continue
            break
        x_hat = np.where(live & np.isfinite(exact), exact, info.x_hat)
        points = None

    with clock("verify"):
        result = _make_result(case, lp, info, out, relax, points, check_model=not timed_out)
    result.nadir_check = {k: nadir[k] for k in ("checked", "rounds", "worst_hz")}
    # our own tie-break price on headroom (model.TIE_BREAK_PER_MW_H) makes HiGHS remark on
    # "excessively small costs": that one is expected and not passed on
    result.solver_warnings = list(dict.fromkeys(
        w for _, _, o in history for w in o.warnings if "small costs" not in w))
    result.iterations = iterations
    with clock("prices"):  # its extra LP's build and solve included
        _attach_prices(result, lp, info, out)
    if incremental and extend is None and not relax:
        from optreserve.solver.incremental import attach_incremental

        with clock("incremental_prices"):  # the MILP re-solves at the grown event sizes
            attach_incremental(result, case, hz, info, out.x, price_step, time_limit,
                               nadir["scale"])
    result.timings_s.update(read=case.read_time_s, build=t_build, solve=t_solve, **clock,
                            write=0.0)
    close_total(result.timings_s, time.perf_counter() - t_start + case.read_time_s)
    return result


# The nadir rows rest on an aggregate (centre-of-inertia) swing equation; an area's own
# frequency can dip further. For up to this many event instances the allocation is simulated
# (simulate.py) and the rows of any event whose simulated nadir passes the limit are tightened
# in proportion, then the case is solved again (at most NADIR_ROUNDS times).
NADIR_SIM_MAX_INSTANCES = 200


NADIR_ROUNDS = 6


NADIR_MARGIN = 0.995


def _nadir_round(case: Case, info: ModelInfo, lp: LinearProgram, out: Outcome,
                 nadir: dict) -> bool:
    """Simulate the events against the nadir limit; tighten and ask for another solve when
    one breaks it. Returns True when the case must be solved again."""
    N_max = case.limits.max_nadir_deviation_hz
    hz = info.hz
    live = np.nonzero((hz.dP > 0) & (hz.H_sys > 0))[0]
    if N_max is None or len(live) == 0 or len(hz.dP) > NADIR_SIM_MAX_INSTANCES:
        return False
    from optreserve.dynamics.simulate import build_system, simulate_event

    progress.step("simulating events against the nadir limit")
    gain, r_up, r_dn = period_values(lp, info, out.x)
    worst = np.zeros(len(hz.dP))
    systems = {}
    lm, lj = lost_pairs(hz)
    for m in live:
        t = int(hz.inst_t[m])
        g = gain[t].copy()
        if hz.absent[m] >= 0:
            g[hz.absent[m]] = 0.0
        # a common-mode trip: the simulator takes one tripped unit; the others lose their
        # response and stored energy here
        extra = lj[(lm == m) & (lj != hz.trip[m])]
        g[extra] = 0.0
        key = (t, int(hz.absent[m]), tuple(extra))
        if key not in systems:
            sysm = build_system(case, g, r_up[t], r_dn[t], t=t)
            if len(extra):
                H = sysm.stored_energy_mw_s.copy()
                H[extra] = 0.0
                sysm = replace(sysm, stored_energy_mw_s=H)
            systems[key] = sysm
        tr = simulate_event(systems[key], float(hz.sigma[m] * hz.dP[m]), int(hz.inst_area[m]),
                            trip=int(hz.trip[m]), duration_s=30.0)
        worst[m] = abs(tr.nadir_hz - case.nominal_frequency_hz)
    nadir["checked"] = True
    nadir["worst_hz"] = float(worst.max())
    bad = worst > N_max * (1 + 1e-4)
    if not bad.any() or nadir["rounds"] >= NADIR_ROUNDS:
        return False
    scale = np.ones(len(hz.dP)) if nadir["scale"] is None else nadir["scale"].copy()
    scale[bad] *= N_max / worst[bad] * NADIR_MARGIN
    nadir["scale"] = scale
    nadir["rounds"] += 1
    return True


def _needs_fixed_point(info: ModelInfo) -> bool:
    hz = info.hz
    live = (hz.dP > 0).any() or (hz.co_opt and (hz.dP_var >= 0).any())
    guessed = (hz.d_hz[hz.capable_b.any(axis=0)] > 0).any() or hz.co_opt
    return bool(len(info.case.links) and guessed and live)

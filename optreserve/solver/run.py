"""Solve a case: build the model, run HiGHS, settle dead-band fixed points, verify
independently, read prices, and return a Result of pandas tables."""

from __future__ import annotations

import time
from typing import Callable

import numpy as np

from optreserve import progress
from optreserve.case.data import Case
from optreserve.errors import SolverError
from optreserve.model.build import ModelInfo, build_model
from optreserve.model.horizon import Horizon, prepare
from optreserve.model.program import LinearProgram
from optreserve.output.results import Result
from optreserve.solver.backends import Outcome, solve_program
from optreserve.solver.diagnose import diagnose
from optreserve.solver.prices import _attach_prices
from optreserve.solver.readback import _make_result, dispatch_view, exact_points, period_values

# Dead-band fixed point: stop when every settled guess moves less than this.
FIXED_POINT_TOL_HZ = 1e-7


FIXED_POINT_MAX_ITER = 30


def solve(case: Case, engine: str = "auto", time_limit: float | None = None,
          mip_gap: float | None = None, relax: bool = False, verbose: bool = False,
          extend: Callable[[LinearProgram, ModelInfo], None] | None = None,
          hz: Horizon | None = None, workers: int | None = None,
          scheduler: str | None = None, blocks: bool = True, warm: Callable | None = None,
          nadir_sim: bool = True) -> Result:
    """Least-cost droop and headroom allocation meeting every event's limits.

    engine: "pyomo" (Pyomo model on Pyomo's HiGHS interface), "highspy" (bulk load), or
    "auto" (the bulk load; see backends.solve_program).
    extend: called on every model built (lp, info) to add blocks or change the objective
      (studies such as retune proposals); the result's cost is always the headroom cost.
    hz: the stacked case (model.prepare), e.g. with extra event instances.
    workers/scheduler: a separable horizon (solver/blocks.py) is solved block by block, on
      Dask when given; blocks=False solves it whole. warm: (lp, info) -> (columns, values), a
      partial first incumbent. nadir_sim=False skips the simulated nadir check.
    Raises InfeasibleError (with a diagnosis) when no allocation meets the limits."""
    if blocks:
        from optreserve.solver.blocks import separable, solve_blocks

        if separable(case, extend, hz):
            return solve_blocks(case, workers=workers, scheduler=scheduler, engine=engine,
                                time_limit=time_limit, mip_gap=mip_gap, relax=relax,
                                verbose=verbose)
    t_start = time.perf_counter()
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
                lp, info, out = history[-1]
                points = None
                break
            opts["time_limit"] = max(left, 0.01)
        start = history[-1][2].x if history and history[-1][0].n_cols == lp.n_cols else None
        if start is None and warm is not None and not history:
            start = warm(lp, info)
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
            if history:  # a later dead-band iteration ran out of time: keep the last answer
                lp, info, out = history[-1]
                points = None
                break
            hint = (f"; no allocation found within the time limit of {time_limit:g} s: raise "
                    "--time-limit" if out.status == "no_solution" else "")
            raise SolverError(f"HiGHS stopped without a usable allocation ({out.status}: "
                              f"{out.message}){hint}")
        info.hz = dispatch_view(info.hz, lp, out.x)
        history.append((lp, info, out))
        progress.step("recomputing settled points independently")
        points = exact_points(info, lp, out.x)
        exact = np.abs(points.deviation_hz)
        live = info.hz.dP > 0
        if not _needs_fixed_point(info):
            # no row depends on the settled guess: the exact deviation is the model's own
            info.x_hat = np.where(live, exact, info.x_hat)
            if nadir_sim and _nadir_round(case, info, lp, out, nadir):
                continue
            break
        if np.all(np.abs(exact - info.x_hat)[live] <= FIXED_POINT_TOL_HZ) or (
                iterations >= FIXED_POINT_MAX_ITER):
            if nadir_sim and _nadir_round(case, info, lp, out, nadir):
                x_hat = np.where(live & np.isfinite(exact), exact, info.x_hat)
                continue
            break
        x_hat = np.where(live & np.isfinite(exact), exact, info.x_hat)
        points = None

    result = _make_result(case, lp, info, out, relax, points)
    result.nadir_check = {k: nadir[k] for k in ("checked", "rounds", "worst_hz")}
    # our own tie-break price on headroom (model.TIE_BREAK_PER_MW_H) makes HiGHS remark on
    # "excessively small costs": that one is expected and not passed on
    result.solver_warnings = list(dict.fromkeys(
        w for _, _, o in history for w in o.warnings if "small costs" not in w))
    result.iterations = iterations
    t_price = _attach_prices(result, lp, info, out)
    t_build += t_price[0]
    t_solve += t_price[1]
    result.timings_s.update(read=case.read_time_s, build=t_build, solve=t_solve, write=0.0,
                            total=time.perf_counter() - t_start + case.read_time_s)
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
    for m in live:
        t = int(hz.inst_t[m])
        g = gain[t].copy()
        if hz.absent[m] >= 0:
            g[hz.absent[m]] = 0.0
        key = (t, int(hz.absent[m]))
        if key not in systems:
            systems[key] = build_system(case, g, r_up[t], r_dn[t], t=t)
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

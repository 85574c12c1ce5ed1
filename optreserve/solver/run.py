"""Solve a case: build the model, run HiGHS, settle dead-band fixed points, verify
independently, read prices, and return a Result of pandas tables."""

from __future__ import annotations

import time
from dataclasses import dataclass, field
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
from optreserve.solver.nadir_loop import (
    NADIR_LOOSEN,
    _nadir_final,
    _nadir_on_infeasible,
    _nadir_round,
    _nadir_state,
)
from optreserve.solver.outcome import TIME_STATUSES, NoAllocationYet, best_verified, failed_pass
from optreserve.solver.prices import _attach_prices
from optreserve.solver.readback import _make_result, dispatch_view, exact_points
from optreserve.solver.timing import Clock, close_total

# Dead-band fixed point: stop when every settled guess moves less than this.
FIXED_POINT_TOL_HZ = 1e-7


FIXED_POINT_MAX_ITER = 30


def solve(case: Case, engine: str = "auto", time_limit: float | None = None,
          mip_gap: float | None = None, relax: bool = False, verbose: bool = False,
          extend: Callable[[LinearProgram, ModelInfo], None] | None = None,
          hz: Horizon | None = None, incremental: bool = False,
          price_step: float | None = None, workers: int | None = None,
          scheduler: str | None = None, blocks: bool = True, warm: Callable | None = None,
          nadir_sim: bool = True) -> Result:
    """Least-cost droop and headroom allocation meeting every event's limits.

    engine: "pyomo" (Pyomo model on Pyomo's HiGHS interface), "highspy" (bulk load), or
    "auto" (the bulk load; see backends.solve_program).
    extend: called on every model built (lp, info) to add blocks or change the objective
      (studies such as retune proposals); the result's cost is always the headroom cost.
    hz: the stacked case (model.prepare), e.g. with extra event instances.
    incremental: also re-solve once per event instance (and own-reserve requirement) grown
      by price_step MW (default max(1 MW, 1 %)) for incremental prices (solver/incremental.py;
      not with extend, whose objective is not the cost).
    workers/scheduler: a separable horizon (solver/blocks.py) is solved block by block, on
      Dask when given; blocks=False solves it whole. warm: (lp, info) -> (columns, values), a
      partial first incumbent. nadir_sim=False skips the simulated nadir check.
    Raises InfeasibleError (with a diagnosis) when no allocation meets the limits."""
    if case.is_nodal:  # buses.csv: lazy sparse flow rows (solver/rowgen.py)
        from optreserve.solver.rowgen import solve_nodal

        return solve_nodal(case, engine, time_limit, mip_gap, relax, verbose, extend, hz)
    if blocks:
        from optreserve.solver.blocks import separable, solve_blocks

        if separable(case, extend, hz):
            return solve_blocks(case, workers=workers, scheduler=scheduler, engine=engine,
                                time_limit=time_limit, mip_gap=mip_gap, relax=relax,
                                verbose=verbose, incremental=incremental,
                                price_step=price_step)
    t_start = time.perf_counter()
    time_limit = time_limit if time_limit is not None else case.solver.time_limit_s
    mip_gap = mip_gap if mip_gap is not None else case.solver.mip_gap
    progress.step("preparing the model data")
    hz = prepare(case) if hz is None else hz
    run = _Run(case, hz, engine, relax, extend, warm, nadir_sim, time_limit, t_start,
               opts=dict(time_limit=time_limit, mip_gap=mip_gap, verbose=verbose),
               nadir=_nadir_state(case), t_build=time.perf_counter() - t_start,
               flows=not lazy_flows(case, hz))
    if incremental and extend is None and not relax:
        run.ahead = _ahead(case, hz, time_limit, price_step)
    try:
        final = None
        while final is None:  # dead-band passes and nadir rounds until one answer stands
            final = _dead_band_pass(run)
        return _finish(run, *final, incremental=incremental, price_step=price_step)
    finally:
        if run.ahead is not None:
            run.ahead.close()


def _ahead(case: Case, hz: Horizon, time_limit, price_step):
    """Price re-solves begun ahead (solver/ahead.py): on cases with a nadir limit (whose last
    candidate comes after a loosening), with a second core to run them."""
    from optreserve.solver.incremental import price_threads

    if case.limits.max_nadir_deviation_hz is None or price_threads() < 2:
        return None
    from optreserve.solver.ahead import Ahead

    return Ahead(case, hz, time_limit, price_step)


# ------------------------------------------------------------------ the solve loop's steps
@dataclass
class _Run:
    """What one solve carries from pass to pass: the case, the options, the passes so far
    (history: (lp, info, out) of every pass with an answer), the dead-band guess, the nadir
    state (_nadir_state) and the time spent."""

    case: Case
    hz: Horizon
    engine: str
    relax: bool
    extend: Callable | None
    warm: Callable | None
    nadir_sim: bool
    time_limit: float | None
    t_start: float
    opts: dict
    nadir: dict
    t_build: float = 0.0
    t_solve: float = 0.0
    clock: Clock = field(default_factory=Clock)  # verify, nadir_check, prices, ...
    x_hat: np.ndarray | None = None  # settled-deviation guess of the next pass
    iterations: int = 0
    history: list = field(default_factory=list)
    retried: bool = False  # the elastic dead-band guess was tried
    timed_out: bool = False  # stopped by the time budget before the passes converged
    flows: bool = True  # flow rows in the program (False: left out until a link overloads)
    last: tuple | None = None  # (lp, x) of the last pass solved: the next pass's warm start
    ahead: object = None  # solver/ahead.py: a price re-solve begun beside the last candidate


def _dead_band_pass(run: _Run):
    """One pass: build, solve, verify. Returns None when another pass is needed, else the
    answer (lp, info, out, points; points None when they must be recomputed)."""
    run.iterations += 1
    lp, info = _build_pass(run)
    stop = _time_budget(run)
    if stop is not None:
        return stop
    out = _solve_pass(run, lp, info)
    if out.status == "infeasible":
        return _on_infeasible(run, info)
    if out.x is None:
        return _on_no_answer(run, out)
    return _after_pass(run, lp, info, out)


def _build_pass(run: _Run):
    t0 = time.perf_counter()
    progress.step("building the model" + (f" (dead-band pass {run.iterations})"
                                           if run.iterations > 1 else ""))
    lp, info = build_model(run.case, x_hat=run.x_hat, relax=run.relax, hz=run.hz,
                           nadir_scale=run.nadir["guide"], flows=run.flows)
    info.guide = run.nadir["guide"].copy()  # the loop changes its own guide later
    if run.extend is not None:
        run.extend(lp, info)
    run.t_build += time.perf_counter() - t0
    return lp, info


def _time_budget(run: _Run):
    """The dead-band passes share one time budget: when it is spent after a pass with an
    answer, the best verified pass stands (status time_limit); else the pass gets what is
    left."""
    if run.time_limit is None:
        return None
    left = run.time_limit - (time.perf_counter() - run.t_start)
    if run.history and left <= 0:
        run.timed_out = True
        return best_verified(run.case, run.history, run.time_limit)
    run.opts["time_limit"] = max(left, 0.01)
    return None


def _solve_pass(run: _Run, lp: LinearProgram, info: ModelInfo) -> Outcome:
    """HiGHS on the pass's program, warm-started from the last pass solved (its columns the
    two programs share) or from the caller's warm start on the first; after the last nadir
    loosening, the likeliest incremental-price re-solve is begun beside it (solver/ahead.py)."""
    h = run.history
    start = carry_start(*run.last, lp) if run.last is not None else None
    if start is None and run.warm is not None and not h:
        start = run.warm(lp, info)
    g = run.nadir["guide"]
    if (run.ahead is not None and h and not g.cuts and not g.relaxed
            and run.nadir["loosened"] >= NADIR_LOOSEN):
        run.ahead.start(info, h[-1])  # after the last loosening: likely the answer's program
    out = solve_program(lp, engine=run.engine, want_duals=not lp.is_mip, start=start,
                        **run.opts)
    if out.x is not None:
        run.last = (lp, out.x)
    run.t_build += out.emit_time_s
    run.t_solve += out.solve_time_s
    return out


def _on_infeasible(run: _Run, info: ModelInfo):
    """An infeasible pass: retry the dead-band guess, or relax the nadir rows (the simulation
    then decides), or keep the last good pass; with none, the diagnosis (InfeasibleError)."""
    first_with_flows = not any(i.flows for _, i, _ in run.history)
    if first_with_flows and _needs_fixed_point(info) and not run.retried:
        # the first guess (every event at the limit) can misjudge dead-band flows: take the
        # settled points of the least-violating allocation and try again
        run.retried = True
        e_lp, e_info = build_model(run.case, elastic=True, hz=run.hz,
                                   nadir_scale=run.nadir["guide"])
        if run.extend is not None:
            run.extend(e_lp, e_info)
        e_out = solve_program(e_lp, engine="highspy")
        if e_out.x is not None:
            guess = np.abs(exact_points(e_info, e_lp, e_out.x).deviation_hz)
            run.x_hat = np.where((run.hz.dP > 0) & np.isfinite(guess) & (guess > 0), guess,
                                 info.x_hat)
            run.iterations = 0
            return None
    if _nadir_on_infeasible(run.case, run.hz, run.nadir, run.history):
        run.iterations = 0  # the nadir rows alone were infeasible: the simulation decides
        run.retried, run.x_hat = False, None  # and the dead-band guess starts again with them
        return None
    if not run.history:
        raise diagnose(run.case, run.hz, run.extend, run.nadir["guide"])
    # the dead-band guess moved into an infeasible corner: keep the last good answer
    lp, info, out = run.history[-1]
    return lp, info, out, None


def _on_no_answer(run: _Run, out: Outcome):
    """HiGHS stopped without an allocation: a failure is a SolverError in any pass; a time
    limit keeps the best verified pass, or there is no allocation yet."""
    if out.status not in TIME_STATUSES:
        raise failed_pass(out, run.iterations) if run.history else SolverError(
            f"HiGHS stopped without a usable allocation ({out.status}: {out.message})")
    if run.history:  # a later dead-band pass ran out of time: the best verified answer
        run.timed_out = True
        return best_verified(run.case, run.history, run.time_limit)
    raise NoAllocationYet.within(run.time_limit, out.message)


def _after_pass(run: _Run, lp: LinearProgram, info: ModelInfo, out: Outcome):
    """A pass with an answer: the settled points recomputed independently; another pass
    while the dead-band guess has not settled, a nadir round once it has."""
    info.hz = dispatch_view(info.hz, lp, out.x)
    progress.step("recomputing settled points independently")
    with run.clock("verify"):
        points = exact_points(info, lp, out.x)
    verdict, guess = settle_pass(info, points, FIXED_POINT_TOL_HZ)
    if verdict == "overload":  # no answer: not kept in the history
        run.flows, run.x_hat = True, guess
        return None
    run.history.append((lp, info, out))
    if verdict == "again" and run.iterations < FIXED_POINT_MAX_ITER:
        run.x_hat = guess
        return None
    if _nadir_round_timed(run, info, lp, out):
        run.x_hat = guess
        return None
    return lp, info, out, points


def _nadir_round_timed(run: _Run, info: ModelInfo, lp: LinearProgram, out: Outcome) -> bool:
    return run.nadir_sim and run.clock.run("nadir_check", _nadir_round, run.case, info, lp,
                                           out, run.nadir)


def _finish(run: _Run, lp: LinearProgram, info: ModelInfo, out: Outcome, points,
            incremental: bool = False, price_step: float | None = None) -> Result:
    """The answer as a Result: confirmed by the nadir simulation, verified independently,
    with prices (and incremental prices) and the time of every step."""
    case, clock, nadir = run.case, run.clock, run.nadir
    with clock("nadir_final"):  # the answer returned is one the simulation has checked
        lp, info, out, swapped = _nadir_final(case, info, lp, out, nadir)
    points = None if swapped else points
    with clock("verify"):
        result = _make_result(case, lp, info, out, run.relax, points,
                              check_model=not run.timed_out)
    result.nadir_check = {k: nadir[k] for k in ("checked", "rounds", "worst_hz", "confirmed",
                                                 "cuts", "relaxed", "loosened")}
    if nadir["confirmed"] is False:
        result.status = "nadir_unconfirmed"
    # our own tie-break price on headroom (model.TIE_BREAK_PER_MW_H) makes HiGHS remark on
    # "excessively small costs": that one is expected and not passed on
    result.solver_warnings = list(dict.fromkeys(
        w for _, _, o in run.history for w in o.warnings if "small costs" not in w))
    result.iterations = run.iterations
    with clock("prices"):  # its extra LP's build and solve included
        _attach_prices(result, lp, info, out)
    if incremental and run.extend is None and not run.relax:
        from optreserve.solver.incremental import attach_incremental

        with clock("incremental_prices"):  # the MILP re-solves at the grown event sizes
            # at the nadir rows the solve ended with (loosened scale, simulation cuts)
            attach_incremental(result, case, run.hz, info, out.x, price_step, run.time_limit,
                               info.guide if info.guide is not None else nadir["guide"], lp,
                               out, run.ahead.for_answer(info) if run.ahead else None)
    result.timings_s.update(read=case.read_time_s, build=run.t_build, solve=run.t_solve,
                            **clock, write=0.0)
    close_total(result.timings_s, time.perf_counter() - run.t_start + case.read_time_s)
    return result


def settle_pass(info: ModelInfo, points, tol_hz: float) -> tuple[str, np.ndarray]:
    """What a pass's independently computed points (exact_points) say, and the settled guess
    for another pass (its exact settled points):
    "overload": its program left the flow rows out and a link overloads: solve again with
      them (formulation.md 7a);
    "settled": no row depends on the guess, or the guess is the exact point within tol_hz
      (info.x_hat then is the exact point, so the optimiser's own figures are the exact
      ones);
    "again": the dead-band guess moved: solve again at the new one (section 7)."""
    exact = np.abs(points.deviation_hz)
    live = (info.hz.dP > 0) & np.isfinite(exact)
    guess = np.where(live, exact, info.x_hat)
    if flows_left_out(info) and overloads(info.hz, points):
        return "overload", guess
    if not _needs_fixed_point(info):
        info.x_hat = guess
        return "settled", guess
    if np.all(np.abs(exact - info.x_hat)[live] <= tol_hz):
        return "settled", guess
    return "again", guess


def lazy_flows(case: Case, hz: Horizon) -> bool:
    """Whether the first pass leaves the flow rows out: a fixed-output case with links. A
    program without them is a relaxation that does not depend on the settled guess; when
    its optimum overloads no link by the independent flows it is the answer (formulation.md,
    section 7a), otherwise the rows are added and the dead-band passes run as before."""
    return bool(len(case.links)) and not hz.co_opt


def flows_left_out(info: ModelInfo) -> bool:
    return bool(len(info.case.links)) and not info.flows


# A flow counts as an overload above its limit by more than this (relative): the solver's
# feasibility tolerance, far below the final verification's allowance (readback.py).
OVERLOAD_REL = 1e-7


def overloads(hz: Horizon, points) -> bool:
    """Whether any event instance's independently computed flows exceed a link limit."""
    live = hz.dP > 0
    if not live.any() or hz.F0.shape[1] == 0:
        return False
    lim = hz.Fmax[hz.inst_t[live]]
    flow = np.abs(points.flow_after_mw[live])
    return bool((flow > lim * (1 + OVERLOAD_REL) + OVERLOAD_REL).any())


def carry_start(old: LinearProgram, x: np.ndarray, lp: LinearProgram):
    """The last pass's solution as the warm start of lp: whole when the columns are laid out
    alike, else the column blocks both share (a partial start HiGHS completes)."""
    if old.n_cols == lp.n_cols and old.var_blocks == lp.var_blocks:
        return x
    idx, val = [], []
    for name, b in lp.var_blocks.items():
        o = old.var_blocks.get(name)
        if o is not None and o.size == b.size:
            idx.append(b.idx())
            val.append(x[o.slice])
    if not idx:
        return None
    return np.concatenate(idx), np.concatenate(val)


def _needs_fixed_point(info: ModelInfo) -> bool:
    if not info.flows:  # no row depends on the settled guess
        return False
    hz = info.hz
    live = (hz.dP > 0).any() or (hz.co_opt and (hz.dP_var >= 0).any())
    guessed = (hz.d_hz[hz.capable_b.any(axis=0)] > 0).any() or hz.co_opt
    return bool(len(info.case.links) and guessed and live)

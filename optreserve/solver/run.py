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
    nadir = _nadir_state(case)
    while True:
        iterations += 1
        t0 = time.perf_counter()
        progress.step("building the model" + (f" (dead-band pass {iterations})"
                                               if iterations > 1 else ""))
        lp, info = build_model(case, x_hat=x_hat, relax=relax, hz=hz,
                               nadir_scale=nadir["guide"])
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
                e_lp, e_info = build_model(case, elastic=True, hz=hz, nadir_scale=nadir["guide"])
                if extend is not None:
                    extend(e_lp, e_info)
                e_out = solve_program(e_lp, engine="highspy")
                if e_out.x is not None:
                    guess = np.abs(exact_points(e_info, e_lp, e_out.x).deviation_hz)
                    x_hat = np.where((hz.dP > 0) & np.isfinite(guess) & (guess > 0), guess,
                                     info.x_hat)
                    iterations = 0
                    continue
            if _nadir_on_infeasible(case, hz, nadir, history):
                iterations = 0  # the nadir rows alone were infeasible: the simulation decides
                retried, x_hat = False, None  # and the dead-band guess starts again with them
                continue
            if not history:
                raise diagnose(case, hz, extend, nadir["guide"])
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
            if nadir_sim and clock.run("nadir_check", _nadir_round, case, info, lp, out, nadir):
                continue
            break
        if np.all(np.abs(exact - info.x_hat)[live] <= FIXED_POINT_TOL_HZ) or (
                iterations >= FIXED_POINT_MAX_ITER):
            if nadir_sim and clock.run("nadir_check", _nadir_round, case, info, lp, out, nadir):
                x_hat = np.where(live & np.isfinite(exact), exact, info.x_hat)
                continue
            break
        x_hat = np.where(live & np.isfinite(exact), exact, info.x_hat)
        points = None

    with clock("nadir_final"):  # the answer returned is one the simulation has checked
        lp, info, out, swapped = _nadir_final(case, info, lp, out, nadir)
    points = None if swapped else points
    with clock("verify"):
        result = _make_result(case, lp, info, out, relax, points, check_model=not timed_out)
    result.nadir_check = {k: nadir[k] for k in ("checked", "rounds", "worst_hz", "confirmed",
                                                 "cuts", "relaxed", "loosened")}
    if nadir["confirmed"] is False:
        result.status = "nadir_unconfirmed"
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
            # at the nadir rows the solve ended with (loosened scale, simulation cuts)
            attach_incremental(result, case, hz, info, out.x, price_step, time_limit,
                               nadir["guide"])
    result.timings_s.update(read=case.read_time_s, build=t_build, solve=t_solve, **clock,
                            write=0.0)
    close_total(result.timings_s, time.perf_counter() - t_start + case.read_time_s)
    return result


# The nadir rows are a conservative filter on the centre of inertia; the simulation decides.
# Every event instance (up to NADIR_SIM_MAX_INSTANCES) of a candidate is simulated
# (dynamics/check.py); where an area dips past the limit, a cut from that simulation is added
# (model/nadir.py NadirGuide) and the case solved again, at most NADIR_ROUNDS times. A solve
# exits 0 only with every instance confirmed; otherwise status "nadir_unconfirmed" (exit 6),
# or InfeasibleError (exit 3) when every provider at its most still fails in simulation.
NADIR_SIM_MAX_INSTANCES = 2000


NADIR_ROUNDS = 8


# cuts aim this far inside the limit, so that a candidate does not stop a hair outside
NADIR_MARGIN = 0.995
NADIR_TOL_HZ = 1e-5
# The rows are conservative: a confirmed allocation whose dips stay well inside the limit is
# re-solved with each instance's rows loosened by N / dip (at most this many times), and the
# cheapest confirmed allocation is kept.
NADIR_LOOSEN = 3


def _nadir_state(case: Case) -> dict:
    from optreserve.model.nadir import NadirGuide

    return {"scale": None, "guide": NadirGuide(), "rounds": 0, "checked": False,
            "worst_hz": None, "confirmed": None, "cuts": 0, "relaxed": False, "loosened": 0,
            "best": None, "simulate_s": 0.0}


def _nadir_simulate(case: Case, hz, gain, r_up, r_dn, energy_for=None):
    from optreserve.dynamics.check import check_instances

    return check_instances(case, hz.inst_t, hz.sigma * hz.dP, hz.inst_area, hz.trip,
                           hz.absent, gain, r_up, r_dn, energy_for, getattr(hz, "also_lost", None))


def _also_lost(hz, idx) -> list[tuple] | None:
    """Per instance of idx the units lost besides hz.trip (the rest of a common-mode trip)."""
    if hz.lost is None:
        return None
    lm, lj = lost_pairs(hz, idx)
    pos = {int(m): k for k, m in enumerate(idx)}
    out: list[list] = [[] for _ in idx]
    for m, j in zip(lm.tolist(), lj.tolist()):
        if j != hz.trip[m]:
            out[pos[m]].append(j)
    return [tuple(x) for x in out]


def _nadir_live(case: Case, hz) -> np.ndarray:
    return np.nonzero((hz.dP > 0) & (hz.H_sys > 0))[0]


def _nadir_round(case: Case, info: ModelInfo, lp: LinearProgram, out: Outcome,
                 nadir: dict, cut: bool = True) -> bool:
    """Simulate every event instance of the candidate against the nadir limit; where one
    dips past it, add a cut and ask for another solve. Returns True when the case must be
    solved again. Sets nadir["confirmed"] (True: every instance within the limit)."""
    N_max = case.limits.max_nadir_deviation_hz
    hz = info.hz
    live = _nadir_live(case, hz)
    if N_max is None or len(live) == 0:
        return False
    if len(hz.dP) > NADIR_SIM_MAX_INSTANCES:
        nadir["confirmed"] = False
        return False
    progress.step("simulating events against the nadir limit"
                  + (f" (round {nadir['rounds'] + 1})" if nadir["rounds"] else ""))
    gain, r_up, r_dn = period_values(lp, info, out.x)
    sub = _sub_hz(hz, live)
    t0 = time.perf_counter()
    chk = _nadir_simulate(case, sub, gain, r_up, r_dn)
    nadir["simulate_s"] += time.perf_counter() - t0
    worst = np.zeros(len(hz.dP))
    worst[live] = chk.dip_hz
    nadir["checked"] = True
    nadir["worst_hz"] = float(worst.max())
    bad = chk.dip_hz > N_max + NADIR_TOL_HZ
    nadir["confirmed"] = not bad.any()
    nadir["out"] = out
    g = nadir["guide"]
    if cut and not g.cuts and not g.relaxed:
        if not bad.any():
            return _nadir_loosen(nadir, hz, live, chk.dip_hz, N_max, (lp, info, out))
        if nadir["best"] is not None:  # loosened too far: the last confirmed answer stands
            return False
    stuck = nadir.get("last_worst") is not None and abs(nadir["last_worst"] - worst.max()) < 1e-9
    nadir["last_worst"] = float(worst.max())
    if bad.any() and cut and not g.relaxed and (nadir["rounds"] >= NADIR_ROUNDS or stuck):
        return _nadir_restart_relaxed(nadir)  # the cuts did not move the answer
    if not bad.any() or nadir["rounds"] >= NADIR_ROUNDS or not cut:
        return False
    # per violating instance: the candidate's own simulated responses at its nadir time as
    # coefficients, and the energy that would have kept the dip at the limit
    again = _nadir_simulate(case, sub, gain, r_up, r_dn, energy_for=bad)
    # what each provider's demand could reach by the limit: min(r, K (N - d)^+) (the model's
    # q_a + q_b cannot exceed it; in a relaxed model q itself is not yet meaningful)
    r_dir = np.where((hz.sigma > 0)[:, None], r_up[hz.inst_t], r_dn[hz.inst_t])
    q = np.minimum(r_dir, gain[hz.inst_t] * np.maximum(N_max - hz.d_hz, 0.0)[None, :])
    f_n = case.nominal_frequency_hz
    from optreserve.model.nadir import fresh_coef

    for j in np.nonzero(bad)[0]:
        m = int(live[j])
        t_star = float(chk.time_s[j])
        E = again.energy_mw_s[j]
        with np.errstate(divide="ignore", invalid="ignore"):
            c = np.where(q[m] > 1e-6, E / q[m], 0.0)
        # units the candidate did not use: credited as the rows would at that time
        new = q[m] <= 1e-6
        c[new] = fresh_coef(case, hz, m, t_star)[new]
        c = np.maximum(c, 0.0)
        short = 2.0 * hz.H_sys[m] / f_n * (chk.dip_hz[j] - NADIR_MARGIN * N_max)
        nadir["guide"].cuts.append((m, c, float(E.sum() + max(short, 0.0))))
    nadir["cuts"] = len(nadir["guide"].cuts)
    nadir["rounds"] += 1
    return True


def _sub_hz(hz, idx):
    """The instance arrays of hz restricted to idx (what check_instances reads)."""
    from types import SimpleNamespace

    return SimpleNamespace(inst_t=hz.inst_t[idx], sigma=hz.sigma[idx], dP=hz.dP[idx],
                           inst_area=hz.inst_area[idx], trip=hz.trip[idx],
                           absent=hz.absent[idx], also_lost=_also_lost(hz, idx))


def _nadir_at_most(case: Case, hz) -> tuple[float, int]:
    """The worst simulated dip (Hz) and its instance with every available provider at its
    most: the highest gain its band and headroom allow, and all the headroom it may hold."""
    live = _nadir_live(case, hz)
    gain = hz.K_hi_b[hz.block] * hz.avail
    chk = _nadir_simulate(case, _sub_hz(hz, live), gain, hz.R_up * hz.avail,
                          hz.R_dn * hz.avail)
    j = int(np.argmax(chk.dip_hz))
    return float(chk.dip_hz[j]), int(live[j])


def _nadir_loosen(nadir: dict, hz, live, dip, N_max: float, candidate) -> bool:
    """A confirmed candidate: keep it if it is the cheapest so far, and ask for a solve with
    each instance's rows loosened by N / dip while dips stay well inside the limit."""
    best = nadir["best"]
    if best is None or candidate[2].objective < best[2].objective:
        nadir["best"] = (*candidate, float(dip.max()))
    if nadir["loosened"] >= NADIR_LOOSEN or dip.max() >= NADIR_MARGIN * N_max:
        return False
    g = nadir["guide"]
    sc = np.ones(len(hz.dP)) if g.scale is None else g.scale.copy()
    sc[live] *= NADIR_MARGIN * N_max / np.maximum(dip, 1e-6)
    g.scale = sc
    nadir["loosened"] += 1
    return True


def _nadir_on_infeasible(case: Case, hz, nadir: dict, history: list) -> bool:
    """A solve came back infeasible. The nadir rows alone are conservative: when they make the
    first solve infeasible, solve again with them relaxed (True), the simulation and its cuts
    then decide. When the cuts did it, give up (_nadir_give_up)."""
    if case.limits.max_nadir_deviation_hz is None:
        return False
    g = nadir["guide"]
    if not history and not g.relaxed and not g.cuts:
        g.relaxed = nadir["relaxed"] = True
        return True
    if g.cuts and history:
        if not g.relaxed:  # the cuts from the rows' answer led nowhere: start from below
            return _nadir_restart_relaxed(nadir)
        _nadir_give_up(case, hz, nadir)
    return False


def _nadir_restart_relaxed(nadir: dict) -> bool:
    """Drop the cuts and the rows and search again from the cheapest allocation the other
    limits allow, guided by the simulation alone (a governor that swings worse with more gain,
    such as hydro with permanent droop only, is approached from the stable side)."""
    g = nadir["guide"]
    g.cuts.clear()
    g.scale = None
    g.relaxed = nadir["relaxed"] = True
    nadir["rounds"] = 0
    return True


def _nadir_final(case: Case, info: ModelInfo, lp: LinearProgram, out: Outcome,
                 nadir: dict):
    """The answer to return: the cheapest confirmed one when the loosened rows found any,
    else the last; it must be the one simulated: check it when it was not, and give up
    (InfeasibleError or unconfirmed) when it breaks the limit. Returns (lp, info, out,
    swapped)."""
    if case.limits.max_nadir_deviation_hz is None or len(_nadir_live(case, info.hz)) == 0:
        return lp, info, out, False
    best = nadir["best"]
    if best is not None and (nadir.get("out") is not out or not nadir["confirmed"]
                             or best[2].objective < out.objective):
        swapped = best[2] is not out
        lp, info, out = best[:3]
        nadir.update(out=out, confirmed=True, worst_hz=best[3])
        return lp, info, out, swapped
    if nadir.get("out") is not out:
        _nadir_round(case, info, lp, out, nadir, cut=False)
    if nadir["confirmed"] is False and len(info.hz.dP) <= NADIR_SIM_MAX_INSTANCES:
        _nadir_give_up(case, info.hz, nadir)
    return lp, info, out, False


def _nadir_give_up(case: Case, hz, nadir: dict) -> None:
    """No candidate could be confirmed: raise InfeasibleError when every provider at its most
    still breaks the limit in simulation; otherwise mark the result unconfirmed."""
    from optreserve.errors import InfeasibleError

    dip, m = _nadir_at_most(case, hz)
    N_max = case.limits.max_nadir_deviation_hz
    if dip > N_max + NADIR_TOL_HZ:
        name = hz.inst_name[m]
        msg = (f"nadir limit {N_max:g} Hz cannot be met: with every provider at its most "
               f"(highest gain, all its headroom) event {name} still dips {dip:.3f} Hz in "
               "simulation")
        line = (f"event {name}: simulated nadir {dip:.3f} Hz with every provider at its most "
                f"(limit {N_max:g} Hz)")
        raise InfeasibleError(msg, [line])
    nadir["confirmed"] = False


def _needs_fixed_point(info: ModelInfo) -> bool:
    hz = info.hz
    live = (hz.dP > 0).any() or (hz.co_opt and (hz.dP_var >= 0).any())
    guessed = (hz.d_hz[hz.capable_b.any(axis=0)] > 0).any() or hz.co_opt
    return bool(len(info.case.links) and guessed and live)

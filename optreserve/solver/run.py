"""Solve a case: build the model, run HiGHS, settle dead-band fixed points, verify
independently, read prices, and return a Result of pandas tables."""

from __future__ import annotations

import time
from typing import Callable

import numpy as np
import pandas as pd

from optreserve import progress
from optreserve.solver.backends import Outcome, solve_highs, solve_program
from optreserve.case.data import Case
from optreserve.errors import InfeasibleError, SolverError, VerificationError
from optreserve.model.rows import Horizon, ModelInfo, build_model, effective_factor, prepare
from optreserve.model.program import LinearProgram
from optreserve.output.results import Result
from optreserve.verify.settle import BatchPoints, settle_instances

# An independent recalculation may differ from the optimiser's own figures by this much
# before it counts as an error.
AGREE_HZ = 0.5e-3
AGREE_MW = 0.5
# Dead-band fixed point: stop when every settled guess moves less than this.
FIXED_POINT_TOL_HZ = 1e-7
FIXED_POINT_MAX_ITER = 30


def solve(case: Case, engine: str = "auto", time_limit: float | None = None,
          mip_gap: float | None = None, relax: bool = False, verbose: bool = False,
          extend: Callable[[LinearProgram, ModelInfo], None] | None = None,
          hz: Horizon | None = None) -> Result:
    """Least-cost droop and headroom allocation meeting every event's limits.

    engine: "pyomo" (Pyomo model on Pyomo's HiGHS interface), "highspy" (bulk load), or
    "auto" (Pyomo for small models, bulk above backends.AUTO_BULK_NONZEROS nonzeros).
    extend: called on every model built (lp, info) to add blocks or change the objective
      (studies such as retune proposals); the result's cost is always the headroom cost.
    hz: the stacked case (model.prepare), e.g. with extra event instances.
    Raises InfeasibleError (with a diagnosis) when no allocation meets the limits."""
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
            if _nadir_round(case, info, lp, out, nadir):
                continue
            break
        if np.all(np.abs(exact - info.x_hat)[live] <= FIXED_POINT_TOL_HZ) or (
                iterations >= FIXED_POINT_MAX_ITER):
            if _nadir_round(case, info, lp, out, nadir):
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


def dispatch_view(hz: Horizon, lp: LinearProgram, x: np.ndarray) -> Horizon:
    """Under co-optimisation: the stacked case at the dispatch found (outputs, pre-event flows
    F0 = Phi (P_a - L_a), and trip sizes that follow the tripped unit's output)."""
    if not hz.co_opt:
        return hz
    from dataclasses import replace

    T, N = hz.T, hz.N
    out = hz.out.copy()
    tt, ii = np.nonzero(np.broadcast_to(hz.disp, (T, N)))
    out[tt, ii] = np.round(lp.value(x, "p"), 6)  # 1 W: below it is solver round-off
    onehot = np.zeros((N, hz.load.shape[1]))
    onehot[np.arange(N), hz.area] = 1.0
    F0 = np.einsum("tla,ta->tl", hz.Phi, out @ onehot - hz.load)
    mv = hz.dP_var >= 0
    size = np.where(mv, out[hz.inst_t, np.maximum(hz.dP_var, 0)], hz.sigma * hz.dP)
    return replace(hz, out=out, F0=F0, dP=np.abs(size), sigma=np.where(size < 0, -1.0, 1.0))


def period_values(lp: LinearProgram, info: ModelInfo, x: np.ndarray):
    """Per period (T, N): gain that responds, up and down headroom."""
    hz = info.hz
    N, T = hz.N, hz.T
    K = lp.value(x, "K").reshape(hz.n_blocks, N)
    K = np.where(K > 1e-9, K, 0.0)
    gain = K[hz.block] * hz.avail
    r_up = lp.value(x, "r_up").reshape(T, N)
    r_dn = lp.value(x, "r_dn").reshape(T, N)
    # the solver may leave headroom a hair (its feasibility tolerance) below what the droop
    # needs at full activation: report the rule's value, not the round-off
    need = gain * hz.a_act[None, :]
    r_up = np.where(hz.need_up[:, None] & (need - r_up > 0) & (need - r_up < 1e-5), need, r_up)
    r_dn = np.where(hz.need_dn[:, None] & (need - r_dn > 0) & (need - r_dn < 1e-5), need, r_dn)
    return gain, np.where(r_up > 1e-9, r_up, 0.0), np.where(r_dn > 1e-9, r_dn, 0.0)


def exact_points(info: ModelInfo, lp: LinearProgram, x: np.ndarray) -> BatchPoints:
    """Independent settled points of every event instance (scalar balance + DC flows)."""
    gain, r_up, r_dn = period_values(lp, info, x)
    return evaluate_allocation(info.case, info.hz, gain, r_up, r_dn)


def evaluate_allocation(case: Case, hz: Horizon, gain, r_up, r_dn) -> BatchPoints:
    """Independent settled points of every instance for per-period gains and headroom."""
    apos = {a: k for k, a in enumerate(case.areas["area"])}
    return settle_instances(
        hz.dP, hz.sigma, hz.inst_t, hz.inst_area, hz.trip, gain, r_up, r_dn, hz.d_hz, hz.area,
        hz.D_a, hz.F0, [apos[a] for a in case.links["from_area"]],
        [apos[a] for a in case.links["to_area"]],
        case.link_matrix("reactance_pu").astype(float), absent=hz.absent)


def model_beta(lp: LinearProgram, info: ModelInfo, x: np.ndarray) -> np.ndarray:
    """beta'_ma (MW/Hz) per event instance and area as the model sees it: dead-band-reduced
    gains at the guess x_hat, tripped unit out, plus load self-regulation."""
    hz = info.hz
    n_a, n_k = len(info.case.areas), len(info.classes)
    K = lp.value(x, "K")
    G = lp.value(x, "G").reshape(-1, n_a, n_k)
    t = hz.inst_t
    c = effective_factor(info.classes, info.x_hat)  # (M, K)
    beta = (G[info.group_of_t[t]] * c[:, None, :]).sum(axis=2) + hz.D_a[t]  # (M, A)
    for arr in (hz.trip, hz.absent):  # providers that respond in the period but not here
        m = np.nonzero(arr >= 0)[0]
        j = arr[m]
        m, j = m[hz.avail[t[m], j]], j[hz.avail[t[m], j]]
        with np.errstate(divide="ignore", invalid="ignore"):
            cj = np.clip(1.0 - hz.d_hz[j] / np.where(info.x_hat[m] > 0, info.x_hat[m], np.inf),
                         0.0, 1.0)
        np.subtract.at(beta, (m, hz.area[j]), cj * K[hz.block[t[m]] * hz.N + j])
    return beta


def model_prediction(lp: LinearProgram, info: ModelInfo, x: np.ndarray):
    """The optimiser's own view of each event instance: settled |df| = dP / beta' and link
    flows from the multiply-by-beta' form, at the gains it chose."""
    hz = info.hz
    beta = model_beta(lp, info, x)
    t = hz.inst_t
    B = beta.sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        dev = np.where(hz.dP > 0, hz.dP / B, 0.0)
        share = beta / B[:, None]
    Phi = hz.Phi[t]  # (M, L, A)
    F0 = hz.F0[t]
    Phi_e = np.take_along_axis(Phi, hz.inst_area[:, None, None], axis=2)[:, :, 0]
    flows = F0 + (hz.sigma * hz.dP)[:, None] * (np.einsum("mla,ma->ml", Phi, share) - Phi_e)
    flows[hz.dP == 0] = F0[hz.dP == 0]
    return dev, flows


def _make_result(case: Case, lp: LinearProgram, info: ModelInfo, out: Outcome,
                 relax: bool, points: BatchPoints | None = None) -> Result:
    if points is None:
        points = exact_points(info, lp, out.x)
    dev_model, flow_model = model_prediction(lp, info, out.x)
    dev_exact = np.abs(points.deviation_hz)
    flows_exact = points.flow_after_mw
    dis_f = float(np.max(np.abs(dev_exact - dev_model), initial=0.0))
    dis_p = float(np.max(np.abs(flows_exact - flow_model), initial=0.0))
    if not np.all(np.isfinite(dev_exact)) or dis_f > AGREE_HZ or dis_p > AGREE_MW:
        raise VerificationError(
            f"independent recalculation disagrees with the optimiser: settled deviation by "
            f"{dis_f * 1000:.3f} mHz, link flows by {dis_p:.3f} MW (allowed {AGREE_HZ * 1000} mHz,"
            f" {AGREE_MW} MW)")
    F = case.limits.max_settled_deviation_hz
    viol_f = dev_exact - F
    lim = info.hz.Fmax[info.hz.inst_t]
    viol_p = np.abs(flows_exact) - lim
    if (viol_f > 1e-5).any() or (viol_p > 1e-3 * np.maximum(1.0, lim / 100)).any():
        raise VerificationError(
            "the allocation breaks a limit after independent recalculation: "
            f"worst settled excess {max(viol_f.max(initial=0), 0) * 1000:.4f} mHz, worst link "
            f"excess {max(viol_p.max(initial=0), 0):.4f} MW")
    gain, r_up, r_dn = period_values(lp, info, out.x)
    return Result.build(case, info, lp, out, gain, r_up, r_dn, points, relax,
                        {"max_frequency_disagreement_hz": dis_f,
                         "max_flow_disagreement_mw": dis_p})


def _attach_prices(result: Result, lp: LinearProgram, info: ModelInfo, out: Outcome):
    """Marginal cost of event size per MW and hour of the event's period, from the duals of
    the LP with every integer decision fixed at its optimum (usual market practice).

    Envelope theorem: the event size dP enters the settled row's bound (d/d dP = 1) and the
    coefficients of its flow rows (multiplied-by-beta' form), so
      d cost / d dP = y_settled + sum_flow-rows y_r * (d bound_r/d dP - d row_r/d dP . x).
    With no flow row binding this is the settled row's dual alone.
    Returns the (emit, solve) seconds of the extra LP, if any."""
    o = out
    if lp.is_mip:
        o = solve_highs(_fixed_lp(lp, out.x), want_duals=True)
    extra = (o.emit_time_s, o.solve_time_s) if o is not out else (0.0, 0.0)
    result.prices = area_prices(info, lp, out.x, o.row_dual)
    if o.row_dual is None:
        return extra
    hz = info.hz
    y = o.row_dual
    price = y[lp.row_blocks["settled"].slice].copy()
    if "flow_hi" in lp.row_blocks:
        live = np.nonzero(hz.dP > 0)[0]
        t = hz.inst_t[live]
        Phi = hz.Phi[t]
        Phi_e = np.take_along_axis(Phi, hz.inst_area[live][:, None, None], axis=2)
        V = hz.sigma[live][:, None, None] * (Phi - Phi_e) / hz.Fmax[t][:, :, None]  # dW/d dP
        beta = model_beta(lp, info, o.x)[live]  # includes D_a, which sits in the bound
        # row_r(x) - bound_r = sum_a W_la beta'_a: its derivative is sum_a V_la beta'_a
        g = np.einsum("mla,ma->ml", V, beta)
        n_l = hz.F0.shape[1]
        for name in ("flow_hi", "flow_lo"):
            yr = y[lp.row_blocks[name].slice].reshape(len(live), n_l)
            price[live] -= (yr * g).sum(axis=1)
    if "flow_x" in lp.row_blocks:  # co-optimised flows: dP sits in the bounds of its rows
        live = np.nonzero((hz.dP > 0) | (hz.dP_var >= 0))[0]
        t = hz.inst_t[live]
        Phi_e = np.take_along_axis(hz.Phi[t], hz.inst_area[live][:, None, None], axis=2)[
            :, :, 0]
        n_l = hz.F0.shape[1]
        yr = y[lp.row_blocks["flow_x"].slice].reshape(len(live), n_l)
        fixed_size = hz.dP_var[live] < 0
        price[live] += np.where(fixed_size, (yr * hz.sigma[live][:, None] * Phi_e
                                             / hz.Fmax[t]).sum(axis=1), 0.0)
    price = price / hz.hours[hz.inst_t]
    price[hz.dP == 0] = 0.0
    result.set_event_prices(np.where(np.abs(price) < 1e-9, 0.0, price))
    if hz.co_opt:
        result.extra_files["energy_prices.csv"] = energy_prices(info, lp, y)
    return extra


def energy_prices(info: ModelInfo, lp: LinearProgram, y: np.ndarray) -> pd.DataFrame:
    """Co-optimisation: the marginal cost of one more MWh of demand per area and period, by
    the envelope theorem over every row whose bound moves with an area's load: the balance
    (+1), the pre-event link limits and post-event flow rows (+Phi_la / Fmax through the
    pre-event flow), and through load self-regulation D_a = load x damping the settled rows
    (-F d_a) and the post-event flow rows (-s x Phi_la d_a / Fmax), d_a = damping % / 100."""
    hz, case = info.hz, info.case
    T, A = hz.load.shape
    damp = case.area_matrix("load_damping_pct_per_hz").astype(float) / 100.0  # (T, A)
    price = np.zeros((T, A))
    price += y[lp.row_blocks["balance"].slice][:, None]
    if "pre_flow" in lp.row_blocks:
        L = hz.F0.shape[1]
        yp = y[lp.row_blocks["pre_flow"].slice].reshape(T, L)
        price += np.einsum("tl,tla->ta", yp / hz.Fmax, hz.Phi)
    ys = y[lp.row_blocks["settled"].slice]
    np.add.at(price, hz.inst_t, -(ys * info.F_model)[:, None] * damp[hz.inst_t])
    if "flow_x" in lp.row_blocks:
        live = np.nonzero((hz.dP > 0) | (hz.dP_var >= 0))[0]
        t = hz.inst_t[live]
        L = hz.F0.shape[1]
        yf = y[lp.row_blocks["flow_x"].slice].reshape(len(live), L) / hz.Fmax[t]
        d = np.einsum("ml,mla->ma", yf, hz.Phi[t])
        d = d * (1.0 - hz.sigma[live][:, None] * info.x_hat[live][:, None] * damp[t])
        np.add.at(price, t, d)
    price = price / hz.hours[:, None]
    out = {"area": np.tile(case.areas["area"].to_numpy(object), T)}
    if case.is_horizon:
        out["period"] = np.repeat(np.array(case.periods, dtype=object), A)
    out["energy_price_per_mwh"] = np.where(np.abs(price) < 1e-9, 0.0, price).reshape(-1)
    return pd.DataFrame(out)


# Up room (MW) below which a provider counts as full when looking for the next MW's holder.
ROOM_TOL_MW = 1e-6


def area_prices(info: ModelInfo, lp: LinearProgram, x: np.ndarray,
                row_dual: np.ndarray | None) -> pd.DataFrame:
    """Per area (and period) prices for analysts (docs/formulation.md, "Prices for analysts"):
      reserve_price_per_mw_h: dual of the area's own-reserve row / h_t (the re-optimised cost
        of one more MW of requirement, integers fixed); 0 where the area has no requirement;
      next_mw_up_cost_per_mw_h, next_mw_up_unit: the cheapest provider of the area that takes
        part in that period and has up room left, i.e. the cost per hour of holding one more MW
        of up headroom in the area with every gain and all other headroom unchanged (empty:
        no such provider)."""
    hz, case = info.hz, info.case
    T, A = hz.own.shape
    reserve = np.zeros((T, A)) if row_dual is not None else np.full((T, A), np.nan)
    if row_dual is not None and "own_reserve" in lp.row_blocks:
        ta, aa = np.nonzero(hz.own > 0)
        reserve[ta, aa] = row_dual[lp.row_blocks["own_reserve"].slice] / hz.hours[ta]
    gain, r_up, _ = period_values(lp, info, x)
    price = np.where((gain > 0) & (hz.R_up - r_up > ROOM_TOL_MW), hz.price_up, np.inf)  # (T, N)
    best = np.full((T, A), np.inf)
    who = np.full((T, A), None, dtype=object)
    names = case.units["unit"].to_numpy(object)
    for a in range(A):  # a handful of areas; everything inside is vectorised over (T, units)
        members = np.nonzero(hz.area == a)[0]
        if len(members):
            k = np.argmin(price[:, members], axis=1)
            best[:, a] = price[np.arange(T), members[k]]
            who[:, a] = np.where(np.isfinite(best[:, a]), names[members[k]], None)
    out = {"area": np.tile(case.areas["area"].to_numpy(object), T)}
    if case.is_horizon:
        out["period"] = np.repeat(np.array(case.periods, dtype=object), A)
    out["reserve_price_per_mw_h"] = np.where(np.abs(reserve) < 1e-9, 0.0, reserve).reshape(-1)
    out["next_mw_up_cost_per_mw_h"] = np.where(np.isfinite(best), best, np.nan).reshape(-1)
    out["next_mw_up_unit"] = who.reshape(-1)
    return pd.DataFrame(out)


def _fixed_lp(lp: LinearProgram, x: np.ndarray) -> LinearProgram:
    from copy import copy

    fixed = copy(lp)
    integer = lp.integer
    lo, hi = lp.col_lo, lp.col_hi
    v = np.round(x[integer])
    lo[integer] = v
    hi[integer] = v
    fixed._col_lo, fixed._col_hi = [lo], [hi]
    fixed._integer = [np.zeros(lp.n_cols, dtype=bool)]
    fixed._A = lp._A
    return fixed


# ------------------------------------------------------------------ infeasibility
def diagnose(case: Case, hz: Horizon | None = None, extend=None) -> InfeasibleError:
    """Re-solve with penalised slacks on every limit family and report the smallest relaxation
    that makes the case feasible, in engineering terms (recomputed independently)."""
    lp, info = build_model(case, elastic=True, hz=hz)
    if extend is not None:
        extend(lp, info)
    hz = info.hz
    out = solve_program(lp, engine="highspy")
    if out.x is None:
        return InfeasibleError("no allocation can meet the limits (diagnosis failed: "
                               f"{out.status})")
    points = exact_points(info, lp, out.x)
    labels = [str(p) for p in case.periods] if case.is_horizon else [""]
    F = case.limits.max_settled_deviation_hz
    s_set = lp.value(out.x, "slack_settled")
    link_ids = [str(x) for x in case.links["link"]]
    rows = []
    over_all = np.abs(points.flow_after_mw) - hz.Fmax[hz.inst_t]
    for m in range(len(hz.dP)):
        t = hz.inst_t[m]
        if s_set[m] > 1e-6:
            dev = abs(points.deviation_hz[m])
            rows.append({"family": "event", "element": hz.inst_name[m], "event": hz.inst_name[m],
                         "period": labels[t], "short_mw": float(s_set[m]),
                         "excess_hz": float(dev - F) if np.isfinite(dev) else float("inf"),
                         "over_mw": 0.0})
        for li in np.nonzero(over_all[m] > 1e-3)[0]:
            rows.append({"family": "link", "element": link_ids[li], "event": hz.inst_name[m],
                         "period": labels[t], "short_mw": 0.0, "excess_hz": 0.0,
                         "over_mw": float(over_all[m, li])})
    if "slack_nadir" in lp.var_blocks:
        s_nad = lp.value(out.x, "slack_nadir")
        for m in np.nonzero(s_nad > 1e-6)[0]:
            rows.append({"family": "nadir", "element": hz.inst_name[m], "event": hz.inst_name[m],
                         "period": labels[hz.inst_t[m]], "short_mw": float(s_nad[m]),
                         "excess_hz": 0.0, "over_mw": 0.0})
    if "slack_own" in lp.var_blocks:
        ta, aa = np.nonzero(hz.own > 0)
        s_own = lp.value(out.x, "slack_own")
        for k in np.nonzero(s_own > 1e-6)[0]:
            rows.append({"family": "area", "element": str(case.areas["area"].iloc[aa[k]]),
                         "event": "", "period": labels[ta[k]], "short_mw": float(s_own[k]),
                         "excess_hz": 0.0, "over_mw": 0.0})
    cols = ["family", "element", "event", "period", "short_mw", "excess_hz", "over_mw"]
    diag = pd.DataFrame(rows, columns=cols)
    if not case.is_horizon:
        diag = diag.drop(columns="period")
    lines = []
    for r in rows:
        when = f" in period {r['period']}" if r["period"] else ""
        if r["family"] == "event":
            lines.append(f"event {r['element']}{when}: {r['short_mw']:.1f} MW of response "
                         f"missing at the limit (settles {r['excess_hz'] * 1000:.1f} mHz beyond "
                         f"{F * 1000:.0f} mHz)")
        elif r["family"] == "nadir":
            lines.append(f"event {r['element']}{when}: nadir limit needs {r['short_mw']:.1f} "
                         "MW s more response energy before the nadir (faster or more headroom)")
        elif r["family"] == "link":
            lines.append(f"link {r['element']}: {r['over_mw']:.1f} MW over its limit after "
                         f"event {r['event']}{when}")
        else:
            lines.append(f"area {r['element']}{when}: own reserve {r['short_mw']:.1f} MW short")
    if not lines:
        lines.append("the limits conflict in a way no single relaxation explains")
    if len(lines) > 20:
        lines = lines[:20] + [f"... and {len(lines) - 20} more (see diagnosis.csv)"]
    return InfeasibleError("no allocation can meet the limits", lines, diag)

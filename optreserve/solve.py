"""Solve a case: build the model, run HiGHS, settle dead-band fixed points, verify
independently, read prices, and return a Result of pandas tables."""

from __future__ import annotations

import time

import numpy as np
import pandas as pd

from .backends import Outcome, solve_highs, solve_program
from .case import Case
from .errors import InfeasibleError, SolverError, VerificationError
from .model import ModelInfo, build_model, effective_factor, flow_weights
from .program import LinearProgram
from .results import Result
from .settle import settle_case

# An independent recalculation may differ from the optimiser's own figures by this much
# before it counts as an error.
AGREE_HZ = 0.5e-3
AGREE_MW = 0.5
# Dead-band fixed point: stop when every settled guess moves less than this.
FIXED_POINT_TOL_HZ = 1e-7
FIXED_POINT_MAX_ITER = 30


def solve(case: Case, engine: str = "auto", time_limit: float | None = None,
          mip_gap: float | None = None, relax: bool = False, verbose: bool = False) -> Result:
    """Least-cost droop and headroom allocation meeting every event's limits.

    engine: "pyomo" (Pyomo model on Pyomo's HiGHS interface), "highspy" (bulk load), or
    "auto" (Pyomo for small models, bulk above backends.AUTO_BULK_NONZEROS nonzeros).
    Raises InfeasibleError (with a diagnosis) when no allocation meets the limits."""
    t_start = time.perf_counter()
    time_limit = time_limit if time_limit is not None else case.solver.time_limit_s
    mip_gap = mip_gap if mip_gap is not None else case.solver.mip_gap
    opts = dict(time_limit=time_limit, mip_gap=mip_gap, verbose=verbose)

    t_build = t_solve = 0.0
    x_hat = None
    iterations = 0
    history = []
    while True:
        iterations += 1
        t0 = time.perf_counter()
        lp, info = build_model(case, x_hat=x_hat, relax=relax)
        t_build += time.perf_counter() - t0
        out = solve_program(lp, engine=engine, **opts)
        t_solve += out.solve_time_s
        if out.status in ("infeasible",):
            if iterations == 1:
                raise diagnose(case)
            # the dead-band guess moved into an infeasible corner: keep the last good answer
            lp, info, out = history[-1]
            break
        if out.x is None:
            raise SolverError(f"HiGHS stopped without a usable allocation ({out.status}: "
                              f"{out.message})")
        history.append((lp, info, out))
        if not _needs_fixed_point(info):
            break
        gain, r_up, r_dn = _unit_values(lp, out.x)
        exact = np.abs([p.deviation_hz for p in settle_case(case, gain, r_up, r_dn)])
        live = info.ev.dP > 0
        if np.all(np.abs(exact - info.x_hat)[live] <= FIXED_POINT_TOL_HZ) or (
                iterations >= FIXED_POINT_MAX_ITER):
            break
        x_hat = np.where(live & np.isfinite(exact), exact, info.x_hat)

    result = _make_result(case, lp, info, out, relax)
    result.iterations = iterations
    _attach_prices(result, lp, info, out)
    result.timings_s.update(read=case_read_time(case), build=t_build, solve=t_solve, write=0.0,
                            total=time.perf_counter() - t_start + case_read_time(case))
    return result


def case_read_time(case: Case) -> float:
    return float(case.read_time_s)


def _needs_fixed_point(info: ModelInfo) -> bool:
    ud = info.ud
    return bool(len(info.case.links) and (ud.d_hz[ud.capable] > 0).any()
                and (info.ev.dP > 0).any())


def _unit_values(lp: LinearProgram, x: np.ndarray):
    gain = np.where(lp.value(x, "K") > 1e-9, lp.value(x, "K"), 0.0)
    r_up = np.where(lp.value(x, "r_up") > 1e-9, lp.value(x, "r_up"), 0.0)
    r_dn = np.where(lp.value(x, "r_dn") > 1e-9, lp.value(x, "r_dn"), 0.0)
    return gain, r_up, r_dn


def model_prediction(lp: LinearProgram, info: ModelInfo, x: np.ndarray):
    """The optimiser's own view of each event: settled |df| = dP / beta' and link flows
    from the multiply-by-beta' form, at the gains it chose."""
    case, ev, ud = info.case, info.ev, info.ud
    K = lp.value(x, "K")
    n_a = len(case.areas)
    G = lp.value(x, "G").reshape(n_a, len(info.classes))
    c = effective_factor(info.classes, info.x_hat)  # (E, classes)
    D_a = case.load_damping_mw_per_hz()
    beta = (G[None, :, :] * c[:, None, :]).sum(axis=2) + D_a[None, :]  # (E, A)
    for e, j in enumerate(ev.trip):
        if j >= 0:
            beta[e, ev.area[e]] -= effective_factor(ud.d_hz[[j]], info.x_hat[[e]])[0, 0] * K[j]
    B = beta.sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        dev = np.where(ev.dP > 0, ev.dP / B, 0.0)
    F0 = case.links["flow_mw"].to_numpy(float)
    if len(case.links):
        share = beta / B[:, None]  # (E, A)
        Phi = info.Phi
        flows = F0[None, :] + (ev.sigma * ev.dP)[:, None] * (
            share @ Phi.T - Phi[:, ev.area].T)
        flows[ev.dP == 0] = F0
    else:
        flows = np.zeros((len(ev.names), 0))
    return dev, flows


def _make_result(case: Case, lp: LinearProgram, info: ModelInfo, out: Outcome,
                 relax: bool) -> Result:
    gain, r_up, r_dn = _unit_values(lp, out.x)
    points = settle_case(case, gain, r_up, r_dn)
    dev_model, flow_model = model_prediction(lp, info, out.x)
    dev_exact = np.array([abs(p.deviation_hz) for p in points])
    flows_exact = np.array([p.flow_after_mw for p in points]).reshape(len(points), -1)
    dis_f = float(np.max(np.abs(dev_exact - dev_model), initial=0.0))
    dis_p = float(np.max(np.abs(flows_exact - flow_model), initial=0.0))
    if not np.all(np.isfinite(dev_exact)) or dis_f > AGREE_HZ or dis_p > AGREE_MW:
        raise VerificationError(
            f"independent recalculation disagrees with the optimiser: settled deviation by "
            f"{dis_f * 1000:.3f} mHz, link flows by {dis_p:.3f} MW (allowed {AGREE_HZ * 1000} mHz,"
            f" {AGREE_MW} MW)")
    F = case.limits.max_settled_deviation_hz
    viol_f = dev_exact - F
    lim = case.links["limit_mw"].to_numpy(float)
    viol_p = np.abs(flows_exact) - lim[None, :]
    if (viol_f > 1e-5).any() or (viol_p > 1e-3 * np.maximum(1.0, lim / 100)).any():
        raise VerificationError(
            "the allocation breaks a limit after independent recalculation: "
            f"worst settled excess {max(viol_f.max(), 0) * 1000:.4f} mHz, worst link excess "
            f"{max(viol_p.max(initial=0), 0):.4f} MW")
    return Result.build(case, info, lp, out, gain, r_up, r_dn, points, relax,
                        {"max_frequency_disagreement_hz": dis_f,
                         "max_flow_disagreement_mw": dis_p})


def _attach_prices(result: Result, lp: LinearProgram, info: ModelInfo, out: Outcome) -> None:
    """Marginal cost of event size: dual of each settled-deviation row, read from the LP
    with every integer decision fixed at its optimum (usual market practice)."""
    fixed = _fixed_lp(lp, out.x)
    o = solve_highs(fixed, want_duals=True)
    if o.row_dual is None:
        return
    rows = lp.row_blocks["settled"].slice
    # the row reads  sum(...) >= |dP| - F D: one more MW of event raises the bound by one
    price = np.abs(o.row_dual[rows])
    price[info.ev.dP == 0] = 0.0
    result.set_event_prices(price)


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
def diagnose(case: Case) -> InfeasibleError:
    """Re-solve with penalised slacks on every limit family and report the smallest relaxation
    that makes the case feasible, in engineering terms."""
    lp, info = build_model(case, elastic=True)
    out = solve_program(lp, engine="highspy")
    rows = []
    if out.x is None:
        return InfeasibleError("no allocation can meet the limits (diagnosis failed: "
                               f"{out.status})")
    gain, r_up, r_dn = _unit_values(lp, out.x)
    points = settle_case(case, gain, r_up, r_dn)
    F = case.limits.max_settled_deviation_hz
    s_set = lp.value(out.x, "slack_settled")
    for k, p in enumerate(points):
        if s_set[k] > 1e-6:
            dev = abs(p.deviation_hz)
            rows.append({"family": "event", "element": p.event, "event": p.event,
                         "short_mw": float(s_set[k]),
                         "excess_hz": float(dev - F) if np.isfinite(dev) else float("inf"),
                         "over_mw": 0.0})
    lim = case.links["limit_mw"].to_numpy(float)
    for p in points:
        over = np.abs(p.flow_after_mw) - lim
        for li in np.nonzero(over > 1e-3)[0]:
            rows.append({"family": "link", "element": str(case.links["link"].iloc[li]),
                         "event": p.event, "short_mw": 0.0, "excess_hz": 0.0,
                         "over_mw": float(over[li])})
    if "slack_own" in lp.var_blocks:
        own = case.areas["min_own_reserve_mw"].to_numpy(float)
        areas = np.nonzero(own > 0)[0]
        s_own = lp.value(out.x, "slack_own")
        for k, a in enumerate(areas):
            if s_own[k] > 1e-6:
                rows.append({"family": "area", "element": str(case.areas["area"].iloc[a]),
                             "event": "", "short_mw": float(s_own[k]), "excess_hz": 0.0,
                             "over_mw": 0.0})
    diag = pd.DataFrame(rows, columns=["family", "element", "event", "short_mw", "excess_hz",
                                       "over_mw"])
    lines = []
    for r in rows:
        if r["family"] == "event":
            lines.append(f"event {r['element']}: {r['short_mw']:.1f} MW of response missing at "
                         f"the limit (settles {r['excess_hz'] * 1000:.1f} mHz beyond "
                         f"{F * 1000:.0f} mHz)")
        elif r["family"] == "link":
            lines.append(f"link {r['element']}: {r['over_mw']:.1f} MW over its limit after "
                         f"event {r['event']}")
        else:
            lines.append(f"area {r['element']}: own reserve {r['short_mw']:.1f} MW short")
    if not lines:
        lines.append("the limits conflict in a way no single relaxation explains")
    return InfeasibleError("no allocation can meet the limits", lines, diag)

"""Solving nodal cases by row generation: flow rows only where they matter.

Loop (docs/formulation.md, "Nodal networks"):
  1. build the area-level model (settled, headroom, own-area reserve, nadir rows: the case
     with its areas and units, no link rows) plus the per-bus aggregates and the flow rows
     of the active set (empty at first), and solve (warm: the previous solution is the start);
  2. recompute every monitored flow after every event independently from the allocation
     (verify/settle.py for the settled points, verify/nodal.py for the sparse DC flows);
  3. add rows for every (event, element, direction) whose flow is over its limit or within
     ROWGEN_MARGIN of it and has no row yet;
  4. stop when no monitored flow exceeds its limit by more than the verification tolerance
     and, with dead bands, the allocation has stopped changing (then the rows' dead-band
     factors, taken at the previous pass's exact settled deviations, describe it).
Every pass solves a relaxation of the full problem, so the objective only rises; the loop
ends after at most one pass per (event, element, direction) added, in practice a few passes.
"""

from __future__ import annotations

import time

import numpy as np
import pandas as pd

from optreserve import progress
from optreserve.case.data import Case
from optreserve.case.nodal import area_equivalent, area_level
from optreserve.errors import InfeasibleError, SolverError, VerificationError
from optreserve.model.build import build_model
from optreserve.model.horizon import prepare
from optreserve.model.nodal_flows import NodalFlowRows
from optreserve.solver.backends import solve_program
from optreserve.solver.nadir_loop import _nadir_round, _nadir_state
from optreserve.solver.prices import _attach_prices
from optreserve.solver.readback import AGREE_MW, _make_result, exact_points
from optreserve.verify.nodal import interchange, monitored, nodal_flows_after

# Rows are added for flows above (1 - ROWGEN_MARGIN) of their limit: the nearly binding
# ones join with the violated, which saves passes at a few rows' cost.
ROWGEN_MARGIN = 0.02
# A flow counts as violated above limit + this (same tolerance as the final verification:
# 1e-3 MW per 100 MW of limit, at least 1e-3 MW).
def _tolerance(limit_mw: np.ndarray) -> np.ndarray:
    return 1e-3 * np.maximum(1.0, limit_mw / 100.0)


ROWGEN_MAX_PASSES = 60
# Dead bands: the allocation counts as unchanged when no gain moves by more than this.
SAME_GAIN_MW_PER_HZ = 1e-6


def solve_nodal(case: Case, engine: str = "auto", time_limit: float | None = None,
                mip_gap: float | None = None, relax: bool = False, verbose: bool = False,
                extend=None, hz=None):
    """solve() for a case with buses.csv; the same Result, with links.csv over the monitored
    links and interface rows, and interchange.csv between areas."""
    t_start = time.perf_counter()
    time_limit = time_limit if time_limit is not None else case.solver.time_limit_s
    mip_gap = mip_gap if mip_gap is not None else case.solver.mip_gap
    opts = {"time_limit": time_limit, "mip_gap": mip_gap, "verbose": verbose}
    area_case = area_level(case)
    t0 = time.perf_counter()
    hz = prepare(area_case) if hz is None else hz
    rows = NodalFlowRows(case, hz)
    t_build = time.perf_counter() - t0
    t_solve = 0.0
    M, n_mon = len(hz.dP), rows.n_mon
    active = np.zeros((M, n_mon, 2), dtype=bool)  # [..., 0] upper, [..., 1] lower
    live = hz.dP > 0
    x_hat = None
    prev = None
    last_new: list = []  # (instance, element) of the flow rows the last pass added
    nadir = _nadir_state(case)
    passes = 0
    while True:
        passes += 1
        t0 = time.perf_counter()
        progress.step(f"building the model (flow-row pass {passes})")
        lp, info = build_model(area_case, x_hat=x_hat, relax=relax, hz=hz,
                               nadir_scale=nadir["guide"])
        m, k, d = np.nonzero(active)
        rows.add(lp, info, lp.var_blocks["K"], (m, k, np.where(d == 0, 1.0, -1.0)))
        info.nodal_rows = rows  # for the event prices (solver/prices.py)
        if extend is not None:
            extend(lp, info)
        t_build += time.perf_counter() - t0
        if time_limit is not None:
            opts["time_limit"] = max(time_limit - (time.perf_counter() - t_start), 0.01)
        start = prev[2].x if prev is not None and prev[0].n_cols == lp.n_cols else None
        out = solve_program(lp, engine=engine, want_duals=not lp.is_mip, start=start, **opts)
        t_build += out.emit_time_s
        t_solve += out.solve_time_s
        if out.status == "infeasible":
            if prev is None:
                from optreserve.solver.diagnose import diagnose

                raise diagnose(area_case, hz, extend)
            raise InfeasibleError(
                f"no allocation keeps every monitored flow within its limit ({int(active.sum())}"
                " flow rows active): the network limits cannot be met with the units' "
                "headroom and droop bands", [f"{rows.net.monitor_ids[k]} after event "
                                            f"{hz.inst_name[m]}: flow rows added last"
                                            for m, k in last_new[:10]])
        if out.x is None:
            raise SolverError(f"HiGHS stopped without a usable allocation ({out.status}: "
                              f"{out.message})")
        progress.step("recomputing settled points and flows independently")
        points = exact_points(info, lp, out.x)
        flows = nodal_flows_after(case, points.deviation_hz, points.response_mw,
                                  hz.sigma * hz.dP, hz.inst_event)
        mon = monitored(case, flows)  # (M, K)
        lim = rows.Fmax[None, :]
        over = live[:, None] & (np.abs(mon) > lim + _tolerance(lim))
        near = live[:, None] & (np.abs(mon) > lim * (1 - ROWGEN_MARGIN))
        new = np.stack([near & (mon > 0), near & (mon < 0)], axis=2) & ~active
        exact = np.abs(points.deviation_hz)
        K_now = lp.value(out.x, "K")
        moved = prev is None or np.abs(K_now - prev[3]).max(initial=0) > SAME_GAIN_MW_PER_HZ
        dead_bands = bool((hz.d_hz[hz.capable_b.any(axis=0)] > 0).any())
        prev = (lp, info, out, K_now)
        if not over.any() and (not dead_bands or not moved or active.sum() == 0):
            # the simulated nadir check of solve(), on the area-level view (one frequency
            # per area, inertia summed per area); a tightened nadir row means another pass
            if not _nadir_round(area_equivalent(case), info, lp, out, nadir):
                break
            continue
        if passes >= ROWGEN_MAX_PASSES:
            if over.any():
                raise VerificationError(
                    f"flow rows did not converge in {ROWGEN_MAX_PASSES} passes: worst excess "
                    f"{(np.abs(mon) - lim).max():.4f} MW")
            break
        # a flow over its limit whose row exists already can only come from the dead-band
        # factors of the guess: the new guess below moves them
        last_new = sorted({(int(a), int(b)) for a, b, _ in zip(*np.nonzero(new))})
        active |= new
        if dead_bands:
            x_hat = np.where(live & np.isfinite(exact), exact, info.x_hat)

    # the area-level readback checks the settled points; the flows are checked here
    info.x_hat = np.where(live, np.abs(points.deviation_hz), info.x_hat)
    m, k, _ = np.nonzero(active)
    if len(m):
        pred = rows.predicted(lp, info, out.x, m, k)
        dis = float(np.abs(pred - mon[m, k]).max())
    else:
        dis = 0.0
    if dis > AGREE_MW:
        raise VerificationError(f"independent recalculation disagrees with the optimiser's "
                                f"flow rows by {dis:.3f} MW (allowed {AGREE_MW} MW)")
    result = _make_result(area_case, lp, info, out, relax, points)
    result.case = case
    result.verification["max_flow_disagreement_mw"] = dis
    result.links = links_table(case, hz, flows, result.events["event"].to_numpy(object))
    result.extra_files["interchange.csv"] = interchange_table(
        case, hz, flows, result.events["event"].to_numpy(object))
    result.solver_warnings = [w for w in out.warnings if "small costs" not in w]
    result.iterations = passes
    result.nadir_check = {k: nadir[k] for k in ("checked", "rounds", "worst_hz", "confirmed",
                                                 "cuts", "relaxed", "loosened")}
    if nadir["confirmed"] is False:  # the last candidate simulated dips past the limit
        result.status = "nadir_unconfirmed"
    result.verification["flow_row_passes"] = passes
    result.verification["flow_rows"] = int(active.sum())
    t_price = _attach_prices(result, lp, info, out)
    t_build += t_price[0]
    t_solve += t_price[1]
    result.timings_s.update(read=case.read_time_s, build=t_build, solve=t_solve, write=0.0,
                            total=time.perf_counter() - t_start + case.read_time_s)
    return result


def links_table(case: Case, hz, flows: np.ndarray, event_ids) -> pd.DataFrame:
    """links.csv of a nodal case: every monitored link and interface per event."""
    net = case.nodal
    M = flows.shape[0]
    K = len(net.monitor_limit_mw)
    before = net.monitor @ case.links["flow_mw"].to_numpy(float)
    after = monitored(case, flows)
    tie_link = case.links["tie"].to_numpy(bool)
    # an interface counts as a tie when any of its branches is one
    tie = (abs(net.monitor) @ tie_link.astype(float)) > 0
    lim = net.monitor_limit_mw
    return pd.DataFrame({
        "link": np.tile(net.monitor_ids, M),
        "event": np.repeat(np.asarray(event_ids, dtype=object), K),
        "flow_before_mw": np.tile(before, M),
        "flow_after_mw": after.reshape(-1),
        "limit_mw": np.tile(lim, M),
        "loading_pct": (np.abs(after) / lim[None, :] * 100.0).reshape(-1),
        "tie": np.tile(tie, M),
        "interface": np.tile(~net.monitor_is_link, M),
    })


def interchange_table(case: Case, hz, flows: np.ndarray, event_ids) -> pd.DataFrame:
    """interchange.csv: per area pair with a tie and per event, net flow before and after."""
    before = case.links["flow_mw"].to_numpy(float)[None, :]
    pairs, f0 = interchange(case, before)
    _, f1 = interchange(case, flows)
    ids = case.areas["area"].to_numpy(object)
    P, M = len(pairs), flows.shape[0]
    return pd.DataFrame({
        "from_area": np.tile(np.array([ids[i] for i, _ in pairs], dtype=object), M),
        "to_area": np.tile(np.array([ids[j] for _, j in pairs], dtype=object), M),
        "event": np.repeat(np.asarray(event_ids, dtype=object), P),
        "net_flow_before_mw": np.tile(f0[0], M),
        "net_flow_after_mw": f1.reshape(-1),
    })

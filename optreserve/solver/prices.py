"""Prices from a solved program: event prices by the envelope theorem (duals of the settled and
flow rows with the integer decisions fixed), energy prices, and area prices of reserve."""

from __future__ import annotations

import numpy as np
import pandas as pd

from optreserve.model.build import ModelInfo
from optreserve.model.program import LinearProgram
from optreserve.output.results import Result
from optreserve.solver.backends import Outcome, solve_highs
from optreserve.solver.readback import model_beta, period_values


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
    result.prices = area_prices(info, lp, out.x, o.row_dual, o.x)
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
    if "nodal_flow" in lp.row_blocks:  # nodal cases: model/nodal_flows.py
        m, g = info.nodal_rows.price_terms(lp, info, o.x)
        np.subtract.at(price, m, y[lp.row_blocks["nodal_flow"].slice] * g)
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
    if lp.is_mip and info.steps_gain is not None:
        # droop steps held: a slack event's dual of 0 says nothing (steps overshoot): blank
        from optreserve.solver.incremental import tight_events

        price[(hz.dP > 0) & ~tight_events(lp, info, o.x)] = np.nan
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
                row_dual: np.ndarray | None, fixed_x: np.ndarray | None = None
                ) -> pd.DataFrame:
    """Per area (and period) prices for analysts (docs/formulation.md, "Prices for analysts"):
      reserve_price_per_mw_h: dual of the area's own-reserve row / h_t (the re-optimised cost
        of one more MW of requirement, integers fixed); 0 where the area has no requirement; blank (NaN)
        on a mixed-integer case where the requirement is not tight (its dual says nothing);
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
        if lp.is_mip and info.steps_gain is not None and fixed_x is not None:
            # droop steps held: a slack requirement's dual says nothing: blank
            from optreserve.solver.incremental import tight_rows

            slack = ~tight_rows(lp, fixed_x, "own_reserve")
            reserve[ta[slack], aa[slack]] = np.nan
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

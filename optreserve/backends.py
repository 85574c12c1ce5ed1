"""Two thin emitters of one LinearProgram to HiGHS: in bulk through highspy, or as a Pyomo
model solved through Pyomo's HiGHS interface. Both return the same Outcome."""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from .program import LinearProgram

# Above this many nonzeros "auto" loads HiGHS in bulk: per-expression Pyomo machinery, not the
# solver, dominates there (docs/performance.md).
AUTO_BULK_NONZEROS = 20_000


@dataclass
class Outcome:
    status: str  # optimal | time_limit | infeasible | unbounded | no_solution | error
    x: np.ndarray | None
    objective: float | None
    mip_gap: float | None
    solve_time_s: float  # HiGHS's own run time
    engine: str
    solver_version: str
    row_dual: np.ndarray | None = None
    message: str = ""


def highs_version() -> str:
    import highspy

    h = highspy.Highs()
    try:
        return h.version()
    except Exception:  # pragma: no cover - very old highspy
        return "unknown"


def _options(h, time_limit, mip_gap, verbose):
    h.setOptionValue("output_flag", bool(verbose))
    h.setOptionValue("random_seed", 0)
    if time_limit is not None:
        h.setOptionValue("time_limit", float(time_limit))
    if mip_gap is not None:
        h.setOptionValue("mip_rel_gap", float(mip_gap))


def solve_highs(lp: LinearProgram, time_limit=None, mip_gap=None, verbose=False,
                want_duals=False) -> Outcome:
    """Load the whole matrix into highspy with one passModel call and solve."""
    import highspy

    h = highspy.Highs()
    _options(h, time_limit, mip_gap, verbose)
    model = highspy.HighsLp()
    A = lp.A.tocsc()
    model.num_col_ = lp.n_cols
    model.num_row_ = lp.n_rows
    model.col_cost_ = lp.cost
    model.col_lower_ = lp.col_lo
    model.col_upper_ = lp.col_hi
    model.row_lower_ = lp.row_lo
    model.row_upper_ = lp.row_hi
    model.a_matrix_.format_ = highspy.MatrixFormat.kColwise
    model.a_matrix_.start_ = A.indptr.astype(np.int32)
    model.a_matrix_.index_ = A.indices.astype(np.int32)
    model.a_matrix_.value_ = A.data
    model.offset_ = lp.objective_offset
    if lp.is_mip:
        model.integrality_ = [highspy.HighsVarType.kInteger if b else
                              highspy.HighsVarType.kContinuous for b in lp.integer]
    h.passModel(model)
    h.run()
    return _outcome_from_highs(h, lp, "highspy", want_duals)


def _outcome_from_highs(h, lp, engine, want_duals) -> Outcome:
    import highspy

    ms = h.getModelStatus()
    info = h.getInfo()
    run_time = float(h.getRunTime())
    version = h.version()
    has_sol = info.primal_solution_status == 2  # kSolutionStatusFeasible
    S = highspy.HighsModelStatus
    if ms == S.kOptimal:
        status = "optimal"
    elif ms in (S.kTimeLimit, S.kIterationLimit, S.kInterrupt, S.kSolutionLimit):
        status = "time_limit" if has_sol else "no_solution"
    elif ms == S.kInfeasible:
        status = "infeasible"
    elif ms in (S.kUnbounded, S.kUnboundedOrInfeasible):
        status = "infeasible" if ms == S.kUnboundedOrInfeasible else "unbounded"
    else:
        status = "error"
    x = obj = gap = dual = None
    if status in ("optimal", "time_limit") and has_sol:
        sol = h.getSolution()
        x = np.asarray(sol.col_value, float)
        obj = float(info.objective_function_value)
        if lp.is_mip:
            gap = float(info.mip_gap)
            if not np.isfinite(gap):
                gap = None
        else:
            gap = 0.0
        if want_duals and not lp.is_mip and sol.dual_valid:
            dual = np.asarray(sol.row_dual, float)
    return Outcome(status, x, obj, gap, run_time, engine, version, dual,
                   h.modelStatusToString(ms))


def solve_pyomo(lp: LinearProgram, time_limit=None, mip_gap=None, verbose=False,
                want_duals=False) -> Outcome:
    """Build a Pyomo model from the same blocks (one LinearExpression per row) and solve it
    through Pyomo's HiGHS interface (in-process, on highspy)."""
    from pyomo.contrib.solver.solvers.highs import Highs

    m = to_pyomo(lp)
    opt = Highs()
    kwargs = {"tee": bool(verbose), "load_solutions": False,
              "raise_exception_on_nonoptimal_result": False}
    if time_limit is not None:
        kwargs["time_limit"] = float(time_limit)
    if mip_gap is not None:
        kwargs["rel_gap"] = float(mip_gap)
    res = opt.solve(m, **kwargs)
    h = opt._solver_model  # the highspy object Pyomo drove
    out = _outcome_from_highs(h, lp, "pyomo", want_duals=False)
    if out.x is not None:
        res.solution_loader.load_vars()
        out.x = np.array([m.x[j].value if m.x[j].value is not None else 0.0
                          for j in range(lp.n_cols)])
        if want_duals and not lp.is_mip:
            duals = res.solution_loader.get_duals()
            out.row_dual = np.array([duals.get(m.rows[i], 0.0) for i in range(lp.n_rows)])
    return out


def to_pyomo(lp: LinearProgram):
    """A Pyomo ConcreteModel with x[j] columns and rows[i] constraints of the program."""
    import pyomo.environ as pyo
    from pyomo.core.expr.numeric_expr import LinearExpression

    m = pyo.ConcreteModel()
    lo, hi, integer = lp.col_lo, lp.col_hi, lp.integer
    m.x = pyo.Var(range(lp.n_cols), within=pyo.Reals)
    for j in range(lp.n_cols):
        v = m.x[j]
        v.setlb(None if lo[j] == -np.inf else float(lo[j]))
        v.setub(None if hi[j] == np.inf else float(hi[j]))
        if integer[j]:
            v.domain = pyo.Integers
    A = lp.A
    xs = [m.x[j] for j in range(lp.n_cols)]
    rlo, rhi = lp.row_lo, lp.row_hi

    def row_rule(model, i):
        a, b = A.indptr[i], A.indptr[i + 1]
        expr = LinearExpression(constant=0.0, linear_coefs=A.data[a:b].tolist(),
                                linear_vars=[xs[j] for j in A.indices[a:b]])
        lo_i = None if rlo[i] == -np.inf else float(rlo[i])
        hi_i = None if rhi[i] == np.inf else float(rhi[i])
        if lo_i is None and hi_i is None:
            return pyo.Constraint.Skip
        return (lo_i, expr, hi_i)

    m.rows = pyo.Constraint(range(lp.n_rows), rule=row_rule)
    c = lp.cost
    nz = np.nonzero(c)[0]
    m.obj = pyo.Objective(expr=LinearExpression(
        constant=float(lp.objective_offset), linear_coefs=c[nz].tolist(),
        linear_vars=[xs[j] for j in nz]), sense=pyo.minimize)
    return m


def solve_program(lp: LinearProgram, engine="auto", **kw) -> Outcome:
    if engine == "auto":
        engine = "highspy" if lp.A.nnz > AUTO_BULK_NONZEROS else "pyomo"
    t0 = time.perf_counter()
    if engine == "highspy":
        out = solve_highs(lp, **kw)
    elif engine == "pyomo":
        out = solve_pyomo(lp, **kw)
    else:
        raise ValueError(f"unknown engine {engine!r} (auto, highspy or pyomo)")
    out.message = out.message or f"{time.perf_counter() - t0:.3f}s"
    return out

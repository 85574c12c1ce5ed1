"""Two thin emitters of one LinearProgram to HiGHS: in bulk through highspy, or as a Pyomo
model solved through Pyomo's HiGHS interface. Both return the same Outcome."""

from __future__ import annotations

import os
import sys
import tempfile
import time
from dataclasses import dataclass, field

import numpy as np

from optreserve import interrupt, progress
from optreserve.model.program import LinearProgram

# "auto" loads HiGHS in bulk at every size: both emitters hand HiGHS the same program
# (tests/test_solve_reference.py checks they reach the same optimum), and on small cases
# importing Pyomo alone (about 0.9 s, most of it scipy.stats) cost more than the whole demo
# solve (docs/performance.md, "Snapshot latency"). Pyomo stays available with engine="pyomo".
# HiGHS runs single-threaded: measured on these models (docs/performance.md) its parallel
# search gains nothing while its helper thread takes a second core; studies run points in
# parallel instead (sweep.py). OPTRESERVE_HIGHS_THREADS overrides (0 lets HiGHS choose).
HIGHS_THREADS = int(os.environ.get("OPTRESERVE_HIGHS_THREADS", "1"))


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
    emit_time_s: float = 0.0  # handing the model to HiGHS (bulk load or Pyomo build)
    warnings: list = field(default_factory=list)  # HiGHS's own warnings, passed on


def highs_version() -> str:
    import highspy

    h = highspy.Highs()
    try:
        return h.version()
    except Exception:  # pragma: no cover - very old highspy
        return "unknown"


def new_highs():
    """A highspy.Highs without its start-up banner on stdout (tables and --json own stdout)."""
    import highspy

    sys.stdout.flush()
    saved = os.dup(1)
    try:
        with open(os.devnull, "w") as null:
            os.dup2(null.fileno(), 1)
            h = highspy.Highs()
    finally:
        os.dup2(saved, 1)
        os.close(saved)
    return h


# HiGHS's root reduced-cost heuristic spent about half of the demo MILP's time in sub-MIPs
# without improving the incumbent; off, the same optimum is found in about half the CPU time
# (demo) and 8 % less on a 300-unit day (docs/performance.md, "HiGHS options").
HIGHS_MIP_OPTIONS = {"mip_heuristic_run_root_reduced_cost": False}


def _options(h, time_limit, mip_gap, verbose, log_file=None):
    # the log always goes to a file so that HiGHS's warnings can be passed on to the user;
    # it reaches the console only with --verbose
    h.setOptionValue("output_flag", True)
    h.setOptionValue("log_to_console", bool(verbose))
    if log_file is not None:
        h.setOptionValue("log_file", str(log_file))
    h.setOptionValue("random_seed", 0)
    h.setOptionValue("threads", HIGHS_THREADS)
    if time_limit is not None:
        h.setOptionValue("time_limit", float(time_limit))
    if mip_gap is not None:
        h.setOptionValue("mip_rel_gap", float(mip_gap))
    for k, v in HIGHS_MIP_OPTIONS.items():
        h.setOptionValue(k, v)


def solve_highs(lp: LinearProgram, time_limit=None, mip_gap=None, verbose=False,
                want_duals=False, start: np.ndarray | None = None, on_highs=None) -> Outcome:
    """Load the whole matrix into highspy with one passModel call and solve. on_highs: called
    with the Highs object before it runs (so that another thread can stop it)."""
    t0 = time.perf_counter()
    h = new_highs()
    if on_highs is not None:
        on_highs(h)
    log = _new_log()
    try:
        return _solve_highs(h, lp, log, t0, time_limit, mip_gap, verbose, want_duals, start)
    finally:
        with interrupt.deferred():  # the log goes whatever happens (Ctrl-C, SIGTERM, errors)
            _remove(log.name)


def _solve_highs(h, lp, log, t0, time_limit, mip_gap, verbose, want_duals, start) -> Outcome:
    import highspy

    _options(h, time_limit, mip_gap, verbose, log.name)
    progress.step("HiGHS: loading the model", log.name)
    A = lp.A.tocsc()
    integrality = lp.integer.astype(np.int32)
    # the array overload copies numpy buffers straight into HiGHS (format 1 = column-wise,
    # sense 1 = minimise)
    args = [int(lp.n_cols), int(lp.n_rows), int(A.nnz), 1, 1, float(lp.objective_offset),
            np.ascontiguousarray(lp.cost), np.ascontiguousarray(lp.col_lo),
            np.ascontiguousarray(lp.col_hi), np.ascontiguousarray(lp.row_lo),
            np.ascontiguousarray(lp.row_hi), A.indptr.astype(np.int32),
            A.indices.astype(np.int32), np.ascontiguousarray(A.data, dtype=float), integrality]
    h.passModel(*args)
    if isinstance(start, tuple) and lp.is_mip:  # a partial start: HiGHS completes the rest
        idx, val = start
        h.setSolution(len(idx), np.asarray(idx, np.int32), np.asarray(val, float))
    elif start is not None and lp.is_mip and len(start) == lp.n_cols:
        # a previous allocation (e.g. the last dead-band pass) as a first incumbent
        sol = highspy.HighsSolution()
        sol.col_value = np.clip(start, lp.col_lo, lp.col_hi).tolist()
        sol.value_valid = True
        h.setSolution(sol)
    emit = time.perf_counter() - t0
    progress.step("HiGHS: solving" + (" (mixed-integer)" if lp.is_mip else ""), log.name)
    run_interruptible(h)
    out = _outcome_from_highs(h, lp, "highspy", want_duals)
    warnings = solver_warnings(log.name)
    if start is not None:  # HiGHS checks a warm start and reports why it was not feasible
        warnings = [w for w in warnings if not any(
            k in w for k in ("nfeasib", "Assessing feasibility", "Solution has"))]
    out.emit_time_s = emit
    out.warnings = warnings
    return out


LOG_PREFIX = "optreserve-highs-"
_stale_logs_checked = False


def _new_log():
    """A temporary HiGHS log named after this process, so that one left by a killed run
    (SIGKILL) can be told apart and is removed by the next solve on this machine."""
    global _stale_logs_checked
    if not _stale_logs_checked:
        _stale_logs_checked = True
        _remove_stale_logs()
    log = tempfile.NamedTemporaryFile(prefix=f"{LOG_PREFIX}{os.getpid()}-", suffix=".log",
                                      delete=False)
    log.close()
    return log


def _remove(path: str) -> None:
    try:
        os.unlink(path)
    except FileNotFoundError:
        pass


def _remove_stale_logs() -> None:
    import glob

    for path in glob.glob(os.path.join(tempfile.gettempdir(), f"{LOG_PREFIX}*-*.log")):
        pid = os.path.basename(path)[len(LOG_PREFIX):].split("-", 1)[0]
        if not pid.isdigit() or int(pid) == os.getpid():
            continue
        try:
            os.kill(int(pid), 0)
        except ProcessLookupError:  # its run is gone
            try:
                os.unlink(path)
            except OSError:
                pass
        except OSError:
            pass


def run_interruptible(h) -> None:
    """h.run() with highspy's user-interrupt callbacks on: a signal meanwhile asks HiGHS to
    stop (model status kInterrupt) and is raised as Interrupted once run() has returned."""
    h.HandleUserInterrupt = True
    with interrupt.deferred(cancel=h.cancelSolve):
        h.run()


def _interruptible_pyomo(base):
    """Pyomo's HiGHS interface whose run can be interrupted the same way (Pyomo switches on
    highspy's user-interrupt callbacks itself; cancelSolve makes them stop HiGHS)."""

    import logging

    class InterruptibleHighs(base):
        def _solve(self):
            # Pyomo warns of the kInterrupt status it has no name for; we report it ourselves
            quiet = logging.getLogger(base.__module__)
            drop = _DropInterruptWarning()
            quiet.addFilter(drop)
            try:
                with interrupt.deferred(cancel=self._solver_model.cancelSolve):
                    return super()._solve()
            finally:
                quiet.removeFilter(drop)

    return InterruptibleHighs


class _DropInterruptWarning:
    def filter(self, record) -> bool:
        return "kInterrupt" not in record.getMessage()


def solver_warnings(path) -> list[str]:
    """HiGHS's own WARNING lines from its log (numerical trouble, scaling, bounds)."""
    try:
        text = open(path, encoding="utf-8", errors="replace").read()
    except OSError:
        return []
    seen = []
    for ln in text.splitlines():
        if "WARNING" in ln.upper() and ln.strip() not in seen:
            seen.append(ln.strip())
    return seen[:20]


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
    elif ms == S.kInterrupt:  # stopped on request (Ctrl-C, SIGTERM): never a time limit
        status = "interrupted"
    elif ms in (S.kTimeLimit, S.kIterationLimit, S.kSolutionLimit):
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

    t0 = time.perf_counter()
    progress.step("building the Pyomo model")
    m = to_pyomo(lp)
    emit = time.perf_counter() - t0
    opt = _interruptible_pyomo(Highs)()
    kwargs = {"tee": bool(verbose), "load_solutions": False,
              "raise_exception_on_nonoptimal_result": False}
    if time_limit is not None:
        kwargs["time_limit"] = float(time_limit)
    if mip_gap is not None:
        kwargs["rel_gap"] = float(mip_gap)
    log = _new_log()
    kwargs["solver_options"] = {"log_file": log.name, "random_seed": 0,
                                "threads": HIGHS_THREADS, **HIGHS_MIP_OPTIONS}
    progress.step("HiGHS via Pyomo: solving" + (" (mixed-integer)" if lp.is_mip else ""),
                  log.name)
    t1 = time.perf_counter()
    try:
        res = opt.solve(m, **kwargs)
        warnings = solver_warnings(log.name)
    finally:
        with interrupt.deferred():  # the log goes whatever happens (Ctrl-C, SIGTERM, errors)
            _remove(log.name)
    h = opt._solver_model  # the highspy object Pyomo drove
    out = _outcome_from_highs(h, lp, "pyomo", want_duals=False)
    # Pyomo's hand-over to HiGHS counts as building; HiGHS's own run time as solving
    emit += max(0.0, time.perf_counter() - t1 - out.solve_time_s)
    if out.x is not None:
        res.solution_loader.load_vars()
        out.x = np.array([m.x[j].value if m.x[j].value is not None else 0.0
                          for j in range(lp.n_cols)])
        if want_duals and not lp.is_mip:
            duals = res.solution_loader.get_duals()
            out.row_dual = np.array([duals.get(m.rows[i], 0.0) for i in range(lp.n_rows)])
    out.emit_time_s = emit
    out.warnings = warnings
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


def solve_program(lp: LinearProgram, engine="auto", start=None, **kw) -> Outcome:
    if engine in ("auto", "highspy"):
        return solve_highs(lp, start=start, **kw)
    if engine == "pyomo":
        return solve_pyomo(lp, **kw)
    raise ValueError(f"unknown engine {engine!r} (auto, highspy or pyomo)")

"""Solver outcomes reported as what they are, when the solve loop cannot finish normally.

- Time limit before the dead-band passes converge: the best allocation of the passes so far
  that the independent recalculation (verify/breaks.py) finds meeting every limit is kept,
  with status "time_limit". A pass that has not converged is not checked against the
  optimiser's own figures (they rest on a guess the pass did not settle), only against the
  limits themselves.
- Time limit before any pass gave such an allocation: NoAllocationYet (exit code 4).
- HiGHS failing in a later pass (error, out of memory, ...): SolverError with HiGHS's status,
  never a verification disagreement.
"""

from __future__ import annotations

import numpy as np

from optreserve.errors import SolverError
from optreserve.model.nadir import nadir_shortfall
from optreserve.solver.readback import exact_points, period_values
from optreserve.verify.breaks import what_breaks

# HiGHS statuses that mean the time ran out (not a failure of the solver)
TIME_STATUSES = ("time_limit", "no_solution")


class NoAllocationYet(SolverError):
    """The time limit came before any allocation meeting every limit was found (exit 4)."""

    exit_code = 4

    @classmethod
    def within(cls, time_limit: float | None, detail: str = "") -> NoAllocationYet:
        limit = f" of {time_limit:g} s" if time_limit is not None else ""
        why = f" ({detail})" if detail else ""
        return cls(f"no allocation yet: the time limit{limit} came before any allocation met "
                   f"every limit{why}; raise --time-limit")


def failed_pass(out, pass_no: int) -> SolverError:
    """HiGHS stopped in a later dead-band pass for a reason other than time."""
    return SolverError(f"HiGHS failed in dead-band pass {pass_no} ({out.status}: "
                       f"{out.message})".rstrip())


def best_verified(case, history, time_limit):
    """(lp, info, out, points) of the cheapest pass in history whose allocation meets every
    limit by the independent recalculation; out.status becomes "time_limit". Raises
    NoAllocationYet when there is none."""
    best = None
    for lp, info, out in history:
        if out.x is None:
            continue
        gain, r_up, r_dn = period_values(lp, info, out.x)
        points = exact_points(info, lp, out.x)
        nadir = (nadir_shortfall(case, info.hz, r_up, r_dn)
                 if case.limits.max_nadir_deviation_hz is not None else None)
        if len(what_breaks(case, info.hz, gain, r_up, r_dn, info.F_model, nadir, points)):
            continue
        cost = float(lp.objective(out.x))
        if best is None or cost < best[0]:
            best = (cost, lp, info, out, points)
    if best is None:
        raise NoAllocationYet.within(time_limit)
    _, lp, info, out, points = best
    out.status = "time_limit"
    return lp, info, out, points


def converged(info, points, tol_hz: float) -> bool:
    """Whether the pass's settled guess is the exact deviation (the model's figures hold)."""
    exact = np.abs(points.deviation_hz)
    live = info.hz.dP > 0
    return bool(np.all(np.abs(exact - info.x_hat)[live] <= tol_hz))

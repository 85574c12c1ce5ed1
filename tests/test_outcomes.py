"""Solver outcomes reported as what they are: a time limit keeps the best verified allocation
(status time_limit) or says "no allocation yet" (exit code 4); a HiGHS failure in a later
dead-band pass is a solver error, never a verification disagreement.

The solver's stop is injected (the pass number decides, not the clock), so the tests are
deterministic. Outside reference: the independent settled-point calculation of
verify/settle.py (`settle_case`, checked against textbook two-area examples in
test_settle_reference.py) confirms the kept allocation meets every limit.
"""

from __future__ import annotations

from pathlib import Path

import pytest

import optreserve
from optreserve.cli import main
from optreserve.errors import SolverError, VerificationError
from optreserve.solver import run
from optreserve.solver.backends import Outcome
from optreserve.solver.outcome import NoAllocationYet
from optreserve.verify.settle import settle_case

DEMO = Path(__file__).resolve().parents[1] / "instances" / "demo-tri-valley"


def _stop_at(monkeypatch, pass_no: int, status: str, message: str):
    """HiGHS returns `status` without an allocation from solve call `pass_no` on."""
    real = run.solve_program
    calls = {"n": 0}

    def fake(lp, **kw):
        calls["n"] += 1
        if calls["n"] >= pass_no:
            return Outcome(status, None, None, None, 0.0, "highspy", "x", message=message)
        return real(lp, **kw)

    monkeypatch.setattr(run, "solve_program", fake)
    return calls


def test_time_limit_in_a_later_pass_keeps_the_best_verified_allocation(monkeypatch):
    """The demo needs two dead-band passes; the second runs out of time. The first pass's
    allocation is kept with status time_limit, and settle_case finds every event inside
    0.2 Hz and every link inside its limit with it."""
    _stop_at(monkeypatch, 2, "no_solution", "Time limit reached")
    case = optreserve.load_case(DEMO)
    res = optreserve.solve(case, engine="highspy")
    assert res.status == "time_limit"
    a = res.allocation
    pts = settle_case(case, a["gain_mw_per_hz"], a["headroom_up_mw"], a["headroom_down_mw"])
    assert all(abs(p.deviation_hz) <= 0.2 + 1e-5 for p in pts)
    limits = case.links["limit_mw"].to_numpy(float)
    assert all((abs(p.flow_after_mw) <= limits + 1e-3 * limits / 100 + 1e-3).all() for p in pts)


def test_time_limit_before_any_allocation_is_exit_4_and_writes_nothing(monkeypatch, tmp_path,
                                                                       capsys):
    _stop_at(monkeypatch, 1, "no_solution", "Time limit reached")
    out = tmp_path / "out"
    assert main(["solve", str(DEMO), "--engine", "highspy", "--out", str(out)]) == 4
    err = capsys.readouterr().err
    assert "no allocation yet" in err and err.endswith("\n")
    assert not out.exists() or not any(out.iterdir())


def test_highs_failure_in_a_later_pass_is_a_solver_error(monkeypatch):
    _stop_at(monkeypatch, 2, "error", "out of memory")
    with pytest.raises(SolverError) as info:
        optreserve.solve(optreserve.load_case(DEMO), engine="highspy")
    assert not isinstance(info.value, VerificationError)
    assert not isinstance(info.value, NoAllocationYet)
    assert "pass 2" in str(info.value) and "out of memory" in str(info.value)


def test_time_budget_spent_after_the_first_pass_keeps_it_verified(monkeypatch):
    """The dead-band passes share one time budget: after the first pass the clock is moved
    past it (an injected clock, not a real wait). The next pass is not started; the first
    pass's allocation is kept with status time_limit, never reported as a disagreement, and
    settle_case confirms it meets every settled limit."""
    import time as real_time

    real = run.solve_program
    shift = {"s": 0.0}

    class Clock:
        @staticmethod
        def perf_counter():
            return real_time.perf_counter() + shift["s"]

    def fake(lp, **kw):
        out = real(lp, **kw)
        shift["s"] = 1e6  # the budget is gone once a pass has been solved
        return out

    monkeypatch.setattr(run, "time", Clock)
    monkeypatch.setattr(run, "solve_program", fake)
    case = optreserve.load_case(DEMO)
    res = optreserve.solve(case, engine="highspy", time_limit=60.0)
    assert res.status == "time_limit" and res.iterations == 2
    a = res.allocation
    pts = settle_case(case, a["gain_mw_per_hz"], a["headroom_up_mw"], a["headroom_down_mw"])
    assert all(abs(p.deviation_hz) <= 0.2 + 1e-5 for p in pts)

"""Incremental-price re-solves begun ahead on the second core (solver/ahead.py) give the same
prices as solving them one after the other: the same program, solved without a start in both
paths. The prices themselves are checked against scipy.optimize.milp in test_incremental.py;
here the two paths are compared with each other, and a wrong guess must not leak in."""

from __future__ import annotations

from pathlib import Path

import numpy as np

import optreserve
from optreserve.solver import ahead as ahead_mod
from optreserve.solver import run

DEMO = Path(__file__).resolve().parents[1] / "instances" / "demo-tri-valley"


def _prices(monkeypatch, threads: str):
    monkeypatch.setenv("OPTRESERVE_PRICE_THREADS", threads)
    res = run.solve(optreserve.load_case(DEMO), incremental=True)
    return res.events["incremental_cost_per_mw_h"].to_numpy(float), res


def test_prices_begun_ahead_equal_the_sequential_ones(monkeypatch):
    used = []
    real = ahead_mod.Ahead.for_answer

    def spy(self, info):
        got = real(self, info)
        used.append(sorted(got))
        return got

    monkeypatch.setattr(ahead_mod.Ahead, "for_answer", spy)
    serial, res1 = _prices(monkeypatch, "1")
    assert used == []  # one thread: nothing begun ahead
    ahead, res2 = _prices(monkeypatch, "2")
    assert used and used[0], "the answer's re-solve was not begun ahead"
    assert np.array_equal(serial, ahead)
    assert (serial > 0).any()  # the demo's reference incident has a real incremental cost
    assert res1.objective_per_h == res2.objective_per_h


def test_a_wrong_guess_is_stopped_and_not_used(monkeypatch):
    """The guess forced onto the smallest event (which the answer still meets at its grown
    size, so it needs no re-solve): the prices equal the sequential ones."""
    serial, _ = _prices(monkeypatch, "1")
    case = optreserve.load_case(DEMO)
    smallest = int(np.argmin(np.abs(case.events["size_mw"].to_numpy(float))))
    monkeypatch.setattr(ahead_mod, "guess", lambda info, previous, priced: smallest)
    guessed, _ = _prices(monkeypatch, "2")
    assert np.array_equal(serial, guessed)

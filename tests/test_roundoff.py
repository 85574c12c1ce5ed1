"""Solver round-off is absorbed in one place (verify/roundoff.py), at 1e-5 MW.

Outside reference: hand arithmetic of the settled balance with no load self-regulation: one
unit of gain K = 200 MW/Hz, dead band 0, headroom r = 40 MW saturates at x = r / K = 0.2 Hz;
an event of exactly 40 MW settles there, a larger one has no settled point."""

from __future__ import annotations

import numpy as np
import pytest

from optreserve.verify.roundoff import SOLVER_ROUNDOFF_MW, covers, snap_up
from optreserve.verify.settle import settle_batch, settle_deviation


@pytest.mark.parametrize("short_mw, settles", [(0.0, True), (4e-6, True), (2e-5, False),
                                                (1.0, False)])
def test_event_covered_up_to_round_off_settles_at_saturation(short_mw, settles):
    r = 40.0 - short_mw
    x = settle_deviation(40.0, [200.0], [0.0], [r], 0.0)
    xb = settle_batch(np.array([40.0]), np.array([[200.0]]), [0.0], np.array([[r]]),
                      np.array([0.0]))[0]
    if settles:
        assert x == pytest.approx(r / 200.0, abs=1e-12) and xb == pytest.approx(x, abs=1e-9)
    else:
        assert x == float("inf") and xb == float("inf")


def test_headroom_snap_uses_the_same_round_off():
    need = np.array([10.0, 10.0, 10.0, 10.0])
    got = snap_up(np.array([10.0 - 4e-6, 10.0 - 2e-5, 10.5, 10.0 - 4e-6]), need,
                  np.array([True, True, True, False]))
    assert got.tolist() == [10.0, 10.0 - 2e-5, 10.5, 10.0 - 4e-6]
    assert covers(10.0 - 0.9 * SOLVER_ROUNDOFF_MW, 10.0)
    assert not covers(10.0 - 1.1 * SOLVER_ROUNDOFF_MW, 10.0)

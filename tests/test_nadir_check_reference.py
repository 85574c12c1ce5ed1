"""The solve's nadir check (dynamics/check.py check_instances, which reads only the nadirs of
the simulation: events.event_nadirs) against an integration that shares no code with
optreserve: scipy.integrate.solve_ivp (LSODA, rtol 1e-10) of the area swing equation with each
unit's governor transfer function from the contract (case-format "Governor models"), put in
state-space form by scipy.signal.tf2ss (the reference of tests/test_dynamics_models.py)."""

from __future__ import annotations

import numpy as np
from test_dynamics_models import F_N, MIXED, _case, _reference_ivp

from optreserve.dynamics.check import check_instances


def _check(case, K, head, sizes):
    M = len(sizes)
    minus = np.full(M, -1)
    return check_instances(case, np.zeros(M, int), np.asarray(sizes, float), np.zeros(M, int),
                           minus, minus, K[None], head[None], head[None])


def test_check_dip_matches_adaptive_integration_with_dead_band_and_limits(case_dir):
    """Lag, reheat and hydro units (Kundur's typical parameters, from memory; see MIXED), a
    20 mHz dead band and 25 MW of headroom per unit, reached during the dip. Two deficits,
    120 MW and 60 MW, checked together as the solve does: each dip and its time against the
    lowest point of solve_ivp's trajectory on a 1 ms grid (measured: 0.4 and 0.5 µHz,
    0.4 ms and 0.3 ms; the 120 MW dip bottoms out at 19.5 s, once every unit is at its
    headroom, the 60 MW one at 3.1 s)."""
    case = _case(case_dir, MIXED, deadband_mhz=20.0, dP=120.0)
    K = np.array([u["cap"] / (0.04 * F_N) for u in MIXED])
    head = np.array([25.0, 25.0, 25.0])
    H = 5.0 * sum(u["cap"] for u in MIXED)
    out = _check(case, K, head, [120.0, 60.0])
    grid = np.arange(0.0, 30.0 + 1e-9, 0.001)
    for m, dP in enumerate([120.0, 60.0]):
        ref = _reference_ivp(MIXED, K, 0.02, head, H, 30.0, dP, 30.0, grid)
        k = int(np.argmin(ref))
        assert 0 < k < len(grid) - 1  # a true dip, not the end of the run
        assert abs(out.dip_hz[m] - (-ref[k])) < 1e-5, (out.dip_hz[m], -ref[k])
        assert abs(out.time_s[m] - grid[k]) < 0.01, (out.time_s[m], grid[k])
        assert out.area[m] == 0
    # a smaller deficit dips less (monotone in the event size: the physics, not our output)
    assert out.dip_hz[1] < out.dip_hz[0]

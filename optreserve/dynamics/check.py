"""The solve loop's referee: simulate every event instance of a candidate allocation (all
periods, each period's instances as one batch) and report, per instance, the deepest dip in
any area, when it happens, and what each unit had delivered by then.

Used by solver/run.py (`_nadir_round`): an allocation is reported as meeting the nadir limit
only when this says so for every instance.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from optreserve.case.data import Case
from optreserve.dynamics.events import event_nadirs, simulate_events
from optreserve.dynamics.system import build_system

CHECK_DURATION_S = 30.0
# a dip still deepening this close to the end of the run is run again for longer
LONG_DURATION_S = 120.0


@dataclass
class InstanceCheck:
    """Per instance (M,): deepest deviation in the event's direction [Hz] over every area,
    its time [s] and area; energy (M, N) MW s each unit had delivered by that time (only for
    the instances asked, zero elsewhere)."""

    dip_hz: np.ndarray
    time_s: np.ndarray
    area: np.ndarray
    energy_mw_s: np.ndarray


def check_instances(case: Case, inst_t, size_mw, area, trip, absent, gain, r_up, r_dn,
                    energy_for=None, also_lost=None) -> InstanceCheck:
    """Simulate instances m (period inst_t[m], signed size_mw[m] > 0 a deficit, area, tripped
    unit or -1, absent provider or -1) under per-period arrays gain, r_up, r_dn (T, N).
    energy_for: boolean (M,) instances whose per-unit delivered energy at the nadir is wanted
    (simulated again with the unit responses recorded). also_lost: per instance a tuple of
    further units lost with the tripped one (a common-mode trip `G1+G2`): they give no
    response and their stored energy leaves the system (their output is in size_mw)."""
    inst_t = np.asarray(inst_t, np.int64)
    M, N = len(inst_t), len(case.units)
    dip, when = np.zeros(M), np.zeros(M)
    where = np.zeros(M, np.int64)
    energy = np.zeros((M, N))
    want = np.zeros(M, bool) if energy_for is None else np.asarray(energy_for, bool)
    f_n = case.nominal_frequency_hz
    extra = [()] * M if also_lost is None else [tuple(x) for x in also_lost]
    # one batch per period and set of further lost units: the system differs between them
    for t, key in dict.fromkeys(zip(inst_t.tolist(), extra)):
        m = np.nonzero((inst_t == t) & np.array([e == key for e in extra], bool))[0]
        g, ru, rd = gain[t], r_up[t], r_dn[t]
        if key:
            k = list(key)
            g, ru, rd = g.copy(), ru.copy(), rd.copy()
            g[k] = ru[k] = rd[k] = 0.0
        sysm = build_system(case, g, ru, rd, t=int(t))
        if key:
            H = sysm.stored_energy_mw_s.copy()
            H[list(key)] = 0.0
            sysm = dataclasses.replace(sysm, stored_energy_mw_s=H)
        args = (sysm, size_mw[m], area[m], trip[m])
        nadir_hz, t_n, a_n = event_nadirs(*args, CHECK_DURATION_S, blocked=absent[m])
        if (t_n > CHECK_DURATION_S - 1.0).any():
            nadir_hz, t_n, a_n = event_nadirs(*args, LONG_DURATION_S, blocked=absent[m])
        dip[m], when[m], where[m] = np.abs(nadir_hz - f_n), t_n, a_n
        w = m[want[m]]
        if len(w):
            dur = float(np.max(when[w])) + 0.5
            grid = np.arange(0.0, dur + 1e-9, 0.01)
            trs = simulate_events(sysm, size_mw[w], area[w], trip[w], dur, blocked=absent[w],
                                  record_units=True, times=grid)
            for j, tr in zip(w, trs):
                k = grid <= when[j] + 1e-12
                sign = 1.0 if size_mw[j] >= 0 else -1.0
                energy[j] = sign * np.trapezoid(tr.response_mw[k], grid[k], axis=0)
    return InstanceCheck(dip, when, where, energy)

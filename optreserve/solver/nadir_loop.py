"""The nadir guarantee of a solve: every candidate allocation simulated against the nadir
limit (dynamics/check.py), simulation-guided cuts where it dips past it, the conservative rows
relaxed or loosened, and the answer returned always one the simulation has checked
(docs/formulation.md, the nadir guarantee). Called by solver/run.py and solver/rowgen.py."""

from __future__ import annotations

import time

import numpy as np

from optreserve import progress
from optreserve.case.data import Case
from optreserve.model.build import ModelInfo
from optreserve.model.horizon import lost_pairs
from optreserve.model.program import LinearProgram
from optreserve.solver.backends import Outcome
from optreserve.solver.readback import period_values

# The nadir rows are a conservative filter on the centre of inertia; the simulation decides.
# Every event instance (up to NADIR_SIM_MAX_INSTANCES) of a candidate is simulated
# (dynamics/check.py); where an area dips past the limit, a cut from that simulation is added
# (model/nadir.py NadirGuide) and the case solved again, at most NADIR_ROUNDS times. A solve
# exits 0 only with every instance confirmed; otherwise status "nadir_unconfirmed" (exit 6),
# or InfeasibleError (exit 3) when every provider at its most still fails in simulation.
NADIR_SIM_MAX_INSTANCES = 2000


NADIR_ROUNDS = 8


# cuts aim this far inside the limit, so that a candidate does not stop a hair outside
NADIR_MARGIN = 0.995
NADIR_TOL_HZ = 1e-5
# The rows are conservative: a confirmed allocation whose dips stay well inside the limit is
# re-solved with each instance's rows loosened by (0.995 N / dip)^NADIR_LOOSEN_POWER (at most
# NADIR_LOOSEN times, plus one step back halfway when a loosening goes too far), and the
# cheapest confirmed allocation is kept. The simulated dip answers the rows' limit weakly
# (on the demonstration case it rose from 0.575 to 0.652 Hz while the limit in the rows went
# from 1 to 2.6 times N), so the step is taken to a power: one loosening to the power 3
# reaches a cheaper confirmed allocation (5893 per hour) than three plain ones (5913), with
# 2 MILP solves instead of 4 (docs/performance.md, "Snapshot latency").
NADIR_LOOSEN = 1


NADIR_LOOSEN_POWER = 3.0


NADIR_SCALE_MAX = 1.0e3  # rows of instances far inside the limit: loosened at most this far


def _nadir_state(case: Case) -> dict:
    from optreserve.model.nadir import NadirGuide

    return {"scale": None, "guide": NadirGuide(), "rounds": 0, "checked": False,
            "worst_hz": None, "confirmed": None, "cuts": 0, "relaxed": False, "loosened": 0,
            "best": None, "simulate_s": 0.0}


def _nadir_simulate(case: Case, hz, gain, r_up, r_dn, energy_for=None):
    from optreserve.dynamics.check import check_instances

    return check_instances(case, hz.inst_t, hz.sigma * hz.dP, hz.inst_area, hz.trip,
                           hz.absent, gain, r_up, r_dn, energy_for, getattr(hz, "also_lost", None))


def _also_lost(hz, idx) -> list[tuple] | None:
    """Per instance of idx the units lost besides hz.trip (the rest of a common-mode trip)."""
    if hz.lost is None:
        return None
    lm, lj = lost_pairs(hz, idx)
    pos = {int(m): k for k, m in enumerate(idx)}
    out: list[list] = [[] for _ in idx]
    for m, j in zip(lm.tolist(), lj.tolist()):
        if j != hz.trip[m]:
            out[pos[m]].append(j)
    return [tuple(x) for x in out]


def _nadir_live(case: Case, hz) -> np.ndarray:
    return np.nonzero((hz.dP > 0) & (hz.H_sys > 0))[0]


def _nadir_round(case: Case, info: ModelInfo, lp: LinearProgram, out: Outcome,
                 nadir: dict, cut: bool = True) -> bool:
    """Simulate every event instance of the candidate against the nadir limit; where one
    dips past it, add a cut and ask for another solve. Returns True when the case must be
    solved again. Sets nadir["confirmed"] (True: every instance within the limit)."""
    N_max = case.limits.max_nadir_deviation_hz
    hz = info.hz
    live = _nadir_live(case, hz)
    if N_max is None or len(live) == 0:
        return False
    if len(hz.dP) > NADIR_SIM_MAX_INSTANCES:
        nadir["confirmed"] = False
        return False
    progress.step("simulating events against the nadir limit"
                  + (f" (round {nadir['rounds'] + 1})" if nadir["rounds"] else ""))
    gain, r_up, r_dn = period_values(lp, info, out.x)
    sub = _sub_hz(hz, live)
    t0 = time.perf_counter()
    chk = _nadir_simulate(case, sub, gain, r_up, r_dn)
    nadir["simulate_s"] += time.perf_counter() - t0
    worst = np.zeros(len(hz.dP))
    worst[live] = chk.dip_hz
    nadir["checked"] = True
    nadir["worst_hz"] = float(worst.max())
    bad = chk.dip_hz > N_max + NADIR_TOL_HZ
    nadir["confirmed"] = not bad.any()
    nadir["out"] = out
    g = nadir["guide"]
    if cut and not g.cuts and not g.relaxed:
        if not bad.any():
            return _nadir_loosen(nadir, hz, live, chk.dip_hz, N_max, (lp, info, out))
        if nadir["best"] is not None:  # loosened too far: halfway back once, else the best
            return _nadir_step_back(nadir)
    stuck = nadir.get("last_worst") is not None and abs(nadir["last_worst"] - worst.max()) < 1e-9
    nadir["last_worst"] = float(worst.max())
    if bad.any() and cut and not g.relaxed and (nadir["rounds"] >= NADIR_ROUNDS or stuck):
        return _nadir_restart_relaxed(nadir)  # the cuts did not move the answer
    if not bad.any() or nadir["rounds"] >= NADIR_ROUNDS or not cut:
        return False
    # per violating instance: the candidate's own simulated responses at its nadir time as
    # coefficients, and the energy that would have kept the dip at the limit
    again = _nadir_simulate(case, sub, gain, r_up, r_dn, energy_for=bad)
    # what each provider's demand could reach by the limit: min(r, K (N - d)^+) (the model's
    # q_a + q_b cannot exceed it; in a relaxed model q itself is not yet meaningful)
    r_dir = np.where((hz.sigma > 0)[:, None], r_up[hz.inst_t], r_dn[hz.inst_t])
    q = np.minimum(r_dir, gain[hz.inst_t] * np.maximum(N_max - hz.d_hz, 0.0)[None, :])
    f_n = case.nominal_frequency_hz
    from optreserve.model.nadir import fresh_coef

    for j in np.nonzero(bad)[0]:
        m = int(live[j])
        t_star = float(chk.time_s[j])
        E = again.energy_mw_s[j]
        with np.errstate(divide="ignore", invalid="ignore"):
            c = np.where(q[m] > 1e-6, E / q[m], 0.0)
        # units the candidate did not use: credited as the rows would at that time
        new = q[m] <= 1e-6
        c[new] = fresh_coef(case, hz, m, t_star)[new]
        c = np.maximum(c, 0.0)
        short = 2.0 * hz.H_sys[m] / f_n * (chk.dip_hz[j] - NADIR_MARGIN * N_max)
        nadir["guide"].cuts.append((m, c, float(E.sum() + max(short, 0.0))))
    nadir["cuts"] = len(nadir["guide"].cuts)
    nadir["rounds"] += 1
    return True


def _sub_hz(hz, idx):
    """The instance arrays of hz restricted to idx (what check_instances reads)."""
    from types import SimpleNamespace

    return SimpleNamespace(inst_t=hz.inst_t[idx], sigma=hz.sigma[idx], dP=hz.dP[idx],
                           inst_area=hz.inst_area[idx], trip=hz.trip[idx],
                           absent=hz.absent[idx], also_lost=_also_lost(hz, idx))


def _nadir_at_most(case: Case, hz) -> tuple[float, int]:
    """The worst simulated dip (Hz) and its instance with every available provider at its
    most: the highest gain its band and headroom allow, and all the headroom it may hold."""
    live = _nadir_live(case, hz)
    gain = hz.K_hi_b[hz.block] * hz.avail
    chk = _nadir_simulate(case, _sub_hz(hz, live), gain, hz.R_up * hz.avail,
                          hz.R_dn * hz.avail)
    j = int(np.argmax(chk.dip_hz))
    return float(chk.dip_hz[j]), int(live[j])


def _nadir_loosen(nadir: dict, hz, live, dip, N_max: float, candidate) -> bool:
    """A confirmed candidate: keep it if it is the cheapest so far, and ask for a solve with
    each instance's rows loosened by N / dip while dips stay well inside the limit."""
    best = nadir["best"]
    g = nadir["guide"]
    if best is None or candidate[2].objective < best[2].objective:
        nadir["best"] = (*candidate, float(dip.max()))
        nadir["best_scale"] = np.ones(len(hz.dP)) if g.scale is None else g.scale.copy()
    if nadir["loosened"] >= NADIR_LOOSEN or dip.max() >= NADIR_MARGIN * N_max:
        return False
    sc = np.ones(len(hz.dP)) if g.scale is None else g.scale.copy()
    step = (NADIR_MARGIN * N_max / np.maximum(dip, 1e-6)) ** NADIR_LOOSEN_POWER
    sc[live] = np.minimum(sc[live] * step, NADIR_SCALE_MAX)
    g.scale = sc
    nadir["loosened"] += 1
    return True


def _nadir_step_back(nadir: dict) -> bool:
    """A loosened candidate dips past the limit: once, solve again with every instance's
    rows halfway (geometric mean) between the best confirmed candidate's and the candidate's;
    after that the best confirmed candidate stands."""
    g = nadir["guide"]
    if nadir.get("stepped_back") or g.scale is None or nadir.get("best_scale") is None:
        return False
    nadir["stepped_back"] = True
    g.scale = np.sqrt(nadir["best_scale"] * g.scale)
    return True


def _nadir_on_infeasible(case: Case, hz, nadir: dict, history: list) -> bool:
    """A solve came back infeasible. The nadir rows alone are conservative: when they make the
    first solve infeasible, solve again with them relaxed (True), the simulation and its cuts
    then decide. When the cuts did it, give up (_nadir_give_up)."""
    if case.limits.max_nadir_deviation_hz is None:
        return False
    g = nadir["guide"]
    if not history and not g.relaxed and not g.cuts:
        g.relaxed = nadir["relaxed"] = True
        return True
    if g.cuts and history:
        if not g.relaxed:  # the cuts from the rows' answer led nowhere: start from below
            return _nadir_restart_relaxed(nadir)
        _nadir_give_up(case, hz, nadir)
    return False


def _nadir_restart_relaxed(nadir: dict) -> bool:
    """Drop the cuts and the rows and search again from the cheapest allocation the other
    limits allow, guided by the simulation alone (a governor that swings worse with more gain,
    such as hydro with permanent droop only, is approached from the stable side)."""
    g = nadir["guide"]
    g.cuts.clear()
    g.scale = None
    g.relaxed = nadir["relaxed"] = True
    nadir["rounds"] = 0
    return True


def _nadir_final(case: Case, info: ModelInfo, lp: LinearProgram, out: Outcome,
                 nadir: dict):
    """The answer to return: the cheapest confirmed one when the loosened rows found any,
    else the last; it must be the one simulated: check it when it was not, and give up
    (InfeasibleError or unconfirmed) when it breaks the limit. Returns (lp, info, out,
    swapped)."""
    if case.limits.max_nadir_deviation_hz is None or len(_nadir_live(case, info.hz)) == 0:
        return lp, info, out, False
    best = nadir["best"]
    if best is not None and (nadir.get("out") is not out or not nadir["confirmed"]
                             or best[2].objective < out.objective):
        swapped = best[2] is not out
        lp, info, out = best[:3]
        nadir.update(out=out, confirmed=True, worst_hz=best[3])
        return lp, info, out, swapped
    if nadir.get("out") is not out:
        _nadir_round(case, info, lp, out, nadir, cut=False)
    if nadir["confirmed"] is False and len(info.hz.dP) <= NADIR_SIM_MAX_INSTANCES:
        _nadir_give_up(case, info.hz, nadir)
    return lp, info, out, False


def _nadir_give_up(case: Case, hz, nadir: dict) -> None:
    """No candidate could be confirmed: raise InfeasibleError when every provider at its most
    still breaks the limit in simulation; otherwise mark the result unconfirmed."""
    from optreserve.errors import InfeasibleError

    dip, m = _nadir_at_most(case, hz)
    N_max = case.limits.max_nadir_deviation_hz
    if dip > N_max + NADIR_TOL_HZ:
        name = hz.inst_name[m]
        msg = (f"nadir limit {N_max:g} Hz cannot be met: with every provider at its most "
               f"(highest gain, all its headroom) event {name} still dips {dip:.3f} Hz in "
               "simulation")
        line = (f"event {name}: simulated nadir {dip:.3f} Hz with every provider at its most "
                f"(limit {N_max:g} Hz)")
        raise InfeasibleError(msg, [line])
    nadir["confirmed"] = False

"""What breaks: one evaluation, shared by `check`, `solve`'s diagnosis, `retune` and the
uniform-droop comparison, that turns an allocation into the limits it breaks (what, where, by
how much) and into one wording for them.

The figures come from the independent calculation of settle.py (scalar balance with dead bands
and headroom saturation, then DC flows), never from the optimiser. Like settle.py this module
imports nothing from model/: the stacked event instances arrive as a duck-typed object with the
attributes of model.horizon.Horizon it reads (inst_name, inst_t, dP, sigma, inst_area, trip,
absent, d_hz, area, D_a, F0, Fmax, own), and a nadir shortfall, which rests on the model's
energy rows, is passed in by the caller.

Families (the `family` column):
  event  settled deviation beyond the limit; short_mw = response missing at the limit,
         |dP| - (sum_i min(K_i (F - d_i)^+, r_i) + F D), providers out of the instance removed
  link   post-event flow beyond the link's limit; over_mw = |flow| - limit
  area   own reserve (min_own_reserve_mw) not held; short_mw = MW missing
  nadir  nadir energy rows short; short_mw = MW s missing
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from optreserve.case.data import Case
from optreserve.case.nodal import area_level
from optreserve.verify.settle import BatchPoints, settle_instances

# A limit counts as broken beyond these; the same margins the solve's verification applies.
SETTLED_TOL_HZ = 1e-5
LINK_TOL_MW = 1e-3  # per 100 MW of limit, at least this
RESERVE_TOL_MW = 1e-6
NADIR_TOL_MW_S = 1e-6

COLUMNS = ["family", "element", "event", "period", "short_mw", "excess_hz", "over_mw"]


def _lost(inst):
    """(instance, unit) pairs of every unit each instance loses (a common-mode trip loses
    several); None when each trip loses its one unit (inst.trip)."""
    lost = getattr(inst, "lost", None)
    if lost is None:
        return None
    m, j = lost.nonzero()
    order = np.lexsort((j, m))
    return m[order].astype(np.int64), j[order].astype(np.int64)


def evaluate(case: Case, inst, gain, r_up, r_dn) -> BatchPoints:
    """Independent settled points of every instance for per-period gains and headroom (T, N).
    A direction a unit does not provide in holds no headroom there, so the headroom alone
    (min(K (|df| - d), r)) decides its response: no direction mask is applied on top."""
    case = area_level(case)  # a nodal case's branch flows: verify/nodal.py
    apos = {a: k for k, a in enumerate(case.areas["area"])}
    return settle_instances(
        inst.dP, inst.sigma, inst.inst_t, inst.inst_area, inst.trip, gain, r_up, r_dn,
        inst.d_hz, inst.area, inst.D_a, inst.F0, [apos[a] for a in case.links["from_area"]],
        [apos[a] for a in case.links["to_area"]],
        case.link_matrix("reactance_pu").astype(float), absent=inst.absent, lost=_lost(inst))


def response_at_limit(inst, gain, r_up, r_dn, limit_hz: float) -> np.ndarray:
    """Per instance (M,) the most MW the allocation gives when the frequency sits at the
    limit: sum_i min(K_i (F - d_i)^+, r_i) over the providers that respond in the instance,
    plus load self-regulation F D. An event is met at the limit when this covers |dP|."""
    t = inst.inst_t
    M = len(t)
    K = np.asarray(gain, float)[t].copy()  # (M, N)
    for arr in (inst.trip, inst.absent):
        m = np.nonzero(arr >= 0)[0]
        K[m, arr[m]] = 0.0
    lost = _lost(inst)
    if lost is not None:  # every unit of a common-mode trip is out
        K[lost[0], lost[1]] = 0.0
    r = np.where((inst.sigma > 0)[:, None], np.asarray(r_up, float)[t],
                 np.asarray(r_dn, float)[t])
    give = np.minimum(K * np.maximum(limit_hz - np.asarray(inst.d_hz, float), 0.0)[None, :],
                      np.where(K > 0, r, 0.0))
    return give.sum(axis=1) + limit_hz * np.asarray(inst.D_a, float)[t].sum(axis=1) if M else \
        np.zeros(0)


def what_breaks(case: Case, inst, gain, r_up, r_dn, limit_hz: float,
                nadir_short: np.ndarray | None = None,
                points: BatchPoints | None = None) -> pd.DataFrame:
    """Every limit the allocation (gain, r_up, r_dn per period, (T, N)) breaks, one row each
    (COLUMNS). limit_hz: the settled bound it is held to; nadir_short (M,): MW s short per
    instance from the nadir rows (None: not checked)."""
    case = area_level(case)  # the area-level limits; a nodal case's branches: verify/nodal.py
    pts = evaluate(case, inst, gain, r_up, r_dn) if points is None else points
    labels = [str(p) for p in case.periods] if case.is_horizon else [""] * int(inst.T)
    names = list(inst.inst_name)
    rows = []
    dev = np.abs(pts.deviation_hz)
    give = response_at_limit(inst, gain, r_up, r_dn, limit_hz)
    for m in np.nonzero(~(dev <= limit_hz + SETTLED_TOL_HZ) & (inst.dP > 0))[0]:
        rows.append(("event", names[m], names[m], labels[inst.inst_t[m]],
                     float(max(inst.dP[m] - give[m], 0.0)),
                     float(dev[m] - limit_hz) if np.isfinite(dev[m]) else float("inf"), 0.0))
    if inst.F0.shape[1]:
        lim = inst.Fmax[inst.inst_t]
        over = np.abs(pts.flow_after_mw) - lim
        link_ids = [str(x) for x in case.links["link"]]
        for m, li in zip(*np.nonzero(over > LINK_TOL_MW * np.maximum(1.0, lim / 100.0))):
            rows.append(("link", link_ids[li], names[m], labels[inst.inst_t[m]], 0.0, 0.0,
                         float(over[m, li])))
    own = np.asarray(inst.own, float)
    held = np.zeros_like(own)
    np.add.at(held.T, np.asarray(inst.area), np.asarray(r_up, float).T)
    areas = [str(a) for a in case.areas["area"]]
    for t, a in zip(*np.nonzero(held < own - RESERVE_TOL_MW)):
        rows.append(("area", areas[a], "", labels[t], float(own[t, a] - held[t, a]), 0.0, 0.0))
    if nadir_short is not None:
        ok = np.isfinite(nadir_short) & (inst.dP > 0) & (nadir_short > NADIR_TOL_MW_S)
        for m in np.nonzero(ok)[0]:
            rows.append(("nadir", names[m], names[m], labels[inst.inst_t[m]],
                         float(nadir_short[m]), 0.0, 0.0))
    return pd.DataFrame(rows, columns=COLUMNS)


def describe(breaks: pd.DataFrame, limit_hz: float) -> list[str]:
    """One sentence per broken limit, the same words in every command."""
    out = []
    for r in breaks.itertuples():
        when = f" in period {r.period}" if r.period else ""
        if r.family == "event":
            settles = ("has no settled point (the response saturates below the event)"
                       if not np.isfinite(r.excess_hz) else
                       f"settles {(r.excess_hz + limit_hz) * 1000:.1f} mHz from nominal "
                       f"(limit {limit_hz * 1000:.0f} mHz)")
            out.append(f"event {r.element}{when}: {settles}; {r.short_mw:.1f} MW of response "
                       "missing at the limit")
        elif r.family == "link":
            out.append(f"link {r.element} after {r.event}{when}: {r.over_mw:.1f} MW over its "
                       "limit")
        elif r.family == "area":
            out.append(f"area {r.element}{when}: own reserve {r.short_mw:.1f} MW short")
        elif r.family == "nadir":
            out.append(f"event {r.element}{when}: nadir limit needs {r.short_mw:.1f} MW s more "
                       "response energy before the nadir (faster or more headroom)")
        else:  # families added by callers (e.g. "cause") carry their own words
            out.append(str(r.element))
    return out

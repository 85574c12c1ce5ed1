"""What is short when no allocation meets the limits, in the words and numbers `check` uses.

Three steps, each reported through the one evaluation of verify/breaks.py:
1. The screening `check` prints (every capable provider at its highest gain): an event short
   there is short by exactly the MW `check` quotes, whatever else happens.
2. Otherwise every event can be met on its own, and a limit that couples them is the cause.
   Links first: the links the least-violating (elastic) allocation pushes to or past their
   limit are relaxed; when the case becomes feasible, each link that alone makes it feasible
   is named with a limit that does (found by bisection on that limit, each step a feasibility
   solve whose allocation is recomputed independently).
3. Otherwise the elastic allocation's broken limits, without blaming an event the screening
   rates as fine.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd

from optreserve.case.data import Case
from optreserve.errors import InfeasibleError
from optreserve.model.build import build_model
from optreserve.model.horizon import Horizon, prepare
from optreserve.model.nadir import nadir_shortfall
from optreserve.solver.backends import solve_program
from optreserve.solver.readback import period_values
from optreserve.solver.screen import most_capable, screening_limit_hz
from optreserve.verify.breaks import COLUMNS, describe, evaluate, what_breaks

# Bisection steps on a link's limit when naming it (each one feasibility solve).
LINK_BISECTION_STEPS = 6
# Links within this of their limit in the elastic allocation are candidates.
LINK_CANDIDATE_MW = 1e-2
MAX_LINES = 20
# Links tested one at a time (the most loaded first); beyond them only as a group.
MAX_ALONE = 8


def diagnose(case: Case, hz: Horizon | None = None, extend=None,
             nadir_guide=None) -> InfeasibleError:
    """The smallest explanation of why no allocation meets the limits (InfeasibleError with
    lines and a diagnosis table of verify.breaks.COLUMNS). nadir_guide: the nadir rows as the
    solve had them (model/nadir.py NadirGuide); when the solve had left them free (relaxed:
    the simulation decides the nadir), so does the diagnosis, and no nadir shortfall of the
    conservative rows is blamed."""
    hz = prepare(case) if hz is None else hz
    F = screening_limit_hz(case)
    cap = most_capable(case, hz)
    short = what_breaks(case, hz, *cap, F)
    short = short[short["family"] == "event"]
    if len(short):  # step 1: the same shortfall `check` reports
        lines = [s + " (even with every provider at its highest gain)"
                 for s in describe(short, F)]
        return _error(case, lines, short)
    elastic = _elastic(case, hz, extend, nadir_guide)
    if elastic is None:
        return InfeasibleError("no allocation can meet the limits (diagnosis failed: the "
                               "least-violating allocation could not be found)")
    gain, r_up, r_dn = elastic
    rows_free = nadir_guide is not None and getattr(nadir_guide, "relaxed", False)
    nadir = (nadir_shortfall(case, hz, r_up, r_dn)
             if case.limits.max_nadir_deviation_hz is not None and not rows_free else None)
    broken = what_breaks(case, hz, gain, r_up, r_dn, F, nadir)
    links = _limiting_links(case, hz, extend, evaluate(case, hz, gain, r_up, r_dn),
                            nadir_guide)
    if links is not None:  # step 2
        return _error(case, links[1], links[0])
    # step 3: every event can be met alone (step 1), so none is blamed on its own
    rest = broken[broken["family"] != "event"]
    lines = describe(rest, F)
    if len(broken) > len(rest):
        lines.append("every event can be met on its own (see check); together with the "
                     "limits above they cannot")
    return _error(case, lines, rest)


def _error(case: Case, lines: list[str], table: pd.DataFrame) -> InfeasibleError:
    diag = table[COLUMNS].reset_index(drop=True)
    if not case.is_horizon:
        diag = diag.drop(columns="period")
    if not lines:
        lines = ["the limits conflict in a way no single relaxation explains"]
    if len(lines) > MAX_LINES:
        more = len(lines) - MAX_LINES
        lines = [*lines[:MAX_LINES], f"... and {more} more (see diagnosis.csv)"]
    return InfeasibleError("no allocation can meet the limits", lines, diag)


def _elastic(case: Case, hz: Horizon, extend, nadir_guide=None):
    """Gains and headroom (T, N) of the least-violating allocation (penalised slacks on every
    limit family), or None when HiGHS finds none."""
    lp, info = build_model(case, elastic=True, hz=hz, nadir_scale=nadir_guide)
    if extend is not None:
        extend(lp, info)
    out = solve_program(lp, engine="highspy")
    return None if out.x is None else period_values(lp, info, out.x)


def _feasible(case: Case, hz: Horizon, extend, nadir_guide=None):
    """An allocation (gain, r_up, r_dn) meeting every row of the model for hz, or None."""
    lp, info = build_model(case, hz=hz, nadir_scale=nadir_guide)
    if extend is not None:
        extend(lp, info)
    lp.zero_costs()
    lp.objective_offset = 0.0
    # a feasibility question: the case's own time limit per solve (no answer = not shown)
    out = solve_program(lp, engine="highspy", time_limit=case.solver.time_limit_s)
    if out.x is None or out.status == "infeasible":
        return None
    return period_values(lp, info, out.x)


def _with_limits(hz: Horizon, links, limit_mw) -> Horizon:
    Fmax = hz.Fmax.copy()
    Fmax[:, links] = np.asarray(limit_mw, float)
    return replace(hz, Fmax=Fmax)


def _limiting_links(case: Case, hz: Horizon, extend, pts, nadir_guide=None):
    """Links whose limit alone makes the case infeasible, with a limit that makes it feasible:
    (rows of verify.breaks.COLUMNS with over_mw = the raise needed, one line each), or None
    when relaxing the links does not make the case feasible."""
    if not hz.F0.shape[1] or not len(hz.dP):
        return None
    loading = np.abs(pts.flow_after_mw) - hz.Fmax[hz.inst_t]
    near = loading >= -LINK_CANDIDATE_MW
    cand = np.nonzero(near.any(axis=0))[0]
    cand = cand[np.argsort(-loading.max(axis=0)[cand], kind="stable")]  # most loaded first
    if not len(cand):
        # the least-violating allocation may have traded a link for a settled slack (the
        # slacks' weights decide): then every link is a candidate
        cand = np.arange(hz.F0.shape[1])
    # a limit no flow can reach: |F0| + 2 |dP| bounds every post-event flow (shares sum to 1)
    free = float(np.abs(hz.F0).max() + 2 * hz.dP.max() + 1.0)
    freed = _feasible(case, _with_limits(hz, cand, free), extend, nadir_guide)
    if freed is None:
        return None
    # the candidates the allocation freed of their limits really loads past them, most first
    over = (np.abs(evaluate(case, hz, *freed).flow_after_mw) - hz.Fmax[hz.inst_t])[:, cand]
    if (over > 1e-6).any():
        keep = (over > 1e-6).any(axis=0)
        cand = cand[keep][np.argsort(-over.max(axis=0)[keep], kind="stable")]
    link_ids = [str(x) for x in case.links["link"]]
    labels = [str(p) for p in case.periods] if case.is_horizon else [""] * hz.T
    rows = []
    alone = [li for li in cand[:MAX_ALONE]
             if _feasible(case, _with_limits(hz, [li], free), extend, nadir_guide) is not None]
    for li in alone or list(cand):
        group = [li] if alone else list(cand)
        lim = float(hz.Fmax[:, li].max())
        need = _smallest_limit(case, hz, extend, group, li, lim, free, nadir_guide)
        worst = int(np.argmax(np.abs(pts.flow_after_mw[:, li])))
        rows.append({"family": "link", "element": link_ids[li], "event": hz.inst_name[worst],
                     "period": labels[hz.inst_t[worst]], "short_mw": 0.0, "excess_hz": 0.0,
                     "over_mw": need - lim, "text": _link_text(
                         link_ids[li], lim, need, hz.inst_name[worst]
                         + (f" in period {labels[hz.inst_t[worst]]}" if case.is_horizon
                            else ""), alone)})
    texts = [r.pop("text") for r in rows]
    return pd.DataFrame(rows, columns=COLUMNS), texts


def _smallest_limit(case, hz, extend, group, li, lim, free, nadir_guide=None) -> float:
    """The lowest limit of link li (the others in the group relaxed) found feasible by
    bisection, rounded up to 0.1 MW, read from the independent flows of the allocation."""
    lo, hi = lim, free
    best = None
    for _ in range(LINK_BISECTION_STEPS):
        mid = 0.5 * (lo + hi) if best is not None else hi
        others = [g for g in group if g != li]
        trial = _with_limits(_with_limits(hz, others, free) if others else hz, [li], mid)
        alloc = _feasible(case, trial, extend, nadir_guide)
        if alloc is None:
            lo = mid
            continue
        flows = np.abs(evaluate(case, trial, *alloc).flow_after_mw[:, li])
        best = max(float(flows.max(initial=0.0)), lim) if best is None else min(
            best, max(float(flows.max(initial=0.0)), lim))
        hi = min(mid, best)
    return float(np.ceil(((best if best is not None else free)) * 10.0) / 10.0)


def _link_text(link: str, lim: float, need: float, event: str, alone) -> str:
    who = "its" if alone else "its (with the other links named)"
    return (f"link {link}: {who} {lim:g} MW limit is the cause: every event can be met by the "
            f"providers (see check), but not without loading this link past its limit after "
            f"{event}; with the limit raised to {need:.1f} MW (+{need - lim:.1f} MW) every "
            "limit can be met")

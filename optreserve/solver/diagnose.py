"""What is short when no allocation meets the limits: the elastic model's slacks turned into
one line per shortfall (what, where, by how much)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from optreserve.case.data import Case
from optreserve.errors import InfeasibleError
from optreserve.model.build import build_model
from optreserve.model.horizon import Horizon
from optreserve.solver.backends import solve_program
from optreserve.solver.readback import exact_points


# ------------------------------------------------------------------ infeasibility
def diagnose(case: Case, hz: Horizon | None = None, extend=None) -> InfeasibleError:
    """Re-solve with penalised slacks on every limit family and report the smallest relaxation
    that makes the case feasible, in engineering terms (recomputed independently)."""
    lp, info = build_model(case, elastic=True, hz=hz)
    if extend is not None:
        extend(lp, info)
    hz = info.hz
    out = solve_program(lp, engine="highspy")
    if out.x is None:
        return InfeasibleError("no allocation can meet the limits (diagnosis failed: "
                               f"{out.status})")
    points = exact_points(info, lp, out.x)
    labels = [str(p) for p in case.periods] if case.is_horizon else [""]
    F = case.limits.max_settled_deviation_hz
    s_set = lp.value(out.x, "slack_settled")
    link_ids = [str(x) for x in case.links["link"]]
    rows = []
    over_all = np.abs(points.flow_after_mw) - hz.Fmax[hz.inst_t]
    for m in range(len(hz.dP)):
        t = hz.inst_t[m]
        if s_set[m] > 1e-6:
            dev = abs(points.deviation_hz[m])
            rows.append({"family": "event", "element": hz.inst_name[m], "event": hz.inst_name[m],
                         "period": labels[t], "short_mw": float(s_set[m]),
                         "excess_hz": float(dev - F) if np.isfinite(dev) else float("inf"),
                         "over_mw": 0.0})
        for li in np.nonzero(over_all[m] > 1e-3)[0]:
            rows.append({"family": "link", "element": link_ids[li], "event": hz.inst_name[m],
                         "period": labels[t], "short_mw": 0.0, "excess_hz": 0.0,
                         "over_mw": float(over_all[m, li])})
    if "slack_nadir" in lp.var_blocks:
        s_nad = lp.value(out.x, "slack_nadir")
        for m in np.nonzero(s_nad > 1e-6)[0]:
            rows.append({"family": "nadir", "element": hz.inst_name[m], "event": hz.inst_name[m],
                         "period": labels[hz.inst_t[m]], "short_mw": float(s_nad[m]),
                         "excess_hz": 0.0, "over_mw": 0.0})
    if "slack_own" in lp.var_blocks:
        ta, aa = np.nonzero(hz.own > 0)
        s_own = lp.value(out.x, "slack_own")
        for k in np.nonzero(s_own > 1e-6)[0]:
            rows.append({"family": "area", "element": str(case.areas["area"].iloc[aa[k]]),
                         "event": "", "period": labels[ta[k]], "short_mw": float(s_own[k]),
                         "excess_hz": 0.0, "over_mw": 0.0})
    cols = ["family", "element", "event", "period", "short_mw", "excess_hz", "over_mw"]
    diag = pd.DataFrame(rows, columns=cols)
    if not case.is_horizon:
        diag = diag.drop(columns="period")
    lines = []
    for r in rows:
        when = f" in period {r['period']}" if r["period"] else ""
        if r["family"] == "event":
            lines.append(f"event {r['element']}{when}: {r['short_mw']:.1f} MW of response "
                         f"missing at the limit (settles {r['excess_hz'] * 1000:.1f} mHz beyond "
                         f"{F * 1000:.0f} mHz)")
        elif r["family"] == "nadir":
            lines.append(f"event {r['element']}{when}: nadir limit needs {r['short_mw']:.1f} "
                         "MW s more response energy before the nadir (faster or more headroom)")
        elif r["family"] == "link":
            lines.append(f"link {r['element']}: {r['over_mw']:.1f} MW over its limit after "
                         f"event {r['event']}{when}")
        else:
            lines.append(f"area {r['element']}{when}: own reserve {r['short_mw']:.1f} MW short")
    if not lines:
        lines.append("the limits conflict in a way no single relaxation explains")
    if len(lines) > 20:
        lines = lines[:20] + [f"... and {len(lines) - 20} more (see diagnosis.csv)"]
    return InfeasibleError("no allocation can meet the limits", lines, diag)

"""Quick screening of a case without optimising: per event the gain the limit needs against
the most the case can offer (every capable provider at its highest gain)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from optreserve.case.data import Case
from optreserve.case.products import trip_members
from optreserve.model.horizon import Events, unit_data


def event_capability(case: Case) -> pd.DataFrame:
    """Per event (and period, for a horizon) needed and offered response; see _snapshot."""
    if not case.is_horizon:
        return _snapshot(case)
    parts = []
    for label, snap in zip(case.periods, case.snapshots()):
        parts.append(_snapshot(snap).assign(period=label))
    df = pd.concat(parts, ignore_index=True)
    return df[["event", "period"] + [c for c in df.columns if c not in ("event", "period")]]


def _snapshot(case: Case) -> pd.DataFrame:
    """One row per event: needed and offered response at the settled limit.

    needed_gain_mw_per_hz = |dP| / F (load self-regulation included on the offered side);
    offered_gain_mw_per_hz = (sum_i K_max,i (F - d_i)^+ + F D) / F with the tripped unit out.
    """
    ev = Events.of(case)
    need_up = bool((ev.sigma > 0).any())
    need_dn = bool((ev.sigma < 0).any())
    ud = unit_data(case, need_up, need_dn)
    F = min(case.limits.max_settled_deviation_hz, case.limits.full_activation_deviation_hz)
    D = case.load_damping_mw_per_hz().sum()
    K_max = ud.K_hi
    if case.droop.steps_pct is not None:
        # highest gain a governor step allows inside the band and the headroom
        g = case.gain_from_droop(np.ones(len(case.units)))[:, None] / np.asarray(
            case.droop.steps_pct)[None, :]
        ok = (g >= ud.K_lo[:, None] * (1 - 1e-9)) & (g <= ud.K_hi[:, None] * (1 + 1e-9))
        K_max = np.where(ok, g, 0.0).max(axis=1)
    resp = K_max * np.maximum(F - ud.d_hz, 0.0)  # MW each unit can give at the limit
    total = resp.sum()
    offered = total - trip_members(case.units, case.events) @ resp + F * D  # all lost units out
    return pd.DataFrame({
        "event": ev.names,
        "size_mw": case.events["size_mw"].to_numpy(float),
        "needed_gain_mw_per_hz": ev.dP / F,
        "offered_gain_mw_per_hz": offered / F,
        "needed_mw_at_limit": ev.dP,
        "offered_mw_at_limit": offered,
        "short_mw": np.maximum(ev.dP - offered, 0.0),
    })

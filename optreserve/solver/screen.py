"""Quick screening of a case without optimising: per event the gain the limit needs against
the most the case can offer (every capable provider at its highest gain).

The most-capable allocation is built here; what it gives at the limit is the one evaluation
of verify/breaks.py (`response_at_limit`), the same that `solve`'s diagnosis reports, so that
`check` and `solve` quote the same shortfall."""

from __future__ import annotations

import numpy as np
import pandas as pd

from optreserve.case.data import Case
from optreserve.model.horizon import Horizon, prepare, responds
from optreserve.verify.breaks import response_at_limit


def screening_limit_hz(case: Case) -> float:
    """The settled bound an allocation is held to (the tighter of the settled limit and the
    full-activation deviation)."""
    return min(case.limits.max_settled_deviation_hz, case.limits.full_activation_deviation_hz)


def most_capable(case: Case, hz: Horizon):
    """Per period (T, N): every capable provider at its highest gain (the highest governor
    step inside band and headroom when the case has steps), headroom sized for full
    activation. Returns gain, r_up, r_dn."""
    K_max = hz.K_hi_t
    if case.droop.steps_pct is not None:
        # highest gain a governor step allows inside the band and the headroom
        g = case.gain_from_droop(np.ones(hz.N))[None, :, None] / np.asarray(
            case.droop.steps_pct)[None, None, :]
        ok = (g >= hz.K_lo[None, :, None] * (1 - 1e-9)) & (g <= K_max[:, :, None] * (1 + 1e-9))
        K_max = np.where(ok, g, 0.0).max(axis=2)
    r = K_max * hz.a_act[None, :]
    up, dn = responds(hz)  # a direction a unit cannot (or may not) provide in holds nothing
    return (K_max, np.where(hz.need_up[:, None] & up, r, 0.0),
            np.where(hz.need_dn[:, None] & dn, r, 0.0))


def event_capability(case: Case, hz: Horizon | None = None) -> pd.DataFrame:
    """One row per event instance (with its period, for a horizon): needed and offered
    response at the settled limit.

    needed_gain_mw_per_hz = |dP| / F (load self-regulation included on the offered side);
    offered_gain_mw_per_hz = (sum_i K_max,i (F - d_i)^+ + F D) / F with the tripped unit out.
    """
    hz = prepare(case) if hz is None else hz
    F = screening_limit_hz(case)
    offered = response_at_limit(hz, *most_capable(case, hz), F)
    df = pd.DataFrame({"event": np.array(hz.inst_name, dtype=object)})
    if case.is_horizon:
        df["period"] = np.array(list(case.periods), dtype=object)[hz.inst_t]
    df["size_mw"] = hz.sigma * hz.dP
    df["needed_gain_mw_per_hz"] = hz.dP / F
    df["offered_gain_mw_per_hz"] = offered / F
    df["needed_mw_at_limit"] = hz.dP
    df["offered_mw_at_limit"] = offered
    df["short_mw"] = np.maximum(hz.dP - offered, 0.0)
    return df


def screening_scope(case: Case) -> str:
    """What the screening leaves to `solve` (said after "case is valid")."""
    left = (["link limits"] if len(case.links) else []) + (
        ["own reserve"] if (case.areas["min_own_reserve_mw"] > 0).any() else []) + (
        ["the nadir limit"] if case.limits.max_nadir_deviation_hz is not None else [])
    if not left:
        return ""
    return (" (every event can be met on its own; " + ", ".join(left)
            + " are decided by solve, whose diagnosis names the one that binds)")

"""Today's allocation: the droop settings the case states (droop_now_pct) and the headroom
they hold. One definition for every study that describes "today" (retune's before, the
uniform-droop comparison's today row)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from optreserve.case.data import Case
from optreserve.model.horizon import Horizon, unit_flag_matrix


@dataclass(frozen=True)
class Today:
    droop_pct: np.ndarray  # (N,) NaN: not providing today
    gain: np.ndarray  # (T, N) responding gain per period
    r_up: np.ndarray  # (T, N) headroom it holds (sized by the full-activation rule, capped)
    r_dn: np.ndarray


def today(case: Case, hz: Horizon) -> Today:
    """Today's settings as the case states them: droop_now_pct where given (and the unit may
    provide), headroom sized by the full-activation rule but no more than the unit's room."""
    now = case.units["droop_now_pct"].to_numpy(float)
    provides = case.unit_matrix("provides").astype(bool)
    K = np.where(np.isnan(now), 0.0, case.gain_from_droop(np.where(np.isnan(now), 1.0, now)))
    K = np.where(provides.any(axis=0), K, 0.0)  # a unit that may not provide has no setting
    gain = K[None, :] * provides
    need = gain * hz.a_act[None, :]
    r_up = np.where(hz.need_up[:, None] | (hz.own[:, hz.area] > 0), np.minimum(need, hz.R_up),
                    0.0)
    r_dn = np.where(hz.need_dn[:, None], np.minimum(need, hz.R_dn), 0.0)
    # one-direction providers (`provides = up | down`) hold headroom in that direction only
    r_up = np.where(unit_flag_matrix(case, "provides_up"), r_up, 0.0)
    r_dn = np.where(unit_flag_matrix(case, "provides_down"), r_dn, 0.0)
    return Today(np.where(K > 0, now, np.nan), gain, r_up, r_dn)

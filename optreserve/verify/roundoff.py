"""The one place that absorbs solver round-off.

HiGHS meets every row only to within its feasibility tolerance (1e-7 on its scaled rows), so
an allocation read back from it can fall a hair short of a rule it meets: headroom a few
micro-MW below what the droop needs at full activation, or a response that covers an event
only to within that tolerance (with no load self-regulation the event then has no settled
point by exact arithmetic). Below SOLVER_ROUNDOFF_MW such a shortfall is round-off, not a
finding. Both uses go through this module:

- `snap_up` (solver/readback.period_values): headroom that falls short of the rule's value
  by less than the round-off is reported as the rule's value;
- `covers` (verify/settle.py): a response that falls short of an event by less than the
  round-off (plus 1e-9 relative) covers it, and the event settles where the response saturates.

Everything else in the independent calculation is exact arithmetic.
"""

from __future__ import annotations

import numpy as np

SOLVER_ROUNDOFF_MW = 1e-5
RELATIVE = 1e-9  # of the event size, for very large events


def snap_up(value: np.ndarray, target: np.ndarray, where) -> np.ndarray:
    """value, or target where `where` holds and value is short of it by round-off only."""
    gap = target - value
    return np.where(where & (gap > 0) & (gap < SOLVER_ROUNDOFF_MW), target, value)


def covers(total, need):
    """Whether a response `total` covers an event `need` (MW) up to round-off."""
    return need - total <= RELATIVE * np.maximum(1.0, need) + SOLVER_ROUNDOFF_MW

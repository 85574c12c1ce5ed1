"""Governor-model columns of units.csv (case format version 2, "Governor models"), checked
once the rest of the case is read.

The reader types these columns like any other (they are declared in case/columns.py as
settings of the unit, which may not vary per period; `[dynamics] response_limit` is in the
case.toml schema, toml_settings.py); what is left here is what needs the governor models: the
model name, the parameters each model requires and their physical bounds
(dynamics/governors.py BOUNDS, REQUIRED: one table for reader, simulator, nadir rows, docs and
tests).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from optreserve.case.data import Case
from optreserve.errors import CaseError, Problem

GOVERNOR_COLUMNS = ("governor", "governor_lag_s", "reheat_time_s", "hp_fraction",
                    "water_time_s", "delay_s")


def apply_governor_columns(case: Case, folder: str | Path, settings: dict[str, Any],
                           unit_lines: np.ndarray) -> Case:
    """The case with its units' governor columns normalised (governor: model name in lower
    case, lag when blank; delay_s 0 when not given) and response_limit set.

    Raises CaseError naming file, row and column for an unknown model, a missing parameter
    its model needs, a value out of its physical bounds or a delay on a non-inverter unit."""
    from optreserve.dynamics.governors import check_table

    folder = Path(folder)
    units = case.units.copy()
    units["governor"] = units["governor"].astype(str).str.strip().str.lower().replace("", "lag")
    units["delay_s"] = np.nan_to_num(units["delay_s"].to_numpy(float))
    probs: list[Problem] = []
    units_file = str(folder / "units.csv")
    for p in check_table(units):
        if p.column == "activation_time_s" and units["governor"].iloc[p.unit] == "lag":
            continue  # version 1 semantics for lag units: the reader's own bounds apply
        probs.append(Problem(units_file, p.message, int(unit_lines[p.unit]), p.column))
    if probs:
        raise CaseError(probs)
    return case.replace(units=units,
                        response_limit=settings.get("dynamics.response_limit", "headroom"))

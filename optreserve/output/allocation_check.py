"""An allocation (read from a result folder or in memory) against the case it is meant for:
known units in their areas, the case's periods, one row per unit and period, gains that match
the droop on the unit's capacity. Used by `simulate` before it plays events forward."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from optreserve.errors import CaseError, Problem

if TYPE_CHECKING:
    from optreserve.case.data import Case

MAX_PROBLEMS = 50  # report at most this many


def check_allocation(case: Case, df: pd.DataFrame, file: str) -> None:
    """Raise CaseError with every problem (up to MAX_PROBLEMS) of allocation_problems."""
    problems = allocation_problems(case, df, file)
    if problems:
        raise CaseError(problems[:MAX_PROBLEMS])


def allocation_problems(case: Case, df: pd.DataFrame, file: str) -> list[Problem]:
    """Cross-check an allocation table (read or in memory) against the case: known units in
    their areas, the case's periods, one row per unit and period, gains that match the droop
    on the unit's capacity."""
    probs: list[Problem] = []

    def err(message, row=None, column=None):
        probs.append(Problem(file, message, row, column))

    lines = (df["_line"].to_numpy() if "_line" in df.columns
             else np.arange(len(df), dtype=np.int64) + 2)
    for c in ("unit", "area", "gain_mw_per_hz", "headroom_up_mw", "headroom_down_mw"):
        if c not in df.columns:
            err("required column is missing", 1, c)
    if probs:
        return probs
    u = case.units
    upos = {x: k for k, x in enumerate(u["unit"])}
    units = df["unit"].astype(str).to_numpy(object)
    i = np.array([upos.get(x, -1) for x in units])
    for r in np.nonzero(i < 0)[0][:50]:
        err(f"unknown unit '{units[r][:40]}' (not in units.csv of the case)", int(lines[r]),
            "unit")
    ok = i >= 0
    areas = df["area"].astype(str).to_numpy(object)
    case_area = u["area"].to_numpy(object)
    for r in np.nonzero(ok)[0][areas[ok] != case_area[i[ok]]][:50]:
        err(f"unit '{units[r]}' is in area '{case_area[i[r]]}' in the case, not "
            f"'{areas[r][:40]}'", int(lines[r]), "area")
    per = (df["period"].fillna("").astype(str).to_numpy(object) if "period" in df.columns
           else np.full(len(df), "", dtype=object))
    labels = [str(p) for p in case.periods]
    if case.is_horizon and (per == "").all():
        err("the case has periods: a period column with the case's period labels is required",
            1, "period")
        return probs
    if case.is_horizon:
        known = set(labels)
        for r in np.nonzero(~pd.Series(per).isin(known).to_numpy())[0][:50]:
            err(f"period '{per[r][:40]}' is not a period of the case", int(lines[r]), "period")
    else:
        for r in np.nonzero(per != "")[0][:1]:
            err("the case is a single snapshot: the allocation must not have periods",
                int(lines[r]), "period")
    key = pd.Series(units + "\x00" + per)
    dup = key.duplicated().to_numpy() & ok
    for r in np.nonzero(dup)[0][:50]:
        err(f"unit '{units[r]}' appears twice" + (f" for period '{per[r]}'" if per[r] else ""),
            int(lines[r]), "unit")
    gain = df["gain_mw_per_hz"].to_numpy(float)
    if "provides" in df.columns:
        prov = df["provides"].to_numpy(object)
        said_no = prov == False  # elementwise on an object array: a blank (None) is not "no"
        for r in np.nonzero(said_no & (gain > 0))[0][:50]:
            err(f"provides is false but gain_mw_per_hz is {gain[r]:g}", int(lines[r]),
                "provides")
    if "droop_pct" in df.columns:
        droop = df["droop_pct"].to_numpy(float)
        cap = u["capacity_mw"].to_numpy(float)[np.maximum(i, 0)]
        with np.errstate(divide="ignore", invalid="ignore"):
            expect = cap / (droop / 100.0 * case.nominal_frequency_hz)
        bad = ok & (gain > 0) & np.isfinite(droop) & (
            np.abs(expect - gain) > 1e-4 * np.maximum(gain, 1.0))
        for r in np.nonzero(bad)[0][:50]:
            err(f"droop_pct {droop[r]:g} on capacity {cap[r]:g} MW gives {expect[r]:.6g} "
                f"MW/Hz, not gain_mw_per_hz {gain[r]:.6g}: allocation of another case?",
                int(lines[r]), "droop_pct")
    if probs:
        return probs
    need = [(x, p) for p in (labels or [""]) for x in u["unit"]]
    have = set(zip(units, per))
    missing = [(x, p) for x, p in need if (x, p) not in have]
    for x, p in missing[:50]:
        err(f"no row for unit '{x}'" + (f" in period '{p}'" if p else ""), None, "unit")
    return probs

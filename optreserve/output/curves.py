"""The physics behind the report's plots and tables: the settled droop response of an
allocation, and the case data (dead bands, load self-regulation) of one period.

The same quasi-steady model as the independent settled point (verify/settle.py), written here
from the gains and the headroom in allocation.csv, so that a plot can be checked against the
event sizes and settled frequencies events.csv reports.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from optreserve.output.folder import ResultFolder
from optreserve.output.folder import _uniq as uniq


def response_curves(allocation: pd.DataFrame, deviation_hz, deadband_hz=None) -> pd.DataFrame:
    """Settled response of the providing units, summed per area, at each frequency deviation.

    Per unit: K (|Δf| − d)⁺, capped at the headroom in that direction, with the sign of the
    power it adds (positive = more generation, for under-frequency). The same quasi-steady
    model as the independent settled point (settle.py), written here from the gains and the
    headroom of one period of allocation.csv. deadband_hz: per row of `allocation`, in Hz
    (None: no dead bands). Returns one row per deviation (index, Hz) and one column per area,
    MW."""
    x = np.asarray(deviation_hz, float)[:, None]
    K = allocation["gain_mw_per_hz"].to_numpy(float)[None, :]
    d = (np.zeros(K.shape[1]) if deadband_hz is None else np.asarray(deadband_hz, float))[None, :]
    up = allocation["headroom_up_mw"].to_numpy(float)[None, :]
    dn = allocation["headroom_down_mw"].to_numpy(float)[None, :]
    resp = np.where(x < 0, np.minimum(K * np.maximum(-x - d, 0.0), up),
                    -np.minimum(K * np.maximum(x - d, 0.0), dn))
    areas = uniq(allocation["area"])
    pos = {a: k for k, a in enumerate(areas)}
    member = np.zeros((K.shape[1], len(areas)))
    member[np.arange(K.shape[1]), [pos[a] for a in allocation["area"]]] = 1.0
    return pd.DataFrame(resp @ member, index=pd.Index(x[:, 0], name="deviation_hz"),
                        columns=areas)


def period_rows(df: pd.DataFrame, period) -> pd.DataFrame:
    return df if period is None or "period" not in df.columns else df[df["period"] == period]


def case_period_index(rf: ResultFolder, period) -> int:
    if period is None or rf.case is None or not rf.case.is_horizon:
        return 0
    return [str(p) for p in rf.case.periods].index(str(period))


def deadbands_hz(rf: ResultFolder, alloc: pd.DataFrame, period) -> np.ndarray | None:
    if rf.case is None:
        return None
    t = case_period_index(rf, period)
    db = rf.case.unit_matrix("deadband_mhz")[t] / 1000.0
    pos = {u: k for k, u in enumerate(rf.case.units["unit"])}
    return np.asarray(db, float)[[pos[u] for u in alloc["unit"]]]


def damping_mw_per_hz(rf: ResultFolder, period) -> dict | None:
    if rf.case is None:
        return None
    t = case_period_index(rf, period)
    d = rf.case.area_matrix("load_mw")[t] * rf.case.area_matrix("load_damping_pct_per_hz")[t]
    return dict(zip(rf.case.areas["area"], np.asarray(d, float) / 100.0))


def tightest_period(rf: ResultFolder) -> object | None:
    """The period of the event instance with the least margin (None for a snapshot)."""
    if not rf.horizon or not len(rf.events):
        return rf.periods[0] if rf.horizon else None
    ev = rf.events
    margin = ev["limit_hz"] - ev["settled_deviation_hz"].abs()
    return ev["period"].iloc[int(np.argmin(margin.to_numpy()))]

"""The case: validated, typed settings and element tables (units carry their unit in the name)."""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd

from optreserve.case.products import trip_members


@dataclass(frozen=True)
class Limits:
    max_settled_deviation_hz: float
    full_activation_deviation_hz: float
    max_nadir_deviation_hz: float | None = None
    max_rocof_hz_per_s: float | None = None
    min_sustain_minutes: float | None = None  # energy-limited providers (case/products.py)


@dataclass(frozen=True)
class DroopSettings:
    steps_pct: tuple[float, ...] | None = None  # None: continuous inside each band
    change_penalty_per_unit: float = 0.0


@dataclass(frozen=True)
class SolverSettings:
    time_limit_s: float | None = None
    mip_gap: float | None = None


@dataclass(frozen=True)
class Case:
    """A whole case after validation.

    Tables (pandas, one row per element, id column first):
      units:  unit, area, capacity_mw, output_mw, min_output_mw, droop_min_pct, droop_max_pct,
              droop_now_pct (NaN = unknown), deadband_mhz, reserve_up_max_mw,
              reserve_down_max_mw (NaN = physical headroom only), price_up_per_mw_h,
              price_down_per_mw_h, provides, inertia_s, activation_time_s (NaN = not given)
      areas:  area, load_mw, load_damping_pct_per_hz, min_own_reserve_mw
      links:  link, from_area, to_area, reactance_pu, limit_mw, flow_mw
        events: event, kind, unit ("" for load steps), area, size_mw (signed: > 0 deficit),
              period (label or None = every period), size_from_output (size_mw defaulted to
              the unit's output, so it follows output_mw per period)

    A horizon (day-ahead) case has `periods` (labels in order), `period_hours` and long
    override tables in `series` ("units", "areas", "links": period, id, overridden columns).
    """

    name: str
    nominal_frequency_hz: float
    limits: Limits
    droop: DroopSettings
    solver: SolverSettings
    units: pd.DataFrame
    areas: pd.DataFrame
    links: pd.DataFrame
    events: pd.DataFrame
    path: Path | None = None
    warnings: tuple[str, ...] = field(default_factory=tuple)
    read_time_s: float = 0.0
    periods: tuple = ()
    period_hours: tuple[float, ...] = ()
    series: dict = field(default_factory=dict)
    hold_periods: int | None = None  # droop fixed per block of N periods; None = whole horizon
    co_optimise: bool = False  # [energy] co_optimise: outputs become decisions (energy price)
    nodal: object | None = None  # case.nodal.NodalNetwork of a buses.csv case, else None

    @property
    def is_nodal(self) -> bool:
        return self.nodal is not None
    response_limit: str = "headroom"  # [dynamics]: "headroom" or "room" (governor_columns.py)

    # --- horizon ---
    @property
    def is_horizon(self) -> bool:
        return len(self.periods) > 0

    @property
    def n_periods(self) -> int:
        return max(1, len(self.periods))

    def hours(self) -> np.ndarray:
        return np.asarray(self.period_hours, float) if self.is_horizon else np.ones(1)

    def blocks(self) -> np.ndarray:
        """Droop block of every period: gains are shared inside a block."""
        T = self.n_periods
        if not self.is_horizon or self.hold_periods is None:
            return np.zeros(T, dtype=np.int64)
        return np.arange(T, dtype=np.int64) // int(self.hold_periods)

    # --- per-period matrices (T rows; a snapshot has T = 1), overrides applied, vectorised ---
    def _matrix(self, table: str, col: str) -> np.ndarray:
        key = (table, col)
        cache = self.__dict__.setdefault("_matrix_cache", {})
        if key in cache:
            return cache[key]
        idc = {"units": "unit", "areas": "area", "links": "link"}[table]
        base = getattr(self, table)
        vals = base[col].to_numpy()
        M = np.repeat(vals[None, :], self.n_periods, axis=0)
        ser = self.series.get(table)
        if self.is_horizon and ser is not None and col in ser.columns and len(ser):
            v = ser[col].to_numpy()
            keep = ~pd.isna(v)
            if keep.any():
                tpos = self._period_pos()
                ipos = {x: k for k, x in enumerate(base[idc])}
                t = ser["period"].map(tpos).to_numpy()[keep]
                i = ser[idc].map(ipos).to_numpy()[keep]
                M = M.copy()
                M[t, i] = v[keep].astype(M.dtype)
        M.setflags(write=False)
        cache[key] = M
        return M

    def _period_pos(self) -> dict:
        return {p: k for k, p in enumerate(self.periods)}

    def unit_matrix(self, col: str) -> np.ndarray:
        return self._matrix("units", col)

    def area_matrix(self, col: str) -> np.ndarray:
        return self._matrix("areas", col)

    def link_matrix(self, col: str) -> np.ndarray:
        return self._matrix("links", col)

    def instances(self) -> pd.DataFrame:
        """Every event in every period it applies to, period-major: columns event_index, t,
        size_mw (signed; a trip without size_mw follows the unit's output in that period)."""
        ev = self.events
        T = self.n_periods
        per = ev["period"].to_numpy(object) if "period" in ev.columns else np.full(len(ev), None)
        tpos = self._period_pos()
        applies = np.ones((T, len(ev)), dtype=bool)
        for k, p in enumerate(per):
            if p is not None and p == p:
                applies[:, k] = False
                applies[tpos[p], k] = True
        t, e = np.nonzero(applies)
        size = ev["size_mw"].to_numpy(float)[e]
        if "size_from_output" in ev.columns:
            from_out = ev["size_from_output"].to_numpy(bool)[e]
            if from_out.any():  # the lost units' outputs in that period (all of a G1+G2)
                lost_out = (trip_members(self.units, ev) @ self.unit_matrix(
                    "output_mw").astype(float).T)  # (E, T)
                size = np.where(from_out, lost_out[e, t], size)
        return pd.DataFrame({"event_index": e, "t": t, "size_mw": size})

    def snapshots(self) -> list["Case"]:
        """One static case per period (overrides applied, events of that period only)."""
        if not self.is_horizon:
            return [self]
        tables = {"units": ("unit", self.units), "areas": ("area", self.areas),
                  "links": ("link", self.links)}
        per = {}
        for key, (idc, base) in tables.items():
            ser = self.series.get(key)
            per[key] = {}
            if ser is None or len(ser) == 0:
                continue
            pos = {v: k for k, v in enumerate(base[idc])}
            cols = [c for c in ser.columns if c not in ("period", idc)]
            for t, grp in ser.groupby("period", sort=False):
                per[key][t] = (grp[idc].map(pos).to_numpy(), grp[cols])
        out = []
        ev = self.events
        for t in self.periods:
            frames = {}
            for key, (idc, base) in tables.items():
                df = base
                if t in per[key]:
                    rows, vals = per[key][t]
                    df = base.copy()
                    for c in vals.columns:
                        col = vals[c].to_numpy()
                        keep = ~pd.isna(col)
                        if keep.any():
                            arr = df[c].to_numpy().copy()
                            arr[rows[keep]] = col[keep].astype(arr.dtype)
                            df[c] = arr
                frames[key] = df
            e = ev[(ev["period"].isna()) | (ev["period"] == t)].copy()
            if len(e) and e["size_from_output"].any():
                m = e["size_from_output"].to_numpy(bool)
                lost_out = trip_members(frames["units"], e) @ frames["units"][
                    "output_mw"].to_numpy(float)
                e.loc[m, "size_mw"] = lost_out[m]
            out.append(replace(self, units=frames["units"], areas=frames["areas"],
                               links=frames["links"], events=e.reset_index(drop=True),
                               periods=(), period_hours=(), series={}))
        return out

    # --- derived views used throughout (numpy inside, pandas at the edges) ---
    @property
    def area_ids(self) -> list[str]:
        return list(self.areas["area"])

    def unit_area_index(self) -> np.ndarray:
        pos = {a: k for k, a in enumerate(self.areas["area"])}
        return np.array([pos[a] for a in self.units["area"]], dtype=np.int64)

    def load_damping_mw_per_hz(self) -> np.ndarray:
        """Per area D_a = load * damping % per Hz / 100 [MW/Hz]."""
        a = self.areas
        return a["load_mw"].to_numpy(float) * a["load_damping_pct_per_hz"].to_numpy(float) / 100.0

    def gain_from_droop(self, droop_pct) -> np.ndarray:
        """K = P / (s/100 * f_n) on each unit's own capacity [MW/Hz]."""
        cap = self.units["capacity_mw"].to_numpy(float)
        return cap / (np.asarray(droop_pct, float) / 100.0 * self.nominal_frequency_hz)

    def droop_from_gain(self, gain) -> np.ndarray:
        cap = self.units["capacity_mw"].to_numpy(float)
        gain = np.asarray(gain, float)
        with np.errstate(divide="ignore", invalid="ignore"):
            s = np.where(gain > 0, cap / (gain * self.nominal_frequency_hz) * 100.0, np.nan)
        return s

    @property
    def has_under_frequency_events(self) -> bool:
        return bool((self.events["size_mw"] > 0).any())

    @property
    def has_over_frequency_events(self) -> bool:
        return bool((self.events["size_mw"] < 0).any())

    def replace(self, **changes) -> "Case":
        return replace(self, **changes)

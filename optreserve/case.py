"""The case: validated, typed settings and element tables (units carry their unit in the name)."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd


@dataclass(frozen=True)
class Limits:
    max_settled_deviation_hz: float
    full_activation_deviation_hz: float
    max_nadir_deviation_hz: float | None = None
    max_rocof_hz_per_s: float | None = None


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
      events: event, kind, unit ("" for load steps), area, size_mw (signed: > 0 deficit)
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
        from dataclasses import replace

        return replace(self, **changes)

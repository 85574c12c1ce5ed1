"""Speed of the governor models (optreserve.dynamics): nadir-row coefficients and ZOH stepping.

    python benchmarks/governors_speed.py [--units 3000] [--events 10] [--points 24]

Prints the time to build a GovernorSet from a units table, the (events, points, units)
coefficient array of nadir_energy_coef, and 60 s of exact ZOH steps at 10 ms for all units.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd

from optreserve.dynamics.governors import MODELS, GovernorSet
from optreserve.dynamics.response import nadir_energy_coef


def table(n: int, seed: int = 1) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    kind = rng.choice(MODELS, n)
    nan = np.full(n, np.nan)
    return pd.DataFrame({
        "governor": kind,
        "activation_time_s": np.where(kind == "lag", rng.uniform(5, 30, n), nan),
        "governor_lag_s": np.where(kind != "lag", rng.uniform(0.05, 0.5, n), nan),
        "reheat_time_s": np.where(kind == "reheat", rng.uniform(4, 10, n), nan),
        "hp_fraction": np.where(kind == "reheat", rng.uniform(0.2, 0.4, n), nan),
        "water_time_s": np.where(kind == "hydro", rng.uniform(0.5, 4, n), nan),
        "delay_s": np.where(kind == "inverter", rng.uniform(0, 0.5, n), nan)})


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--units", type=int, default=3000)
    ap.add_argument("--events", type=int, default=10)
    ap.add_argument("--points", type=int, default=24)
    a = ap.parse_args()
    units = table(a.units)
    t0 = time.perf_counter()
    gov = GovernorSet.from_table(units)
    t1 = time.perf_counter()
    times = np.geomspace(0.5, 60, a.points)[None, :] * np.ones((a.events, 1))
    rocof = np.linspace(0.1, 1.0, a.events)[:, None]
    coef = nadir_energy_coef(gov, times, 0.8, rocof)
    t2 = time.perf_counter()
    h = 0.01
    z, st = gov.zoh(h), gov.initial_state(h)
    u = np.ones(gov.n)
    for _ in range(6000):
        st = z.advance(st, u)
    t3 = time.perf_counter()
    print(f"units {gov.n}: from_table {t1 - t0:.3f} s; nadir_energy_coef {coef.shape} "
          f"{t2 - t1:.3f} s; 6000 ZOH steps {t3 - t2:.3f} s ({(t3 - t2) / 6000 * 1e6:.0f} us/step)")


if __name__ == "__main__":
    main()

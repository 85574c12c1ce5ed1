"""How conservative the nadir rows are, per governor model, against the simulator.

One area, one provider (plus a non-providing unit holding the stored energy), a load step
dP, nadir limit N. For each governor model: the least q (MW the provider must deliver, with
gain q / (N - d) and headroom q) that the nadir rows (model/nadir.py) accept, and the least q
whose simulated nadir (dynamics/) meets N (bisection). The ratio rows / simulation >= 1 is
how conservative the rows are (1 = exact). The rows cannot see that a hydro governor with
too much gain is unstable (ideal penstock, permanent droop only): the simulation can, which is
why it has the last word in a solve.

    python benchmarks/nadir_rows_vs_simulation.py     # Markdown table
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

MODELS = {
    "lag (activation 10 s)": dict(activation_time_s=10.0),
    "lag (activation 30 s)": dict(activation_time_s=30.0),
    "reheat (T_g 0.2, T_rh 7, F_hp 0.3)": dict(governor="reheat", governor_lag_s=0.2,
                                              reheat_time_s=7.0, hp_fraction=0.3),
    "hydro (T_g 0.5, T_w 1.5)": dict(governor="hydro", governor_lag_s=0.5, water_time_s=1.5),
    "inverter (T_g 0.05, delay 0.2)": dict(governor="inverter", governor_lag_s=0.05,
                                           delay_s=0.2),
}


def case_for(folder, gov, N=0.5, dP=100.0, H_s=5.0, d_mhz=0.0):
    from conftest import build_case, settings, unit
    return build_case(folder, settings(max_dev=0.5, limits={"max_nadir_deviation_hz": N}),
                      [unit("Prov", "A", 2000, 1000, 1.0, 100.0, inertia_s=0.0,
                            deadband_mhz=d_mhz, **gov),
                       unit("Mass", "A", 4000, 2000, inertia_s=H_s, provides=False)],
                      [{"area": "A", "load_mw": 4000.0, "load_damping_pct_per_hz": 0.0}],
                      [{"event": "step", "kind": "load_step", "area": "A", "size_mw": dP}])


def rows_q(case):
    from optreserve.model.horizon import prepare
    from optreserve.model.nadir import nadir_terms
    hz = prepare(case)
    coef, need = nadir_terms(case, hz)
    c = coef[0, :, 0]
    ok = need[0] > 1e-9
    return float(np.max(need[0][ok] / c[ok])) if ok.any() else 0.0


def sim_nadir(case, q, N):
    from optreserve.dynamics.events import simulate_events
    from optreserve.dynamics.system import build_system
    d = case.units["deadband_mhz"].to_numpy(float)[0] / 1000
    K = q / (N - d)
    sysm = build_system(case, np.array([K, 0.0]), np.array([q, 0.0]), np.array([q, 0.0]))
    tr = simulate_events(sysm, [float(case.events["size_mw"].iloc[0])], [0], [-1], 60.0,
                         record_units=False)[0]
    return abs(tr.nadir_hz - case.nominal_frequency_hz)


def sim_q(case, N, dP=100.0):
    """The least q meeting N: a scan (a hydro unit with too much gain is unstable, so the
    nadir is not monotone in q), then bisection below the first q that passes."""
    grid = np.linspace(0.5 * dP, 6 * dP, 221)
    ok = [sim_nadir(case, q, N) <= N for q in grid]
    if not any(ok):
        return float("nan")
    k = ok.index(True)
    lo, hi = (grid[k - 1] if k else 0.0), grid[k]
    for _ in range(30):
        mid = 0.5 * (lo + hi)
        if sim_nadir(case, mid, N) <= N:
            hi = mid
        else:
            lo = mid
    return hi


def main() -> int:
    N, dP = 0.5, 100.0
    print(f"one area, stored energy 20 000 MW s, load step {dP:g} MW, nadir limit {N} Hz, "
          "no load damping, no dead band\n")
    print("| governor model | rows: least q MW | simulation: least q MW | rows / simulation |")
    print("|---|---|---|---|")
    with tempfile.TemporaryDirectory() as tmp:
        for k, (name, gov) in enumerate(MODELS.items()):
            case = case_for(Path(tmp) / f"c{k}", gov, N, dP)
            qr, qs = rows_q(case), sim_q(case, N, dP)
            print(f"| {name} | {qr:.1f} | {qs:.1f} | {qr / qs:.2f} |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

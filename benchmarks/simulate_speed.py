"""Time-domain simulation benchmark: a 60 s run of one event on a 300-unit case.

The case is what `optreserve generate --units 300 --periods 1 --seed 1` writes (5 areas,
8 links, 10 events); it is solved (HiGHS, bulk load), then its largest event is simulated with
the allocation found. A second line gives every provider of the case a droop response, so
that the integrator carries ~300 governor states instead of the few the optimum uses. Each
timing is the best of --repeat runs of optreserve.simulate.simulate (integration, nadir
refinement, summary); writing the series and the plot is timed separately. --governors mixed
(default) gives the units the four governor models in turn (lag, reheat T_g 0.2 s T_rh 7 s
F_hp 0.3, hydro T_g 0.5 s T_w 1.5 s, inverter T_g 0.05 s delay 0.15 s); --governors lag keeps
the generated case's first-order lags.

    python benchmarks/simulate_speed.py                # Markdown table + machine
    python benchmarks/simulate_speed.py --repeat 5 --method Radau
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import tempfile
import time
from pathlib import Path

from machine import cpu_model

import numpy as np




def every_provider(case, allocation):
    """Every unit that may provide responds at the lowest gain of its band, with headroom for
    its full response at the full-activation deviation (the case's F_act rule)."""
    u = case.units
    f_n = case.nominal_frequency_hz
    K = u["capacity_mw"].to_numpy(float) / (u["droop_max_pct"].to_numpy(float) / 100 * f_n)
    K = np.where(u["provides"].to_numpy(bool), K, 0.0)
    r = K * np.maximum(case.limits.full_activation_deviation_hz
                       - u["deadband_mhz"].to_numpy(float) / 1000, 0.0)
    out = allocation.copy()
    per_unit = dict(zip(u["unit"], zip(K, r)))
    out["gain_mw_per_hz"] = [per_unit[x][0] for x in out["unit"]]
    out["headroom_up_mw"] = [per_unit[x][1] for x in out["unit"]]
    out["headroom_down_mw"] = out["headroom_up_mw"]
    out["provides"] = out["gain_mw_per_hz"] > 0
    out["droop_pct"] = np.where(out["provides"], case.droop_from_gain(
        np.where(out["provides"], out["gain_mw_per_hz"], 1.0)), np.nan)
    return out


def mixed_governors(case):
    """The four governor models in turn over the units, with typical parameters."""
    u = case.units.copy()
    k = np.arange(len(u)) % 4
    u["governor"] = np.array(["lag", "reheat", "hydro", "inverter"], dtype=object)[k]
    u["governor_lag_s"] = np.select([k == 1, k == 2, k == 3], [0.2, 0.5, 0.05], np.nan)
    u["reheat_time_s"] = np.where(k == 1, 7.0, np.nan)
    u["hp_fraction"] = np.where(k == 1, 0.3, np.nan)
    u["water_time_s"] = np.where(k == 2, 1.5, np.nan)
    u["delay_s"] = np.where(k == 3, 0.15, 0.0)
    return case.replace(units=u)


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawTextHelpFormatter)
    p.add_argument("--units", type=int, default=300)
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--duration", type=float, default=60.0)
    p.add_argument("--repeat", type=int, default=3)
    p.add_argument("--method", default="auto", choices=["auto", "exact"])
    p.add_argument("--governors", default="mixed", choices=["mixed", "lag"])
    args = p.parse_args()

    import optreserve
    from optreserve.studies.generate import Spec, generate
    from optreserve.dynamics.simulate import simulate

    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        case_dir = generate(Spec(units=args.units, periods=1, seed=args.seed),
                            Path(tmp) / "case")
        case = optreserve.load_case(case_dir)
        if args.governors == "mixed":
            case = mixed_governors(case)
        t0 = time.perf_counter()
        result = optreserve.solve(case, engine="highspy")
        t_solve = time.perf_counter() - t0
        ev = case.events.assign(a=case.instances()["size_mw"].abs().to_numpy())
        event = str(ev.sort_values("a", ascending=False)["event"].iloc[0])
        for label, alloc in (("optimum", result.allocation),
                             ("every provider", every_provider(case, result.allocation))):
            best, sim = np.inf, None
            for _ in range(args.repeat):
                t0 = time.perf_counter()
                sim = simulate(case, alloc, events=[event], duration_s=args.duration,
                               method=args.method)
                best = min(best, time.perf_counter() - t0)
            t0 = time.perf_counter()
            sim.write(Path(tmp) / f"out-{len(rows)}")
            t_write = time.perf_counter() - t0
            row = sim.summary.iloc[0]
            rows.append((label, int((alloc["gain_mw_per_hz"] > 0).sum()), best, t_write, row))
            print(f"done {label}: {best:.2f} s", file=sys.stderr)

    print(f"machine: {cpu_model()}, {os.cpu_count()} cores, {platform.system()} "
          f"{platform.release()}, Python {platform.python_version()}, numpy {np.__version__}, "
          f"scipy {__import__('scipy').__version__}")
    print(f"case: optreserve generate --units {args.units} --periods 1 --seed {args.seed} "
          f"(solved in {t_solve:.1f} s); event {event} ({rows[0][4]['size_mw']:+.0f} MW); "
          f"{args.duration:g} s simulated with {args.method}, {args.governors} governors, best of "
          f"{args.repeat}\n")
    print("| allocation | responding units | simulate s | write series + plot s | nadir Hz "
          "| settled Hz | flat at end |")
    print("|---|---|---|---|---|---|---|")
    for label, n, best, t_write, r in rows:
        print(f"| {label} | {n} | {best:.2f} | {t_write:.2f} | {r['nadir_hz']:.3f} | "
              f"{r['settled_frequency_hz']:.4f} | {'yes' if r['flat_at_end'] else 'no'} |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

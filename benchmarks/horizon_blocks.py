"""Long horizons with droop held per day, solved block by block (solver/blocks.py).

Generates `optreserve generate --units 300 --areas 5 --links 8 --events 10 --periods 96
--days D --hold-periods 96 --parquet` and solves it as one horizon (read included) on
--workers Dask processes; with --check-days also solves each day as a case of its own, one
after the other, and compares the total cost. Every size runs in a fresh process so that its
peak memory is its own (this process's peak plus the largest worker's).

    python benchmarks/horizon_blocks.py --days 14 --check-days     # the 14-day goal
    python benchmarks/horizon_blocks.py --days 7 28 91 365          # growth per day
    python benchmarks/horizon_blocks.py --one --days 14 --workers 2 # one run, JSON
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def _cpu() -> float:
    """CPU seconds of this process and its finished children (the Dask workers): on a shared
    machine wall time alone says more about the neighbours than about the program."""
    a = resource.getrusage(resource.RUSAGE_SELF)
    b = resource.getrusage(resource.RUSAGE_CHILDREN)
    return a.ru_utime + a.ru_stime + b.ru_utime + b.ru_stime


def one(days: int, workers: int, check_days: bool, units: int, seed: int) -> dict:
    import optreserve
    from optreserve.solver.blocks import block_cases
    from optreserve.studies.generate import Spec, generate

    with tempfile.TemporaryDirectory(prefix="optreserve-horizon-") as tmp:
        t0 = time.perf_counter()
        folder = generate(Spec(units=units, areas=5, links=8, periods=96, events=10, seed=seed,
                               days=days, hold_periods=96, parquet=True), Path(tmp) / "case")
        t_gen = time.perf_counter() - t0
        t0, c0 = time.perf_counter(), _cpu()
        case = optreserve.load_case(folder)
        res = optreserve.solve(case, workers=workers if workers > 1 else None)
        wall, cpu = time.perf_counter() - t0, _cpu() - c0
        out = {"days": days, "periods": case.n_periods, "units": units, "workers": workers,
               "generate_s": round(t_gen, 2), "read_s": round(case.read_time_s, 2),
               "wall_s": round(wall, 2), "per_day_s": round(wall / days, 3),
               "cpu_s": round(cpu, 2), "cpu_per_day_s": round(cpu / days, 3),
               "status": res.status, "mip_gap": res.mip_gap,
               "cost": res.objective_total,
               "units_providing": int(res.allocation.loc[res.allocation["provides"], "unit"]
                                      .nunique()),
               "dead_band_iterations": res.iterations}
        if check_days:
            t0 = time.perf_counter()
            costs = [optreserve.solve(c, blocks=False).objective_total
                     for c in block_cases(case)]
            out["days_one_at_a_time_s"] = round(time.perf_counter() - t0, 2)
            out["days_one_at_a_time_cost"] = float(sum(costs))
            out["cost_rel_diff"] = abs(out["cost"] - out["days_one_at_a_time_cost"]) / max(
                1.0, abs(out["days_one_at_a_time_cost"]))
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    kids = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    out["peak_mb_main"] = round(own, 0)
    out["peak_mb_largest_worker"] = round(kids, 0)
    return out


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__,
                                formatter_class=argparse.RawTextHelpFormatter)
    p.add_argument("--days", type=int, nargs="+", default=[14])
    p.add_argument("--workers", type=int, default=2)
    p.add_argument("--units", type=int, default=300)
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--check-days", action="store_true")
    p.add_argument("--one", action="store_true", help="one run in this process, JSON out")
    args = p.parse_args()
    if args.one:
        print(json.dumps(one(args.days[0], args.workers, args.check_days, args.units,
                             args.seed)))
        return 0
    from machine import cpu_model

    print(f"machine: {cpu_model()}, {os.cpu_count()} cores, Python "
          f"{platform.python_version()}, load average {os.getloadavg()[0]:.1f} at start")
    print("| days | periods | workers | read s | wall s | wall s per day | CPU s per day | cost "
          "| gap | providers | days one at a time: cost, s | peak MB main / worker |")
    print("|---|---|---|---|---|---|---|---|---|---|---|---|")
    for d in args.days:
        cmd = [sys.executable, __file__, "--one", "--days", str(d), "--workers",
               str(args.workers), "--units", str(args.units), "--seed", str(args.seed)]
        if args.check_days:
            cmd.append("--check-days")
        r = json.loads(subprocess.run(cmd, check=True, capture_output=True, text=True,
                                      cwd=ROOT).stdout.strip().splitlines()[-1])
        one_at = (f"{r['days_one_at_a_time_cost']:.2f}, {r['days_one_at_a_time_s']:.1f} s "
                  f"(rel. diff {r['cost_rel_diff']:.1e})" if "cost_rel_diff" in r else "")
        print(f"| {d} | {r['periods']} | {r['workers']} | {r['read_s']:.1f} | {r['wall_s']:.1f} "
              f"| {r['per_day_s']:.2f} | {r['cpu_per_day_s']:.2f} | {r['cost']:.2f} | {r['mip_gap']:.2e} "
              f"| {r['units_providing']} | {one_at} | {r['peak_mb_main']:.0f} / "
              f"{r['peak_mb_largest_worker']:.0f} |", flush=True)
    print(f"load average {os.getloadavg()[0]:.1f} at the end")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Sweep benchmark: a 200-point sweep of the demo case, serially and on a 2-process Dask
LocalCluster (threads_per_worker=1). Goal: speed-up >= 1.7 on 2 cores.

The grid: link ambrith-orlesmouth limit 680..870 MW step 10 (20 values) x price_scale
0.5..1.4 step 0.1 (10 values) = 200 points of instances/demo-tri-valley (a MILP with droop
steps; every point a full solve through the bulk highspy load). The distributed wall time
includes starting and stopping the cluster. The two tables must be equal.

    python benchmarks/sweep_speed.py            # 200 points, Markdown lines for performance.md
    python benchmarks/sweep_speed.py --quick    # 20 points (a smoke run)
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import time
from pathlib import Path

from machine import cpu_model

ROOT = Path(__file__).resolve().parents[1]




def _cpu() -> float:
    """CPU seconds of this process and its finished children (the Dask workers)."""
    import resource

    a = resource.getrusage(resource.RUSAGE_SELF)
    b = resource.getrusage(resource.RUSAGE_CHILDREN)
    return a.ru_utime + a.ru_stime + b.ru_utime + b.ru_stime


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawTextHelpFormatter)
    p.add_argument("--quick", action="store_true", help="20 points instead of 200")
    p.add_argument("--workers", type=int, default=2)
    p.add_argument("--json", metavar="FILE", help="also write the figures as JSON")
    p.add_argument("--save", metavar="DIR", help="also write both tables as CSV")
    p.add_argument("--distributed-only", action="store_true",
                   help="skip the serial run (no speed-up, no table comparison)")
    args = p.parse_args()

    import dask
    import highspy  # noqa: F401
    import pandas as pd

    import optreserve
    from optreserve.studies.sweep import parse_vary, run_sweep

    case = optreserve.load_case(ROOT / "instances" / "demo-tri-valley")
    link = "link:ambrith-orlesmouth.limit_mw=" + ("680:870:10" if not args.quick else "680:860:20")
    scale = "price_scale=0.5:1.4:0.1" if not args.quick else "price_scale=1,1.2"
    varies = [parse_vary(link, case), parse_vary(scale, case)]
    n = len(varies[0].values) * len(varies[1].values)

    load0 = os.getloadavg()
    t0 = time.perf_counter()
    serial = run_sweep(case, varies) if not args.distributed_only else None
    t_serial = time.perf_counter() - t0 if serial is not None else float("nan")
    load1 = os.getloadavg()
    t0, c0 = time.perf_counter(), _cpu()
    dist = run_sweep(case, varies, workers=args.workers)
    t_dist, cpu_dist = time.perf_counter() - t0, _cpu() - c0
    load2 = os.getloadavg()

    if serial is None:
        print(f"| points | {args.workers} workers s | per point s | CPU s per point | statuses |")
        print("|---|---|---|---|---|")
        print(f"| {n} | {t_dist:.1f} | {t_dist / n:.2f} | {cpu_dist / n:.2f} | "
              f"{dict(dist['status'].value_counts())} |")
        print(json.dumps({"points": n, "workers": args.workers, "distributed_s": round(t_dist, 2),
                          "sum_of_point_solve_s_distributed": round(float(dist["solve_s"].sum()),
                                                                     2),
                          "load_average_before": [round(x, 2) for x in load0],
                          "load_average_after": [round(x, 2) for x in load2],
                          "optreserve_path": str(Path(optreserve.__file__).parent)}, indent=2))
        return 0
    cols = [c for c in serial.columns if c != "solve_s"]
    equal = bool(serial[cols].equals(dist[cols]))
    if args.save:
        Path(args.save).mkdir(parents=True, exist_ok=True)
        serial.to_csv(Path(args.save) / "serial.csv", index=False)
        dist.to_csv(Path(args.save) / "distributed.csv", index=False)
    if not equal:
        diff = (serial[cols] != dist[cols]) & ~(serial[cols].isna() & dist[cols].isna())
        print("rows that differ:", list(diff.any(axis=1).to_numpy().nonzero()[0][:20]),
              file=sys.stderr)
    fig = {
        "points": n, "workers": args.workers, "serial_s": round(t_serial, 2),
        "distributed_s": round(t_dist, 2), "speed_up": round(t_serial / t_dist, 3),
        "serial_per_point_s": round(t_serial / n, 3),
        "sum_of_point_solve_s_serial": round(float(serial["solve_s"].sum()), 2),
        "sum_of_point_solve_s_distributed": round(float(dist["solve_s"].sum()), 2),
        "status_counts": {k: int(v) for k, v in serial["status"].value_counts().items()},
        "tables_equal": equal,
        "load_average_before_serial": [round(x, 2) for x in load0],
        "load_average_after_serial": [round(x, 2) for x in load1],
        "load_average_after_distributed": [round(x, 2) for x in load2],
        "machine": f"{cpu_model()}, {os.cpu_count()} logical CPUs, {platform.system()} "
                   f"{platform.release()}",
        "python": platform.python_version(), "optreserve": optreserve.__version__,
        "optreserve_path": str(Path(optreserve.__file__).parent),
        "highspy": getattr(sys.modules["highspy"], "__version__", "?"),
        "dask": dask.__version__, "pandas": pd.__version__,
    }
    print(f"| points | serial s | {args.workers} workers s | speed-up | tables equal |")
    print("|---|---|---|---|---|")
    print(f"| {n} | {t_serial:.1f} | {t_dist:.1f} | {t_serial / t_dist:.2f} | {equal} |")
    print(json.dumps(fig, indent=2))
    if args.json:
        Path(args.json).write_text(json.dumps(fig, indent=2) + "\n")
    return 0 if equal else 1


if __name__ == "__main__":
    sys.exit(main())

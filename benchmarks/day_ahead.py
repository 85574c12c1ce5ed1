"""Day-ahead benchmark: read, build, solve (HiGHS's own time), write, total and peak memory.

Reference day: 300 units, 5 areas, 8 links, 96 periods, 10 events per period, LP (--relax)
and MILP; plus T = 24, 48, 96 to show how time grows with the horizon. Every configuration
runs in a fresh Python process so that its peak memory is its own.

    python benchmarks/day_ahead.py                 # all configurations, a Markdown table
    python benchmarks/day_ahead.py --quick         # T = 24 only (a smoke run)
    python benchmarks/day_ahead.py --one --periods 96 --mode lp   # one configuration, JSON
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

from machine import cpu_model


def run_one(units, areas, links, periods, events, seed, mode, mip_gap, time_limit) -> dict:
    import optreserve
    from optreserve.studies.generate import Spec, generate

    with tempfile.TemporaryDirectory() as tmp:
        case_dir = generate(Spec(units, areas, links, periods, events, seed), Path(tmp) / "case")
        t0 = time.perf_counter()
        case = optreserve.load_case(case_dir)
        result = optreserve.solve(case, engine="highspy", relax=(mode == "lp"),
                                  mip_gap=mip_gap, time_limit=time_limit)
        result.write(Path(tmp) / "out")
        total = time.perf_counter() - t0
    t = result.timings_s
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: kB
    other = total - t["solve"]
    return {
        "mode": mode, "units": units, "periods": periods, "events": events,
        "status": result.status, "mip_gap": result.mip_gap,
        "objective_total": result.objective_total,
        "read_s": t["read"], "build_s": t["build"], "solve_s": t["solve"], "write_s": t["write"],
        "total_s": total, "other_s": other, "other_over_solve": other / t["solve"],
        "dead_band_iterations": result.iterations, "peak_mb": peak_mb,
    }


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawTextHelpFormatter)
    p.add_argument("--one", action="store_true", help="run one configuration, print JSON")
    p.add_argument("--units", type=int, default=300)
    p.add_argument("--areas", type=int, default=5)
    p.add_argument("--links", type=int, default=8)
    p.add_argument("--periods", type=int, default=96)
    p.add_argument("--events", type=int, default=10)
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--mode", choices=["lp", "milp"], default="lp")
    p.add_argument("--mip-gap", type=float, default=1e-3)
    p.add_argument("--time-limit", type=float, default=300.0)
    p.add_argument("--quick", action="store_true", help="only T = 24")
    args = p.parse_args()
    if args.one:
        print(json.dumps(run_one(args.units, args.areas, args.links, args.periods, args.events,
                                 args.seed, args.mode, args.mip_gap, args.time_limit)))
        return 0

    configs = [(T, mode) for T in ((24,) if args.quick else (24, 48, 96))
               for mode in ("lp", "milp")]
    rows = []
    for T, mode in configs:
        cmd = [sys.executable, __file__, "--one", "--periods", str(T), "--mode", mode,
               "--units", str(args.units), "--areas", str(args.areas), "--links",
               str(args.links), "--events", str(args.events), "--seed", str(args.seed),
               "--mip-gap", str(args.mip_gap), "--time-limit", str(args.time_limit)]
        out = subprocess.run(cmd, capture_output=True, text=True, check=True)
        r = json.loads(out.stdout.strip().splitlines()[-1])
        rows.append(r)
        print(f"done T={T} {mode}: total {r['total_s']:.2f} s", file=sys.stderr)
    print(f"machine: {cpu_model()}, {os.cpu_count()} cores, {platform.system()} "
          f"{platform.release()}, Python {platform.python_version()}")
    print(f"case: {args.units} units, {args.areas} areas, {args.links} links, {args.events} "
          f"events per period, seed {args.seed}; MILP gap target {args.mip_gap}\n")
    print("| mode | T | status | gap | read s | build s | solve s (HiGHS) | write s | total s "
          "| non-solve / solve | dead-band iterations | peak MB |")
    print("|---|---|---|---|---|---|---|---|---|---|---|---|")
    for r in rows:
        gap = "" if r["mip_gap"] is None else f"{r['mip_gap'] * 100:.3f} %"
        print(f"| {r['mode']} | {r['periods']} | {r['status']} | {gap} | {r['read_s']:.2f} | "
              f"{r['build_s']:.2f} | {r['solve_s']:.2f} | {r['write_s']:.2f} | "
              f"{r['total_s']:.2f} | {r['other_over_solve'] * 100:.0f} % | "
              f"{r['dead_band_iterations']} | {r['peak_mb']:.0f} |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

"""Snapshot latency: the demo solve as a user runs it (process start to files written) against
the bare-import floor (a fresh Python importing numpy, pandas, scipy.sparse and highspy),
measured side by side, alternating, median of --repeat runs each.

    python benchmarks/snapshot.py              # 7 runs each, Markdown lines for performance.md
    python benchmarks/snapshot.py --repeat 3 --case instances/demo-tri-valley
"""

from __future__ import annotations

import argparse
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from machine import cpu_model

ROOT = Path(__file__).resolve().parents[1]
FLOOR = "import numpy, pandas, scipy.sparse, highspy"


def timed(cmd: list[str]) -> float:
    t0 = time.perf_counter()
    subprocess.run(cmd, check=True, cwd=ROOT, stdout=subprocess.DEVNULL)
    return time.perf_counter() - t0


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawTextHelpFormatter)
    p.add_argument("--repeat", type=int, default=7)
    p.add_argument("--case", default=str(ROOT / "instances" / "demo-tri-valley"))
    args = p.parse_args()
    py = sys.executable
    out = Path(tempfile.mkdtemp(prefix="optreserve-snapshot-"))
    floor, solve = [], []
    try:
        for k in range(args.repeat):
            floor.append(timed([py, "-c", FLOOR]))
            target = out / f"run{k}"
            solve.append(timed([py, "-m", "optreserve", "solve", args.case, "--out",
                                str(target), "--quiet"]))
    finally:
        shutil.rmtree(out, ignore_errors=True)
    f, s = statistics.median(floor), statistics.median(solve)
    print(f"machine: {cpu_model()}, {os.cpu_count()} cores, Python {platform.python_version()}")
    print(f"| bare-import floor | {f:.2f} s |")
    print(f"| demo solve, process start to files written | {s:.2f} s |")
    print(f"| ratio (goal <= 2, bar 3) | {s / f:.2f} |")
    print(f"runs: floor {[round(x, 2) for x in floor]}, solve {[round(x, 2) for x in solve]}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

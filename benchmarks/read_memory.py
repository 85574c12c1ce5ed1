"""Reading a long horizon: wall time and peak memory of load_case (and model.horizon.prepare).

Each case folder is read in a fresh process, so ru_maxrss is the peak of that read alone (plus
the interpreter and the imported libraries, reported separately as `base_mb`). With --trace the
traced peak and the largest allocations still alive after the read are listed (tracemalloc
slows the read down a lot, so its times say nothing).

    python -m optreserve generate --units 300 --areas 5 --links 8 --events 10 \\
        --periods 96 --days 28 --hold-periods 96 --parquet --out /tmp/d28
    python benchmarks/read_memory.py /tmp/d28 /tmp/d91            # read only
    python benchmarks/read_memory.py /tmp/d28 --prepare           # read, then prepare
    python benchmarks/read_memory.py /tmp/d28 --trace             # where the peak is
    python benchmarks/read_memory.py /tmp/d365 --solve 2          # read, then the whole run

The generation is left out on purpose: `optreserve generate` of a year peaks at gigabytes
itself, which horizon_blocks.py counts in its main process's peak.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))  # machine.py


def _rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: KiB


def one(folder: str, prepare: bool, trace: bool, solve: int, write: str | None = None) -> dict:
    import optreserve  # imports counted in base_mb, not in the read
    from optreserve.case.reader import load_case
    from optreserve.model import horizon

    base = _rss_mb()
    if trace:
        import tracemalloc
        tracemalloc.start(12)
    t0 = time.perf_counter()
    case = load_case(folder)
    t_read = time.perf_counter() - t0
    peak_read = _rss_mb()
    out = {"folder": folder, "periods": case.n_periods,
           "rows_units_by_period": len(case.series.get("units", ())),
           "read_s": round(t_read, 2), "base_mb": round(base), "peak_read_mb": round(peak_read)}
    if prepare:
        t0 = time.perf_counter()
        horizon.prepare(case)
        out["prepare_s"] = round(time.perf_counter() - t0, 2)
        out["peak_prepare_mb"] = round(_rss_mb())
    if solve:  # the whole run after the read (block by block on `solve` Dask workers)
        t0 = time.perf_counter()
        res = optreserve.solve(case, workers=solve if solve > 1 else None)
        out.update(solve_s=round(time.perf_counter() - t0, 2), status=res.status,
                   cost=res.objective_total, peak_solve_mb=round(_rss_mb()),
                   peak_worker_mb=round(resource.getrusage(resource.RUSAGE_CHILDREN)
                                        .ru_maxrss / 1024.0))
        if write:  # the result files as `optreserve solve --out` writes them
            t0 = time.perf_counter()
            res.write(write)
            out.update(write_s=round(time.perf_counter() - t0, 2), peak_write_mb=round(_rss_mb()))
    if trace:
        import tracemalloc
        _, peak = tracemalloc.get_traced_memory()
        out["traced_peak_mb"] = round(peak / 2**20)
        snap = tracemalloc.take_snapshot()
        stats = snap.statistics("traceback")[:8]
        out["largest_live"] = [
            {"mb": round(s.size / 2**20, 1),
             "at": [f"{f.filename.split('/')[-1]}:{f.lineno}" for f in s.traceback[-4:]]}
            for s in stats]
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("folders", nargs="+")
    ap.add_argument("--prepare", action="store_true", help="also run model.horizon.prepare")
    ap.add_argument("--trace", action="store_true", help="tracemalloc: largest live blocks")
    ap.add_argument("--solve", type=int, default=0, metavar="WORKERS",
                    help="then solve the case (as horizon_blocks.py, without the generation "
                    "in the same process) on WORKERS Dask workers (1: in this process)")
    ap.add_argument("--write", metavar="DIR", help="after --solve, write the result files to "
                    "DIR (a new folder per case: DIR/<case name>)")
    ap.add_argument("--one", action="store_true", help=argparse.SUPPRESS)  # the child process
    a = ap.parse_args()
    if a.one:
        print(json.dumps(one(a.folders[0], a.prepare, a.trace, a.solve, a.write)))
        return
    from machine import cpu_model

    print(f"machine: {cpu_model()}, {os.cpu_count()} cores, Python "
          f"{platform.python_version()}, load average {os.getloadavg()[0]:.1f} at start")
    for f in a.folders:  # a fresh process per case: its peak is its own
        cmd = [sys.executable, __file__, f, "--one"] + (["--prepare"] if a.prepare else []) + (
            ["--trace"] if a.trace else []) + ["--solve", str(a.solve)] + (
            ["--write", str(Path(a.write) / Path(f).name)] if a.write else [])
        r = subprocess.run(cmd, capture_output=True, text=True, check=False)
        if r.returncode:
            print(r.stderr, file=sys.stderr)
            sys.exit(r.returncode)
        print(r.stdout.strip(), flush=True)
    print(f"load average {os.getloadavg()[0]:.1f} at the end")


if __name__ == "__main__":
    main()

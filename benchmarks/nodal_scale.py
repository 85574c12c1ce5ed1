"""Nodal cases at scale: end-to-end solve (read, row generation, write) against a lean
independent constraint-generation script (benchmarks/nodal_reference.py), side by side.

For each network of pandapower.networks (case118, case1354pegase, case2869pegase,
case9241pegase) a case folder is imported once (optreserve.network.grid.importers, base-case
overloads left unmonitored) with 20 events: the 10 units of largest output trip, and 10 load
steps of 300 MW at the 10 buses of largest load; branches loaded above 60 % of their rating
before the events get a limit of 1/0.6 of their flow (else some events overload them with
any allocation: an infeasible case). Then, each in a fresh process of its own
(peak memory = that run's), best of --repeat:
- optreserve: load_case + solve (highspy) + Result.write;  the modules both sides need are
  imported before the clock starts (the reference imports scipy and highspy at its top);
- reference: benchmarks/nodal_reference.py on the same folder, writing the same tables.
Both objectives are printed; they must agree (relative 1e-5).

    python benchmarks/nodal_scale.py                       # all four, Markdown table
    python benchmarks/nodal_scale.py --cases case118 --repeat 1
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
import warnings
from pathlib import Path

from machine import cpu_model

ROOT = Path(__file__).resolve().parent.parent
HERE = Path(__file__).resolve().parent
CASES = ["case118", "case1354pegase", "case2869pegase", "case9241pegase"]
N_TRIPS, N_STEPS, STEP_MW = 10, 10, 300.0


def make_case(name: str, folder: Path) -> Path:
    """Import the network and set the benchmark's 20 events."""
    import numpy as np
    import pandapower.networks as pn
    import pandas as pd

    from optreserve.network.grid.importers import from_pandapower, write_case_folder

    warnings.simplefilter("ignore")
    net = getattr(pn, name)()
    tables = from_pandapower(net, name=name, drop_overloaded_limits=True)
    u = tables.units[~tables.units.unit.astype(str).str.startswith("netinfeed_")]
    big = u.sort_values("output_mw", ascending=False).head(N_TRIPS)
    loads = tables.buses.sort_values("load_mw", ascending=False).head(N_STEPS)
    ev = [{"event": f"trip_{r.unit}", "kind": "unit_trip", "unit": r.unit, "bus": "",
           "area": "", "size_mw": r.output_mw} for r in big.itertuples()]
    ev += [{"event": f"step_{r.bus}", "kind": "load_step", "unit": "", "bus": r.bus,
            "area": "", "size_mw": STEP_MW} for r in loads.itertuples()]
    tables.events = pd.DataFrame(ev)
    # the networks' ratings leave some branches nearly full before any event, and a load
    # step at a bus or a large trip then overloads them whatever the allocation: a branch
    # loaded above 60 % of its rating before the events gets a limit 1/0.6 of its flow
    lk = tables.links
    lim = lk["limit_mw"].to_numpy(float)
    full = np.isfinite(lim) & (lk["flow_mw"].abs().to_numpy() > 0.6 * lim)
    lk.loc[full, "limit_mw"] = (lk.loc[full, "flow_mw"].abs() / 0.6).round(3)
    # a 1 %/Hz self-regulation and a 200 mHz limit (ImportDefaults); the largest trips of
    # the big grids need a wider band to be covered at all: 2-6 %
    tables.units["droop_min_pct"] = np.where(tables.units.provides, 2.0, 3.0)
    # both sides stop at the same MIP gap, so that their optima agree closely
    tables.case_toml += "\n[solver]\nmip_gap = 1e-7\n"
    return write_case_folder(tables, folder)


def run_ours(folder: str, out: str) -> dict:
    import highspy  # noqa: F401  (imported before the clock starts, as in the reference)

    import optreserve.network.grid
    import optreserve.solver.rowgen  # noqa: F401  (solve() imports it on first use)
    from optreserve.case.reader import load_case
    from optreserve.solver.run import solve

    t = time.perf_counter()
    case = load_case(folder)
    res = solve(case, engine="highspy")
    res.write(out, force=True)
    return {"wall_s": time.perf_counter() - t, "objective": res.objective_per_h,
            "passes": res.iterations, "rows": res.verification.get("flow_rows"),
            "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}


def _sub(args: list[str]) -> dict:
    out = subprocess.run([sys.executable, *args], capture_output=True, text=True,
                         env={**os.environ, "PYTHONPATH": str(ROOT)}, check=False)
    if out.returncode:
        raise SystemExit(out.stderr[-3000:])
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cases", nargs="+", default=CASES)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--ours", nargs=2, help=argparse.SUPPRESS)
    ap.add_argument("--keep", help="folder for the case folders (default: a temporary one)")
    args = ap.parse_args()
    if args.ours:
        print(json.dumps(run_ours(*args.ours)))
        return
    work = Path(args.keep or tempfile.mkdtemp(prefix="nodal_scale_"))
    rows = []
    for name in args.cases:
        folder = work / name
        if not folder.exists():
            make_case(name, folder)
        best = {}
        for who, cmd in (("ours", [__file__, "--ours", str(folder), str(work / f"{name}_o")]),
                         ("ref", [str(HERE / "nodal_reference.py"), str(folder),
                                  str(work / f"{name}_r")])):
            runs = [_sub(cmd) for _ in range(args.repeat)]
            best[who] = min(runs, key=lambda r: r["wall_s"])
            best[who]["peak_rss_mib"] = max(r["peak_rss_mib"] for r in runs)
        o, r = best["ours"], best["ref"]
        agree = abs(o["objective"] - r["objective"]) <= 1e-5 * max(1.0, abs(r["objective"]))
        buses = len((folder / "buses.csv").read_text().splitlines()) - 1
        links = len((folder / "links.csv").read_text().splitlines()) - 1
        rows.append((name, buses, links, o, r, agree))
    print("| case | buses | branches | optreserve s | reference s | ratio | optreserve peak MiB "
          "| reference peak MiB | passes (ours/ref) | flow rows (ours/ref) | objective agrees |")
    print("|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---|")
    for name, nb, nl, o, r, agree in rows:
        print(f"| {name} | {nb} | {nl} | {o['wall_s']:.2f} | {r['wall_s']:.2f} | "
              f"{o['wall_s'] / r['wall_s']:.2f} | {o['peak_rss_mib']:.0f} | "
              f"{r['peak_rss_mib']:.0f} | {o['passes']}/{r['passes']} | {o['rows']}/{r['rows']} "
              f"| {'yes' if agree else 'NO'} ({o['objective']:.3f}) |")
    print(f"\nmachine: {cpu_model()}, Python {platform.python_version()}; best of "
          f"{args.repeat} (peak memory: largest of the runs); {N_TRIPS} trips + {N_STEPS} load "
          f"steps of {STEP_MW:g} MW per case")


if __name__ == "__main__":
    main()

"""Nodal DC grid benchmark: factorisation, flows and PTDF rows on large open test grids.

For each grid of pandapower.networks (case1354pegase, case2869pegase, case9241pegase), in a
fresh process of its own so that the peak memory is that grid's:
- import: optreserve.network.grid.importers.from_pandapower (pandapower's rundcpp included);
- factorise: optreserve.network.grid.Grid from the links (incidence, island check, SuperLU of B_r);
- flows x20: one batched solve of 20 balanced injection patterns (the pre-event injections
  plus 19 seeded random zero-sum patterns), checked against pandapower's DC flows;
- PTDF x50: ptdf_rows of 50 seeded random branches, all bus columns, checked against the
  flows they predict for the pre-event injections;
- peak RSS: resource.getrusage(RUSAGE_SELF).ru_maxrss of that process, and before the grid.
Each timing is the best of --repeat runs.

    python benchmarks/nodal_flows.py                 # Markdown table + machine
    python benchmarks/nodal_flows.py --cases case1354pegase --repeat 5
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
import warnings
from pathlib import Path

from machine import cpu_model

ROOT = Path(__file__).resolve().parent.parent
CASES = ["case1354pegase", "case2869pegase", "case9241pegase"]


def _best(fn, repeat: int):
    best, out = float("inf"), None
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t)
    return best, out


def one(name: str, repeat: int) -> dict:
    import numpy as np
    import pandapower.networks as pn

    from optreserve.network.grid import Grid
    from optreserve.network.grid.importers import from_pandapower

    warnings.simplefilter("ignore")
    net = getattr(pn, name)()
    t_imp, tables = _best(lambda: from_pandapower(net, name=name), 1)
    links, buses = tables.links, tables.buses
    rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024

    def build():
        return Grid.from_ids(buses.bus, links.from_bus, links.to_bus,
                             links.reactance_pu.to_numpy(), links.limit_mw.to_numpy())

    t_fac, grid = _best(build, repeat)
    rng = np.random.default_rng(1)
    inj = grid.balanced_injections(grid.bus_index(tables.units.bus), tables.units.output_mw,
                                   buses.load_mw)
    P = rng.normal(size=(grid.n_buses, 20)) * 10.0
    P -= P.mean(axis=0)
    P[:, 0] = inj
    t_flow, F = _best(lambda: grid.flows(P), repeat)
    shift = tables.shift_rad
    base = grid.flows(inj, shift_rad=shift, base_mva=float(net.sn_mva))
    err_flow = float(np.abs(base - links.flow_mw.to_numpy()).max())
    pp_flow = np.r_[net.res_line.p_from_mw.to_numpy(), net.res_trafo.p_hv_mw.to_numpy()]
    err_pp = float(np.abs(base - pp_flow).max()) if len(pp_flow) == len(base) else float("nan")
    rows = rng.choice(grid.n_branches, size=50, replace=False)
    t_ptdf, phi = _best(lambda: grid.ptdf_rows(rows), repeat)
    err_ptdf = float(np.abs(phi @ inj - F[rows, 0]).max())
    lu = grid._lu
    return {"case": name, "buses": grid.n_buses, "branches": grid.n_branches,
            "negative_x": int((grid.reactance_pu < 0).sum()),
            "lu_nnz": int(lu.L.nnz + lu.U.nnz), "import_s": t_imp, "factorise_s": t_fac,
            "flows20_s": t_flow, "ptdf50_s": t_ptdf, "rss_before_mib": rss_before,
            "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
            "max_err_vs_pandapower_mw": err_pp, "max_err_vs_flow_mw": err_flow,
            "max_err_ptdf_mw": err_ptdf}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cases", nargs="+", default=CASES)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--one", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.one:
        print(json.dumps(one(args.one, args.repeat)))
        return
    results = []
    for name in args.cases:
        out = subprocess.run([sys.executable, __file__, "--one", name, "--repeat",
                              str(args.repeat)], capture_output=True, text=True, check=True,
                             env={**os.environ, "PYTHONPATH": str(ROOT)})
        results.append(json.loads(out.stdout.strip().splitlines()[-1]))
    print("| case | buses | branches | x<0 | LU nnz | import s | factorise ms | 20 flows ms "
          "| 50 PTDF rows ms | RSS before grid MiB | peak RSS MiB | max err vs pandapower MW |")
    print("|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|")
    for r in results:
        print(f"| {r['case']} | {r['buses']} | {r['branches']} | {r['negative_x']} | "
              f"{r['lu_nnz']} | {r['import_s']:.2f} | {1e3 * r['factorise_s']:.1f} | "
              f"{1e3 * r['flows20_s']:.1f} | {1e3 * r['ptdf50_s']:.1f} | "
              f"{r['rss_before_mib']:.0f} | {r['peak_rss_mib']:.0f} | "
              f"{r['max_err_vs_pandapower_mw']:.1e} |")
    print(f"\nmachine: {cpu_model()}, Python {platform.python_version()}; best of "
          f"{args.repeat}; PTDF rows checked against flows to "
          f"{max(r['max_err_ptdf_mw'] for r in results):.1e} MW")


if __name__ == "__main__":
    main()

"""Nadir-check benchmark and old/new comparison: the calls of dynamics.check.check_instances
that a solve makes, recorded once and replayed against the code on the path.

Cases: the demonstration case (`instances/demo-tri-valley`, its solve's candidates) and the
300-unit case of benchmarks/simulate_speed.py (`optreserve generate --units 300 --periods 1
--seed 1`, mixed governor models, given the demo's nadir limit of 0.8 Hz: its solve's candidates, and the same instances with every
provider responding, which puts the delayed inverter governors in the loop).

    python benchmarks/nadir_check_speed.py --record /tmp/calls.pkl   # inputs + outputs now
    python benchmarks/nadir_check_speed.py --replay /tmp/calls.pkl   # timings + max rel diff

--record stores each call's inputs and outputs (pickle, a scratch file of your own); --replay
runs the same calls on the current code, prints per call the best of --repeat timings and
the largest relative difference of dip, time and area against the recorded outputs.
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import pickle
import platform
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
from machine import cpu_model
from simulate_speed import every_provider, mixed_governors

ROOT = Path(__file__).resolve().parent.parent


def _recording(calls: list, label: str):
    """Wrap check_instances so that every call of a solve is kept (inputs and outputs)."""
    from optreserve.dynamics import check

    orig = check.__dict__.get("_unwrapped", check.check_instances)
    check._unwrapped = orig

    def wrapped(case, *args, **kw):
        out = orig(case, *args, **kw)
        calls.append({"label": f"{label} #{len(calls) + 1}", "case": case, "args": args,
                      "kw": kw, "out": out})
        return out

    return check, orig, wrapped


def record(path: Path) -> None:
    import optreserve
    from optreserve.studies.generate import Spec, generate

    calls: list = []
    check, orig, wrapped = _recording(calls, "demo")
    check.check_instances = wrapped
    try:
        demo = optreserve.load_case(ROOT / "instances" / "demo-tri-valley")
        optreserve.solve(demo)
        n_demo = len(calls)
        with tempfile.TemporaryDirectory() as tmp:
            case = mixed_governors(optreserve.load_case(
                generate(Spec(units=300, periods=1, seed=1), Path(tmp) / "case")))
            # the generated case has no nadir limit: the demo's, so that the solve checks
            case = case.replace(limits=dataclasses.replace(case.limits,
                                                           max_nadir_deviation_hz=0.8))
            sub: list = []
            check.check_instances = _recording(sub, "gen300")[2]
            result = optreserve.solve(case, engine="highspy")
    finally:
        check.check_instances = orig
    calls += sub
    # the last candidate's instances with every provider responding (~260 governors)
    last = sub[-1]
    alloc = every_provider(case, result.allocation).set_index("unit").reindex(case.units["unit"])
    g = alloc["gain_mw_per_hz"].to_numpy(float)[None, :]
    ru = alloc["headroom_up_mw"].to_numpy(float)[None, :]
    rd = alloc["headroom_down_mw"].to_numpy(float)[None, :]
    args = last["args"][:5] + (g, ru, rd) + last["args"][8:]
    out = orig(case, *args, **last["kw"])
    calls.append({"label": "gen300 every provider", "case": case, "args": args,
                  "kw": last["kw"], "out": out})
    # the same instances with the per-unit energy asked (the recorded-units path), and whole
    # trajectories (auto duration: runs not flat at 60 s go on) for the field-by-field check
    for c in (calls[n_demo - 1], calls[-1]):
        args = c["args"][:8] + (np.ones(len(c["args"][0]), bool),) + c["args"][9:]
        calls.append({"label": c["label"] + ", energy", "case": c["case"], "args": args,
                      "kw": c["kw"], "out": orig(c["case"], *args, **c["kw"])})
    with open(path, "wb") as f:
        pickle.dump({"calls": calls, "trajectories": [trajectories(c) for c in calls[-2:]]}, f)
    print(f"recorded {len(calls)} calls ({n_demo} demo) in {path}")


def trajectories(c: dict):
    """simulate_events of a call's period-0 instances, duration chosen by flatness."""
    from optreserve.dynamics.events import simulate_events
    from optreserve.dynamics.system import build_system

    inst_t, size, area, trip, absent, gain, r_up, r_dn = c["args"][:8]
    m = np.nonzero(np.asarray(inst_t) == 0)[0]
    sysm = build_system(c["case"], gain[0], r_up[0], r_dn[0], t=0)
    return c["label"], simulate_events(sysm, size[m], area[m], trip[m], None,
                                       blocked=absent[m], record_units=True)


def norm_diff(a, b) -> float:
    """max |a − b| / max |a|: series pass through zero, where elementwise ratios mean little."""
    a, b = np.asarray(a, float), np.asarray(b, float)
    scale = np.abs(a).max(initial=0.0)
    return float(np.abs(a - b).max(initial=0.0) / scale) if scale > 0 else 0.0


def rel_diff(a, b) -> float:
    a, b = np.asarray(a, float), np.asarray(b, float)
    scale = np.maximum(np.abs(a), np.abs(b))
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.where(scale > 0, np.abs(a - b) / scale, 0.0)
    return float(r.max(initial=0.0))


def replay(path: Path, repeat: int) -> None:
    import optreserve
    from optreserve.dynamics.check import check_instances

    with open(path, "rb") as f:
        saved = pickle.load(f)
    calls = saved["calls"]
    print(f"machine: {cpu_model()}, {os.cpu_count()} cores, {platform.system()} "
          f"{platform.release()}, Python {platform.python_version()}, numpy {np.__version__}; "
          f"optreserve from {Path(optreserve.__file__).parent}; load average "
          f"{os.getloadavg()[0]:.2f}\n")
    print(f"| call | instances | check s (best of {repeat}) | max rel diff dip | time | energy | "
          "areas equal |")
    print("|---|---|---|---|---|---|---|")
    for c in calls:
        best, out = np.inf, None
        for _ in range(repeat):
            t0 = time.perf_counter()
            out = check_instances(c["case"], *c["args"], **c["kw"])
            best = min(best, time.perf_counter() - t0)
        ref = c["out"]
        print(f"| {c['label']} | {len(ref.dip_hz)} | {best:.3f} | "
              f"{rel_diff(ref.dip_hz, out.dip_hz):.1e} | {rel_diff(ref.time_s, out.time_s):.1e} | "
              f"{rel_diff(ref.energy_mw_s, out.energy_mw_s):.1e} | "
              f"{'yes' if np.array_equal(ref.area, out.area) else 'NO'} |")
    print("\n| trajectories of | events | field: max |new − old| / max |old| (every field of "
          "Trajectory) |")
    print("|---|---|---|")
    for (label, ref), c in zip(saved["trajectories"], calls[-2:]):
        _, new = trajectories(c)
        worst = {}
        for a, b in zip(ref, new):
            for fld in dataclasses.fields(a):
                worst[fld.name] = max(worst.get(fld.name, 0.0),
                                      norm_diff(getattr(a, fld.name), getattr(b, fld.name)))
        print(f"| {label} | {len(ref)} | "
              + ", ".join(f"{k} {v:.0e}" for k, v in worst.items()) + " |")


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawTextHelpFormatter)
    g = p.add_mutually_exclusive_group(required=True)
    g.add_argument("--record", type=Path)
    g.add_argument("--replay", type=Path)
    p.add_argument("--repeat", type=int, default=5)
    args = p.parse_args()
    if args.record:
        record(args.record)
    else:
        replay(args.replay, args.repeat)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

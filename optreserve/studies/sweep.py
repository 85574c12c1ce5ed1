"""Sweeps and batches: many solves of one case (or of a folder of cases), one table out.

    varies = [parse_vary("link:ambrith-orlesmouth.limit_mw=600:800:10")]
    table = run_sweep(case, varies)                  # serial, in this process
    table = run_sweep(case, varies, workers=2)       # Dask LocalCluster, 2 processes
    table = run_sweep(case, varies, scheduler="tcp://host:8786")   # an existing cluster
    table = run_batch(Path("days"), workers=2)       # every case folder inside days/

Every point is a full `solve` (bulk highspy load) and becomes one row: the varied values,
status, objective, binding events and links, event prices and the point's time. An infeasible
point is a row with status "infeasible" and no cost; a point that raises any other error is a
row with status "error" and the error text; the rest go on. Rows come back in point order
whatever the engine, so the serial and the distributed tables are the same.
"""

from __future__ import annotations

import itertools
import json
import math
import os
import re
import sys
import time
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import pandas as pd

from optreserve.case.data import Case
from optreserve.errors import InfeasibleError, OptreserveError
from optreserve.output.plot_style import plot_or_warn
from optreserve.output.results import CAUTION, write_table
from optreserve.output.staging import staged_output

LIMIT_KEYS = ("max_settled_deviation_hz", "full_activation_deviation_hz",
              "max_nadir_deviation_hz", "max_rocof_hz_per_s")
MAX_POINTS = 100_000
# Parquet beside the CSV from this many rows on (typed, compressed, fast to load again)
PARQUET_MIN_ROWS = 10_000
ENGINE = "highspy"  # per-point Pyomo building would dominate a sweep (docs/performance.md)
# On Dask: a point not back from its worker after this long is taken from it and run again
# elsewhere (a stopped or hung worker); after 3 tries its row says LOST (studies/delivery.py).
POINT_TIMEOUT_S = 600.0
LOST = "lost"


class SweepError(OptreserveError):
    """A bad --vary key or range, or a bad batch folder (exit code 2)."""

    exit_code = 2


@dataclass(frozen=True)
class Vary:
    key: str
    values: tuple[float, ...]
    spec: str  # as given, for messages


# ------------------------------------------------------------------ keys and ranges
_KEY_RE = re.compile(r"^(event|link|area):(.+)\.([a-z_]+)$")
_FIELDS = {"event": ("size_mw",), "link": ("limit_mw",), "area": ("min_own_reserve_mw",)}


def parse_vary(spec: str, case: Case | None = None) -> Vary:
    """KEY=START:STOP:STEP (STOP included when it falls on the grid) or KEY=V1,V2,...
    Raises SweepError with a one-line message naming the option."""
    where = f"--vary {spec!r}"
    if "=" not in spec:
        raise SweepError(f"{where}: expected KEY=START:STOP:STEP")
    key, rng = (s.strip() for s in spec.split("=", 1))
    if ":" in rng:
        parts = rng.split(":")
        if len(parts) != 3:
            raise SweepError(f"{where}: range must be START:STOP:STEP")
        start, stop, step = (_number(p, where) for p in parts)
        if step == 0 or (stop - start) * step < 0:
            raise SweepError(f"{where}: STEP must be non-zero and lead from START to STOP")
        n = math.floor((stop - start) / step + 1e-9) + 1
        if n > MAX_POINTS:
            raise SweepError(f"{where}: {n} points is more than {MAX_POINTS}")
        values = tuple(float(f"{start + k * step:.12g}") for k in range(n))
    else:
        values = tuple(_number(p, where) for p in rng.split(","))
    v = Vary(key, values, spec)
    if case is not None:
        check_vary(case, v)
    return v


def _number(text: str, where: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise SweepError(f"{where}: {text.strip()!r} is not a number") from None
    if not math.isfinite(v):
        raise SweepError(f"{where}: {text.strip()!r} is not a finite number")
    return v


def check_vary(case: Case, v: Vary) -> None:
    """The key exists in the case and every value is allowed for it."""
    where = f"--vary {v.spec!r}"
    key, vals = v.key, np.asarray(v.values)
    if key in LIMIT_KEYS:
        if (vals <= 0).any():
            raise SweepError(f"{where}: {key} must be > 0")
        return
    if key == "price_scale":
        if (vals < 0).any():
            raise SweepError(f"{where}: price_scale must be >= 0")
        return
    m = _KEY_RE.match(key)
    if not m:
        raise SweepError(f"{where}: unknown key {key!r} (a [limits] key such as "
                         "max_settled_deviation_hz, event:NAME.size_mw, link:NAME.limit_mw, "
                         "area:NAME.min_own_reserve_mw or price_scale)")
    kind, name, fld = m.groups()
    if fld not in _FIELDS[kind]:
        raise SweepError(f"{where}: {kind}s can vary {', '.join(_FIELDS[kind])}, not {fld!r}")
    table = {"event": case.events, "link": case.links, "area": case.areas}[kind]
    ids = [str(x) for x in table[kind]]
    if name not in ids:
        raise SweepError(f"{where}: no {kind} {name!r} in the case")
    if kind == "link" and (vals <= 0).any():
        raise SweepError(f"{where}: limit_mw must be > 0")
    if kind == "area" and (vals < 0).any():
        raise SweepError(f"{where}: min_own_reserve_mw must be >= 0")
    if kind == "event":
        ev_kind = case.events.loc[case.events["event"] == name, "kind"].iloc[0]
        if ev_kind == "load_step" and (vals == 0).any():
            raise SweepError(f"{where}: a load_step's size_mw must not be 0")


def grid(varies: list[Vary]) -> list[dict[str, float]]:
    """Every combination; the first key varies slowest."""
    keys = [v.key for v in varies]
    if len(set(keys)) != len(keys):
        raise SweepError("--vary: the same key is given twice")
    n = math.prod(len(v.values) for v in varies)
    if n > MAX_POINTS:
        raise SweepError(f"--vary: {n} points is more than {MAX_POINTS}")
    return [dict(zip(keys, combo)) for combo in itertools.product(*(v.values for v in varies))]


def apply_point(case: Case, point: dict[str, float]) -> Case:
    """The case with the point's values set. max_settled_deviation_hz also moves
    full_activation_deviation_hz when the two are equal in the case (its default) and the
    latter is not varied itself. Per-period overrides of a varied link limit are dropped (the
    value applies in every period); price_scale scales per-period prices too."""
    limits = case.limits
    units, areas, links, events = case.units, case.areas, case.links, case.events
    series = dict(case.series)
    for key, value in point.items():
        if key in LIMIT_KEYS:
            ch = {key: float(value)}
            if (key == "max_settled_deviation_hz" and "full_activation_deviation_hz" not in point
                    and case.limits.full_activation_deviation_hz
                    == case.limits.max_settled_deviation_hz):
                ch["full_activation_deviation_hz"] = float(value)
            limits = replace(limits, **ch)
        elif key == "price_scale":
            units = units.copy()
            for c in ("price_up_per_mw_h", "price_down_per_mw_h"):
                units[c] = units[c] * value
            if "units" in series:
                s = series["units"].copy()
                for c in ("price_up_per_mw_h", "price_down_per_mw_h"):
                    if c in s.columns:
                        s[c] = s[c] * value
                series["units"] = s
        else:
            kind, name, fld = _KEY_RE.match(key).groups()
            if kind == "event":
                events = events.copy()
                sel = events["event"] == name
                events.loc[sel, "size_mw"] = float(value)
                if "size_from_output" in events.columns:
                    events.loc[sel, "size_from_output"] = False
            else:  # a link or area column; its per-period overrides give way to the value
                frame = (links if kind == "link" else areas).copy()
                frame.loc[frame[kind] == name, fld] = float(value)
                links, areas = (frame, areas) if kind == "link" else (links, frame)
                s = series.get(kind + "s")
                if s is not None and fld in s.columns:
                    s = s.copy()
                    s.loc[s[kind] == name, fld] = np.nan
                    series[kind + "s"] = s
    return case.replace(limits=limits, units=units, areas=areas, links=links, events=events,
                        series=series)


# ------------------------------------------------------------------ one point
def _row_of(result) -> dict:
    s = result.summary
    ev = result.events
    prices = ev.groupby("event", sort=False)["marginal_cost_per_mw_h"].max()
    inc = (ev.groupby("event", sort=False)["incremental_cost_per_mw_h"].max()
           if "incremental_cost_per_mw_h" in ev.columns else {})
    row = {"status": s["status"], "objective_per_h": s["objective_per_h"],
           "objective_total": s["objective_total"],
           "change_penalty": s["change_penalty"],
           "binding_events": ";".join(s["binding_events"]),
           "binding_links": ";".join(s["binding_links"]), "error": ""}
    # which price is which: the fixed-step dual, and the re-solved cost of a larger event
    row.update({f"marginal_cost_per_mw_h:{e}": float(p) for e, p in prices.items()})
    row.update({f"incremental_cost_per_mw_h:{e}": float(p) for e, p in inc.items()})
    return row


def _failed(status: str, text: str) -> dict:
    return {"status": status, "objective_per_h": None, "objective_total": None,
            "change_penalty": None, "binding_events": "", "binding_links": "", "error": text}


def _attempt(make_case, engine: str) -> dict:
    """The row of one solve; never raises (the failure is in the row)."""
    from optreserve.solver.run import solve

    try:
        case = make_case()  # droop steps: marginal prices are mostly blank; re-solve for
        # incremental ones (the points run in parallel already)
        return _row_of(solve(case, engine=engine,
                             incremental=case.droop.steps_pct is not None))
    except InfeasibleError as exc:
        return _failed("infeasible", exc.shortfalls[0] if exc.shortfalls else str(exc))
    except Exception as exc:  # one bad point must not stop a long study
        return _failed("error", f"{type(exc).__name__}: {exc}".splitlines()[0])


def run_point(case: Case, index: int, point: dict[str, float], engine: str = ENGINE) -> dict:
    """Solve one point of a sweep."""
    t0 = time.perf_counter()
    row = _attempt(lambda: apply_point(case, point), engine)
    return {"point": index, **point, **row, "solve_s": time.perf_counter() - t0}


# ------------------------------------------------------------------ running many
def run_sweep(case: Case, varies: list[Vary], workers: int | None = None,
              scheduler: str | None = None, progress: bool = False,
              engine: str = ENGINE, point_timeout_s: float | None = None) -> pd.DataFrame:
    """One row per grid point, in grid order. workers None or 1 and no scheduler: serial in
    this process; otherwise on Dask (a LocalCluster of `workers` processes, or the cluster at
    `scheduler`). The case goes to each worker once, not once per point. point_timeout_s
    (Dask only, default POINT_TIMEOUT_S): a point not back by then is run again elsewhere."""
    for v in varies:
        check_vary(case, v)
    points = grid(varies)
    tasks = [(i, (p, engine)) for i, p in enumerate(points)]
    rows = _run(run_point, case, tasks, workers, scheduler, progress, "sweep", point_timeout_s)
    return _table(rows, [v.key for v in varies])


def case_folders(folder: Path) -> list[Path]:
    """Sub-folders holding a case.toml, sorted by name."""
    folder = Path(folder)
    if not folder.is_dir():
        raise SweepError(f"{folder}: is not a folder of case folders")
    found = sorted(p for p in folder.iterdir() if (p / "case.toml").is_file())
    if not found:
        raise SweepError(f"{folder}: holds no case folder (a sub-folder with case.toml)")
    return found


def run_batch(folder: Path, workers: int | None = None, scheduler: str | None = None,
              progress: bool = False, engine: str = ENGINE,
              point_timeout_s: float | None = None) -> pd.DataFrame:
    """One row per case folder inside `folder`; each worker reads its case from the path
    (studies/batch.py also returns each case's result for its own folder)."""
    from optreserve.studies.batch import run_cases

    return run_cases(folder, workers, scheduler, progress, engine, point_timeout_s)[0]


def _run(fn, shared, tasks, workers, scheduler, progress, what, point_timeout_s=None
         ) -> list[dict]:
    """fn(shared, index, *args) for every (index, args) task; shared goes to a worker once."""
    bar = _bar(len(tasks), progress, what)
    try:
        if scheduler is None and (workers is None or workers <= 1):
            rows = []
            for i, args in tasks:
                rows.append(fn(shared, i, *args))
                bar.update(1)
            return rows
        from optreserve.studies.delivery import run_dask

        def where(i, args):  # what names the point in its row: a case folder or the values
            return {"case": Path(args[0]).name} if isinstance(args[0], str) else dict(args[0])

        lost = {"status": LOST, "objective_per_h": None, "objective_total": None,
                "change_penalty": None, "binding_events": "", "binding_links": "",
                "solve_s": None}
        return run_dask(fn, shared, tasks, workers, scheduler, bar,
                        POINT_TIMEOUT_S if point_timeout_s is None else point_timeout_s,
                        lambda i, args, text: {"point": i, **where(i, args), **lost,
                                               "error": text})
    finally:
        bar.close()


def _bar(total: int, progress: bool, what: str):
    from tqdm import tqdm

    return tqdm(total=total, desc=what, unit="point", disable=not progress, leave=False,
                file=sys.stderr)


def _table(rows: list[dict], keys: list[str]) -> pd.DataFrame:
    """Rows in point order; fixed leading columns, then the event prices sorted by name."""
    rows = sorted(rows, key=lambda r: r["point"])
    df = pd.DataFrame(rows)
    lead = ["point", *keys, "status", "objective_per_h", "objective_total", "change_penalty",
            "binding_events", "binding_links"]
    prices = sorted(c for c in df.columns if c.startswith(("marginal_cost_per_mw_h:",
                                                           "incremental_cost_per_mw_h:")))
    df = df[lead + prices + ["error", "solve_s"]]
    for c in ("objective_per_h", "objective_total", "change_penalty", "solve_s", *prices):
        df[c] = pd.to_numeric(df[c], errors="coerce").astype(float)
    if keys == ["case"]:  # a batch may mix snapshots and horizons: keep both columns
        pass
    elif df["objective_per_h"].isna().all() and not df["objective_total"].isna().all():
        df = df.drop(columns="objective_per_h")
    elif df["objective_total"].isna().all():
        df = df.drop(columns="objective_total")
    return df.reset_index(drop=True)


# ------------------------------------------------------------------ writing
def write_study(table: pd.DataFrame, out: Path, name: str, keys: list[str], meta: dict,
                force: bool = False, extra=None) -> list[str]:
    """Write NAME.csv (and NAME.parquet for large tables), a cost plot NAME.png when one or
    two keys vary, and NAME.json (what was run, the counts, the caution); all at once.
    extra(tmp) -> names: further files or folders written into the same staging folder."""
    written = []
    with staged_output(Path(out), force, group=name) as tmp:
        if extra is not None:
            written += extra(tmp)
        write_table(table, tmp / f"{name}.csv", exact=tuple(keys))  # swept values in full
        written.append(f"{name}.csv")
        if len(table) >= PARQUET_MIN_ROWS:
            table.to_parquet(tmp / f"{name}.parquet", index=False)
            written.append(f"{name}.parquet")
        png = tmp / f"{name}.png"
        if plot_or_warn(lambda: plot_costs(table, keys, png, meta.get("case", "")), png):
            written.append(f"{name}.png")
        counts = table["status"].value_counts().to_dict()
        doc = {**meta, "cases" if keys == ["case"] else "points": len(table),
               "status_counts": {k: int(v) for k, v in counts.items()},
               "files": written + [f"{name}.json"], "caution": CAUTION}
        (tmp / f"{name}.json").write_text(json.dumps(doc, indent=2) + "\n")
        written.append(f"{name}.json")
    return written


def axis_label(key: str) -> str:
    """An axis label with its unit for a varied key."""
    if key in LIMIT_KEYS:
        unit = "Hz/s" if key.endswith("_hz_per_s") else "Hz"
        return key.rsplit("_hz", 1)[0].replace("_", " ") + f" ({unit})"
    if key == "price_scale":
        return "headroom price scale (multiple of the case's prices)"
    if key == "case":
        return "case"
    kind, name, fld = _KEY_RE.match(key).groups()
    words = {"size_mw": "size", "limit_mw": "limit", "min_own_reserve_mw": "own reserve"}[fld]
    return f"{words} of {kind} {name} (MW)"


def plot_costs(table: pd.DataFrame, keys: list[str], path: Path, title: str = "") -> bool:
    """Cost curve: one varied key -> one line; two -> one line per value of the second key.
    Infeasible or failed points are gaps, marked with a cross on the x axis."""
    if len(keys) not in (1, 2) or keys == ["case"]:
        return False
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    ycol = "objective_per_h" if "objective_per_h" in table.columns else "objective_total"
    ylabel = ("headroom cost (per hour)" if ycol == "objective_per_h"
              else "headroom cost (total over the horizon)")
    fig, ax = plt.subplots(figsize=(7.5, 4.5), dpi=110)
    x = keys[0]
    groups = [(None, table)] if len(keys) == 1 else list(table.groupby(keys[1], sort=True))
    bad_x = []
    for val, g in groups:
        y = g[ycol].where(g["status"].isin(["optimal", "time_limit"]))
        label = None if val is None else f"{axis_label(keys[1]).split(' (')[0]} = {val:g}"
        ax.plot(g[x], y, marker="o", markersize=3, linewidth=1.2, label=label)
        bad_x += list(g.loc[y.isna(), x])
    if bad_x:
        ax.plot(bad_x, [0] * len(bad_x), "x", color="tab:red", transform=ax.get_xaxis_transform(),
                clip_on=False, label="infeasible or failed")
    ax.set_xlabel(axis_label(x))
    ax.set_ylabel(ylabel)
    ax.set_title(f"{title}\nplanning study, not an operating instruction", fontsize=9)
    ax.grid(True, alpha=0.3)
    if len(keys) == 2 or bad_x:
        ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
    return True


def default_workers() -> int:
    return max(1, os.cpu_count() or 1)

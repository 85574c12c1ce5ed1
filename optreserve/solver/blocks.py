"""Separable horizons: a horizon whose droop blocks share no constraint is solved block by
block (serially, or in parallel on Dask) and merged into one Result.

Why it is exact. Every row family of the model (model/build.py, flows.py, nadir.py) is local
to one period, one event instance or one droop block: gains K, step choices z and change
indicators belong to a block (a change is counted against droop_now_pct, a constant, not
against the neighbouring block); headroom, own-reserve, dispatch and pre-event flow rows
belong to a period; settled, flow and nadir rows to an instance, which lies in one period.
Periods of different blocks therefore share no row and no column, and the whole-horizon
program is the direct sum of the block programs: its optimum is the sum of theirs, and a
relative MIP gap g met in every block bounds the gap of the sum by g. The dead-band fixed
point and the nadir rounds act instance by instance too. What can link blocks is only what
this module cannot see: rows a study adds through solve(extend=...), or a horizon prepared by
the caller (hz=...); those are solved whole (`separable`).

Differences from one whole-horizon solve, all within what the result already states: each
block has the full time limit (not a share of one budget), the reported MIP gap is the largest
block gap (an upper bound of the whole gap), and the nadir simulation runs exactly when it
would run on the whole horizon (at most run.NADIR_SIM_MAX_INSTANCES instances in total).
"""

from __future__ import annotations

import time
from dataclasses import replace

import numpy as np
import pandas as pd

from optreserve.case.data import Case
from optreserve.output.results import Result


def separable(case: Case, extend=None, hz=None) -> bool:
    """True when the case is a horizon of more than one droop block and nothing outside the
    model's own row families (extend=, a prepared hz) could link the blocks."""
    if extend is not None or hz is not None or not case.is_horizon:
        return False
    return case.hold_periods is not None and int(case.hold_periods) < case.n_periods


def block_cases(case: Case) -> list[Case]:
    """One case per droop block: its periods, their hours, their rows of every time series,
    and the events of its periods (events without a period apply to every block)."""
    h = int(case.hold_periods)
    T = case.n_periods
    periods = list(case.periods)
    hours = list(case.period_hours)
    pos = {p: k for k, p in enumerate(periods)}
    starts = list(range(0, T, h))
    parts: dict[str, list] = {}
    for key, ser in case.series.items():
        b = ser["period"].map(pos).to_numpy() // h
        order = np.argsort(b, kind="stable")
        cuts = np.searchsorted(b[order], np.arange(len(starts) + 1))
        parts[key] = [ser.iloc[order[cuts[k]:cuts[k + 1]]].reset_index(drop=True)
                      for k in range(len(starts))]
    ev = case.events
    ev_per = ev["period"].to_numpy(object) if "period" in ev.columns else np.full(len(ev), None)
    ev_block = np.array([pos[p] // h if p in pos else -1 for p in ev_per], dtype=np.int64)
    out = []
    for k, t0 in enumerate(starts):
        t1 = min(t0 + h, T)
        keep = (ev_block < 0) | (ev_block == k)
        out.append(replace(case, periods=tuple(periods[t0:t1]),
                           period_hours=tuple(hours[t0:t1]),
                           series={key: parts[key][k] for key in parts},
                           events=ev[keep].reset_index(drop=True), read_time_s=0.0,
                           warnings=()))
    return out


def _warm_from(prev: Result | None):
    """A partial first incumbent for the next block: the previous block's droop settings
    (HiGHS completes the continuous columns itself and drops the start if it does not fit)."""
    if prev is None:
        return None
    a = prev.allocation
    N = int((a["period"] == a["period"].iloc[0]).sum())  # units of the first period
    droop = a["droop_pct"].to_numpy(float)[:N]  # first period: the block's droop
    gain = a["gain_mw_per_hz"].to_numpy(float)[:N]

    def warm(lp, info):
        if info.steps_gain is not None and "z" in lp.var_blocks:
            z = lp.var_blocks["z"].idx()
            on = np.isclose(info.steps_pct, droop[info.steps_unit], rtol=0, atol=1e-9) & (
                info.steps_block == 0)
            return z, on.astype(float)
        if "u" in lp.var_blocks and len(gain) == info.hz.N:
            u, k = lp.var_blocks["u"].idx()[:N], lp.var_blocks["K"].idx()[:N]
            ok = (gain <= info.hz.K_hi_b[0] * (1 + 1e-9)) & ((gain == 0) | (gain >= info.hz.K_lo))
            g = np.where(ok, gain, 0.0)
            return np.r_[u, k], np.r_[(g > 0).astype(float), g]
        return None

    return warm


def _solve_chain(cases: list[Case], kw: dict, warm: bool) -> list[Result]:
    """Solve consecutive blocks in order, each warm-started from the one before."""
    from optreserve.solver.run import solve

    out: list[Result] = []
    for c in cases:
        r = solve(c, blocks=False, warm=_warm_from(out[-1] if out and warm else None), **kw)
        r.case = None  # the merged result carries the whole case; a block's is not sent back
        out.append(_compact(r))
        # a solved block's per-period matrices (a few MB a day) are not needed again: dropped
        # now, not when the whole horizon is done (28 days in one process: 599 -> 480 MB)
        c.__dict__.pop("_matrix_cache", None)
    return out


# A worker holds its chain's cases and results until the chain ends: chains of at most this
# many blocks bound a worker's memory on long horizons (in the year run of docs/performance.md
# the workers stayed at 280-400 MB) while keeping most warm starts.
CHAIN_BLOCKS = 7


def _chunks(n: int, k: int) -> list[range]:
    """Contiguous, nearly equal ranges over n blocks: at least k (one chain per worker, which
    keeps warm starts) and none longer than CHAIN_BLOCKS."""
    k = max(1, min(max(k, -(-n // CHAIN_BLOCKS)), n))
    cuts = np.linspace(0, n, k + 1).round().astype(int)
    return [range(cuts[i], cuts[i + 1]) for i in range(k)]


def solve_blocks(case: Case, workers: int | None = None, scheduler: str | None = None,
                 warm: bool = True, **kw) -> Result:
    """Solve a separable horizon block by block and merge the results (see module doc).
    workers/scheduler: None/None solves in this process; otherwise a Dask LocalCluster of
    `workers` processes or the cluster at `scheduler`, one chain of blocks per worker."""
    from optreserve.solver.nadir_loop import NADIR_SIM_MAX_INSTANCES

    t0 = time.perf_counter()
    cases = block_cases(case)  # emptied as the blocks are solved or sent (memory)
    per = case.events["period"] if "period" in case.events.columns else None
    fixed = 0 if per is None else int(per.isin(list(case.periods)).sum())
    n_inst = (len(case.events) - fixed) * case.n_periods + fixed  # as case.instances() counts
    kw = dict(kw, nadir_sim=n_inst <= NADIR_SIM_MAX_INSTANCES)
    if scheduler is None and (workers is None or workers <= 1):
        results = _solve_chain(cases, kw, warm)
    else:
        results = _solve_dask(cases, kw, warm, workers, scheduler)
    res = merge(case, results)
    res.timings_s["total"] = time.perf_counter() - t0 + case.read_time_s
    return res


def _solve_dask(cases, kw, warm, workers, scheduler) -> list[Result]:
    from dask.distributed import as_completed

    from optreserve.studies.delivery import study_client  # loopback only, no web pages

    with study_client(workers, scheduler) as (client, _):
        n = len(client.scheduler_info().get("workers", {})) or int(workers or 1)
        futures = {client.submit(_solve_chain, [cases[i] for i in r], kw, warm, pure=False): k
                   for k, r in enumerate(_chunks(len(cases), n))}

        done: dict[int, list[Result]] = {}
        for f in as_completed(futures):  # fetched as they finish: workers free them at once
            done[futures[f]] = f.result()
            f.release()
        return [r for k in sorted(done) for r in done[k]]


_TABLES = ("allocation", "events", "links", "prices")


def _compact(r: Result) -> Result:
    """The block's text columns without missing cells as categories (a code per row
    instead of an object per row): a year's block results travel and wait for the merge in
    a fraction of the memory; merge() turns them back into the same text columns."""
    for name in _TABLES:
        df = getattr(r, name)
        if df is None:
            continue
        for c in df.columns:
            col = df[c]
            if col.dtype == object and len(col) and not col.isna().any():
                df[c] = col.astype("category")
    return r


def _text_again(df: pd.DataFrame) -> pd.DataFrame:
    """Category columns (from _compact) back to text, sharing one string per label."""
    for c in df.columns:
        if isinstance(df[c].dtype, pd.CategoricalDtype):
            df[c] = df[c].astype(object)
    return df


_WORST = ["optimal", "time_limit"]


def merge(case: Case, results: list[Result]) -> Result:
    """One Result for the whole horizon from the block results, in period order."""
    first = results[0]
    def cat(name):
        return _text_again(pd.concat([getattr(r, name) for r in results], ignore_index=True))

    statuses = [r.status for r in results]
    status = max(statuses, key=lambda s: _WORST.index(s.replace("_relaxed", ""))
                 if s.replace("_relaxed", "") in _WORST else len(_WORST))
    gaps = [r.mip_gap for r in results]
    res = Result(case=case, status=status, objective_per_h=None,
                 mip_gap=None if any(g is None for g in gaps) else float(max(gaps)),
                 allocation=cat("allocation"), events=cat("events"), links=cat("links"),
                 solver=dict(first.solver),
                 verification={k: float(max(r.verification[k] for r in results))
                               for k in first.verification},
                 relaxed=first.relaxed,
                 change_penalty_total=float(sum(r.change_penalty_total for r in results)))
    res.objective_total = float(sum(r.objective_total for r in results))
    if first.energy_cost is not None:
        res.energy_cost = float(sum(r.energy_cost for r in results))
        res.reserve_cost = float(sum(r.reserve_cost for r in results))
    if all(r.prices is not None for r in results):
        res.prices = cat("prices")
    res.iterations = max(r.iterations for r in results)
    res.solver_warnings = list(dict.fromkeys(w for r in results for w in r.solver_warnings))
    checks = [r.nadir_check for r in results]
    worst = [c.get("worst_hz") for c in checks if c.get("worst_hz") is not None]
    res.nadir_check = {"checked": any(c.get("checked") for c in checks),
                       "rounds": max(c.get("rounds", 0) for c in checks),
                       "worst_hz": max(worst) if worst else None}
    res.timings_s = {"read": case.read_time_s, **{
        k: float(sum(r.timings_s.get(k, 0.0) for r in results)) for k in ("build", "solve")},
        "write": 0.0}
    return res

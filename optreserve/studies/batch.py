"""Batch: every case folder inside a folder solved (serially or on Dask), each case's own
result folder written inside --out (what `solve --out` writes; diagnosis.csv for an
infeasible case; nothing for a case that cannot be read or fails) next to the merged table
batch.csv (one row per case).

The worker returns the Result (or the diagnosis) to this process, which writes every folder
inside the one staging folder of the study, so a batch appears all at once like any output
and works on a remote cluster that cannot see --out.
"""

from __future__ import annotations

import time
from pathlib import Path

import pandas as pd

from optreserve.errors import CaseError, InfeasibleError
from optreserve.output.results import Result, write_table
from optreserve.studies.sweep import ENGINE, _failed, _row_of, _run, _table, case_folders

SOLVED = ("optimal", "time_limit")
PAYLOAD = "_result"  # the row key that carries a case's result back from the worker


def solve_case_folder(_shared, index: int, path: str, engine: str = ENGINE) -> dict:
    """Read and solve one case folder; never raises (the failure is in the row). The row
    carries the Result (or the diagnosis table of an infeasible case) under PAYLOAD."""
    from optreserve.case.reader import load_case
    from optreserve.solver.run import solve

    t0 = time.perf_counter()
    payload = None
    try:
        res = solve(load_case(path), engine=engine, incremental=True)  # as `solve` writes it
        row, payload = _row_of(res), res
    except CaseError as exc:
        row = _failed("input_error", str(exc.problems[0]) if exc.problems else str(exc))
    except InfeasibleError as exc:
        row = _failed("infeasible", exc.shortfalls[0] if exc.shortfalls else str(exc))
        payload = exc.diagnosis
    except Exception as exc:  # noqa: BLE001 - one bad case must not stop the batch
        row = _failed("error", f"{type(exc).__name__}: {exc}".splitlines()[0])
    return {"point": index, "case": Path(path).name, **row,
            "solve_s": time.perf_counter() - t0, PAYLOAD: payload}


def run_cases(folder: Path, workers: int | None = None, scheduler: str | None = None,
              progress: bool = False, engine: str = ENGINE,
              point_timeout_s: float | None = None) -> tuple[pd.DataFrame, dict]:
    """(batch table, {case folder name: Result, diagnosis DataFrame or None})."""
    tasks = [(i, (str(p), engine)) for i, p in enumerate(case_folders(folder))]
    rows = _run(solve_case_folder, None, tasks, workers, scheduler, progress, "batch",
                point_timeout_s)
    payloads = {r["case"]: r.pop(PAYLOAD, None) for r in rows}
    return _table(rows, ["case"]), payloads


def case_writer(payloads: dict):
    """A callback for sweep.write_study: writes one folder per case into the staging folder
    and returns the names written."""

    def write(tmp: Path) -> list[str]:
        names = []
        for name, p in sorted(payloads.items()):
            if isinstance(p, Result):
                p.write(tmp / name)
            elif isinstance(p, pd.DataFrame):
                (tmp / name).mkdir()
                write_table(p, tmp / name / "diagnosis.csv")
            else:
                continue
            names.append(f"{name}/")
        return names

    return write


def failed(table: pd.DataFrame) -> pd.DataFrame:
    """The cases that did not solve (infeasible, input error or error)."""
    return table[~table["status"].isin(SOLVED)]

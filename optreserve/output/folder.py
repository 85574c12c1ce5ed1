"""The one reader of result folders: the files `solve`, `retune` and `simulate` write, read
back typed against their schemas (output/schemas.py; one file at a time in
output/result_files.py).

Used by the report (read_result: a whole folder, checked for consistency, with the case folder
when given or recorded) and by `simulate --allocation` (read_allocation: the allocation of a
result folder, checked against the case). Any problem is a ResultFileError (an input error,
exit code 2) naming file, row and column, in one line.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from optreserve.errors import Problem
from optreserve.output.allocation_check import allocation_problems, check_allocation
from optreserve.output.result_files import (
    ResultFileError,
    first_line,
    is_png,
    leading_comments,
    read_json,
    read_png,
    read_retune,
    read_summary,
    read_table,
)
from optreserve.output.schemas import (
    ALLOCATION,
    BEFORE_AFTER,
    DIAGNOSIS,
    EVENTS,
    LINKS,
    PROPOSAL,
    SCHEDULE_WIDE,
    SIMULATION_LINKS_COLUMNS,
    SIMULATION_SUMMARY_COLUMNS,
)

if TYPE_CHECKING:
    from optreserve.case.data import Case

__all__ = ["ResultFileError", "ResultFolder", "allocation_problems", "check_allocation",
           "first_line", "is_png", "read_allocation", "read_json", "read_png", "read_result",
           "read_retune", "read_summary", "read_table"]


# ------------------------------------------------------------------ allocation for simulate
ALLOCATION_FILE = "allocation.csv"


def read_allocation(path: str | Path, case: Case) -> pd.DataFrame:
    """Read allocation.csv (a folder written by `optreserve solve --out`, or the file itself)
    leniently (only unit, area, gain and headroom needed) and check it against the case.
    Raises ResultFileError / CaseError naming file, row and column. The frame carries
    attrs["file"] and attrs["warnings"] (unknown columns, ignored)."""
    p = Path(path)
    if p.is_dir():
        p = p / ALLOCATION_FILE
    if not p.is_file():
        raise ResultFileError(p, "is missing (expected the allocation written by optreserve "
                              "solve --out)")
    df = read_table(p, ALLOCATION, complete=False, lines=True)
    known = set(ALLOCATION) | {"_line"}
    header_line = leading_comments(p) + 1
    df.attrs["file"] = str(p)
    df.attrs["warnings"] = [str(Problem(str(p), "unknown column ignored", header_line, c))
                            for c in df.columns if c not in known]
    check_allocation(case, df, str(p))
    return df


# ------------------------------------------------------------------ a whole result folder
_CASE_KEYS = ("case_dir", "case_path", "case_folder")
SIMULATION_SUMMARY = "simulation_summary.csv"
SIMULATION_LINKS = "simulation_links.csv"
SIMULATION_DIR = "simulation"  # a sub-folder `simulate --out RESULT_DIR/simulation` wrote


def _uniq(values) -> list:
    """Distinct values in order of first appearance."""
    return list(pd.unique(pd.Series(values, dtype=object)))


@dataclass
class ResultFolder:
    """Everything a result folder holds, read and checked."""

    folder: Path
    summary: dict | None = None
    allocation: pd.DataFrame | None = None
    events: pd.DataFrame | None = None
    links: pd.DataFrame | None = None
    schedule: pd.DataFrame | None = None
    diagnosis: pd.DataFrame | None = None
    simulation: pd.DataFrame | None = None
    simulation_file: str | None = None  # where simulation came from, relative to folder
    simulation_links: pd.DataFrame | None = None  # simulation_links.csv beside it, if any
    prices: pd.DataFrame | None = None  # prices.csv, per area (and period), when written
    proposal: pd.DataFrame | None = None  # proposal.csv of a retune folder
    retune: dict | None = None  # retune.json of a retune folder
    before_after: pd.DataFrame | None = None  # before_after.csv of a retune folder
    sim_images: list = field(default_factory=list)  # (file name, png bytes)
    case: object = None
    case_dir: Path | None = None
    notes: list = field(default_factory=list)  # said on the page, near the top

    @property
    def solved(self) -> bool:
        return self.allocation is not None

    @property
    def horizon(self) -> bool:
        return self.allocation is not None and "period" in self.allocation.columns

    @functools.cached_property
    def periods(self) -> list:  # read after allocation is set
        if not self.horizon:
            return []
        return _uniq(self.allocation["period"])

    @property
    def nominal_hz(self) -> float:
        if self.case is not None:
            return float(self.case.nominal_frequency_hz)
        ev = self.events
        if ev is not None and len(ev):  # settled_frequency = nominal + deviation
            return float(np.median(ev["settled_frequency_hz"] - ev["settled_deviation_hz"]))
        return 50.0


def read_result(result_dir, case_dir=None) -> ResultFolder:
    """Read and check a result folder (and the case folder when given or recorded)."""
    folder = Path(result_dir)
    if not folder.is_dir():
        raise ResultFileError(folder, "no such result folder")
    rf = ResultFolder(folder=folder)
    has = {p.name for p in folder.iterdir() if p.is_file()}
    diag_newer = False
    if "diagnosis.csv" in has:
        diag_newer = ("summary.json" not in has or (folder / "diagnosis.csv").stat().st_mtime
                      > (folder / "summary.json").stat().st_mtime)
    if "allocation.csv" not in has and "diagnosis.csv" not in has:
        raise ResultFileError(folder / "allocation.csv", "missing (and no diagnosis.csv): not "
                              "a result folder of optreserve solve --out")
    if diag_newer:  # the latest solve was infeasible: only diagnosis.csv is current
        rf.diagnosis = read_table(folder / "diagnosis.csv", DIAGNOSIS)
        if "allocation.csv" in has:
            rf.notes.append("The latest solve into this folder found no feasible allocation "
                            "(diagnosis.csv is newer than the other result files); the older "
                            "allocation, event and link files are from an earlier run and are "
                            "not shown.")
    else:
        rf.summary = read_summary(folder / "summary.json")
        rf.allocation = read_table(folder / "allocation.csv", ALLOCATION)
        rf.events = read_table(folder / "events.csv", EVENTS)
        rf.links = read_table(folder / "links.csv", LINKS)
        if "diagnosis.csv" in has:
            rf.notes.append("diagnosis.csv is older than summary.json (from an earlier, "
                            "infeasible run) and is not shown.")
        _check_consistent(rf)
        if rf.horizon and "schedule_wide.csv" in has:
            rf.schedule = read_table(folder / "schedule_wide.csv", SCHEDULE_WIDE,
                                     extra_kind="num")
            missing = [p for p in rf.periods if p not in rf.schedule.columns]
            if missing:
                raise ResultFileError(folder / "schedule_wide.csv", "missing (a period of "
                                      "allocation.csv)", None, missing[0])
        if "proposal.csv" in has:  # a retune folder
            rf.proposal = read_table(folder / "proposal.csv", PROPOSAL)
            if "retune.json" in has:
                rf.retune = read_retune(folder / "retune.json")
            if "before_after.csv" in has:
                rf.before_after = read_table(folder / "before_after.csv", BEFORE_AFTER)
    if rf.solved and "prices.csv" in has:
        rf.prices = read_table(folder / "prices.csv", None)
    _read_simulation(rf, has)
    _attach_case(rf, case_dir)
    return rf


def _check_consistent(rf: ResultFolder) -> None:
    f = rf.folder
    per = {n: "period" in getattr(rf, n).columns for n in ("allocation", "events")}
    if per["allocation"] != per["events"]:
        raise ResultFileError(f / "events.csv", ("missing" if per["allocation"] else
                                                 "unexpected") + " (allocation.csv "
                              + ("has" if per["allocation"] else "has no") + " period column)",
                              None, "period")
    periods = rf.summary.get("periods")
    if isinstance(periods, (int, float)) and periods > 1 and not rf.horizon:
        raise ResultFileError(f / "allocation.csv", f"missing, but summary.json says "
                              f"{int(periods)} periods", None, "period")
    unknown = set(rf.links["event"]) - set(rf.events["event"])
    if unknown:
        raise ResultFileError(f / "links.csv", f"unknown event {min(unknown)!r} (not in "
                              "events.csv)", None, "event")


def _read_simulation(rf: ResultFolder, has: set) -> None:
    """simulation_summary.csv (the folder's own, else one in simulation/) with
    simulation_links.csv beside it, and the PNG plots of the folder and of simulation/."""
    f = rf.folder
    sub = f / SIMULATION_DIR
    ref = f / "summary.json" if "summary.json" in has else None
    where = (SIMULATION_SUMMARY if SIMULATION_SUMMARY in has else
             f"{SIMULATION_DIR}/{SIMULATION_SUMMARY}"
             if (sub / SIMULATION_SUMMARY).is_file() else None)
    if where is not None:
        rf.simulation = read_table(f / where, SIMULATION_SUMMARY_COLUMNS, open_columns=True)
        rf.simulation_file = where
        links = (f / where).with_name(SIMULATION_LINKS)
        if links.is_file():
            rf.simulation_links = read_table(links, SIMULATION_LINKS_COLUMNS, open_columns=True)
        if ref is not None and (f / where).stat().st_mtime < ref.stat().st_mtime:
            rf.notes.append(f"{where} is older than summary.json: the simulation may belong "
                            "to an earlier allocation.")
    pngs = sorted(n for n in has if n.lower().endswith(".png"))
    if sub.is_dir():
        pngs += sorted(f"{SIMULATION_DIR}/{p.name}" for p in sub.iterdir()
                       if p.is_file() and p.name.lower().endswith(".png"))
    order = list(rf.events["event"].drop_duplicates()) if rf.events is not None else []

    def key(name):  # in event order where the file name names an event
        hits = [k for k, e in enumerate(order) if str(e) in name]
        return (hits[0] if hits else len(order), name)

    for name in sorted(pngs, key=key):
        rf.sim_images.append((name, read_png(f / name)))


def _attach_case(rf: ResultFolder, case_dir) -> None:
    recorded = None
    if case_dir is None and rf.summary is not None:
        for k in _CASE_KEYS:
            if isinstance(rf.summary.get(k), str):
                recorded = Path(rf.summary[k])
                if not recorded.is_absolute() and not recorded.is_dir():
                    recorded = rf.folder / recorded
                break
        if recorded is not None and not recorded.is_dir():
            rf.notes.append(f"summary.json names the case folder {recorded}, which is not "
                            "there; the report is drawn from the result files alone.")
            recorded = None
    where = Path(case_dir) if case_dir is not None else recorded
    if where is None:
        return
    from optreserve.case.reader import load_case  # a CaseError here is an input error (exit 2)

    case = load_case(where)
    if rf.allocation is not None:
        ours = set(rf.allocation["unit"])
        theirs = set(case.units["unit"])
        if ours != theirs:
            odd = sorted(ours - theirs) or sorted(theirs - ours)
            raise ResultFileError(rf.folder / "allocation.csv", f"does not match the case "
                                  f"folder {where} ({odd[0]!r} is in only one of them)", None,
                                  "unit")
        if rf.horizon and [str(p) for p in case.periods] != [str(p) for p in rf.periods]:
            raise ResultFileError(rf.folder / "allocation.csv", f"the periods do not match "
                                  f"the case folder {where}", None, "period")
    rf.case = case
    rf.case_dir = where

"""The one reader of result folders: the files `solve`, `retune` and `simulate` write, read
back typed against their schemas (output/schemas.py).

Used by the report (read_result: a whole folder, checked for consistency, with the case folder
when given or recorded) and by `simulate --allocation` (read_allocation: the allocation of a
result folder, checked against the case). Any problem is a ResultFileError (an input error,
exit code 2) naming file, row and column; readers stop at the first problem, so the message is
one line. `complete=True` (the report: the folder as the tool wrote it) needs every column the
tool always writes; `complete=False` (a hand-made allocation for simulate) needs only the core
columns, fills the others with defaults and reads a blank true/false cell as "not said".

Somewhat over 400 lines on purpose: one concept, reading a result folder back, from the cell
types up to the folder's consistency; split, each half would need the other's details.
"""

from __future__ import annotations

import csv
import functools
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from optreserve.errors import CaseError, Problem
from optreserve.output.allocation_check import allocation_problems, check_allocation
from optreserve.output.schemas import (
    ALLOCATION,
    BEFORE_AFTER,
    DIAGNOSIS,
    EVENTS,
    LINKS,
    PROPOSAL,
    RETUNE_NUMBERS,
    SCHEDULE_WIDE,
    SIMULATION_LINKS_COLUMNS,
    SIMULATION_SUMMARY_COLUMNS,
    SUMMARY_NUMBERS,
    Column,
)

if TYPE_CHECKING:
    from optreserve.case.data import Case

__all__ = ["ResultFileError", "ResultFolder", "allocation_problems", "check_allocation",
           "read_allocation", "read_json", "read_png", "read_result", "read_retune",
           "read_summary", "read_table"]

_TRUE = {"true", "1", "yes", "y", "t"}
_FALSE = {"false", "0", "no", "n", "f"}


class ResultFileError(CaseError):
    """A result file is missing or cannot be read (exit code 2; nothing is written)."""

    def __init__(self, file, message: str, row: int | None = None,
                 column: str | None = None, problem: Problem | None = None):
        super().__init__([problem or Problem(str(file), message, row, column)])


class _At(Problem):
    """A problem located by line and column of a JSON text (not a CSV row)."""

    def __str__(self) -> str:
        return f"{self.file} line {self.row} column {self.column}: {self.message}"


def first_line(exc: Exception) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def _leading_comments(path: Path) -> int:
    """Whole-line # comments above the header (simulation_summary.csv may start with one)."""
    n = 0
    with open(path, encoding="utf-8-sig", errors="replace") as fh:
        for line in fh:
            if not line.lstrip().startswith("#"):
                break
            n += 1
    return n


def _header_names(path: Path, skip: int) -> list[str]:
    with open(path, encoding="utf-8-sig", errors="replace", newline="") as fh:
        for _ in range(skip):
            fh.readline()
        return [h.strip() for h in next(csv.reader([fh.readline()]), [])]


def _by_content(raw: pd.DataFrame) -> pd.DataFrame:
    """Type a table of open columns: wholly numeric -> float, wholly true/false -> bool."""
    out = pd.DataFrame(index=range(len(raw)))
    for c in raw.columns:
        s = raw[c].astype(str).str.strip()
        v = pd.to_numeric(s.where(s != ""), errors="coerce")
        filled = s != ""
        if len(s) and filled.any() and bool((~filled | v.notna()).all()):
            out[c] = v.to_numpy(float)
        elif len(s) and filled.all() and s.str.lower().isin({"true", "false"}).all():
            out[c] = s.str.lower().eq("true").to_numpy(bool)
        else:
            out[c] = s.to_numpy(object)
    return out


def _check_open(path: Path, raw: pd.DataFrame, out: pd.DataFrame, row_lines: np.ndarray,
                schema: dict[str, Column]) -> None:
    """A table of open columns typed by content: the columns the schema names must hold what
    it says (cells of another kind are an error), and text columns stay text."""
    for name in raw.columns:
        c = schema.get(name)
        if c is None:
            continue
        s = raw[name].astype(str).str.strip()
        if c.kind == "text":
            out[name] = s.to_numpy(object)
        elif c.kind == "bool":
            bad = ~s.str.lower().isin(_TRUE | _FALSE | {""}).to_numpy()
            if bad.any():
                k = int(np.argmax(bad))
                raise ResultFileError(path, f"is not true or false: {s.iloc[k]!r}",
                                      int(row_lines[k]), name)
        else:
            _numbers(path, s, row_lines, name, c.kind, c)


def read_table(path: Path, schema: dict[str, Column] | None, complete: bool = True,
               extra_kind: str = "text", lines: bool = False,
               open_columns: bool = False) -> pd.DataFrame:
    """A result CSV with its columns typed; the first problem is a ResultFileError naming file,
    row (physical line) and column. schema None: typed by content. extra_kind: the kind of
    columns the schema does not name (schedule_wide.csv: "num"). lines: add a `_line` column
    (physical line of each row) for later cross-checks. open_columns (a file other versions
    may add columns to, simulation_summary.csv): typed by content, the schema's columns
    checked against their kinds, none required."""
    path = Path(path)
    try:
        skip = _leading_comments(path)
        raw = pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8-sig",
                          skip_blank_lines=False, skiprows=skip)
    except FileNotFoundError:
        raise ResultFileError(path, "missing") from None
    except IsADirectoryError:
        raise ResultFileError(path, "is a folder, not a CSV file") from None
    except pd.errors.EmptyDataError:
        raise ResultFileError(path, "empty file, no header") from None
    except (pd.errors.ParserError, UnicodeDecodeError, ValueError) as exc:
        raise ResultFileError(path, f"not a readable CSV file: {first_line(exc)}") from None
    header_line = skip + 1
    seen: set[str] = set()
    for h in _header_names(path, skip):  # pandas would rename a repeated name silently
        if h in seen and h:
            raise ResultFileError(path, f"column '{h}' appears twice in the header",
                                  header_line, h)
        seen.add(h)
    blank = (raw == "").all(axis=1) if raw.shape[1] else pd.Series(False, index=raw.index)
    raw = raw[~blank]
    row_lines = raw.index.to_numpy() + 1 + header_line  # header line + comments above it
    if schema is None or open_columns:
        out = _by_content(raw)
        if schema is not None:
            _check_open(path, raw, out, row_lines, schema)
    else:
        out = _typed(path, raw, row_lines, schema, complete, extra_kind)
    if lines:
        out["_line"] = row_lines.astype(np.int64)
    return out


def _typed(path: Path, raw: pd.DataFrame, row_lines: np.ndarray, schema: dict[str, Column],
           complete: bool, extra_kind: str) -> pd.DataFrame:
    for c in schema.values():
        if c.name not in raw.columns and (c.core or (complete and c.always)):
            raise ResultFileError(path, "missing from the header", None, c.name)
    out = pd.DataFrame(index=range(len(raw)))
    for name in raw.columns:
        c = schema.get(name)
        kind = c.kind if c is not None else extra_kind
        s = raw[name].astype(str).str.strip()
        if kind == "text":
            out[name] = s.to_numpy(object)
        elif kind == "bool":
            low = s.str.lower()
            is_t, is_f = low.isin(_TRUE).to_numpy(), low.isin(_FALSE).to_numpy()
            empty = (s == "").to_numpy()
            bad = ~is_t & ~is_f & (~empty if not complete else True)
            if bad.any():
                k = int(np.argmax(bad))
                raise ResultFileError(path, f"is not true or false: {s.iloc[k]!r}",
                                      int(row_lines[k]), name)
            if complete:
                out[name] = is_t
            else:  # blank: not said (None), kept apart from "no"
                v = np.full(len(s), None, dtype=object)
                v[is_t], v[is_f] = True, False
                out[name] = pd.Series(v, dtype=object)
        else:
            out[name] = _numbers(path, s, row_lines, name, kind, c)
    if not complete:
        for c in schema.values():
            if c.name not in out.columns:
                out[c.name] = (pd.Series([c.default] * len(out), dtype=object)
                               if c.default is None or isinstance(c.default, str)
                               else np.full(len(out), float(c.default)))
    return out


def _numbers(path: Path, s: pd.Series, row_lines: np.ndarray, name: str, kind: str,
             c: Column | None) -> np.ndarray:
    empty = (s == "").to_numpy()
    v = pd.to_numeric(s.where(~empty), errors="coerce").to_numpy(float)
    bad = (~empty & np.isnan(v)) | (np.isinf(v) & (kind != "num?inf"))
    if bad.any():
        k = int(np.argmax(bad))
        raise ResultFileError(path, f"is not a number: {s.iloc[k]!r}", int(row_lines[k]), name)
    if kind == "num" and empty.any():
        k = int(np.argmax(empty))
        raise ResultFileError(path, "is empty", int(row_lines[k]), name)
    if c is not None and c.at_least is not None:
        with np.errstate(invalid="ignore"):
            low = (v <= c.at_least) if c.above else (v < c.at_least)
        if low.any():
            k = int(np.argmax(low))
            rel = ">" if c.above else ">="
            raise ResultFileError(path, f"must be {rel} {c.at_least:g} (got {s.iloc[k]})",
                                  int(row_lines[k]), name)
    return v


def read_json(path: Path, numbers: tuple = (), status: bool = False) -> dict:
    """A JSON object file (summary.json, retune.json); `numbers`: keys that must be numbers
    when present; status: a text `status` key is required."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise ResultFileError(path, "missing") from None
    except (UnicodeDecodeError, OSError) as exc:
        raise ResultFileError(path, f"cannot be read: {first_line(exc)}") from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise ResultFileError(path, "", problem=_At(str(path), f"not valid JSON: {exc.msg}",
                                                    exc.lineno, str(exc.colno))) from None
    if not isinstance(data, dict):
        raise ResultFileError(path, "not a JSON object")
    if status and not isinstance(data.get("status"), str):
        raise ResultFileError(f"{path} key status", "missing or not text")
    for k in numbers:
        v = data.get(k)
        if v is not None and (isinstance(v, bool) or not isinstance(v, (int, float))):
            raise ResultFileError(f"{path} key {k}", f"is not a number: {v!r}")
    return data


def _text_list(data: dict, key: str, path: Path) -> None:
    v = data.get(key)
    if v is not None and not (isinstance(v, list) and all(isinstance(x, str) for x in v)):
        raise ResultFileError(f"{path} key {key}", "is not a list of text")


def read_summary(path: Path) -> dict:
    """summary.json of a solve (a text status, numbers where numbers belong, warnings as a
    list of text)."""
    data = read_json(path, SUMMARY_NUMBERS, status=True)
    for key in ("warnings", "solver_warnings"):
        _text_list(data, key, path)
    return data


def read_retune(path: Path) -> dict:
    """retune.json of a retune folder."""
    data = read_json(path, RETUNE_NUMBERS)
    _text_list(data, "violations_before", path)
    return data


def is_png(data: bytes) -> bool:
    return data[:8] == b"\x89PNG\r\n\x1a\n"


def read_png(path: Path) -> bytes:
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise ResultFileError(path, f"cannot be read: {first_line(exc)}") from None
    if not is_png(data):
        raise ResultFileError(path, "not a PNG image")
    return data


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
    header_line = _leading_comments(p) + 1
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

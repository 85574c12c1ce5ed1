"""The one reader of result folders: the files `solve`, `retune` and `simulate` write, read
back typed against their schemas (declared once, here).

Used by the report (read_result in report_data.py reads a whole folder through it) and by
`simulate --allocation` (read_allocation: the allocation of a result folder, checked against
the case). Any problem is a ResultFileError (an input error, exit code 2) naming file, row and
column; readers stop at the first problem, so the message is one line.

Column kinds: "text"; "bool" (true/false, yes/no, 1/0; blank allowed only where a reader is
lenient); "num" (a finite number, not blank); "num?" (blank allowed, read as NaN); "num?inf"
(blank and ±inf allowed). `complete=True` (the report: the folder as the tool wrote it) needs
every column the tool always writes; `complete=False` (a hand-made allocation for simulate)
needs only the core columns and fills the others with defaults.
"""

from __future__ import annotations

import csv
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from optreserve.errors import CaseError, Problem

if TYPE_CHECKING:
    from optreserve.case.data import Case

MAX_PROBLEMS = 50  # cross-checks against a case collect at most this many
_TRUE = {"true", "1", "yes", "y", "t"}
_FALSE = {"false", "0", "no", "n", "f"}


class ResultFileError(CaseError):
    """A result file is missing or cannot be read (exit code 2; nothing is written)."""

    def __init__(self, file, message: str, row: int | None = None,
                 column: str | None = None):
        super().__init__([Problem(str(file), message, row, column)])


class _At(Problem):
    """A problem located by line and column of a JSON text (not a CSV row)."""

    def __str__(self) -> str:
        return f"{self.file} line {self.row} column {self.column}: {self.message}"


@dataclass(frozen=True)
class Column:
    name: str
    kind: str  # "text", "bool", "num", "num?", "num?inf"
    always: bool = True  # the tool always writes it (needed when reading complete)
    core: bool = False  # needed even when reading leniently
    default: Any = ""  # filled in for an absent column when reading leniently
    at_least: float | None = None  # lower bound, with `above` deciding > or >=
    above: bool = False


def _cols(*cols: Column) -> dict[str, Column]:
    return {c.name: c for c in cols}


ALLOCATION = _cols(
    Column("unit", "text", core=True), Column("area", "text", core=True),
    Column("period", "text", always=False),  # horizons only
    Column("provides", "bool", default=None),
    Column("droop_pct", "num?", default=math.nan, at_least=0.0, above=True),
    Column("gain_mw_per_hz", "num", core=True, at_least=0.0),
    Column("headroom_up_mw", "num", core=True, at_least=0.0),
    Column("headroom_down_mw", "num", core=True, at_least=0.0),
    Column("cost_per_h", "num", default=math.nan))
EVENTS = _cols(
    Column("event", "text"), Column("kind", "text"), Column("area", "text"),
    Column("period", "text", always=False),
    Column("size_mw", "num"), Column("settled_frequency_hz", "num"),
    Column("settled_deviation_hz", "num"), Column("limit_hz", "num"), Column("binding", "bool"),
    # blank where the fixed-integer dual says nothing (droop steps)
    Column("marginal_cost_per_mw_h", "num?"),
    # the re-solve price, when the run computed it
    Column("incremental_cost_per_mw_h", "num?", always=False))
LINKS = _cols(
    Column("link", "text"), Column("event", "text"), Column("period", "text", always=False),
    Column("flow_before_mw", "num"), Column("flow_after_mw", "num"), Column("limit_mw", "num"),
    Column("loading_pct", "num"))
DIAGNOSIS = _cols(
    Column("family", "text"), Column("element", "text"), Column("event", "text"),
    Column("period", "text", always=False),
    Column("short_mw", "num?"), Column("excess_hz", "num?inf"), Column("over_mw", "num?"))
PROPOSAL = _cols(
    Column("unit", "text"), Column("area", "text"),
    Column("droop_now_pct", "num?"), Column("droop_proposed_pct", "num?"),
    Column("change", "text"), Column("droop_change_pct", "num"),
    Column("headroom_up_now_mw", "num"), Column("headroom_up_proposed_mw", "num"),
    Column("headroom_down_now_mw", "num"), Column("headroom_down_proposed_mw", "num"),
    Column("reason", "text"))
BEFORE_AFTER = _cols(
    Column("event", "text"), Column("period", "text", always=False),
    Column("settled_frequency_before_hz", "num?"), Column("settled_frequency_after_hz", "num"),
    Column("margin_before_hz", "num?"), Column("margin_after_hz", "num"),
    Column("worst_link_before", "text", always=False),
    Column("loading_before_pct", "num?", always=False),
    Column("worst_link_after", "text", always=False),
    Column("loading_after_pct", "num?", always=False))
# schedule_wide.csv: unit, direction, then one numeric column per period
SCHEDULE_WIDE = _cols(Column("unit", "text"), Column("direction", "text"))
SCHEMAS = {"allocation.csv": ALLOCATION, "events.csv": EVENTS, "links.csv": LINKS,
           "diagnosis.csv": DIAGNOSIS, "proposal.csv": PROPOSAL,
           "before_after.csv": BEFORE_AFTER, "schedule_wide.csv": SCHEDULE_WIDE}
# Files of other studies (prices.csv, simulation_summary.csv) have open column sets: they are
# typed by content (read_table with schema None).

SUMMARY_NUMBERS = ("objective_per_h", "objective_total", "objective_with_penalty",
                   "change_penalty", "mip_gap", "headroom_up_mw", "headroom_down_mw",
                   "horizon_hours", "periods", "units_providing", "dead_band_iterations")
RETUNE_NUMBERS = ("units_changed", "total_droop_change_pct", "cost_before_per_h",
                  "cost_after_per_h")


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


def read_table(path: Path, schema: dict[str, Column] | None, complete: bool = True,
               extra_kind: str = "text", lines: bool = False) -> pd.DataFrame:
    """A result CSV with its columns typed; the first problem is a ResultFileError naming file,
    row (physical line) and column. schema None: typed by content. extra_kind: the kind of
    columns the schema does not name (schedule_wide.csv: "num"). lines: add a `_line` column
    (physical line of each row) for later cross-checks."""
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
    if schema is None:
        out = _by_content(raw)
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
        raise CaseError([_At(str(path), f"not valid JSON: {exc.msg}", exc.lineno,
                             str(exc.colno))]) from None
    if not isinstance(data, dict):
        raise ResultFileError(path, "not a JSON object")
    if status and not isinstance(data.get("status"), str):
        raise ResultFileError(f"{path} key status", "missing or not text")
    for k in numbers:
        v = data.get(k)
        if v is not None and (isinstance(v, bool) or not isinstance(v, (int, float))):
            raise ResultFileError(f"{path} key {k}", f"is not a number: {v!r}")
    return data


def read_summary(path: Path) -> dict:
    """summary.json of a solve (a text status, numbers where numbers belong)."""
    return read_json(path, SUMMARY_NUMBERS, status=True)


def read_retune(path: Path) -> dict:
    """retune.json of a retune folder."""
    data = read_json(path, RETUNE_NUMBERS)
    v = data.get("violations_before")
    if v is not None and not (isinstance(v, list) and all(isinstance(x, str) for x in v)):
        raise ResultFileError(f"{path} key violations_before", "is not a list of text")
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


def check_allocation(case: Case, df: pd.DataFrame, file: str) -> None:
    """Raise CaseError with every problem (up to MAX_PROBLEMS) of allocation_problems."""
    problems = allocation_problems(case, df, file)
    if problems:
        raise CaseError(problems[:MAX_PROBLEMS])


def allocation_problems(case: Case, df: pd.DataFrame, file: str) -> list[Problem]:
    """Cross-check an allocation table (read or in memory) against the case: known units in
    their areas, the case's periods, one row per unit and period, gains that match the droop
    on the unit's capacity."""
    probs: list[Problem] = []

    def err(message, row=None, column=None):
        probs.append(Problem(file, message, row, column))

    lines = (df["_line"].to_numpy() if "_line" in df.columns
             else np.arange(len(df), dtype=np.int64) + 2)
    for c in ("unit", "area", "gain_mw_per_hz", "headroom_up_mw", "headroom_down_mw"):
        if c not in df.columns:
            err("required column is missing", 1, c)
    if probs:
        return probs
    u = case.units
    upos = {x: k for k, x in enumerate(u["unit"])}
    units = df["unit"].astype(str).to_numpy(object)
    i = np.array([upos.get(x, -1) for x in units])
    for r in np.nonzero(i < 0)[0][:50]:
        err(f"unknown unit '{units[r][:40]}' (not in units.csv of the case)", int(lines[r]),
            "unit")
    ok = i >= 0
    areas = df["area"].astype(str).to_numpy(object)
    case_area = u["area"].to_numpy(object)
    for r in np.nonzero(ok)[0][areas[ok] != case_area[i[ok]]][:50]:
        err(f"unit '{units[r]}' is in area '{case_area[i[r]]}' in the case, not "
            f"'{areas[r][:40]}'", int(lines[r]), "area")
    per = (df["period"].fillna("").astype(str).to_numpy(object) if "period" in df.columns
           else np.full(len(df), "", dtype=object))
    labels = [str(p) for p in case.periods]
    if case.is_horizon and (per == "").all():
        err("the case has periods: a period column with the case's period labels is required",
            1, "period")
        return probs
    if case.is_horizon:
        known = set(labels)
        for r in np.nonzero(~pd.Series(per).isin(known).to_numpy())[0][:50]:
            err(f"period '{per[r][:40]}' is not a period of the case", int(lines[r]), "period")
    else:
        for r in np.nonzero(per != "")[0][:1]:
            err("the case is a single snapshot: the allocation must not have periods",
                int(lines[r]), "period")
    key = pd.Series(units + "\x00" + per)
    dup = key.duplicated().to_numpy() & ok
    for r in np.nonzero(dup)[0][:50]:
        err(f"unit '{units[r]}' appears twice" + (f" for period '{per[r]}'" if per[r] else ""),
            int(lines[r]), "unit")
    gain = df["gain_mw_per_hz"].to_numpy(float)
    if "provides" in df.columns:
        prov = df["provides"].to_numpy(object)
        said_no = prov == False  # elementwise on an object array: a blank (None) is not "no"
        for r in np.nonzero(said_no & (gain > 0))[0][:50]:
            err(f"provides is false but gain_mw_per_hz is {gain[r]:g}", int(lines[r]),
                "provides")
    if "droop_pct" in df.columns:
        droop = df["droop_pct"].to_numpy(float)
        cap = u["capacity_mw"].to_numpy(float)[np.maximum(i, 0)]
        with np.errstate(divide="ignore", invalid="ignore"):
            expect = cap / (droop / 100.0 * case.nominal_frequency_hz)
        bad = ok & (gain > 0) & np.isfinite(droop) & (
            np.abs(expect - gain) > 1e-4 * np.maximum(gain, 1.0))
        for r in np.nonzero(bad)[0][:50]:
            err(f"droop_pct {droop[r]:g} on capacity {cap[r]:g} MW gives {expect[r]:.6g} "
                f"MW/Hz, not gain_mw_per_hz {gain[r]:.6g}: allocation of another case?",
                int(lines[r]), "droop_pct")
    if probs:
        return probs
    need = [(x, p) for p in (labels or [""]) for x in u["unit"]]
    have = set(zip(units, per))
    missing = [(x, p) for x, p in need if (x, p) not in have]
    for x, p in missing[:50]:
        err(f"no row for unit '{x}'" + (f" in period '{p}'" if p else ""), None, "unit")
    return probs

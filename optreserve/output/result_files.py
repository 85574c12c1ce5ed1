"""Reading one result file back: a CSV typed against its schema (output/schemas.py), a JSON
object, a PNG. The first problem is a ResultFileError (an input error, exit code 2) naming
file, row (physical line) and column, so the message is one line. output/folder.py reads a
whole folder with these.

`complete=True` (the report: the folder as the tool wrote it) needs every column the tool
always writes; `complete=False` (a hand-made allocation for simulate) needs only the core
columns, fills the others with defaults and reads a blank true/false cell as "not said".
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pandas as pd

from optreserve.errors import CaseError, Problem
from optreserve.output.cells import unescape
from optreserve.output.schemas import RETUNE_NUMBERS, SUMMARY_NUMBERS, Column

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


def leading_comments(path: Path) -> int:
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
        skip = leading_comments(path)
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
        if kind == "text":  # our writer quotes formula-like cells (output/cells.py): undo it
            out[name] = unescape(s.to_numpy(object))
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

"""Reading one CSV file of a case through pandas' C parser, and typing its cells.

The parser keeps every cell as text (dtype=str, no NA guessing); this module types the
columns itself from the column table (columns.py), so every problem still names file, row
and column. Rows are physical lines: `#` comment lines and blank lines are dropped before
parsing and the line number of each kept line is remembered, so the header is row 1 when
nothing precedes it, and a comment or blank line still counts as a line (docs/case-format.md,
"General rules"). A quoted value that spans lines would shift that mapping and is an input
error naming the row where it starts.

Rules applied the same way to every cell, quoted or not: Unicode whitespace around a value
(spaces, tabs, non-breaking spaces, ...) is removed (str.strip); numbers are plain decimals
written with ASCII digits only.
"""

from __future__ import annotations

import io
import itertools
import math
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from optreserve.case.columns import TINY, Col, num_text
from optreserve.case.problems import _Collector, suggest

TRUE_WORDS = {"true", "1", "yes", "y", "t"}
FALSE_WORDS = {"false", "0", "no", "n", "f"}

# appended to every line before parsing: its position gives each row's field count (the C
# parser pads short rows silently); a file containing it is refused (it never belongs in text)
_END = "\x1e"
_SPARE = 64  # extra fields a row may have beyond the header's (empty ones are tolerated)
_ASCII_SPACE = re.compile(r"[\t\x0b\x0c\x1c-\x1f ]")  # ASCII text without these: no strip
_NUM_CHARS = re.compile(r"[0-9eE+\-.,]*")
_NUM_RE = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")


@dataclass
class _Coded:
    """A column as its distinct cells: row r holds words[codes[r]] (stripped text; words may
    repeat). A year of quarter-hours has ten million rows but few distinct periods, ids and
    values: the cells are typed and checked once per word, and each bad row is still
    reported by its own row (docs/performance.md, "Reading long horizons")."""
    codes: np.ndarray  # one per row, the smallest integer type that holds them
    words: np.ndarray  # object array of str

    def __len__(self) -> int:
        return len(self.codes)

    def cells(self) -> np.ndarray:
        return self.words[self.codes]


@dataclass
class _Table:
    file: str
    header_line: int
    header: list[str]
    columns: list  # per header column: an object array of stripped strings, or a _Coded
    lines: np.ndarray  # physical line number of each data row


def _decode(path: Path, label: str, col: _Collector) -> str | None:
    try:
        raw = path.read_bytes()
    except OSError as exc:
        col.error(label, f"cannot be read ({exc.strerror or exc})")
        return None
    if raw.startswith(b"\xef\xbb\xbf"):  # spreadsheet exports often add a byte-order mark
        raw = raw[3:]
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        col.error(label, "is not UTF-8 text (binary or another encoding)", row=line)
        return None
    for bad, what in (("\x00", "a NUL byte: not a text CSV file"),
                      (_END, "the control character U+001E: not a text CSV file")):
        if bad in text:
            line = text[: text.index(bad)].count("\n") + 1
            col.error(label, f"contains {what}", row=line)
            return None
    if "\r" in text:  # one line ending for the parser and for the line numbers
        text = text.replace("\r\n", "\n").replace("\r", "\n")
    return text


def _read_csv(path: Path, label: str, col: _Collector) -> _Table | None:
    """The file's header and cells (stripped text) with the physical line of every row."""
    text = _decode(path, label, col)
    if text is None:
        return None
    body = text.removesuffix("\n")
    lines = body.split("\n") if body else []
    kept = np.arange(1, len(lines) + 1, dtype=np.int64)  # physical line of each kept line
    if "#" in body:  # whole-line comments go before parsing (a '#' inside a value stays)
        keep = [k for k, ln in enumerate(lines) if not ln.lstrip().startswith("#")]
        kept = kept[keep]
        lines = [lines[k] for k in keep]
    if not lines:
        col.error(label, "is empty: a header row is required", row=1)
        return None
    marked = f",{_END}\n".join(lines) + f",{_END}\n"
    # room for the header's fields plus the end mark; rows with more fields (empty ones at the
    # end are tolerated) make the parser stop, and the parse is redone wide enough for them,
    # but not for thousands of stray commas on one line (reported by the parser instead)
    header_commas = next((ln for ln in lines if ln.strip()), "").count(",")
    try:
        try:
            grid = _parse(marked, header_commas + 2)
        except pd.errors.ParserError as exc:
            if "Expected" not in str(exc):
                raise
            widest = max(map(str.count, lines, itertools.repeat(",")))
            grid = _parse(marked, min(widest, header_commas + _SPARE) + 2)
    except (pd.errors.ParserError, ValueError) as exc:
        _parser_problem(str(exc), kept, label, col)
        return None
    ends = grid == _END
    n_fields = ends.argmax(axis=1)
    if len(grid) != len(lines) or not ends.any(axis=1).all():
        # a quoted value ran over a line break: two lines became one row, so the line numbers
        # of the rows after it are unknown; the first such row is where the value starts
        lost = ~ends.any(axis=1) | np.array([any("\n" in c for c in r) for r in grid])
        k = int(np.nonzero(lost)[0][0]) if lost.any() else len(grid) - 1
        col.error(label, "a quoted value spans more than one line (line breaks are not allowed "
                  "inside a value)", int(kept[min(k, len(kept) - 1)]))
        return None
    if not (text.isascii() and not _ASCII_SPACE.search(text)):
        grid[:, : int(n_fields.max())] = np.vectorize(str.strip, otypes=[object])(
            grid[:, : int(n_fields.max())])
    blank = n_fields == 1
    if blank.any():  # blank (or whitespace-only) lines are skipped
        blank &= grid[:, 0] == ""
        grid, n_fields, kept = grid[~blank], n_fields[~blank], kept[~blank]
        if not len(grid):
            col.error(label, "is empty: a header row is required", row=1)
            return None
    header_line = int(kept[0])
    width = int(n_fields[0])
    header = list(grid[0, :width])
    if width == 1 and ";" in header[0]:
        col.error(label, "uses ';' as delimiter; the case format is comma separated", header_line)
        return None
    seen: set[str] = set()
    for h in header:
        if h == "":
            col.error(label, "empty column name in header", header_line)
        elif h in seen:
            col.error(label, f"column '{h}' appears twice in the header", header_line, h)
        seen.add(h)
    data, nf, line_no = grid[1:], n_fields[1:], kept[1:]
    ragged = nf != width
    if ragged.any():
        extra_empty = (nf > width) & np.array(
            [all(c == "" for c in r[width:f]) for r, f in zip(data, nf)], dtype=bool)
        for k in np.nonzero(ragged & ~extra_empty)[0]:
            col.error(label, f"has {int(nf[k])} fields, header has {width}", int(line_no[k]))
        ok = ~ragged | extra_empty
        data, line_no = data[ok], line_no[ok]
    return _Table(label, header_line, header, [data[:, k] for k in range(width)],
                  np.asarray(line_no, dtype=np.int64))


def _parse(marked: str, width: int) -> np.ndarray:
    """The C parser on the marked text: every cell as text, nothing guessed."""
    return pd.read_csv(io.StringIO(marked), header=None, names=range(width), dtype=str,
                       keep_default_na=False, na_filter=False, index_col=False,
                       skip_blank_lines=False, skipinitialspace=True, low_memory=False,
                       engine="c").to_numpy(object)


def _parser_problem(msg: str, kept: np.ndarray, label: str, col: _Collector) -> None:
    """The C parser's own complaint, located on the physical line."""
    m = re.search(r"Expected (\d+) fields in line (\d+), saw (\d+)", msg)
    if m:
        line = int(kept[min(int(m.group(2)) - 1, len(kept) - 1)])
        col.error(label, f"has {int(m.group(3)) - 1} fields, far more than the header", line)
        return
    m = re.search(r"row (\d+)", msg)
    row = int(kept[min(int(m.group(1)), len(kept) - 1)]) if m else None
    col.error(label, "a quote opened on this row is never closed" if "EOF inside string" in msg
              else f"cannot be parsed as CSV ({msg.split('. ')[-1][:80]})", row)


def _parse_float(s: str) -> float | None:
    if not _NUM_RE.fullmatch(s):
        return None
    v = float(s)
    return v if math.isfinite(v) else None


def _not_a_number(x: str, ok_fmt: bool) -> str:
    low = x.lower().lstrip("+-")
    if low in ("nan", "inf", "infinity"):
        return "NaN/inf is not allowed"
    if ok_fmt:
        return "is not a finite number"
    if any(ch.isdigit() and not ch.isascii() for ch in x):
        return "is not a number (only the ASCII digits 0-9 are accepted)"
    return "is not a number"


def _bounded(c: Col) -> bool:
    return c.lo is not None or c.hi is not None


def _bound_message(c: Col, v: float) -> str | None:
    if c.lo is not None and (v <= c.lo if c.lo_open else v < c.lo):
        return f"must be {'>' if c.lo_open else '>='} {num_text(c.lo)}"
    if c.hi is not None and v > c.hi:
        return f"must be <= {num_text(c.hi)}"
    if _bounded(c) and v != 0 and abs(v) < TINY:
        return (f"is too small to mean anything (non-zero but below {num_text(TINY)} in "
                "magnitude; write 0)")
    return None


def _typed_table(t: _Table, cols: list[Col], col: _Collector,
                 unknown_hint: dict[str, str] | None = None,
                 skip_absent: bool = False) -> pd.DataFrame | None:
    """Check header and cells; return a typed DataFrame with defaults filled, plus a line column.
    unknown_hint: columns that are an error here (with the reason) rather than ignored.
    skip_absent: optional columns the header lacks get no column (override tables: an absent
    column keeps every static value, and a year of NaN columns would cost gigabytes).
    A _Coded column's text columns come back as pandas Categorical (codes, not one string
    per row); its number and flag columns as plain arrays."""
    header_line = t.header_line
    known = {c.name for c in cols}
    ok = True
    for c in cols:
        if c.required and c.name not in t.header:
            col.error(t.file, "required column is missing"
                      + suggest(c.name, [h for h in t.header if h not in known]),
                      header_line, c.name)
            ok = False
    for h in t.header:
        if h and unknown_hint and h in unknown_hint:
            col.error(t.file, unknown_hint[h], header_line, h)
            ok = False
        elif h and h not in known:
            col.warn(t.file, "unknown column ignored"
                     + suggest(h, [c.name for c in cols if c.name not in t.header]),
                     header_line, h)
    if not ok:
        return None
    pos = {h: k for k, h in enumerate(t.header)}
    lines = np.asarray(t.lines)  # int64 from CSV, int32 from Parquet (half the memory)
    n = len(lines)
    df = pd.DataFrame(index=range(n))
    for c in cols:  # column by column, vectorised; a loop only over the bad cells
        if c.name not in pos and skip_absent and not c.required:
            continue
        raw = t.columns[pos[c.name]] if c.name in pos else np.full(n, "", dtype=object)
        if isinstance(raw, _Coded) and c.kind == "id":
            raw = raw.cells()  # unique ids: one word per row anyway
        if isinstance(raw, _Coded):
            df[c.name] = _typed_coded(c, raw, lines, t.file, col)
            t.columns[pos[c.name]] = None  # consumed: the table is read once (no two copies)
            continue
        empty = raw == ""
        if c.required:
            for r in np.nonzero(empty)[0]:
                col.error(t.file, "value is required", int(lines[r]), c.name)
        if c.kind in ("id", "text"):
            df[c.name] = pd.Series(_typed_text(c, raw, empty, lines, t.file, col), dtype=object)
        elif c.kind == "float":
            df[c.name] = _typed_float(c, raw, empty, lines, t.file, col)
        elif c.kind == "bool":
            df[c.name] = _typed_bool(c, raw, empty, lines, t.file, col)
    df["_line"] = lines
    return df


def _typed_coded(c: Col, raw: _Coded, lines, file, col):
    """One _Coded column typed word by word; every problem is reported on each row holding
    the bad word, in row order, with the message the row-by-row path gives."""
    codes, words = raw.codes, raw.words
    empty_w = words == ""
    if c.required:
        for r in np.nonzero(empty_w[codes])[0]:
            col.error(file, "value is required", int(lines[r]), c.name)
    if c.kind == "text":
        vals = np.where(empty_w, c.default if c.default is not None else "", words)
        # distinct words of the used codes only: a Categorical needs unique categories, and a
        # word no row holds (an unused Parquet dictionary entry) must not reach the checks
        used = np.nonzero(np.bincount(codes, minlength=len(words)))[0]
        new, cats = pd.factorize(vals[used].astype(object))
        remap = np.zeros(len(words), dtype=np.int32)
        remap[used] = new
        return pd.Categorical.from_codes(remap[codes], categories=pd.Index(cats, dtype=object))
    if c.kind == "float":
        return _typed_float(c, words, empty_w, lines, file, col, codes)
    return _typed_bool(c, words, empty_w, lines, file, col, codes)


def _rows(bad: np.ndarray, codes: np.ndarray | None) -> np.ndarray:
    """Rows holding a bad cell: `bad` is per row, or per word when codes are given."""
    return np.nonzero(bad if codes is None else bad[codes])[0]


def _word(codes: np.ndarray | None, r):
    return r if codes is None else codes[r]


def _typed_text(c: Col, raw, empty, lines, file, col) -> np.ndarray:
    vals = np.where(empty, c.default if c.default is not None else "", raw)
    if c.kind == "id":
        ser = pd.Series(raw)
        dup = ser.duplicated(keep="first").to_numpy() & ~empty
        if dup.any():
            firsts = ~ser.duplicated().to_numpy()
            first = dict(zip(ser[firsts], lines[firsts]))
            for r in np.nonzero(dup)[0]:
                col.error(file, f"duplicate id '{raw[r]}' (first at row {first[raw[r]]})",
                          int(lines[r]), c.name)
    return vals


def _typed_float(c: Col, raw, empty, lines, file, col, codes=None) -> np.ndarray:
    """Numbers of one column. With codes, raw and empty are per distinct word and row r holds
    word codes[r]: each word is parsed and checked once, each bad row still reported."""
    n = len(raw)
    num = np.full(n, np.nan)
    given_raw = raw[~empty]
    try:  # every cell a plain ASCII decimal: numpy converts the column at once
        if not _NUM_CHARS.fullmatch(",".join(given_raw)):
            raise ValueError
        num[~empty] = given_raw.astype(float)
        ok_fmt = np.ones(n, dtype=bool)
    except ValueError:
        ok_fmt = np.array([bool(_NUM_RE.fullmatch(x)) for x in raw], dtype=bool)
        sel = ok_fmt & ~empty
        num[sel] = raw[sel].astype(float)
    bad = ~empty & (~ok_fmt | ~np.isfinite(num))
    for r in _rows(bad, codes):
        w = _word(codes, r)
        col.error(file, f"{_not_a_number(raw[w], bool(ok_fmt[w]))}: '{raw[w][:40]}'",
                  int(lines[r]), c.name)
    default = np.nan if c.default is None else float(c.default)
    vals = np.where(empty | bad, default, num)
    given = ~empty & ~bad
    with np.errstate(invalid="ignore"):
        out = np.zeros(n, dtype=bool)
        if c.lo is not None:
            out |= (vals <= c.lo) if c.lo_open else (vals < c.lo)
        if c.hi is not None:
            out |= vals > c.hi
        if _bounded(c):
            out |= (vals != 0) & (np.abs(vals) < TINY)
    suspect = given & out if c.check is None else given
    if codes is None:
        for r in np.nonzero(suspect)[0]:
            msg = _bound_message(c, vals[r])
            if msg is None and c.check is not None:
                msg = c.check(vals[r])
            if msg is not None:
                col.error(file, f"{msg} (got {raw[r]})", int(lines[r]), c.name)
        return vals.astype(float)
    msgs = {}  # word -> message, then every row holding a bad word, in row order
    for w in np.nonzero(suspect)[0]:
        msg = _bound_message(c, vals[w])
        if msg is None and c.check is not None:
            msg = c.check(vals[w])
        if msg is not None:
            msgs[w] = msg
    if msgs:
        bad_w = np.zeros(n, dtype=bool)
        bad_w[list(msgs)] = True
        for r in _rows(bad_w, codes):
            w = codes[r]
            col.error(file, f"{msgs[w]} (got {raw[w]})", int(lines[r]), c.name)
    return vals.astype(float)[codes]


def _typed_bool(c: Col, raw, empty, lines, file, col, codes=None):
    """Flags of one column; with codes, raw and empty are per word as in _typed_float."""
    low = pd.Series(raw, dtype=object).str.lower()
    is_t = low.isin(TRUE_WORDS).to_numpy()
    is_f = low.isin(FALSE_WORDS).to_numpy()
    bad = ~empty & ~is_t & ~is_f
    for r in _rows(bad, codes):
        w = _word(codes, r)
        col.error(file, f"expected true or false, got '{raw[w][:40]}'", int(lines[r]), c.name)
    if codes is not None:
        is_t, is_f = is_t[codes], is_f[codes]
    if c.default is None:
        v = np.full(len(is_t), None, dtype=object)
        v[is_t] = True
        v[is_f] = False
        return pd.Series(v, dtype=object)
    return np.where(is_t, True, np.where(is_f, False, bool(c.default)))

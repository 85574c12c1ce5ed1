"""Read and validate a case folder (contract: docs/case-format.md, version 1).

Every problem is located by file, row (physical line, header = 1 when the file has no
comment lines above it) and column. All problems found in one pass are reported together,
up to MAX_PROBLEMS; the caller gets a CaseError and nothing else happens.
"""

from __future__ import annotations

import csv
import functools
import math
import re
import time
import tomllib
from collections import deque
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pandas as pd

from optreserve.case.data import Case, DroopSettings, Limits, SolverSettings
from optreserve.case.rules import fill_limits, rule_warnings
from optreserve.errors import CaseError, Problem

MAX_PROBLEMS = 50

# Common practice: governor droop settings between 2 % and 12 %; dead bands above 50 mHz are
# far outside what grid codes accept for frequency-containment providers.
DROOP_WARN_LOW_PCT, DROOP_WARN_HIGH_PCT = 2.0, 12.0
DEADBAND_WARN_MHZ = 50.0

TRUE_WORDS = {"true", "1", "yes", "y", "t"}
FALSE_WORDS = {"false", "0", "no", "n", "f"}


class _TooMany(Exception):
    pass


class _Collector:
    def __init__(self) -> None:
        self.problems: list[Problem] = []
        self.warnings: list[str] = []
        self.dropped = 0

    def error(self, file: str, message: str, row: int | None = None, column: str | None = None):
        if len(self.problems) >= MAX_PROBLEMS:
            self.dropped += 1
            return
        self.problems.append(Problem(file, message, row, column))

    def warn(self, file: str, message: str, row: int | None = None, column: str | None = None):
        self.warnings.append(str(Problem(file, message, row, column)))

    def raise_if_any(self) -> None:
        if self.problems:
            order = {f: k for k, f in enumerate(dict.fromkeys(p.file for p in self.problems))}
            probs = sorted(self.problems, key=lambda p: (order[p.file], p.row or 0))
            if self.dropped:
                probs.append(Problem(probs[-1].file, f"... and {self.dropped} more problems"))
            raise CaseError(probs)


# --------------------------------------------------------------------------- columns
@dataclass(frozen=True)
class Col:
    name: str
    kind: str  # "id", "text", "float", "bool"
    required: bool = False
    default: Any = None
    check: Callable[[float], str | None] | None = None  # returns a message when bad


def _positive(v: float) -> str | None:
    return None if v > 0 else "must be > 0"


def _nonneg(v: float) -> str | None:
    return None if v >= 0 else "must be >= 0"


UNIT_COLS = [
    Col("unit", "id", True),
    Col("area", "text", True),
    Col("capacity_mw", "float", True, check=_positive),
    Col("output_mw", "float", True),
    Col("min_output_mw", "float", False, 0.0),
    Col("droop_min_pct", "float", True, check=_positive),
    Col("droop_max_pct", "float", True, check=_positive),
    Col("droop_now_pct", "float", False, math.nan, check=_positive),
    Col("deadband_mhz", "float", False, 0.0, check=_nonneg),
    Col("reserve_up_max_mw", "float", False, math.nan, check=_nonneg),
    Col("reserve_down_max_mw", "float", False, math.nan, check=_nonneg),
    Col("price_up_per_mw_h", "float", False, 0.0, check=_nonneg),
    Col("price_down_per_mw_h", "float", False, 0.0, check=_nonneg),
    Col("provides", "bool", False, True),
    Col("inertia_s", "float", False, math.nan, check=_nonneg),
    Col("activation_time_s", "float", False, math.nan, check=_positive),
    Col("energy_price_per_mwh", "float", False, math.nan),
]
AREA_COLS = [
    Col("area", "id", True),
    Col("load_mw", "float", True, check=_nonneg),
    Col("load_damping_pct_per_hz", "float", False, 0.0, check=_nonneg),
    Col("min_own_reserve_mw", "float", False, 0.0, check=_nonneg),
]
LINK_COLS = [
    Col("link", "id", True),
    Col("from_area", "text", True),
    Col("to_area", "text", True),
    Col("reactance_pu", "float", True, check=_positive),
    Col("limit_mw", "float", True, check=_positive),
    Col("flow_mw", "float", False, 0.0),
]
EVENT_COLS = [
    Col("event", "id", True),
    Col("kind", "text", True),
    Col("unit", "text", False, ""),
    Col("area", "text", False, ""),
    Col("size_mw", "float", False, math.nan),
    Col("period", "text", False, ""),
]
EVENT_KINDS = ("unit_trip", "load_step")

_PLAIN_NUMS = re.compile(r"[0-9eE+\-.]*")
_NUM_RE = re.compile(r"^[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?$")


@dataclass
class _Table:
    file: str
    header_line: int
    header: list[str]
    columns: list[np.ndarray]  # one object array of stripped strings per header column
    lines: np.ndarray  # physical line number of each data row


def _read_csv(path: Path, label: str, col: _Collector) -> _Table | None:
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
    if "\x00" in text:
        line = text[: text.index("\x00")].count("\n") + 1
        col.error(label, "contains a NUL byte: not a text CSV file", row=line)
        return None
    all_lines = text.splitlines()
    if "#" not in text and "\n\n" not in text and all_lines and all_lines[0].strip():
        numbered = list(enumerate(all_lines, start=1))  # nothing to skip (the common case)
    else:
        numbered = [(k + 1, ln) for k, ln in enumerate(all_lines)
                    if ln.strip() and not ln.lstrip().startswith("#")]
    if not numbered:
        col.error(label, "is empty: a header row is required", row=1)
        return None
    header_line, header_text = numbered[0]
    header = [h.strip() for h in next(csv.reader([header_text]))]
    if len(header) == 1 and ";" in header_text:
        col.error(label, "uses ';' as delimiter; the case format is comma separated", header_line)
        return None
    seen: set[str] = set()
    for h in header:
        if h == "":
            col.error(label, "empty column name in header", header_line)
        elif h in seen:
            col.error(label, f"column '{h}' appears twice in the header", header_line, h)
        seen.add(h)
    body = numbered[1:]
    width = len(header)
    texts = [ln for _, ln in body]
    if '"' not in text and all(ln.count(",") == width - 1 for ln in texts):
        # plain file (no quoting, no ragged rows): split directly, one array per column
        grid = np.array([ln.split(",") for ln in texts], dtype=object).reshape(len(texts), width)
        padded = any(p in text for p in (" ,", ", ", "\t", " \n", "\n ", " \r")) or \
            text.startswith(" ") or text.endswith(" ")
        columns = [_strip(grid[:, k]) if padded else grid[:, k] for k in range(width)]
        lines = np.array([n for n, _ in body], dtype=np.int64)
        return _Table(label, header_line, header, columns, lines)
    rows, lines = [], []
    for (line_no, _), cells in zip(body, csv.reader(texts)):
        cells = [c.strip() for c in cells]
        if len(cells) != width:
            if len(cells) > width and all(c == "" for c in cells[width:]):
                cells = cells[:width]
            else:
                col.error(label, f"has {len(cells)} fields, header has {width}", line_no)
                continue
        rows.append(cells)
        lines.append(line_no)
    grid = np.array(rows, dtype=object).reshape(len(rows), width)
    return _Table(label, header_line, header, [grid[:, k] for k in range(width)],
                  np.array(lines, dtype=np.int64))


def _series_file(csv_path: Path, col: _Collector, lab):
    """NAME_by_period.csv, or NAME_by_period.parquet in its place: (path, reader) or
    (None, None) when neither is there; both at once is an error."""
    pq = csv_path.with_suffix(".parquet")
    if csv_path.is_file() and pq.is_file():
        col.error(lab(pq.name), f"given together with {csv_path.name}: keep one of them")
        return None, None
    if pq.is_file():
        return pq, _read_parquet
    return (csv_path, _read_csv) if csv_path.is_file() else (None, None)


def _read_parquet(path: Path, label: str, col: _Collector) -> _Table | None:
    """A Parquet time series as the CSV reader's _Table (every cell as text), so that each
    check and message is the CSV one. Rows are numbered as in the same table written as CSV
    (header row 1, first record row 2)."""
    try:
        df = pd.read_parquet(path)
    except Exception as exc:  # noqa: BLE001 - pyarrow raises several kinds for a bad file
        col.error(label, f"cannot be read as Parquet ({type(exc).__name__}: {exc})"[:300])
        return None
    header = [str(c) for c in df.columns]
    columns = []
    for c in df.columns:
        # one text per distinct value, shared by its cells: a year of quarter-hours has ten
        # million rows but few distinct periods, ids and values (memory, docs/performance.md)
        codes, uniq = pd.factorize(df[c], use_na_sentinel=True)
        words = _strip(np.append(pd.Series(uniq).astype(str).to_numpy(dtype=object), ""))
        columns.append(words[codes])  # code -1 (missing) takes the last word, ""
    return _Table(label, 1, header, columns, np.arange(len(df), dtype=np.int64) + 2)


def _strip(a: np.ndarray) -> np.ndarray:
    if any(x != x.strip() for x in a):
        return np.array([x.strip() for x in a], dtype=object)
    return a


def _parse_float(s: str) -> float | None:
    if not _NUM_RE.match(s):
        return None
    try:
        v = float(s)
    except ValueError:
        return None
    return v if math.isfinite(v) else None


def _typed_table(t: _Table, cols: list[Col], col: _Collector,
                 unknown_hint: dict[str, str] | None = None) -> pd.DataFrame | None:
    """Check header and cells; return a typed DataFrame with defaults filled, plus a line column.
    unknown_hint: columns that are an error here (with the reason) rather than ignored."""
    header_line = t.header_line
    known = {c.name for c in cols}
    ok = True
    for c in cols:
        if c.required and c.name not in t.header:
            col.error(t.file, "required column is missing", header_line, c.name)
            ok = False
    for h in t.header:
        if h and unknown_hint and h in unknown_hint:
            col.error(t.file, unknown_hint[h], header_line, h)
            ok = False
        elif h and h not in known:
            col.warn(t.file, "unknown column ignored", header_line, h)
    if not ok:
        return None
    pos = {h: k for k, h in enumerate(t.header)}
    lines = np.asarray(t.lines, dtype=np.int64)
    n = len(lines)
    df = pd.DataFrame(index=range(n))
    for c in cols:  # column by column, vectorised; a loop only over the bad cells
        if c.name in pos:
            k = pos[c.name]
            raw = t.columns[k]
        else:
            raw = np.full(n, "", dtype=object)
        empty = raw == ""
        if c.required:
            for r in np.nonzero(empty)[0]:
                col.error(t.file, "value is required", int(lines[r]), c.name)
        if c.kind in ("id", "text"):
            vals = np.where(empty, c.default if c.default is not None else "", raw)
            if c.kind == "id":
                ser = pd.Series(raw)
                dup = ser.duplicated(keep="first").to_numpy() & ~empty
                first = dict(zip(ser[~ser.duplicated()], lines[~ser.duplicated().to_numpy()]))
                for r in np.nonzero(dup)[0]:
                    col.error(t.file, f"duplicate id '{raw[r]}' (first at row {first[raw[r]]})",
                              int(lines[r]), c.name)
            df[c.name] = pd.Series(vals, dtype=object)
        elif c.kind == "float":
            num = np.full(n, np.nan)
            try:  # fast path: every non-empty cell is a plain decimal number
                if not _PLAIN_NUMS.fullmatch("".join(raw[~empty])):
                    raise ValueError
                num[~empty] = raw[~empty].astype(float)
                ok_fmt = np.ones(n, dtype=bool)
            except ValueError:
                ok_fmt = np.array([bool(_NUM_RE.match(x)) for x in raw], dtype=bool)
                sel = ok_fmt & ~empty
                num[sel] = raw[sel].astype(float)
            bad = ~empty & (~ok_fmt | ~np.isfinite(num))
            for r in np.nonzero(bad)[0]:
                x = raw[r]
                low = x.lower().lstrip("+-")
                what = "NaN/inf is not allowed" if low in ("nan", "inf", "infinity") else (
                    "is not a finite number" if ok_fmt[r] else "is not a number")
                col.error(t.file, f"{what}: '{x[:40]}'", int(lines[r]), c.name)
            default = np.nan if c.default is None else float(c.default)
            vals = np.where(empty | bad, default, num)
            if c.check is not None:
                given = ~empty & ~bad
                with np.errstate(invalid="ignore"):  # the common checks, vectorised
                    suspect = (given & (vals <= 0) if c.check is _positive else
                               given & (vals < 0) if c.check is _nonneg else given)
                for r in np.nonzero(suspect)[0]:
                    if (msg := c.check(vals[r])) is not None:
                        col.error(t.file, f"{msg} (got {raw[r]})", int(lines[r]), c.name)
            df[c.name] = vals.astype(float)
        elif c.kind == "bool":
            low = pd.Series([x.lower() for x in raw], dtype=object)
            is_t = low.isin(TRUE_WORDS).to_numpy()
            is_f = low.isin(FALSE_WORDS).to_numpy()
            bad = ~empty & ~is_t & ~is_f
            for r in np.nonzero(bad)[0]:
                col.error(t.file, f"expected true or false, got '{raw[r][:40]}'",
                          int(lines[r]), c.name)
            if c.default is None:
                v = np.full(n, None, dtype=object)
                v[is_t] = True
                v[is_f] = False
                df[c.name] = pd.Series(v, dtype=object)
            else:
                df[c.name] = np.where(is_t, True, np.where(is_f, False, bool(c.default)))
    df["_line"] = lines
    return df


# --------------------------------------------------------------------------- case.toml
_TOML_SCHEMA: dict[str, dict[str, str]] = {
    "": {"name": "str", "nominal_frequency_hz": "pos"},
    "limits": {
        "max_settled_deviation_hz": "pos",
        "full_activation_deviation_hz": "pos",
        "max_nadir_deviation_hz": "pos",
        "max_rocof_hz_per_s": "pos",
        "rules": "str",  # a regulatory parameter set (rules.py) filling the limits not given
    },
    "droop": {"steps_pct": "poslist", "change_penalty_per_unit": "nonneg",
              "hold_periods": "posint"},
    "horizon": {"period_hours": "pos"},
    "solver": {"time_limit_s": "pos", "mip_gap": "nonneg"},
    "energy": {"co_optimise": "bool"},
}


def _toml_line(text: str, section: str, key: str) -> int | None:
    current = ""
    for k, ln in enumerate(text.splitlines(), start=1):
        s = ln.strip()
        m = re.match(r"^\[\s*([A-Za-z0-9_.\-]+)\s*\]", s)
        if m:
            current = m.group(1)
            continue
        if current == section and re.match(rf"^{re.escape(key)}\s*=", s):
            return k
    return None


def _read_toml(path: Path, label: str, col: _Collector) -> dict[str, Any] | None:
    try:
        text = path.read_bytes().decode("utf-8-sig")
    except OSError as exc:
        col.error(label, f"cannot be read ({exc.strerror or exc})")
        return None
    except UnicodeDecodeError:
        col.error(label, "is not UTF-8 text")
        return None
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        m = re.search(r"line (\d+)", str(exc))
        col.error(label, f"is not valid TOML: {str(exc).split(' (at')[0]}",
                  int(m.group(1)) if m else None)
        return None

    out: dict[str, Any] = {}
    for section, value in doc.items():
        if isinstance(value, dict):
            if section not in _TOML_SCHEMA:
                col.warn(label, f"unknown section [{section}] ignored",
                         _toml_line(text, "", f"[{section}]"))
                continue
            items = value.items()
            sec = section
        else:
            items = [(section, value)]
            sec = ""
        for key, v in items:
            where = f"{sec}.{key}" if sec else key
            line = _toml_line(text, sec, key)
            kind = _TOML_SCHEMA[sec].get(key)
            if kind is None:
                col.warn(label, f"unknown key '{where}' ignored", line, where)
                continue
            if kind == "str":
                if not isinstance(v, str):
                    col.error(label, "must be a string", line, where)
                    continue
            elif kind in ("pos", "nonneg"):
                if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                    col.error(label, f"must be a finite number, got {v!r}", line, where)
                    continue
                if kind == "pos" and v <= 0:
                    col.error(label, f"must be > 0, got {v}", line, where)
                    continue
                if kind == "nonneg" and v < 0:
                    col.error(label, f"must be >= 0, got {v}", line, where)
                    continue
                v = float(v)
            elif kind == "bool":
                if not isinstance(v, bool):
                    col.error(label, f"must be true or false, got {v!r}", line, where)
                    continue
            elif kind == "posint":
                if isinstance(v, bool) or not isinstance(v, int) or v < 1:
                    col.error(label, f"must be a whole number >= 1, got {v!r}", line, where)
                    continue
            elif kind == "poslist":
                if not isinstance(v, list) or not v or not all(
                    isinstance(x, (int, float)) and not isinstance(x, bool)
                    and math.isfinite(x) and x > 0 for x in v
                ):
                    col.error(label, "must be a non-empty list of positive numbers", line, where)
                    continue
                v = tuple(sorted({float(x) for x in v}))
            out[where] = v
    return out


# --------------------------------------------------------------------------- the folder
def load_case(path: str | Path) -> Case:
    """Read and validate a case folder; raise CaseError listing every problem found."""
    t0 = time.perf_counter()
    folder = Path(path)
    col = _Collector()
    if not folder.is_dir():
        col.error(str(folder), "is not a case folder (expected a directory with case.toml)")
        col.raise_if_any()

    def lab(name: str) -> str:
        return str(folder / name)

    # case.toml
    settings: dict[str, Any] = {}
    if not (folder / "case.toml").is_file():
        col.error(lab("case.toml"), "is missing")
    else:
        settings = _read_toml(folder / "case.toml", lab("case.toml"), col) or {}
        if (msg := fill_limits(settings)) is not None:  # [limits] rules = "NAME"
            col.error(lab("case.toml"), msg, _toml_line(
                (folder / "case.toml").read_text(encoding="utf-8-sig"), "limits", "rules"),
                "limits.rules")

    tables: dict[str, pd.DataFrame | None] = {}
    for name, cols, required in (
        ("units.csv", UNIT_COLS, True),
        ("areas.csv", AREA_COLS, True),
        ("links.csv", LINK_COLS, False),
        ("events.csv", EVENT_COLS, True),
    ):
        p = folder / name
        if not p.is_file():
            if required:
                col.error(lab(name), "is missing")
            tables[name] = None
            continue
        t = _read_csv(p, lab(name), col)
        tables[name] = _typed_table(t, cols, col) if t is not None else None

    series_raw: dict[str, pd.DataFrame] = {}
    for key, (idc, cols) in SERIES.items():
        p = folder / f"{key}_by_period.csv"
        p, read = _series_file(p, col, lab)
        if p is not None:
            t = read(p, lab(p.name), col)
            if t is not None:
                over = [Col(c.name, c.kind, False,
                            math.nan if c.kind == "float" else None, c.check)
                        for c in cols if c.name in SERIES_COLS[key]]
                df = _typed_table(t, [Col("period", "text", True), Col(idc, "text", True)]
                                  + over, col, unknown_hint=SERIES_HINT[key])
                if df is not None:
                    df.attrs["file"] = str(p)  # messages name the file actually read
                    series_raw[key] = df
    for extra in sorted(folder.glob("*_by_period.csv")):
        if extra.name.split("_by_period")[0] not in SERIES:
            col.warn(lab(extra.name), "unknown time-series file ignored (expected units_, "
                     "areas_ or links_by_period.csv)")

    units, areas = tables["units.csv"], tables["areas.csv"]
    links, events = tables["links.csv"], tables["events.csv"]

    if settings is not None and "limits.max_settled_deviation_hz" not in settings and (
        folder / "case.toml"
    ).is_file() and not any(p.file == lab("case.toml") for p in col.problems):
        col.error(lab("case.toml"), "required key is missing", None,
                  "limits.max_settled_deviation_hz")

    # ---- cross checks (only on tables that parsed)
    area_ids: set[str] = set(areas["area"]) if areas is not None else set()
    if areas is not None and len(areas) == 0:
        col.error(lab("areas.csv"), "has no rows: at least one area is required", 1)
    if units is not None:
        _check_units(units, lab("units.csv"), area_ids if areas is not None else None, col)
        if len(units) == 0:
            col.error(lab("units.csv"), "has no rows: at least one unit is required", 1)
    if links is None:
        links = pd.DataFrame({c.name: pd.Series(dtype=float if c.kind == "float" else object)
                              for c in LINK_COLS})
        links["_line"] = pd.Series(dtype=int)
    else:
        _check_links(links, lab("links.csv"), area_ids if areas is not None else None, col)
    if events is not None and units is not None and areas is not None:
        _check_events(events, lab("events.csv"), units, area_ids, col)
        if len(events) == 0:
            col.error(lab("events.csv"), "has no rows: at least one event is required", 1)
    if areas is not None and len(areas) > 1 and not col.problems:
        _check_connected(areas, links, lab("links.csv"), col)

    periods: tuple = ()
    hours: tuple = ()
    series: dict[str, pd.DataFrame] = {}
    if not col.problems and (series_raw or (events is not None and (events["period"] != "").any())):
        periods, hours, series = _check_series(
            folder, series_raw, units, areas, links, events, settings, col)

    col.raise_if_any()
    assert units is not None and areas is not None and events is not None
    events["period"] = events["period"].map(lambda v: v if v else None).astype(object)
    if not periods and events["period"].notna().any():
        pass

    f_n = settings.get("nominal_frequency_hz")
    if f_n is None:
        f_n = 50.0
        col.warn(lab("case.toml"), "nominal_frequency_hz not given; 50 Hz assumed")
    F = settings["limits.max_settled_deviation_hz"]
    F_act = settings.get("limits.full_activation_deviation_hz", F)
    if F_act < F:
        col.warn(
            lab("case.toml"),
            f"full_activation_deviation_hz ({F_act}) is below max_settled_deviation_hz ({F}): "
            "providers saturate beyond it, so every settled point is kept within "
            f"{F_act} Hz (the unsaturated range)",
        )
    for file, msg, row, column in rule_warnings(settings.get("limits.rules"), units, events):
        col.warn(lab(file), msg, row, column)
    if settings.get("limits.max_nadir_deviation_hz") is not None:
        prov = units["provides"].to_numpy(bool)
        if units["inertia_s"].isna().all():
            col.warn(lab("units.csv"), "max_nadir_deviation_hz is set but no unit has "
                     "inertia_s: the nadir requirement is skipped", None, "inertia_s")
        n_no_t = int((prov & units["activation_time_s"].isna().to_numpy()).sum())
        if n_no_t:
            col.warn(lab("units.csv"), f"{n_no_t} provider(s) without activation_time_s are "
                     "taken to deliver in 30 s for the nadir requirement", None,
                     "activation_time_s")
    steps = settings.get("droop.steps_pct")
    if steps is not None:
        lo = units["droop_min_pct"].to_numpy()
        hi = units["droop_max_pct"].to_numpy()
        s = np.asarray(steps)
        has = ((s[None, :] >= lo[:, None] - 1e-9) & (s[None, :] <= hi[:, None] + 1e-9)).any(1)
        for (_, r), ok in zip(units.iterrows(), has):
            if r["provides"] and not ok:
                col.warn(lab("units.csv"), f"no droop step lies inside the band of unit "
                         f"'{r['unit']}'; it cannot provide", int(r["_line"]), "droop_min_pct")

    case = Case(
        name=settings.get("name", folder.name),
        nominal_frequency_hz=float(f_n),
        limits=Limits(
            max_settled_deviation_hz=F,
            full_activation_deviation_hz=F_act,
            max_nadir_deviation_hz=settings.get("limits.max_nadir_deviation_hz"),
            max_rocof_hz_per_s=settings.get("limits.max_rocof_hz_per_s"),
        ),
        droop=DroopSettings(
            steps_pct=steps,
            change_penalty_per_unit=settings.get("droop.change_penalty_per_unit", 0.0),
        ),
        solver=SolverSettings(
            time_limit_s=settings.get("solver.time_limit_s"),
            mip_gap=settings.get("solver.mip_gap"),
        ),
        units=units.drop(columns="_line").reset_index(drop=True),
        areas=areas.drop(columns="_line").reset_index(drop=True),
        links=links.drop(columns="_line").reset_index(drop=True),
        events=events.drop(columns="_line").reset_index(drop=True),
        path=folder,
        warnings=tuple(col.warnings),
        periods=periods,
        period_hours=hours,
        series=series,
        hold_periods=settings.get("droop.hold_periods"),
        co_optimise=bool(settings.get("energy.co_optimise", False)),
    )
    return case.replace(read_time_s=time.perf_counter() - t0)


# ------------------------------------------------------------------ time series
SERIES = {"units": ("unit", UNIT_COLS), "areas": ("area", AREA_COLS),
          "links": ("link", LINK_COLS)}
SERIES_COLS = {
    "units": {"output_mw", "min_output_mw", "reserve_up_max_mw", "reserve_down_max_mw",
              "energy_price_per_mwh",
              "price_up_per_mw_h", "price_down_per_mw_h", "provides"},
    "areas": {"load_mw", "load_damping_pct_per_hz", "min_own_reserve_mw"},
    "links": {"limit_mw", "flow_mw", "reactance_pu"},
}
_SETTING = "is a setting of the unit, not a time series (it cannot vary by period)"
SERIES_HINT = {
    "units": {c: _SETTING for c in ("area", "capacity_mw", "droop_min_pct", "droop_max_pct",
                                    "droop_now_pct", "deadband_mhz", "inertia_s",
                                    "activation_time_s")},
    "areas": {},
    "links": {c: "is a property of the link, not a time series" for c in ("from_area",
                                                                          "to_area")},
}


@functools.lru_cache(maxsize=100_000)
def _period_key(label: str):
    """Integers sort as numbers, anything else must be an ISO-8601 timestamp."""
    if re.fullmatch(r"[+-]?\d+", label):
        return ("int", int(label))
    try:  # ISO-8601 only (what datetime.fromisoformat reads), not any date-like text
        ts = pd.Timestamp(datetime.fromisoformat(label))
    except (ValueError, TypeError):
        return None
    if ts.tzinfo is not None:
        ts = ts.tz_convert("UTC").tz_localize(None)
    return ("time", ts)


def _check_series(folder, series_raw, units, areas, links, events, settings, col):
    """Validate the *_by_period tables against the static ones; return the period labels in
    order, their lengths in hours and the override tables (NaN = keep the static value)."""
    ids = {"units": set(units["unit"]), "areas": set(areas["area"]), "links": set(links["link"])}
    sets: dict[str, set] = {}
    keys: dict[str, tuple] = {}
    bad = False
    for key, df in series_raw.items():
        idc = SERIES[key][0]
        file = df.attrs.get("file", str(folder / f"{key}_by_period.csv"))
        per_arr = df["period"].to_numpy(object)
        id_arr = df[idc].to_numpy(object)
        line_arr = df["_line"].to_numpy()
        for per in dict.fromkeys(per_arr):
            k = _period_key(per)
            if k is None:
                first = int(line_arr[np.nonzero(per_arr == per)[0][0]])
                col.error(file, f"period '{per[:40]}' is neither an integer nor an ISO-8601 "
                          "timestamp", first, "period")
                bad = True
            else:
                keys[per] = k
        for r in np.nonzero(~pd.Series(id_arr).isin(ids[key]).to_numpy())[0][:MAX_PROBLEMS]:
            col.error(file, f"unknown {idc} '{id_arr[r]}' (not in {key}.csv)", int(line_arr[r]),
                      idc)
        dup = df.duplicated(subset=["period", idc], keep="first").to_numpy()
        if dup.any():
            first_line = {(p_, i_): ln for p_, i_, ln, d_ in zip(per_arr, id_arr, line_arr, dup)
                          if not d_}
            for r in np.nonzero(dup)[0][:MAX_PROBLEMS]:
                col.error(file, f"duplicate row for period '{per_arr[r]}' and {idc} "
                          f"'{id_arr[r]}' (first at row {first_line[(per_arr[r], id_arr[r])]})",
                          int(line_arr[r]), idc)
        sets[key] = set(df["period"])
    ev_file = str(folder / "events.csv")
    ev_periods = [(p, int(ln)) for p, ln in zip(events["period"], events["_line"]) if p]
    for per, line in ev_periods:
        k = _period_key(per)
        if k is None:
            col.error(ev_file, f"period '{per[:40]}' is neither an integer nor an ISO-8601 "
                      "timestamp", line, "period")
            bad = True
        else:
            keys[per] = k
    if bad:
        return (), (), {}
    kinds = {k[0] for k in keys.values()}
    if len(kinds) > 1:
        col.error(str(folder), "periods mix integers and timestamps; use one kind throughout")
        return (), (), {}
    if sets:
        names = sorted(sets)
        ref = sets[names[0]]
        for other in names[1:]:
            if sets[other] != ref:
                diff = sorted(ref.symmetric_difference(sets[other]), key=lambda p: keys[p][1])
                col.error(str(folder / f"{other}_by_period.csv"), "periods differ from "
                          f"{names[0]}_by_period.csv (e.g. '{diff[0]}'): every time-series file "
                          "must list the same periods")
                return (), (), {}
        labels = ref
        for per, line in ev_periods:
            if per not in labels:
                col.error(ev_file, f"period '{per}' is not a period of the time series", line,
                          "period")
    else:
        labels = {p for p, _ in ev_periods}
    # same instant written two ways ("2026-01-01T00:00" and "2026-01-01 00:00") is one period
    order = sorted(labels, key=lambda p: keys[p][1])
    if len({keys[p][1] for p in order}) != len(order):
        col.error(str(folder), "two period labels name the same period")
        return (), (), {}
    period_hours = settings.get("horizon.period_hours")
    if kinds == {"time"} and len(order) > 1:
        ts = [keys[p][1] for p in order]
        gaps = [(b - a).total_seconds() / 3600.0 for a, b in zip(ts[:-1], ts[1:])]
        hours = gaps + [period_hours if period_hours else gaps[-1]]
    else:
        hours = [period_hours if period_hours else 1.0] * len(order)
    # value checks on the combined (static + override) data
    if "units" in series_raw:
        _check_unit_series(series_raw["units"], units, series_raw["units"].attrs.get(
            "file", str(folder / "units_by_period.csv")), col)
    out = {}
    for key, df in series_raw.items():
        idc = SERIES[key][0]
        keep = ["period", idc] + [c for c in df.columns if c in SERIES_COLS[key]]
        out[key] = df[keep].reset_index(drop=True)
    return tuple(order), tuple(float(h) for h in hours), out


def _check_unit_series(ser, units, file, col):
    """output within [min_output, capacity] in every period, overrides applied (vectorised)."""
    base = units.set_index("unit")
    known = ser["unit"].isin(base.index).to_numpy()
    s = ser[known]
    b = base.loc[s["unit"]]
    out = s["output_mw"].fillna(pd.Series(b["output_mw"].to_numpy(), index=s.index))
    mn = s["min_output_mw"].fillna(pd.Series(b["min_output_mw"].to_numpy(), index=s.index))
    cap = b["capacity_mw"].to_numpy()
    bad = ~((mn.to_numpy() <= out.to_numpy()) & (out.to_numpy() <= cap))
    for k in np.nonzero(bad)[0]:
        r = s.iloc[k]
        col.error(file, f"output_mw {out.iloc[k]:g} outside [min_output_mw {mn.iloc[k]:g}, "
                  f"capacity_mw {cap[k]:g}] in period '{r['period']}'", int(r["_line"]),
                  "output_mw")


def _check_units(u: pd.DataFrame, file: str, area_ids: set[str] | None, col: _Collector):
    """Cross-column checks, vectorised; a loop only over the rows that fail."""
    line = u["_line"].to_numpy()
    area = u["area"].to_numpy(object)
    cap, out, mn = (u[c].to_numpy(float) for c in ("capacity_mw", "output_mw", "min_output_mw"))
    lo, hi = u["droop_min_pct"].to_numpy(float), u["droop_max_pct"].to_numpy(float)
    db = u["deadband_mhz"].to_numpy(float)
    if area_ids is not None:
        for k in np.nonzero((area != "") & ~pd.Series(area).isin(area_ids).to_numpy())[0]:
            col.error(file, f"unknown area '{area[k]}' (not in areas.csv)", int(line[k]), "area")
    with np.errstate(invalid="ignore"):
        over = mn > cap
        outside = ~over & ~np.isnan(cap + out + mn) & ~((mn <= out) & (out <= cap))
        crossed = (lo > 0) & (hi > 0) & (lo > hi)
        unusual = (lo > 0) & (hi > 0) & ~crossed & ((lo < DROOP_WARN_LOW_PCT)
                                                     | (hi > DROOP_WARN_HIGH_PCT))
        wide = db > DEADBAND_WARN_MHZ
    for k in np.nonzero(over)[0]:
        col.error(file, f"min_output_mw {mn[k]:g} exceeds capacity_mw {cap[k]:g}", int(line[k]),
                  "min_output_mw")
    for k in np.nonzero(outside)[0]:
        col.error(file, f"output_mw {out[k]:g} outside [min_output_mw {mn[k]:g}, capacity_mw "
                  f"{cap[k]:g}]", int(line[k]), "output_mw")
    for k in np.nonzero(crossed)[0]:
        col.error(file, f"droop_min_pct {lo[k]:g} exceeds droop_max_pct {hi[k]:g}", int(line[k]),
                  "droop_min_pct")
    for k in np.nonzero(unusual)[0]:
        col.warn(file, f"droop band {lo[k]:g}-{hi[k]:g} % lies outside the usual 2-12 %",
                 int(line[k]), "droop_min_pct" if lo[k] < DROOP_WARN_LOW_PCT else "droop_max_pct")
    for k in np.nonzero(wide)[0]:
        col.warn(file, f"dead band {db[k]:g} mHz is over 50 mHz", int(line[k]), "deadband_mhz")


def _check_links(lk: pd.DataFrame, file: str, area_ids: set[str] | None, col: _Collector):
    for _, r in lk.iterrows():
        line = int(r["_line"])
        for c in ("from_area", "to_area"):
            if area_ids is not None and r[c] and r[c] not in area_ids:
                col.error(file, f"unknown area '{r[c]}' (not in areas.csv)", line, c)
        if r["from_area"] and r["from_area"] == r["to_area"]:
            col.error(file, "from_area and to_area must differ", line, "to_area")
        if r["limit_mw"] > 0 and abs(r["flow_mw"]) > r["limit_mw"]:
            col.warn(file, f"pre-event flow {r['flow_mw']:g} MW already exceeds the limit", line,
                     "flow_mw")


def _check_events(ev: pd.DataFrame, file: str, units: pd.DataFrame, area_ids: set[str],
                  col: _Collector):
    unit_area = dict(zip(units["unit"], units["area"]))
    unit_out = dict(zip(units["unit"], units["output_mw"]))
    areas_out, sizes = [], []
    from_output = np.zeros(len(ev), dtype=bool)
    for _, r in ev.iterrows():
        line = int(r["_line"])
        kind, size, area = r["kind"], r["size_mw"], r["area"]
        if kind not in EVENT_KINDS:
            if kind:
                col.error(file, f"kind must be unit_trip or load_step, got '{kind}'", line, "kind")
        elif kind == "unit_trip":
            u = r["unit"]
            if not u:
                col.error(file, "a unit_trip needs a unit", line, "unit")
            elif u not in unit_area:
                col.error(file, f"unknown unit '{u}' (not in units.csv)", line, "unit")
            else:
                if area and area != unit_area[u]:
                    col.error(file, f"area '{area}' differs from the unit's area "
                              f"'{unit_area[u]}'", line, "area")
                area = unit_area[u]
                if math.isnan(size):
                    size = unit_out[u]
                    from_output[len(sizes)] = True
                if size == 0:
                    col.warn(file, f"unit '{u}' trips at zero output: no disturbance", line,
                             "size_mw")
        else:
            if r["unit"]:
                col.warn(file, "unit is ignored for a load_step", line, "unit")
            if not area:
                col.error(file, "a load_step needs an area", line, "area")
            elif area not in area_ids:
                col.error(file, f"unknown area '{area}' (not in areas.csv)", line, "area")
            if math.isnan(size):
                col.error(file, "a load_step needs size_mw", line, "size_mw")
            elif size == 0:
                col.error(file, "size_mw must not be zero (> 0 demand rises, < 0 drops)", line,
                          "size_mw")
        areas_out.append(area)
        sizes.append(size)
    ev["area"] = areas_out
    ev["size_mw"] = np.asarray(sizes, float)
    ev["size_from_output"] = from_output


def _check_connected(areas: pd.DataFrame, links: pd.DataFrame, file: str, col: _Collector):
    ids = list(areas["area"])
    adj: dict[str, set[str]] = {a: set() for a in ids}
    for f, t in zip(links["from_area"], links["to_area"]):
        if f in adj and t in adj:
            adj[f].add(t)
            adj[t].add(f)
    seen = {ids[0]}
    todo = deque([ids[0]])
    while todo:
        for b in adj[todo.popleft()]:
            if b not in seen:
                seen.add(b)
                todo.append(b)
    missing = [a for a in ids if a not in seen]
    if missing:
        col.error(file, "areas are not all connected by links (one synchronous system is "
                  f"required): no path from '{ids[0]}' to {', '.join(repr(m) for m in missing)}")

"""One self-contained HTML report of a result folder (report.html).

Reads the files `solve --out` writes (allocation.csv, events.csv, links.csv, summary.json,
schedule_wide.csv for horizons, diagnosis.csv when infeasible) and, when present, the
simulation outputs (simulation_summary.csv and PNG plots). A case folder, given or recorded in
summary.json, adds the case settings, dead bands, load self-regulation and period lengths.

The page has no external assets: the CSS and a few lines of script are inline, the plots are
inline SVG drawn with matplotlib (its Figure API, no GUI backend), simulation PNGs are embedded
as base64. It opens offline. Nothing is written unless every file reads cleanly; the page is
written to a temporary file first and then renamed into place.
"""

from __future__ import annotations

import base64
import functools
import html
import io
import json
import math
import os
import re
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd

from optreserve import __version__
from optreserve.errors import OptreserveError
from optreserve.output.results import CAUTION

REPORT_NAME = "report.html"

# Tables longer than this are summarised on the page (the CSV holds every row).
FULL_TABLE_MAX_ROWS = 3000
# The headroom heat map shows at most this many units (largest total headroom first).
HEATMAP_MAX_UNITS = 60

# ------------------------------------------------------------------ visual identity
# "Slate and signal": warm paper, ink-blue text, teal for what the allocation does, amber for
# limits, brick red where a limit is reached.
PAPER = "#f4f1ea"
CARD = "#ffffff"
INK = "#1c2733"
MUTED = "#5f6b78"
RULE = "#e2ddd2"
ACCENT = "#0e7c7b"
ACCENT_DARK = "#0a5a59"
LIMIT = "#cf8a05"
ALERT = "#b3364a"
AREA_COLOURS = ["#0e7c7b", "#7b4f9d", "#c4841d", "#3a5ba6", "#5b8c3a", "#b65232",
                "#2d8db6", "#a1457a", "#6f6a2a", "#44546a"]
LONG_CAUTION = ("The results depend on the data and on the simplifications stated in "
                "docs/formulation.md (a quasi-steady-state settled point, DC tie flows). The "
                "applicable grid code, the system operator and licensed engineers decide the "
                "actual governor settings, reserve holdings and operating limits.")


class ReportError(OptreserveError):
    """A result file is missing or cannot be read (exit code 2; nothing is written)."""

    exit_code = 2


# ------------------------------------------------------------------ reading the result folder
# Column kinds: "text", "bool", "num" (required number), "num?" (empty allowed),
# "num?inf" (empty and inf allowed).
_SCHEMAS = {
    "allocation.csv": {"unit": "text", "area": "text", "provides": "bool", "droop_pct": "num?",
                       "gain_mw_per_hz": "num", "headroom_up_mw": "num",
                       "headroom_down_mw": "num", "cost_per_h": "num"},
    "events.csv": {"event": "text", "kind": "text", "area": "text", "size_mw": "num",
                   "settled_frequency_hz": "num", "settled_deviation_hz": "num",
                   "limit_hz": "num", "binding": "bool", "marginal_cost_per_mw_h": "num?"},
    "links.csv": {"link": "text", "event": "text", "flow_before_mw": "num",
                  "flow_after_mw": "num", "limit_mw": "num", "loading_pct": "num"},
    "diagnosis.csv": {"family": "text", "element": "text", "event": "text", "short_mw": "num?",
                      "excess_hz": "num?inf", "over_mw": "num?"},
}
_TRUE = {"true", "1", "yes", "y", "t"}
_FALSE = {"false", "0", "no", "n", "f"}
_SUMMARY_NUMBERS = ("objective_per_h", "objective_total", "objective_with_penalty",
                    "change_penalty", "mip_gap", "headroom_up_mw", "headroom_down_mw",
                    "horizon_hours", "periods", "units_providing", "dead_band_iterations")
_CASE_KEYS = ("case_dir", "case_path", "case_folder")


@dataclass
class ResultFolder:
    """Everything the report shows, read and checked."""

    folder: Path
    summary: dict | None = None
    allocation: pd.DataFrame | None = None
    events: pd.DataFrame | None = None
    links: pd.DataFrame | None = None
    schedule: pd.DataFrame | None = None
    diagnosis: pd.DataFrame | None = None
    simulation: pd.DataFrame | None = None
    prices: pd.DataFrame | None = None  # prices.csv, per area (and period), when written
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


def _uniq(values) -> list:
    """Distinct values in order of first appearance."""
    return list(pd.unique(pd.Series(values, dtype=object)))


def _first_line(exc: Exception) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def _leading_comments(path: Path) -> int:
    """Whole-line # comments above the header (simulation_summary.csv starts with one)."""
    n = 0
    with open(path, encoding="utf-8-sig", errors="replace") as fh:
        for line in fh:
            if not line.lstrip().startswith("#"):
                break
            n += 1
    return n


def read_table(path: Path, schema: dict | None) -> pd.DataFrame:
    """A result CSV with its columns typed; any problem is one ReportError naming file, row
    and column. schema None: every column that is wholly numeric becomes numeric."""
    try:
        skip = _leading_comments(path)
        raw = pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8-sig",
                          skip_blank_lines=False, skiprows=skip)
    except FileNotFoundError:
        raise ReportError(f"{path}: missing") from None
    except pd.errors.EmptyDataError:
        raise ReportError(f"{path}: empty file, no header") from None
    except (pd.errors.ParserError, UnicodeDecodeError, ValueError) as exc:
        raise ReportError(f"{path}: not a readable CSV file: {_first_line(exc)}") from None
    blank = (raw == "").all(axis=1) if raw.shape[1] else pd.Series(False, index=raw.index)
    raw = raw[~blank]
    lines = raw.index.to_numpy() + 2 + skip  # physical line: header is line 1 + comments
    out = pd.DataFrame(index=range(len(raw)))
    cols = list(raw.columns)
    if schema is None:  # a file of another study: type what is plainly numeric or true/false
        for c in cols:
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
    for c, kind in schema.items():
        if c not in raw.columns:
            raise ReportError(f"{path} column {c}: missing from the header")
    for c in cols:
        kind = schema.get(c, "num" if schema is _WIDE else "text")
        s = raw[c].astype(str).str.strip()
        if kind == "text":
            out[c] = s.to_numpy(object)
        elif kind == "bool":
            low = s.str.lower()
            bad = ~low.isin(_TRUE | _FALSE)
            if bad.any():
                k = int(np.argmax(bad.to_numpy()))
                raise ReportError(f"{path} row {lines[k]} column {c}: is not true or false: "
                                  f"{s.iloc[k]!r}")
            out[c] = low.isin(_TRUE).to_numpy(bool)
        else:
            empty = (s == "").to_numpy()
            v = pd.to_numeric(s.where(~empty), errors="coerce").to_numpy(float)
            isinf = np.isinf(v)
            bad = (~empty & np.isnan(v)) | (isinf & (kind != "num?inf"))
            if bad.any():
                k = int(np.argmax(bad))
                raise ReportError(f"{path} row {lines[k]} column {c}: is not a number: "
                                  f"{s.iloc[k]!r}")
            if kind == "num" and empty.any():
                k = int(np.argmax(empty))
                raise ReportError(f"{path} row {lines[k]} column {c}: is empty")
            out[c] = v
    return out


_WIDE = {"unit": "text", "direction": "text"}  # schedule_wide.csv: period columns numeric


def _read_summary(path: Path) -> dict:
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise ReportError(f"{path}: missing") from None
    except (UnicodeDecodeError, OSError) as exc:
        raise ReportError(f"{path}: cannot be read: {_first_line(exc)}") from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise ReportError(f"{path} line {exc.lineno} column {exc.colno}: not valid JSON: "
                          f"{exc.msg}") from None
    if not isinstance(data, dict):
        raise ReportError(f"{path}: not a JSON object")
    if not isinstance(data.get("status"), str):
        raise ReportError(f"{path} key status: missing or not text")
    for k in _SUMMARY_NUMBERS:
        v = data.get(k)
        if v is not None and (isinstance(v, bool) or not isinstance(v, (int, float))):
            raise ReportError(f"{path} key {k}: is not a number: {v!r}")
    return data


def _is_png(data: bytes) -> bool:
    return data[:8] == b"\x89PNG\r\n\x1a\n"


def read_result(result_dir, case_dir=None) -> ResultFolder:
    """Read and check a result folder (and the case folder when given or recorded)."""
    folder = Path(result_dir)
    if not folder.is_dir():
        raise ReportError(f"{folder}: no such result folder")
    rf = ResultFolder(folder=folder)
    has = {p.name for p in folder.iterdir() if p.is_file()}
    diag_newer = False
    if "diagnosis.csv" in has:
        diag_newer = ("summary.json" not in has or (folder / "diagnosis.csv").stat().st_mtime
                      > (folder / "summary.json").stat().st_mtime)
    if "allocation.csv" not in has and "diagnosis.csv" not in has:
        raise ReportError(f"{folder / 'allocation.csv'}: missing (and no diagnosis.csv): not "
                          "a result folder of optreserve solve --out")
    if diag_newer:  # the latest solve was infeasible: only diagnosis.csv is current
        rf.diagnosis = read_table(folder / "diagnosis.csv", _SCHEMAS["diagnosis.csv"])
        if "allocation.csv" in has:
            rf.notes.append("The latest solve into this folder found no feasible allocation "
                            "(diagnosis.csv is newer than the other result files); the older "
                            "allocation, event and link files are from an earlier run and are "
                            "not shown.")
    else:
        rf.summary = _read_summary(folder / "summary.json")
        for name in ("allocation.csv", "events.csv", "links.csv"):
            setattr(rf, name[:-4], read_table(folder / name, _SCHEMAS[name]))
        if "diagnosis.csv" in has:
            rf.notes.append("diagnosis.csv is older than summary.json (from an earlier, "
                            "infeasible run) and is not shown.")
        _check_consistent(rf)
        if rf.horizon and "schedule_wide.csv" in has:
            rf.schedule = read_table(folder / "schedule_wide.csv", _WIDE)
            missing = [p for p in rf.periods if p not in rf.schedule.columns]
            if missing:
                raise ReportError(f"{folder / 'schedule_wide.csv'} column {missing[0]}: "
                                  "missing (a period of allocation.csv)")
    if rf.solved and "prices.csv" in has:
        rf.prices = read_table(folder / "prices.csv", None)
    _read_simulation(rf, has)
    _attach_case(rf, case_dir)
    return rf


def _check_consistent(rf: ResultFolder) -> None:
    f = rf.folder
    per = {n: "period" in getattr(rf, n).columns for n in ("allocation", "events")}
    if per["allocation"] != per["events"]:
        raise ReportError(f"{f / 'events.csv'} column period: "
                          + ("missing" if per["allocation"] else "unexpected")
                          + " (allocation.csv " + ("has" if per["allocation"] else "has no")
                          + " period column)")
    periods = rf.summary.get("periods")
    if isinstance(periods, (int, float)) and periods > 1 and not rf.horizon:
        raise ReportError(f"{f / 'allocation.csv'} column period: missing, but summary.json "
                          f"says {int(periods)} periods")
    unknown = set(rf.links["event"]) - set(rf.events["event"])
    if unknown:
        raise ReportError(f"{f / 'links.csv'} column event: unknown event "
                          f"{sorted(unknown)[0]!r} (not in events.csv)")


def _read_simulation(rf: ResultFolder, has: set) -> None:
    f = rf.folder
    ref = f / "summary.json" if "summary.json" in has else None
    if "simulation_summary.csv" in has:
        rf.simulation = read_table(f / "simulation_summary.csv", None)
        if ref is not None and (f / "simulation_summary.csv").stat().st_mtime \
                < ref.stat().st_mtime:
            rf.notes.append("simulation_summary.csv is older than summary.json: the "
                            "simulation may belong to an earlier allocation.")
    pngs = sorted(n for n in has if n.lower().endswith(".png"))
    sub = f / "simulation"
    if sub.is_dir():
        pngs += sorted(f"simulation/{p.name}" for p in sub.iterdir()
                       if p.is_file() and p.name.lower().endswith(".png"))
    order = list(rf.events["event"].drop_duplicates()) if rf.events is not None else []

    def key(name):  # in event order where the file name names an event
        hits = [k for k, e in enumerate(order) if str(e) in name]
        return (hits[0] if hits else len(order), name)

    for name in sorted(pngs, key=key):
        try:
            data = (f / name).read_bytes()
        except OSError as exc:
            raise ReportError(f"{f / name}: cannot be read: {_first_line(exc)}") from None
        if not _is_png(data):
            raise ReportError(f"{f / name}: not a PNG image")
        rf.sim_images.append((name, data))


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
            raise ReportError(f"{rf.folder / 'allocation.csv'} column unit: does not match "
                              f"the case folder {where} ({odd[0]!r} is in only one of them)")
        if rf.horizon and [str(p) for p in case.periods] != [str(p) for p in rf.periods]:
            raise ReportError(f"{rf.folder / 'allocation.csv'} column period: the periods do "
                              f"not match the case folder {where}")
    rf.case = case
    rf.case_dir = where


# ------------------------------------------------------------------ the physics behind the plots
def response_curves(allocation: pd.DataFrame, deviation_hz, deadband_hz=None) -> pd.DataFrame:
    """Settled response of the providing units, summed per area, at each frequency deviation.

    Per unit: K (|Δf| − d)⁺, capped at the headroom in that direction, with the sign of the
    power it adds (positive = more generation, for under-frequency). The same quasi-steady
    model as the independent settled point (settle.py), written here from the gains and the
    headroom of one period of allocation.csv. deadband_hz: per row of `allocation`, in Hz
    (None: no dead bands). Returns one row per deviation (index, Hz) and one column per area,
    MW."""
    x = np.asarray(deviation_hz, float)[:, None]
    K = allocation["gain_mw_per_hz"].to_numpy(float)[None, :]
    d = (np.zeros(K.shape[1]) if deadband_hz is None else np.asarray(deadband_hz, float))[None, :]
    up = allocation["headroom_up_mw"].to_numpy(float)[None, :]
    dn = allocation["headroom_down_mw"].to_numpy(float)[None, :]
    resp = np.where(x < 0, np.minimum(K * np.maximum(-x - d, 0.0), up),
                    -np.minimum(K * np.maximum(x - d, 0.0), dn))
    areas = _uniq(allocation["area"])
    pos = {a: k for k, a in enumerate(areas)}
    member = np.zeros((K.shape[1], len(areas)))
    member[np.arange(K.shape[1]), [pos[a] for a in allocation["area"]]] = 1.0
    return pd.DataFrame(resp @ member, index=pd.Index(x[:, 0], name="deviation_hz"),
                        columns=areas)


def _period_rows(df: pd.DataFrame, period) -> pd.DataFrame:
    return df if period is None or "period" not in df.columns else df[df["period"] == period]


def _case_period_index(rf: ResultFolder, period) -> int:
    if period is None or rf.case is None or not rf.case.is_horizon:
        return 0
    return [str(p) for p in rf.case.periods].index(str(period))


def _deadbands_hz(rf: ResultFolder, alloc: pd.DataFrame, period) -> np.ndarray | None:
    if rf.case is None:
        return None
    t = _case_period_index(rf, period)
    db = rf.case.unit_matrix("deadband_mhz")[t] / 1000.0
    pos = {u: k for k, u in enumerate(rf.case.units["unit"])}
    return np.asarray(db, float)[[pos[u] for u in alloc["unit"]]]


def _damping_mw_per_hz(rf: ResultFolder, period) -> dict | None:
    if rf.case is None:
        return None
    t = _case_period_index(rf, period)
    d = rf.case.area_matrix("load_mw")[t] * rf.case.area_matrix("load_damping_pct_per_hz")[t]
    return dict(zip(rf.case.areas["area"], np.asarray(d, float) / 100.0))


def _tightest_period(rf: ResultFolder):
    """The period of the event instance with the least margin (None for a snapshot)."""
    if not rf.horizon or not len(rf.events):
        return rf.periods[0] if rf.horizon else None
    ev = rf.events
    margin = ev["limit_hz"] - ev["settled_deviation_hz"].abs()
    return ev["period"].iloc[int(np.argmin(margin.to_numpy()))]


# ------------------------------------------------------------------ plots (matplotlib → SVG)
_RC = {
    "svg.fonttype": "none", "font.family": "sans-serif",
    "font.sans-serif": ["DejaVu Sans", "Liberation Sans", "Arial", "Helvetica"],
    "font.size": 9.0, "axes.titlesize": 10.0, "axes.titleweight": "bold",
    "axes.titlelocation": "left", "axes.titlepad": 8.0, "axes.labelsize": 9.0,
    "axes.edgecolor": "#a7afb8", "axes.labelcolor": INK, "axes.linewidth": 0.8,
    "text.color": INK, "xtick.color": MUTED, "ytick.color": MUTED,
    "xtick.labelsize": 8.5, "ytick.labelsize": 8.5,
    "axes.spines.top": False, "axes.spines.right": False,
    "axes.grid": True, "grid.color": "#ebe6dc", "grid.linewidth": 0.7,
    "axes.axisbelow": True, "figure.facecolor": CARD, "axes.facecolor": CARD,
    "legend.frameon": False, "legend.fontsize": 8.5, "savefig.facecolor": CARD,
}


def _styled(name: str):
    """Decorator: draw the plot inside the report's matplotlib style; the SVG ids get a salt
    of their own per plot so that several inline SVGs never share an id."""
    def wrap(fn):
        @functools.wraps(fn)
        def inner(*args, **kwargs):
            import matplotlib

            from optreserve.output.plotstyle import LITERAL_TEXT  # ids shown as written

            with matplotlib.rc_context({**_RC, **LITERAL_TEXT,
                                        "svg.hashsalt": f"optreserve-{name}"}):
                return fn(*args, **kwargs)
        return inner
    return wrap


def _new_figure(width_in: float, height_in: float):
    from matplotlib.figure import Figure  # no pyplot: no GUI backend, no global state

    return Figure(figsize=(width_in, height_in), layout="constrained")


def _svg(fig, name: str, label: str) -> str:
    """Inline SVG: no XML prolog, scales with its container, ids unique per figure."""
    buf = io.StringIO()
    fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None})
    text = buf.getvalue()
    text = text[text.index("<svg"):]
    head_end = text.index(">")
    head = re.sub(r'\s(width|height)="[^"]*"', "", text[:head_end])
    head += f' class="plot" role="img" aria-label="{html.escape(label)}" data-plot="{name}"'
    text = head + text[head_end:]
    return text.replace("font-family:'DejaVu Sans'", "font-family:'DejaVu Sans',Arial,"
                        "Helvetica,sans-serif")


def _limit_ticks(axis, limits, lo: float, hi: float) -> None:
    """Add the limit values to an axis' ticks and print them in the limit colour."""
    from matplotlib.ticker import MaxNLocator

    base = MaxNLocator(nbins=8).tick_values(lo, hi)
    tol = 1e-9 * max(1.0, abs(hi - lo))
    ticks = [t for t in base if lo - tol <= t <= hi + tol
             and all(abs(t - v) > 0.06 * (hi - lo) for v in limits)]
    ticks = sorted(ticks + list(limits))
    axis.set_ticks(ticks)
    for t, lab in zip(ticks, axis.get_ticklabels()):
        if any(abs(t - v) <= tol for v in limits):
            lab.set_color(LIMIT)
            lab.set_fontweight("bold")


def _area_colour(areas: list) -> dict:
    return {a: AREA_COLOURS[k % len(AREA_COLOURS)] for k, a in enumerate(areas)}


def _short_period(labels: list) -> list:
    """Period labels for axes: drop the date when every period is on one day."""
    s = [str(p) for p in labels]
    if s and all(len(x) >= 16 and x[10] == "T" for x in s) and len({x[:10] for x in s}) == 1:
        return [x[11:16] for x in s]
    return s


def _thin_ticks(n: int, most: int = 13) -> np.ndarray:
    step = max(1, math.ceil(n / most))
    return np.arange(0, n, step)


@_styled("characteristics")
def plot_characteristics(rf: ResultFolder) -> tuple[str, str]:
    """Frequency against power: the aggregate settled response per area and for the system,
    the settled limit, and every event's settled point."""
    period = _tightest_period(rf)
    alloc = _period_rows(rf.allocation, period)
    ev = _period_rows(rf.events, period)
    fn = rf.nominal_hz
    F = float(ev["limit_hz"].max()) if len(ev) else 0.2
    span = max(1.6 * F, 1.15 * float(ev["settled_deviation_hz"].abs().max()) if len(ev) else 0)
    db = _deadbands_hz(rf, alloc, period)
    K = alloc["gain_mw_per_hz"].to_numpy(float)
    act = K > 0
    dd = np.zeros(len(K)) if db is None else db
    corners = np.r_[dd[act], dd[act] + alloc["headroom_up_mw"].to_numpy(float)[act] / K[act],
                    dd[act] + alloc["headroom_down_mw"].to_numpy(float)[act] / K[act]]
    grid = np.unique(np.r_[np.linspace(-span, span, 601), corners, -corners])
    grid = grid[np.abs(grid) <= span]
    curves = response_curves(alloc, grid, db)
    areas = list(curves.columns)
    colours = _area_colour(_uniq(rf.allocation["area"]))
    damping = _damping_mw_per_hz(rf, period)

    fig = _new_figure(10.4, 4.3)
    ax1, ax2 = fig.subplots(1, 2, sharey=True)
    y = fn + grid
    for a in areas:
        ax1.plot(curves[a].to_numpy(), y, color=colours[a], lw=1.8, label=str(a))
    total = curves.sum(axis=1).to_numpy()
    ax2.plot(total, y, color=ACCENT, lw=2.4, label="units (all areas)")
    if damping is not None:
        D = float(sum(damping.values()))
        ax2.plot(total - D * grid, y, color=INK, lw=1.3, ls=(0, (5, 3)),
                 label="units + load self-regulation")
    if len(ev):
        hot = ev["binding"].to_numpy(bool)
        if (~hot).any():
            ax2.scatter(ev["size_mw"][~hot], ev["settled_frequency_hz"][~hot], s=34, zorder=5,
                        facecolor=CARD, edgecolor=INK, lw=1.3,
                        label="event: size, settled frequency")
        if hot.any():
            ax2.scatter(ev["size_mw"][hot], ev["settled_frequency_hz"][hot], s=38, zorder=6,
                        color=ALERT, label="event at its limit")
    for ax in (ax1, ax2):
        ax.axhspan(fn + F, fn + span, color=LIMIT, alpha=0.08, lw=0)
        ax.axhspan(fn - span, fn - F, color=LIMIT, alpha=0.08, lw=0)
        for s in (-1, 1):
            ax.axhline(fn + s * F, color=LIMIT, lw=1.2, ls=(0, (4, 2)))
        ax.axhline(fn, color="#9aa3ab", lw=0.8)
        ax.axvline(0, color="#9aa3ab", lw=0.8)
        ax.set_ylim(fn - span, fn + span)
        ax.set_xlabel("response ΔP (MW; + = more generation)")
    ax1.plot([], [], color=LIMIT, lw=1.2, ls=(0, (4, 2)), label="settled limit")
    _limit_ticks(ax1.yaxis, [fn - F, fn + F], fn - span, fn + span)
    ax1.set_ylabel("frequency (Hz)")
    ax1.set_title("Per area: units' settled response")
    ax2.set_title("Whole system")
    # the quadrant right of the axis and above nominal stays empty: under-frequency response
    # is positive power below nominal; keep the legends under the upper limit line
    below_limit = 0.5 + F / (2 * span) - 0.03
    ax1.legend(loc="upper right", bbox_to_anchor=(1.0, below_limit),
               ncols=1 if len(areas) < 7 else 2)
    ax2.legend(loc="upper right", bbox_to_anchor=(1.0, below_limit))
    label = "Droop characteristics: frequency against response power per area"
    svg = _svg(fig, "characteristics", label)
    when = f" in period {period}, the one with the least margin," if period is not None else ""
    cap = (f"Frequency against power{when} from the units' gains and headroom in allocation.csv. "
           "Each line is the summed settled response K·(|Δf| − dead band), flattening where "
           "units reach their headroom. Amber: the settled limit. Dots: each event's size "
           "against its settled frequency; ")
    if damping is not None:
        cap += ("they lie on the dashed line, where the units and the load's self-regulation "
                "together balance the event.")
    else:
        cap += ("without the case folder, dead bands and the load's self-regulation are not "
                "drawn, so the dots sit slightly off the line (give --case to draw them).")
    return svg, cap


@_styled("events")
def plot_events(rf: ResultFolder) -> tuple[str, str]:
    """Settled deviation of every event against its limit (per period for horizons)."""
    ev = rf.events
    names = _uniq(ev["event"])
    n = len(names)
    pos = {e: k for k, e in enumerate(names)}
    yk = ev["event"].map(pos).to_numpy()
    dev = ev["settled_deviation_hz"].to_numpy(float) * 1000
    lim = float(ev["limit_hz"].max()) * 1000
    span = max(1.18 * lim, 1.1 * np.abs(dev).max(initial=0))
    fig = _new_figure(10.4, 1.1 + 0.34 * max(n, 3))
    ax = fig.subplots()
    ax.axvspan(lim, span, color=LIMIT, alpha=0.1, lw=0)
    ax.axvspan(-span, -lim, color=LIMIT, alpha=0.1, lw=0)
    for s in (-1, 1):
        ax.axvline(s * lim, color=LIMIT, lw=1.3, ls=(0, (4, 2)))
    ax.axvline(0, color="#9aa3ab", lw=0.8)
    binding = ev["binding"].to_numpy(bool)
    if rf.horizon:
        ax.scatter(dev, yk, s=9, color=ACCENT, alpha=0.25, lw=0, label="one period")
        g = pd.DataFrame({"k": yk, "dev": dev, "b": binding, "p": ev["period"].to_numpy()})
        lo = g.groupby("k")["dev"].min()
        hi = g.groupby("k")["dev"].max()
        ax.hlines(lo.index, lo.to_numpy(), hi.to_numpy(), color=ACCENT, lw=1.4, alpha=0.7)
        worst = g.loc[g.assign(a=g["dev"].abs()).groupby("k")["a"].idxmax()]
    else:
        worst = pd.DataFrame({"k": yk, "dev": dev, "b": binding})
    ok = ~worst["b"].to_numpy(bool)
    if ok.any():
        ax.scatter(worst["dev"][ok], worst["k"][ok], s=46, color=ACCENT, zorder=4,
                   label="worst period" if rf.horizon else "settled deviation")
    if (~ok).any():
        ax.scatter(worst["dev"][~ok], worst["k"][~ok], s=50, color=ALERT, zorder=5,
                   label="at its limit")
    for r in worst.itertuples():
        txt = f"{r.dev:+.1f}".replace("-", "−") + (f" @ {_short_period([r.p])[0]}"
                                                   if rf.horizon else "")
        right = r.dev >= 0
        ax.annotate(txt, (r.dev, r.k), xytext=(-7 if right else 7, 6),
                    textcoords="offset points", ha="right" if right else "left", fontsize=8,
                    color=ALERT if r.b else INK)
    ax.set_yticks(range(n), [str(e) for e in names])
    ax.set_ylim(n - 0.4, -0.7)
    ax.set_xlim(-span, span)
    ax.set_xlabel("settled deviation from nominal (mHz; − = under-frequency)")
    ax.grid(axis="y", visible=False)
    _limit_ticks(ax.xaxis, [-lim, lim], -span, span)
    ax.plot([], [], color=LIMIT, lw=1.3, ls=(0, (4, 2)), label=f"limit ±{lim:.0f} mHz")
    fig.legend(loc="outside upper right", ncols=4)
    svg = _svg(fig, "events", "Settled frequency deviation per event against the limit")
    cap = ("Settled deviation after each event; the amber lines are the limit the allocation "
           "is held to. " + ("The bar spans the periods; the big dot is the worst period. "
                             if rf.horizon else "") + "Red: binding (within 0.01 mHz).")
    return svg, cap


def _loading_cmap():
    from matplotlib.colors import LinearSegmentedColormap

    return LinearSegmentedColormap.from_list(
        "optreserve-loading", [(0.0, "#f6f3ec"), (0.5, "#e4dcc3"), (0.8, "#e5b04c"),
                               (0.95, "#d3741f"), (1.0, ALERT)]).with_extremes(over="#7d1f2f")


@_styled("links")
def plot_links(rf: ResultFolder) -> tuple[str, str] | None:
    """Link loading (% of limit) after every event: a links x events matrix."""
    lk = rf.links
    if not len(lk):
        return None
    links = _uniq(lk["link"])
    events = _uniq(rf.events["event"])
    m = lk.groupby(["link", "event"], sort=False)["loading_pct"].max().unstack()
    m = m.reindex(index=links, columns=events)
    L, E = m.shape
    fig = _new_figure(10.4, min(1.0 + 0.3 * L + 0.075 * max(len(str(e)) for e in events),
                                14.0))
    ax = fig.subplots()
    im = ax.imshow(m.to_numpy(float), cmap=_loading_cmap(), vmin=0, vmax=100,
                   aspect="auto", interpolation="nearest")
    if L * E <= 600:
        for i in range(L):
            for j in range(E):
                v = m.iat[i, j]
                if v == v:
                    ax.text(j, i, f"{v:.0f}", ha="center", va="center", fontsize=8,
                            color="white" if v >= 90 else INK)
    ax.set_xticks(range(E), [str(e) for e in events], rotation=35, ha="right",
                  rotation_mode="anchor")
    ax.set_yticks(range(L), [str(x) for x in links])
    ax.grid(False)
    for s in ax.spines.values():
        s.set_visible(False)
    ax.tick_params(length=0)
    cb = fig.colorbar(im, ax=ax, extend="max", shrink=0.9, pad=0.01, aspect=30)
    cb.set_label("loading, % of limit")
    cb.outline.set_visible(False)
    svg = _svg(fig, "links", "Tie-line loading after each event as a share of its limit")
    cap = ("Settled flow after each event as a share of the link's limit (100 % = at the "
           "limit)" + (", the highest over the periods" if rf.horizon else "") + ".")
    return svg, cap


@_styled("areas")
def plot_area_costs(rf: ResultFolder) -> tuple[str, str]:
    a = rf.allocation
    areas = _uniq(a["area"])
    T = max(1, len(rf.periods))
    g = a.groupby("area", sort=False)[["headroom_up_mw", "headroom_down_mw", "cost_per_h"]] \
        .sum().reindex(areas) / T
    colours = _area_colour(areas)
    fig = _new_figure(10.4, 1.3 + 0.38 * max(len(areas), 2))
    ax1, ax2 = fig.subplots(1, 2)
    y = np.arange(len(areas))
    h = 0.38
    ax1.barh(y - h / 2, g["headroom_up_mw"], h, color=ACCENT, label="up")
    ax1.barh(y + h / 2, g["headroom_down_mw"], h, color="#8fbfbd", label="down")
    ax2.barh(y, g["cost_per_h"], 0.6, color=[colours[x] for x in areas])
    for ax in (ax1, ax2):
        ax.set_yticks(y, [str(x) for x in areas])
        ax.invert_yaxis()
        ax.grid(axis="y", visible=False)
    for k, v in enumerate(g["cost_per_h"]):
        ax2.annotate(f"{v:,.0f}", (v, k), xytext=(4, 0), textcoords="offset points",
                     va="center", fontsize=8)
    ax2.margins(x=0.15)
    mean = " (mean over periods)" if rf.horizon else ""
    ax1.set_title("Headroom by area" + mean)
    ax1.set_xlabel("MW")
    ax1.legend(loc="lower right")
    ax2.set_title("Headroom cost by area" + mean)
    ax2.set_xlabel("cost per hour")
    svg = _svg(fig, "areas", "Headroom and its cost by area")
    return svg, "Headroom held and its cost per hour, summed over the units of each area."


def _heat_cmap():
    from matplotlib.colors import LinearSegmentedColormap

    return LinearSegmentedColormap.from_list(
        "optreserve-headroom", [(0.0, "#f6f3ec"), (0.35, "#9fd0c8"), (0.7, ACCENT),
                                (1.0, "#143a4a")])


@_styled("heatmap")
def plot_heatmap(rf: ResultFolder) -> tuple[str, str] | None:
    """Units x periods headroom (up; and down when it differs)."""
    periods = rf.periods
    if rf.schedule is not None:
        sw = rf.schedule
        up = sw[sw["direction"] == "up"].set_index("unit")[periods].astype(float)
        dn = sw[sw["direction"] == "down"].set_index("unit")[periods].astype(float)
    else:
        a = rf.allocation
        up = a.pivot(index="unit", columns="period", values="headroom_up_mw")[periods]
        dn = a.pivot(index="unit", columns="period", values="headroom_down_mw")[periods]
    dn = dn.reindex(up.index).fillna(0.0)
    tot = up.sum(axis=1) + dn.sum(axis=1)
    held = tot[tot > 0]
    if not len(held):
        return None
    area = rf.allocation.drop_duplicates("unit").set_index("unit")["area"]
    keep = held.sort_values(ascending=False).index[:HEATMAP_MAX_UNITS]
    area_pos = {x: k for k, x in enumerate(_uniq(area))}
    order = sorted(keep, key=lambda u: (area_pos[area[u]], str(u)))
    panels = [("up", up.loc[order])]
    same = np.allclose(up.loc[order].to_numpy(), dn.loc[order].to_numpy(), atol=1e-6)
    if not same:
        panels.append(("down", dn.loc[order]))
    n = len(order)
    fig = _new_figure(10.4, min(0.9 + len(panels) * (0.55 + 0.17 * n), 22.0))
    axes = fig.subplots(len(panels), 1, squeeze=False)[:, 0]
    vmax = max(float(p[1].to_numpy().max()) for p in panels)
    labels = _short_period(periods)
    ticks = _thin_ticks(len(periods))
    colours = _area_colour(_uniq(rf.allocation["area"]))
    for ax, (direction, m) in zip(axes, panels):
        im = ax.imshow(m.to_numpy(float), cmap=_heat_cmap(), vmin=0, vmax=vmax, aspect="auto",
                       interpolation="nearest")
        ax.set_yticks(range(n), [str(u) for u in order], fontsize=7.5 if n > 30 else 8.5)
        for t, u in zip(ax.get_yticklabels(), order):
            t.set_color(colours[area[u]])
        ax.set_xticks(ticks, [labels[k] for k in ticks], rotation=0 if len(labels[0]) <= 5
                      else 45, ha="center" if len(labels[0]) <= 5 else "right")
        ax.grid(False)
        ax.tick_params(length=0)
        for s in ax.spines.values():
            s.set_visible(False)
        ax.set_title("Headroom " + (direction if not same else "up and down (equal)")
                     + ", MW")
    cb = fig.colorbar(im, ax=list(axes), shrink=0.9, pad=0.01, aspect=40)
    cb.set_label("MW")
    cb.outline.set_visible(False)
    hidden = int(len(held) - len(keep))
    svg = _svg(fig, "heatmap", "Headroom per unit and period")
    cap = ("Headroom per providing unit (rows, coloured by area) and period (columns)."
           + (f" The {hidden} units with the least headroom are not drawn; schedule_wide.csv "
              "has them all." if hidden else "")
           + _none_holding(int((tot == 0).sum())))
    return svg, cap


def _none_holding(n: int) -> str:
    if n == 0:
        return ""
    return (" 1 unit holds" if n == 1 else f" {n} units hold") + " no headroom in any period."


@_styled("period-costs")
def plot_period_costs(rf: ResultFolder) -> tuple[str, str]:
    a = rf.allocation
    periods = rf.periods
    areas = _uniq(a["area"])
    m = a.pivot_table(index="period", columns="area", values="cost_per_h", aggfunc="sum",
                      sort=False).reindex(index=periods, columns=areas).fillna(0.0)
    colours = _area_colour(areas)
    fig = _new_figure(10.4, 3.3)
    ax = fig.subplots()
    x = np.arange(len(periods))
    bottom = np.zeros(len(periods))
    for ar in areas:
        v = m[ar].to_numpy(float)
        ax.bar(x, v, 0.82, bottom=bottom, color=colours[ar], label=str(ar), lw=0)
        bottom += v
    labels = _short_period(periods)
    ticks = _thin_ticks(len(periods))
    ax.set_xticks(ticks, [labels[k] for k in ticks], rotation=0 if len(labels[0]) <= 5 else 45,
                  ha="center" if len(labels[0]) <= 5 else "right")
    ax.set_xlim(-0.6, len(periods) - 0.4)
    ax.set_ylabel("headroom cost per hour")
    ax.grid(axis="x", visible=False)
    ax.set_title("Headroom cost by period")
    ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), title="area")
    svg = _svg(fig, "period-costs", "Headroom cost per hour in every period, by area")
    return svg, "Headroom cost per hour in each period, stacked by area."


# ------------------------------------------------------------------ HTML pieces
def _esc(v) -> str:
    return html.escape("" if v is None else str(v), quote=True)


def _fmt(v, spec: str) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        if isinstance(v, float) and math.isinf(v):
            return "∞" if v > 0 else "−∞"
        return "–"
    if spec == "bool":
        return "yes" if v else ""
    if spec == "yesno":
        return "yes" if v else "no"
    if spec == "text":
        return str(v)
    out = format(int(round(float(v))), spec) if spec.endswith("d") else format(float(v), spec)
    return out.replace("-", "−") if out.startswith("-") else out


_TEXTUAL = ("text", "bool", "yesno")
# Unit suffixes of column names (the project's convention): heading unit and number format.
_SUFFIXES = [("_hz_per_s", "Hz/s", ".3f"), ("_mw_per_hz", "MW/Hz", ",.1f"),
             ("_per_mw_h", "per MW·h", ",.3f"), ("_per_h", "per h", ",.2f"),
             ("_pct", "%", ".1f"), ("_mhz", "mHz", ".1f"), ("_hz", "Hz", ".4f"),
             ("_mw", "MW", ",.1f"), ("_s", "s", ".2f")]


def generic_cols(df: pd.DataFrame) -> list:
    """Columns of a table written by another study: heading and unit from the name."""
    cols = []
    for c in df.columns:
        head, unit, spec = str(c), "", "text"
        if pd.api.types.is_bool_dtype(df[c]):
            spec = "yesno"
        elif pd.api.types.is_numeric_dtype(df[c]):
            spec = ",.4g"
            for suf, u, f in _SUFFIXES:
                if head.endswith(suf) and len(head) > len(suf):
                    head, unit, spec = head[: -len(suf)], u, f
                    break
        cols.append(Col(str(c), _words(head), spec, unit))
    return cols


_WORDS = {"mw": "MW", "hz": "Hz", "mhz": "mHz", "rocof": "RoCoF", "ok": "OK", "pu": "p.u."}


def _words(name: str) -> str:
    return " ".join(_WORDS.get(w, w) for w in name.split("_"))


@dataclass
class Col:
    key: str
    head: str
    spec: str = "text"  # a format spec for numbers, "text" or "bool"
    unit: str = ""
    given: bool = False  # an input from the case folder (shaded differently)


def html_table(df: pd.DataFrame, cols: list, tid: str, hot=None, warm=None, on=None,
               caption: str = "", tall: bool = False) -> str:
    """A sortable table; numbers right-aligned in tabular figures; the header stays in view
    while the body scrolls. Row marks: hot (at a limit), warm (close to one), on (provides)."""
    heads = []
    for c in cols:
        num = c.spec not in _TEXTUAL
        unit = f'<span class="u">{_esc(c.unit)}</span>' if c.unit else ""
        cls = ("num" if num else "txt") + (" given" if c.given else "")
        heads.append(f'<th class="{cls}" scope="col">{_esc(c.head)}{unit}</th>')
    body = []
    hot = np.zeros(len(df), bool) if hot is None else np.asarray(hot, bool)
    warm = np.zeros(len(df), bool) if warm is None else np.asarray(warm, bool)
    on = np.zeros(len(df), bool) if on is None else np.asarray(on, bool)
    columns = [df[c.key].tolist() for c in cols]
    for i, row in enumerate(zip(*columns)):
        cls = (' class="hot"' if hot[i] else ' class="warm"' if warm[i] else
               ' class="on"' if on[i] else "")
        cells = []
        for c, v in zip(cols, row):
            if c.spec in _TEXTUAL:
                cells.append(f"<td>{_esc(_fmt(v, c.spec))}</td>")
            else:
                raw = "" if v is None or (isinstance(v, float) and v != v) else repr(float(v))
                cells.append(f'<td class="num" data-v="{raw}">{_esc(_fmt(v, c.spec))}</td>')
        body.append(f"<tr{cls}>" + "".join(cells) + "</tr>")
    cap = f"<caption>{caption}</caption>" if caption else ""
    return (f'<div class="tbl{" tall" if tall else ""}"><table id="{_esc(tid)}" '
            f'class="data sortable">{cap}<thead><tr>{"".join(heads)}</tr></thead><tbody>'
            + "".join(body) + "</tbody></table></div>")


def _figure(svg_cap, fid: str) -> str:
    if svg_cap is None:
        return ""
    svg, cap = svg_cap
    return f'<figure id="{fid}">{svg}<figcaption>{cap}</figcaption></figure>'


def _breakable(text) -> str:
    """Escaped text that may wrap after _ and - (long ids in narrow boxes)."""
    return re.sub(r"([_\-])", r"\1<wbr>", _esc(text))


def _tile(label: str, value: str, sub: str = "", tone: str = "") -> str:
    return (f'<div class="tile {tone}"><div class="tl">{_esc(label)}</div>'
            f'<div class="tv">{value}</div><div class="ts">{sub}</div></div>')


def _filter_box(tid: str, what: str) -> str:
    return (f'<input class="filter" type="search" data-table="{_esc(tid)}" '
            f'placeholder="Filter {_esc(what)}…" aria-label="Filter {_esc(what)}">')


# ------------------------------------------------------------------ sections
def _header(rf: ResultFolder) -> str:
    s = rf.summary or {}
    name = s.get("case") or (rf.case.name if rf.case is not None else rf.folder.name)
    tiles = []
    if rf.solved:
        status = str(s.get("status"))
        tone = "good" if status == "optimal" else "warn"
        gap = s.get("mip_gap")
        tiles.append(_tile("status", _esc(status), f"MIP gap {gap * 100:.3f} %"
                           if gap is not None else "", tone))
        if s.get("objective_total") is not None:
            tiles.append(_tile("headroom cost", f"{s['objective_total']:,.2f}",
                               f"over {s.get('periods')} periods "
                               f"({s.get('horizon_hours', 0):g} h)"))
        elif s.get("objective_per_h") is not None:
            tiles.append(_tile("headroom cost", f"{s['objective_per_h']:,.2f}", "per hour"))
        tiles.append(_tile("peak headroom", f"{_fmt(s.get('headroom_up_mw'), ',.0f')} / "
                           f"{_fmt(s.get('headroom_down_mw'), ',.0f')}", "MW up / down"))
        n_units = rf.allocation["unit"].nunique()
        tiles.append(_tile("units providing", f"{s.get('units_providing', '–')} / {n_units}",
                           ""))
        ev = rf.events
        if len(ev):
            margin = (ev["limit_hz"] - ev["settled_deviation_hz"].abs()) * 1000
            k = int(np.argmin(margin.to_numpy()))
            tiles.append(_tile("least margin", f"{margin.iloc[k]:.1f} mHz",
                               _breakable(ev["event"].iloc[k])
                               + (f" @ {_esc(ev['period'].iloc[k])}" if rf.horizon else ""),
                               "warn" if ev["binding"].any() else ""))
        lk = rf.links
        if len(lk):
            k = int(np.argmax(lk["loading_pct"].to_numpy()))
            top = lk["loading_pct"].iloc[k]
            tiles.append(_tile("highest link loading", f"{top:.1f} %",
                               f"{_breakable(lk['link'].iloc[k])} after "
                               f"{_breakable(lk['event'].iloc[k])}",
                               "warn" if top >= 99.99 else ""))
    else:
        tiles.append(_tile("status", "infeasible", "no allocation meets the limits", "bad"))
    when = datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")
    return (f'<header class="top"><div class="brand">optreserve · reserve & droop study</div>'
            f"<h1>{_esc(name)}</h1><p class=\"meta\">Result folder <code>{_esc(rf.folder)}"
            f"</code>" + (f" · case folder <code>{_esc(rf.case_dir)}</code>"
                          if rf.case_dir is not None else "")
            + f" · report made {when} by optreserve {__version__}</p>"
            f'<div class="tiles">{"".join(tiles)}</div></header>')


def _section(sid: str, title: str, body: str, lead: str = "", cls: str = "") -> str:
    lead = f'<p class="lead">{lead}</p>' if lead else ""
    cls = f' class="{cls}"' if cls else ""
    return f'<section id="{sid}"{cls}><h2>{_esc(title)}</h2>{lead}{body}</section>'


def _dl(pairs: list) -> str:
    return '<dl class="facts">' + "".join(f"<dt>{_esc(k)}</dt><dd>{v}</dd>" for k, v in pairs
                                          if v not in (None, "")) + "</dl>"


def section_case(rf: ResultFolder) -> str:
    s = rf.summary or {}
    pairs = [("case", _esc(s.get("case") or (rf.case.name if rf.case else "")))]
    if rf.solved:
        a, ev, lk = rf.allocation, rf.events, rf.links
        pairs += [("units", f"{a['unit'].nunique()} ({s.get('units_providing', '–')} provide)"),
                  ("areas", str(a["area"].nunique())),
                  ("links", str(lk["link"].nunique())),
                  ("events", f"{ev['event'].nunique()} ("
                             f"{int((ev.drop_duplicates('event')['size_mw'] > 0).sum())} "
                             "under-frequency, "
                             f"{int((ev.drop_duplicates('event')['size_mw'] < 0).sum())} "
                             "over-frequency)"),
                  ("periods", f"{s.get('periods', 1)} ({s.get('horizon_hours', 1):g} h)"
                   if rf.horizon else "snapshot")]
    c = rf.case
    if c is not None:
        lim = c.limits
        pairs += [("nominal frequency", f"{c.nominal_frequency_hz:g} Hz"),
                  ("settled limit", f"±{lim.max_settled_deviation_hz * 1000:g} mHz"),
                  ("full activation at", f"±{lim.full_activation_deviation_hz * 1000:g} mHz"),
                  ("droop", "steps " + ", ".join(f"{x:g}" for x in c.droop.steps_pct) + " %"
                   if c.droop.steps_pct else "continuous inside each unit's band"),
                  ("change penalty", f"{c.droop.change_penalty_per_unit:g} per unit"
                   if c.droop.change_penalty_per_unit else "")]
        if c.is_horizon:
            pairs.append(("droop held for", "the whole horizon" if c.hold_periods is None
                          else f"{c.hold_periods} period(s)"))
    elif rf.solved:
        lim = float(rf.events["limit_hz"].max()) * 1000 if len(rf.events) else None
        pairs += [("nominal frequency", f"{rf.nominal_hz:g} Hz (from events.csv)"),
                  ("settled limit", f"±{lim:g} mHz" if lim is not None else "")]
    if s:
        solver = s.get("solver") or {}
        pairs += [("solver", _esc(f"{solver.get('name', s.get('solver_name', ''))} "
                                  f"{solver.get('version', s.get('solver_version', ''))} via "
                                  f"{solver.get('interface', '?')}")),
                  ("dead-band iterations", _esc(s.get("dead_band_iterations", ""))),
                  ("verification", _esc(_verification_text(s.get("verification") or {}))),
                  ("timings", _esc(", ".join(f"{k} {v:.2f} s" for k, v in
                                             (s.get("timings_s") or {}).items()
                                             if isinstance(v, (int, float))))),
                  ("written by", _esc(f"optreserve {s.get('optreserve_version', '?')}"))]
    body = _dl(pairs)
    if rf.solved:
        body += "<h3>Areas</h3>" + _areas_table(rf)
    return _section("case", "Case", body)


def _verification_text(v: dict) -> str:
    fz = v.get("max_frequency_disagreement_hz")
    fl = v.get("max_flow_disagreement_mw")
    if fz is None and fl is None:
        return ""
    return (f"independent recalculation agrees to {_fmt(fz, '.1e')} Hz and {_fmt(fl, '.1e')} MW "
            "(tolerance 0.5 mHz, 0.5 MW)")


def _areas_table(rf: ResultFolder) -> str:
    a = rf.allocation
    areas = _uniq(a["area"])
    g = a.assign(n=a["provides"].astype(int))
    keys = ["period", "area"] if rf.horizon else ["area"]
    per = g.groupby(keys, sort=False)[["n", "gain_mw_per_hz", "headroom_up_mw",
                                       "headroom_down_mw", "cost_per_h"]].sum()
    if rf.horizon:
        agg = per.groupby(level="area", sort=False).agg(
            {"n": "max", "gain_mw_per_hz": "max", "headroom_up_mw": "max",
             "headroom_down_mw": "max", "cost_per_h": "mean"})
    else:
        agg = per
    df = agg.reindex(areas).reset_index()
    pk = "peak " if rf.horizon else ""
    cols = [Col("area", "area"), Col("n", pk + "units providing", "d"),
            Col("gain_mw_per_hz", pk + "gain", ",.1f", "MW/Hz"),
            Col("headroom_up_mw", pk + "headroom up", ",.1f", "MW"),
            Col("headroom_down_mw", pk + "headroom down", ",.1f", "MW"),
            Col("cost_per_h", ("mean " if rf.horizon else "") + "cost", ",.2f", "per h")]
    if rf.case is not None:
        ca = rf.case.areas.set_index("area")
        df["load_mw"] = df["area"].map(ca["load_mw"])
        damp = _damping_mw_per_hz(rf, None)
        df["damping"] = df["area"].map(damp)
        cols += [Col("load_mw", "load" + (" (base)" if rf.horizon else ""), ",.0f", "MW"),
                 Col("damping", "load self-regulation", ",.1f", "MW/Hz")]
    return html_table(df, cols, "areas-table")


def section_cost(rf: ResultFolder) -> str:
    s = rf.summary or {}
    ev = rf.events
    pairs = []
    if s.get("objective_total") is not None:
        pairs.append(("headroom cost", f"{s['objective_total']:,.2f} over the horizon"))
    elif s.get("objective_per_h") is not None:
        pairs.append(("headroom cost", f"{s['objective_per_h']:,.2f} per hour"))
    if s.get("change_penalty"):
        pairs.append(("droop change penalty", f"{s['change_penalty']:,.2f}"))
        if s.get("objective_with_penalty") is not None:
            pairs.append(("objective with penalty", f"{s['objective_with_penalty']:,.2f}"))
    body = _dl(pairs) + _figure(plot_area_costs(rf), "fig-areas")
    price = ev["marginal_cost_per_mw_h"]
    priced = ev[(price.fillna(0) != 0) | ev["binding"]]
    body += "<h3>Marginal cost of the events</h3>"
    why = ("The marginal cost is the extra headroom cost per hour if the event were 1 MW "
           "larger, with participation and droop steps held as chosen. It is zero when the "
           "event is not at its limit, and always zero when droop is restricted to steps.")
    if rf.case is not None and rf.case.droop.steps_pct:
        why += " This case uses droop steps, so every price here is zero."
    body += f'<p class="note">{why}</p>'
    if len(priced):
        cols = [Col("event", "event")] + ([Col("period", "period")] if rf.horizon else []) + [
            Col("size_mw", "size", ",.1f", "MW"), Col("binding", "binding", "bool"),
            Col("marginal_cost_per_mw_h", "marginal cost", ",.3f", "per MW·h")]
        body += html_table(priced.reset_index(drop=True), cols, "prices-table")
    else:
        body += "<p>No event is at its limit: every marginal cost is zero.</p>"
    if rf.prices is not None and len(rf.prices):
        pr = rf.prices
        table = html_table(pr, generic_cols(pr), "area-prices-table", tall=True)
        body += "<h3>Prices per area (prices.csv)</h3>"
        if len(pr) > 12:
            body += (f"<details><summary>{len(pr):,} rows</summary>"
                     + _filter_box("area-prices-table", "rows") + table + "</details>")
        else:
            body += table
    return _section("cost", "Cost and prices", body)


def _unit_table_frame(rf: ResultFolder) -> tuple[pd.DataFrame, list]:
    a = rf.allocation
    if not rf.horizon:
        df = a.copy()
        cols = [Col("unit", "unit"), Col("area", "area"), Col("provides", "provides", "bool"),
                Col("droop_pct", "droop", ".2f", "%"),
                Col("gain_mw_per_hz", "gain", ",.1f", "MW/Hz"),
                Col("headroom_up_mw", "headroom up", ",.1f", "MW"),
                Col("headroom_down_mw", "headroom down", ",.1f", "MW"),
                Col("cost_per_h", "cost", ",.2f", "per h")]
    else:
        g = a.groupby("unit", sort=False)
        df = pd.DataFrame({"unit": a["unit"].drop_duplicates().to_numpy()})
        agg = g.agg(area=("area", "first"), periods_on=("provides", "sum"),
                    droop_min=("droop_pct", "min"), droop_max=("droop_pct", "max"),
                    gain_max=("gain_mw_per_hz", "max"), up=("headroom_up_mw", "max"),
                    dn=("headroom_down_mw", "max"), cost=("cost_per_h", "mean"))
        df = agg.reindex(df["unit"]).reset_index()
        df["droop_text"] = [("" if lo != lo else f"{lo:.2f}" if abs(hi - lo) < 1e-9
                             else f"{lo:.2f}–{hi:.2f}")
                            for lo, hi in zip(df["droop_min"], df["droop_max"])]
        T = len(rf.periods)
        cols = [Col("unit", "unit"), Col("area", "area"),
                Col("periods_on", "periods providing", "d", f"of {T}"),
                Col("droop_text", "droop range", "text", "%"),
                Col("gain_max", "peak gain", ",.1f", "MW/Hz"),
                Col("up", "peak headroom up", ",.1f", "MW"),
                Col("dn", "peak headroom down", ",.1f", "MW"),
                Col("cost", "mean cost", ",.2f", "per h")]
        if rf.case is not None:
            hours = dict(zip([str(p) for p in rf.case.periods], rf.case.hours()))
            w = a["period"].map(lambda p: hours[str(p)]).to_numpy(float)
            tot = (a.assign(c=a["cost_per_h"].to_numpy(float) * w)
                   .groupby("unit", sort=False)["c"].sum())
            df["cost_total"] = df["unit"].map(tot)
            cols.append(Col("cost_total", "cost over horizon", ",.2f"))
    if rf.case is not None:
        cu = rf.case.units.set_index("unit")
        df["capacity_mw"] = df["unit"].map(cu["capacity_mw"])
        df["band"] = [f"{lo:g}–{hi:g}" for lo, hi in
                      zip(df["unit"].map(cu["droop_min_pct"]), df["unit"].map(cu["droop_max_pct"]))]
        df["droop_now_pct"] = df["unit"].map(cu["droop_now_pct"])
        df["deadband_mhz"] = df["unit"].map(cu["deadband_mhz"])
        cols += [Col("capacity_mw", "capacity", ",.0f", "MW", True),
                 Col("band", "droop band", "text", "%", True)]
        if df["droop_now_pct"].notna().any():  # optional in the case: only when given
            cols.append(Col("droop_now_pct", "droop now", ".2f", "%", True))
        cols.append(Col("deadband_mhz", "dead band", ".0f", "mHz", True))
    return df, cols


def section_units(rf: ResultFolder) -> str:
    df, cols = _unit_table_frame(rf)
    lead = ("Per generating unit: the droop setting and the headroom it holds back for primary "
            "response. Click a column heading to sort; type to filter."
            + (" Shaded headings are inputs from the case folder." if rf.case is not None
               else ""))
    if rf.horizon:
        lead += (" For a horizon each row sums up the unit's periods; the full per-period "
                 "schedule is below the table and in allocation.csv.")
    body = _filter_box("units-table", "units") + html_table(
        df, cols, "units-table", on=df["provides"] if "provides" in df else
        df["periods_on"] > 0, tall=True)
    if rf.horizon:
        a = rf.allocation
        if len(a) <= FULL_TABLE_MAX_ROWS:
            full = [Col("unit", "unit"), Col("area", "area"), Col("period", "period"),
                    Col("provides", "provides", "bool"), Col("droop_pct", "droop", ".2f", "%"),
                    Col("gain_mw_per_hz", "gain", ",.1f", "MW/Hz"),
                    Col("headroom_up_mw", "headroom up", ",.1f", "MW"),
                    Col("headroom_down_mw", "headroom down", ",.1f", "MW"),
                    Col("cost_per_h", "cost", ",.2f", "per h")]
            body += (f"<details><summary>Every unit in every period ({len(a):,} rows)</summary>"
                     + _filter_box("alloc-table", "rows")
                     + html_table(a, full, "alloc-table", on=a["provides"], tall=True)
                     + "</details>")
        else:
            body += (f'<p class="note">The per-period schedule has {len(a):,} rows: see '
                     "allocation.csv and schedule_wide.csv.</p>")
    return _section("units", "Droop and headroom per unit", body, lead)


def section_characteristics(rf: ResultFolder) -> str:
    return _section("droop", "Droop characteristics",
                    _figure(plot_characteristics(rf), "fig-droop"))


def section_events(rf: ResultFolder) -> str:
    ev = rf.events.assign(
        dev_mhz=rf.events["settled_deviation_hz"] * 1000,
        limit_mhz=rf.events["limit_hz"] * 1000,
        margin_mhz=(rf.events["limit_hz"] - rf.events["settled_deviation_hz"].abs()) * 1000)
    body = _figure(plot_events(rf), "fig-events")
    cols = [Col("event", "event")] + ([Col("period", "period")] if rf.horizon else []) + [
        Col("kind", "kind"), Col("area", "area"), Col("size_mw", "size", ",.1f", "MW"),
        Col("settled_frequency_hz", "settles at", ".4f", "Hz"),
        Col("dev_mhz", "deviation", "+.1f", "mHz"), Col("limit_mhz", "limit", ".0f", "mHz"),
        Col("margin_mhz", "margin", ".1f", "mHz"), Col("binding", "binding", "bool"),
        Col("marginal_cost_per_mw_h", "marginal cost", ",.3f", "per MW·h")]
    if rf.horizon:
        worst = ev.loc[ev.groupby("event", sort=False)["margin_mhz"].idxmin()]
        body += ("<h3>Per event, the period with the least margin</h3>"
                 + html_table(worst.reset_index(drop=True), cols, "events-table",
                              hot=worst["binding"]))
        if len(ev) <= FULL_TABLE_MAX_ROWS:
            body += (f"<details><summary>Every event in every period ({len(ev):,} rows)"
                     "</summary>" + _filter_box("events-all", "rows")
                     + html_table(ev, cols, "events-all", hot=ev["binding"], tall=True)
                     + "</details>")
    else:
        body += html_table(ev, cols, "events-table", hot=ev["binding"])
    return _section("events", "Settled frequency per event", body)


def section_links(rf: ResultFolder) -> str:
    lk = rf.links
    if not len(lk):
        return _section("links", "Tie-line loading", "<p>The case has no tie lines.</p>")
    body = _figure(plot_links(rf), "fig-links")
    cols = [Col("link", "link"), Col("event", "event")] + (
        [Col("period", "period")] if rf.horizon else []) + [
        Col("flow_before_mw", "flow before", ",.1f", "MW"),
        Col("flow_after_mw", "flow after", ",.1f", "MW"),
        Col("limit_mw", "limit", ",.0f", "MW"), Col("loading_pct", "loading", ".1f", "%")]
    at = (lk["limit_mw"] - lk["flow_after_mw"].abs()) <= 1e-2
    if rf.horizon:
        worst = lk.loc[lk.groupby(["link", "event"], sort=False)["loading_pct"].idxmax()]
        wat = (worst["limit_mw"] - worst["flow_after_mw"].abs()) <= 1e-2
        body += ("<h3>Per link and event, the period with the highest loading</h3>"
                 + _filter_box("links-table", "links")
                 + html_table(worst.reset_index(drop=True), cols, "links-table", hot=wat,
                              warm=worst["loading_pct"] >= 90, tall=True))
        if len(lk) <= FULL_TABLE_MAX_ROWS:
            body += (f"<details><summary>Every link after every event in every period "
                     f"({len(lk):,} rows)</summary>" + _filter_box("links-all", "rows")
                     + html_table(lk, cols, "links-all", hot=at, warm=lk["loading_pct"] >= 90,
                                  tall=True) + "</details>")
    else:
        body += _filter_box("links-table", "links") + html_table(
            lk, cols, "links-table", hot=at, warm=lk["loading_pct"] >= 90, tall=True)
    lead = ("Flows are positive from the link's first area to its second. Rows at the limit "
            "are red, above 90 % amber.")
    return _section("links", "Tie-line loading", body, lead)


def section_horizon(rf: ResultFolder) -> str:
    body = _figure(plot_heatmap(rf), "fig-heatmap") + _figure(plot_period_costs(rf),
                                                              "fig-period-costs")
    return _section("horizon", "Over the horizon", body)


def section_simulation(rf: ResultFolder) -> str:
    body = ""
    if rf.simulation is not None:
        sim = rf.simulation
        checks = [c for c in sim.columns
                  if str(c).endswith("_ok") and pd.api.types.is_bool_dtype(sim[c])]
        failed = ~sim[checks].all(axis=1).to_numpy() if checks else None
        body += html_table(sim, generic_cols(sim), "simulation-table", hot=failed)
        if checks:
            body += ('<p class="note">Red rows fail at least one of the checks '
                     + ", ".join(f"<code>{_esc(c)}</code>" for c in checks) + ".</p>")
    if rf.sim_images:
        body += '<div class="simgrid">'
        for name, data in rf.sim_images:
            b64 = base64.b64encode(data).decode("ascii")
            body += (f'<figure class="sim"><img alt="simulation plot {_esc(name)}" '
                     f'src="data:image/png;base64,{b64}">'
                     f"<figcaption>{_esc(name)}</figcaption></figure>")
        body += "</div>"
    lead = ("Time-domain simulation outputs found in the result folder: frequency and flows "
            "over time after each event, from a separate dynamic model.")
    return _section("simulation", "Simulation", body, lead)


def section_diagnosis(rf: ResultFolder) -> str:
    d = rf.diagnosis
    cols = [Col("family", "family"), Col("element", "element"), Col("event", "event")] + (
        [Col("period", "period")] if "period" in d.columns else []) + [
        Col("short_mw", "short", ",.2f", "MW"), Col("excess_hz", "beyond limit", ".4f", "Hz"),
        Col("over_mw", "over limit", ",.3f", "MW")]
    lead = ("No allocation can meet the limits. A relaxation with penalties, recalculated "
            "independently, shows what is short and where: <b>event</b> rows miss response at "
            "the limit, <b>link</b> rows exceed a tie-line limit, <b>area</b> rows miss own "
            "reserve.")
    return _section("diagnosis", "Diagnosis", html_table(d, cols, "diagnosis-table"), lead,
                    cls="alarm")


def section_caution() -> str:
    return (f'<section id="caution" class="caution"><h2>Caution</h2><p><strong>Planning study, '
            f"not operating instructions.</strong> {_esc(LONG_CAUTION)}</p></section>")


# ------------------------------------------------------------------ the page
_CSS = """
:root{--paper:%(PAPER)s;--card:%(CARD)s;--ink:%(INK)s;--muted:%(MUTED)s;--rule:%(RULE)s;
--accent:%(ACCENT)s;--accent-dark:%(ACCENT_DARK)s;--limit:%(LIMIT)s;--alert:%(ALERT)s}
*{box-sizing:border-box}
html{scroll-behavior:smooth}
body{margin:0;background:var(--paper);color:var(--ink);
font:15px/1.5 system-ui,-apple-system,"Segoe UI","DejaVu Sans",Roboto,sans-serif}
code{font:13px ui-monospace,"DejaVu Sans Mono",Menlo,Consolas,monospace;background:#ece7dc;
padding:1px 5px;border-radius:4px;word-break:break-all}
.layout{display:grid;grid-template-columns:180px minmax(0,1fr);gap:24px;max-width:1320px;
margin:0 auto;padding:0 24px 48px}
nav.toc{position:sticky;top:0;align-self:start;padding:28px 0 0;font-size:14px}
nav.toc .mark{font-weight:700;letter-spacing:.04em;color:var(--accent-dark);margin-bottom:12px;
display:flex;align-items:center;gap:8px}
nav.toc .mark svg{flex:none}
nav.toc a{display:block;color:var(--ink);text-decoration:none;padding:5px 10px;
border-left:3px solid transparent;border-radius:0 6px 6px 0}
nav.toc a:hover{background:#e9e4d8;border-left-color:var(--accent)}
nav.toc a.warn{color:var(--alert)}
main{min-width:0}
header.top{background:var(--ink);color:#f4f1ea;border-radius:0 0 14px 14px;
padding:22px 28px 24px;margin-bottom:26px;position:relative;overflow:hidden}
header.top:after{content:"";position:absolute;right:-60px;top:-60px;width:240px;height:240px;
border-radius:50%%;border:26px solid rgba(14,124,123,.35)}
header .brand{font-size:12px;letter-spacing:.14em;text-transform:uppercase;color:#9fd0c8}
header h1{margin:6px 0 4px;font-size:26px;line-height:1.25;font-weight:650;max-width:80%%}
header .meta{margin:0 0 16px;color:#c3cbd3;font-size:13px}
header .meta code{background:rgba(255,255,255,.08);color:#e6ecef}
.tiles{display:grid;grid-template-columns:repeat(auto-fit,minmax(160px,1fr));gap:10px;
position:relative;z-index:1}
.tile{background:rgba(255,255,255,.07);border:1px solid rgba(255,255,255,.12);border-radius:10px;
padding:10px 12px}
.tile .tl{font-size:11.5px;text-transform:uppercase;letter-spacing:.08em;color:#aab6c1}
.tile .tv{font-size:20px;white-space:nowrap;font-weight:650;font-variant-numeric:tabular-nums;
margin-top:2px}
.tile .ts{font-size:12px;color:#c3cbd3;overflow-wrap:break-word}
.tile.good .tv{color:#7fd6c9}.tile.warn .tv{color:#f2c063}.tile.bad .tv{color:#f39aa8}
section{background:var(--card);border:1px solid var(--rule);border-radius:14px;
padding:20px 24px 22px;margin-bottom:22px;scroll-margin-top:12px}
h2{margin:0 0 10px;font-size:19px;display:flex;align-items:center;gap:10px}
h2:before{content:"";width:6px;height:20px;border-radius:3px;background:var(--accent)}
h3{font-size:15px;margin:22px 0 8px;color:var(--accent-dark)}
.lead{color:var(--muted);margin:0 0 14px;max-width:75ch}
.note{color:var(--muted);font-size:13.5px;max-width:90ch}
.notes{background:#fff7e3;border:1px solid #f0d9a0;border-radius:10px;padding:10px 16px;
margin-bottom:22px}
.notes p{margin:4px 0}
dl.facts{display:grid;grid-template-columns:max-content 1fr;gap:4px 18px;margin:0 0 6px}
dl.facts dt{color:var(--muted)}dl.facts dd{margin:0;font-variant-numeric:tabular-nums}
figure{margin:10px 0 18px}
figure svg.plot{display:block;width:100%%;height:auto}
figure img{display:block;max-width:100%%;height:auto;margin:0 auto;border:1px solid var(--rule);
border-radius:8px}
figcaption{color:var(--muted);font-size:13px;margin-top:6px;max-width:95ch}
.simgrid{display:grid;grid-template-columns:repeat(auto-fill,minmax(380px,1fr));gap:16px;
margin-top:14px}
.simgrid figure{margin:0}
.simgrid figcaption{text-align:center}
.tbl{max-height:26rem;overflow:auto;border:1px solid var(--rule);border-radius:10px;
margin:6px 0 10px}
.tbl.tall{max-height:34rem}
table.data{border-collapse:separate;border-spacing:0;width:100%%;font-size:13px}
table.data caption{text-align:left;color:var(--muted);padding:6px 10px}
table.data th{position:sticky;top:0;z-index:1;background:#e8f0ee;color:var(--ink);
font-weight:600;padding:6px 8px;border-bottom:1px solid #c9d9d6;line-height:1.25;
cursor:pointer;user-select:none;vertical-align:bottom;min-width:4.2em}
table.data th.given{background:#f1ede3;border-bottom-color:#ddd5c4}
table.data th .u{display:block;font-weight:400;font-size:11.5px;color:var(--muted)}
table.data th.num{text-align:right}table.data th.txt{text-align:left}
table.data th[aria-sort=ascending]:after{content:" ▲";font-size:10px;color:var(--accent)}
table.data th[aria-sort=descending]:after{content:" ▼";font-size:10px;color:var(--accent)}
table.data td{padding:4px 8px;border-bottom:1px solid #f0ece3;white-space:nowrap}
table.data td.num{text-align:right;font-variant-numeric:tabular-nums}
table.data tbody tr{--row:var(--card)}
table.data tbody tr:nth-child(even){--row:#faf8f4}
table.data tbody tr.warm{--row:#fdf5e4}
table.data tbody tr.hot{--row:#fbecee}
table.data tbody tr:hover{--row:#e6f2ef}
table.data td{background:var(--row)}
table.data td:first-child{position:sticky;left:0}
table.data th:first-child{left:0;z-index:2}
table.data tr.on td:first-child{box-shadow:inset 3px 0 0 var(--accent)}
table.data tr.warm td:first-child{box-shadow:inset 3px 0 0 var(--limit)}
table.data tr.hot td:first-child{box-shadow:inset 3px 0 0 var(--alert)}
input.filter{font:inherit;font-size:13.5px;padding:6px 10px;border:1px solid var(--rule);
border-radius:8px;width:min(320px,100%%);margin:4px 0 4px;background:#fdfcf9}
details{margin:10px 0}
details summary{cursor:pointer;color:var(--accent-dark);font-weight:600}
section.caution{background:#fff4f1;border-color:#eab9b1}
section.caution h2:before,section.alarm h2:before{background:var(--alert)}
section.caution .small{color:var(--muted);font-size:13px}
footer{color:var(--muted);font-size:12.5px;text-align:center;margin-top:8px}
@media (max-width:900px){.layout{grid-template-columns:1fr}nav.toc{position:static;
padding-top:12px}nav.toc a{display:inline-block}header h1{max-width:100%%}}
@media print{nav.toc{display:none}.layout{display:block}.tbl{max-height:none;overflow:visible}
table.data th{position:static}}
""" % dict(PAPER=PAPER, CARD=CARD, INK=INK, MUTED=MUTED, RULE=RULE, ACCENT=ACCENT,
           ACCENT_DARK=ACCENT_DARK, LIMIT=LIMIT, ALERT=ALERT)

# Sort on a heading click, filter by typed text. No libraries, no network.
_JS = """
(function(){
  function val(td){var v=td.getAttribute('data-v');
    if(v!==null){return v===''?-Infinity:parseFloat(v);} return td.textContent.toLowerCase();}
  document.querySelectorAll('table.sortable').forEach(function(t){
    var heads=t.tHead.rows[0].cells;
    Array.prototype.forEach.call(heads,function(th,k){
      th.addEventListener('click',function(){
        var asc=th.getAttribute('aria-sort')!=='ascending';
        Array.prototype.forEach.call(heads,function(h){h.removeAttribute('aria-sort');});
        th.setAttribute('aria-sort',asc?'ascending':'descending');
        var body=t.tBodies[0],rows=Array.prototype.slice.call(body.rows);
        rows.sort(function(a,b){var x=val(a.cells[k]),y=val(b.cells[k]);
          return (x<y?-1:x>y?1:0)*(asc?1:-1);});
        rows.forEach(function(r){body.appendChild(r);});
      });
    });
  });
  document.querySelectorAll('input.filter').forEach(function(box){
    var t=document.getElementById(box.getAttribute('data-table'));
    if(!t){return;}
    box.addEventListener('input',function(){
      var q=box.value.toLowerCase();
      Array.prototype.forEach.call(t.tBodies[0].rows,function(r){
        r.style.display=r.textContent.toLowerCase().indexOf(q)<0?'none':'';});
    });
  });
})();
"""

_MARK = ('<svg width="22" height="22" viewBox="0 0 22 22" aria-hidden="true">'
         f'<circle cx="11" cy="11" r="9" fill="none" stroke="{ACCENT}" stroke-width="2.5"/>'
         f'<path d="M4 13 L9 13 L12 6 L14 16 L18 11" fill="none" stroke="{INK}" '
         'stroke-width="1.8" stroke-linejoin="round"/></svg>')


def render(rf: ResultFolder) -> str:
    """The whole page as one string."""
    sections, toc = [], []

    def add(sid, title, text, warn=False):
        sections.append(text)
        cls = ' class="warn"' if warn else ""
        toc.append(f'<a href="#{sid}"{cls}>{_esc(title)}</a>')

    if rf.solved:
        add("case", "Case", section_case(rf))
        add("cost", "Cost and prices", section_cost(rf))
        add("units", "Units", section_units(rf))
        add("droop", "Droop characteristics", section_characteristics(rf))
        add("events", "Events", section_events(rf))
        add("links", "Tie lines", section_links(rf))
        if rf.horizon:
            add("horizon", "Over the horizon", section_horizon(rf))
    else:
        add("diagnosis", "Diagnosis", section_diagnosis(rf), warn=True)
        add("case", "Case", section_case(rf))
    if rf.simulation is not None or rf.sim_images:
        add("simulation", "Simulation", section_simulation(rf))
    add("caution", "Caution", section_caution(), warn=True)
    notes = ("<div class=\"notes\">" + "".join(f"<p>{_esc(n)}</p>" for n in rf.notes)
             + "</div>") if rf.notes else ""
    s = rf.summary or {}
    title = s.get("case") or (rf.case.name if rf.case is not None else rf.folder.name)
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width,initial-scale=1\">"
            f"<title>{_esc(title)} · optreserve report</title><style>{_CSS}</style></head>"
            f"<body><div class=\"layout\"><nav class=\"toc\"><div class=\"mark\">{_MARK}"
            f"optreserve</div>{''.join(toc)}</nav><main>{_header(rf)}{notes}"
            f"{''.join(sections)}<footer>optreserve {__version__} · {_esc(CAUTION)}</footer>"
            f"</main></div><script>{_JS}</script></body></html>\n")


def build_report(result_dir, case_dir=None) -> Path:
    """Write report.html into the result folder and return its path.

    case_dir: the case folder the result was solved from (optional; summary.json may record
    it). Raises ReportError (exit code 2) naming the file when a result file is missing or
    cannot be read, and CaseError for a bad case folder; nothing is written then."""
    rf = read_result(result_dir, case_dir)
    page = render(rf)
    out = rf.folder / REPORT_NAME
    tmp = rf.folder / f".{REPORT_NAME}.{os.getpid()}.tmp"  # then renamed: all or nothing
    try:
        tmp.write_text(page, encoding="utf-8")
        os.replace(tmp, out)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return out

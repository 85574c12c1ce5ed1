"""The report's visual identity for matplotlib: palette, rcParams, the figure factory and the
SVG export shared by every plot (output/plots.py). The same palette is written as CSS
variables at the top of templates/report.css; change both together.

Figures use matplotlib's Figure API (no pyplot: no GUI backend, no global state); every plot
draws inside rc_context(RC), so nothing leaks into the caller's matplotlib settings.

Plots never take the results with them: case names and ids go into titles, labels and legends
as the user wrote them (LITERAL_TEXT: no $...$ math markup, no TeX, so "Study $\\foo$" is
drawn as typed), and `plot_or_warn` turns a figure that fails into a warning, so the tables
of a run are still written (sweep, simulate, solve --report).
"""

from __future__ import annotations

import functools
import html
import io
import math
import re
import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from matplotlib.colors import Colormap
    from matplotlib.figure import Figure

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

RC = {
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
# ids and labels come from the user's files: a "$" is text, not the start of mathtext
LITERAL_TEXT = {"text.parse_math": False, "text.usetex": False}
RC.update(LITERAL_TEXT)


@contextmanager
def literal_text() -> Iterator[None]:
    """matplotlib settings under which every text is shown literally."""
    import matplotlib

    with matplotlib.rc_context(LITERAL_TEXT):
        yield


def plot_or_warn(draw: Callable[[], object], path: str | Path,
                 warnings: list | None = None) -> bool:
    """Run draw() (which writes `path`) with literal text. On failure remove any partial file
    and warn: appended to `warnings` when given, else printed to stderr. True when drawn
    (draw() returning False means there was nothing to draw)."""
    try:
        with literal_text():
            drawn = draw()
        return drawn is not False
    except Exception as exc:  # a plot must never cost the tables
        Path(path).unlink(missing_ok=True)
        text = f"{Path(path).name} not drawn: {type(exc).__name__}: {exc}".splitlines()[0]
        if warnings is not None:
            warnings.append(text)
        else:
            print(f"warning: {text}", file=sys.stderr)
        return False


def styled(name: str) -> Callable:
    """Decorator: draw the plot inside the report's matplotlib style; the SVG ids get a salt
    of their own per plot so that several inline SVGs never share an id."""
    def wrap(fn):
        @functools.wraps(fn)
        def inner(*args, **kwargs):
            import matplotlib

            with matplotlib.rc_context({**RC, "svg.hashsalt": f"optreserve-{name}"}):
                return fn(*args, **kwargs)
        return inner
    return wrap


def new_figure(width_in: float, height_in: float) -> Figure:
    from matplotlib.figure import Figure  # no pyplot: no GUI backend, no global state

    return Figure(figsize=(width_in, height_in), layout="constrained")


def svg_of(fig, name: str, label: str) -> str:
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


def limit_ticks(axis, limits, lo: float, hi: float) -> None:
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


def area_colour(areas: list) -> dict:
    return {a: AREA_COLOURS[k % len(AREA_COLOURS)] for k, a in enumerate(areas)}


def short_period(labels: list) -> list:
    """Period labels for axes: drop the date when every period is on one day."""
    s = [str(p) for p in labels]
    if s and all(len(x) >= 16 and x[10] == "T" for x in s) and len({x[:10] for x in s}) == 1:
        return [x[11:16] for x in s]
    return s


def thin_ticks(n: int, most: int = 13) -> np.ndarray:
    step = max(1, math.ceil(n / most))
    return np.arange(0, n, step)


def loading_cmap() -> Colormap:
    from matplotlib.colors import LinearSegmentedColormap

    return LinearSegmentedColormap.from_list(
        "optreserve-loading", [(0.0, "#f6f3ec"), (0.5, "#e4dcc3"), (0.8, "#e5b04c"),
                               (0.95, "#d3741f"), (1.0, ALERT)]).with_extremes(over="#7d1f2f")


def heat_cmap() -> Colormap:
    from matplotlib.colors import LinearSegmentedColormap

    return LinearSegmentedColormap.from_list(
        "optreserve-headroom", [(0.0, "#f6f3ec"), (0.35, "#9fd0c8"), (0.7, ACCENT),
                                (1.0, "#143a4a")])

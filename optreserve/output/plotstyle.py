"""Plots that never take the results with them.

Case names and ids go into titles, labels and legends as the user wrote them: `literal_text`
turns off matplotlib's math markup ($...$) and TeX, so "Study $\\foo$" is drawn as typed instead
of failing to parse. `plot_or_warn` draws one figure and turns a failure into a warning, so
the tables of a run are still written.
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path

LITERAL_TEXT = {"text.parse_math": False, "text.usetex": False}


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

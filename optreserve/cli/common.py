"""Shared pieces of the command line: exit codes, aligned tables, warnings, colour."""

from __future__ import annotations

import sys

from optreserve.progress import use_colour

EXIT_OK, EXIT_OTHER, EXIT_INPUT, EXIT_INFEASIBLE = 0, 1, 2, 3
EXIT_INCOMPLETE = 4  # sweep/batch: a point could not be delivered (a "lost" row)
EXIT_SIGINT, EXIT_SIGTERM = 130, 143  # 128 + signal number; nothing written


def _table(headers: list[str], rows: list[list[str]], right: set[int] | None = None) -> str:
    """Aligned plain-text table; columns in `right` are right-aligned (numbers)."""
    right = right or set()
    widths = [max(len(h), *(len(r[k]) for r in rows)) if rows else len(h)
              for k, h in enumerate(headers)]

    def fmt(cells):
        return "  ".join(c.rjust(w) if k in right else c.ljust(w)
                         for k, (c, w) in enumerate(zip(cells, widths))).rstrip()

    return "\n".join([fmt(headers), fmt(["-" * w for w in widths])] + [fmt(r) for r in rows])


def _warn(case, quiet: bool) -> None:
    if not quiet:
        for w in case.warnings:
            print(f"warning: {w}", file=sys.stderr)


def _paint(text: str, code: str) -> str:
    """ANSI colour on a terminal only (and never with NO_COLOR set)."""
    return f"\033[{code}m{text}\033[0m" if use_colour() else text


def _pct(v) -> str:
    return "off" if v != v else f"{v:g}"

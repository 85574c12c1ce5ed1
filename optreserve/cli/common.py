"""Shared pieces of the command line: exit codes, aligned tables, warnings, colour."""

from __future__ import annotations

import math
import re
import sys

from optreserve.progress import use_colour

EXIT_OK, EXIT_OTHER, EXIT_INPUT, EXIT_INFEASIBLE = 0, 1, 2, 3
STRICT_HELP = "treat every warning about the case as an input error (exit 2)"
EXIT_NO_ALLOCATION = 4  # time limit before any allocation met the limits (NoAllocationYet)
EXIT_CASES_FAILED = 5  # batch or sweep: a case or point was not delivered (its row says why)
EXIT_INCOMPLETE = EXIT_CASES_FAILED  # sweep/batch: a point could not be delivered ("lost")
# solved, but the simulated nadir of the allocation could not be confirmed within the limit
EXIT_NADIR_UNCONFIRMED = 6
EXIT_SIGINT, EXIT_SIGTERM = 130, 143  # 128 + signal number; nothing written


# C0 and C1 control characters (escape sequences, carriage returns, bells...) but newline
_CONTROL = re.compile(r"[\x00-\x09\x0b-\x1f\x7f-\x9f]")


def clean(text) -> str:
    """Text for the terminal: every control character shown as its escape (an id holding an
    escape sequence is printed as \\x1b[..., never obeyed by the terminal)."""
    return _CONTROL.sub(lambda m: m.group().encode("unicode_escape").decode("ascii"),
                        str(text))


def _table(headers: list[str], rows: list[list[str]], right: set[int] | None = None) -> str:
    """Aligned plain-text table; columns in `right` are right-aligned (numbers)."""
    right = right or set()
    headers = [clean(h) for h in headers]
    rows = [[clean(c) for c in r] for r in rows]
    widths = [max(len(h), *(len(r[k]) for r in rows)) if rows else len(h)
              for k, h in enumerate(headers)]

    def fmt(cells):
        return "  ".join(c.rjust(w) if k in right else c.ljust(w)
                         for k, (c, w) in enumerate(zip(cells, widths))).rstrip()

    return "\n".join([fmt(headers), fmt(["-" * w for w in widths])] + [fmt(r) for r in rows])


def _warn(case, quiet: bool, strict: bool = False) -> None:
    """Print the case's warnings; with --strict they are input errors (exit 2) instead."""
    if strict and case.warnings:
        from optreserve.case.problems import strict_problems
        from optreserve.errors import CaseError

        raise CaseError(strict_problems(case.warnings))
    if not quiet:
        for w in case.warnings:
            print(clean(f"warning: {w}"), file=sys.stderr)


def _paint(text: str, code: str) -> str:
    """ANSI colour on a terminal only (and never with NO_COLOR set)."""
    return f"\033[{code}m{text}\033[0m" if use_colour() else text


def _pct(v) -> str:
    return "off" if v != v else f"{v:g}"


def num(v: float, decimals: int = 1, sign: bool = False) -> str:
    """A number for the terminal without negative zero: a margin of -0.00001 mHz is 0.0."""
    r = float(v) if math.isnan(v) else round(float(v), decimals) + 0.0  # -0.0 becomes 0.0
    return f"{r:{'+' if sign else ''}.{decimals}f}"


def plural(n: int, word: str) -> str:
    """'1 link', '3 links'."""
    return f"{n} {word}" + ("" if n == 1 else "s")

"""Collecting input problems and warnings in one pass (every reader module reports here).

Problems are located by file, row (physical line, header = 1 when nothing precedes it) and
column; up to MAX_PROBLEMS are kept and raised together as one CaseError. Warnings are kept
as one-line strings (Case.warnings); `suggest` adds "did you mean" to a near-miss name.
"""

from __future__ import annotations

import difflib
import re
from collections.abc import Iterable

from optreserve.errors import CaseError, Problem

MAX_PROBLEMS = 50
SUGGEST_CUTOFF = 0.75


def printable(text: str) -> str:
    """Control and other non-printable characters shown escaped (a cell's '\\x0c' or an
    escape sequence must not reach a terminal raw, nor split a message into two lines)."""
    if text.isprintable():
        return text
    return "".join(ch if ch.isprintable() else ascii(ch)[1:-1] for ch in text)


class _Collector:
    def __init__(self) -> None:
        self.problems: list[Problem] = []
        self.warnings: list[str] = []
        self.dropped = 0

    def error(self, file: str, message: str, row: int | None = None, column: str | None = None):
        if len(self.problems) >= MAX_PROBLEMS:
            self.dropped += 1
            return
        self.problems.append(Problem(file, printable(message), row,
                                     None if column is None else printable(column)))

    def warn(self, file: str, message: str, row: int | None = None, column: str | None = None):
        self.warnings.append(str(Problem(file, printable(message), row,
                                         None if column is None else printable(column))))

    def raise_if_any(self) -> None:
        if self.problems:
            order = {f: k for k, f in enumerate(dict.fromkeys(p.file for p in self.problems))}
            probs = sorted(self.problems, key=lambda p: (order[p.file], p.row or 0))
            if self.dropped:
                probs.append(Problem(probs[-1].file, f"... and {self.dropped} more problems"))
            raise CaseError(probs)


Collector = _Collector


def suggest(name: str, known: Iterable[str], fmt: str = "'{}'") -> str:
    """' (did you mean 'x'?)' for the closest known name, '' when none is close: difflib's
    similarity ratio >= SUGGEST_CUTOFF, letter case ignored ('Output_MW' finds 'output_mw').
    The cutoff is above difflib's default 0.6, which offered activation_time_s for a
    governor model's reheat_time_s; real slips (price_up_per_mwh 0.97, [limit] 0.91,
    capacity 0.84) stay well above it."""
    known = list(known)
    lowered = {k.lower(): k for k in known}
    hit = difflib.get_close_matches(name.lower(), list(lowered), n=1, cutoff=SUGGEST_CUTOFF)
    return f" (did you mean {fmt.format(lowered[hit[0]])}?)" if hit else ""


def strict_problems(warnings: Iterable[str]) -> list[Problem]:
    """--strict: every warning as an input problem (the printed line is the warning's own)."""
    out = []
    for w in warnings:
        where, _, msg = w.partition(": ")
        m = _WHERE.fullmatch(where)
        file, row, column = (m.group(1), m.group(2), m.group(3)) if m else (where, None, None)
        out.append(Problem(file, f"{msg} (a warning; --strict makes warnings errors)",
                           int(row) if row else None, column))
    return out


_WHERE = re.compile(r"(.*?)(?: row (\d+))?(?: column (\S+))?")

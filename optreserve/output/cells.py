"""How cells are written so that they read back the same and no spreadsheet evaluates them.

- Text cells that start with = + - @ (or a tab or carriage return) would be taken as a
  formula by a spreadsheet: they are written with a single quote ' in front (the spreadsheet
  convention for "text as typed"). A text cell that itself starts with ' gets one more, so
  the rule reverses exactly (`unescape`). Headers follow the same rule.
- Numbers: 6 decimals (the stable format of the result tables) while that reads back as the
  value's own rounding; a finite value of 1e15 or more is written in shortest round-trip form
  (1e+308 stays 1e+308, never inf); columns that echo an input (`exact`) are written in
  shortest round-trip form wherever 6 decimals would not read back as the same float (a
  swept 1e-07 is not 0.000000; a swept 0.15 stays 0.150000).

docs/case-format.md ("Output files") states the same for users.
"""

from __future__ import annotations

import numpy as np

FORMULA_START = ("=", "+", "-", "@", "\t", "\r")
QUOTE = "'"
# at and above this magnitude 6-decimal rounding overflows or means nothing: shortest repr
BIG = 1e15


def spreadsheet_safe(cells: np.ndarray) -> np.ndarray:
    """Object array of text cells with formula starts (and a leading quote) quoted."""
    out = np.asarray(cells, dtype=object).copy()
    for k, c in enumerate(out):
        if isinstance(c, str) and c and (c.startswith(FORMULA_START) or c[0] == QUOTE):
            out[k] = QUOTE + c
    return out


def safe_header(names: list[str]) -> list[str]:
    return [str(x) for x in spreadsheet_safe(np.array(names, dtype=object))]


def unescape(cells) -> np.ndarray:
    """The text as it was before spreadsheet_safe (for reading our own files back)."""
    out = np.asarray(cells, dtype=object).copy()
    for k, c in enumerate(out):
        if isinstance(c, str) and len(c) > 1 and c[0] == QUOTE and (
                c[1:].startswith(FORMULA_START) or c[1] == QUOTE):
            out[k] = c[1:]
    return out


def needs_text(v: np.ndarray, exact: bool) -> np.ndarray:
    """Finite values of a float column that 6 decimals would not write faithfully."""
    fin = np.isfinite(v)
    big = fin & (np.abs(v) >= BIG)
    if not exact:
        return big
    with np.errstate(over="ignore", invalid="ignore"):
        lossy = fin & ~big & (np.round(v, 6) != v)
    return big | lossy


def float_text(v: float) -> str:
    """Shortest text that reads back as exactly v."""
    return repr(float(v))

"""Tables for the report, prepared in Python: which columns, their headings and units, the
number formats, and which rows are marked. The template (templates/report.html.j2, macro
`table`) only lays the prepared cells out."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

_TEXTUAL = ("text", "bool", "yesno")
# Unit suffixes of column names (the project's convention): heading unit and number format.
_SUFFIXES = [("_hz_per_s", "Hz/s", ".3f"), ("_mw_per_hz", "MW/Hz", ",.1f"),
             ("_per_mw_h", "per MW·h", ",.3f"), ("_per_h", "per h", ",.2f"),
             ("_pct", "%", ".1f"), ("_mhz", "mHz", ".1f"), ("_hz", "Hz", ".4f"),
             ("_mw", "MW", ",.1f"), ("_s", "s", ".2f")]
_WORDS = {"mw": "MW", "hz": "Hz", "mhz": "mHz", "rocof": "RoCoF", "ok": "OK", "pu": "p.u."}


@dataclass
class Col:
    key: str
    head: str
    spec: str = "text"  # a format spec for numbers, "text", "bool" or "yesno"
    unit: str = ""
    given: bool = False  # an input from the case folder (shaded differently)


def fmt(v, spec: str) -> str:
    """A cell as text: numbers with a real minus sign, NaN as a dash, inf as ∞."""
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
    out = format(round(float(v)), spec) if spec.endswith("d") else format(float(v), spec)
    return out.replace("-", "−") if out.startswith("-") else out


def words(name: str) -> str:
    return " ".join(_WORDS.get(w, w) for w in name.split("_"))


def generic_cols(df: pd.DataFrame) -> list[Col]:
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
        cols.append(Col(str(c), words(head), spec, unit))
    return cols


def table(df: pd.DataFrame, cols: list[Col], tid: str, hot=None, warm=None, on=None,
          tall: bool = False) -> dict:
    """A sortable table: headings, and per row its mark (hot: at a limit, warm: close to one,
    on: provides) and cells. A cell is (raw, text): raw None for a text cell, else the number
    as the script sorts it (repr; "" for a blank)."""
    heads = [{"head": c.head, "unit": c.unit,
              "cls": ("txt" if c.spec in _TEXTUAL else "num") + (" given" if c.given else "")}
             for c in cols]
    n = len(df)
    hot = np.zeros(n, bool) if hot is None else np.asarray(hot, bool)
    warm = np.zeros(n, bool) if warm is None else np.asarray(warm, bool)
    on = np.zeros(n, bool) if on is None else np.asarray(on, bool)
    columns = []
    for c in cols:
        values = df[c.key].tolist()
        if c.spec in _TEXTUAL:
            columns.append([(None, fmt(v, c.spec)) for v in values])
        else:
            columns.append([("" if v is None or (isinstance(v, float) and math.isnan(v))
                             else repr(float(v)), fmt(v, c.spec)) for v in values])
    marks = np.where(hot, "hot", np.where(warm, "warm", np.where(on, "on", "")))
    rows = [{"cls": str(m), "cells": cells} for m, cells in zip(marks, zip(*columns))]
    if not cols:
        rows = [{"cls": str(m), "cells": ()} for m in marks]
    return {"id": tid, "heads": heads, "rows": rows, "tall": tall}

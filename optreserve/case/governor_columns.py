"""Governor-model columns of units.csv, the [dynamics] section of case.toml (case format
version 2, "Governor models") and links.csv transient_limit_mw (the limit `simulate` checks
transient tie loading against), read and checked after the rest of the case.

Kept apart from reader.py so that the governor contract has one home: reader.py calls
`apply_governor_columns(case, folder)` once, on a case that has already passed every other
check. The columns are re-read from the raw units.csv (reader.py ignores, with a warning,
columns it does not know: those warnings are withdrawn here for the columns read here), so
errors name file, physical row and column exactly as reader.py's own do.

Bounds come from dynamics/governors.py (BOUNDS, REQUIRED): one table for reader, simulator,
nadir rows, docs and tests.
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd

from optreserve.case.data import Case
from optreserve.errors import CaseError, Problem

GOVERNOR_COLUMNS = ("governor", "governor_lag_s", "reheat_time_s", "hp_fraction",
                    "water_time_s", "delay_s")
RESPONSE_LIMITS = ("headroom", "room")
DYNAMICS_KEYS = {"response_limit": RESPONSE_LIMITS}


def apply_governor_columns(case: Case, folder: str | Path) -> Case:
    """The case with the governor columns in its units table (governor: model name, lag when
    blank; numeric columns NaN when not given, delay_s 0) and response_limit set.

    Raises CaseError naming file, row and column for a bad cell, an unknown model, a missing
    parameter its model needs, a value out of bounds, a delay on a non-inverter unit, a
    governor column in units_by_period.csv, or a bad [dynamics] key."""
    from optreserve.case.reader import Col, _Collector, _read_csv, _typed_table
    from optreserve.dynamics.governors import check_table

    folder = Path(folder)
    units_file = str(folder / "units.csv")
    toml_file = str(folder / "case.toml")
    probs: list[Problem] = []
    warnings = list(case.warnings)

    def withdraw(file: str, column: str | None, message: str, row: int | None = 1) -> bool:
        text = str(Problem(file, message, row, column))
        # the reader may have added a "did you mean" hint after the message
        hit = [w for w in warnings if w == text or w.startswith(text + " (did you mean")
               or w.startswith(text + "; did you mean")]
        for w in hit:
            warnings.remove(w)
        return bool(hit)

    units = case.units.copy()
    col = _Collector()
    raw = _read_csv(folder / "units.csv", units_file, col)
    given = [c for c in GOVERNOR_COLUMNS if raw is not None and c in raw.header]
    if given:
        cols = [Col("governor", "text", False, "lag")] + [
            Col(c, "float", False, math.nan) for c in GOVERNOR_COLUMNS[1:]]
        df = _typed_table(raw, [c for c in cols if c.name in given], col)
        for c in given:
            withdraw(units_file, c, "unknown column ignored", raw.header_line)
        probs += col.problems
        if df is not None and not col.problems:
            lines = df["_line"].to_numpy()
            for c in given:
                units[c] = (df[c].astype(str).str.strip().str.lower().to_numpy(object)
                            if c == "governor" else df[c].to_numpy(float))
            for p in check_table(units):
                if p.column == "activation_time_s" and not _is_new_model(units, p.unit):
                    continue  # version 1 semantics for lag units: reader.py checks > 0
                probs.append(Problem(units_file, p.message, int(lines[p.unit]), p.column))
    for c in GOVERNOR_COLUMNS:
        if c not in units.columns:
            units[c] = "lag" if c == "governor" else (0.0 if c == "delay_s" else math.nan)
    units["delay_s"] = np.nan_to_num(units["delay_s"].to_numpy(float))

    # links.csv transient_limit_mw: what a tie may carry during the swing (simulate)
    links = case.links
    lfile = folder / "links.csv"
    lraw = _read_csv(lfile, str(lfile), _Collector()) if lfile.is_file() else None
    if lraw is not None and "transient_limit_mw" in lraw.header:
        lcol = _Collector()
        ldf = _typed_table(lraw, [Col("transient_limit_mw", "float", False, math.nan,
                                      check=lambda v: None if v > 0 else "must be > 0")], lcol)
        withdraw(str(lfile), "transient_limit_mw", "unknown column ignored", lraw.header_line)
        probs += lcol.problems
        if ldf is not None and len(ldf) == len(links):
            links = links.assign(transient_limit_mw=ldf["transient_limit_mw"].to_numpy(float))

    # a unit's governor is a setting of the unit, not a time series
    per = folder / "units_by_period.csv"
    if per.is_file():
        t = _read_csv(per, str(per), _Collector())
        for c in GOVERNOR_COLUMNS:
            if t is not None and c in t.header:
                withdraw(str(per), c, "unknown column ignored", t.header_line)
                probs.append(Problem(str(per), "is a setting of the unit, not a time series "
                                     "(it cannot vary by period)", t.header_line, c))

    response_limit = "headroom"
    toml = folder / "case.toml"
    text = toml.read_text(encoding="utf-8-sig") if toml.is_file() else ""
    doc = tomllib.loads(text) if "dynamics" in text else {}
    dyn = doc.get("dynamics")
    if dyn is not None:
        from optreserve.case.reader import _toml_line
        withdraw(toml_file, None, "unknown section [dynamics] ignored",
                 _toml_line(text, "", "[dynamics]"))
        if not isinstance(dyn, dict):
            probs.append(Problem(toml_file, "dynamics must be a section [dynamics]",
                                 _toml_line(text, "", "dynamics"), "dynamics"))
            dyn = {}
        for key, v in dyn.items():
            line = _toml_line(text, "dynamics", key)
            if key not in DYNAMICS_KEYS:
                warnings.append(str(Problem(toml_file, f"unknown key 'dynamics.{key}' ignored",
                                            line, f"dynamics.{key}")))
            elif not isinstance(v, str) or v.strip().lower() not in DYNAMICS_KEYS[key]:
                probs.append(Problem(toml_file, f"must be one of "
                                     f"{', '.join(map(repr, DYNAMICS_KEYS[key]))}, got {v!r}",
                                     line, f"dynamics.{key}"))
            else:
                response_limit = v.strip().lower()
    if probs:
        raise CaseError(probs)
    return case.replace(units=units, links=links, warnings=tuple(warnings),
                        response_limit=response_limit)


def _is_new_model(units: pd.DataFrame, i: int) -> bool:
    return str(units["governor"].iloc[i]) != "lag"

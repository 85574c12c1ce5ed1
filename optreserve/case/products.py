"""Reserve products in the case tables (contract version 2): participation and direction
(`provides` = true/false/always/up/down) and common-mode trips (`unit` = `G1+G2`).

The reader calls check_products once its tables are typed; everything here works on whole
columns and reports each bad cell by file, row and column. After it the units table (and any
`units_by_period.csv` override table) carries the agreed columns:
  provides (bool: may provide at all), provides_always (bool: governor on by obligation),
  provides_up, provides_down (bool: directions in which it holds headroom and responds).
Override tables keep a missing flag (pd.NA) where a period keeps the static value.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import scipy.sparse as sp

TRUE_WORDS = {"true", "1", "yes", "y", "t"}
FALSE_WORDS = {"false", "0", "no", "n", "f"}

# provides word -> (provides, always, up, down)
PROVIDES_WORDS: dict[str, tuple[bool, bool, bool, bool]] = {
    **{w: (True, False, True, True) for w in TRUE_WORDS},
    **{w: (False, False, False, False) for w in FALSE_WORDS},
    "always": (True, True, True, True),
    "up": (True, False, True, False),
    "down": (True, False, False, True),
}
PROVIDES_COLS = ("provides", "provides_always", "provides_up", "provides_down")


def parse_provides(raw, lines, file: str, col, keep_empty: bool = False) -> dict[str, np.ndarray]:
    """The four agreed columns from the `provides` words (case-insensitive). Empty cells give
    the default (true) or, with keep_empty (override tables), missing (nullable boolean
    arrays, two bytes a row): keep the static value. Each distinct cell is parsed once (a year
    of quarter-hours repeats a few words ten million times); every bad row is still reported.
    raw: the cells, or a Categorical of them (the Parquet reader's)."""
    if isinstance(raw, pd.Categorical) and not (raw.codes < 0).any():
        codes, cells = raw.codes, np.asarray(raw.categories, dtype=object)
    else:
        codes, cells = pd.factorize(np.asarray(raw, dtype=object), use_na_sentinel=False)
    words = pd.Series([str(x).strip().lower() for x in cells], dtype=object)
    empty = (words == "").to_numpy()[codes]
    known = words.isin(PROVIDES_WORDS).to_numpy()[codes]
    for r in np.nonzero(~empty & ~known)[0]:
        col.error(file, f"expected true, false, always, up or down, got '{str(raw[r])[:40]}'",
                  int(lines[r]), "provides")
    table = np.array([PROVIDES_WORDS.get(w, PROVIDES_WORDS["true"]) for w in words],
                     dtype=bool).reshape(len(words), 4)[codes]
    out = {}
    for k, name in enumerate(PROVIDES_COLS):
        if keep_empty:
            out[name] = pd.arrays.BooleanArray(table[:, k].copy(), empty.copy())
        else:
            out[name] = table[:, k].copy()
    return out


def check_products(folder: Path, units: pd.DataFrame | None, events: pd.DataFrame | None,
                   series_raw: dict[str, pd.DataFrame], settings: dict[str, Any], col) -> None:
    """Parse and check the reserve-product columns in place (units, units_by_period)."""
    if units is not None:
        for name, v in parse_provides(units["provides"].to_numpy(object),
                                      units["_line"].to_numpy(), str(folder / "units.csv"),
                                      col).items():
            units[name] = v
    ser = series_raw.get("units")
    _check_energy(folder, units, ser, settings, col)
    if ser is not None and "provides" in ser.columns:
        file = ser.attrs.get("file", str(folder / "units_by_period.csv"))  # .csv or .parquet
        for name, v in parse_provides(ser["provides"].array, ser["_line"].to_numpy(), file, col,
                                      keep_empty=True).items():
            ser[name] = pd.Series(v, index=ser.index)


def _check_energy(folder: Path, units, ser, settings, col) -> None:
    """An energy column needs [limits] min_sustain_minutes (contract v2)."""
    if settings.get("limits.min_sustain_minutes") is not None:
        return
    for file, df in (("units.csv", units), ("units_by_period.csv", ser)):
        if df is None:
            continue
        file = df.attrs.get("file", file)  # the file actually read (.csv or .parquet)
        for name in ENERGY_COLS:
            if name in df.columns and df[name].notna().any():
                r = int(np.argmax(df[name].notna().to_numpy()))
                col.error(str(folder / file), f"{name} is given but case.toml has no [limits] "
                          "min_sustain_minutes (how long full activation must last)",
                          int(df["_line"].iloc[r]), name)
                return


def energy_caps(case, E_up, E_dn) -> tuple[np.ndarray, np.ndarray]:
    """Headroom an energy-limited provider can sustain for min_sustain_minutes:
    headroom <= energy_mwh * 60 / min_sustain_minutes (NaN: no energy limit)."""
    t = case.limits.min_sustain_minutes
    E_up, E_dn = np.asarray(E_up, float), np.asarray(E_dn, float)
    if t is None:
        return np.full(E_up.shape, np.nan), np.full(E_dn.shape, np.nan)
    return E_up * 60.0 / t, E_dn * 60.0 / t


def unit_flags(units: pd.DataFrame) -> dict[str, np.ndarray]:
    """The agreed columns of a units table, with defaults for tables built without them
    (tests, generated cases): every provider both ways, none always on."""
    prov = units["provides"].to_numpy(bool)
    return {"provides": prov,
            "provides_always": _col(units, "provides_always", np.zeros(len(units), bool)),
            "provides_up": _col(units, "provides_up", prov),
            "provides_down": _col(units, "provides_down", prov)}


def _col(units: pd.DataFrame, name: str, default: np.ndarray) -> np.ndarray:
    return units[name].to_numpy(bool) if name in units.columns else default


ENERGY_COLS = ("energy_up_mwh", "energy_down_mwh")


# ------------------------------------------------------------------ common-mode trips
TRIP_JOIN = "+"


def trip_names(unit_field: str) -> list[str]:
    """Units named by a unit_trip's `unit` cell: one id, or several joined by '+'."""
    return [p.strip() for p in str(unit_field).split(TRIP_JOIN)]


def trip_lookup(ev: pd.DataFrame, units: pd.DataFrame, file: str, col) -> tuple[dict, dict]:
    """(area, output) of every unit and of every valid common-mode trip (`G1+G2`) of the
    events table, for the reader's event checks: a common-mode trip lies in its units' one
    area and its size defaults to the sum of their outputs. A bad name (unknown or repeated
    unit, units in different areas) is reported here, on the event's row."""
    unit_area = dict(zip(units["unit"], units["area"]))
    unit_out = dict(zip(units["unit"], units["output_mw"]))
    kind = ev["kind"].to_numpy(object)
    names = ev["unit"].to_numpy(object)
    lines = ev["_line"].to_numpy()
    for r in np.nonzero((kind == "unit_trip") & pd.Series(names).str.contains(
            TRIP_JOIN, regex=False).to_numpy())[0]:
        parts = trip_names(names[r])
        bad = [p for p in parts if p not in unit_area]
        msg = None
        if any(p == "" for p in parts):
            msg = f"empty unit name in common-mode trip '{names[r]}'"
        elif bad:
            msg = f"unknown unit '{bad[0]}' in common-mode trip '{names[r]}' (not in units.csv)"
        elif len(set(parts)) < len(parts):
            msg = f"a unit appears twice in common-mode trip '{names[r]}'"
        elif len({unit_area[p] for p in parts}) > 1:
            msg = (f"the units of common-mode trip '{names[r]}' lie in different areas "
                   f"({', '.join(sorted({unit_area[p] for p in parts}))}): one area is required")
        if msg is not None:
            col.error(file, msg, int(lines[r]), "unit")
            unit_area[names[r]], unit_out[names[r]] = ev["area"].iloc[r], 1.0  # reported
            continue
        unit_area[names[r]] = unit_area[parts[0]]
        unit_out[names[r]] = float(sum(unit_out[p] for p in parts))
    return unit_area, unit_out


def trip_members(units: pd.DataFrame, events: pd.DataFrame) -> sp.csr_matrix:
    """(E, N) sparse 0/1 matrix: the units each event loses (all units of a common-mode
    trip; none for a load step)."""
    upos = {u: k for k, u in enumerate(units["unit"])}
    rows, cols = [], []
    for e, (kind, name) in enumerate(zip(events["kind"], events["unit"])):
        if kind == "unit_trip":
            for p in trip_names(name):
                if p in upos:
                    rows.append(e)
                    cols.append(upos[p])
    return sp.csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(len(events), len(units)))

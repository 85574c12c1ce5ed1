"""Reserve products in the case tables (contract version 2): participation and direction
(`provides` = true/false/always/up/down).

The reader calls check_products once its tables are typed; everything here works on whole
columns and reports each bad cell by file, row and column. After it the units table (and any
`units_by_period.csv` override table) carries the agreed columns:
  provides (bool: may provide at all), provides_always (bool: governor on by obligation),
  provides_up, provides_down (bool: directions in which it holds headroom and responds).
Override tables keep None where a period keeps the static value.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

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
    the default (true) or, with keep_empty (override tables), None: keep the static value."""
    words = pd.Series([str(x).strip().lower() for x in np.asarray(raw, dtype=object)],
                      dtype=object)
    empty = (words == "").to_numpy()
    known = words.isin(PROVIDES_WORDS).to_numpy()
    for r in np.nonzero(~empty & ~known)[0]:
        col.error(file, f"expected true, false, always, up or down, got '{str(raw[r])[:40]}'",
                  int(lines[r]), "provides")
    table = np.array([PROVIDES_WORDS.get(w, PROVIDES_WORDS["true"]) for w in words],
                     dtype=bool).reshape(len(words), 4)
    out = {}
    for k, name in enumerate(PROVIDES_COLS):
        if keep_empty:
            v = np.where(empty, None, table[:, k]).astype(object)
            v[~empty] = table[~empty, k].astype(bool)
            out[name] = v
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
    if ser is not None and "provides" in ser.columns:
        for name, v in parse_provides(ser["provides"].to_numpy(object), ser["_line"].to_numpy(),
                                      str(folder / "units_by_period.csv"), col,
                                      keep_empty=True).items():
            ser[name] = pd.Series(v, index=ser.index, dtype=object)


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


# derived override columns the reader keeps in units_by_period.csv (the user writes `provides`)
PRODUCT_SERIES_COLS = ("provides_always", "provides_up", "provides_down")

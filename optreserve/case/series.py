"""The time series of a case: `units_by_period.csv`, `areas_by_period.csv`,
`links_by_period.csv` and the `period` column of events.csv (docs/case-format.md, "Time
series"). Period labels are integers or ISO-8601 timestamps; which columns may vary by period
comes from the column tables (columns.py, `per_period`)."""

from __future__ import annotations

import functools
import itertools
import re
from datetime import datetime
from pathlib import Path

import numpy as np
import pandas as pd

from optreserve.case.checks import check_reactance_spread
from optreserve.case.columns import AREA_COLS, LINK_COLS, UNIT_COLS, series_columns
from optreserve.case.csvio import _read_csv, _Table
from optreserve.case.problems import MAX_PROBLEMS, _Collector, suggest

SERIES = {"units": ("unit", UNIT_COLS), "areas": ("area", AREA_COLS),
          "links": ("link", LINK_COLS)}


@functools.lru_cache(maxsize=100_000)
def _period_key(label: str):
    """Integers sort as numbers, anything else must be an ISO-8601 timestamp."""
    if re.fullmatch(r"[+-]?[0-9]{1,18}", label):  # ASCII digits; longer is no period number
        return ("int", int(label))
    try:  # ISO-8601 only (what datetime.fromisoformat reads), not any date-like text
        ts = pd.Timestamp(datetime.fromisoformat(label))
    except (ValueError, TypeError):
        return None
    if ts.tzinfo is not None:
        ts = ts.tz_convert("UTC").tz_localize(None)
    return ("time", ts)


def _check_series(folder, series_raw, units, areas, links, events, settings, col):
    """Validate the *_by_period tables against the static ones; return the period labels in
    order, their lengths in hours and the override tables (NaN = keep the static value)."""
    ids = {"units": set(units["unit"]), "areas": set(areas["area"]), "links": set(links["link"])}
    sets: dict[str, set] = {}
    keys: dict[str, tuple] = {}
    bad = False
    for key, df in series_raw.items():
        idc = SERIES[key][0]
        file = df.attrs.get("file", str(folder / f"{key}_by_period.csv"))
        per_arr = df["period"].to_numpy(object)
        id_arr = df[idc].to_numpy(object)
        line_arr = df["_line"].to_numpy()
        for per in dict.fromkeys(per_arr):
            k = _period_key(per)
            if k is None:
                first = int(line_arr[np.nonzero(per_arr == per)[0][0]])
                col.error(file, f"period '{per[:40]}' is neither an integer nor an ISO-8601 "
                          "timestamp", first, "period")
                bad = True
            else:
                keys[per] = k
        for r in np.nonzero(~pd.Series(id_arr).isin(ids[key]).to_numpy())[0][:MAX_PROBLEMS]:
            col.error(file, f"unknown {idc} '{id_arr[r]}' (not in {key}.csv)"
                      + suggest(str(id_arr[r]), ids[key]), int(line_arr[r]), idc)
        dup = df.duplicated(subset=["period", idc], keep="first").to_numpy()
        if dup.any():
            first_line = {(p_, i_): ln for p_, i_, ln, d_ in zip(per_arr, id_arr, line_arr, dup)
                          if not d_}
            for r in np.nonzero(dup)[0][:MAX_PROBLEMS]:
                col.error(file, f"duplicate row for period '{per_arr[r]}' and {idc} "
                          f"'{id_arr[r]}' (first at row {first_line[(per_arr[r], id_arr[r])]})",
                          int(line_arr[r]), idc)
        sets[key] = set(df["period"])
    ev_file = str(folder / "events.csv")
    ev_periods = [(p, int(ln)) for p, ln in zip(events["period"], events["_line"]) if p]
    for per, line in ev_periods:
        k = _period_key(per)
        if k is None:
            col.error(ev_file, f"period '{per[:40]}' is neither an integer nor an ISO-8601 "
                      "timestamp", line, "period")
            bad = True
        else:
            keys[per] = k
    if bad:
        return (), (), {}
    kinds = {k[0] for k in keys.values()}
    if len(kinds) > 1:
        col.error(str(folder), "periods mix integers and timestamps; use one kind throughout")
        return (), (), {}
    if sets:
        names = sorted(sets)
        ref = sets[names[0]]
        for other in names[1:]:
            if sets[other] != ref:
                diff = sorted(ref.symmetric_difference(sets[other]), key=lambda p: keys[p][1])
                col.error(str(folder / f"{other}_by_period.csv"), "periods differ from "
                          f"{names[0]}_by_period.csv (e.g. '{diff[0]}'): every time-series file "
                          "must list the same periods")
                return (), (), {}
        labels = ref
        for per, line in ev_periods:
            if per not in labels:
                col.error(ev_file, f"period '{per}' is not a period of the time series", line,
                          "period")
    else:
        labels = {p for p, _ in ev_periods}
    # same instant written two ways ("2026-01-01T00:00" and "2026-01-01 00:00") is one period
    order = sorted(labels, key=lambda p: keys[p][1])
    if len({keys[p][1] for p in order}) != len(order):
        col.error(str(folder), "two period labels name the same period")
        return (), (), {}
    period_hours = settings.get("horizon.period_hours")
    if kinds == {"time"} and len(order) > 1:
        ts = [keys[p][1] for p in order]
        gaps = [(b - a).total_seconds() / 3600.0 for a, b in itertools.pairwise(ts)]
        hours = gaps + [period_hours if period_hours else gaps[-1]]
    else:
        hours = [period_hours if period_hours else 1.0] * len(order)
    # value checks on the combined (static + override) data
    if "units" in series_raw:
        _check_unit_series(series_raw["units"], units, series_raw["units"].attrs.get(
            "file", str(folder / "units_by_period.csv")), col)
    if "links" in series_raw and "reactance_pu" in series_raw["links"].columns and len(links):
        x0 = links["reactance_pu"].to_numpy(float)
        check_reactance_spread(series_raw["links"]["reactance_pu"].to_numpy(float),
                               series_raw["links"]["_line"].to_numpy(),
                               str(folder / "links_by_period.csv"), col,
                               static=(float(x0.min()), float(x0.max())))
    out = {}
    for key, df in series_raw.items():
        idc = SERIES[key][0]
        keep = ["period", idc] + [c for c in df.columns if c in series_columns(key)]
        out[key] = df[keep].reset_index(drop=True)
    return tuple(order), tuple(float(h) for h in hours), out


def _check_unit_series(ser, units, file, col):
    """output within [min_output, capacity] in every period, overrides applied (vectorised)."""
    base = units.set_index("unit")
    known = ser["unit"].isin(base.index).to_numpy()
    s = ser[known]
    b = base.loc[s["unit"]]
    out = s["output_mw"].fillna(pd.Series(b["output_mw"].to_numpy(), index=s.index))
    mn = s["min_output_mw"].fillna(pd.Series(b["min_output_mw"].to_numpy(), index=s.index))
    cap = b["capacity_mw"].to_numpy()
    bad = ~((mn.to_numpy() <= out.to_numpy()) & (out.to_numpy() <= cap))
    for k in np.nonzero(bad)[0]:
        r = s.iloc[k]
        col.error(file, f"output_mw {out.iloc[k]:g} outside [min_output_mw {mn.iloc[k]:g}, "
                  f"capacity_mw {cap[k]:g}] in period '{r['period']}'", int(r["_line"]),
                  "output_mw")


def _series_file(csv_path: Path, col: _Collector, lab):
    """NAME_by_period.csv, or NAME_by_period.parquet in its place: (path, reader) or
    (None, None) when neither is there; both at once is an error."""
    pq = csv_path.with_suffix(".parquet")
    if csv_path.is_file() and pq.is_file():
        col.error(lab(pq.name), f"given together with {csv_path.name}: keep one of them")
        return None, None
    if pq.is_file():
        return pq, _read_parquet
    return (csv_path, _read_csv) if csv_path.is_file() else (None, None)


def _read_parquet(path: Path, label: str, col: _Collector) -> _Table | None:
    """A Parquet time series as the CSV reader's _Table (every cell as text), so that each
    check and message is the CSV one. Rows are numbered as in the same table written as CSV
    (header row 1, first record row 2)."""
    try:
        df = pd.read_parquet(path)
    except Exception as exc:  # noqa: BLE001 - pyarrow raises several kinds for a bad file
        col.error(label, f"cannot be read as Parquet ({type(exc).__name__}: {exc})"[:300])
        return None
    header = [str(c) for c in df.columns]
    columns = []
    for c in df.columns:
        # one text per distinct value, shared by its cells: a year of quarter-hours has ten
        # million rows but few distinct periods, ids and values (memory, docs/performance.md)
        codes, uniq = pd.factorize(df[c], use_na_sentinel=True)
        words = np.append(pd.Series(uniq).astype(str).str.strip().to_numpy(dtype=object), "")
        columns.append(words[codes])  # code -1 (missing) takes the last word, ""
    return _Table(label, 1, header, columns, np.arange(len(df), dtype=np.int64) + 2)

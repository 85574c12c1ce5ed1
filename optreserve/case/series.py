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
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from optreserve.case.checks import check_reactance_spread
from optreserve.case.columns import AREA_COLS, LINK_COLS, UNIT_COLS, series_columns
from optreserve.case.csvio import _Coded, _read_csv, _Table
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
        line_arr = df["_line"].to_numpy()
        # integer codes of the period and id cells: every check below runs on the distinct
        # labels and on integers, never on one Python object per row
        per_c, per_u = _codes(df["period"])
        id_c, id_u = _codes(df[idc])
        bad_per = []
        for k, per in enumerate(per_u):
            pk = _period_key(per)
            if pk is None:
                bad_per.append(k)
            else:
                keys[per] = pk
        first_rows = sorted((int(np.argmax(per_c == k)), k) for k in bad_per)  # error path
        for r, k in first_rows:  # in the order the labels first appear
            col.error(file, f"period '{per_u[k][:40]}' is neither an integer nor an ISO-8601 "
                      "timestamp", int(line_arr[r]), "period")
            bad = True
        unknown = ~pd.Index(id_u, dtype=object).isin(ids[key])
        if unknown.any():
            for r in np.nonzero(unknown[id_c])[0][:MAX_PROBLEMS]:
                w = id_u[id_c[r]]
                col.error(file, f"unknown {idc} '{w}' (not in {key}.csv)"
                          + suggest(str(w), ids[key]), int(line_arr[r]), idc)
        pair = per_c.astype(np.int64) * max(1, len(id_u)) + id_c
        for r in _duplicate_rows(pair)[:MAX_PROBLEMS]:
            first = int(np.argmax(pair == pair[r]))  # error path only: a scan per reported row
            col.error(file, f"duplicate row for period '{per_u[per_c[r]]}' and {idc} "
                      f"'{id_u[id_c[r]]}' (first at row {line_arr[first]})",
                      int(line_arr[r]), idc)
        sets[key] = set(per_u)
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
                diff = sorted(ref.symmetric_difference(sets[other]),  # ties by label: one answer
                              key=lambda p: (keys[p][1], p))
                ref_file = series_raw[names[0]].attrs.get("file", f"{names[0]}_by_period.csv")
                col.error(series_raw[other].attrs.get(
                    "file", str(folder / f"{other}_by_period.csv")), "periods differ from "
                    f"{Path(ref_file).name} (e.g. '{diff[0]}'): every time-series file "
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
                               series_raw["links"].attrs.get(
                                   "file", str(folder / "links_by_period.csv")), col,
                               static=(float(x0.min()), float(x0.max())))
    out = {}
    for key, df in series_raw.items():
        # the checked table in place of the read one (never both): codes back to one shared
        # text per label, the line numbers go
        idc = SERIES[key][0]
        for c in ("period", idc):
            if isinstance(df[c].dtype, pd.CategoricalDtype):
                df[c] = np.asarray(df[c], dtype=object)
        for c in [c for c in df.columns if c not in ("period", idc)
                  and c not in series_columns(key)]:
            del df[c]  # _line
        out[key] = df
    return tuple(order), tuple(float(h) for h in hours), out


def _codes(s: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """(codes, labels) of a text column: labels[codes[r]] is row r's cell, every label used."""
    if isinstance(s.dtype, pd.CategoricalDtype):  # Parquet (csvio._typed_coded)
        return s.cat.codes.to_numpy(), s.cat.categories.to_numpy(dtype=object)
    codes, labels = pd.factorize(s.to_numpy(dtype=object))
    return codes, np.asarray(labels, dtype=object)


def _duplicate_rows(pair: np.ndarray) -> np.ndarray:
    """Rows whose (period, id) code pair appeared on an earlier row. A count per pair settles
    the usual case (no duplicate) in one pass and a small array."""
    if not len(pair):
        return np.zeros(0, dtype=np.int64)
    top = int(pair.max()) + 1
    if top <= 4 * len(pair) + 1024 and not (np.bincount(pair, minlength=top) > 1).any():
        return np.zeros(0, dtype=np.int64)
    return np.nonzero(pd.Series(pair).duplicated(keep="first").to_numpy())[0]


_CHUNK = 1 << 20  # rows per pass of the bounds check: its float temporaries stay small


def _check_unit_series(ser, units, file, col):
    """output within [min_output, capacity] in every period, overrides applied (vectorised,
    a million rows at a time)."""
    id_c, id_u = _codes(ser["unit"])
    upos = pd.Index(units["unit"], dtype=object).get_indexer(id_u)  # -1: unknown unit
    st_out = units["output_mw"].to_numpy(float)
    st_min = units["min_output_mw"].to_numpy(float)
    st_cap = units["capacity_mw"].to_numpy(float)
    per_c, per_u = _codes(ser["period"])
    lines = ser["_line"].to_numpy()
    ov_out = ser["output_mw"].to_numpy(float) if "output_mw" in ser.columns else None
    ov_min = ser["min_output_mw"].to_numpy(float) if "min_output_mw" in ser.columns else None
    for a in range(0, len(ser), _CHUNK):
        sl = slice(a, a + _CHUNK)
        u = upos[id_c[sl]]
        known = u >= 0
        u = np.where(known, u, 0)
        out = st_out[u] if ov_out is None else np.where(np.isnan(ov_out[sl]), st_out[u],
                                                        ov_out[sl])
        mn = st_min[u] if ov_min is None else np.where(np.isnan(ov_min[sl]), st_min[u],
                                                       ov_min[sl])
        cap = st_cap[u]
        bad = known & ~((mn <= out) & (out <= cap))
        for k in np.nonzero(bad)[0]:
            col.error(file, f"output_mw {out[k]:g} outside [min_output_mw {mn[k]:g}, "
                      f"capacity_mw {cap[k]:g}] in period '{per_u[per_c[a + k]]}'",
                      int(lines[a + k]), "output_mw")


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
    (header row 1, first record row 2). Each column comes as its distinct cells (_Coded):
    text columns are read as Parquet dictionaries, so no text is made per row."""
    try:
        pf = pq.ParquetFile(path, read_dictionary=[
            f.name for f in pq.read_schema(path)
            if pa.types.is_string(f.type) or pa.types.is_large_string(f.type)])
        schema = pf.schema_arrow
        # a pandas index written with the table is no column of it (as pandas.read_parquet
        # reads it)
        index_cols = {c for c in (schema.pandas_metadata or {}).get("index_columns", [])
                      if isinstance(c, str)}
        names = [c for c in schema.names if c not in index_cols]
        # one column at a time: only one column's Arrow buffers are alive at once
        columns = [_coded_column(pf.read(columns=[name], use_threads=False).column(0))
                   for name in names]
        n = pf.metadata.num_rows
        del pf
        # Arrow's allocator keeps freed buffers for reuse; the rest of the run never reads
        # Parquet again, so they go back now (tens of MB after a year of quarter-hours)
        pa.default_memory_pool().release_unused()
    except Exception as exc:  # noqa: BLE001 - pyarrow raises several kinds for a bad file
        col.error(label, f"cannot be read as Parquet ({type(exc).__name__}: {exc})"[:300])
        return None
    header = [str(c) for c in names]
    lines = np.arange(2, n + 2, dtype=np.int32 if n < 2**31 - 2 else np.int64)
    return _Table(label, 1, header, columns, lines)


def _coded_column(arr: pa.ChunkedArray) -> _Coded:
    """One Parquet column as row codes into its distinct cells written as text (stripped),
    encoded by Arrow (int32 codes, no hash table of Python objects); a missing cell (null,
    NaN) is the empty word, as pandas.read_parquet would give it."""
    if not pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_encode()
    arr = arr.unify_dictionaries()
    value_type = arr.type.value_type
    if not arr.num_chunks:
        return _Coded(np.zeros(0, dtype=np.int32), np.array([""], dtype=object))
    dictionary = arr.chunk(0).dictionary
    if pa.types.is_integer(value_type) and arr.null_count:
        dictionary = dictionary.cast(pa.float64())  # pandas reads such a column as floats
    k = len(dictionary)
    small = np.int8 if k < 127 else np.int16 if k < 32767 else np.int32  # k + 1 words
    codes = np.concatenate([pc.fill_null(c.indices, k).to_numpy().astype(small, copy=False)
                            for c in arr.chunks])
    del arr
    uniq = pd.Series(dictionary.to_pandas())
    words = uniq.astype(str).str.strip().to_numpy(dtype=object)
    words[uniq.isna().to_numpy()] = ""
    return _Coded(codes, np.append(words, ""))  # code k (null) takes the last word, ""

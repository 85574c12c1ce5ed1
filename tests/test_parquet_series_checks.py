"""Parquet time series are checked cell by cell like their CSV form (case/series.py reads
them as distinct cells and row codes; csvio._typed_coded types each distinct cell once).

Outside references: the case-format contract's error rule (docs/case-format.md, "General
rules": every problem names file, row and column; a Parquet table's rows are numbered as
the same table written as CSV); pandas' own to_csv / to_parquet (pyarrow) write the two
forms of each table, and the CSV form goes through the row-by-row reader; a plain-Python
scan over the rows (a dict of first rows) is the independent oracle of unknown ids and
duplicate (period, unit) rows. Corruptions are drawn with fixed seeds (deterministic)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import optreserve
from optreserve.errors import CaseError
from optreserve.studies.generate import Spec, generate


@pytest.fixture(scope="module")
def base(tmp_path_factory):
    folder = generate(Spec(units=14, areas=2, links=1, periods=6, events=3, seed=9),
                      tmp_path_factory.mktemp("base") / "case")
    table = pd.read_csv(folder / "units_by_period.csv", dtype={"period": str})
    return folder, table


def _both(folder, table, tmp_path, name):
    """The same folder twice: units_by_period as CSV and as Parquet (written by pandas)."""
    out = {}
    for kind in ("csv", "parquet"):
        d = tmp_path / f"{name}-{kind}"
        d.mkdir()
        for f in folder.iterdir():
            if f.name != "units_by_period.csv":
                (d / f.name).write_bytes(f.read_bytes())
        if kind == "csv":
            table.to_csv(d / "units_by_period.csv", index=False, lineterminator="\n")
        else:
            table.to_parquet(d / "units_by_period.parquet", index=False)
        out[kind] = d
    return out


def _problems(folder):
    with pytest.raises(CaseError) as err:
        optreserve.load_case(folder)
    return [(p.file.rsplit("/", 1)[-1].replace(".parquet", ".csv"), p.message, p.row, p.column)
            for p in err.value.problems]


def _corrupt_cells(table, rng, n_bad):
    """Text where numbers and words belong, NaN text, negative prices: typing problems."""
    t = table.astype({"output_mw": str, "provides": str, "price_up_per_mw_h": str})  # text
    rows = rng.choice(len(t), size=3 * n_bad, replace=False)
    for r in rows[:n_bad]:
        t.loc[r, "output_mw"] = rng.choice(["abc", "NaN", "1,5", "--2"])
    for r in rows[n_bad:2 * n_bad]:
        t.loc[r, "provides"] = rng.choice(["perhaps", "sometimes"])
    for r in rows[2 * n_bad:]:
        t.loc[r, "price_up_per_mw_h"] = rng.choice(["-3", "-0.5"])
    return t


def _corrupt_rows(table, rng, n_bad):
    """Unknown units and rows repeating an earlier (period, unit): checks across rows."""
    t = table.copy()
    rows = rng.choice(np.arange(1, len(t)), size=2 * n_bad, replace=False)
    for r in rows[:n_bad]:
        t.loc[r, "unit"] = rng.choice(["U9999_ghost", "U0001_stem"])
    for r in rows[n_bad:]:
        src = int(rng.integers(0, r))
        t.loc[r, ["period", "unit"]] = t.loc[src, ["period", "unit"]].to_numpy()
    return t


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("n_bad", [3, 25])
def test_cell_problems_same_in_parquet_as_in_csv(base, tmp_path, seed, n_bad):
    """Every bad cell is reported on its own row and column with the CSV message; with more
    bad cells than are listed the count of the rest agrees too (25 x 3 > 50 kept)."""
    folder, table = base
    t = _corrupt_cells(table, np.random.default_rng(seed), n_bad)
    two = _both(folder, t, tmp_path, f"c{seed}-{n_bad}")
    csv, parquet = _problems(two["csv"]), _problems(two["parquet"])
    assert parquet == csv
    cols = {c for _, _, _, c in parquet}
    if n_bad == 3:  # all nine listed
        assert {"output_mw", "provides", "price_up_per_mw_h"} <= cols and len(parquet) == 9
    else:  # the first 50 kept, the rest counted
        assert len(parquet) == 51 and parquet[-1][1].endswith("more problems")
    assert all(isinstance(r, int) and r >= 2 for _, msg, r, _ in parquet if "more" not in msg)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_unknown_and_duplicate_rows_located_like_a_row_scan(base, tmp_path, seed):
    """Unknown unit ids and duplicate (period, unit) rows: the same problems as the CSV form,
    and exactly the rows a plain scan over the table finds (row = record index + 2)."""
    folder, table = base
    t = _corrupt_rows(table, np.random.default_rng(seed), 4)
    two = _both(folder, t, tmp_path, f"r{seed}")
    csv, parquet = _problems(two["csv"]), _problems(two["parquet"])
    assert parquet == csv
    known = set(pd.read_csv(folder / "units.csv")["unit"])
    first: dict[tuple, int] = {}
    want_unknown, want_dup = [], []
    for k, (p, u) in enumerate(zip(t["period"], t["unit"])):
        if u not in known:
            want_unknown.append(k + 2)
        if (p, u) in first:
            want_dup.append((k + 2, first[(p, u)]))
        else:
            first[(p, u)] = k + 2
    got_unknown = [r for _, m, r, c in parquet if m.startswith("unknown unit")]
    got_dup = [(r, int(m.split("first at row ")[1].rstrip(")"))) for _, m, r, c in parquet
               if m.startswith("duplicate row")]
    assert got_unknown == want_unknown and len(want_unknown) == 4
    assert got_dup == want_dup and len(want_dup) >= 4
    assert all(c == "unit" for _, m, _, c in parquet)


def test_bad_period_and_output_above_capacity(base, tmp_path):
    """A period label that is no integer nor ISO-8601 timestamp is reported at the first row
    holding it (labels in the order they first appear); an output above capacity in a
    period is reported on every row where it happens."""
    folder, table = base
    t = table.copy()
    t.loc[[20, 21, 40], "period"] = ["next tuesday", "next tuesday", "soon"]
    two = _both(folder, t, tmp_path, "per")
    csv, parquet = _problems(two["csv"]), _problems(two["parquet"])
    assert parquet == csv
    assert [(r, c) for _, _, r, c in parquet] == [(22, "period"), (42, "period")]
    cap = pd.read_csv(folder / "units.csv").set_index("unit")["capacity_mw"]
    t = table.copy()
    over = [5, 33, 47]
    t.loc[over, "output_mw"] = cap.loc[t.loc[over, "unit"]].to_numpy() + 1.0
    two = _both(folder, t, tmp_path, "cap")
    csv, parquet = _problems(two["csv"]), _problems(two["parquet"])
    assert parquet == csv
    assert [r for _, _, r, _ in parquet] == [r + 2 for r in over]


def test_missing_cells_keep_static_values_and_index_is_no_column(base, tmp_path):
    """A null or NaN Parquet cell is an empty CSV cell (the static value is kept); a pandas
    index written with the table is not read as a column (no extra warning)."""
    folder, table = base
    t = table.copy()
    t.loc[[3, 9], "output_mw"] = np.nan
    t["provides"] = t["provides"].astype(str).where(t.index != 7, None)
    two = _both(folder, t, tmp_path, "na")
    t.set_index(pd.Index(np.arange(len(t)) * 3 + 1, name="rowid")).to_parquet(
        two["parquet"] / "units_by_period.parquet", index=True)
    a, b = optreserve.load_case(two["csv"]), optreserve.load_case(two["parquet"])
    for col in ("output_mw", "min_output_mw", "provides", "provides_up",
                "price_up_per_mw_h"):
        assert np.array_equal(a.unit_matrix(col), b.unit_matrix(col)), col
    static = a.units.set_index("unit")["output_mw"]
    t_pos = {p: k for k, p in enumerate(a.periods)}
    u_pos = {u: k for k, u in enumerate(a.units["unit"])}
    for r in (3, 9):
        got = b.unit_matrix("output_mw")[t_pos[t.loc[r, "period"]], u_pos[t.loc[r, "unit"]]]
        assert got == static[t.loc[r, "unit"]]
    assert [w.replace(".parquet", ".csv") for w in b.warnings] == list(a.warnings)

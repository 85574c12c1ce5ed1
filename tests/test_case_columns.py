"""The column tables of the contract are declared once (optreserve/case/columns.py) and the
user guide lists the same columns, the same required flags and the same bounds.

Outside reference: docs/case-format.md, the project's own statement of the contract
(../shared/design/case-format.md), which users read; a column added to the code without its
row in the guide (or the other way round) fails here.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from optreserve.case.columns import DERIVED_SERIES_COLS, TABLES, series_columns, series_hints

DOC = (Path(__file__).parents[1] / "docs" / "case-format.md").read_text(encoding="utf-8")
SECTIONS = {"units.csv": "## units.csv", "areas.csv": "## areas.csv",
            "links.csv": "## links.csv", "events.csv": "## events.csv (input)"}


def _rows(heading: str) -> dict[str, list[str]]:
    """column name -> the cells of its row in the first table under `heading`."""
    part = DOC.split("\n" + heading + "\n", 1)[1].split("\n## ", 1)[0]
    out = {}
    for line in part.splitlines():
        if line.startswith("| `"):
            cells = [c.strip() for c in line.strip().strip("|").split(" | ")]
            for name in re.findall(r"`([a-z_]+)`", cells[0]):
                out[name] = cells
    return out


@pytest.mark.parametrize("file", sorted(SECTIONS))
def test_guide_lists_the_declared_columns(file):
    rows = _rows(SECTIONS[file])
    assert set(rows) == {c.name for c in TABLES[file]}


@pytest.mark.parametrize("file", sorted(SECTIONS))
def test_guide_states_required_flags_and_bounds(file):
    rows = _rows(SECTIONS[file])
    for c in TABLES[file]:
        cells = rows[c.name]
        required = cells[2]
        assert (required == "yes") == c.required, (c.name, required)
        if c.bound_text():
            assert f"`{c.bound_text()}`" in cells[4], (c.name, c.bound_text(), cells[4])


def test_guide_time_series_table_matches_per_period_flags():
    part = DOC.split("## Time series: `*_by_period.csv`", 1)[1].split("\n## ", 1)[0]
    for key in ("units", "areas", "links"):
        line = next(ln for ln in part.splitlines() if ln.startswith(f"| `{key}_by_period.csv`"))
        cells = [c.strip() for c in line.strip().strip("|").split(" | ")]
        declared = series_columns(key) - DERIVED_SERIES_COLS[key]
        assert set(re.findall(r"`([a-z_]+)`", cells[2])) == declared, key
        assert set(re.findall(r"`([a-z_]+)`", cells[3])) == set(series_hints(key)), key


def test_a_later_version_declares_a_column_and_the_reader_types_and_bounds_it(tmp_path):
    """Version-2 columns are rows of the same table (columns.declare): read without the
    unknown-column warning, typed, bounded with file/row/column, and allowed per period.
    A column no version declares yet (ramp_limit_mw_per_min) serves as the example."""
    from conftest import write_case

    import optreserve
    from optreserve.case.columns import UNIT_COLS, Col, declare

    units = [{"unit": "Fen_1", "area": "Fen", "capacity_mw": 100, "output_mw": 50,
              "droop_min_pct": 4, "droop_max_pct": 6, "ramp_limit_mw_per_min": 20},
             {"unit": "Fen_2", "area": "Fen", "capacity_mw": 100, "output_mw": 50,
              "droop_min_pct": 4, "droop_max_pct": 6, "ramp_limit_mw_per_min": -1}]
    folder = write_case(tmp_path / "c", {"limits": {"max_settled_deviation_hz": 0.2}}, units,
                        [{"area": "Fen", "load_mw": 100}],
                        [{"event": "step", "kind": "load_step", "area": "Fen", "size_mw": 5}])
    before = optreserve.load_case(folder).warnings  # not declared: ignored, with a warning
    assert any("ramp_limit_mw_per_min" in w and "unknown column" in w for w in before)
    declare("units.csv", Col("ramp_limit_mw_per_min", "float", False, float("nan"), lo=0.0, hi=1e7,
                             unit="MW/min", per_period=True, version=2))
    try:
        with pytest.raises(optreserve.CaseError) as info:
            optreserve.load_case(folder)
        (p,) = info.value.problems
        assert (Path(p.file).name, p.row, p.column) == ("units.csv", 3, "ramp_limit_mw_per_min")
        assert "ramp_limit_mw_per_min" in series_columns("units")
        with pytest.raises(ValueError):
            declare("units.csv", Col("ramp_limit_mw_per_min", "float"))
    finally:
        UNIT_COLS[:] = [c for c in UNIT_COLS if c.name != "ramp_limit_mw_per_min"]

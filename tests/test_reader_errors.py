"""Bad inputs give CaseError naming file, row and column (case-format.md: header = row 1,
rows 1-based); warnings for suspicious but legal values; and the CLI contract (exit codes
0/2/3, one line per error, no traceback, nothing written on failure, --out protection).

Outside references: the case-format contract (docs) and common practice for the warning
thresholds (droop 2-12 %, dead band above 50 mHz far outside grid-code values: EU 2017/1485
Annex V allows at most 10-15 mHz, references.md)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest
from conftest import csv_text, settings, unit, write_case

import optreserve
from optreserve.cli import main

UNITS = [unit("Ashgrove_1", "Ashgrove", 400, 150, 2, 6, price_up=2),
         unit("Ashgrove_2", "Ashgrove", 300, 200, 2, 6, price_up=4),
         unit("Birchley_1", "Birchley", 500, 350, 2, 6, price_up=3)]
AREAS = [{"area": "Ashgrove", "load_mw": 2000, "load_damping_pct_per_hz": 1.0},
         {"area": "Birchley", "load_mw": 1500, "load_damping_pct_per_hz": 1.0}]
LINKS = [{"link": "AB", "from_area": "Ashgrove", "to_area": "Birchley", "reactance_pu": 0.02,
          "limit_mw": 500}]
EVENTS = [{"event": "trip_a1", "kind": "unit_trip", "unit": "Ashgrove_1"},
          {"event": "step_b", "kind": "load_step", "area": "Birchley", "size_mw": 100}]


@pytest.fixture
def good(tmp_path):
    """A valid two-area case; tests overwrite one file with bad content."""
    return write_case(tmp_path / "case", settings(), UNITS, AREAS, EVENTS, LINKS)


def problems(folder):
    with pytest.raises(optreserve.CaseError) as info:
        optreserve.load_case(folder)
    return info.value.problems


def only(folder, file):
    """The single problem reported, checked to be about `file`."""
    probs = problems(folder)
    assert len(probs) == 1, [str(p) for p in probs]
    assert Path(probs[0].file).name == file
    return probs[0]


def test_valid_case_loads(good):
    """The fixture itself is valid (otherwise every error test below proves nothing)."""
    case = optreserve.load_case(good)
    assert list(case.units["unit"]) == ["Ashgrove_1", "Ashgrove_2", "Birchley_1"]
    assert case.warnings == ()


def test_missing_required_column(good):
    """Case format: a missing required column names file, row (header = row 1) and column."""
    rows = [{k: v for k, v in u.items() if k != "droop_max_pct"} for u in UNITS]
    (good / "units.csv").write_text(csv_text(rows))
    p = only(good, "units.csv")
    assert (p.row, p.column) == (1, "droop_max_pct")
    assert "missing" in p.message


def test_missing_column_reported_on_header_row_despite_comment_below_it(good):
    """Case format: header = row 1. A comment and a blank line between the header and the
    first data row must not move the reported header row."""
    text = csv_text([{k: v for k, v in u.items() if k != "droop_max_pct"} for u in UNITS])
    head, rest = text.split("\n", 1)
    (good / "units.csv").write_text(head + "\n# exported from the planning tool\n\n" + rest)
    p = only(good, "units.csv")
    assert (p.row, p.column) == (1, "droop_max_pct")


@pytest.mark.parametrize("bad,word", [("abc", "not a number"), ("12,5", None),
                                      ("nan", "NaN"), ("inf", "inf"), ("-Infinity", "inf"),
                                      ("1e999", "finite")])
def test_non_number_and_non_finite_values(good, bad, word):
    """Case format: a non-number or NaN/inf is an input error naming file, row and column.
    (A decimal comma '12,5' inside quotes is one non-numeric cell.)"""
    rows = [dict(u) for u in UNITS]
    rows[1]["capacity_mw"] = f'"{bad}"' if "," in bad else bad
    (good / "units.csv").write_text(csv_text(rows))
    p = only(good, "units.csv")
    assert (p.row, p.column) == (3, "capacity_mw")
    if word:
        assert word.lower() in p.message.lower()


def test_duplicate_id(good):
    rows = [dict(u) for u in UNITS]
    rows[2]["unit"] = "Ashgrove_1"
    rows[2]["area"] = "Ashgrove"
    (good / "units.csv").write_text(csv_text(rows))
    p = only(good, "units.csv")
    assert (p.row, p.column) == (4, "unit")
    assert "duplicate" in p.message and "row 2" in p.message


def test_unknown_area_reference_in_units_and_links(good):
    rows = [dict(u) for u in UNITS]
    rows[0]["area"] = "Atlantis"
    (good / "units.csv").write_text(csv_text(rows))
    links = [dict(LINKS[0], to_area="Nowhere")]
    (good / "links.csv").write_text(csv_text(links))
    found = {(Path(p.file).name, p.row, p.column) for p in problems(good)}
    assert ("units.csv", 2, "area") in found
    assert ("links.csv", 2, "to_area") in found


def test_unknown_unit_in_event(good):
    ev = [dict(EVENTS[0], unit="Ghost_9"), EVENTS[1]]
    (good / "events.csv").write_text(csv_text(ev))
    p = only(good, "events.csv")
    assert (p.row, p.column) == (2, "unit")
    assert "Ghost_9" in p.message


def test_output_outside_min_and_capacity(good):
    rows = [dict(u) for u in UNITS]
    rows[0]["output_mw"] = 450  # capacity 400
    rows[1]["min_output_mw"] = 250  # output 200
    (good / "units.csv").write_text(csv_text(rows))
    found = {(p.row, p.column) for p in problems(good)}
    assert found == {(2, "output_mw"), (3, "output_mw")}


def test_droop_min_above_max(good):
    rows = [dict(u) for u in UNITS]
    rows[2]["droop_min_pct"] = 7
    (good / "units.csv").write_text(csv_text(rows))
    p = only(good, "units.csv")
    assert (p.row, p.column) == (4, "droop_min_pct")


def test_semicolon_delimiter(good):
    """Case format: comma separated. A spreadsheet export with ';' is named as such."""
    (good / "areas.csv").write_text(csv_text(AREAS).replace(",", ";"))
    p = only(good, "areas.csv")
    assert p.row == 1 and "';'" in p.message


def test_empty_file(good):
    (good / "events.csv").write_text("")
    p = only(good, "events.csv")
    assert p.row == 1 and "empty" in p.message


def test_binary_bytes(good):
    (good / "units.csv").write_bytes(b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR\xff\xfe")
    p = only(good, "units.csv")
    assert "UTF-8" in p.message or "binary" in p.message


def test_byte_order_mark_and_comment_lines_accepted(good):
    """Case format: UTF-8, '#' comment lines allowed; spreadsheet exports often start with a
    byte-order mark, which must not spoil the first column name."""
    text = "# units of the Ashgrove/Birchley study\n" + csv_text(UNITS) + "# end\n"
    (good / "units.csv").write_bytes(b"\xef\xbb\xbf" + text.encode())
    case = optreserve.load_case(good)
    assert list(case.units["unit"]) == ["Ashgrove_1", "Ashgrove_2", "Birchley_1"]


def test_several_errors_reported_in_one_pass(good):
    """Case format: every problem found is reported together (not one per run)."""
    rows = [dict(u) for u in UNITS]
    rows[0]["capacity_mw"] = "lots"
    rows[2]["droop_min_pct"] = 9
    (good / "units.csv").write_text(csv_text(rows))
    (good / "areas.csv").write_text(csv_text([dict(AREAS[0], load_mw=-5), AREAS[1]]))
    found = {(Path(p.file).name, p.row, p.column) for p in problems(good)}
    assert {("units.csv", 2, "capacity_mw"), ("units.csv", 4, "droop_min_pct"),
            ("areas.csv", 2, "load_mw")} <= found


def test_missing_settled_limit_in_toml(good):
    (good / "case.toml").write_text('name = "x"\nnominal_frequency_hz = 50.0\n')
    p = only(good, "case.toml")
    assert p.column == "limits.max_settled_deviation_hz"


def test_warnings_for_unknown_column_odd_droop_and_wide_dead_band(good):
    """Warnings (not errors): extra columns are ignored with a warning (case format); droop
    outside 2-12 % and dead bands above 50 mHz are outside common practice (EU 2017/1485
    Annex V: at most 10-15 mHz, references.md)."""
    rows = [dict(u) for u in UNITS]
    rows[0]["colour"] = "blue"
    rows[1]["droop_min_pct"] = 1.0
    rows[2]["deadband_mhz"] = 80
    (good / "units.csv").write_text(csv_text(rows))
    case = optreserve.load_case(good)
    w = [s for s in case.warnings if "units.csv" in s]
    assert any("colour" in s and "row 1" in s for s in w), w
    assert any("row 3" in s and "droop" in s for s in w), w
    assert any("row 4" in s and "deadband_mhz" in s for s in w), w
    assert len(w) == 3


# ------------------------------------------------------------------ command line
def run_cli(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "optreserve", *map(str, args)],
                          check=False, capture_output=True, text=True, cwd=cwd,
                          timeout=120)


def test_cli_input_error_exit_2_one_line_per_error_nothing_written(good, tmp_path):
    """Exit code 2 on input errors, one 'error:' line per problem naming file/row/column, no
    traceback, and the --out folder is not created."""
    rows = [dict(u) for u in UNITS]
    rows[0]["capacity_mw"] = "lots"
    rows[1]["area"] = "Atlantis"
    (good / "units.csv").write_text(csv_text(rows))
    out = tmp_path / "out"
    r = run_cli("solve", good, "--out", out, cwd=tmp_path)
    assert r.returncode == 2
    assert "Traceback" not in r.stderr + r.stdout
    lines = [ln for ln in r.stderr.splitlines() if ln.startswith("error:")]
    assert len(lines) == 2
    assert any("units.csv row 2 column capacity_mw" in ln for ln in lines)
    assert any("units.csv row 3 column area" in ln for ln in lines)
    assert not out.exists()


def test_cli_check_input_error(good, capsys):
    (good / "events.csv").write_text(csv_text([dict(EVENTS[0], unit="Ghost")]))
    assert main(["check", str(good)]) == 2
    err = capsys.readouterr().err
    assert "events.csv row 2 column unit" in err and "Traceback" not in err


def test_cli_infeasible_exit_3_names_short_event(tmp_path, capsys):
    """Exit code 3 when no allocation can meet the limits, with a diagnosis naming the short
    event. Hand arithmetic: the only other unit can give at most 300/(0.03*50) = 200 MW/Hz,
    40 MW at 0.2 Hz, far below the 300 MW trip."""
    units = [unit("Cragg_Big", "Cragg", 400, 300, 3, 6),
             unit("Cragg_Small", "Cragg", 300, 200, 3, 6)]
    case = write_case(tmp_path / "c", settings(), units, [{"area": "Cragg", "load_mw": 500}],
                      [{"event": "trip_big", "kind": "unit_trip", "unit": "Cragg_Big"}])
    assert main(["solve", str(case), "--quiet"]) == 3
    err = capsys.readouterr().err
    assert "trip_big" in err and "Traceback" not in err
    assert main(["check", str(case), "--quiet"]) == 3


@pytest.mark.parametrize("cmd", [[], ["check"], ["solve"]])
def test_cli_help_for_every_command(cmd):
    r = run_cli(*cmd, "--help")
    assert r.returncode == 0
    assert "usage:" in r.stdout and "Traceback" not in r.stderr


def test_cli_refuses_non_empty_out_without_force(good, tmp_path):
    """A non-empty --out is refused (exit 2) without --force and the user's file is untouched;
    with --force the results are written beside it and the user's file still untouched."""
    out = tmp_path / "out"
    out.mkdir()
    mine = out / "notes.txt"
    mine.write_text("my notes")
    assert main(["solve", str(good), "--out", str(out), "--quiet"]) == 2
    assert sorted(p.name for p in out.iterdir()) == ["notes.txt"]
    assert mine.read_text() == "my notes"
    assert main(["solve", str(good), "--out", str(out), "--quiet", "--force",
                 "--engine", "highspy"]) == 0
    assert mine.read_text() == "my notes"
    assert {"allocation.csv", "events.csv", "links.csv", "summary.json"} <= {
        p.name for p in out.iterdir()}


def test_cli_solve_writes_results(good, tmp_path):
    """Exit 0 and the four result files of the contract, with the contract's columns."""
    out = tmp_path / "fresh"
    r = run_cli("solve", good, "--out", out, "--engine", "highspy", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    import json

    import pandas as pd
    cols = {"allocation.csv": ["unit", "area", "provides", "droop_pct", "gain_mw_per_hz",
                               "headroom_up_mw", "headroom_down_mw", "cost_per_h"],
            "events.csv": ["event", "kind", "area", "size_mw", "settled_frequency_hz",
                           "settled_deviation_hz", "limit_hz", "binding",
                           "marginal_cost_per_mw_h", "incremental_cost_per_mw_h"],  # (v2)
            "links.csv": ["link", "event", "flow_before_mw", "flow_after_mw", "limit_mw",
                          "loading_pct"]}
    for name, want in cols.items():
        assert list(pd.read_csv(out / name).columns) == want
    s = json.loads((out / "summary.json").read_text())
    assert s["status"] == "optimal"
    assert {"read", "build", "solve", "write", "total"} <= set(s["timings_s"])


def test_cli_quiet_prints_nothing_with_either_engine(good, tmp_path):
    """--quiet: print nothing on success (cli help text), whichever way HiGHS is driven; in
    particular no solver banner on standard output."""
    for engine in ("highspy", "pyomo"):
        r = run_cli("solve", good, "--quiet", "--engine", engine, cwd=tmp_path)
        assert r.returncode == 0, r.stderr
        assert r.stdout == "", (engine, r.stdout)

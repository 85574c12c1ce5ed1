"""Fuzzed case folders: the reader either accepts a case or raises CaseError whose every line
names the file (and, for cell problems, the row and column) - never another exception, never
output written. Property-based testing with hypothesis (500 examples per run)."""

from __future__ import annotations

import shutil
import string
import tempfile
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import optreserve
from optreserve.cli import main
from optreserve.errors import CaseError

BASE = {
    "case.toml": ('name = "fuzz base"\nnominal_frequency_hz = 50.0\n[limits]\n'
                  "max_settled_deviation_hz = 0.2\n"),
    "units.csv": ("unit,area,capacity_mw,output_mw,droop_min_pct,droop_max_pct,"
                  "price_up_per_mw_h\n"
                  "Brook_1,North,500,300,3,6,2\nBrook_2,South,400,250,3,6,3\n"
                  "Cliff_1,South,300,100,4,8,5\n"),
    "areas.csv": "area,load_mw,load_damping_pct_per_hz\nNorth,900,1\nSouth,700,1\n",
    "links.csv": "link,from_area,to_area,reactance_pu,limit_mw\nNS,North,South,0.1,400\n",
    "events.csv": ("event,kind,unit,area,size_mw\ntrip_b1,unit_trip,Brook_1,,\n"
                   "rise_s,load_step,,South,120\ndrop_n,load_step,,North,-80\n"),
}

nasty_cells = st.one_of(
    st.sampled_from(["", "nan", "NaN", "inf", "-inf", "1e309", "-1e-320", "0", "-5", "abc",
                     "1,5", "1;5", "\"", "\"quoted\"", "1_000", "0x10", "true", "TRUE",
                     "yes", " 7 ", "\t", "٣", "1e-300", "9" * 400, "Brook_1", "North",
                     "unit_trip", "load_step", "Nowhere", "\x00", "\ufeff"]),
    st.text(alphabet=string.printable, max_size=12),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
)


@st.composite
def mutated_case(draw):
    files = dict(BASE)
    name = draw(st.sampled_from(sorted(files)))
    text = files[name]
    kind = draw(st.sampled_from([
        "cell", "cell", "cell", "drop_column", "rename_column", "extra_column", "empty",
        "binary", "bom", "semicolon", "truncate", "duplicate_row", "add_period_file",
        "delete_file", "blank_lines", "comment"]))
    if name == "case.toml" and kind in ("cell", "drop_column", "rename_column",
                                        "extra_column", "semicolon", "duplicate_row"):
        kind = draw(st.sampled_from(["toml_value", "toml_junk", "truncate", "empty"]))
    lines = text.splitlines()
    if kind == "cell":
        r = draw(st.integers(0, len(lines) - 1))
        cells = lines[r].split(",")
        c = draw(st.integers(0, len(cells) - 1))
        cells[c] = draw(nasty_cells)
        lines[r] = ",".join(cells)
        text = "\n".join(lines) + "\n"
    elif kind == "drop_column":
        c = draw(st.integers(0, len(lines[0].split(",")) - 1))
        text = "\n".join(",".join(x for k, x in enumerate(ln.split(",")) if k != c)
                         for ln in lines) + "\n"
    elif kind == "rename_column":
        cells = lines[0].split(",")
        c = draw(st.integers(0, len(cells) - 1))
        cells[c] = cells[c].upper() if draw(st.booleans()) else cells[c] + "_x"
        lines[0] = ",".join(cells)
        text = "\n".join(lines) + "\n"
    elif kind == "extra_column":
        text = "\n".join(ln + ("," + draw(nasty_cells).replace("\n", "") if k else ",note")
                         for k, ln in enumerate(lines)) + "\n"
    elif kind == "empty":
        text = ""
    elif kind == "binary":
        text = None
        files[name] = bytes(draw(st.lists(st.integers(0, 255), min_size=1, max_size=64)))
    elif kind == "bom":
        text = "\ufeff" + text
    elif kind == "semicolon":
        text = text.replace(",", ";")
    elif kind == "truncate":
        text = text[: draw(st.integers(0, len(text)))]
    elif kind == "duplicate_row" and len(lines) > 1:
        lines.append(lines[draw(st.integers(1, len(lines) - 1))])
        text = "\n".join(lines) + "\n"
    elif kind == "add_period_file":
        files["units_by_period.csv"] = draw(st.sampled_from([
            "period,unit,output_mw\n1,Brook_1,200\n2,Brook_1,x\n",
            "period,unit,output_mw\n1,Ghost,200\n",
            "period,unit,capacity_mw\n1,Brook_1,200\n",
            "period,unit,output_mw\n2026-13-45T99:00,Brook_1,200\n",
            "period,unit,output_mw\n1,Brook_1,200\n1,Brook_1,210\n",
            "period,unit,output_mw\n1,Brook_1,200\n2,Brook_1,900\n",
        ]))
        files["areas_by_period.csv"] = draw(st.sampled_from([
            "period,area,load_mw\n1,North,800\n2,North,850\n",
            "period,area,load_mw\n1,North,800\n3,North,850\n",
            "period,area,load_mw\n",
        ]))
    elif kind == "delete_file":
        text = None
        files.pop(name)
    elif kind == "blank_lines":
        text = "\n\n" + text.replace("\n", "\n\n")
    elif kind == "comment":
        text = "# exported by hand\n" + text
    elif kind == "toml_value":
        key = draw(st.sampled_from(["max_settled_deviation_hz", "nominal_frequency_hz"]))
        val = draw(st.sampled_from(["-1", "0", "\"x\"", "nan", "inf", "[1,2]", "true", "1e400"]))
        text = "\n".join(f"{key} = {val}" if ln.startswith(key) else ln for ln in lines) + "\n"
    elif kind == "toml_junk":
        text = text + draw(st.sampled_from(["[[limits]]\n", "= 3\n", "[limits\n", "x = \n",
                                            "[droop]\nsteps_pct = [\"a\"]\n"]))
    if text is not None:
        files[name] = text
    return files


def _write(folder: Path, files: dict) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    for name, content in files.items():
        p = folder / name
        if isinstance(content, bytes):
            p.write_bytes(content)
        else:
            p.write_bytes(content.encode("utf-8", errors="surrogatepass"))


@settings(max_examples=500, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(files=mutated_case())
def test_reader_never_crashes(files):
    """Any mutation: accepted, or CaseError lines that each name their file."""
    tmp = Path(tempfile.mkdtemp())
    try:
        _write(tmp / "case", files)
        try:
            optreserve.load_case(tmp / "case")
        except CaseError as exc:
            assert exc.problems
            for p in exc.problems:
                assert p.file
                assert "\n" not in str(p)
                if p.row is not None:
                    assert p.row >= 1
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


@settings(max_examples=60, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(files=mutated_case())
def test_cli_bad_input_exits_2_and_writes_nothing(files, capsys):
    """Through the CLI: exit 0 (valid) or 2/3 (bad input / infeasible), never a traceback;
    on exit 2 nothing is written to --out."""
    tmp = Path(tempfile.mkdtemp())
    try:
        _write(tmp / "case", files)
        out = tmp / "out"
        rc = main(["solve", str(tmp / "case"), "--out", str(out), "--quiet"])
        err = capsys.readouterr().err
        assert rc in (0, 2, 3), err
        assert "Traceback" not in err
        if rc == 2:
            assert not out.exists()
            assert all(ln.startswith(("error:", "warning:")) for ln in err.splitlines() if ln)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


@pytest.mark.parametrize("cell,column", [("abc", "capacity_mw"), ("inf", "output_mw"),
                                         ("", "droop_min_pct")])
def test_cell_error_names_file_row_and_column(tmp_path, cell, column, capsys):
    """A bad cell in units.csv row 3 (header = row 1) is reported with all three."""
    files = dict(BASE)
    lines = files["units.csv"].splitlines()
    header = lines[0].split(",")
    cells = lines[2].split(",")
    cells[header.index(column)] = cell
    lines[2] = ",".join(cells)
    files["units.csv"] = "\n".join(lines) + "\n"
    _write(tmp_path / "case", files)
    assert main(["check", str(tmp_path / "case")]) == 2
    err = capsys.readouterr().err
    line = [ln for ln in err.splitlines() if ln.startswith("error:")][0]
    assert "units.csv" in line and "row 3" in line and column in line

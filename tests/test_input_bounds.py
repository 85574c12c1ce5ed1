"""Values the model cannot honour are input errors (exit 2, file/row/column), warnings carry
"did you mean", --strict turns warnings into errors, and the CSV quirks of one reading rule.

Outside references: the case-format contract (../shared/design/case-format.md: errors name
file, row 1-based with header = row 1, and column) and docs/case-format.md "Bounds"; the
physical ranges are common practice (droop 2-12 %, H 2-10 s, FCR full activation 30 s in
continental Europe per EU 2017/1485 Annex V, references.md). Every value below once crashed,
hung or gave "unexpected" (issue 12, item 5) and is kept here as an explicit example.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from test_fuzz_reader import BASE, _write

import optreserve
from optreserve.cli import main


def _case(tmp_path: Path, **changes: tuple[str, str]) -> Path:
    """BASE with text replacements: file=(old, new)."""
    files = dict(BASE)
    for name, (old, new) in changes.items():
        name = name.replace("_", ".", 1) if "." not in name else name
        assert old in files[name], (name, old)
        files[name] = files[name].replace(old, new)
    _write(tmp_path / "case", files)
    return tmp_path / "case"


def _add_column(folder: Path, file: str, name: str, first: str) -> None:
    """A new column: `first` in the first data row, empty below."""
    lines = (folder / file).read_text().splitlines()
    lines = [ln + "," + (name if k == 0 else first if k == 1 else "")
             for k, ln in enumerate(lines)]
    (folder / file).write_text("\n".join(lines) + "\n")


def _one_error(folder: Path, capsys) -> str:
    out = folder.parent / "out"
    assert main(["solve", str(folder), "--out", str(out), "--quiet"]) == 2
    assert not out.exists()
    err = [ln for ln in capsys.readouterr().err.splitlines() if ln.startswith("error:")]
    assert len(err) == 1, err
    assert "unexpected" not in err[0]
    return err[0]


EXAMPLES = [  # (file, old text, new text, where the error must point, words in the message)
    ("events.csv", "trip_b1,unit_trip,Brook_1,,", "trip_b1,unit_trip,Brook_1,,1200",
     "events.csv row 2 column size_mw", "exceeds the capacity_mw 500"),
    ("events.csv", "trip_b1,unit_trip,Brook_1,,", "trip_b1,unit_trip,Brook_1,,-50",
     "events.csv row 2 column size_mw", "can absorb"),
    ("events.csv", "South,120", "South,3e19", "events.csv row 3 column size_mw", "<= 1e6"),
    ("events.csv", "South,120", "South,1e308", "events.csv row 3 column size_mw", "<= 1e6"),
    ("events.csv", "North,-80", "North,-1e308", "events.csv row 4 column size_mw", ">= -1e6"),
    ("links.csv", "0.1,400", "5e-324,400", "links.csv row 2 column reactance_pu", ">= 1e-6"),
    ("links.csv", "0.1,400", "1e-20,400", "links.csv row 2 column reactance_pu", ">= 1e-6"),
    ("links.csv", "0.1,400", "0.1,1e-20", "links.csv row 2 column limit_mw", ">= 0.001"),
]


@pytest.mark.parametrize("file,old,new,where,words", EXAMPLES)
def test_values_the_model_cannot_honour_are_input_errors(tmp_path, capsys, file, old, new,
                                                         where, words):
    """Each once got past the reader (and crashed, hung or disagreed later)."""
    line = _one_error(_case(tmp_path, **{file: (old, new)}), capsys)
    assert where in line and words in line, line


@pytest.mark.parametrize("value", ["1e-30", "1e-15", "0.05", "601"])
def test_activation_time_outside_0_1_to_600_s(tmp_path, capsys, value):
    """1e-30 s hung the simulation for > 300 s, 1e-15 s stopped LSODA ("Unexpected istate")."""
    folder = _case(tmp_path)
    _add_column(folder, "units.csv", "activation_time_s", value)
    line = _one_error(folder, capsys)
    assert "units.csv row 2 column activation_time_s" in line


@pytest.mark.parametrize("toml", [
    "[droop]\nchange_penalty_per_unit = 1e308\n",       # "HiGHS error: Unknown"
    "[droop]\nhold_periods = " + "9" * 400 + "\n",       # "unexpected OverflowError"
    "[solver]\ntime_limit_s = " + "9" * 400 + "\n",
    "[droop]\nsteps_pct = [3, " + "9" * 400 + "]\n",
])
def test_case_toml_values_that_do_not_fit(tmp_path, capsys, toml):
    folder = _case(tmp_path, case_toml=("max_settled_deviation_hz = 0.2\n",
                                        "max_settled_deviation_hz = 0.2\n" + toml))
    line = _one_error(folder, capsys)
    assert "case.toml row 6" in line, line


def test_nominal_frequency_400_digit_integer(tmp_path, capsys):
    folder = _case(tmp_path, case_toml=("nominal_frequency_hz = 50.0",
                                        "nominal_frequency_hz = " + "9" * 400))
    line = _one_error(folder, capsys)
    assert "column nominal_frequency_hz" in line and "finite number" in line


def test_reactances_too_far_apart(tmp_path, capsys):
    """Within the per-link bounds but 2e6 apart: the flow split loses its digits."""
    links = ("link,from_area,to_area,reactance_pu,limit_mw\nNS,North,South,1e-5,400\n"
             "NS2,North,South,20,400\n")
    folder = _case(tmp_path, links_csv=(BASE["links.csv"], links))
    line = _one_error(folder, capsys)
    assert "links.csv" in line and "column reactance_pu" in line and "apart" in line


def test_trip_of_opposite_sign_to_output(tmp_path, capsys):
    """A battery charging at 80 MW (output -80) cannot lose +50 MW by tripping."""
    folder = _case(tmp_path,
                   units_csv=("price_up_per_mw_h\n", "price_up_per_mw_h,min_output_mw\n"),
                   events_csv=("trip_b1,unit_trip,Brook_1,,", "trip_b1,unit_trip,Bat_1,,50"))
    text = (folder / "units.csv").read_text().splitlines()
    text = [ln + ",0" if k else ln for k, ln in enumerate(text)] + ["Bat_1,North,100,-80,3,6,1,-100"]
    (folder / "units.csv").write_text("\n".join(text) + "\n")
    line = _one_error(folder, capsys)
    assert "events.csv row 2 column size_mw" in line and "opposite sign" in line


def test_nadir_limit_without_inertia_in_an_area_rejected_by_check_and_solve(tmp_path, capsys):
    """check used to pass it and solve rejected it only after solving (issue 12 item 6); both
    now give the same one line before solving."""
    folder = _case(tmp_path,
                   case_toml=("max_settled_deviation_hz = 0.2\n",
                              "max_settled_deviation_hz = 0.5\nmax_nadir_deviation_hz = 2.0\n"))
    _add_column(folder, "units.csv", "inertia_s", "5")
    lines = []
    for cmd in ("check", "solve"):
        assert main([cmd, str(folder), "--quiet"]) == 2
        lines.append([ln for ln in capsys.readouterr().err.splitlines() if ln.startswith("error")])
    assert lines[0] == lines[1] and len(lines[0]) == 1
    assert "has no online inertia" in lines[0][0] and "units.csv" in lines[0][0]


# ------------------------------------------------------------------ warnings
def test_misspelt_column_suggests_and_is_recorded_in_summary(tmp_path, capsys):
    """price_up_per_mwh silently costed every up price at 0 on the demo (issue 12 item 2): the
    warning names the right column and summary.json keeps it, even with --quiet."""
    demo = Path(__file__).parents[1] / "instances" / "demo-tri-valley"
    folder = tmp_path / "demo"
    folder.mkdir()
    for f in demo.iterdir():
        text = f.read_text()
        (folder / f.name).write_text(text.replace("price_up_per_mw_h", "price_up_per_mwh", 1)
                                     if f.name == "units.csv" else text)
    out = tmp_path / "out"
    assert main(["solve", str(folder), "--out", str(out), "--quiet", "--engine", "highspy"]) == 0
    summary = json.loads((out / "summary.json").read_text())
    assert any("column price_up_per_mwh" in w and "did you mean 'price_up_per_mw_h'" in w
               for w in summary["warnings"]), summary["warnings"]


def test_strict_turns_warnings_into_input_errors(tmp_path, capsys):
    folder = _case(tmp_path, units_csv=("price_up_per_mw_h\n", "price_up_per_mwh\n"))
    for cmd in (["check"], ["solve"], ["retune"]):
        assert main([*cmd, str(folder), "--strict", "--quiet"]) == 2, cmd
        err = capsys.readouterr().err
        assert "error:" in err and "units.csv row 1 column price_up_per_mwh" in err
    assert main(["simulate", str(folder), "--allocation", str(tmp_path), "--all", "--out",
                 str(tmp_path / "sim"), "--strict", "--quiet"]) == 2
    assert not (tmp_path / "sim").exists()


def test_misspelt_section_says_did_you_mean(tmp_path):
    """A misspelt [limit] used to report only "required key is missing"."""
    folder = _case(tmp_path, case_toml=("[limits]", "[limit]"))
    with pytest.raises(optreserve.CaseError) as info:
        optreserve.load_case(folder)
    msg = str(info.value)
    assert "did you mean [limits]" in msg and "limits.max_settled_deviation_hz" in msg
    (folder / "case.toml").write_text(BASE["case.toml"] + "[limit]\nmax_rocof_hz_per_s = 1\n")
    warn = optreserve.load_case(folder).warnings
    assert any("unknown section [limit] ignored (did you mean [limits]?)" in w for w in warn)


def test_key_in_the_wrong_section_names_its_home(tmp_path):
    folder = _case(tmp_path, case_toml=("max_settled_deviation_hz = 0.2\n",
                                        "max_settled_deviation_hz = 0.2\nmip_gap = 0.01\n"))
    warn = optreserve.load_case(folder).warnings
    assert any("limits.mip_gap" in w and "belongs in [solver]" in w for w in warn), warn


def test_unknown_unit_suggests_the_close_id(tmp_path):
    folder = _case(tmp_path, events_csv=("Brook_1,,", "Brok_1,,"))
    with pytest.raises(optreserve.CaseError) as info:
        optreserve.load_case(folder)
    assert "did you mean 'Brook_1'" in str(info.value)


# ------------------------------------------------------------------ CSV quirks
def test_quoted_id_with_newline_is_an_error_naming_its_row(tmp_path):
    """It used to be changed silently, and later row numbers shifted by one."""
    folder = _case(tmp_path, units_csv=("Brook_2,South", '"Brook\n_2",South'))
    with pytest.raises(optreserve.CaseError) as info:
        optreserve.load_case(folder)
    (p,) = info.value.problems
    assert Path(p.file).name == "units.csv" and p.row == 3 and "line" in p.message


@pytest.mark.parametrize("cell", ["Brook_1\u00a0", '"Brook_1\u00a0"', " Brook_1 ", '" Brook_1"',
                                  "\u2003Brook_1"])
def test_unicode_whitespace_around_ids_is_removed_quoted_or_not(tmp_path, cell):
    """One rule (docs: Unicode whitespace is stripped), whether or not a cell is quoted."""
    folder = _case(tmp_path, events_csv=("Brook_1,,", f"{cell},,"))
    case = optreserve.load_case(folder)
    assert case.events["unit"].iloc[0] == "Brook_1"


@pytest.mark.parametrize("digits", ["\u0663\u0660\u0660", "\uff13\uff10\uff10", "3\u0660\u0660"])
def test_only_ascii_digits_are_numbers(tmp_path, digits):
    """Arabic-Indic and full-width digits were accepted as 300."""
    folder = _case(tmp_path, units_csv=("Cliff_1,South,300", f"Cliff_1,South,{digits}"))
    with pytest.raises(optreserve.CaseError) as info:
        optreserve.load_case(folder)
    (p,) = info.value.problems
    assert (p.row, p.column) == (4, "capacity_mw") and "ASCII digits" in p.message


def test_comment_lines_count_as_rows(tmp_path):
    """docs/case-format.md: the row is the physical line, comment lines included."""
    folder = _case(tmp_path, units_csv=("Brook_2,South,400", "# a note\nBrook_2,South,abc"))
    with pytest.raises(optreserve.CaseError) as info:
        optreserve.load_case(folder)
    (p,) = info.value.problems
    assert (p.row, p.column) == (4, "capacity_mw")


def test_control_characters_in_messages_are_escaped(tmp_path):
    folder = _case(tmp_path, areas_csv=("North,900", "North,9\x1b[31m00"))
    with pytest.raises(optreserve.CaseError) as info:
        optreserve.load_case(folder)
    assert "\x1b" not in str(info.value) and "\\x1b" in str(info.value)


def test_short_row_is_an_error_and_trailing_empty_fields_are_tolerated(tmp_path):
    folder = _case(tmp_path, areas_csv=("South,700,1\n", "South,700,1,,\n"))
    assert len(optreserve.load_case(folder).areas) == 2
    (folder / "areas.csv").write_text(BASE["areas.csv"].replace("South,700,1", "South,700"))
    with pytest.raises(optreserve.CaseError) as info:
        optreserve.load_case(folder)
    assert any(Path(p.file).name == "areas.csv" and p.row == 3
               and "2 fields, header has 3" in p.message for p in info.value.problems)

"""Every CSV the tool writes reads back with plain pandas.read_csv, the same values, and no
cell a spreadsheet would evaluate; terminal output never carries control characters.

Outside references: pandas.read_csv and Python's csv module (the readers analysts use), the
OWASP "CSV injection" list of formula-starting characters (= + - @, tab, carriage return;
from memory), and Python's float repr (shortest text that reads back exactly).
"""

from __future__ import annotations

import csv
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from optreserve.cli import main
from optreserve.output.cells import unescape
from optreserve.output.results import write_table

DEMO = Path(__file__).resolve().parents[1] / "instances" / "demo-tri-valley"


def _header_first_and_plain_read(path: Path) -> pd.DataFrame:
    with open(path, newline="", encoding="utf-8") as fh:
        first = next(csv.reader(fh))
    df = pd.read_csv(path)
    assert list(df.columns) == first, path.name
    assert not first[0].startswith("#"), path.name
    return df


def test_every_csv_of_solve_simulate_and_retune_has_its_header_first(tmp_path):
    out = tmp_path / "o"
    assert main(["solve", str(DEMO), "--out", str(out), "--quiet"]) == 0
    sim = tmp_path / "s"
    assert main(["simulate", str(DEMO), "--allocation", str(out), "--event",
                 "trip_kelvstrand_nuclear1", "--out", str(sim), "--duration", "20",
                 "--quiet"]) == 0
    files = sorted(out.glob("*.csv")) + sorted(sim.glob("*.csv"))
    assert any(p.name == "simulation_summary.csv" for p in files)
    for p in files:
        df = _header_first_and_plain_read(p)
        assert len(df) > 0, p.name


def test_the_largest_accepted_limit_reads_back_exactly(tmp_path):
    """A link limit at the contract's bound, 1e6 MW (larger ones are input errors, see
    test_input_bounds.py), is written so that plain pandas.read_csv reads 1e6 back exactly;
    huge finite values in general (1e308 written, not inf) are covered by the round-trip
    property test below."""
    case = tmp_path / "c"
    shutil.copytree(DEMO, case)
    lk = pd.read_csv(case / "links.csv", dtype=str)
    lk.loc[lk["link"] == "veskdal-ambrith", "limit_mw"] = "1e6"
    lk.to_csv(case / "links.csv", index=False)
    out = tmp_path / "o"
    assert main(["solve", str(case), "--out", str(out), "--quiet"]) == 0
    links = _header_first_and_plain_read(out / "links.csv")
    got = links.loc[links["link"] == "veskdal-ambrith", "limit_mw"]
    assert np.isfinite(got).all() and (got == 1e6).all()


def test_write_table_round_trip_property(tmp_path):
    """Seeded random columns: an input-echo column reads back bit for bit (Python's float();
    plain pandas.read_csv to its own parser's last digit); a result column
    to within its 6 decimals (and huge values exactly); text with formula starts reads back
    as written once the single-quote prefix is removed; no -0.0 anywhere."""
    rng = np.random.default_rng(12)
    n = 200
    scale = 10.0 ** rng.integers(-12, 16, n)
    vals = rng.standard_normal(n) * scale
    vals[:5] = [1e308, -1e308, 1e-7, -0.0, -4e-7]
    texts = ["=1+1", "+cmd", "-minus", "@at", "\tTab", "'quoted", "''two", "plain", "a-b",
             "x=y"] * (n // 10)
    df = pd.DataFrame({"echo": vals, "result": vals, "text": texts})
    path = tmp_path / "t.csv"
    write_table(df, path, exact=("echo",))
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert [float(r["echo"]) for r in rows] == vals.tolist()
    back = pd.read_csv(path, keep_default_na=False, dtype={"text": str})
    assert np.allclose(back["echo"], vals, rtol=1e-12, atol=0)  # pandas fast parser
    exact = pd.read_csv(path, float_precision="round_trip")["echo"]
    assert exact.to_numpy().tolist() == vals.tolist()
    res = back["result"].to_numpy(float)
    big = np.abs(vals) >= 1e15
    assert (res[big] == vals[big]).all()
    assert np.allclose(res[~big], vals[~big], rtol=1e-12, atol=5.000001e-7)
    raw = path.read_text()
    assert ",-0.000000" not in raw and "\n-0.000000" not in raw
    for cell in back["text"]:  # what a spreadsheet sees first is never a formula start
        assert not cell.startswith(("=", "+", "-", "@", "\t", "\r"))
    assert unescape(back["text"].to_numpy(object)).tolist() == texts


@pytest.mark.parametrize("quoted", [False, True])
def test_a_table_written_in_slices_is_the_same_file(tmp_path, monkeypatch, quoted):
    """write_table formats WRITE_CELLS cells (whole rows) at a time (memory on long
    horizons): slices of 3 rows give the same bytes as one slice, with missing values in some slices only, a
    huge value, booleans and (quoted) a text cell that needs CSV quoting in one slice; the
    standard csv module reads the values back."""
    from optreserve.output import results

    n = 10
    vals = np.arange(n) * 0.25
    vals[7] = np.nan
    vals[8] = 1e300
    text = [f"u{k}" for k in range(n)]
    if quoted:
        text[9] = 'a,"b"'
    df = pd.DataFrame({"unit": text, "v": vals, "ok": np.arange(n) % 2 == 0,
                       "period": np.arange(n)})
    write_table(df, tmp_path / "one.csv")
    monkeypatch.setattr(results, "WRITE_CELLS", 3 * df.shape[1])
    write_table(df, tmp_path / "sliced.csv")
    assert (tmp_path / "one.csv").read_bytes() == (tmp_path / "sliced.csv").read_bytes()
    with open(tmp_path / "sliced.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["unit"] for r in rows] == text
    assert rows[7]["v"] == "" and float(rows[8]["v"]) == 1e300
    assert [r["ok"] for r in rows] == ["true", "false"] * 5


def test_ordinary_values_keep_the_six_decimal_format(tmp_path):
    """Byte-level: ordinary values are written exactly as before (6 decimals)."""
    df = pd.DataFrame({"v": [0.15, 720.0, -3.25], "t": ["a", "b", "c"]})
    write_table(df, tmp_path / "t.csv", exact=("v",))
    assert (tmp_path / "t.csv").read_text() == (
        "v,t\n0.150000,a\n720.000000,b\n-3.250000,c\n")


def test_ids_with_formula_starts_are_quoted_and_simulate_reads_them_back(tmp_path):
    """A unit '=Stennfoss+1' and an event '@trip_brannow': the CSVs hold them behind a
    single quote, and simulate reads the allocation back to the case's own ids."""
    case = tmp_path / "c"
    shutil.copytree(DEMO, case)
    for f in ("units.csv", "events.csv"):
        text = (case / f).read_text().replace("Stennfoss_Hydro1", "=Stennfoss+1")
        (case / f).write_text(text.replace("trip_brannow_lignite2", "@trip_brannow"))
    out = tmp_path / "o"
    assert main(["solve", str(case), "--out", str(out), "--quiet"]) == 0
    alloc = pd.read_csv(out / "allocation.csv")
    assert "'=Stennfoss+1" in set(alloc["unit"])
    assert "'@trip_brannow" in set(pd.read_csv(out / "events.csv")["event"])
    assert main(["simulate", str(case), "--allocation", str(out), "--event",
                 "trip_tallbrae_pumpedhydro1", "--out", str(tmp_path / "s"), "--duration",
                 "20", "--quiet"]) == 0


def test_terminal_output_shows_control_characters_escaped(tmp_path, capsys):
    r"""An event id holding an escape sequence is printed as \x1b[..., never raw."""
    case = tmp_path / "c"
    shutil.copytree(DEMO, case)
    text = (case / "events.csv").read_text()
    (case / "events.csv").write_text(text.replace("trip_tallbrae_pumpedhydro1",
                                                  "trip\x1b[2Jwipe"))
    for argv in (["check", str(case)], ["solve", str(case)]):
        assert main(argv) == 0
        got = capsys.readouterr()
        for stream in (got.out, got.err):
            assert "\x1b" not in stream
            assert not stream or stream.endswith("\n")
        assert "trip\\x1b[2Jwipe" in got.out


@pytest.mark.parametrize("argv, code", [
    (["check", str(DEMO)], 0), (["solve", str(DEMO), "--json", "--quiet"], 0),
    (["solve", str(DEMO / "missing")], 2)])
def test_messages_end_with_a_newline(argv, code, capsys):
    assert main(argv) == code
    got = capsys.readouterr()
    for stream in (got.out, got.err):
        assert not stream or stream.endswith("\n")

"""batch writes each case's result folder and a merged table, counts cases, names only the
files it writes and exits 5 when a case did not solve.

Outside reference: hand arithmetic (one provider at price 2 per MW h, no load damping,
F = 0.2 Hz: the settled row needs exactly dP MW of headroom, cost 2 dP per hour; the textbook
law delta f = dP / sum K, references.md) and pandas.read_csv for every table.
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pytest
from test_sweep import small_case

from optreserve.cli import main


def _days(tmp_path: Path) -> Path:
    days = tmp_path / "days"
    small_case(days / "d1", size=50.0)
    small_case(days / "d2", size=90.0)
    small_case(days / "d3", size=130.0)  # more than the 100 MW the unit can give: infeasible
    bad = small_case(days / "d4", size=60.0)
    (bad / "units.csv").write_text((bad / "units.csv").read_text().replace(",500,", ",x,"))
    return days


def test_batch_writes_case_folders_and_exits_5_on_a_failed_case(tmp_path, capsys):
    days = _days(tmp_path)
    out = tmp_path / "out"
    assert main(["batch", str(days), "--out", str(out), "--workers", "1"]) == 5
    got = capsys.readouterr()
    assert "batch: 4 cases" in got.out and "points" not in got.out
    assert "2 cases did not solve: d3 (infeasible), d4 (input_error)" in got.err
    wrote = got.out.split("wrote ", 1)[1].splitlines()[0].split(": ", 1)[1].split()
    for name in wrote:  # every file or folder it names exists, and nothing else is there
        assert (out / name.rstrip("/")).exists(), name
    # besides optreserve's own bookkeeping (the manifest of the files it wrote, output/staging.py)
    from optreserve.output.staging import MANIFEST

    assert sorted(p.name for p in out.iterdir() if p.name != MANIFEST) == sorted(
        n.rstrip("/") for n in wrote)
    assert "png" not in got.out
    table = pd.read_csv(out / "batch.csv")
    assert list(table["status"]) == ["optimal", "optimal", "infeasible", "input_error"]
    # hand: cost 2 * dP per hour, and each case's folder holds what solve --out writes
    assert list(table["objective_per_h"][:2]) == pytest.approx([100.0, 180.0], rel=1e-6)
    for name, dP in (("d1", 50.0), ("d2", 90.0)):
        alloc = pd.read_csv(out / name / "allocation.csv")
        assert alloc["headroom_up_mw"].sum() == pytest.approx(dP, rel=1e-6)
        ev = pd.read_csv(out / name / "events.csv")
        K = alloc["gain_mw_per_hz"].sum()
        assert ev["settled_deviation_hz"].abs().iloc[0] == pytest.approx(dP / K, rel=1e-6)
        solo = tmp_path / f"solo_{name}"
        assert main(["solve", str(days / name), "--out", str(solo), "--quiet",
                     "--engine", "highspy"]) == 0
        for f in ("allocation.csv", "events.csv", "links.csv"):
            assert (out / name / f).read_bytes() == (solo / f).read_bytes()
    assert sorted(p.name for p in (out / "d3").iterdir()) == ["diagnosis.csv"]
    assert not (out / "d4").exists()
    doc = json.loads((out / "batch.json").read_text())
    assert doc["cases"] == 4 and "points" not in doc


def test_batch_of_good_cases_exits_0_and_force_replaces_folders(tmp_path, capsys):
    days = tmp_path / "days"
    small_case(days / "d1", size=50.0)
    out = tmp_path / "out"
    assert main(["batch", str(days), "--out", str(out), "--workers", "1", "--quiet"]) == 0
    (out / "d1" / "mine.txt").write_text("a note of the user's")
    small_case(days / "d1", size=60.0)
    assert main(["batch", str(days), "--out", str(out), "--workers", "1", "--quiet",
                 "--force"]) == 0
    assert pd.read_csv(out / "d1" / "allocation.csv")["headroom_up_mw"].sum() == \
        pytest.approx(60.0, rel=1e-6)
    assert (out / "d1" / "mine.txt").read_text() == "a note of the user's"

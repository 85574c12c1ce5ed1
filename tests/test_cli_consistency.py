"""What the terminal says agrees with the files: the `time:` line is summary.json's timings
(parts adding up to the total), no negative zero, a heading on every column, and "1 link".

Outside reference: hand arithmetic (sums of the printed parts; rounding rules of Python's
format mini-language)."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
from conftest import settings, unit, write_case

from optreserve.cli import main
from optreserve.cli.common import num, plural

DEMO = Path(__file__).resolve().parents[1] / "instances" / "demo-tri-valley"


def test_time_line_is_the_summary_total_and_every_step_is_a_key(tmp_path, capsys):
    out = tmp_path / "o"
    assert main(["solve", str(DEMO), "--out", str(out), "--compare", "uniform"]) == 0
    text = capsys.readouterr().out
    line = next(ln for ln in text.splitlines() if ln.startswith("time: "))
    printed = {k: float(v) for k, v in re.findall(r"(\w+) ([0-9.]+) s", line)}
    t = json.loads((out / "summary.json").read_text())["timings_s"]
    assert list(printed) == list(t)
    for k, v in t.items():
        assert printed[k] == pytest.approx(v, abs=0.005 + 1e-9)
    assert {"read", "build", "solve", "verify", "nadir_check", "prices", "compare", "write",
            "other", "total"} <= set(t)
    parts = sum(v for k, v in t.items() if k != "total")
    assert parts == pytest.approx(t["total"], abs=1e-3)  # 4-decimal rounding of 9 parts


def test_numbers_without_negative_zero():
    assert num(-0.00001) == "0.0"
    assert num(-0.04, 1, sign=True) == "+0.0"
    assert num(-0.06) == "-0.1"
    assert num(199.96) == "200.0"


def test_plural_and_check_headings(tmp_path, capsys):
    assert plural(1, "link") == "1 link" and plural(2, "link") == "2 links"
    folder = write_case(tmp_path / "c", settings(),
                        [unit("A_1", "A", 500, 300, price_up=1),
                         unit("B_1", "B", 500, 300, price_up=2)],
                        [{"area": "A", "load_mw": 1000}, {"area": "B", "load_mw": 1000}],
                        [{"event": "step", "kind": "load_step", "area": "B", "size_mw": 50}],
                        [{"link": "AB", "from_area": "A", "to_area": "B",
                          "reactance_pu": 0.05, "limit_mw": 500}])
    assert main(["check", str(folder)]) == 0
    out = capsys.readouterr().out
    assert "1 link," in out and "1 event " in out and "1 links" not in out
    head = next(ln for ln in out.splitlines() if ln.startswith("event "))
    assert head.split() == ["event", "size", "MW", "needs", "MW/Hz", "can", "offer", "MW/Hz",
                            "status", "ratio"]

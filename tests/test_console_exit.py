"""The console command ends the process as soon as main() returns (cli.app.run skips the
interpreter's teardown): its exit code, everything it printed and every file it wrote must
be there all the same. Checked on real subprocesses; the JSON is read back with the
standard json module, the files with the csv module."""

from __future__ import annotations

import csv
import json
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "instances" / "demo-tri-valley"


def _run(*args, cwd):
    return subprocess.run([sys.executable, "-m", "optreserve", *args], cwd=cwd,
                          capture_output=True, text=True,
                          env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"})


def test_json_output_and_files_complete_after_the_fast_exit(tmp_path):
    out = tmp_path / "out"
    r = _run("solve", str(DEMO), "--out", str(out), "--json", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    summary = json.loads(r.stdout)  # the whole document arrived
    assert summary["status"] == "optimal"
    with open(out / "allocation.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 30 and json.loads((out / "summary.json").read_text())["status"] == \
        "optimal"


def test_exit_code_of_bad_input_survives_the_fast_exit(tmp_path):
    r = _run("solve", str(tmp_path / "missing"), "--out", str(tmp_path / "o"), cwd=tmp_path)
    assert r.returncode == 2
    assert r.stderr.count("\n") == 1 and r.stderr.startswith("error:")

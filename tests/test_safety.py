"""Data safety under faults: inputs are never written, output sets appear whole or not at all
(with --force the earlier set is replaced as a whole), --out is checked before any work,
folders follow the umask, staging left by a killed run is cleaned, and plots never take the
results with them.

Outside references: POSIX rename(2) (a rename within one filesystem is atomic and replaces
its target), POSIX umask(2)/mkdir(2)/open(2) (new folders get 0777 & ~umask, files 0666 &
~umask), the matplotlib documentation of rcParams["text.parse_math"] (text between $ signs
is parsed as math unless it is off) and common practice for tools writing into a user's
folder (never destroy a file the tool did not write). Faults are injected by patching
os.replace to fail on the n-th call and os.access / Path.iterdir to deny permission (the
tests run as root, where real permission bits would not stop anything).
"""

from __future__ import annotations

import errno
import json
import os
import shutil
import socket
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
from conftest import settings, write_case

import optreserve
from optreserve.cli import main
from optreserve.output import staging
from optreserve.output.staging import MANIFEST, OutputWriteError

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "instances" / "demo-tri-valley"


def _snapshot(folder: Path) -> dict:
    """name -> bytes of every file (summary.json without its measured timings)."""
    out = {}
    for p in sorted(folder.iterdir()):
        if p.is_dir():
            out[p.name + "/"] = _snapshot(p)
            continue
        data = p.read_bytes()
        if p.name == "summary.json":
            doc = json.loads(data)
            doc.pop("timings_s", None)
            data = json.dumps(doc, sort_keys=True).encode()
        out[p.name] = data
    return out


def _small(folder: Path, size: float = 80.0, name: str = "test case", area: str = "Stennmoor",
           **extra):
    """One provider of 500 MW at droop 2-10 %: at most 100 MW at 0.2 Hz (no damping), so a
    step above 100 MW is infeasible (settled law delta f = dP / sum K, common practice)."""
    s = settings()
    s["name"] = name
    return write_case(folder, s,
                      [{"unit": "Stenn_1", "area": area, "capacity_mw": 500, "output_mw": 300,
                        "droop_min_pct": 2, "droop_max_pct": 10, "price_up_per_mw_h": 2,
                        **extra}],
                      [{"area": area, "load_mw": 4000}],
                      [{"event": "step", "kind": "load_step", "area": area, "size_mw": size}])


def _no_staging_left(*folders: Path) -> bool:
    return not [p for f in folders if f.exists() for p in f.iterdir()
                if staging.STAGING_MARK in p.name]


# ------------------------------------------------------------------ inputs are sacred
def test_case_folder_as_out_is_refused_and_the_case_stays_byte_identical(tmp_path, capsys):
    """Reproduction of the destroyed case: solve/retune into the case folder itself (their
    events.csv and links.csv would take the inputs' names) exit 2 before any work, and every
    input file stays byte-identical; a sub-folder of the case folder is fine."""
    case = tmp_path / "c"
    shutil.copytree(DEMO, case)
    before = _snapshot(case)
    for cmd in ("solve", "retune"):
        assert main([cmd, str(case), "--out", str(case), "--force", "--quiet"]) == 2
        err = capsys.readouterr().err.strip()
        assert len(err.splitlines()) == 1 and "case folder" in err, err
        assert _snapshot(case) == before
    # the same folder through a symbolic link is the same folder
    link = tmp_path / "link"
    link.symlink_to(case)
    assert main(["solve", str(case), "--out", str(link), "--force", "--quiet"]) == 2
    assert _snapshot(case) == before
    assert main(["solve", str(case), "--out", str(case / "results"), "--quiet"]) == 0
    after = _snapshot(case)
    assert after.pop("results/")["allocation.csv"]
    assert after == before


def test_sweep_may_share_the_case_folder_without_touching_an_input(tmp_path):
    """sweep writes names of its own (sweep.csv, .png, .json): allowed in the case folder, the
    inputs stay byte-identical."""
    case = _small(tmp_path / "c")
    before = _snapshot(case)
    assert main(["sweep", str(case), "--vary", "price_scale=1,2", "--out", str(case),
                 "--force", "--workers", "1", "--quiet"]) == 0
    after = _snapshot(case)
    assert {"sweep.csv", "sweep.json", "sweep.png", MANIFEST} == set(after) - set(before)
    assert {k: after[k] for k in before} == before


# ------------------------------------------------------------------ whole-set replacement
def test_force_replaces_the_earlier_set_as_a_whole(tmp_path):
    """Reproduction: an infeasible run (exit 3) into a folder of earlier results must not
    leave the earlier allocation.csv / summary.json ("optimal") / report.html beside the new
    diagnosis.csv; a user's own file in the folder is untouched throughout."""
    out = tmp_path / "o"
    assert main(["solve", str(_small(tmp_path / "ok")), "--out", str(out), "--report",
                 "--quiet"]) == 0
    assert {"allocation.csv", "summary.json", "report.html"} <= set(os.listdir(out))
    (out / "notes.txt").write_text("my notes")
    assert main(["solve", str(_small(tmp_path / "bad", size=300)), "--out", str(out),
                 "--force", "--quiet"]) == 3
    assert sorted(os.listdir(out)) == [MANIFEST, "diagnosis.csv", "notes.txt"]
    assert json.loads((out / MANIFEST).read_text())["files"] == {"diagnosis.csv": "result"}
    assert main(["solve", str(_small(tmp_path / "ok")), "--out", str(out), "--force",
                 "--quiet"]) == 0
    names = set(os.listdir(out))
    assert "diagnosis.csv" not in names and {"allocation.csv", "notes.txt"} <= names
    assert (out / "notes.txt").read_text() == "my notes"
    assert _no_staging_left(out, tmp_path)


def test_other_groups_stay_when_one_group_is_replaced(tmp_path):
    """A sweep written into a result folder is its own group: a new solve with --force
    replaces the result files and leaves the sweep's files alone."""
    case = _small(tmp_path / "c")
    out = tmp_path / "o"
    assert main(["solve", str(case), "--out", str(out), "--quiet"]) == 0
    assert main(["sweep", str(case), "--vary", "price_scale=1", "--out", str(out), "--force",
                 "--workers", "1", "--quiet"]) == 0
    sweep_csv = (out / "sweep.csv").read_bytes()
    assert main(["solve", str(case), "--out", str(out), "--force", "--quiet"]) == 0
    assert (out / "sweep.csv").read_bytes() == sweep_csv
    groups = json.loads((out / MANIFEST).read_text())["files"]
    assert groups["sweep.csv"] == "sweep" and groups["allocation.csv"] == "result"


@pytest.mark.parametrize("fault", [OSError(errno.EIO, "Input/output error"),
                                   KeyboardInterrupt()])
def test_a_failed_move_leaves_the_old_set_or_the_new_one_never_a_mix(tmp_path, monkeypatch,
                                                                     fault):
    """Fault injection: os.replace fails on the n-th call (n = 1, 2, ...) while a new result
    set replaces an earlier one with --force. After each attempt the folder is exactly the
    old set (plus the user's file) or exactly the new one, never a mix (POSIX rename(2) is
    atomic per file; the set is made atomic by undoing the moves)."""
    res = optreserve.solve(optreserve.load_case(_small(tmp_path / "c")))
    out = tmp_path / "o"
    res.extra_files["old_only.csv"] = pd.DataFrame({"a": [1.0]})
    res.write(out)
    (out / "notes.txt").write_text("my notes")
    old = _snapshot(out)
    del res.extra_files["old_only.csv"]
    res.allocation["cost_per_h"] += 1.0  # new content under the same names
    ref = tmp_path / "ref"
    res.write(ref)
    (ref / "notes.txt").write_text("my notes")
    new = _snapshot(ref)
    assert old != new
    real = os.replace
    n = 0
    while True:
        n += 1
        calls = {"k": 0}

        def flaky(src, dst, _n=n, _calls=calls):
            _calls["k"] += 1
            if _calls["k"] == _n:
                raise fault
            return real(src, dst)

        monkeypatch.setattr(os, "replace", flaky)
        try:
            res.write(out, force=True)
            failed = False
        except (OutputWriteError, KeyboardInterrupt) as exc:
            failed = True
            assert isinstance(exc, type(fault) if isinstance(fault, KeyboardInterrupt)
                              else OutputWriteError)
        finally:
            monkeypatch.setattr(os, "replace", real)
        state = _snapshot(out)
        assert state == (old if failed else new), n
        assert _no_staging_left(out, tmp_path)
        if not failed:
            break
        assert n < 50
    assert n > 5  # every move of the set was tried as the failing one


def test_interrupted_write_into_a_new_folder_leaves_nothing(tmp_path, monkeypatch):
    """Ctrl-C while the staging folder is filled: --out does not appear, and neither does a
    staging folder or a parent the run created."""
    res = optreserve.solve(optreserve.load_case(_small(tmp_path / "c")))
    import optreserve.output.results as results

    real = results.write_table

    def flaky(df, path):
        if path.name == "links.csv":
            raise KeyboardInterrupt
        real(df, path)

    monkeypatch.setattr(results, "write_table", flaky)
    with pytest.raises(KeyboardInterrupt):
        res.write(tmp_path / "new" / "deeper" / "o")
    assert sorted(os.listdir(tmp_path)) == ["c"]


# ------------------------------------------------------------------ --out before the work
def test_out_problems_are_found_before_any_work(tmp_path, capsys, monkeypatch):
    """Dangling link, a file, a folder under a file, an unwritable folder: one-line error,
    exit 2, before the case is even read (the case path does not exist, which would be its
    own exit-2 error naming the case)."""
    missing_case = str(tmp_path / "no-such-case")
    dangling = tmp_path / "dangling"
    dangling.symlink_to(tmp_path / "nowhere")
    a_file = tmp_path / "file.txt"
    a_file.write_text("x")
    locked = tmp_path / "locked"
    locked.mkdir()
    real_access = os.access
    monkeypatch.setattr(os, "access", lambda p, mode: False if Path(p) == locked
                        else real_access(p, mode))
    for out, words in ((dangling, "symbolic link"), (a_file, "not a folder"),
                       (a_file / "sub", "is not a folder"), (locked, "not writable"),
                       (locked / "sub", "not writable")):
        assert main(["solve", missing_case, "--out", str(out), "--quiet"]) == 2
        err = capsys.readouterr().err.strip()
        assert len(err.splitlines()) == 1 and words in err and "no-such-case" not in err, err
    assert a_file.read_text() == "x" and not (tmp_path / "nowhere").exists()


def test_link_to_an_empty_folder_and_an_existing_folder_keep_their_identity(tmp_path):
    """--out a symbolic link to an empty folder: the files go into the folder it points to
    and the link stays a link; an existing empty folder keeps its inode and permissions
    (it used to be deleted and made again)."""
    case = _small(tmp_path / "c")
    target = tmp_path / "target"
    target.mkdir()
    os.chmod(target, 0o750)
    ino = target.stat().st_ino
    link = tmp_path / "link"
    link.symlink_to(target)
    assert main(["solve", str(case), "--out", str(link), "--quiet"]) == 0
    assert link.is_symlink() and (target / "allocation.csv").is_file()
    assert target.stat().st_ino == ino and (target.stat().st_mode & 0o777) == 0o750
    assert _no_staging_left(tmp_path, target)


@pytest.mark.parametrize("mask, dmode, fmode", [(0o022, 0o755, 0o644), (0o077, 0o700, 0o600),
                                                (0o002, 0o775, 0o664)])
def test_new_folders_and_files_follow_the_umask(tmp_path, mask, dmode, fmode):
    """POSIX mkdir(2)/open(2): a new folder 0777 & ~umask, a file 0666 & ~umask (it used to
    be 0700 whatever the umask)."""
    res = optreserve.solve(optreserve.load_case(_small(tmp_path / "c")))
    old = os.umask(mask)
    try:
        out = res.write(tmp_path / "made" / "o")
    finally:
        os.umask(old)
    assert (out.stat().st_mode & 0o777) == dmode
    assert ((tmp_path / "made").stat().st_mode & 0o777) == dmode
    assert {p.stat().st_mode & 0o777 for p in out.iterdir()} == {fmode}


def test_stale_staging_of_a_dead_run_is_removed_a_live_one_kept(tmp_path):
    """A staging folder named after a process that no longer exists (killed run) is removed
    by the next write there; one of a running process is left alone."""
    host = socket.gethostname()
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    live = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        stale = tmp_path / f".o{staging.STAGING_MARK}{host}-{dead.pid}-0123abcd"
        busy = tmp_path / f".o{staging.STAGING_MARK}{host}-{live.pid}-4567ef01"
        for p in (stale, busy):
            p.mkdir()
            (p / "allocation.csv").write_text("half")
        res = optreserve.solve(optreserve.load_case(_small(tmp_path / "c")))
        res.write(tmp_path / "o")
        assert not stale.exists() and busy.exists()
        inside = tmp_path / "o" / f"{staging.STAGING_MARK}{host}-{dead.pid}-89abcdef"
        inside.mkdir()
        res.write(tmp_path / "o", force=True)
        assert not inside.exists()
    finally:
        live.kill()
        live.wait()


def test_unreadable_case_folder_is_an_input_error(tmp_path, capsys, monkeypatch):
    """Permission denied on the case folder itself: exit 2, one line naming the folder (an
    unreadable file inside was already exit 2)."""
    case = _small(tmp_path / "c")
    real = Path.iterdir

    def denied(self):
        if self == case:
            raise PermissionError(errno.EACCES, "Permission denied", str(self))
        return real(self)

    monkeypatch.setattr(Path, "iterdir", denied)
    assert main(["check", str(case)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and str(case) in err and "cannot be read" in err


# ------------------------------------------------------------------ plots
def test_math_markup_in_names_is_shown_literally(tmp_path, capsys):
    """Reproduction: "$\\foo$" in the case name and "$" in an area id made matplotlib's
    mathtext fail after all the work (matplotlib docs: text.parse_math). sweep writes its
    plot, solve --report its report, and the name is in them as typed."""
    case = _small(tmp_path / "c", name="Study $\\foo$", area="area_$1_$2")
    out = tmp_path / "s"
    assert main(["sweep", str(case), "--vary", "price_scale=1,2", "--out", str(out),
                 "--workers", "1", "--quiet"]) == 0
    assert (out / "sweep.png").read_bytes()[:4] == b"\x89PNG"
    assert main(["solve", str(case), "--out", str(tmp_path / "r"), "--report",
                 "--quiet"]) == 0
    page = (tmp_path / "r" / "report.html").read_text()
    assert "area_$1_$2" in page
    assert "warning" not in capsys.readouterr().err


def test_a_failing_plot_is_a_warning_and_the_tables_are_written(tmp_path, capsys,
                                                                monkeypatch):
    """Any error inside the plot (here injected) costs only the plot."""
    import optreserve.studies.sweep as sweep

    def broken(*args, **kwargs):
        raise ValueError("injected plot failure")

    monkeypatch.setattr(sweep, "plot_costs", broken)
    case = _small(tmp_path / "c")
    out = tmp_path / "s"
    assert main(["sweep", str(case), "--vary", "price_scale=1,2", "--out", str(out),
                 "--workers", "1", "--quiet"]) == 0
    assert "injected plot failure" in capsys.readouterr().err
    assert {"sweep.csv", "sweep.json"} <= set(os.listdir(out))
    assert not (out / "sweep.png").exists()
    assert "sweep.png" not in json.loads((out / "sweep.json").read_text())["files"]


def test_simulate_plots_names_with_math_markup(tmp_path, capsys):
    """simulate used to write nothing for a case named with $...$ (matplotlib mathtext): the
    plots are drawn with the text as typed and the tables are written."""
    case = _small(tmp_path / "c", name="Study $\\foo$", area="area_$1_$2", inertia_s=5)
    assert main(["solve", str(case), "--out", str(tmp_path / "r"), "--quiet"]) == 0
    out = tmp_path / "sim"
    assert main(["simulate", str(case), "--allocation", str(tmp_path / "r"), "--all",
                 "--out", str(out), "--duration", "10", "--quiet"]) == 0
    assert (out / "plot_step.png").read_bytes()[:4] == b"\x89PNG"
    assert (out / "simulation_summary.csv").is_file()
    assert "warning" not in capsys.readouterr().err

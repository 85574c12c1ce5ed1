"""Ctrl-C (SIGINT) and SIGTERM: exit 128 + signal number (130, 143; the shell convention for a
process ended by a signal, bash manual "Exit Status"), nothing written, the solver stopped
through highspy's user-interrupt callbacks (highspy's Highs.cancelSolve /
HandleUserInterrupt) and reported as interrupted, never as a time limit or a verification
error; temporary HiGHS logs always removed.

The subprocess tests start `python -m optreserve solve` on a generated case large enough to
be mid-solve and send the signal only once HiGHS's own log shows it solving (a marker, not a
fixed sleep); whenever it lands after that point the promise is the same. The handler logic
is also tested directly.
"""

from __future__ import annotations

import glob
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from optreserve import interrupt
from optreserve.studies.generate import Spec, generate

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def big_case(tmp_path_factory):
    """About 10 s of HiGHS work on one core: far longer than the wait for the marker."""
    return generate(Spec(units=200, areas=5, links=8, periods=48, events=10, seed=1),
                    tmp_path_factory.mktemp("big") / "case")


def _run_and_signal(case: Path, tmp: Path, sig: int, engine: str):
    temp = tmp / "temp"
    temp.mkdir()
    out = tmp / "out"
    env = dict(os.environ, TMPDIR=str(temp), PYTHONPATH=str(ROOT))
    p = subprocess.Popen([sys.executable, "-m", "optreserve", "solve", str(case), "--out",
                          str(out), "--engine", engine, "--json"], env=env,
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    try:
        while True:  # HiGHS writes its log into our private temp folder while it solves
            text = ""
            for log in glob.glob(str(temp / "optreserve-highs-*.log")):
                try:
                    text += Path(log).read_text(errors="replace")
                except OSError:
                    pass
            if "Presolv" in text or "Solving" in text:
                break
            assert p.poll() is None, "finished before the solver started"
            assert time.monotonic() < deadline, "solver never started"
            time.sleep(0.02)
        p.send_signal(sig)
        stdout, stderr = p.communicate(timeout=60)
    finally:
        if p.poll() is None:
            p.kill()
            p.wait()
    return p.returncode, stdout, stderr, out, temp


@pytest.mark.parametrize("sig, code, engine", [(signal.SIGINT, 130, "highspy"),
                                               (signal.SIGTERM, 143, "highspy"),
                                               (signal.SIGINT, 130, "pyomo")])
def test_signal_mid_solve_exits_with_its_code_and_writes_nothing(big_case, tmp_path, sig,
                                                                  code, engine):
    rc, stdout, stderr, out, temp = _run_and_signal(big_case, tmp_path, sig, engine)
    assert rc == code, stderr
    assert "interrupted" in stderr and "no output written" in stderr
    for wrong in ("time_limit", "time limit", "disagrees", "Solve error", "unexpected"):
        assert wrong not in stderr + stdout
    assert stdout.strip() == ""  # --json prints nothing for an interrupted run
    assert not out.exists()
    assert sorted(os.listdir(tmp_path)) == ["temp"]  # no staging beside --out
    assert os.listdir(temp) == []  # the HiGHS log is gone too


# ------------------------------------------------------------------ the handler directly
def test_handler_raises_outside_and_defers_inside_a_guarded_section():
    interrupt.reset()
    with pytest.raises(interrupt.Interrupted) as info:
        interrupt.handler(signal.SIGTERM)
    assert info.value.exit_code == 143 and isinstance(info.value, KeyboardInterrupt)
    interrupt.reset()
    cancelled = []
    with pytest.raises(interrupt.Interrupted) as info:
        with interrupt.deferred(cancel=lambda: cancelled.append(1)):
            interrupt.handler(signal.SIGINT)  # as if Ctrl-C came while HiGHS runs
            cancelled.append("went on")  # the section is not cut
    assert cancelled == [1, "went on"] and info.value.exit_code == 130
    interrupt.reset()


def test_signal_while_price_resolves_run_side_by_side(monkeypatch):
    """The incremental-price re-solves run in two threads (solver/incremental.py _map), each
    inside its own guarded section. A signal then asks both solvers to stop, is not raised
    while either section runs, and comes out of _map as Interrupted once both have ended."""
    import threading

    from optreserve.solver import incremental

    monkeypatch.setenv("OPTRESERVE_PRICE_THREADS", "2")
    interrupt.reset()
    inside = threading.Barrier(3)
    go_on = threading.Event()
    cancelled, finished, caught = [], [], []

    def job(k):
        with interrupt.deferred(cancel=lambda: cancelled.append(k)):
            inside.wait(timeout=10)
            go_on.wait(timeout=10)
            finished.append(k)
        return k

    def run():
        try:
            incremental._map(job, [0, 1])
        except interrupt.Interrupted as e:
            caught.append(e.exit_code)

    t = threading.Thread(target=run)
    t.start()
    try:
        inside.wait(timeout=10)  # both re-solves are in their guarded sections
        interrupt.handler(signal.SIGINT)  # what the main thread's handler does: no raise
        go_on.set()
        t.join(timeout=10)
    finally:
        go_on.set()
        interrupt.reset()
    assert sorted(cancelled) == [0, 1] and sorted(finished) == [0, 1]
    assert caught == [130]


def test_highs_interrupted_by_cancel_is_reported_interrupted_and_log_removed(tmp_path,
                                                                            monkeypatch):
    """A real HiGHS run of a generated case with the stop requested: highspy's interrupt
    callback stops it; the status is "interrupted" (not "time_limit"), Interrupted is raised
    after run() returns and the temporary log is gone."""
    import tempfile

    import optreserve
    from optreserve.model.build import build_model
    from optreserve.solver import backends

    case = optreserve.load_case(generate(Spec(units=60, areas=3, links=3, periods=8,
                                              events=4, seed=3), tmp_path / "c"))
    lp, _ = build_model(case)
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    seen = {}
    real = backends._outcome_from_highs

    def spy(h, *a, **k):
        seen["out"] = real(h, *a, **k)
        return seen["out"]

    monkeypatch.setattr(backends, "_outcome_from_highs", spy)
    interrupt.reset()
    interrupt._state["signum"] = signal.SIGINT  # the signal has come
    try:
        with pytest.raises(interrupt.Interrupted):
            backends.solve_highs(lp)
    finally:
        interrupt.reset()
    assert "out" not in seen  # raised before any status was read
    # the same model stopped by cancelSolve and read back: status "interrupted"
    h = backends.new_highs()
    h.setOptionValue("output_flag", False)
    A = lp.A.tocsc()
    h.passModel(int(lp.n_cols), int(lp.n_rows), int(A.nnz), 1, 1,
                float(lp.objective_offset), lp.cost, lp.col_lo, lp.col_hi, lp.row_lo,
                lp.row_hi, A.indptr.astype(np.int32), A.indices.astype(np.int32),
                np.ascontiguousarray(A.data, dtype=float), lp.integer.astype(np.int32))
    h.setOptionValue("presolve", "off")  # reach the simplex, whose callback sees the stop
    h.HandleUserInterrupt = True
    h.cancelSolve()
    h.run()
    out = real(h, lp, "highspy", False)
    assert out.status == "interrupted" and out.x is None
    assert glob.glob(str(tmp_path / "optreserve-highs-*.log")) == []


def test_a_log_left_by_a_killed_run_is_removed_by_the_next_solve(tmp_path, monkeypatch):
    """SIGKILL cannot be caught: the log of a run that no longer exists (its process id in
    the name) is removed by the next solve on the machine; a live run's log stays."""
    import tempfile

    from optreserve.solver import backends

    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    live = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
        monkeypatch.setattr(backends, "_stale_logs_checked", False)
        stale = tmp_path / f"optreserve-highs-{dead.pid}-abc.log"
        busy = tmp_path / f"optreserve-highs-{live.pid}-def.log"
        stale.write_text("old")
        busy.write_text("running")
        log = backends._new_log()
        os.unlink(log.name)
        assert not stale.exists() and busy.exists()
    finally:
        live.kill()
        live.wait()


def test_sigterm_during_a_dask_sweep_exits_143_and_writes_nothing(tmp_path):
    """The signal lands once the LocalCluster's worker processes are being started (a
    marker: this process's descendants); it takes effect when the cluster is up, the cluster
    is closed in order, and no table, staging folder or traceback is left."""
    import psutil

    out = tmp_path / "o"
    p = subprocess.Popen([sys.executable, "-m", "optreserve", "sweep",
                          str(ROOT / "instances" / "demo-tri-valley"), "--vary",
                          "price_scale=0.5:2:0.01", "--out", str(out), "--workers", "2",
                          "--quiet"], env=dict(os.environ, PYTHONPATH=str(ROOT)),
                         stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 120
        while len(psutil.Process(p.pid).children(recursive=True)) < 3:
            assert p.poll() is None and time.monotonic() < deadline
            time.sleep(0.05)
        p.send_signal(signal.SIGTERM)
        _, stderr = p.communicate(timeout=120)
    finally:
        if p.poll() is None:
            p.kill()
            p.wait()
    assert p.returncode == 143, stderr
    assert stderr.strip().splitlines()[-1] == "interrupted (SIGTERM); no output written"
    assert os.listdir(tmp_path) == []

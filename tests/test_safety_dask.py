"""Sweeps on Dask never lose a point: workers of a real 2-process LocalCluster are killed
(SIGKILL) or stopped (SIGSTOP) mid-sweep and every point still comes back, equal to the
serial table; a point that cannot be delivered is a 'lost' row and exit code 5. The cluster
listens on 127.0.0.1 only and serves no web pages.

Outside references: the settled law delta f = dP / sum K for the one-unit case (cost = price
x dP, common practice; the same hand check as tests/test_sweep.py) and the distributed
documentation (LocalCluster host/dashboard_address, Client.submit retries, worker
processes restarted by their nanny). The faults are injected at a progress signal (the first
delivered point), not after a fixed sleep.
"""

from __future__ import annotations

import os
import signal
import time
import urllib.request

import pandas as pd
import pytest
from conftest import settings, write_case

import optreserve
import optreserve.studies.sweep as sweep
from optreserve.cli import main
from optreserve.studies import delivery
from optreserve.studies.sweep import parse_vary, run_sweep


def _case(folder):
    """One provider at price 2 per MW h; at most 100 MW at 0.2 Hz."""
    return write_case(folder, settings(),
                      [{"unit": "Stenn_1", "area": "Stennmoor", "capacity_mw": 500,
                        "output_mw": 300, "droop_min_pct": 2, "droop_max_pct": 10,
                        "price_up_per_mw_h": 2}],
                      [{"area": "Stennmoor", "load_mw": 4000}],
                      [{"event": "step", "kind": "load_step", "area": "Stennmoor",
                        "size_mw": 80}])


class _Quiet:
    def update(self, k=1):
        pass

    def close(self):
        pass


class _FaultAtFirstPoint:
    """A progress bar that injects a fault when the first point has been delivered."""

    def __init__(self, fault):
        self.fault, self.n = fault, 0

    def update(self, k=1):
        self.n += k
        if self.n == 1:
            from distributed import get_client

            client = get_client()
            self.fault(client, client.run(os.getpid))  # worker address -> process id

    def close(self):
        pass


def _sweep_with(monkeypatch, case, fault, timeout=None):
    bar = _FaultAtFirstPoint(fault)
    monkeypatch.setattr(sweep, "_bar", lambda *a, **k: bar)
    t0 = time.monotonic()
    table = run_sweep(case, [parse_vary("event:step.size_mw=30:90:5")], workers=2,
                      point_timeout_s=timeout)
    return table, time.monotonic() - t0, bar


def _same_as_serial(case, table):
    serial = run_sweep(case, [parse_vary("event:step.size_mw=30:90:5")])
    cols = [c for c in serial.columns if c != "solve_s"]
    assert list(table["status"]) == ["optimal"] * 13
    pd.testing.assert_frame_equal(serial[cols], table[cols])
    # hand check: cost = 2 per MW h x dP (one provider, no damping)
    assert list(table["objective_per_h"]) == pytest.approx([2 * s for s in range(30, 91, 5)],
                                                           rel=1e-6)


def test_killing_one_worker_mid_sweep_loses_no_point(case_dir, monkeypatch):
    case = optreserve.load_case(_case(case_dir()))
    killed = []

    def kill_one(client, pids):
        pid = min(pids.values())
        os.kill(pid, signal.SIGKILL)
        killed.append(pid)

    table, _, _ = _sweep_with(monkeypatch, case, kill_one)
    assert killed
    _same_as_serial(case, table)


def test_killing_every_worker_mid_sweep_loses_no_point(case_dir, monkeypatch):
    """Reproduction: both workers killed turned 10 of 11 points into 'already forgotten'
    errors; the case scattered to the workers died with them and is sent again."""
    case = optreserve.load_case(_case(case_dir()))

    def kill_all(client, pids):
        for pid in pids.values():
            os.kill(pid, signal.SIGKILL)

    table, _, _ = _sweep_with(monkeypatch, case, kill_all)
    _same_as_serial(case, table)


def test_a_stopped_worker_costs_one_timeout_not_the_sweep(case_dir, monkeypatch):
    """Reproduction: a SIGSTOPped worker hung the sweep for minutes. With a 3 s per-point
    timeout its point runs elsewhere, the stopped worker is killed (its nanny starts another)
    and the sweep ends in bounded time."""
    case = optreserve.load_case(_case(case_dir()))
    stopped = []

    def stop_one(client, pids):
        busy = [a for a, keys in client.processing().items() if keys]
        pid = pids[busy[0]] if busy else min(pids.values())
        os.kill(pid, signal.SIGSTOP)
        stopped.append(pid)

    try:
        table, wall, _ = _sweep_with(monkeypatch, case, stop_one, timeout=3.0)
    finally:
        for pid in stopped:  # never leave a stopped process behind
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
    _same_as_serial(case, table)
    assert wall < 90


def _hang_at_two(shared, index, x):
    """A point that never finishes (x == 2) among quick ones."""
    if x == 2:
        time.sleep(600)
    return {"point": index, "x": x, "status": "optimal", "error": ""}


def test_a_point_that_never_finishes_becomes_a_lost_row(monkeypatch):
    """Per-point timeout 3 s (a fresh worker's first point 2 s more), 3 tries, then a row
    that says the point could not be delivered; the other points are unaffected."""
    monkeypatch.setattr(delivery, "WARMUP_S", 2.0)
    rows = delivery.run_dask(
        _hang_at_two, None, [(i, (float(i),)) for i in range(4)], 2, None,
        _Quiet(), 3.0,
        lambda i, args, text: {"point": i, "x": args[0], "status": "lost", "error": text})
    by_point = {r["point"]: r for r in rows}
    assert sorted(by_point) == [0, 1, 2, 3]
    assert [by_point[i]["status"] for i in range(4)] == ["optimal", "optimal", "lost",
                                                         "optimal"]
    assert "after 3 tries" in by_point[2]["error"] and "3 s" in by_point[2]["error"]


def test_cli_exit_code_4_and_the_row_when_a_point_is_lost(case_dir, tmp_path, monkeypatch):
    """The command writes the table with the 'lost' row and exits 5 (docs/case-format.md)."""
    folder = _case(case_dir())
    real = sweep.run_sweep

    def losing(case, varies, **kw):
        t = real(case, varies)
        t.loc[1, ["status", "error"]] = [sweep.LOST, "could not be delivered after 3 tries"]
        return t

    monkeypatch.setattr(sweep, "run_sweep", losing)
    out = tmp_path / "o"
    assert main(["sweep", str(folder), "--vary", "price_scale=1,2,3", "--out", str(out),
                 "--workers", "1", "--quiet"]) == 5
    table = pd.read_csv(out / "sweep.csv")
    assert list(table["status"]) == ["optimal", "lost", "optimal"]


def test_local_cluster_is_loopback_only_without_web_pages():
    """Every listening address of scheduler and workers is 127.0.0.1, and the scheduler's
    HTTP port (distributed always opens one) serves no page: no dashboard, no /health."""
    seen = {}

    def look(shared, index):
        return {"point": index, "status": "optimal", "error": ""}

    class Bar:
        def update(self, k=1):
            from distributed import get_client

            c = get_client()
            info = c.scheduler_info(n_workers=-1)
            seen["scheduler"] = info["address"]
            seen["workers"] = list(info["workers"])
            seen["http"] = c.run_on_scheduler(
                lambda dask_scheduler: sorted({s.getsockname()[:2] for s in
                                               dask_scheduler.http_server._sockets.values()}))
            seen["codes"] = []
            for _host, port in seen["http"]:  # probed while the cluster runs
                for path in ("/status", "/health", "/info/main/workers.html", "/metrics"):
                    try:
                        urllib.request.urlopen(f"http://127.0.0.1:{port}{path}", timeout=5)
                        seen["codes"].append(200)
                    except urllib.error.HTTPError as exc:
                        seen["codes"].append(exc.code)

        def close(self):
            pass

    delivery.run_dask(look, None, [(0, ())], 2, None, Bar(), None, None)
    assert seen["scheduler"].startswith("tcp://127.0.0.1:")
    assert all(w.startswith("tcp://127.0.0.1:") for w in seen["workers"])
    # the HTTP server distributed always opens: loopback only, and it serves no page
    assert seen["http"] and all(host == "127.0.0.1" for host, _ in seen["http"])
    assert set(seen["codes"]) == {404}

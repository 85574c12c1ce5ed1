"""The points of a study on Dask, delivered whatever happens to the workers.

* A worker that dies (killed, out of memory) takes nothing with it: the scheduler runs its
  tasks elsewhere (and `retries`), and a point whose task is lost or cancelled anyway (every
  worker died and the shared case went with them) is submitted again, the case scattered anew.
* A point not back within `point_timeout_s` of its worker starting on it (a stopped or hung
  worker) is taken away and run on another worker; a hung worker of our own LocalCluster is
  killed (its nanny starts a fresh one).
* A point still not delivered after DELIVERY_ATTEMPTS tries becomes a row saying so (status
  "lost"; the command exits with code 4) instead of silently vanishing.
* Our LocalCluster listens on 127.0.0.1 only and serves no web pages (no dashboard, no
  /health or /metrics routes). Its ports are still open to other users of this machine; Dask
  can restrict them with TLS (`Security`), which needs the `cryptography` package.
"""

from __future__ import annotations

import logging
import os
import signal
import time
from collections.abc import Callable

DELIVERY_ATTEMPTS = 3
POLL_S = 0.25  # how often the client looks for finished and for hung points
DASK_CONFIG = {
    "distributed.scheduler.http.routes": [],  # no web server content unless asked
    "distributed.worker.http.routes": [],
}


def _on_worker(fn, shared, index, *args) -> dict:
    """fn's row plus the address of the worker that computed it (taken off again)."""
    from distributed import get_worker

    row = fn(shared, index, *args)
    row["_worker"] = get_worker().address
    return row


def run_dask(fn, shared, tasks, workers, scheduler, bar, point_timeout_s: float | None,
             lost_row: Callable[[int, tuple, str], dict]) -> list[dict]:
    """fn(shared, index, *args) for every (index, args) task on a LocalCluster of `workers`
    processes (or the cluster at `scheduler`); one row per task, in completion order."""
    import dask
    from dask.distributed import Client, LocalCluster

    with dask.config.set(DASK_CONFIG):
        cluster = None
        if scheduler is None:
            cluster = LocalCluster(n_workers=int(workers), threads_per_worker=1,
                                   processes=True, host="127.0.0.1", dashboard_address=None,
                                   worker_dashboard_address=None, silence_logs=logging.ERROR)
            client = Client(cluster)
        else:
            client = Client(scheduler)
        try:
            return _Delivery(client, cluster, fn, shared, bar, point_timeout_s,
                             lost_row).run(tasks)
        finally:
            client.close()
            if cluster is not None:
                cluster.close()


class _Delivery:
    def __init__(self, client, cluster, fn, shared, bar, timeout, lost_row):
        self.client, self.cluster, self.fn, self.shared = client, cluster, fn, shared
        self.bar, self.timeout, self.lost_row = bar, timeout, lost_row
        self.pending: dict = {}  # future -> (index, args, attempt)
        self.rows: list[dict] = []
        self.busy_since: dict[str, float] = {}  # worker -> when it began its current point
        self.data = None

    def run(self, tasks) -> list[dict]:
        from dask.distributed import wait

        self._scatter()
        for i, args in tasks:
            self._submit(i, args, 1)
        while self.pending:
            try:
                done, _ = wait(list(self.pending), timeout=POLL_S,
                               return_when="FIRST_COMPLETED")
            except TimeoutError:  # nothing finished meanwhile
                done = ()
            for f in done:
                if f in self.pending:
                    self._collect(f)
            if self.timeout and self.pending:
                self._take_from_hung_workers()
        return self.rows

    # ---------------------------------------------------------------- submitting
    def _scatter(self) -> None:
        # shared data (the case) travels to every worker once; a task carries only its point
        if self.shared is not None:
            self.data = self.client.scatter(self.shared, broadcast=True)

    def _submit(self, i, args, attempt, avoid=()) -> None:
        kw = {}
        if avoid:
            others = [w for w in self.client.scheduler_info(n_workers=-1)["workers"]
                      if w not in avoid]
            if others:
                kw = {"workers": others, "allow_other_workers": False}
        f = self.client.submit(_on_worker, self.fn, self.data, i, *args, pure=False,
                               retries=1, **kw)
        self.pending[f] = (i, args, attempt)

    def _again(self, i, args, attempt, why: str, avoid=()) -> None:
        """Run a point once more, or write its 'lost' row after the last attempt."""
        if attempt >= DELIVERY_ATTEMPTS:
            self.rows.append(self.lost_row(i, args, f"could not be delivered after {attempt} "
                                                    f"tries: {why}"))
            self.bar.update(1)
            return
        if self.data is not None and self.data.status != "finished":
            try:  # the case went down with the workers: send it again once one is back
                self.client.wait_for_workers(1, timeout=self.timeout or 120)
                self._scatter()
            except Exception as exc:  # no worker comes back: nothing more can run
                self.rows.append(self.lost_row(i, args, f"could not be delivered: {why}; "
                                                        f"no worker left ({exc})"))
                self.bar.update(1)
                return
        self._submit(i, args, attempt + 1, avoid)

    # ---------------------------------------------------------------- collecting
    def _collect(self, f) -> None:
        i, args, attempt = self.pending.pop(f)
        if f.status == "finished":
            try:
                row = f.result()
            except Exception as exc:  # the result could not be fetched (worker gone)
                self._again(i, args, attempt, _why(exc))
                return
            w = row.pop("_worker", None)
            if w is not None:
                self.busy_since[w] = time.monotonic()  # free for its next point
            self.rows.append(row)
            self.bar.update(1)
            return
        try:
            f.result()
            why = f.status
        except KeyboardInterrupt:
            raise
        except BaseException as exc:  # lost, cancelled (CancelledError is a BaseException)
            why = _why(exc)
        self._again(i, args, attempt, why)

    def _take_from_hung_workers(self) -> None:
        now = time.monotonic()
        mine = {f.key: f for f in self.pending}
        for w, keys in self.client.processing().items():
            ours = [mine[k] for k in keys if k in mine]
            if not ours:
                self.busy_since[w] = now
                continue
            if now - self.busy_since.setdefault(w, now) <= self.timeout:
                continue
            self.busy_since.pop(w, None)
            self.client.cancel(ours)
            for f in ours:
                i, args, attempt = self.pending.pop(f)
                self._again(i, args, attempt, f"no result within {self.timeout:g} s on worker "
                                              f"{w}", avoid={w})
            self._stop_worker(w)

    def _stop_worker(self, address: str) -> None:
        """Kill a hung worker of our own LocalCluster (its nanny starts a fresh one); a
        worker of someone else's cluster is only avoided."""
        if self.cluster is None:
            return
        import psutil

        info = self.client.scheduler_info(n_workers=-1)["workers"].get(address, {})
        pid = info.get("pid")
        try:
            proc = psutil.Process(int(pid))
            if os.getpid() in {p.pid for p in proc.parents()}:  # only our own descendants
                os.kill(proc.pid, signal.SIGKILL)
        except (TypeError, ValueError, psutil.Error, OSError):
            pass


def _why(exc: BaseException) -> str:
    return f"{type(exc).__name__}: {exc}".splitlines()[0]

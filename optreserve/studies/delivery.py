"""The points of a study on Dask, delivered whatever happens to the workers.

* A worker that dies (killed, out of memory) takes nothing with it: the scheduler runs its
  tasks elsewhere (and `retries`), and a point whose task is lost or cancelled anyway (every
  worker died and the shared case went with them) is submitted again, the case scattered anew.
* A point not back within `point_timeout_s` of its worker starting on it (WARMUP_S more for
  a worker's first point) is taken away and run on another worker (a stopped or hung
  worker); a hung worker of our own LocalCluster is killed (its nanny starts a fresh one).
* At most as many points are handed to Dask at a time as there are worker threads, so a
  point "processing" on a worker is the one it runs.
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
from collections import deque
from collections.abc import Callable
from contextlib import contextmanager

from optreserve import interrupt

DELIVERY_ATTEMPTS = 3
POLL_S = 0.25  # how often the client looks for finished and for hung points
FETCH_S = 10.0  # longest wait for a finished point's row from its worker
WARMUP_S = 20.0  # extra time for the first point of a worker (imports, first solve)
STALL_S = 120.0  # points waiting this long with no worker running any of them are lost
DASK_CONFIG = {
    "distributed.scheduler.http.routes": [],  # no web server content unless asked
    "distributed.worker.http.routes": [],
    # one point at a time per single-thread worker: a point "processing" on a worker is the
    # one it runs, so the per-point timeout starts when the point does
    "distributed.scheduler.worker-saturation": 1.0,
}


def _on_worker(fn, shared, index, *args) -> dict:
    """fn's row plus the address of the worker that computed it (taken off again)."""
    from distributed import get_worker

    row = fn(shared, index, *args)
    row["_worker"] = get_worker().address
    return row


@contextmanager
def study_client(workers: int | None, scheduler: str | None):
    """(client, cluster or None): our LocalCluster of `workers` processes, on 127.0.0.1 only
    and serving no web pages, or a client of the cluster at `scheduler`; closed on exit."""
    import dask
    from dask.distributed import Client, LocalCluster

    with dask.config.set(DASK_CONFIG):
        cluster = client = None
        try:
            # a signal while the cluster starts takes effect once it is up (then it is closed
            # again in order; cut mid-start, its processes would report failures)
            with interrupt.deferred():
                if scheduler is None:
                    cluster = LocalCluster(n_workers=int(workers), threads_per_worker=1,
                                           processes=True, host="127.0.0.1",
                                           dashboard_address=None,
                                           worker_dashboard_address=None,
                                           silence_logs=logging.ERROR)
                    client = Client(cluster)
                else:
                    client = Client(scheduler)
            yield client, cluster
        except KeyboardInterrupt:  # Ctrl-C, SIGTERM: close quietly (no comm tracebacks)
            logging.getLogger("distributed").setLevel(logging.CRITICAL)
            raise
        finally:
            if client is not None:
                client.close()
            if cluster is not None:
                cluster.close()


def run_dask(fn, shared, tasks, workers, scheduler, bar, point_timeout_s: float | None,
             lost_row: Callable[[int, tuple, str], dict]) -> list[dict]:
    """fn(shared, index, *args) for every (index, args) task on a LocalCluster of `workers`
    processes (or the cluster at `scheduler`); one row per task, in completion order."""
    with study_client(workers, scheduler) as (client, cluster):
        return _Delivery(client, cluster, fn, shared, bar, point_timeout_s,
                         lost_row).run(tasks)


class _Delivery:
    def __init__(self, client, cluster, fn, shared, bar, timeout, lost_row):
        self.client, self.cluster, self.fn, self.shared = client, cluster, fn, shared
        self.bar, self.timeout, self.lost_row = bar, timeout, lost_row
        self.pending: dict = {}  # future -> (index, args, attempt)
        self.rows: list[dict] = []
        self.busy_since: dict[str, float] = {}  # worker -> when it began its current point
        self.data = None
        self.backlog: deque = deque()  # (index, args, attempt, workers to avoid) to submit
        self.slots = 1
        self.delivered_by: set[str] = set()
        self.stalled_since = time.monotonic()  # last time a worker was running one of ours

    def run(self, tasks) -> list[dict]:
        from dask.distributed import wait

        self._scatter()
        # as many points in flight as there are worker threads: a point "processing" on a
        # worker is then the one it runs, and the per-point timeout starts with it
        self.slots = max(1, sum(w.get("nthreads", 1) for w in
                                self.client.scheduler_info(n_workers=-1)["workers"].values()))
        self.backlog.extend((i, args, 1, ()) for i, args in tasks)
        self._fill()
        while self.pending or self.backlog:
            self._fill()
            try:
                wait(list(self.pending), timeout=POLL_S, return_when="FIRST_COMPLETED")
            except KeyboardInterrupt:
                raise
            except BaseException:  # nothing finished meanwhile, or futures were cancelled
                pass
            for f in [f for f in self.pending if f.status != "pending"]:
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
        """Queue a point; it is handed to Dask when a slot is free (_fill)."""
        self.backlog.appendleft((i, args, attempt, tuple(avoid)))

    def _fill(self) -> None:
        while self.backlog and len(self.pending) < self.slots:
            self._hand_over(*self.backlog.popleft())

    def _hand_over(self, i, args, attempt, avoid=()) -> None:
        kw = {}
        if avoid and self.cluster is None:  # someone else's cluster: prefer the other workers
            # (only a preference: a strict one would wait forever once those workers go)
            others = [w for w in self.client.scheduler_info(n_workers=-1)["workers"]
                      if w not in avoid]
            if others:
                kw = {"workers": others, "allow_other_workers": True}
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
            try:  # a row is small: fetching it takes milliseconds unless its worker hangs
                row = f.result(timeout=min(self.timeout or FETCH_S, FETCH_S))
            except TimeoutError:
                holders = {w for ws in self.client.who_has(f).values() for w in ws}
                self._again(i, args, attempt, "its result could not be fetched from worker "
                            + ", ".join(sorted(holders)), avoid=holders)
                for w in holders:
                    self._stop_worker(w)
                return
            except Exception as exc:  # the result could not be fetched (worker gone)
                self._again(i, args, attempt, _why(exc))
                return
            w = row.pop("_worker", None)
            if w is not None:
                self.busy_since[w] = time.monotonic()  # free for its next point
                self.delivered_by.add(w)
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
        running = self.client.processing()
        if any(k in mine for keys in running.values() for k in keys):
            self.stalled_since = now
        elif now - self.stalled_since > max(self.timeout, STALL_S):
            # points wait but no worker runs any (every worker gone and none back)
            waited = [self.pending.pop(f)[:2] for f in list(self.pending)]
            waited += [(i, args) for i, args, _, _ in self.backlog]
            self.backlog.clear()
            for i, args in waited:
                self.rows.append(self.lost_row(i, args, "could not be delivered: no worker "
                                               f"ran it for {max(self.timeout, STALL_S):g} s"))
                self.bar.update(1)
            self.client.cancel(list(mine.values()))
            return
        for w, keys in running.items():
            ours = [mine[k] for k in keys if k in mine]
            if not ours:
                self.busy_since[w] = now
                continue
            # a fresh worker's first point also pays for its imports: WARMUP_S more
            allowed = self.timeout + (0.0 if w in self.delivered_by else WARMUP_S)
            if now - self.busy_since.setdefault(w, now) <= allowed:
                continue
            self.busy_since.pop(w, None)
            self.client.cancel(ours)
            for k, f in enumerate(ours):
                i, args, attempt = self.pending.pop(f)
                if k == 0:  # the one it runs (the first assigned); the others only waited
                    self._again(i, args, attempt, f"no result within {self.timeout:g} s on "
                                                  f"worker {w}", avoid={w})
                else:
                    self._submit(i, args, attempt, avoid={w})
            self._stop_worker(w)

    def _stop_worker(self, address: str) -> None:
        """Kill a hung worker of our own LocalCluster (its nanny, in this process, starts a
        fresh one); a worker of someone else's cluster is only avoided."""
        if self.cluster is None:
            return
        for nanny in list(self.cluster.workers.values()):
            if getattr(nanny, "worker_address", None) == address and nanny.pid:
                try:
                    os.kill(int(nanny.pid), signal.SIGKILL)
                except OSError:
                    pass


def _why(exc: BaseException) -> str:
    return f"{type(exc).__name__}: {exc}".splitlines()[0]

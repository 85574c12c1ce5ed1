"""Ctrl-C (SIGINT) and SIGTERM: stop cleanly, write nothing, exit 130 / 143.

The command line installs `handler` for both signals (cli/app.py). Outside the guarded
sections below a signal raises `Interrupted` at once (a KeyboardInterrupt, so no
`except Exception` swallows it). Inside `deferred()` it only records the signal and calls the
section's cancel function: HiGHS is told to stop through highspy's user-interrupt callbacks
(an exception raised inside a HiGHS callback would come out as a solver error instead), and the
final moves of an output set are never cut in half. `Interrupted` is raised when the outermost
guarded section is left. Library use without the handler is unaffected.
"""

from __future__ import annotations

import signal
import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager

_state: dict = {"signum": None, "depth": 0, "cancel": []}
# guarded sections may run in several threads (side-by-side price re-solves): their count and
# cancel list change under this lock; the handler (main thread) only reads them, so it never
# waits for it
_lock = threading.Lock()


class Interrupted(KeyboardInterrupt):
    """The run was stopped by a signal; exit code 128 + signal number (130 SIGINT, 143
    SIGTERM), as shells report a process ended by that signal."""

    def __init__(self, signum: int = signal.SIGINT):
        self.signum = int(signum)
        self.exit_code = 128 + self.signum
        super().__init__(signal.Signals(self.signum).name)


def requested() -> int | None:
    """The first signal received since reset(), or None."""
    return _state["signum"]


def reset() -> None:
    _state.update(signum=None, depth=0, cancel=[])


def handler(signum, frame=None) -> None:
    """Signal handler: record, ask the running solver to stop, raise unless deferred."""
    if _state["signum"] is None:
        _state["signum"] = int(signum)
    for cancel in list(_state["cancel"]):
        try:
            cancel()
        except Exception:  # a cancel must never turn a signal into another error
            pass
    if _state["depth"] == 0:
        raise Interrupted(_state["signum"])


def check() -> None:
    """Raise Interrupted when a signal has been received (outside a guarded section)."""
    if _state["signum"] is not None and _state["depth"] == 0:
        raise Interrupted(_state["signum"])


@contextmanager
def deferred(cancel: Callable[[], None] | None = None) -> Iterator[None]:
    """A section a signal must not cut: it is recorded (and `cancel` called) and raised as
    Interrupted when the outermost section ends (of every thread's)."""
    with _lock:
        _state["depth"] += 1
        if cancel is not None:
            _state["cancel"] = [*_state["cancel"], cancel]
    if cancel is not None and _state["signum"] is not None:  # asked to stop already
        cancel()
    try:
        yield
    finally:
        with _lock:
            _state["depth"] -= 1
            if cancel is not None and cancel in _state["cancel"]:
                rest = list(_state["cancel"])
                rest.remove(cancel)
                _state["cancel"] = rest
            last = _state["depth"] == 0
        if last and _state["signum"] is not None:
            raise Interrupted(_state["signum"])


@contextmanager
def handling() -> Iterator[None]:
    """Install the handler for SIGINT and SIGTERM (main thread only) and restore the previous
    handlers afterwards."""
    import threading

    reset()
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    old = {s: signal.signal(s, handler) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield
    finally:
        for s, h in old.items():
            signal.signal(s, h)

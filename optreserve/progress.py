"""Progress of long steps. The library announces steps; only the command line, on a terminal,
shows them (a status line on stderr once a step has run for about 2 s, with HiGHS's latest
log line while it solves). Scripts and tests see nothing."""

from __future__ import annotations

import os
import sys
import threading
import time
from contextlib import contextmanager

_listeners: list = []


def step(name: str, log_file: str | None = None) -> None:
    """Announce that a step starts (log_file: where HiGHS writes its log meanwhile)."""
    for fn in list(_listeners):
        fn(name, log_file)


@contextmanager
def listening(fn):
    _listeners.append(fn)
    try:
        yield
    finally:
        _listeners.remove(fn)


def use_colour(stream=None) -> bool:
    """Colour only on a terminal, and never when NO_COLOR is set (a common convention)."""
    stream = stream or sys.stdout
    return bool(getattr(stream, "isatty", lambda: False)()) and "NO_COLOR" not in os.environ


class TerminalStatus:
    """A one-line status on stderr, redrawn a few times a second, shown only for steps that
    take longer than `after` seconds and only when stderr is a terminal."""

    FRAMES = "|/-\\"

    def __init__(self, stream=None, after: float = 2.0):
        self.stream = stream or sys.stderr
        self.after = after
        self.enabled = bool(getattr(self.stream, "isatty", lambda: False)())
        self._name = ""
        self._log = None
        self._start = time.monotonic()
        self._shown = False
        self._stop = threading.Event()
        self._lock = threading.Lock()
        self._thread = None

    def __call__(self, name: str, log_file: str | None) -> None:
        with self._lock:
            self._name, self._log, self._start = name, log_file, time.monotonic()

    def __enter__(self):
        if self.enabled:
            self._thread = threading.Thread(target=self._run, daemon=True)
            self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=1.0)
        self._clear()
        return False

    def _last_log_line(self) -> str:
        if not self._log:
            return ""
        try:
            with open(self._log, "rb") as fh:
                fh.seek(0, os.SEEK_END)
                size = fh.tell()
                fh.seek(max(0, size - 2048))
                lines = [ln.strip() for ln in fh.read().decode("utf-8", "replace").splitlines()]
        except OSError:
            return ""
        lines = [ln for ln in lines if ln]
        return _readable(lines[-1]) if lines else ""

    def _run(self) -> None:
        k = 0
        while not self._stop.wait(0.25):
            with self._lock:
                name, start = self._name, self._start
            elapsed = time.monotonic() - start
            if not name or elapsed < self.after:
                continue
            width = 100
            try:
                width = os.get_terminal_size(self.stream.fileno()).columns - 1
            except (OSError, ValueError):
                pass
            extra = self._last_log_line()
            text = f"{self.FRAMES[k % 4]} {name}  {elapsed:5.1f} s" + (
                f"  | {extra}" if extra else "")
            self.stream.write("\r" + text[:width].ljust(width))
            self.stream.flush()
            self._shown = True
            k += 1

    def _clear(self) -> None:
        if self._shown:
            try:
                width = os.get_terminal_size(self.stream.fileno()).columns - 1
            except (OSError, ValueError):
                width = 100
            self.stream.write("\r" + " " * width + "\r")
            self.stream.flush()


def _readable(line: str) -> str:
    """A HiGHS branch-and-bound log line (nodes | leaves explored % | best bound, best
    solution, gap % | ...) as 'bound X, best Y, gap Z %'; any other line as it is."""
    tokens = line.split()
    pct = [k for k, t in enumerate(tokens) if t.endswith("%")]
    if len(pct) >= 2 and pct[1] >= 2:
        g = pct[1]
        return f"bound {tokens[g - 2]}, best {tokens[g - 1]}, gap {tokens[g]}"
    return " ".join(tokens)

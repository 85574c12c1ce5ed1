"""Where the time of a solve goes: one key per step that takes time (summary.json's
timings_s), and a total that the parts add up to (`other` holds what no step claims: Python
between the steps, and the imports of a first solve in a process)."""

from __future__ import annotations

import time
from contextlib import contextmanager

# steps measured apart from the model building and HiGHS's own solve time
STEPS = ("verify", "nadir_check", "prices", "compare")


class Clock(dict):
    """Seconds per step; `with clock("verify"): ...` adds to a step."""

    @contextmanager
    def __call__(self, key: str):
        t0 = time.perf_counter()
        try:
            yield
        finally:
            self[key] = self.get(key, 0.0) + time.perf_counter() - t0

    def run(self, key: str, fn, *args):
        with self(key):
            return fn(*args)


def close_total(timings: dict, total_s: float) -> dict:
    """Set the total and the remainder `other`, so that every key but total adds up to it
    (write, measured later, adds to both itself and the total)."""
    timings.pop("other", None)
    timings.pop("total", None)
    parts = sum(v for k, v in timings.items() if k != "write")
    timings["other"] = max(total_s - parts - timings.get("write", 0.0), 0.0)
    timings["total"] = total_s  # last, as printed
    return timings

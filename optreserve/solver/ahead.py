"""Incremental-price re-solves begun ahead, on the second core, while the solve's last
candidate is itself being solved and simulated (docs/formulation.md, section 12a).

After the last loosening of the nadir rows (solver/nadir_loop.py) the program of the next pass
is, in the usual case, the program of the answer. The re-solve of one grown event instance
does not depend on that pass's solution, only on its program: it can start at the same time.
Which instance will need it is known only from the answer (the instances the answer still
meets at their grown size need none), so the one the previous candidate met with the least
settled margin is guessed. When the guess is right, incremental_prices takes its result
instead of solving it again; when it is wrong or the pass is not the answer, the re-solve is
stopped and nothing of it is used. The values are those of the sequential path: the same
program, solved without a start in both (solver/incremental.py).
"""

from __future__ import annotations

from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import replace

import numpy as np

from optreserve.model.build import ModelInfo
from optreserve.model.horizon import Horizon


class _Stopper:
    """Stops the HiGHS run of one re-solve from another thread."""

    def __init__(self) -> None:
        self.highs = None
        self.stopped = False

    def attach(self, h) -> None:
        self.highs = h
        if self.stopped:
            h.cancelSolve()

    def stop(self) -> None:
        self.stopped = True
        if self.highs is not None:
            self.highs.cancelSolve()


def guess(info: ModelInfo, previous, priced: np.ndarray) -> int:
    """The priced instance the previous candidate (lp, info, out) met with the least settled
    margin: the one most likely to need a re-solve at the answer."""
    from optreserve.solver.readback import exact_points

    lp_p, info_p, out_p = previous
    dev = np.abs(exact_points(info_p, lp_p, out_p.x).deviation_hz)
    margin = np.where(np.isfinite(dev), info.F_model - dev, np.inf)[priced]
    return int(priced[int(np.argmin(margin))])


class Ahead:
    """The re-solves begun ahead during one solve (at most one at a time)."""

    def __init__(self, case, hz: Horizon, time_limit: float | None,
                 step_mw: float | None) -> None:
        self.case, self.hz, self.time_limit, self.step_mw = case, hz, time_limit, step_mw
        self.pool: ThreadPoolExecutor | None = None
        self.running: tuple | None = None  # (info, instance, future, stopper)

    def start(self, info: ModelInfo, previous) -> None:
        """Begin the re-solve of the instance guessed from the previous candidate
        (lp, info, out) for the program of info (the pass about to be solved)."""
        from optreserve.solver.incremental import optimal_cost, price_steps

        self.stop()
        hz = self.hz
        fixed = hz.dP_var < 0 if hz.dP_var is not None else np.ones(len(hz.dP), bool)
        priced = np.nonzero((hz.dP > 0) & fixed)[0]
        if hz.co_opt or len(priced) == 0:
            return
        m = guess(info, previous, priced)
        dP = hz.dP.copy()
        dP[m] += price_steps(hz.dP, self.step_mw)[m]
        grown = replace(hz, dP=dP)
        stopper = _Stopper()
        if self.pool is None:
            self.pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="optreserve-ahead")
        base = replace(info, x_hat=np.array(info.x_hat, float, copy=True))
        guide = info.guide

        def job():
            if stopper.stopped:
                return float("nan"), None, 0.0, base.flows
            return optimal_cost(self.case, grown, base, None, self.time_limit, guide,
                                on_highs=stopper.attach)

        self.running = (info, m, self.pool.submit(job), stopper)

    def for_answer(self, info: ModelInfo) -> dict[int, Future]:
        """{instance: re-solve} begun for the program of info (the answer's), else {}."""
        if self.running is not None and self.running[0] is info:
            return {self.running[1]: self.running[2]}
        return {}

    def stop(self) -> None:
        """Stop the running re-solve (if any) and wait for its thread."""
        if self.running is not None:
            _, _, fut, stopper = self.running
            if not fut.done():
                stopper.stop()
            try:
                fut.result()
            except Exception:  # a stopped or failed guess is simply not used
                pass
            self.running = None

    def close(self) -> None:
        self.stop()
        if self.pool is not None:
            self.pool.shutdown(wait=True)
            self.pool = None

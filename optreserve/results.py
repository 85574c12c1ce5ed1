"""The result of a solve as pandas tables, and writing them (atomically) to an output folder."""

from __future__ import annotations

import json
import os
import shutil
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from . import __version__
from .errors import OptreserveError

CAUTION = ("Planning study only, not an operating instruction: the applicable grid code, the "
           "system operator and licensed engineers decide actual governor settings and reserve.")

# A settled point counts as binding within this distance of its limit.
BINDING_HZ = 1e-5
BINDING_MW = 1e-2


class OutputExistsError(OptreserveError):
    exit_code = 2


@dataclass
class Result:
    """Tables of one solve. allocation: one row per unit; events: one per event; links: one
    per (link, event). summary: what summary.json holds."""

    case: object
    status: str
    objective_per_h: float
    mip_gap: float | None
    allocation: pd.DataFrame
    events: pd.DataFrame
    links: pd.DataFrame
    solver: dict
    verification: dict
    timings_s: dict = field(default_factory=dict)
    iterations: int = 1
    relaxed: bool = False
    change_penalty_total: float = 0.0

    # ------------------------------------------------------------------ construction
    @classmethod
    def build(cls, case, info, lp, out, gain, r_up, r_dn, points, relax, verification):
        f_n = case.nominal_frequency_hz
        F = case.limits.max_settled_deviation_hz
        u = case.units
        droop = case.droop_from_gain(gain)
        if info.steps_gain is not None and not relax:
            z = lp.value(out.x, "z")
            chosen = z > 0.5
            droop = np.full(len(u), np.nan)
            droop[info.steps_unit[chosen]] = info.steps_pct[chosen]
        cost = (u["price_up_per_mw_h"].to_numpy(float) * r_up
                + u["price_down_per_mw_h"].to_numpy(float) * r_dn)
        allocation = pd.DataFrame({
            "unit": u["unit"].to_numpy(object),
            "area": u["area"].to_numpy(object),
            "provides": gain > 0,
            "droop_pct": droop,
            "gain_mw_per_hz": gain,
            "headroom_up_mw": r_up,
            "headroom_down_mw": r_dn,
            "cost_per_h": cost,
        })
        ev = case.events
        dev = np.array([p.deviation_hz for p in points])
        events = pd.DataFrame({
            "event": ev["event"].to_numpy(object),
            "kind": ev["kind"].to_numpy(object),
            "area": ev["area"].to_numpy(object),
            "size_mw": ev["size_mw"].to_numpy(float),
            "settled_frequency_hz": f_n + dev,
            "settled_deviation_hz": dev,
            "limit_hz": np.full(len(ev), F),
            "binding": F - np.abs(dev) <= BINDING_HZ,
            "marginal_cost_per_mw_h": np.full(len(ev), np.nan),
        })
        lk = case.links
        rows = []
        for p in points:
            for k in range(len(lk)):
                lim = float(lk["limit_mw"].iloc[k])
                after = float(p.flow_after_mw[k])
                rows.append((lk["link"].iloc[k], p.event, float(lk["flow_mw"].iloc[k]), after,
                             lim, abs(after) / lim * 100.0))
        links = pd.DataFrame(rows, columns=["link", "event", "flow_before_mw", "flow_after_mw",
                                            "limit_mw", "loading_pct"])
        pen = 0.0
        if "changed" in lp.var_blocks:
            pen = float(case.droop.change_penalty_per_unit * np.round(lp.value(out.x, "changed"))
                        .sum())
        status = out.status if not relax else f"{out.status}_relaxed"
        return cls(case=case, status=status, objective_per_h=float(cost.sum() + pen),
                   mip_gap=out.mip_gap, allocation=allocation, events=events, links=links,
                   solver={"name": "HiGHS", "version": out.solver_version,
                           "interface": out.engine},
                   verification=verification, relaxed=relax, change_penalty_total=pen)

    def set_event_prices(self, price_per_mw_h) -> None:
        self.events["marginal_cost_per_mw_h"] = np.asarray(price_per_mw_h, float)

    # ------------------------------------------------------------------ views
    @property
    def binding_links(self) -> pd.DataFrame:
        lk = self.links
        return lk[lk["limit_mw"] - lk["flow_after_mw"].abs() <= BINDING_MW]

    @property
    def summary(self) -> dict:
        case = self.case
        ev = self.events
        return {
            "case": case.name,
            "status": self.status,
            "objective_per_h": _num(self.objective_per_h),
            "objective_total": None,
            "headroom_cost_per_h": _num(float(self.allocation["cost_per_h"].sum())),
            "change_penalty": _num(self.change_penalty_total),
            "mip_gap": _num(self.mip_gap),
            "solver": dict(self.solver),
            "solver_name": self.solver.get("name"),
            "solver_version": self.solver.get("version"),
            "optreserve_version": __version__,
            "units_providing": int(self.allocation["provides"].sum()),
            "headroom_up_mw": _num(float(self.allocation["headroom_up_mw"].sum())),
            "headroom_down_mw": _num(float(self.allocation["headroom_down_mw"].sum())),
            "binding_events": [str(e) for e in ev.loc[ev["binding"], "event"]],
            "binding_links": sorted({f"{r.link}@{r.event}" for r in
                                     self.binding_links.itertuples()}),
            "verification": {k: _num(v) for k, v in self.verification.items()},
            "dead_band_iterations": self.iterations,
            "timings_s": {k: round(float(v), 4) for k, v in self.timings_s.items()},
            "caution": CAUTION,
        }

    # ------------------------------------------------------------------ writing
    def write(self, out_dir: str | Path, force: bool = False) -> Path:
        """Write allocation.csv, events.csv, links.csv and summary.json. Files appear all at
        once (written to a temporary folder, then moved); a non-empty folder is only written
        into with force=True, and even then nothing but these files is touched."""
        t0 = time.perf_counter()
        out = Path(out_dir)
        if out.exists() and not out.is_dir():
            raise OutputExistsError(f"{out}: exists and is not a folder")
        if out.is_dir() and any(out.iterdir()) and not force:
            raise OutputExistsError(f"{out}: folder is not empty; choose another --out or add "
                                    "--force to replace optreserve's files in it")
        out.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.", dir=out.parent))
        try:
            write_table(self.allocation, tmp / "allocation.csv")
            write_table(self.events, tmp / "events.csv")
            write_table(self.links, tmp / "links.csv")
            self.timings_s["write"] = time.perf_counter() - t0
            self.timings_s["total"] = self.timings_s.get("total", 0.0) + self.timings_s["write"]
            (tmp / "summary.json").write_text(json.dumps(self.summary, indent=2) + "\n")
            _move_into(tmp, out)
        finally:
            shutil.rmtree(tmp, ignore_errors=True)
        return out


def _num(v):
    if v is None:
        return None
    v = float(v)
    return None if not np.isfinite(v) else v


def write_table(df: pd.DataFrame, path: Path) -> None:
    """Stable CSV: fixed column order, 6 decimals, no negative zero, true/false booleans."""
    df = df.copy()
    for c in df.columns:
        if df[c].dtype == bool:
            df[c] = np.where(df[c], "true", "false")
        elif pd.api.types.is_float_dtype(df[c]):
            v = np.round(df[c].to_numpy(float), 6) + 0.0
            df[c] = v
    df.to_csv(path, index=False, float_format="%.6f", lineterminator="\n")


def _move_into(tmp: Path, out: Path) -> None:
    if not out.exists():
        os.replace(tmp, out)
        return
    if not any(out.iterdir()):
        out.rmdir()
        os.replace(tmp, out)
        return
    for f in sorted(tmp.iterdir()):
        os.replace(f, out / f.name)

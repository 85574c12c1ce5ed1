"""The result of a solve as pandas tables, and writing them (atomically) to an output folder."""

from __future__ import annotations

import csv
import json
import re
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from optreserve import __version__
from optreserve.output.cells import float_text, needs_text, safe_header, spreadsheet_safe
from optreserve.output.staging import staged_output

CAUTION = ("Planning study only, not an operating instruction: the applicable grid code, the "
           "system operator and licensed engineers decide actual governor settings and reserve.")


# A settled point counts as binding within this distance of its limit.
BINDING_HZ = 1e-5


BINDING_MW = 1e-2


@dataclass
class Result:
    """Tables of one solve. allocation: one row per unit; events: one per event; links: one
    per (link, event). summary: what summary.json holds."""

    case: object
    status: str
    objective_per_h: float | None
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
    objective_total: float | None = None
    energy_cost: float | None = None  # co-optimisation only (over the horizon, or per hour)
    reserve_cost: float | None = None
    solver_warnings: list = field(default_factory=list)
    nadir_check: dict = field(default_factory=dict)  # simulated nadir check of the solve
    # per area (and period): reserve_price_per_mw_h, next_mw_up_cost_per_mw_h (solve.area_prices)
    prices: pd.DataFrame | None = None
    # further files written with the result: name -> DataFrame (CSV) or dict (JSON)
    extra_files: dict = field(default_factory=dict)

    # ------------------------------------------------------------------ construction
    @classmethod
    def build(cls, case, info, lp, out, gain, r_up, r_dn, points, relax, verification):
        """Tables from per-period arrays (T, N) and the independent settled points."""
        hz = info.hz
        T, N = gain.shape
        horizon = case.is_horizon
        labels = list(case.periods) if horizon else [None]
        u = case.units
        K_b = lp.value(out.x, "K").reshape(hz.n_blocks, N)
        droop_b = np.where(K_b > 1e-9, case.droop_from_gain(np.where(K_b > 1e-9, K_b, 1.0)),
                           np.nan)
        if info.steps_gain is not None and not relax:
            chosen = lp.value(out.x, "z") > 0.5
            droop_b = np.full((hz.n_blocks, N), np.nan)
            droop_b[info.steps_block[chosen], info.steps_unit[chosen]] = info.steps_pct[chosen]
        droop = droop_b[hz.block]  # (T, N)
        cost = hz.price_up * r_up + hz.price_dn * r_dn  # per hour, (T, N)
        reserve_cost = float((cost * hz.hours[:, None]).sum())
        energy = None
        if hz.co_opt:  # co-optimised: each unit's cost also carries its energy
            energy = np.where(hz.disp[None, :], hz.e_price * hz.out, 0.0)
            cost = cost + energy
        alloc = {
            "unit": np.tile(u["unit"].to_numpy(object), T),
            "area": np.tile(u["area"].to_numpy(object), T),
        }
        if horizon:
            alloc["period"] = np.repeat(np.array(labels, dtype=object), N)
        alloc.update({
            "provides": (gain > 0).reshape(-1),
            "droop_pct": droop.reshape(-1),
            "gain_mw_per_hz": gain.reshape(-1),
            "headroom_up_mw": r_up.reshape(-1),
            "headroom_down_mw": r_dn.reshape(-1),
            "cost_per_h": cost.reshape(-1),
        })
        if hz.co_opt:
            alloc["output_mw"] = hz.out.reshape(-1)
        allocation = pd.DataFrame(alloc)
        M = len(hz.dP)
        ev = case.events
        e_idx = hz.inst_event
        dev = points.deviation_hz
        per = np.array(labels, dtype=object)[hz.inst_t]
        events = pd.DataFrame({"event": np.array(hz.inst_name, dtype=object)})
        if horizon:
            events["period"] = per
        events["kind"] = ev["kind"].to_numpy(object)[e_idx]
        events["area"] = ev["area"].to_numpy(object)[e_idx]
        events["size_mw"] = hz.sigma * hz.dP
        events["settled_frequency_hz"] = case.nominal_frequency_hz + dev
        events["settled_deviation_hz"] = dev
        # the bound the allocation is held to (full_activation_deviation_hz when that is tighter)
        events["limit_hz"] = np.full(M, info.F_model)
        events["binding"] = (info.F_model - np.abs(dev)) <= BINDING_HZ
        events["marginal_cost_per_mw_h"] = np.full(M, np.nan)
        L = hz.F0.shape[1]
        links = pd.DataFrame({
            "link": np.tile(case.links["link"].to_numpy(object), M),
            "event": np.repeat(events["event"].to_numpy(object), L)})
        if horizon:
            links["period"] = np.repeat(per, L)
        flows = points.flow_after_mw.reshape(-1)
        lim = hz.Fmax[hz.inst_t].reshape(-1)
        links["flow_before_mw"] = hz.F0[hz.inst_t].reshape(-1)
        links["flow_after_mw"] = flows
        links["limit_mw"] = lim
        links["loading_pct"] = np.abs(flows) / lim * 100.0
        pen = 0.0
        if "changed" in lp.var_blocks:
            pen = float(case.droop.change_penalty_per_unit
                        * np.round(lp.value(out.x, "changed")).sum())
        total = float((cost * hz.hours[:, None]).sum())  # the contract's objective: headroom
        status = out.status if not relax else f"{out.status}_relaxed"
        res = cls(case=case, status=status,
                  objective_per_h=None if horizon else total,
                  mip_gap=out.mip_gap, allocation=allocation, events=events, links=links,
                  solver={"name": "HiGHS", "version": out.solver_version,
                          "interface": out.engine},
                  verification=verification, relaxed=relax, change_penalty_total=pen)
        res.objective_total = total if horizon else None
        if hz.co_opt:
            res.energy_cost = float((energy * hz.hours[:, None]).sum())
            res.reserve_cost = reserve_cost
        return res

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
            "objective_total": _num(self.objective_total),
            "periods": self.case.n_periods,
            "horizon_hours": _num(float(self.case.hours().sum())),
            "change_penalty": _num(self.change_penalty_total),
            "energy_cost": _num(self.energy_cost),
            "reserve_cost": _num(self.reserve_cost),
            "objective_with_penalty": _num((self.objective_total if self.objective_total
                                            is not None else self.objective_per_h)
                                           + self.change_penalty_total),
            "mip_gap": _num(self.mip_gap),
            "solver": dict(self.solver),
            "solver_name": self.solver.get("name"),
            "solver_version": self.solver.get("version"),
            "optreserve_version": __version__,
            "units_providing": int(self.allocation.loc[self.allocation["provides"], "unit"]
                                   .nunique()),
            "headroom_up_mw": _num(self._peak("headroom_up_mw")),
            "headroom_down_mw": _num(self._peak("headroom_down_mw")),
            "binding_events": sorted({str(e) for e in ev.loc[ev["binding"], "event"]}),
            "binding_links": sorted({f"{r.link}@{r.event}" for r in
                                     self.binding_links.itertuples()}),
            "binding_event_instances": int(ev["binding"].sum()),
            "verification": {k: _num(v) for k, v in self.verification.items()},
            "dead_band_iterations": self.iterations,
            "warnings": list(case.warnings),  # the case's own (reader) warnings
            "solver_warnings": list(self.solver_warnings),
            "nadir_check": {k: _num(v) if isinstance(v, float) else v
                            for k, v in self.nadir_check.items()},
            "timings_s": {k: round(float(v), 4) for k, v in self.timings_s.items()},
            "caution": CAUTION,
        }

    def _peak(self, col: str) -> float:
        """Total over units; for a horizon the largest period total."""
        a = self.allocation
        if "period" in a.columns:
            return float(a.groupby("period", sort=False)[col].sum().max())
        return float(a[col].sum())

    def schedule_wide(self) -> pd.DataFrame:
        """Units x periods headroom (rows: unit and direction) for spreadsheet users."""
        a = self.allocation
        units = self.case.units["unit"].to_numpy(object)
        N = len(units)
        labels = [str(p) for p in self.case.periods] if self.case.is_horizon else ["snapshot"]
        parts = []
        for direction, col in (("up", "headroom_up_mw"), ("down", "headroom_down_mw")):
            m = a[col].to_numpy(float).reshape(len(labels), N).T  # rows are period-major
            w = pd.DataFrame(m, columns=labels)
            w.insert(0, "direction", direction)
            w.insert(0, "unit", units)
            parts.append(w)
        return pd.concat(parts, ignore_index=True)

    # ------------------------------------------------------------------ writing
    def write(self, out_dir: str | Path, force: bool = False) -> Path:
        """Write allocation.csv, events.csv, links.csv and summary.json. Files appear all at
        once (written to a temporary folder, then moved); a non-empty folder is only written
        into with force=True, and even then nothing but these files is touched."""
        t0 = time.perf_counter()
        out = Path(out_dir)
        with staged_output(out, force) as tmp:
            write_table(self.allocation, tmp / "allocation.csv")
            write_table(self.events, tmp / "events.csv")
            write_table(self.links, tmp / "links.csv")
            if self.prices is not None:
                write_table(self.prices, tmp / "prices.csv")
            for name, obj in self.extra_files.items():
                if isinstance(obj, pd.DataFrame):
                    write_table(obj, tmp / name)
                else:
                    (tmp / name).write_text(json.dumps(obj, indent=2) + "\n")
            if self.case.is_horizon:
                write_table(self.schedule_wide(), tmp / "schedule_wide.csv")
            self.timings_s["write"] = time.perf_counter() - t0
            self.timings_s["total"] = self.timings_s.get("total", 0.0) + self.timings_s["write"]
            (tmp / "summary.json").write_text(json.dumps(self.summary, indent=2) + "\n")
        return out


def _num(v):
    if v is None:
        return None
    v = float(v)
    return None if not np.isfinite(v) else v


# Cells formatted and written at a time: the formatted cells of a year of quarter-hours (10
# million rows, or the 35 040 columns of its wide schedule) would take gigabytes at once; in
# slices of whole rows the peak stays that of a slice.
WRITE_CELLS = 2_000_000


def write_table(df: pd.DataFrame, path: Path, exact=()) -> None:
    """Stable CSV: fixed column order, 6 decimals, no negative zero, true/false booleans,
    empty cells for missing values; cells written so they read back the same and text no
    spreadsheet evaluates (output/cells.py; `exact`: columns echoing an input, every
    significant digit kept). Each slice of whole rows (WRITE_CELLS cells) is formatted by one
    string-formatting call (pandas' float formatting is the slow part of writing a day of
    results); whether anything needs quoting is decided for the whole table first, so the
    file is the same whatever the slices."""
    header = safe_header([str(c) for c in df.columns])
    special = re.compile(r'[,"\r\n]')
    # a cell's text depends on its value alone: the distinct values of each text column
    plain = not special.search("\x1f".join(header)) and not any(
        special.search("\x1f".join(_cells(pd.Series(df[c].unique(), dtype=df[c].dtype),
                                         c in exact)))
        for c in df.columns if not _numeric_column(df[c]))
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = None if plain else csv.writer(fh, lineterminator="\n")
        if plain:
            fh.write(",".join(header) + "\n")
        else:
            w.writerow(header)
        step = max(1, WRITE_CELLS // max(1, df.shape[1]))
        for a in range(0, len(df), step):
            grid, specs = _format_rows(df.iloc[a:a + step], exact)
            if plain:  # nothing to quote: one formatting pass over the slice
                fh.write(((",".join(specs) + "\n") * len(grid)) % tuple(grid.ravel().tolist()))
            else:
                for row in grid.tolist():
                    w.writerow([x if isinstance(x, str) else f"{x:.6f}" for x in row])


def _numeric_column(col: pd.Series) -> bool:
    return col.to_numpy().dtype == bool or pd.api.types.is_float_dtype(col)


def _cells(col: pd.Series, exact: bool) -> np.ndarray:
    """The written text of a text column (missing values empty, spreadsheet-safe)."""
    v = col.to_numpy()
    missing = col.isna().to_numpy()
    cells = col.astype(str).to_numpy(dtype=object)
    if missing.any():
        cells[missing] = ""
    if v.dtype == object:  # text (not numbers) that a spreadsheet would evaluate
        is_text = np.array([isinstance(x, str) for x in v], dtype=bool)
        cells = np.where(is_text, spreadsheet_safe(cells), cells)
    return cells


def _format_rows(df: pd.DataFrame, exact=()) -> tuple[np.ndarray, list[str]]:
    """The cells of df's rows (object grid) and each column's format spec."""
    n = len(df)
    grid = np.empty((n, df.shape[1]), dtype=object)
    specs = []
    for k, c in enumerate(df.columns):
        col = df[c]
        v = col.to_numpy()
        if v.dtype == bool:
            grid[:, k] = np.where(v, "true", "false")
            specs.append("%s")
        elif pd.api.types.is_float_dtype(col):
            vf = v.astype(float)
            full = needs_text(vf, c in exact)  # 1e308 is not inf; 1e-07 is not 0.000000
            with np.errstate(over="ignore", invalid="ignore"):
                r = np.where(full, 0.0, np.round(vf, 6)) + 0.0  # + 0.0: -0.0 becomes 0.0
            nan = np.isnan(r)
            if nan.any() or full.any():  # formatted here: missing values become empty cells
                cells = np.array((("%.6f\n" * n) % tuple(r.tolist())).split("\n")[:-1],
                                 dtype=object)
                cells[nan] = ""
                cells[full] = [float_text(x) for x in vf[full]]
                grid[:, k] = cells
                specs.append("%s")
            else:
                grid[:, k] = r
                specs.append("%.6f")
        else:
            grid[:, k] = _cells(col, c in exact)
            specs.append("%s")
    return grid, specs

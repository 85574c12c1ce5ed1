"""Time-domain check of an allocation: what frequency and tie flows do in the first minute
after each listed disturbance, not only where they settle (orchestration, summaries,
writing).

Model (docs/formulation.md, "Time-domain simulation"), per period of a case: one swing
equation per area and synchronising ties (system.py), each responding unit's governor model
(governors.py: lag, reheat, hydro, inverter), its droop demand
±min(K_i (|Δf_a| − d_i)^+, limit) with the limit the headroom held or the unit's physical room
(`[dynamics] response_limit`), a direction the unit does not provide in blocked. integrate.py
steps all events of a period together with exact discretisations at a fixed step.
Independent of model/: the optimiser's assumptions are what this module checks. settle.py
gives the steady-state point reported next to the simulated end of run.

Results are planning studies, not operating instructions.
"""

from __future__ import annotations

import json
import math
import re
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from optreserve.case.data import Case
from optreserve.case.problems import _Collector
from optreserve.dynamics.events import (  # noqa: F401
    DURATION_S,
    FLAT_HZ,
    FLAT_MW,
    FLAT_WINDOW_S,
    MAX_AUTO_DURATION_S,
    METHODS,
    ROCOF_WINDOW_S,
    Trajectory,
    output_times,
    simulate_event,
    simulate_events,
)
from optreserve.dynamics.governors import MODELS
from optreserve.dynamics.system import (
    BASE_MVA,
    DEFAULT_ACTIVATION_TIME_S,
    INTER_AREA_DAMPING_RATIO,
    System,
    build_system,
)
from optreserve.errors import CaseError, OptreserveError, Problem
from optreserve.output.folder import allocation_problems, read_allocation  # noqa: F401
from optreserve.output.plot_style import plot_or_warn
from optreserve.output.results import CAUTION, write_table
from optreserve.output.staging import staged_output
from optreserve.verify.settle import settle_instances

# Warn when the end of run and the steady-state calculation differ by more than this.
AGREE_HZ = 1.0e-3
AGREE_MW = 1.0
# Numerical allowance on limit checks.
LIMIT_TOL_HZ = 1.0e-5
LIMIT_TOL_PCT = 1.0e-6

ALLOCATION_FILE = "allocation.csv"
SUMMARY_FILE = "simulation_summary.csv"
LINKS_FILE = "simulation_links.csv"
SETTINGS_FILE = "simulation.json"


class SimulationError(OptreserveError):
    """The integrator failed (exit code 1)."""

    exit_code = 1


# ------------------------------------------------------------------ allocation input
# Reading and checking an allocation is the result-folder reader's job (output/folder.py);
# read_allocation stays importable from here.
def _check_allocation(case: Case, df: pd.DataFrame, file: str, col: _Collector) -> None:
    """Cross-check an allocation table against the case (collects problems, raises nothing)."""
    for p in allocation_problems(case, df, file):
        col.error(p.file, p.message, p.row, p.column)


def allocation_arrays(case: Case, allocation: pd.DataFrame, t: int):
    """Per unit (case order) gain, up and down headroom of period t of a checked allocation."""
    df = allocation
    if case.is_horizon:
        df = df[df["period"].astype(str) == str(case.periods[t])]
    df = df.set_index("unit").loc[list(case.units["unit"])]
    return (df["gain_mw_per_hz"].to_numpy(float), df["headroom_up_mw"].to_numpy(float),
            df["headroom_down_mw"].to_numpy(float))




# ------------------------------------------------------------------ a whole case
@dataclass
class Simulation:
    """Simulated events of one period: summary (one row per event), links (one row per event
    and link: transient loading), series (one DataFrame per event: time_s,
    frequency_hz:<area>, flow_mw:<link>, response_mw:<unit>)."""

    case: Case
    period: str | None
    summary: pd.DataFrame
    series: dict
    link_limit_mw: dict = field(default_factory=dict)
    warnings: list = field(default_factory=list)
    settings: dict = field(default_factory=dict)
    timings_s: dict = field(default_factory=dict)
    links: pd.DataFrame | None = None

    def write(self, out_dir: str | Path, force: bool = False, plots: bool = True) -> Path:
        """simulation_summary.csv, simulation_links.csv (cases with links), series_<event>.csv,
        plot_<event>.png, simulation.json, written to a temporary folder and then moved in; a
        non-empty folder only with force (and then only these files are replaced)."""
        from optreserve.dynamics.plots import plot_event

        t0 = time.perf_counter()
        out = Path(out_dir)
        with staged_output(out, force, group="simulation") as tmp:
            for frame, name in ((self.summary, SUMMARY_FILE), (self.links, LINKS_FILE)):
                if frame is None or (name == LINKS_FILE and not len(frame)):
                    continue
                write_table(frame, tmp / name)  # header first; the caution is in the JSON
            names = file_names(list(self.series))
            for ev, stem in names.items():
                write_table(self.series[ev], tmp / f"series_{stem}.csv")
                if plots:  # a failing plot is a warning; the tables are still written
                    png = tmp / f"plot_{stem}.png"
                    plot_or_warn(lambda ev=ev, png=png: plot_event(self, ev, png), png,
                                 self.warnings)
            self.timings_s["write"] = time.perf_counter() - t0
            doc = {"case": self.case.name, "period": self.period, "settings": self.settings,
                   "files": {ev: {"series": f"series_{s}.csv",
                                  "plot": f"plot_{s}.png" if (tmp / f"plot_{s}.png")
                                  .exists() else None}
                             for ev, s in names.items()},
                   "warnings": list(self.warnings),
                   "timings_s": {k: round(float(v), 4) for k, v in self.timings_s.items()},
                   "caution": CAUTION}
            (tmp / SETTINGS_FILE).write_text(json.dumps(doc, indent=2) + "\n")
        return out

    def overloaded_links(self) -> list[str]:
        """One line per event and link whose transient loading passed its limit."""
        if self.links is None or not len(self.links):
            return []
        bad = self.links[~self.links["link_ok"]]
        return [f"event {r.event}: link {r.link} reaches {r.max_loading_pct:.0f} % of its "
                f"{r.limit_mw:g} MW limit at {r.at_time_s:.1f} s during the swing "
                "(simulation_links.csv)"
                for r in bad.itertuples()]


def file_names(events: list[str]) -> dict:
    """A file-name-safe stem per event, unique even when sanitising makes two alike."""
    out, used = {}, set()
    for ev in events:
        stem = re.sub(r"[^A-Za-z0-9._-]", "_", str(ev))[:80] or "event"
        base, k = stem, 2
        while stem.lower() in used:
            stem, k = f"{base}_{k}", k + 1
        used.add(stem.lower())
        out[ev] = stem
    return out


def simulate(case: Case, allocation: pd.DataFrame, events: list[str] | None = None,
             period: str | None = None, duration_s: float | None = None,
             base_mva: float = BASE_MVA, method: str = "auto",
             damping_ratio: float = INTER_AREA_DAMPING_RATIO) -> Simulation:
    """Simulate the listed events (default: all of the period) of one period of a case under
    an allocation (result.allocation, or read_allocation(...)).

    duration_s: None runs DURATION_S and doubles the run until it ends flat (at most
    MAX_AUTO_DURATION_S); a number runs exactly that long and only warns when the end is not
    flat. Raises CaseError for an allocation that does not fit the case, an unknown event or
    period."""
    t_start = time.perf_counter()
    if duration_s is not None and not duration_s > ROCOF_WINDOW_S:
        raise ValueError(f"duration must exceed {ROCOF_WINDOW_S} s")
    if method not in METHODS:
        raise ValueError(f"method must be one of {', '.join(METHODS)}")
    file = allocation.attrs.get("file", ALLOCATION_FILE)
    col = _Collector()
    _check_allocation(case, allocation, file, col)
    col.raise_if_any()
    warnings = list(allocation.attrs.get("warnings", []))
    t, label = _period_index(case, period)
    gain, r_up, r_dn = allocation_arrays(case, allocation, t)
    _warn_room(case, t, gain, r_up, r_dn, warnings)
    sysm = build_system(case, gain, r_up, r_dn, t, base_mva, warnings)

    inst = case.instances()
    inst = inst[inst["t"] == t]
    ev = case.events
    names = ev["event"].astype(str).to_numpy(object)
    if events is not None:
        where = str(case.path / "events.csv") if case.path else "events.csv"
        known = set(names[inst["event_index"]])
        bad = [e for e in events if e not in known]
        if bad:
            also = " in this period" if case.is_horizon and bad[0] in set(names) else ""
            raise CaseError([Problem(where, f"no event named '{bad[0]}'{also} (--event)", None,
                                     "event")])
        order = {e: k for k, e in enumerate(events)}
        inst = inst[pd.Series(names[inst["event_index"]], index=inst.index).isin(order)]
    upos = {x: k for k, x in enumerate(case.units["unit"])}
    apos = {a: k for k, a in enumerate(case.areas["area"])}
    e_idx = inst["event_index"].to_numpy()
    size = inst["size_mw"].to_numpy(float)
    kinds = ev["kind"].to_numpy(object)[e_idx]
    area = np.array([apos[a] for a in ev["area"].to_numpy(object)[e_idx]], dtype=np.int64)
    trip = np.array([upos.get(x, -1) if k == "unit_trip" else -1
                     for k, x in zip(kinds, ev["unit"].to_numpy(object)[e_idx])], dtype=np.int64)
    steady = _steady_points(sysm, size, area, trip)

    lim = case.limits
    t0 = time.perf_counter()
    trs = simulate_events(sysm, size, area, trip, duration_s, damping_ratio) if len(size) else []
    t_sim = time.perf_counter() - t0
    rows, link_rows, series = [], [], {}
    for m, (e, tr) in enumerate(zip(e_idx, trs)):
        name = str(names[e])
        series[name] = _series_frame(sysm, tr)
        sigma = 1.0 if size[m] >= 0 else -1.0
        end_dev = tr.end_frequency_hz - sysm.f_n
        settled = sysm.f_n + end_dev[int(np.argmax(np.abs(end_dev)))]
        ss_f = sysm.f_n + steady.deviation_hz[m]
        gap_f = float(np.max(np.abs(tr.end_frequency_hz - ss_f)))
        gap_p = float(np.max(np.abs(tr.end_flow_mw - steady.flow_after_mw[m]), initial=0.0))
        if not tr.flat:
            warnings.append(f"event {name}: still moving over the last seconds of the "
                            f"{tr.duration_s:g} s run; run longer (--duration) for the settled "
                            "frequency")
        elif gap_f > AGREE_HZ or gap_p > AGREE_MW:
            warnings.append(f"event {name}: end of run differs from the steady-state point by "
                            f"{gap_f * 1000:.2f} mHz and {gap_p:.2f} MW")
        ramp = _ramp_rate(case, sysm, trip[m], sigma)
        with np.errstate(divide="ignore", invalid="ignore"):
            ramp_nadir = (sysm.f_n * size[m] ** 2 / (4.0 * tr.inertia_mw_s * ramp)
                          if ramp > 0 else math.inf)
        loading = tr.max_abs_flow_mw / sysm.transient_limit * 100.0
        worst = int(np.argmax(loading)) if len(loading) else None
        for j, x in enumerate(sysm.link_ids):
            link_rows.append({"event": name, "period": label, "link": x,
                              "limit_mw": sysm.transient_limit[j],
                              "max_flow_mw": tr.max_abs_flow_mw[j],
                              "max_loading_pct": loading[j], "at_time_s": tr.max_flow_time_s[j],
                              "link_ok": bool(loading[j] <= 100.0 + LIMIT_TOL_PCT)})
        rows.append({
            "event": name, "period": label, "kind": str(kinds[m]),
            "area": sysm.area_ids[area[m]], "size_mw": size[m],
            "nadir_hz": tr.nadir_hz, "nadir_time_s": tr.nadir_time_s,
            "nadir_area": sysm.area_ids[tr.nadir_area],
            "rocof_hz_per_s": tr.rocof_hz_per_s, "rocof_area": sysm.area_ids[tr.rocof_area],
            "rocof_estimate_hz_per_s": abs(size[m]) * sysm.f_n / (2.0 * tr.inertia_mw_s),
            "nadir_ramp_estimate_hz": sysm.f_n - sigma * ramp_nadir,
            "settled_frequency_hz": settled, "steady_state_frequency_hz": ss_f,
            "duration_s": tr.duration_s, "flat_at_end": tr.flat,
            "max_link_loading_pct": float(loading[worst]) if worst is not None else math.nan,
            "max_loading_link": sysm.link_ids[worst] if worst is not None else "",
            "settled_ok": bool(abs(settled - sysm.f_n)
                               <= lim.max_settled_deviation_hz + LIMIT_TOL_HZ),
            "nadir_ok": (None if lim.max_nadir_deviation_hz is None else bool(
                abs(tr.nadir_hz - sysm.f_n) <= lim.max_nadir_deviation_hz + LIMIT_TOL_HZ)),
            "rocof_ok": (None if lim.max_rocof_hz_per_s is None else bool(
                tr.rocof_hz_per_s <= lim.max_rocof_hz_per_s + LIMIT_TOL_HZ)),
            "link_ok": (bool(loading[worst] <= 100.0 + LIMIT_TOL_PCT) if worst is not None
                        else None),
        })
    summary = pd.DataFrame(rows, columns=list(rows[0]) if rows else ["event"])
    links = pd.DataFrame(link_rows, columns=["event", "period", "link", "limit_mw",
                                             "max_flow_mw", "max_loading_pct", "at_time_s",
                                             "link_ok"])
    if not case.is_horizon:
        summary = summary.drop(columns="period")
        links = links.drop(columns="period")
    kinds_used = {m: int((sysm.gov.kind[sysm.gain > 0] == k).sum())
                  for k, m in enumerate(MODELS)}
    settings = {"duration_s": "automatic" if duration_s is None else float(duration_s),
                "method": "exact discretisation, fixed step", "base_mva": base_mva,
                "inter_area_damping_ratio": damping_ratio,
                "governor_models": {k: v for k, v in kinds_used.items() if v},
                "response_limit": sysm.response_limit,
                "default_activation_time_s": DEFAULT_ACTIVATION_TIME_S,
                "rocof_window_s": ROCOF_WINDOW_S, "flat_window_s": FLAT_WINDOW_S,
                "flat_hz": FLAT_HZ, "flat_mw": FLAT_MW}
    return Simulation(case, label, summary, series, dict(zip(sysm.link_ids, sysm.limit)),
                      warnings, settings,
                      {"simulate": t_sim, "total": time.perf_counter() - t_start}, links)


def _period_index(case: Case, period) -> tuple[int, str | None]:
    if not case.is_horizon:
        if period is not None:
            raise CaseError([Problem(str(case.path or "case"), "the case is a single snapshot: "
                                     "--period does not apply", None, "period")])
        return 0, None
    labels = [str(p) for p in case.periods]
    if period is None:
        if len(labels) == 1:
            return 0, labels[0]
        raise CaseError([Problem(str(case.path or "case"), f"the case has {len(labels)} "
                                 "periods: choose one with --period", None, "period")])
    if str(period) not in labels:
        raise CaseError([Problem(str(case.path or "case"), f"'{period}' is not a period of the "
                                 "case", None, "period")])
    return labels.index(str(period)), str(period)


def _warn_room(case: Case, t, gain, r_up, r_dn, warnings) -> None:
    """Headroom beyond a unit's physical room, or gain on a unit that may not provide, is
    simulated as given, but the planner should know."""
    um = case.unit_matrix
    out = um("output_mw")[t].astype(float)
    cap = case.units["capacity_mw"].to_numpy(float)
    mn = um("min_output_mw")[t].astype(float)
    over = (r_up > cap - out + 1e-6) | (r_dn > out - mn + 1e-6)
    if over.any():
        warnings.append(f"{int(over.sum())} unit(s) hold more headroom than their output "
                        f"allows (first: {case.units['unit'].iloc[int(np.argmax(over))]})")
    bad = (gain > 0) & ~um("provides")[t].astype(bool)
    if bad.any():
        warnings.append(f"{int(bad.sum())} unit(s) respond although provides = false in the "
                        f"case (first: {case.units['unit'].iloc[int(np.argmax(bad))]})")


def _steady_points(sysm: System, size, area, trip):
    """The independent settled point (settle.py) of each simulated event, with the response
    limits the simulation uses."""
    M = len(size)
    L = len(sysm.link_ids)
    return settle_instances(
        np.abs(size), np.where(size < 0, -1.0, 1.0), np.zeros(M, np.int64), area, trip,
        sysm.gain[None, :], sysm.lim_up[None, :], sysm.lim_dn[None, :], sysm.deadband_hz,
        sysm.unit_area, sysm.damping[None, :], sysm.flow0.reshape(1, L),
        np.nonzero(sysm.incidence > 0)[1], np.nonzero(sysm.incidence < 0)[1],
        sysm.reactance.reshape(1, L))


def _ramp_rate(case: Case, sysm: System, trip: int, sigma: float) -> float:
    """Aggregate ramp the version 1 nadir estimate credits: sum of headroom / activation time
    over responding units that have an activation time (the tripped unit excluded)."""
    t_act = case.units["activation_time_s"].to_numpy(float)
    ok = (sysm.gain > 0) & np.isfinite(t_act) & (t_act > 0)
    if trip >= 0:
        ok[trip] = False
    r = sysm.r_up if sigma > 0 else sysm.r_dn
    return float((r[ok] / t_act[ok]).sum())


def _series_frame(sysm: System, tr: Trajectory) -> pd.DataFrame:
    cols = {"time_s": tr.time_s}
    cols.update({f"frequency_hz:{a}": tr.frequency_hz[:, k] for k, a in enumerate(sysm.area_ids)})
    cols.update({f"flow_mw:{x}": tr.flow_mw[:, k] for k, x in enumerate(sysm.link_ids)})
    cols.update({f"response_mw:{x}": tr.response_mw[:, k] for k, x in enumerate(sysm.unit_ids)})
    return pd.DataFrame(cols)

"""Synthetic but plausible day-ahead cases, the same for the same seed (benchmarks, tests).

Mixed technologies and sizes, a daily load shape, merit-order outputs per period, a meshed
area graph, discrete droop steps 2-5 % by 0.5 %. Pre-event link flows come from a DC load
flow of each period's area balance; link limits leave room for the largest events.

Event sizes grow with the system: besides the largest units' trips, the load steps are at
least a reference incident of REFERENCE_SHARE of the peak load, capped at REFERENCE_CAP_MW.
Figures: the Continental European reference incident is 3000 MW each direction (EU 2017/1485
Art. 153(2)(b)(i)) for a peak load of roughly 400-450 GW, about 0.7 %; the Nordic dimensioning
incident of about 1450 MW is some 2 % of a peak near 70 GW, Great Britain's 1320 MW (later
1800 MW) some 2.5-3 % of about 50 GW (these three from memory). 2 % up to the CE cap puts a
300-unit fleet (peak about 60 GW) between the Nordic and CE cases, and a 2000-unit fleet at the
CE figure. Load self-regulation is 1-2 % of load per Hz per area (CE planning assumption
1 %/Hz, from memory; textbooks 1-2 %), so at 0.2 Hz it covers 0.2-0.4 % of the load: well short
of either reference, so every size needs reserve from providers.
`days` > 1 repeats the daily shape with a season (winter peak) and lighter weekends;
`hold_periods` writes `[droop] hold_periods` (e.g. the periods of a day: droop per day);
`parquet` writes the time series as *_by_period.parquet (a year is ten million unit rows).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from optreserve.verify.settle import dc_flows

# technology: share of units, capacity range MW, energy cost (merit order), headroom price,
# droop band, dead band choices mHz, provides, inertia s, activation s
TECH = {
    "steam": (0.22, (150, 700), 40, (7, 14), (3.0, 6.0), (10, 15, 20), True, 6.0, 30),
    "ccgt": (0.20, (200, 450), 55, (9, 14), (2.0, 6.0), (0, 10), True, 5.0, 20),
    "hydro": (0.16, (40, 300), 10, (2, 5), (2.0, 8.0), (0, 5), True, 3.0, 15),
    "peaker": (0.16, (30, 150), 90, (15, 25), (2.0, 5.0), (0, 10), True, 2.0, 10),
    "battery": (0.10, (20, 200), 0, (1, 3), (2.0, 5.0), (0,), True, 0.0, 1),
    "nuclear": (0.04, (800, 1200), 5, (0, 0), (4.0, 5.0), (20,), False, 6.0, 30),
    "wind": (0.12, (50, 300), 1, (0, 0), (4.0, 5.0), (0,), False, 0.0, 1),
}
STEPS = [2.0, 2.5, 3.0, 3.5, 4.0, 4.5, 5.0]
REFERENCE_SHARE = 0.02  # reference incident as a share of the peak load (see module doc)
REFERENCE_CAP_MW = 3000.0  # CE reference incident, EU 2017/1485 Art. 153(2)(b)(i)


@dataclass(frozen=True)
class Spec:
    units: int = 300
    areas: int = 5
    links: int = 8
    periods: int = 96
    events: int = 10
    seed: int = 1
    days: int = 1  # the daily shape repeated (96 quarter-hours a day by default)
    hold_periods: int | None = None  # [droop] hold_periods; None: droop fixed over the horizon
    parquet: bool = False  # time series as Parquet instead of CSV


def day_scale(days: int) -> np.ndarray:
    """Per-day load factor relative to day one (a Monday in June): a winter peak of about
    +/-6 % over the year and weekends 6 % lighter (common practice for a load profile)."""
    d = np.arange(days)
    season = 1.0 + 0.06 * np.cos(2 * np.pi * (d + 152 - 15) / 365.0)
    weekend = np.where(d % 7 >= 5, 0.94, 1.0)
    f = season * weekend
    return f / f[0]


def daily_shape(T: int) -> np.ndarray:
    """Load in per unit of the daily peak: night trough, morning ramp, evening peak."""
    h = (np.arange(T) + 0.5) * 24.0 / T
    morning = np.exp(-0.5 * ((h - 9.0) / 2.5) ** 2)
    evening = np.exp(-0.5 * ((h - 19.0) / 2.0) ** 2)
    return 0.62 + 0.25 * morning + 0.38 * evening - 0.05 * np.cos(2 * np.pi * h / 24.0)


def _area_graph(rng, A: int, L: int) -> list[tuple[int, int]]:
    if L < A - 1:
        raise ValueError(f"{L} links cannot connect {A} areas (need at least {A - 1})")
    if L > A * (A - 1) // 2 * 2:
        raise ValueError(f"{L} links is too many for {A} areas")
    edges = []
    order = rng.permutation(A)
    for k in range(1, A):  # random spanning tree
        edges.append((int(order[rng.integers(0, k)]), int(order[k])))
    pairs = [(a, b) for a in range(A) for b in range(a + 1, A)]
    while len(edges) < L:  # mesh it; parallel circuits only once every pair is used
        a, b = pairs[rng.integers(0, len(pairs))]
        if (a, b) in edges or (b, a) in edges:
            if len({frozenset(e) for e in edges}) < len(pairs):
                continue
        edges.append((a, b))
    return edges


def generate(spec: Spec, out: str | Path) -> Path:
    """Write a case folder for the spec; identical files for an identical spec."""
    rng = np.random.default_rng(spec.seed)
    N, A, T_day = spec.units, spec.areas, spec.periods
    if min(N, A, T_day, spec.events, spec.days) < 1:
        raise ValueError("units, areas, periods, events and days must be at least 1")
    T = T_day * spec.days
    names = list(TECH)
    share = np.array([TECH[k][0] for k in names])
    tech = rng.choice(len(names), size=N, p=share / share.sum())
    tech[: min(N, 3)] = [names.index("steam"), names.index("ccgt"), names.index("hydro")][
        : min(N, 3)]
    area = rng.integers(0, A, size=N)
    area[: min(N, A)] = np.arange(min(N, A))  # every area has a unit
    cap = np.array([rng.uniform(*TECH[names[k]][1]) for k in tech]).round(0)
    kind = [names[k] for k in tech]
    # no single unit above 4 % of the fleet: the largest trip stays a credible, coverable event
    cap = np.minimum(cap, (max(50.0, 0.04 * cap.sum()) * rng.uniform(0.8, 1.0, N)).round(0))
    is_batt = np.array([k == "battery" for k in kind])
    is_wind = np.array([k == "wind" for k in kind])
    energy = np.array([TECH[k][2] for k in kind]) * rng.uniform(0.9, 1.1, N)
    price_up = np.array([rng.uniform(*TECH[k][3]) for k in kind]).round(2)
    price_dn = (price_up * rng.uniform(0.2, 0.4, N)).round(2)
    band = np.array([TECH[k][4] for k in kind])
    dead = np.array([rng.choice(TECH[k][5]) for k in kind], dtype=float)
    provides = np.array([TECH[k][6] for k in kind])
    inertia = np.array([TECH[k][7] for k in kind]) * rng.uniform(0.8, 1.2, N)
    act = np.array([TECH[k][8] for k in kind], dtype=float)
    min_out = np.where(is_batt, -cap, np.where(is_wind, 0.0, (0.3 * cap).round(0)))
    min_out = np.where(np.array([k == "hydro" for k in kind]), (0.1 * cap).round(0), min_out)

    # loads: each area a share of the system; peak at 78 % of dispatchable capacity
    firm = cap[~is_batt].sum()
    area_share = rng.dirichlet(np.full(A, 4.0))
    day_shape = daily_shape(T_day)
    shape = np.tile(day_shape, spec.days) * np.repeat(day_scale(spec.days), T_day)
    sys_load = 0.78 * firm * shape / day_shape.max()
    wind_cf = np.clip(0.35 + 0.15 * np.sin(2 * np.pi * (np.arange(T) / T_day + rng.uniform())) +
                      rng.normal(0, 0.03, T), 0.05, 0.9)
    if spec.days > 1:  # weather: windy and calm spells of a few days
        wind_cf = np.clip(wind_cf + np.repeat(rng.normal(0, 0.12, spec.days), T_day), 0.05, 0.9)
    incident = min(REFERENCE_CAP_MW, REFERENCE_SHARE * float(sys_load.max()))
    load = sys_load[:, None] * area_share[None, :]  # (T, A)

    # merit-order commitment each period: wind at its capacity factor and baseload at 90 %
    # run first; then units start in cost order until the committed capacity covers the
    # remaining load at 75 % loading, and every started unit runs at the same loading
    # (headroom both ways, like a real spinning-reserve margin)
    n_trip_units = max(1, spec.events - 2) if spec.events >= 3 else spec.events
    reserve_need = 1.5 * 0.9 * np.sort(np.where(is_batt | is_wind, 0.0, cap))[::-1][
        :n_trip_units].max(initial=0.0)
    reserve_need = max(reserve_need, 1.5 * incident)
    output = np.zeros((T, N))
    online = np.zeros((T, N), dtype=bool)
    is_base = np.array([k == "nuclear" for k in kind])
    order = [i for i in np.argsort(energy, kind="stable")
             if not (is_batt[i] or is_wind[i] or is_base[i])]
    for t in range(T):
        out_t = np.zeros(N)
        on = is_wind | is_batt | is_base
        out_t[is_wind] = (cap[is_wind] * wind_cf[t]).round(1)
        out_t[is_base] = 0.9 * cap[is_base]
        need = max(sys_load[t] - out_t.sum(), 0.0)
        committed = 0.0
        # spinning reserve: enough committed providers that about 12 % of their capacity
        # (what droop bands and headroom typically allow at 0.2 Hz) covers 1.5x the largest trip
        spinning = 0.2 * cap[is_batt].sum()
        for i in order:
            if committed * 0.75 >= need and spinning >= reserve_need:
                break
            on[i] = True
            committed += cap[i]
            spinning += 0.12 * cap[i]
        started = on & ~(is_wind | is_batt | is_base)
        if committed > 0:
            share = np.clip(need / committed, 0.0, 0.9)
            out_t[started] = np.maximum(min_out[started], share * cap[started])
        output[t] = out_t.round(1)
        online[t] = on
    # offline units carry no reserve and sit at zero output (min output applies when running)
    edges = _area_graph(rng, A, spec.links)
    x = rng.uniform(0.01, 0.05, len(edges)).round(4)
    f_idx = [a for a, _ in edges]
    t_idx = [b for _, b in edges]
    gen_area = np.array([np.bincount(area, weights=output[t], minlength=A) for t in range(T)])
    net = gen_area - load
    net -= net.mean(axis=1, keepdims=True)  # balance: losses/exports spread over the areas
    flows = np.array([dc_flows(A, f_idx, t_idx, x, net[t]) for t in range(T)])

    ids = [f"U{k + 1:04d}_{kind[k]}" for k in range(N)]
    aid = [f"Z{k + 1:02d}" for k in range(A)]
    lid = [f"L{k + 1:02d}_{aid[a]}_{aid[b]}" for k, (a, b) in enumerate(edges)]
    # events: the largest providers and non-providers trip, one load rise, one load drop
    n_ev = spec.events
    n_trip = max(1, n_ev - 2) if n_ev >= 3 else n_ev
    firm_big = np.argsort(-np.where(is_batt | is_wind, 0, cap), kind="stable")[:n_trip]
    ev_rows = [{"event": f"trip_{ids[i]}", "kind": "unit_trip", "unit": ids[i], "area": "",
                "size_mw": ""} for i in firm_big]
    largest = float(np.max(output[:, firm_big])) if n_trip else 500.0
    if n_ev - n_trip >= 1:
        a = int(np.argmax(area_share))
        ev_rows.append({"event": f"load_rise_{aid[a]}", "kind": "load_step", "unit": "",
                        "area": aid[a], "size_mw": round(max(0.6 * largest, incident), 0)})
    if n_ev - n_trip >= 2:
        a = int(np.argmin(area_share))
        ev_rows.append({"event": f"load_drop_{aid[a]}", "kind": "load_step", "unit": "",
                        "area": aid[a], "size_mw": -round(max(0.5 * largest, incident), 0)})

    # unit table: static columns carry the first period; time series override per period
    now = np.where(provides, np.where(rng.uniform(size=N) < 0.5, 4.0, 5.0), 5.0)
    units = pd.DataFrame({
        "unit": ids, "area": [aid[a] for a in area], "capacity_mw": cap,
        "output_mw": output[0], "min_output_mw": np.where(online[0], min_out, np.minimum(
            min_out, 0.0)),
        "droop_min_pct": band[:, 0], "droop_max_pct": band[:, 1], "droop_now_pct": now,
        "deadband_mhz": dead, "price_up_per_mw_h": price_up, "price_down_per_mw_h": price_dn,
        "provides": np.where(provides, "true", "false"), "inertia_s": inertia.round(2),
        "activation_time_s": act,
    })
    # run-of-plant ramp caps for steam: what they can deliver in their activation time
    cap_up = np.where(np.array([k == "steam" for k in kind]), (0.08 * cap).round(0), np.nan)
    units.insert(9, "reserve_up_max_mw", cap_up)
    areas = pd.DataFrame({"area": aid, "load_mw": load[0].round(1),
                          "load_damping_pct_per_hz": rng.uniform(1.0, 2.0, A).round(2),
                          "min_own_reserve_mw": np.zeros(A)})
    event_size = max(largest, incident)
    lim = (np.abs(flows).max(axis=0) + 0.5 * event_size).round(-1) + 50
    links = pd.DataFrame({"link": lid, "from_area": [aid[a] for a in f_idx],
                          "to_area": [aid[b] for b in t_idx], "reactance_pu": x,
                          "limit_mw": lim, "flow_mw": flows[0].round(1)})

    start = pd.Timestamp("2026-06-01T00:00")
    step = pd.Timedelta(hours=24.0 / T_day)
    labels = [(start + k * step).strftime("%Y-%m-%dT%H:%M") for k in range(T)]
    # period, unit and provides as categories: codes per row, not a text per row (a year
    # has ten million unit rows: 5.3 GB with text cells); the files hold the same values
    def cat(values, codes):
        return pd.Categorical.from_codes(codes, categories=list(values))

    t_of, i_of = np.repeat(np.arange(T), N), np.tile(np.arange(N), T)
    ub = pd.DataFrame({
        "period": cat(labels, t_of), "unit": cat(ids, i_of),
        "output_mw": output.reshape(-1),
        "min_output_mw": np.where(online, min_out[None, :], np.minimum(min_out, 0.0)[None, :])
        .reshape(-1),
        "provides": cat(["false", "true"], (online & provides[None, :]).reshape(-1)
                        .astype(np.int8)),
        "price_up_per_mw_h": (price_up[None, :] * (0.85 + 0.3 * shape / day_shape.max())
                              [:, None]).round(2).reshape(-1),
    })
    ab = pd.DataFrame({"period": np.repeat(labels, A), "area": np.tile(aid, T),
                       "load_mw": load.round(1).reshape(-1)})
    lb = pd.DataFrame({"period": np.repeat(labels, len(lid)), "link": np.tile(lid, T),
                       "flow_mw": flows.round(1).reshape(-1)})

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    what = "day" if spec.days == 1 else f"{spec.days} days"
    hold = "" if spec.hold_periods is None else f"hold_periods = {int(spec.hold_periods)}\n"
    (out / "case.toml").write_text(
        f'name = "synthetic {what}: {N} units, {A} areas, {len(lid)} links, {T} periods, '
        f'{n_ev} events, seed {spec.seed}"\n'
        "nominal_frequency_hz = 50.0\n\n[limits]\nmax_settled_deviation_hz = 0.2\n"
        f"full_activation_deviation_hz = 0.2\n\n[droop]\n{hold}"
        f"steps_pct = [{', '.join(f'{s:.1f}' for s in STEPS)}]\n\n"
        "[solver]\nmip_gap = 1e-3\ntime_limit_s = 120\n")
    kw = dict(index=False, lineterminator="\n")
    units.to_csv(out / "units.csv", **kw)
    areas.to_csv(out / "areas.csv", **kw)
    links.to_csv(out / "links.csv", **kw)
    pd.DataFrame(ev_rows, columns=["event", "kind", "unit", "area", "size_mw"]).to_csv(
        out / "events.csv", **kw)
    for name, df in (("units", ub), ("areas", ab), ("links", lb)):
        if spec.parquet:
            df.to_parquet(out / f"{name}_by_period.parquet", index=False)
        else:
            df.to_csv(out / f"{name}_by_period.csv", **kw)
    return out

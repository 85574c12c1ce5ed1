"""Every figure of the report, drawn with matplotlib's Figure API into inline SVG (style and
export in output/plot_style.py). Each plot function takes the ResultFolder and returns
(svg, caption), or None when there is nothing to draw.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from optreserve.output.curves import (
    damping_mw_per_hz,
    deadbands_hz,
    period_rows,
    response_curves,
    tightest_period,
    uniq,
)
from optreserve.output.folder import ResultFolder
from optreserve.output.plot_style import (
    ACCENT,
    ALERT,
    CARD,
    INK,
    LIMIT,
    area_colour,
    heat_cmap,
    limit_ticks,
    loading_cmap,
    new_figure,
    short_period,
    styled,
    svg_of,
    thin_ticks,
)

# The headroom heat map shows at most this many units (largest total headroom first).
HEATMAP_MAX_UNITS = 60


@styled("characteristics")
def plot_characteristics(rf: ResultFolder) -> tuple[str, str]:
    """Frequency against power: the aggregate settled response per area and for the system,
    the settled limit, and every event's settled point."""
    period = tightest_period(rf)
    alloc = period_rows(rf.allocation, period)
    ev = period_rows(rf.events, period)
    fn = rf.nominal_hz
    F = float(ev["limit_hz"].max()) if len(ev) else 0.2
    span = max(1.6 * F, 1.15 * float(ev["settled_deviation_hz"].abs().max()) if len(ev) else 0)
    db = deadbands_hz(rf, alloc, period)
    K = alloc["gain_mw_per_hz"].to_numpy(float)
    act = K > 0
    dd = np.zeros(len(K)) if db is None else db
    corners = np.r_[dd[act], dd[act] + alloc["headroom_up_mw"].to_numpy(float)[act] / K[act],
                    dd[act] + alloc["headroom_down_mw"].to_numpy(float)[act] / K[act]]
    grid = np.unique(np.r_[np.linspace(-span, span, 601), corners, -corners])
    grid = grid[np.abs(grid) <= span]
    curves = response_curves(alloc, grid, db)
    areas = list(curves.columns)
    colours = area_colour(uniq(rf.allocation["area"]))
    damping = damping_mw_per_hz(rf, period)

    fig = new_figure(10.4, 4.3)
    ax1, ax2 = fig.subplots(1, 2, sharey=True)
    y = fn + grid
    for a in areas:
        ax1.plot(curves[a].to_numpy(), y, color=colours[a], lw=1.8, label=str(a))
    total = curves.sum(axis=1).to_numpy()
    ax2.plot(total, y, color=ACCENT, lw=2.4, label="units (all areas)")
    if damping is not None:
        D = float(sum(damping.values()))
        ax2.plot(total - D * grid, y, color=INK, lw=1.3, ls=(0, (5, 3)),
                 label="units + load self-regulation")
    if len(ev):
        hot = ev["binding"].to_numpy(bool)
        if (~hot).any():
            ax2.scatter(ev["size_mw"][~hot], ev["settled_frequency_hz"][~hot], s=34, zorder=5,
                        facecolor=CARD, edgecolor=INK, lw=1.3,
                        label="event: size, settled frequency")
        if hot.any():
            ax2.scatter(ev["size_mw"][hot], ev["settled_frequency_hz"][hot], s=38, zorder=6,
                        color=ALERT, label="event at its limit")
    for ax in (ax1, ax2):
        ax.axhspan(fn + F, fn + span, color=LIMIT, alpha=0.08, lw=0)
        ax.axhspan(fn - span, fn - F, color=LIMIT, alpha=0.08, lw=0)
        for s in (-1, 1):
            ax.axhline(fn + s * F, color=LIMIT, lw=1.2, ls=(0, (4, 2)))
        ax.axhline(fn, color="#9aa3ab", lw=0.8)
        ax.axvline(0, color="#9aa3ab", lw=0.8)
        ax.set_ylim(fn - span, fn + span)
        ax.set_xlabel("response ΔP (MW; + = more generation)")
    ax1.plot([], [], color=LIMIT, lw=1.2, ls=(0, (4, 2)), label="settled limit")
    limit_ticks(ax1.yaxis, [fn - F, fn + F], fn - span, fn + span)
    ax1.set_ylabel("frequency (Hz)")
    ax1.set_title("Per area: units' settled response")
    ax2.set_title("Whole system")
    # the quadrant right of the axis and above nominal stays empty: under-frequency response
    # is positive power below nominal; keep the legends under the upper limit line
    below_limit = 0.5 + F / (2 * span) - 0.03
    ax1.legend(loc="upper right", bbox_to_anchor=(1.0, below_limit),
               ncols=1 if len(areas) < 7 else 2)
    ax2.legend(loc="upper right", bbox_to_anchor=(1.0, below_limit))
    label = "Droop characteristics: frequency against response power per area"
    svg = svg_of(fig, "characteristics", label)
    when = f" in period {period}, the one with the least margin," if period is not None else ""
    cap = (f"Frequency against power{when} from the units' gains and headroom in allocation.csv. "
           "Each line is the summed settled response K·(|Δf| − dead band), flattening where "
           "units reach their headroom. Amber: the settled limit. Dots: each event's size "
           "against its settled frequency; ")
    if damping is not None:
        cap += ("they lie on the dashed line, where the units and the load's self-regulation "
                "together balance the event.")
    else:
        cap += ("without the case folder, dead bands and the load's self-regulation are not "
                "drawn, so the dots sit slightly off the line (give --case to draw them).")
    return svg, cap


@styled("events")
def plot_events(rf: ResultFolder) -> tuple[str, str]:
    """Settled deviation of every event against its limit (per period for horizons)."""
    ev = rf.events
    names = uniq(ev["event"])
    n = len(names)
    pos = {e: k for k, e in enumerate(names)}
    yk = ev["event"].map(pos).to_numpy()
    dev = ev["settled_deviation_hz"].to_numpy(float) * 1000
    lim = float(ev["limit_hz"].max()) * 1000
    span = max(1.18 * lim, 1.1 * np.abs(dev).max(initial=0))
    fig = new_figure(10.4, 1.1 + 0.34 * max(n, 3))
    ax = fig.subplots()
    ax.axvspan(lim, span, color=LIMIT, alpha=0.1, lw=0)
    ax.axvspan(-span, -lim, color=LIMIT, alpha=0.1, lw=0)
    for s in (-1, 1):
        ax.axvline(s * lim, color=LIMIT, lw=1.3, ls=(0, (4, 2)))
    ax.axvline(0, color="#9aa3ab", lw=0.8)
    binding = ev["binding"].to_numpy(bool)
    if rf.horizon:
        ax.scatter(dev, yk, s=9, color=ACCENT, alpha=0.25, lw=0, label="one period")
        g = pd.DataFrame({"k": yk, "dev": dev, "b": binding, "p": ev["period"].to_numpy()})
        lo = g.groupby("k")["dev"].min()
        hi = g.groupby("k")["dev"].max()
        ax.hlines(lo.index, lo.to_numpy(), hi.to_numpy(), color=ACCENT, lw=1.4, alpha=0.7)
        worst = g.loc[g.assign(a=g["dev"].abs()).groupby("k")["a"].idxmax()]
    else:
        worst = pd.DataFrame({"k": yk, "dev": dev, "b": binding})
    ok = ~worst["b"].to_numpy(bool)
    if ok.any():
        ax.scatter(worst["dev"][ok], worst["k"][ok], s=46, color=ACCENT, zorder=4,
                   label="worst period" if rf.horizon else "settled deviation")
    if (~ok).any():
        ax.scatter(worst["dev"][~ok], worst["k"][~ok], s=50, color=ALERT, zorder=5,
                   label="at its limit")
    for r in worst.itertuples():
        txt = f"{r.dev:+.1f}".replace("-", "−") + (f" @ {short_period([r.p])[0]}"
                                                   if rf.horizon else "")
        right = r.dev >= 0
        ax.annotate(txt, (r.dev, r.k), xytext=(-7 if right else 7, 6),
                    textcoords="offset points", ha="right" if right else "left", fontsize=8,
                    color=ALERT if r.b else INK)
    ax.set_yticks(range(n), [str(e) for e in names])
    ax.set_ylim(n - 0.4, -0.7)
    ax.set_xlim(-span, span)
    ax.set_xlabel("settled deviation from nominal (mHz; − = under-frequency)")
    ax.grid(axis="y", visible=False)
    limit_ticks(ax.xaxis, [-lim, lim], -span, span)
    ax.plot([], [], color=LIMIT, lw=1.3, ls=(0, (4, 2)), label=f"limit ±{lim:.0f} mHz")
    fig.legend(loc="outside upper right", ncols=4)
    svg = svg_of(fig, "events", "Settled frequency deviation per event against the limit")
    cap = ("Settled deviation after each event; the amber lines are the limit the allocation "
           "is held to. " + ("The bar spans the periods; the big dot is the worst period. "
                             if rf.horizon else "") + "Red: binding (within 0.01 mHz).")
    return svg, cap


@styled("links")
def plot_links(rf: ResultFolder) -> tuple[str, str] | None:
    """Link loading (% of limit) after every event: a links x events matrix."""
    lk = rf.links
    if not len(lk):
        return None
    links = uniq(lk["link"])
    events = uniq(rf.events["event"])
    m = lk.groupby(["link", "event"], sort=False)["loading_pct"].max().unstack()
    m = m.reindex(index=links, columns=events)
    L, E = m.shape
    fig = new_figure(10.4, min(1.0 + 0.3 * L + 0.075 * max(len(str(e)) for e in events),
                                14.0))
    ax = fig.subplots()
    im = ax.imshow(m.to_numpy(float), cmap=loading_cmap(), vmin=0, vmax=100,
                   aspect="auto", interpolation="nearest")
    if L * E <= 600:
        for i in range(L):
            for j in range(E):
                v = m.iat[i, j]
                if not np.isnan(v):
                    ax.text(j, i, f"{v:.0f}", ha="center", va="center", fontsize=8,
                            color="white" if v >= 90 else INK)
    ax.set_xticks(range(E), [str(e) for e in events], rotation=35, ha="right",
                  rotation_mode="anchor")
    ax.set_yticks(range(L), [str(x) for x in links])
    ax.grid(False)
    for s in ax.spines.values():
        s.set_visible(False)
    ax.tick_params(length=0)
    cb = fig.colorbar(im, ax=ax, extend="max", shrink=0.9, pad=0.01, aspect=30)
    cb.set_label("loading, % of limit")
    cb.outline.set_visible(False)
    svg = svg_of(fig, "links", "Tie-line loading after each event as a share of its limit")
    cap = ("Settled flow after each event as a share of the link's limit (100 % = at the "
           "limit)" + (", the highest over the periods" if rf.horizon else "") + ".")
    return svg, cap


@styled("areas")
def plot_area_costs(rf: ResultFolder) -> tuple[str, str]:
    a = rf.allocation
    areas = uniq(a["area"])
    T = max(1, len(rf.periods))
    g = a.groupby("area", sort=False)[["headroom_up_mw", "headroom_down_mw", "cost_per_h"]] \
        .sum().reindex(areas) / T
    colours = area_colour(areas)
    fig = new_figure(10.4, 1.3 + 0.38 * max(len(areas), 2))
    ax1, ax2 = fig.subplots(1, 2)
    y = np.arange(len(areas))
    h = 0.38
    ax1.barh(y - h / 2, g["headroom_up_mw"], h, color=ACCENT, label="up")
    ax1.barh(y + h / 2, g["headroom_down_mw"], h, color="#8fbfbd", label="down")
    ax2.barh(y, g["cost_per_h"], 0.6, color=[colours[x] for x in areas])
    for ax in (ax1, ax2):
        ax.set_yticks(y, [str(x) for x in areas])
        ax.invert_yaxis()
        ax.grid(axis="y", visible=False)
    for k, v in enumerate(g["cost_per_h"]):
        ax2.annotate(f"{v:,.0f}", (v, k), xytext=(4, 0), textcoords="offset points",
                     va="center", fontsize=8)
    ax2.margins(x=0.15)
    mean = " (mean over periods)" if rf.horizon else ""
    ax1.set_title("Headroom by area" + mean)
    ax1.set_xlabel("MW")
    ax1.legend(loc="lower right")
    ax2.set_title("Headroom cost by area" + mean)
    ax2.set_xlabel("cost per hour")
    svg = svg_of(fig, "areas", "Headroom and its cost by area")
    return svg, "Headroom held and its cost per hour, summed over the units of each area."


@styled("heatmap")
def plot_heatmap(rf: ResultFolder) -> tuple[str, str] | None:
    """Units x periods headroom (up; and down when it differs)."""
    periods = rf.periods
    if rf.schedule is not None:
        sw = rf.schedule
        up = sw[sw["direction"] == "up"].set_index("unit")[periods].astype(float)
        dn = sw[sw["direction"] == "down"].set_index("unit")[periods].astype(float)
    else:
        a = rf.allocation
        up = a.pivot(index="unit", columns="period", values="headroom_up_mw")[periods]
        dn = a.pivot(index="unit", columns="period", values="headroom_down_mw")[periods]
    dn = dn.reindex(up.index).fillna(0.0)
    tot = up.sum(axis=1) + dn.sum(axis=1)
    held = tot[tot > 0]
    if not len(held):
        return None
    area = rf.allocation.drop_duplicates("unit").set_index("unit")["area"]
    keep = held.sort_values(ascending=False).index[:HEATMAP_MAX_UNITS]
    area_pos = {x: k for k, x in enumerate(uniq(area))}
    order = sorted(keep, key=lambda u: (area_pos[area[u]], str(u)))
    panels = [("up", up.loc[order])]
    same = np.allclose(up.loc[order].to_numpy(), dn.loc[order].to_numpy(), atol=1e-6)
    if not same:
        panels.append(("down", dn.loc[order]))
    n = len(order)
    fig = new_figure(10.4, min(0.9 + len(panels) * (0.55 + 0.17 * n), 22.0))
    axes = fig.subplots(len(panels), 1, squeeze=False)[:, 0]
    vmax = max(float(p[1].to_numpy().max()) for p in panels)
    labels = short_period(periods)
    ticks = thin_ticks(len(periods))
    colours = area_colour(uniq(rf.allocation["area"]))
    for ax, (direction, m) in zip(axes, panels):
        im = ax.imshow(m.to_numpy(float), cmap=heat_cmap(), vmin=0, vmax=vmax, aspect="auto",
                       interpolation="nearest")
        ax.set_yticks(range(n), [str(u) for u in order], fontsize=7.5 if n > 30 else 8.5)
        for t, u in zip(ax.get_yticklabels(), order):
            t.set_color(colours[area[u]])
        ax.set_xticks(ticks, [labels[k] for k in ticks], rotation=0 if len(labels[0]) <= 5
                      else 45, ha="center" if len(labels[0]) <= 5 else "right")
        ax.grid(False)
        ax.tick_params(length=0)
        for s in ax.spines.values():
            s.set_visible(False)
        ax.set_title("Headroom " + (direction if not same else "up and down (equal)")
                     + ", MW")
    cb = fig.colorbar(im, ax=list(axes), shrink=0.9, pad=0.01, aspect=40)
    cb.set_label("MW")
    cb.outline.set_visible(False)
    hidden = int(len(held) - len(keep))
    svg = svg_of(fig, "heatmap", "Headroom per unit and period")
    cap = ("Headroom per providing unit (rows, coloured by area) and period (columns)."
           + (f" The {hidden} units with the least headroom are not drawn; schedule_wide.csv "
              "has them all." if hidden else "")
           + none_holding(int((tot == 0).sum())))
    return svg, cap


def none_holding(n: int) -> str:
    if n == 0:
        return ""
    return (" 1 unit holds" if n == 1 else f" {n} units hold") + " no headroom in any period."


@styled("period-costs")
def plot_period_costs(rf: ResultFolder) -> tuple[str, str]:
    a = rf.allocation
    periods = rf.periods
    areas = uniq(a["area"])
    m = a.pivot_table(index="period", columns="area", values="cost_per_h", aggfunc="sum",
                      sort=False).reindex(index=periods, columns=areas).fillna(0.0)
    colours = area_colour(areas)
    fig = new_figure(10.4, 3.3)
    ax = fig.subplots()
    x = np.arange(len(periods))
    bottom = np.zeros(len(periods))
    for ar in areas:
        v = m[ar].to_numpy(float)
        ax.bar(x, v, 0.82, bottom=bottom, color=colours[ar], label=str(ar), lw=0)
        bottom += v
    labels = short_period(periods)
    ticks = thin_ticks(len(periods))
    ax.set_xticks(ticks, [labels[k] for k in ticks], rotation=0 if len(labels[0]) <= 5 else 45,
                  ha="center" if len(labels[0]) <= 5 else "right")
    ax.set_xlim(-0.6, len(periods) - 0.4)
    ax.set_ylabel("headroom cost per hour")
    ax.grid(axis="x", visible=False)
    ax.set_title("Headroom cost by period")
    ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), title="area")
    svg = svg_of(fig, "period-costs", "Headroom cost per hour in every period, by area")
    return svg, "Headroom cost per hour in each period, stacked by area."

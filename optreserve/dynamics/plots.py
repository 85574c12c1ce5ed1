"""Figures of a simulation (only the figure code: simulate.py writes them)."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from optreserve.output.results import CAUTION

if TYPE_CHECKING:
    from optreserve.dynamics.simulate import Simulation


def plot_event(sim: Simulation, event: str, path: str | Path) -> Path:
    """Three panels: area frequencies with the limits, link flows with their limits, and the
    response per area; the caution under the figure. Agg canvas: no display, no global state."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    df = sim.series[event]
    row = sim.summary.set_index("event").loc[event]
    case = sim.case
    f_n = case.nominal_frequency_hz
    lim = case.limits
    t = df["time_s"].to_numpy()
    fig = Figure(figsize=(9.0, 9.5), dpi=100)
    FigureCanvasAgg(fig)
    ax_f, ax_p, ax_r = fig.subplots(3, 1, sharex=True)
    for c in [c for c in df.columns if c.startswith("frequency_hz:")]:
        ax_f.plot(t, df[c], label=c.split(":", 1)[1])
    sign = -1.0 if row["size_mw"] >= 0 else 1.0
    ax_f.axhline(f_n + sign * lim.max_settled_deviation_hz, color="k", ls="--", lw=0.8,
                 label="settled limit")
    if lim.max_nadir_deviation_hz is not None:
        ax_f.axhline(f_n + sign * lim.max_nadir_deviation_hz, color="r", ls=":", lw=0.8,
                     label="nadir limit")
    ax_f.plot([row["nadir_time_s"]], [row["nadir_hz"]], "kv" if sign < 0 else "k^")
    ax_f.set_ylabel("frequency [Hz]")
    ax_f.legend(loc="best", fontsize=7)
    ax_f.grid(alpha=0.3)
    flows = [c for c in df.columns if c.startswith("flow_mw:")]
    for c in flows:
        link = c.split(":", 1)[1]
        line, = ax_p.plot(t, df[c], label=link)
        ax_p.axhline(np.sign(df[c].iloc[-1] or 1.0) * sim.link_limit_mw[link],
                     color=line.get_color(), ls="--", lw=0.6)
    if flows:
        ax_p.legend(loc="best", fontsize=7)
    ax_p.set_ylabel("tie-line flow [MW]")
    ax_p.grid(alpha=0.3)
    resp = df[[c for c in df.columns if c.startswith("response_mw:")]].to_numpy()
    area_of = case.units["area"].to_numpy(object)
    for a in case.areas["area"]:
        ax_r.plot(t, resp[:, area_of == a].sum(axis=1), label=f"{a} governors")
    ax_r.plot(t, resp.sum(axis=1), "k", lw=1.2, label="all governors")
    ax_r.axhline(row["size_mw"], color="gray", ls="--", lw=0.8, label="event size")
    ax_r.set_ylabel("governor response [MW]")
    ax_r.set_xlabel("time after the event [s]")
    ax_r.legend(loc="best", fontsize=7)
    ax_r.grid(alpha=0.3)
    when = f", period {sim.period}" if sim.period else ""
    fig.suptitle(f"{case.name}\nevent {event} ({row['size_mw']:+.0f} MW{when}): nadir "
                 f"{row['nadir_hz']:.3f} Hz at {row['nadir_time_s']:.2f} s, settles "
                 f"{row['settled_frequency_hz']:.4f} Hz", fontsize=9)
    # the caution on two lines under the figure; fixed margins (tight layout is slow)
    cut = CAUTION.find(": ") + 1
    fig.text(0.5, 0.01, CAUTION[:cut] + "\n" + CAUTION[cut:].strip(), ha="center",
             va="bottom", fontsize=7)
    fig.subplots_adjust(left=0.09, right=0.98, top=0.92, bottom=0.1, hspace=0.12)
    fig.savefig(path)
    return Path(path)

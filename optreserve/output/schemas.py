"""The columns of every result file the tool writes and reads back, declared once: name, kind,
whether the tool always writes it, and the bounds a reader checks (output/folder.py reads
against these; docs/case-format.md describes the same files for people).

Column kinds: "text"; "bool" (true/false, yes/no, 1/0); "num" (a finite number, not blank);
"num?" (blank allowed, read as NaN); "num?inf" (blank and ±inf allowed).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class Column:
    name: str
    kind: str  # "text", "bool", "num", "num?", "num?inf"
    always: bool = True  # the tool always writes it (needed when reading complete)
    core: bool = False  # needed even when reading leniently
    default: Any = ""  # filled in for an absent column when reading leniently
    at_least: float | None = None  # lower bound, with `above` deciding > or >=
    above: bool = False


def _cols(*cols: Column) -> dict[str, Column]:
    return {c.name: c for c in cols}


ALLOCATION = _cols(
    Column("unit", "text", core=True), Column("area", "text", core=True),
    Column("period", "text", always=False),  # horizons only
    Column("provides", "bool", default=None),
    Column("droop_pct", "num?", default=math.nan, at_least=0.0, above=True),
    Column("gain_mw_per_hz", "num", core=True, at_least=0.0),
    Column("headroom_up_mw", "num", core=True, at_least=0.0),
    Column("headroom_down_mw", "num", core=True, at_least=0.0),
    Column("cost_per_h", "num", default=math.nan))
EVENTS = _cols(
    Column("event", "text"), Column("kind", "text"), Column("area", "text"),
    Column("period", "text", always=False),
    Column("size_mw", "num"), Column("settled_frequency_hz", "num"),
    Column("settled_deviation_hz", "num"), Column("limit_hz", "num"), Column("binding", "bool"),
    # blank where the fixed-integer dual says nothing (droop steps)
    Column("marginal_cost_per_mw_h", "num?"),
    # the re-solve price, when the run computed it
    Column("incremental_cost_per_mw_h", "num?", always=False))
LINKS = _cols(
    Column("link", "text"), Column("event", "text"), Column("period", "text", always=False),
    Column("flow_before_mw", "num"), Column("flow_after_mw", "num"), Column("limit_mw", "num"),
    Column("loading_pct", "num"))
DIAGNOSIS = _cols(
    Column("family", "text"), Column("element", "text"), Column("event", "text"),
    Column("period", "text", always=False),
    Column("short_mw", "num?"), Column("excess_hz", "num?inf"), Column("over_mw", "num?"))
PROPOSAL = _cols(
    Column("unit", "text"), Column("area", "text"),
    Column("droop_now_pct", "num?"), Column("droop_proposed_pct", "num?"),
    Column("change", "text"), Column("droop_change_pct", "num"),
    Column("headroom_up_now_mw", "num"), Column("headroom_up_proposed_mw", "num"),
    Column("headroom_down_now_mw", "num"), Column("headroom_down_proposed_mw", "num"),
    Column("reason", "text"))
BEFORE_AFTER = _cols(
    Column("event", "text"), Column("period", "text", always=False),
    Column("settled_frequency_before_hz", "num?"), Column("settled_frequency_after_hz", "num"),
    Column("margin_before_hz", "num?"), Column("margin_after_hz", "num"),
    Column("worst_link_before", "text", always=False),
    Column("loading_before_pct", "num?", always=False),
    Column("worst_link_after", "text", always=False),
    Column("loading_after_pct", "num?", always=False))
# simulation_summary.csv (docs/case-format.md, "Simulation outputs"): an open column set, typed
# by content; these columns are checked. Blank cells are allowed everywhere (nadir_ok and
# rocof_ok are blank when that limit is not set).
SIMULATION_SUMMARY_COLUMNS = _cols(*(
    [Column(n, "text", always=False) for n in ("event", "period", "kind", "area", "nadir_area",
                                                "rocof_area", "max_loading_link")]
    + [Column(n, "num?", always=False) for n in (
        "size_mw", "nadir_hz", "nadir_time_s", "rocof_hz_per_s", "rocof_estimate_hz_per_s",
        "nadir_ramp_estimate_hz", "settled_frequency_hz", "steady_state_frequency_hz",
        "duration_s", "max_link_loading_pct")]
    + [Column(n, "bool", always=False) for n in ("flat_at_end", "settled_ok", "nadir_ok",
                                                  "rocof_ok", "link_ok")]))
# simulation_links.csv, when the simulator writes it: per event (and period) and link the
# highest flow during the run against the link's limit.
SIMULATION_LINKS_COLUMNS = _cols(*(
    [Column(n, "text", always=False) for n in ("event", "period", "link")]
    + [Column(n, "num?", always=False) for n in ("limit_mw", "max_flow_mw", "max_loading_pct",
                                                  "at_time_s")]
    + [Column("link_ok", "bool", always=False)]))
# schedule_wide.csv: unit, direction, then one numeric column per period
SCHEDULE_WIDE = _cols(Column("unit", "text"), Column("direction", "text"))
SCHEMAS = {"allocation.csv": ALLOCATION, "events.csv": EVENTS, "links.csv": LINKS,
           "diagnosis.csv": DIAGNOSIS, "proposal.csv": PROPOSAL,
           "before_after.csv": BEFORE_AFTER, "schedule_wide.csv": SCHEDULE_WIDE}
# prices.csv has an open column set (per area, per period, prices of every kind): typed by
# content (read_table with schema None).

SUMMARY_NUMBERS = ("objective_per_h", "objective_total", "objective_with_penalty",
                   "change_penalty", "mip_gap", "headroom_up_mw", "headroom_down_mw",
                   "horizon_hours", "periods", "units_providing", "dead_band_iterations")
RETUNE_NUMBERS = ("units_changed", "total_droop_change_pct", "cost_before_per_h",
                  "cost_after_per_h")

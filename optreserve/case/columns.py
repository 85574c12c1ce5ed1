"""The contract's input columns, declared once (docs/case-format.md, ../shared/design).

Every column of units.csv, areas.csv, links.csv and events.csv is one `Col`: name, type,
required, default, bounds, unit, meaning and whether it may vary in a `*_by_period.csv`
file. The reader types and bounds cells from these rows (csvio.py), the time-series reader
derives its override and "setting" lists from them (series.py), and
tests/test_case_columns.py checks that docs/case-format.md lists the same columns.

Later contract versions add rows here (`version=2`), either in the lists below or with
`declare("units", Col(...))` from their own module; reading, bounds and the docs check then
follow without other changes. Semantics beyond one cell's type and bounds belong in checks.

Bounds (why these numbers; docs/case-format.md, "Bounds"):
* MW quantities |v| <= MW_MAX = 1e6 MW (1 TW): more than the total generation of the largest
  synchronous area (continental Europe peaks near 0.5 TW, from memory). Larger values are
  typing slips (3e19 MW), and at that scale the solver's absolute tolerances stop meaning
  anything against the 0.5 MW / 0.5 mHz verification.
* Positive sizes (capacity_mw, limit_mw) >= MW_MIN = 0.001 MW (1 kW), and no non-zero value
  of a bounded column below TINY = 1e-9 in magnitude (write 0): such values are far below
  every tolerance (0.5 MW, 0.5 mHz) and below the coefficients HiGHS keeps (it drops matrix
  values under 1e-9, from memory); a 1e-20 MW limit made the diagnosis fail.
* Prices and penalties <= PRICE_MAX = 1e9 per MW·h (or per change): far above any market
  price cap (a few thousand per MWh, from memory), still well inside what HiGHS treats as
  a finite cost (its infinite_cost is 1e20).
* Droop 0.1-100 %: a 0.1 % droop is a 1000 pu gain, beyond any governor (common practice:
  2-12 %, with a warning outside); 100 % moves a unit by its rating for a 1 pu frequency
  change, i.e. no useful response.
* activation_time_s 0.1-600 s: the fastest frequency-response products act in a few hundred
  milliseconds (common practice) and primary (containment) reserve must be fully active
  within 30 s in continental Europe (EU 2017/1485 Annex V, references.md); 600 s (10 min)
  already belongs to secondary/tertiary reserve. Below 0.1 s the governor lag (T/4) is
  shorter than the 10 ms output step of the simulation.
* inertia_s 0-50 s: H of synchronous machines is 2-10 s, a flywheel-assisted synchronous
  condenser a few tens (common practice).
* deadband_mhz 0-1000 mHz: above 1 Hz no frequency-containment provider responds at all
  (grid codes allow 10-15 mHz, EU 2017/1485 Annex V; a warning above 50 mHz).
* reactance_pu 1e-6-1e3 pu, and no two links (in any period) more than REACTANCE_SPREAD =
  1e6 apart (checks.py): below 1e-6 pu a link is a busbar, not a line, and spreads beyond
  1e6 make the PTDF ill-conditioned (a 5e-324 reactance divides to inf).
* load_damping_pct_per_hz 0-100 %/Hz: loads give 0-5 %/Hz (common practice).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

MW_MAX = 1.0e6
MW_MIN = 1.0e-3
TINY = 1.0e-9
PRICE_MAX = 1.0e9
ENERGY_MAX_MWH = 1.0e9  # a reservoir's whole year at MW_MAX is below 1e10; storage far less
REACTANCE_MIN_PU, REACTANCE_MAX_PU = 1.0e-6, 1.0e3
REACTANCE_SPREAD = 1.0e6
DROOP_MIN_PCT, DROOP_MAX_PCT = 0.1, 100.0
ACTIVATION_MIN_S, ACTIVATION_MAX_S = 0.1, 600.0
INERTIA_MAX_S = 50.0
DEADBAND_MAX_MHZ = 1000.0
DAMPING_MAX_PCT_PER_HZ = 100.0


@dataclass(frozen=True)
class Col:
    """One input column. The first four fields are positional (name, kind, required,
    default); kind is "id" (unique text), "text", "float" or "bool".

    lo/hi bound a float column (lo_open: lo < v instead of lo <= v); check is an extra
    per-cell rule returning a message when a value is bad (for tables outside the case
    contract, e.g. a result folder's allocation.csv). per_period: True when the column may
    vary in the table's *_by_period.csv, False when it is a setting (an error there), None
    for id columns and columns of tables without a time series."""

    name: str
    kind: str
    required: bool = False
    default: Any = None
    check: Callable[[float], str | None] | None = None
    lo: float | None = None
    hi: float | None = None
    lo_open: bool = False
    unit: str = "–"
    meaning: str = ""
    per_period: bool | None = None
    version: int = 1

    def bound_text(self) -> str:
        """The bounds as docs/case-format.md states them ("" when unbounded)."""
        lo = "" if self.lo is None else f"{'>' if self.lo_open else '>='} {num_text(self.lo)}"
        hi = "" if self.hi is None else f"<= {num_text(self.hi)}"
        return ", ".join(x for x in (lo, hi) if x)


def num_text(v: float) -> str:
    """A bound as people write it: 0.001, 600, 1e6, 1e-6 (not 1e+06)."""
    s = f"{v:g}"
    return s.replace("e+0", "e").replace("e-0", "e-").replace("e+", "e")


NAN = math.nan
_POS: dict = {"lo": 0.0, "lo_open": True}
_NONNEG: dict = {"lo": 0.0}
_MW: dict = {"lo": -MW_MAX, "hi": MW_MAX}

UNIT_COLS: list[Col] = [
    Col("unit", "id", True, meaning="unique id"),
    Col("area", "text", True, meaning="an area in areas.csv", per_period=False),
    Col("capacity_mw", "float", True, lo=MW_MIN, hi=MW_MAX, unit="MW", per_period=False,
        meaning="rated active power; the droop is defined on this base"),
    Col("output_mw", "float", True, **_MW, unit="MW", per_period=True,
        meaning="scheduled output"),
    Col("min_output_mw", "float", False, 0.0, **_MW, unit="MW", per_period=True,
        meaning="lowest output (negative for storage that can charge)"),
    Col("droop_min_pct", "float", True, lo=DROOP_MIN_PCT, hi=DROOP_MAX_PCT, unit="%",
        per_period=False, meaning="permitted droop band, lower end"),
    Col("droop_max_pct", "float", True, lo=DROOP_MIN_PCT, hi=DROOP_MAX_PCT, unit="%",
        per_period=False, meaning="permitted droop band, upper end"),
    Col("droop_now_pct", "float", False, NAN, lo=DROOP_MIN_PCT, hi=DROOP_MAX_PCT, unit="%",
        per_period=False, meaning="today's setting"),
    Col("deadband_mhz", "float", False, 0.0, **_NONNEG, hi=DEADBAND_MAX_MHZ, unit="mHz",
        per_period=False, meaning="governor insensitivity plus intentional dead band"),
    Col("reserve_up_max_mw", "float", False, NAN, **_NONNEG, hi=MW_MAX, unit="MW",
        per_period=True, meaning="up headroom the unit can ramp within its activation time"),
    Col("reserve_down_max_mw", "float", False, NAN, **_NONNEG, hi=MW_MAX, unit="MW",
        per_period=True, meaning="down headroom the unit can ramp within its activation time"),
    Col("price_up_per_mw_h", "float", False, 0.0, **_NONNEG, hi=PRICE_MAX, unit="per MW·h",
        per_period=True, meaning="cost of holding 1 MW of up headroom for one hour"),
    Col("price_down_per_mw_h", "float", False, 0.0, **_NONNEG, hi=PRICE_MAX,
        unit="per MW·h", per_period=True,
        meaning="cost of holding 1 MW of down headroom for one hour"),
    # the words of `provides` (true/false/always/up/down) are parsed by case/products.py
    Col("provides", "text", False, "true", unit="word", per_period=True,
        meaning="true, false, always, up or down (participation and direction)"),
    Col("inertia_s", "float", False, NAN, **_NONNEG, hi=INERTIA_MAX_S, unit="s",
        per_period=False, meaning="inertia constant H on the capacity base"),
    Col("activation_time_s", "float", False, NAN, lo=ACTIVATION_MIN_S, hi=ACTIVATION_MAX_S,
        unit="s", per_period=False, meaning="time to deliver the full headroom"),
    Col("energy_price_per_mwh", "float", False, NAN, lo=-PRICE_MAX, hi=PRICE_MAX,
        unit="per MWh", per_period=True, meaning="energy price under co-optimisation"),
    # version 2 governor models: settings of the unit, checked against their models by
    # case/governor_columns.py (bounds: dynamics/governors.py BOUNDS)
    Col("governor", "text", False, "lag", per_period=False, version=2,
        meaning="governor model: lag, reheat, hydro or inverter"),
    *(Col(name, "float", False, NAN, unit=unit, per_period=False, version=2, meaning=m)
      for name, unit, m in (
          ("governor_lag_s", "s", "governor and valve (or converter) time constant T_g"),
          ("reheat_time_s", "s", "reheater time constant T_rh"),
          ("hp_fraction", "–", "high-pressure share F_hp of a reheat turbine"),
          ("water_time_s", "s", "water starting time T_w of a hydro unit"),
          ("delay_s", "s", "measurement and control delay of an inverter"))),
    Col("energy_up_mwh", "float", False, NAN, **_NONNEG, hi=ENERGY_MAX_MWH, unit="MWh",
        per_period=True, meaning="energy the unit can deliver above its output"),
    Col("energy_down_mwh", "float", False, NAN, **_NONNEG, hi=ENERGY_MAX_MWH, unit="MWh",
        per_period=True, meaning="energy the unit can absorb below its output"),
]
AREA_COLS: list[Col] = [
    Col("area", "id", True, meaning="unique id"),
    Col("load_mw", "float", True, **_NONNEG, hi=MW_MAX, unit="MW", per_period=True,
        meaning="demand"),
    Col("load_damping_pct_per_hz", "float", False, 0.0, **_NONNEG,
        hi=DAMPING_MAX_PCT_PER_HZ, unit="%/Hz", per_period=True,
        meaning="load self-regulation"),
    Col("min_own_reserve_mw", "float", False, 0.0, **_NONNEG, hi=MW_MAX, unit="MW",
        per_period=True, meaning="up headroom to hold inside the area"),
]
LINK_COLS: list[Col] = [
    Col("link", "id", True, meaning="unique id"),
    Col("from_area", "text", True, per_period=False, meaning="area at the start"),
    Col("to_area", "text", True, per_period=False, meaning="area at the end"),
    Col("reactance_pu", "float", True, lo=REACTANCE_MIN_PU, hi=REACTANCE_MAX_PU, unit="pu",
        per_period=True, meaning="series reactance; flows divide by DC power-flow rules"),
    Col("limit_mw", "float", True, lo=MW_MIN, hi=MW_MAX, unit="MW", per_period=True,
        meaning="post-event flow limit"),
    Col("flow_mw", "float", False, 0.0, **_MW, unit="MW", per_period=True,
        meaning="pre-event flow, positive from from_area to to_area"),
    # version 2: what `simulate` checks the swing's tie loading against (governor_columns.py)
    Col("transient_limit_mw", "float", False, NAN, lo=MW_MIN, hi=MW_MAX, unit="MW",
        per_period=False, meaning="flow the link may carry during the swing", version=2),
]
EVENT_COLS: list[Col] = [
    Col("event", "id", True, meaning="unique id"),
    Col("kind", "text", True, meaning="unit_trip or load_step"),
    Col("unit", "text", False, "", meaning="the unit of a unit_trip"),
    Col("area", "text", False, "", meaning="the area of a load_step"),
    Col("size_mw", "float", False, NAN, **_MW, unit="MW",
        meaning="signed size: > 0 under-frequency"),
    Col("period", "text", False, "", meaning="limits the event to one period"),
]
EVENT_KINDS = ("unit_trip", "load_step")

# file name -> its column table; *_by_period.csv files take their columns from these
TABLES: dict[str, list[Col]] = {"units.csv": UNIT_COLS, "areas.csv": AREA_COLS,
                                "links.csv": LINK_COLS, "events.csv": EVENT_COLS}
SERIES_ID = {"units": "unit", "areas": "area", "links": "link"}
_SETTING_HINT = {
    "units": "is a setting of the unit, not a time series (it cannot vary by period)",
    "links": "is a property of the link, not a time series",
    "areas": "is a setting of the area, not a time series",
}


def declare(file: str, col: Col) -> None:
    """Add a column to a file's table (later contract versions, from their own module)."""
    table = TABLES[file]
    if any(c.name == col.name for c in table):
        raise ValueError(f"column {col.name!r} of {file} is already declared")
    table.append(col)


# columns a later reader step derives from a declared one and keeps per period (for example
# the products reader's provides_up from `provides`); they are not read from the file
DERIVED_SERIES_COLS: dict[str, set[str]] = {
    "units": {"provides_always", "provides_up", "provides_down"}, "areas": set(), "links": set()}


def series_columns(key: str) -> set[str]:
    """Columns that may vary by period in KEY_by_period.csv (plus derived ones kept)."""
    return {c.name for c in TABLES[f"{key}.csv"] if c.per_period} | DERIVED_SERIES_COLS[key]


def series_hints(key: str) -> dict[str, str]:
    """Columns of KEY.csv that are settings: an error (with this reason) in the time series."""
    return {c.name: _SETTING_HINT[key] for c in TABLES[f"{key}.csv"] if c.per_period is False}

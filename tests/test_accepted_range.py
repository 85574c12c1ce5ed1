"""Property tests over the whole accepted range: any value inside the bounds the contract
states (docs/case-format.md "Bounds", taken here from the column table itself) ends `check`
and `solve` with exit 0, 2 (a cross-column rule) or 3 (infeasible), never 1, "unexpected" or a
traceback, and in seconds; a value just outside a bound is exit 2 naming file, row and
column (contract: ../shared/design/case-format.md). Hypothesis runs derandomized with a
bounded number of examples, so the suite is deterministic (issue 12: "the test suite is
deterministic").
"""

from __future__ import annotations

import io
import math
import shutil
import tempfile
from contextlib import redirect_stderr, redirect_stdout
from pathlib import Path

from conftest import toml_text
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_fuzz_reader import _write

from optreserve.case.columns import AREA_COLS, EVENT_COLS, LINK_COLS, UNIT_COLS
from optreserve.case.toml_settings import _TOML_SCHEMA
from optreserve.cli import main

SETTINGS = {"name": "range base", "nominal_frequency_hz": 50.0,
            "limits": {"max_settled_deviation_hz": 0.5, "max_nadir_deviation_hz": 10.0}}
# A feasible two-area case with a nadir limit, so that a value inside the range reaches the
# solve, the nadir rows and the simulations of the nadir check.
BASE = {
    "case.toml": toml_text(SETTINGS),
    "units.csv": ("unit,area,capacity_mw,output_mw,min_output_mw,droop_min_pct,droop_max_pct,"
                  "droop_now_pct,price_up_per_mw_h,price_down_per_mw_h,deadband_mhz,"
                  "reserve_up_max_mw,reserve_down_max_mw,inertia_s,activation_time_s,"
                  "energy_price_per_mwh\n"
                  "Brook_1,North,500,300,100,3,6,4,2,1,10,,,5,20,30\n"
                  "Brook_2,South,400,250,100,3,6,4,3,1,10,,,5,20,35\n"
                  "Cliff_1,South,300,100,0,4,8,5,5,1,0,,,4,10,40\n"
                  "Dale_1,North,600,300,100,3,6,4,4,2,10,,,6,30,45\n"
                  "Dale_2,South,600,300,100,3,6,4,4,2,10,,,6,30,50\n"),
    "areas.csv": ("area,load_mw,load_damping_pct_per_hz,min_own_reserve_mw\n"
                  "North,900,1,0\nSouth,700,1,0\n"),
    "links.csv": "link,from_area,to_area,reactance_pu,limit_mw,flow_mw\nNS,North,South,0.1,400,0\n",
    "events.csv": ("event,kind,unit,area,size_mw\ntrip_b1,unit_trip,Brook_1,,\n"
                   "rise_s,load_step,,South,120\ndrop_n,load_step,,North,-80\n"),
}
TABLES = {"units.csv": UNIT_COLS, "areas.csv": AREA_COLS, "links.csv": LINK_COLS,
          "events.csv": EVENT_COLS}
TARGETS = [(file, c) for file, cols in TABLES.items() for c in cols
           if c.kind == "float" and c.name in BASE[file].split("\n", 1)[0].split(",")]
TOML_TARGETS = [(sec, key, k) for sec, keys in _TOML_SCHEMA.items() for key, k in keys.items()
                if k.kind == "num" and sec in ("limits", "droop", "horizon", "")]


def _values(lo: float | None, hi: float | None, lo_open: bool) -> st.SearchStrategy[float]:
    """The edges and their neighbours, and values spread over the range (log-spaced when
    positive, so 1e-3 and 1e6 are both reached)."""
    lo = -1e6 if lo is None else lo
    hi = 1e6 if hi is None else hi
    low = math.nextafter(lo, math.inf) if lo_open else lo
    edges = [low, hi, math.nextafter(hi, -math.inf), 0.0 if lo <= 0 <= hi else low]
    if low > 0:
        spread = st.floats(math.log10(low), math.log10(hi)).map(lambda e: 10.0 ** e)
    else:
        spread = st.floats(low, hi)
    return st.one_of(st.sampled_from(edges), spread).map(lambda v: min(max(v, low), hi))


@st.composite
def in_range_case(draw):
    files = dict(BASE)
    toml = {k: dict(v) if isinstance(v, dict) else v for k, v in SETTINGS.items()}
    for _ in range(draw(st.integers(1, 3))):
        if draw(st.integers(0, 3)) == 0:
            sec, key, k = draw(st.sampled_from(TOML_TARGETS))
            v = draw(_values(k.lo, k.hi, k.lo_open))
            (toml.setdefault(sec, {}) if sec else toml)[key] = v
            files["case.toml"] = toml_text(toml)
            continue
        file, c = draw(st.sampled_from(TARGETS))
        lines = files[file].splitlines()
        r = draw(st.integers(1, len(lines) - 1))
        k = lines[0].split(",").index(c.name)
        cells = lines[r].split(",")
        cells[k] = repr(draw(_values(c.lo, c.hi, c.lo_open)))
        lines[r] = ",".join(cells)
        files[file] = "\n".join(lines) + "\n"
    return files


def _run(args: list[str]) -> tuple[int, str]:
    err = io.StringIO()
    with redirect_stderr(err), redirect_stdout(io.StringIO()):
        rc = main(args)
    return rc, err.getvalue()


def _ends_cleanly(rc: int, err: str) -> None:
    assert rc in (0, 2, 3), err
    assert "unexpected" not in err and "Traceback" not in err, err
    if rc == 2:
        assert all(ln.startswith(("error:", "warning:")) for ln in err.splitlines() if ln), err


def test_base_case_is_feasible(tmp_path):
    """Otherwise the property test below would only ever see exit 3."""
    _write(tmp_path / "case", BASE)
    assert _run(["solve", str(tmp_path / "case"), "--quiet"])[0] == 0


@settings(max_examples=40, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(files=in_range_case())
def test_values_inside_the_bounds_end_with_0_2_or_3(files):
    """check and solve of one to three values drawn inside their bounds."""
    tmp = Path(tempfile.mkdtemp())
    try:
        _write(tmp / "case", files)
        rc_check, err = _run(["check", str(tmp / "case"), "--quiet"])
        _ends_cleanly(rc_check, err)
        rc, err = _run(["solve", str(tmp / "case"), "--quiet"])
        _ends_cleanly(rc, err)
        if rc_check == 2:
            assert rc == 2, err  # the reader decides the same way for both commands
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


@settings(max_examples=40, deadline=None, derandomize=True, database=None)
@given(target=st.sampled_from([t for t in TARGETS if t[1].lo is not None or t[1].hi is not None]),
       above=st.booleans(), row=st.integers(1, 3))
def test_values_just_outside_a_bound_are_input_errors(target, above, row):
    file, c = target
    if (above and c.hi is None) or (not above and c.lo is None):
        above = not above
    edge = c.hi if above else c.lo
    v = (edge * 2 + 1) if above else (math.nextafter(edge, -math.inf) if c.lo_open or edge == 0
                                      else edge - abs(edge) * 0.01 - 1e-12)
    if not above and c.lo_open:
        v = edge  # the open bound itself is outside
    files = dict(BASE)
    lines = files[file].splitlines()
    r = min(row, len(lines) - 1)
    k = lines[0].split(",").index(c.name)
    cells = lines[r].split(",")
    cells[k] = repr(v)
    lines[r] = ",".join(cells)
    files[file] = "\n".join(lines) + "\n"
    tmp = Path(tempfile.mkdtemp())
    try:
        _write(tmp / "case", files)
        rc, err = _run(["check", str(tmp / "case"), "--quiet"])
        assert rc == 2, (c.name, v, err)
        assert f"{file} row {r + 1} column {c.name}" in err, err
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


SERIES_TARGETS = [("units_by_period.csv", "unit", "Dale_1", c) for c in UNIT_COLS
                  if c.per_period and c.kind == "float"] + \
                 [("areas_by_period.csv", "area", "South", c) for c in AREA_COLS
                  if c.per_period and c.kind == "float"] + \
                 [("links_by_period.csv", "link", "NS", c) for c in LINK_COLS
                  if c.per_period and c.kind == "float"]


@settings(max_examples=12, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(target=st.sampled_from(SERIES_TARGETS), data=st.data())
def test_time_series_values_inside_the_bounds_end_with_0_2_or_3(target, data):
    """The same over a two-period horizon: the drawn value overrides one period."""
    file, idc, ident, c = target
    v = data.draw(_values(c.lo, c.hi, c.lo_open))
    files = dict(BASE)
    files[file] = f"period,{idc},{c.name}\n1,{ident},{v!r}\n2,{ident},\n"
    for other, oid, oident in (("units_by_period.csv", "unit", "Dale_1"),
                               ("areas_by_period.csv", "area", "South"),
                               ("links_by_period.csv", "link", "NS")):
        files.setdefault(other, f"period,{oid}\n1,{oident}\n2,{oident}\n")
    tmp = Path(tempfile.mkdtemp())
    try:
        _write(tmp / "case", files)
        _ends_cleanly(*_run(["check", str(tmp / "case"), "--quiet"]))
        _ends_cleanly(*_run(["solve", str(tmp / "case"), "--quiet"]))
    finally:
        shutil.rmtree(tmp, ignore_errors=True)

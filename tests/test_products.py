"""Reserve products (contract version 2, shared/design/case-format.md): `provides` =
true/false/always/up/down. Checked against an independent dense model solved with
scipy.optimize.milp (tests/refmilp.py) and the general law of the settled point
(shared/design/references.md: df = -dP / sum beta, recomputed with tests/refcalc.py)."""

from __future__ import annotations

import numpy as np
import pytest
from conftest import build_case, settings, unit, write_case
from refcalc import settled_deviation
from refmilp import dense_optimum

import optreserve
from optreserve.errors import CaseError

F = 0.2
AREA = [{"area": "Midmarsh", "load_mw": 4000, "load_damping_pct_per_hz": 1.0}]  # D = 40 MW/Hz


def _units():
    return [
        unit("Upton", "Midmarsh", 400, 300, 2, 8, price_up=1.0, min_output_mw=100,
             price_down_per_mw_h=0.1, provides="up"),
        unit("Downby", "Midmarsh", 400, 200, 2, 8, price_up=0.2, min_output_mw=0,
             price_down_per_mw_h=1.0, provides="down"),
        unit("Fullham", "Midmarsh", 500, 500, 2, 8, price_up=0.1, min_output_mw=100,
             price_down_per_mw_h=0.5, provides="true"),
        unit("Keepon", "Midmarsh", 300, 200, 2, 8, price_up=5.0, min_output_mw=50,
             price_down_per_mw_h=5.0, provides="always"),
        unit("Spare", "Midmarsh", 1000, 600, 2, 8, price_up=3.0, min_output_mw=100,
             price_down_per_mw_h=3.0, provides="yes"),
    ]


EVENTS = [{"event": "step_up", "kind": "load_step", "area": "Midmarsh", "size_mw": 300},
          {"event": "step_down", "kind": "load_step", "area": "Midmarsh", "size_mw": -280},
          {"event": "trip_keepon", "kind": "unit_trip", "unit": "Keepon"}]
# by the contract's rules, read off the table by hand: Upton up only, Downby down only,
# Fullham (at full output: no up room) down only, Keepon and Spare both ways
RESP_UP = [True, False, False, True, True]
RESP_DN = [False, True, True, True, True]
ALWAYS = [False, False, False, True, False]


def _reference(case, steps=None):
    u = case.units
    cap, out, mn = (u[c].to_numpy(float) for c in ("capacity_mw", "output_mw", "min_output_mw"))
    return dense_optimum(
        cap, u["droop_min_pct"], u["droop_max_pct"], 50.0, F, F, 40.0, cap - out, out - mn,
        u["price_up_per_mw_h"].to_numpy(float), u["price_down_per_mw_h"].to_numpy(float),
        RESP_UP, RESP_DN, [(300.0, set()), (-280.0, set()), (200.0, {3})], always=ALWAYS,
        steps_pct=steps)


def test_reader_gives_the_agreed_columns(case_dir):
    """Contract v2 'Participation and direction' and RULES.md's agreed representation:
    true -> up & down, always -> up & down + always, up / down -> one way, false -> none."""
    case = build_case(case_dir(), settings(), _units() + [
        unit("Idle", "Midmarsh", 100, 50, provides="false")], AREA, EVENTS)
    u = case.units.set_index("unit")
    want = {"Upton": (1, 0, 1, 0), "Downby": (1, 0, 0, 1), "Fullham": (1, 0, 1, 1),
            "Keepon": (1, 1, 1, 1), "Spare": (1, 0, 1, 1), "Idle": (0, 0, 0, 0)}
    for name, flags in want.items():
        got = tuple(int(u.loc[name, c]) for c in ("provides", "provides_always", "provides_up",
                                                  "provides_down"))
        assert got == flags, name
    assert all(u[c].dtype == bool for c in ("provides", "provides_always", "provides_up",
                                             "provides_down"))


def test_bad_provides_word_names_file_row_and_column(case_dir):
    """RULES.md: bad input gives one line naming file, row and column."""
    units = _units()
    units[2]["provides"] = "sometimes"
    with pytest.raises(CaseError) as err:
        build_case(case_dir(), settings(), units, AREA, EVENTS)
    msg = str(err.value)
    assert "units.csv row 4 column provides" in msg and "sometimes" in msg


def test_period_override_of_provides(case_dir):
    """Contract v1 time series: an override column works like the static one; here `up`
    in one period only (the other keeps the static `true`)."""
    folder = write_case(case_dir(), settings(), _units(), AREA, EVENTS)
    (folder / "units_by_period.csv").write_text(
        "period,unit,provides\n1,Spare,up\n2,Spare,\n")
    case = optreserve.load_case(folder)
    pos = list(case.units["unit"]).index("Spare")
    assert case.unit_matrix("provides_down")[:, pos].tolist() == [False, True]
    assert case.unit_matrix("provides_up")[:, pos].tolist() == [True, True]


@pytest.mark.parametrize("steps", [None, [2.0, 3.0, 4.0, 5.0, 6.0, 8.0]])
def test_one_direction_and_always_on_reach_the_independent_optimum(case_dir, steps):
    """scipy.optimize.milp on the independent dense model (tests/refmilp.py) gives the same
    least cost; the blocked directions hold no headroom, the always-on governor is on though
    it is the dearest, the unit at full output still gives downward response, and every
    settled point equals the general law recomputed by hand-written code (refcalc) with the
    blocked directions' and the tripped unit's gains removed."""
    extra = {"droop": {"steps_pct": steps}} if steps else {}
    case = build_case(case_dir(), settings(limits={"full_activation_deviation_hz": F}, **extra),
                      _units(), AREA, EVENTS)
    ref = _reference(case, steps)
    assert ref is not None
    res = optreserve.solve(case, engine="highspy", mip_gap=1e-9)
    assert res.objective_per_h == pytest.approx(ref[0], rel=1e-6)
    al = res.allocation.set_index("unit").loc[list(case.units["unit"])]
    assert al.loc["Upton", "headroom_down_mw"] == 0.0
    assert al.loc["Downby", "headroom_up_mw"] == 0.0
    assert al.loc["Fullham", "headroom_up_mw"] == 0.0
    assert al.loc["Fullham", "gain_mw_per_hz"] > 0 and al.loc["Fullham", "headroom_down_mw"] > 0
    assert al.loc["Keepon", "gain_mw_per_hz"] >= 300 / (0.08 * 50) - 1e-6
    K = al["gain_mw_per_hz"].to_numpy(float)
    ev = res.events.set_index("event")
    for name, size, lost in (("step_up", 300, {}), ("step_down", -280, {}),
                             ("trip_keepon", 200, {3})):
        mask = np.array(RESP_UP if size > 0 else RESP_DN)
        mask[list(lost)] = False
        r = al["headroom_up_mw" if size > 0 else "headroom_down_mw"].to_numpy(float)
        x = settled_deviation(size, np.where(mask, K, 0.0), np.zeros(5), r, 40.0)
        assert abs(ev.loc[name, "settled_deviation_hz"]) == pytest.approx(x, abs=1e-7)


def test_always_on_with_fixed_droop_is_kept_on_when_not_needed(case_dir):
    """Contract v2: an always-on governor is not a decision; a band with min = max fixes
    its droop. A small event the cheap unit alone covers still finds the dear always-on unit
    on at exactly its droop: gain 300 / (0.04 * 50) = 150 MW/Hz, headroom 150 x 0.2 = 30 MW
    (hand arithmetic)."""
    units = [unit("Cheap", "Midmarsh", 200, 100, 2, 8, price_up=1.0),
             unit("Keepon", "Midmarsh", 300, 200, 4, 4, price_up=5.0, provides="always")]
    case = build_case(case_dir(), settings(), units, AREA,
                      [{"event": "s", "kind": "load_step", "area": "Midmarsh", "size_mw": 50}])
    res = optreserve.solve(case, engine="highspy", mip_gap=1e-9)
    al = res.allocation.set_index("unit")
    assert al.loc["Keepon", "gain_mw_per_hz"] == pytest.approx(150.0)
    assert al.loc["Keepon", "headroom_up_mw"] == pytest.approx(30.0)
    # the cheap unit covers the rest: 50 - 30 - 0.2 x 40 = 12 MW (above its band minimum
    # 200 / (0.08 x 50) x 0.2 = 10 MW)
    assert al.loc["Cheap", "headroom_up_mw"] == pytest.approx(12.0, abs=1e-6)


def test_unit_at_full_output_gives_down_response_with_both_directions(case_dir):
    """The issue's case: with under- and over-frequency events, a unit at full output used
    to be left out entirely. Here only it can cover the over-frequency event (the other
    unit is up-only), so the case is feasible only if it gets downward credit: gain
    (100 - 0.2 x 40) / 0.2 = 460 MW/Hz, down headroom 92 MW (hand arithmetic)."""
    units = [unit("Upper", "Midmarsh", 1000, 500, 2, 8, price_up=1.0, provides="up"),
             unit("Fullon", "Midmarsh", 600, 600, 2, 8, price_up=1.0, min_output_mw=200,
                  price_down_per_mw_h=1.0)]
    case = build_case(case_dir(), settings(), units, AREA,
                      [{"event": "u", "kind": "load_step", "area": "Midmarsh", "size_mw": 100},
                       {"event": "d", "kind": "load_step", "area": "Midmarsh", "size_mw": -100}])
    res = optreserve.solve(case, engine="highspy", mip_gap=1e-9)
    al = res.allocation.set_index("unit")
    assert al.loc["Fullon", "headroom_down_mw"] == pytest.approx(92.0, abs=1e-6)
    assert al.loc["Fullon", "headroom_up_mw"] == 0.0
    assert al.loc["Upper", "headroom_down_mw"] == 0.0
    ev = res.events.set_index("event")
    assert ev.loc["d", "settled_deviation_hz"] == pytest.approx(0.2, abs=1e-7)


# ------------------------------------------------------------------ common-mode trips
def _cm_case(case_dir, nadir=False, **over):
    """Four governors fixed on at 4 % droop on 1000 MW (gain 1000 / (0.04 x 50) = 500 MW/Hz
    each); Ash and Birch share a busbar in Westfold, Cedar is in Westfold too, Dun in
    Eastmere; 2000 MW of load at 1 %/Hz in each area (D = 20 MW/Hz each)."""
    lim = {"full_activation_deviation_hz": 0.5}
    if nadir:
        lim["max_nadir_deviation_hz"] = 3.0
    units = [unit(n, a, 1000, o, 4, 4, price_up=p, provides="always", inertia_s=5.0,
                  activation_time_s=10.0)
             for n, a, o, p in (("Ash", "Westfold", 200, 1), ("Birch", "Westfold", 200, 1),
                                ("Cedar", "Westfold", 600, 2), ("Dun", "Eastmere", 600, 3))]
    areas = [{"area": a, "load_mw": 2000, "load_damping_pct_per_hz": 1.0}
             for a in ("Westfold", "Eastmere")]
    links = [{"link": "W-E", "from_area": "Westfold", "to_area": "Eastmere",
              "reactance_pu": 0.02, "limit_mw": 1000, "flow_mw": 0}]
    events = [{"event": "busbar", "kind": "unit_trip", "unit": "Ash+Birch", **over}]
    return build_case(case_dir(), settings(max_dev=0.5, limits=lim), units, areas, events,
                      links)


def test_common_mode_size_defaults_to_the_sum_of_outputs(case_dir):
    """Contract v2 'Common-mode events': size_mw defaults to the sum of the outputs."""
    case = _cm_case(case_dir)
    ev = case.events.iloc[0]
    assert ev["size_mw"] == 400.0 and ev["area"] == "Westfold"


@pytest.mark.parametrize("nadir", [False, True])
def test_common_mode_settled_point_and_flow_by_hand(case_dir, nadir):
    """General law (shared/design/references.md): df = -dP / sum beta with the lost units'
    gains removed: dP = 200 + 200 = 400 MW, beta = 500 (Cedar) + 500 (Dun) + 20 + 20 =
    1040 MW/Hz -> df = -0.384615 Hz (with only Ash removed it would be -0.2597 Hz, with
    neither -0.196 Hz). Tie flow change dPtie,W = -beta_E dP / sum beta = -520 x 400 / 1040
    = -200 MW (Eastmere sends 200 MW west)."""
    case = _cm_case(case_dir, nadir=nadir)
    res = optreserve.solve(case, engine="highspy", mip_gap=1e-9)
    ev = res.events.set_index("event")
    assert ev.loc["busbar", "settled_deviation_hz"] == pytest.approx(-400 / 1040, abs=1e-9)
    assert ev.loc["busbar", "size_mw"] == 400.0
    fl = res.links.set_index("link")
    assert fl.loc["W-E", "flow_after_mw"] == pytest.approx(-200.0, abs=1e-6)


def test_common_mode_loses_the_inertia_of_all_its_units(case_dir):
    """Nadir rows use the stored energy left after the event: 4 x 5 s x 1000 MW = 20 000 MW s
    online, minus Ash's and Birch's 5000 MW s each = 10 000 MW s (hand arithmetic)."""
    from optreserve.model.horizon import prepare

    hz = prepare(_cm_case(case_dir, nadir=True))
    assert hz.H_sys.tolist() == [10000.0]
    assert sorted(hz.lost[0].nonzero()[1].tolist()) == [0, 1]


def test_common_mode_trip_size_follows_outputs_per_period(case_dir):
    """Contract v1 time series + v2 common-mode: a trip without size_mw follows the lost
    units' outputs in each period: 200 + 200 = 400, then 350 + 200 = 550 MW."""
    case = _cm_case(case_dir)
    (case.path / "units_by_period.csv").write_text("period,unit,output_mw\n1,Ash,200\n"
                                                   "2,Ash,350\n")
    case = optreserve.load_case(case.path)
    assert case.instances()["size_mw"].tolist() == [400.0, 550.0]
    assert [s.events["size_mw"].iloc[0] for s in case.snapshots()] == [400.0, 550.0]


@pytest.mark.parametrize("bad,msg", [("Ash+Nobody", "unknown unit 'Nobody'"),
                                     ("Ash+Ash", "appears twice"),
                                     ("Ash+Dun", "different areas"),
                                     ("Ash+", "empty unit name")])
def test_bad_common_mode_trip_names_file_row_and_column(case_dir, bad, msg):
    """RULES.md: bad input gives one line naming file, row and column."""
    with pytest.raises(CaseError) as err:
        _cm_case(case_dir, unit=bad)
    text = str(err.value)
    assert "events.csv row 2 column unit" in text and msg in text
    assert len(err.value.problems) == 1


@pytest.mark.parametrize("seed", [11, 12, 13])
def test_common_mode_optimum_equals_independent_milp(case_dir, seed):
    """scipy.optimize.milp on the independent dense model (tests/refmilp.py) with the
    common-mode trip losing both units' response: same least cost (random small cases,
    seeded, droop steps)."""
    rng = np.random.default_rng(seed)
    n = 6
    cap = np.round(np.r_[rng.uniform(60, 120, 2), rng.uniform(400, 900, n - 2)])
    out = np.round(cap * rng.uniform(0.4, 0.9, n))
    pu = np.round(rng.uniform(0.5, 5, n), 2)
    units = [unit(f"U{k}", "Midmarsh", float(cap[k]), float(out[k]), 2, 10, price_up=float(pu[k]))
             for k in range(n)]
    steps = [2.0, 3.0, 4.0, 5.0, 6.0, 8.0, 10.0]
    events = [{"event": "cm", "kind": "unit_trip", "unit": "U0+U1"},
              {"event": "s", "kind": "load_step", "area": "Midmarsh", "size_mw": 150}]
    case = build_case(case_dir(), settings(limits={"full_activation_deviation_hz": F},
                                           droop={"steps_pct": steps}), units, AREA, events)
    res = optreserve.solve(case, engine="highspy", mip_gap=1e-9)
    ref = dense_optimum(cap, [2] * n, [10] * n, 50.0, F, F, 40.0, cap - out, out, pu,
                        np.zeros(n), [True] * n, [True] * n,
                        [(float(out[0] + out[1]), {0, 1}), (150.0, set())], steps_pct=steps)
    assert ref is not None
    assert res.objective_per_h == pytest.approx(ref[0], rel=1e-6)


def test_one_direction_flows_match_an_independent_dc_load_flow(case_dir):
    """Aggregates per direction in the flow rows: post-event tie flows of a two-area case
    with one-direction providers equal the tests' own DC load flow (refcalc, numpy lstsq on
    the Laplacian) of the settled responses with the blocked directions removed; the tie
    limit binds, so the rows matter."""
    from refcalc import dc_flows

    units = [unit("Wup", "Westfold", 800, 400, 2, 8, price_up=1.0, provides="up",
                  price_down_per_mw_h=0.1),
             unit("Wdn", "Westfold", 800, 400, 2, 8, price_up=0.1, provides="down",
                  price_down_per_mw_h=1.0),
             unit("Eboth", "Eastmere", 900, 500, 2, 8, price_up=4.0, price_down_per_mw_h=4.0)]
    areas = [{"area": a, "load_mw": 2000, "load_damping_pct_per_hz": 1.0}
             for a in ("Westfold", "Eastmere")]
    links = [{"link": "W-E", "from_area": "Westfold", "to_area": "Eastmere",
              "reactance_pu": 0.02, "limit_mw": 90, "flow_mw": 10}]
    events = [{"event": "e_up", "kind": "load_step", "area": "Eastmere", "size_mw": 200},
              {"event": "e_dn", "kind": "load_step", "area": "Eastmere", "size_mw": -200}]
    case = build_case(case_dir(), settings(), units, areas, events, links)
    res = optreserve.solve(case, engine="highspy", mip_gap=1e-9)
    al = res.allocation.set_index("unit").loc[["Wup", "Wdn", "Eboth"]]
    K = al["gain_mw_per_hz"].to_numpy(float)
    for name, size, mask in (("e_up", 200, [1, 0, 1]), ("e_dn", -200, [0, 1, 1])):
        r = al["headroom_up_mw" if size > 0 else "headroom_down_mw"].to_numpy(float)
        Km = np.where(np.array(mask, bool), K, 0.0)
        x = settled_deviation(size, Km, np.zeros(3), r, 40.0)
        resp = np.minimum(Km * x, r)
        inj = np.array([resp[0] + resp[1] + 20 * x, resp[2] + 20 * x - abs(size)])
        flow = 10 + dc_flows(["Westfold", "Eastmere"], [("Westfold", "Eastmere", 0.02)],
                             np.sign(size) * inj)[0]
        got = res.links.set_index("event").loc[name, "flow_after_mw"]
        assert got == pytest.approx(flow, abs=1e-6)
        assert abs(got) <= 90 + 1e-6
    assert max(abs(res.links["flow_after_mw"])) == pytest.approx(90, abs=1e-4)


# ------------------------------------------------------------------ energy-limited providers
def _battery_case(case_dir, limits=None, **battery):
    """A cheap battery (100 MW, idle, may charge at 100 MW) beside a dear unit; events both
    ways big enough that the battery is used to its limit."""
    units = [unit("Kirn", "Midmarsh", 100, 0, 1, 8, price_up=0.5, min_output_mw=-100,
                  price_down_per_mw_h=0.5, **battery),
             unit("Dear", "Midmarsh", 1000, 500, 2, 8, price_up=4.0, price_down_per_mw_h=4.0)]
    events = [{"event": "u", "kind": "load_step", "area": "Midmarsh", "size_mw": 150},
              {"event": "d", "kind": "load_step", "area": "Midmarsh", "size_mw": -150}]
    return build_case(case_dir(), settings(limits=limits or {}), units, AREA, events)


def test_energy_caps_headroom_by_hand(case_dir):
    """Contract v2 'Energy-limited providers', hand arithmetic: 5 MWh over 15 min sustains
    5 x 60 / 15 = 20 MW up. Without the energy column the battery (band 1-8 %: up to
    100 / (0.01 x 50) = 200 MW/Hz, 40 MW at 0.2 Hz) holds 40 MW; with it 20 MW (gain 100
    MW/Hz). Adding 2.5 MWh down (10 MW) caps the one droop both ways: gain 10 / 0.2 =
    50 MW/Hz (droop 100 / (50 x 50) = 4 %), 10 MW each way."""
    free = optreserve.solve(_battery_case(case_dir), engine="highspy", mip_gap=1e-9)
    assert free.allocation.set_index("unit").loc["Kirn", "headroom_up_mw"] == pytest.approx(40)
    up = optreserve.solve(_battery_case(case_dir, {"min_sustain_minutes": 15}, energy_up_mwh=5),
                          engine="highspy", mip_gap=1e-9)
    al = up.allocation.set_index("unit")
    assert al.loc["Kirn", "headroom_up_mw"] == pytest.approx(20.0, abs=1e-7)
    assert al.loc["Kirn", "gain_mw_per_hz"] == pytest.approx(100.0, abs=1e-6)
    case = _battery_case(case_dir, {"min_sustain_minutes": 15}, energy_up_mwh=5,
                         energy_down_mwh=2.5)
    res = optreserve.solve(case, engine="highspy", mip_gap=1e-9)
    al = res.allocation.set_index("unit")
    assert al.loc["Kirn", "headroom_up_mw"] == pytest.approx(10.0, abs=1e-7)
    assert al.loc["Kirn", "headroom_down_mw"] == pytest.approx(10.0, abs=1e-7)
    assert al.loc["Kirn", "droop_pct"] == pytest.approx(4.0, abs=1e-6)


def test_energy_cap_per_period(case_dir):
    """Contract v1 time series, droop held per period: an energy override for period 2
    (2 MWh: 2 x 60 / 15 = 8 MW) caps that period only; period 1 keeps the static 5 MWh
    (20 MW). Hand arithmetic."""
    folder = write_case(case_dir(), settings(limits={"min_sustain_minutes": 15},
                                             droop={"hold_periods": 1}),
                        [unit("Kirn", "Midmarsh", 100, 0, 1, 8, price_up=0.5,
                              min_output_mw=-100, energy_up_mwh=5),
                         unit("Dear", "Midmarsh", 1000, 500, 2, 8, price_up=4.0)],
                        AREA, [{"event": "u", "kind": "load_step", "area": "Midmarsh",
                                "size_mw": 150}])
    (folder / "units_by_period.csv").write_text("period,unit,energy_up_mwh\n1,Kirn,\n2,Kirn,2\n")
    res = optreserve.solve(optreserve.load_case(folder), engine="highspy", mip_gap=1e-9)
    al = res.allocation.set_index(["unit", "period"])
    assert al.loc[("Kirn", "1"), "headroom_up_mw"] == pytest.approx(20.0, abs=1e-7)
    assert al.loc[("Kirn", "2"), "headroom_up_mw"] == pytest.approx(8.0, abs=1e-7)


def test_energy_column_needs_min_sustain(case_dir):
    """Contract v2: min_sustain_minutes is required when a unit gives an energy column."""
    with pytest.raises(CaseError) as err:
        _battery_case(case_dir, energy_up_mwh=5)
    assert "units.csv row 2 column energy_up_mwh" in str(err.value)
    assert "min_sustain_minutes" in str(err.value)


def test_rule_set_fills_the_sustain_time(case_dir):
    """EU 2017/1485 Art. 156(9)-(11) (memory, shared/design/references.md): CE 15 min; an
    explicit value wins; a set that records none (GB) fills nothing."""
    ce = _battery_case(case_dir, {"rules": "continental-europe"}, energy_up_mwh=5)
    assert ce.limits.min_sustain_minutes == 15.0
    own = _battery_case(case_dir, {"rules": "continental-europe", "min_sustain_minutes": 30},
                        energy_up_mwh=5)
    assert own.limits.min_sustain_minutes == 30.0
    with pytest.raises(CaseError):
        _battery_case(case_dir, {"rules": "great-britain"}, energy_up_mwh=5)


@pytest.mark.parametrize("seed", [21, 22])
def test_energy_limited_optimum_equals_independent_milp(case_dir, seed):
    """scipy.optimize.milp on the independent dense model with each provider's room cut to
    energy x 60 / min_sustain (random small cases, seeded): same least cost."""
    rng = np.random.default_rng(seed)
    n = 5
    cap = np.round(rng.uniform(100, 600, n))
    out = np.round(cap * rng.uniform(0.3, 0.8, n))
    pu, pd_ = np.round(rng.uniform(0.5, 5, n), 2), np.round(rng.uniform(0.5, 5, n), 2)
    e_up, e_dn = np.round(rng.uniform(2, 30, n), 1), np.round(rng.uniform(2, 30, n), 1)
    units = [unit(f"U{k}", "Midmarsh", float(cap[k]), float(out[k]), 2, 10,
                  price_up=float(pu[k]), price_down_per_mw_h=float(pd_[k]),
                  energy_up_mwh=float(e_up[k]), energy_down_mwh=float(e_dn[k]))
             for k in range(n)]
    events = [{"event": "u", "kind": "load_step", "area": "Midmarsh", "size_mw": 120},
              {"event": "d", "kind": "load_step", "area": "Midmarsh", "size_mw": -100}]
    case = build_case(case_dir(), settings(limits={"min_sustain_minutes": 20}), units, AREA,
                      events)
    res = optreserve.solve(case, engine="highspy", mip_gap=1e-9)
    ref = dense_optimum(cap, [2] * n, [10] * n, 50.0, F, F, 40.0,
                        np.minimum(cap - out, e_up * 3), np.minimum(out, e_dn * 3), pu, pd_,
                        [True] * n, [True] * n, [(120.0, set()), (-100.0, set())])
    assert ref is not None
    assert res.objective_per_h == pytest.approx(ref[0], rel=1e-6)
    al = res.allocation.set_index("unit")
    assert (al["headroom_up_mw"].to_numpy() <= e_up * 3 + 1e-7).all()

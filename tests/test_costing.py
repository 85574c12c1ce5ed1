"""Prices for analysts (prices.csv) and the uniform-droop comparison.

Every price is checked against a central finite difference of the optimal cost (envelope
theorem: the derivative of the optimal value of an LP in a right-hand side is the row's dual,
wherever the optimum stays on one linear piece) and against hand arithmetic. The uniform-droop
case is checked by hand with the textbook steady-state law (shared/design/references.md:
delta f = dP / sum beta, tie flow = beta_exporter * delta f).
"""

from __future__ import annotations

import json

import pandas as pd
import pytest
from conftest import build_case, csv_text, settings, unit, write_case

import optreserve
from optreserve.cli import main
from optreserve.studies.compare import compare_uniform


def solve(case):
    return optreserve.solve(case, engine="highspy", mip_gap=1e-9)


def cost(case):
    r = solve(case)
    return r.objective_total if case.is_horizon else r.objective_per_h


# ------------------------------------------------------------------ own-reserve price
def import_case(folder, own_mw=0.0, dP=300.0):
    """Two areas, no damping, F = 0.2 Hz, F_act = 0.25 Hz, continuous droop. Lowmarsh imports
    over a 200 MW link and has only a dear provider (up price 10); Highcombe's provider is
    cheap (2). A 300 MW load step in Lowmarsh. Without an own-reserve requirement the link
    binds: Highcombe gives beta_B = 200/0.2 = 1000 MW/Hz, Lowmarsh beta_A = 500 MW/Hz."""
    units = [unit("Lowmarsh_Dear", "Lowmarsh", 1000, 700, 2, 12, price_up=10),
             unit("Highcombe_Cheap", "Highcombe", 2000, 1500, 2, 12, price_up=2)]
    areas = [{"area": "Lowmarsh", "load_mw": 2000, "min_own_reserve_mw": own_mw},
             {"area": "Highcombe", "load_mw": 2000}]
    links = [{"link": "Combe-Marsh", "from_area": "Highcombe", "to_area": "Lowmarsh",
              "reactance_pu": 0.02, "limit_mw": 200.0}]
    events = [{"event": "loss", "kind": "load_step", "area": "Lowmarsh", "size_mw": dP}]
    return build_case(folder, settings(limits={"full_activation_deviation_hz": 0.25}), units,
                      areas, events, links)


def test_reserve_price_is_the_own_reserve_dual_and_matches_finite_difference(case_dir):
    """Lowmarsh must hold 150 MW of up headroom (the link case holds 0.25 * 500 = 125 MW
    there). The cheapest way to one more MW is to move gain from Highcombe to Lowmarsh: +4
    MW/Hz in Lowmarsh, -4 MW/Hz in Highcombe keeps the settled row (4 * 0.2 MW each way) and
    shifts 1 MW of headroom, costing 10 - 2 = 8 per MW per hour (hand arithmetic). The
    central finite difference of the optimal cost in min_own_reserve_mw must agree, and so
    must reserve_price_per_mw_h."""
    h = 2.0
    fd = (cost(import_case(case_dir(), 150 + h)) - cost(import_case(case_dir(), 150 - h))) / (2 * h)
    assert fd == pytest.approx(8.0, rel=1e-6)
    prices = solve(import_case(case_dir(), 150.0)).prices.set_index("area")
    assert prices.loc["Lowmarsh", "reserve_price_per_mw_h"] == pytest.approx(fd, rel=1e-5)
    # no requirement in Highcombe: 0 by definition (the issue: "0 otherwise")
    assert prices.loc["Highcombe", "reserve_price_per_mw_h"] == 0.0


def test_reserve_price_is_per_hour_of_its_period(case_dir):
    """Horizon of two half-hour periods, one droop block; Lowmarsh needs 150 MW in the first
    period only. Moving gain now costs in both periods (the gain is shared by the block):
    (10 - 2) * (0.5 + 0.5) = 8 per MW, while holding 1 MW more on Lowmarsh_Dear in the first
    period alone costs 10 * 0.5 = 5. So d objective_total / d requirement = 5 (hand
    arithmetic, checked by finite difference), which is 10 per MW per hour of that period."""
    def case(req):
        folder = write_case(case_dir(), settings(limits={"full_activation_deviation_hz": 0.25},
                                                 horizon={"period_hours": 0.5}),
                            [unit("Lowmarsh_Dear", "Lowmarsh", 1000, 700, 2, 12, price_up=10),
                             unit("Highcombe_Cheap", "Highcombe", 2000, 1500, 2, 12,
                                  price_up=2)],
                            [{"area": "Lowmarsh", "load_mw": 2000},
                             {"area": "Highcombe", "load_mw": 2000}],
                            [{"event": "loss", "kind": "load_step", "area": "Lowmarsh",
                              "size_mw": 300.0}],
                            [{"link": "Combe-Marsh", "from_area": "Highcombe",
                              "to_area": "Lowmarsh", "reactance_pu": 0.02, "limit_mw": 200.0}])
        (folder / "areas_by_period.csv").write_text(csv_text([
            {"period": 0, "area": "Lowmarsh", "min_own_reserve_mw": req},
            {"period": 1, "area": "Lowmarsh", "min_own_reserve_mw": 0}]))
        return optreserve.load_case(folder)

    h = 2.0
    fd = (cost(case(150 + h)) - cost(case(150 - h))) / (2 * h)
    assert fd == pytest.approx(10 * 0.5, rel=1e-6)
    pr = solve(case(150.0)).prices
    row0 = pr[(pr["area"] == "Lowmarsh") & (pr["period"] == "0")].iloc[0]
    row1 = pr[(pr["area"] == "Lowmarsh") & (pr["period"] == "1")].iloc[0]
    assert row0["reserve_price_per_mw_h"] == pytest.approx(fd / 0.5, rel=1e-5)
    assert row1["reserve_price_per_mw_h"] == 0.0


# ------------------------------------------------------------------ next MW of up headroom
def one_area_case(folder, own_mw=0.0):
    """One area, no damping, F = F_act = 0.2 Hz, a 100 MW load step. Cheapford (price 2) has
    80 MW of room, so at most K = 400 MW/Hz (80 MW at 0.2 Hz): it cannot cover 100 MW alone.
    Dearholm (price 5) must take part; its lowest gain is 2000/(10 % * 50) = 400 MW/Hz, i.e.
    80 MW. Cheapford then backs off to its lowest gain 100 MW/Hz (20 MW): cost 80*5 + 20*2."""
    units = [unit("Cheapford", "Nordale", 500, 420, 2, 10, price_up=2),
             unit("Dearholm", "Nordale", 2000, 1500, 2, 10, price_up=5)]
    areas = [{"area": "Nordale", "load_mw": 5000, "min_own_reserve_mw": own_mw}]
    events = [{"event": "big", "kind": "load_step", "area": "Nordale", "size_mw": 100.0}]
    return build_case(folder, settings(), units, areas, events)


def test_next_mw_up_cost_is_the_cheapest_provider_with_room(case_dir):
    """Hand arithmetic: the optimum costs 80*5 + 20*2 = 440 per hour and holds 100 MW up.
    Asking for 100 + h MW in the area (finite difference in min_own_reserve_mw) costs 2 per
    MW more: Cheapford still has 60 MW of room. The column must say 2 and name Cheapford."""
    base = solve(one_area_case(case_dir()))
    assert base.objective_per_h == pytest.approx(440.0, rel=1e-6)
    held = base.allocation["headroom_up_mw"].sum()
    assert held == pytest.approx(100.0, rel=1e-6)
    h = 2.0
    fd = (cost(one_area_case(case_dir(), held + h)) - base.objective_per_h) / h
    p = base.prices.set_index("area").loc["Nordale"]
    assert fd == pytest.approx(2.0, rel=1e-5)
    assert p["next_mw_up_cost_per_mw_h"] == pytest.approx(fd, rel=1e-5)
    assert p["next_mw_up_unit"] == "Cheapford"


def test_next_mw_up_cost_bounds_the_reoptimised_cost_from_above(case_dir):
    """Documented relation (formulation.md, Prices for analysts): next_mw_up_cost holds the
    gains fixed, so it is an upper bound of the re-optimised marginal cost. In the import case
    the only Lowmarsh provider costs 10 per MW (the column), while re-optimising (finite
    difference of the requirement above the 125 MW held) moves gain from Highcombe for
    10 - 2 = 8 (hand arithmetic)."""
    base = solve(import_case(case_dir()))
    p = base.prices.set_index("area")
    assert p.loc["Lowmarsh", "next_mw_up_cost_per_mw_h"] == pytest.approx(10.0)
    held = base.allocation.groupby("area")["headroom_up_mw"].sum()["Lowmarsh"]
    assert held == pytest.approx(0.25 * 500, rel=1e-6)
    h = 2.0
    fd = (cost(import_case(case_dir(), held + h)) - base.objective_per_h) / h
    assert fd == pytest.approx(8.0, rel=1e-5)
    assert fd < p.loc["Lowmarsh", "next_mw_up_cost_per_mw_h"]


def test_prices_csv_is_written_with_the_result(case_dir, tmp_path):
    folder = write_case(case_dir(), settings(),
                        [unit("Cheapford", "Nordale", 500, 420, 2, 10, price_up=2)],
                        [{"area": "Nordale", "load_mw": 5000}],
                        [{"event": "big", "kind": "load_step", "area": "Nordale",
                          "size_mw": 50.0}])
    out = tmp_path / "out"
    assert main(["solve", str(folder), "--out", str(out), "--quiet"]) == 0
    text = (out / "prices.csv").read_text().splitlines()
    # contract v2 adds the re-solved reserve price (blank: this area has no requirement)
    assert text[0] == ("area,reserve_price_per_mw_h,next_mw_up_cost_per_mw_h,next_mw_up_unit,"
                       "reserve_incremental_cost_per_mw_h")
    assert text[1].startswith("Nordale,0.000000,2.000000,Cheapford")


# ------------------------------------------------------------------ uniform droop
def uniform_case(folder):
    """Aldmere (exporter) and Brookfell (importer), one unit each, no damping, 50 Hz,
    F = F_act = 0.2 Hz; link Aldmere -> Brookfell, no pre-event flow, limit 80 MW; a 150 MW
    load step in Brookfell. Bands: Aldmere 4-6 %, Brookfell 2-6 %, so one shared droop lies
    in [4, 6] %."""
    units = [unit("Aldmere_1", "Aldmere", 1000, 600, 4, 6, price_up=3),
             unit("Brookfell_1", "Brookfell", 500, 200, 2, 6, price_up=1)]
    areas = [{"area": "Aldmere", "load_mw": 3000}, {"area": "Brookfell", "load_mw": 3000}]
    links = [{"link": "Ald-Brook", "from_area": "Aldmere", "to_area": "Brookfell",
              "reactance_pu": 0.05, "limit_mw": 80.0}]
    events = [{"event": "step", "kind": "load_step", "area": "Brookfell", "size_mw": 150.0}]
    return build_case(folder, settings(), units, areas, events, links)


def test_uniform_droop_breaks_a_link_the_optimum_respects(case_dir):
    """Hand check (textbook law, references.md): with one droop s, K = P/(s/100 * 50), so
    K_A = 2000/s and K_B = 1000/s; the settled deviation 150 / (3000/s) = 0.05 s Hz meets
    0.2 Hz only at s = 4 %. Aldmere then gives 2/3 of the response whatever s is: 100 MW over
    the link against its 80 MW limit. Uniform cost 0.2*(3*500 + 1*250) = 350 per hour.
    The optimum keeps Aldmere at its lowest gain 1000/(6/100 * 50) = 333.33 MW/Hz, Brookfell
    at 750 - 333.33 = 416.67 MW/Hz: flow 150 * 333.33/750 = 66.67 MW, cost
    0.2*(3*333.33 + 416.67) = 283.33; saving 66.67 per hour."""
    case = uniform_case(case_dir())
    result = solve(case)
    cmp = compare_uniform(case, result)
    assert cmp.uniform_droop_pct == pytest.approx(4.0)
    v = cmp.violations
    assert list(v["limit"]) == ["link"]
    assert v.iloc[0]["element"] == "Ald-Brook"
    assert v.iloc[0]["value"] == pytest.approx(100.0, rel=1e-6)
    s = cmp.summary.set_index("policy")
    assert s.loc["uniform", "cost_per_h"] == pytest.approx(350.0, rel=1e-9)
    assert s.loc["optimum", "cost_per_h"] == pytest.approx(0.2 * (3 * 1000 / 3 + 1250 / 3),
                                                           rel=1e-6)
    assert s.loc["optimum", "saving"] == pytest.approx(350.0 - 850.0 / 3, rel=1e-6)
    # the optimum respects the link (independent recalculation inside solve)
    assert result.links["flow_after_mw"].abs().max() == pytest.approx(200.0 / 3, rel=1e-6)
    assert result.links["flow_after_mw"].abs().max() <= 80.0
    # the uniform allocation: K = P / (s/100 * f_n) at s = 4 %
    ua = cmp.allocation.set_index("unit")
    assert ua.loc["Aldmere_1", "gain_mw_per_hz"] == pytest.approx(500.0)
    assert ua.loc["Brookfell_1", "gain_mw_per_hz"] == pytest.approx(250.0)


def test_uniform_is_one_droop_for_all_and_today_is_reported_apart(case_dir, tmp_path):
    """Both units have droop_now_pct = 5 %, F_act = 0.3 Hz (headroom sized at 0.3 Hz, nothing
    saturates). Textbook law (references.md): one droop s on both gives K = 3000/s MW/Hz and
    a deviation of 150/(3000/s) = 0.05 s Hz, inside 0.2 Hz only for s <= 4 %; Aldmere carries
    2/3 of the response at any s: 100 MW over the 80 MW link. So the uniform policy is 4 % on
    both (one broken limit, the link), cost 0.3 * (3*500 + 1*250) = 525. Today's 5 % is its
    own row: K = 400 + 200 = 600 MW/Hz, deviation 0.25 Hz and the link, two broken limits,
    cost 0.3 * (3*400 + 1*200) = 420, the same today retune starts from."""
    units = [unit("Aldmere_1", "Aldmere", 1000, 600, 4, 6, price_up=3, droop_now_pct=5),
             unit("Brookfell_1", "Brookfell", 500, 200, 2, 6, price_up=1, droop_now_pct=5)]
    folder = write_case(case_dir(), settings(limits={"full_activation_deviation_hz": 0.3}),
                        units,
                        [{"area": "Aldmere", "load_mw": 3000},
                         {"area": "Brookfell", "load_mw": 3000}],
                        [{"event": "step", "kind": "load_step", "area": "Brookfell",
                          "size_mw": 150.0}],
                        [{"link": "Ald-Brook", "from_area": "Aldmere", "to_area": "Brookfell",
                          "reactance_pu": 0.05, "limit_mw": 80.0}])
    out = tmp_path / "out"
    assert main(["solve", str(folder), "--out", str(out), "--compare", "uniform",
                 "--quiet"]) == 0
    doc = json.loads((out / "comparison.json").read_text())
    assert doc["uniform_droop_pct"] == pytest.approx(4.0)
    got = {(v["limit"], v["element"]): v["value"] for v in doc["violations"]}
    assert set(got) == {("link", "Ald-Brook")}
    assert got[("link", "Ald-Brook")] == pytest.approx(100.0, rel=1e-9)
    assert doc["uniform_cost"] == pytest.approx(0.3 * (3 * 500 + 250), rel=1e-9)
    today = {(v["limit"], v["element"]): v["value"] for v in doc["today"]["violations"]}
    assert today[("settled_deviation", "step")] == pytest.approx(0.25, rel=1e-9)
    assert today[("link", "Ald-Brook")] == pytest.approx(100.0, rel=1e-9)
    assert doc["today"]["cost"] == pytest.approx(0.3 * (3 * 400 + 200), rel=1e-9)
    assert "caution" in doc
    rows = pd.read_csv(out / "comparison.csv").set_index("policy")
    assert list(rows.index) == ["uniform", "today", "optimum"]
    assert rows.loc["today", "cost_per_h"] == pytest.approx(0.3 * (3 * 400 + 200))
    # the same "today" as retune's before: its violations name the same two limits
    from optreserve.model.horizon import prepare
    from optreserve.studies.retune import today as retune_today
    from optreserve.studies.retune import violations

    case = optreserve.load_case(folder)
    hz = prepare(case)
    now = retune_today(case, hz)
    words = violations(case, hz, now.gain, now.r_up, now.r_dn, 0.2)
    assert len(words) == 2 and words[0].startswith("event step") and "Ald-Brook" in words[1]


def test_uniform_comparison_over_a_horizon(case_dir):
    """The uniform case over two half-hour periods, Aldmere's up price 3 then 6 (one droop
    block). Hand arithmetic as above: uniform s = 4 % in both periods breaks the link twice;
    cost 0.5 * 0.2 * (3*500 + 250) + 0.5 * 0.2 * (6*500 + 250) = 500. The optimum keeps
    Aldmere at 333.33 MW/Hz and Brookfell at 416.67 MW/Hz in both periods:
    0.5 * 0.2 * (3*333.33 + 416.67) + 0.5 * 0.2 * (6*333.33 + 416.67) = 383.33."""
    folder = write_case(case_dir(), settings(horizon={"period_hours": 0.5}),
                        [unit("Aldmere_1", "Aldmere", 1000, 600, 4, 6, price_up=3),
                         unit("Brookfell_1", "Brookfell", 500, 200, 2, 6, price_up=1)],
                        [{"area": "Aldmere", "load_mw": 3000},
                         {"area": "Brookfell", "load_mw": 3000}],
                        [{"event": "step", "kind": "load_step", "area": "Brookfell",
                          "size_mw": 150.0}],
                        [{"link": "Ald-Brook", "from_area": "Aldmere", "to_area": "Brookfell",
                          "reactance_pu": 0.05, "limit_mw": 80.0}])
    (folder / "units_by_period.csv").write_text(csv_text([
        {"period": 0, "unit": "Aldmere_1", "price_up_per_mw_h": 3},
        {"period": 1, "unit": "Aldmere_1", "price_up_per_mw_h": 6}]))
    case = optreserve.load_case(folder)
    cmp = compare_uniform(case, solve(case))
    s = cmp.summary.set_index("policy")
    assert s.loc["uniform", "cost_total"] == pytest.approx(500.0, rel=1e-9)
    assert s.loc["optimum", "cost_total"] == pytest.approx(0.1 * (9 * 1000 / 3 + 2 * 1250 / 3),
                                                           rel=1e-6)
    v = cmp.violations
    assert list(zip(v["limit"], v["period"])) == [("link", "0"), ("link", "1")]
    assert list(cmp.allocation["period"]) == ["0", "0", "1", "1"]

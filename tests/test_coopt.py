"""Energy-reserve co-optimisation ([energy] co_optimise = true).

Outside references: merit-order hand arithmetic (stated per test) and finite differences of
the optimal cost (the definition of a marginal price)."""

from __future__ import annotations

import pytest
from conftest import settings, write_case

import optreserve


def _trio(folder, load=1000.0, step=40.0, co=True):
    """One area, no load self-regulation, F = F_act = 0.2 Hz. Energy prices 20 / 50 / 80,
    400 MW each; Dear_C may not carry reserve. Merit order for 1000 MW: A 400, B 400, C 200.
    A 40 MW step needs 40 MW of headroom (r = 0.2 K, K >= 40/0.2). Holding it on B costs its
    price 1 plus the energy it must give up to C (80 - 50 = 30): 31 per MW; on A 1 + 60 = 61.
    So B holds 40 MW, runs at 360, C at 240: energy 8000 + 18000 + 19200 = 45200, reserve 40,
    total 45240 per hour. One more MW of event: 31 per MW·h. Energy price: C's 80."""
    extra = {"energy": {"co_optimise": co}}
    return optreserve.load_case(write_case(
        folder, settings(**extra),
        [{"unit": "Cheap_A", "area": "Vale", "capacity_mw": 400, "output_mw": 400,
          "droop_min_pct": 2, "droop_max_pct": 10, "price_up_per_mw_h": 1,
          "energy_price_per_mwh": 20},
         {"unit": "Mid_B", "area": "Vale", "capacity_mw": 400, "output_mw": 400,
          "droop_min_pct": 2, "droop_max_pct": 10, "price_up_per_mw_h": 1,
          "energy_price_per_mwh": 50},
         {"unit": "Dear_C", "area": "Vale", "capacity_mw": 400, "output_mw": 200,
          "droop_min_pct": 2, "droop_max_pct": 10, "provides": False,
          "energy_price_per_mwh": 80}],
        [{"area": "Vale", "load_mw": load}],
        [{"event": "step", "kind": "load_step", "area": "Vale", "size_mw": step}]))


def test_headroom_competes_with_energy(tmp_path):
    res = optreserve.solve(_trio(tmp_path / "c"))
    a = res.allocation.set_index("unit")
    assert a.loc["Mid_B", "output_mw"] == pytest.approx(360.0, abs=1e-5)
    assert a.loc["Dear_C", "output_mw"] == pytest.approx(240.0, abs=1e-5)
    assert a.loc["Mid_B", "headroom_up_mw"] == pytest.approx(40.0, abs=1e-5)
    assert res.objective_per_h == pytest.approx(45240.0, rel=1e-7)
    assert res.energy_cost == pytest.approx(45200.0, rel=1e-7)
    assert res.reserve_cost == pytest.approx(40.0, rel=1e-6)


def test_reserve_price_includes_the_opportunity_cost(tmp_path):
    """Event price 31 per MW·h (hand arithmetic above), equal to the finite difference of the
    optimal cost in the event size."""
    res = optreserve.solve(_trio(tmp_path / "c"))
    price = float(res.events["marginal_cost_per_mw_h"].iloc[0])
    assert price == pytest.approx(31.0, rel=1e-6)
    up = optreserve.solve(_trio(tmp_path / "u", step=41.0)).objective_per_h
    dn = optreserve.solve(_trio(tmp_path / "d", step=39.0)).objective_per_h
    assert (up - dn) / 2.0 == pytest.approx(price, rel=1e-6)


def test_energy_price_is_the_marginal_cost_of_demand(tmp_path):
    """Energy price 80 (Dear_C is marginal), equal to the finite difference in the load."""
    res = optreserve.solve(_trio(tmp_path / "c"))
    ep = res.extra_files["energy_prices.csv"]
    assert float(ep["energy_price_per_mwh"].iloc[0]) == pytest.approx(80.0, rel=1e-6)
    up = optreserve.solve(_trio(tmp_path / "u", load=1001.0)).objective_per_h
    dn = optreserve.solve(_trio(tmp_path / "d", load=999.0)).objective_per_h
    assert (up - dn) / 2.0 == pytest.approx(80.0, rel=1e-6)


def test_without_co_optimisation_outputs_stay_as_given(tmp_path):
    """co_optimise = false: outputs are the case's (A 400, B 400: no room; C 200 may not
    provide), so no unit can hold headroom and the 40 MW step cannot be met: exit 3."""
    with pytest.raises(optreserve.InfeasibleError):
        optreserve.solve(_trio(tmp_path / "c", co=False))


def _two_areas(folder, load_east=600.0):
    """West: Brisk_W 600 MW at 20 (energy), East: Slow_E 600 MW at 60, East load 600 (West
    load 0), one 300 MW link (x = 0.1). Cheapest dispatch sends 300 MW west->east (link at
    its limit) and East makes the rest: energy price West 20, East 60 (finite differences).
    A 20 MW step in East: either unit can hold it (headroom prices 0 and 0.5); holding it in
    West would push the post-event flow above the limit, so Slow_E holds it - at least its
    lowest gain 600/(0.10*50) = 120 MW/Hz, i.e. 24 MW of headroom, settling at 20/120 Hz."""
    return optreserve.load_case(write_case(
        folder, settings(energy={"co_optimise": True}),
        [{"unit": "Brisk_W", "area": "West", "capacity_mw": 600, "output_mw": 300,
          "droop_min_pct": 2, "droop_max_pct": 10, "price_up_per_mw_h": 0.0,
          "energy_price_per_mwh": 20},
         {"unit": "Slow_E", "area": "East", "capacity_mw": 600, "output_mw": 300,
          "droop_min_pct": 2, "droop_max_pct": 10, "price_up_per_mw_h": 0.5,
          "energy_price_per_mwh": 60}],
        [{"area": "West", "load_mw": 0}, {"area": "East", "load_mw": load_east}],
        [{"event": "east_step", "kind": "load_step", "area": "East", "size_mw": 20}],
        [{"link": "WE", "from_area": "West", "to_area": "East", "reactance_pu": 0.1,
          "limit_mw": 300}]))


def test_congested_link_splits_area_prices_and_flows_stay_exact(tmp_path):
    res = optreserve.solve(_two_areas(tmp_path / "c"))
    a = res.allocation.set_index("unit")
    assert a.loc["Brisk_W", "output_mw"] == pytest.approx(300.0, abs=1e-5)
    assert a.loc["Slow_E", "headroom_up_mw"] == pytest.approx(24.0, abs=1e-5)
    assert a.loc["Brisk_W", "gain_mw_per_hz"] == 0.0
    assert res.events["settled_deviation_hz"].iloc[0] == pytest.approx(-20 / 120, rel=1e-7)
    lk = res.links.iloc[0]
    assert lk["flow_before_mw"] == pytest.approx(300.0, abs=1e-5)
    assert abs(lk["flow_after_mw"]) <= 300.0 + 1e-3
    ep = res.extra_files["energy_prices.csv"].set_index("area")["energy_price_per_mwh"]
    up = optreserve.solve(_two_areas(tmp_path / "u", load_east=601.0)).objective_per_h
    dn = optreserve.solve(_two_areas(tmp_path / "d", load_east=599.0)).objective_per_h
    assert ep["East"] == pytest.approx((up - dn) / 2.0, rel=1e-6)
    assert ep["East"] == pytest.approx(60.0, rel=1e-6)

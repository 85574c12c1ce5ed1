"""Marginal cost of event size (events.csv marginal_cost_per_mw_h) against a central finite
difference of the optimal cost with respect to that event's size (envelope theorem: the
derivative of the optimal value of a smooth LP in a parameter), and against hand arithmetic."""

from __future__ import annotations

import pytest
from conftest import build_case, settings, unit

import optreserve


def price_case(folder, size_mw, *, f_act=0.25, second=None, link_limit=None):
    """Continuous droop, no steps, clear-cut participation: the cheap unit sits at its
    headroom-limited maximum gain, the dear unit is strictly inside its band and is the
    marginal provider; one load step in Nordale (optionally a second, smaller event and a
    link to a neighbouring area with a dearer unit)."""
    units = [unit("Cheapford", "Nordale", 500, 420, 2, 10, price_up=2),
             unit("Dearholm", "Nordale", 2000, 1500, 2, 10, price_up=5)]
    areas = [{"area": "Nordale", "load_mw": 5000, "load_damping_pct_per_hz": 1.0}]
    links = None
    if link_limit is not None:
        units.append(unit("Southby_Gen", "Southby", 1500, 1000, 2, 10, price_up=9))
        areas.append({"area": "Southby", "load_mw": 2000, "load_damping_pct_per_hz": 1.0})
        links = [{"link": "N-S", "from_area": "Nordale", "to_area": "Southby",
                  "reactance_pu": 0.03, "limit_mw": link_limit}]
    events = [{"event": "big", "kind": "load_step", "area": "Nordale", "size_mw": size_mw}]
    if second is not None:
        events.append(second)
    return build_case(folder, settings(limits={"full_activation_deviation_hz": f_act}), units,
                      areas, events, links)


def cost(case):
    return optreserve.solve(case, engine="highspy", mip_gap=1e-9).objective_per_h


def price(case, event):
    res = optreserve.solve(case, engine="highspy", mip_gap=1e-9)
    return float(res.events.set_index("event").loc[event, "marginal_cost_per_mw_h"])


@pytest.mark.parametrize("f_act", [0.2, 0.25])
def test_binding_event_price_equals_finite_difference(case_dir, f_act):
    """Central finite difference (h = 2 MW) of the optimal cost w.r.t. the binding event's
    size; also hand arithmetic: one more MW needs 1/F more MW/Hz from the dear unit, which
    holds F_act/F MW more headroom at price 5 -> 5 * F_act / 0.2 per MW per hour."""
    h = 2.0
    p = price(price_case(case_dir(), 400.0, f_act=f_act), "big")
    fd = (cost(price_case(case_dir(), 400.0 + h, f_act=f_act))
          - cost(price_case(case_dir(), 400.0 - h, f_act=f_act))) / (2 * h)
    assert fd == pytest.approx(5 * f_act / 0.2, rel=1e-6)
    assert p == pytest.approx(fd, rel=1e-6)


def test_slack_event_has_zero_price(case_dir):
    """Envelope theorem: an event whose frequency row does not bind can grow a little at no
    cost; its marginal cost is zero (finite difference confirms), the binding one's is not."""
    small = {"event": "small", "kind": "load_step", "area": "Nordale", "size_mw": 150.0}
    res = optreserve.solve(price_case(case_dir(), 400.0, second=small), engine="highspy")
    ev = res.events.set_index("event")
    assert not ev.loc["small", "binding"]
    assert ev.loc["small", "marginal_cost_per_mw_h"] == pytest.approx(0.0, abs=1e-9)
    assert ev.loc["big", "marginal_cost_per_mw_h"] > 0
    bumped = dict(small, size_mw=152.0)
    assert cost(price_case(case_dir(), 400.0, second=bumped)) == pytest.approx(res.objective_per_h,
                                                                               rel=1e-9)


def test_over_frequency_event_price_is_positive_and_matches(case_dir):
    """Sign convention: a bigger surplus (more negative size) costs more, so the marginal
    cost of the over-frequency event's size magnitude is positive and equals the finite
    difference in |size| (down headroom at price_down 3 on the marginal unit: 3 * F_act/F)."""
    def case(mag):
        units = [unit("Ebb_A", "Ebbmoor", 800, 600, 2, 10, price_up=0,
                      price_down_per_mw_h=1, min_output_mw=560),
                 unit("Ebb_B", "Ebbmoor", 2000, 1500, 2, 10, price_up=0,
                      price_down_per_mw_h=3, min_output_mw=500)]
        return build_case(case_dir(), settings(limits={"full_activation_deviation_hz": 0.25}),
                          units, [{"area": "Ebbmoor", "load_mw": 4000,
                                   "load_damping_pct_per_hz": 1.0}],
                          [{"event": "surplus", "kind": "load_step", "area": "Ebbmoor",
                            "size_mw": -mag}])
    p = price(case(300.0), "surplus")
    fd = (cost(case(302.0)) - cost(case(298.0))) / 4.0
    assert fd == pytest.approx(3 * 0.25 / 0.2, rel=1e-6)
    assert p == pytest.approx(fd, rel=1e-6)


def test_price_with_link_present_but_not_binding(case_dir):
    """Same finite-difference check with a second area and a link whose limit is far away:
    the link must not change the marginal cost of the event (no flow row binds)."""
    p = price(price_case(case_dir(), 400.0, link_limit=5000.0), "big")
    fd = (cost(price_case(case_dir(), 402.0, link_limit=5000.0))
          - cost(price_case(case_dir(), 398.0, link_limit=5000.0))) / 4.0
    assert p == pytest.approx(fd, rel=1e-6)


def test_price_when_a_link_binds_is_the_marginal_cost_of_event_size(case_dir):
    """The contract calls the column the cost per MW of event size per hour. When a tie-line
    limit binds as well, the flow rows depend on the event size too. Hand arithmetic on a
    two-area case (importing area with a dear unit at price 10, exporter with a cheap one at 2,
    no damping, F = 0.2, F_act = 0.25, link limit L = 200 MW): with beta_B = L/F and
    beta_A = (dP - L)/F the cost is 0.25 (10 (dP - L) + 2 L)/0.2, so d cost / d dP =
    0.25 * 10 / 0.2 = 12.5 per MW per hour; the finite difference must agree."""
    def case(dP):
        units = [unit("Lowmarsh_Dear", "Lowmarsh", 1000, 700, 2, 12, price_up=10),
                 unit("Highcombe_Cheap", "Highcombe", 2000, 1500, 2, 12, price_up=2)]
        areas = [{"area": "Lowmarsh", "load_mw": 2000}, {"area": "Highcombe", "load_mw": 2000}]
        links = [{"link": "Combe-Marsh", "from_area": "Highcombe", "to_area": "Lowmarsh",
                  "reactance_pu": 0.02, "limit_mw": 200.0}]
        return build_case(case_dir(), settings(limits={"full_activation_deviation_hz": 0.25}),
                          units, areas,
                          [{"event": "loss", "kind": "load_step", "area": "Lowmarsh",
                            "size_mw": dP}], links)
    fd = (cost(case(302.0)) - cost(case(298.0))) / 4.0
    assert fd == pytest.approx(12.5, rel=1e-6)
    assert price(case(300.0), "loss") == pytest.approx(fd, rel=1e-6)

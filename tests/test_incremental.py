"""Prices on droop-step cases (contract v2 'Prices on cases with droop steps'):
incremental_cost_per_mw_h against an independent dense model re-solved at the grown size with
scipy.optimize.milp (tests/refmilp.py, the outside reference optimiser); the fixed-step
marginal price left blank where no row of the event is tight; the CLI flags and table."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from conftest import build_case, settings, unit
from refmilp import dense_optimum

import optreserve
from optreserve.cli import main

F = 0.2
STEPS = [2.0, 3.0, 4.0, 5.0, 6.0, 8.0, 10.0]


def step_case(folder, seed, own=0.0):
    """Random small single-area case with droop steps, seeded: 6 units, a trip of the first
    (a small one), an under- and an over-frequency load step."""
    rng = np.random.default_rng(seed)
    n = 6
    cap = np.round(np.r_[rng.uniform(120, 250), rng.uniform(400, 900, n - 1)])
    out = np.round(cap * rng.uniform(0.4, 0.8, n))
    pu, pd_ = np.round(rng.uniform(0.5, 6, n), 2), np.round(rng.uniform(0.5, 6, n), 2)
    units = [unit(f"U{k}", "Midmarsh", float(cap[k]), float(out[k]), 2, 10,
                  price_up=float(pu[k]), price_down_per_mw_h=float(pd_[k])) for k in range(n)]
    big = 0
    up, dn = float(np.round(rng.uniform(100, 250))), float(np.round(rng.uniform(80, 200)))
    events = [{"event": "trip", "kind": "unit_trip", "unit": f"U{big}"},
              {"event": "rise", "kind": "load_step", "area": "Midmarsh", "size_mw": up},
              {"event": "drop", "kind": "load_step", "area": "Midmarsh", "size_mw": -dn}]
    area = [{"area": "Midmarsh", "load_mw": 4000, "load_damping_pct_per_hz": 1.0,
             "min_own_reserve_mw": own}]
    case = build_case(folder, settings(limits={"full_activation_deviation_hz": F},
                                       droop={"steps_pct": STEPS}), units, area, events)
    spec = {"cap": cap, "out": out, "pu": pu, "pd": pd_, "big": big,
            "sizes": [float(out[big]), up, -dn]}
    return case, spec


def reference_cost(spec, grow=None, by=0.0, own=0.0):
    """Independent optimum (D = 4000 x 1 % = 40 MW/Hz), event `grow` grown by `by` MW."""
    sizes = list(spec["sizes"])
    if grow is not None:
        sizes[grow] += by if sizes[grow] > 0 else -by
    lost = [{spec["big"]}, set(), set()]
    cap, out = spec["cap"], spec["out"]
    n = len(cap)
    ref = dense_optimum(cap, [2] * n, [10] * n, 50.0, F, F, 40.0, cap - out, out, spec["pu"],
                        spec["pd"], [True] * n, [True] * n, list(zip(sizes, lost)),
                        steps_pct=STEPS, own_mw=own)
    return None if ref is None else ref[0]


@pytest.mark.parametrize("seed", [32, 36, 42, 54, 58])
def test_incremental_cost_equals_independent_resolve(case_dir, seed):
    """(cost at dP + step - cost at dP) / step from scipy.optimize.milp on the independent
    model, step = max(1 MW, 1 % of the event) (contract v2); within 1e-4 relative."""
    case, spec = step_case(case_dir(), seed)
    res = optreserve.solve(case, engine="highspy", mip_gap=1e-9, incremental=True)
    base = reference_cost(spec)
    assert base is not None
    got = res.events.set_index("event")["incremental_cost_per_mw_h"]
    nonzero = 0
    for k, name in enumerate(("trip", "rise", "drop")):
        step = max(1.0, 0.01 * abs(spec["sizes"][k]))
        want = (reference_cost(spec, k, step) - base) / step
        assert got[name] == pytest.approx(want, rel=1e-4, abs=1e-6), name
        nonzero += want > 1e-6
    assert nonzero >= 1  # the check sees a price, not only zeros


def test_price_step_flag_and_reserve_incremental(case_dir):
    """A given --price-step (5 MW) and the own-reserve requirement: the area's
    reserve_incremental_cost_per_mw_h equals the independent re-solve with the requirement
    grown by 5 MW (scipy.optimize.milp)."""
    case, spec = step_case(case_dir(), 35, own=300.0)
    res = optreserve.solve(case, engine="highspy", mip_gap=1e-9, incremental=True,
                           price_step=5.0)
    base = reference_cost(spec, own=300.0)
    want_r = (reference_cost(spec, own=305.0) - base) / 5.0
    assert want_r > 0
    assert res.prices["reserve_incremental_cost_per_mw_h"].iloc[0] == pytest.approx(
        want_r, rel=1e-4, abs=1e-6)
    want_e = (reference_cost(spec, 1, 5.0, own=300.0) - base) / 5.0
    assert res.events.set_index("event").loc["rise", "incremental_cost_per_mw_h"] == \
        pytest.approx(want_e, rel=1e-4, abs=1e-6)


def test_marginal_price_blank_where_no_row_is_tight(case_dir):
    """Contract v2: with the droop steps fixed, an event none of whose rows is tight gets a
    blank marginal cost, not 0; a slack event is also one whose settled deviation is inside
    the limit (independent recalculation in the events table)."""
    case, _ = step_case(case_dir(), 31)
    res = optreserve.solve(case, engine="highspy", mip_gap=1e-9)
    ev = res.events
    assert "incremental_cost_per_mw_h" not in ev.columns  # not asked for
    slack = (ev["limit_hz"] - ev["settled_deviation_hz"].abs()) > 1e-6
    assert slack.any()
    assert ev.loc[slack, "marginal_cost_per_mw_h"].isna().all()


def test_cli_writes_both_prices_and_says_which_is_which(case_dir, tmp_path, capsys):
    """The events.csv columns (docs/case-format.md) and the terminal legend; NaN is written
    as an empty cell; --no-incremental leaves the column out."""
    case, _ = step_case(case_dir(), 32)
    out = tmp_path / "res"
    assert main(["solve", str(case.path), "--out", str(out), "--price-step", "2"]) == 0
    text = capsys.readouterr().out
    assert "incremental /MW/h" in text and "marginal /MW/h" in text
    assert "no row of that event is tight" in text
    ev = pd.read_csv(out / "events.csv", keep_default_na=False)
    assert list(ev.columns[-2:]) == ["marginal_cost_per_mw_h", "incremental_cost_per_mw_h"]
    assert (ev["marginal_cost_per_mw_h"] == "").any()
    out2 = tmp_path / "res2"
    assert main(["solve", str(case.path), "--out", str(out2), "--no-incremental",
                 "--quiet"]) == 0
    assert "incremental_cost_per_mw_h" not in pd.read_csv(out2 / "events.csv").columns


@pytest.mark.parametrize("step,want", [(None, 0.0), (5.0, 4.0)])
def test_worked_example_of_formulation_md(case_dir, step, want):
    """docs/formulation.md section 12a, hand arithmetic: steps 4 and 5 % on 500 MW (250 and
    200 MW/Hz: 50 and 40 MW at 0.2 Hz), price 2, a 38 MW step: met at 5 %, cost 80, slack
    row, blank marginal price; +1 MW still fits (0); +5 MW needs 4 %: (100 - 80) / 5 = 4.
    Continuous droop: tight row, marginal price 2."""
    units = [unit("Solo", "Midmarsh", 500, 250, 2, 12, price_up=2.0)]
    area = [{"area": "Midmarsh", "load_mw": 1000}]
    ev = [{"event": "s", "kind": "load_step", "area": "Midmarsh", "size_mw": 38}]
    case = build_case(case_dir(), settings(droop={"steps_pct": [4.0, 5.0]}), units, area, ev)
    res = optreserve.solve(case, engine="highspy", mip_gap=1e-9, incremental=True,
                           price_step=step)
    assert res.objective_per_h == pytest.approx(80.0, rel=1e-9)
    row = res.events.iloc[0]
    assert np.isnan(row["marginal_cost_per_mw_h"])
    assert row["incremental_cost_per_mw_h"] == pytest.approx(want, abs=1e-6)
    cont = optreserve.solve(build_case(case_dir(), settings(), units, area, ev),
                            engine="highspy", mip_gap=1e-9)
    assert cont.events.iloc[0]["marginal_cost_per_mw_h"] == pytest.approx(2.0, rel=1e-5)


def test_horizon_incremental_is_per_hour_of_the_period(case_dir):
    """Contract v1: costs weigh each period by its hours (objective_total); the incremental
    cost is per MW and hour of the event's period. Two half-hour periods with the droop held
    per period are two independent snapshots, so each instance's incremental cost equals the
    snapshot's from the independent scipy.optimize.milp re-solve."""
    case, spec = step_case(case_dir(), 42)
    folder = case.path
    toml = (folder / "case.toml").read_text().replace(
        "[droop]", "[horizon]\nperiod_hours = 0.5\n\n[droop]\nhold_periods = 1")
    (folder / "case.toml").write_text(toml)
    (folder / "units_by_period.csv").write_text("period,unit,output_mw\n1,U1,\n2,U1,\n")
    res = optreserve.solve(optreserve.load_case(folder), engine="highspy", mip_gap=1e-9,
                           incremental=True)
    base = reference_cost(spec)
    got = res.events.set_index(["event", "period"])["incremental_cost_per_mw_h"]
    for k, name in enumerate(("trip", "rise", "drop")):
        step = max(1.0, 0.01 * abs(spec["sizes"][k]))
        want = (reference_cost(spec, k, step) - base) / step
        for period in ("1", "2"):
            assert got[(name, period)] == pytest.approx(want, rel=1e-4, abs=1e-6)


def test_bad_price_step_is_an_input_error(case_dir, tmp_path, capsys):
    """RULES.md: bad input exits 2 and writes nothing."""
    case, _ = step_case(case_dir(), 32)
    out = tmp_path / "res"
    assert main(["solve", str(case.path), "--out", str(out), "--price-step", "0"]) == 2
    assert "--price-step" in capsys.readouterr().err
    assert not out.exists()

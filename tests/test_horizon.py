"""Day-ahead horizons: droop fixed over the day (or per block) with per-period headroom.

Outside references: hand arithmetic stated in each docstring (power balance at the settled
point, |df| = dP / sum K with no dead bands or load self-regulation), scipy.optimize.milp as an
independent MILP solver, and LP-relaxation bounds (a relaxation can never cost more than the
integer problem: general optimisation theory).
"""

from __future__ import annotations

import filecmp

import numpy as np
import pytest
from conftest import csv_text, settings, write_case

import optreserve
from optreserve.model.build import build_model
from optreserve.studies.generate import Spec, generate


def _three_period_case(folder, hold=None):
    """Single area, no load self-regulation, no dead bands, F = F_act = 0.2 Hz, 1 h periods.

    Hillock_A: 1000 MW, band 4-12 % (gain 2000/s: 166.7..500 MW/Hz), headroom 1 per MW·h,
    available all day. Tarn_B: 500 MW, band 2-8 % (gain 1000/s: 125..500 MW/Hz), 2.5 per
    MW·h, available in period 2 only. Load steps of 40, 80, 40 MW need 200, 400, 200 MW/Hz
    (dP / 0.2), i.e. headroom 0.2 * K.
    Per-period droop: A alone each period, K = 200, 400, 200 -> headroom 40 + 80 + 40 at 1 =
      160 in total.
    Day-fixed droop: A at 400 all day costs 3 * 80 = 240; A at 200 all day (10 %) plus B at
      200 (5 %, only counts in period 2) costs 3 * 40 * 1 + 40 * 2.5 = 220; shifting a MW/Hz
      from B to A adds 3 * 0.2 - 0.2 * 2.5 = +0.1, so 220 is the optimum."""
    extra = {"droop": {"hold_periods": hold}} if hold else {}
    folder = write_case(
        folder, settings(**extra),
        [{"unit": "Hillock_A", "area": "Vale", "capacity_mw": 1000, "output_mw": 500,
          "droop_min_pct": 4, "droop_max_pct": 12, "price_up_per_mw_h": 1.0},
         {"unit": "Tarn_B", "area": "Vale", "capacity_mw": 500, "output_mw": 200,
          "droop_min_pct": 2, "droop_max_pct": 8, "price_up_per_mw_h": 2.5}],
        [{"area": "Vale", "load_mw": 3000}],
        [{"event": "step", "kind": "load_step", "area": "Vale", "size_mw": 40, "period": 1},
         {"event": "step_peak", "kind": "load_step", "area": "Vale", "size_mw": 80,
          "period": 2},
         {"event": "step_late", "kind": "load_step", "area": "Vale", "size_mw": 40,
          "period": 3}])
    (folder / "units_by_period.csv").write_text(csv_text(
        [{"period": p, "unit": "Tarn_B", "provides": p == 2} for p in (1, 2, 3)]))
    return optreserve.load_case(folder)


def _droop(res, unit, period):
    a = res.allocation
    return float(a[(a["unit"] == unit) & (a["period"] == str(period))]["droop_pct"].iloc[0])


def test_day_fixed_droop_costs_more_than_per_period_droop(tmp_path):
    """Hand-checkable totals in _three_period_case: 220 day-fixed, 160 per period."""
    fixed = optreserve.solve(_three_period_case(tmp_path / "fixed"))
    free = optreserve.solve(_three_period_case(tmp_path / "free", hold=1))
    assert fixed.objective_total == pytest.approx(220.0, rel=1e-6)
    assert free.objective_total == pytest.approx(160.0, rel=1e-6)
    assert fixed.objective_per_h is None  # a horizon reports a total
    # day-fixed: one setting per unit for the whole day
    assert [_droop(fixed, "Hillock_A", p) for p in (1, 2, 3)] == [pytest.approx(10.0)] * 3
    assert _droop(fixed, "Tarn_B", 2) == pytest.approx(5.0)
    # per period: A moves 10 % -> 5 % -> 10 %
    assert [_droop(free, "Hillock_A", p) for p in (1, 2, 3)] == [
        pytest.approx(10.0), pytest.approx(5.0), pytest.approx(10.0)]
    # every event settles exactly at the limit in both (the balance: dP / sum K = 0.2 Hz)
    for res in (fixed, free):
        assert np.allclose(res.events["settled_deviation_hz"], -0.2, atol=1e-7)


def test_unavailable_provider_gives_no_response_in_that_period(tmp_path):
    """Tarn_B holds a day-fixed gain but provides only in period 2: in periods 1 and 3 it
    reports no gain and no headroom, and the settled points there come from Hillock_A alone
    (40 MW / 200 MW/Hz = 0.2 Hz)."""
    res = optreserve.solve(_three_period_case(tmp_path / "c"))
    a = res.allocation.set_index(["unit", "period"])
    for p in ("1", "3"):
        assert a.loc[("Tarn_B", p), "gain_mw_per_hz"] == 0.0
        assert a.loc[("Tarn_B", p), "headroom_up_mw"] == 0.0
        assert not a.loc[("Tarn_B", p), "provides"]
    assert a.loc[("Tarn_B", "2"), "gain_mw_per_hz"] == pytest.approx(200.0, rel=1e-6)


def test_blocks_of_periods_share_a_droop(tmp_path):
    """hold_periods = 2 on three periods: blocks {1, 2} and {3}. Block 1 is the day-fixed
    problem of periods 1-2 (A at 200 + B at 200 in period 2 costs 2*40 + 100 = 180 against A
    at 400 for 2*80 = 160: A at 400 wins); block 2 is period 3 alone (A at 200: 40).
    Total 200."""
    res = optreserve.solve(_three_period_case(tmp_path / "b", hold=2))
    assert res.objective_total == pytest.approx(200.0, rel=1e-6)
    assert _droop(res, "Hillock_A", 1) == _droop(res, "Hillock_A", 2) == pytest.approx(5.0)
    assert _droop(res, "Hillock_A", 3) == pytest.approx(10.0)


def test_period_length_weights_the_total(tmp_path):
    """[horizon] period_hours = 0.25 (quarter hours): the same allocation, a quarter of the
    cost (220 / 4 = 55)."""
    case = _three_period_case(tmp_path / "q")
    toml = (tmp_path / "q" / "case.toml").read_text() + "\n[horizon]\nperiod_hours = 0.25\n"
    (tmp_path / "q" / "case.toml").write_text(toml)
    case = optreserve.load_case(tmp_path / "q")
    assert optreserve.solve(case).objective_total == pytest.approx(55.0, rel=1e-6)


def test_timestamps_give_their_own_spacing(tmp_path):
    """ISO-8601 periods 30 minutes apart: each period lasts 0.5 h (the last one repeats the
    previous spacing), so the day-fixed total is 220 / 2 = 110."""
    folder = tmp_path / "ts"
    _three_period_case(folder)
    stamps = {1: "2026-03-02T06:00", 2: "2026-03-02T06:30", 3: "2026-03-02T07:00"}
    for name in ("events.csv", "units_by_period.csv"):
        text = (folder / name).read_text()
        lines = text.splitlines()
        out = [lines[0]]
        for ln in lines[1:]:
            cells = ln.split(",")
            k = lines[0].split(",").index("period")
            cells[k] = stamps[int(cells[k])]
            out.append(",".join(cells))
        (folder / name).write_text("\n".join(out) + "\n")
    case = optreserve.load_case(folder)
    assert case.period_hours == (0.5, 0.5, 0.5)
    assert optreserve.solve(case).objective_total == pytest.approx(110.0, rel=1e-6)


def test_lp_relaxation_never_costs_more_than_the_milp(tmp_path):
    """A relaxation enlarges the feasible set, so its optimum is a lower bound (optimisation
    theory). Checked on generated days with discrete droop steps."""
    for seed in (3, 4):
        generate(Spec(units=25, areas=3, links=3, periods=4, events=3, seed=seed),
                 tmp_path / f"g{seed}")
        case = optreserve.load_case(tmp_path / f"g{seed}")
        milp = optreserve.solve(case, mip_gap=0.0)
        relaxed = optreserve.solve(case, relax=True)
        assert relaxed.objective_total <= milp.objective_total * (1 + 1e-7) + 1e-6
        assert relaxed.status.endswith("relaxed")


def test_horizon_milp_matches_scipy_milp(tmp_path):
    """scipy.optimize.milp (HiGHS inside scipy, an independent build and interface) on the
    same program reaches the same optimal objective as optreserve's own solve path."""
    from scipy.optimize import Bounds, LinearConstraint, milp

    generate(Spec(units=12, areas=2, links=1, periods=3, events=2, seed=7), tmp_path / "g")
    case = optreserve.load_case(tmp_path / "g")
    lp, _ = build_model(case)
    ref = milp(c=lp.cost, constraints=LinearConstraint(lp.A, lp.row_lo, lp.row_hi),
               integrality=lp.integer.astype(int), bounds=Bounds(lp.col_lo, lp.col_hi),
               options={"mip_rel_gap": 0.0})
    assert ref.status == 0
    from optreserve.solver.backends import solve_highs

    ours = solve_highs(lp, mip_gap=0.0)
    assert ours.objective == pytest.approx(ref.fun, rel=1e-6, abs=1e-6)


def test_both_emitters_agree_on_a_horizon(tmp_path):
    """One formulation, two emitters: the Pyomo model and the bulk highspy load reach the same
    optimum on a multi-period case with dead bands and links."""
    generate(Spec(units=15, areas=3, links=3, periods=3, events=3, seed=11), tmp_path / "g")
    case = optreserve.load_case(tmp_path / "g")
    a = optreserve.solve(case, engine="pyomo", mip_gap=0.0)
    b = optreserve.solve(case, engine="highspy", mip_gap=0.0)
    assert a.objective_total == pytest.approx(b.objective_total, rel=1e-6)


def test_generated_cases_validate_and_repeat_for_a_seed(tmp_path):
    """The generator's promise: the same files for the same seed, a different case for another
    seed, and every generated case passes validation and has a feasible allocation."""
    spec = Spec(units=30, areas=3, links=4, periods=6, events=4, seed=5)
    a = generate(spec, tmp_path / "a")
    b = generate(spec, tmp_path / "b")
    c = generate(Spec(units=30, areas=3, links=4, periods=6, events=4, seed=6), tmp_path / "c")
    names = sorted(p.name for p in a.iterdir())
    assert names == sorted(p.name for p in b.iterdir())
    match, mismatch, errors = filecmp.cmpfiles(a, b, names, shallow=False)
    assert mismatch == [] and errors == []
    assert not filecmp.cmp(a / "units.csv", c / "units.csv", shallow=False)
    case = optreserve.load_case(a)
    assert case.n_periods == 6 and len(case.units) == 30 and len(case.links) == 4
    res = optreserve.solve(case)
    assert res.status in ("optimal", "time_limit")


def test_horizon_outputs_carry_periods(tmp_path):
    """Contract: allocation, events and links gain a period column; schedule_wide.csv has one
    row per unit and direction and one column per period."""
    res = optreserve.solve(_three_period_case(tmp_path / "c"))
    out = res.write(tmp_path / "out")
    import pandas as pd

    for name in ("allocation.csv", "events.csv"):
        assert "period" in pd.read_csv(out / name).columns
    wide = pd.read_csv(out / "schedule_wide.csv")
    assert list(wide.columns) == ["unit", "direction", "1", "2", "3"]
    assert len(wide) == 4
    up = wide[(wide["unit"] == "Hillock_A") & (wide["direction"] == "up")]
    assert up[["1", "2", "3"]].to_numpy().ravel() == pytest.approx([40.0, 40.0, 40.0])

"""Separable horizons solved block by block (solver/blocks.py), Parquet time series, and the
generator's realistic event sizes and multi-day horizons.

Outside references: scipy.optimize.milp / linprog (an independent HiGHS build behind another
interface) on the whole-horizon program; the decomposition argument itself is linear
programming theory (a program that is a direct sum of independent blocks has as optimum the
sum of the block optima); the EU System Operation Guideline 2017/1485 (CE reference incident
3000 MW, Art. 153(2)(b)(i)) and the CE planning figure of 1 %/Hz load self-regulation (from
memory) for the generator's proportions."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import Bounds, LinearConstraint, linprog, milp

import optreserve
from optreserve.errors import CaseError
from optreserve.model.build import TIE_BREAK_PER_MW_H, build_model
from optreserve.solver.blocks import block_cases, separable
from optreserve.studies.generate import REFERENCE_CAP_MW, Spec, generate


def _case(tmp_path, deadbands=True, hold=2, penalty=3.0, seed=5, periods=6):
    folder = generate(Spec(units=14, areas=2, links=1, periods=periods, events=3, seed=seed,
                           hold_periods=hold), tmp_path / f"g{seed}")
    if not deadbands:  # no dead band: no settled-point guess, one pass (a plain MILP)
        u = pd.read_csv(folder / "units.csv")
        u["deadband_mhz"] = 0.0
        u.to_csv(folder / "units.csv", index=False, lineterminator="\n")
    if penalty:
        toml = (folder / "case.toml").read_text()
        (folder / "case.toml").write_text(toml.replace(
            "[droop]\n", f"[droop]\nchange_penalty_per_unit = {penalty}\n"))
    return optreserve.load_case(folder)


def _tables_equal(a, b):
    for name in ("allocation", "events", "links", "prices"):
        pd.testing.assert_frame_equal(getattr(a, name), getattr(b, name), rtol=1e-6,
                                      atol=1e-6, obj=name)


def test_blocks_equal_the_whole_horizon_and_scipy_milp(tmp_path):
    """Direct-sum argument (LP theory): with no row shared between droop blocks, solving the
    blocks apart gives the whole horizon's optimum. Reference optimum: scipy.optimize.milp on
    the whole-horizon program (gap 0); the merged tables equal one whole-horizon solve."""
    case = _case(tmp_path, deadbands=False, seed=7)
    assert separable(case) and len(block_cases(case)) == 3
    lp, _ = build_model(case)
    ref = milp(c=lp.cost, constraints=LinearConstraint(lp.A, lp.row_lo, lp.row_hi),
               integrality=lp.integer.astype(int), bounds=Bounds(lp.col_lo, lp.col_hi),
               options={"mip_rel_gap": 0.0})
    assert ref.status == 0
    blocks = optreserve.solve(case, mip_gap=0.0)
    whole = optreserve.solve(case, mip_gap=0.0, blocks=False)
    # the program's objective carries the tie-break price on headroom and the change penalty
    a = blocks.allocation
    tie = TIE_BREAK_PER_MW_H * float(((a["headroom_up_mw"] + a["headroom_down_mw"]) * np.repeat(
        case.hours(), len(case.units))).sum())
    assert blocks.objective_total + blocks.change_penalty_total + tie == pytest.approx(
        ref.fun, rel=1e-7, abs=1e-6)
    assert blocks.objective_total == pytest.approx(whole.objective_total, rel=1e-9)
    _tables_equal(blocks, whole)


def test_blocks_with_dead_bands_lp_relaxation_equal_scipy_linprog(tmp_path):
    """With dead bands the settled-point fixed point runs per block; the LP relaxation is
    unique in cost, so blocks and whole must agree exactly, and the converged whole-horizon LP
    (rebuilt at the reported settled deviations) has scipy.optimize.linprog's optimum."""
    case = _case(tmp_path, deadbands=True, seed=6, penalty=0.0)  # relaxed change counts: none
    blocks = optreserve.solve(case, relax=True)
    whole = optreserve.solve(case, relax=True, blocks=False)
    assert blocks.objective_total == pytest.approx(whole.objective_total, rel=1e-9)
    _tables_equal(blocks, whole)
    x_hat = np.abs(blocks.events["settled_deviation_hz"].to_numpy(float))
    lp, _ = build_model(case, x_hat=x_hat, relax=True)
    ref = linprog(lp.cost, bounds=list(zip(lp.col_lo, lp.col_hi)),
                  **_rows_for_linprog(lp))
    assert ref.status == 0
    a = blocks.allocation
    tie = TIE_BREAK_PER_MW_H * float(((a["headroom_up_mw"] + a["headroom_down_mw"]) * np.repeat(
        case.hours(), len(case.units))).sum())
    assert blocks.objective_total + blocks.change_penalty_total + tie == pytest.approx(
        ref.fun, rel=1e-6, abs=1e-6)


def _rows_for_linprog(lp):
    """lo <= A x <= hi as linprog's A_ub / A_eq."""
    import scipy.sparse as sp

    A = sp.csr_matrix(lp.A)
    eq = np.isclose(lp.row_lo, lp.row_hi)
    up = ~eq & np.isfinite(lp.row_hi)
    lo = ~eq & np.isfinite(lp.row_lo)
    A_ub = sp.vstack([A[up], -A[lo]])
    b_ub = np.r_[lp.row_hi[up], -lp.row_lo[lo]]
    return {"A_ub": A_ub, "b_ub": b_ub, "A_eq": A[eq], "b_eq": lp.row_lo[eq],
            "method": "highs"}


def test_blocks_on_two_dask_workers_merge_in_period_order(tmp_path):
    """The same blocks on a Dask LocalCluster of 2 processes give the same tables as one
    process (the merge is in period order whatever finishes first); reference: the serial
    block solve, itself checked against scipy above."""
    case = _case(tmp_path, deadbands=False, seed=12, periods=8)
    serial = optreserve.solve(case, mip_gap=0.0)
    dask = optreserve.solve(case, mip_gap=0.0, workers=2)
    assert dask.objective_total == pytest.approx(serial.objective_total, rel=1e-9)
    _tables_equal(serial, dask)
    assert list(dask.allocation["period"].drop_duplicates()) == list(case.periods)


def test_not_separable_without_blocks_or_with_extend(tmp_path):
    """Whole horizons and studies that add rows (extend=) are never split: the condition of
    the direct-sum argument is that nothing links the blocks."""
    case = _case(tmp_path, hold=None, penalty=0.0)
    assert not separable(case)
    held = _case(tmp_path, seed=8)
    assert separable(held) and not separable(held, extend=lambda lp, info: None)


def test_parquet_series_read_like_csv_and_errors_name_file_row_column(tmp_path):
    """A *_by_period.parquet holds the same table as the CSV: the same per-period matrices;
    a bad cell is a CaseError naming the file, the row (numbered as in the CSV form) and the
    column (the case-format contract's error rule)."""
    case = _case(tmp_path, seed=9)
    folder = case.path
    pq = tmp_path / "pq"
    pq.mkdir()
    for f in folder.iterdir():
        (pq / f.name).write_bytes(f.read_bytes())
    ub = pd.read_csv(folder / "units_by_period.csv", dtype={"period": str})
    ub.to_parquet(pq / "units_by_period.parquet", index=False)
    (pq / "units_by_period.csv").unlink()
    other = optreserve.load_case(pq)
    for col in ("output_mw", "min_output_mw", "provides", "price_up_per_mw_h"):
        assert np.array_equal(case.unit_matrix(col), other.unit_matrix(col)), col
    bad = ub.copy()
    bad.loc[4, "output_mw"] = -5.0e9  # below the unit's minimum output and capacity checks
    bad["provides"] = bad["provides"].astype(str)
    bad.loc[2, "provides"] = "perhaps"
    bad.to_parquet(pq / "units_by_period.parquet", index=False)
    with pytest.raises(CaseError) as err:
        optreserve.load_case(pq)
    text = str(err.value)
    assert "units_by_period.parquet" in text and "provides" in text
    p = next(p for p in err.value.problems if p.column == "provides")
    assert p.row == 2 + 2  # record 3 of the table, after the header row
    (pq / "units_by_period.csv").write_bytes((folder / "units_by_period.csv").read_bytes())
    with pytest.raises(CaseError, match="keep one of them"):
        optreserve.load_case(pq)


@pytest.mark.parametrize("units,areas,links", [(300, 5, 8), (2000, 30, 45)])
def test_generated_events_outgrow_load_self_regulation(tmp_path, units, areas, links):
    """Every generated size needs reserve from providers: the largest event exceeds what load
    self-regulation alone settles at the 0.2 Hz limit, sum_a D_a * 0.2 Hz. The reference
    incident follows the system (2 % of peak, capped at the CE 3000 MW of EU 2017/1485 Art.
    153(2)(b)(i)); load damping stays within 1-2 %/Hz (CE planning 1 %/Hz, from memory)."""
    folder = generate(Spec(units=units, areas=areas, links=links, periods=4, seed=2),
                      tmp_path / "g")
    case = optreserve.load_case(folder)
    damp = case.area_matrix("load_mw") * case.area_matrix("load_damping_pct_per_hz") / 100.0
    covered = 0.2 * damp.sum(axis=1).max()
    inst = case.instances()
    assert inst["size_mw"].abs().max() > 1.5 * covered
    assert case.areas["load_damping_pct_per_hz"].between(1.0, 2.0).all()
    peak = case.area_matrix("load_mw").sum(axis=1).max()
    steps = case.events.loc[case.events["kind"] == "load_step", "size_mw"].abs()
    assert steps.max() == pytest.approx(min(REFERENCE_CAP_MW, 0.02 * peak), abs=1.0) or (
        steps.max() > min(REFERENCE_CAP_MW, 0.02 * peak))


def test_small_generated_multi_day_case_needs_reserve_and_holds_droop_per_day(tmp_path):
    """--days with droop per day: a two-day horizon of 8 periods a day, solved block by block,
    costs something and chooses providers on both days (reserve is needed; see the damping
    check above), and the droop is constant within each day (the hold_periods contract)."""
    folder = generate(Spec(units=20, areas=2, links=1, periods=8, events=3, seed=4, days=2,
                           hold_periods=8), tmp_path / "g")
    case = optreserve.load_case(folder)
    assert case.n_periods == 16 and case.hold_periods == 8
    res = optreserve.solve(case)
    assert res.objective_total > 0
    a = res.allocation.assign(day=lambda d: d["period"].str[:10])
    assert (a.groupby("day")["provides"].sum() > 0).all()
    per_day = a.groupby(["day", "unit"])["droop_pct"].nunique(dropna=True)
    assert (per_day <= 1).all()

"""Sweeps and batches: grid handling, infeasible and failing points, bad --vary input, and the
distributed table against the serial one on a real 2-process Dask LocalCluster (loopback).

Costs are checked by hand: one area, no damping, F = F_act = 0.2 Hz, one provider at price
2 per MW h; the settled row sum K (F - d) >= dP with d = 0 needs exactly dP MW of headroom
(formulation.md section 3 and the textbook law delta f = dP / sum K), so cost = 2 * dP.
"""

from __future__ import annotations

import json

import pytest
from conftest import settings, unit, write_case

import optreserve
from optreserve.cli import main
from optreserve.studies.sweep import SweepError, parse_vary, run_batch, run_sweep


def small_case(folder, size=80.0, price=2.0):
    """Stennmoor: one provider, capacity 500 MW at 300 MW, droop 2-10 %: at most
    K = 500/(2/100 * 50) = 500 MW/Hz, i.e. 100 MW at 0.2 Hz. Events above 100 MW cannot be
    met (no damping)."""
    return write_case(folder, settings(),
                      [unit("Stenn_1", "Stennmoor", 500, 300, 2, 10, price_up=price)],
                      [{"area": "Stennmoor", "load_mw": 4000}],
                      [{"event": "step", "kind": "load_step", "area": "Stennmoor",
                        "size_mw": size}])


def test_sweep_marks_infeasible_points_and_costs_match_hand(case_dir):
    case = optreserve.load_case(small_case(case_dir()))
    table = run_sweep(case, [parse_vary("event:step.size_mw=60:140:20", case)])
    assert list(table["event:step.size_mw"]) == [60.0, 80.0, 100.0, 120.0, 140.0]
    assert list(table["status"]) == ["optimal"] * 3 + ["infeasible"] * 2
    feasible = table[table["status"] == "optimal"]
    assert list(feasible["objective_per_h"]) == pytest.approx([120.0, 160.0, 200.0], rel=1e-6)
    assert table.loc[table["status"] == "infeasible", "objective_per_h"].isna().all()
    # the settled row binds at every feasible point: price = 2 (one MW more needs one MW
    # more headroom at price 2, formulation.md section 12)
    assert list(feasible["marginal_cost_per_mw_h:step"]) == pytest.approx([2.0] * 3, rel=1e-5)
    assert all(feasible["binding_events"] == "step")


def test_two_keys_make_a_grid_first_key_slowest(case_dir):
    case = optreserve.load_case(small_case(case_dir()))
    table = run_sweep(case, [parse_vary("event:step.size_mw=40,80"),
                             parse_vary("price_scale=1:3:1")])
    assert list(zip(table["event:step.size_mw"], table["price_scale"])) == [
        (40, 1), (40, 2), (40, 3), (80, 1), (80, 2), (80, 3)]
    # hand: cost = 2 * scale * size
    assert list(table["objective_per_h"]) == pytest.approx(
        [80, 160, 240, 160, 320, 480], rel=1e-6)


def test_a_failing_point_is_recorded_and_the_rest_go_on(case_dir, monkeypatch):
    """A point whose solve raises an unexpected error becomes a row with status 'error' and
    the error text; the other points are solved."""
    import sys

    solve_mod = sys.modules["optreserve.solver.run"]
    real = solve_mod.solve

    def flaky(case, **kw):
        if float(case.events["size_mw"].iloc[0]) == 80.0:
            raise RuntimeError("solver process vanished")
        return real(case, **kw)

    monkeypatch.setattr(solve_mod, "solve", flaky)
    case = optreserve.load_case(small_case(case_dir()))
    table = run_sweep(case, [parse_vary("event:step.size_mw=60:100:20")])
    assert list(table["status"]) == ["optimal", "error", "optimal"]
    assert "solver process vanished" in table.loc[1, "error"]
    assert table.loc[2, "objective_per_h"] == pytest.approx(200.0, rel=1e-6)


@pytest.mark.parametrize("spec, words", [
    ("no_such_key=1:2:1", "unknown key"),
    ("price_scale=2:1:1", "STEP"),
    ("price_scale=1:2", "START:STOP:STEP"),
    ("link:nowhere.limit_mw=10:20:5", "no link"),
    ("event:nothing.size_mw=10:20:5", "no event"),
    ("event:step.size_mw=-20:20:20", "must not be 0"),
    ("max_settled_deviation_hz=0:0.2:0.1", "must be > 0"),
    ("price_scale=x:2:1", "not a number"),
])
def test_bad_vary_is_one_line_exit_2_nothing_written(case_dir, tmp_path, capsys, spec, words):
    folder = small_case(case_dir())
    out = tmp_path / "out"
    assert main(["sweep", str(folder), "--vary", spec, "--out", str(out), "--workers", "1"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: --vary") and words in err[0]
    assert not out.exists()
    with pytest.raises(SweepError):
        parse_vary(spec, optreserve.load_case(folder))


def test_cli_writes_table_plot_and_caution(case_dir, tmp_path):
    folder = small_case(case_dir())
    out = tmp_path / "out"
    assert main(["sweep", str(folder), "--vary", "event:step.size_mw=60:120:30", "--vary",
                 "price_scale=1,2", "--out", str(out), "--workers", "1", "--quiet"]) == 0
    lines = (out / "sweep.csv").read_text().splitlines()
    assert lines[0].startswith("point,event:step.size_mw,price_scale,status,objective_per_h")
    assert len(lines) == 1 + 6
    assert (out / "sweep.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    doc = json.loads((out / "sweep.json").read_text())
    assert doc["status_counts"] == {"optimal": 4, "infeasible": 2}
    assert "not an operating instruction" in doc["caution"]
    # a non-empty --out without --force is refused before any work
    assert main(["sweep", str(folder), "--vary", "price_scale=1", "--out", str(out),
                 "--workers", "1", "--quiet"]) == 2


@pytest.fixture(scope="module")
def loopback_cluster():
    from dask.distributed import LocalCluster

    cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                           dashboard_address=None, host="127.0.0.1")
    yield cluster
    cluster.close()


def test_dask_table_equals_serial_table(case_dir, loopback_cluster):
    """The same sweep serially in this process and on two worker processes; the merged
    tables must be equal (row order, values, statuses), apart from the timing column."""
    case = optreserve.load_case(small_case(case_dir()))
    varies = [parse_vary("event:step.size_mw=40:120:20"), parse_vary("price_scale=1,2.5")]
    serial = run_sweep(case, varies)
    dist = run_sweep(case, varies, scheduler=loopback_cluster.scheduler_address)
    assert set(dist["status"]) == {"optimal", "infeasible"}
    cols = [c for c in serial.columns if c != "solve_s"]
    assert serial[cols].equals(dist[cols])


def test_batch_of_day_folders_dask_equals_serial(tmp_path, loopback_cluster):
    days = tmp_path / "days"
    for name, size in (("2026-03-01", 50.0), ("2026-03-02", 90.0), ("2026-03-03", 130.0)):
        small_case(days / name, size=size)
    (days / "notes").mkdir()  # not a case folder: skipped
    serial = run_batch(days)
    dist = run_batch(days, scheduler=loopback_cluster.scheduler_address)
    assert list(serial["case"]) == ["2026-03-01", "2026-03-02", "2026-03-03"]
    assert list(serial["status"]) == ["optimal", "optimal", "infeasible"]
    assert list(serial["objective_per_h"][:2]) == pytest.approx([100.0, 180.0], rel=1e-6)
    cols = [c for c in serial.columns if c != "solve_s"]
    assert serial[cols].equals(dist[cols])


def test_apply_point_overrides_per_period_values_in_a_horizon(case_dir):
    """In a horizon a varied link limit replaces its per-period limits, and price_scale
    scales the per-period prices too (docs/case-format.md, Sweeps and batches)."""
    from conftest import csv_text

    from optreserve.studies.sweep import apply_point

    folder = write_case(case_dir(), settings(),
                        [unit("Ald_1", "Aldmere", 1000, 600, 2, 10, price_up=3),
                         unit("Brook_1", "Brookfell", 500, 200, 2, 10, price_up=1)],
                        [{"area": "Aldmere", "load_mw": 3000},
                         {"area": "Brookfell", "load_mw": 3000}],
                        [{"event": "step", "kind": "load_step", "area": "Brookfell",
                          "size_mw": 100.0}],
                        [{"link": "AB", "from_area": "Aldmere", "to_area": "Brookfell",
                          "reactance_pu": 0.05, "limit_mw": 300.0}])
    (folder / "links_by_period.csv").write_text(csv_text([
        {"period": 0, "link": "AB", "limit_mw": 250}, {"period": 1, "link": "AB",
                                                       "limit_mw": 260}]))
    (folder / "units_by_period.csv").write_text(csv_text([
        {"period": 0, "unit": "Ald_1", "price_up_per_mw_h": 4},
        {"period": 1, "unit": "Ald_1", "price_up_per_mw_h": 5}]))
    case = optreserve.load_case(folder)
    assert list(case.link_matrix("limit_mw")[:, 0]) == [250.0, 260.0]
    new = apply_point(case, {"link:AB.limit_mw": 120.0, "price_scale": 2.0})
    assert list(new.link_matrix("limit_mw")[:, 0]) == [120.0, 120.0]
    assert new.unit_matrix("price_up_per_mw_h").tolist() == [[8.0, 2.0], [10.0, 2.0]]
    # the original case is untouched (a sweep never changes its base case)
    assert list(case.link_matrix("limit_mw")[:, 0]) == [250.0, 260.0]

"""Hard cases and careful outputs: a very wide range of unit sizes, solver time limits,
reproducible files, output folders that are never half-written or clobbered, and the
infeasibility diagnosis.

Outside references: hand arithmetic of the settled power balance (stated per test) and the
independent settled-point calculation in tests/refcalc.py (scipy brentq + numpy lstsq).
"""

from __future__ import annotations

import json

import pandas as pd
import pytest
from conftest import settings, write_case

import optreserve
from optreserve.cli import main
from optreserve.studies.generate import Spec, generate


def _wide(folder):
    """One 10 GW unit and two units of 1 and 1.5 MW in one case (13 000:1 in size)."""
    return write_case(
        folder, settings(),
        [{"unit": "Colossus", "area": "Big", "capacity_mw": 10000, "output_mw": 7000,
          "droop_min_pct": 3, "droop_max_pct": 6, "deadband_mhz": 10, "price_up_per_mw_h": 4,
          "price_down_per_mw_h": 1},
         {"unit": "Wisp_1", "area": "Small", "capacity_mw": 1, "output_mw": 0.5,
          "droop_min_pct": 2, "droop_max_pct": 5, "price_up_per_mw_h": 0.5,
          "price_down_per_mw_h": 0.1},
         {"unit": "Wisp_2", "area": "Small", "capacity_mw": 1.5, "output_mw": 0.7,
          "droop_min_pct": 2, "droop_max_pct": 5, "price_up_per_mw_h": 0.6,
          "price_down_per_mw_h": 0.1},
         {"unit": "Middling", "area": "Small", "capacity_mw": 300, "output_mw": 200,
          "droop_min_pct": 3, "droop_max_pct": 6, "deadband_mhz": 15,
          "price_up_per_mw_h": 6, "price_down_per_mw_h": 2}],
        [{"area": "Big", "load_mw": 20000, "load_damping_pct_per_hz": 1},
         {"area": "Small", "load_mw": 300, "load_damping_pct_per_hz": 1}],
        [{"event": "trip_mid", "kind": "unit_trip", "unit": "Middling"},
         {"event": "tiny_step", "kind": "load_step", "area": "Small", "size_mw": 0.3},
         {"event": "big_drop", "kind": "load_step", "area": "Big", "size_mw": -900}],
        [{"link": "BS", "from_area": "Big", "to_area": "Small", "reactance_pu": 0.05,
          "limit_mw": 500, "flow_mw": 10}])


def test_ten_gigawatt_and_one_megawatt_units_in_one_case(tmp_path):
    """Hand check of the binding over-frequency event (900 MW surplus): load self-regulation
    (20000 + 300) * 1 %/Hz = 203 MW/Hz gives 40.6 MW at 0.2 Hz; the two small units at their
    strongest 2 % give (1 + 1.5)/(0.02 * 50) = 2.5 MW/Hz -> 0.5 MW; the 10 GW unit with a
    10 mHz dead band covers the rest: (900 - 40.6 - 0.5) / 0.19 = 4520.53 MW/Hz."""
    res = optreserve.solve(optreserve.load_case(_wide(tmp_path / "c")))
    a = res.allocation.set_index("unit")
    assert a.loc["Colossus", "gain_mw_per_hz"] == pytest.approx((900 - 40.6 - 0.5) / 0.19,
                                                                 rel=1e-6)
    assert a.loc["Wisp_1", "gain_mw_per_hz"] == pytest.approx(1.0, rel=1e-6)
    assert a.loc["Wisp_2", "gain_mw_per_hz"] == pytest.approx(1.5, rel=1e-6)
    ev = res.events.set_index("event")
    assert ev.loc["big_drop", "settled_deviation_hz"] == pytest.approx(0.2, abs=1e-7)
    # the 0.3 MW step settles about 1.5 mHz from nominal, inside Colossus' 10 mHz dead band,
    # so only the small units and the load respond: 0.3 / (2.5 + 203) Hz, resolved exactly
    assert abs(ev.loc["tiny_step", "settled_deviation_hz"]) == pytest.approx(0.3 / 205.5,
                                                                            rel=1e-6)
    assert res.verification["max_frequency_disagreement_hz"] < 1e-9


def test_time_limit_with_a_solution_reports_status_and_gap(tmp_path):
    """A MILP stopped by the time limit with a feasible allocation is written with status
    time_limit and a gap; without one, the run stops with "no allocation yet" (exit 4) and
    writes nothing."""
    generate(Spec(units=120, areas=4, links=5, periods=24, events=6, seed=9), tmp_path / "c")
    out = tmp_path / "o"
    rc = main(["solve", str(tmp_path / "c"), "--out", str(out), "--time-limit", "0.6",
               "--mip-gap", "0", "--engine", "highspy", "--quiet"])
    if rc == 0:
        summary = json.loads((out / "summary.json").read_text())
        assert summary["status"] in ("time_limit", "optimal")
        if summary["status"] == "time_limit":
            assert summary["mip_gap"] is not None and summary["mip_gap"] > 0
    else:
        assert rc == 4 and not out.exists()
    out2 = tmp_path / "o2"
    assert main(["solve", str(tmp_path / "c"), "--out", str(out2), "--time-limit", "0.01",
                 "--mip-gap", "0", "--engine", "highspy", "--quiet"]) in (0, 4)


def test_two_runs_give_identical_files(tmp_path):
    """Stable ordering and formatting: every output file is byte-identical between two runs,
    except the measured run times inside summary.json."""
    generate(Spec(units=30, areas=3, links=3, periods=4, events=4, seed=2), tmp_path / "c")
    outs = []
    for k in range(2):
        out = tmp_path / f"o{k}"
        assert main(["solve", str(tmp_path / "c"), "--out", str(out), "--quiet"]) == 0
        outs.append(out)
    names = sorted(p.name for p in outs[0].iterdir())
    assert names == sorted(p.name for p in outs[1].iterdir())
    for name in names:
        a, b = (o / name for o in outs)
        if name == "summary.json":
            ja, jb = json.loads(a.read_text()), json.loads(b.read_text())
            ja.pop("timings_s"), jb.pop("timings_s")
            assert ja == jb
        else:
            assert a.read_bytes() == b.read_bytes(), name


def test_non_empty_out_is_left_alone_and_force_keeps_user_files(tmp_path):
    case = _wide(tmp_path / "c")
    out = tmp_path / "o"
    out.mkdir()
    (out / "notes.txt").write_text("my notes")
    assert main(["solve", str(case), "--out", str(out), "--quiet"]) == 2
    assert sorted(p.name for p in out.iterdir()) == ["notes.txt"]
    assert main(["solve", str(case), "--out", str(out), "--force", "--quiet"]) == 0
    assert (out / "notes.txt").read_text() == "my notes"
    assert (out / "allocation.csv").is_file()
    # no temporary folders left beside it
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


def test_interrupted_write_leaves_no_half_written_folder(tmp_path, monkeypatch):
    """Ctrl-C while files are written: the output folder does not appear at all."""
    res = optreserve.solve(optreserve.load_case(_wide(tmp_path / "c")))
    import optreserve.output.results as results

    real = results.write_table
    calls = {"n": 0}

    def flaky(df, path):
        calls["n"] += 1
        if calls["n"] == 2:
            raise KeyboardInterrupt
        real(df, path)

    monkeypatch.setattr(results, "write_table", flaky)
    with pytest.raises(KeyboardInterrupt):
        res.write(tmp_path / "out")
    assert not (tmp_path / "out").exists()
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


def test_infeasible_case_writes_only_the_diagnosis(tmp_path, capsys):
    """A 700 MW trip where the most every provider can give at 0.2 Hz is far less: exit 3,
    the message names the event and the shortfall, and diagnosis.csv is the only file."""
    case = write_case(
        tmp_path / "c", settings(),
        [{"unit": "Lone_Big", "area": "Isle", "capacity_mw": 900, "output_mw": 700,
          "droop_min_pct": 4, "droop_max_pct": 6, "provides": False},
         {"unit": "Lone_Small", "area": "Isle", "capacity_mw": 200, "output_mw": 100,
          "droop_min_pct": 4, "droop_max_pct": 6, "price_up_per_mw_h": 1}],
        [{"area": "Isle", "load_mw": 1000, "load_damping_pct_per_hz": 1}],
        [{"event": "big_trip", "kind": "unit_trip", "unit": "Lone_Big"}])
    out = tmp_path / "o"
    assert main(["solve", str(case), "--out", str(out)]) == 3
    err = capsys.readouterr().err
    assert "big_trip" in err and "MW" in err
    assert sorted(p.name for p in out.iterdir()) == [".optreserve-manifest.json",
                                                      "diagnosis.csv"]
    diag = pd.read_csv(out / "diagnosis.csv")
    # most the small unit can give: 200/(0.04*50) = 100 MW/Hz * 0.2 = 20 MW (its 100 MW
    # room allows it); load self-regulation 10 MW/Hz * 0.2 = 2 MW: 700 - 22 = 678 MW short
    row = diag[diag["family"] == "event"].iloc[0]
    assert row["short_mw"] == pytest.approx(678.0, rel=1e-6)

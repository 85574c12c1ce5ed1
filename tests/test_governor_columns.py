"""Reading the governor-model columns of units.csv and [dynamics] of case.toml (contract:
../shared/design/case-format.md, "Governor models"). Bounds are the ones of
dynamics/governors.BOUNDS (typical values: Kundur, Power System Stability and Control,
ch. 9 and 11, from memory)."""

from __future__ import annotations

import math

import pytest
from conftest import settings, unit, write_case

import optreserve
from optreserve.errors import CaseError

AREAS = [{"area": "A", "load_mw": 1000.0, "load_damping_pct_per_hz": 2.0}]
EVENTS = [{"event": "trip", "kind": "load_step", "area": "A", "size_mw": 50.0}]


def _units(**cols):
    rows = [unit("G1", "A", 400, 300, inertia_s=5.0, activation_time_s=20.0),
            unit("G2", "A", 400, 300, inertia_s=5.0, activation_time_s=20.0)]
    for c, vals in cols.items():
        for r, v in zip(rows, vals):
            r[c] = v
    return rows


def _load(folder, units, **sections):
    return optreserve.load_case(write_case(folder, settings(**sections), units, AREAS, EVENTS))


def test_defaults_without_columns(case_dir):
    """Version 1 case: every unit is a lag governor, no delay, response limited by headroom
    (contract defaults)."""
    c = _load(case_dir(), _units())
    assert list(c.units["governor"]) == ["lag", "lag"]
    assert list(c.units["delay_s"]) == [0.0, 0.0]
    assert math.isnan(c.units["reheat_time_s"].iloc[0])
    assert c.response_limit == "headroom"
    assert not any("unknown column" in w for w in c.warnings)


def test_reheat_and_inverter_read(case_dir):
    c = _load(case_dir(), _units(governor=["reheat", "inverter"], governor_lag_s=[0.2, 0.05],
                                 reheat_time_s=[7.0, None], hp_fraction=[0.3, None],
                                 delay_s=[None, 0.2]),
              dynamics={"response_limit": "room"})
    u = c.units
    assert list(u["governor"]) == ["reheat", "inverter"]
    assert u["reheat_time_s"].iloc[0] == 7.0 and u["hp_fraction"].iloc[0] == 0.3
    assert list(u["delay_s"]) == [0.0, 0.2]
    assert c.response_limit == "room"
    assert not any("unknown" in w for w in c.warnings), c.warnings


@pytest.mark.parametrize("cols,column,row", [
    (dict(governor=["reheat", "lag"], governor_lag_s=[0.2, None], hp_fraction=[0.3, None]),
     "reheat_time_s", 2),  # a reheat unit needs T_rh
    (dict(governor=["lag", "steam"]), "governor", 3),  # unknown model
    (dict(governor=["lag", "hydro"], governor_lag_s=[None, 0.5], water_time_s=[None, 40.0]),
     "water_time_s", 3),  # 40 s water starting time: a unit mistake
    (dict(governor=["reheat", "lag"], governor_lag_s=[0.2, None], reheat_time_s=[7, None],
          hp_fraction=[0.0, None]), "hp_fraction", 2),  # 0 < F_hp <= 1
    (dict(governor=["lag", "lag"], delay_s=[0.1, None]), "delay_s", 2),  # inverter only
    (dict(governor=["inverter", "lag"], governor_lag_s=["fast", None]), "governor_lag_s", 2),
])
def test_bad_governor_cells_name_row_and_column(case_dir, cols, column, row):
    with pytest.raises(CaseError) as exc:
        _load(case_dir(), _units(**cols))
    p = exc.value.problems[0]
    assert p.file.endswith("units.csv") and p.row == row and p.column == column, str(exc.value)


def test_bad_response_limit(case_dir):
    with pytest.raises(CaseError) as exc:
        _load(case_dir(), _units(), dynamics={"response_limit": "everything"})
    p = exc.value.problems[0]
    assert p.file.endswith("case.toml") and p.column == "dynamics.response_limit"


def test_governor_not_a_time_series(case_dir):
    folder = write_case(case_dir(), settings(horizon={"period_hours": 1.0}), _units(), AREAS,
                        EVENTS)
    (folder / "units_by_period.csv").write_text("period,unit,output_mw,governor\n1,G1,300,lag\n"
                                                "2,G1,310,lag\n")
    with pytest.raises(CaseError) as exc:
        optreserve.load_case(folder)
    assert any(p.column == "governor" and p.file.endswith("units_by_period.csv")
               for p in exc.value.problems), str(exc.value)


def test_cli_check_bad_governor_exits_2(case_dir, capsys):
    from optreserve import cli
    folder = write_case(case_dir(), settings(), _units(governor=["hydro", "lag"]), AREAS, EVENTS)
    assert cli.main(["check", str(folder)]) == 2
    err = capsys.readouterr().err
    assert "units.csv row 2 column governor_lag_s" in err or "row 2 column water_time_s" in err


def test_transient_link_limit_read_and_checked(case_dir):
    areas = AREAS + [{"area": "B", "load_mw": 500.0}]
    units = _units() + [unit("G3", "B", 300, 200, inertia_s=4.0, activation_time_s=10.0)]
    links = [{"link": "AB", "from_area": "A", "to_area": "B", "reactance_pu": 0.1,
              "limit_mw": 200.0, "transient_limit_mw": 260.0}]
    c = optreserve.load_case(write_case(case_dir(), settings(), units, areas, EVENTS, links))
    assert c.links["transient_limit_mw"].iloc[0] == 260.0
    assert not any("transient_limit_mw" in w for w in c.warnings)
    links[0]["transient_limit_mw"] = -5
    with pytest.raises(CaseError) as exc:
        optreserve.load_case(write_case(case_dir(), settings(), units, areas, EVENTS, links))
    p = exc.value.problems[0]
    assert p.file.endswith("links.csv") and p.row == 2 and p.column == "transient_limit_mw"

"""Droop retune proposals: fewest changes, least droop change, then least cost.

Outside reference: hand arithmetic of the settled power balance (|df| = dP / sum K with no
dead bands or load self-regulation; K = P / (s/100 * f_n)), stated in each docstring, and the
independent settled-point calculation of optreserve.settle (which shares no code with the
model) for the provider-loss check.
"""

from __future__ import annotations

import numpy as np
import pytest
from conftest import settings, write_case

import optreserve
from optreserve.cli import main
from optreserve.errors import InfeasibleError
from optreserve.model.horizon import prepare
from optreserve.studies.retune import retune, violations, with_provider_loss


def _fenmoor(folder, size_mw=110.0):
    """Single area, 50 Hz, F = F_act = 0.2 Hz, no load self-regulation, continuous droop.
    Fen_A 500 MW (room 200), band 2-5 %, today 5 % -> K = 1000/s = 200 MW/Hz.
    Fen_B 500 MW (room 45), band 4-5 %, today 5 % -> 200; headroom caps it at 45/0.2 = 225.
    Fen_C 300 MW (room 100), band 4-5 %, today 5 % -> K = 600/s = 120.
    A 110 MW step needs 550 MW/Hz; today gives 520 (settles at 110/520 = 0.2115 Hz).
    One change suffices: A to 4.3 % (1000/4.3 = 232.6 >= 230; 0.1 % grid; change 0.7) or C to
    4.0 % (150, change 1.0); B alone gives at most +22 (4.5 %). Fewest changes: 1; least droop
    change: A 5 -> 4.3."""
    return optreserve.load_case(write_case(
        folder, settings(),
        [{"unit": "Fen_A", "area": "Fenmoor", "capacity_mw": 500, "output_mw": 300,
          "droop_min_pct": 2, "droop_max_pct": 5, "droop_now_pct": 5, "price_up_per_mw_h": 1},
         {"unit": "Fen_B", "area": "Fenmoor", "capacity_mw": 500, "output_mw": 455,
          "droop_min_pct": 4, "droop_max_pct": 5, "droop_now_pct": 5, "price_up_per_mw_h": 1},
         {"unit": "Fen_C", "area": "Fenmoor", "capacity_mw": 300, "output_mw": 200,
          "droop_min_pct": 4, "droop_max_pct": 5, "droop_now_pct": 5, "price_up_per_mw_h": 5}],
        [{"area": "Fenmoor", "load_mw": 5000}],
        [{"event": "mill_start", "kind": "load_step", "area": "Fenmoor", "size_mw": size_mw}]))


def _row(p, unit):
    return p.proposal.set_index("unit").loc[unit]


def test_exactly_one_specific_unit_changes(tmp_path):
    """Hand arithmetic in _fenmoor: only Fen_A changes, to 4.3 %, and its reason names the
    event that settles outside the limit without it."""
    p = retune(_fenmoor(tmp_path / "c"))
    assert not p.already_safe
    assert list(p.changed["unit"]) == ["Fen_A"]
    assert _row(p, "Fen_A")["droop_proposed_pct"] == pytest.approx(4.3)
    assert _row(p, "Fen_A")["droop_change_pct"] == pytest.approx(0.7)
    assert "mill_start" in _row(p, "Fen_A")["reason"]
    # after: 110 / (1000/4.3 + 200 + 120) = 0.19907 Hz, inside the limit
    after = p.before_after.iloc[0]
    assert 50.0 - after["settled_frequency_after_hz"] == pytest.approx(
        110 / (1000 / 4.3 + 320), rel=1e-6)
    # before: today's headroom is sized for 0.2 Hz (40 + 40 + 24 = 104 MW) and there is no
    # load self-regulation, so the 110 MW step has no settled point at all
    assert np.isnan(after["settled_frequency_before_hz"])


def test_keep_moves_the_change_to_another_unit(tmp_path):
    """--keep Fen_A: the only single change left is Fen_C to 4.0 % (600/4 = 150, total 550)."""
    p = retune(_fenmoor(tmp_path / "c"), keep=("Fen_A",))
    assert list(p.changed["unit"]) == ["Fen_C"]
    assert _row(p, "Fen_C")["droop_proposed_pct"] == pytest.approx(4.0)
    assert _row(p, "Fen_A")["change"] == "unchanged"


def test_max_changes_zero_is_infeasible(tmp_path):
    """Today's settings fail (520 < 550 MW/Hz), so allowing no change cannot work: exit 3."""
    with pytest.raises(InfeasibleError):
        retune(_fenmoor(tmp_path / "c"), max_changes=0)
    folder = tmp_path / "c"
    assert main(["retune", str(folder), "--max-changes", "0", "--quiet"]) == 3


def test_safe_today_changes_nothing(tmp_path):
    """A 100 MW step needs 500 MW/Hz; today's 520 already meets it: no change proposed."""
    p = retune(_fenmoor(tmp_path / "c", size_mw=100.0))
    assert p.already_safe
    assert p.changed.empty
    assert p.cost_after_per_h == pytest.approx(p.cost_before_per_h, rel=1e-9)


def test_reduce_cost_on_a_safe_case_lowers_the_cost(tmp_path):
    """With --reduce-cost the least-cost allocation is sought even though today is safe:
    cost cannot rise, and here it falls (today's dear Fen_C at 5 % holds 24 MW at 5)."""
    p = retune(_fenmoor(tmp_path / "c", size_mw=100.0), reduce_cost=True)
    assert p.cost_after_per_h < p.cost_before_per_h
    assert not p.changed.empty


def _moorhaven(folder):
    """Five 500 MW units with fixed 5 % droop (K = 200 MW/Hz each, room 200), 110 MW step:
    need 550 MW/Hz. Today Moor_A and Moor_B provide (400): one more unit must start -> 600.
    Prices 1, 1, 1, 2, 3: Moor_C starts. Surviving the loss of any one provider needs
    total - 200 >= 550, i.e. four units (800): Moor_C and Moor_D start - a second change."""
    units = []
    for name, now, price in (("Moor_A", 5, 1), ("Moor_B", 5, 1), ("Moor_C", None, 1),
                             ("Moor_D", None, 2), ("Moor_E", None, 3)):
        units.append({"unit": name, "area": "Moorhaven", "capacity_mw": 500, "output_mw": 300,
                      "droop_min_pct": 5, "droop_max_pct": 5, "droop_now_pct": now,
                      "price_up_per_mw_h": price})
    return optreserve.load_case(write_case(
        folder, settings(), units, [{"area": "Moorhaven", "load_mw": 5000}],
        [{"event": "smelter", "kind": "load_step", "area": "Moorhaven", "size_mw": 110}]))


def test_provider_loss_forces_a_second_change(tmp_path):
    case = _moorhaven(tmp_path / "m")
    plain = retune(case)
    assert sorted(plain.changed["unit"]) == ["Moor_C"]
    robust = retune(case, survive_provider_loss=True)
    assert sorted(robust.changed["unit"]) == ["Moor_C", "Moor_D"]
    assert set(robust.changed["change"]) == {"starts"}
    # independent check: with each provider removed in turn every limit still holds
    hz = with_provider_loss(case, prepare(case))
    a = robust.result.allocation
    g = a["gain_mw_per_hz"].to_numpy()[None, :]
    ru = a["headroom_up_mw"].to_numpy()[None, :]
    rd = a["headroom_down_mw"].to_numpy()[None, :]
    assert violations(case, hz, g, ru, rd, 0.2) == []
    # and the plain proposal fails that check (which is why the option exists)
    a = plain.result.allocation
    assert violations(case, hz, a["gain_mw_per_hz"].to_numpy()[None, :],
                      a["headroom_up_mw"].to_numpy()[None, :],
                      a["headroom_down_mw"].to_numpy()[None, :], 0.2) != []


def test_retune_cli_writes_proposal(tmp_path, capsys):
    _fenmoor(tmp_path / "c")
    out = tmp_path / "out"
    assert main(["retune", str(tmp_path / "c"), "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert "Fen_A" in text and "Planning study" in text
    import pandas as pd

    prop = pd.read_csv(out / "proposal.csv")
    assert {"unit", "area", "droop_now_pct", "droop_proposed_pct", "change", "reason",
            "headroom_up_now_mw", "headroom_up_proposed_mw"} <= set(prop.columns)
    assert (out / "before_after.csv").is_file() and (out / "allocation.csv").is_file()
    assert np.isclose(prop.set_index("unit").loc["Fen_A", "droop_proposed_pct"], 4.3)


def test_reduce_cost_with_free_headroom_still_solves(tmp_path):
    """Every headroom price zero: the least cost is 0 whatever the settings, so holding the
    cost stage must not squeeze headroom (regression: the model's tie-break price must not
    count in the stage's cost row). Today is safe (520 >= 500 MW/Hz): no change needed."""
    case = _fenmoor(tmp_path / "c", size_mw=100.0)
    units = case.units.assign(price_up_per_mw_h=0.0)
    p = retune(case.replace(units=units), reduce_cost=True)
    assert p.cost_after_per_h == 0.0
    assert p.changed.empty

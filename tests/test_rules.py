"""Regulatory parameter sets ([limits] rules = "NAME").

Values against shared/design/references.md, EU Regulation 2017/1485 (System Operation
Guideline): CE FCR full activation at 200 mHz and dead band 10 mHz (Annex V, confirmed), CE
reference incident 3000 MW (Art. 153(2)(b)(i), confirmed), GB/Nordic full activation at
500 mHz (Annex V, confirmed), GB dead band 15 mHz (Annex V, confirmed); maximum steady-state
and instantaneous deviations from Annex III Table 1 (memory).
"""

from __future__ import annotations

import pytest
from conftest import settings, unit, write_case

import optreserve
from optreserve.errors import CaseError


def rules_case(folder, limits, deadband=0.0, size=500.0):
    toml = settings()
    toml["limits"] = dict(limits)
    return write_case(folder, toml,
                      [unit("Fellby_1", "Fellby", 1000, 600, 2, 10, price_up=2,
                            deadband_mhz=deadband)],
                      [{"area": "Fellby", "load_mw": 8000, "load_damping_pct_per_hz": 1.0}],
                      [{"event": "trip", "kind": "load_step", "area": "Fellby",
                        "size_mw": size}])


def test_continental_europe_fills_the_limits(case_dir):
    case = optreserve.load_case(rules_case(case_dir(), {"rules": "continental-europe"}))
    assert case.limits.max_settled_deviation_hz == 0.2  # Annex III (memory)
    assert case.limits.full_activation_deviation_hz == 0.2  # Annex V (confirmed)
    assert case.limits.max_nadir_deviation_hz == 0.8  # Annex III (memory)


@pytest.mark.parametrize("name, full_act", [("great-britain", 0.5), ("nordic", 0.5)])
def test_full_activation_of_gb_and_nordic(case_dir, name, full_act):
    case = optreserve.load_case(rules_case(case_dir(), {"rules": name}))
    assert case.limits.full_activation_deviation_hz == full_act  # Annex V (confirmed)


def test_explicit_keys_override_the_rule_set(case_dir):
    case = optreserve.load_case(rules_case(case_dir(), {"rules": "continental-europe",
                                                        "max_settled_deviation_hz": 0.15}))
    assert case.limits.max_settled_deviation_hz == 0.15
    assert case.limits.full_activation_deviation_hz == 0.2


def test_dead_band_above_the_rule_warns_with_row_and_column(case_dir):
    """CE allows 10 mHz of combined insensitivity and dead band (Annex V, confirmed); GB 15."""
    ce = optreserve.load_case(rules_case(case_dir(), {"rules": "continental-europe"},
                                         deadband=12.0))
    hits = [w for w in ce.warnings if "dead band 12 mHz" in w]
    assert len(hits) == 1 and "units.csv row 2 column deadband_mhz" in hits[0]
    gb = optreserve.load_case(rules_case(case_dir(), {"rules": "great-britain"},
                                         deadband=12.0))
    assert not [w for w in gb.warnings if "dead band" in w]


def test_largest_event_below_reference_incident_warns(case_dir):
    """CE reference incident 3000 MW (Art. 153, confirmed): a case whose largest event is 500
    MW is warned; one with a 3000 MW event is not."""
    small = optreserve.load_case(rules_case(case_dir(), {"rules": "continental-europe"}))
    assert any("below the reference incident" in w and "3000 MW" in w for w in small.warnings)
    big = optreserve.load_case(rules_case(case_dir(), {"rules": "continental-europe"},
                                          size=3000.0))
    assert not any("reference incident" in w for w in big.warnings)


def test_unknown_rule_set_is_an_input_error_naming_the_line(case_dir):
    folder = rules_case(case_dir(), {"rules": "atlantis"})
    with pytest.raises(CaseError) as exc:
        optreserve.load_case(folder)
    msg = str(exc.value)
    assert "case.toml row" in msg and "column limits.rules" in msg and "atlantis" in msg

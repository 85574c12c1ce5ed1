"""Regulatory parameter sets for `[limits] rules = "NAME"` in case.toml.

A rule set fills the limits a case does not give itself (explicit keys always win) and adds
two checks that only warn: a unit's dead band above the set's maximum, and a case whose
largest event is smaller than the set's reference incident (the study would then not
dimension reserve for the incident the rules are written for).

Sources, with the status used in shared/design/references.md: EU Regulation 2017/1485
(System Operation Guideline). "confirmed": seen in the published text; "memory": recalled,
not re-checked against the original. docs/case-format.md ("Rule sets") lists them.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class RuleSet:
    name: str
    title: str
    max_settled_deviation_hz: float
    full_activation_deviation_hz: float
    max_nadir_deviation_hz: float
    max_deadband_mhz: float
    reference_incident_mw: float | None  # None: not recorded, no check
    sources: str
    # minimum time an energy-limited FCR provider must sustain full activation; None: the
    # rules leave it to the area's operators and no figure is recorded here (not filled)
    min_sustain_minutes: float | None = None


RULE_SETS: dict[str, RuleSet] = {r.name: r for r in (
    RuleSet("continental-europe", "Continental Europe synchronous area",
            max_settled_deviation_hz=0.2,  # Annex III Table 1 (memory)
            full_activation_deviation_hz=0.2,  # Annex V (confirmed)
            max_nadir_deviation_hz=0.8,  # Annex III Table 1 (memory)
            max_deadband_mhz=10.0,  # Annex V (confirmed)
            reference_incident_mw=3000.0,  # Art. 153(2)(b)(i) (confirmed)
            sources="EU 2017/1485: Annex V and Art. 153 confirmed; Annex III values and the "
                    "15 min sustain time of Art. 156(9)-(11) from memory",
            # Art. 156(9)-(11): limited energy reservoirs keep full activation available for
            # 15-30 min as the area's operators determine; CE: 15 min (memory)
            min_sustain_minutes=15.0),
    RuleSet("great-britain", "Great Britain synchronous area",
            max_settled_deviation_hz=0.5,  # Annex III Table 1 (memory)
            full_activation_deviation_hz=0.5,  # Annex V (confirmed)
            max_nadir_deviation_hz=0.8,  # Annex III Table 1 (memory)
            max_deadband_mhz=15.0,  # Annex V (confirmed)
            reference_incident_mw=1320.0,  # largest normal infeed loss (memory)
            sources="EU 2017/1485: Annex V confirmed; Annex III values and the 1320 MW "
                    "reference incident from memory"),
    RuleSet("nordic", "Nordic synchronous area",
            max_settled_deviation_hz=0.5,  # Annex III Table 1 (memory)
            full_activation_deviation_hz=0.5,  # Annex V (confirmed)
            max_nadir_deviation_hz=1.0,  # Annex III Table 1 (memory)
            max_deadband_mhz=10.0,  # Annex V (confirmed)
            reference_incident_mw=1450.0,  # dimensioning incident (memory)
            sources="EU 2017/1485: Annex V confirmed; Annex III values and the 1450 MW "
                    "dimensioning incident from memory"),
    RuleSet("ireland", "Ireland and Northern Ireland synchronous area",
            max_settled_deviation_hz=0.5,  # Annex III Table 1 (memory)
            full_activation_deviation_hz=0.5,  # FCR full activation: not recorded; taken
            # equal to the settled limit, as in the other sets (memory)
            max_nadir_deviation_hz=1.0,  # Annex III Table 1 (memory)
            max_deadband_mhz=15.0,  # Annex V (confirmed)
            reference_incident_mw=None,  # not recorded in our references: no check
            sources="EU 2017/1485: dead band confirmed; settled and instantaneous limits "
                    "from memory; no reference incident recorded"),
)}

# case.toml keys a rule set fills when the case does not give them
FILLS = ("max_settled_deviation_hz", "full_activation_deviation_hz", "max_nadir_deviation_hz",
         "min_sustain_minutes")


def fill_limits(settings: dict) -> str | None:
    """Fill `limits.*` keys missing from the parsed case.toml settings (in place) from the
    rule set named by `limits.rules`. Returns an error message for an unknown name."""
    name = settings.get("limits.rules")
    if name is None:
        return None
    rule = RULE_SETS.get(name)
    if rule is None:
        return (f"unknown rule set {name!r}; known: " + ", ".join(sorted(RULE_SETS)))
    for key in FILLS:
        if getattr(rule, key) is not None:  # a value the set does not record is not filled
            settings.setdefault(f"limits.{key}", getattr(rule, key))
    return None


def rule_warnings(name: str | None, units, events) -> list[tuple[str, str, int | None, str]]:
    """(file, message, row, column) warnings of the rule set's checks. `units` and `events`
    are the reader's tables with their `_line` column; events already carry size_mw."""
    rule = RULE_SETS.get(name) if name else None
    if rule is None:
        return []
    out = []
    db = units["deadband_mhz"].to_numpy(float)
    for k in (db > rule.max_deadband_mhz + 1e-9).nonzero()[0]:
        msg = (f"dead band {db[k]:g} mHz of unit '{units['unit'].iloc[k]}' exceeds the "
               f"{rule.max_deadband_mhz:g} mHz allowed by rule set '{rule.name}'")
        out.append(("units.csv", msg, int(units["_line"].iloc[k]), "deadband_mhz"))
    size = events["size_mw"].abs()
    if rule.reference_incident_mw is not None and len(size) and size.notna().any():
        big = float(size.max())
        if big < rule.reference_incident_mw - 1e-9:
            msg = (f"the largest event ({big:g} MW) is below the reference incident of rule "
                   f"set '{rule.name}' ({rule.reference_incident_mw:g} MW): reserve is not "
                   "dimensioned for it")
            out.append(("events.csv", msg, None, "size_mw"))
    return out

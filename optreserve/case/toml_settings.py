"""case.toml: the settings schema (type and bounds of every key) and its reader.

Values come back flat, keyed "section.key" ("name" and "nominal_frequency_hz" at the top).
Unknown sections and keys are warnings with a "did you mean" for near misses; a value of the
wrong type or outside its bounds is an error with its line in case.toml. Integers of any
size are accepted by TOML: one that does not fit a float (a 400-digit number) is an input
error, never an OverflowError.

Bounds (docs/case-format.md, case.toml table; why): frequencies 1-1000 Hz (railway 16.7 Hz
to aircraft 400 Hz, common practice); deviation limits 1 mHz-10 Hz (below 1 mHz the 0.5 mHz
verification tolerance is the whole limit); droop steps as the droop columns (columns.py);
penalties <= PRICE_MAX; period_hours 1 s-8784 h (one leap year); mip_gap 0-1 (relative);
time_limit_s <= 1e7 s (four months: longer is a typing slip); hold_periods 1-1 000 000.
"""

from __future__ import annotations

import math
import re
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from optreserve.case.columns import DROOP_MAX_PCT, DROOP_MIN_PCT, PRICE_MAX, num_text
from optreserve.case.problems import _Collector, suggest

UNKNOWN_SECTIONS = "__unknown_sections"  # key of the settings dict: misspelt section names


@dataclass(frozen=True)
class Key:
    kind: str  # "str", "num", "int", "numlist", "bool"
    lo: float | None = None
    hi: float | None = None
    lo_open: bool = False
    choices: tuple[str, ...] = ()  # a "str" key that takes one of these words (any case)


_HZ_DEV = Key("num", 1e-3, 10.0)
_TOML_SCHEMA: dict[str, dict[str, Key]] = {
    "": {"name": Key("str"), "nominal_frequency_hz": Key("num", 1.0, 1000.0)},
    "limits": {
        "max_settled_deviation_hz": _HZ_DEV,
        "full_activation_deviation_hz": _HZ_DEV,
        "max_nadir_deviation_hz": _HZ_DEV,
        "max_rocof_hz_per_s": Key("num", 0.0, 100.0, lo_open=True),
        "rules": Key("str"),  # a regulatory parameter set (rules.py) filling the limits not given
        # energy-limited providers (case/products.py): full activation sustained this long
        "min_sustain_minutes": Key("num", 0.0, 1440.0, lo_open=True),
    },
    "droop": {"steps_pct": Key("numlist", DROOP_MIN_PCT, DROOP_MAX_PCT),
              "change_penalty_per_unit": Key("num", 0.0, PRICE_MAX),
              "hold_periods": Key("int", 1, 1_000_000)},
    "horizon": {"period_hours": Key("num", 1.0 / 3600.0, 8784.0)},
    "solver": {"time_limit_s": Key("num", 0.0, 1e7, lo_open=True),
               "mip_gap": Key("num", 0.0, 1.0)},
    "energy": {"co_optimise": Key("bool")},
    # governor models (case/governor_columns.py): where a provider's response stops
    "dynamics": {"response_limit": Key("str", choices=("headroom", "room"))},
}


def _toml_line(text: str, section: str, key: str) -> int | None:
    current = ""
    for k, ln in enumerate(text.splitlines(), start=1):
        s = ln.strip()
        m = re.match(r"^\[\s*([A-Za-z0-9_.\-]+)\s*\]", s)
        if m:
            current = m.group(1)
            continue
        if current == section and re.match(rf"^{re.escape(key)}\s*=", s):
            return k
    return None


def _bounds_text(k: Key) -> str:
    lo = "" if k.lo is None else f"{'>' if k.lo_open else '>='} {num_text(k.lo)}"
    hi = "" if k.hi is None else f"<= {num_text(k.hi)}"
    return " and ".join(x for x in (lo, hi) if x)


def _inside(k: Key, v: float) -> bool:
    if k.lo is not None and (v <= k.lo if k.lo_open else v < k.lo):
        return False
    return k.hi is None or v <= k.hi


def _as_float(v: Any) -> float | None:
    """A finite float for a TOML number (int or float), None for anything else or for an
    integer too large for a float."""
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return None
    try:
        f = float(v)
    except OverflowError:
        return None
    return f if math.isfinite(f) else None


def _value(k: Key, v: Any) -> tuple[Any, str | None]:
    """(typed value, None) or (None, message)."""
    if k.kind == "str" and k.choices:
        word = v.strip().lower() if isinstance(v, str) else None
        return (word, None) if word in k.choices else (
            None, f"must be one of {', '.join(map(repr, k.choices))}, got {v!r}")
    if k.kind == "str":
        return (v, None) if isinstance(v, str) else (None, "must be a string")
    if k.kind == "bool":
        return (v, None) if isinstance(v, bool) else (None, f"must be true or false, got {v!r}")
    if k.kind == "int":
        if isinstance(v, bool) or not isinstance(v, int) or not _inside(k, v):
            return None, (f"must be a whole number between {k.lo:g} and {k.hi:,.0f}, got "
                          f"{_short(v)}")
        return v, None
    if k.kind == "numlist":
        vals = [_as_float(x) for x in v] if isinstance(v, list) else []
        if not vals or any(x is None or not _inside(k, x) for x in vals):
            return None, f"must be a non-empty list of numbers {_bounds_text(k)}"
        return tuple(sorted(set(vals))), None
    f = _as_float(v)
    if f is None:
        return None, f"must be a finite number, got {_short(v)}"
    if not _inside(k, f):
        if k.lo == 0 and k.lo_open and f <= 0:
            return None, f"must be > 0, got {v}"
        if k.lo == 0 and not k.lo_open and f < 0:
            return None, f"must be >= 0, got {v}"
        return None, f"must be {_bounds_text(k)}, got {_short(v)}"
    return f, None


def _short(v: Any) -> str:
    s = repr(v)
    return s if len(s) <= 40 else s[:20] + f"... ({len(s)} characters)"


def _read_toml(path: Path, label: str, col: _Collector) -> dict[str, Any] | None:
    try:
        text = path.read_bytes().decode("utf-8-sig")
    except OSError as exc:
        col.error(label, f"cannot be read ({exc.strerror or exc})")
        return None
    except UnicodeDecodeError:
        col.error(label, "is not UTF-8 text")
        return None
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        m = re.search(r"line (\d+)", str(exc))
        col.error(label, f"is not valid TOML: {str(exc).split(' (at')[0]}",
                  int(m.group(1)) if m else None)
        return None

    sections = [s for s in _TOML_SCHEMA if s]
    out: dict[str, Any] = {UNKNOWN_SECTIONS: {}}
    for section, value in doc.items():
        if isinstance(value, dict):
            if section not in _TOML_SCHEMA:
                hint = suggest(section, sections, "[{}]")
                out[UNKNOWN_SECTIONS][section] = hint
                col.warn(label, f"unknown section [{section}] ignored{hint}",
                         _toml_line(text, "", f"[{section}]"))
                continue
            items = value.items()
            sec = section
        else:
            items = [(section, value)]
            sec = ""
        for key, v in items:
            where = f"{sec}.{key}" if sec else key
            line = _toml_line(text, sec, key)
            kind = _TOML_SCHEMA[sec].get(key)
            if kind is None:
                col.warn(label, f"unknown key '{where}' ignored" + _key_hint(sec, key),
                         line, where)
                continue
            typed, msg = _value(kind, v)
            if msg is not None:
                col.error(label, msg, line, where)
                continue
            out[where] = typed
    return out


def _key_hint(sec: str, key: str) -> str:
    """A known key of another section ("belongs in [limits]"), or a near miss in this one."""
    homes = [s for s, keys in _TOML_SCHEMA.items() if key in keys and s != sec]
    if homes:
        return f" (it belongs in [{homes[0]}])" if homes[0] else " (it belongs at the top)"
    return suggest(key, _TOML_SCHEMA[sec], "'" + (f"{sec}." if sec else "") + "{}'")


def missing_section_hint(settings: dict[str, Any], section: str) -> str:
    """' (case.toml has [limit] ...)' when a misspelt section might hold the missing key."""
    for name, hint in settings.get(UNKNOWN_SECTIONS, {}).items():
        if f"[{section}]" in hint:
            return f" (there is a section [{name}]: did you mean [{section}]?)"
    return ""

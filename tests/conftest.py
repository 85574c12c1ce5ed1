"""Shared test helpers: write a case folder from plain Python data.

`write_case(folder, settings, units, areas, events, links)` writes case.toml and the CSVs;
`build_case(...)` does the same and loads it with optreserve.load_case. Tables are lists of
dicts; the CSV header is the union of their keys in first-seen order, missing cells are empty.
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))  # so tests can import refcalc

import optreserve


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    raise TypeError(f"no TOML form for {v!r}")


def toml_text(settings: dict) -> str:
    """Top-level scalars first, then one [section] per dict value."""
    lines = [f"{k} = {_toml_value(v)}" for k, v in settings.items() if not isinstance(v, dict)]
    for k, v in settings.items():
        if isinstance(v, dict):
            lines.append(f"\n[{k}]")
            lines += [f"{kk} = {_toml_value(vv)}" for kk, vv in v.items()]
    return "\n".join(lines) + "\n"


def csv_text(rows: list[dict]) -> str:
    header: list[str] = []
    for r in rows:
        header += [k for k in r if k not in header]
    lines = [",".join(header)]
    for r in rows:
        lines.append(",".join("" if r.get(h) is None else _cell(r.get(h)) for h in header))
    return "\n".join(lines) + "\n"


def _cell(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    return str(v)


def settings(f_n: float = 50.0, max_dev: float = 0.2, **sections) -> dict:
    """case.toml content: nominal frequency, settled limit, plus any extra sections/keys.
    `limits=dict(...)` is merged into [limits]."""
    limits = {"max_settled_deviation_hz": max_dev, **sections.pop("limits", {})}
    return {"name": "test case", "nominal_frequency_hz": f_n, "limits": limits, **sections}


def write_case(folder: Path, settings: dict, units: list[dict], areas: list[dict],
               events: list[dict], links: list[dict] | None = None) -> Path:
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "case.toml").write_text(toml_text(settings))
    (folder / "units.csv").write_text(csv_text(units))
    (folder / "areas.csv").write_text(csv_text(areas))
    (folder / "events.csv").write_text(csv_text(events))
    if links:
        (folder / "links.csv").write_text(csv_text(links))
    return folder


def build_case(folder: Path, *args, **kwargs) -> optreserve.Case:
    return optreserve.load_case(write_case(folder, *args, **kwargs))


def unit(name, area, capacity, output, droop_min=2.0, droop_max=12.0, price_up=1.0, **extra):
    """A units.csv row with the usual columns; extra keys become extra columns."""
    row = {"unit": name, "area": area, "capacity_mw": capacity, "output_mw": output,
           "droop_min_pct": droop_min, "droop_max_pct": droop_max,
           "price_up_per_mw_h": price_up}
    row.update(extra)
    return row


@pytest.fixture
def case_dir(tmp_path):
    """A fresh folder path for one case (not yet created)."""
    counter = iter(range(1000))

    def make(name: str | None = None) -> Path:
        return tmp_path / (name or f"case{next(counter)}")

    return make

"""Read and validate a case folder (contract: docs/case-format.md, versions 1 and 2).

The pipeline of one read, one module per concept:
  columns.py        the contract's column tables (names, types, defaults, bounds)
  csvio.py          one CSV file through pandas' C parser, typed from those tables
  toml_settings.py  case.toml: schema, bounds, reader
  checks.py         checks across columns and tables
  series.py         the *_by_period time series (CSV or Parquet)
  products.py       provides words, common-mode trips, energy-limited providers
  nodal.py          buses.csv cases
  governor_columns.py  governor models against their parameters
  problems.py       collecting problems and warnings ("did you mean")

Every problem is located by file, row (physical line, header = 1 when the file has no
comment lines above it) and column. All problems found in one pass are reported together,
up to MAX_PROBLEMS; the caller gets a CaseError and nothing else happens.
"""

from __future__ import annotations

import dataclasses
import math
import time
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from optreserve.case.checks import (
    _check_connected,
    _check_events,
    _check_links,
    _check_units,
    check_nadir_inertia,
    check_reactance_spread,
    check_trip_signs,
)
from optreserve.case.columns import (
    AREA_COLS,
    EVENT_COLS,
    LINK_COLS,
    UNIT_COLS,
    Col,
    series_columns,
    series_hints,
)
from optreserve.case.csvio import _read_csv, _typed_table
from optreserve.case.data import Case, DroopSettings, Limits, SolverSettings
from optreserve.case.governor_columns import apply_governor_columns
from optreserve.case.nodal import nodal_columns, read_nodal
from optreserve.case.problems import _Collector
from optreserve.case.products import check_products
from optreserve.case.rules import fill_limits, rule_warnings
from optreserve.case.series import SERIES, _check_series, _series_file
from optreserve.case.toml_settings import (
    _read_toml,
    _toml_line,
    missing_section_hint,
)

__all__ = ["load_case"]


# --------------------------------------------------------------------------- the folder
def load_case(path: str | Path) -> Case:
    """Read and validate a case folder; raise CaseError listing every problem found."""
    t0 = time.perf_counter()
    folder = Path(path)
    col = _Collector()
    if not folder.is_dir():
        col.error(str(folder), "is not a case folder (expected a directory with case.toml)")
        col.raise_if_any()
    try:  # an unreadable folder is an input error, not a crash
        next(folder.iterdir(), None)
        (folder / "case.toml").is_file()
    except PermissionError as exc:
        col.error(str(folder), f"cannot be read ({exc.strerror})")
        col.raise_if_any()

    def lab(name: str) -> str:
        return str(folder / name)

    # case.toml
    settings: dict[str, Any] = {}
    if not (folder / "case.toml").is_file():
        col.error(lab("case.toml"), "is missing")
    else:
        settings = _read_toml(folder / "case.toml", lab("case.toml"), col) or {}
        if (msg := fill_limits(settings)) is not None:  # [limits] rules = "NAME"
            col.error(lab("case.toml"), msg, _toml_line(
                (folder / "case.toml").read_text(encoding="utf-8-sig"), "limits", "rules"),
                "limits.rules")

    tables: dict[str, pd.DataFrame | None] = {}
    nodal = (folder / "buses.csv").is_file()  # version 2 nodal case: case/nodal.py
    for name, cols, required in (
        ("units.csv", UNIT_COLS, True),
        ("areas.csv", AREA_COLS, True),
        ("links.csv", LINK_COLS, False),
        ("events.csv", EVENT_COLS, True),
    ):
        p = folder / name
        if not p.is_file():
            if required:
                col.error(lab(name), "is missing")
            tables[name] = None
            continue
        t = _read_csv(p, lab(name), col)
        cols = nodal_columns(name, cols) if nodal else cols
        tables[name] = _typed_table(t, cols, col) if t is not None else None

    series_raw: dict[str, pd.DataFrame] = {}
    for key, (idc, cols) in SERIES.items():
        p = folder / f"{key}_by_period.csv"
        p, read = _series_file(p, col, lab)
        if p is not None:
            t = read(p, lab(p.name), col)
            if t is not None:
                may_vary = series_columns(key)
                over = [dataclasses.replace(c, required=False,
                                            default=math.nan if c.kind == "float" else None)
                        for c in cols if c.name in may_vary]
                df = _typed_table(t, [Col("period", "text", True), Col(idc, "text", True)]
                                  + over, col, unknown_hint=series_hints(key),
                                  skip_absent=True)
                if df is not None:
                    df.attrs["file"] = str(p)  # messages name the file actually read
                    series_raw[key] = df
    for extra in sorted(folder.glob("*_by_period.csv")):
        if extra.name.split("_by_period")[0] not in SERIES:
            col.warn(lab(extra.name), "unknown time-series file ignored (expected units_, "
                     "areas_ or links_by_period.csv)")

    net = read_nodal(folder, tables, col, bool(series_raw), settings) if nodal else None
    units, areas = tables["units.csv"], tables["areas.csv"]
    links, events = tables["links.csv"], tables["events.csv"]
    check_products(folder, units, events, series_raw, settings, col)  # case/products.py

    if settings is not None and "limits.max_settled_deviation_hz" not in settings and (
        folder / "case.toml"
    ).is_file() and not any(p.file == lab("case.toml") for p in col.problems):
        col.error(lab("case.toml"), "required key is missing"
                  + missing_section_hint(settings, "limits"), None,
                  "limits.max_settled_deviation_hz")

    # ---- cross checks (only on tables that parsed)
    area_ids: set[str] = set(areas["area"]) if areas is not None else set()
    if areas is not None and len(areas) == 0:
        col.error(lab("areas.csv"), "has no rows: at least one area is required", 1)
    if units is not None:
        _check_units(units, lab("units.csv"), area_ids if areas is not None else None, col)
        if len(units) == 0:
            col.error(lab("units.csv"), "has no rows: at least one unit is required", 1)
    if links is None:
        links = pd.DataFrame({c.name: pd.Series(dtype=float if c.kind == "float" else object)
                              for c in LINK_COLS})
        links["_line"] = pd.Series(dtype=int)
    elif not nodal:
        _check_links(links, lab("links.csv"), area_ids if areas is not None else None, col)
        check_reactance_spread(links["reactance_pu"].to_numpy(float), links["_line"].to_numpy(),
                               lab("links.csv"), col)
    if events is not None and units is not None and areas is not None:
        _check_events(events, lab("events.csv"), units, area_ids, col)
        if len(events) == 0:
            col.error(lab("events.csv"), "has no rows: at least one event is required", 1)
    if areas is not None and len(areas) > 1 and not col.problems and not nodal:
        _check_connected(areas, links, lab("links.csv"), col)

    periods: tuple = ()
    hours: tuple = ()
    series: dict[str, pd.DataFrame] = {}
    if not col.problems and (series_raw or (events is not None and (events["period"] != "").any())):
        periods, hours, series = _check_series(
            folder, series_raw, units, areas, links, events, settings, col)

    col.raise_if_any()
    assert units is not None and areas is not None and events is not None
    events["period"] = events["period"].map(lambda v: v if v else None).astype(object)
    if not periods and events["period"].notna().any():
        pass

    f_n = settings.get("nominal_frequency_hz")
    if f_n is None:
        f_n = 50.0
        col.warn(lab("case.toml"), "nominal_frequency_hz not given; 50 Hz assumed")
    F = settings["limits.max_settled_deviation_hz"]
    F_act = settings.get("limits.full_activation_deviation_hz", F)
    _check_limits_against_nominal(settings, float(f_n), lab("case.toml"), col)
    if F_act < F:
        col.warn(
            lab("case.toml"),
            f"full_activation_deviation_hz ({F_act}) is below max_settled_deviation_hz ({F}): "
            "providers saturate beyond it, so every settled point is kept within "
            f"{F_act} Hz (the unsaturated range)",
        )
    for file, msg, row, column in rule_warnings(settings.get("limits.rules"), units, events):
        col.warn(lab(file), msg, row, column)
    if settings.get("limits.max_nadir_deviation_hz") is not None:
        prov = units["provides"].to_numpy(bool)
        if units["inertia_s"].isna().all():
            col.warn(lab("units.csv"), "max_nadir_deviation_hz is set but no unit has "
                     "inertia_s: the nadir requirement is skipped", None, "inertia_s")
        n_no_t = int((prov & units["activation_time_s"].isna().to_numpy()).sum())
        if n_no_t:
            col.warn(lab("units.csv"), f"{n_no_t} provider(s) without activation_time_s are "
                     "taken to deliver in 30 s for the nadir requirement", None,
                     "activation_time_s")
    steps = settings.get("droop.steps_pct")
    if steps is not None:
        lo = units["droop_min_pct"].to_numpy()
        hi = units["droop_max_pct"].to_numpy()
        s = np.asarray(steps)
        has = ((s[None, :] >= lo[:, None] - 1e-9) & (s[None, :] <= hi[:, None] + 1e-9)).any(1)
        for (_, r), ok in zip(units.iterrows(), has):
            if r["provides"] and not ok:
                col.warn(lab("units.csv"), f"no droop step lies inside the band of unit "
                         f"'{r['unit']}'; it cannot provide", int(r["_line"]), "droop_min_pct")

    case = Case(
        name=settings.get("name", folder.name),
        nominal_frequency_hz=float(f_n),
        limits=Limits(
            max_settled_deviation_hz=F,
            full_activation_deviation_hz=F_act,
            max_nadir_deviation_hz=settings.get("limits.max_nadir_deviation_hz"),
            max_rocof_hz_per_s=settings.get("limits.max_rocof_hz_per_s"),
            min_sustain_minutes=settings.get("limits.min_sustain_minutes"),
        ),
        droop=DroopSettings(
            steps_pct=steps,
            change_penalty_per_unit=settings.get("droop.change_penalty_per_unit", 0.0),
        ),
        solver=SolverSettings(
            time_limit_s=settings.get("solver.time_limit_s"),
            mip_gap=settings.get("solver.mip_gap"),
        ),
        units=units.drop(columns="_line").reset_index(drop=True),
        areas=areas.drop(columns="_line").reset_index(drop=True),
        links=links.drop(columns="_line").reset_index(drop=True),
        events=events.drop(columns="_line").reset_index(drop=True),
        path=folder,
        warnings=tuple(col.warnings),
        periods=periods,
        period_hours=hours,
        series=series,
        hold_periods=settings.get("droop.hold_periods"),
        co_optimise=bool(settings.get("energy.co_optimise", False)),
        nodal=net,
    )
    # checks that need the whole case (per-period outputs, the nadir check's areas)
    check_trip_signs(case, events["_line"].to_numpy(), lab("events.csv"), col)
    check_nadir_inertia(case, col)
    col.raise_if_any()
    # governor models (case/governor_columns.py): model names and the parameters each needs
    case = apply_governor_columns(case, folder, settings, units["_line"].to_numpy())
    return case.replace(read_time_s=time.perf_counter() - t0)


def _check_limits_against_nominal(settings: dict[str, Any], f_n: float, file: str,
                                  col: _Collector) -> None:
    """A deviation limit of half the nominal frequency or more describes no working grid."""
    for key in ("max_settled_deviation_hz", "full_activation_deviation_hz",
                "max_nadir_deviation_hz"):
        v = settings.get(f"limits.{key}")
        if v is not None and v >= 0.5 * f_n:
            col.error(file, f"must be below half the nominal frequency ({0.5 * f_n:g} Hz), "
                      f"got {v:g}", None, f"limits.{key}")

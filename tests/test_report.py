"""report.html: the figures behind the plots against hand physics, the page against its
contract (self-contained, complete, cautious), bad result files, and the page in a real
headless browser (Chromium driven by Playwright; skipped when either is missing).

The case is the invented two-area "Two-Dale" system of docs/case-format.md (a hydro and a gas
plant in one valley, a steam unit, a battery and a wind farm in the other)."""

from __future__ import annotations

import base64
import csv
import io
import re
import shutil
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from conftest import settings, unit, write_case

import optreserve
from optreserve.cli import main
from optreserve.output.report import (
    REPORT_NAME,
    ReportError,
    build_report,
    read_result,
    response_curves,
)

F_N = 50.0

UNITS = [
    unit("Harrow_Hydro", "harrowdene", 300, 200, droop_min=2, droop_max=8, price_up=3,
         min_output_mw=40, deadband_mhz=0, price_down_per_mw_h=1),
    unit("Harrow_CCGT", "harrowdene", 400, 300, droop_min=3, droop_max=6, price_up=9,
         min_output_mw=150, deadband_mhz=10, price_down_per_mw_h=3),
    unit("Quill_Steam", "quillmoor", 250, 200, droop_min=4, droop_max=6, price_up=6,
         min_output_mw=100, deadband_mhz=10, reserve_up_max_mw=20, price_down_per_mw_h=2),
    unit("Quill_Battery", "quillmoor", 80, 0, droop_min=2, droop_max=5, price_up=2,
         min_output_mw=-80, deadband_mhz=0, price_down_per_mw_h=1.5),
    unit("Quill_Wind", "quillmoor", 150, 100, droop_min=4, droop_max=8, price_up=0,
         min_output_mw=0, deadband_mhz=0, price_down_per_mw_h=0, provides=False),
]
AREAS = [dict(area="harrowdene", load_mw=420, load_damping_pct_per_hz=1.5, min_own_reserve_mw=0),
         dict(area="quillmoor", load_mw=380, load_damping_pct_per_hz=1.0, min_own_reserve_mw=0)]
LINKS = [dict(link="harrow-quill", from_area="harrowdene", to_area="quillmoor",
              reactance_pu=0.04, limit_mw=150, flow_mw=80)]
EVENTS = [dict(event="trip_quill_wind", kind="unit_trip", unit="Quill_Wind"),
          dict(event="harrow_load_drop", kind="load_step", area="harrowdene", size_mw=-50)]

BROWSER = Path("/usr/bin/chromium")
BROWSER_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                "--no-first-run", "--disable-background-networking",
                "--disable-component-update", "--disable-sync"]


def two_dale(folder: Path, horizon: bool = False) -> Path:
    extra = {}
    if horizon:  # docs/case-format.md, "a two-hour horizon in half-hour periods"
        extra = {"droop": {"hold_periods": 2}, "horizon": {"period_hours": 0.5}}
    write_case(folder, {**settings(f_n=F_N, max_dev=0.2), "name": "Two-Dale example",
                        **extra}, UNITS, AREAS, EVENTS, LINKS)
    if horizon:
        (folder / "units_by_period.csv").write_text(
            "period,unit,output_mw,price_up_per_mw_h\n"
            "2026-03-02T06:00,Harrow_Hydro,200,3\n2026-03-02T06:30,Harrow_Hydro,230,3.5\n"
            "2026-03-02T07:00,Harrow_Hydro,250,4\n2026-03-02T07:30,Quill_Wind,104,\n")
        (folder / "areas_by_period.csv").write_text(
            "period,area,load_mw\n2026-03-02T06:00,quillmoor,380\n"
            "2026-03-02T06:30,quillmoor,400\n2026-03-02T07:00,quillmoor,420\n"
            "2026-03-02T07:30,quillmoor,430\n")
    return folder


@pytest.fixture(scope="module")
def solved(tmp_path_factory):
    """Two-Dale snapshot and horizon, solved once: {name: (case_dir, result_dir)}."""
    root = tmp_path_factory.mktemp("report")
    out = {}
    for name, horizon in (("snapshot", False), ("horizon", True)):
        case_dir = two_dale(root / f"case-{name}", horizon)
        res = optreserve.solve(optreserve.load_case(case_dir), engine="highspy")
        res_dir = res.write(root / f"out-{name}")
        out[name] = (case_dir, res_dir)
    return out


def fresh_copy(src: Path, dst: Path) -> Path:
    shutil.copytree(src, dst)
    (dst / REPORT_NAME).unlink(missing_ok=True)
    return dst


class _Refs(HTMLParser):
    """Every src/href and every tag name of a page (stdlib parser, independent of report.py)."""

    def __init__(self):
        super().__init__()
        self.refs, self.tags, self.ids = [], [], set()

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for k, v in attrs:
            if k in ("src", "href", "xlink:href", "action", "poster") and v is not None:
                self.refs.append((tag, k, v))
            if k == "id":
                self.ids.add(v)


def parse(page: str) -> _Refs:
    p = _Refs()
    p.feed(page)
    return p


def table_cells(page: str, table_id: str) -> list[list[str]]:
    """Body rows of one table as lists of cell data-v values (numbers) or text."""
    m = re.search(rf'<table id="{table_id}".*?<tbody>(.*?)</tbody>', page, re.S)
    assert m, f"table {table_id} missing"
    rows = []
    for tr in re.findall(r"<tr[^>]*>(.*?)</tr>", m.group(1), re.S):
        cells = []
        for attrs, text in re.findall(r"<td([^>]*)>(.*?)</td>", tr, re.S):
            v = re.search(r'data-v="([^"]*)"', attrs)
            cells.append(v.group(1) if v else text)
        rows.append(cells)
    return rows


# ------------------------------------------------------------------ the physics of the plots
def test_response_curves_match_hand_droop_arithmetic():
    """Droop to gain K = P / (s/100 * f_n) and a settled response K (|Δf| - d)⁺ capped at the
    headroom (common practice; the textbook proportional governor in steady state). Hand
    numbers: hydro 300 MW at 3 % -> 200 MW/Hz; gas 400 MW at 6 % -> 133.33 MW/Hz, 10 mHz dead
    band, 25 MW headroom; battery 80 MW at 2 % -> 80 MW/Hz, 10 MW up, 16 MW down."""
    def k(p, s):
        return p / (s / 100 * F_N)

    alloc = pd.DataFrame({
        "unit": ["hydro", "gas", "battery"], "area": ["A", "A", "B"],
        "gain_mw_per_hz": [k(300, 3), k(400, 6), k(80, 2)],
        "headroom_up_mw": [60.0, 25.0, 10.0], "headroom_down_mw": [60.0, 25.0, 16.0]})
    dev = np.array([-0.25, -0.2, -0.1, -0.005, 0.0, 0.05, 0.3])
    got = response_curves(alloc, dev, deadband_hz=[0.0, 0.010, 0.0])
    # hand: area A at -0.1 Hz = 200*0.1 + 133.33*(0.1-0.01) = 20 + 12 = 32 MW
    hand_a = {-0.25: 50 + 25, -0.2: 40 + 25, -0.1: 20 + 12, -0.005: 1.0, 0.0: 0.0,
              0.05: -(10 + 133.333333 * 0.04), 0.3: -(60 + 25)}
    hand_b = {-0.25: 10, -0.2: 10, -0.1: 8, -0.005: 0.4, 0.0: 0.0, 0.05: -4, 0.3: -16}
    for x in dev:
        assert got.loc[x, "A"] == pytest.approx(hand_a[x], abs=1e-4), x
        assert got.loc[x, "B"] == pytest.approx(hand_b[x], abs=1e-9), x


def test_characteristic_passes_through_every_settled_point(solved):
    """Power balance at the settled point: Σ_i min(K_i (|Δf| - d_i)⁺, r_i) + D |Δf| = |ΔP|,
    with D = Σ load · damping % / 100 (the quasi-steady balance of docs/formulation.md; for
    Two-Dale D = 420·1.5 % + 380·1.0 % = 10.1 MW/Hz, docs/case-format.md hand check). The
    curve drawn from allocation.csv must cross each event's size exactly at the settled
    frequency events.csv reports."""
    case_dir, res_dir = solved["snapshot"]
    rf = read_result(res_dir, case_dir)
    ev = rf.events
    db = rf.case.units.set_index("unit").loc[rf.allocation["unit"], "deadband_mhz"] / 1000
    curve = response_curves(rf.allocation, ev["settled_deviation_hz"].to_numpy(),
                            db.to_numpy())
    D = 420 * 1.5 / 100 + 380 * 1.0 / 100
    units = curve.sum(axis=1).to_numpy()
    balance = units - D * ev["settled_deviation_hz"].to_numpy()
    # the files hold 6 decimals: 0.5e-6 Hz x ~511 MW/Hz is about 2.6e-4 MW of round-off
    np.testing.assert_allclose(balance, ev["size_mw"].to_numpy(), atol=1e-3)


# ------------------------------------------------------------------ the page
def test_report_is_self_contained_and_complete(solved, tmp_path):
    case_dir, src = solved["snapshot"]
    res_dir = fresh_copy(src, tmp_path / "out")
    path = build_report(res_dir, case_dir)
    assert path == res_dir / REPORT_NAME
    page = path.read_text(encoding="utf-8")
    p = parse(page)
    # nothing fetched from anywhere: only in-page anchors and data: URIs
    for tag, attr, v in p.refs:
        assert v.startswith("#") or v.startswith("data:"), (tag, attr, v)
    assert not re.search(r"""(src|href)\s*=\s*["']?\s*(https?:)?//""", page, re.I)
    assert "@import" not in page
    assert not re.search(r"url\(\s*['\"]?(?!#)", page)  # only url(#clip-path) inside SVG
    assert "link" not in p.tags  # no stylesheet links
    assert all("src=" not in m for m in re.findall(r"<script[^>]*>", page))
    # the tables and the plots
    for tid in ("units-table", "events-table", "links-table", "areas-table"):
        assert tid in p.ids
    for plot in ("characteristics", "events", "links", "areas"):
        assert f'data-plot="{plot}"' in page
    assert page.count("<svg") >= 4
    # the caution at the end, after every section
    assert "Planning study, not operating instructions." in page
    assert "The applicable grid code, the system operator and licensed engineers decide" in page
    assert page.rindex('id="caution"') > page.rindex('id="links"')
    # the units table is allocation.csv, read independently with the csv module
    with open(res_dir / "allocation.csv", newline="") as fh:
        alloc = list(csv.DictReader(fh))
    rows = {r[0]: r for r in table_cells(page, "units-table")}
    assert set(rows) == {a["unit"] for a in alloc}
    heads = re.search(r'<table id="units-table".*?<thead>(.*?)</thead>', page, re.S).group(1)
    names = [re.sub(r"<.*", "", h) for h in re.findall(r"<th[^>]*>(.*?)</th>", heads)]
    col = names.index("headroom up")
    for a in alloc:
        assert float(rows[a["unit"]][col]) == pytest.approx(float(a["headroom_up_mw"]),
                                                             abs=1e-6)


def test_horizon_report_has_heat_map_and_costs_by_period(solved, tmp_path):
    case_dir, src = solved["horizon"]
    res_dir = fresh_copy(src, tmp_path / "out")
    page = build_report(res_dir, case_dir).read_text(encoding="utf-8")
    assert 'data-plot="heatmap"' in page and 'data-plot="period-costs"' in page
    heat = re.search(r'<svg[^>]*data-plot="heatmap".*?</svg>', page, re.S).group(0)
    with open(res_dir / "schedule_wide.csv", newline="") as fh:
        sched = list(csv.DictReader(fh))
    holding = {r["unit"] for r in sched if any(float(v) > 0 for k, v in r.items()
                                                 if k not in ("unit", "direction"))}
    assert holding and all(u in heat for u in holding)
    assert "Quill_Wind" not in heat  # holds nothing in any period
    # one row per unit in the summary table, periods providing counted from allocation.csv
    alloc = pd.read_csv(res_dir / "allocation.csv")
    rows = {r[0]: r for r in table_cells(page, "units-table")}
    on = alloc.groupby("unit")["provides"].sum()
    assert {u: int(float(rows[u][2])) for u in rows} == on.astype(int).to_dict()


def test_simulation_outputs_are_embedded(solved, tmp_path):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    _, src = solved["snapshot"]
    res_dir = fresh_copy(src, tmp_path / "out")
    (res_dir / "simulation_summary.csv").write_text(
        "# a comment line above the header\n"
        "event,nadir_hz,rocof_hz_per_s,nadir_ok\n"
        "trip_quill_wind,49.61,0.35,true\nharrow_load_drop,50.12,0.2,false\n")
    fig = Figure(figsize=(2, 1.5))
    FigureCanvasAgg(fig)
    fig.subplots().plot([0, 1], [1, 0])
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    (res_dir / "plot_trip_quill_wind.png").write_bytes(buf.getvalue())
    page = build_report(res_dir).read_text(encoding="utf-8")
    assert base64.b64encode(buf.getvalue()).decode() in page
    rows = table_cells(page, "simulation-table")
    assert [r[0] for r in rows] == ["trip_quill_wind", "harrow_load_drop"]
    assert float(rows[0][1]) == pytest.approx(49.61)
    tbody = re.search(r'<table id="simulation-table".*?</table>', page, re.S).group(0)
    assert re.search(r'<tr class="hot"><td>harrow_load_drop', tbody)  # nadir_ok false


def test_infeasible_folder_reports_the_diagnosis(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    # docs/case-format.md, "an infeasible case": the link 0.07 MW over its limit
    (out / "diagnosis.csv").write_text("family,element,event,short_mw,excess_hz,over_mw\n"
                                       "link,harrow-quill,trip_quill_wind,0,0,0.066357\n")
    page = build_report(out).read_text(encoding="utf-8")
    assert "diagnosis-table" in page and "harrow-quill" in page
    assert "not operating instructions" in page


# ------------------------------------------------------------------ bad result files
@pytest.mark.parametrize("damage, message", [
    (lambda d: (d / "events.csv").unlink(), r"events\.csv: missing"),
    (lambda d: _edit(d / "allocation.csv", 3, "headroom_up_mw", "12,5"),
     r"allocation\.csv row 3 column headroom_up_mw: is not a number: '12,5'"),
    (lambda d: _edit(d / "events.csv", 2, "binding", "maybe"),
     r"events\.csv row 2 column binding: is not true or false"),
    (lambda d: (d / "summary.json").write_text('{"status": "optimal",'),
     r"summary\.json line 1 column \d+: not valid JSON"),
    (lambda d: (d / "links.csv").write_text("link,event,flow_before_mw\n"),
     r"links\.csv column flow_after_mw: missing"),
    (lambda d: (d / "plot_x.png").write_bytes(b"not a png"), r"plot_x\.png: not a PNG"),
])
def test_bad_result_file_is_one_line_exit_2_nothing_written(solved, tmp_path, capsys,
                                                             damage, message):
    _, src = solved["snapshot"]
    res_dir = fresh_copy(src, tmp_path / "out")
    damage(res_dir)
    with pytest.raises(ReportError, match=message):
        build_report(res_dir)
    assert main(["report", str(res_dir)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and re.search(message, err), err
    assert not (res_dir / REPORT_NAME).exists()
    assert not [p for p in res_dir.iterdir() if p.name.startswith(".")
                and p.name != ".optreserve-manifest.json"]


def _edit(path: Path, row: int, column: str, value: str) -> None:
    """Set one cell (row = physical line, header = 1), quoting as csv does."""
    with open(path, newline="") as fh:
        rows = list(csv.reader(fh))
    rows[row - 1][rows[0].index(column)] = value
    with open(path, "w", newline="") as fh:
        csv.writer(fh, lineterminator="\n").writerows(rows)


def test_case_folder_that_does_not_match_is_refused(solved, tmp_path, capsys):
    _, src = solved["snapshot"]
    res_dir = fresh_copy(src, tmp_path / "out")
    other = write_case(tmp_path / "other", settings(), [unit("Elsewhere_Hydro", "a", 100, 50)],
                       [dict(area="a", load_mw=100)],
                       [dict(event="e", kind="load_step", area="a", size_mw=5)])
    assert main(["report", str(res_dir), "--case", str(other)]) == 2
    assert "does not match" in capsys.readouterr().err
    assert not (res_dir / REPORT_NAME).exists()


def test_cli_report_and_solve_report(solved, tmp_path, capsys):
    case_dir, src = solved["snapshot"]
    res_dir = fresh_copy(src, tmp_path / "out")
    assert main(["report", str(res_dir), "--case", str(case_dir)]) == 0
    assert (res_dir / REPORT_NAME).is_file()
    out = tmp_path / "solved"
    assert main(["solve", str(case_dir), "--out", str(out), "--engine", "highspy",
                 "--report", "--quiet"]) == 0
    page = (out / REPORT_NAME).read_text(encoding="utf-8")
    assert "Two-Dale example" in page and "units-table" in page
    capsys.readouterr()
    assert main(["solve", str(case_dir), "--report"]) == 2  # no --out: nowhere to write
    assert "--report needs --out" in capsys.readouterr().err


# ------------------------------------------------------------------ in a real browser
def _browser_or_skip():
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        pytest.skip("playwright is not installed (pip install playwright); the page is "
                    "checked without a browser by the other tests")
    if not BROWSER.exists():
        pytest.skip(f"no Chromium at {BROWSER} (apt-get install chromium)")
    return sync_playwright


def test_report_in_headless_chromium(solved, tmp_path):
    sync_playwright = _browser_or_skip()
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    case_dir, src = solved["horizon"]
    res_dir = fresh_copy(src, tmp_path / "out")
    fig = Figure(figsize=(3, 2))
    FigureCanvasAgg(fig)
    fig.subplots().plot([0, 1, 2], [50, 49.8, 49.9])
    fig.savefig(res_dir / "plot_trip_quill_wind.png")
    path = build_report(res_dir, case_dir)
    shot = tmp_path / "report.png"

    problems, foreign = [], []
    with sync_playwright() as pw:
        try:
            browser = pw.chromium.launch(executable_path=str(BROWSER), args=BROWSER_ARGS)
        except Exception as exc:  # a browser that cannot start here is an environment issue
            pytest.skip(f"Chromium at {BROWSER} did not start: {str(exc).splitlines()[0]}")
        try:
            page = browser.new_page(viewport={"width": 1366, "height": 900})
            page.on("console", lambda m: problems.append(m.text) if m.type == "error" else None)
            page.on("pageerror", lambda e: problems.append(str(e)))
            page.on("request", lambda r: None if r.url.startswith(("file:", "data:"))
                    else foreign.append(r.url))
            page.goto(path.as_uri(), wait_until="load")
            n_units = page.locator("#units-table tbody tr").count()
            n_events = page.locator("#events-table tbody tr").count()
            n_links = page.locator("#links-table tbody tr").count()
            plots = page.eval_on_selector_all(
                "svg.plot", "els => els.map(e => [e.dataset.plot, "
                "e.getBoundingClientRect().width, e.getBoundingClientRect().height])")
            images = page.eval_on_selector_all("img", "els => els.map(e => e.naturalWidth)")
            sticky = page.eval_on_selector("#units-table th", "th => getComputedStyle(th)"
                                           ".position")
            align = page.eval_on_selector("#units-table td.num", "td => getComputedStyle(td)"
                                          ".textAlign")
            caution = page.inner_text("#caution")
            # sorting works: click the peak-headroom-up heading twice -> descending
            head = page.locator("#units-table th", has_text="peak headroom up")
            head.click()
            head.click()
            col = page.eval_on_selector_all("#units-table th", "ths => ths.map(t => "
                                            "t.textContent)").index(head.text_content())
            values = page.eval_on_selector_all(
                f"#units-table tbody tr td:nth-child({col + 1})",
                "tds => tds.map(t => parseFloat(t.dataset.v))")
            page.screenshot(path=str(shot), full_page=True)
        finally:
            browser.close()

    assert problems == [], problems
    assert foreign == [], foreign
    assert n_units == len(UNITS)
    assert n_events == len(EVENTS)  # per event, its tightest period
    assert n_links == len(LINKS) * len(EVENTS)
    drawn = {name: (w, h) for name, w, h in plots}
    assert set(drawn) >= {"characteristics", "events", "links", "areas", "heatmap",
                          "period-costs"}
    assert all(w > 300 and h > 100 for w, h in drawn.values()), drawn
    assert images == [300]  # the 3 in x 100 dpi simulation plot, decoded
    assert sticky == "sticky" and align == "right"
    assert "not operating instructions" in caution
    assert values == sorted(values, reverse=True)
    assert shot.stat().st_size > 50_000
    print(f"screenshot: {shot}")

"""report.html additions: a retune folder's proposal, both event prices, the transient tie
loading of a simulation, ids with "$" shown literally; and the result-folder reader
(output/folder.py) on files it must refuse. Expected values come from the files themselves,
read independently with the csv module, or are written by hand into the test."""

from __future__ import annotations

import csv
import re

import pytest
from conftest import settings, write_case
from test_report import (
    AREAS,
    EVENTS,
    LINKS,
    UNITS,
    fresh_copy,
    solved,  # noqa: F401 (the fixture)
    table_cells,
    two_dale,
)

import optreserve
from optreserve.cli import main
from optreserve.output.folder import read_table
from optreserve.output.report import REPORT_NAME, ReportError, build_report
from optreserve.output.schemas import ALLOCATION


def _rows(path):
    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


def test_retune_folder_report_shows_the_proposal(tmp_path):
    """`report` of a retune folder shows proposal.csv unit by unit (issue: "report of a
    retune folder omits the proposal"): every unit, its change and droop values as the file
    has them, and the count of changed units from the file."""
    case_dir = two_dale(tmp_path / "case")
    out = tmp_path / "retune"
    assert main(["retune", str(case_dir), "--out", str(out), "--engine", "highspy",
                 "--quiet"]) == 0
    page = build_report(out, case_dir).read_text(encoding="utf-8")
    prop = _rows(out / "proposal.csv")
    rows = {r[0]: r for r in table_cells(page, "proposal-table")}
    assert set(rows) == {p["unit"] for p in prop}
    for p in prop:
        r = rows[p["unit"]]
        assert r[2] == p["change"]
        for k, col in ((3, "droop_now_pct"), (4, "droop_proposed_pct")):
            assert (r[k] == "") if p[col] == "" else float(r[k]) == pytest.approx(
                float(p[col]))
    changed = sum(p["change"] != "unchanged" for p in prop)
    assert f"Proposal per unit ({changed} of {len(prop)} changed)" in page
    ba = _rows(out / "before_after.csv")
    got = table_cells(page, "before-after-table")
    assert [r[0] for r in got] == [b["event"] for b in ba]
    for r, b in zip(got, ba):  # margins in mHz on the page, Hz in the file
        assert float(r[4]) == pytest.approx(float(b["margin_after_hz"]) * 1000)
    tbody = re.search(r'<table id="before-after-table".*?</table>', page, re.DOTALL).group(0)
    hot = re.findall(r'<tr class="hot"><td>([^<]*)</td>', tbody)
    assert hot == [b["event"] for b in ba
                   if b["margin_before_hz"] == "" or float(b["margin_before_hz"]) < 0]
    assert page.index('id="retune"') < page.index('id="cost"')
    assert 'href="#retune"' in page
    assert "not operating instructions" in page


def test_both_prices_are_shown_and_explained(solved, tmp_path):  # noqa: F811
    """events.csv with a blank fixed-integer price and an incremental (re-solve) price column
    (contract v2, "Prices on cases with droop steps"): both columns on the page, the blank as
    blank, and the explanation of which price is which."""
    _, src = solved["snapshot"]
    res_dir = fresh_copy(src, tmp_path / "out")
    rows = _rows(res_dir / "events.csv")
    for k, r in enumerate(rows):  # hand values: a blank marginal price, 12.5 and 0 re-solved
        r["marginal_cost_per_mw_h"] = ""
        r["incremental_cost_per_mw_h"] = ["12.5", "0"][k % 2]
    with open(res_dir / "events.csv", "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]), lineterminator="\n")
        w.writeheader()
        w.writerows(rows)
    page = build_report(res_dir).read_text(encoding="utf-8")
    assert "incremental cost" in page and "Two prices." in page
    priced = {r[0]: r for r in table_cells(page, "prices-table")}
    first = rows[0]["event"]
    assert first in priced  # non-zero incremental price: listed even when not binding
    assert priced[first][-2] == "" and float(priced[first][-1]) == 12.5
    ev = {r[0]: r for r in table_cells(page, "events-table")}
    assert float(ev[first][-1]) == 12.5 and ev[first][-2] == ""


def test_transient_tie_loading_of_a_simulation_subfolder(solved, tmp_path):  # noqa: F811
    """A simulation written into RESULT/simulation with link loading columns: the page lists
    the highest transient loading per event, red above 100 % or where link_ok is false, and
    a header tile with the highest value (hand-written file: 124 % and 71 %)."""
    _, src = solved["snapshot"]
    res_dir = fresh_copy(src, tmp_path / "out")
    (res_dir / "simulation").mkdir()
    (res_dir / "simulation" / "simulation_summary.csv").write_text(
        "event,nadir_hz,max_link_loading_pct,max_loading_link,settled_ok,link_ok\n"
        "trip_quill_wind,49.70,124.0,harrow-quill,true,false\n"
        "harrow_load_drop,50.10,71.0,harrow-quill,true,true\n")
    (res_dir / "simulation" / "simulation_links.csv").write_text(
        "# a caution line above the header\n"
        "event,link,limit_mw,max_flow_mw,max_loading_pct,at_time_s,link_ok\n"
        "trip_quill_wind,harrow-quill,150,186,124.0,3.1,false\n"
        "harrow_load_drop,harrow-quill,150,106.5,71.0,2.2,true\n")
    page = build_report(res_dir).read_text(encoding="utf-8")
    per_link = re.search(r'<table id="transient-links-table".*?</table>', page,
                         re.DOTALL).group(0)
    assert re.findall(r'<tr class="hot"><td>([^<]*)</td>', per_link) == ["trip_quill_wind"]
    ties = re.search(r'<table id="transient-ties-table".*?</table>', page, re.DOTALL).group(0)
    assert re.search(r'<tr class="hot"><td>trip_quill_wind', ties)
    assert not re.search(r'<tr class="hot"><td>harrow_load_drop', ties)
    cells = {r[0]: r for r in table_cells(page, "transient-ties-table")}
    assert float(cells["trip_quill_wind"][2]) == 124.0
    assert "transient tie loading" in page and "124.0 %" in page
    assert "1 event(s) take a tie above its limit" in page


def test_ids_with_dollar_signs_are_drawn_literally(tmp_path):
    """matplotlib reads text between two "$" as mathtext unless rcParams text.parse_math is
    off (matplotlib docs, "Writing mathematical expressions"); an event id with "$" must show
    as written on the plot's axis labels."""
    events = [dict(EVENTS[0], event="trip_$wind$"), EVENTS[1]]
    case_dir = write_case(tmp_path / "case", {**settings(max_dev=0.2), "name": "Dollar"},
                          UNITS, AREAS, events, LINKS)
    res = optreserve.solve(optreserve.load_case(case_dir), engine="highspy")
    res_dir = res.write(tmp_path / "out")
    page = build_report(res_dir, case_dir).read_text(encoding="utf-8")
    svg = re.search(r'<svg[^>]*data-plot="events".*?</svg>', page, re.DOTALL).group(0)
    # drawn as a text element (svg.fonttype none), not only named in the SVG's comments
    assert re.search(r">trip_\$wind\$</text>", svg)


@pytest.mark.parametrize("text, message", [
    ("unit,area,unit\n", r"column 'unit' appears twice in the header"),
    ("unit,area,gain_mw_per_hz,headroom_up_mw,headroom_down_mw\nA,a,5,-1,0\n",
     r"row 2 column headroom_up_mw: must be >= 0 \(got -1\)"),
])
def test_folder_reader_refuses_with_file_row_column(tmp_path, text, message):
    (tmp_path / "allocation.csv").write_text(text)
    with pytest.raises(ReportError, match=message):
        read_table(tmp_path / "allocation.csv", ALLOCATION, complete=False)


def test_lenient_allocation_fills_what_simulate_does_not_need(tmp_path):
    """simulate reads a hand-made allocation: only unit, area, gain and headroom needed; a
    blank provides is "not said" (None), kept apart from false."""
    (tmp_path / "allocation.csv").write_text(
        "unit,area,provides,gain_mw_per_hz,headroom_up_mw,headroom_down_mw\n"
        "A,a,,5,1,1\nB,a,false,0,0,0\n")
    df = read_table(tmp_path / "allocation.csv", ALLOCATION, complete=False, lines=True)
    assert df["provides"].tolist() == [None, False]
    assert df["_line"].tolist() == [2, 3]
    assert df["cost_per_h"].isna().all() and df["period"].tolist() == ["", ""]
    with pytest.raises(ReportError, match=r"column droop_pct: missing"):
        read_table(tmp_path / "allocation.csv", ALLOCATION, complete=True)


def test_report_cli_on_a_bad_retune_json_is_one_line(solved, tmp_path, capsys):  # noqa: F811
    _, src = solved["snapshot"]
    res_dir = fresh_copy(src, tmp_path / "out")
    (res_dir / "proposal.csv").write_text(
        "unit,area,droop_now_pct,droop_proposed_pct,change,droop_change_pct,"
        "headroom_up_now_mw,headroom_up_proposed_mw,headroom_down_now_mw,"
        "headroom_down_proposed_mw,reason\n")
    (res_dir / "retune.json").write_text('{"units_changed": "two"}')
    assert main(["report", str(res_dir)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "retune.json key units_changed: is not a number" in err[0]
    assert not (res_dir / REPORT_NAME).exists()


def test_simulation_summary_columns_are_checked(solved, tmp_path):  # noqa: F811
    """simulation_summary.csv has an open column set, but the columns the simulator documents
    (docs/case-format.md, "Simulation outputs") must hold their kind: a word where the nadir
    belongs is named by file, row and column; an unknown column is shown as it is."""
    _, src = solved["snapshot"]
    res_dir = fresh_copy(src, tmp_path / "out")
    (res_dir / "simulation_summary.csv").write_text(
        "event,nadir_hz,extra_note\ntrip_quill_wind,49.6,x\nharrow_load_drop,deep,y\n")
    with pytest.raises(ReportError, match=r"simulation_summary\.csv row 3 column nadir_hz: "
                                          r"is not a number: 'deep'"):
        build_report(res_dir)
    (res_dir / "simulation_summary.csv").write_text(
        "event,nadir_hz,extra_note\ntrip_quill_wind,49.6,x\nharrow_load_drop,50.1,y\n")
    page = build_report(res_dir).read_text(encoding="utf-8")
    assert [r[2] for r in table_cells(page, "simulation-table")] == ["x", "y"]


def test_warnings_recorded_in_summary_are_shown(solved, tmp_path):  # noqa: F811
    """Warnings are part of the result: a `warnings` list in summary.json appears on the page;
    a `warnings` that is not a list of text is a bad file (exit code 2)."""
    import json

    _, src = solved["snapshot"]
    res_dir = fresh_copy(src, tmp_path / "out")
    s = json.loads((res_dir / "summary.json").read_text())
    s["warnings"] = ["units.csv row 1 column price_up_per_mwh: unknown column ignored"]
    (res_dir / "summary.json").write_text(json.dumps(s))
    page = build_report(res_dir).read_text(encoding="utf-8")
    assert "Warnings recorded with the result" in page
    assert "price_up_per_mwh: unknown column ignored" in page
    s["warnings"] = "oops"
    (res_dir / "summary.json").write_text(json.dumps(s))
    with pytest.raises(ReportError, match=r"summary\.json key warnings: is not a list of text"):
        build_report(res_dir)


def test_text_from_the_files_is_escaped(tmp_path):
    """Autoescaping (Jinja2 docs, "HTML Escaping"): markup in a result file is shown as text,
    never run as part of the page."""
    out = tmp_path / "out"
    out.mkdir()
    (out / "diagnosis.csv").write_text(
        "family,element,event,short_mw,excess_hz,over_mw\n"
        'link,<script>alert(1)</script>,"<img src=x onerror=alert(2)>",0,0,0.5\n')
    page = build_report(out).read_text(encoding="utf-8")
    assert "<script>alert(1)" not in page and "<img src=x" not in page
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    assert page.count("<script>") == 1  # the page's own sorting script only

"""One self-contained HTML report of a result folder (report.html).

Reads the files `solve --out` writes (allocation.csv, events.csv, links.csv, summary.json,
schedule_wide.csv for horizons, diagnosis.csv when infeasible; proposal.csv and retune.json of
a retune folder) and, when present, the simulation outputs (simulation_summary.csv, in the
folder or in a simulation/ sub-folder, and PNG plots), all through output/folder.py. A case
folder, given or recorded in summary.json, adds the case settings, dead bands, load
self-regulation and period lengths.

The parts: output/folder.py reads, output/report_data.py and report_sections.py prepare what
each section shows, output/plots.py draws the figures (matplotlib's Figure API, inline SVG),
templates/report.html.j2 lays the page out (Jinja2, autoescaping on) with report.css and
report.js inlined; simulation PNGs are embedded as base64. The page has no external assets and
opens offline. Nothing is written unless every file reads cleanly; the page is written to a
temporary file first and then renamed into place.
"""

from __future__ import annotations

import base64
import functools
import os
import re
from importlib import resources
from pathlib import Path

from markupsafe import Markup, escape

from optreserve.output.curves import response_curves
from optreserve.output.folder import ResultFileError, ResultFolder, read_result
from optreserve.output.report_data import page as page_data

__all__ = ["REPORT_NAME", "ReportError", "ResultFolder", "build_report", "read_result",
           "render", "response_curves"]

REPORT_NAME = "report.html"
TEMPLATE = "report.html.j2"

# A result file that is missing or cannot be read (exit code 2; nothing is written).
ReportError = ResultFileError


def _breakable(text) -> Markup:
    """Escaped text that may wrap after _ and - (long ids in narrow boxes)."""
    return Markup(re.sub(r"([_\-])", r"\1<wbr>", str(escape(text))))


def _b64(data: bytes) -> str:
    return base64.b64encode(data).decode("ascii")


@functools.cache
def _environment():
    import jinja2

    env = jinja2.Environment(
        loader=jinja2.PackageLoader("optreserve.output", "templates"),
        autoescape=jinja2.select_autoescape(default=True, default_for_string=True),
        undefined=jinja2.StrictUndefined, keep_trailing_newline=True)
    env.filters["breakable"] = _breakable
    env.filters["b64"] = _b64
    return env


def _asset(name: str) -> Markup:
    """A CSS or JS file beside the template, inlined as it is (our own file, not user data)."""
    return Markup(resources.files("optreserve.output").joinpath("templates", name)
                  .read_text(encoding="utf-8"))


def render(rf: ResultFolder) -> str:
    """The whole page as one string."""
    data = page_data(rf)
    return _environment().get_template(TEMPLATE).render(
        css=_asset("report.css"), js=_asset("report.js"), **data)


def build_report(result_dir, case_dir=None) -> Path:
    """Write report.html into the result folder and return its path.

    case_dir: the case folder the result was solved from (optional; summary.json may record
    it). Raises ReportError (exit code 2) naming the file when a result file is missing or
    cannot be read, and CaseError for a bad case folder; nothing is written then."""
    rf = read_result(result_dir, case_dir)
    page = render(rf)
    out = rf.folder / REPORT_NAME
    tmp = rf.folder / f".{REPORT_NAME}.{os.getpid()}.tmp"  # then renamed: all or nothing
    try:
        tmp.write_text(page, encoding="utf-8")
        os.replace(tmp, out)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return out

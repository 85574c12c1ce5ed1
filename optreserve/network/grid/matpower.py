"""A reader of the numeric fields of a MATPOWER case file (version 2 `.m`), offline.

pandapower's own `.m` reader (pandapower.converter.from_mpc) hands `.m` files to the optional
package matpowercaseframes, which this project does not depend on (its `.mat` route uses
scipy.io, but MATPOWER cases are shared as `.m` text). The format is plain: assignments
`mpc.NAME = value;` with matrices in brackets, rows ended by `;` or a new line, `%` comments.
This module reads exactly that into a PYPOWER-style dict, which pandapower's from_ppc then
turns into a network, so that everything after the parsing is pandapower's well-kept code.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from ...errors import CaseError, Problem

# Standard MATPOWER widths (bus 13, gen 21, branch 13 columns); shorter rows of the optional
# trailing columns are padded with MATPOWER's defaults.
MIN_COLS = {"bus": 13, "gen": 10, "branch": 11}
FULL_COLS = {"bus": 13, "gen": 21, "branch": 13}
ANGMIN, ANGMAX = 11, 12  # branch columns padded with -360 / 360 degrees (no angle limit)

_ASSIGN = re.compile(r"^\s*mpc\.(\w+)\s*=\s*(.*)$")
_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$|^[+-]?(Inf|inf|NaN|nan)$")


def _strip_comment(line: str) -> str:
    """Drop a `%` comment, ignoring `%` inside single-quoted strings."""
    out, quoted = [], False
    for ch in line:
        if ch == "'":
            quoted = not quoted
        elif ch == "%" and not quoted:
            break
        out.append(ch)
    return "".join(out)


def parse_matpower(path: str | Path) -> dict:
    """Read a MATPOWER version 2 case file into {'baseMVA', 'version', 'bus', 'gen', 'branch',
    optional 'gencost', 'bus_name'}; bus numbers stay MATPOWER's own. Bad content is a
    CaseError naming the file, the line and the field."""
    path = Path(path)
    name = path.name
    try:
        lines = path.read_text(encoding="utf-8-sig").splitlines()
    except (OSError, UnicodeDecodeError) as exc:
        raise CaseError([Problem(name, f"cannot be read: {exc}")]) from None
    fields: dict[str, tuple[int, str]] = {}
    k = 0
    while k < len(lines):
        m = _ASSIGN.match(_strip_comment(lines[k]))
        if not m:
            k += 1
            continue
        field, rest, start = m.group(1), m.group(2), k + 1
        opener = rest.lstrip()[:1]
        if opener in "[{":
            closer = "]" if opener == "[" else "}"
            body = [rest]
            while closer not in _strip_comment(body[-1]) and k + 1 < len(lines):
                k += 1
                body.append(_strip_comment(lines[k]))
            if closer not in body[-1]:
                raise CaseError([Problem(name, f"mpc.{field}: '{opener}' is never closed",
                                         start, field)])
            fields[field] = (start, "\n".join(body))
        else:
            fields[field] = (start, rest)
        k += 1

    problems: list[Problem] = []
    for need in ("baseMVA", "bus", "gen", "branch"):
        if need not in fields:
            problems.append(Problem(name, f"has no mpc.{need}"))
    if problems:
        raise CaseError(problems)
    version = fields.get("version", (0, "'2'"))[1].strip().rstrip(";").strip().strip("'\"")
    if version != "2":
        raise CaseError([Problem(name, f"MATPOWER case version {version!r}: only version 2 is "
                                 "read", fields["version"][0], "version")])
    ppc: dict = {"version": "2"}
    line, text = fields["baseMVA"]
    base = text.strip().rstrip(";").strip()
    if not _NUMBER.match(base) or not np.isfinite(float(base)) or float(base) <= 0:
        raise CaseError([Problem(name, f"mpc.baseMVA is not a positive number: {base!r}",
                                 line, "baseMVA")])
    ppc["baseMVA"] = float(base)
    for field in ("bus", "gen", "branch", "gencost"):
        if field in fields:
            ppc[field] = _matrix(name, field, *fields[field], problems)
    if "bus_name" in fields:
        line, text = fields["bus_name"]
        ppc["bus_name"] = np.array(re.findall(r"'([^']*)'", text), dtype=object)
    if problems:
        raise CaseError(problems[:50])
    for field, width in FULL_COLS.items():
        # Columns past the standard ones (OPF results, tool-specific extras) are not read.
        a = ppc[field][:, :width]
        ppc[field] = a
        if a.shape[1] < width:
            given = a.shape[1]
            a = np.hstack([a, np.zeros((a.shape[0], width - given))])
            if field == "branch":
                if given <= ANGMIN:
                    a[:, ANGMIN] = -360.0
                a[:, ANGMAX] = 360.0
            ppc[field] = a
    # MATPOWER writes tap 0 for "no transformer"; pandapower's from_ppc expects 1 there
    # (pandapower.converter.matpower does the same after its own parsing).
    tap = ppc["branch"][:, 8]
    tap[tap == 0] = 1.0
    if "bus_name" in ppc and len(ppc["bus_name"]) != len(ppc["bus"]):
        del ppc["bus_name"]
    return ppc


def _matrix(name: str, field: str, line: int, text: str, problems: list[Problem]) -> np.ndarray:
    """The numbers of one bracketed matrix, row by row, checking the widths."""
    body = text.strip()
    if not body.startswith("["):
        problems.append(Problem(name, f"mpc.{field} is not a matrix in brackets", line, field))
        return np.zeros((0, FULL_COLS.get(field, 1)))
    body = body[1:body.rindex("]")]
    rows: list[list[float]] = []
    for off, physical in enumerate(body.split("\n")):
        for chunk in physical.split(";"):
            tokens = chunk.replace(",", " ").replace("...", " ").split()
            if not tokens:
                continue
            bad = [t for t in tokens if not _NUMBER.match(t)]
            if bad:
                problems.append(Problem(name, f"mpc.{field}: not a number: {bad[0]!r}",
                                        line + off, field))
                continue
            rows.append([float(t) for t in tokens])
    if not rows:
        if field in MIN_COLS:
            problems.append(Problem(name, f"mpc.{field} is empty", line, field))
        return np.zeros((0, FULL_COLS.get(field, 1)))
    width = max(len(r) for r in rows)
    short = [i for i, r in enumerate(rows) if len(r) != width]
    if field == "gencost":
        # Rows of different cost models have different lengths: pad with zeros.
        return np.array([r + [0.0] * (width - len(r)) for r in rows])
    if short:
        problems.append(Problem(name, f"mpc.{field} row {short[0] + 1} has "
                                f"{len(rows[short[0]])} values, other rows {width}", line, field))
        return np.zeros((0, FULL_COLS[field]))
    if width < MIN_COLS[field]:
        problems.append(Problem(name, f"mpc.{field} has {width} columns, at least "
                                f"{MIN_COLS[field]} needed", line, field))
        return np.zeros((0, FULL_COLS[field]))
    a = np.array(rows)
    if not np.isfinite(a[:, :MIN_COLS[field]]).all() and field == "bus":
        problems.append(Problem(name, f"mpc.{field} holds Inf or NaN", line, field))
    return a

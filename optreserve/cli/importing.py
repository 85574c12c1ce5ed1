"""`optreserve import FILE --out CASE`: a nodal case folder from a MATPOWER `.m` file or a
pandapower JSON network (network/grid/importers.py; needs the optional extra
`optreserve[grid]`, i.e. pandapower)."""

from __future__ import annotations

import sys
from pathlib import Path

from optreserve.cli.common import EXIT_OK, EXIT_OTHER
from optreserve.errors import CaseError, Problem


def add_import_parser(sub) -> None:
    p = sub.add_parser(
        "import", help="make a nodal case folder from a MATPOWER .m or pandapower .json file",
        description="Write a nodal case folder (buses.csv, units.csv, links.csv, areas.csv, "
                    "events.csv, case.toml) from an open network file. Defaults the formats "
                    "lack, to be edited: droop band 3-6 %%, load damping 1 %%/Hz, headroom "
                    "prices 8 (up) / 4 (down) per MW h, settled limit 200 mHz, 50 Hz for "
                    "MATPOWER files; events: the largest unit trips, and a load step of the "
                    "same size in the area with the most load. Branch limits: MATPOWER rate_a, "
                    "pandapower ratings (empty = unmonitored). Pre-event flows: a DC load flow.")
    p.add_argument("file", metavar="FILE", help="a MATPOWER case (.m) or pandapower JSON (.json)")
    p.add_argument("--out", required=True, metavar="CASE", help="new case folder (must not exist "
                   "or be empty)")
    p.add_argument("--drop-overloaded-limits", action="store_true",
                   help="leave links whose pre-event flow already exceeds the limit unmonitored "
                        "(default: keep the limits and report the overloads)")
    p.add_argument("--quiet", action="store_true", help="print nothing on success")
    p.set_defaults(func=cmd_import)


def cmd_import(args) -> int:
    from optreserve.network.grid.importers import (
        read_matpower,
        read_pandapower_json,
        write_case_folder,
    )

    src = Path(args.file)
    if not src.is_file():
        raise CaseError([Problem(str(src), "is not a file")])
    suffix = src.suffix.lower()
    if suffix == ".m":
        reader = read_matpower
    elif suffix == ".json":
        reader = read_pandapower_json
    else:
        raise CaseError([Problem(str(src), "unknown format: expected a MATPOWER .m or a "
                                 "pandapower .json file")])
    try:
        import pandapower  # noqa: F401 - the parser behind both formats
    except ImportError:
        print("error: optreserve import needs pandapower: pip install \"optreserve[grid]\" "
              "(or pip install pandapower)", file=sys.stderr)
        return EXIT_OTHER
    tables = reader(src, drop_overloaded_limits=args.drop_overloaded_limits)
    write_case_folder(tables, args.out)
    if not args.quiet:
        print(f"wrote {args.out}: {len(tables.buses)} buses, {len(tables.units)} units, "
              f"{len(tables.links)} links, {len(tables.areas)} areas, {len(tables.events)} "
              "events (defaults: check case.toml, areas.csv, units.csv, events.csv)")
        for note in tables.notes:
            print(f"note: {note}", file=sys.stderr)
        for o in tables.overloads[:20]:
            print(f"overload: link {o.link} carries {o.flow_mw:.1f} MW before any event, limit "
                  f"{o.limit_mw:.1f} MW", file=sys.stderr)
        if len(tables.overloads) > 20:
            print(f"overload: ... and {len(tables.overloads) - 20} more", file=sys.stderr)
    return EXIT_OK

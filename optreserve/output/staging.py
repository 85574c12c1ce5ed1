"""Atomic output folders: checks on --out, a staging folder, and the move into place."""

from __future__ import annotations

import os
import shutil
import tempfile
from contextlib import contextmanager
from pathlib import Path

from optreserve.errors import OptreserveError


class OutputExistsError(OptreserveError):
    exit_code = 2


def check_out(out: Path, force: bool) -> None:
    """Refuse a non-empty output folder without force (before any work is done)."""
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise OutputExistsError(f"{out}: exists and is not a folder")
    if out.is_dir() and any(out.iterdir()) and not force:
        raise OutputExistsError(f"{out}: folder is not empty; choose another --out or add "
                                "--force to replace optreserve's files in it")


@contextmanager
def staged_output(out: Path, force: bool = False):
    """Yield a temporary folder beside `out`; when the block ends normally its files move into
    `out` all at once (a new folder is renamed into place). An exception or Ctrl-C leaves `out`
    as it was. With force, only the files written here replace their namesakes in a non-empty
    folder; nothing else there is touched."""
    out = Path(out)
    check_out(out, force)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.", dir=out.parent))
    try:
        yield tmp
        _move_into(tmp, out)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def _move_into(tmp: Path, out: Path) -> None:
    if not out.exists():
        os.replace(tmp, out)
        return
    if not any(out.iterdir()):
        out.rmdir()
        os.replace(tmp, out)
        return
    for f in sorted(tmp.iterdir()):
        if f.is_dir() and (out / f.name).is_dir():  # a sub-folder (a batch's case): merge
            _move_into(f, out / f.name)
        else:
            os.replace(f, out / f.name)

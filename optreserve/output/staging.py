"""Output folders that are written as a whole or not at all.

* `check_out` looks at --out before any work: symbolic links are followed (a dangling one is
  refused), it must be a writable folder or creatable, not empty only with --force, and never a
  place where an output could replace a file of the case (see `check_inputs`).
* `staged_output` gives a staging folder on the same filesystem as --out: for a new --out a
  hidden folder beside it, renamed into place; for an existing --out a hidden folder inside it.
  Its name is `.optreserve-staging-HOST-PID-XXXXXXXX` (after the folder name when beside it);
  one left by a killed run is removed by the next run that writes there.
* Every output folder holds `.optreserve-manifest.json`: which files optreserve wrote, by
  group (result, simulation, sweep, batch, case). A run replaces the earlier files of its own
  group as a whole: the ones it writes again and the ones it does not (a result set leaves no
  stale allocation.csv beside a new diagnosis.csv). Files not in the manifest are the user's
  and stay untouched unless this run writes a file of the same name (what --force permits).
  The moves into an existing folder are undone when one of them fails.
* Folders and files get the user's umask (no fixed 0700).
"""

from __future__ import annotations

import fnmatch
import json
import os
import re
import secrets
import shutil
import socket
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from pathlib import Path

from optreserve import interrupt
from optreserve.errors import OptreserveError

MANIFEST = ".optreserve-manifest.json"
STAGING_MARK = ".optreserve-staging-"
_STAGING_RE = re.compile(r"optreserve-staging-(?P<host>.+)-(?P<pid>\d+)-[0-9a-f]{8}$")

# What each command writes into --out (patterns allowed): checked against the case's files
# before any work, so that no output can ever take the place of an input.
OUTPUT_NAMES = {
    "solve": ("allocation.csv", "events.csv", "links.csv", "prices.csv", "summary.json",
              "schedule_wide.csv", "energy_prices.csv", "diagnosis.csv", "report.html",
              "comparison.csv", "comparison.json", "uniform_allocation.csv"),
    "retune": ("allocation.csv", "events.csv", "links.csv", "prices.csv", "summary.json",
               "schedule_wide.csv", "energy_prices.csv", "diagnosis.csv", "proposal.csv",
               "before_after.csv", "retune.json"),
    "simulate": ("simulation_summary.csv", "simulation.json", "series_*.csv", "plot_*.png"),
    "sweep": ("sweep.csv", "sweep.parquet", "sweep.png", "sweep.json"),
    "batch": ("batch.csv", "batch.parquet", "batch.json"),
}
# The files a case folder is read from (case/reader.py), whether present or not.
INPUT_NAMES = ("case.toml", "units.csv", "areas.csv", "links.csv", "events.csv",
               "*_by_period.csv")
# A folder written before manifests existed: these names count as its result group when its
# summary.json is optreserve's.
_LEGACY_RESULT = OUTPUT_NAMES["solve"] + OUTPUT_NAMES["retune"]

_committed: list[Path] = []  # output folders completed by this process (for messages)


class OutputExistsError(OptreserveError):
    """--out cannot be used (exit code 2), found before any work."""

    exit_code = 2


class OutputWriteError(OptreserveError):
    """The finished files could not be moved into place (exit code 1); --out is as before."""

    exit_code = 1


# ------------------------------------------------------------------ checks before the work
def resolve_out(out: str | Path) -> Path:
    """--out with symbolic links followed; a link to nothing is refused."""
    p = Path(out)
    if p.is_symlink() and not p.exists():
        raise OutputExistsError(f"{out}: is a symbolic link to {os.readlink(p)}, which does not "
                                "exist; give the folder itself or create it")
    return Path(os.path.realpath(p))


def check_out(out: str | Path, force: bool, inputs: Iterable[str | Path] = (),
              command: str | None = None) -> Path:
    """Refuse an unusable --out before any work is done; return it with links resolved.
    inputs: folders the run reads (its case); command: a key of OUTPUT_NAMES."""
    real = resolve_out(out)
    try:
        if real.exists():
            if not real.is_dir():
                raise OutputExistsError(f"{out}: exists and is not a folder")
            if not os.access(real, os.W_OK | os.X_OK):
                raise OutputExistsError(f"{out}: folder is not writable")
            if not force and any(p.name != MANIFEST and not _is_staging(p.name)
                                 for p in real.iterdir()):
                raise OutputExistsError(f"{out}: folder is not empty; choose another --out or "
                                        "add --force to replace optreserve's files in it")
        else:
            anc = real.parent
            while not anc.exists() and anc != anc.parent:
                anc = anc.parent
            if not anc.is_dir():
                raise OutputExistsError(f"{out}: cannot be created: {anc} is not a folder")
            if not os.access(anc, os.W_OK | os.X_OK):
                raise OutputExistsError(f"{out}: cannot be created: {anc} is not writable")
    except PermissionError as exc:
        raise OutputExistsError(f"{out}: cannot be read ({exc.strerror})") from None
    check_inputs(real, inputs, command, label=str(out))
    return real


def check_inputs(real: Path, inputs: Iterable[str | Path], command: str | None,
                 label: str) -> None:
    """--out equal to an input folder is allowed only when no file the command writes can
    have the name of a file the case is read from or holds (so `solve` and `retune` are always
    refused there; `simulate` and `sweep` write names of their own). A folder inside the case
    folder is fine: the reader never looks into sub-folders."""
    for folder in inputs:
        f = Path(os.path.realpath(folder))
        if f != real:
            continue
        outs = OUTPUT_NAMES.get(command or "", ("*",))
        try:
            held = [p.name for p in f.iterdir() if p.name != MANIFEST]
        except OSError:
            held = []
        owned = set(read_manifest(f))
        clash = sorted({n for n in list(INPUT_NAMES) + [h for h in held if h not in owned]
                        for o in outs if fnmatch.fnmatch(n, o) or fnmatch.fnmatch(o, n)})
        if clash:
            raise OutputExistsError(
                f"{label}: is the case folder {folder}, and this command would write "
                f"{clash[0]} there; choose another --out (a sub-folder is fine)")


# ------------------------------------------------------------------ manifest
def read_manifest(folder: Path) -> dict[str, str]:
    """name -> group of the files optreserve wrote into `folder` ({} when none)."""
    p = Path(folder) / MANIFEST
    try:
        doc = json.loads(p.read_text(encoding="utf-8"))
        files = doc.get("files", {})
        return {str(k): str(v) for k, v in files.items() if "/" not in str(k)
                and str(k) not in ("", ".", "..")}
    except (OSError, ValueError, AttributeError):
        pass
    try:  # a result folder from before manifests: its well-known names
        summary = json.loads((Path(folder) / "summary.json").read_text(encoding="utf-8"))
        if isinstance(summary, dict) and "optreserve_version" in summary:
            return {n: "result" for n in _LEGACY_RESULT if (Path(folder) / n).exists()}
    except (OSError, ValueError):
        pass
    return {}


def _manifest_text(files: dict[str, str]) -> str:
    from optreserve import __version__

    return json.dumps({"written_by": f"optreserve {__version__}",
                       "note": "files optreserve wrote here, by group; a later run replaces "
                               "its group's files as a whole and leaves every other file alone",
                       "files": dict(sorted(files.items()))}, indent=2) + "\n"


def register(out: str | Path, names: Iterable[str], group: str = "result") -> None:
    """Add files written into `out` by other means (report.html) to its manifest."""
    folder = resolve_out(out)
    files = read_manifest(folder)
    files.update({n: group for n in names})
    tmp = folder / f"{STAGING_MARK}{_token()}"
    with interrupt.deferred():
        try:
            tmp.write_text(_manifest_text(files), encoding="utf-8")
            os.replace(tmp, folder / MANIFEST)
        finally:
            tmp.unlink(missing_ok=True)


# ------------------------------------------------------------------ staging
def _token() -> str:
    return f"{socket.gethostname()}-{os.getpid()}-{secrets.token_hex(4)}"


def _is_staging(name: str) -> bool:
    return STAGING_MARK in name and name.startswith(".")


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # someone else's live process
        return True
    return True


def clean_stale(folder: Path) -> list[str]:
    """Remove staging folders of runs on this machine that no longer exist."""
    removed = []
    host = socket.gethostname()
    try:
        entries = list(Path(folder).iterdir())
    except OSError:
        return removed
    for p in entries:
        m = _STAGING_RE.search(p.name)
        if not (_is_staging(p.name) and m and m["host"] == host):
            continue
        if not _alive(int(m["pid"])):
            if p.is_dir() and not p.is_symlink():
                shutil.rmtree(p, ignore_errors=True)
            else:
                p.unlink(missing_ok=True)
            removed.append(p.name)
    return removed


def _make_staging(holder: Path, prefix: str) -> Path:
    """A new folder with the umask's mode (mkdtemp would give 0700)."""
    for _ in range(100):
        p = holder / f"{prefix}{STAGING_MARK}{_token()}"
        try:
            os.mkdir(p, 0o777)
            return p
        except FileExistsError:
            continue
    raise OutputWriteError(f"{holder}: cannot make a staging folder")


def _make_parents(folder: Path) -> list[Path]:
    made = []
    missing = []
    p = folder
    while not p.exists():
        missing.append(p)
        p = p.parent
    for p in reversed(missing):
        os.mkdir(p, 0o777)
        made.append(p)
    return made


@contextmanager
def staged_output(out: str | Path, force: bool = False, group: str = "result"
                  ) -> Iterator[Path]:
    """Yield a staging folder; when the block ends normally its files replace `group`'s
    earlier files in `out` as one set (a new `out` is the staging folder renamed). An
    exception, Ctrl-C or SIGTERM leaves `out` as it was and removes the staging folder."""
    real = check_out(out, force)
    made: list[Path] = []
    tmp = None
    done = False
    try:
        with interrupt.deferred():
            if real.exists():
                holder, prefix = real, ""
            else:
                made = _make_parents(real.parent)
                holder, prefix = real.parent, f".{real.name}"
            clean_stale(holder)
            if holder == real:  # one a killed run left beside a new folder
                clean_stale(real.parent)
            tmp = _make_staging(holder, prefix)
        yield tmp
        with interrupt.deferred():
            _commit(tmp, real, group, out)
            done = True
            _committed.append(real)
    finally:
        with interrupt.deferred():
            if tmp is not None and tmp.exists() and not (tmp / ".keep").exists():
                shutil.rmtree(tmp, ignore_errors=True)
            if not done:
                for p in reversed(made):
                    try:
                        p.rmdir()
                    except OSError:
                        break


def _commit(tmp: Path, real: Path, group: str, label) -> None:
    new = sorted(p.name for p in tmp.iterdir() if p.name != MANIFEST)
    if not real.exists():
        (tmp / MANIFEST).write_text(_manifest_text({n: group for n in new}), encoding="utf-8")
        try:
            os.replace(tmp, real)
        except OSError as exc:
            raise OutputWriteError(f"{label}: cannot move the results into place "
                                   f"({exc.strerror or exc}); nothing was written") from None
        return
    old = read_manifest(real)
    files = {n: g for n, g in old.items() if g != group and n not in new}
    files.update({n: group for n in new})
    (tmp / MANIFEST).write_text(_manifest_text(files), encoding="utf-8")
    leaving = {n for n, g in old.items() if g == group and n not in new}
    replaced = {n for n in new + [MANIFEST] if os.path.lexists(real / n)}
    carried = _user_files_in_subfolders(tmp, real, new)
    backup = tmp / ".previous"
    os.mkdir(backup, 0o700)
    moved_old, placed_new, moved_user = [], [], []
    try:
        for sub, name in carried:  # a user's file in a result sub-folder goes along with it
            os.replace(real / sub / name, tmp / sub / name)
            moved_user.append((sub, name))
        for n in sorted(leaving | replaced):
            if os.path.lexists(real / n):
                os.replace(real / n, backup / n)
                moved_old.append(n)
        for n in new + [MANIFEST]:  # the manifest last: it marks the set complete
            os.replace(tmp / n, real / n)
            placed_new.append(n)
    except BaseException as exc:
        _roll_back(tmp, real, backup, moved_old, placed_new, label, moved_user)
        if isinstance(exc, OSError):
            raise OutputWriteError(f"{label}: cannot move the results into place "
                                   f"({exc.strerror or exc}); the folder is as it was"
                                   ) from None
        raise


def _user_files_in_subfolders(tmp: Path, real: Path, new: list[str]) -> list[tuple[str, str]]:
    """(sub-folder, name) of the files a user put into a result sub-folder (a batch's case
    folder) that this run replaces: the files not in that sub-folder's manifest and not
    written again. They move into the new sub-folder, so the whole-set swap keeps them."""
    out = []
    for n in new:
        old_dir, new_dir = real / n, tmp / n
        if not (old_dir.is_dir() and not old_dir.is_symlink() and new_dir.is_dir()
                and not new_dir.is_symlink()):
            continue
        ours = set(read_manifest(old_dir)) | {MANIFEST}
        out += [(n, f.name) for f in sorted(old_dir.iterdir())
                if f.name not in ours and not _is_staging(f.name)
                and not os.path.lexists(new_dir / f.name)]
    return out


def _roll_back(tmp, real, backup, moved_old, placed_new, label, moved_user=()) -> None:
    try:
        for n in reversed(placed_new):
            os.replace(real / n, tmp / n)
        for n in reversed(moved_old):
            os.replace(backup / n, real / n)
        for sub, name in reversed(moved_user):  # the user's files back where they were
            os.replace(tmp / sub / name, real / sub / name)
    except OSError as exc:
        (tmp / ".keep").touch()  # the earlier files must not be deleted with the staging
        raise OutputWriteError(
            f"{label}: the results could not be moved into place and the earlier files could "
            f"not all be put back ({exc.strerror or exc}); they are in {backup}") from None


def committed() -> list[Path]:
    """Output folders this process has completed (cli/app.py: what an interrupt left)."""
    return list(_committed)


def forget_committed() -> None:
    _committed.clear()

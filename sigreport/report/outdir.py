"""Where a report may be written, and what may be replaced (docs/usage.md, "What OUTDIR may be").

Three rules keep a run from destroying data:

- OUTDIR is never one of the inputs (the study folder, the case file, its masks, the lexicon
  folders), never inside one and never around one: :func:`check_outdir` refuses it before any
  work, with or without ``--force``.
- Every folder the tool creates carries a mark, :data:`MARK_NAME`, listing the files it wrote.
  ``--force`` replaces a folder only when it carries the mark and holds nothing else (or is
  empty); the check is repeated on the old folder after it has been moved aside, just before it
  is deleted, so a folder swapped in meanwhile is put back untouched.
- A folder that cannot be written (a read-only or full file system, names the file system
  refuses) is bad input (``InputError``, exit code 2), found by a probe before any work.

:func:`exit_on_termination` turns SIGTERM and SIGHUP into ``SystemExit`` while a report is being
written, so that the writer's clean-up runs as it does for Ctrl-C (SIGKILL cannot be caught).
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import stat
import tempfile
import threading
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from sigreport import __version__, lexicon
from sigreport.errors import InputError

MARK_NAME = ".sigreport-folder.json"
# Hidden siblings the writer makes next to OUTDIR: ".<name>.partial-<12 hex>", ".<name>.old-...".
_HIDDEN_SUFFIX_LENGTH = len(".partial-") + 12 + 1
# How much of a long name the hidden siblings keep, so that they stay within NAME_MAX.
_HIDDEN_NAME_KEEP = 120
_FALLBACK_NAME_MAX = 255  # POSIX NAME_MAX of common file systems (ext4, xfs, tmpfs)
_FALLBACK_PATH_MAX = 4096  # Linux PATH_MAX
_LISTED_FOREIGN = 5

Inputs = Sequence[tuple[str, Path]]


def shown(path: Path | str, limit: int = 160) -> str:
    """``path`` for a message, its middle elided when longer than ``limit`` characters."""
    text = str(path)
    if len(text) <= limit:
        return text
    keep = (limit - 1) // 2
    return f"{text[:keep]}…{text[-keep:]}"


def hidden_sibling(out_dir: Path, what: str, token: str) -> Path:
    """``.<name>.<what>-<token>`` beside ``out_dir``, the name shortened to stay valid."""
    return out_dir.parent / f".{out_dir.name[:_HIDDEN_NAME_KEEP]}.{what}-{token}"


def report_inputs(
    case: Any, study_dir: Path | None, site: Path | str | None
) -> list[tuple[str, Path]]:
    """The paths a report run reads and must never write to: the study folder, the case file,
    every mask file, the site lexicon folder and the bundled lexicon.

    ``case`` is a :class:`sigreport.model.Case`.
    """
    found: list[tuple[str, Path]] = []
    if study_dir is not None:
        found.append(("the study folder", Path(study_dir)))
    found.append(("the case file", Path(case.path)))
    for roi in case.rois:
        if getattr(roi, "mask", None) is not None:
            found.append((f"the mask file of ROI {roi.id}", Path(roi.mask)))
    site_folder = lexicon.site_dir(site)
    if site_folder is not None:
        found.append(("the lexicon folder", site_folder))
    found.append(("the bundled lexicon", lexicon.bundled_dir()))
    return found


def check_outdir(out_dir: Path | str, *, inputs: Inputs = (), force: bool = False) -> Path:
    """Refuse an OUTDIR that cannot or must not be written, before any work.

    Parameters
    ----------
    out_dir
        The report folder asked for.
    inputs
        ``(what, path)`` pairs that must stay untouched, e.g. ``("the study folder", study)``
        (see :func:`report_inputs`).
    force
        Whether an existing OUTDIR may be replaced (only a folder the tool marked, see
        :func:`replace_problem`).

    Returns
    -------
    Path
        ``out_dir`` as given.

    Raises
    ------
    InputError
        When OUTDIR is, contains or lies inside one of ``inputs``; is an existing file; exists
        without ``force``; exists with ``force`` but is not the tool's own folder; has a name or
        path the file system refuses; or when its parent cannot be written.
    """
    out = Path(out_dir)
    _check_lengths(out)
    real_out = _real(out)
    for what, path in inputs:
        relation = _relation(real_out, _real(Path(path)))
        if relation:
            raise InputError(
                f"OUTDIR {shown(out)} {relation} {what} {shown(path)}; "
                "the inputs are never written to, replaced or deleted"
            )
    try:
        info = out.lstat()
    except (FileNotFoundError, NotADirectoryError):
        info = None
    except OSError as exc:
        raise InputError(f"cannot use OUTDIR {shown(out)}: {exc.strerror}") from None
    if info is not None:
        if stat.S_ISLNK(info.st_mode) and not out.is_dir():
            raise InputError(f"OUTDIR {shown(out)} is an existing file, not a folder (a link)")
        if stat.S_ISREG(info.st_mode):
            raise InputError(f"OUTDIR {shown(out)} is an existing file, not a folder")
        if not stat.S_ISDIR(info.st_mode) and not stat.S_ISLNK(info.st_mode):
            raise InputError(
                f"OUTDIR {shown(out)} exists and is not a folder (a device, pipe or socket)"
            )
        if not force:
            raise InputError(f"{shown(out)} exists; use --force to replace it")
        if stat.S_ISLNK(info.st_mode):
            raise InputError(
                f"OUTDIR {shown(out)} is a symbolic link; --force replaces only a real folder "
                "(give the folder it points to)"
            )
        problem = replace_problem(out)
        if problem:
            raise InputError(problem)
    _probe(out, out.parent if info is not None else out)
    return out


def prepare_folder(folder: Path | str, *, kind: str, force: bool = False) -> Path:
    """Make ``folder`` ready for the tool to fill (the ``demo`` command's folder): absent or
    empty is fine; a non-empty folder is emptied only with ``force`` and only when it is the
    tool's own (:func:`replace_problem`).

    Raises
    ------
    InputError
        When ``folder`` is a file, is not empty and ``force`` is false, is not the tool's own,
        or cannot be written.
    """
    path = Path(folder)
    _check_lengths(path)
    try:
        info = path.lstat()
    except (FileNotFoundError, NotADirectoryError):
        info = None
    except OSError as exc:
        raise InputError(f"cannot use {shown(path)}: {exc.strerror}") from None
    if info is not None:
        if not stat.S_ISDIR(info.st_mode):
            raise InputError(f"{shown(path)} exists and is not a folder")
        if any(_entries(path, limit=1)):
            if not force:
                raise InputError(
                    f"{shown(path)} exists and is not empty; use --force to replace it"
                )
            problem = replace_problem(path, kind=kind)
            if problem:
                raise InputError(problem)
            shutil.rmtree(path)
    _probe(path, path.parent if info is not None else path)
    return path


def _check_lengths(out: Path) -> None:
    absolute = Path(os.path.abspath(out))
    anchor = _existing_ancestor(absolute)
    name_max = _pathconf(anchor, "PC_NAME_MAX", _FALLBACK_NAME_MAX)
    path_max = _pathconf(anchor, "PC_PATH_MAX", _FALLBACK_PATH_MAX)
    for part in absolute.parts[1:]:
        size = len(os.fsencode(part))
        if size > name_max:
            raise InputError(
                f"OUTDIR {shown(out)}: a name of {len(part)} characters is too long "
                f"(the file system allows {name_max} bytes per name)"
            )
    size = len(os.fsencode(str(absolute)))
    # Room for the files written inside it (images/<lesion>_<role>-<n>.png).
    if size + 80 > path_max:
        raise InputError(
            f"OUTDIR {shown(out)}: a path of {len(str(absolute))} characters is too long "
            f"(the file system allows {path_max} bytes, with room for the files inside)"
        )


def _pathconf(path: Path, name: str, fallback: int) -> int:
    try:
        value = os.pathconf(path, name)
    except (OSError, ValueError):
        return fallback
    return value if value > 0 else fallback


def _existing_ancestor(path: Path) -> Path:
    for candidate in (path, *path.parents):
        try:
            if candidate.exists():
                return candidate
        except OSError:
            continue
    return Path(path.anchor or "/")


def _real(path: Path) -> Path:
    try:
        return path.resolve()
    except (OSError, RuntimeError):
        return Path(os.path.abspath(path))


def _relation(out: Path, path: Path) -> str | None:
    if out == path:
        return "is"
    if path in out.parents:
        return "is inside"
    if out in path.parents:
        return "contains"
    return None


def _probe(out: Path, target: Path) -> None:
    """Create and remove a hidden folder where OUTDIR's temporary folder will go."""
    anchor = _existing_ancestor(Path(os.path.abspath(target)))
    if not anchor.is_dir():
        raise InputError(f"cannot write OUTDIR {shown(out)}: {shown(anchor)} is not a folder")
    try:
        probe = tempfile.mkdtemp(prefix=".sigreport-probe-", dir=anchor)
        os.rmdir(probe)
    except OSError as exc:
        reason = exc.strerror or str(exc)
        raise InputError(
            f"cannot write OUTDIR {shown(out)}: {reason} (in {shown(anchor)})"
        ) from None


# --------------------------------------------------------------------------------------------
# The mark


def _entries(folder: Path, *, limit: int | None = None, skip_own: bool = False) -> Iterator[str]:
    """Every non-folder entry under ``folder`` (links are not followed), as relative POSIX
    paths; stops after ``limit`` entries. With ``skip_own``, a sub-folder that is itself the
    tool's own (a report inside a demo folder) answers for itself and is skipped."""
    pending = [(folder, "")]
    count = 0
    while pending:
        path, prefix = pending.pop()
        with os.scandir(path) as listing:
            for entry in listing:
                relative = prefix + entry.name
                if entry.is_dir(follow_symlinks=False):
                    sub = Path(entry.path)
                    if not (skip_own and _read_mark(sub) and replace_problem(sub) is None):
                        pending.append((sub, relative + "/"))
                    continue
                yield relative
                count += 1
                if limit is not None and count >= limit:
                    return


def write_mark(folder: Path, *, kind: str) -> Path:
    """Write :data:`MARK_NAME` in ``folder``, listing every file now under it.

    Parameters
    ----------
    folder
        A folder the tool created and filled.
    kind
        What it is: ``"report"``, ``"demo"`` or ``"error"``.
    """
    files = sorted(name for name in _entries(folder) if name != MARK_NAME)
    mark = {"written_by": "sigreport", "version": __version__, "kind": kind, "files": files}
    path = folder / MARK_NAME
    path.write_text(json.dumps(mark, indent=1) + "\n", encoding="utf-8")
    return path


def _read_mark(folder: Path) -> dict[str, Any] | None:
    path = folder / MARK_NAME
    try:
        if not stat.S_ISREG(path.lstat().st_mode) or path.lstat().st_size > 16 * 1024 * 1024:
            return None
        mark = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if (
        not isinstance(mark, dict)
        or mark.get("written_by") != "sigreport"
        or not isinstance(mark.get("files"), list)
        or not all(isinstance(f, str) for f in mark["files"])
    ):
        return None
    return mark


def replace_problem(folder: Path, *, kind: str = "report") -> str | None:
    """Why ``folder`` must not be replaced, or None when it may be: it is empty, or it carries
    the tool's mark and holds only the files the mark lists."""
    try:
        if not any(_entries(folder, limit=1)):
            return None
        mark = _read_mark(folder)
        if mark is None:
            return (
                f"{shown(folder)} is not a {kind} folder written by sigreport (it has no "
                f"{MARK_NAME} mark); it is never replaced or deleted, even with --force: "
                "remove it yourself or choose another OUTDIR"
            )
        listed = set(mark["files"]) | {MARK_NAME}
        foreign = []
        for name in _entries(folder, skip_own=True):
            if name not in listed:
                foreign.append(name)
                if len(foreign) > _LISTED_FOREIGN:
                    break
    except OSError as exc:
        return f"cannot check {shown(folder)} before replacing it: {exc.strerror or exc}"
    if foreign:
        more = ", ..." if len(foreign) > _LISTED_FOREIGN else ""
        names = ", ".join(foreign[:_LISTED_FOREIGN])
        return (
            f"{shown(folder)} holds files sigreport did not write ({names}{more}); it is never "
            "replaced or deleted with them, even with --force: move them out or choose another "
            "OUTDIR"
        )
    return None


def is_report_folder(folder: Path) -> bool:
    """Whether ``folder`` carries the tool's mark and holds nothing else than it lists."""
    return _read_mark(folder) is not None and replace_problem(folder) is None


# --------------------------------------------------------------------------------------------
# Signals


@contextmanager
def exit_on_termination() -> Iterator[None]:
    """While inside, SIGTERM and SIGHUP raise ``SystemExit(128 + signal)`` (the shell's exit
    status for a signal) so that ``finally`` and ``except BaseException`` clean-ups run; later
    copies of the signal are ignored while cleaning up. A no-op outside the main thread, where
    Python cannot set handlers."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    wanted = [signal.SIGTERM] + ([signal.SIGHUP] if hasattr(signal, "SIGHUP") else [])

    def stop(signum: int, frame: object) -> None:
        for number in wanted:
            signal.signal(number, signal.SIG_IGN)
        raise SystemExit(128 + signum)

    previous = {number: signal.signal(number, stop) for number in wanted}
    try:
        yield
    finally:
        for number, handler in previous.items():
            signal.signal(number, handler if handler is not None else signal.SIG_DFL)

"""A header index cache: a repeat ``scan`` or ``report`` of a study reuses what the last run read.

Reading a file's header is most of the cost of indexing a study; the answer (the file's frame
records, or the reason it is skipped) only changes when the file does. The cache keeps, per
study folder, each file's answer keyed by its path relative to the folder, its size and its
modification time (nanoseconds); an entry is used only when all three still match, so a file
that changed, appeared or vanished is read again.

Where: ``$SIGREPORT_CACHE_DIR`` if set, else ``$XDG_CACHE_HOME/sigreport``, else
``~/.cache/sigreport`` (the XDG Base Directory Specification's user cache directory); never
inside the study folder (the input is never written to). The files hold patient data (names,
ids, dates from the headers): the folder is created ``0700`` and each file ``0600``, and a cache
file that is not the user's own, or is readable by others, is not trusted. A cache file that
cannot be read (corrupt, from another version of sigreport) is ignored and rebuilt. Only
sigreport's own record types are unpickled (a restricted unpickler), never arbitrary classes.
"""

from __future__ import annotations

import hashlib
import io
import os
import pickle
import stat
import tempfile
from collections.abc import Callable
from dataclasses import replace
from pathlib import Path
from typing import Any

from sigreport import __version__
from sigreport.ingest.attributes import FrameRecord, SkipFile

__all__ = ["HeaderCache", "cache_dir", "CACHE_ENV"]

CACHE_ENV = "SIGREPORT_CACHE_DIR"
# Bumped when the cached records' meaning changes (with the package version, part of the key).
_FORMAT = 2  # 2: Acquisition and Scaling fields for vendor TI, echo lists, private scale
# Modules whose classes a cache file may hold (sigreport's frozen dataclasses and enums), and
# the few standard types they use.
_ALLOWED_MODULES = ("sigreport.model", "sigreport.ingest.header", "sigreport.ingest.attributes")
_ALLOWED_GLOBALS = {
    ("pathlib", "PosixPath"),
    ("pathlib", "WindowsPath"),
    ("pathlib", "Path"),
    ("builtins", "frozenset"),
    ("builtins", "set"),
}

Entry = tuple[int, int, tuple[FrameRecord, ...] | str]  # size, mtime_ns, records or skip reason


def cache_dir() -> Path:
    """The user's cache folder for sigreport (created on the first save, not here)."""
    explicit = os.environ.get(CACHE_ENV)
    if explicit:
        return Path(explicit)
    xdg = os.environ.get("XDG_CACHE_HOME")
    base = Path(xdg) if xdg and Path(xdg).is_absolute() else Path.home() / ".cache"
    return base / "sigreport"


class _RecordUnpickler(pickle.Unpickler):
    def find_class(self, module: str, name: str) -> Any:
        if module in _ALLOWED_MODULES or (module, name) in _ALLOWED_GLOBALS:
            return super().find_class(module, name)
        raise pickle.UnpicklingError(f"{module}.{name} is not allowed in a header cache")


def _inside(path: Path, folder: Path) -> bool:
    try:
        path.resolve().relative_to(folder.resolve())
    except ValueError:
        return False
    return True


class HeaderCache:
    """The cached header answers of one study folder.

    Use :meth:`read_frames` in place of :func:`sigreport.ingest.header.read_frames` while
    indexing, then :meth:`save`.
    """

    def __init__(self, study_dir: Path, *, directory: Path | None = None, enabled: bool = True):
        self.study_dir = Path(study_dir)
        root = directory if directory is not None else cache_dir()
        self.enabled = enabled and not _inside(root, self.study_dir)
        digest = hashlib.sha256(str(self.study_dir.resolve()).encode("utf-8")).hexdigest()[:32]
        self.path = root / f"index-{digest}.pickle"
        self._old: dict[str, Entry] = {}
        self._new: dict[str, Entry] = {}
        self.hits = 0
        self.misses = 0
        if self.enabled:
            self._old = self._load()

    # ----------------------------------------------------------------------------------------

    def _load(self) -> dict[str, Entry]:
        try:
            with open(self.path, "rb") as handle:
                info = os.fstat(handle.fileno())
                if info.st_uid != os.getuid() or info.st_mode & (stat.S_IRWXG | stat.S_IRWXO):
                    return {}  # not the user's own, or open to others: not trusted
                payload = _RecordUnpickler(io.BytesIO(handle.read())).load()
        except FileNotFoundError:
            return {}
        except Exception:  # noqa: BLE001 - a corrupt cache is ignored and rebuilt
            return {}
        if (
            not isinstance(payload, dict)
            or payload.get("format") != _FORMAT
            or payload.get("version") != __version__
            or payload.get("study_dir") != str(self.study_dir.resolve())
            or not isinstance(payload.get("entries"), dict)
        ):
            return {}
        return payload["entries"]

    def read_frames(
        self, path: Path, reader: Callable[[Path], list[FrameRecord]]
    ) -> list[FrameRecord]:
        """``reader(path)``, or the cached answer when the file's size and modification time
        are those cached. Raises :class:`SkipFile` (cached or fresh) like the reader."""
        if not self.enabled:
            return reader(path)
        key = os.path.relpath(path, self.study_dir)
        info = os.stat(path)
        cached = self._old.get(key)
        if cached is not None and cached[0] == info.st_size and cached[1] == info.st_mtime_ns:
            self.hits += 1
            self._new[key] = cached
            answer = cached[2]
            if isinstance(answer, str):
                raise SkipFile(answer)
            return [replace(record, path=path) for record in answer]
        self.misses += 1
        try:
            records = reader(path)
        except SkipFile as exc:
            self._new[key] = (info.st_size, info.st_mtime_ns, str(exc))
            raise
        self._new[key] = (info.st_size, info.st_mtime_ns, tuple(records))
        return records

    def save(self) -> None:
        """Write the answers of this run (only the files seen now) when anything changed.
        Failing to write the cache never fails the run."""
        if not self.enabled or (self.misses == 0 and set(self._new) == set(self._old)):
            return
        entries = {
            key: (size, mtime, tuple(replace(r, path=Path(key)) for r in answer))
            if not isinstance(answer, str)
            else (size, mtime, answer)
            for key, (size, mtime, answer) in self._new.items()
        }
        payload = {
            "format": _FORMAT,
            "version": __version__,
            "study_dir": str(self.study_dir.resolve()),
            "entries": entries,
        }
        folder = self.path.parent
        try:
            folder.mkdir(parents=True, exist_ok=True, mode=0o700)
            fd, tmp = tempfile.mkstemp(dir=folder, prefix=".index-", suffix=".tmp")  # 0600
            try:
                with os.fdopen(fd, "wb") as handle:
                    pickle.dump(payload, handle, protocol=pickle.HIGHEST_PROTOCOL)
                os.chmod(tmp, 0o600)
                os.replace(tmp, self.path)
            except BaseException:
                Path(tmp).unlink(missing_ok=True)
                raise
        except OSError:
            return

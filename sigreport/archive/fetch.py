"""A study in an archive: read its series' metadata, choose what the job needs, fetch only that.

    QIDO-RS series of the study -> WADO-RS metadata of each series (no pixels)
        -> frame records and stacks, roles inferred from the headers (``sigreport.ingest``)
        -> the case file's [roles], one stack per role, the finest (``sigreport.pipeline``)
        -> WADO-RS retrieve of those series only, into a private folder

The index built from the metadata lists every series of the study, so a report drafted from
the archive names the same series (measured or not) as one drafted from a copy of the whole
study on disk.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import signal
import tempfile
import threading
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from types import FrameType
from typing import TYPE_CHECKING

from sigreport.archive.dicomweb import Archive, StoreAnswer
from sigreport.errors import InputError
from sigreport.model import Progress, Role, SkippedFile, Stack, StudyIndex, say

if TYPE_CHECKING:
    from sigreport.pipeline import ReportRun


# Instances of archived series are named by position, never by header values.
SERIES_FOLDER = "series-{:03d}"
INSTANCE_FILE = "IM{:05d}.dcm"


@dataclass(frozen=True)
class ArchiveStudy:
    """What the archive holds of one study, from metadata only (no pixel data fetched).

    ``index`` lists every series; its instance paths are names (``dicomweb/<series>/<sop>``),
    not files.
    """

    url: str
    study_uid: str
    index: StudyIndex
    series_uids: tuple[str, ...]


@dataclass(frozen=True)
class FetchedStudy:
    """The series a job needs, fetched into ``study_dir``.

    ``index`` is the whole study's index: the fetched series' stacks point to the files under
    ``study_dir``, the others keep the archive's names (they are never loaded).
    """

    study_dir: Path
    index: StudyIndex
    fetched_series: tuple[str, ...]
    n_instances: int


def read_study(
    archive: Archive,
    study_uid: str,
    *,
    site_lexicon: Path | None = None,
    progress: Progress | None = None,
) -> ArchiveStudy:
    """Search the study's series (QIDO-RS) and index them from their metadata (WADO-RS).

    Raises
    ------
    InputError
        When the archive has no series of ``study_uid``, or any request fails.
    """
    from sigreport.ingest.header import SkipFile, frames_from_dataset
    from sigreport.ingest.index import index_records

    study_uid = _check_uid(study_uid)
    say(progress, f"searching study {study_uid} in {archive.url}")
    found = archive.search_series(study_uid)
    series_uids = []
    for item in found:
        value = (item.get("0020000E") or {}).get("Value") or []  # SeriesInstanceUID
        if value and value[0] not in series_uids:
            series_uids.append(str(value[0]))
    if not series_uids:
        raise InputError(f"{archive.url}: no study {study_uid} (QIDO-RS found no series)")
    records = []
    skipped = []
    for series_uid in series_uids:
        say(progress, f"reading the metadata of series {series_uid}")
        for ds in archive.series_metadata(study_uid, series_uid):
            name = Path("dicomweb") / series_uid / str(ds.get("SOPInstanceUID", "unknown"))
            try:
                records.extend(frames_from_dataset(name, ds))
            except SkipFile as exc:
                skipped.append(SkippedFile(path=name, reason=str(exc)))
    index = index_records(Path("studies") / study_uid, records, skipped, site_lexicon=site_lexicon)
    return ArchiveStudy(
        url=archive.url, study_uid=study_uid, index=index, series_uids=tuple(series_uids)
    )


def is_uid(text: str) -> bool:
    """A UID is digits and dots, at most 64 characters (PS3.5 9.1)."""
    uid = text.strip()
    return bool(uid) and len(uid) <= 64 and all(c.isdigit() or c == "." for c in uid)


def _check_uid(uid: str) -> str:
    uid = uid.strip()
    if not is_uid(uid):
        raise InputError(f"--study-uid {uid!r} is not a DICOM UID (digits and dots, PS3.5 9.1)")
    return uid


def needed_stacks(
    index: StudyIndex, roles: Mapping[Role, int | str], *, case_name: str = "case.toml"
) -> dict[Role, Stack]:
    """The stacks a report measures: one per role, the finest, unless the case file's
    ``[roles]`` picks one (the same choice ``run_report`` makes on a folder)."""
    from sigreport.pipeline import apply_role_overrides, choose_measured

    index, forced = apply_role_overrides(index, roles, case_name=case_name)
    measured, _notes = choose_measured(index, forced)
    return measured


def fetch_needed_series(
    archive: Archive,
    study_uid: str,
    dest: Path,
    *,
    roles: Mapping[Role, int | str] | None = None,
    case_name: str = "case.toml",
    site_lexicon: Path | None = None,
    progress: Progress | None = None,
    study: ArchiveStudy | None = None,
) -> FetchedStudy:
    """Fetch the series a report on ``study_uid`` needs into ``dest`` (an empty or new folder).

    The study's metadata are read first (unless ``study`` is given), the measured stacks are
    chosen from them, and only their series are retrieved (WADO-RS). Then ``run_report(case,
    out, study_dir=fetched.study_dir, study_index=fetched.index)`` drafts the report; batch runs
    call this for each case.

    Parameters
    ----------
    archive
        The archive connection.
    study_uid
        StudyInstanceUID of the study.
    dest
        Where the instances are written (``series-NNN/IMNNNNN.dcm``); the caller owns it and
        removes it (see ``private_folder``).
    roles
        The case file's ``[roles]`` overrides.
    """
    from sigreport.ingest import index_study

    if study is None:
        study = read_study(archive, study_uid, site_lexicon=site_lexicon, progress=progress)
    if not study.index.stacks:
        reasons = "; ".join(f"{s.path}: {s.reason}" for s in study.index.skipped[:5])
        raise InputError(
            f"{archive.url}: no usable MR series in study {study.study_uid}"
            + (f" ({reasons})" if reasons else "")
        )
    measured = needed_stacks(study.index, roles or {}, case_name=case_name)
    if not measured:
        raise InputError(
            f"{archive.url}: no series of study {study.study_uid} has a role that can be "
            "measured (all UNKNOWN)"
        )
    # Every phase of a dynamic acquisition is measured too (pipeline.choose_phases).
    needed: dict[str, Stack] = {r.value: s for r, s in measured.items()}
    needed.update(_phase_stacks(study.index, measured, roles or {}, case_name))
    wanted = list(dict.fromkeys(s.series_instance_uid for s in needed.values()))
    dest = Path(dest)
    dest.mkdir(parents=True, exist_ok=True)
    n_instances = 0
    for k, series_uid in enumerate(wanted, start=1):
        roles_here = ", ".join(r for r, s in needed.items() if s.series_instance_uid == series_uid)
        say(progress, f"fetching series {series_uid} ({roles_here})")
        folder = dest / SERIES_FOLDER.format(k)
        folder.mkdir()
        for n, ds in enumerate(archive.retrieve_series(study.study_uid, series_uid), start=1):
            ds.save_as(folder / INSTANCE_FILE.format(n), enforce_file_format=True)
            n_instances += 1
    local = index_study(dest, site_lexicon=site_lexicon)
    index = _merge(study.index, local, needed)
    return FetchedStudy(
        study_dir=dest, index=index, fetched_series=tuple(wanted), n_instances=n_instances
    )


def _phase_stacks(
    index: StudyIndex,
    measured: Mapping[Role, Stack],
    roles: Mapping[Role, int | str],
    case_name: str,
) -> dict[str, Stack]:
    """The dynamic phases other than each role's measured stack, keyed ``"<ROLE> phase <n>"``."""
    from sigreport.pipeline import apply_role_overrides, choose_phases

    index, _ = apply_role_overrides(index, roles, case_name=case_name)
    phases, _notes = choose_phases(index, measured)
    keys = {s.key for s in measured.values()}
    return {
        f"{role.value} phase {s.dynamic_phase}": s
        for role, group in phases.items()
        for s in group
        if s.key not in keys
    }


def _merge(remote: StudyIndex, local: StudyIndex, measured: Mapping[str, Stack]) -> StudyIndex:
    """The whole study's index with the fetched stacks (real files) in place of their
    metadata twins."""
    by_key = {s.key: s for s in local.stacks}
    for role, stack in measured.items():
        twin = by_key.get(stack.key)
        if twin is None or len(twin.instances) != len(stack.instances):
            got = "missing" if twin is None else f"{len(twin.instances)} images"
            raise InputError(
                f"series {stack.series_instance_uid} ({role}): the retrieved instances do "
                f"not match the archive's metadata ({len(stack.instances)} images expected, "
                f"{got})"
            )
    stacks = tuple(by_key.get(s.key, s) for s in remote.stacks)
    return replace(remote, study_dir=local.study_dir, study=local.study, stacks=stacks)


@contextlib.contextmanager
def private_folder(
    prefix: str = "sigreport-archive-", *, parent: Path | str | None = None
) -> Iterator[Path]:
    """A temporary folder only the user can read (mode 0700), removed when the block ends,
    whether it ends normally, by an error, by Ctrl-C (KeyboardInterrupt) or by SIGTERM (turned
    into SystemExit while the block runs in the main thread).

    ``parent`` is the folder to create it in (default: the system's temporary folder); a batch
    gives each case's folder inside its own private folder, so that whatever a stopped worker
    leaves behind goes with it."""
    folder = Path(tempfile.mkdtemp(prefix=prefix, dir=parent))
    os.chmod(folder, 0o700)
    previous = None
    in_main = threading.current_thread() is threading.main_thread()
    if in_main:

        def _terminate(signum: int, frame: FrameType | None) -> None:
            raise SystemExit(128 + signum)

        previous = signal.signal(signal.SIGTERM, _terminate)
    try:
        yield folder
    finally:
        shutil.rmtree(folder, ignore_errors=True)
        if in_main:
            signal.signal(signal.SIGTERM, previous)


@dataclass(frozen=True)
class ArchiveReport:
    """What ``report_from_archive`` did."""

    run: ReportRun
    fetched_series: tuple[str, ...]
    n_instances: int
    stored: StoreAnswer | None


def report_from_archive(
    case_path: Path,
    out_dir: Path,
    *,
    url: str,
    study_uid: str,
    register: bool | None = None,
    force: bool = False,
    site_lexicon: Path | None = None,
    progress: Progress | None = None,
    push: bool = False,
    archive: Archive | None = None,
    prior_study: Path | None = None,
    prior_case: Path | None = None,
    temp_parent: Path | str | None = None,
) -> ArchiveReport:
    """``report --dicomweb URL --study-uid UID``: fetch what the case needs into a private
    temporary folder, run the report on it, remove the folder, and with ``push`` store sr.dcm
    in the archive (STOW-RS).

    ``prior_study`` / ``prior_case`` (a folder) are passed to ``run_report``; ``temp_parent`` is
    where the private folder is made (``private_folder``). A batch case calls this with its
    worklist entry.

    Raises
    ------
    InputError
        Bad case file, OUTDIR that exists without ``force``, any archive failure.
    """
    from sigreport import lexicon
    from sigreport.pipeline import run_report
    from sigreport.rois import load_case

    case = load_case(Path(case_path))
    site = site_lexicon if site_lexicon is not None else case.lexicon
    lexicon.site_dir(site)
    out_dir = Path(out_dir)
    if out_dir.exists() and not force:
        raise InputError(f"{out_dir} exists; use --force to replace it")
    archive = archive if archive is not None else Archive(url)
    with private_folder(parent=temp_parent) as folder:
        fetched = fetch_needed_series(
            archive,
            study_uid,
            folder / "study",
            roles=case.roles,
            case_name=case.path.name,
            site_lexicon=site,
            progress=progress,
        )
        say(
            progress,
            f"fetched {len(fetched.fetched_series)} series ({fetched.n_instances} instances)",
        )
        run = run_report(
            case.path,
            out_dir,
            study_dir=fetched.study_dir,
            register=register,
            force=force,
            site_lexicon=site_lexicon,
            progress=progress,
            study_index=fetched.index,
            prior_study=prior_study,
            prior_case=prior_case,
        )
    stored = None
    if push:
        say(progress, f"storing sr.dcm in {archive.url}")
        try:
            stored = archive.store(out_dir / "sr.dcm")
        except InputError as exc:
            raise InputError(
                f"the report is in {out_dir}, but sr.dcm was not stored: {exc}"
            ) from None
    return ArchiveReport(
        run=run,
        fetched_series=fetched.fetched_series,
        n_instances=fetched.n_instances,
        stored=stored,
    )


def scan_archive(
    url: str,
    study_uid: str,
    *,
    site_lexicon: Path | None = None,
    progress: Progress | None = None,
    archive: Archive | None = None,
) -> ArchiveStudy:
    """``scan --dicomweb URL --study-uid UID``: the study's series and roles from metadata
    alone (no pixel data are fetched)."""
    archive = archive if archive is not None else Archive(url)
    return read_study(archive, study_uid, site_lexicon=site_lexicon, progress=progress)

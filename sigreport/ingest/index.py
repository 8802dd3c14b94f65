"""Index a study folder: every file under it, header-only, into stacks with inferred roles."""

from __future__ import annotations

import os
from collections import Counter
from dataclasses import replace
from pathlib import Path

from sigreport.errors import InputError
from sigreport.ingest.attributes import FrameRecord, SkipFile
from sigreport.ingest.cache import HeaderCache
from sigreport.ingest.dynamic import assign_dynamic_phases
from sigreport.ingest.header import read_frames
from sigreport.ingest.identity import screen_duplicates, screen_series, select_study
from sigreport.ingest.roles import (
    RoleBands,
    _infer,
    load_role_bands,
    refine_roles_across_stacks,
)
from sigreport.ingest.scaling import scaling_notes
from sigreport.ingest.stacks import build_stacks
from sigreport.model import Progress, SkippedFile, StudyIndex, StudyInfo


def _files(study_dir: Path) -> tuple[list[Path], list[SkippedFile]]:
    """Every entry under ``study_dir`` that is not a folder, and the folders that could not be
    listed (os.walk reports them to ``onerror``; by default it drops them silently)."""
    found: list[Path] = []
    unreadable: list[SkippedFile] = []

    def refused(exc: OSError) -> None:
        reason = exc.strerror or type(exc).__name__
        unreadable.append(
            SkippedFile(
                path=Path(exc.filename) if exc.filename else study_dir,
                reason=f"folder not readable ({reason}): the files in it were not indexed",
            )
        )

    for root, dirs, names in os.walk(study_dir, onerror=refused):
        dirs.sort()
        found.extend(Path(root) / name for name in sorted(names))
    return found, unreadable


def index_study(
    study_dir: Path,
    *,
    progress: Progress | None = None,
    site_lexicon: Path | None = None,
    bands: RoleBands | None = None,
    use_cache: bool = True,
    cache_dir: Path | None = None,
    study_uid: str | None = None,
    require_one_study: bool = False,
) -> StudyIndex:
    """Index every DICOM file under ``study_dir`` (recursively, any file names).

    Headers only are read (pixel data are not). Files that are not DICOM, cannot be read, are
    truncated, hold no pixel data, are not MR images or lack geometry are listed in
    ``StudyIndex.skipped`` with a one-line reason; they never stop the scan. Each stack gets its
    role, reason and confidence from ``infer_role``.

    Parameters
    ----------
    study_dir
        The study folder.
    progress
        Called as ``progress("indexing files", done, total)`` after each file.
    site_lexicon
        A site lexicon folder (its ``roles.toml`` replaces the bundled one); read only when
        ``bands`` is not given.
    bands
        The role bands of the run's lexicon (``Lexicon.role_bands``).
    use_cache, cache_dir
        Reuse (and update) the header index cache of this folder (``sigreport.ingest.cache``:
        files whose size and modification time are unchanged are not read again); the cache
        folder defaults to the user's cache directory.
    study_uid, require_one_study
        As :func:`index_records`.

    Raises
    ------
    InputError
        When ``study_dir`` does not exist or is not a folder, the roles lexicon is invalid, or
        ``require_one_study`` and the folder holds several studies or patients.
    """
    study_dir = Path(study_dir)
    if not study_dir.exists():
        raise InputError(f"study folder {study_dir} does not exist")
    if not study_dir.is_dir():
        raise InputError(f"study folder {study_dir} is not a folder")
    if bands is None:
        bands = load_role_bands(site_lexicon)
    files, skipped = _files(study_dir)
    records: list[FrameRecord] = []
    total = len(files)
    cache = HeaderCache(study_dir, directory=cache_dir, enabled=use_cache)
    for done, path in enumerate(files, start=1):
        try:
            records.extend(cache.read_frames(path, read_frames))
        except SkipFile as exc:
            skipped.append(
                SkippedFile(
                    path=path,
                    reason=str(exc),
                    series_number=exc.series_number,
                    series_instance_uid=exc.series_instance_uid,
                    description=exc.description,
                )
            )
        except RecursionError:
            skipped.append(SkippedFile(path=path, reason="not readable: nesting too deep"))
        if progress is not None:
            progress("indexing files", done, total)
    cache.save()
    return index_records(
        study_dir,
        records,
        skipped,
        bands=bands,
        study_uid=study_uid,
        require_one_study=require_one_study,
    )


def index_records(
    study_dir: Path,
    records: list[FrameRecord],
    skipped: list[SkippedFile],
    *,
    bands: RoleBands | None = None,
    site_lexicon: Path | None = None,
    study_uid: str | None = None,
    require_one_study: bool = False,
) -> StudyIndex:
    """The study index of frame records read elsewhere (``index_study`` reads them from files,
    ``sigreport.archive`` from an archive's metadata): stacks, each stack's role, study details.

    Files of a series whose study, patient or frame of reference differ from the rest of the
    series, and files that share a SOPInstanceUID with different content, are left out and
    listed as skipped (``sigreport.ingest.identity``).

    Parameters
    ----------
    bands
        The role bands (default: loaded from ``site_lexicon`` or the bundled lexicon).
    study_uid
        Keep only this StudyInstanceUID (the case file's ``study_uid``); other studies' files
        are listed as skipped.
    require_one_study
        Raise ``InputError`` when the records (after ``study_uid``) hold more than one study or
        patient; without it these are ``StudyIndex.warnings``.
    """
    if bands is None:
        bands = load_role_bands(site_lexicon)
    skipped = list(skipped)
    # A stray file inside a series first (it is named precisely), then the folder's studies.
    records, other = screen_series(records)
    skipped.extend(other)
    records, other, warnings = select_study(
        records, study_uid=study_uid, require_one=require_one_study, where=str(study_dir)
    )
    skipped.extend(other)
    records, other = screen_duplicates(records, study_dir=study_dir)
    skipped.extend(other)
    # One entry per file and reason (a multi-frame or mosaic file holds several records).
    skipped = list({(s.path, s.reason): s for s in skipped}.values())

    stacks = []
    for stack in scaling_notes(build_stacks(records), records):
        role, reason, confidence = _infer(stack.acquisition, stack.description, bands)
        stacks.append(replace(stack, role=role, role_reason=reason, confidence=confidence))
    stacks = assign_dynamic_phases(refine_roles_across_stacks(stacks, bands))

    study_uids = Counter(r.study.study_instance_uid for r in records)
    study = StudyInfo()
    if records:
        main_uid = study_uids.most_common(1)[0][0]
        study = next(r.study for r in records if r.study.study_instance_uid == main_uid)
    return StudyIndex(
        study_dir=study_dir,
        study=study,
        stacks=tuple(stacks),
        skipped=tuple(skipped),
        warnings=tuple(warnings),
    )

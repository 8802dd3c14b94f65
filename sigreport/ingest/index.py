"""Index a study folder: every file under it, header-only, into stacks with inferred roles."""

from __future__ import annotations

import os
from collections import Counter
from collections.abc import Callable
from dataclasses import replace
from pathlib import Path

from sigreport.errors import InputError
from sigreport.ingest.header import FrameRecord, SkipFile, read_frames
from sigreport.ingest.identity import screen_duplicates, screen_series, select_study
from sigreport.ingest.roles import _infer, load_role_bands
from sigreport.ingest.stacks import build_stacks
from sigreport.model import SkippedFile, StudyIndex, StudyInfo


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
    progress: Callable[[int, int], None] | None = None,
    site_lexicon: Path | None = None,
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
        Called as ``progress(done, total)`` after each file.
    site_lexicon
        A site lexicon folder (its ``roles.toml`` replaces the bundled one).
    study_uid
        Keep only this StudyInstanceUID (the case file's ``study_uid``); other studies' files
        are listed as skipped.
    require_one_study
        Raise ``InputError`` when the folder (after ``study_uid``) holds more than one study or
        patient; without it these are ``StudyIndex.warnings``.

    Files of a series whose study, patient or frame of reference differ from the rest of the
    series, and files that share a SOPInstanceUID with different content, are left out and
    listed as skipped (``sigreport.ingest.identity``).

    Raises
    ------
    InputError
        When ``study_dir`` does not exist or is not a folder, the roles lexicon is invalid,
        ``study_uid`` names no study of the folder, or ``require_one_study`` fails.
    """
    study_dir = Path(study_dir)
    if not study_dir.exists():
        raise InputError(f"study folder {study_dir} does not exist")
    if not study_dir.is_dir():
        raise InputError(f"study folder {study_dir} is not a folder")
    bands = load_role_bands(site_lexicon)
    files, skipped = _files(study_dir)
    records: list[FrameRecord] = []
    total = len(files)
    for done, path in enumerate(files, start=1):
        try:
            records.extend(read_frames(path))
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
            progress(done, total)

    # A stray file inside a series first (it is named precisely), then the folder's studies.
    records, other = screen_series(records)
    skipped.extend(other)
    records, other, warnings = select_study(
        records, study_uid=study_uid, require_one=require_one_study, where=str(study_dir)
    )
    skipped.extend(other)
    records, other = screen_duplicates(records, study_dir=study_dir)
    skipped.extend(other)

    stacks = []
    for stack in build_stacks(records):
        role, reason, confidence = _infer(stack.acquisition, stack.description, bands)
        stacks.append(replace(stack, role=role, role_reason=reason, confidence=confidence))

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

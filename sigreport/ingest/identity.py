"""Which study, patient and frame of reference each image belongs to, checked before stacking.

A study folder that holds a stray file is the classic way a wrong image reaches a report: a
slice copied from another patient's study into a series, a series that mixes frames of
reference, two files that claim one SOPInstanceUID but hold different pixels, or a whole
second study. None of these may pass silently:

* files of a series whose StudyInstanceUID, PatientID or FrameOfReferenceUID differ from the
  rest of the series are left out (skipped, with the reason), and the series says so;
* files sharing a SOPInstanceUID (PS3.3 C.12.1.1.1: unique per instance) are kept once when
  byte-identical copies, else every copy is left out;
* more than one study or patient in the folder is an ``InputError`` for ``report`` unless the
  case file names the study (``study_uid``), and a warning for ``scan``.
"""

from __future__ import annotations

import hashlib
from collections import Counter, defaultdict
from collections.abc import Iterable, Sequence
from dataclasses import replace
from pathlib import Path

from sigreport.errors import InputError
from sigreport.ingest.attributes import FrameRecord
from sigreport.model import SkippedFile

Identity = tuple[str | None, str | None, str | None]


def _identity(record: FrameRecord) -> Identity:
    return (
        record.study.study_instance_uid,
        record.study.patient_id,
        record.frame_of_reference_uid,
    )


def _skip(record: FrameRecord, reason: str) -> SkippedFile:
    return SkippedFile(
        path=record.path,
        reason=reason,
        series_number=record.series_number,
        series_instance_uid=record.series_instance_uid,
        description=record.description or None,
    )


def _by_file(records: Iterable[FrameRecord]) -> dict[Path, list[FrameRecord]]:
    files: dict[Path, list[FrameRecord]] = defaultdict(list)
    for record in records:
        files[record.path].append(record)
    return files


def _series_label(record: FrameRecord) -> str:
    return f"series {record.series_number}" if record.series_number is not None else "series"


def screen_series(
    records: Sequence[FrameRecord],
) -> tuple[list[FrameRecord], list[SkippedFile]]:
    """Leave out the files of a series whose study, patient or frame of reference differ from
    the series' majority (by file count; a tie keeps the first in path order)."""
    by_series: dict[str, list[FrameRecord]] = defaultdict(list)
    for record in records:
        by_series[record.series_instance_uid].append(record)
    kept: list[FrameRecord] = []
    skipped: list[SkippedFile] = []
    for members in by_series.values():
        files = _by_file(members)
        counts = Counter(_identity(recs[0]) for recs in files.values())
        if len(counts) == 1:
            kept.extend(members)
            continue
        order = sorted(files)
        majority = max(
            counts, key=lambda key: (counts[key], -order.index(_first(files, key, order)))
        )
        left_out = 0
        what: set[str] = set()
        for path in order:
            recs = files[path]
            key = _identity(recs[0])
            if key == majority:
                continue
            left_out += 1
            names = [
                name
                for name, mine, theirs in zip(
                    ("StudyInstanceUID", "PatientID", "FrameOfReferenceUID"),
                    key,
                    majority,
                    strict=True,
                )
                if mine != theirs
            ]
            what.update(names)
            skipped.extend(
                _skip(
                    r,
                    f"{_series_label(r)}: its {' and '.join(names)} differ from the other files "
                    f"of the series ({', '.join(f'{m!s}' for m in _pick(key, names))} here, "
                    f"{', '.join(f'{m!s}' for m in _pick(majority, names))} there); "
                    "not stacked with them",
                )
                for r in recs
            )
        warning = (
            f"{left_out} file(s) of this series were left out: another "
            f"{' / '.join(sorted(what))} than the rest of the series (see the skipped files)"
        )
        kept.extend(
            replace(r, warnings=(*r.warnings, warning)) for r in members if _identity(r) == majority
        )
    return kept, skipped


def _first(files: dict[Path, list[FrameRecord]], key: Identity, order: list[Path]) -> Path:
    return next(p for p in order if _identity(files[p][0]) == key)


def _pick(key: Identity, names: list[str]) -> list[str | None]:
    index = {"StudyInstanceUID": 0, "PatientID": 1, "FrameOfReferenceUID": 2}
    return [key[index[n]] for n in names]


def _digest(path: Path) -> str | None:
    try:
        with open(path, "rb") as handle:
            return hashlib.file_digest(handle, "sha256").hexdigest()
    except OSError:
        return None


def screen_duplicates(
    records: Sequence[FrameRecord], *, study_dir: Path | None = None
) -> tuple[list[FrameRecord], list[SkippedFile]]:
    """Files sharing a SOPInstanceUID: byte-identical copies are kept once (the first path);
    copies that differ are all left out, since nothing says which one is right."""
    files = _by_file(records)
    by_uid: dict[str, list[Path]] = defaultdict(list)
    for path, recs in files.items():
        by_uid[recs[0].sop_instance_uid].append(path)
    drop: dict[Path, str] = {}
    warn: dict[str, list[str]] = defaultdict(list)
    for uid, paths in by_uid.items():
        if len(paths) < 2:
            continue
        paths.sort()
        digests = {p: _digest(p) for p in paths}
        first = paths[0]
        same = all(d is not None and d == digests[first] for d in digests.values())
        names = ", ".join(_shown(p, study_dir) for p in paths)
        series = files[first][0].series_instance_uid
        if same:
            for path in paths[1:]:
                drop[path] = (
                    f"an identical copy of {_shown(first, study_dir)} (SOPInstanceUID {uid})"
                )
            warn[series].append(f"{len(paths) - 1} identical copy(ies) of one image ignored")
        else:
            for path in paths:
                drop[path] = (
                    f"SOPInstanceUID {uid} is claimed by {len(paths)} files with different "
                    f"content ({names}); none of them is used"
                )
            warn[series].append(
                f"{len(paths)} files claim SOPInstanceUID {uid} with different content; all "
                "were left out"
            )
    if not drop:
        return list(records), []
    kept = [
        replace(r, warnings=(*r.warnings, *warn.get(r.series_instance_uid, ())))
        for r in records
        if r.path not in drop
    ]
    skipped = [_skip(files[p][0], reason) for p, reason in sorted(drop.items())]
    return kept, skipped


def _shown(path: Path, study_dir: Path | None) -> str:
    if study_dir is not None:
        try:
            return str(path.relative_to(study_dir))
        except ValueError:
            pass
    return str(path)


def _describe(records: Sequence[FrameRecord], uid: str | None) -> str:
    mine = [r for r in records if r.study.study_instance_uid == uid]
    patients = sorted({r.study.patient_id or "?" for r in mine})
    n_files = len({r.path for r in mine})
    dates = sorted({r.study.study_date or "?" for r in mine})
    return (
        f"{uid or '(no StudyInstanceUID)'} (PatientID {', '.join(patients)}, date "
        f"{', '.join(dates)}, {n_files} file(s))"
    )


def select_study(
    records: Sequence[FrameRecord],
    *,
    study_uid: str | None,
    require_one: bool,
    where: str,
) -> tuple[list[FrameRecord], list[SkippedFile], list[str]]:
    """Keep the records of one study.

    Parameters
    ----------
    records
        Every frame record of the folder.
    study_uid
        The StudyInstanceUID to keep (the case file's ``study_uid``); records of other studies
        are left out as skipped.
    require_one
        Raise ``InputError`` when, after ``study_uid``, the records span more than one study or
        patient (``report``); otherwise these are returned as warnings (``scan``).
    where
        The folder, for messages.

    Returns
    -------
    kept, skipped, warnings
    """
    skipped: list[SkippedFile] = []
    warnings: list[str] = []
    studies = Counter(r.study.study_instance_uid for r in records)
    if study_uid is not None:
        if study_uid not in studies:
            found = "; ".join(_describe(records, uid) for uid in sorted(studies, key=str)) or "none"
            raise InputError(
                f"study_uid = {study_uid!r}: no image of that study under {where} "
                f"(studies found: {found})"
            )
        skipped.extend(
            _skip(r, f"in study {r.study.study_instance_uid}, not the case file's study_uid")
            for r in {
                r.path: r for r in records if r.study.study_instance_uid != study_uid
            }.values()
        )
        records = [r for r in records if r.study.study_instance_uid == study_uid]
        studies = Counter(r.study.study_instance_uid for r in records)
    patients = sorted({r.study.patient_id for r in records if r.study.patient_id})
    if len(studies) > 1:
        listing = "; ".join(_describe(records, uid) for uid in sorted(studies, key=str))
        message = f"{len(studies)} studies under {where}: {listing}"
        if require_one:
            raise InputError(
                f'{message}; name the one to read with study_uid = "..." in the case file'
            )
        warnings.append(message)
    if len(patients) > 1:
        message = (
            f"files of {len(patients)} patients under {where} (PatientID "
            f"{', '.join(patients)}); a study holds one patient"
        )
        if require_one:
            raise InputError(message + "; remove the other patient's files")
        warnings.append(message)
    return list(records), skipped, warnings

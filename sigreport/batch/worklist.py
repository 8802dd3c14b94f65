"""The worklist of a batch (docs/usage.md, ``sigreport batch``): one ``[[case]]`` table per case.

```toml
title = "Neuro-oncology board, 4 December"   # optional, the heading of index.html

[[case]]
id = "board-01"                  # unique, a safe folder name: OUTDIR/board-01/
study = "studies/anna"           # relative to the worklist file
case = "cases/anna.toml"
prior_study = "studies/anna-2026-06"      # optional, with prior_case
prior_case = "cases/anna-2026-06.toml"

[[case]]
id = "board-02"                  # a study in a DICOMweb archive instead of a folder:
dicomweb = "https://pacs.example.org/dicom-web"   # optional with ``batch --dicomweb URL``
study_uid = "1.2.826.0.1.3680043.8.498.1"
case = "cases/ben.toml"
```

Every entry is checked before any work starts, and every problem of every entry is reported at
once (one ``InputError`` naming the worklist, the entry and the field). Whether a case file is
itself usable is the case's own business: a broken case fails that case only.
"""

from __future__ import annotations

import re
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sigreport.errors import InputError

CASE_KEYS = ("id", "study", "dicomweb", "study_uid", "case", "prior_study", "prior_case")
# Ids are folder names under OUTDIR: portable file-name characters only (POSIX portable
# file name character set, IEEE Std 1003.1, 3.282), starting with a letter or digit.
ID_PATTERN = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}")
# Names the batch itself writes in OUTDIR; no case folder may take them.
RESERVED = frozenset({"index.html", "summary.csv", "logs"})


@dataclass(frozen=True)
class CaseEntry:
    """One case of a worklist; paths are absolute.

    The study is either a folder (``study``) or a study in a DICOMweb archive (``dicomweb``,
    the service root, and ``study_uid``); never both.
    """

    id: str
    study: Path | None
    case: Path
    prior_study: Path | None = None
    prior_case: Path | None = None
    dicomweb: str | None = None
    study_uid: str | None = None

    @property
    def source(self) -> str:
        """Where the study comes from, for messages: the folder, or the archive and the UID."""
        if self.study_uid is not None:
            return f"{self.dicomweb} study {self.study_uid}"
        return str(self.study)


@dataclass(frozen=True)
class Worklist:
    path: Path
    title: str | None
    cases: tuple[CaseEntry, ...]


def load_worklist(path: Path | str, *, dicomweb: str | None = None) -> Worklist:
    """Read and check a worklist file.

    Parameters
    ----------
    path
        The worklist (TOML).
    dicomweb
        The archive of entries that give a ``study_uid`` without their own ``dicomweb``
        (``batch --dicomweb URL``).

    Raises
    ------
    InputError
        The file is missing or not TOML, or any entry is unusable: unknown or missing keys, an
        id that is not a safe folder name or is used twice, a study or case file that does not
        exist, a prior study without its prior case file, both a study folder and a study UID,
        a study UID that is not a UID or has no archive, an archive URL that is not one. The
        message lists every problem.
    """
    path = Path(path)
    try:
        with path.open("rb") as handle:
            data = tomllib.load(handle)
    except OSError as exc:
        raise InputError(f"worklist {path}: {exc.strerror}") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"worklist {path}: not valid TOML: {exc}") from None
    problems: list[str] = []
    unknown = sorted(set(data) - {"title", "case"})
    if unknown:
        problems.append(f"unknown key(s) {', '.join(unknown)} (expected title and [[case]])")
    title = data.get("title")
    if title is not None and not isinstance(title, str):
        problems.append(f"title: expected text, got {title!r}")
        title = None
    entries = data.get("case", [])
    if not isinstance(entries, list) or not all(isinstance(e, dict) for e in entries):
        problems.append("case: expected [[case]] tables")
        entries = []
    if not entries and not problems:
        problems.append("no [[case]] entries")
    base = path.parent
    cases: list[CaseEntry] = []
    seen: dict[str, int] = {}
    if dicomweb is not None:
        from sigreport.archive.dicomweb import url_problem

        problem = url_problem(dicomweb)
        if problem:
            # A URL with a password in it is not repeated.
            shown = "" if "@" in dicomweb else f" {dicomweb!r}"
            problems.append(f"--dicomweb{shown}: {problem}")
            dicomweb = None
    for k, entry in enumerate(entries):
        case, errors = _entry(entry, k, base, seen, dicomweb)
        problems.extend(errors)
        if case is not None:
            cases.append(case)
    if problems:
        listed = "\n  ".join(problems)
        raise InputError(f"worklist {path}: {len(problems)} problem(s):\n  {listed}")
    return Worklist(path=path, title=title, cases=tuple(cases))


def _entry(
    entry: dict[str, Any], k: int, base: Path, seen: dict[str, int], default_url: str | None
) -> tuple[CaseEntry | None, list[str]]:
    raw_id = entry.get("id")
    where = f"case[{k}]" + (f' (id "{raw_id}")' if isinstance(raw_id, str) else "")
    errors: list[str] = []
    unknown = sorted(set(entry) - set(CASE_KEYS))
    if unknown:
        errors.append(f"{where}: unknown key(s) {', '.join(unknown)}")
    if not isinstance(raw_id, str) or not raw_id:
        errors.append(f"{where}: id is missing (text, a safe folder name)")
    elif not ID_PATTERN.fullmatch(raw_id) or raw_id.lower() in RESERVED:
        errors.append(
            f"{where}: id must be 1-64 letters, digits, '.', '_' or '-', start with a letter or "
            f"digit, and not be {', '.join(sorted(RESERVED))}"
        )
    else:
        # Folder names compare case-insensitively on some file systems.
        key = raw_id.lower()
        if key in seen:
            errors.append(f"{where}: id is also used by case[{seen[key]}]")
        else:
            seen[key] = k
    url, study_uid, from_archive = _archive_source(entry, where, default_url, errors)
    paths: dict[str, Path | None] = {}
    for name, must_be_dir in (
        ("study", True),
        ("case", False),
        ("prior_study", True),
        ("prior_case", False),
    ):
        value = entry.get(name)
        if value is None:
            paths[name] = None
            if name == "case" or (name == "study" and not from_archive):
                what = "study (a folder) or study_uid" if name == "study" else name
                errors.append(f"{where}: {what} is missing")
            continue
        if not isinstance(value, str) or not value:
            errors.append(f"{where}: {name}: expected a path, got {value!r}")
            paths[name] = None
            continue
        target = (base / value).resolve()
        paths[name] = target
        if must_be_dir and not target.is_dir():
            errors.append(f"{where}: {name}: folder {value} not found")
        elif not must_be_dir and not target.is_file():
            errors.append(f"{where}: {name}: file {value} not found")
    if (entry.get("prior_study") is None) != (entry.get("prior_case") is None):
        errors.append(f"{where}: prior_study and prior_case go together")
    if errors:
        return None, errors
    assert paths["case"] is not None and (paths["study"] is not None or from_archive)
    return (
        CaseEntry(
            id=str(raw_id),
            study=paths["study"],
            case=paths["case"],
            prior_study=paths["prior_study"],
            prior_case=paths["prior_case"],
            dicomweb=url,
            study_uid=study_uid,
        ),
        [],
    )


def _archive_source(
    entry: dict[str, Any], where: str, default_url: str | None, errors: list[str]
) -> tuple[str | None, str | None, bool]:
    """The entry's archive and study UID (``dicomweb``, ``study_uid``), checked; the third
    value says whether the entry names its study by UID (then ``study`` must be absent)."""
    from sigreport.archive.dicomweb import url_problem
    from sigreport.archive.fetch import is_uid

    raw_url, raw_uid = entry.get("dicomweb"), entry.get("study_uid")
    if raw_url is None and raw_uid is None:
        return None, None, False
    if entry.get("study") is not None:
        errors.append(f"{where}: give study (a folder) or study_uid (an archive), not both")
    url: str | None = None
    if raw_url is not None:
        if not isinstance(raw_url, str) or not raw_url:
            errors.append(f"{where}: dicomweb: expected a URL, got {raw_url!r}")
        else:
            problem = url_problem(raw_url)
            if problem:
                errors.append(f"{where}: dicomweb: {problem}")
            else:
                url = raw_url
    elif default_url is not None:
        url = default_url
    else:
        errors.append(
            f"{where}: study_uid needs an archive: dicomweb = URL in the entry, or "
            "batch --dicomweb URL"
        )
    uid: str | None = None
    if raw_uid is None:
        errors.append(f"{where}: dicomweb needs study_uid (the StudyInstanceUID)")
    elif not isinstance(raw_uid, str) or not is_uid(raw_uid):
        errors.append(
            f"{where}: study_uid: {raw_uid!r} is not a DICOM UID (digits and dots, at most 64 "
            "characters, PS3.5 9.1; write it as TOML text in quotes)"
        )
    else:
        uid = raw_uid.strip()
    return url, uid, True

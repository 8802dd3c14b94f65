"""The worklist of a batch (docs/usage.md, ``sigreport batch``): one ``[[case]]`` table per case.

```toml
title = "Neuro-oncology board, 4 December"   # optional, the heading of index.html

[[case]]
id = "board-01"                  # unique, a safe folder name: OUTDIR/board-01/
study = "studies/anna"           # relative to the worklist file
case = "cases/anna.toml"
prior_study = "studies/anna-2026-06"      # optional, with prior_case
prior_case = "cases/anna-2026-06.toml"
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

CASE_KEYS = ("id", "study", "case", "prior_study", "prior_case")
# Ids are folder names under OUTDIR: portable file-name characters only (POSIX portable
# file name character set, IEEE Std 1003.1, 3.282), starting with a letter or digit.
ID_PATTERN = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}")
# Names the batch itself writes in OUTDIR; no case folder may take them.
RESERVED = frozenset({"index.html", "summary.csv", "logs"})


@dataclass(frozen=True)
class CaseEntry:
    """One case of a worklist; paths are absolute."""

    id: str
    study: Path
    case: Path
    prior_study: Path | None = None
    prior_case: Path | None = None


@dataclass(frozen=True)
class Worklist:
    path: Path
    title: str | None
    cases: tuple[CaseEntry, ...]


def load_worklist(path: Path | str) -> Worklist:
    """Read and check a worklist file.

    Raises
    ------
    InputError
        The file is missing or not TOML, or any entry is unusable: unknown or missing keys, an
        id that is not a safe folder name or is used twice, a study or case file that does not
        exist, a prior study without its prior case file. The message lists every problem.
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
    for k, entry in enumerate(entries):
        case, errors = _entry(entry, k, base, seen)
        problems.extend(errors)
        if case is not None:
            cases.append(case)
    if problems:
        listed = "\n  ".join(problems)
        raise InputError(f"worklist {path}: {len(problems)} problem(s):\n  {listed}")
    return Worklist(path=path, title=title, cases=tuple(cases))


def _entry(
    entry: dict[str, Any], k: int, base: Path, seen: dict[str, int]
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
            if name in ("study", "case"):
                errors.append(f"{where}: {name} is missing")
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
    assert paths["study"] is not None and paths["case"] is not None
    return (
        CaseEntry(
            id=str(raw_id),
            study=paths["study"],
            case=paths["case"],
            prior_study=paths["prior_study"],
            prior_case=paths["prior_case"],
        ),
        [],
    )

"""Coded anatomic sites for the SR: the lexicon's ``sites.toml`` (SNOMED CT codes as DICOM
PS3.16 lists them), the site a free-text ``site`` names, and its laterality (PS3.16 CID 244)."""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pydicom.sr.coding import Code

from sigreport.errors import InputError
from sigreport.lexicon import check_keys, find_file, read_table

SITES_FILE = "sites.toml"
SCT = "SCT"  # SNOMED CT's coding scheme designator (PS3.16 Section 8)

__all__ = ["SITES_FILE", "SiteCode", "SiteTable", "load_sites"]


@dataclass(frozen=True)
class SiteCode:
    """One coded site or laterality: its lexicon key, SNOMED CT code, meaning and the words
    that name it in running text."""

    key: str
    code: str
    meaning: str
    words: tuple[str, ...]

    def coded(self) -> Code:
        """The pydicom ``Code`` (scheme SCT)."""
        return Code(self.code, SCT, self.meaning)


@dataclass(frozen=True)
class SiteTable:
    """The validated ``sites.toml``."""

    sites: tuple[SiteCode, ...]
    laterality: tuple[SiteCode, ...]

    def site(self, text: str) -> SiteCode | None:
        """The site ``text`` names: of the entries whose words match in ``text`` (whole words,
        case-insensitive), the one matching last, the longest at a tie; None when none does."""
        return _longest(text, self.sites)

    def side(self, text: str) -> SiteCode | None:
        """The laterality ``text`` names ("right", "left", "bilateral"), or None (no side word,
        or words of two sides)."""
        found = {entry.key for entry in self.laterality if _longest(text, (entry,))}
        if len(found) != 1:
            return None
        return next(e for e in self.laterality if e.key in found)


def _words(text: str) -> list[str]:
    return re.findall(r"[a-z0-9]+", text.lower())


def _longest(text: str, entries: tuple[SiteCode, ...]) -> SiteCode | None:
    """The entry matching last in ``text`` (the head of an English noun phrase comes last:
    "left parietal scalp" is scalp), the longest of those ending at the same word."""
    words = _words(text)
    best: tuple[int, int, SiteCode] | None = None
    for entry in entries:
        for phrase in entry.words:
            wanted = _words(phrase)
            n = len(wanted)
            for i in range(len(words) - n + 1):
                if n and words[i : i + n] == wanted:
                    rank = (i + n, n)
                    if best is None or rank > best[:2]:
                        best = (i + n, n, entry)
    return None if best is None else best[2]


def _entry(key: str, value: Any, where: str) -> SiteCode:
    if not isinstance(value, dict):
        raise InputError(f"{where}: expected a table with code, meaning and words")
    check_keys(value, {"code", "meaning", "words"}, where)
    code, meaning, words = value.get("code"), value.get("meaning"), value.get("words")
    if not isinstance(code, str) or not code.isdigit():
        raise InputError(
            f"{where} code: expected a SNOMED CT code (digits) as a string, got {code!r}"
        )
    if not isinstance(meaning, str) or not meaning or len(meaning) > 64:
        raise InputError(f"{where} meaning: expected 1-64 characters (LO), got {meaning!r}")
    if not isinstance(words, list) or not words or not all(isinstance(w, str) for w in words):
        raise InputError(f"{where} words: expected a non-empty list of strings, got {words!r}")
    return SiteCode(key=key, code=code, meaning=meaning, words=tuple(words))


def load_sites(site_lexicon: Path | str | None = None) -> SiteTable:
    """Load and validate ``sites.toml`` (the site's copy first).

    Raises
    ------
    InputError
        When a table or key is missing or unknown, or a value has the wrong shape; the message
        names the file and the entry.
    """
    path = find_file(SITES_FILE, site_lexicon)
    table = read_table(SITES_FILE, site_lexicon)
    check_keys(table, {"sites", "laterality"}, str(path))
    out: dict[str, list[SiteCode]] = {}
    for section in ("sites", "laterality"):
        entries = table.get(section)
        if not isinstance(entries, dict) or not entries:
            raise InputError(f"{path}: missing table [{section}]")
        out[section] = [
            _entry(key, value, f"{path} [{section}.{key}]") for key, value in entries.items()
        ]
    return SiteTable(sites=tuple(out["sites"]), laterality=tuple(out["laterality"]))

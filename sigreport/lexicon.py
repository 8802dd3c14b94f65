"""Where the lexicon lives: wording, tissue names, thresholds, TR/TE/TI bands, behaviour rules.

The lexicon is data (TOML files and jinja2 templates), not code. The bundled copy is the
repository's ``lexicon/`` folder, shipped inside the package as ``sigreport._lexicon``. A site
can point the tool at a folder of its own (``--lexicon DIR``, the case file's ``lexicon = ``, or
the ``SIGREPORT_LEXICON`` environment variable); a file present there replaces the bundled file
of the same name, whole, and a file absent there falls back to the bundled one. Each stage that
reads a table validates it when it loads it, and raises ``InputError`` naming the file and key.
"""

from __future__ import annotations

import os
import tomllib
from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Any

from sigreport.errors import InputError

ENV_VAR = "SIGREPORT_LEXICON"


def bundled_dir() -> Path:
    """The lexicon shipped with the tool."""
    packaged = Path(str(resources.files("sigreport"))) / "_lexicon"
    if packaged.is_dir():
        return packaged
    # An editable install maps sigreport._lexicon to the repository's lexicon/ folder; fall back
    # to it directly in case the mapping is not active (running from a source tree).
    return Path(__file__).resolve().parent.parent / "lexicon"


def site_dir(site: Path | str | None = None) -> Path | None:
    """The site's lexicon folder: the argument, else ``$SIGREPORT_LEXICON``, else None."""
    chosen = site if site is not None else os.environ.get(ENV_VAR) or None
    if chosen is None:
        return None
    path = Path(chosen).expanduser()
    if not path.is_dir():
        what = "is a file, not a folder" if path.exists() else "does not exist"
        raise InputError(f"lexicon folder {path} {what}")
    return path


def search_path(site: Path | str | None = None) -> list[Path]:
    """Folders to look in, the site's first."""
    found = site_dir(site)
    return [found, bundled_dir()] if found is not None else [bundled_dir()]


def find_file(name: str, site: Path | str | None = None) -> Path:
    """The path of lexicon file ``name`` (e.g. ``"thresholds.toml"``), the site's copy first."""
    for folder in search_path(site):
        candidate = folder / name
        if candidate.is_file():
            return candidate
    raise InputError(f"lexicon file {name} not found in {', '.join(map(str, search_path(site)))}")


def read_table(name: str, site: Path | str | None = None) -> dict[str, Any]:
    """Load lexicon TOML file ``name`` (site copy first); a syntax error is an ``InputError``."""
    return _read_toml(find_file(name, site))


@lru_cache(maxsize=64)
def _read_toml_cached(path: Path, mtime_ns: int) -> dict[str, Any]:
    try:
        with path.open("rb") as handle:
            return tomllib.load(handle)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{path}: not valid TOML: {exc}") from None


def _read_toml(path: Path) -> dict[str, Any]:
    import copy

    return copy.deepcopy(_read_toml_cached(path, path.stat().st_mtime_ns))


def template_dirs(site: Path | str | None = None) -> list[Path]:
    """Folders holding the jinja2 report templates, the site's first (for a ChoiceLoader)."""
    return [folder / "templates" for folder in search_path(site) if (folder / "templates").is_dir()]


def check_keys(table: dict[str, Any], allowed: set[str], where: str) -> None:
    """Raise ``InputError`` when ``table`` has a key outside ``allowed`` (typos in site files)."""
    unknown = sorted(set(table) - allowed)
    if unknown:
        raise InputError(
            f"{where}: unknown key(s) {', '.join(unknown)}; expected one of {', '.join(sorted(allowed))}"
        )

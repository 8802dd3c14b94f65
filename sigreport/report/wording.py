"""Report wording: the lexicon's ``wording.toml`` and the behaviour / grade phrases.

Sentence pieces, titles and role names are data (``lexicon/wording.toml``), so a site can reword
the draft without code. Behaviour phrases and graded wording ("markedly hyperintense") come from
the characterization rules of :mod:`sigreport.measure`; when those are unavailable the report
falls back to the finding's own grade and to the behaviour key itself.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sigreport import lexicon
from sigreport.errors import InputError
from sigreport.model import Role

WORDING_FILE = "wording.toml"

# The order a radiologist reads the series in (also the order of the tables and plots).
ROLE_ORDER: tuple[str, ...] = (
    "T1", "T1FS", "T2", "T2FS", "PD", "FLAIR", "STIR", "T2STAR",
    "DWI", "ADC", "T1POST", "T1POSTFS", "UNKNOWN",
)  # fmt: skip

_SECTIONS: dict[str, set[str]] = {
    "titles": {
        "report", "cautions", "findings", "table", "behaviour", "images", "plot", "qc",
        "series", "study",
    },
    "roles": {role.value for role in Role},
    "patterns": {"none", "solid", "rim", "heterogeneous"},
    "sentences": {
        "heading", "size", "size_volume_only", "size_unknown", "signal", "signal_first",
        "signal_separator",
        "signal_next", "signal_unmeasured", "fluid_suppressed", "fluid_not_suppressed",
        "fat_suppressed", "fat_not_suppressed", "fluid_rises", "fat_rises", "suppression_unknown", "unreliable",
        "enhancing", "enhancing_no_pattern", "not_enhancing", "enhancement_unknown",
        "raw_percent", "flow_void", "no_flow_void", "behaviour",
        "behaviour_no_considerations", "list_separator", "list_last_separator",
        "considerations_separator",
    },
    "change": {
        "since", "since_nothing", "new", "interval", "interval_unknown", "date_unknown",
        "larger", "smaller", "same_volume", "newly_enhancing", "no_longer_enhancing",
        "enhancement", "ratio", "items_separator", "not_seen", "not_seen_lesion",
    },
    "qc": {"warning", "error", "info", "none"},
    "plot": {"iso_low", "iso_high"},
}  # fmt: skip


@dataclass(frozen=True)
class Wording:
    """The validated contents of ``wording.toml``."""

    titles: dict[str, str]
    roles: dict[str, str]
    patterns: dict[str, str]
    sentences: dict[str, str]
    qc: dict[str, str]
    change: dict[str, str]
    iso_band: tuple[float, float]
    source: Path

    def role_name(self, role: str) -> str:
        """The running-text name of a role (the role string itself when unknown)."""
        return self.roles.get(role, role)

    def join(self, items: Sequence[str]) -> str:
        """Join ``items`` as running text: "a, b and c"."""
        items = list(items)
        if len(items) <= 1:
            return "".join(items)
        sep = self.sentences["list_separator"]
        return sep.join(items[:-1]) + self.sentences["list_last_separator"] + items[-1]


def load_wording(site: Path | str | None = None) -> Wording:
    """Load and validate ``wording.toml`` (the site's copy first).

    Raises
    ------
    InputError
        When a section or key is missing or unknown, or a value has the wrong type.
    """
    path = lexicon.find_file(WORDING_FILE, site)
    table = lexicon.read_table(WORDING_FILE, site)
    lexicon.check_keys(table, set(_SECTIONS), str(path))
    parsed: dict[str, dict[str, Any]] = {}
    for section, keys in _SECTIONS.items():
        values = table.get(section)
        if not isinstance(values, dict):
            raise InputError(f"{path}: missing table [{section}]")
        lexicon.check_keys(values, keys, f"{path} [{section}]")
        missing = sorted(keys - set(values))
        if missing:
            raise InputError(f"{path} [{section}]: missing key(s) {', '.join(missing)}")
        parsed[section] = values
    for section in ("titles", "roles", "patterns", "sentences", "qc", "change"):
        for key, value in parsed[section].items():
            if not isinstance(value, str):
                raise InputError(f"{path} [{section}] {key}: expected a string, got {value!r}")
    low, high = parsed["plot"]["iso_low"], parsed["plot"]["iso_high"]
    if not all(isinstance(v, int | float) and not isinstance(v, bool) for v in (low, high)):
        raise InputError(f"{path} [plot]: iso_low and iso_high must be numbers")
    if not 0 < low < high:
        raise InputError(f"{path} [plot]: need 0 < iso_low < iso_high, got {low} and {high}")
    return Wording(
        titles=dict(parsed["titles"]),
        roles=dict(parsed["roles"]),
        patterns=dict(parsed["patterns"]),
        sentences=dict(parsed["sentences"]),
        qc=dict(parsed["qc"]),
        change=dict(parsed["change"]),
        iso_band=(float(low), float(high)),
        source=path,
    )


def fill(template: str, where: str, **values: str) -> str:
    """``template.format(**values)``, with an ``InputError`` naming the lexicon key when the
    site's wording uses a placeholder the report does not provide."""
    try:
        return template.format(**values)
    except (KeyError, IndexError, ValueError) as exc:
        raise InputError(
            f"wording.toml [sentences] {where}: cannot fill {template!r} ({exc!r}); "
            f"available placeholders: {', '.join(sorted(values))}"
        ) from None


class Phrases:
    """Behaviour phrases and graded wording, from the characterization rules when present.

    Parameters
    ----------
    site:
        The site lexicon folder handed to ``sigreport.measure.load_rules``.
    """

    def __init__(self, site: Path | str | None = None) -> None:
        self.rules: Any = None
        self._grade_phrase: Any = None
        try:
            from sigreport.measure import grade_phrase, load_rules
        except ImportError:
            return
        self.rules = load_rules(Path(site) if site is not None else None)
        self._grade_phrase = grade_phrase

    def behaviour(self, key: str) -> tuple[str, tuple[str, ...]]:
        """The phrase and the considerations for behaviour ``key``; unknown keys read as the
        key itself with hyphens as spaces and no considerations."""
        table: Mapping[str, Any] = getattr(self.rules, "behaviour", None) or {}
        rule = table.get(key) if isinstance(table, Mapping) else None
        if rule is None:
            return key.replace("-", " "), ()
        phrase = getattr(rule, "phrase", None) or key.replace("-", " ")
        return str(phrase), tuple(str(c) for c in (getattr(rule, "considerations", ()) or ()))

    def grade(self, ratio: float | None, grade: str | None) -> str:
        """Graded wording for ``ratio`` ("markedly hyperintense"); the plain ``grade`` of the
        finding when the rules cannot say, "unmeasured" when there is neither."""
        if ratio is not None and self._grade_phrase is not None:
            return str(self._grade_phrase(ratio, self.rules))
        return grade or "unmeasured"


def role_sort_key(role: str) -> tuple[int, str]:
    """Sort key putting roles in reading order (:data:`ROLE_ORDER`), unknown ones last."""
    try:
        return ROLE_ORDER.index(role), role
    except ValueError:
        return len(ROLE_ORDER), role

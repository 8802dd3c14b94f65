"""The lexicon of one run, loaded and validated once and handed to every stage.

:mod:`sigreport.lexicon` finds and reads the lexicon's files (a site's copy first); this module
gathers what each stage reads from them into one frozen :class:`Lexicon`:

    roles.toml      -> role_bands   (ingest: role inference)
    alignment.toml  -> alignment    (align: registration settings and its qc limits)
    thresholds.toml,
    tissues.toml,
    behaviour.toml  -> rules        (measure: grades, qualifiers, pairs' thresholds, behaviour)
    families.toml   -> families     (measure: diffusion, susceptibility, chemical shift, dynamic)
    wording.toml    -> wording      (report: titles, role names, sentences)
    cautions.toml   -> cautions     (report: the cautions every report carries)
    templates/      -> the report templates (the site's folder first)

Every stage reads the same object, so a number a site changes is seen everywhere at once: the
report's ratio plot shades the isointense band of the grade thresholds themselves
(:attr:`Lexicon.iso_band`), not a copy of them.
"""

from __future__ import annotations

import dataclasses
import string
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sigreport import lexicon
from sigreport.align.rigid import AlignmentSettings, load_settings
from sigreport.errors import InputError
from sigreport.ingest.roles import RoleBands, load_role_bands
from sigreport.measure.families import FamilyThresholds, load_family_thresholds
from sigreport.measure.rules import Rules, load_rules
from sigreport.model import Role

CAUTIONS_FILE = "cautions.toml"
WORDING_FILE = "wording.toml"

__all__ = ["Lexicon", "Wording", "load_cautions", "load_lexicon", "load_wording"]


# --------------------------------------------------------------------------------------------
# wording.toml

_WORDING_SECTIONS: dict[str, set[str]] = {
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
    "qc": {"warning", "error", "info", "none"},
    # The other sequence families' sentences (report.text.family_sentences).
    "families": {
        "restricted", "shine_through", "no_restriction", "diffusion_unknown", "adc_value",
        "adc_ratio_only", "blooming", "no_blooming", "susceptibility_unknown", "microscopic_fat",
        "no_microscopic_fat", "chemical_shift_unknown", "fat_fraction", "dynamic",
        "dynamic_no_curve", "dynamic_phase", "curve_persistent", "curve_plateau",
        "curve_washout", "unreliable",
    },
}  # fmt: skip


@dataclass(frozen=True)
class Wording:
    """The validated contents of ``wording.toml``."""

    titles: dict[str, str]
    roles: dict[str, str]
    patterns: dict[str, str]
    sentences: dict[str, str]
    qc: dict[str, str]
    source: Path
    families: dict[str, str] = dataclasses.field(default_factory=dict)

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
    if "plot" in table:
        # The plot's iso band is the grade thresholds' own (thresholds.toml [grade]), so that a
        # site changing its grades gets a plot that agrees; a copy here could disagree.
        raise InputError(
            f"{path}: [plot] is no longer read: the ratio plot shades the isointense band of "
            "thresholds.toml [grade] (hypo_max_ratio, hyper_min_ratio); remove [plot]"
        )
    lexicon.check_keys(table, set(_WORDING_SECTIONS), str(path))
    parsed: dict[str, dict[str, Any]] = {}
    for section, keys in _WORDING_SECTIONS.items():
        values = table.get(section)
        if not isinstance(values, dict):
            raise InputError(f"{path}: missing table [{section}]")
        lexicon.check_keys(values, keys, f"{path} [{section}]")
        missing = sorted(keys - set(values))
        if missing:
            raise InputError(f"{path} [{section}]: missing key(s) {', '.join(missing)}")
        parsed[section] = values
    for section in ("titles", "roles", "patterns", "sentences", "qc", "families"):
        for key, value in parsed[section].items():
            if not isinstance(value, str):
                raise InputError(f"{path} [{section}] {key}: expected a string, got {value!r}")
    for section in ("sentences", "families"):
        for key, value in parsed[section].items():
            try:
                placeholders(value)
            except ValueError as exc:
                raise InputError(f"{path} [{section}] {key}: {exc}") from None
    return Wording(
        titles=dict(parsed["titles"]),
        roles=dict(parsed["roles"]),
        patterns=dict(parsed["patterns"]),
        sentences=dict(parsed["sentences"]),
        qc=dict(parsed["qc"]),
        source=path,
        families=dict(parsed["families"]),
    )


# --------------------------------------------------------------------------------------------
# cautions.toml


def load_cautions(site: Path | str | None = None) -> tuple[str, ...]:
    """The cautions every report carries (``cautions.toml``, the site's copy first).

    Raises
    ------
    InputError
        When ``cautions`` is not a non-empty list of strings.
    """
    cautions = lexicon.read_table(CAUTIONS_FILE, site).get("cautions")
    if (
        not isinstance(cautions, list)
        or not cautions
        or not all(isinstance(c, str) for c in cautions)
    ):
        raise InputError("lexicon cautions.toml: 'cautions' must be a non-empty list of strings")
    return tuple(cautions)


# --------------------------------------------------------------------------------------------
# All of it


@dataclass(frozen=True)
class Lexicon:
    """Every validated table of the lexicon a run uses.

    Build it with :func:`load_lexicon`; ``site`` is the site folder the tables came from (None:
    the bundled lexicon only), kept for the report templates, which jinja2 loads by name.
    """

    site: Path | None
    role_bands: RoleBands
    alignment: AlignmentSettings
    rules: Rules
    wording: Wording
    cautions: tuple[str, ...]
    families: FamilyThresholds = FamilyThresholds()

    @property
    def iso_band(self) -> tuple[float, float]:
        """The ratios graded isointense lie strictly between these two (thresholds.toml
        ``[grade]`` ``hypo_max_ratio`` and ``hyper_min_ratio``)."""
        grade = self.rules.thresholds.grade
        return grade.hypo_max_ratio, grade.hyper_min_ratio


def load_lexicon(site: Path | str | None = None) -> Lexicon:
    """Load and validate every lexicon table once.

    Parameters
    ----------
    site
        A site's lexicon folder; a file present there replaces the bundled file of the same name
        whole. None uses ``$SIGREPORT_LEXICON`` when set, else the bundled lexicon only.

    Raises
    ------
    InputError
        When the site folder does not exist, or any table is invalid (the message names the file
        and the key).
    """
    folder = lexicon.site_dir(site)
    return Lexicon(
        site=folder,
        role_bands=load_role_bands(folder),
        alignment=load_settings(folder),
        rules=load_rules(folder),
        wording=load_wording(folder),
        cautions=load_cautions(folder),
        families=load_family_thresholds(folder),
    )


def placeholders(template: str) -> list[str]:
    """The ``{name}`` placeholders of a wording template.

    Raises
    ------
    ValueError
        When a placeholder is anything but a plain name: attribute or index access
        (``{x.__class__}``, ``{x[0]}``), a conversion (``{x!r}``) or a format spec
        (``{x:>99999999}``). Wording is untrusted data; ``str.format`` would follow those.
    """
    names = []
    for _, field, spec, conversion in string.Formatter().parse(template):
        if field is None:
            continue
        if not field.isidentifier() or spec or conversion:
            shown = "{" + field + (f"!{conversion}" if conversion else "")
            shown += (f":{spec}" if spec else "") + "}"
            raise ValueError(f"placeholder {shown} is not a plain {{name}}")
        names.append(field)
    return names

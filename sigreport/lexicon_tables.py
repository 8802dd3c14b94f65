"""The lexicon of one run, loaded and validated once and handed to every stage.

:mod:`sigreport.lexicon` finds and reads the lexicon's files (a site's copy first); this module
gathers what each stage reads from them into one frozen :class:`Lexicon`:

    roles.toml      -> role_bands   (ingest: role inference)
    alignment.toml  -> alignment    (align: registration settings and its qc limits)
    thresholds.toml,
    tissues.toml,
    behaviour.toml,
    grading.toml    -> rules        (measure: grades, qualifiers, pairs' thresholds, behaviour)
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
}  # fmt: skip

#: Keys added after site copies of wording.toml existed: a site copy may leave them out, and
#: the bundled file's wording is used for them (a site copy without [formats] too).
_WORDING_LATER: dict[str, set[str]] = {
    "titles": {"references", "header"},
    "sentences": {
        "size_axes", "size_roi", "signal_unnormalized", "signal_no_reference", "not_assessed_flow_void",
        "enhancement_reference_changed", "behaviour_not_applied", "reference_line",
        "control_line", "control_passed", "control_failed", "control_unchecked",
    },
    # Interval change against a prior study.
    "change": {
        "since", "since_nothing", "new", "interval", "interval_unknown", "date_unknown",
        "larger", "smaller", "same_volume", "newly_enhancing", "no_longer_enhancing",
        "enhancement", "ratio", "items_separator", "not_seen", "not_seen_lesion",
    },
    # The other sequence families' sentences (report.text.family_sentences).
    "families": {
        "restricted", "shine_through", "no_restriction", "diffusion_unknown", "adc_value",
        "adc_ratio_only", "blooming", "no_blooming", "susceptibility_unknown", "microscopic_fat",
        "no_microscopic_fat", "chemical_shift_unknown", "fat_fraction", "dynamic",
        "dynamic_no_curve", "dynamic_phase", "curve_persistent", "curve_plateau",
        "curve_washout", "unreliable",
    },
    "formats": {"date", "not_assessed"},
    "header": {
        "patient_name", "patient_id", "birth_date", "sex", "accession", "study_date",
        "series_used",
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
    change: dict[str, str]  # interval change against a prior study
    source: Path
    formats: dict[str, str] = dataclasses.field(default_factory=dict)
    header: dict[str, str] = dataclasses.field(
        default_factory=dict
    )  # labels of the reports' header block
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
    sections = set(_WORDING_SECTIONS) | set(_WORDING_LATER)
    lexicon.check_keys(table, sections, str(path))
    bundled = lexicon.bundled_dir() / WORDING_FILE
    defaults = lexicon.read_table(WORDING_FILE, None) if path != bundled else table
    parsed: dict[str, dict[str, Any]] = {}
    for section in sorted(sections):
        required = _WORDING_SECTIONS.get(section, set())
        later = _WORDING_LATER.get(section, set())
        values = table.get(section, {} if section not in _WORDING_SECTIONS else None)
        if not isinstance(values, dict):
            raise InputError(f"{path}: missing table [{section}]")
        lexicon.check_keys(values, required | later, f"{path} [{section}]")
        missing = sorted(required - set(values))
        if missing:
            raise InputError(f"{path} [{section}]: missing key(s) {', '.join(missing)}")
        values = dict(values)
        for key in later - set(values):
            values[key] = (defaults.get(section) or {}).get(key)
        parsed[section] = values
    for section in sorted(sections):
        for key, value in parsed[section].items():
            if not isinstance(value, str):
                raise InputError(f"{path} [{section}] {key}: expected a string, got {value!r}")
    for section in ("sentences", "titles", "change", "families"):
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
        change=dict(parsed["change"]),
        source=path,
        formats=dict(parsed["formats"]),
        header=dict(parsed["header"]),
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

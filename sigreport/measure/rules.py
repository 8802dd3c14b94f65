"""The measurement stage's lexicon: thresholds, tissues and behaviour rules, validated on load.

Four files of the lexicon (``sigreport.lexicon``) are read here:

- ``thresholds.toml``: every number a site might change (grades, qualifiers, enhancement,
  suppression, controls, reference homogeneity, flow void, minimum voxel counts);
- ``tissues.toml``: reference and control tissue names, their aliases and, for controls, the
  suppression they check (``check = "fluid"`` or ``"fat"``);
- ``behaviour.toml``: signal-behaviour rules (a small condition language, see that file), each
  with the reference tissues its grades assume;
- ``grading.toml``: when a grade is borderline (margin and confidence level).

A site file replaces the bundled file of the same name whole, so every key must be present; an
unknown key, a missing key or a value of the wrong type is an ``InputError`` naming the file and
the key.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from statistics import NormalDist
from typing import Any

from sigreport import lexicon
from sigreport.errors import InputError
from sigreport.model import EnhancementPattern, Grade, RoiStats, Role

THRESHOLDS_FILE = "thresholds.toml"
TISSUES_FILE = "tissues.toml"
BEHAVIOUR_FILE = "behaviour.toml"
GRADING_FILE = "grading.toml"

#: Suppression kinds a control tissue can check (tissues.toml ``check``).
CHECK_KINDS = ("fluid", "fat")

#: Boolean flags the behaviour rules may test.
RULE_FLAGS = (
    "fluid_suppressed",
    "fat_suppressed",
    "fat_suppression_specific",
    "enhancing",
    "flow_void",
    # Other sequence families (docs/measurements.md): diffusion, susceptibility, chemical shift.
    "restricted",
    "shine_through",
    "blooming",
    "microscopic_fat",
)

#: The dynamic curve types a rule's ``curve`` may name (docs/measurements.md, dynamic).
CURVE_TYPES = ("persistent", "plateau", "washout")

#: Decimal places findings.json prints; thresholds are compared with values rounded this way.
RATIO_DECIMALS = 4
PERCENT_DECIMALS = 2


# --------------------------------------------------------------------------------------------
# thresholds.toml


@dataclass(frozen=True)
class MeasureThresholds:
    min_voxels: int
    shell_fraction: float
    min_part_voxels: int


@dataclass(frozen=True)
class GradeThresholds:
    hyper_min_ratio: float
    hypo_max_ratio: float


@dataclass(frozen=True)
class QualifierThresholds:
    mild_word: str
    marked_word: str
    mild_hyper_max_ratio: float
    marked_hyper_min_ratio: float
    mild_hypo_min_ratio: float
    marked_hypo_max_ratio: float


@dataclass(frozen=True)
class EnhancementThresholds:
    enhancing_min_percent: float
    core_max_percent_for_rim: float
    rim_max_core_to_shell: float
    solid_min_core_to_shell: float
    raw_tolerance_percent: float


@dataclass(frozen=True)
class SuppressionThresholds:
    suppressed_min_drop_percent: float


@dataclass(frozen=True)
class ControlThresholds:
    fluid_min_drop_percent: float
    fat_min_drop_percent: float


@dataclass(frozen=True)
class ReferenceThresholds:
    max_cv: float


@dataclass(frozen=True)
class FlowVoidThresholds:
    max_ratio: float
    noise_factor: float
    min_series: int


@dataclass(frozen=True)
class Thresholds:
    """thresholds.toml, one attribute per section."""

    measure: MeasureThresholds
    grade: GradeThresholds
    qualifiers: QualifierThresholds
    enhancement: EnhancementThresholds
    suppression: SuppressionThresholds
    controls: ControlThresholds
    reference: ReferenceThresholds
    flow_void: FlowVoidThresholds


_SECTIONS: dict[str, type] = {
    f.name: f.type if isinstance(f.type, type) else globals()[str(f.type)]
    for f in dataclasses.fields(Thresholds)
}


def _typed(value: Any, kind: str, where: str) -> Any:
    if kind == "str":
        if not isinstance(value, str) or not value.strip():
            raise InputError(f"{where}: expected a non-empty string, got {value!r}")
        return value
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise InputError(f"{where}: expected a number, got {value!r}")
    if not math.isfinite(value):
        raise InputError(f"{where}: expected a finite number, got {value!r}")
    if kind == "int":
        if not float(value).is_integer():
            raise InputError(f"{where}: expected a whole number, got {value!r}")
        return int(value)
    return float(value)


def _parse_thresholds(table: Mapping[str, Any], source: str) -> Thresholds:
    lexicon.check_keys(dict(table), set(_SECTIONS), source)
    sections: dict[str, Any] = {}
    for name, cls in _SECTIONS.items():
        where = f"{source} [{name}]"
        section = table.get(name)
        if section is None:
            raise InputError(f"{source}: missing section [{name}]")
        if not isinstance(section, dict):
            raise InputError(f"{where}: expected a table, got {section!r}")
        fields = {f.name: str(f.type) for f in dataclasses.fields(cls)}
        lexicon.check_keys(section, set(fields), where)
        missing = sorted(set(fields) - set(section))
        if missing:
            raise InputError(f"{where}: missing key(s) {', '.join(missing)}")
        sections[name] = cls(
            **{key: _typed(section[key], kind, f"{where} {key}") for key, kind in fields.items()}
        )
    out = Thresholds(**sections)
    _check_thresholds(out, source)
    return out


def _check_thresholds(t: Thresholds, source: str) -> None:
    """Relations the numbers must keep (so that every grade band is non-empty and ordered)."""
    checks = [
        (t.measure.min_voxels >= 1, "[measure] min_voxels must be >= 1"),
        (0.0 < t.measure.shell_fraction < 1.0, "[measure] shell_fraction must be in (0, 1)"),
        (t.measure.min_part_voxels >= 1, "[measure] min_part_voxels must be >= 1"),
        (
            0.0 < t.grade.hypo_max_ratio < 1.0 < t.grade.hyper_min_ratio,
            "[grade] needs 0 < hypo_max_ratio < 1 < hyper_min_ratio",
        ),
        (
            t.grade.hyper_min_ratio
            <= t.qualifiers.mild_hyper_max_ratio
            <= t.qualifiers.marked_hyper_min_ratio,
            "[qualifiers] needs hyper_min_ratio <= mild_hyper_max_ratio <= marked_hyper_min_ratio",
        ),
        (
            0.0
            < t.qualifiers.marked_hypo_max_ratio
            <= t.qualifiers.mild_hypo_min_ratio
            <= t.grade.hypo_max_ratio,
            "[qualifiers] needs 0 < marked_hypo_max_ratio <= mild_hypo_min_ratio <= hypo_max_ratio",
        ),
        (
            t.enhancement.raw_tolerance_percent >= 0.0,
            "[enhancement] raw_tolerance_percent must be >= 0",
        ),
        (
            0.0
            <= t.enhancement.rim_max_core_to_shell
            < t.enhancement.solid_min_core_to_shell
            <= 1.0,
            "[enhancement] needs 0 <= rim_max_core_to_shell < solid_min_core_to_shell <= 1",
        ),
        (t.reference.max_cv > 0.0, "[reference] max_cv must be > 0"),
        (t.flow_void.max_ratio > 0.0, "[flow_void] max_ratio must be > 0"),
        (t.flow_void.noise_factor > 0.0, "[flow_void] noise_factor must be > 0"),
        (t.flow_void.min_series >= 1, "[flow_void] min_series must be >= 1"),
    ]
    for ok, message in checks:
        if not ok:
            raise InputError(f"{source}: {message}")


# --------------------------------------------------------------------------------------------
# tissues.toml


@dataclass(frozen=True)
class Tissue:
    """A reference / control tissue: canonical name, aliases and the suppression it checks."""

    name: str
    aliases: tuple[str, ...] = ()
    check: str | None = None  # "fluid", "fat" or None


def _parse_tissues(table: Mapping[str, Any], source: str) -> dict[str, Tissue]:
    lexicon.check_keys(dict(table), {"tissues"}, source)
    entries = table.get("tissues")
    if not isinstance(entries, dict) or not entries:
        raise InputError(f"{source}: missing or empty [tissues] table")
    out: dict[str, Tissue] = {}
    seen: dict[str, str] = {}
    for name, entry in entries.items():
        where = f"{source} [tissues.{name}]"
        if not isinstance(entry, dict):
            raise InputError(f"{where}: expected a table, got {entry!r}")
        lexicon.check_keys(entry, {"aliases", "check"}, where)
        aliases = entry.get("aliases", [])
        if not isinstance(aliases, list) or not all(
            isinstance(a, str) and a.strip() for a in aliases
        ):
            raise InputError(f"{where} aliases: expected a list of non-empty strings")
        check = entry.get("check")
        if check is not None and check not in CHECK_KINDS:
            raise InputError(
                f"{where} check: expected one of {', '.join(CHECK_KINDS)}, got {check!r}"
            )
        for word in (name, *aliases):
            folded = _fold(word)
            if folded in seen and seen[folded] != name:
                raise InputError(f"{where}: name {word!r} is also used by tissue {seen[folded]!r}")
            seen[folded] = name
        out[name] = Tissue(name=name, aliases=tuple(aliases), check=check)
    return out


def _fold(word: str) -> str:
    return " ".join(word.replace("_", " ").replace("-", " ").split()).casefold()


# --------------------------------------------------------------------------------------------
# behaviour.toml


@dataclass(frozen=True)
class BehaviourRule:
    """One signal-behaviour rule: ``key`` (stable, in findings.json), the neutral ``phrase``, the
    usual ``considerations`` (things to consider, never a diagnosis) and its condition.

    ``references`` are the reference tissues (tissues.toml names) the rule's grades assume; an
    empty tuple means any reference. Against another reference the rule does not fire."""

    key: str
    phrase: str
    considerations: tuple[str, ...]
    when: Mapping[str, Any]
    references: tuple[str, ...] = ()

    def assumes(self, tissue: str | None) -> bool:
        """True when the rule may be read against reference ``tissue`` (a tissues.toml name)."""
        if not self.references:
            return True
        return tissue is not None and _fold(tissue) in {_fold(t) for t in self.references}

    def evaluate(self, facts: Mapping[str, Any]) -> bool | None:
        """Three-valued truth of the condition on ``facts`` (role name -> Grade, flag -> bool,
        ``"pattern"`` -> EnhancementPattern; a missing or None value is unknown)."""
        return _evaluate(self.when, facts)

    def matches(self, facts: Mapping[str, Any]) -> bool:
        """True when the condition holds (unknown counts as not holding)."""
        return self.evaluate(facts) is True


_ROLE_KEYS = {r.value for r in Role if r is not Role.UNKNOWN}
_GRADES = {g.value for g in Grade}
_PATTERNS = {p.value for p in EnhancementPattern}
_CURVES = set(CURVE_TYPES)
_CONDITION_KEYS = _ROLE_KEYS | set(RULE_FLAGS) | {"pattern", "curve", "any_of", "not"}


def _check_condition(cond: Any, where: str) -> None:
    if not isinstance(cond, dict) or not cond:
        raise InputError(f"{where}: expected a non-empty table of conditions, got {cond!r}")
    lexicon.check_keys(cond, _CONDITION_KEYS, where)
    for key, value in cond.items():
        here = f"{where}.{key}"
        if key in _ROLE_KEYS or key in ("pattern", "curve"):
            allowed = _GRADES if key in _ROLE_KEYS else _PATTERNS if key == "pattern" else _CURVES
            values = value if isinstance(value, list) else [value]
            if not values or not all(isinstance(v, str) and v in allowed for v in values):
                raise InputError(
                    f"{here}: expected one of {', '.join(sorted(allowed))} (or a list), "
                    f"got {value!r}"
                )
        elif key in RULE_FLAGS:
            if not isinstance(value, bool):
                raise InputError(f"{here}: expected true or false, got {value!r}")
        elif key == "any_of":
            if not isinstance(value, list) or not value:
                raise InputError(f"{here}: expected a non-empty list of tables, got {value!r}")
            for i, sub in enumerate(value):
                _check_condition(sub, f"{here}[{i}]")
        else:  # "not"
            _check_condition(value, here)


def _atom(key: str, wanted: Any, facts: Mapping[str, Any]) -> bool | None:
    have = facts.get(key)
    if have is None:
        return None
    if isinstance(wanted, bool):
        return bool(have) is wanted
    options = wanted if isinstance(wanted, list) else [wanted]
    return str(have) in options


def _evaluate(cond: Mapping[str, Any], facts: Mapping[str, Any]) -> bool | None:
    results: list[bool | None] = []
    for key, value in cond.items():
        if key == "any_of":
            subs = [_evaluate(sub, facts) for sub in value]
            results.append(True if True in subs else (None if None in subs else False))
        elif key == "not":
            sub = _evaluate(value, facts)
            results.append(None if sub is None else not sub)
        else:
            results.append(_atom(key, value, facts))
    if False in results:
        return False
    if None in results:
        return None
    return True


def _parse_behaviour(table: Mapping[str, Any], source: str) -> dict[str, BehaviourRule]:
    lexicon.check_keys(dict(table), {"rule"}, source)
    entries = table.get("rule")
    if not isinstance(entries, dict) or not entries:
        raise InputError(f"{source}: missing or empty [rule] table")
    out: dict[str, BehaviourRule] = {}
    for key, entry in entries.items():
        where = f"{source} [rule.{key}]"
        if not isinstance(entry, dict):
            raise InputError(f"{where}: expected a table, got {entry!r}")
        lexicon.check_keys(entry, {"phrase", "considerations", "when", "references"}, where)
        phrase = entry.get("phrase")
        if not isinstance(phrase, str) or not phrase.strip():
            raise InputError(f"{where}: missing phrase (a non-empty string)")
        considerations = entry.get("considerations", [])
        if not isinstance(considerations, list) or not all(
            isinstance(c, str) and c.strip() for c in considerations
        ):
            raise InputError(f"{where} considerations: expected a list of non-empty strings")
        if "when" not in entry:
            raise InputError(f"{where}: missing when (the rule's condition)")
        _check_condition(entry["when"], f"{where} when")
        references = entry.get("references", [])
        if not isinstance(references, list) or not all(
            isinstance(t, str) and t.strip() for t in references
        ):
            raise InputError(f"{where} references: expected a list of tissue names")
        out[key] = BehaviourRule(
            key=key,
            phrase=phrase,
            considerations=tuple(considerations),
            when=entry["when"],
            references=tuple(references),
        )
    return out


# --------------------------------------------------------------------------------------------
# grading.toml


@dataclass(frozen=True)
class BorderlineSettings:
    """grading.toml ``[borderline]``: a grade within ``margin`` of a threshold, or whose ratio's
    ``confidence`` interval contains one, is borderline."""

    margin: float = 0.03
    confidence: float = 0.95
    word: str = "borderline"


def _parse_grading(table: Mapping[str, Any], source: str) -> BorderlineSettings:
    lexicon.check_keys(dict(table), {"borderline"}, source)
    section = table.get("borderline")
    if not isinstance(section, dict):
        raise InputError(f"{source}: missing section [borderline]")
    where = f"{source} [borderline]"
    lexicon.check_keys(section, {"margin", "confidence", "word"}, where)
    missing = sorted({"margin", "confidence", "word"} - set(section))
    if missing:
        raise InputError(f"{where}: missing key(s) {', '.join(missing)}")
    margin = _typed(section["margin"], "float", f"{where} margin")
    confidence = _typed(section["confidence"], "float", f"{where} confidence")
    if not 0.0 <= margin < 0.5:
        raise InputError(f"{where} margin: must be in [0, 0.5), got {margin!r}")
    if not 0.0 < confidence < 1.0:
        raise InputError(f"{where} confidence: must be in (0, 1), got {confidence!r}")
    word = _typed(section["word"], "str", f"{where} word")
    return BorderlineSettings(margin=margin, confidence=confidence, word=word)


# --------------------------------------------------------------------------------------------
# All of it


@dataclass(frozen=True)
class Rules:
    """The measurement stage's lexicon, validated.

    ``behaviour`` keeps the order of behaviour.toml; ``sources`` names the file each table came
    from (the site's copy or the bundled one).
    """

    thresholds: Thresholds
    tissues: dict[str, Tissue]
    behaviour: dict[str, BehaviourRule]
    sources: dict[str, Path]
    borderline: BorderlineSettings = BorderlineSettings()

    @property
    def min_voxels(self) -> int:
        """Fewest voxels of an ROI on a series for it to be measured."""
        return self.thresholds.measure.min_voxels

    def tissue(self, name: str | None) -> Tissue | None:
        """The tissue a case file names (case-insensitive, aliases allowed); None if unknown."""
        if name is None:
            return None
        folded = _fold(name)
        for tissue in self.tissues.values():
            if folded in {_fold(w) for w in (tissue.name, *tissue.aliases)}:
                return tissue
        return None


def load_rules(site_lexicon: Path | None = None) -> Rules:
    """Load and validate thresholds.toml, tissues.toml and behaviour.toml.

    Parameters
    ----------
    site_lexicon
        A site's lexicon folder; a file present there replaces the bundled one whole
        (``sigreport.lexicon``). None uses ``$SIGREPORT_LEXICON`` or the bundled lexicon.

    Returns
    -------
    Rules

    Raises
    ------
    InputError
        A file is missing or not TOML, or has an unknown key, a missing key or phrase, or a value
        of the wrong type; the message names the file and the key.
    """
    sources = {
        name: lexicon.find_file(name, site_lexicon)
        for name in (THRESHOLDS_FILE, TISSUES_FILE, BEHAVIOUR_FILE, GRADING_FILE)
    }
    tables = {name: lexicon.read_table(name, site_lexicon) for name in sources}
    tissues = _parse_tissues(tables[TISSUES_FILE], str(sources[TISSUES_FILE]))
    behaviour = _parse_behaviour(tables[BEHAVIOUR_FILE], str(sources[BEHAVIOUR_FILE]))
    known = {_fold(w) for t in tissues.values() for w in (t.name, *t.aliases)}
    for rule in behaviour.values():
        for name in rule.references:
            if _fold(name) not in known:
                raise InputError(
                    f"{sources[BEHAVIOUR_FILE]} [rule.{rule.key}] references: {name!r} is not a "
                    f"tissue of {sources[TISSUES_FILE]}"
                )
    return Rules(
        thresholds=_parse_thresholds(tables[THRESHOLDS_FILE], str(sources[THRESHOLDS_FILE])),
        tissues=tissues,
        behaviour=behaviour,
        sources=sources,
        borderline=_parse_grading(tables[GRADING_FILE], str(sources[GRADING_FILE])),
    )


def rounded_ratio(ratio: float) -> float:
    """A ratio as findings.json prints it (thresholds are compared with this value)."""
    return round(float(ratio), RATIO_DECIMALS)


def rounded_percent(percent: float) -> float:
    """A percentage as findings.json prints it (thresholds are compared with this value)."""
    return round(float(percent), PERCENT_DECIMALS)


def grade_of(ratio: float | None, rules: Rules) -> Grade | None:
    """The grade of a ratio (docs/usage.md findings.json ``grade``); None when ratio is None."""
    if ratio is None or not math.isfinite(ratio):
        return None
    r = rounded_ratio(ratio)
    g = rules.thresholds.grade
    if r >= g.hyper_min_ratio:
        return Grade.HYPERINTENSE
    if r <= g.hypo_max_ratio:
        return Grade.HYPOINTENSE
    return Grade.ISOINTENSE


def grade_phrase(ratio: float | None, rules: Rules, *, borderline: bool = False) -> str | None:
    """The grade with its qualifier, e.g. ``"markedly hyperintense"``, ``"isointense"``, or
    ``"borderline hypointense"`` when ``borderline`` (grading.toml ``word``).

    Parameters
    ----------
    ratio
        Lesion median / reference median on one series, or None.
    rules
        The lexicon (``[grade]`` and ``[qualifiers]`` of thresholds.toml).
    borderline
        The grade is borderline (:func:`is_borderline`).

    Returns
    -------
    str or None
        None when ``ratio`` is None or not finite.
    """
    grade = grade_of(ratio, rules)
    if grade is None or ratio is None:
        return None
    if borderline:
        # A qualifier would overstate a grade that sits at its edge: "borderline hypointense".
        return f"{rules.borderline.word} {grade.value}"
    r = rounded_ratio(ratio)
    q = rules.thresholds.qualifiers
    word = None
    if grade is Grade.HYPERINTENSE:
        if r >= q.marked_hyper_min_ratio:
            word = q.marked_word
        elif r < q.mild_hyper_max_ratio:
            word = q.mild_word
    elif grade is Grade.HYPOINTENSE:
        if r <= q.marked_hypo_max_ratio:
            word = q.marked_word
        elif r > q.mild_hypo_min_ratio:
            word = q.mild_word
    return f"{word} {grade.value}" if word else grade.value


def ratio_interval(
    lesion: RoiStats, reference: RoiStats, *, confidence: float
) -> tuple[float, float] | None:
    """The ``confidence`` interval of lesion median / reference median from the ROIs' noise.

    The standard error of a median of n values with standard deviation sd is
    sqrt(pi / 2) sd / sqrt(n) (asymptotic, normally distributed values; a textbook result,
    from memory: Kendall & Stuart); the relative errors of the two medians add in quadrature
    (first-order error propagation of a quotient). Returns None when a median is not positive.
    """
    if not (lesion.median > 0 and reference.median > 0) or lesion.n_voxels < 1:
        return None
    if reference.n_voxels < 1:
        return None
    k = math.sqrt(math.pi / 2.0)
    rel = math.hypot(
        k * lesion.sd / math.sqrt(lesion.n_voxels) / lesion.median,
        k * reference.sd / math.sqrt(reference.n_voxels) / reference.median,
    )
    z = NormalDist().inv_cdf(0.5 + confidence / 2.0)
    ratio = lesion.median / reference.median
    return ratio * (1.0 - z * rel), ratio * (1.0 + z * rel)


def is_borderline(
    ratio: float | None, rules: Rules, interval: tuple[float, float] | None = None
) -> bool | None:
    """True when ``ratio`` lies within the lexicon's margin of a grade threshold, or
    ``interval`` (:func:`ratio_interval`) contains one (grading.toml ``[borderline]``); None
    when there is no ratio."""
    if ratio is None or not math.isfinite(ratio):
        return None
    r = rounded_ratio(ratio)
    g = rules.thresholds.grade
    margin = rules.borderline.margin
    for threshold in (g.hypo_max_ratio, g.hyper_min_ratio):
        if abs(r - threshold) <= margin + 1e-9:
            return True
        if interval is not None and interval[0] <= threshold <= interval[1]:
            return True
    return False

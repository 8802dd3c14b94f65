"""From measurements to a characterization: ratios, grades, enhancement, suppression, flow void,
controls and signal-behaviour rules (docs/usage.md, findings.json; the reasoning behind each number is in docs/measurements.md).

Every number here is a ratio of medians on one series, so the arbitrary scaling each series
carries cancels: multiplying a series by a positive factor changes no ratio, grade, percentage
or flag (the one exception is ``raw_percent``, reported only when two series share a scaling).
Thresholds come from the lexicon (``thresholds.toml``) and are compared with the values as
findings.json prints them (ratios to 4 decimals, percentages to 2).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from typing import Any

from sigreport.measure.families import (
    ChemicalShiftResult,
    DiffusionResult,
    DynamicResult,
    FamilyThresholds,
    PhaseInput,
    SusceptibilityResult,
    adc_units_ok,
    chemical_shift_of,
    diffusion_of,
    dynamic_of,
    pair_mismatch,
    susceptibility_of,
)
from sigreport.measure.rules import (
    Rules,
    grade_of,
    grade_phrase,
    is_borderline,
    ratio_interval,
    rounded_percent,
    rounded_ratio,
)
from sigreport.model import (
    ENHANCEMENT_PAIRS,
    PRE_CONTRAST_OF,
    SUPPRESSION_PAIRS,
    UNGRADED_ROLES,
    Acquisition,
    BehaviourPhrase,
    EnhancementPattern,
    Grade,
    LesionPhrases,
    MeasuredRoi,
    MeasuredStudy,
    QcLevel,
    QcNote,
    RoiKind,
    RoiShape,
    RoiStats,
    Role,
    SeriesMeasurement,
    Stack,
    first_pair,
)


def _r(value: float | None, digits: int) -> float | None:
    return None if value is None else round(float(value), digits)


# --------------------------------------------------------------------------------------------
# Results


@dataclass(frozen=True)
class SignalResult:
    """A lesion on one series: its statistics, ratio to the reference, grade and phrase."""

    stats: RoiStats
    ratio: float | None = None
    grade: Grade | None = None
    phrase: str | None = None  # grade with qualifier, e.g. "markedly hyperintense"
    borderline: bool | None = None  # near a grade threshold (rules.is_borderline)

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = dict(self.stats.to_json())
        out["ratio"] = _r(self.ratio, 4)
        out["grade"] = self.grade.value if self.grade is not None else None
        out["borderline"] = self.borderline
        return out


@dataclass(frozen=True)
class EnhancementResult:
    """Enhancement from a pre / post pair; all None when the study has no pair."""

    pre: Role | None = None
    post: Role | None = None
    percent: float | None = None
    enhancing: bool | None = None
    pattern: EnhancementPattern | None = None
    raw_percent: float | None = None  # only when pre and post share settings and scaling
    shell_percent: float | None = None  # of the pair the pattern comes from
    core_percent: float | None = None
    pattern_pre: Role | None = None  # the pair the pattern comes from (finest voxels)
    pattern_post: Role | None = None
    # "raw" when normalized and raw percents disagree (the reference itself changed) and the
    # flag follows the raw percent; then reference_percent is the reference's own raw change.
    basis: str = "normalized"
    reference_percent: float | None = None

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "pre": self.pre.value if self.pre is not None else None,
            "post": self.post.value if self.post is not None else None,
            "percent": _r(self.percent, 2),
            "enhancing": self.enhancing,
            "pattern": self.pattern.value if self.pattern is not None else None,
        }
        if self.raw_percent is not None:
            out["raw_percent"] = _r(self.raw_percent, 2)
        if self.basis != "normalized":
            out["basis"] = self.basis
            out["reference_percent"] = _r(self.reference_percent, 2)
        return out


@dataclass(frozen=True)
class SuppressionResult:
    """Suppression of one kind ("fluid" or "fat"); source/target None when no pair."""

    kind: str
    source: Role | None = None
    target: Role | None = None
    drop_percent: float | None = None
    suppressed: bool | None = None
    reliable: bool = True  # False when the matching control failed in this study
    specific: bool = True  # False for a STIR-based fat pair (STIR nulls every short-T1 tissue)

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "from": self.source.value if self.source is not None else None,
            "to": self.target.value if self.target is not None else None,
            "drop_percent": _r(self.drop_percent, 2),
            "suppressed": self.suppressed,
        }
        if not self.reliable:
            out["reliable"] = False
        return out


@dataclass(frozen=True)
class LesionResult:
    """One lesion characterized; ``to_json`` is exactly the findings.json lesion object
    (docs/findings.schema.json). ``behaviour_phrases`` are the matched rules in the lexicon's
    words, in the order of ``behaviour``."""

    id: str
    site: str | None
    reference: str | None
    volume_ml: float | None
    max_diameter_mm: float | None
    signal: dict[Role, SignalResult | None]
    enhancement: EnhancementResult
    suppression: dict[str, SuppressionResult]
    flow_void: bool | None  # None: not assessable (measured on too few series)
    behaviour: tuple[str, ...] = ()
    behaviour_phrases: tuple[BehaviourPhrase, ...] = ()
    size: dict[str, Any] | None = None  # findings.json lesions[].size
    # Rules whose condition held but which assume another reference tissue (behaviour.toml).
    behaviour_not_applied: tuple[str, ...] = ()
    not_applied_phrases: tuple[BehaviourPhrase, ...] = ()
    # Other sequence families (docs/measurements.md); None when the study lacks the pair.
    diffusion: DiffusionResult | None = None
    susceptibility: SusceptibilityResult | None = None
    chemical_shift: ChemicalShiftResult | None = None
    dynamic: DynamicResult | None = None

    def phrases(self) -> LesionPhrases:
        """The words the report renders: the graded wording per series and the behaviour."""
        return LesionPhrases(
            grades={
                role.value: s.phrase
                for role, s in self.signal.items()
                if s is not None and s.phrase is not None
            },
            behaviour=self.behaviour_phrases,
            not_applied=self.not_applied_phrases,
        )

    def to_json(self) -> dict[str, Any]:
        return {
            "id": self.id,
            "site": self.site,
            "reference": self.reference,
            "volume_ml": _r(self.volume_ml, 4),
            "max_diameter_mm": _r(self.max_diameter_mm, 2),
            "size": self.size,
            "signal": {
                role.value: (s.to_json() if s is not None else None)
                for role, s in self.signal.items()
            },
            "enhancement": self.enhancement.to_json(),
            "suppression": {kind: s.to_json() for kind, s in self.suppression.items()},
            "flow_void": self.flow_void,
            **self.families_json(),
            "behaviour": list(self.behaviour),
            "behaviour_not_applied": list(self.behaviour_not_applied),
        }

    def families_json(self) -> dict[str, Any]:
        """``diffusion``, ``susceptibility``, ``chemical_shift`` and ``dynamic`` as findings.json
        holds them (null when the study lacks the pair)."""
        return {
            "diffusion": None if self.diffusion is None else self.diffusion.to_json(),
            "susceptibility": None
            if self.susceptibility is None
            else self.susceptibility.to_json(),
            "chemical_shift": None
            if self.chemical_shift is None
            else self.chemical_shift.to_json(),
            "dynamic": None if self.dynamic is None else self.dynamic.to_json(),
        }


@dataclass(frozen=True)
class Characterization:
    """The characterization stage's output: lesions, the ``rois`` entries of findings.json
    (reference and control ROIs) and the stage's qc notes."""

    lesions: tuple[LesionResult, ...] = ()
    rois: tuple[dict[str, Any], ...] = ()
    qc: tuple[QcNote, ...] = ()
    # findings.json series[].adc_units_ok of the measured ADC map (None: not checked).
    adc_units_ok: bool | None = None


# --------------------------------------------------------------------------------------------
# Helpers


def _median(m: SeriesMeasurement | None) -> float | None:
    return m.stats.median if m is not None and m.stats is not None else None


def _ratio(num: float | None, den: float | None) -> float | None:
    if num is None or den is None or not den > 0:
        return None
    return num / den


def _percent_change(after: float | None, before: float | None) -> float | None:
    """100 * (after / before - 1), None when either is missing or ``before`` is not positive."""
    q = _ratio(after, before)
    return None if q is None else 100.0 * (q - 1.0)


def _drop(before: float | None, after: float | None) -> float | None:
    """100 * (1 - after / before): the suppression drop."""
    q = _ratio(after, before)
    return None if q is None else 100.0 * (1.0 - q)


_SETTINGS = ("repetition_time_ms", "echo_time_ms", "inversion_time_ms", "flip_angle_deg")
_SEQUENCE = (
    "scanning_sequence",
    "sequence_variant",
    "scan_options",
    "sequence_name",
    "mr_acquisition_type",
)


def same_acquisition(a: Acquisition, b: Acquisition) -> bool:
    """True when two series share TR, TE, TI, flip angle and sequence (contrast agent aside).

    TR and TE must be known; TI and flip angle count as equal when both are absent.
    """
    if a.repetition_time_ms is None or a.echo_time_ms is None:
        return False
    for name in _SETTINGS:
        x, y = getattr(a, name), getattr(b, name)
        if (x is None) != (y is None):
            return False
        if x is not None and not math.isclose(x, y, rel_tol=1e-6, abs_tol=1e-6):
            return False
    return all(getattr(a, name) == getattr(b, name) for name in _SEQUENCE)


def _pattern(
    shell: float | None, core: float | None, enhancing: bool | None, rules: Rules
) -> EnhancementPattern | None:
    """The enhancement pattern from the shell's and the core's percent enhancement."""
    e = rules.thresholds.enhancement
    if shell is None or core is None:
        # Without a shell / core split a non-enhancing lesion still has the pattern "none".
        return EnhancementPattern.NONE if enhancing is False else None
    s, c = rounded_percent(shell), rounded_percent(core)
    lo = e.enhancing_min_percent
    if s >= lo and (c <= e.core_max_percent_for_rim or c <= e.rim_max_core_to_shell * s):
        return EnhancementPattern.RIM
    if s >= lo and c >= lo and min(s, c) / max(s, c) >= e.solid_min_core_to_shell:
        return EnhancementPattern.SOLID
    if s < lo and c < lo and not enhancing:
        return EnhancementPattern.NONE
    return EnhancementPattern.HETEROGENEOUS


@dataclass
class _Context:
    measured: MeasuredStudy
    rules: Rules
    roles: list[Role]  # measured roles in Role order, UNKNOWN left out
    pairs: dict[str, tuple[Role, Role] | None]
    qc: list[QcNote] = field(default_factory=list)
    failed: set[str] = field(default_factory=set)
    # (percent pair, pattern pair) -> lesion ids whose pattern came from the finer pair
    pattern_pairs: dict[tuple[tuple[Role, Role], tuple[Role, Role]], list[str]] = field(
        default_factory=dict
    )
    families: FamilyThresholds = field(default_factory=FamilyThresholds)
    adc_units_ok: bool | None = None
    # family pair name ("chemical_shift", "dynamic") -> why its two series do not compare
    mismatched: dict[str, str] = field(default_factory=dict)

    def note(self, level: QcLevel, code: str, message: str) -> None:
        self.qc.append(QcNote(level, code, message))


def _measurement(roi: MeasuredRoi | None, role: Role) -> SeriesMeasurement | None:
    return roi.by_role.get(role) if roi is not None else None


def _normalized_median(
    roi: MeasuredRoi, ref: MeasuredRoi | None, role: Role
) -> tuple[float | None, bool]:
    """The ROI's median on ``role`` divided by the reference's (or raw when there is no
    reference); the flag says whether it was normalized."""
    own = _median(_measurement(roi, role))
    if ref is None:
        return own, False
    return _ratio(own, _median(_measurement(ref, role))), True


# --------------------------------------------------------------------------------------------
# The stage


def characterize(
    measured: MeasuredStudy, rules: Rules, *, families: FamilyThresholds | None = None
) -> Characterization:
    """Ratios, grades, enhancement, suppression, flow void, controls and behaviour; diffusion,
    susceptibility, chemical shift and dynamic curves where the study has their series.

    Parameters
    ----------
    measured
        Every ROI measured on every measured series, the stacks, and the noise sigma per role.
    rules
        The lexicon (:func:`sigreport.measure.load_rules`).
    families
        The thresholds of the other sequence families (``families.toml``,
        :func:`sigreport.measure.families.load_family_thresholds`); None: the defaults.

    Returns
    -------
    Characterization
        ``lesions`` in case-file order; ``rois`` the findings.json entries of the reference and
        control ROIs (with SNR per role and, for controls, the suppression check); ``qc`` the
        stage's notes (unmeasured ROIs, heterogeneous references, failed controls, STIR-based fat
        flags, disagreeing raw enhancement...).

    Notes
    -----
    Pairs are chosen once per study: enhancement T1 -> T1POST, else T1FS -> T1POSTFS; fluid
    suppression T2 -> FLAIR; fat suppression the first of T1 -> T1FS, T1POST -> T1POSTFS,
    T2 -> T2FS, T2 -> STIR. A control ROI is normalized by its own ``reference`` when it names
    one, else by the first lesion's reference, else by the first reference ROI; with no
    reference at all its drop uses raw medians (valid only if the two series share a scaling).
    """
    roles: list[Role] = [r for r in Role if r is not Role.UNKNOWN and r in measured.stacks]
    role_set: set[Role] = set(roles)
    ctx = _Context(
        measured=measured,
        rules=rules,
        roles=roles,
        pairs={
            "enhancement": first_pair(ENHANCEMENT_PAIRS, role_set),
            "fluid": first_pair(SUPPRESSION_PAIRS["fluid"], role_set),
            "fat": first_pair(SUPPRESSION_PAIRS["fat"], role_set),
        },
        families=families if families is not None else FamilyThresholds(),
    )
    by_id = {roi.spec.id: roi for roi in measured.rois}
    references = [r for r in measured.rois if r.spec.kind is RoiKind.REFERENCE]
    lesions = [r for r in measured.rois if r.spec.kind is RoiKind.LESION]
    controls = [r for r in measured.rois if r.spec.kind is RoiKind.CONTROL]

    _note_unmeasured(ctx)
    for reference in references:
        _check_homogeneous(ctx, reference)

    def reference_of(roi: MeasuredRoi) -> MeasuredRoi | None:
        wanted = roi.spec.reference
        if wanted is not None:
            found = by_id.get(wanted)
            if found is not None and found.spec.kind is RoiKind.REFERENCE:
                return found
            ctx.note(
                QcLevel.WARNING,
                "reference-not-found",
                f"{roi.spec.id} names reference {wanted!r}, which is not a reference ROI; "
                + (f"using {references[0].spec.id}" if references else "no reference ROI"),
            )
        return references[0] if references else None

    lesion_refs = {lesion.spec.id: reference_of(lesion) for lesion in lesions}
    if lesions and not references:
        ctx.note(
            QcLevel.WARNING,
            "no-reference",
            "no reference ROI: ratios, grades, enhancement and suppression cannot be computed",
        )
    default_ref = (
        lesion_refs[lesions[0].spec.id] if lesions else (references[0] if references else None)
    )

    roi_entries: list[dict[str, Any]] = []
    for roi in references:
        roi_entries.append(_roi_entry(ctx, roi))
    for control in controls:
        ref = reference_of(control) if control.spec.reference is not None else default_ref
        entry = _roi_entry(ctx, control)
        check = _check_control(ctx, control, ref)
        if check is not None:
            entry["check"] = check
        roi_entries.append(entry)

    _check_adc_units(ctx, references, controls)
    _check_family_pairs(ctx)

    fat_pair = ctx.pairs["fat"]
    if lesions and fat_pair is not None and fat_pair[1] is Role.STIR:
        ctx.note(
            QcLevel.INFO,
            "stir-fat-not-specific",
            "fat suppression is judged from T2 -> STIR: STIR nulls every short-T1 tissue, not "
            "only fat (subacute blood and enhancing tissue drop too), so the fat flag is not "
            "specific",
        )

    results = tuple(_lesion(ctx, lesion, lesion_refs[lesion.spec.id]) for lesion in lesions)
    for (pair, finer), ids in ctx.pattern_pairs.items():
        ctx.note(
            QcLevel.INFO,
            "enhancement-pattern-pair",
            f"enhancement pattern of {', '.join(ids)} from {finer[0].value} -> {finer[1].value}, "
            f"whose voxels are finer than those of {pair[0].value} -> {pair[1].value} (which "
            "gives the percent): thick slices average a thin rim into the core",
        )
    return Characterization(
        lesions=results, rois=tuple(roi_entries), qc=tuple(ctx.qc), adc_units_ok=ctx.adc_units_ok
    )


def _note_unmeasured(ctx: _Context) -> None:
    for roi in ctx.measured.rois:
        for role in ctx.roles:
            m = roi.by_role.get(role)
            if m is None:
                ctx.note(
                    QcLevel.WARNING,
                    "roi-not-measured",
                    f"{roi.spec.id} on {role.value}: not sampled on this series",
                )
            elif m.stats is None:
                ctx.note(
                    QcLevel.WARNING,
                    "roi-not-measured",
                    f"{roi.spec.id} on {role.value}: {m.note or 'could not be measured'}",
                )
            elif m.note:
                ctx.note(
                    QcLevel.INFO, "roi-partly-measured", f"{roi.spec.id} on {role.value}: {m.note}"
                )


def _check_homogeneous(ctx: _Context, ref: MeasuredRoi) -> None:
    limit = ctx.rules.thresholds.reference.max_cv
    high = []
    for role in ctx.roles:
        if role in UNGRADED_ROLES:  # not normalized by the reference (fat fraction only)
            continue
        m = ref.by_role.get(role)
        if m is None or m.stats is None or not m.stats.mean > 0:
            continue
        cv = m.stats.sd / m.stats.mean
        if cv > limit:
            high.append(f"{role.value} {cv:.2f}")
    if high:
        ctx.note(
            QcLevel.WARNING,
            "reference-heterogeneous",
            f"reference ROI {ref.spec.id} is not homogeneous: coefficient of variation "
            f"{', '.join(high)} (above {limit:.2f}); check it for partial volume or other tissue",
        )


def _roi_entry(ctx: _Context, roi: MeasuredRoi) -> dict[str, Any]:
    tissue = ctx.rules.tissue(roi.spec.tissue)
    snr: dict[str, float | None] = {}
    medians: dict[str, float | None] = {}
    for role in ctx.roles:
        median = _median(roi.by_role.get(role))
        medians[role.value] = _r(median, 4)
        if median is None:
            continue
        sigma = ctx.measured.noise_sigma.get(role)
        snr[role.value] = _r(median / sigma, 2) if sigma is not None and sigma > 0 else None
    return {
        "id": roi.spec.id,
        "kind": roi.spec.kind.value,
        "site": roi.spec.site,
        "tissue": tissue.name if tissue is not None else roi.spec.tissue,
        "volume_ml": _r(roi.volume_ml, 4),
        "medians": medians,
        "snr": snr,
    }


def _check_control(
    ctx: _Context, control: MeasuredRoi, ref: MeasuredRoi | None
) -> dict[str, Any] | None:
    """Check that a control tissue drops on its suppression pair; record failures in ctx."""
    spec = control.spec
    tissue = ctx.rules.tissue(spec.tissue)
    if tissue is None or tissue.check is None:
        ctx.note(
            QcLevel.INFO,
            "control-not-checked",
            f"control ROI {spec.id}: tissue {spec.tissue!r} has no suppression check in the "
            "lexicon (tissues.toml check = fluid / fat)",
        )
        return None
    kind = tissue.check
    pair = ctx.pairs[kind]
    if pair is None:
        ctx.note(
            QcLevel.INFO,
            "control-not-checked",
            f"control ROI {spec.id} ({tissue.name}): the study has no {kind}-suppression pair",
        )
        return None
    before, normalized = _normalized_median(control, ref, pair[0])
    after, _ = _normalized_median(control, ref, pair[1])
    drop = _drop(before, after)
    minimum = (
        ctx.rules.thresholds.controls.fluid_min_drop_percent
        if kind == "fluid"
        else ctx.rules.thresholds.controls.fat_min_drop_percent
    )
    check: dict[str, Any] = {
        "kind": kind,
        "from": pair[0].value,
        "to": pair[1].value,
        "reference": ref.spec.id if ref is not None and normalized else None,
        "drop_percent": _r(drop, 2),
        "passed": None,
    }
    if drop is None:
        ctx.note(
            QcLevel.WARNING,
            "control-not-measured",
            f"control ROI {spec.id} ({tissue.name}) could not be measured on "
            f"{pair[0].value} and {pair[1].value}: {kind} suppression is not checked",
        )
        return check
    passed = rounded_percent(drop) >= minimum
    check["passed"] = passed
    if not passed:
        ctx.failed.add(kind)
        ctx.note(
            QcLevel.WARNING,
            f"{kind}-suppression-failed",
            f"control ROI {spec.id} ({tissue.name}) dropped {drop:.0f} % from {pair[0].value} to "
            f"{pair[1].value} (expected at least {minimum:.0f} %): {kind} suppression failed in "
            f"this study, so the lesions' {kind}-suppression flags are unreliable",
        )
    return check


def _lesion(ctx: _Context, lesion: MeasuredRoi, ref: MeasuredRoi | None) -> LesionResult:
    rules = ctx.rules
    signal: dict[Role, SignalResult | None] = {}
    ratios: dict[Role, float | None] = {}
    for role in ctx.roles:
        m = lesion.by_role.get(role)
        if m is None or m.stats is None:
            signal[role] = None
            ratios[role] = None
            continue
        if role in UNGRADED_ROLES:
            # Dixon water / fat images give the fat fraction from the lesion's own medians;
            # a ratio to a reference tissue means nothing there (docs/measurements.md).
            signal[role] = SignalResult(stats=m.stats)
            ratios[role] = None
            continue
        ref_median = _median(_measurement(ref, role))
        ratio = _ratio(m.stats.median, ref_median)
        if ref is not None and ref_median is not None and not ref_median > 0:
            ctx.note(
                QcLevel.WARNING,
                "reference-not-positive",
                f"reference ROI {ref.spec.id} has median {ref_median:g} on {role.value}: "
                f"{lesion.spec.id} cannot be normalized there",
            )
        ratios[role] = ratio
        ref_stats = _measurement(ref, role)
        interval = (
            ratio_interval(m.stats, ref_stats.stats, confidence=rules.borderline.confidence)
            if ratio is not None and ref_stats is not None and ref_stats.stats is not None
            else None
        )
        borderline = is_borderline(ratio, rules, interval)
        signal[role] = SignalResult(
            stats=m.stats,
            ratio=ratio,
            grade=grade_of(ratio, rules),
            phrase=grade_phrase(ratio, rules, borderline=bool(borderline)),
            borderline=borderline,
        )

    enhancement = _enhancement(ctx, lesion, ref, ratios)
    suppression = {
        kind: _suppression(ctx, kind, ratios, lesion.spec.id) for kind in ("fluid", "fat")
    }
    flow_void = _flow_void(ctx, lesion, signal)
    if flow_void is True:
        # A flow void holds no signal to compare: its percent changes are noise over noise.
        # It is dark after contrast too (it does not enhance), and suppression is not assessable.
        enhancement = replace(
            enhancement,
            enhancing=False if enhancement.percent is not None else None,
            pattern=EnhancementPattern.NONE if enhancement.percent is not None else None,
        )
        suppression = {
            kind: replace(result, suppressed=None) for kind, result in suppression.items()
        }
        ctx.note(
            QcLevel.INFO,
            "flow-void-not-assessed",
            f"{lesion.spec.id} is a flow void (at the noise floor on every series): its "
            "enhancement and suppression are not assessed from noise",
        )

    fat = suppression["fat"]
    # A borderline grade is unknown to the rules: no rule fires on it alone.
    facts: dict[str, Any] = {
        role.value: (None if s.borderline else s.grade)
        for role, s in signal.items()
        if s is not None
    }
    for kind, result in suppression.items():
        facts[f"{kind}_suppressed"] = result.suppressed if result.reliable else None
    facts["fat_suppression_specific"] = fat.specific if fat.source is not None else None
    facts["enhancing"] = enhancement.enhancing
    facts["pattern"] = enhancement.pattern
    facts["flow_void"] = flow_void
    fam = _family_results(ctx, lesion, ref, signal, ratios)
    facts.update(_family_facts(**fam))
    candidates = [rule for rule in rules.behaviour.values() if rule.matches(facts)]
    ref_tissue = rules.tissue(ref.spec.tissue) if ref is not None else None
    tissue_name = ref_tissue.name if ref_tissue is not None else None
    matched = [rule for rule in candidates if rule.assumes(tissue_name)]
    not_applied = [rule for rule in candidates if not rule.assumes(tissue_name)]
    for rule in not_applied:
        ctx.note(
            QcLevel.INFO,
            "behaviour-other-reference",
            f"{lesion.spec.id}: rule {rule.key} not applied: it assumes a reference of "
            f"{', '.join(rule.references)}, and {lesion.spec.id} is normalized by "
            f"{tissue_name or (ref.spec.tissue if ref is not None else None) or 'no known tissue'}",
        )
    size = _size(lesion)

    return LesionResult(
        id=lesion.spec.id,
        site=lesion.spec.site,
        reference=ref.spec.id if ref is not None else None,
        volume_ml=lesion.volume_ml,
        max_diameter_mm=lesion.max_diameter_mm,
        signal=signal,
        enhancement=enhancement,
        suppression=suppression,
        flow_void=flow_void,
        behaviour=tuple(rule.key for rule in matched),
        behaviour_phrases=tuple(
            BehaviourPhrase(rule.key, rule.phrase, rule.considerations) for rule in matched
        ),
        size=size,
        behaviour_not_applied=tuple(rule.key for rule in not_applied),
        not_applied_phrases=tuple(
            BehaviourPhrase(rule.key, rule.phrase, rule.considerations, rule.references)
            for rule in not_applied
        ),
        **fam,
    )


def _size(lesion: MeasuredRoi) -> dict[str, Any] | None:
    """findings.json ``size``: where the size comes from (``mask`` for an outline, ``roi`` for a
    typed shape, whose size is the ROI's and not the lesion's), volume and axial diameters."""
    if lesion.volume_ml is None and lesion.diameters_mm is None:
        return None
    source = "mask" if lesion.spec.shape is RoiShape.MASK else "roi"
    return {
        "source": source,
        "volume_ml": _r(lesion.volume_ml, 4),
        "diameters_mm": None
        if lesion.diameters_mm is None
        else [round(float(d), 2) for d in lesion.diameters_mm],
    }


def _part_percent(
    lesion: MeasuredRoi, ref: MeasuredRoi | None, pre: Role, post: Role, part: str
) -> float | None:
    """Percent enhancement of the lesion's shell or core, each normalized by the reference."""

    def part_ratio(role: Role) -> float | None:
        m = lesion.by_role.get(role)
        stats = getattr(m, part) if m is not None else None
        return _ratio(stats.median if stats is not None else None, _median(_measurement(ref, role)))

    return _percent_change(part_ratio(post), part_ratio(pre))


def _lesion_pair(
    ctx: _Context,
    kind: str,
    candidates: tuple[tuple[Role, Role], ...],
    ratios: Mapping[Role, float | None],
    lesion_id: str,
) -> tuple[Role, Role] | None:
    """The study's pair for ``kind``, unless this lesion cannot be measured on it (too few
    voxels on a thick series, say) and a later pair of the same kind can: then that one, with
    a qc note. Returns None when the study has no pair at all."""
    pair = ctx.pairs[kind]
    if pair is None or (ratios.get(pair[0]) is not None and ratios.get(pair[1]) is not None):
        return pair
    for other in candidates:
        if (
            other == pair
            or other[0] not in ctx.measured.stacks
            or other[1] not in ctx.measured.stacks
        ):
            continue
        if ratios.get(other[0]) is not None and ratios.get(other[1]) is not None:
            ctx.note(
                QcLevel.INFO,
                "pair-fallback",
                f"{lesion_id}: {kind} from {other[0].value} -> {other[1].value}, since it could "
                f"not be measured on {pair[0].value} -> {pair[1].value}",
            )
            return other
    return pair


def _enhancement(
    ctx: _Context,
    lesion: MeasuredRoi,
    ref: MeasuredRoi | None,
    ratios: Mapping[Role, float | None],
) -> EnhancementResult:
    pair = _lesion_pair(ctx, "enhancement", ENHANCEMENT_PAIRS, ratios, lesion.spec.id)
    if pair is None:
        return EnhancementResult()
    pre, post = pair
    e = ctx.rules.thresholds.enhancement
    percent = _percent_change(ratios.get(post), ratios.get(pre))
    enhancing = None if percent is None else rounded_percent(percent) >= e.enhancing_min_percent
    # The pattern needs voxels small against the rim: of the pairs the study has, use the one
    # whose coarser series has the smallest largest spacing (thick 2D slices average a thin rim
    # into the core); ties keep the pair order.
    stacks = ctx.measured.stacks
    parts = {
        p: (
            _part_percent(lesion, ref, p[0], p[1], "shell"),
            _part_percent(lesion, ref, p[0], p[1], "core"),
        )
        for p in ENHANCEMENT_PAIRS
        if p[0] in stacks and p[1] in stacks
    }
    usable = [p for p, (sh, co) in parts.items() if sh is not None and co is not None]
    pattern_pair = (
        min(usable, key=lambda p: max(*stacks[p[0]].spacing_mm, *stacks[p[1]].spacing_mm))
        if usable
        else pair
    )
    shell, core = parts.get(pattern_pair, (None, None))
    pattern_percent = _percent_change(ratios.get(pattern_pair[1]), ratios.get(pattern_pair[0]))
    pattern_enhancing = (
        None
        if pattern_percent is None
        else rounded_percent(pattern_percent) >= e.enhancing_min_percent
    )
    pattern = None if percent is None else _pattern(shell, core, pattern_enhancing, ctx.rules)
    if percent is not None and pattern is None:
        ctx.note(
            QcLevel.INFO,
            "enhancement-pattern-unknown",
            f"{lesion.spec.id}: too small to split into shell and core; pattern not determined",
        )
    if pattern is not None and pattern_pair != pair:
        ctx.pattern_pairs.setdefault((pair, pattern_pair), []).append(lesion.spec.id)

    raw = None
    basis, reference_percent = "normalized", None
    a, b = stacks[pre], stacks[post]
    if (
        a.scaling_key is not None
        and a.scaling_key == b.scaling_key
        and same_acquisition(a.acquisition, b.acquisition)
    ):
        raw = _percent_change(_median(lesion.by_role.get(post)), _median(lesion.by_role.get(pre)))
        if raw is not None and percent is not None:
            gap = abs(raw - percent)
            if gap > e.raw_tolerance_percent:
                ctx.note(
                    QcLevel.WARNING,
                    "enhancement-normalization-disagrees",
                    f"{lesion.spec.id}: enhancement {percent:.1f} % normalized by the reference "
                    f"but {raw:.1f} % un-normalized ({pre.value} and {post.value} share settings "
                    f"and scaling); they differ by {gap:.1f} points (tolerance "
                    f"{e.raw_tolerance_percent:g}): the reference tissue itself changed; the "
                    "enhancement flag follows the un-normalized percent",
                )
                # Same settings and scaling: the raw change is the trustworthy one.
                basis = "raw"
                enhancing = rounded_percent(raw) >= e.enhancing_min_percent
                reference_percent = _percent_change(
                    _median(_measurement(ref, post)), _median(_measurement(ref, pre))
                )
    return EnhancementResult(
        pre=pre,
        post=post,
        percent=percent,
        enhancing=enhancing,
        pattern=pattern,
        raw_percent=raw,
        shell_percent=shell,
        core_percent=core,
        pattern_pre=pattern_pair[0] if pattern is not None else None,
        pattern_post=pattern_pair[1] if pattern is not None else None,
        basis=basis,
        reference_percent=reference_percent,
    )


def _suppression(
    ctx: _Context, kind: str, ratios: Mapping[Role, float | None], lesion_id: str
) -> SuppressionResult:
    pair = _lesion_pair(ctx, kind, SUPPRESSION_PAIRS[kind], ratios, lesion_id)
    if pair is None:
        return SuppressionResult(kind=kind)
    source, target = pair
    drop = _drop(ratios.get(source), ratios.get(target))
    minimum = ctx.rules.thresholds.suppression.suppressed_min_drop_percent
    return SuppressionResult(
        kind=kind,
        source=source,
        target=target,
        drop_percent=drop,
        suppressed=None if drop is None else rounded_percent(drop) >= minimum,
        reliable=kind not in ctx.failed,
        specific=not (kind == "fat" and target is Role.STIR),
    )


def _flow_void(
    ctx: _Context, lesion: MeasuredRoi, signal: Mapping[Role, SignalResult | None]
) -> bool | None:
    """Dark on every measured series and near the noise floor (docs/usage.md, findings.json ``flow_void``).

    Series where the lesion has no ratio do not count; at least ``[flow_void] min_series``
    must, else the answer is None (not assessed: nothing is said about what was not measured). The noise criterion (median <= noise_factor x sigma sqrt(pi/2), the Rayleigh mean of
    the background, Gudbjartsson & Patz 1995) must hold on every counted series with a noise
    estimate, and at least one must have one.
    """
    t = ctx.rules.thresholds.flow_void
    counted = [(role, s) for role, s in signal.items() if s is not None and s.ratio is not None]
    if len(counted) < t.min_series:
        return None
    if not all(rounded_ratio(s.ratio) <= t.max_ratio for _, s in counted):  # type: ignore[arg-type]
        return False
    checked = 0
    for role, s in counted:
        sigma = ctx.measured.noise_sigma.get(role)
        if sigma is None or not sigma > 0:
            continue
        checked += 1
        if s.stats.median > t.noise_factor * sigma * math.sqrt(math.pi / 2.0):
            return False
    if checked == 0:
        ctx.note(
            QcLevel.INFO,
            "flow-void-unverified",
            f"{lesion.spec.id} is dark on every series, but no series has a noise estimate to "
            "tell a flow void from merely dark tissue",
        )
        return False
    return True


# --------------------------------------------------------------------------------------------
# Other sequence families: diffusion, susceptibility, chemical shift, dynamic contrast
# (docs/measurements.md, "Other sequence families"; the numbers in sigreport.measure.families)


def _check_adc_units(
    ctx: _Context, references: list[MeasuredRoi], controls: list[MeasuredRoi]
) -> None:
    """``series[].adc_units_ok``: every reference or control ROI whose tissue has an expected
    ADC (families.toml ``[adc.expected]``) must lie in its range on the ADC map; a map in other
    units, or whose vendor scaling was not applied, fails (a qc warning)."""
    if Role.ADC not in ctx.measured.stacks:
        return
    checked: list[tuple[MeasuredRoi, str, float, bool]] = []
    for roi in (*references, *controls):
        value = _median(roi.by_role.get(Role.ADC))
        tissue = ctx.rules.tissue(roi.spec.tissue)
        name = tissue.name if tissue is not None else roi.spec.tissue
        ok = adc_units_ok(name, value, ctx.families)
        if ok is not None and value is not None and name is not None:
            checked.append((roi, name, value, ok))
    stack = ctx.measured.stacks[Role.ADC]
    series = f"series {stack.series_number}" if stack.series_number is not None else "the map"
    if not checked:
        ctx.note(
            QcLevel.INFO,
            "adc-units-unchecked",
            f"ADC ({series}): no reference or control ROI of a tissue with an expected ADC "
            "(families.toml [adc.expected]), so the map's scaling is not checked; ADC values "
            "are reported as stored",
        )
        return
    ctx.adc_units_ok = all(ok for *_, ok in checked)
    ranges = ctx.families.adc_expected or {}
    for roi, name, value, ok in checked:
        if ok:
            continue
        low, high = ranges[name.lower()]
        ctx.note(
            QcLevel.WARNING,
            "adc-units-implausible",
            f"{roi.spec.id}: ADC ({series}) of {name} is {value:g}, outside its expected "
            f"{low:g}-{high:g} x 10^-6 mm^2/s: the map's scaling is implausible (a vendor "
            "scale not applied, or other units); lesion ADC values are not reported, their "
            "ratios are",
        )


def _check_family_pairs(ctx: _Context) -> None:
    """A qc warning ``pair-mismatched`` for an in/opposed-phase pair or a dynamic pre/phase pair
    whose series are of different sequence types or timing (docs/measurements.md, pairs)."""
    stacks = ctx.measured.stacks
    limit = ctx.families.pair_max_timing_difference
    pairs: list[tuple[str, Stack, Stack, bool]] = []
    if Role.IP in stacks and Role.OP in stacks:
        pairs.append(("chemical_shift", stacks[Role.IP], stacks[Role.OP], False))
    post = _dynamic_role(ctx)
    if post is not None and PRE_CONTRAST_OF[post] in stacks:
        pairs.append(("dynamic", stacks[PRE_CONTRAST_OF[post]], ctx.measured.phases[post][0], True))
    for name, a, b, echo in pairs:
        why = pair_mismatch(
            a.acquisition, b.acquisition, max_difference=limit, compare_echo_time=echo
        )
        if why is None:
            continue
        ctx.mismatched[name] = why
        ctx.note(
            QcLevel.WARNING,
            "pair-mismatched",
            f"{name.replace('_', ' ')}: {a.role.value} (series {a.series_number}) and "
            f"{b.role.value} (series {b.series_number}) differ ({why}); the lesions' "
            f"{name.replace('_', ' ')} flags are marked unreliable",
        )


def _dynamic_role(ctx: _Context) -> Role | None:
    """The post-contrast role whose phases give the dynamic curve (T1POST first)."""
    return next((r for r in PRE_CONTRAST_OF if len(ctx.measured.phases.get(r, ())) >= 2), None)


def _core_ratio(lesion: MeasuredRoi, ref: MeasuredRoi | None, role: Role) -> float | None:
    m = lesion.by_role.get(role)
    core = m.core if m is not None else None
    return _ratio(core.median if core is not None else None, _median(_measurement(ref, role)))


def _family_results(
    ctx: _Context,
    lesion: MeasuredRoi,
    ref: MeasuredRoi | None,
    signal: Mapping[Role, SignalResult | None],
    ratios: Mapping[Role, float | None],
) -> dict[str, Any]:
    """The lesion's ``diffusion``, ``susceptibility``, ``chemical_shift`` and ``dynamic``."""
    th = ctx.families
    stacks = ctx.measured.stacks
    grades = {role: (s.grade if s is not None else None) for role, s in signal.items()}
    out: dict[str, Any] = {}

    diffusion = None
    if Role.DWI in stacks and Role.ADC in stacks:
        adc = signal.get(Role.ADC)
        value = adc.stats.median if adc is not None and ctx.adc_units_ok is not False else None
        diffusion = diffusion_of(
            grades.get(Role.DWI),
            grades.get(Role.ADC),
            dwi_ratio=ratios.get(Role.DWI),
            adc_ratio=ratios.get(Role.ADC),
            adc_value=value,
            b_value=stacks[Role.DWI].acquisition.b_value,
        )
    out["diffusion"] = diffusion

    out["susceptibility"] = susceptibility_of(ratios, grades, th)

    has_pair = Role.IP in stacks and Role.OP in stacks
    ip, op = ratios.get(Role.IP), ratios.get(Role.OP)
    if has_pair and th.chemical_shift_use_core:
        core_ip, core_op = _core_ratio(lesion, ref, Role.IP), _core_ratio(lesion, ref, Role.OP)
        if core_ip is not None and core_op is not None:
            ip, op = core_ip, core_op
        elif ip is not None and op is not None:
            ctx.note(
                QcLevel.INFO,
                "chemical-shift-whole-roi",
                f"{lesion.spec.id}: too small to split into shell and core; the in- to "
                "opposed-phase drop is measured on the whole ROI (a fat-water border's dark "
                "line may lower it)",
            )
    water = _median(lesion.by_role.get(Role.WATER))
    fat = _median(lesion.by_role.get(Role.FAT))
    out["chemical_shift"] = chemical_shift_of(
        ip,
        op,
        water_median=water,
        fat_median=fat,
        has_pair=has_pair,
        has_dixon=Role.WATER in stacks and Role.FAT in stacks,
        thresholds=th,
        reliable="chemical_shift" not in ctx.mismatched,
    )

    dynamic = None
    post = _dynamic_role(ctx)
    if post is not None and PRE_CONTRAST_OF[post] in stacks:
        phases = []
        for stack in ctx.measured.phases[post]:
            own = _median(lesion.by_phase.get(stack.key))
            base = _median(ref.by_phase.get(stack.key)) if ref is not None else None
            phases.append(
                PhaseInput(
                    series_number=stack.series_number,
                    time_s=stack.acquisition.acquisition_time_s,
                    temporal_position=stack.acquisition.temporal_position,
                    ratio=_ratio(own, base),
                )
            )
        dynamic = dynamic_of(
            PRE_CONTRAST_OF[post],
            ratios.get(PRE_CONTRAST_OF[post]),
            phases,
            th,
            min_peak_percent=ctx.rules.thresholds.enhancement.enhancing_min_percent,
        )
        if dynamic is not None and "dynamic" in ctx.mismatched:
            dynamic = replace(dynamic, reliable=False)
    out["dynamic"] = dynamic
    return out


def _family_facts(
    diffusion: DiffusionResult | None,
    susceptibility: SusceptibilityResult | None,
    chemical_shift: ChemicalShiftResult | None,
    dynamic: DynamicResult | None,
) -> dict[str, Any]:
    """The behaviour rules' facts from the other sequence families; an unreliable flag (a
    mismatched pair) is unknown."""
    facts: dict[str, Any] = {}
    if diffusion is not None:
        facts["restricted"] = diffusion.restricted
        facts["shine_through"] = diffusion.shine_through
    if susceptibility is not None:
        facts["blooming"] = susceptibility.blooming if susceptibility.reliable else None
    if chemical_shift is not None:
        facts["microscopic_fat"] = (
            chemical_shift.microscopic_fat if chemical_shift.reliable else None
        )
    if dynamic is not None:
        facts["curve"] = dynamic.curve if dynamic.reliable else None
    return facts

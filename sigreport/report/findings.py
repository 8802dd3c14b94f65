"""The findings.json object (docs/usage.md, docs/findings.schema.json) from the job's stages, and
the words the report renders for each lesion.

``build_findings`` assembles what the stages concluded into the object findings.json holds;
nothing is measured or decided here. The report renders the wording characterization chose
(:class:`sigreport.model.LesionPhrases`, from :func:`lesion_phrases`); a findings.json read back
from disk, without its characterization, gets the same words from the lexicon through
:func:`phrases_from_findings`.
"""

from __future__ import annotations

import datetime as _dt
from collections.abc import Mapping, Sequence
from typing import Any

from sigreport import __version__
from sigreport.measure.characterize import Characterization
from sigreport.measure.rules import Rules, grade_phrase
from sigreport.model import (
    PRE_CONTRAST_OF,
    Alignment,
    BehaviourPhrase,
    LesionPhrases,
    QcLevel,
    QcNote,
    Role,
    Stack,
    StudyIndex,
)

#: The ``schema`` value of findings.json.
FINDINGS_SCHEMA = "sigreport-findings/2"

__all__ = [
    "FINDINGS_SCHEMA",
    "build_findings",
    "dedupe_qc",
    "lesion_phrases",
    "phrases_from_findings",
]


def build_findings(
    index: StudyIndex,
    measured: Mapping[Role, Stack],
    alignments: Mapping[Role, Alignment],
    anchor_role: Role,
    result: Characterization,
    qc: Sequence[QcNote],
    *,
    cautions: Sequence[str],
    phase_alignments: Mapping[str, Alignment] | None = None,
) -> dict[str, Any]:
    """The findings.json object (schema ``sigreport-findings/2``, docs/findings.schema.json;
    what changed from /1 is in docs/CHANGES.md).

    Parameters
    ----------
    index
        The study index, role overrides applied; every stack is listed under ``series``.
    measured
        The stack measured for each role.
    alignments
        Each measured role's alignment to the anchor.
    anchor_role
        The role whose series the ROIs are placed on.
    result
        The characterization (lesions, reference and control ROIs).
    qc
        Every stage's notes, in the order they were made; duplicates are dropped and warnings
        put first (:func:`dedupe_qc`).
    cautions
        The cautions every report carries (the lexicon's ``cautions.toml``).
    phase_alignments
        The alignment of each dynamic phase that is not its role's measured stack, keyed by
        ``Stack.key``: those phases are measured (for ``dynamic``) and listed so.
    """
    measured_keys = {s.key: r for r, s in measured.items()}
    phase_alignments = phase_alignments or {}
    series = []
    for stack in sorted(index.stacks, key=lambda s: (s.series_number or 0, s.stack or "")):
        role = measured_keys.get(stack.key)
        entry: dict[str, Any] = {
            "role": stack.role.value,
            "series_instance_uid": stack.series_instance_uid,
            "series_number": stack.series_number,
            "stack": stack.stack,
            "description": stack.description,
            "role_reason": stack.role_reason,
            "confidence": None if stack.confidence is None else round(float(stack.confidence), 3),
            "measured": role is not None,
        }
        if role is not None:
            entry["alignment"] = alignments[role].to_json()
            entry["anchor"] = role is anchor_role
        elif stack.key in phase_alignments:
            # Measured for the dynamic curve only: the role's signal is another phase's.
            entry["measured"] = True
            entry["alignment"] = phase_alignments[stack.key].to_json()
            entry["anchor"] = False
            entry["in_signal"] = False
        entry.update(
            _family_series_fields(stack, result.adc_units_ok if role is Role.ADC else None)
        )
        series.append(entry)
    study = index.study
    return {
        "schema": FINDINGS_SCHEMA,
        "tool": {"name": "sigreport", "version": __version__},
        "generated": _dt.datetime.now(_dt.UTC).replace(microsecond=0).isoformat(),
        "study": {
            "study_instance_uid": study.study_instance_uid,
            "study_date": study.study_date,
            "accession_number": study.accession_number,
            # For the human reports' header; the de-identified export removes them.
            "patient_name": study.patient_name,
            "patient_id": study.patient_id,
            "birth_date": study.patient_birth_date,
            "sex": study.patient_sex,
        },
        "series": series,
        "rois": [dict(r) for r in result.rois],
        "lesions": [lesion.to_json() for lesion in result.lesions],
        "qc": [note.to_json() for note in dedupe_qc(qc)],
        "cautions": list(cautions),
    }


def _family_series_fields(stack: Stack, adc_units_ok: bool | None) -> dict[str, Any]:
    """``phase`` and ``delay_s`` of a post-contrast series, ``b_value`` of a DWI series,
    ``adc_units_ok`` of the measured ADC map (docs/findings.schema.json, series)."""
    out: dict[str, Any] = {}
    if stack.role in PRE_CONTRAST_OF:
        out["phase"] = stack.dynamic_phase
        out["delay_s"] = None if stack.dynamic_delay_s is None else round(stack.dynamic_delay_s, 1)
    elif stack.role is Role.DWI:
        b = stack.acquisition.b_value
        out["b_value"] = None if b is None else round(float(b), 1)
    elif stack.role is Role.ADC:
        out["adc_units_ok"] = adc_units_ok
    return out


def dedupe_qc(notes: Sequence[QcNote]) -> list[QcNote]:
    """``notes`` without repeats, warnings (and errors) first, otherwise in the given order."""
    seen: set[QcNote] = set()
    out = []
    for note in notes:
        if note not in seen:
            seen.add(note)
            out.append(note)
    # Warnings first, so that they are the first thing a reader sees.
    order = {QcLevel.ERROR: 0, QcLevel.WARNING: 1, QcLevel.INFO: 2}
    return sorted(out, key=lambda n: order[n.level])


def lesion_phrases(result: Characterization) -> dict[str, LesionPhrases]:
    """Lesion id -> the words characterization chose for it."""
    return {lesion.id: lesion.phrases() for lesion in result.lesions}


def phrases_from_findings(findings: Mapping[str, Any], rules: Rules) -> dict[str, LesionPhrases]:
    """The words of each lesion of a findings.json read back without its characterization:
    the graded wording of each stored ratio and the phrase of each behaviour key, from the same
    lexicon functions characterization uses (:func:`sigreport.measure.grade_phrase`, the
    behaviour rules). Keys the lexicon does not know are left out (the report then reads the
    key itself)."""
    out: dict[str, LesionPhrases] = {}
    for lesion in findings.get("lesions", []):
        grades: dict[str, str] = {}
        for role, stats in (lesion.get("signal") or {}).items():
            ratio = None if stats is None else stats.get("ratio")
            borderline = bool(stats.get("borderline")) if stats is not None else False
            phrase = (
                grade_phrase(float(ratio), rules, borderline=borderline)
                if ratio is not None
                else None
            )
            if phrase is not None:
                grades[str(role)] = phrase
        behaviour = []
        for key in lesion.get("behaviour") or []:
            rule = rules.behaviour.get(str(key))
            if rule is not None:
                behaviour.append(BehaviourPhrase(rule.key, rule.phrase, rule.considerations))
        not_applied = []
        for key in lesion.get("behaviour_not_applied") or []:
            rule = rules.behaviour.get(str(key))
            if rule is not None:
                not_applied.append(
                    BehaviourPhrase(rule.key, rule.phrase, rule.considerations, rule.references)
                )
        out[str(lesion.get("id"))] = LesionPhrases(
            grades=grades, behaviour=tuple(behaviour), not_applied=tuple(not_applied)
        )
    return out

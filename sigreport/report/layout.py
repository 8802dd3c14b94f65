"""The reading-room layout of report.html: the header block, the summary table (one row per
lesion, one column per series role), the reference and control ROIs, and the series table with
how far each series moved (docs/outputs.md, report.html).

Everything here is plain strings built from findings.json values; the HTML template escapes
them. Numbers are formatted once, here, so that no cell reads ``-0 %`` or ``None``.
"""

from __future__ import annotations

import datetime as _dt
import math
from collections.abc import Mapping, Sequence
from typing import Any

from sigreport.model import LesionPhrases, role_sort_key
from sigreport.report.tables import roi_medians, series_by_role

__all__ = [
    "alignment_moved",
    "dicom_date",
    "header_block",
    "percent",
    "person_name",
    "roi_blocks",
    "series_rows",
    "summary_table",
]

NOT_GIVEN = "not given"
NOT_ASSESSED = "not assessed"

# DICOM PS3.3 C.7.1.1 Patient's Sex (0010,0040): M, F or O.
_SEX = {"M": "male", "F": "female", "O": "other"}


def percent(value: Any, *, signed: bool = True) -> str:
    """A percentage rounded to a whole number, "+84 %" / "-11 %" / "0 %" (never "-0 %": a value
    that rounds to zero has no sign); "" for a missing or non-finite value."""
    if value is None or not math.isfinite(float(value)):
        return ""
    rounded = round(float(value))
    if rounded == 0:
        return "0 %"
    return f"{rounded:+d} %" if signed else f"{rounded:d} %"


def number(value: Any, digits: int) -> str:
    """``value`` with ``digits`` decimals ("" when missing); a value that rounds to zero is
    written without a sign."""
    if value is None or not math.isfinite(float(value)):
        return ""
    text = f"{float(value):.{digits}f}"
    return text[1:] if text.startswith("-") and float(text) == 0 else text


def dicom_date(value: Any) -> tuple[str, str]:
    """(shown, ISO 8601) of a DICOM DA value ``YYYYMMDD`` (PS3.5 6.2): shown as "1 Dec 2026",
    day, abbreviated month and year, which no locale reads as another date (unlike 01/12/2026).
    A value that is not a valid DA is shown as it is, with no ISO form."""
    text = "" if value is None else str(value).strip()
    try:
        day = _dt.datetime.strptime(text, "%Y%m%d").date()
    except ValueError:
        return text, ""
    return f"{day.day} {day.strftime('%b')} {day.year}", day.isoformat()


def person_name(value: Any) -> str:
    """A DICOM PN value (PS3.5 6.2.1: family^given^middle^prefix^suffix) as "FAMILY, Given
    Middle"; only the first (alphabetic) component group is shown."""
    text = "" if value is None else str(value).split("=")[0]
    parts = [p.strip() for p in text.split("^")]
    family = parts[0] if parts else ""
    rest = " ".join(p for p in parts[1:3] if p)
    if family and rest:
        return f"{family}, {rest}"
    return family or rest


def header_block(findings: Mapping[str, Any]) -> list[dict[str, str]]:
    """The header block's rows: patient name, ID, birth date, sex, accession number, study
    date and the series measured; each ``{"label", "value", "iso"}`` (``iso`` is the ISO 8601
    form of a date, else ""). A value the study does not give reads "not given"."""
    study = findings.get("study") or {}
    birth, birth_iso = dicom_date(study.get("birth_date"))
    date, date_iso = dicom_date(study.get("study_date"))
    sex = str(study.get("sex") or "").strip().upper()
    used = []
    for entry in sorted(
        (e for e in findings.get("series", []) if e.get("measured")),
        key=lambda e: (role_sort_key(str(e.get("role"))), e.get("series_number") or 0),
    ):
        number_ = entry.get("series_number")
        used.append(f"{entry.get('role')}" + ("" if number_ is None else f" (series {number_})"))
    rows = [
        ("Patient", person_name(study.get("patient_name")), ""),
        ("Patient ID", str(study.get("patient_id") or ""), ""),
        ("Birth date", birth, birth_iso),
        ("Sex", _SEX.get(sex, sex), ""),
        ("Accession", str(study.get("accession_number") or ""), ""),
        ("Study date", date, date_iso),
        ("Series used", ", ".join(used), ""),
    ]
    return [{"label": k, "value": v or NOT_GIVEN, "iso": iso} for k, v, iso in rows]


def _graded(stats: Mapping[str, Any] | None, role: str, phrases: LesionPhrases) -> tuple[str, str]:
    """(words, grade class) of one lesion on one role."""
    if stats is None or stats.get("ratio") is None:
        return NOT_ASSESSED, "unmeasured"
    phrase = phrases.grades.get(role)
    if phrase:  # characterization's wording already says "borderline" where it applies
        return str(phrase), str(stats.get("grade") or "")
    words = str(stats.get("grade") or "")
    if stats.get("borderline"):
        words += " (borderline)"
    return words, str(stats.get("grade") or "")


def summary_table(
    findings: Mapping[str, Any], phrases: Mapping[str, LesionPhrases]
) -> dict[str, Any]:
    """The summary table: ``roles`` (the columns, reading order, every role any lesion has) and
    ``rows``, one per lesion: id, site, reference tissue, one cell per role (graded words with
    "mildly" / "markedly" as characterization chose them, and the ratio), enhancement and drops.

    A pair the study has whose value is missing reads "not assessed"; a pair the study lacks is
    an empty cell."""
    lesions = list(findings.get("lesions", []))
    roles = sorted(
        {r for lesion in lesions for r in (lesion.get("signal") or {})}, key=role_sort_key
    )
    tissues = {
        str(r.get("id")): str(r.get("tissue") or r.get("id")) for r in findings.get("rois", [])
    }
    rows = []
    for lesion in lesions:
        lesion_id = str(lesion.get("id"))
        own = phrases.get(lesion_id, LesionPhrases())
        signal: Mapping[str, Any] = lesion.get("signal") or {}
        cells = []
        for role in roles:
            if role not in signal:
                cells.append({"words": "", "grade": "", "ratio": ""})
                continue
            stats = signal[role]
            words, grade = _graded(stats, role, own)
            ratio = "" if stats is None else number(stats.get("ratio"), 2)
            cells.append({"words": words, "grade": grade, "ratio": ratio})
        rows.append(
            {
                "id": lesion_id,
                "site": str(lesion.get("site") or ""),
                "reference": tissues.get(
                    str(lesion.get("reference")), str(lesion.get("reference") or "")
                ),
                "cells": cells,
                "enhancement": _enhancement_cell(
                    lesion.get("enhancement") or {}, flow_void=lesion.get("flow_void") is True
                ),
                "drops": _drop_cells(
                    lesion.get("suppression") or {}, flow_void=lesion.get("flow_void") is True
                ),
            }
        )
    return {"roles": roles, "rows": rows}


def _enhancement_cell(enhancement: Mapping[str, Any], *, flow_void: bool) -> dict[str, str]:
    """A flow void holds only noise: its percent changes are not findings (not assessed), as in
    the text and table.csv."""
    if not enhancement or not (enhancement.get("pre") or enhancement.get("post")):
        return {"value": "", "words": ""}
    value = enhancement.get("percent")
    if value is None or flow_void:
        return {"value": "", "words": NOT_ASSESSED}
    if enhancement.get("enhancing"):
        pattern = enhancement.get("pattern")
        words = "enhancing" + (f" ({pattern})" if pattern not in (None, "none") else "")
    elif enhancement.get("enhancing") is False:
        words = "not enhancing"
    else:
        words = ""
    return {"value": percent(value), "words": words}


def _drop_cells(suppression: Mapping[str, Any], *, flow_void: bool) -> list[dict[str, str]]:
    out = []
    for kind in ("fluid", "fat"):
        flag = suppression.get(kind)
        if not flag:
            continue
        drop = flag.get("drop_percent")
        if drop is None or flow_void:
            out.append({"kind": kind, "value": "", "words": NOT_ASSESSED})
            continue
        words = ""
        if flag.get("suppressed") is not None:
            words = "suppressed" if flag["suppressed"] else "not suppressed"
        if flag.get("reliable") is False:
            words += ", unreliable" if words else "unreliable"
        out.append({"kind": kind, "value": percent(drop, signed=False), "words": words})
    return out


def roi_blocks(
    findings: Mapping[str, Any],
    images: Mapping[str, Sequence[Mapping[str, Any]]],
) -> list[dict[str, Any]]:
    """The reference and control ROIs as the page shows them: id, kind, site, tissue, volume,
    the per-series medians (:func:`~sigreport.report.tables.roi_medians`, findings schema 2) and
    signal-to-noise, the control check's result, and the ROI's key image entries."""
    out = []
    for roi in findings.get("rois", []):
        roi_id = str(roi.get("id"))
        medians = roi_medians(roi)
        snr = roi.get("snr") or {}
        per_role = []
        for role in sorted(set(medians) | set(snr), key=role_sort_key):
            per_role.append(
                {
                    "role": str(role),
                    "median": number(medians.get(role), 1) or ("n/a" if role in medians else ""),
                    "snr": number(snr.get(role), 1),
                }
            )
        check = roi.get("check")
        result = ""
        if isinstance(check, Mapping):
            drop = percent(check.get("drop_percent"), signed=False)
            passed = check.get("passed")
            verdict = "passed" if passed else ("failed" if passed is False else NOT_ASSESSED)
            result = (
                f"{check.get('kind')} suppression {check.get('from')} \u2192 {check.get('to')}: "
                + (f"drop {drop}, " if drop else "")
                + verdict
            )
        out.append(
            {
                "id": roi_id,
                "kind": str(roi.get("kind") or ""),
                "site": str(roi.get("site") or ""),
                "tissue": str(roi.get("tissue") or ""),
                "volume": number(roi.get("volume_ml"), 2),
                "per_role": per_role,
                "check": result,
                "passed": check.get("passed") if isinstance(check, Mapping) else None,
                "images": list(images.get(roi_id, ())),
            }
        )
    return out


def alignment_moved(alignment: Mapping[str, Any]) -> str:
    """How far a series moved to meet the anchor: the translation's length in mm, the rotation
    in degrees and, when findings carry it (schema 2), the largest displacement of the ROI
    box corners: "1.2 mm, 0.8°; corners up to 2.1 mm". The anchor itself reads "anchor"."""
    if not alignment:
        return ""
    method = str(alignment.get("method") or "")
    translation = alignment.get("translation_mm") or [0.0, 0.0, 0.0]
    length = math.sqrt(sum(float(v) ** 2 for v in translation))
    rotation = float(alignment.get("rotation_deg") or 0.0)
    # No-break spaces keep each number with its unit; the cell may wrap between the parts.
    text = f"{number(length, 1)}\u00a0mm, {number(rotation, 1)}\u00b0"
    displacement = alignment.get("displacement_mm")
    if displacement is not None:
        text += f"; corners up to {number(displacement, 1)}\u00a0mm"
    if method == "identity":
        return "none (" + text + ")"
    return text


def series_rows(findings: Mapping[str, Any]) -> list[dict[str, str]]:
    """The series table: role, series number, description, measured, alignment method, how far
    the series moved (:func:`alignment_moved`) and why it has its role."""
    by_role = series_by_role(findings)
    rows = []
    for entry in sorted(
        findings.get("series", []),
        key=lambda e: (role_sort_key(str(e.get("role"))), e.get("series_number") or 0),
    ):
        alignment = entry.get("alignment") or {}
        role = str(entry.get("role"))
        measured = entry.get("measured", by_role.get(role) is entry)
        method = str(alignment.get("method", ""))
        if entry.get("anchor"):
            method = "anchor"
        rows.append(
            {
                "role": role,
                "series_number": ""
                if entry.get("series_number") is None
                else str(entry["series_number"]),
                "description": str(entry.get("description") or ""),
                "measured": "yes" if measured else "no",
                "alignment": method,
                "moved": "" if entry.get("anchor") else alignment_moved(alignment),
                "reason": str(entry.get("role_reason") or ""),
            }
        )
    return rows

"""Interval change: each lesion of the current study against the same lesion on a prior study.

A pure function of two findings objects (``findings.json``, docs/findings.schema.json): lesions
are matched by ROI id, never by position, because each study's ROIs live in that study's own
patient space (the two anchors may differ). What may be compared, and why (docs/measurements.md,
"Interval change"):

- the interval in days, from the two StudyDate values (DICOM DA, PS3.5 6.2: ``YYYYMMDD``);
- the volume, only when both ROIs are outlines (a mask, SEG, RTSTRUCT or a grown seed): a typed
  sphere or box is the size the reader typed, not the lesion's;
- each series role's ratio, only when both lesions were normalized by the same reference tissue
  (a ratio to white matter and a ratio to muscle are different quantities);
- enhancement, in percentage points, only with the same pre/post pair and reference tissue.

Whatever cannot be compared is ``None`` with the reason in ``qc``, naming the lesion.
"""

from __future__ import annotations

import datetime as _dt
from collections.abc import Collection, Mapping
from dataclasses import dataclass, field
from typing import Any

from sigreport.model import QcLevel, QcNote

# findings.json lesions[].size.source values that are outlines (schema sigreport-findings/2).
OUTLINE_SOURCES = frozenset({"mask", "grown"})
MATCHED = "matched"
NEW = "new"


@dataclass(frozen=True)
class IntervalChange:
    """The comparison of a study with its prior.

    ``lesions`` maps each current lesion id to its ``change`` object; ``not_seen`` lists the
    prior's lesions (``{"id", "site"}``) that the current study does not have.
    """

    prior_study_date: str | None
    prior_study_instance_uid: str | None
    interval_days: int | None
    lesions: dict[str, dict[str, Any]]
    not_seen: list[dict[str, Any]]
    qc: list[QcNote] = field(default_factory=list)

    def prior_json(self) -> dict[str, Any]:
        """The findings' top-level ``prior`` object."""
        return {
            "study_instance_uid": self.prior_study_instance_uid,
            "study_date": self.prior_study_date,
            "interval_days": self.interval_days,
            "not_seen": [dict(item) for item in self.not_seen],
        }


def study_date(value: Any) -> _dt.date | None:
    """A DICOM DA value (``YYYYMMDD``, PS3.5 6.2) as a date; ``None`` when absent or invalid."""
    if not isinstance(value, str):
        return None
    text = value.strip()
    if len(text) != 8 or not text.isdigit():
        return None
    try:
        return _dt.date(int(text[:4]), int(text[4:6]), int(text[6:]))
    except ValueError:
        return None


def is_outline(lesion: Mapping[str, Any], outlined: Collection[str] | None = None) -> bool:
    """Whether the lesion's size comes from an outline: ``size.source`` when findings carry it
    (schema /2), else membership of its id in ``outlined`` (the case file's mask ROIs)."""
    size = lesion.get("size")
    if isinstance(size, Mapping) and size.get("source") is not None:
        return str(size["source"]) in OUTLINE_SOURCES
    return outlined is not None and str(lesion.get("id")) in outlined


def lesion_volume_ml(lesion: Mapping[str, Any]) -> float | None:
    """The lesion's volume in ml: ``size.volume_ml`` (schema /2), else ``volume_ml``."""
    size = lesion.get("size")
    value = size.get("volume_ml") if isinstance(size, Mapping) else None
    if value is None:
        value = lesion.get("volume_ml")
    return None if value is None else float(value)


def reference_tissue(lesion: Mapping[str, Any], findings: Mapping[str, Any]) -> str | None:
    """The tissue of the lesion's reference ROI, compared case-insensitively; ``None`` when the
    reference or its tissue is unknown."""
    ref = lesion.get("reference")
    for roi in findings.get("rois", []):
        if roi.get("id") == ref and roi.get("tissue"):
            return " ".join(str(roi["tissue"]).lower().split())
    return None


def interval_change(
    current: Mapping[str, Any],
    prior: Mapping[str, Any],
    *,
    current_outlined: Collection[str] | None = None,
    prior_outlined: Collection[str] | None = None,
    digits: int = 1,
    ratio_digits: int = 3,
) -> IntervalChange:
    """Compare each lesion of ``current`` with the lesion of the same id in ``prior``.

    Parameters
    ----------
    current, prior
        Two findings objects (docs/findings.schema.json).
    current_outlined, prior_outlined
        Ids of lesions whose ROI is an outline, used when a lesion carries no ``size.source``.
    digits
        Decimals of the volume change percent and the enhancement change (percentage points).
    ratio_digits
        Decimals of each ratio change.

    Returns
    -------
    IntervalChange
        Per current lesion, ``{"status": "matched" | "new", "prior_study_date",
        "interval_days", "volume_change_percent", "ratio_change": {ROLE: delta},
        "enhancement_change_pp", "enhancing_before"}``; ``None`` where a comparison is not
        meaningful, the reason in ``qc``.
    """
    qc: list[QcNote] = []
    prior_study = prior.get("study") or {}
    current_study = current.get("study") or {}
    prior_date_text = prior_study.get("study_date")
    before, now = study_date(prior_date_text), study_date(current_study.get("study_date"))
    days: int | None = None
    if before is None or now is None:
        qc.append(
            QcNote(
                QcLevel.WARNING,
                "interval-unknown",
                "the interval to the prior study is unknown: study date "
                f"{current_study.get('study_date')!r} now, {prior_date_text!r} on the prior",
            )
        )
    else:
        days = (now - before).days
        if days < 0:
            qc.append(
                QcNote(
                    QcLevel.WARNING,
                    "prior-after-current",
                    f"the prior study ({prior_date_text}) is dated {-days} days after this one; "
                    "check that the studies were given in the right order",
                )
            )
    if prior_study.get("study_instance_uid") is not None and prior_study.get(
        "study_instance_uid"
    ) == current_study.get("study_instance_uid"):
        qc.append(
            QcNote(
                QcLevel.WARNING,
                "prior-same-study",
                "the prior has the same Study Instance UID as this study",
            )
        )

    prior_lesions = {str(p.get("id")): p for p in prior.get("lesions", [])}
    current_ids = {str(c.get("id")) for c in current.get("lesions", [])}
    changes: dict[str, dict[str, Any]] = {}
    for lesion in current.get("lesions", []):
        lesion_id = str(lesion.get("id"))
        entry: dict[str, Any] = {
            "status": NEW,
            "prior_study_date": prior_date_text,
            "interval_days": days,
            "volume_change_percent": None,
            "ratio_change": {},
            "enhancement_change_pp": None,
            "enhancing_before": None,
        }
        changes[lesion_id] = entry
        old = prior_lesions.get(lesion_id)
        if old is None:
            continue
        entry["status"] = MATCHED
        entry["volume_change_percent"] = _volume_change(
            lesion, old, current_outlined, prior_outlined, digits, qc
        )
        tissue_now, tissue_before = reference_tissue(lesion, current), reference_tissue(old, prior)
        same_reference = tissue_now is not None and tissue_now == tissue_before
        if not same_reference:
            qc.append(
                QcNote(
                    QcLevel.WARNING,
                    "change-reference-differs",
                    f"{lesion_id}: normalized by {tissue_now or 'an unknown tissue'} now and by "
                    f"{tissue_before or 'an unknown tissue'} on the prior; ratios and "
                    "enhancement are not compared",
                )
            )
        else:
            entry["ratio_change"] = _ratio_change(lesion, old, ratio_digits)
        old_enh = old.get("enhancement") or {}
        entry["enhancing_before"] = old_enh.get("enhancing")
        if same_reference:
            entry["enhancement_change_pp"] = _enhancement_change(
                lesion_id, lesion.get("enhancement") or {}, old_enh, digits, qc
            )
    not_seen = [
        {"id": lesion_id, "site": old.get("site")}
        for lesion_id, old in prior_lesions.items()
        if lesion_id not in current_ids
    ]
    return IntervalChange(
        prior_study_date=prior_date_text,
        prior_study_instance_uid=prior_study.get("study_instance_uid"),
        interval_days=days,
        lesions=changes,
        not_seen=not_seen,
        qc=qc,
    )


def _volume_change(
    lesion: Mapping[str, Any],
    old: Mapping[str, Any],
    current_outlined: Collection[str] | None,
    prior_outlined: Collection[str] | None,
    digits: int,
    qc: list[QcNote],
) -> float | None:
    lesion_id = str(lesion.get("id"))
    now_outline = is_outline(lesion, current_outlined)
    before_outline = is_outline(old, prior_outlined)
    if not (now_outline and before_outline):
        which = [
            name
            for name, ok in (("this study", now_outline), ("the prior", before_outline))
            if not ok
        ]
        qc.append(
            QcNote(
                QcLevel.INFO,
                "change-volume-not-compared",
                f"{lesion_id}: no volume change: the ROI on {' and '.join(which)} is a typed "
                "shape, not an outline of the lesion",
            )
        )
        return None
    now, before = lesion_volume_ml(lesion), lesion_volume_ml(old)
    if now is None or before is None or before <= 0:
        qc.append(
            QcNote(
                QcLevel.WARNING,
                "change-volume-not-compared",
                f"{lesion_id}: no volume change: the volume is unknown on "
                f"{'this study' if now is None else 'the prior'}",
            )
        )
        return None
    return round(100.0 * (now / before - 1.0), digits)


def _ratio_change(
    lesion: Mapping[str, Any], old: Mapping[str, Any], digits: int
) -> dict[str, float]:
    """Per role measured on both studies: ratio now minus ratio before."""
    now_signal = lesion.get("signal") or {}
    old_signal = old.get("signal") or {}
    out: dict[str, float] = {}
    for role, stats in now_signal.items():
        before = old_signal.get(role)
        if not stats or not before:
            continue
        a, b = stats.get("ratio"), before.get("ratio")
        if a is None or b is None:
            continue
        out[str(role)] = round(float(a) - float(b), digits)
    return out


def _enhancement_change(
    lesion_id: str,
    now: Mapping[str, Any],
    before: Mapping[str, Any],
    digits: int,
    qc: list[QcNote],
) -> float | None:
    a, b = now.get("percent"), before.get("percent")
    if a is None or b is None:
        if now.get("post") or before.get("post"):
            qc.append(
                QcNote(
                    QcLevel.INFO,
                    "change-enhancement-not-compared",
                    f"{lesion_id}: no enhancement change: enhancement was not measured on "
                    f"{'this study' if a is None else 'the prior'}",
                )
            )
        return None
    if (now.get("pre"), now.get("post")) != (before.get("pre"), before.get("post")):
        qc.append(
            QcNote(
                QcLevel.WARNING,
                "change-enhancement-not-compared",
                f"{lesion_id}: no enhancement change: measured {now.get('pre')} -> "
                f"{now.get('post')} now and {before.get('pre')} -> {before.get('post')} on the "
                "prior",
            )
        )
        return None
    return round(float(a) - float(b), digits)


def with_interval_change(
    findings: Mapping[str, Any],
    change: IntervalChange,
) -> dict[str, Any]:
    """A copy of ``findings`` with each lesion's ``change``, the top-level ``prior`` and the
    comparison's ``qc`` notes (warnings first, as findings order them)."""
    out = dict(findings)
    out["lesions"] = [
        {**lesion, "change": change.lesions.get(str(lesion.get("id")))}
        for lesion in findings.get("lesions", [])
    ]
    out["prior"] = change.prior_json()
    order = {"error": 0, "warning": 1, "info": 2}
    notes = list(findings.get("qc", [])) + [
        n.to_json() for n in change.qc if n.to_json() not in findings.get("qc", [])
    ]
    out["qc"] = sorted(notes, key=lambda n: order.get(str(n.get("level")), 3))
    return out

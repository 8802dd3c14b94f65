"""De-identification of the report's contents: sr.dcm by the PS3.15 Basic Application Level
Confidentiality Profile (with the Clean Structured Content Option), and findings.json, from
which the human files are drawn again.

One ``UidMap`` serves the SR and the findings, so a UID replaced in sr.dcm is replaced by the
same new UID in findings.json, table.csv and the reports (PS3.15 E.1.1: replacement UIDs are
internally consistent within the set of de-identified instances).
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

from pydicom.dataelem import DataElement
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.sequence import Sequence
from pydicom.uid import generate_uid

from sigreport import __version__
from sigreport.export.profile import (
    BASIC_PROFILE_CODE,
    CLEAN_STRUCTURED_CONTENT_CODE,
    DATE_VRS,
    DEIDENTIFYING_EQUIPMENT_CODE,
    DICOM_UID_ROOT,
    DUMMY,
    TEXT_VRS,
    action_for,
)

REMOVED = "[removed]"
# De-identification Method (0012,0063), LO 1-n: each value at most 64 characters (PS3.5 6.2).
DEIDENTIFICATION_METHOD = [
    "DICOM PS3.15 Basic Application Confidentiality Profile",
    "Clean Structured Content Option",
    f"sigreport {__version__}",
]
# Identifiers shorter than this are removed from the fields that hold them but not searched
# for in free text: "1" (a StudyID) or "T1" (an accession number) occur in ordinary wording.
MIN_TEXT_LENGTH = 4
_UID = re.compile(r"(?<![0-9.])[0-2](?:\.(?:0|[1-9][0-9]*))+(?![0-9.])")


@dataclass
class UidMap:
    """Original UID -> a new UID (``2.25.`` + a random UUID, PS3.5 B.2), the same one each
    time an original is seen."""

    mapping: dict[str, str] = field(default_factory=dict)

    def __call__(self, uid: str) -> str:
        uid = str(uid).strip().rstrip("\x00")
        if not uid or uid.startswith(DICOM_UID_ROOT):
            return uid
        if uid not in self.mapping:
            self.mapping[uid] = str(generate_uid(prefix=None))
        return self.mapping[uid]

    def in_text(self, text: str) -> str:
        """Every UID-shaped token of ``text`` that this map knows (or that is not DICOM's own)
        replaced."""
        return _UID.sub(
            lambda m: self(m.group(0)) if _looks_like_uid(m.group(0)) else m.group(0), text
        )


def _looks_like_uid(token: str) -> bool:
    """A dotted number with at least four components (numbers like 1.5 or 2.0.1 are not)."""
    return token.count(".") >= 3


@dataclass(frozen=True)
class Identifiers:
    """The patient's and the study's identifying strings, as found in the report folder."""

    values: tuple[tuple[str, str], ...]  # (what, text)

    @classmethod
    def collect(cls, sr: Dataset | None, findings: Mapping[str, Any]) -> Identifiers:
        found: list[tuple[str, str]] = []

        def add(what: str, value: Any) -> None:
            if value is None:
                return
            text = str(value).strip()
            if text and (what, text) not in found:
                found.append((what, text))

        study = findings.get("study") or {}
        for key in ("patient_name", "patient_id", "birth_date", "accession_number", "study_date"):
            add(key.replace("_", " "), study.get(key))
        add("report date", findings.get("generated"))
        if sr is not None:
            for keyword in (
                "PatientName", "PatientID", "PatientBirthDate", "AccessionNumber", "StudyDate",
                "StudyID", "StudyDescription", "ReferringPhysicianName", "InstitutionName",
                "OtherPatientIDs", "OtherPatientNames", "PatientAddress", "ContentDate",
                "InstanceCreationDate", "SeriesDate", "AcquisitionDate",
            ):  # fmt: skip
                for element in _all(sr, keyword):
                    add(keyword, element.value)
        names = [text for what, text in found if what in ("patient name", "PatientName")]
        for name in names:
            for variant in name_variants(name):
                add("patient name", variant)
        for what, text in list(found):
            if what in ("study date", "birth date", "StudyDate", "PatientBirthDate") or (
                what.endswith("Date")
            ):
                for variant in date_variants(text):
                    add(what, variant)
        return cls(tuple(found))

    def strings(self, *, min_length: int = 1) -> list[tuple[str, str]]:
        return [(w, t) for w, t in self.values if len(t) >= min_length]

    def clean(self, text: str) -> str:
        """``text`` with every identifier of at least ``MIN_TEXT_LENGTH`` characters replaced
        by ``[removed]`` (longest first, case-insensitively, see ``identifier_pattern``)."""
        for _what, value in sorted(self.values, key=lambda v: -len(v[1])):
            if len(value) >= MIN_TEXT_LENGTH:
                text = re.sub(identifier_pattern(value), REMOVED, text, flags=re.IGNORECASE)
        return text


def identifier_pattern(value: str) -> str:
    """A regular expression finding ``value`` as a whole token: not glued to a letter or digit
    on a side where ``value`` itself begins or ends with one, and, for an identifier made of
    digits (an all-numeric patient ID), not inside a longer number either (``1571`` is not
    found in ``1571.8``), so measured values are never taken for identifiers."""
    glue = "0-9A-Za-z" + (".," if value.replace(".", "").isdigit() else "")
    before = f"(?<![{glue}])" if value[:1].isalnum() else ""
    after = f"(?![{glue}])" if value[-1:].isalnum() else ""
    return before + re.escape(value) + after


def name_variants(name: str) -> list[str]:
    """The forms a DICOM person name (PS3.5 6.2, ``Family^Given^Middle^Prefix^Suffix``) may
    take in text: as stored, spaced, given-first, 'Family, Given'."""
    parts = [p.strip() for p in name.split("=")[0].split("^") if p.strip()]
    out = [name]
    if len(parts) >= 2:
        out += [
            " ".join(parts),
            " ".join([*parts[1:], parts[0]]),
            f"{parts[0]}, {' '.join(parts[1:])}",
            f"{parts[0]} {parts[1]}",
            f"{parts[1]} {parts[0]}",
        ]
    return list(dict.fromkeys(out))


def date_variants(text: str) -> list[str]:
    """A DA value (YYYYMMDD, PS3.5 6.2) and the forms a report may print it in: ISO
    (YYYY-MM-DD), DD.MM.YYYY, DD/MM/YYYY, MM/DD/YYYY. Other text gives its first ten
    characters when they are an ISO date (the date part of an ISO date-time)."""
    digits = text.strip()
    m = re.fullmatch(r"(\d{4})-?(\d{2})-?(\d{2})(?:[T ].*)?", digits)
    if not m:
        m = re.fullmatch(r"(\d{4})(\d{2})(\d{2})\d*(?:\.\d+)?(?:[+-]\d{4})?", digits)
    if not m:
        return []
    y, mo, d = m.groups()
    return [f"{y}{mo}{d}", f"{y}-{mo}-{d}", f"{d}.{mo}.{y}", f"{d}/{mo}/{y}", f"{mo}/{d}/{y}"]


def _all(ds: Dataset, keyword: str) -> Iterable[DataElement]:
    for element in ds.iterall():
        if element.keyword == keyword and element.value not in (None, "", b""):
            yield element


# --------------------------------------------------------------------------------------------
# sr.dcm


def deidentify_sr(sr: Dataset, uids: UidMap, identifiers: Identifiers) -> Dataset:
    """A copy of ``sr`` with the Basic Profile and the Clean Structured Content Option applied
    to every attribute at every level of nesting (``profile.action_for``: the action of its row
    of PS3.15 Table E.1-1, private attributes removed, identifying UIDs replaced through
    ``uids``, the content tree's text cleaned of ``identifiers``), and the de-identification
    attributes set: PS3.3 C.7.1.1 Patient Identity Removed, De-identification Method and its
    Code Sequence (PS3.16 CID 7050), and an item of the Contributing Equipment Sequence for the
    de-identifying software (PS3.16 CID 7005, 109104).
    """
    out = _copy(sr)
    _apply(out, uids, identifiers)
    if not hasattr(out, "file_meta"):
        out.file_meta = FileMetaDataset()
    out.file_meta.MediaStorageSOPClassUID = out.SOPClassUID
    out.file_meta.MediaStorageSOPInstanceUID = out.SOPInstanceUID  # PS3.10 7.1

    out.PatientIdentityRemoved = "YES"
    out.DeidentificationMethod = DEIDENTIFICATION_METHOD
    out.DeidentificationMethodCodeSequence = Sequence(
        [_code(*BASIC_PROFILE_CODE), _code(*CLEAN_STRUCTURED_CONTENT_CODE)]
    )
    equipment = Dataset()
    equipment.Manufacturer = "sigreport"
    equipment.SoftwareVersions = __version__
    equipment.PurposeOfReferenceCodeSequence = Sequence([_code(*DEIDENTIFYING_EQUIPMENT_CODE)])
    previous = list(out.get("ContributingEquipmentSequence") or [])
    out.ContributingEquipmentSequence = Sequence([*previous, equipment])
    return out


def _copy(ds: Dataset) -> Dataset:
    import copy

    return copy.deepcopy(ds)


def _code(value: str, scheme: str, meaning: str) -> Dataset:
    item = Dataset()
    item.CodeValue = value
    item.CodingSchemeDesignator = scheme
    item.CodeMeaning = meaning
    return item


def _apply(ds: Dataset, uids: UidMap, identifiers: Identifiers) -> None:
    """Apply ``profile.action_for`` to every attribute of ``ds``, into sequences' items."""
    for element in list(ds):
        action = action_for(element.tag, element.keyword, element.VR)
        if action == "X":
            del ds[element.tag]
        elif action == "Z":
            element.value = Sequence() if element.VR == "SQ" else ""
        elif action == "D":
            if element.VR == "SQ":
                # A dummy sequence would have to invent its items; none of the table's D
                # sequences (verifying observer, person identification) is in our SR.
                del ds[element.tag]
            else:
                element.value = DUMMY.get(element.VR, "REMOVED")
        elif element.VR == "SQ":  # K, C (the content tree) or U* (a kept reference)
            for item in element.value:
                _apply(item, uids, identifiers)
        elif action == "U" or (element.VR == "UI" and action.startswith("U")):
            if element.value:
                values = element.value if element.VM > 1 else [element.value]
                new = [uids(str(v)) for v in values]
                element.value = new if element.VM > 1 else new[0]
        elif action == "C" and element.VR in TEXT_VRS and element.value:
            if element.VM > 1:
                element.value = [identifiers.clean(str(v)) for v in element.value]
            else:
                element.value = identifiers.clean(str(element.value))
        elif action == "C" and element.VR in DATE_VRS:
            element.value = DUMMY[element.VR]


# --------------------------------------------------------------------------------------------
# findings.json


def deidentify_findings(
    findings: Mapping[str, Any], uids: UidMap, identifiers: Identifiers
) -> dict[str, Any]:
    """A copy of findings.json with the study's identifying fields emptied (``study``: every
    field but ``study_instance_uid``, which is replaced), the run's date (``generated``)
    removed, every UID replaced through ``uids`` and every identifier in any text replaced by
    ``[removed]``."""
    import json

    out: dict[str, Any] = json.loads(json.dumps(findings))
    out.pop("generated", None)
    study = out.get("study") or {}
    out["study"] = {
        key: (uids(str(value)) if key == "study_instance_uid" and value else None)
        for key, value in study.items()
    }
    return _clean_json(out, uids, identifiers)


def _clean_json(value: Any, uids: UidMap, identifiers: Identifiers) -> Any:
    if isinstance(value, dict):
        return {k: _clean_json(v, uids, identifiers) for k, v in value.items()}
    if isinstance(value, list):
        return [_clean_json(v, uids, identifiers) for v in value]
    if isinstance(value, str):
        return identifiers.clean(uids.in_text(value))
    return value

"""The DICOM PS3.15 Annex E Basic Application Level Confidentiality Profile, as data.

The profile's attribute table, PS3.15 Table E.1-1 "Application Level Confidentiality Profile
Attributes", is shipped whole as ``ps3_15_table_e1_1.tsv`` beside this module (each row's tag,
name, Basic Profile action and Clean Structured Content Option action; the file's header
names its source and edition). ``TABLE`` reads it; ``BASIC_PROFILE`` is the action this tool
applies to each row's attribute. Action codes (PS3.15 E.1.1, the table's legend):

- ``D`` replace with a non-zero-length dummy value consistent with the VR
- ``Z`` replace with a zero-length value (or a dummy)
- ``X`` remove
- ``K`` keep
- ``C`` clean: keep, with identifying text replaced (here: Clean Structured Content Option)
- ``U`` replace the UID with another one, consistently within the export

Where the table gives a compound code (``X/Z``, ``X/Z/D``, ``Z/D``...) the implementation
picks by the attribute's Type in the IOD: for the Comprehensive 3D SR (PS3.3 A.35.13) a Type 1
attribute gets a dummy, a Type 2 attribute a zero-length value, a Type 3 one is removed
(``SR_ATTRIBUTE_TYPE`` lists the Types that are not 3). The Clean Structured Content Option
(PS3.15 E.3.9, the table's column) keeps the SR's content tree with its text cleaned; without
it the Basic Profile would replace the tree (Content Sequence: D) and the SR would hold no
findings.

Attributes our SR carries that are not rows of the table (the tree's structure, codes and
measured values, the SOP class, flags...) are listed in ``NOT_IN_TABLE`` with the action taken
and why; an attribute that is neither (one a source image's header could carry into the SR
through the Patient and Study modules) is handled by its VR (``action_for``): a UID is
replaced, a date or time removed, a person name emptied, free text cleaned, anything else
kept. Every private attribute is removed (the table's row (GGGG,EEEE), odd group; PS3.15 E.3.10
is the option that would keep some: not used), as are curves and overlays (50xx, 60xx).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from pathlib import Path

from pydicom.datadict import keyword_for_tag
from pydicom.tag import BaseTag

TABLE_FILE = Path(__file__).with_name("ps3_15_table_e1_1.tsv")


@dataclass(frozen=True)
class ProfileRow:
    """One row of PS3.15 Table E.1-1 (the columns sigreport uses)."""

    tag: str  # as the table prints it: "(0008,0050)", "(50XX,XXXX)", "(GGGG,EEEE)"
    name: str
    in_standard_iod: bool
    basic: str  # the Basic Profile's action code, e.g. "Z", "X/Z/D"
    clean_structured_content: str | None  # "C" where the option cleans the attribute

    @property
    def tag_value(self) -> int | None:
        """The tag as a number, or None for the rows that name a group of tags."""
        digits = self.tag.strip("()").replace(",", "")
        try:
            return int(digits, 16)
        except ValueError:
            return None

    @property
    def keyword(self) -> str | None:
        value = self.tag_value
        return keyword_for_tag(value) or None if value is not None else None


@functools.cache
def load_table(path: Path = TABLE_FILE) -> tuple[ProfileRow, ...]:
    """The rows of PS3.15 Table E.1-1 from the shipped copy (tab-separated, ``#`` comments)."""
    rows = []
    header_seen = False
    for line in path.read_text(encoding="utf-8").splitlines():
        if not line.strip() or line.startswith("#"):
            continue
        cells = line.split("\t")
        if not header_seen:
            header_seen = True  # tag, name, std_comp_iod, basic, clean_structured_content
            continue
        tag, name, iod, basic, clean = (cells + [""] * 5)[:5]
        rows.append(
            ProfileRow(
                tag=tag,
                name=name,
                in_standard_iod=iod == "Y",
                basic=basic,
                clean_structured_content=clean or None,
            )
        )
    return tuple(rows)


TABLE: tuple[ProfileRow, ...] = load_table()

# The Type of the attributes of our SR whose row gives a compound code (every other one is
# Type 3 or absent from the IOD). PS3.3 C.17.2 SR Document General Module: Content Date and
# Content Time Type 1, Referenced Performed Procedure Step Sequence Type 2.
SR_ATTRIBUTE_TYPE: dict[str, str] = {
    "ContentDate": "1",
    "ContentTime": "1",
    "ReferencedPerformedProcedureStepSequence": "2",
}


def resolve(row: ProfileRow) -> str:
    """The action applied to a row's attribute: the Clean Structured Content Option's ``C``
    where the table gives one, else the Basic Profile's code, a compound code resolved by the
    attribute's Type in our SR (1: D, 2: Z, 3: X; ``U*`` counts as X for a Type 3 attribute)."""
    if row.clean_structured_content == "C":
        return "C"
    options = row.basic.split("/")
    if len(options) == 1:
        return options[0]
    kind = SR_ATTRIBUTE_TYPE.get(row.keyword or "", "3")
    preference = {"1": ("D", "Z", "U*", "X"), "2": ("Z", "D", "U*", "X")}.get(
        kind, ("X", "Z", "D", "U*")
    )
    return next(code for code in preference if code in options)


# (keyword, PS3.15 Table E.1-1 Basic Profile action, action applied here), for every row that
# names one attribute.
BASIC_PROFILE: tuple[tuple[str, str, str], ...] = tuple(
    (row.keyword, row.basic, resolve(row)) for row in TABLE if row.keyword
)
ACTIONS_BY_TAG: dict[int, str] = {
    value: resolve(row) for row in TABLE if (value := row.tag_value) is not None
}

# Attributes of our SR (sigreport.report.sr, highdicom's TID 1500 writer) that are not rows of
# Table E.1-1, with the action taken. K: the tree's structure, coded concepts (the standard's
# and the tool's vocabulary, never patient text), measured values, the SOP class and flags.
NOT_IN_TABLE: dict[str, str] = {
    # SR Document Content and Content Item macros (PS3.3 C.17.3, Table 10-2): structure.
    "ValueType": "K",
    "RelationshipType": "K",
    "ContinuityOfContent": "K",
    "ContentTemplateSequence": "K",
    "TemplateIdentifier": "K",
    "MappingResource": "K",
    "ConceptNameCodeSequence": "K",
    "ConceptCodeSequence": "K",
    "MeasuredValueSequence": "K",
    "MeasurementUnitsCodeSequence": "K",
    "NumericValue": "K",
    "FloatingPointValue": "K",
    "ReferencedSOPSequence": "K",
    "ReferencedSeriesSequence": "K",
    "ReferencedSOPClassUID": "K",
    "ReferencedFrameNumber": "K",
    "ReferencedSegmentNumber": "K",
    "GraphicData": "K",
    "GraphicType": "K",
    "PixelOriginInterpretation": "K",
    # TEXT content items: kept with the patient's identifiers replaced (the Clean Structured
    # Content Option of the Content Sequence row).
    "TextValue": "C",
    # DATE, TIME, DATETIME content items: Type 1 in their item (PS3.3 C.17.3.2): a dummy.
    "Date": "D",
    "Time": "D",
    "DateTime": "D",
    # Dates the table does not list are longitudinal information all the same (PS3.15 E.3.6
    # is the option that would keep them; not used): removed (all Type 3 in our SR).
    "InstanceCreationDate": "X",
    "InstanceCreationTime": "X",
    "ContributionDateTime": "X",
    "ObservationDateTime": "X",
    # Code Sequence macro (PS3.3 Table 8.8-1) and the coding schemes used.
    "CodeValue": "K",
    "CodingSchemeDesignator": "K",
    "CodingSchemeVersion": "K",
    "CodeMeaning": "K",
    "LongCodeValue": "K",
    "URNCodeValue": "K",
    "CodingSchemeIdentificationSequence": "K",
    "CodingSchemeName": "K",
    "CodingSchemeResponsibleOrganization": "K",
    "PerformedProcedureCodeSequence": "K",
    "PurposeOfReferenceCodeSequence": "K",
    # SR Document General and Series modules, SOP Common, General Equipment.
    "SpecificCharacterSet": "K",
    "SOPClassUID": "K",
    "Modality": "K",
    "SeriesNumber": "K",
    "InstanceNumber": "K",
    "CompletionFlag": "K",
    "PreliminaryFlag": "K",
    "VerificationFlag": "K",
    # Equipment names are free text a site may fill with its own name (the table's Institution
    # Name is removed beside them): kept, cleaned of the study's identifiers.
    "Manufacturer": "C",
    "ManufacturerModelName": "C",
    "SoftwareVersions": "C",
    # Sequences kept; the table applies to their items.
    "CurrentRequestedProcedureEvidenceSequence": "K",
    "ContributingEquipmentSequence": "K",
    # Written by the de-identification itself (PS3.3 C.7.1.1).
    "PatientIdentityRemoved": "K",
    "DeidentificationMethod": "K",
    "DeidentificationMethodCodeSequence": "K",
}

# UIDs that name a standard, a coding scheme or software, never a patient's data: kept.
NON_IDENTIFYING_UID_KEYWORDS = frozenset(
    {
        "SOPClassUID",
        "ReferencedSOPClassUID",
        "MediaStorageSOPClassUID",
        "TransferSyntaxUID",
        "ImplementationClassUID",
        "CodingSchemeUID",
        "ContextUID",
        "MappingResourceUID",
        "ContextGroupExtensionCreatorUID",
        "PrivateInformationCreatorUID",
        "ReferencedSOPClassUIDInFile",
        "ReferencedTransferSyntaxUIDInFile",
    }
)
# DICOM's own UID root (PS3.5 9.1, PS3.6 Annex A): SOP classes, transfer syntaxes, codes.
DICOM_UID_ROOT = "1.2.840.10008."

TEXT_VRS = frozenset({"LO", "SH", "ST", "LT", "UT", "UC"})
DATE_VRS = frozenset({"DA", "DT", "TM"})


def action_for(tag: BaseTag, keyword: str, vr: str) -> str:
    """The action for one attribute: its row of Table E.1-1 (private attributes, curves and
    overlays included), else ``NOT_IN_TABLE``, else by its VR: a UID is replaced (U) unless it
    names a standard or software, a date or time removed (X), a person name emptied (Z), free
    text cleaned (C), anything else kept (K)."""
    if tag.is_private:
        return "X"  # Table E.1-1 row (GGGG,EEEE), odd group
    if (tag.group & 0xFF00) in (0x5000, 0x6000):
        return "X"  # rows (50XX,XXXX) Curve Data, (60XX,3000) Overlay Data, (60XX,4000)
    action = ACTIONS_BY_TAG.get(int(tag))
    if action is not None:
        return action
    if keyword in NOT_IN_TABLE:
        return NOT_IN_TABLE[keyword]
    if vr == "UI":
        return "K" if keyword in NON_IDENTIFYING_UID_KEYWORDS else "U"
    if vr in DATE_VRS:
        return "X"
    if vr == "PN":
        return "Z"
    if vr in TEXT_VRS:
        return "C"
    return "K"


# PS3.16 CID 7050 De-identification Method: the profile and the option applied.
BASIC_PROFILE_CODE = ("113100", "DCM", "Basic Application Confidentiality Profile")
CLEAN_STRUCTURED_CONTENT_CODE = ("113104", "DCM", "Clean Structured Content Option")
# PS3.16 CID 7005 Contributing Equipment Purposes of Reference.
DEIDENTIFYING_EQUIPMENT_CODE = ("109104", "DCM", "De-identifying Equipment")

# The dummy values of action D (PS3.15 E.1.1: "a non-zero length value that may be a dummy
# value and consistent with the VR").
DUMMY = {
    "DA": "19000101",
    "TM": "000000",
    "DT": "19000101000000",
    "PN": "ANONYMOUS",
    "LO": "REMOVED",
    "SH": "REMOVED",
    "CS": "REMOVED",
    "ST": "REMOVED",
    "LT": "REMOVED",
    "UT": "REMOVED",
    "UC": "REMOVED",
}

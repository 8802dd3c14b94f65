"""sr.dcm: the findings as a DICOM Comprehensive 3D SR, measurement report template TID 1500.

One measurement group (TID 1501, Measurements and Qualitative Evaluations) per lesion, tracked
by the lesion id and site; numbers with UCUM units, grades and flags as coded qualitative
evaluations, each per-series value referencing the source image it was measured on. Standard
codes come from DICOM PS3.16 through ``pydicom.sr.codedict.codes``; concepts PS3.16 lacks are
drawn from the private coding scheme ``99SIGRPT``, declared in the Coding Scheme Identification
Sequence (PS3.3 C.12.1.1.4). The SR is a draft: Completion Flag PARTIAL, Verification Flag
UNVERIFIED (PS3.3 C.17.2), and it carries the report's cautions as comments.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import highdicom as hd
from pydicom import Dataset, dcmread
from pydicom.charset import convert_encodings, custom_encoders, default_encoding, python_encoding
from pydicom.dataelem import DataElement, RawDataElement
from pydicom.sequence import Sequence as DicomSequence
from pydicom.sr.codedict import codes
from pydicom.sr.coding import Code
from pydicom.tag import BaseTag
from pydicom.uid import ExplicitVRLittleEndian
from pydicom.valuerep import AMBIGUOUS_VR

from sigreport.model import InstanceRef, KeySlice, Stack
from sigreport.report import sr_content
from sigreport.report.sites import SiteTable, load_sites
from sigreport.report.tables import ordered_roles, roi_medians

PRIVATE_SCHEME = "99SIGRPT"
PRIVATE_SCHEME_NAME = "sigreport private concepts"
SR_SERIES_NUMBER = 9900
SR_SERIES_DESCRIPTION = "sigreport draft measurement report"

# UCUM units (PS3.16 CID 7181 draws on UCUM): ratio and percent are annotations / symbols.
UNIT_ML = Code("ml", "UCUM", "milliliter")
UNIT_MM = Code("mm", "UCUM", "millimeter")
UNIT_PERCENT = Code("%", "UCUM", "percent")
UNIT_RATIO = Code("{ratio}", "UCUM", "ratio")
UNIT_NONE = Code("1", "UCUM", "no units")
# UCUM: 10^-6 mm^2/s, the unit ADC maps are stored in (PS3.16 CID 7181 lists it).
UNIT_ADC = Code("10-6.mm2/s", "UCUM", "10^-6 mm2/s")
UNIT_SECOND = Code("s", "UCUM", "second")

# Signal grades: PS3.16 CID 6343 (RadLex codes).
GRADE_CODES: dict[str, Code] = {
    "hyperintense": codes.cid6343.Hyperintense,
    "isointense": codes.cid6343.Isointense,
    "hypointense": codes.cid6343.Hypointense,
}
# Statistics: PS3.16 CID 7464 (mean, median, SD); the 5th / 95th percentiles are SNOMED CT
# qualifier values (PS3.16 lists them, e.g. in CID 7464's extensions).
DERIVATIONS: dict[str, Code] = {
    "mean": codes.cid7464.Mean,
    "median": codes.cid7464.Median,
    "sd": codes.cid7464.StandardDeviation,
    "p05": codes.SCT.FifthPercentile,
    "p95": codes.SCT.NinetyFifthPercentile,
}


def private(value: str, meaning: str) -> Code:
    """A concept of the private scheme ``99SIGRPT`` (meaning cut to the LO limit of 64)."""
    return Code(value, PRIVATE_SCHEME, meaning[:64])


# Concepts with no PS3.16 equivalent.
ENHANCEMENT_PERCENT = private("ENH-PCT", "Reference-normalized enhancement")
ENHANCEMENT_RAW_PERCENT = private("ENH-RAW-PCT", "Unnormalized enhancement")
CONTRAST_ENHANCEMENT = private("ENHANCEMENT", "Contrast enhancement")
ENHANCEMENT_PATTERN = codes.RADLEX.EnhancementPattern  # RadLex RID6058
FLOW_VOID = private("FLOW-VOID", "Flow void")
BEHAVIOUR = private("BEHAVIOUR", "Signal behaviour")
PATTERN_CODES = {
    "none": private("PATTERN-NONE", "No enhancement pattern"),
    "solid": private("PATTERN-SOLID", "Solid enhancement"),
    "rim": private("PATTERN-RIM", "Rim enhancement"),
    "heterogeneous": private("PATTERN-HETERO", "Heterogeneous enhancement"),
}


# The other sequence families (docs/measurements.md): DCM 113041 Apparent Diffusion Coefficient
# and DCM 129100 Fat fraction (PS3.16 Annex D); the rest have no PS3.16 equivalent.
ADC = codes.DCM.ApparentDiffusionCoefficient
FAT_FRACTION = codes.DCM.FatFraction
FAMILY_FLAGS = {
    "restricted": private("RESTRICTED", "Restricted diffusion"),
    "shine_through": private("SHINE-THROUGH", "T2 shine-through"),
    "blooming": private("BLOOMING", "Susceptibility blooming"),
    "microscopic_fat": private("MICRO-FAT", "Signal loss on opposed-phase images"),
}
SUSCEPTIBILITY_DROP = private("DROP-SUSCEPTIBILITY", "Signal drop on the susceptibility series")
CHEMICAL_SHIFT_DROP = private("DROP-CHEMICAL-SHIFT", "In- to opposed-phase signal drop (core)")
PHASE_ENHANCEMENT = private("ENH-PHASE-PCT", "Reference-normalized enhancement of a phase")
PHASE_DELAY = private("PHASE-DELAY", "Delay after the first post-contrast phase")
CURVE = private("CURVE", "Dynamic enhancement curve type")
CURVE_CODES = {
    "persistent": private("CURVE-PERSISTENT", "Persistent (type I)"),
    "plateau": private("CURVE-PLATEAU", "Plateau (type II)"),
    "washout": private("CURVE-WASHOUT", "Washout (type III)"),
}


def role_method(role: str) -> Code:
    """Measurement Method naming the series a value was measured on (private concept)."""
    return private(f"ROLE-{role}", f"Measured on the {role} series")


def grade_name(role: str) -> Code:
    return private(f"GRADE-{role}", f"Signal relative to reference tissue on {role}")


def drop_name(kind: str) -> Code:
    return private(f"DROP-{kind.upper()}", f"{kind.capitalize()} suppression signal drop")


def suppressed_name(kind: str) -> Code:
    return private(f"SUPP-{kind.upper()}", f"{kind.capitalize()} suppression")


def reliable_name(kind: str) -> Code:
    return private(f"RELIABLE-{kind.upper()}", f"{kind.capitalize()} suppression flag reliable")


# PS3.16 codes used for every group, looked up once (pydicom's code dictionaries resolve each
# attribute access anew).
MR_SIGNAL = codes.DCM.MRSignalIntensity
RATIO = codes.SCT.Ratio
VOLUME = codes.SCT.Volume
DIAMETER = codes.SCT.Diameter
MAXIMUM = codes.cid7464.Maximum
MEDIAN = codes.cid7464.Median
LESION = codes.SCT.Lesion
YES, NO = codes.SCT.Yes, codes.SCT.No
PRESENT, ABSENT = codes.SCT.Present, codes.SCT.Absent
FOCAL_ENHANCEMENT = codes.cid6345.FocalContrastEnhancement
COMMENT = codes.DCM.Comment
IMAGING_MEASUREMENTS = codes.DCM.ImagingMeasurements  # DCM 126010, TID 1500


def _yes_no(value: bool) -> Code:
    return YES if value else NO


def _instance_for(key: KeySlice, stack: Stack) -> InstanceRef | None:
    for ref in stack.instances:
        if key.sop_instance_uid is not None and ref.sop_instance_uid == key.sop_instance_uid:
            return ref
    if key.sop_instance_uid is None and 0 <= key.slice_index < len(stack.instances):
        return stack.instances[key.slice_index]
    return None


# Patient (PS3.3 C.7.1.1) and General Study (C.7.2.1) attributes of Type 2, which the SR
# copies from its evidence: a source that omits one has it empty, as Type 2 allows.
_TYPE2_COPIED = (
    "PatientName", "PatientID", "PatientBirthDate", "PatientSex", "StudyDate", "StudyTime",
    "ReferringPhysicianName", "StudyID", "AccessionNumber",
)  # fmt: skip


def _with_type2(ds: Dataset) -> Dataset:
    """The source header as the SR can copy it: Type 2 attributes present (empty when the
    source omits them), and text in UTF-8 when the source names a character set pydicom does
    not know (its text was decoded with pydicom's fallback, and the scan said so)."""
    for keyword in _TYPE2_COPIED:
        if keyword not in ds:
            setattr(ds, keyword, None)
    declared = ds.get("SpecificCharacterSet")
    names = [declared] if isinstance(declared, str) else list(declared or [])
    if any(name and str(name).strip() not in python_encoding for name in names):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # pydicom warns that it falls back
            ds.decode()
        ds.SpecificCharacterSet = "ISO_IR 192"  # UTF-8 (PS3.3 C.12.1.1.2)
    return ds


def _image_library(datasets: Sequence[Dataset]) -> hd.sr.ImageLibrary | None:
    """The image library (TID 1600) of the sources it can describe: highdicom reads their
    geometry (pixel spacing, position, orientation, slice thickness) and rejects a source whose
    values are empty or malformed; such a source is referenced by the measurements only. An
    Enhanced MR multi-frame file keeps its geometry in functional groups, which highdicom's
    library entry does not read, so it is left out too (no top-level Pixel Spacing)."""
    candidates = [ds for ds in datasets if "PixelSpacing" in ds]
    if not candidates:
        return None
    try:
        return hd.sr.ImageLibrary(candidates)
    except Exception:  # noqa: BLE001 - highdicom raises several kinds on odd values
        pass
    usable = []
    for ds in candidates:
        try:
            hd.sr.ImageLibrary([ds])
        except Exception:  # noqa: BLE001 - as above, one source at a time
            continue
        usable.append(ds)
    return hd.sr.ImageLibrary(usable) if usable else None


class _Sources:
    """The key slices as the SR's evidence (PS3.3 C.17.2, Current Requested Procedure Evidence
    Sequence).

    One header is read per series (its first key slice, without pixels): it gives the patient,
    study and equipment the SR copies and the series' image library entry. The other key
    slices need only their study, series, SOP class and SOP instance UIDs in the evidence;
    those come from the index and from their series' header.
    """

    def __init__(self) -> None:
        self.evidence: dict[str, Dataset] = {}
        self.headers: dict[str, Dataset] = {}

    def add(self, ref: InstanceRef, stack: Stack) -> None:
        if ref.sop_instance_uid in self.evidence:
            return
        header = self.headers.get(stack.key)
        if header is None:
            header = self.headers[stack.key] = _read_header(ref)
            self.evidence[ref.sop_instance_uid] = header
            return
        ds = Dataset()
        ds.StudyInstanceUID = header.StudyInstanceUID
        ds.SeriesInstanceUID = header.SeriesInstanceUID
        ds.SOPClassUID = ref.sop_class_uid
        ds.SOPInstanceUID = ref.sop_instance_uid
        self.evidence[ref.sop_instance_uid] = ds

    def library(self) -> list[Dataset]:
        """One header per series, in the order the key slices name them."""
        per_series: dict[str, Dataset] = {}
        for ds in self.headers.values():
            per_series.setdefault(str(ds.SeriesInstanceUID), ds)
        return list(per_series.values())


def _read_header(ref: InstanceRef) -> Dataset:
    try:
        ds = dcmread(ref.path, stop_before_pixels=True)
    except Exception as exc:  # noqa: BLE001 - re-raised with the file named
        raise ValueError(f"cannot read source image header {ref.path}: {exc}") from exc
    # The SOP identifiers as the index read them (an empty SOPClassUID falls back to the File
    # Meta's MediaStorageSOPClassUID there, PS3.10 7.1).
    ds.SOPClassUID = ref.sop_class_uid
    ds.SOPInstanceUID = ref.sop_instance_uid
    return _with_type2(ds)


def _frames(ref: InstanceRef) -> list[int] | None:
    return [ref.frame] if ref.frame is not None else None


def build_sr(
    findings: Mapping[str, Any],
    key_slices: Sequence[KeySlice],
    stacks: Mapping[str, Stack],
    *,
    series_number: int = SR_SERIES_NUMBER,
    manufacturer: str = "sigreport",
    sites: SiteTable | None = None,
) -> hd.sr.Comprehensive3DSR:
    """The draft measurement report of ``findings`` as a Comprehensive 3D SR.

    highdicom builds the document (its modules, the evidence, the observation context and the
    image library); the measurement groups (TID 1501) are built by
    :mod:`sigreport.report.sr_content`, item for item as highdicom's templates build them, and
    are plain pydicom datasets in the returned object: read the written file with
    ``highdicom.sr.srread`` for highdicom's views of them.

    Parameters
    ----------
    findings:
        The findings.json object (schema sigreport-findings/2).
    key_slices:
        The lesions' central slices; their SOP instances are the measurements' source images.
    stacks:
        Role -> the stack measured for that role (its instance paths give the source headers).
    series_number, manufacturer:
        Of the SR series (General Series / General Equipment modules).
    sites:
        The lexicon's coded sites (``sites.toml``) for each group's Finding Site; the bundled
        lexicon's when None.

    Raises
    ------
    ValueError
        When there is no source image to take the patient and study from, or a source header
        cannot be read.
    """
    sources = _Sources()
    key_refs: dict[tuple[str, str], InstanceRef] = {}
    for key in key_slices:
        stack = stacks.get(str(key.role))
        ref = _instance_for(key, stack) if stack is not None else None
        if stack is not None and ref is not None:
            sources.add(ref, stack)
            key_refs[(key.roi_id, str(key.role))] = ref
    if not sources.evidence:
        for stack in stacks.values():
            if stack.instances:
                sources.add(stack.instances[len(stack.instances) // 2], stack)
                break
    if not sources.evidence:
        raise ValueError('Argument "stacks" holds no source instance to build the SR from.')

    if sites is None:
        sites = load_sites()
    groups = [_lesion_group(lesion, key_refs, sites) for lesion in findings.get("lesions", [])]
    groups += [_roi_group(roi, key_refs, sites) for roi in findings.get("rois", [])]
    device = hd.sr.ObserverContext(
        observer_type=codes.DCM.Device,
        observer_identifying_attributes=hd.sr.DeviceObserverIdentifyingAttributes(
            uid=hd.UID(),
            name=manufacturer,
            manufacturer_name=manufacturer,
            model_name=str((findings.get("tool") or {}).get("version", "")) or None,
        ),
    )
    context = hd.sr.ObservationContext(observer_device_context=device)
    # highdicom's document constructor deep-copies and re-parses the whole content tree and
    # walks it for references (measured: three quarters of the SR's time on the demo). The
    # document is built around the report's template with one empty group (highdicom
    # requires one), so that highdicom groups the evidence and fills every module; the image
    # library and the measurement groups are then put in the same tree the dataset holds
    # (the constructor put the root container's attributes on the dataset), and the content
    # view is pointed at it. Every image the groups reference is a key slice in the evidence
    # by construction; checked here because the constructor no longer sees them.
    skeleton = hd.sr.MeasurementReport(
        observation_context=context,
        procedure_reported=codes.cid100.MultiparametricMRI,
        imaging_measurements=[
            hd.sr.MeasurementsAndQualitativeEvaluations(
                tracking_identifier=hd.sr.TrackingIdentifier(identifier="placeholder")
            )
        ],
    )
    sr = hd.sr.Comprehensive3DSR(
        evidence=list(sources.evidence.values()),
        content=skeleton,
        series_instance_uid=hd.UID(),
        series_number=series_number,
        sop_instance_uid=hd.UID(),
        instance_number=1,
        manufacturer=manufacturer,
        is_complete=False,
        is_final=False,
        is_verified=False,
    )
    root = skeleton[0]
    # The image library (TID 1600, optional: 1-n, U) describes each series once, by its first
    # key slice: the descriptors (modality, frame of reference, spacing, orientation) are the
    # series'; one entry per key slice made them most of the document's size and writing time.
    library = _image_library(sources.library())
    referenced = {ref.sop_instance_uid for ref in key_refs.values()}
    if library is not None:
        referenced.update(
            entry.ReferencedSOPSequence[0].ReferencedSOPInstanceUID
            for group in library[0].ContentSequence
            for entry in group.ContentSequence
            if entry.ValueType == "IMAGE"
        )
    missing = referenced - set(sources.evidence)
    if missing:  # pragma: no cover - a bug, not an input problem
        raise RuntimeError(f"SR references instances missing from its evidence: {sorted(missing)}")
    [position] = [
        i
        for i, item in enumerate(root.ContentSequence)
        if item.ValueType == "CONTAINER"
        and item.ConceptNameCodeSequence[0].CodeValue == IMAGING_MEASUREMENTS.value
    ]
    imaging = root.ContentSequence[position]
    # TID 1500: the image library comes right before the imaging measurements.
    if library is not None:
        root.ContentSequence.insert(position, library[0])
    imaging[_CONTENT_SEQUENCE] = DataElement(_CONTENT_SEQUENCE, "SQ", DicomSequence(groups))
    # The cautions (and the warnings of the run) travel with the numbers: TEXT comments on the
    # report's root container (TID 1500 is extensible).
    for caution in findings.get("cautions", []):
        root.ContentSequence.append(
            hd.sr.TextContentItem(name=COMMENT, value=str(caution), relationship_type="CONTAINS")
        )
    for note in findings.get("qc", []):
        if note.get("level") in ("warning", "error"):
            root.ContentSequence.append(
                hd.sr.TextContentItem(
                    name=COMMENT,
                    value=f"QC {note.get('level')} ({note.get('code')}): {note.get('message')}",
                    relationship_type="CONTAINS",
                )
            )
    if sr.ContentSequence is not root.ContentSequence:  # pragma: no cover - highdicom changed
        raise RuntimeError("the SR's dataset no longer holds the content tree it was built with")
    sr._content = hd.sr.ContentSequence([root], is_root=True)  # type: ignore[list-item]
    sr.SeriesDescription = SR_SERIES_DESCRIPTION
    scheme = Dataset()
    scheme.CodingSchemeDesignator = PRIVATE_SCHEME
    scheme.CodingSchemeName = PRIVATE_SCHEME_NAME
    scheme.CodingSchemeResponsibleOrganization = "sigreport project"
    sr.CodingSchemeIdentificationSequence = [scheme]
    return sr


_CONTENT_SEQUENCE = 0x0040A730  # Content Sequence (PS3.3 C.17.3)


def _image(ref: InstanceRef, relationship: str = sr_content.INFERRED_FROM) -> Dataset:
    """The key slice ``ref`` as a Source of Measurement (TID 300; TID 1501 with CONTAINS)."""
    return sr_content.image_content(
        ref.sop_class_uid, ref.sop_instance_uid, _frames(ref), relationship=relationship
    )


def _key_slice(ref: InstanceRef | None) -> list[Dataset]:
    """A per-series value's image reference: its key slice, or none (a new item each call, as
    each measurement owns its content items)."""
    return [] if ref is None else [_image(ref)]


def _tracking(label: str) -> list[Dataset]:
    return sr_content.tracking_identifier(hd.UID(), label)


def _lesion_group(
    lesion: Mapping[str, Any],
    key_refs: Mapping[tuple[str, str], InstanceRef],
    sites: SiteTable,
) -> Dataset:
    lesion_id = str(lesion.get("id"))
    site = str(lesion.get("site") or "")
    measurements: list[Dataset] = []
    evaluations: list[Dataset] = []
    group_images: dict[str, Dataset] = {}

    if lesion.get("volume_ml") is not None:
        measurements.append(sr_content.measurement(VOLUME, float(lesion["volume_ml"]), UNIT_ML))
    if lesion.get("max_diameter_mm") is not None:
        measurements.append(
            sr_content.measurement(
                DIAMETER, float(lesion["max_diameter_mm"]), UNIT_MM, derivation=MAXIMUM
            )
        )
    signal: Mapping[str, Any] = lesion.get("signal") or {}
    for role in ordered_roles(signal):
        stats = signal[role]
        if stats is None:
            continue
        ref = key_refs.get((lesion_id, role))
        if ref is not None:
            group_images.setdefault(ref.sop_instance_uid, _image(ref, sr_content.CONTAINS))
        # The image the value was measured on (TID 300 "Source of Measurement", its series in
        # the evidence and image library) says which series it is: the lesion's key slice on
        # that series (the key slices only, never every instance); the private concept naming
        # the role only when there is no image to reference.
        method = None if ref is not None else role_method(role)
        for stat, derivation in DERIVATIONS.items():
            if stats.get(stat) is None:
                continue
            measurements.append(
                sr_content.measurement(
                    MR_SIGNAL,
                    float(stats[stat]),
                    UNIT_NONE,
                    derivation=derivation,
                    method=method,
                    images=_key_slice(ref),
                )
            )
        if stats.get("ratio") is not None:
            measurements.append(
                sr_content.measurement(
                    RATIO,
                    float(stats["ratio"]),
                    UNIT_RATIO,
                    derivation=MEDIAN,  # ratio of the medians (docs/usage.md)
                    method=method,
                    images=_key_slice(ref),
                )
            )
        grade = GRADE_CODES.get(str(stats.get("grade")))
        if grade is not None:
            evaluations.append(
                sr_content.code_content(grade_name(role), grade, sr_content.CONTAINS)
            )

    enhancement = lesion.get("enhancement") or {}
    if enhancement.get("percent") is not None:
        measurements.append(
            sr_content.measurement(
                ENHANCEMENT_PERCENT,
                float(enhancement["percent"]),
                UNIT_PERCENT,
                method=private(
                    "ENH-PAIR", f"{enhancement.get('post')} against {enhancement.get('pre')}"
                ),
                images=_pair_images(
                    lesion_id, (enhancement.get("pre"), enhancement.get("post")), key_refs
                ),
            )
        )
        if enhancement.get("raw_percent") is not None:
            measurements.append(
                sr_content.measurement(
                    ENHANCEMENT_RAW_PERCENT, float(enhancement["raw_percent"]), UNIT_PERCENT
                )
            )
    if enhancement.get("enhancing") is not None:
        # PS3.16 CID 6345: a lesion ROI that enhances shows focal contrast enhancement.
        value = FOCAL_ENHANCEMENT if enhancement["enhancing"] else ABSENT
        evaluations.append(
            sr_content.code_content(CONTRAST_ENHANCEMENT, value, sr_content.CONTAINS)
        )
    if enhancement.get("pattern") in PATTERN_CODES:
        evaluations.append(
            sr_content.code_content(
                ENHANCEMENT_PATTERN, PATTERN_CODES[enhancement["pattern"]], sr_content.CONTAINS
            )
        )

    suppression: Mapping[str, Any] = lesion.get("suppression") or {}
    for kind in ("fluid", "fat"):
        flag = suppression.get(kind)
        if not flag:
            continue
        if flag.get("drop_percent") is not None:
            measurements.append(
                sr_content.measurement(
                    drop_name(kind),
                    float(flag["drop_percent"]),
                    UNIT_PERCENT,
                    method=private(
                        f"PAIR-{kind.upper()}", f"{flag.get('to')} against {flag.get('from')}"
                    ),
                    images=_pair_images(lesion_id, (flag.get("from"), flag.get("to")), key_refs),
                )
            )
        if flag.get("suppressed") is not None:
            evaluations.append(
                sr_content.code_content(
                    suppressed_name(kind), _yes_no(bool(flag["suppressed"])), sr_content.CONTAINS
                )
            )
        if flag.get("reliable") is not None:
            evaluations.append(
                sr_content.code_content(
                    reliable_name(kind), _yes_no(bool(flag["reliable"])), sr_content.CONTAINS
                )
            )
    family_measurements, family_evaluations = _family_content(lesion)
    measurements += family_measurements
    evaluations += family_evaluations
    if lesion.get("flow_void") is not None:
        value = PRESENT if lesion["flow_void"] else ABSENT
        evaluations.append(sr_content.code_content(FLOW_VOID, value, sr_content.CONTAINS))
    for key in lesion.get("behaviour") or []:
        evaluations.append(
            sr_content.code_content(
                BEHAVIOUR, private(f"B-{key}", str(key).replace("-", " ")), sr_content.CONTAINS
            )
        )

    return sr_content.measurement_group(
        _tracking(f"{lesion_id} ({site})" if site else lesion_id),
        finding_type=LESION,
        finding_sites=finding_sites(site, sites),
        measurements=measurements,
        evaluations=evaluations,
        source_images=list(group_images.values()),
    )


# --------------------------------------------------------------------------------------------
# Coded sites, the reference and control ROIs' own groups, and image references by series


def finding_sites(text: str, sites: SiteTable) -> list[Dataset]:
    """The TID 1501 Finding Site of a free-text site: the SNOMED CT site the lexicon's
    ``sites.toml`` matches in ``text``, with its laterality (PS3.16 CID 244: right, left,
    bilateral) when ``text`` names one side; [] when no site matches."""
    found = sites.site(text)
    if found is None:
        return []
    side = sites.side(text)
    return [sr_content.finding_site(found.coded(), None if side is None else side.coded())]


def _pair_images(
    roi_id: str, roles: tuple[Any, Any], key_refs: Mapping[tuple[str, str], InstanceRef]
) -> list[Dataset]:
    """The images of both series of a pair (enhancement, suppression) a value comes from."""
    refs = [key_refs.get((roi_id, str(role))) for role in roles if role]
    return [_image(ref) for ref in refs if ref is not None]


ROI_KIND_CONCEPT = private("ROI-KIND", "Region of interest role")
ROI_KINDS = {
    "reference": private("REFERENCE-TISSUE", "Reference tissue for normalization"),
    "control": private("CONTROL-TISSUE", "Control tissue checking the study"),
}
CONTROL_PASSED = private("CONTROL-PASSED", "Control check passed")
SNR_NAME = codes.DCM.SignalToNoiseRatio  # DCM 111787


def _roi_group(
    roi: Mapping[str, Any],
    key_refs: Mapping[tuple[str, str], InstanceRef],
    sites: SiteTable,
) -> Dataset:
    """A reference or control ROI as its own measurement group (TID 1501): tracked by id, kind
    and tissue; finding type and site the tissue's SNOMED CT code (``sites.toml``) with the
    side its site names; volume, per-series medians (``rois[].medians``, findings schema 2)
    and signal-to-noise ratios, each referencing the image it was measured on when a key image
    exists; a control's suppression drop and whether the check passed."""
    roi_id = str(roi.get("id"))
    kind = str(roi.get("kind") or "")
    tissue = str(roi.get("tissue") or "")
    site = str(roi.get("site") or "")
    measurements: list[Dataset] = []
    evaluations: list[Dataset] = []
    if kind in ROI_KINDS:
        evaluations.append(
            sr_content.code_content(ROI_KIND_CONCEPT, ROI_KINDS[kind], sr_content.CONTAINS)
        )
    if roi.get("volume_ml") is not None:
        measurements.append(sr_content.measurement(VOLUME, float(roi["volume_ml"]), UNIT_ML))
    medians: Mapping[str, Any] = roi_medians(roi)
    snr: Mapping[str, Any] = roi.get("snr") or {}
    for role in ordered_roles({**snr, **medians}):
        ref = key_refs.get((roi_id, role))
        method = None if ref is not None else role_method(role)
        if medians.get(role) is not None:
            measurements.append(
                sr_content.measurement(
                    MR_SIGNAL,
                    float(medians[role]),
                    UNIT_NONE,
                    derivation=MEDIAN,
                    method=method,
                    images=_key_slice(ref),
                )
            )
        if snr.get(role) is not None:
            measurements.append(
                sr_content.measurement(
                    SNR_NAME,
                    float(snr[role]),
                    UNIT_NONE,
                    method=method,
                    images=_key_slice(ref),
                )
            )
    check = roi.get("check")
    if isinstance(check, Mapping):
        kind_name = str(check.get("kind") or "")
        if check.get("drop_percent") is not None:
            measurements.append(
                sr_content.measurement(
                    drop_name(kind_name),
                    float(check["drop_percent"]),
                    UNIT_PERCENT,
                    method=private(
                        f"PAIR-{kind_name.upper()}",
                        f"{check.get('to')} against {check.get('from')}",
                    ),
                    images=_pair_images(roi_id, (check.get("from"), check.get("to")), key_refs),
                )
            )
        if check.get("passed") is not None:
            evaluations.append(
                sr_content.code_content(
                    CONTROL_PASSED, _yes_no(bool(check["passed"])), sr_content.CONTAINS
                )
            )
    coded_tissue = sites.site(tissue)
    label = f"{roi_id} ({kind}: {tissue})" if tissue else f"{roi_id} ({kind})"
    own_images = {
        ref.sop_instance_uid: _image(ref, sr_content.CONTAINS)
        for (rid, _role), ref in key_refs.items()
        if rid == roi_id
    }
    return sr_content.measurement_group(
        _tracking(label[:64]),
        finding_type=None if coded_tissue is None else coded_tissue.coded(),
        # The site's own words first; else the tissue, with the side the site names.
        finding_sites=finding_sites(site, sites) or finding_sites(f"{tissue} {site}", sites),
        measurements=measurements,
        evaluations=evaluations,
        source_images=list(own_images.values()),
    )


def _family_content(lesion: Mapping[str, Any]) -> tuple[list[Dataset], list[Dataset]]:
    """The lesion's diffusion, susceptibility, chemical-shift and dynamic values: the ADC in
    10^-6 mm^2/s, drops and phase enhancement as percent, the fat fraction, the flags as
    yes / no and the curve type. An unreliable flag (a mismatched pair) is left out."""
    measurements: list[Dataset] = []
    evaluations: list[Dataset] = []

    def flag(name: str, value: Any) -> None:
        if value is not None:
            evaluations.append(
                sr_content.code_content(
                    FAMILY_FLAGS[name], _yes_no(bool(value)), sr_content.CONTAINS
                )
            )

    diffusion = lesion.get("diffusion") or {}
    if diffusion.get("adc_1e-6_mm2_s") is not None:
        measurements.append(
            sr_content.measurement(
                ADC,
                float(diffusion["adc_1e-6_mm2_s"]),
                UNIT_ADC,
                derivation=MEDIAN,
                method=role_method("ADC"),
            )
        )
    flag("restricted", diffusion.get("restricted"))
    flag("shine_through", diffusion.get("shine_through"))
    for key, name, concept in (
        ("susceptibility", "blooming", SUSCEPTIBILITY_DROP),
        ("chemical_shift", "microscopic_fat", CHEMICAL_SHIFT_DROP),
    ):
        pair = lesion.get(key) or {}
        if pair.get("drop_percent") is not None:
            measurements.append(
                sr_content.measurement(
                    concept,
                    float(pair["drop_percent"]),
                    UNIT_PERCENT,
                    method=private(
                        f"PAIR-{key.upper().replace('_', '-')}",
                        f"{pair.get('to')} against {pair.get('from')}",
                    ),
                )
            )
        if pair.get("reliable") is not False:
            flag(name, pair.get(name))
    cs = lesion.get("chemical_shift") or {}
    if cs.get("fat_fraction_percent") is not None:
        measurements.append(
            sr_content.measurement(
                FAT_FRACTION,
                float(cs["fat_fraction_percent"]),
                UNIT_PERCENT,
                method=private("DIXON", "100 F / (W + F) of the Dixon medians"),
            )
        )
    dynamic = lesion.get("dynamic") or {}
    for number, phase in enumerate(dynamic.get("phases") or [], start=1):
        if phase.get("percent") is None:
            continue
        delay = phase.get("delay_s")
        method = private(
            f"PHASE-{number}",
            f"Phase {number}" + (f" at {float(delay):g} s" if delay is not None else ""),
        )
        measurements.append(
            sr_content.measurement(
                PHASE_ENHANCEMENT, float(phase["percent"]), UNIT_PERCENT, method=method
            )
        )
        if delay is not None:
            measurements.append(
                sr_content.measurement(PHASE_DELAY, float(delay), UNIT_SECOND, method=method)
            )
    if dynamic.get("curve") in CURVE_CODES and dynamic.get("reliable") is not False:
        evaluations.append(
            sr_content.code_content(CURVE, CURVE_CODES[dynamic["curve"]], sr_content.CONTAINS)
        )
    return measurements, evaluations


def write_sr(path: Path, sr: hd.sr.Comprehensive3DSR) -> None:
    """Write the SR as a DICOM file (PS3.10, with file meta).

    The measurement groups are encoded by :func:`sr_content.encode_items`, byte for byte as
    pydicom would write them, when the document is in Explicit VR Little Endian with a simple
    character set; pydicom writes everything else (and the whole document otherwise).
    """
    (_with_groups_encoded(sr) or sr).save_as(path, enforce_file_format=True)


def _with_groups_encoded(sr: Dataset) -> Dataset | None:
    """A stand-in for ``sr`` to write, sharing its elements, whose Imaging Measurements
    container holds its Content Sequence already encoded (a raw element, which pydicom writes
    as it is); None when the groups are left to pydicom. ``sr`` itself is not changed.

    pydicom's writer resolves ambiguous VRs over the whole tree below any dataset it did not
    read in the file's transfer syntax, and that walk would decode the raw element again: the
    stand-in root and container are marked as read in Explicit VR Little Endian, which is
    true of what they hold only when no element at their own level has an ambiguous VR
    (checked; every other item is still walked by pydicom as it is written).
    """
    meta = getattr(sr, "file_meta", None)
    if meta is None or meta.get("TransferSyntaxUID") != ExplicitVRLittleEndian:
        return None
    declared = sr.get("SpecificCharacterSet")
    charset = convert_encodings(declared) if declared else default_encoding
    names = [charset] if isinstance(charset, str) else list(charset)
    if len(names) != 1 or names[0] in custom_encoders:
        return None  # ISO 2022 code extensions: pydicom's encoder
    items = sr.get("ContentSequence")
    positions = [
        i
        for i, content in enumerate(items or ())
        if content.get("ValueType") == "CONTAINER"
        and content.ConceptNameCodeSequence[0].CodeValue == IMAGING_MEASUREMENTS.value
    ]
    if len(positions) != 1:
        return None
    container = items[positions[0]]
    if _CONTENT_SEQUENCE not in container or any(
        elem.VR in AMBIGUOUS_VR for ds in (sr, container) for elem in ds.elements()
    ):
        return None
    try:
        raw = sr_content.encode_items(container[_CONTENT_SEQUENCE].value, names[0])
    except sr_content.NotEncodable:
        return None
    encoded = Dataset()
    for elem in container.elements():
        if elem.tag != _CONTENT_SEQUENCE:
            encoded[elem.tag] = elem
    encoded[_CONTENT_SEQUENCE] = RawDataElement(
        BaseTag(_CONTENT_SEQUENCE), "SQ", len(raw), raw, 0, False, True
    )
    encoded.set_original_encoding(False, True, default_encoding)
    root = Dataset()
    for elem in sr.elements():
        if elem.tag != _CONTENT_SEQUENCE:
            root[elem.tag] = elem
    root[_CONTENT_SEQUENCE] = DataElement(
        _CONTENT_SEQUENCE,
        "SQ",
        DicomSequence([encoded if i == positions[0] else c for i, c in enumerate(items)]),
    )
    root.set_original_encoding(False, True, charset)
    root.file_meta = meta
    root.preamble = getattr(sr, "preamble", None)
    return root

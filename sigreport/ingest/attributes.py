"""Attribute values of one header: the bottom of the ingest readers.

Both the classic reader (``header.py``) and the Enhanced MR reader (``enhanced.py``) build frame
records from these pieces: SOP class constants, the frame record and scaling types, the value
helpers (missing or malformed values are None, never an exception), the classic MR acquisition
values (PS3.3 C.8.3.1), study details and the orientation check. Nothing here imports another
ingest module, so the readers above can import each other's public functions freely.
"""

from __future__ import annotations

import math
import struct
from dataclasses import dataclass, replace
from functools import cache
from pathlib import Path
from typing import Any

from pydicom.datadict import dictionary_VR, tag_for_keyword
from pydicom.dataelem import RawDataElement
from pydicom.dataset import Dataset
from pydicom.valuerep import PersonName

from sigreport.model import Acquisition, StudyInfo

MR_IMAGE = "1.2.840.10008.5.1.4.1.1.4"
ENHANCED_MR = "1.2.840.10008.5.1.4.1.1.4.1"
LEGACY_ENHANCED_MR = "1.2.840.10008.5.1.4.1.1.4.4"
SECONDARY_CAPTURE = (
    "1.2.840.10008.5.1.4.1.1.7",
    "1.2.840.10008.5.1.4.1.1.7.1",
    "1.2.840.10008.5.1.4.1.1.7.2",
    "1.2.840.10008.5.1.4.1.1.7.3",
    "1.2.840.10008.5.1.4.1.1.7.4",
)
MULTIFRAME_CLASSES = (ENHANCED_MR, LEGACY_ENHANCED_MR)
IMAGE_CLASSES = (MR_IMAGE, *MULTIFRAME_CLASSES, *SECONDARY_CAPTURE)


PHILIPS_FP = "philips floating point"


class SkipFile(Exception):
    """Raised inside the reader with the one-line reason the file is skipped; the series it
    belongs to, when the header got that far (so messages can say "series 1 was skipped")."""

    def __init__(
        self,
        reason: str,
        *,
        series_number: int | None = None,
        series_instance_uid: str | None = None,
        description: str | None = None,
    ) -> None:
        super().__init__(reason)
        self.series_number = series_number
        self.series_instance_uid = series_instance_uid
        self.description = description


@dataclass(frozen=True)
class Scaling:
    """How one frame's stored values map to real-world values.

    ``lut`` (with ``lut_first``) is a Real World Value LUT (PS3.3 C.7.6.16.2.11); otherwise
    ``value = stored * slope + intercept``. ``source`` names where it came from.
    """

    slope: float = 1.0
    intercept: float = 0.0
    source: str = "none"  # "rescale", "pixel value transformation", "real world value mapping",
    # "philips floating point" (see ``philips_fp_scaling``)
    lut: tuple[float, ...] | None = None
    lut_first: int = 0
    # The vendor's private scale slope (Philips SS) when the frame carries one, whether or not
    # it was applied; the display rescale it was combined with (RS, RI) when it was.
    private_scale_slope: float | None = None

    def key(self) -> str:
        if self.lut is not None:
            return f"rwvm-lut:{self.lut_first}:{hash(self.lut)}"
        if self.source == PHILIPS_FP:
            # Floating-point values are the vendor's scale meant for comparing series (FP =
            # DV / (RS x SS), docs/ingestion.md): one key for every frame so scaled, whatever
            # its own RS and SS.
            return PHILIPS_FP
        return f"{self.source}:{self.slope!r}:{self.intercept!r}"


@dataclass(frozen=True)
class FrameRecord:
    """One 2D image (a single-frame file or one frame of a multi-frame file)."""

    path: Path
    frame: int | None  # 1-based, multi-frame files only
    sop_instance_uid: str
    sop_class_uid: str
    series_instance_uid: str
    series_number: int | None
    description: str
    modality: str
    frame_of_reference_uid: str | None
    study: StudyInfo
    rows: int
    columns: int
    position: tuple[float, float, float]
    orientation: tuple[float, float, float, float, float, float]
    pixel_spacing: tuple[float, float]  # (row spacing, column spacing), PS3.3 C.7.6.2.1.1
    instance_number: int | None
    acquisition_number: int | None
    acquisition: Acquisition
    scaling: Scaling
    stack_id: str | None = None  # Enhanced MR FrameContent StackID
    in_stack_position: int | None = None
    spacing_between_slices: float | None = None
    warnings: tuple[str, ...] = ()
    tile: int | None = None  # 0-based slice of a mosaic image (see mosaic.py), else None


# --------------------------------------------------------------------------------------------
# Value helpers: missing or malformed values are None, never an exception.


# Value representations whose raw bytes are plain ASCII (PS3.5 6.2): decoded here directly,
# which is several times faster than pydicom's general conversion (the scan reads ~60 values
# from each of thousands of files). Text VRs that depend on the character set (PN, LO, SH...)
# go through pydicom.
_ASCII_VRS = frozenset({"DS", "IS", "CS", "UI", "DA", "TM", "DT", "AS"})
_TEXT_VRS = frozenset({"LO", "SH", "PN", "ST", "LT", "UT", "UC"})
_BINARY_INT = {"US": ("H", 2), "SS": ("h", 2), "UL": ("I", 4), "SL": ("i", 4)}  # single values


@cache
def _tag(keyword: str) -> int | None:
    return tag_for_keyword(keyword)


@cache
def _dictionary_vr(tag: int) -> str | None:
    try:
        return dictionary_VR(tag)
    except KeyError:
        return None


_KEYWORD_TAGS: dict[str, int | None] = {}


def _get(ds: Dataset, keyword: str) -> Any:
    try:
        tag = _KEYWORD_TAGS[keyword]
    except KeyError:
        tag = _KEYWORD_TAGS[keyword] = tag_for_keyword(keyword)
    if tag is None:
        return None
    try:
        # The element as stored (raw until converted); Dataset._dict skips get_item's key
        # normalisation, a measurable cost at ~60 look-ups per file.
        store = getattr(ds, "_dict", None)
        element = store.get(tag) if store is not None else ds.get_item(tag)
        if element is None:
            return None
        if element.__class__ is RawDataElement:
            vr = element.VR or _dictionary_vr(tag)
            raw = element.value
            if vr in _ASCII_VRS or (vr in _TEXT_VRS and (not raw or raw.isascii())):
                # Pure ASCII text reads the same in every character set (PS3.5 6.1).
                text = raw.decode("latin-1").strip(" \x00") if raw else ""
                if not text:
                    return None
                if vr in _TEXT_VRS and vr in ("ST", "LT", "UT"):
                    return text
                return [t.strip() for t in text.split("\\")] if "\\" in text else text
            if vr in _BINARY_INT and raw is not None and len(raw) == _BINARY_INT[vr][1]:
                fmt = ("<" if element.is_little_endian else ">") + _BINARY_INT[vr][0]
                return struct.unpack(fmt, raw)[0]
        value = ds[tag].value
    except Exception:  # a malformed element whose value cannot be converted
        return None
    if value is None or value == "":
        return None
    return value


def _float(ds: Dataset, keyword: str) -> float | None:
    value = _get(ds, keyword)
    if value is None:
        return None
    if (
        isinstance(value, list | tuple)
        or hasattr(value, "__getitem__")
        and not isinstance(value, str | bytes)
    ):
        if len(value) == 0:
            return None
        value = value[0]
    try:
        return float(value)
    except (TypeError, ValueError):
        return None


def _int(ds: Dataset, keyword: str) -> int | None:
    value = _float(ds, keyword)
    # NaN and infinities have no integer value (int() raises on them).
    return int(value) if value is not None and math.isfinite(value) else None


def _str(ds: Dataset, keyword: str) -> str | None:
    value = _get(ds, keyword)
    if value is None:
        return None
    if not isinstance(value, str | bytes | PersonName) and hasattr(value, "__iter__"):
        return "\\".join(str(v) for v in value)
    return str(value).strip() or None


def _strs(ds: Dataset, keyword: str) -> tuple[str, ...]:
    value = _get(ds, keyword)
    if value is None:
        return ()
    if isinstance(value, str):
        items = value.split("\\")
    elif hasattr(value, "__iter__") and not isinstance(value, bytes):
        items = [str(v) for v in value]
    else:
        items = [str(value)]
    return tuple(s.strip().upper() for s in items if str(s).strip())


def _floats(ds: Dataset, keyword: str, n: int) -> tuple[float, ...] | None:
    value = _get(ds, keyword)
    if value is None:
        return None
    if isinstance(value, str | bytes) or not hasattr(value, "__iter__"):
        value = [value]  # one value (a string is not a sequence of values)
    try:
        out = tuple(float(v) for v in value)
    except (TypeError, ValueError):
        return None
    return out if len(out) == n else None


def _first_item(ds: Dataset, keyword: str) -> Dataset | None:
    seq = _get(ds, keyword)
    if seq is None:
        return None
    try:
        return seq[0] if len(seq) > 0 else None
    except TypeError:
        return None


def study_info(ds: Dataset) -> StudyInfo:
    return StudyInfo(
        study_instance_uid=_str(ds, "StudyInstanceUID"),
        study_date=_str(ds, "StudyDate"),
        accession_number=_str(ds, "AccessionNumber"),
        patient_name=_str(ds, "PatientName"),
        patient_id=_str(ds, "PatientID"),
        patient_birth_date=_str(ds, "PatientBirthDate"),
        patient_sex=_str(ds, "PatientSex"),
        study_description=_str(ds, "StudyDescription"),
        study_id=_str(ds, "StudyID"),
        referring_physician_name=_str(ds, "ReferringPhysicianName"),
        study_time=_str(ds, "StudyTime"),
    )


def classic_b_value(ds: Dataset) -> float | None:
    """The b-value of a classic image: DiffusionBValue (0018,9087), else a vendor's private
    element checked against its private creator (common practice: Siemens (0019,xx0C) "SIEMENS
    MR HEADER", GE (0043,xx39) "GEMS_PARM_01" first value modulo 1e9, Philips (2001,xx03)
    "Philips Imaging DD 001")."""
    value = _float(ds, "DiffusionBValue")
    if value is not None:
        return value
    # Private blocks live in groups present in the data set; looking for a creator in an absent
    # group (most files) would only build and search an empty slice of the data set.
    groups = {tag >> 16 for tag in ds.keys()}
    for group, creator, offset, fix in (
        (0x0019, "SIEMENS MR HEADER", 0x0C, None),
        (0x0043, "GEMS_PARM_01", 0x39, "ge"),
        (0x2001, "Philips Imaging DD 001", 0x03, None),
    ):
        if group not in groups:
            continue
        try:
            element = ds.private_block(group, creator)[offset]
            raw = element.value
            if isinstance(raw, bytes):
                raw = raw.decode("ascii", "replace").strip("\0 ")
            if isinstance(raw, str):
                raw = raw.split("\\")[0]
            elif hasattr(raw, "__getitem__"):
                raw = raw[0]
            number = float(raw)
        except Exception:  # absent block or element, or a value that is not a number
            continue
        if fix == "ge":
            number = number % 1e9
        return number
    return None


def private_value(ds: Dataset, group: int, creator: str, offset: int) -> Any:
    """The value of private element (gggg,xxEE) of ``creator``, or None.

    The block byte xx is the one the data set reserved for ``creator`` with a private creator
    element (gggg,00xx) (PS3.5 7.8.1), found by pydicom's ``Dataset.private_block``: never a
    fixed (gggg,10EE), since a writer may reserve any block from 0x10 to 0xFF."""
    if not any(tag >> 16 == group for tag in ds.keys()):
        return None  # no element of the group: nothing to search
    try:
        value = ds.private_block(group, creator)[offset].value
    except Exception:  # no such block or element, or a value pydicom cannot convert
        return None
    return None if value is None or value == "" else value


def _first_number(value: Any) -> float | None:
    """The first number of a private value (DS text, FL / FD numbers, or bytes of text)."""
    if isinstance(value, bytes):
        value = value.decode("ascii", "replace").strip("\0 ")
    if isinstance(value, str):
        value = value.split("\\")[0]
    elif hasattr(value, "__getitem__"):
        if len(value) == 0:
            return None
        value = value[0]
    try:
        number = float(value)
    except (TypeError, ValueError):
        return None
    return number if math.isfinite(number) else None


# Private elements holding an inversion time (ms), by the private dictionaries available to us:
# "Philips Imaging DD 001" (2001,xx84) "Inversion Time" (pydicom's private dictionary and
# dicom3tools' dictionary, as `dcdump` names it); "Philips MR Imaging DD 001" (2005,xxA8)
# "Inversion Time" (dicom3tools' dictionary). No GE element is used: neither dictionary names
# an inversion time among the GEMS_ACQU_01, GEMS_PARM_01 or GEMS_RELA_01 elements (see
# docs/ingestion.md, Vendor value quirks).
VENDOR_TI_ELEMENTS: tuple[tuple[int, str, int], ...] = (
    (0x2001, "Philips Imaging DD 001", 0x84),
    (0x2005, "Philips MR Imaging DD 001", 0xA8),
)


def private_tags(group: int, offsets: tuple[int, ...], blocks: range) -> list[int]:
    """The private creator elements (gggg,00xx) and the elements (gggg,xxEE) of ``offsets`` for
    every block xx in ``blocks``: the tags a header-only read must keep so that
    ``private_value`` can find an element whichever block its creator reserved."""
    return [
        (group << 16) | element
        for block in blocks
        for element in (block, *((block << 8) | offset for offset in offsets))
    ]


# Blocks searched by the scan for the vendor elements read here (PS3.5 7.8.1 allows 0x10-0xFF;
# this vendor's files reserve a handful of blocks from 0x10 on, e.g. DD 001 to DD 005 at
# 0x10-0x14 in nibabel's philips_mprage.dcm.gz; 16 blocks keep the scan's tag list short).
PHILIPS_BLOCKS = range(0x10, 0x20)
# (2005,xx0D/0E/A8) of "Philips MR Imaging DD 001" and (2001,xx84) of "Philips Imaging DD 001"
# (see VENDOR_TI_ELEMENTS, philips_scale). The per-frame private item (2005,xx0F) of "... DD
# 005" lives inside the Per-frame Functional Groups, which are read whole; not listing it keeps
# a classic image's private sequences out of the scan (the fast path declines undefined-length
# sequences it is asked to keep).
PHILIPS_TAGS = private_tags(0x2005, (0x0D, 0x0E, 0xA8), PHILIPS_BLOCKS) + private_tags(
    0x2001, (0x84,), PHILIPS_BLOCKS
)


def vendor_inversion_time(ds: Dataset) -> tuple[float, str] | None:
    """A positive inversion time (ms) from a vendor's private element, with a phrase naming the
    element, or None. Zero means "no inversion" in these elements (a gradient echo without
    preparation writes 0), so it is not a time."""
    for group, creator, offset in VENDOR_TI_ELEMENTS:
        number = _first_number(private_value(ds, group, creator, offset))
        if number is not None and number > 0:
            return number, f"private ({group:04X},xx{offset:02X}) of '{creator}'"
    return None


def echo_time_values(ds: Dataset) -> tuple[float | None, tuple[float, ...]]:
    """EchoTime (0018,0081) and, when the element holds several values (VM 1 in PS3.3
    C.8.3.1, but some writers list every echo of the acquisition, or the echoes a combined
    image was made of), all of them.

    Returns ``(te, values)``: with one value, ``(te, ())``. With several, the image's own echo
    when EchoNumbers (0018,0086) n picks the n-th value of the list, else None (the role rules
    then judge the whole range, see ``roles``); ``values`` are the distinct values in the
    header's order."""
    raw = _get(ds, "EchoTime")
    if raw is None:
        return None, ()
    items = raw.split("\\") if isinstance(raw, str) else raw
    if isinstance(items, str | bytes) or not hasattr(items, "__iter__"):
        items = [items]
    values: list[float] = []
    for item in items:
        try:
            number = float(item)
        except (TypeError, ValueError):
            continue
        if math.isfinite(number) and number not in values:
            values.append(number)
    if not values:
        return None, ()
    if len(values) == 1:
        return values[0], ()
    echo = _int(ds, "EchoNumbers")
    if echo is not None and 1 <= echo <= len(values):
        return values[echo - 1], tuple(values)
    return None, tuple(values)


def philips_scale(item: Dataset) -> tuple[float | None, float | None]:
    """The Philips private scale slope SS and scale intercept of one data set (a classic image,
    or an Enhanced MR frame's private item): "Philips MR Imaging DD 001" (2005,xx0E) "Scale
    Slope" and (2005,xx0D) "Scale Intercept" (names from dicom3tools' private dictionary;
    nibabel's DICOM wrapper reads the same (2005,xx0E))."""
    slope = _first_number(private_value(item, 0x2005, "Philips MR Imaging DD 001", 0x0E))
    intercept = _first_number(private_value(item, 0x2005, "Philips MR Imaging DD 001", 0x0D))
    return slope, intercept


def philips_fp_scaling(display: Scaling, slope: float | None, intercept: float | None) -> Scaling:
    """The vendor's floating-point value (FP) scaling of a frame whose display scaling (the
    rescale RS, RI, or none) is ``display``: FP = DV / (RS x SS), DV = SV x RS + RI (nibabel's
    PAR/REC reader documents these two scalings, ``parrec.py``), so FP = SV / SS + RI / (RS x
    SS). Applied only when SS is a positive number and the scale intercept is absent or zero
    (no published formula uses a non-zero one); otherwise ``display`` is kept, carrying SS so
    the stack can say why. A Real World Value Mapping is never replaced (it wins, PS3.3
    C.7.6.16.2.11)."""
    if slope is None or display.source == "real world value mapping":
        return display
    if slope <= 0 or (intercept is not None and intercept != 0.0) or display.slope == 0:
        return replace(display, private_scale_slope=slope)
    return Scaling(
        slope=1.0 / slope,
        intercept=display.intercept / (display.slope * slope),
        source=PHILIPS_FP,
        private_scale_slope=slope,
    )


def _contrast_classic(ds: Dataset) -> str | None:
    agent = _str(ds, "ContrastBolusAgent")
    if agent:
        return agent
    item = _first_item(ds, "ContrastBolusAgentSequence")
    if item is not None:
        return _str(item, "CodeMeaning") or _str(item, "CodeValue") or "contrast agent"
    return None


def classic_acquisition(ds: Dataset) -> Acquisition:
    """The Acquisition of a classic MR image (PS3.3 C.8.3.1 MR Image Module).

    A missing InversionTime is read from the vendor's private element where a dictionary
    available to us names it (``vendor_inversion_time``); a multi-valued EchoTime keeps every
    value (``echo_time_values``)."""
    ti = _float(ds, "InversionTime")
    ti_source = None
    if ti is None:
        found = vendor_inversion_time(ds)
        if found is not None:
            ti, ti_source = found
    te, te_values = echo_time_values(ds)
    return Acquisition(
        repetition_time_ms=_float(ds, "RepetitionTime"),
        echo_time_ms=te,
        echo_times_in_image_ms=te_values,
        inversion_time_ms=ti,
        inversion_time_source=ti_source,
        flip_angle_deg=_float(ds, "FlipAngle"),
        scanning_sequence=_strs(ds, "ScanningSequence"),
        sequence_variant=_strs(ds, "SequenceVariant"),
        scan_options=_strs(ds, "ScanOptions"),
        sequence_name=_str(ds, "SequenceName"),
        mr_acquisition_type=_str(ds, "MRAcquisitionType"),
        magnetic_field_strength_t=_float(ds, "MagneticFieldStrength"),
        contrast_agent=_contrast_classic(ds),
        image_type=_strs(ds, "ImageType"),
        b_value=classic_b_value(ds),
        slice_thickness_mm=_float(ds, "SliceThickness"),
        echo_number=_int(ds, "EchoNumbers"),
        temporal_position=_int(ds, "TemporalPositionIdentifier"),
        **standard_contrast_fields(ds),
    )


def standard_contrast_fields(ds: Dataset) -> dict[str, Any]:
    """Attributes of the Enhanced MR modules that Legacy Converted and some classic images carry
    at the top level too (PS3.3 C.8.13.1, C.8.13.4), and the acquisition times (PS3.3 C.7.6.1,
    C.7.6.4): the keyword arguments of ``Acquisition`` they fill."""
    return {
        "acquisition_contrast": _upper(_str(ds, "AcquisitionContrast")),
        "complex_image_component": _upper(_str(ds, "ComplexImageComponent")),
        "spectrally_selected_excitation": _upper(_str(ds, "SpectrallySelectedExcitation")),
        "diffusion_directionality": _upper(_str(ds, "DiffusionDirectionality")),
        "acquisition_time_s": _first_not_none(
            seconds_of_day(_str(ds, "AcquisitionTime")),
            seconds_of_day(_str(ds, "AcquisitionDateTime")),
        ),
        "contrast_start_time_s": seconds_of_day(_str(ds, "ContrastBolusStartTime")),
    }


def _first_not_none(*values: float | None) -> float | None:
    return next((v for v in values if v is not None), None)


def _upper(value: str | None) -> str | None:
    return value.strip().upper() or None if value else None


def seconds_of_day(value: str | None) -> float | None:
    """Seconds after midnight of a TM (HHMMSS.FFFFFF, PS3.5 6.2) or DT (YYYYMMDDHHMMSS.FFFFFF)
    value; None when missing or malformed. A DT's date is dropped (dynamic phases are minutes
    apart within one day)."""
    if not value:
        return None
    text = value.strip().split("+")[0].split("-")[0]
    if len(text) >= 14 and text[:8].isdigit() and "." not in text[:14]:
        text = text[8:]  # DT: drop the date
    whole, _, fraction = text.partition(".")
    whole = whole.replace(":", "")  # ACR-NEMA style HH:MM:SS
    if not whole.isdigit() or len(whole) not in (2, 4, 6) or (fraction and not fraction.isdigit()):
        return None
    hours, minutes, secs = int(whole[:2]), int(whole[2:4] or 0), int(whole[4:6] or 0)
    if hours > 23 or minutes > 59 or secs > 60:
        return None
    return hours * 3600.0 + minutes * 60.0 + secs + (float(f"0.{fraction}") if fraction else 0.0)


def rwvm_scaling(item: Dataset) -> Scaling | None:
    """Scaling from one Real World Value Mapping item (PS3.3 C.7.6.16.2.11), or None."""
    lut = _get(item, "RealWorldValueLUTData")
    if lut is not None:
        first = _int(item, "RealWorldValueFirstValueMapped") or 0
        return Scaling(
            source="real world value mapping",
            lut=tuple(float(v) for v in lut),
            lut_first=first,
        )
    slope = _float(item, "RealWorldValueSlope")
    if slope is None:
        return None
    intercept = _float(item, "RealWorldValueIntercept") or 0.0
    return Scaling(slope=slope, intercept=intercept, source="real world value mapping")


def classic_scaling(ds: Dataset) -> Scaling:
    """RescaleSlope/Intercept, or a Real World Value Mapping, which takes precedence; the
    Philips floating-point scaling over the rescale when the private scale slope is present
    (``philips_fp_scaling``)."""
    item = _first_item(ds, "RealWorldValueMappingSequence")
    if item is not None:
        mapped = rwvm_scaling(item)
        if mapped is not None:
            return mapped
    slope = _float(ds, "RescaleSlope")
    intercept = _float(ds, "RescaleIntercept")
    display = Scaling()
    if slope is not None or intercept is not None:
        display = Scaling(
            slope=1.0 if slope is None else slope,
            intercept=0.0 if intercept is None else intercept,
            source="rescale",
        )
    return philips_fp_scaling(display, *philips_scale(ds))


def common_fields(ds: Dataset, series_uid: str) -> dict[str, Any]:
    return {
        "series_instance_uid": series_uid,
        "series_number": _int(ds, "SeriesNumber"),
        "description": _str(ds, "SeriesDescription") or "",
        "modality": (_str(ds, "Modality") or "MR").upper(),
        "frame_of_reference_uid": _str(ds, "FrameOfReferenceUID"),
        "study": study_info(ds),
        "instance_number": _int(ds, "InstanceNumber"),
        "acquisition_number": _int(ds, "AcquisitionNumber"),
    }


def check_orientation(orientation: tuple[float, ...], *, tol: float = 1e-3) -> None:
    """ImageOrientationPatient must be two orthogonal unit vectors (PS3.3 C.7.6.2.1.1)."""
    r, c = orientation[:3], orientation[3:]
    nr = sum(v * v for v in r) ** 0.5
    nc = sum(v * v for v in c) ** 0.5
    dot = sum(a * b for a, b in zip(r, c, strict=True))
    if abs(nr - 1) > 10 * tol or abs(nc - 1) > 10 * tol or abs(dot) > 10 * tol:
        raise SkipFile(
            f"ImageOrientationPatient (0020,0037) {list(orientation)} is not two orthogonal unit "
            f"vectors (norms {nr:.4f}, {nc:.4f}, dot {dot:.4f})"
        )

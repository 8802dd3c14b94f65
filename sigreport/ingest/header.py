"""Header-only reading of one file into per-frame records (classic and Enhanced MR).

A file is read up to its pixel data (``stop_before_pixels``); the pixel data element's tag and
length are then read from the same handle, so a missing or truncated pixel data element is found
without reading the pixels. Anything that makes a file unusable becomes a one-line reason.
"""

from __future__ import annotations

import math
import os
import struct
import warnings
from dataclasses import dataclass
from functools import cache
from pathlib import Path
from typing import Any

import pydicom
from pydicom.datadict import dictionary_VR, tag_for_keyword
from pydicom.dataelem import RawDataElement
from pydicom.dataset import Dataset
from pydicom.errors import InvalidDicomError
from pydicom.uid import UID, DeflatedExplicitVRLittleEndian
from pydicom.valuerep import PersonName

from sigreport import limits
from sigreport.ingest import checks
from sigreport.ingest.fastheader import read_header
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

_PIXEL_TAGS = {0x7FE00010, 0x7FE00008, 0x7FE00009}

# The top-level attributes the scan reads (dcmread's specific_tags: others are skipped, not
# parsed). Sequences are read whole, so functional-group contents need no listing.
_SCAN_KEYWORDS = (
    "SpecificCharacterSet", "ImageType", "SOPClassUID", "SOPInstanceUID", "StudyDate",
    "StudyTime", "AccessionNumber", "Modality", "ReferringPhysicianName", "StudyDescription",
    "SeriesDescription", "PatientName", "PatientID", "PatientBirthDate", "PatientSex",
    "ContrastBolusAgent", "ContrastBolusAgentSequence", "ScanningSequence", "SequenceVariant",
    "ScanOptions", "MRAcquisitionType", "SequenceName", "SliceThickness", "RepetitionTime",
    "EchoTime", "InversionTime", "EchoNumbers", "MagneticFieldStrength", "SpacingBetweenSlices",
    "FlipAngle", "DiffusionBValue", "PulseSequenceName", "EchoPulseSequence",
    "EchoPlanarPulseSequence", "Spoiling", "SteadyStatePulseSequence", "InversionRecovery",
    "SpectrallySelectedSuppression", "StudyInstanceUID", "SeriesInstanceUID", "StudyID",
    "SeriesNumber", "AcquisitionNumber", "InstanceNumber", "ImagePositionPatient",
    "ImageOrientationPatient", "FrameOfReferenceUID", "TemporalPositionIdentifier",
    "NumberOfFrames", "Rows", "Columns", "PixelSpacing", "RescaleIntercept", "RescaleSlope",
    "RealWorldValueMappingSequence", "SharedFunctionalGroupsSequence",
    "PerFrameFunctionalGroupsSequence", "BitsAllocated", "PixelRepresentation",
)  # fmt: skip
# Vendor b-value elements (see classic_b_value): private creators and elements of the first two
# private blocks, where these vendors put them (common practice; listing every block would make
# dcmread's per-call tag conversion dominate the scan).
_PRIVATE_TAGS = [
    (group << 16) | element
    for group, offset in ((0x0019, 0x0C), (0x0043, 0x39), (0x2001, 0x03))
    for block in (0x10, 0x11)
    for element in (block, (block << 8) | offset)
]
SCAN_TAGS = [tag_for_keyword(k) for k in _SCAN_KEYWORDS] + _PRIVATE_TAGS
_SCAN_TAG_SET = frozenset(t for t in SCAN_TAGS if t is not None)


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
    source: str = "none"  # "rescale", "pixel value transformation", "real world value mapping"
    lut: tuple[float, ...] | None = None
    lut_first: int = 0

    def key(self) -> str:
        if self.lut is not None:
            return f"rwvm-lut:{self.lut_first}:{hash(self.lut)}"
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


def _contrast_classic(ds: Dataset) -> str | None:
    agent = _str(ds, "ContrastBolusAgent")
    if agent:
        return agent
    item = _first_item(ds, "ContrastBolusAgentSequence")
    if item is not None:
        return _str(item, "CodeMeaning") or _str(item, "CodeValue") or "contrast agent"
    return None


def classic_acquisition(ds: Dataset) -> Acquisition:
    """The Acquisition of a classic MR image (PS3.3 C.8.3.1 MR Image Module)."""
    return Acquisition(
        repetition_time_ms=_float(ds, "RepetitionTime"),
        echo_time_ms=_float(ds, "EchoTime"),
        inversion_time_ms=_float(ds, "InversionTime"),
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
    )


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
    """RescaleSlope/Intercept, or a Real World Value Mapping, which takes precedence."""
    item = _first_item(ds, "RealWorldValueMappingSequence")
    if item is not None:
        mapped = rwvm_scaling(item)
        if mapped is not None:
            return mapped
    slope = _float(ds, "RescaleSlope")
    intercept = _float(ds, "RescaleIntercept")
    if slope is None and intercept is None:
        return Scaling()
    return Scaling(
        slope=1.0 if slope is None else slope,
        intercept=0.0 if intercept is None else intercept,
        source="rescale",
    )


# --------------------------------------------------------------------------------------------


def _pixel_element_status(fp: Any, ds: Dataset, file_size: int) -> str | None:
    """After ``dcmread(stop_before_pixels=True)`` the handle sits at the pixel data element (if
    any). Return None when it is present and complete, else the reason the file is unusable."""
    start = fp.tell()
    header = fp.read(12)
    if len(header) < 8:
        return "no pixel data"
    implicit_vr, little_endian = ds.original_encoding
    big = little_endian is False
    implicit = bool(implicit_vr)
    fmt = ">" if big else "<"
    group, element = struct.unpack(fmt + "HH", header[:4])
    tag = (group << 16) | element
    if tag not in _PIXEL_TAGS:
        return "no pixel data"
    if implicit:
        (length,) = struct.unpack(fmt + "I", header[4:8])
        header_len = 8
    else:
        vr = header[4:6]
        if vr in (b"OB", b"OW", b"OF", b"OD", b"OL", b"OV", b"UN", b"SQ", b"UT", b"UC", b"UR"):
            (length,) = struct.unpack(fmt + "I", header[8:12])
            header_len = 12
        else:
            (length,) = struct.unpack(fmt + "H", header[6:8])
            header_len = 8
    available = file_size - start - header_len
    if length == 0xFFFFFFFF:
        # Encapsulated: at least the Basic Offset Table item and one fragment must follow.
        if available < 16:
            return "truncated: encapsulated pixel data has no fragments"
        return checks.pixel_budget_reason(ds, declared_length=None, available=available)
    if available < length:
        return f"truncated: pixel data declares {length} bytes, file holds {max(available, 0)}"
    if length == 0:
        return "no pixel data (empty Pixel Data element)"
    return checks.pixel_budget_reason(ds, declared_length=length, available=available)


def read_dataset(path: Path, *, fast: bool = True) -> tuple[Dataset, str | None]:
    """Read a file's header; return the dataset and, when the file cannot be used for images,
    the reason (``"no pixel data"``, ``"truncated: ..."``). Raise ``SkipFile`` when the file is
    not DICOM or cannot be read.

    With ``fast`` (default) little-endian single-frame files are read by ``fastheader`` (the
    same raw elements as pydicom's reader, several times faster); anything else, and every file
    when ``fast`` is False, is read by ``pydicom.dcmread``.
    """
    try:
        # The type first: a FIFO or a device is never opened (it could block or never end).
        kind = checks.file_kind_reason(os.stat(path).st_mode)
        if kind is not None:
            raise SkipFile(kind)
        fp = open(path, "rb", opener=checks.nonblocking_opener)  # noqa: SIM115 - closed below
        info = os.fstat(fp.fileno())
    except PermissionError:
        raise SkipFile("unreadable: permission denied") from None
    except OSError as exc:
        raise SkipFile(f"unreadable: {exc.strerror or exc}") from None
    file_size = info.st_size
    kind = checks.file_kind_reason(info.st_mode)  # replaced between stat and open
    if kind is not None:
        fp.close()
        raise SkipFile(kind)
    with fp, warnings.catch_warnings():
        # The preamble and prefix (or a plausible data set start) before reading on.
        prefix = checks.prefix_reason(fp.read(132))
        if prefix is not None:
            raise SkipFile(prefix)
        fp.seek(0)
        # pydicom warns about recoverable header oddities; the scan reports only what matters.
        warnings.simplefilter("ignore")
        if fast:
            header = read_header(fp, file_size, _SCAN_TAG_SET)
            if header is not None and not _multiframe(header.dataset):
                fp.seek(file_size if header.pixel_offset is None else header.pixel_offset)
                try:
                    status = _pixel_element_status(fp, header.dataset, file_size)
                except (struct.error, OSError):
                    status = "truncated: the pixel data element header is incomplete"
                return header.dataset, status
            fp.seek(0)
        return _read_with_pydicom(fp, path, file_size)


def _read_with_pydicom(fp: Any, path: Path, file_size: int) -> tuple[Dataset, str | None]:
    try:
        ds: Dataset = pydicom.dcmread(
            fp,
            stop_before_pixels=True,
            specific_tags=SCAN_TAGS,  # type: ignore[arg-type]
        )
    except InvalidDicomError:
        ds = _read_without_preamble(fp)
    except (EOFError, struct.error):
        raise SkipFile("truncated: the header ends early") from None
    except Exception as exc:  # pydicom raises many types on corrupt input
        raise SkipFile(f"not readable as DICOM: {type(exc).__name__}: {exc}") from None
    ts = getattr(getattr(ds, "file_meta", None), "TransferSyntaxUID", None)
    if ts == DeflatedExplicitVRLittleEndian:
        # The handle points into the deflated stream: read the whole file instead, once its
        # inflated size is known to be bounded.
        fp.seek(0)
        inflated = _inflated_size(fp, limits.MAX_DEFLATED_BYTES)
        if inflated is None:
            raise SkipFile(
                "deflated data set inflates beyond the ceiling of "
                f"{limits.MAX_DEFLATED_BYTES} bytes (sigreport.limits)"
            )
        return _read_full_check(path)
    try:
        status = _pixel_element_status(fp, ds, file_size)
    except (struct.error, OSError):
        status = "truncated: the pixel data element header is incomplete"
    return ds, status


def _inflated_size(fp: Any, cap: int) -> int | None:
    """Bytes of a deflated file's data set once inflated (PS3.5 A.5: a raw deflate stream
    after the File Meta group), counted by inflating 1 MiB at a time and discarding; None as
    soon as the count passes ``cap``. A corrupt stream is left to pydicom's reader to report."""
    import zlib

    data = fp.read()
    inflater = zlib.decompressobj(-zlib.MAX_WBITS)
    total = 0
    pending: bytes = data[_meta_end(data) :]
    try:
        while pending and not inflater.eof:
            total += len(inflater.decompress(pending, 1 << 20))
            if total > cap:
                return None
            pending = inflater.unconsumed_tail
    except zlib.error:
        return total
    return total


def _meta_end(data: bytes) -> int:
    """Offset just past the File Meta group (0002) of a Part 10 file (PS3.10 7.1)."""
    pos = 132
    while pos + 8 <= len(data) and data[pos : pos + 2] == b"\x02\x00":
        vr = data[pos + 4 : pos + 6]
        if vr in (b"OB", b"OW", b"OF", b"SQ", b"UT", b"UN", b"UC", b"UR", b"OD", b"OL", b"OV"):
            pos += 12 + struct.unpack_from("<I", data, pos + 8)[0]
        else:
            pos += 8 + struct.unpack_from("<H", data, pos + 6)[0]
    return pos


def _multiframe(ds: Dataset) -> bool:
    """Enhanced MR files (functional groups) are left to pydicom's reader."""
    if _str(ds, "SOPClassUID") in MULTIFRAME_CLASSES:
        return True
    meta = getattr(ds, "file_meta", None)
    return meta is not None and _str(meta, "MediaStorageSOPClassUID") in MULTIFRAME_CLASSES


def _read_without_preamble(fp: Any) -> Dataset:
    """Files without the 128-byte preamble and DICM prefix (PS3.10 7.1 requires them, but old
    writers omit them): accept only when the forced read yields an SOP Class UID."""
    fp.seek(0)
    try:
        ds = pydicom.dcmread(
            fp,
            stop_before_pixels=True,
            force=True,
            specific_tags=SCAN_TAGS,  # type: ignore[arg-type]
        )
        sop = ds.get("SOPClassUID")
    except Exception:  # garbage read as DICOM
        raise SkipFile("not a DICOM file (no DICM prefix)") from None
    if not sop:
        raise SkipFile("not a DICOM file (no DICM prefix)")
    return ds


def _read_full_check(path: Path) -> tuple[Dataset, str | None]:
    try:
        ds = pydicom.dcmread(path)
    except Exception as exc:  # corrupt deflated stream
        raise SkipFile(f"truncated or corrupt deflated file: {exc}") from None
    if "PixelData" not in ds and "FloatPixelData" not in ds and "DoubleFloatPixelData" not in ds:
        return ds, "no pixel data"
    element = ds["PixelData"] if "PixelData" in ds else None
    encapsulated = element is not None and element.is_undefined_length
    length = len(element.value) if element is not None and element.value is not None else 0
    return ds, checks.pixel_budget_reason(
        ds, declared_length=None if encapsulated else length, available=length
    )


def read_frames(path: Path, *, fast: bool = True) -> list[FrameRecord]:
    """Read one file's header into frame records (``fast``: see ``read_dataset``).

    Raises
    ------
    SkipFile
        With a one-line reason when the file is not DICOM, unreadable, truncated, has no pixel
        data, is not an MR image, or lacks geometry.
    """
    ds, status = read_dataset(path, fast=fast)
    sop_class = _str(ds, "SOPClassUID") or _str(
        getattr(ds, "file_meta", Dataset()), "MediaStorageSOPClassUID"
    )
    modality = (_str(ds, "Modality") or "").upper()
    if not sop_class:
        raise SkipFile("no SOP Class UID (0008,0016): not a DICOM image")
    if modality and modality != "MR":
        raise SkipFile(f"modality {modality} ({UID(sop_class).name}), not MR")
    if sop_class not in IMAGE_CLASSES:
        raise SkipFile(f"{UID(sop_class).name} is not an MR image")
    if status is not None:
        raise SkipFile(status)
    series_uid = _str(ds, "SeriesInstanceUID")
    if series_uid is None:
        raise SkipFile("missing SeriesInstanceUID (0020,000E)")
    try:
        # Every reference to the image (the SR's evidence, key images) needs its UIDs.
        bad = checks.uid_reason(ds)
        if bad is not None:
            raise SkipFile(bad)
        sop_uid = _str(ds, "SOPInstanceUID")
        assert sop_uid is not None
        if sop_class in MULTIFRAME_CLASSES:
            from sigreport.ingest.enhanced import enhanced_frames

            records = enhanced_frames(path, ds, sop_uid, sop_class, series_uid)
        else:
            records = [classic_frame(path, ds, sop_uid, sop_class, series_uid)]
        charset = checks.charset_warning(ds)
        if charset is not None:
            from dataclasses import replace

            records = [replace(r, warnings=(*r.warnings, charset)) for r in records]
        return records
    except SkipFile as exc:
        raise SkipFile(
            str(exc),
            series_number=_int(ds, "SeriesNumber"),
            series_instance_uid=series_uid,
            description=_str(ds, "SeriesDescription"),
        ) from None


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


def _image_size(ds: Dataset) -> tuple[int, int]:
    rows, columns = _int(ds, "Rows"), _int(ds, "Columns")
    if not rows or not columns:
        raise SkipFile("missing Rows (0028,0010) or Columns (0028,0011)")
    return rows, columns


def classic_frame(
    path: Path, ds: Dataset, sop_uid: str, sop_class: str, series_uid: str
) -> FrameRecord:
    """The frame record of a single-frame image (geometry from PS3.3 C.7.6.2)."""
    rows, columns = _image_size(ds)
    position = _floats(ds, "ImagePositionPatient", 3)
    orientation = _floats(ds, "ImageOrientationPatient", 6)
    spacing = _floats(ds, "PixelSpacing", 2)
    if position is None or orientation is None or spacing is None:
        missing = [
            name
            for name, value in (
                ("ImagePositionPatient (0020,0032)", position),
                ("ImageOrientationPatient (0020,0037)", orientation),
                ("PixelSpacing (0028,0030)", spacing),
            )
            if value is None
        ]
        what = "screen capture" if sop_class in SECONDARY_CAPTURE else "image"
        raise SkipFile(f"{what} without geometry: missing or malformed {', '.join(missing)}")
    bad = checks.geometry_reason(
        position=position,
        orientation=orientation,
        spacing=spacing,
        slice_thickness=_float(ds, "SliceThickness"),
        spacing_between_slices=_float(ds, "SpacingBetweenSlices"),
    )
    if bad is not None:
        raise SkipFile(bad)
    check_orientation(orientation)
    if spacing[0] <= 0 or spacing[1] <= 0:
        raise SkipFile(f"PixelSpacing (0028,0030) must be positive, got {list(spacing)}")
    scaling = classic_scaling(ds)
    bad = checks.scaling_reason(scaling.slope, scaling.intercept, scaling.lut)
    if bad is not None:
        raise SkipFile(bad)
    return FrameRecord(
        path=path,
        frame=None,
        sop_instance_uid=sop_uid,
        sop_class_uid=sop_class,
        rows=rows,
        columns=columns,
        position=position,  # type: ignore[arg-type]
        orientation=orientation,  # type: ignore[arg-type]
        pixel_spacing=spacing,  # type: ignore[arg-type]
        acquisition=classic_acquisition(ds),
        scaling=scaling,
        spacing_between_slices=_float(ds, "SpacingBetweenSlices"),
        **common_fields(ds, series_uid),
    )


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

"""Header-only reading of one file into per-frame records (classic and Enhanced MR).

A file is read up to its pixel data (``stop_before_pixels``); the pixel data element's tag and
length are then read from the same handle, so a missing or truncated pixel data element is found
without reading the pixels. Anything that makes a file unusable becomes a one-line reason.
"""

from __future__ import annotations

import os
import struct
import warnings
from pathlib import Path
from typing import Any

import pydicom
from pydicom.datadict import tag_for_keyword
from pydicom.dataset import Dataset
from pydicom.errors import InvalidDicomError
from pydicom.uid import UID, DeflatedExplicitVRLittleEndian

# The value helpers and record types live in ``attributes`` (shared with ``enhanced``); the
# public ones are re-exported here (``__all__``) for the modules that read a header through us.
from sigreport.ingest.attributes import (
    ENHANCED_MR,
    IMAGE_CLASSES,
    LEGACY_ENHANCED_MR,
    MR_IMAGE,
    MULTIFRAME_CLASSES,
    SECONDARY_CAPTURE,
    FrameRecord,
    Scaling,
    SkipFile,
    _float,
    _floats,
    _int,
    _str,
    check_orientation,
    classic_acquisition,
    classic_scaling,
    common_fields,
)
from sigreport.ingest.enhanced import enhanced_frames
from sigreport.ingest.fastheader import read_header
from sigreport.ingest.mosaic import is_mosaic, mosaic_frames, with_csa_diffusion

__all__ = [
    "ENHANCED_MR",
    "IMAGE_CLASSES",
    "LEGACY_ENHANCED_MR",
    "MR_IMAGE",
    "MULTIFRAME_CLASSES",
    "SCAN_TAGS",
    "SECONDARY_CAPTURE",
    "FrameRecord",
    "Scaling",
    "SkipFile",
    "check_orientation",
    "classic_acquisition",
    "classic_frame",
    "classic_scaling",
    "read_dataset",
    "read_frames",
]

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
    "AcquisitionContrast", "ComplexImageComponent", "SpectrallySelectedExcitation",
    "DiffusionDirectionality", "AcquisitionTime", "AcquisitionDateTime", "ContrastBolusStartTime",
)  # fmt: skip
# Vendor b-value elements (see classic_b_value) and the CSA image header (0029,xx10) of mosaics
# (mosaic.py): private creators and elements of the first two private blocks, where these
# vendors put them (common practice; listing every block would make dcmread's per-call tag
# conversion dominate the scan).
_PRIVATE_TAGS = [
    (group << 16) | element
    for group, offset in ((0x0019, 0x0C), (0x0043, 0x39), (0x2001, 0x03), (0x0029, 0x10))
    for block in (0x10, 0x11)
    for element in (block, (block << 8) | offset)
]
SCAN_TAGS = [tag_for_keyword(k) for k in _SCAN_KEYWORDS] + _PRIVATE_TAGS
_SCAN_TAG_SET = frozenset(t for t in SCAN_TAGS if t is not None)


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
    if length == 0xFFFFFFFF:
        # Encapsulated: at least the Basic Offset Table item and one fragment must follow.
        if file_size - start - header_len < 16:
            return "truncated: encapsulated pixel data has no fragments"
        return None
    available = file_size - start - header_len
    if available < length:
        return f"truncated: pixel data declares {length} bytes, file holds {max(available, 0)}"
    if length == 0:
        return "no pixel data (empty Pixel Data element)"
    return None


def read_dataset(path: Path, *, fast: bool = True) -> tuple[Dataset, str | None]:
    """Read a file's header; return the dataset and, when the file cannot be used for images,
    the reason (``"no pixel data"``, ``"truncated: ..."``). Raise ``SkipFile`` when the file is
    not DICOM or cannot be read.

    With ``fast`` (default) little-endian single-frame files are read by ``fastheader`` (the
    same raw elements as pydicom's reader, several times faster); anything else, and every file
    when ``fast`` is False, is read by ``pydicom.dcmread``.
    """
    try:
        fp = open(path, "rb")  # noqa: SIM115 - closed below
        file_size = os.fstat(fp.fileno()).st_size
    except PermissionError:
        raise SkipFile("unreadable: permission denied") from None
    except OSError as exc:
        raise SkipFile(f"unreadable: {exc.strerror or exc}") from None
    with fp, warnings.catch_warnings():
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
        # The handle points into the deflated stream: read the whole file instead.
        return _read_full_check(path)
    try:
        status = _pixel_element_status(fp, ds, file_size)
    except (struct.error, OSError):
        status = "truncated: the pixel data element header is incomplete"
    return ds, status


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
    return ds, None


def read_frames(path: Path, *, fast: bool = True) -> list[FrameRecord]:
    """Read one file's header into frame records (``fast``: see ``read_dataset``).

    Raises
    ------
    SkipFile
        With a one-line reason when the file is not DICOM, unreadable, truncated, has no pixel
        data, is not an MR image, or lacks geometry.
    """
    ds, status = read_dataset(path, fast=fast)
    return frames_from_dataset(path, ds, status)


def frames_from_dataset(path: Path, ds: Dataset, status: str | None = None) -> list[FrameRecord]:
    """The frame records of a header already read (a file's, or an archive's metadata).

    ``path`` names the instance in records and skip reasons; ``status`` is why the pixel data
    are unusable (see ``read_dataset``), None when they are usable or not checked.

    Raises
    ------
    SkipFile
        As ``read_frames``.
    """
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
    sop_uid = _str(ds, "SOPInstanceUID") or f"file:{path}"
    if sop_class in MULTIFRAME_CLASSES:
        return enhanced_frames(path, ds, sop_uid, sop_class, series_uid)
    record = with_csa_diffusion(classic_frame(path, ds, sop_uid, sop_class, series_uid), ds)
    if is_mosaic(record.acquisition.image_type):
        return mosaic_frames(record, ds)
    return [record]


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
    check_orientation(orientation)
    if spacing[0] <= 0 or spacing[1] <= 0:
        raise SkipFile(f"PixelSpacing (0028,0030) must be positive, got {list(spacing)}")
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
        scaling=classic_scaling(ds),
        spacing_between_slices=_float(ds, "SpacingBetweenSlices"),
        **common_fields(ds, series_uid),
    )

"""Header-only reading of one file into per-frame records (classic and Enhanced MR).

A file is read up to its pixel data (``stop_before_pixels``); the pixel data element's tag and
length are then read from the same handle, so a missing or truncated pixel data element is found
without reading the pixels. Anything that makes a file unusable becomes a one-line reason.
"""

from __future__ import annotations

import os
import struct
import warnings
from dataclasses import replace
from pathlib import Path
from typing import Any

import pydicom
from pydicom.datadict import tag_for_keyword
from pydicom.dataset import Dataset
from pydicom.errors import InvalidDicomError
from pydicom.uid import UID, DeflatedExplicitVRLittleEndian

from sigreport import limits
from sigreport.ingest import checks

# The value helpers and record types live in ``attributes`` (shared with ``enhanced``); the
# public ones are re-exported here (``__all__``) for the modules that read a header through us.
from sigreport.ingest.attributes import (
    ENHANCED_MR,
    IMAGE_CLASSES,
    LEGACY_ENHANCED_MR,
    MR_IMAGE,
    MULTIFRAME_CLASSES,
    PHILIPS_TAGS,
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
SCAN_TAGS = [tag_for_keyword(k) for k in _SCAN_KEYWORDS] + sorted(
    set(_PRIVATE_TAGS) | set(PHILIPS_TAGS)
)
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
    try:
        # Every reference to the image (the SR's evidence, key images) needs its UIDs.
        bad = checks.uid_reason(ds)
        if bad is not None:
            raise SkipFile(bad)
        sop_uid = _str(ds, "SOPInstanceUID")
        assert sop_uid is not None
        if sop_class in MULTIFRAME_CLASSES:
            records = enhanced_frames(path, ds, sop_uid, sop_class, series_uid)
        else:
            record = with_csa_diffusion(classic_frame(path, ds, sop_uid, sop_class, series_uid), ds)
            records = (
                mosaic_frames(record, ds) if is_mosaic(record.acquisition.image_type) else [record]
            )
        charset = checks.charset_warning(ds)
        if charset is not None:
            records = [replace(r, warnings=(*r.warnings, charset)) for r in records]
        return records
    except SkipFile as exc:
        raise SkipFile(
            str(exc),
            series_number=_int(ds, "SeriesNumber"),
            series_instance_uid=series_uid,
            description=_str(ds, "SeriesDescription"),
        ) from None


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
    acquisition = classic_acquisition(ds)
    notes: tuple[str, ...] = ()
    if acquisition.echo_times_in_image_ms:
        shown = "\\".join(f"{v:g}" for v in acquisition.echo_times_in_image_ms)
        taken = (
            f"echo {acquisition.echo_number} ({acquisition.echo_time_ms:g} ms) taken by EchoNumbers"
            if acquisition.echo_time_ms is not None
            else "no EchoNumbers to pick one: the role must hold over the whole range"
        )
        notes = (f"EchoTime (0018,0081) holds several values ({shown} ms) in one image; {taken}",)
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
        warnings=notes,
        acquisition=acquisition,
        scaling=scaling,
        spacing_between_slices=_float(ds, "SpacingBetweenSlices"),
        **common_fields(ds, series_uid),
    )

"""Validation of what a file declares, before the reader trusts it.

Each function returns ``None`` when the value is usable, else the one-line reason the file is
skipped (the reader raises it as ``SkipFile``). Sizes are checked against the bytes the file
holds and against the ceilings of :mod:`sigreport.limits` before anything of that size is
allocated; geometry values must be finite numbers in a sane range (``nan <= 0`` is False, so a
plain sign test lets NaN through).
"""

from __future__ import annotations

import math
import os
import stat
from collections.abc import Sequence

from pydicom.dataset import Dataset

from sigreport import limits
from sigreport.ingest.attributes import _float, _get, _str

# VRs (PS3.5 6.2) a data set's first element may carry in Explicit VR.
_VRS = frozenset(
    b"AE AS AT CS DA DS DT FD FL IS LO LT OB OD OF OL OV OW PN SH SL SQ SS ST SV TM UC UI UL UN "
    b"UR US UT UV".split()
)
_FILE_KINDS = (
    (stat.S_ISDIR, "a folder"),
    (stat.S_ISFIFO, "a named pipe (FIFO)"),
    (stat.S_ISCHR, "a character device"),
    (stat.S_ISBLK, "a block device"),
    (stat.S_ISSOCK, "a socket"),
)


def file_kind_reason(mode: int) -> str | None:
    """None for a regular file, else why it is not opened (a FIFO or device would block the
    scan or read forever)."""
    if stat.S_ISREG(mode):
        return None
    kind = next((name for test, name in _FILE_KINDS if test(mode)), "not a regular file")
    return f"not a regular file: {kind}; only regular files are read"


def nonblocking_opener(path: str, flags: int) -> int:
    """``open(..., opener=...)``: O_NONBLOCK, so that a FIFO swapped in after the type check
    cannot block the open (regular files ignore the flag, POSIX open())."""
    return os.open(path, flags | getattr(os, "O_NONBLOCK", 0))


def prefix_reason(head: bytes) -> str | None:
    """Whether the first bytes of a file can start a DICOM file: the 128-byte preamble and
    ``DICM`` (PS3.10 7.1), or, for files written without them, a first element of group 0002
    (File Meta) or 0008 in either byte order with an Explicit VR or a plausible Implicit VR
    length. Anything else is refused before pydicom reads on (a forced read of a large file of
    another kind takes seconds)."""
    if len(head) >= 132 and head[128:132] == b"DICM":
        return None
    if len(head) >= 8:
        for order in ("little", "big"):
            group = int.from_bytes(head[0:2], order)  # type: ignore[arg-type]
            element = int.from_bytes(head[2:4], order)  # type: ignore[arg-type]
            if group not in (0x0002, 0x0008) or element > 0x1FFF:
                continue
            if head[4:6] in _VRS:
                return None
            length = int.from_bytes(head[4:8], order)  # type: ignore[arg-type]
            if length < 0x10000:
                return None
    return "not a DICOM file (no DICM prefix)"


def _number(ds: Dataset, keyword: str) -> float | None:

    return _float(ds, keyword)


def pixel_budget_reason(ds: Dataset, *, declared_length: int | None, available: int) -> str | None:
    """Check Rows x Columns x NumberOfFrames x BitsAllocated against the pixel data the file
    holds and against the ceilings, before any frame record or array is made.

    Parameters
    ----------
    ds
        The header (pixel data not read).
    declared_length
        The Pixel Data element's declared length, or None when it is encapsulated (undefined
        length, PS3.5 A.4).
    available
        Bytes of the file from the pixel data value to its end.
    """
    rows, columns = _number(ds, "Rows"), _number(ds, "Columns")
    frames = _number(ds, "NumberOfFrames")
    bits = _number(ds, "BitsAllocated")
    for name, value in (("Rows (0028,0010)", rows), ("Columns (0028,0011)", columns)):
        if value is None:
            return None  # reported as missing by the reader
        if not math.isfinite(value) or value != int(value) or value < 1:
            return f"{name} must be a positive integer, got {value:g}"
        if value > limits.MAX_IMAGE_SIDE:
            return (
                f"{name} {int(value)} exceeds the ceiling of {limits.MAX_IMAGE_SIDE} pixels per "
                "side (sigreport.limits)"
            )
    assert rows is not None and columns is not None
    if frames is None:
        n_frames = 1
    elif not math.isfinite(frames) or frames != int(frames) or frames < 1:
        return f"NumberOfFrames (0028,0008) must be a positive integer, got {frames:g}"
    else:
        n_frames = int(frames)
    if n_frames > limits.MAX_FRAMES_PER_FILE:
        return (
            f"NumberOfFrames (0028,0008) {n_frames} exceeds the ceiling of "
            f"{limits.MAX_FRAMES_PER_FILE} frames per file (sigreport.limits)"
        )
    if bits is None:
        bits = 16  # for the size check only; the decoder reports a missing value
    elif bits not in (1, 8, 16, 32, 64):
        return f"BitsAllocated (0028,0100) must be 1, 8, 16, 32 or 64, got {bits:g}"
    # SamplesPerPixel is at least 1, so this is the least the pixel data must hold.
    needed = (int(rows) * int(columns) * n_frames * int(bits) + 7) // 8
    if needed > limits.MAX_PIXEL_BYTES_PER_FILE:
        return (
            f"Rows x Columns x frames x bits declare {needed} bytes of pixels, above the "
            f"ceiling of {limits.MAX_PIXEL_BYTES_PER_FILE} bytes per file (sigreport.limits)"
        )
    if declared_length is not None:
        if declared_length < needed:
            return (
                f"pixel data holds {declared_length} bytes, Rows {int(rows)} x Columns "
                f"{int(columns)} x {n_frames} frame(s) x {int(bits)} bits need {needed}"
            )
    elif n_frames * 8 > available:
        # Encapsulated: every frame is at least one fragment, an 8-byte item header each
        # (PS3.5 A.4).
        return (
            f"encapsulated pixel data of {available} bytes cannot hold {n_frames} frames "
            "(each needs at least one 8-byte fragment item)"
        )
    return None


def _bad(values: Sequence[float] | None, *, lo: float, hi: float) -> bool:
    return values is not None and not all(math.isfinite(v) and lo <= v <= hi for v in values)


def geometry_reason(
    *,
    position: Sequence[float],
    orientation: Sequence[float],
    spacing: Sequence[float],
    slice_thickness: float | None = None,
    spacing_between_slices: float | None = None,
    where: str = "",
) -> str | None:
    """Finite values in a sane range for the geometry attributes (PS3.3 C.7.6.2.1.1): position
    within +-1e5 mm, orientation components within [-1, 1] (+-1e-3), spacings and thickness
    positive and within the ceilings of :mod:`sigreport.limits`."""
    big = limits.MAX_COORDINATE_MM
    checks = (
        ("ImagePositionPatient (0020,0032)", position, -big, big),
        ("ImageOrientationPatient (0020,0037)", orientation, -1.001, 1.001),
        ("PixelSpacing (0028,0030)", spacing, limits.MIN_SPACING_MM, limits.MAX_SPACING_MM),
        (
            "SliceThickness (0018,0050)",
            None if slice_thickness is None else (slice_thickness,),
            0.0,
            limits.MAX_SPACING_MM,
        ),
        (
            "SpacingBetweenSlices (0018,0088)",
            None if spacing_between_slices is None else (spacing_between_slices,),
            -limits.MAX_SPACING_MM,
            limits.MAX_SPACING_MM,
        ),
    )
    for name, values, lo, hi in checks:
        if _bad(values, lo=lo, hi=hi):
            shown = [float(v) for v in values or ()]
            what = (
                "must be finite numbers"
                if not all(math.isfinite(v) for v in shown)
                else f"must lie within [{lo:g}, {hi:g}]"
            )
            return f"{where}{name} {what}, got {shown}"
    return None


def scaling_reason(
    slope: float, intercept: float, lut: Sequence[float] | None = None
) -> str | None:
    """Rescale slope / intercept (PS3.3 C.7.6.16.2.9) and a Real World Value LUT must be
    finite: NaN or infinite factors would turn every voxel into NaN or inf."""
    if not (math.isfinite(slope) and math.isfinite(intercept)):
        return f"RescaleSlope / RescaleIntercept must be finite, got {slope!r} / {intercept!r}"
    if lut is not None and not all(math.isfinite(v) for v in lut):
        return "RealWorldValueLUTData holds values that are not finite"
    return None


def charset_warning(ds: Dataset) -> str | None:
    """A warning when SpecificCharacterSet (0008,0005) names a character set pydicom does not
    know (PS3.3 C.12.1.1.2 lists the defined terms): its text is decoded with pydicom's
    fallback (the default repertoire), so non-ASCII names may read wrong."""
    from pydicom.charset import python_encoding

    declared = _get(ds, "SpecificCharacterSet")
    if isinstance(declared, bytes):
        declared = declared.decode("latin-1")
    names = [declared] if isinstance(declared, str) else list(declared or [])
    unknown = [str(n).strip() for n in names if str(n).strip() not in python_encoding]
    if not unknown:
        return None
    return (
        f"SpecificCharacterSet {', '.join(repr(n) for n in unknown)} is not a known character "
        "set; text was decoded with the default repertoire and may read wrong"
    )


_UIDS = (
    ("StudyInstanceUID", "(0020,000D)", True),
    ("SeriesInstanceUID", "(0020,000E)", True),
    ("SOPInstanceUID", "(0008,0018)", True),
    ("FrameOfReferenceUID", "(0020,0052)", False),
)


def uid_reason(ds: Dataset) -> str | None:
    """The identifying UIDs a report and its SR reference: present (Type 1, PS3.3 C.7.2.1,
    C.7.3.1, C.12.1) and each one UID of digits and dots, at most 64 characters (PS3.5 9.1);
    FrameOfReferenceUID only when present."""

    for keyword, tag, required in _UIDS:
        value = _str(ds, keyword)
        if value is None:
            if required:
                return f"missing {keyword} {tag}"
            continue
        if len(value) > 64 or not all(c.isdigit() or c == "." for c in value):
            shown = value if len(value) <= 80 else value[:77] + "..."
            return f"{keyword} {tag} is not a UID (digits and dots, at most 64): {shown!r}"
    return None

"""A small valid study, and hostile variants of it, built by code (no binary blobs).

``write_small_study`` writes one T1 spin-echo series (24 x 24 x 8, 2 mm voxels, a bright
square lesion) and a case file whose sphere ROIs lie on it: ``report --no-register`` on it takes
about a second. ``build_corpus`` writes a folder of hostile studies (huge declared sizes, frames
that do not exist, a FIFO, a device, NaN geometry, foreign slices, duplicate UIDs, a gzip
bomb mask, a case with 10,000 ROIs...), each with its case file, for the corpus test::

    from builders.hostile import write_small_study, build_corpus
"""

from __future__ import annotations

import gzip
import io
import os
import socket
import struct
import zlib
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pydicom
import SimpleITK as sitk
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.filewriter import write_file_meta_info
from pydicom.sequence import Sequence as DicomSequence
from pydicom.uid import ExplicitVRLittleEndian, generate_uid

from builders.dicom import (
    FRAME_OF_REFERENCE_UID,
    STUDY_UID,
    enhanced_dataset,
    save,
    write_classic_series,
)

T1_SPIN_ECHO = {
    "ScanningSequence": "SE",
    "SequenceVariant": "NONE",
    "RepetitionTime": "500",
    "EchoTime": "15",
    "MRAcquisitionType": "2D",
    "MagneticFieldStrength": "1.5",
}
SHAPE = (8, 24, 24)  # slices, rows, columns
SPACING = (2.0, 2.0, 2.0)
LESION_CENTER = (13.0, 13.0, 7.0)  # the centre of the bright square, LPS mm

CASE_TOML = """
[[roi]]
id = "L1"
kind = "lesion"
shape = "sphere"
center_mm = [13.0, 13.0, 7.0]
radius_mm = 4.0

[[roi]]
id = "R1"
kind = "reference"
tissue = "white matter"
shape = "sphere"
center_mm = [34.0, 34.0, 7.0]
radius_mm = 4.0
"""


def small_stored(seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    stored = rng.normal(500, 20, SHAPE).astype(np.int16)
    stored[:, 4:10, 4:10] += 400
    return stored


def write_small_study(
    root: Path,
    *,
    study_uid: str = STUDY_UID,
    for_uid: str = FRAME_OF_REFERENCE_UID,
    series_number: int = 1,
    folder: str = "s1",
    case_text: str = CASE_TOML,
    **kwargs: object,
) -> tuple[Path, Path]:
    """``root/study/<folder>`` (one T1 series) and ``root/case.toml``; returns both paths."""
    study = root / "study"
    write_classic_series(
        study / folder,
        small_stored(series_number),
        spacing=SPACING,
        series_number=series_number,
        description="T1 SE",
        study_uid=study_uid,
        for_uid=for_uid,
        extra=dict(T1_SPIN_ECHO),
        **kwargs,  # type: ignore[arg-type]
    )
    case = root / "case.toml"
    case.write_text(case_text)
    return study, case


def write_rtstruct(
    path: Path,
    *,
    frame_of_reference_uid: str,
    study_uid: str = STUDY_UID,
    center: tuple[float, float, float] = LESION_CENTER,
    half_mm: float = 3.0,
) -> Path:
    """A minimal RT Structure Set (PS3.3 A.19): one ROI "Lesion", square closed planar
    contours around ``center`` on three planes 2 mm apart."""
    ds = Dataset()
    ds.SOPClassUID = "1.2.840.10008.5.1.4.1.1.481.3"
    ds.SOPInstanceUID = generate_uid()
    ds.StudyInstanceUID = study_uid
    ds.SeriesInstanceUID = generate_uid()
    ds.Modality = "RTSTRUCT"
    ds.PatientName = "Test^Phantom"
    ds.PatientID = "TEST0001"
    ref = Dataset()
    ref.FrameOfReferenceUID = frame_of_reference_uid
    ds.ReferencedFrameOfReferenceSequence = DicomSequence([ref])
    roi = Dataset()
    roi.ROINumber = 1
    roi.ROIName = "Lesion"
    roi.ReferencedFrameOfReferenceUID = frame_of_reference_uid
    ds.StructureSetROISequence = DicomSequence([roi])
    contours = []
    x, y, z0 = center
    for dz in (-2.0, 0.0, 2.0):
        item = Dataset()
        item.ContourGeometricType = "CLOSED_PLANAR"
        points = [
            (x - half_mm, y - half_mm),
            (x + half_mm, y - half_mm),
            (x + half_mm, y + half_mm),
            (x - half_mm, y + half_mm),
        ]
        item.NumberOfContourPoints = len(points)
        item.ContourData = [v for px, py in points for v in (px, py, z0 + dz)]
        contours.append(item)
    roi_contour = Dataset()
    roi_contour.ReferencedROINumber = 1
    roi_contour.ContourSequence = DicomSequence(contours)
    ds.ROIContourSequence = DicomSequence([roi_contour])
    meta = FileMetaDataset()
    meta.MediaStorageSOPClassUID = ds.SOPClassUID
    meta.MediaStorageSOPInstanceUID = ds.SOPInstanceUID
    meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.file_meta = meta
    ds.save_as(path, enforce_file_format=True)
    return path


def mask_case(mask: Path) -> str:
    """The small study's case file with the lesion ROI drawn by a mask file."""
    return f"""
[[roi]]
id = "L1"
kind = "lesion"
shape = "mask"
mask = "{mask.name}"

[[roi]]
id = "R1"
kind = "reference"
tissue = "white matter"
shape = "sphere"
center_mm = [34.0, 34.0, 7.0]
radius_mm = 4.0
"""


# --------------------------------------------------------------------------------------------
# Hostile files


def _files(study: Path) -> list[Path]:
    return sorted(p for p in study.rglob("IM*") if p.is_file())


def mutate_all(study: Path, change: Callable[[Dataset], None]) -> None:
    """Apply ``change`` to every file of the study (read whole, written back)."""
    for path in _files(study):
        ds = pydicom.dcmread(path)
        change(ds)
        ds.save_as(path)


def huge_rows_file(path: Path, source: Path, rows: int = 40_000, columns: int = 40_000) -> Path:
    """A copy of the MR image ``source`` (a new instance of a new series) declaring
    ``rows x columns`` with 128 bytes of pixel data."""
    ds = pydicom.dcmread(source)
    ds.SOPInstanceUID = ds.file_meta.MediaStorageSOPInstanceUID = generate_uid()
    ds.SeriesInstanceUID = generate_uid()
    ds.Rows, ds.Columns = rows, columns
    ds.PixelData = b"\0" * 128
    ds.save_as(path)
    return path


def many_frames_file(path: Path, frames: int) -> Path:
    """An Enhanced MR file of 2 real frames whose NumberOfFrames says ``frames``."""
    ds = enhanced_dataset(small_stored()[:2], spacing=SPACING)
    ds.NumberOfFrames = frames
    ds.PerFrameFunctionalGroupsSequence = DicomSequence([])
    save(ds, path)
    return path


def sparse_file(path: Path, size: int = 64 * 1024**2, head: bytes = b"") -> Path:
    """A file of ``size`` bytes (sparse: nothing is written but ``head``)."""
    with open(path, "wb") as handle:
        handle.write(head)
        handle.truncate(size)
    return path


def deflate_bomb(path: Path, inflated: int = 300 * 1024**2) -> Path:
    """A Deflated Explicit VR Little Endian file (PS3.5 A.5) whose data set is one private OB
    element of ``inflated`` zero bytes: about 300 kB on disk."""
    meta = FileMetaDataset()
    meta.MediaStorageSOPClassUID = "1.2.840.10008.5.1.4.1.1.4"
    meta.MediaStorageSOPInstanceUID = generate_uid()
    meta.TransferSyntaxUID = "1.2.840.10008.1.2.1.99"
    meta.ImplementationClassUID = generate_uid()
    head = io.BytesIO()
    head.write(b"\0" * 128 + b"DICM")  # preamble and prefix (PS3.10 7.1)
    write_file_meta_info(head, meta, enforce_standard=True)
    path.write_bytes(head.getvalue())
    packer = zlib.compressobj(9, zlib.DEFLATED, -zlib.MAX_WBITS)
    with open(path, "ab") as handle:
        # (0009,0010) OB, undefined VR length field: explicit VR, 4-byte length (PS3.5 7.1.2).
        handle.write(packer.compress(struct.pack("<HH2sHI", 0x0009, 0x1010, b"OB", 0, inflated)))
        chunk = b"\0" * (1 << 20)
        for _ in range(inflated // len(chunk)):
            handle.write(packer.compress(chunk))
        handle.write(packer.flush())
    return path


def nifti_bomb(path: Path, *, declared: tuple[int, int, int] | None, padding: int = 0) -> Path:
    """A gzipped NIfTI-1 label image of 4 x 4 x 4 voxels written by SimpleITK, then with its
    header's dim[] (NIfTI-1 header offset 40, int16) set to ``declared`` and/or ``padding``
    zero bytes appended to the uncompressed stream (inflating far beyond the voxels)."""
    plain = path.with_suffix("").with_suffix(".nii")
    image = sitk.GetImageFromArray(np.ones((4, 4, 4), dtype=np.uint8))
    sitk.WriteImage(image, str(plain))
    data = bytearray(plain.read_bytes())
    plain.unlink()
    if declared is not None:
        struct.pack_into("<4h", data, 40, 3, *declared)
    with gzip.open(path, "wb", compresslevel=9) as out:
        out.write(bytes(data))
        chunk = b"\0" * (1 << 20)
        for _ in range(padding // len(chunk)):
            out.write(chunk)
    return path


def _case(root: Path, text: str = CASE_TOML) -> Path:
    case = root / "case.toml"
    case.write_text(text)
    return case


def build_corpus(folder: Path) -> dict[str, tuple[Path, Path]]:
    """Hostile studies under ``folder``: name -> (study folder, case file). Each is the small
    valid study with one thing made hostile (or a study of hostile files only)."""
    corpus: dict[str, tuple[Path, Path]] = {}

    def valid(name: str, **kwargs: object) -> tuple[Path, Path]:
        corpus[name] = write_small_study(folder / name, **kwargs)  # type: ignore[arg-type]
        return corpus[name]

    study, _ = valid("huge-rows")
    huge_rows_file(study / "big1", _files(study)[0], 40_000, 40_000)
    huge_rows_file(study / "big2", _files(study)[0], 65_535, 65_535)

    study, _ = valid("million-frames")
    many_frames_file(study / "mf6", 10**6)
    many_frames_file(study / "mf31", 2**31 - 1)

    study, _ = valid("special-files")
    if hasattr(os, "mkfifo"):
        os.mkfifo(study / "pipe")
    (study / "zero").symlink_to("/dev/zero")
    with socket.socket(socket.AF_UNIX) as sock:
        try:
            sock.bind(str(study / "sock"))
        except OSError:  # a path too long for a socket address: no socket in this corpus
            pass

    study, _ = valid("big-non-dicom")
    sparse_file(study / "video.bin", head=b"\x1a\x45\xdf\xa3 not dicom")
    sparse_file(study / "dicm.bin", head=b"\0" * 128 + b"DICM" + b"\xff" * 64)

    study, _ = valid("deflate-bomb")
    deflate_bomb(study / "deflated.dcm")

    study, _ = valid("nan-geometry")
    mutate_all(study, lambda ds: setattr(ds, "PixelSpacing", ["nan", "1"]))
    study, _ = valid("inf-slope")
    mutate_all(study, lambda ds: setattr(ds, "RescaleSlope", "inf"))
    study, _ = valid("no-sop-uid")
    mutate_all(study, lambda ds: delattr(ds, "SOPInstanceUID"))

    def charset(ds: Dataset) -> None:
        ds.SpecificCharacterSet = "ISO_IR 999"

    study, _ = valid("unknown-charset")
    mutate_all(study, charset)

    study, case = valid("two-studies")
    write_small_study(folder / "two-studies", study_uid="1.2.826.0.1.3680043.8.498.99", folder="s9",
                      series_number=9)  # fmt: skip

    study, _ = valid("foreign-slice")
    first = _files(study)[0]
    ds = pydicom.dcmread(first)
    ds.PatientID = "OTHER-PATIENT"
    ds.StudyInstanceUID = "1.2.826.0.1.3680043.8.498.98"
    ds.save_as(first)

    study, _ = valid("duplicate-uid")
    a, b = _files(study)[:2]
    ds = pydicom.dcmread(b)
    ds.SOPInstanceUID = pydicom.dcmread(a).SOPInstanceUID
    ds.save_as(b)

    root = folder / "gzip-bomb"
    study, _ = write_small_study(root)
    nifti_bomb(root / "big.nii.gz", declared=(1024, 1024, 1024))
    corpus["gzip-bomb"] = (study, _case(root, mask_case(root / "big.nii.gz")))
    root = folder / "gzip-padding"
    study, _ = write_small_study(root)
    nifti_bomb(root / "pad.nii.gz", declared=None, padding=64 * 1024**2)
    corpus["gzip-padding"] = (study, _case(root, mask_case(root / "pad.nii.gz")))

    root = folder / "rtstruct-other-frame"
    study, _ = write_small_study(root)
    write_rtstruct(root / "rt.dcm", frame_of_reference_uid="1.2.826.0.1.3680043.8.498.97")
    corpus["rtstruct-other-frame"] = (study, _case(root, mask_case(root / "rt.dcm")))

    root = folder / "many-rois"
    study, _ = write_small_study(root)
    many = "".join(
        f'[[roi]]\nid = "L{i}"\nkind = "lesion"\nshape = "sphere"\n'
        f"center_mm = [13.0, 13.0, 7.0]\nradius_mm = 4.0\n"
        for i in range(10_000)
    )
    corpus["many-rois"] = (study, _case(root, CASE_TOML + many))

    root = folder / "huge-roi"
    study, _ = write_small_study(root)
    corpus["huge-roi"] = (
        study,
        _case(root, CASE_TOML.replace("radius_mm = 4.0", "radius_mm = 1e9", 1)),
    )
    return corpus

"""Write small DICOM MR series for tests: classic single-frame series and Enhanced MR files.

Geometry follows DICOM PS3.3 C.7.6.2.1.1: ``direction`` is a 3x3 matrix whose columns are the
row direction (ImageOrientationPatient[:3]), the column direction (ImageOrientationPatient[3:])
and the slice normal; ``spacing`` is (column spacing, row spacing, slice spacing), so
PixelSpacing = [spacing[1], spacing[0]] (row spacing first) and slice k sits at
ImagePositionPatient = origin + k * spacing[2] * normal.

Reusable by every stage's tests::

    from builders.dicom import write_classic_series   # tests/ is on sys.path (pyproject.toml)
"""

from __future__ import annotations

import random
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.sequence import Sequence as DicomSequence
from pydicom.uid import (
    ExplicitVRLittleEndian,
    ImplicitVRLittleEndian,
    JPEGLosslessSV1,
    generate_uid,
)

MR_IMAGE = "1.2.840.10008.5.1.4.1.1.4"
ENHANCED_MR = "1.2.840.10008.5.1.4.1.1.4.1"
# The defaults: every series a test writes belongs to one study of one patient, in one frame of
# reference (a series belongs to one study, PS3.3 A.1.2.3; the Frame of Reference module is a
# series-level module), unless the test passes its own UIDs.
STUDY_UID = "1.2.826.0.1.3680043.8.498.77701"
FRAME_OF_REFERENCE_UID = "1.2.826.0.1.3680043.8.498.77702"


def rotation(axis: Sequence[float], degrees: float) -> np.ndarray:
    """Rotation matrix about ``axis`` (Rodrigues' formula)."""
    a = np.asarray(axis, float)
    a = a / np.linalg.norm(a)
    t = np.radians(degrees)
    k = np.array([[0, -a[2], a[1]], [a[2], 0, -a[0]], [-a[1], a[0], 0]])
    return np.eye(3) + np.sin(t) * k + (1 - np.cos(t)) * (k @ k)


AXIAL = np.eye(3)
# Coronal: rows run patient left (+x), columns run feet (-z), normal = row x col = +y.
CORONAL = np.array([[1.0, 0.0, 0.0], [0.0, 0.0, 1.0], [0.0, -1.0, 0.0]])
# Sagittal: rows run posterior (+y), columns run feet (-z), normal = row x col = -x.
SAGITTAL = np.array([[0.0, 0.0, -1.0], [1.0, 0.0, 0.0], [0.0, -1.0, 0.0]])


def _check_direction(direction: np.ndarray) -> np.ndarray:
    direction = np.asarray(direction, float)
    if not np.allclose(np.cross(direction[:, 0], direction[:, 1]), direction[:, 2], atol=1e-9):
        raise ValueError('Argument "direction" must have columns (row, column, row x column)')
    return direction


def _file_meta(sop_class: str, sop_uid: str, transfer_syntax: str) -> FileMetaDataset:
    meta = FileMetaDataset()
    meta.MediaStorageSOPClassUID = sop_class
    meta.MediaStorageSOPInstanceUID = sop_uid
    meta.TransferSyntaxUID = transfer_syntax
    meta.ImplementationClassUID = generate_uid()
    return meta


def _base(
    sop_class: str,
    *,
    study_uid: str,
    series_uid: str,
    for_uid: str,
    series_number: int,
    description: str,
    modality: str,
) -> Dataset:
    ds = Dataset()
    ds.SOPClassUID = sop_class
    ds.SOPInstanceUID = generate_uid()
    ds.StudyInstanceUID = study_uid
    ds.SeriesInstanceUID = series_uid
    ds.FrameOfReferenceUID = for_uid
    ds.Modality = modality
    ds.SeriesNumber = series_number
    ds.SeriesDescription = description
    ds.PatientName = "Test^Phantom"
    ds.PatientID = "TEST0001"
    ds.StudyDate = "20260101"
    ds.StudyTime = "120000"
    ds.AccessionNumber = "ACC1"
    ds.StudyID = "1"
    return ds


def _pixel_module(ds: Dataset, frame: np.ndarray) -> None:
    ds.SamplesPerPixel = 1
    ds.PhotometricInterpretation = "MONOCHROME2"
    ds.Rows, ds.Columns = int(frame.shape[-2]), int(frame.shape[-1])
    ds.BitsAllocated = 16
    ds.BitsStored = 16
    ds.HighBit = 15
    ds.PixelRepresentation = 1 if frame.dtype == np.int16 else 0
    ds.PixelData = np.ascontiguousarray(frame).tobytes()


def classic_slices(
    stored: np.ndarray,
    *,
    origin: Sequence[float] = (0.0, 0.0, 0.0),
    spacing: Sequence[float] = (1.0, 1.0, 1.0),
    direction: np.ndarray = AXIAL,
    positions: Sequence[Sequence[float]] | None = None,
    series_uid: str | None = None,
    study_uid: str | None = None,
    for_uid: str | None = None,
    series_number: int = 1,
    description: str = "",
    modality: str = "MR",
    rescale: tuple[float, float] | None = None,
    extra: dict[str, Any] | None = None,
) -> list[Dataset]:
    """Datasets of a classic MR series, slice k of ``stored`` (slices, rows, columns) at
    ``positions[k]`` or origin + k * spacing[2] * normal."""
    stored = np.asarray(stored)
    if stored.dtype not in (np.int16, np.uint16):
        raise ValueError(f'Argument "stored" must be int16 or uint16, got {stored.dtype}')
    direction = _check_direction(direction)
    series_uid = series_uid or generate_uid()
    study_uid = study_uid or STUDY_UID
    for_uid = for_uid or FRAME_OF_REFERENCE_UID
    normal = direction[:, 2]
    out = []
    for k in range(stored.shape[0]):
        ds = _base(
            MR_IMAGE,
            study_uid=study_uid,
            series_uid=series_uid,
            for_uid=for_uid,
            series_number=series_number,
            description=description,
            modality=modality,
        )
        if positions is not None:
            position = np.asarray(positions[k], float)
        else:
            position = np.asarray(origin, float) + k * spacing[2] * normal
        ds.ImagePositionPatient = [f"{v:.6f}" for v in position]
        ds.ImageOrientationPatient = [f"{v:.8f}" for v in (*direction[:, 0], *direction[:, 1])]
        ds.PixelSpacing = [f"{spacing[1]:g}", f"{spacing[0]:g}"]
        ds.SliceThickness = f"{spacing[2]:g}"
        ds.InstanceNumber = k + 1
        ds.ImageType = ["ORIGINAL", "PRIMARY", "M", "ND"]
        if rescale is not None:
            ds.RescaleSlope = f"{rescale[0]:g}"
            ds.RescaleIntercept = f"{rescale[1]:g}"
        for keyword, value in (extra or {}).items():
            setattr(ds, keyword, value)
        _pixel_module(ds, stored[k])
        out.append(ds)
    return out


def save(ds: Dataset, path: Path, transfer_syntax: str = ExplicitVRLittleEndian) -> Path:
    """Write ``ds`` with ``transfer_syntax`` (compressing with pydicom's encoders, or for JPEG
    Lossless SV1, which pydicom cannot encode, with GDCM through SimpleITK)."""
    ds.file_meta = _file_meta(str(ds.SOPClassUID), str(ds.SOPInstanceUID), ExplicitVRLittleEndian)
    if transfer_syntax in (ExplicitVRLittleEndian, ImplicitVRLittleEndian):
        ds.file_meta.TransferSyntaxUID = transfer_syntax
        ds.save_as(path, enforce_file_format=True,
                   implicit_vr=transfer_syntax == ImplicitVRLittleEndian)  # fmt: skip
        return path
    if transfer_syntax == JPEGLosslessSV1:
        _jpeg_lossless_sv1(ds)
    elif transfer_syntax == "1.2.840.10008.1.2.1.99":  # Deflated Explicit VR Little Endian
        ds.file_meta.TransferSyntaxUID = transfer_syntax
    else:
        ds.compress(transfer_syntax)
    ds.save_as(path, enforce_file_format=True)
    return path


def _jpeg_lossless_sv1(ds: Dataset) -> None:
    import tempfile

    import pydicom
    import SimpleITK as sitk

    frame = ds.pixel_array
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "jpeg.dcm"
        writer = sitk.ImageFileWriter()
        writer.SetFileName(str(out))
        writer.SetUseCompression(True)
        writer.SetCompressor("JPEG")
        writer.Execute(sitk.GetImageFromArray(frame[np.newaxis]))
        encoded = pydicom.dcmread(out)
    if encoded.file_meta.TransferSyntaxUID != JPEGLosslessSV1:
        raise RuntimeError(f"GDCM wrote {encoded.file_meta.TransferSyntaxUID}, not JPEG SV1")
    for keyword in ("BitsStored", "HighBit", "PixelRepresentation"):
        setattr(ds, keyword, getattr(encoded, keyword))
    ds.PixelData = encoded.PixelData
    ds["PixelData"].VR = "OB"
    ds["PixelData"].is_undefined_length = True
    ds.file_meta.TransferSyntaxUID = JPEGLosslessSV1


def write_classic_series(
    folder: Path,
    stored: np.ndarray,
    *,
    transfer_syntax: str = ExplicitVRLittleEndian,
    shuffle: bool = True,
    seed: int = 0,
    **kwargs: Any,
) -> list[Path]:
    """Write a classic MR series (see ``classic_slices`` for the geometry arguments) into
    ``folder``, one file per slice. With ``shuffle`` the file names and InstanceNumbers are a
    random permutation of the spatial order, so nothing but the positions gives the order."""
    folder.mkdir(parents=True, exist_ok=True)
    slices = classic_slices(stored, **kwargs)
    order = list(range(len(slices)))
    if shuffle:
        random.Random(seed).shuffle(order)
    paths = []
    for k, ds in enumerate(slices):
        ds.InstanceNumber = order[k] + 1
        name = f"IM{order[k]:04d}" if shuffle else f"IM{k:04d}"
        paths.append(save(ds, folder / f"{name}_{ds.SeriesNumber}", transfer_syntax))
    return paths


def _item(**attributes: Any) -> Dataset:
    item = Dataset()
    for keyword, value in attributes.items():
        setattr(item, keyword, value)
    return item


def _seq(**attributes: Any) -> DicomSequence:
    return DicomSequence([_item(**attributes)])


def enhanced_dataset(
    stored: np.ndarray,
    *,
    origin: Sequence[float] = (0.0, 0.0, 0.0),
    spacing: Sequence[float] = (1.0, 1.0, 1.0),
    direction: np.ndarray = AXIAL,
    frame_order: Sequence[int] | None = None,
    rescale: tuple[float, float] | None = None,
    per_frame_rescale: Sequence[tuple[float, float]] | None = None,
    rwvm: tuple[float, float] | None = None,
    timing: dict[str, Any] | None = None,
    echo_time: float | None = 90.0,
    modifier: dict[str, Any] | None = None,
    contrast: bool = False,
    b_value: float | None = None,
    pulse: dict[str, Any] | None = None,
    conflict_pixel_measures: bool = False,
    series_uid: str | None = None,
    description: str = "",
) -> Dataset:
    """An Enhanced MR Image (PS3.3 A.36.2) holding ``stored`` (slices, rows, columns).

    Slice k of ``stored`` is written as frame ``frame_order.index(k)`` (default: reversed), so
    the file's frame order differs from the spatial order. Orientation, pixel measures, timing
    and the Pixel Value Transformation (``rescale``) are shared; position, frame content, echo
    and (``per_frame_rescale``, ``rwvm``) scaling are per frame.
    """
    stored = np.asarray(stored)
    direction = _check_direction(direction)
    n = stored.shape[0]
    order = list(frame_order) if frame_order is not None else list(range(n))[::-1]
    ds = _base(
        ENHANCED_MR,
        study_uid=STUDY_UID,
        series_uid=series_uid or generate_uid(),
        for_uid=FRAME_OF_REFERENCE_UID,
        series_number=5,
        description=description,
        modality="MR",
    )
    ds.InstanceNumber = 1
    ds.ImageType = ["ORIGINAL", "PRIMARY", "M", "NONE"]
    ds.NumberOfFrames = n
    ds.MRAcquisitionType = "3D"
    ds.MagneticFieldStrength = 3
    for keyword, value in (pulse or {"EchoPulseSequence": "SPIN"}).items():
        setattr(ds, keyword, value)
    if contrast:
        ds.ContrastBolusAgentSequence = DicomSequence(
            [
                _item(
                    CodeValue="C-17800",
                    CodingSchemeDesignator="SRT",
                    CodeMeaning="Gadolinium",
                    ContrastBolusAgentNumber=1,
                )
            ]
        )
    shared = Dataset()
    shared.PixelMeasuresSequence = _seq(
        PixelSpacing=[spacing[1], spacing[0]], SliceThickness=spacing[2]
    )
    shared.PlaneOrientationSequence = _seq(
        ImageOrientationPatient=[*direction[:, 0], *direction[:, 1]]
    )
    shared.MRTimingAndRelatedParametersSequence = _seq(
        **(timing or {"RepetitionTime": 4000.0, "FlipAngle": 90.0})
    )
    if modifier is not None:
        shared.MRModifierSequence = _seq(**modifier)
    shared.MRImageFrameTypeSequence = _seq(FrameType=["ORIGINAL", "PRIMARY", "M", "NONE"])
    if rescale is not None:
        shared.PixelValueTransformationSequence = _seq(
            RescaleSlope=rescale[0], RescaleIntercept=rescale[1], RescaleType="US"
        )
    per_frame = []
    frames = np.empty_like(stored)
    for f in range(n):
        k = order[f]
        frames[f] = stored[k]
        item = Dataset()
        position = np.asarray(origin, float) + k * spacing[2] * direction[:, 2]
        item.PlanePositionSequence = _seq(ImagePositionPatient=[float(v) for v in position])
        item.FrameContentSequence = _seq(
            StackID="1", InStackPositionNumber=k + 1, DimensionIndexValues=[1, k + 1]
        )
        if echo_time is not None:
            item.MREchoSequence = _seq(EffectiveEchoTime=echo_time)
        if per_frame_rescale is not None:
            slope, intercept = per_frame_rescale[k]
            item.PixelValueTransformationSequence = _seq(
                RescaleSlope=slope, RescaleIntercept=intercept, RescaleType="US"
            )
        if rwvm is not None:
            item.RealWorldValueMappingSequence = _seq(
                RealWorldValueSlope=rwvm[0],
                RealWorldValueIntercept=rwvm[1],
                RealWorldValueFirstValueMapped=0,
                RealWorldValueLastValueMapped=65535,
                LUTLabel="T2MAP",
            )
        if contrast:
            item.ContrastBolusUsageSequence = _seq(
                ContrastBolusAgentNumber=1, ContrastBolusAgentAdministered="YES"
            )
        if b_value is not None:
            item.MRDiffusionSequence = _seq(
                DiffusionBValue=b_value, DiffusionDirectionality="ISOTROPIC"
            )
        if conflict_pixel_measures:
            item.PixelMeasuresSequence = _seq(PixelSpacing=[spacing[1], spacing[0]])
        per_frame.append(item)
    ds.SharedFunctionalGroupsSequence = DicomSequence([shared])
    ds.PerFrameFunctionalGroupsSequence = DicomSequence(per_frame)
    _pixel_module(ds, frames)
    return ds

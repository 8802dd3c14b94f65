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
    frame_type: dict[str, Any] | None = None,
    diffusion: dict[str, Any] | None = None,
) -> Dataset:
    """An Enhanced MR Image (PS3.3 A.36.2) holding ``stored`` (slices, rows, columns).

    Slice k of ``stored`` is written as frame ``frame_order.index(k)`` (default: reversed), so
    the file's frame order differs from the spatial order. Orientation, pixel measures, timing
    and the Pixel Value Transformation (``rescale``) are shared; position, frame content, echo
    and (``per_frame_rescale``, ``rwvm``) scaling are per frame. ``frame_type`` adds attributes
    to the shared MR Image Frame Type item (e.g. AcquisitionContrast, ComplexImageComponent,
    FrameType), ``diffusion`` to each MR Diffusion item.
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
    shared.MRImageFrameTypeSequence = _seq(
        **{"FrameType": ["ORIGINAL", "PRIMARY", "M", "NONE"], **(frame_type or {})}
    )
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
                **{"DiffusionBValue": b_value, "DiffusionDirectionality": "ISOTROPIC",
                   **(diffusion or {})}
            )  # fmt: skip
        if conflict_pixel_measures:
            item.PixelMeasuresSequence = _seq(PixelSpacing=[spacing[1], spacing[0]])
        per_frame.append(item)
    ds.SharedFunctionalGroupsSequence = DicomSequence([shared])
    ds.PerFrameFunctionalGroupsSequence = DicomSequence(per_frame)
    _pixel_module(ds, frames)
    return ds


# --------------------------------------------------------------------------------------------
# Siemens-style mosaics with a CSA image header


def csa2_header(tags: dict[str, tuple[str, Sequence[Any]]]) -> bytes:
    """A vendor CSA2 ("SV10") private header holding ``tags`` (name -> (VR, values)).

    The layout is the one nibabel's ``csareader.read`` parses: "SV10", 4 unused bytes, tag count
    and a check word, then per tag a 64-byte name, VM, 4-byte VR, SyngoDT, item count and a check
    word, then per item four int32 (the second is the item length) and the value, NUL-ended and
    padded to 4 bytes.
    """
    import struct

    out = [b"SV10", b"\x04\x03\x02\x01", struct.pack("<2I", len(tags), 77)]
    for name, (vr, values) in tags.items():
        out.append(
            struct.pack("<64si4s3i", name.encode(), len(values), vr.encode(), 0, len(values), 77)
        )
        for value in values:
            text = (f"{value:.8f}" if isinstance(value, float) else str(value)).encode() + b"\0"
            out.append(struct.pack("<4i", len(text), len(text), 77, len(text)))
            out.append(text + b"\0" * (-len(text) % 4))
    return b"".join(out)


def mosaic_dataset(
    volume: np.ndarray,
    *,
    origin: Sequence[float] = (0.0, 0.0, 0.0),
    spacing: Sequence[float] = (2.0, 2.0, 3.0),
    direction: np.ndarray = AXIAL,
    normal_sign: float = 1.0,
    csa: bool = True,
    n_in_csa: int | None = None,
    description: str = "ep2d_diff_mosaic",
    b_value: float | None = 1000.0,
    directionality: str | None = None,
    extra: dict[str, Any] | None = None,
) -> Dataset:
    """A classic MR image tiling ``volume`` (slices, rows, columns) in the vendor's mosaic layout.

    Slice k of ``volume`` lies at ``origin + k * spacing[2] * normal_sign * normal`` (normal =
    row x column), so ``normal_sign = -1`` writes the slices in descending order, as the CSA
    SliceNormalVector then says. The grid is ceil(sqrt(n)) tiles on a side, filled row by row;
    ImagePositionPatient is the top-left of the whole mosaic as if it were one image centred on
    the slice group (the vendor's convention, described in nibabel's documentation).
    """
    volume = np.asarray(volume)
    direction = _check_direction(direction)
    n, rows, cols = volume.shape
    grid = int(np.ceil(np.sqrt(n)))
    mosaic = np.zeros((grid * rows, grid * cols), dtype=volume.dtype)
    for k in range(n):
        r, c = divmod(k, grid)
        mosaic[r * rows : (r + 1) * rows, c * cols : (c + 1) * cols] = volume[k]
    row_dir, col_dir, normal = direction[:, 0], direction[:, 1], direction[:, 2]
    first = np.asarray(origin, float)
    ipp = (
        first
        - row_dir * spacing[0] * (grid * cols - cols) / 2.0
        - col_dir * spacing[1] * (grid * rows - rows) / 2.0
    )
    ds = _base(
        MR_IMAGE,
        study_uid=STUDY_UID,
        series_uid=generate_uid(),
        for_uid=FRAME_OF_REFERENCE_UID,
        series_number=7,
        description=description,
        modality="MR",
    )
    ds.Manufacturer = "SIEMENS"
    ds.ImageType = ["ORIGINAL", "PRIMARY", "DIFFUSION", "NONE", "ND", "MOSAIC"]
    ds.ScanningSequence = "EP"
    ds.SequenceVariant = ["SK", "SP"]
    ds.MRAcquisitionType = "2D"
    ds.RepetitionTime = "5000"
    ds.EchoTime = "90"
    ds.FlipAngle = "90"
    ds.MagneticFieldStrength = "3"
    ds.ImagePositionPatient = [f"{v:.6f}" for v in ipp]
    ds.ImageOrientationPatient = [f"{v:.8f}" for v in (*row_dir, *col_dir)]
    ds.PixelSpacing = [f"{spacing[1]:g}", f"{spacing[0]:g}"]
    ds.SliceThickness = f"{spacing[2]:g}"
    ds.SpacingBetweenSlices = f"{spacing[2]:g}"
    ds.InstanceNumber = 1
    ds.AcquisitionNumber = 1
    if b_value is not None:
        ds.DiffusionBValue = b_value
    if csa:
        tags: dict[str, tuple[str, Sequence[Any]]] = {
            "NumberOfImagesInMosaic": ("US", [n if n_in_csa is None else n_in_csa]),
            "SliceNormalVector": ("FD", [float(v) for v in normal_sign * normal]),
            # nibabel takes a CSA header for a mosaic only when this text is present too.
            "AcquisitionMatrixText": ("SH", [f"{rows}*{cols}"]),
        }
        if directionality is not None:
            tags["DiffusionDirectionality"] = ("CS", [directionality])
        block = ds.private_block(0x0029, "SIEMENS CSA HEADER", create=True)
        block.add_new(0x10, "OB", csa2_header(tags))
    for keyword, value in (extra or {}).items():
        setattr(ds, keyword, value)
    _pixel_module(ds, mosaic)
    return ds

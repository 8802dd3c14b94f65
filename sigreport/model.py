"""Plain data handed from one pipeline stage to the next.

    study index -> series roles -> volumes -> ROIs -> alignment -> measurements
                -> characterization -> report files

Every stage takes these frozen dataclasses (plus numpy arrays and SimpleITK images) and returns
new ones; nothing here does I/O. Enum values are the strings written to ``findings.json``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import StrEnum
from pathlib import Path
from typing import Any


class Role(StrEnum):
    """What a series shows, inferred from its acquisition physics (interface.md, Series roles)."""

    T1 = "T1"
    T2 = "T2"
    PD = "PD"
    FLAIR = "FLAIR"
    STIR = "STIR"
    T1FS = "T1FS"
    T2FS = "T2FS"
    T1POST = "T1POST"
    T1POSTFS = "T1POSTFS"
    DWI = "DWI"
    ADC = "ADC"
    T2STAR = "T2STAR"
    UNKNOWN = "UNKNOWN"


class Grade(StrEnum):
    HYPERINTENSE = "hyperintense"
    ISOINTENSE = "isointense"
    HYPOINTENSE = "hypointense"


class RoiKind(StrEnum):
    LESION = "lesion"
    REFERENCE = "reference"
    CONTROL = "control"


class EnhancementPattern(StrEnum):
    NONE = "none"
    SOLID = "solid"
    RIM = "rim"
    HETEROGENEOUS = "heterogeneous"


class QcLevel(StrEnum):
    INFO = "info"
    WARNING = "warning"
    ERROR = "error"


@dataclass(frozen=True)
class QcNote:
    """One finding about the study or the run itself; ``code`` is a stable kebab-case key."""

    level: QcLevel
    code: str
    message: str

    def to_json(self) -> dict[str, str]:
        return {"level": self.level.value, "code": self.code, "message": self.message}


# --------------------------------------------------------------------------------------------
# Study index (sigreport.ingest)


@dataclass(frozen=True)
class StudyInfo:
    """Study-level header values (taken from the first usable instance)."""

    study_instance_uid: str | None = None
    study_date: str | None = None
    accession_number: str | None = None
    patient_name: str | None = None
    patient_id: str | None = None
    patient_birth_date: str | None = None
    patient_sex: str | None = None
    study_description: str | None = None
    study_id: str | None = None
    referring_physician_name: str | None = None
    study_time: str | None = None


@dataclass(frozen=True)
class Acquisition:
    """The header values that role inference reads. ``None`` where the header is silent."""

    repetition_time_ms: float | None = None
    echo_time_ms: float | None = None
    inversion_time_ms: float | None = None
    flip_angle_deg: float | None = None
    scanning_sequence: tuple[str, ...] = ()  # (0018,0020), e.g. ("SE", "IR")
    sequence_variant: tuple[str, ...] = ()  # (0018,0021), e.g. ("SK", "SP", "MP")
    scan_options: tuple[str, ...] = ()  # (0018,0022), e.g. ("FS", "SAT_FAT")
    sequence_name: str | None = None  # (0018,0024)
    mr_acquisition_type: str | None = None  # "2D" / "3D"
    magnetic_field_strength_t: float | None = None
    contrast_agent: str | None = None  # ContrastBolusAgent or Enhanced MR contrast sequence
    image_type: tuple[str, ...] = ()
    b_value: float | None = None  # DiffusionBValue or vendor equivalent
    # Enhanced MR (PS3.3 C.8.13.5.x): "FAT", "WATER", "FAT_AND_WATER", "SILICON_GEL", "NONE"...
    spectrally_selected_suppression: str | None = None
    inversion_recovery: bool | None = None  # Enhanced MR InversionRecovery YES/NO
    echo_pulse_sequence: str | None = None  # Enhanced MR: SPIN / GRADIENT / BOTH
    slice_thickness_mm: float | None = None
    echo_number: int | None = None
    temporal_position: int | None = None


@dataclass(frozen=True)
class InstanceRef:
    """One 2D image of a stack: a single-frame file, or one frame of a multi-frame file."""

    path: Path
    sop_instance_uid: str
    sop_class_uid: str
    position_mm: tuple[float, float, float]  # ImagePositionPatient (LPS)
    frame: int | None = None  # 1-based frame number for multi-frame files, else None
    instance_number: int | None = None


@dataclass(frozen=True)
class Stack:
    """One geometrically regular stack of 2D images: a series, or a part of a split series.

    Geometry follows DICOM PS3.3 C.7.6.2.1.1: ``direction`` is the 3x3 matrix (row-major, as
    SimpleITK's ``SetDirection`` takes it) whose columns are the row direction, the column
    direction and the slice normal; ``spacing_mm`` is (column spacing along a row, row spacing,
    slice spacing from positions).
    """

    key: str  # unique in the study: the SeriesInstanceUID, plus "#<stack>" when split
    series_instance_uid: str
    series_number: int | None
    stack: str | None  # name of the stack when the series was split, else None
    description: str
    modality: str
    frame_of_reference_uid: str | None
    instances: tuple[InstanceRef, ...]  # sorted by position along the slice normal
    size: tuple[int, int, int]  # (columns, rows, slices)
    spacing_mm: tuple[float, float, float]
    origin_mm: tuple[float, float, float]
    direction: tuple[float, ...]  # 9 values
    acquisition: Acquisition
    warnings: tuple[str, ...] = ()
    role: Role = Role.UNKNOWN
    role_reason: str = "not inferred"
    confidence: float = 0.0
    role_source: str = "inferred"  # "inferred" or "case file"
    # Equal for two stacks whose stored values share one scaling to real-world values
    # (RescaleSlope/Intercept or Real World Value Mapping); None when frames differ.
    scaling_key: str | None = None

    @property
    def voxel_volume_mm3(self) -> float:
        sx, sy, sz = self.spacing_mm
        return sx * sy * sz

    @property
    def is_3d(self) -> bool:
        return (self.acquisition.mr_acquisition_type or "").upper() == "3D"


@dataclass(frozen=True)
class SkippedFile:
    """A file (or an unreadable folder) the index left out, and why; the series it belongs to
    when its header was read far enough to tell."""

    path: Path
    reason: str
    series_number: int | None = None
    series_instance_uid: str | None = None
    description: str | None = None


@dataclass(frozen=True)
class StudyIndex:
    study_dir: Path
    study: StudyInfo
    stacks: tuple[Stack, ...]
    skipped: tuple[SkippedFile, ...] = ()
    warnings: tuple[str, ...] = ()  # study-level problems (e.g. several StudyInstanceUIDs)


# --------------------------------------------------------------------------------------------
# Case file (sigreport.rois.case)


class RoiShape(StrEnum):
    SPHERE = "sphere"
    ELLIPSOID = "ellipsoid"
    BOX = "box"
    MASK = "mask"


@dataclass(frozen=True)
class RoiSpec:
    """One ``[[roi]]`` table of the case file, validated."""

    id: str
    kind: RoiKind
    shape: RoiShape
    site: str | None = None
    tissue: str | None = None
    center_mm: tuple[float, float, float] | None = None
    radius_mm: float | None = None
    semi_axes_mm: tuple[float, float, float] | None = None
    size_mm: tuple[float, float, float] | None = None
    mask: Path | None = None  # absolute path
    segment: str | int | None = None
    label: int | None = None  # label value in a label image (default: any non-zero)
    reference: str | None = None  # lesions: the reference ROI id (resolved to the first one)


@dataclass(frozen=True)
class Case:
    path: Path
    study: Path | None  # absolute, when the case file names one
    study_uid: str | None = None  # the StudyInstanceUID to read when the folder holds several
    roles: dict[Role, int | str] = field(default_factory=dict)
    register: bool | None = None
    anchor: str | None = None  # a role name or a series number / UID as text
    rois: tuple[RoiSpec, ...] = ()
    lexicon: Path | None = None  # a site lexicon folder, when the case file names one


# --------------------------------------------------------------------------------------------
# Alignment (sigreport.align)


@dataclass(frozen=True)
class Alignment:
    """How a series was brought into the anchor's patient space.

    ``transform`` maps points of the anchor's patient space to this series' patient space
    (SimpleITK's registration convention: fixed = anchor, moving = this series).
    """

    method: str  # "identity" (anchor, or --no-register), "rigid", "frame-of-reference"
    translation_mm: tuple[float, float, float] = (0.0, 0.0, 0.0)
    rotation_deg: float = 0.0
    metric: float | None = None
    transform: Any = None  # SimpleITK.Transform or None for identity
    warnings: tuple[str, ...] = ()
    # The full rigid transform, so findings.json can reproduce it: an anchor point p maps to
    # matrix (p - center_mm) + center_mm + translation_mm in this series.
    center_mm: tuple[float, float, float] | None = None
    matrix: tuple[float, ...] | None = None  # 3x3 row-major rotation

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "method": self.method,
            "translation_mm": [round(float(v), 3) for v in self.translation_mm],
            "rotation_deg": round(float(self.rotation_deg), 3),
        }
        if self.metric is not None:
            out["metric"] = round(float(self.metric), 5)
        if self.center_mm is not None and self.matrix is not None:
            out["center_mm"] = [round(float(v), 3) for v in self.center_mm]
            out["matrix"] = [round(float(v), 7) for v in self.matrix]
        return out


# --------------------------------------------------------------------------------------------
# Measurements (sigreport.measure)


@dataclass(frozen=True)
class RoiStats:
    """Robust statistics of an ROI on one series, on rescaled values (weighted where given)."""

    n_voxels: int
    mean: float
    median: float
    sd: float
    p05: float
    p95: float

    def to_json(self) -> dict[str, float | int]:
        return {
            "n_voxels": self.n_voxels,
            "mean": round(self.mean, 4),
            "median": round(self.median, 4),
            "sd": round(self.sd, 4),
            "p05": round(self.p05, 4),
            "p95": round(self.p95, 4),
        }


@dataclass(frozen=True)
class SeriesMeasurement:
    """One ROI measured on one series. ``stats`` is None when it could not be measured
    (``note`` says why: too few voxels, outside the field of view...)."""

    stats: RoiStats | None
    shell: RoiStats | None = None  # lesions: the outer shell of the ROI (enhancement pattern)
    core: RoiStats | None = None  # lesions: what is left inside the shell
    note: str | None = None


@dataclass(frozen=True)
class MeasuredRoi:
    spec: RoiSpec
    volume_ml: float | None
    max_diameter_mm: float | None
    by_role: dict[Role, SeriesMeasurement]  # roles present in the study and measured


@dataclass(frozen=True)
class MeasuredStudy:
    """Everything the characterization stage needs; the roles are those measured."""

    rois: tuple[MeasuredRoi, ...]
    stacks: dict[Role, Stack]  # the stack measured for each role
    noise_sigma: dict[Role, float | None]  # background noise (Gaussian sigma) per role


# --------------------------------------------------------------------------------------------
# Key images (pipeline -> sigreport.report)


@dataclass(frozen=True)
class KeySlice:
    """The central slice of a lesion on one series, for the report's key images.

    Arrays are 2D in the stored orientation of the series (rows x columns), rescaled values;
    outlines are boolean masks of the ROI voxels on that slice (the report draws their edges).
    """

    roi_id: str
    role: Role
    image: Any  # np.ndarray float32 (rows, columns)
    lesion_mask: Any  # np.ndarray bool (rows, columns)
    reference_mask: Any | None  # np.ndarray bool or None when the reference is not on the slice
    pixel_spacing_mm: tuple[float, float]  # (row spacing, column spacing)
    slice_index: int  # 0-based index along the stack
    sop_instance_uid: str | None = None

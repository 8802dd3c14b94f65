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
from typing import TYPE_CHECKING, Any, Protocol

if TYPE_CHECKING:  # types only: these modules build on this one
    from sigreport.lexicon_tables import Lexicon
    from sigreport.rois.propagate import RoiSample
    from sigreport.rois.space import Region


class Progress(Protocol):
    """How every stage reports progress: a message, and for a counted step how far it is.

    ``progress("indexing study", 12, 240)`` after the 12th of 240 files; ``progress("registering
    T2 to T1")`` for a step that is not counted. Messages may hold header values and paths: a
    display shows them as text, never as markup.
    """

    def __call__(self, message: str, done: int | None = None, total: int | None = None) -> None: ...


def say(
    progress: Progress | None, message: str, done: int | None = None, total: int | None = None
) -> None:
    """Call ``progress`` when there is one."""
    if progress is not None:
        progress(message, done, total)


class Role(StrEnum):
    """What a series shows, inferred from its acquisition physics (docs/usage.md, Series roles).

    Adding a role: a member here, its place in :data:`ROLE_ORDER`, its pairs (if any) in
    :data:`ENHANCEMENT_PAIRS` / :data:`SUPPRESSION_PAIRS`, its name in the lexicon's
    ``wording.toml [roles]``, and its inference in ``sigreport.ingest.roles`` (DEVELOPERS.md).
    The declaration order is the order characterization visits the roles in (its qc notes);
    reports and tables use :data:`ROLE_ORDER`.
    """

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
    # Version 2 roles (docs/ingestion.md, Roles): gradient-echo in-phase / opposed-phase
    # images, Dixon water / fat reconstructions, susceptibility-weighted magnitude.
    IP = "IP"
    OP = "OP"
    WATER = "WATER"
    FAT = "FAT"
    SWI = "SWI"
    UNKNOWN = "UNKNOWN"


#: Roles in the order a radiologist reads the series: the order of the report's table, plots and
#: key images, of the signal entries of findings.json, and the order in which series are chosen
#: for measurement. Every role appears once; UNKNOWN (never measured) is last.
ROLE_ORDER: tuple[Role, ...] = (
    Role.T1, Role.T1FS, Role.IP, Role.OP, Role.WATER, Role.FAT, Role.T2, Role.T2FS, Role.PD,
    Role.FLAIR, Role.STIR, Role.T2STAR, Role.SWI, Role.DWI, Role.ADC, Role.T1POST,
    Role.T1POSTFS, Role.UNKNOWN,
)  # fmt: skip

#: Pre -> post contrast pairs for enhancement; the first pair the study has gives the percent
#: (docs/usage.md, findings.json ``enhancement``).
ENHANCEMENT_PAIRS: tuple[tuple[Role, Role], ...] = (
    (Role.T1, Role.T1POST),
    (Role.T1FS, Role.T1POSTFS),
)

#: Unsuppressed -> suppressed pairs per suppression kind; the first pair the study has is used
#: (docs/usage.md, findings.json ``suppression``). STIR nulls every short-T1 tissue, so a fat
#: flag from a pair ending on STIR is not specific.
SUPPRESSION_PAIRS: dict[str, tuple[tuple[Role, Role], ...]] = {
    "fluid": ((Role.T2, Role.FLAIR),),
    "fat": (
        (Role.T1, Role.T1FS),
        (Role.T1POST, Role.T1POSTFS),
        (Role.T2, Role.T2FS),
        (Role.T2, Role.STIR),
    ),
}

#: Post-contrast roles and the pre-contrast role each is read against (dynamic phases; the pre
#: phase of a dynamic acquisition).
PRE_CONTRAST_OF: dict[Role, Role] = {Role.T1POST: Role.T1, Role.T1POSTFS: Role.T1FS}
#: Roles of fat-suppressed T1 images (a dynamic acquisition keeps its fat suppression).
FAT_SUPPRESSED_T1: tuple[Role, ...] = (Role.T1FS, Role.T1POSTFS)
#: The susceptibility-weighted series a T2 pair ends on, preferred first (SWI over T2*).
SUSCEPTIBILITY_TARGETS: tuple[Role, ...] = (Role.SWI, Role.T2STAR)
#: Roles measured but not graded against a reference: the Dixon water and fat images give the
#: fat fraction from the lesion's own medians (docs/measurements.md, chemical shift).
UNGRADED_ROLES: tuple[Role, ...] = (Role.WATER, Role.FAT)


def role_sort_key(role: str) -> tuple[int, str]:
    """Sort key putting role names in reading order (:data:`ROLE_ORDER`), unknown names last."""
    for i, known in enumerate(ROLE_ORDER):
        if known.value == role:
            return i, role
    return len(ROLE_ORDER), role


def first_pair(
    pairs: tuple[tuple[Role, Role], ...], roles: set[Role] | dict[Role, Any]
) -> tuple[Role, Role] | None:
    """The first of ``pairs`` whose two roles are both in ``roles``, else None."""
    for a, b in pairs:
        if a in roles and b in roles:
            return a, b
    return None


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
    # Enhanced MR standard attributes (PS3.3 C.8.13.1 / C.8.13.5): AcquisitionContrast
    # (0008,9209) e.g. "T1", "FLUID_ATTENUATED"; ComplexImageComponent (0008,9208) e.g.
    # "MAGNITUDE", "PHASE"; SpectrallySelectedExcitation (0018,9017) e.g. "WATER" (water
    # excitation suppresses fat); DiffusionDirectionality (0018,9075) or the vendor's
    # equivalent: "ISOTROPIC" (trace), "DIRECTIONAL", "BMATRIX", "NONE".
    acquisition_contrast: str | None = None
    complex_image_component: str | None = None
    spectrally_selected_excitation: str | None = None
    diffusion_directionality: str | None = None
    # Every distinct echo time of the series (ms, ascending), set when stacks are built: two
    # or more mean a multi-echo acquisition (in-phase / opposed-phase pairs, multi-echo T2*).
    series_echo_times_ms: tuple[float, ...] = ()
    # Seconds after midnight: the earliest AcquisitionTime (or Enhanced MR
    # FrameAcquisitionDateTime) of the stack's slices, and ContrastBolusStartTime (0018,1042).
    acquisition_time_s: float | None = None
    contrast_start_time_s: float | None = None
    # Where inversion_time_ms came from when not the standard attribute: a vendor's private
    # element or header (docs/ingestion.md, Vendor value quirks), e.g. "private (2001,xx84) of
    # 'Philips Imaging DD 001'"; None for the standard InversionTime / InversionTimes.
    inversion_time_source: str | None = None
    # Every distinct value of a multi-valued EchoTime in one image (ms, in the header's order);
    # empty for a single value. echo_time_ms is then the image's own echo (EchoNumbers picks
    # it) or None (a combined image: the role rules judge the whole range).
    echo_times_in_image_ms: tuple[float, ...] = ()


@dataclass(frozen=True)
class InstanceRef:
    """One 2D image of a stack: a single-frame file, or one frame of a multi-frame file."""

    path: Path
    sop_instance_uid: str
    sop_class_uid: str
    position_mm: tuple[float, float, float]  # ImagePositionPatient (LPS)
    frame: int | None = None  # 1-based frame number for multi-frame files, else None
    instance_number: int | None = None
    tile: int | None = None  # 0-based slice of a mosaic image (ingest/mosaic.py), else None


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
    confidence: float | None = None  # None for UNKNOWN: no role to be sure of
    role_source: str = "inferred"  # "inferred" or "case file"
    # Equal for two stacks whose stored values share one scaling to real-world values
    # (RescaleSlope/Intercept or Real World Value Mapping); None when frames differ.
    scaling_key: str | None = None
    # Dynamic post-contrast phases (ingest/dynamic.py): stacks of one dynamic acquisition share
    # ``dynamic_group``; ``dynamic_phase`` is 1..n by acquisition time among its post-contrast
    # stacks and ``dynamic_delay_s`` the seconds after the first post-contrast phase (None
    # when times are missing). All None for a stack outside a dynamic acquisition.
    dynamic_group: str | None = None
    dynamic_phase: int | None = None
    dynamic_delay_s: float | None = None

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
    SEED = "seed"  # one point; the lesion is grown from it on the anchor (docs/rois.md)


@dataclass(frozen=True)
class ViewerPosition:
    """Where a reader pointed in a viewer (case file ``at``, docs/rois.md).

    ``series`` is the SeriesNumber, ``image`` the InstanceNumber, ``row`` / ``column`` the
    0-based pixel row and column of that image (fractions allowed), ``frame`` the 1-based frame
    of a multi-frame file (None for single-frame files).
    """

    series: int
    image: int
    row: float
    column: float
    frame: int | None = None


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
    # or AUTO_REFERENCE: a mirror reference across the mid-sagittal plane (docs/rois.md)
    at: ViewerPosition | None = None  # instead of center_mm: a viewer position
    max_radius_mm: float | None = None  # seed: how far the grown region may reach


# A lesion's ``reference = "auto"``.
AUTO_REFERENCE = "auto"


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
    # Informational remarks for ``qc`` (e.g. the optimizer was skipped: already aligned).
    notes: tuple[str, ...] = ()
    # The full rigid transform, so findings.json can reproduce it: an anchor point p maps to
    # matrix (p - center_mm) + center_mm + translation_mm in this series.
    center_mm: tuple[float, float, float] | None = None
    matrix: tuple[float, ...] | None = None  # 3x3 row-major rotation
    # Largest displacement of the corners of the ROIs' box under the transform (mm); None
    # until the pipeline measures it (docs/findings.schema.json series[].alignment).
    displacement_mm: float | None = None

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "method": self.method,
            "translation_mm": [round(float(v), 3) for v in self.translation_mm],
            "rotation_deg": round(float(self.rotation_deg), 3),
        }
        if self.metric is not None:
            out["metric"] = round(float(self.metric), 5)
        if self.displacement_mm is not None:
            out["displacement_mm"] = round(float(self.displacement_mm), 3)
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
    """One ROI measured on every series. ``diameters_mm`` are (long, short, craniocaudal) in
    the patient's axial plane on the anchor's grid (docs/measurements.md, Size); None when the
    ROI has no voxel there."""

    spec: RoiSpec
    volume_ml: float | None
    max_diameter_mm: float | None
    by_role: dict[Role, SeriesMeasurement]  # roles present in the study and measured
    diameters_mm: tuple[float, float, float] | None = None
    # Dynamic post-contrast phases, keyed by the phase's Stack.key (the measured phase of a
    # role is in ``by_role`` too).
    by_phase: dict[str, SeriesMeasurement] = field(default_factory=dict)


@dataclass(frozen=True)
class MeasuredStudy:
    """Everything the characterization stage needs; the roles are those measured."""

    rois: tuple[MeasuredRoi, ...]
    stacks: dict[Role, Stack]  # the stack measured for each role
    noise_sigma: dict[Role, float | None]  # background noise (Gaussian sigma) per role
    # Post-contrast role -> every phase of its dynamic acquisition, by phase number (empty
    # without a dynamic acquisition); the measured stack of the role is one of them.
    phases: dict[Role, tuple[Stack, ...]] = field(default_factory=dict)


@dataclass(frozen=True)
class BehaviourPhrase:
    """A signal-behaviour rule that matched a lesion, in the lexicon's words (behaviour.toml):
    its stable ``key`` (findings.json ``behaviour``), its neutral ``phrase`` and the usual
    ``considerations`` (things to consider, never a diagnosis)."""

    key: str
    phrase: str
    considerations: tuple[str, ...] = ()
    references: tuple[str, ...] = ()  # the reference tissues the rule assumes (empty: any)


@dataclass(frozen=True)
class LesionPhrases:
    """The words characterization chose for one lesion, which the report only renders.

    ``grades`` maps a role name to the graded wording of the lesion on that series
    ("markedly hyperintense"); ``behaviour`` follows the order of findings.json ``behaviour``.
    """

    grades: dict[str, str] = field(default_factory=dict)
    behaviour: tuple[BehaviourPhrase, ...] = ()
    # Rules whose condition held but which assume another reference tissue (not applied).
    not_applied: tuple[BehaviourPhrase, ...] = ()


# --------------------------------------------------------------------------------------------
# Key images (sigreport.report.keyslices -> sigreport.report)


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
    # InstanceNumber (0020,0013) of the slice's image, the "image" number an archive viewer
    # shows; None when the header has none.
    instance_number: int | None = None
    # What the outlined ROI is: "lesion" (with its reference's outline beside it), or
    # "reference" / "control" (the ROI alone; reference_mask is then None).
    kind: str = "lesion"


# --------------------------------------------------------------------------------------------
# The job's stages (sigreport.pipeline): what each stage hands to the next


@dataclass(frozen=True)
class ReportPlan:
    """What to measure and how, decided before any pixel is read (``pipeline.plan_report``).

    ``index`` carries the case file's role overrides; ``measured`` is the one stack per role that
    is measured, in reading order; ``regions`` are the case file's ROIs in patient space, in
    case-file order; ``qc`` the notes the choices left (study warnings, shared or doubtful
    roles, skipped files); ``anchor_note`` says which series the ROIs are placed on, and why.
    """

    case: Case
    lexicon: Lexicon
    study_dir: Path
    index: StudyIndex
    measured: dict[Role, Stack]
    anchor_role: Role
    anchor_reason: str
    register: bool
    regions: tuple[Region, ...]
    qc: tuple[QcNote, ...] = ()
    anchor_note: QcNote | None = None
    viewer_keys: dict[str, str] = field(default_factory=dict)  # ROI id -> stack of its `at`
    roi_settings: Any = None  # lexicon/rois.toml (sigreport.rois.settings.RoiSettings)
    # Post-contrast role -> every phase of its dynamic acquisition, by phase number (the
    # measured stack of the role is one of them); empty without a dynamic acquisition.
    phases: dict[Role, tuple[Stack, ...]] = field(default_factory=dict)

    @property
    def anchor(self) -> Stack:
        """The stack the ROIs are defined against."""
        return self.measured[self.anchor_role]


@dataclass(frozen=True)
class AlignedStudy:
    """Each measured series' alignment to the anchor (``pipeline.align_series``), and the qc
    notes of registration (large motion, poor metric, another frame of reference)."""

    alignments: dict[Role, Alignment]
    qc: tuple[QcNote, ...] = ()
    # Dynamic phases other than the measured one of their role, keyed by Stack.key.
    phase_alignments: dict[str, Alignment] = field(default_factory=dict)


@dataclass(frozen=True)
class StudyMeasurement:
    """The measurement stage's output (``pipeline.measure_study``): every ROI measured on every
    series, the sampled voxels of each ROI on each series (keyed ``(roi id, role)``, for the key
    images) and the stage's qc notes (ROIs that overlap a lesion)."""

    study: MeasuredStudy
    samples: dict[tuple[str, Role], RoiSample]
    qc: tuple[QcNote, ...] = ()


@dataclass(frozen=True)
class SeriesJob:
    """One series a run aligns and measures (``pipeline.series_jobs``).

    ``key`` is the role of a measured series, or the ``Stack.key`` (a plain str) of a dynamic
    phase other than its role's measured one; ``name`` is how notes and progress call it.
    """

    key: Role | str
    stack: Stack
    role: Role
    name: str


@dataclass(frozen=True)
class MeasuredSeries:
    """What one series leaves once its pixels are released (``pipeline.measure_series``).

    ``rois`` holds each ROI measured on the series, by ROI id. For a measured series (not an
    extra dynamic phase) also: ``samples``, each ROI's voxels on its grid; ``noise_sigma``;
    ``sizes``, each ROI's (volume ml, largest diameter mm) when this is the finest series;
    ``diameters``, each ROI's axial (long, short, craniocaudal) mm when this is the anchor;
    ``key_slices``, the key slices it gives, by ROI id. ROIs without a voxel have no size,
    diameters or key slice.
    """

    key: Role | str
    rois: dict[str, SeriesMeasurement]
    samples: dict[str, RoiSample] = field(default_factory=dict)
    noise_sigma: float | None = None
    sizes: dict[str, tuple[float, float]] = field(default_factory=dict)
    diameters: dict[str, tuple[float, float, float]] = field(default_factory=dict)
    key_slices: dict[str, KeySlice] = field(default_factory=dict)


@dataclass(frozen=True)
class Analysis:
    """Everything the job concludes, before anything is written (``pipeline.analyze_case``).

    ``findings`` is the findings.json object; ``key_slices`` the key images' slices; ``phrases``
    the wording characterization chose per lesion id; ``stacks`` the measured stack per role.
    The intermediate stages' outputs are kept for callers that compare or re-use them; the
    series' pixels are not (they were released as the series streamed through).
    """

    findings: dict[str, Any]
    key_slices: tuple[KeySlice, ...]
    phrases: dict[str, LesionPhrases]
    plan: ReportPlan
    aligned: AlignedStudy
    measurement: StudyMeasurement
    files: dict[str, bytes] = field(default_factory=dict)  # OUTDIR-relative, e.g. rois/<id>.nii.gz

    @property
    def stacks(self) -> dict[Role, Stack]:
        """The stack measured for each role."""
        return self.plan.measured

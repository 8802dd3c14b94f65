"""A small MR study whose every value is known, for testing the job's stages one at a time.

Three axial classic series of one frame of reference (T1, T2 and FLAIR by their acquisition
settings, typical clinical protocols at 1.5 T, common practice), 40 x 40 pixels of 2 mm, 16
slices of 3 mm. Each holds piecewise-constant "tissue": a background of white matter, a lesion
ball and a reference ball, with values per series in :data:`VALUES`. The ROIs of the case file
sit well inside their balls, so every voxel an ROI samples has exactly its tissue's value and
every median and ratio is known exactly.

    from builders.study import write_study   # tests/ is on sys.path (pyproject.toml)
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from pydicom.uid import generate_uid

from builders.dicom import write_classic_series

SIZE = (40, 40, 16)  # columns, rows, slices
SPACING = (2.0, 2.0, 3.0)
ORIGIN = (-40.0, -40.0, -24.0)
LESION_CENTRE = (-12.0, -6.0, 0.0)
LESION_BALL_MM = 12.0  # radius of the lesion's tissue
LESION_ROI_MM = 6.0
REFERENCE_CENTRE = (14.0, 10.0, 3.0)
REFERENCE_BALL_MM = 12.0
REFERENCE_ROI_MM = 5.0

#: Stored values per series: (background, lesion, reference). The lesion is fluid-like: bright
#: on T2, dark on FLAIR and on T1 (common practice).
VALUES = {
    "T1": (700, 350, 1000),
    "T2": (500, 2000, 800),
    "FLAIR": (600, 160, 800),
}
#: Acquisition headers that make each series its role (typical protocols, common practice).
HEADERS = {
    "T1": {"RepetitionTime": "500", "EchoTime": "12", "ScanningSequence": "SE"},
    "T2": {"RepetitionTime": "4000", "EchoTime": "100", "ScanningSequence": "SE"},
    "FLAIR": {
        "RepetitionTime": "9000",
        "EchoTime": "120",
        "InversionTime": "2500",
        "ScanningSequence": ["SE", "IR"],
    },
}
SERIES_NUMBERS = {"T1": 2, "T2": 3, "FLAIR": 4}


def ratio(role: str) -> float:
    """The lesion's true ratio to the reference on ``role``."""
    _, lesion, reference = VALUES[role]
    return lesion / reference


@dataclass(frozen=True)
class WrittenStudy:
    study_dir: Path
    case_path: Path


def _volume(
    role: str,
    size: tuple[int, int, int] = SIZE,
    spacing: tuple[float, float, float] = SPACING,
    origin: tuple[float, float, float] = ORIGIN,
) -> np.ndarray:
    background, lesion, reference = VALUES[role]
    nx, ny, nz = size
    k, j, i = np.meshgrid(np.arange(nz), np.arange(ny), np.arange(nx), indexing="ij")
    # Axial slices, identity direction: patient point = origin + index * spacing (PS3.3
    # C.7.6.2.1.1).
    points = np.stack([i, j, k], axis=-1) * np.asarray(spacing) + np.asarray(origin)
    out = np.full((nz, ny, nx), background, dtype=np.int16)
    for centre, radius, value in (
        (LESION_CENTRE, LESION_BALL_MM, lesion),
        (REFERENCE_CENTRE, REFERENCE_BALL_MM, reference),
    ):
        inside = np.linalg.norm(points - np.asarray(centre), axis=-1) <= radius
        out[inside] = value
    return out


def write_study(
    root: Path,
    *,
    roles: tuple[str, ...] = ("T1", "T2", "FLAIR"),
    register: bool = False,
    slices: Mapping[str, tuple[int, float]] | None = None,
) -> WrittenStudy:
    """Write the study under ``root / "study"`` and its case file ``root / "case.toml"``.

    ``slices`` gives a role another stack: (number of slices, slice spacing mm) instead of 16
    of 3 mm, centred where the others are (e.g. a 1,000-slice series)."""
    study_dir = root / "study"
    study_uid, for_uid = generate_uid(), generate_uid()
    for role in roles:
        size, spacing, origin = SIZE, SPACING, ORIGIN
        if slices is not None and role in slices:
            count, step = slices[role]
            centre = ORIGIN[2] + (SIZE[2] - 1) * SPACING[2] / 2.0
            size = (SIZE[0], SIZE[1], count)
            spacing = (SPACING[0], SPACING[1], step)
            origin = (ORIGIN[0], ORIGIN[1], centre - (count - 1) * step / 2.0)
        write_classic_series(
            study_dir / role,
            _volume(role, size, spacing, origin),
            origin=origin,
            spacing=spacing,
            study_uid=study_uid,
            for_uid=for_uid,
            series_number=SERIES_NUMBERS[role],
            description=f"{role.lower()} [test] <b>",
            extra={
                "MRAcquisitionType": "2D",
                "MagneticFieldStrength": "1.5",
                "SequenceVariant": "NONE",
                # The Patient and Study modules' type 2 attributes the SR copies (PS3.3 C.7.1.1,
                # C.7.2.1).
                "PatientBirthDate": "19700101",
                "PatientSex": "O",
                "ReferringPhysicianName": "",
                "PositionReferenceIndicator": "",
                "Manufacturer": "test",
                **HEADERS[role],
            },
        )
    case = root / "case.toml"
    case.write_text(
        f"""study = "study"

[options]
register = {"true" if register else "false"}

[[roi]]
id = "L1"
kind = "lesion"
site = "left frontal"
shape = "sphere"
center_mm = {list(LESION_CENTRE)}
radius_mm = {LESION_ROI_MM}

[[roi]]
id = "R1"
kind = "reference"
tissue = "white matter"
shape = "sphere"
center_mm = {list(REFERENCE_CENTRE)}
radius_mm = {REFERENCE_ROI_MM}
""",
        encoding="utf-8",
    )
    return WrittenStudy(study_dir=study_dir, case_path=case)

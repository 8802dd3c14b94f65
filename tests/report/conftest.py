"""Fixtures for the report tests: a small classic MR study written with pydicom, the Stack
objects describing it, a complete findings dict for three lesions and numpy key slices."""

from __future__ import annotations

import copy
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.uid import ExplicitVRLittleEndian, MRImageStorage, generate_uid

from sigreport.model import Acquisition, InstanceRef, KeySlice, Role, Stack

XSS = "<script>alert(1)</script>"
ROLES = ("T1", "T1FS", "T2", "FLAIR", "T1POST")
SERIES_NUMBERS = {"T1": 2, "T1FS": 3, "T2": 4, "FLAIR": 5, "T1POST": 7}
DESCRIPTIONS = {
    "T1": "t1_se_tra",
    "T1FS": "t1_se_tra_fs",
    "T2": f"t2_tse_tra {XSS}",
    "FLAIR": "t2_flair_tra",
    "T1POST": "t1_se_tra_post",
}
ROWS = COLS = 64
N_SLICES = 3
SPACING = (0.9, 0.9, 5.0)
CENTRES = {"L1": (20, 20), "L2": (42, 42), "L3": (20, 44), "R1": (44, 18)}


def disk(centre: tuple[int, int], radius: float) -> np.ndarray:
    rr, cc = np.mgrid[0:ROWS, 0:COLS]
    return (rr - centre[0]) ** 2 + (cc - centre[1]) ** 2 <= radius**2


def _write_series(folder: Path, role: str, study_uid: str, frame_uid: str) -> Stack:
    """A classic MR Image Storage series of N_SLICES axial 64x64 slices (PS3.3 A.4)."""
    series_uid = generate_uid()
    rng = np.random.default_rng(SERIES_NUMBERS[role])
    refs = []
    for k in range(N_SLICES):
        ds = Dataset()
        ds.file_meta = FileMetaDataset()
        ds.file_meta.MediaStorageSOPClassUID = MRImageStorage
        sop_uid = generate_uid()
        ds.file_meta.MediaStorageSOPInstanceUID = sop_uid
        ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
        ds.SOPClassUID = MRImageStorage
        ds.SOPInstanceUID = sop_uid
        ds.PatientName = "Test^Report"
        ds.PatientID = "SIGRPT-001"
        ds.PatientBirthDate = "19700101"
        ds.PatientSex = "O"
        ds.StudyInstanceUID = study_uid
        ds.StudyDate = "20261201"
        ds.StudyTime = "101500"
        ds.StudyID = "1"
        ds.AccessionNumber = "ACC123"
        ds.ReferringPhysicianName = ""
        ds.Modality = "MR"
        ds.SeriesInstanceUID = series_uid
        ds.SeriesNumber = SERIES_NUMBERS[role]
        ds.SeriesDescription = DESCRIPTIONS[role]
        ds.InstanceNumber = k + 1
        ds.FrameOfReferenceUID = frame_uid
        ds.PositionReferenceIndicator = ""
        ds.Manufacturer = "test"
        ds.ImageType = ["ORIGINAL", "PRIMARY", "M", "ND"]
        ds.ScanningSequence = "SE"
        ds.SequenceVariant = "NONE"
        ds.ScanOptions = ""
        ds.MRAcquisitionType = "2D"
        ds.RepetitionTime = 500.0
        ds.EchoTime = 15.0
        ds.EchoTrainLength = 1
        ds.MagneticFieldStrength = 1.5
        ds.ImagePositionPatient = [0.0, 0.0, k * SPACING[2]]
        ds.ImageOrientationPatient = [1.0, 0.0, 0.0, 0.0, 1.0, 0.0]
        ds.PixelSpacing = [SPACING[1], SPACING[0]]
        ds.SliceThickness = SPACING[2]
        ds.SamplesPerPixel = 1
        ds.PhotometricInterpretation = "MONOCHROME2"
        ds.Rows, ds.Columns = ROWS, COLS
        ds.BitsAllocated = 16
        ds.BitsStored = 12
        ds.HighBit = 11
        ds.PixelRepresentation = 0
        ds.PixelData = rng.integers(0, 4000, (ROWS, COLS), dtype=np.uint16).tobytes()
        path = folder / f"{role}_{k}.dcm"
        ds.save_as(path, enforce_file_format=True)
        refs.append(
            InstanceRef(path, sop_uid, MRImageStorage, (0.0, 0.0, k * SPACING[2]), None, k + 1)
        )
    return Stack(
        key=series_uid,
        series_instance_uid=series_uid,
        series_number=SERIES_NUMBERS[role],
        stack=None,
        description=DESCRIPTIONS[role],
        modality="MR",
        frame_of_reference_uid=frame_uid,
        instances=tuple(refs),
        size=(COLS, ROWS, N_SLICES),
        spacing_mm=SPACING,
        origin_mm=(0.0, 0.0, 0.0),
        direction=(1.0, 0.0, 0.0, 0.0, 1.0, 0.0, 0.0, 0.0, 1.0),
        acquisition=Acquisition(repetition_time_ms=500.0, echo_time_ms=15.0),
        role=Role(role),
        role_reason="test fixture",
        confidence=1.0,
    )


@pytest.fixture(scope="session")
def study(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Stack]:
    folder = tmp_path_factory.mktemp("study")
    study_uid, frame_uid = generate_uid(), generate_uid()
    return {role: _write_series(folder, role, study_uid, frame_uid) for role in ROLES}


def _stats(median: float, ratio: float, grade: str, n: int = 80) -> dict[str, Any]:
    return {
        "n_voxels": n, "mean": median * 1.01, "median": median, "sd": median * 0.05,
        "p05": median * 0.9, "p95": median * 1.1, "ratio": ratio, "grade": grade,
    }  # fmt: skip


def make_findings(stacks: dict[str, Stack]) -> dict[str, Any]:
    """Three lesions: L1 cyst-like (bright on T2, suppresses on FLAIR), L2 fat (bright on T1,
    loses signal on T1FS, flag unreliable), L3 rim-enhancing with a hostile site text."""
    series = [
        {
            "role": role,
            "series_instance_uid": stacks[role].series_instance_uid,
            "series_number": SERIES_NUMBERS[role],
            "stack": None,
            "description": DESCRIPTIONS[role],
            "role_reason": "TR 500 ms, TE 15 ms, no inversion",
            "confidence": 0.9,
            "measured": True,
            "alignment": {"method": "identity", "translation_mm": [0, 0, 0], "rotation_deg": 0.0},
        }
        for role in ROLES
    ]
    series.append(
        {
            "role": "UNKNOWN", "series_instance_uid": "1.2.3.4", "series_number": 1,
            "stack": None, "description": "localizer", "role_reason": "localizer image type",
            "confidence": 1.0, "measured": False,
        }
    )  # fmt: skip
    return {
        "schema": "sigreport-findings/2",
        "tool": {"name": "sigreport", "version": "0.1.0"},
        "study": {
            "study_instance_uid": stacks["T1"].instances[0].sop_instance_uid,
            "study_date": "20261201",
            "accession_number": "ACC123",
        },
        "series": series,
        "rois": [
            {
                "id": "R1",
                "kind": "reference",
                "tissue": "white matter",
                "volume_ml": 0.52,
                "snr": {"T2": 40.0, "T1": 35.5},
            },
            {
                "id": "C1",
                "kind": "control",
                "tissue": "CSF",
                "volume_ml": 0.3,
                "drop_percent": 92.0,
            },
        ],  # fmt: skip
        "lesions": [
            {
                "id": "L1",
                "site": "right frontal white matter",
                "reference": "R1",
                "volume_ml": 0.9,
                "max_diameter_mm": 12.0,
                "signal": {
                    "T2": _stats(1900.0, 2.8, "hyperintense"),
                    "T1": _stats(300.0, 0.45, "hypointense"),
                    "FLAIR": _stats(210.0, 0.25, "hypointense"),
                    "T1FS": _stats(310.0, 0.5, "hypointense"),
                    "T1POST": _stats(305.0, 0.46, "hypointense"),
                },
                "enhancement": {
                    "pre": "T1",
                    "post": "T1POST",
                    "percent": 2.2,
                    "enhancing": False,
                    "pattern": "none",
                },
                "suppression": {
                    "fluid": {
                        "from": "T2",
                        "to": "FLAIR",
                        "drop_percent": 91.1,
                        "suppressed": True,
                        "reliable": True,
                    },
                    "fat": {"from": "T1", "to": "T1FS", "drop_percent": -11.1, "suppressed": False},
                },
                "flow_void": False,
                "behaviour": ["follows-fluid"],
            },
            {
                "id": "L2",
                "site": "left parietal scalp",
                "reference": "R1",
                "volume_ml": 1.25,
                "max_diameter_mm": 15.5,
                "signal": {
                    "T1": _stats(2500.0, 3.1, "hyperintense"),
                    "T1FS": _stats(400.0, 0.62, "hypointense"),
                    "T2": _stats(1500.0, 1.9, "hyperintense"),
                    "FLAIR": _stats(1300.0, 1.7, "hyperintense"),
                    "T1POST": None,
                },
                "enhancement": {
                    "pre": "T1",
                    "post": "T1POST",
                    "percent": None,
                    "enhancing": None,
                    "pattern": None,
                },
                "suppression": {
                    "fluid": {
                        "from": "T2",
                        "to": "FLAIR",
                        "drop_percent": 10.5,
                        "suppressed": False,
                    },
                    "fat": {
                        "from": "T1",
                        "to": "T1FS",
                        "drop_percent": 80.0,
                        "suppressed": True,
                        "reliable": False,
                    },
                },
                "flow_void": False,
                "behaviour": ["follows-fat"],
            },
            {
                "id": "L3",
                "site": f"left frontal {XSS} cortex",
                "reference": "R1",
                "volume_ml": 2.4,
                "max_diameter_mm": 19.0,
                "signal": {
                    "T1": _stats(700.0, 0.95, "isointense"),
                    "T1FS": _stats(690.0, 0.97, "isointense"),
                    "T2": _stats(1100.0, 1.5, "hyperintense"),
                    "FLAIR": _stats(1000.0, 1.45, "hyperintense"),
                    "T1POST": _stats(1250.0, 1.748, "hyperintense"),
                },
                "enhancement": {
                    "pre": "T1",
                    "post": "T1POST",
                    "percent": 84.0,
                    "raw_percent": 78.6,
                    "enhancing": True,
                    "pattern": "rim",
                },
                "suppression": {
                    "fluid": {
                        "from": "T2",
                        "to": "FLAIR",
                        "drop_percent": 3.3,
                        "suppressed": False,
                    },
                    "fat": None,
                },
                "flow_void": False,
                "behaviour": ["rim-enhancing"],
            },
        ],  # fmt: skip
        "qc": [
            {
                "level": "warning",
                "code": "fat-suppression-failed",
                "message": "fat control F1 did not drop on T1FS; fat flags are unreliable",
            },
            {
                "level": "info",
                "code": "role-second-series",
                "message": f"series 9 also looks like T2 {XSS}",
            },
        ],  # fmt: skip
        "cautions": [
            "Draft for review by the reporting radiologist; not a diagnosis.",
            "Signal grades, enhancement and suppression thresholds are defaults to be set by "
            "local practice.",
        ],
    }


@pytest.fixture
def findings(study: dict[str, Stack]) -> dict[str, Any]:
    return copy.deepcopy(make_findings(study))


def make_key_slices(stacks: dict[str, Stack]) -> list[KeySlice]:
    rng = np.random.default_rng(7)
    out = []
    reference = disk(CENTRES["R1"], 4)
    for lesion, radius in (("L1", 5), ("L2", 6), ("L3", 7)):
        mask = disk(CENTRES[lesion], radius)
        for role in ROLES:
            image = rng.normal(500.0, 40.0, (ROWS, COLS)).astype(np.float32)
            image[mask] += 800.0
            out.append(
                KeySlice(
                    roi_id=lesion,
                    role=Role(role),
                    image=image,
                    lesion_mask=mask,
                    reference_mask=reference,
                    pixel_spacing_mm=(SPACING[1], SPACING[0]),
                    slice_index=1,
                    sop_instance_uid=stacks[role].instances[1].sop_instance_uid,
                )
            )
    return out


@pytest.fixture(scope="session")
def key_slices(study: dict[str, Stack]) -> list[KeySlice]:
    return make_key_slices(study)


@pytest.fixture(scope="session")
def report_dir(tmp_path_factory: pytest.TempPathFactory, study, key_slices) -> Path:
    """One complete report written once for the read-only tests."""
    from sigreport.report import write_report

    out = tmp_path_factory.mktemp("out") / "report"
    write_report(out, make_findings(study), key_slices, study)
    return out

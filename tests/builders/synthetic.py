"""Synthetic studies for tests: build one from a scenario once per session and read it back
with SimpleITK's own series reader, and helpers that measure its ROIs independently of
sigreport's measurement code (numpy geometry per DICOM PS3.3 C.7.6.2.1.1).

    from builders.synthetic import build, ratio, TINY   # tests/ is on sys.path (pyproject.toml)
"""

from __future__ import annotations

import json
import tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pydicom
import pytest
import SimpleITK as sitk

from sigreport.synth import GeneratedStudy, generate_study

DATA = Path(__file__).resolve().parent.parent / "synth" / "data"
TINY = DATA / "tiny.toml"


_IMAGES: dict[tuple[str, str], sitk.Image] = {}
_FILES: dict[tuple[str, str], list[str]] = {}


@dataclass(frozen=True)
class Built:
    study: GeneratedStudy
    truth: dict

    def series_files(self, role: str) -> list[str]:
        """The files of one series, found by SimpleITK's GDCM series scan of the study root."""
        key = (str(self.study.root), role)
        if key not in _FILES:
            uid = self.truth["series"][role]["series_instance_uid"]
            _FILES[key] = list(
                sitk.ImageSeriesReader.GetGDCMSeriesFileNames(
                    str(self.study.study_dir), uid, False, True
                )
            )
        return _FILES[key]

    def image(self, role: str) -> sitk.Image:
        key = (str(self.study.root), role)
        if key not in _IMAGES:
            reader = sitk.ImageSeriesReader()
            reader.SetFileNames(self.series_files(role))
            _IMAGES[key] = sitk.Cast(reader.Execute(), sitk.sitkFloat64)
        return _IMAGES[key]

    def roi(self, roi_id: str) -> dict:
        case = tomllib.loads(self.study.case_path.read_text())
        return next(r for r in case["roi"] if r["id"] == roi_id)


def build(tmp_path_factory: pytest.TempPathFactory, name: str, scenario, **kw) -> Built:
    """Generate ``scenario`` into a fresh temporary folder named ``name``."""
    out = tmp_path_factory.mktemp(name) / "out"
    study = generate_study(scenario, out, **kw)
    return Built(study, json.loads(study.truth_path.read_text()))


def voxel_points(img: sitk.Image, box: tuple[slice, slice, slice] | None = None) -> np.ndarray:
    """Patient coordinates of the voxel centres (all, or a [z, y, x] box), shape [z, y, x, 3].

    PS3.3 C.7.6.2.1.1: P = origin + D diag(spacing) index (numpy, not SimpleITK's helpers).
    """
    size = img.GetSize()
    box = box or (slice(0, size[2]), slice(0, size[1]), slice(0, size[0]))
    d = np.asarray(img.GetDirection()).reshape(3, 3) @ np.diag(img.GetSpacing())
    k, j, i = np.meshgrid(*(np.arange(s.start, s.stop) for s in box), indexing="ij")
    idx = np.stack([i, j, k], axis=-1).astype(float)
    return np.asarray(img.GetOrigin()) + idx @ d.T


def roi_box(img: sitk.Image, center, reach: float) -> tuple[slice, slice, slice]:
    """The [z, y, x] index box holding every voxel within ``reach`` mm of ``center``."""
    d = np.asarray(img.GetDirection()).reshape(3, 3) @ np.diag(img.GetSpacing())
    c = np.linalg.solve(d, np.asarray(center, float) - np.asarray(img.GetOrigin()))
    r = reach / np.asarray(img.GetSpacing()) + 1
    size = img.GetSize()
    lo = [max(int(np.floor(c[a] - r[a])), 0) for a in range(3)]
    hi = [min(int(np.ceil(c[a] + r[a])) + 1, size[a]) for a in range(3)]
    return (slice(lo[2], hi[2]), slice(lo[1], hi[1]), slice(lo[0], hi[0]))


def roi_values(img: sitk.Image, roi: dict) -> np.ndarray:
    """Values of the voxels whose centre lies inside a case-file sphere / ellipsoid ROI."""
    axes = np.asarray(roi.get("semi_axes_mm") or [roi["radius_mm"]] * 3, dtype=float)
    box = roi_box(img, roi["center_mm"], float(axes.max()))
    pts = voxel_points(img, box)
    q = (((pts - np.asarray(roi["center_mm"])) / axes) ** 2).sum(axis=-1)
    return sitk.GetArrayViewFromImage(img)[box][q <= 1.0]


def ratio(built: Built, role: str, roi_id: str, ref_id: str = "R1") -> float:
    img = built.image(role)
    return float(
        np.median(roi_values(img, built.roi(roi_id)))
        / np.median(roi_values(img, built.roi(ref_id)))
    )


def read_all(built: Built) -> list[pydicom.Dataset]:
    return [pydicom.dcmread(p) for p in sorted(built.study.study_dir.rglob("*.dcm"))]


def motion_error(centres: np.ndarray, motion: dict, matrix, centre, translation) -> float:
    """The largest distance (mm) at ``centres`` between a truth.json motion and a recovered
    rigid transform ``p -> matrix (p - centre) + centre + translation`` (the convention of
    ``Alignment.transform``; truth.json gives its motion as an axis, an angle, a centre and a
    translation, mapping anchor anatomy to the series)."""
    a = np.asarray(motion["axis"], float) / np.linalg.norm(motion["axis"])
    k = np.array([[0, -a[2], a[1]], [a[2], 0, -a[0]], [-a[1], a[0], 0]])
    theta = np.radians(motion["rotation_deg"])
    # Rodrigues' rotation formula (any linear-algebra textbook).
    rotation = np.eye(3) + np.sin(theta) * k + (1 - np.cos(theta)) * k @ k

    def moved(points: np.ndarray, matrix, centre, translation) -> np.ndarray:
        centre = np.asarray(centre, float)
        return (points - centre) @ np.asarray(matrix).T + centre + np.asarray(translation, float)

    want = moved(centres, rotation, motion["center_mm"], motion["translation_mm"])
    got = moved(centres, np.reshape(matrix, (3, 3)), centre, translation)
    return float(np.linalg.norm(got - want, axis=1).max())

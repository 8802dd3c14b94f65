"""Lesion size as a radiologist reports it (docs/measurements.md, Size): the longest axis in the
patient's axial plane, the longest perpendicular, and the craniocaudal extent, whatever the
orientation of the grid the outline lies on. Checked against the analytic axes of ellipsoids."""

from __future__ import annotations

import numpy as np
import pytest
import SimpleITK as sitk

from sigreport.model import RoiKind, RoiShape, RoiSpec
from sigreport.rois import axial_diameters_mm, build_region, sample_region


def _image(direction: np.ndarray, spacing=(0.5, 0.5, 0.5), size=(96, 96, 96)) -> sitk.Image:
    image = sitk.Image(*size, sitk.sitkFloat32)
    image.SetSpacing(spacing)
    image.SetDirection(tuple(direction.ravel()))
    # Centre the grid on the patient origin, whatever its orientation.
    centre_index = (np.asarray(size) - 1) / 2.0
    image.SetOrigin(tuple(-(direction @ (centre_index * np.asarray(spacing)))))
    return image


def _ellipsoid(semi_axes) -> RoiSpec:
    return RoiSpec(
        id="L1",
        kind=RoiKind.LESION,
        shape=RoiShape.ELLIPSOID,
        center_mm=(0.0, 0.0, 0.0),
        semi_axes_mm=tuple(semi_axes),
    )


def _rotation(axis: np.ndarray, degrees: float) -> np.ndarray:
    # Rodrigues' formula; SimpleITK's own VersorTransform gives the same matrix.
    t = sitk.VersorTransform(tuple(axis / np.linalg.norm(axis)), np.radians(degrees))
    return np.asarray(t.GetMatrix()).reshape(3, 3)


@pytest.mark.parametrize(
    "direction",
    [np.eye(3), _rotation(np.array([1.0, 0.3, 0.2]), 35.0), _rotation(np.array([0, 0, 1.0]), 90)],
    ids=["axial", "oblique", "axial-rotated"],
)
def test_diameters_of_an_ellipsoid_are_its_axes(direction):
    # Semi-axes along patient x, y, z: the axial long axis is 2 x 9, the short 2 x 6, the
    # craniocaudal extent 2 x 4 mm (analytic); sampled at 0.5 mm, within about a voxel.
    spec = _ellipsoid((9.0, 6.0, 4.0))
    image = _image(direction)
    sample = sample_region(build_region(spec), image)
    long, short, cc = axial_diameters_mm(sample, image)
    tolerance = 1.0 if np.allclose(direction, np.eye(3)) else 1.6
    assert long == pytest.approx(18.0, abs=tolerance)
    assert short == pytest.approx(12.0, abs=tolerance)
    assert cc == pytest.approx(8.0, abs=tolerance)
    assert long >= short


def test_an_empty_roi_measures_zero():
    image = _image(np.eye(3), size=(16, 16, 16))
    spec = RoiSpec(
        id="L1",
        kind=RoiKind.LESION,
        shape=RoiShape.SPHERE,
        center_mm=(500.0, 0.0, 0.0),
        radius_mm=2.0,
    )
    sample = sample_region(build_region(spec), image)
    assert sample.n_voxels == 0
    assert axial_diameters_mm(sample, image) == (0.0, 0.0, 0.0)

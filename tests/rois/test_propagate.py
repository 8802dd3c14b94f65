"""Carrying a label-image ROI onto other grids, checked against SimpleITK's own resampler.

Oracle: ``sitk.Resample`` of the label image onto the target grid, nearest-neighbour for
membership (a voxel centre is inside when the label voxel holding it is set) and linear for
the partial-volume weights (loosely: both estimate the fraction of the voxel inside).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import SimpleITK as sitk

from sigreport.errors import InputError
from sigreport.model import RoiKind, RoiShape, RoiSpec
from sigreport.rois import GridRegion, SphereRegion, build_region, sample_region, volume_ml
from sigreport.rois.masks import affine_of_image
from sigreport.rois.propagate import voxel_centres_mm


def rotation(ax: float, ay: float, az: float) -> np.ndarray:
    t = sitk.Euler3DTransform()
    t.SetRotation(*(math.radians(v) for v in (ax, ay, az)))
    return np.asarray(t.GetMatrix()).reshape(3, 3)


def label_image() -> sitk.Image:
    """Two overlapping ellipsoids (label 1) and a small ball (label 2), 1 mm, 48^3."""
    n = 48
    ax = np.arange(n) - 23.5
    z, y, x = np.meshgrid(ax, ax, ax, indexing="ij")
    lab = np.zeros((n, n, n), np.uint8)
    lab[((x - 2) / 9) ** 2 + (y / 6) ** 2 + ((z + 1) / 5) ** 2 <= 1] = 1
    lab[((x + 5) / 4) ** 2 + ((y - 4) / 7) ** 2 + ((z - 3) / 6) ** 2 <= 1] = 1
    lab[(x - 10) ** 2 + (y + 10) ** 2 + (z - 8) ** 2 <= 9] = 2
    image = sitk.GetImageFromArray(lab)
    image.SetOrigin((-23.5 + 3.0, -23.5 - 2.0, -23.5 + 1.0))
    image.SetDirection(rotation(0, 0, 10).ravel().tolist())
    return image


def target(spacing, size, angles, origin=(-30.0, -32.0, -28.0)) -> sitk.Image:
    image = sitk.Image(*size, sitk.sitkFloat32)
    image.SetSpacing(spacing)
    image.SetDirection(rotation(*angles).ravel().tolist())
    image.SetOrigin(origin)
    return image


GRIDS = {
    "oblique": target((0.8, 0.9, 1.3), (72, 70, 48), (20.0, -15.0, 30.0)),
    "thick-slice": target((0.9, 0.9, 5.0), (64, 64, 12), (12.0, 0.0, -8.0)),
    "coarse-axial": target((2.0, 2.0, 2.0), (32, 32, 30), (0.0, 0.0, 0.0)),
}


@pytest.fixture(scope="module")
def label_file(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("labels") / "lesion.nii.gz"
    sitk.WriteImage(label_image(), str(path))
    return path


def spec_for(path: Path, label: int | None = None) -> RoiSpec:
    return RoiSpec("L1", RoiKind.LESION, RoiShape.MASK, mask=path, label=label)


@pytest.mark.parametrize("grid_name", sorted(GRIDS))
@pytest.mark.parametrize("label", [None, 2])
def test_membership_matches_sitk_nearest_neighbour_resample(label_file, grid_name, label):
    grid = GRIDS[grid_name]
    region = build_region(spec_for(label_file, label))
    sample = sample_region(region, grid)
    source = sitk.ReadImage(str(label_file))
    oracle = sitk.Resample(source, grid, sitk.Transform(), sitk.sitkNearestNeighbor, 0)
    values = sitk.GetArrayFromImage(oracle)
    expected = values != 0 if label is None else values == label
    assert expected.any()
    assert np.array_equal(sample.mask, expected)
    assert sample.n_voxels == int(expected.sum())


@pytest.mark.parametrize("grid_name", sorted(GRIDS))
def test_weights_agree_loosely_with_sitk_linear_resample(label_file, grid_name):
    grid = GRIDS[grid_name]
    sample = sample_region(build_region(spec_for(label_file)), grid)
    source = sitk.Cast(sitk.ReadImage(str(label_file)) != 0, sitk.sitkFloat32)
    linear = sitk.GetArrayFromImage(sitk.Resample(source, grid, sitk.Transform(), sitk.sitkLinear))
    assert sample.weights.dtype == np.float32
    assert np.all((sample.weights >= 0) & (sample.weights <= 1))
    assert np.all(sample.weights[sample.mask] > 0)
    # Both estimate the ROI's volume: within 5% of each other and of the source's own count.
    source_ml = float(sitk.GetArrayFromImage(source).sum()) / 1000.0  # 1 mm^3 source voxels
    assert volume_ml(sample, grid) == pytest.approx(source_ml, rel=0.05)
    spacing = np.prod(grid.GetSpacing())
    assert float(linear.sum()) * spacing / 1000.0 == pytest.approx(source_ml, rel=0.05)
    # And voxel by voxel they agree in shape (correlation of the two fraction maps).
    assert np.corrcoef(sample.weights.ravel(), linear.ravel())[0, 1] > 0.9


def test_same_region_from_nifti_nrrd_and_mha(label_file, tmp_path):
    grid = GRIDS["oblique"]
    reference = sample_region(build_region(spec_for(label_file)), grid).mask
    image = sitk.ReadImage(str(label_file))
    for suffix in ("nrrd", "mha"):
        path = tmp_path / f"lesion.{suffix}"
        sitk.WriteImage(image, str(path))
        assert np.array_equal(sample_region(build_region(spec_for(path)), grid).mask, reference)


def test_moved_series_matches_resample_through_the_inverse_transform(label_file):
    # The anchor is the label's space; the series moved: anchor point x sits at T(x) in it.
    moved = sitk.Euler3DTransform()
    moved.SetCenter((0.0, 0.0, 0.0))
    moved.SetRotation(math.radians(4), math.radians(-3), math.radians(6))
    moved.SetTranslation((2.5, -1.5, 3.0))
    grid = GRIDS["oblique"]
    region = build_region(spec_for(label_file))
    sample = sample_region(region, grid, to_region_space=moved.GetInverse())
    # Resample's transform maps output (series) points to input (anchor) points: T^-1.
    oracle = sitk.Resample(
        sitk.ReadImage(str(label_file)), grid, moved.GetInverse(), sitk.sitkNearestNeighbor, 0
    )
    assert np.array_equal(sample.mask, sitk.GetArrayFromImage(oracle) != 0)
    unmoved = sample_region(region, grid)
    assert not np.array_equal(sample.mask, unmoved.mask)


def test_non_affine_transform_is_applied_point_by_point(label_file):
    grid = GRIDS["coarse-axial"]
    bspline = sitk.BSplineTransformInitializer(grid, (3, 3, 3))
    rng = np.random.default_rng(3)
    bspline.SetParameters(rng.normal(0.0, 1.5, bspline.GetNumberOfParameters()).tolist())
    region = build_region(spec_for(label_file))
    sample = sample_region(region, grid, to_region_space=bspline)
    oracle = sitk.Resample(
        sitk.ReadImage(str(label_file)), grid, bspline, sitk.sitkNearestNeighbor, 0
    )
    assert np.array_equal(sample.mask, sitk.GetArrayFromImage(oracle) != 0)


def test_bounding_box_shortcut_matches_brute_force_on_every_voxel():
    # nibabel's habit: an obviously correct slow version beside the fast one.
    grid = target((0.7, 0.7, 3.0), (60, 60, 14), (25.0, 10.0, -20.0))
    region = SphereRegion.of("L1", (1.3, -2.2, 4.1), 7.5)
    size = grid.GetSize()
    zz, yy, xx = np.meshgrid(*(np.arange(s) for s in size[::-1]), indexing="ij")
    idx = np.stack([xx.ravel(), yy.ravel(), zz.ravel()], axis=1)
    # Voxel centres by SimpleITK itself (PS3.3 C.7.6.2.1.1 geometry as SimpleITK applies it).
    probe = idx[:: max(1, len(idx) // 50)]
    ours = voxel_centres_mm(grid, probe.astype(float))
    theirs = np.array([grid.TransformIndexToPhysicalPoint([int(v) for v in p]) for p in probe])
    assert np.allclose(ours, theirs, atol=1e-9)
    brute = region.contains(voxel_centres_mm(grid, idx.astype(float))).reshape(size[::-1])
    assert np.array_equal(sample_region(region, grid).mask, brute)


def test_thick_slices_are_supersampled_along_z():
    grid = target((1.0, 1.0, 5.0), (40, 40, 10), (0.0, 0.0, 0.0), origin=(-19.5, -19.5, -22.5))
    region = SphereRegion.of("L1", (0.0, 0.0, 1.0), 8.0)
    exact = 4.0 / 3.0 * math.pi * 8.0**3  # sphere volume
    auto = sample_region(region, grid)
    flat = sample_region(region, grid, supersample=1)
    # Without supersampling the weights are the 5 mm centre count; with 5 sub-slices they are
    # close to the true volume.
    assert abs(volume_ml(auto, grid) * 1000 - exact) / exact < 0.02
    assert np.array_equal(flat.weights > 0, flat.mask)
    assert np.array_equal(auto.mask, flat.mask)


def test_supersample_must_be_a_positive_integer():
    with pytest.raises(
        ValueError, match=r'"supersample" must be a positive integer or None, got 0'
    ):
        sample_region(SphereRegion.of("L1", (0, 0, 0), 2.0), GRIDS["coarse-axial"], supersample=0)


def test_fractional_grid_region_gives_fractional_weights():
    # A 1-voxel-thick slab of fraction 0.25 and a core of 1.0 on a 1 mm grid, sampled onto the
    # same grid: weights are the fractions, the slab is outside (0.25 < 0.5).
    values = np.zeros((10, 10, 10), np.float32)
    values[4:6, 4:6, 4:6] = 1.0
    values[3, 4:6, 4:6] = 0.25
    grid = sitk.Image(10, 10, 10, sitk.sitkFloat32)
    region = GridRegion("L1", values, affine_of_image(grid))  # same (z, y, x) grid
    sample = sample_region(region, grid, supersample=1)
    assert sample.n_voxels == 8
    assert np.allclose(sample.weights, values)


def test_label_image_errors(tmp_path, label_file):
    bad = tmp_path / "bad.nii.gz"
    bad.write_bytes(b"not an image")
    # The message names the ROI and the file, never SimpleITK's C++ source file.
    with pytest.raises(
        InputError, match=r"ROI \w+: mask file .*bad\.nii\.gz is not an image"
    ) as err:
        build_region(spec_for(bad))
    assert ".cxx" not in str(err.value) and "sitk::" not in str(err.value)
    with pytest.raises(
        InputError, match=r"lesion\.nii\.gz: no voxel has label 7; labels present: 1, 2"
    ):
        build_region(spec_for(label_file, 7))
    empty = tmp_path / "empty.mha"
    sitk.WriteImage(sitk.Image(4, 4, 4, sitk.sitkUInt8), str(empty))
    with pytest.raises(InputError, match=r"empty\.mha: the label image is empty"):
        build_region(spec_for(empty))
    flat = tmp_path / "flat.mha"
    sitk.WriteImage(sitk.Image(4, 4, sitk.sitkUInt8) + 1, str(flat))
    with pytest.raises(InputError, match=r"flat\.mha: a label image must be 3D"):
        build_region(spec_for(flat))

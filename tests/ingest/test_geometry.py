"""Stack geometry and pixel values of classic series against DICOM PS3.3 C.7.6.2.1.1 and
SimpleITK's own ImageSeriesReader (GDCM)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import SimpleITK as sitk

from sigreport.ingest import index_study, load_stack

from builders.dicom import AXIAL, CORONAL, SAGITTAL, rotation, write_classic_series


def _volume(shape: tuple[int, int, int], seed: int = 1) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return rng.integers(0, 3000, size=shape, dtype=np.int16)


def _only_stack(folder: Path):
    index = index_study(folder)
    assert len(index.stacks) == 1, [s.key for s in index.stacks]
    assert index.skipped == ()
    return index.stacks[0]


def test_axial_voxels_worked_by_hand(tmp_path: Path) -> None:
    stored = _volume((5, 4, 6))
    write_classic_series(tmp_path, stored, origin=(-100.0, -120.0, 30.0), spacing=(0.5, 0.8, 3.0))
    stack = _only_stack(tmp_path)
    image = load_stack(stack)
    # PS3.3 C.7.6.2.1.1: P = S + X * di * i + Y * dj * j (+ normal * dk * k for the stack), with
    # X = (1, 0, 0), Y = (0, 1, 0) for an axial stack, di = column spacing = PixelSpacing[1].
    # Worked by hand: voxel (i=2, j=3, k=4) -> (-100 + 2*0.5, -120 + 3*0.8, 30 + 4*3).
    assert image.TransformIndexToPhysicalPoint((2, 3, 4)) == pytest.approx((-99.0, -117.6, 42.0))
    assert image.TransformIndexToPhysicalPoint((0, 0, 0)) == pytest.approx((-100.0, -120.0, 30.0))
    assert stack.size == (6, 4, 5)
    assert stack.spacing_mm == pytest.approx((0.5, 0.8, 3.0))
    assert image.GetPixelID() == sitk.sitkFloat32
    # Pixel (i, j, k) is stored[k, j, i]: numpy's (slice, row, column) order (SimpleITK docs).
    assert sitk.GetArrayViewFromImage(image)[4, 3, 2] == stored[4, 3, 2]


def test_coronal_voxels_worked_by_hand(tmp_path: Path) -> None:
    stored = _volume((3, 4, 5))
    write_classic_series(tmp_path, stored, origin=(10.0, 20.0, 30.0), spacing=(1.0, 2.0, 4.0),
                         direction=CORONAL)  # fmt: skip
    image = load_stack(_only_stack(tmp_path))
    # PS3.3 C.7.6.2.1.1 with row direction X = (1, 0, 0), column direction Y = (0, 0, -1):
    # voxel (i=1, j=2, k=2) -> (10 + 1*1, 20 + 2*4 (normal +y), 30 - 2*2).
    assert image.TransformIndexToPhysicalPoint((1, 2, 2)) == pytest.approx((11.0, 28.0, 26.0))
    assert np.array_equal(sitk.GetArrayFromImage(image), stored.astype(np.float32))


GEOMETRIES = {
    "axial": AXIAL,
    "coronal": CORONAL,
    "sagittal": SAGITTAL,
    "oblique": rotation((1.0, 2.0, 0.5), 23.0),
}


@pytest.mark.parametrize("name", sorted(GEOMETRIES))
def test_matches_simpleitk_image_series_reader(tmp_path: Path, name: str) -> None:
    stored = _volume((7, 9, 8), seed=3)
    write_classic_series(tmp_path, stored, origin=(-40.5, 12.25, -7.0), spacing=(0.9, 1.1, 2.5),
                         direction=GEOMETRIES[name], rescale=(2.5, -100.0), seed=7)  # fmt: skip
    stack = _only_stack(tmp_path)
    ours = load_stack(stack)

    # Oracle: SimpleITK's own DICOM series reader (GDCM sorts by position and applies the
    # rescale).
    reader = sitk.ImageSeriesReader()
    reader.SetFileNames(reader.GetGDCMSeriesFileNames(str(tmp_path)))
    theirs = reader.Execute()
    assert ours.GetSize() == theirs.GetSize()
    assert ours.GetOrigin() == pytest.approx(theirs.GetOrigin(), abs=1e-4)
    assert ours.GetSpacing() == pytest.approx(theirs.GetSpacing(), abs=1e-4)
    assert ours.GetDirection() == pytest.approx(theirs.GetDirection(), abs=1e-6)
    np.testing.assert_allclose(
        sitk.GetArrayFromImage(ours), sitk.GetArrayFromImage(theirs), rtol=0, atol=1e-3
    )
    # And against the values written: stored * slope + intercept, slice k in spatial order.
    np.testing.assert_allclose(sitk.GetArrayFromImage(ours), stored * 2.5 - 100.0, atol=1e-3)
    # The stack's own fields are the image's geometry (interface of load_stack).
    assert ours.GetOrigin() == pytest.approx(stack.origin_mm)
    assert ours.GetDirection() == pytest.approx(stack.direction)


def test_order_comes_from_positions_not_instance_number_or_slice_location(tmp_path: Path) -> None:
    stored = _volume((6, 3, 3))
    n = stored.shape[0]
    # SliceLocation deliberately reversed and wrong: it must not be read for the order.
    write_classic_series(tmp_path, stored, spacing=(1.0, 1.0, 2.0), seed=11,
                         extra={"SliceLocation": "0"})  # fmt: skip
    stack = _only_stack(tmp_path)
    z = [ref.position_mm[2] for ref in stack.instances]
    assert z == sorted(z)
    assert [ref.instance_number for ref in stack.instances] != list(range(1, n + 1))
    assert np.array_equal(sitk.GetArrayFromImage(load_stack(stack)), stored.astype(np.float32))


def test_slice_spacing_from_positions_not_slice_thickness(tmp_path: Path) -> None:
    stored = _volume((4, 3, 3))
    # SliceThickness 5 mm but slices 3.5 mm apart (overlapping acquisition): spacing is 3.5.
    write_classic_series(tmp_path, stored, spacing=(1.0, 1.0, 3.5),
                         extra={"SliceThickness": "5"})  # fmt: skip
    stack = _only_stack(tmp_path)
    assert stack.spacing_mm[2] == pytest.approx(3.5)
    assert stack.acquisition.slice_thickness_mm == pytest.approx(5.0)

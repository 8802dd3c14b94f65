"""Enhanced MR multi-frame files: functional groups, geometry, scaling, roles."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pydicom
import pytest
import SimpleITK as sitk

from sigreport.ingest import index_study, load_stack
from sigreport.model import Role

from builders.dicom import enhanced_dataset, rotation, save


def _stored(n: int = 4, rows: int = 5, cols: int = 6) -> np.ndarray:
    return np.arange(n * rows * cols, dtype=np.uint16).reshape(n, rows, cols) * 3 + 1


def _index_one(tmp_path: Path, ds: pydicom.Dataset):
    save(ds, tmp_path / "enhanced.dcm")
    index = index_study(tmp_path)
    assert index.skipped == ()
    assert len(index.stacks) == 1, [s.key for s in index.stacks]
    return index.stacks[0]


def test_geometry_and_shared_pixel_value_transformation(tmp_path: Path) -> None:
    direction = rotation((0.3, 1.0, 0.2), 17.0)
    stored = _stored()
    ds = enhanced_dataset(stored, origin=(5.0, -3.0, 12.0), spacing=(0.7, 0.9, 2.2),
                          direction=direction, rescale=(0.25, -5.0))  # fmt: skip
    stack = _index_one(tmp_path, ds)
    image = load_stack(stack)
    assert stack.size == (6, 5, 4)
    assert [ref.frame for ref in stack.instances] == [4, 3, 2, 1]  # frames written reversed
    # PS3.3 C.7.6.2.1.1 through the Plane Position / Orientation and Pixel Measures macros:
    # voxel (i, j, k) = origin + D @ (i * 0.7, j * 0.9, k * 2.2), D = the rotation written.
    expected = np.array([5.0, -3.0, 12.0]) + direction @ np.array([3 * 0.7, 2 * 0.9, 1 * 2.2])
    assert image.TransformIndexToPhysicalPoint((3, 2, 1)) == pytest.approx(tuple(expected))
    assert image.GetDirection() == pytest.approx(tuple(direction.ravel()))
    # Pixel Value Transformation (PS3.3 C.7.6.16.2.9): value = stored * slope + intercept.
    np.testing.assert_allclose(sitk.GetArrayFromImage(image), stored * 0.25 - 5.0, atol=1e-5)
    assert stack.scaling_key is not None
    assert stack.acquisition.echo_time_ms == 90.0
    assert stack.acquisition.repetition_time_ms == 4000.0
    assert stack.acquisition.mr_acquisition_type == "3D"


def test_per_frame_rescale(tmp_path: Path) -> None:
    stored = _stored()
    per_frame = [(1.0 + k, 2.0 * k) for k in range(4)]
    stack = _index_one(tmp_path, enhanced_dataset(stored, per_frame_rescale=per_frame))
    values = sitk.GetArrayFromImage(load_stack(stack))
    for k, (slope, intercept) in enumerate(per_frame):
        np.testing.assert_allclose(values[k], stored[k] * slope + intercept, atol=1e-4)
    assert stack.scaling_key is None  # frames differ


def test_real_world_value_mapping_takes_precedence(tmp_path: Path) -> None:
    stored = _stored()
    ds = enhanced_dataset(stored, rescale=(2.0, 0.0), rwvm=(0.001, 0.5))
    values = sitk.GetArrayFromImage(load_stack(_index_one(tmp_path, ds)))
    # PS3.3 C.7.6.16.2.11: the real-world value maps the stored value, not the rescaled one.
    np.testing.assert_allclose(values, stored * 0.001 + 0.5, rtol=1e-6)


def test_matches_highdicom_volume(tmp_path: Path) -> None:
    hd = pytest.importorskip("highdicom")
    direction = rotation((1.0, 0.0, 1.0), 30.0)
    stored = _stored(5, 7, 6)
    ds = enhanced_dataset(stored, origin=(1.0, 2.0, 3.0), spacing=(1.5, 1.25, 3.0),
                          direction=direction, rescale=(1.0, 0.0))  # fmt: skip
    path = save(ds, tmp_path / "enhanced.dcm")
    # Oracle: highdicom's own parser of multi-frame geometry (Image.get_volume).
    volume = hd.imread(path).get_volume()
    (stack,) = index_study(tmp_path).stacks
    ours = load_stack(stack)
    affine = volume.affine  # 4x4: (array index, 1) -> LPS point (highdicom Volume docs)
    theirs = volume.array
    ours_array = sitk.GetArrayViewFromImage(ours)
    assert sorted(theirs.shape) == sorted(ours_array.shape)
    # Each of highdicom's voxels must sit exactly on one of ours, holding the same value
    # (highdicom may order the axes differently; the patient-space mapping must agree).
    for index in np.ndindex(theirs.shape):
        point = (affine @ np.array([*index, 1.0]))[:3]
        continuous = ours.TransformPhysicalPointToContinuousIndex(tuple(point))
        assert np.allclose(continuous, np.round(continuous), atol=1e-4), (index, continuous)
        i, j, k = (int(round(v)) for v in continuous)
        assert ours_array[k, j, i] == pytest.approx(theirs[index])


def test_shared_and_per_frame_copy_of_one_group_is_a_warning(tmp_path: Path) -> None:
    ds = enhanced_dataset(_stored(), conflict_pixel_measures=True)
    stack = _index_one(tmp_path, ds)
    assert any("PixelMeasuresSequence is in both" in w for w in stack.warnings), stack.warnings


def test_contrast_and_fat_suppression_from_functional_groups(tmp_path: Path) -> None:
    ds = enhanced_dataset(
        _stored(),
        timing={"RepetitionTime": 550.0, "FlipAngle": 90.0},
        echo_time=12.0,
        modifier={"InversionRecovery": "NO", "SpectrallySelectedSuppression": "FAT"},
        contrast=True,
    )
    stack = _index_one(tmp_path, ds)
    assert stack.acquisition.contrast_agent == "Gadolinium"
    assert stack.acquisition.spectrally_selected_suppression == "FAT"
    assert stack.acquisition.inversion_recovery is False
    assert stack.acquisition.scanning_sequence == ("SE",)  # from EchoPulseSequence SPIN
    # Common practice: short TR / short TE spin echo, fat suppressed, after contrast.
    assert stack.role == Role.T1POSTFS, stack.role_reason


def test_flair_from_mr_modifier_inversion_times(tmp_path: Path) -> None:
    ds = enhanced_dataset(
        _stored(),
        timing={"RepetitionTime": 9000.0, "FlipAngle": 150.0},
        echo_time=120.0,
        modifier={"InversionRecovery": "YES", "InversionTimes": [2500.0]},
    )
    stack = _index_one(tmp_path, ds)
    assert stack.acquisition.inversion_time_ms == 2500.0
    assert stack.role == Role.FLAIR, stack.role_reason  # fluid-nulling TI (common practice)


def test_diffusion_b_value_from_mr_diffusion(tmp_path: Path) -> None:
    ds = enhanced_dataset(
        _stored(),
        timing={"RepetitionTime": 5000.0, "FlipAngle": 90.0},
        echo_time=80.0,
        b_value=1000.0,
        pulse={"EchoPulseSequence": "SPIN", "EchoPlanarPulseSequence": "YES"},
    )
    stack = _index_one(tmp_path, ds)
    assert stack.acquisition.b_value == 1000.0
    assert stack.role == Role.DWI, stack.role_reason

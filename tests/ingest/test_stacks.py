"""Series split into stacks, and stack warnings (gaps, duplicates, missing slices, tilt)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import SimpleITK as sitk
from pydicom.uid import generate_uid

from sigreport.ingest import index_study, load_stack

from builders.dicom import CORONAL, classic_slices, save, write_classic_series


def _stored(n: int, rows: int = 4, cols: int = 5, offset: int = 0) -> np.ndarray:
    return np.arange(n * rows * cols, dtype=np.int16).reshape(n, rows, cols) + offset


def test_series_with_two_orientations_splits_into_named_stacks(tmp_path: Path) -> None:
    uid = generate_uid()
    write_classic_series(tmp_path / "a", _stored(3), series_uid=uid, series_number=4)
    write_classic_series(tmp_path / "b", _stored(4, offset=100), series_uid=uid, series_number=4,
                         direction=CORONAL)  # fmt: skip
    index = index_study(tmp_path)
    assert sorted(s.stack for s in index.stacks) == ["axial", "coronal"]
    assert sorted(s.key for s in index.stacks) == [f"{uid}#axial", f"{uid}#coronal"]
    sizes = {s.stack: s.size[2] for s in index.stacks}
    assert sizes == {"axial": 3, "coronal": 4}


def test_series_with_two_echoes_splits(tmp_path: Path) -> None:
    uid = generate_uid()
    for echo, te in ((1, "20"), (2, "90")):
        write_classic_series(tmp_path / f"e{echo}", _stored(3, offset=echo), series_uid=uid,
                             extra={"EchoNumbers": str(echo), "EchoTime": te})  # fmt: skip
    index = index_study(tmp_path)
    assert [s.stack for s in index.stacks] == ["echo 1", "echo 2"]
    assert [s.acquisition.echo_time_ms for s in index.stacks] == [20.0, 90.0]
    for s in index.stacks:
        values = sitk.GetArrayFromImage(load_stack(s))
        assert np.array_equal(
            values, _stored(3, offset=s.acquisition.echo_number).astype(np.float32)
        )


def test_mixed_image_sizes_split(tmp_path: Path) -> None:
    uid = generate_uid()
    write_classic_series(tmp_path / "a", _stored(2, 4, 5), series_uid=uid)
    write_classic_series(tmp_path / "b", _stored(2, 6, 6), series_uid=uid, origin=(0, 0, 50))
    index = index_study(tmp_path)
    assert sorted(s.size for s in index.stacks) == [(5, 4, 2), (6, 6, 2)]
    assert all(s.stack for s in index.stacks)


def test_temporal_positions_split(tmp_path: Path) -> None:
    uid = generate_uid()
    for t in (1, 2, 3):
        write_classic_series(tmp_path / f"t{t}", _stored(2), series_uid=uid,
                             extra={"TemporalPositionIdentifier": t})  # fmt: skip
    index = index_study(tmp_path)
    assert [s.stack for s in index.stacks] == ["t 1", "t 2", "t 3"]


def test_missing_slice_reported_and_loaded_as_nan(tmp_path: Path) -> None:
    stored = _stored(6)
    paths = write_classic_series(tmp_path, stored, spacing=(1.0, 1.0, 2.0), shuffle=False)
    paths[3].unlink()  # the slice at z = 6 mm
    index = index_study(tmp_path)
    (stack,) = index.stacks
    assert any("1 missing slice" in w for w in stack.warnings), stack.warnings
    assert stack.size[2] == 6 and len(stack.instances) == 5
    assert stack.spacing_mm[2] == pytest.approx(2.0)
    values = sitk.GetArrayFromImage(load_stack(stack))
    assert np.isnan(values[3]).all()
    kept = [0, 1, 2, 4, 5]
    assert np.array_equal(values[kept], stored[kept].astype(np.float32))


def test_non_uniform_spacing_reported(tmp_path: Path) -> None:
    z = [0.0, 3.0, 6.0, 10.0, 13.0]
    write_classic_series(tmp_path, _stored(5), positions=[(0.0, 0.0, v) for v in z])
    (stack,) = index_study(tmp_path).stacks
    assert any(w.startswith("non-uniform slice spacing") for w in stack.warnings), stack.warnings
    assert stack.spacing_mm[2] == pytest.approx(3.0)  # the median step


def test_duplicate_positions_reported(tmp_path: Path) -> None:
    uid = generate_uid()
    write_classic_series(tmp_path / "a", _stored(3), series_uid=uid)
    extra = classic_slices(_stored(1, offset=7), series_uid=uid)[0]  # another slice at z = 0
    save(extra, tmp_path / "dup.dcm")
    (stack,) = index_study(tmp_path).stacks
    assert any("1 duplicate slice position" in w for w in stack.warnings), stack.warnings
    assert len(stack.instances) == 3


def test_gantry_tilt_reported(tmp_path: Path) -> None:
    # Axial slices whose positions also step 0.5 mm in y per 2 mm in z: 14 deg off the normal.
    positions = [(0.0, 0.5 * k, 2.0 * k) for k in range(4)]
    write_classic_series(tmp_path, _stored(4), positions=positions)
    (stack,) = index_study(tmp_path).stacks
    expected = np.degrees(np.arctan2(0.5, 2.0))  # geometry of the positions above
    tilt = [w for w in stack.warnings if "off the slice normal" in w]
    assert tilt and f"{expected:.1f} deg" in tilt[0]


def test_scaling_key_equal_for_equal_rescale(tmp_path: Path) -> None:
    write_classic_series(tmp_path / "a", _stored(2), rescale=(2.0, 1.0), series_number=1)
    write_classic_series(tmp_path / "b", _stored(2), rescale=(2.0, 1.0), series_number=2)
    write_classic_series(tmp_path / "c", _stored(2), rescale=(3.0, 1.0), series_number=3)
    a, b, c = index_study(tmp_path).stacks
    assert a.scaling_key is not None and a.scaling_key == b.scaling_key != c.scaling_key


def test_frames_with_different_rescale_have_no_scaling_key(tmp_path: Path) -> None:
    uid = generate_uid()
    slices = classic_slices(_stored(2), series_uid=uid, rescale=(1.0, 0.0))
    slices[1].RescaleSlope = "4"
    for k, ds in enumerate(slices):
        save(ds, tmp_path / f"s{k}")
    (stack,) = index_study(tmp_path).stacks
    assert stack.scaling_key is None
    values = sitk.GetArrayFromImage(load_stack(stack))
    assert np.array_equal(values[1], _stored(2)[1] * np.float32(4))

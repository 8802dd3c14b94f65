"""Case files and masks that would take unbounded memory or belong to another study: refused up
front with a message naming the file and field (CLI exit 2)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import SimpleITK as sitk
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.uid import ExplicitVRLittleEndian, generate_uid

from sigreport import limits
from sigreport.errors import InputError
from sigreport.ingest import index_study
from sigreport.rois import case as case_module
from sigreport.rois import load_case
from sigreport.rois import masks as masks_module
from sigreport.rois.masks import load_mask_region, mask_reference_notes

from builders.dicom import FRAME_OF_REFERENCE_UID
from builders.hostile import CASE_TOML, nifti_bomb, write_rtstruct, write_small_study


def _case(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "case.toml"
    path.write_text(text)
    return path


def test_ten_thousand_rois_are_refused_before_any_is_parsed(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    many = "".join(
        f'[[roi]]\nid = "L{i}"\nkind = "lesion"\nshape = "sphere"\n'
        "center_mm = [0, 0, 0]\nradius_mm = 4\n"
        for i in range(10_000)
    )
    parsed: list[int] = []
    monkeypatch.setattr(case_module, "_parse_roi", lambda *a: parsed.append(1))
    with pytest.raises(InputError, match=r"^case\.toml: 10000 \[\[roi\]\] tables; at most 200"):
        load_case(_case(tmp_path, many))
    assert parsed == []


@pytest.mark.parametrize(
    ("old", "new", "message"),
    [
        ("radius_mm = 4.0", "radius_mm = 1e9", "radius_mm must be at most 500 mm"),
        ("center_mm = [13.0, 13.0, 7.0]", "center_mm = [1e7, 0, 0]",
         "center_mm must lie within 100000 mm"),
    ],
)  # fmt: skip
def test_roi_extent_is_bounded(tmp_path: Path, old: str, new: str, message: str) -> None:
    with pytest.raises(InputError, match=rf"roi\[1\] \(L1\): {message}"):
        load_case(_case(tmp_path, CASE_TOML.replace(old, new, 1)))


def test_box_edges_are_bounded(tmp_path: Path) -> None:
    text = CASE_TOML.replace(
        'shape = "sphere"\ncenter_mm = [13.0, 13.0, 7.0]\nradius_mm = 4.0',
        'shape = "box"\ncenter_mm = [13.0, 13.0, 7.0]\nsize_mm = [10, 10, 5000]',
        1,
    )
    with pytest.raises(InputError, match=r"size_mm must lie within 500 mm"):
        load_case(_case(tmp_path, text))


def test_study_uid_key(tmp_path: Path) -> None:
    case = load_case(_case(tmp_path, 'study_uid = "1.2.840.99.7"\n' + CASE_TOML))
    assert case.study_uid == "1.2.840.99.7"
    with pytest.raises(InputError, match=r"study_uid must be a StudyInstanceUID"):
        load_case(_case(tmp_path, 'study_uid = "1.2.abc"\n' + CASE_TOML))


def test_label_image_declaring_a_gigavoxel_grid_is_refused_before_reading(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = nifti_bomb(tmp_path / "big.nii.gz", declared=(1024, 1024, 1024))
    read: list[object] = []
    monkeypatch.setattr(masks_module.sitk, "ReadImage", lambda *a: read.append(a))
    with pytest.raises(InputError, match=r"declares 1024 x 1024 x 1024 voxels; at most"):
        load_mask_region(path, roi_id="L1")
    assert read == []


def test_gzip_stream_inflating_beyond_its_voxels_is_refused(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = nifti_bomb(tmp_path / "pad.nii.gz", declared=None, padding=20 * 1024**2)
    read: list[object] = []
    monkeypatch.setattr(masks_module.sitk, "ReadImage", lambda *a: read.append(a))
    with pytest.raises(InputError, match=r"the gzip stream inflates beyond 16777728 bytes"):
        load_mask_region(path, roi_id="L1")
    assert read == []


def test_an_ordinary_gzip_label_image_still_loads(tmp_path: Path) -> None:
    path = nifti_bomb(tmp_path / "ok.nii.gz", declared=None)
    region = load_mask_region(path, roi_id="L1")
    assert region.n_voxels == 64  # type: ignore[union-attr]


def test_seg_declaring_a_huge_grid_is_refused_from_its_header(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    ds = Dataset()
    ds.SOPClassUID = "1.2.840.10008.5.1.4.1.1.66.4"  # Segmentation Storage
    ds.SOPInstanceUID = generate_uid()
    ds.Modality = "SEG"
    ds.Rows, ds.Columns, ds.NumberOfFrames = 65535, 65535, 1000
    ds.BitsAllocated = 1
    ds.PixelData = b"\0" * 16
    ds.file_meta = FileMetaDataset()
    ds.file_meta.MediaStorageSOPClassUID = ds.SOPClassUID
    ds.file_meta.MediaStorageSOPInstanceUID = ds.SOPInstanceUID
    ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.save_as(tmp_path / "seg.dcm", enforce_file_format=True)
    monkeypatch.setattr(masks_module, "load_seg", lambda *a, **k: pytest.fail("decoded"))
    with pytest.raises(InputError, match=r"the SEG declares 65535 x 65535 pixels x 1000 frames"):
        load_mask_region(tmp_path / "seg.dcm", roi_id="L1")


def test_rtstruct_of_another_frame_of_reference_is_refused(tmp_path: Path) -> None:
    study, _ = write_small_study(tmp_path)
    stacks = index_study(study).stacks
    other = write_rtstruct(
        tmp_path / "rt.dcm", frame_of_reference_uid="1.2.826.0.1.3680043.8.498.9"
    )
    region = load_mask_region(other, roi_id="L1")
    with pytest.raises(InputError, match=r"\(ROI L1\) was drawn in frame of reference 1\.2\.826"):
        mask_reference_notes(region, stacks, study_uid=None)
    # The same frame of reference, but another study named: measured, with a note.
    same = write_rtstruct(
        tmp_path / "rt2.dcm", frame_of_reference_uid=FRAME_OF_REFERENCE_UID, study_uid="1.2.3.4"
    )
    region = load_mask_region(same, roi_id="L1")
    (note,) = mask_reference_notes(region, stacks, study_uid="1.2.826.0.1.3680043.8.498.77701")
    assert note.startswith("ROI L1: mask file") and "names study 1.2.3.4" in note


def test_label_image_size_check_uses_the_declared_components(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # A vector image counts each component: 20 x 20 x 20 x 3 values.
    image = sitk.GetImageFromArray(np.ones((20, 20, 20, 3), dtype=np.uint8), isVector=True)
    sitk.WriteImage(image, str(tmp_path / "vec.nrrd"))
    monkeypatch.setattr(limits, "MAX_MASK_VOXELS", 20 * 20 * 20 * 2)
    with pytest.raises(InputError, match="declares 20 x 20 x 20 voxels"):
        load_mask_region(tmp_path / "vec.nrrd", roi_id="L1")

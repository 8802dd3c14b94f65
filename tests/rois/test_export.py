"""A grown lesion's review files: NIfTI by SimpleITK and a binary DICOM SEG by highdicom,
read back by SimpleITK, highdicom and our own SEG reader, and checked by dciodvfy."""

from __future__ import annotations

import os
import shutil
import subprocess

import highdicom as hd
import numpy as np
import pytest
import SimpleITK as sitk

from sigreport.ingest import load_stack
from sigreport.model import Role
from sigreport.rois.export import SEG_SERIES_NUMBER, nifti_bytes, seg_bytes
from sigreport.rois.grow import grow_from_seed
from sigreport.rois.masks import load_seg
from sigreport.rois.propagate import sample_region


@pytest.fixture(scope="module")
def grown(neuro, tmp_path_factory):
    stack = neuro.stack(Role.T1POSTFS)
    image = load_stack(stack)
    lesion = grow_from_seed(image, (-27.0, -33.0, 14.0), roi_id="L1")
    folder = tmp_path_factory.mktemp("export")
    (folder / "L1.nii.gz").write_bytes(nifti_bytes(lesion.mask))
    (folder / "L1-seg.dcm").write_bytes(seg_bytes(lesion.mask, stack, roi_id="L1"))
    return stack, image, lesion, folder


def test_the_nifti_file_is_the_mask_in_patient_space(grown):
    _, image, lesion, folder = grown
    back = sitk.ReadImage(str(folder / "L1.nii.gz"))  # NIfTI is RAS on disk; SimpleITK gives LPS
    np.testing.assert_allclose(back.GetOrigin(), image.GetOrigin(), atol=1e-4)
    np.testing.assert_allclose(back.GetDirection(), image.GetDirection(), atol=1e-6)
    assert np.array_equal(sitk.GetArrayFromImage(back), sitk.GetArrayFromImage(lesion.mask))


def test_the_seg_holds_the_same_voxels_and_references_the_anchor(grown):
    stack, image, lesion, folder = grown
    seg = hd.seg.segread(folder / "L1-seg.dcm")
    assert seg.SeriesNumber == SEG_SERIES_NUMBER
    assert seg.SegmentSequence[0].SegmentLabel == "L1"
    referenced = {
        item.ReferencedSOPInstanceUID
        for series in seg.ReferencedSeriesSequence
        for item in series.ReferencedInstanceSequence
    }
    assert referenced <= {i.sop_instance_uid for i in stack.instances}
    region = load_seg(folder / "L1-seg.dcm", roi_id="L1")  # the SEG reader of shape = "mask"
    assert region.source_series_uid == stack.series_instance_uid
    assert np.array_equal(
        sample_region(region, image).mask, sitk.GetArrayFromImage(lesion.mask) > 0
    )


@pytest.mark.dciodvfy
def test_the_seg_passes_dciodvfy(grown):
    binary = shutil.which("dciodvfy")
    if binary is None:
        if os.environ.get("CI"):
            pytest.fail("dciodvfy (Debian dicom3tools) is required when CI is set")
        pytest.skip("dciodvfy (Debian dicom3tools) is not installed")
    path = grown[3] / "L1-seg.dcm"
    result = subprocess.run([binary, str(path)], capture_output=True, text=True, timeout=120)
    output = result.stdout + result.stderr
    assert "Segmentation" in output  # dciodvfy recognised the IOD it checks against
    errors = [line for line in output.splitlines() if line.startswith("Error")]
    assert errors == []

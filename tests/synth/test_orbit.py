"""The orbit demo (3 T): enhancement of muscle vs nerve, and the Enhanced MR multi-frame variant."""

from __future__ import annotations

import highdicom as hd
import numpy as np
import pydicom
import pytest
import SimpleITK as sitk

ENHANCED_MR = "1.2.840.10008.5.1.4.1.1.4.1"  # PS3.4 B.5, Enhanced MR Image Storage
ROLES = ["T1", "T2FS", "STIR", "T1FS", "T1POST", "T1POSTFS"]


def _enhancement(built, tools, roi_id: str, pre: str, post: str) -> float:
    return tools.ratio(built, post, roi_id) / tools.ratio(built, pre, roi_id) - 1.0


def test_extraocular_muscle_enhances_and_optic_nerve_does_not(orbit, tools):
    # Common practice: extraocular muscles enhance avidly; the optic nerve (blood-nerve barrier)
    # does not. Contract: enhancing when the reference-normalized ratio rises >= 15 %.
    for pre, post in [("T1", "T1POST"), ("T1FS", "T1POSTFS")]:
        assert _enhancement(orbit, tools, "L2", pre, post) >= 0.15
        assert _enhancement(orbit, tools, "L3", pre, post) < 0.15
        assert _enhancement(orbit, tools, "L1", pre, post) >= 0.15  # the enhancing mass
    flags = orbit.truth["rois"]
    assert flags["L2"]["expected"]["enhancing"] is True
    assert flags["L3"]["expected"]["enhancing"] is False


def test_orbit_stir_nulls_fat_at_3t(orbit, tools):
    ds = pydicom.dcmread(orbit.series_files("STIR")[0], stop_before_pixels=True)
    assert float(ds.MagneticFieldStrength) == 3.0
    assert 200 <= float(ds.InversionTime) <= 240  # common practice: STIR TI ~ 210-230 ms at 3 T
    assert tools.ratio(orbit, "STIR", "C2") < 0.3
    assert tools.ratio(orbit, "T2FS", "C2") < 0.3


def test_enhanced_files_are_valid_multiframe(orbit_enhanced):
    files = sorted(orbit_enhanced.study.study_dir.rglob("*.dcm"))
    assert len(files) == len(ROLES)  # one file per series
    for path in files:
        ds = pydicom.dcmread(path)
        assert ds.SOPClassUID == ENHANCED_MR
        n = int(ds.NumberOfFrames)
        assert ds.pixel_array.shape == (n, ds.Rows, ds.Columns)
        assert len(ds.PerFrameFunctionalGroupsSequence) == n
        shared = ds.SharedFunctionalGroupsSequence[0]
        for name in (
            "PixelMeasuresSequence",
            "PlaneOrientationSequence",
            "PixelValueTransformationSequence",
            "MRTimingAndRelatedParametersSequence",
            "MREchoSequence",
            "MRModifierSequence",
        ):
            assert name in shared, name
        for k, frame in enumerate(ds.PerFrameFunctionalGroupsSequence):
            assert frame.FrameContentSequence[0].InStackPositionNumber == k + 1
            assert len(frame.PlanePositionSequence[0].ImagePositionPatient) == 3
        post = "ContrastBolusUsageSequence" in shared
        assert post == ("ContrastBolusAgentSequence" in ds)


@pytest.mark.parametrize("role", ROLES)
def test_enhanced_carries_the_classic_geometry_and_pixels(orbit, orbit_enhanced, role):
    classic = orbit.image(role)
    path = orbit_enhanced.series_files(role)
    assert len(path) == 1
    # SimpleITK (GDCM) reads the multi-frame file with the classic series' geometry.
    enhanced = sitk.ReadImage(path[0])
    assert enhanced.GetSize() == classic.GetSize()
    np.testing.assert_allclose(enhanced.GetOrigin(), classic.GetOrigin(), atol=1e-4)
    np.testing.assert_allclose(enhanced.GetSpacing(), classic.GetSpacing(), atol=1e-4)
    np.testing.assert_allclose(enhanced.GetDirection(), classic.GetDirection(), atol=1e-5)
    # Same seed, same physics: the same real-world values.
    np.testing.assert_allclose(
        sitk.GetArrayFromImage(enhanced).astype(float), sitk.GetArrayFromImage(classic), atol=1e-3
    )
    # highdicom's parser builds the same voxel grid (it may order the frames the other way).
    vol = hd.imread(path[0]).get_volume()
    affine = np.asarray(vol.affine)
    n = vol.spatial_shape[0]
    hd_positions = np.array([affine @ [k, 0, 0, 1] for k in range(n)])[:, :3]
    d = np.asarray(classic.GetDirection()).reshape(3, 3) @ np.diag(classic.GetSpacing())
    ours = np.array([np.asarray(classic.GetOrigin()) + d[:, 2] * k for k in range(n)])
    order = np.lexsort(hd_positions.T)
    np.testing.assert_allclose(hd_positions[order], ours[np.lexsort(ours.T)], atol=1e-3)

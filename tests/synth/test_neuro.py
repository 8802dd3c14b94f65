"""The neuro demo study: files, geometry, headers, and facts of the trade on the images."""

from __future__ import annotations

import numpy as np
import pydicom
import pytest
import SimpleITK as sitk
from pydicom.uid import UID

ROLES = ["T1", "T2", "FLAIR", "STIR", "T1FS", "T1POST", "T1POSTFS"]


def test_pydicom_reads_every_file_as_classic_mr(neuro, tools):
    datasets = tools.read_all(neuro)
    assert len(datasets) == sum(len(neuro.series_files(r)) for r in [*ROLES, "UNKNOWN"])
    # PS3.4: MR Image Storage; PS3.5: explicit VR little endian.
    assert {ds.SOPClassUID for ds in datasets} == {pydicom.uid.MRImageStorage}
    assert {ds.file_meta.TransferSyntaxUID for ds in datasets} == {
        pydicom.uid.ExplicitVRLittleEndian
    }
    assert len({ds.FrameOfReferenceUID for ds in datasets}) == 1
    assert len({ds.StudyInstanceUID for ds in datasets}) == 1
    sops = [ds.SOPInstanceUID for ds in datasets]
    assert len(set(sops)) == len(sops)
    for uid in {*sops, datasets[0].StudyInstanceUID, datasets[0].FrameOfReferenceUID}:
        assert UID(uid).is_valid  # PS3.5 9.1
    assert {str(ds.PatientName) for ds in datasets} == {"DEMO^NEURO"}
    assert all(ds.pixel_array.dtype == np.uint16 for ds in datasets[:3])


@pytest.mark.parametrize("role", ROLES)
def test_simpleitk_geometry_matches_the_headers(neuro, role):
    files = neuro.series_files(role)
    img = sitk.ImageSeriesReader()
    img.SetFileNames(files)
    image = img.Execute()
    first = pydicom.dcmread(files[0], stop_before_pixels=True)
    second = pydicom.dcmread(files[1], stop_before_pixels=True)
    iop = np.asarray(first.ImageOrientationPatient, float)
    row, col = iop[:3], iop[3:]
    normal = np.cross(row, col)  # PS3.3 C.7.6.2.1.1
    step = np.asarray(second.ImagePositionPatient, float) - np.asarray(
        first.ImagePositionPatient, float
    )
    spacing = float(first.SpacingBetweenSlices)
    # Consecutive slices are SpacingBetweenSlices apart along the normal.
    np.testing.assert_allclose(step, spacing * normal, atol=2e-3)
    direction = np.asarray(image.GetDirection()).reshape(3, 3)
    np.testing.assert_allclose(direction[:, 0], row, atol=1e-5)
    np.testing.assert_allclose(direction[:, 1], col, atol=1e-5)
    np.testing.assert_allclose(direction[:, 2], normal, atol=1e-5)
    np.testing.assert_allclose(image.GetOrigin(), first.ImagePositionPatient, atol=1e-4)
    ps = [float(v) for v in first.PixelSpacing]  # (row spacing, column spacing)
    np.testing.assert_allclose(image.GetSpacing(), [ps[1], ps[0], spacing], atol=1e-4)
    assert image.GetSize() == (first.Columns, first.Rows, len(files))
    if first.MRAcquisitionType == "2D":
        assert float(first.SliceThickness) < spacing  # 2D series have gaps
    else:
        assert float(first.SliceThickness) == pytest.approx(spacing)


def test_series_geometries_differ(neuro):
    geos = {}
    for role in ROLES:
        ds = pydicom.dcmread(neuro.series_files(role)[0], stop_before_pixels=True)
        geos[role] = (tuple(ds.ImageOrientationPatient), float(ds.SliceThickness))
    assert geos["T1POSTFS"][1] == pytest.approx(1.0)  # the ~1 mm 3D anchor
    assert geos["T1"][1] == pytest.approx(5.0)
    assert geos["STIR"][0] == pytest.approx((1, 0, 0, 0, 0, -1))  # coronal
    assert abs(geos["T2"][0][5]) > 0.1  # oblique axial
    assert len({g[0] for g in geos.values()}) >= 4


def test_acquisition_headers_carry_the_physics(neuro):
    heads = {r: pydicom.dcmread(neuro.series_files(r)[0], stop_before_pixels=True) for r in ROLES}
    assert float(heads["FLAIR"].InversionTime) == pytest.approx(
        neuro.truth["series"]["FLAIR"]["inversion_time_ms"], abs=0.1
    )
    assert 2000 <= float(heads["FLAIR"].InversionTime) <= 2500  # common practice, 1.5 T
    assert 150 <= float(heads["STIR"].InversionTime) <= 170  # common practice, 1.5 T
    assert list(heads["FLAIR"].ScanningSequence) == ["SE", "IR"]
    assert heads["T1POSTFS"].ScanningSequence == "GR"
    for role, ds in heads.items():
        assert ("ContrastBolusAgent" in ds) == role.startswith("T1POST")
        assert ("FS" in ds.ScanOptions) == (role in ("T1FS", "T1POSTFS"))
        assert ("InversionTime" in ds) == (role in ("FLAIR", "STIR"))
        assert float(ds.MagneticFieldStrength) == 1.5
    # The pre/post pair shares its scaling; the T2 carries a non-trivial one.
    assert (heads["T1"].RescaleSlope, heads["T1"].RescaleIntercept) == (
        heads["T1POST"].RescaleSlope,
        heads["T1POST"].RescaleIntercept,
    )
    assert (float(heads["T2"].RescaleSlope), float(heads["T2"].RescaleIntercept)) == (0.5, -20.0)


def test_csf_is_bright_on_t2_and_dark_on_flair(neuro, tools):
    # Common practice: CSF is hyperintense on T2 and nulled on FLAIR.
    assert tools.ratio(neuro, "T2", "C1") > 2.0
    assert tools.ratio(neuro, "FLAIR", "C1") < 0.3


def test_fat_is_bright_on_t1_and_dark_on_fat_sat_and_stir(neuro, tools):
    # Common practice: fat is T1-bright; fat saturation and STIR remove it.
    t1 = tools.ratio(neuro, "T1", "C2")
    assert t1 > 1.5
    assert tools.ratio(neuro, "T1FS", "C2") < 0.3 * t1
    assert tools.ratio(neuro, "T1POSTFS", "C2") < 0.3 * tools.ratio(neuro, "T1POST", "C2")
    assert tools.ratio(neuro, "STIR", "C2") < 0.3


def test_t1_bright_blood_is_not_fat(neuro, tools):
    # Common practice: methaemoglobin stays bright after fat saturation; a fatty lesion does not.
    assert tools.ratio(neuro, "T1", "L4") > 1.5
    assert tools.ratio(neuro, "T1FS", "L4") > 1.5
    assert tools.ratio(neuro, "T1", "L3") > 1.5
    assert tools.ratio(neuro, "T1FS", "L3") < 0.5


def test_artery_is_a_flow_void_on_every_series(neuro, tools):
    # Common practice: fast-flowing blood gives no signal (flow void); contract: ratio <= 0.3.
    for role in ROLES:
        assert tools.ratio(neuro, role, "L6") <= 0.3, role


def test_necrotic_mass_enhances_in_its_rim(neuro, tools):
    # Common practice: a necrotic tumour enhances at the rim, not in the core.
    pre, post = neuro.image("T1"), neuro.image("T1POST")
    roi = neuro.roi("L2")
    shell = {**roi, "radius_mm": roi["radius_mm"]}
    core = {**roi, "radius_mm": 4.5}

    def rim_and_core(img):
        whole = tools.roi_values(img, shell)
        inner = tools.roi_values(img, core)
        ref = np.median(tools.roi_values(img, neuro.roi("R1")))
        box = tools.roi_box(img, roi["center_mm"], roi["radius_mm"])
        pts = tools.voxel_points(img, box)
        r = np.linalg.norm(pts - np.asarray(roi["center_mm"]), axis=-1)
        rim = sitk.GetArrayViewFromImage(img)[box][(r >= 7.0) & (r <= roi["radius_mm"])]
        return np.median(rim) / ref, np.median(inner) / ref, whole

    rim_pre, core_pre, _ = rim_and_core(pre)
    rim_post, core_post, _ = rim_and_core(post)
    assert rim_post / rim_pre - 1 > 0.4
    assert abs(core_post / core_pre - 1) < 0.15


def test_truth_matches_the_written_3d_series(neuro, tools):
    # The truth ratio (noiseless, on the model grid) agrees with the median ratio measured on the
    # 1 mm anchor (noise and interpolation only), for every ROI large enough to be robust.
    truth = neuro.truth["rois"]
    for roi_id in ["L1", "L2", "L3", "L4", "L5", "C1", "C2"]:
        for role in ["T1POSTFS", "T1FS"]:
            expected = truth[roi_id]["ratio"][role]
            measured = tools.ratio(neuro, role, roi_id)
            assert measured == pytest.approx(expected, rel=0.08, abs=0.03), (roi_id, role)


def test_truth_file_shape_and_flags(neuro):
    t = neuro.truth
    assert t["schema"] == "sigreport-truth/1"
    assert (t["scenario"], t["seed"], t["field_strength_t"]) == ("neuro", 7, 1.5)
    assert set(t["series"]) == {*ROLES, "UNKNOWN"}  # UNKNOWN: the localizer
    assert all(set(r["ratio"]) == set(ROLES) for r in t["rois"].values())  # never measured
    assert all(m["rotation_deg"] == 0.0 for m in t["motion"].values())  # motion=False
    rois = t["rois"]
    flags = {k: rois[k]["expected"] for k in rois}
    assert flags["L1"]["fluid_suppressed"] is True and flags["L1"]["enhancing"] is False
    assert flags["L2"]["enhancing"] is True and flags["L2"]["pattern"] == "rim"
    assert flags["L3"]["fat_suppressed"] is True
    assert flags["L4"]["fat_suppressed"] is False
    assert flags["L5"]["enhancing"] is False and flags["L5"]["fluid_suppressed"] is False
    assert flags["L6"]["flow_void"] is True
    assert not any(flags[k]["flow_void"] for k in ["L1", "L2", "L3", "L4", "L5"])
    assert all(rois[k]["n_voxels"] >= 30 for k in rois)
    assert rois["L1"]["ratio"]["T2"] > 2.0 and rois["L1"]["ratio"]["FLAIR"] < 0.5


def test_localizer_is_marked_as_such(neuro):
    files = neuro.series_files("UNKNOWN")
    ds = pydicom.dcmread(files[0], stop_before_pixels=True)
    assert "LOCALIZER" in ds.ImageType  # PS3.3 C.8.3.1.1.1, value 3
    assert len(files) == 3 and float(ds.SliceThickness) == 8.0

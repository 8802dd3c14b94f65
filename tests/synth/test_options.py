"""generate_study's options on a small scenario: determinism, motion, failed fat saturation,
uninformative descriptions, and the errors a user can see."""

from __future__ import annotations

import json
import math

import numpy as np
import pydicom
import pytest
import SimpleITK as sitk

from sigreport.errors import InputError
from sigreport.synth import demo_scenarios, generate_study


def _pixels(built) -> dict[str, bytes]:
    return {
        str(p.relative_to(built.study.study_dir)): pydicom.dcmread(p).PixelData
        for p in sorted(built.study.study_dir.rglob("*.dcm"))
    }


def test_same_seed_same_study_other_seed_other_noise(tiny, tools, tmp_path_factory):
    again = tools.build(tmp_path_factory, "tiny_again", tools.TINY)
    assert _pixels(again) == _pixels(tiny)
    assert again.truth == tiny.truth  # UIDs, motion, ratios
    other = tools.build(tmp_path_factory, "tiny_other", tools.TINY, seed=4)
    assert other.truth["seed"] == 4
    assert _pixels(other).keys() == _pixels(tiny).keys()
    assert _pixels(other) != _pixels(tiny)
    uid = tiny.truth["series"]["T1"]["series_instance_uid"]
    assert other.truth["series"]["T1"]["series_instance_uid"] != uid


def _rotate(axis, deg, v):
    # Rodrigues' rotation formula (textbook), independent of SimpleITK.
    k = np.asarray(axis, float)
    t = math.radians(deg)
    v = np.asarray(v, float)
    return v * math.cos(t) + np.cross(k, v) * math.sin(t) + k * np.dot(k, v) * (1 - math.cos(t))


def test_motion_moves_the_anatomy_not_the_headers(tiny, tools):
    m = tiny.truth["motion"]["T2"]
    assert 0.5 <= m["rotation_deg"] <= 3.0 and max(map(abs, m["translation_mm"])) <= 2.5
    cyst = np.asarray(tiny.roi("L1")["center_mm"])
    moved = _rotate(m["axis"], m["rotation_deg"], cyst - m["center_mm"]) + m["center_mm"]
    moved = moved + m["translation_mm"]
    assert np.linalg.norm(moved - cyst) > 1.5
    # The cyst (bright on T2) is found where the motion puts it, measured on the coronal T2:
    # centroid of the bright voxels near it (x and z; y is sampled every 5 mm).
    img = tiny.image("T2")
    box = tools.roi_box(img, moved, 12.0)
    pts = tools.voxel_points(img, box)
    vals = sitk.GetArrayViewFromImage(img)[box]
    near = np.linalg.norm(pts - moved, axis=-1) <= 12.0
    ref = np.median(tools.roi_values(img, tiny.roi("R1")))
    bright = near & (vals > 2.0 * ref)
    centroid = pts[bright].mean(axis=0)
    assert abs(centroid[0] - moved[0]) < 0.8
    assert abs(centroid[2] - moved[2]) < 0.8
    # The anchor did not move, and every series keeps the one frame of reference.
    assert tiny.truth["motion"]["T1"]["rotation_deg"] == 0.0
    forts = {pydicom.dcmread(p).FrameOfReferenceUID for p in tiny.study.study_dir.rglob("*.dcm")}
    assert len(forts) == 1


def test_failed_fat_saturation_leaves_fat_bright(tiny, tools, tmp_path_factory):
    # QC control: with a working fat saturation scalp fat drops; with a failed one it stays.
    failed = tools.build(
        tmp_path_factory, "tiny_fsf", tools.TINY, fat_sat_failed=True, motion=False
    )
    drop_ok = tools.ratio(tiny, "T1FS", "C2") / tools.ratio(tiny, "T1", "C2")
    drop_failed = tools.ratio(failed, "T1FS", "C2") / tools.ratio(failed, "T1", "C2")
    assert drop_ok < 0.3
    assert drop_failed > 0.6
    assert failed.truth["rois"]["C2"]["expected"]["fat_suppressed"] is False
    assert tiny.truth["rois"]["C2"]["expected"]["fat_suppressed"] is True


def test_useless_descriptions_hide_the_role(tools, tmp_path_factory):
    built = tools.build(tmp_path_factory, "tiny_useless", tools.TINY, useless_descriptions=True)
    descriptions = {
        pydicom.dcmread(p, stop_before_pixels=True).SeriesDescription
        for p in built.study.study_dir.rglob("*.dcm")
    }
    assert descriptions == {"SERIES 1", "SERIES 2", "SERIES 3"}


def test_case_file_follows_the_contract(tiny):
    import tomllib

    case = tomllib.loads(tiny.study.case_path.read_text())
    assert case["study"] == "study"
    assert case["options"]["anchor"] == str(tiny.truth["anchor"]["series_number"])
    kinds = {r["id"]: r["kind"] for r in case["roi"]}
    assert kinds == {"L1": "lesion", "R1": "reference", "C2": "control"}
    ref = next(r for r in case["roi"] if r["id"] == "R1")
    assert ref["tissue"] == "white matter" and ref["shape"] == "sphere"
    assert next(r for r in case["roi"] if r["id"] == "L1")["reference"] == "R1"


def test_demo_scenarios_are_bundled():
    demos = demo_scenarios()
    assert {"neuro", "orbit"} <= set(demos)
    assert all(p.is_file() and p.suffix == ".toml" for p in demos.values())


def test_refuses_a_non_empty_output_folder(tmp_path):
    (tmp_path / "keep.txt").write_text("x")
    with pytest.raises(InputError, match="exists and is not empty"):
        generate_study("neuro", tmp_path)
    assert [p.name for p in tmp_path.iterdir()] == ["keep.txt"]


def test_unknown_scenario_and_field(tmp_path):
    with pytest.raises(InputError, match='scenario "nope" is neither a TOML file nor a demo'):
        generate_study("nope", tmp_path / "a")
    with pytest.raises(InputError, match="field strength 7.0 T is not tabulated"):
        generate_study("neuro", tmp_path / "b", field_strength_t=7.0)


def test_roi_outside_its_tissue_is_refused(tmp_path, tools):
    text = tools.TINY.read_text().replace(
        "center_mm = [30.0, 5.0, 24.0]", "center_mm = [9.0, 2.0, 12.0]"
    )
    bad = tmp_path / "bad.toml"
    bad.write_text(text)
    with pytest.raises(InputError, match="ROI R1 is not within white matter"):
        generate_study(bad, tmp_path / "out")


def test_field_strength_override(tools, tmp_path_factory):
    built = tools.build(tmp_path_factory, "tiny_3t", tools.TINY, field_strength_t=3.0, motion=False)
    ds = pydicom.dcmread(built.series_files("T1")[0], stop_before_pixels=True)
    assert float(ds.MagneticFieldStrength) == 3.0
    # Larmor frequency of 1H: 42.577 MHz/T (CODATA 2018) -> 127.73 MHz at 3 T.
    assert float(ds.ImagingFrequency) == pytest.approx(127.73, abs=0.01)
    assert built.truth["field_strength_t"] == 3.0
    # Longer T1 at 3 T (Stanisz 2005) changes the T1-weighted contrast: truth follows it.
    assert (
        built.truth["rois"]["L1"]["ratio"]
        != tools.build(tmp_path_factory, "tiny_15t", tools.TINY, motion=False).truth["rois"]["L1"][
            "ratio"
        ]
    )


def test_outline_roi_is_written_as_a_mask_of_its_model_voxels(tools, tmp_path):
    import tomllib

    text = tools.TINY.read_text().replace(
        'contains = ["cyst fluid"]', 'contains = ["cyst fluid"]\noutline = true'
    )
    scenario = tmp_path / "outlined.toml"
    scenario.write_text(text)
    study = generate_study(scenario, tmp_path / "out")
    case = tomllib.loads(study.case_path.read_text())
    roi = next(r for r in case["roi"] if r["id"] == "L1")
    assert roi["shape"] == "mask" and "center_mm" not in roi
    # Read back by SimpleITK's own NIfTI reader: the same voxels as the truth's count, centred
    # on the ROI's centre in patient coordinates (LPS; NIfTI stores RAS, the reader converts).
    image = sitk.ReadImage(str(study.case_path.parent / roi["mask"]))
    mask = sitk.GetArrayFromImage(image) > 0
    truth = json.loads(study.truth_path.read_text())
    assert int(mask.sum()) == truth["rois"]["L1"]["n_voxels"]
    k, j, i = np.nonzero(mask)
    centre = np.mean(
        [
            image.TransformIndexToPhysicalPoint((int(a), int(b), int(c)))
            for a, b, c in zip(i, j, k, strict=True)
        ],
        axis=0,
    )
    np.testing.assert_allclose(centre, [-27.0, -33.0, 14.0], atol=0.5)

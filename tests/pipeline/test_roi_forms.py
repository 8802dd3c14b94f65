"""The ROI forms end to end on the synthetic neuro study (with head motion between series):
each form against the same lesion given as a sphere in the same run (docs/rois.md)."""

from __future__ import annotations

import json
import math

import numpy as np
import pydicom
import pytest
import SimpleITK as sitk

from sigreport.errors import InputError
from sigreport.ingest import index_study, load_stack
from sigreport.model import Role
from sigreport.pipeline import run_report
from sigreport.synth import generate_study
from sigreport.synth.study import Motion

from builders.annotations import Graphic, SrRegion, write_gsps, write_sr

pytestmark = pytest.mark.slow


def _at_on(study_dir, truth, role: Role, point_anchor) -> str:
    """The viewer position (TOML inline table) at which a reader sees an anchor point on a
    moved series: the series' pixel nearest to where the motion carried it (truth.json)."""
    m = truth["motion"][role.value]
    motion = Motion(
        tuple(m["translation_mm"]), m["rotation_deg"], tuple(m["axis"]), tuple(m["center_mm"])
    )
    index = index_study(study_dir)
    stack = next(s for s in index.stacks if s.role is role)
    image = load_stack(stack)
    on_series = motion.transform().TransformPoint(tuple(map(float, point_anchor)))
    col, row, k = np.round(image.TransformPhysicalPointToContinuousIndex(on_series)).astype(int)
    number = stack.instances[k].instance_number
    return f"{{series = {stack.series_number}, image = {number}, row = {row}, column = {col}}}"


EXTRA = """
[[roi]]
id = "L1at"
kind = "lesion"
site = "right frontal white matter"
shape = "sphere"
at = {at}
radius_mm = 5.5
reference = "R1"

[[roi]]
id = "L5seed"
kind = "lesion"
site = "right temporal white matter"
shape = "seed"
center_mm = [-20.0, 2.0, -20.0]
reference = "R1"

[[roi]]
id = "L5full"
kind = "lesion"
site = "right temporal white matter"
shape = "sphere"
center_mm = [-20.0, 2.0, -20.0]
radius_mm = 8.0
reference = "R1"

[[roi]]
id = "L5auto"
kind = "lesion"
site = "right temporal white matter"
shape = "sphere"
center_mm = [-20.0, 2.0, -20.0]
radius_mm = 5.0
reference = "auto"

[[roi]]
id = "L4auto"
kind = "lesion"
site = "right parietal white matter"
shape = "sphere"
center_mm = [27.0, 28.0, 2.0]
radius_mm = 4.5
reference = "auto"
"""


OUTLINES = """
[[roi]]
id = "L1pr"
kind = "lesion"
site = "right frontal white matter"
shape = "mask"
mask = "l1-pr.dcm"
segment = "L1"
reference = "R1"

[[roi]]
id = "L1sr"
kind = "lesion"
site = "right frontal white matter"
shape = "mask"
mask = "l1-sr.dcm"
segment = "cyst"
reference = "R1"
"""


def _outlines(study_dir, folder) -> None:
    """L1 (the cyst, radius 8 mm at (-27, -33, 14)) outlined by a reader on the anchor: a
    presentation state with a 5 mm circle on the 7 images through its centre, and an SR with a
    5.5 mm ellipsoid (a volume surface) at its centre."""
    index = index_study(study_dir)
    stack = next(s for s in index.stacks if s.role is Role.T1POSTFS)
    image = load_stack(stack)
    x, y, z = image.TransformPhysicalPointToContinuousIndex((-27.0, -33.0, 14.0))
    ks = [int(round(z)) + d for d in range(-3, 4)]
    datasets = [pydicom.dcmread(stack.instances[k].path, stop_before_pixels=True) for k in ks]
    centre = np.array([x + 0.5, y + 0.5])  # pixel coordinates: corner origin (PS3.3 C.10.5.1.2)
    write_gsps(
        folder / "l1-pr.dcm",
        [Graphic("CIRCLE", np.stack([centre, centre + [5.0, 0.0]]), datasets, text="L1")],
    )
    c = np.array([-27.0, -33.0, 14.0])
    axes = np.eye(3) * 5.5
    ends = np.stack([c - axes[0], c + axes[0], c - axes[1], c + axes[1], c - axes[2], c + axes[2]])
    write_sr(
        folder / "l1-sr.dcm",
        datasets,
        [
            SrRegion(
                "cyst", "ELLIPSOID", ends, frame_of_reference_uid=datasets[0].FrameOfReferenceUID
            )
        ],
    )


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("forms")
    study = generate_study("neuro", tmp / "case")
    truth = json.loads(study.truth_path.read_text())
    at = _at_on(study.study_dir, truth, Role.T1FS, (-27.0, -33.0, 14.0))
    _outlines(study.study_dir, study.root)
    case = study.case_path.read_text() + EXTRA.replace("{at}", at) + OUTLINES
    case_path = study.root / "forms.toml"
    case_path.write_text(case)
    result = run_report(case_path, tmp / "out", study_dir=study.study_dir)
    return result, study


def _lesion(findings, roi_id):
    return next(lesion for lesion in findings["lesions"] if lesion["id"] == roi_id)


def _same_medians(findings, a: str, b: str, *, k: float = 3.0) -> None:
    """Medians of two ROIs on every series within k standard errors of the median
    (1.2533 sd / sqrt(n) for Gaussian noise, a textbook result)."""
    la, lb = _lesion(findings, a), _lesion(findings, b)
    assert la["signal"].keys() == lb["signal"].keys()
    for role, sa in la["signal"].items():
        sb = lb["signal"][role]
        se = 1.2533 * math.hypot(
            sa["sd"] / math.sqrt(sa["n_voxels"]), sb["sd"] / math.sqrt(sb["n_voxels"])
        )
        assert abs(sa["median"] - sb["median"]) <= k * se, (
            a,
            b,
            role,
            sa["median"],
            sb["median"],
            se,
        )


def test_a_viewer_position_on_a_moved_series_measures_the_sphere_lesion(run):
    _same_medians(run[0].findings, "L1", "L1at")


def test_a_presentation_state_outline_measures_the_sphere_lesion(run):
    _same_medians(run[0].findings, "L1", "L1pr")


def test_an_sr_region_measures_the_sphere_lesion(run):
    _same_medians(run[0].findings, "L1", "L1sr")


def test_a_seed_measures_like_the_lesion_given_as_a_sphere(run):
    """The grown region is the whole lesion (an 8 mm solid lesion, neuro.toml), edge voxels
    included: it compares with the sphere of the lesion's own size, L5full."""
    findings = run[0].findings
    _same_medians(findings, "L5full", "L5seed")
    # The size is the grown lesion's (an 8 mm radius solid lesion), not the 5 mm sphere's.
    seed = _lesion(findings, "L5seed")
    assert seed["max_diameter_mm"] == pytest.approx(16.9, abs=2.0)
    assert seed["volume_ml"] == pytest.approx(4 / 3 * math.pi * 0.8**3, rel=0.15)


def test_the_grown_lesion_is_written_as_nifti_and_dicom_seg(run):
    result, study = run
    import highdicom as hd

    nifti = sitk.ReadImage(str(result.out_dir / "rois" / "L5seed.nii.gz"))
    mask = sitk.GetArrayFromImage(nifti).astype(bool)
    n = int(mask.sum())
    assert n > 1000
    seg = hd.seg.segread(result.out_dir / "rois" / "L5seed-seg.dcm")
    index = index_study(study.study_dir)
    anchor = next(s for s in index.stacks if s.role is Role.T1POSTFS)
    referenced = {
        item.ReferencedSOPInstanceUID
        for series in seg.ReferencedSeriesSequence
        for item in series.ReferencedInstanceSequence
    }
    assert referenced <= {i.sop_instance_uid for i in anchor.instances}
    volume = seg.get_volume(combine_segments=True)
    assert int(np.count_nonzero(volume.array)) == n
    # SimpleITK's NIfTI (RAS on disk) and highdicom's SEG put the voxels at the same places.
    voxels = np.argwhere(volume.array > 0)
    points = voxels @ np.asarray(volume.affine)[:3, :3].T + np.asarray(volume.affine)[:3, 3]
    back = [nifti.TransformPhysicalPointToIndex(tuple(map(float, p))) for p in points[:200]]
    assert all(mask[k, j, i] for i, j, k in back)


def test_a_homogeneous_mirror_becomes_the_reference(run):
    findings = run[0].findings
    lesion = _lesion(findings, "L5auto")
    assert lesion["reference"] == "L5auto-mirror"
    notes = [
        q
        for q in findings["qc"]
        if q["code"] == "auto-reference" and q["message"].startswith("L5auto:")
    ]
    assert notes
    # White matter on both sides: the ratio to the mirror is close to the ratio to R1.
    l5 = _lesion(findings, "L5")
    for role in ("T1", "T2", "FLAIR"):
        assert lesion["signal"][role]["ratio"] == pytest.approx(
            l5["signal"][role]["ratio"], rel=0.1
        )


def test_a_mirror_onto_another_lesion_falls_back_to_the_named_reference(run):
    findings = run[0].findings
    assert _lesion(findings, "L4auto")["reference"] == "R1"
    rejected = [q["message"] for q in findings["qc"] if q["code"] == "auto-reference-rejected"]
    assert any(m.startswith("L4auto:") and "overlaps lesion L3" in m for m in rejected)


def test_a_site_on_the_wrong_side_is_a_laterality_warning(run):
    findings = run[0].findings
    mismatches = [q for q in findings["qc"] if q["code"] == "laterality-mismatch"]
    assert [q["message"].split(":")[0] for q in mismatches] == ["L4auto"]
    assert mismatches[0]["level"] == "warning"


def test_the_grown_lesion_is_outlined_in_its_key_images(run):
    result = run[0]
    assert (result.out_dir / "images" / "L5seed_T1POSTFS.png").is_file()


def test_an_at_naming_a_missing_image_stops_the_run(tmp_path):
    study = generate_study("neuro", tmp_path / "case")
    case = study.case_path.read_text() + EXTRA.replace(
        "{at}", "{series = 6, image = 999, row = 1, column = 1}"
    )
    path = study.root / "bad.toml"
    path.write_text(case)
    with pytest.raises(
        InputError, match=r"bad.toml: roi\[\d+\] \(L1at\): at: series 6 has no image 999"
    ):
        run_report(path, tmp_path / "out", study_dir=study.study_dir)

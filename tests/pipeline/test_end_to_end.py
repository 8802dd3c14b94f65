"""The whole job on synthetic studies whose truth is known (sigreport.synth writes truth.json
from the noiseless signal equations on its 1 mm model), measured through DICOM files, role
inference, registration, ROI sampling and characterization.

Facts of the trade used as check values are common practice; the truth ratios come from the
textbook signal equations (spin echo, inversion recovery, gradient echo) with published
relaxation times (demo_cases/tissues.toml names each source).
"""

from __future__ import annotations

import json
import tomllib
from pathlib import Path

import numpy as np
import pytest

from sigreport.pipeline import run_report
from sigreport.synth import generate_study

from builders.synthetic import motion_error

pytestmark = pytest.mark.slow

# The acceptance tolerance: every lesion's ratio within 10 % of truth.json.
RATIO_RTOL = 0.10
# Below this a ratio is noise over signal (the artery): both must then be dark instead.
DARK = 0.3


def _run(tmp: Path, scenario: str, **options):
    register = options.pop("register", None)
    study = generate_study(scenario, tmp / "case", **options)
    run = run_report(study.case_path, tmp / "out", study_dir=study.study_dir, register=register)
    truth = json.loads(study.truth_path.read_text())
    return run.findings, truth, study


@pytest.fixture(scope="module")
def neuro(tmp_path_factory):
    return _run(tmp_path_factory.mktemp("neuro"), "neuro")


@pytest.fixture(scope="module")
def orbit(tmp_path_factory):
    return _run(tmp_path_factory.mktemp("orbit"), "orbit")


def _by_tissue(findings, truth, tissue: str) -> dict:
    ids = [k for k, v in truth["rois"].items() if v.get("tissue") == tissue]
    assert ids, f"the scenario has no ROI of tissue {tissue!r}"
    return next(lesion for lesion in findings["lesions"] if lesion["id"] == ids[0])


def _check_ratios(findings, truth) -> None:
    for lesion in findings["lesions"]:
        # series_ratio: the noiseless, motion-free image of each series (its slice profile and
        # partial volume included) over the ROI's voxels: what an ideal measurement sees.
        expected = truth["rois"][lesion["id"]]["series_ratio"]
        for role, want in expected.items():
            got = lesion["signal"].get(role)
            assert got is not None, f"{lesion['id']} not measured on {role}"
            if want < DARK:
                assert got["ratio"] <= DARK, (lesion["id"], role, got["ratio"], want)
            else:
                assert got["ratio"] == pytest.approx(want, rel=RATIO_RTOL), (lesion["id"], role)


def _check_flags(findings, truth) -> None:
    for lesion in findings["lesions"]:
        expected = truth["rois"][lesion["id"]]["expected"]
        got = {
            "fluid_suppressed": lesion["suppression"]["fluid"]["suppressed"],
            "fat_suppressed": lesion["suppression"]["fat"]["suppressed"],
            "enhancing": lesion["enhancement"]["enhancing"],
            "pattern": lesion["enhancement"]["pattern"],
            "flow_void": lesion["flow_void"],
        }
        for flag, want in expected.items():
            if want is None:
                continue
            if got[flag] is None:
                # Not measurable (too few voxels on a thick series): allowed only when qc says so.
                assert any(
                    lesion["id"] in q["message"]
                    for q in findings["qc"]
                    if q["code"] == "roi-not-measured"
                ), (lesion["id"], flag)
                continue
            assert got[flag] == want, (lesion["id"], flag, got[flag], want)


def test_neuro_ratios_match_the_signal_equations(neuro):
    findings, truth, _ = neuro
    _check_ratios(findings, truth)


def test_neuro_flags_match_the_physics(neuro):
    findings, truth, _ = neuro
    _check_flags(findings, truth)


def test_neuro_facts_of_the_trade(neuro):
    findings, truth, _ = neuro
    cyst = _by_tissue(findings, truth, "cyst")
    assert cyst["signal"]["T2"]["grade"] == "hyperintense"  # fluid is bright on T2
    assert cyst["suppression"]["fluid"]["suppressed"] is True  # and drops on FLAIR
    assert "follows-fluid" in cyst["behaviour"]
    solid = _by_tissue(findings, truth, "solid lesion")
    # Most pathology carries water: bright on T2, but not free fluid, so FLAIR keeps it.
    assert solid["signal"]["T2"]["grade"] == "hyperintense"
    assert solid["suppression"]["fluid"]["suppressed"] is False
    fat = _by_tissue(findings, truth, "fat-containing lesion")
    assert fat["signal"]["T1"]["grade"] == "hyperintense"
    assert fat["suppression"]["fat"]["suppressed"] is True
    assert "macroscopic-fat" in fat["behaviour"]
    blood = _by_tissue(findings, truth, "subacute haematoma")
    # T1-bright signal that persists on fat-sat is not fat.
    assert blood["signal"]["T1"]["grade"] == "hyperintense"
    assert blood["suppression"]["fat"]["suppressed"] is False
    assert "t1-bright-not-fat" in blood["behaviour"]
    artery = _by_tissue(findings, truth, "artery")
    assert artery["flow_void"] is True and "flow-void" in artery["behaviour"]
    mass = _by_tissue(findings, truth, "necrotic mass")
    assert mass["enhancement"]["pattern"] == "rim" and mass["enhancement"]["enhancing"] is True
    controls = {r["tissue"]: r for r in findings["rois"] if r["kind"] == "control"}
    assert controls["CSF"]["check"]["passed"] is True
    assert controls["fat"]["check"]["passed"] is True


def test_neuro_registration_recovers_the_simulated_motion(neuro):
    # truth.json motion: p -> R (p - c) + c + t maps anchor anatomy to each series, the same
    # convention as Alignment.transform; compare where it matters, at the ROI centres.
    findings, truth, study = neuro
    case = tomllib.loads(study.case_path.read_text())
    centres = np.array([roi["center_mm"] for roi in case["roi"]])
    rigid = [s for s in findings["series"] if s.get("measured") and s["role"] in truth["motion"]]
    assert len(rigid) >= 6
    for series in rigid:
        motion = truth["motion"][series["role"]]
        alignment = series["alignment"]
        if series.get("anchor"):
            assert alignment["method"] == "identity"
            continue
        assert alignment["method"] == "rigid"
        error = motion_error(
            centres,
            motion,
            alignment["matrix"],
            alignment["center_mm"],
            alignment["translation_mm"],
        )
        # The tolerance: within 0.5 mm and 0.5 degrees.
        assert error < 0.5, series["role"]
        assert alignment["rotation_deg"] == pytest.approx(motion["rotation_deg"], abs=0.5)


def test_neuro_writes_every_output_file(neuro, tmp_path_factory):
    findings, _, _ = neuro
    assert findings["schema"] == "sigreport-findings/2"
    assert any("not a diagnosis" in c for c in findings["cautions"])


def test_orbit_muscles_enhance_and_the_optic_nerve_does_not(orbit):
    # Structures without a blood-brain barrier (extraocular muscles) enhance; the normal optic
    # nerve does not (common practice).
    findings, truth, _ = orbit
    muscle = _by_tissue(findings, truth, "extraocular muscle")
    nerve = _by_tissue(findings, truth, "optic nerve")
    assert muscle["enhancement"]["enhancing"] is True
    assert nerve["enhancement"]["enhancing"] is False
    _check_flags(findings, truth)


def test_failed_fat_suppression_is_caught_by_the_fat_control(tmp_path):
    findings, truth, _ = _run(tmp_path, "neuro", fat_sat_failed=True, motion=False, register=False)
    codes = {q["code"] for q in findings["qc"] if q["level"] == "warning"}
    assert "fat-suppression-failed" in codes
    fat = _by_tissue(findings, truth, "fat-containing lesion")
    assert fat["suppression"]["fat"].get("reliable") is False


def test_enhanced_multiframe_with_useless_descriptions_reads_the_same(tmp_path):
    # Roles come from the acquisition physics alone ("SERIES n" descriptions), and Enhanced MR
    # multi-frame files carry the same geometry and values as the classic ones.
    findings, truth, _ = _run(
        tmp_path, "neuro", enhanced=True, useless_descriptions=True, motion=False, register=False
    )
    roles = {s["series_number"]: s["role"] for s in findings["series"]}
    for role, series in truth["series"].items():
        assert roles[series["series_number"]] == role
    _check_ratios(findings, truth)
    _check_flags(findings, truth)


NO_MOTION = {
    "axis": [0, 0, 1],
    "rotation_deg": 0.0,
    "center_mm": [0, 0, 0],
    "translation_mm": [0, 0, 0],
}


def test_motion_free_series_keep_the_scanners_alignment(tmp_path):
    # Without simulated motion the truth is the identity: series the cheap check finds aligned
    # skip the optimizer (and qc says so), the others must still come out within 0.5 mm.
    findings, truth, study = _run(tmp_path, "neuro", motion=False)
    case = tomllib.loads(study.case_path.read_text())
    centres = np.array([roi["center_mm"] for roi in case["roi"]])
    skipped = {
        q["message"].split(":")[0] for q in findings["qc"] if q["code"] == "registration-skipped"
    }
    assert skipped, "no series was found already aligned"
    for series in findings["series"]:
        if not series.get("measured") or series.get("anchor"):
            continue
        alignment = series["alignment"]
        error = motion_error(
            centres,
            NO_MOTION,
            alignment["matrix"],
            alignment["center_mm"],
            alignment["translation_mm"],
        )
        assert error < 0.5, series["role"]
        if series["role"] in skipped:
            assert alignment["translation_mm"] == [0.0, 0.0, 0.0]
            assert alignment["rotation_deg"] == 0.0

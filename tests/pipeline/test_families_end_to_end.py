"""Diffusion, susceptibility, chemical shift and dynamic contrast, end to end on the synthetic
``diffusion`` (3 T) and ``kinetics`` (1.5 T) studies with patient motion: DICOM files, role
inference, every dynamic phase registered and measured, characterization and the report files.

The truth (truth.json) comes from the generator's noiseless signal equations: S = S0 exp(-b ADC)
(Stejskal-Tanner), gradient-echo T2* decay, in/opposed phase as |W + F exp(i 2 pi df TE)| with
the fat shift at the field strength, and per-tissue uptake curves of the three published types
(docs/synthetic.md). ADC values of the tissues are published ones (demo_cases/tissues.toml).
"""

from __future__ import annotations

import csv
import io
import json
import os
import shutil
import subprocess
from pathlib import Path

import pytest
import SimpleITK as sitk
from pydicom import dcmread

from sigreport.pipeline import (
    analyze_case,
    characterize_study,
    load_phases,
    load_series,
    measure_study,
)
from sigreport.report import build_findings, write_report
from sigreport.synth import generate_study

pytestmark = pytest.mark.slow

FLAGS = ("restricted", "shine_through", "blooming", "microscopic_fat", "curve")
ADC_RTOL = 0.10  # the acceptance tolerance for ADC values
FAT_FRACTION_PP = 3.0  # and for the Dixon fat fraction, in percentage points


def _run(tmp: Path, scenario: str):
    study = generate_study(scenario, tmp / "case", motion=True)
    analysis = analyze_case(study.case_path, study_dir=study.study_dir)
    out = tmp / "out"
    write_report(
        out,
        analysis.findings,
        analysis.key_slices,
        {r.value: s for r, s in analysis.stacks.items()},
        lexicon=analysis.plan.lexicon,
        phrases=analysis.phrases,
    )
    truth = json.loads(study.truth_path.read_text())
    return analysis, truth, out


@pytest.fixture(scope="module")
def diffusion(tmp_path_factory):
    return _run(tmp_path_factory.mktemp("diffusion"), "diffusion")


@pytest.fixture(scope="module")
def kinetics(tmp_path_factory):
    return _run(tmp_path_factory.mktemp("kinetics"), "kinetics")


def _lesions(analysis) -> dict[str, dict]:
    return {lesion["id"]: lesion for lesion in analysis.findings["lesions"]}


def _measured_flags(lesion: dict) -> dict:
    diffusion = lesion["diffusion"] or {}
    return {
        "restricted": diffusion.get("restricted"),
        "shine_through": diffusion.get("shine_through"),
        "blooming": (lesion["susceptibility"] or {}).get("blooming"),
        "microscopic_fat": (lesion["chemical_shift"] or {}).get("microscopic_fat"),
        "curve": (lesion["dynamic"] or {}).get("curve"),
    }


@pytest.mark.parametrize("scenario", ["diffusion", "kinetics"])
def test_every_new_flag_equals_the_truth(scenario, request):
    analysis, truth, _ = request.getfixturevalue(scenario)
    checked = 0
    for lesion_id, lesion in _lesions(analysis).items():
        expected = truth["rois"][lesion_id]["expected"]
        got = _measured_flags(lesion)
        for flag in FLAGS:
            if flag in expected:
                assert got[flag] == expected[flag], (lesion_id, flag, lesion)
                checked += 1
    assert checked >= 10


def test_adc_values_are_physical_and_the_map_scaling_is_checked(diffusion):
    analysis, truth, _ = diffusion
    adc = next(s for s in analysis.findings["series"] if s["role"] == "ADC" and s["measured"])
    assert adc["adc_units_ok"] is True
    dwi = next(s for s in analysis.findings["series"] if s["role"] == "DWI" and s["measured"])
    assert dwi["b_value"] == 1000.0
    for lesion_id, lesion in _lesions(analysis).items():
        want = truth["rois"][lesion_id]["diffusion"]["adc_1e-6_mm2_s"]
        got = lesion["diffusion"]["adc_1e-6_mm2_s"]
        assert got == pytest.approx(want, rel=ADC_RTOL), lesion_id
    codes_ = {q["code"] for q in analysis.findings["qc"]}
    assert "adc-units-implausible" not in codes_


def test_an_adc_map_stored_without_its_vendor_scaling_is_caught(diffusion):
    # A vendor whose map is stored in 10^-3 mm^2/s (a scale of 1000 not applied by the header):
    # the same study with the ADC map's values divided by 1000, measured again.
    analysis, _, _ = diffusion
    plan = analysis.plan
    # The analysis keeps no pixels (the series streamed through): the stages load them again.
    images = load_series(plan)
    adc_role = next(r for r in images if r.value == "ADC")
    images[adc_role] = sitk.ShiftScale(images[adc_role], 0.0, 1e-3)
    measurement = measure_study(plan, images, analysis.aligned, phase_images=load_phases(plan))
    result = characterize_study(plan, measurement)
    findings = build_findings(
        plan.index,
        plan.measured,
        analysis.aligned.alignments,
        plan.anchor_role,
        result,
        list(result.qc),
        cautions=plan.lexicon.cautions,
    )
    adc = next(s for s in findings["series"] if s["role"] == "ADC" and s["measured"])
    assert adc["adc_units_ok"] is False
    warning = next(q for q in findings["qc"] if q["code"] == "adc-units-implausible")
    assert warning["level"] == "warning" and "R1" in warning["message"]
    before = _lesions(analysis)
    for lesion in findings["lesions"]:
        assert lesion["diffusion"]["adc_1e-6_mm2_s"] is None  # not reported in wrong units
        # ratios cancel the scaling: the flags stay right
        assert lesion["diffusion"]["restricted"] == before[lesion["id"]]["diffusion"]["restricted"]


def test_fat_fraction_and_the_opposed_phase_drop(kinetics):
    analysis, truth, _ = kinetics
    for lesion_id, lesion in _lesions(analysis).items():
        want = truth["rois"][lesion_id]["chemical_shift"]["fat_fraction_percent"]
        got = lesion["chemical_shift"]["fat_fraction_percent"]
        assert abs(got - want) <= FAT_FRACTION_PP, lesion_id
    # Dixon images give the fat fraction; they are not graded against the reference
    assert all(lesion["signal"]["FAT"]["grade"] is None for lesion in analysis.findings["lesions"])


def test_dynamic_phases_are_ordered_with_their_delays(kinetics):
    analysis, truth, _ = kinetics
    posts = sorted(
        (s for s in analysis.findings["series"] if s["role"] == "T1POSTFS"),
        key=lambda s: s["phase"],
    )
    assert [s["delay_s"] for s in posts] == [0.0, 60.0, 120.0, 240.0, 360.0]
    assert all(s["measured"] for s in posts)
    # the last phase gives the T1POSTFS signal and the version-1 enhancement percent
    assert [s.get("in_signal", True) for s in posts] == [False] * 4 + [True]
    last = posts[-1]["series_number"]
    assert (
        analysis.stacks[next(r for r in analysis.stacks if r.value == "T1POSTFS")].series_number
        == last
    )
    for lesion_id, lesion in _lesions(analysis).items():
        dynamic = lesion["dynamic"]
        assert dynamic["pre"] == "T1FS"
        assert [p["series_number"] for p in dynamic["phases"]] == [
            s["series_number"] for s in posts
        ]
        assert lesion["enhancement"]["percent"] == dynamic["phases"][-1]["percent"]
        want = truth["rois"][lesion_id]["dynamic"]["phases"]
        for got, exp in zip(dynamic["phases"], want, strict=True):
            assert got["delay_s"] == exp["delay_s"]
    curves = {k: _lesions(analysis)[k]["dynamic"]["curve"] for k in ("L3", "L4", "L5")}
    assert curves == {"L3": "washout", "L4": "plateau", "L5": "persistent"}


def test_the_report_files_carry_the_new_fields(kinetics, diffusion):
    _, _, out = kinetics
    rows = list(csv.DictReader(io.StringIO((out / "table.csv").read_text())))
    fat = next(r for r in rows if r["lesion"] == "L1" and r["role"] == "FAT")
    assert float(fat["fat_fraction_percent"]) > 10
    post = next(r for r in rows if r["lesion"] == "L3" and r["role"] == "T1POSTFS")
    assert post["dynamic_curve"] == "washout" and post["series_number"] == "12"
    html = (out / "report.html").read_text()
    assert html.count('class="curve-plot"') == 5
    # The plain text is wrapped at its width: compare the words, not the line breaks.
    text = " ".join((out / "report.txt").read_text().split())
    assert "washout (type III) curve" in text and "microscopic" in text

    _, truth, out = diffusion
    text = " ".join((out / "report.txt").read_text().split())
    blooming = [k for k, r in truth["rois"].items() if r.get("expected", {}).get("blooming")]
    assert text.count("It shows blooming on SWI") == len(blooming) >= 1
    assert "restricted diffusion" in text and "T2 shine-through" in text
    # DCM 113041 Apparent Diffusion Coefficient in UCUM 10-6.mm2/s, one per lesion
    found = [
        (
            float(item.MeasuredValueSequence[0].NumericValue),
            item.MeasuredValueSequence[0].MeasurementUnitsCodeSequence[0].CodeValue,
        )
        for item in _content_items(dcmread(out / "sr.dcm"))
        if "ConceptNameCodeSequence" in item
        and item.ConceptNameCodeSequence[0].get("CodeValue") == "113041"
    ]
    assert len(found) == 5 and {u for _, u in found} == {"10-6.mm2/s"}


def _content_items(dataset):
    """Every content item of an SR, depth first (PS3.3 C.17.3 ContentSequence)."""
    for item in getattr(dataset, "ContentSequence", []):
        yield item
        yield from _content_items(item)


@pytest.mark.dciodvfy
def test_the_sr_with_the_new_fields_passes_dciodvfy(diffusion, kinetics):
    binary = shutil.which("dciodvfy")
    if binary is None:
        if os.environ.get("CI"):
            pytest.fail("dciodvfy (Debian dicom3tools) is required when CI is set")
        pytest.skip("dciodvfy (Debian dicom3tools) is not installed")
    for _, _, out in (diffusion, kinetics):
        result = subprocess.run(
            [binary, str(out / "sr.dcm")], capture_output=True, text=True, timeout=60
        )
        errors = [
            line
            for line in (result.stdout + result.stderr).splitlines()
            if line.startswith("Error")
        ]
        assert errors == []


def test_an_adc_map_whose_header_scales_it_into_other_units_is_caught(tmp_path):
    # Files, not images: the ADC map's RescaleSlope (PS3.3 C.11.1.1.2) claims the stored values
    # are in 10^-3 units of 10^-6 mm^2/s, as a header with the wrong vendor scaling would.
    study = generate_study("diffusion", tmp_path / "case", motion=False)
    truth = json.loads(study.truth_path.read_text())
    adc_uid = truth["series"]["ADC"]["series_instance_uid"]
    changed = 0
    for path in study.study_dir.rglob("*"):
        if not path.is_file():
            continue
        ds = dcmread(path)
        if ds.SeriesInstanceUID != adc_uid:
            continue
        ds.RescaleSlope = float(getattr(ds, "RescaleSlope", 1.0)) * 1e-3
        ds.RescaleIntercept = float(getattr(ds, "RescaleIntercept", 0.0)) * 1e-3
        ds.save_as(path)
        changed += 1
    assert changed > 0
    findings = analyze_case(study.case_path, study_dir=study.study_dir, register=False).findings
    adc = next(s for s in findings["series"] if s["role"] == "ADC" and s["measured"])
    assert adc["adc_units_ok"] is False
    assert any(q["code"] == "adc-units-implausible" for q in findings["qc"])
    for lesion in findings["lesions"]:
        expected = truth["rois"][lesion["id"]]["expected"]
        assert lesion["diffusion"]["adc_1e-6_mm2_s"] is None
        assert lesion["diffusion"]["restricted"] == expected["restricted"]
        assert lesion["diffusion"]["shine_through"] == expected["shine_through"]

"""Each stage of the job on its own (sigreport.pipeline, docs/usage.md), on a small study whose
values are all known (builders.study: piecewise-constant tissue balls, ROIs well inside them)."""

from __future__ import annotations

import json
import re
from dataclasses import replace
from pathlib import Path

import jsonschema
import numpy as np
import pytest
import SimpleITK as sitk

from sigreport.errors import InputError
from sigreport.lexicon_tables import load_lexicon
from sigreport.model import ROLE_ORDER, Grade, RoiKind, Role
from sigreport.pipeline import (
    align_series,
    analyze_case,
    characterize_study,
    load_series,
    measure_study,
    plan_report,
    resolve_study_dir,
    run_report,
)
from sigreport.report import (
    build_findings,
    build_key_slices,
    lesion_phrases,
    phrases_from_findings,
    write_report,
)
from sigreport.rois import load_case

from builders.study import (
    LESION_CENTRE,
    ORIGIN,
    SIZE,
    SPACING,
    VALUES,
    ratio,
    write_study,
)

SCHEMA = Path(__file__).resolve().parents[2] / "docs" / "findings.schema.json"
ROLES = (Role.T1, Role.T2, Role.FLAIR)


class Recorder:
    """A progress callback (sigreport.model.Progress) that keeps every call."""

    def __init__(self) -> None:
        self.calls: list[tuple[str, int | None, int | None]] = []

    def __call__(self, message: str, done: int | None = None, total: int | None = None) -> None:
        self.calls.append((message, done, total))


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    return write_study(tmp_path_factory.mktemp("stages"))


@pytest.fixture(scope="module")
def lexicon():
    return load_lexicon()


@pytest.fixture(scope="module")
def plan(written, lexicon):
    case = load_case(written.case_path)
    return plan_report(case, lexicon, resolve_study_dir(case))


@pytest.fixture(scope="module")
def images(plan):
    return load_series(plan)


@pytest.fixture(scope="module")
def aligned(plan, images):
    return align_series(plan, images)


@pytest.fixture(scope="module")
def measurement(plan, images, aligned):
    return measure_study(plan, images, aligned)


@pytest.fixture(scope="module")
def result(plan, measurement):
    return characterize_study(plan, measurement)


# --------------------------------------------------------------------------------------------
# plan


def test_plan_measures_one_series_per_role_in_reading_order(plan):
    assert list(plan.measured) == [r for r in ROLE_ORDER if r in ROLES]
    assert {s.role for s in plan.index.stacks} == set(ROLES)
    # Equal voxels everywhere and no 3D series: the finest series is the first in reading order.
    assert plan.anchor_role is Role.T1 and plan.anchor is plan.measured[Role.T1]
    assert plan.register is False  # the case file's [options] register = false
    assert [r.id for r in plan.regions] == ["L1", "R1"]
    assert plan.anchor_note is not None and "registration off" in plan.anchor_note.message


def test_plan_takes_the_register_argument_over_the_case_file(written, lexicon):
    case = load_case(written.case_path)
    assert plan_report(case, lexicon, resolve_study_dir(case), register=True).register is True


def test_plan_reports_indexing_progress_per_file(written, lexicon):
    case = load_case(written.case_path)
    progress = Recorder()
    plan_report(case, lexicon, resolve_study_dir(case), progress=progress)
    counted = [c for c in progress.calls if c[0] == "indexing files"]
    n_files = SIZE[2] * len(ROLES)
    assert [c[1] for c in counted] == list(range(1, n_files + 1))
    assert {c[2] for c in counted} == {n_files}


def test_plan_refuses_a_study_without_mr_series(tmp_path, lexicon, written):
    (tmp_path / "notes.txt").write_text("not DICOM")
    case = load_case(written.case_path)
    with pytest.raises(InputError, match="no usable MR series .*notes.txt"):
        plan_report(case, lexicon, tmp_path)


def test_a_case_without_study_folder_is_refused(written):
    case = replace(load_case(written.case_path), study=None)
    with pytest.raises(InputError, match="case.toml: no study folder"):
        resolve_study_dir(case)
    assert resolve_study_dir(case, Path("elsewhere")) == Path("elsewhere")


# --------------------------------------------------------------------------------------------
# load


def test_load_gives_the_written_geometry_and_values(plan, images):
    assert list(images) == list(plan.measured)
    for role, image in images.items():
        assert image.GetSize() == SIZE
        assert image.GetSpacing() == pytest.approx(SPACING)
        assert image.GetOrigin() == pytest.approx(ORIGIN)
        values = np.unique(sitk.GetArrayViewFromImage(image))
        assert sorted(values.tolist()) == sorted(VALUES[role.value])


# --------------------------------------------------------------------------------------------
# align


def test_align_without_registration_trusts_the_frame_of_reference(plan, aligned):
    methods = {role: a.method for role, a in aligned.alignments.items()}
    assert methods == {
        Role.T1: "identity",
        Role.T2: "frame-of-reference",
        Role.FLAIR: "frame-of-reference",
    }
    assert aligned.qc == ()


def test_align_registers_a_series_of_another_frame_and_says_so(plan, images):
    stack = plan.measured[Role.T2]
    other = replace(
        plan,
        measured={**plan.measured, Role.T2: replace(stack, frame_of_reference_uid="1.2.3.4")},
    )
    aligned = align_series(other, images)
    assert aligned.alignments[Role.T2].method == "rigid"
    assert aligned.alignments[Role.FLAIR].method == "frame-of-reference"
    assert [n.code for n in aligned.qc] == ["registered-other-frame"]


def test_registration_of_unmoved_series_finds_no_motion(plan, images):
    progress = Recorder()
    aligned = align_series(replace(plan, register=True), images, progress=progress)
    for role in (Role.T2, Role.FLAIR):
        alignment = aligned.alignments[role]
        assert alignment.method == "rigid"
        # The series share the anatomy voxel for voxel: any motion found is optimizer noise.
        assert np.linalg.norm(alignment.translation_mm) < 0.1
        assert alignment.rotation_deg < 0.2
    # One registration call for every series (the anchor's pyramid is built once).
    assert [c[0] for c in progress.calls] == ["registering T2, FLAIR to T1"]


def test_registration_reads_its_settings_from_the_run_lexicon(plan, images):
    # A motion limit no registration can meet: every registered series must then be flagged,
    # which shows the settings come from the plan's lexicon object, not from a file.
    strict = replace(
        plan.lexicon,
        alignment=replace(plan.lexicon.alignment, max_translation_mm=1e-9, max_rotation_deg=1e-9),
    )
    aligned = align_series(replace(plan, register=True, lexicon=strict), images)
    flagged = {n.message.split(":")[0] for n in aligned.qc if n.code == "registration"}
    # A series the cheap check found aligned keeps the scanner's alignment (no motion at all,
    # nothing to flag); every series the optimizer moved is flagged.
    moved = {
        role.value
        for role, a in aligned.alignments.items()
        if a.method == "rigid" and (np.linalg.norm(a.translation_mm) > 0 or a.rotation_deg > 0)
    }
    assert moved and flagged == moved


# --------------------------------------------------------------------------------------------
# measure


def test_measure_gives_each_tissue_its_exact_value(measurement):
    by_id = {roi.spec.id: roi for roi in measurement.study.rois}
    for role in ROLES:
        _, lesion, reference = VALUES[role.value]
        assert by_id["L1"].by_role[role].stats.median == lesion
        assert by_id["R1"].by_role[role].stats.median == reference
        assert by_id["L1"].by_role[role].stats.sd == pytest.approx(0.0, abs=1e-9)
    assert set(measurement.samples) == {(i, r) for i in ("L1", "R1") for r in ROLES}
    assert measurement.qc == ()


def test_measure_gives_volume_close_to_the_sphere(measurement):
    lesion = next(r for r in measurement.study.rois if r.spec.kind is RoiKind.LESION)
    # 4/3 pi r^3 of the 6 mm ROI, in ml; voxel sampling with partial-volume weights.
    assert lesion.volume_ml == pytest.approx(4.0 / 3.0 * np.pi * 6.0**3 / 1000.0, rel=0.05)


def test_measure_notes_a_reference_that_overlaps_the_lesion(plan, images, aligned):
    case = plan.case
    lesion, reference = case.rois
    moved = replace(reference, center_mm=lesion.center_mm)
    regions = (plan.regions[0], replace(plan.regions[1], center_mm=lesion.center_mm))
    other = replace(plan, case=replace(case, rois=(lesion, moved)), regions=regions)
    measurement = measure_study(other, images, aligned)
    assert [n.code for n in measurement.qc] == ["reference-overlaps-lesion"]


# --------------------------------------------------------------------------------------------
# characterize


def test_characterize_gives_the_true_ratios_and_grades(result):
    (lesion,) = result.lesions
    for role in ROLES:
        assert lesion.signal[role].ratio == pytest.approx(ratio(role.value), rel=1e-12)
    assert lesion.signal[Role.T2].grade is Grade.HYPERINTENSE
    assert lesion.signal[Role.FLAIR].grade is Grade.HYPOINTENSE
    # 100 * (1 - 0.2 / 2.5): docs/usage.md, suppression drop.
    assert lesion.suppression["fluid"].drop_percent == pytest.approx(92.0)
    assert lesion.behaviour == ("follows-fluid",)


def test_characterize_carries_the_lexicon_words(result, lexicon):
    (lesion,) = result.lesions
    rule = lexicon.rules.behaviour["follows-fluid"]
    (phrase,) = lesion.phrases().behaviour
    assert (phrase.key, phrase.phrase, phrase.considerations) == (
        rule.key,
        rule.phrase,
        rule.considerations,
    )
    # 2.5 is at least thresholds.toml [qualifiers] marked_hyper_min_ratio (2.0).
    assert lesion.phrases().grades["T2"] == "markedly hyperintense"


# --------------------------------------------------------------------------------------------
# findings and key slices (sigreport.report)


def test_findings_validate_against_the_schema(plan, aligned, measurement, result, lexicon):
    qc = [*plan.qc, *aligned.qc, *measurement.qc, *result.qc, plan.anchor_note]
    findings = build_findings(
        plan.index,
        plan.measured,
        aligned.alignments,
        plan.anchor_role,
        result,
        qc,
        cautions=lexicon.cautions,
    )
    jsonschema.Draft202012Validator(json.loads(SCHEMA.read_text())).validate(findings)
    assert findings["cautions"] == list(lexicon.cautions)
    assert [s["anchor"] for s in findings["series"]] == [True, False, False]
    levels = [q["level"] for q in findings["qc"]]
    assert levels == sorted(levels, key=["error", "warning", "info"].index)


def test_findings_read_back_get_the_words_characterization_chose(result, plan, aligned, lexicon):
    findings = build_findings(
        plan.index, plan.measured, aligned.alignments, plan.anchor_role, result, [], cautions=("c",)
    )
    assert phrases_from_findings(json.loads(json.dumps(findings)), lexicon.rules) == lesion_phrases(
        result
    )


def test_key_slices_cut_through_the_lesion_centre(plan, images, measurement):
    every = build_key_slices(
        plan.case, images, measurement.samples, plan.measured, anchor=plan.anchor_role
    )
    slices = [k for k in every if k.kind == "lesion"]
    assert [(k.roi_id, k.role) for k in slices] == [("L1", r) for r in ROLES]
    # One key slice per reference and control ROI, on the anchor, outlining that ROI alone.
    others = [k for k in every if k.kind != "lesion"]
    expected = [(s.id, s.kind.value) for s in plan.case.rois if s.kind.value != "lesion"]
    assert [(k.roi_id, k.kind) for k in others] == expected
    assert all(k.role is plan.anchor_role and k.reference_mask is None for k in others)
    assert all(k.lesion_mask.any() for k in others)
    # The lesion centre's slice: (z - origin z) / slice spacing.
    centre_slice = round((LESION_CENTRE[2] - ORIGIN[2]) / SPACING[2])
    for key in slices:
        assert key.slice_index == centre_slice
        assert key.image.shape == (SIZE[1], SIZE[0]) and key.lesion_mask.any()
        rows, cols = np.nonzero(key.lesion_mask)
        # Row index follows y, column index follows x (identity direction).
        assert cols.mean() * SPACING[0] + ORIGIN[0] == pytest.approx(LESION_CENTRE[0], abs=1.0)
        assert rows.mean() * SPACING[1] + ORIGIN[1] == pytest.approx(LESION_CENTRE[1], abs=1.0)
        instance = plan.measured[key.role].instances[centre_slice]
        assert key.sop_instance_uid == instance.sop_instance_uid
        # The image number a viewer shows is the slice's own InstanceNumber (0020,0013).
        assert key.instance_number == instance.instance_number is not None


# --------------------------------------------------------------------------------------------
# the whole job, with and without writing


def test_analyze_writes_nothing_and_finds_what_run_report_writes(written, tmp_path):
    before = sorted(
        p.relative_to(written.study_dir.parent) for p in written.study_dir.parent.rglob("*")
    )
    progress = Recorder()
    analysis = analyze_case(written.case_path, progress=progress)
    after = sorted(
        p.relative_to(written.study_dir.parent) for p in written.study_dir.parent.rglob("*")
    )
    assert before == after
    messages = [c[0] for c in progress.calls]
    assert messages[0].startswith("indexing") and "characterizing" in messages
    assert any(m.startswith("loading T2: series 3 (t2 [test] <b>)") for m in messages)

    run = run_report(written.case_path, tmp_path / "out")
    written_findings = json.loads((tmp_path / "out" / "findings.json").read_text())
    for findings in (analysis.findings, written_findings):
        findings.pop("generated")
    assert json.loads(json.dumps(analysis.findings)) == written_findings
    assert run.report_html == tmp_path / "out" / "report.html"


def test_write_reports_progress_for_every_file(
    plan, images, measurement, result, aligned, lexicon, tmp_path
):
    findings = build_findings(
        plan.index,
        plan.measured,
        aligned.alignments,
        plan.anchor_role,
        result,
        [],
        cautions=lexicon.cautions,
    )
    slices = build_key_slices(plan.case, images, measurement.samples, plan.measured)
    progress = Recorder()
    write_report(
        tmp_path / "out",
        findings,
        slices,
        {r.value: s for r, s in plan.measured.items()},
        lexicon=lexicon,
        phrases=lesion_phrases(result),
        progress=progress,
    )
    text = " ".join(c[0] for c in progress.calls)
    for name in ("findings.json", "table.csv", "report.md", "report.txt", "report.html", "sr.dcm"):
        assert name in text and (tmp_path / "out" / name).is_file()
    done = [c[1] for c in progress.calls]
    assert done == sorted(done) and progress.calls[-1][1] == progress.calls[-1][2]


# --------------------------------------------------------------------------------------------
# one lexicon


def _site_with_grades(folder: Path, hypo: float, hyper: float) -> Path:
    from sigreport import lexicon as files

    folder.mkdir(parents=True, exist_ok=True)
    text = (files.bundled_dir() / "thresholds.toml").read_text(encoding="utf-8")
    text = re.sub(r"(?m)^hyper_min_ratio = .*$", f"hyper_min_ratio = {hyper}", text)
    text = re.sub(r"(?m)^hypo_max_ratio = .*$", f"hypo_max_ratio = {hypo}", text)
    # Keep the qualifier bands ordered around the new grade band (rules.py checks it).
    text = re.sub(r"(?m)^mild_hyper_max_ratio = .*$", f"mild_hyper_max_ratio = {hyper + 0.1}", text)
    text = re.sub(
        r"(?m)^marked_hyper_min_ratio = .*$", f"marked_hyper_min_ratio = {hyper + 0.5}", text
    )
    text = re.sub(r"(?m)^mild_hypo_min_ratio = .*$", f"mild_hypo_min_ratio = {hypo - 0.1}", text)
    text = re.sub(
        r"(?m)^marked_hypo_max_ratio = .*$", f"marked_hypo_max_ratio = {hypo - 0.3}", text
    )
    (folder / "thresholds.toml").write_text(text, encoding="utf-8")
    return folder


def test_a_site_changing_its_grade_thresholds_gets_a_plot_that_agrees(written, tmp_path):
    site = _site_with_grades(tmp_path / "site", 0.7, 1.3)
    lexicon = load_lexicon(site)
    assert lexicon.iso_band == (0.7, 1.3)
    run_report(written.case_path, tmp_path / "out", site_lexicon=site)
    html = (tmp_path / "out" / "report.html").read_text(encoding="utf-8")
    assert "iso 0.7-1.3" in html and "iso 0.9-1.1" not in html
    # The shaded band spans exactly the ratios graded isointense: its edges sit where the axis
    # puts 0.7 and 1.3 (read the axis from two of its labelled ticks).
    band = re.search(
        r'<rect x="\d+" y="([\d.]+)" width="\d+" height="([\d.]+)"[^>]*class="iso-band"', html
    )
    ticks = {
        float(v): float(y)
        for y, v in re.findall(
            r'<text x="\d+" y="([\d.]+)" font-size="10" text-anchor="end" fill="#333333">([\d.]+)</text>',
            html,
        )
    }
    (v0, y0), (v1, y1) = min(ticks.items()), max(ticks.items())
    per_unit = (y0 - y1) / (v1 - v0)  # SVG y grows downwards
    y_low = y0 - (0.7 - v0) * per_unit - 3.5  # tick labels sit 3.5 px below their tick
    y_high = y0 - (1.3 - v0) * per_unit - 3.5
    # (The default band's edges, 0.9 and 1.1, would be 0.2 ratio units, several pixels, away.)
    assert float(band.group(1)) == pytest.approx(y_high, abs=0.3)
    assert float(band.group(2)) == pytest.approx(y_low - y_high, abs=0.3)


def test_a_site_wording_with_a_plot_band_is_refused(tmp_path):
    from sigreport import lexicon as files

    site = tmp_path / "site"
    site.mkdir()
    text = (files.bundled_dir() / "wording.toml").read_text(encoding="utf-8")
    (site / "wording.toml").write_text(text + "\n[plot]\niso_low = 0.9\niso_high = 1.1\n")
    with pytest.raises(InputError, match=r"\[plot\] is no longer read.*thresholds.toml \[grade\]"):
        load_lexicon(site)


def test_grades_follow_the_site_thresholds(written, tmp_path):
    # With the iso band widened to (0.4, 3.0), T2 (ratio 2.5) becomes isointense, in the
    # findings and in the words; T1 (0.35) and FLAIR (0.2) stay hypointense.
    site = _site_with_grades(tmp_path / "wide", 0.4, 3.0)
    analysis = analyze_case(written.case_path, site_lexicon=site)
    grades = {r: s["grade"] for r, s in analysis.findings["lesions"][0]["signal"].items()}
    assert grades == {"T1": "hypointense", "T2": "isointense", "FLAIR": "hypointense"}
    assert analysis.phrases["L1"].grades["T2"] == "isointense"


def test_every_lexicon_table_is_checked_before_any_work(tmp_path):
    from sigreport import lexicon as files

    site = tmp_path / "site"
    site.mkdir()
    text = (files.bundled_dir() / "alignment.toml").read_text(encoding="utf-8")
    (site / "alignment.toml").write_text(re.sub(r"(?m)^margin_mm = .*$", "", text))
    with pytest.raises(InputError, match=r"alignment.toml \[registration\]: margin_mm is missing"):
        load_lexicon(site)
    (site / "alignment.toml").unlink()
    (site / "cautions.toml").write_text("cautions = []\n")
    with pytest.raises(InputError, match="cautions.toml: 'cautions' must be a non-empty list"):
        load_lexicon(site)


def test_the_lexicon_comes_from_the_environment_when_no_site_is_given(tmp_path, monkeypatch):
    site = _site_with_grades(tmp_path / "env-site", 0.8, 1.2)
    monkeypatch.setenv("SIGREPORT_LEXICON", str(site))
    lexicon = load_lexicon()
    assert lexicon.site == site and lexicon.iso_band == (0.8, 1.2)
    assert lexicon.rules.thresholds.grade.hyper_min_ratio == 1.2

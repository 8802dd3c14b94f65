"""The draft's wording in the edge cases a radiologist would strike out, one test per class:
no programming value or HTML entity in the text, "not assessed" said when a finding is not
assessed, nothing asserted about what was not measured, the failed ROI blamed, borderline
grades, rules that assume another reference tissue, the reference's own enhancement, and the
size of an outline against the volume of a typed shape.

Each case goes through characterization (sigreport.measure) and the real templates, from
hand-made medians (builders.measured)."""

from __future__ import annotations

import html
import itertools
import re
from typing import Any

import pytest

from sigreport.measure import characterize, load_rules
from sigreport.model import Acquisition, RoiKind, Role
from sigreport.report.findings import lesion_phrases
from sigreport.report.html import render_html
from sigreport.report.text import display_rows, render_text, report_context
from sigreport.report.wording import load_wording

from builders.measured import Build, stack

T1, T2, FLAIR, T1FS, T1POST, STIR = Role.T1, Role.T2, Role.FLAIR, Role.T1FS, Role.T1POST, Role.STIR

#: What must never appear in report.md / report.txt: a programming value, or an HTML entity.
LEAKS = re.compile(r"\bNone\b|\bnan\b|\bNaN\b|\bnull\b|\binf\b|&gt;|&lt;|&amp;|&#|-0 %|-0\.0 %")


@pytest.fixture(autouse=True)
def _bundled_lexicon(monkeypatch):
    monkeypatch.delenv("SIGREPORT_LEXICON", raising=False)


@pytest.fixture(scope="module")
def rules():
    return load_rules(None)


@pytest.fixture(scope="module")
def wording():
    return load_wording(None)


def _findings(result) -> dict[str, Any]:
    return {
        "schema": "sigreport-findings/2",
        "tool": {"name": "sigreport", "version": "test"},
        "study": {
            "study_instance_uid": None,
            "study_date": None,
            "accession_number": None,
            "patient_name": None,
            "patient_id": None,
            "birth_date": None,
            "sex": None,
        },
        "series": [],
        "rois": [dict(r) for r in result.rois],
        "lesions": [lesion.to_json() for lesion in result.lesions],
        "qc": [note.to_json() for note in result.qc],
        "cautions": ["Draft for review."],
    }


def _render(result, wording) -> tuple[str, str, dict[str, Any]]:
    findings = _findings(result)
    context = report_context(findings, wording, lesion_phrases(result))
    md, txt = render_text(context)
    return md, txt, findings


def _text(result, wording) -> str:
    md, txt, _ = _render(result, wording)
    return " ".join(txt.split())


# Medians per role: a lesion with something to say on every pair, and a white-matter reference.
LESION = {T1: 400.0, T1FS: 380.0, T2: 1800.0, FLAIR: 300.0, STIR: 1500.0, T1POST: 700.0}
REFERENCE = {T1: 600.0, T1FS: 590.0, T2: 600.0, FLAIR: 620.0, STIR: 500.0, T1POST: 610.0}

STUDIES = [
    combo
    for n in range(1, len(LESION) + 1)
    for combo in itertools.combinations(LESION, n)
    if n <= 2 or n == len(LESION) or n == len(LESION) - 1
]


@pytest.mark.parametrize("roles", STUDIES, ids=lambda roles: "+".join(r.value for r in roles))
def test_no_programming_value_or_entity_in_text_whatever_pairs_the_study_lacks(
    roles, rules, wording
):
    lesion = Build.lesion({r: LESION[r] for r in roles})
    unmeasured = Build.roi("L2", RoiKind.LESION, {r: None for r in roles})  # no voxels at all
    ref = Build.reference({r: REFERENCE[r] for r in roles})
    csf = Build.control("C1", "CSF", {r: REFERENCE[r] * 2 for r in roles})
    result = characterize(Build.study([lesion, unmeasured, ref, csf]), rules)
    md, txt, findings = _render(result, wording)
    for name, text in (("report.md", md), ("report.txt", txt)):
        found = LEAKS.findall(text)
        assert not found, f"{name} for {'+'.join(r.value for r in roles)}: {found}"
    # The page's visible text (tags dropped, entities decoded as a browser does) neither.
    context = report_context(findings, wording, lesion_phrases(result))
    page = render_html(context, findings, {}, wording, iso_band=(0.9, 1.1))
    visible = html.unescape(re.sub(r"<[^>]*>", " ", re.sub(r"(?s)<(style|svg).*?</\1>", "", page)))
    assert not re.findall(r"\bNone\b|\bnan\b|\bnull\b|-0 %", visible)


def test_markdown_writes_arrows_as_text_not_entities(rules, wording):
    # The pattern-pair qc note says "T1FS -> T1POSTFS"; report.md must read the same.
    lesion = Build.lesion({T1: 400.0, T2: 1800.0}, cv=0.01)
    result = characterize(Build.study([lesion, Build.reference({T1: 600.0, T2: 600.0})]), rules)
    findings = _findings(result)
    findings["qc"].append({"level": "info", "code": "x", "message": "T1FS -> T1POSTFS & more"})
    md, _ = render_text(report_context(findings, wording, lesion_phrases(result)))
    assert "T1FS -\\> T1POSTFS" in md or "T1FS -> T1POSTFS" in md
    assert "&gt;" not in md and "&amp;" not in md


def test_a_flow_void_says_not_assessed_in_text_and_table(rules, wording):
    roles = (T1, T2, FLAIR, T1POST)
    void = Build.lesion({T1: 20.0, T2: 22.0, FLAIR: 19.0, T1POST: 19.6})
    ref = Build.reference({r: 600.0 for r in roles})
    result = characterize(Build.study([void, ref], noise={r: 10.0 for r in roles}), rules)
    assert result.lesions[0].flow_void is True
    md, txt, findings = _render(result, wording)
    text = " ".join(txt.split())
    assert "not assessed" in text
    assert "No significant enhancement" not in text and "signal drop" not in text
    assert "suppress" not in text.split("SIGNAL-BEHAVIOUR TABLE")[0].replace("suppression are", "")
    rows = display_rows(findings)
    post = next(r for r in rows if r["role"] == "T1POST")
    flair = next(r for r in rows if r["role"] == "FLAIR")
    assert post["enhancement"] == "not assessed" and flair["drop"] == "not assessed"


def test_nothing_is_asserted_about_an_unmeasured_lesion(rules, wording):
    roles = (T1, T2, FLAIR)
    empty = Build.lesion({r: None for r in roles})  # no voxels on any series
    ref = Build.reference({r: 600.0 for r in roles})
    result = characterize(Build.study([empty, ref]), rules)
    assert result.lesions[0].flow_void is None
    text = _text(result, wording)
    assert "flow void" not in text.lower().split("quality control")[0]
    assert "could not be measured on T1, T2 and FLAIR" in text
    assert "intense" not in text.split("SIGNAL-BEHAVIOUR TABLE")[0]


def test_a_failed_reference_is_blamed_not_the_lesion(rules, wording):
    lesion = Build.lesion({T1: 400.0, T2: 1800.0})
    ref = Build.reference({T1: 600.0, T2: None})  # too small on T2
    result = characterize(Build.study([lesion, ref]), rules)
    text = _text(result, wording)
    assert "could not be graded on T2: its reference ROI R1 could not be measured there" in text
    assert "It could not be measured on T2" not in text


def test_without_a_reference_the_text_says_so_and_names_no_roi(rules, wording):
    lesion = Build.lesion({T1: 400.0, T2: 1800.0})
    result = characterize(Build.study([lesion]), rules)
    text = _text(result, wording)
    assert "could not be graded on T1 and T2: the case file gives it no reference ROI" in text
    assert "reference ROI the reference" not in text and not LEAKS.findall(text)


def test_a_borderline_grade_is_said_and_fires_no_rule(rules, wording):
    # A fat lesion at T2 ratio 0.90: hypointense by the threshold, but at its edge.
    lesion = Build.lesion({T1: 1500.0, T1FS: 60.0, T2: 540.0})
    ref = Build.reference({T1: 600.0, T1FS: 590.0, T2: 600.0})
    result = characterize(Build.study([lesion, ref]), rules)
    got = result.lesions[0]
    t2 = got.signal[T2]
    assert t2.grade.value == "hypointense" and t2.borderline is True  # the grade stays
    assert got.to_json()["signal"]["T2"]["borderline"] is True
    assert "t2-dark" not in got.behaviour
    assert "borderline hypointense to white matter on T2" in _text(result, wording)
    # Far from every threshold: not borderline, and the rule fires.
    dark = Build.lesion({T1: 1500.0, T1FS: 60.0, T2: 300.0})
    other = characterize(Build.study([dark, ref]), rules).lesions[0]
    assert other.signal[T2].borderline is False and "t2-dark" in other.behaviour


def test_every_grade_names_the_reference(rules, wording):
    lesion = Build.lesion({T1: 400.0, T2: 1800.0, FLAIR: 300.0})
    ref = Build.reference({T1: 600.0, T2: 600.0, FLAIR: 620.0}, tissue="muscle")
    text = _text(characterize(Build.study([lesion, ref]), rules), wording)
    for grade in ("hypointense to muscle on T1", "hyperintense to muscle on T2"):
        assert grade in text


def test_a_rule_assuming_another_reference_does_not_fire_and_the_text_says_why(rules, wording):
    # T1-bright without fat suppression: a methemoglobin / melanin hint against parenchyma,
    # meaningless against muscle or CSF, which are dark on T1 (behaviour.toml references).
    values = {T1: 1500.0, T1FS: 1400.0}
    against_wm = characterize(
        Build.study([Build.lesion(values), Build.reference({T1: 600.0, T1FS: 590.0})]), rules
    ).lesions[0]
    assert "t1-bright-not-fat" in against_wm.behaviour
    for tissue in ("muscle", "CSF"):
        ref = Build.reference({T1: 600.0, T1FS: 590.0}, tissue=tissue)
        result = characterize(Build.study([Build.lesion(values), ref]), rules)
        got = result.lesions[0]
        assert "t1-bright-not-fat" not in got.behaviour
        assert "t1-bright-not-fat" in got.to_json()["behaviour_not_applied"]
        text = _text(result, wording)
        assert "T1 hyperintense without fat suppression" in text
        assert f"graded against {tissue}" in text and "assumes a reference of white matter" in text


def test_when_the_reference_enhanced_the_text_gives_both_and_the_flag_follows_raw(rules, wording):
    same = Acquisition(repetition_time_ms=500.0, echo_time_ms=12.0, scanning_sequence=("SE",))
    stacks = {
        T1: stack(T1, same, scaling_key="s"),
        T1POST: stack(T1POST, same, scaling_key="s"),
    }
    # The lesion rises 40 % raw, and so does the reference: normalized it is 0 %.
    lesion = Build.lesion({T1: 500.0, T1POST: 700.0})
    ref = Build.reference({T1: 600.0, T1POST: 840.0})
    result = characterize(Build.study([lesion, ref], stacks=stacks), rules)
    e = result.lesions[0].enhancement
    assert e.percent == pytest.approx(0.0, abs=1e-9) and e.raw_percent == pytest.approx(40.0)
    assert e.basis == "raw" and e.enhancing is True  # the trustworthy (raw) percent
    out = result.lesions[0].to_json()["enhancement"]
    assert out["basis"] == "raw" and out["reference_percent"] == pytest.approx(40.0)
    text = _text(result, wording)
    assert "+40 %" in text and "0 % normalized to white matter" in text
    assert "the reference itself changed by +40 %" in text


def test_a_typed_shape_gives_the_roi_volume_and_an_outline_the_lesion_size(rules, wording):
    from dataclasses import replace

    from sigreport.model import RoiShape

    lesion = Build.lesion({T1: 400.0, T2: 1800.0})
    ref = Build.reference({T1: 600.0, T2: 600.0})
    typed = _text(characterize(Build.study([lesion, ref]), rules), wording)
    assert "ROI volume 0.50 ml" in typed and "It measures" not in typed
    outlined = replace(
        lesion,
        spec=replace(lesion.spec, shape=RoiShape.MASK, radius_mm=None),
        diameters_mm=(12.4, 8.1, 9.0),
    )
    result = characterize(Build.study([outlined, ref]), rules)
    size = result.lesions[0].to_json()["size"]
    assert size == {"source": "mask", "volume_ml": 0.5, "diameters_mm": [12.4, 8.1, 9.0]}
    text = _text(result, wording)
    assert "It measures 12 x 8 mm in the axial plane and 9 mm craniocaudally (0.50 ml)" in text


def test_minus_zero_never_appears(rules, wording):
    same = Acquisition(repetition_time_ms=500.0, echo_time_ms=12.0, scanning_sequence=("SE",))
    stacks = {T1: stack(T1, same, scaling_key="s"), T1POST: stack(T1POST, same, scaling_key="s")}
    lesion = Build.lesion({T1: 1000.0, T1POST: 997.0, T2: 1000.0, FLAIR: 1002.0})
    ref = Build.reference({T1: 600.0, T1POST: 600.0, T2: 600.0, FLAIR: 600.0})
    result = characterize(Build.study([lesion, ref], stacks=stacks), rules)
    assert result.lesions[0].enhancement.percent < 0  # -0.3 %
    md, txt, _ = _render(result, wording)
    for text in (md, txt):
        assert not re.search(r"-0(\.0+)?\b(?!\.\d*[1-9])", text), text

"""Interval change between two findings objects (sigreport.measure.change), on hand-built
findings whose answers are worked out by hand beside each check."""

from __future__ import annotations

import copy
import json
from pathlib import Path

import jsonschema
import pytest

from sigreport.measure.change import interval_change, study_date, with_interval_change
from sigreport.report.text import change_sentence, not_seen_sentence
from sigreport.report.wording import load_wording

SCHEMA = json.loads(
    (Path(__file__).resolve().parents[2] / "docs" / "findings.schema.json").read_text()
)


def _lesion(lesion_id, *, volume=1.0, t2=2.0, t1=1.0, post=1.1, enhancing=False, ref="R1"):
    percent = round(100.0 * (post / t1 - 1.0), 2)
    stats = {"n_voxels": 100, "mean": 1.0, "median": 1.0, "sd": 0.1, "p05": 0.9, "p95": 1.1}
    return {
        "id": lesion_id,
        "site": "right frontal white matter",
        "reference": ref,
        "volume_ml": volume,
        "max_diameter_mm": 12.0,
        "signal": {
            "T1": {**stats, "ratio": t1, "grade": "isointense"},
            "T2": {**stats, "ratio": t2, "grade": "hyperintense"},
            "T1POST": {**stats, "ratio": post, "grade": "isointense"},
        },
        "enhancement": {
            "pre": "T1",
            "post": "T1POST",
            "percent": percent,
            "enhancing": enhancing,
            "pattern": "solid" if enhancing else "none",
        },
        "suppression": {},
        "flow_void": False,
        "behaviour": [],
    }


def _findings(date, lesions, *, tissue="white matter", uid="1.2.3"):
    return {
        "schema": "sigreport-findings/2",
        "tool": {"name": "sigreport", "version": "0.1.0"},
        "study": {"study_instance_uid": uid, "study_date": date, "accession_number": None},
        "series": [],
        "rois": [{"id": "R1", "kind": "reference", "tissue": tissue, "volume_ml": 0.3}],
        "lesions": lesions,
        "qc": [],
        "cautions": ["Draft for review by the reporting radiologist; not a diagnosis."],
    }


def test_study_dates_are_dicom_da():
    # DICOM PS3.5 6.2: DA is YYYYMMDD; anything else is not a date.
    assert study_date("20261203").isoformat() == "2026-12-03"
    assert study_date("2026-12-03") is None
    assert study_date("20260230") is None
    assert study_date(None) is None


def test_matched_lesion_change_in_volume_ratio_and_enhancement():
    prior = _findings("20260603", [_lesion("L1", volume=0.8, t2=2.0, post=1.05)], uid="1.1")
    now = _findings("20261203", [_lesion("L1", volume=1.08, t2=2.3, post=1.8, enhancing=True)])
    change = interval_change(now, prior, current_outlined={"L1"}, prior_outlined={"L1"})
    c = change.lesions["L1"]
    assert c["status"] == "matched"
    assert c["interval_days"] == 183  # 3 June to 3 December 2026: 27 + 31 + 31 + 30 + 31 + 30 + 3
    assert c["volume_change_percent"] == pytest.approx(35.0)  # 1.08 / 0.8 = 1.35
    assert c["ratio_change"] == {"T1": 0.0, "T2": 0.3, "T1POST": 0.75}
    assert c["enhancement_change_pp"] == pytest.approx(80.0 - 5.0)
    assert c["enhancing_before"] is False
    assert change.not_seen == []


def test_volume_change_only_between_two_outlines():
    prior = _findings("20260603", [_lesion("L1", volume=0.8)], uid="1.1")
    now = _findings("20261203", [_lesion("L1", volume=1.2)])
    # The current ROI is a typed sphere: its volume is what the reader typed.
    change = interval_change(now, prior, current_outlined=set(), prior_outlined={"L1"})
    assert change.lesions["L1"]["volume_change_percent"] is None
    assert [n.code for n in change.qc] == ["change-volume-not-compared"]
    assert "L1" in change.qc[0].message and "this study" in change.qc[0].message


def test_size_source_of_schema_2_decides_what_an_outline_is():
    prior = _findings("20260603", [_lesion("L1")], uid="1.1")
    now = _findings("20261203", [_lesion("L1")])
    prior["lesions"][0]["size"] = {"source": "mask", "volume_ml": 0.5}
    now["lesions"][0]["size"] = {"source": "grown", "volume_ml": 0.6}
    change = interval_change(now, prior)
    assert change.lesions["L1"]["volume_change_percent"] == pytest.approx(20.0)
    now["lesions"][0]["size"]["source"] = "roi"
    assert interval_change(now, prior).lesions["L1"]["volume_change_percent"] is None


def test_ratios_are_never_compared_across_reference_tissues():
    prior = _findings("20260603", [_lesion("L1", t2=2.0)], tissue="gray matter", uid="1.1")
    now = _findings("20261203", [_lesion("L1", t2=2.5)], tissue="white matter")
    change = interval_change(now, prior, current_outlined={"L1"}, prior_outlined={"L1"})
    c = change.lesions["L1"]
    assert c["ratio_change"] == {}
    assert c["enhancement_change_pp"] is None
    assert c["volume_change_percent"] is not None  # size does not depend on the reference
    note = next(n for n in change.qc if n.code == "change-reference-differs")
    assert "white matter" in note.message and "gray matter" in note.message


def test_enhancement_pairs_must_match():
    prior = _findings("20260603", [_lesion("L1")], uid="1.1")
    now = _findings("20261203", [_lesion("L1")])
    now["lesions"][0]["enhancement"].update(pre="T1FS", post="T1POSTFS")
    change = interval_change(now, prior)
    assert change.lesions["L1"]["enhancement_change_pp"] is None
    assert any(n.code == "change-enhancement-not-compared" for n in change.qc)


def test_new_and_not_seen_lesions():
    prior = _findings("20260603", [_lesion("L1"), _lesion("L2")], uid="1.1")
    now = _findings("20261203", [_lesion("L1"), _lesion("L3")])
    change = interval_change(now, prior)
    assert change.lesions["L3"]["status"] == "new"
    assert change.lesions["L3"]["volume_change_percent"] is None
    assert change.not_seen == [{"id": "L2", "site": "right frontal white matter"}]


def test_unknown_or_reversed_dates_are_said():
    prior = _findings("20270101", [_lesion("L1")], uid="1.1")
    now = _findings("20261203", [_lesion("L1")])
    change = interval_change(now, prior)
    assert change.interval_days == -29
    assert any(n.code == "prior-after-current" for n in change.qc)
    prior["study"]["study_date"] = None
    change = interval_change(now, prior)
    assert change.interval_days is None
    assert any(n.code == "interval-unknown" for n in change.qc)


def test_findings_with_change_follow_the_schema_and_keep_the_input():
    prior = _findings("20260603", [_lesion("L1", volume=0.8), _lesion("L2")], uid="1.1")
    now = _findings("20261203", [_lesion("L1", volume=1.08, post=1.8, enhancing=True)])
    before = copy.deepcopy(now)
    out = with_interval_change(
        now, interval_change(now, prior, current_outlined={"L1"}, prior_outlined={"L1"})
    )
    assert now == before
    jsonschema.validate(out, SCHEMA)
    assert out["prior"]["not_seen"] == [{"id": "L2", "site": "right frontal white matter"}]
    assert out["lesions"][0]["change"]["volume_change_percent"] == pytest.approx(35.0)


def test_the_text_states_the_change_in_neutral_words():
    wording = load_wording()
    prior = _findings("20260603", [_lesion("L1", volume=0.8), _lesion("L2")], uid="1.1")
    now = _findings(
        "20261203", [_lesion("L1", volume=1.08, post=1.8, enhancing=True), _lesion("L4")]
    )
    out = with_interval_change(
        now, interval_change(now, prior, current_outlined={"L1"}, prior_outlined={"L1"})
    )
    text = change_sentence(out["lesions"][0], wording)
    assert text.startswith("Since the prior study of 2026-06-03 (183 days): larger by 35 %")
    assert "newly enhancing (enhancement +70 percentage points)" in text
    assert "ratio +0.70 on post-contrast T1" in text
    assert "on T2" not in text  # unchanged ratios (+0.00) are not listed
    assert change_sentence(out["lesions"][1], wording) == "New since the prior study of 2026-06-03."
    assert "L2 (right frontal white matter)" in not_seen_sentence(out, wording)
    smaller = copy.deepcopy(out["lesions"][0])
    smaller["change"]["volume_change_percent"] = -12.4
    assert "smaller by 12 %" in change_sentence(smaller, wording)
    assert change_sentence(now["lesions"][0], wording) == ""  # no prior, no sentence

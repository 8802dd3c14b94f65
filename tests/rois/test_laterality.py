"""Laterality: DICOM LPS puts the patient's left at +x (PS3.3 C.7.6.2.1.1)."""

from __future__ import annotations

import pytest

from sigreport.rois.laterality import laterality_note, site_side


@pytest.mark.parametrize(
    ("site", "side"),
    [
        ("right frontal white matter", "right"),
        ("Left parietal", "left"),
        ("bright lesion", None),  # a word, not a side
        ("left and right", None),
        (None, None),
        ("pons", None),
    ],
)
def test_site_side(site, side):
    assert site_side(site) == side


def test_a_right_site_on_the_patients_left_is_a_warning_naming_the_roi():
    note = laterality_note("L4", "right parietal white matter", (27.0, 28.0, 2.0))
    assert note is not None and note.code == "laterality-mismatch" and note.level == "warning"
    assert note.message.startswith("L4: site says right")
    assert "patient's left" in note.message


def test_matching_sides_and_the_midline_are_quiet():
    assert laterality_note("L1", "right frontal", (-27.0, 0.0, 0.0)) is None
    assert laterality_note("L2", "left frontal", (24.0, 0.0, 0.0)) is None
    assert laterality_note("L6", "left paramedian", (-3.0, 0.0, 0.0), midline_margin_mm=5.0) is None
    assert (
        laterality_note("L6", "left paramedian", (-3.0, 0.0, 0.0), midline_margin_mm=2.0)
        is not None
    )

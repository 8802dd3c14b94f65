"""The Version 2 ROI forms in the case file: viewer positions, seeds, automatic references
(docs/rois.md). Every problem is reported at once, naming the ROI and the field."""

from __future__ import annotations

import textwrap
from pathlib import Path

import pytest

from sigreport.errors import InputError
from sigreport.model import AUTO_REFERENCE, RoiShape, ViewerPosition
from sigreport.rois import load_case

FORMS = """
[[roi]]
id = "L1"
kind = "lesion"
site = "left frontal white matter"
shape = "sphere"
at = {series = 5, image = 12, row = 128, column = 96}
radius_mm = 6
reference = "auto"

[[roi]]
id = "L2"
kind = "lesion"
shape = "seed"
center_mm = [10, -20, 5]
max_radius_mm = 15
reference = "R1"

[[roi]]
id = "L3"
kind = "lesion"
shape = "seed"
at = {series = 7, image = 1, row = 10.5, column = 20, frame = 33}

[[roi]]
id = "R1"
kind = "reference"
tissue = "white matter"
shape = "sphere"
center_mm = [-12.0, -30.5, 40.0]
radius_mm = 5.0
"""


def write_case(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "case.toml"
    path.write_text(textwrap.dedent(text))
    return path


def test_viewer_positions_seeds_and_auto_references_are_read(tmp_path):
    case = load_case(write_case(tmp_path, FORMS))
    by_id = {r.id: r for r in case.rois}
    assert by_id["L1"].at == ViewerPosition(series=5, image=12, row=128.0, column=96.0)
    assert by_id["L1"].center_mm is None and by_id["L1"].reference == AUTO_REFERENCE
    assert by_id["L2"].shape is RoiShape.SEED and by_id["L2"].max_radius_mm == 15.0
    assert by_id["L2"].center_mm == (10.0, -20.0, 5.0)
    assert by_id["L3"].at == ViewerPosition(7, 1, 10.5, 20.0, frame=33)
    assert by_id["L3"].max_radius_mm is None  # the default is applied where the seed grows
    assert by_id["L3"].reference == "R1"  # default: the first reference ROI


def test_every_lesion_auto_needs_no_reference_roi(tmp_path):
    text = """
    [[roi]]
    id = "L1"
    kind = "lesion"
    shape = "seed"
    center_mm = [1, 2, 3]
    reference = "auto"
    """
    case = load_case(write_case(tmp_path, text))
    assert case.rois[0].reference == AUTO_REFERENCE


def test_a_lesion_without_auto_still_needs_a_reference_roi(tmp_path):
    text = FORMS.split('[[roi]]\nid = "R1"')[0].replace('reference = "R1"', "")
    with pytest.raises(InputError, match="no reference ROI"):
        load_case(write_case(tmp_path, text))


@pytest.mark.parametrize(
    ("old", "new", "message"),
    [
        (
            "at = {series = 5, image = 12, row = 128, column = 96}",
            "at = {series = 5, image = 12, row = 128, column = 96}\ncenter_mm = [0, 0, 0]",
            r"roi\[1\] \(L1\): give center_mm or at, not both",
        ),
        (
            "at = {series = 5, image = 12, row = 128, column = 96}",
            "at = {series = 5, image = 12, row = 128}",
            r"roi\[1\] \(L1\): at.column is missing",
        ),
        (
            "at = {series = 5, image = 12, row = 128, column = 96}",
            "at = {series = 5, image = 12, row = -1, column = 96}",
            r"roi\[1\] \(L1\): at.row must be a 0-based pixel row",
        ),
        (
            "at = {series = 5, image = 12, row = 128, column = 96}",
            "at = {series = true, image = 12, row = 1, column = 96}",
            r"roi\[1\] \(L1\): at.series must be an integer >= 0, got true",
        ),
        (
            "at = {series = 5, image = 12, row = 128, column = 96}",
            "at = {series = 5, image = 12, row = 1, column = 96, slice = 3}",
            r"roi\[1\] \(L1\): at: unknown key\(s\) slice",
        ),
        (
            "at = {series = 5, image = 12, row = 128, column = 96}",
            "at = [5, 12, 128, 96]",
            r"roi\[1\] \(L1\): at must be a table",
        ),
        (
            "at = {series = 7, image = 1, row = 10.5, column = 20, frame = 33}",
            "at = {series = 7, image = 1, row = 10.5, column = 20, frame = 0}",
            r"roi\[3\] \(L3\): at.frame must be an integer >= 1, got 0",
        ),
        (
            "max_radius_mm = 15",
            "max_radius_mm = 0",
            r"roi\[2\] \(L2\): max_radius_mm must be a positive",
        ),
        (
            "center_mm = [10, -20, 5]\n",
            "",
            r"roi\[2\] \(L2\): center_mm or at is missing \(shape seed",
        ),
        (
            "radius_mm = 6\n",
            "radius_mm = 6\nmax_radius_mm = 9\n",
            r"roi\[1\] \(L1\): max_radius_mm does not apply to shape sphere",
        ),
    ],
)
def test_each_bad_form_field_has_its_message(tmp_path, old, new, message):
    assert old in FORMS
    with pytest.raises(InputError, match=message):
        load_case(write_case(tmp_path, FORMS.replace(old, new, 1)))


def test_at_does_not_apply_to_masks(tmp_path):
    (tmp_path / "m.nii.gz").write_bytes(b"x")
    text = FORMS.replace(
        'shape = "seed"\ncenter_mm = [10, -20, 5]\nmax_radius_mm = 15',
        'shape = "mask"\nmask = "m.nii.gz"\nat = {series = 1, image = 1, row = 1, column = 1}',
    )
    with pytest.raises(InputError, match=r"roi\[2\] \(L2\): at does not apply to shape mask"):
        load_case(write_case(tmp_path, text))


def test_auto_is_not_an_roi_id(tmp_path):
    with pytest.raises(InputError, match=r"roi\[4\] \(auto\): id 'auto' is reserved"):
        load_case(write_case(tmp_path, FORMS.replace('id = "R1"', 'id = "auto"')))


def test_all_form_problems_come_together(tmp_path):
    text = FORMS.replace("row = 128", "row = -3").replace(
        "max_radius_mm = 15", "max_radius_mm = -1"
    )
    with pytest.raises(InputError) as info:
        load_case(write_case(tmp_path, text))
    lines = str(info.value).splitlines()
    assert any("(L1): at.row" in line for line in lines)
    assert any("(L2): max_radius_mm" in line for line in lines)

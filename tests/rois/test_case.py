"""The case file: every field validated, every problem reported at once (docs/usage.md)."""

from __future__ import annotations

import textwrap
from pathlib import Path

import pytest

from sigreport.errors import InputError
from sigreport.model import RoiKind, RoiShape, Role
from sigreport.rois import load_case

GOOD = """
study = "study"

[roles]
FLAIR = 6
T2 = "1.2.3.4"

[options]
register = false
anchor = "T2"

[[roi]]
id = "L1"
kind = "lesion"
site = "right frontal white matter"
shape = "sphere"
center_mm = [12.0, -30.5, 40]
radius_mm = 6

[[roi]]
id = "L2"
kind = "lesion"
shape = "mask"
mask = "masks/l2.nii.gz"
label = 2
reference = "R2"

[[roi]]
id = "R1"
kind = "reference"
tissue = "white matter"
shape = "box"
center_mm = [-12.0, -30.5, 40.0]
size_mm = [10, 10, 6]

[[roi]]
id = "R2"
kind = "reference"
tissue = "grey matter"
shape = "ellipsoid"
center_mm = [0, 0, 0]
semi_axes_mm = [8, 6, 5]

[[roi]]
id = "C1"
kind = "control"
tissue = "CSF"
shape = "sphere"
center_mm = [0, 10, 0]
radius_mm = 3
"""


def write_case(tmp_path: Path, text: str, name: str = "case.toml") -> Path:
    path = tmp_path / name
    path.write_text(textwrap.dedent(text))
    return path


@pytest.fixture
def mask_file(tmp_path: Path) -> Path:
    (tmp_path / "masks").mkdir()
    path = tmp_path / "masks" / "l2.nii.gz"
    path.write_bytes(b"placeholder: load_case only checks that the file exists")
    return path


def test_good_case_is_read_with_absolute_paths_and_resolved_references(tmp_path, mask_file):
    case = load_case(write_case(tmp_path, GOOD))
    assert case.path == (tmp_path / "case.toml").resolve()
    assert case.study == (tmp_path / "study").resolve()
    assert case.roles == {Role.FLAIR: 6, Role.T2: "1.2.3.4"}
    assert case.register is False and case.anchor == "T2"
    by_id = {r.id: r for r in case.rois}
    assert [r.id for r in case.rois] == ["L1", "L2", "R1", "R2", "C1"]
    l1 = by_id["L1"]
    assert l1.kind is RoiKind.LESION and l1.shape is RoiShape.SPHERE
    assert l1.center_mm == (12.0, -30.5, 40.0) and l1.radius_mm == 6.0
    assert l1.reference == "R1"  # default: the first reference ROI
    assert by_id["L2"].reference == "R2"
    assert by_id["L2"].mask == mask_file.resolve() and by_id["L2"].label == 2
    assert by_id["R1"].size_mm == (10.0, 10.0, 6.0) and by_id["R1"].reference is None
    assert by_id["R2"].semi_axes_mm == (8.0, 6.0, 5.0)
    assert by_id["C1"].tissue == "CSF"
    assert case.lexicon is None


def test_lexicon_folder_is_relative_to_the_case_file(tmp_path, mask_file):
    (tmp_path / "site").mkdir()
    case = load_case(write_case(tmp_path, 'lexicon = "site"\n' + GOOD))
    assert case.lexicon == (tmp_path / "site").resolve()


MINIMAL = """
[[roi]]
id = "L1"
kind = "lesion"
shape = "sphere"
center_mm = [0, 0, 0]
radius_mm = 5

[[roi]]
id = "R1"
kind = "reference"
shape = "sphere"
center_mm = [20, 0, 0]
radius_mm = 5
"""


def test_minimal_case_has_defaults(tmp_path):
    case = load_case(write_case(tmp_path, MINIMAL))
    assert case.study is None and case.roles == {} and case.register is None
    assert case.anchor is None and case.rois[0].reference == "R1"


@pytest.mark.parametrize(
    ("old", "new", "message"),
    [
        (
            'shape = "sphere"\ncenter_mm = [0, 0, 0]\nradius_mm = 5\n\n[[roi]]\nid = "R1"',
            'shape = "cube"\ncenter_mm = [0, 0, 0]\nradius_mm = 5\n\n[[roi]]\nid = "R1"',
            r"case\.toml: roi\[1\] \(L1\): unknown shape 'cube'; expected one of sphere, "
            r"ellipsoid, box, mask",
        ),
        (
            'radius_mm = 5\n\n[[roi]]\nid = "R1"',
            '\n[[roi]]\nid = "R1"',
            r"case\.toml: roi\[1\] \(L1\): radius_mm is missing \(shape sphere needs it\)",
        ),
        (
            'radius_mm = 5\n\n[[roi]]\nid = "R1"',
            'radius_mm = -3\n\n[[roi]]\nid = "R1"',
            r"case\.toml: roi\[1\] \(L1\): radius_mm must be a positive number, got -3$",
        ),
        (
            'id = "R1"',
            'id = "L1"',
            r"case\.toml: roi\[2\] \(L1\): duplicate id; roi\[1\] has it too",
        ),
        ('kind = "reference"', 'kind = "control"\ntissue = "CSF"', r"case\.toml: no reference ROI"),
        (
            "[20, 0, 0]",
            '[20, 0, "x"]',
            r"roi\[2\] \(R1\): center_mm must be a list of 3 numbers \(mm\), got \[20, 0, 'x'\]",
        ),
        (
            'radius_mm = 5\n\n[[roi]]\nid = "R1"',
            'radius_mm = true\n\n[[roi]]\nid = "R1"',
            r"roi\[1\] \(L1\): radius_mm must be a positive number, got true",
        ),
        (
            'kind = "lesion"',
            'kind = "lesion"\ncolour = "red"',
            r"roi\[1\] \(L1\): unknown key\(s\) colour; expected one of",
        ),
        (
            'kind = "lesion"',
            'kind = "tumour"',
            r"roi\[1\] \(L1\): kind must be one of lesion, "
            r"reference, control, got 'tumour'",
        ),
        (
            'kind = "lesion"',
            'kind = "lesion"\nsize_mm = [1, 2, 3]',
            r"roi\[1\] \(L1\): size_mm does not apply to shape sphere",
        ),
    ],
)
def test_each_bad_roi_field_has_its_message(tmp_path, old, new, message):
    assert old in MINIMAL
    with pytest.raises(InputError, match=message):
        load_case(write_case(tmp_path, MINIMAL.replace(old, new, 1)))


def test_missing_reference(tmp_path):
    text = MINIMAL.replace('kind = "lesion"', 'kind = "lesion"\nreference = "R9"')
    with pytest.raises(InputError, match=r"roi\[1\] \(L1\): reference 'R9' is not the id of"):
        load_case(write_case(tmp_path, text))


def test_reference_must_be_a_reference_roi(tmp_path):
    text = MINIMAL.replace('kind = "lesion"', 'kind = "lesion"\nreference = "C1"') + (
        '\n[[roi]]\nid = "C1"\nkind = "control"\ntissue = "fat"\nshape = "sphere"\n'
        "center_mm = [0, 9, 0]\nradius_mm = 2\n"
    )
    with pytest.raises(InputError, match=r"reference 'C1' is a control ROI, not a reference"):
        load_case(write_case(tmp_path, text))


def test_no_lesion(tmp_path):
    text = MINIMAL.replace('kind = "lesion"', 'kind = "reference"')
    with pytest.raises(InputError, match=r"case\.toml: no lesion ROI"):
        load_case(write_case(tmp_path, text))


def test_unknown_role(tmp_path):
    with pytest.raises(InputError, match=r"case\.toml: \[roles\]: unknown role 'T3'; expected"):
        load_case(write_case(tmp_path, "[roles]\nT3 = 4\n" + MINIMAL))


def test_role_value_must_be_number_or_uid(tmp_path):
    with pytest.raises(InputError, match=r"\[roles\]: FLAIR must be a series number .* got 4\.5"):
        load_case(write_case(tmp_path, "[roles]\nFLAIR = 4.5\n" + MINIMAL))


def test_options_types(tmp_path):
    with pytest.raises(InputError, match=r"\[options\]: register must be true or false, got 'yes'"):
        load_case(write_case(tmp_path, '[options]\nregister = "yes"\n' + MINIMAL))
    with pytest.raises(InputError, match=r"\[options\]: anchor must be a string"):
        load_case(write_case(tmp_path, "[options]\nanchor = 3\n" + MINIMAL))


def test_missing_mask_file(tmp_path):
    text = MINIMAL.replace(
        'shape = "sphere"\ncenter_mm = [0, 0, 0]\nradius_mm = 5', 'shape = "mask"\nmask = "a.nrrd"'
    )
    with pytest.raises(InputError, match=r"roi\[1\] \(L1\): mask file a\.nrrd not found"):
        load_case(write_case(tmp_path, text))


def test_unknown_top_level_and_option_keys(tmp_path):
    with pytest.raises(InputError, match=r"case\.toml: unknown top-level key\(s\) studdy"):
        load_case(write_case(tmp_path, 'studdy = "x"\n' + MINIMAL))
    with pytest.raises(InputError, match=r"\[options\]: unknown key\(s\) anchr"):
        load_case(write_case(tmp_path, '[options]\nanchr = "T2"\n' + MINIMAL))


def test_not_toml(tmp_path):
    with pytest.raises(InputError, match=r"case\.toml: not valid TOML"):
        load_case(write_case(tmp_path, "[[roi]\nid = "))


def test_missing_case_file(tmp_path):
    with pytest.raises(InputError, match=r"case file .*nope\.toml not found"):
        load_case(tmp_path / "nope.toml")


def test_several_problems_are_reported_together_one_per_line(tmp_path):
    lesion, reference = MINIMAL.split("[[roi]]")[1:]
    text = (
        "[roles]\nT3 = 1\n\n[[roi]]"
        + lesion.replace("radius_mm = 5", "radius_mm = -3")
        + "[[roi]]"
        + reference.replace('shape = "sphere"', 'shape = "cube"')
    )
    with pytest.raises(InputError) as caught:
        load_case(write_case(tmp_path, text))
    assert str(caught.value).splitlines() == [
        "case.toml: [roles]: unknown role 'T3'; expected one of T1, T2, PD, FLAIR, STIR, T1FS, "
        "T2FS, T1POST, T1POSTFS, DWI, ADC, T2STAR, IP, OP, WATER, FAT, SWI",
        "case.toml: roi[1] (L1): radius_mm must be a positive number, got -3",
        "case.toml: roi[2] (R1): unknown shape 'cube'; expected one of sphere, ellipsoid, box, "
        "mask, seed",
    ]


@pytest.mark.parametrize("value", ['"4"', '" 4 "', "4.0", "4"])
def test_a_role_given_as_digits_or_a_whole_float_is_that_series_number(tmp_path, value):
    case = load_case(write_case(tmp_path, f"[roles]\nFLAIR = {value}\n" + MINIMAL))
    assert case.roles == {Role.FLAIR: 4}


def test_every_roles_problem_is_reported_at_once(tmp_path):
    text = "[roles]\nT3 = 4\nFLAIR = 4.5\nT2 = true\n" + MINIMAL
    with pytest.raises(InputError) as err:
        load_case(write_case(tmp_path, text))
    message = str(err.value)
    assert "unknown role 'T3'" in message and "got 4.5" in message and "got true" in message
    assert "got 4\n" not in message + "\n"  # 4.5 is never shown as 4

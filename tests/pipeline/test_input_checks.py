"""Input errors found before any pixel is read (docs/usage.md, exit code 2): an ROI outside the
field of view or larger than the imaged anatomy, and [roles] overrides that name no series
(all reported at once) or contradict the acquisition physics (a qc warning)."""

from __future__ import annotations

from pathlib import Path

import pytest

from sigreport.errors import InputError
from sigreport.lexicon_tables import load_lexicon
from sigreport.model import Role
from sigreport.pipeline import plan_report, stack_box_mm
from sigreport.rois import load_case

from builders.study import ORIGIN, SIZE, SPACING, write_study


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    return write_study(tmp_path_factory.mktemp("checks"))


@pytest.fixture(scope="module")
def lexicon():
    return load_lexicon()


def _case(written, tmp_path: Path, *, roi: str = "", roles: str = "") -> Path:
    text = written.case_path.read_text(encoding="utf-8")
    text = text.replace('study = "study"', f'study = "{written.study_dir.as_posix()}"')
    if roles:
        text = text.replace("[options]", f"[roles]\n{roles}\n\n[options]")
    path = tmp_path / "case.toml"
    path.write_text(text + roi, encoding="utf-8")
    return path


def _plan(path: Path, lexicon):
    case = load_case(path)
    return plan_report(case, lexicon, case.study)


def test_the_study_box_is_its_voxels_outer_faces(written):
    # An axial stack (identity orientation): origin - half a voxel to origin + (size - 0.5) voxels
    # (DICOM PS3.3 C.7.6.2.1.1: ImagePositionPatient is the centre of the first voxel).
    plan = _plan(written.case_path, load_lexicon())
    lo, hi = stack_box_mm(plan.measured[Role.T1])
    for axis in range(3):
        assert lo[axis] == pytest.approx(ORIGIN[axis] - SPACING[axis] / 2)
        assert hi[axis] == pytest.approx(ORIGIN[axis] + (SIZE[axis] - 0.5) * SPACING[axis])


def test_an_roi_outside_the_field_of_view_is_an_input_error(written, tmp_path, lexicon):
    roi = '\n[[roi]]\nid = "L9"\nkind = "lesion"\nshape = "sphere"\ncenter_mm = [300.0, 0.0, 0.0]\nradius_mm = 5.0\n'
    with pytest.raises(InputError, match=r"ROI L9 .* lies outside the field of view of the anchor"):
        _plan(_case(written, tmp_path, roi=roi), lexicon)


def test_an_roi_larger_than_the_anatomy_is_an_input_error(written, tmp_path, lexicon):
    # A 500 mm sphere around a lesion: a typo for 5.0, which would sample gigabytes.
    roi = '\n[[roi]]\nid = "L9"\nkind = "lesion"\nshape = "sphere"\ncenter_mm = [0.0, 0.0, 0.0]\nradius_mm = 500.0\n'
    with pytest.raises(
        InputError, match=r"ROI L9 is larger than the imaged anatomy along patient z"
    ):
        _plan(_case(written, tmp_path, roi=roi), lexicon)


def test_every_roles_override_naming_no_series_is_reported_at_once(written, tmp_path, lexicon):
    path = _case(written, tmp_path, roles="FLAIR = 40\nT2 = 41")
    with pytest.raises(InputError) as err:
        _plan(path, lexicon)
    message = str(err.value)
    assert "FLAIR = 40: no series number 40" in message
    assert "T2 = 41: no series number 41" in message
    assert "the study's series numbers: 2, 3, 4" in message


def test_an_override_contradicting_the_physics_is_a_qc_warning(written, tmp_path, lexicon):
    # Series 3 is a T2 by its TR / TE; the case file calls it FLAIR.
    plan = _plan(_case(written, tmp_path, roles="FLAIR = 3"), lexicon)
    [note] = [n for n in plan.qc if n.code == "role-override-contradicts"]
    assert note.level.value == "warning"
    assert "series 3" in note.message and "reads as T2" in note.message
    # An override agreeing with the physics leaves no warning.
    plan = _plan(_case(written, tmp_path, roles='T2 = "3"'), lexicon)
    assert not [n for n in plan.qc if n.code == "role-override-contradicts"]


def test_the_command_exits_2_with_one_line_and_writes_nothing(written, tmp_path):
    from typer.testing import CliRunner

    from sigreport.cli import app

    roi = '\n[[roi]]\nid = "L9"\nkind = "lesion"\nshape = "sphere"\ncenter_mm = [0.0, 0.0, 0.0]\nradius_mm = 500.0\n'
    case = _case(written, tmp_path, roi=roi)
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["report", "--case", str(case), "--out", str(out)])
    assert result.exit_code == 2
    assert "ROI L9 is larger than the imaged anatomy" in result.output
    assert "Traceback" not in result.output and not out.exists()

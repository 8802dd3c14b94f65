"""``report`` on hostile studies, in-process: exit 2 with the real cause, or exit 0 with the
problem in ``qc``; never exit 1."""

from __future__ import annotations

import json
from pathlib import Path

import pydicom
import pytest
from typer.testing import CliRunner

from sigreport.cli import app

from builders.hostile import (
    CASE_TOML,
    mask_case,
    mutate_all,
    write_rtstruct,
    write_small_study,
)

runner = CliRunner()
pytestmark = pytest.mark.filterwarnings("ignore::UserWarning:pydicom")


def _report(study: Path, case: Path, out: Path) -> tuple[int, str]:
    result = runner.invoke(
        app, ["report", str(study), "--case", str(case), "--out", str(out), "--no-register"]
    )
    assert result.exit_code in (0, 2), result.output
    assert "Traceback" not in result.output
    return result.exit_code, " ".join(result.output.split())


def test_two_studies_need_the_case_to_name_one(tmp_path: Path) -> None:
    other = "1.2.826.0.1.3680043.8.498.601"
    study, case = write_small_study(tmp_path)
    write_small_study(tmp_path, study_uid=other, series_number=2, folder="s2")
    code, output = _report(study, case, tmp_path / "out")
    assert code == 2 and "2 studies under" in output and 'study_uid = "..."' in output
    case.write_text(f'study_uid = "{other}"\n' + CASE_TOML)
    code, output = _report(study, case, tmp_path / "out")
    assert code == 0, output
    findings = json.loads((tmp_path / "out" / "findings.json").read_text())
    assert findings["study"]["study_instance_uid"] == other
    assert [s["series_number"] for s in findings["series"]] == [2]


def test_anchor_on_a_skipped_series_says_why_it_was_skipped(tmp_path: Path) -> None:
    study, case = write_small_study(tmp_path)
    write_small_study(tmp_path, series_number=2, folder="s2")
    mutate_all(study / "s2", lambda ds: delattr(ds, "ImageOrientationPatient"))
    case.write_text('[options]\nanchor = "2"\n' + CASE_TOML)
    code, output = _report(study, case, tmp_path / "out")
    assert code == 2
    assert "anchor = '2' names no measured series" in output
    assert (
        "series 2 (T1 SE) was skipped: image without geometry: missing or malformed "
        "ImageOrientationPatient (0020,0037) (8 file(s))" in output
    )


def test_roles_on_a_skipped_series_says_why(tmp_path: Path) -> None:
    study, case = write_small_study(tmp_path)
    write_small_study(tmp_path, series_number=3, folder="s3")
    mutate_all(study / "s3", lambda ds: setattr(ds, "PixelSpacing", ["nan", "1"]))
    case.write_text("[roles]\nT2 = 3\n" + CASE_TOML)
    code, output = _report(study, case, tmp_path / "out")
    assert code == 2
    assert "no series number 3 in the study: series 3 (T1 SE) was skipped: PixelSpacing" in output


def test_no_usable_series_names_each_series_and_its_reason(tmp_path: Path) -> None:
    study, case = write_small_study(tmp_path)
    mutate_all(study, lambda ds: setattr(ds, "RescaleSlope", "inf"))
    code, output = _report(study, case, tmp_path / "out")
    assert code == 2
    assert "series 1 (T1 SE) was skipped: RescaleSlope / RescaleIntercept must be finite" in output


def test_unknown_character_set_and_missing_type2_attributes_still_give_an_sr(
    tmp_path: Path,
) -> None:
    def change(ds: pydicom.Dataset) -> None:
        ds.SpecificCharacterSet = "ISO_IR 999"
        del ds.PatientName  # Type 2 in the Patient Module: the SR copies it empty

    study, case = write_small_study(tmp_path)
    mutate_all(study, change)
    code, output = _report(study, case, tmp_path / "out")
    assert code == 0, output
    sr = pydicom.dcmread(tmp_path / "out" / "sr.dcm")
    assert sr.SpecificCharacterSet == "ISO_IR 192"
    assert "PatientName" in sr and not sr.PatientName
    findings = json.loads((tmp_path / "out" / "findings.json").read_text())
    assert any("ISO_IR 999" in q["message"] for q in findings["qc"])


def test_rtstruct_drawn_on_another_study_is_refused(tmp_path: Path) -> None:
    study, case = write_small_study(tmp_path)
    rt = write_rtstruct(tmp_path / "rt.dcm", frame_of_reference_uid="1.2.826.0.1.3680043.8.498.7")
    case.write_text(mask_case(rt))
    code, output = _report(study, case, tmp_path / "out")
    assert code == 2 and "was drawn in frame of reference 1.2.826.0.1.3680043.8.498.7" in output
    assert not (tmp_path / "out").exists()


def test_a_foreign_slice_is_flagged_in_qc(tmp_path: Path) -> None:
    study, case = write_small_study(tmp_path)
    stray = sorted(study.rglob("IM*"))[2]
    ds = pydicom.dcmread(stray)
    ds.PatientID = "SOMEONE-ELSE"
    ds.save_as(stray)
    code, output = _report(study, case, tmp_path / "out")
    assert code == 0, output
    findings = json.loads((tmp_path / "out" / "findings.json").read_text())
    assert any(
        "1 file(s) of this series were left out: another PatientID" in q["message"]
        for q in findings["qc"]
    )

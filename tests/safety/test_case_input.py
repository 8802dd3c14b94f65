"""A case file or mask that is not what it claims: each gets a true message and exit code 2."""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from typer.testing import CliRunner

from sigreport.cli import app
from sigreport.errors import InputError
from sigreport.rois import load_case

runner = CliRunner()

GOOD = """
[[roi]]
id = "L1"
kind = "lesion"
shape = "mask"
mask = "{mask}"

[[roi]]
id = "R1"
kind = "reference"
tissue = "white matter"
shape = "sphere"
center_mm = [0.0, 0.0, 0.0]
radius_mm = 5.0
"""


def _report(tmp_path: Path, case: Path):
    return runner.invoke(
        app, ["report", str(tmp_path), "--case", str(case), "--out", str(tmp_path / "out")]
    )


@pytest.mark.parametrize(
    "content, message",
    [
        (bytes(range(256)) * 4, "not UTF-8 text"),
        (os.urandom(0) + b"\x89PNG\r\n\x1a\n\0\0\0\rIHDR", "not UTF-8 text"),
        ('study = "s"\n'.encode("utf-16"), "UTF-16"),
        ('study = "s"\n'.encode("utf-16-be"), "NUL bytes .UTF-16"),
        (b'study = "s"\x00\n', "NUL bytes"),
    ],
)
def test_a_case_file_that_is_not_utf8_toml_is_an_input_error(tmp_path, content, message):
    case = tmp_path / "case.toml"
    case.write_bytes(content)
    with pytest.raises(InputError, match=message):
        load_case(case)
    result = _report(tmp_path, case)
    assert result.exit_code == 2, result.output
    assert "case.toml" in result.output and "Traceback" not in result.output


def test_a_utf8_case_file_with_a_byte_order_mark_is_read(tmp_path):
    case = tmp_path / "case.toml"
    (tmp_path / "m.nii.gz").write_bytes(b"x")
    case.write_bytes(b"\xef\xbb\xbf" + GOOD.format(mask="m.nii.gz").encode("utf-8"))
    assert [roi.id for roi in load_case(case).rois] == ["L1", "R1"]


def test_a_folder_given_as_the_case_file_is_named_a_folder(tmp_path):
    folder = tmp_path / "case.toml"
    folder.mkdir()
    with pytest.raises(InputError, match="is a folder, not a case file"):
        load_case(folder)
    result = _report(tmp_path, folder)
    assert result.exit_code == 2 and "not found" not in result.output


def test_a_missing_case_file_is_not_found(tmp_path):
    with pytest.raises(InputError, match="not found"):
        load_case(tmp_path / "nowhere.toml")


def _case_with_mask(tmp_path: Path, mask: str) -> Path:
    case = tmp_path / "case.toml"
    case.write_text(GOOD.format(mask=mask), encoding="utf-8")
    return case


def test_a_mask_that_is_a_folder_is_named_a_folder(tmp_path):
    (tmp_path / "mask.nii.gz").mkdir()
    with pytest.raises(InputError, match=r"mask mask\.nii\.gz is a folder, not a file"):
        load_case(_case_with_mask(tmp_path, "mask.nii.gz"))


@pytest.mark.skipif(not Path("/dev/null").exists(), reason="no /dev/null")
def test_a_mask_that_is_a_device_is_named_a_device(tmp_path):
    with pytest.raises(InputError, match="is a device or pipe, not a regular file"):
        load_case(_case_with_mask(tmp_path, "/dev/null"))


def test_a_mask_that_is_a_pipe_is_named_a_pipe(tmp_path):
    os.mkfifo(tmp_path / "mask.nrrd")
    with pytest.raises(InputError, match="is a device or pipe, not a regular file"):
        load_case(_case_with_mask(tmp_path, "mask.nrrd"))


def test_a_missing_mask_is_not_found(tmp_path):
    with pytest.raises(InputError, match="mask file nowhere.nii.gz not found"):
        load_case(_case_with_mask(tmp_path, "nowhere.nii.gz"))


def test_a_lexicon_that_is_a_file_is_named_a_file(tmp_path):
    (tmp_path / "site.toml").write_text("", encoding="utf-8")
    case = tmp_path / "case.toml"
    (tmp_path / "m.nii.gz").write_bytes(b"x")
    case.write_text('lexicon = "site.toml"\n' + GOOD.format(mask="m.nii.gz"), encoding="utf-8")
    with pytest.raises(InputError, match="lexicon site.toml is a file, not a folder"):
        load_case(case)


def test_a_lexicon_option_that_is_a_file_is_named_a_file(tmp_path):
    from sigreport import lexicon

    (tmp_path / "site.toml").write_text("", encoding="utf-8")
    with pytest.raises(InputError, match="is a file, not a folder"):
        lexicon.site_dir(tmp_path / "site.toml")
    with pytest.raises(InputError, match="does not exist"):
        lexicon.site_dir(tmp_path / "nowhere")

"""The commands, run in-process with typer's CliRunner (the way nibabel tests its tools), plus
one run of the installed console script."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import CliRunner

from sigreport.cli import app

runner = CliRunner()


def test_scan_of_an_empty_folder_says_so_and_exits_2(tmp_path: Path):
    result = runner.invoke(app, ["scan", str(tmp_path)])
    assert result.exit_code == 2
    assert "no usable MR series" in result.output
    assert "Traceback" not in result.output


def test_scan_of_a_missing_folder_exits_2_without_traceback(tmp_path: Path):
    result = runner.invoke(app, ["scan", str(tmp_path / "nowhere")])
    assert result.exit_code == 2
    assert "Traceback" not in result.output


def test_scan_json_lists_skipped_files(tmp_path: Path):
    (tmp_path / "notes.txt").write_text("not DICOM")
    result = runner.invoke(app, ["scan", str(tmp_path), "--json"])
    assert result.exit_code == 2
    scan = json.loads(result.stdout[: result.stdout.rindex("}") + 1])
    assert scan["schema"] == "sigreport-scan/1"
    assert [Path(s["path"]).name for s in scan["skipped"]] == ["notes.txt"]


def test_report_with_a_broken_case_file_exits_2_naming_the_field(tmp_path: Path):
    case = tmp_path / "case.toml"
    case.write_text(
        '[[roi]]\nid = "L1"\nkind = "lesion"\nshape = "sphere"\ncenter_mm = [0, 0, 0]\nradius_mm = -3\n'
    )
    result = runner.invoke(
        app, ["report", str(tmp_path), "--case", str(case), "--out", str(tmp_path / "out")]
    )
    assert result.exit_code == 2
    assert "radius_mm" in result.output
    assert not (tmp_path / "out").exists()


def test_demo_refuses_a_non_empty_folder_without_force(tmp_path: Path):
    (tmp_path / "keep.txt").write_text("mine")
    result = runner.invoke(app, ["demo", "--out", str(tmp_path)])
    assert result.exit_code == 2
    assert "--force" in result.output
    assert (tmp_path / "keep.txt").read_text() == "mine"


@pytest.mark.skipif(
    shutil.which("sigreport") is None and not (Path(sys.executable).parent / "sigreport").exists(),
    reason="console script not installed",
)
def test_installed_console_script_prints_its_version():
    script = shutil.which("sigreport") or str(Path(sys.executable).parent / "sigreport")
    done = subprocess.run([script, "--version"], capture_output=True, text=True, check=False)
    assert done.returncode == 0
    assert done.stdout.strip().startswith("sigreport ")

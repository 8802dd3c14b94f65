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

from builders.study import write_study

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


def test_demo_builds_a_study_and_writes_the_whole_report(tmp_path: Path):
    # The README's first quick-start command, on the small test scenario to stay quick.
    scenario = Path(__file__).parents[1] / "synth" / "data" / "tiny.toml"
    out = tmp_path / "demo"
    result = runner.invoke(app, ["demo", "--scenario", str(scenario), "--out", str(out)])
    assert result.exit_code == 0, result.output
    html = Path(result.stdout.strip().splitlines()[-1])
    assert html == out / "report" / "report.html" and html.is_file()
    for name in ("findings.json", "table.csv", "report.md", "report.txt", "sr.dcm"):
        assert (out / "report" / name).is_file(), name
    assert any((out / "report" / "images").glob("*.png"))
    findings = json.loads((out / "report" / "findings.json").read_text())
    assert findings["schema"] == "sigreport-findings/2" and findings["lesions"]
    # --force replaces it; the same run is reproducible from the same seed.
    again = runner.invoke(app, ["demo", "--scenario", str(scenario), "--out", str(out), "--force"])
    assert again.exit_code == 0, again.output
    rerun = json.loads((out / "report" / "findings.json").read_text())
    assert rerun["lesions"] == findings["lesions"]
    assert rerun["series"] == findings["series"]  # the alignments too (parallel registration)


def test_report_refuses_an_existing_outdir_and_keeps_it(tmp_path: Path):
    scenario = Path(__file__).parents[1] / "synth" / "data" / "tiny.toml"
    from sigreport.synth import generate_study

    study = generate_study(scenario, tmp_path / "case")
    out = tmp_path / "out"
    out.mkdir()
    (out / "mine.txt").write_text("keep")
    result = runner.invoke(
        app, ["report", str(study.study_dir), "--case", str(study.case_path), "--out", str(out)]
    )
    assert result.exit_code == 2 and "--force" in result.output
    assert (out / "mine.txt").read_text() == "keep"


def test_report_never_writes_into_the_study(tmp_path: Path):
    scenario = Path(__file__).parents[1] / "synth" / "data" / "tiny.toml"
    from sigreport.synth import generate_study

    study = generate_study(scenario, tmp_path / "case")
    out = study.study_dir / "report"
    result = runner.invoke(
        app, ["report", str(study.study_dir), "--case", str(study.case_path), "--out", str(out)]
    )
    assert result.exit_code == 2 and "inside the study folder" in result.output
    assert not out.exists()


def test_report_never_replaces_a_folder_holding_the_study(tmp_path: Path):
    scenario = Path(__file__).parents[1] / "synth" / "data" / "tiny.toml"
    from sigreport.synth import generate_study

    study = generate_study(scenario, tmp_path / "case")
    # --force replaces OUTDIR whole: an OUTDIR around the study would delete it.
    result = runner.invoke(
        app,
        ["report", str(study.study_dir), "--case", str(study.case_path),
         "--out", str(study.root), "--force"],
    )  # fmt: skip
    assert result.exit_code == 2 and "contains the study folder" in result.output
    assert study.study_dir.is_dir() and study.case_path.is_file()


def test_a_bug_exits_1_and_keeps_the_traceback_in_outdir(tmp_path: Path, monkeypatch):
    import sigreport.pipeline

    def broken(*args, **kwargs):
        raise RuntimeError("deliberate failure")

    monkeypatch.setattr(sigreport.pipeline, "run_report", broken)
    case = tmp_path / "case.toml"
    case.write_text("")
    out = tmp_path / "out"
    result = runner.invoke(app, ["report", str(tmp_path), "--case", str(case), "--out", str(out)])
    assert result.exit_code == 1
    log = (out / "error.log").read_text()
    assert "RuntimeError: deliberate failure" in log and "Traceback" in log


def _display(terminal: bool):
    import io

    from rich.console import Console

    from sigreport.cli import ProgressDisplay

    buffer = io.StringIO()
    console = Console(file=buffer, force_terminal=terminal, width=100, highlight=False)
    return ProgressDisplay(console=console), buffer


def test_progress_shows_header_values_as_text_not_markup():
    # "[/]" closes nothing: read as rich markup it would raise MarkupError; "[b]" would vanish.
    display, buffer = _display(terminal=False)
    with display as progress:
        progress("loading T2: series 3 (t2 [b]tse[/] <i>)")
        for k in range(1, 4):
            progress("indexing files [/]", k, 3)
        progress("writing out [x]")
    lines = buffer.getvalue().splitlines()
    # Off a terminal a counted step prints its line once, not once per file.
    assert lines == [
        "… loading T2: series 3 (t2 [b]tse[/] <i>)",
        "… indexing files [/]",
        "… writing out [x]",
    ]


def test_progress_bar_on_a_terminal_takes_header_values_as_text():
    display, buffer = _display(terminal=True)
    with display as progress:
        for k in range(1, 4):
            progress("loading [/] series", k, 3)
        progress("done [b]")
    assert "done [b]" in buffer.getvalue()


def test_report_progress_names_each_stage(tmp_path: Path):
    written = write_study(tmp_path / "mini")
    result = runner.invoke(
        app, ["report", "--case", str(written.case_path), "--out", str(tmp_path / "out")]
    )
    assert result.exit_code == 0, result.output
    for step in (
        "indexing",
        "loading T2: series 3 (t2 [test] <b>)",
        "measuring T2",
        "characterizing",
        "writing findings.json",
        "writing sr.dcm",
    ):
        assert step in result.output, step

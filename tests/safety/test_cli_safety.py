"""Hostile situations met through the command line: OUTDIR around the inputs, header values
with console markup or terminal escapes, internal errors with unwritable or huge names."""

from __future__ import annotations

import errno
import io
import os
import re
from pathlib import Path

import numpy as np
import pytest
from rich.console import Console
from typer.testing import CliRunner

import sigreport.cli as cli
from sigreport.cli import app
from sigreport.report.outdir import MARK_NAME

from builders.dicom import write_classic_series

runner = CliRunner()
TINY = Path(__file__).parents[1] / "synth" / "data" / "tiny.toml"


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    from sigreport.synth import generate_study

    return generate_study(TINY, tmp_path_factory.mktemp("tiny") / "case")


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in folder.rglob("*") if p.is_file()}


@pytest.mark.parametrize("where", ["case folder", "its parent"])
def test_force_into_a_folder_holding_the_study_deletes_nothing(tiny, where):
    out = tiny.case_path.parent if where == "case folder" else tiny.case_path.parent.parent
    before = _snapshot(out)
    result = runner.invoke(
        app,
        [
            "report",
            str(tiny.study_dir),
            "--case",
            str(tiny.case_path),
            "--out",
            str(out),
            "--force",
        ],
    )
    assert result.exit_code == 2, result.output
    assert "contains the study folder" in result.output or "contains the case file" in result.output
    assert _snapshot(out) == before


def test_an_outdir_that_is_a_file_is_refused_before_any_work(tiny, tmp_path, monkeypatch):
    import sigreport.ingest

    def no_work(*args, **kwargs):
        raise AssertionError("the study was indexed before OUTDIR was checked")

    monkeypatch.setattr(sigreport.ingest, "index_study", no_work)
    out = tmp_path / "report.html"
    out.write_text("mine", encoding="utf-8")
    for extra in ([], ["--force"]):
        result = runner.invoke(
            app,
            ["report", str(tiny.study_dir), "--case", str(tiny.case_path), "--out", str(out)]
            + extra,
        )
        assert result.exit_code == 2, result.output
        assert "is an existing file, not a folder" in result.output
    assert out.read_text(encoding="utf-8") == "mine"


def test_demo_force_never_deletes_a_folder_it_did_not_make(tmp_path):
    (tmp_path / "thesis.tex").write_text("years of work", encoding="utf-8")
    result = runner.invoke(
        app, ["demo", "--scenario", str(TINY), "--out", str(tmp_path), "--force"]
    )
    assert result.exit_code == 2, result.output
    assert "not a demo folder written by sigreport" in result.output
    assert (tmp_path / "thesis.tex").read_text(encoding="utf-8") == "years of work"


# ---- header values and paths are data, never markup or terminal control -----------------------

MARKUP = "[red]T1[/red] [bold] [/x]"


@pytest.fixture
def hostile_study(tmp_path):
    folder = tmp_path / "study [/x] [bold]"
    stored = np.zeros((3, 8, 8), np.uint16)
    write_classic_series(folder / "s1", stored, description=MARKUP, series_number=1)
    write_classic_series(
        folder / "s2", stored, description="ok\x1b[2J\x1b]0;pwned\x07\x1b[31mred", series_number=2
    )
    return folder


def test_scan_shows_markup_in_paths_and_descriptions_verbatim(hostile_study, monkeypatch):
    # A terminal console, so that the progress display runs too.
    buffer = io.StringIO()
    monkeypatch.setattr(cli, "err", Console(file=buffer, force_terminal=True, width=200))
    result = runner.invoke(app, ["scan", str(hostile_study)], env={"COLUMNS": "300"})
    assert result.exit_code == 0, result.output
    assert result.exception is None
    flat = "".join(result.stdout.split())
    assert "[red]T1[/red][bold][/x]" in flat
    assert "study[/x][bold]" in flat


def test_scan_strips_terminal_escapes_from_header_values(hostile_study):
    result = runner.invoke(app, ["scan", str(hostile_study)], env={"COLUMNS": "300"})
    assert result.exit_code == 0, result.output
    assert "\x1b" not in result.output and "\x07" not in result.output
    assert "ok" in result.output


def test_messages_and_summaries_are_printed_verbatim_without_control_characters(capsys):
    cli._print_summary(
        {
            "lesions": [],
            "qc": [{"level": "warning", "code": "x[/x]", "message": f"{MARKUP}\x1b[2Jend\\"}],
            "cautions": ["[bold]draft[/bold]"],
        }
    )
    cli.ProgressDisplay()("indexing /data/[/x]\x1b]0;t\x07")
    with pytest.raises(Exception):  # noqa: B017 - typer.Exit
        raise cli._fail("case [/x] \x1b[31mbad")
    err = capsys.readouterr().err
    assert "\x1b" not in err and "\x07" not in err
    assert MARKUP in err and "x[/x]" in err and "[bold]draft[/bold]" in err
    assert "/data/[/x]" in err and "case [/x] " in err


# ---- the internal-error handler ---------------------------------------------------------------


def _broken(monkeypatch):
    import sigreport.pipeline

    def broken(*args, **kwargs):
        raise RuntimeError("deliberate failure")

    monkeypatch.setattr(sigreport.pipeline, "run_report", broken)


@pytest.mark.parametrize("name", ["r" * 300, "/".join(["d" * 99] * 50)])
def test_the_error_handler_survives_names_the_file_system_refuses(tmp_path, monkeypatch, name):
    _broken(monkeypatch)
    case = tmp_path / "case.toml"
    case.write_text("")
    out = tmp_path / name
    result = runner.invoke(app, ["report", str(tmp_path), "--case", str(case), "--out", str(out)])
    assert result.exit_code == 1, result.output
    assert isinstance(result.exception, SystemExit)
    assert "deliberate failure" in result.output
    match = re.search(r"the traceback is in (\S+)", result.output)
    assert match, result.output
    assert "RuntimeError: deliberate failure" in Path(match.group(1)).read_text(encoding="utf-8")


def test_with_force_an_internal_error_still_keeps_the_traceback(tmp_path, monkeypatch):
    out = tmp_path / "report"
    out.mkdir()
    (out / "findings.json").write_text("{}", encoding="utf-8")
    from sigreport.report.outdir import write_mark

    write_mark(out, kind="report")
    before = _snapshot(out)
    _broken(monkeypatch)
    case = tmp_path / "case.toml"
    case.write_text("")
    result = runner.invoke(
        app, ["report", str(tmp_path), "--case", str(case), "--out", str(out), "--force"]
    )
    assert result.exit_code == 1
    match = re.search(r"the traceback is in (\S+)", result.output)
    assert match, result.output
    log = Path(match.group(1))
    assert log.parent == tmp_path and log.name.startswith("report")
    assert "RuntimeError: deliberate failure" in log.read_text(encoding="utf-8")
    assert _snapshot(out) == before  # the previous report is untouched


def test_an_error_log_folder_is_marked_so_force_can_replace_it(tmp_path, monkeypatch):
    _broken(monkeypatch)
    case = tmp_path / "case.toml"
    case.write_text("")
    out = tmp_path / "out"
    runner.invoke(app, ["report", str(tmp_path), "--case", str(case), "--out", str(out)])
    assert (out / "error.log").is_file() and (out / MARK_NAME).is_file()


# ---- an OUTDIR that cannot be written ---------------------------------------------------------


def _run(tiny, out: Path, *extra: str):
    return runner.invoke(
        app,
        ["report", str(tiny.study_dir), "--case", str(tiny.case_path), "--out", str(out), *extra],
    )


@pytest.mark.parametrize(
    "name, message",
    [("r" * 300, "name of 300 characters is too long"), ("/".join(["d" * 99] * 50), "too long")],
)
def test_an_outdir_name_the_file_system_refuses_exits_2(tiny, tmp_path, name, message):
    result = _run(tiny, tmp_path / name)
    assert result.exit_code == 2, result.output
    assert message in result.output and "Traceback" not in result.output
    assert list(tmp_path.iterdir()) == []


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders")
def test_a_read_only_parent_exits_2(tiny, tmp_path):
    tmp_path.chmod(0o500)
    try:
        result = _run(tiny, tmp_path / "report")
    finally:
        tmp_path.chmod(0o700)
    assert result.exit_code == 2, result.output
    assert "cannot write OUTDIR" in result.output


def test_a_read_only_file_system_exits_2(tiny, tmp_path, monkeypatch):
    # Simulated (the tests may run as root, for whom a chmod-ed folder stays writable): the
    # probe meets what a read-only mount answers, errno EROFS.
    def read_only(*args, **kwargs):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS))

    monkeypatch.setattr("sigreport.report.outdir.tempfile.mkdtemp", read_only)
    result = _run(tiny, tmp_path / "report")
    assert result.exit_code == 2, result.output
    assert "cannot write OUTDIR" in result.output and "Read-only file system" in result.output


@pytest.mark.slow
def test_a_disk_that_fills_up_while_writing_exits_2_and_leaves_nothing(tiny, tmp_path, monkeypatch):
    real_write_text = Path.write_text

    def full(self, data, *args, **kwargs):
        if self.name == "report.html":  # late: most files are already written
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(self))
        return real_write_text(self, data, *args, **kwargs)

    monkeypatch.setattr(Path, "write_text", full)
    result = _run(tiny, tmp_path / "report")
    assert result.exit_code == 2, result.output
    assert "No space left on device (report.html)" in result.output
    assert list(tmp_path.iterdir()) == []

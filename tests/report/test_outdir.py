"""The report folder guard: OUTDIR never touches the inputs, only a folder the tool marked as
its own is ever replaced, two runs never silently replace each other, a signal leaves no
partial folder, and a folder that cannot be written is an input error (exit 2), not a bug."""

from __future__ import annotations

import errno
import json
import os
import signal
import subprocess
import sys
import threading
from pathlib import Path

import pytest

import sigreport.report.writer as writer
from sigreport.errors import InputError
from sigreport.report import write_report
from sigreport.report.outdir import MARK_NAME, check_outdir, is_report_folder, write_mark


def _hidden_leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


# ---- the inputs are never OUTDIR, inside it, or around it ----------------------------------


@pytest.fixture
def inputs(tmp_path: Path) -> list[tuple[str, Path]]:
    study = tmp_path / "data" / "study"
    (study / "series1").mkdir(parents=True)
    (study / "series1" / "1.dcm").write_bytes(b"\0" * 132)
    case = tmp_path / "data" / "cases" / "case.toml"
    case.parent.mkdir()
    case.write_text('study = "../study"\n', encoding="utf-8")
    mask = tmp_path / "masks" / "l1.nii.gz"
    mask.parent.mkdir()
    mask.write_bytes(b"mask")
    lexicon = tmp_path / "site-lexicon"
    lexicon.mkdir()
    return [
        ("the study folder", study),
        ("the case file", case),
        ("the mask of ROI L1", mask),
        ("the lexicon folder", lexicon),
    ]


@pytest.mark.parametrize(
    "out, relation",
    [
        ("data", "contains the study folder"),  # the reported data-loss case
        ("data/cases", "contains the case file"),
        ("masks", "contains the mask of ROI L1"),
        (".", "contains the study folder"),
        ("data/study", "is the study folder"),
        ("data/study/series1/report", "is inside the study folder"),
        ("site-lexicon/out", "is inside the lexicon folder"),
        ("site-lexicon", "is the lexicon folder"),
        ("data/cases/case.toml", "is the case file"),
    ],
)
@pytest.mark.parametrize("force", [False, True])
def test_outdir_is_refused_around_or_inside_any_input(tmp_path, inputs, out, relation, force):
    with pytest.raises(InputError, match=relation):
        check_outdir(tmp_path / out, inputs=inputs, force=force)


def test_a_symlink_does_not_hide_that_outdir_contains_the_study(tmp_path, inputs):
    link = tmp_path / "link"
    link.symlink_to(tmp_path / "data", target_is_directory=True)
    with pytest.raises(InputError, match="contains the study folder"):
        check_outdir(link, inputs=inputs, force=True)


def test_a_sibling_outdir_is_accepted(tmp_path, inputs):
    assert check_outdir(tmp_path / "data" / "report", inputs=inputs) == tmp_path / "data" / "report"


def test_an_existing_file_is_refused_even_with_force(tmp_path):
    out = tmp_path / "report"
    out.write_text("mine", encoding="utf-8")
    with pytest.raises(InputError, match="is an existing file, not a folder"):
        check_outdir(out, force=True)
    assert out.read_text(encoding="utf-8") == "mine"


# ---- the mark --------------------------------------------------------------------------------


def test_every_report_folder_carries_the_mark_listing_its_files(report_dir):
    mark = json.loads((report_dir / MARK_NAME).read_text(encoding="utf-8"))
    assert mark["written_by"] == "sigreport"
    written = {p.relative_to(report_dir).as_posix() for p in report_dir.rglob("*") if p.is_file()}
    assert set(mark["files"]) == written - {MARK_NAME}
    assert {"findings.json", "report.html", "sr.dcm"} <= set(mark["files"])
    assert is_report_folder(report_dir)


def test_force_never_replaces_a_folder_without_the_mark(tmp_path, findings, key_slices, study):
    out = tmp_path / "photos"
    out.mkdir()
    (out / "holiday.jpg").write_bytes(b"precious")
    with pytest.raises(InputError, match="not a report folder written by sigreport"):
        check_outdir(out, force=True)
    with pytest.raises(InputError, match="not a report folder written by sigreport"):
        write_report(out, findings, key_slices[:1], study, force=True)
    assert (out / "holiday.jpg").read_bytes() == b"precious"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["photos"]


def test_force_never_deletes_a_file_the_tool_did_not_write(tmp_path, findings, key_slices, study):
    out = tmp_path / "report"
    write_report(out, findings, key_slices[:1], study)
    (out / "my-notes.txt").write_text("dictated later", encoding="utf-8")
    with pytest.raises(InputError, match="my-notes.txt"):
        write_report(out, findings, key_slices[:1], study, force=True)
    assert (out / "my-notes.txt").read_text(encoding="utf-8") == "dictated later"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report"]


def test_force_replaces_a_marked_report_folder(tmp_path, findings, key_slices, study):
    out = tmp_path / "report"
    write_report(out, findings, key_slices[:1], study)
    findings["study"]["accession_number"] = "SECOND"
    write_report(out, findings, key_slices[:1], study, force=True)
    assert "SECOND" in (out / "findings.json").read_text(encoding="utf-8")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report"]


def test_a_copied_mark_does_not_cover_other_files(tmp_path, report_dir):
    out = tmp_path / "home"
    out.mkdir()
    (out / MARK_NAME).write_bytes((report_dir / MARK_NAME).read_bytes())
    (out / "thesis.tex").write_text("years of work", encoding="utf-8")
    assert not is_report_folder(out)
    with pytest.raises(InputError, match="thesis.tex"):
        check_outdir(out, force=True)


def test_an_empty_folder_may_be_replaced_with_force(tmp_path):
    out = tmp_path / "empty"
    out.mkdir()
    with pytest.raises(InputError, match="exists; use --force"):
        check_outdir(out)
    assert check_outdir(out, force=True) == out


def test_the_mark_is_checked_again_when_the_folder_is_replaced(
    tmp_path, findings, key_slices, study, monkeypatch
):
    # The folder is swapped for someone else's between the early check and the rename.
    out = tmp_path / "report"
    write_report(out, findings, key_slices[:1], study)
    check_outdir(out, force=True)
    real_build = writer._build

    def swap_then_build(*args, **kwargs):
        os.rename(out, tmp_path / "old-report")
        out.mkdir()
        (out / "other.txt").write_text("not ours", encoding="utf-8")
        return real_build(*args, **kwargs)

    monkeypatch.setattr(writer, "_build", swap_then_build)
    with pytest.raises(InputError, match="not a report folder written by sigreport"):
        write_report(out, findings, key_slices[:1], study, force=True)
    assert (out / "other.txt").read_text(encoding="utf-8") == "not ours"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["old-report", "report"]


# ---- two runs into one absent OUTDIR ---------------------------------------------------------


def test_two_runs_into_one_absent_outdir_never_replace_each_other(
    tmp_path, findings, key_slices, study, monkeypatch
):
    out = tmp_path / "report"
    both_built = threading.Barrier(2, timeout=60)
    real_write_sr = writer.write_sr

    def write_sr_then_wait(path, dataset):
        real_write_sr(path, dataset)
        both_built.wait()  # both runs passed the early check and built their report

    monkeypatch.setattr(writer, "write_sr", write_sr_then_wait)
    outcomes: dict[str, object] = {}

    def run(name: str) -> None:
        mine = json.loads(json.dumps(findings))
        mine["study"]["accession_number"] = name
        try:
            write_report(out, mine, key_slices[:1], study)
            outcomes[name] = "written"
        except BaseException as exc:  # noqa: BLE001 - the outcome is what is checked
            outcomes[name] = exc

    threads = [threading.Thread(target=run, args=(name,)) for name in ("FIRST", "SECOND")]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(120)
    winners = [name for name, outcome in outcomes.items() if outcome == "written"]
    losers = [outcome for outcome in outcomes.values() if outcome != "written"]
    assert len(winners) == 1 and len(losers) == 1, outcomes
    assert isinstance(losers[0], InputError) and "appeared while" in str(losers[0])
    kept = json.loads((out / "findings.json").read_text(encoding="utf-8"))
    assert kept["study"]["accession_number"] == winners[0]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report"]


# ---- signals ---------------------------------------------------------------------------------

_SLOW_WRITER = r"""
import sys, time
from pathlib import Path
import sigreport.report.writer as writer

ready = Path(sys.argv[2])
def slow(findings):
    ready.write_text("writing", encoding="utf-8")
    time.sleep(60)
    return "{}"

writer.findings_json = slow
writer.write_report(Path(sys.argv[1]), {}, [], {})
"""


@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGINT])
def test_a_signal_while_writing_removes_the_partial_folder(tmp_path, signum):
    parent = tmp_path / "reports"
    parent.mkdir()
    ready = tmp_path / "ready"
    proc = subprocess.Popen(
        [sys.executable, "-c", _SLOW_WRITER, str(parent / "report"), str(ready)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        for _ in range(600):  # up to 60 s for the interpreter to start and reach the hook
            if ready.exists() or proc.poll() is not None:
                break
            threading.Event().wait(0.1)
        assert ready.exists(), proc.communicate()
        assert [p.name for p in parent.iterdir()][0].startswith(".report.partial-")
        proc.send_signal(signum)
        _, stderr = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert list(parent.iterdir()) == [], "the partial folder with patient data was left behind"
    if signum == signal.SIGTERM:
        assert proc.returncode == 128 + signal.SIGTERM  # the shell's convention for a signal
        assert "Traceback" not in stderr


# ---- a folder that cannot be written ---------------------------------------------------------


def test_a_300_character_name_is_an_input_error(tmp_path):
    with pytest.raises(InputError, match="name of 300 characters is too long"):
        check_outdir(tmp_path / ("r" * 300))


def test_a_5000_character_path_is_an_input_error(tmp_path):
    deep = tmp_path.joinpath(*(["d" * 99] * 50))
    with pytest.raises(InputError, match="path of [0-9]+ characters is too long"):
        check_outdir(deep)


def test_a_parent_that_is_a_file_is_an_input_error(tmp_path):
    (tmp_path / "afile").write_text("x", encoding="utf-8")
    with pytest.raises(InputError, match="is not a folder"):
        check_outdir(tmp_path / "afile" / "report")


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders")
def test_a_read_only_parent_is_an_input_error(tmp_path):
    parent = tmp_path / "ro"
    parent.mkdir()
    parent.chmod(0o500)
    try:
        with pytest.raises(InputError, match="cannot write"):
            check_outdir(parent / "report")
    finally:
        parent.chmod(0o700)


@pytest.mark.parametrize(
    "code", [errno.EACCES, errno.EROFS, errno.ENOSPC, errno.EDQUOT, errno.ENAMETOOLONG]
)
def test_a_file_system_refusal_before_the_work_is_an_input_error(tmp_path, monkeypatch, code):
    # The probe folder created before any work meets what a read-only or full disk says
    # (simulated: the tests may run as root, which ignores permissions).
    def refuse(*args, **kwargs):
        raise OSError(code, os.strerror(code))

    monkeypatch.setattr("sigreport.report.outdir.tempfile.mkdtemp", refuse)
    with pytest.raises(InputError, match=f"cannot write .*{os.strerror(code)}"):
        check_outdir(tmp_path / "report")
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("code", [errno.ENOSPC, errno.EDQUOT, errno.EIO])
def test_a_full_disk_while_writing_is_an_input_error_and_leaves_nothing(
    tmp_path, findings, key_slices, study, monkeypatch, code
):
    real_write_bytes = Path.write_bytes

    def full(self, data):
        if self.suffix == ".png":
            raise OSError(code, os.strerror(code), str(self))
        return real_write_bytes(self, data)

    monkeypatch.setattr(Path, "write_bytes", full)
    out = tmp_path / "report"
    with pytest.raises(InputError, match=f"cannot write the report folder .*{os.strerror(code)}"):
        write_report(out, findings, key_slices[:1], study)
    assert list(tmp_path.iterdir()) == []


def test_write_mark_lists_what_is_in_the_folder(tmp_path):
    (tmp_path / "a").mkdir()
    (tmp_path / "a" / "b.txt").write_text("b", encoding="utf-8")
    write_mark(tmp_path, kind="report")
    assert json.loads((tmp_path / MARK_NAME).read_text(encoding="utf-8"))["files"] == ["a/b.txt"]
    assert is_report_folder(tmp_path)


def test_an_interrupt_while_replacing_puts_the_old_folder_back(
    tmp_path, findings, key_slices, study, monkeypatch
):
    out = tmp_path / "report"
    write_report(out, findings, key_slices[:1], study)
    old = {p.relative_to(out): p.read_bytes() for p in out.rglob("*") if p.is_file()}
    real_problem = writer.replace_problem

    def interrupted(folder, **kwargs):
        real_problem(folder, **kwargs)
        raise KeyboardInterrupt  # after the old folder was moved aside

    monkeypatch.setattr(writer, "replace_problem", interrupted)
    with pytest.raises(KeyboardInterrupt):
        write_report(out, findings, key_slices, study, force=True)
    assert {p.relative_to(out): p.read_bytes() for p in out.rglob("*") if p.is_file()} == old
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report"]


def test_a_marked_report_inside_a_marked_folder_answers_for_itself(tmp_path):
    # A demo folder whose report was written again with other files since the demo's mark.
    demo = tmp_path / "demo"
    (demo / "report").mkdir(parents=True)
    (demo / "case.toml").write_text("", encoding="utf-8")
    (demo / "report" / "a.png").write_bytes(b"a")
    write_mark(demo / "report", kind="report")
    write_mark(demo, kind="demo")
    (demo / "report" / "a.png").unlink()
    (demo / "report" / "b.png").write_bytes(b"b")
    write_mark(demo / "report", kind="report")
    assert is_report_folder(demo)
    (demo / "report" / "mine.txt").write_text("not ours", encoding="utf-8")
    assert not is_report_folder(demo)

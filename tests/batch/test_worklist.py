"""The worklist: every problem of every entry reported at once, naming the entry and field;
ids that are safe folder names; the CLI's exit 2 for an unusable worklist."""

from __future__ import annotations

from pathlib import Path

import pytest
from typer.testing import CliRunner

from sigreport.batch import load_worklist
from sigreport.cli import app
from sigreport.errors import InputError


@pytest.fixture()
def folder(tmp_path: Path) -> Path:
    for name in ("s1", "s2", "p1"):
        (tmp_path / name).mkdir()
    for name in ("c1.toml", "c2.toml", "p1.toml"):
        (tmp_path / name).write_text("")
    return tmp_path


def _write(folder: Path, text: str) -> Path:
    path = folder / "worklist.toml"
    path.write_text(text)
    return path


def test_a_good_worklist_resolves_paths_next_to_it(folder):
    path = _write(
        folder,
        'title = "Board"\n'
        '[[case]]\nid = "a-1"\nstudy = "s1"\ncase = "c1.toml"\n'
        'prior_study = "p1"\nprior_case = "p1.toml"\n'
        '[[case]]\nid = "B.2"\nstudy = "s2"\ncase = "c2.toml"\n',
    )
    worklist = load_worklist(path)
    assert worklist.title == "Board"
    assert [c.id for c in worklist.cases] == ["a-1", "B.2"]
    first = worklist.cases[0]
    assert first.study == (folder / "s1").resolve()
    assert first.prior_case == (folder / "p1.toml").resolve()
    assert worklist.cases[1].prior_study is None


def test_every_problem_is_reported_at_once(folder):
    path = _write(
        folder,
        '[[case]]\nid = "../up"\nstudy = "s1"\ncase = "c1.toml"\n'
        '[[case]]\nid = "ok"\nstudy = "nowhere"\ncase = "c1.toml"\ncolour = "red"\n'
        '[[case]]\nid = "OK"\nstudy = "s2"\ncase = "missing.toml"\n'
        '[[case]]\nid = "solo"\nstudy = "s2"\ncase = "c2.toml"\nprior_study = "p1"\n'
        '[[case]]\nstudy = "s2"\ncase = "c2.toml"\n'
        '[[case]]\nid = "index.html"\nstudy = "s2"\ncase = "c2.toml"\n',
    )
    with pytest.raises(InputError) as info:
        load_worklist(path)
    message = str(info.value)
    assert "worklist.toml" in message
    assert 'case[0] (id "../up"): id must be' in message
    assert 'case[1] (id "ok"): unknown key(s) colour' in message
    assert 'case[1] (id "ok"): study: folder nowhere not found' in message
    # Folder names compare case-insensitively on some file systems: "OK" would overwrite "ok".
    assert 'case[2] (id "OK"): id is also used by case[1]' in message
    assert 'case[2] (id "OK"): case: file missing.toml not found' in message
    assert 'case[3] (id "solo"): prior_study and prior_case go together' in message
    assert "case[4]: id is missing" in message
    assert 'case[5] (id "index.html"): id must be' in message
    assert "8 problem(s)" in message


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("", "no \\[\\[case\\]\\] entries"),
        ("case = 3\n", "expected \\[\\[case\\]\\] tables"),
        ("[[case]\n", "not valid TOML"),
        ("cases = []\n", "unknown key\\(s\\) cases"),
    ],
)
def test_unusable_files(folder, text, match):
    with pytest.raises(InputError, match=match):
        load_worklist(_write(folder, text))


def test_the_command_exits_2_on_an_unusable_worklist_before_any_work(folder):
    path = _write(folder, '[[case]]\nid = "a b"\nstudy = "s1"\ncase = "c1.toml"\n')
    out = folder / "out"
    result = CliRunner().invoke(app, ["batch", str(path), "--out", str(out)])
    assert result.exit_code == 2, result.output
    assert 'case[0] (id "a b"): id must be' in result.output
    assert "Traceback" not in result.output
    assert not out.exists()


def test_the_command_refuses_existing_case_folders(folder):
    path = _write(folder, '[[case]]\nid = "a"\nstudy = "s1"\ncase = "c1.toml"\n')
    (folder / "out" / "a").mkdir(parents=True)
    result = CliRunner().invoke(app, ["batch", str(path), "--out", str(folder / "out")])
    assert result.exit_code == 2, result.output
    assert "exists" in result.output and "--force" in result.output


def test_a_case_folder_holding_input_is_refused_even_with_force(folder):
    # OUTDIR/s1 would be the case folder of "s1", and it holds that case's study: replacing it
    # (--force) would delete the input.
    path = _write(folder, '[[case]]\nid = "s1"\nstudy = "s1"\ncase = "c1.toml"\n')
    result = CliRunner().invoke(app, ["batch", str(path), "--out", str(folder), "--force"])
    assert result.exit_code == 2, result.output
    assert "holds input of the worklist" in " ".join(result.output.split())
    assert (folder / "s1").is_dir()

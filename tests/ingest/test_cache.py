"""The header index cache: reused when files are unchanged, never trusted when they change."""

from __future__ import annotations

import os
import stat
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from sigreport.cli import app
from sigreport.ingest import cache as cache_module
from sigreport.ingest import index_study
from sigreport.ingest.cache import CACHE_ENV, HeaderCache, cache_dir
from sigreport.ingest.header import read_frames

from builders.dicom import write_classic_series


def _study(folder: Path) -> Path:
    stored = np.arange(4 * 6 * 5, dtype=np.int16).reshape(4, 6, 5)
    t2 = {"RepetitionTime": "4000", "EchoTime": "100", "ScanningSequence": "SE"}
    write_classic_series(folder / "s3", stored, series_number=3, description="T2", extra=t2)
    write_classic_series(folder / "s4", stored + 7, series_number=4, description="other")
    (folder / "notes.txt").write_text("not DICOM")
    return folder


def _summary(index):
    return (
        [(s.key, s.role, s.role_reason, tuple(i.path for i in s.instances)) for s in index.stacks],
        [(f.path, f.reason) for f in index.skipped],
    )


class _Counting:
    """Counts the header reads the cache lets through."""

    def __init__(self, monkeypatch):
        self.calls = 0
        original = read_frames

        def counted(path):
            self.calls += 1
            return original(path)

        monkeypatch.setattr("sigreport.ingest.index.read_frames", counted)


def test_cache_dir_follows_the_environment(monkeypatch, tmp_path):
    monkeypatch.setenv(CACHE_ENV, str(tmp_path / "x"))
    assert cache_dir() == tmp_path / "x"
    monkeypatch.delenv(CACHE_ENV)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    assert cache_dir() == tmp_path / "xdg" / "sigreport"  # XDG Base Directory Specification
    monkeypatch.delenv("XDG_CACHE_HOME")
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    assert cache_dir() == tmp_path / "home" / ".cache" / "sigreport"


def test_a_repeat_index_reads_no_header_and_gives_the_same_index(tmp_path, monkeypatch):
    study = _study(tmp_path / "study")
    counting = _Counting(monkeypatch)
    first = index_study(study)
    assert counting.calls == 9  # 4 + 4 slices and the text file
    second = index_study(study)
    assert counting.calls == 9  # nothing read again
    assert _summary(second) == _summary(first)
    assert second.stacks == first.stacks
    # The cache lives in the cache folder, private to the user, never in the study.
    [stored] = list(Path(os.environ[CACHE_ENV]).glob("index-*.pickle"))
    assert stat.S_IMODE(stored.stat().st_mode) == 0o600
    assert not [p for p in study.rglob("*") if "index-" in p.name]


def test_a_changed_file_is_read_again(tmp_path, monkeypatch):
    study = _study(tmp_path / "study")
    index_study(study)
    counting = _Counting(monkeypatch)
    changed = sorted((study / "s4").iterdir())[0]
    before = changed.stat()
    stored = np.full((1, 6, 5), 3, dtype=np.int16)
    write_classic_series(tmp_path / "other", stored, series_number=9, description="replaced")
    replacement = next((tmp_path / "other").iterdir())
    changed.write_bytes(replacement.read_bytes())
    os.utime(changed, ns=(before.st_atime_ns, before.st_mtime_ns + 1_000_000))
    (study / "notes.txt").unlink()
    index = index_study(study)
    assert counting.calls == 1
    assert not index.skipped  # the vanished file is not remembered
    assert any(s.series_number == 9 for s in index.stacks)
    assert index.stacks == index_study(study, use_cache=False).stacks


def test_same_size_and_time_but_other_path_is_a_miss(tmp_path, monkeypatch):
    study = _study(tmp_path / "study")
    index_study(study)
    (study / "s3").rename(study / "s3-moved")
    counting = _Counting(monkeypatch)
    index = index_study(study)
    assert counting.calls == 4
    paths = {i.path for s in index.stacks for i in s.instances}
    assert all(p.exists() for p in paths)


@pytest.mark.parametrize("damage", ["garbage", "truncated", "foreign-class", "open-to-others"])
def test_a_bad_cache_file_is_ignored_and_rebuilt(tmp_path, monkeypatch, damage):
    study = _study(tmp_path / "study")
    reference = index_study(study)
    [stored] = list(Path(os.environ[CACHE_ENV]).glob("index-*.pickle"))
    if damage == "garbage":
        stored.write_bytes(b"\x00not a pickle")
    elif damage == "truncated":
        stored.write_bytes(stored.read_bytes()[:100])
    elif damage == "foreign-class":
        import pickle

        stored.write_bytes(pickle.dumps({"format": 1, "entries": os.system}))
    else:
        stored.chmod(0o644)
    counting = _Counting(monkeypatch)
    index = index_study(study)
    assert counting.calls == 9
    assert index.stacks == reference.stacks
    assert stat.S_IMODE(stored.stat().st_mode) == 0o600  # rewritten, private again


def test_no_cache_neither_reads_nor_writes_it(tmp_path, monkeypatch):
    study = _study(tmp_path / "study")
    result = CliRunner().invoke(app, ["scan", str(study), "--json", "--no-cache"])
    assert result.exit_code == 0, result.output
    assert not list(Path(os.environ[CACHE_ENV]).glob("index-*"))
    result = CliRunner().invoke(app, ["scan", str(study), "--json"])
    assert result.exit_code == 0, result.output
    assert list(Path(os.environ[CACHE_ENV]).glob("index-*"))
    counting = _Counting(monkeypatch)
    assert CliRunner().invoke(app, ["scan", str(study), "--json", "--no-cache"]).exit_code == 0
    assert counting.calls == 9


def test_a_cache_folder_inside_the_study_is_never_used(tmp_path, monkeypatch):
    study = _study(tmp_path / "study")
    monkeypatch.setenv(CACHE_ENV, str(study / "cache"))
    index_study(study)
    assert not (study / "cache").exists()
    assert not HeaderCache(study).enabled
    assert cache_module.cache_dir() == study / "cache"

"""The report folder is written atomically: complete, or not at all."""

from __future__ import annotations

import pytest

import sigreport.report.writer as writer
from sigreport.errors import InputError
from sigreport.model import KeySlice
from sigreport.report import write_report
from sigreport.report.outdir import MARK_NAME

EXPECTED = {
    MARK_NAME,
    "findings.json",
    "table.csv",
    "report.md",
    "report.txt",
    "report.html",
    "sr.dcm",
    "images",
}


def test_every_outdir_file_is_written(report_dir):
    assert {p.name for p in report_dir.iterdir()} == EXPECTED


def test_returns_the_html_path(tmp_path, findings, key_slices, study):
    out = tmp_path / "r"
    assert write_report(out, findings, key_slices[:2], study) == out / "report.html"


def test_failure_mid_write_leaves_no_folder_and_no_temp(
    tmp_path, findings, key_slices, study, monkeypatch
):
    def broken(*args, **kwargs):
        raise RuntimeError("disk full while writing the SR")

    # The SR is the last file built: everything else is already in the temporary folder.
    monkeypatch.setattr(writer, "build_sr", broken)
    out = tmp_path / "report"
    with pytest.raises(RuntimeError, match="disk full"):
        write_report(out, findings, key_slices, study)
    assert list(tmp_path.iterdir()) == []


def test_existing_folder_is_refused_without_force(tmp_path, findings, key_slices, study):
    out = tmp_path / "report"
    out.mkdir()
    (out / "mine.txt").write_text("keep me", encoding="utf-8")
    with pytest.raises(InputError, match="exists; use --force to replace it"):
        write_report(out, findings, key_slices, study)
    assert [p.name for p in out.iterdir()] == ["mine.txt"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report"]


def test_force_replaces_the_old_folder(tmp_path, findings, key_slices, study):
    out = tmp_path / "report"
    write_report(out, findings, key_slices[:1], study)
    old = {p.name for p in (out / "images").iterdir()}
    write_report(out, findings, key_slices, study, force=True)
    assert {p.name for p in (out / "images").iterdir()} > old
    assert {p.name for p in out.iterdir()} == EXPECTED
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report"]  # no temp, no old copy


def test_force_keeps_the_old_folder_when_the_new_one_fails(
    tmp_path, findings, key_slices, study, monkeypatch
):
    out = tmp_path / "report"
    write_report(out, findings, key_slices[:1], study)
    old = {p.relative_to(out): p.read_bytes() for p in out.rglob("*") if p.is_file()}
    monkeypatch.setattr(writer, "render_html", lambda *a, **k: 1 / 0)
    with pytest.raises(ZeroDivisionError):
        write_report(out, findings, key_slices, study, force=True)
    assert {p.relative_to(out): p.read_bytes() for p in out.rglob("*") if p.is_file()} == old
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report"]


def test_image_names_never_carry_raw_ids(tmp_path, findings, key_slices, study):
    hostile = "../<b>x"
    findings["lesions"][0]["id"] = hostile
    keys = [
        KeySlice(
            hostile,
            k.role,
            k.image,
            k.lesion_mask,
            k.reference_mask,
            k.pixel_spacing_mm,
            k.slice_index,
            k.sop_instance_uid,
        )  # fmt: skip
        for k in key_slices
        if k.roi_id == "L1"
    ]
    out = tmp_path / "report"
    write_report(out, findings, keys, study)
    names = sorted(p.name for p in (out / "images").iterdir())
    assert names == sorted(f"__b_x_{k.role}.png" for k in keys)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report"]


def test_extra_files_go_into_outdir_and_unsafe_paths_are_refused(
    tmp_path, findings, key_slices, study
):
    out = tmp_path / "out"
    write_report(out, findings, key_slices[:1], study, extra_files={"rois/L1.nii.gz": b"abc"})
    assert (out / "rois" / "L1.nii.gz").read_bytes() == b"abc"
    for bad in ("../escape.bin", "/abs.bin", "rois/../../x", ""):
        target = tmp_path / f"out-{abs(hash(bad))}"
        with pytest.raises(ValueError, match="unsafe path"):
            write_report(target, findings, key_slices[:1], study, extra_files={bad: b"x"})
        assert not target.exists()
    assert not (tmp_path / "escape.bin").exists()

"""Hostile files in a study folder: each is skipped with its real reason, quickly and within
bounded memory, or flagged on the series; nothing blocks, nothing is allocated from a size the
file does not hold."""

from __future__ import annotations

import os
import signal
import socket
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pydicom
import pytest
from pydicom.sequence import Sequence as DicomSequence
from pydicom.uid import RLELossless

from sigreport import limits
from sigreport.errors import InputError
from sigreport.ingest import header as header_module
from sigreport.ingest import index_study, load_stack
from sigreport.ingest.enhanced import enhanced_frames
from sigreport.ingest.header import read_frames

from builders.dicom import classic_slices, enhanced_dataset, save, write_classic_series
from builders.hostile import (
    deflate_bomb,
    huge_rows_file,
    many_frames_file,
    mutate_all,
    sparse_file,
    write_small_study,
)


@contextmanager
def deadline(seconds: int) -> Iterator[None]:
    """Fail (rather than hang the suite) when the block blocks: SIGALRM interrupts it."""

    def expire(signum: int, frame: object) -> None:
        raise TimeoutError(f"blocked for more than {seconds} s")

    previous = signal.signal(signal.SIGALRM, expire)
    # Re-fired every second: code that swallows the first TimeoutError gets another.
    signal.setitimer(signal.ITIMER_REAL, seconds, 1.0)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)


def _reasons(folder: Path, **kwargs: object) -> dict[str, str]:
    index = index_study(folder, **kwargs)  # type: ignore[arg-type]
    return {str(f.path.relative_to(folder)): f.reason for f in index.skipped}


def _stored(n: int = 3) -> np.ndarray:
    return np.arange(n * 16, dtype=np.int16).reshape(n, 4, 4)


# --------------------------------------------------------------------------------------------
# Declared sizes against the bytes the file holds


def test_huge_rows_and_columns_are_skipped_from_the_header(tmp_path: Path) -> None:
    study, _ = write_small_study(tmp_path)
    source = sorted(study.rglob("IM*"))[0]
    huge_rows_file(study / "big", source, 40_000, 40_000)
    huge_rows_file(study / "max", source, 65_535, 65_535)
    huge_rows_file(study / "short", source, 64, 64)  # 128 bytes for 64 x 64 x 16 bits
    reasons = _reasons(study)
    assert reasons["big"] == (
        "Rows (0028,0010) 40000 exceeds the ceiling of 8192 pixels per side (sigreport.limits)"
    )
    assert reasons["max"].startswith("Rows (0028,0010) 65535 exceeds the ceiling")
    assert reasons["short"] == (
        "pixel data holds 128 bytes, Rows 64 x Columns 64 x 1 frame(s) x 16 bits need 8192"
    )


@pytest.mark.parametrize("frames", [10**6, 2**31 - 1])
def test_enhanced_file_claiming_millions_of_frames_is_skipped_before_any_frame_record(
    tmp_path: Path, frames: int, monkeypatch: pytest.MonkeyPatch
) -> None:
    many_frames_file(tmp_path / "mf.dcm", frames)
    # The reason must come from the size check, before a record is built per claimed frame.
    built: list[int] = []

    def counting(*args: object, **kwargs: object) -> object:
        built.append(1)
        return enhanced_frames(*args, **kwargs)  # type: ignore[arg-type]

    monkeypatch.setattr("sigreport.ingest.enhanced.enhanced_frames", counting)
    reason = _reasons(tmp_path)["mf.dcm"]
    assert built == []
    if frames > limits.MAX_FRAMES_PER_FILE:
        assert reason.startswith(f"NumberOfFrames (0028,0008) {frames} exceeds the ceiling")
    else:
        assert "pixel data holds" in reason


def test_encapsulated_file_cannot_claim_more_frames_than_fragments(tmp_path: Path) -> None:
    path = save(enhanced_dataset(_stored(2)), tmp_path / "rle.dcm", RLELossless)
    ds = pydicom.dcmread(path)
    ds.NumberOfFrames = 50_000  # each frame needs at least an 8-byte item: 400 kB
    ds.PerFrameFunctionalGroupsSequence = DicomSequence([])
    ds.save_as(path)
    assert "cannot hold 50000 frames" in _reasons(tmp_path)["rle.dcm"]


def test_negative_or_zero_frame_count_is_a_reason_not_a_crash(tmp_path: Path) -> None:
    ds = enhanced_dataset(_stored(2))
    ds.NumberOfFrames = "-3"
    save(ds, tmp_path / "neg.dcm")
    assert _reasons(tmp_path)["neg.dcm"] == (
        "NumberOfFrames (0028,0008) must be a positive integer, got -3"
    )


def test_deflated_file_inflating_beyond_the_ceiling_is_skipped(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(limits, "MAX_DEFLATED_BYTES", 4 * 1024**2)
    deflate_bomb(tmp_path / "bomb.dcm", inflated=16 * 1024**2)
    called: list[object] = []
    monkeypatch.setattr(header_module, "_read_full_check", lambda *a: called.append(a))
    reason = _reasons(tmp_path)["bomb.dcm"]
    assert reason.startswith("deflated data set inflates beyond the ceiling of 4194304 bytes")
    assert called == []  # never handed to pydicom's whole-file read


def test_a_stack_above_the_voxel_ceiling_is_refused_before_allocation(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    study, _ = write_small_study(tmp_path)
    (stack,) = index_study(study).stacks
    monkeypatch.setattr(limits, "MAX_STACK_VOXELS", 1000)
    allocated: list[object] = []
    monkeypatch.setattr(np, "full", lambda *a, **k: allocated.append(a))
    with pytest.raises(
        InputError, match=r"series 1 \(T1 SE\), file s1/IM\d+_1: the stack is 24 x 24 x 8"
    ):
        load_stack(stack, study_dir=study)
    assert allocated == []


# --------------------------------------------------------------------------------------------
# Only regular files, and only files that start like DICOM


def test_fifo_device_and_socket_are_skipped_without_blocking(tmp_path: Path) -> None:
    write_classic_series(tmp_path / "good", _stored(3))
    os.mkfifo(tmp_path / "pipe")  # opening it for reading would block until a writer comes
    (tmp_path / "zero").symlink_to("/dev/zero")  # reading it never ends
    with socket.socket(socket.AF_UNIX) as sock:
        sock.bind(str(tmp_path / "sock"))
        with deadline(20):
            index = index_study(tmp_path)
    reasons = {f.path.name: f.reason for f in index.skipped}
    assert reasons == {
        "pipe": "not a regular file: a named pipe (FIFO); only regular files are read",
        "zero": "not a regular file: a character device; only regular files are read",
        "sock": "not a regular file: a socket; only regular files are read",
    }
    assert len(index.stacks) == 1


def test_a_large_non_dicom_file_is_refused_after_its_first_bytes(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    sparse_file(tmp_path / "movie.mkv", head=b"\x1a\x45\xdf\xa3 matroska")
    sparse_file(tmp_path / "zeros.bin")
    reads: list[int] = []
    real_open = open

    class Counting:
        def __init__(self, handle: object) -> None:
            self.handle = handle

        def read(self, n: int = -1) -> bytes:
            reads.append(n)
            return self.handle.read(n)  # type: ignore[attr-defined]

        def __getattr__(self, name: str) -> object:
            return getattr(self.handle, name)

        def __enter__(self) -> Counting:
            return self

        def __exit__(self, *exc: object) -> None:
            self.handle.close()  # type: ignore[attr-defined]

    monkeypatch.setattr(
        header_module, "open", lambda *a, **k: Counting(real_open(*a, **k)), raising=False
    )
    assert _reasons(tmp_path) == {
        "movie.mkv": "not a DICOM file (no DICM prefix)",
        "zeros.bin": "not a DICOM file (no DICM prefix)",
    }
    assert reads == [132, 132]  # the preamble and prefix, nothing more


def test_preamble_less_dicom_is_still_read(tmp_path: Path) -> None:
    # PS3.10 requires the preamble, but old writers omit it: a data set that starts with a
    # plausible group 0008 element is still given to pydicom.
    ds = classic_slices(_stored(1))[0]
    ds.save_as(tmp_path / "raw.dcm", enforce_file_format=False, implicit_vr=True)
    (record,) = read_frames(tmp_path / "raw.dcm")
    assert record.rows == 4


def test_an_unreadable_folder_is_listed_as_skipped(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    write_classic_series(tmp_path / "open", _stored(3))
    write_classic_series(tmp_path / "locked", _stored(3))
    # Root reads every folder, so the denial a user would get is simulated.
    real_scandir = os.scandir

    def scandir(path: object = ".") -> object:
        if Path(os.fsdecode(path)).name == "locked":  # type: ignore[arg-type]
            raise PermissionError(13, "Permission denied", os.fsdecode(path))  # type: ignore[arg-type]
        return real_scandir(path)  # type: ignore[arg-type]

    monkeypatch.setattr(os, "scandir", scandir)
    index = index_study(tmp_path)
    assert [(f.path.name, f.reason) for f in index.skipped] == [
        ("locked", "folder not readable (Permission denied): the files in it were not indexed")
    ]


# --------------------------------------------------------------------------------------------
# Values the header holds


def test_unknown_character_set_is_decoded_with_a_warning(tmp_path: Path) -> None:
    def change(ds: pydicom.Dataset) -> None:
        ds.SpecificCharacterSet = "ISO_IR 999"
        ds.SeriesDescription = "T1 SE"

    study, _ = write_small_study(tmp_path)
    mutate_all(study, change)
    (stack,) = index_study(study).stacks
    assert stack.description == "T1 SE"
    assert any("SpecificCharacterSet 'ISO_IR 999' is not a known" in w for w in stack.warnings)


def test_missing_sop_instance_uid_is_skipped_naming_the_series(tmp_path: Path) -> None:
    ds = classic_slices(_stored(1), series_number=7, description="T2")[0]
    del ds.SOPInstanceUID
    ds.save_as(tmp_path / "nouid.dcm", implicit_vr=True, little_endian=True)
    (skipped,) = index_study(tmp_path).skipped
    assert skipped.reason == "missing SOPInstanceUID (0008,0018)"
    assert (skipped.series_number, skipped.description) == (7, "T2")


BAD_VALUES = [
    ("PixelSpacing", ["nan", "1"], "PixelSpacing (0028,0030) must be finite numbers, got [nan, 1.0]"),
    ("PixelSpacing", ["inf", "1"], "PixelSpacing (0028,0030) must be finite numbers, got [inf, 1.0]"),
    ("PixelSpacing", ["1e-9", "1"], "PixelSpacing (0028,0030) must lie within [0.001, 1000]"),
    ("ImagePositionPatient", ["0", "nan", "0"], "ImagePositionPatient (0020,0032) must be finite"),
    ("ImagePositionPatient", ["0", "0", "1e300"], "ImagePositionPatient (0020,0032) must lie within"),
    ("ImageOrientationPatient", ["nan", "0", "0", "0", "1", "0"],
     "ImageOrientationPatient (0020,0037) must be finite"),
    ("SliceThickness", "nan", "SliceThickness (0018,0050) must be finite"),
    ("SliceThickness", "-inf", "SliceThickness (0018,0050) must be finite"),
    ("SpacingBetweenSlices", "inf", "SpacingBetweenSlices (0018,0088) must be finite"),
    ("RescaleSlope", "nan", "RescaleSlope / RescaleIntercept must be finite, got nan / 0.0"),
    ("RescaleIntercept", "-inf", "RescaleSlope / RescaleIntercept must be finite, got 1.0 / -inf"),
]  # fmt: skip


@pytest.mark.parametrize(("keyword", "value", "reason"), BAD_VALUES)
def test_non_finite_or_absurd_geometry_and_scaling_are_skipped(
    tmp_path: Path, keyword: str, value: object, reason: str
) -> None:
    # nan <= 0 is False: a sign test alone would let these through.
    ds = classic_slices(_stored(1))[0]
    setattr(ds, keyword, value)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # pydicom warns about the invalid DS it writes
        save(ds, tmp_path / "bad.dcm")
    assert _reasons(tmp_path)["bad.dcm"].startswith(reason)


def test_enhanced_frame_with_nan_position_is_skipped(tmp_path: Path) -> None:
    ds = enhanced_dataset(_stored(2))
    ds.PerFrameFunctionalGroupsSequence[1].PlanePositionSequence[0].ImagePositionPatient = [
        0.0,
        float("nan"),
        0.0,
    ]
    save(ds, tmp_path / "e.dcm")
    assert _reasons(tmp_path)["e.dcm"].startswith(
        "frame 2: ImagePositionPatient (0020,0032) must be finite numbers"
    )


# --------------------------------------------------------------------------------------------
# Which study, patient and frame of reference


def test_a_slice_of_another_patient_inside_a_series_is_left_out_and_flagged(
    tmp_path: Path,
) -> None:
    study, _ = write_small_study(tmp_path)
    stray = sorted(study.rglob("IM*"))[3]
    ds = pydicom.dcmread(stray)
    ds.PatientID = "SOMEONE-ELSE"
    ds.StudyInstanceUID = "1.2.826.0.1.3680043.8.498.555"
    ds.save_as(stray)
    index = index_study(study)
    (stack,) = index.stacks
    assert len(stack.instances) == 7 and stray not in {i.path for i in stack.instances}
    (skipped,) = index.skipped
    assert skipped.path == stray
    assert skipped.reason.startswith("series 1: its StudyInstanceUID and PatientID differ")
    assert any("1 file(s) of this series were left out" in w for w in stack.warnings)


def test_mixed_frames_of_reference_within_a_series_are_refused_for_the_minority(
    tmp_path: Path,
) -> None:
    study, _ = write_small_study(tmp_path)
    files = sorted(study.rglob("IM*"))
    for path in files[:2]:
        ds = pydicom.dcmread(path)
        ds.FrameOfReferenceUID = "1.2.826.0.1.3680043.8.498.556"
        ds.save_as(path)
    index = index_study(study)
    assert sorted(f.path for f in index.skipped) == files[:2]
    assert all("FrameOfReferenceUID differ" in f.reason for f in index.skipped)
    assert any("FrameOfReferenceUID" in w for w in index.stacks[0].warnings)


def test_duplicate_sop_instance_uids(tmp_path: Path) -> None:
    study, _ = write_small_study(tmp_path)
    a, b, c = sorted(study.rglob("IM*"))[:3]
    # b claims a's UID with other pixels: neither can be trusted.
    ds = pydicom.dcmread(b)
    ds.SOPInstanceUID = pydicom.dcmread(a).SOPInstanceUID
    ds.save_as(b)
    # an exact copy of c: harmless, kept once.
    (study / "s1" / "zz_copy").write_bytes(c.read_bytes())
    index = index_study(study)
    reasons = {f.path.name: f.reason for f in index.skipped}
    assert set(reasons) == {a.name, b.name, "zz_copy"}
    assert (
        "with different content" in reasons[a.name] and "with different content" in reasons[b.name]
    )
    assert reasons["zz_copy"].startswith(f"an identical copy of s1/{c.name}")
    (stack,) = index.stacks
    assert len(stack.instances) == 6
    assert any("with different content; all were left out" in w for w in stack.warnings)


def test_two_studies_warn_in_scan_and_are_refused_for_a_report(tmp_path: Path) -> None:
    other = "1.2.826.0.1.3680043.8.498.557"
    study, _ = write_small_study(tmp_path)
    write_small_study(tmp_path, study_uid=other, series_number=2, folder="s2")
    index = index_study(study)
    assert len(index.stacks) == 2
    assert any(w.startswith(f"2 studies under {study}") for w in index.warnings)
    with pytest.raises(InputError, match=r'name the one to read with study_uid = "\.\.\."'):
        index_study(study, require_one_study=True)
    chosen = index_study(study, study_uid=other, require_one_study=True)
    assert [s.series_number for s in chosen.stacks] == [2]
    assert all("not the case file's study_uid" in f.reason for f in chosen.skipped)
    with pytest.raises(InputError, match="no image of that study"):
        index_study(study, study_uid="1.2.3", require_one_study=True)


def test_two_patients_in_one_study_are_refused_for_a_report(tmp_path: Path) -> None:
    study, _ = write_small_study(tmp_path)
    write_small_study(tmp_path, series_number=2, folder="s2")
    mutate_all(study / "s2", lambda ds: setattr(ds, "PatientID", "SOMEONE-ELSE"))
    with pytest.raises(InputError, match="files of 2 patients"):
        index_study(study, require_one_study=True)
    assert any("files of 2 patients" in w for w in index_study(study).warnings)


# --------------------------------------------------------------------------------------------
# Messages name the series and the file relative to the study


def test_undecodable_pixels_name_the_series_and_the_relative_path(tmp_path: Path) -> None:
    study = tmp_path / "study"
    (path,) = write_classic_series(
        study / "s5", _stored(1), transfer_syntax=RLELossless, series_number=5,
        description="T2 TSE",
    )  # fmt: skip
    (stack,) = index_study(study).stacks
    ds = pydicom.dcmread(path)
    ds.PixelData = ds.PixelData[:20] + b"\x00" * (len(ds.PixelData) - 20)
    ds.save_as(path)
    with pytest.raises(
        InputError,
        match=rf"^series 5 \(T2 TSE\), file s5/{path.name}: pixel data cannot be decoded",
    ):
        load_stack(stack, study_dir=study)

"""Bad input: each file gets a one-line reason; nothing raises except a missing study folder."""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import numpy as np
import pydicom
import pytest
from pydicom.data import get_testdata_file

from sigreport.errors import InputError
from sigreport.ingest import header as header_module
from sigreport.ingest import index_study, load_stack

from builders.dicom import classic_slices, save, write_classic_series


def _stored(n: int = 3) -> np.ndarray:
    return np.arange(n * 16, dtype=np.int16).reshape(n, 4, 4)


def _reasons(folder: Path) -> dict[str, str]:
    index = index_study(folder)
    for skipped in index.skipped:
        assert "\n" not in skipped.reason
    return {f.path.name: f.reason for f in index.skipped}


def test_missing_or_non_folder_study_dir(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="does not exist"):
        index_study(tmp_path / "nope")
    (tmp_path / "file").write_text("x")
    with pytest.raises(InputError, match="is not a folder"):
        index_study(tmp_path / "file")


def test_empty_folder_gives_zero_stacks(tmp_path: Path) -> None:
    index = index_study(tmp_path)
    assert index.stacks == () and index.skipped == ()


def test_non_dicom_file(tmp_path: Path) -> None:
    (tmp_path / "notes.txt").write_text("not an image\n" * 20)
    (tmp_path / "empty").write_bytes(b"")
    reasons = _reasons(tmp_path)
    assert reasons["notes.txt"].startswith("not a DICOM file")
    assert reasons["empty"].startswith(("not a DICOM file", "truncated"))


def test_bundled_truncated_file(tmp_path: Path) -> None:
    # pydicom's MR_truncated.dcm: pixel data element declares more bytes than the file holds.
    shutil.copy(get_testdata_file("MR_truncated.dcm", download=False), tmp_path / "t.dcm")
    assert (
        _reasons(tmp_path)["t.dcm"] == "truncated: pixel data declares 8192 bytes, file holds 8130"
    )


def test_file_cut_inside_the_header(tmp_path: Path) -> None:
    (path,) = write_classic_series(tmp_path, _stored(1))
    data = path.read_bytes()
    path.write_bytes(data[:300])  # inside the group 0008 elements
    reason = _reasons(tmp_path)[path.name]
    assert reason.startswith(("truncated", "not readable as DICOM", "missing", "no pixel data"))


def test_file_without_pixel_data(tmp_path: Path) -> None:
    ds = classic_slices(_stored(1))[0]
    del ds.PixelData
    save(ds, tmp_path / "nopix.dcm")
    assert _reasons(tmp_path)["nopix.dcm"] == "no pixel data"


def test_non_mr_modality(tmp_path: Path) -> None:
    shutil.copy(get_testdata_file("CT_small.dcm", download=False), tmp_path / "ct.dcm")
    assert _reasons(tmp_path)["ct.dcm"] == "modality CT (CT Image Storage), not MR"


def test_missing_geometry_tags(tmp_path: Path) -> None:
    ds = classic_slices(_stored(1))[0]
    del ds.ImagePositionPatient
    save(ds, tmp_path / "nogeo.dcm")
    reason = _reasons(tmp_path)["nogeo.dcm"]
    assert reason == "image without geometry: missing or malformed ImagePositionPatient (0020,0032)"


def test_malformed_orientation(tmp_path: Path) -> None:
    ds = classic_slices(_stored(1))[0]
    ds.ImageOrientationPatient = ["1", "0", "0", "1", "0", "0"]
    save(ds, tmp_path / "badiop.dcm")
    assert "is not two orthogonal unit vectors" in _reasons(tmp_path)["badiop.dcm"]


def test_unreadable_file(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    (path,) = write_classic_series(tmp_path, _stored(1))
    path.chmod(0)
    if os.geteuid() == 0:  # root ignores file modes: make open() fail as it would for a user
        real_open = open

        def denying_open(file, *args, **kwargs):
            if Path(file) == path:
                raise PermissionError(13, "Permission denied", str(file))
            return real_open(file, *args, **kwargs)

        monkeypatch.setattr(header_module, "open", denying_open, raising=False)
    try:
        assert _reasons(tmp_path)[path.name] == "unreadable: permission denied"
    finally:
        path.chmod(0o644)


def test_good_files_survive_bad_neighbours(tmp_path: Path) -> None:
    write_classic_series(tmp_path / "good", _stored(4))
    (tmp_path / "junk.bin").write_bytes(os.urandom(500))
    shutil.copy(get_testdata_file("CT_small.dcm", download=False), tmp_path / "ct.dcm")
    index = index_study(tmp_path)
    assert len(index.stacks) == 1 and index.stacks[0].size[2] == 4
    assert {f.path.name for f in index.skipped} == {"junk.bin", "ct.dcm"}


def test_progress_is_called_per_file(tmp_path: Path) -> None:
    write_classic_series(tmp_path / "a" / "b", _stored(3))
    (tmp_path / "x.txt").write_text("hello")
    calls: list[tuple[str, int | None, int | None]] = []

    def progress(message: str, done: int | None = None, total: int | None = None) -> None:
        calls.append((message, done, total))

    index_study(tmp_path, progress=progress)
    assert calls == [("indexing files", k, 4) for k in (1, 2, 3, 4)]


def test_undecodable_pixels_name_the_file(tmp_path: Path) -> None:
    (path,) = write_classic_series(tmp_path, _stored(1), transfer_syntax=pydicom.uid.RLELossless)
    (stack,) = index_study(tmp_path).stacks
    ds = pydicom.dcmread(path)
    ds.PixelData = ds.PixelData[:20] + b"\x00" * (len(ds.PixelData) - 20)  # corrupt RLE header
    ds.save_as(path)
    with pytest.raises(InputError, match=rf"{path.name}: pixel data cannot be decoded"):
        load_stack(stack)

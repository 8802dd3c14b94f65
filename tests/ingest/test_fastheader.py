"""The header fast path (sigreport.ingest.fastheader) against pydicom's own reader (the oracle).

For every DICOM file bundled with pydicom (``pydicom.data.get_testdata_files``: local files only,
nothing is downloaded) and for series written by ``dicomfactory`` in Explicit and Implicit VR
Little Endian, reading with the fast path gives exactly what pydicom's parser gives (the same
frame records or the same skip reason, and the same value for every scanned attribute), or the
fast path declines and pydicom reads the file. Pixel values read with numpy are checked against
pydicom's ``pixel_array``.
"""

from __future__ import annotations

import os
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pydicom
import pydicom.data
import pytest
from pydicom.dataset import Dataset
from pydicom.sequence import Sequence as DicomSequence
from pydicom.uid import (
    DeflatedExplicitVRLittleEndian,
    ExplicitVRBigEndian,
    ExplicitVRLittleEndian,
    ImplicitVRLittleEndian,
    RLELossless,
)

from sigreport.ingest import attributes, header
from sigreport.ingest.fastheader import read_header
from sigreport.ingest.volume import read_native_frame

from builders.dicom import classic_slices, save, write_classic_series


def _bundled() -> list[str]:
    # pydicom's own test files present locally (get_testdata_files never downloads).
    return sorted(p for p in pydicom.data.get_testdata_files() if os.path.isfile(p))


def _fast_header(path: Path | str) -> Any:
    with open(path, "rb") as fp:
        return read_header(fp, os.path.getsize(path), header._SCAN_TAG_SET)


def _outcome(path: Path, fast: bool) -> tuple[str, Any]:
    try:
        return "frames", header.read_frames(path, fast=fast)
    except header.SkipFile as exc:
        return "skip", str(exc)
    except Exception as exc:  # the same failure either way is also "the same behaviour"
        return "error", type(exc).__name__


def _values(ds: Dataset) -> dict[str, Any]:
    out = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for keyword in header._SCAN_KEYWORDS:
            try:
                out[keyword] = attributes._get(ds, keyword)
            except Exception as exc:  # compared as the failure's type
                out[keyword] = type(exc).__name__
    return out


def _assert_same_as_pydicom(path: Path) -> bool:
    """Fast and pydicom reads agree; return whether the fast path was taken."""
    assert _outcome(path, fast=True) == _outcome(path, fast=False), path.name
    if _fast_header(path) is None:
        return False
    fast_ds, fast_status = header.read_dataset(path)
    slow_ds, slow_status = header.read_dataset(path, fast=False)
    assert fast_status == slow_status, path.name
    assert _values(fast_ds) == _values(slow_ds), path.name
    return True


def test_bundled_files_match_pydicom() -> None:
    files = _bundled()
    assert len(files) > 50  # pydicom ships well over a hundred test files
    taken = sum(_assert_same_as_pydicom(Path(p)) for p in files)
    # Most bundled files are little endian; the fast path must really be exercised.
    assert taken > len(files) // 2


@pytest.mark.parametrize("syntax", [ExplicitVRLittleEndian, ImplicitVRLittleEndian])
def test_factory_series_take_the_fast_path(tmp_path: Path, syntax: str) -> None:
    stored = np.arange(3 * 6 * 5, dtype=np.int16).reshape(3, 6, 5) - 20
    paths = write_classic_series(
        tmp_path, stored, transfer_syntax=syntax, rescale=(2.0, -5.0),
        extra={"RepetitionTime": "500", "EchoTime": "12", "ScanningSequence": "SE",
               "ContrastBolusAgent": "Gd", "SpecificCharacterSet": "ISO_IR 100",
               "PatientName": "M\xfcller^J\xfcrgen"},
    )  # fmt: skip
    for path in paths:
        assert _fast_header(path) is not None
        assert _assert_same_as_pydicom(path)
        records = header.read_frames(path)
        # Non-ASCII names decode through the character set (PS3.5 6.1): ISO_IR 100 = latin-1.
        assert records[0].study.patient_name == "M\xfcller^J\xfcrgen"


def _with_sequences(ds: Dataset) -> Dataset:
    """Add an undefined-length sequence (not scanned) holding an undefined-length item with a
    nested undefined-length sequence, and private elements, before the pixel data."""
    inner = Dataset()
    inner.ReferencedSOPClassUID = "1.2.840.10008.5.1.4.1.1.4"
    inner.ReferencedSOPInstanceUID = "1.2.3.4"
    outer = Dataset()
    outer.CodeValue = "T1"
    outer.ReferencedImageSequence = DicomSequence([inner])
    ds.ProcedureCodeSequence = DicomSequence([outer, Dataset()])
    for item_ds in (inner, outer):
        item_ds.is_undefined_length_sequence_item = True
    ds["ProcedureCodeSequence"].is_undefined_length = True
    outer["ReferencedImageSequence"].is_undefined_length = True
    block = ds.private_block(0x0019, "SIEMENS MR HEADER", create=True)
    block.add_new(0x0C, "IS", "800")
    return ds


@pytest.mark.parametrize("syntax", [ExplicitVRLittleEndian, ImplicitVRLittleEndian])
def test_undefined_length_sequences_are_skipped(tmp_path: Path, syntax: str) -> None:
    ds = _with_sequences(classic_slices(np.ones((1, 4, 4), np.uint16))[0])
    path = save(ds, tmp_path / "seq.dcm", syntax)
    assert _fast_header(path) is not None
    assert _assert_same_as_pydicom(path)
    # The b-value sits in the Siemens private block (common practice, see classic_b_value).
    assert header.read_frames(path)[0].acquisition.b_value == 800.0


def test_truncated_pixel_data_same_reason(tmp_path: Path) -> None:
    path = save(classic_slices(np.ones((1, 8, 8), np.uint16))[0], tmp_path / "t.dcm")
    path.write_bytes(path.read_bytes()[:-10])
    assert _fast_header(path) is not None
    kind, reason = _outcome(path, fast=True)
    assert kind == "skip" and reason.startswith("truncated: pixel data declares 128 bytes")
    assert _assert_same_as_pydicom(path)


@pytest.mark.parametrize("syntax", [ExplicitVRBigEndian, DeflatedExplicitVRLittleEndian])
def test_unsupported_syntaxes_fall_back(tmp_path: Path, syntax: str) -> None:
    ds = classic_slices(np.ones((1, 4, 4), np.uint16))[0]
    if syntax == ExplicitVRBigEndian:
        ds.file_meta = pydicom.dataset.FileMetaDataset()
        ds.file_meta.TransferSyntaxUID = syntax
        ds.file_meta.MediaStorageSOPClassUID = ds.SOPClassUID
        ds.file_meta.MediaStorageSOPInstanceUID = ds.SOPInstanceUID
        path = tmp_path / "be.dcm"
        ds.save_as(path, enforce_file_format=True, little_endian=False, implicit_vr=False)
    else:
        path = save(ds, tmp_path / "deflated.dcm", syntax)
    assert _fast_header(path) is None
    assert _outcome(path, fast=True)[0] == "frames"
    assert _assert_same_as_pydicom(path) is False


def test_wanted_undefined_length_sequence_falls_back(tmp_path: Path) -> None:
    ds = classic_slices(np.ones((1, 4, 4), np.uint16))[0]
    item = Dataset()
    item.CodeMeaning = "Gadolinium"
    ds.ContrastBolusAgentSequence = DicomSequence([item])
    ds["ContrastBolusAgentSequence"].is_undefined_length = True
    path = save(ds, tmp_path / "cb.dcm")
    assert _fast_header(path) is None  # pydicom parses scanned sequences: it reads this file
    assert header.read_frames(path)[0].acquisition.contrast_agent == "Gadolinium"


def test_native_pixels_match_pydicom_on_bundled_files() -> None:
    taken = 0
    for name in _bundled():
        native = read_native_frame(Path(name))
        if native is None:
            continue
        taken += 1
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            expected = pydicom.dcmread(name).pixel_array  # pydicom's decoder, the oracle
        assert native[1].dtype == expected.dtype, name
        np.testing.assert_array_equal(native[1], expected, err_msg=name)
    assert taken >= 5


@pytest.mark.parametrize(
    ("dtype", "bits_stored"), [(np.uint16, 16), (np.int16, 16), (np.uint16, 12), (np.int16, 12)]
)
@pytest.mark.parametrize("syntax", [ExplicitVRLittleEndian, ImplicitVRLittleEndian])
def test_native_pixels_match_pydicom(
    tmp_path: Path, dtype: type, bits_stored: int, syntax: str
) -> None:
    rng = np.random.default_rng(1)
    values = rng.integers(np.iinfo(dtype).min, np.iinfo(dtype).max, (1, 7, 9)).astype(dtype)
    ds = classic_slices(values)[0]
    ds.BitsStored, ds.HighBit = bits_stored, bits_stored - 1
    path = save(ds, tmp_path / "p.dcm", syntax)
    native = read_native_frame(path)
    assert native is not None
    # pydicom masks / sign-extends above BitsStored (PS3.5 8.1.1): the oracle.
    np.testing.assert_array_equal(native[1], pydicom.dcmread(path).pixel_array)


def test_native_pixels_decline_compressed(tmp_path: Path) -> None:
    path = save(classic_slices(np.ones((1, 4, 4), np.uint16))[0], tmp_path / "r.dcm", RLELossless)
    assert read_native_frame(path) is None

"""Every supported transfer syntax decodes through load_stack to the same pixels.

Reference table in pydicom's habit: pydicom's bundled real MR files (one image, encoded with
different transfer syntaxes) must all give the pixels of the uncompressed ``MR_small.dcm``.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pydicom
import pytest
import SimpleITK as sitk
from pydicom.data import get_testdata_file
from pydicom.uid import (
    DeflatedExplicitVRLittleEndian,
    ExplicitVRLittleEndian,
    ImplicitVRLittleEndian,
    JPEG2000Lossless,
    JPEGLosslessSV1,
    JPEGLSLossless,
    RLELossless,
)

from sigreport.ingest import index_study, load_stack

from builders.dicom import save, write_classic_series

BUNDLED = [
    "MR_small.dcm",
    "MR_small_implicit.dcm",
    "MR_small_bigendian.dcm",
    "MR_small_expb.dcm",
    "MR_small_RLE.dcm",
    "MR_small_jpeg_ls_lossless.dcm",
    "MR_small_jp2klossless.dcm",
    "MR_small_padded.dcm",
]


def _bundled(name: str) -> Path:
    path = get_testdata_file(name, download=False)
    if path is None:
        pytest.skip(f"pydicom does not bundle {name}")
    return Path(path)


def _load_single(folder: Path) -> np.ndarray:
    index = index_study(folder)
    assert len(index.stacks) == 1, (index.stacks, index.skipped)
    return sitk.GetArrayFromImage(load_stack(index.stacks[0]))


@pytest.fixture(scope="module")
def reference() -> np.ndarray:
    # Oracle: pydicom's own decode of the uncompressed file (MR_small.dcm has no rescale).
    return pydicom.dcmread(_bundled("MR_small.dcm")).pixel_array.astype(np.float32)


@pytest.mark.parametrize("name", BUNDLED)
def test_bundled_mr_file_decodes_to_reference_pixels(
    tmp_path: Path, name: str, reference: np.ndarray
) -> None:
    shutil.copy(_bundled(name), tmp_path / "image")
    values = _load_single(tmp_path)
    assert values.shape == (1, 64, 64)
    assert np.array_equal(values[0], reference)


def test_deflated_file_written_with_pydicom(tmp_path: Path, reference: np.ndarray) -> None:
    ds = pydicom.dcmread(_bundled("MR_small.dcm"))
    ds.file_meta.TransferSyntaxUID = DeflatedExplicitVRLittleEndian
    ds.save_as(tmp_path / "deflated", enforce_file_format=True)
    assert pydicom.dcmread(tmp_path / "deflated").file_meta.TransferSyntaxUID == (
        DeflatedExplicitVRLittleEndian
    )
    assert np.array_equal(_load_single(tmp_path)[0], reference)


ENCODED = [
    ImplicitVRLittleEndian,
    RLELossless,
    JPEGLSLossless,
    JPEG2000Lossless,
    JPEGLosslessSV1,
    DeflatedExplicitVRLittleEndian,
]


@pytest.mark.parametrize("syntax", ENCODED, ids=lambda uid: uid.name)
def test_written_series_round_trips(tmp_path: Path, syntax: str) -> None:
    rng = np.random.default_rng(5)
    stored = rng.integers(0, 4000, size=(3, 32, 40), dtype=np.uint16)  # J2K needs >= 32 px
    write_classic_series(tmp_path, stored, transfer_syntax=syntax, rescale=(0.5, 10.0))
    for path in tmp_path.iterdir():
        assert pydicom.dcmread(path, stop_before_pixels=True).file_meta.TransferSyntaxUID == syntax
    values = _load_single(tmp_path)
    # Lossless syntaxes: exactly the stored values, rescaled (PS3.3 C.11.1.1.2 modality LUT).
    assert np.array_equal(values, (stored * 0.5 + 10.0).astype(np.float32))


def test_simpleitk_reads_our_jpeg_lossless_file_identically(tmp_path: Path) -> None:
    rng = np.random.default_rng(6)
    stored = rng.integers(0, 4000, size=(1, 8, 10), dtype=np.uint16)
    (path,) = write_classic_series(tmp_path, stored, transfer_syntax=JPEGLosslessSV1)
    theirs = sitk.GetArrayFromImage(sitk.ReadImage(str(path)))  # GDCM's own decoder
    assert np.array_equal(_load_single(tmp_path), theirs.astype(np.float32))


def test_explicit_little_endian_is_the_default(tmp_path: Path) -> None:
    path = save(pydicom.dcmread(_bundled("MR_small.dcm")), tmp_path / "x")
    assert pydicom.dcmread(path).file_meta.TransferSyntaxUID == ExplicitVRLittleEndian

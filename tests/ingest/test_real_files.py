"""Real scanner files shipped as test data by openly licensed packages: role and geometry table.

Every MR file that pydicom (bundled, no download), nibabel (its wheel's test data) and Debian's
dicom3tools (its documentation example) ship is listed in ``TABLE`` with the package, the file,
what the index must make of it (a role, or a skip and its reason) and where that truth comes
from: the file's header evidence, common practice, or the file's own documentation. A test
checks that no MR file of those packages is missing from the table.

Geometry is compared with an independent reader: nibabel's ``MosaicWrapper`` for mosaics,
pydicom's functional groups for Enhanced MR, SimpleITK's (GDCM) reader for classic images;
pixels with pydicom's ``pixel_array`` after the rescale (or nibabel's scaled mosaic data).
The roles measured here are summarised in docs/ingestion.md (Real files).
"""

from __future__ import annotations

import gzip
import os
import shutil
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pydicom
import pytest
import SimpleITK as sitk
from pydicom.data import get_testdata_files

from sigreport.ingest import index_study, load_stack
from sigreport.ingest.header import classic_frame, read_dataset
from sigreport.ingest.mosaic import mosaic_frames
from sigreport.model import Role, Stack, StudyIndex

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # nibabel.nicom warns on import that its readers are young
    import nibabel
    from nibabel.nicom import dicomwrappers

NIBABEL = Path(nibabel.__file__).parent
PYDICOM = Path(pydicom.__file__).parent / "data" / "test_files"
DICOM3TOOLS = Path("/usr/share/doc/dicom3tools/examples")  # Debian package dicom3tools


@dataclass(frozen=True)
class Case:
    package: str  # "pydicom", "nibabel", "dicom3tools"
    name: str  # path under the package's test data folder
    role: Role | None  # expected role; None when the file must be skipped
    match: str  # a piece of the role reason, or of the skip reason
    truth: str  # where the expectation comes from
    oracle: str  # "mosaic" (nibabel), "enhanced" (pydicom functional groups), "sitk", "none"


_MR_SMALL = (
    "header evidence: ImageType DERIVED\\SECONDARY\\OTHER, a derived image (its physics, spin "
    "echo TR 4000 ms TE 240 ms, would be T2): ambiguous, UNKNOWN (docs/ingestion.md)"
)
_PILOT = "header evidence: SeriesDescription names a localizer / pilot; common practice"
_ANGIO = "header evidence: ImageType DERIVED\\SECONDARY\\PROJECTION IMAGE (MIP of an angiogram)"
_SMALL_MOSAIC = (
    "the file's documentation: nibabel's reduced test copy (256x256 for 48 slices; nibabel's "
    "own MosaicWrapper cannot reshape its data either)"
)

TABLE = [
    # pydicom: one Toshiba image in several encodings, a truncated copy, an MPR, a private-SQ stub
    *[
        Case("pydicom", name, Role.UNKNOWN, "derived", _MR_SMALL, "sitk")
        for name in (
            "MR_small.dcm", "MR_small_RLE.dcm", "MR_small_bigendian.dcm", "MR_small_expb.dcm",
            "MR_small_implicit.dcm", "MR_small_jp2klossless.dcm",
            "MR_small_jpeg_ls_lossless.dcm", "MR_small_padded.dcm",
        )
    ],
    Case("pydicom", "MR_truncated.dcm", None, "truncated", "the file's name and size", "none"),
    Case("pydicom", "examples_overlay.dcm", Role.UNKNOWN, "MPR",
         "header evidence: ImageType DERIVED\\SECONDARY\\MPR (a reformat)", "sitk"),
    Case("pydicom", "priv_SQ.dcm", None, "no pixel data",
         "header evidence: no Pixel Data element", "none"),
    # pydicom's DICOMDIR test study (Philips 1.5 T): localizers and angiography projections
    *[
        Case("pydicom", f"dicomdirtests/98892003/{name}", Role.UNKNOWN, "localizer", _PILOT, "sitk")
        for name in ("MR1/15820", "MR1/4919", "MR1/5641", "MR2/15970", "MR2/4950", "MR2/4981",
                     "MR2/5011", "MR2/6273", "MR2/6605", "MR2/6935")
    ],
    *[
        Case("pydicom", f"dicomdirtests/98892003/MR700/{name}", Role.UNKNOWN, "PROJECTION IMAGE",
             _ANGIO, "sitk")
        for name in ("4467", "4528", "4558", "4588", "4618", "4648", "4678")
    ],
    # nibabel: Siemens mosaics (DTI, resting-state fMRI), a Philips Enhanced MR 3-D T1, a MIP
    Case("nibabel", "nicom/tests/data/siemens_dwi_0.dcm.gz", Role.UNKNOWN, "b 0 s/mm2",
         "header evidence: CSA B_value 0, SequenceName ep_b0: the b = 0 reference", "mosaic"),
    Case("nibabel", "nicom/tests/data/siemens_dwi_1000.dcm.gz", Role.UNKNOWN, "not a trace",
         "header evidence: CSA DiffusionDirectionality DIRECTIONAL, SequenceName ep_b1000#1: "
         "one of 64 directions, not a trace", "mosaic"),
    Case("nibabel", "nicom/tests/data/0.dcm", None, "not divisible", _SMALL_MOSAIC, "none"),
    Case("nibabel", "nicom/tests/data/1.dcm", None, "not divisible", _SMALL_MOSAIC, "none"),
    Case("nibabel", "tests/data/0.dcm", None, "not divisible", _SMALL_MOSAIC, "none"),
    Case("nibabel", "tests/data/1.dcm", None, "not divisible", _SMALL_MOSAIC, "none"),
    Case("nibabel", "nicom/tests/data/csa_slice_norm.dcm", None, "no pixel data",
         "header evidence: no Pixel Data element (header-only test file)", "none"),
    Case("nibabel", "nicom/tests/data/decimal_rescale.dcm", None, "SeriesInstanceUID",
         "header evidence: no SeriesInstanceUID (anonymised copy)", "none"),
    Case("nibabel", "nicom/tests/data/philips_mprage.dcm.gz", Role.T1FS, "AcquisitionContrast T1",
         "header evidence: AcquisitionContrast T1 and SpectrallySelectedExcitation WATER "
         "(water excitation suppresses fat); common practice: an MPRAGE-type 3-D T1", "enhanced"),
    Case("nibabel", "nicom/tests/data/slicethickness_empty_string.dcm", Role.UNKNOWN,
         "PROJECTION IMAGE", "header evidence: ImageType DERIVED\\SECONDARY\\PROJECTION IMAGE, "
         "description <MIP Range>", "sitk"),
    # dicom3tools: a Siemens pulsed arterial spin labelling mosaic
    Case("dicom3tools", "0051.dcm", Role.UNKNOWN, "echo planar without diffusion",
         "header evidence: ImageType ...\\ASL\\...\\MOSAIC, echo planar, no b-value "
         "(perfusion series)", "mosaic"),
]  # fmt: skip

ROOTS = {"pydicom": PYDICOM, "nibabel": NIBABEL, "dicom3tools": DICOM3TOOLS}


def _source(case: Case) -> Path:
    path = ROOTS[case.package] / case.name
    if not path.exists():
        pytest.skip(f"{case.package} does not ship {case.name} here")
    return path


def _materialize(case: Case, folder: Path) -> Path:
    """The file, decompressed when the package ships it gzipped, alone in ``folder``."""
    folder.mkdir(parents=True, exist_ok=True)
    source = _source(case)
    if source.suffix == ".gz":
        target = folder / source.name[: -len(".gz")]
        target.write_bytes(gzip.decompress(source.read_bytes()))
    else:
        target = folder / source.name
        shutil.copyfile(source, target)
    return target


def _index(case: Case, tmp_path: Path) -> tuple[StudyIndex, Path]:
    path = _materialize(case, tmp_path / "study")
    return index_study(tmp_path / "study"), path


def _real_value(ds: pydicom.Dataset) -> np.ndarray:
    """pydicom's decode, with RescaleSlope / Intercept applied (PS3.3 C.11.1.1.2)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        stored = ds.pixel_array.astype(np.float64)
    slope = float(ds.get("RescaleSlope", 1) or 1)
    intercept = float(ds.get("RescaleIntercept", 0) or 0)
    return stored * slope + intercept


def _check_against_sitk(stack: Stack, path: Path) -> None:
    image = load_stack(stack)
    # Oracle: SimpleITK's GDCM reader of the same file (origin, axes, in-plane spacing).
    reader = sitk.ImageFileReader()
    reader.SetFileName(str(path))
    try:
        theirs = reader.Execute()
    except RuntimeError as exc:  # GDCM lacks this encoding: geometry from pydicom alone
        ds = pydicom.dcmread(path)
        assert image.GetOrigin() == pytest.approx([float(v) for v in ds.ImagePositionPatient])
        assert str(exc)
    else:
        assert image.GetOrigin() == pytest.approx(theirs.GetOrigin(), abs=1e-4)
        assert image.GetSpacing()[:2] == pytest.approx(theirs.GetSpacing()[:2], abs=1e-6)
        assert image.GetDirection() == pytest.approx(theirs.GetDirection(), abs=1e-5)
    # Pixels: pydicom's pixel_array after the rescale.
    ours = sitk.GetArrayFromImage(image)[0]
    np.testing.assert_allclose(ours, _real_value(pydicom.dcmread(path)), rtol=1e-6, atol=1e-3)


def _check_mosaic(stack: Stack, path: Path) -> None:
    """Oracle: nibabel's MosaicWrapper (its affine maps (row, column, slice) indices of its data
    array to patient LPS millimetres; its data are scaled by the rescale)."""
    image = load_stack(stack)
    ours = sitk.GetArrayFromImage(image)  # (slice, row, column)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        wrapper = dicomwrappers.wrapper_from_data(pydicom.dcmread(path))
        assert isinstance(wrapper, dicomwrappers.MosaicWrapper)
        theirs = np.asarray(wrapper.get_data(), dtype=np.float64)
    affine = wrapper.affine
    assert ours.shape == (theirs.shape[2], theirs.shape[0], theirs.shape[1])
    rows, cols, slices = theirs.shape
    for index in [(0, 0, 0), (rows - 1, cols - 1, slices - 1), (rows // 3, cols // 2, slices // 2)]:
        point = (affine @ np.array([*index, 1.0]))[:3]
        continuous = np.array(image.TransformPhysicalPointToContinuousIndex(tuple(point)))
        np.testing.assert_allclose(continuous, np.round(continuous), atol=1e-3)
    # Every voxel: the same value at the same place.
    r, c, k = np.meshgrid(np.arange(rows), np.arange(cols), np.arange(slices), indexing="ij")
    points = affine @ np.stack([r.ravel(), c.ravel(), k.ravel(), np.ones(r.size)])
    origin = np.asarray(image.GetOrigin())
    d = np.asarray(image.GetDirection()).reshape(3, 3)
    spacing = np.asarray(image.GetSpacing())
    ijk = np.rint((d.T @ (points[:3] - origin[:, None])) / spacing[:, None]).astype(int)
    np.testing.assert_array_equal(ours[ijk[2], ijk[1], ijk[0]], theirs[r, c, k].ravel())


def _check_enhanced(stack: Stack, path: Path) -> None:
    """Oracle: pydicom's reading of the functional groups (PS3.3 C.7.6.16): each frame's
    ImagePositionPatient and Pixel Value Transformation, and its pixel_array."""
    ds = pydicom.dcmread(path)
    image = load_stack(stack)
    ours = sitk.GetArrayFromImage(image)
    shared = ds.SharedFunctionalGroupsSequence[0]
    frames = ds.PerFrameFunctionalGroupsSequence
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        stored = ds.pixel_array.astype(np.float64)
    for f in (0, len(frames) // 2, len(frames) - 1):
        item = frames[f]
        position = [float(v) for v in item.PlanePositionSequence[0].ImagePositionPatient]
        orientation = (
            (item if "PlaneOrientationSequence" in item else shared)
            .PlaneOrientationSequence[0]
            .ImageOrientationPatient
        )
        pvt = item if "PixelValueTransformationSequence" in item else shared
        transform = pvt.PixelValueTransformationSequence[0]
        k = np.array(image.TransformPhysicalPointToContinuousIndex(position))
        np.testing.assert_allclose(k, np.round(k), atol=1e-3)
        i, j, kk = (int(round(v)) for v in k)
        assert (i, j) == (0, 0)
        assert image.GetDirection()[0::3] == pytest.approx([float(v) for v in orientation[:3]])
        expected = stored[f] * float(transform.RescaleSlope) + float(transform.RescaleIntercept)
        np.testing.assert_allclose(ours[kk], expected, rtol=1e-6, atol=1e-3)


@pytest.mark.parametrize("case", TABLE, ids=lambda c: f"{c.package}:{c.name}")
def test_real_file(case: Case, tmp_path: Path) -> None:
    index, path = _index(case, tmp_path)
    if case.role is None:
        assert index.stacks == ()
        (skipped,) = index.skipped
        assert case.match in skipped.reason, skipped.reason
        return
    assert index.skipped == ()
    assert index.stacks, "nothing read"
    for stack in index.stacks:
        assert stack.role == case.role, (stack.role_reason, case.truth)
        assert case.match in stack.role_reason, stack.role_reason
    if case.oracle == "sitk":
        (stack,) = index.stacks
        _check_against_sitk(stack, path)
    elif case.oracle == "mosaic":
        (stack,) = index.stacks
        _check_mosaic(stack, path)
    elif case.oracle == "enhanced":
        (stack,) = index.stacks
        _check_enhanced(stack, path)


def _is_mr(path: Path) -> bool:
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ds = pydicom.dcmread(path, stop_before_pixels=True, force=True)
    except Exception:
        return False
    sop = str(ds.get("SOPClassUID", "") or "")
    # MR Image, Enhanced MR Image, Legacy Converted Enhanced MR Image (PS3.4 B.5)
    mr_classes = (
        "1.2.840.10008.5.1.4.1.1.4",
        "1.2.840.10008.5.1.4.1.1.4.1",
        "1.2.840.10008.5.1.4.1.1.4.4",
    )
    return ds.get("Modality") == "MR" or sop in mr_classes


def test_the_table_holds_every_real_mr_file_of_the_packages(tmp_path: Path) -> None:
    listed = {(c.package, c.name) for c in TABLE}
    found: set[tuple[str, str]] = set()
    for name in get_testdata_files():  # pydicom's bundled files only (no download)
        path = Path(name)
        if _is_mr(path):
            found.add(("pydicom", path.relative_to(PYDICOM).as_posix()))
    for folder in ("nicom/tests/data", "tests/data"):
        for path in sorted((NIBABEL / folder).iterdir()):
            if path.name.endswith(".dcm.gz"):
                plain = tmp_path / path.name[: -len(".gz")]
                plain.write_bytes(gzip.decompress(path.read_bytes()))
                if _is_mr(plain):
                    found.add(("nibabel", f"{folder}/{path.name}"))
            elif path.is_file() and _is_mr(path):
                found.add(("nibabel", f"{folder}/{path.name}"))
    if DICOM3TOOLS.is_dir():
        for path in DICOM3TOOLS.iterdir():
            if _is_mr(path):
                found.add(("dicom3tools", path.name))
    assert found - listed == set(), "real MR files missing from TABLE"
    assert ("nibabel", "nicom/tests/data/siemens_dwi_1000.dcm.gz") in found


def test_role_accuracy_on_unambiguous_real_files(tmp_path: Path) -> None:
    """Every real file whose header evidence is unambiguous gets its expected role (100 %)."""
    results = []
    for n, case in enumerate(c for c in TABLE if c.role is not None and c.truth != _MR_SMALL):
        if not (ROOTS[case.package] / case.name).exists():
            continue
        index, _ = _index(case, tmp_path / str(n))
        results.append(all(s.role == case.role for s in index.stacks) and bool(index.stacks))
    assert results and all(results)


def test_mosaic_geometry_from_a_header_only_file_matches_nibabel() -> None:
    """csa_slice_norm.dcm (no pixel data, so skipped by the index) has an oblique slice normal
    whose sign the CSA header gives: the unpacked slice positions must match nibabel's affine."""
    path = NIBABEL / "nicom/tests/data/csa_slice_norm.dcm"
    ds, _ = read_dataset(path)
    record = classic_frame(path, ds, "uid", str(ds.SOPClassUID), str(ds.SeriesInstanceUID))
    tiles = mosaic_frames(record, ds)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        wrapper = dicomwrappers.wrapper_from_data(pydicom.dcmread(path))
    assert len(tiles) == wrapper.image_shape[2] == 32
    assert (tiles[0].rows, tiles[0].columns) == wrapper.image_shape[:2]
    for k in (0, 1, 31):
        expected = (wrapper.affine @ np.array([0.0, 0.0, k, 1.0]))[:3]
        np.testing.assert_allclose(tiles[k].position, expected, atol=1e-4)


def test_undivisible_mosaic_is_also_refused_by_nibabel() -> None:
    """The reason we skip nibabel's reduced copies: its own reader cannot unpack them either."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        wrapper = dicomwrappers.wrapper_from_data(
            pydicom.dcmread(NIBABEL / "nicom/tests/data/0.dcm")
        )
        with pytest.raises(ValueError, match="reshape"):
            wrapper.get_data()


def test_decimal_rescale_of_a_real_12_bit_image(tmp_path: Path) -> None:
    """nibabel's decimal_rescale.dcm (12 bits in 16-bit words, RescaleSlope 2, Intercept -4096)
    lacks a SeriesInstanceUID; given one, its values must be pydicom's after the rescale, and
    its ImageType R (real part) keeps it unmeasured."""
    ds = pydicom.dcmread(NIBABEL / "nicom/tests/data/decimal_rescale.dcm")
    # It also lacks the Study and SOP Instance UIDs, which every reference to the image needs
    # (a file without them is skipped with that reason): given here too.
    ds.SeriesInstanceUID = pydicom.uid.generate_uid()
    ds.StudyInstanceUID = pydicom.uid.generate_uid()
    ds.SOPInstanceUID = pydicom.uid.generate_uid()
    (tmp_path / "study").mkdir()
    ds.save_as(tmp_path / "study" / "im.dcm")
    (stack,) = index_study(tmp_path / "study").stacks
    assert stack.role == Role.UNKNOWN and "R" in stack.role_reason
    ours = sitk.GetArrayFromImage(load_stack(stack))[0]
    np.testing.assert_allclose(ours, _real_value(ds), atol=1e-3)
    assert float(np.min(ours)) < 0  # the intercept makes real values negative


if os.environ.get("SIGREPORT_PRINT_ROLE_TABLE"):  # pragma: no cover - documentation helper

    def test_print_role_table(tmp_path: Path) -> None:
        for n, case in enumerate(TABLE):
            if not (ROOTS[case.package] / case.name).exists():
                continue
            index, _ = _index(case, tmp_path / str(n))
            got = [s.role.value for s in index.stacks] or [f"skipped: {index.skipped[0].reason}"]
            print(f"| {case.package} | {case.name} | {case.role} | {', '.join(got)} |")

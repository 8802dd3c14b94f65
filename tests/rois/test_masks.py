"""DICOM masks: RTSTRUCT polygons and SEG segments, written here with pydicom / highdicom.

Oracles: the shoelace formula for a polygon's area; highdicom writing a SEG from a known array
(and its own parser reading it back through our loader); SimpleITK's reading of the source
series geometry.
"""

from __future__ import annotations

import math
from pathlib import Path

import highdicom as hd
import numpy as np
import pydicom
import pytest
import SimpleITK as sitk
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.sequence import Sequence
from pydicom.uid import ExplicitVRLittleEndian, generate_uid

from sigreport.errors import InputError
from sigreport.model import RoiKind, RoiShape, RoiSpec
from sigreport.rois import ContourRegion, GridRegion, build_region, sample_region, volume_ml

MR_IMAGE_STORAGE = "1.2.840.10008.5.1.4.1.1.4"  # PS3.4 B.5
RT_STRUCTURE_SET_STORAGE = "1.2.840.10008.5.1.4.1.1.481.3"


def rotation(ax: float, ay: float, az: float) -> np.ndarray:
    t = sitk.Euler3DTransform()
    t.SetRotation(*(math.radians(v) for v in (ax, ay, az)))
    return np.asarray(t.GetMatrix()).reshape(3, 3)


def shoelace(polygon: np.ndarray) -> float:
    x, y = polygon[:, 0], polygon[:, 1]
    return 0.5 * abs(float(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))))


def save(ds: Dataset, path: Path, sop_class: str) -> Path:
    meta = FileMetaDataset()
    meta.MediaStorageSOPClassUID = sop_class
    meta.MediaStorageSOPInstanceUID = ds.SOPInstanceUID
    meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.file_meta = meta
    ds.save_as(path, enforce_file_format=True)
    return path


# ------------------------------------------------------------------------------------------
# RTSTRUCT

# A concave hexagon (an L-shape with a slanted side), mm in its plane; area by shoelace.
POLYGON = np.array([[-8.0, -6.0], [9.0, -6.0], [9.0, 1.0], [1.0, 2.5], [1.0, 7.0], [-8.0, 7.0]])
HOLE = np.array([[-6.0, 0.0], [-2.0, 0.0], [-2.0, 5.0], [-6.0, 5.0]])
PLANES = [0.0, 2.0, 4.0, 6.0, 8.0]  # offsets along the plane normal, 2 mm apart


def write_rtstruct(
    path: Path,
    frame: np.ndarray,
    origin: np.ndarray,
    *,
    hole: bool = False,
    slab_mm: float | None = None,
    planes: list[float] = PLANES,
) -> Path:
    """Contours of ROI "Lesion" on planes through ``origin`` spanned by frame[:, 0], frame[:, 1]."""
    ds = Dataset()
    ds.SOPClassUID = RT_STRUCTURE_SET_STORAGE
    ds.SOPInstanceUID = generate_uid()
    ds.Modality = "RTSTRUCT"
    ds.StudyInstanceUID = generate_uid()
    ds.SeriesInstanceUID = generate_uid()
    ds.StructureSetLabel = "test"
    frame_uid = "1.2.826.0.1.3680043.8.498.1"
    series = Dataset()
    series.SeriesInstanceUID = "1.2.826.0.1.3680043.8.498.2"
    study = Dataset()
    study.RTReferencedSeriesSequence = Sequence([series])
    ref = Dataset()
    ref.FrameOfReferenceUID = frame_uid
    ref.RTReferencedStudySequence = Sequence([study])
    ds.ReferencedFrameOfReferenceSequence = Sequence([ref])
    rois, contours = [], []
    for number, name in ((1, "Lesion"), (2, "Other")):
        roi = Dataset()
        roi.ROINumber = number
        roi.ROIName = name
        roi.ReferencedFrameOfReferenceUID = frame_uid
        rois.append(roi)
        items = []
        shapes = [POLYGON] + ([HOLE] if hole else [])
        for offset in planes if number == 1 else planes[:1]:
            for shape in shapes if number == 1 else [POLYGON * 0.5]:
                pts = (
                    origin
                    + offset * frame[:, 2]
                    + shape[:, :1] * frame[:, 0]
                    + shape[:, 1:] * frame[:, 1]
                )
                c = Dataset()
                c.ContourGeometricType = "CLOSED_PLANAR"
                c.NumberOfContourPoints = len(pts)
                c.ContourData = [round(float(v), 6) for v in pts.ravel()]
                if slab_mm is not None:
                    c.ContourSlabThickness = slab_mm
                items.append(c)
        point = Dataset()
        point.ContourGeometricType = "POINT"
        point.NumberOfContourPoints = 1
        point.ContourData = [float(v) for v in origin]
        items.append(point)  # a marker: encloses nothing, must be ignored
        rc = Dataset()
        rc.ReferencedROINumber = number
        rc.ContourSequence = Sequence(items)
        contours.append(rc)
    ds.StructureSetROISequence = Sequence(rois)
    ds.ROIContourSequence = Sequence(contours)
    return save(ds, path, RT_STRUCTURE_SET_STORAGE)


def in_plane_grid(frame: np.ndarray, origin: np.ndarray, pixel: float) -> sitk.Image:
    """A grid whose slices lie on the contour planes (slice spacing 2 mm), fine in-plane."""
    n = int(round(24 / pixel))
    image = sitk.Image(n, n, len(PLANES), sitk.sitkFloat32)
    image.SetSpacing((pixel, pixel, 2.0))
    image.SetDirection(frame.ravel().tolist())
    corner = (
        origin - 12.0 * frame[:, 0] - 12.0 * frame[:, 1] + pixel / 2 * (frame[:, 0] + frame[:, 1])
    )
    image.SetOrigin(tuple(corner))
    return image


FRAMES = {"axial": np.eye(3), "oblique": rotation(25.0, -10.0, 35.0)}


def rt_spec(path: Path, segment: str | int | None = "Lesion") -> RoiSpec:
    return RoiSpec("L1", RoiKind.LESION, RoiShape.MASK, mask=path, segment=segment)


@pytest.mark.parametrize("orientation", sorted(FRAMES))
@pytest.mark.parametrize("hole", [False, True])
def test_rtstruct_polygon_rasterizes_to_its_shoelace_area(tmp_path, orientation, hole):
    frame = FRAMES[orientation]
    origin = np.array([10.0, -20.0, 30.0])
    path = write_rtstruct(tmp_path / "rs.dcm", frame, origin, hole=hole)
    region = build_region(rt_spec(path))
    assert isinstance(region, ContourRegion)
    assert region.frame_of_reference_uid == "1.2.826.0.1.3680043.8.498.1"
    assert region.source_series_uid == "1.2.826.0.1.3680043.8.498.2"
    assert region.slab_mm == pytest.approx(2.0)  # the contour-plane spacing
    area = shoelace(POLYGON) - (shoelace(HOLE) if hole else 0.0)
    pixel = 0.25
    image = in_plane_grid(frame, origin, pixel)
    sample = sample_region(region, image, supersample=1)
    perimeter = sum(
        float(np.linalg.norm(np.roll(p, -1, axis=0) - p, axis=1).sum()) for p in [POLYGON, HOLE]
    )
    for k in range(len(PLANES)):
        rasterized = sample.mask[k].sum() * pixel * pixel
        # Centre counting errs by at most half a pixel along the boundary: perimeter * h / 2.
        assert abs(rasterized - area) <= perimeter * pixel / 2
        assert abs(rasterized - area) / area < 0.02
    # Five 2 mm slabs of that area; the in-plane sub-samples refine it further.
    assert volume_ml(sample, image) * 1000 == pytest.approx(area * 2.0 * len(PLANES), rel=0.02)


def test_rtstruct_slabs_tile_the_stack_without_gaps_or_overlap(tmp_path):
    frame, origin = np.eye(3), np.zeros(3)
    region = build_region(rt_spec(write_rtstruct(tmp_path / "rs.dcm", frame, origin)))
    # A point inside the polygon, swept along the normal through the stack of slabs:
    # inside exactly on [-1, 9) mm (half a 2 mm slab beyond the outer planes, half-open).
    z = np.linspace(-3.0, 11.0, 1401)
    points = np.stack([np.zeros_like(z), np.zeros_like(z), z], axis=1)
    inside = region.contains(points)
    assert np.array_equal(inside, (z >= -1.0 - 1e-9) & (z < 9.0 - 1e-9))
    lo, hi = region.bounds_mm()
    assert np.allclose(lo, [-8, -6, -1]) and np.allclose(hi, [9, 7, 9])


def test_rtstruct_contour_slab_thickness_is_used_when_given(tmp_path):
    path = write_rtstruct(tmp_path / "rs.dcm", np.eye(3), np.zeros(3), slab_mm=1.0, planes=[0.0])
    region = build_region(rt_spec(path))
    z = np.array([-0.6, -0.4, 0.4, 0.6])
    points = np.stack([np.zeros(4), np.zeros(4), z], axis=1)
    assert region.contains(points).tolist() == [False, True, True, False]


def test_rtstruct_roi_selection_and_errors(tmp_path):
    path = write_rtstruct(tmp_path / "rs.dcm", np.eye(3), np.zeros(3))
    other = build_region(rt_spec(path, "other"))  # case-insensitive fallback
    assert other.contains(np.array([[0.0, 0.0, 0.0], [8.0, -5.0, 0.0]])).tolist() == [True, False]
    assert isinstance(build_region(rt_spec(path, 2)), ContourRegion)
    with pytest.raises(
        InputError, match=r"rs\.dcm: no ROI named 'Tumour'; has 1 'Lesion', 2 'Other'"
    ):
        build_region(rt_spec(path, "Tumour"))
    with pytest.raises(InputError, match=r"rs\.dcm: the RTSTRUCT has 2 ROIs with contours"):
        build_region(rt_spec(path, None))


def test_non_planar_closed_contour_is_rejected(tmp_path):
    path = write_rtstruct(tmp_path / "rs.dcm", np.eye(3), np.zeros(3))
    ds = pydicom.dcmread(path)
    data = list(ds.ROIContourSequence[0].ContourSequence[0].ContourData)
    data[2] += 1.0  # lift the first point 1 mm off the plane
    ds.ROIContourSequence[0].ContourSequence[0].ContourData = data
    ds.save_as(path)
    with pytest.raises(InputError, match=r"contour 1 of ROI 1 is CLOSED_PLANAR but its points lie"):
        build_region(rt_spec(path))


def test_dicom_that_is_not_a_mask_is_rejected(tmp_path):
    ds = Dataset()
    ds.SOPClassUID = MR_IMAGE_STORAGE
    ds.SOPInstanceUID = generate_uid()
    ds.Modality = "MR"
    path = save(ds, tmp_path / "mr.dcm", MR_IMAGE_STORAGE)
    with pytest.raises(
        InputError, match=r"mr\.dcm: DICOM Modality MR is not SEG, RTSTRUCT, PR or SR"
    ):
        build_region(rt_spec(path))


# ------------------------------------------------------------------------------------------
# SEG

ROWS, COLS, SLICES = 20, 24, 8
PIXEL, SLICE = (1.1, 0.9), 2.5  # row spacing, column spacing (PS3.3 C.7.6.2.1.1), slice step


def write_mr_series(folder: Path, frame: np.ndarray, origin: np.ndarray) -> list[Dataset]:
    """A small classic (single-frame) MR series, PS3.3 A.4 with the attributes SEG needs."""
    folder.mkdir(exist_ok=True)
    study, series, frame_uid = generate_uid(), generate_uid(), generate_uid()
    out = []
    for k in range(SLICES):
        ds = Dataset()
        ds.SOPClassUID = MR_IMAGE_STORAGE
        ds.SOPInstanceUID = generate_uid()
        ds.StudyInstanceUID = study
        ds.SeriesInstanceUID = series
        ds.FrameOfReferenceUID = frame_uid
        ds.Modality = "MR"
        ds.PatientName = "Phantom^Test"
        ds.PatientID = "P1"
        ds.PatientBirthDate = ""
        ds.PatientSex = "O"
        ds.StudyDate = "20260101"
        ds.StudyTime = "120000"
        ds.StudyID = "1"
        ds.AccessionNumber = ""
        ds.ReferringPhysicianName = ""
        ds.SeriesNumber = 3
        ds.InstanceNumber = k + 1
        ds.Manufacturer = "test"
        ds.ImageType = ["ORIGINAL", "PRIMARY", "OTHER"]
        ds.ScanningSequence = "SE"
        ds.SequenceVariant = "NONE"
        ds.ScanOptions = ""
        ds.MRAcquisitionType = "2D"
        ds.EchoTime = 100
        ds.RepetitionTime = 4000
        ds.EchoTrainLength = 1
        ds.ImageOrientationPatient = [float(v) for v in np.concatenate([frame[:, 0], frame[:, 1]])]
        ds.ImagePositionPatient = [float(v) for v in origin + k * SLICE * frame[:, 2]]
        ds.PixelSpacing = list(PIXEL)
        ds.SliceThickness = SLICE
        ds.SpacingBetweenSlices = SLICE
        ds.Rows, ds.Columns = ROWS, COLS
        ds.SamplesPerPixel = 1
        ds.PhotometricInterpretation = "MONOCHROME2"
        ds.BitsAllocated, ds.BitsStored, ds.HighBit = 16, 16, 15
        ds.PixelRepresentation = 0
        ds.PixelData = (np.full((ROWS, COLS), 100 + k, np.uint16)).tobytes()
        save(ds, folder / f"im{k:02d}.dcm", MR_IMAGE_STORAGE)
        out.append(pydicom.dcmread(folder / f"im{k:02d}.dcm"))
    return out


def series_image(folder: Path) -> sitk.Image:
    reader = sitk.ImageSeriesReader()
    reader.SetFileNames(reader.GetGDCMSeriesFileNames(str(folder)))
    return reader.Execute()


def known_mask() -> np.ndarray:
    """(slices, rows, columns): an off-centre blob with a notch, so no axis is symmetric."""
    k, r, c = np.meshgrid(np.arange(SLICES), np.arange(ROWS), np.arange(COLS), indexing="ij")
    blob = ((k - 3.2) / 2.6) ** 2 + ((r - 8.0) / 6.0) ** 2 + ((c - 13.0) / 8.0) ** 2 <= 1
    blob &= ~((r < 6) & (c > 15))
    return blob


def segment_description(number: int, label: str) -> hd.seg.SegmentDescription:
    return hd.seg.SegmentDescription(
        segment_number=number,
        segment_label=label,
        # SCT codes from PS3.16 CID 7150 / 7151 (segmentation property categories and types).
        segmented_property_category=hd.sr.CodedConcept(
            "49755003", "SCT", "Morphologically Altered Structure"
        ),
        segmented_property_type=hd.sr.CodedConcept("108369006", "SCT", "Neoplasm"),
        algorithm_type=hd.seg.SegmentAlgorithmTypeValues.MANUAL,
    )


def write_seg(
    path: Path, sources: list[Dataset], pixels: np.ndarray, kind: str, labels: list[str]
) -> Path:
    seg = hd.seg.Segmentation(
        source_images=sources,
        pixel_array=pixels,
        segmentation_type=getattr(hd.seg.SegmentationTypeValues, kind),
        segment_descriptions=[segment_description(i + 1, lab) for i, lab in enumerate(labels)],
        series_instance_uid=generate_uid(),
        series_number=100,
        sop_instance_uid=generate_uid(),
        instance_number=1,
        manufacturer="sigreport tests",
        manufacturer_model_name="none",
        software_versions="0",
        device_serial_number="0",
        max_fractional_value=255,
    )
    seg.save_as(path)
    return path


@pytest.fixture(scope="module", params=sorted(FRAMES))
def mr_series(request, tmp_path_factory):
    folder = tmp_path_factory.mktemp(f"mr_{request.param}")
    sources = write_mr_series(
        folder / "series", FRAMES[request.param], np.array([-12.0, -9.0, 4.0])
    )
    return folder, sources


def seg_spec(path: Path, segment: str | int | None = None) -> RoiSpec:
    return RoiSpec("L1", RoiKind.LESION, RoiShape.MASK, mask=path, segment=segment)


def test_binary_seg_reads_back_as_the_same_mask(mr_series):
    folder, sources = mr_series
    mask = known_mask()
    path = write_seg(folder / "seg.dcm", sources, mask.astype(np.uint8), "BINARY", ["Lesion 1"])
    region = build_region(seg_spec(path))
    assert isinstance(region, GridRegion)
    assert region.source_series_uid == sources[0].SeriesInstanceUID
    assert region.frame_of_reference_uid == sources[0].FrameOfReferenceUID
    image = series_image(folder / "series")  # SimpleITK's own reading of the source geometry
    sample = sample_region(region, image)
    # Source slices are written in order along the normal, so (slices, rows, cols) = (z, y, x).
    assert np.array_equal(sample.mask, mask)
    assert sample.n_voxels == int(mask.sum())


def test_fractional_seg_reads_back_its_fractions(mr_series):
    folder, sources = mr_series
    rng = np.random.default_rng(5)
    # Fractions on a 1/255 lattice away from 0.5, so the stored 8-bit values are exact.
    steps = rng.choice(np.r_[0:120, 136:256], size=(SLICES, ROWS, COLS))
    fractions = np.where(known_mask(), steps / 255.0, 0.0).astype(np.float32)
    path = write_seg(folder / "fseg.dcm", sources, fractions, "FRACTIONAL", ["Lesion 1"])
    region = build_region(seg_spec(path, "Lesion 1"))
    sample = sample_region(region, series_image(folder / "series"), supersample=1)
    assert np.array_equal(sample.mask, fractions >= 0.5)
    assert np.allclose(sample.weights, fractions, atol=1e-6)


def test_seg_segment_selection(mr_series):
    folder, sources = mr_series
    mask = known_mask()
    pixels = np.zeros(mask.shape, np.uint8)
    pixels[mask] = 1
    second = np.zeros_like(mask)
    second[1:3, 14:18, 2:6] = True
    pixels[second] = 2
    path = write_seg(folder / "seg2.dcm", sources, pixels, "BINARY", ["Lesion 1", "Cyst"])
    image = series_image(folder / "series")
    assert np.array_equal(sample_region(build_region(seg_spec(path, "cyst")), image).mask, second)
    assert np.array_equal(sample_region(build_region(seg_spec(path, 1)), image).mask, mask)
    with pytest.raises(
        InputError, match=r"seg2\.dcm: the SEG has 2 segments \(1 'Lesion 1', 2 'Cyst'\)"
    ):
        build_region(seg_spec(path))
    with pytest.raises(InputError, match=r"seg2\.dcm: no segment number 3; has 1 'Lesion 1'"):
        build_region(seg_spec(path, 3))
    with pytest.raises(InputError, match=r"seg2\.dcm: no segment labelled 'Edema'"):
        build_region(seg_spec(path, "Edema"))


def test_broken_seg_is_an_input_error(tmp_path):
    path = tmp_path / "seg.dcm"
    ds = Dataset()
    ds.SOPClassUID = "1.2.840.10008.5.1.4.1.1.66.4"  # Segmentation Storage, PS3.4 B.5
    ds.SOPInstanceUID = generate_uid()
    ds.Modality = "SEG"
    save(ds, path, ds.SOPClassUID)
    with pytest.raises(InputError, match=r"seg\.dcm: not a readable DICOM SEG"):
        build_region(seg_spec(path))

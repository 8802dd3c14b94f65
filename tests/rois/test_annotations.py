"""Outlines from presentation states and TID 1500 SRs (built by highdicom as PS3.3 C.10.5 and
PS3.16 TID 1500 define them), read back and rasterized on the series grid, against the same
shapes rasterized here straight from the pixel-coordinate definition (PS3.3 C.10.5.1.2: the
centre of pixel (row r, column c) is at column\\row (c + 0.5, r + 0.5))."""

from __future__ import annotations

import highdicom as hd
import numpy as np
import pydicom
import pytest

from sigreport.errors import InputError
from sigreport.ingest import load_stack
from sigreport.model import Role
from sigreport.rois.annotations import load_annotation_region
from sigreport.rois.propagate import sample_region
from sigreport.rois.regions import SphereRegion

from builders.annotations import Graphic, SrRegion, write_gsps, write_sr


@pytest.fixture(scope="module")
def t2(neuro):
    stack = neuro.stack(Role.T2)
    return stack, load_stack(stack)


@pytest.fixture(scope="module")
def anchor(neuro):
    stack = neuro.stack(Role.T1POSTFS)
    return stack, load_stack(stack)


def _datasets(stack, ks):
    return [pydicom.dcmread(stack.instances[k].path, stop_before_pixels=True) for k in ks]


def _truth(image, k: int, inside) -> np.ndarray:
    """A (z, y, x) mask set on slice k where inside(x, y) holds at the pixel centres."""
    cols, rows, slices = image.GetSize()
    yy, xx = np.mgrid[0:rows, 0:cols]
    mask = np.zeros((slices, rows, cols), dtype=bool)
    mask[k] = inside(xx + 0.5, yy + 0.5)
    return mask


def _mask(region, image) -> np.ndarray:
    return sample_region(region, image).mask


def _circle(cx, cy, r):
    return lambda x, y: (x - cx) ** 2 + (y - cy) ** 2 <= r * r


def test_a_gsps_circle_on_an_oblique_series_is_its_pixels_on_its_slice(t2, neuro, tmp_path):
    stack, image = t2
    k = len(stack.instances) // 2
    path = write_gsps(
        tmp_path / "pr.dcm",
        [
            Graphic(
                "CIRCLE", np.array([[70.3, 80.6], [76.5, 80.6]]), _datasets(stack, [k]), text="L2"
            )
        ],
    )
    region, notes = load_annotation_region(path, neuro.index, roi_id="L2")
    assert notes == [] and region.source_series_uid == stack.series_instance_uid
    got, want = _mask(region, image), _truth(image, k, _circle(70.3, 80.6, 6.2))
    assert want.sum() > 100 and np.array_equal(got, want)


def test_an_ellipse_and_a_closed_polyline(anchor, neuro, tmp_path):
    stack, image = anchor
    k = 40
    ds = _datasets(stack, [k])
    # Ellipse: major axis (60, 70)-(80, 82), minor axis through the centre perpendicular to it.
    p1, p2 = np.array([60.0, 70.0]), np.array([80.0, 82.0])
    c = (p1 + p2) / 2
    major = (p2 - p1) / 2
    unit = np.array([-major[1], major[0]]) / np.linalg.norm(major)
    p3, p4 = c - 5.0 * unit, c + 5.0 * unit
    triangle = np.array([[30.2, 30.7], [55.4, 34.1], [40.3, 58.9], [30.2, 30.7]])
    path = write_gsps(
        tmp_path / "pr.dcm",
        [
            Graphic("ELLIPSE", np.stack([p1, p2, p3, p4]), ds, text="ellipse"),
            Graphic("POLYLINE", triangle, ds, text="triangle"),
        ],
    )

    def ellipse(x, y):
        d = np.stack([x - c[0], y - c[1]], axis=-1)
        a = d @ (major / np.linalg.norm(major)) / np.linalg.norm(major)
        b = d @ unit / 5.0
        return a * a + b * b <= 1.0

    def in_triangle(x, y):
        (ax, ay), (bx, by), (cx, cy) = triangle[:3]

        def side(px, py, qx, qy):
            return (qx - px) * (y - py) - (qy - py) * (x - px)

        s1, s2, s3 = side(ax, ay, bx, by), side(bx, by, cx, cy), side(cx, cy, ax, ay)
        return ((s1 >= 0) & (s2 >= 0) & (s3 >= 0)) | ((s1 <= 0) & (s2 <= 0) & (s3 <= 0))

    for pick, inside in (("ellipse", ellipse), ("triangle", in_triangle)):
        region, _ = load_annotation_region(path, neuro.index, roi_id="X", pick=pick)
        got, want = _mask(region, image), _truth(image, k, inside)
        # A 128-gon stands for the ellipse: at most a voxel centre grazing the edge differs.
        assert want.sum() > 100 and np.count_nonzero(got ^ want) <= 2, pick


def test_display_units_are_fractions_of_the_displayed_area(anchor, neuro, tmp_path):
    stack, image = anchor
    cols, rows = stack.size[0], stack.size[1]
    ds = _datasets(stack, [30])
    square = np.array([[20.0, 20.0], [50.0, 20.0], [50.0, 40.0], [20.0, 40.0], [20.0, 20.0]])
    pixel = write_gsps(tmp_path / "px.dcm", [Graphic("POLYLINE", square, ds)])
    display = write_gsps(
        tmp_path / "dp.dcm",
        [Graphic("POLYLINE", square / np.array([cols, rows]), ds, units="DISPLAY")],
    )
    a, _ = load_annotation_region(pixel, neuro.index, roi_id="A")
    b, _ = load_annotation_region(display, neuro.index, roi_id="B")
    ma, mb = _mask(a, image), _mask(b, image)
    assert ma.sum() == 30 * 20 and np.array_equal(ma, mb)


def test_one_graphic_on_three_images_is_three_slabs(anchor, neuro, tmp_path):
    stack, image = anchor
    path = write_gsps(
        tmp_path / "pr.dcm",
        [Graphic("CIRCLE", np.array([[70.3, 80.6], [74.5, 80.6]]), _datasets(stack, [20, 21, 22]))],
    )
    region, _ = load_annotation_region(path, neuro.index, roi_id="L1")
    got = _mask(region, image)
    want = _truth(image, 20, _circle(70.3, 80.6, 4.2))
    want[21], want[22] = want[20], want[20]
    assert np.array_equal(got, want)


def test_several_annotations_are_listed_and_picked_by_text_layer_or_number(anchor, neuro, tmp_path):
    stack, _ = anchor
    ds = _datasets(stack, [40])
    path = write_gsps(
        tmp_path / "pr.dcm",
        [
            Graphic("CIRCLE", np.array([[70.0, 80.0], [75.0, 80.0]]), ds, text="L1 cyst"),
            Graphic(
                "CIRCLE", np.array([[30.0, 30.0], [33.0, 30.0]]), ds, layer="NOTES", text="other"
            ),
        ],
    )
    with pytest.raises(
        InputError,
        match=r"holds 2 outlines; pick one .*1: CIRCLE on series 8 image 41, layer 'LESIONS', text 'L1 cyst'; 2: CIRCLE",
    ):
        load_annotation_region(path, neuro.index, roi_id="L1")
    first, _ = load_annotation_region(path, neuro.index, roi_id="L1", pick="l1 CYST")
    by_layer, _ = load_annotation_region(path, neuro.index, roi_id="L1", pick="NOTES")
    by_number, _ = load_annotation_region(path, neuro.index, roi_id="L1", pick=2)
    assert first.bounds_mm()[0][0] > by_layer.bounds_mm()[0][0]
    assert np.allclose(by_layer.bounds_mm()[0], by_number.bounds_mm()[0])
    with pytest.raises(InputError, match="no outline has the text or layer 'L9'"):
        load_annotation_region(path, neuro.index, roi_id="L1", pick="L9")


def test_an_annotation_on_an_image_outside_the_study_is_named(anchor, neuro, tmp_path):
    stack, _ = anchor
    ds = _datasets(stack, [40])[0]
    ds.SOPInstanceUID = "1.2.3.4.5"
    path = write_gsps(
        tmp_path / "pr.dcm", [Graphic("CIRCLE", np.array([[7.0, 8.0], [9.0, 8.0]]), [ds])]
    )
    with pytest.raises(InputError, match=r"the referenced image 1.2.3.4.5 is not in the study"):
        load_annotation_region(path, neuro.index, roi_id="L1")


def test_sr_image_regions_2d_and_3d(anchor, neuro, tmp_path):
    stack, image = anchor
    k = 40
    ds = _datasets(stack, [k])
    # A square in patient coordinates on slice k's plane (axial anchor: z of that slice).
    z = float(stack.instances[k].position_mm[2])
    square3d = np.array(
        [[-10.2, -5.3, z], [3.7, -5.3, z], [3.7, 6.1, z], [-10.2, 6.1, z], [-10.2, -5.3, z]]
    )
    sphere = np.array(
        [
            [-32.0, -33, 14],
            [-22.0, -33, 14],
            [-27, -38.0, 14],
            [-27, -28.0, 14],
            [-27, -33, 9.0],
            [-27, -33, 19.0],
        ]
    )
    frame = ds[0].FrameOfReferenceUID
    path = write_sr(
        tmp_path / "sr.dcm",
        ds,
        [
            SrRegion("cyst", "CIRCLE", np.array([[70.3, 80.6], [76.5, 80.6]]), image=ds[0]),
            SrRegion("square", "POLYGON", square3d, frame_of_reference_uid=frame),
            SrRegion("ball", "ELLIPSOID", sphere, frame_of_reference_uid=frame),
        ],
    )
    # highdicom's own parser sees the three tracking identifiers we pick by.
    report = hd.sr.srread(path)
    groups = report.content.get_planar_roi_measurement_groups() + list(
        report.content.get_volumetric_roi_measurement_groups()
    )
    assert sorted(g.tracking_identifier for g in groups) == ["ball", "cyst", "square"]

    circle, _ = load_annotation_region(path, neuro.index, roi_id="L1", pick="cyst")
    assert np.array_equal(_mask(circle, image), _truth(image, k, _circle(70.3, 80.6, 6.2)))

    square, _ = load_annotation_region(path, neuro.index, roi_id="L2", pick="square")
    got = _mask(square, image)
    centres = np.argwhere(got)
    assert set(centres[:, 0]) == {k}  # the anchor's 1 mm slice: its own slab only
    # Pixel centres of the anchor sit on whole millimetres + 0.5 here: x -9.5..3.5, y -4.5..5.5
    assert got.sum() == 14 * 11

    ball, _ = load_annotation_region(path, neuro.index, roi_id="L3", pick="ball")
    assert np.array_equal(
        _mask(ball, image), _mask(SphereRegion.of("s", (-27.0, -33.0, 14.0), 5.0), image)
    )


def test_an_outline_file_without_the_study_is_an_input_error(anchor, tmp_path):
    from sigreport.rois.masks import load_mask_region

    stack, _ = anchor
    path = write_gsps(
        tmp_path / "pr.dcm",
        [Graphic("CIRCLE", np.array([[7.0, 8.0], [9.0, 8.0]]), _datasets(stack, [3]))],
    )
    with pytest.raises(
        InputError, match="presentation state or SR outline needs the study's images"
    ):
        load_mask_region(path, roi_id="L1")


def test_a_2d_outline_is_a_slab_of_its_images_slice_thickness(neuro, anchor, tmp_path):
    """A circle on a 2D axial T1 image (thick slices) sampled on the 1 mm axial anchor: the
    voxel centres within half the T1's SliceThickness of its plane, half-open."""
    t1 = neuro.stack(Role.T1)
    k = len(t1.instances) // 2
    thickness = float(pydicom.dcmread(t1.instances[k].path, stop_before_pixels=True).SliceThickness)
    assert thickness > 2.0
    path = write_gsps(
        tmp_path / "pr.dcm",
        [Graphic("CIRCLE", np.array([[60.3, 70.6], [66.5, 70.6]]), _datasets(t1, [k]))],
    )
    region, _ = load_annotation_region(path, neuro.index, roi_id="L1")
    _, image = anchor
    got = _mask(region, image)
    z0 = float(t1.instances[k].position_mm[2])
    zs = np.array([image.TransformIndexToPhysicalPoint((0, 0, s))[2] for s in range(got.shape[0])])
    want = (zs - z0 >= -thickness / 2) & (zs - z0 < thickness / 2)
    assert np.array_equal(got.any(axis=(1, 2)), want)
    assert want.sum() == round(thickness)

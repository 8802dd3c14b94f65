"""Key images and the ratio plot, checked against numpy, scipy.ndimage (test-only oracle),
Pillow's PNG decoder and Python's XML parser."""

from __future__ import annotations

import io
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from PIL import Image
from scipy import ndimage

from sigreport.model import KeySlice, Role
from sigreport.report.images import (
    LESION_COLOUR,
    REFERENCE_COLOUR,
    crop_box,
    outline,
    png_bytes,
    ratio_plot_svg,
    render_key_image,
    safe_name,
    window,
)

SVG = "{http://www.w3.org/2000/svg}"


@pytest.mark.parametrize(
    ("raw", "safe"),
    [("L1", "L1"), ("../../etc/passwd", "_.._etc_passwd"), ("a b<c>", "a_b_c_"), ("", "_"),
     ("..", "_"), ("T1POST", "T1POST"), ("é", "_")],
)  # fmt: skip
def test_safe_name_keeps_only_portable_characters(raw, safe):
    assert safe_name(raw) == safe


def test_window_maps_the_percentiles_to_black_and_white():
    image = np.arange(1000, dtype=np.float32).reshape(25, 40)
    lo, hi = np.percentile(image, [1.0, 99.5])  # numpy's linear percentile: the oracle
    out = window(image)
    assert out.dtype == np.uint8
    assert out[image <= lo].max() == 0 and out[image >= hi].min() == 255
    middle = (image > lo) & (image < hi)
    expected = np.rint((image[middle] - lo) / (hi - lo) * 255)
    assert np.array_equal(out[middle], expected.astype(np.uint8))


def test_window_of_a_flat_slice_does_not_divide_by_zero():
    assert np.all(window(np.full((4, 4), 7.0)) == 128)
    assert np.all(window(np.full((4, 4), np.nan)) == 0)


@pytest.mark.parametrize("width", [1, 2])
def test_outline_matches_scipy_erosion(width):
    rng = np.random.default_rng(3)
    mask = ndimage.binary_opening(rng.random((40, 50)) > 0.4)
    # scipy: erosion with the 4-connected cross, border counted as outside.
    eroded = ndimage.binary_erosion(mask, structure=ndimage.generate_binary_structure(2, 1),
                                    iterations=width, border_value=0)  # fmt: skip
    assert np.array_equal(outline(mask, width), mask & ~eroded)


def test_crop_box_is_square_in_millimetres_and_holds_the_lesion():
    mask = np.zeros((200, 100), bool)
    mask[90:100, 40:50] = True
    r0, r1, c0, c1 = crop_box(mask, (0.5, 1.0), mask.shape, context=1.5, margin_mm=10.0)
    assert r0 <= 90 and r1 >= 100 and c0 <= 40 and c1 >= 50
    # extent 10 mm -> half side 10 * (0.5 + 1.5) + 10 = 30 mm: 60 rows of 0.5 mm, 30 columns.
    assert (r1 - r0) == pytest.approx(120, abs=2) and (c1 - c0) == pytest.approx(60, abs=2)


def _key(image, lesion, reference=None, spacing=(1.0, 1.0)):
    return KeySlice("L1", Role.T2, image, lesion, reference, spacing, 0, None)


def test_key_image_is_upscaled_cropped_and_outlined():
    image = np.zeros((64, 64), np.float32)
    lesion = np.zeros((64, 64), bool)
    lesion[29:35, 29:35] = True  # 36 pixels: above the top 0.5 % of 4096, so it windows white
    reference = np.zeros((64, 64), bool)
    reference[29:35, 42:46] = True
    image[lesion] = 100.0
    rgb = render_key_image(_key(image, lesion, reference))
    assert rgb.dtype == np.uint8 and rgb.ndim == 3 and rgb.shape[2] == 3
    # A 6 mm lesion -> a 44 mm crop shown at about 200 px: upscaled, square pixels.
    assert rgb.shape[0] == rgb.shape[1] and 150 <= rgb.shape[0] <= 220
    yellow = np.all(rgb == LESION_COLOUR, axis=2)
    cyan = np.all(rgb == REFERENCE_COLOUR, axis=2)
    assert yellow.any() and cyan.any()
    # The lesion outline encloses the bright interior and lies around the crop's centre.
    rows, cols = np.nonzero(yellow)
    assert abs(rows.mean() - rgb.shape[0] / 2) < 0.1 * rgb.shape[0]
    assert abs(cols.mean() - rgb.shape[1] / 2) < 0.1 * rgb.shape[1]
    inside = rgb[int(rows.mean()), int(cols.mean())]
    assert tuple(inside) == (255, 255, 255)


def test_anisotropic_pixels_are_shown_square():
    image = np.random.default_rng(0).random((40, 80)).astype(np.float32)
    lesion = np.zeros((40, 80), bool)
    lesion[18:22, 36:44] = True  # 4 rows of 2 mm and 8 columns of 1 mm: 8 mm x 8 mm
    rgb = render_key_image(_key(image, lesion, spacing=(2.0, 1.0)))
    yellow = np.all(rgb == LESION_COLOUR, axis=2)
    rows, cols = np.nonzero(yellow)
    height, width = np.ptp(rows) + 1, np.ptp(cols) + 1
    assert height == pytest.approx(width, rel=0.1)


def test_mask_shape_mismatch_is_named():
    with pytest.raises(ValueError, match='"lesion_mask" of L1/T2 has shape'):
        render_key_image(_key(np.zeros((8, 8)), np.zeros((4, 4), bool)))


def test_png_round_trips_through_pillow():
    rgb = np.random.default_rng(1).integers(0, 256, (12, 9, 3), dtype=np.uint8)
    decoded = np.asarray(Image.open(io.BytesIO(png_bytes(rgb))).convert("RGB"))
    assert np.array_equal(decoded, rgb)


def test_key_image_files_are_written_with_safe_names(report_dir):
    names = sorted(p.name for p in (report_dir / "images").iterdir())
    assert len(names) == 15 and "L1_T2.png" in names
    for name in names:
        assert safe_name(name) == name
        assert Image.open(report_dir / "images" / name).format == "PNG"


def test_ratio_plot_is_valid_svg_with_the_iso_band_shaded():
    svg = ratio_plot_svg(
        [("T2", 2.0), ("FLAIR", 0.25), ("T1", None)], iso_band=(0.9, 1.1), title="<b>x</b>"
    )
    root = ET.fromstring(svg)  # well-formed XML, labels escaped
    assert root.tag == f"{SVG}svg"
    band = [r for r in root.iter(f"{SVG}rect") if r.get("class") == "iso-band"]
    assert len(band) == 1
    points = [c for c in root.iter(f"{SVG}circle") if c.get("class") == "ratio-point"]
    assert len(points) == 2  # the unmeasured series has no point
    # Linear axis: the band spans (1.1 - 0.9) / y_max of the plot height; T2 (2.0) sits above it.
    band_top, band_height = float(band[0].get("y")), float(band[0].get("height"))
    t2_y, flair_y = (float(c.get("cy")) for c in points)
    assert t2_y < band_top < band_top + band_height < flair_y
    assert "<b>" not in svg and "&lt;b&gt;x&lt;/b&gt;" in svg
    assert "script" not in svg and "href" not in svg

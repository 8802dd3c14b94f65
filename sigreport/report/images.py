"""Key images (windowed, cropped, outlined PNGs) and the inline SVG ratio plot."""

from __future__ import annotations

import io
import math
import re
from collections.abc import Mapping, Sequence
from html import escape
from typing import Any

import numpy as np
from PIL import Image

from sigreport.model import KeySlice

LESION_COLOUR = (255, 214, 0)  # yellow: the lesion ROI
REFERENCE_COLOUR = (0, 200, 255)  # cyan: the reference ROI
CONTROL_COLOUR = (255, 80, 200)  # magenta: a control ROI
#: The colour of a key slice's own ROI outline, by ``KeySlice.kind``.
OUTLINE_COLOURS = {
    "lesion": LESION_COLOUR,
    "reference": REFERENCE_COLOUR,
    "control": CONTROL_COLOUR,
}

_UNSAFE = re.compile(r"[^A-Za-z0-9._-]")


def safe_name(text: str) -> str:
    """A file-name piece made only of ``[A-Za-z0-9._-]`` (anything else becomes ``_``), never
    empty and never starting with a dot (no hidden files, no ``..``)."""
    cleaned = _UNSAFE.sub("_", str(text)).lstrip(".")
    return cleaned or "_"


def window(image: np.ndarray, *, low_pct: float = 1.0, high_pct: float = 99.5) -> np.ndarray:
    """Map ``image`` to 0-255 between its ``low_pct`` and ``high_pct`` percentiles (numpy's
    linear-interpolated percentiles of the finite values), clipping outside."""
    values = np.asarray(image, dtype=np.float64)
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return np.zeros(values.shape, dtype=np.uint8)
    lo, hi = np.percentile(finite, [low_pct, high_pct])
    if not hi > lo:
        # A flat slice: show it mid-grey rather than dividing by zero.
        return np.full(values.shape, 128 if finite.max() > 0 else 0, dtype=np.uint8)
    scaled = (np.nan_to_num(values, nan=lo) - lo) / (hi - lo)
    return np.clip(np.rint(scaled * 255.0), 0, 255).astype(np.uint8)


def crop_box(
    mask: np.ndarray,
    spacing_mm: tuple[float, float],
    shape: tuple[int, int],
    *,
    context: float = 1.5,
    margin_mm: float = 10.0,
) -> tuple[int, int, int, int]:
    """A square-in-millimetres box (row0, row1, col0, col1) around the mask: the mask's largest
    extent times ``1 + 2 * context``, plus ``margin_mm`` each side, clipped to the image. The
    whole image when the mask is empty."""
    rows, cols = shape
    where = np.argwhere(mask)
    if where.size == 0:
        return 0, rows, 0, cols
    (r0, c0), (r1, c1) = where.min(axis=0), where.max(axis=0) + 1
    dr, dc = spacing_mm
    extent_mm = max((r1 - r0) * dr, (c1 - c0) * dc)
    half_mm = extent_mm * (0.5 + context) + margin_mm
    centre_r, centre_c = (r0 + r1) / 2.0, (c0 + c1) / 2.0
    half_r, half_c = half_mm / dr, half_mm / dc
    box = (
        max(0, int(math.floor(centre_r - half_r))),
        min(rows, int(math.ceil(centre_r + half_r))),
        max(0, int(math.floor(centre_c - half_c))),
        min(cols, int(math.ceil(centre_c + half_c))),
    )
    return box


def _resample_indices(n_in: int, spacing: float, out_pixel_mm: float) -> np.ndarray:
    """Nearest-neighbour source indices for an output grid of ``out_pixel_mm`` pixels."""
    n_out = max(1, int(round(n_in * spacing / out_pixel_mm)))
    centres = (np.arange(n_out) + 0.5) * out_pixel_mm / spacing
    return np.clip(np.floor(centres).astype(int), 0, n_in - 1)


def outline(mask: np.ndarray, width: int = 1) -> np.ndarray:
    """The edge band of a boolean mask: pixels inside it within ``width`` 4-neighbour steps
    of a pixel outside (the border of the array counts as outside)."""
    m = np.asarray(mask, dtype=bool)
    interior = m
    for _ in range(max(1, int(width))):
        padded = np.pad(interior, 1, constant_values=False)
        interior = (
            padded[:-2, 1:-1] & padded[2:, 1:-1] & padded[1:-1, :-2] & padded[1:-1, 2:] & interior
        )
    return m & ~interior


def render_key_image(
    key: KeySlice,
    *,
    target_px: int = 200,
    max_upscale: float = 12.0,
    context: float = 1.5,
    margin_mm: float = 10.0,
) -> np.ndarray:
    """An RGB uint8 picture of a key slice: windowed to the slice's 1st-99.5th percentile,
    cropped around the lesion (:func:`crop_box`), resampled nearest-neighbour to square pixels
    with about ``target_px`` pixels on the longer side (never more than ``max_upscale`` output
    pixels per input pixel; large crops are shown at their own resolution), the lesion outline
    in yellow and the reference outline in cyan (a reference or control key slice: its own
    outline in cyan or magenta, :data:`OUTLINE_COLOURS`).

    Raises
    ------
    ValueError
        When the image is not 2D or a mask's shape differs from the image's.
    """
    image = np.asarray(key.image)
    if image.ndim != 2:
        raise ValueError(
            f'KeySlice "image" of {key.roi_id}/{key.role} must be 2D, got {image.shape}'
        )
    lesion = np.asarray(key.lesion_mask, dtype=bool)
    reference = None if key.reference_mask is None else np.asarray(key.reference_mask, dtype=bool)
    for name, mask in (("lesion_mask", lesion), ("reference_mask", reference)):
        if mask is not None and mask.shape != image.shape:
            raise ValueError(
                f'KeySlice "{name}" of {key.roi_id}/{key.role} has shape {mask.shape}, '
                f"the image {image.shape}"
            )
    dr, dc = (float(v) if v and v > 0 else 1.0 for v in key.pixel_spacing_mm)
    grey = window(image)
    r0, r1, c0, c1 = crop_box(lesion, (dr, dc), image.shape, context=context, margin_mm=margin_mm)
    height_mm, width_mm = (r1 - r0) * dr, (c1 - c0) * dc
    finest = min(dr, dc)
    out_pixel_mm = max(max(height_mm, width_mm) / target_px, finest / max_upscale)
    out_pixel_mm = min(out_pixel_mm, finest)  # never coarser than the finest stored pixel
    ri = r0 + _resample_indices(r1 - r0, dr, out_pixel_mm)
    ci = c0 + _resample_indices(c1 - c0, dc, out_pixel_mm)
    grid = np.ix_(ri, ci)
    rgb = np.repeat(grey[grid][..., None], 3, axis=2)
    # Two output pixels wide once upscaled, so that the line survives on-screen downscaling.
    width = 2 if finest / out_pixel_mm >= 2 else 1
    if reference is not None:
        rgb[outline(reference[grid], width)] = REFERENCE_COLOUR
    rgb[outline(lesion[grid], width)] = OUTLINE_COLOURS.get(key.kind, LESION_COLOUR)
    return rgb


#: zlib's own default level. Pillow's ``optimize`` (level 9 and a search) took four times as
#: long on the demo's 45 key images for files 3 % smaller.
PNG_COMPRESS_LEVEL = 6


def png_bytes(rgb: np.ndarray) -> bytes:
    """PNG bytes of an RGB uint8 array (Pillow, lossless at any level)."""
    buffer = io.BytesIO()
    Image.fromarray(np.ascontiguousarray(rgb, dtype=np.uint8), mode="RGB").save(
        buffer, format="PNG", compress_level=PNG_COMPRESS_LEVEL
    )
    return buffer.getvalue()


def ratio_plot_svg(
    points: Sequence[tuple[str, float | None]],
    *,
    iso_band: tuple[float, float],
    title: str = "",
    width: int = 460,
    height: int = 230,
) -> str:
    """An inline SVG (no script, no external reference) of a lesion's ratio to its reference
    tissue by series: the iso band shaded, ratio 1 dashed, one dot per measured series.

    ``iso_band`` is (low, high) of the isointense grade, the grade thresholds themselves
    (:attr:`sigreport.lexicon_tables.Lexicon.iso_band`).

    ``points`` are (label, ratio) in display order; a ``None`` ratio leaves its slot empty with
    a "n/m" mark. Every label is XML-escaped.
    """
    left, right, top, bottom = 44, 12, 26, 40
    plot_w, plot_h = width - left - right, height - top - bottom
    finite = [r for _, r in points if r is not None and math.isfinite(r)]
    y_max = max([2.0, iso_band[1] * 1.2] + [r * 1.1 for r in finite])
    y_max = _nice_ceiling(y_max)

    def y(value: float) -> float:
        return top + plot_h * (1.0 - min(max(value, 0.0), y_max) / y_max)

    n = max(1, len(points))
    step = plot_w / n

    def x(i: int) -> float:
        return left + step * (i + 0.5)

    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" role="img" width="{width}" height="{height}" '
        f'viewBox="0 0 {width} {height}" class="ratio-plot">',
        f"<title>{escape(title)}</title>",
        f'<rect x="{left}" y="{top}" width="{plot_w}" height="{plot_h}" fill="#ffffff" '
        'stroke="#999999" stroke-width="1"/>',
        f'<rect x="{left}" y="{y(iso_band[1]):.1f}" width="{plot_w}" '
        f'height="{y(iso_band[0]) - y(iso_band[1]):.1f}" fill="#d9d9d9" class="iso-band"/>',
        f'<line x1="{left}" x2="{left + plot_w}" y1="{y(1.0):.1f}" y2="{y(1.0):.1f}" '
        'stroke="#666666" stroke-dasharray="4 3" stroke-width="1"/>',
        f'<text x="{left + plot_w - 4}" y="{y(iso_band[1]) - 3:.1f}" font-size="10" '
        f'text-anchor="end" fill="#555555">iso {iso_band[0]:g}-{iso_band[1]:g}</text>',
    ]
    for tick in _ticks(y_max):
        parts.append(
            f'<line x1="{left - 4}" x2="{left}" y1="{y(tick):.1f}" y2="{y(tick):.1f}" stroke="#333333"/>'
            f'<text x="{left - 6}" y="{y(tick) + 3.5:.1f}" font-size="10" text-anchor="end" '
            f'fill="#333333">{tick:g}</text>'
        )
    previous: tuple[float, float] | None = None
    for i, (label, ratio) in enumerate(points):
        parts.append(
            f'<text x="{x(i):.1f}" y="{top + plot_h + 16}" font-size="11" text-anchor="middle" '
            f'fill="#222222">{escape(label)}</text>'
        )
        if ratio is None or not math.isfinite(ratio):
            parts.append(
                f'<text x="{x(i):.1f}" y="{top + plot_h - 6}" font-size="10" '
                f'text-anchor="middle" fill="#999999">n/m</text>'
            )
            previous = None
            continue
        cx, cy = x(i), y(ratio)
        if previous is not None:
            parts.append(
                f'<line x1="{previous[0]:.1f}" y1="{previous[1]:.1f}" x2="{cx:.1f}" y2="{cy:.1f}" '
                'stroke="#1f5fa8" stroke-width="1.5"/>'
            )
        parts.append(
            f'<circle cx="{cx:.1f}" cy="{cy:.1f}" r="4.5" fill="#1f5fa8" class="ratio-point">'
            f"<title>{escape(label)}: {ratio:.2f}</title></circle>"
            f'<text x="{cx:.1f}" y="{cy - 8:.1f}" font-size="10" text-anchor="middle" '
            f'fill="#1f5fa8">{ratio:.2f}</text>'
        )
        previous = (cx, cy)
    parts.append(
        f'<text x="{left}" y="{top - 9}" font-size="12" fill="#222222">{escape(title)}</text>'
        f'<text x="12" y="{top + plot_h / 2:.1f}" font-size="10" fill="#333333" '
        f'transform="rotate(-90 12 {top + plot_h / 2:.1f})" text-anchor="middle">ratio</text>'
    )
    parts.append("</svg>")
    return "".join(parts)


def time_intensity_svg(
    points: Sequence[tuple[float, float]],
    *,
    title: str = "",
    curve: str | None = None,
    width: int = 460,
    height: int = 230,
) -> str:
    """An inline SVG (no script, no external reference) of a lesion's dynamic curve: percent
    enhancement against the pre-contrast phase (y) by seconds after the first post-contrast
    phase (x), one dot per phase joined in time order, 0 % dashed.

    ``points`` are (delay_s, percent) of the phases with both known; ``curve`` (the curve type)
    is printed beside the title. Every label is XML-escaped.
    """
    left, right, top, bottom = 44, 16, 26, 40
    plot_w, plot_h = width - left - right, height - top - bottom
    pts = sorted((float(d), float(p)) for d, p in points if math.isfinite(d) and math.isfinite(p))
    x_max = _nice_ceiling(max([60.0] + [d for d, _ in pts]))
    y_hi = _nice_ceiling(max([20.0] + [p * 1.1 for _, p in pts]))
    y_lo = -_nice_ceiling(max([0.0] + [-p * 1.1 for _, p in pts])) if pts else 0.0
    if y_lo == 0.0 and any(p < 0 for _, p in pts):
        y_lo = -10.0

    def x(value: float) -> float:
        return left + plot_w * min(max(value, 0.0), x_max) / x_max

    def y(value: float) -> float:
        return top + plot_h * (1.0 - (min(max(value, y_lo), y_hi) - y_lo) / (y_hi - y_lo))

    label = title + (f" ({curve})" if curve else "")
    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" role="img" width="{width}" height="{height}" '
        f'viewBox="0 0 {width} {height}" class="curve-plot">',
        f"<title>{escape(label)}</title>",
        f'<rect x="{left}" y="{top}" width="{plot_w}" height="{plot_h}" fill="#ffffff" '
        'stroke="#999999" stroke-width="1"/>',
        f'<line x1="{left}" x2="{left + plot_w}" y1="{y(0.0):.1f}" y2="{y(0.0):.1f}" '
        'stroke="#666666" stroke-dasharray="4 3" stroke-width="1"/>',
    ]
    for tick in _ticks(y_hi):
        parts.append(
            f'<line x1="{left - 4}" x2="{left}" y1="{y(tick):.1f}" y2="{y(tick):.1f}" stroke="#333333"/>'
            f'<text x="{left - 6}" y="{y(tick) + 3.5:.1f}" font-size="10" text-anchor="end" '
            f'fill="#333333">{tick:g}</text>'
        )
    for tick in _ticks(x_max):
        parts.append(
            f'<text x="{x(tick):.1f}" y="{top + plot_h + 14}" font-size="10" '
            f'text-anchor="middle" fill="#333333">{tick:g}</text>'
        )
    previous: tuple[float, float] | None = None
    for delay, percent in pts:
        cx, cy = x(delay), y(percent)
        if previous is not None:
            parts.append(
                f'<line x1="{previous[0]:.1f}" y1="{previous[1]:.1f}" x2="{cx:.1f}" '
                f'y2="{cy:.1f}" stroke="#a8461f" stroke-width="1.5"/>'
            )
        parts.append(
            f'<circle cx="{cx:.1f}" cy="{cy:.1f}" r="4" fill="#a8461f" class="phase-point">'
            f"<title>{delay:g} s: {percent:+.0f} %</title></circle>"
        )
        previous = (cx, cy)
    parts.append(
        f'<text x="{left}" y="{top - 9}" font-size="12" fill="#222222">{escape(label)}</text>'
        f'<text x="{left + plot_w / 2:.1f}" y="{height - 6}" font-size="10" '
        'text-anchor="middle" fill="#333333">seconds after the first post-contrast phase</text>'
        f'<text x="12" y="{top + plot_h / 2:.1f}" font-size="10" fill="#333333" '
        f'transform="rotate(-90 12 {top + plot_h / 2:.1f})" text-anchor="middle">'
        "enhancement %</text>"
    )
    parts.append("</svg>")
    return "".join(parts)


def _nice_ceiling(value: float) -> float:
    for step in (0.5, 1.0, 2.0, 5.0, 10.0, 20.0, 50.0, 100.0):
        if value <= step * 8:
            return math.ceil(value / step) * step
    return math.ceil(value)


def _ticks(y_max: float) -> list[float]:
    for step in (0.25, 0.5, 1.0, 2.0, 5.0, 10.0, 20.0, 50.0, 100.0):
        if y_max / step <= 8:
            return [step * k for k in range(int(y_max / step + 1e-9) + 1)]
    return [0.0, y_max]


def lesion_points(
    signal: Mapping[str, Any], roles: Sequence[str]
) -> list[tuple[str, float | None]]:
    """(role, ratio) for each role of a lesion's signal, in the given order."""
    out: list[tuple[str, float | None]] = []
    for role in roles:
        stats = signal.get(role)
        ratio = None if stats is None else stats.get("ratio")
        out.append((role, None if ratio is None else float(ratio)))
    return out

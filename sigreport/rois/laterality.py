"""Laterality: a site that says "right" or "left" must match the side the ROI lies on.

DICOM patient coordinates (PS3.3 C.7.6.2.1.1) are LPS: +x points to the patient's **left**, so
a right-sided ROI has a negative x. A contradiction is a ``qc`` warning ``laterality-mismatch``
naming the ROI (docs/rois.md); it never changes a measurement.
"""

from __future__ import annotations

import re
from collections.abc import Sequence

import numpy as np

from sigreport.model import QcLevel, QcNote

__all__ = ["site_side", "laterality_note"]

_WORDS = {
    "right": re.compile(r"\bright\b", re.IGNORECASE),
    "left": re.compile(r"\bleft\b", re.IGNORECASE),
}


def site_side(site: str | None) -> str | None:
    """``"right"`` or ``"left"`` when the site names exactly one side, else None."""
    if not site:
        return None
    sides = [side for side, word in _WORDS.items() if word.search(site)]
    return sides[0] if len(sides) == 1 else None


def laterality_note(
    roi_id: str, site: str | None, center_mm: Sequence[float], *, midline_margin_mm: float = 5.0
) -> QcNote | None:
    """A ``laterality-mismatch`` warning when ``site`` contradicts the ROI's patient x.

    Parameters
    ----------
    roi_id, site
        The ROI and its free-text site.
    center_mm
        The ROI's centre in patient coordinates (LPS, mm).
    midline_margin_mm
        Centres closer than this to x = 0 are not judged (lexicon ``rois.toml [laterality]``).
    """
    side = site_side(site)
    x = float(np.asarray(center_mm, dtype=np.float64)[0])
    if side is None or abs(x) < midline_margin_mm:
        return None
    lies = "left" if x > 0 else "right"  # LPS: +x is the patient's left
    if lies == side:
        return None
    return QcNote(
        QcLevel.WARNING,
        "laterality-mismatch",
        f"{roi_id}: site says {side} ({site!r}), the ROI lies on the patient's {lies} "
        f"(x = {x:+.1f} mm; DICOM patient coordinates, +x is the patient's left)",
    )

"""What every kind of ROI shares: the :class:`Region` protocol (a region of patient space that
says which points it holds) and the check of a point array.

This is the bottom of :mod:`sigreport.rois`: analytic shapes (:mod:`sigreport.rois.regions`)
and masks (:mod:`sigreport.rois.masks`) both build on it, and it imports neither.
"""

from __future__ import annotations

from typing import Protocol, runtime_checkable

import numpy as np

__all__ = ["Region", "as_points"]


@runtime_checkable
class Region(Protocol):
    """A physical-space ROI.

    ``source_series_uid`` is the series a SEG / RTSTRUCT mask was drawn on (None for analytic
    shapes and plain label images); ``frame_of_reference_uid`` likewise.
    """

    @property
    def id(self) -> str: ...

    @property
    def source_series_uid(self) -> str | None: ...

    @property
    def frame_of_reference_uid(self) -> str | None: ...

    def contains(self, points_lps: np.ndarray) -> np.ndarray:
        """``(N, 3)`` LPS points in mm -> ``(N,)`` bool, True where a point is inside."""
        ...

    def bounds_mm(self) -> tuple[np.ndarray, np.ndarray]:
        """``(lo, hi)``: an LPS axis-aligned box (mm) that encloses the region."""
        ...


def as_points(points_lps: np.ndarray) -> np.ndarray:
    """Check and convert an ``(N, 3)`` array of points to float64."""
    points = np.asarray(points_lps, dtype=np.float64)
    if points.ndim != 2 or points.shape[1] != 3:
        raise ValueError(
            f'Argument "points_lps" must have shape (N, 3), got {tuple(np.shape(points_lps))}.'
        )
    return points

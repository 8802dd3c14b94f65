"""ROIs as regions of physical space (DICOM patient coordinates, LPS, millimetres).

A region answers one question, "is this point inside?", for many points at once, and says
which box of space encloses it. Nothing here knows about voxels of a particular series: the
same region is sampled onto every series by :func:`sigreport.rois.propagate.sample_region`.

The analytic shapes are axis-aligned in patient space (PS3.3 C.7.6.2.1.1: x towards the
patient's left, y towards posterior, z towards head). Label images, DICOM SEG and RTSTRUCT
regions live in :mod:`sigreport.rois.masks`; what both kinds share (the :class:`Region`
protocol, the point check) is in :mod:`sigreport.rois.space`, which imports neither.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np

from sigreport.model import RoiShape, RoiSpec
from sigreport.rois.masks import load_mask_region
from sigreport.rois.space import Region, as_points

__all__ = [
    "Region",
    "SphereRegion",
    "EllipsoidRegion",
    "BoxRegion",
    "build_region",
    "as_points",
    "union_bounds",
]


@dataclass(frozen=True)
class EllipsoidRegion:
    """An ellipsoid with semi-axes along patient x, y, z; the boundary counts as inside."""

    id: str
    center_mm: tuple[float, float, float]
    semi_axes_mm: tuple[float, float, float]
    source_series_uid: str | None = None
    frame_of_reference_uid: str | None = None

    def contains(self, points_lps: np.ndarray) -> np.ndarray:
        points = as_points(points_lps)
        scaled = (points - np.asarray(self.center_mm)) / np.asarray(self.semi_axes_mm)
        return np.einsum("ij,ij->i", scaled, scaled) <= 1.0

    def bounds_mm(self) -> tuple[np.ndarray, np.ndarray]:
        center = np.asarray(self.center_mm, dtype=np.float64)
        half = np.asarray(self.semi_axes_mm, dtype=np.float64)
        return center - half, center + half

    @property
    def volume_mm3(self) -> float:
        """The exact volume, 4/3 pi a b c."""
        a, b, c = self.semi_axes_mm
        return 4.0 / 3.0 * np.pi * a * b * c


@dataclass(frozen=True)
class SphereRegion(EllipsoidRegion):
    """A sphere: an ellipsoid with three equal semi-axes."""

    @classmethod
    def of(cls, id: str, center_mm: tuple[float, float, float], radius_mm: float) -> SphereRegion:
        r = float(radius_mm)
        return cls(id=id, center_mm=center_mm, semi_axes_mm=(r, r, r))

    @property
    def radius_mm(self) -> float:
        return self.semi_axes_mm[0]


@dataclass(frozen=True)
class BoxRegion:
    """A box with edges along patient x, y, z; its faces count as inside."""

    id: str
    center_mm: tuple[float, float, float]
    size_mm: tuple[float, float, float]
    source_series_uid: str | None = None
    frame_of_reference_uid: str | None = None

    def contains(self, points_lps: np.ndarray) -> np.ndarray:
        points = as_points(points_lps)
        half = np.asarray(self.size_mm) / 2.0
        return np.all(np.abs(points - np.asarray(self.center_mm)) <= half, axis=1)

    def bounds_mm(self) -> tuple[np.ndarray, np.ndarray]:
        center = np.asarray(self.center_mm, dtype=np.float64)
        half = np.asarray(self.size_mm, dtype=np.float64) / 2.0
        return center - half, center + half

    @property
    def volume_mm3(self) -> float:
        x, y, z = self.size_mm
        return x * y * z


def union_bounds(regions: Iterable[Region]) -> tuple[np.ndarray, np.ndarray]:
    """The LPS box enclosing every region (e.g. ``box_mm`` for :func:`register_rigid`).

    Raises
    ------
    ValueError
        When ``regions`` is empty.
    """
    boxes = [tuple(np.asarray(v, dtype=np.float64) for v in r.bounds_mm()) for r in regions]
    if not boxes:
        raise ValueError('Argument "regions" must hold at least one region.')
    return np.min([b[0] for b in boxes], axis=0), np.max([b[1] for b in boxes], axis=0)


def build_region(spec: RoiSpec) -> Region:
    """The physical-space region of one case-file ROI.

    Parameters
    ----------
    spec : sigreport.model.RoiSpec
        A validated ROI (see :func:`sigreport.rois.load_case`).

    Returns
    -------
    Region
        A sphere, ellipsoid or box; for ``shape = "mask"`` a label-image, SEG or RTSTRUCT region
        (:func:`sigreport.rois.masks.load_mask_region`).

    Raises
    ------
    sigreport.errors.InputError
        When a mask file cannot be read or does not hold the requested segment / label.
    ValueError
        When ``spec`` lacks the geometry its shape needs (``load_case`` never returns such).
    """
    shape = RoiShape(spec.shape)
    if shape is RoiShape.MASK:
        if spec.mask is None:
            raise ValueError(f'RoiSpec "{spec.id}" has shape mask but no mask path.')
        return load_mask_region(spec.mask, roi_id=spec.id, segment=spec.segment, label=spec.label)
    if spec.center_mm is None:
        raise ValueError(f'RoiSpec "{spec.id}" has shape {shape.value} but no center_mm.')
    center = tuple(float(v) for v in spec.center_mm)
    if shape is RoiShape.SPHERE:
        if spec.radius_mm is None:
            raise ValueError(f'RoiSpec "{spec.id}" is a sphere without radius_mm.')
        return SphereRegion.of(spec.id, center, spec.radius_mm)  # type: ignore[arg-type]
    if shape is RoiShape.ELLIPSOID:
        if spec.semi_axes_mm is None:
            raise ValueError(f'RoiSpec "{spec.id}" is an ellipsoid without semi_axes_mm.')
        return EllipsoidRegion(spec.id, center, tuple(map(float, spec.semi_axes_mm)))  # type: ignore[arg-type]
    if spec.size_mm is None:
        raise ValueError(f'RoiSpec "{spec.id}" is a box without size_mm.')
    return BoxRegion(spec.id, center, tuple(map(float, spec.size_mm)))  # type: ignore[arg-type]

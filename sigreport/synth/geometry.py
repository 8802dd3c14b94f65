"""Series geometry (DICOM PS3.3 C.7.6.2.1.1) and sampling of the head model onto it."""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np
import SimpleITK as sitk

from sigreport.synth.phantom import Grid
from sigreport.synth.scenario import SeriesPlan

# Row and column directions (LPS) of the stored image for each orientation. The slice normal is
# row x column (PS3.3 C.7.6.2.1.1); slices are stored in increasing position along it.
_AXES = {
    "axial": ((1.0, 0.0, 0.0), (0.0, 1.0, 0.0)),
    "coronal": ((1.0, 0.0, 0.0), (0.0, 0.0, -1.0)),
    "sagittal": ((0.0, 1.0, 0.0), (0.0, 0.0, -1.0)),
}


@dataclass(frozen=True)
class SeriesGeometry:
    """A regular stack: ``size`` (columns, rows, slices), ``spacing`` (column spacing along a
    row, row spacing, slice spacing), the first voxel's centre, and the row / column / normal
    direction cosines."""

    size: tuple[int, int, int]
    spacing: tuple[float, float, float]
    origin: tuple[float, float, float]
    row: tuple[float, float, float]
    column: tuple[float, float, float]
    normal: tuple[float, float, float]
    slice_thickness: float

    @property
    def direction(self) -> tuple[float, ...]:
        """Row-major 3x3 whose columns are row, column, normal (SimpleITK's convention)."""
        m = np.column_stack([self.row, self.column, self.normal])
        return tuple(float(v) for v in m.ravel())

    def slice_position(self, k: int) -> tuple[float, float, float]:
        """ImagePositionPatient of slice ``k`` (0-based): the centre of its first voxel."""
        p = np.asarray(self.origin) + k * self.spacing[2] * np.asarray(self.normal)
        return (float(p[0]), float(p[1]), float(p[2]))

    def reference_image(self, offset_mm: float = 0.0) -> sitk.Image:
        img = sitk.Image([int(v) for v in self.size], sitk.sitkFloat32)
        img.SetSpacing(self.spacing)
        img.SetDirection(self.direction)
        img.SetOrigin(tuple(np.asarray(self.origin) + offset_mm * np.asarray(self.normal)))
        return img


def _vec(values: Iterable[float] | np.ndarray) -> tuple[float, float, float]:
    x, y, z = (float(v) for v in values)
    return (x, y, z)


def _rotate_x(v: tuple[float, float, float], deg: float) -> tuple[float, float, float]:
    c, s = math.cos(math.radians(deg)), math.sin(math.radians(deg))
    x, y, z = v
    return (x, c * y - s * z, s * y + c * z)


def plan_geometry(plan: SeriesPlan) -> SeriesGeometry:
    """The stack a series plan describes, centred on ``plan.center_mm``.

    ``tilt_deg`` rotates the stack about the patient's left-right axis (an oblique axial).
    """
    row, col = _AXES[plan.orientation]
    if plan.tilt_deg:
        row, col = _rotate_x(row, plan.tilt_deg), _rotate_x(col, plan.tilt_deg)
    normal = _vec(np.cross(row, col))
    nx = max(1, int(round(plan.fov_mm[0] / plan.pixel_mm)))
    ny = max(1, int(round(plan.fov_mm[1] / plan.pixel_mm)))
    nz = max(1, int(math.floor(plan.fov_mm[2] / plan.spacing_mm + 1e-6)))
    spacing = (plan.pixel_mm, plan.pixel_mm, plan.spacing_mm)
    c = np.asarray(plan.center_mm, dtype=float)
    origin = (
        c
        - (nx - 1) / 2 * spacing[0] * np.asarray(row)
        - (ny - 1) / 2 * spacing[1] * np.asarray(col)
        - (nz - 1) / 2 * spacing[2] * np.asarray(normal)
    )
    return SeriesGeometry(
        size=(nx, ny, nz),
        spacing=spacing,
        origin=_vec(origin),
        row=_vec(row),
        column=_vec(col),
        normal=normal,
        slice_thickness=plan.slice_mm,
    )


def model_image(values: np.ndarray, grid: Grid) -> sitk.Image:
    img = sitk.GetImageFromArray(values.astype(np.float32, copy=False))
    img.SetOrigin(grid.origin)
    img.SetSpacing((grid.spacing,) * 3)
    return img


def sample(
    model: sitk.Image,
    geometry: SeriesGeometry,
    motion: sitk.Transform | None = None,
    *,
    subsample_mm: float = 1.0,
) -> np.ndarray:
    """The model seen by a series: array ``[slice, row, column]``.

    Each slice averages the model over its thickness (a rectangular slice profile sampled every
    ``subsample_mm``); in plane the model is linearly interpolated. ``motion`` maps anatomy
    points of the anchor frame to where the moved head puts them, so the series at a point ``p``
    sees the model at ``motion^-1(p)``.
    """
    transform = sitk.Transform() if motion is None else motion.GetInverse()
    n_sub = max(1, int(round(geometry.slice_thickness / subsample_mm)))
    t = geometry.slice_thickness
    acc: np.ndarray | None = None
    for k in range(n_sub):
        offset = -t / 2 + (k + 0.5) * t / n_sub if n_sub > 1 else 0.0
        ref = geometry.reference_image(offset)
        out = sitk.Resample(model, ref, transform, sitk.sitkLinear, 0.0, sitk.sitkFloat32)
        arr = sitk.GetArrayFromImage(out)
        acc = arr if acc is None else acc + arr
    assert acc is not None
    return acc / n_sub

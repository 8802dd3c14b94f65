"""The mid-sagittal plane and the automatic mirror reference (``reference = "auto"``).

The head is close to symmetric about its mid-sagittal plane. Following Prima, Ourselin and
Ayache (IEEE TMI 2002, "Computation of the mid-sagittal plane in 3-D brain images"; from
memory), the plane is found by registering the image to its own left-right flip: the anchor,
resampled to an isotropic grid, is flipped across ``x = x0`` (``M``), and a rigid transform
``T`` with ``I(p) ~ I(M T p)`` is found (SimpleITK, correlation metric: both images share one
contrast). The composition ``S = M T`` maps the head onto its mirror image: it is the
reflection across the mid-sagittal plane, ``S p = p - 2 (n . p - d) n``, whose normal ``n`` is
the eigenvector of ``S``'s matrix with eigenvalue -1 and whose offset is ``d = n . b / 2``.

A lesion's automatic reference is the lesion's own region reflected across that plane (same
shape and size, :class:`ReflectedRegion`), checked on the anchor for homogeneity (coefficient
of variation at most the lexicon's ``[reference] max_cv``) and for overlap with any lesion.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import SimpleITK as sitk

from sigreport.model import QcLevel, QcNote, RoiKind, RoiSpec
from sigreport.rois.propagate import sample_region
from sigreport.rois.regions import Region, as_points

__all__ = [
    "MidSagittalPlane",
    "ReflectedRegion",
    "estimate_midsagittal_plane",
    "mirror_reference",
    "MirrorResult",
]

# One thread during the registration: ITK's dynamic threading changes the last bits otherwise
# (the same reason as sigreport.align.rigid).
_THREADS = 1
_SHRINK = (4, 2, 1)
_SIGMAS_MM = (4.0, 2.0, 0.0)


@dataclass(frozen=True)
class MidSagittalPlane:
    """The plane ``normal . p = offset_mm`` (LPS mm); ``normal`` is a unit vector with a
    positive x component (towards the patient's left)."""

    normal: tuple[float, float, float]
    offset_mm: float

    def reflect(self, points_lps: np.ndarray) -> np.ndarray:
        """Mirror ``(N, 3)`` points across the plane."""
        points = as_points(points_lps)
        n = np.asarray(self.normal)
        return points - 2.0 * np.outer(points @ n - self.offset_mm, n)

    def distance_mm(self, point: Sequence[float]) -> float:
        """Signed distance of a point from the plane (positive on the patient's left)."""
        return float(np.dot(np.asarray(point, dtype=np.float64), self.normal) - self.offset_mm)

    def angle_deg(self, normal: Sequence[float]) -> float:
        """Angle between this plane and another plane of the given normal."""
        c = abs(float(np.dot(self.normal, np.asarray(normal) / np.linalg.norm(normal))))
        return math.degrees(math.acos(min(1.0, c)))


@dataclass(frozen=True, eq=False)
class ReflectedRegion:
    """A region mirrored across a plane: ``p`` is inside when its mirror image is in ``base``."""

    id: str
    base: Region
    plane: MidSagittalPlane
    source_series_uid: str | None = None
    frame_of_reference_uid: str | None = None

    def contains(self, points_lps: np.ndarray) -> np.ndarray:
        return self.base.contains(self.plane.reflect(points_lps))

    def bounds_mm(self) -> tuple[np.ndarray, np.ndarray]:
        lo, hi = (np.asarray(v, dtype=np.float64) for v in self.base.bounds_mm())
        corners = np.array(
            [
                [(lo, hi)[a][0], (lo, hi)[b][1], (lo, hi)[c][2]]
                for a in (0, 1)
                for b in (0, 1)
                for c in (0, 1)
            ]
        )
        mirrored = self.plane.reflect(corners)
        return mirrored.min(axis=0), mirrored.max(axis=0)


def _isotropic(image: sitk.Image, spacing_mm: float) -> sitk.Image:
    """``image`` on an axis-aligned (identity direction) grid of ``spacing_mm`` covering it."""
    size = np.asarray(image.GetSize())
    corners = np.array(
        [
            image.TransformContinuousIndexToPhysicalPoint(
                [float(c) for c in (a * (size[0] - 1), b * (size[1] - 1), c * (size[2] - 1))]
            )
            for a in (0, 1)
            for b in (0, 1)
            for c in (0, 1)
        ]
    )
    lo, hi = corners.min(axis=0), corners.max(axis=0)
    n = np.maximum(np.ceil((hi - lo) / spacing_mm).astype(int) + 1, 1)
    reference = sitk.Image([int(v) for v in n], sitk.sitkFloat32)
    reference.SetSpacing([spacing_mm] * 3)
    reference.SetOrigin([float(v) for v in lo])
    smoothed = sitk.SmoothingRecursiveGaussian(sitk.Cast(image, sitk.sitkFloat32), spacing_mm / 2)
    return sitk.Resample(smoothed, reference, sitk.Transform(), sitk.sitkLinear, 0.0)


def _centroid_mm(image: sitk.Image) -> np.ndarray:
    """The intensity centroid of the voxels above the image's mean (the head, not the air)."""
    array = sitk.GetArrayFromImage(image).astype(np.float64)
    weights = np.where(array > array.mean(), array, 0.0)
    zz, yy, xx = np.indices(array.shape, dtype=np.float64)
    index = np.array([(w * weights).sum() for w in (xx, yy, zz)]) / weights.sum()
    return np.asarray(image.TransformContinuousIndexToPhysicalPoint([float(v) for v in index]))


def estimate_midsagittal_plane(image: sitk.Image, *, spacing_mm: float = 3.0) -> MidSagittalPlane:
    """The mid-sagittal plane of a head image, by registration to its left-right flip.

    Parameters
    ----------
    image : SimpleITK.Image
        A 3D head image in patient space (LPS), e.g. the anchor series.
    spacing_mm : float, keyword-only
        The isotropic grid the registration runs on (lexicon ``rois.toml [mirror]``).

    Returns
    -------
    MidSagittalPlane
    """
    iso = _isotropic(image, spacing_mm)
    centre = _centroid_mm(iso)
    flip = sitk.AffineTransform(3)
    flip.SetMatrix((-1.0, 0.0, 0.0, 0.0, 1.0, 0.0, 0.0, 0.0, 1.0))
    flip.SetTranslation((2.0 * float(centre[0]), 0.0, 0.0))  # M: x -> 2 x0 - x
    flipped = sitk.Resample(iso, iso, flip, sitk.sitkLinear, 0.0)

    current = sitk.Euler3DTransform()
    current.SetCenter([float(v) for v in centre])
    previous = sitk.ProcessObject.GetGlobalDefaultNumberOfThreads()
    sitk.ProcessObject.SetGlobalDefaultNumberOfThreads(_THREADS)
    try:
        for shrink, sigma in zip(_SHRINK, _SIGMAS_MM, strict=True):
            fixed = sitk.SmoothingRecursiveGaussian(iso, sigma) if sigma > 0 else iso
            moving = sitk.SmoothingRecursiveGaussian(flipped, sigma) if sigma > 0 else flipped
            if shrink > 1:
                fixed = sitk.BinShrink(
                    fixed, [max(1, min(shrink, n // 8)) for n in fixed.GetSize()]
                )
            reg = sitk.ImageRegistrationMethod()
            reg.SetNumberOfThreads(_THREADS)
            reg.SetMetricAsCorrelation()
            reg.SetMetricSamplingStrategy(reg.NONE)
            reg.SetInterpolator(sitk.sitkLinear)
            reg.SetOptimizerAsRegularStepGradientDescent(
                learningRate=1.0 / shrink,
                minStep=1e-4,
                numberOfIterations=200,
                relaxationFactor=0.5,
                gradientMagnitudeTolerance=1e-8,
            )
            reg.SetOptimizerScalesFromPhysicalShift()
            reg.SetInitialTransform(current, inPlace=False)
            result = reg.Execute(fixed, moving)
            step = sitk.Euler3DTransform()
            step.SetCenter([float(v) for v in centre])
            step.SetParameters(result.GetParameters())
            current = step
    finally:
        sitk.ProcessObject.SetGlobalDefaultNumberOfThreads(previous)

    rotation = np.asarray(current.GetMatrix(), dtype=np.float64).reshape(3, 3)
    c = np.asarray(current.GetCenter(), dtype=np.float64)
    t = np.asarray(current.GetTranslation(), dtype=np.float64)
    flip_matrix = np.diag([-1.0, 1.0, 1.0])
    flip_offset = np.array([2.0 * centre[0], 0.0, 0.0])
    # S = M T: p -> D (R (p - c) + c + t) + m
    a = flip_matrix @ rotation
    b = flip_matrix @ (c - rotation @ c + t) + flip_offset
    values, vectors = np.linalg.eigh((a + a.T) / 2.0)
    normal = vectors[:, int(np.argmin(values))]
    if normal[0] < 0:
        normal = -normal
    offset = float(normal @ b) / 2.0
    return MidSagittalPlane(tuple(float(v) for v in normal), offset)  # type: ignore[arg-type]


_SIDES = re.compile(r"\b(right|left)\b", re.IGNORECASE)


def _mirror_site(site: str | None, lesion_id: str) -> str:
    """The lesion's site with right and left exchanged, naming the lesion it mirrors."""
    if not site:
        return f"mirror of {lesion_id}"

    def swap(match: re.Match[str]) -> str:
        word = match.group(0)
        other = "left" if word.lower() == "right" else "right"
        return other.capitalize() if word[0].isupper() else other

    return f"{_SIDES.sub(swap, site)} (mirror of {lesion_id})"


@dataclass(frozen=True)
class MirrorResult:
    """An automatic reference: its ROI and region when accepted (None when rejected), and the
    qc notes that say where it went or why it was rejected."""

    spec: RoiSpec | None
    region: ReflectedRegion | None
    notes: tuple[QcNote, ...]
    rejected_because: str | None = None


def mirror_reference(
    lesion: RoiSpec,
    lesion_region: Region,
    plane: MidSagittalPlane,
    anchor: sitk.Image,
    lesions: Mapping[str, Region],
    *,
    reference_id: str,
    max_cv: float,
    min_voxels: int = 1,
) -> MirrorResult:
    """Place and check the mirror reference of one lesion on the anchor.

    Parameters
    ----------
    lesion, lesion_region
        The lesion ROI and its region in the anchor's space.
    plane
        The anchor's mid-sagittal plane (:func:`estimate_midsagittal_plane`).
    anchor
        The anchor image (homogeneity is checked on it).
    lesions
        Every lesion's region (the mirror must overlap none).
    reference_id
        The new reference ROI's id.
    max_cv
        The largest coefficient of variation (sd / mean) of a homogeneous reference (the
        lexicon's ``thresholds.toml [reference] max_cv``).
    min_voxels
        Fewest anchor voxels the mirror must hold.
    """
    region = ReflectedRegion(reference_id, lesion_region, plane)
    lo, hi = region.bounds_mm()
    centre = (lo + hi) / 2.0
    where = (
        f"{lesion.id}: the mirror position ({centre[0]:.1f}, {centre[1]:.1f}, {centre[2]:.1f}) mm "
        f"across the mid-sagittal plane (normal ({plane.normal[0]:.3f}, {plane.normal[1]:.3f}, "
        f"{plane.normal[2]:.3f}), {plane.offset_mm:+.1f} mm)"
    )
    sample = sample_region(region, anchor)
    reason: str | None = None
    if sample.n_voxels < min_voxels:
        reason = f"holds {sample.n_voxels} anchor voxels (fewer than {min_voxels})"
    for other_id, other in lesions.items():
        if reason is not None:
            break
        shared = sample.overlap(sample_region(other, anchor))
        if shared:
            reason = f"overlaps lesion {other_id} ({shared} anchor voxels)"
    if reason is None:
        # Within the sample's box (it is kept to the region's box).
        values = sitk.GetArrayViewFromImage(anchor)[sample.box][sample.box_mask].astype(np.float64)
        mean = float(values.mean())
        cv = float(values.std()) / mean if mean > 0 else math.inf
        if cv > max_cv:
            reason = (
                f"is not homogeneous (coefficient of variation {cv:.2f} on the anchor, "
                f"above {max_cv:.2f})"
            )
    if reason is not None:
        note = QcNote(
            QcLevel.WARNING, "auto-reference-rejected", f"{where} {reason}; rejected as reference"
        )
        return MirrorResult(None, None, (note,), rejected_because=reason)
    spec = RoiSpec(
        id=reference_id,
        kind=RoiKind.REFERENCE,
        shape=lesion.shape,
        site=_mirror_site(lesion.site, lesion.id),
        tissue=None,
    )
    note = QcNote(
        QcLevel.INFO,
        "auto-reference",
        f"{where}: reference {reference_id}, the lesion's mirror image ({sample.n_voxels} anchor voxels)",
    )
    return MirrorResult(spec, region, (note,))

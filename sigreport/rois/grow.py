"""Seeds: one point grows the lesion on the anchor (``shape = "seed"``, docs/rois.md).

The growing is bounded (a sphere of ``max_radius_mm`` around the seed), deterministic (fixed
filters, no random sampling) and works in four steps on the anchor cropped to that sphere:

1. **Smoothing** with SimpleITK's curvature flow (edge preserving), so that noise does not cut
   the region into pieces.
2. **Core**: SimpleITK's confidence-connected region from the seed (mean +- 2.5 standard
   deviations, re-estimated twice). When that core itself reaches the ``max_radius_mm``
   sphere, either it ran through tissue like the seed (its median within three robust
   standard deviations of the seed's median: a tube or a structure too large, a leak) or the interval was
   too wide, as it is from a seed on the lesion's edge: then it is narrowed to 2, 1.5 and 1
   standard deviations. Its only use is to know the lesion's own intensity ``L``
   (median over the core) and, from a ring of 2-4 mm outside the (hole-filled) core, the
   surrounding tissue's ``B``.
3. **Outline** at half-way between lesion and surroundings, the usual half-maximum edge of a
   blurred step: the voxels connected to the seed whose smoothed value lies within
   ``|L - B| / 2`` of ``L``, and no further than 2 mm beyond the core. The interval is
   two-sided, so a neighbouring structure brighter (or darker) than the lesion by more than
   half the lesion's contrast stays out even when it touches it; the 2 mm bound keeps a
   neighbour of similar intensity behind a thin layer of partial volume out as well.
4. **Hole fill** (a necrotic or cystic centre inside an enhancing rim belongs to the lesion)
   and the connected component that holds the seed.

A region that reaches the ``max_radius_mm`` sphere has leaked into the surrounding tissue: it
is never measured; :class:`GrowError` (an ``InputError``, exit 2) says so.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import SimpleITK as sitk

from sigreport.errors import InputError
from sigreport.rois.masks import GridRegion, affine_of_image

__all__ = ["GrowError", "GrownLesion", "grow_from_seed"]

# SimpleITK's curvature flow time step for 3D images (its documentation's value, stable below
# 1 / 2^N for N dimensions).
_CURVATURE_TIME_STEP = 0.0625
# Confidence-connected core: mean +- this many standard deviations of the seed neighbourhood,
# re-estimated this many times (the values of the SimpleITK region-growing examples).
_CORE_MULTIPLIERS = (2.5, 2.0, 1.5, 1.0)
_CORE_ITERATIONS = 2
# A leaked core whose median lies within this many robust standard deviations (of the core's
# own values) of the seed's median ran through tissue like the seed: a true leak. Measured on
# the demo: a tube 1.1, a seed on a lesion's edge whose interval was too wide 44.
_LIKE_SEED_SPREADS = 3.0
# Bridges of noise between the lesion and a neighbour of similar intensity are cut by an
# opening with a ball of this radius (voxels) before the seed's component is taken.
_OPEN_RADIUS = 1
# How far (mm) the half-way outline may reach beyond the (hole-filled) confidence core.
_REFINE_MM = 2.0
# The surroundings' ring, in mm outside the hole-filled core.
_RING_MM = (2.0, 4.0)


class GrowError(InputError):
    """The region grown from a seed cannot be measured (leak, too small, no contrast)."""


@dataclass(frozen=True, eq=False)
class GrownLesion:
    """A lesion grown from a seed on the anchor.

    ``mask`` is a UInt8 label image on the whole anchor grid (1 inside), ``region`` the same
    mask as a physical-space region (on the crop around the seed), ``lesion_level`` and
    ``surround_level`` the smoothed medians ``L`` and ``B``, ``threshold`` the half-way edge.
    """

    region: GridRegion
    mask: sitk.Image
    n_voxels: int
    lesion_level: float
    surround_level: float
    threshold: float
    reach_mm: float  # the largest distance of a region voxel centre from the seed


def _crop_around(image: sitk.Image, centre_mm: np.ndarray, radius_mm: float) -> sitk.Image:
    """The anchor's voxels within a box of ``radius_mm`` (plus one voxel) around the centre."""
    corners = [
        centre_mm + radius_mm * np.array([sx, sy, sz])
        for sx in (-1, 1)
        for sy in (-1, 1)
        for sz in (-1, 1)
    ]
    cont = np.array(
        [image.TransformPhysicalPointToContinuousIndex(tuple(map(float, c))) for c in corners]
    )
    size = np.asarray(image.GetSize())
    first = np.maximum(np.floor(cont.min(axis=0)).astype(int) - 1, 0)
    last = np.minimum(np.ceil(cont.max(axis=0)).astype(int) + 1, size - 1)
    return sitk.RegionOfInterest(image, [int(v) for v in last - first + 1], [int(v) for v in first])


def _distances_mm(image: sitk.Image, point_mm: np.ndarray) -> np.ndarray:
    """Distance (mm) of every voxel centre of ``image`` from a point, numpy order (z, y, x)."""
    affine = affine_of_image(image)
    zz, yy, xx = np.indices(image.GetSize()[::-1], dtype=np.float64)
    idx = np.stack([zz, yy, xx], axis=-1)
    points = idx @ affine[:3, :3].T + affine[:3, 3]
    return np.linalg.norm(points - point_mm, axis=-1)


def _as_mask(array: np.ndarray, like: sitk.Image) -> sitk.Image:
    out = sitk.GetImageFromArray(array.astype(np.uint8))
    out.CopyInformation(like)
    return out


def _seed_component(
    mask: np.ndarray, like: sitk.Image, seed_idx: tuple[int, int, int], *, open_radius: int = 0
) -> np.ndarray:
    """Opened (cuts bridges thinner than the ball), hole-filled, then only the connected
    component (26-connected) holding the seed."""
    image = _as_mask(mask, like)
    if open_radius > 0:
        image = sitk.BinaryMorphologicalOpening(
            image, [open_radius] * 3, sitk.sitkBall, foregroundValue=1
        )
    filled = sitk.BinaryFillhole(image, fullyConnected=True, foregroundValue=1)
    labels = sitk.GetArrayFromImage(sitk.ConnectedComponent(filled, True))
    label = labels[seed_idx[2], seed_idx[1], seed_idx[0]]
    if label == 0:
        return np.zeros_like(mask, dtype=bool)
    return labels == label


def _leak_message(where: str, max_radius_mm: float) -> str:
    return (
        f"{where}: the grown region reaches max_radius_mm = {max_radius_mm:g} mm; it leaked "
        "into the surrounding tissue and is not measured. Move the seed to the lesion's "
        "centre, raise max_radius_mm if the lesion is larger, or outline the lesion "
        '(shape = "mask")'
    )


def grow_from_seed(
    image: sitk.Image,
    seed_mm: tuple[float, float, float] | np.ndarray,
    *,
    roi_id: str,
    max_radius_mm: float = 20.0,
    seed_radius_mm: float = 1.5,
    smoothing_iterations: int = 5,
    leak_margin_mm: float = 1.0,
    min_voxels: int = 20,
) -> GrownLesion:
    """Grow the lesion around ``seed_mm`` on ``image`` (the anchor), bounded and deterministic.

    Parameters
    ----------
    image : SimpleITK.Image
        The anchor series (3D, float, patient space LPS).
    seed_mm : sequence of 3 floats
        The seed in the anchor's patient space (LPS, mm).
    roi_id : str
        The ROI's id, for the region and the messages.
    max_radius_mm, seed_radius_mm, smoothing_iterations, leak_margin_mm, min_voxels
        See ``lexicon/rois.toml [seed]``.

    Returns
    -------
    GrownLesion

    Raises
    ------
    GrowError
        When the seed is outside the image, the seed has no contrast against its surroundings,
        the region reaches ``max_radius_mm`` (a leak), or it holds fewer than ``min_voxels``.
    """
    seed = np.asarray(seed_mm, dtype=np.float64)
    where = f"{roi_id}: seed at ({seed[0]:.1f}, {seed[1]:.1f}, {seed[2]:.1f}) mm"
    cont = np.asarray(image.TransformPhysicalPointToContinuousIndex(tuple(map(float, seed))))
    size = np.asarray(image.GetSize())
    if np.any(cont < -0.5) or np.any(cont > size - 0.5):
        raise GrowError(f"{where} is outside the anchor series")

    crop = _crop_around(sitk.Cast(image, sitk.sitkFloat32), seed, max_radius_mm)
    smooth = sitk.CurvatureFlow(
        crop, timeStep=_CURVATURE_TIME_STEP, numberOfIterations=int(smoothing_iterations)
    )
    values = sitk.GetArrayFromImage(smooth).astype(np.float64)
    distance = _distances_mm(crop, seed)
    ball = distance <= max_radius_mm
    ix, iy, iz = crop.TransformPhysicalPointToIndex(tuple(map(float, seed)))
    seed_idx = (int(ix), int(iy), int(iz))

    near = distance <= max(seed_radius_mm, 0.0)
    near[seed_idx[2], seed_idx[1], seed_idx[0]] = True
    lesion_level = float(np.median(values[near]))

    # The core must not leak itself: a seed near the lesion's edge sees a wide spread in its
    # 3x3x3 neighbourhood, so the interval is narrowed until the core stays inside the sphere.
    core: np.ndarray | None = None
    for multiplier in _CORE_MULTIPLIERS:
        core_image = sitk.ConfidenceConnected(
            smooth,
            seedList=[seed_idx],
            numberOfIterations=_CORE_ITERATIONS,
            multiplier=multiplier,
            initialNeighborhoodRadius=1,
            replaceValue=1,
        )
        candidate = sitk.GetArrayFromImage(core_image) > 0
        if not candidate.any():
            break
        if distance[candidate].max() <= max_radius_mm - leak_margin_mm:
            core = _seed_component(candidate, crop, seed_idx)
            break
        # It reached the sphere. Tissue like the seed all the way (a tube, a structure larger
        # than max_radius_mm): a true leak. Tissue unlike the seed (its median further from the
        # seed's than three robust sd inside it): the interval was too wide, narrow it.
        reached = values[candidate]
        median = float(np.median(reached))
        spread = 1.4826 * float(np.median(np.abs(reached - median)))  # robust sd (MAD)
        if abs(median - lesion_level) <= _LIKE_SEED_SPREADS * spread:
            break
    if core is None or not core.any():
        raise GrowError(_leak_message(where, max_radius_mm))
    if core.sum() >= 3:
        lesion_level = float(np.median(values[core]))
    # The ring outside the hole-filled core: the tissue the lesion sits in.
    outside = sitk.SignedMaurerDistanceMap(
        _as_mask(core, crop), insideIsPositive=False, squaredDistance=False, useImageSpacing=True
    )
    depth = sitk.GetArrayFromImage(outside)
    ring = (depth > _RING_MM[0]) & (depth <= _RING_MM[1]) & ball
    if not ring.any():
        raise GrowError(f"{where}: no tissue around the seed within max_radius_mm")
    surround_level = float(np.median(values[ring]))
    contrast = lesion_level - surround_level
    if not abs(contrast) > 0:
        raise GrowError(f"{where}: the seed has no contrast against its surroundings")
    half = abs(contrast) / 2.0
    threshold = lesion_level - contrast / 2.0
    # The half-way edge refines the core's outline; it may not run further than _REFINE_MM
    # beyond it, so a thin layer of partial volume to a similar neighbour is no bridge.
    inside = (np.abs(values - lesion_level) <= half) & ball & (depth <= _REFINE_MM)
    if not inside[seed_idx[2], seed_idx[1], seed_idx[0]]:
        raise GrowError(f"{where}: the seed voxel is not like the lesion around it")
    grown = _seed_component(inside, crop, seed_idx, open_radius=_OPEN_RADIUS) & ball
    n_voxels = int(grown.sum())
    reach = float(distance[grown].max()) if n_voxels else 0.0
    if reach > max_radius_mm - leak_margin_mm:
        raise GrowError(_leak_message(where, max_radius_mm))
    if n_voxels < min_voxels:
        raise GrowError(
            f"{where}: the grown region holds {n_voxels} voxels (fewer than {min_voxels}); "
            "give the lesion as a sphere or an outline instead"
        )
    full = sitk.Image(image.GetSize(), sitk.sitkUInt8)
    full.CopyInformation(image)
    full = sitk.Paste(
        full,
        _as_mask(grown, crop),
        crop.GetSize(),
        [0, 0, 0],
        [int(v) for v in image.TransformPhysicalPointToIndex(crop.GetOrigin())],
    )
    region = GridRegion(
        id=roi_id,
        values=grown.astype(np.float32),
        affine=affine_of_image(crop),
        source=f"grown from a seed on the anchor (threshold {threshold:.4g})",
    )
    return GrownLesion(
        region=region,
        mask=full,
        n_voxels=n_voxels,
        lesion_level=lesion_level,
        surround_level=surround_level,
        threshold=threshold,
        reach_mm=reach if math.isfinite(reach) else 0.0,
    )

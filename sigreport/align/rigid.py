"""Rigid alignment of a series to the anchor series around the ROIs.

Patients move between series; the scanner's frame of reference is a good first guess but not
the truth. Each series (``moving``) is aligned to the anchor (``fixed``) by a 6-parameter rigid
transform (SimpleITK ``Euler3DTransform``: three rotations about the ROIs' centre, then a
translation), found by maximizing Mattes mutual information (works across contrasts: T1 vs T2
vs FLAIR, Mattes et al., IEEE TMI 2003) with regular-step gradient descent over a
coarse-to-fine pyramid. Only the anchor's neighbourhood of the ROIs (plus a margin) is used,
which keeps it to seconds and keeps distant anatomy that moved differently out.

Deterministic: one sampling strategy (RANDOM, a fixed fraction of the anchor crop's voxels,
with a fixed seed from the lexicon) and a fixed thread count, so the same pair gives the same
answer on any machine.

Speed (docs/performance.md, Registration): :func:`register_series` crops the anchor to the
ROIs' neighbourhood and builds its smoothed pyramid once for all series (and keeps it for the
next calls, so series registered one call each share it), skips the optimizer for a
series a cheap metric check finds already aligned, and registers the series in parallel threads
(SimpleITK releases the GIL while ITK runs; each registration runs on one ITK thread, so the
answers do not depend on the scheduling).
"""

from __future__ import annotations

import hashlib
import math
import os
import threading
from collections import OrderedDict
from collections.abc import Hashable, Iterator, Mapping
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

import numpy as np
import SimpleITK as sitk

from sigreport.errors import InputError
from sigreport.lexicon import check_keys, read_table
from sigreport.model import Alignment

__all__ = [
    "register_rigid",
    "register_series",
    "clear_anchor_cache",
    "identity_alignment",
    "AlignmentSettings",
    "load_settings",
]

# ITK's threads take work dynamically, so partial sums (metric, pyramid filters) are added in a
# varying order and results differ in the last bits from run to run. One thread, for this
# call only, makes the result bitwise reproducible; the crops are small enough to stay fast.
_THREADS = 1
# The smallest crop (voxels per axis) the pyramid's coarsest level can still work with.
_MIN_CROP_VOXELS = 16


@dataclass(frozen=True)
class AlignmentSettings:
    """``lexicon/alignment.toml``, validated (see that file for each value's provenance)."""

    margin_mm: float
    histogram_bins: int
    sampling_percentage: float
    seed: int
    shrink_factors: tuple[int, ...]
    smoothing_sigmas_mm: tuple[float, ...]
    learning_rate: float
    min_step: float
    max_iterations: int
    max_samples: int
    aligned_tolerance_mm: float
    max_translation_mm: float
    max_rotation_deg: float
    poor_metric: float
    # The finest pyramid level's voxels are at least this size (mm): a finer anchor is binned
    # to it. 0 (the key absent from a site's file): the anchor's own voxels.
    finest_spacing_mm: float = 0.0


_REGISTRATION_KEYS = {
    "margin_mm",
    "histogram_bins",
    "sampling_percentage",
    "seed",
    "shrink_factors",
    "smoothing_sigmas_mm",
    "learning_rate",
    "min_step",
    "max_iterations",
    "max_samples",
    "aligned_tolerance_mm",
}
_QC_KEYS = {"max_translation_mm", "max_rotation_deg", "poor_metric"}
# Keys a site's older copy of alignment.toml may lack (docs/CHANGES.md).
_OPTIONAL_KEYS = {"finest_spacing_mm"}


def _number(table: dict[str, Any], key: str, where: str, *, positive: bool = True) -> float:
    value = table.get(key)
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise InputError(f"{where}: {key} must be a number, got {value!r}")
    if positive and value <= 0:
        raise InputError(f"{where}: {key} must be positive, got {value!r}")
    return float(value)


def _integer(table: dict[str, Any], key: str, where: str, *, minimum: int) -> int:
    value = table.get(key)
    if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
        raise InputError(f"{where}: {key} must be an integer >= {minimum}, got {value!r}")
    return value


def load_settings(site_lexicon: Path | None = None) -> AlignmentSettings:
    """Read and validate ``alignment.toml`` (the site's copy first)."""
    table = read_table("alignment.toml", site_lexicon)
    check_keys(table, {"registration", "qc"}, "alignment.toml")
    reg = table.get("registration")
    qc = table.get("qc")
    if not isinstance(reg, dict) or not isinstance(qc, dict):
        raise InputError("alignment.toml: needs the tables [registration] and [qc]")
    check_keys(reg, _REGISTRATION_KEYS | _OPTIONAL_KEYS, "alignment.toml [registration]")
    check_keys(qc, _QC_KEYS, "alignment.toml [qc]")
    where = "alignment.toml [registration]"
    for key in sorted(_REGISTRATION_KEYS - set(reg)):
        raise InputError(f"{where}: {key} is missing")
    for key in sorted(_QC_KEYS - set(qc)):
        raise InputError(f"alignment.toml [qc]: {key} is missing")
    shrink = reg["shrink_factors"]
    sigmas = reg["smoothing_sigmas_mm"]
    if (
        not isinstance(shrink, list)
        or not shrink
        or not all(isinstance(v, int) and not isinstance(v, bool) and v >= 1 for v in shrink)
    ):
        raise InputError(f"{where}: shrink_factors must be a list of integers >= 1, got {shrink!r}")
    if (
        not isinstance(sigmas, list)
        or len(sigmas) != len(shrink)
        or not all(
            isinstance(v, int | float) and not isinstance(v, bool) and v >= 0 for v in sigmas
        )
    ):
        raise InputError(
            f"{where}: smoothing_sigmas_mm must be {len(shrink)} numbers >= 0 (one per shrink "
            f"factor), got {sigmas!r}"
        )
    pct = _number(reg, "sampling_percentage", where)
    if pct > 1:
        raise InputError(f"{where}: sampling_percentage must be in (0, 1], got {pct!r}")
    return AlignmentSettings(
        margin_mm=_number(reg, "margin_mm", where, positive=False),
        histogram_bins=_integer(reg, "histogram_bins", where, minimum=4),
        sampling_percentage=pct,
        seed=_integer(reg, "seed", where, minimum=0),
        shrink_factors=tuple(shrink),
        smoothing_sigmas_mm=tuple(float(v) for v in sigmas),
        learning_rate=_number(reg, "learning_rate", where),
        min_step=_number(reg, "min_step", where),
        max_iterations=_integer(reg, "max_iterations", where, minimum=1),
        max_samples=_integer(reg, "max_samples", where, minimum=1000),
        aligned_tolerance_mm=_number(reg, "aligned_tolerance_mm", where, positive=False),
        max_translation_mm=_number(qc, "max_translation_mm", "alignment.toml [qc]"),
        max_rotation_deg=_number(qc, "max_rotation_deg", "alignment.toml [qc]"),
        poor_metric=_number(qc, "poor_metric", "alignment.toml [qc]", positive=False),
        finest_spacing_mm=(
            _number(reg, "finest_spacing_mm", where) if "finest_spacing_mm" in reg else 0.0
        ),
    )


def identity_alignment(method: str = "identity") -> Alignment:
    """No motion: the series is read in the anchor's patient space as it is."""
    return Alignment(method=method, transform=None)


def _crop_index(
    image: sitk.Image, lo: np.ndarray, hi: np.ndarray, min_voxels: int
) -> tuple[list[int], list[int]] | None:
    """``(size, first index)`` of the part of ``image`` whose voxels fall in the LPS box
    (lo, hi), widened to ``min_voxels`` per axis; None when no voxel does."""
    size = np.asarray(image.GetSize())
    corners = np.array(
        [
            [(lo, hi)[i][0], (lo, hi)[j][1], (lo, hi)[k][2]]
            for i in (0, 1)
            for j in (0, 1)
            for k in (0, 1)
        ]
    )
    cont = np.array([image.TransformPhysicalPointToContinuousIndex(tuple(c)) for c in corners])
    first = np.floor(cont.min(axis=0)).astype(np.int64)
    last = np.ceil(cont.max(axis=0)).astype(np.int64)
    if np.any(last < 0) or np.any(first > size - 1):
        return None
    # Widen thin crops so the coarsest pyramid level keeps a few voxels along every axis.
    short = (last - first + 1) < min_voxels
    grow = np.where(short, (min_voxels - (last - first + 1) + 1) // 2, 0)
    first = np.maximum(first - grow, 0)
    last = np.minimum(last + grow, size - 1)
    if np.any(last < first):
        return None
    return [int(v) for v in (last - first + 1)], [int(v) for v in first]


def _crop_to_box(
    image: sitk.Image, lo: np.ndarray, hi: np.ndarray, min_voxels: int
) -> sitk.Image | None:
    """The part of ``image`` whose voxels fall in the LPS box (lo, hi), or None if none does."""
    region = _crop_index(image, lo, hi, min_voxels)
    return None if region is None else sitk.RegionOfInterest(image, *region)


def _smoothed(image: sitk.Image, sigma_mm: float, threads: int = _THREADS) -> sitk.Image:
    """Gaussian smoothing in millimetres (none for sigma 0)."""
    if sigma_mm <= 0:
        return image
    sigma = float(sigma_mm)
    spacing = image.GetSpacing()
    # Axes whose spacing is much coarser than sigma (across the slices of a thick-slice series)
    # are left unsmoothed. Where sigma spans two voxels or more, ITK's recursive (IIR) Gaussian
    # is accurate and costs the same whatever sigma (about four times less than a convolution
    # at sigma 4 voxels); it is inaccurate below about one voxel (ITK's
    # RecursiveGaussianImageFilter documentation), so the axes in between get the discrete
    # (convolution) Gaussian. Both compute each voxel on its own, so the result does not depend
    # on the thread count.
    recursive = [axis for axis, step in enumerate(spacing) if sigma >= 2.0 * step]
    discrete = [
        sigma**2 if step < 2.0 * sigma and axis not in recursive else 0.0
        for axis, step in enumerate(spacing)
    ]
    out = image
    if any(discrete):
        smoother = sitk.DiscreteGaussianImageFilter()
        smoother.SetVariance(discrete)
        smoother.SetUseImageSpacing(True)
        smoother.SetNumberOfThreads(threads)
        out = smoother.Execute(out)
    for axis in recursive:
        along = sitk.RecursiveGaussianImageFilter()
        along.SetSigma(sigma)
        along.SetDirection(axis)
        along.SetNumberOfThreads(threads)
        out = along.Execute(out)
    return out


def _physical_bounds(image: sitk.Image) -> tuple[np.ndarray, np.ndarray]:
    """The LPS box enclosing the centres of an image's corner voxels."""
    size = np.asarray(image.GetSize())
    corners = [
        image.TransformIndexToPhysicalPoint(
            (int(i * (size[0] - 1)), int(j * (size[1] - 1)), int(k * (size[2] - 1)))
        )
        for i in (0, 1)
        for j in (0, 1)
        for k in (0, 1)
    ]
    points = np.asarray(corners, dtype=np.float64)
    return points.min(axis=0), points.max(axis=0)


def _sampling_per_level(image: sitk.Image, settings: AlignmentSettings) -> list[float]:
    """The metric's sampling fraction on each pyramid level: ``sampling_percentage``, lowered
    where that would exceed ``max_samples`` points (a whole 1 mm head at full resolution holds
    millions of voxels; Mattes MI needs tens of thousands of samples, not millions)."""
    size = np.asarray(image.GetSize(), dtype=np.float64)
    fractions = []
    for shrink in settings.shrink_factors:
        voxels = float(np.prod(np.maximum(np.floor(size / shrink), 1.0)))
        fractions.append(min(settings.sampling_percentage, settings.max_samples / voxels))
    return fractions


def _rotation_angle_deg(matrix: np.ndarray) -> float:
    """Total rotation angle of a rotation matrix: arccos((trace - 1) / 2)."""
    cos = (float(np.trace(matrix)) - 1.0) / 2.0
    return math.degrees(math.acos(max(-1.0, min(1.0, cos))))


def _check_box(
    box_mm: tuple[np.ndarray, np.ndarray] | None,
) -> tuple[np.ndarray, np.ndarray] | None:
    if box_mm is None:
        return None
    lo = np.asarray(box_mm[0], dtype=np.float64).reshape(-1)
    hi = np.asarray(box_mm[1], dtype=np.float64).reshape(-1)
    if lo.shape != (3,) or hi.shape != (3,) or not np.all(lo <= hi):
        raise ValueError(
            f'Argument "box_mm" must be (lo, hi) with 3 values each and lo <= hi, got {box_mm!r}.'
        )
    return lo, hi


def _check_image(name: str, image: Any) -> None:
    if not isinstance(image, sitk.Image) or image.GetDimension() != 3:
        raise ValueError(f'Argument "{name}" must be a 3D SimpleITK image.')


@dataclass(frozen=True)
class _AnchorPyramid:
    """The anchor cropped to the ROIs' neighbourhood and smoothed once per pyramid level
    (not yet shrunk: each series crops it further to what it covers, then shrinks)."""

    base: sitk.Image  # float32 crop, unsmoothed
    levels: tuple[sitk.Image, ...]  # one smoothed copy of ``base`` per level
    box: tuple[np.ndarray, np.ndarray] | None  # the box with its margin; None: whole anchor


def _anchor_crop(
    fixed: sitk.Image, box: tuple[np.ndarray, np.ndarray] | None, settings: AlignmentSettings
) -> tuple[sitk.Image, tuple[np.ndarray, np.ndarray] | None] | None:
    """The part of the anchor the registration uses, in its own pixel type (the ROIs' box plus
    the margin, plus an apron for the smoothing), and the box with its margin; the whole anchor
    and None without a box; None when the box misses the anchor."""
    if box is None:
        return fixed, None
    lo, hi = box[0] - settings.margin_mm, box[1] + settings.margin_mm
    # Crop a little wider than needed, so that the Gaussian's edge effects stay outside what
    # the metric samples.
    apron = max(settings.smoothing_sigmas_mm, default=0.0) * 2.0
    cropped = _crop_to_box(fixed, lo - apron, hi + apron, _MIN_CROP_VOXELS)
    if cropped is None or _crop_index(fixed, lo, hi, _MIN_CROP_VOXELS) is None:
        return None
    return cropped, (lo, hi)


def _anchor_pyramid(
    crop: sitk.Image,
    wide: tuple[np.ndarray, np.ndarray] | None,
    settings: AlignmentSettings,
    threads: int,
) -> _AnchorPyramid:
    """The cropped anchor (:func:`_anchor_crop`; smoothing a whole 1 mm head is the slow part)
    in float32, smoothed once per level."""
    base = _binned(sitk.Cast(crop, sitk.sitkFloat32), settings.finest_spacing_mm, threads)
    levels = tuple(_smoothed(base, sigma, threads) for sigma in settings.smoothing_sigmas_mm)
    return _AnchorPyramid(base=base, levels=levels, box=wide)


def _binned(image: sitk.Image, finest_mm: float, threads: int) -> sitk.Image:
    """``image`` with its voxels averaged in bins of whole voxels, per axis, so that each
    axis' spacing is as close to ``finest_mm`` as whole voxels allow without exceeding it
    (0.5 mm -> 1 mm, 0.8 mm kept, 0.3 mm -> 0.9 mm; coarser axes kept). The pyramid's finest
    level then costs what a 1 mm anchor's does: ITK's per-level set-up and the anchor's
    smoothing grow with its voxel count, while the metric's 50,000 samples do not need
    sub-millimetre voxels (docs/performance.md, Registration). Binning averages, so it is also
    the anti-aliasing filter (ITK's BinShrinkImageFilter; the output's origin is the first
    bin's centre, so the geometry stays exact)."""
    if finest_mm <= 0:
        return image
    # A tiny tolerance: 0.5 mm stored as 0.49999999 still bins by 2.
    factors = [max(1, int(math.floor(finest_mm / step + 1e-6))) for step in image.GetSpacing()]
    factors = [
        max(1, min(f, n // _MIN_CROP_VOXELS)) for f, n in zip(factors, image.GetSize(), strict=True)
    ]
    if all(f == 1 for f in factors):
        return image
    shrinker = sitk.BinShrinkImageFilter()
    shrinker.SetShrinkFactors(factors)
    shrinker.SetNumberOfThreads(threads)
    return shrinker.Execute(image)


def _anchor_key(
    crop: sitk.Image, box: tuple[np.ndarray, np.ndarray] | None, settings: AlignmentSettings
) -> tuple[Hashable, ...]:
    """What the anchor pyramid depends on: the cropped anchor's voxels (a digest, not the
    object's identity, so a reloaded anchor hits too and a changed one misses; only the crop,
    so the cost does not grow with the anchor's size), its geometry and pixel type, the box
    and the settings."""
    voxels = sitk.GetArrayViewFromImage(crop)
    digest = hashlib.blake2b(np.ascontiguousarray(voxels).data, digest_size=16).hexdigest()
    geometry = (
        crop.GetSize(),
        crop.GetSpacing(),
        crop.GetOrigin(),
        crop.GetDirection(),
        crop.GetPixelID(),
        crop.GetNumberOfComponentsPerPixel(),
    )
    box_key = None if box is None else (tuple(map(float, box[0])), tuple(map(float, box[1])))
    return (digest, geometry, box_key, settings)


# The last few anchor pyramids (each a few MB: crops of the anchor), so that a caller
# registering its series one at a time (to hold one series in memory at once) pays for the
# anchor's smoothing once, not once per series.
_ANCHOR_CACHE_SIZE = 2
_ANCHOR_CACHE: OrderedDict[tuple[Hashable, ...], _AnchorPyramid] = OrderedDict()
_ANCHOR_CACHE_LOCK = threading.Lock()


def _cached_anchor_pyramid(
    fixed: sitk.Image, box: tuple[np.ndarray, np.ndarray] | None, settings: AlignmentSettings
) -> _AnchorPyramid | None:
    cropped = _anchor_crop(fixed, box, settings)
    if cropped is None:
        return None
    crop, wide = cropped
    key = _anchor_key(crop, box, settings)
    with _ANCHOR_CACHE_LOCK:
        if key in _ANCHOR_CACHE:
            _ANCHOR_CACHE.move_to_end(key)
            return _ANCHOR_CACHE[key]
    # Built outside the lock (it takes a fraction of a second); two callers racing on the
    # same anchor build the same pyramid, and either copy serves.
    anchor = _anchor_pyramid(crop, wide, settings, threads=os.cpu_count() or 1)
    with _ANCHOR_CACHE_LOCK:
        _ANCHOR_CACHE[key] = anchor
        _ANCHOR_CACHE.move_to_end(key)
        while len(_ANCHOR_CACHE) > _ANCHOR_CACHE_SIZE:
            _ANCHOR_CACHE.popitem(last=False)
    return anchor


def clear_anchor_cache() -> None:
    """Forget the anchor pyramids :func:`register_series` keeps between calls (memory only;
    results never depend on the cache)."""
    with _ANCHOR_CACHE_LOCK:
        _ANCHOR_CACHE.clear()


def _registration_method(
    settings: AlignmentSettings, fraction: float, learning_rate: float
) -> sitk.ImageRegistrationMethod:
    reg = sitk.ImageRegistrationMethod()
    reg.SetNumberOfThreads(_THREADS)
    reg.SetMetricAsMattesMutualInformation(numberOfHistogramBins=settings.histogram_bins)
    reg.SetMetricSamplingStrategy(reg.RANDOM)
    # Central differences for the moving image's gradient: ITK's default gradient filter is a
    # recursive Gaussian, inaccurate across the 5-6 mm slices of 2D series.
    reg.SetMetricUseMovingImageGradientFilter(False)
    reg.SetMetricSamplingPercentage(fraction, settings.seed)
    reg.SetInterpolator(sitk.sitkLinear)
    reg.SetOptimizerAsRegularStepGradientDescent(
        learningRate=learning_rate,
        minStep=settings.min_step,
        numberOfIterations=settings.max_iterations,
        relaxationFactor=0.5,
        gradientMagnitudeTolerance=1e-8,
    )
    reg.SetOptimizerScalesFromPhysicalShift()
    return reg


def _shrunk(image: sitk.Image, shrink: int) -> sitk.Image:
    if shrink <= 1:
        return image
    shrinker = sitk.BinShrinkImageFilter()
    shrinker.SetShrinkFactors([max(1, min(shrink, n // 4)) for n in image.GetSize()])
    shrinker.SetNumberOfThreads(_THREADS)
    return shrinker.Execute(image)


def _already_aligned(
    fixed_level: sitk.Image,
    moving_level: sitk.Image,
    center: tuple[float, ...],
    fraction: float,
    settings: AlignmentSettings,
) -> tuple[bool, float, float]:
    """Is the scanner's alignment already within ``aligned_tolerance_mm`` of the metric's
    optimum? Probes the metric one step either side of identity along each rigid parameter
    and puts the minimum of the parabola through the three values (Newton's step on the
    diagonal of the Hessian). Stops at the first parameter whose minimum lies farther.

    Returns (aligned, metric at identity, largest estimated offset in mm).
    """
    size = np.asarray(fixed_level.GetSize(), dtype=np.float64)
    spacing = np.asarray(fixed_level.GetSpacing(), dtype=np.float64)
    radius = float(np.linalg.norm((size - 1) * spacing) / 2.0)  # centre to corner, mm
    if radius <= 0:
        return False, math.nan, math.inf
    probe_mm = 1.0
    reg = _registration_method(settings, fraction, settings.learning_rate)

    def metric(params: list[float]) -> float:
        transform = sitk.Euler3DTransform()
        transform.SetCenter(center)
        transform.SetParameters(params)
        reg.SetInitialTransform(transform, inPlace=False)
        return float(reg.MetricEvaluate(fixed_level, moving_level))

    at_identity = metric([0.0] * 6)
    worst = 0.0
    # Euler3DTransform parameters: rotations (rad) about x, y, z, then the translation (mm).
    # A rotation of probe_mm / radius moves the crop's corner by probe_mm.
    for k in (3, 4, 5, 0, 1, 2):
        step = probe_mm / radius if k < 3 else probe_mm
        values = []
        for sign in (-1.0, 1.0):
            params = [0.0] * 6
            params[k] = sign * step
            values.append(metric(params))
        curvature = values[0] + values[1] - 2.0 * at_identity
        if not curvature > 0:
            return False, at_identity, math.inf  # not a minimum along this parameter
        offset_mm = abs(probe_mm * (values[0] - values[1]) / (2.0 * curvature))
        worst = max(worst, offset_mm)
        if offset_mm > settings.aligned_tolerance_mm:
            return False, at_identity, worst
    return True, at_identity, worst


def _register_prepared(
    anchor: _AnchorPyramid, moving: sitk.Image, settings: AlignmentSettings
) -> Alignment:
    """One series against the prepared anchor pyramid."""
    # Cast only what is used (the crop below), not a copy of the whole series per worker.
    moving_f = moving
    base, levels = anchor.base, anchor.levels
    if anchor.box is not None:
        # Keep the anchor crop inside what the moving series covers (a thick-slice 2D series
        # often covers less than the ROIs' neighbourhood): anchor samples that land outside the
        # moving image are dropped by the metric, and mutual information then rewards moving
        # away from the anatomy (less overlap), which makes the optimizer diverge.
        lo, hi = anchor.box
        moving_lo, moving_hi = _physical_bounds(moving_f)
        inset = settings.max_translation_mm
        lo = np.maximum(lo, moving_lo + inset)
        hi = np.minimum(hi, moving_hi - inset)
        region = None if np.any(hi <= lo) else _crop_index(base, lo, hi, _MIN_CROP_VOXELS)
        if region is None:
            return Alignment(
                method="identity",
                warnings=(
                    "rigid registration skipped: the series does not cover the ROIs' "
                    "neighbourhood; the scanner's frame of reference was kept",
                ),
            )
        base = sitk.RegionOfInterest(base, *region)
        levels = tuple(sitk.RegionOfInterest(level, *region) for level in levels)
        # The moving series only needs to cover where the anchor crop can land after a few mm
        # of motion (the box above already holds the margin), plus the smoothing's reach;
        # cropping it keeps the pyramid's smoothing cheap on large series.
        wide = 2.0 * settings.max_translation_mm + 2.0 * max(
            settings.smoothing_sigmas_mm, default=0.0
        )
        moving_crop = _crop_to_box(moving_f, lo - wide, hi + wide, _MIN_CROP_VOXELS)
        if moving_crop is not None:
            moving_f = moving_crop
    if moving_f.GetPixelID() != sitk.sitkFloat32:
        moving_f = sitk.Cast(moving_f, sitk.sitkFloat32)

    size = np.asarray(base.GetSize(), dtype=np.float64)
    center = base.TransformContinuousIndexToPhysicalPoint(tuple((size - 1) / 2.0))
    fractions = _sampling_per_level(base, settings)
    n_levels = len(settings.shrink_factors)

    # A coarse-to-fine pyramid built by hand: ITK's own pyramid shrinks the moving image by
    # the same factor as the fixed one, and a thick-slice 2D series (13 slices of 6 mm) shrunk
    # 4x keeps 3 slices, on which the coarse level diverges. Here only the anchor is shrunk
    # (it defines where the metric samples); the moving series is only smoothed, and is
    # interpolated at its own resolution.
    try:
        check = max(0, n_levels - 2)  # the second-finest level: smooth, yet detailed
        check_fixed = _shrunk(levels[check], settings.shrink_factors[check])
        check_moving = _smoothed(moving_f, settings.smoothing_sigmas_mm[check])
        aligned, at_identity, offset = _already_aligned(
            check_fixed, check_moving, center, fractions[check], settings
        )
        if aligned:
            final = sitk.Euler3DTransform()
            final.SetCenter(center)
            return Alignment(
                method="rigid",
                translation_mm=(0.0, 0.0, 0.0),
                rotation_deg=0.0,
                metric=at_identity,
                transform=final,
                notes=(
                    "already aligned with the anchor: the metric's optimum is within "
                    f"{offset:.2f} mm of the scanner's alignment (tolerance "
                    f"{settings.aligned_tolerance_mm:g} mm), so the optimizer was skipped",
                ),
                center_mm=tuple(float(v) for v in center),  # type: ignore[arg-type]
                matrix=tuple(float(v) for v in final.GetMatrix()),
            )
        start = sitk.Euler3DTransform()
        start.SetCenter(center)
        current: sitk.Transform = start
        for level, (shrink, sigma, fraction) in enumerate(
            zip(settings.shrink_factors, settings.smoothing_sigmas_mm, fractions, strict=True)
        ):
            fixed_level = check_fixed if level == check else _shrunk(levels[level], shrink)
            moving_level = check_moving if level == check else _smoothed(moving_f, sigma)
            reg = _registration_method(settings, fraction, settings.learning_rate / shrink)
            reg.SetInitialTransform(current, inPlace=False)
            result = reg.Execute(fixed_level, moving_level)
            step = sitk.Euler3DTransform()
            step.SetCenter(center)
            step.SetParameters(result.GetParameters())
            current = step
    except RuntimeError as exc:
        reason = str(exc).strip().splitlines()[-1] if str(exc).strip() else "unknown error"
        return Alignment(
            method="identity",
            warnings=(
                f"rigid registration failed ({reason}); the scanner's frame of reference was kept",
            ),
        )

    final = sitk.Euler3DTransform()
    final.SetCenter(center)
    final.SetParameters(current.GetParameters())
    matrix = np.asarray(final.GetMatrix(), dtype=np.float64).reshape(3, 3)
    translation = tuple(float(v) for v in final.GetTranslation())
    rotation = _rotation_angle_deg(matrix)
    metric = float(reg.GetMetricValue())
    # The finest level decides the answer; its stop condition says whether it converged.
    stop = reg.GetOptimizerStopConditionDescription()

    warnings: list[str] = []
    shift = float(np.linalg.norm(translation))
    if shift > settings.max_translation_mm:
        warnings.append(
            f"registration moved the series by {shift:.1f} mm (more than "
            f"{settings.max_translation_mm:g} mm): check the alignment on the images"
        )
    if rotation > settings.max_rotation_deg:
        warnings.append(
            f"registration rotated the series by {rotation:.1f} degrees (more than "
            f"{settings.max_rotation_deg:g}): check the alignment on the images"
        )
    if metric > settings.poor_metric:
        warnings.append(
            f"registration ended with a poor match (mutual information {metric:.3f}, above "
            f"{settings.poor_metric:g}): the alignment may be wrong"
        )
    if "Maximum number of iterations" in stop:
        warnings.append(
            f"registration optimizer stopped at its iteration cap ({settings.max_iterations}) "
            "on the finest level without converging: the alignment may be inexact"
        )
    return Alignment(
        method="rigid",
        translation_mm=translation,  # type: ignore[arg-type]
        rotation_deg=rotation,
        metric=metric,
        transform=final,
        warnings=tuple(warnings),
        center_mm=tuple(float(v) for v in final.GetCenter()),  # type: ignore[arg-type]
        matrix=tuple(float(v) for v in final.GetMatrix()),
    )


_GLOBAL_THREADS_LOCK = threading.Lock()
_GLOBAL_THREADS_USERS = 0
_GLOBAL_THREADS_SAVED = 0


@contextmanager
def _one_itk_thread() -> Iterator[None]:
    """ITK's global default thread count at 1 while any registration runs (restored after the
    last one ends, also when several callers overlap)."""
    global _GLOBAL_THREADS_USERS, _GLOBAL_THREADS_SAVED
    with _GLOBAL_THREADS_LOCK:
        if _GLOBAL_THREADS_USERS == 0:
            _GLOBAL_THREADS_SAVED = sitk.ProcessObject.GetGlobalDefaultNumberOfThreads()
            sitk.ProcessObject.SetGlobalDefaultNumberOfThreads(_THREADS)
        _GLOBAL_THREADS_USERS += 1
    try:
        yield
    finally:
        with _GLOBAL_THREADS_LOCK:
            _GLOBAL_THREADS_USERS -= 1
            if _GLOBAL_THREADS_USERS == 0:
                sitk.ProcessObject.SetGlobalDefaultNumberOfThreads(_GLOBAL_THREADS_SAVED)


_Key = TypeVar("_Key", bound=Hashable)

_OUTSIDE_ANCHOR = Alignment(
    method="identity",
    warnings=(
        "rigid registration skipped: the ROIs' neighbourhood is outside the anchor "
        "series; the scanner's frame of reference was kept",
    ),
)


def register_series(
    fixed: sitk.Image,
    movings: Mapping[_Key, sitk.Image],
    *,
    box_mm: tuple[np.ndarray, np.ndarray] | None = None,
    site_lexicon: Path | None = None,
    settings: AlignmentSettings | None = None,
    max_workers: int | None = None,
) -> dict[_Key, Alignment]:
    """Align every series of ``movings`` to the anchor ``fixed``, sharing the anchor's work.

    The anchor is cropped to ``box_mm`` plus the lexicon's margin and its smoothed pyramid is
    built once; each series is checked for being already aligned (the optimizer is then
    skipped and the alignment's ``notes`` say so), else registered as :func:`register_rigid`
    describes. Series run in parallel threads, each on one ITK thread, so the result is the
    same whatever the number of workers.

    The anchor's pyramid is also kept between calls (the last two anchors, keyed by a digest
    of the anchor's voxels, its geometry, the box and the settings), so calling this once per
    series, e.g. to hold one series in memory at a time, builds it once and gives bitwise the
    same alignments as one call for all series. :func:`clear_anchor_cache` frees it.

    Parameters
    ----------
    fixed : SimpleITK.Image
        The anchor series.
    movings : Mapping
        Key (e.g. the series' role) -> the series' image.
    box_mm, site_lexicon
        As for :func:`register_rigid`.
    settings : AlignmentSettings, optional
        Registration settings; None reads ``alignment.toml`` (the site's copy first).
    max_workers : int, optional
        Parallel registrations; None: the machine's core count (at most the number of series).

    Returns
    -------
    dict
        Key -> :class:`sigreport.model.Alignment`, in the order of ``movings``.
    """
    _check_image("fixed", fixed)
    for image in movings.values():
        _check_image("moving", image)
    box = _check_box(box_mm)
    if settings is None:
        settings = load_settings(site_lexicon)
    if not movings:
        return {}
    workers = max_workers if max_workers is not None else (os.cpu_count() or 1)
    workers = max(1, min(int(workers), len(movings)))
    anchor = _cached_anchor_pyramid(fixed, box, settings)
    if anchor is None:
        return {key: _OUTSIDE_ANCHOR for key in movings}
    # Some of ITK's registration components take their thread count from the global default,
    # not from the registration method: one thread for all of them while the series run.
    with _one_itk_thread():
        if workers == 1:
            return {
                key: _register_prepared(anchor, image, settings) for key, image in movings.items()
            }
        with ThreadPoolExecutor(max_workers=workers) as pool:
            futures = {
                key: pool.submit(_register_prepared, anchor, image, settings)
                for key, image in movings.items()
            }
            return {key: future.result() for key, future in futures.items()}


def register_rigid(
    fixed: sitk.Image,
    moving: sitk.Image,
    *,
    box_mm: tuple[np.ndarray, np.ndarray] | None = None,
    site_lexicon: Path | None = None,
    settings: AlignmentSettings | None = None,
) -> Alignment:
    """Align ``moving`` (a series) to ``fixed`` (the anchor) by a rigid transform.

    Parameters
    ----------
    fixed : SimpleITK.Image
        The anchor series.
    moving : SimpleITK.Image
        Another series of the same patient.
    box_mm : (numpy.ndarray, numpy.ndarray), optional
        ``(lo, hi)`` LPS box of the region to align on, e.g. the union of the ROIs'
        ``bounds_mm()``; ``margin_mm`` of ``alignment.toml`` is added on every side. None: the
        whole anchor.
    site_lexicon : pathlib.Path, optional
        A site lexicon folder whose ``alignment.toml`` replaces the bundled one.
    settings : AlignmentSettings, optional
        Registration settings; None reads ``alignment.toml`` (``site_lexicon`` first).

    Returns
    -------
    sigreport.model.Alignment
        ``method="rigid"``; ``transform`` (a ``SimpleITK.Euler3DTransform`` centred on the box)
        maps anchor points to this series' points; ``translation_mm`` is how far the box centre
        moved, ``rotation_deg`` the total rotation angle, ``metric`` the final Mattes mutual
        information (negated by ITK: lower is better). ``warnings`` name a large motion, a poor
        final metric or an optimizer that hit its iteration cap; ``notes`` say when the series
        was found already aligned and the optimizer skipped (identity transform). When
        registration cannot run (no overlap), the result is ``method="identity"`` with a
        warning saying so.

    Raises
    ------
    ValueError
        When the images are not 3D, or ``box_mm`` is not two 3-vectors with lo <= hi.
    sigreport.errors.InputError
        When the lexicon's ``alignment.toml`` is invalid.
    """
    return register_series(
        fixed,
        {0: moving},
        box_mm=box_mm,
        site_lexicon=site_lexicon,
        settings=settings,
        max_workers=1,
    )[0]

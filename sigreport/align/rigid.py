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
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import SimpleITK as sitk

from sigreport.errors import InputError
from sigreport.lexicon import check_keys, read_table
from sigreport.model import Alignment

__all__ = ["register_rigid", "identity_alignment", "AlignmentSettings", "load_settings"]

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
    max_translation_mm: float
    max_rotation_deg: float
    poor_metric: float


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
}
_QC_KEYS = {"max_translation_mm", "max_rotation_deg", "poor_metric"}


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
    check_keys(reg, _REGISTRATION_KEYS, "alignment.toml [registration]")
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
        max_translation_mm=_number(qc, "max_translation_mm", "alignment.toml [qc]"),
        max_rotation_deg=_number(qc, "max_rotation_deg", "alignment.toml [qc]"),
        poor_metric=_number(qc, "poor_metric", "alignment.toml [qc]", positive=False),
    )


def identity_alignment(method: str = "identity") -> Alignment:
    """No motion: the series is read in the anchor's patient space as it is."""
    return Alignment(method=method, transform=None)


def _crop_to_box(
    image: sitk.Image, lo: np.ndarray, hi: np.ndarray, min_voxels: int
) -> sitk.Image | None:
    """The part of ``image`` whose voxels fall in the LPS box (lo, hi), or None if none does."""
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
    return sitk.RegionOfInterest(
        image,
        [int(v) for v in (last - first + 1)],
        [int(v) for v in first],
    )


def _smoothed(image: sitk.Image, sigma_mm: float) -> sitk.Image:
    """Gaussian smoothing in millimetres (none for sigma 0)."""
    if sigma_mm <= 0:
        return image
    # Discrete (not recursive) Gaussian: the recursive filter is inaccurate when sigma is below
    # the voxel spacing, as it is across the slices of a thick-slice series. Axes whose spacing
    # is much coarser than sigma are left unsmoothed.
    variance = [
        float(sigma_mm) ** 2 if spacing < 2.0 * sigma_mm else 0.0 for spacing in image.GetSpacing()
    ]
    return sitk.DiscreteGaussian(image, variance=variance, useImageSpacing=True)


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
        A site lexicon folder whose ``alignment.toml`` replaces the bundled one; read only when
        ``settings`` is not given.
    settings : AlignmentSettings, optional
        The run's registration settings (``Lexicon.alignment``), loaded once for every series.

    Returns
    -------
    sigreport.model.Alignment
        ``method="rigid"``; ``transform`` (a ``SimpleITK.Euler3DTransform`` centred on the box)
        maps anchor points to this series' points; ``translation_mm`` is how far the box centre
        moved, ``rotation_deg`` the total rotation angle, ``metric`` the final Mattes mutual
        information (negated by ITK: lower is better). ``warnings`` name a large motion, a poor
        final metric or an optimizer that hit its iteration cap. When registration cannot run
        (no overlap), the result is ``method="identity"`` with a warning saying so.

    Raises
    ------
    ValueError
        When the images are not 3D, or ``box_mm`` is not two 3-vectors with lo <= hi.
    sigreport.errors.InputError
        When the lexicon's ``alignment.toml`` is invalid.
    """
    for name, image in (("fixed", fixed), ("moving", moving)):
        if not isinstance(image, sitk.Image) or image.GetDimension() != 3:
            raise ValueError(f'Argument "{name}" must be a 3D SimpleITK image.')
    if settings is None:
        settings = load_settings(site_lexicon)
    fixed_f = sitk.Cast(fixed, sitk.sitkFloat32)
    moving_f = sitk.Cast(moving, sitk.sitkFloat32)

    if box_mm is not None:
        lo = np.asarray(box_mm[0], dtype=np.float64).reshape(-1)
        hi = np.asarray(box_mm[1], dtype=np.float64).reshape(-1)
        if lo.shape != (3,) or hi.shape != (3,) or not np.all(lo <= hi):
            raise ValueError(
                f'Argument "box_mm" must be (lo, hi) with 3 values each and lo <= hi, got {box_mm!r}.'
            )
        lo = lo - settings.margin_mm
        hi = hi + settings.margin_mm
        cropped = _crop_to_box(fixed_f, lo, hi, _MIN_CROP_VOXELS)
        if cropped is None:
            return Alignment(
                method="identity",
                warnings=(
                    "rigid registration skipped: the ROIs' neighbourhood is outside the anchor "
                    "series; the scanner's frame of reference was kept",
                ),
            )
        # Keep the anchor crop inside what the moving series covers (a thick-slice 2D series
        # often covers less than the ROIs' neighbourhood): anchor samples that land outside the
        # moving image are dropped by the metric, and mutual information then rewards moving
        # away from the anatomy (less overlap), which makes the optimizer diverge.
        moving_lo, moving_hi = _physical_bounds(moving_f)
        inset = settings.max_translation_mm
        lo = np.maximum(lo, moving_lo + inset)
        hi = np.minimum(hi, moving_hi - inset)
        if np.any(hi <= lo) or (cropped := _crop_to_box(fixed_f, lo, hi, _MIN_CROP_VOXELS)) is None:
            return Alignment(
                method="identity",
                warnings=(
                    "rigid registration skipped: the series does not cover the ROIs' "
                    "neighbourhood; the scanner's frame of reference was kept",
                ),
            )
        fixed_f = cropped
        # The moving series only needs to cover where the anchor crop can land after a few mm
        # of motion; cropping it keeps the pyramid's smoothing cheap on large series.
        wide = settings.margin_mm + 2.0 * settings.max_translation_mm
        moving_crop = _crop_to_box(moving_f, lo - wide, hi + wide, _MIN_CROP_VOXELS)
        if moving_crop is not None:
            moving_f = moving_crop

    size = np.asarray(fixed_f.GetSize(), dtype=np.float64)
    center = fixed_f.TransformContinuousIndexToPhysicalPoint(tuple((size - 1) / 2.0))
    initial = sitk.Euler3DTransform()
    initial.SetCenter(center)

    # A coarse-to-fine pyramid built by hand: ITK's own pyramid shrinks the moving image by
    # the same factor as the fixed one, and a thick-slice 2D series (13 slices of 6 mm) shrunk
    # 4x keeps 3 slices, on which the coarse level diverges. Here only the anchor is shrunk
    # (it defines where the metric samples); the moving series is only smoothed, and is
    # interpolated at its own resolution.
    previous_threads = sitk.ProcessObject.GetGlobalDefaultNumberOfThreads()
    sitk.ProcessObject.SetGlobalDefaultNumberOfThreads(_THREADS)
    current: sitk.Transform = initial
    try:
        for shrink, sigma, fraction in zip(
            settings.shrink_factors,
            settings.smoothing_sigmas_mm,
            _sampling_per_level(fixed_f, settings),
            strict=True,
        ):
            fixed_level = _smoothed(fixed_f, sigma)
            if shrink > 1:
                fixed_level = sitk.BinShrink(
                    fixed_level, [max(1, min(shrink, n // 4)) for n in fixed_level.GetSize()]
                )
            moving_level = _smoothed(moving_f, sigma)
            reg = sitk.ImageRegistrationMethod()
            reg.SetNumberOfThreads(_THREADS)
            reg.SetMetricAsMattesMutualInformation(numberOfHistogramBins=settings.histogram_bins)
            reg.SetMetricSamplingStrategy(reg.RANDOM)
            # Central differences for the moving image's gradient: ITK's default gradient
            # filter is a recursive Gaussian, inaccurate across the 5-6 mm slices of 2D series.
            reg.SetMetricUseMovingImageGradientFilter(False)
            reg.SetMetricSamplingPercentage(fraction, settings.seed)
            reg.SetInterpolator(sitk.sitkLinear)
            reg.SetOptimizerAsRegularStepGradientDescent(
                learningRate=settings.learning_rate / shrink,
                minStep=settings.min_step,
                numberOfIterations=settings.max_iterations,
                relaxationFactor=0.5,
                gradientMagnitudeTolerance=1e-8,
            )
            reg.SetOptimizerScalesFromPhysicalShift()
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
    finally:
        sitk.ProcessObject.SetGlobalDefaultNumberOfThreads(previous_threads)
    result = current

    final = sitk.Euler3DTransform()
    final.SetCenter(center)
    final.SetParameters(result.GetParameters())
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

"""Robust statistics of an ROI on one series, and the shell / core split of lesion ROIs.

Arrays are in numpy (z, y, x) order, as ``SimpleITK.GetArrayFromImage`` returns them; spacings
are in (x, y, z) order, as ``SimpleITK.Image.GetSpacing`` returns them.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import SimpleITK as sitk

from sigreport.model import RoiStats, Role, SeriesMeasurement

if TYPE_CHECKING:
    from sigreport.measure.rules import Rules


def weighted_percentile(values: np.ndarray, weights: np.ndarray | None, q: float) -> float:
    """The ``q``-th percentile (0-100) of ``values`` with non-negative ``weights``.

    Definition (the weighted percentile with C = 1, Wikipedia "Percentile", section "Weighted
    percentile"): sort the values, give the k-th (1-based) the position
    ``p_k = (S_k - w_k) / (S_N - w_N)`` where ``S_k`` is the cumulative weight, and interpolate
    linearly between positions. With equal weights ``p_k = (k - 1) / (N - 1)``, which is
    numpy's default ``"linear"`` method, so the unweighted case equals ``numpy.percentile``.
    Zero weights are dropped first.
    """
    v = np.asarray(values, dtype=np.float64).ravel()
    if not 0.0 <= q <= 100.0:
        raise ValueError(f'Argument "q" must be in [0, 100], got {q!r}.')
    if weights is None:
        if v.size == 0:
            raise ValueError('Argument "values" must not be empty.')
        return float(np.percentile(v, q))
    w = np.asarray(weights, dtype=np.float64).ravel()
    if w.shape != v.shape:
        raise ValueError(f'Argument "weights" must have shape {v.shape}, got {w.shape}.')
    keep = w > 0
    v, w = v[keep], w[keep]
    if v.size == 0:
        raise ValueError('Argument "weights" must have a positive entry.')
    order = np.argsort(v, kind="stable")
    v, w = v[order], w[order]
    if v.size == 1:
        return float(v[0])
    cum = np.cumsum(w)
    positions = (cum - w) / (cum[-1] - w[-1])
    return float(np.interp(q / 100.0, positions, v))


def roi_stats(
    values: np.ndarray, mask: np.ndarray, weights: np.ndarray | None = None
) -> RoiStats | None:
    """Mean, median, sd, 5th and 95th percentiles of ``values`` inside ``mask``.

    Parameters
    ----------
    values, mask, weights
        Arrays of one shape. ``mask`` is boolean (non-zero is inside); ``weights`` are
        non-negative partial-volume weights (e.g. the fraction of each voxel inside the ROI).
        Values inside the mask must be finite.

    Returns
    -------
    RoiStats or None
        ``n_voxels`` is ``mask.sum()``. With weights: weighted mean; weighted sd with the
        reliability-weights correction ``sqrt(sum w (x - m)^2 / (V1 - V2 / V1))``
        (V1 = sum w, V2 = sum w^2), which is the sample sd (ddof = 1) when weights are equal,
        as SimpleITK's ``LabelStatisticsImageFilter`` sigma is; percentiles by
        :func:`weighted_percentile`. None when the mask is empty or its weights are all zero.
    """
    values = np.asarray(values)
    mask = np.asarray(mask).astype(bool)
    if mask.shape != values.shape:
        raise ValueError(f'Argument "mask" must have shape {values.shape}, got {mask.shape}.')
    n = int(np.count_nonzero(mask))
    if n == 0:
        return None
    x = values[mask].astype(np.float64)
    if not np.all(np.isfinite(x)):
        raise ValueError(
            f'Argument "values" has {int(np.count_nonzero(~np.isfinite(x)))} non-finite '
            "value(s) inside the mask."
        )
    if weights is None:
        w = None
        mean = float(x.mean())
        sd = float(x.std(ddof=1)) if n > 1 else 0.0
    else:
        weights = np.asarray(weights)
        if weights.shape != values.shape:
            raise ValueError(
                f'Argument "weights" must have shape {values.shape}, got {weights.shape}.'
            )
        w = weights[mask].astype(np.float64)
        if not np.all(np.isfinite(w)) or np.any(w < 0):
            raise ValueError('Argument "weights" must be finite and non-negative inside the mask.')
        v1 = float(w.sum())
        if v1 <= 0.0:
            return None
        mean = float(np.sum(w * x) / v1)
        v2 = float(np.sum(w * w))
        denom = v1 - v2 / v1
        sd = float(np.sqrt(np.sum(w * (x - mean) ** 2) / denom)) if denom > 0 else 0.0
    return RoiStats(
        n_voxels=n,
        mean=mean,
        median=weighted_percentile(x, w, 50.0),
        sd=sd,
        p05=weighted_percentile(x, w, 5.0),
        p95=weighted_percentile(x, w, 95.0),
    )


def inner_depth_mm(mask: np.ndarray, spacing_mm: tuple[float, float, float]) -> np.ndarray:
    """Physical depth of each voxel inside ``mask``: the distance (mm) from its centre to the
    centre of the nearest voxel outside the mask; 0 outside.

    Computed with SimpleITK's ``SignedMaurerDistanceMap`` (exact Euclidean distance, using the
    image spacing) on the complement of the mask, padded with one layer of outside voxels so
    that the edge of the array counts as outside. A voxel on the ROI's surface has the depth of
    one voxel spacing.
    """
    m = np.asarray(mask).astype(bool)
    padded = np.pad(~m, 1, constant_values=True).astype(np.uint8)
    image = sitk.GetImageFromArray(padded)
    image.SetSpacing(tuple(float(s) for s in spacing_mm))
    distance = sitk.SignedMaurerDistanceMap(
        image, insideIsPositive=False, squaredDistance=False, useImageSpacing=True
    )
    # Outside the complement (i.e. inside the ROI) the map is the distance to the complement's
    # contour, which consists of outside voxels bordering the ROI: the depth we want.
    depth = sitk.GetArrayFromImage(distance)[1:-1, 1:-1, 1:-1].astype(np.float64)
    return np.where(m, np.maximum(depth, 0.0), 0.0)


def shell_core_masks(
    mask: np.ndarray,
    spacing_mm: tuple[float, float, float],
    *,
    shell_fraction: float = 1.0 / 3.0,
) -> tuple[np.ndarray, np.ndarray]:
    """Split an ROI into its outer shell and its core by physical depth.

    The shell is every voxel whose depth (:func:`inner_depth_mm`) is at most
    ``max(shell_fraction * largest depth, smallest spacing)``: the outer ``shell_fraction`` of
    the ROI's inscribed radius, and never less than the surface layer. The core is the rest.
    """
    if not 0.0 < shell_fraction < 1.0:
        raise ValueError(f'Argument "shell_fraction" must be in (0, 1), got {shell_fraction!r}.')
    m = np.asarray(mask).astype(bool)
    if not m.any():
        return m.copy(), m.copy()
    # The distance map only over the ROI's bounding box: inner_depth_mm pads it with outside
    # voxels, so the depths are the same as over the whole array, at a fraction of the cost.
    nonzero = np.nonzero(m)
    box = tuple(slice(int(ix.min()), int(ix.max()) + 1) for ix in nonzero)
    depth = np.zeros(m.shape, dtype=np.float64)
    depth[box] = inner_depth_mm(m[box], spacing_mm)
    thickness = max(shell_fraction * float(depth[m].max()), float(min(spacing_mm)))
    # A small tolerance so that a voxel exactly at the thickness (in floating point) is shell.
    shell = m & (depth <= thickness * (1.0 + 1e-9))
    return shell, m & ~shell


def measure_roi(
    values: np.ndarray,
    mask: np.ndarray,
    weights: np.ndarray | None,
    spacing_mm: tuple[float, float, float],
    *,
    lesion: bool,
    min_voxels: int,
    rules: Rules | None = None,
    shell_fraction: float | None = None,
    min_part_voxels: int | None = None,
    roi_id: str | None = None,
    role: Role | str | None = None,
) -> SeriesMeasurement:
    """Measure one ROI on one series.

    Parameters
    ----------
    values
        The series' rescaled values, numpy (z, y, x) order.
    mask, weights
        The ROI sampled on the series' grid (same shape; weights may be None).
    spacing_mm
        Voxel spacing in (x, y, z) order (``SimpleITK.Image.GetSpacing``).
    lesion
        Also measure the outer shell and the core (for the enhancement pattern).
    min_voxels
        Fewest voxels for the ROI to be measured (the lexicon's ``[measure] min_voxels``).
    rules
        The lexicon; its ``[measure] shell_fraction`` and ``min_part_voxels`` shape the shell
        and core. None loads the bundled (or ``$SIGREPORT_LEXICON``) lexicon when needed.
    shell_fraction, min_part_voxels
        Override the lexicon: shell thickness as a fraction of the ROI's inscribed radius, and
        the fewest voxels of the shell and of the core (shell and core are None when either
        part has fewer).
    roi_id, role
        Only used to word the note.

    Returns
    -------
    SeriesMeasurement
        ``stats`` None with a ``note`` when fewer than ``min_voxels`` voxels (with a finite
        value) are inside; voxels whose value is not finite (outside the series' field of view)
        are left out, and the note says how many.
    """
    values = np.asarray(values)
    m = np.asarray(mask).astype(bool)
    if m.shape != values.shape:
        raise ValueError(f'Argument "mask" must have shape {values.shape}, got {m.shape}.')
    if len(spacing_mm) != 3 or min(spacing_mm) <= 0:
        raise ValueError(f'Argument "spacing_mm" must be 3 positive values, got {spacing_mm!r}.')
    if min_voxels < 1:
        raise ValueError(f'Argument "min_voxels" must be >= 1, got {min_voxels!r}.')
    label = ""
    if roi_id is not None:
        label = f" of {roi_id}"
    if role is not None:
        label += f" on {Role(role).value if isinstance(role, Role) else role}"
    finite = np.isfinite(values)
    outside = int(np.count_nonzero(m & ~finite))
    m = m & finite
    if weights is not None:
        weights = np.asarray(weights)
        if weights.shape != values.shape:
            raise ValueError(
                f'Argument "weights" must have shape {values.shape}, got {weights.shape}.'
            )
    n = int(np.count_nonzero(m))
    fov_note = f"{outside} voxels{label} outside the field of view" if outside else None
    if n < min_voxels:
        note = f"only {n} voxels{label} (minimum {min_voxels})"
        if fov_note:
            note += f"; {fov_note}"
        return SeriesMeasurement(stats=None, note=note)
    stats = roi_stats(values, m, weights)
    if stats is None:
        return SeriesMeasurement(stats=None, note=f"all {n} voxels{label} have zero weight")
    shell = core = None
    if lesion:
        if rules is None and (shell_fraction is None or min_part_voxels is None):
            from sigreport.measure.rules import load_rules

            rules = load_rules()
        if shell_fraction is None:
            shell_fraction = rules.thresholds.measure.shell_fraction  # type: ignore[union-attr]
        if min_part_voxels is None:
            min_part_voxels = rules.thresholds.measure.min_part_voxels  # type: ignore[union-attr]
        shell_mask, core_mask = shell_core_masks(m, spacing_mm, shell_fraction=shell_fraction)
        if min(int(shell_mask.sum()), int(core_mask.sum())) >= min_part_voxels:
            shell = roi_stats(values, shell_mask, weights)
            core = roi_stats(values, core_mask, weights)
    return SeriesMeasurement(stats=stats, shell=shell, core=core, note=fov_note)

"""The noise floor of a magnitude MR image, from its background air.

In a magnitude image the real and imaginary channels carry Gaussian noise of one sigma; where
there is no signal (air) the magnitude follows a Rayleigh distribution, whose mode is sigma and
whose mean is ``sigma * sqrt(pi / 2)`` (Gudbjartsson H, Patz S. The Rician distribution of noisy
MRI data. Magn Reson Med 1995;34:910-914; also Henkelman RM, Med Phys 1985;12:232. The
relations are standard and quoted here from memory).

Method (this module's own, built on those relations):

1. Keep finite, strictly positive voxels (exact zeros are treated as "no data": zero-filled
   regions outside the reconstructed field of view or scanner masking are not Rayleigh noise).
2. First guess: the mode of the histogram of the darker half of the voxels (the background's
   Rayleigh peak, at sigma, dominates the low end of the histogram of an image with air).
3. Refine by a fixed-point iteration on the voxels below ``a * sigma`` (a = 2): for a Rayleigh
   truncated at ``a * sigma`` the second moment is
   ``E[x^2 | x < a s] = s^2 (2 - (a^2 + 2) exp(-a^2 / 2)) / (1 - exp(-a^2 / 2))``, solved for s.
4. Accept only when the selected voxels look Rayleigh: enough of them, and their coefficient of
   variation within a tolerance of the truncated Rayleigh's (about 0.44 at a = 2). A narrow
   tissue peak (no air in the field of view) has a much smaller CV and is rejected (None).
"""

from __future__ import annotations

import math

import numpy as np

#: Truncation point in units of sigma: 86 % of the background lies below it. A lower point
#: keeps dark tissue (CSF on T1, fat-suppressed fat) out of the fit; 3 sigma let it in and
#: overestimated sigma by 60 % on a synthetic 3D fat-suppressed gradient echo.
_A = 2.0


def _truncated_rayleigh_moments(a: float) -> tuple[float, float]:
    """First and second moments (sigma = 1) of a Rayleigh distribution truncated at ``a``.

    ``int_0^a x^2 exp(-x^2/2) dx = sqrt(pi/2) erf(a / sqrt 2) - a exp(-a^2/2)`` and
    ``int_0^a x^3 exp(-x^2/2) dx = 2 - (a^2 + 2) exp(-a^2/2)`` (integration by parts), each
    divided by the truncated mass ``1 - exp(-a^2/2)``.
    """
    e = math.exp(-a * a / 2.0)
    mass = 1.0 - e
    m1 = (math.sqrt(math.pi / 2.0) * math.erf(a / math.sqrt(2.0)) - a * e) / mass
    m2 = (2.0 - (a * a + 2.0) * e) / mass
    return m1, m2


def median_in_place(values: np.ndarray) -> float:
    """The median of a 1D array, as ``numpy.median`` gives it for the array in float64 (the
    middle value, or the float64 mean of the middle two), without a float64 copy: ``values``
    is partitioned in place (its order is lost)."""
    n = values.size
    if n == 0:
        raise ValueError('Argument "values" must not be empty.')
    half = n // 2
    if n % 2:
        values.partition(half)
        return float(values[half])
    values.partition((half - 1, half))
    return float(np.mean(values[half - 1 : half + 1].astype(np.float64)))


def _below(values: np.ndarray, limit: float, *, inclusive: bool = False) -> np.ndarray:
    """``values < limit`` (``<=`` when ``inclusive``) compared in float64 whatever the type of
    ``values``: a float32 comparison would round ``limit`` to float32 first."""
    compare = np.less_equal if inclusive else np.less
    return compare(values, limit, signature="dd->?")


# Voxels gathered per block (bounds the image-type copy of a block to 16 MiB of float32).
_BLOCK = 1 << 22


def _gather(
    flat: np.ndarray, keep: np.ndarray, limit: float, *, inclusive: bool = False
) -> np.ndarray:
    """The kept voxels below ``limit`` (:func:`_below`), as float64 in the image's order,
    gathered a block at a time: no copy of the whole image in its type besides the result."""
    mask = _below(flat, limit, inclusive=inclusive)
    mask &= keep
    out = np.empty(int(np.count_nonzero(mask)), dtype=np.float64)
    filled = 0
    for start in range(0, flat.size, _BLOCK):
        part = flat[start : start + _BLOCK][mask[start : start + _BLOCK]]
        out[filled : filled + part.size] = part
        filled += part.size
    return out


def _std_in_place(values: np.ndarray, mean: float) -> float:
    """``numpy.std(values)`` (population) given ``numpy.mean(values)``, the deviations squared
    in ``values`` itself as numpy squares them in a copy: the same double, without the copy
    (``values`` is overwritten)."""
    np.subtract(values, mean, out=values)
    np.square(values, out=values)
    return math.sqrt(float(np.sum(values)) / values.size)


def noise_sigma(
    values: np.ndarray,
    *,
    min_background_voxels: int = 200,
    min_background_fraction: float = 0.02,
    cv_tolerance: float = 0.25,
    max_iterations: int = 100,
) -> float | None:
    """Gaussian sigma of the complex noise, estimated from the background of a magnitude image.

    Parameters
    ----------
    values
        The magnitude image (any shape), rescaled values.
    min_background_voxels, min_background_fraction
        The fewest background voxels (count, and fraction of the positive voxels) for an
        estimate; defaults 200 and 2 %.
    cv_tolerance
        Relative tolerance on the coefficient of variation of the selected voxels against a
        truncated Rayleigh's (default 0.25, i.e. 25 %).
    max_iterations
        Cap on the fixed-point iterations (default 100).

    Returns
    -------
    float or None
        Sigma in the image's units; None when no Rayleigh background can be found.
    """
    # The image is read in its own type (float32 for a loaded series) and never copied whole:
    # each step gathers the voxels it reads as float64 (an exact conversion), in the image's
    # order, and compares in float64 (_below), so every value is the one a float64 copy of the
    # whole image would give.
    flat = np.asarray(values).ravel()
    keep = np.isfinite(flat)
    keep &= flat > 0
    n = int(np.count_nonzero(keep))
    if n < min_background_voxels:
        return None
    median = median_in_place(flat[keep])
    m1, m2 = _truncated_rayleigh_moments(_A)
    expected_cv = math.sqrt(m2 - m1 * m1) / m1

    dark = _gather(flat, keep, median, inclusive=True)
    top = float(dark.max())
    if top <= 0:
        return None
    counts, edges = np.histogram(dark, bins=128, range=(0.0, top))
    del dark
    peak = int(np.argmax(counts))
    sigma = max(0.5 * (edges[peak] + edges[peak + 1]), edges[1] - edges[0])

    for _ in range(max_iterations):
        selected = _gather(flat, keep, _A * sigma)
        if selected.size == 0:
            return None
        np.multiply(selected, selected, out=selected)
        new = math.sqrt(float(np.mean(selected)) / m2)
        del selected
        converged = abs(new - sigma) <= 1e-6 * sigma
        sigma = new
        if converged:
            break

    selected = _gather(flat, keep, _A * sigma)
    if selected.size < max(min_background_voxels, min_background_fraction * n):
        return None
    mean = float(np.mean(selected))
    cv = _std_in_place(selected, mean) / mean
    if abs(cv - expected_cv) > cv_tolerance * expected_cv:
        return None
    return float(sigma)

"""The noise floor from a synthetic Rician background of known sigma.

Magnitude of complex Gaussian noise: |S + n_re + i n_im| with n ~ N(0, sigma^2) on each channel
(Gudbjartsson & Patz 1995, Magn Reson Med 34:910): Rayleigh where S = 0.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from sigreport.measure import noise_sigma
from sigreport.measure.noise import median_in_place


def _phantom(sigma: float, background_fraction: float, signal: float, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    shape = (16, 64, 64)
    _, yy, xx = np.indices(shape, dtype=float)
    r = np.hypot((yy - 31.5) / 32.0, (xx - 31.5) / 32.0)
    radius = 2.0 * np.sqrt((1.0 - background_fraction) / np.pi)
    clean = np.where(r < radius, signal * (1.0 + 0.3 * np.sin(xx / 5.0)), 0.0)
    noisy = clean + rng.normal(0, sigma, shape) + 1j * rng.normal(0, sigma, shape)
    return np.abs(noisy)


@pytest.mark.parametrize(
    ("sigma", "background", "signal"),
    [(12.0, 0.5, 800.0), (5.0, 0.2, 300.0), (20.0, 0.8, 1000.0), (3.0, 0.4, 100.0)],
)
def test_sigma_of_a_rician_background_within_three_percent(sigma, background, signal):
    image = _phantom(sigma, background, signal)
    assert noise_sigma(image) == pytest.approx(sigma, rel=0.03)


def test_integer_stored_values_still_estimate_sigma():
    # Stored MR pixels are integers: rounding adds variance 1/12, negligible at sigma 8.
    image = np.round(_phantom(8.0, 0.5, 600.0, seed=4)).astype(np.uint16)
    assert noise_sigma(image) == pytest.approx(8.0, rel=0.03)


def test_sigma_scales_with_the_image():
    image = _phantom(10.0, 0.5, 700.0, seed=2)
    assert noise_sigma(image * 3.5) == pytest.approx(3.5 * noise_sigma(image), rel=1e-6)


def test_no_background_gives_none():
    # Tissue fills the field of view: a narrow Gaussian peak, not a Rayleigh background.
    tissue = np.random.default_rng(1).normal(1000.0, 20.0, (16, 64, 64))
    assert noise_sigma(tissue) is None


def test_zero_filled_background_gives_none():
    image = np.zeros((16, 64, 64))
    image[:, 8:56, 8:56] = np.random.default_rng(2).normal(800.0, 20.0, (16, 48, 48))
    assert noise_sigma(image) is None


def test_too_few_voxels_gives_none():
    assert noise_sigma(np.array([1.0, 2.0, 3.0])) is None


def test_dark_tissue_next_to_the_background_does_not_inflate_sigma():
    # A quarter of the field is dark tissue at 4 sigma (e.g. CSF on a T1 gradient echo, or
    # suppressed fat): its Rician values overlap the upper tail of the Rayleigh background.
    rng = np.random.default_rng(9)
    sigma = 10.0
    shape = (12, 64, 64)
    clean = np.zeros(shape)
    clean[:, :, 24:40] = 4.0 * sigma
    clean[:, :, 40:] = 600.0
    image = np.abs(clean + rng.normal(0, sigma, shape) + 1j * rng.normal(0, sigma, shape))
    assert noise_sigma(image) == pytest.approx(sigma, rel=0.05)


@pytest.mark.parametrize("n", [1, 2, 7, 8, 1001, 1000])
@pytest.mark.parametrize("dtype", [np.float32, np.float64, np.int16])
def test_median_in_place_is_numpys_median_in_float64(n, dtype):
    # numpy.median of the float64 values is the oracle, to the last bit; duplicates included.
    rng = np.random.default_rng(n)
    values = (rng.normal(100.0, 30.0, n) * 7.3).astype(dtype)
    values[: n // 3] = values[-1]
    want = np.median(values.astype(np.float64))
    assert median_in_place(values.copy()) == want
    with pytest.raises(ValueError, match='"values" must not be empty'):
        median_in_place(np.zeros(0, dtype=dtype))


def _sigma_in_float64(values: np.ndarray) -> float | None:
    """The estimate computed the plain way, on a float64 copy of the whole image: the oracle
    the memory-sparing noise_sigma must equal to the last bit (same defaults)."""
    from sigreport.measure.noise import _A, _truncated_rayleigh_moments

    v = np.asarray(values, dtype=np.float64).ravel()
    v = v[np.isfinite(v) & (v > 0)]
    if v.size < 200:
        return None
    m1, m2 = _truncated_rayleigh_moments(_A)
    expected_cv = math.sqrt(m2 - m1 * m1) / m1
    dark = v[v <= np.median(v)]
    top = float(dark.max())
    if top <= 0:
        return None
    counts, edges = np.histogram(dark, bins=128, range=(0.0, top))
    peak = int(np.argmax(counts))
    sigma = max(0.5 * (edges[peak] + edges[peak + 1]), edges[1] - edges[0])
    for _ in range(100):
        selected = v[v < _A * sigma]
        if selected.size == 0:
            return None
        new = math.sqrt(float(np.mean(selected * selected)) / m2)
        converged = abs(new - sigma) <= 1e-6 * sigma
        sigma = new
        if converged:
            break
    selected = v[v < _A * sigma]
    if selected.size < max(200, 0.02 * v.size):
        return None
    cv = float(selected.std() / selected.mean())
    if abs(cv - expected_cv) > 0.25 * expected_cv:
        return None
    return float(sigma)


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("dtype", [np.float32, np.float64, np.uint16])
def test_the_estimate_equals_the_plain_float64_computation(seed, dtype):
    # The series is read in its own type, never copied whole to float64: the same double as
    # the plain computation, for float32 series (as loaded), float64 and stored integers.
    image = _phantom(4.0 + 3.0 * seed, 0.3 + 0.1 * seed, 500.0, seed=seed)
    image = np.round(image).astype(dtype) if dtype is np.uint16 else image.astype(dtype)
    if dtype is not np.uint16:
        image[0, 0, :5] = np.nan
        image[1, 0, :5] = 0.0
    want = _sigma_in_float64(image)
    assert want is not None
    assert noise_sigma(image) == want


def test_no_background_gives_none_as_the_plain_computation():
    tissue = np.random.default_rng(3).normal(800.0, 10.0, (8, 32, 32)).astype(np.float32)
    assert _sigma_in_float64(tissue) is None and noise_sigma(tissue) is None

"""Textbook MR signal equations used to simulate the synthetic studies.

All times are in milliseconds, concentrations in mmol/L, relaxivities in L/(mmol s). The
equations are the steady-state magnitude forms found in MR physics textbooks (e.g. Haacke EM,
Brown RW, Thompson MR, Venkatesan R. *Magnetic Resonance Imaging: Physical Principles and
Sequence Design*, Wiley 1999, chapters 15 and 18), assuming a perfect 90/180 degree pulse train,
no stimulated echoes and TE << TR.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

FloatArray = NDArray[np.float64]


def _positive(name: str, value: ArrayLike) -> FloatArray:
    arr = np.asarray(value, dtype=np.float64)
    if np.any(~np.isfinite(arr)) or np.any(arr <= 0):
        raise ValueError(f'Argument "{name}" must be finite and > 0, got {value!r}.')
    return arr


def spin_echo(pd: ArrayLike, t1_ms: ArrayLike, t2_ms: ArrayLike, *, tr_ms: float, te_ms: float):
    """Spin-echo signal ``S = PD (1 - exp(-TR/T1)) exp(-TE/T2)``.

    Parameters
    ----------
    pd, t1_ms, t2_ms
        Proton density (relative) and relaxation times of each tissue (broadcast together).
    tr_ms, te_ms
        Repetition and echo time.

    Returns
    -------
    numpy.ndarray or float
        The signal, in units of ``pd``.
    """
    t1 = _positive("t1_ms", t1_ms)
    t2 = _positive("t2_ms", t2_ms)
    _positive("tr_ms", tr_ms)
    if te_ms < 0:
        raise ValueError(f'Argument "te_ms" must be >= 0, got {te_ms!r}.')
    return np.asarray(pd, dtype=np.float64) * (1.0 - np.exp(-tr_ms / t1)) * np.exp(-te_ms / t2)


def inversion_recovery(
    pd: ArrayLike,
    t1_ms: ArrayLike,
    t2_ms: ArrayLike,
    *,
    tr_ms: float,
    te_ms: float,
    ti_ms: float,
):
    """Magnitude inversion-recovery (spin-echo readout) signal.

    ``S = PD |1 - 2 exp(-TI/T1) + exp(-TR/T1)| exp(-TE/T2)`` (magnitude reconstruction, as
    FLAIR and STIR images are displayed).
    """
    t1 = _positive("t1_ms", t1_ms)
    t2 = _positive("t2_ms", t2_ms)
    _positive("tr_ms", tr_ms)
    _positive("ti_ms", ti_ms)
    if ti_ms >= tr_ms:
        raise ValueError(f'Argument "ti_ms" ({ti_ms}) must be shorter than TR ({tr_ms}).')
    mz = 1.0 - 2.0 * np.exp(-ti_ms / t1) + np.exp(-tr_ms / t1)
    return np.asarray(pd, dtype=np.float64) * np.abs(mz) * np.exp(-te_ms / t2)


def spoiled_gradient_echo(
    pd: ArrayLike,
    t1_ms: ArrayLike,
    t2star_ms: ArrayLike,
    *,
    tr_ms: float,
    te_ms: float,
    flip_deg: float,
):
    """Spoiled gradient-echo (FLASH) steady state.

    ``S = PD sin(a) (1 - E1) / (1 - cos(a) E1) exp(-TE/T2*)`` with ``E1 = exp(-TR/T1)``.
    """
    t1 = _positive("t1_ms", t1_ms)
    t2s = _positive("t2star_ms", t2star_ms)
    _positive("tr_ms", tr_ms)
    if not 0 < flip_deg <= 180:
        raise ValueError(f'Argument "flip_deg" must be in (0, 180], got {flip_deg!r}.')
    alpha = np.deg2rad(flip_deg)
    e1 = np.exp(-tr_ms / t1)
    steady = np.sin(alpha) * (1.0 - e1) / (1.0 - np.cos(alpha) * e1)
    return np.asarray(pd, dtype=np.float64) * steady * np.exp(-te_ms / t2s)


def null_inversion_time(t1_ms: float, *, tr_ms: float | None = None) -> float:
    """Inversion time at which a tissue's longitudinal magnetization crosses zero.

    ``TI = T1 ln(2 / (1 + exp(-TR/T1)))``, which tends to ``T1 ln 2`` when TR >> T1 (``tr_ms``
    None). It is the root of the inversion-recovery factor in :func:`inversion_recovery`.
    """
    t1 = float(_positive("t1_ms", t1_ms))
    if tr_ms is None:
        return t1 * float(np.log(2.0))
    tr = float(_positive("tr_ms", tr_ms))
    return t1 * float(np.log(2.0 / (1.0 + np.exp(-tr / t1))))


def relaxation_with_contrast(
    t_ms: ArrayLike, concentration_mmol_l: ArrayLike, relaxivity_l_mmol_s: float
) -> FloatArray:
    """Relaxation time shortened by a paramagnetic agent: ``1/T_post = 1/T + r C``.

    The relaxivity is per second, the times in milliseconds, hence the factor 1000.
    """
    t = _positive("t_ms", t_ms)
    conc = np.asarray(concentration_mmol_l, dtype=np.float64)
    if np.any(conc < 0):
        raise ValueError(f'Argument "concentration_mmol_l" must be >= 0, got {conc!r}.')
    rate_per_ms = 1.0 / t + relaxivity_l_mmol_s * conc / 1000.0
    return 1.0 / rate_per_ms


def t2_star(t2_ms: ArrayLike, r2_prime_per_s: float) -> FloatArray:
    """``1/T2* = 1/T2 + R2'`` (static dephasing added to the irreversible T2 decay)."""
    t2 = _positive("t2_ms", t2_ms)
    if r2_prime_per_s < 0:
        raise ValueError(f'Argument "r2_prime_per_s" must be >= 0, got {r2_prime_per_s!r}.')
    return 1.0 / (1.0 / t2 + r2_prime_per_s / 1000.0)


def rician(signal: ArrayLike, sigma: float, rng: np.random.Generator) -> NDArray[np.float64]:
    """Magnitude of the signal plus complex Gaussian noise (sigma per channel).

    Magnitude images of a complex signal with independent Gaussian noise in the real and
    imaginary channels follow a Rice distribution (Gudbjartsson H, Patz S. The Rician
    distribution of noisy MRI data. Magn Reson Med 1995;34:910-914).
    """
    s = np.asarray(signal, dtype=np.float64)
    if sigma < 0:
        raise ValueError(f'Argument "sigma" must be >= 0, got {sigma!r}.')
    real = s + rng.normal(0.0, sigma, s.shape)
    imag = rng.normal(0.0, sigma, s.shape)
    return np.hypot(real, imag)


# --------------------------------------------------------------------------------------------
# Diffusion, chemical shift and contrast uptake (the Version 2 sequence families)

GYROMAGNETIC_MHZ_PER_T = 42.577478  # 1H gamma / 2 pi, CODATA 2018
# The main (methylene) resonance of fat lies about 3.4-3.5 ppm below water (e.g. Hamilton G,
# Yokoo T, Bydder M, et al. In vivo characterization of the liver fat 1H MR spectrum. NMR Biomed
# 2011;24:784-790: 3.40 ppm below water at 37 C in their model; from memory).
FAT_SHIFT_PPM = 3.4


def diffusion_weighting(adc_1e6_mm2_s: ArrayLike, b_s_mm2: float) -> FloatArray:
    """Mono-exponential diffusion attenuation ``S_b / S_0 = exp(-b ADC)``.

    ``adc_1e6_mm2_s`` is in 10^-6 mm^2/s (the unit scanners store ADC maps in), ``b`` in s/mm^2
    (Stejskal EO, Tanner JE. J Chem Phys 1965;42:288-292).
    """
    adc = np.asarray(adc_1e6_mm2_s, dtype=np.float64)
    if np.any(adc < 0) or b_s_mm2 < 0:
        raise ValueError(f'Arguments "adc" and "b" must be >= 0, got {adc!r}, {b_s_mm2!r}.')
    return np.exp(-b_s_mm2 * adc * 1e-6)


def apparent_diffusion(s0: ArrayLike, sb: ArrayLike, b_s_mm2: float) -> FloatArray:
    """ADC in 10^-6 mm^2/s from a b=0 and a b>0 image: ``ln(S_0 / S_b) / b``; 0 where either
    signal is not positive (the inverse of :func:`diffusion_weighting`)."""
    if b_s_mm2 <= 0:
        raise ValueError(f'Argument "b_s_mm2" must be > 0, got {b_s_mm2!r}.')
    a = np.asarray(s0, dtype=np.float64)
    c = np.asarray(sb, dtype=np.float64)
    ok = (a > 0) & (c > 0)
    out = np.zeros(np.broadcast(a, c).shape, dtype=np.float64)
    out[ok] = np.log(a[ok] / c[ok]) / b_s_mm2 * 1e6
    return out


def fat_water_shift_hz(field_strength_t: float) -> float:
    """Frequency difference between water and the main fat peak: ``ppm * gamma * B0``
    (about 217 Hz at 1.5 T and 434 Hz at 3 T)."""
    _positive("field_strength_t", field_strength_t)
    return FAT_SHIFT_PPM * 1e-6 * GYROMAGNETIC_MHZ_PER_T * 1e6 * field_strength_t


def fat_water_phase(te_ms: float, field_strength_t: float) -> float:
    """Phase (radians, in [0, 2 pi)) of fat relative to water at echo time ``te_ms``."""
    return float(
        (2.0 * np.pi * fat_water_shift_hz(field_strength_t) * te_ms / 1000.0) % (2 * np.pi)
    )


def opposed_phase_te_ms(field_strength_t: float, n: int = 1) -> float:
    """The n-th echo time at which fat and water are opposed: ``(n - 1/2) / shift``
    (about 2.3 ms at 1.5 T and 1.15 ms at 3 T for n = 1)."""
    return (n - 0.5) * 1000.0 / fat_water_shift_hz(field_strength_t)


def in_phase_te_ms(field_strength_t: float, n: int = 1) -> float:
    """The n-th echo time at which fat and water are in phase: ``n / shift``
    (about 4.6 ms at 1.5 T and 2.3 ms at 3 T for n = 1)."""
    return n * 1000.0 / fat_water_shift_hz(field_strength_t)


def two_component_magnitude(water: ArrayLike, fat: ArrayLike, phase_rad: float) -> FloatArray:
    """``|W + F exp(i phi)|``: the gradient-echo magnitude of a voxel holding water and fat
    signal (single fat peak). At phi = pi it is ``|W - F|``: the opposed-phase signal loss of
    voxels holding both, and the dark line where fat meets water."""
    w = np.asarray(water, dtype=np.float64)
    f = np.asarray(fat, dtype=np.float64)
    return np.hypot(w + f * np.cos(phase_rad), f * np.sin(phase_rad))


def uptake_fraction(t_s: ArrayLike, *, rise_s: float, washout_s: float | None) -> FloatArray:
    """Relative agent concentration in a tissue ``t_s`` seconds after injection:
    ``(1 - exp(-t / rise)) exp(-t / washout)`` (``washout`` None: no washout), normalised so
    that its maximum over t >= 0 is 1.

    A two-time-constant shape that gives the three curve types of dynamic imaging: slow rise
    (persistent), fast rise and flat (plateau), fast rise and decline (washout) (Kuhl CK,
    Mielcareck P, Klaschik S, et al. Dynamic breast MR imaging: are signal intensity time course
    data useful for differential diagnosis of enhancing lesions? Radiology 1999;211:101-110;
    the shape is ours).
    """
    t = np.maximum(np.asarray(t_s, dtype=np.float64), 0.0)
    _positive("rise_s", rise_s)
    if washout_s is None:
        return 1.0 - np.exp(-t / rise_s)
    _positive("washout_s", washout_s)
    shape = (1.0 - np.exp(-t / rise_s)) * np.exp(-t / washout_s)
    # Maximum of (1 - e^{-t/a}) e^{-t/b}: at t* = a ln(1 + b/a).
    t_peak = rise_s * np.log(1.0 + washout_s / rise_s)
    peak = (1.0 - np.exp(-t_peak / rise_s)) * np.exp(-t_peak / washout_s)
    return shape / peak

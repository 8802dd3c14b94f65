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

"""The signal equations against worked values and textbook facts."""

from __future__ import annotations

import math

import numpy as np
import pytest

from sigreport.synth import physics
from sigreport.synth.tissues import load_tissues


def test_spin_echo_worked_value():
    # Textbook spin echo S = PD (1 - e^(-TR/T1)) e^(-TE/T2), worked by hand:
    # PD 0.7, T1 900, T2 80, TR 500, TE 15 ms: 1 - e^(-0.5556) = 0.426247,
    # e^(-0.1875) = 0.829029, S = 0.7 * 0.426247 * 0.829029 = 0.247360.
    s = physics.spin_echo(0.7, 900.0, 80.0, tr_ms=500.0, te_ms=15.0)
    assert s == pytest.approx(0.247360, abs=1e-6)


def test_inversion_recovery_worked_value():
    # Textbook IR S = PD |1 - 2 e^(-TI/T1) + e^(-TR/T1)| e^(-TE/T2), worked by hand:
    # PD 1, T1 4000, T2 2000, TR 9000, TI 2200, TE 120 ms: e^(-0.55) = 0.576950,
    # e^(-2.25) = 0.105399, |1 - 1.153900 + 0.105399| = 0.048500, e^(-0.06) = 0.941765,
    # S = 0.048500 * 0.941765 = 0.045676.
    s = physics.inversion_recovery(1.0, 4000.0, 2000.0, tr_ms=9000.0, te_ms=120.0, ti_ms=2200.0)
    assert s == pytest.approx(0.045676, abs=1e-6)


def test_spoiled_gradient_echo_worked_value():
    # Textbook spoiled GRE S = PD sin(a) (1 - E1) / (1 - cos(a) E1) e^(-TE/T2*), by hand:
    # PD 0.69, T1 884, T2* 50, TR 8, TE 3.5, a 12 deg: E1 = 0.990991, sin a = 0.207912,
    # cos a = 0.978148, S = 0.69 * 0.207912 * 0.009009 / 0.030653 * 0.932394 = 0.039298.
    s = physics.spoiled_gradient_echo(0.69, 884.0, 50.0, tr_ms=8.0, te_ms=3.5, flip_deg=12.0)
    assert s == pytest.approx(0.039298, abs=2e-6)


def test_spoiled_gradient_echo_peaks_at_the_ernst_angle():
    # Textbook: the spoiled GRE signal is largest at the Ernst angle, cos(a_E) = e^(-TR/T1).
    t1, tr = 884.0, 8.0
    ernst = math.degrees(math.acos(math.exp(-tr / t1)))
    angles = np.linspace(1.0, 40.0, 3901)
    s = physics.spoiled_gradient_echo(1.0, t1, 50.0, tr_ms=tr, te_ms=0.0, flip_deg=1.0)
    signals = [
        float(physics.spoiled_gradient_echo(1.0, t1, 50.0, tr_ms=tr, te_ms=0.0, flip_deg=a))
        for a in angles
    ]
    assert angles[int(np.argmax(signals))] == pytest.approx(ernst, abs=0.02)
    assert s < max(signals)


def test_null_inversion_time_formula_and_limit():
    # Null point: 1 - 2 e^(-TI/T1) + e^(-TR/T1) = 0, so TI = T1 ln(2 / (1 + e^(-TR/T1))),
    # and T1 ln 2 when TR >> T1 (textbook). By hand: 4000 ln 2 = 2772.589 ms;
    # 4000 ln(2 / (1 + e^(-2.25))) = 4000 ln(1.809324) = 2371.762 ms.
    assert physics.null_inversion_time(4000.0) == pytest.approx(2772.589, abs=1e-3)
    assert physics.null_inversion_time(4000.0, tr_ms=9000.0) == pytest.approx(2371.762, abs=1e-3)
    ti = physics.null_inversion_time(4000.0, tr_ms=9000.0)
    at_null = physics.inversion_recovery(1.0, 4000.0, 2000.0, tr_ms=9000.0, te_ms=0.0, ti_ms=ti)
    assert at_null == pytest.approx(0.0, abs=1e-12)
    assert physics.null_inversion_time(300.0, tr_ms=1e7) == pytest.approx(300.0 * math.log(2))


def test_flair_nulls_csf_at_a_typical_inversion_time():
    # Common practice: FLAIR at 1.5 T uses TI about 2000-2500 ms with TR 8000-10000 ms.
    csf = load_tissues(1.5).get("CSF")
    ti = physics.null_inversion_time(csf.t1_ms, tr_ms=9000.0)
    assert 2000.0 <= ti <= 2500.0


def test_stir_nulls_fat_at_a_typical_inversion_time():
    # Common practice: STIR at 1.5 T uses TI about 150-170 ms (3 T: about 210-230 ms).
    ti_15 = physics.null_inversion_time(load_tissues(1.5).get("fat").t1_ms, tr_ms=4000.0)
    ti_30 = physics.null_inversion_time(load_tissues(3.0).get("fat").t1_ms, tr_ms=4000.0)
    assert 150.0 <= ti_15 <= 170.0
    assert 210.0 <= ti_30 <= 230.0


def test_contrast_shortens_t1_by_relaxivity():
    # 1/T1post = 1/T1 + r1 C, by hand: 1/1000 ms + 5.2 * 0.3 / 1000 = 0.00256 /ms -> 390.625 ms.
    assert physics.relaxation_with_contrast(1000.0, 0.3, 5.2) == pytest.approx(390.625)
    assert physics.relaxation_with_contrast(1000.0, 0.0, 5.2) == pytest.approx(1000.0)


def test_t2_star_adds_static_dephasing():
    # 1/T2* = 1/T2 + R2': 1/80 ms + 10/1000 /ms = 0.0225 /ms -> 44.444 ms (by hand).
    assert physics.t2_star(80.0, 10.0) == pytest.approx(44.4444, abs=1e-4)


def test_rician_noise_floor_and_high_snr_limit():
    # Gudbjartsson & Patz 1995: with no signal the magnitude is Rayleigh, mean sigma sqrt(pi/2);
    # at high SNR the mean tends to sqrt(A^2 + sigma^2).
    rng = np.random.default_rng(0)
    sigma = 2.0
    floor = physics.rician(np.zeros(200_000), sigma, rng)
    assert floor.mean() == pytest.approx(sigma * math.sqrt(math.pi / 2), rel=0.01)
    high = physics.rician(np.full(200_000, 100.0), sigma, rng)
    assert high.mean() == pytest.approx(math.sqrt(100.0**2 + sigma**2), rel=0.001)
    assert (floor >= 0).all()


def test_bad_arguments_name_the_argument():
    with pytest.raises(ValueError, match='"t1_ms" must be finite and > 0'):
        physics.spin_echo(1.0, 0.0, 80.0, tr_ms=500.0, te_ms=10.0)
    with pytest.raises(ValueError, match='"ti_ms" .* must be shorter than TR'):
        physics.inversion_recovery(1.0, 900.0, 80.0, tr_ms=500.0, te_ms=10.0, ti_ms=600.0)
    with pytest.raises(ValueError, match='"flip_deg" must be in'):
        physics.spoiled_gradient_echo(1.0, 900.0, 50.0, tr_ms=8.0, te_ms=3.0, flip_deg=0.0)
    with pytest.raises(ValueError, match='"concentration_mmol_l" must be >= 0'):
        physics.relaxation_with_contrast(900.0, -0.1, 5.2)

"""Tests for dsp.envelope: scaling on an AM signal, and a simulated outer-race fault."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal

from dsp.envelope import envelope_spectrum
from dsp.kinematics import bearing_frequencies
from dsp.windows import get_window

FS = 25_600.0
N = 65_536  # 2.56 s, Δf = 0.390625 Hz
DF = FS / N


def outer_race_fault(seed: int) -> tuple[np.ndarray, float, float]:
    """Invented test rig: 8-element bearing (d = 10, D = 50, φ = 0) on a 1470 r/min shaft.

    An outer-race spall is struck once per element pass (BPFO); each strike rings a 3 kHz
    structural resonance (decay time constant τ = 2 ms, damping ratio ≈ 0.027). Strike
    times wander by σ = 1 % of the pass period about fixed nominal times, as slip makes
    real strikes irregular (Randall & Antoni 2011: 1–2 % slip); they do not drift, so the
    strike rate stays BPFO on average. Each strike's envelope e^(−t/τ) has a spectrum
    falling as 1/√(1 + (2πfτ)²), so BPFO is the top envelope line and its harmonics follow
    lower. The shaft adds 1X and 2X (unbalance, misalignment), bigger than the strikes'
    own content at low frequency, and there is broadband noise.
    Returns (x, bpfo_hz, shaft_hz).
    """
    rng = np.random.default_rng(seed)
    fr = 1470 / 60
    bpfo = bearing_frequencies(8, 10.0, 50.0, 0.0, fr).bpfo_hz  # 78.4 Hz
    t = np.arange(N) / FS
    period = 1 / bpfo
    strikes = np.arange(-1, int(N / FS * bpfo) + 1) * period
    strikes = strikes + rng.normal(0.0, 0.01 * period, strikes.size)
    x = np.zeros(N)
    f_res, tau_s = 3000.0, 2e-3
    for t_hit in strikes:
        k0 = max(0, int(np.ceil(t_hit * FS)))
        k1 = min(N, int((t_hit + 12 * tau_s) * FS) + 1)
        dt = t[k0:k1] - t_hit
        x[k0:k1] += np.exp(-dt / tau_s) * np.sin(2 * np.pi * f_res * dt)
    x += 1.0 * np.sin(2 * np.pi * fr * t + 0.3) + 0.4 * np.sin(2 * np.pi * 2 * fr * t + 1.1)
    x += rng.normal(0.0, 0.5, N)
    return x, bpfo, fr


def test_am_carrier_envelope_line_has_rms_of_modulation() -> None:
    # The envelope of a·(1 + m·cos 2πf_m t)·cos 2πf_c t is a·(1 + m·cos 2πf_m t) (Bedrosian's
    # theorem for the Hilbert transform of a band-limited product), so its line at f_m is
    # a·m/√2 RMS. f_m is on a line centre; f_c sits at the band's geometric centre where the
    # Butterworth gain is 1, and f_c ± f_m lose < 1e-6 dB.
    t = np.arange(N) / FS
    f_m = 128 * DF  # 50 Hz
    a, m = 2.0, 0.3
    x = np.stack(
        [a * (1 + m * np.cos(2 * np.pi * f_m * t)) * np.cos(2 * np.pi * 2236.07 * t), np.zeros(N)]
    )
    f_hz, amp = envelope_spectrum(x, FS, 1000.0, 5000.0)
    assert f_hz.shape == (N // 2 + 1,) and amp.shape == (2, N // 2 + 1)
    assert f_hz[128] == f_m
    assert amp[0, 128] == pytest.approx(a * m / np.sqrt(2), rel=1e-4)
    assert int(np.argmax(amp[0])) == 128
    assert np.all(amp[1] == 0.0)  # a silent channel stays silent
    # the DC of the envelope is removed before the transform
    assert amp[0, 0] < 1e-3 * amp[0, 128]


def test_outer_race_fault_shows_at_bpfo_in_the_envelope_only() -> None:
    x, bpfo, fr = outer_race_fault(seed=2024)
    f_hz, amp = envelope_spectrum(x, FS, 2000.0, 4000.0, window="hann", order=4)
    low = (f_hz >= 5.0) & (f_hz <= 1000.0)
    lines = np.flatnonzero(low)
    q_bpfo = bpfo / DF

    # Envelope: the largest line above a few Hz is BPFO (Randall & Antoni 2011), ±1 line.
    q_top = lines[np.argmax(amp[low])]
    assert abs(q_top - q_bpfo) <= 1.0
    # ... and 2×BPFO stands well above the envelope's noise floor (median line in 5–1000 Hz).
    floor = np.median(amp[low])
    q2 = int(round(2 * q_bpfo))
    assert amp[q2 - 1 : q2 + 2].max() > 10 * floor

    # Raw spectrum of the same record, same window (scipy.signal.periodogram, rms²): its
    # largest line in 5–1000 Hz is the shaft's 1X, not BPFO, and BPFO barely clears the
    # floor — the strikes' energy sits around the 3 kHz resonance. This is why the envelope
    # is needed.
    w = get_window("hann", N)
    _, p = scipy.signal.periodogram(x, FS, window=w, scaling="spectrum", detrend=False)
    q_raw = lines[np.argmax(p[low])]
    assert abs(q_raw - fr / DF) <= 1.0
    qb = int(round(q_bpfo))
    assert np.sqrt(p[qb - 1 : qb + 2].max()) < 0.05 * np.sqrt(p[q_raw])


def test_one_dimensional_input_matches_a_channel() -> None:
    x, _, _ = outer_race_fault(seed=5)
    f1, a1 = envelope_spectrum(x, FS, 2000.0, 4000.0, window="flattop")
    _, a2 = envelope_spectrum(np.stack([x, -x]), FS, 2000.0, 4000.0, window="flattop")
    assert a1.shape == (N // 2 + 1,)
    np.testing.assert_allclose(a2[0], a1, rtol=1e-12, atol=0)
    # |analytic| of −x equals that of x: the envelope ignores polarity (definition)
    np.testing.assert_allclose(a2[1], a1, rtol=1e-9, atol=1e-12 * a1.max())


def test_envelope_errors() -> None:
    x = np.zeros(4096)
    with pytest.raises(ValueError, match=r"band lo_hz=0\.0 … hi_hz=4000\.0 must satisfy 0 < lo"):
        envelope_spectrum(x, FS, 0.0, 4000.0)
    with pytest.raises(ValueError, match=r"band lo_hz=4000\.0 … hi_hz=2000\.0 must satisfy"):
        envelope_spectrum(x, FS, 4000.0, 2000.0)
    with pytest.raises(ValueError, match=r"hi_hz=12800\.0 must satisfy .* fs/2 = 12800\.0 Hz"):
        envelope_spectrum(x, FS, 2000.0, 12800.0)
    with pytest.raises(ValueError, match=r"window='hanning' is not one of 'rectangular', 'hann'"):
        envelope_spectrum(x, FS, 2000.0, 4000.0, window="hanning")  # type: ignore[arg-type]
    with pytest.raises(ValueError, match=r"order=0 must be an integer in \[1, 12\]"):
        envelope_spectrum(x, FS, 2000.0, 4000.0, order=0)
    with pytest.raises(ValueError, match=r"fs=-1\.0 must be a finite number > 0"):
        envelope_spectrum(x, -1.0, 2000.0, 4000.0)
    with pytest.raises(ValueError, match=r"x has 20 samples; the order=4 band-pass needs more"):
        envelope_spectrum(np.zeros(20), FS, 2000.0, 4000.0)
    with pytest.raises(ValueError, match=r"x must be \(channels, samples\) or \(samples,\)"):
        envelope_spectrum(np.zeros((1, 1, 4096)), FS, 2000.0, 4000.0)

"""Tests for dsp.kurtogram (spectral kurtosis, the fast kurtogram) and dsp.envelope's
streaming envelope: theory values for noise and a sine, and a simulated impulsive bearing
fault whose resonance band the kurtogram must find."""

from __future__ import annotations

import math

import numpy as np
import pytest

from dsp.envelope import EnvelopeStream, envelope_spectrum
from dsp.kinematics import bearing_frequencies
from dsp.kurtogram import (
    complex_kurtosis,
    fast_kurtogram,
    kurtogram_levels,
    spectral_kurtosis,
)

FS = 25_600.0
F_RES = 3000.0  # the structural resonance the strikes ring, Hz


def impulsive_fault(seed: int, seconds: float = 2.56, snr_factor: float = 3.0
                    ) -> tuple[np.ndarray, float]:
    """Invented rig in the style of Antoni & Randall 2006 (MSSP 20(2)) and Randall & Antoni
    2011 (MSSP 25(2)): an outer-race spall on an 8-element bearing (d 10, D 50, φ 0) on a
    1610 r/min shaft, struck once per element pass (BPFO ≈ 85.9 Hz) with the strike
    intervals jittered by σ = 1 % (slip); every strike rings a 3 kHz resonance of damping
    ratio 0.03. Gaussian noise of ``snr_factor`` × the strikes' RMS and three sinusoids
    (1X, 2X and a 1230 Hz mesh tone, each 4 × that RMS) bury it. Returns (x, bpfo_hz)."""
    rng = np.random.default_rng(seed)
    fr = 1610 / 60
    bpfo = bearing_frequencies(8, 10.0, 50.0, 0.0, fr).bpfo_hz
    n = int(seconds * FS)
    t = np.arange(n) / FS
    x = np.zeros(n)
    zeta, wn = 0.03, 2 * np.pi * F_RES
    tau = np.arange(int(0.02 * FS)) / FS
    ring = np.exp(-zeta * wn * tau) * np.sin(wn * math.sqrt(1 - zeta**2) * tau)
    t_hit = 0.005
    while t_hit < seconds:
        k = int(round(t_hit * FS))
        m = min(ring.size, n - k)
        x[k:k + m] += ring[:m]
        t_hit += (1 / bpfo) * (1 + 0.01 * rng.standard_normal())
    rms = math.sqrt(float(np.mean(x**2)))
    x += snr_factor * rms * rng.standard_normal(n)
    x += 4 * rms * (np.sin(2 * np.pi * fr * t) + np.sin(2 * np.pi * 2 * fr * t + 0.4)
                    + np.sin(2 * np.pi * 1230.0 * t + 1.0))
    return x, bpfo


def test_levels_are_the_one_third_binary_tree() -> None:
    # Antoni 2007 §3: levels 0, 1, log2 3, 2, 1 + log2 3, …, nlevel (2·nlevel rows)
    lv = kurtogram_levels(3)
    assert lv == pytest.approx([0, 1, math.log2(3), 2, 1 + math.log2(3), 3])


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_kurtogram_picks_the_resonance_band_of_an_impulsive_fault(seed: int) -> None:
    x, _ = impulsive_fault(seed)
    kg = fast_kurtogram(x, FS, nlevel=6)
    b = kg.best
    # Antoni 2007: the maximum lies on the resonance the transients excite. Within one band
    # of it, at a level from 3 to 6 (bandwidths 1600 … 200 Hz around a resonance of
    # half-power bandwidth 2ζ·f = 180 Hz, whose 1 ms ringing wants a band of a few hundred Hz)
    assert b.lo_hz - b.bw_hz <= F_RES <= b.hi_hz + b.bw_hz, b
    assert 3 <= b.level <= 6, b
    assert b.kurtosis > 0.3
    assert kg.kurtosis.shape == (12, 3 * 64)
    # the row of the best band holds its value at its columns
    row = int(np.argmin(np.abs(kg.levels - b.level)))
    assert kg.band(row, b.index).kurtosis == b.kurtosis


def test_envelope_of_the_chosen_band_shows_bpfo_and_harmonics() -> None:
    # Randall & Antoni 2011 §3: demodulating the band the kurtogram picks, the envelope
    # spectrum's largest lines are BPFO and its harmonics; the raw signal's largest lines are
    # the sinusoids.
    x, bpfo = impulsive_fault(7)
    b = fast_kurtogram(x, FS, nlevel=6).best
    f, a = envelope_spectrum(x, FS, b.lo_hz, b.hi_hz)
    df = f[1]
    keep = f > 10.0
    top = f[keep][np.argsort(a[keep])[::-1][:3]]
    # each of the three largest lines is within 2 lines + 1 % jitter of a BPFO harmonic ≤ 3
    for ft in top:
        h = round(ft / bpfo)
        assert 1 <= h <= 3 and abs(ft - h * bpfo) <= 2 * df + 0.01 * h * bpfo, (top, bpfo)
    assert abs(top[0] - bpfo) <= 2 * df + 0.01 * bpfo


def test_sk_of_white_gaussian_noise_is_zero() -> None:
    # Antoni 2006 §3: SK of stationary Gaussian noise is 0; the STFT estimator's spread is
    # about 2/√frames (Antoni 2006 eq. for the variance under Gaussianity, from memory), so
    # 8 σ bounds it at every frequency and the mean over 60 frequencies is within 2 σ/√60.
    rng = np.random.default_rng(4)
    x = rng.standard_normal(2**16)
    f, sk = spectral_kurtosis(x, 1000.0, nperseg=128)
    frames = (2**16 - 128) // 32 + 1
    sigma = 2 / math.sqrt(frames)
    inner = sk[1:-1]  # DC and Nyquist are real-valued: their kurtosis is 1, not 0
    assert abs(inner.mean()) < 3 * sigma / math.sqrt(inner.size) * 4
    assert np.max(np.abs(inner)) < 8 * sigma
    kg = fast_kurtogram(x, 1000.0, nlevel=5)
    # the whole kurtogram of noise is ≈ 0 (each band's estimate spreads as ≈ 2/√samples)
    assert abs(kg.kurtosis[0, 0]) < 0.1
    assert np.max(np.abs(kg.kurtosis)) < 0.5


def test_sk_of_a_pure_sine_is_minus_one() -> None:
    # Antoni 2006 §3: a constant-modulus complex envelope (a pure tone) has SK = −1
    t = np.arange(2**15) / 1000.0
    x = 2.0 * np.sin(2 * np.pi * 125.0 * t)
    f, sk = spectral_kurtosis(x, 1000.0, nperseg=128)
    assert sk[np.argmin(np.abs(f - 125.0))] == pytest.approx(-1.0, abs=1e-6)
    kg = fast_kurtogram(np.sin(2 * np.pi * 123.4 * t), 1000.0, nlevel=5)
    assert kg.kurtosis[0, 0] == pytest.approx(-1.0, abs=1e-3)  # level 0: the whole band
    # (the mean of 1000 samples of a tone is not exactly 0: −1 to 1e-3)
    assert complex_kurtosis(np.exp(1j * 0.3 * np.arange(1000))) == pytest.approx(-1.0, abs=1e-3)


def test_complex_kurtosis_of_circular_gaussian_noise_is_zero() -> None:
    # E|c|⁴ = 2σ⁴ for circular complex Gaussian c (Antoni 2006 §3); spread ≈ 2/√n
    rng = np.random.default_rng(5)
    c = rng.standard_normal((4, 2**16)) + 1j * rng.standard_normal((4, 2**16))
    assert np.max(np.abs(complex_kurtosis(c))) < 5 * 2 / math.sqrt(2**16)
    assert complex_kurtosis(np.zeros(16, complex)) == 0.0


def test_best_within_and_kurtosis_at() -> None:
    x, _ = impulsive_fault(1)
    kg = fast_kurtogram(x, FS, nlevel=6)
    b = kg.best
    assert kg.kurtosis_at(b.lo_hz, b.hi_hz) == b.kurtosis
    inside = kg.best_within(b.lo_hz, b.hi_hz)
    assert inside is not None and inside.kurtosis == b.kurtosis
    # above 6 kHz there is no resonance: the best there is far weaker
    high = kg.best_within(6000.0, FS / 2)
    assert high is not None and high.lo_hz >= 6000.0 and high.kurtosis < b.kurtosis / 2
    assert kg.best_within(100.0, 150.0) is None
    assert kg.best_within(0.0, FS / 2) != kg.band(0, 0)  # the bands at 0 and fs/2 are out


@pytest.mark.parametrize(("kwargs", "match"), [
    ({"x": np.zeros(1000), "fs": 1000.0, "nlevel": 4}, r"needs at least 2\^\(nlevel\+7\)"),
    ({"x": np.zeros(4096), "fs": 0.0, "nlevel": 4}, r"fs=0.0 must be"),
    ({"x": np.zeros(4096), "fs": 1.0, "nlevel": 0}, r"nlevel=0 must be an integer"),
    ({"x": np.zeros((2, 4096)), "fs": 1.0, "nlevel": 2}, r"one channel"),
    ({"x": np.full(4096, np.nan), "fs": 1.0, "nlevel": 2}, r"NaN or inf"),
])
def test_bad_input_is_refused(kwargs: dict[str, object], match: str) -> None:
    with pytest.raises(ValueError, match=match):
        fast_kurtogram(**kwargs)  # type: ignore[arg-type]


def test_envelope_stream_line_matches_the_batch_envelope_spectrum() -> None:
    # AM carrier a·(1 + m·cos 2πf_m t)·cos 2πf_c t: the envelope line is a·m/√2 RMS at f_m
    # (Bedrosian; see test_envelope.py); the streamed rectifier must read the same.
    fs, n = 25_600.0, 2**17
    t = np.arange(n) / fs
    a, m, f_m, f_c = 2.0, 0.3, 50.0, 3000.0
    x = (a * (1 + m * np.cos(2 * np.pi * f_m * t)) * np.cos(2 * np.pi * f_c * t))[None, :]
    st = EnvelopeStream(1, fs, 2500.0, 3500.0, 500.0)
    # streaming in uneven blocks equals one block
    pieces = [st.push(x[:, i:j]) for i, j in [(0, 1000), (1000, 5003), (5003, n)]]
    env = np.concatenate(pieces, axis=1)[0].astype(np.float64)
    assert st.fs_out == pytest.approx(1280.0)  # 25600 / 20, the chain for Fmax 500 Hz
    env = env[env.size // 4:]  # past the band-pass and chain start-up
    spec = np.abs(np.fft.rfft(env * np.hanning(env.size))) / np.hanning(env.size).sum()
    f = np.fft.rfftfreq(env.size, 1 / st.fs_out)
    q = np.argmin(np.abs(f - f_m))
    line = math.sqrt(2) * spec[q - 3:q + 4].max()
    # mean |cos| = 2/π is exact; Hann scalloping ≤ 1.42 dB off a line centre (Harris 1978)
    assert np.mean(env) == pytest.approx(a, rel=0.01)
    assert line == pytest.approx(a * m / math.sqrt(2), rel=0.18)
    with pytest.raises(ValueError, match=r"fmax_hz = 500 < lo_hz"):
        st.set_band(400.0, 900.0)


def test_noise_spread_matches_gaussian_noise() -> None:
    # Var K ≈ 4/m for m independent circular Gaussian samples (delta method on the moments
    # of an exponential |c|²; docs/references.md, Antoni 2007 section): over kurtograms of
    # white noise, the band values at the deepest levels spread as noise_spread says (±35 %)
    rng = np.random.default_rng(11)
    kgs = [fast_kurtogram(rng.standard_normal(2**15), 1000.0, nlevel=6) for _ in range(4)]
    kg = kgs[0]
    for row in (len(kg.levels) - 1, len(kg.levels) - 3, len(kg.levels) - 5):
        vals = np.concatenate([k.bands_at(row)[1:-1] for k in kgs])  # ends: DC / Nyquist
        assert np.std(vals) == pytest.approx(kg.noise_spread(kg.levels[row]), rel=0.35)
    # nothing in noise is significant at 5 spreads; the fault's resonance band is
    assert kg.best_within(0.0, 500.0, z_min=5.0) is None
    x, _ = impulsive_fault(2)
    b = fast_kurtogram(x, FS, nlevel=6).best_within(500.0, FS / 2, z_min=5.0)
    assert b is not None and b.lo_hz - b.bw_hz <= F_RES <= b.hi_hz + b.bw_hz


def test_envelope_stream_gap_restarts_and_keeps_indices() -> None:
    # a jump in first_index is a gap: the band-pass restarts from rest and the chain's output
    # indices jump with it (dsp.decimate: output k' stands for input k'·R + phase − delay)
    fs = 25_600.0
    t = np.arange(25_600) / fs
    x = np.sin(2 * np.pi * 3000.0 * t)[None, :]
    st = EnvelopeStream(1, fs, 2500.0, 3500.0, 500.0)
    a = st.push(x[:, :12_800], first_index=0)
    nxt = st.next_index
    b = st.push(x[:, 12_800:], first_index=12_800 + 25_600)  # one second missing
    assert st.next_index == nxt + 25_600 // st.factor + b.shape[1]
    assert st.first_settled_index > nxt  # the restart's transient is marked unsettled
    # a steady tone's envelope is its amplitude, 1, once settled (mean |sin| = 2/π)
    assert float(np.mean(a[0, a.shape[1] // 2:])) == pytest.approx(1.0, rel=0.01)
    with pytest.raises(ValueError, match=r"block must be \(1, n\)"):
        st.push(np.zeros((2, 10)))

"""Tests for dsp.tones: interpolated peaks, tracked-tone kernel, Goertzel, harmonics."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.fft
import scipy.signal

from dsp.tones import (
    find_peaks,
    goertzel,
    harmonics,
    orders_to_hz,
    tone_kernel,
    tone_power,
)
from dsp.windows import get_window

FS = 25_600.0
N = 4096
DF = FS / N  # 6.25 Hz
ALL_WINDOWS = ["rectangular", "hann", "hamming", "blackman-harris", "flattop", "kaiser"]


def power_spectrum(x: np.ndarray, window: str) -> np.ndarray:
    """One-sided power spectrum in rms² made by scipy, independently of the code under test.

    scipy.signal.periodogram with scaling='spectrum' is |rfft(w·x)|²/S1², doubled except at
    DC and Nyquist: the Heinzel et al. 2002 §9 power spectrum PS = 2|y|²/S1².
    """
    w = get_window(window, N)  # type: ignore[arg-type]
    _, p = scipy.signal.periodogram(x, FS, window=w, scaling="spectrum", detrend=False, axis=-1)
    return p


def sine(freq_hz: float, peak: float, phase: float, n: int = N) -> np.ndarray:
    return peak * np.sin(2 * np.pi * freq_hz * np.arange(n) / FS + phase)


def db(ratio: np.ndarray | float) -> np.ndarray:
    return 20 * np.log10(ratio)


def direct_dtft(x: np.ndarray, w: np.ndarray, f_hz: float) -> np.ndarray:
    """Σ w[k]·x[k]·exp(−2πi·f·k/fs) summed in float64: the definition, written out."""
    k = np.arange(x.shape[-1])
    return (x * w) @ np.exp(-2j * np.pi * f_hz * k / FS)


# ---------------------------------------------------------------- find_peaks


def test_hann_interpolation_meets_requirement_at_random_offsets() -> None:
    # Requirement for Hann: amplitude within ±0.1 dB and frequency within ±0.05 line for a
    # sine anywhere between lines. Reference amplitude: RMS of a sine is peak/√2.
    rng = np.random.default_rng(20240611)
    for _ in range(25):
        q0 = int(rng.integers(100, N // 2 - 100))
        offset = float(rng.random())
        f0 = (q0 + offset) * DF
        peak = float(rng.uniform(0.01, 20.0))
        x = sine(f0, peak, float(rng.uniform(0, 2 * np.pi)))
        x = x + rng.normal(0.0, 1e-3 * peak, N)  # broadband floor well below the tone
        pk = find_peaks(power_spectrum(x, "hann"), DF, "hann", N, count=1)
        assert abs(db(pk.amplitude_rms[0] / (peak / np.sqrt(2)))) <= 0.1
        assert abs(pk.frequency_hz[0] - f0) <= 0.05 * DF


@pytest.mark.parametrize("window", ALL_WINDOWS)
def test_every_window_interpolates_exactly_for_one_clean_sine(window: str) -> None:
    # A single noise-free sine: the two-line ratio inverts exactly through the window's own
    # transform, so the only error is leakage of the sine's negative-frequency image. The
    # tone stays ≥ 300 lines from DC and Nyquist, so the image is ≥ 600 lines away, where
    # even the rectangular window's sidelobes are ≈ 1/(π·600) ≈ −65 dB: error ≲ 0.005 dB.
    # Tolerance for all windows: ±0.01 dB and ±0.01 line. Reference: RMS = peak/√2.
    rng = np.random.default_rng(7)
    for _ in range(12):
        f0 = (int(rng.integers(300, N // 2 - 300)) + float(rng.random())) * DF
        peak = float(rng.uniform(0.1, 10.0))
        x = sine(f0, peak, float(rng.uniform(0, 2 * np.pi)))
        pk = find_peaks(power_spectrum(x, window), DF, window, N, count=1)  # type: ignore[arg-type]
        assert abs(db(pk.amplitude_rms[0] / (peak / np.sqrt(2)))) <= 0.01
        assert abs(pk.frequency_hz[0] - f0) <= 0.01 * DF


def test_flattop_highest_line_is_already_within_002_db() -> None:
    # scipy's flattop loses at most 0.0098 dB half a line off centre (docs/references.md,
    # Heinzel 2002 / calc), so the raw highest line is within ±0.02 dB with no correction;
    # the corrected amplitude must not be worse.
    rng = np.random.default_rng(11)
    for _ in range(10):
        f0 = (int(rng.integers(300, N // 2 - 300)) + float(rng.random())) * DF
        peak = float(rng.uniform(0.1, 10.0))
        p = power_spectrum(sine(f0, peak, float(rng.uniform(0, 2 * np.pi))), "flattop")
        rms = peak / np.sqrt(2)
        assert abs(db(np.sqrt(p.max()) / rms)) <= 0.02
        pk = find_peaks(p, DF, "flattop", N, count=1)
        assert abs(db(pk.amplitude_rms[0] / rms)) <= 0.02


def test_hann_half_line_scalloping_is_1_4236_db_and_is_undone() -> None:
    # A sine exactly half-way between lines reads 1.4236 dB low on Hann (docs/references.md,
    # Harris 1978 Table 1: 1.42 dB; 1.4236 dB calc). Tolerance 0.001 dB covers the image
    # leakage 1000 lines away.
    q0 = 1000
    f0 = (q0 + 0.5) * DF
    p = power_spectrum(sine(f0, np.sqrt(2), 0.4), "hann")  # 1.0 RMS
    raw_db = 10 * np.log10(p[q0])
    assert raw_db == pytest.approx(-1.4236, abs=1e-3)
    assert 10 * np.log10(p[q0 + 1]) == pytest.approx(-1.4236, abs=1e-3)
    pk = find_peaks(p, DF, "hann", N, count=1)
    assert pk.line[0] in (q0, q0 + 1)
    assert pk.frequency_hz[0] == pytest.approx(f0, abs=1e-3 * DF)
    assert abs(db(pk.amplitude_rms[0])) <= 1e-3


def test_two_far_tones_are_both_found_largest_first() -> None:
    # RMS of each sine is peak/√2; the weaker one comes second.
    rng = np.random.default_rng(3)
    x = sine(1003.1, 1.0, 0.2) + sine(7777.7, 3.0, 1.3) + rng.normal(0, 1e-3, N)
    pk = find_peaks(power_spectrum(x, "hann"), DF, "hann", N, count=4)
    np.testing.assert_allclose(pk.frequency_hz[:2], [7777.7, 1003.1], atol=0.05 * DF)
    np.testing.assert_allclose(
        db(pk.amplitude_rms[:2] / np.array([3.0, 1.0]) * np.sqrt(2)), 0, atol=0.1
    )
    # the rest are noise: far below the tones, and still sorted
    assert np.all(pk.amplitude_rms[2:] < 1e-2)
    assert np.all(np.diff(pk.amplitude_rms) <= 0)


def test_channels_are_independent_and_1d_matches_2d() -> None:
    # Each row of a (C, Q) spectrum gives what it gives alone (definition of per-channel).
    x = np.stack([sine(501.3, 1.0, 0.0), sine(2222.2, 0.5, 1.0) + sine(999.9, 0.2, 2.0)])
    p = power_spectrum(x, "hamming")
    both = find_peaks(p, DF, "hamming", N, count=3)
    assert both.frequency_hz.shape == both.amplitude_rms.shape == both.line.shape == (2, 3)
    for c in range(2):
        one = find_peaks(p[c], DF, "hamming", N, count=3)
        assert one.frequency_hz.shape == (3,)
        np.testing.assert_array_equal(one.frequency_hz, both.frequency_hz[c])
        np.testing.assert_array_equal(one.amplitude_rms, both.amplitude_rms[c])
        np.testing.assert_array_equal(one.line, both.line[c])
    assert both.frequency_hz[0, 0] == pytest.approx(501.3, abs=0.05 * DF)
    assert both.frequency_hz[1, 0] == pytest.approx(2222.2, abs=0.05 * DF)
    assert both.frequency_hz[1, 1] == pytest.approx(999.9, abs=0.05 * DF)


def test_hand_made_hann_line_shape_and_missing_peaks() -> None:
    # The periodic Hann window w[k] = ½ − ½·cos(2πk/N) has DFT N·(−¼, ½, −¼) on lines
    # (−1, 0, +1) (follows from its definition; Harris 1978), so a sine on line 2
    # reads power ratio ¼ on each neighbour: offset 0, amplitude √4 / g(0) = 2.
    n = 10
    p = np.array([0.0, 1.0, 4.0, 1.0, 0.0, 0.0])
    pk = find_peaks(p, 2.5, "hann", n, count=3)
    assert pk.line[0] == 2
    assert pk.frequency_hz[0] == pytest.approx(5.0, abs=1e-9)
    assert pk.amplitude_rms[0] == pytest.approx(2.0, rel=1e-9)
    # only one local maximum: the rest are NaN, line −1
    assert np.isnan(pk.frequency_hz[1:]).all() and np.isnan(pk.amplitude_rms[1:]).all()
    np.testing.assert_array_equal(pk.line[1:], [-1, -1])
    # a flat or empty spectrum has no peaks at all
    assert np.isnan(find_peaks(np.zeros(6), 2.5, "hann", n).amplitude_rms).all()


def test_min_and_max_hz_limit_the_search() -> None:
    x = sine(100.0, 5.0, 0.0) + sine(3000.0, 1.0, 0.0) + sine(9000.0, 3.0, 0.0)
    p = power_spectrum(x, "blackman-harris")
    pk = find_peaks(p, DF, "blackman-harris", N, count=1, min_hz=1000.0, max_hz=5000.0)
    assert pk.frequency_hz[0] == pytest.approx(3000.0, abs=1e-3)
    pk = find_peaks(p, DF, "blackman-harris", N, count=1, min_hz=1000.0)
    assert pk.frequency_hz[0] == pytest.approx(9000.0, abs=1e-3)


def _peaks_by_definition(p: np.ndarray, df: float, window: str, n: int, count: int,
                         min_hz: float, max_hz: float | None) -> list[tuple[int, float, float]]:
    """find_peaks' docstring written out line by line for one channel: every local maximum
    in range interpolated, all of them sorted by amplitude (ties: lower line), the first
    ``count`` as (line, frequency Hz, amplitude RMS)."""
    from dsp.tones import _interp_table

    r_tab, d_tab, g_tab = _interp_table(window, n, 0.0)
    found = []
    for q in range(1, p.size - 1):
        if not (p[q] > p[q - 1] and p[q] >= p[q + 1]):
            continue
        if q * df < min_hz or (max_hz is not None and q * df > max_hz):
            continue
        lf, rt = float(p[q - 1]), float(p[q + 1])
        d = float(np.interp(np.sqrt(max(lf, rt) / float(p[q])), r_tab, d_tab))
        a = np.sqrt(float(p[q])) / float(np.interp(d, d_tab, g_tab))
        found.append((-a, q, (q + (d if rt >= lf else -d)) * df))
    found.sort()
    return [(q, f, -na) for na, q, f in found[:count]]


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("window", ["hann", "flattop", "rectangular"])
def test_peaks_equal_their_definition_on_noisy_spectra(seed: int, window: str) -> None:
    # find_peaks interpolates only the maxima that can reach the top ``count`` (a pruning
    # bound from the window's scalloping); the result must be the definition's exactly, for
    # noise (a third of the lines are maxima), tones in noise, float32 input and both limits.
    rng = np.random.default_rng(seed)
    c, q_lines = 4, 1601
    x = rng.normal(0.0, 0.1, (c, N))
    for ch in range(c):
        for _ in range(ch * 2):
            x[ch] += sine(rng.uniform(50.0, 9000.0), rng.uniform(0.05, 3.0), rng.uniform(0, 6))
    p = power_spectrum(x, window)[:, :q_lines]
    p[0, 100:110] = p[0, 100]  # a plateau: ties never make two peaks
    p[1, 700] = np.nan  # a bad line is never a peak, nor are its neighbours made peaks
    p[2, 900] = np.inf  # an overflowed line is the largest peak
    dtype = np.float32 if seed % 2 else np.float64
    min_hz, max_hz = (0.0, None) if seed < 3 else (rng.uniform(0, 500), rng.uniform(2e3, 9e3))
    count = 1 + seed * 3
    pk = find_peaks(p.astype(dtype), DF, window, N, count=count,  # type: ignore[arg-type]
                    min_hz=min_hz, max_hz=max_hz)
    for ch in range(c):
        ref = _peaks_by_definition(p.astype(dtype)[ch], DF, window, N, count, min_hz, max_hz)
        got = [(int(pk.line[ch, i]), float(pk.frequency_hz[ch, i]), float(pk.amplitude_rms[ch, i]))
               for i in range(count) if pk.line[ch, i] >= 0]
        assert [g[0] for g in got] == [r[0] for r in ref]
        np.testing.assert_allclose([g[1:] for g in got], [r[1:] for r in ref], rtol=1e-12)
        assert np.isnan(pk.amplitude_rms[ch, len(ref):]).all()


def test_spectrum_cut_at_fmax_is_accepted() -> None:
    # Fewer lines than n//2 + 1 (a spectrum shown up to Fmax) works the same.
    p = power_spectrum(sine(1234.5, 1.0, 0.0), "kaiser")
    full = find_peaks(p, DF, "kaiser", N, count=1)
    cut = find_peaks(p[:1601], DF, "kaiser", N, count=1)
    assert cut.frequency_hz[0] == full.frequency_hz[0]


def test_find_peaks_errors() -> None:
    p = np.ones(N // 2 + 1)
    with pytest.raises(ValueError, match=r"window='hanning' is not one of 'rectangular', 'hann'"):
        find_peaks(p, DF, "hanning", N)  # type: ignore[arg-type]
    with pytest.raises(ValueError, match=r"count=0 must be an integer of at least 1"):
        find_peaks(p, DF, "hann", N, count=0)
    with pytest.raises(ValueError, match=r"df_hz=0\.0 must be a finite number > 0"):
        find_peaks(p, 0.0, "hann", N)
    with pytest.raises(ValueError, match=r"min_hz=-1\.0 must be a finite number >= 0"):
        find_peaks(p, DF, "hann", N, min_hz=-1.0)
    with pytest.raises(ValueError, match=r"max_hz=5\.0 must be greater than min_hz=10\.0"):
        find_peaks(p, DF, "hann", N, min_hz=10.0, max_hz=5.0)
    with pytest.raises(ValueError, match=r"power must be \(channels, lines\) or \(lines,\)"):
        find_peaks(np.ones((2, 2, 5)), DF, "hann", N)
    with pytest.raises(ValueError, match=r"power has 2050 lines, more than n//2 \+ 1 = 2049"):
        find_peaks(np.ones(2050), DF, "hann", N)


# ---------------------------------------------------------------- tracked tones


@pytest.mark.parametrize("window", ALL_WINDOWS)
def test_tone_kernel_reads_a_sine_at_its_exact_frequency(window: str) -> None:
    # The single-bin DFT at the sine's own frequency has no scalloping, so every window reads
    # peak²/2 (Heinzel 2002 §9 scaling, RMS = peak/√2) within ±0.02 dB. The residual is the
    # negative-frequency image at −f, 2f/Δf lines away; with f ≥ 300 lines from DC and
    # Nyquist the rectangular window's sidelobe there is ≈ −65 dB, i.e. < 0.005 dB.
    rng = np.random.default_rng(5)
    n_ch, n_fr = 2, 3
    f_true = (rng.integers(300, N // 2 - 300, size=n_ch) + rng.random(n_ch)) * DF
    peaks = rng.uniform(0.1, 10.0, size=(n_ch, n_fr))
    phases = rng.uniform(0, 2 * np.pi, size=(n_ch, n_fr))
    k = np.arange(N)
    frames = peaks[..., None] * np.sin(
        2 * np.pi * f_true[:, None, None] * k / FS + phases[..., None]
    )  # (C, P, n)
    freqs = np.stack([f_true, f_true * 0.5], axis=1)  # (C, T=2): the tone and a probe
    kern = tone_kernel(freqs, N, FS, window)  # type: ignore[arg-type]
    assert kern.dtype == np.float32 and kern.shape == (n_ch, N, 4)
    y = frames.astype(np.float32) @ kern  # (C, P, 2T)
    x_tone = y[..., :2] + 1j * y[..., 2:]
    s1 = get_window(window, N).sum()  # type: ignore[arg-type]
    got = tone_power(x_tone, s1)[..., 0]
    np.testing.assert_allclose(10 * np.log10(got / (peaks**2 / 2)), 0.0, atol=0.02)


@pytest.mark.parametrize("window", ALL_WINDOWS)
def test_tone_kernel_equals_float64_dtft_and_goertzel(window: str) -> None:
    rng = np.random.default_rng(17)
    frames = rng.normal(0.0, 1.0, size=(2, 3, N))
    freqs = rng.uniform(0, FS / 2, size=(2, 5))
    kern = tone_kernel(freqs, N, FS, window)  # type: ignore[arg-type]
    y = (frames.astype(np.float32) @ kern).astype(np.float64)
    got = y[..., :5] + 1j * y[..., 5:]
    w = get_window(window, N)  # type: ignore[arg-type]
    for c in range(2):
        for t in range(5):
            want = direct_dtft(frames[c], w, freqs[c, t])  # (P,)
            # float32 kernel and frames: each term rounds by ~2 ε32 and the sum of n terms
            # accumulates ~√n of them; bound by 4·ε32·√n·‖w·x‖₂ with margin.
            scale = np.linalg.norm(frames[c] * w, axis=-1)
            tol = 4 * np.finfo(np.float32).eps * np.sqrt(N) * scale
            assert np.all(np.abs(got[c, :, t] - want) <= tol)
            # the Goertzel recursion (Goertzel 1958) is a second float64 reference
            np.testing.assert_allclose(
                goertzel(frames[c], freqs[c, t], FS, window),  # type: ignore[arg-type]
                want,
                rtol=0,
                atol=1e-9 * float(scale.max()),
            )


def test_tone_kernel_at_line_centres_equals_rfft() -> None:
    # At f = q·fs/n the single-bin DFT is the DFT line: scipy.fft.rfft of the windowed frame.
    rng = np.random.default_rng(23)
    frames = rng.normal(0.0, 1.0, size=(4, N))
    lines = np.array([0, 1, 17, 640, N // 2])
    w = get_window("blackman-harris", N)
    kern = tone_kernel(lines * DF, N, FS, "blackman-harris")
    assert kern.shape == (N, 2 * lines.size)  # (T,) frequencies broadcast over channels
    y = (frames.astype(np.float32) @ kern).astype(np.float64)
    want = scipy.fft.rfft(frames * w, axis=-1)[:, lines]
    tol = 4 * np.finfo(np.float32).eps * np.sqrt(N) * np.linalg.norm(frames * w, axis=-1)
    assert np.all(np.abs(y[:, : lines.size] + 1j * y[:, lines.size :] - want) <= tol[:, None])
    # tone_power on a line equals the power-spectrum line (scipy.signal.periodogram)
    p = power_spectrum(frames, "blackman-harris")
    np.testing.assert_allclose(tone_power(want[:, 2], w.sum()), p[:, 17], rtol=1e-12)


def test_tone_kernel_and_power_errors() -> None:
    with pytest.raises(ValueError, match=r"freqs_hz must lie in \[0, fs/2\] = \[0, 12800\.0\]"):
        tone_kernel(np.array([13000.0]), N, FS, "hann")
    with pytest.raises(ValueError, match=r"freqs_hz must be \(channels, tones\) or \(tones,\)"):
        tone_kernel(np.ones((1, 1, 1)), N, FS, "hann")
    with pytest.raises(ValueError, match=r"fs=0\.0 must be a finite number > 0"):
        tone_kernel(np.array([10.0]), N, 0.0, "hann")
    with pytest.raises(ValueError, match=r"window='hanning' is not one of"):
        tone_kernel(np.array([10.0]), N, FS, "hanning")  # type: ignore[arg-type]
    with pytest.raises(ValueError, match=r"s1=0\.0 must be a finite number > 0"):
        tone_power(np.array([1 + 1j]), 0.0)


def test_harmonics_and_orders() -> None:
    # 1X…nX are integer multiples of running speed (common practice).
    np.testing.assert_array_equal(harmonics(24.5, 4), [24.5, 49.0, 73.5, 98.0])
    np.testing.assert_allclose(
        orders_to_hz(np.array([0.5, 1.0, 2.0]), 1470 / 60), [12.25, 24.5, 49.0]
    )
    with pytest.raises(ValueError, match=r"count=0 must be an integer of at least 1"):
        harmonics(24.5, 0)
    with pytest.raises(ValueError, match=r"f1_hz=-1\.0 must be a finite number > 0"):
        harmonics(-1.0, 3)
    with pytest.raises(ValueError, match=r"shaft_hz=0\.0 must be a finite number > 0"):
        orders_to_hz(1.0, 0.0)

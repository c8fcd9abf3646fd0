"""The whole analysis (filter bank → averaging → units → bands, tones, peaks) end to end."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from dsp.analyzer import Analyzer
from dsp.bands import Band, band_rms, band_weights
from dsp.grid import FrameGrid
from dsp.spec import AnalysisSpec, ToneDef

G_N = 9.80665  # m/s², exact (3rd CGPM, 1901)


def _sines(fs, seconds, parts, channels=1, noise=0.0, seed=0):
    k = np.arange(int(fs * seconds))
    x = sum(a * np.sin(2 * np.pi * f * k / fs + ph) for a, f, ph in parts)
    x = np.tile(x, (channels, 1))
    if noise:
        x = x + np.random.default_rng(seed).normal(0, noise, x.shape)
    return x.astype(np.float32)


def _spec(**kw):
    base = dict(grid=FrameGrid.from_fmax(1000, 800, overlap=0.75), averaging="linear",
                averages=10_000, input_unit="g", unit="velocity")
    base.update(kw)
    return AnalysisSpec(**base)


def test_one_g_rms_at_100_hz_reads_15_608_mm_s():
    # docs/references.md [computed]: 1 g RMS at 100 Hz = 15.608 mm/s RMS = 24.84 µm RMS.
    spec = _spec(bands=(Band("b", 80, 120),), tones=(ToneDef("t", hz=100.0),))
    an = Analyzer(spec, 1)
    an.push(_sines(2560.0, 8, [(np.sqrt(2), 100.0, 0.3)]))
    assert an.bands()[0, 0] == pytest.approx(15.608, rel=5e-4)
    assert an.tones()[0, 0] == pytest.approx(15.608, rel=5e-4)
    assert an.bands("um")[0, 0] == pytest.approx(24.84, rel=5e-4)
    assert an.tones("g", "peak")[0, 0] == pytest.approx(np.sqrt(2), rel=1e-4)
    pk = an.peaks("mm/s")
    assert pk.frequency_hz[0, 0] == pytest.approx(100.0, abs=0.05 * an.grid.df_hz)
    assert pk.amplitude_rms[0, 0] == pytest.approx(15.608, rel=5e-4)


@pytest.mark.parametrize("window", ["rectangular", "hann", "hamming", "blackman-harris",
                                    "flattop", "kaiser"])
def test_tracked_tone_exact_at_any_frequency(window):
    # A tracked tone is the single-bin DFT at the tone's own frequency: no scalloping, so
    # within ±0.02 dB for every window (issue requirement; scalloping values from
    # Harris 1978 would otherwise cost up to 3.9 dB). Tones sit hundreds of lines from DC
    # so the negative-frequency image's leakage stays below 0.002 dB even for rectangular.
    rng = np.random.default_rng(11)
    fs = 2560.0
    freqs = 300.0 + rng.uniform(0, 400, 3)
    amps = np.array([1.0, 0.3, 0.05])
    x = _sines(fs, 6, [(a, f, rng.uniform(0, 6)) for a, f in zip(amps, freqs, strict=True)])
    spec = _spec(window=window, unit="g", amplitude="peak",
                 tones=tuple(ToneDef(f"t{i}", hz=float(f)) for i, f in enumerate(freqs)))
    an = Analyzer(spec, 1)
    an.push(x)
    err_db = 20 * np.log10(an.tones()[0] / amps)
    assert np.all(np.abs(err_db) < 0.02), err_db


def test_order_bands_and_tones_follow_the_speed():
    spec = _spec(bands=(Band("1x", 0.8, 1.2, "order"),), tones=(ToneDef("1x", order=1.0),),
                 unit="g")
    an = Analyzer(spec, 2, speed_hz=np.array([24.7, np.nan]))
    x = _sines(2560.0, 8, [(1.0, 24.7, 0.0)], channels=2)
    an.push(x[:, : x.shape[1] // 2])
    assert an.tones()[0, 0] == pytest.approx(1 / np.sqrt(2), rel=1e-4)
    assert np.isnan(an.tones()[1, 0]) and np.isnan(an.bands()[1, 0])
    np.testing.assert_allclose(an.band_edges_hz[0, 0], [0.8 * 24.7, 1.2 * 24.7])
    an.set_speed(np.array([24.7, 24.7]))  # new tone frequencies: the tone average restarts
    an.push(x[:, x.shape[1] // 2 :])
    assert an.tones()[1, 0] == pytest.approx(1 / np.sqrt(2), rel=1e-4)


def test_bands_equal_the_band_weight_matrix():
    # The analyzer's cumulative-sum band sums must equal dsp.bands.band_rms with
    # dsp.bands.band_weights (partial lines at the edges counted pro rata).
    bands = (Band("a", 10, 1000), Band("b", 0, 7.3), Band("c", 100.1, 100.4),
             Band("d", 900, 2000), Band("e", 10, 1000.0001))
    spec = _spec(bands=bands, unit="g")
    an = Analyzer(spec, 3)
    an.push(np.random.default_rng(2).normal(size=(3, 30000)).astype(np.float32))
    w = band_weights(an.band_edges_hz[0], 0.0, an.grid.df_hz, an.q)  # lines 0…Fmax
    ref = band_rms(an.power("g"), w, an.info.enbw_bins)
    np.testing.assert_allclose(an.bands("g"), ref, rtol=1e-6)


def test_bands_with_edges_that_differ_by_channel_equal_the_band_weight_matrix():
    # Order bands follow each channel's own speed, so each channel has its own edges (one
    # with no speed: NaN); the sums, over the lines between the lowest and the highest edge
    # of all channels, must still equal dsp.bands.band_rms with band_weights channel by
    # channel. A band from 0 Hz and one up to Fmax stretch that range to the whole spectrum.
    bands = (Band("1x", 0.8, 1.2, "order"), Band("3x", 2.5, 3.5, "order"),
             Band("wide", 5.0, 6.5, "order"), Band("fixed", 300.0, 320.5))
    for extra in ((), (Band("dc", 0.0, 3.0), Band("top", 990.0, 1000.0))):
        spec = _spec(bands=bands + extra, unit="g")
        an = Analyzer(spec, 4, speed_hz=np.array([24.75, 49.3, np.nan, 7.77]))
        an.push(np.random.default_rng(5).normal(size=(4, 30000)).astype(np.float32))
        got = an.bands("g")
        for c in range(4):
            ok = np.isfinite(an.band_edges_hz[c, :, 0])
            w = band_weights(an.band_edges_hz[c, ok], 0.0, an.grid.df_hz, an.q)
            ref = band_rms(an.power("g")[c], w, an.info.enbw_bins)
            np.testing.assert_allclose(got[c, ok], ref, rtol=1e-6)
            assert np.isnan(got[c, ~ok]).all()
        assert np.isnan(got[2, :3]).all() and np.isfinite(got[2, 3:]).all()


def test_white_noise_band_power():
    # White noise of variance σ² has band power σ²·(hi−lo)/(fs/2) (docs/references.md, Parseval).
    fs, sigma = 2560.0, 0.7
    spec = _spec(bands=(Band("mid", 200, 600),), unit="g", window="hann")
    an = Analyzer(spec, 1)
    an.push(np.random.default_rng(3).normal(0, sigma, (1, int(fs * 60))).astype(np.float32))
    expected = sigma * np.sqrt(400 / (fs / 2))
    assert an.bands()[0, 0] == pytest.approx(expected, rel=0.03)


@settings(max_examples=25, deadline=None)
@given(st.lists(st.integers(min_value=1, max_value=4000), min_size=1, max_size=10))
def test_streaming_equals_batch(cuts):
    x = _sines(2560.0, 5, [(1.0, 123.4, 0.0), (0.2, 777.7, 1.0)], channels=2, noise=0.1)
    spec = _spec(averaging="exponential", averages=4, bands=(Band("a", 100, 200),),
                 tones=(ToneDef("t", hz=123.4),))
    one = Analyzer(spec, 2)
    one.push(x)
    many = Analyzer(spec, 2)
    for part in np.split(x, np.unique(np.clip(np.cumsum(cuts), 0, x.shape[1])), axis=1):
        many.push(part)
    assert many.count == one.count and many.last_end_index == one.last_end_index
    np.testing.assert_allclose(many.spectrum(), one.spectrum(), rtol=1e-5)
    np.testing.assert_allclose(many.bands(), one.bands(), rtol=1e-5)
    np.testing.assert_allclose(many.tones(), one.tones(), rtol=1e-5)


def test_gap_restarts_the_average():
    spec = _spec(averaging="linear", averages=1000)
    an = Analyzer(spec, 1)
    an.push(_sines(2560.0, 2, [(1.0, 100.0, 0.0)]), first_index=0)
    before = an.count
    assert before > 5
    an.push(_sines(2560.0, 1, [(1.0, 100.0, 0.0)]), first_index=10 * 2560)  # a jump: a gap
    assert an.bank.resets == 1
    assert 0 < an.count < before
    assert an.last_end_index == 10 * 2560 + (an.count - 1) * an.grid.hop + an.grid.n


def test_spec_errors():
    with pytest.raises(ValueError, match=r"unit='furlongs' is not one of"):
        _spec(unit="furlongs")
    with pytest.raises(ValueError, match=r"band names repeat: \['a', 'a'\]"):
        _spec(bands=(Band("a", 1, 2), Band("a", 3, 4)))
    with pytest.raises(ValueError, match=r"tone 't': give exactly one of hz or order"):
        ToneDef("t")


def test_exponential_average_equals_the_per_frame_definition():
    # The fused exponential path (weighted sums of |X|² inside the filter bank) against the
    # definitions in float64: PS = 2|X|²/S1², DC not doubled (Heinzel 2002 §9), and
    # y_k = y_{k-1} + (PS_k − y_{k-1})/min(k, N) one frame at a time; tones likewise at
    # their own frequency, X(f) = Σ w[k]·x[k]·e^(−2πi·f·k/fs). Lines q ≥ 1 are those of
    # the frame less its window-weighted mean c = Σ w·x / Σ w (docs/low-frequency.md).
    n_eq = 3.5
    spec = _spec(averaging="exponential", averages=n_eq, unit="g", input_unit="g",
                 tones=(ToneDef("a", hz=123.4), ToneDef("b", hz=640.0)))
    an = Analyzer(spec, 3)
    x = _sines(2560.0, 4, [(1.0, 123.4, 0.0), (0.3, 640.0, 1.0)], channels=3, noise=0.2, seed=5)
    for part in np.split(x, [700, 2000, 2001, 5100, 8000], axis=1):
        an.push(part)
    g, w = an.grid, an.bank.w
    starts = np.arange(0, x.shape[1] - g.n + 1, g.hop)
    assert an.count == 4 and an.last_end_index == starts[-1] + g.n
    frames = x[:, starts[:, None] + np.arange(g.n)].astype(np.float64)  # [C, P, N]
    c = (frames @ w / w.sum())[..., None]
    spec = np.fft.rfft(w * (frames - c), axis=-1)[..., : an.q]
    spec[..., 0] = c[..., 0] * w.sum()  # the DC line is kept as measured
    ps = 2 * np.abs(spec) ** 2 / w.sum() ** 2
    ps[..., 0] /= 2
    k = np.arange(g.n)
    kern = w * np.exp(-2j * np.pi * np.array([[123.4], [640.0]]) * k / g.fs)  # [T, N]
    tp = 2 * np.abs((frames - c) @ kern.T) ** 2 / w.sum() ** 2  # [C, P, T]
    y, yt = np.zeros((3, an.q)), np.zeros((3, 2))
    for i in range(starts.size):
        y += (ps[:, i] - y) / min(i + 1, n_eq)
        yt += (tp[:, i] - yt) / min(i + 1, n_eq)
    np.testing.assert_allclose(an.power("g"), y, rtol=1e-5, atol=1e-7 * y.max())
    np.testing.assert_allclose(an.tones("g"), np.sqrt(yt), rtol=1e-5)


def _peaks_by_definition(an, unit, count):
    """Analyzer.peaks written out: every local maximum of the acceleration power spectrum
    at or above the low-frequency limit, interpolated on it (``dsp.tones.find_peaks``, itself
    checked line by line in test_tones), weighted to ``unit`` at its interpolated frequency
    (``dsp.scaling.unit_power_weights``) and sorted largest first: (Hz, RMS) pairs."""
    from dsp.scaling import unit_power_weights
    from dsp.tones import find_peaks

    p = an.power("m/s2")[0]
    allpk = find_peaks(p, an.grid.df_hz, an.spec.window, an.grid.n, count=p.size,
                       min_hz=an.lowcut_hz, beta=an.spec.beta)
    ok = np.isfinite(allpk.frequency_hz)
    f, a = allpk.frequency_hz[ok], allpk.amplitude_rms[ok]
    w = unit_power_weights(f, "m/s2", unit, lowcut_hz=an.lowcut_hz)
    amp = np.sqrt(a**2 * w)
    order = np.argsort(-amp, kind="stable")[:count]
    return list(zip(f[order].tolist(), amp[order].tolist(), strict=True))


@pytest.mark.parametrize("window", ["rectangular", "hann", "hamming", "blackman-harris",
                                    "flattop", "kaiser"])
@pytest.mark.parametrize("lines", [100, 400, 1600, 6400])
def test_peaks_are_the_largest_local_maxima_for_every_window_and_line_count(window, lines):
    # Regression (issue 14, item 1): missing candidates (NaN) were ranked as −inf, ahead of
    # every real peak, so a clean sine gave no peaks at all (Hamming, rectangular; every
    # window at 100 lines). The peaks must be the definition's: the largest local maxima,
    # interpolated through the window's own transform (Harris 1978; find_peaks docstring).
    rng = np.random.default_rng(lines + len(window))
    fs = 12800.0
    grid = FrameGrid.from_fmax(fs / 2.56, lines, overlap=0.5)
    df = grid.df_hz
    tones_hz = np.sort(rng.uniform(20 * df, 0.9 * fs / 2.56, 3))
    while np.min(np.diff(tones_hz)) < 12 * df:  # resolvable: a few main lobes apart
        tones_hz = np.sort(rng.uniform(20 * df, 0.9 * fs / 2.56, 3))
    amps = rng.uniform(0.3, 2.0, 3)
    x = _sines(fs, 3 * grid.n / fs, [(a, f, rng.uniform(0, 6)) for a, f in
                                     zip(amps, tones_hz, strict=True)])
    for unit in ("g", "mm/s"):
        an = Analyzer(_spec(grid=grid, window=window, unit=unit, peaks=8), 1)
        an.push(x)
        pk = an.peaks()
        got = [(f, a) for f, a in zip(pk.frequency_hz[0], pk.amplitude_rms[0], strict=True)
               if np.isfinite(f)]
        ref = _peaks_by_definition(an, unit, 8)
        assert len(got) == len(ref) >= 3  # fewer than 8 maxima: all of them
        np.testing.assert_allclose(got, ref, rtol=1e-9)
        if unit == "g":  # the three tones lead, at their frequencies and RMS (A/√2)
            top = sorted(got[:3])
            np.testing.assert_allclose([t[0] for t in top], tones_hz, atol=0.05 * df)
            np.testing.assert_allclose([t[1] for t in top], amps / np.sqrt(2), rtol=0.02)


WINDOWS = ["rectangular", "hann", "hamming", "blackman-harris", "flattop", "kaiser"]


@pytest.mark.parametrize("averaging", ["linear", "exponential"])
@pytest.mark.parametrize("window", WINDOWS)
def test_dc_offset_does_not_reach_the_overall_in_any_unit(window, averaging):
    # Regression (issue 14, item 3): 5 g DC + a 1 g-peak sine at 100.3 Hz read an
    # acceleration overall of 2.769 g (the DC's main lobe summed in); the low-frequency
    # limit now applies to every unit. Expected: RMS of a sine = A/√2 (docs/references.md);
    # in velocity and displacement the DC must change nothing (the sine alone is the
    # reference: integrating line by line bends a sine's main lobe by 1/f², a bias of its
    # own, 0.05-0.8 % here, that the DC has no part in). Kaiser's sidelobes (−63 dB at
    # β 8.6) used to carry the DC past the limit, and double integration magnified them:
    # +6.7 % in um and mil, until each frame's window-weighted mean was taken out of its
    # lines (dsp.filterbank, remove_dc). Both averaging paths (push and push_power).
    # Tracked tones above the limit likewise: a tone at 20 Hz (off a line centre) read
    # 5.2 µm RMS of the 5 g offset under Hann, 207 µm under rectangular, where it reads
    # the sine's leakage alone (0.007 and 5.6 µm) without the offset.
    grid = FrameGrid.from_fmax(5000, 1600, overlap=0.75)
    sine = _sines(grid.fs, 4, [(1.0, 100.3, 0.4)])
    values, tones = [], []
    units = ("g", "m/s2", "mm/s", "in/s", "um", "mil")
    for dc in (0.0, 5.0):
        an = Analyzer(_spec(grid=grid, window=window, averaging=averaging,
                            averages=8 if averaging == "exponential" else 10_000,
                            bands=(Band("overall", 2.0, 5000.0),),
                            tones=(ToneDef("a", hz=100.3), ToneDef("b", hz=20.0))), 1)
        an.push((dc + sine).astype(np.float32))
        assert an.band_edges_hz[0, 0, 0] == pytest.approx(an.lowcut_hz)
        values.append({u: an.bands(u)[0, 0] for u in units})
        tones.append({u: an.tones(u)[0] for u in units})
    for unit in units:
        a0, b0 = tones[0][unit]
        assert tones[1][unit][0] == pytest.approx(a0, rel=1e-3), unit
        assert tones[1][unit][1] == pytest.approx(b0, abs=1e-3 * a0), unit
    assert values[1]["g"] == pytest.approx(1 / np.sqrt(2), rel=1e-3)
    assert values[1]["m/s2"] == pytest.approx(G_N / np.sqrt(2), rel=1e-3)
    # against theory, v = a/(2πf) and d = a/(2πf)² (docs/references.md): line-by-line
    # integration weighs a sine's main lobe by 1/f² (1/f⁴) across its width, a bias of
    # about (Δf/f)² that we measured at 0.05-0.23 % (velocity) and 0.16-0.76 % (displacement)
    # here; the rectangular window's slowly falling sidelobes make it 1.3 % and 250 %.
    w0 = 2 * np.pi * 100.3
    if window != "rectangular":
        assert values[0]["mm/s"] == pytest.approx(1e3 * G_N / np.sqrt(2) / w0, rel=3e-3)
        assert values[0]["um"] == pytest.approx(1e6 * G_N / np.sqrt(2) / w0**2, rel=1e-2)
    for unit, value in values[0].items():
        assert values[1][unit] == pytest.approx(value, rel=1e-3), unit


@pytest.mark.parametrize("window", WINDOWS)
def test_tones_and_bands_below_the_low_frequency_limit_read_nan(window):
    # Regression (issue 14, item 4): a 1 g tone at 12 Hz under a flat-top at 3.125 Hz lines
    # (limit 5 lines = 15.6 Hz) read 0.0 mm/s instead of "not measured". Below the limit a
    # tone and a band read NaN in every unit; above it a tone reads its value (1 g RMS at
    # f is g_n/(2πf) m/s RMS).
    grid = FrameGrid.from_fmax(5000, 1600, overlap=0.75)
    spec = _spec(grid=grid, window=window,
                 tones=(ToneDef("1x", order=1.0), ToneDef("hi", hz=40.0)),
                 bands=(Band("low", 1.0, 2.5), Band("part", 1.0, 60.0)))
    an = Analyzer(spec, 1, speed_hz=np.array([12.0]))
    x = _sines(grid.fs, 3, [(np.sqrt(2), 12.0, 0.1), (np.sqrt(2), 40.0, 0.2)])
    an.push(x)
    limit = an.lowcut_hz
    assert an.tone_hz[0, 0] == pytest.approx(12.0)
    assert an.tone_masked[0].tolist() == [12.0 < limit, False]
    for unit in ("g", "mm/s", "um"):
        t = an.tones(unit)[0]
        assert np.isnan(t[0]) == (12.0 < limit)
        assert np.isnan(an.bands(unit)[0, 0])
        assert an.band_masked[0].tolist() == [True, False]
    assert an.tones("mm/s")[0, 1] == pytest.approx(1e3 * G_N / (2 * np.pi * 40.0), rel=2e-3)
    assert an.band_edges_hz[0, 1].tolist() == [limit, 60.0]


def test_dc_offset_does_not_hide_a_peak_just_above_the_low_frequency_limit():
    # Under Hann at 3.125 Hz lines (limit 6.25 Hz), a 5 g offset put 3.5 g on line 1, so a
    # 1 g-peak tone at 7 Hz (line 2.24, its neighbour line 1) was no local maximum and left
    # the peaks list. With each frame's offset removed from line 1 on, it is found, at its
    # frequency and amplitude (the same as without the offset). docs/low-frequency.md.
    grid = FrameGrid.from_fmax(5000, 1600, overlap=0.75)
    x = _sines(grid.fs, 4, [(1.0, 7.0, 0.0), (0.3, 100.3, 0.2)])
    found = []
    for dc in (0.0, 5.0):
        an = Analyzer(_spec(grid=grid, window="hann", unit="g", peaks=3), 1)
        an.push((dc + x).astype(np.float32))
        pk = an.peaks("g", "peak")
        found.append((pk.frequency_hz[0, :2], pk.amplitude_rms[0, :2]))
    for f_hz, amp in found:
        np.testing.assert_allclose(f_hz, [7.0, 100.3], atol=0.05)
        np.testing.assert_allclose(amp, [1.0, 0.3], rtol=0.02)

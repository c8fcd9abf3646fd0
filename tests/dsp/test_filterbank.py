"""The streaming filter bank against scipy.signal and against itself cut differently."""

import numpy as np
import pytest
import scipy.signal
from hypothesis import given, settings
from hypothesis import strategies as st

from dsp.averaging import Averager
from dsp.filterbank import FilterBank, dc_shape
from dsp.grid import FrameGrid
from dsp.scaling import power_spectrum, psd_from_power
from dsp.windows import get_window


def _signal(c=3, n=20000, fs=4096.0, seed=1):
    rng = np.random.default_rng(seed)
    k = np.arange(n)
    x = rng.normal(0.0, 0.3, (c, n))
    for ch in range(c):
        x[ch] += (ch + 1) * np.sin(2 * np.pi * (210.37 + 50 * ch) * k / fs)
    return x.astype(np.float32)


def test_grid_from_fmax_and_lines():
    # The trade's set-up: fs = 2.56·Fmax, N = 2.56·lines (common practice).
    g = FrameGrid.from_fmax(20000, 3200, overlap=0.75)
    assert (g.fs, g.n, g.hop, g.lines, g.bins) == (51200.0, 8192, 2048, 3200, 4097)
    assert g.df_hz == pytest.approx(6.25)
    assert g.fmax_hz == pytest.approx(20000)
    assert FrameGrid.from_fmax(1000, 400, overlap=0.0).hop == 1024
    with pytest.raises(ValueError, match=r"lines=1001 gives a frame of 2.56×1001 = 2562.56"):
        FrameGrid.from_fmax(5000, 1001)
    with pytest.raises(ValueError, match=r"overlap=1.0 must be a fraction in \[0, 1\)"):
        FrameGrid.from_fmax(5000, 1600, overlap=1.0)
    with pytest.raises(ValueError, match=r"fs=-1.0 must be a positive number of Hz"):
        FrameGrid(fs=-1.0, n=1024, hop=256)


@pytest.mark.parametrize("window,scipy_window", [("hann", "hann"), ("flattop", "flattop"),
                                                 ("blackman-harris", "blackmanharris")])
def test_psd_equals_scipy_welch(window, scipy_window):
    # Reference: scipy.signal.welch, same window, nperseg, noverlap, detrend=False,
    # mean averaging, one-sided density scaling. Required agreement: 1e-5 relative.
    fs, n = 4096.0, 1024
    x = _signal(fs=fs)
    grid = FrameGrid.from_n(n, fs, overlap=0.75)
    fb = FilterBank(grid, 3, window)
    avg = Averager("linear", 10_000)
    batch = fb.push(x)
    avg.update(power_spectrum(batch.spectra, fb.info.s1, n))
    ours = psd_from_power(avg.value, fb.info.enbw_hz(fs))
    f, ref = scipy.signal.welch(x.astype(np.float64), fs, window=scipy_window, nperseg=n,
                                noverlap=n - grid.hop, detrend=False, average="mean")
    assert avg.count == (x.shape[1] - n) // grid.hop + 1
    np.testing.assert_allclose(grid.frequencies(), f)
    np.testing.assert_allclose(ours, ref, rtol=1e-5, atol=1e-5 * ref.max())
    noise_bins = ref < 1e-3 * ref.max()
    np.testing.assert_allclose(ours[noise_bins], ref[noise_bins], rtol=1e-5)


@settings(max_examples=40, deadline=None)
@given(st.lists(st.integers(min_value=0, max_value=3000), min_size=1, max_size=12))
def test_streaming_equals_batch(cuts):
    # Streaming equals batch (our style rule): any split points give identical frames.
    x = _signal(c=2, n=9000)
    grid = FrameGrid.from_n(512, 4096.0, overlap=0.6)
    one = FilterBank(grid, 2, "hann", tone_hz=np.array([123.4, 987.65]))
    ref = one.push(x)
    many = FilterBank(grid, 2, "hann", tone_hz=np.array([123.4, 987.65]))
    edges = np.unique(np.clip(np.cumsum(cuts), 0, x.shape[1]))
    parts = [many.push(p) for p in np.split(x, edges, axis=1)]
    np.testing.assert_array_equal(np.concatenate([p.start for p in parts]), ref.start)
    np.testing.assert_array_equal(np.concatenate([p.spectra for p in parts], axis=1), ref.spectra)
    np.testing.assert_allclose(np.concatenate([p.tones for p in parts], axis=1), ref.tones,
                               rtol=0, atol=1e-4 * np.abs(ref.tones).max())
    assert one.pending == many.pending


def test_frames_never_straddle_a_gap():
    fs, n = 1000.0, 100
    grid = FrameGrid.from_n(n, fs, overlap=0.5)
    fb = FilterBank(grid, 1, "rectangular")
    first = fb.push(np.ones((1, 180), np.float32), first_index=0)
    assert list(first.start) == [0, 50]
    # 70 samples held; the next block starts at 1000, not 180: a gap.
    after = fb.push(np.full((1, 260), 2.0, np.float32), first_index=1000)
    assert list(after.start) == [1000, 1050, 1100, 1150]
    # Every frame after the gap holds only the new samples (DC line = 2·Σw).
    np.testing.assert_allclose(after.spectra[0, :, 0].real, 2.0 * n)
    assert fb.resets == 1 and fb.next_index == 1260


def test_tracked_tone_is_single_bin_dft_at_any_frequency():
    # X(f) = Σ w[k] x[k] e^(−2πifk/fs), evaluated here directly in float64.
    fs, n = 2048.0, 2048
    grid = FrameGrid.from_n(n, fs, overlap=0.0)
    f_tone = np.array([[101.37, 640.0], [333.3, 1000.01]])
    fb = FilterBank(grid, 2, "hann", tone_hz=f_tone)
    x = _signal(c=2, n=n, fs=fs, seed=5)
    batch = fb.push(x)
    k = np.arange(n)
    for c in range(2):
        for t in range(2):
            phase = np.exp(-2j * np.pi * f_tone[c, t] * k / fs)
            ref = np.sum(fb.w * x[c].astype(np.float64) * phase)
            assert batch.tones[c, 0, t] == pytest.approx(ref, rel=2e-5, abs=1e-3)
    # At a line centre the tracked tone equals the rfft line.
    fb.set_tones(np.array([640.0]))
    b2 = FilterBank(grid, 2, "hann", tone_hz=np.array([640.0])).push(x)
    np.testing.assert_allclose(b2.tones[:, 0, 0], b2.spectra[:, 0, 640], rtol=1e-5)


def test_sine_on_line_reads_its_peak():
    # Heinzel 2002 §9: peak amplitude = 2|X|/S1 for a sine on a line centre.
    grid = FrameGrid.from_fmax(1000, 400, overlap=0.5)
    fb = FilterBank(grid, 1, "flattop")
    k = np.arange(4 * grid.n)
    x = 3.0 * np.sin(2 * np.pi * 100 * grid.df_hz * k / grid.fs)
    b = fb.push(x.astype(np.float32)[None])
    assert 2 * np.abs(b.spectra[0, :, 100]) / fb.info.s1 == pytest.approx(3.0, rel=1e-5)


def test_bad_blocks_are_refused():
    fb = FilterBank(FrameGrid.from_n(64, 100.0), 2)
    with pytest.raises(ValueError, match=r"block has shape \(3, 10\); expected \(2, n\)"):
        fb.push(np.zeros((3, 10), np.float32))
    with pytest.raises(ValueError, match=r"window='hamm' is not one of"):
        FilterBank(FrameGrid.from_n(64, 100.0), 2, "hamm")
    with pytest.raises(ValueError, match=r"tone frequencies must lie in \[0, fs/2 = 50\] Hz"):
        fb.set_tones(np.array([60.0]))
    assert fb.pending == 0


def _dft64(fb, x, start, f_hz):
    """X(f) = Σ w[k]·x[start+k]·e^(−2πi·f·k/fs) in float64, straight from the definition."""
    k = np.arange(fb.grid.n)
    seg = x[start : start + fb.grid.n].astype(np.float64)
    return np.sum(fb.w * seg * np.exp(-2j * np.pi * f_hz * k / fb.grid.fs))


@pytest.mark.parametrize("overlap,window,rank", [
    (0.0, "hann", 1), (0.5, "hann", 2), (0.75, "hann", 3), (0.875, "hann", 3),
    (0.75, "rectangular", 1), (0.875, "blackman-harris", 7), (0.75, "kaiser", 4),
    (0.75, "flattop", 4)])
def test_block_tones_equal_the_float64_dft(overlap, window, rank):
    # Hop divides N: tones come from hop-long blocks of raw samples against a basis of the
    # window's pieces, products kept across pushes. Reference: the definition in float64
    # for every frame. Expected rank: a cosine sum of m terms spans 2m − 1 functions
    # (1, cos, sin of each harmonic), capped by the number of pieces; Hann has m = 2 and
    # Blackman-Harris m = 4 (Harris 1978), scipy's flattop m = 5; Kaiser is no cosine sum.
    fs, n = 4096.0, 1024
    grid = FrameGrid.from_n(n, fs, overlap=overlap)
    assert n % grid.hop == 0
    f_tone = np.array([[101.37, 640.0, 1999.9], [333.3, 1000.01, 12.5], [101.37, 640.0, 1999.9]])
    fb = FilterBank(grid, 3, window, tone_hz=f_tone)  # two kernel groups
    assert fb._window_basis[0].shape[0] == rank
    x = _signal(c=3, n=9000, fs=fs, seed=7)
    parts = [fb.push(p) for p in np.split(x, [100, 1500, 1501, 4000, 7777], axis=1)]
    starts = np.concatenate([p.start for p in parts])
    tones = np.concatenate([p.tones for p in parts], axis=1)
    assert starts.size == (x.shape[1] - n) // grid.hop + 1
    scale = np.abs(tones).max()
    for c in range(3):
        for i, s in enumerate(starts):
            ref = np.array([_dft64(fb, x[c], s, f) for f in f_tone[c]])
            np.testing.assert_allclose(tones[c, i], ref, rtol=0, atol=2e-6 * scale)


def test_block_tones_restart_after_a_gap_and_a_new_tone_set():
    fs, n = 2048.0, 256
    grid = FrameGrid.from_n(n, fs, overlap=0.75)
    fb = FilterBank(grid, 1, "flattop", tone_hz=np.array([300.3]))
    x = _signal(c=1, n=3000, fs=fs, seed=8)[0]
    fb.push(x[None, :1000], first_index=0)
    after = fb.push(x[None, 1000:2000], first_index=5000)  # a gap: kept products are dropped
    assert after.start[0] == 5000
    np.testing.assert_allclose(after.tones[0, 0, 0], _dft64(fb, x[1000:], 0, 300.3),
                               rtol=2e-6)  # definition, float64
    fb.set_tones(np.array([77.7, 500.0]))
    b = fb.push(x[None, 2000:])
    i0 = int(b.start[0]) - 5000 + 1000
    ref = [_dft64(fb, x, i0, f) for f in (77.7, 500.0)]
    np.testing.assert_allclose(b.tones[0, 0], ref, rtol=0, atol=2e-6 * np.abs(ref).max())


@pytest.mark.parametrize("remove_dc", [False, True])
@pytest.mark.parametrize("channels,overlap,window", [(1, 0.75, "hann"), (7, 0.75, "kaiser"),
                                                     (5, 0.6, "hann"), (64, 0.5, "flattop")])
def test_push_power_equals_the_weighted_sum_of_push(channels, overlap, window, remove_dc):
    # The fused path (window with √a_p folded in, a few channels at a time, padded FFT
    # batches) against the straightforward one: push's spectra, |X|² and Σ_p a_p·|X|² in
    # float64 (and its tones unchanged); with a DC offset, removed or not the same way.
    n, fs = 512, 4096.0
    grid = FrameGrid(fs=fs, n=n, hop=FrameGrid.hop_for(n, overlap), keep=200)
    tones = np.linspace(50.0, 1500.0, 3)
    ref_bank = FilterBank(grid, channels, window, tone_hz=tones, remove_dc=remove_dc)
    fast = FilterBank(grid, channels, window, tone_hz=tones, remove_dc=remove_dc)
    rng = np.random.default_rng(9)
    x = rng.normal(size=(channels, 12_000)).astype(np.float32)
    x += np.sin(2 * np.pi * 321.0 * np.arange(x.shape[1]) / fs).astype(np.float32)
    x += 2.0
    for part in np.split(x, [300, 2000, 2100, 6000, 6001, 9000], axis=1):
        p = fast.frames_ready(part.shape[1])
        a = rng.uniform(0.0, 1.0, p)
        if p:
            a[0] = 0.0  # a frame that counts for nothing
        got = fast.push_power(part, a, lines=150)
        ref = ref_bank.push(part)
        assert got.count == ref.count == p
        np.testing.assert_array_equal(got.start, ref.start)
        want = np.einsum("p,cpq->cq", a, np.abs(ref.spectra[..., :150].astype(np.complex128)) ** 2)
        np.testing.assert_allclose(got.power, want, rtol=2e-5, atol=1e-6 * want.max(initial=0))
        np.testing.assert_allclose(got.tones, ref.tones, rtol=0,
                                   atol=1e-5 * np.abs(ref.tones).max(initial=1))
        assert got.power.shape == (channels, 150) and got.power.dtype == np.float32
    assert fast.pending == ref_bank.pending and fast.frames_out == ref_bank.frames_out


@pytest.mark.parametrize("private_path", [True, False])
def test_rfft_into_a_reused_array_equals_scipy_rfft(monkeypatch, private_path):
    # Reference: scipy.fft.rfft. The fused path writes into its own array through
    # pocketfft's entry point when scipy has it, else through the public function.
    import scipy.fft

    from dsp import filterbank

    if not private_path:
        monkeypatch.setattr(filterbank, "_R2C", None)
    elif filterbank._R2C is None:
        pytest.skip("this scipy has no pocketfft entry point that writes into an array")
    x = np.random.default_rng(6).normal(size=(5, 1024)).astype(np.float32)
    out = np.full((5, 513), np.nan, np.complex64)
    got = filterbank._rfft_into(x, out)
    assert got is out or np.shares_memory(got, out)
    np.testing.assert_array_equal(out, scipy.fft.rfft(x, axis=-1))


def test_push_power_errors():
    fb = FilterBank(FrameGrid.from_n(64, 100.0, overlap=0.5), 2)
    with pytest.raises(ValueError, match=r"weights has 1 values; the block completes 2 frames"):
        fb.push_power(np.zeros((2, 96), np.float32), [1.0])
    with pytest.raises(ValueError, match=r"each needs a finite weight >= 0"):
        fb.push_power(np.zeros((2, 64), np.float32), [-1.0])
    with pytest.raises(ValueError, match=r"lines=40 must be in \[1, 33\]"):
        fb.push_power(np.zeros((2, 10), np.float32), [], lines=40)
    with pytest.raises(ValueError, match=r"block has shape \(3, 10\); expected \(2, n\)"):
        fb.push_power(np.zeros((3, 10), np.float32), [])
    assert fb.pending == 0 and fb.frames_ready(64) == 1


WINDOWS = ["rectangular", "hann", "hamming", "blackman-harris", "flattop", "kaiser"]


@pytest.mark.parametrize("window", WINDOWS)
@pytest.mark.parametrize("power", [False, True])
@pytest.mark.parametrize("overlap", [0.75, 0.6])
def test_remove_dc_gives_the_spectrum_of_the_frame_less_its_window_weighted_mean(
    window, power, overlap
):
    # Direct computation in float64, frame by frame: c = Σ w·x / Σ w, Y = rfft(w·(x − c));
    # the bank's lines q ≥ 1 must equal Y[q] and its DC line the plain rfft(w·x)[0]
    # (docs/low-frequency.md); tracked tones Σ w·(x − c)·e^(−2πi·f·k/fs), by hop-long
    # blocks (75 %: the hop divides N) and on windowed frames (60 %: it does not).
    # Offsets of several g, a sine off a line centre, noise.
    n, fs = 1024, 2560.0
    grid = FrameGrid.from_n(n, fs, overlap=overlap)
    tone_hz = np.array([0.0, 20.3, 100.3, 777.7])
    rng = np.random.default_rng(21)
    k = np.arange(9000)
    x = rng.normal(0.0, 0.2, (3, k.size))
    x += np.array([[5.0], [-3.0], [0.5]]) + np.sin(2 * np.pi * 100.3 * k / fs)
    x = x.astype(np.float32)
    fb = FilterBank(grid, 3, window, remove_dc=True, tone_hz=tone_hz)
    plain = FilterBank(grid, 3, window)
    w = get_window(window, n)  # type: ignore[arg-type]
    frames = np.lib.stride_tricks.sliding_window_view(x.astype(np.float64), n, axis=1)
    frames = frames[:, :: grid.hop]
    c = (frames @ w) / w.sum()
    want = np.fft.rfft(w * (frames - c[..., None]), axis=-1)
    want[..., 0] = np.fft.rfft(w * frames, axis=-1)[..., 0]
    kern = w * np.exp(-2j * np.pi * tone_hz[:, None] * np.arange(n) / fs)  # [T, N]
    want_tones = (frames - c[..., None]) @ kern.T
    atol = 2e-6 * np.abs(want[..., 0]).max()
    if power:  # the fused path; one frame weighted 0 (its DC line is then found directly)
        a = np.ones(frames.shape[1])
        a[1] = 0.0
        batch = fb.push_power(x, a)
        np.testing.assert_allclose(
            batch.power, np.einsum("p,cpq->cq", a, np.abs(want) ** 2),
            rtol=2e-5, atol=atol * np.abs(want).max(),
        )
        np.testing.assert_allclose(batch.tones, want_tones, rtol=0, atol=atol)
        return
    batch = fb.push(x)
    got = batch.spectra
    np.testing.assert_allclose(batch.tones, want_tones, rtol=0, atol=atol)
    raw = plain.push(x).spectra
    assert got.shape == want.shape
    np.testing.assert_allclose(got, want, rtol=0, atol=atol)
    np.testing.assert_array_equal(got[..., 0], raw[..., 0])
    # Without the removal, the offsets' share c·W[q] is what differs, on exactly the
    # lines dc_shape names: none for rectangular, 1 for Hann/Hamming, all for Kaiser.
    span = dc_shape(w).size
    assert span == {"rectangular": 0, "hann": 1, "hamming": 1, "blackman-harris": 3,
                    "flattop": 4, "kaiser": n // 2}[window]
    share = np.abs(raw - got)[..., 1:]
    if span:
        assert share[..., :span].max() > 1e3 * atol
    np.testing.assert_allclose(share[..., span:], 0.0, atol=atol)


def test_window_weighted_mean_matches_welch_constant_detrend_for_an_offset():
    # Reference: scipy.signal.welch(detrend="constant") subtracts the plain mean. For an
    # offset plus tones on line centres (whole cycles per frame) under Hann, the plain and
    # the window-weighted means are both the offset, so the PSDs agree on every line but
    # DC; the DC line differs by design: welch's reads ~0, ours reads the offset (c² / ENBW).
    fs, n = 4096.0, 1024
    grid = FrameGrid.from_n(n, fs, overlap=0.5)
    k = np.arange(16_384)
    x = (4.0 + np.sin(2 * np.pi * 200.0 * k / fs) + 0.3 * np.sin(2 * np.pi * 12.0 * k / fs))
    fb = FilterBank(grid, 1, "hann", remove_dc=True)
    avg = Averager("linear", 10_000)
    avg.update(power_spectrum(fb.push(x[None].astype(np.float32)).spectra, fb.info.s1, n))
    ours = psd_from_power(avg.value, fb.info.enbw_hz(fs))[0]
    _, ref = scipy.signal.welch(x, fs, window="hann", nperseg=n, noverlap=n - grid.hop,
                                detrend="constant", average="mean")
    np.testing.assert_allclose(ours[1:], ref[1:], rtol=1e-5, atol=1e-6 * ref.max())
    assert ref[0] < 1e-9 * ref.max()
    assert ours[0] == pytest.approx(16.0 / fb.info.enbw_hz(fs), rel=1e-5)

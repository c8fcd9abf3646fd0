"""Streaming decimation against scipy.signal (freqz, lfilter, group_delay), against the
full-rate spectrum of the same tones, and against itself cut into random blocks."""

import re

import numpy as np
import pytest
import scipy.signal
from hypothesis import given, settings
from hypothesis import strategies as st

from dsp.analyzer import Analyzer
from dsp.chainplan import ChainPlan, StagePlan, design_stage, plan_chain
from dsp.decimate import DecimationChain, Decimator, MultiRate
from dsp.grid import FrameGrid
from dsp.spec import AnalysisSpec, ToneDef

EPS32 = np.finfo(np.float32).eps


def _noise(c, n, seed=3):
    return np.random.default_rng(seed).normal(0.0, 1.0, (c, n)).astype(np.float32)


def _freqz(taps, f_hz, fs):
    # Reference: scipy.signal.freqz at explicit frequencies (Hz) for the stage's own rate.
    return scipy.signal.freqz(taps, worN=f_hz, fs=fs)[1]


def _chain_response(chain, f_hz):
    # Noble identity (common practice): a chain's response seen from its input is the
    # product of each stage's response evaluated at that stage's input rate.
    h = np.ones(f_hz.shape, dtype=complex)
    for s in chain.stages:
        h *= _freqz(s.taps, f_hz, s.fs)
    return h


def _check_spec(h_pass, h_stop, ripple_db=0.1, atten_db=80.0):
    g = 20 * np.log10(np.abs(h_pass))
    assert g.max() - g.min() <= ripple_db, f"ripple {g.max() - g.min():.4f} dB"
    assert np.abs(g).max() <= ripple_db / 2, f"gain off by {np.abs(g).max():.4f} dB"
    worst = 20 * np.log10(np.abs(h_stop).max())
    assert worst <= -atten_db, f"stopband reaches {worst:.2f} dB"


# --- design --------------------------------------------------------------------------------


@pytest.mark.parametrize("fs,factor", [(51200.0, 2), (51200.0, 3), (25600.0, 7), (12800.0, 10),
                                       (10240.0, 4)])
def test_stage_meets_stated_spec_on_dense_grid(fs, factor):
    # Spec (issue 8): ripple ≤ 0.1 dB on [0, fs_out/2.56], ≥ 80 dB above fs_out − fs_out/2.56.
    # Reference: scipy.signal.freqz on a grid 5× denser than the design's own check.
    d = Decimator(1, factor, fs)
    fs_out = fs / factor
    fmax = fs_out / 2.56
    n = d.taps.size
    h_pass = _freqz(d.taps, np.linspace(0, fmax, 80 * n), fs)
    h_stop = _freqz(d.taps, np.linspace(fs_out - fmax, fs / 2, 80 * n), fs)
    _check_spec(h_pass, h_stop)
    # Linear phase: symmetric taps, group delay (N−1)/2 (reference: scipy.signal.group_delay).
    np.testing.assert_array_equal(d.taps, d.taps[::-1])
    w = np.linspace(0.01 * fmax, fmax, 50)
    _, gd = scipy.signal.group_delay((d.taps, [1.0]), w=w, fs=fs)
    np.testing.assert_allclose(gd, d.delay_in, rtol=1e-6)
    assert d.delay_in == (n - 1) // 2 and n % 2 == 1
    assert d.phase == d.delay_in % factor


def test_design_stage_reaches_tighter_specs_and_says_what_is_wrong():
    # A 100 dB, 0.01 dB stage; checked with scipy.signal.freqz.
    taps = design_stage(48000.0, 4000.0, 6000.0, ripple_db=0.01, atten_db=100.0)
    h_pass = _freqz(taps, np.linspace(0, 4000, 20000), 48000.0)
    h_stop = _freqz(taps, np.linspace(6000, 24000, 20000), 48000.0)
    _check_spec(h_pass, h_stop, ripple_db=0.01, atten_db=100.0)
    with pytest.raises(ValueError, match=r"pass_hz=6000.0 and stop_hz=4000.0 must satisfy "
                                         r"0 < pass_hz < stop_hz <= fs/2 = 24000 Hz"):
        design_stage(48000.0, 6000.0, 4000.0)
    with pytest.raises(ValueError, match=r"ripple_db=0.0 must be in \(0, 3\] dB"):
        design_stage(48000.0, 4000.0, 6000.0, ripple_db=0.0)
    with pytest.raises(ValueError, match=r"atten_db=200.0 must be in \[20, 140\] dB"):
        design_stage(48000.0, 4000.0, 6000.0, atten_db=200.0)
    with pytest.raises(ValueError, match=r"needs about \d+ taps \(more than 4001\); use more "):
        design_stage(48000.0, 4000.0, 4001.0)


CHAINS = [(25600.0, 500.0), (51200.0, 500.0), (51200.0, 100.0), (48000.0, 500.0),
          (51200.0, 2000.0), (51200.0, 450.0)]


@pytest.mark.parametrize("fs_in,fmax", CHAINS)
def test_chain_response_meets_stated_spec(fs_in, fmax):
    # The whole chain seen from its input (stages' scipy.signal.freqz multiplied): ripple
    # ≤ 0.1 dB on [0, Fmax_out], ≤ −80 dB on [fs_out − Fmax_out, fs_in/2] (issue 8), on a
    # grid with ≥ 30 points per stopband lobe of the slowest stage.
    plan = plan_chain(fs_in, fmax)
    chain = DecimationChain(1, plan)
    fmax_out = plan.fmax_hz
    assert fmax_out >= fmax and plan.fs_out == pytest.approx(2.56 * fmax_out)
    step = min(s.fs / s.taps.size for s in chain.stages) / 30
    f_pass = np.linspace(0, fmax_out, 4000)
    f_stop = np.arange(plan.fs_out - fmax_out, fs_in / 2, step)
    h_pass, h_stop = _chain_response(chain, f_pass), _chain_response(chain, f_stop)
    _check_spec(h_pass, h_stop)
    # chain.response is that same product
    np.testing.assert_allclose(chain.response(f_stop[::97]), h_stop[::97], rtol=1e-9, atol=1e-15)


# --- batch against scipy.signal.lfilter ----------------------------------------------------


def test_decimator_equals_lfilter_then_keep_every_rth():
    # Reference: scipy.signal.lfilter(taps, 1, x) (zero initial state), keeping samples
    # phase, phase + R, …; agreement to a few float32 roundings (the stage computes in float32
    # with float32 taps; lfilter in float64 with the same taps).
    x = _noise(3, 12345)
    d = Decimator(3, 6, 38400.0)
    y = d.push(x)
    ref = scipy.signal.lfilter(d.taps, [1.0], x.astype(np.float64), axis=1)[:, d.phase :: 6]
    assert y.dtype == np.float32 and y.shape == ref.shape
    np.testing.assert_allclose(y, ref, rtol=0, atol=8 * EPS32 * np.abs(ref).max())
    assert d.next_index == ref.shape[1] and d.next_input_index == 12345
    np.testing.assert_array_equal(d.index_in(np.arange(3)), d.phase + 6 * np.arange(3))


def test_chain_equals_stagewise_lfilter():
    # Reference: scipy.signal.lfilter stage by stage, each kept at its own phase.
    x = _noise(2, 60000)
    chain = DecimationChain(2, plan_chain(51200.0, 100.0))
    y = chain.push(x)
    ref = x.astype(np.float64)
    for s in chain.stages:
        ref = scipy.signal.lfilter(s.taps, [1.0], ref, axis=1)[:, s.phase :: s.factor]
    np.testing.assert_allclose(y, ref, rtol=0, atol=8 * EPS32 * np.abs(ref).max())
    assert chain.factor == 200 and y.shape[1] == chain.next_index == ref.shape[1]


# --- streaming equals batch ----------------------------------------------------------------

_PLAN = plan_chain(51200.0, 500.0)  # 40 = 10·4
_X = _noise(3, 8000, seed=11)


def _close32(a, b):
    # Stages compute in float32 through sgemm, which may round the R-term sums differently
    # (another kernel, FMA or not) for another block width: agreement is to a few float32
    # roundings of the output (measured worst: 1.9·eps·max|y| over 240 random cuttings).
    assert a.shape == b.shape
    np.testing.assert_allclose(a, b, rtol=0, atol=8 * EPS32 * max(np.abs(b).max(), 1e-30))


@settings(max_examples=60, deadline=None, derandomize=True)
@given(cuts=st.lists(st.integers(0, _X.shape[1]), max_size=25), channels=st.integers(1, 3))
def test_streaming_equals_batch_for_any_cuts(cuts, channels):
    x = _X[:channels]
    batch = DecimationChain(channels, _PLAN).push(x)
    chain = DecimationChain(channels, _PLAN)
    parts = [chain.push(b) for b in np.split(x, sorted(cuts), axis=1)]
    _close32(np.concatenate(parts, axis=1), batch)
    assert chain.next_index == batch.shape[1] and chain.next_input_index == x.shape[1]


def test_streaming_one_sample_at_a_time_equals_batch():
    x = _X[:2, :3000]
    batch = DecimationChain(2, _PLAN).push(x)
    chain = DecimationChain(2, _PLAN)
    parts = [chain.push(x[:, k : k + 1]) for k in range(x.shape[1])]
    assert sum(p.shape[1] for p in parts) == batch.shape[1] == 3000 // 40
    _close32(np.concatenate(parts, axis=1), batch)


@settings(max_examples=30, deadline=None, derandomize=True)
@given(cuts=st.lists(st.integers(0, 20000), max_size=12))
def test_multirate_streaming_equals_batch_for_any_cuts(cuts):
    x = _noise(2, 20000, seed=5)
    taps = {"wide": 20000.0, "narrow": 500.0, "slow": 100.0}
    batch = MultiRate(2, 51200.0, taps).push(x)
    mr = MultiRate(2, 51200.0, taps)
    parts = [mr.push(b) for b in np.split(x, sorted(cuts), axis=1)]
    for name in taps:
        _close32(np.concatenate([p[name] for p in parts], axis=1), batch[name])
    np.testing.assert_array_equal(batch["wide"], x)  # R = 1: the input itself


def test_gap_restarts_filters_and_keeps_the_index_mapping():
    # Reference: scipy.signal.lfilter on the samples after the gap alone (zero state), kept
    # at the global phase: outputs at input indices k = k′·R + phase ≥ k0.
    x = _noise(2, 9000)
    d = Decimator(2, 5, 25600.0)
    d.push(x[:, :4000])
    k0 = 4000 + 1234  # 1234 samples lost
    y = d.push(x[:, 4000:], first_index=k0)
    first = -(-(k0 - d.phase) // 5)
    k_first = d.index_in(first)
    assert d.resets == 1 and d.next_index == first + y.shape[1]
    ref = scipy.signal.lfilter(d.taps, [1.0], x[:, 4000:].astype(np.float64), axis=1)
    _close32(y, ref[:, k_first - k0 :: 5].astype(np.float32))


def test_first_settled_index_is_where_the_zero_history_ends():
    # A chain restarted at k0 and one that saw the stream from 0 agree (to rounding) from
    # first_settled_index on, and not one output earlier.
    x = _noise(1, 40000, seed=8)
    plan = plan_chain(51200.0, 500.0)
    full = DecimationChain(1, plan)
    y_full = full.push(x)
    k0 = 7777
    late = DecimationChain(1, plan)
    y_late = late.push(x[:, k0:], first_index=k0)
    start = late.next_index - y_late.shape[1]
    s = late.first_settled_index
    assert start < s < late.next_index
    _close32(y_late[:, s - start :], y_full[:, s : late.next_index])
    # one output earlier the zeros before k0 still weigh in (the oldest taps are small, so
    # the difference is small, but far above rounding)
    assert abs(y_late[0, s - 1 - start] - y_full[0, s - 1]) > 20 * EPS32 * np.abs(y_full).max()


# --- indices and group delay ---------------------------------------------------------------


def test_content_index_removes_the_group_delay():
    # A linear-phase FIR delays a passband sine by its group delay and scales it by |H(f)|
    # (Oppenheim & Schafer, from memory); |H| and the delay from scipy.signal.freqz and
    # scipy.signal.group_delay of each stage.
    fs = 51200.0
    chain = DecimationChain(1, plan_chain(fs, 500.0))
    f0 = 123.4567
    k = np.arange(60000)
    y = chain.push(np.sin(2 * np.pi * f0 * k / fs).astype(np.float32))
    kk = np.arange(chain.first_settled_index, y.shape[1])
    gain = abs(np.prod([_freqz(s.taps, [f0], s.fs)[0] for s in chain.stages]))
    expected = gain * np.sin(2 * np.pi * f0 * chain.content_index(kk) / fs)
    np.testing.assert_allclose(y[0, kk], expected, atol=1e-5)
    delay = 0.0
    scale = 1
    for s in chain.stages:
        _, gd = scipy.signal.group_delay((s.taps, [1.0]), w=[f0], fs=s.fs)
        delay += gd[0] * scale
        scale *= s.factor
    assert chain.delay_in == pytest.approx(delay, rel=1e-6)
    assert chain.delay_out == pytest.approx(delay / chain.factor, rel=1e-6)
    assert chain.index_in(10) == 10 * chain.factor + chain.phase
    assert 0 <= chain.phase < chain.factor


# --- spectra at the reduced rate -----------------------------------------------------------


def _tone_spec(grid, tones_hz):
    return AnalysisSpec(grid=grid, window="hann", averaging="linear", averages=1000,
                        input_unit="m/s2", unit="m/s2", amplitude="rms", peaks=1,
                        tones=tuple(ToneDef(f"t{i}", hz=f) for i, f in enumerate(tones_hz)))


def test_decimated_spectrum_equals_full_rate_spectrum_of_the_same_tone():
    # Issue 8: a tone below Fmax reads the same decimated (51.2 kHz → Fmax 500 Hz, 1600
    # lines) as at the full rate with the same lines (N = 163 840, 0.3125 Hz): the three
    # main-lobe lines and the tracked tone within 0.05 dB; the interpolated peak within
    # 0.05 line of the tone's true frequency and the tone's amplitude within 0.05 dB of the
    # known RMS A/√2 (RMS of a sine). One tone per channel; the last sits near Fmax.
    fs = 51200.0
    tones = np.array([31.7, 123.4567, 250.1156, 487.3])
    amp = np.array([1.0, 0.5, 2.0, 0.25])
    k = np.arange(int(8 * fs))
    x = (amp[:, None] * np.sin(2 * np.pi * tones[:, None] * k / fs)).astype(np.float32)

    chain = DecimationChain(4, plan_chain(fs, 500.0))
    y = chain.push(x)
    narrow = Analyzer(_tone_spec(FrameGrid.from_fmax(500.0, 1600, overlap=0.5), tones), 4)
    assert narrow.grid.fs == chain.fs_out == 1280.0
    assert narrow.push(y[:, chain.first_settled_index :]) >= 3

    full_grid = FrameGrid(fs=fs, n=163840, hop=81920, keep=1601)
    full = Analyzer(_tone_spec(full_grid, tones), 4)
    assert full.push(x) >= 3
    assert full.grid.df_hz == narrow.grid.df_hz == 0.3125

    c = np.arange(4)
    q = np.round(tones / 0.3125).astype(int)
    lines = q[:, None] + np.arange(-1, 2)
    p_narrow = np.take_along_axis(narrow.power(), lines, axis=1)
    p_full = np.take_along_axis(full.power(), lines, axis=1)
    np.testing.assert_allclose(10 * np.log10(p_narrow / p_full), 0, atol=0.05)
    a_narrow, a_full = narrow.tones()[c, c], full.tones()[c, c]
    np.testing.assert_allclose(20 * np.log10(a_narrow / a_full), 0, atol=0.05)
    np.testing.assert_allclose(20 * np.log10(a_narrow / (amp / np.sqrt(2))), 0, atol=0.05)
    peaks = narrow.peaks()
    np.testing.assert_allclose(peaks.frequency_hz[:, 0], tones, atol=0.05 * 0.3125)
    np.testing.assert_allclose(20 * np.log10(peaks.amplitude_rms[:, 0] / (amp / np.sqrt(2))), 0,
                               atol=0.05)


def test_tones_above_the_new_nyquist_stay_below_80_db_in_band():
    # Tones that fold into 0…Fmax after decimation to 1280 Hz (folding: sampling theorem,
    # common practice): at fs_out − 100 Hz, in stage 1's and stage 2's stopbands, and near
    # the input Nyquist. Nothing in 0…500 Hz may reach −80 dB re the tone; where freqz says
    # the leak is measurable, the spectrum shows it at the folded frequency with that level.
    fs = 51200.0
    tones = np.array([1180.0, 1380.0, 2523.0, 4920.0, 10290.0, 25000.0])
    c = tones.size
    k = np.arange(int(7 * fs))
    x = np.sin(2 * np.pi * tones[:, None] * k / fs).astype(np.float32)
    chain = DecimationChain(c, plan_chain(fs, 500.0))
    y = chain.push(x)
    narrow = Analyzer(_tone_spec(FrameGrid.from_fmax(500.0, 1600, overlap=0.5), ()), c)
    narrow.push(y[:, chain.first_settled_index :])
    rms = np.sqrt(narrow.power())  # per line, m/s² RMS; the tone's own RMS is 1/√2
    worst_db = 20 * np.log10(rms.max(axis=1) * np.sqrt(2))
    assert np.all(worst_db <= -80.0), worst_db
    h_db = 20 * np.log10(np.abs(chain.response(tones)))
    assert np.all(h_db <= -80.0)
    folded = np.abs(tones - 1280.0 * np.round(tones / 1280.0))
    p = narrow.peaks()
    seen = (h_db > -130) & (folded <= 500)  # in band, above the float32 input's rounding floor
    np.testing.assert_allclose(p.frequency_hz[seen, 0], folded[seen], atol=0.05 * 0.3125)
    np.testing.assert_allclose(20 * np.log10(p.amplitude_rms[seen, 0] * np.sqrt(2)), h_db[seen],
                               atol=0.5)


# --- planning ------------------------------------------------------------------------------


@pytest.mark.parametrize("fs_in,fmax,factor,fs_out", [
    (25600.0, 500.0, 20, 1280.0),
    (51200.0, 500.0, 40, 1280.0),
    (51200.0, 100.0, 200, 256.0),
    (51200.0, 1000.0, 20, 2560.0),
    (51200.0, 2000.0, 10, 5120.0),
])
def test_plan_chain_picks_sensible_stages(fs_in, fmax, factor, fs_out):
    # fs_out = 2.56·Fmax (common practice); fewest stages of 2–10, largest factor first
    # (early stages have the widest relative transition; Crochiere & Rabiner 1983, from memory).
    plan = plan_chain(fs_in, fmax)
    assert (plan.factor, plan.fs_out, plan.fmax_hz, plan.note) == (factor, fs_out, fmax, "")
    assert int(np.prod(plan.factors)) == factor
    assert all(2 <= f <= 10 for f in plan.factors)
    assert len(plan.factors) == int(np.ceil(np.log10(factor) - 1e-12))
    assert list(plan.factors) == sorted(plan.factors, reverse=True)
    fs = fs_in
    for s in plan.stages:  # rates chain up and every stage protects the final band
        assert s.fs == fs and s.pass_hz == fmax and s.stop_hz <= s.fs / 2
        fs = s.fs_out
    assert plan.stages[-1].stop_hz == pytest.approx(fs_out - fmax)


def test_plan_chain_without_decimation_is_a_pass_through():
    plan = plan_chain(12800.0, 5000.0)  # 12800 = 2.56 × 5000
    assert (plan.factor, plan.stages, plan.fs_out, plan.fmax_hz) == (1, (), 12800.0, 5000.0)
    assert plan.note == "no decimation: fs_in = 2.56·Fmax"
    chain = DecimationChain(2, plan)
    x = _noise(2, 100)
    np.testing.assert_array_equal(chain.push(x), x)
    assert chain.next_index == 100 and chain.delay_in == 0
    np.testing.assert_array_equal(chain.response(np.array([0.0, 6000.0])), [1.0, 1.0])
    coarse = plan_chain(12800.0, 3000.0)  # 12800/7680 = 1.67: nothing to gain
    assert coarse.factor == 1 and coarse.fmax_hz == 5000.0
    assert "no decimation (fs_in/(2.56·Fmax) = 1.66667 is not an integer)" in coarse.note


@pytest.mark.parametrize("fs_in,fmax,factor,note", [
    (51200.0, 450.0, 42, r"fs_in/\(2.56·Fmax\) = 44.4444 is not an integer; 44 has a prime "
     r"factor above 7 .*: decimating by 42 to 1219.05 Hz gives the next higher Fmax, "
     r"476.19 Hz \(asked 450 Hz\)"),
    (48000.0, 500.0, 36, r"= 37.5 is not an integer; 37 has a prime factor above 7 .*"
     r"decimating by 36 to 1333.33 Hz gives the next higher Fmax, 520.833 Hz"),
    (56320.0, 2000.0, 10, r"^11 has a prime factor above 7 \(stages are 2–10\): decimating "
     r"by 10 to 5632 Hz gives the next higher Fmax, 2200 Hz \(asked 2000 Hz\)"),
    (51200.0, 600.0, 32, r"= 33.3333 is not an integer; 33 has a prime factor above 7"),
])
def test_plan_chain_reports_the_next_higher_fmax(fs_in, fmax, factor, note):
    # Issue 8: where fs/(2.56·Fmax) is not an integer (or needs a stage above 10), take the
    # largest usable R, i.e. the next higher Fmax = fs/(2.56·R), and say so. Expected R by
    # hand: 44.4 → 44 = 4·11 → 42 = 6·7; 37.5 → 37 (prime) → 36; 11 → 10; 33.3 → 33 = 3·11 → 32.
    plan = plan_chain(fs_in, fmax)
    assert plan.factor == factor and plan.fmax_asked_hz == fmax
    assert plan.fmax_hz == pytest.approx(fs_in / factor / 2.56) and plan.fmax_hz > fmax
    assert plan.fs_out >= 2.56 * fmax
    assert re.search(note, plan.note), plan.note


def test_plan_and_decimator_errors_name_the_bad_value():
    with pytest.raises(ValueError, match=r"fmax_hz=25000.0 exceeds fs_in/2.56 = 20000 Hz"):
        plan_chain(51200.0, 25000.0)
    with pytest.raises(ValueError, match=r"fmax_hz=0.0 must be a positive number of Hz"):
        plan_chain(51200.0, 0.0)
    with pytest.raises(ValueError, match=r"fs_in=nan must be a positive number of Hz"):
        plan_chain(float("nan"), 500.0)
    with pytest.raises(ValueError, match=r"atten_db=10.0 must be in \[20, 140\] dB"):
        plan_chain(51200.0, 500.0, atten_db=10.0)
    for bad in (1, 11, 2.5, True):
        with pytest.raises(ValueError, match=rf"factor={bad!r} must be an integer in \[2, 10\]; "
                                             r"cascade stages for larger factors \(plan_chain\)"):
            Decimator(1, bad, 51200.0)
    with pytest.raises(ValueError, match=r"factor=12 must be an integer in \[2, 10\]"):
        StagePlan(12, 51200.0, 100.0, 200.0)
    with pytest.raises(ValueError, match=r"channels=0 must be a positive integer"):
        Decimator(0, 4, 51200.0)
    with pytest.raises(ValueError, match=r"fs=-5.0 must be a positive number of Hz"):
        Decimator(1, 4, -5.0)
    d = Decimator(2, 4, 51200.0)
    with pytest.raises(ValueError, match=r"block has shape \(3, 10\); expected \(2, n\)"):
        d.push(np.zeros((3, 10), np.float32))
    chain = DecimationChain(2, plan_chain(51200.0, 500.0))
    with pytest.raises(ValueError, match=r"block has shape \(10,\); expected \(2, n\)"):
        chain.push(np.zeros(10, np.float32))
    assert isinstance(chain.plan, ChainPlan)


# --- shared chains -------------------------------------------------------------------------


def test_multirate_shares_stages_and_each_tap_meets_the_spec():
    # wide (R = 1), narrow (R = 40) and slow (R = 200 = 40·5) share one chain: 3 stages run,
    # not 2 + 3. Each tap's response (stages' scipy.signal.freqz) meets the stated spec,
    # and its output equals a standalone chain built from its plan.
    taps = {"wide": 20000.0, "narrow": 500.0, "slow": 100.0, "narrow2": 500.0}
    mr = MultiRate(1, 51200.0, taps)
    assert mr.stage_count == 3
    assert mr.plans["slow"].stages[:2] == mr.plans["narrow"].stages
    assert mr.plans["narrow"] == mr.plans["narrow2"]
    assert [mr.plans[n].factor for n in taps] == [1, 40, 200, 40]
    x = _noise(1, 80000, seed=9)
    out = mr.push(x)
    for name in ("narrow", "slow"):
        plan = mr.plans[name]
        alone = DecimationChain(1, plan)
        _close32(out[name], alone.push(x))
        assert mr.next_index(name) == alone.next_index
        assert mr.first_settled_index(name) == alone.first_settled_index
        assert mr.delay_in(name) == alone.delay_in and mr.fs_out(name) == plan.fs_out
        assert mr.index_in(name, 7) == alone.index_in(7)
        assert mr.content_index(name, 7) == alone.content_index(7)
        step = min(s.fs / s.taps.size for s in alone.stages) / 30
        f_pass = np.linspace(0, plan.fmax_hz, 3000)
        f_stop = np.arange(plan.fs_out - plan.fmax_hz, 25600.0, step)
        _check_spec(_chain_response(alone, f_pass), _chain_response(alone, f_stop))
        np.testing.assert_allclose(mr.response(name, f_pass[::50]),
                                   _chain_response(alone, f_pass[::50]), rtol=1e-9)
    assert mr.next_index("wide") == 80000


def test_multirate_branches_when_factors_do_not_divide():
    # R = 40 (500 Hz) and R = 64 (300 Hz → 312.5 Hz): neither divides the other, so each
    # runs from the input; a gap resets every stage and keeps each tap's index mapping.
    mr = MultiRate(1, 51200.0, {"a": 500.0, "b": 300.0})
    assert mr.plans["b"].factor == 64 and "next higher Fmax, 312.5 Hz" in mr.plans["b"].note
    assert mr.stage_count == len(mr.plans["a"].stages) + len(mr.plans["b"].stages)
    x = _noise(1, 30000)
    mr.push(x[:, :10000])
    out = mr.push(x[:, 10000:], first_index=15000)
    for name in ("a", "b"):
        fresh = DecimationChain(1, mr.plans[name])
        fresh.reset(15000)
        _close32(out[name], fresh.push(x[:, 10000:]))
        assert mr.next_index(name) == fresh.next_index
    with pytest.raises(ValueError, match=r"name='c' is not one of 'a', 'b'"):
        mr.next_index("c")
    with pytest.raises(ValueError, match=r"fmax_hz is empty"):
        MultiRate(1, 51200.0, {})
    with pytest.raises(ValueError, match=r"fmax_hz=30000.0 exceeds fs_in/2.56 = 20000 Hz"):
        MultiRate(1, 51200.0, {"x": 30000.0})

"""dsp.tacho: pulses from a tacho signal (trigger, sub-sample edges, plausibility), speed per
revolution and its status, streaming; speed from the 1X line of a spectrum."""

from __future__ import annotations

import numpy as np
import pytest

from dsp.analyzer import Analyzer
from dsp.grid import FrameGrid
from dsp.spec import AnalysisSpec
from dsp.tacho import TachoSettings, TachoTracker, speed_from_spectrum, tacho_edges

FS = 25_600.0


def pulses(edges_s: np.ndarray, n: int, *, fs: float = FS, high_s: float = 2e-3,
           rise_s: float = 4e-4, volts: float = 5.0) -> np.ndarray:
    """A 0…``volts`` pulse train whose rising ramps (``rise_s`` long) start at ``edges_s``;
    the 50 % crossing of pulse i is at edges_s[i] + rise_s/2 exactly (linear ramp)."""
    t = np.arange(n) / fs
    i = np.searchsorted(edges_s, t, side="right") - 1
    since = np.where(i >= 0, t - edges_s[np.maximum(i, 0)], np.inf)
    up = np.clip(since / rise_s, 0.0, 1.0)
    down = np.clip((high_s + rise_s - since) / rise_s, 0.0, 1.0)
    return volts * np.minimum(up, down) * (i >= 0)


def ramp_edges(f0: float, f1: float, span_s: float, t_end: float) -> np.ndarray:
    """Once-per-rev pulse times of a shaft whose speed goes linearly f0 → f1 Hz over span_s:
    revolutions r(t) = f0·t + (f1 − f0)·t²/(2·span_s), pulse n where r = n."""
    a = (f1 - f0) / (2 * span_s)
    r_end = f0 * t_end + a * t_end**2
    n = np.arange(1, int(r_end))
    return n / f0 if a == 0 else (-f0 + np.sqrt(f0**2 + 4 * a * n)) / (2 * a)


def test_steady_pulses_give_the_speed_to_rounding():
    rpm = 1234.5  # a period that is no whole number of samples
    edges = np.arange(1, 40) * 60.0 / rpm + 0.0123
    res = tacho_edges(pulses(edges, int(2.0 * FS)), FS, TachoSettings(level=2.5, hysteresis=1.0))
    # the threshold crossing of a linear ramp is found exactly by linear interpolation
    # (common practice): at edges + (3.0/5)·rise_s for the upper threshold 3.0 V
    np.testing.assert_allclose(res.edges_s, edges + 0.6 * 4e-4, atol=1e-9)
    np.testing.assert_allclose(res.rpm, rpm, rtol=1e-9)
    assert (res.status, res.extra, res.missing, res.faults) == ("ok", 0, 0, 0)


def test_jitter_gives_the_speed_error_the_propagation_predicts():
    # each edge late by δ ~ N(0, σ_t); one revolution's period T' = T + δ1 − δ0, so the
    # speed's relative error is √2·σ_t/T RMS (propagation of uncertainty, GUM JCGM
    # 100:2008 §5.1, from memory; independent edges)
    rng = np.random.default_rng(7)
    rpm, sigma_t = 1500.0, 20e-6
    period = 60.0 / rpm
    true = np.arange(1, 401) * period
    jittered = true + rng.normal(0.0, sigma_t, true.size)
    res = tacho_edges(pulses(jittered, int(16.1 * FS)), FS)
    err = res.rpm / rpm - 1.0
    bound = np.sqrt(2) * sigma_t / period  # 7.07e-4
    # the automatic level needs one pulse to learn the span: the first one arms the trigger
    assert res.edges_s.size == 399 and res.rpm.size == 398
    assert 0.85 * bound < err.std() < 1.15 * bound
    assert np.abs(err).max() < 4.5 * bound


def test_noise_and_dc_drift_leave_an_automatic_level_on_the_pulses():
    rng = np.random.default_rng(3)
    edges = ramp_edges(15.0, 25.0, 10.0, 10.0)
    n = int(10.0 * FS)
    t = np.arange(n) / FS
    drift = 3.0 * np.sin(2 * np.pi * 0.1 * t)  # ±3 V, slower than a revolution
    x = pulses(edges, n) + drift + rng.normal(0.0, 0.1, n)
    # the level follows what is slower than 1.5 pulse periods at rpm_min (here 0.3 s)
    auto = tacho_edges(x, FS, TachoSettings(rpm_min=300.0))
    assert (auto.status, auto.extra, auto.faults) == ("ok", 0, 0)
    assert auto.edges_s.size == edges.size - 1  # the first pulse arms the trigger
    true_rpm = 60.0 / np.diff(edges[1:])
    # noise 0.1 V on a 5 V / 0.4 ms ramp moves an edge by 0.1/12 500 s = 8 µs RMS; a
    # revolution of ≥ 40 ms then reads within √2·8 µs/40 ms = 2.8e-4 RMS (see above)
    assert np.sqrt(np.mean((auto.rpm / true_rpm - 1) ** 2)) < 2.8e-4
    # a fixed 2.5 V level loses the pulses whenever the drift pulls the top below it
    fixed = tacho_edges(x, FS, TachoSettings(level=2.5, hysteresis=1.0))
    assert fixed.edges_s.size < 0.8 * edges.size


def test_missing_pulses_are_bridged_and_extra_ones_dropped():
    period = 60.0 / 1800.0
    true = np.arange(1, 121) * period
    kept = np.delete(true, [30, 60, 61])  # one and then two missing in a row
    extra = true[[10, 80]] + 0.45 * period  # glitches half-way through a revolution
    x = pulses(np.sort(np.concatenate((kept, extra))), int(4.1 * FS))
    res = tacho_edges(x, FS, TachoSettings(level=2.5, hysteresis=1.0))
    assert (res.missing, res.extra, res.faults) == (3, 2, 0)
    np.testing.assert_allclose(res.edges_s, true + 0.6 * 4e-4, atol=1e-9)
    assert res.bridged.sum() == 3 and res.bridged[[30, 60, 61]].all()
    np.testing.assert_allclose(res.rpm, 1800.0, rtol=1e-9)


def test_status_no_signal_when_pulses_stop_and_sensor_fault_on_a_jump():
    st = TachoSettings(rpm_min=600.0, rpm_max=3000.0)
    period = 60.0 / 1500.0
    steady = np.arange(1, 50) * period
    tr = TachoTracker(FS, st)
    assert tr.push(pulses(steady, int(2.0 * FS))).status == "ok"
    assert tr.push(np.zeros(int(1.0 * FS))).status == "no-signal"  # 1 s with no pulse
    # a pulse 1.6 periods after the last (neither one period nor two) is implausible
    jump = np.concatenate((steady, steady[-1] + 1.6 * period + np.arange(3) * period))
    tr2 = TachoTracker(FS, st)
    res = tr2.push(pulses(jump, int(2.1 * FS)))
    assert res.faults == 1 and res.status == "sensor-fault"
    # ... until 2k + 1 plausible pulses follow
    more = jump[-1] + np.arange(1, 6) * period
    later = tr2.push(pulses(more, int(2.4 * FS))[int(2.1 * FS):])
    assert later.status == "ok" and later.faults == 0


@pytest.mark.parametrize("block", [1000, 2560, 7919, 100_000])
def test_streaming_equals_one_push(block):
    rng = np.random.default_rng(5)
    edges = ramp_edges(20.0, 12.0, 4.0, 4.0)
    x = pulses(edges, int(4.0 * FS)) + rng.normal(0, 0.05, int(4.0 * FS))
    whole = tacho_edges(x, FS)
    tr = TachoTracker(FS)
    parts = [tr.push(x[i:i + block]) for i in range(0, x.size, block)]
    np.testing.assert_array_equal(np.concatenate([p.edges_s for p in parts]), whole.edges_s)
    np.testing.assert_array_equal(np.concatenate([p.rpm for p in parts]), whole.rpm)


def test_several_pulses_per_revolution():
    rpm, k = 900.0, 4
    edges = np.arange(1, 161) * 60.0 / (rpm * k)
    res = tacho_edges(pulses(edges, int(2.8 * FS), high_s=1e-3), FS,
                      TachoSettings(pulses_per_rev=k))
    np.testing.assert_allclose(res.rpm, rpm, rtol=1e-9)
    assert res.rpm.size == edges.size - 1 - k  # the first pulse arms the trigger


def test_mean_speed_over_a_frame_and_its_variation():
    edges = ramp_edges(15.0, 25.0, 10.0, 10.0)
    tr = TachoTracker(FS)
    tr.push(pulses(edges, int(10.0 * FS)))
    mean, var = tr.mean_rpm(4.0, 5.0)
    # r(t) = 15t + 0.5t²: 19.5 revolutions in [4, 5] s → 1170 r/min; speed 19 → 20 Hz
    assert mean == pytest.approx(1170.0, rel=2e-3)
    assert var == pytest.approx((20.0 - 19.0) / 19.5, abs=0.01)


@pytest.mark.parametrize(("kw", "match"), [
    ({"edge": "up"}, r"edge='up' is not one of 'rising', 'falling'"),
    ({"pulses_per_rev": 0}, r"pulses_per_rev=0 must be an integer ≥ 1"),
    ({"rpm_min": 100.0, "rpm_max": 50.0}, r"need 0 < rpm_min < rpm_max"),
    ({"hysteresis": 1.5}, r"hysteresis=1.5 must be a fraction"),
    ({"max_change": 0.7}, r"max_change=0.7 must be in \(0, 0.5\)"),
])
def test_bad_settings_are_named(kw, match):
    with pytest.raises(ValueError, match=match):
        TachoSettings(**kw)


def test_speed_from_the_1x_line_of_a_spectrum():
    grid = FrameGrid.from_fmax(200.0, 800)  # fs 512 Hz, 0.25 Hz lines
    t = np.arange(int(40 * grid.fs)) / grid.fs
    f1 = 24.37  # 1462.2 r/min, off the line grid
    x = 0.3 * np.sin(2 * np.pi * f1 * t) + 1.0 * np.sin(2 * np.pi * 2 * f1 * t)
    an = Analyzer(AnalysisSpec(grid, unit="g", averaging="linear", averages=4), 1)
    an.push(x[None, :].astype(np.float32))
    p = an.power("g")
    rpm = speed_from_spectrum(p, grid.df_hz, "hann", grid.n, 1200.0, 1800.0)
    # the 2X line (larger) is outside the range; find_peaks interpolates through the
    # window's own transform (its test holds it to a single sine's frequency)
    assert rpm[0] == pytest.approx(60 * f1, abs=0.1)
    tracked = speed_from_spectrum(p, grid.df_hz, "hann", grid.n, 600.0, 6000.0,
                                  previous_rpm=[1400.0])
    assert tracked[0] == pytest.approx(60 * f1, abs=0.1)
    none = speed_from_spectrum(p, grid.df_hz, "hann", grid.n, 300.0, 600.0)
    assert np.isnan(none[0])

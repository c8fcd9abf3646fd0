"""Scaling, units and integration against the definitions in docs/references.md."""

import numpy as np
import pytest
import scipy.signal

from dsp.scaling import (
    amplitude_from_power,
    power_from_amplitude,
    power_spectrum,
    unit_power_weights,
)
from dsp.windows import get_window


def test_one_g_at_100_hz():
    # docs/references.md [computed]: 1 g RMS at 100 Hz is 15.608 mm/s RMS and 24.84 µm RMS
    # (v = a/(2πf), d = a/(2πf)², g_n = 9.80665 m/s², 3rd CGPM 1901).
    f = np.array([100.0])
    assert np.sqrt(unit_power_weights(f, "g", "mm/s"))[0] == pytest.approx(15.608, abs=5e-4)
    assert np.sqrt(unit_power_weights(f, "g", "um"))[0] == pytest.approx(24.84, abs=5e-3)
    # inch = 25.4 mm exactly: in/s and mils follow.
    assert np.sqrt(unit_power_weights(f, "g", "in/s"))[0] == pytest.approx(15.608 / 25.4, rel=4e-5)
    assert np.sqrt(unit_power_weights(f, "g", "mil"))[0] == pytest.approx(24.84 / 25.4, rel=2e-4)
    assert np.sqrt(unit_power_weights(f, "m/s2", "g"))[0] == pytest.approx(1 / 9.80665)
    assert np.sqrt(unit_power_weights(f, "g", "velocity"))[0] == pytest.approx(15.608, abs=5e-4)


def test_lowcut_zeroes_dc_and_sub_hz():
    f = np.array([0.0, 0.5, 1.99, 2.0, 10.0])
    wts = unit_power_weights(f, "g", "mm/s", lowcut_hz=2.0)
    assert list(wts[:3]) == [0.0, 0.0, 0.0] and wts[3] > 0 and wts[4] > 0
    assert unit_power_weights(f, "g", "g")[0] == pytest.approx(1.0)


def test_amplitude_types_of_a_sine():
    # RMS of a sine of peak A is A/√2 (docs/references.md, units and constants).
    a = 2.0
    ps = np.array([a * a / 2])
    assert amplitude_from_power(ps, "rms")[0] == pytest.approx(a / np.sqrt(2))
    assert amplitude_from_power(ps, "peak")[0] == pytest.approx(a)
    assert amplitude_from_power(ps, "peak-to-peak")[0] == pytest.approx(2 * a)
    for kind in ("rms", "peak", "peak-to-peak"):
        back = power_from_amplitude(amplitude_from_power(ps, kind), kind)
        assert back[0] == pytest.approx(ps[0])


def test_power_spectrum_matches_scipy_periodogram_and_parseval():
    # scipy.signal.periodogram(scaling='spectrum') is PS = 2|X|²/S1² one-sided
    # (DC and Nyquist not doubled); with a rectangular window Σ PS = mean(x²) (Parseval).
    rng = np.random.default_rng(7)
    n = 1000
    x = rng.normal(0.2, 1.0, n)
    for name, ref_name in [("rectangular", "boxcar"), ("hann", "hann")]:
        w = get_window(name, n)
        ps = power_spectrum(np.fft.rfft(w * x), w.sum(), n)
        _, ref = scipy.signal.periodogram(x, window=ref_name, scaling="spectrum", detrend=False)
        np.testing.assert_allclose(ps, ref, rtol=1e-10, atol=1e-14)
    rect = power_spectrum(np.fft.rfft(x), float(n), n)
    assert rect.sum() == pytest.approx(np.mean(x**2), rel=1e-12)


def test_unit_errors():
    with pytest.raises(ValueError,
                       match=r"amplitude='pk' is not one of 'peak', 'rms', 'peak-to-peak'"):
        amplitude_from_power(np.ones(2), "pk")
    with pytest.raises(ValueError, match=r"unit='furlong/s' is not one of"):
        unit_power_weights(np.ones(2), "g", "furlong/s")
    with pytest.raises(ValueError, match=r"input_unit='mV' is not one of 'g', 'm/s2'"):
        unit_power_weights(np.ones(2), "mV", "mm/s")
    with pytest.raises(ValueError, match=r"lowcut_hz=-1 must be a non-negative number of Hz"):
        unit_power_weights(np.ones(2), "g", "mm/s", lowcut_hz=-1)

"""Checks of dsp.bands against IEC 61260-1, Heinzel et al. 2002 §9, scipy.signal and ISO 20816.

Each expected number says where it comes from; see docs/references.md."""

from __future__ import annotations

from pathlib import Path
from typing import get_args

import numpy as np
import pytest
import scipy.signal

from dsp.bands import (
    SEVERITY_PRESETS,
    Band,
    SeverityPreset,
    band_edges,
    band_rms,
    band_weights,
    octave_bands,
    overall_rms,
    severity_range_hz,
    severity_zone,
)
from dsp.types import WINDOW_NAMES
from dsp.windows import get_window, window_info

G = 10.0 ** (3 / 10)  # IEC 61260-1:2014, 5.2 (base ten)

# IEC 61260-1:2014 annex, nominal third-octave mid-band frequencies [pub]
NOMINAL_THIRDS_HZ = [
    25, 31.5, 40, 50, 63, 80, 100, 125, 160, 200, 250, 315, 400, 500, 630, 800, 1000, 1250,
    1600, 2000, 2500, 3150, 4000, 5000, 6300, 8000, 10000, 12500, 16000, 20000,
]  # fmt: skip


def power_spectrum(x: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Heinzel et al. 2002, §9: PS = 2|y_m|²/S1², DC and (even N) Nyquist not doubled."""
    ps = 2 * np.abs(np.fft.rfft(w * x, axis=-1)) ** 2 / w.sum() ** 2
    ps[..., 0] /= 2
    if x.shape[-1] % 2 == 0:
        ps[..., -1] /= 2
    return ps


# --- IEC 61260-1 fractional-octave bands ----------------------------------------------------


def test_third_octave_at_1khz_edges() -> None:
    (b,) = octave_bands(3, 800, 1300)
    # IEC 61260-1:2014, 5.4/5.5: third-octave at 1 kHz spans 891.2509–1122.0185 Hz
    assert b.x == 0
    assert b.center_hz == pytest.approx(1000.0, rel=1e-15)
    assert b.lo_hz == pytest.approx(891.2509, abs=5e-5)
    assert b.hi_hz == pytest.approx(1122.0185, abs=5e-5)
    assert (b.nominal_hz, b.label) == (1000.0, "1 kHz")


def test_third_octave_exact_midbands_x_minus10_to_10() -> None:
    bands = octave_bands(3, 80, 12000)
    got = {b.x: b for b in bands}
    assert set(range(-10, 11)) <= set(got)
    for x in range(-10, 11):
        # IEC 61260-1:2014, eq. for odd b: fm = fr·G^(x/b), edges fm·G^(∓1/(2b))
        fm = 1000.0 * G ** (x / 3)
        assert got[x].center_hz == pytest.approx(fm, rel=1e-13)
        assert got[x].lo_hz == pytest.approx(fm * G ** (-1 / 6), rel=1e-13)
        assert got[x].hi_hz == pytest.approx(fm * G ** (1 / 6), rel=1e-13)
    # Base ten, not base two: ten thirds make exactly a decade (IEC 61260-1, 5.2).
    assert got[-10].center_hz == pytest.approx(100.0, rel=1e-14)
    assert got[10].center_hz == pytest.approx(10000.0, rel=1e-14)


def test_third_octave_nominal_labels_25hz_to_20khz() -> None:
    bands = octave_bands(3, 22, 22400)
    # IEC 61260-1:2014 annex, nominal mid-bands 25 … 20000 Hz [pub]
    assert [b.nominal_hz for b in bands] == NOMINAL_THIRDS_HZ
    assert [b.x for b in bands] == list(range(-16, 14))
    for b in bands:
        # The annex rounds exact mid-bands to R10 preferred numbers: all within 1 %.
        assert b.center_hz == pytest.approx(b.nominal_hz, rel=0.01)
    labels = {b.nominal_hz: b.label for b in bands}
    assert labels[25] == "25 Hz"
    assert labels[31.5] == "31.5 Hz"
    assert labels[1000] == "1 kHz"
    assert labels[3150] == "3.15 kHz"
    assert labels[12500] == "12.5 kHz"
    # Adjacent bands share an edge exactly (no gap, no overlap).
    assert all(a.hi_hz == b.lo_hz for a, b in zip(bands, bands[1:], strict=False))


def test_octave_nominal_31_5_to_16k() -> None:
    bands = octave_bands(1, 22, 22400)
    # IEC 61260-1 annex: octave mid-bands are every third nominal third-octave [pub]
    assert [b.nominal_hz for b in bands] == NOMINAL_THIRDS_HZ[1::3]
    assert [b.nominal_hz for b in bands] == [31.5, 63, 125, 250, 500, 1000, 2000, 4000, 8000, 16000]
    for b in bands:
        # IEC 61260-1:2014: fm = fr·G^x, edges fm·G^(∓1/2)
        assert b.center_hz == pytest.approx(1000.0 * G**b.x, rel=1e-13)
        assert b.hi_hz / b.lo_hz == pytest.approx(G, rel=1e-13)


def test_even_fraction_has_an_edge_at_1khz() -> None:
    bands = {b.x: b for b in octave_bands(6, 800, 1300)}
    # IEC 61260-1:2014, even b: fm = fr·G^((2x+1)/(2b)), so 1 kHz is the edge between x=-1, 0
    assert bands[0].center_hz == pytest.approx(1000.0 * G ** (1 / 12), rel=1e-13)
    assert bands[0].lo_hz == pytest.approx(1000.0, rel=1e-14)
    assert bands[-1].hi_hz == pytest.approx(1000.0, rel=1e-14)
    assert bands[0].nominal_hz == 1060.0  # exact 1059.25 Hz to 3 significant figures
    assert bands[0].label == "1.06 kHz"


def test_octave_inclusion_rule() -> None:
    # Exact edges passed back in include the band (relative slack 1e-9); a hair less does not.
    lo, hi = 1000 * G ** (-1 / 6), 1000 * G ** (1 / 6)
    assert [b.x for b in octave_bands(3, lo, hi)] == [0]
    assert octave_bands(3, lo * (1 + 1e-6), hi) == []
    assert octave_bands(3, lo, hi * (1 - 1e-6)) == []


def test_octave_band_as_band() -> None:
    (b,) = octave_bands(3, 800, 1300)
    band = b.as_band("1/3 oct ")
    assert band == Band("1/3 oct 1 kHz", b.lo_hz, b.hi_hz, "hz")
    assert band.edges_hz(None) == (b.lo_hz, b.hi_hz)


@pytest.mark.parametrize(
    ("args", "match"),
    [
        ((2, 20, 20000), r"fraction=2 is not one of 1, 3, 6, 12, 24"),
        ((3, 0, 20000), r"need 0 < lo_hz < hi_hz"),
        ((3, 2000, 1000), r"need 0 < lo_hz < hi_hz"),
        ((3, float("nan"), 1000), r"lo_hz=nan must be a finite number"),
    ],
)
def test_octave_bad_arguments(args: tuple[float, float, float], match: str) -> None:
    with pytest.raises(ValueError, match=match):
        octave_bands(*args)  # type: ignore[arg-type]


# --- band_weights ---------------------------------------------------------------------------


def test_weights_edges_on_line_centres_and_line_edges() -> None:
    # Definition (dsp.bands.band_weights): fraction of [f_q − df/2, f_q + df/2] inside [lo, hi].
    w = band_weights([[2.0, 4.0], [2.5, 4.5], [1.75, 2.25], [2.5, 3.25]], 0.0, 1.0, 7)
    np.testing.assert_array_equal(
        w,
        [
            [0, 0, 0.5, 1, 0.5, 0, 0],  # edges on line centres: end lines split in half
            [0, 0, 0, 1, 1, 0, 0],  # edges on line boundaries: whole lines
            [0, 0, 0.5, 0, 0, 0, 0],  # inside one line
            [0, 0, 0, 0.75, 0, 0, 0],
        ],
    )


def test_weights_dc_line_and_offset_grid() -> None:
    # One-sided spectrum: the DC line covers [0, df/2], so a band from 0 Hz takes all of it.
    np.testing.assert_array_equal(band_weights([[0.0, 1.0]], 0.0, 1.0, 3), [[1, 0.5, 0]])
    # Zoomed grid f[q] = f0 + q·df.
    np.testing.assert_allclose(
        band_weights([[101.0, 102.0]], 100.0, 0.5, 6), [[0, 0, 0.5, 1, 0.5, 0]], atol=1e-15
    )


def test_weights_sum_is_width_over_df() -> None:
    lo, hi, df = 123.4, 456.7, 0.5
    w = band_weights([[lo, hi]], 0.0, df, 2000)
    assert w.sum() == pytest.approx((hi - lo) / df, rel=1e-12)
    assert w.dtype == np.float64 and w.shape == (1, 2000)
    # A band running past the grid keeps only the lines that exist.
    assert band_weights([[990.0, 2000.0]], 0.0, 1.0, 1001).sum() == pytest.approx(10.5)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        (dict(edges_hz=[1.0, 2.0]), r"edges_hz must have shape \(B, 2\)"),
        (dict(edges_hz=[[2.0, 1.0]]), r"lo < hi"),
        (dict(edges_hz=[[1.0, np.inf]]), r"edges_hz must be finite"),
        (dict(df_hz=0.0), r"df_hz=0.0 must be > 0"),
        (dict(f0_hz=-1.0), r"f0_hz=-1.0 must be >= 0"),
        (dict(q_bins=0), r"q_bins=0 must be an integer >= 1"),
    ],
)
def test_weights_bad_arguments(kwargs: dict[str, object], match: str) -> None:
    args: dict[str, object] = dict(edges_hz=[[1.0, 2.0]], f0_hz=0.0, df_hz=1.0, q_bins=8)
    args.update(kwargs)
    with pytest.raises(ValueError, match=match):
        band_weights(**args)  # type: ignore[arg-type]


# --- band RMS of a sine and of white noise --------------------------------------------------


@pytest.mark.parametrize("window", WINDOW_NAMES)
def test_sine_in_band_reads_its_rms(window: str) -> None:
    n, fs, amp = 4096, 2560.0, 3.0
    df = fs / n
    rng = np.random.default_rng(20240611)
    f_sig = (320 + rng.uniform(0.05, 0.95)) * df  # off-bin by a random fraction of a line
    x = amp * np.sin(2 * np.pi * f_sig * np.arange(n) / fs + rng.uniform(0, 2 * np.pi))
    w = get_window(window, n)  # type: ignore[arg-type]
    ps = power_spectrum(x, w)

    # scipy.signal.periodogram(scaling='spectrum') is the same power spectrum (scipy.signal).
    f, pxx = scipy.signal.periodogram(x, fs, window=w, scaling="spectrum", detrend=False)
    np.testing.assert_allclose(f, np.arange(n // 2 + 1) * df, rtol=1e-15)
    np.testing.assert_allclose(ps, pxx, rtol=1e-9, atol=1e-12 * ps.max())

    # Heinzel 2002 §9: Σ PS = a²·ENBW, so the band reads the sine's RMS A/√2 (within 0.5 %).
    enbw = window_info(window, n).enbw_bins  # type: ignore[arg-type]
    weights = band_weights([[f_sig - 50.0, f_sig + 50.0], [50.0, 150.0]], 0.0, df, ps.size)
    rms = band_rms(ps, weights, enbw)
    assert rms[0] == pytest.approx(amp / np.sqrt(2), rel=5e-3)
    # A band 50+ Hz (80+ lines) away sees only leakage: ~1.6 % of the RMS for rectangular.
    assert rms[1] < 0.03 * rms[0]
    assert overall_rms(ps, 0.0, df, 10.0, 1000.0, enbw) == pytest.approx(amp / np.sqrt(2), 5e-3)


def test_white_noise_band_power_and_parseval() -> None:
    n, fs, sigma = 1024, 2048.0, 2.0
    frames = 200
    rng = np.random.default_rng(7)
    x = rng.normal(0.0, sigma, (n // 2) * (frames - 1) + n)  # 200 half-overlapped frames
    w = get_window("hann", n)
    enbw = window_info("hann", n).enbw_bins
    f, ps = scipy.signal.welch(
        x, fs, window=w, nperseg=n, noverlap=n // 2, scaling="spectrum", detrend=False
    )
    df = fs / n
    lo, hi = fs / 8, 3 * fs / 8
    weights = band_weights([[lo, hi], [0.0, fs / 2]], 0.0, df, f.size)
    power = band_rms(ps, weights, enbw) ** 2
    # White noise: one-sided PSD 2σ²/fs, so band power σ²·(hi − lo)/(fs/2) (within 3 %).
    assert power[0] == pytest.approx(sigma**2 * (hi - lo) / (fs / 2), rel=0.03)
    # Parseval (one-sided): the whole range reads the variance σ² (within 3 %).
    assert power[1] == pytest.approx(sigma**2, rel=0.03)

    # Same as Σ PSD·Δf with scipy.signal.welch(scaling='density') (PSD = PS/ENBW_Hz).
    _, psd = scipy.signal.welch(
        x, fs, window=w, nperseg=n, noverlap=n // 2, scaling="density", detrend=False
    )
    np.testing.assert_allclose(power, weights @ psd * df, rtol=1e-12)


# --- vectorisation --------------------------------------------------------------------------


def test_band_rms_vectorised_over_channels() -> None:
    rng = np.random.default_rng(3)
    q = 401
    power = rng.exponential(1.0, (2, 3, q)).astype(np.float32)
    weights = band_weights([[10.0, 50.0], [40.0, 41.5], [0.0, 200.0]], 0.0, 0.5, q)
    out = band_rms(power, weights, 1.5)
    assert out.shape == (2, 3, 3) and out.dtype == np.float64
    for idx in np.ndindex(2, 3):
        np.testing.assert_allclose(out[idx], band_rms(power[idx], weights, 1.5), rtol=1e-12)
    overall = overall_rms(power, 0.0, 0.5, 10.0, 50.0, 1.5)
    assert overall.shape == (2, 3)
    np.testing.assert_allclose(overall, out[..., 0], rtol=1e-12)


def test_band_rms_bad_arguments() -> None:
    w = band_weights([[1.0, 2.0]], 0.0, 1.0, 8)
    with pytest.raises(ValueError, match=r"last axis \(7\) must equal the number of lines.*\(8\)"):
        band_rms(np.ones((2, 7)), w, 1.5)
    with pytest.raises(ValueError, match=r"enbw_bins=0.0 must be > 0"):
        band_rms(np.ones(8), w, 0.0)
    assert np.isnan(band_rms(np.full(8, np.nan), w, 1.5)[0])  # NaN is not hidden


# --- Band: Hz and order bands ---------------------------------------------------------------


def test_order_band_edges_scale_with_speed() -> None:
    band = Band("1X", 0.8, 1.2, "order")
    # Order × running speed in Hz (1470 r/min = 24.5 Hz)
    assert band.edges_hz(24.5) == pytest.approx((0.8 * 24.5, 1.2 * 24.5), rel=1e-15)
    assert Band("overall", 10, 1000).edges_hz(24.5) == (10.0, 1000.0)
    edges = band_edges([band, Band("vel", 10, 1000)], 50.0)
    np.testing.assert_allclose(edges, [[40.0, 60.0], [10.0, 1000.0]], rtol=1e-15)


def test_order_band_needs_speed() -> None:
    band = Band("1X", 0.8, 1.2, "order")
    with pytest.raises(ValueError, match=r"band '1X' is in orders of running speed and needs"):
        band.edges_hz(None)
    with pytest.raises(ValueError, match=r"needs speed_hz"):
        band_edges([band])
    with pytest.raises(ValueError, match=r"speed_hz=0.0 must be a finite running speed > 0"):
        band.edges_hz(0.0)
    with pytest.raises(ValueError, match=r"speed_hz=nan must be a finite running speed"):
        band.edges_hz(float("nan"))


@pytest.mark.parametrize(
    ("args", "match"),
    [
        (("b", 1.0, 2.0, "rpm"), r"basis='rpm' is not one of 'hz', 'order'"),
        (("b", 2.0, 2.0), r"band 'b': lo=2.0 must be less than hi=2.0"),
        (("b", -1.0, 2.0), r"band 'b': lo=-1.0 must be >= 0"),
        (("b", 1.0, float("inf")), r"hi=inf must be a finite number"),
        (("", 1.0, 2.0), r"name='' must be a non-empty string"),
    ],
)
def test_band_validation(args: tuple[object, ...], match: str) -> None:
    with pytest.raises(ValueError, match=match):
        Band(*args)  # type: ignore[arg-type]


# --- severity zones (ISO 10816-3:2009 boundaries, from memory) ------------------------------

# ISO 10816-3:2009, Annex A, A/B, B/C, C/D in mm/s RMS — from memory (docs/references.md)
ISO_BOUNDARIES = {
    "group1-rigid": (2.3, 4.5, 7.1),
    "group1-flexible": (3.5, 7.1, 11.0),
    "group2-rigid": (1.4, 2.8, 4.5),
    "group2-flexible": (2.3, 4.5, 7.1),
}


def test_severity_presets_match_reference() -> None:
    assert SEVERITY_PRESETS == ISO_BOUNDARIES
    assert set(SEVERITY_PRESETS) == set(get_args(SeverityPreset))


@pytest.mark.parametrize("preset", list(ISO_BOUNDARIES))
def test_severity_zone_boundaries_belong_to_upper_zone(preset: str) -> None:
    ab, bc, cd = ISO_BOUNDARIES[preset]
    assert severity_zone(0.0, preset) == "A"
    for bound, below, above in ((ab, "A", "B"), (bc, "B", "C"), (cd, "C", "D")):
        assert severity_zone(np.nextafter(bound, 0), preset) == below
        assert severity_zone(bound, preset) == above
    zones = severity_zone(np.array([[0.5, ab], [bc, 1e3]]), preset)
    assert isinstance(zones, np.ndarray)
    np.testing.assert_array_equal(zones, [["A", "B"], ["C", "D"]])


def test_severity_errors_and_range() -> None:
    with pytest.raises(
        ValueError,
        match=r"preset='group3' is not one of 'group1-rigid', 'group1-flexible', "
        r"'group2-rigid', 'group2-flexible'",
    ):
        severity_zone(1.0, "group3")
    with pytest.raises(ValueError, match=r"v_rms_mm_s must be finite and >= 0"):
        severity_zone([1.0, np.nan], "group1-rigid")
    with pytest.raises(ValueError, match=r"v_rms_mm_s must be finite and >= 0"):
        severity_zone(-0.1, "group1-rigid")
    # ISO 20816-1 (from memory): 10–1000 Hz above 600 r/min, 2–1000 Hz for 120–600 r/min
    assert severity_range_hz(slow=False) == (10.0, 1000.0)
    assert severity_range_hz(slow=True) == (2.0, 1000.0)


def test_the_presets_name_the_edition_their_values_come_from():
    # Regression (issue 14, item 8): the presets were attributed to ISO 20816-1:2016 while
    # their values are ISO 10816-3's zone tables (from memory; docs/references.md). The
    # comment beside them, the docstring and the references must name that edition and say
    # "from memory"; the 1/6-1/24-octave labels must say what they are based on.
    import inspect

    import dsp.bands as mod

    src = inspect.getsource(mod)
    note = src[: src.index("SEVERITY_PRESETS: dict")].rsplit("\n\n", 1)[-1]
    assert "ISO 10816-3:2009" in note and "from memory" in note and "20816-1" not in note
    assert "ISO 10816-3:2009" in (mod.severity_zone.__doc__ or "")
    refs = (Path(__file__).resolve().parents[2] / "docs/references.md").read_text("utf-8")
    section = refs[refs.index("## ISO 20816-1:2016 and ISO 10816-3:2009"):]
    assert "[from memory]" in section.split("\n## ")[0]
    doc = " ".join((mod.octave_bands.__doc__ or "").split())
    assert "3 significant figures — our own choice" in doc and "from memory" in doc

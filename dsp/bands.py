"""Band definitions (Hz, orders of running speed, IEC 61260-1 fractional octaves), band RMS
from a narrowband power spectrum, and ISO 20816-style severity zones.

Knows nothing about streams, I/O, alarms or the service; numpy only.

Spectrum convention (the whole engine's; Heinzel et al. 2002, §9; docs/references.md):
``power[..., q]`` is a one-sided *power spectrum* in rms² per line, PS = 2|X_q|²/S1² with
the DC line (and a Nyquist line) not doubled, on the grid f[q] = f0_hz + q·df_hz, q = 0…Q−1.
A sine of RMS a spreads its power over a few lines so that Σ_q power[q] = a²·ENBW, with ENBW
in bins (N·S2/S1², :func:`dsp.windows.window_info` ``.enbw_bins``). Therefore

    band power = Σ_q weight[q]·power[q] / ENBW_bins        (rms²)

reads a sine inside the band as its RMS (A/√2 for peak A) and white noise as its true
band power; it equals Σ PSD·Δf with PSD = PS/ENBW_Hz.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal, get_args

import numpy as np
from numpy.typing import ArrayLike

from .types import check_choice

__all__ = [
    "BAND_BASES",
    "OCTAVE_FRACTIONS",
    "SEVERITY_PRESETS",
    "Band",
    "BandBasis",
    "OctaveBand",
    "SeverityPreset",
    "band_edges",
    "band_rms",
    "band_weights",
    "octave_bands",
    "overall_rms",
    "severity_range_hz",
    "severity_zone",
]

BandBasis = Literal["hz", "order"]
BAND_BASES: tuple[str, ...] = get_args(BandBasis)


def _check_finite(name: str, value: float) -> float:
    v = float(value)
    if not np.isfinite(v):
        raise ValueError(f"{name}={value!r} must be a finite number")
    return v


@dataclass(frozen=True)
class Band:
    """A frequency band [lo, hi], in Hz (``basis='hz'``) or in orders of running speed
    (``basis='order'``: 1.0 = once per revolution, so Hz = order × speed_hz).

    ``lo`` and ``hi`` are stored as floats; 0 <= lo < hi, both finite.

    Parameters
    ----------
    name : str
        Band name (non-empty).
    lo, hi : float
        Lower and upper edge, Hz or orders (0 ≤ lo < hi, finite).
    basis : {'hz', 'order'}, optional
        Unit of the edges (default hz).

    Examples
    --------
    >>> Band("1X", 0.8, 1.2, "order").edges_hz(25.0)   # 1500 r/min
    (20.0, 30.0)
    """

    name: str
    lo: float
    hi: float
    basis: BandBasis = "hz"

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name:
            raise ValueError(f"name={self.name!r} must be a non-empty string")
        check_choice("basis", self.basis, BAND_BASES)
        lo = _check_finite("lo", self.lo)
        hi = _check_finite("hi", self.hi)
        if lo < 0:
            raise ValueError(f"band {self.name!r}: lo={lo!r} must be >= 0")
        if not lo < hi:
            raise ValueError(f"band {self.name!r}: lo={lo!r} must be less than hi={hi!r}")
        object.__setattr__(self, "lo", lo)
        object.__setattr__(self, "hi", hi)

    def edges_hz(self, speed_hz: float | None = None) -> tuple[float, float]:
        """The band's edges ``(lo_hz, hi_hz)`` in Hz.

        ``speed_hz`` is the running speed in Hz (r/min ÷ 60). An order band needs it
        (finite, > 0); a Hz band ignores it.
        """
        if self.basis == "hz":
            return (self.lo, self.hi)
        if speed_hz is None:
            raise ValueError(
                f"band {self.name!r} is in orders of running speed and needs speed_hz "
                "(running speed in Hz, r/min / 60); got None"
            )
        s = float(speed_hz)
        if not (np.isfinite(s) and s > 0):
            raise ValueError(
                f"band {self.name!r}: speed_hz={speed_hz!r} must be a finite running speed > 0 Hz"
            )
        return (self.lo * s, self.hi * s)


def band_edges(bands: Sequence[Band], speed_hz: float | None = None) -> np.ndarray:
    """Edges of ``bands`` in Hz as a float64 array ``(B, 2)`` of ``[lo_hz, hi_hz]`` rows,
    ready for :func:`band_weights`. ``speed_hz`` as in :meth:`Band.edges_hz`.

    Parameters
    ----------
    bands : sequence of Band
        The bands.
    speed_hz : float, optional
        Running speed, Hz (r/min ÷ 60); needed by order bands.

    Returns
    -------
    ndarray
        float64 of shape (B, 2): [lo_hz, hi_hz] per band, Hz.
    """
    out = np.empty((len(bands), 2), dtype=np.float64)
    for i, b in enumerate(bands):
        out[i] = b.edges_hz(speed_hz)
    return out


# --- IEC 61260-1:2014 fractional-octave bands, base ten -------------------------------------

OCTAVE_FRACTIONS: tuple[int, ...] = (1, 3, 6, 12, 24)
_G = 10.0 ** (3 / 10)  # octave frequency ratio, base ten (IEC 61260-1, 5.2)
_FR_HZ = 1000.0  # reference frequency (IEC 61260-1, 5.4)
# Nominal third-octave mid-bands within one decade. The IEC 61260-1 annex lists 25 Hz …
# 20 kHz, which is this list times powers of ten (the R10 preferred numbers of ISO 3);
# outside that range we continue the same way. Third-octave band x uses index x mod 10.
_R10 = ("1", "1.25", "1.6", "2", "2.5", "3.15", "4", "5", "6.3", "8")
_EDGE_RTOL = 1e-9  # so an edge passed in as a computed float still includes its band


@dataclass(frozen=True)
class OctaveBand:
    """One IEC 61260-1 band: index ``x``, exact mid-band ``center_hz``, exact edges
    ``lo_hz``/``hi_hz`` (Hz), the nominal mid-band ``nominal_hz`` used to label it, and
    ``label`` such as ``"31.5 Hz"`` or ``"12.5 kHz"``.

    Attributes
    ----------
    x : int
        Band index (x = 0 is centred on, or for even b starts at, 1 kHz).
    center_hz : float
        Exact mid-band frequency, Hz.
    lo_hz, hi_hz : float
        Exact edges, Hz.
    nominal_hz : float
        Nominal mid-band frequency used for the label, Hz.
    label : str
        E.g. ``"31.5 Hz"`` or ``"12.5 kHz"``.
    """

    x: int
    center_hz: float
    lo_hz: float
    hi_hz: float
    nominal_hz: float
    label: str

    def as_band(self, prefix: str = "") -> Band:
        """This band as a Hz :class:`Band` named ``prefix + label`` (e.g. ``"1/3 oct 1 kHz"``)."""
        return Band(f"{prefix}{self.label}", self.lo_hz, self.hi_hz, "hz")


def _exact_hz(fraction: int, c: np.ndarray) -> np.ndarray:
    """fr·G^(c/(2b)) in Hz; c = 2x (odd b) or 2x + 1 (even b) is the centre, c ∓ 1 the edges."""
    return _FR_HZ * 10.0 ** (3 * c / (20 * fraction))


def _nominal_hz(fraction: int, x: int, center_hz: float) -> float:
    if fraction in (1, 3):
        i = x * (3 // fraction)  # octave band x is third-octave band 3x
        return float(f"{_R10[i % 10]}e{3 + i // 10}")
    return float(f"{center_hz:.3g}")


def _label(nominal_hz: float) -> str:
    if nominal_hz >= 1000:
        return f"{nominal_hz / 1000:g} kHz"
    return f"{nominal_hz:g} Hz"


def octave_bands(fraction: int, lo_hz: float, hi_hz: float) -> list[OctaveBand]:
    """IEC 61260-1:2014 base-ten 1/b-octave bands whose edges both lie in [lo_hz, hi_hz].

    ``fraction`` is b, one of 1, 3, 6, 12, 24. With G = 10^(3/10) and fr = 1000 Hz, band
    x has the exact mid-band frequency

    * fm = fr·G^(x/b) for odd b (so x = 0 is centred on 1 kHz),
    * fm = fr·G^((2x+1)/(2b)) for even b (so 1 kHz is an edge, between x = −1 and x = 0),

    and edges fm·G^(−1/(2b)) and fm·G^(+1/(2b)), all in Hz.

    Inclusion rule: band x is returned iff lo_edge >= lo_hz·(1 − 1e-9) and
    hi_edge <= hi_hz·(1 + 1e-9); the 1e-9 relative slack lets an edge frequency that was
    itself computed (e.g. 891.2509…) include its band despite rounding. Bands come in
    increasing x.

    ``nominal_hz``: for b = 1 and 3 the nominal mid-band of the standard's annex (25, 31.5,
    40, … 20000 Hz for thirds; every third of those for octaves), continued outside
    25 Hz–20 kHz by powers of ten (R10 preferred numbers); for b = 6, 12, 24 the exact
    mid-band rounded to 3 significant figures — our own choice: the standard's annex lists
    nominal values for octave and third-octave bands only (from memory; docs/references.md).

    Parameters
    ----------
    fraction : {1, 3, 6, 12, 24}
        b of 1/b-octave.
    lo_hz, hi_hz : float
        Range the bands' edges must lie in, Hz (0 < lo_hz < hi_hz).

    Returns
    -------
    list of OctaveBand
        In increasing x; empty when no whole band fits.

    Examples
    --------
    >>> [b.label for b in octave_bands(1, 20, 20000)][:3]
    ['31.5 Hz', '63 Hz', '125 Hz']
    >>> b = octave_bands(3, 800, 1300)[0]; round(b.lo_hz, 4), round(b.hi_hz, 4)
    (891.2509, 1122.0185)
    """
    if isinstance(fraction, bool) or fraction not in OCTAVE_FRACTIONS:
        listed = ", ".join(str(f) for f in OCTAVE_FRACTIONS)
        raise ValueError(f"fraction={fraction!r} is not one of {listed}")
    lo = _check_finite("lo_hz", lo_hz)
    hi = _check_finite("hi_hz", hi_hz)
    if not 0 < lo < hi:
        raise ValueError(f"need 0 < lo_hz < hi_hz; got lo_hz={lo_hz!r}, hi_hz={hi_hz!r}")
    b = int(fraction)
    # Candidates: every x whose centre lies in [lo, hi], plus two either side.
    x = np.arange(
        int(np.floor(b * np.log10(lo / _FR_HZ) / 0.3)) - 2,
        int(np.ceil(b * np.log10(hi / _FR_HZ) / 0.3)) + 3,
    )
    c = 2 * x + (b + 1) % 2
    fm, f_lo, f_hi = _exact_hz(b, c), _exact_hz(b, c - 1), _exact_hz(b, c + 1)
    keep = (f_lo >= lo * (1 - _EDGE_RTOL)) & (f_hi <= hi * (1 + _EDGE_RTOL))
    out = []
    for xi, m, lo_e, hi_e in zip(x[keep], fm[keep], f_lo[keep], f_hi[keep], strict=True):
        nominal = _nominal_hz(b, int(xi), float(m))
        out.append(
            OctaveBand(int(xi), float(m), float(lo_e), float(hi_e), nominal, _label(nominal))
        )
    return out


# --- band RMS from a power spectrum ---------------------------------------------------------


def band_weights(edges_hz: ArrayLike, f0_hz: float, df_hz: float, q_bins: int) -> np.ndarray:
    """Weights ``(B, Q)`` float64 in [0, 1]: the fraction of line q's width that lies in band b.

    ``edges_hz`` is ``(B, 2)`` rows of ``[lo_hz, hi_hz]`` (Hz, lo < hi, finite). Line q sits
    at f[q] = f0_hz + q·df_hz and covers [f[q] − df/2, f[q] + df/2], clipped below at 0 Hz
    (a one-sided spectrum has no negative frequencies: with f0_hz = 0 the DC line covers
    [0, df/2], so a band from 0 Hz takes the whole DC line). A band edge between two line
    centres splits the lines proportionally, so for a band well inside the grid the weights
    sum to (hi − lo)/df_hz.

    The top line is not clipped: if it is the Nyquist line (fs/2, not doubled), a band
    reaching fs/2 takes half of it, which for white noise reads the band power low by half
    a line's share (1/(2·lines) of the whole range).

    Parameters
    ----------
    edges_hz : array_like
        (B, 2) rows of [lo_hz, hi_hz], Hz (lo < hi, finite).
    f0_hz : float
        Frequency of line 0, Hz (≥ 0).
    df_hz : float
        Line spacing, Hz (> 0).
    q_bins : int
        Number of lines Q (≥ 1).

    Returns
    -------
    ndarray
        float64 of shape (B, Q), dimensionless, in [0, 1].

    Examples
    --------
    >>> band_weights([[2.0, 4.0]], 0.0, 1.0, 6)
    array([[0. , 0. , 0.5, 1. , 0.5, 0. ]])
    """
    e = np.asarray(edges_hz, dtype=np.float64)
    if e.ndim != 2 or e.shape[1] != 2:
        raise ValueError(f"edges_hz must have shape (B, 2); got {e.shape}")
    if not np.all(np.isfinite(e)):
        raise ValueError("edges_hz must be finite")
    if not np.all(e[:, 0] < e[:, 1]):
        raise ValueError(f"every band needs lo < hi; bad rows {np.flatnonzero(e[:, 0] >= e[:, 1])}")
    f0 = _check_finite("f0_hz", f0_hz)
    df = _check_finite("df_hz", df_hz)
    if f0 < 0:
        raise ValueError(f"f0_hz={f0_hz!r} must be >= 0")
    if df <= 0:
        raise ValueError(f"df_hz={df_hz!r} must be > 0")
    if isinstance(q_bins, bool) or int(q_bins) != q_bins or q_bins < 1:
        raise ValueError(f"q_bins={q_bins!r} must be an integer >= 1")
    f = f0 + df * np.arange(int(q_bins), dtype=np.float64)
    left = np.maximum(f - df / 2, 0.0)
    right = f + df / 2
    overlap = np.minimum(e[:, 1:2], right) - np.maximum(e[:, 0:1], left)
    result: np.ndarray = np.clip(overlap, 0.0, None) / (right - left)
    return result


def band_rms(power: ArrayLike, weights: ArrayLike, enbw_bins: float) -> np.ndarray:
    """Band RMS ``(..., B)`` float64 = sqrt(power @ weights.T / enbw_bins).

    ``power`` is a one-sided power spectrum ``(..., Q)`` in unit² RMS per line (module
    docstring; e.g. (mm/s)² gives mm/s RMS), any leading axes (channels);
    ``weights`` is ``(B, Q)`` from :func:`band_weights`; ``enbw_bins`` is the window's
    ENBW in bins, N·S2/S1². NaN in a band's lines gives NaN for that band.

    Parameters
    ----------
    power : array_like
        One-sided power spectrum (..., Q), unit² RMS per line.
    weights : array_like
        (B, Q) from :func:`band_weights`.
    enbw_bins : float
        The window's ENBW in lines, N·S2/S1² (> 0).

    Returns
    -------
    ndarray
        float64 (..., B): band RMS in the spectrum's unit (√unit²).

    Examples
    --------
    A sine of peak 2 (RMS √2 ≈ 1.4142) at 50.3 Hz, Hann window, N = 1024, fs = 1024 Hz:

    >>> from dsp.windows import get_window, window_info
    >>> n, fs = 1024, 1024.0
    >>> w = get_window("hann", n)
    >>> x = 2.0 * np.sin(2 * np.pi * 50.3 * np.arange(n) / fs)
    >>> ps = 2 * np.abs(np.fft.rfft(w * x)) ** 2 / w.sum() ** 2
    >>> ps[0] /= 2; ps[-1] /= 2
    >>> wts = band_weights([[40.0, 60.0]], 0.0, fs / n, ps.size)
    >>> round(float(band_rms(ps, wts, window_info("hann", n).enbw_bins)[0]), 4)
    1.4142
    """
    p = np.asarray(power)
    wts = np.asarray(weights, dtype=np.float64)
    if wts.ndim != 2:
        raise ValueError(f"weights must have shape (B, Q); got {wts.shape}")
    if p.ndim < 1 or p.shape[-1] != wts.shape[1]:
        raise ValueError(
            f"power's last axis ({p.shape[-1] if p.ndim else 'scalar'}) must equal the "
            f"number of lines in weights ({wts.shape[1]})"
        )
    enbw = _check_finite("enbw_bins", enbw_bins)
    if enbw <= 0:
        raise ValueError(f"enbw_bins={enbw_bins!r} must be > 0")
    ms = np.matmul(p.astype(np.float64, copy=False), wts.T) / enbw
    result: np.ndarray = np.sqrt(np.maximum(ms, 0.0))
    return result


def overall_rms(
    power: ArrayLike,
    f0_hz: float,
    df_hz: float,
    lo_hz: float,
    hi_hz: float,
    enbw_bins: float,
) -> np.ndarray:
    """RMS ``(...)`` float64 over [lo_hz, hi_hz] of a power spectrum ``(..., Q)`` on the
    grid f[q] = f0_hz + q·df_hz (e.g. velocity 10–1000 Hz). Same scaling and rules as
    :func:`band_weights` and :func:`band_rms`.

    Parameters
    ----------
    power : array_like
        One-sided power spectrum (..., Q), unit² RMS per line.
    f0_hz : float
        Frequency of line 0, Hz.
    df_hz : float
        Line spacing, Hz.
    lo_hz, hi_hz : float
        The range, Hz.
    enbw_bins : float
        The window's ENBW in lines.

    Returns
    -------
    ndarray
        float64 (...): the RMS in the spectrum's unit.
    """
    p = np.asarray(power)
    if p.ndim < 1:
        raise ValueError("power must have at least one axis (lines)")
    wts = band_weights([[lo_hz, hi_hz]], f0_hz, df_hz, p.shape[-1])
    return band_rms(p, wts, enbw_bins)[..., 0]


# --- vibration severity zones ---------------------------------------------------------------

SeverityPreset = Literal["group1-rigid", "group1-flexible", "group2-rigid", "group2-flexible"]

# Zone boundaries A/B, B/C, C/D in mm/s RMS (broadband velocity) of ISO 10816-3:2009,
# Annex A — from memory, not read in the standard: users must confirm them against their
# copy. ISO 20816-3:2022 replaced it with tables of its own, which these are not taken
# from (docs/references.md). Group 1: 300 kW–50 MW; group 2: 15–300 kW; rigid / flexible.
SEVERITY_PRESETS: dict[str, tuple[float, float, float]] = {
    "group1-rigid": (2.3, 4.5, 7.1),
    "group1-flexible": (3.5, 7.1, 11.0),
    "group2-rigid": (1.4, 2.8, 4.5),
    "group2-flexible": (2.3, 4.5, 7.1),
}

_ZONES = np.array(["A", "B", "C", "D"])


def severity_zone(v_rms_mm_s: float | ArrayLike, preset: str) -> str | np.ndarray:
    """ISO 20816-style zone 'A'…'D' of broadband velocity RMS ``v_rms_mm_s`` (mm/s).

    ``preset`` is a key of :data:`SEVERITY_PRESETS` (boundaries of ISO 10816-3:2009, from
    memory: confirm them against your copy of the standard). A value
    equal to a boundary belongs to the upper zone (A/B = 2.3 mm/s reads 'B'). A scalar
    gives a str; an array gives an array of one-character str of the same shape. Values
    must be finite and >= 0 (mask faulted channels first). Measure over
    :func:`severity_range_hz`.

    Parameters
    ----------
    v_rms_mm_s : float or array_like
        Broadband velocity RMS, mm/s (finite, ≥ 0).
    preset : str
        A key of :data:`SEVERITY_PRESETS`.

    Returns
    -------
    str or ndarray
        'A', 'B', 'C' or 'D' (an array of them for array input).

    Examples
    --------
    >>> severity_zone(4.5, "group1-rigid"), severity_zone(4.49, "group1-rigid")
    ('C', 'B')
    """
    check_choice("preset", preset, tuple(SEVERITY_PRESETS))
    v = np.asarray(v_rms_mm_s, dtype=np.float64)
    if not np.all(np.isfinite(v) & (v >= 0)):
        raise ValueError("v_rms_mm_s must be finite and >= 0 (mm/s RMS)")
    idx = np.searchsorted(np.asarray(SEVERITY_PRESETS[preset]), v, side="right")
    zones = _ZONES[idx]
    return str(zones) if zones.ndim == 0 else zones


def severity_range_hz(slow: bool) -> tuple[float, float]:
    """Frequency range in Hz for the severity velocity RMS: (2, 1000) for machines running
    120–600 r/min (``slow=True``), (10, 1000) above 600 r/min (ISO 20816-1:2016, from
    memory).

    Parameters
    ----------
    slow : bool
        True for machines running 120–600 r/min.

    Returns
    -------
    tuple of float
        (lo_hz, hi_hz), Hz.
    """
    return (2.0, 1000.0) if slow else (10.0, 1000.0)

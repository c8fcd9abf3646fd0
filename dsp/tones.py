"""Tones: interpolated spectral peaks, and tracked tones by a single-bin DFT at any frequency.

Knows nothing about streams, I/O, alarms or the service; numpy and scipy only.

Spectrum convention (Heinzel et al. 2002, §9; docs/references.md): the one-sided power
spectrum of a frame x windowed by w is ``power[q] = 2·|X[q]|²/S1²`` in rms² (DC and Nyquist
not doubled), with ``X = rfft(w·x)``, ``S1 = Σ w[k]`` and lines at ``f[q] = q·df_hz``,
``df_hz = fs/N``. A sine of peak A exactly on a line reads A²/2 there. A sine δ lines off a
line's centre reads ``A²/2·g(δ)²`` on it, where ``g(ν) = |W(ν)|/|W(0)|`` is the window's
normalised transform (``dsp.windows.transform_magnitude``); :func:`find_peaks` undoes that
loss for any window.
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from .types import WindowName
from .windows import DEFAULT_KAISER_BETA, get_window, transform_magnitude

__all__ = [
    "Peaks",
    "find_peaks",
    "goertzel",
    "harmonics",
    "orders_to_hz",
    "tone_kernel",
    "tone_power",
]

# Offsets δ ∈ [0, ½] line at which the interpolation table is sampled. Linear interpolation
# between samples 1/1024 line apart errs by under 1e-6 line and 1e-5 dB for every window in
# the catalogue at N = 4096 (measured against exact evaluation of W at random offsets).
_TABLE_STEPS = 512


@dataclass(frozen=True)
class Peaks:
    """The largest spectral peaks of each channel, largest first.

    ``frequency_hz`` — interpolated frequency in Hz; ``amplitude_rms`` — RMS amplitude of the
    sine in the spectrum's own unit (e.g. m/s² RMS for a spectrum in (m/s²)² rms²), with the
    window's scalloping loss undone; ``line`` — index q of the spectrum line holding the peak.
    Shapes are (C, K) for a (C, Q) spectrum and (K,) for a (Q,) one, K = ``count``. Where a
    channel has fewer than K peaks, the missing entries are NaN (``line`` −1).

    Attributes
    ----------
    frequency_hz : ndarray
        Interpolated frequencies, Hz; NaN where missing.
    amplitude_rms : ndarray
        RMS amplitudes of the sines, in the spectrum's unit; NaN where missing.
    line : ndarray
        Index q of the line holding each peak; −1 where missing.
    """

    frequency_hz: np.ndarray
    amplitude_rms: np.ndarray
    line: np.ndarray


@functools.lru_cache(maxsize=32)
def _interp_table(window: str, n: int, beta: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(r, δ, g) sampled at δ = 0…½: r(δ) = g(1−δ)/g(δ), g(δ) = |W(δ)|/|W(0)|.

    r is the magnitude ratio of the larger neighbour to the peak line for a sine δ lines
    from the peak line's centre; np.interp needs it strictly increasing, which holds when g
    falls over [0, 1] faster than it can ripple (true for every window in the catalogue).
    """
    w = get_window(window, n, beta=beta)  # type: ignore[arg-type]
    nu = np.linspace(0.0, 1.0, 2 * _TABLE_STEPS + 1)
    g = transform_magnitude(w, nu)  # one evaluation serves both g(δ) and g(1 − δ)
    delta = nu[: _TABLE_STEPS + 1]
    g_delta = g[: _TABLE_STEPS + 1]
    r = g[::-1][: _TABLE_STEPS + 1] / g_delta
    if not np.all(np.diff(r) > 0):
        raise ValueError(
            f"window={window!r} with n={n} has a main lobe too narrow or rippled for "
            "two-line interpolation"
        )
    for a in (r, delta, g_delta):
        a.setflags(write=False)
    return r, delta, g_delta


def find_peaks(
    power: np.ndarray,
    df_hz: float,
    window: WindowName,
    n: int,
    *,
    count: int = 8,
    min_hz: float = 0.0,
    max_hz: float | None = None,
    beta: float = DEFAULT_KAISER_BETA,
    weight: Callable[[np.ndarray], np.ndarray] | None = None,
) -> Peaks:
    """The ``count`` largest peaks of each channel of a power spectrum, with interpolation.

    ``power`` is a one-sided power spectrum in rms² per line, shape (C, Q) or (Q,), on
    f[q] = q·df_hz (Hz), made from ``n``-sample frames weighted by the periodic ``window``
    (``beta`` is the Kaiser parameter) and possibly averaged; Q ≤ n//2 + 1 (a spectrum cut
    at Fmax is fine).

    A peak is a line q with both neighbours inside the spectrum, power[q] > power[q−1] and
    power[q] ≥ power[q+1] (the tie goes to the lower line so a sine exactly half-way between
    two lines still yields one peak), and min_hz ≤ f[q] ≤ max_hz. With s = ±1 the side of
    the larger neighbour, r = √(power[q+s]/power[q]) is inverted through the window's own
    r(δ) = |W(1−δ)|/|W(δ)| to the offset δ ∈ [0, ½] line, and

    * frequency = (q + s·δ)·df_hz, in Hz;
    * amplitude_rms = √power[q] / g(δ), g(δ) = |W(δ)|/|W(0)|, in the spectrum's unit RMS.

    Exact for one noise-free sine; other tones and the negative-frequency image bias the
    estimate by their leakage onto lines q and q+s. Peaks are ranked by ``amplitude_rms``.

    ``weight`` (optional) maps frequencies in Hz to a power factor ≥ 0 that is monotone
    between its breaks (e.g. ``dsp.scaling.unit_power_weights`` to velocity): each peak's
    amplitude_rms is then √(amplitude_rms² · weight(frequency)), and the ranking is by that
    — every peak is a candidate, so the result is the definition's in the weighted unit, not
    a re-ranking of the largest unweighted ones.

    Example: a 1 m/s² RMS sine at 1003.7 Hz, fs = 25 600 Hz, N = 4096 (df = 6.25 Hz), Hann:
    find_peaks(...) gives frequency_hz ≈ 1003.70 and amplitude_rms ≈ 1.000, where the highest
    line alone (q = 161, 1006.25 Hz) reads 0.897 m/s² RMS.

    Parameters
    ----------
    power : ndarray
        One-sided power spectrum, rms² per line in some unit², shape (C, Q) or (Q,).
    df_hz : float
        Line spacing, Hz (fs/n).
    window : {'rectangular', 'hann', 'hamming', 'blackman-harris', 'flattop', 'kaiser'}
        The window the frames were weighted by.
    n : int
        Frame length, samples.
    count : int, optional
        Peaks per channel, K (≥ 1; default 8).
    min_hz, max_hz : float, optional
        Frequency range a peak's line must lie in, Hz (default 0 … the last line).
    beta : float, optional
        Kaiser β (default 8.6).
    weight : callable, optional
        Frequencies (Hz) → power factor ≥ 0, applied before ranking (e.g. to velocity).

    Returns
    -------
    Peaks
        Shapes (C, K) or (K,), largest first.
    """
    p = np.asarray(power)
    if p.dtype not in (np.float32, np.float64):
        p = p.astype(np.float64)
    if p.ndim not in (1, 2):
        raise ValueError(f"power must be (channels, lines) or (lines,), got shape {p.shape}")
    if int(count) != count or count < 1:
        raise ValueError(f"count={count!r} must be an integer of at least 1")
    if not (np.isfinite(df_hz) and df_hz > 0):
        raise ValueError(f"df_hz={df_hz!r} must be a finite number > 0")
    if not (np.isfinite(min_hz) and min_hz >= 0):
        raise ValueError(f"min_hz={min_hz!r} must be a finite number >= 0")
    if max_hz is not None and not (max_hz > min_hz):
        raise ValueError(f"max_hz={max_hz!r} must be greater than min_hz={min_hz!r}")
    r_tab, d_tab, g_tab = _interp_table(*_window_key(window, n, beta))
    count = int(count)
    p2 = p[np.newaxis] if p.ndim == 1 else p
    n_ch, n_lines = p2.shape
    if n_lines > n // 2 + 1:
        raise ValueError(f"power has {n_lines} lines, more than n//2 + 1 = {n // 2 + 1}")

    freq = np.full((n_ch, count), np.nan)
    amp = np.full((n_ch, count), np.nan)
    line = np.full((n_ch, count), -1, dtype=np.int64)
    if n_lines >= 3:
        left, mid, right = p2[:, :-2], p2[:, 1:-1], p2[:, 2:]
        f_line = np.arange(1, n_lines - 1) * df_hz
        in_range = f_line >= min_hz
        if max_hz is not None:
            in_range &= f_line <= max_hz
        is_peak = (mid > left) & (mid >= right) & in_range  # NaN compares False: never a peak
        width = mid.shape[1]
        flat = np.flatnonzero(is_peak)  # in line order, channel by channel
        rows = flat // width
        at = flat + 2 * rows + 1  # the peak line in the flattened spectrum
        p_flat = p2.reshape(-1)
        pk, lf, rt = (p_flat.take(at + d).astype(np.float64) for d in (0, -1, 1))
        r = np.sqrt(np.maximum(lf, rt) / pk)
        # Rank roughly, then interpolate exactly only the peaks that can make the top count.
        ranker = _ranker(*_window_key(window, n, beta))
        rough = np.sqrt(pk) * ranker.factor(r)
        lo_f = hi_f = 1.0
        if weight is not None:
            # the interpolated frequency lies within half a line of the peak line, where a
            # weight monotone between breaks is bounded by its values at the two ends
            # (the weight once at every half line, f = (q − ½)·df for q = 0…Q, then indexed)
            halves = np.sqrt(np.asarray(weight((np.arange(n_lines + 1) - 0.5) * df_hz),
                                        np.float64))
            q_line = flat % width + 1
            w_lo, w_hi = halves.take(q_line), halves.take(q_line + 1)
            lo_f, hi_f = np.minimum(w_lo, w_hi), np.maximum(w_lo, w_hi)
        kth = _kth_per_row(rows, rough * lo_f, n_ch, count)
        sure = rough * hi_f >= kth[rows] * (
            (1.0 - ranker.eps) / (1.0 + ranker.eps) * (1.0 - 1e-12))
        keep = np.flatnonzero(sure)
        r, pk, lf, rt, rows, flat = r[keep], pk[keep], lf[keep], rt[keep], rows[keep], flat[keep]
        delta_pk = np.interp(r, r_tab, d_tab)  # clips to [0, ½]
        a_pk = np.sqrt(pk) / np.interp(delta_pk, d_tab, g_tab)
        offset = np.where(rt >= lf, delta_pk, -delta_pk)
        q_all = flat - rows * width + 1
        f_all = (q_all + offset) * df_hz
        if weight is not None:
            a_pk = a_pk * np.sqrt(np.asarray(weight(f_all), np.float64))
        top = _top_per_row(rows, a_pk, n_ch, count)  # indices into the peaks, by rank
        got = top >= 0
        pick = top[got]
        freq[got] = f_all[pick]
        amp[got] = a_pk[pick]
        line[got] = q_all[pick]

    if p.ndim == 1:
        freq, amp, line = freq[0], amp[0], line[0]
    return Peaks(frequency_hz=freq, amplitude_rms=amp, line=line)


def _kth_per_row(rows: np.ndarray, value: np.ndarray, n_rows: int, count: int) -> np.ndarray:
    """[n_rows] the ``count``-th largest of each row's values (−inf where a row has fewer);
    ``rows`` is non-decreasing, so row i's values are a run of ``value``."""
    start = np.searchsorted(rows, np.arange(n_rows + 1))
    most = int(np.diff(start).max()) if rows.size else 0
    if most < count:
        return np.full(n_rows, -np.inf)
    # One row of the values per row (−inf after its own): value i goes to flat index
    # i + rows[i]·most − start[rows[i]] (a 1-D put; 2-D fancy assignment costs several
    # times more), then a partition finds each row's count-th largest.
    dense = np.full((n_rows, most), -np.inf)
    shift = np.arange(n_rows) * most - start[:-1]
    dense.reshape(-1)[np.arange(rows.size) + shift[rows]] = value
    return np.partition(dense, most - count, axis=1)[:, most - count]


def _top_per_row(rows: np.ndarray, value: np.ndarray, n_rows: int, count: int) -> np.ndarray:
    """[n_rows, count] indices into ``value`` of each row's ``count`` largest, largest first
    (ties: the lower index first), −1 where a row has fewer; ``rows`` is non-decreasing.

    One stable sort of all the values: meant for the few that are left after ranking."""
    out = np.full((n_rows, count), -1, dtype=np.intp)
    order = np.lexsort((-value, rows))  # stable: equal values keep index order
    r = rows[order]
    rank = np.arange(r.size) - np.searchsorted(r, r)
    keep = rank < count
    out[r[keep], rank[keep]] = order[keep]
    return out


@dataclass(frozen=True)
class _Ranker:
    """A fast, bounded approximation of the peak amplitude factor, to rank peaks.

    find_peaks' amplitude is √pk·h(r) with h(r) = 1/g(δ(r)), δ(r) and g(δ) interpolated in
    the window's table (np.interp, a binary search per point: ~50 ns here, most of the cost
    on a noisy spectrum where a third of the lines are peaks). Sampled on a uniform grid in r
    and interpolated linearly, h costs a few array passes; its largest relative error ``eps``
    is measured when the grid is made, on a grid 16× finer, and taken 4× over. A peak
    whose approximate amplitude is below (1 − eps)/(1 + eps) × the count-th largest
    approximate one cannot be among the count largest exact ones, so only the rest are
    interpolated exactly."""

    r0: float
    scale: float  # grid cells per unit of r
    h: np.ndarray  # [cells + 1] h at the grid points
    dh: np.ndarray  # [cells] h[i + 1] − h[i]
    eps: float

    @classmethod
    def build(cls, r_tab: np.ndarray, d_tab: np.ndarray, g_tab: np.ndarray,
              cells: int = 4096) -> _Ranker:
        def exact(r: np.ndarray) -> np.ndarray:
            result: np.ndarray = 1.0 / np.interp(np.interp(r, r_tab, d_tab), d_tab, g_tab)
            return result

        r0, r1 = float(r_tab[0]), float(r_tab[-1])
        h = exact(np.linspace(r0, r1, cells + 1))
        ranker = cls(r0, cells / (r1 - r0), h, np.diff(h), 0.0)
        test = np.linspace(r0 - 0.01, r1 + 0.01, 16 * cells + 1)
        err = float(np.max(np.abs(ranker.factor(test) / exact(test) - 1.0)))
        return cls(ranker.r0, ranker.scale, h, ranker.dh, 4.0 * err + 1e-12)

    def factor(self, r: np.ndarray) -> np.ndarray:
        """h(r) to within a relative ``eps`` (NaN r reads as the lowest r)."""
        u = np.fmin(np.fmax((r - self.r0) * self.scale, 0.0), self.dh.size - 1e-9)
        j = u.astype(np.intp)
        u -= j
        u *= self.dh[j]
        u += self.h[j]
        return u


@functools.lru_cache(maxsize=32)
def _ranker(window: str, n: int, beta: float) -> _Ranker:
    return _Ranker.build(*_interp_table(window, n, beta))


def _window_key(window: WindowName, n: int, beta: float) -> tuple[str, int, float]:
    get_window(window, n, beta=beta)  # validates window, n and beta
    return window, int(n), float(beta) if window == "kaiser" else 0.0


def tone_power(x_tone: np.ndarray, s1: float) -> np.ndarray:
    """Power in rms² of a tracked tone from its single-bin DFT: 2·|X(f)|²/S1² (float64).

    ``x_tone`` is X(f) = Σ w[k]·x[k]·exp(−2πi·f·k/fs) (complex, any shape, in the unit of x
    times that of w) and ``s1`` = Σ w[k]. The same scaling as a spectrum line (Heinzel 2002
    §9), so a sine of peak A at exactly f gives A²/2 for every window, up to the leakage of
    its negative-frequency image.

    Parameters
    ----------
    x_tone : ndarray of complex
        X(f), any shape, in the unit of x.
    s1 : float
        Σw of the window (dimensionless).

    Returns
    -------
    ndarray
        float64 power, rms² in the unit of x squared, the shape of ``x_tone``.
    """
    if not (np.isfinite(s1) and s1 > 0):
        raise ValueError(f"s1={s1!r} must be a finite number > 0")
    x = np.asarray(x_tone)
    return 2.0 * (x.real.astype(np.float64) ** 2 + x.imag.astype(np.float64) ** 2) / s1**2


def tone_kernel(
    freqs_hz: np.ndarray,
    n: int,
    fs: float,
    window: WindowName,
    *,
    beta: float = DEFAULT_KAISER_BETA,
) -> np.ndarray:
    """Single-bin DFT kernel with the window folded in, as float32.

    For tone frequencies ``freqs_hz`` (Hz, 0 ≤ f ≤ fs/2) of shape (C, T) returns K of shape
    (C, n, 2T), for shape (T,) returns (n, 2T) (it broadcasts over channels), with

        K[..., k, t]     =  w[k]·cos(2π·f_t·k/fs)
        K[..., k, T + t] = −w[k]·sin(2π·f_t·k/fs)

    computed in float64 and then cast. For *unwindowed* frames ``frames`` (C, P, n),
    ``y = frames @ K`` gives y[..., :T] = Re X(f_t) and y[..., T:] = Im X(f_t) of
    X(f) = Σ_k w[k]·x[k]·exp(−2πi·f·k/fs): the window is already in K, so do not apply it
    to the frames again. Feed ``y[..., :T] + 1j·y[..., T:]`` to :func:`tone_power` with
    S1 = Σ w[k]. At f = q·fs/n this equals ``rfft(w·x)[q]``.

    Parameters
    ----------
    freqs_hz : ndarray
        Tone frequencies, Hz (0 ≤ f ≤ fs/2), shape (C, T) or (T,).
    n : int
        Frame length, samples.
    fs : float
        Sample rate, Hz.
    window : {'rectangular', 'hann', 'hamming', 'blackman-harris', 'flattop', 'kaiser'}
        Window folded into the kernel.
    beta : float, optional
        Kaiser β (default 8.6).

    Returns
    -------
    ndarray
        float32 K of shape (C, n, 2T) or (n, 2T).
    """
    f = np.asarray(freqs_hz, dtype=np.float64)
    if f.ndim not in (1, 2) or f.shape[-1] == 0:
        raise ValueError(f"freqs_hz must be (channels, tones) or (tones,), got shape {f.shape}")
    if not (np.isfinite(fs) and fs > 0):
        raise ValueError(f"fs={fs!r} must be a finite number > 0")
    if not np.all((f >= 0) & (f <= fs / 2)):
        raise ValueError(f"freqs_hz must lie in [0, fs/2] = [0, {fs / 2!r}] Hz")
    w = get_window(window, n, beta=beta)
    k = np.arange(int(n), dtype=np.float64)
    phase = (2 * np.pi / fs) * k[:, np.newaxis] * f[..., np.newaxis, :]  # (..., n, T)
    wk = w[:, np.newaxis]
    return np.concatenate((wk * np.cos(phase), -wk * np.sin(phase)), axis=-1).astype(np.float32)


def goertzel(
    x: np.ndarray,
    f_hz: float,
    fs: float,
    window: WindowName,
    *,
    beta: float = DEFAULT_KAISER_BETA,
) -> np.ndarray:
    """X(f) = Σ w[k]·x[k]·exp(−2πi·f·k/fs) by the Goertzel recursion, float64 complex.

    A plain reference (Goertzel 1958, generalised to any real f): a loop over samples, for
    cross-checking :func:`tone_kernel`, not for the hot path. ``x`` is (..., n) in any unit;
    the result has shape (...) in that unit (sum over samples, not normalised).

    With ω = 2π·f/fs and v[k] = w[k]·x[k]: s[k] = v[k] + 2·cos ω·s[k−1] − s[k−2], and
    X(f) = exp(−iω(n−1))·(s[n−1] − exp(−iω)·s[n−2]).

    Parameters
    ----------
    x : ndarray
        Samples, (..., n), in any unit.
    f_hz : float
        Frequency evaluated, Hz (any real value, not only a line centre).
    fs : float
        Sample rate, Hz.
    window : {'rectangular', 'hann', 'hamming', 'blackman-harris', 'flattop', 'kaiser'}
        Window applied to the samples.
    beta : float, optional
        Kaiser β (default 8.6).

    Returns
    -------
    ndarray
        complex128 X(f), shape (...), in the unit of x (scale with :func:`tone_power`).
    """
    v = np.asarray(x, dtype=np.float64)
    n = v.shape[-1]
    v = v * get_window(window, n, beta=beta)
    omega = 2 * np.pi * float(f_hz) / float(fs)
    coeff = 2 * np.cos(omega)
    s_prev = np.zeros(v.shape[:-1])
    s_prev2 = np.zeros(v.shape[:-1])
    for k in range(n):
        s_prev, s_prev2 = v[..., k] + coeff * s_prev - s_prev2, s_prev
    result: np.ndarray = np.exp(-1j * omega * (n - 1)) * (s_prev - np.exp(-1j * omega) * s_prev2)
    return result


def harmonics(f1_hz: float, count: int) -> np.ndarray:
    """Frequencies in Hz of the first ``count`` harmonics 1X…countX of ``f1_hz`` (float64).

    Parameters
    ----------
    f1_hz : float
        Fundamental (1X), Hz.
    count : int
        Number of harmonics (≥ 1).

    Returns
    -------
    ndarray
        float64 (count,), Hz: f1, 2·f1, …, count·f1.
    """
    if not (np.isfinite(f1_hz) and f1_hz > 0):
        raise ValueError(f"f1_hz={f1_hz!r} must be a finite number > 0")
    if int(count) != count or count < 1:
        raise ValueError(f"count={count!r} must be an integer of at least 1")
    return float(f1_hz) * np.arange(1, int(count) + 1, dtype=np.float64)


def orders_to_hz(orders: np.ndarray | float, shaft_hz: float) -> np.ndarray:
    """Frequencies in Hz of ``orders`` (multiples of running speed) at ``shaft_hz`` (Hz).

    Order 1 is 1X = shaft_hz; r/min = 60·shaft_hz. Returns float64 of the shape of ``orders``.

    Parameters
    ----------
    orders : float or ndarray
        Orders of running speed (1 = once per revolution).
    shaft_hz : float
        Running speed, Hz.

    Returns
    -------
    ndarray
        float64, Hz, the shape of ``orders``.
    """
    if not (np.isfinite(shaft_hz) and shaft_hz > 0):
        raise ValueError(f"shaft_hz={shaft_hz!r} must be a finite number > 0")
    return np.asarray(orders, dtype=np.float64) * float(shaft_hz)

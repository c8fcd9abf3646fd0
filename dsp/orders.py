"""Computed order tracking: the signal resampled at constant shaft angle from tacho pulses,
order spectra, and amplitude and phase of chosen orders against speed (run-up, coast-down).

Knows nothing about sockets, files, the service or its config: arrays in, arrays out."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.interpolate import CubicHermiteSpline, CubicSpline
from scipy.signal import firwin, resample_poly
from scipy.special import i0

from .analyzer import Analyzer
from .grid import FrameGrid
from .spec import AnalysisSpec
from .types import WindowName

__all__ = [
    "AngleStream", "OrderSpectrum", "OrderTrack", "angular_resample", "bin_by_speed",
    "order_spectrum", "order_track", "revolution_times",
]

# Interpolation from the time grid: the signal is first upsampled by this factor (FIR,
# Kaiser β 8), then read between samples by a cubic spline. At 0.35·fs (near the usable
# top of a spectrum, fs/2.56) the result is within 2e-4 (−74 dB) of the exact angle-domain
# signal, where a spline through the raw samples is off by 0.11 (tests/dsp/test_orders.py).
UPSAMPLE = 4
_HALF = 32  # half length of the FIR stages, in samples of the lower rate
_BETA = 8.0  # Kaiser β of the FIR stages: ≈ 80 dB stop band (Kaiser's formula, from memory)


def _lowpass(rate_ratio: int, cutoff: float) -> np.ndarray:
    """FIR low-pass for resample_poly by ``rate_ratio``; ``cutoff`` as a fraction of the
    lower rate's Nyquist frequency."""
    taps = firwin(2 * _HALF * rate_ratio + 1, cutoff / rate_ratio, window=("kaiser", _BETA))
    return np.asarray(taps, dtype=np.float64)


def revolution_times(
    edges_s: np.ndarray, samples_per_rev: float, pulses_per_rev: int = 1
) -> np.ndarray:
    """Times at which the shaft passes equal steps of angle, between the first and the last
    pulse.

    The revolutions turned are known at each pulse (i/k at pulse i); the time as a function
    of revolutions is the cubic spline (not-a-knot) through those points, read at
    θ_j = j/``samples_per_rev`` revolutions. A cubic follows a smoothly changing speed to
    third order between pulses, where the quadratic fit over three pulses of Fyfe & Munck
    (1997) does so to second.

    Parameters
    ----------
    edges_s : ndarray
        Pulse times, s, increasing, at least 4 (one run without missing pulses).
    samples_per_rev : float
        Angle steps per revolution (> 0).
    pulses_per_rev : int, optional
        Pulses per revolution k (default 1).

    Returns
    -------
    ndarray
        float64 times t(θ_j), s, j = 0 … ⌊(n_pulses − 1)·samples_per_rev/k⌋.
    """
    e = np.asarray(edges_s, dtype=np.float64)
    if e.ndim != 1 or e.size < 4 or not np.all(np.diff(e) > 0):
        raise ValueError("edges_s must hold at least 4 increasing pulse times (s)")
    if not samples_per_rev > 0:
        raise ValueError(f"samples_per_rev={samples_per_rev!r} must be > 0")
    revs = np.arange(e.size) / pulses_per_rev
    theta = np.arange(int(np.floor(revs[-1] * samples_per_rev + 1e-9)) + 1) / samples_per_rev
    return np.asarray(CubicSpline(revs, e)(theta))


def angular_resample(
    x: np.ndarray,
    fs: float,
    edges_s: np.ndarray,
    samples_per_rev: float,
    *,
    pulses_per_rev: int = 1,
    t0_s: float = 0.0,
) -> tuple[np.ndarray, np.ndarray]:
    """The signal at constant angle: ``samples_per_rev`` samples per revolution, from the
    first pulse to the last.

    Steps (after Fyfe & Munck 1997, with a finer interpolator): the signal is upsampled by
    4 in time (FIR), read by a cubic spline at the times of D·``samples_per_rev`` equal
    angle steps per revolution — D the smallest integer that puts the slowest revolution's
    angle rate at or above fs, so nothing in the signal aliases — and brought down to
    ``samples_per_rev`` by an FIR low-pass in the order domain (cut at 0.9 of the new
    Nyquist order: orders up to ``samples_per_rev``/2.56 pass within ±0.001 dB, and what
    would fold below them is ≥ 80 dB down).

    Keep the pulses a little inside the recording: the filters need about 32 output samples
    of signal beyond the first and last pulse, which the angle grid takes by extrapolating
    the speed; where the recording ends sooner, those output samples carry the filter's
    start or end.

    Parameters
    ----------
    x : ndarray
        Samples, shape (C, n) or (n,), any unit.
    fs : float
        Sample rate, Hz.
    edges_s : ndarray
        Pulse times, s on the same clock as ``t0_s``.
    samples_per_rev : float
        Output samples per revolution (e.g. 2.56 × the highest order wanted).
    pulses_per_rev : int, optional
        Pulses per revolution (default 1).
    t0_s : float, optional
        Time of x[..., 0], s (default 0).

    Returns
    -------
    y : ndarray
        float64 (C, M) or (M,): the signal at θ_j = j/samples_per_rev revolutions from the
        first pulse.
    t_s : ndarray
        float64 (M,): the time of each output sample, s.
    """
    x = np.asarray(x, dtype=np.float64)
    one = x.ndim == 1
    x2 = np.atleast_2d(x)
    e = np.asarray(edges_s, dtype=np.float64)
    t_rev = revolution_times(e, samples_per_rev, pulses_per_rev)  # checks the pulses
    d = max(1, int(np.ceil(fs * np.diff(e).max() * pulses_per_rev / samples_per_rev)))
    up = resample_poly(x2, UPSAMPLE, 1, axis=-1, window=_lowpass(UPSAMPLE, 0.9))
    t_up = t0_s + np.arange(up.shape[-1]) / (fs * UPSAMPLE)
    if t_rev[0] < t_up[0] or t_rev[-1] > t_up[-1]:
        raise ValueError("the pulses reach outside the samples given")
    # Angles run on past the first and last pulse by half the order-domain filter (the
    # spline of time against revolutions extrapolated, as far as the samples go), so the
    # filter starts and ends on signal rather than on zeros.
    revs = np.arange(e.size) / pulses_per_rev
    spline = CubicSpline(revs, e)
    pad = _HALF * d if d > 1 else 0
    j = np.arange(-pad, (t_rev.size - 1) * d + pad + 1)
    t_hi = spline(j / (samples_per_rev * d))
    inside = (t_hi >= t_up[0]) & (t_hi <= t_up[-1])
    lo = int(np.argmax(inside))
    lo += (-(j[lo])) % d  # start on an output sample: j a multiple of d
    hi = len(j) - int(np.argmax(inside[::-1]))
    j, t_hi = j[lo:hi], t_hi[lo:hi]
    y_hi = CubicSpline(t_up, up, axis=-1)(t_hi)
    if d > 1:
        y_all = resample_poly(y_hi, 1, d, axis=-1, window=_lowpass(d, 0.9))
        first = -j[0] // d  # output sample of the first pulse
        y = y_all[:, first: first + t_rev.size]
    else:
        y = y_hi
    return (y[0] if one else y), t_rev


@dataclass(frozen=True)
class OrderSpectrum:
    """An averaged order spectrum.

    Attributes
    ----------
    orders : ndarray
        float64 [Q], o[q] = q·Omax/lines (orders of running speed).
    amplitude_rms : ndarray
        float64 [C, Q], RMS per line in the signal's unit (Hann-windowed power spectrum of
        the angle-domain frames, linear average, Heinzel 2002 §9 scaling).
    frames : int
        Frames averaged.
    rpm_mean : float
        Mean speed over the span analysed, r/min.
    """

    orders: np.ndarray
    amplitude_rms: np.ndarray
    frames: int
    rpm_mean: float


def order_spectrum(
    x: np.ndarray,
    fs: float,
    edges_s: np.ndarray,
    omax: float,
    lines: int,
    *,
    pulses_per_rev: int = 1,
    window: WindowName = "hann",
    overlap: float = 0.5,
    t0_s: float = 0.0,
) -> OrderSpectrum:
    """Order spectrum by computed order tracking: :func:`angular_resample` at 2.56·Omax
    samples per revolution, then the same framing, window and averaging as a spectrum in
    Hz (:class:`dsp.analyzer.Analyzer` with fs read as samples per revolution), so a
    frame spans lines/Omax revolutions and the order resolution is Omax/lines.

    A component at a fixed order o reads at line o·lines/Omax whatever the speed did,
    with its RMS.

    Parameters
    ----------
    x : ndarray
        Samples, shape (C, n) or (n,), any unit.
    fs : float
        Sample rate, Hz.
    edges_s : ndarray
        Pulse times, s.
    omax : float
        Highest order shown (like Fmax).
    lines : int
        Lines from 0 to Omax (2.56 × lines must be an integer, e.g. 400, 800, 1600).
    pulses_per_rev : int, optional
        Pulses per revolution (default 1).
    window : str, optional
        DFT window (default hann).
    overlap : float, optional
        Frame overlap fraction (default 0.5).
    t0_s : float, optional
        Time of the first sample, s.

    Returns
    -------
    OrderSpectrum
        Orders, RMS per line, frames averaged, mean speed.
    """
    grid = FrameGrid.from_fmax(omax, lines, overlap)
    y, t = angular_resample(x, fs, edges_s, grid.fs, pulses_per_rev=pulses_per_rev, t0_s=t0_s)
    y2 = np.atleast_2d(y)
    frames = 0 if y2.shape[1] < grid.n else 1 + (y2.shape[1] - grid.n) // grid.hop
    if frames < 1:
        raise ValueError(f"{y2.shape[1] / grid.fs:.1f} revolutions between the pulses; "
                         f"a frame needs {grid.n / grid.fs:g}")
    # orders are "Hz" here; the input unit is only a label (no integration: unit = input)
    spec = AnalysisSpec(grid, window=window, averaging="linear", averages=frames,
                        linear_end="hold", input_unit="g", unit="g", lowcut_hz=0.0, peaks=0)
    an = Analyzer(spec, y2.shape[0])
    an.push(y2.astype(np.float32))
    amp = an.spectrum("g", "rms")
    revs = (len(edges_s) - 1) / pulses_per_rev
    rpm = 60.0 * revs / (edges_s[-1] - edges_s[0])
    return OrderSpectrum(an.f_hz.copy(), np.asarray(amp, dtype=np.float64), frames, float(rpm))


@dataclass(frozen=True)
class OrderTrack:
    """Amplitude and phase of chosen orders, step by step of whole revolutions (run-up or
    coast-down data).

    Attributes
    ----------
    orders : ndarray
        float64 [O], the orders tracked.
    t_s : ndarray
        float64 [R], the middle of each step, s.
    rpm : ndarray
        float64 [R], the mean speed of each step, r/min.
    amplitude_rms : ndarray
        float64 [R, O] (or [C, R, O] for several channels), RMS in the signal's unit.
    phase_deg : ndarray
        Same shape: phase of the order's cosine at the pulse (θ = 0), degrees in (−180, 180].
    """

    orders: np.ndarray
    t_s: np.ndarray
    rpm: np.ndarray
    amplitude_rms: np.ndarray
    phase_deg: np.ndarray


def order_track(
    x: np.ndarray,
    fs: float,
    edges_s: np.ndarray,
    orders: Sequence[float],
    *,
    pulses_per_rev: int = 1,
    revs_per_step: int = 4,
    samples_per_rev: int | None = None,
    t0_s: float = 0.0,
) -> OrderTrack:
    """Amplitude and phase of ``orders`` over successive steps of ``revs_per_step`` whole
    revolutions, from the angle-domain signal.

    Over R whole revolutions (M = R·S samples, S per revolution) the single DFT line
    a = (2/M)·Σ y[j]·exp(−2πi·o·j/S) is the peak amplitude and phase of an order o with
    o·R an integer, with no leakage from any other such order (rectangular window over a
    whole number of periods; common practice in synchronous analysis).

    Parameters
    ----------
    x : ndarray
        Samples, shape (C, n) or (n,), any unit.
    fs : float
        Sample rate, Hz.
    edges_s : ndarray
        Pulse times, s.
    orders : sequence of float
        Orders to track (> 0, below S/2.56).
    pulses_per_rev : int, optional
        Pulses per revolution (default 1).
    revs_per_step : int, optional
        Revolutions per step R (default 4); the order resolution is 1/R.
    samples_per_rev : int, optional
        Angle samples per revolution S (default: the smallest power of two ≥ 4·max order, at
        least 16).
    t0_s : float, optional
        Time of the first sample, s.

    Returns
    -------
    OrderTrack
        Per step: time, speed, RMS amplitude and phase of each order.
    """
    o = np.asarray(orders, dtype=np.float64)
    if o.ndim != 1 or o.size == 0 or not np.all(o > 0):
        raise ValueError("orders must be one or more positive orders")
    if int(revs_per_step) != revs_per_step or revs_per_step < 1:
        raise ValueError(f"revs_per_step={revs_per_step!r} must be an integer ≥ 1")
    spr = samples_per_rev or max(16, 1 << int(np.ceil(np.log2(4 * o.max()))))
    if o.max() > spr / 2.56:
        raise ValueError(f"order {o.max():g} is above {spr}/2.56 samples per revolution")
    y, t = angular_resample(x, fs, edges_s, spr, pulses_per_rev=pulses_per_rev, t0_s=t0_s)
    y2 = np.atleast_2d(y)
    m = revs_per_step * spr
    steps = y2.shape[1] // m
    if steps < 1:
        raise ValueError(f"fewer than revs_per_step={revs_per_step} revolutions between pulses")
    blocks = y2[:, : steps * m].reshape(y2.shape[0], steps, m)
    j = np.arange(m)
    basis = np.exp(-2j * np.pi * np.outer(j, o) / spr)  # [M, O]
    a = (2.0 / m) * (blocks @ basis)  # [C, R, O]
    tb = t[: steps * m].reshape(steps, m)
    rpm = 60.0 * revs_per_step / (tb[:, -1] + (tb[:, -1] - tb[:, -2]) - tb[:, 0])
    amp, ph = np.abs(a) / np.sqrt(2.0), np.degrees(np.angle(a))
    if np.asarray(x).ndim == 1:
        amp, ph = amp[0], ph[0]
    return OrderTrack(o, tb.mean(axis=1), rpm, amp, ph)


def bin_by_speed(track: OrderTrack, rpm_step: float) -> OrderTrack:
    """Steps of an :class:`OrderTrack` grouped into speed bins of ``rpm_step`` r/min: each
    bin's amplitude and phase are of the vector (complex) mean of its steps, its speed the
    bin's centre (k + ½)·rpm_step, its time the mean of its steps'. Empty bins are left out.

    Parameters
    ----------
    track : OrderTrack
        Per-step data.
    rpm_step : float
        Bin width, r/min (> 0).

    Returns
    -------
    OrderTrack
        One row per occupied bin, by increasing speed.
    """
    if not rpm_step > 0:
        raise ValueError(f"rpm_step={rpm_step!r} must be > 0 r/min")
    b = np.floor(track.rpm / rpm_step).astype(np.int64)
    keys, inv = np.unique(b, return_inverse=True)
    z = track.amplitude_rms * np.exp(1j * np.radians(track.phase_deg))
    axis = z.ndim - 2  # the step axis
    zs = np.moveaxis(z, axis, 0)
    acc = np.zeros((keys.size, *zs.shape[1:]), dtype=complex)
    np.add.at(acc, inv, zs)
    count = np.bincount(inv, minlength=keys.size).astype(np.float64)
    mean = np.moveaxis(acc / count.reshape(-1, *([1] * (zs.ndim - 1))), 0, axis)
    t = np.bincount(inv, weights=track.t_s) / count
    return OrderTrack(track.orders, t, (keys + 0.5) * rpm_step, np.abs(mean),
                      np.degrees(np.angle(mean)))


# The streaming resampler's kernel: a sinc cut at the output's Nyquist order (S/2), under a
# Kaiser window of ±STREAM_HALF output samples. Kaiser's design formula (Kaiser 1974, as in
# Oppenheim & Schafer §7.6) gives a transition of (A − 8)/(2.285·2π·2·16) ≈ 0.157 of the
# output rate for A = 80 dB (β 8): from 0.42·S to 0.58·S orders, so lines up to Omax =
# S/2.56 = 0.39·S pass flat and what folds below 0.42·S is ≥ 80 dB down.
STREAM_HALF = 16
STREAM_BETA = 8.0


class AngleStream:
    """Computed order tracking, streaming: samples at a constant sample rate in, samples at
    constant shaft angle out, for C channels that share one tacho.

    Each output sample j (θ_j = j/S revolutions after the run's first pulse, S =
    ``samples_per_rev``) is the order-domain low-pass of the signal read at that angle:

        y_j = Σ_k x[k] · h(u_k − j) · u′_k / fs,   u_k = S·θ(t_k),

    a sum over the input samples k (times t_k) with h(v) = sinc(v)·w(v/L) (w a Kaiser window
    of half-width L = 16 output samples), i.e. the convolution in angle ∫ x(θ)·h(S·θ − j)·S dθ
    evaluated with the time samples (dθ = θ′(t)·dt). θ(t) is the cubic Hermite through the
    pulses with slopes from 4th-order differences over two pulses either side: local, so
    any split of the stream gives the same outputs (and a read-ahead of three pulses).
    Unlike :func:`angular_resample` the filter's cut follows the speed sample by sample, so
    no intermediate rate is needed; the input must hold nothing above fs/2 − S·(speed in
    rev/s)/2 (a decimation chain cut at ≥ 1.28·Omax × the highest speed
    ensures it, ``service.profiles``).

    The outputs are delayed by about three revolutions (the pulses read ahead) plus L/S
    revolutions. Output sample indices count on within a run; a new run of pulses (the
    tacho lost lock or a gap) starts a new count at the index after ``index_gap`` more, so
    whatever frames them sees a gap.

    Parameters
    ----------
    channels : int
        Channels C.
    fs : float
        Input sample rate, Hz.
    samples_per_rev : float
        Output samples per revolution S (2.56·Omax for a spectrum to order Omax).
    pulses_per_rev : int, optional
        Tacho pulses per revolution (default 1).
    max_span_s : float, optional
        Samples kept while too few pulses are known to resample them, s (default 10; the
        oldest go first).
    """

    index_gap = 1 << 20
    keep_times = 1 << 15  # output times kept for time_at

    def __init__(self, channels: int, fs: float, samples_per_rev: float,
                 pulses_per_rev: int = 1, *, max_span_s: float = 10.0) -> None:
        if not (fs > 0 and samples_per_rev > 0 and pulses_per_rev >= 1 and channels >= 1):
            raise ValueError("channels, fs, samples_per_rev and pulses_per_rev must be > 0")
        self.channels, self.fs, self.spr = int(channels), float(fs), float(samples_per_rev)
        self.ppr = int(pulses_per_rev)
        self.max_span = max(1, int(max_span_s * self.fs))
        self._times = np.zeros(0)  # times of the latest outputs, s
        self._times_first = 0  # output index of _times[0]
        self._base = 0  # output index of j = 0 in the current run
        self._next_out = 0  # the next output index
        self._x = np.zeros((self.channels, 0))
        self._t0: float | None = None  # time of _x[:, 0], s
        self._new_run()

    def _new_run(self) -> None:
        """Forget the pulses; the next output starts a new count, ``index_gap`` on."""
        self._tp = np.zeros(0)  # kept pulses of the run, s
        self._np = np.zeros(0)  # their pulse numbers within the run
        self._j: int | None = None  # next angle sample of the run to make
        if self._next_out > self._base:  # this run made outputs: leave a gap after them
            self._base = self._next_out + self.index_gap
            self._next_out = self._base

    def reset(self) -> None:
        """Forget the samples and pulses (a gap): the next output starts a new run."""
        self._x = np.zeros((self.channels, 0))
        self._t0 = None
        self._new_run()

    def _hold(self) -> None:
        """Waiting for pulses: keep at most ``max_span_s`` of the newest samples."""
        cut = self._x.shape[1] - self.max_span
        if cut > 0 and self._t0 is not None:
            self._x = self._x[:, cut:]
            self._t0 += cut / self.fs

    @property
    def next_index(self) -> int:
        """Output index of the next angle sample."""
        return self._next_out

    def time_at(self, index: float | np.ndarray) -> np.ndarray:
        """Times (s) of recent output indices (the latest few thousand), by linear
        interpolation between them; NaN outside."""
        k = np.asarray(index, dtype=np.float64) - self._times_first
        if self._times.size < 2:
            return np.full(np.shape(k), np.nan)
        out = np.interp(k, np.arange(self._times.size), self._times)
        return np.where((k >= 0) & (k <= self._times.size - 1), out, np.nan)

    def _take_pulses(self, pulses_s: np.ndarray) -> bool:
        """Add the run's new pulses; False (after a reset) when they are of another run."""
        p = np.asarray(pulses_s, dtype=np.float64)
        if self._tp.size:
            last = self._tp[-1]
            at = np.searchsorted(p, last)
            if at >= p.size or p[at] != last:  # our newest pulse is not in this run
                self._new_run()
                return self._take_pulses(p)
            new = p[at + 1:]
            n0 = self._np[-1] + 1
        else:
            new, n0 = p, 0.0
        if new.size:
            self._tp = np.concatenate((self._tp, new))
            self._np = np.concatenate((self._np, n0 + np.arange(new.size)))
        return True

    def push(self, x: np.ndarray, t0_s: float, pulses_s: np.ndarray
             ) -> tuple[np.ndarray, int]:
        """Feed samples and the pulses known so far; return the angle samples now complete.

        Parameters
        ----------
        x : ndarray
            Samples [C, n] at ``fs``, any unit.
        t0_s : float
            Time of x[:, 0], s, on the pulses' clock. Another time than the one after the
            previous push's last sample is a gap: everything restarts (:meth:`reset`).
        pulses_s : ndarray
            Pulse times of the tacho's newest run (s, increasing; the kept ones, which must
            include the newest pulse already given, else it is a new run).

        Returns
        -------
        y : ndarray
            float32 [C, M]: the signal at M consecutive angle steps of 1/S revolution.
        first : int
            Output index of y[:, 0] (:attr:`next_index` before the call, unless a new run
            began).
        """
        x = np.asarray(x, dtype=np.float64)
        if x.ndim != 2 or x.shape[0] != self.channels:
            raise ValueError(f"x has shape {x.shape}; expected ({self.channels}, n)")
        if self._t0 is not None:
            expect = self._t0 + self._x.shape[1] / self.fs
            if abs(t0_s - expect) > 0.5 / self.fs:
                self.reset()
        if self._t0 is None:
            self._t0 = float(t0_s)
        self._x = np.concatenate((self._x, x), axis=1)
        empty = np.zeros((self.channels, 0), dtype=np.float32)
        self._take_pulses(pulses_s)
        tp, npl = self._tp, self._np
        if tp.size < 6:
            self._hold()
            return empty, self._next_out
        # θ(t): cubic Hermite through the pulses (θ = pulse number / k), its slope at each
        # pulse from the 4th-order difference over the two pulses either side (one-sided at
        # the run's start), so each stretch depends on the nearby pulses only and any split
        # of the stream gives the same angles. It holds from the run's first pulse (or the
        # third kept one) to the third newest (whose slope needs the two after it).
        m = tp.size
        dt = np.full(m, np.nan)
        dt[2:m - 2] = (-tp[4:] + 8 * tp[3:m - 1] - 8 * tp[1:m - 3] + tp[:m - 4]) / 12.0
        start = npl[0] == 0
        if start:
            dt[0] = (-25 * tp[0] + 48 * tp[1] - 36 * tp[2] + 16 * tp[3] - 3 * tp[4]) / 12.0
            dt[1] = (-3 * tp[0] - 10 * tp[1] + 18 * tp[2] - 6 * tp[3] + tp[4]) / 12.0
        lo_knot = 0 if start else 2
        ta, tb = tp[lo_knot], min(tp[m - 3], self._t0 + (self._x.shape[1] - 1) / self.fs)
        k_a = max(0, int(np.ceil((ta - self._t0) * self.fs)))
        k_b = int(np.floor((tb - self._t0) * self.fs))
        if k_b - k_a < 2:
            self._hold()
            return empty, self._next_out
        t = self._t0 + np.arange(k_a, k_b + 1) / self.fs
        knots = slice(lo_knot, m - 2)
        theta = CubicHermiteSpline(tp[knots], npl[knots] / self.ppr,
                                   1.0 / (self.ppr * dt[knots]))
        u = self.spr * theta(t)
        du = self.spr * theta(t, 1) / self.fs
        half = STREAM_HALF
        if self._j is None:
            self._j = int(np.ceil(u[0])) + half
        j = np.arange(self._j, int(np.floor(u[-1])) - half + 1)
        y = empty
        if j.size:
            lo = np.searchsorted(u, j - half, side="right")
            hi = np.searchsorted(u, j + half, side="left")
            width = int((hi - lo).max())
            idx = lo[:, None] + np.arange(width)
            inside = idx < hi[:, None]
            idx = np.minimum(idx, u.size - 1)
            v = u[idx] - j[:, None]
            w = np.sinc(v) * i0(STREAM_BETA * np.sqrt(np.clip(1 - (v / half) ** 2, 0, 1)))
            w *= du[idx] * inside / i0(STREAM_BETA)
            xs = self._x[:, k_a:k_b + 1]
            # one product over every channel: [C, M, K] samples against [M, K] weights
            y = np.einsum("mk,cmk->cm", w, xs[:, idx]).astype(np.float32)
            t_out = np.interp(j, u, t)
            first = self._base + int(j[0])
            if self._times.size and first == self._times_first + self._times.size:
                self._times = np.concatenate((self._times, t_out))[-self.keep_times:]
                self._times_first = first + j.size - self._times.size
            else:
                self._times = t_out[-self.keep_times:]
                self._times_first = first + j.size - self._times.size
            self._j = int(j[-1]) + 1
            self._next_out = first + j.size
        # drop the samples and pulses no later output needs
        keep_from = k_a + int(np.searchsorted(u, self._j - half - 1))
        keep_from = min(keep_from, self._x.shape[1])
        if keep_from > 0:
            self._x = self._x[:, keep_from:]
            self._t0 += keep_from / self.fs
        p_keep = max(0, int(np.searchsorted(tp, self._t0)) - 4)
        if p_keep:
            self._tp, self._np = tp[p_keep:], npl[p_keep:]
        return y, (self._next_out - y.shape[1])

"""One analysis of a multi-channel stream: filter bank → averaging → units → bands, tones, peaks.

Knows nothing about sockets, files, asyncio or config files; the service drives it with arrays.

The averaged quantity is the *acceleration power spectrum* (RMS² per line in the input
unit², Heinzel 2002 §9). Every other view — velocity or displacement, RMS/peak/pk-pk,
PSD, band RMS — is a per-line factor on that average, so changing the displayed unit
never needs new frames and all views agree with each other.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .averaging import Averager
from .filterbank import FilterBank
from .scaling import (
    amplitude_from_power,
    power_spectrum,
    psd_from_power,
    quantity_of,
    unit_power_weights,
)
from .spec import AnalysisSpec, low_limit_hz, resolve_unit
from .tones import Peaks, find_peaks, tone_power
from .types import (
    OutputUnit,
    check_index_span,
)
from .windows import DEFAULT_KAISER_BETA

__all__ = ["Analyzer", "spectrum_peaks"]


@dataclass(frozen=True)
class _EdgePlan:
    """Precomputed index work for band sums (fixed until the band edges change).

    Band edges sit at positions ``pos`` [C, 2B] in cumulative line widths from 0 Hz. The
    spectrum, cut to the lines ``lo…hi−1`` that hold an edge or lie between two (a band's
    sum is a difference of two cumulative sums, so lines below the lowest edge cancel), is
    cut at the sorted integer parts by one ``np.add.reduceat``; a cumulative sum of the
    segments gives Σ_{lo≤q<i} P[q] at each edge, plus the fractional line. All indices are
    flat, so a read-out is a handful of whole-array operations."""

    lo: int  # first line kept
    hi: int  # one past the last line kept
    starts: np.ndarray  # flat reduceat indices, [C·(2B+1)]
    empty: np.ndarray  # flat indices of segments that are empty runs
    at_cum: np.ndarray  # [C, 2B] flat index into the [C, 2B] cumulative sums, per edge
    flat_i: np.ndarray  # [C, 2B] flat index of each edge's line
    frac: np.ndarray  # [C, 2B] fraction of that line below the edge
    unresolved: np.ndarray  # flat indices into [C, B] of bands without edges (NaN)

    @classmethod
    def build(cls, pos: np.ndarray, q: int, unresolved: np.ndarray) -> _EdgePlan:
        c_count, e_count = pos.shape
        i = np.minimum(pos.astype(np.intp), q - 1)
        lo, hi = (int(i.min()), int(i.max()) + 1) if i.size else (0, 1)
        i = i - lo  # lines from lo on
        width = hi - lo
        order = np.argsort(i, axis=1, kind="stable")
        srt = np.take_along_axis(i, order, 1)
        starts = np.concatenate((np.zeros((c_count, 1), np.intp), srt), axis=1)
        empty = np.zeros(starts.shape, dtype=bool)
        empty[:, :-1] = np.diff(starts, axis=1) == 0
        offset = width * np.arange(c_count)[:, None]
        unsort = np.argsort(order, axis=1)
        return cls(
            lo=lo,
            hi=hi,
            starts=(starts + offset).ravel(),
            empty=np.flatnonzero(empty),
            at_cum=unsort + e_count * np.arange(c_count)[:, None],
            flat_i=i + offset,
            frac=pos - lo - i,
            unresolved=np.flatnonzero(unresolved),
        )


@dataclass
class _Views:
    unit: OutputUnit
    weights: np.ndarray  # [Q] float32 factor from averaged |X|² to unit² (scaling × units)
    tone_weights: np.ndarray  # [C, T]


@dataclass
class Analyzer:
    """Streaming analysis of C channels that share one sample clock.

    ``push`` takes float32 ``[C, n]`` blocks in ``spec.input_unit``; the read-outs
    (:meth:`spectrum`, :meth:`bands`, :meth:`tones`, :meth:`peaks`, :meth:`psd`) give the
    current average in any unit and amplitude type. ``speed_hz`` (per channel, Hz) resolves
    order bands and order tones; :meth:`set_speed` changes it.

    Parameters
    ----------
    spec : AnalysisSpec
        The analysis.
    channels : int
        Number of channels C.
    speed_hz : ndarray, optional
        Running speed per channel, Hz (NaN or None where unknown).
    """

    spec: AnalysisSpec
    channels: int
    speed_hz: np.ndarray | None = None
    _views: dict[str, _Views] = field(default_factory=dict, init=False, repr=False)

    def __post_init__(self) -> None:
        spec = self.spec
        self.grid = spec.grid
        # Each frame's offset (window-weighted mean) reaches no line but DC, under any window:
        # Kaiser's sidelobes would otherwise carry a sensor's DC past the low-frequency limit.
        self.bank = FilterBank(
            self.grid, self.channels, spec.window, beta=spec.beta, remove_dc=True
        )
        self.info = self.bank.info
        self.q = self.grid.analysis_bins  # lines kept: DC … Fmax
        self.f_hz = self.grid.frequencies()[: self.q]
        # The low-frequency limit (docs/low-frequency.md): lines below it are not measured.
        self.lowcut_hz = low_limit_hz(spec)
        # Power spectrum scaling 2/S1² (Heinzel 2002 §9), DC and Nyquist lines not doubled;
        # applied at read-out to the averaged |X|² (see push).
        self._line_scale = power_spectrum(
            np.ones(self.grid.bins, np.complex64), self.info.s1, self.grid.n
        ).astype(np.float64)[: self.q]
        # Exponential averages fold each push's frames into one weighted sum inside the
        # filter bank (FilterBank.push_power); linear ones average the interleaved squares
        # (re², im²) of every frame and add the pairs at read-out.
        self._folded = spec.averaging == "exponential"
        self._tone_scale = 2.0 / self.info.s1**2  # tone power, as dsp.tones.tone_power
        self._pairs = spec.averaging == "linear"
        self._power_cache: dict[tuple[str, int], np.ndarray] = {}  # read-outs share one power
        self.avg = Averager(spec.averaging, spec.averages, linear_end=spec.linear_end)
        self.tone_avg = Averager(spec.averaging, spec.averages, linear_end=spec.linear_end)
        self.last_start: int | None = None  # stream index of the newest frame's first sample
        self.set_speed(self.speed_hz)

    # -- set-up ------------------------------------------------------------------------
    def set_speed(self, speed_hz: np.ndarray | float | None) -> None:
        """Running speed per channel in Hz (None/NaN where unknown); re-resolves orders.

        Parameters
        ----------
        speed_hz : float or ndarray or None
            Running speed, Hz (r/min ÷ 60), one value or one per channel; None/NaN: unknown.
        """
        if speed_hz is None:
            s = np.full(self.channels, np.nan)
        else:
            s = np.broadcast_to(np.asarray(speed_hz, dtype=np.float64), (self.channels,)).copy()
        self.speed_hz = s
        self._edges = np.zeros((self.channels, len(self.spec.bands), 2))
        f_low = self.lowcut_hz
        masked = np.zeros((self.channels, len(self.spec.bands)), dtype=bool)
        for c in range(self.channels):
            sc = None if not np.isfinite(s[c]) else float(s[c])
            for b, band in enumerate(self.spec.bands):
                if band.basis == "order" and sc is None:
                    self._edges[c, b] = (np.nan, np.nan)
                    continue
                lo, hi = band.edges_hz(sc)
                # A band is measured above the low-frequency limit only; one wholly below it
                # keeps its edges and reads NaN (band_masked says why).
                masked[c, b] = hi <= f_low
                self._edges[c, b] = (lo, hi) if masked[c, b] else (max(lo, f_low), hi)
        self._band_masked = masked
        tone_hz = np.zeros((self.channels, len(self.spec.tones)))
        for c in range(self.channels):
            sc = None if not np.isfinite(s[c]) else float(s[c])
            for t, tone in enumerate(self.spec.tones):
                f = np.nan if (tone.order is not None and sc is None) else tone.frequency_hz(sc)
                tone_hz[c, t] = f if (np.isfinite(f) and f <= self.grid.fs / 2) else np.nan
        self._edge_plan = _EdgePlan.build(
            self._line_position(
                np.where(masked[..., None], 0.0, np.nan_to_num(self._edges, nan=0.0))
            ).reshape(self.channels, -1),
            self.q,
            np.isnan(self._edges[..., 0]) | masked,
        )
        self._tone_valid = np.isfinite(tone_hz)
        self._tone_masked = self._tone_valid & (np.nan_to_num(tone_hz, nan=0.0) < f_low)
        new_tones = np.where(self._tone_valid, tone_hz, 0.0)
        if not np.array_equal(new_tones, self.bank.tone_hz):
            self.bank.set_tones(new_tones)
            self.tone_avg.reset()
        self._views.clear()
        self._power_cache.clear()
        self._view(None)  # build the default view now, not on the first read-out

    def _line_position(self, f_hz: np.ndarray) -> np.ndarray:
        """Cumulative line widths from 0 Hz up to ``f_hz``: the DC line spans [0, Δf/2],
        line q ≥ 1 spans [(q − ½)Δf, (q + ½)Δf]; clipped to [0, Q]."""
        df = self.grid.df_hz
        pos = np.where(f_hz <= df / 2, f_hz / (df / 2), 1.0 + (f_hz - df / 2) / df)
        return np.clip(pos, 0.0, float(self.q))

    @property
    def tone_hz(self) -> np.ndarray:
        """Tracked tone frequencies in Hz, [C, T]; NaN where unresolved (no speed)."""
        return np.where(self._tone_valid, self.bank.tone_hz, np.nan)

    @property
    def band_edges_hz(self) -> np.ndarray:
        """Band edges in Hz, [C, B, 2], as measured: a lower edge below the low-frequency
        limit reads as the limit; NaN for order bands without a running speed."""
        return self._edges

    @property
    def band_masked(self) -> np.ndarray:
        """[C, B] bool: the band lies wholly below the low-frequency limit (reads NaN)."""
        return self._band_masked

    @property
    def tone_masked(self) -> np.ndarray:
        """[C, T] bool: the tone lies below the low-frequency limit (reads NaN)."""
        return self._tone_masked

    def _view(self, unit: str | None) -> _Views:
        u = resolve_unit(unit or self.spec.unit)
        v = self._views.get(u)
        if v is None:
            wts = unit_power_weights(self.f_hz, self.spec.input_unit, u, lowcut_hz=self.lowcut_hz)
            tw = unit_power_weights(
                np.nan_to_num(self.tone_hz, nan=0.0),
                self.spec.input_unit,
                u,
                lowcut_hz=self.lowcut_hz,
            )
            v = _Views(u, (wts * self._line_scale).astype(np.float32), tw)
            self._views[u] = v
        return v

    # -- stream ------------------------------------------------------------------------
    def reset(self, next_index: int | None = None) -> None:
        """A gap: drop the partial frame and start new averages.

        Parameters
        ----------
        next_index : int, optional
            Stream index the next block starts at.
        """
        self.bank.reset(next_index)
        self._power_cache.clear()
        self.avg.reset()
        self.tone_avg.reset()
        self.last_start = None

    def restart_average(self) -> None:
        """Start new averages with the next frame, keeping the samples held towards it
        (e.g. the speed left the band an order average may span)."""
        self._power_cache.clear()
        self.avg.reset()
        self.tone_avg.reset()

    def push(self, block: np.ndarray, first_index: int | None = None) -> int:
        """Feed samples ``[C, n]``; returns the number of new frames folded into the averages.

        A ``first_index`` other than the next expected one is a gap: see :meth:`reset`.
        Every sample's index must fit int64 (``dsp.types.check_index_span``): a block that
        would run past it raises ValueError and changes nothing.

        Parameters
        ----------
        block : ndarray
            float32 samples [C, n] in ``spec.input_unit`` (any n ≥ 0).
        first_index : int, optional
            Stream index of the block's first sample (default: the next expected one).

        Returns
        -------
        int
            Frames completed by this block and folded into the averages.
        """
        n = int(np.shape(block)[-1])
        if first_index is not None:  # refused before the reset below changes anything
            first_index = check_index_span(first_index, n)
        else:
            check_index_span(self.bank.next_index, n)
        if first_index is not None and first_index != self.bank.next_index:
            self.reset(first_index)
        if self._folded:
            # Σ_p a_p·|X_p|² of the new frames with the average's own weights: one array
            # per push instead of [C, P, N/2+1] spectra (the scaling 2/S1² waits for read-out).
            n_new = self.bank.frames_ready(np.shape(block)[-1])
            weights, _ = self.avg.frame_weights(n_new)
            folded = self.bank.push_power(block, weights, lines=self.q)
            count, start, tones = folded.count, folded.start, folded.tones
            self.avg.update_weighted(folded.power, count)
        else:
            batch = self.bank.push(block)
            count, start, tones = batch.count, batch.start, batch.tones
            if count:
                # |X|² in place on the interleaved (re, im) floats; for a linear average the
                # pair sum and the scaling 2/S1² wait until read-out (once, not per frame).
                v = batch.spectra[..., : self.q].view(np.float32)
                np.square(v, out=v)
                self.avg.update(v if self._pairs else v[..., 0::2] + v[..., 1::2])
        if count:
            if tones.shape[2] and self._folded:
                # Σ_p a_p·tone_power(X_p), as one product over frames (float64).
                tw, _ = self.tone_avg.frame_weights(count)
                sq = np.square(tones.view(np.float32), dtype=np.float64)  # [C, P, (re², im²)]
                tot = np.matmul(tw * self._tone_scale, sq)
                self.tone_avg.update_weighted(tot[:, 0::2] + tot[:, 1::2], count)
            elif tones.shape[2]:
                self.tone_avg.update(tone_power(tones, self.info.s1))
            self.last_start = int(start[-1])
        return count

    # -- read-outs ---------------------------------------------------------------------
    @property
    def count(self) -> int:
        """Frames in the current average."""
        return self.avg.count

    @property
    def ready(self) -> bool:
        """True once at least one frame is in the average (read-outs are then defined)."""
        return self.avg.value is not None

    @property
    def last_end_index(self) -> int | None:
        """Stream index just after the newest frame's last sample (its time is this/fs)."""
        return None if self.last_start is None else self.last_start + self.grid.n

    def power(self, unit: str | None = None) -> np.ndarray:
        """Averaged power spectrum in unit² (RMS², [C, Q]; float32 unless the average is linear,
        then float64); zeros before any frame. Read-only: read-outs of one push share it.

        Parameters
        ----------
        unit : str, optional
            Output unit (g, m/s2, mm/s, in/s, um, mil) or quantity; default ``spec.unit``.

        Returns
        -------
        ndarray
            [C, Q] power spectrum, ``unit``² RMS² per line, lines 0…Fmax.
        """
        v = self._view(unit)
        key = (v.unit, self.bank.frames_out)
        cached = self._power_cache.get(key)
        if cached is not None:
            return cached
        p = self.avg.value
        if p is None:
            return np.zeros((self.channels, self.q))
        if self._pairs:
            p = p[:, 0::2] + p[:, 1::2]
        out = p * v.weights
        out.setflags(write=False)
        if len(self._power_cache) > 8:
            self._power_cache.clear()
        self._power_cache[key] = out
        result: np.ndarray = out
        return result

    def spectrum(self, unit: str | None = None, amplitude: str | None = None) -> np.ndarray:
        """Averaged amplitude spectrum, float32 [C, Q], in ``unit`` as ``amplitude`` type.

        Parameters
        ----------
        unit : str, optional
            Output unit (g, m/s2, mm/s, in/s, um, mil) or quantity; default ``spec.unit``.
        amplitude : {'rms', 'peak', 'peak-to-peak'}, optional
            Amplitude type; default ``spec.amplitude``.

        Returns
        -------
        ndarray
            float32 [C, Q]: amplitude per line in ``unit``, lines 0…Fmax at
            ``grid.df_hz`` spacing.
        """
        p32 = self.power(unit).astype(np.float32, copy=False)  # sqrt makes the new array
        return amplitude_from_power(p32, amplitude or self.spec.amplitude)  # type: ignore[arg-type]

    def psd(self, unit: str | None = None) -> np.ndarray:
        """Averaged PSD in unit²/Hz (float64 [C, Q]): power / ENBW_Hz (Heinzel 2002 §9).

        Parameters
        ----------
        unit : str, optional
            Output unit (g, m/s2, mm/s, in/s, um, mil) or quantity; default ``spec.unit``.

        Returns
        -------
        ndarray
            float64 [C, Q], ``unit``²/Hz.
        """
        return psd_from_power(self.power(unit), self.info.enbw_hz(self.grid.fs))

    def bands(self, unit: str | None = None) -> np.ndarray:
        """Band RMS values in ``unit`` (float64 [C, B]): Σ power·weights / ENBW_bins, square-rooted,
        over the band's measured edges (:attr:`band_edges_hz`).

        NaN for an order band on a channel without a running speed, and for a band wholly
        below the low-frequency limit.

        Parameters
        ----------
        unit : str, optional
            Output unit (g, m/s2, mm/s, in/s, um, mil) or quantity; default ``spec.unit``.

        Returns
        -------
        ndarray
            float64 [C, B], band RMS in ``unit``, in the order of ``spec.bands``.
        """
        if self.avg.value is None or not self.spec.bands:
            return np.full((self.channels, len(self.spec.bands)), np.nan)
        # Σ_q weight_bq·P_q as a difference of the cumulative sum taken at the band edges, a
        # fractional line counted pro rata — equal to dsp.bands.band_weights, at O(Q) cost,
        # over the lines between the lowest and the highest edge only.
        e = self._edge_plan
        p = self.power(unit)[:, e.lo : e.hi].reshape(-1)
        seg = np.add.reduceat(p, e.starts, dtype=np.float64)
        if e.empty.size:
            seg[e.empty] = 0.0  # reduceat gives p[i] for an empty run
        cum = np.cumsum(seg.reshape(self.channels, -1)[:, :-1], axis=1)  # Σ_{lo≤q<i} p[q]
        at = cum.take(e.at_cum)  # at each edge, in band order (lo, hi, lo, hi, …)
        at += e.frac * p.take(e.flat_i)
        ms = at[:, 1::2] - at[:, 0::2]
        np.maximum(ms, 0.0, out=ms)
        ms /= self.info.enbw_bins
        out = np.sqrt(ms, out=ms)
        if e.unresolved.size:
            out.reshape(-1)[e.unresolved] = np.nan
        result: np.ndarray = out
        return result

    def tones(self, unit: str | None = None, amplitude: str | None = None) -> np.ndarray:
        """Tracked-tone amplitudes (float64 [C, T]) at their exact frequencies; NaN if
        unresolved (no speed, above Nyquist) or below the low-frequency limit.

        Parameters
        ----------
        unit : str, optional
            Output unit (g, m/s2, mm/s, in/s, um, mil) or quantity; default ``spec.unit``.
        amplitude : {'rms', 'peak', 'peak-to-peak'}, optional
            Amplitude type; default ``spec.amplitude``.

        Returns
        -------
        ndarray
            float64 [C, T] in ``unit``, in the order of ``spec.tones``.
        """
        v = self._view(unit)
        p = self.tone_avg.value
        if p is None or not self.spec.tones:
            return np.full((self.channels, len(self.spec.tones)), np.nan)
        a = amplitude_from_power(p * v.tone_weights, amplitude or self.spec.amplitude)  # type: ignore[arg-type]
        return np.where(self._tone_valid & ~self._tone_masked, a, np.nan)

    def peaks(
        self, unit: str | None = None, amplitude: str | None = None, count: int | None = None
    ) -> Peaks:
        """The largest peaks, interpolated (see ``dsp.tones.find_peaks``), in ``unit``.

        ``amplitude_rms`` of the result is converted to ``amplitude`` type in place of RMS.

        Parameters
        ----------
        unit : str, optional
            Output unit (g, m/s2, mm/s, in/s, um, mil) or quantity; default ``spec.unit``.
        amplitude : {'rms', 'peak', 'peak-to-peak'}, optional
            Amplitude type; default ``spec.amplitude``.
        count : int, optional
            Peaks per channel (default ``spec.peaks``).

        Returns
        -------
        Peaks
            Frequencies in Hz; amplitudes in ``unit`` as ``amplitude`` type, largest first.
        """
        return spectrum_peaks(
            self.power("m/s2"), "m/s2", self.grid.df_hz, self.spec.window, self.grid.n,
            unit=unit or self.spec.unit, amplitude=amplitude or self.spec.amplitude,
            count=self.spec.peaks if count is None else count, lowcut_hz=self.lowcut_hz,
            beta=self.spec.beta,
        )

    @property
    def unit(self) -> OutputUnit:
        """The default output unit of the read-outs (``spec.unit``, resolved)."""
        return resolve_unit(self.spec.unit)

    def quantity(self, unit: str | None = None) -> str:
        """"acceleration", "velocity" or "displacement": what ``unit`` (default: ours) measures.

        Parameters
        ----------
        unit : str, optional
            Output unit (g, m/s2, mm/s, in/s, um, mil) or quantity; default ``spec.unit``.

        Returns
        -------
        str
            Its quantity.
        """
        return quantity_of(resolve_unit(unit or self.spec.unit))


def spectrum_peaks(
    power: np.ndarray,
    input_unit: str,
    df_hz: float,
    window: str,
    n: int,
    *,
    unit: str,
    amplitude: str,
    count: int,
    lowcut_hz: float,
    beta: float = DEFAULT_KAISER_BETA,
) -> Peaks:
    """The ``count`` largest peaks of acceleration power spectra, ranked in ``unit``.

    ``power`` is [C, Q] (or [Q]) in ``input_unit``² RMS² per line (an acceleration unit) on
    f[q] = q·df_hz Hz, from ``n``-sample frames under ``window``. Every local maximum at or
    above ``lowcut_hz`` is interpolated on the acceleration spectrum, whose peak shape is
    exactly the window's (``dsp.tones.find_peaks``), weighted to ``unit`` at its
    interpolated frequency (``unit_power_weights``), and the ``count`` largest in ``unit``
    are given as ``amplitude`` (peak, RMS or peak-to-peak) in ``unit``. What :meth:`Analyzer.peaks`
    returns, for spectra already read out (the service computes them only when a client
    asks).

    Parameters
    ----------
    power : ndarray
        Acceleration power spectra, [C, Q] or [Q], ``input_unit``² RMS² per line.
    input_unit : {'g', 'm/s2'}
        Their acceleration unit.
    df_hz : float
        Line spacing, Hz.
    window : {'rectangular', 'hann', 'hamming', 'blackman-harris', 'flattop', 'kaiser'}
        The window the frames were weighted by.
    n : int
        Frame length, samples.
    unit : str
        Output unit or quantity the peaks are ranked and given in.
    amplitude : {'rms', 'peak', 'peak-to-peak'}
        Amplitude type of the result.
    count : int
        Peaks per channel (0: none).
    lowcut_hz : float
        No peak below this, Hz.
    beta : float, optional
        Kaiser β (default 8.6).

    Returns
    -------
    Peaks
        Frequencies in Hz; ``amplitude_rms`` holds the ``amplitude`` type in ``unit``.
    """
    u = resolve_unit(unit)
    if not count:  # no peaks asked for
        shape = (*np.shape(power)[:-1], 0)
        return Peaks(np.zeros(shape), np.zeros(shape), np.zeros(shape, dtype=np.int64))
    scale = 1.0

    def weight(f_hz: np.ndarray) -> np.ndarray:
        return unit_power_weights(f_hz, input_unit, u, lowcut_hz=lowcut_hz)  # type: ignore[arg-type]

    if quantity_of(u) == "acceleration":  # a constant factor: it ranks nothing differently
        scale = float(weight(np.ones(1))[0])
    pk = find_peaks(
        power, df_hz, window, n,  # type: ignore[arg-type]
        count=count, min_hz=lowcut_hz, beta=beta,
        weight=None if quantity_of(u) == "acceleration" else weight,
    )
    amp = amplitude_from_power(pk.amplitude_rms**2 * scale, amplitude)  # type: ignore[arg-type]
    return Peaks(frequency_hz=pk.frequency_hz, amplitude_rms=amp, line=pk.line)

"""The streaming filter bank: frames cut every hop from a multi-channel stream, windowed, rfft'd.

Knows nothing about sockets, files, asyncio or config; takes arrays, returns arrays.

Grid (for N-point frames, hop H, sample rate fs):

* frame p starts at sample k₀[p]; its spectrum is X[c, p, q] = Σ_k w[k]·x[c, k₀[p]+k]·e^(−2πi·q·k/N)
* line q sits at f[q] = q·fs/N Hz, q = 0…N/2 (the "lines" shown are the first N/2.56)
* t[p] = k₀[p]/fs s; consecutive frames are H samples apart (overlap 1 − H/N)

All ready frames of all channels go through one batched ``scipy.fft.rfft`` per push.
Tracked tones (any frequency, not only line centres) are the same sum evaluated at the
tone's frequency f: X(f) = Σ_k w[k]·x[k]·e^(−2πi·f·k/fs), done as one matrix product of
the frames with a (window × complex exponential) kernel.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft
from numpy.lib.stride_tricks import sliding_window_view

from .buffer import SampleBuffer
from .tones import tone_kernel
from .windows import DEFAULT_KAISER_BETA, WindowInfo, check_window, get_window, window_info

__all__ = ["FrameBatch", "FrameGrid", "FilterBank", "FMAX_RATIO"]

# fs = 2.56·Fmax and N = 2.56·lines (common practice: leaves room for the anti-alias roll-off)
FMAX_RATIO = 2.56


@dataclass(frozen=True)
class FrameGrid:
    """Frame length ``n`` (samples), hop ``hop`` (samples) and sample rate ``fs`` (Hz)."""

    fs: float
    n: int
    hop: int
    keep: int | None = None  # lines analysed (0…keep−1); None = all N/2+1

    def __post_init__(self) -> None:
        if self.keep is not None and not (1 <= self.keep <= self.n // 2 + 1):
            raise ValueError(f"keep={self.keep!r} must be in [1, n//2 + 1]")
        if not (np.isfinite(self.fs) and self.fs > 0):
            raise ValueError(f"fs={self.fs!r} must be a positive number of Hz")
        if int(self.n) != self.n or self.n < 8:
            raise ValueError(f"n={self.n!r} must be an integer of at least 8 samples")
        if int(self.hop) != self.hop or not (1 <= self.hop <= self.n):
            raise ValueError(f"hop={self.hop!r} must be an integer in [1, n={self.n}]")

    @staticmethod
    def hop_for(n: int, overlap: float) -> int:
        """Hop in samples for an overlap fraction in [0, 1): round(n·(1 − overlap)), at least 1."""
        if not (0.0 <= overlap < 1.0):
            raise ValueError(f"overlap={overlap!r} must be a fraction in [0, 1)")
        return max(1, int(round(n * (1.0 - overlap))))

    @classmethod
    def from_fmax(cls, fmax_hz: float, lines: int, overlap: float = 0.75) -> FrameGrid:
        """Set up the trade's way: fs = 2.56·Fmax Hz, N = 2.56·lines (e.g. 3200 lines → 8192)."""
        if int(lines) != lines or lines < 4:
            raise ValueError(f"lines={lines!r} must be an integer of at least 4")
        n_exact = FMAX_RATIO * lines
        n = int(round(n_exact))
        if abs(n - n_exact) > 1e-9:
            raise ValueError(
                f"lines={lines!r} gives a frame of 2.56×{lines} = {n_exact:g} samples, "
                "not an integer; use e.g. 400, 800, 1600, 3200 or 6400 lines"
            )
        if not (np.isfinite(fmax_hz) and fmax_hz > 0):
            raise ValueError(f"fmax_hz={fmax_hz!r} must be a positive number of Hz")
        return cls(fs=FMAX_RATIO * float(fmax_hz), n=n, hop=cls.hop_for(n, overlap), keep=lines + 1)

    @classmethod
    def from_n(cls, n: int, fs: float, overlap: float = 0.75) -> FrameGrid:
        """Set up by raw frame length ``n`` (samples) and sample rate ``fs`` (Hz)."""
        return cls(fs=float(fs), n=int(n), hop=cls.hop_for(int(n), overlap))

    @property
    def df_hz(self) -> float:
        """Line spacing Δf = fs/N in Hz."""
        return self.fs / self.n

    @property
    def bins(self) -> int:
        """Number of rfft lines, N//2 + 1 (DC to Nyquist)."""
        return self.n // 2 + 1

    @property
    def analysis_bins(self) -> int:
        """Lines the analysis keeps: 0…Fmax (lines + 1) when set up by Fmax, else all bins.

        Lines above Fmax lie in the anti-alias filter's roll-off and are not shown."""
        return self.keep if self.keep is not None else self.bins

    @property
    def lines(self) -> int:
        """Lines shown to users: floor(N/2.56)."""
        return int(np.floor(self.n / FMAX_RATIO + 1e-9))

    @property
    def fmax_hz(self) -> float:
        """Usable upper frequency fs/2.56 in Hz."""
        return self.fs / FMAX_RATIO

    @property
    def frame_s(self) -> float:
        return self.n / self.fs

    @property
    def hop_s(self) -> float:
        return self.hop / self.fs

    @property
    def overlap(self) -> float:
        return 1.0 - self.hop / self.n

    def frequencies(self) -> np.ndarray:
        """f[q] = q·fs/N in Hz, q = 0…N/2 (float64)."""
        return np.arange(self.bins, dtype=np.float64) * self.df_hz


@dataclass(frozen=True)
class FrameBatch:
    """Frames completed by one push.

    ``start``: int64[P], stream index of each frame's first sample (t = start/fs).
    ``spectra``: complex64[C, P, Q], X[c, p, q] as in the module docstring (unscaled: divide
    by S1 for amplitude — see ``dsp.scaling``).
    ``tones``: complex64[C, P, T], X(f) at each tracked tone's frequency (T may be 0).
    """

    start: np.ndarray
    spectra: np.ndarray
    tones: np.ndarray

    @property
    def count(self) -> int:
        return int(self.start.size)


class FilterBank:
    """Streaming short-time DFT of C channels on a :class:`FrameGrid`.

    Push blocks of any length; every frame that became complete is windowed and
    transformed in one batched rfft over channels and frames. Cutting the same
    stream into different blocks gives identical frames (streaming equals batch).

    ``push(block, first_index=k)`` declares the stream index of the block's first
    sample; if it is not the next expected index, the partial frame is discarded and
    assembly restarts at ``k`` — frames never straddle a gap. ``reset()`` does the same.

    Example: a 1 V-peak sine on a line centre gives 2|X|/S1 = 1 on that line.

    >>> import numpy as np
    >>> g = FrameGrid.from_n(1024, fs=1024.0, overlap=0.5)
    >>> fb = FilterBank(g, channels=1, window="hann")
    >>> x = np.sin(2 * np.pi * 100 * np.arange(4096) / 1024.0).astype(np.float32)
    >>> b = fb.push(x[None, :])
    >>> b.count, round(float(2 * abs(b.spectra[0, 0, 100]) / fb.info.s1), 4)
    (7, 1.0)
    """

    def __init__(
        self,
        grid: FrameGrid,
        channels: int,
        window: str = "hann",
        *,
        beta: float = DEFAULT_KAISER_BETA,
        tone_hz: np.ndarray | None = None,
    ) -> None:
        check_window(window)
        if int(channels) != channels or channels < 1:
            raise ValueError(f"channels={channels!r} must be a positive integer")
        self.grid = grid
        self.channels = int(channels)
        self.window = window
        self.beta = beta
        self.w = get_window(window, grid.n, beta=beta)  # type: ignore[arg-type]
        self.info: WindowInfo = window_info(window, grid.n, beta=beta)  # type: ignore[arg-type]
        self._w32 = self.w.astype(np.float32)
        self._held = SampleBuffer(self.channels, 4 * grid.n)  # samples towards frames
        self._work = np.empty((self.channels, 0, grid.n), dtype=np.float32)
        self._next_index = 0  # stream index of the sample after the last one pushed
        self._tail_start = 0  # stream index of the first held sample
        self.frames_out = 0
        self.resets = 0
        self._tone_hz = np.zeros((self.channels, 0))
        self._kernel = np.zeros((1, grid.n, 0), dtype=np.float32)  # [G, n, 2T], G groups
        self._tone_group = np.zeros(self.channels, dtype=np.intp)  # channel → kernel group
        if tone_hz is not None:
            self.set_tones(tone_hz)

    # -- tones -------------------------------------------------------------------------
    @property
    def tone_hz(self) -> np.ndarray:
        """Tracked tone frequencies in Hz, float64[C, T]."""
        return self._tone_hz

    def set_tones(self, tone_hz: np.ndarray) -> None:
        """Track tones at ``tone_hz`` (Hz): shape (T,) for all channels or (C, T) per channel.

        Each must lie in [0, fs/2]. The kernel K[k, t] = cos(2π·f·k/fs),
        K[k, T+t] = −sin(2π·f·k/fs) (``dsp.tones.tone_kernel`` with no window) is applied to
        the windowed frames, the same ones the rfft sees.
        """
        f = np.asarray(tone_hz, dtype=np.float64)
        if f.ndim == 1:
            f = np.broadcast_to(f, (self.channels, f.size))
        if f.ndim != 2 or f.shape[0] != self.channels:
            raise ValueError(
                f"tone_hz has shape {np.shape(tone_hz)}; expected (T,) or ({self.channels}, T)"
            )
        if f.size and (not np.all(np.isfinite(f)) or f.min() < 0 or f.max() > self.grid.fs / 2):
            raise ValueError(f"tone frequencies must lie in [0, fs/2 = {self.grid.fs / 2:g}] Hz")
        if np.array_equal(f, self._tone_hz):
            return
        if f.size == 0:
            self._kernel = np.zeros((1, self.grid.n, 0), dtype=np.float32)
            self._tone_group = np.zeros(self.channels, dtype=np.intp)
            self._tone_hz = f.copy()
            return
        # Channels that track the same frequencies (same machine, same speed) share one
        # kernel, so their frames go through one large matrix product instead of C small ones.
        rows, group = np.unique(f, axis=0, return_inverse=True)
        # The kernel goes onto windowed frames, so it carries no window of its own.
        self._kernel = tone_kernel(rows, self.grid.n, self.grid.fs, "rectangular")
        self._tone_group = group.reshape(-1)
        self._tone_hz = f.copy()

    def _tones(self, windowed: np.ndarray) -> np.ndarray:
        c_count, p_count, n = windowed.shape
        t = self._kernel.shape[2] // 2
        ri = np.empty((c_count, p_count, 2 * t), dtype=np.float32)
        for g in range(self._kernel.shape[0]):
            sel = np.flatnonzero(self._tone_group == g)
            if sel.size == c_count:
                ri = (windowed.reshape(-1, n) @ self._kernel[g]).reshape(c_count, p_count, 2 * t)
            else:
                ri[sel] = windowed[sel] @ self._kernel[g]
        out = np.empty((c_count, p_count, t), dtype=np.complex64)
        out.real = ri[..., :t]
        out.imag = ri[..., t:]
        return out

    # -- stream ------------------------------------------------------------------------
    @property
    def next_index(self) -> int:
        """Stream index expected for the next sample pushed."""
        return self._next_index

    @property
    def pending(self) -> int:
        """Samples held towards the next frame."""
        return self._held.held

    def reset(self, next_index: int | None = None) -> None:
        """Discard the partial frame (a gap); assembly restarts at ``next_index``."""
        self._held.clear()
        if next_index is not None:
            self._next_index = int(next_index)
        self._tail_start = self._next_index
        self.resets += 1

    def push(self, block: np.ndarray, first_index: int | None = None) -> FrameBatch:
        """Append ``block`` (float32[C, n], any n ≥ 0) and return the frames it completed.

        ``first_index`` (optional) is the stream index of ``block[:, 0]``; a value other
        than :attr:`next_index` is a gap and restarts frame assembly there.
        """
        x = np.asarray(block)
        if x.ndim == 1 and self.channels == 1:
            x = x[None, :]
        if x.ndim != 2 or x.shape[0] != self.channels:
            raise ValueError(f"block has shape {np.shape(block)}; expected ({self.channels}, n)")
        if x.dtype != np.float32:
            x = x.astype(np.float32)
        if first_index is not None and first_index != self._next_index:
            self.reset(first_index)
        self._next_index += x.shape[1]
        self._held.append(x)
        buf = self._held.view()
        n, hop = self.grid.n, self.grid.hop
        length = buf.shape[1]
        p_count = (length - n) // hop + 1 if length >= n else 0
        if p_count:
            frames = sliding_window_view(buf, n, axis=1)[:, : (p_count - 1) * hop + 1 : hop]
            if self._work.shape[1] < p_count:
                self._work = np.empty((self.channels, p_count, n), dtype=np.float32)
            # Reused buffer: the FFT input is not freshly allocated (and page-faulted) each push.
            windowed = np.multiply(frames, self._w32, out=self._work[:, :p_count])
            if self._kernel.shape[2]:
                tones = self._tones(windowed)
            else:
                tones = np.zeros((self.channels, p_count, 0), dtype=np.complex64)
            # The windowed frames are our scratch: let the FFT reuse them (after the tones).
            spectra = scipy.fft.rfft(windowed, axis=-1, workers=1, overwrite_x=True)
            start = self._tail_start + hop * np.arange(p_count, dtype=np.int64)
        else:
            spectra = np.zeros((self.channels, 0, self.grid.bins), dtype=np.complex64)
            tones = np.zeros((self.channels, 0, self._kernel.shape[2] // 2), dtype=np.complex64)
            start = np.zeros(0, dtype=np.int64)
        consumed = p_count * hop
        self._held.consume(consumed)
        self._tail_start += consumed
        self.frames_out += p_count
        return FrameBatch(start=start, spectra=spectra, tones=tones)

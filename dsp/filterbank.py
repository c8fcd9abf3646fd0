"""The streaming filter bank: frames cut every hop from a multi-channel stream, windowed, rfft'd.

Knows nothing about sockets, files, asyncio or config; takes arrays, returns arrays.

Grid (for N-point frames, hop H, sample rate fs):

* frame p starts at sample k₀[p]; its spectrum is X[c, p, q] = Σ_k w[k]·x[c, k₀[p]+k]·e^(−2πi·q·k/N)
* line q sits at f[q] = q·fs/N Hz, q = 0…N/2 (the "lines" shown are the first N/2.56)
* t[p] = k₀[p]/fs s; consecutive frames are H samples apart (overlap 1 − H/N)

All ready frames of all channels go through one batched ``scipy.fft.rfft`` per push.
Tracked tones (any frequency, not only line centres) are the same sum evaluated at the
tone's frequency f: X(f) = Σ_k w[k]·x[k]·e^(−2πi·f·k/fs), done as matrix products with a
(window × complex exponential) kernel. When the hop divides N (e.g. 75 % overlap), a frame
is N/H consecutive hop-long blocks, so X(f) = Σ_j Σ_m x[k₀ + jH + m]·K_j[m] with K_j the
j-th hop-long piece of the kernel: each block of raw samples is multiplied once (one
matrix product, no windowed copy) and each frame sums N/H of those partial products; the
partial products of the blocks shared with the next push's frames are kept. The pieces
are K_j[m] = e^(−iωjH)·w_j[m]·e^(−iωm) with w_j the window's pieces, which span only R
functions (3 for Hann: a cosine sum), so a block meets R·2T columns, not N/H·2T.

:meth:`FilterBank.push_power` is the path for an exponential average: only the weighted
sum Σ_p a_p·|X_p|² of the new frames is needed, so √a_p is folded into each frame's window
and the frames are windowed, transformed, squared and summed a few channels at a time,
while they are in cache, with no [C, P, N/2+1] spectrum array for all channels.

With ``remove_dc=True`` (what ``dsp.analyzer`` uses) each frame's constant offset is taken
out of its spectrum before anything else reads it: c[p] = Σ_k w[k]·x[k₀[p]+k] / S1 = X[p, 0]/S1
(S1 = Σ w) is the window-weighted mean, the constant that fits the frame best in the
least-squares sense under the window, and its share of line q is c[p]·W[q], W = rfft(w),
known in advance. So X'[p, q] = X[p, q] − X[p, 0]·W[q]/W[0] for 1 ≤ q: the spectrum of
w·(x − c[p]), done on the lines where |W[q]|/W[0] > 1e-9 only (:func:`dc_shape`). The DC
line itself (q = 0) is kept: it still reads the offset. Tracked tones likewise:
X'(f) = X(f) − X[p, 0]·W(f)/S1, W(f) = Σ_k w[k]·e^(−2πi·f·k/fs). See docs/low-frequency.md.

This is not ``scipy.signal.welch(..., detrend="constant")``, which subtracts the plain mean
Σ x/N before windowing. Both remove a pure constant exactly; for a frame that also holds
a tone off a line centre, the plain mean carries part of the tone with the rectangular
window's slowly falling sidelobes (−13 dB), and w·(x − mean) still has a DC line
X[0] − mean·S1 ≠ 0. The window-weighted mean leaves Σ w·(x − c) = 0 exactly and draws the
tone's share through the window's own (lower) sidelobes.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
import scipy.fft

from .buffer import SampleBuffer
from .grid import FrameGrid
from .tones import tone_kernel
from .types import check_index_span
from .windows import DEFAULT_KAISER_BETA, WindowInfo, check_window, get_window, window_info

__all__ = ["FrameBatch", "FilterBank", "PowerBatch", "dc_shape"]

# push_power works on about this many windowed frames at a time (all frames of a push, a
# few channels at a time): 12 frames of 8192 samples and their rfft are about 0.8 MB, so
# each stage reads what the previous one left in the core's cache (measured at 64
# channels, 75 % overlap: 12 frames clearly ahead of 16–48).
_CHUNK_FRAMES = 12
# pocketfft transforms _FFT_LANES frames at once in SIMD lanes and the rest one by one,
# about twice as slowly each (scipy's x86-64 wheels: 4 float32 lanes, SSE). push_power
# hands it whole groups: a chunk of 1 channel × 3 frames is padded with a zero frame.
_FFT_LANES = 4
# Up to this many hop-long blocks, tracked tones go block by block (BLAS gemv).
_GEMV_ROWS = 4


# Lines whose |W[q]|/W[0] is at or below this are left alone by the DC removal: a float32
# FFT rounds a frame's DC line by about eps·√N·|X[0]|/N ≈ 1e-9·|X[0]| at N = 8192 anyway.
DC_SHAPE_FLOOR = 1e-9


def dc_shape(w: np.ndarray, *, floor: float = DC_SHAPE_FLOOR) -> np.ndarray:
    """W[q]/W[0] for q = 1 … span − 1 (dimensionless), W = rfft(w): a frame's constant c
    puts c·W[q] on line q. ``span`` is one past the last line with |W[q]|/W[0] > ``floor``.

    float32: W is real for a DFT-even window, w[k] = w[N − k], as every window of
    ``dsp.windows`` is (periodic); another raises ValueError. Empty for the rectangular
    window (W[q] = 0 at every line centre but DC); 1 line for Hann and Hamming, 3 for
    Blackman–Harris, 4 for flat-top; every line for Kaiser, whose sidelobes never fall to
    the floor.

    Parameters
    ----------
    w : ndarray
        The window, N samples, DFT-even.
    floor : float, optional
        Relative level, dimensionless, at or below which a line is left out (default 1e-9).

    Returns
    -------
    ndarray
        float32[span − 1], W[q]/W[0] for q = 1 … span − 1.

    Examples
    --------
    >>> from dsp.windows import get_window
    >>> [round(float(v), 3) for v in dc_shape(get_window("hann", 16))]
    [-0.5]
    """
    big = np.fft.rfft(np.asarray(w, dtype=np.float64))
    shape = big[1:] / big[0].real
    if np.abs(shape.imag).max(initial=0.0) > 1e-12:
        raise ValueError("the window is not DFT-even (w[k] = w[N − k]): its transform is not real")
    above = np.flatnonzero(np.abs(shape) > floor)
    out: np.ndarray = shape.real[: above[-1] + 1 if above.size else 0].astype(np.float32)
    return out


def _pocketfft_r2c() -> object | None:
    """scipy's own pocketfft entry point, which can write into a given array (scipy.fft.rfft
    always allocates a new one), if it is there and agrees bit for bit with scipy.fft.rfft.
    """
    try:
        from scipy.fft._pocketfft import pypocketfft

        x = np.random.default_rng(0).standard_normal((4, 64)).astype(np.float32)
        out = np.empty((4, 33), dtype=np.complex64)
        pypocketfft.r2c(x, (1,), True, 0, out, 1)
        if np.array_equal(out, scipy.fft.rfft(x, axis=-1, workers=1)):
            return pypocketfft.r2c  # type: ignore[no-any-return]
    except Exception:  # any change in that private module: the public path
        pass
    return None


_R2C = _pocketfft_r2c()


def _rfft_into(x: np.ndarray, out: np.ndarray) -> np.ndarray:
    """rfft of the rows of float32 ``x`` [M, N] into complex64 ``out`` [M, N/2 + 1], one thread.

    Writing into a reused array saves the allocation and its first touch (7 % of an
    8192-point rfft of 12 rows, measured) and scipy.fft's per-call overhead (~7 µs)."""
    if _R2C is not None:
        return _R2C(x, (1,), True, 0, out, 1)  # type: ignore[operator, no-any-return]
    out[...] = scipy.fft.rfft(x, axis=-1, workers=1, overwrite_x=True)
    return out


@dataclass(frozen=True)
class FrameBatch:
    """Frames completed by one push.

    ``start``: int64[P], stream index of each frame's first sample (t = start/fs).
    ``spectra``: complex64[C, P, Q], X[c, p, q] as in the module docstring (unscaled: divide
    by S1 for amplitude — see ``dsp.scaling``); lines q ≥ 1 without the frame's
    window-weighted mean when the bank removes DC.
    ``tones``: complex64[C, P, T], X(f) at each tracked tone's frequency (T may be 0).

    Attributes
    ----------
    start : ndarray
        int64[P], each frame's first sample's stream index.
    spectra : ndarray
        complex64[C, P, Q], unscaled X (divide by S1 for amplitude).
    tones : ndarray
        complex64[C, P, T], X(f) at each tracked tone.
    """

    start: np.ndarray
    spectra: np.ndarray
    tones: np.ndarray

    @property
    def count(self) -> int:
        """Frames completed by the push."""
        return int(self.start.size)


@dataclass(frozen=True)
class PowerBatch:
    """Frames completed by one :meth:`FilterBank.push_power`, folded over frames.

    ``start``: int64[P] as in :class:`FrameBatch`.
    ``power``: float32[C, L], Σ_p a_p·|X[c, p, q]|² for the lines q < L, with X as in
    :class:`FrameBatch` (unscaled) and a_p the frame weights passed in; a new array.
    ``tones``: complex64[C, P, T], as in :class:`FrameBatch` (not weighted).

    Attributes
    ----------
    start : ndarray
        int64[P], each frame's first sample's stream index.
    power : ndarray
        float32[C, L], Σ_p a_p·|X[c, p, q]|² (unscaled), squared input unit.
    tones : ndarray
        complex64[C, P, T], X(f) at each tracked tone (not weighted).
    """

    start: np.ndarray
    power: np.ndarray
    tones: np.ndarray

    @property
    def count(self) -> int:
        """Frames completed by the push."""
        return int(self.start.size)


class FilterBank:
    """Streaming short-time DFT of C channels on a :class:`FrameGrid`.

    Push blocks of any length; every frame that became complete is windowed and
    transformed in one batched rfft over channels and frames. Cutting the same
    stream into different blocks gives identical frames (streaming equals batch).

    ``push(block, first_index=k)`` declares the stream index of the block's first
    sample; if it is not the next expected index, the partial frame is discarded and
    assembly restarts at ``k`` — frames never straddle a gap. ``reset()`` does the same.

    ``remove_dc=True`` takes each frame's window-weighted mean out of lines q ≥ 1 (module
    docstring): a constant offset then reaches no line but DC, under any window.

    Parameters
    ----------
    grid : FrameGrid
        Sample rate (Hz), frame length and hop (samples), lines kept.
    channels : int
        Number of channels C.
    window : {'rectangular', 'hann', 'hamming', 'blackman-harris', 'flattop', 'kaiser'}, optional
        DFT window (default hann).
    beta : float, optional
        Kaiser β (default 8.6).
    tone_hz : ndarray, optional
        Tracked tone frequencies, Hz, (C, T) or (T,); see :meth:`set_tones`.
    remove_dc : bool, optional
        Take each frame's window-weighted mean out of lines q ≥ 1 and the tones (default
        False; the Analyzer turns it on).

    Examples
    --------
    A 1 V-peak sine on a line centre gives 2|X|/S1 = 1 on that line.

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
        remove_dc: bool = False,
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
        self.remove_dc = bool(remove_dc)
        # W[q]/W[0] on the lines a frame's constant reaches (none for rectangular).
        self._dc_shape = dc_shape(self.w) if self.remove_dc else np.zeros(0, np.float32)
        self._held = SampleBuffer(self.channels, 4 * grid.n)  # samples towards frames
        self._work = np.empty((self.channels, 0, grid.n), dtype=np.float32)  # push's frames
        self._chunk = np.zeros((0, grid.n), dtype=np.float32)  # push_power's few channels
        self._spec = np.empty((0, grid.bins), dtype=np.complex64)  # and their rfft
        self._next_index = 0  # stream index of the sample after the last one pushed
        self._tail_start = 0  # stream index of the first held sample
        self.frames_out = 0
        self.resets = 0
        # Tones by hop-long blocks (see the module docstring) when the hop divides N.
        self._per_frame = grid.n // grid.hop if grid.n % grid.hop == 0 else 0  # blocks/frame
        self._tone_hz = np.zeros((self.channels, 0))
        self._kernel = np.zeros((1, grid.n, 0), dtype=np.float32)  # [G, n, 2T], G groups
        self._tone_group = np.zeros(self.channels, dtype=np.intp)  # channel → kernel group
        self._group_rows: list[np.ndarray] = [np.arange(self.channels)]
        self._partial: np.ndarray | None = None  # [C, N/H − 1, R·2T] kept block products
        self._combine = np.zeros((1, 0, 0), dtype=np.complex64)  # [G, N/H·R·T, T]
        # push_power's window tables, by frame weights
        self._tables: dict[tuple[int, bytes], tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
        self._tone_dc = np.zeros((self.channels, 0), dtype=np.complex64)  # W(f)/S1, [C, T]
        if tone_hz is not None:
            self.set_tones(tone_hz)

    # -- tones -------------------------------------------------------------------------
    @property
    def tone_hz(self) -> np.ndarray:
        """Tracked tone frequencies in Hz, float64[C, T]."""
        return self._tone_hz

    def set_tones(self, tone_hz: np.ndarray) -> None:
        """Track tones at ``tone_hz`` (Hz): shape (T,) for all channels or (C, T) per channel.

        Each must lie in [0, fs/2]. X(f) = Σ_k w[k]·x[k]·e^(−2πi·f·k/fs) is evaluated on the
        raw samples in hop-long blocks when the hop divides N (module docstring); otherwise
        the kernel K[k, t] = cos(2π·f·k/fs), K[k, T+t] = −sin(2π·f·k/fs)
        (``dsp.tones.tone_kernel`` with no window) is applied to the windowed frames, the
        ones the rfft sees.
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
        self._partial = None
        n, hop = self.grid.n, self.grid.hop
        if f.size == 0:
            self._kernel = np.zeros((1, n, 0), dtype=np.float32)
            self._tone_group = np.zeros(self.channels, dtype=np.intp)
            self._group_rows = [np.arange(self.channels)]
            self._tone_hz = f.copy()
            self._tone_dc = np.zeros((self.channels, 0), dtype=np.complex64)
            return
        # Channels that track the same frequencies (same machine, same speed) share one
        # kernel, so their frames go through one large matrix product instead of C small ones.
        rows, group = np.unique(f, axis=0, return_inverse=True)
        self._tone_group = group.reshape(-1)
        self._group_rows = [np.flatnonzero(self._tone_group == g) for g in range(rows.shape[0])]
        self._tone_hz = f.copy()
        t = rows.shape[1]
        # Columns (Re, Im) per tone, interleaved, so a product's rows view as complex64.
        pairs = np.arange(2 * t).reshape(2, t).T.ravel()
        if self._per_frame:
            # Piece j of the kernel, K[jH + m] = e^(−iωjH)·w[jH + m]·e^(−iωm), and the window
            # pieces w_j = Σ_r coef[j, r]·basis_r: blocks meet basis_r·e^(−iωm) [G, H, R·2T]
            # and coef[j, r]·e^(−iω_t·jH) [G, N/H, R, T] makes the pieces.
            basis, coef = self._window_basis
            m = np.arange(hop, dtype=np.float64)
            e = np.exp(-2j * np.pi / self.grid.fs * m[:, None] * rows[:, None, :])  # [G, H, T]
            k = basis.T[None, :, :, None] * e[:, :, None, :]  # [G, H, R, T]
            k = np.stack((k.real, k.imag), axis=-1)  # (Re, Im) interleaved
            self._kernel = k.reshape(rows.shape[0], hop, -1).astype(np.float32)
            j = np.arange(self._per_frame, dtype=np.float64)
            shift = np.exp(-2j * np.pi / self.grid.fs * hop * j[:, None] * rows[:, None, :])
            comb = coef[None, :, :, None] * shift[:, :, None, :]  # [G, N/H, R, T]
            # As one matrix per group, rows (j, r, t) and column t: the frames' sums over the
            # pieces become one matrix product (~2.5× faster than the same einsum, measured).
            diag = comb[..., None] * np.eye(t)  # [G, N/H, R, T, T]
            self._combine = diag.reshape(rows.shape[0], -1, t).astype(np.complex64)
            # W(f) = Σ_j Σ_r comb[j, r]·Σ_m basis_r[m]·e^(−iωm): no new exponentials.
            w_f = np.einsum("gjrt,grt->gt", comb, np.einsum("rm,gmt->grt", basis, e))
        else:
            # The kernel goes onto windowed frames, so it carries no window of its own.
            k = tone_kernel(rows, n, self.grid.fs, "rectangular")
            self._kernel = np.ascontiguousarray(k[..., pairs])
            ri = np.einsum("k,gkc->gc", self.w, self._kernel, dtype=np.float64)
            w_f = ri[:, 0::2] + 1j * ri[:, 1::2]
        # A frame's constant c puts c·W(f) on the tone at f, W(f) = Σ_k w[k]·e^(−2πi·f·k/fs).
        self._tone_dc = (w_f / self.info.s1)[self._tone_group].astype(np.complex64)

    @property
    def _tone_count(self) -> int:
        if self._per_frame:
            result: int = self._kernel.shape[2] // (2 * self._window_basis[0].shape[0])
            return result
        return self._kernel.shape[2] // 2

    @functools.cached_property
    def _window_basis(self) -> tuple[np.ndarray, np.ndarray]:
        """(basis [R, H], coef [N/H, R]) with the window's hop-long pieces w_j = coef[j]·basis.

        R is the pieces' rank: 3 for Hann or Hamming (three cosine terms) whatever the
        overlap, 1 for rectangular, else up to N/H. Fewer basis rows than pieces means fewer
        multiplications per block (48 instead of 64 columns for 8 tones at 75 % overlap)."""
        pieces = self.w.reshape(self._per_frame, self.grid.hop)
        u, sv, vt = np.linalg.svd(pieces, full_matrices=False)
        rank = int(np.count_nonzero(sv > sv[0] * 1e-9))
        if rank == pieces.shape[0]:
            return pieces, np.eye(rank)  # nothing to gain: the pieces themselves
        return vt[:rank], u[:, :rank] * sv[:rank]

    def _products(self, a: np.ndarray) -> np.ndarray:
        """a [C', M, L] (rows of channels ``sel``) @ each channel's kernel → float32 [C', M, W]."""
        c, m, length = a.shape
        kernel = self._kernel
        if len(self._group_rows) > 1:
            y = np.empty((c, m, kernel.shape[2]), dtype=np.float32)
            for g, sel in enumerate(self._group_rows):
                y[sel] = a[sel] @ kernel[g]
            return y
        if c * m > _GEMV_ROWS:
            result: np.ndarray = (a.reshape(-1, length) @ kernel[0]).reshape(c, m, -1)
            return result
        # A few rows: one matrix-vector product each beats a matrix product that first
        # repacks the whole kernel (measured ~1.7× for 2–3 rows of 2048).
        y = np.empty((c, m, kernel.shape[2]), dtype=np.float32)
        k0 = kernel[0]
        for i in range(c):
            for j in range(m):
                np.dot(a[i, j], k0, out=y[i, j])
        return y

    def _tones_direct(self, windowed: np.ndarray) -> np.ndarray:
        """X(f) of windowed frames ``[C, P, N]`` (all channels) by the unwindowed kernel."""
        ri = self._products(windowed)  # [C, P, 2T] as (Re, Im) pairs
        return ri.view(np.complex64)

    def _tones_blocks(self, p_count: int) -> np.ndarray:
        """X(f) of the next ``p_count`` frames from hop-long blocks of the held raw samples.

        Block b (samples bH…bH+H−1 of the held ones) times basis_r·e^(−iωm) gives z[b, r];
        frame p is Σ_j Σ_r coef[j, r]·e^(−iωjH)·z[p + j, r]. The products of the last N/H − 1
        blocks (the next push's first ones) are kept, so each block is multiplied once."""
        hop, r1 = self.grid.hop, self._per_frame
        c = self.channels
        need = p_count + r1 - 1  # blocks that the new frames cover
        kept = self._partial
        first = 0 if kept is None else kept.shape[1]
        blocks = self._held.view(need * hop)[:, first * hop :]
        # One contiguous copy of the new samples (a quarter of the frames' size at 75 %
        # overlap) makes them one [C·blocks, H] matrix for BLAS (a few rows go one by one).
        a = blocks.reshape(c, need - first, hop)
        if c * (need - first) > _GEMV_ROWS:
            a = np.ascontiguousarray(a)
        y = self._products(a)  # [C, blocks, R·2T]
        if first:
            y = np.concatenate((kept, y), axis=1)  # type: ignore[arg-type]
        self._partial = y[:, p_count:need]
        # z[c, b, (r, t)]: block b against basis row r at tone t; frame p is
        # Σ_j Σ_r combine[j, r, t]·z[c, p + j, r, t]: the N/H blocks from p on, flattened
        # (a sliding view, copied: frames share blocks), times the group's combine matrix.
        z = y.view(np.complex64)
        sc, sb, se = z.strides
        width = r1 * z.shape[2]
        win = np.ascontiguousarray(
            np.ndarray((c, p_count, width), dtype=np.complex64, buffer=z, strides=(sc, sb, se))
        )
        if len(self._group_rows) == 1:
            result: np.ndarray = win @ self._combine[0]
            return result
        out = np.empty((c, p_count, self._combine.shape[2]), dtype=np.complex64)
        for g, sel in enumerate(self._group_rows):
            out[sel] = win[sel] @ self._combine[g]
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

    def frames_ready(self, samples: int) -> int:
        """Frames that ``samples`` more samples (with no gap) would complete."""
        length = self._held.held + int(samples)
        return (length - self.grid.n) // self.grid.hop + 1 if length >= self.grid.n else 0

    def reset(self, next_index: int | None = None) -> None:
        """Discard the partial frame (a gap); assembly restarts at ``next_index``."""
        self._held.clear()
        self._partial = None
        if next_index is not None:
            self._next_index = int(next_index)
        self._tail_start = self._next_index
        self.resets += 1

    def _as_block(self, block: np.ndarray) -> np.ndarray:
        x = np.asarray(block)
        if x.ndim == 1 and self.channels == 1:
            x = x[None, :]
        if x.ndim != 2 or x.shape[0] != self.channels:
            raise ValueError(f"block has shape {np.shape(block)}; expected ({self.channels}, n)")
        return x

    def _check_span(self, x: np.ndarray, first_index: int | None) -> int | None:
        """``first_index`` as an int (None: the stream goes on), after checking that every
        index of ``x`` fits int64 — before any state changes (see ``check_index_span``)."""
        k = self._next_index if first_index is None else first_index
        k = check_index_span(k, x.shape[1])
        return None if first_index is None else k

    def _accept(self, x: np.ndarray, first_index: int | None) -> int:
        """Append ``x`` [C, n] (after a gap check); return the number of frames now complete."""
        first_index = self._check_span(x, first_index)
        if first_index is not None and first_index != self._next_index:
            self.reset(first_index)
        self._next_index += x.shape[1]
        self._held.append(x)  # casts to float32
        return self.frames_ready(0)

    def _consume(self, p_count: int) -> np.ndarray:
        """Drop the samples no later frame needs; return the frames' start indices."""
        hop = self.grid.hop
        start = self._tail_start + hop * np.arange(p_count, dtype=np.int64)
        self._held.consume(p_count * hop)
        self._tail_start += p_count * hop
        self.frames_out += p_count
        return start

    def _remove_tone_dc(self, tones: np.ndarray, x0: np.ndarray) -> None:
        """X(f) −= X[0]·W(f)/S1 in place for ``tones`` [C, P, T], ``x0`` float32 [C, P] the
        frames' DC lines (real): the tones of w·(x − c), as the lines (module docstring)."""
        tones -= x0[..., None] * self._tone_dc[:, None, :]

    def _remove_dc(self, spec: np.ndarray) -> None:
        """X[..., q] −= X[..., 0]·W[q]/W[0] in place, on the first lines of ``spec``
        [..., L] that a constant reaches (q = 1 … min(span, L) − 1); X[..., 0] is kept.

        X[0] = Σ w·x and W[q] are real, so only the real parts change: they are every
        other float of the complex64 lines."""
        m = min(self._dc_shape.size, spec.shape[-1] - 1)
        if m:
            v = spec.view(np.float32)
            v[..., 2 : 2 + 2 * m : 2] -= v[..., :1] * self._dc_shape[:m]

    def _tones_empty(self, p_count: int) -> np.ndarray:
        return np.zeros((self.channels, p_count, self._tone_count), dtype=np.complex64)

    def push(self, block: np.ndarray, first_index: int | None = None) -> FrameBatch:
        """Append ``block`` (float32[C, n], any n ≥ 0) and return the frames it completed.

        ``first_index`` (optional) is the stream index of ``block[:, 0]``; a value other
        than :attr:`next_index` is a gap and restarts frame assembly there.

        Parameters
        ----------
        block : ndarray
            float32 [C, n] samples, any unit, any n ≥ 0.
        first_index : int, optional
            Stream index of the block's first sample; another than the next expected one is a gap.

        Returns
        -------
        FrameBatch
            The frames this block completed (P may be 0).
        """
        p_count = self._accept(self._as_block(block), first_index)
        if not p_count:
            spectra = np.zeros((self.channels, 0, self.grid.bins), dtype=np.complex64)
            return FrameBatch(start=self._consume(0), spectra=spectra, tones=self._tones_empty(0))
        n = self.grid.n
        frames = self._held.frames(n, self.grid.hop, p_count)
        if self._work.shape[1] < p_count:
            self._work = np.empty((self.channels, p_count, n), dtype=np.float32)
        # Reused buffer: the FFT input is not freshly allocated (and page-faulted) each push.
        windowed = np.multiply(frames, self._w32, out=self._work[:, :p_count])
        if not self._kernel.shape[2]:
            tones = self._tones_empty(p_count)
        elif self._per_frame:
            tones = self._tones_blocks(p_count)
        else:
            tones = self._tones_direct(windowed)
        # The windowed frames are our scratch: let the FFT reuse them (after the tones).
        spectra = scipy.fft.rfft(windowed, axis=-1, workers=1, overwrite_x=True)
        self._remove_dc(spectra)
        if self.remove_dc and tones.shape[2]:
            self._remove_tone_dc(tones, spectra[..., 0].real)
        return FrameBatch(start=self._consume(p_count), spectra=spectra, tones=tones)

    def _window_table(self, weights: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """([P, N] float32 √a_p·w[k], [P] float32 1/√a_p or 0 where √a_p is (nearly) 0, the
        indices of those frames), cached for a few frames a push (steady-state weights
        repeat every push; a long block's table is made once and not kept)."""
        key = (weights.size, weights.tobytes())
        made = self._tables.get(key)
        if made is None:
            root = np.sqrt(weights).astype(np.float32)
            inverse = np.zeros_like(root)
            np.divide(1.0, root, out=inverse, where=root > 1e-30)
            made = (root[:, None] * self._w32, inverse, np.flatnonzero(inverse == 0.0))
            if weights.size <= 16:
                if len(self._tables) > 16:
                    self._tables.clear()
                self._tables[key] = made
        return made

    def push_power(
        self,
        block: np.ndarray,
        weights: np.ndarray,
        *,
        lines: int | None = None,
        first_index: int | None = None,
    ) -> PowerBatch:
        """Append ``block`` like :meth:`push`; return the completed frames folded over frames.

        ``weights`` (P non-negative numbers, P = :meth:`frames_ready` of the block's length,
        after any gap) are the frames' weights a_p: the result's ``power`` is
        Σ_p a_p·|X[c, p, q]|² (float32, unscaled |X|² as in :class:`FrameBatch`) for the
        first ``lines`` lines (default: ``grid.analysis_bins``). Equal to squaring
        ``push(block).spectra`` and summing with those weights, to float32 rounding; the
        spectra of all channels are never held at once.

        Parameters
        ----------
        block : ndarray
            float32 [C, n] samples, any unit.
        weights : ndarray
            Weight a_p of each completed frame (P of them: :meth:`frames_ready`).
        lines : int, optional
            Lines L kept (default the grid's).
        first_index : int, optional
            Stream index of the block's first sample, as in :meth:`push`.

        Returns
        -------
        PowerBatch
            The completed frames folded over frames.
        """
        q = self.grid.analysis_bins if lines is None else int(lines)
        if not (1 <= q <= self.grid.bins):
            raise ValueError(f"lines={lines!r} must be in [1, {self.grid.bins}]")
        a = np.asarray(weights, dtype=np.float64).reshape(-1)
        x = self._as_block(block)
        first_index = self._check_span(x, first_index)
        if first_index is not None and first_index != self._next_index:
            self.reset(first_index)
        p_count = self.frames_ready(x.shape[1])
        if a.size != p_count or not all(0.0 <= v < np.inf for v in a.tolist()):
            raise ValueError(
                f"weights has {a.size} values; the block completes {p_count} frames, "
                "each needs a finite weight >= 0"
            )
        c_count = self.channels
        self._accept(x, None)
        if not p_count:
            power = np.zeros((c_count, q), dtype=np.float32)
            return PowerBatch(start=self._consume(0), power=power, tones=self._tones_empty(0))
        power = np.empty((c_count, q), dtype=np.float32)
        n = self.grid.n
        frames = self._held.frames(n, self.grid.hop, p_count)
        if not self._kernel.shape[2]:
            tones = self._tones_empty(p_count)
        elif self._per_frame:
            tones = self._tones_blocks(p_count)
        else:  # the hop does not divide N: tones on windowed frames, as push does
            if self._work.shape[1] < p_count:
                self._work = np.empty((c_count, p_count, n), dtype=np.float32)
            tones = self._tones_direct(np.multiply(frames, self._w32, out=self._work[:, :p_count]))
        table, inverse_root, lost = self._window_table(a)
        # Channels per chunk: about _CHUNK_FRAMES frames, whole groups of lanes.
        step = max(1, _CHUNK_FRAMES // p_count)
        while step > 1 and (step * p_count) % _FFT_LANES:
            step -= 1
        step = min(step, c_count)
        rows = -(-step * p_count // _FFT_LANES) * _FFT_LANES
        if self._chunk.shape[0] < rows:
            self._chunk = np.zeros((rows, n), dtype=np.float32)
            self._spec = np.empty((rows, self.grid.bins), dtype=np.complex64)
        sums = np.empty((step, 2 * q), dtype=np.float32)
        # The frames' DC lines, for the tones' DC (√a_p·X[p, 0] until divided below).
        x0 = None
        if self.remove_dc and tones.shape[2]:
            x0 = np.empty((c_count, p_count), np.float32)
        for c0 in range(0, c_count, step):
            c1 = min(c_count, c0 + step)
            used = (c1 - c0) * p_count
            pad = -(-used // _FFT_LANES) * _FFT_LANES
            work = self._chunk[:used].reshape(c1 - c0, p_count, n)
            np.multiply(frames[c0:c1], table, out=work)
            if pad > used:
                self._chunk[used:pad] = 0.0  # the FFT may have left anything there
            spec = _rfft_into(self._chunk[:pad], self._spec[:pad])
            # The weights are linear in x: √a_p·X[p, 0] carries the same √a_p as the lines.
            self._remove_dc(spec[:used, :q])
            if x0 is not None:
                x0[c0:c1] = spec[:used, 0].real.reshape(c1 - c0, p_count)
            # Σ_p of re² and im² on the interleaved floats, then the pairs. Squaring in place
            # and adding frames beats one einsum (whose loop here is not vectorised): 23 vs
            # 29 µs for 12 frames, measured.
            v = spec[:used, :q].view(np.float32).reshape(c1 - c0, p_count, 2 * q)
            np.square(v, out=v)
            sm = sums[: c1 - c0]
            if p_count == 1:
                sm = v[:, 0]
            else:
                np.add(v[:, 0], v[:, 1], out=sm)
                for i in range(2, p_count):
                    sm += v[:, i]
            np.add(sm[:, 0::2], sm[:, 1::2], out=power[c0:c1])
        if x0 is not None:
            x0 *= inverse_root  # √a_p·X[p, 0] → X[p, 0]
            if lost.size:  # a frame weighted (nearly) 0: its DC line directly
                x0[:, lost] = frames[:, lost] @ self._w32
            self._remove_tone_dc(tones, x0)
        return PowerBatch(start=self._consume(p_count), power=power, tones=tones)

"""Demodulated (envelope) spectrum for rolling-element bearing faults.

Knows nothing about streams, I/O, alarms or the service; numpy and scipy only.

A local fault on a race or rolling element strikes once per pass and rings a structural
resonance, usually kHz, that the spectrum shows only as a broad hump. Band-passing around
that resonance, taking the Hilbert envelope and transforming the envelope brings back the
strike rate (BPFO, BPFI, BSF, FTF and their harmonics, sidebands) as lines at low frequency
(Randall & Antoni 2011, MSSP 25(2)).
"""

from __future__ import annotations

import numpy as np
import scipy.fft
import scipy.signal

from .types import WindowName
from .windows import DEFAULT_KAISER_BETA, get_window

__all__ = ["EnvelopeStream", "envelope_spectrum"]


def envelope_spectrum(
    x: np.ndarray,
    fs: float,
    lo_hz: float,
    hi_hz: float,
    *,
    window: WindowName = "hann",
    order: int = 4,
    beta: float = DEFAULT_KAISER_BETA,
) -> tuple[np.ndarray, np.ndarray]:
    """Envelope spectrum of ``x`` after band-passing ``lo_hz``…``hi_hz``: RMS amplitude per line.

    ``x`` is (C, n) or (n,) in any unit (e.g. m/s²), sampled at ``fs`` Hz; 0 < lo_hz <
    hi_hz < fs/2. Steps, all in float64:

    1. zero-phase band-pass: Butterworth of ``order`` (per edge; the band-pass has 2·order
       poles) as second-order sections, run forward and backward (``sosfiltfilt``), so the
       gain is |H|² and there is no delay;
    2. envelope e[k] = |analytic signal| (``scipy.signal.hilbert``), minus its mean;
    3. E = rfft(w·e) with the periodic ``window`` w (``beta`` for Kaiser), scaled as the
       RMS amplitude of the envelope per line, √2·|E[q]|/S1 with S1 = Σw (DC and Nyquist
       |E[q]|/S1) — Heinzel et al. 2002 §9 linear spectrum.

    Returns ``(f_hz, amplitude_rms)``: f[q] = q·fs/n in Hz, q = 0…n//2, and amplitudes of
    shape (C, n//2+1) or (n//2+1,) in the unit of x. An amplitude-modulated carrier
    a·(1 + m·cos 2πf_m t)·cos 2πf_c t with f_c ± f_m inside the band gives an envelope line
    of a·m/√2 RMS at f_m.

    Parameters
    ----------
    x : ndarray
        Samples, (C, n) or (n,), in any unit (e.g. m/s²).
    fs : float
        Sample rate, Hz.
    lo_hz, hi_hz : float
        Band-pass edges, Hz (0 < lo_hz < hi_hz < fs/2).
    window : {'rectangular', 'hann', 'hamming', 'blackman-harris', 'flattop', 'kaiser'}, optional
        Window for the envelope's transform (default hann).
    order : int, optional
        Butterworth order per edge (default 4).
    beta : float, optional
        Kaiser β (default 8.6).

    Returns
    -------
    f_hz : ndarray
        Line frequencies q·fs/n, Hz, q = 0…n//2.
    amplitude_rms : ndarray
        Envelope RMS amplitude per line, (C, n//2+1) or (n//2+1,), in the unit of x.
    """
    data = np.asarray(x, dtype=np.float64)
    if data.ndim not in (1, 2):
        raise ValueError(f"x must be (channels, samples) or (samples,), got shape {data.shape}")
    if not (np.isfinite(fs) and fs > 0):
        raise ValueError(f"fs={fs!r} must be a finite number > 0")
    if not (0 < lo_hz < hi_hz < fs / 2):
        raise ValueError(
            f"band lo_hz={lo_hz!r} … hi_hz={hi_hz!r} must satisfy 0 < lo_hz < hi_hz < fs/2 "
            f"= {fs / 2!r} Hz"
        )
    if isinstance(order, bool) or not isinstance(order, (int, np.integer)) or not 1 <= order <= 12:
        raise ValueError(f"order={order!r} must be an integer in [1, 12]")
    n = data.shape[-1]
    w = get_window(window, n, beta=beta)

    sos = scipy.signal.butter(int(order), [lo_hz, hi_hz], btype="bandpass", fs=fs, output="sos")
    # scipy's default padlen for these band-pass sections (none has a zero b2 or a2), made
    # explicit so that a too-short x gets our message; the window tapers the edge transients.
    padlen = 3 * (2 * sos.shape[0] + 1)
    if n <= padlen:
        raise ValueError(f"x has {n} samples; the order={order} band-pass needs more than {padlen}")
    band = scipy.signal.sosfiltfilt(sos, data, axis=-1, padlen=padlen)
    env = np.abs(scipy.signal.hilbert(band, axis=-1))
    env -= env.mean(axis=-1, keepdims=True)

    spec = np.abs(scipy.fft.rfft(env * w, axis=-1)) / w.sum()
    spec[..., 1:] *= np.sqrt(2.0)
    if n % 2 == 0:
        spec[..., -1] /= np.sqrt(2.0)  # Nyquist, like DC, has no negative-frequency twin
    f_hz = np.arange(n // 2 + 1, dtype=np.float64) * (fs / n)
    return f_hz, spec


class EnvelopeStream:
    """Streaming envelope: band-pass, full-wave rectify, decimate — for an envelope spectrum.

    ``push`` takes ``[C, n]`` samples at ``fs_in`` Hz (any unit) and returns the envelope,
    float32 ``[C, m]`` at ``fs_out`` = fs_in/R Hz, in the unit of the input. Steps:

    1. causal Butterworth band-pass ``lo_hz``…``hi_hz`` (``order`` per edge, second-order
       sections, ``scipy.signal.sosfilt`` with its state carried from block to block);
    2. full-wave rectification times π/2: for a narrow-band a(t)·cos(2πf_c t + φ) the mean of
       |cos| is 2/π, so after the low-pass this is the envelope a(t) (an AM line
       a·(1 + m·cos 2πf_m t) reads a·m/√2 RMS at f_m, as :func:`envelope_spectrum` gives);
    3. the FIR decimation chain :func:`dsp.chainplan.plan_chain` plans for ``fmax_hz``
       (``dsp.decimate.DecimationChain``), whose anti-alias low-pass removes the rectifier's
       products at 2f_c and above. Output indices keep meaning input indices
       (``content_index``; the band-pass's own delay, about 1/(hi − lo) s, is not removed).

    ``set_band`` moves the band (the filter restarts from rest: a transient of a few
    1/(hi − lo) s); a jump in ``first_index`` (a gap) restarts the band-pass and the chain.
    Needs ``fmax_hz`` < ``lo_hz`` < ``hi_hz`` < fs_in/2, so the rectifier's sum products
    (≥ 2·lo_hz) stay out of 0…Fmax.

    Parameters
    ----------
    channels : int
        Number of channels C.
    fs_in : float
        Input sample rate, Hz.
    lo_hz, hi_hz : float
        Band-pass edges, Hz.
    fmax_hz : float
        Highest envelope frequency wanted, Hz (the chain's Fmax).
    order : int, optional
        Butterworth order per edge (default 4).
    """

    def __init__(self, channels: int, fs_in: float, lo_hz: float, hi_hz: float,
                 fmax_hz: float, *, order: int = 4) -> None:
        from .chainplan import plan_chain
        from .decimate import DecimationChain

        if isinstance(channels, bool) or not isinstance(channels, (int, np.integer)) or (
            channels < 1
        ):
            raise ValueError(f"channels={channels!r} must be an integer of at least 1")
        if not (np.isfinite(fs_in) and fs_in > 0):
            raise ValueError(f"fs_in={fs_in!r} must be a finite number > 0")
        if isinstance(order, bool) or not isinstance(order, (int, np.integer)) or not (
            1 <= order <= 12
        ):
            raise ValueError(f"order={order!r} must be an integer in [1, 12]")
        if not (0 < fmax_hz < fs_in / 2.56):
            raise ValueError(f"fmax_hz={fmax_hz!r} must be in (0, fs_in/2.56 = "
                             f"{fs_in / 2.56:g}) Hz")
        self.channels, self.fs_in, self.order = int(channels), float(fs_in), int(order)
        self.fmax_hz = float(fmax_hz)
        self.chain = DecimationChain(self.channels, plan_chain(self.fs_in, self.fmax_hz))
        self.fs_out = self.chain.fs_out
        self.factor = self.chain.factor
        self._next_in = 0
        self.set_band(lo_hz, hi_hz)

    def set_band(self, lo_hz: float, hi_hz: float) -> None:
        """Band-pass ``lo_hz``…``hi_hz`` Hz from now on; the filter restarts from rest."""
        if not (self.fmax_hz < lo_hz < hi_hz < self.fs_in / 2):
            raise ValueError(
                f"band lo_hz={lo_hz!r} … hi_hz={hi_hz!r} must satisfy fmax_hz = "
                f"{self.fmax_hz:g} < lo_hz < hi_hz < fs_in/2 = {self.fs_in / 2:g} Hz"
            )
        self.lo_hz, self.hi_hz = float(lo_hz), float(hi_hz)
        self._sos = scipy.signal.butter(self.order, [lo_hz, hi_hz], btype="bandpass",
                                        fs=self.fs_in, output="sos")
        self._zi = np.zeros((self._sos.shape[0], self.channels, 2))

    @property
    def next_index(self) -> int:
        """Output index of the next envelope sample."""
        return self.chain.next_index

    @property
    def first_settled_index(self) -> int:
        """First output index clear of the chain's start-up after the last (re)start."""
        return self.chain.first_settled_index

    def content_index(self, k_out: int) -> int:
        """Input index output ``k_out`` stands for (the chain's delay removed)."""
        return int(self.chain.content_index(k_out))

    def push(self, block: np.ndarray, first_index: int | None = None) -> np.ndarray:
        """Envelope of one block ``[C, n]`` whose first sample has index ``first_index``
        (default: right after the previous block): float32 ``[C, m]`` at ``fs_out``."""
        x = np.asarray(block, dtype=np.float64)
        if x.ndim != 2 or x.shape[0] != self.channels:
            raise ValueError(f"block must be ({self.channels}, n), got shape {x.shape}")
        if first_index is None:
            first_index = self._next_in
        if first_index != self._next_in:
            self._zi[:] = 0.0  # a gap: the band-pass starts again from rest
        self._next_in = int(first_index) + x.shape[1]
        band, self._zi = scipy.signal.sosfilt(self._sos, x, axis=-1, zi=self._zi)
        env = np.abs(band) * (np.pi / 2)
        return self.chain.push(env, first_index=int(first_index))

"""The frame grid of a stream: frame length N, hop H and sample rate fs, and what follows
from them (line spacing, lines up to Fmax, frame times). :mod:`dsp.filterbank` cuts frames
on this grid; knows nothing about windows or transforms."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["FMAX_RATIO", "FrameGrid"]

# fs = 2.56·Fmax and N = 2.56·lines (common practice: leaves room for the anti-alias roll-off)
FMAX_RATIO = 2.56


@dataclass(frozen=True)
class FrameGrid:
    """Frame length ``n`` (samples), hop ``hop`` (samples) and sample rate ``fs`` (Hz).

    Parameters
    ----------
    fs : float
        Sample rate, Hz (> 0).
    n : int
        Frame length N, samples (≥ 8).
    hop : int
        Samples between frame starts, 1…N.
    keep : int, optional
        Lines analysed, 0…keep−1 (1…N/2+1; default all N/2+1). ``from_fmax`` keeps lines+1.
    """

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
        """Frame length N/fs in seconds."""
        return self.n / self.fs

    @property
    def hop_s(self) -> float:
        """Hop H/fs in seconds."""
        return self.hop / self.fs

    @property
    def overlap(self) -> float:
        """Overlap 1 − H/N as a fraction in [0, 1)."""
        return 1.0 - self.hop / self.n

    def frequencies(self) -> np.ndarray:
        """f[q] = q·fs/N in Hz, q = 0…N/2 (float64)."""
        return np.arange(self.bins, dtype=np.float64) * self.df_hz

"""The front end of an envelope profile: the streaming envelope of a channel and, for
``band = "auto"``, the kurtogram that chooses (and holds) its band.

Runs on the source's worker thread inside ``service.profiles.ProfileBank``; knows the dsp
API and nothing of config files, asyncio, HTTP or storage."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from dsp.envelope import EnvelopeStream
from dsp.kurtogram import Kurtogram, KurtogramBand, fast_kurtogram

__all__ = [
    "CONFIRM", "MIN_GAIN", "REL_GAIN", "Z_MIN", "EnvelopeFront", "EnvelopeSetup", "keeps_band",
]

# Hysteresis of the automatic band (our choice): a challenger must beat the held band's
# kurtosis in the same kurtogram by max(MIN_GAIN, REL_GAIN·|held|), in CONFIRM kurtograms
# running, before the band changes; every change restarts the band-pass (a short transient).
MIN_GAIN = 0.1
REL_GAIN = 0.2
CONFIRM = 2
# Only a band whose kurtosis stands Z_MIN noise spreads (Kurtogram.noise_spread) above 0 is
# taken: Gaussian noise reads up to ~4 spreads somewhere in a kurtogram of a few hundred
# bands (its estimates' tail is heavier than a normal one's at the deepest levels). Until
# one is found the band is the broad default DEFAULT_LO_FMAX·Fmax … HI_FRACTION·fs.
Z_MIN = 6.0
DEFAULT_LO_FMAX = 2.5
HI_FRACTION = 0.45  # the band-pass's upper edge at most this × fs (Butterworth needs < fs/2)


@dataclass(frozen=True)
class EnvelopeSetup:
    """An envelope profile's demodulation: ``band`` (lo_hz, hi_hz) or None for automatic,
    and the kurtogram's interval and length (s) and depth."""

    band: tuple[float, float] | None
    interval_s: float = 10.0
    length_s: float = 1.0
    levels: int = 6


def keeps_band(held: float, challenger: float) -> bool:
    """Does a band of kurtosis ``held`` stay against one of ``challenger`` (same kurtogram)?"""
    return challenger - held <= max(MIN_GAIN, REL_GAIN * abs(held))


class EnvelopeFront:
    """The envelope of ``channels`` channels for an envelope profile whose analysis runs at
    ``fmax_hz``: one channel in automatic mode (its band is its own), any number sharing a
    fixed band (one vectorised band-pass and chain).

    ``push(x[C, n], first_index)`` returns the settled envelope samples and the output index
    of the first, or None while nothing is settled. In automatic mode the band starts as
    the broad default and follows the kurtogram from its first significant band on. Output
    indices are those of the decimation chain (``content_index`` maps them to input indices).
    """

    def __init__(self, fs_in: float, fmax_hz: float, setup: EnvelopeSetup,
                 channels: int = 1) -> None:
        if setup.band is None and channels != 1:
            raise ValueError(f"an automatic band is one channel's own, not {channels}'s")
        self.fs_in, self.fmax_hz, self.setup = float(fs_in), float(fmax_hz), setup
        self.channels = int(channels)
        self.stream: EnvelopeStream | None = None
        self.kurtogram: Kurtogram | None = None
        self.kurtogram_index = -1  # input index just after the samples it analysed
        self.held_kurtosis: float | None = None
        self.chosen = False  # the band in use came from a kurtogram (not the default)
        self.changes = 0
        self._challenger: tuple[float, int] | None = None
        self._wins = 0
        self.notes: list[str] = []
        ring = max(256, int(round(setup.length_s * self.fs_in)))
        self._ring = np.zeros(ring, dtype=np.float64)
        self._filled = 0
        self._next_in: int | None = None
        self._since = 0  # input samples since the latest kurtogram
        if setup.band is not None:
            lo, hi = setup.band
            top = HI_FRACTION * self.fs_in
            if hi > top:
                self.notes.append(f"envelope band {lo:g}-{hi:g} Hz: this {self.fs_in:g} Hz "
                                  f"stream reaches {top:g} Hz; the band stops there")
                hi = top
            if not lo < hi:
                raise ValueError(f"envelope band {setup.band!r} lies above this "
                                 f"{self.fs_in:g} Hz stream's reach ({top:g} Hz)")
            self.stream = EnvelopeStream(self.channels, self.fs_in, lo, hi, self.fmax_hz)
        else:
            lo, hi = DEFAULT_LO_FMAX * self.fmax_hz, HI_FRACTION * self.fs_in
            if not lo < hi:
                raise ValueError(f"fmax_hz={self.fmax_hz:g} leaves no envelope band below "
                                 f"{hi:g} Hz in this {self.fs_in:g} Hz stream")
            self.stream = EnvelopeStream(1, self.fs_in, lo, hi, self.fmax_hz)

    @property
    def band(self) -> tuple[float, float]:
        """The band-pass in use (lo_hz, hi_hz)."""
        assert self.stream is not None  # set in __init__
        return (self.stream.lo_hz, self.stream.hi_hz)

    @property
    def auto(self) -> bool:
        return self.setup.band is None

    def content_index(self, k_out: int) -> int:
        """Input index envelope output ``k_out`` stands for."""
        return 0 if self.stream is None else self.stream.content_index(k_out)

    def _remember(self, x: np.ndarray) -> None:
        n, size = x.size, self._ring.size
        if n >= size:
            self._ring[:] = x[-size:]
        else:
            self._ring = np.roll(self._ring, -n)
            self._ring[-n:] = x
        self._filled = min(size, self._filled + n)

    def choose(self, end_index: int) -> None:
        """Run the kurtogram on the samples kept and move the band if a better one has won
        CONFIRM times running (the first choice is taken at once)."""
        x = self._ring[-self._filled:]
        nlevel = min(self.setup.levels, int(math.log2(x.size)) - 7)
        if nlevel < 1:
            return
        kg = fast_kurtogram(x, self.fs_in, nlevel=nlevel)
        self.kurtogram, self.kurtogram_index = kg, end_index
        held = self.band
        now = kg.kurtosis_at(*held)
        self.held_kurtosis = now
        best = kg.best_within(self.fmax_hz * (1 + 1e-9), self.fs_in / 2, z_min=Z_MIN)
        if best is None:
            return  # nothing impulsive enough: keep the band
        if not self.chosen:  # the default band gives way to the first significant one
            self._take(best, end_index)
            return
        if keeps_band(now, best.kurtosis) or abs(best.lo_hz - held[0]) < 1e-6 * self.fs_in:
            self._challenger, self._wins = None, 0
            return
        key = (best.level, best.index)
        self._wins = self._wins + 1 if self._challenger == key else 1
        self._challenger = key
        if self._wins >= CONFIRM:
            self._take(best, end_index)

    def _take(self, b: KurtogramBand, end_index: int) -> None:
        lo, hi = b.lo_hz, min(b.hi_hz, HI_FRACTION * self.fs_in)
        if not lo < hi:
            return
        assert self.stream is not None
        self.stream.set_band(lo, hi)
        self.changes += 1
        self.chosen = True
        self.held_kurtosis = b.kurtosis
        self._challenger, self._wins = None, 0

    def push(self, x: np.ndarray, first_index: int) -> tuple[np.ndarray, int] | None:
        """The envelope of one block ``x`` [C, n] (engineering units) whose first sample
        has input index ``first_index``: (samples [C, m], output index of the first)."""
        if self.auto:
            if self._next_in is not None and first_index != self._next_in:
                self._filled, self._since = 0, 0  # a gap: keep no samples from before it
            self._next_in = first_index + x.shape[1]
            self._remember(x[0].astype(np.float64))
            self._since += x.shape[1]
            due = self.kurtogram is None or self._since >= self.setup.interval_s * self.fs_in
            if due and self._filled == self._ring.size:
                self._since = 0
                self.choose(self._next_in)
        assert self.stream is not None
        y = self.stream.push(x, first_index=first_index)
        nxt, settled = self.stream.next_index, self.stream.first_settled_index
        k0 = nxt - y.shape[1]
        if k0 < settled:
            y, k0 = y[:, min(settled - k0, y.shape[1]):], settled
        if not y.shape[1]:
            return None
        return y, k0

    def as_dict(self) -> dict[str, object]:
        """The band in use and the latest kurtogram (JSON)."""
        band = self.band
        return {
            "mode": "auto" if self.auto else "fixed",
            "band": {"lo_hz": band[0], "hi_hz": band[1]},
            "chosen": self.chosen,
            "band_kurtosis": self.held_kurtosis,
            "changes": self.changes,
            "kurtogram": None if self.kurtogram is None else self.kurtogram.as_dict(),
            "kurtogram_end_index": self.kurtogram_index if self.kurtogram else None,
            "notes": list(self.notes),
        }

"""A growable first-in first-out sample buffer for streaming stages ([C, n] float32 blocks).

Knows nothing about frames, filters or the service; shared by the filter bank and decimators."""

from __future__ import annotations

import numpy as np


class SampleBuffer:
    """Samples not yet consumed, appended in blocks and consumed from the front.

    Held samples live in ``buf[:, lo:hi]``; a block is written after them and the held
    region moves to the front only when the buffer's end is reached (growing the buffer
    for a block larger than it), so each sample is copied about once — no concatenation
    per push. :meth:`view` is a view, valid until the next :meth:`append`.
    """

    def __init__(self, channels: int, capacity: int) -> None:
        self.channels = int(channels)
        self._buf = np.empty((self.channels, max(1, int(capacity))), dtype=np.float32)
        self._lo = self._hi = 0

    @property
    def held(self) -> int:
        """Samples held per channel."""
        return self._hi - self._lo

    def view(self, length: int | None = None) -> np.ndarray:
        """The held samples ``[C, held]`` (or the first ``length`` of them) as a view."""
        hi = self._hi if length is None else self._lo + int(length)
        return self._buf[:, self._lo : hi]

    def frames(self, n: int, hop: int, count: int) -> np.ndarray:
        """``count`` overlapping frames ``[C, count, n]`` of the held samples, ``hop`` apart,
        the first starting at the first held sample: a read-only strided view (no copy),
        valid until the next :meth:`append`. Needs ``(count − 1)·hop + n <= held``."""
        if count < 0 or (count and (count - 1) * hop + n > self.held):
            raise ValueError(
                f"{count} frames of {n} samples, {hop} apart, need more than "
                f"the {self.held} samples held"
            )
        b = self._buf
        step = b.strides[1]
        # The ndarray constructor on the buffer's memory: a strided view at a fraction of the
        # cost of sliding_window_view (which matters for one channel, a few frames a push).
        v: np.ndarray = np.ndarray(
            (self.channels, count, n),
            dtype=np.float32,
            buffer=b,
            offset=self._lo * step,
            strides=(b.strides[0], hop * step, step),
        )
        v.flags.writeable = False
        return v

    def append(self, x: np.ndarray) -> None:
        """Add ``x`` ([C, k], cast to float32) after the held samples."""
        k = x.shape[1]
        held = self.held
        if self._hi + k > self._buf.shape[1]:
            if held + k > self._buf.shape[1]:  # a block bigger than the buffer: grow it
                grown = np.empty((self.channels, 2 * (held + k)), dtype=np.float32)
                grown[:, :held] = self._buf[:, self._lo : self._hi]
                self._buf = grown
            else:
                self._buf[:, :held] = self._buf[:, self._lo : self._hi]
            self._lo, self._hi = 0, held
        self._buf[:, self._hi : self._hi + k] = x
        self._hi += k

    def consume(self, k: int) -> None:
        """Drop the first ``k`` held samples."""
        self._lo += min(int(k), self.held)

    def clear(self, zeros: int = 0) -> None:
        """Forget everything; hold ``zeros`` zero samples (a restarted filter's history)."""
        if zeros > self._buf.shape[1]:
            self._buf = np.empty((self.channels, 2 * zeros), dtype=np.float32)
        self._lo, self._hi = 0, int(zeros)
        self._buf[:, :zeros] = 0.0

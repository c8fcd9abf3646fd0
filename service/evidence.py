"""Evidence capture: the waveform kept around alarm events, owned by a source's pipeline.

The pipeline's worker thread appends every block (:meth:`EvidenceCapture.append`); the event
loop asks for an event's waveform (:meth:`EvidenceCapture.request`) and takes what is
complete (:meth:`EvidenceCapture.take`). Knows nothing about alarms, the store or HTTP."""

from __future__ import annotations

import collections
from dataclasses import dataclass

import numpy as np

from .types import SampleBlock

RING_SPARE_S = 1.0  # the ring keeps this much beyond before + after (our choice)


class WaveformRing:
    """The last ``seconds`` of a source's samples in engineering units, for alarm evidence.

    Sample k of the stream lives at column k mod L while end − L ≤ k < end. A gap empties
    the ring (a snippet never joins samples from either side of a gap)."""

    def __init__(self, channels: int, fs: float, seconds: float) -> None:
        self.length = max(1, int(round(fs * seconds)))
        self.buf = np.zeros((channels, self.length), dtype=np.float32)
        self.start = 0  # first valid stream index
        self.end = 0  # one past the last stored index

    def append(self, x: np.ndarray, first_index: int) -> None:
        if first_index != self.end:
            self.start = self.end = first_index
        n = x.shape[1]
        if n >= self.length:
            x, first_index = x[:, n - self.length :], first_index + n - self.length
            n = self.length
        pos = first_index % self.length
        head = min(n, self.length - pos)
        self.buf[:, pos : pos + head] = x[:, :head]
        self.buf[:, : n - head] = x[:, head:]
        self.end = first_index + n
        self.start = max(self.start, self.end - self.length)

    def snippet(self, row: int, lo: int, hi: int) -> tuple[np.ndarray, int]:
        """Samples [max(lo, start), min(hi, end)) of one channel and the first one's index."""
        lo, hi = max(lo, self.start), min(hi, self.end)
        if hi <= lo:
            return np.zeros(0, np.float32), lo
        idx = np.arange(lo, hi) % self.length
        return self.buf[row, idx].copy(), lo


@dataclass
class EvidenceRequest:
    """Keep the waveform around ``center_index`` (samples before/after) for an event."""

    event_id: int
    channel: str
    center_index: int
    before: int
    after: int
    spectrum: dict[str, object]


@dataclass
class Evidence:
    event_id: int
    channel: str
    spectrum: dict[str, object]
    waveform: np.ndarray  # float32, engineering units
    fs: float
    t0_ns: int


class EvidenceCapture:
    """One source's ring of recent samples, its pending requests and finished evidence.

    ``before_s``/``after_s``: the waveform kept before / after an event's sample index.
    Requests and finished evidence pass between the event loop and the worker thread
    through deques (whose append and popleft are thread-safe)."""

    def __init__(self, before_s: float, after_s: float) -> None:
        self.before_s, self.after_s = before_s, after_s
        self._ring: WaveformRing | None = None
        self._last_block: SampleBlock | None = None
        self._requests: collections.deque[EvidenceRequest] = collections.deque()
        self._ready: collections.deque[Evidence] = collections.deque()

    def restart(self, channels: int, fs: float) -> None:
        """A new, empty ring at the stream's (new) sample rate (worker thread)."""
        self._ring = WaveformRing(channels, fs, self.before_s + self.after_s + RING_SPARE_S)

    def request(self, event_id: int, channel: str, center_index: int,
                spectrum: dict[str, object], fs: float) -> None:
        """Ask for ``channel``'s waveform around ``center_index`` (event loop)."""
        self._requests.append(EvidenceRequest(
            event_id, channel, center_index, int(self.before_s * fs), int(self.after_s * fs),
            spectrum,
        ))

    def drop_requests(self) -> None:
        """Forget the pending requests (the analysis restarts after a failure)."""
        self._requests.clear()

    def append(self, x: np.ndarray, block: SampleBlock) -> None:
        """Keep ``block``'s samples ``x`` (engineering units) and complete every request
        whose waveform is now whole (worker thread)."""
        if self._ring is None:
            return
        self._last_block = block
        self._ring.append(x, block.first_index)
        self._complete(block)

    def finish(self) -> None:
        """Complete every pending request with what the ring holds (at shut-down)."""
        if self._requests and self._ring is not None and self._last_block is not None:
            self._complete(self._last_block, force=True)

    def latest(self, channel: str, seconds: float) -> tuple[np.ndarray, float, int] | None:
        """The newest ``seconds`` (at most what the ring holds) of ``channel``'s samples,
        engineering units: (float32 samples, fs, t0_ns of the first); None before any block
        or for a channel not in the stream (event loop, while the worker appends).

        The copy is checked after it is taken: if the worker wrapped round over it
        meanwhile, it is taken again (twice at most; the ring holds seconds, a read
        microseconds)."""
        ring, block = self._ring, self._last_block
        if ring is None or block is None or channel not in block.channel_ids:
            return None
        row = block.channel_ids.index(channel)
        for _ in range(3):
            block, end = self._last_block, ring.end
            assert block is not None
            lo = max(ring.start, end - max(1, round(seconds * block.fs)))
            wave, first = ring.snippet(row, lo, end)
            if ring.end - ring.length <= first:  # nothing of it overwritten while copying
                t0_ns = block.t0_ns + round((first - block.first_index) * 1e9 / block.fs)
                return wave, block.fs, t0_ns
        return None

    def take(self) -> list[Evidence]:
        """The evidence completed since the last call, oldest first (event loop)."""
        out = []
        while self._ready:
            out.append(self._ready.popleft())
        return out

    def _complete(self, block: SampleBlock, *, force: bool = False) -> None:
        ring = self._ring
        if ring is None:
            return
        rows = {c: i for i, c in enumerate(block.channel_ids)}
        for _ in range(len(self._requests)):
            req = self._requests.popleft()
            if (
                not force
                and ring.end < req.center_index + req.after
                and ring.start <= req.center_index
            ):
                self._requests.append(req)  # not due yet
                continue
            wave, first = ring.snippet(
                rows[req.channel], req.center_index - req.before, req.center_index + req.after
            )
            # integer ns plus a rounded offset: a float64 near today's epoch is 256 ns coarse
            t0_ns = block.t0_ns + round((first - block.first_index) * 1e9 / block.fs)
            self._ready.append(
                Evidence(req.event_id, req.channel, req.spectrum, wave, block.fs, t0_ns)
            )

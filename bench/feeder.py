"""Feeding a service under test: framed blocks encoded once and re-stamped, sent over one
TCP connection per source at real-time pace, with the send time of every block.

Knows the framed wire format (``service.wire``) and sockets; nothing of the service.
"""

from __future__ import annotations

import contextlib
import socket
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from service.wire import HEADER_SIZE, encode_frame, restamp_header

from .harness import LOOPBACK

__all__ = ["FeedLog", "Feeder", "FrameTemplate"]


class FrameTemplate:
    """One framed-format frame (``service.wire``) encoded once; ``frame(first_index, t_ns)``
    re-stamps the header's first-sample index and time (ns since the epoch) and its CRC-32
    (``service.wire.restamp_header``) without touching the payload, so the feeder's cost is a
    header."""

    def __init__(self, data: np.ndarray, fs: float) -> None:
        raw = encode_frame(np.asarray(data, dtype=np.float32), "f32le", fs, 0, 0)
        self.channels, self.n = np.asarray(data).shape
        self.head = bytearray(raw[:HEADER_SIZE])
        self.payload = bytes(raw[HEADER_SIZE:])

    def frame(self, first_index: int, t_ns: int) -> bytes:
        """The frame with sample index ``first_index`` (≥ 0) and header time ``t_ns`` (ns)."""
        restamp_header(self.head, first_index, t_ns)
        return bytes(self.head) + self.payload


def _signal(channels: int, n: int, fs: float, seed: int) -> np.ndarray:
    """Noise (0.05 g RMS) plus 0.5 g at 24.75 Hz and 0.2 g at 3120.3 Hz, float32[C, n]."""
    rng = np.random.default_rng(seed)
    k = np.arange(n)
    x = rng.normal(0.0, 0.05, (channels, n))
    x += 0.5 * np.sin(2 * np.pi * 24.75 * k / fs) + 0.2 * np.sin(2 * np.pi * 3120.3 * k / fs)
    return x.astype(np.float32)


@dataclass
class FeedLog:
    """Per source: (end index, wall time ns after the send) of every block sent."""

    sends: dict[str, list[tuple[int, int]]] = field(default_factory=dict)
    next_index: dict[str, int] = field(default_factory=dict)


class Feeder:
    """One connected TCP socket per source; sends pre-encoded frames at real-time pace.

    Header time of sample k is ``base_ns + k·1e9/fs`` on every source, so a message's
    ``timestamp_ns`` gives back its end index (``index_of_time``)."""

    def __init__(self, ports: dict[str, int], source_ids: Sequence[str], per_source: int, fs: float,
                 block: int, base_ns: int, gains: Mapping[str, Sequence[float]] | None = None
                 ) -> None:
        """``gains``: per source, a factor for each of its channels' signal (default 1 for
        ``per_source`` channels), e.g. to drive some machines over their alarm levels; its
        length is that source's channel count."""
        self.fs, self.block, self.base_ns = fs, block, base_ns
        self.ids = list(source_ids)
        gains = gains or {}
        self.templates = {
            sid: FrameTemplate(_signal(len(gains.get(sid, [0] * per_source)), block, fs, seed=i)
                               * np.asarray(gains.get(sid, [1.0] * per_source),
                                            dtype=np.float32)[:, None], fs)
            for i, sid in enumerate(self.ids)}
        self.log = FeedLog({sid: [] for sid in self.ids}, dict.fromkeys(self.ids, 0))
        self.socks: dict[str, socket.socket] = {}
        try:
            for sid in self.ids:
                s = socket.create_connection((LOOPBACK, ports[sid]), timeout=10.0)
                s.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
                self.socks[sid] = s
        except BaseException:
            self.close()
            raise

    def close(self) -> None:
        for s in self.socks.values():
            with contextlib.suppress(OSError):
                s.close()
        self.socks.clear()

    def restart(self, sid: str) -> bool:
        """Jump ``sid``'s index by one block (a gap) unless nothing was sent yet; True if so."""
        if not self.log.next_index[sid]:
            return False
        self.log.next_index[sid] += self.block
        return True

    def send_block(self, sid: str) -> None:
        k = self.log.next_index[sid]
        t_ns = self.base_ns + round(k * 1e9 / self.fs)
        self.socks[sid].sendall(self.templates[sid].frame(k, t_ns))
        k += self.block
        self.log.next_index[sid] = k
        self.log.sends[sid].append((k, time.time_ns()))

    def realtime(self, sources: Sequence[str], seconds: float) -> dict[str, float]:
        """Send ``seconds`` of blocks on ``sources``, each block when its last sample is due;
        returns the feeder's CPU seconds (this thread), wall seconds and worst lateness."""
        blocks = max(1, int(round(seconds * self.fs / self.block)))
        period = self.block / self.fs
        cpu0, t0 = time.thread_time(), time.monotonic()
        late = 0.0
        for b in range(blocks):
            due = t0 + (b + 1) * period
            wait = due - time.monotonic()
            if wait > 0:
                time.sleep(wait)
            else:
                late = max(late, -wait)
            for sid in sources:
                self.send_block(sid)
        return {"cpu_s": time.thread_time() - cpu0, "wall_s": time.monotonic() - t0,
                "max_late_ms": 1e3 * late, "blocks": blocks}

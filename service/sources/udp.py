"""UDP ingest: framed datagrams, one frame per datagram; gaps and reordering by sample index.

Knows nothing about the engine, the pipeline, the config file or HTTP.

Datagrams are handed on as they arrive (no reorder buffer, so no added latency). With
``expected`` the index just after the last accepted frame:

* ``first_index == expected`` — in order;
* ``first_index > expected`` — datagrams were lost or overtaken: a gap (``counters.gaps``);
* ``expected − late_window ≤ first_index < expected`` — late or duplicated: dropped and
  counted in ``extra["late"]``, since the samples after it have already gone downstream;
* further back than ``late_window`` samples — the producer restarted: a gap, accepted.

A datagram that is not exactly one valid frame, or whose channel count or sample rate
differ from the configuration, or whose payload exceeds ``max_frame_bytes``, is rejected
and counted in ``counters.malformed``. A UDP source expects one producer; several senders
interleave and show up as gaps and drops. With ``allow_from`` (CIDRs), datagrams from
other addresses are dropped unread and counted in ``extra["refused_peers"]``.
"""

from __future__ import annotations

import asyncio
import logging
import time
from collections.abc import Callable, Sequence

from ..wire import Frame, WireError, decode_datagram, default_max_frame_bytes
from .base import QueuedSource, parse_networks, peer_allowed

__all__ = ["UdpSource"]

log = logging.getLogger(__name__)


class UdpSource(QueuedSource):
    """Receives framed datagrams on ``host:port``; ``fs`` in Hz is the configured rate.
    ``late_window_s`` (s) sets how far back a datagram still counts as late rather than
    as a restarted producer. ``address`` gives the bound (host, port) after ``start()``."""

    kind = "udp"

    def __init__(
        self,
        source_id: str,
        channel_ids: Sequence[str],
        fs: float,
        host: str,
        port: int,
        *,
        late_window_s: float = 10.0,
        queue_blocks: int = 256,
        max_frame_bytes: int | None = None,
        allow_from: Sequence[str] | None = None,
        clock: Callable[[], int] = time.time_ns,
    ) -> None:
        super().__init__(source_id, channel_ids, fs, queue_blocks=queue_blocks, clock=clock)
        # present from the start, so metric series are stable
        self.counters.extra.update(dict.fromkeys(("late", "refused_peers"), 0))
        self.max_frame_bytes = (
            default_max_frame_bytes(len(self.channel_ids), fs)
            if max_frame_bytes is None else int(max_frame_bytes)
        )
        self.allow_from = parse_networks(allow_from)
        self._allow_text = None if allow_from is None else list(allow_from)
        self.host, self.port = host, port
        self.late_window = max(1, round(late_window_s * fs))
        self.address: tuple[str, int] | None = None
        self._transport: asyncio.DatagramTransport | None = None
        self._expected: int | None = None

    async def _start(self) -> None:
        loop = asyncio.get_running_loop()
        self._transport, _ = await loop.create_datagram_endpoint(
            lambda: _Receiver(self), local_addr=(self.host, self.port)
        )
        sock = self._transport.get_extra_info("sockname")
        self.address = (str(sock[0]), int(sock[1]))
        self.state = "listening"
        log.info("source %s: receiving on udp %s:%d", self.id, *self.address)

    async def _stop(self) -> None:
        if self._transport is not None:
            self._transport.close()

    def _on_datagram(self, datagram: bytes, addr: object) -> None:
        if self._closed:
            return
        if not peer_allowed(addr[0] if isinstance(addr, tuple) and addr else addr,
                            self.allow_from):
            self._refuse_peer(_addr_text(addr))
            return
        self.counters.bytes += len(datagram)
        try:
            frame = decode_datagram(datagram, self.max_frame_bytes)
        except WireError as e:
            self._reject(f"datagram from {_addr_text(addr)}: {e}")
            return
        problem = self._frame_problem(frame)
        if problem:
            self._reject(f"datagram from {_addr_text(addr)}: {problem}")
            return
        self._accept(frame)

    def _reject(self, reason: str) -> None:
        self.counters.malformed += 1
        self._error(reason)

    def _accept(self, frame: Frame) -> None:
        expected = self._expected
        k = frame.first_index
        if expected is not None and k != expected:
            if expected - self.late_window <= k < expected:
                self._bump("late")
                self._error(f"late datagram at index {k} (expected {expected}) dropped")
                return
            self.counters.gaps += 1
        self._expected = k + frame.n
        self._emit(frame.data, k, self._frame_t0_ns(frame))

    def _status_extra(self) -> dict[str, object]:
        addr = f"{self.address[0]}:{self.address[1]}" if self.address else None
        return {"listen": addr, "format": "framed", "next_index": self._expected,
                "max_frame_bytes": self.max_frame_bytes, "allow_from": self._allow_text}


class _Receiver(asyncio.DatagramProtocol):
    def __init__(self, source: UdpSource) -> None:
        self.source = source

    def datagram_received(self, data: bytes, addr: tuple[str | object, int]) -> None:
        self.source._on_datagram(data, addr)

    def error_received(self, exc: Exception) -> None:
        self.source._error(f"udp receive error: {exc}")


def _addr_text(addr: object) -> str:
    if isinstance(addr, tuple) and len(addr) >= 2:
        return f"{addr[0]}:{addr[1]}"
    return str(addr)

"""TCP ingest: quaver listens, one producer at a time streams raw or framed samples.

Knows nothing about the engine, the pipeline, the config file or HTTP.

* **One active producer.** While a producer is connected, another connection to the same
  source is closed at once, counted in ``counters.extra["refused"]`` and logged; the
  first producer is not disturbed. Producers may come and go over time.
* **Raw formats** carry no index: samples are numbered on arrival. A new connection after
  one that delivered samples starts ``GAP_SAMPLES`` further on and counts a gap, so frame
  assembly restarts instead of stitching two unrelated streams. ``t0_ns`` is the arrival
  time minus the duration of the samples in the block.
* **Framed format**: index and time come from each header (``t_ns`` 0 → arrival time as
  above); an index other than the previous frame's end is a gap. Frames whose channel
  count or sample rate differ from the configuration are rejected and counted.
* **Disconnects** are not errors: a producer leaving in the middle of a sample or frame
  counts one ``partial_frames`` (the held bytes are in ``extra["partial_bytes"]``).
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import time
from collections.abc import Callable, Sequence

from ..wire import RAW_FORMATS, FrameDecoder, decode_raw
from .base import GAP_SAMPLES, QueuedSource

__all__ = ["TcpSource"]

log = logging.getLogger(__name__)
TCP_FORMATS: tuple[str, ...] = (*RAW_FORMATS, "framed")


class TcpSource(QueuedSource):
    """Listens on ``host:port`` for one producer at a time; ``fmt`` is a raw format or
    ``"framed"``; ``fs`` in Hz is the configured sample rate. ``address`` gives the bound
    (host, port) after ``start()`` (useful with port 0)."""

    kind = "tcp"

    def __init__(
        self,
        source_id: str,
        channel_ids: Sequence[str],
        fs: float,
        host: str,
        port: int,
        fmt: str,
        *,
        queue_blocks: int = 256,
        read_bytes: int = 1 << 16,
        clock: Callable[[], int] = time.time_ns,
    ) -> None:
        if fmt not in TCP_FORMATS:
            raise ValueError(f"format={fmt!r} is not one of {', '.join(map(repr, TCP_FORMATS))}")
        super().__init__(source_id, channel_ids, fs, queue_blocks=queue_blocks, clock=clock)
        # present from the start, so metric series are stable
        self.counters.extra.update(dict.fromkeys(("refused", "partial_bytes"), 0))
        self.host, self.port, self.fmt = host, port, fmt
        self.read_bytes = read_bytes
        self.address: tuple[str, int] | None = None
        self.peer: str | None = None
        self._server: asyncio.Server | None = None
        self._writer: asyncio.StreamWriter | None = None
        self._handlers: set[asyncio.Task[object]] = set()
        self._next_index: int | None = None  # framed: expected first index of the next frame
        self._raw_index = 0  # raw: index of the next sample
        self._delivered = False  # raw: samples since the last restart

    async def _start(self) -> None:
        self._server = await asyncio.start_server(self._on_connect, self.host, self.port)
        sock = self._server.sockets[0].getsockname()
        self.address = (str(sock[0]), int(sock[1]))
        self.state = "listening"
        log.info("source %s: listening on %s:%d (%s)", self.id, *self.address, self.fmt)

    async def _stop(self) -> None:
        # Closing the transport ends the handler's read; cancelling the handler instead
        # makes asyncio's stream callback log a spurious error on Python 3.11.
        if self._server is not None:
            self._server.close()
        if self._writer is not None:
            self._writer.transport.abort()
        if self._handlers:
            await asyncio.wait(self._handlers, timeout=2.0)
        if self._server is not None:
            await self._server.wait_closed()

    async def _on_connect(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        peer = _peer_text(writer)
        if self._closed:
            writer.close()
            return
        if self._writer is not None:
            self._bump("refused")
            self._error(f"refused {peer}: producer {self.peer} is connected")
            log.warning("source %s: refused %s, producer %s is connected", self.id, peer, self.peer)
            writer.close()
            with contextlib.suppress(OSError):
                await writer.wait_closed()
            return
        task = asyncio.current_task()
        if task is not None:  # so aclose() can wait for it
            self._handlers.add(task)
        self._writer, self.peer = writer, peer
        self.counters.connections += 1
        self.state = "connected"
        log.info("source %s: producer %s connected", self.id, peer)
        try:
            await self._serve(reader)
        finally:
            self._writer, self.peer = None, None
            self.counters.disconnects += 1
            if not self._closed:
                self.state = "listening"
            writer.close()
            with contextlib.suppress(OSError, asyncio.CancelledError):
                await writer.wait_closed()
            if task is not None:
                self._handlers.discard(task)
            log.info("source %s: producer %s disconnected", self.id, peer)

    async def _serve(self, reader: asyncio.StreamReader) -> None:
        if self.fmt == "framed":
            held = await self._serve_framed(reader)
        else:
            held = await self._serve_raw(reader)
        if held:
            self.counters.partial_frames += 1
            self._bump("partial_bytes", held)
            self._error(
                f"producer left {held} bytes into an incomplete "
                + ("frame" if self.fmt == "framed" else "sample")
            )

    async def _read(self, reader: asyncio.StreamReader) -> bytes:
        try:
            chunk = await reader.read(self.read_bytes)
        except (ConnectionError, OSError) as e:
            self._error(f"connection from {self.peer}: {e}")
            return b""
        self.counters.bytes += len(chunk)
        return chunk

    async def _serve_raw(self, reader: asyncio.StreamReader) -> int:
        if self._delivered:  # a new stream: leave a visible jump
            self._raw_index += GAP_SAMPLES
            self.counters.gaps += 1
            self._delivered = False
        rest = b""
        while chunk := await self._read(reader):
            data, rest = decode_raw(rest + chunk, self.fmt, len(self.channel_ids))
            n = data.shape[1]
            if n:
                self._emit(data, self._raw_index, self._arrival_t0_ns(n))
                self._raw_index += n
                self._delivered = True
        return len(rest)

    async def _serve_framed(self, reader: asyncio.StreamReader) -> int:
        decoder = FrameDecoder()
        seen = 0
        while chunk := await self._read(reader):
            for frame in decoder.feed(chunk):
                problem = self._frame_problem(frame)
                if problem:
                    self.counters.malformed += 1
                    self._error(problem)
                    continue
                if self._next_index is not None and frame.first_index != self._next_index:
                    self.counters.gaps += 1
                self._next_index = frame.first_index + frame.n
                self._emit(frame.data, frame.first_index, self._frame_t0_ns(frame))
            if decoder.malformed != seen:
                self.counters.malformed += decoder.malformed - seen
                seen = decoder.malformed
                self._error(f"from {self.peer}: {decoder.last_reason}")
        return decoder.pending_bytes

    def _status_extra(self) -> dict[str, object]:
        addr = f"{self.address[0]}:{self.address[1]}" if self.address else None
        return {"listen": addr, "format": self.fmt, "producer": self.peer}


def _peer_text(writer: asyncio.StreamWriter) -> str:
    peer = writer.get_extra_info("peername")
    if isinstance(peer, tuple) and len(peer) >= 2:
        return f"{peer[0]}:{peer[1]}"
    return str(peer)

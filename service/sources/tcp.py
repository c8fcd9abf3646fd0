"""TCP ingest: quaver listens, one producer at a time streams raw or framed samples.

Knows nothing about the engine, the pipeline, the config file or HTTP.

* **One active producer.** While a producer is connected, another connection to the same
  source is closed at once, counted in ``counters.extra["refused"]`` and logged; the
  first producer is not disturbed. Producers may come and go over time.
* **Idle producers.** A producer that sends nothing for ``idle_timeout_s`` is dropped
  (``extra["idle_drops"]``, logged), which frees the slot for the next one. So a client
  that connects and sends nothing, or one that vanished without closing, holds the source
  for at most ``idle_timeout_s``.
* **allow_from** (CIDRs, None = anyone): other peers are closed before any byte is read
  (``extra["refused_peers"]``).
* **Raw formats** carry no index: samples are numbered on arrival. A new connection after
  one that delivered samples starts ``GAP_SAMPLES`` further on and counts a gap, so frame
  assembly restarts instead of stitching two unrelated streams. ``t0_ns`` is the arrival
  time minus the duration of the samples in the block.
* **Wrong format.** A raw source refuses a connection whose first bytes (the first read,
  at least a header's worth) hold a framed-format header (magic and header CRC):
  the connection is closed, ``malformed`` and ``extra["wrong_format"]`` count it and
  ``last_error`` says "this looks like framed data on a raw source". A raw f32le/f64le
  block (one read) in which more than ``IMPLAUSIBLE_SHARE`` of the values lie beyond
  ±1e15 (``service.wire.implausible_count``) is rejected and counted in ``malformed`` and
  ``extra["implausible_blocks"]``; its samples' indices are skipped, so the pipeline sees
  a gap rather than stitching the good samples on either side together.
* **Framed format**: index and time come from each header (``t_ns`` 0 → arrival time as
  above); an index other than the previous frame's end is a gap. Frames whose channel
  count or sample rate differ from the configuration are rejected and counted; a header
  declaring a payload over ``max_frame_bytes`` is malformed at once (no wait for it).
* **Disconnects** are not errors: a producer leaving in the middle of a sample or frame
  counts one ``partial_frames`` (the held bytes are in ``extra["partial_bytes"]``).
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import time
from collections.abc import Callable, Sequence

import numpy as np

from ..wire import (
    HEADER_SIZE,
    IMPLAUSIBLE_ABS,
    IMPLAUSIBLE_SHARE,
    MAGIC,
    STREAM_FORMATS,
    FrameDecoder,
    decode_raw,
    default_max_frame_bytes,
    framed_header_at,
    implausible_count,
)
from .base import GAP_SAMPLES, QueuedSource, parse_networks, peer_allowed

__all__ = ["TcpSource"]

log = logging.getLogger(__name__)
TCP_FORMATS = STREAM_FORMATS


FRAMED_READER_LIMIT = 1 << 18  # bytes; pause above 512 KiB buffered (our choice)


class TcpSource(QueuedSource):
    """Listens on ``host:port`` for one producer at a time; ``fmt`` is a raw format or
    ``"framed"``; ``fs`` in Hz is the configured sample rate. ``address`` gives the bound
    (host, port) after ``start()`` (useful with port 0). ``idle_timeout_s`` (s),
    ``max_frame_bytes`` (payload bytes; None: ``wire.default_max_frame_bytes``) and
    ``allow_from`` (CIDRs; None: anyone) as in the module docstring."""

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
        idle_timeout_s: float = 10.0,
        max_frame_bytes: int | None = None,
        allow_from: Sequence[str] | None = None,
        clock: Callable[[], int] = time.time_ns,
    ) -> None:
        if fmt not in TCP_FORMATS:
            raise ValueError(f"format={fmt!r} is not one of {', '.join(map(repr, TCP_FORMATS))}")
        if not idle_timeout_s > 0:
            raise ValueError(f"idle_timeout_s={idle_timeout_s!r} must be > 0 (s)")
        super().__init__(source_id, channel_ids, fs, queue_blocks=queue_blocks, clock=clock)
        # present from the start, so metric series are stable
        self.counters.extra.update(dict.fromkeys(
            ("refused", "partial_bytes", "idle_drops", "refused_peers")
            + (("wrong_format", "implausible_blocks") if fmt != "framed" else ()), 0))
        self.idle_timeout_s = float(idle_timeout_s)
        self.max_frame_bytes = (
            default_max_frame_bytes(len(self.channel_ids), fs)
            if max_frame_bytes is None else int(max_frame_bytes)
        )
        self.allow_from = parse_networks(allow_from)
        self._allow_text = None if allow_from is None else list(allow_from)
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
        self._last_rx = 0.0  # loop time of the producer's connect or latest bytes

    async def _start(self) -> None:
        # Framed: the stream reader pauses the socket above twice its limit; at the default
        # 64 KiB it paused and resumed it (two epoll changes) for every frame over 128 KiB.
        # FRAMED_READER_LIMIT holds a few such frames before the producer is held back (a
        # loop that falls behind must not hide seconds of samples in its own buffer), and
        # one read takes what is there.
        limit = FRAMED_READER_LIMIT if self.fmt == "framed" else 1 << 16
        self._server = await asyncio.start_server(self._on_connect, self.host, self.port,
                                                  limit=limit)
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
        if not peer_allowed(_peer_host(writer), self.allow_from):
            self._refuse_peer(peer)
            writer.transport.abort()
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
        self._last_rx = asyncio.get_running_loop().time()
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

    def _idle_drop(self, silent_s: float) -> None:
        self._bump("idle_drops")
        self._error(f"dropped producer {self.peer}: nothing received for {silent_s:.3g} s "
                    f"(idle_timeout_s = {self.idle_timeout_s:g})")
        log.warning("source %s: dropped idle producer %s after %.3g s without data",
                    self.id, self.peer, silent_s)

    def _frame_read_bytes(self) -> int:
        """Bytes of one framed read: at least a whole frame of the largest payload."""
        return max(self.read_bytes, self.max_frame_bytes + HEADER_SIZE)

    async def _read(self, reader: asyncio.StreamReader, size: int | None = None) -> bytes:
        try:
            async with asyncio.timeout(self.idle_timeout_s):
                chunk = await reader.read(self.read_bytes if size is None else size)
        except TimeoutError:
            if self._writer is not None and not self._closed:
                self._idle_drop(asyncio.get_running_loop().time() - self._last_rx)
            return b""
        except (ConnectionError, OSError) as e:
            self._error(f"connection from {self.peer}: {e}")
            return b""
        self._last_rx = asyncio.get_running_loop().time()
        self.counters.bytes += len(chunk)
        return chunk

    def _looks_framed(self, buf: bytes) -> bool:
        """Does ``buf`` (a stream's first bytes) hold a framed-format header? If so, count
        and report the mistake. Framed bytes arriving later are left to the value checks
        below and the pipeline's sensor checks."""
        pos = buf.find(MAGIC)
        while pos >= 0:
            if framed_header_at(buf, pos):
                self.counters.malformed += 1
                self._bump("wrong_format")
                self._warn("wrong_format",
                           f"refused {self.peer}: this looks like framed data on a raw source "
                           f"(a framed header at byte {pos} of the connection); this source "
                           f"reads raw {self.fmt}: send raw "
                           f"{self.fmt} (quaver feed --format {self.fmt}) or configure "
                           'format = "framed"')
                return True
            pos = buf.find(MAGIC, pos + 1)
        return False

    def _implausible(self, data: np.ndarray, n_values: int) -> bool:
        """Is this raw float block implausible for the format? If so, count and report it."""
        bad = implausible_count(data)
        if bad <= IMPLAUSIBLE_SHARE * n_values:
            return False
        self.counters.malformed += 1
        self._bump("implausible_blocks")
        self._warn("implausible",
                   f"from {self.peer}: {bad} of {n_values} values beyond ±{IMPLAUSIBLE_ABS:g} "
                   f"(or infinite): implausible as {self.fmt} samples; block rejected. Is the "
                   "producer sending another format (s16le/s32le, f32 vs f64, framed)?")
        return True

    async def _serve_raw(self, reader: asyncio.StreamReader) -> int:
        if self._delivered:  # a new stream: leave a visible jump
            self._raw_index += GAP_SAMPLES
            self.counters.gaps += 1
            self._delivered = False
        rest = b""
        head = True  # the stream's first HEADER_SIZE bytes are held and checked first
        check_values = self.fmt in ("f32le", "f64le")
        while chunk := await self._read(reader):
            buf = rest + chunk
            if head and len(buf) < HEADER_SIZE and buf[:4] == MAGIC[: len(buf)]:
                rest = buf  # it may be a framed header: wait for all of it before deciding
                continue
            if head and self._looks_framed(buf):
                return 0  # the connection closes before any sample is taken
            head = False
            data, rest = decode_raw(buf, self.fmt, len(self.channel_ids))
            n = data.shape[1]
            if n and check_values and self._implausible(data, data.size):
                self._raw_index += n  # the rejected samples' indices: a gap downstream
                continue
            if n:
                self._emit(data, self._raw_index, self._arrival_t0_ns(n))
                self._raw_index += n
                self._delivered = True
        return len(rest)

    async def _serve_framed(self, reader: asyncio.StreamReader) -> int:
        decoder = FrameDecoder(max_payload_bytes=self.max_frame_bytes)
        seen = 0
        size = self._frame_read_bytes()
        while chunk := await self._read(reader, size):
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
        return {"listen": addr, "format": self.fmt, "producer": self.peer,
                "idle_timeout_s": self.idle_timeout_s, "max_frame_bytes": self.max_frame_bytes,
                "allow_from": self._allow_text}


def _peer_host(writer: asyncio.StreamWriter) -> object:
    peer = writer.get_extra_info("peername")
    return peer[0] if isinstance(peer, tuple) and peer else peer


def _peer_text(writer: asyncio.StreamWriter) -> str:
    peer = writer.get_extra_info("peername")
    if isinstance(peer, tuple) and len(peer) >= 2:
        return f"{peer[0]}:{peer[1]}"
    return str(peer)

"""The source contract (``async for block in source`` yields SampleBlocks) and a queued base
class that keeps it: bounded hand-over, drop-oldest on overflow, counters, clean stop.

Knows nothing about the engine, the pipeline, the config file or HTTP.

Real-time contract
------------------
* **Producer side.** Socket callbacks and the file poller run on the event loop. They may
  not block, sleep or await the consumer: they decode what arrived, wrap an owned copy in
  one :class:`~service.types.SampleBlock` and hand it over with a call that never waits.
* **Overflow.** Blocks wait in a queue of ``queue_blocks``. When it is full the *oldest*
  queued block is dropped, ``counters.drops`` goes up and ``status()["overrun"]`` is true
  until the consumer has emptied the queue. Overflow is never an exception. The dropped
  block leaves a jump in ``first_index``, so the pipeline sees a gap.
* **Bad input** (malformed frames or rows, disconnects, truncation, rotation) is counted in
  ``counters`` with the latest reason in ``counters.last_error``; it never ends the stream.
  Warnings about repeated bad input are logged at most once per ``LOG_EVERY_S`` per kind.
* **Who may feed.** Network sources take ``allow_from`` (CIDRs; None = anyone): a peer
  outside it is refused before any byte is read, counted in ``extra["refused_peers"]``.
* **Sample index.** ``first_index`` counts samples since the source began. Any block whose
  ``first_index`` is not the previous block's ``first_index + n`` follows a gap; sources
  add ``GAP_SAMPLES`` to the index when a stream restarts (reconnect, truncation,
  rotation) so that the jump is visible, and count it in ``counters.gaps``.
* **Stopping.** ``await source.aclose()`` stops the producers, discards queued blocks and
  ends the iteration of a waiting consumer. A finite source (a replayed recording) ends
  the iteration after its last block. A setup fault (a port that cannot be bound, a
  recording that cannot be read) raises from ``start()``, which the first ``__anext__``
  calls if nobody did.
"""

from __future__ import annotations

import asyncio
import ipaddress
import logging
import time
from abc import ABC, abstractmethod
from collections.abc import AsyncIterator, Callable, Sequence
from typing import Any, ClassVar, Protocol, runtime_checkable

import numpy as np

from ..types import SampleBlock, SourceCounters
from ..wire import Frame

log = logging.getLogger("quaver.sources")

# A header clock that falls behind the samples' own pace by more than this has stepped back
# (e.g. a producer's clock corrected by NTP); our choice, well above network jitter.
CLOCK_STEP_BACK_NS = 1_000_000_000

__all__ = ["GAP_SAMPLES", "QueuedSource", "Source", "parse_networks", "peer_allowed"]

LOG_EVERY_S = 10.0  # a repeated warning of one kind is logged at most this often (our choice)

Network = ipaddress.IPv4Network | ipaddress.IPv6Network


def parse_networks(cidrs: Sequence[str] | None) -> tuple[Network, ...] | None:
    """``allow_from`` as networks (a bare address is a /32 or /128); None = anyone.
    Raises ValueError naming a bad entry."""
    if cidrs is None:
        return None
    out = []
    for c in cidrs:
        try:
            out.append(ipaddress.ip_network(c, strict=False))
        except ValueError as e:
            raise ValueError(f"{c!r} is not an IP network in CIDR form: {e}") from None
    return tuple(out)


def peer_allowed(host: object, networks: tuple[Network, ...] | None) -> bool:
    """Is the peer address ``host`` (text) inside one of ``networks`` (None: anyone)?
    IPv4-mapped IPv6 peers (a dual-stack listener) are judged by their IPv4 address."""
    if networks is None:
        return True
    try:
        ip = ipaddress.ip_address(str(host).split("%", 1)[0])
    except ValueError:
        return False
    if isinstance(ip, ipaddress.IPv6Address) and ip.ipv4_mapped is not None:
        ip = ip.ipv4_mapped
    return any(ip in n for n in networks)

GAP_SAMPLES = 1  # index jump marking a restarted stream


@runtime_checkable
class Source(Protocol):
    """What the pipeline needs from any source (the simulated plant included)."""

    id: str
    channel_ids: tuple[str, ...]
    counters: SourceCounters

    @property
    def fs(self) -> float | None: ...  # Hz; None until known (a WAV not yet seen)

    def __aiter__(self) -> AsyncIterator[SampleBlock]: ...

    async def __anext__(self) -> SampleBlock: ...

    async def start(self) -> None: ...  # bind / open; raises if it cannot be set up

    async def aclose(self) -> None: ...

    def status(self) -> dict[str, object]: ...


class _End:
    """Queue marker: the stream has ended."""


_END = _End()


class QueuedSource(ABC):
    """Base of the I/O sources: owns the hand-over queue, counters and start/stop."""

    kind: ClassVar[str] = "?"

    def __init__(
        self,
        source_id: str,
        channel_ids: Sequence[str],
        fs: float | None,
        *,
        queue_blocks: int = 256,
        clock: Callable[[], int] = time.time_ns,
    ) -> None:
        if not channel_ids:
            raise ValueError(f"source {source_id!r}: needs at least one channel")
        if queue_blocks < 1:
            raise ValueError(f"queue_blocks={queue_blocks!r} must be >= 1")
        self.id = source_id
        self.channel_ids = tuple(channel_ids)
        self._fs = fs
        self.counters = SourceCounters()
        self.overrun = False
        self.state = "created"
        self._clock = clock
        self._queue: asyncio.Queue[SampleBlock | _End] = asyncio.Queue(maxsize=queue_blocks)
        self._held: SampleBlock | _End | None = None  # taken by take_ready, next out
        self._started = False
        self._closed = False
        self._tasks: set[asyncio.Task[None]] = set()
        self._last_header: tuple[int, int] | None = None  # (t_ns, first_index) of the last
        self._logged: dict[str, float] = {}  # warning kind → monotonic time last logged

    @property
    def fs(self) -> float | None:
        """Sample rate in Hz (None until a WAV header has told it)."""
        return self._fs

    # --- lifecycle -------------------------------------------------------------------

    async def start(self) -> None:
        """Bind / open and start producing; raises if the source cannot be set up."""
        if self._started or self._closed:
            return
        self._started = True
        try:
            await self._start()
        except BaseException:
            self.state = "failed"
            raise

    @abstractmethod
    async def _start(self) -> None: ...

    async def _stop(self) -> None:  # noqa: B027 - an optional hook
        """Release sockets and files (override); tasks are cancelled by ``aclose``."""

    def _spawn(self, coro: Any) -> None:
        task: asyncio.Task[None] = asyncio.get_running_loop().create_task(coro)
        self._tasks.add(task)
        task.add_done_callback(self._task_done)

    def _task_done(self, task: asyncio.Task[None]) -> None:
        self._tasks.discard(task)
        if not task.cancelled() and task.exception() is not None:
            exc = task.exception()
            self.counters.last_error = f"{type(exc).__name__}: {exc}"
            self.state = "failed"
            self._end_nowait()

    async def aclose(self) -> None:
        """Stop producing, drop queued blocks and end the consumer's iteration."""
        if self._closed:
            return
        self._closed = True
        tasks = list(self._tasks)
        for t in tasks:
            t.cancel()
        await asyncio.gather(*tasks, return_exceptions=True)
        await self._stop()
        self._held = None
        while not self._queue.empty():
            self._queue.get_nowait()
        self._queue.put_nowait(_END)
        self.state = "closed"

    # --- consumer side ---------------------------------------------------------------

    def __aiter__(self) -> QueuedSource:
        return self

    async def __anext__(self) -> SampleBlock:
        if not self._started:
            await self.start()
        if self._held is not None:
            item, self._held = self._held, None
        else:
            item = await self._queue.get()
        if isinstance(item, _End):
            self._queue.put_nowait(item)  # later calls end too
            raise StopAsyncIteration
        if self._queue.empty():
            self.overrun = False
        return item

    def take_ready(self, block: SampleBlock, max_samples: int) -> list[SampleBlock]:
        """The blocks already queued that continue ``block`` without a gap (same channels
        and rate), oldest first, up to ``max_samples`` samples in all; never waits. The
        first queued block that does not continue (or would exceed the limit) stays next
        in line for ``async for``. The pipeline hands them to its analysis thread with
        ``block`` in one go (service.pipeline)."""
        out: list[SampleBlock] = []
        last, room = block, max_samples
        while self._held is None and not self._queue.empty():
            item = self._queue.get_nowait()
            if (isinstance(item, _End) or item.n > room or item.fs != last.fs
                    or item.channel_ids != last.channel_ids
                    or item.first_index != last.first_index + last.n):
                self._held = item
                break
            out.append(item)
            last, room = item, room - item.n
        if self._held is None and self._queue.empty():
            self.overrun = False
        return out

    # --- producer side ---------------------------------------------------------------

    def _block(self, data: np.ndarray, first_index: int, t0_ns: int) -> SampleBlock:
        fs = self._fs
        if fs is None:  # a source only produces once it knows its rate
            raise RuntimeError(f"source {self.id!r} produced samples before knowing fs")
        self.counters.samples += int(data.shape[1])
        self.counters.blocks += 1
        return SampleBlock(self.id, self.channel_ids, data, int(first_index), int(t0_ns), fs)

    def _emit(self, data: np.ndarray, first_index: int, t0_ns: int) -> None:
        """Hand a block over without waiting; when the queue is full drop the oldest."""
        if self._closed:
            return
        block = self._block(data, first_index, t0_ns)
        if self._queue.full():
            old = self._queue.get_nowait()
            if isinstance(old, _End):  # never drop the end marker
                self._queue.put_nowait(old)
                return
            self.counters.drops += 1
            self.overrun = True
        self._queue.put_nowait(block)

    async def _emit_wait(self, data: np.ndarray, first_index: int, t0_ns: int) -> None:
        """Hand a block over, waiting for room (a recording replay is not real-time)."""
        if not self._closed:
            await self._queue.put(self._block(data, first_index, t0_ns))

    def _end_nowait(self) -> None:
        if self._queue.full():
            self._queue.get_nowait()
            self.counters.drops += 1
        self._queue.put_nowait(_END)

    async def _end(self) -> None:
        await self._queue.put(_END)

    def _arrival_t0_ns(self, n: int) -> int:
        """Wall time of the first of ``n`` samples that have just arrived (ns)."""
        fs = self._fs or 1.0
        return self._clock() - round(n * 1e9 / fs)

    def _error(self, text: str) -> None:
        self.counters.last_error = text

    def _warn(self, kind: str, text: str) -> None:
        """``text`` as last_error, and logged unless a ``kind`` warning was within LOG_EVERY_S."""
        self._error(text)
        now = time.monotonic()
        if now - self._logged.get(kind, -LOG_EVERY_S) >= LOG_EVERY_S:
            self._logged[kind] = now
            log.warning("source %s: %s", self.id, text)

    def _refuse_peer(self, peer: str) -> None:
        self._bump("refused_peers")
        self._warn("refused_peers", f"refused {peer}: not in allow_from")

    def _bump(self, key: str, by: int = 1) -> None:
        self.counters.extra[key] = self.counters.extra.get(key, 0) + by

    # --- framed input (TCP and UDP) ----------------------------------------------------

    def _frame_t0_ns(self, frame: Frame) -> int:
        """The time of a frame's first sample: its header's, or the arrival time if it has none.

        A header time more than CLOCK_STEP_BACK_NS behind the previous header's time plus the
        samples in between is a clock step back: counted (``clock_steps_back``), reported in
        ``last_error`` and logged. The frames still carry the producer's new time (trends show
        the overlap; the alarm engine restarts its pending delays on the new clock)."""
        if not frame.t_ns:
            return self._arrival_t0_ns(frame.n)
        prev = self._last_header
        if prev is not None:
            expected = prev[0] + round((frame.first_index - prev[1]) * 1e9 / frame.fs)
            if frame.t_ns < expected - CLOCK_STEP_BACK_NS:
                back_s = (expected - frame.t_ns) / 1e9
                self._bump("clock_steps_back")
                self._error(f"header clock stepped back {back_s:.6g} s at sample index "
                            f"{frame.first_index}; frames follow the new clock")
                log.warning("source %s: header clock stepped back %.6g s at sample index %d",
                            self.id, back_s, frame.first_index)
        self._last_header = (frame.t_ns, frame.first_index)
        return frame.t_ns

    def _frame_problem(self, frame: Frame) -> str | None:
        """Why a decoded frame does not fit this source, or None."""
        if frame.channels != len(self.channel_ids):
            return (
                f"frame has {frame.channels} channels; source {self.id!r} declares "
                f"{len(self.channel_ids)}"
            )
        fs = self._fs
        if fs is not None and abs(frame.fs - fs) > 1e-9 * fs:
            return f"frame sample rate {frame.fs:g} Hz differs from the configured {fs:g} Hz"
        return None

    # --- status ----------------------------------------------------------------------

    def _status_extra(self) -> dict[str, object]:
        return {}

    def status(self) -> dict[str, object]:
        """Plain data for the API: identity, state, overrun flag, queue depth, counters."""
        return {
            "id": self.id,
            "kind": self.kind,
            "fs": self._fs,
            "channels": list(self.channel_ids),
            "state": self.state,
            "overrun": self.overrun,
            "queued": self._queue.qsize() + int(isinstance(self._held, SampleBlock)),
            **self._status_extra(),
            "counters": self.counters.as_dict(),
        }

"""The hub: latest state per channel and fan-out to subscribers, on the event loop.

Holds no engine state and does no I/O; publishers hand it finished frames."""

from __future__ import annotations

import asyncio
import collections
import time
from collections.abc import Iterable, Iterator, MutableMapping
from dataclasses import dataclass, field
from typing import Generic, TypeVar

from .sources.base import Source
from .types import ChannelState, PipelineHealth, PushFrames, SpectralFrame

K = TypeVar("K")
FRAME_KINDS = frozenset({"spectrum", "bands", "tones"})


class LazyFrames(MutableMapping[K, SpectralFrame], Generic[K]):
    """A mapping to frames that holds each as (push, channel index) until it is read: the
    hub keeps the newest of every channel without making a :class:`SpectralFrame` for
    the many that nobody reads before the next push replaces them."""

    __slots__ = ("_d",)

    def __init__(self) -> None:
        self._d: dict[K, SpectralFrame | tuple[PushFrames, int]] = {}

    def put(self, key: K, push: PushFrames, c: int) -> None:
        self._d[key] = (push, c)

    def __getitem__(self, key: K) -> SpectralFrame:
        v = self._d[key]
        if isinstance(v, tuple):
            return v[0].frame(v[1])
        return v

    def __setitem__(self, key: K, frame: SpectralFrame) -> None:
        self._d[key] = frame

    def __delitem__(self, key: K) -> None:
        del self._d[key]

    def __iter__(self) -> Iterator[K]:
        return iter(self._d)

    def __len__(self) -> int:
        return len(self._d)

    def __contains__(self, key: object) -> bool:
        return key in self._d


class Subscriber:
    """One client's pending items: the newest frame per channel and profile, and alarm
    events in order.

    ``profiles`` None takes each channel's primary profile only; a set takes those names
    (``"*"`` in it: every profile). A frame that arrives before the previous one of its
    channel and profile was taken replaces it
    (``missed`` counts the replaced ones; the stream session adds the frames its rate limit
    held back and then replaced, so ``missed`` is every frame the client did not get): a slow
    client skips to the newest frame and the publisher never waits. Events are kept in order
    up to ``max_events`` (then the oldest are dropped and counted too — a client that far
    behind should re-read /alarms).
    """

    def __init__(
        self,
        channels: frozenset[str] | None = None,
        max_events: int = 256,
        kinds: frozenset[str] | None = None,
        profiles: frozenset[str] | None = None,
    ) -> None:
        self.channels = channels  # None = every channel
        self.every_alarm = False  # True: alarm events of every channel, whatever ``channels``
        self.profiles = profiles
        self.kinds = (
            kinds
            if kinds is not None
            else frozenset({"spectrum", "bands", "tones", "alarms", "status"})
        )
        self.max_events = max_events
        self.frames: dict[tuple[str, str], SpectralFrame] = {}
        self.events: collections.deque[dict[str, object]] = collections.deque()
        self.missed = 0
        self._wake = asyncio.Event()
        self.queue = self  # ``await sub.queue.get()`` reads well at call sites

    def offer(self, frame: SpectralFrame) -> None:
        if self.channels is not None and frame.channel not in self.channels:
            return
        if not self.kinds & {"spectrum", "bands", "tones"}:
            return
        if self.profiles is None:
            if not frame.primary:
                return
        elif "*" not in self.profiles and frame.profile not in self.profiles:
            return
        key = (frame.channel, frame.profile)
        if key in self.frames:
            self.missed += 1
        self.frames[key] = frame
        self._wake.set()

    def offer_push(self, push: PushFrames) -> None:
        """:meth:`offer` of each of ``push``'s frames this subscriber takes; frames of
        channels it does not take are never made."""
        if not self.kinds & FRAME_KINDS:
            return
        if self.profiles is None:
            if not push.primary.any():
                return
        elif "*" not in self.profiles and push.profile not in self.profiles:
            return
        chans = self.channels
        for c, cid in enumerate(push.channels):
            if chans is None or cid in chans:
                self.offer(push.frame(c))

    def offer_event(self, event: dict[str, object]) -> None:
        if "alarms" not in self.kinds:
            return
        # a notice about the whole service (no "channel" key: rules reloaded) goes to everyone
        if (self.channels is not None and not self.every_alarm and "channel" in event
                and event["channel"] not in self.channels):
            return
        if len(self.events) >= self.max_events:
            self.events.popleft()
            self.missed += 1
        self.events.append(event)
        self._wake.set()

    def pending(self) -> int:
        return len(self.frames) + len(self.events)

    def take_frames(self) -> list[SpectralFrame]:
        """Every pending frame (the newest of each channel and profile) at once."""
        frames, self.frames = self.frames, {}
        return list(frames.values())

    async def wait(self, timeout: float) -> None:
        """Until something is offered or ``timeout`` s pass (no error either way); returns at
        once while an event is pending."""
        if self.events:
            return
        self._wake.clear()
        handle = asyncio.get_running_loop().call_later(timeout, self._wake.set)
        try:
            await self._wake.wait()
        finally:
            handle.cancel()

    async def get(self, timeout: float | None = None) -> SpectralFrame | dict[str, object]:
        """The next event (first) or frame; waits at most ``timeout`` s (TimeoutError).

        Returns at once, without any task or timer, while items are pending; the time-out
        is a plain timer on the wake-up (asyncio.wait_for would wrap every call in a task,
        which the stream paid for once per message)."""
        if not (self.events or self.frames):
            handle = None
            if timeout is not None:
                handle = asyncio.get_running_loop().call_later(timeout, self._wake.set)
            try:
                while not (self.events or self.frames):
                    self._wake.clear()
                    if handle is not None and handle.when() <= asyncio.get_running_loop().time():
                        raise TimeoutError
                    await self._wake.wait()
            finally:
                if handle is not None:
                    handle.cancel()
        if self.events:
            return self.events.popleft()
        key = next(iter(self.frames))
        return self.frames.pop(key)


@dataclass
class Hub:
    channels: dict[str, ChannelState] = field(default_factory=dict)
    latest: LazyFrames[str] = field(default_factory=LazyFrames)  # primary profile's
    by_profile: LazyFrames[tuple[str, str]] = field(default_factory=LazyFrames)
    sources: dict[str, Source] = field(default_factory=dict)
    pipelines: dict[str, PipelineHealth] = field(default_factory=dict)  # by source id
    subscribers: set[Subscriber] = field(default_factory=set)
    started_ns: int = field(default_factory=time.time_ns)
    frames_published: int = 0
    latency_s: dict[str, float] = field(default_factory=dict)

    def publish(self, frames: Iterable[SpectralFrame], latency_s: float = 0.0) -> None:
        for f in frames:
            self.by_profile[(f.channel, f.profile)] = f
            if f.primary:
                self.latest[f.channel] = f
            self.frames_published += 1
            self.latency_s[f.channel] = latency_s
            for s in self.subscribers:
                s.offer(f)

    def publish_push(self, push: PushFrames, latency_s: float = 0.0) -> None:
        """:meth:`publish` of a push's frames, made only when read: :meth:`set_latest`, then
        :meth:`offer_push`."""
        self.set_latest(push, latency_s)
        self.offer_push(push)

    def set_latest(self, push: PushFrames, latency_s: float = 0.0) -> None:
        """Make a push's frames the latest of their channels (what REST reads)."""
        profile = push.profile
        by_profile, latest, lat = self.by_profile, self.latest, self.latency_s
        for c, (cid, primary) in enumerate(zip(push.channels, push.primary.tolist(),
                                               strict=True)):
            by_profile.put((cid, profile), push, c)
            if primary:
                latest.put(cid, push, c)
            lat[cid] = latency_s
        self.frames_published += len(push.channels)

    def offer_push(self, push: PushFrames) -> None:
        """Offer a push's frames to every subscriber (the stream)."""
        for s in self.subscribers:
            s.offer_push(push)

    def publish_event(self, event: dict[str, object]) -> None:
        """Announce an alarm event (already committed to the store) to subscribers."""
        for s in self.subscribers:
            s.offer_event(event)

    def publish_notice(self, notice: str, **fields: object) -> None:
        """Announce a change of the whole service that is not an event of the log (``notice``
        "rules": the alarm rules were reloaded) to every subscriber of alarms."""
        for s in self.subscribers:
            s.offer_event({"notice": notice, **fields})

    def subscribe(self, channels: Iterable[str] | None = None, max_queue: int = 256) -> Subscriber:
        sub = Subscriber(frozenset(channels) if channels is not None else None, max_queue)
        self.subscribers.add(sub)
        return sub

    def frame(self, channel: str, profile: str | None = None) -> SpectralFrame | None:
        """The newest frame of ``channel``'s ``profile`` (default: its primary one)."""
        if profile is None:
            return self.latest.get(channel)
        return self.by_profile.get((channel, profile))

    def unsubscribe(self, sub: Subscriber) -> None:
        self.subscribers.discard(sub)

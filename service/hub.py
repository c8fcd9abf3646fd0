"""The hub: latest state per channel and fan-out to subscribers, on the event loop.

Holds no engine state and does no I/O; publishers hand it finished frames."""

from __future__ import annotations

import asyncio
import time
from collections.abc import Iterable
from dataclasses import dataclass, field

from .pipeline import ChannelState
from .types import SpectralFrame


@dataclass
class Subscriber:
    """A bounded queue of frames; when full the oldest is dropped and counted (never blocks)."""

    channels: frozenset[str] | None = None  # None = every channel
    max_queue: int = 8
    queue: asyncio.Queue[SpectralFrame] = field(init=False)
    missed: int = 0

    def __post_init__(self) -> None:
        self.queue = asyncio.Queue(self.max_queue)

    def offer(self, frame: SpectralFrame) -> None:
        if self.channels is not None and frame.channel not in self.channels:
            return
        if self.queue.full():
            self.queue.get_nowait()
            self.missed += 1
        self.queue.put_nowait(frame)


@dataclass
class Hub:
    channels: dict[str, ChannelState] = field(default_factory=dict)
    latest: dict[str, SpectralFrame] = field(default_factory=dict)
    sources: dict[str, object] = field(default_factory=dict)
    subscribers: set[Subscriber] = field(default_factory=set)
    started_ns: int = field(default_factory=time.time_ns)
    frames_published: int = 0
    latency_s: dict[str, float] = field(default_factory=dict)

    def publish(self, frames: Iterable[SpectralFrame], latency_s: float = 0.0) -> None:
        for f in frames:
            self.latest[f.channel] = f
            self.frames_published += 1
            self.latency_s[f.channel] = latency_s
            for s in self.subscribers:
                s.offer(f)

    def subscribe(self, channels: Iterable[str] | None = None, max_queue: int = 8) -> Subscriber:
        sub = Subscriber(frozenset(channels) if channels is not None else None, max_queue)
        self.subscribers.add(sub)
        return sub

    def unsubscribe(self, sub: Subscriber) -> None:
        self.subscribers.discard(sub)

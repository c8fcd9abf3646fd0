"""The hub's per-client queue: newest frame per channel and profile, events in order, and a
``get`` that waits at most its time-out.

Talks to service.hub only, on an event loop of its own."""

from __future__ import annotations

import asyncio

import numpy as np
import pytest

from service.hub import Hub, Subscriber
from service.types import SpectralFrame


def frame(channel: str, seq: int, profile: str = "wide", primary: bool = True) -> SpectralFrame:
    return SpectralFrame(
        channel=channel, profile=profile, seq=seq, t_ns=seq, fs=1280.0, n=256, df_hz=5.0,
        f0_hz=0.0, lines=100, fmax_hz=500.0, window="hann", enbw_bins=1.5,
        averaging="linear", averages=1, input_unit="g", unit="g", amplitude="rms",
        lowcut_hz=0.0, power=np.zeros(101, np.float32), overall=0.0, bands=(), tones=(),
        peaks=(), primary=primary,
    )


def test_get_returns_pending_items_at_once_and_times_out_when_there_are_none() -> None:
    async def scenario() -> list[object]:
        sub = Subscriber(profiles=frozenset({"*"}))
        sub.offer(frame("a", 1))
        sub.offer(frame("a", 2))  # replaces seq 1 of the same channel and profile
        sub.offer(frame("a", 3, "narrow", primary=False))
        sub.offer_event({"channel": "a", "id": 7})
        got: list[object] = []
        for _ in range(3):
            item = await sub.get(timeout=0.0)  # pending: returned even with no time at all
            got.append(item if isinstance(item, dict) else (item.profile, item.seq))
        with pytest.raises(TimeoutError):
            await sub.get(timeout=0.05)  # nothing pending: the time-out ends the wait
        with pytest.raises(TimeoutError):
            await sub.get(timeout=0.0)
        asyncio.get_running_loop().call_later(0.02, sub.offer, frame("b", 9))
        item = await sub.get(timeout=10.0)  # woken by the offer (the bound only guards)
        assert isinstance(item, SpectralFrame)
        got.append((item.channel, item.seq))
        got.append(sub.missed)
        return got

    assert asyncio.run(scenario()) == [
        {"channel": "a", "id": 7}, ("wide", 2), ("narrow", 3), ("b", 9), 1
    ]


def test_a_subscriber_without_profiles_takes_each_channels_primary_only() -> None:
    sub = Subscriber()
    sub.offer(frame("a", 1, "wide", primary=True))
    sub.offer(frame("a", 2, "narrow", primary=False))
    named = Subscriber(profiles=frozenset({"narrow"}))
    named.offer(frame("a", 1, "wide", primary=True))
    named.offer(frame("a", 2, "narrow", primary=False))
    assert list(sub.frames) == [("a", "wide")] and list(named.frames) == [("a", "narrow")]


def test_a_notice_reaches_every_subscriber_of_alarms_whatever_its_channels() -> None:
    hub = Hub()
    of_b = hub.subscribe(["b"])
    of_b.kinds = frozenset({"alarms"})
    no_alarms = hub.subscribe(None)
    no_alarms.kinds = frozenset({"bands"})
    hub.publish_event({"channel": "a", "id": 1})  # another channel's event: not for of_b
    hub.publish_event({"channel": None, "id": 2})  # an event of no channel: not for of_b
    hub.publish_notice("rules", added=[], changed=["a.band.b"], removed=[])
    assert list(of_b.events) == [
        {"notice": "rules", "added": [], "changed": ["a.band.b"], "removed": []}]
    assert not no_alarms.events

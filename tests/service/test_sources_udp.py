"""Tests for the UDP source over loopback: in-order, lost, late, duplicated and bad datagrams."""

from __future__ import annotations

import asyncio
from typing import Any

import numpy as np
from sourcekit import CLOCK_NS, FS, run, until

from service import wire
from service.sources import UdpSource, make_source
from service.types import SampleBlock


class Sender:
    """A UDP producer on loopback; datagrams from one socket arrive in the order sent."""

    def __init__(self, transport: asyncio.DatagramTransport) -> None:
        self.transport = transport
        self.sent = 0

    @classmethod
    async def to(cls, src: UdpSource) -> Sender:
        assert src.address is not None
        loop = asyncio.get_running_loop()
        t, _ = await loop.create_datagram_endpoint(
            asyncio.DatagramProtocol, remote_addr=src.address
        )
        return cls(t)

    def send(self, *datagrams: bytes) -> None:
        for d in datagrams:
            self.transport.sendto(d)
            self.sent += 1


def frame(first: int, n: int = 100, channels: int = 2, t_ns: int = 0, fs: float = FS) -> bytes:
    data = np.full((channels, n), float(first), dtype=np.float32) + np.arange(n)
    return wire.encode_frame(data, "f32le", fs, first, t_ns)


async def started(**kw: Any) -> UdpSource:
    src = UdpSource("pump-2", ["a", "b"], FS, "127.0.0.1", 0, clock=lambda: CLOCK_NS, **kw)
    await src.start()
    return src


def handled(src: UdpSource) -> int:
    c = src.counters
    return c.blocks + c.malformed + c.extra.get("late", 0)


def test_lost_late_and_duplicate_datagrams_by_sample_index() -> None:
    async def go() -> None:
        src = await started()
        tx = await Sender.to(src)
        # A, C overtakes B, then B (late), D, and D again (duplicate)
        tx.send(frame(0), frame(200), frame(100), frame(300), frame(300))
        await until(lambda: handled(src) == 5)
        blocks: list[SampleBlock] = [await src.__anext__() for _ in range(3)]
        assert [b.first_index for b in blocks] == [0, 200, 300]
        np.testing.assert_array_equal(blocks[1].data[0], 200 + np.arange(100))
        c = src.counters
        assert (c.gaps, c.extra["late"], c.malformed, c.blocks) == (1, 2, 0, 3)
        assert c.last_error == "late datagram at index 300 (expected 400) dropped"
        assert src.status()["next_index"] == 400
        tx.transport.close()
        await src.aclose()

    run(go())


def test_producer_restart_far_back_is_a_gap_not_late() -> None:
    async def go() -> None:
        src = await started(late_window_s=1.0)  # 1000 samples at 1 kHz
        tx = await Sender.to(src)
        tx.send(frame(5000), frame(5100), frame(4300), frame(0), frame(100))
        await until(lambda: handled(src) == 5)
        got = [(await src.__anext__()).first_index for _ in range(4)]
        # 4300 is within 1000 samples of 5200: late; 0 is further back: a restarted producer
        assert got == [5000, 5100, 0, 100]
        assert (src.counters.gaps, src.counters.extra["late"]) == (1, 1)
        tx.transport.close()
        await src.aclose()

    run(go())


def test_bad_datagrams_rejected_and_counted() -> None:
    async def go() -> None:
        src = await started()
        tx = await Sender.to(src)
        good = frame(0)
        tx.send(
            b"not a frame at all, just some bytes of garbage..................",
            good[:-4],  # cut short
            good + frame(100),  # two frames in one datagram
            frame(0, channels=3),
            frame(0, fs=2000.0),
        )
        await until(lambda: src.counters.malformed == 5)
        assert (
            "frame sample rate 2000 Hz differs from the configured 1000 Hz"
            in src.counters.last_error
        )
        tx.send(good)
        block = await src.__anext__()
        assert block.first_index == 0 and src.counters.blocks == 1 and src.counters.gaps == 0
        tx.transport.close()
        await src.aclose()

    run(go())


def test_reasons_name_the_problem() -> None:
    async def go() -> None:
        src = await started()
        tx = await Sender.to(src)
        good = frame(0)
        reasons = []
        for bad in (good[:-4], good + good, frame(0, channels=3)):
            before = src.counters.malformed
            tx.send(bad)
            await until(lambda b=before: src.counters.malformed == b + 1)
            reasons.append(src.counters.last_error.split(": ", 1)[1])
        assert reasons == [
            f"datagram of {len(good) - 4} bytes does not hold one frame of {len(good)} bytes",
            f"datagram of {2 * len(good)} bytes does not hold one frame of {len(good)} bytes",
            "frame has 3 channels; source 'pump-2' declares 2",
        ]
        tx.transport.close()
        await src.aclose()

    run(go())


def test_header_time_or_arrival_time() -> None:
    async def go() -> None:
        src = await started()
        tx = await Sender.to(src)
        tx.send(frame(0, t_ns=42), frame(100))
        a, b = await src.__anext__(), await src.__anext__()
        assert a.t0_ns == 42
        assert b.t0_ns == CLOCK_NS - round(100 * 1e9 / FS)  # arrival minus the block's duration
        assert src.counters.bytes == 2 * len(frame(0))
        tx.transport.close()
        await src.aclose()

    run(go())


def test_make_source_builds_udp_from_config() -> None:
    from service.config import parse_config

    cfg = parse_config(
        {
            "sources": [
                {
                    "id": "pump-2",
                    "kind": "udp",
                    "listen": "127.0.0.1:0",
                    "sample_rate_hz": 12800,
                    "channels": ["a"],
                }
            ]
        },
        env={},
    )
    src = make_source(cfg.sources[0])
    assert isinstance(src, UdpSource)
    assert (src.fs, src.channel_ids, src.late_window) == (12800.0, ("a",), 128000)

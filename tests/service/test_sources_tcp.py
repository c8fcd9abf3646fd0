"""Tests for the TCP source over loopback: raw and framed streams, disconnects, reconnects,
a second producer, overflow and stopping."""

from __future__ import annotations

import asyncio
import contextlib
import itertools
from typing import Any

import numpy as np
import pytest
from sourcekit import CLOCK_NS, FS, joined, run, take, until

from service import wire
from service.sources import TcpSource, make_source
from service.sources.base import GAP_SAMPLES, Source
from service.types import SampleBlock


def contiguous(blocks: list[SampleBlock]) -> bool:
    return all(a.first_index + a.n == b.first_index for a, b in itertools.pairwise(blocks))


async def started(fmt: str, channels: int = 2, **kw: Any) -> TcpSource:
    ids = [f"c{i}" for i in range(channels)]
    src = TcpSource("line-a", ids, FS, "127.0.0.1", 0, fmt, clock=lambda: CLOCK_NS, **kw)
    await src.start()
    return src


async def send(src: TcpSource, payload: bytes, chunk: int = 0, close: bool = True) -> Any:
    assert src.address is not None
    reader, writer = await asyncio.open_connection(*src.address)
    step = chunk or len(payload) or 1
    for i in range(0, len(payload), step):
        writer.write(payload[i : i + step])
        await writer.drain()
    if close:
        writer.close()
        await writer.wait_closed()
    return reader, writer


def known(channels: int, n: int, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return rng.integers(-30000, 30000, size=(channels, n)).astype(np.float32)


@pytest.mark.parametrize("fmt", wire.RAW_FORMATS)
def test_raw_stream_arrives_exactly(fmt: str) -> None:
    x = known(2, 1000)

    async def go() -> None:
        src = await started(fmt)
        await send(src, wire.encode_raw(x, fmt), chunk=7)  # 7 bytes: samples cut anywhere
        blocks = await take(src, 1000)
        np.testing.assert_array_equal(joined(blocks), x)
        assert blocks[0].first_index == 0 and contiguous(blocks)
        assert all(b.channel_ids == ("c0", "c1") and b.fs == FS for b in blocks)
        # raw timestamps: arrival time minus the block's duration
        assert all(b.t0_ns == CLOCK_NS - round(b.n * 1e9 / FS) for b in blocks)
        await until(lambda: src.counters.disconnects == 1)
        c = src.counters
        assert (c.samples, c.connections, c.partial_frames, c.gaps, c.malformed) == (
            1000,
            1,
            0,
            0,
            0,
        )
        assert c.bytes == 1000 * 2 * wire.SAMPLE_SIZES[fmt]
        await src.aclose()

    run(go())


def test_raw_disconnect_mid_sample_then_reconnect_marks_a_gap() -> None:
    x, y = known(2, 300, 1), known(2, 50, 2)

    async def go() -> None:
        src = await started("s16le")
        await send(src, wire.encode_raw(x, "s16le") + b"\x01\x02\x03")  # 3 bytes of a 4-byte sample
        first = await take(src, 300)
        await until(lambda: src.counters.disconnects == 1)
        assert src.counters.partial_frames == 1 and src.counters.extra["partial_bytes"] == 3
        assert "incomplete sample" in src.counters.last_error
        await send(src, wire.encode_raw(y, "s16le"))
        second = await take(src, 50)
        np.testing.assert_array_equal(joined(first), x)
        np.testing.assert_array_equal(joined(second), y)  # the 3 stray bytes were not stitched
        assert second[0].first_index == 300 + GAP_SAMPLES and contiguous(second)
        assert (src.counters.gaps, src.counters.connections) == (1, 2)
        await src.aclose()

    run(go())


def frames(x: np.ndarray, starts: list[int], fmt: str = "f32le", t_ns: int = 0) -> list[bytes]:
    """Cut x into len(starts) equal frames, frame j carrying first index starts[j]."""
    parts = np.array_split(x, len(starts), axis=1)
    return [wire.encode_frame(p, fmt, FS, k, t_ns) for p, k in zip(parts, starts, strict=True)]


def test_framed_indices_and_times_come_from_headers() -> None:
    x = known(2, 400, 3)

    async def go() -> None:
        src = await started("framed")
        # 4 frames of 100; the third jumps ahead by 50 samples (a gap the producer marked)
        data = frames(x[:, :200], [0, 100]) + frames(x[:, 200:], [250, 350], t_ns=123)
        await send(src, b"".join(data), chunk=33)
        blocks = await take(src, 400)
        assert [b.first_index for b in blocks] == [0, 100, 250, 350]
        assert [b.t0_ns for b in blocks[2:]] == [123, 123]  # header times pass through
        assert blocks[0].t0_ns == CLOCK_NS - round(100 * 1e9 / FS)  # t_ns 0 → arrival
        np.testing.assert_array_equal(joined(blocks), x)
        assert (src.counters.gaps, src.counters.malformed) == (1, 0)
        await src.aclose()

    run(go())


def test_framed_garbage_and_cut_frame_are_counted_not_fatal() -> None:
    x = known(2, 300, 4)

    async def go() -> None:
        src = await started("framed")
        a, b, c = frames(x, [0, 100, 200])
        await send(src, a + b"\x00garbage\xff" + b + c[:60])  # ends 16 bytes into c's payload
        got = await take(src, 200)
        await until(lambda: src.counters.disconnects == 1)
        assert [g.first_index for g in got] == [0, 100]
        assert src.counters.malformed == 1 and src.counters.partial_frames == 1
        assert src.counters.extra["partial_bytes"] == 60
        await send(src, c)  # the producer comes back and sends the frame whole
        (again,) = await take(src, 100)
        assert again.first_index == 200 and src.counters.gaps == 0
        np.testing.assert_array_equal(again.data, x[:, 200:])
        await src.aclose()

    run(go())


def test_framed_wrong_channel_count_or_rate_rejected() -> None:
    async def go() -> None:
        src = await started("framed")
        three = wire.encode_frame(np.zeros((3, 10)), "f32le", FS, 0)
        slow = wire.encode_frame(np.zeros((2, 10)), "f32le", 500.0, 0)
        good = wire.encode_frame(np.ones((2, 10)), "f32le", FS, 0)
        await send(src, three)
        await until(lambda: src.counters.malformed == 1)
        assert src.counters.last_error == "frame has 3 channels; source 'line-a' declares 2"
        await send(src, slow + good)
        (block,) = await take(src, 10)
        assert src.counters.malformed == 2 and block.first_index == 0
        assert (
            "frame sample rate 500 Hz differs from the configured 1000 Hz"
            in src.counters.last_error
        )
        await src.aclose()

    run(go())


def test_second_producer_is_refused_while_first_streams() -> None:
    x = known(2, 200, 5)

    async def go() -> None:
        src = await started("f32le")
        _, w1 = await send(src, wire.encode_raw(x[:, :100], "f32le"), close=False)
        first = await take(src, 100)
        r2, w2 = await send(src, wire.encode_raw(known(2, 10, 9), "f32le"), close=False)
        with contextlib.suppress(ConnectionResetError):  # a reset if our bytes were unread
            assert await r2.read() == b""  # quaver closed the second connection
            w2.close()
            await w2.wait_closed()
        assert src.counters.extra["refused"] == 1 and "refused" in src.counters.last_error
        w1.write(wire.encode_raw(x[:, 100:], "f32le"))  # the first producer is undisturbed
        await w1.drain()
        rest = await take(src, 100)
        np.testing.assert_array_equal(joined(first + rest), x)
        assert contiguous(first + rest) and src.counters.connections == 1
        assert src.status()["producer"] is not None and src.status()["state"] == "connected"
        w1.close()
        await w1.wait_closed()
        await src.aclose()

    run(go())


def test_overflow_drops_oldest_and_flags_it() -> None:
    x = known(1, 1000, 6)

    async def go() -> None:
        src = await started("framed", channels=1, queue_blocks=3)
        await send(src, b"".join(frames(x, list(range(0, 1000, 100)))))
        await until(lambda: src.counters.blocks == 10)
        assert src.counters.drops == 7 and src.status()["overrun"] is True
        kept = await take(src, 300)
        assert [b.first_index for b in kept] == [700, 800, 900]  # the newest survive
        assert src.status()["overrun"] is False and src.status()["queued"] == 0
        await src.aclose()

    run(go())


def test_aclose_ends_a_waiting_consumer_and_frees_the_port() -> None:
    async def go() -> None:
        src = await started("f32le")
        assert src.address is not None
        waiting = asyncio.ensure_future(src.__anext__())
        await asyncio.sleep(0)
        await src.aclose()
        with pytest.raises(StopAsyncIteration):
            await waiting
        blocks = [b async for b in src]  # later iteration ends at once
        assert blocks == [] and src.status()["state"] == "closed"
        with pytest.raises(OSError):
            await asyncio.open_connection(*src.address)

    run(go())


def test_bind_failure_raises_from_start() -> None:
    async def go() -> None:
        a = await started("f32le")
        assert a.address is not None
        b = TcpSource("b", ["c0"], FS, "127.0.0.1", a.address[1], "f32le")
        with pytest.raises(OSError):
            async for _ in b:
                pass
        assert b.status()["state"] == "failed"
        await a.aclose()
        await b.aclose()

    run(go())


def test_make_source_builds_tcp_from_config() -> None:
    from service.config import parse_config

    cfg = parse_config(
        {
            "sources": [
                {
                    "id": "line-a",
                    "kind": "tcp",
                    "listen": "127.0.0.1:0",
                    "format": "s32le",
                    "sample_rate_hz": 12800,
                    "channels": ["a", "b"],
                    "queue_blocks": 9,
                }
            ]
        },
        env={},
    )
    src = make_source(cfg.sources[0])
    assert isinstance(src, TcpSource) and isinstance(src, Source)
    assert (src.fmt, src.fs, src.channel_ids, src.port) == ("s32le", 12800.0, ("a", "b"), 0)
    with pytest.raises(ValueError, match=r"format='u8' is not one of 's16le', 's32le'"):
        TcpSource("x", ["a"], FS, "127.0.0.1", 0, "u8")


# --- the wrong format on a raw source (issue 13) ---------------------------------------------


@pytest.mark.parametrize("chunk", [1, 5, 0])  # the header byte by byte, cut, or whole
def test_raw_source_refuses_a_framed_stream_however_it_arrives(chunk: int) -> None:
    frame = wire.encode_frame(known(2, 64), "f32le", FS, 0)

    async def go() -> None:
        src = await started("f32le")
        closed: bytes | str
        try:
            reader, writer = await send(src, frame * 3, chunk=chunk, close=False)
            closed = await asyncio.wait_for(reader.read(1), 5)
            writer.close()
        except ConnectionError as e:  # reset: the source closed with our bytes unread
            closed = type(e).__name__
        assert closed in (b"", "ConnectionResetError", "BrokenPipeError")
        await until(lambda: src.counters.disconnects == 1)
        c = src.counters
        assert (c.samples, c.malformed, c.extra["wrong_format"]) == (0, 1, 1)
        assert "this looks like framed data on a raw source" in c.last_error
        # raw bytes that merely start with the magic (no header CRC) are samples
        x = np.frombuffer(wire.MAGIC * 32, dtype="<f4").reshape(-1, 2).T.copy()
        await send(src, wire.encode_raw(x, "f32le"))
        blocks = await take(src, x.shape[1])
        np.testing.assert_array_equal(joined(blocks), x)
        await src.aclose()

    run(go())


def test_raw_f32_block_of_implausible_values_is_rejected_as_a_gap() -> None:
    good = known(2, 100)
    bad = good.copy()
    bad[:, :3] = 1e16  # 6 of 200 values: 3 % > 1 %
    few = good.copy()
    few[0, 0] = 1e16  # 1 of 200: 0.5 %, a sensor's business, passed on

    async def go() -> None:
        src = await started("f32le")
        for k, x in enumerate((good, bad, few), start=1):
            _, writer = await send(src, wire.encode_raw(x, "f32le"), close=False)
            # one write of 800 bytes on loopback is one read, decoded as one block
            await until(lambda k=k: src.counters.bytes == 800 * k)
            writer.close()
            await until(lambda k=k: src.counters.disconnects == k)
        blocks = await take(src, 200)
        np.testing.assert_array_equal(joined(blocks), np.concatenate([good, few], axis=1))
        c = src.counters
        assert (c.malformed, c.extra["implausible_blocks"], c.samples) == (1, 1, 200)
        assert "6 of 200 values beyond ±1e+15" in c.last_error
        await src.aclose()

    run(go())

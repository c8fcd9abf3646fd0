"""Blocks that queue up behind a busy analysis go to the analysis threads together, and the
service's pipelines share a pool of analysis threads (service.pipeline).

The contract: each block of a hand-over is analysed exactly as it would be alone (the same
pushes, values, counters and alarm input, in order), a hand-over holds only blocks that
continue one another (a block after a gap starts its own, so its ``gap`` state is seen),
and the threads are the pool's, never one per source.

In-process: the service's own objects on one event loop, fed over loopback TCP; the
reference is a pipeline of the same config driven block by block."""

from __future__ import annotations

import asyncio
import threading
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from service.app import Service
from service.config import parse_config
from service.pipeline import SourcePipeline, channel_states
from service.profiles import ProfileBank
from service.sources.base import QueuedSource
from service.types import SampleBlock, SourceCounters
from service.wire import encode_frame
from tests.service.conftest import SMALL_FS, free_ports, one_band_config
from tests.service.sourcekit import run, until

LOOPBACK = "127.0.0.1"
BLOCK = 256  # samples per framed block


class _Queue(QueuedSource):
    """A queued source fed by the test (``_emit``)."""

    kind = "test"

    async def _start(self) -> None:
        return None


def _block(first: int, n: int = BLOCK) -> np.ndarray:
    return np.full((2, n), first, dtype=np.float32)


def test_take_ready_takes_only_blocks_that_continue_and_leaves_the_next_in_line() -> None:
    async def main() -> None:
        src = _Queue("q", ["x", "y"], SMALL_FS, queue_blocks=16)
        await src.start()
        for first in (0, 256, 512, 768, 2048, 2304):  # a jump after 768 + 256
            src._emit(_block(first), first, 0)
        head = await src.__anext__()
        more = src.take_ready(head, 10_000)
        assert [b.first_index for b in more] == [256, 512, 768]
        assert src.status()["queued"] == 2  # the block after the jump, held, and one more
        after_gap = await src.__anext__()  # the held block comes next, then the queue
        assert after_gap.first_index == 2048
        assert [b.first_index for b in src.take_ready(after_gap, 10_000)] == [2304]
        assert src.status()["queued"] == 0 and not src.overrun

    run(main())


def test_take_ready_keeps_to_the_sample_limit_and_stops_at_the_end() -> None:
    async def main() -> None:
        src = _Queue("q", ["x", "y"], SMALL_FS, queue_blocks=16)
        await src.start()
        for k in range(5):
            src._emit(_block(k * 256), k * 256, 0)
        src._end_nowait()
        head = await src.__anext__()
        assert [b.first_index for b in src.take_ready(head, 600)] == [256, 512]  # 768 > 600
        rest = await src.__anext__()
        assert [b.first_index for b in src.take_ready(rest, 10_000)] == [1024]
        with pytest.raises(StopAsyncIteration):  # the end marker was held, not lost
            await src.__anext__()

    run(main())


def _cfg(tmp_path: Path, ports: list[int], threads: int) -> Any:
    sources = len(ports)
    ids = [f"s{i}" for i in range(sources)]
    doc = one_band_config(
        channels=[{"id": f"a{i}", "stale_after_s": 30.0} for i in range(sources)],
        sources=[{"id": sid, "kind": "tcp", "listen": f"{LOOPBACK}:{ports[i]}",
                  "format": "framed", "sample_rate_hz": SMALL_FS, "channels": [f"a{i}"],
                  "queue_blocks": 256} for i, sid in enumerate(ids)],
        alarms=[{"channel": f"a{i}", "band": "b", "alert": 0.5, "danger": 1.0}
                for i in range(sources)],
    )
    doc["service"] = {"listen": f"{LOOPBACK}:{free_ports(1)[0]}", "data_dir": str(tmp_path),
                      "analysis_threads": threads}
    return parse_config(doc, env={})


def _signal(n: int) -> np.ndarray:
    # a 123 Hz tone (inside band b) growing over the record, so every push differs
    t = np.arange(n) / SMALL_FS
    return ((0.2 + 0.8 * t / t[-1]) * np.sin(2 * np.pi * 123.0 * t))[None, :].astype(np.float32)


def _reference(cfg: Any, starts: list[int], x: np.ndarray) -> list[tuple[int, list[float]]]:
    """(end index, bands) of every push of a pipeline fed the blocks one at a time."""

    class _Src:
        id = "s0"
        counters = SourceCounters()

    ids = ["a0"]
    p = SourcePipeline(_Src(), channel_states(cfg, "s0", ids), None,  # type: ignore[arg-type]
                       lambda fs: ProfileBank(cfg, ids, fs), cfg=cfg)
    out = []
    for k, first in enumerate(starts):
        block = SampleBlock("s0", ("a0",), x[:, k * BLOCK:(k + 1) * BLOCK], first,
                            first * 1000, SMALL_FS)
        for push in p.process_pushes(block):
            out.append((push.end_index, push.bands[0].tolist()))
    return out


def test_queued_blocks_are_analysed_together_exactly_as_one_by_one(tmp_path: Path) -> None:
    (port,) = free_ports(1)
    cfg = _cfg(tmp_path, [port], threads=1)
    svc = Service(cfg)
    p = svc.pipelines[0]
    batches: list[list[int]] = []
    hold = threading.Event()
    real = p.process_blocks

    def recorded(blocks: list[SampleBlock]) -> Any:
        hold.wait(5.0)  # the first hand-over waits while the rest of the feed queues up
        batches.append([b.first_index for b in blocks])
        return real(blocks)

    p.process_blocks = recorded  # type: ignore[method-assign]
    # 40 blocks, then a jump of 10 000 samples and 30 more
    starts = [k * BLOCK for k in range(40)] + [20_000 + k * BLOCK for k in range(30)]
    x = _signal(len(starts) * BLOCK)
    want = _reference(cfg, starts, x)
    got: list[tuple[int, list[float]]] = []  # every push the service made visible, in order
    set_latest = svc.hub.set_latest

    def visible(push: Any, latency_s: float = 0.0) -> None:
        got.append((push.end_index, push.bands[0].tolist()))
        set_latest(push, latency_s)

    svc.hub.set_latest = visible  # type: ignore[method-assign]

    async def main() -> None:
        await svc.start()
        try:
            _, writer = await asyncio.open_connection(LOOPBACK, port)
            for k, first in enumerate(starts):
                writer.write(encode_frame(x[:, k * BLOCK:(k + 1) * BLOCK], "f32le",
                                          SMALL_FS, first))
            await writer.drain()
            await until(lambda: svc.hub.sources["s0"].status()["queued"] >= len(starts) - 1)
            hold.set()
            await until(lambda: len(got) >= len(want))
            writer.close()
        finally:
            hold.set()
            await svc.stop()

    run(main(), timeout_s=20.0)
    assert [b for b in batches if len(b) > 1], batches  # some blocks went together
    for b in batches:  # each hand-over: one continuous stretch, at most BATCH_MAX_S long
        assert b == list(range(b[0], b[0] + BLOCK * len(b), BLOCK)), b
        assert len(b) * BLOCK <= 0.5 * SMALL_FS
    assert [b[0] for b in batches].count(20_000) == 1  # the block after the jump led one
    assert sum(len(b) for b in batches) == len(starts)
    # every push of the reference, in order, with the same values (same code, same input)
    assert [e for e, _ in got] == [e for e, _ in want]
    np.testing.assert_allclose([v for _, v in got], [v for _, v in want], rtol=0, atol=0)
    assert svc.hub.channels["a0"].frames == len(want)
    assert svc.hub.channels["a0"].gaps == 1


def test_sources_share_the_pool_of_analysis_threads(tmp_path: Path) -> None:
    ports = free_ports(6)
    svc = Service(_cfg(tmp_path, ports, threads=2))
    names: set[str] = set()
    for p in svc.pipelines:
        real = p.process_blocks

        def recorded(blocks: list[SampleBlock], real: Any = real) -> Any:
            names.add(threading.current_thread().name)
            return real(blocks)

        p.process_blocks = recorded  # type: ignore[method-assign]
    x = _signal(20 * BLOCK)

    async def main() -> None:
        await svc.start()
        try:
            writers = [(await asyncio.open_connection(LOOPBACK, port))[1] for port in ports]
            for k in range(20):
                for w in writers:
                    w.write(encode_frame(x[:, k * BLOCK:(k + 1) * BLOCK], "f32le",
                                         SMALL_FS, k * BLOCK))
            for w in writers:
                await w.drain()
            await until(lambda: all(svc.hub.channels[f"a{i}"].samples >= 20 * BLOCK
                                    for i in range(6)))
            for w in writers:
                w.close()
        finally:
            await svc.stop()

    run(main(), timeout_s=20.0)
    assert names and all(n.startswith("analysis") for n in names), names
    assert len(names) <= 2, names
    assert all(svc.hub.channels[f"a{i}"].samples == 20 * BLOCK for i in range(6))

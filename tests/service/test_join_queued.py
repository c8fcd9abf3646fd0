"""A worker that fell behind takes its source's queued backlog as one block
(``QueuedSource.join_queued``): only blocks that continue the stream are joined, nothing is
lost or reordered, and the pipeline's frames are those of the blocks one by one."""

from __future__ import annotations

import numpy as np
from sourcekit import CLOCK_NS, run

from service.config import parse_config
from service.pipeline import SourcePipeline, channel_states
from service.profiles import ProfileBank
from service.sources.base import QueuedSource
from service.types import SampleBlock

FS = 2560.0
IDS = ("a", "b")


class Held(QueuedSource):
    """A source whose blocks the test emits by hand."""

    kind = "held"

    async def _start(self) -> None:
        self.state = "running"


def _blocks(sizes: list[int], seed: int = 3) -> list[np.ndarray]:
    rng = np.random.default_rng(seed)
    return [rng.normal(0.0, 1.0, (len(IDS), n)).astype(np.float32) for n in sizes]


def test_contiguous_queued_blocks_are_joined_and_a_gap_is_kept() -> None:
    async def go() -> None:
        src = Held("s", IDS, FS, queue_blocks=8)
        await src.start()
        data = _blocks([100, 100, 100, 50, 100, 100])
        firsts = [0, 100, 200, 300, 1000, 1100]  # a gap before the fifth
        for x, k in zip(data, firsts, strict=True):
            src._emit(x, k, CLOCK_NS + k)
        first = await src.__anext__()
        block, count = src.join_queued(first, max_samples=1000)
        assert count == 4 and block.first_index == 0 and block.n == 350
        assert block.t0_ns == CLOCK_NS  # the first block's clock
        np.testing.assert_array_equal(block.data, np.concatenate(data[:4], axis=1))
        # the block after the gap is not joined: it comes next, as it was
        nxt = await src.__anext__()
        assert nxt.first_index == 1000 and nxt.n == 100
        np.testing.assert_array_equal(nxt.data, data[4])
        # at most max_samples in all: the last one stays queued
        block, count = src.join_queued(nxt, max_samples=150)
        assert count == 1 and block is nxt
        last = await src.__anext__()
        assert last.first_index == 1100
        assert src.status()["queued"] == 0
        await src.aclose()

    run(go())


def test_a_joined_backlog_gives_the_frames_of_the_blocks_one_by_one(tmp_path: object) -> None:
    doc = {
        "analysis": {"fmax_hz": 1000.0, "lines": 400, "overlap": 0.75,
                     "averaging": "exponential", "averages": 4},
        "sources": [{"id": "s", "kind": "tcp", "listen": "127.0.0.1:9", "format": "framed",
                     "sample_rate_hz": FS, "channels": list(IDS)}],
        "bands": [{"name": "low", "lo_hz": 10.0, "hi_hz": 400.0}],
    }
    cfg = parse_config(doc)
    sizes = [256] * 20
    data = _blocks(sizes, seed=11)

    def pipeline() -> SourcePipeline:
        async def publish(*_: object) -> None:
            return None

        return SourcePipeline(Held("s", IDS, FS), channel_states(cfg, "s", IDS), publish,
                              make_bank=lambda fs: ProfileBank(cfg, list(IDS), fs), cfg=cfg)

    one, joined = pipeline(), pipeline()
    k = 0
    for x in data:
        last_one = one.process_pushes(SampleBlock("s", IDS, x, k, k * 1000, FS))
        one.count_frames(last_one)
        k += x.shape[1]
    big = SampleBlock("s", IDS, np.concatenate(data, axis=1), 0, 0, FS)
    last_joined = joined.process_pushes(big)
    joined.count_frames(last_joined)
    assert last_one and last_joined
    a, b = last_one[-1], last_joined[-1]
    assert a.end_index == b.end_index
    for cid in IDS:  # every frame counted either way: floor((n − N)/hop) + 1 (common practice)
        assert one.channels[cid].frames == joined.channels[cid].frames == (5120 - 1024) // 256 + 1
    # the same averages to float32 rounding (streaming equals batch: tests/dsp)
    np.testing.assert_allclose(b.power, a.power, rtol=1e-4, atol=1e-12)
    np.testing.assert_allclose(b.bands, a.bands, rtol=1e-4)

"""What one benchmark run measures: :class:`BenchPlan` (full and CI-sized short runs)."""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["BenchPlan"]


@dataclass
class BenchPlan:
    """What one run measures; ``BenchPlan.short()`` is the CI-sized run."""

    short: bool = False
    fs_hz: float = 25600.0
    fmax_hz: float = 10000.0
    lines: int = 3200
    overlap: float = 0.75
    per_source: int = 16  # channels per TCP source
    block_s: float = 0.1  # samples per framed block, s
    queue_blocks: int = 20  # the sources' hand-over queue: 2 s of blocks
    steps: tuple[int, ...] = (32, 64, 128, 192, 256, 384, 512)
    step_s: float = 20.0
    refine: int = 1
    fanout_clients: int = 50
    fanout_channels: int = 64
    fanout_s: float = 15.0
    fanout_rate_hz: float = 50.0  # subscription limit; frames come at ~10 Hz per channel
    fanout_deflate: bool = True  # clients offer permessage-deflate, as browsers do
    mem_channels: int = 4
    mem_lines: int = 400
    mem_block: int = 65536  # samples per channel per framed block
    mem_checkpoints: tuple[int, ...] = (10_000, 100_000, 1_000_000)  # frames, all channels
    mem_timeout_s: float = 900.0
    # [cluster] of the service under test: None (one process, every phase), "process" (one
    # process, headroom and latency only: the baseline of a cluster comparison) or a Ray
    # address ("local": the service starts a Ray of ``workers`` processes on this machine)
    cluster: str | None = None
    workers: int = 1

    @classmethod
    def for_mode(cls, short: bool) -> BenchPlan:
        if not short:
            return cls()
        return cls(short=True, steps=(16, 32), step_s=3.0, refine=0, fanout_clients=10,
                   fanout_channels=32, fanout_s=3.0, mem_block=16384,
                   mem_checkpoints=(1_000, 100_000), mem_timeout_s=120.0)

    @property
    def max_channels(self) -> int:
        top = max(self.steps) if self.steps else self.per_source
        return max(top, self.fanout_channels)

    @property
    def n(self) -> int:
        return int(round(2.56 * self.lines))  # common practice: N = 2.56·lines

    @property
    def hop(self) -> int:
        return max(1, int(round(self.n * (1.0 - self.overlap))))

    @property
    def block(self) -> int:
        return int(round(self.block_s * self.fs_hz))

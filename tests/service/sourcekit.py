"""Helpers shared by the source tests: a bounded event loop, polling, block collection."""

from __future__ import annotations

import asyncio
from collections.abc import Callable, Coroutine
from typing import Any

import numpy as np

from service.types import SampleBlock

CLOCK_NS = 1_700_000_000_000_000_000  # a fixed wall clock for the sources under test
FS = 1000.0


def run(coro: Coroutine[Any, Any, None], timeout_s: float = 5.0) -> None:
    """Run ``coro`` on a new event loop; fail after ``timeout_s`` instead of hanging."""

    async def bounded() -> None:
        async with asyncio.timeout(timeout_s):
            await coro

    asyncio.run(bounded())


async def until(cond: Callable[[], bool]) -> None:
    while not cond():
        await asyncio.sleep(0.005)


async def take(src: Any, n_samples: int) -> list[SampleBlock]:
    """Blocks from ``src`` until they hold at least ``n_samples`` samples per channel."""
    out: list[SampleBlock] = []
    while sum(b.n for b in out) < n_samples:
        out.append(await src.__anext__())
    return out


def joined(blocks: list[SampleBlock]) -> np.ndarray:
    return np.concatenate([b.data for b in blocks], axis=1)

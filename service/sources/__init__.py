"""Sample sources: TCP, UDP, file tail/replay and the simulated plant, each read as
``async for block in source``; :func:`make_source` builds one from its config entry.

Knows nothing about the engine, the pipeline or HTTP."""

from __future__ import annotations

import time
from collections.abc import Callable

from ..config import (
    FileSourceConfig,
    SimulatedSourceConfig,
    SourceConfig,
    TcpSourceConfig,
    UdpSourceConfig,
    parse_listen,
)
from .base import GAP_SAMPLES, QueuedSource, Source
from .filetail import FileSource
from .tcp import TcpSource
from .udp import UdpSource

__all__ = [
    "GAP_SAMPLES",
    "FileSource",
    "QueuedSource",
    "Source",
    "TcpSource",
    "UdpSource",
    "make_source",
]


def make_source(cfg: SourceConfig, *, clock: Callable[[], int] = time.time_ns) -> Source:
    """The source described by one validated ``[[sources]]`` entry (not yet started).

    ``clock`` gives wall time in ns since the Unix epoch (tests pass a fixed one).
    """
    if isinstance(cfg, TcpSourceConfig | UdpSourceConfig):
        host, port = parse_listen(cfg.listen)
        fs = float(cfg.sample_rate_hz or 0.0)  # required for these kinds by the config checks
        if isinstance(cfg, TcpSourceConfig):
            return TcpSource(
                cfg.id,
                cfg.channels,
                fs,
                host,
                port,
                cfg.format,
                queue_blocks=cfg.queue_blocks,
                idle_timeout_s=cfg.idle_timeout_s,
                max_frame_bytes=cfg.max_frame_bytes,
                allow_from=cfg.allow_from,
                clock=clock,
            )
        return UdpSource(
            cfg.id, cfg.channels, fs, host, port, queue_blocks=cfg.queue_blocks,
            max_frame_bytes=cfg.max_frame_bytes, allow_from=cfg.allow_from, clock=clock,
        )
    if isinstance(cfg, FileSourceConfig):
        return FileSource(
            cfg.id,
            cfg.channels,
            cfg.sample_rate_hz,
            cfg.path,
            cfg.format,
            follow=cfg.follow,
            replay_speed=cfg.replay_speed,
            poll_s=cfg.poll_ms / 1000.0,
            start_at=cfg.start_at,
            queue_blocks=cfg.queue_blocks,
            clock=clock,
        )
    if isinstance(cfg, SimulatedSourceConfig):
        from .simulated import SimulatedSource, build_scenario

        kwargs: dict[str, object] = {
            "seed": cfg.seed, "fault_start_s": cfg.fault_start_s, "fault_ramp_s": cfg.fault_ramp_s,
            "speed_ramp_s": cfg.speed_ramp_s,
        }
        if cfg.sample_rate_hz is not None:
            kwargs["fs"] = cfg.sample_rate_hz
        if cfg.channels:
            kwargs["channels"] = cfg.channels
        model = build_scenario(cfg.scenario, **kwargs)
        return SimulatedSource(
            cfg.id,
            model,
            speed=cfg.speed,
            queue_blocks=cfg.queue_blocks,
            clock=lambda: clock() / 1e9,
        )
    raise TypeError(f"unknown source config {type(cfg).__name__}")

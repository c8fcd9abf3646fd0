"""Helpers shared by the cluster tests: a recording and the config that replays it, and a
comparison of SpectralFrames field by field (arrays bit for bit, NaN equal to NaN)."""

from __future__ import annotations

import asyncio
import dataclasses
import math
from pathlib import Path
from typing import Any

import numpy as np

from service.config import parse_config
from service.pipeline import SourcePipeline, channel_states
from service.profiles import ProfileBank
from service.recording import write_wav
from service.sources import make_source
from service.types import PushFrames, SpectralFrame

FS = 2560.0  # 2.56 × Fmax 1000 Hz (common practice: fs = 2.56·Fmax)
IDS = ["m1-de-h", "m1-de-v"]


def recording(path: Path, seconds: float = 12.0, seed: int = 7) -> Path:
    """Two channels, in g: a 24.75 Hz 1X, its harmonics and noise (fixed seed)."""
    rng = np.random.default_rng(seed)
    t = np.arange(int(seconds * FS)) / FS
    x = np.stack([
        0.2 * np.sin(2 * np.pi * 24.75 * t) + 0.05 * np.sin(2 * np.pi * 49.5 * t),
        0.1 * np.sin(2 * np.pi * 24.75 * t + 1.0) + 0.03 * np.sin(2 * np.pi * 160.0 * t),
    ]) + 0.01 * rng.standard_normal((2, t.size))
    write_wav(path, x.astype(np.float32), FS)
    return path


def replay_doc(path: Path, *, source_id: str = "rec", **source: Any) -> dict[str, Any]:
    """A config replaying ``path`` as fast as the pipeline takes it, with two profiles, bands,
    tracked tones and an alarm rule."""
    return {
        "analysis": {"fmax_hz": 1000.0, "lines": 400, "overlap": 0.5, "unit": "velocity",
                     "averaging": "linear", "averages": 4},
        "profiles": {"wide": {}, "narrow": {"fmax_hz": 250.0, "lines": 200}},
        "sources": [{"id": source_id, "kind": "file", "path": str(path), "format": "wav",
                     "follow": False, "replay_speed": 0.0, "channels": IDS, **source}],
        "channels": [{"id": c, "speed_rpm": 1485.0, "profiles": ["wide", "narrow"]}
                     for c in IDS],
        "bands": [{"name": "1x", "lo_order": 0.8, "hi_order": 1.2},
                  {"name": "overall", "lo_hz": 10.0, "hi_hz": 990.0}],
        "tones": [{"name": "1X", "order": 1.0}, {"name": "2X", "order": 2.0}],
        "alarms": [{"overall": True, "alert": 1000.0, "danger": 2000.0}],
    }


def same(a: object, b: object) -> bool:
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        a, b = np.asarray(a), np.asarray(b)
        return a.dtype == b.dtype and a.shape == b.shape and a.tobytes() == b.tobytes()
    if isinstance(a, float) and isinstance(b, float):
        return a == b or (math.isnan(a) and math.isnan(b))
    if isinstance(a, tuple | list) and isinstance(b, tuple | list):
        return len(a) == len(b) and all(same(x, y) for x, y in zip(a, b, strict=True))
    return a == b


def frame_differences(a: SpectralFrame, b: SpectralFrame,
                      skip: tuple[str, ...] = ()) -> list[str]:
    """The fields in which two frames differ (peaks compared as the tuples they read as)."""
    out = []
    for f in dataclasses.fields(SpectralFrame):
        if f.name in skip:
            continue
        x, y = getattr(a, f.name), getattr(b, f.name)
        if f.name == "peaks":
            x, y = tuple(x), tuple(y)
        if not same(x, y):
            out.append(f.name)
    return out


def capture_frames(svc: Any, got: list[SpectralFrame]) -> None:
    """Append to ``got`` every frame of every push ``svc`` (a service.app.Service) offers to
    the stream, as it is offered, and subscribe to every channel's spectra so that every
    push brings its own (in cluster mode spectra travel only when someone reads them)."""
    offer = svc.hub.offer_push

    def capture(push: PushFrames) -> None:
        got.extend(push.frames())
        offer(push)

    svc.hub.offer_push = capture
    svc.hub.subscribe().kinds = frozenset({"spectrum"})


def local_frames(cfg_doc: dict[str, object]) -> list[SpectralFrame]:
    """The recording's frames from a SourcePipeline in this process (as the service runs it
    without [cluster])."""
    cfg = parse_config(cfg_doc, source="test")
    src = make_source(cfg.sources[0])
    ids = list(src.channel_ids)
    out: list[SpectralFrame] = []

    async def publish(p: object, pushes: list[PushFrames], latency_s: float) -> None:
        # the pipeline publishes one PushFrames per group; its frames as the service reads them
        out.extend(f for push in pushes for f in push.frames())

    async def go() -> None:
        p = SourcePipeline(src, channel_states(cfg, "rec", ids), publish,
                           lambda fs: ProfileBank(cfg, ids, fs), cfg=cfg)
        async with asyncio.timeout(60):
            await src.start()
            await p.run()
            await src.aclose()

    asyncio.run(go())
    return out

"""A channel's frame counter and its latest spectrum are one view: the counter a REST reader
gets counts exactly the frames up to the spectrum beside it, also between the source's
worker finishing a block and the event loop publishing it.

Drives the service's own pipeline in-process: ``process_pushes`` is the worker thread's
part, ``Service.on_frames`` the event loop's; REST through the app on the same hub."""

from __future__ import annotations

import asyncio
from pathlib import Path

import numpy as np
from fastapi.testclient import TestClient

from service.api import create_app
from service.app import Service
from service.config import parse_config
from service.types import SampleBlock

FS = 2560.0
N, HOP = 1024, 512  # 400 lines: N = 2.56 · lines (common practice); 50 % overlap
BLOCK = 384  # not a multiple of the hop: some blocks finish no frame, some one
IDS = ("c0", "c1")


def _view(client: TestClient, cid: str) -> tuple[int, int | None]:
    """(frames counter, frames up to the latest spectrum by its end time) of one GET."""
    d = client.get(f"/api/v1/channels/{cid}").json()
    latest = d["latest"]
    if latest is None:
        return d["counters"]["frames"], None
    end = round(latest["timestamp_ns"] * FS / 1e9)  # the stream starts at index 0, t 0
    return d["counters"]["frames"], (end - N) // HOP + 1  # frames end at N, N + hop, …


def test_counter_is_never_ahead_of_the_spectrum(tmp_path: Path) -> None:
    doc = {
        "service": {"data_dir": str(tmp_path / "data")},
        "analysis": {"fmax_hz": 1000.0, "lines": 400, "overlap": 0.5, "window": "hann",
                     "averaging": "exponential", "averages": 4},
        "sources": [{"id": "s", "kind": "tcp", "listen": "127.0.0.1:9", "format": "framed",
                     "sample_rate_hz": FS, "channels": list(IDS)}],
    }
    svc = Service(parse_config(doc))
    client = TestClient(create_app(svc.hub), base_url="http://127.0.0.1")
    p = svc.pipelines[0]
    rng = np.random.default_rng(7)
    svc.store.start()
    try:
        seen_worker_ahead = 0
        for b in range(12):
            k = b * BLOCK
            x = rng.normal(0.0, 0.1, (len(IDS), BLOCK)).astype(np.float32)
            pushes = p.process_pushes(SampleBlock("s", IDS, x, k, round(k * 1e9 / FS), FS))
            # the worker is done, the loop has not published: the reader's view is the old one
            for cid in IDS:
                frames, implied = _view(client, cid)
                assert frames == (implied or 0), (b, cid, frames, implied)
            seen_worker_ahead += sum(push.new_frames for push in pushes) > 0
            asyncio.run(svc.on_frames(p, pushes, 0.0))
            for cid in IDS:
                frames, implied = _view(client, cid)
                # every frame this far: floor((n − N)/hop) + 1 for n samples (common practice)
                want = max(0, ((b + 1) * BLOCK - N) // HOP + 1)
                assert frames == want == (implied or 0), (b, cid, frames, implied, want)
        assert seen_worker_ahead >= 5  # the check above ran while new frames were pending
    finally:
        svc.store.close()

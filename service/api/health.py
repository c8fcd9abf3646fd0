"""GET /api/v1/health: is the service up, and how are its sources and channels.

Reads the hub only."""

from __future__ import annotations

import time
from collections import Counter
from typing import Any

from fastapi import APIRouter

from .. import __version__
from .deps import HubDep

router = APIRouter(tags=["health"])


@router.get("/health", summary="Service health, source counters and channel states")
def health(hub: HubDep) -> dict[str, Any]:
    states = Counter(st.status for st in hub.channels.values())
    sources = {}
    for sid, src in hub.sources.items():
        status = getattr(src, "status", None)
        sources[sid] = status() if callable(status) else {}
    return {
        "status": "ok",
        "version": __version__,
        "uptime_s": round((time.time_ns() - hub.started_ns) / 1e9, 3),
        "channels": dict(states),
        "frames_published": hub.frames_published,
        "sources": sources,
    }

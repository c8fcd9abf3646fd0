"""GET /api/v1/health: is the service up, and how are its store, sources and channels.

Reads the hub and the store's health counters; never waits on the store's writer."""

from __future__ import annotations

import time
from collections import Counter
from typing import Any

from fastapi import APIRouter, Request

from .. import __version__
from .deps import HubDep

router = APIRouter(tags=["health"])


@router.get("/health", summary="Service health, store state, source counters and channel states")
def health(hub: HubDep, request: Request) -> dict[str, Any]:
    """``status`` is ``ok``, or ``degraded`` while the store cannot write (monitoring, alarms
    and the API go on; trends, events and evidence are not being kept — see ``store``)."""
    states = Counter(st.status for st in hub.channels.values())
    sources = {}
    for sid, src in hub.sources.items():
        status = getattr(src, "status", None)
        sources[sid] = status() if callable(status) else {}
    store = getattr(request.app.state, "store", None)
    store_health = store.health() if store is not None else None
    degraded = store_health is not None and not store_health["ok"]
    return {
        "status": "degraded" if degraded else "ok",
        "store": store_health,
        "version": __version__,
        "uptime_s": round((time.time_ns() - hub.started_ns) / 1e9, 3),
        "channels": dict(states),
        "frames_published": hub.frames_published,
        "sources": sources,
    }

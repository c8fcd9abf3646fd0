"""GET /api/v1/health: is the service up, and how are its store, sources and channels.

Reads the hub and the store's health counters; never waits on the store's writer."""

from __future__ import annotations

import time
from collections import Counter
from typing import Any

from fastapi import APIRouter

from .. import __version__
from .deps import ConfigDep, HubDep, MaybeServiceDep
from .timefields import with_times

router = APIRouter(tags=["health"])


@router.get("/health", summary="Service health, store state, source counters and channel states")
def health(hub: HubDep, service: MaybeServiceDep, cfg: ConfigDep) -> dict[str, Any]:
    """``status`` is ``ok``, or ``degraded`` while any channel is not ``ok`` (``not_ok`` lists
    them with their state, cause and since when), a source's pipeline has failed, or the
    store cannot write (monitoring, alarms and the API go on; trends, events and evidence
    are not being kept — see ``store``), or a ``[[notify]]`` entry keeps failing (``notify``:
    per entry the outbox rows pending, sent, failed and limited, and the last error), or the
    ``[mqtt]`` broker cannot be reached (``mqtt``: connected, published, backlog, dropped …),
    or the ``[opcua]`` server is not running (``opcua``: state, sessions, frames and values written,
    frames dropped, events, errors)."""
    states = Counter(st.status for st in hub.channels.values())
    not_ok = [
        {"channel": st.id, "status": st.status, "cause": st.fault,
         "since_ns": st.status_since_ns}
        for st in hub.channels.values() if st.status != "ok"
    ]
    sources: dict[str, dict[str, object]] = {}
    for sid, src in hub.sources.items():
        sources[sid] = src.status()
        p = hub.pipelines.get(sid)
        if p is not None:
            sources[sid]["pipeline"] = {
                "state": "failed" if p.failed else "running",
                "error": p.failed,
                "failures": p.failures,
                "analysis_restarts": p.restarts,
            }
    store_health = service.store.health() if service is not None else None
    store_failing = store_health is not None and not store_health["ok"]
    failed = any(p.failed for p in hub.pipelines.values())
    notifier = service.notifier if service is not None else None
    notify = notifier.health() if notifier is not None else None
    notify_failing = notify is not None and not notify["ok"]
    mqtt = service.mqtt.health() if service is not None and service.mqtt is not None else None
    mqtt_failing = mqtt is not None and not mqtt["ok"]
    opcua = service.opcua.health() if service is not None and service.opcua is not None else None
    opcua_failing = opcua is not None and not opcua["ok"]
    degraded = (store_failing or not_ok or failed or notify_failing or mqtt_failing
                or opcua_failing)
    return with_times({
        "status": "degraded" if degraded else "ok",
        "store": store_health,
        "notify": notify,
        "mqtt": mqtt,
        "opcua": opcua,
        "version": __version__,
        "uptime_s": round((time.time_ns() - hub.started_ns) / 1e9, 3),
        "channels": dict(states),
        "not_ok": not_ok,
        "frames_published": hub.frames_published,
        "sources": sources,
    }, cfg.service.timezone)


@router.get("/health/live", summary="Liveness: the service answers (no token needed, no details)")
def live() -> dict[str, str]:
    """Always ``{"status": "ok"}`` while the process serves HTTP; for probes that hold no
    token. Everything else about the service's health is in ``/health`` (viewer)."""
    return {"status": "ok"}

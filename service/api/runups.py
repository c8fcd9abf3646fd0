"""Run-up and coast-down records over HTTP: list a channel's stored records, fetch one
(amplitude and phase of each order against speed, JSON or CSV).

Reads the store through a worker thread (never on the event loop); knows nothing of frames,
the engine or how the records are made (service.runups)."""

from __future__ import annotations

import asyncio
import io
from typing import Annotated, Any, Literal

from fastapi import APIRouter, HTTPException, Query, Response
from fastapi import Path as Path_

from ..config import channel_settings
from .deps import ChannelDep, ConfigDep, StoreDep
from .security import Reader
from .timefields import iso_or_none, with_times

router = APIRouter(tags=["run-ups"])

PHASE_REFERENCE = ("the tacho pulse at the start of each step of whole revolutions; a bin "
                   "holds the vector mean of its steps")


def _times(d: dict[str, Any], tz: str) -> dict[str, Any]:
    d["start"] = iso_or_none(d["start_ns"], tz)
    d["end"] = iso_or_none(d["end_ns"], tz)
    return d


@router.get(
    "/channels/{channel_id}/runups",
    summary="A channel's stored run-up and coast-down records, newest first",
    responses={404: {"description": "unknown channel"}},
)
async def list_runups(
    channel: ChannelDep, store: StoreDep, cfg: ConfigDep, _: Reader,
    limit: Annotated[int, Query(ge=1, le=1000, description="at most this many")] = 100,
) -> dict[str, Any]:
    ch = channel_settings(cfg, channel.id)
    rows = await asyncio.to_thread(store.runups, channel.id, limit)
    tz = cfg.service.timezone
    return {
        "channel": channel.id,
        "recording": ch.runup_min_rpm is not None,
        "rpm_lo": ch.runup_min_rpm, "rpm_hi": ch.runup_max_rpm,
        "orders": list(ch.runup_orders), "rpm_step": ch.runup_rpm_step,
        "runups": [_times(r, tz) for r in rows],
    }


@router.get(
    "/channels/{channel_id}/runups/{runup_id}",
    summary="One run-up or coast-down record: amplitude and phase per order against speed",
    responses={
        200: {"content": {"application/json": {}, "text/csv": {}}},
        404: {"description": "unknown channel, or no such record on it"},
    },
)
async def get_runup_record(
    channel: ChannelDep, store: StoreDep, cfg: ConfigDep, _: Reader,
    runup_id: Annotated[int, Path_(ge=1, le=2**63 - 1, description="record id")],
    format: Annotated[Literal["json", "csv"], Query(description="json | csv")] = "json",
) -> Any:
    r = await asyncio.to_thread(store.runup, channel.id, runup_id)
    if r is None:
        raise HTTPException(404, f"no run-up record {runup_id} on {channel.id!r}")
    tz = cfg.service.timezone
    if format == "csv":
        buf = io.StringIO()
        unit = r["unit"].replace("/", "_per_")
        cols = [f"order_{o:g}_{unit}_rms,order_{o:g}_phase_deg" for o in r["orders"]]
        buf.write("rpm,time,steps," + ",".join(cols) + "\n")
        for p in r["rows"]:
            vals = ",".join(f"{a:.9g},{ph:.6g}"
                            for a, ph in zip(p["amplitude"], p["phase_deg"], strict=True))
            buf.write(f"{p['rpm']:.9g},{iso_or_none(p['t_ns'], tz) or ''},{p['steps']},"
                      f"{vals}\n")
        return Response(buf.getvalue(), media_type="text/csv", headers={
            "Content-Disposition": f'attachment; filename="{channel.id}-runup-{runup_id}.csv"'})
    r = _times(r, tz)
    r.update(amplitude="rms", phase_reference=PHASE_REFERENCE,
             quality="ok")  # kept only while the tacho's pulses stayed plausible
    return with_times(r, tz)

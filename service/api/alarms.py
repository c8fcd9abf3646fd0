"""Alarms and events: active/latched alarms, acknowledge, the event log and its evidence.

Reads the service's alarm engine and store; writes only through the service (ack)."""

from __future__ import annotations

import asyncio
import io
from typing import Annotated, Any, Literal

import numpy as np
from fastapi import APIRouter, Body, HTTPException, Path, Query, Response
from pydantic import BaseModel, Field

from ..alarms import AckRefused, UnknownAlarm
from ..store import StoreError
from .deps import I64_MAX, AlarmsDep, ConfigDep, ServiceDep, StoreDep
from .security import Operator, Reader, role_responses
from .timefields import with_times

router = APIRouter(tags=["alarms"])


class AckBody(BaseModel):
    note: str = Field("", max_length=1000, description="Why / what was done (free text).")


@router.get("/alarms", summary="Active and latched alarms (all rules with all=true)")
def list_alarms(
    engine: AlarmsDep,
    cfg: ConfigDep,
    _: Reader,
    all: Annotated[bool, Query(description="include rules in normal state")] = False,
) -> list[dict[str, Any]]:
    views = engine.views() if all else engine.active()
    return with_times([v.as_dict() for v in views], cfg.service.timezone)


@router.post(
    "/alarms/{rule}/ack",
    summary="Acknowledge an alarm (operator role)",
    responses={
        **role_responses("operator"),
        400: {"description": "the body could not be read as UTF-8 text"},
        404: {"description": "no such alarm rule"},
        409: {"description": "the alarm is not active or already acknowledged"},
        503: {"description": "the store cannot write; nothing was acknowledged (retry later)"},
    },
)
async def ack_alarm(
    service: ServiceDep,
    cfg: ConfigDep,
    who: Operator,
    rule: Annotated[str, Path(max_length=200)],
    body: Annotated[AckBody | None, Body()] = None,
) -> dict[str, Any]:
    try:
        note = body.note if body is not None else ""
        return with_times(await service.acknowledge(rule, who.name, note),
                          cfg.service.timezone)
    except UnknownAlarm as e:
        raise HTTPException(404, str(e)) from None
    except AckRefused as e:
        raise HTTPException(409, str(e)) from None
    except StoreError as e:
        raise HTTPException(503, str(e), headers={"Retry-After": "5"}) from None


@router.get("/events", summary="The event log, newest first, paged by id")
async def list_events(
    store: StoreDep,
    cfg: ConfigDep,
    _: Reader,
    since: Annotated[
        int | None,
        Query(ge=-I64_MAX, le=I64_MAX, description="only events at/after this time, ns"),
    ] = None,
    channel: Annotated[str | None, Query(max_length=64)] = None,
    limit: Annotated[int, Query(ge=1, le=1000)] = 100,
    before_id: Annotated[
        int | None, Query(ge=1, le=I64_MAX, description="page: ids below this")
    ] = None,
) -> dict[str, Any]:
    rows = await asyncio.to_thread(store.events, since, channel, limit, before_id)
    with_times(rows, cfg.service.timezone)
    return {"events": rows, "next_before_id": rows[-1]["id"] if len(rows) == limit else None}


@router.get("/events/{event_id}", summary="One event",
            responses={404: {"description": "no such event"}})
async def get_event(
    store: StoreDep, cfg: ConfigDep, _: Reader, event_id: Annotated[int, Path(ge=1, le=I64_MAX)]
) -> dict[str, Any]:
    row = await asyncio.to_thread(store.event, event_id)
    if row is None:
        raise HTTPException(404, f"no event {event_id}")
    return with_times(row, cfg.service.timezone)


@router.get(
    "/events/{event_id}/evidence",
    summary="Spectrum and waveform kept for an event (JSON, CSV, WAV or NPY)",
    responses={
        200: {
            "content": {
                "application/json": {},
                "text/csv": {},
                "audio/wav": {},
                "application/octet-stream": {},
            }
        },
        404: {"description": "no such event, or no evidence kept for it"},
    },
)
async def get_evidence(
    store: StoreDep,
    cfg: ConfigDep,
    _: Reader,
    event_id: Annotated[int, Path(ge=1, le=I64_MAX)],
    format: Annotated[Literal["json", "csv", "wav", "npy"], Query()] = "json",
    part: Annotated[
        Literal["spectrum", "waveform"], Query(description="csv/npy: which array")
    ] = "waveform",
) -> Any:
    ev = await asyncio.to_thread(store.get_evidence, event_id)
    if ev is None:
        raise HTTPException(404, f"no evidence for event {event_id}")
    spec = ev["spectrum"]
    values = np.asarray(spec["values"], dtype=np.float32)
    wave = ev["waveform"]
    wave = np.zeros(0, np.float32) if wave is None else np.asarray(wave, dtype=np.float32)
    name = f"quaver-event-{event_id}"
    if format == "json":
        return with_times({
            "event_id": event_id,
            "t0_ns": ev["t0_ns"],
            "fs": ev["fs"],
            "spectrum": {
                **{k: v for k, v in spec.items() if k != "values"},
                "values": values.tolist(),
            },
            "waveform": {
                "fs": ev["fs"],
                "t0_ns": ev["t0_ns"],
                "unit": spec.get("input_unit", ""),
                "samples": wave.tolist(),
            },
        }, cfg.service.timezone)
    if format == "wav":
        from ..recording import write_wav

        buf = io.BytesIO()
        write_wav(buf, wave[None, :], ev["fs"], "f32le")  # float WAV keeps engineering units
        return Response(
            buf.getvalue(),
            media_type="audio/wav",
            headers={"Content-Disposition": f'attachment; filename="{name}.wav"'},
        )
    arr = values if part == "spectrum" else wave
    if format == "npy":
        buf = io.BytesIO()
        np.save(buf, arr, allow_pickle=False)
        return Response(
            buf.getvalue(),
            media_type="application/octet-stream",
            headers={"Content-Disposition": f'attachment; filename="{name}-{part}.npy"'},
        )
    if part == "spectrum":
        f = spec["f0_hz"] + spec["df_hz"] * np.arange(values.size)
        rows = zip(f, values, strict=True)
        text = "frequency_hz,value\n" + "".join(f"{a:.6g},{b:.7g}\n" for a, b in rows)
    else:
        t = np.arange(wave.size) / ev["fs"]
        rows = zip(t, wave, strict=True)
        text = "time_s,value\n" + "".join(f"{a:.7g},{b:.7g}\n" for a, b in rows)
    return Response(
        text,
        media_type="text/csv",
        headers={"Content-Disposition": f'attachment; filename="{name}-{part}.csv"'},
    )

"""GET /api/v1/channels/{id}/trend: stored band/overall/tone values over time.

Reads the store through a worker thread; never blocks the event loop."""

from __future__ import annotations

import asyncio
import time
from typing import Annotated, Any

from fastapi import APIRouter, HTTPException, Query

from ..store import trend_key
from .deps import ChannelDep, ConfigDep, ProfileQ, StoreDep, check_profile, invalid, invalid_query
from .security import Reader
from .timefields import iso_or_none

router = APIRouter(tags=["trends"])

_NS = 1_000_000_000

MAX_S = 9.2e9  # times in s whose ns still fit a signed 64-bit integer




@router.get(
    "/channels/{channel_id}/trend",
    summary="Trend of one value: overall, band:<name> or tone:<name>",
    responses={
        404: {"description": "unknown channel, or no such trend on it"},
        **invalid("a value out of its range, or since not before until (an empty or reversed "
                  "interval)"),
    },
)
async def get_trend(
    channel: ChannelDep,
    store: StoreDep,
    cfg: ConfigDep,
    _: Reader,
    name: Annotated[
        str, Query(max_length=200, description="overall | band:<name> | tone:<name>")
    ] = "overall",
    since: Annotated[
        float | None,
        Query(ge=-MAX_S, le=MAX_S, description="start, s since the Unix epoch; default: 1 h ago"),
    ] = None,
    until: Annotated[
        float | None,
        Query(ge=-MAX_S, le=MAX_S, description="end, s since the Unix epoch; default: now"),
    ] = None,
    step: Annotated[
        int | None,
        Query(ge=1, le=31 * 86400, description="bucket, s, rounded up to a multiple of the "
              "stored step (service.trend_step_s; the answer's step_s); default: the finest kept"),
    ] = None,
    profile: ProfileQ = None,
) -> dict[str, Any]:
    prof = check_profile(channel, profile)
    shown = name
    if prof != channel.profiles[0]:
        name = trend_key(prof, name)
    now = time.time()
    until_s = now if until is None else until
    since_s = until_s - 3600 if since is None else since
    if not since_s < until_s:
        invalid_query("since", f"since={since_s:g} must be before until={until_s:g}")
    since_ns, until_ns = int(since_s * _NS), int(until_s * _NS)
    if step is not None:  # buckets are made of stored ones: round up to a whole number of them
        base = cfg.service.trend_step_s
        step = -(-step // base) * base
    try:
        points = await asyncio.to_thread(store.trend, channel.id, name, since_ns, until_ns, step)
        used = await asyncio.to_thread(store.trend_step, since_ns, step)
    except ValueError as e:  # e.g. a step that is not a multiple of the stored step
        invalid_query("step", str(e))
    names = await asyncio.to_thread(store.trend_names, channel.id)
    tz = cfg.service.timezone
    if not points and name not in names and names:
        raise HTTPException(404, f"no trend {name!r} on {channel.id!r}; have: {', '.join(names)}")
    return {
        "channel": channel.id,
        "profile": prof,
        "name": shown,
        "step_s": used,
        "since": since_s,
        "until": until_s,
        "points": [
            {"t_ns": t, "time": iso_or_none(t, tz), "mean": m, "min": lo, "max": hi, "count": n}
            for t, m, lo, hi, n in points
        ],
    }

"""GET /api/v1/channels/{id}/waveform: the newest raw samples of a channel (input units,
after sensitivity), from the ring its pipeline keeps for alarm evidence.

Reads the hub's pipelines; knows nothing about the analysis or the store."""

from __future__ import annotations

import math
from typing import Annotated, Any

import numpy as np
from fastapi import APIRouter, HTTPException, Query

from .deps import ChannelDep, ConfigDep, HubDep
from .timefields import iso_or_none

router = APIRouter(tags=["channels"])
MAX_SECONDS = 1.0  # the span one request may ask for, s (our choice: a display, not a recorder)
MAX_SAMPLES = 65536  # the samples one answer holds at most, before decimation


def min_max(x: np.ndarray, points: int) -> tuple[np.ndarray, np.ndarray, int]:
    """Decimate for display: ``x`` cut into ``points // 2`` runs of ``step`` samples, each
    run's minimum and maximum (a peak never disappears between two drawn points); returns
    (lows, highs, step). No decimation (step 1) when ``x`` fits in ``points``."""
    n = x.size
    if n <= points:
        return x, x, 1
    step = math.ceil(n / max(1, points // 2))
    runs = n // step
    y = x[: runs * step].reshape(runs, step)
    return y.min(axis=1), y.max(axis=1), step


@router.get(
    "/channels/{channel_id}/waveform",
    summary="The newest raw samples of a channel (input units), optionally decimated",
    responses={404: {"description": "unknown channel"},
               503: {"description": "no samples yet (Retry-After: 1)"}},
)
def get_waveform(
    channel: ChannelDep,
    hub: HubDep,
    cfg: ConfigDep,
    seconds: Annotated[float, Query(gt=0, le=MAX_SECONDS, description="span, s")] = 0.5,
    points: Annotated[int | None, Query(ge=16, le=MAX_SAMPLES, description=(
        "decimate to about this many points for display (min/max pairs)"))] = None,
) -> dict[str, Any]:
    p = hub.pipelines.get(channel.source_id)
    got = None if p is None else p.latest_waveform(channel.id, seconds)
    if got is None or got[0].size == 0:
        raise HTTPException(503, f"channel {channel.id!r} has no samples yet",
                            headers={"Retry-After": "1"})
    wave, fs, t0_ns = got
    if wave.size > MAX_SAMPLES:
        t0_ns += round((wave.size - MAX_SAMPLES) * 1e9 / fs)
        wave = wave[-MAX_SAMPLES:]
    d: dict[str, Any] = {
        "channel": channel.id, "unit": channel.input_unit, "fs": fs, "t0_ns": t0_ns,
        "t0": iso_or_none(t0_ns, cfg.service.timezone), "n": int(wave.size),
        "seconds": wave.size / fs, "status": channel.status,
    }
    if points is None:
        d.update(step=1, samples=wave.astype(np.float64).tolist())
    else:
        lo, hi, step = min_max(wave, points)
        if step == 1:
            d.update(step=1, samples=wave.astype(np.float64).tolist())
        else:
            d.update(step=step, min=lo.astype(np.float64).tolist(),
                     max=hi.astype(np.float64).tolist())
    return d

"""GET /api/v1/channels/{id}/kurtogram: the fast kurtogram behind an envelope profile's band
(levels × bands matrix and the choice), as its pipeline keeps it; for a fixed band, one
computed on request from the newest samples.

Reads the hub's pipelines and the dsp kurtogram; knows nothing about storage."""

from __future__ import annotations

import math
from typing import Any

from fastapi import APIRouter, HTTPException

from dsp.kurtogram import fast_kurtogram

from ..lookups import effective_analysis
from .deps import ChannelDep, ConfigDep, HubDep, ProfileQ, check_profile
from .timefields import iso_or_none

router = APIRouter(tags=["channels"])


@router.get(
    "/channels/{channel_id}/kurtogram",
    summary="The kurtogram that chose an envelope profile's band, and the band in use",
    responses={404: {"description": "unknown channel or profile, or not an envelope profile"},
               503: {"description": "no kurtogram yet (Retry-After)"}},
)
def get_kurtogram(channel: ChannelDep, hub: HubDep, cfg: ConfigDep,
                  profile: ProfileQ = None) -> dict[str, Any]:
    name = check_profile(channel, profile)
    settings = effective_analysis(cfg, channel.id, name)
    if settings.kind != "envelope":
        raise HTTPException(404, f"profile {name!r} of channel {channel.id!r} is not an "
                                 "envelope profile (kind = 'envelope')")
    p = hub.pipelines.get(channel.source_id)
    state = None if p is None else p.envelope_state(channel.id, name)
    if state is None:
        raise HTTPException(503, f"channel {channel.id!r} has not started profile {name!r}",
                            headers={"Retry-After": "2"})
    if state.get("kurtogram") is None and state["mode"] == "fixed" and p is not None:
        # a fixed band has no kurtogram of its own: compute one now to show how it fares
        got = p.latest_waveform(channel.id, settings.kurtogram_length_s)
        if got is not None and got[0].size >= 256:
            wave, fs, t0_ns = got
            nlevel = max(1, min(settings.kurtogram_levels, int(math.log2(wave.size)) - 7))
            state["kurtogram"] = fast_kurtogram(wave.astype("float64"), fs, nlevel).as_dict()
            state["kurtogram_t_ns"] = t0_ns + round(wave.size * 1e9 / fs)
            state["computed_on_request"] = True
    if state.get("kurtogram") is None:
        raise HTTPException(503, f"channel {channel.id!r} profile {name!r} has no kurtogram "
                                 "yet", headers={"Retry-After": "2"})
    t_ns = state.get("kurtogram_t_ns")
    return {"channel": channel.id, "profile": name, "status": channel.status, **state,
            "kurtogram_t": iso_or_none(t_ns if isinstance(t_ns, int) else None,
                                       cfg.service.timezone)}

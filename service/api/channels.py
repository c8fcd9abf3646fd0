"""Channel resources: list, state, latest spectrum (JSON/CSV/NPY, any unit), bands, tones.

Reads the hub's latest frames; never touches an engine."""

from __future__ import annotations

import time
from typing import Annotated, Any, Literal

import numpy as np
from fastapi import APIRouter, Body, HTTPException, Query, Response
from pydantic import BaseModel, Field

from dsp.types import AMPLITUDES, OUTPUT_UNITS, QUANTITIES

from ..config import Config
from ..hub import Hub
from ..spectra import (
    band_items,
    frame_speed,
    overall_item,
    peak_items,
    spectrum_values,
    to_csv,
    to_npy,
    tone_items,
)
from ..speed import NotEnoughRevolutions
from ..speedwrite import SpeedRefused, write_speed
from ..types import ChannelState, SpectralFrame
from .deps import (
    NO_FRAME,
    NOT_FOUND,
    ChannelDep,
    ConfigDep,
    HubDep,
    ProfileQ,
    get_frame,
)
from .rules import names
from .security import Operator, role_responses
from .timefields import with_times

router = APIRouter(tags=["channels"])

UnitQ = Literal[
    "g", "m/s2", "mm/s", "in/s", "um", "mil", "acceleration", "velocity", "displacement"
]
AmplitudeQ = Literal["peak", "rms", "peak-to-peak"]
assert set(UnitQ.__args__) == set(OUTPUT_UNITS + QUANTITIES)  # type: ignore[attr-defined]
assert set(AmplitudeQ.__args__) == set(AMPLITUDES)  # type: ignore[attr-defined]


def _num(v: float) -> float | None:
    """JSON has no NaN: unresolved values (e.g. an order band without a speed) are null."""
    return None if not np.isfinite(v) else float(v)


def _stamp(frame: SpectralFrame) -> dict[str, Any]:
    d = {
        "channel": frame.channel,
        "profile": frame.profile,
        "seq": frame.seq,
        "timestamp_ns": frame.t_ns,
        "timestamp": _iso(frame.t_ns),
        "quality": frame.quality,
        # the unit of every x value below (f0_hz, df_hz, fmax_hz, lowcut_hz, band edges, tone
        # and peak frequencies): "Hz", or "order" for an order profile
        "x_unit": frame.x_unit,
    }
    if frame.speed_source:
        d["speed"] = frame_speed(frame)
    return d


def _now_state(st: ChannelState) -> dict[str, Any]:
    """The channel's data-quality state now, beside a frame's values: a number is never
    shown without it (a frame can be the last one before the channel went silent)."""
    age = None if st.last_frame_mono is None else time.monotonic() - st.last_frame_mono
    return {
        "status": st.status,
        "status_cause": st.fault,
        "age_s": None if age is None else round(age, 3),
        "live": st.status == "ok",
    }


def _iso(t_ns: int) -> str | None:
    """ISO 8601 UTC of a time in ns since the epoch; None outside datetime64[ns]'s range
    (a producer's header clock can be anything; the ns value is still reported)."""
    try:
        return np.datetime_as_string(np.datetime64(int(t_ns), "ns"), unit="ms") + "Z"
    except (OverflowError, ValueError):
        return None


def _summary(hub: Hub, cid: str, cfg: Config) -> dict[str, Any]:
    st = hub.channels[cid]
    d: dict[str, Any] = st.as_dict()
    nm = names(cfg, cid)
    d.update(name=nm["channel_name"], machine_name=nm["machine_name"],
             machine_group=nm["machine_group"])
    d.update(_now_state(st))
    f = hub.latest.get(cid)
    if f is not None:
        d["latest"] = {
            **_stamp(f),
            "unit": f.unit,
            "overall": _num(f.overall),
            "overall_lo_hz": _num(f.overall_lo_hz),
            "overall_hi_hz": _num(f.overall_hi_hz),
            "fmax_hz": f.fmax_hz,
            "lines": f.lines,
        }
    else:
        d["latest"] = None
    for p in d["profiles"]:
        pf = hub.by_profile.get((cid, p["name"]))
        p["latest"] = None if pf is None else {
            **_stamp(pf), "unit": pf.unit, "overall": _num(pf.overall),
            "overall_lo_hz": _num(pf.overall_lo_hz), "overall_hi_hz": _num(pf.overall_hi_hz),
            "averages": pf.averages,
        }
    return with_times(d, cfg.service.timezone)


@router.get("/channels", summary="Every channel with its state, counters and latest overall")
def list_channels(hub: HubDep, cfg: ConfigDep) -> list[dict[str, Any]]:
    return [_summary(hub, cid, cfg) for cid in hub.channels]


@router.get("/channels/{channel_id}", summary="One channel's state and counters",
            responses=NOT_FOUND)
def get_channel(channel: ChannelDep, hub: HubDep, cfg: ConfigDep) -> dict[str, Any]:
    return _summary(hub, channel.id, cfg)


@router.get(
    "/channels/{channel_id}/spectrum",
    summary="Latest averaged spectrum in any unit and amplitude type",
    responses={
        200: {"content": {"application/json": {}, "text/csv": {}, "application/octet-stream": {}}},
        404: {"description": "unknown channel or profile"},
        503: {"description": "no spectrum yet"},
    },
)
def get_spectrum(
    channel: ChannelDep,
    hub: HubDep,
    cfg: ConfigDep,
    profile: ProfileQ = None,
    unit: Annotated[
        UnitQ | None, Query(description="Unit or quantity; default: the channel's")
    ] = None,
    amplitude: Annotated[AmplitudeQ | None, Query(description="peak | rms | peak-to-peak")] = None,
    format: Annotated[
        Literal["json", "csv", "npy"], Query(description="json | csv | npy")
    ] = "json",
) -> Any:
    # Looked up here, not as a dependency, so that bad query values are a 422 even before
    # the channel's first spectrum (a dependency's 503 would come first).
    frame = get_frame(channel.id, hub, profile)
    values, u, a = spectrum_values(frame, unit, amplitude)
    if format == "csv":
        return Response(to_csv(frame, values, u, a), media_type="text/csv")
    if format == "npy":
        return Response(
            to_npy(values),
            media_type="application/octet-stream",
            headers={
                "X-Quaver-F0-Hz": str(frame.f0_hz),
                "X-Quaver-Df-Hz": repr(frame.df_hz),
                "X-Quaver-X-Unit": frame.x_unit,
                "X-Quaver-Unit": u,
                "X-Quaver-Amplitude": a,
                "X-Quaver-Profile": frame.profile,
            },
        )
    return with_times({
        **_stamp(frame),
        **_now_state(channel),
        "f0_hz": frame.f0_hz,
        "df_hz": frame.df_hz,
        "lines": frame.lines,
        "fmax_hz": frame.fmax_hz,
        "unit": u,
        "amplitude": a,
        "averages": frame.averages,
        "averaging": frame.averaging,
        "window": frame.window,
        "enbw_bins": frame.enbw_bins,
        "lowcut_hz": frame.lowcut_hz,
        "sample_rate_hz": frame.fs,
        "n": frame.n,
        "values": values.tolist(),
    }, cfg.service.timezone)


def bands_payload(frame: SpectralFrame) -> dict[str, Any]:
    return {
        **_stamp(frame),
        "unit": frame.unit,
        "amplitude": "rms",
        **overall_item(frame),
        "lowcut_hz": frame.lowcut_hz,
        "bands": band_items(frame),
    }


def tones_payload(frame: SpectralFrame) -> dict[str, Any]:
    return {
        **_stamp(frame),
        "unit": frame.unit,
        "amplitude": frame.amplitude,
        "lowcut_hz": frame.lowcut_hz,
        "tones": tone_items(frame),
        "peaks": peak_items(frame),
    }


@router.get("/channels/{channel_id}/bands", summary="Latest band RMS values and the overall",
            responses=NO_FRAME)
def get_bands(channel: ChannelDep, hub: HubDep, cfg: ConfigDep, profile: ProfileQ = None
              ) -> dict[str, Any]:
    d = {**bands_payload(get_frame(channel.id, hub, profile)), **_now_state(channel)}
    return with_times(d, cfg.service.timezone)


@router.get("/channels/{channel_id}/tones", summary="Tracked tones and the largest peaks",
            responses=NO_FRAME)
def get_tones(channel: ChannelDep, hub: HubDep, cfg: ConfigDep, profile: ProfileQ = None
              ) -> dict[str, Any]:
    d = {**tones_payload(get_frame(channel.id, hub, profile)), **_now_state(channel)}
    return with_times(d, cfg.service.timezone)


class SpeedBody(BaseModel):
    rpm: float | None = Field(
        ..., gt=0, le=1e6,
        description="Running speed, r/min; null returns the channel to its configured speed.",
    )


@router.put(
    "/channels/{channel_id}/speed",
    summary="Write a channel's running speed by hand (operator role)",
    responses={
        **role_responses("operator"),
        404: {"description": "unknown channel"},
        409: {"description": "the channel's speed is measured (tacho or estimated), or it "
                             "is a tacho channel"},
    },
)
def put_speed(channel: ChannelDep, hub: HubDep, cfg: ConfigDep, who: Operator,
              body: Annotated[SpeedBody, Body()]) -> dict[str, Any]:
    try:
        speed = write_speed(cfg, hub.channels, channel.id, body.rpm, who.name,
                            manual_only=False)
    except SpeedRefused as e:
        raise HTTPException(409 if e.why == "not-writable" else 422, str(e)) from None
    return {"channel": channel.id, "speed": speed}


@router.get(
    "/channels/{channel_id}/runup",
    summary="Amplitude and phase of chosen orders against speed (run-up / coast-down data)",
    responses={404: {"description": "unknown channel, or it keeps no run-up data "
                                    "(no runup_orders)"}},
)
def get_runup(channel: ChannelDep, cfg: ConfigDep) -> dict[str, Any]:
    cap = channel.runup
    if cap is None or not cap.orders:
        raise HTTPException(404, f"channel {channel.id!r} keeps no run-up data: give it "
                            "runup_orders and a speed_from tacho")
    rows = cap.as_list()
    d = {
        "channel": channel.id,
        "orders": list(cap.orders),
        "rpm_step": cap.rpm_step,
        "unit": channel.input_unit,
        "amplitude": "rms",
        "phase_reference": "the tacho pulse at the start of each step of whole revolutions",
        "status": channel.status,
        "speed": channel.speed_dict(),
        "rows": rows,
    }
    return with_times(d, cfg.service.timezone)


@router.get(
    "/channels/{channel_id}/orders",
    summary="Order spectrum of a channel fed by a tacho, by angular resampling",
    responses={404: {"description": "unknown channel, or its speed is not from a tacho"},
               422: {"description": "omax/lines out of range"},
               503: {"description": "fewer revolutions kept than one frame needs"}},
)
def get_orders(
    channel: ChannelDep,
    cfg: ConfigDep,
    omax: Annotated[float, Query(gt=0, le=200, description="highest order shown")] = 10.0,
    lines: Annotated[int, Query(
        ge=25, le=3200, multiple_of=25,
        description="lines from 0 to omax (order resolution omax/lines); a multiple of 25 "
        "(so 2.56 × lines is a whole number of samples), e.g. 100, 200, 400, 800, 1600")] = 400,
) -> dict[str, Any]:
    cap = channel.runup
    if cap is None:
        raise HTTPException(404, f"channel {channel.id!r} has no tacho (speed_from): order "
                            "spectra need the shaft angle")
    try:
        res = cap.order_spectrum(omax, lines)
    except NotEnoughRevolutions as e:
        raise HTTPException(503, str(e), headers={"Retry-After": "5"}) from None
    d = {
        "channel": channel.id,
        "omax": omax,
        "lines": lines,
        "d_order": omax / lines,
        "frames": res.frames,
        "rpm_mean": res.rpm_mean,
        "window": "hann",
        "unit": channel.input_unit,
        "amplitude": "rms",
        "status": channel.status,
        "speed": channel.speed_dict(),
        "values": [_num(v) for v in res.amplitude_rms[0].tolist()],
    }
    return with_times(d, cfg.service.timezone)

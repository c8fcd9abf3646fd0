"""Topic names and JSON payloads of what quaver publishes over MQTT (docs/mqtt.md, the schema
in docs/mqtt.schema.json): band values, tones, spectra, channel states, alarm events.

Pure functions of frames, channel states and events; knows nothing of paho, sockets or the
event loop."""

from __future__ import annotations

import datetime
import json
import math
from collections.abc import Collection
from typing import Any

from ..spectra import band_reason, spectrum_values, tone_reason
from ..speedwrite import SpeedRefused, check_rpm
from ..timefmt import iso_time
from ..types import ChannelState, SpectralFrame

__all__ = [
    "NO_MACHINE",
    "ONLINE",
    "OFFLINE",
    "Topics",
    "bands_payload",
    "encode",
    "event_payload",
    "head",
    "parse_speed",
    "spectrum_payload",
    "status_payload",
    "tones_payload",
]

NO_MACHINE = "_"  # the machine level of a channel without a machine
ONLINE, OFFLINE = b"online", b"offline"  # <prefix>/service/state (retained; offline is the will)


class Topics:
    """Topic names under ``prefix`` for channels on ``machines`` (channel id → machine id,
    '' for none)::

        <prefix>/<machine>/<channel>/<profile>/bands | tones | spectrum
        <prefix>/<machine>/<channel>/status           (retained)
        <prefix>/<machine>/<channel>/speed/set        (subscribed: speeds written to quaver)
        <prefix>/alarms/events                        (QoS 1)
        <prefix>/service/state                        (retained: online | offline)
    """

    def __init__(self, prefix: str, machines: dict[str, str]) -> None:
        self.prefix = prefix
        self.machines = machines
        self.state = f"{prefix}/service/state"
        self.events = f"{prefix}/alarms/events"
        self._base: dict[str, str] = {}

    def channel(self, channel: str) -> str:
        base = self._base.get(channel)
        if base is None:
            base = f"{self.prefix}/{self.machines.get(channel) or NO_MACHINE}/{channel}"
            self._base[channel] = base
        return base

    def status(self, channel: str) -> str:
        return f"{self.channel(channel)}/status"

    def speed_set(self, channel: str) -> str:
        """Where a speed for ``channel`` is written (subscribed with speed_writes)."""
        return f"{self.channel(channel)}/speed/set"

    def frame(self, frame: SpectralFrame, kind: str) -> str:
        return f"{self.channel(frame.channel)}/{frame.profile}/{kind}"


def encode(doc: dict[str, Any]) -> bytes:
    """Compact UTF-8 JSON; NaN is refused (every unmeasured value is already null)."""
    return json.dumps(doc, separators=(",", ":"), allow_nan=False).encode()


def _num(v: float) -> float | None:
    f = float(v)  # math.isfinite on a float: a tenth of np.isfinite's cost on a scalar
    return f if math.isfinite(f) else None


def head(frame: SpectralFrame, st: ChannelState, machine: str, tz: str) -> dict[str, Any]:
    """What every value message starts with: whose, when, and the data-quality state with it
    (the channel's state now, and ``frame_quality``: were this frame's samples clean). Made
    once per frame; each message of the frame takes a copy."""
    return {
        "channel": frame.channel,
        "machine": machine or None,
        "profile": frame.profile,
        "seq": frame.seq,
        "t": iso_time(frame.t_ns, tz),
        "t_ns": frame.t_ns,
        "quality": st.status,
        "quality_cause": st.fault or None,
        "frame_quality": frame.quality,
    }


def bands_payload(frame: SpectralFrame, top: dict[str, Any], kinds: Collection[str]
                  ) -> dict[str, Any]:
    """The ``bands`` message (``top``: :func:`head`): RMS per band in the frame's unit,
    ``overall`` first (each part only if ``kinds`` holds ``overall`` / ``bands``), null with
    a reason when a value was not measured. The edges each value covers are not repeated in
    every message: ``GET /api/v1/channels/{id}/bands`` has them."""
    values: dict[str, float | None] = {}
    reasons: dict[str, str] = {}
    if "overall" in kinds:
        values["overall"] = v = _num(frame.overall)
        if v is None:
            reasons["overall"] = band_reason(frame, frame.overall_lo_hz, frame.overall_hi_hz)
    if "bands" in kinds:
        for b in frame.bands:
            values[b.name] = v = _num(b.value)
            if v is None:
                reasons[b.name] = band_reason(frame, b.lo_hz, b.hi_hz)
    doc = dict(top)
    doc.update(unit=frame.unit, amplitude="rms", values=values)
    if reasons:
        doc["reasons"] = reasons
    return doc


def tones_payload(frame: SpectralFrame, top: dict[str, Any]) -> dict[str, Any]:
    """The ``tones`` message (``top``: :func:`head`): each tracked tone's frequency (Hz) and
    amplitude in the frame's unit and amplitude type; null with a reason when not measured."""
    tones: dict[str, dict[str, Any]] = {}
    for t in frame.tones:
        d: dict[str, Any] = {"frequency_hz": _num(t.frequency_hz), "amplitude": _num(t.value)}
        if d["amplitude"] is None:
            d["reason"] = tone_reason(frame, t.frequency_hz)
        tones[t.name] = d
    doc = dict(top)
    doc.update(unit=frame.unit, amplitude=frame.amplitude, tones=tones)
    return doc


def spectrum_payload(frame: SpectralFrame, top: dict[str, Any]) -> dict[str, Any]:
    """The ``spectrum`` message (``top``: :func:`head`): values on f[q] = f0_hz + q·df_hz in
    the frame's unit and amplitude type (as ``GET /channels/{id}/spectrum`` gives them); the
    x values in ``x_unit`` (Hz, or orders for an order profile)."""
    values, unit, amp = spectrum_values(frame)
    doc = dict(top)
    doc.update(unit=unit, amplitude=amp, x_unit=frame.x_unit, f0_hz=frame.f0_hz,
               df_hz=frame.df_hz,
               fmax_hz=frame.fmax_hz, lines=frame.lines, averages=frame.averages,
               values=[_num(v) for v in values.tolist()])
    return doc


def status_payload(st: ChannelState, machine: str, tz: str, now_ns: int) -> dict[str, Any]:
    """The retained ``status`` message: the channel's data-quality state, why, and since when."""
    since = st.status_since_ns or None
    return {
        "channel": st.id,
        "machine": machine or None,
        "status": st.status,
        "cause": st.fault or None,
        "since": None if since is None else iso_time(since, tz),
        "since_ns": since,
        "t": iso_time(now_ns, tz),
        "t_ns": now_ns,
    }


def event_payload(event: dict[str, Any], store_id: str, machine: str, tz: str
                  ) -> dict[str, Any]:
    """An alarm or state event as stored (``AlarmEvent.as_dict``), with its idempotency key
    ``quaver-<store id>-<event id>`` (the same event is the same key after any resend) and
    the ISO time."""
    doc = {"key": f"quaver-{store_id}-{event['id']}", "machine": machine or None,
           "t": iso_time(int(event["t_ns"]), tz)}
    doc.update(event)
    for k in ("value", "level"):
        v = doc.get(k)
        if isinstance(v, float) and not math.isfinite(v):
            doc[k] = None
    return doc


MAX_SPEED_PAYLOAD = 1024  # bytes; a speed message is a few dozen (our choice)


def parse_speed(payload: bytes, now_ns: int, max_age_s: float) -> float | None:
    """The speed, r/min, a ``.../speed/set`` message writes (None: withdraw the written
    speed, back to the configured one). ``payload`` is a bare number (``1234.5``) or JSON
    ``{"rpm": 1234.5 | null, "time": "<ISO 8601 with offset>" | <ns since the epoch>}``;
    a ``time`` further than ``max_age_s`` from ``now_ns`` is refused (a retained or delayed
    message). Raises SpeedRefused('bad-value', why) for anything else."""
    if len(payload) > MAX_SPEED_PAYLOAD:
        raise SpeedRefused("bad-value", f"payload of {len(payload)} bytes (at most "
                           f"{MAX_SPEED_PAYLOAD})")
    try:
        doc = json.loads(payload.decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as e:
        raise SpeedRefused("bad-value", f"payload is not a number or JSON: {e}") from None
    if not isinstance(doc, dict):
        return check_rpm(doc)
    unknown = sorted(set(doc) - {"rpm", "time"})
    if unknown:
        raise SpeedRefused("bad-value", f"unknown key(s) {', '.join(unknown)} (takes rpm, "
                           "time)")
    if "rpm" not in doc:
        raise SpeedRefused("bad-value", "no 'rpm' key")
    if "time" in doc:
        age_s = (now_ns - _time_ns(doc["time"])) / 1e9
        if abs(age_s) > max_age_s:
            raise SpeedRefused("bad-value", f"time is {age_s:+.0f} s from now (at most "
                               f"±{max_age_s:g} s)")
    return None if doc["rpm"] is None else check_rpm(doc["rpm"])


def _time_ns(t: object) -> int:
    if isinstance(t, int) and not isinstance(t, bool):
        return t
    if isinstance(t, str):
        try:
            d = datetime.datetime.fromisoformat(t)
        except ValueError:
            d = None
        if d is not None and d.tzinfo is not None:
            return round(d.timestamp() * 1e9)
    raise SpeedRefused("bad-value", f"time={t!r} is not ns since the epoch or ISO 8601 "
                       "with an offset")

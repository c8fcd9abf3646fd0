"""A running speed written from outside (REST by an operator, MQTT, OPC UA by an operator): the
one place that checks such a write and applies it to the channel's state.

Knows the config and the channel state; nothing of HTTP, paho or asyncua. The source's worker
reads the written value at its next block (``ChannelState.manual_rpm``: one writer at a time,
a plain attribute)."""

from __future__ import annotations

import math
from typing import Literal

from .config import Config, channel_settings
from .types import ChannelState

__all__ = ["MAX_RPM", "SpeedRefused", "check_rpm", "write_speed"]

MAX_RPM = 1e6  # the highest speed taken, r/min (our choice: far above any machine)

Refusal = Literal["unknown-channel", "not-writable", "bad-value"]


class SpeedRefused(ValueError):
    """A speed write that was not applied; ``why`` is one of ``Refusal`` (the protocols map it
    to their own codes: 404/409/422, a counter, an OPC UA status code)."""

    def __init__(self, why: Refusal, text: str) -> None:
        super().__init__(text)
        self.why = why


def check_rpm(rpm: object) -> float:
    """``rpm`` as a float if it is a finite number in (0, MAX_RPM] r/min; SpeedRefused if not.
    (A bool is refused: JSON true is not a speed.)"""
    if isinstance(rpm, bool) or not isinstance(rpm, (int, float)):
        raise SpeedRefused("bad-value", f"rpm={rpm!r} is not a number")
    v = float(rpm)
    if not math.isfinite(v) or not 0 < v <= MAX_RPM:
        raise SpeedRefused("bad-value", f"rpm={v!r} is not a speed in (0, {MAX_RPM:g}] r/min")
    return v


def write_speed(cfg: Config, channels: dict[str, ChannelState], channel: str,
                rpm: float | None, who: str, *, manual_only: bool) -> dict[str, object]:
    """Write ``rpm`` (r/min; None withdraws the written speed) to ``channel`` as ``who``.

    ``manual_only``: take only channels configured ``speed = "manual"`` (MQTT and OPC UA,
    whose writers are machines); else also a fixed-speed channel (REST, an operator at the
    dashboard). A channel whose speed is measured (tacho, estimated) or a tacho channel is
    always refused. Returns the channel's speed as ``ChannelState.speed_dict``."""
    st = channels.get(channel)
    if st is None:
        raise SpeedRefused("unknown-channel", f"no channel {channel!r}")
    ch = channel_settings(cfg, channel)  # the config's, not the state's: set by the worker
    if ch.kind == "tacho":
        raise SpeedRefused("not-writable", f"channel {channel!r} is a tacho: it measures speed")
    configured = ch.speed_source
    if configured in ("tacho", "estimated"):
        raise SpeedRefused(
            "not-writable", f"channel {channel!r} has its speed from "
            f"{'tacho ' + repr(ch.speed_from) if ch.speed_from else 'its 1X line'}; "
            "a written speed would be overridden")
    if manual_only and configured != "manual":
        raise SpeedRefused("not-writable", f"channel {channel!r} is not configured "
                           "speed = 'manual'")
    if rpm is not None:
        rpm = check_rpm(rpm)
    st.manual_by = who
    st.manual_rpm = rpm
    if rpm is None:
        st.speed_source = configured
        st.speed_now_rpm = st.speed_rpm if st.speed_rpm is not None else math.nan
        st.speed_status = "ok" if st.speed_rpm is not None else "no-signal"
    else:
        st.speed_source = "manual"
        st.speed_now_rpm, st.speed_status = rpm, "ok"
    return st.speed_dict() or {}

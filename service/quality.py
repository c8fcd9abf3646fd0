"""Data quality of every channel: the closed set of states, the rule that derives a channel's
state, and the transitions between states as events.

Pure logic on plain values (times passed in); knows nothing about sockets, HTTP or storage.

A channel's state is the most serious that applies, in this order:

* ``failed`` — its source's pipeline raised and is being restarted (see ``service.app``);
* ``no-signal`` — no new analysed frame for ``stale_after_s`` (or none yet, that long after
  the start): the producer went away, stalled, or sends nothing the engine can use;
* ``sensor-fault`` — NaN/inf, a flat line, clipping or values beyond the sensor's ``range``
  in the channel's latest blocks (held ``FAULT_HOLD_S`` after the last bad block);
* ``overrun`` — the engine fell behind and blocks were dropped (held ``OVERRUN_HOLD_S``);
* ``gap`` — the sample index jumped; frame assembly restarts (until the next frame);
* ``ok`` — frames keep coming from clean data.

Only ``ok`` is live. Alarm rules are suspended (no transitions, values null) while a channel
is ``sensor-fault``, ``no-signal`` or ``failed``; ``gap`` and ``overrun`` still give valid
frames (no frame straddles a gap), so their values are evaluated.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal, get_args

ChannelStatus = Literal["ok", "no-signal", "sensor-fault", "gap", "overrun", "failed"]
CHANNEL_STATUSES: tuple[str, ...] = get_args(ChannelStatus)
# States whose values cannot be trusted: the channel's alarm rules are suspended.
SUSPENDING: frozenset[str] = frozenset({"sensor-fault", "no-signal", "failed"})
# What each state means, for the API's meta document, the dashboard and the README.
MEANING: dict[str, str] = {
    "ok": "new spectra keep coming from clean data",
    "no-signal": "no new analysed spectrum for stale_after_s (producer gone, stalled or unusable)",
    "sensor-fault": "NaN/inf, flat line, clipping or values beyond the sensor's range",
    "gap": "the sample index jumped; analysis restarted after it",
    "overrun": "the engine fell behind and blocks were dropped",
    "failed": "the source's pipeline failed and is being restarted",
}
FAULT_HOLD_S = 2.0  # a sensor fault is held this long after the last bad block (common practice)
OVERRUN_HOLD_S = 5.0  # our choice: long enough to be seen on a dashboard refreshed each second
STALE_MIN_S = 5.0  # the shortest default stale_after_s (our choice: above network hiccups)


def default_stale_after_s(hop_s: float, frame_s: float) -> float:
    """Default time without a new frame before a channel is ``no-signal``, s.

    ``hop_s`` is the longest time between frames of the channel's profiles and ``frame_s``
    its longest frame (after a restart the first frame needs a whole frame of samples):
    max(5 s, 3 hops, one frame + 2 hops). Our choice: three missed frames is a silent
    producer, not jitter."""
    return max(STALE_MIN_S, 3.0 * hop_s, frame_s + 2.0 * hop_s)


@dataclass(frozen=True, slots=True)
class Inputs:
    """What the loop knows of one channel when it derives the state.

    ``data_status``: what the worker thread saw in the latest blocks (``ok``,
    ``sensor-fault``, ``overrun`` or ``gap``); ``fault``: why, for a sensor fault;
    ``frame_age_s``: time since the channel's latest frame arrived (None: no frame yet);
    ``since_start_s``: time since monitoring of the channel began (or since its source
    restarted); ``failed``: the source's pipeline error text, empty when running."""

    data_status: str
    fault: str
    frame_age_s: float | None
    since_start_s: float
    stale_after_s: float
    failed: str = ""
    connected: bool | None = None  # the source's producer, when the source can tell


def is_lost(i: Inputs) -> bool:
    """Is the channel's signal lost (the loss-of-signal alarm's condition): its source
    failed, or no new frame for longer than ``stale_after_s`` (counted from the start while
    there has been none)?"""
    waited = i.since_start_s if i.frame_age_s is None else i.frame_age_s
    return bool(i.failed) or waited > i.stale_after_s


def derive(i: Inputs) -> tuple[str, str]:
    """The channel's state and its cause (a short sentence; empty for ``ok``)."""
    if i.failed:
        return "failed", f"pipeline failed: {i.failed}"
    waited = i.since_start_s if i.frame_age_s is None else i.frame_age_s
    if waited > i.stale_after_s:
        what = ("no spectrum yet" if i.frame_age_s is None
                else f"no new spectrum for {waited:.1f} s")
        why = {False: "; no producer connected", True: "; producer connected"}.get(
            i.connected, "")  # type: ignore[arg-type]
        return "no-signal", f"{what} (stale after {i.stale_after_s:g} s){why}"
    if i.frame_age_s is None:
        return "no-signal", "waiting for the first spectrum"
    if i.data_status == "sensor-fault":
        return "sensor-fault", i.fault or "sensor fault"
    if i.data_status == "overrun":
        return "overrun", "the engine fell behind; blocks were dropped"
    if i.data_status == "gap":
        return "gap", "the sample index jumped; analysis restarted"
    return "ok", ""


# Default measuring range by input unit. Our choice: above the ±50…±500 g of general-purpose
# industrial accelerometers (from memory), far below the 1e17 g at which a float32 power
# overflows; standard gravity 9.80665 m/s² (CGPM 1901).
DEFAULT_RANGE: dict[str, float] = {"g": 2000.0, "m/s2": 2000.0 * 9.80665}

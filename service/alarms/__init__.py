"""Alarm rules and the alarm state machine: frame values → alert/danger transitions as events.

Pure logic with time passed in as ns since the Unix epoch; knows nothing about storage,
asyncio, HTTP, the hub or the engine's buffers.

Semantics (``common practice`` for two-level vibration alarms, made precise here):

* A rule watches one value of one channel's :class:`~service.types.SpectralFrame`: a band's
  RMS (``kind="band"``), a tracked tone's amplitude (``"tone"``) or ``frame.overall``
  (``"overall"``), in the frame's display unit.
* A level is *reached* when ``value >= level``. An escalation to ALERT or DANGER happens
  when the value has been at or above that level at every frame for ``on_delay_s``
  (``t − t_first_above >= on_delay_s``; 0 = at the first frame). A value that jumps above
  danger goes NORMAL → DANGER directly once it has stayed there ``on_delay_s``.
* Hysteresis ``h``: a level *clears* when ``value < level·(1 − h)``; a value between
  ``level·(1 − h)`` and ``level`` neither raises nor clears. A de-escalation happens when
  the value has been below the clear threshold at every frame for ``off_delay_s``.
  DANGER → ALERT at ``danger·(1 − h)``, ALERT → NORMAL (or DANGER → NORMAL directly) at
  ``alert·(1 − h)``.
* Latch: a latching rule whose value clears goes to LATCHED (an event, ``latched=True``)
  instead of NORMAL and stays active until acknowledged; the acknowledgement is the final
  return to NORMAL (one ``"ack"`` event, latched → normal). An alarm acknowledged while its
  value is still high returns straight to NORMAL when the value clears. Escalating to a
  higher state clears an earlier acknowledgement (the new level needs its own).
* Data quality (``service.quality``): while a channel is ``sensor-fault``, ``no-signal`` or
  ``failed`` its value rules are suspended — no transitions, active and latched alarms stay
  as they are (a fault says nothing about the machine), their views show the value as null
  and the channel as not live — and pending on/off delays and baseline learning restart
  from the first good frame after it: data around a fault is suspect, so a transition must
  re-qualify for its full delay on good data. The channel's state changes themselves are
  ``"status"`` events, made by the service (``service.app``), not here.
* Loss of signal: a ``"signal"`` rule per channel (``loss_of_signal`` in the config) goes to
  its level (ALERT or DANGER) as soon as the channel is ``no-signal`` or ``failed`` — the
  channel's ``stale_after_s`` is its on-delay — and back (or to LATCHED) when frames return.
* NaN (or a value missing from the frame) is skipped: that frame neither advances nor
  resets any timer.
* Time running backwards: a frame up to CLOCK_JITTER_NS older than the last one is taken
  at the last one's time (arrival-time stamps of a bursty producer); further back is a
  clock step, after which pending on/off delays and baseline learning restart on the new
  clock, so an alarm is never frozen until the old time comes round again.
* Shelving (``service.alarms.shelving``): a shelved rule evaluates and logs as usual but
  is not annunciated as active until its shelve ends (end time, or unshelved).
* Relative levels: alert/danger = factor × the median of the values seen during the first
  ``learn_s`` seconds of good data (×2 alert, ×4 danger or +6 dB / +12 dB over the
  baseline are ``common practice`` starting points). No transitions while learning.

Not thread-safe: call one engine from one thread (the event loop).
"""

from __future__ import annotations

from ..quality import CHANNEL_STATUSES
from .engine import AlarmEngine
from .events import AlarmEvent, AlarmView
from .rules import Baseline, Rule, rule_id, rules_from_config, signal_rule
from .states import (
    CAUSES,
    CLOCK_JITTER_NS,
    EVENT_KINDS,
    LEARN_MAX,
    RULE_KINDS,
    SHELVE_MAX_S,
    SNAPSHOT_VERSION,
    TRANSITIONS,
    AckRefused,
    AlarmError,
    AlarmState,
    InvalidTransition,
    ShelveRefused,
    UnknownAlarm,
    check_transition,
)

__all__ = [
    "CAUSES",
    "CHANNEL_STATUSES",
    "CLOCK_JITTER_NS",
    "EVENT_KINDS",
    "LEARN_MAX",
    "RULE_KINDS",
    "SHELVE_MAX_S",
    "SNAPSHOT_VERSION",
    "TRANSITIONS",
    "AckRefused",
    "AlarmEngine",
    "AlarmError",
    "AlarmEvent",
    "AlarmState",
    "AlarmView",
    "Baseline",
    "InvalidTransition",
    "Rule",
    "ShelveRefused",
    "UnknownAlarm",
    "check_transition",
    "rule_id",
    "rules_from_config",
    "signal_rule",
]

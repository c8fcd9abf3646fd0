"""Alarm events (what happened, as stored and announced) and views (an alarm's state now).

Plain frozen dataclasses; knows nothing about storage, HTTP or the state machine."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, fields
from typing import Any

from .states import AlarmState, EventKind

# --- events and views -------------------------------------------------------------------


@dataclass(frozen=True, slots=True, kw_only=True)
class AlarmEvent:
    """One thing that happened to an alarm; written to the store before it is announced.

    ``id`` is None until the store assigns it (a monotonically increasing integer, see
    ``service.store.Store.put_events``). ``t_ns``: ns since the Unix epoch (the frame's
    time, or the time given to :meth:`AlarmEngine.ack`). ``kind``: ``"transition"`` (state
    change by value), ``"ack"``, ``"shelve"``/``"unshelve"``/``"shelve-expired"`` (``acked_by``
    is who, ``note`` the shelve's reason; the state does not change) or ``"status"`` (a
    channel's data-quality state changed: ``from_state``/``to_state`` are then states of
    ``service.quality``, the message says why). ``value`` (the rule's value then) and ``level`` (the
    threshold crossed: a level when raising, level·(1 − h) when clearing; for an ack the
    level of the acknowledged state) are in ``unit``; None when not applicable. ``rule`` is a
    rule id, or ``"<channel>.status"``. ``latched``: the alarm now holds until
    acknowledged.
    """

    id: int | None = None
    t_ns: int
    channel: str
    rule: str
    kind: EventKind
    from_state: str
    to_state: str
    value: float | None
    level: float | None
    unit: str
    message: str
    latched: bool = False
    acked_by: str = ""
    note: str = ""

    @property
    def raises(self) -> bool:
        """True for a transition to a more severe state (capture evidence for these)."""
        if self.kind != "transition":
            return False
        return AlarmState(self.to_state).rank > AlarmState(self.from_state).rank

    def as_dict(self) -> dict[str, Any]:
        """JSON-safe dict (field names as above)."""
        return {f.name: getattr(self, f.name) for f in fields(self)}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> AlarmEvent:
        names = {f.name for f in fields(cls)}
        return cls(**{k: v for k, v in d.items() if k in names})


@dataclass(frozen=True, slots=True)
class AlarmView:
    """The current state of one rule's alarm, for the API and metrics.

    ``since_ns``: when the current state began (None if never left normal). ``peak``: the most
    severe state since the alarm was raised. ``level``: the level of the current state
    (ALERT: alert level, DANGER: danger level, LATCHED: that of ``peak``). ``alert``/``danger``:
    the levels in force (None while a baseline rule is ``learning``). Values in ``unit``.
    """

    rule: str
    channel: str
    kind: str
    name: str
    profile: str
    state: AlarmState
    peak: AlarmState
    since_ns: int | None
    value: float | None
    value_ns: int | None
    level: float | None
    alert: float | None
    danger: float | None
    unit: str
    latch: bool
    latched: bool
    acked: bool
    acked_by: str
    acked_ns: int | None
    note: str
    learning: bool
    suspended: bool  # the channel is not live (sensor fault, no signal, failed): rule frozen
    # the channel's suspending status, or "ok" (gap and overrun do not suspend rules)
    channel_status: str = "ok"
    primary: bool = True  # is ``profile`` the channel's primary profile
    # shelved (service.alarms.shelving): not annunciated until ``shelved_until_ns``
    shelved: bool = False
    shelved_until_ns: int | None = None
    shelved_ns: int | None = None
    shelved_by: str = ""
    shelve_reason: str = ""

    def as_dict(self) -> dict[str, Any]:
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        d["state"], d["peak"] = self.state.value, self.peak.value
        return d


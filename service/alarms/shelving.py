"""Shelving and acknowledge-all: the operator actions on many alarms, mixed into
:class:`~service.alarms.engine.AlarmEngine`.

Pure logic with time passed in; knows nothing about storage, asyncio, HTTP or the hub.

Shelving (after ISA-18.2's shelved alarms, details ``from memory``; see docs/references.md):
an operator shelves a rule with a reason and an end time at most :data:`SHELVE_MAX_S` ahead.
While shelved the rule still evaluates and its transitions are logged as usual, but its alarm
is not annunciated: :meth:`AlarmEngine.active` leaves it out and :meth:`shelved` lists it
instead. A shelve ends at its end time (:meth:`expire_shelves`, a ``"shelve-expired"``
event) or when an operator unshelves it (``"unshelve"``); an alarm still active then is
annunciated again at once. The shelve is part of the alarm snapshot (a restart keeps it)."""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import replace
from typing import TYPE_CHECKING

from .events import AlarmEvent, AlarmView
from .states import _NS, SHELVE_MAX_S, AckRefused, ShelveRefused, UnknownAlarm

if TYPE_CHECKING:
    from .common import RuleState as _Alarm

MAX_REASON = 1000  # characters of a shelve's reason (our choice, as an ack's note)


class ShelvingMixin:
    """Shelve, unshelve, expiry and acknowledge-all over the engine's alarms."""

    _alarms: Mapping[str, _Alarm]

    # provided by AlarmEngine
    def ack(self, rule_id: str, who: str, note: str = "", *, t_ns: int) -> AlarmEvent:
        raise NotImplementedError

    def _view(self, a: _Alarm) -> AlarmView:
        raise NotImplementedError

    def _what(self, a: _Alarm) -> str:
        raise NotImplementedError

    # -- shelving ------------------------------------------------------------------------
    def is_shelved(self, rule_id: str) -> bool:
        """Is ``rule_id`` shelved now (False for an unknown id)? Notifications skip a
        shelved rule's events."""
        a = self._alarms.get(rule_id)
        return a is not None and a.shelved_until_ns is not None

    def noted(self, ev: AlarmEvent) -> AlarmEvent:
        """``ev`` with "(shelved: not annunciated)" after its message when its rule is
        shelved, so the event log says why nobody was shown it."""
        a = self._alarms.get(ev.rule)
        if a is None or a.shelved_until_ns is None:
            return ev
        return replace(ev, message=f"{ev.message} (shelved: not annunciated)")

    def shelved(self) -> list[AlarmView]:
        """The shelved rules (any state), the shelve ending soonest first."""
        views = [self._view(a) for a in self._alarms.values() if a.shelved_until_ns is not None]
        return sorted(views, key=lambda v: (v.shelved_until_ns or 0, v.rule))

    def shelve(
        self, rule_id: str, who: str, reason: str, until_ns: int, *, t_ns: int
    ) -> AlarmEvent:
        """Shelve ``rule_id`` from ``t_ns`` until ``until_ns`` (ns since the epoch) with a
        ``reason``; return the ``"shelve"`` event.

        Raises :class:`UnknownAlarm` for an unknown id, :class:`ShelveRefused` when it is
        already shelved, and ValueError for an empty ``who`` or ``reason``, or an end time
        not after ``t_ns`` or more than :data:`SHELVE_MAX_S` after it."""
        a = self._get(rule_id)
        reason = reason.strip()
        if not who:
            raise ValueError("shelve needs who: the name of the person shelving")
        if not reason:
            raise ValueError("shelve needs a reason (why this alarm is silenced)")
        if len(reason) > MAX_REASON:
            raise ValueError(f"shelve reason is {len(reason)} characters; at most {MAX_REASON}")
        if until_ns <= t_ns:
            raise ValueError("shelve end time must be in the future")
        if until_ns - t_ns > SHELVE_MAX_S * _NS:
            raise ValueError(
                f"shelve end time is {(until_ns - t_ns) / _NS / 86400:.2f} days ahead; "
                f"at most {SHELVE_MAX_S // 86400} days"
            )
        if a.shelved_until_ns is not None:
            raise ShelveRefused(
                f"rule {rule_id!r} is already shelved by {a.shelved_by!r}; unshelve it first"
            )
        a.shelved_until_ns, a.shelved_ns = int(until_ns), int(t_ns)
        a.shelved_by, a.shelve_reason = who, reason
        span = _span(until_ns - t_ns)
        return self._event(a, "shelve", t_ns, who, reason,
                           f"{self._what(a)}: shelved by {who} for {span}: {reason}")

    def unshelve(self, rule_id: str, who: str, *, t_ns: int) -> AlarmEvent:
        """End ``rule_id``'s shelve now; return the ``"unshelve"`` event. Raises
        :class:`UnknownAlarm`, or :class:`ShelveRefused` when it is not shelved."""
        a = self._get(rule_id)
        if not who:
            raise ValueError("unshelve needs who: the name of the person unshelving")
        if a.shelved_until_ns is None:
            raise ShelveRefused(f"rule {rule_id!r} is not shelved")
        reason = a.shelve_reason
        msg = f"{self._what(a)}: unshelved by {who}" + self._still(a)
        self._clear_shelve(a)
        return self._event(a, "unshelve", t_ns, who, reason, msg)

    def expire_shelves(self, t_ns: int) -> list[AlarmEvent]:
        """End every shelve whose end time is at or before ``t_ns``; one
        ``"shelve-expired"`` event each."""
        out = []
        for a in self._alarms.values():
            if a.shelved_until_ns is not None and a.shelved_until_ns <= t_ns:
                reason = a.shelve_reason
                msg = f"{self._what(a)}: shelve ended at its end time" + self._still(a)
                self._clear_shelve(a)
                out.append(self._event(a, "shelve-expired", t_ns, "", reason, msg))
        return out

    # -- acknowledge-all -----------------------------------------------------------------
    def ackable(self, rule_ids: Iterable[str] | None = None) -> list[str]:
        """The rules among ``rule_ids`` (default: all) whose alarm is active and not yet
        acknowledged, in rule order; unknown ids are left out."""
        wanted = None if rule_ids is None else set(rule_ids)
        return [
            rid for rid, a in self._alarms.items()
            if (wanted is None or rid in wanted) and a.state.active and not a.acked
        ]

    def ack_many(
        self, rule_ids: Iterable[str], who: str, note: str = "", *, t_ns: int
    ) -> list[AlarmEvent]:
        """Acknowledge every alarm of ``rule_ids`` as :meth:`ack` does; one ``"ack"`` event
        each. All or nothing: an unknown, normal or acknowledged one raises before any
        changes (:class:`UnknownAlarm`, :class:`AckRefused`)."""
        ids = list(dict.fromkeys(rule_ids))
        if not who:
            raise ValueError("ack needs who: the name of the person acknowledging")
        for rid in ids:
            a = self._get(rid)
            if not a.state.active or a.acked:
                raise AckRefused(f"alarm {rid!r} is normal or already acknowledged")
        return [self.ack(rid, who, note, t_ns=t_ns) for rid in ids]

    # -- internals -----------------------------------------------------------------------
    def _get(self, rule_id: str) -> _Alarm:
        a = self._alarms.get(rule_id)
        if a is None:
            raise UnknownAlarm(f"no alarm rule {rule_id!r}")
        return a

    @staticmethod
    def _still(a: _Alarm) -> str:
        return f"; {a.state.value.upper()} is annunciated again" if a.state.active else ""

    @staticmethod
    def _clear_shelve(a: _Alarm) -> None:
        a.shelved_until_ns, a.shelved_ns, a.shelved_by, a.shelve_reason = None, None, "", ""

    @staticmethod
    def _event(a: _Alarm, kind: str, t_ns: int, who: str, reason: str, msg: str
               ) -> AlarmEvent:
        return AlarmEvent(
            t_ns=int(t_ns), channel=a.rule.channel, rule=a.rule.id,
            kind=kind,  # type: ignore[arg-type]
            from_state=a.state.value, to_state=a.state.value, value=a.value, level=None,
            unit=a.rule.unit, message=msg, latched=a.latched, acked_by=who, note=reason,
        )


def _span(ns: int) -> str:
    """A duration as people say it: '45 min', '4 h 30 min', '2 d 3 h' (zone-free, so the
    message reads the same in any time zone)."""
    m = max(1, round(ns / _NS / 60))
    d, h, m = m // 1440, m // 60 % 24, m % 60
    if d:
        return f"{d} d {h} h" if h else f"{d} d"
    if h:
        return f"{h} h {m} min" if m else f"{h} h"
    return f"{m} min"

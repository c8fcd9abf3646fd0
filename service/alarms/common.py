"""What the service's alarm engine (:mod:`service.alarms.engine`, evaluated per push with
array operations) and the per-rule reference it is checked against
(:mod:`service.alarms.reference`) share: a rule's levels, latch, acknowledgement and
baseline learning (:class:`RuleState`), and the engine's channel states, loss of signal,
acknowledgement, views and snapshot restore (:class:`EngineBase`). Only how a value steps a
rule's state machine, and where the per-rule fields live, differ between the two.

Pure logic with time passed in; knows nothing about storage, asyncio, HTTP or the hub."""

from __future__ import annotations

import statistics
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any, Generic, TypeVar

from dsp.types import check_choice

from ..quality import CHANNEL_STATUSES, SUSPENDING
from ..types import SpectralFrame
from .events import AlarmEvent, AlarmView
from .rules import Rule
from .shelving import ShelvingMixin
from .states import (
    _A,
    _BY_RANK,
    _D,
    _L,
    _N,
    _NS,
    LEARN_MAX,
    SNAPSHOT_VERSION,
    AckRefused,
    AlarmState,
    UnknownAlarm,
    check_transition,
)

__all__ = ["EngineBase", "RuleState"]


class RuleState:
    """The run-time state of one rule, as both engines keep it (the fields are the
    subclass's: plain attributes in the reference, rows of a table in the service's
    engine), and the logic on it that does not depend on where the fields live."""

    if not TYPE_CHECKING:  # the service engine's rows keep their slots
        __slots__ = ()

    rule: Rule
    state: AlarmState
    peak: AlarmState
    since_ns: int | None
    value: float | None
    value_ns: int | None
    acked: bool
    acked_by: str
    acked_ns: int | None
    note: str
    shelved_until_ns: int | None
    shelved_ns: int | None
    shelved_by: str
    shelve_reason: str
    above_ns: list[int | None]  # alert, danger
    below_ns: list[int | None]
    base: float | None
    learn_start_ns: int | None
    learn: list[float]
    learn_stride: int
    learn_count: int

    def resume(self, s: Mapping[str, Any]) -> None:
        """Take the fields of a snapshot's entry (the subclass knows where they go)."""
        raise NotImplementedError

    @property
    def levels(self) -> tuple[float, float] | None:
        r = self.rule
        if r.kind == "signal":
            return None  # not a value with levels: see AlarmEngine._signal
        if r.baseline is None:
            return float(r.alert), float(r.danger)  # type: ignore[arg-type]
        if self.base is None:
            return None
        fa, fd = r.baseline.factors
        return fa * self.base, fd * self.base

    @property
    def latched(self) -> bool:
        return self.state is _L or (self.rule.latch and self.state.active and not self.acked)

    def clear_ack(self) -> None:
        """Back to normal: nothing held, nothing acknowledged."""
        self.peak, self.acked, self.acked_by, self.acked_ns, self.note = _N, False, "", None, ""

    def reset_pending(self) -> None:
        self.above_ns = [None, None]
        self.below_ns = [None, None]
        if self.base is None:
            self.learn_start_ns, self.learn, self.learn_stride, self.learn_count = None, [], 1, 0

    def learn_value(self, v: float, t_ns: int) -> bool:
        """Feed the baseline; True once it is learned (this value is then evaluated)."""
        bl = self.rule.baseline
        assert bl is not None  # only called for baseline rules
        if self.learn_start_ns is None:
            self.learn_start_ns = t_ns
        if t_ns - self.learn_start_ns < round(bl.learn_s * _NS):
            if self.learn_count % self.learn_stride == 0:
                self.learn.append(v)
                if len(self.learn) >= LEARN_MAX:
                    self.learn = self.learn[::2]
                    self.learn_stride *= 2
            self.learn_count += 1
            return False
        median = statistics.median(self.learn) if self.learn else 0.0
        self.learn, self.learn_stride, self.learn_count = [], 1, 0
        if median > 0:
            self.base = median
            return True
        self.learn_start_ns = None  # an all-zero baseline cannot scale a level: learn again
        return self.learn_value(v, t_ns)


A = TypeVar("A", bound=RuleState)


class EngineBase(ShelvingMixin, Generic[A]):
    """Rules by id and by channel, the channels' suspending states, and every operation
    but stepping a value (:meth:`_step`, the subclass's). Shelving and acknowledge-all come
    from :class:`~service.alarms.shelving.ShelvingMixin`."""

    _alarms: dict[str, A]
    _by_channel: dict[str, list[A]]
    _suspended: dict[str, str]  # channel → its suspending status

    def _step(self, a: A, v: float, t_ns: int, unit: str) -> AlarmEvent | None:
        raise NotImplementedError

    @property
    def rules(self) -> list[Rule]:
        return [a.rule for a in self._alarms.values()]

    def evaluate(
        self, frame: SpectralFrame, channel_status: str = "ok", *, fault: str = ""
    ) -> list[AlarmEvent]:
        """Run the value rules of ``frame.channel`` on this frame at ``frame.t_ns``.

        ``channel_status`` is the channel's data-quality state (one of
        :data:`~service.quality.CHANNEL_STATUSES`): a suspending one (sensor fault, no
        signal, failed) evaluates nothing (see :meth:`set_channel_status`). Returns the
        events in the order they happened."""
        events = self.set_channel_status(frame.channel, channel_status, frame.t_ns, fault=fault)
        if frame.channel in self._suspended:
            return events
        for a in self._by_channel.get(frame.channel, ()):
            if a.rule.kind == "signal" or not a.rule.watches(frame):
                continue
            ev = self._step(a, a.rule.pick(frame), frame.t_ns, frame.unit)
            if ev is not None:
                events.append(self.noted(ev))
        return events

    def set_channel_status(
        self, channel: str, status: str, t_ns: int, *, fault: str = "", lost: bool | None = None
    ) -> list[AlarmEvent]:
        """Tell the engine a channel's data-quality state (on every change, frame or none).

        A suspending state (sensor fault, no signal, failed) freezes the channel's value
        rules; pending delays and baseline learning restart on both edges (module
        docstring). The channel's ``"signal"`` rule goes to its level while the signal is
        ``lost`` (default: the channel is ``no-signal`` or ``failed``; the service says
        when, see ``service.quality.is_lost``) and clears when it is not; its events are
        returned."""
        check_choice("channel_status", status, CHANNEL_STATUSES)
        rules = self._by_channel.get(channel, [])
        suspended = status in SUSPENDING
        was = self._suspended.get(channel)
        events: list[AlarmEvent] = []
        if suspended != (was is not None):
            for a in rules:
                a.reset_pending()
        if suspended:
            self._suspended[channel] = status
        else:
            self._suspended.pop(channel, None)
        if lost is None:
            lost = status in ("no-signal", "failed")
        for a in rules:
            if a.rule.kind == "signal":
                ev = self._signal(a, lost, int(t_ns), fault)
                if ev is not None:
                    events.append(self.noted(ev))
        return events

    def _move(self, a: RuleState, target: int, v: float, t_ns: int,
              unit: str) -> AlarmEvent:
        """Move rule ``a`` to the level of rank ``target`` (0 normal, 1 alert, 2 danger; not
        its present rank), which value ``v`` at ``t_ns`` qualified for; return the event.
        Which rank a value qualifies for is each engine's own work; this is what follows."""
        levels = a.levels
        assert levels is not None
        before = a.state
        if target > before.rank:
            after, level = _BY_RANK[target], levels[target - 1]
            a.acked = False  # a new, higher condition needs its own acknowledgement
            a.acked_by, a.acked_ns, a.note = "", None, ""
            a.peak = after if after.rank > a.peak.rank else a.peak
        else:
            level = levels[target] * (1 - a.rule.hysteresis)  # the clear threshold crossed
            after = _BY_RANK.get(target) or (_L if a.rule.latch and not a.acked else _N)
        check_transition(before, after, "value")
        a.state, a.since_ns = after, int(t_ns)
        if after is _N:
            a.clear_ack()
        return AlarmEvent(
            t_ns=int(t_ns), channel=a.rule.channel, rule=a.rule.id, kind="transition",
            from_state=before.value, to_state=after.value, value=v, level=level,
            unit=a.rule.unit or unit, message=self._message(a, before, after, v, level, unit),
            latched=a.latched, acked_by="", note="",
        )

    def _signal(self, a: RuleState, lost: bool, t_ns: int, cause: str) -> AlarmEvent | None:
        """The loss-of-signal rule ``a``: to its level when ``lost``, back when not."""
        a.value, a.value_ns = (1.0 if lost else 0.0), t_ns
        level = _A if a.rule.alert is not None else _D
        before = a.state
        if lost and before.rank < level.rank:
            after = level
            a.acked, a.acked_by, a.acked_ns, a.note = False, "", None, ""
            a.peak = after if after.rank > a.peak.rank else a.peak
            msg = f"{a.rule.channel}: LOSS OF SIGNAL ({after.value.upper()})"
            msg += f": {cause}" if cause else ""
        elif not lost and before.rank > 0:
            after = _L if a.rule.latch and not a.acked else _N
            msg = f"{a.rule.channel}: signal back"
            msg += "; latched until acknowledged" if after is _L else ""
        else:
            return None
        check_transition(before, after, "value")
        a.state, a.since_ns = after, t_ns
        if after is _N:
            a.clear_ack()
        return AlarmEvent(
            t_ns=t_ns, channel=a.rule.channel, rule=a.rule.id, kind="transition",
            from_state=before.value, to_state=after.value, value=None, level=None,
            unit="", message=msg, latched=a.latched,
        )

    def ack(self, rule_id: str, who: str, note: str = "", *, t_ns: int) -> AlarmEvent:
        """Acknowledge the active alarm of ``rule_id`` at ``t_ns``; return the ``"ack"`` event.

        A LATCHED alarm returns to NORMAL (the event goes latched → normal); an ALERT or
        DANGER alarm stays in its state, marked acknowledged (it will not latch when it
        clears). Raises :class:`UnknownAlarm` for an unknown id and :class:`AckRefused` for a
        normal or already acknowledged alarm; ValueError for an empty ``who``.
        """
        a = self._alarms.get(rule_id)
        if a is None:
            raise UnknownAlarm(f"no alarm rule {rule_id!r}")
        if not who:
            raise ValueError("ack needs who: the name of the person acknowledging")
        if not a.state.active:
            raise AckRefused(f"alarm {rule_id!r} is normal; there is nothing to acknowledge")
        if a.acked:
            raise AckRefused(f"alarm {rule_id!r} is already acknowledged by {a.acked_by!r}")
        before = a.state
        level = self._state_level(a)
        if before is _L:
            check_transition(_L, _N, "ack")
            a.state, a.since_ns = _N, int(t_ns)
            a.clear_ack()
            msg = f"{self._what(a)}: acknowledged by {who}; latch released, back to normal"
        else:
            a.acked, a.acked_by, a.acked_ns, a.note = True, who, int(t_ns), note
            msg = f"{self._what(a)}: {before.value} acknowledged by {who}"
        return AlarmEvent(
            t_ns=int(t_ns), channel=a.rule.channel, rule=a.rule.id, kind="ack",
            from_state=before.value, to_state=a.state.value, value=a.value, level=level,
            unit=a.rule.unit, message=msg, latched=a.latched, acked_by=who, note=note,
        )

    def views(self) -> list[AlarmView]:
        """Every rule's alarm, in rule order."""
        return [self._view(a) for a in self._alarms.values()]

    def view(self, rule_id: str) -> AlarmView:
        a = self._alarms.get(rule_id)
        if a is None:
            raise UnknownAlarm(f"no alarm rule {rule_id!r}")
        return self._view(a)

    def active(self) -> list[AlarmView]:
        """Alarms in ALERT, DANGER or LATCHED and not shelved, most severe first, then
        oldest first (shelved ones: :meth:`shelved`)."""
        act = [self._view(a) for a in self._alarms.values()
               if a.state.active and a.shelved_until_ns is None]
        return sorted(act, key=lambda v: (-v.peak.rank, v.since_ns or 0, v.rule))

    def restore(self, snapshot: Mapping[str, Any]) -> None:
        """Resume from :meth:`snapshot` output (e.g. after a restart).

        Alarms of rules that no longer exist are dropped; new rules start normal. A rule
        whose baseline settings changed keeps its state but learns its baseline again.
        Pending delays resume as saved (the time the service was down counts as elapsed:
        a value above the level before and after a restart keeps its on-delay running).
        Raises ValueError for another snapshot version or a state outside the closed set.
        """
        if snapshot.get("version") != SNAPSHOT_VERSION:
            raise ValueError(
                f"alarm snapshot version={snapshot.get('version')!r} is not {SNAPSHOT_VERSION}"
            )
        for rid, s in dict(snapshot.get("alarms", {})).items():
            a = self._alarms.get(rid)
            if a is not None:
                a.resume(s)
        # "faulted" (a list of channels in sensor fault) is how older snapshots said it
        suspended = snapshot.get("suspended")
        if suspended is None:
            suspended = dict.fromkeys(snapshot.get("faulted", ()), "sensor-fault")
        self._suspended = {
            c: s for c, s in dict(suspended).items() if s in SUSPENDING
        }

    def _what(self, a: RuleState) -> str:
        r = a.rule
        head = r.channel if r.primary else f"{r.channel} {r.profile}"
        return f"{head} overall" if r.kind == "overall" else f"{head} {r.kind} {r.name}"

    def _message(
        self, a: RuleState, before: AlarmState, after: AlarmState, v: float, level: float, unit: str
    ) -> str:
        u = a.rule.unit or unit
        if after.rank > before.rank:
            head = f"{self._what(a)}: {after.value.upper()}"
            return f"{head}, {v:.4g} {u} >= {after.value} level {level:.4g} {u}"
        tail = "; latched until acknowledged" if after is _L else ""
        word = "cleared" if after.rank == 0 else f"back to {after.value.upper()}"
        return f"{self._what(a)}: {word}, {v:.4g} {u} < {level:.4g} {u}{tail}"

    def _state_level(self, a: RuleState) -> float | None:
        if a.rule.kind == "signal":
            return 1.0 if a.state.rank or a.state is _L else None
        levels = a.levels
        state = a.peak if a.state is _L else a.state
        if levels is None or state.rank == 0:
            return None
        return levels[state.rank - 1]

    def _view(self, a: RuleState) -> AlarmView:
        levels = a.levels
        r = a.rule
        return AlarmView(
            rule=r.id,
            channel=r.channel,
            kind=r.kind,
            name=r.name,
            profile=r.profile,
            state=a.state,
            peak=a.peak,
            since_ns=a.since_ns,
            # a value from before the channel stopped being live is not shown as current
            value=None if r.channel in self._suspended and r.kind != "signal" else a.value,
            value_ns=a.value_ns,
            level=self._state_level(a),
            alert=levels[0] if levels else r.alert if r.kind == "signal" else None,
            danger=levels[1] if levels else r.danger if r.kind == "signal" else None,
            unit=r.unit,
            latch=r.latch,
            latched=a.latched,
            acked=a.acked,
            acked_by=a.acked_by,
            acked_ns=a.acked_ns,
            note=a.note,
            learning=levels is None and r.kind != "signal",
            suspended=r.channel in self._suspended and r.kind != "signal",
            channel_status=self._suspended.get(r.channel, "ok"),
            primary=r.primary,
            shelved=a.shelved_until_ns is not None,
            shelved_until_ns=a.shelved_until_ns,
            shelved_ns=a.shelved_ns,
            shelved_by=a.shelved_by,
            shelve_reason=a.shelve_reason,
        )

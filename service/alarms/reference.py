"""The per-rule alarm engine, kept as the reference the service's vectorised engine
(``service.alarms.engine``) is checked against: every rule's state machine stepped value by
value in Python, exactly as the service ran it before per-push evaluation.

Pure logic with time passed in; knows nothing about storage, asyncio, HTTP or the hub. Not
used by the running service (tests/service/test_alarms_vector.py compares the two)."""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field, fields
from typing import Any

from dsp.types import check_choice

from .common import EngineBase, RuleState
from .events import AlarmEvent
from .rules import Rule
from .states import (
    _N,
    _NS,
    CLOCK_JITTER_NS,
    SNAPSHOT_VERSION,
    AlarmState,
)

_LEARNED = {"learned": True}
_STATES = tuple(st.value for st in AlarmState)


@dataclass
class _Alarm(RuleState):
    """Mutable run-time state of one rule (everything :meth:`AlarmEngine.snapshot` keeps)."""

    rule: Rule
    state: AlarmState = _N
    peak: AlarmState = _N
    since_ns: int | None = None
    value: float | None = None
    value_ns: int | None = None
    acked: bool = False
    acked_by: str = ""
    acked_ns: int | None = None
    note: str = ""
    shelved_until_ns: int | None = None  # shelved until then (service.alarms.shelving)
    shelved_ns: int | None = None
    shelved_by: str = ""
    shelve_reason: str = ""
    above_ns: list[int | None] = field(default_factory=lambda: [None, None])  # alert, danger
    below_ns: list[int | None] = field(default_factory=lambda: [None, None])
    # the baseline learned or being learned: restored only while the rule's baseline
    # settings are those it was learned with
    base: float | None = field(default=None, metadata=_LEARNED)  # learned baseline median
    learn_start_ns: int | None = field(default=None, metadata=_LEARNED)
    learn: list[float] = field(default_factory=list, metadata=_LEARNED)
    learn_stride: int = field(default=1, metadata=_LEARNED)
    learn_count: int = field(default=0, metadata=_LEARNED)

    def saved(self) -> dict[str, Any]:
        """Every field but the rule, JSON-safe, plus the baseline settings it was learned
        with (one alarm of :meth:`AlarmEngine.snapshot`)."""
        out: dict[str, Any] = {}
        for f in _SAVED:
            v = getattr(self, f.name)
            out[f.name] = v.value if isinstance(v, AlarmState) else list(v) if isinstance(
                v, list) else v
        out["baseline"] = self.rule.baseline.as_dict() if self.rule.baseline else None
        return out

    def resume(self, s: Mapping[str, Any]) -> None:
        """Take the fields :meth:`saved` wrote; the learned ones only if the baseline
        settings are the same. ValueError for a state outside the closed set."""
        bl = self.rule.baseline
        same_baseline = bl is not None and s["baseline"] == bl.as_dict()
        for f in _SAVED:
            if f.metadata.get("learned") and not same_baseline or f.name not in s:
                continue  # (a snapshot from before shelving has no shelve fields)
            v, now = s[f.name], getattr(self, f.name)
            if isinstance(now, AlarmState):
                v = AlarmState(check_choice(f.name, v, _STATES))
            elif isinstance(now, list):
                v = list(v)
            elif isinstance(now, bool):
                v = bool(v)
            elif isinstance(now, int) and f.default is not None:
                v = int(v)  # learn_stride, learn_count
            setattr(self, f.name, v)







_SAVED = tuple(f for f in fields(_Alarm) if f.name != "rule")


class ReferenceAlarmEngine(EngineBase["_Alarm"]):
    """Runs every rule's state machine on incoming frames, rule by rule (the reference
    semantics; ``service.alarms.AlarmEngine`` is the one the service runs).
    Shelving and acknowledge-all come from :class:`~service.alarms.shelving.ShelvingMixin`."""

    def __init__(self, rules: Iterable[Rule]) -> None:
        # its own _Alarm (the same attributes as the service engine's, plain fields)
        self._alarms: dict[str, _Alarm] = {}
        self._by_channel: dict[str, list[_Alarm]] = {}
        for r in rules:
            if r.id in self._alarms:
                raise ValueError(f"rule id {r.id!r} is given twice")
            a = _Alarm(r)
            self._alarms[r.id] = a
            self._by_channel.setdefault(r.channel, []).append(a)
        self._suspended: dict[str, str] = {}  # channel → its suspending status

    def replace_rules(self, rules: Iterable[Rule]) -> dict[str, list[str]]:
        """Swap in a new rule set (a config reload); returns the rule ids ``added``,
        ``changed``, ``removed`` and ``kept``.

        A rule whose id stays keeps its state (active, latched, acknowledged) and meets its
        new definition at the next frame; if its definition changed, pending on/off delays
        restart (and a changed baseline is learned again). A removed rule is dropped with
        its state, active or not; the caller says so."""
        new = list(rules)
        ids = [r.id for r in new]
        if len(set(ids)) != len(ids):
            twice = sorted({i for i in ids if ids.count(i) > 1})
            raise ValueError(f"rule ids given twice: {', '.join(twice)}")
        out: dict[str, list[str]] = {"added": [], "changed": [], "removed": [], "kept": []}
        alarms: dict[str, _Alarm] = {}
        by_channel: dict[str, list[_Alarm]] = {}
        for r in new:
            a = self._alarms.get(r.id)
            if a is None:
                a = _Alarm(r)
                out["added"].append(r.id)
            elif a.rule != r:
                if a.rule.baseline != r.baseline:
                    a.base = None
                a.rule = r
                a.reset_pending()
                out["changed"].append(r.id)
            else:
                out["kept"].append(r.id)
            alarms[r.id] = a
            by_channel.setdefault(r.channel, []).append(a)
        out["removed"] = [i for i in self._alarms if i not in alarms]
        self._alarms, self._by_channel = alarms, by_channel
        return out


    # -- input ---------------------------------------------------------------------------




    # -- output --------------------------------------------------------------------------



    def snapshot(self) -> dict[str, Any]:
        """JSON-safe state of every alarm (states, acknowledgements, pending delays, learned
        baselines and baseline learning) and of the faulted channels; see :meth:`restore`."""
        alarms = {rid: a.saved() for rid, a in self._alarms.items()}
        return {"version": SNAPSHOT_VERSION, "alarms": alarms, "suspended": dict(self._suspended)}


    # -- internals -----------------------------------------------------------------------
    def _step(self, a: _Alarm, v: float, t_ns: int, unit: str) -> AlarmEvent | None:
        if not math.isfinite(v):
            return None
        if a.value_ns is not None and t_ns < a.value_ns:
            if a.value_ns - t_ns <= CLOCK_JITTER_NS:
                t_ns = a.value_ns  # arrival-time jitter: time holds still
            else:  # the clock stepped back: pending delays (and learning) restart on it
                a.reset_pending()
        a.value, a.value_ns = v, int(t_ns)
        if a.rule.baseline is not None and a.base is None and not a.learn_value(v, t_ns):
            return None
        levels = a.levels
        assert levels is not None  # learned above
        h = a.rule.hysteresis
        for k, level in enumerate(levels):
            if v >= level:
                a.above_ns[k] = a.above_ns[k] if a.above_ns[k] is not None else t_ns
            else:
                a.above_ns[k] = None
            if v < level * (1 - h):
                a.below_ns[k] = a.below_ns[k] if a.below_ns[k] is not None else t_ns
            else:
                a.below_ns[k] = None
        on_ns, off_ns = round(a.rule.on_delay_s * _NS), round(a.rule.off_delay_s * _NS)
        rank = a.state.rank
        target = rank
        for k in (2, 1):  # the most severe level that has qualified
            since = a.above_ns[k - 1]
            if k > rank and since is not None and t_ns - since >= on_ns:
                target = k
                break
        if target == rank:
            for k in (1, 2):  # the lowest level that has cleared long enough
                since = a.below_ns[k - 1]
                if k <= rank and since is not None and t_ns - since >= off_ns:
                    target = k - 1
                    break
        if target == rank:
            return None
        return self._move(a, target, v, t_ns, unit)

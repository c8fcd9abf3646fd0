"""Alarm states and the transition table: the closed sets of states, causes, rule kinds and
event kinds, with what each means (served by GET /api/v1/meta), and the errors.

Pure data and one check; knows nothing about rules, frames, config, storage or HTTP."""

from __future__ import annotations

import re
from enum import StrEnum
from typing import Literal, get_args

from dsp.types import check_choice

RuleKind = Literal["band", "tone", "overall", "signal"]
EventKind = Literal[
    "transition", "ack", "status", "notify", "shelve", "unshelve", "shelve-expired"
]
Cause = Literal["value", "ack"]
# Frame times that run back by at most this are jitter (arrival-time stamps of a producer
# sending in bursts) and hold still; further back is a clock step (our choice).
CLOCK_JITTER_NS = 1_000_000_000
RULE_KINDS: tuple[str, ...] = get_args(RuleKind)
EVENT_KINDS: tuple[str, ...] = get_args(EventKind)
CAUSES: tuple[str, ...] = get_args(Cause)
SNAPSHOT_VERSION = 1
# ISA-18.2 (from memory): a shelved alarm is suppressed for a bounded time; ours: 7 days
SHELVE_MAX_S = 7 * 86400
LEARN_MAX = 2048  # baseline values kept; beyond that every other one is dropped (even spacing)
# What each member of the closed sets means: GET /api/v1/meta serves these to the dashboard.
ALARM_MEANING: dict[str, str] = {
    "normal": "no level reached, or cleared and nothing held",
    "alert": "the value is at or above its alert level",
    "danger": "the value is at or above its danger level",
    "latched": "the value has cleared but the rule latches: active until acknowledged",
}
RULE_MEANING: dict[str, str] = {
    "band": "the RMS of a named band",
    "tone": "the amplitude of a tracked tone",
    "overall": "the channel's overall RMS",
    "signal": "loss of signal: the channel is no-signal or failed",
}
EVENT_MEANING: dict[str, str] = {
    "transition": "an alarm changed state because its value moved",
    "ack": "an operator acknowledged an alarm",
    "status": "a channel's data-quality state changed",
    "notify": "a [[notify]] entry started failing to send (ok → failed) or sends again "
    "(failed → ok); rule 'notify.<entry>'",
    "shelve": "an operator shelved a rule: it still evaluates and logs, but its alarm is "
    "not annunciated as active until the shelve ends",
    "unshelve": "an operator ended a rule's shelve before its end time",
    "shelve-expired": "a rule's shelve reached its end time and ended by itself",
}
_ID_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*$")
_NS = 1_000_000_000


class AlarmError(Exception):
    """Base class of the errors the alarm package raises on purpose."""


class InvalidTransition(AlarmError):
    """A state change the transition table does not allow (a bug or a corrupt snapshot)."""


class UnknownAlarm(AlarmError, LookupError):
    """No rule has this id (API: 404)."""


class AckRefused(AlarmError):
    """The alarm is not active, or already acknowledged (API: 409)."""


class ShelveRefused(AlarmError):
    """A shelve or unshelve that does not apply (already shelved, not shelved, a bad end
    time or no reason) (API: 409 or 422)."""


class AlarmState(StrEnum):
    """State of one rule's alarm. LATCHED = the value has cleared but the rule latches:
    the alarm stays active until acknowledged."""

    NORMAL = "normal"
    ALERT = "alert"
    DANGER = "danger"
    LATCHED = "latched"

    @property
    def rank(self) -> int:
        """Severity of the *value* condition: normal/latched 0, alert 1, danger 2."""
        return _RANK[self]

    @property
    def active(self) -> bool:
        return self is not AlarmState.NORMAL


_N, _A, _D, _L = AlarmState.NORMAL, AlarmState.ALERT, AlarmState.DANGER, AlarmState.LATCHED
_RANK = {_N: 0, _L: 0, _A: 1, _D: 2}
_BY_RANK = {1: _A, 2: _D}

# (from, to) → causes that may make that change. Everything else is an InvalidTransition.
TRANSITIONS: dict[tuple[AlarmState, AlarmState], frozenset[str]] = {
    (_N, _A): frozenset({"value"}),
    (_N, _D): frozenset({"value"}),
    (_A, _D): frozenset({"value"}),
    (_A, _N): frozenset({"value"}),  # not latching, or acknowledged while high
    (_A, _L): frozenset({"value"}),  # latching and not acknowledged
    (_D, _A): frozenset({"value"}),
    (_D, _N): frozenset({"value"}),
    (_D, _L): frozenset({"value"}),
    (_L, _A): frozenset({"value"}),
    (_L, _D): frozenset({"value"}),
    (_L, _N): frozenset({"ack"}),  # only an acknowledgement ends a latch
}


def check_transition(
    from_state: AlarmState | str, to_state: AlarmState | str, cause: str = "value"
) -> tuple[AlarmState, AlarmState]:
    """Check one state change against :data:`TRANSITIONS`; return the two states as enums.

    ``cause`` is ``"value"`` (the watched value moved) or ``"ack"``. Raises
    :class:`InvalidTransition` naming the change and what the table allows from there,
    or ValueError for a state or cause outside the closed sets.
    """
    states = tuple(s.value for s in AlarmState)
    a = AlarmState(check_choice("from_state", _str(from_state), states))
    b = AlarmState(check_choice("to_state", _str(to_state), states))
    check_choice("cause", cause, CAUSES)
    if cause not in TRANSITIONS.get((a, b), frozenset()):
        allowed = [
            f"{t.value} (by {'/'.join(sorted(c))})" for (f, t), c in TRANSITIONS.items() if f is a
        ]
        raise InvalidTransition(
            f"{a.value} -> {b.value} by {cause} is not an allowed alarm transition; "
            f"from {a.value}: {', '.join(allowed)}"
        )
    return a, b


def _str(s: AlarmState | str) -> str:
    return s.value if isinstance(s, AlarmState) else s


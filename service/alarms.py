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
* Relative levels: alert/danger = factor × the median of the values seen during the first
  ``learn_s`` seconds of good data (×2 alert, ×4 danger or +6 dB / +12 dB over the
  baseline are ``common practice`` starting points). No transitions while learning.

Not thread-safe: call one engine from one thread (the event loop).
"""

from __future__ import annotations

import math
import re
import statistics
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field, fields
from enum import StrEnum
from typing import Any, Literal, get_args

from dsp.analyzer import resolve_unit
from dsp.types import check_choice

from .config import (
    Config,
    bands_for,
    channel_ids,
    channel_settings,
    effective_analysis,
    profiles_of,
    tones_for,
)
from .quality import CHANNEL_STATUSES, SUSPENDING
from .types import SpectralFrame

__all__ = [
    "CHANNEL_STATUSES",
    "EVENT_KINDS",
    "RULE_KINDS",
    "AckRefused",
    "AlarmEngine",
    "AlarmError",
    "AlarmEvent",
    "AlarmState",
    "AlarmView",
    "Baseline",
    "InvalidTransition",
    "Rule",
    "UnknownAlarm",
    "check_transition",
    "rule_id",
    "rules_from_config",
]

RuleKind = Literal["band", "tone", "overall", "signal"]
EventKind = Literal["transition", "ack", "status"]
Cause = Literal["value", "ack"]
# Frame times that run back by at most this are jitter (arrival-time stamps of a producer
# sending in bursts) and hold still; further back is a clock step (our choice).
CLOCK_JITTER_NS = 1_000_000_000
RULE_KINDS: tuple[str, ...] = get_args(RuleKind)
EVENT_KINDS: tuple[str, ...] = get_args(EventKind)
CAUSES: tuple[str, ...] = get_args(Cause)
SNAPSHOT_VERSION = 1
LEARN_MAX = 2048  # baseline values kept; beyond that every other one is dropped (even spacing)
_ID_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*$")
_NS = 1_000_000_000


class AlarmError(Exception):
    """Base class of the errors this module raises on purpose."""


class InvalidTransition(AlarmError):
    """A state change the transition table does not allow (a bug or a corrupt snapshot)."""


class UnknownAlarm(AlarmError, LookupError):
    """No rule has this id (API: 404)."""


class AckRefused(AlarmError):
    """The alarm is not active, or already acknowledged (API: 409)."""


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


# --- rules ------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Baseline:
    """Relative levels: alert/danger = factor × median of the first ``learn_s`` s of data.

    Give ``alert_factor`` and ``danger_factor`` (amplitude ratios, e.g. 2 and 4) or
    ``alert_db`` and ``danger_db`` (dB over the baseline, amplitude: factor = 10^(dB/20),
    so +6 dB ≈ ×1.995). Values are RMS amplitudes, hence 20·log10 (IEC 60027-3).
    """

    learn_s: float
    alert_factor: float | None = None
    danger_factor: float | None = None
    alert_db: float | None = None
    danger_db: float | None = None

    def __post_init__(self) -> None:
        if not (math.isfinite(self.learn_s) and self.learn_s > 0):
            raise ValueError(f"baseline learn_s={self.learn_s!r} must be > 0 seconds")
        by_factor = (self.alert_factor, self.danger_factor)
        by_db = (self.alert_db, self.danger_db)
        if any(v is not None for v in by_factor) == any(v is not None for v in by_db) or (
            None in by_factor and None in by_db
        ):
            raise ValueError(
                "baseline: give alert_factor and danger_factor, or alert_db and danger_db"
            )
        alert, danger = self.factors
        if not (math.isfinite(alert) and math.isfinite(danger) and 0 < alert < danger):
            raise ValueError(
                f"baseline: alert factor {alert:g} must be > 0 and below danger factor {danger:g}"
            )

    @property
    def factors(self) -> tuple[float, float]:
        """(alert, danger) as amplitude ratios over the baseline median."""
        if self.alert_factor is not None and self.danger_factor is not None:
            return float(self.alert_factor), float(self.danger_factor)
        return 10 ** (float(self.alert_db or 0) / 20), 10 ** (float(self.danger_db or 0) / 20)

    def as_dict(self) -> dict[str, float]:
        return {
            f.name: getattr(self, f.name) for f in fields(self) if getattr(self, f.name) is not None
        }


@dataclass(frozen=True, slots=True)
class Rule:
    """One alarm rule on one channel's value.

    ``id`` is stable and url-safe (see :func:`rule_id`). ``alert`` < ``danger`` are absolute
    levels in ``unit`` (the frame's display unit; RMS for bands and overall, the display
    amplitude for tones), or both None with ``baseline`` set. ``hysteresis`` is the fraction
    h in [0, 1): a level clears below level·(1 − h). Delays in seconds (>= 0).
    """

    id: str
    channel: str
    kind: RuleKind
    name: str
    alert: float | None
    danger: float | None
    hysteresis: float = 0.05
    on_delay_s: float = 0.0
    off_delay_s: float = 0.0
    latch: bool = False
    unit: str = ""
    baseline: Baseline | None = None
    profile: str = ""  # analysis profile watched; "" = the channel's primary one
    primary: bool = True  # is ``profile`` the channel's primary profile

    def __post_init__(self) -> None:
        check_choice("kind", self.kind, RULE_KINDS)
        if not _ID_RE.match(self.id):
            raise ValueError(f"rule id {self.id!r} is not url-safe (letters, digits, . _ -)")
        if isinstance(self.baseline, Mapping):
            object.__setattr__(self, "baseline", Baseline(**self.baseline))
        if self.kind == "signal":
            if self.baseline is not None or (self.alert is None) == (self.danger is None):
                raise ValueError(f"rule {self.id!r}: a signal rule has one level, alert or danger")
        elif self.baseline is None:
            a, d = self.alert, self.danger
            if a is None or d is None or not (math.isfinite(a) and math.isfinite(d) and 0 < a < d):
                raise ValueError(
                    f"rule {self.id!r}: need 0 < alert < danger (got alert={a!r}, danger={d!r})"
                )
        elif self.alert is not None or self.danger is not None:
            raise ValueError(f"rule {self.id!r}: give absolute levels or a baseline, not both")
        if not 0 <= self.hysteresis < 1:
            raise ValueError(f"rule {self.id!r}: hysteresis={self.hysteresis!r} must be in [0, 1)")
        for k in ("on_delay_s", "off_delay_s"):
            v = getattr(self, k)
            if not (math.isfinite(v) and v >= 0):
                raise ValueError(f"rule {self.id!r}: {k}={v!r} must be >= 0 seconds")

    def watches(self, frame: SpectralFrame) -> bool:
        """Is ``frame`` (of this rule's channel) from the profile this rule watches?"""
        if self.profile == frame.profile:
            return True
        return self.primary and frame.primary and self.profile in ("", frame.profile)

    def pick(self, frame: SpectralFrame) -> float:
        """This rule's value in ``frame`` (NaN when the frame lacks it)."""
        if self.kind == "signal":
            return math.nan  # not a value of the frame: see AlarmEngine.set_channel_status
        if self.kind == "overall":
            return float(frame.overall)
        items = frame.bands if self.kind == "band" else frame.tones
        for item in items:
            if item.name == self.name:
                return float(item.value)
        return math.nan

    def as_dict(self) -> dict[str, Any]:
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        d["baseline"] = self.baseline.as_dict() if self.baseline else None
        return d


def _slug(name: str) -> str:
    return re.sub(r"[^a-z0-9._-]+", "-", name.lower()).strip("-") or "x"


def rule_id(channel: str, kind: str, name: str = "", profile: str = "") -> str:
    """Stable url-safe rule id: ``"<channel>.overall"`` or ``"<channel>.<kind>.<slug>"``
    where slug is the name lower-cased with runs of other characters replaced by ``-``
    (e.g. band "thirds 1 kHz" on p1-de-h → ``"p1-de-h.band.thirds-1-khz"``). A rule on a
    profile other than the channel's primary one names it after the channel
    (``"p1-de-h.narrow.band.1x"``); give ``profile`` only in that case."""
    check_choice("kind", kind, RULE_KINDS)
    head = f"{channel}.{profile}" if profile else channel
    return f"{head}.overall" if kind == "overall" else f"{head}.{kind}.{_slug(name)}"


# Keys the lead may add to AlarmConfig for relative levels; read with getattr so that this
# module works before and after they exist.
_BASELINE_KEYS = ("alert_factor", "danger_factor", "alert_db", "danger_db")


def rules_from_config(cfg: Config, channels: Sequence[str] | None = None) -> list[Rule]:
    """Expand ``[[alarms]]`` into one :class:`Rule` per channel and value.

    ``channels`` are the channel ids actually running (default: those the sources name;
    pass the pipeline's ids when a simulated source lists none). ``channel = "*"`` applies
    to every channel that has the band/tone (overall: every channel); an entry for one
    channel replaces a ``"*"`` entry for the same value on that channel. Units are each
    channel's display unit. Relative levels come from optional AlarmConfig keys
    ``baseline_learn_s`` with ``alert_factor``/``danger_factor`` or ``alert_db``/``danger_db``.
    Raises ValueError (with the ``alarms[j]`` path) for a channel or value that does not
    exist, a repeated rule, or two names that give the same id.
    """
    chans = list(channels) if channels is not None else channel_ids(cfg)
    chosen: dict[tuple[str, str, str, str], tuple[int, Rule]] = {}
    for j, a in enumerate(cfg.alarms):
        kind: str = "band" if a.band is not None else "tone" if a.tone is not None else "overall"
        name = a.band if a.band is not None else a.tone if a.tone is not None else "overall"
        if a.channel == "*":
            targets = chans
        elif a.channel in chans:
            targets = [a.channel]
        else:
            listed = ", ".join(map(repr, chans)) or "none"
            raise ValueError(f"alarms[{j}].channel: {a.channel!r} is not a channel ({listed})")
        learn_s = getattr(a, "baseline_learn_s", None)
        baseline = None
        if learn_s is not None:
            baseline = Baseline(learn_s, **{k: getattr(a, k, None) for k in _BASELINE_KEYS})
        for ch, prof in _watched(cfg, targets, a.profile, kind, name):
            if prof is None:
                if a.channel == "*":
                    continue
                on = "" if a.profile in (None, "*") else f", profile {a.profile!r}"
                raise ValueError(
                    f"alarms[{j}].{kind}: {name!r} is not a {kind} of channel {ch!r}{on}"
                )
            primary = prof == profiles_of(cfg, ch)[0]
            settings = effective_analysis(cfg, ch, prof)
            rule = Rule(
                id=rule_id(ch, kind, name, "" if primary else prof),
                profile=prof,
                primary=primary,
                channel=ch,
                kind=kind,  # type: ignore[arg-type]
                name=name,
                alert=None if baseline else a.alert,
                danger=None if baseline else a.danger,
                hysteresis=a.hysteresis,
                on_delay_s=a.on_delay_s,
                off_delay_s=a.off_delay_s,
                latch=a.latch,
                unit=resolve_unit(settings.output_unit or settings.unit),
                baseline=baseline,
            )
            key = (ch, prof, kind, name)
            if key in chosen:
                i, _ = chosen[key]
                own, prev_own = a.channel != "*", cfg.alarms[i].channel != "*"
                if own == prev_own:
                    raise ValueError(
                        f"alarms[{j}]: repeats alarms[{i}] ({kind} {name!r} on {ch!r}"
                        + ("" if primary else f", profile {prof!r}") + ")"
                    )
                if not own:
                    continue  # the channel's own entry wins
            chosen[key] = (j, rule)
    rules = [r for _, r in chosen.values()]
    for ch in chans:
        level = channel_settings(cfg, ch).loss_of_signal
        if level != "off":
            rules.append(signal_rule(ch, level))
    seen: dict[str, Rule] = {}
    for r in rules:
        if r.id in seen:
            raise ValueError(
                f"alarms: {seen[r.id].name!r} and {r.name!r} on {r.channel!r} both give rule id "
                f"{r.id!r}; rename one"
            )
        seen[r.id] = r
    return rules


def signal_rule(channel: str, level: str) -> Rule:
    """The loss-of-signal rule of ``channel`` at ``level`` (``"alert"`` or ``"danger"``).

    Its levels hold 1 (the channel is not delivering) in the slot of its level; the value
    it watches is 1 while the channel is ``no-signal`` or ``failed``, 0 otherwise."""
    return Rule(
        id=f"{channel}.signal",
        channel=channel,
        kind="signal",
        name="loss of signal",
        alert=1.0 if level == "alert" else None,
        danger=1.0 if level == "danger" else None,
        hysteresis=0.0,
    )


def _watched(
    cfg: Config, targets: Sequence[str], profile: str | None, kind: str, name: str
) -> list[tuple[str, str | None]]:
    """(channel, profile) pairs an alarm entry watches; profile None: the value is missing.

    ``profile`` None: the channel's first profile that has the value (overall: its primary
    one); ``"*"``: every profile that has it; a name: that profile (skipped on channels that
    do not run it)."""
    out: list[tuple[str, str | None]] = []
    for ch in targets:
        mine = profiles_of(cfg, ch)
        if profile not in (None, "*"):
            if profile not in mine:
                continue
            mine = [profile]
        if kind == "overall":
            have = mine
        else:
            lookup = bands_for if kind == "band" else tones_for
            have = [p for p in mine if name in [x.name for x in lookup(cfg, ch, p)]]
        if not have:
            out.append((ch, None))
        else:
            out += [(ch, p) for p in (have if profile == "*" else have[:1])]
    return out


# --- events and views -------------------------------------------------------------------


@dataclass(frozen=True, slots=True, kw_only=True)
class AlarmEvent:
    """One thing that happened to an alarm; written to the store before it is announced.

    ``id`` is None until the store assigns it (a monotonically increasing integer, see
    ``service.store.Store.put_events``). ``t_ns``: ns since the Unix epoch (the frame's
    time, or the time given to :meth:`AlarmEngine.ack`). ``kind``: ``"transition"`` (state
    change by value), ``"ack"`` or ``"status"`` (a channel's data-quality state changed:
    ``from_state``/``to_state`` are then states of ``service.quality``, the message says
    why). ``value`` (the rule's value then) and ``level`` (the
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

    def as_dict(self) -> dict[str, Any]:
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        d["state"], d["peak"] = self.state.value, self.peak.value
        return d


# --- the state machine ------------------------------------------------------------------


@dataclass
class _Alarm:
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
    above_ns: list[int | None] = field(default_factory=lambda: [None, None])  # alert, danger
    below_ns: list[int | None] = field(default_factory=lambda: [None, None])
    base: float | None = None  # learned baseline median
    learn_start_ns: int | None = None
    learn: list[float] = field(default_factory=list)
    learn_stride: int = 1
    learn_count: int = 0

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


class AlarmEngine:
    """Runs every rule's state machine on incoming frames; see the module docstring."""

    def __init__(self, rules: Iterable[Rule]) -> None:
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

    @property
    def rules(self) -> list[Rule]:
        return [a.rule for a in self._alarms.values()]

    # -- input ---------------------------------------------------------------------------
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
                events.append(ev)
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
                    events.append(ev)
        return events

    def _signal(self, a: _Alarm, lost: bool, t_ns: int, cause: str) -> AlarmEvent | None:
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
            from_state=before.value, to_state=after.value, value=a.value, level=1.0,
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
            t_ns=int(t_ns),
            channel=a.rule.channel,
            rule=a.rule.id,
            kind="ack",
            from_state=before.value,
            to_state=a.state.value,
            value=a.value,
            level=level,
            unit=a.rule.unit,
            message=msg,
            latched=a.latched,
            acked_by=who,
            note=note,
        )

    # -- output --------------------------------------------------------------------------
    def views(self) -> list[AlarmView]:
        """Every rule's alarm, in rule order."""
        return [self._view(a) for a in self._alarms.values()]

    def view(self, rule_id: str) -> AlarmView:
        a = self._alarms.get(rule_id)
        if a is None:
            raise UnknownAlarm(f"no alarm rule {rule_id!r}")
        return self._view(a)

    def active(self) -> list[AlarmView]:
        """Alarms in ALERT, DANGER or LATCHED, most severe first, then oldest first."""
        act = [self._view(a) for a in self._alarms.values() if a.state.active]
        return sorted(act, key=lambda v: (-v.peak.rank, v.since_ns or 0, v.rule))

    def snapshot(self) -> dict[str, Any]:
        """JSON-safe state of every alarm (states, acknowledgements, pending delays, learned
        baselines and baseline learning) and of the faulted channels; see :meth:`restore`."""
        alarms = {}
        for rid, a in self._alarms.items():
            alarms[rid] = {
                "state": a.state.value,
                "peak": a.peak.value,
                "since_ns": a.since_ns,
                "value": a.value,
                "value_ns": a.value_ns,
                "acked": a.acked,
                "acked_by": a.acked_by,
                "acked_ns": a.acked_ns,
                "note": a.note,
                "above_ns": list(a.above_ns),
                "below_ns": list(a.below_ns),
                "baseline": a.rule.baseline.as_dict() if a.rule.baseline else None,
                "base": a.base,
                "learn_start_ns": a.learn_start_ns,
                "learn": list(a.learn),
                "learn_stride": a.learn_stride,
                "learn_count": a.learn_count,
            }
        return {"version": SNAPSHOT_VERSION, "alarms": alarms, "suspended": dict(self._suspended)}

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
        states = tuple(s.value for s in AlarmState)
        for rid, s in dict(snapshot.get("alarms", {})).items():
            a = self._alarms.get(rid)
            if a is None:
                continue
            a.state = AlarmState(check_choice("state", s["state"], states))
            a.peak = AlarmState(check_choice("peak", s["peak"], states))
            a.since_ns, a.value, a.value_ns = s["since_ns"], s["value"], s["value_ns"]
            a.acked, a.acked_by, a.acked_ns, a.note = (
                bool(s["acked"]),
                s["acked_by"],
                s["acked_ns"],
                s["note"],
            )
            a.above_ns, a.below_ns = list(s["above_ns"]), list(s["below_ns"])
            same_baseline = s["baseline"] == (
                a.rule.baseline.as_dict() if a.rule.baseline else None
            )
            if a.rule.baseline is not None and same_baseline:
                a.base, a.learn_start_ns, a.learn = s["base"], s["learn_start_ns"], list(s["learn"])
                a.learn_stride, a.learn_count = int(s["learn_stride"]), int(s["learn_count"])
        # "faulted" (a list of channels in sensor fault) is how older snapshots said it
        suspended = snapshot.get("suspended")
        if suspended is None:
            suspended = dict.fromkeys(snapshot.get("faulted", ()), "sensor-fault")
        self._suspended = {
            c: s for c, s in dict(suspended).items() if s in SUSPENDING
        }

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
        before = a.state
        if target > rank:
            after, level = _BY_RANK[target], levels[target - 1]
            a.acked = False  # a new, higher condition needs its own acknowledgement
            a.acked_by, a.acked_ns, a.note = "", None, ""
            a.peak = after if after.rank > a.peak.rank else a.peak
        else:
            level = levels[target] * (1 - h)  # the clear threshold crossed
            after = _BY_RANK.get(target) or (_L if a.rule.latch and not a.acked else _N)
        check_transition(before, after, "value")
        a.state, a.since_ns = after, int(t_ns)
        if after is _N:
            a.clear_ack()
        return AlarmEvent(
            t_ns=int(t_ns),
            channel=a.rule.channel,
            rule=a.rule.id,
            kind="transition",
            from_state=before.value,
            to_state=after.value,
            value=v,
            level=level,
            unit=a.rule.unit or unit,
            message=self._message(a, before, after, v, level, unit),
            latched=a.latched,
            acked_by="",
            note="",
        )

    @staticmethod
    def _what(a: _Alarm) -> str:
        r = a.rule
        head = r.channel if r.primary else f"{r.channel} {r.profile}"
        return f"{head} overall" if r.kind == "overall" else f"{head} {r.kind} {r.name}"

    def _message(
        self, a: _Alarm, before: AlarmState, after: AlarmState, v: float, level: float, unit: str
    ) -> str:
        u = a.rule.unit or unit
        if after.rank > before.rank:
            head = f"{self._what(a)}: {after.value.upper()}"
            return f"{head}, {v:.4g} {u} >= {after.value} level {level:.4g} {u}"
        tail = "; latched until acknowledged" if after is _L else ""
        word = "cleared" if after.rank == 0 else f"back to {after.value.upper()}"
        return f"{self._what(a)}: {word}, {v:.4g} {u} < {level:.4g} {u}{tail}"

    def _state_level(self, a: _Alarm) -> float | None:
        if a.rule.kind == "signal":
            return 1.0 if a.state.rank or a.state is _L else None
        levels = a.levels
        state = a.peak if a.state is _L else a.state
        if levels is None or state.rank == 0:
            return None
        return levels[state.rank - 1]

    def _view(self, a: _Alarm) -> AlarmView:
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
        )

"""Which ``[[notify]]`` entries an event goes to, and how: a pure function of the events, the
entries, their recent counts and the time (filters, minimum level, quiet hours, rate limit,
digest).

Knows the config models and AlarmEvent; nothing of SQL, threads, apprise or HTTP (the store
calls :class:`Router` inside the events' own transaction)."""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import datetime
from fnmatch import fnmatchcase

from ..alarms import AlarmEvent, AlarmState
from ..config import Config, NotifyConfig, QuietHours
from ..store.outbox import EntryStats, OutboxRow
from ..timefmt import zone

__all__ = ["Router", "event_class", "event_level", "in_quiet_hours", "route_events"]

NS = 1_000_000_000
_LEVEL_RANK = {"alert": 1, "danger": 2}


def event_class(e: AlarmEvent) -> str | None:
    """The ``[[notify]] events`` class of ``e``: raised | cleared | ack | status | source,
    or None for what is never notified (e.g. notify's own events)."""
    if e.kind == "ack":
        return "ack"
    if e.kind == "status":
        return "source" if e.to_state == "failed" else "status"
    if e.kind == "transition":
        up = AlarmState(e.to_state).rank - AlarmState(e.from_state).rank
        return "raised" if up > 0 else "cleared" if up < 0 else None
    return None


def event_level(e: AlarmEvent, cls: str) -> str | None:
    """The alarm level an event is about (alert | danger), or None (status, source): raised
    → the new state, cleared and ack → the state left (an ack of a latch counts as alert)."""
    state = e.to_state if cls == "raised" else e.from_state if cls in ("cleared", "ack") else ""
    if state in _LEVEL_RANK:
        return state
    return "alert" if cls in ("raised", "cleared", "ack") else None


def in_quiet_hours(q: QuietHours | None, t_ns: int, tz: str) -> bool:
    """Is wall time ``t_ns`` (ns since the epoch) inside ``q`` in zone ``tz``? Start is in,
    end is out; an end before the start runs over midnight; start == end is never."""
    if q is None:
        return False
    t = datetime.fromtimestamp(t_ns / NS, zone(tz))
    m = t.hour * 60 + t.minute
    a = int(q.start[:2]) * 60 + int(q.start[3:])
    b = int(q.end[:2]) * 60 + int(q.end[3:])
    return a <= m < b if a <= b else (m >= a or m < b)


def channel_matches(n: NotifyConfig, channel: str, machine: str) -> bool:
    """Does the entry's channel and machine filter take ``channel`` (on ``machine``, "" if
    none)? A machine filter other than ['*'] only takes channels that have a machine."""
    if not any(fnmatchcase(channel, g) for g in n.channels):
        return False
    if n.machines == ["*"]:
        return True
    return bool(machine) and any(fnmatchcase(machine, g) for g in n.machines)


def route_events(
    events: Sequence[AlarmEvent],
    entries: Sequence[NotifyConfig],
    stats: Mapping[str, EntryStats],
    now_ns: int,
    *,
    machine_of: Callable[[str], str] = lambda ch: "",
    tz: str = "UTC",
    suppressed: Callable[[str], bool] = lambda rule: False,
) -> list[OutboxRow]:
    """The outbox rows for ``events`` (ids set), in order.

    Per entry, an event passes its ``events`` classes, channel and machine globs,
    ``min_level`` (alarm events only), ``suppressed(rule)`` (e.g. a shelved rule) and, in
    quiet hours (``tz``), only at danger level. A passing event is then, with ``stats`` (the
    entry's recent rows, updated as this batch goes on):

    * gathered into the entry's open digest if it has more than ``digest_after`` events
      within ``digest_window_s`` and a digest is gathering (due when that one is);
    * else ``limited`` (written, never sent) if ``rate_limit`` messages were made within
      ``rate_window_s`` — a new digest counts as one message;
    * else a new digest (due after ``digest_window_s``) when over ``digest_after``, or a
      message of its own, due now.
    """
    live = {n.name: stats.get(n.name, EntryStats()) for n in entries}
    rows: list[OutboxRow] = []
    for e in events:
        cls = event_class(e)
        if cls is None or e.id is None:
            continue
        level = event_level(e, cls)
        for n in entries:
            if cls not in n.events or not channel_matches(n, e.channel, machine_of(e.channel)):
                continue
            if level is not None and _LEVEL_RANK[level] < _LEVEL_RANK[n.min_level]:
                continue
            if suppressed(e.rule):
                continue
            if level != "danger" and in_quiet_hours(n.quiet_hours, now_ns, tz):
                continue
            st = live[n.name]
            over = st.rows >= n.digest_after
            if over and st.open_digest is not None:
                grp, due = st.open_digest
                rows.append(OutboxRow(e.id, n.name, grp, True, "pending", due))
                live[n.name] = replace(st, rows=st.rows + 1)
            elif st.messages >= n.rate_limit:
                rows.append(OutboxRow(e.id, n.name, e.id, over, "limited", now_ns))
            elif over:
                due = now_ns + round(n.digest_window_s * NS)
                rows.append(OutboxRow(e.id, n.name, e.id, True, "pending", due))
                live[n.name] = EntryStats(st.messages + 1, st.rows + 1, (e.id, due))
            else:
                rows.append(OutboxRow(e.id, n.name, e.id, False, "pending", now_ns))
                live[n.name] = replace(st, messages=st.messages + 1, rows=st.rows + 1)
    return rows


@dataclass
class Router:
    """The store's :class:`~service.store.outbox.OutboxRouter` for a config's ``[[notify]]``.

    ``suppressed(rule_id)`` keeps a rule's events out (e.g. a shelved rule)."""

    cfg: Config
    suppressed: Callable[[str], bool] = lambda rule: False

    def __post_init__(self) -> None:
        self._machine = {c.id: c.machine for c in self.cfg.channels}

    def windows(self) -> Mapping[str, tuple[float, float]]:
        return {n.name: (n.rate_window_s, n.digest_window_s) for n in self.cfg.notify}

    def route(
        self, events: Sequence[AlarmEvent], stats: Mapping[str, EntryStats], now_ns: int
    ) -> list[OutboxRow]:
        return route_events(
            events, self.cfg.notify, stats, now_ns,
            machine_of=lambda ch: self._machine.get(ch, ""),
            tz=self.cfg.service.timezone, suppressed=self.suppressed,
        )

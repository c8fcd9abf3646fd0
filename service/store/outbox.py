"""The notification outbox table: the rows a router makes for committed events, and the SQL
that finds the due ones and marks them sent, retried, failed or pruned.

Functions of a connection plus the router's protocol; knows nothing of apprise, config,
threads or what a message says (``service.notify`` routes, renders and sends)."""

from __future__ import annotations

import sqlite3
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal, Protocol

from ..alarms import AlarmEvent
from .events import EVENT_COLS

__all__ = [
    "EntryStats",
    "OutboxRouter",
    "OutboxRow",
    "OutboxState",
]

OutboxState = Literal["pending", "sent", "failed", "limited"]
OUTBOX_STATES: tuple[OutboxState, ...] = ("pending", "sent", "failed", "limited")
NS = 1_000_000_000


@dataclass(frozen=True, slots=True)
class EntryStats:
    """What a router needs to know of one entry's recent rows (wall-clock windows).

    ``messages``: messages (a single event or a digest) made within the rate window;
    ``rows``: events routed to it within the digest window (limited ones not counted);
    ``open_digest``: (its key event id, due time ns) of a digest still gathering, or None."""

    messages: int = 0
    rows: int = 0
    open_digest: tuple[int, int] | None = None


@dataclass(frozen=True, slots=True)
class OutboxRow:
    """One event for one entry. ``grp``: the event id its message is keyed by (its own, or
    the first event of its digest); ``due_ns``: not sent before (ns since the epoch)."""

    event_id: int
    entry: str
    grp: int
    digest: bool
    state: OutboxState
    due_ns: int


class OutboxRouter(Protocol):
    """Turns committed events into outbox rows, inside the events' own transaction."""

    def windows(self) -> Mapping[str, tuple[float, float]]:
        """Entry name → (rate window s, digest window s)."""
        ...

    def route(
        self, events: Sequence[AlarmEvent], stats: Mapping[str, EntryStats], now_ns: int
    ) -> list[OutboxRow]:
        """The rows for ``events`` (ids set); must not raise for an event it cannot route."""
        ...


def entry_stats(
    c: sqlite3.Connection, entry: str, now_ns: int, rate_window_s: float, digest_window_s: float
) -> EntryStats:
    """:class:`EntryStats` of ``entry`` at ``now_ns``."""
    messages = c.execute(
        "SELECT COUNT(DISTINCT grp) FROM outbox WHERE entry = ? AND created_ns >= ? "
        "AND state != 'limited'",
        (entry, now_ns - round(rate_window_s * NS)),
    ).fetchone()[0]
    rows = c.execute(
        "SELECT COUNT(*) FROM outbox WHERE entry = ? AND created_ns >= ? AND state != 'limited'",
        (entry, now_ns - round(digest_window_s * NS)),
    ).fetchone()[0]
    open_row = c.execute(
        "SELECT grp, due_ns FROM outbox WHERE entry = ? AND digest = 1 AND state = 'pending' "
        "AND due_ns > ? ORDER BY grp DESC LIMIT 1",
        (entry, now_ns),
    ).fetchone()
    return EntryStats(int(messages), int(rows), None if open_row is None else
                      (int(open_row[0]), int(open_row[1])))


def insert_rows(c: sqlite3.Connection, rows: Sequence[OutboxRow], now_ns: int) -> None:
    """Insert the router's rows (a repeated (event, entry) is an error: never twice)."""
    c.executemany(
        "INSERT INTO outbox(event_id, entry, grp, digest, state, created_ns, due_ns, done_ns) "
        "VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
        [(r.event_id, r.entry, r.grp, int(r.digest), r.state, now_ns, r.due_ns,
          now_ns if r.state == "limited" else None) for r in rows],
    )


_DUE_COLS = ("row_id", "entry", "grp", "digest", "created_ns", "due_ns", "attempts")


def select_due(c: sqlite3.Connection, now_ns: int, limit: int) -> list[dict[str, Any]]:
    """Pending rows due at ``now_ns``, oldest message first, each with its event (dict of
    the event columns under ``event``) — every row of a due digest is included."""
    sql = (
        f"SELECT o.id, o.entry, o.grp, o.digest, o.created_ns, o.due_ns, o.attempts, "
        f"{', '.join('e.' + k for k in EVENT_COLS)} FROM outbox o JOIN events e "
        "ON e.id = o.event_id WHERE o.state = 'pending' AND (o.entry, o.grp) IN "
        "(SELECT entry, grp FROM outbox WHERE state = 'pending' GROUP BY entry, grp "
        " HAVING MAX(due_ns) <= ? ORDER BY MIN(id) LIMIT ?) ORDER BY o.id"
    )
    out = []
    n = len(_DUE_COLS)
    for r in c.execute(sql, (now_ns, int(limit))).fetchall():
        d = dict(zip(_DUE_COLS, r[:n], strict=True))
        d["digest"] = bool(d["digest"])
        d["event"] = dict(zip(EVENT_COLS, r[n:], strict=True))
        out.append(d)
    return out


def mark_sent(c: sqlite3.Connection, row_ids: Sequence[int], now_ns: int) -> int:
    """Pending rows ``row_ids`` → sent; how many changed (a row already done stays)."""
    return _update(c, row_ids, "state = 'sent', done_ns = ?, attempts = attempts + 1,"
                   " last_error = ''", (now_ns,))


def mark_retry(
    c: sqlite3.Connection, row_ids: Sequence[int], due_ns: int, error: str
) -> int:
    """One more failed attempt on pending rows; next attempt not before ``due_ns``."""
    return _update(c, row_ids, "due_ns = ?, attempts = attempts + 1, last_error = ?",
                   (due_ns, error[:500]))


def mark_failed(c: sqlite3.Connection, row_ids: Sequence[int], now_ns: int, error: str) -> int:
    """Pending rows → failed (given up; never retried)."""
    return _update(c, row_ids, "state = 'failed', done_ns = ?, attempts = attempts + 1,"
                   " last_error = ?", (now_ns, error[:500]))


def _update(c: sqlite3.Connection, row_ids: Sequence[int], sets: str,
            args: tuple[Any, ...]) -> int:
    n = 0
    for rid in row_ids:
        n += c.execute(f"UPDATE outbox SET {sets} WHERE id = ? AND state = 'pending'",
                       (*args, int(rid))).rowcount
    return n


def select_counts(c: sqlite3.Connection) -> dict[str, dict[str, int]]:
    """Rows per entry and state: {entry: {"pending": n, "sent": n, "failed": n, "limited": n}}
    plus ``oldest_pending_ns`` (created time of its oldest pending row, 0 if none)."""
    out: dict[str, dict[str, int]] = {}
    for entry, state, n, oldest in c.execute(
        "SELECT entry, state, COUNT(*), MIN(created_ns) FROM outbox GROUP BY entry, state"
    ):
        d = out.setdefault(entry, {s: 0 for s in OUTBOX_STATES} | {"oldest_pending_ns": 0})
        d[state] = int(n)
        if state == "pending":
            d["oldest_pending_ns"] = int(oldest)
    return out


def select_rows(c: sqlite3.Connection, entry: str | None = None) -> list[dict[str, Any]]:
    """Every row (of ``entry``), oldest first, as dicts of the table's columns."""
    cur = c.execute(
        "SELECT * FROM outbox" + (" WHERE entry = ?" if entry else "") + " ORDER BY id",
        (entry,) if entry else (),
    )
    names = [d[0] for d in cur.description]
    return [dict(zip(names, r, strict=True)) for r in cur.fetchall()]


def store_id(c: sqlite3.Connection) -> str:
    """This database's random id (made by schema step 3)."""
    row = c.execute("SELECT value FROM meta WHERE key = 'store_id'").fetchone()
    return "" if row is None else str(row[0])


def prune(c: sqlite3.Connection, before_ns: int) -> int:
    """Delete rows done (sent, failed, limited) before ``before_ns``; own transaction."""
    c.execute("BEGIN IMMEDIATE")
    n = c.execute("DELETE FROM outbox WHERE state != 'pending' AND done_ns < ?",
                  (int(before_ns),)).rowcount
    c.execute("COMMIT")
    return int(n)

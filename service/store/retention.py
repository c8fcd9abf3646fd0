"""Retention: how long each kind of row is kept, and the deletions by age and by size.

Functions of the writer's connection, each in its own transactions; knows the tables, not
threads or the writer's queue.
"""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass
from typing import Any

from .trends import NS

__all__ = ["DAY_S", "Retention", "apply_retention"]

DAY_S = 86400


@dataclass(frozen=True, slots=True)
class Retention:
    """How long each kind of row is kept, in seconds of data time; None = forever.

    ``raw_s``/``minute_s``/``hour_s`` are for the trend tiers of ``trend_step_s``, 60 s and
    3600 s. ``max_db_bytes`` caps the main database file (page_count × page_size): when it
    is exceeded the oldest rows go in this order — raw trend tier, stored spectra
    (``service.store.history``), evidence, 1-min tier, 1-h tier — until it fits; events
    and alarm state are never dropped for size.
    """

    raw_s: float | None = 7 * DAY_S
    minute_s: float | None = 90 * DAY_S
    hour_s: float | None = 5 * 365 * DAY_S
    evidence_s: float | None = 365 * DAY_S
    events_s: float | None = None
    max_db_bytes: int | None = None
    # outbox rows done (sent, given up, rate-limited) are kept this long, in wall time
    outbox_s: float | None = 30 * DAY_S


def apply_retention(
    c: sqlite3.Connection, tiers_s: tuple[int, ...], ret: Retention, now_ns: int | None
) -> tuple[dict[str, Any], str]:
    """Retention by age, then by size (see :class:`Retention`); own transactions.

    ``now_ns`` defaults to the newest data time in the store. Returns the report ({"now_ns",
    "deleted", "deleted_for_size", "db_bytes"}) and an error text ("" if none) when the file
    is still above ``max_db_bytes`` with only events and alarm state left."""
    if now_ns is None:
        row = c.execute(
            "SELECT MAX(t) FROM (SELECT MAX(t_ns) AS t FROM trend "
            "UNION ALL SELECT MAX(t_ns) FROM events)"
        ).fetchone()
        now_ns = row[0]
    deleted: dict[str, int] = {}
    if now_ns is not None:
        c.execute("BEGIN IMMEDIATE")
        for s, keep_s in zip(tiers_s, (ret.raw_s, ret.minute_s, ret.hour_s), strict=True):
            if keep_s is not None:
                cutoff = int(now_ns) - round(keep_s * NS)
                deleted[f"trend_{s}s"] = drop_tier(c, s, cutoff - cutoff % (s * NS))
        if ret.evidence_s is not None:
            deleted["evidence"] = c.execute(
                "DELETE FROM evidence WHERE t0_ns < ?",
                (int(now_ns) - round(ret.evidence_s * NS),),
            ).rowcount
        if ret.events_s is not None:
            deleted["events"] = c.execute(
                "DELETE FROM events WHERE t_ns < ?", (int(now_ns) - round(ret.events_s * NS),)
            ).rowcount
        c.execute("COMMIT")
    vacuum(c)
    size = db_size(c)
    for_size: dict[str, int] = {}
    error = ""
    if ret.max_db_bytes is not None:
        victims = [f"trend_{tiers_s[0]}s", "history", "evidence",
                   *(f"trend_{s}s" for s in tiers_s[1:])]
        while size > ret.max_db_bytes and victims:
            c.execute("BEGIN IMMEDIATE")
            n = drop_oldest(c, victims[0])
            c.execute("COMMIT")
            if n == 0:
                victims.pop(0)
                continue
            for_size[victims[0]] = for_size.get(victims[0], 0) + n
            vacuum(c)
            size = db_size(c)
        if size > ret.max_db_bytes:
            error = (
                f"is {size} bytes, above max_db_bytes={ret.max_db_bytes} with "
                "only events and alarm state left"
            )
    c.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    report = {"now_ns": now_ns, "deleted": deleted, "deleted_for_size": for_size, "db_bytes": size}
    return report, error


def drop_tier(c: sqlite3.Connection, step_s: int, before_ns: int) -> int:
    """Delete a tier's buckets starting before ``before_ns``; remember that it is gone."""
    n = c.execute("DELETE FROM trend WHERE step_s = ? AND t_ns < ?", (step_s, before_ns)).rowcount
    c.execute(
        "INSERT INTO trend_floor(step_s, t_ns) VALUES (?, ?) ON CONFLICT(step_s) "
        "DO UPDATE SET t_ns = max(t_ns, excluded.t_ns)",
        (step_s, before_ns),
    )
    return int(n)


def drop_oldest(c: sqlite3.Connection, what: str) -> int:
    """Delete about the oldest eighth of one kind of row (at least one bucket time)."""
    if what == "history":
        n = c.execute("SELECT COUNT(*) FROM history").fetchone()[0]
        if n == 0:
            return 0
        t = c.execute(
            "SELECT t_ns FROM history ORDER BY t_ns LIMIT 1 OFFSET ?", (max(0, n // 8 - 1),)
        ).fetchone()[0]
        return int(c.execute("DELETE FROM history WHERE t_ns <= ?", (t,)).rowcount)
    if what == "evidence":
        n = c.execute("SELECT COUNT(*) FROM evidence").fetchone()[0]
        return int(
            c.execute(
                "DELETE FROM evidence WHERE event_id IN "
                "(SELECT event_id FROM evidence ORDER BY t0_ns LIMIT ?)",
                (max(1, n // 8),),
            ).rowcount
        )
    s = int(what.removeprefix("trend_").removesuffix("s"))
    n = c.execute("SELECT COUNT(*) FROM trend WHERE step_s = ?", (s,)).fetchone()[0]
    if n == 0:
        return 0
    t = c.execute(
        "SELECT t_ns FROM trend WHERE step_s = ? ORDER BY t_ns LIMIT 1 OFFSET ?",
        (s, max(0, n // 8 - 1)),
    ).fetchone()[0]
    return drop_tier(c, s, t + s * NS)


def db_size(c: sqlite3.Connection) -> int:
    """The main database file's size in bytes (page_count × page_size)."""
    pages = c.execute("PRAGMA page_count").fetchone()[0]
    return int(pages) * int(c.execute("PRAGMA page_size").fetchone()[0])


def vacuum(c: sqlite3.Connection) -> None:
    """Free the pages deleted rows left (auto_vacuum = INCREMENTAL)."""
    # Each step of this pragma frees one page; executescript steps it to the end, whereas
    # execute() stops after the first step of a statement that returns no columns.
    c.executescript("PRAGMA incremental_vacuum;")

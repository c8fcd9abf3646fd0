"""The store's SQLite schema as an ordered list of migrations, keyed by ``PRAGMA user_version``.

Knows SQL and nothing else: no threads, no asyncio, no engine. ``service.store`` calls
:func:`migrate` on every connection it opens for writing.

A database that runs for months must take every later change of the schema. So the schema
is never edited in place: each change is a new step appended to :data:`MIGRATIONS`. The
database's ``user_version`` says how many steps it has run; :func:`migrate` runs the missing
ones in order, each in its own transaction together with the new ``user_version``, so a
crash leaves the database at a step boundary (https://www.sqlite.org/pragma.html#pragma_user_version,
https://www.sqlite.org/lang_transaction.html). A database from a newer quaver (more steps
than this one knows) is refused, not guessed at.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Callable
from dataclasses import dataclass

__all__ = ["MIGRATIONS", "SchemaError", "migrate", "schema_version"]


class SchemaError(Exception):
    """The database cannot be brought to this quaver's schema (e.g. it is newer)."""


@dataclass(frozen=True, slots=True)
class Migration:
    """One step: ``sql`` (a script) or ``apply`` (a function of the connection), and why."""

    why: str
    sql: str = ""
    apply: Callable[[sqlite3.Connection], None] | None = None


# Step 1 is the schema every quaver wrote before migrations existed (user_version 0). It uses
# IF NOT EXISTS so that such a database, tables and all, is adopted as it is.
_V1 = """
CREATE TABLE IF NOT EXISTS meta(key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS events(
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    t_ns INTEGER NOT NULL, channel TEXT NOT NULL, rule TEXT NOT NULL, kind TEXT NOT NULL,
    from_state TEXT NOT NULL, to_state TEXT NOT NULL, value REAL, level REAL,
    unit TEXT NOT NULL, message TEXT NOT NULL, latched INTEGER NOT NULL,
    acked_by TEXT NOT NULL, note TEXT NOT NULL);
CREATE INDEX IF NOT EXISTS events_t ON events(t_ns);
CREATE INDEX IF NOT EXISTS events_channel ON events(channel, id);
CREATE TABLE IF NOT EXISTS alarm_state(
    k INTEGER PRIMARY KEY CHECK (k = 1), saved_ns INTEGER NOT NULL, json TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS evidence(
    event_id INTEGER PRIMARY KEY REFERENCES events(id) ON DELETE CASCADE,
    t0_ns INTEGER NOT NULL, fs REAL NOT NULL, f0_hz REAL NOT NULL, df_hz REAL NOT NULL,
    unit TEXT NOT NULL, amplitude TEXT NOT NULL, spectrum BLOB NOT NULL, waveform BLOB,
    meta TEXT NOT NULL);
CREATE INDEX IF NOT EXISTS evidence_t ON evidence(t0_ns);
CREATE TABLE IF NOT EXISTS series(
    id INTEGER PRIMARY KEY, channel TEXT NOT NULL, name TEXT NOT NULL, UNIQUE(channel, name));
CREATE TABLE IF NOT EXISTS trend(
    step_s INTEGER NOT NULL, series INTEGER NOT NULL, t_ns INTEGER NOT NULL,
    sum REAL NOT NULL, min REAL NOT NULL, max REAL NOT NULL, count INTEGER NOT NULL,
    PRIMARY KEY(step_s, series, t_ns)) WITHOUT ROWID;
CREATE INDEX IF NOT EXISTS trend_age ON trend(step_s, t_ns);
CREATE TABLE IF NOT EXISTS trend_floor(step_s INTEGER PRIMARY KEY, t_ns INTEGER NOT NULL);
"""

# Step 2: the event log is read by kind (e.g. every channel-state change of a channel, the
# data-quality events) and by rule; one index serves "this rule's history" (the dashboard's
# evidence list) without a scan of months of events.
_V2 = """
CREATE INDEX IF NOT EXISTS events_rule ON events(rule, id);
"""

# Step 3: the notification outbox. A row per (event, [[notify]] entry) is written in the
# transaction of its event and marked when sent, so a message is neither lost nor sent twice
# across a crash (service.notify). ``grp`` is the event id the message is keyed by: the
# row's own, or the first event of the digest the row is gathered into. ``store_id`` names
# this database in every idempotency key (random, made once).
_V3 = """
CREATE TABLE IF NOT EXISTS outbox(
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    event_id INTEGER NOT NULL REFERENCES events(id) ON DELETE CASCADE,
    entry TEXT NOT NULL, grp INTEGER NOT NULL, digest INTEGER NOT NULL,
    state TEXT NOT NULL CHECK (state IN ('pending', 'sent', 'failed', 'limited')),
    created_ns INTEGER NOT NULL, due_ns INTEGER NOT NULL,
    attempts INTEGER NOT NULL DEFAULT 0, last_error TEXT NOT NULL DEFAULT '',
    done_ns INTEGER, UNIQUE(event_id, entry));
CREATE INDEX IF NOT EXISTS outbox_due ON outbox(state, due_ns);
CREATE INDEX IF NOT EXISTS outbox_entry ON outbox(entry, created_ns);
INSERT OR IGNORE INTO meta(key, value) VALUES ('store_id', lower(hex(randomblob(8))));
"""

# Step 4: spectral history (service.store.history): averaged spectra of every channel and
# profile at each interval and at every alarm change, 16-bit dB codes compressed with zlib.
# reason 'interval' rows have step_s = their interval (thinned rows the coarse step),
# 'alarm' rows step_s = 0 and the event's id.
_V4 = """
CREATE TABLE history(
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    channel TEXT NOT NULL, profile TEXT NOT NULL, t_ns INTEGER NOT NULL,
    span_ns INTEGER NOT NULL, reason TEXT NOT NULL CHECK (reason IN ('interval', 'alarm')),
    step_s INTEGER NOT NULL, frames INTEGER NOT NULL, averages INTEGER NOT NULL,
    event_id INTEGER, lines INTEGER NOT NULL, f0_hz REAL NOT NULL, df_hz REAL NOT NULL,
    fmax_hz REAL NOT NULL, input_unit TEXT NOT NULL, unit TEXT NOT NULL,
    amplitude TEXT NOT NULL, lowcut_hz REAL NOT NULL, window TEXT NOT NULL,
    enbw_bins REAL NOT NULL, codec TEXT NOT NULL, data BLOB NOT NULL);
CREATE INDEX history_channel_t ON history(channel, profile, t_ns);
CREATE INDEX history_age ON history(t_ns);
"""

# Step 5: run-up and coast-down records (service.store.runups): amplitude and phase of chosen
# orders against speed, one row per sweep through a channel's runup_min_rpm … runup_max_rpm,
# its points as JSON (a few hundred numbers: no codec needed).
_V5 = """
CREATE TABLE runups(
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    channel TEXT NOT NULL, kind TEXT NOT NULL CHECK (kind IN ('run-up', 'coast-down')),
    start_ns INTEGER NOT NULL, end_ns INTEGER NOT NULL, rpm_lo REAL NOT NULL,
    rpm_hi REAL NOT NULL, rpm_step REAL NOT NULL, orders TEXT NOT NULL, unit TEXT NOT NULL,
    points INTEGER NOT NULL, data TEXT NOT NULL);
CREATE INDEX runups_channel ON runups(channel, id);
"""

MIGRATIONS: tuple[Migration, ...] = (
    Migration("the schema before migrations: events, alarm state, evidence, trends", _V1),
    Migration("index the event log by rule", _V2),
    Migration("the notification outbox and the store's id", _V3),
    Migration("spectral history: stored averaged spectra", _V4),
    Migration("run-up and coast-down records", _V5),
)


def schema_version(c: sqlite3.Connection) -> int:
    """How many steps of :data:`MIGRATIONS` the database has run."""
    return int(c.execute("PRAGMA user_version").fetchone()[0])


def migrate(c: sqlite3.Connection, steps: tuple[Migration, ...] = MIGRATIONS) -> list[int]:
    """Run the steps the database has not run yet, in order, each in its own transaction
    with the new ``user_version``; return the step numbers run (1-based).

    ``c`` must be in autocommit mode (``isolation_level=None``). Raises :class:`SchemaError`
    for a database newer than ``steps`` or a step that fails (that step is rolled back; the
    ones before it stay)."""
    have = schema_version(c)
    if have > len(steps):
        raise SchemaError(
            f"the database's schema is at step {have}, newer than this quaver knows "
            f"({len(steps)}); use the quaver that wrote it, or another data_dir"
        )
    done = []
    for k in range(have + 1, len(steps) + 1):
        step = steps[k - 1]
        try:
            c.execute("BEGIN IMMEDIATE")
            if step.sql:
                # executescript would COMMIT first; run the statements one by one instead
                for stmt in _statements(step.sql):
                    c.execute(stmt)
            if step.apply is not None:
                step.apply(c)
            c.execute(f"PRAGMA user_version = {k}")
            c.execute("COMMIT")
        except sqlite3.Error as e:
            if c.in_transaction:
                c.execute("ROLLBACK")
            raise SchemaError(f"schema step {k} ({step.why}) failed: {e}") from e
        done.append(k)
    return done


def _statements(script: str) -> list[str]:
    """The complete statements of ``script`` (sqlite3.complete_statement decides)."""
    out, buf = [], ""
    for line in script.splitlines(keepends=True):
        buf += line
        if sqlite3.complete_statement(buf):
            out.append(buf.strip())
            buf = ""
    if buf.strip():
        raise SchemaError(f"incomplete SQL statement in a schema step: {buf.strip()[:80]!r}")
    return out

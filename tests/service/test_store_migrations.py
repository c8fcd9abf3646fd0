"""The store's schema evolves by ordered migrations keyed by PRAGMA user_version: a database
made by the schema before migrations existed is upgraded with nothing lost; a newer one is
refused; a failing step is rolled back alone."""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

import pytest

from service.store import Store
from service.store.schema import MIGRATIONS, Migration, SchemaError, migrate, schema_version

S = 1_000_000_000

# The DDL quaver wrote before migrations existed (user_version 0), as it stood then: the
# fixture database below is built from it, not from service.store.schema.
OLD_DDL = """
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

T0 = 1_700_000_000 * S
SNAPSHOT = {"version": 1, "alarms": {"m1.overall": {"state": "alert"}}, "faulted": []}


def _old_database(path: Path) -> None:
    """A database as the pre-migration quaver left it: events, alarm state, a trend."""
    c = sqlite3.connect(path, isolation_level=None)
    c.execute("PRAGMA journal_mode = WAL")
    c.executescript(OLD_DDL)
    for k in range(3):
        c.execute(
            "INSERT INTO events(t_ns, channel, rule, kind, from_state, to_state, value, level, "
            "unit, message, latched, acked_by, note) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?)",
            (T0 + k * S, "m1", "m1.overall", "transition", "normal", "alert", 1.5 + k, 1.0,
             "mm/s", f"event {k}", 0, "", ""),
        )
    c.execute("INSERT INTO alarm_state VALUES (1, ?, ?)", (T0, json.dumps(SNAPSHOT)))
    c.execute("INSERT INTO series(id, channel, name) VALUES (1, 'm1', 'overall')")
    for k in range(6):  # one minute of 10 s buckets, mean 2.0 each
        c.execute("INSERT INTO trend VALUES (10, 1, ?, ?, 1.0, 3.0, 2)", (T0 + k * 10 * S, 4.0))
    assert schema_version(c) == 0
    c.close()


def test_a_database_from_before_migrations_is_upgraded_with_nothing_lost(tmp_path: Path) -> None:
    path = tmp_path / "quaver.db"
    _old_database(path)
    with Store(path) as store:
        assert store.health()["ok"], store.health()
        events = store.events(None, "m1", 100, None)
        assert [e["message"] for e in events] == ["event 2", "event 1", "event 0"]
        assert [e["value"] for e in events] == [3.5, 2.5, 1.5]
        assert store.load_alarm_state() == SNAPSHOT
        pts = store.trend("m1", "overall", T0, T0 + 60 * S, step_s=10)
        # (mean, min, max, count) of each 10 s bucket, as written
        assert [(p[1], p[2], p[3], p[4]) for p in pts] == [(2.0, 1.0, 3.0, 2)] * 6
    c = sqlite3.connect(path)
    assert schema_version(c) == len(MIGRATIONS)
    indexes = {r[0] for r in c.execute("SELECT name FROM sqlite_master WHERE type = 'index'")}
    assert "events_rule" in indexes  # step 2 ran on the old database
    c.close()
    # opening again runs nothing: every step ran once
    c = sqlite3.connect(path, isolation_level=None)
    assert migrate(c) == []
    c.close()


def test_a_new_database_runs_every_step(tmp_path: Path) -> None:
    c = sqlite3.connect(tmp_path / "new.db", isolation_level=None)
    assert migrate(c) == list(range(1, len(MIGRATIONS) + 1))
    assert schema_version(c) == len(MIGRATIONS)
    c.close()


def test_a_database_from_a_newer_quaver_is_refused_and_left_alone(tmp_path: Path) -> None:
    path = tmp_path / "quaver.db"
    _old_database(path)
    c = sqlite3.connect(path, isolation_level=None)
    c.execute(f"PRAGMA user_version = {len(MIGRATIONS) + 5}")
    c.close()
    with pytest.raises(SchemaError, match="newer than this quaver knows"):
        migrate(sqlite3.connect(path, isolation_level=None))
    with Store(path) as store:  # monitoring would go on; the store says why it cannot write
        h = store.health()
        assert not h["ok"] and "newer than this quaver knows" in h["last_error"]
    c = sqlite3.connect(path)
    assert schema_version(c) == len(MIGRATIONS) + 5  # untouched
    assert c.execute("SELECT count(*) FROM events").fetchone()[0] == 3
    c.close()


def test_a_failing_step_is_rolled_back_alone(tmp_path: Path) -> None:
    steps = (
        Migration("make t", "CREATE TABLE t(x INTEGER);"),
        Migration("fill t, then fail", "INSERT INTO t VALUES (1);\nSELECT * FROM missing;"),
    )
    c = sqlite3.connect(tmp_path / "x.db", isolation_level=None)
    with pytest.raises(SchemaError, match=r"schema step 2 \(fill t, then fail\) failed"):
        migrate(c, steps)
    assert schema_version(c) == 1  # step 1 stays
    assert c.execute("SELECT count(*) FROM t").fetchone()[0] == 0  # step 2's insert undone
    assert not c.in_transaction
    c.close()

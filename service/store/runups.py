"""Stored run-up and coast-down records (schema step 5): one row per record, its rows of
amplitude and phase per order against speed kept as JSON.

Functions of a connection (the writer's or a reader's); knows the runups table, not threads,
the engine or HTTP. The records come from ``service.runups.SweepRecorder``."""

from __future__ import annotations

import json
import sqlite3
from collections.abc import Mapping
from typing import Any

__all__ = ["KEEP_PER_CHANNEL", "check_record", "insert_runup", "select_runup", "select_runups"]

# records kept per channel, the oldest deleted beyond it (our choice: a fan that sweeps every
# few minutes keeps about a day; a machine started daily, more than a year)
KEEP_PER_CHANNEL = 500

_LIST_COLS = ("id", "channel", "kind", "start_ns", "end_ns", "rpm_lo", "rpm_hi", "rpm_step",
              "orders", "unit", "points")


def check_record(rec: Mapping[str, Any]) -> None:
    """ValueError unless ``rec`` is a record as SweepRecorder makes it."""
    missing = {"kind", "start_ns", "end_ns", "rpm_lo", "rpm_hi", "rpm_step", "orders",
               "rows"} - set(rec)
    if missing:
        raise ValueError(f"a run-up record needs {', '.join(sorted(missing))}")
    if rec["kind"] not in ("run-up", "coast-down"):
        raise ValueError(f"kind={rec['kind']!r} is not one of 'run-up', 'coast-down'")


def insert_runup(c: sqlite3.Connection, channel: str, unit: str,
                 rec: Mapping[str, Any]) -> int:
    """Insert one record (``SweepRecorder``'s dict) of ``channel`` in ``unit``; its id. The
    channel's oldest records beyond KEEP_PER_CHANNEL go in the same transaction."""
    check_record(rec)
    kind = rec["kind"]
    rows = list(rec["rows"])
    cur = c.execute(
        "INSERT INTO runups(channel, kind, start_ns, end_ns, rpm_lo, rpm_hi, rpm_step, orders, "
        "unit, points, data) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
        (channel, kind, int(rec["start_ns"]), int(rec["end_ns"]), float(rec["rpm_lo"]),
         float(rec["rpm_hi"]), float(rec["rpm_step"]), json.dumps(list(rec["orders"])), unit,
         len(rows), json.dumps(rows, allow_nan=False)),
    )
    c.execute("DELETE FROM runups WHERE channel = ? AND id NOT IN (SELECT id FROM runups "
              "WHERE channel = ? ORDER BY id DESC LIMIT ?)",
              (channel, channel, KEEP_PER_CHANNEL))
    return int(cur.lastrowid or 0)


def _item(r: tuple[Any, ...]) -> dict[str, Any]:
    d = dict(zip(_LIST_COLS, r, strict=True))
    d["orders"] = json.loads(d["orders"])
    return d


def select_runups(c: sqlite3.Connection, channel: str, limit: int) -> list[dict[str, Any]]:
    """The channel's records without their rows, newest first (at most ``limit``)."""
    cols = ", ".join(_LIST_COLS)
    got = c.execute(f"SELECT {cols} FROM runups WHERE channel = ? ORDER BY id DESC LIMIT ?",
                    (channel, int(limit))).fetchall()
    return [_item(r) for r in got]


def select_runup(c: sqlite3.Connection, channel: str, runup_id: int) -> dict[str, Any] | None:
    """One record of ``channel`` with its rows, or None."""
    cols = ", ".join(_LIST_COLS)
    got = c.execute(f"SELECT {cols}, data FROM runups WHERE channel = ? AND id = ?",
                    (channel, int(runup_id))).fetchone()
    if got is None:
        return None
    d = _item(got[:-1])
    d["rows"] = json.loads(got[-1])
    return d

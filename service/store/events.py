"""The events, alarm-state and evidence tables: the SQL that writes and reads them.

Functions of a connection (the writer's or a reader's); knows AlarmEvent's fields and numpy
arrays, not threads, transactions or trends.
"""

from __future__ import annotations

import json
import math
import sqlite3
import time
from collections.abc import Mapping, Sequence
from dataclasses import replace
from typing import Any

import numpy as np

from ..alarms import AlarmEvent

__all__ = ["EVENT_COLS", "EVENT_LIMIT_MAX"]

EVENT_LIMIT_MAX = 1000
_F32 = np.dtype("<f4")

EVENT_COLS = (
    "id",
    "t_ns",
    "channel",
    "rule",
    "kind",
    "from_state",
    "to_state",
    "value",
    "level",
    "unit",
    "message",
    "latched",
    "acked_by",
    "note",
)
_SELECT = (
    f"SELECT {', '.join('e.' + k for k in EVENT_COLS)}, x.event_id IS NOT NULL "
    "FROM events e LEFT JOIN evidence x ON x.event_id = e.id"
)


def insert_events(c: sqlite3.Connection, events: Sequence[AlarmEvent]) -> list[AlarmEvent]:
    """Insert ``events``; the same events with their new ``id``."""
    out = []
    for e in events:
        d = e.as_dict()
        cur = c.execute(
            f"INSERT INTO events({', '.join(EVENT_COLS[1:])}) "
            f"VALUES ({', '.join('?' * (len(EVENT_COLS) - 1))})",
            [d[k] for k in EVENT_COLS[1:]],
        )
        out.append(replace(e, id=cur.lastrowid))
    return out


def write_state(c: sqlite3.Connection, state: str) -> None:
    """Replace the alarm snapshot (JSON text)."""
    c.execute(
        "INSERT OR REPLACE INTO alarm_state(k, saved_ns, json) VALUES (1, ?, ?)",
        (time.time_ns(), state),
    )


def read_state(c: sqlite3.Connection) -> dict[str, Any] | None:
    """The last saved alarm snapshot, or None."""
    row = c.execute("SELECT json FROM alarm_state WHERE k = 1").fetchone()
    return None if row is None else json.loads(row[0])


def select_events(
    c: sqlite3.Connection,
    since_ns: int | None,
    channel: str | None,
    limit: int,
    before_id: int | None,
) -> list[dict[str, Any]]:
    """Events newest first (see ``Store.events``)."""
    if not 1 <= int(limit) <= EVENT_LIMIT_MAX:
        raise ValueError(f"limit={limit!r} must be in 1…{EVENT_LIMIT_MAX}")
    where: list[str] = []
    args: list[int | str] = []
    if since_ns is not None:
        where.append("e.t_ns >= ?")
        args.append(int(since_ns))
    if channel is not None:
        where.append("e.channel = ?")
        args.append(channel)
    if before_id is not None:
        where.append("e.id < ?")
        args.append(int(before_id))
    sql = (
        _SELECT
        + (f" WHERE {' AND '.join(where)}" if where else "")
        + " ORDER BY e.id DESC LIMIT ?"
    )
    return [_event_dict(r) for r in c.execute(sql, [*args, int(limit)]).fetchall()]


def select_event(c: sqlite3.Connection, event_id: int) -> dict[str, Any] | None:
    """One event as in :func:`select_events`, or None."""
    r = c.execute(_SELECT + " WHERE e.id = ?", (int(event_id),)).fetchone()
    return None if r is None else _event_dict(r)


def evidence_row(
    event_id: int,
    spectrum: Mapping[str, Any],
    waveform: np.ndarray | Sequence[float] | None,
    fs: float,
    t0_ns: int,
) -> tuple[Any, ...]:
    """The evidence table's row for ``Store.put_evidence``'s arguments; ValueError if bad."""
    spec = np.ascontiguousarray(np.asarray(spectrum["values"], dtype=_F32))
    if spec.ndim != 1:
        raise ValueError(f"spectrum values must be 1-D, got shape {spec.shape}")
    wave = None
    if waveform is not None:
        w = np.ascontiguousarray(np.asarray(waveform, dtype=_F32))
        if w.ndim != 1:
            raise ValueError(f"waveform must be 1-D [n], got shape {w.shape}")
        wave = w.tobytes()
    if not (math.isfinite(fs) and fs > 0):
        raise ValueError(f"fs={fs!r} must be > 0 Hz")
    meta = {
        k: v
        for k, v in spectrum.items()
        if k not in ("f0_hz", "df_hz", "unit", "amplitude", "values")
    }
    return (
        int(event_id),
        int(t0_ns),
        float(fs),
        float(spectrum["f0_hz"]),
        float(spectrum["df_hz"]),
        str(spectrum["unit"]),
        str(spectrum["amplitude"]),
        spec.tobytes(),
        wave,
        json.dumps(meta, allow_nan=False),
    )


def insert_evidence(c: sqlite3.Connection, row: tuple[Any, ...]) -> None:
    """Insert (or replace) one :func:`evidence_row`."""
    c.execute(
        "INSERT OR REPLACE INTO evidence(event_id, t0_ns, fs, f0_hz, df_hz, unit, "
        "amplitude, spectrum, waveform, meta) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
        row,
    )


def select_evidence(c: sqlite3.Connection, event_id: int) -> dict[str, Any] | None:
    """The evidence of an event (see ``Store.get_evidence``), or None."""
    r = c.execute(
        "SELECT t0_ns, fs, f0_hz, df_hz, unit, amplitude, spectrum, waveform, meta "
        "FROM evidence WHERE event_id = ?",
        (int(event_id),),
    ).fetchone()
    if r is None:
        return None
    t0_ns, fs, f0_hz, df_hz, unit, amplitude, spec, wave, meta = r
    spectrum = {
        "f0_hz": f0_hz,
        "df_hz": df_hz,
        "unit": unit,
        "amplitude": amplitude,
        **json.loads(meta),
        "values": np.frombuffer(spec, dtype=_F32).copy(),
    }
    return {
        "event_id": int(event_id),
        "t0_ns": t0_ns,
        "fs": fs,
        "spectrum": spectrum,
        "waveform": None if wave is None else np.frombuffer(wave, dtype=_F32).copy(),
    }


def _event_dict(r: Sequence[Any]) -> dict[str, Any]:
    d = dict(zip(EVENT_COLS, r[: len(EVENT_COLS)], strict=True))
    d["latched"] = bool(d["latched"])
    d["has_evidence"] = bool(r[len(EVENT_COLS)])
    return d

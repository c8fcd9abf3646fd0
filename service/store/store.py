"""SQLite storage: alarm events and alarm state, alarm evidence (spectrum + waveform), trends.

One writer thread fed by a queue, reads on per-thread connections; knows nothing about
asyncio, HTTP, the hub or the engine (it takes AlarmEvents and plain numbers and arrays).

Threads
    Every write (``put_events``, ``save_alarm_state``, ``put_evidence``, closed trend buckets,
    ``maintain``) is queued to the one writer thread and returns a
    :class:`concurrent.futures.Future` that resolves only after the transaction holding it
    has COMMITTED (await it from asyncio with ``asyncio.wrap_future``). Consecutive queued
    writes share one transaction; each runs in its own SAVEPOINT, so one bad write fails
    only its own future. Reads run on the calling thread on that thread's own connection
    (call them through ``asyncio.to_thread``); in WAL mode readers see the last committed
    state and never wait for the writer (https://www.sqlite.org/wal.html, "Concurrency").

Durability
    The database is in WAL mode. With ``synchronous=FULL`` the WAL is fsynced at every
    commit, so a committed transaction survives a process kill, an OS crash and a power
    loss. With ``synchronous=NORMAL`` a WAL commit has been written to the WAL file (the OS
    holds it) but not fsynced: it survives ``kill -9`` of this process but the last
    transactions may roll back after an OS crash or power loss (the file stays consistent;
    https://www.sqlite.org/pragma.html#pragma_synchronous). A transaction holding events,
    alarm state or evidence is therefore committed with FULL; a transaction holding only
    trend buckets with NORMAL (losing the last seconds of a trend on power loss is fine).

Faults
    A write that fails (disk full, read-only folder, vanished file) never raises in the
    caller's thread: its future resolves with :class:`StoreError`, ``write_errors`` counts
    it and ``last_error`` keeps the reason; see :meth:`Store.health`. Monitoring goes on; the
    writer tries to (re)open the database at most every ``REOPEN_S`` seconds. Reads raise
    StoreError when the database cannot be read.

Trends
    ``record(channel, name, t_ns, value)`` aggregates in memory into buckets of
    ``trend_step_s`` (default 10 s), aligned to multiples of the step since the Unix epoch.
    A bucket is written when a value for a later bucket of the same series arrives, when the
    newest data of any series is two steps past it, or on :meth:`Store.flush_trends` /
    :meth:`Store.close`. Each written bucket is merged at once into the 10 s, 1-min and 1-h
    tiers (sum, min, max and count combine exactly; mean = sum/count), so every tier is
    complete as soon as its period ends and survives a restart; a value arriving for a
    bucket already written merges into it. "Downsampled with age" is then retention: the
    10 s rows go after ``Retention.raw_s``, 1-min rows after ``minute_s``, 1-h rows after
    ``hour_s``. Ages are measured from the newest data time in the store (the data clock,
    not the wall clock), so replaying an old recording never deletes newer data.
"""

from __future__ import annotations

import json
import logging
import math
import queue
import sqlite3
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from concurrent.futures import Future, InvalidStateError
from contextlib import contextmanager
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from .alarms import AlarmEvent
from .schema import SchemaError, migrate

log = logging.getLogger("quaver.store")

__all__ = ["Retention", "Store", "StoreError", "TREND_STEPS_S"]

_NS = 1_000_000_000
DAY_S = 86400
TREND_STEPS_S = (1, 2, 3, 4, 5, 6, 10, 12, 15, 20, 30)  # finest tier: must divide 60 s
REOPEN_S = 5.0
BATCH_MAX = 512
EVENT_LIMIT_MAX = 1000
_F32 = np.dtype("<f4")

_MERGE = """
INSERT INTO trend(step_s, series, t_ns, sum, min, max, count) VALUES (?, ?, ?, ?, ?, ?, ?)
ON CONFLICT(step_s, series, t_ns) DO UPDATE SET
    sum = sum + excluded.sum, min = min(min, excluded.min), max = max(max, excluded.max),
    count = count + excluded.count
"""

_EVENT_COLS = (
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


def trend_key(profile: str, name: str) -> str:
    """The series name of value ``name`` (overall, band:<n>, tone:<n>) of an analysis
    profile other than the channel's primary one (whose series are the names themselves)."""
    return f"{profile}/{name}"


class StoreError(Exception):
    """The database could not be written or read; the message says which file and why."""


@dataclass(frozen=True, slots=True)
class Retention:
    """How long each kind of row is kept, in seconds of data time; None = forever.

    ``raw_s``/``minute_s``/``hour_s`` are for the trend tiers of ``trend_step_s``, 60 s and
    3600 s. ``max_db_bytes`` caps the main database file (page_count × page_size): when it
    is exceeded the oldest rows go in this order — raw trend tier, evidence, 1-min tier,
    1-h tier — until it fits; events and alarm state are never dropped for size.
    """

    raw_s: float | None = 7 * DAY_S
    minute_s: float | None = 90 * DAY_S
    hour_s: float | None = 5 * 365 * DAY_S
    evidence_s: float | None = 365 * DAY_S
    events_s: float | None = None
    max_db_bytes: int | None = None


@dataclass(slots=True)
class _Agg:
    start_ns: int
    sum: float
    min: float
    max: float
    count: int

    @classmethod
    def of(cls, start_ns: int, v: float) -> _Agg:
        return cls(start_ns, v, v, v, 1)

    def add(self, v: float) -> None:
        self.sum += v
        self.min = min(self.min, v)
        self.max = max(self.max, v)
        self.count += 1


@dataclass(slots=True)
class _Task:
    fn: Callable[[sqlite3.Connection], Any]
    future: Future[Any]
    durable: bool


_STOP = object()


def _settle(fut: Future[Any], result: Any = None, exc: BaseException | None = None) -> None:
    """Resolve a future unless its owner cancelled it (the write itself is never skipped)."""
    if fut.cancelled():
        return
    try:
        if exc is not None:
            fut.set_exception(exc)
        else:
            fut.set_result(result)
    except InvalidStateError:
        pass


class Store:
    """The service's SQLite database; see the module docstring for threads and durability.

    ``path`` is the database file (its folder is created). ``trend_step_s`` is the finest
    trend tier in seconds (one of :data:`TREND_STEPS_S`); the coarser tiers are 60 s and
    3600 s. ``maintenance_s``: how often (wall time, on the writer thread) the retention
    limits are applied; :meth:`maintain` applies them now.
    """

    def __init__(
        self,
        path: str | Path,
        *,
        trend_step_s: int = 10,
        retention: Retention | None = None,
        maintenance_s: float = 600.0,
    ) -> None:
        if trend_step_s not in TREND_STEPS_S:
            listed = ", ".join(map(str, TREND_STEPS_S))
            raise ValueError(f"trend_step_s={trend_step_s!r} is not one of {listed} (s)")
        self.path = Path(path)
        self.trend_step_s = int(trend_step_s)
        self.tiers_s: tuple[int, int, int] = (self.trend_step_s, 60, 3600)
        self.retention = retention or Retention()
        self.maintenance_s = float(maintenance_s)
        self._q: queue.Queue[Any] = queue.Queue()
        self._thread: threading.Thread | None = None
        self._conn: sqlite3.Connection | None = None
        self._sync = ""
        self._last_open_try = -math.inf
        self._closed = False
        self._local = threading.local()
        self._readers: list[sqlite3.Connection] = []
        self._readers_lock = threading.Lock()
        # trend aggregation (any thread)
        self._tlock = threading.Lock()
        self._open: dict[tuple[str, str], _Agg] = {}
        # series ids of the writer's connection (ids never change: series are never deleted);
        # only the writer thread touches it, and it is emptied when the connection is opened
        self._series_ids: dict[tuple[str, str], int] = {}
        self._newest_ns: int | None = None
        # health (written by the writer thread, read anywhere)
        self.write_errors = 0
        self.last_error = ""
        self.last_error_ns: int | None = None
        self._failing = False
        self.events_written = 0
        self.buckets_written = 0
        self.db_bytes: int | None = None

    # -- life cycle ------------------------------------------------------------------------
    def start(self) -> None:
        """Open (or create) the database and start the writer thread. Never raises for I/O:
        if the file cannot be opened, :meth:`health` says why and writes fail their futures
        until it can (the writer retries)."""
        if self._thread is not None:
            return
        self._try_open()
        self._thread = threading.Thread(target=self._run, name="quaver-store", daemon=True)
        self._thread.start()

    def close(self, timeout_s: float = 60.0) -> None:
        """Write the open trend buckets, drain the queue, join the writer, close connections."""
        if self._closed:
            return
        self.flush_trends()
        self._closed = True
        if self._thread is not None:
            self._q.put(_STOP)
            self._thread.join(timeout_s)
        else:  # never started: fail what was queued
            while not self._q.empty():
                item = self._q.get_nowait()
                if isinstance(item, _Task):
                    _settle(item.future, exc=StoreError("store closed before it was started"))
        if self._conn is not None:
            self._conn.close()
            self._conn = None
        with self._readers_lock:
            for c in self._readers:
                c.close()
            self._readers.clear()

    def __enter__(self) -> Store:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def health(self) -> dict[str, Any]:
        """State for ``/api/v1/health`` and ``/metrics``: ``ok`` (open, writer alive and the
        last write succeeded), ``last_error`` (text, "" if none) and when (ns), counters,
        queue depth and the database size in bytes (as of the last maintenance)."""
        alive = self._thread is not None and self._thread.is_alive()
        return {
            "ok": self._conn is not None and alive and not self._failing,
            "path": str(self.path),
            "open": self._conn is not None,
            "writer_alive": alive,
            "queue": self._q.qsize(),
            "write_errors": self.write_errors,
            "last_error": self.last_error,
            "last_error_ns": self.last_error_ns,
            "events_written": self.events_written,
            "trend_buckets_written": self.buckets_written,
            "db_bytes": self.db_bytes,
            "max_db_bytes": self.retention.max_db_bytes,
        }

    # -- writes --------------------------------------------------------------------------
    def put_events(
        self, events: Sequence[AlarmEvent], *, alarm_state: Mapping[str, Any] | None = None
    ) -> Future[list[AlarmEvent]]:
        """Queue events (and, in the same transaction, the alarm snapshot they lead to).

        The future resolves, once committed with synchronous=FULL, to the events with their
        ``id`` set: integers increasing in commit order, never reused. On a write error it
        resolves with StoreError instead (nothing of the batch is stored).
        """
        evs = list(events)
        state = None if alarm_state is None else json.dumps(alarm_state, allow_nan=False)

        def write(c: sqlite3.Connection) -> list[AlarmEvent]:
            out = []
            for e in evs:
                d = e.as_dict()
                cur = c.execute(
                    f"INSERT INTO events({', '.join(_EVENT_COLS[1:])}) "
                    f"VALUES ({', '.join('?' * (len(_EVENT_COLS) - 1))})",
                    [d[k] for k in _EVENT_COLS[1:]],
                )
                out.append(replace(e, id=cur.lastrowid))
            if state is not None:
                _write_state(c, state)
            return out

        fut = self._submit(write, durable=True)
        fut.add_done_callback(self._count_events)
        return fut

    def _count_events(self, fut: Future[list[AlarmEvent]]) -> None:
        if not fut.cancelled() and fut.exception() is None:
            self.events_written += len(fut.result())

    def save_alarm_state(self, snapshot: Mapping[str, Any]) -> Future[None]:
        """Queue the alarm engine's snapshot (JSON-safe dict); durable like events."""
        state = json.dumps(snapshot, allow_nan=False)
        return self._submit(lambda c: _write_state(c, state), durable=True)

    def put_evidence(
        self,
        event_id: int,
        spectrum: Mapping[str, Any],
        waveform: np.ndarray | Sequence[float] | None,
        fs: float,
        t0_ns: int,
    ) -> Future[None]:
        """Queue the evidence of one stored event (one per event; a second replaces it).

        ``spectrum``: ``f0_hz`` and ``df_hz`` (Hz; line q at f0_hz + q·df_hz), ``unit``,
        ``amplitude`` and ``values`` (list or array, stored as little-endian float32); any
        other keys (JSON-safe, e.g. ``window``, ``lines``, ``t_ns``) are kept and returned.
        ``waveform``: 1-D samples in engineering units (float32) or None, sampled at ``fs``
        Hz, first sample at ``t0_ns`` (ns since the Unix epoch). Bad arguments raise
        ValueError here; write errors resolve the future with StoreError.
        """
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
        row = (
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

        def write(c: sqlite3.Connection) -> None:
            c.execute(
                "INSERT OR REPLACE INTO evidence(event_id, t0_ns, fs, f0_hz, df_hz, unit, "
                "amplitude, spectrum, waveform, meta) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                row,
            )

        return self._submit(write, durable=True)

    def record(self, channel: str, name: str, t_ns: int, value: float) -> None:
        """Add one value (any unit; the caller keeps units consistent per series) at ``t_ns``
        (ns since the Unix epoch, >= 0) to the trend of (channel, name). NaN/inf are skipped.
        Cheap and thread-safe; never blocks on the database."""
        self.record_many(channel, t_ns, {name: value})

    def record_many(self, channel: str, t_ns: int, values: Mapping[str, float]) -> None:
        """:meth:`record` for several names of one channel at one time."""
        step = self.trend_step_s * _NS
        t = int(t_ns)
        start = t - t % step
        closed: list[tuple[tuple[str, str], _Agg]] = []
        with self._tlock:
            for name, value in values.items():
                v = float(value)
                if not math.isfinite(v):
                    continue
                key = (channel, name)
                b = self._open.get(key)
                if b is None:
                    self._open[key] = _Agg.of(start, v)
                elif start == b.start_ns:
                    b.add(v)
                elif start > b.start_ns:
                    closed.append((key, b))
                    self._open[key] = _Agg.of(start, v)
                else:  # late: merges into the bucket already written
                    closed.append((key, _Agg.of(start, v)))
            if self._newest_ns is None or start > self._newest_ns:
                self._newest_ns = start
                for key, b in list(self._open.items()):  # series that went quiet
                    if b.start_ns < start - step:
                        closed.append((key, b))
                        del self._open[key]
        if closed:
            self._submit_buckets(closed)

    def flush_trends(self) -> Future[None]:
        """Write every open trend bucket now (a later value for it merges in exactly)."""
        with self._tlock:
            closed = list(self._open.items())
            self._open.clear()
        return self._submit_buckets(closed)

    def maintain(self, now_ns: int | None = None) -> Future[dict[str, Any]]:
        """Apply the retention limits now; ``now_ns`` defaults to the newest data time in the
        store. Resolves to {"now_ns", "deleted": {what: rows} by age, "deleted_for_size": {what:
        rows}, "db_bytes"}."""
        return self._submit(lambda c: self._maintain(c, now_ns), durable=False, alone=True)

    # -- reads (any thread) ---------------------------------------------------------------
    def load_alarm_state(self) -> dict[str, Any] | None:
        """The last saved alarm snapshot, or None if none was saved."""
        with self._read() as c:
            row = c.execute("SELECT json FROM alarm_state WHERE k = 1").fetchone()
        return None if row is None else json.loads(row[0])

    def events(
        self,
        since_ns: int | None = None,
        channel: str | None = None,
        limit: int = 100,
        before_id: int | None = None,
    ) -> list[dict[str, Any]]:
        """Stored events, newest (highest id) first, as dicts (AlarmEvent fields plus
        ``has_evidence``). ``since_ns``: only events at or after this time; ``before_id``:
        only ids below it (pass the last id of a page to get the next); ``limit`` 1…1000."""
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
            f"SELECT {', '.join('e.' + k for k in _EVENT_COLS)}, x.event_id IS NOT NULL "
            "FROM events e LEFT JOIN evidence x ON x.event_id = e.id"
            + (f" WHERE {' AND '.join(where)}" if where else "")
            + " ORDER BY e.id DESC LIMIT ?"
        )
        with self._read() as c:
            rows = c.execute(sql, [*args, int(limit)]).fetchall()
        return [_event_dict(r) for r in rows]

    def event(self, event_id: int) -> dict[str, Any] | None:
        """One stored event as in :meth:`events`, or None."""
        with self._read() as c:
            r = c.execute(
                f"SELECT {', '.join('e.' + k for k in _EVENT_COLS)}, x.event_id IS NOT NULL "
                "FROM events e LEFT JOIN evidence x ON x.event_id = e.id WHERE e.id = ?",
                (int(event_id),),
            ).fetchone()
        return None if r is None else _event_dict(r)

    def get_evidence(self, event_id: int) -> dict[str, Any] | None:
        """The evidence of an event, or None: {"event_id", "t0_ns", "fs", "spectrum":
        {"f0_hz", "df_hz", "unit", "amplitude", "values": float32 array, **extra keys},
        "waveform": float32 array or None} — the arrays exactly as stored."""
        with self._read() as c:
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

    def trend_step(self, since_ns: int, step_s: int | None = None) -> int:
        """The step in seconds :meth:`trend` uses for a range starting at ``since_ns``.

        The base is the finest tier that still holds everything from ``since_ns`` on (the
        coarsest one if none does); a requested ``step_s`` (a positive multiple of
        ``trend_step_s``) is rounded up to a multiple of that base.
        """
        with self._read() as c:
            return self._pick(c, since_ns, step_s)[1]

    def trend(
        self,
        channel: str,
        name: str,
        since_ns: int,
        until_ns: int,
        step_s: int | None = None,
    ) -> list[tuple[int, float, float, float, int]]:
        """Trend points (t_ns, mean, min, max, count) of (channel, name), oldest first.

        ``t_ns`` is a bucket's start (ns since the Unix epoch, a multiple of the step); every
        bucket overlapping [since_ns, until_ns) is returned whole; buckets with no data are
        absent. The step is :meth:`trend_step`; coarser steps are aggregated from the tier
        chosen (mean weighted by count, min of mins, max of maxes, sum of counts).
        """
        with self._read() as c:
            sid = c.execute(
                "SELECT id FROM series WHERE channel = ? AND name = ?", (channel, name)
            ).fetchone()
            if sid is None:
                return []
            tier, out = self._pick(c, since_ns, step_s)
            out_ns = out * _NS
            lo = int(since_ns) - int(since_ns) % out_ns
            hi = -(-int(until_ns) // out_ns) * out_ns
            rows = c.execute(
                "SELECT (t_ns / ?) * ? AS b, SUM(sum), MIN(min), MAX(max), SUM(count) "
                "FROM trend WHERE step_s = ? AND series = ? AND t_ns >= ? AND t_ns < ? "
                "GROUP BY b ORDER BY b",
                (out_ns, out_ns, tier, sid[0], lo, hi),
            ).fetchall()
        return [(int(b), s / n, mn, mx, int(n)) for b, s, mn, mx, n in rows]

    def trend_names(self, channel: str) -> list[str]:
        """Names with a stored trend on ``channel``, sorted."""
        with self._read() as c:
            rows = c.execute(
                "SELECT name FROM series WHERE channel = ? ORDER BY name", (channel,)
            ).fetchall()
        return [r[0] for r in rows]

    # -- internals: reads ------------------------------------------------------------------
    @contextmanager
    def _read(self) -> Iterator[sqlite3.Connection]:
        """This thread's connection, inside one read transaction (one consistent snapshot)."""
        try:
            c = getattr(self._local, "conn", None)
            if c is None:
                uri = self.path.resolve().as_uri() + "?mode=ro"
                c = sqlite3.connect(
                    uri, uri=True, isolation_level=None, timeout=10, check_same_thread=False
                )
                self._local.conn = c
                with self._readers_lock:
                    self._readers.append(c)
            c.execute("BEGIN")
        except sqlite3.Error as e:
            raise StoreError(f"cannot read {self.path}: {e}") from None
        try:
            yield c
        except sqlite3.Error as e:
            raise StoreError(f"cannot read {self.path}: {e}") from None
        finally:
            if c.in_transaction:
                c.execute("COMMIT")

    def _pick(self, c: sqlite3.Connection, since_ns: int, step_s: int | None) -> tuple[int, int]:
        floors = dict(c.execute("SELECT step_s, t_ns FROM trend_floor").fetchall())
        covering = [s for s in self.tiers_s if floors.get(s, -math.inf) <= since_ns]
        base = covering[0] if covering else self.tiers_s[-1]
        if step_s is None:
            return base, base
        if not (isinstance(step_s, int) and step_s > 0 and step_s % self.trend_step_s == 0):
            raise ValueError(
                f"step_s={step_s!r} is not a positive multiple of the {self.trend_step_s} s "
                "trend step"
            )
        out = -(-step_s // base) * base
        tier = max(s for s in (covering or [base]) if s >= base and out % s == 0)
        return tier, out

    # -- internals: the writer -------------------------------------------------------------
    def _submit(
        self, fn: Callable[[sqlite3.Connection], Any], *, durable: bool, alone: bool = False
    ) -> Future[Any]:
        fut: Future[Any] = Future()
        if self._closed:
            _settle(fut, exc=StoreError(f"store {self.path} is closed"))
            return fut
        task = _Task(fn, fut, durable)
        self._q.put((task, "alone") if alone else task)
        return fut

    def _submit_buckets(self, closed: Iterable[tuple[tuple[str, str], _Agg]]) -> Future[None]:
        rows = list(closed)
        if not rows:
            fut: Future[None] = Future()
            fut.set_result(None)
            return fut

        def write(c: sqlite3.Connection) -> None:
            # One executemany per kind of statement: a 10 s flush of 64 channels is ~1600
            # series × 3 tiers, and a Python-level call per row keeps the GIL from the
            # pipeline threads meanwhile (series ids are looked up once per connection).
            ids = self._series_ids
            new = list(dict.fromkeys(key for key, _ in rows if key not in ids))
            if new:
                c.executemany("INSERT OR IGNORE INTO series(channel, name) VALUES (?, ?)", new)
                for key in new:
                    ids[key] = c.execute(
                        "SELECT id FROM series WHERE channel = ? AND name = ?", key
                    ).fetchone()[0]
            c.executemany(_MERGE, [
                (s, ids[key], b.start_ns - b.start_ns % (s * _NS), b.sum, b.min, b.max, b.count)
                for key, b in rows
                for s in self.tiers_s
            ])

        fut = self._submit(write, durable=False)
        fut.add_done_callback(lambda f: self._count_buckets(f, len(rows)))
        return fut

    def _count_buckets(self, fut: Future[None], n: int) -> None:
        if not fut.cancelled() and fut.exception() is None:
            self.buckets_written += n

    def _try_open(self) -> sqlite3.Connection | None:
        if self._conn is not None:
            return self._conn
        self._last_open_try = time.monotonic()
        c = None
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            c = sqlite3.connect(
                self.path, isolation_level=None, timeout=30, check_same_thread=False
            )
            c.execute("PRAGMA auto_vacuum = INCREMENTAL")  # only takes effect in a new file
            mode = c.execute("PRAGMA journal_mode = WAL").fetchone()[0]
            if str(mode).lower() != "wal":
                raise StoreError(f"cannot use WAL mode on {self.path} (journal_mode={mode})")
            c.execute("PRAGMA foreign_keys = ON")
            c.execute("PRAGMA synchronous = FULL")
            ran = migrate(c)
            if ran:
                log.info("store %s: schema steps %s run (now at %d)", self.path,
                         ", ".join(map(str, ran)), ran[-1])
            self._sync = "FULL"
        except (OSError, sqlite3.Error, StoreError, SchemaError) as e:
            if c is not None:
                c.close()
            self._error(f"cannot open {self.path}: {e}")
            return None
        self._conn = c
        self._series_ids.clear()
        return c

    def _error(self, text: str, *, failing: bool = True) -> None:
        """Count and keep a write error; ``failing`` marks the store unhealthy until the next
        successful commit (not for one bad write in a batch that committed)."""
        self.write_errors += 1
        self.last_error = text
        self.last_error_ns = time.time_ns()
        self._failing = self._failing or failing

    def _run(self) -> None:
        next_maintenance = time.monotonic() + self.maintenance_s
        stop = False
        while not stop:
            wait = max(0.0, next_maintenance - time.monotonic())
            try:
                first = self._q.get(timeout=wait)
            except queue.Empty:
                first = None
            batch: list[Any] = [] if first is None else [first]
            while len(batch) < BATCH_MAX:
                try:
                    batch.append(self._q.get_nowait())
                except queue.Empty:
                    break
            stop = _STOP in batch
            try:
                self._handle([t for t in batch if t is not _STOP])
                if time.monotonic() >= next_maintenance:
                    next_maintenance = time.monotonic() + self.maintenance_s
                    fut: Future[Any] = Future()
                    self._execute_alone(_Task(lambda c: self._maintain(c, None), fut, False))
            except Exception as e:  # the writer must outlive any one batch
                self._error(f"store writer: {e!r}")
                for item in batch:
                    task = item[0] if isinstance(item, tuple) else item
                    if isinstance(task, _Task):
                        _settle(task.future, exc=StoreError(self.last_error))

    def _handle(self, batch: list[Any]) -> None:
        tasks: list[_Task] = []
        for item in batch:
            if isinstance(item, tuple):  # runs alone, in its own transactions
                self._execute(tasks)
                tasks = []
                self._execute_alone(item[0])
            else:
                tasks.append(item)
        self._execute(tasks)

    def _connection(self) -> sqlite3.Connection | None:
        if self._conn is None and time.monotonic() - self._last_open_try >= REOPEN_S:
            self._try_open()
        return self._conn

    def _execute(self, tasks: list[_Task]) -> None:
        if not tasks:
            return
        c = self._connection()
        if c is None:
            err = StoreError(self.last_error or f"cannot open {self.path}")
            for t in tasks:
                _settle(t.future, exc=err)
            return
        results: list[tuple[_Task, Any, BaseException | None]] = []
        try:
            sync = "FULL" if any(t.durable for t in tasks) else "NORMAL"
            if sync != self._sync:
                c.execute(f"PRAGMA synchronous = {sync}")
                self._sync = sync
            c.execute("BEGIN IMMEDIATE")
            for t in tasks:
                c.execute("SAVEPOINT task")
                try:
                    r = t.fn(c)
                except Exception as e:  # this task only; the others still commit
                    self._series_ids.clear()  # it may have cached ids now rolled back
                    if not c.in_transaction:
                        raise  # SQLite rolled the whole transaction back (e.g. disk full)
                    c.execute("ROLLBACK TO task")
                    c.execute("RELEASE task")
                    results.append((t, None, e))
                else:
                    c.execute("RELEASE task")
                    results.append((t, r, None))
            c.execute("COMMIT")
        except Exception as e:
            self._series_ids.clear()
            if c.in_transaction:
                try:
                    c.execute("ROLLBACK")
                except sqlite3.Error:
                    pass
            self._error(f"write to {self.path} failed: {e}")
            err = StoreError(self.last_error)
            for t in tasks:
                _settle(t.future, exc=err)
            return
        self._failing = False
        for t, r, task_error in results:
            if task_error is not None:
                self._error(f"write to {self.path} failed: {task_error}", failing=False)
                _settle(t.future, exc=StoreError(self.last_error))
            else:
                _settle(t.future, r)

    def _execute_alone(self, t: _Task) -> None:
        c = self._connection()
        if c is None:
            _settle(t.future, exc=StoreError(self.last_error or f"cannot open {self.path}"))
            return
        try:
            r = t.fn(c)
        except Exception as e:
            if c.in_transaction:
                try:
                    c.execute("ROLLBACK")
                except sqlite3.Error:
                    pass
            self._error(f"maintenance of {self.path} failed: {e}")
            _settle(t.future, exc=StoreError(self.last_error))
        else:
            _settle(t.future, r)

    def _maintain(self, c: sqlite3.Connection, now_ns: int | None) -> dict[str, Any]:
        """Retention by age, then by size (see :class:`Retention`); own transactions."""
        ret = self.retention
        if now_ns is None:
            row = c.execute(
                "SELECT MAX(t) FROM (SELECT MAX(t_ns) AS t FROM trend "
                "UNION ALL SELECT MAX(t_ns) FROM events)"
            ).fetchone()
            now_ns = row[0]
        deleted: dict[str, int] = {}
        if now_ns is not None:
            c.execute("BEGIN IMMEDIATE")
            for s, keep_s in zip(self.tiers_s, (ret.raw_s, ret.minute_s, ret.hour_s), strict=True):
                if keep_s is not None:
                    cutoff = int(now_ns) - round(keep_s * _NS)
                    deleted[f"trend_{s}s"] = self._drop_tier(c, s, cutoff - cutoff % (s * _NS))
            if ret.evidence_s is not None:
                deleted["evidence"] = c.execute(
                    "DELETE FROM evidence WHERE t0_ns < ?",
                    (int(now_ns) - round(ret.evidence_s * _NS),),
                ).rowcount
            if ret.events_s is not None:
                deleted["events"] = c.execute(
                    "DELETE FROM events WHERE t_ns < ?", (int(now_ns) - round(ret.events_s * _NS),)
                ).rowcount
            c.execute("COMMIT")
        _vacuum(c)
        size = self._size(c)
        for_size: dict[str, int] = {}
        if ret.max_db_bytes is not None:
            victims = [
                f"trend_{self.tiers_s[0]}s",
                "evidence",
                *(f"trend_{s}s" for s in self.tiers_s[1:]),
            ]
            while size > ret.max_db_bytes and victims:
                c.execute("BEGIN IMMEDIATE")
                n = self._drop_oldest(c, victims[0])
                c.execute("COMMIT")
                if n == 0:
                    victims.pop(0)
                    continue
                for_size[victims[0]] = for_size.get(victims[0], 0) + n
                _vacuum(c)
                size = self._size(c)
            if size > ret.max_db_bytes:
                self._error(
                    f"{self.path} is {size} bytes, above max_db_bytes={ret.max_db_bytes} with "
                    "only events and alarm state left"
                )
        c.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        self.db_bytes = size
        return {
            "now_ns": now_ns,
            "deleted": deleted,
            "deleted_for_size": for_size,
            "db_bytes": size,
        }

    def _drop_tier(self, c: sqlite3.Connection, step_s: int, before_ns: int) -> int:
        """Delete a tier's buckets starting before ``before_ns``; remember that it is gone."""
        n = c.execute(
            "DELETE FROM trend WHERE step_s = ? AND t_ns < ?", (step_s, before_ns)
        ).rowcount
        c.execute(
            "INSERT INTO trend_floor(step_s, t_ns) VALUES (?, ?) ON CONFLICT(step_s) "
            "DO UPDATE SET t_ns = max(t_ns, excluded.t_ns)",
            (step_s, before_ns),
        )
        return n

    def _drop_oldest(self, c: sqlite3.Connection, what: str) -> int:
        """Delete about the oldest eighth of one kind of row (at least one bucket time)."""
        if what == "evidence":
            n = c.execute("SELECT COUNT(*) FROM evidence").fetchone()[0]
            return c.execute(
                "DELETE FROM evidence WHERE event_id IN "
                "(SELECT event_id FROM evidence ORDER BY t0_ns LIMIT ?)",
                (max(1, n // 8),),
            ).rowcount
        s = int(what.removeprefix("trend_").removesuffix("s"))
        n = c.execute("SELECT COUNT(*) FROM trend WHERE step_s = ?", (s,)).fetchone()[0]
        if n == 0:
            return 0
        t = c.execute(
            "SELECT t_ns FROM trend WHERE step_s = ? ORDER BY t_ns LIMIT 1 OFFSET ?",
            (s, max(0, n // 8 - 1)),
        ).fetchone()[0]
        return self._drop_tier(c, s, t + s * _NS)

    @staticmethod
    def _size(c: sqlite3.Connection) -> int:
        pages = c.execute("PRAGMA page_count").fetchone()[0]
        return int(pages) * int(c.execute("PRAGMA page_size").fetchone()[0])


def _vacuum(c: sqlite3.Connection) -> None:
    # Each step of this pragma frees one page; executescript steps it to the end, whereas
    # execute() stops after the first step of a statement that returns no columns.
    c.executescript("PRAGMA incremental_vacuum;")


def _write_state(c: sqlite3.Connection, state: str) -> None:
    c.execute(
        "INSERT OR REPLACE INTO alarm_state(k, saved_ns, json) VALUES (1, ?, ?)",
        (time.time_ns(), state),
    )


def _event_dict(r: Sequence[Any]) -> dict[str, Any]:
    d = dict(zip(_EVENT_COLS, r[: len(_EVENT_COLS)], strict=True))
    d["latched"] = bool(d["latched"])
    d["has_evidence"] = bool(r[len(_EVENT_COLS)])
    return d

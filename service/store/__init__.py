"""SQLite storage: alarm events and alarm state, alarm evidence, trends, spectral history.

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

Modules
    ``writer`` (the writer thread, transactions, per-thread reads), ``schema`` (ordered
    migrations keyed by ``PRAGMA user_version``), ``events`` (events, alarm state and
    evidence), ``trends`` (bucket aggregation and tier queries), ``history`` (stored
    spectra: codec, queries, thinning and their own bound), ``retention`` (deletion by age
    and size), ``outbox`` (notification rows, written by ``put_events`` with their events
    through a router ``service.notify`` supplies) and ``store`` (:class:`Store`, which puts
    them together).
"""

from .history import HistoryPolicy, HistoryRow
from .retention import DAY_S, Retention
from .store import Store
from .trends import TREND_STEPS_S, trend_key
from .writer import StoreError

__all__ = [
    "DAY_S",
    "TREND_STEPS_S",
    "HistoryPolicy",
    "HistoryRow",
    "Retention",
    "Store",
    "StoreError",
    "trend_key",
]

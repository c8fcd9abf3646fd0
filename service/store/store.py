"""The service's database as one object: :class:`Store` = the writer plus the repositories.

Knows which repository function each public call queues or reads; nothing of asyncio, HTTP,
the hub or the engine (see the package docstring for threads, durability, faults, trends).
"""

from __future__ import annotations

import json
import sqlite3
import time
from collections.abc import Callable, Hashable, Mapping, Sequence
from concurrent.futures import Future
from pathlib import Path
from typing import Any

import numpy as np

from ..alarms import AlarmEvent
from . import events as ev
from . import history as hi
from . import outbox as ob
from . import runups as ru
from . import trends as tr
from .retention import Retention, apply_retention
from .writer import Writer, resolved

__all__ = ["Store"]


class Store(Writer):
    """The service's SQLite database; see the package docstring for threads and durability.

    ``path`` is the database file (its folder is created). ``trend_step_s`` is the finest
    trend tier in seconds (one of :data:`TREND_STEPS_S`); the coarser tiers are 60 s and
    3600 s. ``maintenance_s``: how often (wall time, on the writer thread) the retention
    limits are applied; :meth:`maintain` applies them now. ``history``: how long stored
    spectra are kept and their bound (:class:`~service.store.history.HistoryPolicy`).
    """

    def __init__(
        self,
        path: str | Path,
        *,
        trend_step_s: int = 10,
        retention: Retention | None = None,
        maintenance_s: float = 600.0,
        history: hi.HistoryPolicy | None = None,
    ) -> None:
        if trend_step_s not in tr.TREND_STEPS_S:
            listed = ", ".join(map(str, tr.TREND_STEPS_S))
            raise ValueError(f"trend_step_s={trend_step_s!r} is not one of {listed} (s)")
        super().__init__(path, maintenance_s=maintenance_s)
        self.trend_step_s = int(trend_step_s)
        self.tiers_s: tuple[int, int, int] = (self.trend_step_s, 60, 3600)
        self.retention = retention or Retention()
        self.history_policy = history or hi.HistoryPolicy()
        self.history_written = 0
        self.history_bytes: int | None = None
        self._buckets = tr.TrendBuckets(self.trend_step_s)
        # series ids of the writer's connection (ids never change: series are never deleted);
        # only the writer thread touches it, and it is emptied when the connection is opened
        self._series_ids: dict[tr.Key, int] = {}
        self.events_written = 0
        self.buckets_written = 0
        self.db_bytes: int | None = None
        # Notifications (service.notify): the router turns committed events into outbox rows
        # in their own transaction; ``on_outbox`` is called (writer thread) after a commit
        # that wrote some. Set both before start().
        self.notify_router: ob.OutboxRouter | None = None
        self.on_outbox: Callable[[], None] | None = None

    def __enter__(self) -> Store:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def health(self) -> dict[str, Any]:
        """State for ``/api/v1/health`` and ``/metrics``: ``ok`` (open, writer alive and the
        last write succeeded), ``last_error`` (text, "" if none) and when (ns), counters,
        queue depth and the database size in bytes (as of the last maintenance)."""
        return {
            **super().health(),
            "events_written": self.events_written,
            "trend_buckets_written": self.buckets_written,
            "db_bytes": self.db_bytes,
            "max_db_bytes": self.retention.max_db_bytes,
            "history_written": self.history_written,
            "history_bytes": self.history_bytes,
            "history_max_bytes": self.history_policy.max_bytes,
        }

    # -- hooks of the writer -----------------------------------------------------------------
    def _invalidate(self) -> None:
        self._series_ids.clear()

    def _before_close(self) -> None:
        self.flush_trends()

    def _periodic(self, c: sqlite3.Connection) -> dict[str, Any]:
        return self._maintain(c, None)

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

        router = self.notify_router
        routed = [0]

        def write(c: sqlite3.Connection) -> list[AlarmEvent]:
            out = ev.insert_events(c, evs)
            if router is not None and out:
                # the outbox rows commit (or roll back) with their events: never one alone
                now_ns = time.time_ns()
                stats = {name: ob.entry_stats(c, name, now_ns, rate_s, digest_s)
                         for name, (rate_s, digest_s) in router.windows().items()}
                rows = router.route(out, stats, now_ns)
                ob.insert_rows(c, rows, now_ns)
                routed[0] = sum(r.state == "pending" for r in rows)
            if state is not None:
                ev.write_state(c, state)
            return out

        fut = self._submit(write, durable=True)
        fut.add_done_callback(lambda f: self._count_events(f, routed[0]))
        return fut

    def _count_events(self, fut: Future[list[AlarmEvent]], routed: int) -> None:
        if not fut.cancelled() and fut.exception() is None:
            self.events_written += len(fut.result())
            if routed and self.on_outbox is not None:
                self.on_outbox()

    # -- the notification outbox (service.notify sends; see service.store.outbox) ---------
    def outbox_due(self, now_ns: int, limit: int = 50) -> list[dict[str, Any]]:
        """Pending outbox rows due at ``now_ns`` with their events (read, any thread)."""
        with self._read() as c:
            return ob.select_due(c, now_ns, limit)

    def outbox_counts(self) -> dict[str, dict[str, int]]:
        """Outbox rows per entry and state (read, any thread)."""
        with self._read() as c:
            return ob.select_counts(c)

    def outbox_rows(self, entry: str | None = None) -> list[dict[str, Any]]:
        """Every outbox row (of ``entry``), oldest first (read, any thread)."""
        with self._read() as c:
            return ob.select_rows(c, entry)

    def store_id(self) -> str:
        """This database's random id, written once by schema step 3 ("" before it exists)."""
        with self._read() as c:
            return ob.store_id(c)

    def outbox_sent(self, row_ids: Sequence[int], now_ns: int) -> Future[int]:
        """Queue: rows sent (durable, like events)."""
        ids = list(row_ids)
        return self._submit(lambda c: ob.mark_sent(c, ids, now_ns), durable=True)

    def outbox_retry(self, row_ids: Sequence[int], due_ns: int, error: str) -> Future[int]:
        """Queue: one more failed attempt; next one not before ``due_ns``."""
        ids = list(row_ids)
        return self._submit(lambda c: ob.mark_retry(c, ids, due_ns, error), durable=True)

    def outbox_failed(self, row_ids: Sequence[int], now_ns: int, error: str) -> Future[int]:
        """Queue: rows given up."""
        ids = list(row_ids)
        return self._submit(lambda c: ob.mark_failed(c, ids, now_ns, error), durable=True)

    def save_alarm_state(self, snapshot: Mapping[str, Any]) -> Future[None]:
        """Queue the alarm engine's snapshot (JSON-safe dict); durable like events."""
        state = json.dumps(snapshot, allow_nan=False)
        return self._submit(lambda c: ev.write_state(c, state), durable=True)

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
        row = ev.evidence_row(event_id, spectrum, waveform, fs, t0_ns)
        return self._submit(lambda c: ev.insert_evidence(c, row), durable=True)

    def put_history(self, rows: Sequence[hi.HistoryRow]) -> Future[list[int]]:
        """Queue stored spectra (encoded on the writer thread); resolves to their ids once
        committed (synchronous=NORMAL, like trends). Each row's ``power`` must not change
        after this call (pass a copy)."""
        batch = list(rows)
        if not batch:
            return resolved([])
        fut = self._submit(lambda c: hi.insert_rows(c, batch), durable=False)
        fut.add_done_callback(self._count_history)
        return fut

    def _count_history(self, fut: Future[list[int]]) -> None:
        if not fut.cancelled() and fut.exception() is None:
            self.history_written += len(fut.result())

    def put_runup(self, channel: str, unit: str, record: Mapping[str, Any]) -> Future[int]:
        """Queue a run-up / coast-down record of ``channel`` (amplitudes in ``unit`` RMS;
        ``service.runups.SweepRecorder``'s dict); resolves to its id once committed
        (durable: a record is the only copy of a sweep). A bad record raises ValueError
        here."""
        rec = dict(record)
        ru.check_record(rec)
        return self._submit(lambda c: ru.insert_runup(c, channel, unit, rec), durable=True)

    def record(self, channel: str, name: str, t_ns: int, value: float) -> None:
        """Add one value (any unit; the caller keeps units consistent per series) at ``t_ns``
        (ns since the Unix epoch, >= 0) to the trend of (channel, name). NaN/inf are skipped.
        Cheap and thread-safe; never blocks on the database."""
        self.record_many(channel, t_ns, {name: value})

    def record_many(self, channel: str, t_ns: int, values: Mapping[str, float]) -> None:
        """:meth:`record` for several names of one channel at one time."""
        closed = self._buckets.add(channel, t_ns, values)
        if closed:
            self._submit_buckets(closed)

    def record_block(self, block: Hashable, keys: Sequence[Sequence[tr.Key]], t_ns: int,
                     values: np.ndarray) -> None:
        """:meth:`record_many` of a block of series that arrive together, with array
        operations (``TrendBuckets.add_block``): ``values`` [C, K], cell (c, k) the series
        ``keys[c][k]`` = (channel, name)."""
        closed = self._buckets.add_block(block, keys, t_ns, values)
        if closed:
            self._submit_buckets(closed)

    def flush_trends(self) -> Future[None]:
        """Write every open trend bucket now (a later value for it merges in exactly)."""
        return self._submit_buckets(self._buckets.take_all())

    def maintain(self, now_ns: int | None = None) -> Future[dict[str, Any]]:
        """Apply the retention limits now; ``now_ns`` defaults to the newest data time in the
        store. Resolves to {"now_ns", "deleted": {what: rows} by age, "deleted_for_size": {what:
        rows}, "db_bytes"}."""
        return self._submit(lambda c: self._maintain(c, now_ns), durable=False, alone=True)

    # -- reads (any thread) ---------------------------------------------------------------
    def load_alarm_state(self) -> dict[str, Any] | None:
        """The last saved alarm snapshot, or None if none was saved."""
        with self._read() as c:
            return ev.read_state(c)

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
        with self._read() as c:
            return ev.select_events(c, since_ns, channel, limit, before_id)

    def event(self, event_id: int) -> dict[str, Any] | None:
        """One stored event as in :meth:`events`, or None."""
        with self._read() as c:
            return ev.select_event(c, event_id)

    def get_evidence(self, event_id: int) -> dict[str, Any] | None:
        """The evidence of an event, or None: {"event_id", "t0_ns", "fs", "spectrum":
        {"f0_hz", "df_hz", "unit", "amplitude", "values": float32 array, **extra keys},
        "waveform": float32 array or None} — the arrays exactly as stored."""
        with self._read() as c:
            return ev.select_evidence(c, event_id)

    def trend_step(self, since_ns: int, step_s: int | None = None) -> int:
        """The step in seconds :meth:`trend` uses for a range starting at ``since_ns``.

        The base is the finest tier that still holds everything from ``since_ns`` on (the
        coarsest one if none does); a requested ``step_s`` (a positive multiple of
        ``trend_step_s``) is rounded up to a multiple of that base.
        """
        with self._read() as c:
            return tr.pick_tier(c, self.tiers_s, since_ns, step_s)[1]

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
            return tr.select_trend(c, self.tiers_s, channel, name, since_ns, until_ns, step_s)

    def trend_names(self, channel: str) -> list[str]:
        """Names with a stored trend on ``channel``, sorted."""
        with self._read() as c:
            return tr.select_names(c, channel)

    def runups(self, channel: str, limit: int = 100) -> list[dict[str, Any]]:
        """The channel's run-up / coast-down records without their points, newest first:
        id, channel, kind, start_ns, end_ns, rpm_lo, rpm_hi, rpm_step, orders, unit,
        points."""
        with self._read() as c:
            return ru.select_runups(c, channel, limit)

    def runup(self, channel: str, runup_id: int) -> dict[str, Any] | None:
        """One record as in :meth:`runups` with ``rows`` (rpm, t_ns, steps, amplitude[],
        phase_deg[] by increasing speed), or None."""
        with self._read() as c:
            return ru.select_runup(c, channel, runup_id)

    def history_list(
        self, channel: str, profile: str, since_ns: int, until_ns: int, limit: int = 1000
    ) -> tuple[list[dict[str, Any]], int]:
        """Stored spectra of (channel, profile) with since_ns <= t_ns < until_ns, oldest
        first, without their values (at most ``limit``, the newest), and how many there are.
        Each: id, t_ns, span_ns, reason ("interval"|"alarm"), step_s, frames, averages,
        event_id, lines."""
        with self._read() as c:
            rows = hi.select_list(c, channel, profile, since_ns, until_ns, limit)
            return rows, hi.count_rows(c, channel, profile, since_ns, until_ns)

    def history_spectrum(self, row_id: int) -> dict[str, Any] | None:
        """One stored spectrum: the list's fields, channel, profile, its settings (f0_hz,
        df_hz, fmax_hz, input_unit, unit, amplitude, lowcut_hz, window, enbw_bins) and
        ``power`` (float64, input unit², as decoded); None if there is no such id."""
        with self._read() as c:
            return hi.select_one(c, row_id)

    def history_nearest(self, channel: str, profile: str, t_ns: int) -> dict[str, Any] | None:
        """The stored spectrum of (channel, profile) nearest to ``t_ns``, as
        :meth:`history_spectrum`; None if there is none."""
        with self._read() as c:
            return hi.select_nearest(c, channel, profile, t_ns)

    def history_spectra(
        self, channel: str, profile: str, since_ns: int, until_ns: int,
        codes: bool = False,
    ) -> list[dict[str, Any]]:
        """Every stored spectrum in [since_ns, until_ns), decoded, oldest first; ``codes``:
        their 16-bit codes (``service.store.history``) in place of ``power``, to pool many
        at the cost of one conversion."""
        with self._read() as c:
            return hi.select_spectra(c, channel, profile, since_ns, until_ns, codes)

    def maintain_history(self, now_ns: int | None = None) -> Future[dict[str, Any]]:
        """Thin, drop by age and hold the bound of the stored spectra now (``now_ns``
        defaults to the newest one's time); see :class:`~service.store.history.HistoryPolicy`."""
        return self._submit(lambda c: self._maintain_history(c, now_ns), durable=False,
                            alone=True)

    # -- internals ---------------------------------------------------------------------------
    def _submit_buckets(self, closed: list[tuple[tr.Key, tr.Agg]]) -> Future[None]:
        rows = list(closed)
        if not rows:
            return resolved(None)
        fut = self._submit(
            lambda c: tr.merge_buckets(c, self._series_ids, rows, self.tiers_s), durable=False
        )
        fut.add_done_callback(lambda f: self._count_buckets(f, len(rows)))
        return fut

    def _count_buckets(self, fut: Future[None], n: int) -> None:
        if not fut.cancelled() and fut.exception() is None:
            self.buckets_written += n

    def _maintain(self, c: sqlite3.Connection, now_ns: int | None) -> dict[str, Any]:
        """Retention by age, then by size (see :class:`Retention`); own transactions."""
        history = self._maintain_history(c, None)  # first: its deletions are then vacuumed
        report, error = apply_retention(c, self.tiers_s, self.retention, now_ns)
        if self.retention.outbox_s is not None:  # wall clock: the outbox's times are
            cutoff = time.time_ns() - round(self.retention.outbox_s * 1e9)
            pruned = ob.prune(c, cutoff)
            if pruned:  # named only when rows went (a store without notify reports as before)
                report["deleted"]["outbox"] = pruned
        if error:
            self._error(f"{self.path} {error}")
        report["history"] = history
        self.db_bytes = report["db_bytes"]
        return report

    def _maintain_history(self, c: sqlite3.Connection, now_ns: int | None) -> dict[str, Any]:
        report = hi.apply_history_retention(c, self.history_policy, now_ns)
        self.history_bytes = report["bytes"]
        return report

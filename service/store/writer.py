"""The store's one writer thread and its transactions; per-thread read connections.

Knows SQLite connections, a queue and threads; not what the tables hold (the repositories in
this package give it functions of a connection) and nothing of asyncio, HTTP or the engine.

Every write is a function of the writer's connection queued with a
:class:`concurrent.futures.Future` that resolves only after the transaction holding it has
COMMITTED. Consecutive queued writes share one transaction; each runs in its own SAVEPOINT,
so one bad write fails only its own future. A write marked ``durable`` makes its transaction
commit with ``synchronous=FULL``, the others with NORMAL (see ``service.store``, Durability).
"""

from __future__ import annotations

import logging
import math
import queue
import sqlite3
import threading
import time
from collections.abc import Callable, Iterator
from concurrent.futures import Future, InvalidStateError
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .schema import SchemaError, migrate

log = logging.getLogger("quaver.store")

__all__ = ["BATCH_MAX", "REOPEN_S", "StoreError", "Writer"]

REOPEN_S = 5.0
BATCH_MAX = 512


class StoreError(Exception):
    """The database could not be written or read; the message says which file and why."""


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


def _rollback(c: sqlite3.Connection) -> None:
    """Roll back the open transaction, if any (a failing ROLLBACK leaves nothing to undo)."""
    if c.in_transaction:
        try:
            c.execute("ROLLBACK")
        except sqlite3.Error:
            pass


def resolved(result: Any = None) -> Future[Any]:
    """A future that has already resolved to ``result`` (a write with nothing to write)."""
    fut: Future[Any] = Future()
    fut.set_result(result)
    return fut


class Writer:
    """The database file ``path``: one writer thread fed by a queue, reads on per-thread
    connections, health counters. Subclasses add what is written and read; they may
    override the hooks :meth:`_invalidate` (row ids cached from the writer's connection are
    stale), :meth:`_before_close` (queue the last writes) and :meth:`_periodic` (run every
    ``maintenance_s`` s of wall time on the writer thread, alone)."""

    def __init__(self, path: str | Path, *, maintenance_s: float = 600.0) -> None:
        self.path = Path(path)
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
        # health (written by the writer thread, read anywhere)
        self.write_errors = 0
        self.last_error = ""
        self.last_error_ns: int | None = None
        self._failing = False

    # -- hooks -----------------------------------------------------------------------------
    def _invalidate(self) -> None:
        """The writer's connection was (re)opened or a write rolled back: cached row ids are
        stale."""

    def _before_close(self) -> None:
        """Queue what must still be written before the writer stops."""

    def _periodic(self, c: sqlite3.Connection) -> Any:
        """Periodic work on the writer thread (own transactions)."""

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
        """Queue the last writes, drain the queue, join the writer, close connections."""
        if self._closed:
            return
        self._before_close()
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

    def health(self) -> dict[str, Any]:
        """``ok`` (open, writer alive and the last write succeeded), ``last_error`` (text, ""
        if none) and when (ns), the write error count and the queue depth."""
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
        }

    # -- reads -----------------------------------------------------------------------------
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

    # -- writes ----------------------------------------------------------------------------
    def _submit(
        self, fn: Callable[[sqlite3.Connection], Any], *, durable: bool, alone: bool = False
    ) -> Future[Any]:
        """Queue ``fn(connection)``; ``alone``: it runs outside the shared transaction and
        makes its own (e.g. maintenance)."""
        fut: Future[Any] = Future()
        if self._closed:
            _settle(fut, exc=StoreError(f"store {self.path} is closed"))
            return fut
        task = _Task(fn, fut, durable)
        self._q.put((task, "alone") if alone else task)
        return fut

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
        self._invalidate()
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
                    self._execute_alone(_Task(self._periodic, fut, False))
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
                    self._invalidate()  # it may have cached row ids now rolled back
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
            self._invalidate()
            _rollback(c)
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
            _rollback(c)
            self._error(f"maintenance of {self.path} failed: {e}")
            _settle(t.future, exc=StoreError(self.last_error))
        else:
            _settle(t.future, r)

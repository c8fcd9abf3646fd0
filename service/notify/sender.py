"""The notification sender: one thread that sends the outbox's due messages with apprise,
marks them sent, retries with back-off, gives up after a while, and keeps per-entry health.

Knows the store's outbox calls, apprise and the config; nothing of asyncio or HTTP (the
service gives it a callback for its ``notify`` events, and reads :meth:`Notifier.health`)."""

from __future__ import annotations

import logging
import os
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

from ..alarms import AlarmEvent
from ..config import Config, NotifyConfig
from ..config.notify import split_urls
from ..store import Store, StoreError
from .message import render
from .route import Router

__all__ = ["HOLD_ENV", "Notifier", "send_apprise"]

log = logging.getLogger("quaver.notify")
NS = 1_000_000_000
# test aid: this process sends no message made since it started until that message is this
# many seconds old (so a test can kill it between commit and send); a later run sends at once
HOLD_ENV = "QUAVER_NOTIFY_HOLD_S"
POLL_S = 1.0  # due rows are looked for at least this often (and at once after a commit)
BATCH = 50  # messages looked at per pass
DEGRADED_AFTER = 3  # consecutive failed attempts of an entry before /health says degraded
STUCK_S = 600.0  # … or a message pending this long past its due time
MARK_TIMEOUT_S = 60.0
_HEADER_SCHEMES = ("json", "jsons", "form", "forms", "xml", "xmls", "mailto", "mailtos")

Send = Callable[[list[str], str, str, str], str]


def _with_key(url: str, key: str) -> str:
    """``url`` carrying the key as an ``X-Quaver-Key`` header (and for json:// also as the
    payload field ``quaver_key``) where apprise's target takes one."""
    scheme = url.split("://", 1)[0].lower()
    if scheme not in _HEADER_SCHEMES:
        return url
    extra = f"+X-Quaver-Key={key}"
    if scheme in ("json", "jsons"):
        extra += f"&:quaver_key={key}"
    return url + ("&" if "?" in url else "?") + extra


def send_apprise(urls: list[str], title: str, body: str, key: str) -> str:
    """Send one message to every URL with apprise (blocking); "" if every target took it,
    else the reason apprise logged (a target that took it may get it again on the retry:
    the key lets it see that)."""
    import apprise

    a = apprise.Apprise()
    for u in urls:
        if not a.add(_with_key(u, key)):
            return f"apprise cannot use a URL of scheme {u.split('://', 1)[0]}://"
    with apprise.LogCapture(level=logging.WARNING) as logs:  # type: ignore[no-untyped-call]
        ok = bool(a.notify(title=title, body=body, body_format=apprise.NotifyFormat.TEXT))
    if ok:
        return ""
    lines = [ln.split(" - ", 2)[-1] for ln in logs.getvalue().strip().splitlines()]
    return (lines[-1] if lines else "apprise reported a failure")[:300]


@dataclass
class EntryHealth:
    """One entry's sending state in this process."""

    sent: int = 0  # messages sent since start
    failed_attempts: int = 0  # attempts that failed since start
    given_up: int = 0  # messages given up since start
    consecutive: int = 0  # failed attempts since the last success
    failing: bool = False
    last_error: str = ""
    last_error_ns: int | None = None
    last_sent_ns: int | None = None
    last_delay_s: float | None = None  # commit → sent of the last message, s


class Notifier:
    """Sends what the store's outbox holds for ``cfg.notify``; see the package docstring.

    :meth:`attach` puts its router into the store (before the store takes events);
    :meth:`start` starts the thread (rows left pending by an earlier run are sent first);
    ``on_event`` receives a ``notify`` event when an entry starts failing and when it
    recovers (called on the sender thread)."""

    def __init__(
        self,
        cfg: Config,
        store: Store,
        *,
        env: Mapping[str, str] | None = None,
        send: Send = send_apprise,
        suppressed: Callable[[str], bool] = lambda rule: False,
        poll_s: float = POLL_S,
    ) -> None:
        env = os.environ if env is None else env
        self.cfg, self.store, self.send, self.poll_s = cfg, store, send, poll_s
        self.entries: dict[str, NotifyConfig] = {n.name: n for n in cfg.notify}
        self.urls = {
            n.name: [*n.urls, *split_urls(env.get(n.urls_env, "") if n.urls_env else "")]
            for n in cfg.notify
        }
        self.hold_s = float(env.get(HOLD_ENV, "") or 0.0)
        self.router = Router(cfg, suppressed=suppressed)
        self.started_ns = time.time_ns()
        self.state = {name: EntryHealth() for name in self.entries}
        self.counts: dict[str, dict[str, int]] = {}
        self.on_event: Callable[[AlarmEvent], None] | None = None
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._store_id = ""

    def attach(self) -> None:
        """Route the store's events from now on, and wake the sender after each commit."""
        self.store.notify_router = self.router
        self.store.on_outbox = self._wake.set

    def start(self) -> None:
        if self._thread is None:
            self._thread = threading.Thread(target=self._run, name="quaver-notify", daemon=True)
            self._thread.start()

    def stop(self, timeout_s: float = 10.0) -> None:
        """Stop after the message being sent (pending ones stay for the next start)."""
        self._stop.set()
        self._wake.set()
        if self._thread is not None:
            self._thread.join(timeout_s)

    def wake(self) -> None:
        self._wake.set()

    # -- health ------------------------------------------------------------------------------
    def health(self) -> dict[str, Any]:
        """Per entry: outbox rows by state (pending, sent, failed, limited — as stored),
        this process's counters, ``failing`` and the last error; ``ok`` False when an
        entry failed DEGRADED_AFTER times in a row or a message is stuck for STUCK_S."""
        now = time.time_ns()
        out: dict[str, Any] = {}
        ok = True
        for name, st in self.state.items():
            c = self.counts.get(name, {})
            oldest = c.get("oldest_pending_ns", 0)
            late_s = STUCK_S + self.entries[name].digest_window_s + self.hold_s
            stuck = bool(oldest) and (now - oldest) / NS > late_s
            degraded = st.consecutive >= DEGRADED_AFTER or stuck
            ok = ok and not degraded
            out[name] = {
                "pending": c.get("pending", 0), "sent": c.get("sent", 0),
                "failed": c.get("failed", 0), "limited": c.get("limited", 0),
                "sent_since_start": st.sent, "failed_attempts": st.failed_attempts,
                "given_up": st.given_up, "failing": st.failing, "degraded": degraded,
                "consecutive_failures": st.consecutive, "last_error": st.last_error,
                "last_error_ns": st.last_error_ns, "last_sent_ns": st.last_sent_ns,
                "last_delay_s": st.last_delay_s,
            }
        return {"ok": ok, "entries": out}

    # -- the thread --------------------------------------------------------------------------
    def _run(self) -> None:
        said = ""
        while not self._stop.is_set():
            try:
                more = self._pass()
                said = ""
            except StoreError as e:  # /health says the store fails; log it once, not each pass
                if str(e) != said:
                    log.error("notifications wait for the store: %s", e)
                    said = str(e)
                more = False
            except Exception:  # the sender must outlive any one pass
                log.exception("notification pass failed")
                more = False
            if not more:
                self._wake.wait(self.poll_s)
                self._wake.clear()

    def _pass(self) -> bool:
        """Send every due message once; True if there may be more due right now."""
        if not self._store_id:
            self._store_id = self.store.store_id()
        now = time.time_ns()
        rows = self.store.outbox_due(now, BATCH)
        groups: dict[tuple[str, int], list[dict[str, Any]]] = {}
        for r in rows:
            groups.setdefault((r["entry"], r["grp"]), []).append(r)
        hold_ns = round(self.hold_s * NS)
        for (entry, _), group in groups.items():
            if self._stop.is_set():
                break
            created = min(int(r["created_ns"]) for r in group)
            if hold_ns and created >= self.started_ns and now < created + hold_ns:
                continue  # test aid: this run holds its own messages back (not a later run)
            self._send_group(entry, group)
        try:
            self.counts = self.store.outbox_counts()
        except StoreError as e:
            log.warning("notification counts not read: %s", e)
        return len(groups) >= BATCH

    def _send_group(self, entry: str, group: list[dict[str, Any]]) -> None:
        ids = [int(r["row_id"]) for r in group]
        n = self.entries.get(entry)
        if n is None:  # the entry left the config while its messages waited
            self._mark(self.store.outbox_failed(ids, time.time_ns(),
                                                "entry no longer in the config"))
            return
        msg = render(self.cfg, entry, group, self._store_id, dashboard_url=n.dashboard_url)
        try:
            error = self.send(self.urls[entry], msg.title, msg.body, msg.key)
        except Exception as e:  # a plugin that raises is a failed attempt, not a dead thread
            error = f"{type(e).__name__}: {e}"[:300]
        now = time.time_ns()
        st = self.state[entry]
        if not error:
            # marked sent at once, on the store's one writer: a crash before this commit is
            # the one window in which the message is sent again (with the same key)
            self._mark(self.store.outbox_sent(ids, now))
            st.sent += 1
            st.consecutive = 0
            st.last_sent_ns = now
            st.last_delay_s = (now - min(int(r["created_ns"]) for r in group)) / NS
            log.info("notification %s sent to %s (%d event%s)", msg.key, entry, len(group),
                     "s" if len(group) > 1 else "")
            if st.failing:
                st.failing = False
                self._event(entry, "failed", "ok", f"notify {entry}: sending again")
            return
        st.failed_attempts += 1
        st.consecutive += 1
        st.last_error, st.last_error_ns = error, now
        created = min(int(r["created_ns"]) for r in group)
        attempts = max(int(r["attempts"]) for r in group) + 1
        if (now - created) / NS >= n.give_up_after_s:
            self._mark(self.store.outbox_failed(ids, now, error))
            st.given_up += 1
            log.error("notification %s to %s given up after %d attempts: %s", msg.key, entry,
                      attempts, error)
        else:
            delay_s = min(n.retry_first_s * 2 ** (attempts - 1), n.retry_max_s)
            self._mark(self.store.outbox_retry(ids, now + round(delay_s * NS), error))
            log.warning("notification %s to %s failed (attempt %d, next in %g s): %s",
                        msg.key, entry, attempts, delay_s, error)
        if not st.failing:
            st.failing = True
            self._event(entry, "ok", "failed", f"notify {entry}: sending fails: {error}")

    def _mark(self, fut: Any) -> None:
        try:
            fut.result(timeout=MARK_TIMEOUT_S)
        except Exception as e:  # the row stays pending: sent again later, with the same key
            log.error("notification outbox not updated: %s", e)

    def _event(self, entry: str, before: str, after: str, message: str) -> None:
        if self.on_event is None:
            return
        self.on_event(AlarmEvent(
            t_ns=time.time_ns(), channel="", rule=f"notify.{entry}", kind="notify",
            from_state=before, to_state=after, value=None, level=None, unit="",
            message=message[:500],
        ))

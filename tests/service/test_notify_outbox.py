"""The notification outbox (service.store.outbox) and its sender (service.notify) against
real receivers on loopback: rows in the events' own transaction, retry with back-off,
give-up, exactly one arrival across a restart, digest, rate limit, message text, pruning,
and schema step 3 on a database of step 2."""

from __future__ import annotations

import sqlite3
import time
from collections.abc import Callable, Iterator
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest
from notify_receivers import mail_url, smtp_server, webhook

from service.alarms import AlarmEvent
from service.config import parse_config
from service.notify import CAUTION, Notifier
from service.store import Store, StoreError
from service.store.schema import MIGRATIONS, migrate, schema_version

NS = 1_000_000_000
WAIT_S = 20.0


def config(*entries: dict[str, Any], tz: str = "UTC") -> Any:
    return parse_config({
        "service": {"timezone": tz},
        "sources": [{"id": "s", "kind": "simulated", "channels": ["p1-de", "p1-nde"]}],
        "channels": [{"id": "p1-de", "machine": "P1", "name": "drive end"}],
        "machines": [{"id": "P1", "name": "Cooling-water pump 1"}],
        "notify": list(entries),
    }, env={})


def danger(t_ns: int, channel: str = "p1-de") -> AlarmEvent:
    return AlarmEvent(t_ns=t_ns, channel=channel, rule=f"{channel}.band.bearing",
                      kind="transition", from_state="alert", to_state="danger", value=7.42,
                      level=7.1, unit="mm/s",
                      message=f"{channel} band bearing: DANGER, 7.42 mm/s >= danger level 7.1")


def until(probe: Callable[[], Any], what: str, timeout_s: float = WAIT_S) -> Any:
    for _ in range(int(timeout_s / 0.05)):
        got = probe()
        if got:
            return got
        time.sleep(0.05)
    pytest.fail(f"timed out waiting for {what}")


@pytest.fixture
def running(tmp_path: Path) -> Iterator[Callable[..., tuple[Store, Notifier]]]:
    """Start a store and a notifier for a config; stopped at the end."""
    made: list[tuple[Store, Notifier]] = []

    def start(cfg: Any, **kw: Any) -> tuple[Store, Notifier]:
        store = Store(tmp_path / "quaver.db")
        n = Notifier(cfg, store, poll_s=0.1, **kw)
        events: list[AlarmEvent] = []
        n.on_event = events.append
        n.attach()
        store.start()
        n.start()
        n.events = events  # type: ignore[attr-defined]
        made.append((store, n))
        return store, n

    yield start
    for store, n in made:
        n.stop()
        store.close()


def test_rows_commit_with_their_events_or_not_at_all(tmp_path: Path) -> None:
    cfg = config({"name": "hook", "urls": ["json://127.0.0.1:9/h"]})
    store = Store(tmp_path / "quaver.db")
    n = Notifier(cfg, store)
    n.attach()  # the sender thread is not started: rows stay pending
    with store:
        stored = store.put_events([danger(1 * NS)], alarm_state={"v": 1}).result()
        rows = store.outbox_rows()
        assert [(r["event_id"], r["entry"], r["state"]) for r in rows] == [
            (stored[0].id, "hook", "pending")]
        # make the alarm-state write (after the events and their outbox rows) fail: the
        # whole write rolls back, so neither the event nor its notification is kept
        c = sqlite3.connect(tmp_path / "quaver.db")
        c.execute("CREATE TRIGGER no_state BEFORE INSERT ON alarm_state "
                  "BEGIN SELECT RAISE(ABORT, 'state refused'); END")
        c.commit()
        c.close()
        fut = store.put_events([danger(2 * NS, "p1-nde")], alarm_state={"v": 2})
        with pytest.raises(StoreError, match="state refused"):
            fut.result()
        assert len(store.events()) == 1
        assert len(store.outbox_rows()) == 1


def test_retry_with_back_off_until_the_webhook_takes_it(running: Any) -> None:
    with webhook(fail_first=3) as hook:
        cfg = config({"name": "hook", "urls": [hook.url], "retry_first_s": 0.1,
                      "retry_max_s": 0.2})
        store, n = running(cfg)
        ev = store.put_events([danger(time.time_ns())]).result()[0]
        until(lambda: hook.bodies, "the webhook to take the message")
        until(lambda: store.outbox_rows()[0]["state"] == "sent", "the row marked sent")
        row = store.outbox_rows()[0]
        assert hook.refused == 3 and len(hook.bodies) == 1
        assert row["attempts"] == 4 and row["last_error"] == ""
        key = f"quaver-{store.store_id()}-{ev.id}-hook"
        assert hook.bodies[0]["quaver_key"] == key
        assert hook.headers[0]["x-quaver-key"] == key
        h = n.health()
        assert h["ok"] and h["entries"]["hook"]["failed_attempts"] == 3
        assert h["entries"]["hook"]["sent"] == 1 and h["entries"]["hook"]["pending"] == 0
        # one event when it started failing and one when it recovered, not one per retry
        assert [(e.kind, e.rule, e.from_state, e.to_state) for e in n.events] == [
            ("notify", "notify.hook", "ok", "failed"), ("notify", "notify.hook", "failed", "ok")]
        assert "503" in n.events[0].message


def test_the_back_off_doubles_up_to_its_maximum(tmp_path: Path) -> None:
    cfg = config({"name": "hook", "urls": ["json://127.0.0.1:9/h"], "retry_first_s": 0.1,
                  "retry_max_s": 0.4})
    calls: list[str] = []
    store = Store(tmp_path / "quaver.db")
    n = Notifier(cfg, store, send=lambda urls, title, body, key: calls.append(key) or "down")
    n.attach()
    delays = []
    with store:
        store.put_events([danger(time.time_ns())]).result()
        for _ in range(5):
            until(lambda: store.outbox_due(time.time_ns()), "the row to fall due")
            n._pass()
            row = store.outbox_rows()[0]
            delays.append((row["due_ns"] - n.state["hook"].last_error_ns) / NS)
    assert delays == [0.1, 0.2, 0.4, 0.4, 0.4]
    assert len(calls) == 5 and len(set(calls)) == 1  # every attempt carries the same key
    assert n.health()["entries"]["hook"]["degraded"] and not n.health()["ok"]
    assert n.health()["entries"]["hook"]["last_error"] == "down"


def test_give_up_after_its_time_and_never_again(running: Any) -> None:
    cfg = config({"name": "hook", "urls": ["json://127.0.0.1:9/h"], "retry_first_s": 0.1,
                  "retry_max_s": 0.1, "give_up_after_s": 0.5})
    calls: list[str] = []
    store, n = running(cfg, send=lambda urls, title, body, key: calls.append(key) or "down")
    store.put_events([danger(time.time_ns())]).result()
    until(lambda: store.outbox_rows()[0]["state"] == "failed", "the row given up")
    tried = len(calls)
    assert tried >= 2
    time.sleep(0.5)  # would be several more attempts if it were still retried
    assert len(calls) == tried
    row = store.outbox_rows()[0]
    assert row["last_error"] == "down" and row["attempts"] == tried
    assert n.health()["entries"]["hook"]["given_up"] == 1
    until(lambda: n.health()["entries"]["hook"]["failed"] == 1, "the count of given-up rows")


def test_a_pending_message_is_sent_once_after_a_restart(tmp_path: Path) -> None:
    with webhook() as hook:
        cfg = config({"name": "hook", "urls": [hook.url]})
        store = Store(tmp_path / "quaver.db")
        first = Notifier(cfg, store, env={"QUAVER_NOTIFY_HOLD_S": "3600"})
        first.attach()
        with store:
            first.start()
            ev = store.put_events([danger(time.time_ns())]).result()[0]
            time.sleep(0.3)
            first.stop()
        assert hook.bodies == []  # held back, and this "process" ends before sending
        store = Store(tmp_path / "quaver.db")
        second = Notifier(cfg, store, env={}, poll_s=0.1)
        second.attach()
        with store:
            second.start()
            until(lambda: hook.bodies, "the pending message after the restart")
            until(lambda: store.outbox_rows()[0]["state"] == "sent", "marked sent")
            second.stop()
            third = Notifier(cfg, store, env={}, poll_s=0.1)
            third.start()
            time.sleep(0.3)
            third.stop()
            sid = store.store_id()
        assert [b["quaver_key"] for b in hook.bodies] == [f"quaver-{sid}-{ev.id}-hook"]


def test_a_burst_becomes_a_digest_and_the_rate_limit_holds(running: Any) -> None:
    with webhook() as hook:
        cfg = config({"name": "hook", "urls": [hook.url], "digest_after": 2,
                      "digest_window_s": 0.5, "rate_limit": 100},
                     {"name": "few", "urls": [hook.url.replace("/hook", "/few")],
                      "rate_limit": 2, "digest_after": 1000})
        store, n = running(cfg)
        t = time.time_ns()
        stored = store.put_events([danger(t + k, "p1-de" if k % 2 else "p1-nde")
                                   for k in range(7)]).result()
        until(lambda: len(hook.bodies) == 5, "2 single + 1 digest + 2 rate-limited messages")
        by_key = {b["quaver_key"]: b for b in hook.bodies}
        sid, ids = store.store_id(), [e.id for e in stored]
        assert set(by_key) == {
            f"quaver-{sid}-{ids[0]}-hook", f"quaver-{sid}-{ids[1]}-hook",
            f"quaver-{sid}-digest{ids[2]}-hook", f"quaver-{sid}-{ids[0]}-few",
            f"quaver-{sid}-{ids[1]}-few"}
        digest = by_key[f"quaver-{sid}-digest{ids[2]}-hook"]
        assert digest["title"] == "quaver digest: 5 events (hook)"
        assert digest["message"].count("DANGER raised (was alert)") == 5
        until(lambda: n.health()["entries"]["few"]["limited"] == 5, "limited rows counted")
        # rows: 2 single + 5 in the digest (counted once marked, after the arrival)
        until(lambda: n.health()["entries"]["hook"]["sent"] == 7, "7 rows marked sent")
        assert n.health()["entries"]["hook"]["pending"] == 0


def test_the_e_mail_says_what_where_when_and_how_much(running: Any) -> None:
    with smtp_server() as (port, mails):
        cfg = config({"name": "ops-mail", "urls": [mail_url(port)],
                      "dashboard_url": "https://quaver.example.org/"}, tz="Europe/Berlin")
        store, n = running(cfg)
        # 16:25:09.123 UTC is 17:25 in Berlin in winter (UTC+1, IANA tz database)
        t = int(datetime(2026, 12, 2, 16, 25, 9, tzinfo=UTC).timestamp()) * NS + 123_000_000
        ev = store.put_events([danger(t)]).result()[0]
        mail = until(lambda: mails and mails[0], "the e-mail")
        key = f"quaver-{store.store_id()}-{ev.id}-ops-mail"
        assert mail.to == ["ops@example.org"]
        assert mail.subject == ("quaver: DANGER raised (was alert) — Cooling-water pump 1 · "
                                "drive end (p1-de): band.bearing")
        assert mail.headers["X-Quaver-Key"] == key
        lines = mail.body.strip().splitlines()
        assert lines[:8] == [
            "DANGER raised (was alert)",
            "Channel: Cooling-water pump 1 · drive end (p1-de)",
            "Rule: band.bearing (p1-de.band.bearing)",
            "Value: 7.42 mm/s; danger limit 7.1 mm/s",
            "Time: 2026-12-02T17:25:09.123+01:00",
            "Event: p1-de band bearing: DANGER, 7.42 mm/s >= danger level 7.1",
            "Dashboard: https://quaver.example.org/#/channel/p1-de",
            f"Key: {key}",
        ]
        assert lines[-1] == CAUTION


def test_sent_rows_are_pruned_after_their_days(tmp_path: Path) -> None:
    from service.store import Retention

    cfg = config({"name": "hook", "urls": ["json://127.0.0.1:9/h"]})
    store = Store(tmp_path / "quaver.db", retention=Retention(outbox_s=3600.0))
    n = Notifier(cfg, store, send=lambda *a: "")
    n.attach()
    with store:
        store.put_events([danger(time.time_ns()), danger(time.time_ns(), "p1-nde")]).result()
        n._pass()
        assert [r["state"] for r in store.outbox_rows()] == ["sent", "sent"]
        store.outbox_sent([], 0).result()
        c = sqlite3.connect(tmp_path / "quaver.db")
        c.execute("UPDATE outbox SET done_ns = done_ns - 7200000000000 WHERE id = 1")
        c.commit()
        c.close()
        report = store.maintain().result()
        assert report["deleted"]["outbox"] == 1
        assert [r["id"] for r in store.outbox_rows()] == [2]
        assert len(store.events()) == 2  # the events stay


def test_a_database_at_step_2_gains_the_outbox_and_keeps_its_events(tmp_path: Path) -> None:
    path = tmp_path / "quaver.db"
    c = sqlite3.connect(path, isolation_level=None)
    assert migrate(c, MIGRATIONS[:2]) == [1, 2]
    for k in range(3):
        c.execute(
            "INSERT INTO events(t_ns, channel, rule, kind, from_state, to_state, value, level, "
            "unit, message, latched, acked_by, note) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?)",
            (k * NS, "m1", "m1.overall", "transition", "normal", "alert", 1.5 + k, 1.0,
             "mm/s", f"event {k}", 0, "", ""))
    c.close()
    with Store(path) as store:
        assert store.health()["ok"], store.health()
        assert [e["message"] for e in store.events()] == ["event 2", "event 1", "event 0"]
        assert store.outbox_rows() == []
        sid = store.store_id()
        assert len(sid) == 16 and int(sid, 16) >= 0
    c = sqlite3.connect(path)
    assert schema_version(c) >= 3
    c.close()
    with Store(path) as store:
        assert store.store_id() == sid  # made once


def test_rows_of_an_entry_gone_from_the_config_are_marked_failed(tmp_path: Path) -> None:
    before = config({"name": "old", "urls": ["json://127.0.0.1:9/h"]})
    after = config({"name": "new", "urls": ["json://127.0.0.1:9/h"]})
    calls: list[str] = []
    with Store(tmp_path / "quaver.db") as store:
        Notifier(before, store).attach()
        store.put_events([danger(time.time_ns())]).result()
        n = Notifier(after, store, send=lambda urls, title, body, key: calls.append(key) or "")
        n.attach()
        n._pass()
        row = store.outbox_rows()[0]
    assert (row["entry"], row["state"], row["last_error"]) == (
        "old", "failed", "entry no longer in the config")
    assert calls == []

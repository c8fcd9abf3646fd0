"""Notifications end to end: a real ``quaver serve`` child whose simulated pump develops its
scripted fault into danger e-mails a real SMTP server and posts to a real webhook, once per
event each, with the idempotency key; killed with SIGKILL between commit and send, the
restarted service sends what was left, exactly once."""

from __future__ import annotations

import signal
from pathlib import Path
from typing import Any

import pytest
from notify_receivers import mail_url, smtp_server, webhook

from bench import harness
from tests.service.conftest import wait_for

CH = "p1-de-h"
RULE = f"{CH}.overall"


def plant(data_dir: Path, mail: str, hook: str) -> dict[str, Any]:
    """One channel of the simulated pump station, 10× real time, its bearing fault from
    plant second 5 over 40 s, and the demo's overall alarm levels (mm/s RMS; demo values,
    not advice); an e-mail and a webhook entry for raised events."""
    return {
        "service": {"data_dir": str(data_dir), "timezone": "Europe/Berlin"},
        "analysis": {"fmax_hz": 4000.0, "lines": 800, "unit": "velocity",
                     "amplitude": "rms", "averages": 4},
        "sources": [{"id": "plant", "kind": "simulated", "scenario": "demo",
                     "sample_rate_hz": 10240.0, "channels": [CH], "speed": 10.0,
                     "fault_start_s": 5.0, "fault_ramp_s": 40.0}],
        "channels": [{"id": CH, "machine": "p1", "name": "drive end, horizontal",
                      "speed_rpm": 1480.0}],
        "machines": [{"id": "p1", "name": "Cooling-water pump 1"}],
        "alarms": [{"channel": CH, "overall": True, "alert": 2.8, "danger": 4.5}],
        "notify": [
            {"name": "ops-mail", "urls": [mail], "events": ["raised"]},
            {"name": "ops-hook", "urls": [hook], "events": ["raised"]},
        ],
    }


def raised(child: harness.Child) -> list[dict[str, Any]]:
    evs = child.get_json(f"/api/v1/events?channel={CH}&limit=100")["events"]
    return sorted((e for e in evs if e["rule"] == RULE and e["kind"] == "transition"
                   and e["to_state"] in ("alert", "danger")), key=lambda e: e["id"])


def notify_health(child: harness.Child) -> dict[str, Any]:
    return dict(child.get_json("/api/v1/health")["notify"]["entries"])


def start(doc: dict[str, Any], workdir: Path, **kw: Any) -> harness.Child:
    try:
        return harness.start_service(doc, workdir, **kw)
    except harness.HarnessError as e:
        pytest.fail(str(e))


@pytest.mark.slow
def test_fault_to_danger_mails_and_posts_once_per_event_across_a_kill(tmp_path: Path) -> None:
    with smtp_server() as (port, mails), webhook() as hook:
        doc = plant(tmp_path / "data", mail_url(port), hook.url)
        # first run: every message is held back (test aid), so the events and their outbox
        # rows are committed but nothing is sent when the service is killed
        child = start(doc, tmp_path / "run1", env={"QUAVER_NOTIFY_HOLD_S": "3600"})
        try:
            events = wait_for(lambda: (lambda r: r if len(r) >= 2 and r[-1]["to_state"]
                                       == "danger" else None)(raised(child)),
                              "the fault to raise alert, then danger", 90.0,
                              on_fail=child.log_tail)
            h = wait_for(lambda: (lambda h: h if all(e["pending"] >= 2 for e in h.values())
                                  else None)(notify_health(child)),
                         "both entries' messages pending", 15.0, on_fail=child.log_tail)
            assert mails == [] and hook.bodies == []
            metrics = child_text(child, "/metrics")
            assert 'quaver_notify_pending{entry="ops-hook"}' in metrics
        finally:
            assert child.stop(signal.SIGKILL) == -signal.SIGKILL
        assert {k: v["sent"] for k, v in h.items()} == {"ops-mail": 0, "ops-hook": 0}
        # second run, no hold, and the fault is not started again (the simulated plant
        # starts over): the messages left pending go at start, each once, and no new alarm
        # is raised meanwhile
        doc["sources"][0]["fault_start_s"] = 1e5
        child = start(doc, tmp_path / "run2")
        try:
            # every raised event is from the first run (more may have come before the kill)
            events = raised(child)
            ids = [e["id"] for e in events]
            last_danger = [e for e in events if e["to_state"] == "danger"][-1]
            n = len(ids)
            wait_for(lambda: len(mails) >= n and len(hook.bodies) >= n,
                     f"{n} e-mails and {n} posts", 30.0, on_fail=child.log_tail)
            # the counts are the outbox's as of the sender's last pass (empty before its first
            # one, which reads as nothing pending): wait until they show every row settled
            h = wait_for(lambda: (lambda h: h if all(e["pending"] == 0
                                                     and e["sent"] + e["failed"] >= n
                                                     for e in h.values())
                                  else None)(notify_health(child)), "every message settled", 15.0)
            sid = key_store_id(hook.bodies[0]["quaver_key"])
            hook_keys = [b["quaver_key"] for b in hook.bodies]
            mail_keys = [m.headers["X-Quaver-Key"] for m in mails]
            # exactly once: every event raised before the kill, each key once, nothing else
            assert sorted(hook_keys) == sorted(f"quaver-{sid}-{i}-ops-hook" for i in ids)
            assert sorted(mail_keys) == sorted(f"quaver-{sid}-{i}-ops-mail" for i in ids)
            assert [b["quaver_key"] for b in hook.bodies] == [h["x-quaver-key"]
                                                              for h in hook.headers]
            danger_mail = next(m for m in mails if m.headers["X-Quaver-Key"]
                               == f"quaver-{sid}-{last_danger['id']}-ops-mail")
            assert raised(child) == events  # nothing raised in the second run
            assert danger_mail.subject.startswith("quaver: DANGER raised (was alert) — "
                                                  "Cooling-water pump 1 · drive end, horizontal "
                                                  f"({CH}): overall")
            body = danger_mail.body
            assert f"Value: {last_danger['value']:.4g} mm/s; danger limit 4.5 mm/s" in body
            assert "+01:00" in body or "+02:00" in body  # Berlin's offset, not UTC's
            assert "not a machine-protection or safety system" in body
            health = child.get_json("/api/v1/health")
            assert health["notify"]["ok"] is True
            assert all(e["failed"] == 0 and e["sent"] == n for e in h.values()), (n, h)
            metrics = child_text(child, "/metrics")
            assert f'quaver_notify_sent_total{{entry="ops-hook"}} {float(n)}' in metrics
            assert 'quaver_notify_pending{entry="ops-mail"} 0.0' in metrics
        finally:
            child.stop()


def key_store_id(key: str) -> str:
    """The store id inside ``quaver-<store id>-<event id>-<entry>``."""
    return key.split("-")[1]


def child_text(child: harness.Child, path: str) -> str:
    return harness.http_get(child.base_url, path).decode()


@pytest.mark.slow
def test_a_failing_target_shows_in_health_metrics_and_the_event_log(tmp_path: Path) -> None:
    dead = harness.free_ports(1)[0]  # nothing listens there: every post is refused
    doc = plant(tmp_path / "data", f"json://{harness.LOOPBACK}:{dead}/a",
                f"json://{harness.LOOPBACK}:{dead}/b")
    doc["notify"] = [{**doc["notify"][1], "retry_first_s": 0.2, "retry_max_s": 0.4}]
    child = start(doc, tmp_path / "run")
    try:
        def degraded() -> dict[str, Any] | None:
            h = child.get_json("/api/v1/health")
            return h if h["status"] == "degraded" and not h["notify"]["ok"] else None

        h = wait_for(degraded, "health to say degraded", 90.0, on_fail=child.log_tail)
        e = h["notify"]["entries"]["ops-hook"]
        assert e["failing"] and e["degraded"] and e["consecutive_failures"] >= 3
        assert e["sent"] == 0 and e["pending"] >= 1
        assert "JSON" in e["last_error"]  # apprise's reason, e.g. a connection error
        metrics = child_text(child, "/metrics")
        assert 'quaver_notify_failing{entry="ops-hook"} 1.0' in metrics
        failed = [ln for ln in metrics.splitlines()
                  if ln.startswith('quaver_notify_failed_total{entry="ops-hook"}')]
        assert float(failed[0].split()[-1]) >= 3
        # one event when it started failing, not one per retry
        evs = child.get_json("/api/v1/events?limit=100")["events"]
        notes = [(x["rule"], x["from_state"], x["to_state"]) for x in evs
                 if x["kind"] == "notify"]
        assert notes == [("notify.ops-hook", "ok", "failed")]
    finally:
        child.stop()

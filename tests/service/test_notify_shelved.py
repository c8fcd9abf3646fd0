"""A shelved rule's events are logged but not sent: the service hands the alarm engine's
shelves to the notification router (a real ``quaver serve`` child and a real webhook)."""

from __future__ import annotations

import hashlib
import json
import urllib.request
from pathlib import Path
from typing import Any

import pytest
from notify_receivers import webhook

from bench import harness
from tests.service.conftest import wait_for

SHELVED, OPEN = "p1-de-h", "p1-de-v"
TOKEN = "tok-otto"


def plant(data_dir: Path, hook: str) -> dict[str, Any]:
    """Two channels of the simulated pump whose scripted fault starts at plant second 30
    (3 s at 10× real time), so the shelve is in place before it; the demo's overall levels
    (mm/s RMS; demo values, not advice) on both."""
    return {
        "service": {"data_dir": str(data_dir)},
        "analysis": {"fmax_hz": 4000.0, "lines": 800, "unit": "velocity",
                     "amplitude": "rms", "averages": 4},
        "sources": [{"id": "plant", "kind": "simulated", "scenario": "demo",
                     "sample_rate_hz": 10240.0, "channels": [SHELVED, OPEN], "speed": 10.0,
                     "fault_start_s": 30.0, "fault_ramp_s": 40.0}],
        "channels": [{"id": c, "machine": "p1", "speed_rpm": 1480.0} for c in (SHELVED, OPEN)],
        "alarms": [{"channel": "*", "overall": True, "alert": 2.0, "danger": 4.5}],
        "tokens": [{"name": "otto", "role": "operator",
                    "sha256": hashlib.sha256(TOKEN.encode()).hexdigest()}],
        "notify": [{"name": "ops-hook", "urls": [hook], "events": ["raised"]}],
    }


@pytest.mark.slow
def test_a_shelved_rule_raises_in_the_log_but_sends_nothing(tmp_path: Path) -> None:
    with webhook() as hook:
        child = harness.start_service(plant(tmp_path / "data", hook.url), tmp_path / "run",
                                      headers={"Authorization": f"Bearer {TOKEN}"})
        try:
            req = urllib.request.Request(
                f"{child.base_url}/api/v1/alarms/{SHELVED}.overall/shelve",
                data=json.dumps({"reason": "sensor being replaced",
                                 "duration_s": 3600}).encode(),
                headers={"Authorization": f"Bearer {TOKEN}",
                         "Content-Type": "application/json"}, method="POST")
            with urllib.request.urlopen(req, timeout=10) as r:
                assert r.status == 200

            def raised() -> dict[str, list[dict[str, Any]]] | None:
                evs = child.get_json("/api/v1/events?limit=200")["events"]
                by = {c: [e for e in evs if e["rule"] == f"{c}.overall"
                          and e["kind"] == "transition" and e["to_state"] == "alert"]
                      for c in (SHELVED, OPEN)}
                return by if all(by.values()) else None

            by = wait_for(raised, "both channels' overall to raise alert", 60.0,
                          on_fail=child.log_tail)
            # the open rule's message arrives; the shelved one's is in the log only
            open_id = by[OPEN][0]["id"]
            wait_for(lambda: any(b["quaver_key"].split("-")[2] == str(open_id)
                                 for b in hook.bodies), "the open rule's message", 20.0)
            assert by[SHELVED][0]["message"].endswith("(shelved: not annunciated)")
            shelved_ids = {str(e["id"]) for e in by[SHELVED]}
            sent_ids = {b["quaver_key"].split("-")[2] for b in hook.bodies}
            assert sent_ids and not (sent_ids & shelved_ids)
            health = child.get_json("/api/v1/health")["notify"]["entries"]["ops-hook"]
            assert health["pending"] == 0 and health["failed"] == 0
        finally:
            child.stop()

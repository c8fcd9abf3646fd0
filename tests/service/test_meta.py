"""GET /api/v1/meta: the state and kind sets the dashboard reads (README, API)."""

from __future__ import annotations

from fastapi.testclient import TestClient

from service.api import create_app
from service.hub import Hub


def get_meta() -> dict:
    client = TestClient(create_app(Hub()), base_url="http://127.0.0.1")  # an allowed Host
    r = client.get("/api/v1/meta")
    assert r.status_code == 200
    return r.json()


def test_meta_lists_every_state_and_kind_with_its_meaning() -> None:
    m = get_meta()
    chans = {c["name"]: c for c in m["channel_statuses"]}
    assert list(chans) == ["ok", "no-signal", "sensor-fault", "gap", "overrun", "failed"]
    assert [c for c, v in chans.items() if v["live"]] == ["ok"]
    # service/quality.py: rules are suspended in sensor-fault, no-signal and failed only
    assert {c for c, v in chans.items() if v["suspends_alarms"]} == {
        "sensor-fault", "no-signal", "failed"}
    assert chans["gap"]["meaning"] == "the sample index jumped; analysis restarted after it"
    states = {s["name"]: (s["rank"], s["active"]) for s in m["alarm_states"]}
    assert states == {"normal": (0, False), "alert": (1, True), "danger": (2, True),
                      "latched": (0, True)}
    assert [k["name"] for k in m["event_kinds"]] == [
        "transition", "ack", "status", "notify", "shelve", "unshelve", "shelve-expired"]
    assert m["timezone"] == "UTC"  # the default of service.timezone
    assert [k["name"] for k in m["rule_kinds"]] == ["band", "tone", "overall", "signal"]
    every = m["channel_statuses"] + m["alarm_states"] + m["event_kinds"] + m["rule_kinds"]
    assert all(isinstance(x["meaning"], str) and len(x["meaning"]) > 10 for x in every)


def test_meta_is_described_in_openapi() -> None:
    client = TestClient(create_app(Hub()), base_url="http://127.0.0.1")
    spec = client.get("/openapi.json").json()
    op = spec["paths"]["/api/v1/meta"]["get"]
    ref = op["responses"]["200"]["content"]["application/json"]["schema"]["$ref"]
    assert ref.endswith("/Meta")
    props = spec["components"]["schemas"]["Meta"]["properties"]
    assert set(props) == {"channel_statuses", "alarm_states", "event_kinds", "rule_kinds",
                          "timezone"}

"""Regressions of issue 15 that need no network: acknowledgements are transactional, stream
alarm messages keep their documented kind and only carry committed events, a bad or deep
subscription message is answered, and a request body is limited while it streams.

In-process (the Service object and its ASGI app); the store is made to fail by replacing
its ``put_events`` with one whose future fails as the store's own does on a write error."""

from __future__ import annotations

import asyncio
import json
from concurrent.futures import Future
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient
from starlette.websockets import WebSocketDisconnect

from service.alarms import AlarmEvent
from service.api.stream import MAX_DEPTH, MAX_MESSAGE_BYTES, json_depth_over
from service.app import Service
from service.demo import demo_config
from service.store import StoreError

OPERATOR = "quaver-demo-operator"  # service/examples/demo.toml's operator token
BASE = "http://127.0.0.1"


def _failing(*_: Any, **__: Any) -> Future[list[AlarmEvent]]:
    f: Future[list[AlarmEvent]] = Future()
    f.set_exception(StoreError("disk I/O error"))
    return f


def _active_rule(svc: Service) -> str:
    """Put the first rule into alert (as a restart from a snapshot would) and return it."""
    snap = svc.alarms.snapshot()
    rule = next(iter(snap["alarms"]))
    snap["alarms"][rule].update(state="alert", peak="alert", value=1.0, since_ns=1)
    svc.alarms.restore(snap)
    assert svc.alarms.views()[0].as_dict()["state"] == "alert"
    return rule


def test_ack_while_the_store_fails_is_503_and_not_applied(tmp_path: Path) -> None:
    svc = Service(demo_config(data_dir=str(tmp_path)))
    app = svc.app()
    auth = {"Authorization": f"Bearer {OPERATOR}"}
    with TestClient(app, base_url=BASE) as client:
        rule = _active_rule(svc)
        real = svc.store.put_events
        svc.store.put_events = _failing  # type: ignore[method-assign]
        got: list[dict[str, Any]] = []
        svc.hub.publish_event = got.append  # type: ignore[method-assign]
        r = client.post(f"/api/v1/alarms/{rule}/ack", json={"note": "x"}, headers=auth)
        assert r.status_code == 503 and "nothing was acknowledged" in r.json()["detail"]
        assert "disk I/O error" in r.json()["detail"]
        view = next(v.as_dict() for v in svc.alarms.views() if v.rule == rule)
        assert (view["state"], view["acked"]) == ("alert", False)  # not applied in memory
        assert got == []  # nothing announced
        svc.store.put_events = real  # type: ignore[method-assign]
        r = client.post(f"/api/v1/alarms/{rule}/ack", json={"note": "x"}, headers=auth)
        assert r.status_code == 200, r.text  # the retry is not "already acknowledged"
        ev = r.json()
        assert isinstance(ev["id"], int) and ev["kind"] == "ack"
        assert [e["id"] for e in got] == [ev["id"]]
        view = next(v.as_dict() for v in svc.alarms.views() if v.rule == rule)
        assert view["acked"] is True
        stored = client.get(f"/api/v1/events/{ev['id']}", headers=auth).json()
        assert stored["rule"] == rule and stored["acked_by"] == "demo-operator"


def test_events_the_store_could_not_keep_are_not_announced(tmp_path: Path) -> None:
    svc = Service(demo_config(data_dir=str(tmp_path)))
    got: list[dict[str, Any]] = []
    svc.hub.publish_event = got.append  # type: ignore[method-assign]
    svc.store.put_events = _failing  # type: ignore[method-assign]
    ev = AlarmEvent(t_ns=1, channel="c", rule="c.overall", kind="transition",
                    from_state="normal", to_state="alert", value=1.0, level=0.5, unit="g",
                    message="m")
    asyncio.run(svc.commit_and_announce(svc.pipelines[0], [(ev, None)]))  # type: ignore[list-item]
    assert got == [] and svc.store_errors == 1


def test_stream_alarm_messages_keep_kind_alarm(tmp_path: Path) -> None:
    svc = Service(demo_config(data_dir=str(tmp_path)))
    with TestClient(svc.app(), base_url=BASE) as client:
        with client.websocket_connect(
            "ws://127.0.0.1/api/v1/stream", headers={"Authorization": f"Bearer {OPERATOR}"}
        ) as ws:
            assert ws.receive_json()["kind"] == "hello"
            rule = _active_rule(svc)
            r = client.post(f"/api/v1/alarms/{rule}/ack", json={},
                            headers={"Authorization": f"Bearer {OPERATOR}"})
            assert r.status_code == 200
            for _ in range(50):  # status messages come once a second; the alarm first
                m = ws.receive_json()
                if m["kind"] != "status":
                    break
            assert m["kind"] == "alarm" and m["event_kind"] == "ack"
            assert m["id"] == r.json()["id"] and m["rule"] == rule
            _closed_for_size(ws)


def _closed_for_size(ws: Any) -> None:
    """Send a message over the stream's size bound: the server closes with 1009. (Ending the
    session from the server side also lets the test client leave without racing the app.)"""
    ws.send_text(json.dumps({"subscribe": {"channels": ["x" * MAX_MESSAGE_BYTES]}}))
    with pytest.raises(WebSocketDisconnect) as e:
        for _ in range(100):
            ws.receive_json()
    assert (e.value.code, e.value.reason) == (1009, f"message over {MAX_MESSAGE_BYTES} bytes")


@pytest.mark.parametrize(
    ("sub", "reason"),
    [
        ({"unit": "furlong"}, "unit 'furlong' is not one of"),
        ({"amplitude": "loud"}, "amplitude 'loud' is not one of"),
        ({"kinds": ["spectrum", "gossip"]}, "unknown kinds ['gossip']"),
    ],
)
def test_a_bad_subscription_gets_an_error_and_the_session_goes_on(
    tmp_path: Path, sub: dict[str, Any], reason: str
) -> None:
    svc = Service(demo_config(data_dir=str(tmp_path)))
    with TestClient(svc.app(), base_url=BASE) as client:
        with client.websocket_connect(
            "ws://127.0.0.1/api/v1/stream", headers={"Authorization": f"Bearer {OPERATOR}"}
        ) as ws:
            assert ws.receive_json()["kind"] == "hello"
            ws.send_text(json.dumps({"subscribe": sub}))
            for _ in range(50):
                m = ws.receive_json()
                if m["kind"] == "error":
                    break
            assert reason in m["reason"]
            ws.send_text("[" * 2000 + "]" * 2000)  # would be a RecursionError in json.loads
            for _ in range(50):
                m = ws.receive_json()
                if m["kind"] == "error":
                    break
            assert m["reason"] == f"message nested deeper than {MAX_DEPTH}"
            _closed_for_size(ws)


def test_depth_is_counted_outside_strings() -> None:
    assert json_depth_over("[" * 9 + "]" * 9, 8)
    assert not json_depth_over("[" * 8 + "]" * 8, 8)
    assert not json_depth_over(json.dumps({"subscribe": {"channels": ["[[[[[[[[[["]}}), 8)
    assert not json_depth_over(json.dumps({"a": ["\\\"[[[[[[[[[[["]}), 8)


@pytest.mark.parametrize(("body", "shown"), [(b"1e999999", "inf"), (b'{"note": NaN}', "nan")])
def test_a_body_number_json_cannot_hold_is_422_not_500(
    tmp_path: Path, body: bytes, shown: str
) -> None:
    """A body like 1e999999 parses to inf; FastAPI's own 422 could not encode it and the
    service answered 500. Now 422 in FastAPI's shape, the value given as its text."""
    svc = Service(demo_config(data_dir=str(tmp_path)))
    with TestClient(svc.app(), base_url=BASE, raise_server_exceptions=False) as client:
        r = client.post("/api/v1/alarms/x/ack", content=body, headers={
            "Authorization": f"Bearer {OPERATOR}", "Content-Type": "application/json"})
    assert r.status_code == 422, r.text
    (err,) = r.json()["detail"]
    assert err["input"] == shown and err["loc"][0] == "body"


def test_trend_step_is_rounded_up_to_the_stored_step(tmp_path: Path) -> None:
    """Issue 15 item 11: a schema-valid step that was not a multiple of trend_step_s was 422;
    it is now rounded up (the answer's step_s says which was used); since >= until stays
    422, as the OpenAPI document says."""
    svc = Service(demo_config(data_dir=str(tmp_path)))
    base_step = svc.cfg.service.trend_step_s
    auth = {"Authorization": f"Bearer {OPERATOR}"}
    with TestClient(svc.app(), base_url=BASE) as client:
        url = "/api/v1/channels/p1-de-h/trend"
        r = client.get(url, params={"step": base_step + 1}, headers=auth)
        assert r.status_code == 200, r.text
        assert r.json()["step_s"] == 2 * base_step
        r = client.get(url, params={"since": 10.0, "until": 10.0}, headers=auth)
        assert r.status_code == 422
        doc = client.get("/openapi.json", headers=auth).json()
        says = doc["paths"]["/api/v1/channels/{channel_id}/trend"]["get"]["responses"]["422"]
        assert "since not before until" in says["description"]

"""Reloading the config of a running service (POST /api/v1/admin/reload and SIGHUP): alarm
levels and tokens change live, alarm state is kept, anything else is refused untouched.

Talks to the service only through its config file, signals and HTTP API."""

from __future__ import annotations

import contextlib
import copy
import hashlib
import json
import math
import signal
import socket
import tomllib
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest
from websockets.exceptions import ConnectionClosed
from websockets.sync.client import connect as ws_connect

from tests.service.conftest import (
    SMALL_FS,
    RunningService,
    feed_tone,
    one_band_config,
    run_service,
    to_toml,
    with_harness_token,
)

LOOPBACK = "127.0.0.1"


def token(name: str, role: str) -> dict[str, str]:
    return {"name": name, "role": role,
            "sha256": hashlib.sha256(f"tok-{name}".encode()).hexdigest()}


def auth(name: str) -> dict[str, str]:
    return {"Authorization": f"Bearer tok-{name}"}


CONFIG = one_band_config(
    alarms=[{"channel": "a", "band": "b", "alert": 0.5, "danger": 1.0, "latch": True}],
    tokens=[token("ada", "admin"), token("otto", "operator")],
)


@pytest.fixture(scope="module")
def svc(tmp_path_factory: pytest.TempPathFactory) -> Iterator[RunningService]:
    with run_service(copy.deepcopy(CONFIG), tmp_path_factory.mktemp("reload")) as s:
        with socket.create_connection((LOOPBACK, s.ports["s"]), timeout=10) as sock:
            n = feed_tone(sock, 0, int(6 * SMALL_FS), 0.8)  # 0.57 g RMS: over alert 0.5
        s.wait(lambda: s.channel("a")["counters"]["samples"] == n or None,
               "every sample taken")
        s.wait(lambda: s.get("alarms") or None, "the alert")
        yield s


def rewrite(svc: RunningService, **changes: Any) -> None:
    """Write the running service's config file again with some top-level tables replaced."""
    written = tomllib.loads(svc.config_path.read_text(encoding="utf-8"))
    doc = {**copy.deepcopy(CONFIG), "service": written["service"], "sources": written["sources"]}
    doc.update(copy.deepcopy(changes))
    if doc.get("tokens"):
        doc["tokens"] = with_harness_token(doc["tokens"])
    svc.config_path.write_text(to_toml(doc), encoding="utf-8")


def reload(svc: RunningService, who: str | None = "ada") -> httpx.Response:
    return svc.client.post("/api/v1/admin/reload",
                           headers=auth(who) if who else {"Authorization": ""})


def alarm(svc: RunningService) -> dict[str, Any]:
    """The one value rule (each channel also has its loss-of-signal rule, kind 'signal')."""
    (a,) = [a for a in svc.get("alarms", all="true") if a["kind"] != "signal"]
    return a  # type: ignore[no-any-return]


def test_only_an_admin_may_reload(svc: RunningService) -> None:
    assert reload(svc, None).status_code == 401
    assert reload(svc, "nobody").status_code == 401
    r = reload(svc, "otto")
    assert r.status_code == 403 and "this needs 'admin'" in r.json()["detail"]


def test_new_levels_apply_live_and_the_alarm_keeps_its_state(svc: RunningService) -> None:
    assert (alarm(svc)["state"], alarm(svc)["alert"]) == ("alert", 0.5)
    rewrite(svc, alarms=[{"channel": "a", "band": "b", "alert": 0.4, "danger": 0.55,
                          "latch": True}])
    r = reload(svc)
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["alarm_rules"] == {"added": [], "changed": ["a.band.b"], "removed": []}
    # three tokens: ada, otto and the harness's viewer (conftest.with_harness_token)
    assert (body["by"], body["tokens"], body["active_alarms_dropped"]) == ("ada", 3, [])
    a = alarm(svc)
    # the rule keeps its state (still active) and now holds the new levels
    assert (a["state"], a["alert"], a["danger"]) == ("alert", 0.4, 0.55)
    # its value (0.57 g RMS, A/√2 of 0.8 g: docs/references.md) is over the new danger level: the
    # next frame escalates
    with socket.create_connection((LOOPBACK, svc.ports["s"]), timeout=10) as sock:
        feed_tone(sock, int(6 * SMALL_FS), int(2 * SMALL_FS), 0.8)
    a = svc.wait(lambda: alarm(svc) if alarm(svc)["state"] == "danger" else None, "danger")
    assert a["value"] == pytest.approx(0.8 / math.sqrt(2), rel=0.02)


def test_a_reload_freezes_the_heap_again(svc: RunningService) -> None:
    # The replaced config and rules were frozen with the start-up heap (service.app): after a
    # reload the heap is thawed, collected and frozen again, so nothing stale stays frozen.
    def frozen() -> float:
        text = svc.client.get("/metrics", headers=auth("ada")).text
        return float(next(ln.split()[1] for ln in text.splitlines()
                          if ln.startswith("quaver_gc_frozen_objects ")))

    times = svc.log_tail(400).count("heap frozen")
    assert times >= 1 and frozen() > 20_000
    assert reload(svc).status_code == 200
    svc.wait(lambda: svc.log_tail(400).count("heap frozen") > times or None, "a new freeze")
    assert frozen() > 20_000


def test_tokens_rotate_without_a_restart(svc: RunningService) -> None:
    rewrite(svc, tokens=[token("ada", "admin"), token("olga", "operator")],
            alarms=[{"channel": "a", "band": "b", "alert": 0.4, "danger": 0.55, "latch": True}])
    assert reload(svc).status_code == 200
    ack = svc.client.post("/api/v1/alarms/a.band.b/ack", headers=auth("otto"))
    assert ack.status_code == 401  # the old operator token is gone
    ack = svc.client.post("/api/v1/alarms/a.band.b/ack", headers=auth("olga"))
    assert ack.status_code == 200 and ack.json()["acked_by"] == "olga"


def test_reload_closes_streams_whose_token_went_or_was_demoted(svc: RunningService) -> None:
    """Issue 15 item 4: a removed token's WebSocket session used to go on streaming. Now the
    reload closes it (1008 "token withdrawn"), and one whose role went down (1008 "token
    role lowered"); an unchanged token's session goes on."""
    alarms = [{"channel": "a", "band": "b", "alert": 0.4, "danger": 0.55, "latch": True}]
    rewrite(svc, tokens=[token("ada", "admin"), token("olga", "operator"),
                         token("otto", "operator")], alarms=alarms)
    assert reload(svc).status_code == 200
    url = f"ws://{LOOPBACK}:{svc.http_port}/api/v1/stream"
    with contextlib.ExitStack() as stack:
        socks = {who: stack.enter_context(
                     ws_connect(url, open_timeout=10, additional_headers=auth(who), proxy=None))
                 for who in ("ada", "olga", "otto")}
        _streams_end_on_reload(svc, socks, alarms)


def _streams_end_on_reload(svc: RunningService, socks: dict[str, Any],
                           alarms: list[dict[str, Any]]) -> None:
    try:
        for ws in socks.values():
            assert json.loads(ws.recv(timeout=10))["kind"] == "hello"
        rewrite(svc, tokens=[token("ada", "admin"), token("olga", "viewer")], alarms=alarms)
        assert reload(svc).status_code == 200
        closed = {}
        for who in ("olga", "otto"):
            with pytest.raises(ConnectionClosed) as e:
                for _ in range(100):  # status messages once a second until the close
                    socks[who].recv(timeout=10)
            assert e.value.rcvd is not None
            closed[who] = (e.value.rcvd.code, e.value.rcvd.reason)
        assert closed == {"olga": (1008, "token role lowered"), "otto": (1008, "token withdrawn")}
        assert json.loads(socks["ada"].recv(timeout=10))["kind"] == "status"  # still open
    finally:
        rewrite(svc, tokens=[token("ada", "admin"), token("olga", "operator")], alarms=alarms)
        assert reload(svc).status_code == 200


def test_a_change_that_needs_a_restart_is_refused_and_nothing_applied(
    svc: RunningService,
) -> None:
    before = alarm(svc)
    rewrite(svc, bands=[{"name": "b", "lo_hz": 90.0, "hi_hz": 150.0}],
            alarms=[{"channel": "a", "band": "b", "alert": 0.3, "danger": 0.6}])
    r = reload(svc)
    assert r.status_code == 409
    assert r.json()["detail"] == "changes to bands need a restart; nothing applied"
    assert (alarm(svc)["alert"], alarm(svc)["danger"]) == (before["alert"], before["danger"])


def test_an_invalid_file_is_refused_with_its_problems(svc: RunningService) -> None:
    rewrite(svc, alarms=[{"channel": "a", "band": "b", "alert": 2.0, "danger": 1.0}])
    r = reload(svc)
    assert r.status_code == 422
    detail = r.json()["detail"]
    assert detail["reason"].endswith("nothing applied")
    assert detail["problems"] == ["alarms[0].danger: 1 must be above alert 2"]


def test_sighup_reloads_too(svc: RunningService) -> None:
    rewrite(svc, tokens=[token("ada", "admin"), token("olga", "operator")],
            alarms=[{"channel": "a", "band": "b", "alert": 0.45, "danger": 0.9, "latch": True}])
    svc.proc.send_signal(signal.SIGHUP)
    a = svc.wait(lambda: alarm(svc) if alarm(svc)["alert"] == 0.45 else None, "the reload")
    assert a["danger"] == 0.9
    assert svc.alive()


def test_the_demo_has_no_file_to_reload(tmp_path: Path) -> None:
    from fastapi.testclient import TestClient

    from service.app import Service
    from service.demo import DEMO_OPERATOR_TOKEN, demo_config

    cfg = demo_config(data_dir=str(tmp_path))
    admin = {"name": "root", "role": "admin", "sha256": hashlib.sha256(b"adm").hexdigest()}
    cfg = cfg.model_copy(update={"tokens": [*cfg.tokens, type(cfg.tokens[0])(**admin)]})
    with TestClient(Service(cfg).app(), base_url="http://127.0.0.1") as client:
        r = client.post("/api/v1/admin/reload", headers={"Authorization": "Bearer adm"})
        assert r.status_code == 409 and "without a config file" in r.json()["detail"]
        r = client.post("/api/v1/admin/reload",
                        headers={"Authorization": f"Bearer {DEMO_OPERATOR_TOKEN}"})
        assert r.status_code == 403


def test_a_reload_tells_stream_clients_the_rules_changed(svc: RunningService) -> None:
    """The plant view keeps every rule's levels and polls nothing while its stream is open:
    a reload reaches it as a `rules` message (even a client of other channels' alarms), and
    /alarms then has the new levels."""
    alarms = [{"channel": "a", "band": "b", "alert": 0.45, "danger": 1.0, "latch": True}]
    url = f"ws://{LOOPBACK}:{svc.http_port}/api/v1/stream"
    with ws_connect(url, open_timeout=10, additional_headers=auth("ada"), proxy=None) as ws:
        assert json.loads(ws.recv(timeout=10))["kind"] == "hello"
        ws.send(json.dumps({"subscribe": {"channels": ["a"], "kinds": ["alarms"]}}))
        rewrite(svc, alarms=alarms)
        try:
            assert reload(svc).status_code == 200
            got = None
            for _ in range(50):  # bounded: status and alarm messages may come first
                m = json.loads(ws.recv(timeout=10))
                if m["kind"] == "rules":
                    got = m
                    break
            assert got is not None
            rule = alarm(svc)["rule"]
            assert got["changed"] == [rule] and got["added"] == got["removed"] == []
            assert alarm(svc)["alert"] == 0.45
        finally:
            rewrite(svc, alarms=[{"channel": "a", "band": "b", "alert": 0.5, "danger": 1.0,
                                  "latch": True}])
            assert reload(svc).status_code == 200

"""The console's API on a real service: the rules list, acknowledge-all, shelving (reason,
end time, expiry, restart), display names, ISO 8601 times in the site zone, the waveform.

Talks to the service only through its framed TCP source and its HTTP API."""

from __future__ import annotations

import copy
import hashlib
import math
import socket
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest

from service.wire import encode_frame
from tests.service.conftest import SMALL_FS, RunningService, one_band_config, run_service

LOOPBACK = "127.0.0.1"
AMP = 0.8  # peak g of the 123 Hz tone: 0.566 g RMS, over alert 0.5, under danger 1.0
ZONE = "Asia/Kathmandu"  # +05:45 all year (no summer time): cannot pass by accident in UTC
BAND_RULES = {"a": "a.band.b", "c": "c.band.b", "d": "d.band.b"}


def token(name: str, role: str) -> dict[str, str]:
    return {"name": name, "role": role,
            "sha256": hashlib.sha256(f"tok-{name}".encode()).hexdigest()}


def auth(name: str) -> dict[str, str]:
    return {"Authorization": f"Bearer tok-{name}"}


CONFIG = one_band_config(
    sources=[{"id": "s", "kind": "tcp", "listen": "auto", "format": "framed",
              "sample_rate_hz": SMALL_FS, "channels": ["a", "c", "d"]}],
    channels=[
        {"id": "a", "machine": "p1", "name": "drive end"},
        {"id": "c", "machine": "p1", "name": "free end"},
        {"id": "d", "machine": "f2"},
    ],
    machines=[{"id": "p1", "name": "Brine pump one", "group": "brine"}],
    alarms=[{"channel": "*", "band": "b", "alert": 0.5, "danger": 1.0, "hysteresis": 0.1,
             "on_delay_s": 0.5, "off_delay_s": 2.0, "latch": True}],
    tokens=[token("otto", "operator"), token("vera", "viewer")],
    service={"timezone": ZONE, "trend_step_s": 1},
)


def feed(sock: socket.socket, first: int, n: int, amp: float, block: int = 256) -> int:
    """``n`` samples of a 123 Hz sine (inside band b) of peak ``amp`` g on every channel."""
    t = (first + np.arange(n)) / SMALL_FS
    x = np.repeat((amp * np.sin(2 * np.pi * 123.0 * t))[None, :], 3, axis=0).astype(np.float32)
    for k in range(0, n, block):
        sock.sendall(encode_frame(x[:, k:k + block], "f32le", SMALL_FS, first + k))
    return first + n


def start(workdir: Path) -> Any:
    return run_service(copy.deepcopy(CONFIG), workdir)


@pytest.fixture(scope="module")
def workdir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("console")


FEED_MAX_S = 240.0  # the feeder stops by itself after this, whatever happens


def keep_feeding(port: int, stop: threading.Event) -> None:
    """Feed the tone at real time, 0.1 s blocks, until ``stop`` (or FEED_MAX_S): the
    channels stay live (no loss of signal) while the tests run."""
    block = int(SMALL_FS) // 10
    with socket.create_connection((LOOPBACK, port), timeout=10) as sock:
        first = feed(sock, 0, int(2 * SMALL_FS), AMP)  # 2 s at once, then real time
        t0 = time.monotonic()
        for k in range(int(FEED_MAX_S * 10)):
            if stop.wait(max(0.0, t0 + k * 0.1 - time.monotonic())):
                return
            try:
                first = feed(sock, first, block, AMP, block=block)
            except OSError:  # the service stopped (the restart test): feeding ends
                return


@pytest.fixture(scope="module")
def svc(workdir: Path) -> Iterator[RunningService]:
    with start(workdir) as s:
        stop = threading.Event()
        feeder = threading.Thread(target=keep_feeding, args=(s.ports["s"], stop), daemon=True)
        feeder.start()
        try:
            s.wait(lambda: len(s.get("alarms")) == 3 or None, "three alerts")
            yield s
        finally:
            stop.set()
            feeder.join(timeout=10)


def post(svc: RunningService, path: str, who: str | None = "otto", **body: Any) -> httpx.Response:
    return svc.client.post(f"/api/v1/{path}", json=body,
                           headers=auth(who) if who else {"Authorization": ""})


def events(svc: RunningService, kind: str) -> list[dict[str, Any]]:
    return [e for e in svc.get("events", limit=1000)["events"] if e["kind"] == kind]


def test_rules_list_every_rule_with_limits_names_and_state(svc: RunningService) -> None:
    rules = {r["rule"]: r for r in svc.get("rules")}
    # three band rules and each channel's loss-of-signal rule (loss_of_signal default alert)
    assert sorted(rules) == sorted([*BAND_RULES.values(), "a.signal", "c.signal", "d.signal"])
    a = rules["a.band.b"]
    assert (a["channel"], a["channel_name"], a["machine"], a["machine_name"],
            a["machine_group"]) == ("a", "drive end", "p1", "Brine pump one", "brine")
    assert (a["kind"], a["name"], a["levels"], a["alert"], a["danger"], a["unit"]) == (
        "band", "b", "absolute", 0.5, 1.0, "g")
    assert (a["hysteresis"], a["on_delay_s"], a["off_delay_s"], a["latch"]) == (
        0.1, 0.5, 2.0, True)
    assert a["state"] == "alert" and a["acked"] is False and a["shelved"] is False
    assert a["value"] == pytest.approx(AMP / math.sqrt(2), rel=0.02)  # sine RMS = A/√2
    # d names no machine entry: its id stands for its names
    d = rules["d.band.b"]
    assert (d["channel_name"], d["machine_name"], d["machine_group"]) == ("d", "f2", "")
    assert rules["a.signal"]["levels"] == "signal"
    # the site zone's offset on every ISO time, beside the ns one
    assert a["since"].endswith("+05:45") and a["value_time"].endswith("+05:45")
    assert a["since"].startswith(
        np.datetime_as_string(np.datetime64(a["since_ns"] + (5 * 60 + 45) * 60 * 10**9, "ns"),
                              unit="s"))


def test_rules_filter_by_machine_and_state(svc: RunningService) -> None:
    assert [r["rule"] for r in svc.get("rules", machine="p1", kind="band")] == [
        "a.band.b", "c.band.b"]
    assert {r["rule"] for r in svc.get("rules", state="alert")} == set(BAND_RULES.values())
    assert {r["rule"] for r in svc.get("rules", state="normal")} == {
        "a.signal", "c.signal", "d.signal"}
    assert svc.client.get("/api/v1/rules", params={"state": "loud"}).status_code == 422


def test_channels_carry_display_names_and_meta_the_zone(svc: RunningService) -> None:
    a = svc.channel("a")
    assert (a["name"], a["machine"], a["machine_name"], a["machine_group"]) == (
        "drive end", "p1", "Brine pump one", "brine")
    assert a["latest"]["time"].endswith("+05:45")
    assert svc.get("meta")["timezone"] == ZONE
    ev = svc.get("events")["events"][0]
    assert ev["time"].endswith("+05:45")
    t = a["latest"]["timestamp_ns"] / 1e9
    points = svc.wait(lambda: svc.get("channels/a/trend", name="band:b", since=t - 600,
                                      until=t + 600)["points"] or None, "trend points")
    assert all(p["time"].endswith("+05:45") for p in points)


def test_waveform_is_the_newest_samples_in_input_units(svc: RunningService) -> None:
    w = svc.get("channels/a/waveform", seconds=0.25)
    assert (w["unit"], w["fs"], w["n"], w["step"]) == ("g", SMALL_FS, 640, 1)  # 0.25 s · fs
    x = np.asarray(w["samples"])
    assert x.max() == pytest.approx(AMP, rel=0.01) and x.min() == pytest.approx(-AMP, rel=0.01)
    # the samples are the sine fed, in order: least squares on sin/cos of 123 Hz leaves
    # (float32 rounding) nothing, and the fitted amplitude is AMP
    t = np.arange(x.size) / SMALL_FS
    basis = np.stack([np.sin(2 * np.pi * 123.0 * t), np.cos(2 * np.pi * 123.0 * t)], axis=1)
    coef, *_ = np.linalg.lstsq(basis, x, rcond=None)
    assert np.hypot(*coef) == pytest.approx(AMP, rel=1e-5)
    assert np.abs(basis @ coef - x).max() < 1e-5
    assert w["t0"].endswith("+05:45")
    d = svc.get("channels/a/waveform", seconds=1.0, points=100)
    assert d["step"] == math.ceil(2560 / 50) and len(d["min"]) == len(d["max"]) == 2560 // 52
    assert max(d["max"]) == pytest.approx(AMP, rel=0.01)
    assert svc.client.get("/api/v1/channels/a/waveform", params={"seconds": 2}).status_code == 422
    assert svc.client.get("/api/v1/channels/zz/waveform").status_code == 404


def test_shelve_needs_an_operator_a_reason_and_a_bounded_end(svc: RunningService) -> None:
    rule = "d.band.b"
    assert post(svc, f"alarms/{rule}/shelve", "vera", reason="x", duration_s=60
                ).status_code == 403
    assert post(svc, f"alarms/{rule}/shelve", None, reason="x", duration_s=60
                ).status_code == 401
    assert post(svc, f"alarms/{rule}/shelve", reason="", duration_s=60).status_code == 422
    r = post(svc, f"alarms/{rule}/shelve", reason="x", duration_s=8 * 86400)
    assert r.status_code == 422
    r = post(svc, f"alarms/{rule}/shelve", reason="x", until="2020-01-01T00:00:00+00:00")
    assert r.status_code == 422 and "future" in r.text
    assert post(svc, f"alarms/{rule}/shelve", reason="x").status_code == 422  # no end
    assert post(svc, "alarms/zz.band.b/shelve", reason="x", duration_s=60).status_code == 404
    assert not svc.get("alarms/shelved") and not events(svc, "shelve")


def test_shelve_hides_from_active_lists_separately_logs_and_unshelves(
    svc: RunningService,
) -> None:
    rule = "d.band.b"
    r = post(svc, f"alarms/{rule}/shelve", reason="sensor being replaced", duration_s=5400)
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["alarm"]["shelved"] is True and body["alarm"]["state"] == "alert"
    until = body["alarm"]["shelved_until_ns"]
    assert until - body["event"]["t_ns"] == 5400 * 10**9
    assert body["alarm"]["shelved_until"].endswith("+05:45")
    # not annunciated as active, listed as shelved with who and why, still evaluated
    assert rule not in {a["rule"] for a in svc.get("alarms")}
    (sh,) = svc.get("alarms/shelved")
    assert (sh["rule"], sh["shelve_reason"], sh["shelved_by"]) == (
        rule, "sensor being replaced", "otto")
    assert [r["rule"] for r in svc.get("rules", state="shelved")] == [rule]
    (ev,) = events(svc, "shelve")
    assert (ev["rule"], ev["acked_by"], ev["note"]) == (rule, "otto", "sensor being replaced")
    assert "for 1 h 30 min" in ev["message"]
    assert post(svc, f"alarms/{rule}/shelve", reason="again", duration_s=60).status_code == 409
    # unshelve: annunciated again at once, logged
    r = post(svc, f"alarms/{rule}/unshelve")
    assert r.status_code == 200 and r.json()["alarm"]["shelved"] is False
    assert rule in {a["rule"] for a in svc.get("alarms")}
    (ev,) = events(svc, "unshelve")
    assert ev["rule"] == rule and "ALERT is annunciated again" in ev["message"]
    assert post(svc, f"alarms/{rule}/unshelve").status_code == 409


def test_a_shelve_ends_by_itself_at_its_end_time(svc: RunningService) -> None:
    rule = "c.signal"
    assert post(svc, f"alarms/{rule}/shelve", reason="short", duration_s=0.5).status_code == 200
    ev = svc.wait(lambda: next(iter(events(svc, "shelve-expired")), None), "the expiry",
                  timeout_s=10)
    assert ev["rule"] == rule and ev["note"] == "short"
    assert not svc.get("alarms/shelved")


def test_acknowledge_all_of_a_machine_then_of_a_view(svc: RunningService) -> None:
    assert post(svc, "alarms/ack", "vera", machine="p1").status_code == 403
    assert post(svc, "alarms/ack").status_code == 422  # which alarms?
    r = post(svc, "alarms/ack", machine="p1", note="seen on round")
    assert r.status_code == 200, r.text
    assert r.json()["acknowledged"] == 2
    acks = events(svc, "ack")
    assert sorted(e["rule"] for e in acks) == ["a.band.b", "c.band.b"]
    assert all(e["acked_by"] == "otto" and e["note"] == "seen on round" for e in acks)
    assert len({e["t_ns"] for e in acks}) == 1  # one action, one time
    by_rule = {a["rule"]: a for a in svc.get("alarms")}
    assert by_rule["a.band.b"]["acked"] and by_rule["c.band.b"]["acked"]
    assert not by_rule["d.band.b"]["acked"]
    # again: nothing left to acknowledge on p1
    assert post(svc, "alarms/ack", machine="p1").json()["acknowledged"] == 0
    # a view: the rules it lists; normal or acknowledged ones among them are left out
    r = post(svc, "alarms/ack", rules=["a.band.b", "d.band.b", "d.signal", "nope"])
    assert r.json()["acknowledged"] == 1
    assert [e["rule"] for e in r.json()["events"]] == ["d.band.b"]
    assert {r["rule"] for r in svc.get("rules", state="acked")} == set(BAND_RULES.values())


def test_a_shelve_survives_a_restart(workdir: Path, svc: RunningService) -> None:
    rule = "a.signal"
    r = post(svc, f"alarms/{rule}/shelve", reason="across a restart", duration_s=3600)
    assert r.status_code == 200
    until = r.json()["alarm"]["shelved_until_ns"]
    svc.stop()
    with start(workdir) as again:
        (sh,) = again.get("alarms/shelved")
        assert (sh["rule"], sh["shelve_reason"], sh["shelved_until_ns"]) == (
            rule, "across a restart", until)

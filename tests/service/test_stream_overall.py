"""The stream's plant-view options: the ``overall`` message (every channel's newest overall
once a second, whatever the client's channels) and ``every_alarm`` (alarm events of every
channel while the bands are those of a few channels); a client that names neither gets what
it always got.

A service in a subprocess on 127.0.0.1 with two channels, fed a 123 Hz tone over framed TCP."""

from __future__ import annotations

import json
import socket
from collections.abc import Iterator
from typing import Any

import numpy as np
import pytest
from websockets.sync.client import connect as ws_connect

from service.wire import encode_frame
from tests.service.conftest import (
    LOOPBACK,
    SMALL_FS,
    RunningService,
    one_band_config,
    run_service,
)

CONFIG = one_band_config(
    sources=[{"id": "s", "kind": "tcp", "listen": "auto", "format": "framed",
              "sample_rate_hz": SMALL_FS, "channels": ["a", "b"]}],
    # b's band over its alert level once fed (peak 0.8 g: 0.57 g RMS over 0.5), a's never
    alarms=[{"channel": "b", "band": "b", "alert": 0.5, "danger": 1.0}],
)
N_MSGS = 60  # messages read at most while waiting for one kind (bounded)


def feed(sock: socket.socket, first: int, n: int, amps: tuple[float, float]) -> int:
    t = (first + np.arange(n)) / SMALL_FS
    x = np.stack([a * np.sin(2 * np.pi * 123.0 * t) for a in amps]).astype(np.float32)
    for k in range(0, n, 256):
        sock.sendall(encode_frame(x[:, k:k + 256], "f32le", SMALL_FS, first + k))
    return first + n


@pytest.fixture(scope="module")
def svc(tmp_path_factory: pytest.TempPathFactory) -> Iterator[RunningService]:
    with run_service(CONFIG, tmp_path_factory.mktemp("overall")) as s:
        with socket.create_connection((LOOPBACK, s.ports["s"]), timeout=10) as sock:
            n = feed(sock, 0, int(4 * SMALL_FS), (0.1, 0.1))
            s.wait(lambda: all(c["latest"] for c in s.get("channels")) or None,
                   "a spectrum on both channels")
            s.sock, s.next_index = sock, n  # type: ignore[attr-defined]
            yield s


def read_until(ws: Any, kind: str, seen: list[dict[str, Any]]) -> dict[str, Any]:
    for _ in range(N_MSGS):
        m = json.loads(ws.recv(timeout=10))
        seen.append(m)
        if m["kind"] == kind:
            return m  # type: ignore[no-any-return]
    pytest.fail(f"no {kind} message in {N_MSGS}: {[x['kind'] for x in seen]}")


def test_overall_gives_every_channel_and_every_alarm_any_channels_alarms(
        svc: RunningService) -> None:
    url = f"ws://{LOOPBACK}:{svc.http_port}/api/v1/stream"
    with ws_connect(url, open_timeout=10, proxy=None) as ws:
        hello = json.loads(ws.recv(timeout=10))
        assert "overall" in hello["kinds"]
        ws.send(json.dumps({"subscribe": {"channels": ["a"], "every_alarm": True,
                                          "kinds": ["bands", "alarms", "overall"]}}))
        seen: list[dict[str, Any]] = []
        m = read_until(ws, "overall", seen)
        rest = {c["id"]: c for c in svc.get("channels")}
        assert [c["id"] for c in m["channels"]] == list(rest)  # both, though only a subscribed
        for c in m["channels"]:
            want = rest[c["id"]]
            assert (c["status"], c["fault"]) == (want["status"], want["fault"])
            # the newest frame's overall, as REST gives it for the same frame (or one later)
            assert c["seq"] <= want["latest"]["seq"]
            assert c["unit"] == want["latest"]["unit"]
            assert c["overall_lo_hz"] == want["latest"]["overall_lo_hz"]
            # a 0.1 g peak tone in the overall's band: 0.0707 g RMS (RMS = peak/√2, common
            # practice); the overall also holds the window's leakage and the low cut
            assert c["overall"] == pytest.approx(0.1 / np.sqrt(2), rel=0.1)
        # b goes over its alert level: its event comes though b's bands do not
        s: Any = svc
        s.next_index = feed(s.sock, s.next_index, int(4 * SMALL_FS), (0.1, 0.8))
        ev = read_until(ws, "alarm", seen)
        assert ev["channel"] == "b" and ev["event_kind"] == "transition"
        assert {x.get("channel") for x in seen if x["kind"] == "bands"} <= {"a"}
        assert any(x["kind"] == "bands" for x in seen)


def test_a_client_that_names_no_kinds_gets_no_overall(svc: RunningService) -> None:
    url = f"ws://{LOOPBACK}:{svc.http_port}/api/v1/stream"
    with ws_connect(url, open_timeout=10, proxy=None) as ws:
        json.loads(ws.recv(timeout=10))
        ws.send(json.dumps({"subscribe": {"channels": "*"}}))
        # fresh frames for this client (the fixture's feed may be long past on a slow run)
        svc.next_index = feed(svc.sock, svc.next_index, int(2 * SMALL_FS), (0.1, 0.1))  # type: ignore[attr-defined]
        kinds: list[str] = []
        for _ in range(400):  # bounded; a loaded machine may send many status messages first
            m = ws.recv(timeout=10)
            if isinstance(m, str):  # not the spectra
                kinds.append(json.loads(m)["kind"])
            if "status" in kinds and "bands" in kinds:
                break
        assert "status" in kinds and "bands" in kinds and "overall" not in kinds

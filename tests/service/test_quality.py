"""Never blind, never lying: a channel's data-quality state on a real service over real sockets.

A producer that goes silent, absurd sample values and garbage on a raw source are each seen
as a not-ok state within their time-out, recorded as events and in /metrics, and never
stop a later good signal from raising its alarm. Talks to the service through its sockets
and HTTP API only."""

from __future__ import annotations

import re
import socket
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from service.wire import encode_frame
from tests.service.conftest import (
    SMALL_FS,
    RunningService,
    feed_tone,
    one_band_config,
    run_service,
)

LOOPBACK = "127.0.0.1"
STALE_S = 1.5  # the channel's stale_after_s in these tests (the default would be 5 s)
# the band-b alarm of one_band_config: alert 0.5 g, danger 1.0 g RMS; a 123 Hz sine of peak
# 2 g reads 1.414 g RMS in the band (RMS = peak/√2 for a sine, common practice)
DANGER_PEAK = 2.0
QUIET_PEAK = 0.3  # 0.21 g RMS: normal


def _config(**channel: Any) -> dict[str, Any]:
    return one_band_config(channels=[{"id": "a", "stale_after_s": STALE_S, **channel}])


def _events(svc: RunningService, kind: str | None = None) -> list[dict[str, Any]]:
    evs = svc.get("events", limit=1000)["events"]
    return [e for e in reversed(evs) if kind is None or e["kind"] == kind]


def _alarms(svc: RunningService) -> dict[str, dict[str, Any]]:
    return {a["rule"]: a for a in svc.get("alarms", all="true")}


def _metric(svc: RunningService, pattern: str) -> float | None:
    text = svc.client.get("/metrics").text
    m = re.search(rf"^{pattern} (\S+)$", text, re.M)
    return None if m is None else float(m.group(1))


def _status(svc: RunningService, want: str) -> Callable[[], dict[str, Any] | None]:
    def probe() -> dict[str, Any] | None:
        ch = svc.channel("a")
        return ch if ch["status"] == want else None
    return probe


def _feed_ok(svc: RunningService, sock: socket.socket, first: int, amp: float,
             seconds: float = 2.0) -> int:
    """Feed ``seconds`` of the 123 Hz tone and wait until the channel reads ok."""
    nxt = feed_tone(sock, first, int(seconds * SMALL_FS), amp)
    svc.wait(_status(svc, "ok"), "channel a ok")
    return nxt


def test_a_silent_producer_turns_the_channel_no_signal_and_a_later_danger_is_raised(
    tmp_path: Path,
) -> None:
    with run_service(_config(), tmp_path) as svc:
        sock = socket.create_connection((LOOPBACK, svc.ports["s"]), timeout=10)
        nxt = _feed_ok(svc, sock, 0, QUIET_PEAK)
        assert svc.health()["status"] == "ok"
        # the producer goes silent (connected, sending nothing)
        t_silent = time.monotonic()
        ch = svc.wait(_status(svc, "no-signal"), "channel a no-signal", timeout_s=10)
        detected_s = time.monotonic() - t_silent
        # within stale_after_s plus the watch period (0.25 s) and the HTTP round trips
        assert STALE_S <= detected_s + 0.3 and detected_s < STALE_S + 1.5, detected_s
        assert "no new spectrum" in ch["status_cause"] and not ch["live"]
        assert ch["age_s"] > STALE_S
        health = svc.health()
        assert health["status"] == "degraded"
        assert [(c["channel"], c["status"]) for c in health["not_ok"]] == [("a", "no-signal")]
        assert _metric(svc, r'quaver_channel_status\{channel="a",status="no-signal"\}') == 1.0
        assert _metric(svc, r'quaver_channel_status\{channel="a",status="ok"\}') == 0.0
        # its last overall is not scraped as if it were current (it was, before: frozen)
        assert _metric(svc, r'quaver_overall\{channel="a",[^}]*\}') is None
        # the loss-of-signal alarm is raised; the band rule keeps its state, value hidden
        alarms = _alarms(svc)
        assert alarms["a.signal"]["state"] == "alert"
        band = alarms["a.band.b"]
        assert band["state"] == "normal" and band["value"] is None and band["suspended"]
        assert band["channel_status"] == "no-signal"
        # the transitions are events, committed and listed in order
        # (the first spectrum after the start is not an event: it is not news; the event is
        # committed by the store's writer a moment after the state changes)
        status = svc.wait(lambda: [(e["from_state"], e["to_state"])
                                   for e in _events(svc, "status")] or None,
                          "the status event committed", timeout_s=5)
        assert status == [("ok", "no-signal")], status
        los = [e for e in _events(svc, "transition") if e["rule"] == "a.signal"]
        assert [(e["from_state"], e["to_state"]) for e in los][-1] == ("normal", "alert")
        # the bytes flow again, far above danger: ok, the signal alarm clears, DANGER raised
        feed_tone(sock, nxt, int(3 * SMALL_FS), DANGER_PEAK)
        # danger is raised while the average still climbs (the first frame over 1 g): wait
        # for the value the tone settles at, RMS of a sine = peak/√2 (common practice), read
        # before the channel goes stale again (the 3 s of samples arrive at once)
        def settled() -> dict[str, Any] | None:
            a = _alarms(svc)
            b = a["a.band.b"]
            return a if (b["state"] == "danger" and b["value"] is not None
                         and abs(b["value"] - DANGER_PEAK / np.sqrt(2)) < 0.02) else None

        alarms = svc.wait(settled, "band b in danger at the tone's RMS", timeout_s=10)
        assert alarms["a.signal"]["state"] == "normal"
        assert svc.health()["status"] == "ok"
        overall = _metric(svc, r'quaver_overall\{channel="a",[^}]*\}')
        assert overall is not None and overall > 1.0  # live again: scraped again
        changes = _metric(svc, r'quaver_channel_status_changes_total\{channel="a"\}')
        assert changes is not None and changes >= 3  # first ok, no-signal, ok again
        sock.close()
        # a producer that disconnects is seen the same way, and says so
        ch = svc.wait(_status(svc, "no-signal"), "no-signal after the disconnect", timeout_s=10)
        assert "no producer connected" in ch["status_cause"]
        svc.assert_healthy()


def test_a_channel_with_no_producer_at_all_is_no_signal_and_raises_loss_of_signal(
    tmp_path: Path,
) -> None:
    with run_service(_config(loss_of_signal="danger"), tmp_path) as svc:
        ch = svc.channel("a")
        assert ch["status"] == "no-signal" and ch["live"] is False  # not ok before any data
        svc.wait(lambda: _alarms(svc)["a.signal"]["state"] == "danger" or None,
                 "loss of signal at danger", timeout_s=10)
        assert "no spectrum yet" in svc.channel("a")["status_cause"]


def test_an_absurd_value_is_a_sensor_fault_that_does_not_poison_the_channel(
    tmp_path: Path,
) -> None:
    with run_service(_config(), tmp_path) as svc:
        sock = socket.create_connection((LOOPBACK, svc.ports["s"]), timeout=10)
        nxt = _feed_ok(svc, sock, 0, QUIET_PEAK)
        # one 256-sample frame at 1e20 g (the float32 power of it overflows to inf)
        huge = np.full((1, 256), 1e20, dtype=np.float32)
        sock.sendall(encode_frame(huge, "f32le", SMALL_FS, nxt))
        nxt += 256
        t0 = time.monotonic()
        ch = svc.wait(_status(svc, "sensor-fault"), "sensor fault", timeout_s=5)
        detected_s = time.monotonic() - t0
        assert "beyond the sensor's range" in ch["fault"], ch
        assert ch["counters"]["range_blocks"] == 1 and ch["counters"]["nonfinite_blocks"] == 0
        assert detected_s < 2.0
        # values stay finite everywhere (JSON numbers, never null from an overflow)
        bands = svc.get("channels/a/bands")
        assert bands["status"] == "sensor-fault" and bands["live"] is False
        assert bands["overall"] is not None and np.isfinite(bands["overall"])
        # good samples far above danger: the fault clears, the analysis restarts, DANGER
        for _ in range(8):  # 8 × 0.5 s, paced so that the fault hold (2 s) can run out
            nxt = feed_tone(sock, nxt, int(0.5 * SMALL_FS), DANGER_PEAK)
            time.sleep(0.5)
        svc.wait(lambda: _alarms(svc)["a.band.b"]["state"] == "danger" or None,
                 "band b in danger after the fault", timeout_s=10)
        band = _alarms(svc)["a.band.b"]
        assert abs(band["value"] - DANGER_PEAK / np.sqrt(2)) < 0.02  # exact again
        assert svc.channel("a")["status"] == "ok"
        kinds = [(e["from_state"], e["to_state"]) for e in _events(svc, "status")]
        assert ("ok", "sensor-fault") in kinds and ("sensor-fault", "ok") in kinds
        assert svc.health()["sources"]["s"]["pipeline"]["analysis_restarts"] == 1
        sock.close()
        svc.assert_healthy()


def test_framed_bytes_on_a_raw_source_are_a_sensor_fault_not_a_false_danger(
    tmp_path: Path,
) -> None:
    doc = _config()
    doc["sources"] = [{"id": "s", "kind": "tcp", "listen": "auto", "format": "f32le",
                       "sample_rate_hz": SMALL_FS, "channels": ["a"]}]
    with run_service(doc, tmp_path) as svc:
        rng = np.random.default_rng(7)
        t = np.arange(int(2 * SMALL_FS)) / SMALL_FS
        quiet = (QUIET_PEAK * np.sin(2 * np.pi * 123.0 * t)).astype("<f4")
        with socket.create_connection((LOOPBACK, svc.ports["s"]), timeout=10) as sock:
            sock.sendall(quiet.tobytes())  # a right start, so only the values can tell
            svc.wait(_status(svc, "ok"), "channel a ok")
            # then a producer sends the framed format to this raw source by mistake
            x = (0.2 * rng.standard_normal((1, 256))).astype(np.float32)
            garbage = b"".join(encode_frame(x, "f32le", SMALL_FS, 256 * k) for k in range(40))
            sock.sendall(garbage[: len(garbage) // 4 * 4])
            ch = svc.wait(_status(svc, "sensor-fault"), "sensor fault from headers read as "
                          "samples", timeout_s=5)
        assert "beyond the sensor's range" in ch["fault"] or "NaN" in ch["fault"], ch
        time.sleep(0.5)
        raised = [e for e in _events(svc, "transition") if e["rule"] == "a.band.b"]
        assert raised == []  # no false ALERT or DANGER from the garbage
        assert _alarms(svc)["a.band.b"]["state"] == "normal"
        svc.assert_healthy()

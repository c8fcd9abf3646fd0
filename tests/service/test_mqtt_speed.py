"""Running speed written over MQTT (``[mqtt] speed_writes``): a real ``quaver serve`` child
subscribed on a real Mosquitto broker on loopback. A published speed moves the channel's order
band and its REST speed; bad payloads, stale times and a channel that is not manual are
refused, counted in /health and /metrics, and leave the speed as it was; the payload parser's
rules one by one."""

from __future__ import annotations

import json
import socket
import time
from pathlib import Path
from typing import Any

import pytest
from mosquitto import Broker, Listener, running_broker, wait_until

from service.mqtt.payloads import parse_speed
from service.speedwrite import SpeedRefused
from tests.service.conftest import REPO, one_band_config, run_service

TOPIC = "quaver/pump-1/a/speed/set"
NOW_NS = 1_800_000_000_000_000_000


def speed_doc(broker: Broker) -> dict[str, Any]:
    """Channel ``a`` (speed = manual, from 1200 r/min) with an order band 0.9–1.1 X, and a
    fixed-speed channel ``f`` whose topic quaver does not take."""
    doc = one_band_config(
        channels=[{"id": "a", "machine": "pump-1", "speed": "manual", "speed_rpm": 1200.0},
                  {"id": "f", "machine": "pump-1", "speed_rpm": 1200.0}],
        bands=[{"name": "1x", "lo_order": 0.9, "hi_order": 1.1}],
        alarms=[],
        mqtt={"enabled": True, "broker": broker.address, "client_id": "quaver-speed-test",
              "publish": ["status"], "speed_writes": True, "speed_max_age_s": 30.0},
    )
    doc["sources"][0]["channels"] = ["a", "f"]
    return doc


def publish(broker: Broker, topic: str, payload: bytes) -> None:
    import paho.mqtt.publish as pub

    pub.single(topic, payload, qos=1, hostname="127.0.0.1", port=broker.port)


def feed_both(sock: socket.socket, first: int, n: int) -> int:
    """123 Hz at 0.8 g peak on both channels (interleaved as the source declares)."""
    import numpy as np

    from service.wire import encode_frame
    from tests.service.conftest import SMALL_FS

    t = (first + np.arange(n)) / SMALL_FS
    x = np.repeat((0.8 * np.sin(2 * np.pi * 123.0 * t))[None, :], 2, axis=0).astype(np.float32)
    for k in range(0, n, 256):
        sock.sendall(encode_frame(x[:, k:k + 256], "f32le", SMALL_FS, first + k))
    return first + n


@pytest.mark.slow
def test_speed_from_mqtt_moves_the_order_band_and_bad_payloads_are_counted(
        tmp_path: Path) -> None:
    with running_broker(tmp_path / "broker") as broker, \
            Listener(broker, ["quaver/#"]) as sub, \
            run_service(speed_doc(broker), tmp_path / "svc") as svc:
        svc.wait(lambda: svc.health()["mqtt"]["connected"] or None, "connected to the broker")
        sub.wait(lambda m: m.topic.endswith("/a/status"), "a status message")
        with socket.create_connection(("127.0.0.1", svc.ports["s"]), timeout=10) as sock:
            idx = feed_both(sock, 0, 5120)
            first = svc.wait(lambda: svc.get_or_none("channels/a/bands"), "a first frame")
            band = first["bands"][0]
            # 1200 r/min = 20 Hz: the band is 18–22 Hz (orders × speed/60, common practice)
            assert (band["lo_hz"], band["hi_hz"]) == (pytest.approx(18.0), pytest.approx(22.0))
            # 123 Hz × 60 = 7380 r/min: the band moves to 110.7–135.3 Hz, over the tone
            publish(broker, TOPIC, json.dumps({"rpm": 7380.0, "time": time.time_ns()}).encode())

            def moved() -> dict[str, Any] | None:
                feed_both(sock, idx_box[0], 1280)
                idx_box[0] += 1280
                b = svc.get("channels/a/bands")
                return b if b["bands"][0]["lo_hz"] == pytest.approx(110.7) else None

            idx_box = [idx]
            b = svc.wait(moved, "the order band at the written speed", 20.0)
            assert b["bands"][0]["hi_hz"] == pytest.approx(135.3)
            # the tone's RMS, 0.8/√2 g, now lies in the band (RMS of a sine: peak/√2,
            # common practice; a few % for the averaging still settling)
            assert b["bands"][0]["value"] == pytest.approx(0.8 / 2**0.5, rel=0.05)
            sp = svc.get("channels/a")["speed"]
            assert (sp["rpm"], sp["source"], sp["written_by"]) == (7380.0, "manual", "mqtt")
            before = svc.health()["mqtt"]
            assert before["speed_written"] == 1 and before["speed_refused"] == 0
            assert before["speed_topics"] == 1  # a only: f is not speed = manual
            # bad payloads: not a number, a negative speed, NaN, a stale time, unknown keys;
            # and a bare number that is fine, then a write to the fixed channel (not taken)
            for bad in (b"fast", b'{"rpm": -5}', b"NaN", b'{"rpm": 900, "time": '
                        b'"2020-01-01T00:00:00+00:00"}', b'{"speed": 900}', b"[900]"):
                publish(broker, TOPIC, bad)
            publish(broker, "quaver/pump-1/f/speed/set", b"900")
            h = svc.wait(lambda: (lambda m: m if m["speed_refused"] >= 6 else None)(
                svc.health()["mqtt"]), "six refusals counted")
            assert h["speed_refused"] == 6 and h["speed_written"] == 1
            assert h["last_speed_refusal"].startswith("a: ")
            sp = svc.get("channels/a")["speed"]
            assert sp["rpm"] == 7380.0  # nothing refused changed the speed
            assert svc.get("channels/f")["speed"]["rpm"] == 1200.0
            metrics = svc.client.get("/metrics").text
            assert "quaver_mqtt_speed_refused_total 6.0" in metrics
            assert "quaver_mqtt_speed_written_total 1.0" in metrics
            # a bare number is taken; {"rpm": null} goes back to the configured 1200 r/min
            publish(broker, TOPIC, b"1500")
            svc.wait(lambda: svc.get("channels/a")["speed"]["rpm"] == 1500.0 or None,
                     "the bare number taken")
            publish(broker, TOPIC, b'{"rpm": null}')
            sp = svc.wait(lambda: (lambda s: s if s["rpm"] == 1200.0 else None)(
                svc.get("channels/a")["speed"]), "the written speed withdrawn")
            assert sp["source"] == "manual" and svc.health()["mqtt"]["speed_written"] == 3
        assert sub.got(lambda m: m.topic == TOPIC)  # the test's messages went through the broker


@pytest.mark.slow
def test_speed_topics_are_subscribed_again_after_a_broker_restart(tmp_path: Path) -> None:
    with running_broker(tmp_path / "broker") as broker, \
            run_service(speed_doc(broker), tmp_path / "svc") as svc:
        svc.wait(lambda: svc.health()["mqtt"]["connected"] or None, "connected")
        broker.stop()
        svc.wait(lambda: (not svc.health()["mqtt"]["connected"]) or None, "disconnected")
        broker.start()
        svc.wait(lambda: svc.health()["mqtt"]["connected"] or None, "reconnected", 40.0)
        publish(broker, TOPIC, b"2000")  # clean session: only a new SUBSCRIBE gets this
        wait_until(lambda: svc.get("channels/a")["speed"]["rpm"] == 2000.0 or None,
                   "the speed written after the broker came back", 15.0)


@pytest.mark.parametrize(("payload", "want"), [
    (b"1234.5", 1234.5),
    (b'{"rpm": 1234.5}', 1234.5),
    (b'{"rpm": 900, "time": 1800000000000000000}', 900.0),
    (b'{"rpm": 900, "time": "2027-01-15T08:00:10+00:00"}', 900.0),
    (b'{"rpm": null}', None),
])
def test_speed_payloads_taken(payload: bytes, want: float | None) -> None:
    # 2027-01-15T08:00:00Z is 1800000000 s after the epoch (POSIX time, common practice)
    assert parse_speed(payload, NOW_NS, 60.0) == want
    speed_schema().validate(json.loads(payload))  # and docs/mqtt.schema.json agrees


def speed_schema() -> Any:
    """docs/mqtt.schema.json's ``speed_set`` as a validator."""
    jsonschema = pytest.importorskip("jsonschema")
    schema = json.loads((REPO / "docs" / "mqtt.schema.json").read_text(encoding="utf-8"))
    only = {k: v for k, v in schema.items() if k != "oneOf"}
    return jsonschema.Draft202012Validator({**only, "$ref": "#/$defs/speed_set"})


@pytest.mark.parametrize(("payload", "match"), [
    (b"fast", "not a number or JSON"),
    (b"\xff\xfe", "not a number or JSON"),
    (b"0", r"rpm=0.0 is not a speed in \(0, 1e\+06\]"),
    (b"-3", "is not a speed"),
    (b"Infinity", "is not a speed"),
    (b"1e7", "is not a speed"),
    (b"true", "rpm=True is not a number"),
    (b'"900"', "rpm='900' is not a number"),
    (b'{"rpm": 900, "unit": "Hz"}', r"unknown key\(s\) unit"),
    (b'{"time": 1800000000000000000}', "no 'rpm' key"),
    (b'{"rpm": 900, "time": 1799999000000000000}', r"time is \+1000 s from now"),
    (b'{"rpm": 900, "time": "2027-01-15T08:00:00"}', "ISO 8601 with an offset"),
    (b'{"rpm": 900, "time": 1.5}', "not ns since the epoch"),
    (b"9" * 2000, "payload of 2000 bytes"),
])
def test_speed_payloads_refused(payload: bytes, match: str) -> None:
    with pytest.raises(SpeedRefused, match=match) as e:
        parse_speed(payload, NOW_NS, 60.0)
    assert e.value.why == "bad-value"
    # the schema refuses them too, except what only the service's clock can judge (the
    # time's age) and a time without an offset (the schema's "format" is not enforced)
    try:
        doc = json.loads(payload)
    except ValueError:
        return  # not JSON at all
    if "time is" not in match and "ISO 8601" not in match:
        assert not speed_schema().is_valid(doc), doc

"""MQTT end to end: a real ``quaver serve`` child publishing to a real Mosquitto broker on
loopback, read by a separate paho subscriber. Payloads equal the REST values of the same
frame and meet docs/mqtt.schema.json; channel states and the service state are retained;
alarm events arrive at QoS 1 with their idempotency key; a broker restart is ridden out
with a bounded backlog delivered in order; the last will tells of a killed service."""

from __future__ import annotations

import json
import signal
import socket
import threading
import time
from pathlib import Path
from typing import Any

import pytest
from mosquitto import Broker, Listener, Message, running_broker, wait_until

from tests.service.conftest import REPO, RunningService, feed_tone, one_band_config, run_service

SCHEMA = json.loads((REPO / "docs" / "mqtt.schema.json").read_text(encoding="utf-8"))
ALL = ["overall", "bands", "tones", "spectrum", "status", "alarms"]


def mqtt_doc(broker: Broker, **mqtt: Any) -> dict[str, Any]:
    """One framed TCP channel ``a`` on machine ``pump-1`` (band ``b`` 100–150 Hz with its
    alarm at 0.5 g alert / 1.0 g danger RMS, a tracked tone at 123 Hz), publishing every
    frame (``interval_s`` 0, unless given) to ``broker``."""
    return one_band_config(
        channels=[{"id": "a", "machine": "pump-1"}],
        tones=[{"name": "t123", "hz": 123.0}],
        mqtt={"enabled": True, "broker": broker.address, "client_id": "quaver-under-test",
              "publish": ALL, "spectrum_interval_s": 1.0, "interval_s": 0.0, **mqtt},
    )


def kind_of(topic: str) -> str:
    """The schema definition for a topic (docs/mqtt.md's table)."""
    if topic.endswith("/alarms/events"):
        return "event"
    return topic.rsplit("/", 1)[-1]


def check_schema(msgs: list[Message]) -> int:
    """Every JSON message validates against its definition and the top-level schema."""
    jsonschema = pytest.importorskip("jsonschema")
    top = jsonschema.Draft202012Validator(SCHEMA)
    n = 0
    for m in msgs:
        if m.topic.endswith("/service/state"):
            assert m.payload in (b"online", b"offline")
            continue
        doc = m.json()
        top.validate(doc)
        only = {k: v for k, v in SCHEMA.items() if k != "oneOf"}
        one = jsonschema.Draft202012Validator({**only, "$ref": f"#/$defs/{kind_of(m.topic)}"})
        one.validate(doc)
        n += 1
    return n


def bands_of(sub: Listener, seq: int) -> Message | None:
    ms = sub.got(lambda m: m.topic == "quaver/pump-1/a/default/bands" and m.json()["seq"] == seq)
    return ms[-1] if ms else None


def stable_rest(svc: RunningService, path: str) -> dict[str, Any]:
    """The REST answer once two reads in a row show the same frame (the feed has stopped)."""
    last: list[int] = [-1]

    def probe() -> dict[str, Any] | None:
        d = svc.get_or_none(path)
        if d is None:
            return None
        if d["seq"] == last[0]:
            return d
        last[0] = d["seq"]
        return None

    return svc.wait(probe, f"{path} to settle", 15.0)


@pytest.mark.slow
def test_payloads_equal_rest_status_retained_and_alarm_events_keyed(tmp_path: Path) -> None:
    with running_broker(tmp_path / "broker") as broker, \
            Listener(broker, ["quaver/#"]) as sub, \
            run_service(mqtt_doc(broker, retain="latest"), tmp_path / "svc") as svc:
        with socket.create_connection(("127.0.0.1", svc.ports["s"]), timeout=10) as sock:
            # 2 s of a 0.3 g peak tone (0.21 g RMS: normal), then 3 s at 0.8 g peak:
            # 0.8/√2 = 0.566 g RMS in band b, above the 0.5 g alert level (RMS of a sine:
            # peak/√2, common practice)
            idx = feed_tone(sock, 0, 5120, 0.3)
            sub.wait(lambda m: m.topic.endswith("/a/default/bands"), "a bands message")
            feed_tone(sock, idx, 7680, 0.8)
            ev_msgs = sub.wait(lambda m: m.topic == "quaver/alarms/events"
                               and m.json()["to_state"] == "alert", "the alert event")
            bands = stable_rest(svc, "channels/a/bands")
        mq = svc.wait(lambda: bands_of(sub, bands["seq"]), "the MQTT bands of REST's frame")
        doc = mq.json()
        # the same frame: the same time, the same values (both are the float32 value as a
        # double; JSON round-trips doubles exactly), the same data-quality state
        assert doc["t_ns"] == bands["timestamp_ns"]
        assert doc["values"]["b"] == bands["bands"][0]["value"]
        assert doc["values"]["overall"] == bands["overall"]
        assert set(doc["values"]) == {"overall", "b"}
        assert doc["unit"] == bands["unit"] == "g" and doc["amplitude"] == "rms"
        assert doc["quality"] == "ok" and doc["machine"] == "pump-1"
        assert doc["values"]["b"] == pytest.approx(0.8 / 2**0.5, rel=0.05)  # sine RMS
        tones = svc.get("channels/a/tones")
        assert tones["seq"] == bands["seq"]
        tmsg = sub.wait(lambda m: m.topic == "quaver/pump-1/a/default/tones"
                        and m.json()["seq"] == bands["seq"], "the MQTT tones of that frame")
        t = tmsg[-1].json()["tones"]["t123"]
        assert t == {"frequency_hz": tones["tones"][0]["frequency_hz"],
                     "amplitude": tones["tones"][0]["amplitude"]}
        spectra = sub.wait(lambda m: m.topic == "quaver/pump-1/a/default/spectrum",
                           "a spectrum message")
        sp = spectra[0].json()
        assert len(sp["values"]) == sp["lines"] + 1 == 401 and sp["df_hz"] == 2.5
        # rate-limited to one per spectrum_interval_s (1 s) while frames came much faster
        n_bands = len(sub.got(lambda m: m.topic.endswith("/a/default/bands")))
        assert len(sub.got(lambda m: m.topic.endswith("/spectrum"))) < n_bands

        # the alarm event: after commit (it is in the store), QoS 1, keyed by store and id
        ev = ev_msgs[0]
        # QoS 1 end to end (MQTT 3.1.1 §4.3, docs/references.md: at least once; the key
        # lets a receiver drop a repeat)
        assert ev.qos == 1 and not ev.retain
        e = ev.json()
        stored = [x for x in svc.get("events", channel="a", limit=50)["events"]
                  if x["id"] == e["id"]]
        assert stored and stored[0]["to_state"] == "alert" and stored[0]["rule"] == e["rule"]
        store_id = e["key"].split("-")[1]
        assert e["key"] == f"quaver-{store_id}-{e['id']}" and len(store_id) == 16

        # retained: a subscriber that comes later gets the channel's state and 'online' (once
        # the state 'ok' was published: states are looked at every 0.25 s)
        sub.wait(lambda m: m.topic == "quaver/pump-1/a/status" and m.json()["status"] == "ok",
                 "the state ok")
        with Listener(broker, ["quaver/+/a/status", "quaver/service/state",
                               "quaver/+/a/+/bands"]) as late:
            st = late.wait(lambda m: m.topic == "quaver/pump-1/a/status", "retained status")[0]
            on = late.wait(lambda m: m.topic == "quaver/service/state", "retained state")[0]
            kept = late.wait(lambda m: m.topic.endswith("/bands"), "retained bands")[0]
        # retain = "latest": the broker keeps the newest bands message, the frame REST shows
        assert kept.retain and kept.json() == doc
        # MQTT 3.1.1 §3.3.1.3 (docs/references.md): a retained message goes to every new
        # subscriber of its topic with the RETAIN flag set
        assert st.retain and st.json()["status"] == "ok" and st.json()["channel"] == "a"
        assert on.retain and on.payload == b"online"

        h = svc.health()["mqtt"]
        assert h["connected"] is True and h["dropped"] == 0 and h["backlog"] == 0
        assert h["published"] >= n_bands
        metrics = svc.client.get("/metrics").text
        assert "quaver_mqtt_connected 1.0" in metrics
        assert "quaver_mqtt_dropped_total 0.0" in metrics
        assert check_schema(sub.got()) >= n_bands


class Feeder:
    """Feeds channel ``a`` with a 0.3 g tone on a thread until stopped (bounded: 120 s)."""

    def __init__(self, port: int) -> None:
        self.sock = socket.create_connection(("127.0.0.1", port), timeout=10)
        self.stop_ev = threading.Event()
        self.idx = 0
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def _run(self) -> None:
        for _ in range(2400):  # 2400 × 0.05 s: ends by itself
            if self.stop_ev.is_set():
                return
            self.idx = feed_tone(self.sock, self.idx, 1024, 0.3)
            self.stop_ev.wait(0.05)

    def stop(self) -> None:
        self.stop_ev.set()
        self.thread.join(timeout=10)
        self.sock.close()


@pytest.mark.slow
def test_interval_publishes_the_newest_frame_per_round_and_events_at_once(
        tmp_path: Path) -> None:
    topic = "quaver/pump-1/a/default/bands"
    with running_broker(tmp_path / "broker") as broker, \
            Listener(broker, ["quaver/#"]) as sub, \
            run_service(mqtt_doc(broker, interval_s=0.5), tmp_path / "svc") as svc:
        feeder = Feeder(svc.ports["s"])
        try:
            sub.wait(lambda m: m.topic == topic, "a first bands message", 10)
            first = svc.get("channels/a/bands")["seq"]
            t0 = time.monotonic()
            time.sleep(3.0)
            last = svc.get("channels/a/bands")["seq"]
            span = time.monotonic() - t0
        finally:
            feeder.stop()
        bands = stable_rest(svc, "channels/a/bands")
        # the round after the feed stopped carries the newest frame, the one REST shows
        mq = svc.wait(lambda: bands_of(sub, bands["seq"]), "the MQTT bands of REST's frame")
        assert mq.json()["values"]["b"] == bands["bands"][0]["value"]
        seqs = [m.json()["seq"] for m in sub.got(lambda m: m.topic == topic)]
        within = [q for q in seqs if first < q <= last]
        # one message per 0.5 s round (± a round at each end) while the service analysed
        # many more frames; each round takes the newest, so the seqs only grow
        assert len(within) <= span / 0.5 + 2, (len(within), span)
        assert len(within) >= span / 0.5 - 2, (len(within), span)
        assert last - first > 2 * len(within), (last - first, len(within))
        assert seqs == sorted(seqs) and len(set(seqs)) == len(seqs)
        h = svc.health()["mqtt"]
        assert h["skipped"] > 0 and h["dropped"] == 0 and h["errors"] == 0


@pytest.mark.slow
def test_broker_restart_backlog_bounded_then_delivered_in_order(
        tmp_path: Path, record_property: Any) -> None:
    topic = "quaver/pump-1/a/default/bands"
    # a persistent broker, so that the subscriber's session (clean_session = false) and what
    # is queued for it outlive the restart, whichever of the two clients reconnects first
    broker = Broker(tmp_path / "broker", persistence=True).start()
    try:
        doc = mqtt_doc(broker, publish=["overall", "bands"], backlog_max=40,
                       reconnect_max_s=1.0)
        with Listener(broker, [topic], session="test-restart") as sub, \
                run_service(doc, tmp_path / "svc") as svc:
            feeder = Feeder(svc.ports["s"])
            try:
                before = sub.wait(lambda m: m.topic == topic, "bands before the outage", 5)
                broker.stop(signal.SIGTERM)
                svc.wait(lambda: not svc.health()["mqtt"]["connected"], "health: disconnected")
                seen: list[int] = []

                def full() -> dict[str, Any] | None:
                    h = svc.health()["mqtt"]
                    seen.append(h["backlog"])
                    return h if h["backlog"] == 40 and h["dropped"] > 0 else None

                down = svc.wait(full, "the backlog to fill and drop", 30.0)
            finally:
                feeder.stop()
            # the last blocks analysed: no frame comes any more
            latest = stable_rest(svc, "channels/a/bands")["seq"]
            held = svc.health()["mqtt"]
            assert not held["connected"] and held["backlog"] == 40, held
            assert max(seen) == 40  # bounded: never above backlog_max
            last_before = max(m.json()["seq"] for m in sub.got())
            broker.start()  # the same port
            up = svc.wait(lambda: (lambda h: h if h["connected"] and h["backlog"] == 0
                                   else None)(svc.health()["mqtt"]), "reconnected, sent", 30.0)
            assert stable_rest(svc, "channels/a/bands")["seq"] == latest

            def after() -> list[Message]:
                return sub.got(lambda m: m.connection >= 2 and m.json()["seq"] > last_before)

            # the backlog's last message is the newest frame: once it is in, all are
            got = wait_until(
                lambda: (lambda ms: ms if ms and ms[-1].json()["seq"] == latest else None)(
                    after()), "the newest frame at the subscriber", 15.0,
                lambda: f"REST latest {latest}, last before {last_before}, got "
                        f"{[m.json()['seq'] for m in after()]}, held {held}, up {up}, "
                        f"now {svc.health()['mqtt']}, subscriber sessions {sub.sessions}\n"
                        f"{broker.log()}")
            seqs = [m.json()["seq"] for m in got]
            assert sub.sessions == [False, True]  # the broker kept the subscriber's session
            assert seqs == sorted(set(seqs)), seqs  # in order, each once
            # every held message arrived (the oldest ones were dropped, counted, not sent)
            assert len(seqs) >= held["backlog"] == 40, f"{last_before} {seqs} {held} {up}"
            assert up["dropped"] == held["dropped"] > 0 and up["connects"] == 2, (held, up)
            report = {"before": len(before), "down": down, "held": held, "up": up,
                      "delivered": len(seqs), "first_last": [seqs[0], seqs[-1]],
                      "rest_latest": latest}
            record_property("restart", report)
            print("broker restart:", json.dumps(report))
    finally:
        broker.remove()


@pytest.mark.slow
def test_last_will_when_killed_and_offline_when_stopped(tmp_path: Path) -> None:
    state = "quaver/service/state"
    with running_broker(tmp_path / "broker") as broker, Listener(broker, [state]) as sub:
        for n, (sig, why) in enumerate([(signal.SIGKILL, "last will"),
                                        (signal.SIGTERM, "clean stop")]):
            with run_service(mqtt_doc(broker), tmp_path / f"svc{n}") as svc:
                sub.wait(lambda m: m.payload == b"online", "online", count=n + 1)
                # SIGKILL: the connection closes without DISCONNECT, so the broker publishes the
                # will (MQTT 3.1.1 §3.1.2.5, docs/references.md); SIGTERM: quaver says offline
                svc.stop(sig)
            got = sub.wait(lambda m: m.payload == b"offline", f"offline ({why})", count=n + 1)
            assert got[-1].topic == state
        payloads = [m.payload for m in sub.got()]
        assert payloads == [b"online", b"offline", b"online", b"offline"]

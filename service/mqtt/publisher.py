"""The MQTT publisher: a hub subscriber on the event loop that turns frames, channel states and
committed alarm events into messages, and paho-mqtt's network thread that carries them.

Knows the hub, the config, the payloads and paho (imported when it starts); nothing of HTTP,
the store's tables or the engine.

Real-time contract
    Nothing here waits on the broker. The hub hands this subscriber the newest frame per
    channel and profile (a slow publisher skips frames, counted as ``skipped``); messages go
    to paho's queue while it is connected and has fewer than ``backlog_max`` unsent, else to
    a bounded backlog (oldest dropped and counted as ``dropped``) that is sent, in order,
    once the broker answers again. QoS 0 messages paho had taken but not written when the
    link failed are counted as ``lost``; QoS 1 ones paho sends again itself.
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import logging
import os
import socket
import threading
import time
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

from ..config import Config
from ..config.base import parse_listen
from ..hub import Hub, Subscriber
from ..types import SpectralFrame
from .payloads import (
    OFFLINE,
    ONLINE,
    Topics,
    bands_payload,
    encode,
    event_payload,
    head,
    spectrum_payload,
    status_payload,
    tones_payload,
)

if TYPE_CHECKING:
    import paho.mqtt.client as mqtt

__all__ = ["MqttPublisher"]

log = logging.getLogger("quaver.mqtt")
STATUS_PERIOD_S = 0.25  # channel states are compared this often (and the backlog retried)
YIELD_EVERY = 64  # messages made between two returns to the event loop
STOP_TIMEOUT_S = 3.0  # the 'offline' message on a clean stop is waited for at most this
EVENT_QUEUE = 4096  # alarm events the hub holds for this subscriber before dropping
NO_CONN = 4  # paho's MQTT_ERR_NO_CONN (MQTTErrorCode is an IntEnum)


class MqttPublisher:
    """Publishes what ``hub`` announces to the ``[mqtt]`` broker; :meth:`health` for the API.

    :meth:`start` on the event loop (after the store has started: events carry its id),
    :meth:`stop` before the store closes."""

    def __init__(self, cfg: Config, hub: Hub, *, env: Mapping[str, str] | None = None) -> None:
        env = os.environ if env is None else env
        self.cfg, self.m, self.hub = cfg, cfg.mqtt, hub
        self.tz = cfg.service.timezone
        self.kinds = frozenset(self.m.publish)
        self.machines = {c.id: c.machine for c in cfg.channels}
        self.topics = Topics(self.m.topic_prefix, self.machines)
        self.retain_values = self.m.retain == "latest"
        self.password = (env.get(self.m.password_env) if self.m.password_env
                         else self.m.password)
        self.client_id = self.m.client_id or _default_client_id()
        self.store_id = ""
        self.backlog: collections.deque[tuple[str, bytes, int, bool]] = collections.deque()
        self.connected = False
        self.connected_since_ns: int | None = None
        self.connects = self.disconnects = 0
        self.published = self.dropped = self.lost = self.errors = 0
        self.last_error = ""
        self.last_error_ns: int | None = None
        self._lock = threading.Lock()  # the sets below are shared with paho's thread
        self._pending: dict[int, int] = {}  # mid → qos of messages paho has not yet sent
        self._early: set[int] = set()  # mids paho reported sent before we recorded them
        self._fresh = False  # connected since the task last looked: flush, then states
        self._sent_status: dict[str, tuple[str, str]] = {}
        self._spectrum_due: dict[tuple[str, str], float] = {}
        self._client: mqtt.Client | None = None
        self._sub: Subscriber | None = None
        self._task: asyncio.Task[None] | None = None

    # -- lifecycle ---------------------------------------------------------------------
    async def start(self, store_id: str) -> None:
        """Subscribe to the hub and start connecting (paho retries in its own thread with
        back-off 1 s … reconnect_max_s; the service runs whether the broker answers or not)."""
        import paho.mqtt.client as mqtt  # the 'mqtt' extra: only a service with [mqtt] needs it
        from paho.mqtt.enums import CallbackAPIVersion

        self.store_id = store_id
        c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=self.client_id,
                        protocol=mqtt.MQTTv311, clean_session=True)
        c.will_set(self.topics.state, OFFLINE, qos=1, retain=True)
        if self.m.username:
            c.username_pw_set(self.m.username, self.password)
        if self.m.tls:
            c.tls_set(ca_certs=self.m.ca_file)
        c.reconnect_delay_set(1, max(1, int(self.m.reconnect_max_s)))
        c.on_connect = self._on_connect
        c.on_disconnect = self._on_disconnect
        c.on_publish = self._on_publish
        c.on_connect_fail = self._on_connect_fail
        self._client = c
        host, port = parse_listen(self.m.broker)
        c.connect_async(host, port, keepalive=self.m.keepalive_s)
        c.loop_start()
        sub = self.hub.subscribe(None, max_queue=EVENT_QUEUE)
        sub.profiles = frozenset({"*"})
        if "alarms" not in self.kinds:
            sub.kinds = sub.kinds - {"alarms"}
        if not self.kinds & {"overall", "bands", "tones", "spectrum"}:
            sub.kinds = sub.kinds - {"spectrum", "bands", "tones"}
        self._sub = sub
        self._task = asyncio.create_task(self._run(), name="mqtt-publisher")

    async def stop(self) -> None:
        """Stop taking frames; tell the broker 'offline' (retained) and disconnect cleanly
        (a clean disconnect cancels the last will, so the state is published first)."""
        if self._task is not None:
            self._task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self._task
        if self._sub is not None:
            self.hub.unsubscribe(self._sub)
        c = self._client
        if c is None:
            return

        def close() -> None:
            if self.connected:
                info = c.publish(self.topics.state, OFFLINE, qos=1, retain=True)
                with contextlib.suppress(Exception):
                    info.wait_for_publish(timeout=STOP_TIMEOUT_S)
            c.disconnect()
            c.loop_stop()

        await asyncio.to_thread(close)

    def health(self) -> dict[str, Any]:
        """For /health and /metrics: ``ok`` while connected."""
        with self._lock:
            in_flight = len(self._pending)
        return {
            "ok": self.connected,
            "broker": self.m.broker,
            "client_id": self.client_id,
            "connected": self.connected,
            "connected_since_ns": self.connected_since_ns,
            "connects": self.connects,
            "disconnects": self.disconnects,
            "published": self.published,
            "backlog": len(self.backlog),
            "backlog_max": self.m.backlog_max,
            "in_flight": in_flight,
            "dropped": self.dropped,
            "lost": self.lost,
            "skipped": 0 if self._sub is None else self._sub.missed,
            "errors": self.errors,
            "last_error": self.last_error,
            "last_error_ns": self.last_error_ns,
        }

    # -- paho's thread -----------------------------------------------------------------
    def _on_connect(self, client: mqtt.Client, userdata: Any, flags: Any, reason: Any,
                    properties: Any) -> None:
        if reason.is_failure:
            self._error(f"broker refused the connection: {reason}")
            return
        self._record(client.publish(self.topics.state, ONLINE, qos=1, retain=True).mid, 1)
        self.connected, self._fresh = True, True
        self.connected_since_ns = time.time_ns()
        self.connects += 1
        log.info("MQTT: connected to %s as %s", self.m.broker, self.client_id)

    def _on_disconnect(self, client: mqtt.Client, userdata: Any, flags: Any, reason: Any,
                       properties: Any) -> None:
        was = self.connected
        self.connected, self.connected_since_ns = False, None
        with self._lock:  # QoS 0 messages paho took but did not write are gone with the link
            gone = [mid for mid, q in self._pending.items() if q == 0]
            for mid in gone:
                del self._pending[mid]
            self.lost += len(gone)
        if was:
            self.disconnects += 1
            if reason.is_failure:
                self._error(f"connection to {self.m.broker} lost: {reason}")
                log.warning("MQTT: connection to %s lost (%s); reconnecting", self.m.broker,
                            reason)

    def _on_connect_fail(self, client: mqtt.Client, userdata: Any) -> None:
        self._error(f"cannot connect to {self.m.broker}")

    def _on_publish(self, client: mqtt.Client, userdata: Any, mid: int, reason: Any,
                    properties: Any) -> None:
        with self._lock:
            if self._pending.pop(mid, None) is None:
                self._early.add(mid)
            self.published += 1

    def _error(self, text: str) -> None:
        with self._lock:
            self.errors += 1
            self.last_error, self.last_error_ns = text[:300], time.time_ns()

    # -- the event loop ----------------------------------------------------------------
    async def _run(self) -> None:
        sub = self._sub
        assert sub is not None  # started by start(), which subscribes first
        next_status = 0.0
        made = 0
        while True:
            try:
                item: SpectralFrame | dict[str, object] | None = await sub.get(STATUS_PERIOD_S)
            except TimeoutError:
                item = None
            try:
                if self._fresh:
                    self._fresh = False
                    self._flush()
                    self._sent_status.clear()  # a broker that restarted forgot them
                    next_status = 0.0
                now = time.monotonic()
                if now >= next_status:
                    next_status = now + STATUS_PERIOD_S
                    self._flush()
                    if "status" in self.kinds:
                        self._states()
                if isinstance(item, SpectralFrame):
                    self._frame(item, now)
                elif item is not None:
                    self._event(item)
            except Exception as err:  # one bad message must not end publishing
                self._error(f"{type(err).__name__}: {err}")
                log.exception("MQTT: could not publish")
            made += 1
            if made % YIELD_EVERY == 0:
                await asyncio.sleep(0)

    def _frame(self, f: SpectralFrame, now: float) -> None:
        st = self.hub.channels.get(f.channel)
        if st is None:
            return
        top = head(f, st, self.machines.get(f.channel, ""), self.tz)
        q, keep = self.m.qos, self.retain_values
        if self.kinds & {"overall", "bands"}:
            doc = bands_payload(f, top, self.kinds)
            self._send(self.topics.frame(f, "bands"), encode(doc), q, keep)
        if "tones" in self.kinds and f.tones:
            doc = tones_payload(f, top)
            self._send(self.topics.frame(f, "tones"), encode(doc), q, keep)
        if "spectrum" in self.kinds:
            key = (f.channel, f.profile)
            if now >= self._spectrum_due.get(key, 0.0):
                self._spectrum_due[key] = now + self.m.spectrum_interval_s
                doc = spectrum_payload(f, top)
                self._send(self.topics.frame(f, "spectrum"), encode(doc), q, keep)

    def _event(self, ev: dict[str, Any]) -> None:
        channel = str(ev.get("channel", ""))
        doc = event_payload(ev, self.store_id, self.machines.get(channel, ""), self.tz)
        self._send(self.topics.events, encode(doc), 1, False)

    def _states(self) -> None:
        """A retained status message for every channel whose state or cause changed since
        the last one sent (every channel after each connection)."""
        now_ns = time.time_ns()
        for cid, st in self.hub.channels.items():
            key = (st.status, st.fault)
            if self._sent_status.get(cid) == key:
                continue
            self._sent_status[cid] = key
            doc = status_payload(st, self.machines.get(cid, ""), self.tz, now_ns)
            self._send(self.topics.status(cid), encode(doc), self.m.qos, True)

    # -- handing messages over ---------------------------------------------------------
    def _send(self, topic: str, payload: bytes, qos: int, retain: bool) -> None:
        if self.backlog or not self._take(topic, payload, qos, retain):
            self._hold(topic, payload, qos, retain)

    def _hold(self, topic: str, payload: bytes, qos: int, retain: bool) -> None:
        if len(self.backlog) >= self.m.backlog_max:
            self.backlog.popleft()
            self.dropped += 1
        self.backlog.append((topic, payload, qos, retain))

    def _flush(self) -> None:
        """Hand the backlog to paho, oldest first, while it takes messages."""
        while self.backlog:
            if not self._take(*self.backlog[0]):
                return
            self.backlog.popleft()

    def _take(self, topic: str, payload: bytes, qos: int, retain: bool) -> bool:
        """Give one message to paho if connected with room; False to keep it here."""
        c = self._client
        if c is None or not self.connected:
            return False
        with self._lock:
            if len(self._pending) >= self.m.backlog_max:
                return False
        info = c.publish(topic, payload, qos=qos, retain=retain)
        rc = info.rc
        if rc != 0 and not (rc == NO_CONN and qos > 0):
            if rc == NO_CONN:
                return False  # QoS 0 while the link just failed: keep it for later
            self._error(f"publish to {topic}: paho error {rc}")
            return True  # a message paho refuses is not retried
        # QoS 1 taken while the link fails stays in paho's queue and is sent on reconnection
        self._record(info.mid, qos)
        return True

    def _record(self, mid: int, qos: int) -> None:
        with self._lock:
            if mid in self._early:
                self._early.discard(mid)
            else:
                self._pending[mid] = qos


def _default_client_id() -> str:
    host = "".join(ch if ch.isalnum() or ch in "._-" else "-" for ch in socket.gethostname())
    return f"quaver-{host or 'host'}"[:64]

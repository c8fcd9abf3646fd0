"""The MQTT publisher: a hub subscriber on the event loop that turns frames, channel states and
committed alarm events into messages, and one network thread that owns the paho-mqtt client.

Knows the hub, the config, the payloads and paho (imported when it starts); nothing of HTTP,
the store's tables or the engine.

Real-time contract
    Nothing on the event loop waits on the broker or on the network. The hub hands this
    subscriber the newest frame per channel and profile (a publisher that falls behind skips
    frames, counted as ``skipped``; with ``interval_s`` > 0 frames are published in rounds,
    the newest of each channel every ``interval_s``, and the ones replaced in between are
    counted there too); the messages made from them go into the backlog, a
    bounded deque (beyond ``backlog_max`` the oldest is dropped and counted as ``dropped``).
    The network thread is the only one that touches the paho client: it connects (again,
    with back-off from 1 s doubling to ``reconnect_max_s``), hands the backlog to paho in
    order while connected, and runs paho's loop (acknowledgements, keep-alive). One thread
    for paho means one wake-up per batch of messages instead of one per message, and no
    locking inside paho. QoS 0 messages paho had taken but not written when the link failed
    are counted as ``lost``; QoS 1 ones paho sends again after reconnecting.
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
from collections.abc import Callable, Mapping
from typing import TYPE_CHECKING, Any

from ..config import Config
from ..config.base import parse_listen
from ..hub import Hub, Subscriber
from ..speedwrite import SpeedRefused, write_speed
from ..types import SpectralFrame
from .payloads import (
    OFFLINE,
    ONLINE,
    Topics,
    bands_payload,
    encode,
    event_payload,
    head,
    parse_speed,
    spectrum_payload,
    status_payload,
    tones_payload,
)

if TYPE_CHECKING:
    import paho.mqtt.client as mqtt

__all__ = ["MqttPublisher"]

log = logging.getLogger("quaver.mqtt")
STATUS_PERIOD_S = 0.25  # channel states are compared this often
YIELD_EVERY = 64  # items taken from the hub between two returns to the event loop
NET_POLL_S = 0.02  # the network thread looks at the backlog at least this often
STOP_TIMEOUT_S = 3.0  # the 'offline' message on a clean stop is waited for at most this
EVENT_QUEUE = 4096  # alarm events the hub holds for this subscriber before dropping
# paho's MQTT_ERR_NO_CONN and MQTT_ERR_CONN_LOST (MQTTErrorCode is an IntEnum): no link
NO_LINK = (4, 7)

Message = tuple[str, bytes, int, bool]  # topic, payload, QoS, retain


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
        self._read_store_id: Callable[[], str] = lambda: ""
        # appended on the event loop, taken from the left by the network thread (a deque's
        # append and popleft are atomic); the drop of the oldest happens on the loop only
        self.backlog: collections.deque[Message] = collections.deque()
        self.connected = False
        self.connected_since_ns: int | None = None
        self.connects = self.disconnects = 0
        self.published = self.dropped = self.lost = self.errors = 0
        self.last_error = ""
        self.last_error_ns: int | None = None
        self._lock = threading.Lock()  # counters written by both threads
        self._pending: dict[int, int] = {}  # mid → QoS of messages paho has not yet sent
        self._early: set[int] = set()  # mids paho reported sent before publish() returned
        self._fresh = False  # connected since the task last looked: send every state again
        self._sent_status: dict[str, tuple[str, str]] = {}
        self._spectrum_due: dict[tuple[str, str], float] = {}
        self._client: mqtt.Client | None = None
        self._sub: Subscriber | None = None
        self._task: asyncio.Task[None] | None = None
        self._thread: threading.Thread | None = None
        self._stop = threading.Event()
        # speed/set topic → channel, for the channels configured speed = "manual"
        self.speed_topics = ({self.topics.speed_set(c.id): c.id for c in cfg.channels
                              if c.speed == "manual"} if self.m.speed_writes else {})
        self.speed_written = self.speed_refused = 0
        self.last_speed_refusal = ""
        self._loop: asyncio.AbstractEventLoop | None = None

    # -- lifecycle ---------------------------------------------------------------------
    async def start(self, store_id: Callable[[], str]) -> None:
        """Subscribe to the hub and start the network thread, which connects (again and
        again, with back-off; the service runs whether the broker answers or not).
        ``store_id`` reads the store's id for the events' keys (again later if it fails)."""
        try:  # the 'mqtt' extra: only a service with [mqtt] needs it
            import paho.mqtt.client as mqtt
            from paho.mqtt.enums import CallbackAPIVersion
        except ImportError as e:
            raise RuntimeError("[mqtt] is enabled but paho-mqtt is not installed "
                               "(pip install 'quaver[mqtt]')") from e

        self._read_store_id = store_id
        self._loop = asyncio.get_running_loop()
        with contextlib.suppress(Exception):  # a failing store announces no events anyway
            self.store_id = await asyncio.to_thread(store_id)
        c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=self.client_id,
                        protocol=mqtt.MQTTv311, clean_session=True)
        c.will_set(self.topics.state, OFFLINE, qos=1, retain=True)
        if self.m.username:
            c.username_pw_set(self.m.username, self.password)
        if self.m.tls:
            c.tls_set(ca_certs=self.m.ca_file)
        c.on_connect = self._on_connect
        c.on_disconnect = self._on_disconnect
        c.on_publish = self._on_publish
        c.on_message = self._on_message
        self._client = c
        sub = self.hub.subscribe(None, max_queue=EVENT_QUEUE)
        sub.profiles = frozenset({"*"})
        if "alarms" not in self.kinds:
            sub.kinds = sub.kinds - {"alarms"}
        if not self.kinds & {"overall", "bands", "tones", "spectrum"}:
            sub.kinds = sub.kinds - {"spectrum", "bands", "tones"}
        self._sub = sub
        self._thread = threading.Thread(target=self._net, name="mqtt-net", daemon=True)
        self._thread.start()
        self._task = asyncio.create_task(self._run(), name="mqtt-publisher")

    async def stop(self) -> None:
        """Stop taking frames; the network thread tells the broker 'offline' (retained)
        and disconnects cleanly (a clean disconnect cancels the last will, so the state is
        published first), within STOP_TIMEOUT_S and a little."""
        if self._task is not None:
            self._task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self._task
        if self._sub is not None:
            self.hub.unsubscribe(self._sub)
        self._stop.set()
        if self._thread is not None:
            await asyncio.to_thread(self._thread.join, STOP_TIMEOUT_S + 2.0)

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
            "speed_topics": len(self.speed_topics),
            "speed_written": self.speed_written,
            "speed_refused": self.speed_refused,
            "last_speed_refusal": self.last_speed_refusal,
        }

    # -- the network thread: the only one that touches the paho client ----------------
    def _net(self) -> None:
        c = self._client
        assert c is not None  # made by start() before the thread
        host, port = parse_listen(self.m.broker)
        delay_s, first = 1.0, True
        while not self._stop.is_set():
            try:
                if first:
                    c.connect(host, port, keepalive=self.m.keepalive_s)
                    first = False
                else:
                    c.reconnect()
            except (OSError, ValueError) as e:  # refused, unreachable, TLS, bad address
                self._error(f"cannot connect to {self.m.broker}: {e}")
                self._stop.wait(delay_s)
                delay_s = min(2 * delay_s, self.m.reconnect_max_s)
                continue
            rc = 0
            while rc == 0 and not self._stop.is_set():
                if self.connected:
                    self._flush(c)
                    if self.connected_since_ns is not None:
                        delay_s = 1.0  # a link that came up starts the back-off over
                rc = c.loop(timeout=NET_POLL_S)
            if self._stop.is_set():
                break
            self._stop.wait(delay_s)
            delay_s = min(2 * delay_s, self.m.reconnect_max_s)
        self._close(c)

    def _close(self, c: mqtt.Client) -> None:
        if self.connected:
            info = c.publish(self.topics.state, OFFLINE, qos=1, retain=True)
            deadline = time.monotonic() + STOP_TIMEOUT_S
            while not info.is_published() and self.connected and time.monotonic() < deadline:
                c.loop(timeout=NET_POLL_S)
        with contextlib.suppress(Exception):
            c.disconnect()
            c.loop(timeout=NET_POLL_S)

    def _flush(self, c: mqtt.Client) -> None:
        """Hand the backlog to paho, oldest first, while it takes messages and fewer than
        backlog_max are unsent. A message is taken out before it is handed over (the loop
        may drop the oldest meanwhile) and put back in front if the link just failed."""
        while self.connected:
            with self._lock:
                if len(self._pending) >= self.m.backlog_max:
                    return
            try:
                msg = self.backlog.popleft()
            except IndexError:
                return
            topic, payload, qos, retain = msg
            info = c.publish(topic, payload, qos=qos, retain=retain)
            if info.rc in NO_LINK and qos == 0:
                self.backlog.appendleft(msg)  # kept for the next connection
                return
            if info.rc != 0 and info.rc not in NO_LINK:  # QoS 1 stays queued in paho
                self._error(f"publish to {topic}: paho error {info.rc}")
                continue  # a message paho refuses is not retried
            self._record(info.mid, qos)

    def _record(self, mid: int, qos: int) -> None:
        with self._lock:
            if mid in self._early:
                self._early.discard(mid)
            else:
                self._pending[mid] = qos

    def _on_connect(self, client: mqtt.Client, userdata: Any, flags: Any, reason: Any,
                    properties: Any) -> None:
        if reason.is_failure:
            self._error(f"broker refused the connection: {reason}")
            return
        self._record(client.publish(self.topics.state, ONLINE, qos=1, retain=True).mid, 1)
        for topic in self.speed_topics:  # again on every connection (clean session)
            client.subscribe(topic, qos=1)
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

    def _on_publish(self, client: mqtt.Client, userdata: Any, mid: int, reason: Any,
                    properties: Any) -> None:
        with self._lock:
            if self._pending.pop(mid, None) is None:
                self._early.add(mid)
            self.published += 1

    def _on_message(self, client: mqtt.Client, userdata: Any, msg: Any) -> None:
        """A speed written to a ``speed/set`` topic (network thread): parsed here, applied on
        the event loop (where every other change of a channel's state is made)."""
        channel = self.speed_topics.get(msg.topic)
        if channel is None or self._loop is None:
            return
        try:
            rpm = parse_speed(bytes(msg.payload), time.time_ns(), self.m.speed_max_age_s)
        except SpeedRefused as e:
            self._loop.call_soon_threadsafe(self._speed_refused, channel, str(e))
            return
        self._loop.call_soon_threadsafe(self._write_speed, channel, rpm)

    def _write_speed(self, channel: str, rpm: float | None) -> None:
        try:
            write_speed(self.cfg, self.hub.channels, channel, rpm, "mqtt", manual_only=True)
        except SpeedRefused as e:
            self._speed_refused(channel, str(e))
            return
        self.speed_written += 1
        log.info("MQTT: speed of %s written: %s", channel,
                 "withdrawn" if rpm is None else f"{rpm:g} r/min")

    def _speed_refused(self, channel: str, why: str) -> None:
        self.speed_refused += 1
        self.last_speed_refusal = f"{channel}: {why}"[:300]
        log.warning("MQTT: speed for %s refused: %s", channel, why)

    def _error(self, text: str) -> None:
        with self._lock:
            self.errors += 1
            self.last_error, self.last_error_ns = text[:300], time.time_ns()

    # -- the event loop ----------------------------------------------------------------
    async def _run(self) -> None:
        sub = self._sub
        assert sub is not None  # started by start(), which subscribes first
        if self.m.interval_s > 0:
            await self._run_rounds(sub, self.m.interval_s)
            return
        next_status = 0.0
        made = 0
        while True:
            try:
                item: SpectralFrame | dict[str, object] | None = await sub.get(STATUS_PERIOD_S)
            except TimeoutError:
                item = None
            try:
                next_status = self._status_due(next_status)
                if isinstance(item, SpectralFrame):
                    self._frame(item, time.monotonic())
                elif item is not None:
                    self._event(item)
            except Exception as err:  # one bad message must not end publishing
                self._error(f"{type(err).__name__}: {err}")
                log.exception("MQTT: could not publish")
            made += 1
            if made % YIELD_EVERY == 0:
                await asyncio.sleep(0)

    async def _run_rounds(self, sub: Subscriber, every_s: float) -> None:
        """``interval_s`` > 0: alarm events at once, frames in rounds — every ``every_s``
        the newest frame of each channel and profile (the hub replaced the older ones,
        counted as ``skipped``), so the broker gets a value per channel per round and the
        event loop does the work of one frame per channel per round, not per analysis."""
        loop = asyncio.get_running_loop()
        next_status = next_round = 0.0
        while True:
            try:
                next_status = self._status_due(next_status)
                made = 0
                while sub.events and made < YIELD_EVERY:
                    self._event(sub.events.popleft())
                    made += 1
                now = loop.time()
                if sub.frames and now >= next_round:
                    next_round = now + every_s
                    mono = time.monotonic()
                    for k, f in enumerate(sub.take_frames(), 1):
                        self._frame(f, mono)
                        if k % YIELD_EVERY == 0:
                            await asyncio.sleep(0)
            except Exception as err:  # one bad message must not end publishing
                self._error(f"{type(err).__name__}: {err}")
                log.exception("MQTT: could not publish")
            if sub.events:
                await asyncio.sleep(0)
                continue
            now = loop.time()
            wait = STATUS_PERIOD_S if not sub.frames else max(0.0, next_round - now)
            if wait > 0:
                await sub.wait(min(wait, STATUS_PERIOD_S))

    def _status_due(self, next_status: float) -> float:
        """Send the channel states that changed when their period is up (all of them after
        a new connection); the next due time."""
        if self._fresh:
            self._fresh = False
            self._sent_status.clear()  # a broker that restarted forgot them
            next_status = 0.0
        now = time.monotonic()
        if now >= next_status:
            next_status = now + STATUS_PERIOD_S
            if "status" in self.kinds:
                self._states()
        return next_status

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
        if not self.store_id:  # the store failed at start and has committed since
            self.store_id = self._read_store_id()
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

    # -- handing messages over ----------------------------------------------------------
    def _send(self, topic: str, payload: bytes, qos: int, retain: bool) -> None:
        """Into the backlog (the network thread sends it); the oldest dropped when full."""
        if len(self.backlog) >= self.m.backlog_max:
            with contextlib.suppress(IndexError):  # the network thread may have taken it
                self.backlog.popleft()
                self.dropped += 1
        self.backlog.append((topic, payload, qos, retain))


def _default_client_id() -> str:
    host = "".join(ch if ch.isalnum() or ch in "._-" else "-" for ch in socket.gethostname())
    return f"quaver-{host or 'host'}"[:64]

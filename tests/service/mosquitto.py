"""A real Mosquitto broker on a free 127.0.0.1 port for the MQTT tests, and a paho subscriber
that records what it receives.

Knows the mosquitto command line and paho-mqtt; nothing of the service. Without Mosquitto
(or paho) the tests are skipped locally and fail when the environment variable CI is set
(``.ci/run`` exports CI=1 and installs Debian's ``mosquitto``)."""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import signal
import socket
import subprocess
import tempfile
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

import pytest

from bench.harness import LOOPBACK, free_ports

T = TypeVar("T")
START_TIMEOUT_S = 10.0
POLL_S = 0.05


def in_ci() -> bool:
    return os.environ.get("CI", "").lower() in ("1", "true", "yes")


def need(what: str, found: bool) -> None:
    """Skip (locally) or fail (CI set) when ``what`` is missing."""
    if found:
        return
    msg = f"{what} is missing (apt-get install mosquitto; pip install '.[test]')"
    if in_ci():
        pytest.fail(msg)
    pytest.skip(msg)


def mosquitto_path() -> str:
    path = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
    need("mosquitto", Path(path).exists())
    try:
        import paho.mqtt.client  # noqa: F401
    except ImportError:
        need("paho-mqtt", False)
    return path


def wait_until(probe: Callable[[], T | None], what: str, timeout_s: float = 15.0,
               on_fail: Callable[[], str] | None = None) -> T:
    """``probe()`` until it is neither None nor False; bounded by ``timeout_s``."""
    deadline = time.monotonic() + timeout_s
    for _ in range(int(timeout_s / POLL_S) + 1):
        got = probe()
        if got is not None and got is not False:
            return got
        if time.monotonic() > deadline:
            break
        time.sleep(POLL_S)
    extra = f"\n{on_fail()}" if on_fail is not None else ""
    pytest.fail(f"timed out after {timeout_s:g} s waiting for {what}{extra}")


@dataclass
class Broker:
    """``mosquitto -c <workdir>/mosquitto.conf`` listening on 127.0.0.1:``port`` only."""

    workdir: Path
    port: int = 0
    persistence: bool = False
    proc: subprocess.Popen[bytes] | None = None
    starts: int = 0
    _store: Path | None = None

    @property
    def address(self) -> str:
        return f"{LOOPBACK}:{self.port}"

    def start(self) -> Broker:
        """Start (again, on the same port); returns when the port accepts connections."""
        exe = mosquitto_path()
        self.workdir.mkdir(parents=True, exist_ok=True)
        if not self.port:
            self.port = free_ports(1)[0]
        lines = [f"listener {self.port} {LOOPBACK}", "allow_anonymous true",
                 f"persistence {'true' if self.persistence else 'false'}"]
        if self.persistence:  # a subscriber's session and its queue outlive a restart
            lines += [f"persistence_location {self.store()}/", "queue_qos0_messages true",
                      "max_queued_messages 100000"]
        conf = self.workdir / "mosquitto.conf"
        conf.write_text("\n".join(lines) + "\n", encoding="utf-8")
        self.starts += 1
        log = open(self.workdir / f"mosquitto-{self.starts}.log", "wb")  # noqa: SIM115
        self.proc = subprocess.Popen([exe, "-c", str(conf)], stdout=log, stderr=subprocess.STDOUT)
        log.close()

        def accepts() -> bool:
            if self.proc is not None and self.proc.poll() is not None:
                pytest.fail(f"mosquitto exited ({self.proc.returncode}):\n{self.log()}")
            with contextlib.suppress(OSError), socket.create_connection(
                    (LOOPBACK, self.port), timeout=0.5):
                return True
            return False

        wait_until(accepts, f"mosquitto on port {self.port}", START_TIMEOUT_S, self.log)
        return self

    def store(self) -> Path:
        """A folder for the broker's database that its own user can write: mosquitto started
        as root runs as the user 'mosquitto', which cannot enter pytest's private tmp_path."""
        if self._store is None:
            self._store = Path(tempfile.mkdtemp(prefix="quaver-mosquitto-"))
            self._store.chmod(0o777)
        return self._store

    def remove(self) -> None:
        """Stop, and delete the database folder."""
        self.stop()
        if self._store is not None:
            shutil.rmtree(self._store, ignore_errors=True)
            self._store = None

    def stop(self, sig: int = signal.SIGTERM) -> None:
        if self.proc is None:
            return
        if self.proc.poll() is None:
            self.proc.send_signal(sig)
            try:
                self.proc.wait(timeout=5.0)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout=5.0)
        self.proc = None

    def log(self) -> str:
        p = self.workdir / f"mosquitto-{self.starts}.log"
        return p.read_text(errors="replace")[-3000:] if p.exists() else "(no broker log)"


@contextlib.contextmanager
def running_broker(workdir: Path, persistence: bool = False) -> Iterator[Broker]:
    b = Broker(workdir, persistence=persistence).start()
    try:
        yield b
    finally:
        b.remove()


@dataclass
class Message:
    topic: str
    payload: bytes
    qos: int
    retain: bool
    connection: int  # which connection of the subscriber received it (1, 2 …)
    at: float = 0.0  # time.time() when it arrived

    def json(self) -> Any:
        return json.loads(self.payload)


@dataclass
class Listener:
    """A paho subscriber of ``topics`` on ``broker`` recording every message (thread-safe).

    ``session``: a persistent session (clean_session = false, fixed client id) so the broker
    keeps its subscription and queue across a disconnection."""

    broker: Broker
    topics: list[str]
    session: str | None = None
    messages: list[Message] = field(default_factory=list)
    connections: int = 0
    subscribed: int = 0
    sessions: list[bool] = field(default_factory=list)  # session present, per connection
    _lock: threading.Lock = field(default_factory=threading.Lock)
    _client: Any = None

    def __enter__(self) -> Listener:
        import paho.mqtt.client as mqtt

        c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2,
                        client_id=self.session or "", protocol=mqtt.MQTTv311,
                        clean_session=self.session is None)
        c.reconnect_delay_set(1, 1)

        def on_connect(client: Any, userdata: Any, flags: Any, reason: Any, props: Any) -> None:
            with self._lock:
                self.connections += 1
                self.sessions.append(bool(flags.session_present))
            client.subscribe([(t, 1) for t in self.topics])

        def on_message(client: Any, userdata: Any, msg: Any) -> None:
            with self._lock:
                self.messages.append(Message(msg.topic, bytes(msg.payload), msg.qos,
                                             bool(msg.retain), self.connections, time.time()))

        def on_subscribe(client: Any, userdata: Any, mid: Any, codes: Any, props: Any) -> None:
            with self._lock:
                self.subscribed += 1

        c.on_connect, c.on_message, c.on_subscribe = on_connect, on_message, on_subscribe
        c.connect(LOOPBACK, self.broker.port, keepalive=10)
        c.loop_start()
        self._client = c
        # the SUBACK: the subscriptions are in place before anything is published
        wait_until(lambda: self.subscribed > 0, "the test subscriber's subscription", 10.0)
        return self

    def __exit__(self, *exc: object) -> None:
        self._client.disconnect()
        self._client.loop_stop()

    def got(self, pred: Callable[[Message], bool] = lambda m: True) -> list[Message]:
        with self._lock:
            return [m for m in self.messages if pred(m)]

    def wait(self, pred: Callable[[Message], bool], what: str, count: int = 1,
             timeout_s: float = 20.0) -> list[Message]:
        return wait_until(lambda: (lambda ms: ms if len(ms) >= count else None)(self.got(pred)),
                          what, timeout_s, lambda: self.broker.log())

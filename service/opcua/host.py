"""What the OPC UA publisher needs of the running service (:class:`OpcuaHost`), its counters
(:class:`PublisherStats`) and :class:`OpcuaPublisher`, the part the service holds.

The asyncua server runs in a worker process (``service.opcua.worker``), so its Python work
never holds the interpreter lock the analysis threads need. This side subscribes to the
hub, packs each push into a few arrays (:mod:`service.opcua.pack`) and hands them over a
socket pair with at most ``MAX_INFLIGHT`` batches unanswered: while the worker lags, the
hub's subscriber keeps the newest frame of each channel (the rest are counted as dropped)
and nothing here waits. It answers the worker's Acknowledge requests through the service's
own acknowledge, restarts a worker that died (with a growing pause) and stops it with the
service.

Knows the hub, the alarm engine and the config by type; never imports asyncua."""

from __future__ import annotations

import asyncio
import importlib.util
import logging
import math
import os
import socket
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Protocol

from ..alarms import AckRefused, AlarmEngine, AlarmView, UnknownAlarm
from ..config import Config
from ..hub import Hub, Subscriber
from ..spectra import spectrum_values
from ..speedwrite import SpeedRefused, write_speed
from ..store import StoreError
from ..types import SpectralFrame
from .layout import WAITING, ChannelLayout, channel_code, namespace_uri, plan, value_code
from .link import Sender, read_message
from .pack import ALARM_VARS, code_index, pack_frames

__all__ = ["OpcuaHost", "OpcuaPublisher", "PublisherStats"]

log = logging.getLogger("quaver.opcua")
MAX_INFLIGHT = 2  # batches handed over and not yet written by the worker (our choice)
TICK_S = 0.25  # channel states compared with what was published this often (our choice)
SPECTRUM_EVERY_S = 0.5  # a profile's spectrum at most this often (the newest one; our choice)
START_WAIT_S = 60.0  # the longest wait for a worker to listen (asyncua's set-up; our choice)
STOP_WAIT_S = 5.0  # then the worker is killed (our choice)
REST_MIN_S, REST_MAX_S = 0.005, 0.25  # rests gathered (timer overhead), capped (our choice)
RESTART_MIN_S, RESTART_MAX_S = 1.0, 30.0  # pause before restarting a worker, doubling
# a refused SetSpeed as an OPC UA status code (names from IEC 62541-4, docs/references.md)
SPEED_CODES = {"unknown-channel": "BadNotFound", "not-writable": "BadNotWritable",
               "bad-value": "BadOutOfRange"}
REPO = Path(__file__).resolve().parents[2]  # holds the service and dsp packages


class FrameLog(Subscriber):
    """A hub subscriber that keeps every frame in order, not only the newest of each
    channel: a block of the source may finish two frames of a channel in one push, and the
    hub's usual subscriber kept only the second (a quarter of the frames at 12.5 frames/s
    from 0.1 s blocks). Beyond ``limit`` frames waiting (the worker lags) it keeps the
    newest of each channel and profile; ``missed`` counts the rest."""

    def __init__(self, limit: int) -> None:
        super().__init__(None, max_events=4096, profiles=frozenset({"*"}))
        self.log: list[SpectralFrame] = []
        self.limit = max(1, limit)

    def offer(self, frame: SpectralFrame) -> None:
        self.log.append(frame)
        if len(self.log) > self.limit:
            newest = {(f.channel, f.profile): f for f in self.log}
            self.missed += len(self.log) - len(newest)
            self.log = list(newest.values())
        self._wake.set()

    def pending(self) -> int:
        return len(self.log) + len(self.events)

    def take(self) -> list[SpectralFrame]:
        out, self.log = self.log, []
        return out


class OpcuaHost(Protocol):
    """The running service as the publisher sees it (``service.app.Service``)."""

    @property
    def hub(self) -> Hub: ...

    @property
    def alarms(self) -> AlarmEngine: ...

    @property
    def cfg(self) -> Config: ...

    async def acknowledge(self, rule: str, who: str, note: str) -> dict[str, Any]: ...


@dataclass
class PublisherStats:
    """Counters since start (over every worker), for /health and /metrics."""

    frames: int = 0  # frames written into the address space
    updates: int = 0  # node values written (each value of each frame, states, alarms)
    dropped: int = 0  # frames replaced by a newer one before they were handed over
    events: int = 0  # OPC UA events fired
    errors: int = 0  # writes or passes that failed
    last_error: str = ""
    handed: int = 0  # frames handed to the worker
    restarts: int = 0  # workers started again after one died
    worker_cpu_s: float = 0.0  # CPU time of the workers (user + system)
    handoff_cpu_s: float = 0.0  # the service loop thread's CPU time packing and handing over
    handoff_rest_s: float = 0.0  # time the hand-off rested to keep to max_loop_share


class OpcuaPublisher:
    """The ``[opcua]`` server of a service: :meth:`start` (starts the worker, which
    listens), :meth:`begin` (the plant's nodes and the publishing), :meth:`stop`,
    :meth:`health`."""

    def __init__(self, host: OpcuaHost) -> None:
        self.host = host
        self.stats = PublisherStats()
        self.state = "stopped"  # stopped | starting | running | failed
        self.pid: int | None = None
        self._proc: asyncio.subprocess.Process | None = None
        self._writer: asyncio.StreamWriter | None = None  # back from the worker: unused
        self._sender: Sender | None = None  # to the worker
        self._reader_task: asyncio.Task[None] | None = None
        self._pump_task: asyncio.Task[None] | None = None
        self._watch_task: asyncio.Task[None] | None = None
        self._sub: FrameLog | None = None
        self._stopping = False
        self._began = False
        self._ready = False  # the worker's address space is built
        self._down = ""  # why the worker is not running (while it is restarted)
        self._kick = asyncio.Event()
        self._base: dict[str, float] = {}  # counters of the workers that ended
        self._child: dict[str, Any] = {}  # the current worker's counters
        self._acks: set[asyncio.Task[None]] = set()
        self._reset_link()

    def _reset_link(self) -> None:
        self._inflight = 0
        self._seq = 0
        self._full = True  # every state and alarm row is due (a new worker)
        self._published: dict[str, str] = {}  # channel → status last handed over
        self._alarm_rows: dict[str, dict[str, Any]] = {}
        self._spec_last: dict[int, float] = {}
        self._spec_due: dict[int, tuple[Any, str]] = {}  # profile → (frame, status) held back
        self._tokens_sent: Any = None

    # -- the worker ---------------------------------------------------------------------
    async def start(self) -> None:
        """Start the worker and wait until it listens; raises (and says why in
        :meth:`health`) when it cannot: asyncua missing, the endpoint's port taken, a
        certificate that cannot be read."""
        self.state = "starting"
        try:
            try:
                found = importlib.util.find_spec("asyncua") is not None
            except (ValueError, ImportError):
                found = False
            if not found:
                raise RuntimeError("[opcua] needs the asyncua package (not installed); "
                                   "install the extra: pip install 'quaver[opcua]'")
            await self._spawn()
        except Exception as e:
            self.state = "failed"
            self.stats.last_error = f"{type(e).__name__}: {e}"[:300]
            raise
        self.state = "running"
        self._watch_task = asyncio.create_task(self._watch(), name="opcua-worker-watch")
        log.info("OPC UA server at %s (namespace %s), worker pid %s",
                 self.host.cfg.opcua.endpoint, namespace_uri(self.host.cfg), self.pid)

    async def _spawn(self) -> None:
        # two socket pairs: to the worker (blocking, from the Sender's thread) and back
        # (the loop's reader)
        out_ours, out_theirs = socket.socketpair()
        in_ours, in_theirs = socket.socketpair()
        env = dict(os.environ)
        env["PYTHONPATH"] = os.pathsep.join(
            [str(REPO), *filter(None, [env.get("PYTHONPATH")])])
        try:
            proc = await asyncio.create_subprocess_exec(
                sys.executable, "-m", "service.opcua.worker",
                "--fd-in", str(out_theirs.fileno()), "--fd-out", str(in_theirs.fileno()),
                pass_fds=(out_theirs.fileno(), in_theirs.fileno()), env=env, cwd=str(REPO),
                stdin=asyncio.subprocess.DEVNULL)
        except Exception:
            out_ours.close()
            in_ours.close()
            raise
        finally:
            out_theirs.close()
            in_theirs.close()
        self._proc, self.pid = proc, proc.pid
        reader, writer = await asyncio.open_connection(sock=in_ours)
        self._reset_link()
        sender = Sender(out_ours)
        cfg = self.host.cfg
        sender.send(("init", {"opcua": cfg.opcua, "tokens": list(cfg.tokens),
                              "data_dir": str(cfg.service.data_dir),
                              "ns_uri": namespace_uri(cfg)}))
        self._tokens_sent = cfg.tokens
        try:
            first = await asyncio.wait_for(read_message(reader), START_WAIT_S)
        except (TimeoutError, asyncio.IncompleteReadError, ConnectionError) as e:
            await self._kill(proc)
            sender.close()
            writer.close()
            raise RuntimeError(f"the OPC UA worker did not start ({type(e).__name__})") from None
        if first[0] != "listening":
            await self._kill(proc)
            sender.close()
            writer.close()
            raise RuntimeError(str(first[1]) if len(first) > 1 else str(first))
        self._sender, self._writer = sender, writer
        self._down = ""
        self._reader_task = asyncio.create_task(self._read(reader), name="opcua-worker-read")
        if self._began:
            self._send_plant()

    async def _kill(self, proc: asyncio.subprocess.Process) -> None:
        if proc.returncode is None:
            proc.kill()
        await proc.wait()

    async def _watch(self) -> None:
        """Restart a worker that died, after a pause that doubles (at most RESTART_MAX_S);
        the analysis goes on meanwhile and /health says failed."""
        pause = RESTART_MIN_S
        while not self._stopping:
            proc = self._proc
            assert proc is not None
            code = await proc.wait()
            if self._stopping:
                return
            self._lost(f"the OPC UA worker (pid {proc.pid}) exited with code {code}")
            while not self._stopping:
                log.error("%s; restarting it in %.0f s", self._down, pause)
                await asyncio.sleep(pause)
                pause = min(pause * 2, RESTART_MAX_S)
                if self._stopping:
                    return
                try:
                    await self._spawn()
                except Exception as e:
                    self._down = f"the OPC UA worker did not start again: {e}"[:300]
                    self.stats.last_error = self._down
                    continue
                self.stats.restarts += 1
                log.warning("OPC UA worker restarted (pid %s)", self.pid)
                break
            # a worker that lives a minute has earned the short pause again
            ok = await self._alive_for(60.0)
            if ok:
                pause = RESTART_MIN_S

    async def _alive_for(self, seconds: float) -> bool:
        proc = self._proc
        assert proc is not None
        try:
            await asyncio.wait_for(asyncio.shield(proc.wait()), seconds)
        except TimeoutError:
            return True
        return False

    def _lost(self, why: str) -> None:
        self._down = why
        self.stats.last_error = why
        self.stats.errors += 1
        self._ready = False
        for k in ("frames", "updates", "events", "errors", "cpu_s"):
            self._base[k] = self._base.get(k, 0) + self._child.get(k, 0)
        self._child = {}
        if self._sender is not None:
            self._sender.close()
            self._sender = None
        if self._writer is not None:
            self._writer.close()
            self._writer = None
        if self._reader_task is not None:
            self._reader_task.cancel()

    async def _read(self, reader: asyncio.StreamReader) -> None:
        while True:
            try:
                msg = await read_message(reader)
            except (asyncio.IncompleteReadError, ConnectionError):
                return  # the worker ended: _watch says so and restarts it
            kind = msg[0]
            if kind == "stats":
                self._child = msg[1]
            elif kind == "done":
                self._inflight = max(0, self._inflight - 1)
                self._kick.set()
            elif kind == "ready":
                self._ready = True
                self._kick.set()
                log.info("OPC UA address space ready in the worker (%s s)", msg[1])
            elif kind == "ack":
                t = asyncio.create_task(self._on_ack(*msg[1:]))
                self._acks.add(t)
                t.add_done_callback(self._acks.discard)
            elif kind == "speed":
                self._on_speed(*msg[1:])

    def _send(self, msg: tuple[Any, ...]) -> None:
        if self._sender is not None:
            self._sender.send(msg)

    # -- the plant and the publishing -----------------------------------------------------
    def begin(self) -> None:
        """Hand the plant's layout to the worker and start publishing (call once the
        sources run; /health says ``starting`` until every node is there)."""
        if self.state != "running" or self._began:
            return
        self._began = True
        self._send_plant()
        self._sub = FrameLog(2 * max(1, len(self._profiles)))
        self.host.hub.subscribers.add(self._sub)
        self._pump_task = asyncio.create_task(self._pump(), name="opcua-publisher")

    def _send_plant(self) -> None:
        cfg, hub = self.host.cfg, self.host.hub
        self.layout: list[ChannelLayout] = plan(cfg, hub.channels)
        names = {m.id: m.name or m.id for m in cfg.machines}
        machine_names = {ch.machine: names.get(hub.channels[ch.id].machine,
                                               hub.channels[ch.id].machine)
                         for ch in self.layout}
        self._profiles = {(p.channel, p.profile): k for k, p in
                          enumerate(p for ch in self.layout for p in ch.profiles)}
        self._shape = [(len(p.bands), len(p.tones)) for ch in self.layout for p in ch.profiles]
        self._chan_index = {ch.id: k for k, ch in enumerate(self.layout)}
        self._send(("plant", self.layout, machine_names))

    async def _pump(self) -> None:
        """Hand each push over as one batch; states, alarm rows and events in between."""
        assert self._sub is not None
        sub = self._sub
        last_tick = last_alarms = 0.0
        rest = 0.0  # s owed to the rest of the loop (max_loop_share)
        while True:
            if rest >= REST_MIN_S:
                self.stats.handoff_rest_s += min(rest, REST_MAX_S)
                await asyncio.sleep(min(rest, REST_MAX_S))
                rest = 0.0
            try:
                self._kick.clear()
                if self._ready and self._inflight < MAX_INFLIGHT:
                    if not sub.pending():
                        sub._wake.clear()  # noqa: SLF001 (the hub's wake-up of this subscriber)
                        await _wait(sub._wake, TICK_S)  # noqa: SLF001
                else:
                    await _wait(self._kick, TICK_S)
                if not self._ready:
                    continue  # the hub keeps the newest frame of each channel meanwhile
                t0 = time.thread_time()
                now = time.monotonic()
                if self._full:
                    self._full = False
                    self._send_states(range(len(self.layout)), everyone=True)
                    self._send_alarms(self.host.alarms.views())
                    last_tick = last_alarms = now
                while sub.events:
                    ev = sub.events.popleft()
                    if "notice" in ev:  # the rules were reloaded: every row, new rules' nodes
                        self._send_alarms(self.host.alarms.views())
                        continue
                    try:
                        self._send_alarms([self.host.alarms.view(str(ev["rule"]))])
                    except UnknownAlarm:  # a channel-state event ("<channel>.status")
                        pass
                    self._send(("event", ev))
                if sub.log and self._inflight < MAX_INFLIGHT:
                    self._send_frames(sub, now)
                if now - last_tick >= TICK_S:
                    last_tick = now
                    self._send_states(range(len(self.layout)))
                    if self._spec_due and self._inflight < MAX_INFLIGHT:
                        self._send_due_spectra(now)
                    if self.host.cfg.tokens is not self._tokens_sent:
                        self._tokens_sent = self.host.cfg.tokens
                        self._send(("tokens", list(self._tokens_sent)))
                if now - last_alarms >= self.host.cfg.opcua.alarm_refresh_s:
                    last_alarms = now
                    self._send_alarms(self.host.alarms.views())
                self.stats.dropped = sub.missed
                # the hand-off keeps to max_loop_share of the loop thread's time; beyond
                # it the hub keeps the newest frame of each channel (counted as dropped)
                spent = time.thread_time() - t0
                self.stats.handoff_cpu_s += spent
                rest += spent * (1.0 / self.host.cfg.opcua.max_loop_share - 1.0)
            except asyncio.CancelledError:
                raise
            except Exception as e:  # one bad pass must not stop the publisher
                self.stats.errors += 1
                self.stats.last_error = f"{type(e).__name__}: {e}"[:300]
                log.exception("OPC UA publisher")
                await asyncio.sleep(TICK_S)

    def _send_frames(self, sub: FrameLog, now: float) -> None:
        chans = self.host.hub.channels
        spectra = self.host.cfg.opcua.spectra
        picked, index, statuses, changed = [], [], [], set()
        for f in sub.take():
            k = self._profiles.get((f.channel, f.profile))
            if k is None or (len(f.bands), len(f.tones)) != self._shape[k]:
                continue  # not in the address space (a reload changed the set-up)
            st = chans[f.channel]
            if st.status != self._published.get(f.channel):
                changed.add(self._chan_index[f.channel])
            picked.append(f)
            index.append(k)
            statuses.append(st.status)
        if changed:
            self._send_states(sorted(changed))
        if not picked:
            return
        self._seq += 1
        batch = pack_frames(self._seq, picked, index, statuses)
        if spectra:
            for f, k, status in zip(picked, index, statuses, strict=True):
                if now - self._spec_last.get(k, -math.inf) >= SPECTRUM_EVERY_S:
                    self._spec_last[k] = now
                    self._spec_due.pop(k, None)
                    batch.spectra.append(_spectrum(k, f, status))
                else:
                    self._spec_due[k] = (f, status)
        self._send(("frames", batch))
        self._inflight += 1
        self.stats.handed += len(picked)

    def _send_due_spectra(self, now: float) -> None:
        due = [k for k in self._spec_due if now - self._spec_last.get(k, -math.inf)
               >= SPECTRUM_EVERY_S]
        if not due:
            return
        self._seq += 1
        batch = pack_frames(self._seq, [], [], [])
        for k in due:
            f, status = self._spec_due.pop(k)
            self._spec_last[k] = now
            batch.spectra.append(_spectrum(k, f, status))
        self._send(("frames", batch))
        self._inflight += 1

    def _send_states(self, which: Any, everyone: bool = False) -> None:
        """The state of the channels (indices ``which``) whose status changed since it was
        handed over (all of them with ``everyone``)."""
        chans, hub = self.host.hub.channels, self.host.hub
        rows = []
        now_ns = time.time_ns()
        for i in which:
            ch = self.layout[i]
            st = chans[ch.id]
            before = self._published.get(ch.id)
            if not everyone and st.status == before:
                continue
            self._published[ch.id] = st.status
            code = channel_code(st.status) if st.last_frame_mono is not None or before \
                else WAITING
            if st.status == "no-signal" and not any(
                    hub.frame(ch.id, p.profile) is not None for p in ch.profiles):
                code = WAITING  # nothing analysed yet since the start
            rows.append((i, st.status, st.fault, code, st.status_since_ns or now_ns))
        if rows:
            self._send(("states", rows))

    def _send_alarms(self, views: list[AlarmView]) -> None:
        rows = []
        for v in views:
            row = {"state": v.state.value, "value": v.value, "alert": v.alert,
                   "danger": v.danger, "acknowledged": v.acked, "latched": v.latched,
                   "shelved": v.shelved, "channel": v.channel, "unit": v.unit}
            old = self._alarm_rows.get(v.rule, {})
            changes: list[tuple[str, Any, str]] = []
            for name, _ in ALARM_VARS:
                x = row[name]
                if old.get(name, ()) == x:
                    continue
                if x is None or (isinstance(x, float) and not math.isfinite(x)):
                    # no value yet, learning a baseline, or suspended while not live
                    changes.append((name, None, WAITING if v.value_ns is None
                                    else "BadNoCommunication" if v.suspended
                                    else "BadWaitingForInitialData"))
                else:
                    changes.append((name, x, "Good"))
            self._alarm_rows[v.rule] = row
            if changes:
                rows.append((v.rule, f"{v.channel}: {v.kind} {v.name}".strip(), changes,
                             v.value_ns or 0))
        if rows:
            self._send(("alarms", rows))

    async def _on_ack(self, n: int, rule: str, who: str, note: str) -> None:
        """An Acknowledge from the worker: the service commits it, then we answer (after
        the rule's new row, so a client reading after the answer sees it)."""
        try:
            out = await self.host.acknowledge(rule, who, note)
            reply = ("ok", str(out.get("to_state", "")))
        except UnknownAlarm:
            reply = ("refused", "BadNotFound")
        except AckRefused:
            reply = ("refused", "BadInvalidState")
        except StoreError:
            reply = ("refused", "BadResourceUnavailable")  # nothing acknowledged: retry later
        except Exception as e:
            log.exception("OPC UA Acknowledge of %s", rule)
            reply = ("refused", "BadInternalError")
            self.stats.last_error = f"{type(e).__name__}: {e}"[:300]
        if reply[0] == "ok":
            try:
                self._send_alarms([self.host.alarms.view(rule)])
            except UnknownAlarm:
                pass
        self._send(("ack_reply", n, *reply))

    def _on_speed(self, n: int, channel: str, rpm: float, who: str) -> None:
        """A SetSpeed from the worker (an operator's session): written like an MQTT speed,
        to channels configured speed = 'manual' only."""
        try:
            write_speed(self.host.cfg, self.host.hub.channels, channel, rpm, f"opcua:{who}",
                        manual_only=True)
            reply = ("ok", "")
            log.info("OPC UA: speed of %s written by %s: %g r/min", channel, who, rpm)
        except SpeedRefused as e:
            reply = ("refused", SPEED_CODES[e.why])
            log.warning("OPC UA: speed for %s from %s refused: %s", channel, who, e)
        self._send(("speed_reply", n, *reply))

    async def stop(self) -> None:
        self._stopping = True
        if self._sub is not None:
            self.host.hub.unsubscribe(self._sub)
        for t in (self._pump_task, self._watch_task, *self._acks):
            if t is not None:
                t.cancel()
        await asyncio.gather(*(t for t in (self._pump_task, self._watch_task) if t),
                             return_exceptions=True)
        proc = self._proc
        if proc is not None and proc.returncode is None:
            self._send(("stop",))
            try:
                await asyncio.wait_for(proc.wait(), STOP_WAIT_S)
            except TimeoutError:
                log.warning("OPC UA worker did not stop within %g s; killed", STOP_WAIT_S)
                await self._kill(proc)
        if self._sender is not None:
            self._sender.close()
        if self._writer is not None:
            self._writer.close()
        if self._reader_task is not None:
            self._reader_task.cancel()
        self.state = "stopped"

    def health(self) -> dict[str, Any]:
        """``state``: starting (the worker listens; the plant's nodes are being added),
        running, failed (``last_error`` says why; a dead worker is being restarted) or
        stopped; ``ok`` unless failed."""
        o = self.host.cfg.opcua
        s = self.stats
        state = self.state
        if state == "running":
            if self._down:
                state = "failed"
            elif not self._ready:
                state = "starting"
        c, b = self._child, self._base
        s.frames = int(b.get("frames", 0) + c.get("frames", 0))
        s.updates = int(b.get("updates", 0) + c.get("updates", 0))
        s.events = int(b.get("events", 0) + c.get("events", 0))
        s.worker_cpu_s = round(b.get("cpu_s", 0.0) + c.get("cpu_s", 0.0), 3)
        errors = s.errors + int(b.get("errors", 0) + c.get("errors", 0))
        return {
            "ok": state in ("starting", "running"),
            "state": state,
            "endpoint": o.endpoint,
            "namespace": f"urn:quaver:{o.site}",
            "security": o.security_policy if o.security_policy == "None"
            else f"{o.security_policy} {o.security_mode}",
            "sessions": int(c.get("sessions", 0)) if not self._down else 0,
            "frames": s.frames,
            "handed": s.handed,
            "updates": s.updates,
            "dropped": s.dropped,
            "events": s.events,
            "errors": errors,
            "last_error": self._down or c.get("last_error") or s.last_error,
            "worker_pid": self.pid,
            "worker_cpu_s": s.worker_cpu_s,
            "restarts": s.restarts,
            "handoff_cpu_s": round(s.handoff_cpu_s, 3),
            "handoff_rest_s": round(s.handoff_rest_s, 3),
        }


async def _wait(event: asyncio.Event, timeout: float) -> None:
    try:
        await asyncio.wait_for(event.wait(), timeout)
    except TimeoutError:
        pass


def _spectrum(k: int, f: Any, status: str) -> tuple[int, int, int, Any, tuple[Any, ...]]:
    values, unit, amp = spectrum_values(f)
    return (k, f.t_ns, code_index(value_code(status, f.quality, 0.0)), values,
            (f.df_hz, f.f0_hz, unit, amp))

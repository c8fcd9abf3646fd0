"""WebSocket /api/v1/stream: live spectra (binary), bands, tones, alarms and status (JSON).

Reads the hub through a bounded subscriber queue; a slow client only ever delays itself.

Protocol
--------
The client sends a text message ``{"subscribe": {"channels": [...] | "*", "kinds": [...],
"profiles": [...] | "*", "max_rate_hz": 10, "unit": "mm/s", "amplitude": "rms",
"every_alarm": false}}`` (it may send another at any time to change its subscription).
``kinds`` ⊆ spectrum, bands, tones, alarms, status, overall (default: all but overall).
Without ``profiles`` a client gets each channel's primary profile; with a list, those
profiles of every subscribed channel that runs them; ``"*"``: every profile. The rate
limit holds per channel and profile. Alarm events come for the subscribed channels only,
unless ``every_alarm`` is true (then for every channel).

The server sends:

* binary spectrum messages: bytes 0–3 a little-endian u32 header length L, then L bytes of
  UTF-8 JSON ``{"kind": "spectrum", "channel", "profile", "seq", "timestamp_ns", "f0_hz",
  "df_hz", "x_unit", "unit", "amplitude", "averages", "count", "missed"}`` (``x_unit``: "Hz",
  or "order" for an order profile, whose f0_hz and df_hz are then orders), then ``count``
  little-endian float32 values (the header is padded with spaces so the values start
  4-byte aligned);
* text JSON messages ``{"kind": "hello" | "bands" | "tones" | "alarm" | "rules" | "status" |
  "overall" | "error",
  ...}`` whose fields match the REST resources; an ``alarm`` message is a committed event
  (as in ``/events``, ``id`` never null) whose own kind (transition, ack, sensor-fault) is
  in ``event_kind``; a ``rules`` message ``{"kind": "rules", "notice": "rules", "added",
  "changed", "removed"}`` (rule ids) says the alarm rules were reloaded (levels may have
  changed: ``GET /api/v1/alarms?all=true`` has them) and goes to every client that gets
  alarms, whatever its channels; an ``overall`` message (kind ``overall``, about once a
  second, whatever the client's channels) ``{"kind": "overall", "channels": [{"id", "status",
  "fault", "since_ns", "seq", "timestamp_ns", "quality", "unit", "overall", "overall_lo_hz",
  "overall_hi_hz"}]}`` gives every channel's status (as ``status`` does) and newest overall
  (primary profile; from ``seq`` on absent before its first frame).

A client message must be at most ``MAX_MESSAGE_BYTES`` (else close 1009) and JSON nested at
most ``MAX_DEPTH`` deep (checked before parsing); a message that is not a valid
subscription gets an ``error`` message with the reason and the session goes on with its
previous subscription; after ``MAX_ERRORS`` such messages the server closes with 1008.

Close codes the server sends: 1008 (policy: host, origin or token refused at the handshake;
``token withdrawn`` or ``token role lowered`` when /admin/reload removed or demoted the
session's token; too many bad messages), 1009 (message too big), 1011 (server error).

Until its first ``subscribe`` a client gets alarm events and status only. Each frame's
spectrum (per unit and amplitude) and its bands/tones texts are encoded once and shared by
every client that gets them; messages are not compressed (float32 spectra barely shrink and
compressing them per client cost more than the rest of the stream).

``missed`` counts the frames this client skipped: a newer frame of the same channel and
profile replaced them while they waited in its queue or were held back by its rate limit.
A held frame goes out as soon as its interval is up, before anything newer of its channel
and profile; every frame published after the subscription is either sent or counted. Each
client's queue keeps the newest frame per channel and profile, so it is bounded; the engine
and the other clients never wait for it.
"""

from __future__ import annotations

import asyncio
import collections
import heapq
import json
import logging
import struct
import time
from typing import Any

from fastapi import APIRouter, WebSocket, WebSocketDisconnect
from pydantic import BaseModel, Field, ValidationError, field_validator
from starlette.datastructures import State

from dsp.types import AMPLITUDES, OUTPUT_UNITS, QUANTITIES

from .. import __version__
from ..auth import ROLES, Principal, authenticate
from ..config import Config
from ..hub import Hub
from ..spectra import spectrum_values
from ..types import SpectralFrame
from .channels import _num, bands_payload, tones_payload
from .deps import get_hub
from .security import WS_PROTOCOL, ws_offered

router = APIRouter()
log = logging.getLogger("quaver.stream")
# What a send or receive raises when the client has gone (uvicorn's ClientDisconnected is
# an OSError; starlette raises RuntimeError after a close).
_CLIENT_GONE = (WebSocketDisconnect, RuntimeError, OSError)

KINDS = ("spectrum", "bands", "tones", "alarms", "status", "overall")  # what a client subscribes to
MAX_MESSAGE_BYTES = 4096  # a subscription is small; anything bigger is refused
MAX_DEPTH = 8  # {"subscribe": {"channels": [...]}} is 3 deep
MAX_ERRORS = 20  # bad messages tolerated per session before it is closed
STATUS_PERIOD_S = 1.0
UNIT_CHOICES = (*OUTPUT_UNITS, *QUANTITIES)


class Subscription(BaseModel):
    channels: list[str] | str = Field("*", description="channel ids, or '*' for all")
    profiles: list[str] | str | None = Field(
        None, description="profile names, or '*' for all; default: each channel's primary"
    )
    # the default stays the kinds there were before `overall` (a client that names none
    # gets what it always got)
    kinds: list[str] = Field(default_factory=lambda: [k for k in KINDS if k != "overall"])
    every_alarm: bool = Field(
        False, description="alarm events of every channel, whatever `channels` (a plant "
        "view that takes the bands of the channels on screen only)")
    max_rate_hz: float = Field(10.0, gt=0, le=100, description="per channel, messages/s")
    unit: str | None = None
    amplitude: str | None = None

    @field_validator("channels")
    @classmethod
    def _channels(cls, v: list[str] | str) -> list[str] | str:
        if isinstance(v, str) and v != "*":
            raise ValueError("channels must be a list of ids or '*'")
        return v

    @field_validator("profiles")
    @classmethod
    def _profiles(cls, v: list[str] | str | None) -> list[str] | str | None:
        if isinstance(v, str) and v != "*":
            raise ValueError("profiles must be a list of names or '*'")
        return v

    @field_validator("unit")
    @classmethod
    def _unit(cls, v: str | None) -> str | None:
        if v is not None and v not in UNIT_CHOICES:
            raise ValueError(f"unit {v!r} is not one of {', '.join(UNIT_CHOICES)}")
        return v

    @field_validator("amplitude")
    @classmethod
    def _amplitude(cls, v: str | None) -> str | None:
        if v is not None and v not in AMPLITUDES:
            raise ValueError(f"amplitude {v!r} is not one of {', '.join(AMPLITUDES)}")
        return v

    @field_validator("kinds")
    @classmethod
    def _kinds(cls, v: list[str]) -> list[str]:
        bad = [k for k in v if k not in KINDS]
        if bad:
            raise ValueError(f"unknown kinds {bad}; allowed: {', '.join(KINDS)}")
        return v


class _Encoded:
    """Per-frame work shared by every client that gets the frame in the same view: the
    spectrum's values as little-endian float32 bytes, and the bands/tones JSON texts (a
    spectrum costs a conversion and a copy; fifty clients pay for it once)."""

    SIZE = 1024  # frames kept (several per channel and profile; a small LRU)

    def __init__(self) -> None:
        self._values: collections.OrderedDict[tuple[object, ...], tuple[bytes, int, str, str]]
        self._values = collections.OrderedDict()
        self._texts: collections.OrderedDict[tuple[object, ...], str] = collections.OrderedDict()

    @staticmethod
    def _key(frame: SpectralFrame, *extra: object) -> tuple[object, ...]:
        # unique within one service: a channel belongs to one source, whose pipeline numbers
        # its frames (one cache per app, so two services in a process never meet)
        return (frame.channel, frame.profile, frame.seq, *extra)

    def values(
        self, frame: SpectralFrame, unit: str | None, amplitude: str | None
    ) -> tuple[bytes, int, str, str]:
        key = self._key(frame, unit, amplitude)
        got = self._values.get(key)
        if got is None:
            values, u, a = spectrum_values(frame, unit, amplitude)
            got = (values.astype("<f4").tobytes(), int(values.size), u, a)
            self._values[key] = got
            if len(self._values) > self.SIZE:
                self._values.popitem(last=False)
        return got

    def text(self, frame: SpectralFrame, kind: str) -> str:
        key = self._key(frame, kind)
        got = self._texts.get(key)
        if got is None:
            payload = bands_payload(frame) if kind == "bands" else tones_payload(frame)
            got = json.dumps({"kind": kind, **payload}, separators=(",", ":"))
            self._texts[key] = got
            if len(self._texts) > self.SIZE:
                self._texts.popitem(last=False)
        return got

    def spectrum(
        self, frame: SpectralFrame, unit: str | None, amplitude: str | None, missed: int
    ) -> bytes:
        """The binary spectrum message (module docstring) with this client's ``missed``.

        The header's JSON up to ``"missed":`` is made once per frame and view (it was one
        json.dumps per client and message); only the count and the padding are per client."""
        key = self._key(frame, unit, amplitude, "head")
        head = self._texts.get(key)
        data, count, u, a = self.values(frame, unit, amplitude)
        if head is None:
            head = _spectrum_header(frame, u, a, count)
            self._texts[key] = head
            if len(self._texts) > self.SIZE:
                self._texts.popitem(last=False)
        header = f"{head}{int(missed)}}}".encode()
        header += b" " * (-(4 + len(header)) % 4)
        return b"".join((struct.pack("<I", len(header)), header, data))


def _spectrum_header(frame: SpectralFrame, u: str, a: str, count: int) -> str:
    """The spectrum message's JSON header without its last member's value and the closing
    brace: ``{"kind":"spectrum",…,"count":N,"missed":`` (``missed`` is per client)."""
    text = json.dumps(
        {
            "kind": "spectrum",
            "channel": frame.channel,
            "profile": frame.profile,
            "seq": frame.seq,
            "timestamp_ns": frame.t_ns,
            "f0_hz": frame.f0_hz,
            "df_hz": frame.df_hz,
            "x_unit": frame.x_unit,
            "unit": u,
            "amplitude": a,
            "averages": frame.averages,
            "count": count,
            "missed": 0,
        },
        separators=(",", ":"),
    )
    assert text.endswith(',"missed":0}')
    return text[: -len("0}")]


def overall_message(hub: Hub) -> dict[str, Any]:
    """The ``overall`` message: every channel's newest overall of its primary profile with its
    frame's seq, time, unit, band and data quality (absent before its first frame), and the
    channel's status now (with its fault and since when) — a plant's values in one message a
    second, whatever the client's channels (a plant view subscribes to the bands of the
    channels it shows only)."""
    out = []
    for cid, st in hub.channels.items():
        f = hub.latest.get(cid)
        item: dict[str, Any] = {"id": cid, "status": st.status, "fault": st.fault,
                                "since_ns": st.status_since_ns}
        if f is not None:
            item.update(seq=f.seq, timestamp_ns=f.t_ns, quality=f.quality, unit=f.unit,
                        overall=_num(f.overall), overall_lo_hz=_num(f.overall_lo_hz),
                        overall_hi_hz=_num(f.overall_hi_hz))
        out.append(item)
    return {"kind": "overall", "channels": out}


def json_depth_over(text: str, limit: int) -> bool:
    """True when the brackets in ``text`` nest deeper than ``limit`` (strings skipped), so
    json.loads never sees a message deep enough to exhaust the recursion limit."""
    depth = 0
    in_str = esc = False
    for ch in text:
        if in_str:
            if esc:
                esc = False
            elif ch == "\\":
                esc = True
            elif ch == '"':
                in_str = False
        elif ch == '"':
            in_str = True
        elif ch in "[{":
            depth += 1
            if depth > limit:
                return True
        elif ch in "]}":
            depth -= 1
    return False


class _Session:
    def __init__(
        self, ws: WebSocket, hub: Hub, encoded: _Encoded,
        who: Principal | None = None, token: str | None = None,
    ) -> None:
        self.ws, self.hub, self.encoded = ws, hub, encoded
        self.who, self.token = who, token
        # set by :func:`revoke_sessions`: (code, reason) the session is closed with
        self.ended: tuple[int, str] | None = None
        self.tasks: set[asyncio.Task[None]] = set()
        self.errors = 0
        # Until the client subscribes it gets alarm events and status only, never a firehose
        # of every channel's spectra.
        self.spec = Subscription.model_validate({"kinds": ["alarms", "status"]})
        self.sub = hub.subscribe(None)
        self.sub.kinds = frozenset(self.spec.kinds)
        self.last_sent: dict[tuple[str, str], float] = {}
        # newest frame per (channel, profile) held back by the rate limit; a held frame that a
        # newer one replaces is counted in ``self.sub.missed`` (so /metrics sees it too)
        self.held: dict[tuple[str, str], SpectralFrame] = {}
        # (due, key) of the held frames, soonest first: finding the frames that are due costs
        # the due ones, not a pass over every held channel per message (at a thousand
        # channels and a slow rate nearly every channel has one held). Entries whose frame
        # went out another way are skipped when they come up.
        self.due_heap: list[tuple[float, tuple[str, str]]] = []

    def end(self, code: int, reason: str) -> None:
        """Stop the session's loops; the handler then closes with ``code`` and ``reason``."""
        self.ended = (code, reason)
        for t in self.tasks:
            t.cancel()

    def apply(self, spec: Subscription) -> None:
        self.spec = spec
        chans = None if spec.channels == "*" else frozenset(spec.channels)
        unknown = sorted(set(chans or ()) - set(self.hub.channels))
        if unknown:
            raise ValueError(f"unknown channels {unknown}")
        profs = None if spec.profiles is None else frozenset(
            ["*"] if spec.profiles == "*" else spec.profiles
        )
        if profs is not None and "*" not in profs:
            known = {p for st in self.hub.channels.values() for p in st.profiles}
            bad = sorted(profs - known)
            if bad:
                raise ValueError(f"unknown profiles {bad}; known: {sorted(known)}")
        self.sub.channels = chans
        self.sub.every_alarm = spec.every_alarm
        self.sub.profiles = profs
        self.sub.kinds = frozenset(spec.kinds)
        # the rate may have changed: the held frames' due times with it
        self.due_heap = [(self._due(k), k) for k in self.held]
        heapq.heapify(self.due_heap)

    async def receive_loop(self) -> None:
        while True:
            msg = await self.ws.receive()
            if msg["type"] == "websocket.disconnect":
                raise WebSocketDisconnect(msg.get("code", 1000))
            text = msg.get("text")
            data = msg.get("bytes")
            size = len(text.encode()) if text is not None else len(data or b"")
            if size > MAX_MESSAGE_BYTES:
                self.end(1009, f"message over {MAX_MESSAGE_BYTES} bytes")
                return
            try:
                if text is None:
                    text = (data or b"").decode()
                if json_depth_over(text, MAX_DEPTH):
                    raise ValueError(f"message nested deeper than {MAX_DEPTH}")
                body = json.loads(text)
                if not isinstance(body, dict) or "subscribe" not in body:
                    raise ValueError('expected {"subscribe": {...}}')
                self.apply(Subscription.model_validate(body["subscribe"]))
            except ValidationError as e:
                reason = "; ".join(
                    f"{'.'.join(str(p) for p in err['loc']) or 'subscribe'}: {err['msg']}"
                    for err in e.errors()
                )
                await self._refuse(reason)
            except ValueError as e:  # json.JSONDecodeError and UnicodeDecodeError too
                await self._refuse(str(e))
            if self.ended is not None:
                return

    async def _refuse(self, reason: str) -> None:
        """Answer a bad message with an error; too many of them end the session."""
        self.errors += 1
        await self.send_json({"kind": "error", "reason": reason[:500]})
        if self.errors >= MAX_ERRORS:
            self.end(1008, f"{MAX_ERRORS} bad messages")

    async def send_json(self, obj: dict[str, Any]) -> None:
        await self.ws.send_text(json.dumps(obj, separators=(",", ":")))

    async def send_loop(self) -> None:
        next_status = 0.0
        while True:
            now = time.monotonic()
            if now >= next_status and ("status" in self.spec.kinds
                                       or "overall" in self.spec.kinds):
                if "status" in self.spec.kinds:
                    await self.send_json(
                        {
                            "kind": "status",
                            "channels": [
                                {"id": st.id, "status": st.status, "fault": st.fault,
                                 "since_ns": st.status_since_ns}
                                for st in self.hub.channels.values()
                            ],
                        }
                    )
                if "overall" in self.spec.kinds:
                    await self.send_json(overall_message(self.hub))
                next_status = now + STATUS_PERIOD_S
            timeout = STATUS_PERIOD_S
            if self.due_heap:
                timeout = min(timeout, max(0.0, self.due_heap[0][0] - now))
            try:
                item = await self.sub.queue.get(timeout=timeout)
            except TimeoutError:
                item = None
            # Held frames whose interval is up go out first, whether or not the wait timed
            # out: while the queue never runs dry (a burst after a stall) no time-out comes.
            await self._send_due()
            if item is None:
                continue
            if isinstance(item, SpectralFrame):
                await self._send_frame(item)
            elif "notice" in item:  # a change of the whole service (Hub.publish_notice)
                if "alarms" in self.spec.kinds:
                    await self.send_json({**item, "kind": item["notice"]})
            else:  # an alarm event (dict) published by the service
                if "alarms" in self.spec.kinds:
                    # the documented kind; the event's own (transition, ack, …) goes aside
                    msg = {**item, "kind": "alarm", "event_kind": item.get("kind")}
                    await self.send_json(msg)

    def _due(self, key: tuple[str, str]) -> float:
        """When the next frame of (channel, profile) may go out under the rate limit
        (monotonic s)."""
        return self.last_sent.get(key, -1e9) + 0.999 / self.spec.max_rate_hz

    async def _send_due(self) -> None:
        """Send every held frame whose rate-limit interval is up."""
        now = time.monotonic()
        heap = self.due_heap
        while heap and heap[0][0] <= now:
            _, key = heapq.heappop(heap)
            if key not in self.held:
                continue  # sent already
            due = self._due(key)
            if due > now:  # sent and held again since this entry was made
                heapq.heappush(heap, (due, key))
                continue
            await self._send(self.held.pop(key))

    async def _send_frame(self, frame: SpectralFrame) -> None:
        """Send ``frame`` now, or hold it as the newest of its channel and profile until the
        rate limit lets it go. Every frame this client does not get is counted in ``missed``."""
        key = (frame.channel, frame.profile)
        older = self.held.pop(key, None)
        if older is not None:
            if time.monotonic() < self._due(key):
                # still too soon: the newer frame takes the older one's place, which is skipped
                self.sub.missed += 1
                self.held[key] = frame  # its (due, key) entry stands
                return
            # The older one's interval is up (it came due while the loop was busy): it goes
            # first and ``frame`` waits its own turn below (sending ``frame`` alone would skip
            # ``older`` although this client keeps up with the rate limit).
            await self._send(older)
        due = self._due(key)
        if time.monotonic() < due:
            self.held[key] = frame
            heapq.heappush(self.due_heap, (due, key))
            return
        await self._send(frame)

    async def _send(self, frame: SpectralFrame) -> None:
        """Send ``frame``'s messages (the subscribed kinds) and start its rate-limit interval."""
        self.last_sent[(frame.channel, frame.profile)] = time.monotonic()
        kinds = self.spec.kinds
        if "spectrum" in kinds:
            await self.ws.send_bytes(
                self.encoded.spectrum(frame, self.spec.unit, self.spec.amplitude, self.sub.missed)
            )
        if "bands" in kinds:
            await self.ws.send_text(self.encoded.text(frame, "bands"))
        if "tones" in kinds:
            await self.ws.send_text(self.encoded.text(frame, "tones"))


@router.websocket("/stream")
async def stream(ws: WebSocket) -> None:
    # The access gate (security.AccessGate) has checked Host, Origin and token already.
    hub = get_hub(ws)
    offered = ws_offered(ws.headers)
    await ws.accept(subprotocol=WS_PROTOCOL if WS_PROTOCOL in offered else None)
    encoded: _Encoded = ws.app.state.stream_encoded  # one per app, shared by all its clients
    state = ws.scope.get("state", {})
    session = _Session(ws, hub, encoded, state.get("principal"), state.get("token"))
    sessions = _sessions(ws.app.state)
    sessions.add(session)
    try:
        await session.send_json(
            {
                "kind": "hello",
                "version": __version__,
                "channels": list(hub.channels),
                "profiles": {cid: list(st.profiles) for cid, st in hub.channels.items()},
                "kinds": list(KINDS),
            }
        )
        recv = asyncio.create_task(session.receive_loop())
        send = asyncio.create_task(session.send_loop())
        session.tasks = {recv, send}
        if session.ended is not None:  # revoked before the tasks existed
            session.end(*session.ended)
        _, pending = await asyncio.wait({recv, send}, return_when=asyncio.FIRST_COMPLETED)
        for t in pending:
            t.cancel()
        # Collect both outcomes (so no task exception goes unretrieved); a client that went
        # away mid-send is an ordinary end of the session, anything else is logged.
        for outcome in await asyncio.gather(recv, send, return_exceptions=True):
            if isinstance(outcome, asyncio.CancelledError) or not isinstance(
                outcome, BaseException
            ):
                continue
            if isinstance(outcome, _CLIENT_GONE):
                log.debug("stream client left: %r", outcome)
            else:
                log.warning("stream session ended by %r", outcome)
        if session.ended is not None:
            await ws.close(code=session.ended[0], reason=session.ended[1])
    except _CLIENT_GONE:
        pass
    finally:
        sessions.discard(session)
        hub.unsubscribe(session.sub)


def init_state(state: State) -> None:
    """The app's stream state: its live sessions and the encoded-message cache they share."""
    state.stream_sessions = set()
    state.stream_encoded = _Encoded()


def _sessions(state: State) -> set[_Session]:
    sessions: set[_Session] = state.stream_sessions
    return sessions


def revoke_sessions(state: State, cfg: Config) -> int:
    """After a token change: end every session whose token no longer admits it (close 1008
    "token withdrawn") or now has a lower role (1008 "token role lowered"). Returns how many.

    A session opened without a token (loopback, no tokens then) ends too once tokens exist."""
    ended = 0
    for s in list(_sessions(state)):
        if s.ended is not None or not cfg.tokens:
            continue
        now = authenticate(s.token, cfg.tokens)
        if now is None or s.who is None or now.name != s.who.name:
            s.end(1008, "token withdrawn")
        elif _rank(now) < _rank(s.who):
            s.end(1008, "token role lowered")
        else:
            continue
        ended += 1
    return ended


def _rank(who: Principal) -> int:
    return ROLES.index(who.role) if who.role in ROLES else -1

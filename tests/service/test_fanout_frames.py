"""Fan-out of frames to one WebSocket session: every frame published after the subscription
is either sent or counted in the client's ``missed``, also under the rate limit in a burst.

Drives the real hub, subscriber queue, encoded cache and stream session on an event loop of
its own, with a fake socket and a fake monotonic clock for the rate limit (no timing is
asserted); knows the spectrum message layout of service/api/stream.py's docstring."""

from __future__ import annotations

import asyncio
import contextlib
import json
import struct
from collections.abc import Awaitable, Callable
from types import SimpleNamespace

import numpy as np
import pytest

import service.api.stream as stream
from bench import newest_frame_ends, skipped_frames
from service.hub import Hub
from service.types import SpectralFrame

RATE_HZ = 50.0  # the load benchmark's fan-out subscription: one frame per 19.98 ms per channel
CHANNELS = [f"feed-00-c{j:02d}" for j in range(8)]  # one client's 8 channels of one source
N, HOP, BLOCK = 8192, 2048, 2560  # the load benchmark's frame, hop and block (samples)


def frame(channel: str, seq: int, end: int) -> SpectralFrame:
    return SpectralFrame(
        channel=channel, profile="default", seq=seq, t_ns=end, fs=25600.0, n=N,
        df_hz=3.125, f0_hz=0.0, lines=100, fmax_hz=312.5, window="hann", enbw_bins=1.5,
        averaging="exponential", averages=8, input_unit="g", unit="g", amplitude="rms",
        lowcut_hz=0.0, power=np.zeros(101, np.float32), overall=0.0, bands=(), tones=(),
        peaks=(), end_index=end, primary=True,
    )


class FakeSocket:
    """Collects what the session sends; every send completes at once."""

    def __init__(self) -> None:
        self.spectra: list[dict[str, object]] = []
        self.texts: list[str] = []

    async def send_bytes(self, data: bytes) -> None:
        # u32 little-endian header length, then the JSON header (stream.py module docstring)
        (length,) = struct.unpack_from("<I", data)
        self.spectra.append(json.loads(data[4 : 4 + length]))

    async def send_text(self, text: str) -> None:
        self.texts.append(text)


class Client:
    """One stream session subscribed to ``CHANNELS`` (spectrum only, ``RATE_HZ``), its send
    loop running as a task; ``clock.t`` is the session's monotonic time in s."""

    def __init__(self, monkeypatch: pytest.MonkeyPatch) -> None:
        self.clock = SimpleNamespace(t=0.0)
        monkeypatch.setattr(stream, "time", SimpleNamespace(monotonic=lambda: self.clock.t))
        self.hub = Hub()
        self.ws = FakeSocket()
        self.session = stream._Session(self.ws, self.hub, stream._Encoded())  # type: ignore[arg-type]
        self.session.apply(stream.Subscription.model_validate(
            {"channels": "*", "kinds": ["spectrum"], "max_rate_hz": RATE_HZ}))
        self.seq = 0
        self.published: dict[str, list[int]] = {c: [] for c in CHANNELS}

    def publish(self, end: int) -> None:
        """One source block's frames, one per channel, all with end index ``end``."""
        frames = []
        for c in CHANNELS:
            self.seq += 1
            frames.append(frame(c, self.seq, end))
            self.published[c].append(end)
        self.hub.publish(frames)

    async def run_loop(self) -> None:
        """Let the send loop take everything it can take now (no clock change)."""
        for _ in range(20):
            await asyncio.sleep(0)

    async def drain(self) -> None:
        """Move the clock on past each rate-limit interval and wait (bounded) until nothing
        is pending or held; the session's time-outs are short real timers."""
        for _ in range(500):
            self.clock.t += 1.0
            await asyncio.sleep(0.01)
            if not self.session.held and not self.session.sub.pending():
                return
        pytest.fail("the session still holds frames after 5 s")

    def received(self, channel: str) -> list[int]:
        return [int(h["timestamp_ns"]) for h in self.ws.spectra if h["channel"] == channel]

    @property
    def missed(self) -> int:
        """``missed`` of the last message (what a client knows)."""
        return int(self.ws.spectra[-1]["missed"]) if self.ws.spectra else 0


def scenario(monkeypatch: pytest.MonkeyPatch,
             steps: Callable[[Client], Awaitable[None]]) -> Client:
    async def main() -> Client:
        client = Client(monkeypatch)
        task = asyncio.create_task(client.session.send_loop())
        try:
            await steps(client)
            await client.drain()
        finally:
            task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await task
        return client

    return asyncio.run(main())


def assert_sent_or_counted(client: Client) -> None:
    """Every published frame reached the client or is in its ``missed`` (stream.py
    docstring); per channel the received frames are published ones, in order, once each."""
    published = sum(len(v) for v in client.published.values())
    assert len(client.ws.spectra) + client.missed == published
    for c in CHANNELS:
        got = client.received(c)
        assert got == sorted(set(got)) and set(got) <= set(client.published[c])


def test_a_frame_held_by_the_rate_limit_is_sent_when_the_loop_comes_late(monkeypatch):
    # What bench --service saw: a stalled source sends two blocks 5 ms apart (the second is
    # held: under 1/50 s), and the session's loop runs again only when the next block's frames
    # are already queued. The held frames must go out first, not be replaced uncounted.
    ends = newest_frame_ends([BLOCK * (b + 1) for b in range(12)], N, HOP)

    async def steps(client: Client) -> None:
        client.publish(ends[0])
        await client.run_loop()
        client.clock.t = 0.005
        client.publish(ends[1])
        await client.run_loop()
        assert len(client.ws.spectra) == len(CHANNELS)  # the second block's frames are held
        client.clock.t = 0.1  # the loop was busy elsewhere for 95 ms: the next block is here
        client.publish(ends[2])
        await client.run_loop()
        client.clock.t = 0.2
        client.publish(ends[3])
        await client.run_loop()

    client = scenario(monkeypatch, steps)
    assert_sent_or_counted(client)
    assert client.missed == 0
    for c in CHANNELS:  # the load benchmark's own check, by end index
        assert client.received(c) == ends[:4]
        assert skipped_frames(client.received(c), ends) == 0


def test_a_held_frame_replaced_before_its_turn_is_counted_as_missed(monkeypatch):
    async def steps(client: Client) -> None:
        client.publish(10_240)
        await client.run_loop()
        client.clock.t = 0.005
        client.publish(12_288)  # held: 5 ms after the last one
        await client.run_loop()
        client.clock.t = 0.010
        client.publish(14_336)  # still within 1/50 s: it replaces the held one
        await client.run_loop()

    client = scenario(monkeypatch, steps)
    assert_sent_or_counted(client)
    assert client.missed == len(CHANNELS)  # one frame skipped per channel
    for c in CHANNELS:
        assert client.received(c) == [10_240, 14_336]


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_bursts_stalls_and_a_slow_loop_never_lose_a_frame_uncounted(monkeypatch, seed):
    rng = np.random.default_rng(seed)
    blocks = 300

    async def steps(client: Client) -> None:
        end = 0
        for _ in range(blocks):
            end += BLOCK
            # mostly real time (one block per 0.1 s), sometimes a burst after a stall
            client.clock.t += float(rng.choice([0.1, 0.0, 0.005, 0.015, 0.03, 0.25]))
            client.publish(end)
            if rng.random() < 0.7:  # otherwise the loop is busy: frames wait in the queue
                await client.run_loop()

    client = scenario(monkeypatch, steps)
    assert_sent_or_counted(client)
    assert 0 < client.missed < blocks * len(CHANNELS)
    for c in CHANNELS:
        assert client.received(c)[-1] == client.published[c][-1]  # the newest always arrives


@pytest.mark.parametrize("missed", [0, 7, 12345678901])
def test_spectrum_message_layout_for_any_missed(missed: int) -> None:
    # The header's JSON is made once per frame and spliced with each client's ``missed``;
    # the message must still be what stream.py's docstring says: u32 little-endian header
    # length, the JSON header padded with spaces so the values start 4-byte aligned, then
    # ``count`` little-endian float32 values.
    enc = stream._Encoded()
    f = frame(CHANNELS[0], 41, 123456)
    first = enc.spectrum(f, "g", "rms", 0)
    msg = enc.spectrum(f, "g", "rms", missed)
    (length,) = struct.unpack_from("<I", msg)
    assert (4 + length) % 4 == 0
    head = json.loads(msg[4 : 4 + length])
    assert head == {"kind": "spectrum", "channel": CHANNELS[0], "profile": "default", "seq": 41,
                    "timestamp_ns": 123456, "f0_hz": 0.0, "df_hz": 3.125, "x_unit": "Hz",
                    "unit": "g",
                    "amplitude": "rms", "averages": 8, "count": 101, "missed": missed}
    values = np.frombuffer(msg[4 + length :], dtype="<f4")
    np.testing.assert_array_equal(values, np.zeros(101, np.float32))
    assert msg[4 + length :] == first[len(first) - 4 * 101 :]

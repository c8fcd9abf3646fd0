"""Faults and bad input against a real quaver service on loopback: producers that drop
mid-frame, race for a source, send faster than real time or with time running backwards;
oversized bodies and WebSocket messages, unknown channels, bad query values.

Talks to the service only through its sockets and its HTTP/WebSocket API; every loop is
bounded in count and every wait in time."""

from __future__ import annotations

import contextlib
import json
import math
import random
import socket
import threading
import time
from collections.abc import Callable, Iterator
from typing import TYPE_CHECKING, Any

import httpx
import numpy as np
import pytest
import scipy.signal
from websockets.exceptions import ConnectionClosed
from websockets.sync.client import ClientConnection, connect

from service.wire import encode_frame

if TYPE_CHECKING:
    from conftest import RunningService  # tests/service/conftest.py: the running-service fixture

LOOPBACK = "127.0.0.1"

# --- the known signal -----------------------------------------------------------------------

FS = 2560.0  # Hz = 2.56 × Fmax 1000 Hz (common practice: fs = 2.56·Fmax)
LINES = 800
N_FRAME = 2048  # 2.56 × 800 lines (common practice: N = 2.56·lines)
HOP = N_FRAME // 4  # 75 % overlap
FRAME_SAMPLES = 256  # samples per framed-format frame (0.1 s)
F1_HZ, F2_HZ = 123.37, 456.78  # off-bin (98.696 and 365.424 lines)
N_TOTAL = N_FRAME + 36 * HOP  # 20480 samples = 8 s; the last analysis frame ends at the end


def frames_in(n_samples: int) -> int:
    """Frames of N_FRAME samples every HOP in a run of n_samples (Welch 1967)."""
    return 0 if n_samples < N_FRAME else (n_samples - N_FRAME) // HOP + 1


def tones(n: int, *, seed: int, amps: tuple[float, ...] = (1.0, 0.3)) -> np.ndarray:
    """float32 [C, n] in g: channel c is A·sin(2π·F1·t) + (A/2)·sin(2π·F2·t + 1) + 1 mg RMS
    white noise, A = amps[c], t = k/FS; noise from a fixed seed."""
    t = np.arange(n) / FS
    rng = np.random.default_rng(seed)
    rows = [a * np.sin(2 * np.pi * F1_HZ * t) + 0.5 * a * np.sin(2 * np.pi * F2_HZ * t + 1.0)
            + rng.normal(0.0, 1e-3, n) for a in amps]
    return np.array(rows, dtype=np.float32)


def framed(x: np.ndarray, first_index: int = 0, *, fs: float = FS,
           frame_samples: int = FRAME_SAMPLES, t_ns: Callable[[int], int] | None = None
           ) -> list[bytes]:
    """service.wire frames (f32le) of ``frame_samples`` each; ``t_ns(k)`` stamps the frame
    starting at sample k (default 0 = unknown)."""
    return [encode_frame(x[:, k:k + frame_samples], "f32le", fs, first_index + k,
                         t_ns(k) if t_ns else 0)
            for k in range(0, x.shape[1], frame_samples)]


def welch_rms(x: np.ndarray) -> np.ndarray:
    """Reference RMS amplitude spectrum per channel, lines 0…LINES: the square root of the
    averaged one-sided power spectrum, periodic Hann, 75 % overlap, no detrending
    (scipy.signal.welch, scaling='spectrum'; Heinzel et al. 2002 eq. 19)."""
    _, ps = scipy.signal.welch(x.astype(np.float64), fs=FS, window="hann", nperseg=N_FRAME,
                               noverlap=N_FRAME - HOP, detrend=False, scaling="spectrum",
                               average="mean", axis=-1)
    return np.sqrt(ps[:, : LINES + 1])  # type: ignore[no-any-return]


# --- the service under test -----------------------------------------------------------------

ANALYSIS = {
    "fmax_hz": 1000.0, "lines": LINES, "window": "hann", "overlap": 0.75,
    # linear over more frames than any stream here holds: the whole stream is averaged
    "averaging": "linear", "averages": 10000,
    "unit": "acceleration", "output_unit": "g", "amplitude": "rms", "lowcut_hz": 2.0,
}
FAST_FS = 25600.0  # Hz, Fmax 10 kHz


def _tcp(sid: str, channels: list[str], fs: float = FS, **extra: Any) -> dict[str, Any]:
    return {"id": sid, "kind": "tcp", "listen": "auto", "format": "framed",
            "sample_rate_hz": fs, "channels": channels, **extra}


CONFIG: dict[str, Any] = {
    "analysis": ANALYSIS,
    "sources": [
        _tcp("drop", ["drop-a", "drop-b"]),
        _tcp("race", ["race-a", "race-b"]),
        _tcp("fast", ["fast-a", "fast-b", "fast-c", "fast-d"], FAST_FS),
        _tcp("flood", ["flood-a", "flood-b"], FAST_FS, queue_blocks=2),
        _tcp("clock", ["clock-a"]),
        _tcp("http", ["http-a"]),
        _tcp("idle", ["idle-a"]),  # never fed
    ],
    "channels": [{"id": c, "analysis": {"fmax_hz": 10000.0, "lines": 3200}}
                 for c in ("fast-a", "fast-b", "fast-c", "fast-d", "flood-a", "flood-b")],
    "bands": [{"name": "b100", "lo_hz": 100.0, "hi_hz": 150.0}],
    "tones": [{"name": "t1", "hz": F1_HZ}],
}


@pytest.fixture(scope="module")
def svc(quaver_service_factory: Callable[[dict[str, Any]], RunningService]) -> RunningService:
    return quaver_service_factory(CONFIG)


@contextlib.contextmanager
def producer(port: int) -> Iterator[socket.socket]:
    sock = socket.create_connection((LOOPBACK, port), timeout=10.0)
    try:
        yield sock
    finally:
        sock.close()


def counters(svc: RunningService, sid: str) -> dict[str, Any]:
    return svc.source(sid)["counters"]  # type: ignore[no-any-return]


def spectrum_after(svc: RunningService, cid: str, *, samples: int, what: str,
                   timeout_s: float = 20.0) -> dict[str, Any]:
    """Once channel ``cid`` has taken ``samples`` samples, its latest spectrum."""
    def probe() -> dict[str, Any] | None:
        if svc.channel(cid)["counters"]["samples"] != samples:
            return None
        return svc.get_or_none(f"channels/{cid}/spectrum")  # type: ignore[no-any-return]

    return svc.wait(probe, f"{cid}: {what} ({samples} samples)", timeout_s)


def check_spectra(svc: RunningService, ids: tuple[str, ...], x: np.ndarray,
                  amps: tuple[float, ...]) -> None:
    """Each channel's spectrum averages exactly the stream ``x`` (nothing of another
    stream, nothing lost): every line as scipy.signal.welch gives it, to float32 rounding,
    and the tracked tone and the band read the sine of peak ``amps[c]`` at F1."""
    ref = welch_rms(x)
    for row, cid in enumerate(ids):
        spec = svc.get(f"channels/{cid}/spectrum")
        assert spec["averages"] == frames_in(x.shape[1])
        assert (spec["unit"], spec["amplitude"], spec["window"]) == ("g", "rms", "hann")
        got = np.array(spec["values"])
        assert got.shape == (LINES + 1,)
        big = ref[row] > 1e-3 * ref[row].max()  # the two tones' main lobes
        assert big.sum() >= 6
        np.testing.assert_allclose(got[big], ref[row][big], rtol=1e-3)
        np.testing.assert_allclose(got[3:], ref[row][3:], rtol=2e-2, atol=1e-4 * ref[row].max())
        rms = amps[row] / math.sqrt(2)  # a sine's RMS is its peak over √2
        t1 = {t["name"]: t for t in svc.get(f"channels/{cid}/tones")["tones"]}["t1"]
        b100 = {b["name"]: b for b in svc.get(f"channels/{cid}/bands")["bands"]}["b100"]
        # tracked tone: single-bin DFT at the exact frequency, within 0.02 dB (Heinzel et
        # al. 2002 §9; the engine's tolerance); band RMS of a sine inside it within 0.5 %
        # (Parseval)
        assert abs(20 * math.log10(t1["amplitude"] / rms)) <= 0.02, t1
        assert b100["value"] == pytest.approx(rms, rel=5e-3), b100


# --- producers that drop mid-frame, 100 times in a row ------------------------------------


def disconnects_reach(svc: RunningService, sid: str, n: int) -> Callable[[], bool | None]:
    return lambda: counters(svc, sid)["disconnects"] == n or None


def test_hundred_mid_frame_drops_then_a_clean_stream(svc: RunningService) -> None:
    port = svc.ports["drop"]
    x = tones(N_TOTAL, seed=11)
    frames = framed(x)
    rnd = random.Random(5)
    held = 0
    for i in range(1, 101):
        f = frames[rnd.randrange(len(frames))]
        cut = rnd.choice([1, 3, 4, 20, 43, 44, 45, rnd.randrange(1, len(f))])  # header too
        with producer(port) as sock:
            sock.sendall(f[:cut])
        held += cut
        # the next producer may only come once this one is gone (one producer at a time)
        svc.wait(disconnects_reach(svc, "drop", i), f"disconnect {i} to be seen")
    c = counters(svc, "drop")
    assert (c["connections"], c["disconnects"], c["partial_frames"]) == (100, 100, 100), c
    assert c["partial_bytes"] == held and c["refused"] == 0, c
    assert (c["malformed"], c["gaps"], c["samples"]) == (0, 0, 0), c
    assert "incomplete frame" in c["last_error"]
    svc.assert_healthy()

    with producer(port) as sock:
        for f in frames:
            sock.sendall(f)
        spectrum_after(svc, "drop-a", samples=N_TOTAL, what="the clean stream")
    check_spectra(svc, ("drop-a", "drop-b"), x, (1.0, 0.3))
    c = counters(svc, "drop")
    assert (c["connections"], c["partial_frames"], c["malformed"], c["gaps"]) == (
        101, 100, 0, 0), c
    assert svc.channel("drop-b")["status"] == "ok"
    svc.assert_healthy()


# --- two (or more) producers race for one source -------------------------------------------


def test_second_producer_is_refused_and_the_first_is_unaffected(svc: RunningService) -> None:
    port = svc.ports["race"]
    x = tones(N_TOTAL, seed=21)
    other = tones(N_TOTAL, seed=22, amps=(5.0, 7.0))  # would show in the spectra if mixed in
    frames, intruding = framed(x), framed(other)
    half = len(frames) // 2
    intruders = 3
    with producer(port) as first:
        for f in frames[:half]:
            first.sendall(f)
        spectrum_after(svc, "race-a", samples=half * FRAME_SAMPLES, what="the first half")
        assert svc.source("race")["producer"] == "{}:{}".format(*first.getsockname())

        results: list[bytes | str] = []

        def intrude(k: int) -> None:  # connect, try to stream, see the door close
            try:
                with producer(port) as sock:
                    with contextlib.suppress(OSError):  # reset by the server: also refused
                        for f in intruding[k::intruders]:
                            sock.sendall(f)
                    try:
                        results.append(sock.recv(1))  # b"": closed by the service
                    except OSError as e:
                        results.append(type(e).__name__)
            except OSError as e:  # pragma: no cover - reported through results
                results.append(f"connect failed: {e}")

        threads = [threading.Thread(target=intrude, args=(k,)) for k in range(intruders)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=20)
        assert len(results) == intruders and all(r in (b"", "ConnectionResetError")
                                                 for r in results), results
        svc.wait(lambda: counters(svc, "race")["refused"] == intruders or None,
                 "every intruder to be refused")
        assert svc.source("race")["producer"] == "{}:{}".format(*first.getsockname())
        for f in frames[half:]:
            first.sendall(f)
        spectrum_after(svc, "race-a", samples=N_TOTAL, what="the whole first stream")
    c = counters(svc, "race")
    assert (c["refused"], c["connections"], c["samples"]) == (intruders, 1, N_TOTAL), c
    assert (c["gaps"], c["malformed"], c["partial_frames"]) == (0, 0, 0), c
    assert "refused" in svc.log_tail(400)
    check_spectra(svc, ("race-a", "race-b"), x, (1.0, 0.3))
    svc.assert_healthy()


# --- faster than real time ------------------------------------------------------------------


def paced_send(sock: socket.socket, frames: list[bytes], seconds_each: float,
               speed: float) -> None:
    """Send ``frames`` at ``speed`` × real time (each frame holds ``seconds_each`` s): a
    frame goes once the wall clock reaches its due time (a pace, not a measurement)."""
    start = time.monotonic()
    for k, f in enumerate(frames):
        due = start + k * seconds_each / speed
        delay = due - time.monotonic()
        if delay > 0:
            time.sleep(delay)
        sock.sendall(f)


def sent_accounted(svc: RunningService, sid: str, ids: tuple[str, ...], total: int,
                   frame_samples: int) -> dict[str, Any]:
    """Wait until every sample sent is either analysed or in a dropped block (the queue
    empty); return the source's counters."""
    def probe() -> dict[str, Any] | None:
        src = svc.source(sid)
        c = src["counters"]
        done = [svc.channel(cid)["counters"]["samples"] + c["drops"] * frame_samples
                for cid in ids]
        return c if src["queued"] == 0 and all(d == total for d in done) else None

    return svc.wait(probe, f"{sid}: all {total} samples analysed or counted as dropped", 60.0)


@pytest.mark.slow
def test_faster_than_real_time_is_processed_or_counted(svc: RunningService) -> None:
    # 60 s of 4-channel signal at 25.6 kHz sent at 20x real time: ~3 s of wall time
    fast_ids = ("fast-a", "fast-b", "fast-c", "fast-d")
    block = 2560  # 0.1 s per frame
    seconds, speed = 60, 20.0
    total = int(seconds * FAST_FS)
    t = np.arange(total) / FAST_FS
    x = np.array([np.sin(2 * np.pi * (1000.0 + 250.0 * c) * t) for c in range(4)],
                 dtype=np.float32)
    frames = framed(x, fs=FAST_FS, frame_samples=block)
    with producer(svc.ports["fast"]) as sock:
        paced_send(sock, frames, block / FAST_FS, speed)
        c = sent_accounted(svc, "fast", fast_ids, total, block)
    # every sample counted by the source; what the engine did not take is in `drops`
    assert (c["samples"], c["blocks"], c["malformed"]) == (total, len(frames), 0), c
    assert c["drops"] == 0 or all(svc.channel(cid)["counters"]["gaps"] >= 1
                                  for cid in fast_ids), c
    fast_drops = c["drops"]

    # a source with a 2-block queue flooded with 64-sample frames as fast as the socket
    # takes them (about 500x real time): its engine cannot keep up, and says so
    small = 64
    flood_total = 4000 * small
    y = np.tile(np.sin(2 * np.pi * 1000.0 * np.arange(small) / FAST_FS), (2, 4000))
    flood = framed(y.astype(np.float32), fs=FAST_FS, frame_samples=small)
    with producer(svc.ports["flood"]) as sock:
        sock.sendall(b"".join(flood))
        c = sent_accounted(svc, "flood", ("flood-a", "flood-b"), flood_total, small)
    assert (c["samples"], c["blocks"], c["malformed"]) == (flood_total, 4000, 0), c
    assert c["drops"] == 0 or svc.channel("flood-a")["counters"]["gaps"] >= 1
    print(f"faster than real time: fast drops={fast_drops} of {len(frames)} blocks; "
          f"flood drops={c['drops']} of 4000 blocks")
    svc.assert_healthy()


# --- time running backwards in the frame headers ------------------------------------------


def test_timestamps_going_backwards_are_flagged_and_followed(svc: RunningService) -> None:
    x = tones(N_TOTAL, seed=31, amps=(1.0,))
    half = N_TOTAL // 2  # 10240 = N_FRAME + 16·HOP: a frame ends exactly here
    t_first = 1_700_000_000_000_000_000  # 2023-11-14, ns since the Unix epoch
    t_back = t_first - 3600 * 10**9  # the second half claims to be an hour earlier

    def stamp(k: int) -> int:  # sample-exact time of the frame starting at k
        t0 = t_first if k < half else t_back
        return t0 + round(k * 1e9 / FS)

    frames = framed(x, t_ns=stamp)
    with producer(svc.ports["clock"]) as sock:
        for f in frames[: half // FRAME_SAMPLES]:
            sock.sendall(f)
        before = spectrum_after(svc, "clock-a", samples=half, what="the first half")
        for f in frames[half // FRAME_SAMPLES:]:
            sock.sendall(f)
        after = spectrum_after(svc, "clock-a", samples=N_TOTAL, what="the second half")
    c = counters(svc, "clock")
    assert (c["samples"], c["gaps"], c["malformed"]) == (N_TOTAL, 0, 0), c
    # the step back is flagged once, with how far it went (service/sources/base.py)
    assert c["clock_steps_back"] == 1, c
    assert c["last_error"] == (f"header clock stepped back 3600 s at sample index {half}; "
                               "frames follow the new clock")
    # the indices run on, so the average runs on across the jump in time
    assert after["averages"] == frames_in(N_TOTAL) and after["seq"] > before["seq"]
    # a frame's time is the producer's header time of its last sample's block plus the
    # rest of that block (service/pipeline.py): it follows the headers, backwards too
    assert before["timestamp_ns"] == stamp(half - FRAME_SAMPLES) + round(FRAME_SAMPLES * 1e9 / FS)
    assert after["timestamp_ns"] == stamp(N_TOTAL - FRAME_SAMPLES) + round(
        FRAME_SAMPLES * 1e9 / FS)
    assert after["timestamp_ns"] < before["timestamp_ns"]
    check_spectra(svc, ("clock-a",), x, (1.0,))
    # the trend store takes values stamped in the past without complaint
    trend = svc.get("channels/clock-a/trend", since=(t_back - 10**9) / 1e9,
                    until=(t_first + 10 * 10**9) / 1e9)
    assert trend["points"] and all(p["count"] >= 1 for p in trend["points"])
    assert svc.channel("clock-a")["status"] == "ok"
    svc.assert_healthy()


def test_header_times_at_the_end_of_the_i64_range_keep_the_api_up(
    quaver_service_factory: Callable[[dict[str, Any]], RunningService],
) -> None:
    # a service of its own: the failure it shows would break the shared one's /channels
    svc = quaver_service_factory({"analysis": ANALYSIS, "sources": [_tcp("edge", ["edge-a"])],
                                  "bands": CONFIG["bands"], "tones": CONFIG["tones"]})
    x = tones(N_FRAME, seed=51, amps=(1.0,))
    # the last frame's header still fits in an i64; the end of its samples does not
    t_last = 2**63 - 1 - 50_000_000
    n_frames = N_FRAME // FRAME_SAMPLES

    def stamp(k: int) -> int:
        return t_last - round((N_FRAME - FRAME_SAMPLES - k) * 1e9 / FS)

    with producer(svc.ports["edge"]) as sock:
        for f in framed(x, t_ns=stamp):
            sock.sendall(f)
        svc.wait(lambda: svc.health()["frames_published"] == 1 or None,
                 f"the analysis frame of {n_frames} frames")
    for path in ("channels", "channels/edge-a", "channels/edge-a/spectrum",
                 "channels/edge-a/bands", "channels/edge-a/tones"):
        r = svc.client.get(f"/api/v1/{path}")
        assert r.status_code < 500, (path, r.status_code)
    svc.assert_healthy()


# --- oversized bodies and messages, unknown channels, bad query values --------------------


def short(detail: Any) -> bool:
    """A reason a person reads at a glance: one line, under 200 characters."""
    text = detail if isinstance(detail, str) else json.dumps(detail)
    return "\n" not in text and 0 < len(text) < 200


def test_oversized_request_bodies_are_413(svc: RunningService) -> None:
    big = b'{"note": "' + b"x" * (2**20) + b'"}'  # 1 MiB over the 64 KiB default limit
    url = "/api/v1/alarms/drop-a.overall/ack"
    r = svc.client.post(url, content=big, headers={"content-type": "application/json"})
    assert r.status_code == 413, r.text
    assert r.json() == {"detail": "request body over 65536 bytes"}  # README: max_body_bytes

    def chunks() -> Iterator[bytes]:  # no Content-Length: chunked transfer encoding
        for k in range(0, len(big), 65536):
            yield big[k:k + 65536]

    r = svc.client.post(url, content=chunks(), headers={"content-type": "application/json"})
    assert r.status_code == 413 and short(r.json()["detail"]), r.text
    # the same request with a small body is judged on its merits: no token, 401
    r = svc.client.post(url, json={"note": "ok"})
    assert r.status_code == 401 and short(r.json()["detail"]), r.text
    svc.assert_healthy()


@contextlib.contextmanager
def ws_connect(svc: RunningService) -> Iterator[ClientConnection]:
    with connect(f"ws://{LOOPBACK}:{svc.http_port}/api/v1/stream", proxy=None,
                 open_timeout=10, compression=None, max_size=1 << 22) as ws:
        hello = json.loads(ws.recv(timeout=10))
        assert hello["kind"] == "hello"
        yield ws


def next_text(ws: ClientConnection, kind: str, max_messages: int = 50) -> dict[str, Any]:
    for _ in range(max_messages):
        msg = ws.recv(timeout=10)
        if isinstance(msg, str) and json.loads(msg)["kind"] == kind:
            return json.loads(msg)  # type: ignore[no-any-return]
    pytest.fail(f"no {kind!r} message within {max_messages} messages")


def closed_with(ws: ClientConnection) -> tuple[int, str]:
    """Read until the server closes; its close code and reason (RFC 6455 §7.1.5)."""
    for _ in range(200):
        try:
            ws.recv(timeout=10)
        except ConnectionClosed as e:
            assert e.rcvd is not None, "the server sent no close frame"
            return e.rcvd.code, e.rcvd.reason
    pytest.fail("the server did not close the connection")


@pytest.mark.parametrize("binary", [False, True], ids=["text", "binary"])
def test_oversized_websocket_message_closes_with_1009(svc: RunningService, binary: bool) -> None:
    # a subscription padded with spaces to exactly the 4096-byte limit is taken
    body = json.dumps({"subscribe": {"channels": ["http-a"], "kinds": ["status"]}})
    at_limit = body + " " * (4096 - len(body))
    with ws_connect(svc) as ws:
        ws.send(at_limit.encode() if binary else at_limit)
        ws.send(json.dumps({"subscribe": {"kinds": ["nonsense"]}}))
        err = next_text(ws, "error")  # still open: the next message is answered
        assert "nonsense" in err["reason"] and short(err["reason"])
        over = at_limit + " "  # 4097 bytes
        ws.send(over.encode() if binary else over)
        code, reason = closed_with(ws)
    # RFC 6455 §7.4.1: 1009 = message too big to process
    assert (code, reason) == (1009, "message over 4096 bytes")
    svc.assert_healthy()


UNKNOWN = "no-such-channel"


@pytest.mark.parametrize("path", ["", "/spectrum", "/bands", "/tones", "/trend"])
def test_unknown_channel_is_404(svc: RunningService, path: str) -> None:
    r = svc.client.get(f"/api/v1/channels/{UNKNOWN}{path}")
    assert r.status_code == 404, r.text
    assert r.json()["detail"] == f"unknown channel {UNKNOWN!r}"


def test_unknown_channel_in_a_websocket_subscription_is_an_error(svc: RunningService) -> None:
    with ws_connect(svc) as ws:
        ws.send(json.dumps({"subscribe": {"channels": ["http-a", UNKNOWN]}}))
        err = next_text(ws, "error")
    assert err["reason"] == f"unknown channels [{UNKNOWN!r}]"
    svc.assert_healthy()


@pytest.fixture(scope="module")
def http_channel(svc: RunningService) -> str:
    """Channel http-a with a spectrum (one analysis frame of a known stream)."""
    with producer(svc.ports["http"]) as sock:
        for f in framed(tones(N_FRAME, seed=41, amps=(1.0,))):
            sock.sendall(f)
        spectrum_after(svc, "http-a", samples=N_FRAME, what="one analysis frame")
    return "http-a"


BAD_QUERIES = [
    # (path under /api/v1 with {ch} for the channel, query, the parameter the 422 names)
    ("channels/{ch}/spectrum", {"unit": "furlong/s"}, "unit"),
    ("channels/{ch}/spectrum", {"amplitude": "loud"}, "amplitude"),
    ("channels/{ch}/spectrum", {"format": "xml"}, "format"),
    ("channels/{ch}/trend", {"step": "0"}, "step"),
    ("channels/{ch}/trend", {"since": "yesterday"}, "since"),
    ("channels/{ch}/trend", {"name": "x" * 201}, "name"),
    ("events", {"limit": "0"}, "limit"),
    ("events", {"limit": "1001"}, "limit"),
    ("events", {"limit": "ten"}, "limit"),
    ("events", {"before_id": "0"}, "before_id"),
    ("events", {"since": "1.5"}, "since"),
    ("alarms", {"all": "perhaps"}, "all"),
    ("windows/hann/response", {"n": "8"}, "n"),
    ("windows/hann/response", {"span_bins": "0"}, "span_bins"),
    ("windows/hann/response", {"points_per_bin": "65"}, "points_per_bin"),
    ("windows/boxcar/response", {}, "window"),
    ("events/0", {}, "event_id"),
    ("channels/" + "c" * 65, {}, "channel_id"),
]


@pytest.mark.parametrize(("path", "query", "param"), BAD_QUERIES,
                         ids=[f"{p.split('/')[-1][:10]}-{param}" for p, _, param in BAD_QUERIES])
def test_bad_query_values_are_422_naming_the_parameter(
    svc: RunningService, http_channel: str, path: str, query: dict[str, str], param: str
) -> None:
    r = svc.client.get("/api/v1/" + path.format(ch=http_channel), params=query)
    assert r.status_code == 422, r.text
    detail = r.json()["detail"]
    assert len(detail) == 1, detail  # one bad value, one complaint
    assert detail[0]["loc"][-1] == param and short(detail[0]["msg"]), detail


def test_since_after_until_is_422(svc: RunningService, http_channel: str) -> None:
    r = svc.client.get(f"/api/v1/channels/{http_channel}/trend",
                       params={"since": 2000.0, "until": 1000.0})
    assert r.status_code == 422
    # FastAPI's validation shape, as the route's OpenAPI 422 says (detail: [{loc, msg, type}])
    (detail,) = r.json()["detail"]
    assert detail["loc"] == ["query", "since"]
    assert detail["msg"] == "since=2000 must be before until=1000"


def fresh_get(svc: RunningService, path: str, params: dict[str, str]) -> int:
    """Status of GET /api/v1/{path} on a new connection (after a 500 the server drops the
    kept-alive one)."""
    with httpx.Client(base_url=svc.base_url, timeout=30.0, trust_env=False) as client:
        return client.get(f"/api/v1/{path}", params=params).status_code


I64_MAX = 2**63 - 1  # SQLite INTEGER and numpy datetime64[ns] are 64-bit signed


def test_largest_event_id_is_a_plain_404(svc: RunningService) -> None:
    assert fresh_get(svc, f"events/{I64_MAX}", {}) == 404


OUT_OF_RANGE = [
    # (path under /api/v1 with {ch} for the channel, query)
    (f"events/{I64_MAX + 1}", {}),
    (f"events/{I64_MAX + 1}/evidence", {}),
    ("events", {"before_id": str(2**64)}),
    ("events", {"since": str(2**64)}),
    ("events", {"since": str(-(2**70))}),
    ("channels/{ch}/trend", {"since": "-inf"}),
    ("channels/{ch}/trend", {"since": "1e300", "until": "2e300"}),
    ("channels/{ch}/trend", {"since": "-1e300", "until": "0"}),
]


@pytest.mark.parametrize(("path", "query"), OUT_OF_RANGE,
                         ids=[f"{p.split('/')[-1][:10]}-{'-'.join(q) or 'path'}"
                              for p, q in OUT_OF_RANGE])
def test_out_of_range_numbers_are_4xx_not_500(
    svc: RunningService, http_channel: str, path: str, query: dict[str, str]
) -> None:
    status = fresh_get(svc, path.format(ch=http_channel), query)
    svc.assert_healthy()
    assert 400 <= status < 500, status


def test_bad_query_on_a_channel_without_data_is_422(svc: RunningService) -> None:
    assert svc.channel("idle-a")["latest"] is None  # nothing was ever sent to it
    r = svc.client.get("/api/v1/channels/idle-a/spectrum", params={"unit": "furlong/s"})
    assert r.status_code == 422, (r.status_code, r.text)

"""End-to-end checks of a real quaver service on loopback: known tones streamed over TCP (raw
and framed), UDP and a tailed file read back over REST and WebSocket; faults counted.

Talks to the service only through its sockets, files, HTTP API and CLI; no internals."""

from __future__ import annotations

import base64
import contextlib
import json
import math
import re
import socket
import struct
import subprocess
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pytest
import scipy.io.wavfile
from websockets.sync.client import ClientConnection, connect

from service.wire import encode_frame

if TYPE_CHECKING:
    from conftest import RunningService  # tests/service/conftest.py: the running-service fixture

LOOPBACK = "127.0.0.1"

# --- the known signal -----------------------------------------------------------------------

G_N = 9.80665  # m/s² per g, exact (3rd CGPM, 1901)
FS = 2560.0  # Hz = 2.56 × Fmax 1000 Hz (common practice: fs = 2.56·Fmax)
LINES = 800
N_FRAME = 2048  # 2.56 × 800 lines (common practice: N = 2.56·lines)
HOP = N_FRAME // 4  # 75 % overlap
DF = FS / N_FRAME  # 1.25 Hz line spacing, fs/N
F1_HZ, F2_HZ = 123.37, 456.78  # off-bin: 98.696 and 365.424 lines
# peak amplitudes in g, per channel (a, b): different so that a swapped interleave shows
AMPS = ((1.0, 0.2), (0.3, 0.7))
NOISE_G = 1e-3  # RMS of the added white noise, g
SECONDS = 8.0
N_TOTAL = int(SECONDS * FS)  # 20480 samples per channel
FRAME_SAMPLES = 256  # samples per framed-format frame / UDP datagram (0.1 s)

# The WebSocket channel: Fmax 10 kHz, 12800 lines → N = 32768, hop 8192; a spectrum message
# is ~51 kB, so a client that stops reading overflows the loopback socket buffers quickly.
WS_FS = 25600.0
WS_LINES = 12800
WS_N, WS_HOP = 32768, 8192
WS_HOPS = 200  # analysis frames streamed while one client is stalled (~4x what fits in
# the loopback socket buffers with the default tcp_wmem maximum of 4 MiB)


def frames_in(n_samples: int, n: int = N_FRAME, hop: int = HOP) -> int:
    """Frames of n samples every hop in a run of n_samples (common practice, Welch 1967)."""
    return 0 if n_samples < n else (n_samples - n) // hop + 1


def signal(n: int, first_index: int = 0, *, seed: int, fs: float = FS,
           amps: tuple[tuple[float, float], ...] = AMPS) -> np.ndarray:
    """float32 [C, n]: per channel A1·sin(2π·F1·t) + A2·sin(2π·F2·t + 1) + white noise, in g,
    at t = (first_index + k)/fs; noise from a fixed seed."""
    t = (first_index + np.arange(n)) / fs
    rng = np.random.default_rng(seed)
    rows = [a1 * np.sin(2 * np.pi * F1_HZ * t) + a2 * np.sin(2 * np.pi * F2_HZ * t + 1.0)
            + rng.normal(0.0, NOISE_G, n) for a1, a2 in amps]
    return np.array(rows, dtype=np.float32)


def db(measured: float, expected: float) -> float:
    return 20.0 * math.log10(measured / expected)


# --- the service under test -----------------------------------------------------------------

ANALYSIS = {
    "fmax_hz": 1000.0, "lines": LINES, "window": "hann", "overlap": 0.75,
    # linear with more frames than any stream here holds: the whole stream is averaged
    "averaging": "linear", "averages": 10000,
    "unit": "acceleration", "output_unit": "g", "amplitude": "peak", "lowcut_hz": 2.0,
}


def _tcp(sid: str, fmt: str, channels: list[str], fs: float = FS) -> dict[str, Any]:
    return {"id": sid, "kind": "tcp", "listen": "auto", "format": fmt, "sample_rate_hz": fs,
            "channels": channels}


CONFIG: dict[str, Any] = {
    "analysis": ANALYSIS,
    "sources": [
        _tcp("raw", "f32le", ["raw-a", "raw-b"]),
        _tcp("framed", "framed", ["fr-a", "fr-b"]),
        {"id": "udp", "kind": "udp", "listen": "auto", "sample_rate_hz": FS,
         "channels": ["udp-a", "udp-b"]},
        {"id": "tail", "kind": "file", "path": "tail.csv", "format": "csv", "sample_rate_hz": FS,
         "follow": True, "start_at": "beginning", "poll_ms": 20.0,
         "channels": ["tail-a", "tail-b"]},
        _tcp("sensor", "f32le", ["sf-nan", "sf-flat", "sf-ok"]),
        _tcp("bad", "framed", ["bad-a", "bad-b"]),
        _tcp("ws", "framed", ["ws-a"], fs=WS_FS),
        _tcp("ws2", "framed", ["ws2-a"]),
        _tcp("hf", "framed", ["hf-flat", "hf-ok"], fs=25600.0),
    ],
    "channels": [{"id": "ws-a", "analysis": {"fmax_hz": 10000.0, "lines": WS_LINES}}],
    "bands": [{"name": "b100", "lo_hz": 100.0, "hi_hz": 150.0},
              {"name": "b456", "lo_hz": 430.0, "hi_hz": 480.0}],
    "tones": [{"name": "t1", "hz": F1_HZ}, {"name": "t2", "hz": F2_HZ}],
}


@pytest.fixture(scope="module")
def svc(quaver_service_factory: Callable[[dict[str, Any]], RunningService]) -> RunningService:
    return quaver_service_factory(CONFIG)


def spectrum_after(svc: RunningService, cid: str, *, samples: int, frames: int,
                   what: str, timeout_s: float = 20.0, **params: Any) -> dict[str, Any]:
    """Wait until channel ``cid`` has taken ``samples`` samples and made ``frames`` frames in
    all; then return its latest spectrum, once two reads in a row give the same one (the
    counters are kept on the analysis thread, and the push they count reaches the hub's
    latest spectrum a moment later, on the event loop)."""
    last: list[int | None] = [None]

    def probe() -> dict[str, Any] | None:
        c = svc.channel(cid)["counters"]
        if c["samples"] != samples or c["frames"] != frames:
            return None
        spec = svc.get_or_none(f"channels/{cid}/spectrum", **params)
        if spec is None:
            return None
        if spec["seq"] != last[0]:
            last[0] = spec["seq"]
            return None
        return spec  # type: ignore[no-any-return]

    return svc.wait(probe, f"{cid}: {what} ({samples} samples, {frames} frames)", timeout_s)


def by_name(items: list[dict[str, Any]]) -> dict[str, dict[str, Any]]:
    return {i["name"]: i for i in items}


def check_tones_and_bands(svc: RunningService, ids: tuple[str, str], tol_db: float,
                          amps: tuple[tuple[float, float], ...] = AMPS) -> None:
    for cid, (a1, a2) in zip(ids, amps, strict=True):
        tones = by_name(svc.get(f"channels/{cid}/tones")["tones"])
        # tracked tone: single-bin DFT at the exact frequency reads the peak amplitude
        # within ±0.02 dB (issue 2 engine tolerance; peak amplitude 2|X|/S1, Heinzel 2002 §9)
        assert tones["t1"]["frequency_hz"] == pytest.approx(F1_HZ, abs=1e-9)
        assert abs(db(tones["t1"]["amplitude"], a1)) <= tol_db, (cid, tones)
        assert abs(db(tones["t2"]["amplitude"], a2)) <= tol_db, (cid, tones)
        bands = by_name(svc.get(f"channels/{cid}/bands")["bands"])
        # a sine inside a band reads its RMS A/√2 within 0.5 % (docs/references.md, issue 2)
        assert bands["b100"]["value"] == pytest.approx(a1 / math.sqrt(2), rel=5e-3), (cid, bands)
        assert bands["b456"]["value"] == pytest.approx(a2 / math.sqrt(2), rel=5e-3), (cid, bands)


# --- producers ------------------------------------------------------------------------------


@contextlib.contextmanager
def tcp_producer(port: int) -> Iterator[socket.socket]:
    sock = socket.create_connection((LOOPBACK, port), timeout=10.0)
    try:
        yield sock
    finally:
        sock.close()


def framed(x: np.ndarray, first_index: int, fs: float = FS,
           frame_samples: int = FRAME_SAMPLES) -> list[bytes]:
    """service.wire frames (f32le payload) of ``frame_samples`` each, indices from first_index."""
    return [encode_frame(x[:, k:k + frame_samples], "f32le", fs, first_index + k)
            for k in range(0, x.shape[1], frame_samples)]


# --- 1. TCP raw f32le: theory, units, and streaming equals offline --------------------------


def test_tcp_raw_stream_matches_theory_and_offline_analyze(
    svc: RunningService, tmp_path: Path, quaver_cli: Callable[..., subprocess.CompletedProcess[str]]
) -> None:
    x = signal(N_TOTAL, seed=101)
    wav = tmp_path / "two-tones.wav"
    scipy.io.wavfile.write(wav, int(FS), x.T)  # float32 WAV keeps the values exactly
    fed = quaver_cli("feed", str(wav), "--to", f"{LOOPBACK}:{svc.ports['raw']}", "--speed", "0",
                  "--format", "f32le")
    assert fed.returncode == 0, fed.stderr
    n_frames = frames_in(N_TOTAL)  # 37
    spec = spectrum_after(svc, "raw-a", samples=N_TOTAL, frames=n_frames, what="the whole stream")
    assert spec["averages"] == n_frames and spec["averaging"] == "linear"
    assert (spec["unit"], spec["amplitude"], spec["window"]) == ("g", "peak", "hann")
    assert spec["df_hz"] == pytest.approx(DF) and spec["lines"] == LINES
    assert len(spec["values"]) == LINES + 1
    check_tones_and_bands(svc, ("raw-a", "raw-b"), tol_db=0.02)
    source = svc.source("raw")["counters"]
    assert (source["samples"], source["gaps"], source["malformed"]) == (N_TOTAL, 0, 0)

    # velocity view of the same frame: v = a·g_n/(2πf) line by line (docs/references.md)
    a = np.array(spec["values"])
    vel = svc.get("channels/raw-a/spectrum", unit="mm/s")
    assert vel["seq"] == spec["seq"] and vel["unit"] == "mm/s" and vel["amplitude"] == "peak"
    v = np.array(vel["values"])
    for f_hz in (F1_HZ, F2_HZ):
        q = round(f_hz / DF) - 3 + int(np.argmax(a[round(f_hz / DF) - 3:round(f_hz / DF) + 4]))
        f_line = q * DF
        assert v[q] == pytest.approx(a[q] * G_N * 1000.0 / (2 * np.pi * f_line), rel=1e-5)
    rms = svc.get("channels/raw-a/spectrum", amplitude="rms")
    # RMS of a sine of peak A is A/√2 (docs/references.md), line by line
    np.testing.assert_allclose(np.array(rms["values"]), a / math.sqrt(2), rtol=1e-6, atol=1e-12)

    # the same samples through `quaver analyze` give the same spectrum, bands and tones
    off = quaver_cli("analyze", str(wav), "--json", "--fmax", "1000", "--lines", str(LINES),
                  "--window", "hann", "--overlap", "0.75", "--unit", "g", "--amplitude", "peak",
                  "--lowcut", "2", "--band", "b100:100:150", "--band", "b456:430:480",
                  "--tone", f"t1:{F1_HZ}", "--tone", f"t2:{F2_HZ}")
    assert off.returncode == 0, off.stderr
    doc = json.loads(off.stdout)
    for row, cid in enumerate(("raw-a", "raw-b")):
        live = svc.get(f"channels/{cid}/spectrum")
        ref = doc["channels"][row]
        assert ref["averages"] == live["averages"] == n_frames
        assert ref["df_hz"] == pytest.approx(live["df_hz"], rel=1e-12)
        s_live, s_ref = np.array(live["values"]), np.array(ref["spectrum"])
        assert s_live.shape == s_ref.shape
        big = s_ref > 1e-3 * s_ref.max()
        assert big.sum() >= 2 * 7  # at least the two tones' main lobes
        # streaming equals offline within float32 rounding (our style rule: streaming equals batch)
        np.testing.assert_allclose(s_live[big], s_ref[big], rtol=1e-4)
        np.testing.assert_allclose(s_live, s_ref, rtol=1e-3, atol=1e-6 * s_ref.max())
        live_bands = by_name(svc.get(f"channels/{cid}/bands")["bands"])
        for b in ref["bands"]:
            assert live_bands[b["name"]]["value"] == pytest.approx(b["value"], rel=1e-4)
        live_tones = by_name(svc.get(f"channels/{cid}/tones")["tones"])
        for t in ref["tones"]:
            assert live_tones[t["name"]]["amplitude"] == pytest.approx(t["amplitude"], rel=1e-4)
    svc.assert_healthy()


# --- 2. TCP framed with a declared gap ------------------------------------------------------


def test_tcp_framed_gap_is_counted_and_analysis_restarts(svc: RunningService) -> None:
    half = N_TOTAL // 2
    jump = 777  # samples skipped: the producer declares a gap through the frame index
    with tcp_producer(svc.ports["framed"]) as sock:
        for f in framed(signal(half, 0, seed=202), 0):
            sock.sendall(f)
        before = spectrum_after(svc, "fr-a", samples=half, frames=frames_in(half),
                                what="the first half")
        assert svc.channel("fr-a")["counters"]["gaps"] == 0
        start = half + jump
        for f in framed(signal(half, start, seed=203), start):
            sock.sendall(f)
        after = spectrum_after(svc, "fr-a", samples=2 * half, frames=2 * frames_in(half),
                               what="the second half after the gap")
    assert svc.source("framed")["counters"]["gaps"] == 1
    for cid in ("fr-a", "fr-b"):
        ch = svc.channel(cid)
        assert ch["counters"]["gaps"] == 1, ch
        assert ch["status"] == "ok", ch
    # no frame straddles the gap: the average holds only frames after it (the design notes)
    assert after["averages"] == frames_in(half) == before["averages"]
    assert after["seq"] > before["seq"]
    check_tones_and_bands(svc, ("fr-a", "fr-b"), tol_db=0.02)
    svc.assert_healthy()


# --- 3. UDP framed datagrams with one reordered pair ----------------------------------------


def test_udp_datagrams_with_a_late_one(svc: RunningService) -> None:
    frames = framed(signal(N_TOTAL, seed=303), 0)
    late = len(frames) // 2
    order = list(range(len(frames)))
    order[late], order[late + 1] = order[late + 1], order[late]  # k+1 overtakes k
    received = 0

    def caught_up() -> bool:  # every datagram sent so far but (at most) the late one is in
        return bool(svc.source("udp")["counters"]["blocks"] >= received - 1)

    sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    try:
        for i, k in enumerate(order):
            sock.sendto(frames[k], (LOOPBACK, svc.ports["udp"]))
            received = i + 1
            if i % 8 == 7:  # let the receiver drain its socket buffer: no loss on loopback
                svc.wait(caught_up, "the UDP source to keep up")
    finally:
        sock.close()
    # datagram `late` arrives after `late+1`: a gap, then dropped as late (udp.py docstring)
    after_gap = N_TOTAL - (late + 1) * FRAME_SAMPLES
    spec = spectrum_after(svc, "udp-a", samples=N_TOTAL - FRAME_SAMPLES,
                          frames=frames_in(late * FRAME_SAMPLES) + frames_in(after_gap),
                          what="every datagram but the late one")
    counters = svc.source("udp")["counters"]
    assert (counters["late"], counters["gaps"], counters["malformed"]) == (1, 1, 0), counters
    assert spec["averages"] == frames_in(after_gap)
    assert svc.channel("udp-b")["counters"]["gaps"] == 1
    check_tones_and_bands(svc, ("udp-a", "udp-b"), tol_db=0.05)
    svc.assert_healthy()


# --- 4. a followed file, appended, truncated, then rotated ------------------------------


def _append_csv(path: Path, x: np.ndarray, chunk: int) -> None:
    for k in range(0, x.shape[1], chunk):
        with open(path, "a", encoding="ascii") as fh:
            # %.9g round-trips float32 exactly (IEEE 754: 9 significant digits)
            fh.write("".join(f"{a:.9g},{b:.9g}\n" for a, b in x[:, k:k + chunk].T))


def test_file_tail_growth_truncation_and_rotation(svc: RunningService) -> None:
    path = svc.config_path.parent / "tail.csv"
    n = int(3 * FS)
    _append_csv(path, signal(n, seed=404), chunk=int(0.5 * FS))
    first = spectrum_after(svc, "tail-a", samples=n, frames=frames_in(n), what="the appended rows")
    assert first["averages"] == frames_in(n)
    check_tones_and_bands(svc, ("tail-a", "tail-b"), tol_db=0.05)

    path.write_text("", encoding="ascii")  # truncate in place
    svc.wait(lambda: svc.source("tail")["counters"]["truncations"] == 1 or None,
             "the truncation to be seen")
    _append_csv(path, signal(n, seed=405), chunk=int(0.5 * FS))
    second = spectrum_after(svc, "tail-a", samples=2 * n, frames=2 * frames_in(n),
                            what="the rows written after the truncation")
    counters = svc.source("tail")["counters"]
    assert (counters["truncations"], counters["gaps"], counters["malformed"]) == (1, 1, 0)
    assert "truncation" in counters["last_error"]
    assert svc.channel("tail-b")["counters"]["gaps"] == 1
    assert second["seq"] > first["seq"] and second["averages"] == frames_in(n)
    check_tones_and_bands(svc, ("tail-a", "tail-b"), tol_db=0.05)

    # rotation: the file is renamed away and a new one starts under the same name
    path.rename(path.with_name("tail.csv.1"))
    _append_csv(path, signal(n, seed=406), chunk=int(0.5 * FS))
    third = spectrum_after(svc, "tail-a", samples=3 * n, frames=3 * frames_in(n),
                           what="the rows of the new file after the rotation")
    counters = svc.source("tail")["counters"]
    # rename, then a new file under the name: a poll that falls between the two sees the
    # path gone (a deletion) and then a new file; either way the old file was read to its
    # end and the new one from byte 0, which the spectra below check
    assert counters["rotations"] + counters["deletions"] == 1, counters
    assert (counters["gaps"], counters["malformed"]) == (2, 0)
    assert svc.channel("tail-b")["counters"]["gaps"] == 2
    assert third["seq"] > second["seq"] and third["averages"] == frames_in(n)
    check_tones_and_bands(svc, ("tail-a", "tail-b"), tol_db=0.05)
    svc.assert_healthy()


# --- 5. faults ------------------------------------------------------------------------------


class Feeder(threading.Thread):
    """Sends raw f32le blocks to a TCP source until stopped (at most ``max_blocks``)."""

    def __init__(self, port: int, make_block: Callable[[int], np.ndarray], *, prefill: int,
                 block: int = FRAME_SAMPLES, pause_s: float = 0.02, max_blocks: int = 1500):
        super().__init__(daemon=True)
        self.port, self.make_block, self.prefill, self.block = port, make_block, prefill, block
        self.pause_s, self.max_blocks = pause_s, max_blocks
        self.stop = threading.Event()
        self.error: BaseException | None = None

    def run(self) -> None:
        try:
            with tcp_producer(self.port) as sock:
                k = 0
                for _ in range(self.max_blocks):
                    if self.stop.is_set():
                        break
                    n = self.prefill if k == 0 else self.block
                    sock.sendall(np.ascontiguousarray(self.make_block(k)[:, :n].T,
                                                      dtype="<f4").tobytes())
                    k += n
                    if k > self.prefill:
                        self.stop.wait(self.pause_s)
        except BaseException as e:  # reported by the test
            self.error = e


def test_nan_and_flat_line_are_sensor_faults_per_channel(svc: RunningService) -> None:
    def block(k: int) -> np.ndarray:
        x = signal(N_FRAME, k, seed=505 + k, amps=((1.0, 0.2),) * 3)
        x[0, ::50] = np.nan  # a few NaN samples on the first channel
        x[1, :] = 0.25  # a stuck output: a flat line
        return x

    feeder = Feeder(svc.ports["sensor"], block, prefill=N_FRAME)
    feeder.start()
    try:
        def all_three() -> dict[str, dict[str, Any]] | None:
            chans = {c["id"]: c for c in svc.get("channels") if c["source"] == "sensor"}
            want = {"sf-nan": "sensor-fault", "sf-flat": "sensor-fault", "sf-ok": "ok"}
            return chans if {k: chans[k]["status"] for k in want} == want else None

        chans = svc.wait(all_three, "sf-nan and sf-flat in sensor-fault, sf-ok ok")
    finally:
        feeder.stop.set()
        feeder.join(timeout=10)
    assert feeder.error is None, feeder.error
    nan, flat, ok = chans["sf-nan"], chans["sf-flat"], chans["sf-ok"]
    assert "NaN" in nan["fault"] and nan["counters"]["nonfinite_blocks"] >= 1
    assert nan["counters"]["sensor_faults"] == 1  # one transition into the fault
    assert flat["fault"] == "flat line" and flat["counters"]["flat_blocks"] >= 1
    assert flat["counters"]["nonfinite_blocks"] == 0
    assert ok["fault"] == "" and ok["counters"]["sensor_faults"] == 0
    assert ok["counters"]["frames"] >= 1
    # the healthy neighbour's analysis is untouched by the NaN in the same blocks
    tones = by_name(svc.get("channels/sf-ok/tones")["tones"])
    assert abs(db(tones["t1"]["amplitude"], 1.0)) <= 0.02  # issue 2 tolerance
    svc.assert_healthy()


def test_flat_line_in_short_frames_is_a_sensor_fault(svc: RunningService) -> None:
    fs = 25600.0
    n = int(fs)  # one second, in 10-ms frames of 256 samples (common for low-latency links)
    x = signal(n, seed=909, fs=fs, amps=((1.0, 0.2), (1.0, 0.2)))
    x[0, :] = 0.25  # a stuck output: a flat line
    with tcp_producer(svc.ports["hf"]) as sock:
        for f in framed(x, 0, fs=fs):
            sock.sendall(f)
        svc.wait(lambda: svc.channel("hf-ok")["counters"]["samples"] == n or None,
                 "one second on hf-ok")
    flat, ok = svc.channel("hf-flat"), svc.channel("hf-ok")
    assert ok["counters"]["flat_blocks"] == 0 and ok["counters"]["sensor_faults"] == 0
    # counters, not the held status: a second of a stuck output is a fault (the design notes)
    assert flat["counters"]["flat_blocks"] >= 1, flat
    assert flat["counters"]["sensor_faults"] == 1, flat
    svc.assert_healthy()


def test_malformed_frames_and_a_mid_frame_disconnect(svc: RunningService) -> None:
    port = svc.ports["bad"]
    x = signal(8 * N_FRAME, seed=606)
    frames = framed(x, 0)  # 256 samples each
    garbage = bytes(np.random.default_rng(607).integers(0, 256, 100, dtype=np.uint8))
    assert b"QVRF" not in garbage
    blocks = 8  # 8 frames = 2048 samples = one analysis frame length
    with tcp_producer(port) as sock:
        for f in frames[:blocks]:
            sock.sendall(f)
        sock.sendall(garbage)  # bytes between frames where no frame starts
        for f in frames[blocks:2 * blocks]:
            sock.sendall(f)
        n = 2 * blocks * FRAME_SAMPLES
        spec1 = spectrum_after(svc, "bad-a", samples=n, frames=frames_in(n),
                               what="good frames around the garbage")
        c = svc.source("bad")["counters"]
        assert (c["malformed"], c["gaps"]) == (1, 0), c
        assert "no frame starts" in c["last_error"]

        # a frame whose payload was damaged in transit: rejected; its samples are a gap
        bad = bytearray(frames[2 * blocks])
        bad[-5] ^= 0x40
        sock.sendall(bytes(bad))
        for f in frames[2 * blocks + 1:3 * blocks + 1]:
            sock.sendall(f)
        n2 = n + blocks * FRAME_SAMPLES
        after_gap = blocks * FRAME_SAMPLES
        spec2 = spectrum_after(svc, "bad-a", samples=n2, frames=frames_in(n) + frames_in(after_gap),
                               what="good frames after the damaged one")
        c = svc.source("bad")["counters"]
        assert (c["malformed"], c["gaps"]) == (2, 1), c
        assert "CRC" in c["last_error"]
        assert spec2["seq"] > spec1["seq"]

        # then the producer goes away in the middle of a frame
        cut = frames[3 * blocks + 1]
        sock.sendall(cut[: len(cut) // 2])
    svc.wait(lambda: svc.source("bad")["counters"]["disconnects"] == 1 or None,
             "the disconnect to be seen")
    c = svc.source("bad")["counters"]
    assert (c["partial_frames"], c["partial_bytes"]) == (1, len(cut) // 2), c
    assert "incomplete frame" in c["last_error"]
    with tcp_producer(port) as sock:  # the producer comes back and resends that frame whole
        for f in frames[3 * blocks + 1:4 * blocks + 1]:
            sock.sendall(f)
        n3 = n2 + blocks * FRAME_SAMPLES
        after_gap += blocks * FRAME_SAMPLES
        spec3 = spectrum_after(svc, "bad-a", samples=n3,
                               frames=frames_in(n) + frames_in(after_gap),
                               what="frames after the reconnect")
    c = svc.source("bad")["counters"]
    assert (c["connections"], c["malformed"], c["gaps"]) == (2, 2, 1), c
    assert spec3["seq"] > spec2["seq"] and spec3["averages"] == frames_in(after_gap)
    check_tones_and_bands(svc, ("bad-a", "bad-b"), tol_db=0.05)
    svc.assert_healthy()


BAD_CONFIGS = {
    # a value outside a closed set names the key path and lists the allowed ones
    "window": ('[analysis]\nwindow = "hanning"\nfmax_hz = 1000\n\n'
               '[[sources]]\nid = "x"\nkind = "tcp"\nlisten = "127.0.0.1:9"\nformat = "f32le"\n'
               'sample_rate_hz = 2560\nchannels = ["x-a"]\n',
               r"analysis\.window: 'hanning' is not one of .*'hann'"),
    # a cross-check: a socket source needs its sample rate
    "rate": ('[[sources]]\nid = "x"\nkind = "tcp"\nlisten = "127.0.0.1:9"\nformat = "f32le"\n'
             'channels = ["x-a"]\n',
             r"sources\[0\]\.sample_rate_hz: required for kind='tcp'"),
}


@pytest.mark.parametrize("case", sorted(BAD_CONFIGS))
def test_check_rejects_a_bad_config_with_its_key_path(
    svc: RunningService, tmp_path: Path, case: str,
    quaver_cli: Callable[..., subprocess.CompletedProcess[str]],
) -> None:
    text, message = BAD_CONFIGS[case]
    bad = tmp_path / "bad.toml"
    bad.write_text(text, encoding="utf-8")
    res = quaver_cli("check", "-c", str(bad))
    assert res.returncode == 2, res  # README: `quaver check` exits 2 on a bad config
    assert res.stderr.startswith(f"{bad}: 1 problem"), res.stderr
    assert re.search(message, res.stderr), res.stderr
    svc.assert_healthy()  # a bad config elsewhere does not disturb the running service


# --- 6. WebSocket stream --------------------------------------------------------------------


def ws_url(svc: RunningService) -> str:
    return f"ws://{LOOPBACK}:{svc.http_port}/api/v1/stream"


def decode_spectrum(msg: bytes) -> tuple[dict[str, Any], np.ndarray]:
    """The binary spectrum message: u32 LE header length L, L bytes JSON, float32 LE values
    (service/api/stream.py docstring)."""
    (length,) = struct.unpack_from("<I", msg, 0)
    header = json.loads(msg[4:4 + length])
    values = np.frombuffer(msg, dtype="<f4", offset=4 + length)
    assert (4 + length) % 4 == 0 and values.size == header["count"]
    return header, values


def next_spectrum(ws: ClientConnection, channel: str, max_messages: int = 200,
                  timeout_s: float = 15.0) -> tuple[dict[str, Any], np.ndarray]:
    """The next binary spectrum message for ``channel`` (text messages are skipped)."""
    for _ in range(max_messages):
        msg = ws.recv(timeout=timeout_s)
        if isinstance(msg, bytes):
            header, values = decode_spectrum(msg)
            if header["channel"] == channel:
                return header, values
    pytest.fail(f"no spectrum for {channel} within {max_messages} messages")


def subscribe(ws: ClientConnection | socket.socket, **spec: Any) -> None:
    text = json.dumps({"subscribe": spec})
    if isinstance(ws, socket.socket):
        ws.sendall(_client_frame(text.encode()))
    else:
        ws.send(text)


def _client_frame(payload: bytes) -> bytes:
    """One masked text frame, client to server (RFC 6455 §5.2, §5.3)."""
    assert len(payload) < 65536
    head = bytes([0x81, 0x80 | 126]) + struct.pack(">H", len(payload)) if len(payload) >= 126 \
        else bytes([0x81, 0x80 | len(payload)])
    mask = b"\x11\x22\x33\x44"
    return head + mask + bytes(b ^ mask[i % 4] for i, b in enumerate(payload))


def stalled_client(svc: RunningService) -> socket.socket:
    """A WebSocket client on a plain socket (RFC 6455 §4.1 opening handshake) that will not
    read until told to: its receive buffer is kept small so the server's sends back up."""
    s = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    s.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 1 << 16)
    s.settimeout(10.0)
    s.connect((LOOPBACK, svc.http_port))
    key = base64.b64encode(b"quaver-e2e-stall").decode()
    s.sendall((f"GET /api/v1/stream HTTP/1.1\r\nHost: {LOOPBACK}:{svc.http_port}\r\n"
               f"Upgrade: websocket\r\nConnection: Upgrade\r\nSec-WebSocket-Key: {key}\r\n"
               "Sec-WebSocket-Version: 13\r\n\r\n").encode())
    reply = b""
    for _ in range(8192):
        if reply.endswith(b"\r\n\r\n"):
            break
        byte = s.recv(1)  # one byte at a time: leave every frame after the headers unread
        if not byte:
            break
        reply += byte
    assert reply.startswith(b"HTTP/1.1 101") and reply.endswith(b"\r\n\r\n"), reply
    return s


def server_messages(buf: bytearray) -> Iterator[tuple[int, bytes]]:
    """Take the complete unmasked server frames off the front of ``buf`` as (opcode,
    payload) (RFC 6455 §5.2; no extension was negotiated, so no compression)."""
    while len(buf) >= 2:
        op, length, p = buf[0] & 0x0F, buf[1] & 0x7F, 2
        if length == 126:
            if len(buf) < 4:
                return
            (length,), p = struct.unpack_from(">H", buf, 2), 4
        elif length == 127:
            if len(buf) < 10:
                return
            (length,), p = struct.unpack_from(">Q", buf, 2), 10
        if len(buf) < p + length:
            return
        payload = bytes(buf[p:p + length])
        del buf[:p + length]
        yield op, payload


def read_spectra_until(s: socket.socket, channel: str, last_seq: int,
                       timeout_s: float = 30.0) -> list[dict[str, Any]]:
    """Read ``s`` until a spectrum of ``channel`` with seq ``last_seq`` has come; return the
    headers of its spectra (bounded in time, reads and bytes)."""
    s.settimeout(timeout_s)
    deadline = time.monotonic() + timeout_s
    buf = bytearray()
    headers: list[dict[str, Any]] = []
    for _ in range(100000):
        for op, payload in server_messages(buf):
            if op == 2:
                header = decode_spectrum(payload)[0]
                if header["channel"] == channel:
                    headers.append(header)
                    if header["seq"] == last_seq:
                        return headers
        chunk = s.recv(1 << 16)
        if not chunk or time.monotonic() > deadline or len(headers) > 10000:
            break
        buf += chunk
    pytest.fail(f"the stalled client never got seq {last_seq}; got "
                f"{[h['seq'] for h in headers[-5:]]}")


@pytest.mark.slow
def test_websocket_spectra_equal_rest_and_a_stalled_client_delays_no_one(
    svc: RunningService,
) -> None:
    port = svc.ports["ws"]
    x = signal(WS_N + (5 + WS_HOPS) * WS_HOP, seed=707, fs=WS_FS, amps=((1.0, 0.2),))
    frames = framed(x, 0, fs=WS_FS, frame_samples=WS_HOP)  # one hop per frame
    sent = 0

    with connect(ws_url(svc), proxy=None, open_timeout=10, compression=None,
                 max_size=1 << 22) as ws, tcp_producer(port) as producer:
        hello = json.loads(ws.recv(timeout=10))
        assert hello["kind"] == "hello" and "ws-a" in hello["channels"]
        subscribe(ws, channels=["ws-a"], kinds=["spectrum"], max_rate_hz=100)

        # one analysis frame at a time: the WebSocket values equal REST's for that seq
        compared_units = set()
        for step in range(6):
            if step == 3:
                subscribe(ws, channels=["ws-a"], kinds=["spectrum"], max_rate_hz=100,
                          unit="mm/s", amplitude="rms")
            need = WS_N if sent == 0 else sent + WS_HOP
            while sent < need:
                producer.sendall(frames[sent // WS_HOP])
                sent += WS_HOP
            header, values = next_spectrum(ws, "ws-a")
            # the next frame must not fall under the 100/s rate limit, or it is held back
            # until its interval is up and REST may have moved on (stream.py): pause well
            # past 10 ms (a pause, not a timing check)
            time.sleep(0.05)
            rest = svc.get("channels/ws-a/spectrum", unit=header["unit"],
                           amplitude=header["amplitude"])
            assert rest["seq"] == header["seq"]  # nothing else was published meanwhile
            assert header["averages"] == rest["averages"] == frames_in(sent, WS_N, WS_HOP)
            assert header["df_hz"] == rest["df_hz"] == pytest.approx(WS_FS / WS_N)
            np.testing.assert_array_equal(values, np.array(rest["values"], dtype=np.float32))
            compared_units.add((header["unit"], header["amplitude"]))
        assert ("g", "peak") in compared_units and ("mm/s", "rms") in compared_units

        # a client that subscribes to everything and never reads must not hold up another
        stalled = stalled_client(svc)
        try:
            subscribe(stalled, channels="*", max_rate_hz=100)
            subscribe(ws, channels=["ws-a"], kinds=["spectrum"], max_rate_hz=100)
            seq0 = svc.get("channels/ws-a/spectrum")["seq"]
            stop = threading.Event()
            errors: list[BaseException] = []

            def produce() -> None:  # one analysis frame every ~30 ms (~10x real time)
                try:
                    for k in range(sent // WS_HOP, len(frames)):
                        if stop.is_set():
                            return
                        producer.sendall(frames[k])
                        stop.wait(0.03)
                except BaseException as e:
                    errors.append(e)

            feeder = threading.Thread(target=produce, daemon=True)
            feeder.start()
            got: list[dict[str, Any]] = []
            try:
                for _ in range(5000):
                    try:
                        header, _ = next_spectrum(ws, "ws-a", timeout_s=3.0)
                    except TimeoutError:
                        break  # the producer has finished and the stream is quiet
                    if header["seq"] > seq0:
                        got.append(header)
            finally:
                stop.set()
                feeder.join(timeout=10)
            assert not errors, errors
            last = svc.get("channels/ws-a/spectrum")["seq"]
            published = last - seq0  # one channel on this source: seq steps by one per frame
            total = frames_in(x.shape[1], WS_N, WS_HOP)
            assert published == total - frames_in(sent, WS_N, WS_HOP)
            seqs = [h["seq"] for h in got]
            assert seqs == sorted(set(seqs)) and seqs[-1] <= last
            # every frame not sent to this client is counted in its `missed` (stream.py)
            for a, b in zip(got, got[1:], strict=False):
                assert b["seq"] - a["seq"] - 1 == b["missed"] - a["missed"], (a, b)
            # the reading client got most frames although the other one never read
                    # the reading client got (nearly) every frame although the other never read
            assert len(got) >= published * 3 // 4, (len(got), published)
            # the stalled client, reading at last, gets the newest frame; the server skipped
            # (and counted) the frames that did not fit its buffers instead of waiting
            late = read_spectra_until(stalled, "ws-a", last)
            assert late[-1]["missed"] >= published // 4, [h["missed"] for h in late[-3:]]
            assert len([h for h in late if h["seq"] > seq0]) < len(got)
        finally:
            stalled.close()
    svc.assert_healthy()


def test_websocket_rate_limit_still_delivers_the_newest_frame(svc: RunningService) -> None:
    x = signal(N_FRAME + 2 * HOP, seed=808, amps=((1.0, 0.2),))
    # three blocks, each completing one analysis frame: published within moments of each other
    blocks = [encode_frame(x[:, :N_FRAME], "f32le", FS, 0),
              encode_frame(x[:, N_FRAME:N_FRAME + HOP], "f32le", FS, N_FRAME),
              encode_frame(x[:, N_FRAME + HOP:], "f32le", FS, N_FRAME + HOP)]
    with connect(ws_url(svc), proxy=None, open_timeout=10, compression=None) as ws, \
            tcp_producer(svc.ports["ws2"]) as producer:
        assert json.loads(ws.recv(timeout=10))["kind"] == "hello"
        subscribe(ws, channels=["ws2-a"], kinds=["spectrum"], max_rate_hz=1)
        for b in blocks:
            producer.sendall(b)
        spec = spectrum_after(svc, "ws2-a", samples=x.shape[1], frames=3, what="three frames")
        last = spec["seq"]
        seqs = []
        for _ in range(10):  # at 1 frame/s the newest must come within a few seconds
            try:
                header, _ = next_spectrum(ws, "ws2-a", timeout_s=4.0)
            except TimeoutError:
                break
            seqs.append(header["seq"])
            if header["seq"] == last:
                break
        assert seqs and seqs[-1] == last, (seqs, last)

"""End-to-end checks of alarms, events, evidence, trends, metrics and access on a real service.

Drives a quaver process through a framed TCP source (plant time set by the frame headers) and
reads it back only over HTTP, WebSocket, the CLI and its SQLite file; no service internals."""

from __future__ import annotations

import contextlib
import csv
import hashlib
import io
import itertools
import json
import math
import signal
import socket
import sqlite3
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

import httpx
import numpy as np
import pytest
import scipy.io.wavfile
import scipy.signal
from prometheus_client.parser import text_string_to_metric_families
from websockets.exceptions import ConnectionClosed, InvalidStatus
from websockets.sync.client import connect as ws_connect
from websockets.typing import Origin

from bench import harness
from service.wire import encode_frame

T = TypeVar("T")
REPO = Path(__file__).resolve().parents[2]
LOOPBACK = "127.0.0.1"
START_TIMEOUT_S = 20.0
STOP_TIMEOUT_S = 10.0
POLL_S = 0.02

# --- the plant: what we send ------------------------------------------------------------------

FS = 2560.0  # Hz = 2.56 × Fmax 1000 Hz (common practice: fs = 2.56·Fmax)
N_FRAME = 1024  # 2.56 × 400 lines (common practice: N = 2.56·lines)
HOP = N_FRAME // 4  # 75 % overlap (the [analysis] default)
BLOCK = HOP  # samples per framed TCP frame: each block completes exactly one new frame
BLOCK_NS = 100_000_000  # BLOCK / FS in ns, exact
HOP_NS = BLOCK_NS
FRAME_NS = 400_000_000  # N_FRAME / FS in ns
F_HZ = 100.0  # on line 40 exactly (df = fs/N = 2.5 Hz), inside band b
BAND = (90.0, 110.0)
NOISE_G = 0.002  # RMS of added white noise, g (fixed seed)
CHANNELS = ("m1", "m2")  # m1: non-latching rule, m2: latching rule, both on band b
PHASES = (0.3, 1.9)  # rad, per channel
# Plant clock: frame headers carry T0_NS + sample index / fs. T0 is 50 ms after a minute
# boundary, so no frame end (every 100 ms from T0 + 0.4 s) sits on a trend bucket edge.
# The service may carry times through float64 (spacing 256 ns near 1.9e18 ns): compare
# plant times within CLOCK_NS.
CLOCK_NS = 1_000
MINUTE_NS = 1_899_999_960 * 1_000_000_000  # 2030-03-17, a whole minute since the epoch
T0_NS = MINUTE_NS + 50_000_000

# --- the rules ----------------------------------------------------------------------------------

ALERT, DANGER, HYST = 0.5, 1.0, 0.1  # g RMS in band b; clear below level·(1 − h)
ON_S, OFF_S = 2.0, 3.0
ON_NS, OFF_NS = round(ON_S * 1e9), round(OFF_S * 1e9)
BEFORE_S = AFTER_S = 1.5  # evidence waveform around a raising event
MAX_BODY = 2048
RULE1, RULE2 = "m1.band.b", "m2.band.b"  # "<channel>.band.<name>" (README / alarms.rule_id)

TOKENS = {  # plain tokens stay here; the config holds only their SHA-256
    "viewer": ("vic-viewer", "viewer-7a1c0e93f2b4d6a8"),
    "operator": ("olga-operator", "operator-5e8d2b7c41f0a396"),
    "admin": ("ada-admin", "admin-c3f9a0e1d7b25468"),
}


def bearer(role: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {TOKENS[role][1]}"}


def block_t_ns(block: int) -> int:
    """Header time of a block's first sample (plant clock)."""
    return T0_NS + block * BLOCK_NS


def frame_t_ns(block: int) -> int:
    """Time of the frame a block completes: the end of that block (block ≥ 3)."""
    return T0_NS + (block + 1) * BLOCK_NS


def sine_blocks(
    rms: tuple[float, float], first_block: int, count: int, rng: np.random.Generator
) -> np.ndarray:
    """float32 [2, count·BLOCK]: a 100 Hz sine per channel with the given RMS (g), plus
    noise. A sine of peak A reads A/√2 RMS (common practice), so peak = RMS·√2."""
    k = np.arange(first_block * BLOCK, (first_block + count) * BLOCK)
    out = np.empty((2, k.size), dtype=np.float32)
    for c in range(2):
        x = math.sqrt(2) * rms[c] * np.sin(2 * np.pi * F_HZ * k / FS + PHASES[c])
        out[c] = x + rng.normal(0.0, NOISE_G, k.size)
    return out


class Plant:
    """Our producer on the service's framed TCP source: block b carries samples b·BLOCK… and
    the header time T0 + b·BLOCK/fs (the plant clock)."""

    def __init__(self, port: int, seed: int, first_block: int = 0) -> None:
        self.sock = socket.create_connection((LOOPBACK, port), timeout=10)
        self.rng = np.random.default_rng(seed)
        self.next_block = first_block

    def send(self, rms: tuple[float, float], count: int) -> None:
        """Send ``count`` blocks of sines with RMS ``rms`` (m1, m2), one frame per block."""
        x = sine_blocks(rms, self.next_block, count, self.rng)
        self.send_samples(x)

    def send_samples(self, x: np.ndarray) -> None:
        frames = []
        for j in range(x.shape[1] // BLOCK):
            b = self.next_block + j
            frames.append(
                encode_frame(
                    x[:, j * BLOCK : (j + 1) * BLOCK], "f32le", FS, b * BLOCK, block_t_ns(b)
                )
            )
        self.sock.sendall(b"".join(frames))
        self.next_block += x.shape[1] // BLOCK

    def send_malformed(self) -> None:
        """One frame whose payload does not match its CRC (must be rejected and counted)."""
        x = sine_blocks((0.3, 0.3), self.next_block, 1, np.random.default_rng(99))
        bad = bytearray(
            encode_frame(x, "f32le", FS, self.next_block * BLOCK, block_t_ns(self.next_block))
        )
        bad[-1] ^= 0xFF
        self.sock.sendall(bytes(bad))

    def close(self) -> None:
        with contextlib.suppress(OSError):
            self.sock.close()


# --- an independent reference: band value per frame, and the documented alarm semantics ------


def reference_band(x: np.ndarray) -> np.ndarray:
    """Band-b RMS (g) after every frame of one channel's samples ``x`` (stream from index 0).

    Frames of N samples every hop from index 0, periodic Hann window (scipy.signal.get_window);
    PS = 2|X|²/S1² and band RMS = √(Σ s_q·PS_q / ENBW_bins) with ENBW_bins = N·S2/S1²
    (Heinzel et al. 2002, §9–10; docs/design.md "What it computes"; Harris 1978 Table 1: Hann 1.5
    bins); s_q is the share of line q's width inside the band (common practice: the split
    documented in dsp/bands.band_weights — it only matters for frames that straddle an
    amplitude step); powers, not magnitudes, averaged (Heinzel et al. 2002 §8) exponentially,
    y += (x − y)/min(k, averages) with averages = 2 (common practice; the start-up as
    dsp/averaging.py documents it).
    """
    w = scipy.signal.get_window("hann", N_FRAME)  # scipy.signal: periodic by default
    s1, s2 = w.sum(), (w**2).sum()
    enbw_bins = N_FRAME * s2 / s1**2
    df = FS / N_FRAME
    f = np.arange(N_FRAME // 2 + 1) * df
    share = np.clip(np.minimum(BAND[1], f + df / 2) - np.maximum(BAND[0], f - df / 2), 0, None) / df
    frames = np.lib.stride_tricks.sliding_window_view(x.astype(np.float64), N_FRAME)[::HOP]
    ps = 2 * np.abs(np.fft.rfft(frames * w, axis=1)) ** 2 / s1**2
    p = ps @ share
    y = np.empty_like(p)
    acc = 0.0
    for k, v in enumerate(p, start=1):
        acc = v if k == 1 else acc + (v - acc) / min(k, 2)
        y[k - 1] = acc
    return np.sqrt(y / enbw_bins)


def reference_events(t_ns: np.ndarray, v: np.ndarray, *, latch: bool) -> list[tuple[int, str, str]]:
    """(t_ns, from, to) from the semantics documented in service/alarms/__init__.py (common
    practice): a level is reached at value ≥ level and must hold at every frame for on_delay;
    it clears below level·(1 − h) held for off_delay; the most severe qualified level wins; a
    latching rule that clears goes to "latched"."""
    names = {0: "normal", 1: "alert", 2: "danger"}
    levels = (ALERT, DANGER)
    above: list[int | None] = [None, None]
    below: list[int | None] = [None, None]
    rank, state, out = 0, "normal", []
    for t, x in zip(t_ns.tolist(), v.tolist(), strict=True):
        for k, lev in enumerate(levels):
            above[k] = (above[k] if above[k] is not None else t) if x >= lev else None
            below[k] = (below[k] if below[k] is not None else t) if x < lev * (1 - HYST) else None
        new = rank
        for k in (2, 1):
            s = above[k - 1]
            if k > rank and s is not None and t - s >= ON_NS:
                new = k
                break
        if new == rank:
            for k in (1, 2):
                s = below[k - 1]
                if k <= rank and s is not None and t - s >= OFF_NS:
                    new = k - 1
                    break
        if new != rank:
            to = names[new] if new else ("latched" if latch else "normal")
            out.append((t, state, to))
            rank, state = new, to
    return out


# --- running the real service ---------------------------------------------------------------------


def config_doc(data_dir: Path, *, tokens: bool = True) -> dict[str, Any]:
    """The config of the scripted run (as dicts for ``bench.harness``): one framed TCP source
    ``rig`` (listen ``auto``) of m1 and m2, band b on every channel and a rule on it per
    channel (m2 latches), the viewer/operator/admin tokens unless ``tokens`` is false."""
    doc: dict[str, Any] = {
        "service": {"data_dir": str(data_dir), "trend_step_s": 1,
                    "evidence_before_s": BEFORE_S, "evidence_after_s": AFTER_S,
                    "max_body_bytes": MAX_BODY},
        "analysis": {"fmax_hz": 1000, "lines": 400, "window": "hann", "overlap": 0.75,
                     "averaging": "exponential", "averages": 2, "unit": "acceleration",
                     "output_unit": "g", "amplitude": "rms"},
        "sources": [{"id": "rig", "kind": "tcp", "listen": "auto", "format": "framed",
                     "sample_rate_hz": FS, "channels": ["m1", "m2"], "queue_blocks": 100000}],
        "channels": [{"id": "m1", "input_unit": "g"}, {"id": "m2", "input_unit": "g"}],
        "bands": [{"channel": "*", "name": "b", "lo_hz": BAND[0], "hi_hz": BAND[1]}],
        "alarms": [{"channel": ch, "band": "b", "alert": ALERT, "danger": DANGER,
                    "hysteresis": HYST, "on_delay_s": ON_S, "off_delay_s": OFF_S, "latch": latch}
                   for ch, latch in (("m1", False), ("m2", True))],
    }
    if tokens:
        doc["tokens"] = [{"name": name, "role": role,
                          "sha256": hashlib.sha256(tok.encode()).hexdigest()}
                         for role, (name, tok) in TOKENS.items()]
    return doc


LAUNCH = (
    "import sys, service.runner, service.config; "
    "sys.exit(service.runner.run_service(service.config.load_config(sys.argv[1])))"
)


@dataclass
class Svc(harness.Child):
    """One service process (``bench.harness.Child``); ``client`` talks to its HTTP API."""

    client: httpx.Client = field(default=None, repr=False)  # type: ignore[assignment]

    @property
    def tcp_port(self) -> int:
        return self.ports["rig"]

    def log_tail(self, n: int = 30) -> str:
        return "service log:\n" + super().log_tail(n)

    def get(self, path: str, headers: dict[str, str] | None = None, **params: Any) -> Any:
        r = self.client.get(f"/api/v1/{path}", params=params or None, headers=headers)
        assert r.status_code == 200, f"GET {path} {params} -> {r.status_code} {r.text[:300]}"
        return r.json()

    def wait(self, probe: Callable[[], T | None | bool], what: str, timeout_s: float = 15.0) -> T:
        deadline = time.monotonic() + timeout_s
        for _ in range(int(timeout_s / POLL_S) + 1):
            if not self.alive():
                pytest.fail(
                    f"service exited ({self.proc.returncode}) waiting for {what}\n{self.log_tail()}"
                )
            got = probe()
            if got is not None and got is not False:
                return got  # type: ignore[return-value]
            if time.monotonic() > deadline:
                break
            time.sleep(POLL_S)
        pytest.fail(f"timed out after {timeout_s:g} s waiting for {what}\n{self.log_tail()}")

    def alarms(self) -> dict[str, dict[str, Any]]:
        return {a["rule"]: a for a in self.get("alarms", all="true")}

    def events(self, **params: Any) -> list[dict[str, Any]]:
        """Every event (oldest first), paging through /events."""
        out: list[dict[str, Any]] = []
        before: int | None = None
        for _ in range(100):
            q = dict(params, limit=1000)
            if before is not None:
                q["before_id"] = before
            page = self.get("events", **q)
            out += page["events"]
            before = page["next_before_id"]
            if before is None:
                break
        return out[::-1]

    def event_at(self, rule: str, t_ns: int) -> dict[str, Any]:
        """Wait for the event of ``rule`` at ``t_ns`` to show in /events (it is committed
        before it is announced, so this is the moment a client could first see it)."""

        def probe() -> dict[str, Any] | None:
            channel = rule.split(".")[0]
            hits = [e for e in self.events(channel=channel) if e["rule"] == rule]
            return next((e for e in hits if e["t_ns"] == t_ns), None)

        return self.wait(probe, f"the {rule} event at {t_ns} in /events")

    def wait_evidence(self, event_id: int) -> None:
        self.wait(
            lambda: self.get(f"events/{event_id}")["has_evidence"], f"evidence of event {event_id}"
        )

    def evaluated(self, block: int) -> None:
        """Wait until the alarm engine has evaluated the frame that ``block`` completes, on
        both channels (then /alarms, /spectrum and /bands show that frame)."""
        t = frame_t_ns(block)
        self.wait(
            lambda: all((a["value_ns"] or 0) >= t - CLOCK_NS for a in self.alarms().values()),
            f"the frame of block {block} to be evaluated",
        )


def start_service(workdir: Path, data_dir: Path) -> Svc:
    """Start the real service (``run_service(load_config(path))``) on free loopback ports and
    wait until /api/v1/health answers (``bench.harness``, which retries when a probed port
    was taken meanwhile)."""
    try:
        child = harness.start_service(
            config_doc(data_dir), workdir, command=lambda path: [sys.executable, "-c", LAUNCH,
                                                                 str(path)],
            headers=bearer("viewer"), timeout_s=START_TIMEOUT_S,
        )
    except harness.HarnessError as e:
        pytest.fail(str(e))
    # every read needs a token once [[tokens]] exist (README "Access")
    client = httpx.Client(base_url=child.base_url, timeout=10.0, trust_env=False,
                          headers=bearer("viewer"))
    return child.promote(Svc, client=client)


def stop_service(svc: Svc, sig: int = signal.SIGTERM) -> int:
    """Signal the process (SIGTERM: orderly stop; SIGKILL: no clean-up) and reap it."""
    svc.client.close()
    return harness.stop_process(svc.proc, sig, STOP_TIMEOUT_S)


@contextlib.contextmanager
def running(workdir: Path, data_dir: Path) -> Iterator[Svc]:
    svc = start_service(workdir, data_dir)
    try:
        yield svc
    finally:
        stop_service(svc)


# --- the scripted run every read-only check below looks at ------------------------------------

# (blocks, m1 RMS, m2 RMS) in g; 10 blocks = 1 s of plant time
SEGMENTS = (
    (60, 0.30, 0.30),  # below alert
    (80, 0.70, 0.70),  # above alert, below danger: both → alert after on_delay
    (80, 1.30, 0.30),  # m1 above danger → danger; m2 clears → latched (it latches)
    (100, 0.48, 0.30),  # m1 between alert·(1−h) = 0.45 and alert: danger → alert, no clear
    (80, 0.30, 0.30),  # m1 below 0.45: alert → normal
)
EXPECTED_M1 = [("normal", "alert"), ("alert", "danger"), ("danger", "alert"), ("alert", "normal")]
EXPECTED_M2 = [("normal", "alert"), ("alert", "latched")]


@dataclass
class Stage:
    """What the API showed at the end of one segment (no data flowing)."""

    block: int
    alarms: dict[str, dict[str, Any]]
    active: list[dict[str, Any]]
    bands: dict[str, Any]
    metrics: str


@dataclass
class Run:
    svc: Svc
    samples: np.ndarray  # float32 [2, n], everything sent (from index 0)
    seg_start: list[int]  # first block of each segment
    ref: dict[str, np.ndarray]  # band b per frame (frame p ends at block p + 3)
    ref_t: np.ndarray  # frame times, ns
    predicted: dict[str, list[tuple[int, str, str]]]
    stages: list[Stage]
    at_event: dict[tuple[str, str, str], dict[str, Any]]  # (rule, from, to) → /spectrum then


RANK = {"normal": 0, "latched": 0, "alert": 1, "danger": 2}


def raises(from_state: str, to_state: str) -> bool:
    return RANK[to_state] > RANK[from_state]


def _script(svc: Svc) -> Run:
    rng = np.random.default_rng(20240611)
    blocks = sum(s[0] for s in SEGMENTS)
    parts, seg_start, b = [], [], 0
    for count, r1, r2 in SEGMENTS:
        seg_start.append(b)
        parts.append(sine_blocks((r1, r2), b, count, rng))
        b += count
    x = np.concatenate(parts, axis=1)
    ref = {ch: reference_band(x[c]) for c, ch in enumerate(CHANNELS)}
    ref_t = np.array([frame_t_ns(p + 3) for p in range(ref["m1"].size)], dtype=np.int64)
    predicted = {
        RULE1: reference_events(ref_t, ref["m1"], latch=False),
        RULE2: reference_events(ref_t, ref["m2"], latch=True),
    }
    # stop right at every predicted raising event of m1 to read /spectrum at that moment
    stops = {(t - T0_NS) // BLOCK_NS - 1: z for t, a, z in predicted[RULE1] if raises(a, z)}
    plant = Plant(svc.tcp_port, seed=0)
    plant.send_malformed()
    stages: list[Stage] = []
    at_event: dict[tuple[str, str, str], dict[str, Any]] = {}
    sent = 0
    ends = [s + c for s, (c, _, _) in zip(seg_start, SEGMENTS, strict=True)]
    try:
        for stop in sorted(set(stops) | set(e - 1 for e in ends)):
            plant.send_samples(x[:, sent * BLOCK : (stop + 1) * BLOCK])
            sent = stop + 1
            svc.evaluated(stop)
            if stop in stops:
                for _ in range(3):  # the reference may be a frame early: step block by block
                    if svc.alarms()[RULE1]["state"] == stops[stop]:
                        break
                    plant.send_samples(x[:, sent * BLOCK : (sent + 1) * BLOCK])
                    sent += 1
                    svc.evaluated(sent - 1)
                ev = svc.event_at(RULE1, svc.alarms()[RULE1]["since_ns"])
                at_event[(RULE1, ev["from_state"], ev["to_state"])] = {
                    "spectrum": svc.get("channels/m1/spectrum"),
                    "event": ev,
                }
            if sent in ends:
                stages.append(
                    Stage(
                        sent - 1,
                        svc.alarms(),
                        svc.get("alarms"),
                        svc.get("channels/m1/bands"),
                        svc.client.get("/metrics").text,
                    )
                )
    finally:
        plant.close()
    assert sent == blocks
    return Run(svc, x, seg_start, ref, ref_t, predicted, stages, at_event)


@pytest.fixture(scope="module")
def run(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Run]:
    work = tmp_path_factory.mktemp("alarm-api")
    with running(work, work / "data") as svc:
        yield _script(svc)


def ref_at(run: Run, channel: str, t_ns: int) -> float:
    """The reference band value of the frame at plant time ``t_ns``."""
    p = int(np.argmin(np.abs(run.ref_t - t_ns)))
    assert abs(int(run.ref_t[p]) - t_ns) <= CLOCK_NS, "no frame at that time"
    return float(run.ref[channel][p])


def transitions(events: list[dict[str, Any]], rule: str) -> list[dict[str, Any]]:
    return [e for e in events if e["rule"] == rule and e["kind"] == "transition"]


# --- 1. levels, delays, hysteresis ------------------------------------------------------------


def test_alarm_goes_normal_alert_danger_alert_normal_at_levels_and_delays(run: Run) -> None:
    evs = transitions(run.svc.events(channel="m1"), RULE1)
    assert [(e["from_state"], e["to_state"]) for e in evs] == EXPECTED_M1
    # the documented semantics give the same sequence for what we sent (signal design check)
    assert [(a, z) for _, a, z in run.predicted[RULE1]] == EXPECTED_M1
    steps = [block_t_ns(run.seg_start[i]) for i in (1, 2, 3, 4)]  # amplitude changed here
    delays = [ON_NS, ON_NS, OFF_NS, OFF_NS]
    levels = [ALERT, DANGER, DANGER * (1 - HYST), ALERT * (1 - HYST)]  # crossed thresholds
    for e, (t_pred, _, _), t_step, delay, level in zip(
        evs, run.predicted[RULE1], steps, delays, levels, strict=True
    ):
        # service/alarms/__init__.py (common practice): the value must hold past the level for the
        # whole delay, and it cannot have crossed before the amplitude changed
        assert e["t_ns"] >= t_step + delay - CLOCK_NS, e
        # ... at the frame where the documented semantics put it, within one hop + block
        assert abs(e["t_ns"] - t_pred) <= HOP_NS + BLOCK_NS, (e, t_pred)
        assert e["level"] == pytest.approx(level, rel=1e-9)
        assert e["value"] == pytest.approx(ref_at(run, "m1", e["t_ns"]), rel=1e-3)
        assert e["unit"] == "g" and e["channel"] == "m1" and not e["latched"]
        if RANK[e["to_state"]] > RANK[e["from_state"]]:
            assert e["value"] >= level
        else:
            assert e["value"] < level
    # the alarms as /alarms showed them at the end of each segment
    want = ["normal", "alert", "danger", "alert", "normal"]
    for st, state, (_, rms, _) in zip(run.stages, want, SEGMENTS, strict=True):
        a = st.alarms[RULE1]
        assert a["state"] == state, (st.block, a)
        # the band value of a steady sine is its RMS (A/√2, common practice), noise ≪ 1 %
        assert a["value"] == pytest.approx(rms, rel=0.01)
        assert a["value"] == pytest.approx(ref_at(run, "m1", frame_t_ns(st.block)), rel=1e-3)
        assert a["level"] == {"normal": None, "alert": ALERT, "danger": DANGER}[state]
        assert (a["alert"], a["danger"], a["unit"]) == (ALERT, DANGER, "g")
        assert (RULE1 in [x["rule"] for x in st.active]) == (state != "normal")
    # hysteresis: 0.48 g stayed above alert·(1 − h) = 0.45 g for 10 s ≫ off_delay: no clear
    held = run.stages[3].alarms[RULE1]
    assert ALERT * (1 - HYST) < held["value"] < ALERT
    assert held["state"] == "alert" and held["since_ns"] == evs[2]["t_ns"]


# --- 2. latch and acknowledge ----------------------------------------------------------------


def test_latched_alarm_needs_an_operator_to_acknowledge(run: Run) -> None:
    svc = run.svc
    evs = transitions(svc.events(channel="m2"), RULE2)
    assert [(e["from_state"], e["to_state"]) for e in evs] == EXPECTED_M2
    assert [(a, z) for _, a, z in run.predicted[RULE2]] == EXPECTED_M2
    for e, (t_pred, _, _) in zip(evs, run.predicted[RULE2], strict=True):
        assert abs(e["t_ns"] - t_pred) <= HOP_NS + BLOCK_NS
    assert evs[-1]["latched"] and evs[-1]["value"] < ALERT * (1 - HYST)
    # it stays latched while the value is low (stages 2-4: m2 at 0.3 g)
    assert [st.alarms[RULE2]["state"] for st in run.stages] == [
        "normal",
        "alert",
        "latched",
        "latched",
        "latched",
    ]
    a = svc.alarms()[RULE2]
    assert (a["state"], a["latched"], a["acked"], a["peak"]) == ("latched", True, False, "alert")
    assert a["value"] == pytest.approx(0.30, rel=0.01)
    assert RULE2 in [x["rule"] for x in svc.get("alarms")]

    url = f"/api/v1/alarms/{RULE2}/ack"
    alarms_before, events_before = svc.alarms(), svc.events()
    r = svc.client.post(url, json={"note": "no token"}, headers={"Authorization": ""})
    assert r.status_code == 401 and r.headers["www-authenticate"] == "Bearer"
    r = svc.client.post(url, json={"note": "bad"}, headers={"Authorization": "Bearer nope-123"})
    assert r.status_code == 401
    r = svc.client.post(url, json={"note": "viewer"}, headers=bearer("viewer"))
    assert r.status_code == 403 and "operator" in r.json()["detail"]
    assert svc.alarms() == alarms_before and svc.events() == events_before  # nothing changed

    note = "bearing greased, vibration back to normal"
    r = svc.client.post(url, json={"note": note}, headers=bearer("operator"))
    assert r.status_code == 200, r.text
    ack = r.json()
    assert (ack["kind"], ack["rule"], ack["from_state"], ack["to_state"]) == (
        "ack",
        RULE2,
        "latched",
        "normal",
    )
    assert (ack["acked_by"], ack["note"]) == (TOKENS["operator"][0], note)
    stored = svc.get(f"events/{ack['id']}")
    assert {k: stored[k] for k in ack} == ack  # committed as announced
    assert svc.events()[-1]["id"] == ack["id"] and len(svc.events()) == len(events_before) + 1
    after = svc.alarms()[RULE2]
    assert (after["state"], after["latched"], after["acked"]) == ("normal", False, False)
    assert RULE2 not in [x["rule"] for x in svc.get("alarms")]

    r = svc.client.post(url, json={"note": "again"}, headers=bearer("operator"))
    assert r.status_code == 409 and "normal" in r.json()["detail"]
    r = svc.client.post("/api/v1/alarms/m9.band.zz/ack", json={}, headers=bearer("operator"))
    assert r.status_code == 404 and "m9.band.zz" in r.json()["detail"]
    # admin ranks above operator: passes the role check, then 409 (m1 is normal)
    r = svc.client.post(f"/api/v1/alarms/{RULE1}/ack", json={}, headers=bearer("admin"))
    assert r.status_code == 409
    assert len(svc.events()) == len(events_before) + 1


# --- 4. evidence -------------------------------------------------------------------------------


def test_evidence_is_the_spectrum_and_waveform_of_the_moment(run: Run) -> None:
    svc = run.svc
    assert set(run.at_event) == {(RULE1, "normal", "alert"), (RULE1, "alert", "danger")}
    for (_, _, to), seen in run.at_event.items():
        ev, then = seen["event"], seen["spectrum"]
        rms = SEGMENTS[1 if to == "alert" else 2][1]
        svc.wait_evidence(ev["id"])
        base = f"/api/v1/events/{ev['id']}/evidence"
        j = svc.get(f"events/{ev['id']}/evidence")
        spec = j["spectrum"]
        # the spectrum kept is the one /spectrum served when the event appeared (same frame)
        assert abs(then["timestamp_ns"] - ev["t_ns"]) <= CLOCK_NS
        assert spec["t_ns"] == then["timestamp_ns"]
        got = np.asarray(spec["values"], dtype=np.float32)
        np.testing.assert_array_equal(got, np.asarray(then["values"], dtype=np.float32))
        assert (spec["f0_hz"], spec["df_hz"], spec["unit"], spec["amplitude"]) == (
            0.0,
            FS / N_FRAME,
            "g",
            "rms",
        )
        # a sine on a line centre reads its RMS on that line (Heinzel et al. 2002, §9)
        assert got[int(F_HZ / (FS / N_FRAME))] == pytest.approx(rms, rel=0.01)

        wave = np.asarray(j["waveform"]["samples"], dtype=np.float32)
        assert j["fs"] == j["waveform"]["fs"] == FS
        assert wave.size == round((BEFORE_S + AFTER_S) * FS)
        # first sample BEFORE_S before the event, on the plant clock we sent in the headers
        t0 = j["t0_ns"]
        assert abs(t0 - (ev["t_ns"] - round(BEFORE_S * 1e9))) <= CLOCK_NS
        k0 = round((t0 - T0_NS) * FS / 1e9)
        np.testing.assert_array_equal(wave, run.samples[0, k0 : k0 + wave.size])
        # RMS of a sine of peak A is A/√2 (common practice); we sent peak rms·√2
        assert float(np.sqrt(np.mean(wave.astype(np.float64) ** 2))) == pytest.approx(rms, rel=0.01)

        r = svc.client.get(base, params={"format": "wav"})
        assert r.status_code == 200 and r.headers["content-type"] == "audio/wav"
        rate, data = scipy.io.wavfile.read(io.BytesIO(r.content))  # scipy.io.wavfile
        assert rate == FS and data.dtype == np.float32
        np.testing.assert_array_equal(data.reshape(-1), wave)
        r = svc.client.get(base, params={"format": "npy"})
        np.testing.assert_array_equal(np.load(io.BytesIO(r.content), allow_pickle=False), wave)
        r = svc.client.get(base, params={"format": "npy", "part": "spectrum"})
        np.testing.assert_array_equal(np.load(io.BytesIO(r.content), allow_pickle=False), got)
        r = svc.client.get(base, params={"format": "csv"})
        rows = list(csv.reader(io.StringIO(r.text)))
        assert rows[0] == ["time_s", "value"]
        tv = np.array(rows[1:], dtype=np.float64)
        np.testing.assert_allclose(tv[:, 0], np.arange(wave.size) / FS, rtol=1e-6, atol=1e-9)
        np.testing.assert_allclose(tv[:, 1], wave, rtol=1e-6, atol=1e-7)  # %.7g in the file
        r = svc.client.get(base, params={"format": "csv", "part": "spectrum"})
        rows = list(csv.reader(io.StringIO(r.text)))
        assert rows[0] == ["frequency_hz", "value"]
        fv = np.array(rows[1:], dtype=np.float64)
        np.testing.assert_allclose(fv[:, 0], np.arange(got.size) * FS / N_FRAME, rtol=1e-6)
        np.testing.assert_allclose(fv[:, 1], got, rtol=1e-6, atol=1e-9)
    # a clearing event keeps no evidence; an unknown event has none either
    clear = transitions(svc.events(channel="m1"), RULE1)[-1]
    assert not clear["has_evidence"]
    assert svc.client.get(f"/api/v1/events/{clear['id']}/evidence").status_code == 404
    assert svc.client.get("/api/v1/events/987654/evidence").status_code == 404


# --- 5. trends ---------------------------------------------------------------------------------


def test_trend_buckets_match_the_band_values_sent(run: Run) -> None:
    svc = run.svc
    since = MINUTE_NS / 1e9  # exact in float64 (a multiple of 512 ns)
    blocks = sum(s[0] for s in SEGMENTS)
    done_s = (blocks * BLOCK_NS + T0_NS - MINUTE_NS) // 1_000_000_000  # newest bucket still open
    fine = svc.get("channels/m1/trend", name="band:b", since=since, until=since + done_s, step=1)
    assert fine["step_s"] == 1 and fine["name"] == "band:b"
    pts = fine["points"]
    assert [p["t_ns"] for p in pts] == [MINUTE_NS + k * 1_000_000_000 for k in range(done_s)]
    # expected: the reference value of every frame (one per 100 ms) inside each 1 s bucket
    bucket = (run.ref_t - MINUTE_NS) // 1_000_000_000
    ref = run.ref["m1"]
    for k, p in enumerate(pts):
        v = ref[bucket == k]
        assert p["count"] == v.size == (6 if k == 0 else 10)
        assert p["mean"] == pytest.approx(v.mean(), rel=1e-3)
        assert p["min"] == pytest.approx(v.min(), rel=1e-3)
        assert p["max"] == pytest.approx(v.max(), rel=1e-3)
    # a coarser step aggregates the 1 s buckets: counts add, mean weighted by count
    for step in (10, 60):
        coarse = svc.get(
            "channels/m1/trend", name="band:b", since=since, until=since + 60, step=step
        )
        assert coarse["step_s"] == step
        assert len(coarse["points"]) == -(-done_s // step)
        for c in coarse["points"]:
            group = [p for p in pts if c["t_ns"] <= p["t_ns"] < c["t_ns"] + step * 10**9]
            n = sum(p["count"] for p in group)
            assert c["count"] == n
            assert c["mean"] == pytest.approx(
                sum(p["mean"] * p["count"] for p in group) / n, rel=1e-9
            )
            assert c["min"] == min(p["min"] for p in group)
            assert c["max"] == max(p["max"] for p in group)
    r = svc.client.get(
        "/api/v1/channels/m1/trend",
        params={"name": "band:nope", "since": since, "until": since + 60},
    )
    assert r.status_code == 404 and "band:b" in r.json()["detail"]


# --- 6. metrics ----------------------------------------------------------------------------------


def _samples(text: str) -> dict[str, list[tuple[dict[str, str], float]]]:
    out: dict[str, list[tuple[dict[str, str], float]]] = {}
    for fam in text_string_to_metric_families(text):  # prometheus_client.parser
        for s in fam.samples:
            out.setdefault(s.name, []).append((s.labels, s.value))
    return out


def _one(samples: dict[str, list[tuple[dict[str, str], float]]], name: str, **labels: str) -> float:
    got = [v for lab, v in samples.get(name, []) if all(lab.get(k) == x for k, x in labels.items())]
    assert len(got) == 1, (name, labels, samples.get(name))
    return got[0]


def test_metrics_parse_and_carry_bands_alarm_levels_and_counters(run: Run) -> None:
    for st, (l1, l2, latched2) in zip(run.stages, [(0, 0, 0), (1, 1, 1), (2, 0, 1)], strict=False):
        m = _samples(st.metrics)
        band = _one(m, "quaver_band", channel="m1", band="b")
        assert band == st.bands["bands"][0]["value"]  # the same frame as /bands
        assert (
            st.bands["unit"] == "g"
            and _one(m, "quaver_band", channel="m1", band="b", unit="g") == band
        )
        assert _one(m, "quaver_alarm_level", channel="m1", rule=RULE1) == l1
        assert _one(m, "quaver_alarm_level", channel="m2", rule=RULE2) == l2
        assert _one(m, "quaver_alarm_latched", channel="m2", rule=RULE2) == latched2
    m = _samples(run.svc.client.get("/metrics").text)
    blocks = sum(s[0] for s in SEGMENTS)
    assert _one(m, "quaver_source_samples_total", source="rig") == blocks * BLOCK
    assert _one(m, "quaver_source_malformed_total", source="rig") == 1  # the bad-CRC frame
    assert _one(m, "quaver_source_gaps_total", source="rig") == 0
    assert _one(m, "quaver_source_drops_total", source="rig") == 0
    assert _one(m, "quaver_source_connections_total", source="rig") == 1
    assert _one(m, "quaver_alarm_level", channel="m1", rule=RULE1) == 0


# --- 7. access and limits --------------------------------------------------------------------


def test_body_limit_bad_queries_and_unknown_channels(run: Run) -> None:
    svc, c = run.svc, run.svc.client
    events_before = svc.events()
    big = json.dumps({"note": "x" * MAX_BODY})
    r = c.post(
        f"/api/v1/alarms/{RULE1}/ack",
        content=big,
        headers={**bearer("operator"), "Content-Type": "application/json"},
    )
    assert r.status_code == 413 and str(MAX_BODY) in r.json()["detail"]
    assert svc.events() == events_before
    for path, params, name in (
        ("channels/m1/spectrum", {"unit": "furlong"}, "unit"),
        ("channels/m1/spectrum", {"amplitude": "loud"}, "amplitude"),
        ("events", {"limit": 0}, "limit"),
        ("events", {"limit": 1001}, "limit"),
        ("channels/m1/trend", {"step": 0}, "step"),
    ):
        r = c.get(f"/api/v1/{path}", params=params)
        assert r.status_code == 422, (path, params, r.text)
        assert [d["loc"] for d in r.json()["detail"]] == [["query", name]]
    r = c.get("/api/v1/channels/m1/trend", params={"since": 2e9, "until": 1e9})
    assert r.status_code == 422
    assert [d["loc"] for d in r.json()["detail"]] == [["query", "since"]]  # FastAPI's 422 shape
    for path in (
        "channels/nope",
        "channels/nope/spectrum",
        "channels/nope/bands",
        "channels/nope/trend",
        "events/987654",
    ):
        r = c.get(f"/api/v1/{path}")
        assert r.status_code == 404, path
    assert "nope" in c.get("/api/v1/channels/nope/spectrum").json()["detail"]


EVIL = Origin("http://evil.example")  # a page from elsewhere, in a browser on this machine


def _ws_url(svc: Svc) -> str:
    return f"ws://{LOOPBACK}:{svc.http_port}/api/v1/stream"


def test_websocket_from_a_foreign_origin_gets_nothing(run: Run) -> None:
    # no Origin: a plant program (with a viewer token: tokens are configured)
    with ws_connect(_ws_url(run.svc), open_timeout=10, additional_headers=bearer("viewer")) as ws:
        hello = json.loads(ws.recv(timeout=10))
        assert hello["kind"] == "hello" and hello["channels"] == list(CHANNELS)
    refused = False
    try:
        with ws_connect(_ws_url(run.svc), origin=EVIL, open_timeout=10,
                        additional_headers=bearer("viewer")) as ws:
            ws.recv(timeout=10)
    except InvalidStatus as e:  # handshake refused (an ASGI close before accept is a 403)
        refused = e.response.status_code == 403
    except ConnectionClosed as e:
        refused = e.rcvd is not None and e.rcvd.code == 1008
    assert refused


def test_websocket_from_a_foreign_origin_is_closed_with_1008(run: Run) -> None:
    with ws_connect(_ws_url(run.svc), origin=EVIL, open_timeout=10) as ws:
        with pytest.raises(ConnectionClosed) as e:
            ws.recv(timeout=10)
    assert e.value.rcvd is not None
    assert (e.value.rcvd.code, e.value.rcvd.reason) == (1008, "origin not allowed")


def test_check_refuses_an_open_listen_without_tokens(
    tmp_path: Path, quaver_cli: Callable[..., subprocess.CompletedProcess[str]]
) -> None:
    cases = (("0.0.0.0", False, 2), ("0.0.0.0", True, 0), (LOOPBACK, False, 0))
    for host, tokens, code in cases:
        path = tmp_path / f"{host}-{tokens}.toml"
        doc = config_doc(tmp_path / "d", tokens=tokens)
        doc["service"]["listen"] = f"{host}:8750"
        doc["sources"][0]["listen"] = f"{LOOPBACK}:9101"
        path.write_text(harness.to_toml(doc))
        r = quaver_cli("check", "-c", str(path))
        assert r.returncode == code, (host, tokens, r.stdout, r.stderr)
        if code:
            assert "service.listen" in r.stderr and "tokens" in r.stderr


# --- 3. restart and kill -9 ---------------------------------------------------------------------


class Toggler(threading.Thread):
    """Sends a band level that swings across both levels every 6 s of plant time (m1 and m2
    together), as fast as the socket takes it, until told to stop or the peer is gone."""

    def __init__(self, plant: Plant, cycles: int) -> None:
        super().__init__(name="toggler", daemon=True)
        self.plant, self.cycles = plant, cycles
        self.stop = threading.Event()
        self.error: BaseException | None = None

    def run(self) -> None:
        try:
            for _ in range(self.cycles):
                for rms in ((1.3, 1.3), (0.3, 0.3)):
                    if self.stop.is_set():
                        return
                    self.plant.send(rms, 60)
        except OSError as e:  # the service was killed under us
            self.error = e


@pytest.mark.slow
def test_restart_and_kill_keep_events_and_alarm_state(tmp_path: Path) -> None:
    data = tmp_path / "data"
    db = data / "quaver.db"
    # A: m2 latches unacknowledged; m1 reaches danger and is acknowledged while high; the
    # data stops before the danger event's evidence window is complete
    svc = start_service(tmp_path / "a", data)
    try:
        plant = Plant(svc.tcp_port, seed=1)
        plant.send((0.3, 0.3), 40)
        plant.send((0.7, 0.7), 50)
        plant.send((0.7, 0.3), 50)
        plant.send((1.3, 0.3), 20)  # not yet on_delay past the step
        for _ in range(20):  # then block by block until m1 goes to danger (bounded)
            svc.evaluated(plant.next_block - 1)
            if svc.alarms()[RULE1]["state"] == "danger":
                break
            plant.send((1.3, 0.3), 1)
        danger_block = plant.next_block - 1
        plant.close()
        note = "known resonance, watching it"
        r = svc.client.post(
            f"/api/v1/alarms/{RULE1}/ack", json={"note": note}, headers=bearer("operator")
        )
        assert r.status_code == 200, r.text
        events_a, alarms_a = svc.events(), svc.alarms()
    finally:
        # SIGTERM: graceful stop (pipelines, pending evidence, store), exit status 0
        assert stop_service(svc, signal.SIGTERM) == 0, svc.log_tail()
    assert [(e["rule"], e["kind"], e["from_state"], e["to_state"]) for e in events_a] == [
        (RULE1, "transition", "normal", "alert"),
        (RULE2, "transition", "normal", "alert"),
        (RULE2, "transition", "alert", "latched"),
        (RULE1, "transition", "alert", "danger"),
        (RULE1, "ack", "danger", "danger"),
    ]
    assert events_a[3]["t_ns"] == pytest.approx(frame_t_ns(danger_block), abs=CLOCK_NS)
    assert not events_a[3]["has_evidence"]  # its waveform window was still open
    a1, a2 = alarms_a[RULE1], alarms_a[RULE2]
    assert (a1["state"], a1["acked"], a1["acked_by"], a1["note"]) == (
        "danger",
        True,
        TOKENS["operator"][0],
        note,
    )
    assert (a2["state"], a2["latched"], a2["acked"]) == ("latched", True, False)

    # B: the same data_dir after an orderly stop: every event, and the alarm state as it was
    svc = start_service(tmp_path / "b", data)
    toggler: Toggler | None = None
    try:
        events_b = svc.events()
        # the orderly stop kept the open evidence with what it had: BEFORE_S of waveform
        assert events_b[3]["has_evidence"]
        wave = svc.get(f"events/{events_b[3]['id']}/evidence")["waveform"]["samples"]
        assert round(BEFORE_S * FS) <= len(wave) < round((BEFORE_S + AFTER_S) * FS)
        assert [{**e, "has_evidence": None} for e in events_b] == [
            {**e, "has_evidence": None} for e in events_a
        ]
        events_a = events_b
        assert svc.alarms() == alarms_a  # state, latch, acknowledgement (who, when, note)
        assert [a["rule"] for a in svc.get("alarms")] == [RULE1, RULE2]  # both still active
        # then kill -9 while the alarms keep changing (plant time goes on)
        toggler = Toggler(Plant(svc.tcp_port, seed=2, first_block=danger_block + 1), cycles=60)
        toggler.start()

        def eight_more() -> list[dict[str, Any]] | None:
            ev = svc.events()
            return ev if len(ev) >= len(events_a) + 8 else None

        seen = svc.wait(eight_more, "alarm transitions while toggling", timeout_s=60)
        evaluated_ns = svc.alarms()[RULE1]["value_ns"]
        svc.proc.send_signal(signal.SIGKILL)  # right after reading what was visible
        # the kill came while frames (and their transitions) were still being worked through
        assert evaluated_ns < frame_t_ns(toggler.plant.next_block - 1)
    finally:
        if toggler is not None:
            toggler.stop.set()
        assert stop_service(svc, signal.SIGKILL) == -signal.SIGKILL
        if toggler is not None:
            toggler.join(timeout=STOP_TIMEOUT_S)
            toggler.plant.close()
    assert seen[: len(events_a)] == events_a
    for rule in (RULE1, RULE2):  # each rule's events chain on from its restored state
        chain = [e for e in seen if e["rule"] == rule]
        assert all(b["from_state"] == a["to_state"] for a, b in itertools.pairwise(chain))
    assert len(transitions(seen[len(events_a) :], RULE1)) >= 2

    # C: after the kill every event that had been visible is still there, unchanged
    svc = start_service(tmp_path / "c", data)
    try:
        after = svc.events()
        ids = [e["id"] for e in after]
        assert ids == sorted(set(ids))
        by_id = {e["id"]: e for e in after}
        for e in seen:
            kept = by_id.get(e["id"])
            assert kept is not None, f"event {e['id']} visible before the kill is gone"
            assert {k: v for k, v in kept.items() if k != "has_evidence"} == {
                k: v for k, v in e.items() if k != "has_evidence"
            }
            assert kept["has_evidence"] or not e["has_evidence"]
        # the alarm state restored is the one the newest committed event of each rule left
        alarms = svc.alarms()
        for rule in (RULE1, RULE2):
            last = [e for e in after if e["rule"] == rule][-1]
            assert alarms[rule]["state"] == last["to_state"], (rule, last, alarms[rule])
        # https://www.sqlite.org/pragma.html#pragma_integrity_check
        with contextlib.closing(
            sqlite3.connect(f"{db.resolve().as_uri()}?mode=ro", uri=True)
        ) as conn:
            assert conn.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
            assert conn.execute("SELECT COUNT(*) FROM events").fetchone()[0] == len(after)
    finally:
        assert stop_service(svc, signal.SIGTERM) == 0, svc.log_tail()

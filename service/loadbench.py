"""Load benchmark of a real quaver: ingest headroom, latency, WebSocket fan-out and memory.

Knows the config file shape, the framed wire format, the HTTP/WebSocket API and /proc; runs the
service as a child process (``python -m service serve``) and nothing of its internals.

``quaver bench --service`` (``run`` + ``format_report``) measures, in one run:

1. **Ingest headroom** — channels at fs 25.6 kHz (Fmax 10 kHz, 3200 lines, 75 % overlap,
   16 bands, 8 tracked tones, two alarm rules per channel) spread over TCP sources of 16
   channels, fed at real-time pace for a fixed span per step. A step passes when the service
   counted no drops and no gaps, no channel shows ``overrun``, and every fed channel's frame
   counter rose by exactly floor((n − N)/hop) + 1 for the n samples fed so far, within
   ``DRAIN_S`` of the last send (so a backlog larger than that fails the step). Steps rise
   until one fails; between the last pass and the first failure the search halves the
   interval at source granularity (``search_headroom``).
2. **Latency** — a WebSocket client subscribed to one channel stamps each spectrum message on
   arrival; the message's ``timestamp_ns`` gives the end index of the newest frame (the
   feeder's header clock is a fixed function of the sample index), hence the block that
   carried its newest sample and that block's send time. Latency = arrival − send, i.e.
   beyond the frame's own duration.
3. **WebSocket fan-out** — clients (in their own process) subscribed to 8 channels each;
   received frames per client, frames skipped (by end index) for clients that kept up, and
   the service's CPU seconds per analysis frame with and without the clients.
4. **Memory** — VmRSS of a second service (4 channels, 400 lines) after 10⁴ and 10⁶ frames
   (short mode: 10³ and 10⁵) fed faster than real time with flow control.

Every loop is bounded, every wait has a time-out, and the child processes are stopped in
``finally`` blocks (SIGTERM, then SIGKILL), also on Ctrl-C.
"""

from __future__ import annotations

import asyncio
import bisect
import contextlib
import json
import math
import os
import platform
import select
import signal
import socket
import struct
import subprocess
import sys
import tempfile
import threading
import time
import urllib.error
import urllib.request
import zlib
from collections.abc import Callable, Iterator, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .wire import encode_frame

__all__ = [
    "BenchPlan",
    "FrameTemplate",
    "end_index_differences",
    "expected_frames",
    "format_report",
    "latencies_ns",
    "main",
    "newest_frame_ends",
    "percentile",
    "run",
    "search_headroom",
    "skipped_frames",
]

LOOPBACK = "127.0.0.1"
REPO = Path(__file__).resolve().parents[1]
START_TIMEOUT_S = 30.0  # the child must answer /health within this
STOP_TIMEOUT_S = 5.0  # SIGTERM, then SIGKILL after this
START_ATTEMPTS = 3  # a probed free port can be taken before the child binds it
DRAIN_S = 2.0  # after the last send, every expected frame must be counted within this
DRAIN_WAIT_S = 30.0  # ... and is waited for this long, so that the counts are final
HTTP_TIMEOUT_S = 10.0
WARMUP_S = 1.0  # latency samples from the first second of a step are left out (FFT plans)
FANOUT_CHANNELS_PER_CLIENT = 8
FANOUT_SETTLE_S = 1.0  # after a step drained, its last frames reach the clients within this
BLAS_ENV = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")
HEADER_FIRST_INDEX = 16  # byte offsets in the framed header (README, "Framed TCP and UDP")
HEADER_T_NS = 24
HEADER_CRC = 40

# --- pure helpers -------------------------------------------------------------------------------


def expected_frames(n_samples: int, n: int, hop: int) -> int:
    """Frames of ``n`` samples every ``hop`` samples cut from a run of ``n_samples``:
    floor((n_samples − n)/hop) + 1, or 0 when the run is shorter than one frame."""
    if n_samples < n:
        return 0
    return (n_samples - n) // hop + 1


def newest_frame_ends(block_ends: Sequence[int], n: int, hop: int) -> list[int]:
    """End indices (one past the last sample) of the newest frame after each block, for the
    blocks that completed at least one new frame: what a per-block publisher emits.

    ``block_ends`` are the cumulative sample counts after each block (increasing, the stream
    starting at index 0); frame p covers samples [p·hop, p·hop + n)."""
    out: list[int] = []
    done = 0
    for end in block_ends:
        f = expected_frames(int(end), n, hop)
        if f > done:
            out.append((f - 1) * hop + n)
            done = f
    return out


def end_index_differences(received_ends: Sequence[int],
                          expected_ends: Sequence[int]) -> tuple[int, int]:
    """(missing, unexpected): how many of ``expected_ends`` (sorted) between the first and the
    last received one are not in ``received_ends``, and how many distinct received ends are
    not expected at all. Frames before the first or after the last received one are not
    counted (a client may start or stop mid-stream)."""
    got = sorted(set(int(e) for e in received_ends))
    if not got:
        return 0, 0
    exp = list(expected_ends)
    lo = bisect.bisect_left(exp, got[0])
    hi = bisect.bisect_right(exp, got[-1])
    window = set(exp[lo:hi])
    return len(window - set(got)), len(set(got) - window)


def skipped_frames(received_ends: Sequence[int], expected_ends: Sequence[int]) -> int:
    """How many of ``expected_ends`` between the first and the last received one are missing
    from ``received_ends`` (a received end that is not expected counts as skipped too)."""
    return sum(end_index_differences(received_ends, expected_ends))


def percentile(values: Sequence[float], q: float) -> float:
    """The q-th percentile (q in [0, 100]) with linear interpolation between order
    statistics (Hyndman & Fan 1996 definition 7, numpy's default); NaN for no values."""
    if not 0.0 <= q <= 100.0:
        raise ValueError(f"q={q!r} must be in [0, 100]")
    xs = sorted(float(v) for v in values)
    if not xs:
        return math.nan
    h = (len(xs) - 1) * q / 100.0
    lo = math.floor(h)
    hi = min(lo + 1, len(xs) - 1)
    return xs[lo] + (h - lo) * (xs[hi] - xs[lo])


def index_of_time(t_ns: int, base_ns: int, fs: float) -> int:
    """Stream index whose header time is ``t_ns`` when index k is stamped base_ns + k·1e9/fs."""
    return int(round((int(t_ns) - int(base_ns)) * fs / 1e9))


def latencies_ns(
    arrivals: Sequence[tuple[int, int]],
    sends: Sequence[tuple[int, int]],
    *,
    base_ns: int,
    fs: float,
) -> list[int]:
    """Latency in ns of each spectrum message beyond its frame's own duration.

    ``arrivals``: (arrival wall time ns, message ``timestamp_ns``); ``sends``: (end index of a
    block, wall time ns after it was sent), ordered by end index. The message's end index
    e = round((timestamp_ns − base_ns)·fs/1e9); its newest sample e − 1 went out in the first
    block whose end index ≥ e. Messages with no matching block are left out."""
    ends = [e for e, _ in sends]
    out = []
    for arrival, t_ns in arrivals:
        e = index_of_time(t_ns, base_ns, fs)
        i = bisect.bisect_left(ends, e)
        if e <= 0 or i >= len(ends):
            continue
        out.append(int(arrival) - int(sends[i][1]))
    return out


def search_headroom(
    counts: Sequence[int], trial: Callable[[int], bool], *, step: int, refine: int = 2
) -> tuple[int, list[tuple[int, bool]]]:
    """The largest channel count that passes ``trial``, and every (count, passed) tried.

    Tries ``counts`` in rising order and stops at the first failure; then halves the interval
    between the last pass and that failure up to ``refine`` times, on multiples of ``step``
    (e.g. the channels per source) — below the first count too if that one fails; 0 when
    nothing tried passes. Assumes that a count that fails would also fail with more."""
    tried: list[tuple[int, bool]] = []
    best, fail = 0, None
    for c in sorted(counts):
        ok = trial(c)
        tried.append((c, ok))
        if not ok:
            fail = c
            break
        best = c
    for _ in range(refine):
        if fail is None or fail - best <= step:
            break
        mid = (best + fail) // 2 // step * step
        if mid <= best:
            break
        ok = trial(mid)
        tried.append((mid, ok))
        if ok:
            best = mid
        else:
            fail = mid
    return best, tried


class FrameTemplate:
    """One framed-format frame (``service.wire``) encoded once; ``frame(first_index, t_ns)``
    re-stamps the header's first-sample index and time (ns since the epoch) and its CRC-32
    (zlib / IEEE 802.3) without touching the payload, so the feeder's cost is a header."""

    def __init__(self, data: np.ndarray, fs: float) -> None:
        raw = encode_frame(np.asarray(data, dtype=np.float32), "f32le", fs, 0, 0)
        self.channels, self.n = np.asarray(data).shape
        self.head = bytearray(raw[:44])
        self.payload = bytes(raw[44:])

    def frame(self, first_index: int, t_ns: int) -> bytes:
        """The frame with sample index ``first_index`` (≥ 0) and header time ``t_ns`` (ns)."""
        head = self.head
        struct.pack_into("<Q", head, HEADER_FIRST_INDEX, int(first_index))
        struct.pack_into("<q", head, HEADER_T_NS, int(t_ns))
        struct.pack_into("<I", head, HEADER_CRC, zlib.crc32(head[:HEADER_CRC]))
        return bytes(head) + self.payload


# --- the plan -----------------------------------------------------------------------------------


@dataclass
class BenchPlan:
    """What one run measures; ``BenchPlan.short()`` is the CI-sized run."""

    short: bool = False
    fs_hz: float = 25600.0
    fmax_hz: float = 10000.0
    lines: int = 3200
    overlap: float = 0.75
    per_source: int = 16  # channels per TCP source
    block_s: float = 0.1  # samples per framed block, s
    queue_blocks: int = 20  # the sources' hand-over queue: 2 s of blocks
    steps: tuple[int, ...] = (32, 64, 128, 192, 256, 384, 512)
    step_s: float = 20.0
    refine: int = 1
    fanout_clients: int = 50
    fanout_channels: int = 64
    fanout_s: float = 15.0
    fanout_rate_hz: float = 50.0  # subscription limit; frames come at ~10 Hz per channel
    fanout_deflate: bool = True  # clients offer permessage-deflate, as browsers do
    mem_channels: int = 4
    mem_lines: int = 400
    mem_block: int = 65536  # samples per channel per framed block
    mem_checkpoints: tuple[int, ...] = (10_000, 100_000, 1_000_000)  # frames, all channels
    mem_timeout_s: float = 900.0

    @classmethod
    def for_mode(cls, short: bool) -> BenchPlan:
        if not short:
            return cls()
        return cls(short=True, steps=(16, 32), step_s=3.0, refine=0, fanout_clients=10,
                   fanout_channels=32, fanout_s=3.0, mem_block=16384,
                   mem_checkpoints=(1_000, 100_000), mem_timeout_s=120.0)

    @property
    def max_channels(self) -> int:
        top = max(self.steps) if self.steps else self.per_source
        return max(top, self.fanout_channels)

    @property
    def n(self) -> int:
        return int(round(2.56 * self.lines))  # common practice: N = 2.56·lines

    @property
    def hop(self) -> int:
        return max(1, int(round(self.n * (1.0 - self.overlap))))

    @property
    def block(self) -> int:
        return int(round(self.block_s * self.fs_hz))


# --- machine, /proc, HTTP -----------------------------------------------------------------------


def machine() -> dict[str, Any]:
    """CPU model, cores, Python and numpy versions of this machine."""
    cpu = platform.processor() or platform.machine()
    with contextlib.suppress(OSError):
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    try:
        load = os.getloadavg()
    except OSError:
        load = (math.nan,) * 3
    return {"cpu": cpu, "cores": os.cpu_count(), "python": sys.version.split()[0],
            "numpy": np.__version__, "platform": platform.platform(),
            "loadavg_at_start": [round(v, 2) for v in load],
            # The service inherits these; unset, OpenBLAS starts one thread per core.
            "blas_env": {k: os.environ.get(k) for k in BLAS_ENV}}


_TICK_S = 1.0 / os.sysconf("SC_CLK_TCK") if hasattr(os, "sysconf") else 0.01


def proc_cpu_s(pid: int) -> float:
    """User + system CPU seconds of process ``pid`` (all its threads), from /proc/PID/stat."""
    text = Path(f"/proc/{pid}/stat").read_text()
    fields = text[text.rindex(")") + 2 :].split()
    return (int(fields[11]) + int(fields[12])) * _TICK_S  # utime, stime (proc(5) fields 14, 15)


def proc_rss_bytes(pid: int) -> int:
    """Resident set size of ``pid`` in bytes (VmRSS in /proc/PID/status)."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) * 1024
    raise OSError(f"no VmRSS for pid {pid}")


_OPENER = urllib.request.build_opener(urllib.request.ProxyHandler({}))  # loopback: no proxies


def http_json(base: str, path: str) -> Any:
    """GET ``base + path`` without proxies (time-out HTTP_TIMEOUT_S s) and decode its JSON."""
    with _OPENER.open(f"{base}{path}", timeout=HTTP_TIMEOUT_S) as r:
        return json.loads(r.read())


def _free_ports(n: int) -> list[int]:
    socks = []
    try:
        for _ in range(n):
            s = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
            s.bind((LOOPBACK, 0))
            socks.append(s)
        return [s.getsockname()[1] for s in socks]
    finally:
        for s in socks:
            s.close()


def _child_env() -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("QUAVER_")
           and k.lower() not in ("http_proxy", "https_proxy", "all_proxy")}
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO), env.get("PYTHONPATH")]))
    env["PYTHONUNBUFFERED"] = "1"
    return env


def _stop_child(proc: subprocess.Popen[Any]) -> None:
    if proc.poll() is None:
        with contextlib.suppress(ProcessLookupError):
            proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=STOP_TIMEOUT_S)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=STOP_TIMEOUT_S)


# --- the service under test ---------------------------------------------------------------------


def _toml(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int | float):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)  # a JSON string of plain ids is a valid TOML basic string
    if isinstance(v, list | tuple):
        return "[" + ", ".join(_toml(x) for x in v) + "]"
    raise TypeError(f"cannot write {type(v).__name__} as TOML")


def config_text(listen: str, analysis: dict[str, Any], sources: list[dict[str, Any]],
                speed_rpm: float) -> str:
    """The TOML of a bench service: the sources given, 16 bands, 8 tracked orders and two
    alarm rules per channel (levels far above the test signal, so no event storm)."""
    out = ["[service]", f"listen = {_toml(listen)}", 'data_dir = "quaver-data"', "",
           "[analysis]"]
    out += [f"{k} = {_toml(v)}" for k, v in analysis.items()]
    for s in sources:
        out += ["", "[[sources]]"] + [f"{k} = {_toml(v)}" for k, v in s.items()]
    for s in sources:
        for cid in s["channels"]:
            out += ["", "[[channels]]", f"id = {_toml(cid)}", f"speed_rpm = {speed_rpm!r}"]
    bands = [(f"b{i:02d}", 10.0 + 500.0 * i, 500.0 + 500.0 * i) for i in range(15)]
    bands.append(("overall", 10.0, 1000.0))
    for name, lo, hi in bands:
        hi = min(hi, 0.999 * analysis["fmax_hz"])
        out += ["", "[[bands]]", f"name = {_toml(name)}", f"lo_hz = {lo!r}", f"hi_hz = {hi!r}"]
    for h in range(1, 9):
        out += ["", "[[tones]]", f'name = "{h}x"', f"order = {float(h)!r}"]
    for rule in ('overall = true', 'band = "b01"'):
        out += ["", "[[alarms]]", rule, "alert = 1000.0", "danger = 2000.0"]
    return "\n".join(out) + "\n"


@dataclass
class Service:
    """A running ``python -m service serve`` child: HTTP base URL, source ports, pid."""

    proc: subprocess.Popen[bytes]
    base: str
    ports: dict[str, int]
    log_path: Path

    @property
    def pid(self) -> int:
        return self.proc.pid

    def get(self, path: str) -> Any:
        return http_json(self.base, f"/api/v1/{path}")

    def log_tail(self, lines: int = 20) -> str:
        with contextlib.suppress(OSError):
            return "\n".join(self.log_path.read_text(errors="replace").splitlines()[-lines:])
        return "(no log)"

    def cpu_s(self) -> float:
        return proc_cpu_s(self.pid)

    def rss(self) -> int:
        return proc_rss_bytes(self.pid)

    def channels(self) -> dict[str, dict[str, Any]]:
        return {c["id"]: c for c in self.get("channels")}


@contextlib.contextmanager
def run_service(workdir: Path, analysis: dict[str, Any], sources: list[dict[str, Any]],
                speed_rpm: float = 1485.0) -> Iterator[Service]:
    """Start the service for ``sources`` (``listen`` filled in with free loopback ports) in
    ``workdir``; wait until /api/v1/health answers; always stop it on leaving."""
    workdir.mkdir(parents=True, exist_ok=True)
    for attempt in range(1, START_ATTEMPTS + 1):
        ports = _free_ports(1 + len(sources))
        srcs = [{**s, "listen": f"{LOOPBACK}:{p}"} for s, p in zip(sources, ports[1:], strict=True)]
        path = workdir / "quaver.toml"
        path.write_text(config_text(f"{LOOPBACK}:{ports[0]}", analysis, srcs, speed_rpm))
        log_path = workdir / f"service-{attempt}.log"
        with open(log_path, "wb") as log:
            proc = subprocess.Popen(
                [sys.executable, "-m", "service", "serve", "-c", str(path)], cwd=workdir,
                env=_child_env(), stdout=log, stderr=subprocess.STDOUT,
                start_new_session=True,  # Ctrl-C reaches the bench, which then stops it
            )
        svc = Service(proc, f"http://{LOOPBACK}:{ports[0]}",
                      {s["id"]: p for s, p in zip(sources, ports[1:], strict=True)}, log_path)
        try:
            if _wait_up(svc):
                yield svc
                return
            text = svc.log_tail(50)
            if attempt == START_ATTEMPTS or "address already in use" not in text.lower():
                raise RuntimeError(f"the service did not start (exit {proc.returncode}):\n{text}")
        finally:
            _stop_child(proc)


def _wait_up(svc: Service) -> bool:
    deadline = time.monotonic() + START_TIMEOUT_S
    while time.monotonic() < deadline:
        if svc.proc.poll() is not None:
            return False
        with contextlib.suppress(OSError, ValueError):
            svc.get("health")
            return True
        time.sleep(0.05)
    raise RuntimeError(f"/api/v1/health did not answer within {START_TIMEOUT_S:g} s\n"
                       f"{svc.log_tail()}")


# --- feeding ------------------------------------------------------------------------------------


def _signal(channels: int, n: int, fs: float, seed: int) -> np.ndarray:
    """Noise (0.05 g RMS) plus 0.5 g at 24.75 Hz and 0.2 g at 3120.3 Hz, float32[C, n]."""
    rng = np.random.default_rng(seed)
    k = np.arange(n)
    x = rng.normal(0.0, 0.05, (channels, n))
    x += 0.5 * np.sin(2 * np.pi * 24.75 * k / fs) + 0.2 * np.sin(2 * np.pi * 3120.3 * k / fs)
    return x.astype(np.float32)


@dataclass
class FeedLog:
    """Per source: (end index, wall time ns after the send) of every block sent."""

    sends: dict[str, list[tuple[int, int]]] = field(default_factory=dict)
    next_index: dict[str, int] = field(default_factory=dict)


class Feeder:
    """One connected TCP socket per source; sends pre-encoded frames at real-time pace.

    Header time of sample k is ``base_ns + k·1e9/fs`` on every source, so a message's
    ``timestamp_ns`` gives back its end index (``index_of_time``)."""

    def __init__(self, svc: Service, source_ids: Sequence[str], per_source: int, fs: float,
                 block: int, base_ns: int) -> None:
        self.fs, self.block, self.base_ns = fs, block, base_ns
        self.ids = list(source_ids)
        self.templates = {sid: FrameTemplate(_signal(per_source, block, fs, seed=i), fs)
                          for i, sid in enumerate(self.ids)}
        self.log = FeedLog({sid: [] for sid in self.ids}, dict.fromkeys(self.ids, 0))
        self.socks: dict[str, socket.socket] = {}
        try:
            for sid in self.ids:
                s = socket.create_connection((LOOPBACK, svc.ports[sid]), timeout=10.0)
                s.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
                self.socks[sid] = s
        except BaseException:
            self.close()
            raise

    def close(self) -> None:
        for s in self.socks.values():
            with contextlib.suppress(OSError):
                s.close()
        self.socks.clear()

    def restart(self, sid: str) -> bool:
        """Jump ``sid``'s index by one block (a gap) unless nothing was sent yet; True if so."""
        if not self.log.next_index[sid]:
            return False
        self.log.next_index[sid] += self.block
        return True

    def send_block(self, sid: str) -> None:
        k = self.log.next_index[sid]
        t_ns = self.base_ns + round(k * 1e9 / self.fs)
        self.socks[sid].sendall(self.templates[sid].frame(k, t_ns))
        k += self.block
        self.log.next_index[sid] = k
        self.log.sends[sid].append((k, time.time_ns()))

    def realtime(self, sources: Sequence[str], seconds: float) -> dict[str, float]:
        """Send ``seconds`` of blocks on ``sources``, each block when its last sample is due;
        returns the feeder's CPU seconds (this thread), wall seconds and worst lateness."""
        blocks = max(1, int(round(seconds * self.fs / self.block)))
        period = self.block / self.fs
        cpu0, t0 = time.thread_time(), time.monotonic()
        late = 0.0
        for b in range(blocks):
            due = t0 + (b + 1) * period
            wait = due - time.monotonic()
            if wait > 0:
                time.sleep(wait)
            else:
                late = max(late, -wait)
            for sid in sources:
                self.send_block(sid)
        return {"cpu_s": time.thread_time() - cpu0, "wall_s": time.monotonic() - t0,
                "max_late_ms": 1e3 * late, "blocks": blocks}


# --- WebSocket clients --------------------------------------------------------------------------


def _ws_options(deflate: bool = True) -> dict[str, Any]:
    """Client options: no proxy (loopback; websockets >= 15 would read *_proxy variables);
    permessage-deflate offered unless ``deflate`` is false (browsers offer it)."""
    import websockets

    major = int(str(getattr(websockets, "__version__", "12")).split(".")[0])
    return {"open_timeout": 15.0, "max_size": 1 << 24,
            **({"proxy": None} if major >= 15 else {}),
            **({} if deflate else {"compression": None})}


def parse_spectrum_header(msg: bytes) -> dict[str, Any]:
    """The JSON header of a binary spectrum message (u32 length, then the JSON)."""
    (length,) = struct.unpack_from("<I", msg)
    return json.loads(msg[4 : 4 + length])  # type: ignore[no-any-return]


class LatencyClient:
    """A thread with one WebSocket client on one channel: (arrival ns, timestamp_ns) pairs."""

    def __init__(self, base: str, channel: str) -> None:
        self.url = base.replace("http://", "ws://") + "/api/v1/stream"
        self.channel = channel
        self.arrivals: list[tuple[int, int]] = []
        self.error = ""
        self._stop = threading.Event()
        self._ready = threading.Event()
        self._thread = threading.Thread(target=self._run, name="latency-client", daemon=True)

    def __enter__(self) -> LatencyClient:
        self._thread.start()
        if not self._ready.wait(15.0):
            self.error = self.error or "the latency client did not connect within 15 s"
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join(5.0)

    def _run(self) -> None:
        from websockets.sync.client import connect

        try:
            with connect(self.url, **_ws_options()) as ws:
                sub = {"channels": [self.channel], "kinds": ["spectrum"], "max_rate_hz": 100}
                ws.send(json.dumps({"subscribe": sub}))
                self._ready.set()
                while not self._stop.is_set():
                    try:
                        msg = ws.recv(timeout=0.2)
                    except TimeoutError:
                        continue
                    now = time.time_ns()
                    if isinstance(msg, bytes):
                        self.arrivals.append((now, int(parse_spectrum_header(msg)["timestamp_ns"])))
        except Exception as e:  # reported, not raised: the bench goes on
            self.error = f"{type(e).__name__}: {e}"
        finally:
            self._ready.set()


async def _fanout(url: str, channel_sets: list[list[str]], seconds: float,
                  rate_hz: float, deflate: bool = True) -> list[dict[str, Any]]:
    from websockets.asyncio.client import connect

    logs: list[dict[str, Any]] = [{"channels": cs, "frames": {c: [] for c in cs}, "missed": 0,
                                   "received": 0, "error": ""} for cs in channel_sets]
    connected = asyncio.Event()
    stop = asyncio.Event()
    pending = [len(channel_sets)]

    async def client(log: dict[str, Any]) -> None:
        try:
            async with connect(url, **_ws_options(deflate)) as ws:
                sub = {"channels": log["channels"], "kinds": ["spectrum"], "max_rate_hz": rate_hz}
                await ws.send(json.dumps({"subscribe": sub}))
                pending[0] -= 1
                if not pending[0]:
                    connected.set()
                while not stop.is_set():
                    try:
                        msg = await asyncio.wait_for(ws.recv(), 0.25)
                    except TimeoutError:
                        continue
                    if isinstance(msg, bytes):
                        h = parse_spectrum_header(msg)
                        # a channel it did not ask for lands in its own list (reported)
                        log["frames"].setdefault(h["channel"], []).append(
                            (h["timestamp_ns"], h["seq"]))
                        log["received"] += 1
                        log["missed"] = h["missed"]
        except Exception as e:
            log["error"] = f"{type(e).__name__}: {e}"
            pending[0] -= 1
            if not pending[0]:
                connected.set()

    tasks = [asyncio.create_task(client(log)) for log in logs]
    with contextlib.suppress(TimeoutError):
        await asyncio.wait_for(connected.wait(), 30.0)
    print("connected", flush=True)
    # Listen until the parent says the step has drained (a line or EOF on stdin), at most
    # ``seconds``: a fixed span cut off the last frames of a step that drained late, and the
    # clients' received counts then differed for no reason of their own.
    loop = asyncio.get_running_loop()
    told = asyncio.Event()
    threading.Thread(target=lambda: (sys.stdin.readline(), loop.call_soon_threadsafe(told.set)),
                     name="stop-line", daemon=True).start()
    with contextlib.suppress(TimeoutError):
        await asyncio.wait_for(told.wait(), seconds)
    stop.set()
    await asyncio.wait(tasks, timeout=5.0)
    return logs


def _fanout_worker(argv: Sequence[str]) -> int:
    """Entry of the fan-out client process: argv[0] is a JSON job; prints ``connected`` once
    every client has subscribed, then, when a line or EOF comes on stdin (at most ``seconds``
    s later), one JSON line with the logs."""
    job = json.loads(argv[0])
    t0 = os.times()
    logs = asyncio.run(_fanout(job["url"], job["channel_sets"], job["seconds"], job["rate_hz"],
                               job.get("deflate", True)))
    t1 = os.times()
    print(json.dumps({"logs": logs, "cpu_s": (t1.user - t0.user) + (t1.system - t0.system)}),
          flush=True)
    return 0


def _read_line(proc: subprocess.Popen[str], timeout_s: float) -> str:
    assert proc.stdout is not None
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        ready, _, _ = select.select([proc.stdout], [], [], 0.2)
        if ready:
            return proc.stdout.readline()
        if proc.poll() is not None:
            return ""
    return ""


# --- the phases ---------------------------------------------------------------------------------


def _say(text: str) -> None:
    print(f"bench --service: {text}", file=sys.stderr, flush=True)


def _source_ids(count: int) -> list[str]:
    return [f"feed-{i:02d}" for i in range(count)]


def _channel_ids(sid: str, per_source: int) -> list[str]:
    return [f"{sid}-c{j:02d}" for j in range(per_source)]


@dataclass
class Counters:
    frames: dict[str, int]
    gaps: dict[str, int]
    overrun: list[str]
    drops: dict[str, int]
    queued: dict[str, int]


def _counters(svc: Service) -> Counters:
    health = svc.get("health")
    chans = svc.get("channels")
    return Counters(
        frames={c["id"]: int(c["counters"]["frames"]) for c in chans},
        gaps={c["id"]: int(c["counters"]["gaps"]) for c in chans},
        overrun=[c["id"] for c in chans if c["status"] == "overrun"],
        drops={sid: int(s["counters"]["drops"]) for sid, s in health["sources"].items()},
        queued={sid: int(s.get("queued", 0)) for sid, s in health["sources"].items()},
    )


class _QueueWatch:
    """Samples the sources' queue depth once a second in a thread (bounded by ``stop``)."""

    def __init__(self, svc: Service) -> None:
        self.svc, self.max_queued = svc, 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="queue-watch", daemon=True)

    def __enter__(self) -> _QueueWatch:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join(HTTP_TIMEOUT_S + 1)

    def _run(self) -> None:
        while not self._stop.wait(1.0):
            with contextlib.suppress(OSError, ValueError, KeyError):
                health = self.svc.get("health")
                q = max((int(s.get("queued", 0)) for s in health["sources"].values()), default=0)
                self.max_queued = max(self.max_queued, q)


def _feed_step(plan: BenchPlan, svc: Service, feeder: Feeder, sources: list[str],
               seconds: float) -> dict[str, Any]:
    """Feed ``sources`` in real time for ``seconds``; check counters; CPU and RSS figures.

    A source fed before restarts with a one-block jump in its index (a gap the service
    counts once per channel), so frame assembly starts afresh at the step's first sample
    whatever an earlier step dropped: then each channel must gain exactly
    floor((n − N)/hop) + 1 frames for the n samples of the step."""
    chans = [c for sid in sources for c in _channel_ids(sid, plan.per_source)]
    restart_gaps = plan.per_source * sum(feeder.restart(sid) for sid in sources)
    before = _counters(svc)
    n0 = {sid: feeder.log.next_index[sid] for sid in sources}
    cpu0, proc0, wall0 = svc.cpu_s(), os.times(), time.monotonic()
    with _QueueWatch(svc) as watch:
        fed = feeder.realtime(sources, seconds)
    wall = time.monotonic() - wall0
    cpu = svc.cpu_s() - cpu0
    proc1 = os.times()
    bench_cpu = (proc1.user - proc0.user) + (proc1.system - proc0.system)
    want = {c: expected_frames(feeder.log.next_index[sid] - n0[sid], plan.n, plan.hop)
            for sid in sources for c in _channel_ids(sid, plan.per_source)}
    t_last = time.monotonic()
    after = before
    drained = None
    # Wait for the backlog (bounded) so that the counts are final, and time it; once a block
    # was dropped the frames can never all arrive: then only the queues are waited for.
    while time.monotonic() - t_last < DRAIN_WAIT_S:
        after = _counters(svc)
        if all(after.frames[c] - before.frames[c] >= want[c] for c in chans):
            drained = time.monotonic() - t_last
            break
        if any(after.drops[s] > before.drops[s] for s in sources) and not any(
                after.queued[s] for s in sources):
            time.sleep(0.5)  # the block taken last is still being analysed
            after = _counters(svc)
            break
        time.sleep(0.05)
    frames_fed = sum(want.values())
    frames_got = sum(after.frames[c] - before.frames[c] for c in chans)
    drops = sum(after.drops[s] - before.drops[s] for s in sources)
    gaps = sum(after.gaps[c] - before.gaps[c] for c in chans) - restart_gaps
    overrun = [c for c in after.overrun if c in set(chans)]
    exact = all(after.frames[c] - before.frames[c] == want[c] for c in chans)
    passed = (drops == 0 and gaps == 0 and not overrun and exact and drained is not None
              and drained <= DRAIN_S)
    return {
        "channels": len(chans), "sources": len(sources), "seconds": round(fed["wall_s"], 3),
        "blocks": fed["blocks"],
        "samples": {sid: [n0[sid], feeder.log.next_index[sid]] for sid in sources},
        "passed": passed, "drops": drops, "gaps": gaps, "restart_gaps": restart_gaps,
        "overrun_channels": len(overrun),
        "frames_expected": frames_fed, "frames_counted": frames_got, "frames_exact": exact,
        "drain_s": None if drained is None else round(drained, 3),
        "max_queued_blocks": watch.max_queued,
        "service_cpu_s": round(cpu, 3), "service_cpu_share": round(cpu / wall, 3),
        "service_cpu_ms_per_frame": round(1e3 * cpu / frames_got, 4) if frames_got else None,
        "feeder_cpu_share": round(fed["cpu_s"] / wall, 4),
        "bench_cpu_share": round(bench_cpu / wall, 4),
        "feeder_max_late_ms": round(fed["max_late_ms"], 2),
        "service_rss_mb": round(svc.rss() / 2**20, 1),
    }


def _latency_figures(values_ns: Sequence[int]) -> dict[str, Any]:
    ms = [v / 1e6 for v in values_ns]
    return {"count": len(ms), "median_ms": round(percentile(ms, 50), 3) if ms else None,
            "p99_ms": round(percentile(ms, 99), 3) if ms else None,
            "max_ms": round(max(ms), 3) if ms else None,
            "min_ms": round(min(ms), 3) if ms else None}


def headroom_and_latency(plan: BenchPlan, svc: Service, feeder: Feeder) -> dict[str, Any]:
    """Phases 1 and 2: rising real-time steps with a latency client on the first channel."""
    lat_source = feeder.ids[0]
    lat_channel = _channel_ids(lat_source, plan.per_source)[0]
    steps: list[dict[str, Any]] = []
    with LatencyClient(svc.base, lat_channel) as client:

        def trial(channels: int) -> bool:
            count = max(1, math.ceil(channels / plan.per_source))
            sources = feeder.ids[:count]
            _say(f"headroom: {count * plan.per_source} channels on {count} sources, "
                 f"{plan.step_s:g} s real time")
            seen = len(client.arrivals)
            sends0 = len(feeder.log.sends[lat_source])
            res = _feed_step(plan, svc, feeder, sources, plan.step_s)
            time.sleep(0.3)  # the last message of the step
            sends = feeder.log.sends[lat_source]
            warm_end = sends[sends0][0] + int(WARMUP_S * plan.fs_hz) if len(sends) > sends0 else 0
            arrivals = [a for a in client.arrivals[seen:]
                        if index_of_time(a[1], feeder.base_ns, plan.fs_hz) > warm_end]
            lat = latencies_ns(arrivals, sends, base_ns=feeder.base_ns, fs=plan.fs_hz)
            res["latency"] = _latency_figures(lat)
            res["latency_ns"] = lat
            steps.append(res)
            _say(f"  {'pass' if res['passed'] else 'FAIL'}: drops {res['drops']}, frames "
                 f"{res['frames_counted']}/{res['frames_expected']}, service CPU "
                 f"{100 * res['service_cpu_share']:.0f} %, latency p99 "
                 f"{res['latency']['p99_ms']} ms")
            return bool(res["passed"])

        best, tried = search_headroom(plan.steps, trial, step=plan.per_source, refine=plan.refine)
    steps.sort(key=lambda r: r["channels"])
    pick = next((s for s in steps if s["channels"] == best), steps[0])
    return {
        "largest_passing_channels": best,
        "tried": [{"channels": c, "passed": ok} for c, ok in tried],
        "steps": [{k: v for k, v in s.items() if k != "latency_ns"} for s in steps],
        "latency": {"channel": lat_channel, "at_channels": pick["channels"],
                    "warmup_excluded_s": WARMUP_S, **pick["latency"],
                    "values_ms": [round(v / 1e6, 3) for v in pick["latency_ns"]],
                    "client_error": client.error},
    }


def _stream_metrics(svc: Service) -> dict[str, float] | str:
    """The hub's stream queues from /metrics: clients, frames/events pending, missed."""
    try:
        with _OPENER.open(f"{svc.base}/metrics", timeout=HTTP_TIMEOUT_S) as r:
            text = r.read().decode()
    except OSError as e:
        return f"could not read /metrics: {e}"
    out = {}
    for line in text.splitlines():
        for name in ("clients", "pending", "missed"):
            if line.startswith(f"quaver_stream_{name} "):
                out[name] = float(line.split()[1])
    return out


def fanout(plan: BenchPlan, svc: Service, feeder: Feeder, headroom: int) -> dict[str, Any]:
    """Phase 3: the same feed without, then with ``fanout_clients`` WebSocket clients, on
    ``fanout_channels`` or, if fewer passed the headroom search, ``headroom`` channels (so
    the comparison starts from a load the service sustains)."""
    count = max(1, min(plan.fanout_channels, headroom) // plan.per_source)
    sources = feeder.ids[:count]
    chans = [c for sid in sources for c in _channel_ids(sid, plan.per_source)]
    k = FANOUT_CHANNELS_PER_CLIENT
    sets = [[chans[(i * k + j) % len(chans)] for j in range(k)] for i in range(plan.fanout_clients)]
    _say(f"fan-out: {len(chans)} channels, without clients, {plan.fanout_s:g} s")
    alone = _feed_step(plan, svc, feeder, sources, plan.fanout_s)
    job = {"url": svc.base.replace("http://", "ws://") + "/api/v1/stream",
           "channel_sets": sets, "seconds": plan.fanout_s + DRAIN_WAIT_S + FANOUT_SETTLE_S + 5.0,
           "rate_hz": plan.fanout_rate_hz,
           "deflate": plan.fanout_deflate}
    _say(f"fan-out: {len(chans)} channels, {plan.fanout_clients} clients x {k} channels")
    worker = subprocess.Popen([sys.executable, "-m", "service.loadbench", json.dumps(job)],
                              cwd=REPO, env=_child_env(), stdin=subprocess.PIPE,
                              stdout=subprocess.PIPE, text=True,
                              start_new_session=True)
    try:
        connected = _read_line(worker, 40.0).strip() == "connected"
        sent_before = {sid: len(feeder.log.sends[sid]) for sid in sources}
        with_clients = _feed_step(plan, svc, feeder, sources, plan.fanout_s)
        queues = _stream_metrics(svc)  # while the clients are still connected
        time.sleep(FANOUT_SETTLE_S)  # the step's last frames on their way to the clients
        try:
            out, _ = worker.communicate(input="stop\n", timeout=20.0)
        except subprocess.TimeoutExpired:
            out = ""
        result = json.loads(out.strip().splitlines()[-1]) if out.strip() else {"logs": []}
    finally:
        _stop_child(worker)
    expected = {}
    for sid in sources:  # the newest frame end after each block of the step with the clients
        start = with_clients["samples"][sid][0]
        ends = [e - start for e, _ in feeder.log.sends[sid][sent_before[sid]:]]
        expected[sid] = [start + e for e in newest_frame_ends(ends, plan.n, plan.hop)]
    # Dropped blocks mean frames never made (and frame assembly restarting elsewhere): the
    # end-index check needs a run without drops or gaps; the service's `missed` is kept anyway.
    checkable = with_clients["drops"] == 0 and with_clients["gaps"] == 0
    clients = []
    for log in result["logs"]:
        missing = unexpected = 0
        seq_back = 0
        foreign = sum(len(v) for c, v in log["frames"].items() if c not in log["channels"])
        for cid, pairs in log["frames"].items():
            if cid not in log["channels"]:
                continue
            sid = cid.rsplit("-c", 1)[0]
            ends = [index_of_time(t, feeder.base_ns, plan.fs_hz) for t, _ in pairs]
            m, u = end_index_differences(ends, expected[sid])
            missing += m
            unexpected += u
            seqs = [s for _, s in pairs]
            seq_back += sum(1 for a, b in zip(seqs, seqs[1:], strict=False) if b <= a)
        want = sum(len(expected[c.rsplit("-c", 1)[0]]) for c in log["channels"])
        clients.append({"received": log["received"], "missed_reported": log["missed"],
                        "expected": want if checkable else None,
                        "skipped_by_end_index": missing + unexpected if checkable else None,
                        "missing_by_end_index": missing if checkable else None,
                        "unexpected_end_index": unexpected if checkable else None,
                        "seq_not_rising": seq_back,
                        "unsubscribed_frames": foreign,
                        "error": log["error"]})
    kept_up = [c for c in clients if c["missed_reported"] == 0 and not c["error"]]
    # The service counts in `missed` every frame a client did not get since it subscribed (the
    # clients subscribe before the step), so a frame missing between a client's first and
    # last one beyond its `missed`, or an end that was never produced, is the service's fault.
    uncounted = [c for c in clients if checkable and not c["error"] and (
        c["missing_by_end_index"] > c["missed_reported"] or c["unexpected_end_index"]
        or c["seq_not_rising"])]
    a, b = alone["service_cpu_ms_per_frame"], with_clients["service_cpu_ms_per_frame"]
    return {
        "clients": plan.fanout_clients, "channels_per_client": k, "channels_fed": len(chans),
        "subscription": {"kinds": ["spectrum"], "max_rate_hz": plan.fanout_rate_hz,
                         "permessage_deflate": "offered (as browsers do)" if plan.fanout_deflate
                         else "not offered"},
        "all_connected": connected,
        "received_per_client": [c["received"] for c in clients],
        "clients_kept_up": len(kept_up),
        "kept_up_clients_with_skips": (sum(1 for c in kept_up if c["skipped_by_end_index"])
                                       if checkable else None),
        "clients_with_uncounted_skips": len(uncounted) if checkable else None,
        "unsubscribed_frames": sum(c["unsubscribed_frames"] for c in clients),
        "per_client": clients,
        "client_process_cpu_s": result.get("cpu_s"),
        "hub_queues": queues,
        "without_clients": alone, "with_clients": with_clients,
        "cpu_per_frame_ratio": round(b / a, 3) if a and b else None,
    }


def memory(plan: BenchPlan, workdir: Path) -> dict[str, Any]:
    """Phase 4: VmRSS of a small service after each checkpoint of frames (all channels)."""
    analysis = {"fmax_hz": plan.fmax_hz, "lines": plan.mem_lines, "overlap": plan.overlap,
                "window": "hann", "averaging": "exponential", "averages": 8, "unit": "velocity"}
    sid = "mem"
    chans = [f"mem-c{j}" for j in range(plan.mem_channels)]
    src = {"id": sid, "kind": "tcp", "format": "framed", "sample_rate_hz": plan.fs_hz,
           "queue_blocks": 16, "channels": chans}
    n = int(round(2.56 * plan.mem_lines))
    hop = max(1, int(round(n * (1 - plan.overlap))))
    points: list[dict[str, Any]] = []
    with run_service(workdir, analysis, [src]) as svc:
        feeder = Feeder(svc, [sid], plan.mem_channels, plan.fs_hz, plan.mem_block, time.time_ns())
        t_start = time.monotonic()
        window = 3  # blocks in flight beyond what the service has analysed
        try:
            for target in plan.mem_checkpoints:
                while plan.mem_channels * expected_frames(
                        feeder.log.next_index[sid], n, hop) < target:
                    if time.monotonic() - t_start > plan.mem_timeout_s:
                        raise TimeoutError
                    done = int(svc.get(f"channels/{chans[0]}")["counters"]["samples"])
                    if feeder.log.next_index[sid] - done >= window * plan.mem_block:
                        time.sleep(0.005)
                        continue
                    feeder.send_block(sid)
                want = expected_frames(feeder.log.next_index[sid], n, hop)
                deadline = time.monotonic() + 60.0
                while time.monotonic() < deadline:
                    got = svc.channels()
                    if all(got[c]["counters"]["frames"] >= want for c in chans):
                        break
                    time.sleep(0.05)
                time.sleep(0.3)
                frames = sum(int(c["counters"]["frames"]) for c in svc.channels().values())
                points.append({"frames": frames, "rss_mb": round(svc.rss() / 2**20, 2),
                               "samples_per_channel": feeder.log.next_index[sid],
                               "elapsed_s": round(time.monotonic() - t_start, 1)})
                _say(f"memory: {frames} frames, RSS {points[-1]['rss_mb']} MiB")
            timed_out = False
        except TimeoutError:
            timed_out = True
        finally:
            feeder.close()
        health = svc.get("health")
        drops = int(health["sources"][sid]["counters"]["drops"])
    first, last = (points[0], points[-1]) if points else ({}, {})
    return {
        "channels": plan.mem_channels, "lines": plan.mem_lines, "n": n, "hop": hop,
        "block_samples": plan.mem_block, "checkpoints": list(plan.mem_checkpoints),
        "points": points, "drops": drops, "timed_out": timed_out,
        "rss_ratio": round(last["rss_mb"] / first["rss_mb"], 4) if len(points) > 1 else None,
        "within_10_percent": (abs(last["rss_mb"] / first["rss_mb"] - 1) <= 0.10
                              if len(points) > 1 else None),
    }


def run(plan: BenchPlan, workdir: Path | None = None) -> dict[str, Any]:
    """Every phase of ``plan``; a JSON-ready report. Child processes always end."""
    report: dict[str, Any] = {"machine": machine(), "mode": "short" if plan.short else "full"}
    cfg = {k: v for k, v in asdict(plan).items() if not k.startswith("mem") and k != "short"}
    report["setup"] = {**cfg, "n": plan.n, "hop": plan.hop, "block_samples": plan.block,
                       "bands": 16, "tones": 8, "alarm_rules_per_channel": 2,
                       "drain_s": DRAIN_S, "window": "hann", "averaging": "exponential 8"}
    with contextlib.ExitStack() as stack:
        if workdir is None:
            workdir = Path(stack.enter_context(tempfile.TemporaryDirectory(prefix="quaver-bench-")))
        n_src = math.ceil(plan.max_channels / plan.per_source)
        ids = _source_ids(n_src)
        analysis = {"fmax_hz": plan.fmax_hz, "lines": plan.lines, "overlap": plan.overlap,
                    "window": "hann", "averaging": "exponential", "averages": 8,
                    "unit": "velocity"}
        sources = [{"id": sid, "kind": "tcp", "format": "framed", "sample_rate_hz": plan.fs_hz,
                    "queue_blocks": plan.queue_blocks,
                    "channels": _channel_ids(sid, plan.per_source)} for sid in ids]
        _say(f"starting a service with {n_src * plan.per_source} channels on {n_src} sources")
        with run_service(workdir / "load", analysis, sources) as svc:
            report["service_rss_idle_mb"] = round(svc.rss() / 2**20, 1)
            feeder = Feeder(svc, ids, plan.per_source, plan.fs_hz, plan.block, time.time_ns())
            try:
                report["headroom"] = headroom_and_latency(plan, svc, feeder)
                report["fanout"] = fanout(plan, svc, feeder,
                                          report["headroom"]["largest_passing_channels"])
            finally:
                feeder.close()
            report["service_log_tail"] = svc.log_tail(5)
        report["memory"] = memory(plan, workdir / "memory")
    report["machine"]["loadavg_at_end"] = [round(v, 2) for v in os.getloadavg()]
    return report


# --- the report ---------------------------------------------------------------------------------


def _f(v: Any, spec: str = "") -> str:
    return "—" if v is None else format(v, spec)


def format_report(r: dict[str, Any]) -> str:
    """The report as a readable table."""
    m, s = r["machine"], r["setup"]
    out = [f"quaver service load benchmark ({r['mode']} run)",
           f"machine: {m['cpu']}, {m['cores']} cores, Python {m['python']}, numpy {m['numpy']}; "
           f"load average at start {m['loadavg_at_start']}, at end {m.get('loadavg_at_end')}",
           "BLAS threads: " + (", ".join(f"{k}={v}" for k, v in m["blas_env"].items() if v)
                               or "library default (no OPENBLAS/OMP/MKL_NUM_THREADS set)"),
           f"set-up: fs {s['fs_hz']:g} Hz, Fmax {s['fmax_hz']:g} Hz, {s['lines']} lines "
           f"(N {s['n']}, hop {s['hop']}), {s['bands']} bands, {s['tones']} tones, "
           f"{s['alarm_rules_per_channel']} alarm rules per channel; {s['per_source']} channels "
           f"per TCP source, {s['block_samples']}-sample framed blocks, queue "
           f"{s['queue_blocks']} blocks; the feeder shares the machine's cores", ""]
    h = r["headroom"]
    out.append(f"1. ingest headroom: largest channel count kept up with: "
               f"{h['largest_passing_channels']} (steps {s['step_s']:g} s each at real time; "
               f"pass = 0 drops, 0 gaps, no overrun, exact frame counts within {s['drain_s']:g} s)")
    out.append(f"  {'ch':>4} {'pass':>4} {'drops':>5} {'gaps':>4} {'frames got/expected':>20} "
               f"{'drain s':>7} {'queue':>5} {'svc CPU':>7} {'ms/frame':>8} {'feeder':>6} "
               f"{'bench':>6} {'lat p50':>7} {'lat p99':>7} {'RSS MiB':>7}")
    for st in h["steps"]:
        lat = st["latency"]
        out.append(
            f"  {st['channels']:>4} {'yes' if st['passed'] else 'NO':>4} {st['drops']:>5} "
            f"{st['gaps']:>4} {str(st['frames_counted']) + '/' + str(st['frames_expected']):>20} "
            f"{_f(st['drain_s'], '.2f'):>7} {st['max_queued_blocks']:>5} "
            f"{100 * st['service_cpu_share']:>6.0f}% {_f(st['service_cpu_ms_per_frame'], '.3f'):>8}"
            f" {100 * st['feeder_cpu_share']:>5.1f}% {100 * st['bench_cpu_share']:>5.1f}% "
            f"{_f(lat['median_ms'], '.1f'):>7} {_f(lat['p99_ms'], '.1f'):>7} "
            f"{st['service_rss_mb']:>7.1f}")
    lat = h["latency"]
    out += ["", f"2. latency, sample sent → WebSocket spectrum message that includes it "
                f"(channel {lat['channel']}, at {lat['at_channels']} channels, first "
                f"{lat['warmup_excluded_s']:g} s left out): median {_f(lat['median_ms'], '.1f')} "
                f"ms, p99 {_f(lat['p99_ms'], '.1f')} ms, max {_f(lat['max_ms'], '.1f')} ms "
                f"over {lat['count']} messages" + (f" [client: {lat['client_error']}]"
                                                    if lat["client_error"] else "")]
    f = r["fanout"]
    rec = f["received_per_client"]
    want = [c["expected"] for c in f["per_client"] if c.get("expected") is not None]
    skips = f["kept_up_clients_with_skips"]
    uncounted = f.get("clients_with_uncounted_skips")
    if skips is None:
        skips = uncounted = "not checkable (the service dropped blocks)"
    a, b = f["without_clients"], f["with_clients"]
    out += ["", f"3. WebSocket fan-out: {f['clients']} clients x {f['channels_per_client']} "
                f"channels ({f['subscription']['kinds'][0]}, limit "
                f"{f['subscription']['max_rate_hz']:g}/s) on {f['channels_fed']} channels fed "
                f"at real time",
            f"  frames received per client: min {min(rec, default=0)}, median "
            f"{_f(percentile(rec, 50) if rec else None, '.0f')}, max {max(rec, default=0)} "
            f"(produced for its channels: {_f(max(want, default=None))}); "
            f"clients that kept up (missed = 0): {f['clients_kept_up']}/{f['clients']}, of "
            f"which with skipped frames: {skips}; "
            f"frames of channels not subscribed: {f['unsubscribed_frames']}",
            f"  clients whose frames by end index disagree with the service (skipped more than "
            f"their `missed`, an end never produced, or seq not rising): {uncounted}",
            f"  service CPU per analysis frame: {_f(a['service_cpu_ms_per_frame'], '.4f')} ms "
            f"without, {_f(b['service_cpu_ms_per_frame'], '.4f')} ms with the clients "
            f"(ratio {_f(f['cpu_per_frame_ratio'], '.2f')}); service CPU "
            f"{100 * a['service_cpu_share']:.0f} % → {100 * b['service_cpu_share']:.0f} %; "
            f"drops {a['drops']} / {b['drops']}; client process CPU "
            f"{_f(f['client_process_cpu_s'], '.1f')} s",
            f"  hub queues (/metrics, at the end of the step): {f['hub_queues']} — at most one "
            "frame per subscribed channel waits per client, so pending cannot grow"]
    mm = r["memory"]
    pts = ", ".join(f"{p['frames']} frames: {p['rss_mb']:.1f} MiB" for p in mm["points"])
    out += ["", f"4. memory (VmRSS) of a {mm['channels']}-channel service at {mm['lines']} lines "
                f"fed faster than real time: {pts or 'no figures'}; ratio last/first "
                f"{_f(mm['rss_ratio'], '.3f')}"
                + (" (short run: checkpoints 10^3 and 10^5 frames)" if r["mode"] == "short"
                   else "") + (" [TIMED OUT]" if mm["timed_out"] else "")]
    return "\n".join(out)


def main(*, short: bool = False, as_json: bool = False,
         steps: Sequence[int] | None = None, step_s: float | None = None) -> int:
    """``quaver bench --service``: run, print the table (or JSON); 0 when it ran."""
    plan = BenchPlan.for_mode(short)
    if steps:
        plan.steps = tuple(sorted(set(int(c) for c in steps)))
    if step_s:
        plan.step_s = float(step_s)
    with _interrupts():
        report = run(plan)
    print(json.dumps(report, indent=1) if as_json else format_report(report))
    return 0


@contextlib.contextmanager
def _interrupts() -> Iterator[None]:
    """SIGINT and SIGTERM raise KeyboardInterrupt in the main thread while the bench runs, so
    the ``finally`` blocks stop the child processes (a shell may start us with SIGINT
    ignored; a service manager sends SIGTERM)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def stop(signum: int, frame: object) -> None:
        raise KeyboardInterrupt

    old = {sig: signal.signal(sig, stop) for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield
    finally:
        for sig, handler in old.items():
            signal.signal(sig, handler)


if __name__ == "__main__":  # the fan-out client process (see fanout)
    raise SystemExit(_fanout_worker(sys.argv[1:]))

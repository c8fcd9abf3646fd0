"""The ingest edge cannot be abused (issue 13 items 2 and 4-8, issue 15 item 9): each case on
a real ``quaver serve`` over real loopback sockets, then a good signal that must still be
analysed.

Knows the config file, the framed format's documented layout (README, service/wire.py), the
CLI and the public HTTP API; nothing of the service's internals."""

from __future__ import annotations

import contextlib
import os
import socket
import struct
import subprocess
import zlib
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pytest
import scipy.io.wavfile

from service.config import ConfigError, parse_config
from service.sources import make_source
from service.wire import MAGIC, encode_frame

if TYPE_CHECKING:
    from conftest import RunningService  # tests/service/conftest.py: the running-service fixture

from tests.service.conftest import LOOPBACK, SMALL_FS, free_ports, run_service, to_toml

CliRun = subprocess.CompletedProcess[str]
INDEX_MAX = 2**63 - 1  # stream indices are signed 64-bit (docs/feeding.md, framed format)
HEAD = struct.Struct("<4sBBHdQqII")  # the README's header table, bytes 0…39
FRAME = 256  # samples per frame
N_GOOD = 4 * 1024  # samples of good signal after each fault: several 1024-sample frames
TONE_HZ = 123.0  # inside band b (100-150 Hz)
IDLE_S = 1.0  # the idle source's idle_timeout_s (short, so the test is quick)

ANALYSIS = {"fmax_hz": 1000.0, "lines": 400, "averaging": "exponential", "averages": 2,
            "unit": "acceleration", "output_unit": "g", "amplitude": "peak"}


def _src(sid: str, kind: str = "tcp", fmt: str = "framed", **extra: Any) -> dict[str, Any]:
    out = {"id": sid, "kind": kind, "listen": "auto", "sample_rate_hz": SMALL_FS,
           "channels": [f"{sid}-a"], **extra}
    if kind == "tcp":
        out["format"] = fmt
    return out


def config(tmp: Path) -> dict[str, Any]:
    """Sources with default settings only (a config the service took before these limits,
    so each test below shows the old behaviour's failure, not a refused config)."""
    return {
        "analysis": ANALYSIS,
        "sources": [
            _src("top"), _src("utop", "udp"),
            _src("huge"),
            _src("raw", fmt="f32le"),
            {"id": "long", "kind": "file", "path": str(tmp / "long.csv"), "format": "csv",
             "start_at": "beginning", "sample_rate_hz": SMALL_FS, "channels": ["long-a"]},
        ],
        "bands": [{"name": "b", "lo_hz": 100.0, "hi_hz": 150.0}],
        "alarms": [{"channel": "raw-a", "band": "b", "alert": 0.5, "danger": 1.0}],
    }


LIMITS_CONFIG: dict[str, Any] = {
    "analysis": ANALYSIS,
    "sources": [
        _src("idle", idle_timeout_s=IDLE_S),
        _src("deny", allow_from=["192.0.2.0/24", "10.0.0.0/8"]),
        _src("udeny", "udp", allow_from=["192.0.2.0/24"]),
        _src("allow", allow_from=["127.0.0.0/8"]),
    ],
}


@pytest.fixture(scope="module")
def workdir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("ingest")


@pytest.fixture(scope="module")
def svc(quaver_service_factory: Callable[[dict[str, Any]], RunningService],
        workdir: Path) -> RunningService:
    return quaver_service_factory(config(workdir))


@pytest.fixture(scope="module")
def lim(quaver_service_factory: Callable[[dict[str, Any]], RunningService]) -> RunningService:
    return quaver_service_factory(LIMITS_CONFIG)


@contextlib.contextmanager
def producer(port: int) -> Iterator[socket.socket]:
    sock = socket.create_connection((LOOPBACK, port), timeout=10.0)
    try:
        yield sock
    finally:
        sock.close()


def tone(n: int, amp: float = 0.2) -> np.ndarray:
    """``n`` samples of a TONE_HZ sine of peak ``amp`` g, phase from sample 0 of the block
    (so an index near 2**63 costs no precision), as float32 [1, n]."""
    return (amp * np.sin(2 * np.pi * TONE_HZ * np.arange(n) / SMALL_FS))[None, :].astype(
        np.float32)


def tone_frames(first: int, n: int = N_GOOD, amp: float = 0.2) -> list[bytes]:
    x = tone(n, amp)
    return [encode_frame(x[:, k:k + FRAME], "f32le", SMALL_FS, first + k)
            for k in range(0, n, FRAME)]


def header_only(first: int, payload_len: int, payload: bytes = b"") -> bytes:
    """A framed header (f32le, one channel, SMALL_FS) with both CRCs right, built from the
    README's table with struct and zlib: ``encode_frame`` refuses these values."""
    head = HEAD.pack(MAGIC, 1, 2, 1, SMALL_FS, first, 0, payload_len, zlib.crc32(payload))
    return head + struct.pack("<I", zlib.crc32(head)) + payload


def counters(svc: RunningService, sid: str) -> dict[str, Any]:
    return svc.source(sid)["counters"]  # type: ignore[no-any-return]


def band_alarm(svc: RunningService) -> dict[str, Any]:
    """The raw source's band-b alarm (not its channel's loss-of-signal rule)."""
    (rule,) = [a for a in svc.get("alarms", all="true") if a["rule"] == "raw-a.band.b"]
    return rule  # type: ignore[no-any-return]


def frames_of(svc: RunningService, cid: str) -> int:
    return int(svc.channel(cid)["counters"]["frames"])


def wait_frames(svc: RunningService, cid: str, more_than: int, samples: int, what: str) -> None:
    """Until channel ``cid`` has taken ``samples`` samples and made more than ``more_than``
    frames, with a spectrum to show."""
    def probe() -> bool:
        ch = svc.channel(cid)["counters"]
        return (ch["samples"] == samples and ch["frames"] > more_than
                and svc.get_or_none(f"channels/{cid}/spectrum") is not None)

    svc.wait(probe, what)


# --- (2) an index beyond int64 ----------------------------------------------------------------


def test_tcp_index_beyond_int64_is_malformed_and_analysis_goes_on(svc: RunningService) -> None:
    with producer(svc.ports["top"]) as sock:
        for f in tone_frames(0):
            sock.sendall(f)
        wait_frames(svc, "top-a", 0, N_GOOD, "spectra before the bad frame")
        before = frames_of(svc, "top-a")
        bad = header_only(2**63, 4 * FRAME, bytes(4 * FRAME))
        sock.sendall(bad)
        for f in tone_frames(N_GOOD):
            sock.sendall(f)
        wait_frames(svc, "top-a", before, 2 * N_GOOD, "spectra after the bad frame")
    c = counters(svc, "top")
    assert (c["malformed"], c["gaps"], c["samples"]) == (1, 0, 2 * N_GOOD), c
    assert "first sample index 9223372036854775808 with 256 samples runs past 2**63-1" in (
        c["last_error"])
    assert svc.channel("top-a")["status"] == "ok"
    svc.assert_healthy()


def test_tcp_indices_at_the_top_of_int64_are_analysed(svc: RunningService) -> None:
    # the new stream ends exactly at 2**63 - 1 (its last sample is 2**63 - 2): a gap, then
    # spectra as anywhere else; one more frame there would run past and is refused
    start = INDEX_MAX - N_GOOD
    samples = counters(svc, "top")["samples"]
    before = frames_of(svc, "top-a")
    with producer(svc.ports["top"]) as sock:
        for f in tone_frames(start):
            sock.sendall(f)
        wait_frames(svc, "top-a", before, samples + N_GOOD, "spectra near 2**63")
        malformed = counters(svc, "top")["malformed"]
        sock.sendall(header_only(INDEX_MAX, 4, b"\0\0\0\0"))  # its one sample: 2**63 - 1
        svc.wait(lambda: counters(svc, "top")["malformed"] == malformed + 1,
                 "the frame past the top refused")
    assert "first sample index 9223372036854775807 with 1 samples runs past" in counters(
        svc, "top")["last_error"]
    spec = svc.get("channels/top-a/spectrum")
    values = np.array(spec["values"])
    assert np.all(np.isfinite(values))
    q = int(round(TONE_HZ / spec["df_hz"]))
    assert int(np.argmax(values)) in (q - 1, q, q + 1)  # the tone, not garbage
    svc.assert_healthy()


def test_udp_index_beyond_int64_is_malformed_and_analysis_goes_on(svc: RunningService) -> None:
    port = svc.ports["utop"]
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as sock:
        for f in tone_frames(0):
            sock.sendto(f, (LOOPBACK, port))
        wait_frames(svc, "utop-a", 0, N_GOOD, "spectra before the bad datagram")
        before = frames_of(svc, "utop-a")
        sock.sendto(header_only(2**64 - 1, 4, b"\0\0\0\0"), (LOOPBACK, port))
        svc.wait(lambda: counters(svc, "utop")["malformed"] == 1, "the bad datagram counted")
        for f in tone_frames(N_GOOD):
            sock.sendto(f, (LOOPBACK, port))
        wait_frames(svc, "utop-a", before, 2 * N_GOOD, "spectra after the bad datagram")
    c = counters(svc, "utop")
    assert (c["malformed"], c["gaps"]) == (1, 0), c
    assert "runs past 2**63-1" in c["last_error"]
    svc.assert_healthy()


# --- (5) an idle producer -----------------------------------------------------------------------


def test_idle_producer_is_dropped_and_the_real_one_gets_in(lim: RunningService) -> None:
    port = lim.ports["idle"]
    with producer(port) as idle:
        me = "{}:{}".format(*idle.getsockname())
        lim.wait(lambda: lim.source("idle")["producer"] == me, "the idle client to hold the slot")
        # after idle_timeout_s of silence it is dropped: the service closes it
        idle.settimeout(10.0 + 5 * IDLE_S)
        assert idle.recv(1) == b""
    c = counters(lim, "idle")
    assert (c["idle_drops"], c["samples"]) == (1, 0), c
    assert f"dropped producer {me}: nothing received for" in c["last_error"]
    assert f"(idle_timeout_s = {IDLE_S:g})" in c["last_error"]
    with producer(port) as real:
        for f in tone_frames(0):
            real.sendall(f)
        wait_frames(lim, "idle-a", 0, N_GOOD, "the real producer's spectra")
        assert lim.source("idle")["producer"] == "{}:{}".format(*real.getsockname())
    c = counters(lim, "idle")
    assert (c["connections"], c["refused"], c["idle_drops"], c["samples"]) == (
        2, 0, 1, N_GOOD), c
    lim.assert_healthy()


# --- (6) a header declaring a huge payload --------------------------------------------------


def test_huge_declared_frame_is_malformed_at_once_and_later_frames_analysed(
    svc: RunningService,
) -> None:
    limit = svc.source("huge")["max_frame_bytes"]
    assert limit == 64 * 1024  # the floor: 1 s of 1 channel at 2560 Hz × 8 B is 20 480 B
    with producer(svc.ports["huge"]) as sock:
        sock.sendall(header_only(0, 16 * 2**20))  # 16 MiB declared, valid CRCs, no payload
        svc.wait(lambda: counters(svc, "huge")["malformed"] == 1, "the huge header counted")
        for f in tone_frames(0):
            sock.sendall(f)
        wait_frames(svc, "huge-a", 0, N_GOOD, "spectra after the huge header")
    c = counters(svc, "huge")
    assert (c["malformed"], c["samples"], c["gaps"]) == (1, N_GOOD, 0), c
    assert f"payload length {16 * 2**20} exceeds the maximum {limit}" in c["last_error"]
    svc.assert_healthy()


# --- (4) framed data or implausible values on a raw source ------------------------------------


def _wav(path: Path, seconds: float, amp: float = 0.2) -> Path:
    n = int(seconds * SMALL_FS)
    scipy.io.wavfile.write(path, int(SMALL_FS), tone(n, amp)[0])  # float32 WAV: values kept
    return path


def test_feed_refuses_framed_to_a_raw_source_when_the_service_tells(
    svc: RunningService, tmp_path: Path, quaver_cli: Callable[..., CliRun],
) -> None:
    wav = _wav(tmp_path / "t.wav", 0.5)
    to = f"{LOOPBACK}:{svc.ports['raw']}"
    got = quaver_cli("feed", str(wav), "--to", to, "--format", "framed", "--speed", "0",
                     "--api", svc.base_url)
    assert got.returncode != 0
    assert "source 'raw' at" in got.stderr and "reads f32le, not framed" in got.stderr
    assert "--format f32le" in got.stderr
    assert counters(svc, "raw")["connections"] == 0  # nothing was sent


def test_raw_source_refuses_framed_data_and_raises_no_alarm(
    svc: RunningService, tmp_path: Path, quaver_cli: Callable[..., CliRun],
) -> None:
    # the client-side check skipped: the service itself must refuse
    wav = _wav(tmp_path / "loud.wav", 0.3, amp=0.2)
    to = f"{LOOPBACK}:{svc.ports['raw']}"
    got = quaver_cli("feed", str(wav), "--to", to, "--format", "framed", "--speed", "0",
                     "--api", "none", "--block-ms", "1000")  # one block: one connection
    assert "warning" not in got.stderr  # no check asked for, none warned about
    c = svc.wait(lambda: (c := counters(svc, "raw"))["wrong_format"] == 1 and
                 c["disconnects"] == 1 and c, "the framed stream refused")
    assert (c["connections"], c["samples"], c["malformed"]) == (1, 0, 1), c
    assert "this looks like framed data on a raw source" in c["last_error"]
    assert "a framed header at byte 0" in c["last_error"]
    assert svc.channel("raw-a")["counters"]["samples"] == 0
    assert band_alarm(svc)["state"] == "normal"  # no false DANGER from headers as samples
    svc.assert_healthy()


def test_raw_block_of_implausible_values_is_rejected_then_good_data_analysed(
    svc: RunningService,
) -> None:
    start = counters(svc, "raw")
    with producer(svc.ports["raw"]) as sock:
        junk = np.full(1024, 1e20, dtype="<f4")  # 1e20 g: not a sample, another format's bytes
        sock.sendall(junk.tobytes())
        svc.wait(lambda: counters(svc, "raw")["implausible_blocks"] == 1, "the junk rejected")
        sock.sendall(tone(N_GOOD)[0].astype("<f4").tobytes())
        wait_frames(svc, "raw-a", 0, N_GOOD, "spectra of the good samples")
    c = counters(svc, "raw")
    assert c["malformed"] == start["malformed"] + 1 and c["samples"] == N_GOOD, c
    assert "1024 of 1024 values beyond ±1e+15" in c["last_error"]
    assert "implausible as f32le samples" in c["last_error"]
    assert band_alarm(svc)["state"] == "normal"  # 1e20 never reached the band; 0.2 g is normal
    svc.assert_healthy()


def test_feed_checks_the_format_and_warns_when_it_cannot(
    svc: RunningService, tmp_path: Path, quaver_cli: Callable[..., CliRun],
) -> None:
    wav = _wav(tmp_path / "ok.wav", 0.5)
    to = f"{LOOPBACK}:{svc.ports['raw']}"
    samples = counters(svc, "raw")["samples"]
    ok = quaver_cli("feed", str(wav), "--to", to, "--speed", "0", "--api", svc.base_url)
    assert ok.returncode == 0, ok.stderr
    assert "source 'raw' at" in ok.stderr
    assert "reads f32le, 1 channel(s) at 2560 Hz: matches" in ok.stderr
    two = tmp_path / "two.wav"
    scipy.io.wavfile.write(two, int(SMALL_FS), np.vstack([tone(1280), tone(1280)]).T)
    wrong = quaver_cli("feed", str(two), "--to", to, "--speed", "0", "--api", svc.base_url)
    assert wrong.returncode != 0
    assert "takes 1 channel(s) (raw-a); the recording has 2 (raw samples would be " in (
        wrong.stderr)
    fast = tmp_path / "fast.wav"
    scipy.io.wavfile.write(fast, 2 * int(SMALL_FS), tone(1280)[0])
    wrong = quaver_cli("feed", str(fast), "--to", to, "--speed", "0", "--api", svc.base_url)
    assert wrong.returncode != 0
    assert "runs at 2560 Hz; the recording is 5120 Hz" in wrong.stderr
    (nobody,) = free_ports(1)
    blind = quaver_cli("feed", str(wav), "--to", to, "--speed", "0",
                       "--api", f"http://{LOOPBACK}:{nobody}")
    assert blind.returncode == 0, blind.stderr
    assert "warning: cannot check which format" in blind.stderr
    svc.wait(lambda: counters(svc, "raw")["samples"] == samples + 2 * int(0.5 * SMALL_FS),
             "both feeds counted")


# --- allow_from -------------------------------------------------------------------------------


def test_tcp_peer_outside_allow_from_is_refused_and_counted(lim: RunningService) -> None:
    with producer(lim.ports["deny"]) as sock:
        sock.settimeout(10.0)
        with contextlib.suppress(OSError):  # reset by the service: refused too
            for f in tone_frames(0, 1024):
                sock.sendall(f)
            assert sock.recv(1) == b""
    c = lim.wait(lambda: (c := counters(lim, "deny"))["refused_peers"] == 1 and c,
                 "the refusal counted")
    assert (c["connections"], c["samples"], c["bytes"]) == (0, 0, 0), c
    assert f"refused {LOOPBACK}:" in c["last_error"] and "not in allow_from" in c["last_error"]
    assert lim.source("deny")["allow_from"] == ["192.0.2.0/24", "10.0.0.0/8"]
    metrics = lim.client.get("/metrics").text
    assert 'quaver_source_extra_total{counter="refused_peers",source="deny"} 1.0' in metrics
    with producer(lim.ports["allow"]) as sock:
        for f in tone_frames(0):
            sock.sendall(f)
        wait_frames(lim, "allow-a", 0, N_GOOD, "spectra from an allowed peer")
    assert counters(lim, "allow")["refused_peers"] == 0


def test_udp_datagrams_outside_allow_from_are_dropped_unread(lim: RunningService) -> None:
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as sock:
        frames = tone_frames(0, 1024)
        for f in frames:
            sock.sendto(f, (LOOPBACK, lim.ports["udeny"]))
    c = lim.wait(lambda: (c := counters(lim, "udeny"))["refused_peers"] == len(frames) and c,
                 "every datagram refused")
    assert (c["samples"], c["bytes"], c["malformed"]) == (0, 0, 0), c


def test_check_warns_about_an_open_network_source(
    tmp_path: Path, quaver_cli: Callable[..., subprocess.CompletedProcess[str]],
) -> None:
    doc = {"analysis": ANALYSIS, "sources": [
        {**_src("open"), "listen": "0.0.0.0:9"},
        {**_src("fenced", "udp", allow_from=["10.0.0.0/8"]), "listen": "0.0.0.0:10"},
        {**_src("local"), "listen": "127.0.0.1:11"},
    ]}

    path = tmp_path / "q.toml"
    path.write_text(to_toml(doc), encoding="utf-8")
    got = quaver_cli("check", "-c", str(path))
    assert got.returncode == 0, got.stdout + got.stderr
    warnings = [ln for ln in got.stdout.splitlines() if ln.startswith("warning:")]
    assert len(warnings) == 1, got.stdout
    assert "sources[0] (open): listens on '0.0.0.0:9'" in warnings[0]
    assert "without allow_from" in warnings[0]
    bad = path.read_text(encoding="utf-8").replace('"10.0.0.0/8"', '"10.0.0.0/33"')
    path.write_text(bad, encoding="utf-8")
    got = quaver_cli("check", "-c", str(path))
    assert got.returncode != 0
    assert "sources[1].allow_from: '10.0.0.0/33' is not an IP network" in got.stderr + got.stdout


# --- (8) a text line without a newline ------------------------------------------------------


def _rss_kb(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    raise AssertionError("no VmRSS")  # pragma: no cover - Linux always has it


def test_overlong_csv_line_is_malformed_skipped_and_bounded(
    svc: RunningService, workdir: Path,
) -> None:
    path = workdir / "long.csv"
    rss0 = _rss_kb(svc.proc.pid)
    long_bytes = 30 * 2**20  # as in the issue: 30 MB without a newline
    with open(path, "ab") as fh:
        fh.write(b"1" * long_bytes)
        fh.flush()
        svc.wait(lambda: svc.source("long")["position_bytes"] >= long_bytes,
                 "the long line read")
        c = counters(svc, "long")
        assert c["malformed"] == 1, c
        assert "line 1: longer than 1048576 bytes without a newline" in c["last_error"]
        rss1 = _rss_kb(svc.proc.pid)
        fh.write(b"2222\n")  # the end of the over-long line: still skipped
        x = tone(N_GOOD)[0]
        fh.write("".join(f"{v:.9g}\n" for v in x).encode())
        fh.flush()
    wait_frames(svc, "long-a", 0, N_GOOD, "spectra of the rows after the long line")
    c = counters(svc, "long")
    assert (c["malformed"], c["samples"]) == (1, N_GOOD), c
    # holding the line cost +150 MB before; now at most the bound and a read buffer or two
    assert rss1 - rss0 < 32 * 1024, (rss0, rss1)
    svc.assert_healthy()


# --- (7) a FIFO at a followed file's path ----------------------------------------------------


def test_fifo_at_a_followed_path_is_refused_and_the_service_answers(tmp_path: Path) -> None:
    fifo = tmp_path / "feed.csv"
    os.mkfifo(fifo)
    doc = {"analysis": ANALYSIS, "sources": [
        {"id": "f", "kind": "file", "path": str(fifo), "format": "csv",
         "start_at": "beginning", "sample_rate_hz": SMALL_FS, "channels": ["f-a"]}]}
    with run_service(doc, tmp_path / "svc") as svc:  # starting at all needs /health to answer
        c = svc.wait(lambda: (c := counters(svc, "f"))["refused_files"] == 1 and c,
                     "the FIFO refused")
        assert f"{fifo} is a FIFO (named pipe), not a regular file" in c["last_error"]
        assert svc.source("f")["state"] == "unusable file"
        assert "not a regular file" in svc.log_path.read_text(encoding="utf-8")
        for _ in range(5):  # polls go on without blocking and without counting it again
            svc.assert_healthy()
        assert counters(svc, "f")["refused_files"] == 1
        # a regular file in its place is followed from its beginning
        fifo.unlink()
        part = tmp_path / "part.csv"
        part.write_text("".join(f"{v:.9g}\n" for v in tone(N_GOOD)[0]), encoding="utf-8")
        part.rename(fifo)
        wait_frames(svc, "f-a", 0, N_GOOD, "spectra from the regular file")
        svc.assert_healthy()


# --- the settings themselves ------------------------------------------------------------------


@pytest.mark.parametrize(("key", "value", "problem"), [
    ("idle_timeout_s", 0, "sources[0].idle_timeout_s: "),
    ("idle_timeout_s", 3601, "sources[0].idle_timeout_s: "),
    ("max_frame_bytes", 1023, "sources[0].max_frame_bytes: "),
    ("max_frame_bytes", 16 * 2**20 + 1, "sources[0].max_frame_bytes: "),
    ("allow_from", ["10.0.0.0/8", "nope"], "sources[0].allow_from: 'nope' is not an IP network"),
    ("allow_from", "10.0.0.0/8", "sources[0].allow_from: "),
])
def test_source_limit_settings_are_checked(key: str, value: Any, problem: str) -> None:
    doc = {"analysis": ANALYSIS, "sources": [{**_src("s"), "listen": "127.0.0.1:9", key: value}]}
    with pytest.raises(ConfigError) as e:
        parse_config(doc)
    assert any(p.startswith(problem) for p in e.value.problems), e.value.problems


def test_source_limit_defaults() -> None:
    doc = {"analysis": ANALYSIS, "sources": [
        {**_src("t"), "listen": "127.0.0.1:9"},
        {**_src("u", "udp"), "listen": "127.0.0.1:9", "channels": ["u1", "u2", "u3", "u4"],
         "sample_rate_hz": 51200.0},
    ]}
    t, u = (make_source(s) for s in parse_config(doc).sources)
    st, su = t.status(), u.status()
    assert (st["idle_timeout_s"], st["allow_from"]) == (10.0, None)
    assert st["max_frame_bytes"] == 64 * 1024  # 1 ch × 2560 Hz × 8 B = 20 480 B: the floor
    assert su["max_frame_bytes"] == 4 * 51200 * 8  # about 1 s of f64 data

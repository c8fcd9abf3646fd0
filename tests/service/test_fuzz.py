"""Property-based fuzzing of the two parsers that take outside input: the framed wire format
(service.wire) and the configuration (service.config), with counted, bounded inputs.

Knows only the public functions of service.wire and service.config; no sockets, no service.

Inputs exercised (all derandomized or seeded; each test under 20 s here):

* wire, hypothesis: 2000 streams × 40–60 chunks through ``FrameDecoder.feed`` ≈ 10⁵ chunks;
* wire, seeded loop: 10⁵ frames (half of them mutated, 14 kinds) in 500 streams;
* wire: 5·10⁴ seeded datagrams and 2000 hypothesis datagrams through ``decode_datagram``;
* config, seeded loops: 2·10⁴ scrambled documents and 8·10⁴ random single-table documents
  through ``parse_config``;
* config, hypothesis: 1500 single-fault documents whose error must name the key path, and
  300 TOML files (syntax errors and non-UTF-8 bytes among them) through ``load_config``;
  1.02·10⁵ configuration inputs in all.
"""

from __future__ import annotations

import copy
import datetime as dt
import math
import random
import re
import struct
import tomllib
import types
import zlib
from collections.abc import Iterator
from pathlib import Path
from typing import Annotated, Any, Literal, Union, get_args, get_origin

import numpy as np
import pytest
import tomli_w
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pydantic import BaseModel

from service import wire
from service.config import (
    AlarmConfig,
    AnalysisOverride,
    AnalysisSettings,
    BandConfig,
    ChannelConfig,
    ConfigError,
    FileSourceConfig,
    ServiceSettings,
    SimulatedSourceConfig,
    TcpSourceConfig,
    TokenConfig,
    ToneConfig,
    UdpSourceConfig,
    load_config,
    parse_config,
)

# --- the framed wire format -----------------------------------------------------------------

# The layout table of docs/feeding.md "Framed TCP and UDP", written out here independently.
HEAD = struct.Struct("<4sBBHdQqII")  # bytes 0…39, covered by the header CRC
HEADER = 44
FORMATS = ("s16le", "s32le", "f32le", "f64le")  # sample format codes 0, 1, 2, 3
SIZES = {"s16le": 2, "s32le": 4, "f32le": 4, "f64le": 8}
DTYPES = {"s16le": "<i2", "s32le": "<i4", "f32le": "<f4", "f64le": "<f8"}
FS_CHOICES = (2560.0, 12800.0, 25600.0, 51200.0, 1e-3, 3.7e9, 5e-324)  # Hz, all > 0, finite

# Every rejection reason the decoder may give (service/wire.py); a reason outside this set
# is not a readable, documented one.
REASONS = [
    r"bad magic",
    r"header CRC mismatch",
    r"unsupported version \d+ \(this receiver reads version 1\)",
    r"unknown sample format code \d+ \(allowed 0-3\)",
    r"channel count \d+ outside 1-4096",
    r"sample rate \S+ Hz is not a finite number > 0",
    r"payload length \d+ is not a non-zero multiple of \d+ bytes",
    r"payload length \d+ exceeds the maximum \d+",
    r"payload CRC mismatch",
    r"\d+ bytes where no frame starts",
]
DATAGRAM_REASONS = [
    *REASONS,
    r"datagram of \d+ bytes is shorter than a header",
    r"datagram of \d+ bytes does not hold one frame of \d+ bytes",
]
READABLE = re.compile("|".join(f"(?:{r})" for r in REASONS))
READABLE_DATAGRAM = re.compile("|".join(f"(?:{r})" for r in DATAGRAM_REASONS))

# What decode_datagram must say for a frame with one mutation of each kind.
CRC = r"header CRC mismatch|payload CRC mismatch|bad magic"
EXPECTED_DATAGRAM_REASON = {
    "bitflip": CRC,
    "burst": CRC,
    "truncate": r"shorter than a header|does not hold one frame",
    "insert": CRC + r"|does not hold one frame",
    "length_lie": r"not a non-zero multiple|exceeds the maximum|does not hold one frame",
    "length_zero": r"payload length 0 is not a non-zero multiple",
    "length_huge": r"exceeds the maximum 16777216",
    "version": r"unsupported version",
    "format": r"unknown sample format code",
    "channels": r"channel count",
    "fs": r"sample rate .* Hz is not a finite number > 0",
    "magic": r"bad magic",
    "hcrc": r"header CRC mismatch",
    "pcrc": r"payload CRC mismatch",
}
MUTATIONS = tuple(EXPECTED_DATAGRAM_REASON)
LONGEST_LIE = 4096  # a length field may claim up to this many bytes more than the frame has
MAX_FRAME = HEADER + 4 * 48 * 8  # the largest frame random_frame() makes


@pytest.fixture
def f64_overflow_allowed() -> Iterator[None]:
    """An f64le sample beyond float32's range decodes to ±inf, a signalling NaN to NaN (the
    pipeline then sees a non-finite sample); numpy warns about either cast, which this suite
    turns into an error. The wire tests below check everything else with those warnings
    silenced; the warnings themselves are test_f64_samples_decode_without_a_warning's."""
    with np.errstate(over="ignore", invalid="ignore"):
        yield


# A good frame's samples keep signed 64-bit indices (docs/feeding.md, framed format):
# with at most 48 samples a frame, any first index below this fits.
GOOD_INDEX_END = 2**63 - 48


def random_frame(rnd: random.Random, first_index: int) -> tuple[bytes, dict[str, Any]]:
    """A valid frame with random format, 1–4 channels, 1–48 samples of random bytes (so NaN
    and inf among the floats), any sample rate and time, built from the README's layout
    table with struct and zlib (not with wire.encode_frame); returns its bytes and what
    decoding it must give."""
    fmt = FORMATS[rnd.randrange(4)]
    c, n = rnd.randint(1, 4), rnd.randint(1, 48)
    payload = rnd.randbytes(c * n * SIZES[fmt])
    fs = FS_CHOICES[rnd.randrange(len(FS_CHOICES))]
    t_ns = rnd.randint(-(2**63), 2**63 - 1)
    head = HEAD.pack(wire.MAGIC, 1, FORMATS.index(fmt), c, fs, first_index, t_ns,
                     len(payload), zlib.crc32(payload))
    frame = head + struct.pack("<I", zlib.crc32(head)) + payload
    want = {"channels": c, "fs": fs, "first_index": first_index, "t_ns": t_ns, "fmt": fmt,
            "payload": payload}
    return frame, want


def _reheader(frame: bytes, **fields: Any) -> bytes:
    """``frame`` with header fields replaced and its header CRC recomputed (a consistent
    header that lies, rather than one damaged in transit)."""
    names = ("magic", "version", "code", "channels", "fs", "first", "t_ns", "length", "pcrc")
    values = dict(zip(names, HEAD.unpack_from(frame), strict=True))
    values.update(fields)
    head = HEAD.pack(*(values[k] for k in names))
    return head + struct.pack("<I", zlib.crc32(head)) + frame[HEADER:]


def mutate(frame: bytes, kind: str, rnd: random.Random) -> bytes:
    """``frame`` made invalid in one way (``kind`` one of MUTATIONS); never a valid frame.

    Guarantees: CRC-32 detects every error of up to 3 bits in a codeword of up to 91607 bits
    (Koopman 2002, "32-bit cyclic redundancy codes for Internet applications", Table 1:
    HD = 4 for the 802.3 polynomial) and every burst of up to 32 bits (Peterson & Brown
    1961); the other kinds break a header rule the receiver checks. Only ``insert`` relies
    on CRC-32's 2⁻³² miss rate, and the inputs are seeded, so a pass is repeatable."""
    b = bytearray(frame)
    size = len(b)
    (length,) = struct.unpack_from("<I", frame, 32)
    if kind == "bitflip":  # 1–3 distinct bits anywhere
        for bit in rnd.sample(range(size * 8), rnd.randint(1, 3)):
            b[bit // 8] ^= 1 << (bit % 8)
    elif kind == "burst":  # up to 4 consecutive bytes changed: a burst of at most 32 bits
        at = rnd.randrange(size)
        for i in range(min(rnd.randint(1, 4), size - at)):
            b[at + i] ^= rnd.randint(1 if i == 0 else 0, 255)  # the first one really changes
    elif kind == "truncate":
        b = b[: rnd.randrange(1, size)]
    elif kind == "insert":  # 1–16 bytes pushed in, the first unlike the byte it displaces
        at = rnd.randrange(1, size)
        extra = bytearray(rnd.randbytes(rnd.randint(1, 16)))
        extra[0] = (b[at] + rnd.randint(1, 255)) % 256
        b[at:at] = extra
    elif kind == "length_lie":  # consistent header, wrong length (shorter or longer)
        delta = rnd.randint(1, LONGEST_LIE)
        new = length - delta if rnd.random() < 0.5 and delta < length else length + delta
        return _reheader(frame, length=new)
    elif kind == "length_zero":
        return _reheader(frame, length=0)
    elif kind == "length_huge":  # a whole number of samples, but over the 16 MiB limit
        code, channels = frame[5], struct.unpack_from("<H", frame, 6)[0]
        step = channels * SIZES[FORMATS[code]]
        k = rnd.randint(wire.MAX_PAYLOAD_BYTES // step + 1, (2**32 - 1) // step)
        return _reheader(frame, length=k * step)
    elif kind == "version":
        return _reheader(frame, version=rnd.choice([0, *range(2, 256)]))
    elif kind == "format":
        return _reheader(frame, code=rnd.randint(4, 255))
    elif kind == "channels":
        return _reheader(frame, channels=rnd.choice([0, rnd.randint(4097, 65535)]))
    elif kind == "fs":
        bad = [math.nan, math.inf, -math.inf, 0.0, -0.0, -rnd.uniform(1e-300, 1e6)]
        return _reheader(frame, fs=rnd.choice(bad))
    elif kind == "magic":
        b[rnd.randrange(4)] ^= rnd.randint(1, 255)
    elif kind == "hcrc":
        b[40 + rnd.randrange(4)] ^= rnd.randint(1, 255)
    elif kind == "pcrc":
        (pcrc,) = struct.unpack_from("<I", frame, 36)
        return _reheader(frame, pcrc=pcrc ^ rnd.randint(1, 2**32 - 1))
    else:
        raise AssertionError(f"unknown mutation {kind!r}")
    return bytes(b)


def garbage(rnd: random.Random) -> bytes:
    """1–200 random bytes where no frame starts; sometimes with a stray magic inside (a
    header-shaped run whose CRC fails) to make the decoder resynchronise."""
    g = bytearray(rnd.randbytes(rnd.randint(1, 200)))
    if rnd.random() < 0.3:
        at = rnd.randint(0, len(g))
        g[at:at] = wire.MAGIC
    return bytes(g)


def build_stream(plan: list[str | None], rnd: random.Random
                 ) -> tuple[bytes, list[dict[str, Any]], int, int]:
    """Concatenate good frames (None), mutated frames (a MUTATIONS kind) and garbage
    ("garbage"); return the bytes, what each good frame must decode to in order, the number
    of runs of adjacent bad items (each must be rejected at least once) and the bad bytes."""
    parts, good, runs, bad_bytes, prev_bad = [], [], 0, 0, False
    for item in plan:
        if item == "garbage":
            piece = garbage(rnd)
        else:
            frame, want = random_frame(rnd, rnd.randrange(GOOD_INDEX_END))  # any index: gaps too
            piece = frame if item is None else mutate(frame, item, rnd)
            if item is None:
                good.append(want)
        bad = item is not None
        runs += bad and not prev_bad
        bad_bytes += len(piece) if bad else 0
        prev_bad = bad
        parts.append(piece)
    return b"".join(parts), good, runs, bad_bytes


def cut(stream: bytes, pieces: int, rnd: random.Random) -> list[bytes]:
    """``stream`` cut at ``pieces - 1`` random places (empty chunks included)."""
    edges = [0, *sorted(rnd.randint(0, len(stream)) for _ in range(pieces - 1)), len(stream)]
    return [stream[a:b] for a, b in zip(edges[:-1], edges[1:], strict=True)]


def same_frame(got: wire.Frame, want: dict[str, Any]) -> bool:
    """``got`` carries ``want``'s header values, and its data are the payload read as
    interleaved little-endian samples (docs/feeding.md layout), as float32 [channels, n]."""
    c = want["channels"]
    x = np.frombuffer(want["payload"], DTYPES[want["fmt"]]).reshape(-1, c).T.astype(np.float32)
    return (
        (got.channels, got.fs, got.first_index, got.t_ns, got.fmt)
        == (c, want["fs"], want["first_index"], want["t_ns"], want["fmt"])
        and got.data.dtype == np.float32
        and np.array_equal(got.data, x, equal_nan=True)
    )


def feed_checked(dec: wire.FrameDecoder, chunks: list[bytes]) -> list[wire.Frame]:
    """Feed ``chunks`` one by one; after each, the decoder's books must balance."""
    out: list[wire.Frame] = []
    fed = used = 0
    for chunk in chunks:
        before = dec.malformed
        new = dec.feed(chunk)  # must never raise
        out += new
        fed += len(chunk)
        used += sum(HEADER + f.n * f.channels * wire.SAMPLE_SIZES[f.fmt] for f in new)
        # one reason per rejection (the deque keeps the latest 16), each a readable one
        assert len(dec.reasons) == min(dec.malformed, 16)
        if dec.malformed > before:
            assert all(READABLE.fullmatch(r) for r in dec.reasons), list(dec.reasons)
        # every byte fed is in a decoded frame, skipped, or held for a frame not yet complete
        assert used + dec.skipped_bytes + dec.pending_bytes == fed
    assert dec.frames == len(out)
    return out


def check_stream(plan: list[str | None], seed: int, pieces: int, *, whole: bool = True) -> int:
    """Build the stream for ``plan``, feed it cut in ``pieces`` chunks (and, if ``whole``, in
    one go too), flush with zeros; check recovery, counters and chunking invariance.
    Returns the number of chunks fed."""
    rnd = random.Random(seed)
    stream, good, runs, bad_bytes = build_stream(plan, rnd)
    # a header that lies about its length (or a cut-off frame) holds the frames after it
    # until that many bytes have come (wire.py: "delayed, not lost"); zeros release them
    flush = bytes(MAX_FRAME + LONGEST_LIE + HEADER)
    chunks = [*cut(stream, pieces, rnd), flush]
    dec = wire.FrameDecoder()
    got = feed_checked(dec, chunks)
    assert len(got) == len(good), (plan, len(got), len(good), list(dec.reasons))
    assert all(same_frame(g, w) for g, w in zip(got, good, strict=True)), plan
    assert dec.pending_bytes == 0
    # every run of bad input is rejected at least once; a rejection uses up >= 1 bad byte
    # (the zeros of the flush may add one more run)
    assert runs <= dec.malformed <= bad_bytes + 1, (plan, dec.malformed, runs)
    if whole:  # the same bytes in one chunk: the same frames and counters (wire.py)
        one = wire.FrameDecoder()
        assert [f.first_index for f in one.feed(stream + flush)] == [
            f.first_index for f in got]
        assert (one.malformed, one.skipped_bytes, one.frames) == (
            dec.malformed, dec.skipped_bytes, dec.frames)
    return len(chunks)


_plan_item = st.one_of(st.none(), st.none(), st.sampled_from(MUTATIONS), st.just("garbage"))


@pytest.mark.usefixtures("f64_overflow_allowed")
# 2000 examples × 40–60 chunks ≈ 10⁵ chunks through FrameDecoder.feed
@settings(derandomize=True, max_examples=2000, deadline=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(plan=st.lists(_plan_item, min_size=1, max_size=14),
       seed=st.integers(0, 2**32 - 1), pieces=st.integers(40, 60))
def test_decoder_recovers_every_good_frame_in_order(
    plan: list[str | None], seed: int, pieces: int
) -> None:
    check_stream(plan, seed, pieces)


@pytest.mark.usefixtures("f64_overflow_allowed")
def test_decoder_seeded_loop_of_mutated_frames() -> None:
    # 500 streams × 200 frames = 10⁵ frames, half of them mutated (one kind each, every
    # kind > 3000 times), with garbage runs between some, each stream cut in 1–80 chunks
    rnd = random.Random(20240611)
    kinds = [None] * len(MUTATIONS) + list(MUTATIONS)
    frames = chunks = 0
    seen = dict.fromkeys(MUTATIONS, 0)
    for _ in range(500):
        plan: list[str | None] = []
        for _ in range(200):
            if rnd.random() < 0.05:
                plan.append("garbage")
            kind = rnd.choice(kinds)
            plan.append(kind)
            if kind is not None:
                seen[kind] += 1
        chunks += check_stream(plan, rnd.randrange(2**32), rnd.randint(1, 80), whole=False)
        frames += 200
    assert frames == 10**5 and min(seen.values()) > 3000, seen


@pytest.mark.usefixtures("f64_overflow_allowed")
def test_decode_datagram_seeded_loop() -> None:
    # 5·10⁴ datagrams: every other one a good frame, the rest one mutation kind each in turn
    rnd = random.Random(7)
    for i in range(5 * 10**4):
        frame, want = random_frame(rnd, rnd.randrange(GOOD_INDEX_END))
        if i % 2 == 0:
            assert same_frame(wire.decode_datagram(frame), want)
        else:
            kind = MUTATIONS[(i // 2) % len(MUTATIONS)]
            check_datagram_rejected(mutate(frame, kind, rnd), kind)


def check_datagram_rejected(datagram: bytes, kind: str | None) -> str:
    """decode_datagram must raise WireError (nothing else) with a readable reason, and the
    reason must name what ``kind`` broke."""
    with pytest.raises(wire.WireError) as err:
        wire.decode_datagram(datagram)
    assert type(err.value) is wire.WireError
    reason = str(err.value)
    assert READABLE_DATAGRAM.fullmatch(reason), reason
    if kind is not None:
        assert re.search(EXPECTED_DATAGRAM_REASON[kind], reason), (kind, reason)
    return reason


@pytest.mark.usefixtures("f64_overflow_allowed")
@settings(derandomize=True, max_examples=2000, deadline=None)
@given(st.one_of(
    st.binary(max_size=300),
    st.builds(lambda tail: wire.MAGIC + tail, st.binary(max_size=200)),
    st.tuples(st.sampled_from([None, *MUTATIONS]), st.integers(0, 2**32 - 1)),
))
def test_decode_datagram_raises_only_wire_error(case: bytes | tuple[str | None, int]) -> None:
    if isinstance(case, bytes):
        # random bytes (some starting with the magic): a frame only if both CRCs match,
        # a 2⁻⁶⁴ event; anything else is a WireError with a readable reason
        check_datagram_rejected(case, None)
        return
    kind, seed = case
    rnd = random.Random(seed)
    frame, want = random_frame(rnd, rnd.randrange(GOOD_INDEX_END))
    if kind is None:
        assert same_frame(wire.decode_datagram(frame), want)
    else:
        check_datagram_rejected(mutate(frame, kind, rnd), kind)


F64_SNAN = struct.unpack("<d", bytes.fromhex("010000000000f07f"))[0]  # IEEE 754: a signalling NaN


@pytest.mark.parametrize("value", [1e300, -1e300, F64_SNAN], ids=["big", "-big", "snan"])
def test_f64_samples_decode_without_a_warning(value: float) -> None:
    payload = struct.pack("<2d", value, 1.0)  # one channel, two samples (docs/feeding.md layout)
    head = HEAD.pack(wire.MAGIC, 1, 3, 1, 2560.0, 0, 0, len(payload), zlib.crc32(payload))
    frame = head + struct.pack("<I", zlib.crc32(head)) + payload
    got = wire.FrameDecoder().feed(frame)  # the suite runs with warnings as errors
    # IEEE 754 round-to-nearest: beyond the largest float32 (3.4028235e38) a value rounds to
    # ±inf; a NaN stays a NaN
    want = np.array([[np.float32(value) if math.isnan(value) else math.copysign(math.inf, value),
                      1.0]], dtype=np.float32)
    assert np.array_equal(got[0].data, want, equal_nan=True)
    assert np.array_equal(wire.decode_datagram(frame).data, want, equal_nan=True)


# --- configuration --------------------------------------------------------------------------

_S = {"id": "line-a", "kind": "tcp", "listen": "127.0.0.1:9101", "format": "framed",
      "sample_rate_hz": 2560.0, "channels": ["a-h", "a-v"], "queue_blocks": 256}
# Small valid documents that between them use every table and key of the settings reference
# (docs/configuration.md "Reference"); small, because a document that passes the per-key
# checks also runs every cross-check.
BASES: list[dict[str, Any]] = [
    {
        "service": {"listen": "127.0.0.1:8750", "trend_step_s": 10, "evidence_before_s": 3.0,
                    "evidence_after_s": 3.0, "max_db_mb": 100.0,
                    "cors_origins": ["http://127.0.0.1:9000"], "max_body_bytes": 65536,
                    "data_dir": "quaver-data"},
        "analysis": {"fmax_hz": 1000.0, "lines": 800, "window": "kaiser", "kaiser_beta": 8.6,
                     "overlap": 0.75, "averaging": "linear", "averages": 8,
                     "linear_end": "restart", "unit": "velocity", "output_unit": "mm/s",
                     "amplitude": "rms", "lowcut_hz": 2.0, "peaks": 8},
        "sources": [_S],
    },
    {
        "analysis": {"fmax_hz": 1000.0},
        "sources": [
            _S,
            {"id": "line-b", "kind": "udp", "listen": "127.0.0.1:9102", "format": "framed",
             "sample_rate_hz": 2560.0, "channels": ["b-h"]},
            {"id": "rec", "kind": "file", "path": "rec.csv", "format": "csv",
             "sample_rate_hz": 25600.0, "channels": ["c-h"], "follow": True,
             "replay_speed": 1.0, "poll_ms": 50.0, "start_at": "end"},
        ],
    },
    {
        "sources": [{"id": "plant", "kind": "simulated", "scenario": "demo",
                     "channels": ["p1-de-h"], "speed": 1.0, "seed": 1,
                     "fault_start_s": 30.0, "fault_ramp_s": 180.0, "queue_blocks": 16}],
    },
    {
        "analysis": {"fmax_hz": 1000.0},
        "sources": [_S],
        "channels": [
            {"id": "a-h", "input_unit": "g", "sensitivity": 1.0, "speed_rpm": 1480.0,
             "machine": "p1", "description": "pump 1 drive end", "clip_level": 30000.0,
             "analysis": {"window": "flattop", "lines": 400, "fmax_hz": 500.0,
                          "kaiser_beta": 6.0, "overlap": 0.5, "averaging": "exponential",
                          "averages": 4, "linear_end": "hold", "unit": "acceleration",
                          "output_unit": "g", "amplitude": "peak", "lowcut_hz": 1.0,
                          "peaks": 4}},
            {"id": "a-v", "input_unit": "m/s2", "sensitivity": 0.000122},
        ],
    },
    {
        "analysis": {"fmax_hz": 1000.0},
        "sources": [_S],
        "channels": [{"id": "a-h", "speed_rpm": 1480.0}],
        "bands": [
            {"channel": "*", "name": "overall", "lo_hz": 10.0, "hi_hz": 1000.0},
            {"channel": "a-h", "name": "1x", "lo_order": 0.8, "hi_order": 1.2},
            {"channel": "a-h", "name": "oct", "lo_hz": 100.0, "hi_hz": 800.0, "octave": 1},
        ],
        "tones": [{"channel": "a-h", "name": "1X", "order": 1.0},
                  {"channel": "*", "name": "mains", "hz": 50.0}],
    },
    {
        "analysis": {"fmax_hz": 1000.0},
        "sources": [_S],
        "channels": [{"id": "a-h", "speed_rpm": 1480.0}],
        "bands": [{"name": "overall", "lo_hz": 10.0, "hi_hz": 1000.0}],
        "tones": [{"channel": "a-h", "name": "1X", "order": 1.0}],
        "alarms": [
            {"channel": "a-h", "band": "overall", "alert": 2.8, "danger": 4.5,
             "hysteresis": 0.05, "on_delay_s": 1.0, "off_delay_s": 1.0, "latch": True},
            {"channel": "*", "overall": True, "baseline_learn_s": 60.0, "alert_factor": 2.0,
             "danger_factor": 4.0},
            {"channel": "a-h", "tone": "1X", "baseline_learn_s": 60.0, "alert_db": 6.0,
             "danger_db": 12.0},
        ],
        "tokens": [{"name": "ops", "role": "operator", "sha256": "ab" * 32},
                   {"name": "wall", "role": "viewer", "sha256": "0F" * 32}],
    },
]
ARRAYS = ("sources", "channels", "bands", "tones", "alarms", "tokens")
TABLES = ("service", "analysis")
MODEL_OF_SOURCE: dict[str, type[BaseModel]] = {
    "tcp": TcpSourceConfig, "udp": UdpSourceConfig, "file": FileSourceConfig,
    "simulated": SimulatedSourceConfig}
MODEL_OF: dict[str, type[BaseModel]] = {
    "service": ServiceSettings, "analysis": AnalysisSettings, "channels": ChannelConfig,
    "bands": BandConfig, "tones": ToneConfig, "alarms": AlarmConfig, "tokens": TokenConfig}
KNOWN_KEYS = frozenset({*TABLES, *ARRAYS} | {
    k for m in (*MODEL_OF.values(), *MODEL_OF_SOURCE.values(), AnalysisOverride)
    for k in m.model_fields})  # type: ignore[attr-defined]
# a problem line: key path (names, [index]), maybe the variable it came from, ": ", a reason
PROBLEM = re.compile(r"(?P<path>[\w-]+(?:\[\d+\]|\.[\w-]+)*)"
                     r"(?: \(from (?P<env>QUAVER_LISTEN|QUAVER_DATA_DIR)\))?: (?P<reason>\S.*)")
TOKEN = re.compile(r"\[(\d+)\]|\.?([\w-]+)")


def model_at(doc: dict[str, Any], path: tuple[Any, ...]) -> Any:
    """The pydantic model that validates the table at ``path`` in a base document."""
    if path[0] == "sources":
        return MODEL_OF_SOURCE[doc["sources"][path[1]]["kind"]]
    if path[0] == "channels" and len(path) == 3:
        return AnalysisOverride
    return MODEL_OF[path[0]]


def constraint_of(model: Any, key: str) -> tuple[str, dict[str, Any]]:
    """(kind, limits) of a key: kind in float, int, bool, str, literal, list, table; limits
    gt/ge/lt/le/min_length/max_length/pattern/choices as the model states them."""
    f = model.model_fields[key]
    ann, meta = f.annotation, list(f.metadata)
    while True:  # unwrap Optional[...] and Annotated[...]
        args = [a for a in get_args(ann) if a is not type(None)]
        if get_origin(ann) in (Union, types.UnionType) and len(args) == 1:
            ann = args[0]
        elif get_origin(ann) is Annotated:
            ann, meta = args[0], meta + list(ann.__metadata__)
        else:
            break
    limits: dict[str, Any] = {}
    for m in meta:
        for name in ("gt", "ge", "lt", "le", "min_length", "max_length", "pattern"):
            if getattr(m, name, None) is not None:
                limits[name] = getattr(m, name)
    if get_origin(ann) in (Union, types.UnionType) and any(
            get_origin(a) is list for a in get_args(ann)):
        return "list", limits  # e.g. an envelope band: 'auto' or [lo_hz, hi_hz]
    if get_origin(ann) is Literal:
        return "literal", {"choices": get_args(ann)}
    if get_origin(ann) is list:
        return "list", limits
    if isinstance(ann, type) and issubclass(ann, BaseModel):
        return "table", limits
    return {float: "float", int: "int", bool: "bool", str: "str"}[ann], limits


ODD_DT = [dt.datetime(1979, 5, 27, 7, 32), dt.date(2024, 2, 29), dt.time(23, 59, 59)]


def wrong_type(kind: str, rnd: random.Random) -> Any:
    """A value TOML can carry that no key of this kind accepts (pydantic's lax mode takes
    bools and numeric strings for numbers, and 0/1/"yes"/"off" for bools: avoided here; see
    test_wrong_toml_types_are_not_coerced)."""
    table = {"nested": {"x": [1, {"y": 2}]}}
    common = [[1, "x"], table, rnd.choice(ODD_DT)]
    if kind in ("float", "int"):
        pool = [*common, "abc", "", "1,5", math.nan, math.inf, -math.inf]
        if kind == "int":
            pool.append(rnd.choice([1.5, -0.25, 1e300]))
    elif kind in ("str", "literal"):
        pool = [*common, 5, -1.5, True, 10**30]
    elif kind == "bool":
        pool = [*common, "maybe", 2, 0.5, -1, [True]]
    elif kind == "list":
        pool = [table, 5, 2.5, True, "ab", rnd.choice(ODD_DT)]
    else:  # a table
        pool = [[1, 2], 5, "x", True, rnd.choice(ODD_DT)]
    return rnd.choice(pool)


BAD_IDS = ["", "-lead", ".dot", "a b", "a/b", "x" * 65, "ü", "a:b", "tab\t", "new\nline"]


def out_of_range(kind: str, limits: dict[str, Any], key: str, rnd: random.Random) -> Any:
    """A value of the right type that breaks one of the key's limits, or None if it has
    none that a value can break."""
    options: list[Any] = []

    def beyond(bound: float, sign: int) -> float:  # just past a bound, or well past it
        if kind == "int":
            return int(bound) + sign * rnd.choice([1, 1000])
        return rnd.choice([math.nextafter(bound, sign * math.inf), bound + sign * 1e6])

    if "gt" in limits:
        options += [limits["gt"], beyond(limits["gt"], -1)]
    if "ge" in limits:
        options.append(beyond(limits["ge"], -1))
    if "lt" in limits:
        options += [limits["lt"], beyond(limits["lt"], +1)]
    if "le" in limits:
        options.append(beyond(limits["le"], +1))
    if kind == "str":
        if "min_length" in limits:
            options.append("")
        if "max_length" in limits:
            options.append("m" * (limits["max_length"] + 1))
        if "pattern" in limits:
            options += BAD_IDS if "A-Za-z" in limits["pattern"] else ["xyz", "a" * 63, "g" * 64]
        if key == "listen":
            options += ["nohost", "127.0.0.1:99999", "::1:80", ":80", "127.0.0.1:", "[::1]x:1"]
    if kind == "literal":
        options += ["bogus", "", str(limits["choices"][0]).upper() + "x"]
    if kind == "list":
        options += [[1], [[]], ["ok", {"x": 1}], *([[]] if "min_length" in limits else [])]
        if key == "channels":  # a list of ids
            options += [["-bad"], [rnd.choice(BAD_IDS)]]
    if not options:
        return None
    return rnd.choice(options)


def toml_text(doc: dict[str, Any]) -> str:
    """TOML for a document (tomli-w: top-level values, then tables, then arrays of tables)."""
    return tomli_w.dumps(doc)


def locations(doc: dict[str, Any]) -> list[tuple[Any, ...]]:
    """Paths of the tables in a base document: ("service",), ("sources", 0), ("channels",
    0, "analysis"), ..."""
    out: list[tuple[Any, ...]] = [(t,) for t in TABLES if t in doc]
    for a in ARRAYS:
        for i, entry in enumerate(doc.get(a, [])):
            out.append((a, i))
            if a == "channels" and "analysis" in entry:
                out.append((a, i, "analysis"))
    return out


def table_at(doc: Any, path: tuple[Any, ...]) -> Any:
    for p in path:
        doc = doc[p]
    return doc


def path_text(path: tuple[Any, ...]) -> str:
    """("sources", 0, "listen") → "sources[0].listen" (README: key.path[index].field)."""
    out = ""
    for p in path:
        out += f"[{p}]" if isinstance(p, int) else (f".{p}" if out else p)
    return out


def single_fault(base: dict[str, Any], rnd: random.Random
                 ) -> tuple[dict[str, Any], str, str]:
    """One fault in a copy of ``base``: (document, key path the error must name, reason
    pattern). Faults: a wrong type, a value out of range or outside a closed set, an unknown
    key, a required key missing."""
    doc = copy.deepcopy(base)
    loc = rnd.choice(locations(doc))
    table = table_at(doc, loc)
    model = model_at(base, loc)
    fault = rnd.choice(["type", "range", "unknown", "missing"])
    if fault == "missing":
        required = [k for k, f in model.model_fields.items() if f.is_required() and k in table]
        if required:
            key = rnd.choice(required)
            del table[key]
            return doc, path_text((*loc, key)), r"required key is missing( \(one of .*\))?"
        fault = "unknown"
    if fault == "unknown":
        key = rnd.choice(["zzz", "fmax", "window_", "listen2", "Lines", "sample-rate", "x_1"])
        if key in model.model_fields:
            key += "_"
        table[key] = rnd.choice([1, "x", [1], {"a": 1}])
        return doc, path_text((*loc, key)), r"unknown key(; did you mean '\w+'\?)?"
    key = rnd.choice(list(model.model_fields))
    kind, limits = constraint_of(model, key)
    value = out_of_range(kind, limits, key, rnd) if fault == "range" else None
    if value is None:
        value = wrong_type(kind, rnd)
    table[key] = value
    return doc, path_text((*loc, key)), r"\S.*"


def check_problems(err: ConfigError, doc: dict[str, Any], source: str = "config") -> None:
    """The message is a head line and one ``key.path: reason`` line per problem, and every
    path leads into ``doc`` through keys and indices that exist, or names keys the schema
    knows (a required key that is missing, a default table)."""
    assert err.problems and all(isinstance(p, str) and p for p in err.problems)
    n = len(err.problems)
    assert str(err) == (f"{source}: {n} problem{'s' if n != 1 else ''}"
                        + "".join(f"\n  {p}" for p in err.problems))
    for p in err.problems:
        m = PROBLEM.fullmatch(p)
        assert m, f"not a 'key.path: reason' line: {p!r}"
        node: Any = doc
        for idx, name in TOKEN.findall(m["path"]):
            if idx:
                assert isinstance(node, list) and int(idx) < len(node), (p, doc)
                node = node[int(idx)]
            elif isinstance(node, dict) and name in node:
                node = node[name]
            else:  # past what the document has: only names the schema knows
                assert name in KNOWN_KEYS, (p, doc)
                node = None


def outcome(doc: dict[str, Any], env: dict[str, str] | None = None) -> list[str] | None:
    """parse_config's problems for ``doc``, or None if it is accepted; any other exception
    escapes and fails the test."""
    try:
        parse_config(doc, env=env or {})
    except ConfigError as e:
        check_problems(e, doc)
        return e.problems
    return None


def test_base_documents_are_valid() -> None:
    # the fuzzers start from these: each must be accepted as it stands
    for base in BASES:
        assert outcome(base) is None
        assert tomllib.loads(toml_text(base)) == base  # the TOML writer round-trips (tomllib)


# 1500 documents, one fault each
@settings(derandomize=True, max_examples=1500, deadline=None)
@given(base=st.integers(0, len(BASES) - 1), seed=st.integers(0, 2**32 - 1))
def test_single_fault_names_its_key_path(base: int, seed: int) -> None:
    doc, path, reason = single_fault(BASES[base], random.Random(seed))
    problems = outcome(doc)
    assert problems is not None, (path, doc)
    # a fault caught by the per-key checks is the only problem reported: the cross-checks
    # of the entries that did validate run too, and must not echo the failed entry
    assert len(problems) == 1, problems
    # (a list's bad item is named by its index: sources[0].channels[1])
    assert re.fullmatch(rf"{re.escape(path)}(\[\d+\])?: {reason}", problems[0]), (path, problems)


LEAVES: list[Any] = [
    0, -1, 1, 7, 2**63 - 1, -(2**63), 0.0, -0.0, 0.5, 1.5, 1e308, 5e-324, -2.5e3, math.nan,
    math.inf, -math.inf, True, False, "", "x", "*", "hann", "tcp", "framed", "demo", "g",
    "127.0.0.1:8750", "a-h", "line-a", "ü" * 3, "x" * 300, "a\nb", *ODD_DT, [], {},
]
ODD_KEYS = ["zzz", "fmax", "Window", "listen_", "sample-rate", "x1", "1", "-", "_", "ä",
            "sources", "kind", "id", "channels", "analysis", "alarms"]


def random_value(rnd: random.Random, depth: int = 0) -> Any:
    """Any value a TOML document can hold (i64 integers, floats with nan/inf, strings,
    booleans, dates and times, arrays, tables), nested at random."""
    r = rnd.random()
    if depth < 4 and r < 0.12:
        return [random_value(rnd, depth + 1) for _ in range(rnd.randint(0, 3))]
    if depth < 4 and r < 0.2:
        return {rnd.choice(ODD_KEYS): random_value(rnd, depth + 1)
                for _ in range(rnd.randint(0, 3))}
    leaf = rnd.choice(LEAVES)
    return type(leaf)() if isinstance(leaf, list | dict) else leaf  # a new [] or {} each time


def containers(node: Any, depth: int = 0) -> list[Any]:
    """Every dict and list inside ``node`` (itself included), to a depth of 6."""
    out = [node]
    if depth < 6:
        children = node.values() if isinstance(node, dict) else node
        for c in children:
            if isinstance(c, dict | list):
                out += containers(c, depth + 1)
    return out


def scramble(doc: dict[str, Any], rnd: random.Random, steps: int) -> dict[str, Any]:
    """``steps`` random edits of ``doc`` in place: known or unknown keys set to any value,
    keys and entries deleted, tables replaced by other shapes, values wrapped or nested
    deeply, entries duplicated or moved to another array."""
    for _ in range(steps):
        node = rnd.choice(containers(doc))
        op = rnd.random()
        if isinstance(node, list):
            if node and op < 0.3:
                del node[rnd.randrange(len(node))]
            elif node and op < 0.6:
                node.append(copy.deepcopy(rnd.choice(node)))  # e.g. a duplicate id
            else:
                node.insert(rnd.randint(0, len(node)), random_value(rnd))
            continue
        if node and op < 0.2:
            del node[rnd.choice(list(node))]
        elif op < 0.55:  # a key the schema knows, any value
            node[rnd.choice(sorted(KNOWN_KEYS))] = random_value(rnd)
        elif op < 0.7:
            node[rnd.choice(ODD_KEYS)] = random_value(rnd)
        elif node and op < 0.85:  # wrap a value in an array or a table
            k = rnd.choice(list(node))
            node[k] = [node[k]] if rnd.random() < 0.5 else {"v": node[k]}
        elif op < 0.92:  # a deep nest
            v: Any = random_value(rnd)
            for _ in range(rnd.randint(1, 40)):
                v = [v] if rnd.random() < 0.5 else {"n": v}
            node[rnd.choice(sorted(KNOWN_KEYS))] = v
        else:  # move an entry to another array of tables
            src, dst = rnd.sample(ARRAYS, 2)
            if isinstance(doc.get(src), list) and doc[src] and isinstance(doc.get(dst), list):
                doc[dst].append(doc[src].pop())
    return doc


ENVS: list[dict[str, str]] = [
    {}, {}, {}, {"QUAVER_LISTEN": "127.0.0.1:1"}, {"QUAVER_LISTEN": "nohost"},
    {"QUAVER_LISTEN": "[::1]:99999"}, {"QUAVER_DATA_DIR": "/tmp/q"},
    {"QUAVER_LISTEN": "0.0.0.0:8750", "QUAVER_DATA_DIR": "d"},
]


def check_env_tags(problems: list[str], env: dict[str, str]) -> None:
    """A problem with a value from the environment names the variable, and only then."""
    for p in problems:
        m = PROBLEM.fullmatch(p)
        assert m
        if m["env"]:
            assert m["env"] in env and m["path"] == {
                "QUAVER_LISTEN": "service.listen", "QUAVER_DATA_DIR": "service.data_dir"
            }[m["env"]], p


def test_scrambled_documents_only_raise_config_error() -> None:
    # 2·10⁴ documents: a valid base scrambled by 1–6 edits, with or without QUAVER_*
    # variables, through parse_config: a Config or a ConfigError of key.path lines
    # (unknown keys dominate the run time: each gets a difflib "did you mean", ~1 ms)
    rnd = random.Random(4242)
    accepted = rejected = 0
    for _ in range(2 * 10**4):
        doc = scramble(copy.deepcopy(rnd.choice(BASES)), rnd, rnd.randint(1, 6))
        env = rnd.choice(ENVS)
        problems = outcome(doc, env)
        if problems is None:
            accepted += 1
        else:
            rejected += 1
            check_env_tags(problems, env)
    assert accepted > 300 and rejected > 10**4, (accepted, rejected)


def test_random_single_tables_only_raise_config_error() -> None:
    # 8·10⁴ documents of one table (or array of tables) holding 1–8 keys the schema knows
    # for it with random values, next to a valid source or none
    rnd = random.Random(99)
    names = [*TABLES, *ARRAYS]
    for _ in range(8 * 10**4):
        name = rnd.choice(names)
        model = (MODEL_OF_SOURCE[rnd.choice(list(MODEL_OF_SOURCE))] if name == "sources"
                 else MODEL_OF[name])
        keys = list(model.model_fields)
        table = {rnd.choice(keys): random_value(rnd) for _ in range(rnd.randint(1, 8))}
        doc: dict[str, Any] = {name: table if name in TABLES else [table]}
        if name != "sources" and rnd.random() < 0.5:
            doc["sources"] = [dict(_S)]
        outcome(doc)


def break_syntax(text: str, rnd: random.Random) -> str:
    """Maybe a TOML syntax error: the text cut short, a stray character, a line doubled (a
    key defined twice), '=' turned into ':', or a table header left open."""
    lines = text.splitlines(keepends=True)
    op = rnd.randrange(6)
    if op == 0:
        return text[: rnd.randint(0, len(text))]
    if op == 1:
        at = rnd.randint(0, len(text))
        return text[:at] + rnd.choice('[]{}="\'#\n,.\\') + text[at:]
    if op == 2 and lines:
        i = rnd.randrange(len(lines))
        return "".join([*lines[: i + 1], lines[i], *lines[i + 1 :]])
    if op == 3:
        return text.replace(" = ", ": ", 1)
    if op == 4:
        return text.replace("]\n", "\n", 1)
    return text


# 300 TOML files (one in three with a syntax error, some not UTF-8) through load_config
@settings(derandomize=True, max_examples=300, deadline=None)
@given(base=st.integers(0, len(BASES) - 1), seed=st.integers(0, 2**32 - 1),
       edits=st.integers(0, 3), broken=st.integers(0, 2))
def test_load_config_on_toml_text(
    tmp_path_factory: pytest.TempPathFactory, base: int, seed: int, edits: int, broken: int
) -> None:
    rnd = random.Random(seed)
    doc = scramble(copy.deepcopy(BASES[base]), rnd, edits)
    text = toml_text(doc)
    raw = text.encode("utf-8")
    if broken == 0:
        text = break_syntax(text, rnd)
        raw = text.encode("utf-8")
    elif broken == 1 and rnd.random() < 0.2:  # bytes that are not UTF-8
        at = rnd.randint(0, len(raw))
        raw = raw[:at] + rnd.choice([b"\xff", b"\xc3(", b"\xed\xa0\x80"]) + raw[at:]
    path = tmp_path_factory.mktemp("cfg") / "quaver.toml"
    path.write_bytes(raw)
    # the reference reading: tomllib (the Python standard library's TOML 1.0.0 parser)
    try:
        data: Any = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError:
        data = "not utf-8"
    except tomllib.TOMLDecodeError as e:
        data = e
    try:
        load_config(path, env={})
        got = None
    except ConfigError as e:
        assert e.source == str(path)
        got = e
    if data == "not utf-8":
        assert got is not None and len(got.problems) == 1
        assert got.problems[0].startswith("cannot read: "), got.problems
    elif isinstance(data, tomllib.TOMLDecodeError):
        # one problem carrying tomllib's message and its "(at line L, column C)"
        assert got is not None and got.problems == [f"TOML syntax error: {data}"]
        assert re.search(r"\(at line \d+, column \d+\)|\(at end of document\)", str(data))
    else:  # valid TOML: exactly what parse_config says of the same data
        try:
            parse_config(data, base_dir=path.resolve().parent, source=str(path), env={})
            want = None
        except ConfigError as e:
            check_problems(e, data, source=str(path))
            want = e.problems
        assert (None if got is None else got.problems) == want


_TCP_TOML = ('[analysis]\nfmax_hz = 1000\n\n[[sources]]\nid = "s"\nkind = "tcp"\n'
             'listen = "127.0.0.1:9101"\nformat = "f32le"\nsample_rate_hz = 2560\n'
             'channels = ["a"]\n')
COERCED = {
    # TOML has types; a bool or a string where a number belongs (or the reverse) is a typo
    # that should be named, not read as 1.0, True or a number
    "channels[0].sensitivity": '\n[[channels]]\nid = "a"\nsensitivity = true\n',
    "channels[0].speed_rpm": '\n[[channels]]\nid = "a"\nspeed_rpm = "1480"\n',
    "alarms[0].latch": '\n[[alarms]]\noverall = true\nalert = 1.0\ndanger = 2.0\nlatch = 1\n',
    "alarms[0].overall": '\n[[alarms]]\noverall = "true"\nalert = 1.0\ndanger = 2.0\n',
    "sources[0].queue_blocks": 'queue_blocks = "16"\n',
}


@pytest.mark.parametrize("key", sorted(COERCED))
def test_wrong_toml_types_are_not_coerced(tmp_path: Path, key: str) -> None:
    path = tmp_path / "quaver.toml"
    path.write_text(_TCP_TOML + COERCED[key], encoding="utf-8")
    assert tomllib.loads(path.read_text(encoding="utf-8"))  # valid TOML (tomllib)
    with pytest.raises(ConfigError) as err:
        load_config(path, env={})
    assert any(p.startswith(f"{key}: ") for p in err.value.problems), err.value.problems

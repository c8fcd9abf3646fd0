"""Byte formats on the ingest sockets: raw interleaved samples and quaver's framed format.

Pure bytes ↔ numpy; knows nothing about sockets, files, asyncio or the config file.

Raw formats
-----------
``s16le``, ``s32le``, ``f32le``, ``f64le``: headerless little-endian samples, interleaved by
channel (c0[k], c1[k], …, c0[k+1], …). Decoding keeps the *values* (an s16le sample 1000
decodes as 1000.0; nothing is scaled to full scale), as float32 ``[C, n]``. s32le values
beyond ±2²⁴ lose their lowest bits in float32.

Framed format (version 1)
-------------------------
Each frame is a fixed 44-byte little-endian header followed by ``payload_length`` bytes
of interleaved samples in the header's sample format.

======  =====  ======  ====================================================================
offset  size   type    field
======  =====  ======  ====================================================================
0       4      bytes   magic ``b"QVRF"`` (0x51 0x56 0x52 0x46)
4       1      u8      version, 1
5       1      u8      sample format: 0 = s16le, 1 = s32le, 2 = f32le, 3 = f64le
6       2      u16     channel count C, 1…4096
8       8      f64     sample rate fs in Hz (finite, > 0)
16      8      u64     index of the payload's first sample since the stream began; a
                       receiver takes indices as signed 64-bit: first index + sample
                       count must not exceed 2⁶³−1, or the frame is malformed
24      8      i64     wall time of the first sample, ns since the Unix epoch; 0 = unknown
                       (the receiver uses arrival time)
32      4      u32     payload length in bytes: a non-zero multiple of C × sample size,
                       at most 16 MiB
36      4      u32     CRC-32 of the payload (zlib/IEEE 802.3 polynomial)
40      4      u32     CRC-32 of header bytes 0…39
======  =====  ======  ====================================================================

A frame whose first sample index is not the previous frame's first index plus its sample
count marks a gap. :class:`FrameDecoder` rejects a bad header or payload with a reason,
counts it, and resynchronises by scanning for the next magic; it never raises on bad input
and, because both header and payload carry a CRC, a good frame that follows garbage or a
cut-off frame is still found. A receiver may set a lower payload limit than 16 MiB (the
sources' ``max_frame_bytes``); a header declaring more is malformed at once, so a bad
length never makes the receiver wait for data that will not come.

Mistaken formats
----------------
:func:`framed_header_at` tells whether bytes hold a framed header (magic *and* a matching
header CRC: 2⁻³² odds for raw data that happens to start with the magic), so a raw source
can refuse framed data. :func:`implausible_count` counts float samples beyond ±1e15 raw
units (infinities included; NaN is not counted: a data acquisition that marks a dropout
with NaN is a sensor fault, reported per channel downstream). No sensor chain gives such
values, while other bytes read as f32/f64 (integers, headers, text) give them in large
shares; raw sources reject a block in which they exceed ``IMPLAUSIBLE_SHARE``.
"""

from __future__ import annotations

import math
import struct
import zlib
from collections import deque
from dataclasses import dataclass
from typing import Literal, get_args

import numpy as np

__all__ = [
    "FORMAT_CODES",
    "HEADER_SIZE",
    "MAGIC",
    "MAX_CHANNELS",
    "MAX_PAYLOAD_BYTES",
    "FILE_FORMATS",
    "RAW_DTYPES",
    "RAW_FORMATS",
    "STREAM_FORMATS",
    "SAMPLE_SIZES",
    "VERSION",
    "Frame",
    "FrameDecoder",
    "IMPLAUSIBLE_ABS",
    "IMPLAUSIBLE_SHARE",
    "INDEX_MAX",
    "FileFormat",
    "RawFormat",
    "StreamFormat",
    "WireError",
    "check_raw_format",
    "decode_datagram",
    "decode_raw",
    "default_max_frame_bytes",
    "encode_frame",
    "encode_raw",
    "framed_header_at",
    "implausible_count",
    "restamp_header",
]

# The one definition of the sample formats; config, recording, sources and cli import them.
RawFormat = Literal["s16le", "s32le", "f32le", "f64le"]  # in code order (FORMAT_CODES)
StreamFormat = Literal[RawFormat, "framed"]  # TCP and UDP sources, ``quaver feed``
FileFormat = Literal[RawFormat, "csv", "wav"]  # file sources, recordings
RAW_FORMATS: tuple[str, ...] = get_args(RawFormat)
STREAM_FORMATS: tuple[str, ...] = get_args(StreamFormat)
FILE_FORMATS: tuple[str, ...] = get_args(FileFormat)
RAW_DTYPES: dict[str, np.dtype] = {
    f: np.dtype(d) for f, d in zip(RAW_FORMATS, ("<i2", "<i4", "<f4", "<f8"), strict=True)
}
_DTYPES = RAW_DTYPES
SAMPLE_SIZES: dict[str, int] = {f: d.itemsize for f, d in RAW_DTYPES.items()}
FORMAT_CODES: dict[str, int] = {f: code for code, f in enumerate(RAW_FORMATS)}
_CODE_FORMATS: dict[int, str] = {v: k for k, v in FORMAT_CODES.items()}

MAGIC = b"QVRF"
VERSION = 1
MAX_PAYLOAD_BYTES = 16 * 1024 * 1024
MAX_CHANNELS = 4096
INDEX_MAX = 2**63 - 1  # stream indices are signed 64-bit downstream (dsp.types.INDEX_MAX)
IMPLAUSIBLE_ABS = 1e15  # raw units; far beyond any ADC count or physical value (our choice)
IMPLAUSIBLE_SHARE = 0.01  # a raw block with more such values than this share is rejected
_HEAD = struct.Struct("<4sBBHdQqII")  # everything the header CRC covers
_AT_INDEX = struct.calcsize("<4sBBHd")  # 16: first-sample index (u64), then its time (i64)
_INDEX_TIME = struct.Struct("<Qq")
HEADER_SIZE = _HEAD.size + 4  # 44, as documented above; a change here is a new version


class WireError(ValueError):
    """Bytes that are not a valid frame; the message says why."""


def check_raw_format(fmt: object) -> RawFormat:
    """Return ``fmt`` if it is a raw sample format, else raise ValueError listing them."""
    if not isinstance(fmt, str) or fmt not in RAW_FORMATS:
        listed = ", ".join(repr(f) for f in RAW_FORMATS)
        raise ValueError(f"format={fmt!r} is not one of {listed}")
    return fmt  # type: ignore[return-value]


def decode_raw(buf: bytes | memoryview, fmt: str, channels: int) -> tuple[np.ndarray, bytes]:
    """Decode interleaved raw samples.

    Returns ``(data, leftover)``: ``data`` is float32 ``[channels, n]`` holding the sample
    values unscaled (raw units), n = len(buf) // (channels × sample size); ``leftover`` is
    the trailing bytes of an incomplete sample frame, to be prepended to the next call.
    f64 samples beyond ±3.4e38 decode as ±inf (non-finite: a sensor fault downstream).
    """
    check_raw_format(fmt)
    if channels < 1:
        raise ValueError(f"channels={channels!r} must be >= 1")
    frame_bytes = channels * SAMPLE_SIZES[fmt]
    n = len(buf) // frame_bytes
    used = n * frame_bytes
    flat = np.frombuffer(buf, dtype=_DTYPES[fmt], count=n * channels)
    # f64 values beyond float32's range become ±inf and signalling NaNs quiet NaNs; the
    # pipeline then flags the channel (sensor fault). Bad input is never an exception here.
    with np.errstate(over="ignore", invalid="ignore"):
        data = flat.reshape(n, channels).T.astype(np.float32)  # astype copies: no view on buf
    return data, bytes(buf[used:])


def encode_raw(data: np.ndarray, fmt: str) -> bytes:
    """Interleave float ``[C, n]`` sample values (raw units) into little-endian bytes.

    Integer formats round to the nearest integer; a non-finite value or one outside the
    format's range raises ValueError (nothing is clipped silently).
    """
    check_raw_format(fmt)
    arr = np.asarray(data)
    if arr.ndim != 2 or arr.shape[0] < 1:
        raise ValueError(f"data must be (channels, samples) with channels >= 1; got {arr.shape}")
    dtype = _DTYPES[fmt]
    if dtype.kind == "i":
        rounded = np.rint(arr.astype(np.float64))
        info = np.iinfo(dtype)
        if (
            not np.all(np.isfinite(rounded))
            or rounded.min(initial=0) < info.min
            or (rounded.max(initial=0) > info.max)
        ):
            raise ValueError(f"values do not fit {fmt} ([{info.min}, {info.max}], finite)")
        arr = rounded
    return np.ascontiguousarray(arr.T, dtype=dtype).tobytes()


@dataclass(frozen=True, slots=True)
class Frame:
    """One decoded frame: ``data`` float32 ``[channels, n]`` in raw units, ``fs`` in Hz,
    ``first_index`` in samples since the stream began, ``t_ns`` the first sample's wall
    time in ns since the Unix epoch (0 = unknown), ``fmt`` the payload's sample format."""

    channels: int
    fs: float
    first_index: int
    t_ns: int
    fmt: str
    data: np.ndarray

    @property
    def n(self) -> int:
        return int(self.data.shape[1])


def encode_frame(data: np.ndarray, fmt: str, fs: float, first_index: int, t_ns: int = 0) -> bytes:
    """One framed-format frame holding ``data`` (float ``[C, n]``, raw units, n >= 1).

    ``fs`` in Hz, ``first_index`` in samples (0 … 2⁶³−1−n), ``t_ns`` in ns since the Unix
    epoch or 0 for unknown. Raises ValueError for inputs the format cannot carry.
    """
    payload = encode_raw(data, fmt)
    channels, n = np.asarray(data).shape
    if n < 1:
        raise ValueError("a frame needs at least one sample")
    if channels > MAX_CHANNELS:
        raise ValueError(f"channels={channels} exceeds {MAX_CHANNELS}")
    if len(payload) > MAX_PAYLOAD_BYTES:
        raise ValueError(f"payload of {len(payload)} bytes exceeds {MAX_PAYLOAD_BYTES}")
    if not (math.isfinite(fs) and fs > 0):
        raise ValueError(f"fs={fs!r} must be a finite number > 0 (Hz)")
    if not 0 <= first_index <= INDEX_MAX - n:
        raise ValueError(
            f"first_index={first_index!r} must be in [0, 2**63 - 1 - n] (n = {n} samples)"
        )
    head = _HEAD.pack(
        MAGIC,
        VERSION,
        FORMAT_CODES[fmt],
        channels,
        float(fs),
        int(first_index),
        int(t_ns),
        len(payload),
        zlib.crc32(payload),
    )
    return head + struct.pack("<I", zlib.crc32(head)) + payload


@dataclass(frozen=True, slots=True)
class _Header:
    fmt: str
    channels: int
    fs: float
    first_index: int
    t_ns: int
    payload_len: int
    payload_crc: int



def restamp_header(head: bytearray, first_index: int, t_ns: int) -> None:
    """Rewrite, in place, the first-sample index and time (ns) of a framed header (its first
    HEADER_SIZE bytes) and its header CRC; the payload and its CRC stay valid, so a sender
    can encode a block once and send it again at other indices."""
    _INDEX_TIME.pack_into(head, _AT_INDEX, int(first_index), int(t_ns))
    struct.pack_into("<I", head, _HEAD.size, zlib.crc32(head[: _HEAD.size]))

def _parse_header(head: bytes, max_payload_bytes: int) -> _Header | str:
    """The header at the start of ``head`` (>= HEADER_SIZE bytes), or the reason it is bad."""
    magic, version, code, channels, fs, first, t_ns, length, pcrc = _HEAD.unpack_from(head)
    (hcrc,) = struct.unpack_from("<I", head, _HEAD.size)
    if magic != MAGIC:
        return "bad magic"
    if zlib.crc32(head[: _HEAD.size]) != hcrc:
        return "header CRC mismatch"
    if version != VERSION:
        return f"unsupported version {version} (this receiver reads version {VERSION})"
    if code not in _CODE_FORMATS:
        return f"unknown sample format code {code} (allowed 0-3)"
    if not 1 <= channels <= MAX_CHANNELS:
        return f"channel count {channels} outside 1-{MAX_CHANNELS}"
    if not (math.isfinite(fs) and fs > 0):
        return f"sample rate {fs!r} Hz is not a finite number > 0"
    fmt = _CODE_FORMATS[code]
    frame_bytes = channels * SAMPLE_SIZES[fmt]
    if length == 0 or length % frame_bytes:
        return f"payload length {length} is not a non-zero multiple of {frame_bytes} bytes"
    if length > max_payload_bytes:
        return f"payload length {length} exceeds the maximum {max_payload_bytes}"
    n = length // frame_bytes
    if first + n > INDEX_MAX:
        return (
            f"first sample index {first} with {n} samples runs past 2**63-1 "
            "(indices are signed 64-bit)"
        )
    return _Header(fmt, channels, fs, first, t_ns, length, pcrc)


MIN_FRAME_LIMIT = 64 * 1024  # floor of the default payload limit, bytes (our choice)


def default_max_frame_bytes(channels: int, fs: float) -> int:
    """The default payload limit of a framed source: about 1 s of its data in the widest
    sample format (8 bytes), ``channels`` × ``fs`` (Hz) × 8, at least MIN_FRAME_LIMIT and
    at most MAX_PAYLOAD_BYTES."""
    return max(MIN_FRAME_LIMIT, min(MAX_PAYLOAD_BYTES, math.ceil(channels * fs * 8)))


def framed_header_at(buf: bytes | bytearray, pos: int = 0) -> bool:
    """True if ``buf[pos:]`` starts with a framed-format header: the magic and a header CRC
    that matches (the rest of the header is not judged). Needs HEADER_SIZE bytes from pos."""
    if len(buf) - pos < HEADER_SIZE or buf[pos : pos + 4] != MAGIC:
        return False
    (hcrc,) = struct.unpack_from("<I", buf, pos + _HEAD.size)
    result: bool = zlib.crc32(bytes(buf[pos : pos + _HEAD.size])) == hcrc
    return result


def implausible_count(data: np.ndarray) -> int:
    """Samples of ``data`` beyond ±IMPLAUSIBLE_ABS raw units, infinities included (NaN is
    not counted: see the module docstring)."""
    with np.errstate(invalid="ignore"):
        return int(np.count_nonzero(np.abs(data) > IMPLAUSIBLE_ABS))


def _frame(h: _Header, payload: bytes | memoryview) -> Frame:
    data, _ = decode_raw(payload, h.fmt, h.channels)
    return Frame(h.channels, h.fs, h.first_index, h.t_ns, h.fmt, data)


def decode_datagram(datagram: bytes, max_payload_bytes: int = MAX_PAYLOAD_BYTES) -> Frame:
    """Decode a datagram that must hold exactly one frame; raise WireError(reason) if not."""
    if len(datagram) < HEADER_SIZE:
        raise WireError(f"datagram of {len(datagram)} bytes is shorter than a header")
    h = _parse_header(datagram, max_payload_bytes)
    if isinstance(h, str):
        raise WireError(h)
    if len(datagram) != HEADER_SIZE + h.payload_len:
        raise WireError(
            f"datagram of {len(datagram)} bytes does not hold one frame of "
            f"{HEADER_SIZE + h.payload_len} bytes"
        )
    payload = datagram[HEADER_SIZE:]
    if zlib.crc32(payload) != h.payload_crc:
        raise WireError("payload CRC mismatch")
    return _frame(h, payload)


class FrameDecoder:
    """Incremental decoder for a framed byte stream (e.g. one TCP connection).

    ``feed(chunk)`` returns the frames completed by ``chunk``; bytes of an unfinished frame
    are held. Counters (monotonic): ``frames`` decoded, ``malformed`` rejections, and
    ``skipped_bytes`` discarded while resynchronising. A rejection is counted once per
    rejected header or payload, plus once per run of bytes found where no frame starts, so
    one corrupted frame between good ones counts 1. ``reasons`` holds the latest reasons.
    A frame cut off inside its payload is only recognised once as many bytes as its header
    claimed have arrived (then its payload CRC fails and the scan resumes inside it), so
    the frame after it is delayed, not lost.
    The same bytes cut into any chunks give the same frames and counters.
    """

    def __init__(self, max_payload_bytes: int = MAX_PAYLOAD_BYTES) -> None:
        self.max_payload_bytes = max_payload_bytes
        self.frames = 0
        self.malformed = 0
        self.skipped_bytes = 0
        self.reasons: deque[str] = deque(maxlen=16)
        self._buf = bytearray()
        self._skipping = False  # inside a run of discarded bytes already counted

    @property
    def pending_bytes(self) -> int:
        """Bytes held for a frame not yet complete (a frame cut off if the stream ends now)."""
        return len(self._buf)

    @property
    def last_reason(self) -> str:
        return self.reasons[-1] if self.reasons else ""

    def _reject(self, reason: str) -> None:
        self.malformed += 1
        self.reasons.append(reason)
        self._skipping = True

    def _skip(self, n: int) -> None:
        if n <= 0:
            return
        self.skipped_bytes += n
        if not self._skipping:
            self._reject(f"{n} bytes where no frame starts")

    def feed(self, chunk: bytes) -> list[Frame]:
        """Append ``chunk`` and return every frame now complete, in stream order."""
        buf = self._buf
        buf += chunk
        out: list[Frame] = []
        pos = 0
        while True:
            start = buf.find(MAGIC, pos)
            if start < 0:
                keep = next((k for k in (3, 2, 1) if buf.endswith(MAGIC[:k])), 0)
                end = max(pos, len(buf) - keep)
                self._skip(end - pos)
                pos = end
                break
            self._skip(start - pos)
            pos = start
            if len(buf) - pos < HEADER_SIZE:
                break
            h = _parse_header(bytes(buf[pos : pos + HEADER_SIZE]), self.max_payload_bytes)
            if isinstance(h, str):
                self._reject(h)
                self.skipped_bytes += 1  # the candidate's first byte; search on after it
                pos += 1
                continue
            end = pos + HEADER_SIZE + h.payload_len
            if len(buf) < end:
                break
            # the payload read in place (the samples are copied once, by decode_raw)
            with memoryview(buf) as view, view[pos + HEADER_SIZE : end] as payload:
                good = zlib.crc32(payload) == h.payload_crc
                frame = _frame(h, payload) if good else None
            if frame is None:
                self._reject("payload CRC mismatch")
                self.skipped_bytes += 1
                pos += 1
                continue
            out.append(frame)
            self.frames += 1
            self._skipping = False
            pos = end
        del buf[:pos]
        return out

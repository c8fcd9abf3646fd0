"""Tests for service.wire: raw formats, the framed format's byte layout, and resync."""

from __future__ import annotations

import struct
import zlib

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from service import wire

# The layout table in service/wire.py's docstring, written out independently here.
LAYOUT = struct.Struct("<4sBBHdQqIII")


def _frames_equal(a: list[wire.Frame], b: list[wire.Frame]) -> bool:
    return len(a) == len(b) and all(
        (x.channels, x.fs, x.first_index, x.t_ns, x.fmt)
        == (y.channels, y.fs, y.first_index, y.t_ns, y.fmt)
        and np.array_equal(x.data, y.data, equal_nan=True)
        for x, y in zip(a, b, strict=True)
    )


def test_crc_flavour_is_crc32_iso_hdlc() -> None:
    # CRC-32/ISO-HDLC check value for b"123456789" is 0xCBF43926 (Rocksoft model / CRC catalogue)
    assert zlib.crc32(b"123456789") == 0xCBF43926


def test_header_layout_matches_documented_table() -> None:
    data = np.array([[1, -2, 3], [4, 5, -6]], dtype=np.float32)
    b = wire.encode_frame(data, "s16le", 12800.0, 123456789012, 1_700_000_000_000_000_000)
    assert wire.HEADER_SIZE == 44 == LAYOUT.size
    magic, ver, code, ch, fs, first, t_ns, plen, pcrc, hcrc = LAYOUT.unpack_from(b)
    assert magic == b"QVRF" and ver == 1 and code == 0 and ch == 2
    assert fs == 12800.0 and first == 123456789012 and t_ns == 1_700_000_000_000_000_000
    # payload: interleaved s16le c0[0], c1[0], c0[1], ... packed by struct, not numpy
    payload = struct.pack("<6h", 1, 4, -2, 5, 3, -6)
    assert plen == len(payload) == 12 and b[44:] == payload
    assert pcrc == zlib.crc32(payload) and hcrc == zlib.crc32(b[:40])


@pytest.mark.parametrize(
    ("fmt", "code", "pack"),
    [
        ("s16le", 0, "h"),
        ("s32le", 1, "i"),
        ("f32le", 2, "f"),
        ("f64le", 3, "d"),
    ],
)
def test_decode_raw_matches_struct_packing(fmt: str, code: int, pack: str) -> None:
    values = [0, 1, -1, 1000, -32768, 32767, 7, 12345, -5]  # 3 channels x 3 samples
    buf = struct.pack(f"<{len(values)}{pack}", *values)
    data, rest = wire.decode_raw(buf + b"\x01\x02", fmt, 3)
    assert data.dtype == np.float32 and data.shape == (3, 3)
    assert data[:, 0].tolist() == [0, 1, -1] and data[2].tolist() == [-1, 32767, -5]
    assert rest == b"\x01\x02"
    assert wire.FORMAT_CODES[fmt] == code


@pytest.mark.parametrize("fmt", wire.RAW_FORMATS)
def test_decode_raw_any_split_equals_one_shot(fmt: str) -> None:
    rng = np.random.default_rng(1)
    x = rng.integers(-30000, 30000, size=(2, 25)).astype(np.float32)
    buf = wire.encode_raw(x, fmt)
    for cut in range(0, len(buf) + 1, 3):
        a, rest = wire.decode_raw(buf[:cut], fmt, 2)
        b, rest2 = wire.decode_raw(rest + buf[cut:], fmt, 2)
        assert rest2 == b""
        assert np.array_equal(np.concatenate([a, b], axis=1), x)


@pytest.mark.parametrize("fmt", wire.RAW_FORMATS)
def test_frame_round_trip_every_format(fmt: str) -> None:
    rng = np.random.default_rng(7)
    if fmt.startswith("s"):
        hi = 2**15 - 1 if fmt == "s16le" else 2**24  # float32 holds integers to 2**24 exactly
        x = rng.integers(-hi, hi, size=(3, 100)).astype(np.float64)
    else:
        x = rng.standard_normal((3, 100))
    top = 2**63 - 1 - 100  # the last start a frame of 100 samples may have (module docstring)
    fr = wire.decode_datagram(wire.encode_frame(x, fmt, 25600.0, top, -3))
    assert (fr.channels, fr.fs, fr.first_index, fr.t_ns, fr.fmt, fr.n) == (
        3,
        25600.0,
        top,
        -3,
        fmt,
        100,
    )
    assert fr.data.dtype == np.float32
    np.testing.assert_array_equal(fr.data, x.astype(np.float32))


def test_float_formats_carry_nan_and_inf() -> None:
    x = np.array([[np.nan, np.inf, -np.inf, 1.5]])
    for fmt in ("f32le", "f64le"):
        fr = wire.decode_datagram(wire.encode_frame(x, fmt, 100.0, 0))
        np.testing.assert_array_equal(fr.data, x.astype(np.float32))


def test_encode_rejects_values_outside_integer_range() -> None:
    with pytest.raises(ValueError, match=r"do not fit s16le \(\[-32768, 32767\]"):
        wire.encode_raw(np.array([[32768.0]]), "s16le")
    with pytest.raises(ValueError, match="do not fit s32le"):
        wire.encode_raw(np.array([[np.nan]]), "s32le")
    assert wire.encode_raw(np.array([[32767.4, -32768.0]]), "s16le") == struct.pack(
        "<2h", 32767, -32768
    )


def test_format_choice_errors_list_allowed_values() -> None:
    with pytest.raises(
        ValueError, match=r"format='f16le' is not one of 's16le', 's32le', 'f32le', 'f64le'"
    ):
        wire.decode_raw(b"", "f16le", 1)
    with pytest.raises(ValueError, match="format='u8' is not one of"):
        wire.encode_frame(np.zeros((1, 1)), "u8", 1.0, 0)


def _good_frames(count: int, seed: int = 3) -> list[bytes]:
    rng = np.random.default_rng(seed)
    out, k = [], 0
    for _ in range(count):
        n = int(rng.integers(1, 40))
        out.append(wire.encode_frame(rng.standard_normal((2, n)), "f32le", 1000.0, k, 0))
        k += n
    return out


def test_garbage_between_frames_all_good_frames_recovered() -> None:
    frames = _good_frames(6)
    rng = np.random.default_rng(11)
    stream = b""
    runs = 0
    for i, f in enumerate(frames):
        if i % 2:
            g = rng.integers(0, 256, size=int(rng.integers(1, 100)), dtype=np.uint8).tobytes()
            assert wire.MAGIC not in g
            stream += g
            runs += 1
        stream += f
    dec = wire.FrameDecoder()
    got = dec.feed(stream)
    assert [g.first_index for g in got] == [wire.decode_datagram(f).first_index for f in frames]
    assert dec.malformed == runs and dec.frames == 6 and dec.pending_bytes == 0
    assert dec.skipped_bytes == len(stream) - sum(len(f) for f in frames)


def _corrupt(frame: bytes, offset: int) -> bytes:
    b = bytearray(frame)
    b[offset] ^= 0x10
    return bytes(b)


@pytest.mark.parametrize(
    ("offset", "reason"),
    [
        (10, "header CRC mismatch"),  # inside the sample-rate field
        (33, "header CRC mismatch"),  # inside the payload length
        (50, "payload CRC mismatch"),  # inside the payload
    ],
)
def test_corrupted_frame_rejected_once_neighbours_kept(offset: int, reason: str) -> None:
    a, b, c = _good_frames(3, seed=5)
    dec = wire.FrameDecoder()
    got = dec.feed(a + _corrupt(b, offset) + c)
    assert [g.first_index for g in got] == [
        wire.decode_datagram(a).first_index,
        wire.decode_datagram(c).first_index,
    ]
    assert dec.malformed == 1 and dec.last_reason == reason


def test_cut_off_frame_does_not_swallow_the_next() -> None:
    a, b, c = _good_frames(3, seed=9)
    dec = wire.FrameDecoder()
    # b cut inside its payload: the header is valid and claims more bytes than follow
    got = dec.feed(a + b[: len(b) - 5] + c + a)
    assert len(got) == 3 and got[1].first_index == wire.decode_datagram(c).first_index
    assert dec.malformed == 1 and dec.last_reason == "payload CRC mismatch"


def _raw_header(
    *,
    version: int = 1,
    code: int = 2,
    channels: int = 1,
    fs: float = 100.0,
    length: int = 4,
    payload: bytes = b"\0\0\0\0",
    first: int = 0,
) -> bytes:
    head = LAYOUT.pack(
        b"QVRF", version, code, channels, fs, first, 0, length, zlib.crc32(payload), 0
    )[:40]
    return head + struct.pack("<I", zlib.crc32(head)) + payload


@pytest.mark.parametrize(
    ("kw", "reason"),
    [
        ({"version": 2}, "unsupported version 2"),
        ({"code": 9}, "unknown sample format code 9"),
        ({"channels": 0}, "channel count 0 outside 1-4096"),
        ({"fs": float("nan")}, "sample rate nan Hz"),
        ({"fs": -1.0}, "sample rate -1.0 Hz"),
        ({"length": 6, "payload": b"\0" * 6}, "payload length 6 is not a non-zero multiple of 4"),
        ({"length": 0, "payload": b""}, "payload length 0 is not a non-zero multiple"),
        # the header's u64 index beyond what a signed 64-bit stream index holds (issue 13)
        ({"first": 2**63}, "first sample index 9223372036854775808 with 1 samples runs past"),
        ({"first": 2**64 - 1}, "first sample index 18446744073709551615 with 1 samples runs"),
        ({"first": 2**63 - 1}, "first sample index 9223372036854775807 with 1 samples runs"),
    ],
)
def test_bad_header_fields_rejected_with_reason(kw: dict[str, object], reason: str) -> None:
    bad = _raw_header(**kw)  # type: ignore[arg-type]
    with pytest.raises(wire.WireError, match=reason):
        wire.decode_datagram(bad)
    (good,) = _good_frames(1)
    dec = wire.FrameDecoder()
    assert len(dec.feed(bad + good)) == 1
    assert dec.malformed == 1 and reason in dec.last_reason


def test_index_at_the_top_of_int64_is_accepted_and_one_past_it_refused() -> None:
    ok = _raw_header(first=2**63 - 2)  # one sample: its index and the next both fit
    assert wire.decode_datagram(ok).first_index == 2**63 - 2
    x = np.zeros((1, 10))
    assert wire.decode_datagram(wire.encode_frame(x, "f32le", 1.0, 2**63 - 11)).n == 10
    with pytest.raises(ValueError, match=r"first_index=9223372036854775798 must be in"):
        wire.encode_frame(x, "f32le", 1.0, 2**63 - 10)


def test_framed_header_is_recognised_only_with_its_crc() -> None:
    (f,) = _good_frames(1)
    assert wire.framed_header_at(f) and wire.framed_header_at(b"xy" + f, 2)
    assert not wire.framed_header_at(f[: wire.HEADER_SIZE - 1])
    broken = bytearray(f)
    broken[10] ^= 1  # the magic is still there, the header CRC no longer matches
    assert not wire.framed_header_at(bytes(broken))
    assert not wire.framed_header_at(b"QVRF" + bytes(60))


def test_implausible_count_counts_huge_and_infinite_not_nan() -> None:
    x = np.array([[0.0, 1e15, -1.0000001e15, np.inf, -np.inf, np.nan, 3e38]], dtype=np.float32)
    assert wire.implausible_count(x) == 4  # -1.0000001e15, ±inf and 3e38; not 1e15 nor NaN


def test_oversize_payload_rejected_without_waiting_for_it() -> None:
    size = wire.MAX_PAYLOAD_BYTES + 4
    head = LAYOUT.pack(b"QVRF", 1, 2, 1, 100.0, 0, 0, size, 0, 0)[:40]
    bad = head + struct.pack("<I", zlib.crc32(head))
    (good,) = _good_frames(1)
    dec = wire.FrameDecoder()
    got = dec.feed(bad + good)
    assert len(got) == 1 and dec.pending_bytes == 0
    assert dec.last_reason == f"payload length {size} exceeds the maximum {wire.MAX_PAYLOAD_BYTES}"
    small = wire.FrameDecoder(max_payload_bytes=64)
    assert small.feed(wire.encode_frame(np.zeros((1, 17)), "f32le", 1.0, 0)) == []
    assert small.malformed == 1 and "exceeds the maximum 64" in small.last_reason


def test_datagram_must_hold_exactly_one_frame() -> None:
    (f,) = _good_frames(1)
    with pytest.raises(wire.WireError, match="shorter than a header"):
        wire.decode_datagram(f[:20])
    with pytest.raises(wire.WireError, match="does not hold one frame"):
        wire.decode_datagram(f + b"\0")
    with pytest.raises(wire.WireError, match="does not hold one frame"):
        wire.decode_datagram(f[:-1])
    with pytest.raises(wire.WireError, match="bad magic"):
        wire.decode_datagram(b"XXXX" + f[4:])


def test_partial_frame_is_held_until_complete() -> None:
    (f,) = _good_frames(1)
    dec = wire.FrameDecoder()
    assert dec.feed(f[:30]) == [] and dec.pending_bytes == 30
    assert dec.feed(f[30:-1]) == [] and dec.pending_bytes == len(f) - 1
    assert len(dec.feed(f[-1:])) == 1 and dec.pending_bytes == 0 and dec.malformed == 0


_frame_lists = st.lists(
    st.tuples(
        st.sampled_from(wire.RAW_FORMATS),
        st.integers(1, 3),
        st.integers(1, 20),
        st.integers(0, 2**40),
    ),
    min_size=1,
    max_size=6,
)


def _build(specs: list[tuple[str, int, int, int]]) -> list[bytes]:
    rng = np.random.default_rng(0)
    return [
        wire.encode_frame(rng.integers(-100, 100, size=(c, n)).astype(np.float64), fmt, 512.0, k, k)
        for fmt, c, n, k in specs
    ]


@settings(derandomize=True, max_examples=150, deadline=None)
@given(_frame_lists, st.lists(st.binary(max_size=60), max_size=7), st.data())
def test_random_chunking_and_garbage(
    specs: list[tuple[str, int, int, int]], garbage: list[bytes], data: st.DataObject
) -> None:
    frames = _build(specs)
    pieces: list[bytes] = []
    for i, f in enumerate(frames):
        if i < len(garbage):
            # garbage, sometimes with a stray magic inside to force a resync
            g = garbage[i]
            if data.draw(st.booleans()):
                g = g[: len(g) // 2] + wire.MAGIC + g[len(g) // 2 :]
            pieces.append(g)
        pieces.append(f)
    stream = b"".join(pieces)
    one = wire.FrameDecoder()
    whole = one.feed(stream)
    cuts = sorted(data.draw(st.lists(st.integers(0, len(stream)), max_size=12)))
    chunked = wire.FrameDecoder()
    parts: list[wire.Frame] = []
    for lo, hi in zip([0, *cuts], [*cuts, len(stream)], strict=True):
        parts += chunked.feed(stream[lo:hi])
    assert _frames_equal(whole, parts)
    assert (one.malformed, one.skipped_bytes, one.pending_bytes) == (
        chunked.malformed,
        chunked.skipped_bytes,
        chunked.pending_bytes,
    )
    # every good frame comes through (a garbage header passing a CRC-32 is a 2**-32 event)
    assert _frames_equal(whole, [wire.decode_datagram(f) for f in frames])


@settings(derandomize=True, max_examples=100, deadline=None)
@given(st.lists(st.binary(max_size=200), max_size=8))
def test_pure_garbage_never_raises(chunks: list[bytes]) -> None:
    assume(wire.MAGIC not in b"".join(chunks))
    dec = wire.FrameDecoder()
    for c in chunks:
        assert dec.feed(c) == []
    assert dec.skipped_bytes + dec.pending_bytes == sum(map(len, chunks))
    assert dec.pending_bytes <= 3

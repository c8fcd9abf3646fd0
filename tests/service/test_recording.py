"""Tests for service.recording: WAV scaling, raw files, text rows with bad lines."""

from __future__ import annotations

import struct
from pathlib import Path

import numpy as np
import pytest

from service import recording as rec


def _wav_bytes(samples: bytes, *, channels: int, fs: int, bits: int, tag: int = 1) -> bytes:
    """A canonical 44-byte-header WAV file (Microsoft RIFF/WAVE: fmt chunk, then data)."""
    block = channels * bits // 8
    fmt = struct.pack("<HHIIHH", tag, channels, fs, fs * block, block, bits)
    body = b"WAVE" + b"fmt " + struct.pack("<I", 16) + fmt + b"data"
    body += struct.pack("<I", len(samples)) + samples
    return b"RIFF" + struct.pack("<I", len(body)) + body


def test_int16_wav_is_scaled_to_full_scale(tmp_path: Path) -> None:
    # 16-bit PCM full scale is 2**15 (common practice); written by hand, not by scipy
    p = tmp_path / "a.wav"
    p.write_bytes(
        _wav_bytes(struct.pack("<4h", 16384, -32768, 1, 32767), channels=2, fs=8000, bits=16)
    )
    data, fs = rec.read_recording(p)
    assert fs == 8000.0 and data.dtype == np.float32
    np.testing.assert_array_equal(data, [[0.5, 2**-15], [-1.0, 32767 / 32768]])


def test_24bit_wav_is_scaled_to_full_scale(tmp_path: Path) -> None:
    # scipy.io.wavfile.read docs: 24-bit PCM comes back left-justified in int32, so x/2**31
    # equals the 24-bit value / 2**23
    p = tmp_path / "a.wav"
    payload = b"".join(v.to_bytes(3, "little", signed=True) for v in (2**22, -(2**23), 1))
    p.write_bytes(_wav_bytes(payload, channels=1, fs=1000, bits=24))
    data, fs = rec.read_recording(p)
    np.testing.assert_array_equal(data, [[0.5, -1.0, 2**-23]])


def test_8bit_wav_is_unsigned_around_128(tmp_path: Path) -> None:
    # 8-bit WAV PCM is unsigned with 128 as zero (Microsoft RIFF/WAVE spec)
    p = tmp_path / "a.wav"
    p.write_bytes(_wav_bytes(bytes([128, 0, 255, 192]), channels=1, fs=100, bits=8))
    data, _ = rec.read_recording(p)
    np.testing.assert_array_equal(data, [[0.0, -1.0, 127 / 128, 0.5]])


@pytest.mark.parametrize("fmt", ["s16le", "s32le", "f32le", "f64le"])
def test_write_wav_round_trip(tmp_path: Path, fmt: str) -> None:
    x = np.array([[0.5, -1.0, 0.25, 0.0], [0.125, -0.5, 0.75, -0.25]])
    p = tmp_path / "w.wav"
    rec.write_wav(p, x, 25600, fmt)
    data, fs = rec.read_recording(p)
    assert fs == 25600.0
    np.testing.assert_array_equal(data, x.astype(np.float32))
    assert rec.load_recording(p).channel_names == ("ch0", "ch1")


def test_write_wav_refuses_what_it_cannot_store(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match=r"do not fit s16le"):
        rec.write_wav(tmp_path / "x.wav", np.array([[1.0]]), 1000, "s16le")
    with pytest.raises(ValueError, match=r"whole number of Hz"):
        rec.write_wav(tmp_path / "x.wav", np.zeros((1, 4)), 1000.5)
    with pytest.raises(ValueError, match=r"format='u8' is not one of 's16le'"):
        rec.write_wav(tmp_path / "x.wav", np.zeros((1, 4)), 1000, "u8")


def test_wav_header_must_agree_with_given_rate_and_channels(tmp_path: Path) -> None:
    p = tmp_path / "w.wav"
    rec.write_wav(p, np.zeros((2, 10)), 1000)
    with pytest.raises(ValueError, match=r"fs=2000.0 Hz differs from the WAV header's 1000 Hz"):
        rec.read_recording(p, fs=2000.0)
    with pytest.raises(ValueError, match=r"has 2 channels, expected 3"):
        rec.read_recording(p, channels=3)


def test_raw_file_keeps_values_and_reports_trailing_bytes(tmp_path: Path) -> None:
    p = tmp_path / "a.raw"
    p.write_bytes(struct.pack("<4h", 1, -2, 300, -400) + b"\x07")
    problems: list[str] = []
    data, fs = rec.read_recording(p, fmt="s16le", channels=2, fs=512.0, problems=problems)
    np.testing.assert_array_equal(data, [[1, 300], [-2, -400]])
    assert fs == 512.0 and problems == ["a.raw: 1 trailing bytes (a partial sample) ignored"]
    with pytest.raises(ValueError, match=r"format 's16le' needs the channel count"):
        rec.read_recording(p, fmt="s16le", fs=512.0)
    with pytest.raises(ValueError, match=r"needs the sample rate fs in Hz"):
        rec.read_recording(p, fmt="s16le", channels=2)


def test_format_from_suffix_and_choice_errors(tmp_path: Path) -> None:
    assert rec.format_for_path("x.WAV") == "wav" and rec.format_for_path("x.tsv") == "csv"
    assert rec.format_for_path("x.bin") is None
    with pytest.raises(
        ValueError, match=r"cannot tell the format from the name; give one of 's16le'"
    ):
        rec.read_recording(tmp_path / "x.bin")
    with pytest.raises(
        ValueError,
        match=r"format='mp3' is not one of 's16le', 's32le', 'f32le', "
        r"'f64le', 'csv', 'wav'",
    ):
        rec.read_recording(tmp_path / "x.bin", fmt="mp3")


CSV = """\
# logger export
de_h,de_v
0.5, -0.25
1e-3,nan
oops,2
1,2,3

-inf;4
7\t8
"""


def test_csv_header_nan_and_malformed_lines(tmp_path: Path) -> None:
    p = tmp_path / "a.csv"
    p.write_text(CSV)
    r = rec.load_recording(p, fs=100.0)
    assert r.channel_names == ("de_h", "de_v") and r.fs == 100.0
    expected = np.array([[0.5, 1e-3, -np.inf, 7.0], [-0.25, np.nan, 4.0, 8.0]], dtype=np.float32)
    np.testing.assert_array_equal(r.data, expected)  # NaN passes through as NaN
    assert r.problems == ["line 5: 'oops' is not a number", "line 6: 3 values, expected 2"]
    assert r.skipped == 2


def test_csv_channel_count_may_be_fixed(tmp_path: Path) -> None:
    p = tmp_path / "a.txt"
    p.write_text("1 2 3\n4 5 6\n7 8\n")
    r = rec.load_recording(p, fs=10.0, channels=3)
    assert r.data.shape == (3, 2) and r.problems == ["line 3: 2 values, expected 3"]
    with pytest.raises(ValueError, match=r"a\.txt: no samples"):
        p.write_text("time,value\n")
        rec.read_recording(p, fs=10.0)


def test_text_parser_line_by_line_equals_whole() -> None:
    whole = rec.TextParser()
    a = whole.parse(CSV)
    piecewise = rec.TextParser()
    parts = [piecewise.parse(line + "\n") for line in CSV.splitlines()]
    np.testing.assert_array_equal(np.concatenate([q for q in parts if q.size], axis=1), a)
    assert piecewise.problems == whole.problems and piecewise.line_no == whole.line_no == 9


def test_text_parser_fast_and_slow_paths_agree() -> None:
    rng = np.random.default_rng(4)
    x = rng.standard_normal((3, 200))
    text = "".join(f"{a!r},{b!r},{c!r}\n" for a, b, c in x.T.tolist())
    fast = rec.TextParser().parse(text)
    slow = rec.TextParser().parse(text + "1,2\n")  # one bad row sends it row by row
    np.testing.assert_array_equal(fast, x.astype(np.float32))
    np.testing.assert_array_equal(slow, fast)

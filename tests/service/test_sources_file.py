"""Tests for the file source: following growth, partial samples and lines, truncation,
rotation, deletion, a WAV being written, and replay of a finished recording."""

from __future__ import annotations

import asyncio
import os
import struct
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from sourcekit import CLOCK_NS, FS, joined, run, until

from service import wire
from service.recording import write_wav
from service.sources import FileSource, make_source
from service.sources.base import GAP_SAMPLES
from service.types import SampleBlock


async def take(src: FileSource, n_samples: int) -> list[SampleBlock]:
    """As sourcekit.take, but the blocks must end exactly at ``n_samples``."""
    out: list[SampleBlock] = []
    while sum(b.n for b in out) < n_samples:
        out.append(await src.__anext__())
    assert sum(b.n for b in out) == n_samples
    return out



def contiguous(blocks: list[SampleBlock], first: int) -> bool:
    k = first
    for b in blocks:
        if b.first_index != k:
            return False
        k += b.n
    return True


def tail(path: Path, fmt: str, channels: int = 2, fs: float | None = FS, **kw: Any) -> FileSource:
    kw.setdefault("start_at", "beginning")
    ids = [f"c{i}" for i in range(channels)]
    return FileSource("fan-1", ids, fs, path, fmt, poll_s=0.01, clock=lambda: CLOCK_NS, **kw)


def append(path: Path, data: bytes) -> None:
    with open(path, "ab") as f:
        f.write(data)


def known(channels: int, n: int, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return rng.integers(-1000, 1000, size=(channels, n)).astype(np.float32)


def test_raw_growth_with_a_partial_sample_held(tmp_path: Path) -> None:
    async def go(tmp: Path) -> None:
        p = tmp / "a.raw"
        p.write_bytes(b"")
        x = known(2, 300)
        raw = wire.encode_raw(x, "s16le")
        src = tail(p, "s16le")
        await src.start()
        append(p, raw[:401])  # 100 samples of 4 bytes, plus 1 byte of the next
        first = await take(src, 100)
        append(p, raw[401:])
        rest = await take(src, 200)
        np.testing.assert_array_equal(joined(first + rest), x)
        assert contiguous(first + rest, 0)
        assert all(b.t0_ns == CLOCK_NS - round(b.n * 1e9 / FS) for b in first + rest)
        c = src.counters
        assert (c.samples, c.bytes, c.gaps, c.partial_frames) == (300, 1200, 0, 0)
        await src.aclose()

    run(go(tmp_path))


def test_start_at_end_skips_what_is_already_there(tmp_path: Path) -> None:
    async def go(tmp: Path) -> None:
        p = tmp / "a.raw"
        old, new = known(1, 50, 1), known(1, 20, 2)
        p.write_bytes(wire.encode_raw(old, "f32le") + b"\x00\x00")  # ends mid-sample
        src = tail(p, "f32le", channels=1, start_at="end")
        await src.start()
        await until(lambda: src.status()["position_bytes"] == 202)  # from 200, a sample boundary
        append(p, b"\x00\x00" + wire.encode_raw(new, "f32le"))
        blocks = await take(src, 21)
        np.testing.assert_array_equal(joined(blocks)[:, 1:], new)  # the completed sample first
        await src.aclose()

    run(go(tmp_path))


def test_csv_partial_line_nan_and_bad_row(tmp_path: Path) -> None:
    async def go(tmp: Path) -> None:
        p = tmp / "a.csv"
        p.write_text("")
        src = tail(p, "csv")
        await src.start()
        append(p, b"h,v\n1.5,2\n3,")  # header, a row, half a row
        (a,) = await take(src, 1)
        np.testing.assert_array_equal(a.data, [[1.5], [2.0]])
        append(p, b"nan\nx,1\n5,6\n")  # completes the row with NaN, one bad row, one good
        b = await take(src, 2)
        np.testing.assert_array_equal(joined(b), [[3.0, 5.0], [np.nan, 6.0]])  # NaN passes
        assert src.counters.malformed == 1
        assert src.counters.last_error.endswith("line 4: 'x' is not a number")
        assert contiguous([a, *b], 0)
        await src.aclose()

    run(go(tmp_path))


def test_truncation_starts_over_with_a_gap(tmp_path: Path) -> None:
    async def go(tmp: Path) -> None:
        p = tmp / "a.raw"
        x, y = known(2, 100, 3), known(2, 10, 4)
        p.write_bytes(wire.encode_raw(x, "s16le") + b"\x05")
        src = tail(p, "s16le")
        await src.start()
        first = await take(src, 100)
        with open(p, "r+b") as f:  # truncate in place (copy-truncate rotation), then write
            f.truncate(0)
        await until(lambda: src.counters.extra.get("truncations") == 1)
        append(p, wire.encode_raw(y, "s16le"))
        second = await take(src, 10)
        np.testing.assert_array_equal(joined(first), x)
        np.testing.assert_array_equal(joined(second), y)
        assert second[0].first_index == 100 + GAP_SAMPLES and src.counters.gaps == 1
        assert src.counters.partial_frames == 1 and src.counters.extra["partial_bytes"] == 1
        assert "truncation at byte 401" in src.counters.last_error
        await src.aclose()

    run(go(tmp_path))


def test_rotation_reads_the_old_file_to_its_end_then_the_new(tmp_path: Path) -> None:
    async def go(tmp: Path) -> None:
        p = tmp / "log.csv"
        p.write_text("1,1\n")
        src = tail(p, "csv")
        await src.start()
        await take(src, 1)
        with open(p, "a") as writer:  # the logger's handle survives the rename
            os.rename(p, tmp / "log.csv.1")
            writer.write("2,2\n")  # late rows land in the rotated file
            writer.flush()
            p.write_text("10,10\n11,11\n")  # the new file
            blocks = await take(src, 3)
        np.testing.assert_array_equal(joined(blocks), [[2, 10, 11], [2, 10, 11]])
        assert blocks[0].first_index == 1 and blocks[1].first_index == 2 + GAP_SAMPLES
        assert src.counters.extra["rotations"] == 1 and src.counters.gaps == 1
        await src.aclose()

    run(go(tmp_path))


def test_deleted_then_recreated(tmp_path: Path) -> None:
    async def go(tmp: Path) -> None:
        p = tmp / "a.raw"
        x = known(1, 40, 5)
        p.write_bytes(wire.encode_raw(x[:, :30], "f64le"))
        src = tail(p, "f64le", channels=1)
        await src.start()
        await take(src, 30)
        p.unlink()
        await until(lambda: src.status()["state"] == "waiting for file")
        assert src.counters.extra["deletions"] == 1
        p.write_bytes(wire.encode_raw(x[:, 30:], "f64le"))  # bigger than nothing: not truncation
        blocks = await take(src, 10)
        np.testing.assert_array_equal(joined(blocks), x[:, 30:])
        assert blocks[0].first_index == 30 + GAP_SAMPLES and src.counters.gaps == 1
        await src.aclose()

    run(go(tmp_path))


def test_a_file_that_appears_later_is_read_from_its_start(tmp_path: Path) -> None:
    async def go(tmp: Path) -> None:
        p = tmp / "later.csv"
        src = tail(p, "csv", channels=1, start_at="end")
        await src.start()
        await until(lambda: src.status()["state"] == "waiting for file")
        p.write_text("7\n8\n")
        blocks = await take(src, 2)
        np.testing.assert_array_equal(joined(blocks), [[7, 8]])
        assert blocks[0].first_index == 0 and src.counters.gaps == 0
        await src.aclose()

    run(go(tmp_path))


def wav_header(channels: int, fs: int, bits: int, tag: int = 1) -> bytes:
    """A RIFF/WAVE header with placeholder sizes, as a recorder writes before the samples."""
    block = channels * bits // 8
    fmt = struct.pack("<HHIIHH", tag, channels, fs, fs * block, block, bits)
    return (
        b"RIFF"
        + b"\xff\xff\xff\xff"
        + b"WAVE"
        + b"fmt "
        + struct.pack("<I", 16)
        + fmt
        + (b"data" + b"\xff\xff\xff\xff")
    )


def test_wav_being_written_is_followed_and_scaled(tmp_path: Path) -> None:
    async def go(tmp: Path) -> None:
        p = tmp / "rec.wav"
        header = wav_header(2, 2000, 16)
        p.write_bytes(header[:30])  # the recorder has not even finished the header
        src = tail(p, "wav", fs=None)
        await src.start()
        samples = struct.pack("<6h", 16384, -32768, 1, 2, -16384, 32767)
        append(p, header[30:] + samples[:10])  # 2 full samples and half of the third
        a = await take(src, 2)
        assert src.fs == 2000.0 and a[0].fs == 2000.0  # taken from the header
        append(p, samples[10:])
        b = await take(src, 1)
        # PCM16 scaled by 2**-15 (common practice; same as service.recording)
        np.testing.assert_array_equal(
            joined(a + b), [[0.5, 2**-15, -0.5], [-1.0, 2 * 2**-15, 32767 / 32768]]
        )
        await src.aclose()

    run(go(tmp_path))


def test_wav_that_does_not_fit_is_reported_and_waited_out(tmp_path: Path) -> None:
    async def go(tmp: Path) -> None:
        p = tmp / "rec.wav"
        p.write_bytes(wav_header(3, 2000, 16) + bytes(12))
        src = tail(p, "wav", fs=None)
        await src.start()
        await until(lambda: src.counters.malformed == 1)
        assert src.status()["state"] == "unusable file"
        assert src.counters.last_error.endswith("WAV has 3 channels; source declares 2")
        p2 = tmp / "b.wav"
        p2.write_bytes(wav_header(2, 2000, 24) + bytes(12))
        other = tail(p2, "wav", fs=None)
        await other.start()
        await until(lambda: other.counters.malformed == 1)
        assert (
            "WAV format tag 1 with 24-bit samples cannot be followed" in other.counters.last_error
        )
        # the writer starts over with a usable file: followed again (a truncation)
        p2.write_bytes(b"")
        await until(lambda: other.counters.extra.get("truncations") == 1)
        p2.write_bytes(wav_header(2, 2000, 32, tag=3) + struct.pack("<2f", 0.25, -0.75))
        (block,) = await take(other, 1)
        np.testing.assert_array_equal(block.data, [[0.25], [-0.75]])
        await src.aclose()
        await other.aclose()

    run(go(tmp_path))


def test_replay_as_fast_as_possible_then_ends(tmp_path: Path) -> None:
    x = (known(2, 1050, 6) / 1024).astype(np.float32)
    p = tmp_path / "rec.wav"
    write_wav(p, x, 1000, "f32le")

    async def go() -> None:
        src = tail(p, "wav", fs=None, follow=False, replay_speed=0.0, block_s=0.1)
        blocks = [b async for b in src]
        assert [b.n for b in blocks] == [100] * 10 + [50]
        assert contiguous(blocks, 0)
        np.testing.assert_array_equal(joined(blocks), x)
        # recording time axis from the start of the replay
        assert [b.t0_ns for b in blocks[:3]] == [CLOCK_NS, CLOCK_NS + 10**8, CLOCK_NS + 2 * 10**8]
        assert src.status()["state"] == "ended" and src.status()["replayed_samples"] == 1050
        assert src.counters.drops == 0  # a replay waits for its consumer

    run(go())


def test_replay_pace_follows_replay_speed(tmp_path: Path) -> None:
    p = tmp_path / "rec.csv"
    p.write_text("".join(f"{k}\n" for k in range(2000)))  # 2 s at 1 kHz
    asked: list[float] = []

    async def fake_sleep(delay_s: float) -> None:  # records the schedule, waits for nothing
        asked.append(delay_s)
        await asyncio.sleep(0)

    async def go() -> None:
        src = FileSource(
            "r",
            ["c0"],
            FS,
            p,
            "csv",
            follow=False,
            replay_speed=4.0,
            block_s=0.25,
            sleep=fake_sleep,
        )
        blocks = [b async for b in src]
        assert len(blocks) == 8 and joined(blocks)[0, -1] == 1999.0
        # block j ends at (j+1)·0.25 s of recording: due (j+1)·0.25/4 s after the start
        due = [(j + 1) * 0.25 / 4 for j in range(8)]
        assert all(d - 0.5 < a <= d for a, d in zip(asked, due, strict=True))

    run(go())


def test_replay_counts_bad_rows_and_missing_file_fails_at_start(tmp_path: Path) -> None:
    p = tmp_path / "rec.csv"
    p.write_text("a,b\n1,2\n3\n4,5\n")

    async def go() -> None:
        src = tail(p, "csv", follow=False, replay_speed=0.0)
        blocks = [b async for b in src]
        np.testing.assert_array_equal(joined(blocks), [[1, 4], [2, 5]])
        assert (
            src.counters.malformed == 1
            and src.counters.last_error == "line 3: 1 values, expected 2"
        )
        gone = tail(tmp_path / "nope.csv", "csv", follow=False)
        with pytest.raises(FileNotFoundError):
            await gone.start()
        assert gone.status()["state"] == "failed"

    run(go())


def test_constructor_checks_choices(tmp_path: Path) -> None:
    with pytest.raises(
        ValueError,
        match=r"format='mp3' is not one of 's16le', 's32le', 'f32le', 'f64le', 'csv', 'wav'",
    ):
        FileSource("f", ["a"], FS, tmp_path / "x", "mp3")
    with pytest.raises(ValueError, match=r"start_at='middle' is not one of 'end', 'beginning'"):
        FileSource("f", ["a"], FS, tmp_path / "x", "csv", start_at="middle")
    with pytest.raises(ValueError, match=r"format 'csv' needs the sample rate fs in Hz"):
        FileSource("f", ["a"], None, tmp_path / "x", "csv")


def test_make_source_builds_file_source_from_config(tmp_path: Path) -> None:
    from service.config import parse_config

    cfg = parse_config(
        {
            "sources": [
                {
                    "id": "fan-1",
                    "kind": "file",
                    "path": "spool/x.csv",
                    "format": "csv",
                    "sample_rate_hz": 12800,
                    "channels": ["a"],
                    "poll_ms": 20,
                    "follow": False,
                    "replay_speed": 3,
                }
            ]
        },
        base_dir=tmp_path,
        env={},
    )
    src = make_source(cfg.sources[0])
    assert isinstance(src, FileSource)
    assert (src.path, src.poll_s, src.follow, src.replay_speed) == (
        tmp_path / "spool" / "x.csv",
        0.02,
        False,
        3.0,
    )


# --- special files and over-long lines (issue 13: never block the loop, never hold unbounded) --


def test_overlong_line_is_counted_once_skipped_and_numbered(tmp_path: Path) -> None:
    from service.sources.filetail import MAX_LINE_BYTES

    async def go(tmp: Path) -> None:
        p = tmp / "a.csv"
        p.write_text("")
        src = tail(p, "csv", max_read_bytes=1 << 16)
        await src.start()
        append(p, b"1,2\n" + b"9" * (MAX_LINE_BYTES + 10))  # row 1, then line 2 far too long
        (a,) = await take(src, 1)
        await until(lambda: src.counters.malformed == 1)
        assert src.counters.last_error.endswith(
            f"line 2: longer than {MAX_LINE_BYTES} bytes without a newline; skipped up to the "
            "next newline (is this a text file?)")
        assert len(src._decoder.held) <= MAX_LINE_BYTES
        append(p, b"9" * MAX_LINE_BYTES + b"99\n3,4\nx,1\n")  # its end, a row, a bad row
        (b,) = await take(src, 1)
        np.testing.assert_array_equal(joined([a, b]), [[1.0, 3.0], [2.0, 4.0]])
        await until(lambda: src.counters.malformed == 2)
        assert src.counters.last_error.endswith("line 4: 'x' is not a number")  # still counted
        assert contiguous([a, b], 0)
        await src.aclose()

    run(go(tmp_path))


def test_start_at_end_inside_an_overlong_line_skips_to_its_newline(tmp_path: Path) -> None:
    from service.sources.filetail import MAX_LINE_BYTES

    async def go(tmp: Path) -> None:
        p = tmp / "a.csv"
        p.write_bytes(b"0,0\n" + b"7" * (MAX_LINE_BYTES + 70000))
        src = tail(p, "csv", start_at="end")
        await src.start()
        await until(lambda: src.status()["position_bytes"] == p.stat().st_size)
        append(p, b"77\n5,6\n")
        (a,) = await take(src, 1)
        np.testing.assert_array_equal(a.data, [[5.0], [6.0]])
        assert src.counters.malformed == 0  # what was there before following began
        await src.aclose()

    run(go(tmp_path))


@pytest.mark.parametrize("follow", [True, False])
def test_fifo_is_refused_without_blocking(tmp_path: Path, follow: bool) -> None:
    async def go(tmp: Path) -> None:
        p = tmp / "a.csv"
        os.mkfifo(p)
        src = tail(p, "csv", follow=follow)
        if not follow:  # a replay cannot start from it
            with pytest.raises(ValueError, match=r"a\.csv is a FIFO \(named pipe\), not a regular"):
                await src.start()
            return
        await src.start()
        await until(lambda: src.counters.extra["refused_files"] == 1)
        assert "is a FIFO (named pipe), not a regular file" in src.counters.last_error
        assert src.status()["state"] == "unusable file"
        for _ in range(5):  # polls go on (the loop is not blocked), counted once
            await asyncio.sleep(0.02)
        assert src.counters.extra["refused_files"] == 1
        p.unlink()
        p.write_text("1,2\n")
        (a,) = await take(src, 1)
        np.testing.assert_array_equal(a.data, [[1.0], [2.0]])
        assert src.status()["state"] == "following"
        await src.aclose()

    run(go(tmp_path))


def test_raw_file_holding_framed_data_is_unusable(tmp_path: Path) -> None:
    async def go(tmp: Path) -> None:
        p = tmp / "a.raw"
        p.write_bytes(b"")
        src = tail(p, "f32le")
        await src.start()
        frame = wire.encode_frame(known(2, 64), "f32le", FS, 0)
        append(p, frame[:3])  # could be a header: held until there is enough to judge
        await until(lambda: src.status()["position_bytes"] == 3)
        assert src.counters.malformed == 0
        append(p, frame[3:] + frame)
        await until(lambda: src.counters.malformed == 1)
        assert "this looks like framed data on a raw source" in src.counters.last_error
        assert (src.status()["state"], src.counters.samples) == ("unusable file", 0)
        await src.aclose()

    run(go(tmp_path))


def test_raw_float_read_of_implausible_values_is_rejected_as_a_gap(tmp_path: Path) -> None:
    async def go(tmp: Path) -> None:
        p = tmp / "a.raw"
        p.write_bytes(b"")
        src = tail(p, "f32le")
        await src.start()
        good = known(2, 100)
        junk = np.full((2, 50), 3e20, dtype=np.float32)  # s16 or framed bytes read as f32 do this
        size = 0
        for x in (good, junk, good):
            append(p, wire.encode_raw(x, "f32le"))
            size += x.size * 4
            # each piece read on its own (one read, one block) before the next comes
            await until(lambda n=size: src.status()["position_bytes"] == n)
        a, b = await take(src, 100), await take(src, 100)
        np.testing.assert_array_equal(joined(a + b), np.concatenate([good, good], axis=1))
        assert contiguous(a, 0) and contiguous(b, 150)  # the junk's 50 indices skipped
        c = src.counters
        assert (c.malformed, c.extra["implausible_blocks"], c.samples) == (1, 1, 200)
        assert "100 of 100 values beyond ±1e+15" in c.last_error
        await src.aclose()

    run(go(tmp_path))

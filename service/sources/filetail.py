"""File source: follows a growing file (raw samples, CSV/whitespace text, a WAV being
written) through truncation and rotation, or replays a finished recording at ×N pace.

Knows nothing about the engine, the pipeline, the config file or HTTP.

Following (``follow=True``), every ``poll_s`` seconds:

* **growth** — new bytes are decoded; a partial last sample or line is held until the
  writer completes it. WAV: the RIFF header is parsed once (16/32-bit PCM, scaled to ±1
  full scale as in :mod:`service.recording`, or 32/64-bit float), then the data chunk is
  read to the end of the file as it grows (its size field, often a placeholder while the
  file is written, is ignored).
* **truncation** — the file is shorter than what was read: start again at byte 0
  (``extra["truncations"]``).
* **rotation** — the path now names another file (inode changed): the old file is read to
  its end, then the new one from byte 0 (``extra["rotations"]``). A deleted path is
  waited for (``extra["deletions"]``); when a file appears again it is read from byte 0.
  Because the old file is held open until then, its inode number cannot be reused.
* Each restart adds ``GAP_SAMPLES`` to the index and counts a gap; bytes held mid-sample
  or mid-line at that moment are dropped and counted in ``partial_frames``.
* Limits: a writer that truncates and then writes past the old length between two polls
  is seen as growth. Reads happen on the event loop, at most ``max_read_bytes`` per step.
* **Only regular files.** A FIFO, device, socket or directory at the path is refused
  (opening a FIFO would block the event loop until a writer came; a device could be read
  for ever): ``extra["refused_files"]`` counts each one once, ``last_error`` says what it
  is, it is logged, and the path is watched until a regular file replaces it. Files are
  opened non-blocking and checked again after opening, so a swap in between is caught.
* **Wrong format.** A raw file whose first bytes hold a framed-format header is unusable
  ("this looks like framed data on a raw source"; ``malformed``). A raw f32le/f64le read
  with more than ``IMPLAUSIBLE_SHARE`` of its values beyond ±1e15 is rejected as for TCP
  (``malformed``, ``extra["implausible_blocks"]``; its indices become a gap).
* **Text lines are bounded.** A CSV/text line is held at most ``MAX_LINE_BYTES`` waiting
  for its newline; a longer one is malformed (counted once, with its line number), and
  everything up to the next newline is skipped.

``start_at="end"`` skips what an existing file already holds (like ``tail -f``); a file
that appears later is always read from its beginning. Timestamps: arrival time minus the
duration of the block.

Replay (``follow=False``) reads the whole recording with :func:`service.recording.load_recording`
(so errors raise from ``start()``), then hands out blocks of ``block_s`` seconds: block
``[k0, k1)`` no earlier than ``(k1/fs)/replay_speed`` s after the replay began
(``replay_speed=0``: as fast as the consumer takes them), with ``t0_ns`` = start time +
``k0/fs``. Replay waits for the consumer instead of dropping blocks; it then ends.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import math
import os
import stat
import struct
import time
from collections.abc import Awaitable, Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

import numpy as np

from ..recording import TextParser, load_recording
from ..wire import (
    FILE_FORMATS,
    HEADER_SIZE,
    IMPLAUSIBLE_ABS,
    IMPLAUSIBLE_SHARE,
    MAGIC,
    RAW_FORMATS,
    SAMPLE_SIZES,
    decode_raw,
    framed_header_at,
    implausible_count,
)
from .base import GAP_SAMPLES, QueuedSource

__all__ = ["FILE_FORMATS", "FileSource"]

log = logging.getLogger(__name__)
START_AT: tuple[str, ...] = ("end", "beginning")
_MAX_WAV_HEADER = 1 << 20
MAX_LINE_BYTES = 1 << 20  # a text line longer than this is malformed (our choice: 4096
# channels of 17-character numbers fit 16 times over)
_SPECIAL = (
    (stat.S_ISFIFO, "a FIFO (named pipe)"),
    (stat.S_ISCHR, "a character device"),
    (stat.S_ISBLK, "a block device"),
    (stat.S_ISSOCK, "a socket"),
    (stat.S_ISDIR, "a directory"),
)


def not_regular(mode: int) -> str:
    """What a file of ``mode`` is if not a regular file ("a FIFO (named pipe)", …), else ""."""
    if stat.S_ISREG(mode):
        return ""
    return next((what for test, what in _SPECIAL if test(mode)), "not a regular file")
_WAV_FORMATS = {  # (format tag, bits) → (raw format, full scale or None for float)
    (1, 16): ("s16le", 2.0**15),
    (1, 32): ("s32le", 2.0**31),
    (3, 32): ("f32le", None),
    (3, 64): ("f64le", None),
}


@dataclass(frozen=True, slots=True)
class WavInfo:
    """What a WAV header says: data offset (bytes), sample format, full scale, channels, Hz."""

    data_offset: int
    fmt: str
    full_scale: float | None
    channels: int
    fs: float


def parse_wav_header(buf: bytes) -> WavInfo | str | None:
    """The header at the start of ``buf``: WavInfo, a reason it cannot be followed, or None
    when more bytes are needed."""
    if len(buf) < 12:
        return None
    if buf[:4] != b"RIFF" or buf[8:12] != b"WAVE":
        return "not a RIFF/WAVE file"
    p, fmt_chunk = 12, None
    while len(buf) >= p + 8:
        cid, size = buf[p : p + 4], struct.unpack_from("<I", buf, p + 4)[0]
        if cid == b"data":
            if fmt_chunk is None:
                return "WAV data chunk before its fmt chunk"
            tag, channels, rate, bits, ext_tag = fmt_chunk
            tag = ext_tag if tag == 0xFFFE and ext_tag is not None else tag
            if (tag, bits) not in _WAV_FORMATS:
                return (
                    f"WAV format tag {tag} with {bits}-bit samples cannot be followed "
                    "(16/32-bit PCM, 32/64-bit float)"
                )
            fmt, scale = _WAV_FORMATS[(tag, bits)]
            return WavInfo(p + 8, fmt, scale, channels, float(rate))
        if cid == b"fmt ":
            if len(buf) < p + 8 + min(size, 40):
                return None
            if size < 16:
                return f"WAV fmt chunk of {size} bytes is too short"
            tag, channels, rate, _, _, bits = struct.unpack_from("<HHIIHH", buf, p + 8)
            ext = struct.unpack_from("<H", buf, p + 8 + 24)[0] if size >= 40 else None
            fmt_chunk = (tag, channels, rate, bits, ext)
        p += 8 + size + (size & 1)
    return None if len(buf) < _MAX_WAV_HEADER else "no WAV data chunk in the first 1 MiB"


class _Decoder:
    """Bytes of one file, from its start or from an aligned point, to float32 ``[C, n]``."""

    def __init__(self, fmt: str, channels: int) -> None:
        self.fmt, self.channels = fmt, channels
        self.held = b""
        self.parser = TextParser(columns=channels) if fmt == "csv" else None
        self.wav: WavInfo | None = None
        self.failed = ""  # set: this file cannot be read; wait for the next one
        self.skipping = False  # text: inside an over-long line, dropping bytes up to "\n"
        self.head = fmt in RAW_FORMATS  # raw: the file's first bytes, not yet judged

    def take_wav(self, info: WavInfo) -> None:
        self.wav = info

    def feed(self, chunk: bytes) -> np.ndarray | None:
        if self.failed:
            return None
        if self.parser is not None:
            return self._text(chunk, self.parser)
        buf = self.held + chunk
        if self.head:  # a raw file that starts with a framed header is the wrong format
            if len(buf) < HEADER_SIZE and buf[:4] == MAGIC[: len(buf)]:
                self.held = buf
                return None
            self.head = False
            if framed_header_at(buf):
                self.failed = (f"this looks like framed data on a raw source (a framed header "
                               f"at byte 0); this source reads raw {self.fmt}: configure the "
                               "format the file was written in")
                self.held = b""
                return None
        fmt, scale = self.fmt, None
        if self.fmt == "wav":
            if self.wav is None:
                info = parse_wav_header(buf)
                if info is None:
                    self.held = buf
                    return None
                if isinstance(info, str):
                    self.failed, self.held = info, b""
                    return None
                self.wav, buf = info, buf[info.data_offset :]
            fmt, scale = self.wav.fmt, self.wav.full_scale
        data, self.held = decode_raw(buf, fmt, self.channels)
        return data if scale is None else (data / np.float32(scale)).astype(np.float32)

    def _text(self, chunk: bytes, parser: TextParser) -> np.ndarray | None:
        if self.skipping:  # the rest of an over-long line
            nl = chunk.find(b"\n")
            if nl < 0:
                return None
            chunk, self.skipping = chunk[nl + 1 :], False
        buf = self.held + chunk
        cut = buf.rfind(b"\n") + 1
        rows = parser.parse(buf[:cut].decode("utf-8", errors="replace")) if cut else None
        self.held = buf[cut:]
        if len(self.held) > MAX_LINE_BYTES:
            self.held, self.skipping = b"", True
            parser.skip_line(f"longer than {MAX_LINE_BYTES} bytes without a newline; skipped "
                             "up to the next newline (is this a text file?)")
        return rows


class FileSource(QueuedSource):
    """Follows or replays ``path`` in ``fmt`` (one of FILE_FORMATS); ``fs`` in Hz is required
    except for WAV (taken from its header; a given value must agree)."""

    kind = "file"

    def __init__(
        self,
        source_id: str,
        channel_ids: Sequence[str],
        fs: float | None,
        path: str | os.PathLike[str],
        fmt: str,
        *,
        follow: bool = True,
        replay_speed: float = 1.0,
        poll_s: float = 0.05,
        start_at: str = "end",
        block_s: float = 0.1,
        max_read_bytes: int = 1 << 20,
        queue_blocks: int = 256,
        clock: Callable[[], int] = time.time_ns,
        sleep: Callable[[float], Awaitable[None]] = asyncio.sleep,
    ) -> None:
        if fmt not in FILE_FORMATS:
            raise ValueError(f"format={fmt!r} is not one of {', '.join(map(repr, FILE_FORMATS))}")
        if start_at not in START_AT:
            raise ValueError(
                f"start_at={start_at!r} is not one of {', '.join(map(repr, START_AT))}"
            )
        if fs is None and fmt != "wav":
            raise ValueError(f"format {fmt!r} needs the sample rate fs in Hz")
        if not (math.isfinite(replay_speed) and replay_speed >= 0):
            raise ValueError(f"replay_speed={replay_speed!r} must be >= 0 (0: as fast as possible)")
        if not poll_s > 0 or not block_s > 0:
            raise ValueError(f"poll_s={poll_s!r} and block_s={block_s!r} must be > 0 (s)")
        super().__init__(source_id, channel_ids, fs, queue_blocks=queue_blocks, clock=clock)
        # present from the start, so metric series are stable
        self.counters.extra.update(
            dict.fromkeys(("truncations", "rotations", "deletions", "partial_bytes"), 0)
        )
        self.path, self.fmt, self.follow = Path(path), fmt, follow
        self.replay_speed, self.poll_s, self.start_at = replay_speed, poll_s, start_at
        self.block_s, self.max_read_bytes = block_s, max_read_bytes
        self._sleep = sleep
        self._fh: BinaryIO | None = None
        self._pos = 0  # bytes of the current file consumed
        self._decoder = _Decoder(fmt, len(self.channel_ids))
        self._index = 0
        self._delivered = False
        self._skip_existing = False
        self._seen_malformed = 0
        self._replayed = 0
        self._refused: tuple[int, int] | None = None  # (dev, inode) of a refused special file
        self.counters.extra["refused_files"] = 0
        if fmt in ("f32le", "f64le"):
            self.counters.extra["implausible_blocks"] = 0

    # --- lifecycle -------------------------------------------------------------------

    async def _start(self) -> None:
        if not self.follow:
            with contextlib.suppress(FileNotFoundError):  # load_recording reports that
                what = not_regular(os.stat(self.path).st_mode)
                if what:  # a FIFO would block the reading thread until a writer came
                    raise ValueError(f"{self.path} is {what}, not a regular file")
            rec = await asyncio.to_thread(
                load_recording, self.path, fmt=self.fmt, channels=len(self.channel_ids), fs=self._fs
            )
            self._fs = rec.fs
            if rec.problems:
                self._error(rec.problems[-1])
            if self.fmt == "csv":
                self.counters.malformed += rec.skipped
            elif rec.skipped:
                self.counters.partial_frames += 1
            self.counters.bytes += self.path.stat().st_size
            self.state = "replaying"
            self._spawn(self._replay(rec.data))
            return
        self._skip_existing = self.start_at == "end" and self.path.exists()
        self.state = "following"
        self._spawn(self._follow())

    async def _stop(self) -> None:
        self._close_file()

    # --- replay ----------------------------------------------------------------------

    async def _replay(self, data: np.ndarray) -> None:
        fs = float(self._fs or 1.0)
        n_total = data.shape[1]
        step = max(1, round(self.block_s * fs))
        loop = asyncio.get_running_loop()
        t_begin, wall0 = loop.time(), self._clock()
        for k0 in range(0, n_total, step):
            k1 = min(k0 + step, n_total)
            if self.replay_speed > 0:
                delay = t_begin + k1 / fs / self.replay_speed - loop.time()
                await self._sleep(max(delay, 0.0))
            else:
                await asyncio.sleep(0)  # let the loop breathe between blocks
            await self._emit_wait(data[:, k0:k1].copy(), k0, wall0 + round(k0 * 1e9 / fs))
            self._replayed = k1
        self.state = "ended"
        await self._end()

    # --- following -------------------------------------------------------------------

    async def _follow(self) -> None:
        while True:
            try:
                more = self._poll()
            except OSError as e:
                self._error(f"{self.path}: {e}")
                more = False
            if more:
                await asyncio.sleep(0)
            else:
                await self._sleep(self.poll_s)

    def _poll(self) -> bool:
        """One look at the file; True if more bytes are waiting to be read at once."""
        try:
            st: os.stat_result | None = os.stat(self.path)
        except FileNotFoundError:
            st = None
        if self._fh is not None:
            held = os.fstat(self._fh.fileno())
            if st is None or (st.st_dev, st.st_ino) != (held.st_dev, held.st_ino):
                while self._read_some():  # what the old file still holds comes first
                    pass
                self._close_file()
                self._restart("rotations" if st is not None else "deletions")
            elif held.st_size < self._pos:
                self._restart("truncations")
                self._fh.seek(0)
                self._pos = 0
        if self._fh is None:
            if st is None:
                self.state = "waiting for file"
                self._refused = None
                return False
            if not_regular(st.st_mode):
                self._refuse(st)
                return False
            if not self._open():
                return False
        return self._read_some()

    def _refuse(self, st: os.stat_result) -> None:
        """Refuse the special file ``st`` at the path (once per file)."""
        self.state = "unusable file"
        if self._refused == (st.st_dev, st.st_ino):
            return
        self._refused = (st.st_dev, st.st_ino)
        self._bump("refused_files")
        text = (f"{self.path} is {not_regular(st.st_mode)}, not a regular file: not read; "
                "waiting for a regular file at this path")
        self._error(text)
        log.warning("source %s: %s", self.id, text)

    def _open(self) -> bool:
        """Open the path (non-blocking: a FIFO swapped in since the stat cannot hang the
        loop); False if what was opened is not a regular file."""
        fd = os.open(self.path, os.O_RDONLY | os.O_NONBLOCK | os.O_CLOEXEC)
        st = os.fstat(fd)
        if not_regular(st.st_mode):
            os.close(fd)
            self._refuse(st)
            return False
        self._refused = None
        self._fh = os.fdopen(fd, "rb")
        self._pos = 0
        self._decoder = _Decoder(self.fmt, len(self.channel_ids))
        self._seen_malformed = 0
        self.state = "following"
        if self._skip_existing:
            self._skip_existing = False
            self._seek_end()
        log.info("source %s: following %s from byte %d", self.id, self.path, self._pos)
        return True

    def _seek_end(self) -> None:
        fh = self._fh
        assert fh is not None
        size = os.fstat(fh.fileno()).st_size
        if self.fmt == "csv":
            pos = size
            while pos > 0:  # back to just after the last complete line
                lo = max(0, pos - 65536)
                fh.seek(lo)
                cut = fh.read(pos - lo).rfind(b"\n")
                if cut >= 0:
                    pos = lo + cut + 1
                    break
                pos = lo
                if size - pos > MAX_LINE_BYTES:  # the last line is over-long already
                    pos, self._decoder.skipping = size, True
                    break
        elif self.fmt == "wav":
            fh.seek(0)
            info = parse_wav_header(fh.read(min(size, _MAX_WAV_HEADER)))
            if not isinstance(info, WavInfo) or not self._wav_fits(info):
                pos = 0  # header not complete or unusable: read from the start
            else:
                frame = info.channels * SAMPLE_SIZES[info.fmt]
                self._decoder.take_wav(info)
                pos = info.data_offset + (size - info.data_offset) // frame * frame
        else:
            frame = len(self.channel_ids) * SAMPLE_SIZES[self.fmt]
            pos = size - size % frame
            self._decoder.head = pos == 0
        fh.seek(pos)
        self._pos = pos

    def _wav_fits(self, info: WavInfo) -> bool:
        problem = ""
        if info.channels != len(self.channel_ids):
            problem = f"WAV has {info.channels} channels; source declares {len(self.channel_ids)}"
        elif self._fs is not None and abs(info.fs - self._fs) > 1e-9 * self._fs:
            problem = f"WAV sample rate {info.fs:g} Hz differs from the configured {self._fs:g} Hz"
        if problem:
            self._decoder.failed = problem
            self.counters.malformed += 1
            self._error(f"{self.path}: {problem}")
            self.state = "unusable file"
            return False
        self._fs = info.fs
        return True

    def _read_some(self) -> bool:
        fh = self._fh
        if fh is None:
            return False
        chunk = fh.read(self.max_read_bytes)
        if not chunk:
            return False
        self._pos += len(chunk)
        self.counters.bytes += len(chunk)
        dec = self._decoder
        had_wav = dec.wav is not None
        data = dec.feed(chunk)
        if dec.failed and self.state != "unusable file":
            self.counters.malformed += 1
            self._error(f"{self.path}: {dec.failed}")
            self.state = "unusable file"
        if dec.wav is not None and not had_wav and not self._wav_fits(dec.wav):
            return False
        if dec.parser is not None and dec.parser.malformed != self._seen_malformed:
            self.counters.malformed += dec.parser.malformed - self._seen_malformed
            self._seen_malformed = dec.parser.malformed
            self._error(f"{self.path}: {dec.parser.last_problem}")
        if data is not None and data.shape[1] and self._implausible(data):
            self._index += data.shape[1]  # the rejected samples' indices: a gap downstream
        elif data is not None and data.shape[1]:
            n = data.shape[1]
            self._emit(data, self._index, self._arrival_t0_ns(n))
            self._index += n
            self._delivered = True
        return len(chunk) == self.max_read_bytes

    def _implausible(self, data: np.ndarray) -> bool:
        """A raw f32le/f64le block with more than IMPLAUSIBLE_SHARE of its values beyond
        ±IMPLAUSIBLE_ABS is another format's bytes: counted, reported, not emitted."""
        if self.fmt not in ("f32le", "f64le"):
            return False
        bad = implausible_count(data)
        if bad <= IMPLAUSIBLE_SHARE * data.size:
            return False
        self.counters.malformed += 1
        self._bump("implausible_blocks")
        self._warn("implausible",
                   f"{self.path}: {bad} of {data.size} values beyond ±{IMPLAUSIBLE_ABS:g} (or "
                   f"infinite) near byte {self._pos}: implausible as {self.fmt} samples; block "
                   "rejected. Was the file written in another format?")
        return True

    def _restart(self, reason: str) -> None:
        self._bump(reason)
        held = len(self._decoder.held)
        if held:
            self.counters.partial_frames += 1
            self._bump("partial_bytes", held)
        if self._delivered:
            self._index += GAP_SAMPLES
            self.counters.gaps += 1
            self._delivered = False
        self._decoder = _Decoder(self.fmt, len(self.channel_ids))
        self._seen_malformed = 0
        self._error(f"{self.path}: {reason[:-1]} at byte {self._pos}; reading from the start")
        log.warning("source %s: %s: %s, reading from the start", self.id, self.path, reason[:-1])

    def _close_file(self) -> None:
        if self._fh is not None:
            self._fh.close()
            self._fh = None

    def _status_extra(self) -> dict[str, object]:
        extra: dict[str, object] = {
            "path": str(self.path),
            "format": self.fmt,
            "follow": self.follow,
        }
        if self.follow:
            extra["position_bytes"] = self._pos
        else:
            extra["replayed_samples"] = self._replayed
            extra["replay_speed"] = self.replay_speed
        return extra

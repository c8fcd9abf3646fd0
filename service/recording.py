"""Recordings on disk: WAV, raw interleaved sample files and CSV/whitespace text, read into
float32 ``[C, n]`` arrays; a WAV writer for tests and evidence.

Knows nothing about sockets, asyncio, the config file or the engine.

Scaling: WAV integer PCM is scaled to ±1 full scale (uint8: (x − 128)/128; int16: x/2¹⁵;
24- and 32-bit: x/2³¹, as scipy.io.wavfile returns 24-bit samples left-justified in
int32); float WAV, raw files and text keep their values. Text: one row per sample, one
column per channel, separated by commas, semicolons, tabs or spaces, decimal point '.';
blank lines and lines starting with '#' are skipped; the first row may be a header of
channel names. A malformed row is reported with its line number and skipped.
"""

from __future__ import annotations

import io
import os
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import BinaryIO

import numpy as np
import scipy.io.wavfile

from .wire import FILE_FORMATS, RAW_DTYPES, check_raw_format, decode_raw, encode_raw

__all__ = [
    "RECORDING_FORMATS",
    "Recording",
    "TextParser",
    "check_recording_format",
    "format_for_path",
    "load_recording",
    "read_recording",
    "write_wav",
]

RECORDING_FORMATS = FILE_FORMATS
_SUFFIXES = {".wav": "wav", ".csv": "csv", ".txt": "csv", ".tsv": "csv", ".dat": "csv"}
_WAV_INT_SCALE = {"uint8": 128.0, "int16": 2.0**15, "int32": 2.0**31}
MAX_PROBLEMS = 100  # problems kept in a Recording; the count keeps going


def check_recording_format(fmt: object) -> str:
    """Return ``fmt`` if it is a recording format, else raise ValueError listing them."""
    if not isinstance(fmt, str) or fmt not in RECORDING_FORMATS:
        listed = ", ".join(repr(f) for f in RECORDING_FORMATS)
        raise ValueError(f"format={fmt!r} is not one of {listed}")
    return fmt


def format_for_path(path: str | os.PathLike[str]) -> str | None:
    """The format implied by a file name suffix (.wav → wav; .csv/.txt/.tsv/.dat → csv)."""
    return _SUFFIXES.get(Path(path).suffix.lower())


@dataclass
class Recording:
    """A recording read into memory: ``data`` float32 ``[C, n]``, ``fs`` in Hz, channel
    names (from a text header, else ``ch0``, ``ch1``, …), the problems met (at most
    ``MAX_PROBLEMS`` kept) and how many rows/bytes were skipped."""

    data: np.ndarray
    fs: float
    fmt: str
    channel_names: tuple[str, ...]
    problems: list[str] = field(default_factory=list)
    skipped: int = 0


class TextParser:
    """Incremental parser of text rows into float32 ``[C, n]`` (values unscaled).

    Feed it complete lines (:meth:`parse`); it numbers lines across calls for its reports.
    ``columns`` fixes the channel count (else the header or first data row sets it).
    ``malformed`` counts skipped rows; ``problems`` keeps the first ``max_problems``
    reasons and ``last_problem`` the latest, each ``"line N: ..."``. "nan" and "inf" are
    numbers and pass through.
    """

    def __init__(self, columns: int | None = None, max_problems: int = MAX_PROBLEMS) -> None:
        if columns is not None and columns < 1:
            raise ValueError(f"columns={columns!r} must be >= 1")
        self.columns = columns
        self.header: tuple[str, ...] | None = None
        self.line_no = 0  # lines consumed so far
        self.malformed = 0
        self.last_problem = ""
        self.problems: list[str] = []
        self._max_problems = max_problems
        self._seen_content = False

    def _problem(self, text: str) -> None:
        self.malformed += 1
        self.last_problem = text
        if len(self.problems) < self._max_problems:
            self.problems.append(text)

    @staticmethod
    def _split(line: str) -> list[str]:
        if "," in line or ";" in line:
            return [f.strip() for f in line.replace(";", ",").split(",")]
        return line.split()

    def skip_line(self, why: str) -> None:
        """Count the next line as malformed and skipped, ``why`` in the report (e.g. a line
        too long to hold, dropped by the caller)."""
        self.line_no += 1
        self._seen_content = True
        self._problem(f"line {self.line_no}: {why}")

    def parse(self, text: str) -> np.ndarray:
        """Parse complete lines of ``text``; return the good rows as float32 ``[C, n]``."""
        lines = text.splitlines()
        start = self.line_no
        self.line_no += len(lines)
        k = 0
        if not self._seen_content:  # the first content line may be a header
            while k < len(lines) and _blank(lines[k]):
                k += 1
            if k == len(lines):
                return self._empty()
            self._seen_content = True
            fields = self._split(lines[k].strip())
            if not _all_numbers(fields):
                self._take_header(fields, start + k + 1)
                k += 1
            elif self.columns is None:
                self.columns = len(fields)
        rows = self._fast(lines[k:]) if k < len(lines) else None
        if rows is None:
            rows = self._slow(lines, k, start)
        return rows

    def _take_header(self, names: list[str], line_no: int) -> None:
        self.header = tuple(names)
        if self.columns is None:
            self.columns = len(names)
        elif len(names) != self.columns:
            self._problem(
                f"line {line_no}: header names {len(names)} columns, expected {self.columns}"
            )

    def _empty(self) -> np.ndarray:
        return np.zeros((self.columns or 0, 0), dtype=np.float32)

    def _fast(self, lines: list[str]) -> np.ndarray | None:
        """All rows well formed: parse them in one numpy call; else None."""
        body = "\n".join(lines)
        sample = next((ln for ln in lines if not _blank(ln)), None)
        if sample is None:
            return self._empty()
        delimiter = "," if ("," in sample or ";" in sample) else None
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # "input contained no data" on comment-only text
                rows = np.loadtxt(
                    io.StringIO(body.replace(";", ",")),
                    delimiter=delimiter,
                    comments="#",
                    ndmin=2,
                    dtype=np.float64,
                )
        except ValueError:
            return None
        if rows.shape[0] == 0:
            return self._empty()
        if self.columns is None:
            self.columns = rows.shape[1]
        if rows.shape[1] != self.columns:
            return None
        return rows.T.astype(np.float32)

    def _slow(self, lines: list[str], k: int, start: int) -> np.ndarray:
        out: list[list[float]] = []
        for j in range(k, len(lines)):
            line = lines[j]
            if _blank(line):
                continue
            fields = self._split(line.split("#", 1)[0].strip())
            try:
                values = [float(f) for f in fields]
            except ValueError:
                bad = next(f for f in fields if not _is_number(f))
                self._problem(f"line {start + j + 1}: {bad!r} is not a number")
                continue
            if self.columns is None:
                self.columns = len(values)
            if len(values) != self.columns:
                self._problem(
                    f"line {start + j + 1}: {len(values)} values, expected {self.columns}"
                )
                continue
            out.append(values)
        if not out:
            return self._empty()
        return np.asarray(out, dtype=np.float64).T.astype(np.float32)


def _blank(line: str) -> bool:
    s = line.strip()
    return not s or s.startswith("#")


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _all_numbers(fields: Sequence[str]) -> bool:
    return all(_is_number(f) for f in fields)


# --- whole-file readers -----------------------------------------------------------------


def _read_wav(path: Path) -> Recording:
    problems: list[str] = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        fs, x = scipy.io.wavfile.read(path)
    problems += [f"{path.name}: {w.message}" for w in caught]
    x = np.asarray(x)
    x = x[:, None] if x.ndim == 1 else x
    kind = x.dtype.name
    if kind == "uint8":
        data = (x.astype(np.float64) - 128.0) / 128.0
    elif kind in _WAV_INT_SCALE:
        data = x.astype(np.float64) / _WAV_INT_SCALE[kind]
    else:
        data = x.astype(np.float64)
    names = tuple(f"ch{c}" for c in range(data.shape[1]))
    return Recording(data.T.astype(np.float32), float(fs), "wav", names, problems)


def load_recording(
    path: str | os.PathLike[str],
    *,
    fmt: str | None = None,
    channels: int | None = None,
    fs: float | None = None,
) -> Recording:
    """Read a whole recording.

    ``fmt`` is one of RECORDING_FORMATS or None to take it from the suffix (.wav, .csv…).
    WAV takes ``fs`` (Hz) and the channel count from its header (a given ``fs`` or
    ``channels`` must agree); raw formats need ``channels`` and ``fs``; text needs ``fs``
    and takes the channel count from the file unless ``channels`` is given. Raises
    ValueError for an unusable request or a file with no samples; a malformed text row
    or a trailing partial raw sample is reported in ``problems`` and skipped.
    """
    p = Path(path)
    fmt = fmt if fmt is not None else format_for_path(p)
    if fmt is None:
        raise ValueError(
            f"{p.name}: cannot tell the format from the name; give one of "
            + ", ".join(repr(f) for f in RECORDING_FORMATS)
        )
    check_recording_format(fmt)
    if fmt == "wav":
        rec = _read_wav(p)
        if fs is not None and abs(fs - rec.fs) > 1e-9 * rec.fs:
            raise ValueError(f"{p.name}: fs={fs!r} Hz differs from the WAV header's {rec.fs:g} Hz")
    else:
        if fs is None or not (np.isfinite(fs) and fs > 0):
            raise ValueError(f"{p.name}: format {fmt!r} needs the sample rate fs in Hz (> 0)")
        if fmt == "csv":
            parser = TextParser(columns=channels)
            data = parser.parse(p.read_text(encoding="utf-8", errors="replace"))
            names = parser.header or tuple(f"ch{c}" for c in range(data.shape[0]))
            rec = Recording(data, float(fs), fmt, names, parser.problems, parser.malformed)
        else:
            check_raw_format(fmt)
            if channels is None or channels < 1:
                raise ValueError(f"{p.name}: format {fmt!r} needs the channel count")
            data, rest = decode_raw(p.read_bytes(), fmt, channels)
            problems = (
                [f"{p.name}: {len(rest)} trailing bytes (a partial sample) ignored"] if rest else []
            )
            names = tuple(f"ch{c}" for c in range(channels))
            rec = Recording(data, float(fs), fmt, names, problems, len(rest))
    if channels is not None and rec.data.shape[0] != channels:
        raise ValueError(f"{p.name}: has {rec.data.shape[0]} channels, expected {channels}")
    if rec.data.shape[1] == 0:
        raise ValueError(f"{p.name}: no samples")
    return rec


def read_recording(
    path: str | os.PathLike[str],
    *,
    fmt: str | None = None,
    channels: int | None = None,
    fs: float | None = None,
    problems: list[str] | None = None,
) -> tuple[np.ndarray, float]:
    """Read a whole recording as ``(data float32 [C, n], fs Hz)``; see :func:`load_recording`.

    Problems met (malformed rows with line numbers, ignored trailing bytes, WAV warnings)
    are appended to ``problems`` when a list is given.
    """
    rec = load_recording(path, fmt=fmt, channels=channels, fs=fs)
    if problems is not None:
        problems.extend(rec.problems)
    return rec.data, rec.fs


def write_wav(
    path: str | os.PathLike[str] | BinaryIO, data: np.ndarray, fs: float, fmt: str = "f32le"
) -> None:
    """Write float ``[C, n]`` samples as a WAV file at ``fs`` Hz.

    ``fmt`` s16le/s32le store x·2¹⁵ / x·2³¹ rounded (so ±1 is full scale, and values must lie
    in [−1, 1 − 2⁻¹⁵] resp. [−1, 1 − 2⁻³¹]); f32le/f64le store the values as they are.
    """
    check_raw_format(fmt)
    x = np.asarray(data, dtype=np.float64)
    if x.ndim != 2:
        raise ValueError(f"data must be (channels, samples); got shape {x.shape}")
    if fmt == "s16le":
        x = x * 2.0**15
    elif fmt == "s32le":
        x = x * 2.0**31
    # encode_raw checks the integer range and rounds; reuse its bytes as the sample array
    raw = encode_raw(x, fmt)
    samples = np.frombuffer(raw, dtype=RAW_DTYPES[fmt]).reshape(x.shape[1], x.shape[0])
    rate = int(round(fs))
    if abs(rate - fs) > 1e-9 * fs:
        raise ValueError(f"fs={fs!r}: a WAV header holds a whole number of Hz")
    scipy.io.wavfile.write(path, rate, samples)

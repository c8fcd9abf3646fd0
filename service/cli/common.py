"""What every ``quaver`` command shares: the exit-code error, option parsers, progress,
config loading.

No command of its own."""

from __future__ import annotations

import argparse
import math
import sys
from collections.abc import Callable
from typing import IO, Any

import numpy as np

from dsp.bands import Band
from dsp.spec import ToneDef

from ..config import (
    Config,
    ConfigError,
    check_listen_allowed,
    load_config,
    parse_listen,
)
from ..wire import STREAM_FORMATS

DEFAULT_LISTEN = "127.0.0.1:8750"
DEMO_FEED_LISTEN = "127.0.0.1:8751"  # quaver demo's framed TCP input (examples/demo-feed.toml)
CHUNK_S = 1.0  # analyze pushes the recording through the engine this many seconds at a time
FEED_FORMATS: tuple[str, ...] = STREAM_FORMATS
FRAMED_PAYLOAD = "f32le"  # sample format inside framed frames
FEED_BACKOFF_S = (0.2, 5.0)  # first reconnect delay, cap; doubled per failed attempt
FEED_EOF_WAIT_S = 3.0  # after the last block: wait this long for the receiver to close
FEED_ASK_TIMEOUT_S = 3.0  # asking the service which format the target source reads
TOKEN_ENV = "QUAVER_TOKEN"  # a viewer token for feed's question to the service, if it needs one


class CliError(Exception):
    """A failure reported as one line; ``code`` is the exit status (1 run time, 2 usage)."""

    def __init__(self, message: str, code: int = 1) -> None:
        super().__init__(message)
        self.code = code


# --- option parsers -----------------------------------------------------------------------


def parse_band(text: str) -> Band:
    """A band from ``NAME:LO_HZ:HI_HZ`` (edges in Hz, LO < HI), e.g. ``overall:10:1000``."""
    name, sep, rest = text.partition(":")
    lo_s, sep2, hi_s = rest.partition(":")
    if not (name and sep and sep2):
        raise ValueError(f"{text!r} is not NAME:LO_HZ:HI_HZ (e.g. 'overall:10:1000')")
    try:
        lo, hi = float(lo_s), float(hi_s)
    except ValueError:
        raise ValueError(f"{text!r}: band edges must be numbers of Hz (NAME:LO_HZ:HI_HZ)") from None
    if not (math.isfinite(lo) and math.isfinite(hi) and 0 <= lo < hi):
        raise ValueError(f"{text!r}: need 0 <= LO_HZ < HI_HZ")
    return Band(name, lo, hi)


def parse_tone(text: str) -> ToneDef:
    """A tracked tone from ``NAME:HZ`` (a fixed frequency in Hz > 0), e.g. ``mesh:1234.5``."""
    name, sep, hz_s = text.rpartition(":")
    if not (name and sep):
        raise ValueError(f"{text!r} is not NAME:HZ (e.g. 'mesh:1234.5')")
    try:
        hz = float(hz_s)
    except ValueError:
        raise ValueError(f"{text!r}: the tone frequency must be a number of Hz (NAME:HZ)") from None
    if not (math.isfinite(hz) and hz > 0):
        raise ValueError(f"{text!r}: the tone frequency must be > 0 Hz")
    return ToneDef(name, hz=hz)


def _argtype(fn: Callable[[str], Any]) -> Callable[[str], Any]:
    """Wrap a parser so argparse prints its ValueError message instead of a generic one."""

    def parse(text: str) -> Any:
        try:
            return fn(text)
        except ValueError as e:
            raise argparse.ArgumentTypeError(str(e)) from None

    parse.__name__ = fn.__name__
    return parse


def _positive(kind: type, *, allow_zero: bool = False) -> Callable[[str], Any]:
    def parse(text: str) -> Any:
        try:
            v = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
        if not (math.isfinite(v) and (v >= 0 if allow_zero else v > 0)):
            raise argparse.ArgumentTypeError(f"{text!r} must be {'>= 0' if allow_zero else '> 0'}")
        return v

    return parse


def _listen_arg(text: str) -> str:
    try:
        parse_listen(text)
    except ValueError as e:
        raise argparse.ArgumentTypeError(str(e)) from None
    return text


# --- progress -------------------------------------------------------------------------------


class Progress:
    """Percentage done, on ``stream`` (stderr by default).

    On a terminal one line is rewritten in place (``\\r``) whenever the whole percent
    changes; elsewhere (a log, a pipe) a line is written at each quarter, so a log gets a
    few lines and not hundreds. ``total`` and ``done`` are in any one unit (samples).
    """

    def __init__(self, label: str, total: int, stream: IO[str] | None = None) -> None:
        self.label = label
        self.total = max(int(total), 1)
        self.stream = stream if stream is not None else sys.stderr
        self.tty = self.stream.isatty()
        self._shown = -1  # last percentage written (terminal) or last quarter (elsewhere, x25)
        self._open = False

    def update(self, done: int) -> None:
        """Report ``done`` of ``total``."""
        pct = min(100, 100 * int(done) // self.total)
        if self.tty:
            if pct != self._shown:
                self.stream.write(f"\r{self.label}: {pct:3d} %")
                self.stream.flush()
                self._shown, self._open = pct, True
        elif pct // 25 * 25 > max(self._shown, 0):
            self._shown = pct // 25 * 25
            self.stream.write(f"{self.label}: {self._shown} %\n")
            self.stream.flush()

    def close(self) -> None:
        """End the in-place line on a terminal."""
        if self._open:
            self.stream.write("\n")
            self.stream.flush()
            self._open = False


def _say(text: str) -> None:
    print(text, file=sys.stderr, flush=True)


def _num(v: float) -> float | None:
    """JSON has no NaN: unresolved values (a tone above Nyquist) are null."""
    return float(v) if np.isfinite(v) else None


def _load(path: str) -> Config:
    """load_config plus the loopback rule, every problem naming the file."""
    cfg = load_config(path)
    try:
        check_listen_allowed(cfg)
    except ConfigError as e:
        raise ConfigError(e.problems, source=str(path)) from None
    return cfg


def _config_error(e: ConfigError) -> int:
    print(str(e), file=sys.stderr)
    return 2

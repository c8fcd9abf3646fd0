"""The ``quaver`` argument parser and ``main``: which command runs, exit codes, one-line
errors.

Every option carries help text with its unit."""

from __future__ import annotations

import argparse
import importlib.metadata
import sys
import typing
from collections.abc import Sequence

from dsp.types import (
    AMPLITUDES,
    AVERAGING_MODES,
    INPUT_UNITS,
    OUTPUT_UNITS,
    QUANTITIES,
    WINDOW_NAMES,
)

from ..config import (
    ConfigError,
)
from ..recording import RECORDING_FORMATS
from .analyze import cmd_analyze
from .bench import cmd_bench
from .common import (
    DEFAULT_LISTEN,
    DEMO_FEED_LISTEN,
    FEED_FORMATS,
    TOKEN_ENV,
    CliError,
    _argtype,
    _config_error,
    _listen_arg,
    _positive,
    _say,
    parse_band,
    parse_tone,
)
from .feed import cmd_feed
from .run import cmd_check, cmd_demo, cmd_serve


def _recording_options(p: argparse.ArgumentParser, format_flag: str) -> None:
    p.add_argument("file", help="recording: WAV (integer PCM read as +-1 full scale), raw "
                   "interleaved little-endian samples, or CSV/whitespace text (one row per "
                   "sample, one column per channel, optional header row)")
    p.add_argument(format_flag, choices=RECORDING_FORMATS, default=None,
                   help="recording format (default: from the extension: .wav, .csv/.txt/.tsv/"
                   ".dat; raw files need it)")
    p.add_argument("--rate", type=_positive(float), default=None, metavar="HZ",
                   help="sample rate in Hz, samples per second per channel (raw and text "
                   "files; a WAV file's header gives it)")
    p.add_argument("--channels", type=_positive(int), default=None, metavar="N",
                   help="channel count (raw files; text takes it from the columns)")


def _feed_listen_arg(text: str) -> str:
    return text if text == "none" else _listen_arg(text)


def _version() -> str:
    """The installed distribution's version (pyproject's), or a plain note without one."""
    try:
        return importlib.metadata.version("quaver")
    except importlib.metadata.PackageNotFoundError:  # run from a tree that was never installed
        return "(not installed)"


class _Parser(argparse.ArgumentParser):
    """argparse with usage errors as one line (the reason and where to find help)."""

    def error(self, message: str) -> typing.NoReturn:
        self.exit(2, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of ``quaver`` (every option carries help text with its unit)."""
    ap = _Parser(
        prog="quaver",
        description="quaver: continuous machinery-vibration monitoring (spectra, bands, tones, "
        "alarms). A monitoring aid, not a machine-protection or safety system.",
    )
    ap.add_argument("--version", action="version", version=f"quaver {_version()}",
                    help="print the installed quaver's version (from the package metadata) "
                    "and exit")
    sub = ap.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("demo", help="run the service on a simulated plant (no config needed)",
                       description="Run the service with the built-in simulated plant (an "
                       "invented pumping station whose bearing fault grows over a few minutes) "
                       "and print the dashboard address. Ctrl-C stops.")
    p.add_argument("--listen", type=_listen_arg, default=None, metavar="HOST:PORT",
                   help=f"HTTP address for the dashboard and API (default {DEFAULT_LISTEN}, or "
                   "$QUAVER_LISTEN); a non-loopback address is refused without tokens")
    p.add_argument("--data-dir", default=None, metavar="DIR",
                   help="folder for trends, events and evidence (default quaver-data, or "
                   "$QUAVER_DATA_DIR)")
    p.add_argument("--speed", type=_positive(float), default=None, metavar="X",
                   help="time-lapse factor of the simulated fault growth, x real time "
                   "(default 1; e.g. 10 reaches danger in about 20 s)")
    p.add_argument("--feed-listen", type=_feed_listen_arg, default=None,
                   metavar="HOST:PORT",
                   help="loopback address of the demo's framed TCP input (channel rig-h, "
                   f"12800 Hz), for quaver feed (default {DEMO_FEED_LISTEN}, left out with a "
                   "note when that port is taken; 'none' leaves it out)")
    p.add_argument("--variable-speed", action="store_true",
                   help="accepted and changes nothing: the variable-speed fan v1 with its "
                   "tacho is part of the demo now")
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("serve", help="run the service from a config file",
                       description="Validate the config (as `check` does), then run the "
                       "service until Ctrl-C or SIGTERM.")
    p.add_argument("-c", "--config", required=True, metavar="FILE", help="TOML config file")
    p.set_defaults(func=cmd_serve)

    p = sub.add_parser("check", help="validate a config file and summarise it",
                       description="Validate a config; print the sources and, per channel, "
                       "the analysis set-up (fs, Fmax, lines, line spacing, window, frame length "
                       "N and hop in samples, bands, tones). Exit 2 listing every problem with "
                       "its key path.")
    p.add_argument("-c", "--config", required=True, metavar="FILE", help="TOML config file")
    p.set_defaults(func=cmd_check)

    p = sub.add_parser(
        "analyze", help="analyse a recording offline with the service's engine",
        description="Analyse a recording through the running service's own pipeline (sensor "
        "checks, decimation, profile, bands, tones, peaks), in 1 s blocks, with the command-line "
        "options merged over the settings (of the -c config channel's profile, if given). "
        "Averaging defaults to linear over the whole recording (the mean spectrum of every "
        "frame), also with -c. The spectrum lists lines q = 0..lines at f = q*df Hz. Bands and "
        "the overall (the band named 'overall', else lowcut..Fmax; never below the "
        "low-frequency limit) are RMS; peaks and tracked tones are in --amplitude; a value "
        "that cannot be measured is null with a reason. Samples are multiplied by "
        "--sensitivity before analysis.",
    )
    _recording_options(p, "--format")
    p.add_argument("-c", "--config", default=None, metavar="FILE",
                   help="take analysis settings, bands, tones, input unit, sensitivity and "
                   "running speed from a config channel (command-line options override)")
    p.add_argument("--channel", default=None, metavar="ID",
                   help="config channel whose settings apply to every recording channel "
                   "(default: a text header's names, or the config's only channel)")
    p.add_argument("--profile", default=None, metavar="NAME",
                   help="the config channel's analysis profile to apply (default: its primary "
                   "one)")
    p.add_argument("--sensitivity", type=float, default=None, metavar="UNITS",
                   help="input units (g or m/s2) per raw sample unit; for WAV per full scale "
                   "(default 1, or the config channel's)")
    p.add_argument("--input-unit", choices=INPUT_UNITS, default=None,
                   help="acceleration unit of the samples after --sensitivity (default g)")
    p.add_argument("--fmax", type=_positive(float), default=None, metavar="HZ",
                   help="highest frequency shown, Hz (default fs/2.56; at most fs/2.56; below "
                   "it the recording is decimated first, as the service does)")
    p.add_argument("--lines", type=int, default=None, metavar="LINES",
                   help="spectral lines, a multiple of 25 (frame N = 2.56*lines samples; "
                   "default 1600)")
    p.add_argument("--window", choices=WINDOW_NAMES, default=None, help="DFT window (default hann)")
    p.add_argument("--overlap", type=float, default=None, metavar="FRACTION",
                   help="frame overlap, fraction in [0, 1) (default 0.75)")
    p.add_argument("--averaging", choices=AVERAGING_MODES, default=None,
                   help="linear (mean of --averages frames, then held) | exponential (state at "
                   "the end of the recording) | peak-hold (default linear)")
    p.add_argument("--averages", type=_positive(int), default=None, metavar="FRAMES",
                   help="frames in a linear average (default: every frame of the recording) or "
                   "equivalent frames of an exponential one (default 8)")
    p.add_argument("--unit", choices=(*QUANTITIES, *OUTPUT_UNITS), default=None,
                   help="quantity (acceleration -> g, velocity -> mm/s, displacement -> um) or "
                   "unit g | m/s2 | mm/s | in/s | um | mil (default velocity)")
    p.add_argument("--amplitude", choices=AMPLITUDES, default=None,
                   help="amplitude type of the spectrum, peaks and tones (default rms)")
    p.add_argument("--lowcut", type=_positive(float, allow_zero=True), default=None,
                   metavar="HZ", help="low-frequency cut for integration and every value, Hz "
                   "(default 2; the window's main lobe can raise it: docs/low-frequency.md)")
    p.add_argument("--band", type=_argtype(parse_band), action="append", metavar="NAME:LO:HI",
                   help="a band, edges in Hz (repeatable), e.g. overall:10:1000")
    p.add_argument("--tone", type=_argtype(parse_tone), action="append", metavar="NAME:HZ",
                   help="a tracked tone at a fixed frequency in Hz (repeatable), e.g. mesh:1234.5")
    p.add_argument("--peaks", type=int, default=None, metavar="K",
                   help="number of largest spectral peaks reported, 0..256 (default 8)")
    p.add_argument("--json", action="store_true",
                   help="print one JSON document (per channel: spectrum, bands, peaks, tones) "
                   "instead of tables; progress still goes to stderr")
    p.set_defaults(func=cmd_analyze)

    p = sub.add_parser(
        "feed", help="send a recording to a TCP source (a ready test producer)",
        description="Stream a recording to a quaver TCP source at real-time pace or faster. A "
        "dropped connection is re-made (bounded retries with backoff) and the block whose send "
        "failed is sent again whole; blocks the dead connection had already buffered are lost "
        "(framed: the receiver sees the gap by sample index).",
    )
    _recording_options(p, "--file-format")
    p.add_argument("--to", required=True, type=_listen_arg, metavar="HOST:PORT",
                   help="address of the TCP source")
    p.add_argument("--format", choices=FEED_FORMATS, default="f32le",
                   help="on the wire: raw interleaved little-endian s16le | s32le | f32le | f64le "
                   "(values sent as they are after --scale; integers rounded) or framed "
                   "(quaver's frame header with rate, first-sample index and time; f32le "
                   "payload) (default f32le)")
    p.add_argument("--speed", type=_positive(float, allow_zero=True), default=1.0, metavar="X",
                   help="pace as a multiple of real time; 0 = as fast as possible (default 1)")
    p.add_argument("--block-ms", type=_positive(float), default=100.0, metavar="MS",
                   help="samples per send, in ms of recording (default 100)")
    p.add_argument("--loop", type=_positive(int, allow_zero=True), nargs="?", const=0,
                   default=None, metavar="N",
                   help="repeat the recording with continuing sample indices: N passes in all, "
                   "or until Ctrl-C without N")
    p.add_argument("--scale", type=float, default=1.0, metavar="FACTOR",
                   help="multiply every sample before sending (e.g. 32768 to send a WAV read as "
                   "+-1 full scale as s16le counts) (default 1)")
    p.add_argument("--retries", type=_positive(int, allow_zero=True), default=10, metavar="N",
                   help="failed connection attempts in a row before giving up (default 10)")
    p.add_argument("--api", default=None, metavar="URL",
                   help="the service's HTTP address, asked (GET /api/v1/health) which format, "
                   "channel count and rate the --to source takes before anything is sent: a "
                   "mismatch is an error, no "
                   "answer a warning; 'none' skips the check (default http://HOST:8750 with "
                   f"the --to host; a viewer token, if needed, from ${TOKEN_ENV})")
    p.set_defaults(func=cmd_feed)

    p = sub.add_parser("bench", help="benchmark the spectral engine against a bare rfft, or "
                       "(--service) load a running service",
                       description="Engine throughput and cost relative to the bare batched "
                       "rfft of the same frames (dsp.bench); with --service, a load benchmark of "
                       "a real service started on 127.0.0.1 (the bench package).")
    which = p.add_mutually_exclusive_group()
    which.add_argument("--service", action="store_true",
                       help="load-test a real service in a child process: ingest headroom over "
                       "TCP at real time, sample-to-WebSocket latency, fan-out to 50 clients, "
                       "memory after 10^4 and 10^6 frames (several minutes)")
    which.add_argument("--dashboard", action="store_true",
                       help="the plant view in headless Chromium (/usr/bin/chromium, Playwright) "
                       "against a generated plant fed at real time: first full render, "
                       "main-thread busy share, frame rate, retained heap, bytes/s, service CPU "
                       "with the page open and closed, abnormal machines in the first screen")
    which.add_argument("--orders", action="store_true",
                       help="an order profile's CPU per frame against an ordinary spectrum's, "
                       "in-process on the demo's variable-speed fan (--channels: fan channels "
                       "on one tacho, default 1,8; --seconds of signal, default 20; --repeats, "
                       "default 3), and the order lines' amplitude error on a 600-1800 r/min "
                       "sweep (bench/orders.py)")
    p.add_argument("--opcua", action="store_true",
                   help="with --service: instead of the load phases, the service's CPU per "
                   "frame with the [opcua] server off, on, and on without spectra, with a "
                   "client subscribed to every channel's overall and bands (--channels one "
                   "count, default 256; --seconds per run, default 20); with --mqtt too: "
                   "off, MQTT alone, OPC UA alone and both on")
    p.add_argument("--short", action="store_true", help="quick run: 1 and 8 channels, 0.5 s "
                   "(with --service: the CI-sized run, 16 and 32 channels, 10 clients, memory "
                   "after 10^3 and 10^5 frames, under a minute)")
    p.add_argument("--json", nargs="?", const=True, default=False, metavar="FILE",
                   help="print the report as JSON (with --dashboard: FILE also writes it there, "
                   "next to the printed table)")
    p.add_argument("--channels", default=None, metavar="LIST",
                   help="comma-separated channel counts (default 1,8,64; with --service the "
                   "headroom steps, default 32,64,128,192,256; with --dashboard one count, "
                   "default 256)")
    p.add_argument("--machines", type=_positive(int), default=None, metavar="N",
                   help="with --dashboard: machines the channels are spread over (default 64)")
    p.add_argument("--danger", type=_positive(int, allow_zero=True), default=None, metavar="N",
                   help="with --dashboard: machines fed over their danger level (default 3)")
    p.add_argument("--alert", type=_positive(int, allow_zero=True), default=None, metavar="N",
                   help="with --dashboard: machines fed over their alert level (default 10)")
    p.add_argument("--minutes", type=_positive(float), default=None, metavar="M",
                   help="with --dashboard: how long the page is measured, min (default 5; "
                   "e.g. 0.5 for a quick look)")
    p.add_argument("--screenshot", default=None, metavar="FILE",
                   help="with --dashboard: save a PNG of the first screen at the full render")
    p.add_argument("--seconds", type=_positive(float), default=None, metavar="S",
                   help="signal length per case, s (default 2; with --service the real-time "
                   "span of each headroom step, default 20)")
    p.add_argument("--repeats", type=_positive(int), default=None, metavar="N",
                   help="best of this many runs (default 5)")
    p.add_argument("--mqtt", default=None, metavar="HOST:PORT",
                   help="with --service: instead of the load phases, the service's CPU per "
                   "frame with [mqtt] publishing off and on, at --channels (one count, default "
                   "256) fed at real time for --seconds (default 15); 'auto' starts a "
                   "mosquitto of its own on 127.0.0.1")
    p.add_argument("--cluster", default=None, metavar="ADDRESS",
                   help="with --service: the service under test runs its sources on Ray "
                   "([cluster] engine = \"ray\"; 'local' starts a Ray of --workers processes "
                   "on this machine; 'process': one process, the baseline to compare with); "
                   "measures headroom and latency only, with the head's and the workers' CPU "
                   "per frame (needs the 'ray' extra)")
    p.add_argument("--workers", type=_positive(int), default=None, metavar="N",
                   help="with --cluster: worker processes (actors) the sources are dealt to "
                   "(default 1)")
    p.set_defaults(func=cmd_bench)
    return ap


def main(argv: Sequence[str] | None = None) -> int:
    """Run ``quaver`` with ``argv`` (default sys.argv[1:]); returns the exit status."""
    parser = build_parser()
    try:
        args = parser.parse_args(list(argv) if argv is not None else None)
    except SystemExit as e:  # argparse has printed usage and the reason
        return e.code if isinstance(e.code, int) else 2
    if args.command is None:
        parser.print_help(sys.stderr)
        return 2
    try:
        return int(args.func(args))
    except CliError as e:
        _say(f"quaver {args.command}: {e}")
        return e.code
    except ConfigError as e:
        return _config_error(e)
    except KeyboardInterrupt:
        if args.command == "feed" and args.loop == 0:
            _say("feed: stopped")
            return 0
        _say(f"quaver {args.command}: interrupted")
        return 130
    except (OSError, ValueError) as e:  # bad input or a failing file/socket: one line
        _say(f"quaver {args.command}: {e}")
        return 1

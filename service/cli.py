"""The ``quaver`` console script: demo, serve, check, analyze, feed and bench.

Knows the config, recordings, wire formats and the engine's public API; holds no server code
(the running service is ``service.app``) and no DSP of its own (``analyze`` feeds the
service's ``SourcePipeline`` and reads its frames as the REST API does).

Exit codes: 0 done; 1 a run-time failure (file, network); 2 bad usage or a bad config;
130 interrupted. Every error is one readable line on stderr (a config error: one problem
per line), never a traceback.
"""

from __future__ import annotations

import argparse
import functools
import importlib
import json
import math
import os
import select
import socket
import sys
import time
import typing
import urllib.error
import urllib.request
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import IO, Any

import numpy as np
from pydantic import ValidationError

from dsp.analyzer import ToneDef, resolve_unit
from dsp.bands import Band
from dsp.filterbank import FMAX_RATIO
from dsp.types import (
    AMPLITUDES,
    AVERAGING_MODES,
    INPUT_UNITS,
    OUTPUT_UNITS,
    QUANTITIES,
    WINDOW_NAMES,
)

from .config import (
    QUANTITY_OF_UNIT,
    AnalysisSettings,
    Config,
    ConfigError,
    SimulatedSourceConfig,
    channel_ids,
    channel_settings,
    check_listen_allowed,
    effective_analysis,
    load_config,
    open_source_warnings,
    parse_config,
    parse_listen,
    profiles_of,
)
from .pipeline import ChannelState, SourcePipeline, channel_states
from .profiles import ProfileBank, plan_profiles, plan_warnings
from .recording import RECORDING_FORMATS, Recording, load_recording
from .spectra import band_items, overall_item, peak_items, spectrum_values, tone_items
from .types import SampleBlock, SourceCounters, SpectralFrame
from .wire import RAW_FORMATS, encode_frame, encode_raw

__all__ = [
    "CliError",
    "Progress",
    "build_parser",
    "feed_recording",
    "main",
    "parse_band",
    "parse_tone",
]

DEFAULT_LISTEN = "127.0.0.1:8750"
CHUNK_S = 1.0  # analyze pushes the recording through the engine this many seconds at a time
FEED_FORMATS: tuple[str, ...] = (*RAW_FORMATS, "framed")
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
        isatty = getattr(self.stream, "isatty", None)
        self.tty = bool(isatty and isatty())
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


# --- demo / serve / check -------------------------------------------------------------------


def _app() -> Any:
    try:
        app = importlib.import_module("service.app")
    except ImportError as e:
        raise CliError(f"the running service is not available in this install ({e})") from None
    return app


def cmd_demo(args: argparse.Namespace) -> int:
    app = _app()
    try:
        cfg = app.demo_config(listen=args.listen, data_dir=args.data_dir, speed=args.speed)
        check_listen_allowed(cfg)
    except ConfigError as e:
        return _config_error(e)
    host, _ = parse_listen(cfg.service.listen)
    if host not in ("127.0.0.1", "localhost", "::1"):
        # The demo's operator token is published in its config: never serve it off this box.
        print(f"quaver demo: listens on loopback only (its token is public), not {host!r}",
              file=sys.stderr)
        return 2
    token = getattr(app, "DEMO_OPERATOR_TOKEN", None)

    def announce(s: str) -> None:
        print(s, flush=True)
        if token:
            # the demo has [[tokens]], so its dashboard asks for one (README "Access")
            print(f"demo operator token (sign in with it; it may acknowledge alarms): {token}",
                  flush=True)

    return int(app.run_service(cfg, announce=announce))


def cmd_serve(args: argparse.Namespace) -> int:
    try:
        cfg = _load(args.config)
    except ConfigError as e:
        return _config_error(e)
    return int(_app().run_service(cfg, announce=lambda s: print(s, flush=True),
                                  config_path=args.config))


def _source_fs(src: Any, cfg: Config, ch: str) -> tuple[float, str]:
    """(fs in Hz, how it was found) for a channel's source; for `check` only."""
    if src.sample_rate_hz is not None:
        return float(src.sample_rate_hz), ""
    if isinstance(src, SimulatedSourceConfig):
        from .sources.simulated import DEMO_FS

        return DEMO_FS, " (the scenario's rate)"
    fmax = effective_analysis(cfg, ch).fmax_hz  # a WAV file: the header decides at run time
    return FMAX_RATIO * fmax, " (assumed 2.56*fmax_hz; the WAV header decides)"


def cmd_check(args: argparse.Namespace) -> int:
    try:
        cfg = _load(args.config)
    except ConfigError as e:
        return _config_error(e)
    out: list[str] = [f"{args.config}: OK"]
    out.append(f"service: listen {cfg.service.listen}, data_dir {cfg.service.data_dir}, "
               f"{len(cfg.tokens)} token(s)")
    out.append(f"sources: {len(cfg.sources)}")
    for s in cfg.sources:
        where = getattr(s, "listen", None) or getattr(s, "path", None) or getattr(s, "scenario", "")
        rate = f"{s.sample_rate_hz:g} Hz" if s.sample_rate_hz else "rate from the source"
        chans = ", ".join(s.channels) or "every channel of the scenario"
        fmt = getattr(s, "format", "")
        out.append(f"  {s.id}: {s.kind} {where} {fmt} {rate}; channels {chans}".replace("  ;", ";"))
    ids = channel_ids(cfg)
    out.append(f"channels: {len(ids)}")
    problems: list[str] = []
    warnings = 0
    for cid in ids:
        src = next(s for s in cfg.sources if cid in s.channels)
        fs, how = _source_fs(src, cfg, cid)
        try:
            plans = plan_profiles(cfg, cid, fs)
        except ValueError as e:
            problems.append(f"channels {cid!r}: {e}")
            continue
        head = f"  {cid} ({src.id}): fs {fs:g} Hz{how}"
        if len(plans) > 1:
            out.append(head)
        for p in plans:
            g, spec = p.spec.grid, p.spec
            dec = f"decimated x{p.factor} ({'*'.join(map(str, p.stages))}) to {g.fs:g} Hz, " if (
                p.factor > 1) else ""
            what = (
                f"{dec}Fmax {p.fmax_hz:g} Hz, {g.lines} lines, "
                f"df {g.df_hz:g} Hz, {spec.window}, N {g.n}, hop {g.hop}, "
                f"{spec.averaging} {spec.averages:g}, {resolve_unit(spec.unit)} {spec.amplitude}, "
                f"{len(p.bands)} band(s), {len(spec.tones)} tone(s)"
            )
            if len(plans) == 1:
                out.append(f"{head}, {what}")
            else:
                out.append(f"    {p.name}{' (primary)' if p.primary else ''}: {what}")
            out += [f"    note: {n}" for n in p.notes]
            warned = plan_warnings(p, channel_settings(cfg, cid).speed_rpm)
            warnings += len(warned)
            out += [f"    warning: {w}" for w in warned]
    out.append(f"alarms: {len(cfg.alarms)}")
    source_warnings = open_source_warnings(cfg)
    out += [f"warning: {w}" for w in source_warnings]
    warnings += len(source_warnings)
    if warnings:
        out[0] = f"{args.config}: OK, with {warnings} warning(s) below"
    print("\n".join(out))
    if problems:
        return _config_error(ConfigError(problems, source=str(args.config)))
    return 0


# --- analyze --------------------------------------------------------------------------------
#
# `quaver analyze` runs the recording through the service's own path: a config (the -c file's
# channel, or one made from the options) with the command-line options merged into its
# analysis settings, then service.pipeline.SourcePipeline.process block by block (sensor
# checks, gaps, ProfileBank: decimation and every profile, frames) and the REST payload
# helpers of service.spectra for the values. Nothing here computes a number of its own.

_OPTION_OF = {
    "fmax_hz": "--fmax", "lines": "--lines", "window": "--window", "overlap": "--overlap",
    "averaging": "--averaging", "averages": "--averages", "unit": "--unit",
    "output_unit": "--unit", "amplitude": "--amplitude", "lowcut_hz": "--lowcut",
    "peaks": "--peaks",
}
RECORDING_SOURCE = "recording"  # the source id analyze gives the recording
MAX_AVERAGES = 100_000  # AnalysisSettings.averages' upper bound


@dataclass
class _Run:
    """Recording rows analysed as one source of the service (one SourcePipeline)."""

    rows: list[int]
    ids: list[str]  # the config's channel id of each row
    cfg: Config
    config_channel: str | None


def _settings(base: dict[str, Any], over: dict[str, Any]) -> AnalysisSettings:
    try:
        return AnalysisSettings.model_validate({**base, **over})
    except ValidationError as e:
        err = e.errors()[0]
        key = str(err["loc"][0]) if err["loc"] else "?"
        raise CliError(f"{_OPTION_OF.get(key, key)}: {err['msg']} (got {err.get('input')!r})",
                       2) from None


def _cli_overrides(args: argparse.Namespace, rec: Recording) -> dict[str, Any]:
    over: dict[str, Any] = {}
    for key, value in (("fmax_hz", args.fmax), ("lines", args.lines), ("window", args.window),
                       ("overlap", args.overlap), ("amplitude", args.amplitude),
                       ("lowcut_hz", args.lowcut), ("peaks", args.peaks)):
        if value is not None:
            over[key] = value
    if args.unit is not None:
        if args.unit in QUANTITIES:
            over.update(unit=args.unit, output_unit=None)
        else:
            over.update(unit=QUANTITY_OF_UNIT[args.unit], output_unit=args.unit)
    # A recording's mean spectrum is what an analyst wants: linear over every frame (an
    # upper bound of the frame count; the average is the mean of the frames there are) and
    # held. The config's live averaging applies only when asked for on the command line.
    mode = args.averaging or "linear"
    over["averaging"] = mode
    if args.averages is not None:
        over["averages"] = args.averages
    elif mode == "linear":
        over["averages"] = max(1, min(rec.data.shape[1], MAX_AVERAGES))
    over["linear_end"] = "hold"
    return over


def _check_fmax(args: argparse.Namespace, rec: Recording) -> None:
    if args.fmax is not None and args.fmax > rec.fs / FMAX_RATIO * (1 + 1e-9):
        raise CliError(f"--fmax {args.fmax:g} Hz needs a sample rate of at least 2.56*fmax = "
                       f"{FMAX_RATIO * args.fmax:g} Hz; the recording runs at {rec.fs:g} Hz", 2)


def _cli_items(args: argparse.Namespace, channel: str, fmax_hz: float
               ) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    bands, tones = [], []
    for b in args.band or []:
        if b.hi > fmax_hz * (1 + 1e-9):
            raise CliError(f"--band {b.name}:{b.lo:g}:{b.hi:g}: {b.hi:g} Hz is above Fmax "
                           f"{fmax_hz:g} Hz", 2)
        bands.append({"channel": channel, "name": b.name, "lo_hz": b.lo, "hi_hz": b.hi})
    for t in args.tone or []:
        if t.hz > fmax_hz * (1 + 1e-9):
            raise CliError(f"--tone {t.name}:{t.hz:g}: {t.hz:g} Hz is above Fmax {fmax_hz:g} Hz",
                           2)
        tones.append({"channel": channel, "name": t.name, "hz": t.hz})
    return bands, tones


def _source(ids: list[str], fs: float) -> dict[str, Any]:
    # a source entry only names the channels and their rate: nothing is ever opened
    return {"id": RECORDING_SOURCE, "kind": "tcp", "listen": "127.0.0.1:9", "format": "f32le",
            "sample_rate_hz": fs, "channels": ids}


def _validated(doc: dict[str, Any], source: str, over: dict[str, Any]) -> Config:
    """parse_config with the options' names in place of the settings they override."""
    try:
        return parse_config(doc, env={}, source=source)
    except ConfigError as e:
        problems = []
        for p in e.problems:
            path, sep, rest = p.partition(": ")
            key = path.rsplit(".", 1)[-1]
            if sep and key in over and key in _OPTION_OF and ".analysis." in f".{path}":
                p = f"{_OPTION_OF[key]}: {rest}"
            problems.append(p)
        raise CliError("; ".join(problems), 2) from None


def _plain_run(args: argparse.Namespace, rec: Recording, over: dict[str, Any]) -> _Run:
    """Every recording channel with the options' settings (no config file)."""
    if args.channel is not None or args.profile is not None:
        raise CliError(f"{'--channel' if args.channel else '--profile'} needs -c/--config", 2)
    s = _settings({"fmax_hz": rec.fs / FMAX_RATIO}, over)
    rows = list(range(rec.data.shape[0]))
    ids = [f"ch{r + 1}" for r in rows]
    sens = 1.0 if args.sensitivity is None else args.sensitivity
    bands, tones = _cli_items(args, "*", s.fmax_hz)
    doc = {
        "analysis": s.model_dump(),
        "sources": [_source(ids, rec.fs)],
        "channels": [{"id": i, "input_unit": args.input_unit or "g", "sensitivity": sens}
                     for i in ids],
        "bands": bands,
        "tones": tones,
    }
    return _Run(rows, ids, _validated(doc, "the command-line options", over), None)


def _config_run(args: argparse.Namespace, cfg: Config, row: int, cid: str,
                over: dict[str, Any], fs: float) -> _Run:
    """One recording row as config channel ``cid``, its profile (--profile or the primary
    one) only, the options merged over the profile's settings (the later wins)."""
    runs = profiles_of(cfg, cid)
    if args.profile is not None and args.profile not in runs:
        raise CliError(f"--profile {args.profile!r}: channel {cid!r} of {args.config} "
                       f"has no such profile (profiles: {', '.join(map(repr, runs))})", 2)
    prof = args.profile or runs[0]
    base = effective_analysis(cfg, cid, prof).model_dump()
    s = _settings(base, over)
    ch = channel_settings(cfg, cid)
    settings = s.model_dump()
    channel = {**ch.model_dump(exclude={"analysis", "profiles"}), "analysis": settings}
    if args.input_unit is not None:
        channel["input_unit"] = args.input_unit
    if args.sensitivity is not None:
        channel["sensitivity"] = args.sensitivity
    has_speed = ch.speed_rpm is not None
    cli_bands, cli_tones = _cli_items(args, cid, s.fmax_hz)
    cli_names = {b["name"] for b in cli_bands} | {t["name"] for t in cli_tones}

    def keep(item: Any, is_order: bool, top: float | None) -> bool:
        if item.channel not in ("*", cid) or item.profile not in ("*", prof):
            return False
        if item.channel == cid and item.name in cli_names:
            return False  # the option's band or tone of that name replaces it
        if is_order and not has_speed:
            return False  # a '*' order item skips a channel without speed
        # a profile = "*" item goes to the profiles whose Fmax reaches it (config.bands_for)
        return item.profile != "*" or top is None or top <= s.fmax_hz * (1 + 1e-9)

    rps = (ch.speed_rpm or 0.0) / 60.0
    bands = []
    for b in cfg.bands:
        if b.octave is not None:  # a set: its bands up to Fmax (bands_for drops the rest)
            item = b.model_dump(exclude_none=True)
            if b.profile == "*" and b.hi_hz is not None and b.hi_hz > s.fmax_hz:
                item["hi_hz"] = s.fmax_hz
            if keep(b, False, None) and (b.lo_hz or 0.0) < s.fmax_hz:
                bands.append(item)
            continue
        is_order = b.hi_order is not None
        top = b.hi_order * rps if b.hi_order is not None else b.hi_hz
        if keep(b, is_order, top):
            bands.append(b.model_dump(exclude_none=True))
    tones = [t.model_dump(exclude_none=True) for t in cfg.tones
             if keep(t, t.order is not None, t.hz if t.hz is not None else (t.order or 0) * rps)]
    doc: dict[str, Any] = {
        "analysis": cfg.analysis.model_dump(),
        "sources": [_source([cid], fs)],
        "channels": [channel],
        "bands": bands + cli_bands,
        "tones": tones + cli_tones,
    }
    if cfg.profiles:  # the one profile, under its own name, with the merged settings
        doc["profiles"] = {prof: settings}
        channel["profiles"] = [prof]
    return _Run([row], [cid], _validated(doc, f"{args.config} with the command-line options",
                                         over), cid)


def _plan(args: argparse.Namespace, rec: Recording) -> list[_Run]:
    """The runs: all rows alike without a config; one per row, as its config channel, with."""
    _check_fmax(args, rec)
    over = _cli_overrides(args, rec)
    if args.config is None:
        return [_plain_run(args, rec, over)]
    cfg = load_config(args.config)
    known = list(dict.fromkeys([*channel_ids(cfg), *(c.id for c in cfg.channels)]))
    listed = ", ".join(map(repr, known)) or "none"
    if args.channel is not None:
        if args.channel not in known:
            raise CliError(f"--channel {args.channel!r} is not a channel of {args.config} "
                           f"(channels: {listed})", 2)
        chosen = [args.channel] * rec.data.shape[0]
    elif all(n in known for n in rec.channel_names):
        chosen = list(rec.channel_names)  # a text header naming the config's channels
    elif len(known) == 1:
        chosen = known * rec.data.shape[0]
    else:
        raise CliError(f"{args.config} has several channels; choose one with --channel "
                       f"(channels: {listed})", 2)
    return [_config_run(args, cfg, row, cid, over, rec.fs) for row, cid in enumerate(chosen)]


async def _no_publish(*_: object) -> None:  # frames are read back, not published
    return None


@dataclass
class _RecordingSource:
    """The recording as the pipeline's source (service.sources.base.Source): it names the
    channels and the rate; cmd_analyze hands the blocks to SourcePipeline.process itself."""

    id: str
    channel_ids: tuple[str, ...]
    fs: float | None
    counters: SourceCounters = field(default_factory=SourceCounters)

    def __aiter__(self) -> _RecordingSource:
        return self

    async def __anext__(self) -> SampleBlock:
        raise StopAsyncIteration

    async def start(self) -> None:
        return None

    async def aclose(self) -> None:
        return None

    def status(self) -> dict[str, object]:
        return {"id": self.id, "kind": "recording", "counters": self.counters.as_dict()}


def _analyse(run: _Run, rec: Recording, progress: Callable[[int], None]
             ) -> tuple[dict[str, SpectralFrame], dict[str, ChannelState]]:
    """Feed the run's rows to a SourcePipeline in CHUNK_S blocks; the newest primary frame
    of each channel, and the channels' states (sensor checks, counters, notes)."""
    states = channel_states(run.cfg, RECORDING_SOURCE, run.ids, fs=rec.fs)
    pipe = SourcePipeline(
        _RecordingSource(RECORDING_SOURCE, tuple(run.ids), rec.fs), states, _no_publish,
        make_bank=functools.partial(ProfileBank, run.cfg, run.ids), cfg=run.cfg,
    )
    latest: dict[str, SpectralFrame] = {}
    n_total = rec.data.shape[1]
    chunk = max(1, int(round(CHUNK_S * rec.fs)))
    ids = tuple(run.ids)
    for start in range(0, n_total, chunk):
        x = np.ascontiguousarray(rec.data[run.rows, start : start + chunk], dtype=np.float32)
        for f in pipe.process(SampleBlock(RECORDING_SOURCE, ids, x, start, 0, rec.fs)):
            if f.primary:
                latest[f.channel] = f
        progress(min(start + chunk, n_total))
    return latest, states


def _channel_result(name: str, run: _Run, frame: SpectralFrame, st: ChannelState
                    ) -> dict[str, Any]:
    info = st.profile_info.get(frame.profile, {})
    values, unit, amp = spectrum_values(frame)
    overall = overall_item(frame)
    return {
        "channel": name,
        "config_channel": run.config_channel,
        "profile": frame.profile,
        "fs_hz": frame.fs,
        "decimation": info.get("decimation", 1),
        "df_hz": frame.df_hz,
        "f0_hz": frame.f0_hz,
        "lines": frame.lines,
        "fmax_hz": frame.fmax_hz,
        "n": frame.n,
        "hop": info.get("hop"),
        "window": frame.window,
        "averaging": frame.averaging,
        "averages": frame.averages,
        "input_unit": frame.input_unit,
        "sensitivity": st.sensitivity,
        "unit": unit,
        "amplitude": amp,
        "lowcut_hz": frame.lowcut_hz,
        "overall": overall["overall"],
        "overall_band_hz": [overall["overall_lo_hz"], overall["overall_hi_hz"]],
        **({"overall_reason": overall["overall_reason"]} if "overall_reason" in overall else {}),
        "band_amplitude": "rms",
        "bands": band_items(frame),
        "tones": tone_items(frame),
        "peaks": peak_items(frame),
        # the worker thread's view of the samples (service.quality: the rest of a channel's
        # state is about time, which a recording does not have); frame.quality: the frame's
        "quality": frame.quality,
        "status": st.data_status,
        "fault": st.data_fault,
        "counters": {"nonfinite_blocks": st.nonfinite_blocks, "range_blocks": st.range_blocks,
                     "flat_blocks": st.flat_blocks, "clipped_blocks": st.clipped_blocks,
                     "sensor_faults": st.sensor_faults, "gaps": st.gaps},
        "notes": list(st.notes),
        "spectrum": [_num(v) for v in values.tolist()],
    }


def _fmt(v: float | None, digits: int = 5) -> str:
    return "-" if v is None else f"{v:.{digits}g}"


def _table(r: dict[str, Any]) -> str:
    u, a = r["unit"], r["amplitude"]
    lo, hi = r["overall_band_hz"]
    cfg = f" (config channel {r['config_channel']})" if r["config_channel"] else ""
    out = [
        f"{r['channel']}{cfg}: fs {r['fs_hz']:g} Hz, Fmax {r['fmax_hz']:g} Hz, {r['lines']} "
        f"lines, df {r['df_hz']:g} Hz, {r['window']}, N {r['n']}, hop {r['hop']}, "
        f"{r['averaging']} average of {r['averages']} frame(s)",
        f"  overall {_fmt(lo, 4)}-{_fmt(hi, 5)} Hz: {_fmt(r['overall'])} {u} rms"
        + (f" ({r['overall_reason']})" if r.get("overall_reason") else ""),
        f"  low-frequency limit {r['lowcut_hz']:g} Hz (nothing below it is measured)",
    ]
    if r["status"] != "ok":
        out.append(f"  status: {r['status']}" + (f" ({r['fault']})" if r["fault"] else ""))
    out += [f"  note: {n}" for n in r["notes"]]
    if r["bands"]:
        out.append(f"  bands ({u} rms)")
        for b in r["bands"]:
            edges = f"{_fmt(b['lo_hz'], 6)}-{_fmt(b['hi_hz'], 6)} Hz"
            why = f"  ({b['reason']})" if "reason" in b else ""
            out.append(f"    {b['name']:<20} {edges:>18} {_fmt(b['value']):>11}{why}")
    if r["peaks"]:
        out.append(f"  peaks ({u} {a})")
        out += [f"    {p['frequency_hz']:12.3f} Hz {_fmt(p['amplitude']):>11}" for p in r["peaks"]]
    if r["tones"]:
        out.append(f"  tones ({u} {a})")
        out += [f"    {t['name']:<20} {_fmt(t['frequency_hz'], 8):>12} Hz "
                f"{_fmt(t['amplitude']):>11}" + (f"  ({t['reason']})" if "reason" in t else "")
                for t in r["tones"]]
    return "\n".join(out)


def _read(path: str, fmt: str | None, channels: int | None, fs: float | None) -> Recording:
    try:
        return load_recording(path, fmt=fmt, channels=channels, fs=fs)
    except FileNotFoundError:
        raise CliError(f"{path}: no such file") from None


def cmd_analyze(args: argparse.Namespace) -> int:
    """Offline analysis through the service's own pipeline; see the subcommand help."""
    rec = _read(args.file, args.format, args.channels, args.rate)
    if args.sensitivity is not None and not (math.isfinite(args.sensitivity)
                                             and args.sensitivity != 0):
        raise CliError(f"--sensitivity {args.sensitivity!r} must be a finite non-zero number", 2)
    try:
        runs = _plan(args, rec)
    except ConfigError as e:
        return _config_error(e)
    for p in rec.problems:
        _say(f"{args.file}: {p}")
    n_total = rec.data.shape[1]
    chunk = max(1, int(round(CHUNK_S * rec.fs)))
    progress = Progress(f"analyze {os.path.basename(str(args.file))}", n_total * len(runs)) \
        if n_total > chunk else None
    results: list[dict[str, Any]] = [{} for _ in range(rec.data.shape[0])]
    for i, run in enumerate(runs):
        def step(done: int, before: int = i * n_total) -> None:
            if progress:
                progress.update(before + done)

        latest, states = _analyse(run, rec, step)
        for row, cid in zip(run.rows, run.ids, strict=True):
            frame = latest.get(cid)
            if frame is None:
                info = next(iter(states[cid].profile_info.values()), {})
                raise CliError(f"the recording holds {n_total} samples per channel, fewer than "
                               f"one frame of N = {info.get('n')} ({info.get('lines')} lines) "
                               f"at {info.get('sample_rate_hz')} Hz; use fewer --lines")
            results[row] = _channel_result(rec.channel_names[row], run, frame, states[cid])
    if progress:
        progress.close()
    if args.json:
        doc = {"file": str(args.file), "format": rec.fmt, "fs_hz": rec.fs,
               "samples": int(n_total), "duration_s": n_total / rec.fs,
               "problems": rec.problems, "channels": results}
        print(json.dumps(doc, allow_nan=False))  # strict JSON: a value not measured is null
    else:
        head = (f"{args.file}: {rec.data.shape[0]} channel(s), {rec.fs:g} Hz, "
                f"{n_total / rec.fs:.3f} s ({n_total} samples), {rec.fmt}")
        print("\n".join([head, *(_table(r) for r in results)]))
    return 0


# --- feed -----------------------------------------------------------------------------------


class _Link:
    """A blocking TCP connection that reconnects: at most ``retries`` failed attempts in a row,
    waiting 0.2 s, 0.4 s, … (at most 5 s) between them."""

    def __init__(self, host: str, port: int, retries: int, say: Callable[[str], None]) -> None:
        self.host, self.port, self.retries, self.say = host, port, retries, say
        self.sock: socket.socket | None = None
        self.connections = 0
        self.drops = 0

    @property
    def where(self) -> str:
        return f"{self.host}:{self.port}"

    def _drop(self, why: str) -> None:
        if self.sock is not None:
            self.sock.close()
            self.sock = None
        self.drops += 1
        self.say(f"feed: connection to {self.where} lost ({why})")

    def _connect(self) -> None:
        delay, cap = FEED_BACKOFF_S
        failures = 0
        while True:
            if self.connections or failures:  # a reconnect, or a retry of the first connect
                time.sleep(delay)
                delay = min(2 * delay, cap)
            try:
                self.sock = socket.create_connection((self.host, self.port), timeout=10.0)
                self.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
                self.connections += 1
                if self.connections > 1:
                    self.say(f"feed: reconnected to {self.where}")
                return
            except OSError as e:
                failures += 1
                if failures > self.retries:
                    raise CliError(f"cannot connect to {self.where} after {failures} "
                                   f"attempt(s): {e}") from None
                self.say(f"feed: cannot connect to {self.where} ({e}); attempt {failures} of "
                         f"{self.retries}, next in {delay:g} s")

    def _peer_closed(self) -> str | None:
        """Why the receiver has gone, if it has (its FIN or RST is already here)."""
        assert self.sock is not None
        try:
            readable, _, _ = select.select([self.sock], [], [], 0)
            if not readable:
                return None
            data = self.sock.recv(65536, socket.MSG_DONTWAIT)
        except BlockingIOError:
            return None
        except OSError as e:
            return f"{type(e).__name__}: {e}"
        return "closed by the receiver" if not data else None  # data: ignored

    def send(self, payload: bytes, first_index: int) -> None:
        """Send one block whole; on a drop, reconnect and send the whole block again."""
        while True:
            if self.sock is None:
                self._connect()
                if self.connections > 1:
                    self.say(f"feed: resuming at sample {first_index} (this block is sent whole; "
                             "blocks the lost connection had buffered are not resent)")
            why = self._peer_closed()
            if why is None:
                try:
                    self.sock.sendall(payload)  # type: ignore[union-attr]
                    return
                except OSError as e:
                    why = f"{type(e).__name__}: {e}"
            self._drop(why)

    def finish(self) -> bool:
        """Half-close and wait (bounded) for the receiver to close; False if it reset."""
        if self.sock is None:
            return True
        sock, self.sock = self.sock, None
        try:
            sock.shutdown(socket.SHUT_WR)
            sock.settimeout(FEED_EOF_WAIT_S)
            while sock.recv(65536):
                pass
            return True
        except TimeoutError:
            return True  # the receiver keeps the connection open: nothing more to learn
        except OSError as e:
            self.say(f"feed: the receiver reset the connection after the last block ({e}); "
                     "the last blocks may not have arrived")
            return False
        finally:
            sock.close()


def feed_recording(
    data: np.ndarray,
    fs: float,
    host: str,
    port: int,
    *,
    fmt: str = "f32le",
    block_ms: float = 100.0,
    speed: float = 1.0,
    passes: int = 1,
    retries: int = 10,
    say: Callable[[str], None] = _say,
    progress: Progress | None = None,
) -> tuple[int, int]:
    """Send ``data`` (float ``[C, n]`` in the receiver's raw units) to a TCP receiver.

    Blocks hold round(block_ms·fs/1000) samples per channel. Block b, ending at stream
    sample k_end, is sent k_end/fs/``speed`` seconds after the start (``speed`` 0: at once).
    ``fmt`` is a raw format (s16le | s32le | f32le | f64le: interleaved samples, integer
    formats rounded, out-of-range values refused) or ``framed`` (service.wire frames with
    f32le payload, ``fs``, the first-sample index since the stream began and the first
    sample's time in ns: the wall time at the start plus index/fs). ``passes`` repeats the
    recording with continuing indices (0: until interrupted). Returns (samples sent per
    channel, reconnects). A lost connection is re-made (see :class:`_Link`) and the block
    whose send failed is sent again whole.
    """
    if fmt not in FEED_FORMATS:
        raise ValueError(f"format={fmt!r} is not one of {', '.join(map(repr, FEED_FORMATS))}")
    x = np.asarray(data, dtype=np.float64)
    c, n = x.shape
    block = max(1, int(round(block_ms * fs / 1000.0)))
    if fmt != "framed":  # refuse unsendable values before connecting
        encode_raw(np.array([[np.min(x), np.max(x)]]), fmt)
    link = _Link(host, port, retries, say)
    t_start = time.monotonic()
    wall_ns = time.time_ns()
    index = 0
    p = 0
    while passes == 0 or p < passes:
        for k in range(0, n, block):
            part = x[:, k : k + block]
            end = index + part.shape[1]
            if speed > 0:
                delay = t_start + end / fs / speed - time.monotonic()
                if delay > 0:
                    time.sleep(delay)
            if fmt == "framed":
                payload = encode_frame(part, FRAMED_PAYLOAD, fs, index,
                                       wall_ns + round(index * 1e9 / fs))
            else:
                payload = encode_raw(part, fmt)
            link.send(payload, index)
            index = end
            if progress is not None:
                progress.update(index)
        p += 1
    if progress is not None:
        progress.close()
    if not link.finish():
        raise CliError("the receiver reset the connection at the end; some samples may be lost")
    return index, max(link.connections - 1, 0)


def _wildcard(host: str) -> bool:
    return host in ("", "0.0.0.0", "::", "[::]")


def find_source(sources: dict[str, Any], host: str, port: int) -> tuple[str, dict[str, Any]] | None:
    """The entry of ``/api/v1/health``'s ``sources`` listening on ``host:port``: same port and
    the same host, a wildcard listen, or else the only source on that port."""
    on_port = []
    for sid, st in sources.items():
        listen = st.get("listen") if isinstance(st, dict) else None
        if not isinstance(listen, str) or ":" not in listen:
            continue
        lhost, _, lport = listen.rpartition(":")
        if lport.isdigit() and int(lport) == port:
            on_port.append((sid, st, lhost.strip("[]")))
    exact = [(sid, st) for sid, st, h in on_port if h == host or _wildcard(h)]
    if len(exact) == 1:
        return exact[0]
    return (on_port[0][0], on_port[0][1]) if len(on_port) == 1 else None


def ask_source(api: str, host: str, port: int,
               token: str | None) -> tuple[str, dict[str, Any]] | str:
    """The service's status of the source at ``host:port`` (from ``GET api/v1/health``), or
    why it could not be known."""
    url = api.rstrip("/") + "/api/v1/health"
    req = urllib.request.Request(url, headers={"Accept": "application/json"})
    if token:
        req.add_header("Authorization", f"Bearer {token}")
    try:
        with urllib.request.urlopen(req, timeout=FEED_ASK_TIMEOUT_S) as r:  # noqa: S310 - http(s) only
            doc = json.loads(r.read(1 << 22))
    except urllib.error.HTTPError as e:
        need = f" (set {TOKEN_ENV} to a viewer token)" if e.code in (401, 403) else ""
        return f"{url} answered {e.code}{need}"
    except (OSError, ValueError) as e:
        return f"no answer from {url} ({e})"
    sources = doc.get("sources") if isinstance(doc, dict) else None
    if not isinstance(sources, dict):
        return f"{url} lists no sources"
    found = find_source(sources, host, port)
    if found is None:
        return f"the service at {api} has no source listening on {host}:{port}"
    return found


def check_feed_target(api: str, host: str, port: int, fmt: str, token: str | None,
                      channels: int, fs: float, say: Callable[[str], None] = _say) -> None:
    """Refuse (CliError) to send ``fmt``, ``channels`` channels at ``fs`` Hz to a source
    that reads another format, channel count or rate; warn when the service cannot tell."""
    got = ask_source(api, host, port, token)
    if isinstance(got, str):
        say(f"feed: warning: cannot check which format {host}:{port} reads: {got}; sending "
            f"{fmt} unchecked (--api names the service's HTTP address)")
        return
    sid, st = got
    kind, want = st.get("kind"), st.get("format")
    if kind != "tcp":
        raise CliError(f"{host}:{port} is source {sid!r} of kind {kind!r}; quaver feed sends "
                       "over TCP to a kind = \"tcp\" source")
    if want != fmt:
        hint = (" (it would read the frame headers as samples)" if fmt == "framed" else
                " (it would look for frame headers in raw samples)" if want == "framed" else "")
        raise CliError(f"source {sid!r} at {host}:{port} reads {want}, not {fmt}{hint}; "
                       f"send with --format {want}, or change the source's format")
    names, rate = st.get("channels"), st.get("fs")
    if isinstance(names, list) and len(names) != channels:
        raise CliError(f"source {sid!r} at {host}:{port} takes {len(names)} channel(s) "
                       f"({', '.join(map(str, names))}); the recording has {channels}"
                       + (" (raw samples would be de-interleaved wrongly)" if want != "framed"
                          else ""))
    if isinstance(rate, int | float) and abs(rate - fs) > 1e-9 * rate:
        raise CliError(f"source {sid!r} at {host}:{port} runs at {rate:g} Hz; the recording "
                       f"is {fs:g} Hz (resample it, or use --rate for a raw or text file)")
    say(f"feed: source {sid!r} at {host}:{port} reads {want}, {channels} channel(s) at "
        f"{fs:g} Hz: matches")


def cmd_feed(args: argparse.Namespace) -> int:
    host, port = parse_listen(args.to)
    rec = _read(args.file, args.file_format, args.channels, args.rate)
    if args.api != "none":
        api = args.api or f"http://{host if not _wildcard(host) else '127.0.0.1'}:8750"
        check_feed_target(api, host, port, args.format, os.environ.get(TOKEN_ENV) or None,
                          rec.data.shape[0], rec.fs)
    for p in rec.problems:
        _say(f"{args.file}: {p}")
    passes = 1 if args.loop is None else args.loop
    pace = "as fast as possible" if args.speed == 0 else f"x{args.speed:g} real time"
    c, n = rec.data.shape
    _say(f"feed: {args.file} ({c} ch, {rec.fs:g} Hz, {n / rec.fs:.3f} s) to {host}:{port} as "
         f"{args.format}, {args.block_ms:g} ms blocks, {pace}"
         + ("" if passes == 1 else (", looping" if passes == 0 else f", {passes} passes")))
    progress = Progress("feed", n * passes) if passes else None
    sent, reconnects = feed_recording(
        rec.data * args.scale if args.scale != 1.0 else rec.data, rec.fs, host, port,
        fmt=args.format, block_ms=args.block_ms, speed=args.speed, passes=passes,
        retries=args.retries, progress=progress,
    )
    _say(f"feed: done: {sent} samples per channel, {reconnects} reconnect(s)")
    return 0


# --- bench ----------------------------------------------------------------------------------


def cmd_bench(args: argparse.Namespace) -> int:
    if args.service:
        from . import loadbench

        if args.repeats is not None:
            raise CliError("--repeats applies to the engine benchmark, not --service", 2)
        steps = None
        if args.channels is not None:
            try:
                steps = [int(c) for c in args.channels.split(",")]
            except ValueError:
                raise CliError(f"--channels {args.channels!r}: expected counts like 32,64,128",
                               2) from None
            if any(c < 1 for c in steps):
                raise CliError(f"--channels {args.channels!r}: counts must be >= 1", 2)
        return int(loadbench.main(short=args.short, as_json=args.json, steps=steps,
                                  step_s=args.seconds))
    from dsp import bench

    argv: list[str] = []
    for opt in ("channels", "seconds", "repeats"):
        v = getattr(args, opt)
        if v is not None:
            argv += [f"--{opt}", str(v)]
    argv += ["--short"] * args.short + ["--json"] * args.json
    return int(bench.main(argv))


# --- parser ---------------------------------------------------------------------------------


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
                       "a real service started on 127.0.0.1 (service.loadbench).")
    p.add_argument("--service", action="store_true",
                   help="load-test a real service in a child process: ingest headroom over TCP "
                   "at real time, sample-to-WebSocket latency, fan-out to 50 clients, memory "
                   "after 10^4 and 10^6 frames (several minutes)")
    p.add_argument("--short", action="store_true", help="quick run: 1 and 8 channels, 0.5 s "
                   "(with --service: the CI-sized run, 16 and 32 channels, 10 clients, memory "
                   "after 10^3 and 10^5 frames, under a minute)")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.add_argument("--channels", default=None, metavar="LIST",
                   help="comma-separated channel counts (default 1,8,64; with --service the "
                   "headroom steps, default 32,64,128,192,256)")
    p.add_argument("--seconds", type=_positive(float), default=None, metavar="S",
                   help="signal length per case, s (default 2; with --service the real-time "
                   "span of each headroom step, default 20)")
    p.add_argument("--repeats", type=_positive(int), default=None, metavar="N",
                   help="best of this many runs (default 5)")
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

"""``quaver demo``, ``quaver serve`` and ``quaver check``: run the service, or check a
config file without running it.

The running service is ``service.app``, imported only when a command runs it."""

from __future__ import annotations

import argparse
import importlib
import socket
import sys
from types import ModuleType

from dsp.grid import FMAX_RATIO
from dsp.spec import resolve_unit

from ..config import (
    Config,
    ConfigError,
    SimulatedSourceConfig,
    SourceConfig,
    channel_ids,
    channel_settings,
    check_listen_allowed,
    open_source_warnings,
    parse_listen,
)
from ..lookups import effective_analysis
from ..profiles import plan_profiles, plan_warnings
from .common import DEMO_FEED_LISTEN, _config_error, _load


def _runner() -> ModuleType:
    # imported when a command runs the service: check, analyze and feed need no server
    return importlib.import_module("service.runner")


def _port_free(listen: str) -> bool:
    """Can a TCP listener bind ``host:port`` now? (A hint only: it may be taken meanwhile.)"""
    host, port = parse_listen(listen)
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    with socket.socket(family, socket.SOCK_STREAM) as s:
        s.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)  # as the TCP source binds
        try:
            s.bind((host, port))
        except OSError:
            return False
    return True


def _demo_feed_listen(asked: str | None) -> str | None:
    """The demo input's address: as asked ('none': none); by default DEMO_FEED_LISTEN, or
    none with a note when that port is taken (the demo must start all the same)."""
    if asked is not None:
        return None if asked == "none" else asked
    if _port_free(DEMO_FEED_LISTEN):
        return DEMO_FEED_LISTEN
    print(f"quaver demo: {DEMO_FEED_LISTEN} is taken; starting without the TCP input for "
          "quaver feed (choose another address with --feed-listen HOST:PORT)",
          file=sys.stderr, flush=True)
    return None


def _lowest_rpm(cfg: Config, cid: str) -> tuple[float | None, str]:
    """The speed whose orders reach lowest and where it comes from: speed_rpm, else the
    lowest plausible one (the tacho's rpm_min for speed_from, the channel's own for an
    estimated or manual speed): a warning at that speed may not apply at the usual one."""
    ch = channel_settings(cfg, cid)
    if ch.speed_rpm is not None:
        return ch.speed_rpm, ""
    if ch.speed_from is not None:
        return (channel_settings(cfg, ch.speed_from).rpm_min,
                f", the rpm_min of tacho {ch.speed_from}")
    if ch.speed is not None:
        return ch.rpm_min, f", the channel's rpm_min for a {ch.speed} speed"
    return None, ""


def cmd_demo(args: argparse.Namespace) -> int:
    runner = _runner()
    from ..demo import DEMO_OPERATOR_TOKEN, demo_config

    feed_listen = _demo_feed_listen(args.feed_listen)
    try:
        # --variable-speed is accepted and changes nothing: the fan v1 is in every demo
        cfg = demo_config(listen=args.listen, data_dir=args.data_dir, speed=args.speed,
                          feed_listen=feed_listen)
        check_listen_allowed(cfg)
    except ConfigError as e:
        return _config_error(e)
    for listen in (cfg.service.listen, feed_listen):
        host, _ = parse_listen(listen) if listen else ("127.0.0.1", 0)
        if host not in ("127.0.0.1", "localhost", "::1"):
            # The demo's operator token is published in its config: never serve it off this
            # box; nor take samples from beyond it.
            print(f"quaver demo: listens on loopback only (its token is public), not {host!r}",
                  file=sys.stderr)
            return 2
    token: str = DEMO_OPERATOR_TOKEN

    def announce(s: str) -> None:
        print(s, flush=True)
        # the demo has [[tokens]], so its dashboard asks for one (README "Access")
        print(f"demo operator token (sign in with it; it may acknowledge alarms): {token}",
              flush=True)
        host_port = cfg.service.listen
        print(f"or open http://{host_port}/#token={token} to sign in at once", flush=True)
        if feed_listen:
            # the token lets feed ask the service which format the input reads
            print(f"framed TCP input (channel rig-h, 12800 Hz): QUAVER_TOKEN={token} quaver "
                  f"feed FILE.wav --to {feed_listen} --format framed --api "
                  f"http://{host_port}", flush=True)

    return int(runner.run_service(cfg, announce=announce))


def cmd_serve(args: argparse.Namespace) -> int:
    try:
        cfg = _load(args.config)
    except ConfigError as e:
        return _config_error(e)
    return int(_runner().run_service(cfg, announce=lambda s: print(s, flush=True),
                                  config_path=args.config))


def _source_fs(src: SourceConfig, cfg: Config, ch: str) -> tuple[float, str]:
    """(fs in Hz, how it was found) for a channel's source; for `check` only."""
    if src.sample_rate_hz is not None:
        return float(src.sample_rate_hz), ""
    if isinstance(src, SimulatedSourceConfig):
        from ..sources.simulated import DEMO_FS

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
        ch = channel_settings(cfg, cid)
        if ch.kind == "tacho":
            level = "auto" if ch.trigger_level is None else f"{ch.trigger_level:g}"
            out.append(f"{head}, tacho, {ch.pulses_per_rev} pulse(s)/rev, "
                       f"{ch.rpm_min:g}-{ch.rpm_max:g} r/min, trigger level {level}")
            continue
        if ch.speed_source in ("tacho", "estimated", "manual"):
            head += (f", speed from tacho {ch.speed_from}" if ch.speed_from
                     else f", speed {ch.speed_source}")
        if len(plans) > 1:
            out.append(head)
        for p in plans:
            g, spec = p.spec.grid, p.spec
            dec = f"decimated x{p.factor} ({'*'.join(map(str, p.stages))}) to {g.fs:g} Hz, " if (
                p.factor > 1) else ""
            env = p.envelope
            if env is not None:  # an envelope profile: its demodulation band first
                band = (f"band {env.band[0]:g}-{env.band[1]:g} Hz" if env.band is not None
                        else f"band auto (kurtogram of {env.length_s:g} s every "
                             f"{env.interval_s:g} s)")
                dec = f"envelope, {band}, {dec}"
            o = p.order
            if o is not None:  # an order profile: the signal it resamples, then the angle grid
                sig = (f"signal decimated x{p.factor} to {p.fs_in / p.factor:g} Hz, "
                       if p.factor > 1 else "")
                what = (
                    f"order, from tacho {o.tacho}, {sig}{g.fs:g} samples/rev, omax "
                    f"{p.fmax_hz:g}, {g.lines} lines, {g.df_hz:g} orders, {spec.window}, "
                    f"{g.n / g.fs:g} revs a frame, hop {g.hop / g.fs:g} revs, {spec.averaging} "
                    f"{spec.averages:g} within ±{o.speed_band_pct:g} % speed, "
                    f"{resolve_unit(spec.unit)} {spec.amplitude}, {len(p.bands)} band(s), "
                    f"{len(spec.tones)} tone(s)"
                )
            else:
                what = (
                    f"{dec}Fmax {p.fmax_hz:g} Hz, {g.lines} lines, "
                    f"df {g.df_hz:g} Hz, {spec.window}, N {g.n}, hop {g.hop}, "
                    f"{spec.averaging} {spec.averages:g}, {resolve_unit(spec.unit)} "
                    f"{spec.amplitude}, {len(p.bands)} band(s), {len(spec.tones)} tone(s)"
                )
            if len(plans) == 1:
                out.append(f"{head}, {what}")
            else:
                out.append(f"    {p.name}{' (primary)' if p.primary else ''}: {what}")
            out += [f"    note: {n}" for n in p.notes]
            warned = plan_warnings(p, *_lowest_rpm(cfg, cid))
            warnings += len(warned)
            out += [f"    warning: {w}" for w in warned]
    out.append(f"alarms: {len(cfg.alarms)}")
    if cfg.notify:
        out.append(f"notify: {len(cfg.notify)}")
    for n in cfg.notify:  # schemes only: a URL may hold a password
        schemes = ", ".join(sorted({u.split("://", 1)[0] for u in n.urls}))
        targets = " + ".join(filter(None, [f"{len(n.urls)} URL(s) ({schemes})" if n.urls
                                           else "", f"${n.urls_env}" if n.urls_env else ""]))
        out.append(f"  {n.name}: {targets}; events {', '.join(n.events)}; from {n.min_level}"
                   + (f"; quiet {n.quiet_hours.start}-{n.quiet_hours.end}"
                      if n.quiet_hours else ""))
    source_warnings = open_source_warnings(cfg)
    out += [f"warning: {w}" for w in source_warnings]
    warnings += len(source_warnings)
    if warnings:
        out[0] = f"{args.config}: OK, with {warnings} warning(s) below"
    print("\n".join(out))
    if problems:
        return _config_error(ConfigError(problems, source=str(args.config)))
    return 0

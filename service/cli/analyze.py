"""``quaver analyze``: a recording through the service's own analysis path, offline.

Holds no DSP of its own: feeds ``service.pipeline.SourcePipeline`` and reads its frames as
the REST API does."""

from __future__ import annotations

import argparse
import functools
import json
import math
import os
import sys
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from pydantic import ValidationError

from dsp.grid import FMAX_RATIO
from dsp.tacho import TachoTracker
from dsp.types import (
    QUANTITIES,
)

from ..config import (
    QUANTITY_OF_UNIT,
    AnalysisSettings,
    Config,
    ConfigError,
    channel_ids,
    channel_settings,
    load_config,
    parse_config,
    planning_rpm,
    profiles_of,
)
from ..lookups import effective_analysis
from ..pipeline import ChannelState, SourcePipeline, channel_states
from ..profiles import ProfileBank
from ..recording import Recording, load_recording
from ..spectra import (
    band_items,
    frame_speed,
    overall_item,
    peak_items,
    spectrum_values,
    tone_items,
)
from ..speed import tacho_settings
from ..types import SampleBlock, SourceCounters, SpectralFrame
from .common import CHUNK_S, CliError, Progress, _config_error, _num, _say

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
    # the config's bands and tones that lie beyond this run's Fmax, as null JSON items with
    # their reason, and the warning line each gives
    beyond: list[tuple[str, dict[str, Any]]] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)


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
                over: dict[str, Any], fs: float, chosen: list[str]) -> _Run:
    """One recording row as config channel ``cid``, its profile (--profile or the primary
    one) only, the options merged over the profile's settings (the later wins). A channel
    whose speed comes from a tacho (``speed_from``) takes the tacho's row with it."""
    runs = profiles_of(cfg, cid)
    if args.profile is not None and args.profile not in runs:
        raise CliError(f"--profile {args.profile!r}: channel {cid!r} of {args.config} "
                       f"has no such profile (profiles: {', '.join(map(repr, runs))})", 2)
    prof = args.profile or runs[0]
    base = effective_analysis(cfg, cid, prof).model_dump()
    base_fmax_hz = float(base["fmax_hz"])
    s = _settings(base, over)
    ch = channel_settings(cfg, cid)
    settings = s.model_dump()
    channel = {**ch.model_dump(exclude={"analysis", "profiles"}), "analysis": settings}
    if args.input_unit is not None:
        channel["input_unit"] = args.input_unit
    if args.sensitivity is not None:
        channel["sensitivity"] = args.sensitivity
    plan_rpm = planning_rpm(cfg, cid)
    has_speed = plan_rpm is not None
    rows, ids, extra_channels = [row], [cid], []
    if ch.speed_from is not None:
        if ch.speed_from not in chosen:
            raise CliError(f"channel {cid!r} takes its speed from tacho {ch.speed_from!r}, "
                           "which is not a channel of the recording (name it in the file's "
                           "header)", 2)
        rows.append(chosen.index(ch.speed_from))
        ids.append(ch.speed_from)
        tacho = channel_settings(cfg, ch.speed_from)
        extra_channels.append(tacho.model_dump(exclude={"analysis", "profiles"}))
    cli_bands, cli_tones = _cli_items(args, cid, s.fmax_hz)
    cli_names = {b["name"] for b in cli_bands} | {t["name"] for t in cli_tones}

    rps = (plan_rpm or 0.0) / 60.0
    beyond: list[tuple[str, dict[str, Any]]] = []

    def keep(item: Any, is_order: bool, top: float | None) -> bool:
        if item.channel not in ("*", cid) or item.profile not in ("*", prof):
            return False
        if item.channel == cid and item.name in cli_names:
            return False  # the option's band or tone of that name replaces it
        if s.kind == "order":  # orders only, up to omax (as lookups.covers)
            o = item.hi_order if hasattr(item, "hi_order") else item.order
            return is_order and o is not None and o <= s.omax * (1 + 1e-9)
        if is_order and not has_speed:
            return False  # a '*' order item skips a channel without speed
        if top is None or top <= s.fmax_hz * (1 + 1e-9):
            return True
        # beyond this run's Fmax: a profile = "*" item beyond the profile's own Fmax belongs
        # to other profiles (as in bands_for); else the options lowered Fmax below it, and
        # it is said, with a null row
        if item.profile != "*" or top <= base_fmax_hz * (1 + 1e-9):
            beyond.append(_beyond(item, rps, s.fmax_hz))
        return False

    bands = []
    for b in cfg.bands:
        if b.octave is not None:  # a set: its bands up to Fmax (bands_for drops the rest)
            item = b.model_dump(exclude_none=True)
            if b.hi_hz is not None and b.hi_hz > s.fmax_hz:
                item["hi_hz"] = s.fmax_hz
            # none of the set below Fmax: beyond it (a lower edge at Fmax holds no band)
            lo = b.lo_hz or 0.0
            if keep(b, False, None if lo < s.fmax_hz else max(lo, s.fmax_hz * (1 + 1e-8))):
                bands.append(item)
            continue
        is_order = b.hi_order is not None
        top = b.hi_order * rps if b.hi_order is not None else b.hi_hz
        if keep(b, is_order, top):
            bands.append(b.model_dump(exclude_none=True))
    tones = [t.model_dump(exclude_none=True) for t in cfg.tones
             if keep(t, t.order is not None, t.hz if t.hz is not None else (t.order or 0) * rps)]
    warnings = [
        f"{kind} {item['name']!r} at {_where(kind, item)} lies beyond Fmax {s.fmax_hz:g} Hz "
        f"(channel {cid!r}, profile {prof!r}): not measured; raise --fmax to include it"
        for kind, item in beyond
    ]
    doc: dict[str, Any] = {
        "analysis": cfg.analysis.model_dump(),
        "sources": [_source(ids, fs)],
        "channels": [channel, *extra_channels],
        "bands": bands + cli_bands,
        "tones": tones + cli_tones,
        # the channel's bearing, for an envelope profile's defect bands and tones
        "bearings": [b.model_dump() for b in cfg.bearings if b.id == ch.bearing],
    }
    if cfg.profiles:  # the one profile, under its own name, with the merged settings
        doc["profiles"] = {prof: settings}
        channel["profiles"] = [prof]
    return _Run(rows, ids, _validated(doc, f"{args.config} with the command-line options",
                                      over), cid, beyond, warnings)


def _beyond(item: Any, rps: float, fmax_hz: float) -> tuple[str, dict[str, Any]]:
    """A config band or tone beyond Fmax as the null JSON item REST would give, its reason
    beside it (edges and frequency in Hz; orders times the running speed)."""
    reason = f"beyond Fmax {fmax_hz:g} Hz"
    if hasattr(item, "lo_hz"):  # a band
        if item.hi_order is not None:
            lo, hi = (item.lo_order or 0.0) * rps, item.hi_order * rps
        else:
            lo, hi = item.lo_hz, item.hi_hz
        return "band", {"name": item.name, "lo_hz": lo, "hi_hz": hi, "value": None,
                        "reason": reason}
    hz = item.hz if item.hz is not None else item.order * rps
    return "tone", {"name": item.name, "frequency_hz": hz, "amplitude": None, "reason": reason}


def _where(kind: str, item: dict[str, Any]) -> str:
    if kind == "tone":
        return f"{item['frequency_hz']:g} Hz"
    return f"{item['lo_hz']:g}-{item['hi_hz']:g} Hz"


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
    rows = list(enumerate(chosen))
    if args.profile is not None and args.channel is None:
        # a recording of a whole source: the rows whose channel runs the profile asked for
        # (an envelope profile is often on a few channels only); the others are named
        has = [(r, c) for r, c in rows if channel_settings(cfg, c).kind == "tacho"
               or args.profile in profiles_of(cfg, c)]
        if any(channel_settings(cfg, c).kind != "tacho" for _, c in has):
            left = sorted({c for r, c in rows if (r, c) not in has})
            if left:
                print(f"quaver analyze: --profile {args.profile!r}: left out "
                      f"{', '.join(left)} (no such profile)", file=sys.stderr)
            rows = has
    return [_config_run(args, cfg, row, cid, over, rec.fs, chosen)
            if channel_settings(cfg, cid).kind != "tacho"
            else _Run([row], [cid], cfg, cid)  # a tacho row: its speed, not a spectrum
            for row, cid in rows]


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
        # times from the recording's first sample (the run-up records' start and end)
        t0_ns = round(start / rec.fs * 1e9)
        for f in pipe.process(SampleBlock(RECORDING_SOURCE, ids, x, start, t0_ns, rec.fs)):
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
        "x_unit": frame.x_unit,  # of every x value here: Hz, or order (an order profile)
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
        "bands": [*band_items(frame), *(i for k, i in run.beyond if k == "band")],
        "tones": [*tone_items(frame), *(i for k, i in run.beyond if k == "tone")],
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
        **({"speed": frame_speed(frame)} if frame.speed_source else {}),
        **_runups(run, st),
        "spectrum": [_num(v) for v in values.tolist()],
    }


def _runups(run: _Run, st: ChannelState) -> dict[str, Any]:
    """The run-up / coast-down records the recording held (service.runups), with times in s
    from its first sample; nothing for a channel that records none."""
    ch = None if run.config_channel is None else channel_settings(run.cfg, run.config_channel)
    if ch is None or ch.runup_min_rpm is None or st.runup is None:
        return {}
    out = []
    for r in st.runup.take_records():
        r = dict(r)
        start, end = r.pop("start_ns"), r.pop("end_ns")
        rows = [{**{k: v for k, v in p.items() if k != "t_ns"}, "t_s": p["t_ns"] / 1e9}
                for p in r.pop("rows")]  # type: ignore[attr-defined]
        out.append({**r, "start_s": start / 1e9, "end_s": end / 1e9,  # type: ignore[operator]
                    "unit": st.input_unit, "rows": rows})
    return {"runups": out}


def _tacho_result(name: str, run: _Run, x: np.ndarray, fs: float) -> dict[str, Any]:
    """A tacho row: its pulses through the service's own settings (dsp.tacho), the speed
    per revolution summarised (r/min) and the status at the end of the recording."""
    ch = channel_settings(run.cfg, run.ids[0])
    res = TachoTracker(fs, tacho_settings(ch)).push(np.asarray(x, dtype=np.float64)
                                                    * ch.sensitivity)
    rpm = res.rpm
    speed: dict[str, Any] = {
        "rpm_mean": (60.0 * (res.edges_s.size - 1) / ch.pulses_per_rev
                     / (res.edges_s[-1] - res.edges_s[0])) if res.edges_s.size > 1 else None,
        "rpm_min": float(rpm.min()) if rpm.size else None,
        "rpm_max": float(rpm.max()) if rpm.size else None,
        "revolutions": int(rpm.size),
        "status": res.status,
        "pulses": {"accepted": int(res.edges_s.size - res.bridged.sum()), "extra": res.extra,
                   "missing": res.missing, "faults": res.faults},
    }
    return {"channel": name, "config_channel": run.config_channel, "kind": "tacho",
            "speed": speed}


def _fmt(v: float | None, digits: int = 5) -> str:
    return "-" if v is None else f"{v:.{digits}g}"


def _table(r: dict[str, Any]) -> str:
    if r.get("kind") == "tacho":
        sp = r["speed"]
        cfg = f" (config channel {r['config_channel']})" if r["config_channel"] else ""
        return (f"{r['channel']}{cfg}: tacho, {sp['revolutions']} revolutions, speed "
                f"{_fmt(sp['rpm_min'])}-{_fmt(sp['rpm_max'])} r/min (mean "
                f"{_fmt(sp['rpm_mean'])}), status {sp['status']}; pulses "
                f"{sp['pulses']['accepted']}, extra {sp['pulses']['extra']}, missing "
                f"{sp['pulses']['missing']}, faults {sp['pulses']['faults']}")
    u, a = r["unit"], r["amplitude"]
    lo, hi = r["overall_band_hz"]
    cfg = f" (config channel {r['config_channel']})" if r["config_channel"] else ""
    xu = "Hz" if r.get("x_unit", "Hz") == "Hz" else "orders"  # an order profile's x values
    head = (f"fs {r['fs_hz']:g} Hz, Fmax {r['fmax_hz']:g} Hz, {r['lines']} lines, df "
            f"{r['df_hz']:g} Hz" if xu == "Hz" else
            f"order spectrum, {r['fs_hz']:g} samples/rev, omax {r['fmax_hz']:g}, {r['lines']} "
            f"lines, {r['df_hz']:g} orders apart")
    out = [
        f"{r['channel']}{cfg}: {head}, {r['window']}, N {r['n']}, hop {r['hop']}, "
        f"{r['averaging']} average of {r['averages']} frame(s)",
        f"  overall {_fmt(lo, 4)}-{_fmt(hi, 5)} {xu}: {_fmt(r['overall'])} {u} rms"
        + (f" ({r['overall_reason']})" if r.get("overall_reason") else ""),
        f"  low-frequency limit {r['lowcut_hz']:g} {xu} (nothing below it is measured)",
    ]
    if r["status"] != "ok":
        out.append(f"  status: {r['status']}" + (f" ({r['fault']})" if r["fault"] else ""))
    out += [f"  note: {n}" for n in r["notes"]]
    if r.get("speed"):
        sp = r["speed"]
        out.append(f"  orders placed at {_fmt(sp['rpm'])} r/min ({sp['source']}, "
                   f"{sp['status']}; the newest frame's mean speed"
                   + (", which varied within the frame)" if sp["varied"] else ")"))
    for ru in r.get("runups", []):
        lo, hi = ((ru["rpm_hi"], ru["rpm_lo"]) if ru["kind"] == "coast-down"
                  else (ru["rpm_lo"], ru["rpm_hi"]))
        out.append(f"  {ru['kind']} {lo:g}->{hi:g} r/min at {ru['start_s']:.1f}-"
                   f"{ru['end_s']:.1f} s: {len(ru['rows'])} points of orders "
                   f"{', '.join(f'{o:g}X' for o in ru['orders'])} (--json for them)")
    if "runups" in r and not r["runups"]:
        out.append("  no run-up or coast-down through the whole range in this recording")
    if r["bands"]:
        out.append(f"  bands ({u} rms)")
        for b in r["bands"]:
            edges = f"{_fmt(b['lo_hz'], 6)}-{_fmt(b['hi_hz'], 6)} {xu}"
            why = f"  ({b['reason']})" if "reason" in b else ""
            out.append(f"    {b['name']:<20} {edges:>18} {_fmt(b['value']):>11}{why}")
    if r["peaks"]:
        out.append(f"  peaks ({u} {a})")
        out += [f"    {p['frequency_hz']:12.3f} {xu} {_fmt(p['amplitude']):>11}"
                for p in r["peaks"]]
    if r["tones"]:
        out.append(f"  tones ({u} {a})")
        out += [f"    {t['name']:<20} {_fmt(t['frequency_hz'], 8):>12} {xu} "
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
    for run in runs:
        for w in run.warnings:
            _say(f"warning: {w}")
    n_total = rec.data.shape[1]
    chunk = max(1, int(round(CHUNK_S * rec.fs)))
    progress = Progress(f"analyze {os.path.basename(str(args.file))}", n_total * len(runs)) \
        if n_total > chunk else None
    results: list[dict[str, Any]] = [{} for _ in range(rec.data.shape[0])]
    for i, run in enumerate(runs):
        def step(done: int, before: int = i * n_total) -> None:
            if progress:
                progress.update(before + done)

        if run.config_channel is not None and (
                channel_settings(run.cfg, run.config_channel).kind == "tacho"):
            row = run.rows[0]
            results[row] = _tacho_result(rec.channel_names[row], run, rec.data[row], rec.fs)
            continue
        latest, states = _analyse(run, rec, step)
        for row, cid in zip(run.rows, run.ids, strict=True):
            if run.config_channel is not None and cid != run.config_channel:
                continue  # the tacho that gave a channel its speed: its own row reports it
            frame = latest.get(cid)
            if frame is None:
                info = next(iter(states[cid].profile_info.values()), {})
                raise CliError(f"the recording holds {n_total} samples per channel, fewer than "
                               f"one frame of N = {info.get('n')} ({info.get('lines')} lines) "
                               f"at {info.get('sample_rate_hz')} Hz; use fewer --lines")
            results[row] = _channel_result(rec.channel_names[row], run, frame, states[cid])
    if progress:
        progress.close()
    results = [r for r in results if r]  # rows left out (--profile they do not run)
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

"""The quaver configuration: one TOML file, pydantic models with help text, and cross-checks.

Knows nothing about sockets, asyncio, storage or the engine's state; from dsp it takes only
the closed option sets and the band/tone definition types.

Every problem is reported as ``key.path[index].field: reason`` (all of them at once, in
:class:`ConfigError`). Relative paths in the file (``service.data_dir``, file sources'
``path``) are taken from the folder holding the config file. ``QUAVER_LISTEN`` and
``QUAVER_DATA_DIR`` override ``service.listen`` and ``service.data_dir``.

A channel named by a source but without a ``[[channels]]`` entry gets the defaults
(``input_unit = "g"``, ``sensitivity = 1.0``, no running speed). A ``[[channels]]`` entry
that no source produces is an error, so a mistyped id cannot silently pick up defaults.
A band or tone given for one channel replaces a ``"*"`` band or tone of the same name on
that channel.
"""

from __future__ import annotations

import difflib
import ipaddress
import os
import tomllib
import types
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Annotated, Any, Literal, Union, get_args, get_origin

from pydantic import AfterValidator, BaseModel, ConfigDict, Field, ValidationError, create_model

from dsp.analyzer import ToneDef
from dsp.bands import OCTAVE_FRACTIONS, Band, octave_bands
from dsp.types import (
    Amplitude,
    AveragingMode,
    InputUnit,
    LinearEnd,
    OutputUnit,
    Quantity,
    WindowName,
)
from dsp.windows import DEFAULT_KAISER_BETA

from .wire import FileFormat, StreamFormat

__all__ = [
    "AlarmConfig",
    "AnalysisOverride",
    "AnalysisSettings",
    "DEFAULT_PROFILE",
    "ProfileSettings",
    "BandConfig",
    "ChannelConfig",
    "Config",
    "ConfigError",
    "FileSourceConfig",
    "ServiceSettings",
    "SimulatedSourceConfig",
    "SourceConfig",
    "TcpSourceConfig",
    "TokenConfig",
    "ToneConfig",
    "UdpSourceConfig",
    "bands_for",
    "channel_ids",
    "channel_settings",
    "check_listen_allowed",
    "describe_settings",
    "effective_analysis",
    "load_config",
    "open_source_warnings",
    "parse_config",
    "parse_listen",
    "profile_names",
    "profiles_of",
    "source_of",
    "tones_for",
]

ENV_OVERRIDES: dict[str, tuple[str, str]] = {
    "QUAVER_LISTEN": ("service", "listen"),
    "QUAVER_DATA_DIR": ("service", "data_dir"),
}
ID_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$"
SHA256_PATTERN = r"^[0-9a-fA-F]{64}$"
FRAME_RATIO = 2.56  # fs = 2.56·Fmax and N = 2.56·lines (common practice)

Id = Annotated[str, Field(pattern=ID_PATTERN)]
Name = Annotated[str, Field(min_length=1, max_length=64)]
SourceKind = Literal["tcp", "udp", "file", "simulated"]
Role = Literal["viewer", "operator", "admin", "metrics"]
QUANTITY_OF_UNIT = {
    "g": "acceleration",
    "m/s2": "acceleration",
    "mm/s": "velocity",
    "in/s": "velocity",
    "um": "displacement",
    "mil": "displacement",
}


class ConfigError(ValueError):
    """A configuration that cannot be used; ``problems`` holds one line per problem."""

    def __init__(self, problems: list[str], source: str = "config") -> None:
        self.problems = list(problems)
        self.source = source
        head = f"{source}: {len(self.problems)} problem{'s' if len(self.problems) != 1 else ''}"
        super().__init__(head + "".join(f"\n  {p}" for p in self.problems))


class _Model(BaseModel):
    # strict: a TOML string or bool is never coerced into a number (sensitivity = true is an
    # error, not 1.0); TOML integers still fill float fields.
    model_config = ConfigDict(
        extra="forbid", validate_default=True, allow_inf_nan=False, strict=True
    )


def _d(text: str) -> Any:
    return Field(description=text)


# --- [service] --------------------------------------------------------------------------


def parse_listen(text: str) -> tuple[str, int]:
    """Split ``host:port`` (``[v6addr]:port`` for IPv6) into (host, port 0…65535)."""
    if not isinstance(text, str) or ":" not in text:
        raise ValueError(f"{text!r} is not host:port (e.g. '127.0.0.1:8750')")
    host, _, port_s = text.rpartition(":")
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    elif ":" in host:
        raise ValueError(f"{text!r}: write an IPv6 address in brackets, e.g. '[::1]:8750'")
    if not host or not port_s.isdigit() or not 0 <= int(port_s) <= 65535:
        raise ValueError(f"{text!r} is not host:port with a port in 0-65535")
    return host, int(port_s)


def _valid_listen(text: str) -> str:
    parse_listen(text)
    return text


Listen = Annotated[str, AfterValidator(_valid_listen)]


class ServiceSettings(_Model):
    listen: Listen = Field(
        "127.0.0.1:8750",
        description="HTTP address host:port for REST, WebSocket, /metrics and the dashboard. "
        "A non-loopback host is refused unless [[tokens]] are configured. Env: QUAVER_LISTEN.",
    )
    trend_step_s: int = Field(
        10, ge=1, le=3600, description="Trend bucket length, s (mean/min/max kept per bucket)."
    )
    evidence_before_s: float = Field(
        3.0, ge=0, le=60, description="Waveform kept before an alarm transition, s."
    )
    evidence_after_s: float = Field(
        3.0, ge=0, le=60, description="Waveform kept after an alarm transition, s."
    )
    max_db_mb: float | None = Field(
        None, gt=0, description="Size limit of the store, MiB; oldest trend detail goes first."
    )
    cors_origins: list[str] = Field(
        default_factory=list,
        description="Browser origins (scheme://host:port) allowed to call the API from other "
        "pages; empty = same origin only (CORS off).",
    )
    max_body_bytes: int = Field(
        65536,
        ge=1024,
        le=16 * 2**20,
        description="Largest request body accepted, bytes; counted while it arrives "
        "(chunked bodies included), so a bigger one is refused with 413 without being read.",
    )
    allowed_hosts: list[str] | None = Field(
        None,
        description="Host names (and IP addresses) the HTTP Host header and a browser's "
        "Origin may name, without port; '*' allows any. Default: localhost, 127.0.0.1, ::1 "
        "and the listen host (for 0.0.0.0 or :: also this machine's name). A request naming "
        "another host is refused (400; WebSocket closed with 1008), which defeats DNS "
        "rebinding.",
    )
    max_connections: int = Field(
        200,
        ge=1,
        le=100000,
        description="Concurrent HTTP and WebSocket connections; beyond it new requests get 503 "
        "(uvicorn limit_concurrency).",
    )
    header_timeout_s: float = Field(
        10.0,
        gt=0,
        le=600,
        description="Time a client has to send a complete request head (and to send each part "
        "of a body), s; a slower one is disconnected.",
    )
    keep_alive_s: float = Field(
        5.0, gt=0, le=600, description="Idle time before a kept-alive connection is closed, s."
    )
    tls_cert: str | None = Field(
        None,
        description="PEM certificate (chain) file: serve HTTPS and WSS instead of HTTP and WS; "
        "needs tls_key. A relative path is taken from the config file's folder.",
    )
    tls_key: str | None = Field(
        None, description="PEM private key file of tls_cert (unencrypted)."
    )
    data_dir: str = Field(
        "quaver-data",
        description="Folder for trends, events and evidence (SQLite); a relative path is "
        "taken from the config file's folder. Env: QUAVER_DATA_DIR.",
    )


# --- [analysis] -------------------------------------------------------------------------


class AnalysisSettings(_Model):
    fmax_hz: float = Field(
        5000.0,
        gt=0,
        description="Highest frequency shown, Hz; needs sample_rate_hz >= 2.56·fmax_hz.",
    )
    lines: int = Field(
        1600,
        ge=25,
        le=102400,
        description="Spectral lines; the frame is "
        "2.56·lines samples, so lines must be a multiple of 25 (400, 800, "
        "1600, 3200, 6400, ...).",
    )
    window: WindowName = Field(
        "hann",
        description="DFT window: rectangular | hann | hamming "
        "| blackman-harris | flattop | kaiser.",
    )
    kaiser_beta: float = Field(
        DEFAULT_KAISER_BETA, ge=0, le=50, description="Kaiser window shape β (dimensionless)."
    )
    overlap: float = Field(0.75, ge=0, lt=1, description="Frame overlap, fraction in [0, 1).")
    averaging: AveragingMode = Field(
        "exponential", description="linear (N frames) | exponential | peak-hold."
    )
    averages: int = Field(
        8,
        ge=1,
        le=100000,
        description="Linear: frames in the average; "
        "exponential: equivalent number of frames (time constant).",
    )
    linear_end: LinearEnd = Field(
        "restart", description="When a linear average is complete: restart | hold."
    )
    unit: Quantity = Field(
        "velocity", description="Quantity shown: acceleration | velocity | displacement."
    )
    output_unit: OutputUnit | None = Field(
        None,
        description="Display unit matching `unit`: "
        "g | m/s2 | mm/s | in/s | um | mil; default g, "
        "mm/s or um.",
    )
    amplitude: Amplitude = Field("rms", description="Amplitude scale: peak | rms | peak-to-peak.")
    lowcut_hz: float = Field(
        2.0, ge=0,
        description="Lowest frequency measured, Hz, in every unit (integration cut); the "
        "window's main lobe can raise it (docs/low-frequency.md).",
    )
    peaks: int = Field(8, ge=0, le=256, description="Number of spectral peaks reported.")


def _override_model(name: str, scope: str) -> type[BaseModel]:
    fields: dict[str, Any] = {}
    for key, f in AnalysisSettings.model_fields.items():
        ann = Annotated[(f.annotation, *f.metadata)] if f.metadata else f.annotation
        help_text = f"{f.description} Overrides [analysis] {scope}."
        fields[key] = (ann | None, Field(None, description=help_text))  # type: ignore[operator]
    return create_model(name, __base__=_Model, **fields)


AnalysisOverride = _override_model("AnalysisOverride", "for this channel")
ProfileSettings = _override_model(
    "ProfileSettings", "(and the channel's own overrides) in this profile"
)
DEFAULT_PROFILE = "default"  # the one profile of a config without [profiles]


# --- [[sources]] ------------------------------------------------------------------------


class _SourceBase(_Model):
    id: Id = _d("Source id: letters, digits, '.', '_', '-' (url-safe), at most 64.")
    channels: list[Id] = Field(min_length=1, description="Channel ids in interleave order.")
    sample_rate_hz: float | None = Field(
        None, gt=0, description="Sample rate, Hz (samples per second per channel)."
    )
    queue_blocks: int = Field(
        256,
        ge=1,
        le=100000,
        description="Blocks held for the pipeline; "
        "when full the oldest is dropped and counted in `drops`.",
    )
    stale_after_s: float | None = Field(
        None,
        gt=0,
        le=86400,
        description="stale_after_s for every channel of this source that does not set its "
        "own, s (see [[channels]]).",
    )


def _valid_cidrs(items: list[str] | None) -> list[str] | None:
    from .sources.base import parse_networks  # the sources judge peers by the same rule

    parse_networks(items)
    return items


Cidrs = Annotated[list[str] | None, AfterValidator(_valid_cidrs)]
_ALLOW_FROM_HELP = (
    "Peers allowed to feed this source: IP networks in CIDR form (e.g. ['10.1.2.0/24', "
    "'127.0.0.1']); others are refused unread and counted in `refused_peers`. Default: "
    "any host that can reach the port."
)
_MAX_FRAME_HELP = (
    "Largest framed payload accepted, bytes; a header declaring more is malformed at once "
    "(counted, the decoder resynchronises). Default: about 1 s of this source's data, "
    "channels × sample_rate_hz × 8 bytes, at least 64 KiB and at most 16 MiB."
)


class TcpSourceConfig(_SourceBase):
    kind: Literal["tcp"] = _d("Source kind.")
    listen: Listen = _d("host:port quaver listens on for one producer at a time.")
    format: StreamFormat = _d(
        "Sample format: raw interleaved little-endian s16le | s32le | f32le | f64le, or "
        "framed (quaver's header per frame, see service/wire.py)."
    )
    idle_timeout_s: float = Field(
        10.0,
        gt=0,
        le=3600,
        description="A producer that sends nothing for this long is dropped (counted in "
        "`idle_drops`, logged), so the next producer can connect, s.",
    )
    max_frame_bytes: int | None = Field(None, ge=1024, le=16 * 2**20, description=_MAX_FRAME_HELP)
    allow_from: Cidrs = Field(None, description=_ALLOW_FROM_HELP)


class UdpSourceConfig(_SourceBase):
    kind: Literal["udp"] = _d("Source kind.")
    listen: Listen = _d("host:port quaver receives framed datagrams on.")
    format: Literal["framed"] = Field("framed", description="Datagrams are framed: one frame each.")
    max_frame_bytes: int | None = Field(None, ge=1024, le=16 * 2**20, description=_MAX_FRAME_HELP)
    allow_from: Cidrs = Field(None, description=_ALLOW_FROM_HELP)


class FileSourceConfig(_SourceBase):
    kind: Literal["file"] = _d("Source kind.")
    path: str = _d("File to read; relative paths are taken from the config file's folder.")
    format: FileFormat = _d(
        "Raw s16le | s32le | f32le | f64le, csv (one row per sample, one column per "
        "channel), or wav (integer PCM scaled to ±1 full scale)."
    )
    follow: bool = Field(
        True,
        description="true: follow the growing file (tail); "
        "false: replay a finished recording, then end.",
    )
    replay_speed: float = Field(
        1.0,
        ge=0,
        description="Replay pace as a multiple of real "
        "time when follow = false; 0 = as fast as the pipeline takes it.",
    )
    poll_ms: float = Field(
        50.0,
        gt=0,
        le=10000,
        description="How often a followed file is checked for growth, truncation and rotation, ms.",
    )
    start_at: Literal["end", "beginning"] = Field(
        "end",
        description="Where following starts in a file that already exists: end | "
        "beginning (a file that appears later is always read from its beginning).",
    )


class SimulatedSourceConfig(_SourceBase):
    kind: Literal["simulated"] = _d("Source kind.")
    scenario: Name = Field(
        "demo", description="Simulated plant scenario (see service/sources/simulated.py: 'demo')."
    )
    speed: float = Field(
        1.0,
        ge=0,
        le=1000,
        description="Pace as a multiple of real time (0 = as fast as the pipeline takes it).",
    )
    channels: list[Id] = Field(
        default_factory=list,
        description="Channel ids to keep; empty = every channel of the scenario.",
    )
    seed: int = Field(1, ge=0, description="Random seed of the simulated noise and impacts.")
    fault_start_s: float = Field(
        30.0, ge=0, le=1e6, description="Plant time at which the scripted fault starts, s."
    )
    fault_ramp_s: float = Field(
        180.0, gt=0, le=1e6, description="Time the scripted fault takes to reach full severity, s."
    )


SOURCE_KINDS: tuple[str, ...] = get_args(SourceKind)
SourceConfig = Annotated[
    TcpSourceConfig | UdpSourceConfig | FileSourceConfig | SimulatedSourceConfig,
    Field(discriminator="kind"),
]


# --- [[channels]], [[bands]], [[tones]], [[alarms]], [[tokens]] --------------------------


class ChannelConfig(_Model):
    id: Id = _d("Channel id as named in its source's `channels` list (url-safe).")
    input_unit: InputUnit = Field(
        "g", description="Unit of the samples after sensitivity: g | m/s2."
    )
    sensitivity: float = Field(
        1.0,
        description="Input units per raw sample unit (e.g. "
        "0.000122 g per count; for WAV: per full scale).",
    )
    speed_rpm: float | None = Field(
        None, gt=0, description="Running speed, r/min; enables order bands and tones."
    )
    machine: str = Field(
        "", max_length=128, description="Machine this sensor is on (grouping label)."
    )
    description: str = Field("", max_length=1024, description="Free text, e.g. location.")
    clip_level: float | None = Field(
        None,
        gt=0,
        description="Raw sample magnitude at which the sensor chain clips "
        "(raw units); |x| >= clip_level is a sensor fault.",
    )
    range: float | None = Field(
        None,
        gt=0,
        description="Largest plausible |sample| in input_unit (after sensitivity): the "
        "sensor's measuring range. A sample beyond it (or NaN/inf) is a sensor fault and "
        "never reaches the analysis. Default: 2000 g (19613.3 m/s2).",
    )
    stale_after_s: float | None = Field(
        None,
        gt=0,
        le=86400,
        description="No new analysed spectrum for this long and the channel is no-signal, s. "
        "Default: max(5 s, 3 hops, one frame + 2 hops) of its slowest profile.",
    )
    loss_of_signal: Literal["alert", "danger", "off"] = Field(
        "alert",
        description="Level of the channel's loss-of-signal alarm (rule '<channel>.signal'), "
        "raised while the channel is no-signal or its source failed; 'off': none.",
    )
    analysis: AnalysisOverride = Field(  # type: ignore[valid-type]
        default_factory=AnalysisOverride, description="Per-channel analysis overrides."
    )
    profiles: list[Id] | None = Field(
        None,
        description="Analysis profiles this channel runs, by name from [profiles]; the first "
        "is its primary one (what REST and the stream give when no profile is asked for). "
        "Default: every profile, in file order.",
    )


_PROFILE_HELP = (
    "Profile name, or '*' for every profile of the channel whose fmax_hz covers it."
)


class BandConfig(_Model):
    channel: str = Field("*", description="Channel id, or '*' for every channel.")
    profile: str = Field("*", description=_PROFILE_HELP)
    name: Name = _d("Band name (unique per channel); for an octave set, the name prefix.")
    lo_hz: float | None = Field(None, ge=0, description="Lower edge, Hz.")
    hi_hz: float | None = Field(None, gt=0, description="Upper edge, Hz.")
    lo_order: float | None = Field(
        None, ge=0, description="Lower edge, orders of running speed (1 = once per revolution)."
    )
    hi_order: float | None = Field(None, gt=0, description="Upper edge, orders.")
    octave: int | None = Field(
        None,
        description="1/b-octave band set (IEC 61260-1), b in 1, 3, 6, 12, 24, over lo_hz…hi_hz.",
    )


class ToneConfig(_Model):
    channel: str = Field("*", description="Channel id, or '*' for every channel.")
    profile: str = Field("*", description=_PROFILE_HELP)
    name: Name = _d("Tone name (unique per channel), e.g. '1X' or 'mesh'.")
    hz: float | None = Field(None, gt=0, description="Fixed frequency, Hz.")
    order: float | None = Field(None, gt=0, description="Order of running speed.")


class AlarmConfig(_Model):
    channel: str = Field("*", description="Channel id, or '*' for every channel.")
    profile: str | None = Field(
        None,
        description="Profile whose value is watched; default: the channel's first profile "
        "that has the band or tone (overall: its primary profile); '*': every profile "
        "that has it.",
    )
    band: str | None = Field(None, description="Band name watched.")
    tone: str | None = Field(None, description="Tone name watched.")
    overall: bool = Field(
        False,
        description="Watch the channel's overall RMS: over its band named 'overall' if it has "
        "one, else over lowcut_hz…fmax_hz.",
    )
    alert: float | None = Field(
        None, gt=0,
        description="Alert (first) level, in the channel's display unit and amplitude "
        "(bands and overall: RMS). Required unless baseline_learn_s is set.",
    )
    danger: float | None = Field(
        None, gt=0, description="Danger (second) level, same unit; must exceed alert."
    )
    baseline_learn_s: float | None = Field(
        None, gt=0, le=365 * 86400,
        description="Relative levels: learn the median of the first baseline_learn_s seconds "
        "of good data, then alert/danger at a factor or dB over it.",
    )
    alert_factor: float | None = Field(None, gt=1, description="Alert at this × the baseline.")
    danger_factor: float | None = Field(None, gt=1, description="Danger at this × the baseline.")
    alert_db: float | None = Field(None, gt=0, description="Alert at this many dB over baseline.")
    danger_db: float | None = Field(None, gt=0, description="Danger at this many dB over baseline.")
    hysteresis: float = Field(
        0.05,
        ge=0,
        le=0.5,
        description="Clear when the value falls below level·(1 − hysteresis); fraction 0…0.5.",
    )
    on_delay_s: float = Field(
        0.0, ge=0, le=86400, description="Time above a level before the alarm goes active, s."
    )
    off_delay_s: float = Field(0.0, ge=0, le=86400, description="Time below before it clears, s.")
    latch: bool = Field(False, description="Stay active until acknowledged.")


class TokenConfig(_Model):
    name: Name = _d("Who holds the token (for logs).")
    role: Role = _d(
        "viewer (read) | operator (also acknowledge alarms) | admin (also reload the config) "
        "| metrics (GET /metrics only: a scraper's token)."
    )
    sha256: Annotated[str, AfterValidator(str.lower)] = Field(
        pattern=SHA256_PATTERN,
        description="Hex SHA-256 of the token (the token itself is never stored); "
        "kept in lower case.",
    )


class Config(_Model):
    service: ServiceSettings = Field(
        default_factory=lambda: ServiceSettings.model_validate({}), description="[service]"
    )
    analysis: AnalysisSettings = Field(
        default_factory=lambda: AnalysisSettings.model_validate({}),
        description="Analysis defaults for every channel.",
    )
    profiles: dict[Id, ProfileSettings] = Field(  # type: ignore[valid-type]
        default_factory=dict,
        description="[profiles.<name>]: named analyses each channel may run side by side "
        "(e.g. wide and narrow); without any, every channel runs one profile, 'default'.",
    )
    sources: list[SourceConfig] = Field(default_factory=list, description="[[sources]]")
    channels: list[ChannelConfig] = Field(default_factory=list, description="[[channels]]")
    bands: list[BandConfig] = Field(default_factory=list, description="[[bands]]")
    tones: list[ToneConfig] = Field(default_factory=list, description="[[tones]]")
    alarms: list[AlarmConfig] = Field(default_factory=list, description="[[alarms]]")
    tokens: list[TokenConfig] = Field(default_factory=list, description="[[tokens]]")


def describe_settings() -> list[tuple[str, str, str, str]]:
    """Every setting as (table and key, type, default, help text), for docs and ``--help``."""
    tables: list[tuple[str, type[BaseModel]]] = [
        ("[service]", ServiceSettings),
        ("[analysis]", AnalysisSettings),
        ('[[sources]] kind="tcp"', TcpSourceConfig),
        ('[[sources]] kind="udp"', UdpSourceConfig),
        ('[[sources]] kind="file"', FileSourceConfig),
        ('[[sources]] kind="simulated"', SimulatedSourceConfig),
        ("[[channels]]", ChannelConfig),
        ("[[channels]] analysis", AnalysisOverride),
        ("[profiles.<name>]", ProfileSettings),
        ("[[bands]]", BandConfig),
        ("[[tones]]", ToneConfig),
        ("[[alarms]]", AlarmConfig),
        ("[[tokens]]", TokenConfig),
    ]
    rows = []
    for table, model in tables:
        for name, f in model.model_fields.items():
            if name == "analysis" and model is ChannelConfig:
                continue  # its keys follow as "[[channels]] analysis ..."
            if f.is_required():
                default = "required"
            else:
                default = repr(f.get_default(call_default_factory=True))
            rows.append((f"{table} {name}", _type_text(f.annotation), default, f.description or ""))
    return rows


def _type_text(ann: Any) -> str:
    origin, args = get_origin(ann), get_args(ann)
    if origin is Literal:
        return " | ".join(repr(a) for a in args)
    if origin is Annotated:
        return _type_text(args[0])
    if origin in (Union, types.UnionType):
        return " | ".join(_type_text(a) for a in args if a is not type(None)) + " (optional)"
    if origin is list:
        return f"list of {_type_text(args[0])}"
    return str(getattr(ann, "__name__", ann))


MODELS: tuple[type[BaseModel], ...] = (
    Config,
    ServiceSettings,
    AnalysisSettings,
    AnalysisOverride,
    ProfileSettings,
    TcpSourceConfig,
    UdpSourceConfig,
    FileSourceConfig,
    SimulatedSourceConfig,
    ChannelConfig,
    BandConfig,
    ToneConfig,
    AlarmConfig,
    TokenConfig,
)


# --- lookups (on a validated config) ------------------------------------------------------


def channel_ids(cfg: Config) -> list[str]:
    """Every channel id the sources name, in source order then interleave order."""
    return [c for s in cfg.sources for c in s.channels]


def source_of(cfg: Config, channel_id: str) -> SourceConfig | None:
    """The source whose ``channels`` list names ``channel_id``, or None."""
    return next((s for s in cfg.sources if channel_id in s.channels), None)


def channel_settings(cfg: Config, channel_id: str) -> ChannelConfig:
    """The ``[[channels]]`` entry for ``channel_id``, or the defaults if it has none."""
    entry = next((c for c in cfg.channels if c.id == channel_id), None)
    return entry if entry is not None else ChannelConfig.model_validate({"id": channel_id})


def profile_names(cfg: Config) -> list[str]:
    """Every analysis profile name, in file order (``["default"]`` without [profiles])."""
    return list(cfg.profiles) or [DEFAULT_PROFILE]


def profiles_of(cfg: Config, channel_id: str) -> list[str]:
    """The profiles ``channel_id`` runs, its primary one first."""
    own = channel_settings(cfg, channel_id).profiles
    return list(own) if own else profile_names(cfg)


def _primary(cfg: Config, channel_id: str, profile: str | None) -> str:
    return profiles_of(cfg, channel_id)[0] if profile is None else profile


def effective_analysis(
    cfg: Config, channel_id: str, profile: str | None = None
) -> AnalysisSettings:
    """``[analysis]``, then the channel's own ``analysis`` overrides, then those of
    ``profile`` (default: the channel's primary profile) — the later wins."""
    override: BaseModel = channel_settings(cfg, channel_id).analysis
    out = cfg.analysis.model_copy(update=override.model_dump(exclude_none=True))
    prof: BaseModel | None = cfg.profiles.get(_primary(cfg, channel_id, profile))
    if prof is not None:
        out = out.model_copy(update=prof.model_dump(exclude_none=True))
    return out


def _expand_band(b: BandConfig) -> list[Band]:
    if b.octave is not None:  # _Checker has made sure 0 < lo_hz < hi_hz
        sets = octave_bands(b.octave, b.lo_hz or 0.0, b.hi_hz or 0.0)
        return [ob.as_band(prefix=f"{b.name} ") for ob in sets]
    if b.lo_order is not None and b.hi_order is not None:
        return [Band(b.name, b.lo_order, b.hi_order, "order")]
    return [Band(b.name, b.lo_hz or 0.0, b.hi_hz or 0.0, "hz")]


def _is_order_band(b: BandConfig) -> bool:
    return b.lo_order is not None or b.hi_order is not None


def _top_hz(hz: float | None, order: float | None, speed_rpm: float | None) -> float | None:
    """Highest frequency (Hz) a band edge or tone reaches; None if it has no speed to use."""
    if hz is not None:
        return hz
    return None if order is None or speed_rpm is None else order * speed_rpm / 60.0


def _covers(fmax_hz: float, top_hz: float | None) -> bool:
    return top_hz is None or top_hz <= fmax_hz * (1 + 1e-9)


def _applies(item_profile: str, profile: str, fmax_hz: float, top_hz: float | None) -> bool:
    """Does a band/tone given for ``item_profile`` belong to ``profile`` (Fmax ``fmax_hz``)?"""
    if item_profile == "*":
        return _covers(fmax_hz, top_hz)
    return item_profile == profile


def bands_for(cfg: Config, channel_id: str, profile: str | None = None) -> list[Band]:
    """The bands of one channel's profile (default: its primary one), in file order, as
    :class:`dsp.bands.Band` (Hz or orders).

    ``"*"`` bands apply to every channel except where the channel has a band of the same
    name of its own; ``"*"`` order bands skip channels without ``speed_rpm``; an octave set
    becomes one band per IEC 61260-1 band, named ``"<name> <mid-band>"`` (e.g. "thirds 1 kHz").
    A band with ``profile = "*"`` goes to each profile whose fmax_hz reaches its upper edge.
    """
    profile = _primary(cfg, channel_id, profile)
    rpm = channel_settings(cfg, channel_id).speed_rpm
    fmax = effective_analysis(cfg, channel_id, profile).fmax_hz

    def expand(b: BandConfig) -> list[Band]:
        return [
            band
            for band in _expand_band(b)
            if _applies(
                b.profile, profile, fmax,
                _top_hz(band.hi if band.basis == "hz" else None,
                        band.hi if band.basis == "order" else None, rpm),
            )
        ]

    own_names = {band.name for b in cfg.bands if b.channel == channel_id for band in expand(b)}
    out: list[Band] = []
    for b in cfg.bands:
        if b.channel == channel_id:
            out += expand(b)
        elif b.channel == "*" and (rpm is not None or not _is_order_band(b)):
            out += [band for band in expand(b) if band.name not in own_names]
    return out


def tones_for(cfg: Config, channel_id: str, profile: str | None = None) -> list[ToneDef]:
    """The tracked tones of one channel's profile (same rules as :func:`bands_for`)."""
    profile = _primary(cfg, channel_id, profile)
    rpm = channel_settings(cfg, channel_id).speed_rpm
    fmax = effective_analysis(cfg, channel_id, profile).fmax_hz
    mine = [
        t for t in cfg.tones
        if _applies(t.profile, profile, fmax, _top_hz(t.hz, t.order, rpm))
    ]
    own_names = {t.name for t in mine if t.channel == channel_id}
    return [
        ToneDef(t.name, hz=t.hz, order=t.order)
        for t in mine
        if t.channel == channel_id
        or (t.channel == "*" and t.name not in own_names and (rpm is not None or t.order is None))
    ]


def open_source_warnings(cfg: Config) -> list[str]:
    """One line per TCP/UDP source that listens on a non-loopback address without
    ``allow_from`` (any host that reaches the port may feed it): warnings, not errors."""
    out = []
    for i, s in enumerate(cfg.sources):
        if not isinstance(s, TcpSourceConfig | UdpSourceConfig) or s.allow_from is not None:
            continue
        host, _ = parse_listen(s.listen)
        if host == "localhost":
            continue
        try:
            loopback = ipaddress.ip_address(host).is_loopback
        except ValueError:
            loopback = False  # a host name may resolve to anything
        if not loopback:
            out.append(
                f"sources[{i}] ({s.id}): listens on {s.listen!r}, not a loopback address, "
                "without allow_from: any host that can reach the port may feed it; set "
                "allow_from = [\"<network>/<bits>\", ...]"
            )
    return out


def check_listen_allowed(cfg: Config) -> None:
    """Raise ConfigError if ``service.listen`` is not loopback and no ``[[tokens]]`` exist."""
    host, _ = parse_listen(cfg.service.listen)
    if host == "localhost":
        return
    try:
        loopback = ipaddress.ip_address(host).is_loopback
    except ValueError:
        loopback = False  # a host name may resolve to anything
    if not loopback and not cfg.tokens:
        raise ConfigError(
            [
                f"service.listen: {cfg.service.listen!r} is not a loopback address; add "
                "[[tokens]] before serving beyond this machine, or listen on 127.0.0.1"
            ]
        )


# --- loading and error reporting ----------------------------------------------------------


def load_config(path: str | os.PathLike[str], env: Mapping[str, str] | None = None) -> Config:
    """Read, validate and cross-check one TOML config file; raise ConfigError listing every
    problem (TOML syntax errors carry their line and column)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as e:
        raise ConfigError([f"cannot read: {e}"], source=str(p)) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise ConfigError([f"TOML syntax error: {e}"], source=str(p)) from None
    return parse_config(data, base_dir=p.resolve().parent, source=str(p), env=env)


def parse_config(
    data: Mapping[str, Any],
    *,
    base_dir: Path | None = None,
    source: str = "config",
    env: Mapping[str, str] | None = None,
) -> Config:
    """Validate a config already parsed into dicts (e.g. built by ``quaver demo``).

    ``env`` (default ``os.environ``) supplies ``QUAVER_*`` overrides; ``base_dir`` anchors
    relative paths. Raises ConfigError listing every problem.
    """
    env = os.environ if env is None else env
    raw: dict[str, Any] = {k: v for k, v in data.items()}
    from_env: dict[tuple[str, str], str] = {}
    for var, (table, key) in ENV_OVERRIDES.items():
        if env.get(var):
            section = raw.get(table)
            raw[table] = {**(section if isinstance(section, dict) else {}), key: env[var]}
            from_env[(table, key)] = var
    try:
        cfg = Config.model_validate(raw)
    except ValidationError as e:
        raise ConfigError(_pydantic_problems(e, from_env), source=source) from None
    problems = _cross_check(cfg)
    if problems:
        raise ConfigError(problems, source=source)
    if base_dir is not None:
        if ("service", "data_dir") not in from_env:
            cfg.service.data_dir = str(base_dir / cfg.service.data_dir)
        if cfg.service.tls_cert is not None:
            cfg.service.tls_cert = str(base_dir / cfg.service.tls_cert)
        if cfg.service.tls_key is not None:
            cfg.service.tls_key = str(base_dir / cfg.service.tls_key)
        for s in cfg.sources:
            if isinstance(s, FileSourceConfig):
                s.path = str(base_dir / s.path)
    return cfg


def _path(loc: Iterable[int | str]) -> str:
    out = ""
    for part in loc:
        if part == "[key]":  # pydantic's marker for a table key that failed, e.g. a profile name
            continue
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out


_KNOWN_KEYS = sorted({name for m in MODELS for name in m.model_fields})


def _pydantic_problems(e: ValidationError, from_env: Mapping[tuple[str, str], str]) -> list[str]:
    problems = []
    for err in e.errors():
        loc = list(err["loc"])
        # a discriminated union puts the tag in the path: sources.0.tcp.format
        if len(loc) >= 3 and loc[0] == "sources" and loc[2] in SOURCE_KINDS:
            del loc[2]
        kind, ctx, value = err["type"], err.get("ctx", {}), err.get("input")
        if kind == "literal_error":
            msg = f"{value!r} is not one of {ctx['expected'].replace(' or ', ', ')}"
        elif kind == "union_tag_invalid":
            loc.append("kind")
            msg = f"{ctx['tag']!r} is not one of {ctx['expected_tags']}"
        elif kind == "union_tag_not_found":
            loc.append("kind")
            msg = f"required key is missing (one of {', '.join(map(repr, SOURCE_KINDS))})"
        elif kind == "missing":
            msg = "required key is missing"
        elif kind == "extra_forbidden":
            near = difflib.get_close_matches(str(loc[-1]), _KNOWN_KEYS, n=1)
            msg = "unknown key" + (f"; did you mean {near[0]!r}?" if near else "")
        elif kind == "string_pattern_mismatch" and ctx.get("pattern") == ID_PATTERN:
            msg = (
                f"{value!r} is not a url-safe id: letters, digits, '.', '_' and '-', "
                "starting with a letter or digit, at most 64 characters"
            )
        elif kind == "string_pattern_mismatch" and ctx.get("pattern") == SHA256_PATTERN:
            msg = "must be the 64 hex digits of a SHA-256 digest"
        else:
            msg = err["msg"].removeprefix("Value error, ")
            if not isinstance(value, dict | list) and repr(value) not in msg:
                msg += f" (got {value!r})"
        where = _path(loc)
        if len(loc) == 2 and tuple(loc) in from_env:
            where += f" (from {from_env[(loc[0], loc[1])]})"  # type: ignore[index]
        problems.append(f"{where}: {msg}")
    return problems


# --- cross-checks ---------------------------------------------------------------------------


def _fmt_hz(x: float) -> str:
    return f"{x:g} Hz"


class _Checker:
    """Cross-field and cross-table checks of a config that passed the per-field checks."""

    def __init__(self, cfg: Config) -> None:
        self.cfg = cfg
        self.problems: list[str] = []
        self.channel_source: dict[str, int] = {}
        self.open_ended = any(
            isinstance(s, SimulatedSourceConfig) and not s.channels for s in cfg.sources
        )
        self.entry_index = {c.id: j for j, c in enumerate(cfg.channels)}

    def add(self, problem: str) -> None:
        if problem not in self.problems:
            self.problems.append(problem)

    def run(self) -> list[str]:
        self.sources()
        self.channels()
        self.profiles()
        self.analysis()
        before = len(self.problems)
        self.bands()
        self.tones()
        if len(self.problems) == before:  # names are only meaningful once bands/tones are sound
            self.alarms()
        self.tokens()
        return self.problems

    def fs_of(self, ch: str) -> float | None:
        i = self.channel_source.get(ch)
        return None if i is None else self.cfg.sources[i].sample_rate_hz

    def known(self, ch: str, where: str) -> bool:
        if ch == "*" or ch in self.channel_source or self.open_ended:
            return True
        listed = ", ".join(repr(c) for c in self.channel_source) or "none"
        self.add(f"{where}: {ch!r} is not a channel of any source (channels: {listed})")
        return False

    def targets(self, ch: str) -> list[str]:
        return list(self.channel_source) if ch == "*" else [ch]

    def sources(self) -> None:
        cfg = self.cfg
        if not cfg.sources:
            self.add("sources: at least one [[sources]] entry is required")
        seen_id: dict[str, int] = {}
        seen_listen: dict[tuple[str, str], int] = {}
        for i, s in enumerate(cfg.sources):
            if isinstance(s, SimulatedSourceConfig):
                from .sources.simulated import SCENARIOS  # the plant model names them

                if s.scenario not in SCENARIOS:
                    listed = ", ".join(map(repr, SCENARIOS))
                    self.add(f"sources[{i}].scenario: {s.scenario!r} is not one of {listed}")
            if s.id in seen_id:
                self.add(f"sources[{i}].id: {s.id!r} repeats sources[{seen_id[s.id]}]")
            seen_id.setdefault(s.id, i)
            for k, ch in enumerate(s.channels):
                if ch in self.channel_source:
                    other = self.channel_source[ch]
                    self.add(
                        f"sources[{i}].channels[{k}]: {ch!r} is already a channel of "
                        f"sources[{other}]"
                    )
                else:
                    self.channel_source[ch] = i
            needs_fs = isinstance(s, TcpSourceConfig | UdpSourceConfig) or (
                isinstance(s, FileSourceConfig) and s.format != "wav"
            )
            if needs_fs and s.sample_rate_hz is None:
                self.add(
                    f"sources[{i}].sample_rate_hz: required for kind={s.kind!r}"
                    + (f" with format={s.format!r}" if isinstance(s, FileSourceConfig) else "")
                )
            if isinstance(s, TcpSourceConfig | UdpSourceConfig):
                key = (s.kind, s.listen)
                if key in seen_listen:
                    self.add(
                        f"sources[{i}].listen: {s.listen!r} is already used by "
                        f"sources[{seen_listen[key]}]"
                    )
                seen_listen.setdefault(key, i)
                if s.kind == "tcp" and parse_listen(s.listen) == parse_listen(cfg.service.listen):
                    self.add(f"sources[{i}].listen: {s.listen!r} is the service's own address")

    def channels(self) -> None:
        seen: dict[str, int] = {}
        for j, c in enumerate(self.cfg.channels):
            if c.id in seen:
                self.add(f"channels[{j}].id: {c.id!r} repeats channels[{seen[c.id]}]")
            seen.setdefault(c.id, j)
            if c.id not in self.channel_source and not self.open_ended:
                listed = ", ".join(repr(x) for x in self.channel_source) or "none"
                self.add(
                    f"channels[{j}].id: {c.id!r} is not produced by any source "
                    f"(source channels: {listed})"
                )
            if c.sensitivity == 0:
                self.add(f"channels[{j}].sensitivity: must not be 0")

    def profiles(self) -> None:
        names = profile_names(self.cfg)
        listed = ", ".join(map(repr, names))
        self.profiles_ok = True
        for j, c in enumerate(self.cfg.channels):
            seen: set[str] = set()
            for k, name in enumerate(c.profiles or ()):
                if name not in names:
                    self.add(f"channels[{j}].profiles[{k}]: {name!r} is not a profile "
                             f"(profiles: {listed})")
                    self.profiles_ok = False
                elif name in seen:
                    self.add(f"channels[{j}].profiles[{k}]: {name!r} is listed twice")
                seen.add(name)
            if c.profiles is not None and not c.profiles:
                self.add(f"channels[{j}].profiles: give at least one profile, or leave it out")
                self.profiles_ok = False

    def profile_known(self, where: str, name: str | None, ch: str) -> bool:
        """Is ``name`` ('*', None or a profile) valid for channel ``ch`` ('*' = any)?"""
        if name is None or name == "*":
            return True
        names = profile_names(self.cfg)
        if name not in names:
            listed = ", ".join(map(repr, names))
            self.add(f"{where}: {name!r} is not a profile (profiles: {listed})")
            return False
        if ch != "*" and self.profiles_ok and name not in profiles_of(self.cfg, ch):
            runs = ", ".join(map(repr, profiles_of(self.cfg, ch)))
            self.add(f"{where}: channel {ch!r} does not run profile {name!r} (it runs {runs})")
            return False
        return True

    def channel_profiles(self, ch: str) -> list[str]:
        return profiles_of(self.cfg, ch) if self.profiles_ok else profile_names(self.cfg)[:1]

    def where(self, ch: str, field: str, profile: str | None = None) -> str:
        prof = self.cfg.profiles.get(profile) if profile is not None else None
        if prof is not None and getattr(prof, field) is not None:
            return f"profiles.{profile}.{field}"
        j = self.entry_index.get(ch)
        if j is not None and getattr(self.cfg.channels[j].analysis, field) is not None:
            return f"channels[{j}].analysis.{field}"
        return f"analysis.{field}"

    def analysis(self) -> None:
        pairs = [
            (ch, prof)
            for ch in dict.fromkeys([*self.channel_source, *(c.id for c in self.cfg.channels)])
            for prof in self.channel_profiles(ch)
        ]
        for ch, prof in pairs:
            self.analysis_of(ch, prof)

    def analysis_of(self, ch: str, prof: str) -> None:
        def where(field: str) -> str:
            return self.where(ch, field, prof)

        a = effective_analysis(self.cfg, ch, prof)
        if a.lines % 25:
            self.add(
                f"{where('lines')}: 2.56·{a.lines} = {a.lines * 2.56:g} "
                "samples is not an integer; use a multiple of 25 (e.g. 400, 800, "
                "1600, 3200, 6400)"
            )
        fs = self.fs_of(ch)
        if fs is not None and a.fmax_hz * FRAME_RATIO > fs * (1 + 1e-9):
            src = self.cfg.sources[self.channel_source[ch]]
            self.add(
                f"{where('fmax_hz')}: {_fmt_hz(a.fmax_hz)} needs a sample "
                f"rate of at least 2.56·fmax = {_fmt_hz(a.fmax_hz * FRAME_RATIO)}; "
                f"source {src.id!r} runs at {_fmt_hz(fs)}"
            )
        if a.output_unit is not None and QUANTITY_OF_UNIT[a.output_unit] != a.unit:
            self.add(
                f"{where('output_unit')}: {a.output_unit!r} is not a unit "
                f"of {a.unit} (unit = {a.unit!r})"
            )
        if a.lowcut_hz >= a.fmax_hz:
            self.add(
                f"{where('lowcut_hz')}: {_fmt_hz(a.lowcut_hz)} must be "
                f"below fmax_hz {_fmt_hz(a.fmax_hz)}"
            )

    def edges(
        self, where: str, lo: float | None, hi: float | None, lo_key: str, hi_key: str
    ) -> bool:
        if lo is None or hi is None:
            missing = lo_key if lo is None else hi_key
            self.add(f"{where}.{missing}: required with {hi_key if lo is None else lo_key}")
            return False
        if not lo < hi:
            self.add(f"{where}.{hi_key}: {hi:g} must be above {lo_key} {lo:g}")
            return False
        return True

    def speed_needed(self, where: str, ch: str) -> None:
        targets = self.targets(ch)
        speeds = [channel_settings(self.cfg, t).speed_rpm for t in targets]
        if ch != "*" and speeds and speeds[0] is None:
            self.add(f"{where}: channel {ch!r} has no speed_rpm, so orders cannot be placed")
        elif ch == "*" and targets and all(s is None for s in speeds):
            self.add(f"{where}: no channel has speed_rpm, so orders cannot be placed")

    def above_fmax(
        self, where: str, ch: str, hz: float | None, order: float | None, profile: str = "*"
    ) -> None:
        """A band edge or tone above Fmax: with ``profile = "*"`` it must fit at least one of
        the channel's profiles, else the named profile."""
        over = []
        for t in self.targets(ch):
            mine = self.channel_profiles(t)
            profs = mine if profile == "*" else [profile] if profile in mine else []
            if not profs:
                continue
            top = _top_hz(hz, order, channel_settings(self.cfg, t).speed_rpm)
            fmax = max(effective_analysis(self.cfg, t, p).fmax_hz for p in profs)
            if not _covers(fmax, top):
                over.append(f"{t!r} ({_fmt_hz(fmax)})")
        if over:
            value = _fmt_hz(hz) if hz is not None else f"order {order:g}"
            of = "any profile of" if profile == "*" and len(self.cfg.profiles) > 1 else (
                f"profile {profile!r} of" if profile != "*" else "")
            self.add(f"{where}: {value} is above fmax_hz of {of} channel {', '.join(over)}"
                     .replace("of  channel", "of channel"))

    def names(
        self, table: str, scope: dict[tuple[str, str, str], int], j: int, ch: str,
        profile: str, names: list[str],
    ) -> None:
        for name in names:
            key = (ch, profile, name)
            if key in scope:
                self.add(
                    f"{table}[{j}].name: {name!r} repeats {table}[{scope[key]}] "
                    f"on channel {ch!r}" + ("" if profile == "*" else f", profile {profile!r}")
                )
            scope.setdefault(key, j)

    def bands(self) -> None:
        scope: dict[tuple[str, str, str], int] = {}
        fractions = ", ".join(map(str, OCTAVE_FRACTIONS))
        for j, b in enumerate(self.cfg.bands):
            w = f"bands[{j}]"
            if not self.known(b.channel, f"{w}.channel"):
                continue
            if not self.profile_known(f"{w}.profile", b.profile, b.channel):
                continue
            has_hz = b.lo_hz is not None or b.hi_hz is not None
            has_order = _is_order_band(b)
            if has_hz == has_order:
                self.add(
                    f"{w}: give lo_hz and hi_hz (Hz) or lo_order and hi_order (orders)"
                    + (", not both" if has_hz else "")
                )
                continue
            if b.octave is not None:
                if b.octave not in OCTAVE_FRACTIONS:
                    self.add(f"{w}.octave: {b.octave!r} is not one of {fractions}")
                    continue
                if has_order:
                    self.add(f"{w}.octave: octave sets are in Hz; give lo_hz and hi_hz")
                    continue
            if has_hz:
                if not self.edges(w, b.lo_hz, b.hi_hz, "lo_hz", "hi_hz"):
                    continue
                if b.octave is not None and not b.lo_hz:
                    self.add(f"{w}.lo_hz: an octave set needs lo_hz > 0")
                    continue
                if b.octave is not None and not _expand_band(b):
                    self.add(
                        f"{w}: no 1/{b.octave}-octave band lies within {b.lo_hz:g}-{b.hi_hz:g} Hz"
                    )
                    continue
                self.above_fmax(f"{w}.hi_hz", b.channel, b.hi_hz, None, b.profile)
            else:
                if not self.edges(w, b.lo_order, b.hi_order, "lo_order", "hi_order"):
                    continue
                self.speed_needed(f"{w}.lo_order", b.channel)
                self.above_fmax(f"{w}.hi_order", b.channel, None, b.hi_order, b.profile)
            self.names(
                "bands", scope, j, b.channel, b.profile, [x.name for x in _expand_band(b)]
            )

    def tones(self) -> None:
        scope: dict[tuple[str, str, str], int] = {}
        for j, t in enumerate(self.cfg.tones):
            w = f"tones[{j}]"
            if not self.known(t.channel, f"{w}.channel"):
                continue
            if not self.profile_known(f"{w}.profile", t.profile, t.channel):
                continue
            if (t.hz is None) == (t.order is None):
                self.add(f"{w}: give exactly one of hz or order")
                continue
            if t.order is not None:
                self.speed_needed(f"{w}.order", t.channel)
            self.above_fmax(
                f"{w}.{'hz' if t.hz is not None else 'order'}", t.channel, t.hz, t.order,
                t.profile,
            )
            self.names("tones", scope, j, t.channel, t.profile, [t.name])

    def alarms(self) -> None:
        for j, a in enumerate(self.cfg.alarms):
            w = f"alarms[{j}]"
            if not self.known(a.channel, f"{w}.channel"):
                continue
            if not self.profile_known(f"{w}.profile", a.profile, a.channel):
                continue
            if (a.band is not None) + (a.tone is not None) + a.overall != 1:
                self.add(f"{w}: give exactly one of band, tone or overall = true")
                continue
            if a.baseline_learn_s is None:
                if a.alert is None or a.danger is None:
                    self.add(f"{w}: give alert and danger levels (or baseline_learn_s)")
                elif not a.alert < a.danger:
                    self.add(f"{w}.danger: {a.danger:g} must be above alert {a.alert:g}")
            else:
                if a.alert is not None or a.danger is not None:
                    self.add(
                        f"{w}: give either absolute alert/danger or baseline_learn_s, not both"
                    )
                factors = (a.alert_factor, a.danger_factor)
                dbs = (a.alert_db, a.danger_db)
                if not (all(v is not None for v in factors) ^ all(v is not None for v in dbs)):
                    self.add(f"{w}: with baseline_learn_s give alert_factor and danger_factor, "
                             "or alert_db and danger_db")
            if self.open_ended:
                continue
            for key, name, lookup in (("band", a.band, bands_for), ("tone", a.tone, tones_for)):
                if name is None:
                    continue
                have = {
                    t: [x.name for p in self.watched_profiles(t, a.profile)
                        for x in lookup(self.cfg, t, p)]
                    for t in self.targets(a.channel)
                }
                if not any(name in names for names in have.values()):
                    listed = sorted({n for names in have.values() for n in names})
                    on = "any channel" if a.channel == "*" else f"channel {a.channel!r}"
                    if a.profile not in (None, "*"):
                        on += f", profile {a.profile!r}"
                    self.add(
                        f"{w}.{key}: {name!r} is not a {key} of {on} "
                        f"({key}s: {', '.join(map(repr, listed)) or 'none'})"
                    )

    def watched_profiles(self, ch: str, profile: str | None) -> list[str]:
        mine = self.channel_profiles(ch)
        return mine if profile in (None, "*") else [p for p in mine if p == profile]

    def tokens(self) -> None:
        seen: dict[str, int] = {}
        for j, t in enumerate(self.cfg.tokens):
            if t.name in seen:
                self.add(f"tokens[{j}].name: {t.name!r} repeats tokens[{seen[t.name]}]")
            seen.setdefault(t.name, j)
        svc = self.cfg.service
        if svc.tls_cert is not None and svc.tls_key is None:
            self.add("service.tls_key: missing; tls_cert needs its key (give both or neither)")
        if svc.tls_key is not None and svc.tls_cert is None:
            self.add("service.tls_cert: missing; tls_key needs its certificate (give both or "
                     "neither)")


def _cross_check(cfg: Config) -> list[str]:
    return _Checker(cfg).run()

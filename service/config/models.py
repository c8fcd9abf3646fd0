"""The configuration's models: one pydantic model per table, with help text, per-field limits
and each entry's own rules as validators (e.g. an alarm's alert below its danger).

Knows nothing about files, other tables, sockets, storage or the engine; from dsp it takes
only the closed option sets."""

from __future__ import annotations

from typing import Annotated, Any, Literal, get_args

from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Field,
    create_model,
    model_validator,
)

from dsp.bands import OCTAVE_FRACTIONS
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

from ..entries import check_alarm_entry, check_band_entry, check_tone_entry
from ..wire import FileFormat, StreamFormat
from .notify import NotifyConfig, QuietHours

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


def _valid_zone(text: str) -> str:
    from ..timefmt import zone  # zoneinfo; imported here so the models stay light

    zone(text)  # raises ValueError with the reason
    return text


TimeZoneName = Annotated[str, AfterValidator(_valid_zone)]


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
    timezone: TimeZoneName = Field(
        "UTC",
        description="Site time zone (IANA name, e.g. 'Europe/Berlin' or 'UTC'): every time "
        "the API writes as ISO 8601 carries this zone's offset, and the dashboard shows "
        "times in it.",
    )
    data_dir: str = Field(
        "quaver-data",
        description="Folder for trends, events and evidence (SQLite); a relative path is "
        "taken from the config file's folder. Env: QUAVER_DATA_DIR.",
    )


# --- [history] --------------------------------------------------------------------------


class HistorySettings(_Model):
    enabled: bool = Field(
        True, description="Store averaged spectra of every channel and profile (history)."
    )
    interval_s: int = Field(
        600,
        ge=1,
        le=86400,
        description="One stored spectrum per channel and profile every this many s: the "
        "mean of every frame's averaged power spectrum over the interval (plus one at "
        "every alarm change).",
    )
    fine_days: float = Field(
        30.0, gt=0, le=36500, description="Interval spectra are kept as they are this long, days."
    )
    coarse_step_s: int = Field(
        3600,
        ge=60,
        le=86400,
        description="Older interval spectra are thinned to one per this many s (their mean).",
    )
    coarse_days: float = Field(
        365.0,
        gt=0,
        le=36500,
        description="Thinned spectra (and alarm spectra) are kept this long, days; then dropped.",
    )
    max_mb: float = Field(
        1024.0,
        gt=0,
        description="Bound of the stored spectra, MiB: beyond it the oldest are thinned first, "
        "then dropped.",
    )

    @model_validator(mode="after")
    def _tiers(self) -> HistorySettings:
        if self.coarse_days < self.fine_days:
            raise ValueError(
                f"coarse_days={self.coarse_days:g} must be at least fine_days={self.fine_days:g}"
            )
        return self


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
    from ..sources.base import parse_networks  # the sources judge peers by the same rule

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
        "", max_length=128, description="Machine this sensor is on (grouping label; its "
        "display name and group come from a [[machines]] entry of that id, if any)."
    )
    name: str = Field(
        "", max_length=128, description="Display name, e.g. 'drive end, horizontal'; "
        "default: the id."
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

    @model_validator(mode="after")
    def _entry(self) -> BandConfig:
        check_band_entry(lo_hz=self.lo_hz, hi_hz=self.hi_hz, lo_order=self.lo_order,
                         hi_order=self.hi_order, octave=self.octave,
                         octave_fractions=OCTAVE_FRACTIONS)
        return self


class ToneConfig(_Model):
    channel: str = Field("*", description="Channel id, or '*' for every channel.")
    profile: str = Field("*", description=_PROFILE_HELP)
    name: Name = _d("Tone name (unique per channel), e.g. '1X' or 'mesh'.")
    hz: float | None = Field(None, gt=0, description="Fixed frequency, Hz.")
    order: float | None = Field(None, gt=0, description="Order of running speed.")

    @model_validator(mode="after")
    def _entry(self) -> ToneConfig:
        check_tone_entry(hz=self.hz, order=self.order)
        return self


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

    @model_validator(mode="after")
    def _entry(self) -> AlarmConfig:
        check_alarm_entry(
            band=self.band, tone=self.tone, overall=self.overall, alert=self.alert,
            danger=self.danger, baseline_learn_s=self.baseline_learn_s,
            alert_factor=self.alert_factor, danger_factor=self.danger_factor,
            alert_db=self.alert_db, danger_db=self.danger_db,
        )
        return self


class MachineConfig(_Model):
    id: str = Field(
        min_length=1, max_length=128,
        description="Machine id: the `machine` label its channels carry.",
    )
    name: str = Field("", max_length=128, description="Display name; default: the id.")
    group: str = Field(
        "", max_length=128, description="Group for filtering, e.g. an area or machine type."
    )
    description: str = Field("", max_length=1024, description="Free text.")


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
    history: HistorySettings = Field(
        default_factory=lambda: HistorySettings.model_validate({}),
        description="[history]: stored spectra, their tiers and bound.",
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
    machines: list[MachineConfig] = Field(default_factory=list, description="[[machines]]")
    notify: list[NotifyConfig] = Field(
        default_factory=list, description="[[notify]]: notification targets (service.notify)"
    )


MODELS: tuple[type[BaseModel], ...] = (
    Config,
    ServiceSettings,
    HistorySettings,
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
    MachineConfig,
    NotifyConfig,
    QuietHours,
)

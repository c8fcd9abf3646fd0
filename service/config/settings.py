"""The plain tables of a configuration: ``[service]``, ``[history]``, ``[analysis]`` and the
per-channel and per-profile analysis overrides derived from it.

Knows nothing about files, sources, alarms, sockets, storage or the engine; from dsp it takes
only the closed option sets."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import AfterValidator, BaseModel, Field, PlainValidator, create_model, model_validator

from dsp.types import Amplitude, AveragingMode, LinearEnd, OutputUnit, Quantity, WindowName
from dsp.windows import DEFAULT_KAISER_BETA

from .base import FRAME_RATIO, Listen, StrictModel

# An order profile's signal must reach ORDER_MARGIN·omax orders at the tacho's rpm_max: its
# angle-domain filter cuts at the angle rate's Nyquist order, S/2 = 1.28·omax for S = 2.56·omax
# samples per revolution (dsp.orders.AngleStream), and nothing may fold below omax.
ORDER_MARGIN = FRAME_RATIO / 2


def _valid_zone(text: str) -> str:
    from ..timefmt import zone  # zoneinfo; imported here so the models stay light

    zone(text)  # raises ValueError with the reason
    return text


TimeZoneName = Annotated[str, AfterValidator(_valid_zone)]


def _valid_band(edges: list[float]) -> list[float]:
    lo, hi = edges
    if not (0 < lo < hi):
        raise ValueError(f"band {edges!r} must be [lo_hz, hi_hz] with 0 < lo_hz < hi_hz")
    return edges


def _envelope_band(v: object) -> str | list[float]:
    """'auto' or [lo_hz, hi_hz]: one validator, so a bad value gives one error at the key
    (a union would give one per member, named by pydantic's member tags)."""
    if v == "auto":
        return "auto"
    if isinstance(v, list) and len(v) == 2 and all(
            isinstance(x, int | float) and not isinstance(x, bool) for x in v):
        return _valid_band([float(x) for x in v])
    raise ValueError(f"must be 'auto' or [lo_hz, hi_hz] (got {v!r})")


ProfileKind = Literal["spectrum", "envelope", "order"]
EnvelopeBand = Annotated[Literal["auto"] | list[float], PlainValidator(_envelope_band)]


class ServiceSettings(StrictModel):
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
    analysis_threads: int | None = Field(
        None,
        ge=1,
        le=256,
        description="Threads the sources share for sensor checks and analysis; default: as "
        "many as the machine has cores (in cluster mode: per worker actor, default 1). A "
        "source's blocks are always analysed in order.",
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


class HistorySettings(StrictModel):
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


class AnalysisSettings(StrictModel):
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
    kind: ProfileKind = Field(
        "spectrum",
        description="spectrum | envelope | order. An envelope profile band-passes the signal (see "
        "band), takes its envelope (full-wave rectified and low-passed) and shows the "
        "envelope's spectrum up to fmax_hz, in acceleration: bearing defects' strike rates "
        "(BPFO, BPFI, BSF, FTF) appear there as lines. Its unit is always acceleration. "
        "An order profile resamples the signal at constant shaft angle from a tacho's "
        "pulses (computed order tracking; the channel needs speed_from) and shows the "
        "spectrum in orders of running speed up to omax, the order resolution omax/lines; its "
        "unit is always acceleration.",
    )
    omax: float = Field(
        20.0, gt=0, le=1000,
        description="Order profiles: the highest order shown (orders of running speed); the "
        "order resolution is omax/lines and a frame spans lines/omax revolutions.",
    )
    speed_band_pct: float = Field(
        5.0, gt=0, le=100,
        description="Order profiles: an average holds only frames whose mean speed is within "
        "± this % of its first frame's; a frame outside starts a new average (the frame says "
        "so: average_restarted), so an average never mixes speeds further apart.",
    )
    band: EnvelopeBand = Field(
        "auto",
        description="Envelope profiles: the band-pass [lo_hz, hi_hz] before demodulation, "
        "Hz (fmax_hz < lo_hz < hi_hz < fs/2), or 'auto': the band of greatest spectral "
        "kurtosis by Antoni's fast kurtogram, chosen again every kurtogram_interval_s on the "
        "latest kurtogram_length_s of samples, and changed only when another band is "
        "clearly and repeatedly better.",
    )
    kurtogram_interval_s: float = Field(
        10.0, ge=1, le=86400,
        description="Envelope profiles: a kurtogram every this many s of the stream, s.",
    )
    kurtogram_length_s: float = Field(
        1.0, ge=0.05, le=10,
        description="Envelope profiles: the latest samples each kurtogram analyses, s.",
    )
    kurtogram_levels: int = Field(
        6, ge=1, le=10,
        description="Envelope profiles: the kurtogram's depth; its narrowest bands are "
        "fs/2^(levels+1) Hz wide (fewer where kurtogram_length_s holds fewer than "
        "2^(levels+7) samples).",
    )


def _override_model(name: str, scope: str) -> type[BaseModel]:
    fields: dict[str, Any] = {}
    for key, f in AnalysisSettings.model_fields.items():
        ann = Annotated[(f.annotation, *f.metadata)] if f.metadata else f.annotation
        help_text = f"{f.description} Overrides [analysis] {scope}."
        fields[key] = (ann | None, Field(None, description=help_text))  # type: ignore[operator]
    return create_model(name, __base__=StrictModel, **fields)


AnalysisOverride = _override_model("AnalysisOverride", "for this channel")
ProfileSettings = _override_model(
    "ProfileSettings", "(and the channel's own overrides) in this profile"
)
DEFAULT_PROFILE = "default"  # the one profile of a config without [profiles]

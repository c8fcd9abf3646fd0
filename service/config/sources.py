"""The ``[[sources]]`` table: one model per source kind (tcp, udp, file, simulated) and the
union the config parses them into.

Knows nothing about other tables, sockets or the engine; peers are judged by the sources'
own network rule."""

from __future__ import annotations

from typing import Annotated, Literal, get_args

from pydantic import AfterValidator, Field

from ..wire import FileFormat, StreamFormat
from .base import Id, Listen, Name, StrictModel, described

SourceKind = Literal["tcp", "udp", "file", "simulated"]


class _SourceBase(StrictModel):
    id: Id = described("Source id: letters, digits, '.', '_', '-' (url-safe), at most 64.")
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
    node: Id | None = Field(
        None,
        description="With [cluster] engine = \"ray\": the node this source must run on (a "
        "network source: the node whose address it listens on), matched to the Ray custom "
        "resource quaver-node-<node> of that node; unset: the source may run on any node "
        "and moves when its node is lost.",
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
    kind: Literal["tcp"] = described("Source kind.")
    listen: Listen = described("host:port quaver listens on for one producer at a time.")
    format: StreamFormat = described(
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
    kind: Literal["udp"] = described("Source kind.")
    listen: Listen = described("host:port quaver receives framed datagrams on.")
    format: Literal["framed"] = Field("framed", description="Datagrams are framed: one frame each.")
    max_frame_bytes: int | None = Field(None, ge=1024, le=16 * 2**20, description=_MAX_FRAME_HELP)
    allow_from: Cidrs = Field(None, description=_ALLOW_FROM_HELP)


class FileSourceConfig(_SourceBase):
    kind: Literal["file"] = described("Source kind.")
    path: str = described("File to read; relative paths are taken from the config file's folder.")
    format: FileFormat = described(
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
    kind: Literal["simulated"] = described("Source kind.")
    scenario: Name = Field(
        "demo", description="Simulated plant scenario: 'demo' (service/sources/simulated.py) or "
        "'variable-speed' (a fan ramping 900–1500 r/min with a tacho, its bearing growing "
        "an outer-race defect from fault_start_s at 10240 Hz and above: "
        "service/sources/varspeed.py)."
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
    speed_ramp_s: float = Field(
        120.0, gt=0, le=1e6,
        description="Scenario 'variable-speed': time for one speed ramp between 900 and "
        "1500 r/min (and back), s.",
    )


SOURCE_KINDS: tuple[str, ...] = get_args(SourceKind)
SourceConfig = Annotated[
    TcpSourceConfig | UdpSourceConfig | FileSourceConfig | SimulatedSourceConfig,
    Field(discriminator="kind"),
]

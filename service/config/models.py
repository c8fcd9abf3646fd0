"""The whole configuration: one model holding every table, and the list of every model for
the docs and the describer. The tables themselves live in base, settings, sources, plant and
notify.

Knows nothing about files, sockets, storage or the engine."""

from __future__ import annotations

from pydantic import BaseModel, Field

from .base import Id, StrictModel
from .cluster import ClusterConfig
from .mqtt import MqttConfig
from .notify import NotifyConfig, QuietHours
from .opcua import OpcuaConfig
from .plant import (
    AlarmConfig,
    BandConfig,
    BearingConfig,
    ChannelConfig,
    MachineConfig,
    TokenConfig,
    ToneConfig,
)
from .settings import (
    AnalysisOverride,
    AnalysisSettings,
    HistorySettings,
    ProfileSettings,
    ServiceSettings,
)
from .sources import (
    FileSourceConfig,
    SimulatedSourceConfig,
    SourceConfig,
    TcpSourceConfig,
    UdpSourceConfig,
)


class Config(StrictModel):
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
    bearings: list[BearingConfig] = Field(
        default_factory=list,
        description="[[bearings]]: rolling-element bearing geometry for defect frequencies",
    )
    notify: list[NotifyConfig] = Field(
        default_factory=list, description="[[notify]]: notification targets (service.notify)"
    )
    mqtt: MqttConfig = Field(
        default_factory=lambda: MqttConfig.model_validate({}),
        description="[mqtt]: publishing to an MQTT broker (service.mqtt)",
    )
    opcua: OpcuaConfig = Field(
        default_factory=lambda: OpcuaConfig.model_validate({}),
        description="[opcua]: the optional OPC UA server (service.opcua)",
    )
    cluster: ClusterConfig = Field(
        default_factory=lambda: ClusterConfig.model_validate({}),
        description="[cluster]: the sources' analysis on Ray actors (service.cluster)",
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
    BearingConfig,
    NotifyConfig,
    QuietHours,
    MqttConfig,
    OpcuaConfig,
    ClusterConfig,
)

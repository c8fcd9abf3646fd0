"""``describe_settings()``: every setting with its type, default and help text, for the docs
and ``--help``.

Reads the models only."""

from __future__ import annotations

import types
from typing import Annotated, Any, Literal, Union, get_args, get_origin

from pydantic import BaseModel

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
from .sources import FileSourceConfig, SimulatedSourceConfig, TcpSourceConfig, UdpSourceConfig


def describe_settings() -> list[tuple[str, str, str, str]]:
    """Every setting as (table and key, type, default, help text), for docs and ``--help``."""
    tables: list[tuple[str, type[BaseModel]]] = [
        ("[service]", ServiceSettings),
        ("[analysis]", AnalysisSettings),
        ("[history]", HistorySettings),
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
        ("[[machines]]", MachineConfig),
        ("[[bearings]]", BearingConfig),
        ("[[notify]]", NotifyConfig),
        ("[[notify]] quiet_hours", QuietHours),
        ("[mqtt]", MqttConfig),
        ("[opcua]", OpcuaConfig),
        ("[cluster]", ClusterConfig),
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

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

# The config → dsp lookups live in service.lookups, beside the profile plan; these names
# stay importable from here for code written before the move.
from ..lookups import bands_for, effective_analysis, tones_for
from .base import FRAME_RATIO, ID_PATTERN, QUANTITY_OF_UNIT, ConfigError, parse_listen
from .checks import check_listen_allowed, open_source_warnings
from .describe import describe_settings
from .load import load_config, parse_config
from .models import MODELS, Config
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
from .queries import (
    channel_ids,
    channel_settings,
    planning_rpm,
    profile_names,
    profiles_of,
    source_of,
)
from .settings import (
    DEFAULT_PROFILE,
    AnalysisOverride,
    AnalysisSettings,
    HistorySettings,
    ProfileSettings,
    ServiceSettings,
)
from .sources import (
    SOURCE_KINDS,
    FileSourceConfig,
    SimulatedSourceConfig,
    SourceConfig,
    TcpSourceConfig,
    UdpSourceConfig,
)

__all__ = [
    "FRAME_RATIO",
    "ID_PATTERN",
    "MODELS",
    "MqttConfig",
    "QUANTITY_OF_UNIT",
    "SOURCE_KINDS",
    "AlarmConfig",
    "AnalysisOverride",
    "AnalysisSettings",
    "DEFAULT_PROFILE",
    "ProfileSettings",
    "BandConfig",
    "BearingConfig",
    "ChannelConfig",
    "Config",
    "ConfigError",
    "FileSourceConfig",
    "MachineConfig",
    "HistorySettings",
    "NotifyConfig",
    "OpcuaConfig",
    "QuietHours",
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
    "planning_rpm",
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

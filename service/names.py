"""Display names of machines and channels from the config ([[machines]], a channel's ``name``).

Knows the config models only; the API, notifications and the CLI name a channel one way."""

from __future__ import annotations

from .config.models import Config
from .config.plant import ChannelConfig, MachineConfig

__all__ = ["channel_label", "channel_name", "machine_name", "machine_of"]


def _channel(cfg: Config, channel: str) -> ChannelConfig | None:
    return next((c for c in cfg.channels if c.id == channel), None)


def machine_of(cfg: Config, channel: str) -> MachineConfig | None:
    """The [[machines]] entry of ``channel``'s machine, if the config has one."""
    c = _channel(cfg, channel)
    if c is None or not c.machine:
        return None
    return next((m for m in cfg.machines if m.id == c.machine), None)


def machine_name(cfg: Config, machine: str) -> str:
    """The display name of machine id ``machine`` (the id when it has none)."""
    m = next((m for m in cfg.machines if m.id == machine), None)
    return (m.name if m is not None and m.name else machine)


def channel_name(cfg: Config, channel: str) -> str:
    """The channel's own display name (its id when it has none)."""
    c = _channel(cfg, channel)
    return c.name if c is not None and c.name else channel


def channel_label(cfg: Config, channel: str) -> str:
    """How a channel is named to a person: 'Machine · channel name (id)', e.g.
    'Cooling-water pump 1 · drive end, horizontal (p1-de-h)'; parts that are not configured
    are left out ('p1-de-h' alone when nothing is)."""
    c = _channel(cfg, channel)
    parts = []
    if c is not None and c.machine:
        parts.append(machine_name(cfg, c.machine))
    own = channel_name(cfg, channel)
    parts.append(own if own == channel else f"{own} ({channel})")
    return " · ".join(parts)

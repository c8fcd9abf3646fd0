"""Questions asked of a validated config: which channels, which source, which settings and
profiles a channel has.

Pure functions over the models; nothing about the engine (what a profile analyses is in
``service.lookups``)."""

from __future__ import annotations

from pydantic import BaseModel

from .models import Config
from .plant import ChannelConfig
from .settings import DEFAULT_PROFILE
from .sources import SourceConfig


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


def planning_rpm(cfg: Config, channel_id: str) -> float | None:
    """The speed, r/min, orders are placed at when the config is checked (Fmax, '*' bands
    and tones): ``speed_rpm``; else, where the speed is measured or written, the highest
    plausible one (the tacho's ``rpm_max`` for ``speed_from``, the channel's own for
    ``speed = 'estimated'`` or ``'manual'``); None without a speed."""
    ch = channel_settings(cfg, channel_id)
    if ch.speed_rpm is not None:
        return ch.speed_rpm
    if ch.speed_from is not None:
        return channel_settings(cfg, ch.speed_from).rpm_max
    return ch.rpm_max if ch.speed is not None else None


def profile_names(cfg: Config) -> list[str]:
    """Every analysis profile name, in file order (``["default"]`` without [profiles])."""
    return list(cfg.profiles) or [DEFAULT_PROFILE]


def profiles_of(cfg: Config, channel_id: str) -> list[str]:
    """The profiles ``channel_id`` runs, its primary one first: its own ``profiles``, else
    every profile but those whose table makes them envelope or order profiles (``kind =
    "envelope"`` or ``"order"``: a channel runs one only when it lists it)."""
    own = channel_settings(cfg, channel_id).profiles
    if own:
        return list(own)
    names = profile_names(cfg)
    tables: dict[str, BaseModel] = dict(cfg.profiles)
    return [n for n in names if n not in tables
            or tables[n].model_dump().get("kind") not in ("envelope", "order")] or names

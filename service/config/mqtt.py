"""The ``[mqtt]`` table: the broker quaver publishes to, what it publishes (band values,
tones, spectra, channel states, alarm events) under which topic prefix, and how it queues.

Knows pydantic; nothing of paho, sockets, the hub or other tables (the cross-checks that need
them are :func:`mqtt_problems`)."""

from __future__ import annotations

import importlib.util
from collections.abc import Mapping
from typing import TYPE_CHECKING, Annotated, Literal, get_args

from pydantic import AfterValidator, Field, model_validator

from .base import Listen, StrictModel

if TYPE_CHECKING:
    from .models import Config

__all__ = ["MQTT_KINDS", "MqttConfig", "MqttKind", "mqtt_problems", "topic_level_problem"]

MqttKind = Literal["overall", "bands", "tones", "spectrum", "status", "alarms"]
MQTT_KINDS: tuple[str, ...] = get_args(MqttKind)
DEFAULT_KINDS: tuple[MqttKind, ...] = ("overall", "bands", "tones", "status", "alarms")
_ENV_NAME = r"^[A-Za-z_][A-Za-z0-9_]{0,127}$"


def topic_level_problem(text: str) -> str:
    """Why ``text`` cannot be one level of a topic name ('' if it can): MQTT 3.1.1 §4.7.1
    reserves '/', '+' and '#', and §1.5.3 forbids U+0000."""
    bad = sorted({c for c in text if c in "/+#\0"})
    if not text:
        return "is empty"
    if bad:
        return "holds " + ", ".join(repr(c) for c in bad) + " (reserved in MQTT topic names)"
    return ""


def _valid_prefix(text: str) -> str:
    """A topic prefix: 1–8 levels, each a valid topic level without spaces; not starting
    with '$' (brokers keep $-topics for themselves: MQTT 3.1.1 §4.7.2)."""
    levels = text.split("/")
    if len(levels) > 8 or len(text) > 128:
        raise ValueError(f"{text!r} is longer than 8 levels or 128 characters")
    for lv in levels:
        why = topic_level_problem(lv) or ("holds a space" if any(c.isspace() for c in lv)
                                          else "")
        if why:
            raise ValueError(f"{text!r}: level {lv!r} {why}")
    if text.startswith("$"):
        raise ValueError(f"{text!r} starts with '$' (topics the broker keeps for itself)")
    return text


class MqttConfig(StrictModel):
    enabled: bool = Field(
        False, description="Publish to an MQTT broker (needs the 'mqtt' extra: paho-mqtt)."
    )
    broker: Listen = Field(
        "127.0.0.1:1883", description="Broker address host:port (8883 is the usual TLS port)."
    )
    tls: bool = Field(False, description="Connect with TLS (the broker's certificate is "
                      "checked against ca_file, else the system's trusted CAs).")
    ca_file: str | None = Field(
        None, min_length=1,
        description="PEM file of the CA(s) that sign the broker's certificate (relative to the "
        "config file); only with tls = true.",
    )
    client_id: str | None = Field(
        None, min_length=1, max_length=64, pattern=r"^[A-Za-z0-9._-]+$",
        description="MQTT client id; default 'quaver-<host name>'. Two clients with one id "
        "push each other off the broker: give each service its own.",
    )
    username: str | None = Field(None, min_length=1, max_length=256,
                                 description="User name for the broker, if it asks for one.")
    password: str | None = Field(
        None, min_length=1, max_length=1024,
        description="Password for the broker (prefer password_env: keeps it out of the file).",
    )
    password_env: str | None = Field(
        None, pattern=_ENV_NAME,
        description="Name of an environment variable holding the broker password; checked at "
        "load.",
    )
    topic_prefix: Annotated[str, AfterValidator(_valid_prefix)] = Field(
        "quaver",
        description="First level(s) of every topic, e.g. 'site-a/quaver' (no '+', '#', empty "
        "level or leading '$').",
    )
    qos: Literal[0, 1] = Field(
        0, description="QoS of band, tone, spectrum and status messages: 0 (at most once) | 1 "
        "(at least once). Alarm events are always QoS 1.",
    )
    retain: Literal["status", "latest"] = Field(
        "status",
        description="What the broker keeps for new subscribers: status (channel states and "
        "the service state only) | latest (also the latest bands, tones and spectrum of each "
        "channel and profile). Alarm events are never retained.",
    )
    publish: list[MqttKind] = Field(
        default_factory=lambda: list(DEFAULT_KINDS), min_length=1,
        description="What to publish: overall and bands (both on the 'bands' topic) | tones | "
        "spectrum (every spectrum_interval_s) | status (retained channel states) | alarms "
        "(alarm and state events).",
    )
    interval_s: float = Field(
        1.0, ge=0.0, le=3600.0,
        description="Shortest time between two band and tone messages of one channel and "
        "profile, s: each round publishes the newest frame of every channel (0: every "
        "analysed frame, several a second per channel). Alarm events and status changes "
        "are sent at once whatever this is.",
    )
    spectrum_interval_s: float = Field(
        60.0, ge=1.0, le=86400.0,
        description="Shortest time between two spectra of one channel and profile, s.",
    )
    keepalive_s: int = Field(
        30, ge=5, le=3600,
        description="MQTT keep-alive, s: the broker publishes the last will "
        "('<prefix>/service/state' = offline) within 1.5 × this after the link is lost.",
    )
    reconnect_max_s: float = Field(
        30.0, ge=1.0, le=3600.0,
        description="Longest wait between reconnection attempts, s (from 1 s, doubled each "
        "attempt).",
    )
    backlog_max: int = Field(
        10000, ge=10, le=1_000_000,
        description="Messages held while the broker cannot be reached; beyond this the oldest "
        "are dropped and counted (health, metrics).",
    )

    speed_writes: bool = Field(
        False, description="Take running speeds written to '<prefix>/<machine>/<channel>/"
        "speed/set' for channels configured speed = 'manual' (who may write is the broker's "
        "ACL: MQTT carries no quaver role).",
    )
    speed_max_age_s: float = Field(
        60.0, gt=0, le=86400.0,
        description="A speed message whose 'time' is older (or further ahead) than this, s, "
        "is refused: a retained or delayed message must not set an old speed.",
    )

    @model_validator(mode="after")
    def _pairs(self) -> MqttConfig:
        if self.ca_file is not None and not self.tls:
            raise ValueError("ca_file is given but tls = false: set tls = true or drop ca_file")
        if self.password is not None and self.password_env is not None:
            raise ValueError("give password or password_env, not both")
        if (self.password is not None or self.password_env is not None) and not self.username:
            raise ValueError("a password needs a username")
        return self


def _have_paho() -> bool:
    try:
        return importlib.util.find_spec("paho.mqtt.client") is not None
    except (ImportError, ValueError):
        return False


def mqtt_problems(cfg: Config, env: Mapping[str, str]) -> list[str]:
    """One line per problem of an enabled ``[mqtt]`` that its model cannot see: paho-mqtt
    missing, an unset ``password_env``, a machine id that cannot be a topic level."""
    m = cfg.mqtt
    if not m.enabled:
        return []
    out = []
    if not _have_paho():
        out.append("mqtt.enabled: publishing needs paho-mqtt, which is not installed "
                   "(pip install 'quaver[mqtt]')")
    if m.password_env is not None and not env.get(m.password_env):
        out.append(f"mqtt.password_env: the environment variable {m.password_env} is unset or "
                   "empty")
    if m.speed_writes and not any(ch.speed == "manual" for ch in cfg.channels):
        out.append("mqtt.speed_writes: no channel is configured speed = 'manual', so no speed "
                   "topic is subscribed")
    for j, ch in enumerate(cfg.channels):
        if ch.machine and (why := topic_level_problem(ch.machine)):
            out.append(f"channels[{j}].machine: {ch.machine!r} {why}; with [mqtt] enabled a "
                       "machine id is a topic level")
    return out

"""The ``[[notify]]`` table: who is told of which events, by apprise URL, with quiet hours,
a rate limit and a digest; the URL check that apprise can parse every target.

Knows pydantic and apprise's URL parser; nothing of the store, the sender or other tables."""

from __future__ import annotations

import re
from typing import Annotated, Literal, get_args

from pydantic import AfterValidator, Field, model_validator

from .base import StrictModel

__all__ = [
    "NOTIFY_EVENTS",
    "NotifyConfig",
    "NotifyEvent",
    "QuietHours",
    "check_notify_url",
    "split_urls",
]

NotifyEvent = Literal["raised", "cleared", "ack", "status", "source"]
NOTIFY_EVENTS: tuple[str, ...] = get_args(NotifyEvent)
DEFAULT_EVENTS: tuple[NotifyEvent, ...] = ("raised", "status", "source")
_HHMM = re.compile(r"^([01]\d|2[0-3]):([0-5]\d)$")
_ENV_NAME = r"^[A-Za-z_][A-Za-z0-9_]{0,127}$"


def split_urls(text: str) -> list[str]:
    """The URLs in ``text`` (one environment variable may hold several, with spaces or new
    lines between them; a comma may be part of a URL, e.g. two e-mail recipients)."""
    return text.split()


def check_notify_url(url: str) -> str:
    """``url`` if apprise can make a notification service of it; ValueError naming the
    scheme otherwise (the URL itself is not repeated: it may hold a password)."""
    import apprise  # imported here so that loading a config without [[notify]] stays light

    scheme = url.split("://", 1)[0] if "://" in url else ""
    if not scheme:
        raise ValueError("a notification URL needs a scheme, e.g. 'mailto://…' or 'json://…'")
    if apprise.Apprise.instantiate(url, suppress_exceptions=True) is None:
        hint = ""
        if scheme in ("http", "https"):
            hint = "; for a webhook that takes JSON write json:// (jsons:// for HTTPS)"
        raise ValueError(f"apprise cannot use this {scheme}:// URL (unknown scheme or bad "
                         f"parts){hint}")
    return url


def _valid_hhmm(text: str) -> str:
    if not _HHMM.match(text):
        raise ValueError(f"{text!r} is not a time of day HH:MM (00:00 … 23:59)")
    return text


HHMM = Annotated[str, AfterValidator(_valid_hhmm)]


class QuietHours(StrictModel):
    start: HHMM = Field(description="Start of the quiet hours, HH:MM in service.timezone.")
    end: HHMM = Field(
        description="End of the quiet hours, HH:MM in service.timezone (before start: they "
        "run over midnight)."
    )


class NotifyConfig(StrictModel):
    name: str = Field(
        pattern=r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$",
        description="Entry name (url-safe, unique): in the idempotency key, health and metrics.",
    )
    urls: list[Annotated[str, AfterValidator(check_notify_url)]] = Field(
        default_factory=list,
        description="apprise URLs of the targets, e.g. 'mailto://…' or 'json://…' "
        "(see docs/notifications.md); checked when the config is loaded.",
    )
    urls_env: str | None = Field(
        None,
        pattern=_ENV_NAME,
        description="Name of an environment variable holding more apprise URLs (spaces "
        "between them): keeps passwords out of the file. Checked at load.",
    )
    events: list[NotifyEvent] = Field(
        default_factory=lambda: list(DEFAULT_EVENTS),
        min_length=1,
        description="Which events: raised (an alarm goes to alert or danger, loss of signal "
        "included) | cleared (it falls back) | ack (acknowledged) | status (a channel's "
        "data-quality state changes, e.g. sensor fault) | source (a source's pipeline fails).",
    )
    channels: list[str] = Field(
        default_factory=lambda: ["*"],
        min_length=1,
        description="Channel ids or shell-style globs ('p1-*'); default every channel.",
    )
    machines: list[str] = Field(
        default_factory=lambda: ["*"],
        min_length=1,
        description="Machine ids or globs (a channel's `machine`); default every channel, "
        "with or without a machine.",
    )
    min_level: Literal["alert", "danger"] = Field(
        "alert",
        description="Lowest alarm level sent for raised, cleared and ack events: alert | "
        "danger (status and source events have no level and are not filtered by it).",
    )
    quiet_hours: QuietHours | None = Field(
        None,
        description="During these hours only danger-level alarm events are sent; the rest "
        "are not sent (the event log keeps them).",
    )
    rate_limit: int = Field(
        30, ge=1, le=10000,
        description="At most this many messages per rate_window_s; beyond it events are "
        "recorded as 'limited' in the outbox (counted in health and metrics), not sent.",
    )
    rate_window_s: float = Field(3600.0, gt=0, le=7 * 86400, description="Rate-limit window, s.")
    digest_after: int = Field(
        5, ge=1, le=1000,
        description="When more than this many events reach the entry within digest_window_s, "
        "the further ones are gathered for digest_window_s and sent as one message listing "
        "them.",
    )
    digest_window_s: float = Field(
        60.0, gt=0, le=86400, description="Digest window (and gathering time), s."
    )
    retry_first_s: float = Field(
        10.0, ge=0.1, le=3600,
        description="First retry after a failed send, s; doubled at every failure up to "
        "retry_max_s.",
    )
    retry_max_s: float = Field(3600.0, ge=0.1, le=86400, description="Longest wait between "
                               "retries, s.")
    give_up_after_s: float = Field(
        86400.0, gt=0, le=30 * 86400,
        description="A message not sent this long after its event is given up, marked "
        "failed (health, metrics) and no longer retried, s.",
    )
    dashboard_url: str | None = Field(
        None,
        pattern=r"^https?://[^\s]+$",
        description="Base URL of the dashboard as readers reach it, e.g. "
        "'https://quaver.example.org/': each message links the channel's page.",
    )

    @model_validator(mode="after")
    def _some_target(self) -> NotifyConfig:
        if not self.urls and self.urls_env is None:
            raise ValueError("give urls, urls_env or both: the entry has no target")
        if self.retry_max_s < self.retry_first_s:
            raise ValueError(f"retry_max_s={self.retry_max_s:g} is below retry_first_s="
                             f"{self.retry_first_s:g}")
        return self

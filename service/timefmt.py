"""Times as people and plant software read them: ISO 8601 with the site's UTC offset.

Knows zoneinfo and nothing of the service; the API, the CLI and notifications use it so a
time is written one way everywhere."""

from __future__ import annotations

from datetime import datetime
from functools import lru_cache
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

__all__ = ["iso_time", "zone"]


@lru_cache(maxsize=64)
def zone(name: str) -> ZoneInfo:
    """The IANA zone ``name`` ('UTC', 'Europe/Berlin', …); ValueError if unknown."""
    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError, OSError) as e:  # OSError: a name too long for a path
        raise ValueError(
            f"unknown time zone {name!r}: use an IANA name such as 'UTC' or 'Europe/Berlin'"
        ) from e


def iso_time(t_ns: int, tz: str | ZoneInfo = "UTC", *, digits: int = 3) -> str:
    """``t_ns`` (ns since the Unix epoch) as ISO 8601 in ``tz`` with its offset, e.g.
    ``2026-12-02T17:05:09.123+01:00`` (``digits`` decimals of the second: 0, 3 or 6).

    The offset is the zone's at that instant (summer time included); UTC is written
    ``+00:00``, not ``Z``, so every time has the same shape."""
    z = zone(tz) if isinstance(tz, str) else tz
    d = datetime.fromtimestamp(t_ns // 1_000_000_000, z).replace(
        microsecond=(t_ns % 1_000_000_000) // 1000
    )
    spec = {0: "seconds", 3: "milliseconds", 6: "microseconds"}[digits]
    return d.isoformat(timespec=spec)

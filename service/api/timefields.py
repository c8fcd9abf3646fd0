"""ISO 8601 times beside the ns times of an API document: ``t_ns`` gets ``time``,
``since_ns`` gets ``since`` … (:data:`TIME_FIELDS`), in the site zone with its offset.

Knows service.timefmt only; the routers call :func:`with_times` on what they answer."""

from __future__ import annotations

from typing import TypeVar

from ..timefmt import iso_time

# ns field → its ISO 8601 companion (docs/api.md "Times")
TIME_FIELDS: dict[str, str] = {
    "t_ns": "time",
    "timestamp_ns": "time",
    "t0_ns": "t0",
    "since_ns": "since",
    "value_ns": "value_time",
    "acked_ns": "acked_time",
    "shelved_ns": "shelved_time",
    "shelved_until_ns": "shelved_until",
    "status_since_ns": "status_since",
    "last_error_ns": "last_error_time",
}
T = TypeVar("T")
_LO, _HI = 0, 253_402_300_799 * 10**9  # years 1970 … 9999: a producer's clock can be anything


def iso_or_none(t_ns: object, tz: str) -> str | None:
    """``t_ns`` as ISO 8601 in ``tz``; None for None, 0 (never) or a time out of range."""
    if not isinstance(t_ns, int) or isinstance(t_ns, bool) or not _LO < t_ns < _HI:
        return None
    return iso_time(t_ns, tz)


def with_times(doc: T, tz: str) -> T:
    """``doc`` with an ISO 8601 companion beside every ns time of :data:`TIME_FIELDS`, in
    nested dicts and lists of dicts too (arrays of numbers are not walked). Changes
    ``doc`` in place and returns it."""
    if isinstance(doc, dict):
        for k in list(doc):
            v = doc[k]
            if k in TIME_FIELDS and TIME_FIELDS[k] not in doc:
                doc[TIME_FIELDS[k]] = iso_or_none(v, tz)
            elif isinstance(v, dict | list):
                with_times(v, tz)
    elif isinstance(doc, list) and doc and isinstance(doc[0], dict | list):
        for item in doc:
            with_times(item, tz)
    return doc

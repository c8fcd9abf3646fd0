"""Notifications: ``[[notify]]`` entries told of alarm and channel events by e-mail, webhook
or any target apprise speaks, through a persistent outbox in the store.

Knows the config, the store's outbox and apprise; nothing of HTTP or the event loop.

Flow
    ``Store.put_events`` asks the :class:`Router` (``route``, a pure function of the events,
    the entries and their recent counts) for outbox rows and writes them in the events' own
    transaction: an event is never stored without its notifications, nor they without it.
    After the commit the :class:`Notifier` thread (``sender``) sends each due message with
    apprise (``message`` renders it), marks it sent on the store's writer, or retries with
    back-off (``retry_first_s`` doubled up to ``retry_max_s``) until ``give_up_after_s``.

Exactly once, as far as it goes
    A pending row survives a crash and is sent at the next start. The one window for a
    second copy is a crash after a target took the message and before "sent" committed;
    every copy carries the same idempotency key (``quaver-<store id>-<event id>-<entry>``)
    in its text and, where the target takes them, as the ``X-Quaver-Key`` header and the
    JSON field ``quaver_key``, so a receiver can drop the repeat.
"""

from .message import CAUTION, Message, idempotency_key, render
from .route import Router, event_class, event_level, in_quiet_hours, route_events
from .sender import HOLD_ENV, Notifier, send_apprise

__all__ = [
    "CAUTION",
    "HOLD_ENV",
    "Message",
    "Notifier",
    "Router",
    "event_class",
    "event_level",
    "idempotency_key",
    "in_quiet_hours",
    "render",
    "route_events",
    "send_apprise",
]

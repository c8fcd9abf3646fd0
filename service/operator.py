"""Operator actions on many alarms at once — acknowledge-all, shelve, unshelve — and the
expiry of shelves, committed to the store before they are applied and announced.

Works on a :class:`~service.context.ServiceContext`-like service (alarms, store, hub);
knows nothing about HTTP or the pipelines."""

from __future__ import annotations

import asyncio
import copy
import logging
from collections.abc import Callable
from typing import Any, Protocol

from .alarms import AlarmEngine, AlarmError, AlarmEvent
from .hub import Hub
from .store import Store, StoreError

log = logging.getLogger("quaver")


class _Service(Protocol):
    alarms: AlarmEngine
    store: Store
    hub: Hub
    store_errors: int


async def commit_action(
    svc: _Service, action: Callable[[AlarmEngine], list[AlarmEvent]], what: str,
    *, undone: str = "nothing was changed",
) -> list[dict[str, Any]]:
    """Run ``action`` on a copy of the alarm engine, commit its events and the state after
    them in one transaction, then run it on the live engine and announce the events.

    The action's own errors (UnknownAlarm, AckRefused, ShelveRefused, ValueError) raise
    before anything is written. A store that fails raises :class:`StoreError` and changes
    nothing (the API answers 503; ``undone`` says what did not happen)."""
    trial = copy.deepcopy(svc.alarms)
    events = action(trial)
    if not events:
        return []
    try:
        stored = await asyncio.wrap_future(
            svc.store.put_events(events, alarm_state=trial.snapshot())
        )
    except Exception as err:
        svc.store_errors += 1
        log.error("%s not stored, not applied: %s", what, err)
        raise StoreError(f"the store cannot write ({err}); {undone}") from err
    try:
        action(svc.alarms)
    except (AlarmError, ValueError) as err:  # changed while committing (rare): logged
        log.warning("%s stored but no longer applies: %s", what, err)
    out = [e.as_dict() for e in stored]
    for d in out:
        svc.hub.publish_event(d)
    log.info("%s: %d event(s)", what, len(out))
    return out


async def expire_shelves(svc: _Service, t_ns: int) -> None:
    """End the shelves due at ``t_ns``; their events are committed, then announced (a store
    that fails is logged and counted: the shelve has ended all the same)."""
    events = svc.alarms.expire_shelves(t_ns)
    if not events:
        return
    try:
        stored = await asyncio.wrap_future(
            svc.store.put_events(events, alarm_state=svc.alarms.snapshot())
        )
    except Exception as err:
        svc.store_errors += 1
        log.error("could not store %d shelve expiries (not announced): %s", len(events), err)
        return
    for e in stored:
        log.info("alarm event %s: %s", e.id, e.message)
        svc.hub.publish_event(e.as_dict())

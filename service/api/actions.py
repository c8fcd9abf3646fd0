"""Operator actions on alarms: acknowledge-all (by machine, channel or a list of rules),
shelve and unshelve a rule, and the list of shelved rules.

Writes only through the service (``ServiceContext.act``: committed, then applied)."""

from __future__ import annotations

import time
from collections.abc import Callable
from datetime import datetime
from typing import Annotated, Any

from fastapi import APIRouter, Body, HTTPException, Path
from pydantic import BaseModel, Field

from ..alarms import (
    SHELVE_MAX_S,
    AckRefused,
    AlarmEngine,
    AlarmEvent,
    ShelveRefused,
    UnknownAlarm,
)
from ..config import Config
from ..context import ServiceContext
from ..store import StoreError
from ..timefmt import zone
from .deps import AlarmsDep, ConfigDep, ServiceDep
from .rules import select
from .security import Operator, Reader, role_responses
from .timefields import with_times

router = APIRouter(tags=["alarms"])
_NS = 1_000_000_000
_WRITE_ERRORS: dict[int | str, dict[str, Any]] = {
    **role_responses("operator"),
    404: {"description": "no such alarm rule"},
    409: {"description": "the alarm or rule is not in a state this action applies to"},
    422: {"description": "the body is not valid (e.g. no reason, an end time too far)"},
    503: {"description": "the store cannot write; nothing was changed (retry later)"},
}


class AckAllBody(BaseModel):
    rules: list[Annotated[str, Field(max_length=200)]] | None = Field(
        None, max_length=100_000, description="rule ids (e.g. the rules a view shows)")
    machine: str | None = Field(None, max_length=128, description="machine id")
    channel: str | None = Field(None, max_length=64, description="channel id")
    note: str = Field("", max_length=1000, description="Why / what was done (free text).")


class ShelveBody(BaseModel):
    reason: str = Field(min_length=1, max_length=1000, description="why it is shelved")
    until: datetime | None = Field(
        None, description="end time, ISO 8601; without an offset it is the site's local time")
    duration_s: float | None = Field(
        None, gt=0, le=SHELVE_MAX_S, description="or: shelved for this long from now, s")


def _run_errors(e: Exception) -> HTTPException:
    if isinstance(e, UnknownAlarm):
        return HTTPException(404, str(e))
    if isinstance(e, AckRefused | ShelveRefused):
        return HTTPException(409, str(e))
    if isinstance(e, StoreError):
        return HTTPException(503, str(e), headers={"Retry-After": "5"})
    return HTTPException(422, str(e))


async def _on_rule(
    service: ServiceContext, cfg: Config, rule: str,
    action: Callable[[AlarmEngine], list[AlarmEvent]], what: str,
) -> dict[str, Any]:
    """Run one rule's action through the service; its event and the rule's alarm after it."""
    try:
        events = await service.act(action, what)
    except (ShelveRefused, UnknownAlarm, StoreError, ValueError) as e:
        raise _run_errors(e) from None
    return with_times({"event": events[0], "alarm": service.alarms.view(rule).as_dict()},
                      cfg.service.timezone)


@router.get("/alarms/shelved", summary="Shelved rules (any state), ending soonest first")
def list_shelved(engine: AlarmsDep, cfg: ConfigDep, _: Reader) -> list[dict[str, Any]]:
    rows = [v.as_dict() for v in engine.shelved()]
    return with_times(rows, cfg.service.timezone)


@router.post("/alarms/ack", summary="Acknowledge every active alarm of a machine, channel "
             "or list of rules (operator role)", responses=_WRITE_ERRORS)
async def ack_all(
    service: ServiceDep, cfg: ConfigDep, who: Operator, body: AckAllBody
) -> dict[str, Any]:
    if body.rules is None and body.machine is None and body.channel is None:
        raise HTTPException(422, "say which alarms: rules, machine and/or channel")
    engine = service.alarms
    chosen = [d["rule"] for d in select(engine, cfg, machine=body.machine,
                                        channel=body.channel, state="unacked")]
    if body.rules is not None:
        listed = set(body.rules)
        chosen = [r for r in chosen if r in listed]
    else:  # a shelved alarm is acknowledged only when named: it is not annunciated
        chosen = [r for r in chosen if not engine.is_shelved(r)]
    t_ns, note = time.time_ns(), body.note

    def action(eng: AlarmEngine) -> list[AlarmEvent]:
        return eng.ack_many(chosen, who.name, note, t_ns=t_ns)

    try:
        events = await service.act(action, f"acknowledge-all of {len(chosen)} by {who.name}")
    except (AckRefused, UnknownAlarm, StoreError, ValueError) as e:
        raise _run_errors(e) from None
    return {"acknowledged": len(events),
            "events": with_times(events, cfg.service.timezone)}


@router.post("/alarms/{rule}/shelve", summary="Shelve a rule until an end time, with a "
             "reason (operator role)", responses=_WRITE_ERRORS)
async def shelve(
    service: ServiceDep, cfg: ConfigDep, who: Operator,
    rule: Annotated[str, Path(max_length=200)], body: ShelveBody,
) -> dict[str, Any]:
    t_ns = time.time_ns()
    if (body.until is None) == (body.duration_s is None):
        raise HTTPException(422, "give the end time as until or duration_s (one of them)")
    if body.until is not None:
        until = body.until
        if until.tzinfo is None:
            until = until.replace(tzinfo=zone(cfg.service.timezone))
        until_ns = round(until.timestamp() * 1000) * 1_000_000
    else:
        until_ns = t_ns + round((body.duration_s or 0) * _NS)
    reason = body.reason

    def action(eng: AlarmEngine) -> list[AlarmEvent]:
        return [eng.shelve(rule, who.name, reason, until_ns, t_ns=t_ns)]

    return await _on_rule(service, cfg, rule, action, f"shelve of {rule} by {who.name}")


@router.post("/alarms/{rule}/unshelve", summary="End a rule's shelve now (operator role)",
             responses=_WRITE_ERRORS)
async def unshelve(
    service: ServiceDep, cfg: ConfigDep, who: Operator,
    rule: Annotated[str, Path(max_length=200)],
    _body: Annotated[dict[str, Any] | None, Body()] = None,
) -> dict[str, Any]:
    t_ns = time.time_ns()

    def action(eng: AlarmEngine) -> list[AlarmEvent]:
        return [eng.unshelve(rule, who.name, t_ns=t_ns)]

    return await _on_rule(service, cfg, rule, action, f"unshelve of {rule} by {who.name}")

"""GET /api/v1/rules: every alarm rule with its channel's and machine's display names, its
levels, hysteresis, delays and latch, and its alarm now (value, state, acknowledged, shelved).

Reads the alarm engine and the config; changes nothing."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from fastapi import APIRouter, Query

from ..alarms import AlarmEngine, AlarmView, Rule
from ..config import Config
from ..names import channel_name, machine_of
from .deps import AlarmsDep, ConfigDep
from .security import Reader
from .timefields import with_times

router = APIRouter(tags=["alarms"])

StateQ = Literal[
    "normal", "alert", "danger", "latched", "active", "unacked", "acked", "shelved"
]


def names(cfg: Config, channel: str) -> dict[str, str]:
    """``channel_name``, ``machine``, ``machine_name`` and ``machine_group`` of a channel
    (ids where nothing is configured; machine and group "" when it names none)."""
    c = next((c for c in cfg.channels if c.id == channel), None)
    m = machine_of(cfg, channel)
    machine = c.machine if c is not None else ""
    return {
        "channel_name": channel_name(cfg, channel),
        "machine": machine,
        "machine_name": m.name or m.id if m is not None else machine,
        "machine_group": m.group if m is not None else "",
    }


def all_names(cfg: Config) -> dict[str, dict[str, str]]:
    """:func:`names` of every configured channel, by id (one pass: a plant of hundreds)."""
    machines = {m.id: m for m in cfg.machines}
    out = {}
    for c in cfg.channels:
        m = machines.get(c.machine) if c.machine else None
        out[c.id] = {
            "channel_name": c.name or c.id,
            "machine": c.machine,
            "machine_name": m.name or m.id if m is not None else c.machine,
            "machine_group": m.group if m is not None else "",
        }
    return out


def rule_doc(rule: Rule, view: AlarmView, nm: dict[str, str]) -> dict[str, Any]:
    """One rule as GET /rules lists it (docs/api.md), ``nm`` its channel's :func:`names`."""
    d = view.as_dict()
    d.update(nm)
    d.update(
        levels="signal" if rule.kind == "signal" else "baseline" if rule.baseline else "absolute",
        baseline=rule.baseline.as_dict() if rule.baseline else None,
        hysteresis=rule.hysteresis,
        on_delay_s=rule.on_delay_s,
        off_delay_s=rule.off_delay_s,
    )
    return d


def matches(v: AlarmView, state: str | None) -> bool:
    if state is None:
        return True
    if state == "shelved":
        return v.shelved
    if state == "active":
        return v.state.active
    if state == "unacked":
        return v.state.active and not v.acked
    if state == "acked":
        return v.state.active and v.acked
    return v.state.value == state


def select(
    engine: AlarmEngine, cfg: Config, *, machine: str | None = None,
    channel: str | None = None, state: str | None = None, kind: str | None = None,
) -> list[dict[str, Any]]:
    """The rules that pass every filter given, in rule order."""
    by_channel = all_names(cfg)
    out = []
    for r, v in zip(engine.rules, engine.views(), strict=True):
        nm = by_channel.get(r.channel) or names(cfg, r.channel)
        if machine is not None and nm["machine"] != machine:
            continue
        if channel is not None and r.channel != channel:
            continue
        if kind is not None and r.kind != kind:
            continue
        if matches(v, state):
            out.append(rule_doc(r, v, nm))
    return out


@router.get("/rules", summary="Every alarm rule: limits, delays, latch, state now")
def list_rules(
    engine: AlarmsDep,
    cfg: ConfigDep,
    _: Reader,
    machine: Annotated[str | None, Query(max_length=128, description="machine id")] = None,
    channel: Annotated[str | None, Query(max_length=64)] = None,
    state: Annotated[StateQ | None, Query(description="alarm state, or active, unacked, "
                                          "acked, shelved")] = None,
    kind: Annotated[Literal["band", "tone", "overall", "signal"] | None, Query()] = None,
) -> list[dict[str, Any]]:
    rows = select(engine, cfg, machine=machine, channel=channel, state=state, kind=kind)
    return with_times(rows, cfg.service.timezone)

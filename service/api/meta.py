"""GET /api/v1/meta: the closed sets a client shows — channel data-quality states, alarm
states, event kinds and rule kinds — each with what it means, and the site time zone.

The one definition the dashboard reads (web/states.js) instead of copying the sets. Reads
service.quality, service.alarms.states and the config's time zone; no hub, no state."""

from __future__ import annotations

from fastapi import APIRouter
from pydantic import BaseModel, Field

from ..alarms.states import (
    ALARM_MEANING,
    EVENT_KINDS,
    EVENT_MEANING,
    RULE_KINDS,
    RULE_MEANING,
    AlarmState,
)
from ..quality import CHANNEL_STATUSES, MEANING, SUSPENDING
from .deps import ConfigDep

router = APIRouter(tags=["meta"])


class ChannelStatusInfo(BaseModel):
    name: str = Field(description="the state, as in a channel's `status`")
    meaning: str
    live: bool = Field(description="values are new and trustworthy (only `ok`)")
    suspends_alarms: bool = Field(
        description="the channel's alarm rules are frozen while it is in this state")


class AlarmStateInfo(BaseModel):
    name: str = Field(description="the state, as in an alarm's `state` and `peak`")
    meaning: str
    rank: int = Field(description="severity of the value condition: 0 normal/latched, "
                      "1 alert, 2 danger")
    active: bool = Field(description="the alarm is active (listed by GET /alarms)")


class KindInfo(BaseModel):
    name: str
    meaning: str


class Meta(BaseModel):
    channel_statuses: list[ChannelStatusInfo] = Field(
        description="data-quality states of a channel, most serious first after `ok`")
    alarm_states: list[AlarmStateInfo]
    event_kinds: list[KindInfo] = Field(description="the `kind` of an event")
    rule_kinds: list[KindInfo] = Field(description="the `kind` of an alarm rule")
    timezone: str = Field("UTC", description="the site time zone (IANA name, "
                          "`service.timezone`): the API's ISO 8601 times carry its offset "
                          "and the dashboard shows times in it")


def meta_document(timezone: str = "UTC") -> Meta:
    """The document GET /api/v1/meta answers (the same for every caller and every call)."""
    return Meta(
        channel_statuses=[
            ChannelStatusInfo(name=s, meaning=MEANING[s], live=s == "ok",
                              suspends_alarms=s in SUSPENDING)
            for s in CHANNEL_STATUSES
        ],
        alarm_states=[
            AlarmStateInfo(name=s.value, meaning=ALARM_MEANING[s.value], rank=s.rank,
                           active=s.active)
            for s in AlarmState
        ],
        event_kinds=[KindInfo(name=k, meaning=EVENT_MEANING[k]) for k in EVENT_KINDS],
        rule_kinds=[KindInfo(name=k, meaning=RULE_MEANING[k]) for k in RULE_KINDS],
        timezone=timezone,
    )


@router.get("/meta", summary="The state and kind sets, with what each means",
            response_model=Meta)
def meta(cfg: ConfigDep) -> Meta:
    """Channel data-quality states (``service.quality``), alarm states, event kinds and
    rule kinds, each with its meaning: a client takes its sets from here rather than
    copying them. Read access like every other read (a viewer token when tokens are
    configured)."""
    return meta_document(cfg.service.timezone)

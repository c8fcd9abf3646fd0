"""Shared FastAPI dependencies: the hub, the running service (:class:`ServiceContext`), its
alarm engine and store, the config, a channel's latest frame.

No routes here; no I/O beyond reading the hub. The app keeps what these read in
``app.state`` (``service.api.create_app``); routers take them as typed parameters."""

from __future__ import annotations

from typing import Annotated, Any, NoReturn

from fastapi import Depends, HTTPException, Path, Query
from fastapi.exceptions import RequestValidationError
from starlette.requests import HTTPConnection

from ..alarms import AlarmEngine
from ..config import Config
from ..context import ServiceContext
from ..hub import Hub
from ..store import Store
from ..types import ChannelState, SpectralFrame


def get_hub(conn: HTTPConnection) -> Hub:
    hub: Hub = conn.app.state.hub
    return hub


def get_config(conn: HTTPConnection) -> Config:
    """The config in force (a reload replaces it: read it per request)."""
    cfg: Config = conn.app.state.config
    return cfg


def maybe_service(conn: HTTPConnection) -> ServiceContext | None:
    """The running service; None for an app made over a bare hub (tests, docs)."""
    service: ServiceContext | None = conn.app.state.service
    return service


def get_service(service: Annotated[ServiceContext | None, Depends(maybe_service)]
                ) -> ServiceContext:
    if service is None:
        raise HTTPException(503, "this server runs no monitoring service (alarms, events, "
                                 "trends and reload need one)")
    return service


HubDep = Annotated[Hub, Depends(get_hub)]
ConfigDep = Annotated[Config, Depends(get_config)]
MaybeServiceDep = Annotated[ServiceContext | None, Depends(maybe_service)]
ServiceDep = Annotated[ServiceContext, Depends(get_service)]


def get_alarms(service: ServiceDep) -> AlarmEngine:
    return service.alarms


def get_store(service: ServiceDep) -> Store:
    return service.store


AlarmsDep = Annotated[AlarmEngine, Depends(get_alarms)]
StoreDep = Annotated[Store, Depends(get_store)]

ChannelId = Annotated[str, Path(description="Channel id", max_length=64)]


def get_channel(channel_id: ChannelId, hub: HubDep) -> ChannelState:
    st = hub.channels.get(channel_id)
    if st is None:
        raise HTTPException(404, f"unknown channel {channel_id!r}")
    return st


def check_profile(st: ChannelState, profile: str | None) -> str:
    """The profile asked for (default: the channel's primary one); 404 if it has no such."""
    if profile is None:
        return st.profiles[0]
    if profile not in st.profiles:
        raise HTTPException(
            404,
            f"channel {st.id!r} has no profile {profile!r} "
            f"(profiles: {', '.join(map(repr, st.profiles))})",
        )
    return profile


def get_frame(channel_id: str, hub: Hub, profile: str | None = None) -> SpectralFrame:
    """The latest frame of a channel's profile (default: its primary one): 404 for an
    unknown channel or profile, 503 before its first frame."""
    name = check_profile(get_channel(channel_id, hub), profile)
    frame = hub.by_profile.get((channel_id, name))
    if frame is None:
        raise HTTPException(
            503,
            f"channel {channel_id!r} has no spectrum yet"
            + ("" if profile is None else f" in profile {name!r}"),
            headers={"Retry-After": "1"},
        )
    return frame


I64_MAX = 2**63 - 1  # SQLite integers; ids and ns times beyond are refused with 422
NOT_FOUND: dict[int | str, dict[str, Any]] = {404: {"description": "unknown channel"}}
NO_FRAME: dict[int | str, dict[str, Any]] = {
    404: {"description": "unknown channel or profile"},
    503: {"description": "no spectrum yet (Retry-After: 1)"},
}

ChannelDep = Annotated[ChannelState, Depends(get_channel)]
ProfileQ = Annotated[
    str | None,
    Query(max_length=64, description="Analysis profile; default: the channel's primary one"),
]


def invalid_query(param: str, msg: str) -> NoReturn:
    """A 422 in FastAPI's own shape (detail: [{loc, msg, type}]), as its OpenAPI says."""
    raise RequestValidationError(
        [{"loc": ("query", param), "msg": msg, "type": "value_error", "input": None}]
    )



def invalid(description: str) -> dict[int | str, dict[str, Any]]:
    """The OpenAPI 422 of a route whose query has a rule the schema cannot say (one value
    against another, a product of two): FastAPI's validation-error body, and ``description``."""
    schema = {"$ref": "#/components/schemas/HTTPValidationError"}
    return {422: {"description": description, "content": {"application/json": {"schema": schema}}}}

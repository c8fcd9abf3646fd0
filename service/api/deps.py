"""Shared FastAPI dependencies (the hub, a channel's latest frame).

No routes here; no I/O beyond reading the hub."""

from __future__ import annotations

from typing import Annotated, Any, NoReturn

from fastapi import Depends, HTTPException, Path, Request
from fastapi.exceptions import RequestValidationError

from ..hub import Hub
from ..pipeline import ChannelState
from ..types import SpectralFrame


def get_hub(request: Request) -> Hub:
    return request.app.state.hub  # type: ignore[no-any-return]


HubDep = Annotated[Hub, Depends(get_hub)]

ChannelId = Annotated[str, Path(description="Channel id", max_length=64)]


def get_channel(channel_id: ChannelId, hub: HubDep) -> ChannelState:
    st = hub.channels.get(channel_id)
    if st is None:
        raise HTTPException(404, f"unknown channel {channel_id!r}")
    return st


def get_frame(channel_id: str, hub: Hub) -> SpectralFrame:
    """The channel's latest frame: 404 for an unknown channel, 503 before its first one."""
    get_channel(channel_id, hub)
    frame = hub.latest.get(channel_id)
    if frame is None:
        raise HTTPException(
            503, f"channel {channel_id!r} has no spectrum yet", headers={"Retry-After": "1"}
        )
    return frame


I64_MAX = 2**63 - 1  # SQLite integers; ids and ns times beyond are refused with 422
NOT_FOUND: dict[int | str, dict[str, Any]] = {404: {"description": "unknown channel"}}
NO_FRAME: dict[int | str, dict[str, Any]] = {
    404: {"description": "unknown channel"},
    503: {"description": "no spectrum yet (Retry-After: 1)"},
}

ChannelDep = Annotated[ChannelState, Depends(get_channel)]


def invalid_query(param: str, msg: str) -> NoReturn:
    """A 422 in FastAPI's own shape (detail: [{loc, msg, type}]), as its OpenAPI says."""
    raise RequestValidationError(
        [{"loc": ("query", param), "msg": msg, "type": "value_error", "input": None}]
    )


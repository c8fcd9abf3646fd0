"""POST /api/v1/admin/reload (apply the config file's alarms and tokens without a restart)
and GET /api/v1/session (who the caller is).

Reload is admin only; the running Service does the work (``Service.reload``)."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends, HTTPException

from ..auth import Principal
from ..context import ReloadRefused
from .deps import ConfigDep, MaybeServiceDep
from .security import Reader, require, role_responses

router = APIRouter(tags=["admin"])

Admin = Annotated[Principal, Depends(require("admin"))]


@router.post(
    "/admin/reload",
    summary="Re-read the config file; apply its [[alarms]] and [[tokens]] (admin role)",
    responses={
        **role_responses("admin"),
        409: {"description": "started without a config file, or a change needs a restart; "
              "nothing applied"},
        422: {"description": "the config file is not valid; nothing applied (problems listed)"},
    },
)
async def reload_config(service: MaybeServiceDep, who: Admin) -> dict[str, Any]:
    if service is None:
        raise HTTPException(409, "this server has no running service to reload")
    try:
        result = await service.reload()
    except ReloadRefused as e:
        detail: Any = e.reason if not e.problems else {"reason": e.reason, "problems": e.problems}
        raise HTTPException(e.status, detail) from None
    return {**result, "by": who.name}


@router.get(
    "/session",
    summary="Who the service takes the caller for (the dashboard's 'signed in as')",
    responses=role_responses("viewer"),
)
def session(cfg: ConfigDep, who: Reader) -> dict[str, Any]:
    """``tokens``: whether the service asks for tokens at all; ``name`` and ``role`` of the
    caller's token (null without one, which is only possible while ``tokens`` is false)."""
    return {
        "tokens": bool(cfg.tokens),
        "name": who.name if who else None,
        "role": who.role if who else None,
    }

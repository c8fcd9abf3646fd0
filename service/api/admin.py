"""POST /api/v1/admin/reload: apply the config file's alarms and tokens without a restart.

Admin role only; the running Service does the work (``Service.reload``)."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends, HTTPException, Request

from ..auth import Principal
from .security import require, role_responses

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
async def reload_config(request: Request, who: Admin) -> dict[str, Any]:
    from ..app import ReloadRefused  # the service module imports the API, not the other way

    service = request.app.state.service
    if service is None or not hasattr(service, "reload"):
        raise HTTPException(409, "this server has no running service to reload")
    try:
        result: dict[str, Any] = await service.reload()
    except ReloadRefused as e:
        detail: Any = e.reason if not e.problems else {"reason": e.reason, "problems": e.problems}
        raise HTTPException(e.status, detail) from None
    return {**result, "by": who.name}

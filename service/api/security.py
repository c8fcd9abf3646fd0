"""Who may do what over HTTP and WebSocket: bearer tokens, read access, Origin checks.

Reads the config from the app's state; knows nothing about alarms or storage."""

from __future__ import annotations

import ipaddress
from typing import Annotated
from urllib.parse import urlsplit

from fastapi import Depends, HTTPException, Request, WebSocket

from ..auth import Principal, authenticate
from ..config import Config, parse_listen


def _bearer(header: str | None) -> str | None:
    if not header:
        return None
    scheme, _, value = header.partition(" ")
    return value.strip() if scheme.lower() == "bearer" and value.strip() else None


def loopback_only(cfg: Config) -> bool:
    host, _ = parse_listen(cfg.service.listen)
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def principal(request: Request) -> Principal | None:
    cfg: Config = request.app.state.config
    return authenticate(_bearer(request.headers.get("authorization")), cfg.tokens)


def role_responses(role: str) -> dict[int | str, dict[str, str]]:
    """The OpenAPI responses of a route guarded by :func:`require` (``role``)."""
    return {
        401: {"description": "no or unknown token"},
        403: {"description": f"the token's role is below {role}"},
    }


def require(role: str):  # type: ignore[no-untyped-def]
    """Dependency: 401 without a valid token, 403 when its role is below ``role``."""

    def dep(request: Request) -> Principal:
        cfg: Config = request.app.state.config
        who = principal(request)
        if who is None:
            detail = (
                "no token given; send Authorization: Bearer <token>"
                if not request.headers.get("authorization")
                else "token not recognised"
            )
            if not cfg.tokens:
                detail = "no tokens are configured, so nobody may do this; add [[tokens]]"
            raise HTTPException(401, detail, headers={"WWW-Authenticate": "Bearer"})
        if not who.may(role):
            raise HTTPException(403, f"{who.name!r} has role {who.role!r}; this needs {role!r}")
        return who

    return dep


def require_read(request: Request) -> Principal | None:
    """Reads are open while the service listens on loopback only; otherwise a viewer token."""
    cfg: Config = request.app.state.config
    if loopback_only(cfg):
        return principal(request)
    return require("viewer")(request)  # type: ignore[no-any-return]


Operator = Annotated[Principal, Depends(require("operator"))]
Reader = Annotated[Principal | None, Depends(require_read)]


async def check_websocket(ws: WebSocket) -> bool:
    """Refuse a browser page from another origin, and tokenless clients off loopback."""
    cfg: Config = ws.app.state.config
    origin = ws.headers.get("origin")
    if origin:
        host = ws.headers.get("host", "")
        allowed = {o.rstrip("/") for o in cfg.service.cors_origins}
        if urlsplit(origin).netloc != host and origin.rstrip("/") not in allowed:
            await ws.accept()  # accept, then close: the client sees code 1008 and the reason
            await ws.close(code=1008, reason="origin not allowed")
            return False
    if not loopback_only(cfg):
        token = ws.query_params.get("token") or _bearer(ws.headers.get("authorization"))
        if authenticate(token, cfg.tokens) is None:
            await ws.accept()
            await ws.close(code=1008, reason="a viewer token is required")
            return False
    return True

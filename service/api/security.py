"""Who may do what over HTTP and WebSocket: the access gate (Host/Origin, tokens) and roles.

Reads the config from the app's state; knows nothing about alarms or storage.

The policy (README "Access"; tests/service/test_access.py checks it as a table):

* A request whose ``Host`` (or a browser's ``Origin``) names a host outside
  ``service.allowed_hosts`` is refused: HTTP 400 (403 for the Origin), WebSocket closed
  with 1008.
* Without ``[[tokens]]`` (possible only while listening on loopback) reads are open;
  acknowledging and reloading need a token, so nobody may.
* With ``[[tokens]]`` every request needs at least a viewer token (401 without or with an
  unknown one, 403 for a role below viewer), except the public paths below. ``/metrics``
  also takes a ``metrics`` token. Operator and admin routes check their role as before.
* Public (code or a yes, never data): ``/api/v1/health/live``, the dashboard's files (``/``,
  ``/static/…``) and the API docs pages (``/docs``, ``/redoc``, ``/docs-assets/…``), which
  ask for a token before they read anything.
"""

from __future__ import annotations

import base64
import binascii
import ipaddress
import socket
from collections.abc import Callable
from typing import Annotated, Any
from urllib.parse import urlsplit

from fastapi import Depends, HTTPException, Request
from starlette.datastructures import Headers
from starlette.responses import JSONResponse
from starlette.types import ASGIApp, Receive, Scope, Send

from ..auth import Principal, authenticate
from ..config import Config, parse_listen
from .deps import get_config

LIVE_PATH = "/api/v1/health/live"
PUBLIC_PATHS = frozenset({LIVE_PATH, "/", "/docs", "/redoc"})
PUBLIC_PREFIXES = ("/static/", "/docs-assets/")
METRICS_PATH = "/metrics"
WS_PROTOCOL = "quaver"  # the subprotocol the server selects when a browser offers it
WS_TOKEN_PREFIX = "bearer."  # Sec-WebSocket-Protocol: quaver, bearer.<base64url(token)>
LOOPBACK_NAMES = ("localhost", "127.0.0.1", "::1")
WILDCARD_HOSTS = ("0.0.0.0", "::")


def _bearer(header: str | None) -> str | None:
    if not header:
        return None
    scheme, _, value = header.partition(" ")
    return value.strip() if scheme.lower() == "bearer" and value.strip() else None


def ws_offered(headers: Headers) -> list[str]:
    """The subprotocols a WebSocket client offered, in order."""
    raw = headers.get("sec-websocket-protocol", "")
    return [p.strip() for p in raw.split(",") if p.strip()]


def _ws_token(headers: Headers) -> str | None:
    """A browser cannot set Authorization on a WebSocket; it offers the token as the
    subprotocol ``bearer.<base64url(token) without padding>`` next to ``quaver``."""
    for p in ws_offered(headers):
        if p.startswith(WS_TOKEN_PREFIX):
            b64 = p[len(WS_TOKEN_PREFIX):]
            try:
                return base64.urlsafe_b64decode(b64 + "=" * (-len(b64) % 4)).decode("utf-8")
            except (binascii.Error, UnicodeDecodeError, ValueError):
                return None
    return None


def request_token(scope: Scope) -> str | None:
    """The token a request or WebSocket handshake carries (Authorization: Bearer, or for a
    WebSocket the ``bearer.`` subprotocol); never from the URL, which ends up in logs."""
    headers = Headers(scope=scope)
    token = _bearer(headers.get("authorization"))
    if token is None and scope["type"] == "websocket":
        token = _ws_token(headers)
    return token


def loopback_only(cfg: Config) -> bool:
    host, _ = parse_listen(cfg.service.listen)
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def allowed_hosts(cfg: Config) -> frozenset[str] | None:
    """The host names a request may name (lower case, no port); None: any."""
    if cfg.service.allowed_hosts is not None:
        hosts = {h.strip().lower().strip("[]") for h in cfg.service.allowed_hosts}
        return None if "*" in hosts else frozenset(hosts)
    host, _ = parse_listen(cfg.service.listen)
    hosts = {*LOOPBACK_NAMES, host.lower()}
    if host in WILDCARD_HOSTS:
        hosts |= {socket.gethostname().lower(), socket.getfqdn().lower()}
    return frozenset(hosts)


def _host_name(netloc: str) -> str:
    """``host[:port]`` or ``[v6]:port`` → the host, lower case, without brackets."""
    netloc = netloc.strip().lower()
    if netloc.startswith("["):
        return netloc[1:].partition("]")[0]
    return netloc.rpartition(":")[0] if netloc.count(":") == 1 else netloc


def host_refusal(headers: Headers, cfg: Config) -> tuple[int, str] | None:
    """(status, reason) when the Host or the Origin names a host not allowed, else None."""
    hosts = allowed_hosts(cfg)
    host = _host_name(headers.get("host", ""))
    if hosts is not None and host not in hosts:
        return 400, f"host {host!r} is not in service.allowed_hosts"
    return origin_refusal(headers, cfg)


def origin_refusal(headers: Headers, cfg: Config) -> tuple[int, str] | None:
    """A browser's Origin must be this page's own (same scheme-less host:port as Host) or
    one listed in ``service.cors_origins``; (403, reason) otherwise."""
    origin = headers.get("origin")
    if origin is None:
        return None
    listed = {o.rstrip("/") for o in cfg.service.cors_origins}
    if origin.rstrip("/") in listed:
        return None
    if origin != "null" and urlsplit(origin).netloc.lower() == headers.get("host", "").lower():
        return None
    return 403, "origin not allowed"


def public(path: str) -> bool:
    return path in PUBLIC_PATHS or path.startswith(PUBLIC_PREFIXES)


def read_refusal(path: str, who: Principal | None, cfg: Config) -> tuple[int, str] | None:
    """(status, reason) when ``who`` may not read ``path`` under the policy, else None."""
    if not cfg.tokens or public(path):
        return None
    if who is None:
        return 401, "a token is required; send Authorization: Bearer <token>"
    if who.may("viewer") or (path == METRICS_PATH and who.role == "metrics"):
        return None
    return 403, f"{who.name!r} has role {who.role!r}, which may read {METRICS_PATH} only"


class AccessGate:
    """ASGI middleware in front of every route and the WebSocket: Host/Origin allow-list,
    then the token. The caller (or None) goes to ``scope["state"]["principal"]``."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] not in ("http", "websocket"):
            await self.app(scope, receive, send)
            return
        cfg: Config = scope["app"].state.config
        headers = Headers(scope=scope)
        refusal = host_refusal(headers, cfg)
        token = request_token(scope)
        who = authenticate(token, cfg.tokens)
        if refusal is None:
            refusal = read_refusal(scope["path"], who, cfg)
        if refusal is not None:
            if scope["type"] == "websocket":
                await _ws_refuse(scope, receive, send, refusal[1])
            else:
                hdrs = {"WWW-Authenticate": "Bearer"} if refusal[0] == 401 else None
                await JSONResponse({"detail": refusal[1]}, refusal[0], headers=hdrs)(
                    scope, receive, send
                )
            return
        state = scope.setdefault("state", {})
        state["principal"] = who
        state["token"] = token if who is not None else None
        await self.app(scope, receive, send)


async def _ws_refuse(scope: Scope, receive: Receive, send: Send, reason: str) -> None:
    """Accept, then close with 1008 and ``reason``, so a client learns why (a refusal
    before the accept is a bare HTTP 403)."""
    msg = await receive()
    if msg["type"] != "websocket.connect":
        return
    offered = ws_offered(Headers(scope=scope))
    accept: dict[str, Any] = {"type": "websocket.accept"}
    if WS_PROTOCOL in offered:
        accept["subprotocol"] = WS_PROTOCOL
    await send(accept)
    await send({"type": "websocket.close", "code": 1008, "reason": reason})


def principal(request: Request) -> Principal | None:
    got: Principal | None = request.scope.get("state", {}).get("principal")
    if got is not None:
        return got
    return authenticate(request_token(request.scope), get_config(request).tokens)


def role_responses(role: str) -> dict[int | str, dict[str, str]]:
    """The OpenAPI responses of a route guarded by :func:`require` (``role``)."""
    return {
        401: {"description": "no or unknown token"},
        403: {"description": f"the token's role is below {role}"},
    }


def require(role: str) -> Callable[[Request], Principal]:
    """Dependency: 401 without a valid token, 403 when its role is below ``role``."""

    def dep(request: Request) -> Principal:
        cfg = get_config(request)
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
    """The caller of a read (the gate has already refused anyone who may not read)."""
    return principal(request)


Operator = Annotated[Principal, Depends(require("operator"))]
Reader = Annotated[Principal | None, Depends(require_read)]

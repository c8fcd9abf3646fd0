"""The HTTP edge: a body limit counted while the body arrives, and a request-head time-out.

Knows ASGI and uvicorn's h11 protocol only; nothing of routes, tokens or the service."""

from __future__ import annotations

import asyncio
from typing import Any

import h11
from starlette.datastructures import Headers
from starlette.responses import JSONResponse
from starlette.types import ASGIApp, Message, Receive, Scope, Send
from uvicorn.protocols.http.h11_impl import H11Protocol

from ..config import Config


class BodyLimit:
    """ASGI middleware: refuse a request body over ``service.max_body_bytes`` with 413.

    A declared Content-Length over the limit is refused before anything is read; a chunked
    body is counted as it arrives and refused at the first chunk that crosses the limit, so
    no more than the limit (plus one chunk) is ever held. The app then sees the client as
    gone, and whatever it answers is dropped in favour of the 413."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        cfg: Config = scope["app"].state.config
        limit = cfg.service.max_body_bytes
        too_big = JSONResponse({"detail": f"request body over {limit} bytes"}, status_code=413)
        declared = Headers(scope=scope).get("content-length")
        if declared is not None and (not declared.isdigit() or int(declared) > limit):
            await too_big(scope, receive, send)
            return
        seen = 0
        refused = False
        started = False

        async def counted() -> Message:
            nonlocal seen, refused
            if refused:
                return {"type": "http.disconnect"}
            msg = await receive()
            if msg["type"] == "http.request":
                seen += len(msg.get("body", b""))
                if seen > limit:
                    refused = True
                    if not started:
                        await too_big(scope, receive, send)
                    return {"type": "http.disconnect"}
            return msg

        async def sent(msg: Message) -> None:
            nonlocal started
            if refused:
                return
            if msg["type"] == "http.response.start":
                started = True
            await send(msg)

        await self.app(scope, counted, sent)


class HeadTimeoutProtocol(H11Protocol):
    """uvicorn's h11 protocol with a time-out for the request head.

    uvicorn closes idle kept-alive connections (``timeout_keep_alive``) but waits for ever
    for a request head that trickles in, or for the first byte of a new connection: one
    client could hold thousands of sockets (slowloris). Here a connection that has not
    sent a complete head ``header_timeout_s`` after it opened (or after its first byte of
    the next request) is closed. Subclassed per server by :func:`head_timeout_protocol`."""

    header_timeout_s = 10.0
    _head_timer: asyncio.TimerHandle | None = None

    def connection_made(self, transport: Any) -> None:
        super().connection_made(transport)
        self._arm()

    def data_received(self, data: bytes) -> None:
        super().data_received(data)
        if self._waiting_for_head():
            self._arm()
        else:
            self._disarm()

    def connection_lost(self, exc: Exception | None) -> None:
        self._disarm()
        super().connection_lost(exc)

    def _waiting_for_head(self) -> bool:
        # after a WebSocket upgrade the transport belongs to the WebSocket protocol
        return self.transport.get_protocol() is self and self.conn.their_state is h11.IDLE

    def _arm(self) -> None:
        if self._head_timer is None:
            self._head_timer = self.loop.call_later(self.header_timeout_s, self._expired)

    def _disarm(self) -> None:
        if self._head_timer is not None:
            self._head_timer.cancel()
            self._head_timer = None

    def _expired(self) -> None:
        self._head_timer = None
        if self._waiting_for_head() and not self.transport.is_closing():
            self.transport.close()


def head_timeout_protocol(header_timeout_s: float) -> type[HeadTimeoutProtocol]:
    """The protocol class for uvicorn.Config(http=...) with this head time-out."""
    return type(
        "QuaverH11Protocol", (HeadTimeoutProtocol,), {"header_timeout_s": header_timeout_s}
    )

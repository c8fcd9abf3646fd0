"""The HTTP application: REST routers under /api/v1 and the dashboard's static files.

Reads the hub only; never reaches into sources or engines."""

from __future__ import annotations

from collections.abc import AsyncIterator, Callable
from contextlib import asynccontextmanager
from pathlib import Path
from typing import Any

from fastapi import FastAPI, Request
from fastapi.middleware.cors import CORSMiddleware
from fastapi.responses import FileResponse, JSONResponse
from fastapi.staticfiles import StaticFiles

import web

from .. import __version__
from ..config import Config
from ..hub import Hub
from . import admin, alarms, channels, health, metrics, security, stream, trends, windows


def create_app(
    hub: Hub,
    *,
    config: Config | None = None,
    service: Any = None,
    lifespan_hooks: tuple[Callable[[], Any], Callable[[], Any]] | None = None,
) -> FastAPI:
    """A FastAPI app over ``hub``. ``config`` gives tokens, CORS and limits (default: an
    empty config: loopback, no tokens); ``service`` (the running Service) backs alarms,
    events and trends; ``lifespan_hooks`` = (async start, async stop) of the service."""
    config = config if config is not None else Config.model_validate({})

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        if lifespan_hooks:
            await lifespan_hooks[0]()
        try:
            yield
        finally:
            if lifespan_hooks:
                await lifespan_hooks[1]()

    app = FastAPI(
        title="quaver",
        version=__version__,
        description="Machinery vibration monitoring: spectra, bands, tones and alarms. "
        "A monitoring aid, not a machine-protection or safety system.",
        lifespan=lifespan,
    )
    app.state.hub = hub
    app.state.config = config
    app.state.service = service
    app.state.alarms = getattr(service, "alarms", None)
    app.state.store = getattr(service, "store", None)
    if config.service.cors_origins:
        app.add_middleware(
            CORSMiddleware,
            allow_origins=config.service.cors_origins,
            allow_methods=["GET", "POST"],
            allow_headers=["Authorization", "Content-Type"],
        )
    limit = config.service.max_body_bytes

    @app.middleware("http")
    async def body_limit(request: Request, call_next: Any) -> Any:
        declared = request.headers.get("content-length")
        if declared is not None and (not declared.isdigit() or int(declared) > limit):
            return JSONResponse({"detail": f"request body over {limit} bytes"}, status_code=413)
        if declared is None and request.method in ("POST", "PUT", "PATCH"):
            body = await request.body()  # chunked: read (bounded by the server) and check
            if len(body) > limit:
                return JSONResponse({"detail": f"request body over {limit} bytes"}, status_code=413)
        return await call_next(request)

    app.include_router(health.router, prefix="/api/v1")
    app.include_router(channels.router, prefix="/api/v1")
    app.include_router(stream.router, prefix="/api/v1")
    app.include_router(windows.router, prefix="/api/v1")
    app.include_router(alarms.router, prefix="/api/v1")
    app.include_router(trends.router, prefix="/api/v1")
    app.include_router(admin.router, prefix="/api/v1")
    app.include_router(metrics.router)
    app.state.check_websocket = security.check_websocket
    web_dir = Path(web.__file__).parent  # the installed package's files, not the working dir
    app.mount("/static", StaticFiles(directory=web_dir), name="static")

    @app.get("/", include_in_schema=False)
    def dashboard() -> FileResponse:
        return FileResponse(web_dir / "index.html", media_type="text/html")

    return app

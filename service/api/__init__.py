"""The HTTP application: REST routers under /api/v1 and the dashboard's static files.

Reads the hub only; never reaches into sources or engines."""

from __future__ import annotations

import math
from collections.abc import AsyncIterator, Awaitable, Callable
from contextlib import asynccontextmanager
from pathlib import Path
from typing import Any

from fastapi import FastAPI, Request
from fastapi.encoders import jsonable_encoder
from fastapi.exceptions import RequestValidationError
from fastapi.middleware.cors import CORSMiddleware
from fastapi.responses import FileResponse, JSONResponse
from fastapi.staticfiles import StaticFiles

import web

from .. import __version__
from ..config import Config
from ..context import ServiceContext
from ..hub import Hub
from . import (
    actions,
    admin,
    alarms,
    channels,
    docs,
    edge,
    health,
    history,
    kurtogram,
    meta,
    metrics,
    rules,
    runups,
    security,
    stream,
    trends,
    waveform,
    windows,
)


def create_app(
    hub: Hub,
    *,
    config: Config | None = None,
    service: ServiceContext | None = None,
    lifespan_hooks: tuple[Callable[[], Awaitable[None]], Callable[[], Awaitable[None]]]
    | None = None,
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
        docs_url=None,  # docs.mount: the same pages from installed assets, no CDN
        redoc_url=None,
    )
    # Read through the typed dependencies of .deps (and stream's sessions); nothing else.
    app.state.hub = hub
    app.state.config = config
    app.state.service = service
    stream.init_state(app.state)
    # Outermost first: CORS answers preflights (they carry no token), then the access gate
    # (Host/Origin, tokens), then the body limit.
    app.add_middleware(edge.BodyLimit)
    app.add_middleware(security.AccessGate)
    if config.service.cors_origins:
        app.add_middleware(
            CORSMiddleware,
            allow_origins=config.service.cors_origins,
            allow_methods=["GET", "POST"],
            allow_headers=["Authorization", "Content-Type"],
        )

    @app.exception_handler(RequestValidationError)
    async def invalid_request(request: Request, exc: RequestValidationError) -> JSONResponse:
        # FastAPI's own shape ({"detail": [{loc, msg, type, input?}]}), but a value JSON
        # cannot carry (a body number like 1e999 parses to inf) is given as its text: the
        # default handler failed to encode it and answered 500.
        return JSONResponse({"detail": [_json_safe(e) for e in exc.errors()]}, 422)

    app.include_router(health.router, prefix="/api/v1")
    app.include_router(channels.router, prefix="/api/v1")
    app.include_router(waveform.router, prefix="/api/v1")
    app.include_router(kurtogram.router, prefix="/api/v1")
    app.include_router(stream.router, prefix="/api/v1")
    app.include_router(windows.router, prefix="/api/v1")
    app.include_router(alarms.router, prefix="/api/v1")
    app.include_router(actions.router, prefix="/api/v1")
    app.include_router(rules.router, prefix="/api/v1")
    app.include_router(trends.router, prefix="/api/v1")
    app.include_router(history.router, prefix="/api/v1")
    app.include_router(runups.router, prefix="/api/v1")
    app.include_router(admin.router, prefix="/api/v1")
    app.include_router(meta.router, prefix="/api/v1")
    app.include_router(metrics.router)
    docs.mount(app)
    web_dir = Path(web.__file__).parent  # the installed package's files, not the working dir
    app.mount("/static", StaticFiles(directory=web_dir), name="static")

    @app.get("/", include_in_schema=False)
    def dashboard() -> FileResponse:
        return FileResponse(web_dir / "index.html", media_type="text/html")

    return app


def _json_safe(error: Any) -> dict[str, Any]:
    """One validation error with its ``input``/``ctx`` made JSON-safe (non-finite floats
    and anything else JSON cannot hold become their text)."""
    out: dict[str, Any] = {k: error[k] for k in ("type", "loc", "msg") if k in error}
    for key in ("input", "ctx"):
        if key in error:
            out[key] = _finite(jsonable_encoder(error[key], custom_encoder={
                BaseException: str}))
    return out


def _finite(v: Any) -> Any:
    if isinstance(v, float) and not math.isfinite(v):
        return str(v)
    if isinstance(v, dict):
        return {k: _finite(x) for k, x in v.items()}
    if isinstance(v, list):
        return [_finite(x) for x in v]
    return v

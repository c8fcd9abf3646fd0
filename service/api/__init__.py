"""The HTTP application: REST routers under /api/v1 and the dashboard's static files.

Reads the hub only; never reaches into sources or engines."""

from __future__ import annotations

from collections.abc import AsyncIterator, Callable
from contextlib import asynccontextmanager
from typing import Any

from pathlib import Path

import web
from fastapi import FastAPI
from fastapi.responses import FileResponse
from fastapi.staticfiles import StaticFiles

from .. import __version__
from ..hub import Hub
from . import channels, health, metrics, stream, windows


def create_app(hub: Hub, *, lifespan_hooks: tuple[Callable[[], Any], Callable[[], Any]] | None = None) -> FastAPI:
    """A FastAPI app over ``hub``; ``lifespan_hooks`` = (async start, async stop) of the service."""

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
    app.include_router(health.router, prefix="/api/v1")
    app.include_router(channels.router, prefix="/api/v1")
    app.include_router(stream.router, prefix="/api/v1")
    app.include_router(windows.router, prefix="/api/v1")
    app.include_router(metrics.router)
    web_dir = Path(web.__file__).parent  # the installed package's files, not the working dir
    app.mount("/static", StaticFiles(directory=web_dir), name="static")

    @app.get("/", include_in_schema=False)
    def dashboard() -> FileResponse:
        return FileResponse(web_dir / "index.html", media_type="text/html")

    return app

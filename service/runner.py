"""Run the service process: the HTTP server (uvicorn, with quaver's edge limits), the
signals (SIGINT/SIGTERM stop, SIGHUP reloads) and the start-up announcement.

Knows uvicorn and the :class:`~service.app.Service` it runs; nothing of the pieces inside."""

from __future__ import annotations

import asyncio
import contextlib
import logging
import signal
from collections.abc import Callable
from pathlib import Path

import uvicorn
from threadpoolctl import threadpool_limits

from .api.edge import head_timeout_protocol
from .app import Service
from .config import Config, parse_listen
from .heap import freeze_start_up_heap
from .reload import reload_logged

log = logging.getLogger("quaver")


async def serve(
    cfg: Config,
    *,
    announce: Callable[[str], None] = print,
    started: asyncio.Event | None = None,
    config_path: str | Path | None = None,
    freeze_heap: bool = False,
) -> None:
    """Run the HTTP server and the pipelines until cancelled or signalled (SIGHUP: reload
    the config file's alarms and tokens).

    ``freeze_heap`` (the service process, not tests that run several services in one): once
    serving, move every object made so far to the collector's permanent generation
    (``gc.freeze``), see :func:`service.heap.freeze_start_up_heap`."""
    host, port = parse_listen(cfg.service.listen)
    service = Service(cfg, config_path)
    svc = cfg.service
    config = uvicorn.Config(
        service.app(), host=host, port=port, log_level="warning", access_log=False,
        lifespan="on",
        # float32 spectra barely compress, and deflating them for each client was the
        # stream's largest cost (quaver bench --service: ~820 vs ~420 messages/s)
        ws_per_message_deflate=False,
        # The edge (docs/api.md "HTTP edge"): h11 with a request-head time-out (uvicorn has none),
        # at most max_connections at once (503 beyond), idle keep-alive closed, a request
        # head at most 16 KiB (h11_max_incomplete_event_size: uvicorn's default, stated),
        # WebSocket messages at most 64 KiB before the stream's own 4 KiB check.
        http=head_timeout_protocol(svc.header_timeout_s),
        limit_concurrency=svc.max_connections,
        timeout_keep_alive=svc.keep_alive_s,  # type: ignore[arg-type]
        h11_max_incomplete_event_size=16 * 1024,
        ws_max_size=64 * 1024,
        ssl_certfile=svc.tls_cert,
        ssl_keyfile=svc.tls_key,
    )
    server = uvicorn.Server(config)
    # SIGINT/SIGTERM ask for a graceful stop (the lifespan stops the pipelines and closes
    # the store) and the process then exits 0. uvicorn's own handling would re-raise the
    # signal after shutting down, which a service manager reads as a crash.
    server.capture_signals = contextlib.nullcontext  # type: ignore[method-assign,assignment]
    loop = asyncio.get_running_loop()
    reloads: set[asyncio.Task[None]] = set()

    def on_hup() -> None:
        task = asyncio.create_task(reload_logged(service))
        reloads.add(task)
        task.add_done_callback(reloads.discard)

    for sig, handler in (
        (signal.SIGINT, lambda: setattr(server, "should_exit", True)),
        (signal.SIGTERM, lambda: setattr(server, "should_exit", True)),
        (signal.SIGHUP, on_hup),
    ):
        try:
            loop.add_signal_handler(sig, handler)
        except (NotImplementedError, RuntimeError):  # not the main thread (tests)
            pass
    task = asyncio.create_task(server.serve())
    while not server.started and not task.done():
        await asyncio.sleep(0.02)
    if server.started:
        announce(
            f"quaver: {len(service.hub.channels)} channels; open "
            f"{'https' if svc.tls_cert else 'http'}://{host}:{port}/ "
            f"(API under /api/v1, docs at /docs); Ctrl-C stops"
        )
        if freeze_heap:
            freeze_start_up_heap()
        if started is not None:
            started.set()
    await task


def run_service(
    cfg: Config,
    *,
    announce: Callable[[str], None] = print,
    config_path: str | Path | None = None,
) -> int:
    """Blocking entry point for ``quaver serve`` and ``quaver demo``; returns an exit code.
    ``config_path`` is the file ``cfg`` came from (what a reload re-reads)."""
    logging.basicConfig(
        level=logging.INFO, format="%(asctime)s %(levelname)s %(name)s: %(message)s"
    )
    # One BLAS thread: each source's worker thread already runs its own numpy work, and a
    # BLAS pool per call (the tracked tones' matrix product) spent more time handing work
    # between threads than computing — a 16-channel block took 123 ms instead of 10.6 ms
    # (quaver bench --service, 2 cores). threadpoolctl sets it for this process only.
    threadpool_limits(limits=1, user_api="blas")
    try:
        asyncio.run(serve(cfg, announce=announce, config_path=config_path, freeze_heap=True))
    except KeyboardInterrupt:
        pass
    except OSError as e:  # e.g. the port is taken
        log.error("cannot serve on %s: %s", cfg.service.listen, e)
        return 1
    return 0

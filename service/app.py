"""Assemble and run the service: sources → pipelines → hub → HTTP app, on one event loop.

Owns start-up and shut-down order; the pieces it wires know nothing about each other."""

from __future__ import annotations

import asyncio
import functools
import logging
import signal
import tomllib
from collections.abc import Callable
from importlib import resources
import uvicorn

from .api import create_app
from .config import Config, parse_config, parse_listen
from .hub import Hub
from .pipeline import SourcePipeline, build_groups, channel_states
from .sources import make_source

log = logging.getLogger("quaver")


class Service:
    """Sources, one pipeline task each, and the hub they publish to."""

    def __init__(self, cfg: Config) -> None:
        self.cfg = cfg
        self.hub = Hub()
        self.pipelines: list[SourcePipeline] = []
        self.tasks: list[asyncio.Task[None]] = []
        for src_cfg in cfg.sources:
            source = make_source(src_cfg)
            ids = list(source.channel_ids)
            states = channel_states(cfg, src_cfg.id, ids)
            self.hub.channels.update(states)
            self.hub.sources[src_cfg.id] = source
            self.pipelines.append(SourcePipeline(
                source, states, self.hub.publish,
                make_groups=functools.partial(build_groups, cfg, src_cfg.id, ids, states=states),
            ))

    async def start(self) -> None:
        """Open every source first (a port that cannot be bound fails the start-up), then
        start one pipeline task per source."""
        for p in self.pipelines:
            start = getattr(p.source, "start", None)
            if start is not None:
                await start()
        for p in self.pipelines:
            self.tasks.append(asyncio.create_task(self._run(p), name=f"pipeline-{p.source.id}"))  # type: ignore[attr-defined]

    async def _run(self, p: SourcePipeline) -> None:
        try:
            await p.run()
            log.info("source %s ended", p.source.id)  # type: ignore[attr-defined]
        except asyncio.CancelledError:
            raise
        except Exception:  # a source failing must not take the service down
            log.exception("source %s failed", p.source.id)  # type: ignore[attr-defined]

    async def stop(self) -> None:
        for t in self.tasks:
            t.cancel()
        await asyncio.gather(*self.tasks, return_exceptions=True)
        for p in self.pipelines:
            close = getattr(p.source, "aclose", None)
            if close is not None:
                await close()

    def app(self):  # type: ignore[no-untyped-def]
        return create_app(self.hub, lifespan_hooks=(self.start, self.stop))


def demo_config(
    *, listen: str | None = None, data_dir: str | None = None, speed: float | None = None,
    fault_start_s: float | None = None, fault_ramp_s: float | None = None,
) -> Config:
    """The built-in demo: the invented pumping station from ``service/examples/demo.toml``.

    ``speed`` paces the simulation (×real time); ``fault_start_s``/``fault_ramp_s`` move
    and stretch the scripted bearing fault (plant seconds)."""
    text = resources.files("service").joinpath("examples/demo.toml").read_text(encoding="utf-8")
    data = tomllib.loads(text)
    if listen is not None:
        data.setdefault("service", {})["listen"] = listen
    if data_dir is not None:
        data.setdefault("service", {})["data_dir"] = data_dir
    for s in data.get("sources", []):
        if s.get("kind") == "simulated":
            for key, value in (("speed", speed), ("fault_start_s", fault_start_s),
                               ("fault_ramp_s", fault_ramp_s)):
                if value is not None:
                    s[key] = value
    return parse_config(data, source="built-in demo")


async def serve(cfg: Config, *, announce: Callable[[str], None] = print,
                started: asyncio.Event | None = None) -> None:
    """Run the HTTP server and the pipelines until cancelled or signalled."""
    host, port = parse_listen(cfg.service.listen)
    service = Service(cfg)
    config = uvicorn.Config(service.app(), host=host, port=port, log_level="warning",
                            access_log=False, lifespan="on")
    server = uvicorn.Server(config)
    server.install_signal_handlers = lambda: None  # type: ignore[method-assign]
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGINT, signal.SIGTERM):
        try:
            loop.add_signal_handler(sig, lambda: setattr(server, "should_exit", True))
        except (NotImplementedError, RuntimeError):  # not the main thread
            pass
    task = asyncio.create_task(server.serve())
    while not server.started and not task.done():
        await asyncio.sleep(0.02)
    if server.started:
        announce(f"quaver: {len(service.hub.channels)} channels; open http://{host}:{port}/ "
                 f"(API under /api/v1, docs at /docs); Ctrl-C stops")
        if started is not None:
            started.set()
    await task


def run_service(cfg: Config, *, announce: Callable[[str], None] = print) -> int:
    """Blocking entry point for ``quaver serve`` and ``quaver demo``; returns an exit code."""
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    try:
        asyncio.run(serve(cfg, announce=announce))
    except KeyboardInterrupt:
        pass
    except OSError as e:  # e.g. the port is taken
        log.error("cannot serve on %s: %s", cfg.service.listen, e)
        return 1
    return 0

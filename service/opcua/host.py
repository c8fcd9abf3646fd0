"""What the OPC UA publisher needs of the running service (:class:`OpcuaHost`), its counters
(:class:`PublisherStats`) and :class:`OpcuaPublisher`, the part the service holds.

Knows the hub, the alarm engine and the config by type; never imports asyncua (the server
module is imported at start, so a service without ``[opcua]`` runs without the extra)."""

from __future__ import annotations

import logging
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Protocol

from ..alarms import AlarmEngine
from ..config import Config
from ..hub import Hub

if TYPE_CHECKING:
    from .server import OpcuaServer

__all__ = ["OpcuaHost", "OpcuaPublisher", "PublisherStats"]

log = logging.getLogger("quaver.opcua")


class OpcuaHost(Protocol):
    """The running service as the publisher sees it (``service.app.Service``)."""

    @property
    def hub(self) -> Hub: ...

    @property
    def alarms(self) -> AlarmEngine: ...

    @property
    def cfg(self) -> Config: ...

    async def acknowledge(self, rule: str, who: str, note: str) -> dict[str, Any]: ...


@dataclass
class PublisherStats:
    """Counters since start, for /health and /metrics."""

    frames: int = 0  # frames written into the address space
    updates: int = 0  # node values written (each value of each frame, states, alarms)
    dropped: int = 0  # frames replaced by a newer one before they were written
    events: int = 0  # OPC UA events fired
    errors: int = 0  # writes or passes that failed
    last_error: str = ""


class OpcuaPublisher:
    """The ``[opcua]`` server of a service: :meth:`start` (imports asyncua, listens),
    :meth:`begin` (the plant's nodes and the publishing, in the background), :meth:`stop`,
    :meth:`health`."""

    def __init__(self, host: OpcuaHost) -> None:
        self.host = host
        self.stats = PublisherStats()
        self.state = "stopped"  # stopped | starting | running | failed
        self._server: OpcuaServer | None = None

    async def start(self) -> None:
        """Start serving; raises (and says why in :meth:`health`) when it cannot: asyncua
        missing, the endpoint's port taken, a certificate that cannot be read."""
        self.state = "starting"
        try:
            try:
                from .server import OpcuaServer
            except ImportError as e:
                raise RuntimeError(f"[opcua] needs the asyncua package ({e}); install the "
                                   "extra: pip install 'quaver[opcua]'") from None
            self._server = OpcuaServer(self.host, self.stats)
            await self._server.start()
        except Exception as e:
            self.state = "failed"
            self.stats.last_error = f"{type(e).__name__}: {e}"[:300]
            raise
        self.state = "running"
        log.info("OPC UA server at %s (namespace %s)", self.host.cfg.opcua.endpoint,
                 f"urn:quaver:{self.host.cfg.opcua.site}")

    def begin(self) -> None:
        """Add the plant's nodes and start publishing, in the background (call once the
        sources run; /health says ``starting`` until every node is there)."""
        if self._server is not None and self.state == "running":
            self._server.begin()

    async def stop(self) -> None:
        if self._server is not None and self.state == "running":
            await self._server.stop()
        self.state = "stopped"

    def health(self) -> dict[str, Any]:
        """``state``: starting (listening; the plant's nodes are being added), running,
        failed (``last_error`` says why) or stopped; ``ok`` unless failed."""
        o = self.host.cfg.opcua
        s = self.stats
        state = self.state
        if state == "running" and self._server is not None:
            if self._server.failed:
                state = "failed"
                s.last_error = self._server.failed
            elif not self._server.ready:
                state = "starting"
        return {
            "ok": state in ("starting", "running"),
            "state": state,
            "endpoint": o.endpoint,
            "namespace": f"urn:quaver:{o.site}",
            "security": o.security_policy if o.security_policy == "None"
            else f"{o.security_policy} {o.security_mode}",
            "sessions": self._server.sessions() if self._server is not None else 0,
            "frames": s.frames,
            "updates": s.updates,
            "dropped": s.dropped,
            "events": s.events,
            "errors": s.errors,
            "last_error": s.last_error,
        }

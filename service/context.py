"""The seam between the running service and the HTTP app: what the routers may use of it.

:class:`ServiceContext` is what ``service.app.Service`` offers the API; the API depends on
this protocol (``service.api.deps``), never on the Service class or its module."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, Protocol

from .alarms import AlarmEngine, AlarmEvent
from .config import Config
from .hub import Hub
from .mqtt import MqttPublisher
from .notify import Notifier
from .opcua import OpcuaPublisher
from .store import Store


class ReloadRefused(Exception):
    """A reload that changed nothing: ``status`` (409 or 422), ``reason``, ``problems``."""

    def __init__(self, status: int, reason: str, problems: list[str] | None = None) -> None:
        super().__init__(reason)
        self.status, self.reason, self.problems = status, reason, list(problems or [])


class ServiceContext(Protocol):
    """The running service as the routers see it (``service.app.Service`` implements it)."""

    @property
    def hub(self) -> Hub: ...

    @property
    def alarms(self) -> AlarmEngine: ...

    @property
    def store(self) -> Store: ...

    @property
    def cfg(self) -> Config: ...

    @property
    def notifier(self) -> Notifier | None:
        """The notification sender, None without [[notify]] entries."""
        ...

    @property
    def mqtt(self) -> MqttPublisher | None:
        """The MQTT publisher, None without [mqtt] enabled."""
        ...

    @property
    def opcua(self) -> OpcuaPublisher | None:
        """The OPC UA server, None unless [opcua] is enabled."""
        ...

    async def reload(self) -> dict[str, Any]:
        """Apply the config file's alarms and tokens; raises :class:`ReloadRefused`."""
        ...

    async def acknowledge(self, rule: str, who: str, note: str) -> dict[str, object]:
        """Acknowledge ``rule``'s alarm; raises UnknownAlarm, AckRefused or StoreError."""
        ...

    async def act(
        self, action: Callable[[AlarmEngine], list[AlarmEvent]], what: str
    ) -> list[dict[str, Any]]:
        """Run an operator ``action`` on the alarms: its events committed first, then
        applied and announced; raises what the action raises, or StoreError."""
        ...

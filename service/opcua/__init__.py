"""OPC UA (IEC 62541) server: the plant's values, channel states and alarms in an address
space of our own, updated from the hub like any client; alarm changes as events; an
Acknowledge method that goes through the service's own acknowledge.

Knows the hub, the alarm engine, the config and (in ``server`` and ``access``, imported only
when the server starts) asyncua; nothing of HTTP or the store. See docs/opcua.md.

Modules
    ``layout`` (pure: node ids, the tree, units, status codes), ``host`` (what the service
    hands over, the counters, :class:`OpcuaPublisher`), ``access`` (sign-in with
    ``[[tokens]]``, the caller of a request), ``server`` (the asyncua server).
"""

from .host import OpcuaHost, OpcuaPublisher, PublisherStats

__all__ = ["OpcuaHost", "OpcuaPublisher", "PublisherStats"]

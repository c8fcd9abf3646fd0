"""MQTT publishing (``[mqtt]``): band values, tones, spectra, channel states and alarm events
to a broker, under a topic layout of our own (docs/mqtt.md).

Knows the hub, the config and paho-mqtt (the 'mqtt' extra, imported only when a publisher
starts); nothing of HTTP, the store's tables or the engine. ``payloads`` holds the topics
and messages (pure), ``publisher`` the hub subscriber and the link to the broker."""

from .payloads import NO_MACHINE, OFFLINE, ONLINE, Topics
from .publisher import MqttPublisher

__all__ = ["NO_MACHINE", "OFFLINE", "ONLINE", "MqttPublisher", "Topics"]

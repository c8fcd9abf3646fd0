"""The OPC UA address space as plain data: the namespace URI, every node's string id, the
tree of machines → channels → profiles → values, the units, and the status code of a value.

Pure functions of the config and the channels' states; knows nothing of asyncua (so it is
testable and importable without the ``opcua`` extra), sockets or the event loop.

Node ids are ``ns=<namespace index>;s=<path>`` with the path made of config ids only, so a
client's node ids stay valid across restarts (and across config changes that keep the ids):

=======================================  ==================================================
path                                     node
=======================================  ==================================================
``machines``                             folder of every machine
``<m>``                                  a machine (``-`` gathers channels with none)
``<m>/<ch>``                             a channel
``<m>/<ch>/status``                      its data-quality state (String) …
``<m>/<ch>/status_code``                 … and the StatusCode its values carry
``<m>/<ch>/cause``                       why it is not ok (String, empty when ok)
``<m>/<ch>/<p>``                         one analysis profile of the channel
``<m>/<ch>/<p>/overall``                 overall RMS (Double)
``<m>/<ch>/<p>/bands/<band>``            a band's RMS (Double)
``<m>/<ch>/<p>/tones/<tone>``            a tracked tone's amplitude (Double)
``<m>/<ch>/<p>/spectrum``                the spectrum (Float array) with properties
                                         ``…/spectrum/df_hz``, ``f0_hz``, ``unit``, ``amplitude``,
                                         ``x_unit`` ("Hz", or "order": then df_hz and f0_hz
                                         are in orders)
``alarms``                               folder of every alarm rule, with ``Acknowledge``
``alarms/<rule>``                        one rule; ``…/state``, ``value``, ``alert``, ``danger``,
                                         ``acknowledged``, ``latched``, ``shelved``, ``channel``
``types/AlarmEventType``                 the event type of alarm and channel-state changes
=======================================  ==================================================

A ``/`` or ``%`` inside a name is written ``%2F`` / ``%25`` so that a path splits one way.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

from dsp.spec import resolve_unit

from ..config import Config, bands_for, effective_analysis, tones_for
from ..types import ChannelState

__all__ = [
    "NO_MACHINE",
    "UNITS",
    "ChannelLayout",
    "ProfileLayout",
    "channel_code",
    "escape",
    "namespace_uri",
    "plan",
    "unit_id",
    "value_code",
]

NO_MACHINE = "-"  # the machine segment of a channel without a machine


def namespace_uri(cfg: Config) -> str:
    """``urn:quaver:<site>``: the namespace every quaver node lives in."""
    return f"urn:quaver:{cfg.opcua.site}"


def escape(name: str) -> str:
    """A name as one path segment of a node id (``/`` and ``%`` percent-encoded)."""
    return name.replace("%", "%25").replace("/", "%2F")


# Display units → (UNECE Recommendation 20 common code, description). OPC UA Part 8 §5.6.3
# takes EngineeringUnits from that recommendation (docs/references.md). The codes were checked
# against a published Rec 20 table (MSK, K40, IU, 4H, 77); C16 is from memory.
UNITS: dict[str, tuple[str, str]] = {
    "g": ("K40", "standard acceleration of free fall"),
    "m/s2": ("MSK", "metre per second squared"),
    "mm/s": ("C16", "millimetre per second"),
    "in/s": ("IU", "inch per second"),
    "um": ("4H", "micrometre"),
    "mil": ("77", "milli-inch"),
}


def unit_id(code: str) -> int:
    """The Int32 UnitId of a Rec 20 common code: its ASCII bytes, first byte highest
    (OPC UA Part 8 §5.6.3, e.g. "MSK" → 0x4D534B)."""
    out = 0
    for ch in code:
        out = (out << 8) | ord(ch)
    return out


@dataclass(frozen=True, slots=True)
class ProfileLayout:
    """One profile of one channel: where its nodes are and what they hold."""

    channel: str
    profile: str
    path: str  # "<m>/<ch>/<p>"
    unit: str  # display unit of overall, bands, tones and spectrum
    bands: tuple[str, ...]
    tones: tuple[str, ...]
    x_unit: str = "Hz"  # the spectrum's x axis: "Hz", or "order" for an order profile

    def overall(self) -> str:
        return f"{self.path}/overall"

    def band(self, name: str) -> str:
        return f"{self.path}/bands/{escape(name)}"

    def tone(self, name: str) -> str:
        return f"{self.path}/tones/{escape(name)}"

    def spectrum(self) -> str:
        return f"{self.path}/spectrum"


@dataclass(frozen=True, slots=True)
class ChannelLayout:
    id: str
    machine: str  # the segment: the machine id escaped, or NO_MACHINE
    path: str  # "<m>/<ch>"
    description: str
    # the sensor's range in the input unit (EURange high of values in that unit), if known
    range: float | None
    input_unit: str
    profiles: tuple[ProfileLayout, ...]


def plan(cfg: Config, channels: Mapping[str, ChannelState]) -> list[ChannelLayout]:
    """The channels' part of the tree, in the hub's channel order: every profile with the
    bands and tones the config gives it (the frames carry the same names)."""
    out = []
    for cid, st in channels.items():
        m = escape(st.machine) if st.machine else NO_MACHINE
        path = f"{m}/{escape(cid)}"
        profiles = []
        for p in st.profiles:
            a = effective_analysis(cfg, cid, p)
            unit = resolve_unit(a.output_unit or a.unit)
            profiles.append(ProfileLayout(
                channel=cid, profile=p, path=f"{path}/{escape(p)}", unit=unit,
                bands=tuple(b.name for b in bands_for(cfg, cid, p)),
                tones=tuple(t.name for t in tones_for(cfg, cid, p)),
                x_unit="order" if getattr(a, "kind", None) == "order" else "Hz",
            ))
        rng = st.range if math.isfinite(st.range) else None
        out.append(ChannelLayout(cid, m, path, st.description, rng, st.input_unit,
                                 tuple(profiles)))
    return out


# Channel data-quality state (service.quality) → the StatusCode its values carry. gap and
# overrun keep Good: their frames never straddle missing samples and the alarm rules
# evaluate them as usual (service.quality); the state itself is in <channel>/status.
_CODES = {
    "ok": "Good",
    "gap": "Good",
    "overrun": "Good",
    "sensor-fault": "UncertainSensorNotAccurate",
    "no-signal": "BadNoCommunication",
    "failed": "BadDeviceFailure",
}
WAITING = "BadWaitingForInitialData"  # no frame of the channel yet
UNMEASURED = "BadConfigurationError"  # NaN: cannot be measured with this set-up (REST says why)


def channel_code(status: str) -> str:
    """Name of the StatusCode (``asyncua.ua.StatusCodes``) of a channel in ``status``."""
    return _CODES[status]


def value_code(status: str, frame_quality: str, value: float) -> str:
    """Name of the StatusCode of one value from a frame: the channel's state, the frame's own
    quality (a sensor fault seen in the frame's blocks), then an unmeasurable value."""
    code = channel_code(status)
    if code == "Good" and frame_quality != "ok":
        code = channel_code(frame_quality)
    if code == "Good" and not math.isfinite(value):
        return UNMEASURED
    return code

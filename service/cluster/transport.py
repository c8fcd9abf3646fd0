"""What one source push sends from a Ray actor to the service process: the pipeline's
``PushFrames`` as they are (one per analysis group: arrays over the group's channels; their
spectra only when the service wants them, :class:`SpectraWanted`), the worker-side channel
states, the source's counters and status, finished alarm evidence and closed interval means.

Plain data and numpy only (picklable, no Ray, no asyncio)."""

from __future__ import annotations

import operator
import time
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

from ..evidence import Evidence
from ..store import HistoryRow
from ..types import ChannelState, PushFrames, SourceCounters

__all__ = ["PushBatch", "STATE_FIELDS", "SpectraWanted", "apply_states", "pack_states"]

# The ChannelState fields the source's worker writes (service.pipeline, service.speed); the
# service process owns the rest (status, fault, lost, last_frame_mono, manual speed …).
STATE_FIELDS: tuple[str, ...] = (
    "fs", "samples", "gaps", "frames", "data_status", "data_fault", "settling",
    "clean_samples", "nonfinite_blocks", "range_blocks", "flat_blocks", "clipped_blocks",
    "sensor_faults", "last_block_ns", "speed_source", "speed_now_rpm", "speed_status",
    "speed_variation", "speed_varied", "pulses", "extra_pulses", "missing_pulses",
    "pulse_faults",
)
# Written when the analysis (re)starts at a stream's rate: sent only when they changed.
PLAN_FIELDS: tuple[str, ...] = ("stale_after_s", "notes", "profile_info", "kind", "speed_from")


@dataclass(frozen=True)
class SpectraWanted:
    """Which pushes carry their spectra from an actor to the service process (sent with each
    pull): a push goes with its ``power`` when one of its channels is in ``channels``
    (``None``: every channel; a stream subscriber of spectra or tones, the MQTT or OPC UA
    publisher), or when its group's spectrum was last sent ``every_s`` s ago or more (the
    newest spectrum the REST routes show); otherwise without (``power`` of shape (C, 0)).
    Interval means are made on the actor, and the spectrum of an alarm's moment is asked
    for (``SourceGroup.spectra``)."""

    every_s: float = 1.0
    channels: frozenset[str] | None = frozenset()

    def takes(self, channels: Sequence[str]) -> bool:
        return self.channels is None or (bool(self.channels)
                                         and not self.channels.isdisjoint(channels))


@dataclass
class PushBatch:
    """Everything one push of one source sends to the service process."""

    source_id: str
    incarnation: str  # the actor's run: a new value after Ray restarted it
    pushes: list[PushFrames]  # as the pipeline made them; some without spectra (SpectraWanted)
    states: dict[str, tuple[object, ...]]  # channel → STATE_FIELDS values
    plans: dict[str, tuple[object, ...]]  # channel → PLAN_FIELDS values, when they changed
    frame_age_s: dict[str, float]  # channels the worker saw alive without a frame (tachos)
    counters: SourceCounters
    status: dict[str, object]
    latency_s: float  # the worker's time for the push, s
    failures: int = 0
    restarts: int = 0
    failed: str = ""
    evidence: list[Evidence] = field(default_factory=list)
    # channels with a run-up capture (service.speed): (orders, rpm_step), and the run-up /
    # coast-down records completed in this push
    runup_setup: dict[str, tuple[tuple[float, ...], float]] = field(default_factory=dict)
    runup_records: dict[str, list[dict[str, object]]] = field(default_factory=dict)
    history: list[HistoryRow] = field(default_factory=list)  # interval means that closed
    sent_ns: int = field(default_factory=time.time_ns)


_STATE_VALUES = operator.attrgetter(*STATE_FIELDS)


def pack_states(states: Iterable[ChannelState]) -> dict[str, tuple[object, ...]]:
    return {st.id: _STATE_VALUES(st) for st in states}


def apply_states(channels: dict[str, ChannelState], states: dict[str, tuple[object, ...]],
                 fields: tuple[str, ...] = STATE_FIELDS) -> None:
    """Write the worker-side values of ``states`` onto the service's ChannelStates (plain
    dataclass fields: one dict update per channel, about half the time of a setattr each)."""
    for cid, values in states.items():
        st = channels.get(cid)
        if st is not None:
            st.__dict__.update(zip(fields, values, strict=True))

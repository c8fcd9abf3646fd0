"""What one source push sends from a Ray actor to the service process: the push's frames as
arrays per analysis group (one batch per push), the worker-side channel states, the source's
counters and status, and finished alarm evidence.

Plain data and numpy only (picklable, no Ray, no asyncio): ``pack`` runs in the actor,
``unpack`` in the service process; ``unpack(pack(frames))`` gives frames equal to ``frames``
value for value. When the per-push columnar result replaces lists of SpectralFrame, ``pack``
becomes that object and ``unpack`` goes away (see docs/design.md "Cluster transport")."""

from __future__ import annotations

import time
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np

from ..evidence import Evidence
from ..types import (
    BandValue,
    ChannelState,
    FramePeaks,
    PeakFinder,
    PeakSettings,
    PushPeaks,
    SourceCounters,
    SpectralFrame,
    ToneValue,
)

__all__ = [
    "GroupBatch", "PushBatch", "STATE_FIELDS", "apply_states", "pack", "pack_states", "unpack",
]

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

# the values every frame of one analysis group shares in one push
_SHARED: tuple[str, ...] = (
    "profile", "t_ns", "end_index", "fs", "n", "df_hz", "f0_hz", "lines", "fmax_hz", "window",
    "enbw_bins", "averaging", "averages", "input_unit", "unit", "amplitude", "lowcut_hz",
    "x_unit", "average_restarted", "average_rpm",  # an order profile's (service.orders)
)


class GroupBatch(NamedTuple):
    """The frames of one analysis group in one push: row c is channel ``channels[c]``."""

    shared: tuple[object, ...]  # the _SHARED values, in that order
    channels: tuple[str, ...]
    primary: np.ndarray  # bool [C]
    seq: np.ndarray  # int64 [C]
    power: np.ndarray  # float32 [C, lines + 1], input unit² (SpectralFrame.power)
    overall: np.ndarray  # float64 [C, 3]: value, lo_hz, hi_hz
    band_names: tuple[str, ...]
    bands: np.ndarray  # float64 [C, B, 3]: lo_hz, hi_hz, value
    tone_names: tuple[str, ...]
    tones: np.ndarray  # float64 [C, T, 2]: frequency_hz, value
    quality: tuple[str, ...]
    speed: np.ndarray  # float64 [C, 2]: rpm, variation
    speed_source: tuple[str, ...]
    speed_status: tuple[str, ...]
    speed_varied: np.ndarray  # bool [C]
    peaks: PeakSettings | tuple[tuple[ToneValue, ...], ...]  # settings to find them, or rows


@dataclass
class PushBatch:
    """Everything one push of one source sends to the service process."""

    source_id: str
    incarnation: str  # the actor's run: a new value after Ray restarted it
    groups: list[GroupBatch]
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
    sent_ns: int = field(default_factory=time.time_ns)


def _group_key(f: SpectralFrame) -> object:
    pk = f.peaks
    return id(pk._push) if isinstance(pk, FramePeaks) else (f.profile, f.t_ns)


def pack(frames: Sequence[SpectralFrame]) -> list[GroupBatch]:
    """The frames of one push as one :class:`GroupBatch` per analysis group (frames of one
    group are adjacent: the pipeline makes them group by group)."""
    out: list[GroupBatch] = []
    i = 0
    while i < len(frames):
        key = _group_key(frames[i])
        j = i + 1
        while j < len(frames) and _group_key(frames[j]) == key:
            j += 1
        out.append(_pack_group(frames[i:j]))
        i = j
    return out


def _pack_group(fr: Sequence[SpectralFrame]) -> GroupBatch:
    f0 = fr[0]
    pk = f0.peaks
    peaks: PeakSettings | tuple[tuple[ToneValue, ...], ...] = (
        pk._push.settings if isinstance(pk, FramePeaks) else tuple(tuple(f.peaks) for f in fr)
    )
    return GroupBatch(
        shared=tuple(getattr(f0, k) for k in _SHARED),
        channels=tuple(f.channel for f in fr),
        primary=np.array([f.primary for f in fr], dtype=bool),
        seq=np.array([f.seq for f in fr], dtype=np.int64),
        power=np.stack([f.power for f in fr]),
        overall=np.array([(f.overall, f.overall_lo_hz, f.overall_hi_hz) for f in fr],
                         dtype=np.float64),
        band_names=tuple(b.name for b in f0.bands),
        bands=np.array([[(b.lo_hz, b.hi_hz, b.value) for b in f.bands] for f in fr],
                       dtype=np.float64).reshape(len(fr), len(f0.bands), 3),
        tone_names=tuple(t.name for t in f0.tones),
        tones=np.array([[(t.frequency_hz, t.value) for t in f.tones] for f in fr],
                       dtype=np.float64).reshape(len(fr), len(f0.tones), 2),
        quality=tuple(f.quality for f in fr),
        speed=np.array([(f.speed_rpm, f.speed_variation) for f in fr], dtype=np.float64),
        speed_source=tuple(f.speed_source for f in fr),
        speed_status=tuple(f.speed_status for f in fr),
        speed_varied=np.array([f.speed_varied for f in fr], dtype=bool),
        peaks=peaks,
    )


def unpack(groups: Iterable[GroupBatch], find_peaks: PeakFinder) -> list[SpectralFrame]:
    """The SpectralFrames of a push's groups, equal to the ones :func:`pack` took; peaks are
    found lazily from the shipped spectra by ``find_peaks`` (the pipeline's own finder)."""
    out: list[SpectralFrame] = []
    new_band, new_tone = BandValue._make, ToneValue._make
    for g in groups:
        s = dict(zip(_SHARED, g.shared, strict=True))
        push = (PushPeaks(g.power, g.peaks, find_peaks)
                if isinstance(g.peaks, PeakSettings) else None)
        # plain floats of every channel at once (as the pipeline makes them), then one
        # tuple per band and tone: (name, lo_hz, hi_hz, value), (name, frequency_hz, value)
        overall, speed = g.overall.tolist(), g.speed.tolist()
        bands = [[new_band((n, *v)) for n, v in zip(g.band_names, row, strict=True)]
                 for row in g.bands.tolist()]
        tones = [[new_tone((n, *v)) for n, v in zip(g.tone_names, row, strict=True)]
                 for row in g.tones.tolist()]
        primary, seq, varied = g.primary.tolist(), g.seq.tolist(), g.speed_varied.tolist()
        for c, cid in enumerate(g.channels):
            o, sp = overall[c], speed[c]
            out.append(SpectralFrame(
                channel=cid, primary=primary[c], seq=seq[c], power=g.power[c],
                overall=o[0], overall_lo_hz=o[1], overall_hi_hz=o[2],
                bands=tuple(bands[c]), tones=tuple(tones[c]),
                peaks=FramePeaks(push, c) if push is not None else g.peaks[c],  # type: ignore[index]
                quality=g.quality[c], speed_rpm=sp[0], speed_variation=sp[1],
                speed_source=g.speed_source[c], speed_status=g.speed_status[c],
                speed_varied=varied[c],
                **s,  # type: ignore[arg-type]
            ))
    return out


def pack_states(states: Iterable[ChannelState]) -> dict[str, tuple[object, ...]]:
    return {st.id: tuple(getattr(st, k) for k in STATE_FIELDS) for st in states}


def apply_states(channels: dict[str, ChannelState], states: dict[str, tuple[object, ...]],
                 fields: tuple[str, ...] = STATE_FIELDS) -> None:
    """Write the worker-side values of ``states`` onto the service's ChannelStates."""
    for cid, values in states.items():
        st = channels.get(cid)
        if st is None:
            continue
        for k, v in zip(fields, values, strict=True):
            setattr(st, k, v)

"""The few types that flow from the sources through the pipeline to the API.

Plain data only: no I/O, no asyncio, no engine state."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass(frozen=True, slots=True)
class SampleBlock:
    """A block of samples from one source.

    ``data`` is float32 ``[C, n]`` in the source's raw units (integer formats keep their
    integer values; the pipeline multiplies by each channel's sensitivity). ``first_index``
    counts samples since the stream began, so a jump marks a gap; ``t0_ns`` is the wall time
    of the first sample in ns since the Unix epoch; ``fs`` is the sample rate in Hz.
    """

    source_id: str
    channel_ids: tuple[str, ...]
    data: np.ndarray
    first_index: int
    t0_ns: int
    fs: float

    @property
    def n(self) -> int:
        return int(self.data.shape[1])


@dataclass(slots=True)
class SourceCounters:
    """Monotonic counters a source keeps; exported through the API and /metrics."""

    samples: int = 0  # samples per channel accepted
    blocks: int = 0
    bytes: int = 0
    gaps: int = 0  # jumps in the sample index (or reordering)
    malformed: int = 0  # frames/lines/datagrams rejected
    connections: int = 0
    disconnects: int = 0
    partial_frames: int = 0  # bytes left mid-frame when a producer went away
    drops: int = 0  # blocks dropped because the pipeline fell behind
    last_error: str = ""
    extra: dict[str, int] = field(default_factory=dict)

    def as_dict(self) -> dict[str, object]:
        d: dict[str, object] = {k: getattr(self, k) for k in (*COUNTER_NAMES, "last_error")}
        d.update(self.extra)
        return d


# The numeric counters of SourceCounters, in the order they are reported.
COUNTER_NAMES: tuple[str, ...] = (
    "samples", "blocks", "bytes", "gaps", "malformed", "connections", "disconnects",
    "partial_frames", "drops",
)


@dataclass(frozen=True, slots=True)
class BandValue:
    name: str
    lo_hz: float
    hi_hz: float
    value: float  # RMS in the frame's display unit (NaN if unresolved)


@dataclass(frozen=True, slots=True)
class ToneValue:
    name: str
    frequency_hz: float
    value: float  # in the frame's display unit and amplitude type


@dataclass(frozen=True, slots=True)
class SpectralFrame:
    """One channel's averaged spectrum and the values computed from it, at one moment.

    ``power`` is float32 ``[Q]``: the averaged power spectrum in ``input_unit``² (RMS² per
    line, Heinzel 2002 §9) on f[q] = f0_hz + q·df_hz, q = 0…lines; every display unit and
    amplitude type derives from it (see ``service.spectra``). ``bands``, ``tones``,
    ``peaks`` and ``overall`` are in the display ``unit`` and ``amplitude`` (bands and
    overall are always RMS). ``t_ns`` is the time just after the newest frame's last sample.
    """

    channel: str
    profile: str
    seq: int
    t_ns: int
    fs: float
    n: int
    df_hz: float
    f0_hz: float
    lines: int
    fmax_hz: float
    window: str
    enbw_bins: float
    averaging: str
    averages: int
    input_unit: str
    unit: str
    amplitude: str
    lowcut_hz: float
    power: np.ndarray
    overall: float
    bands: tuple[BandValue, ...]
    tones: tuple[ToneValue, ...]
    peaks: tuple[ToneValue, ...]
    end_index: int = 0  # input-stream index just after the newest frame's content
    primary: bool = True  # is ``profile`` the channel's primary (first) profile
    overall_lo_hz: float = float("nan")  # the band the overall covers, Hz
    overall_hi_hz: float = float("nan")

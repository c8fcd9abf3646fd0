"""The types that flow from the sources through the pipeline to the hub and the API.

Plain data only: no I/O, no asyncio, no engine state. Downstream modules (hub, API) import
these from here, never from the pipeline that fills them."""

from __future__ import annotations

import math
import threading
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, NamedTuple, Protocol, overload

import numpy as np

if TYPE_CHECKING:  # the engine's result type, without importing scipy here
    from dsp.orders import OrderSpectrum


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


# Named tuples, not frozen dataclasses: every frame makes dozens of them on the analysis
# threads, and a frozen dataclass costs over twice as much to make (~750 vs ~340 ns).
class BandValue(NamedTuple):
    name: str
    lo_hz: float
    hi_hz: float
    value: float  # RMS in the frame's display unit (NaN if unresolved)


class ToneValue(NamedTuple):
    name: str
    frequency_hz: float
    value: float  # in the frame's display unit and amplitude type


@dataclass(frozen=True, slots=True)
class PeakSettings:
    """What finding the peaks of a push's spectra needs: the analysis settings of the moment
    (copied from the analyzer, so that a frame never refers to the live engine)."""

    input_unit: str
    df_hz: float
    window: str
    n: int  # FFT length, samples
    unit: str
    amplitude: str
    count: int  # peaks per channel
    lowcut_hz: float
    beta: float  # Kaiser window's beta


# Finds one tuple of peaks per channel from the push's input-unit power spectra [C, lines + 1].
PeakFinder = Callable[[np.ndarray, PeakSettings], list[tuple[ToneValue, ...]]]


class PushPeaks:
    """The peaks of the channels analysed together in one push, found for all of them the
    first time any is read.

    Most frames' peaks are never read (only ``/tones`` and the stream's ``tones`` messages
    show them), and finding them for every push was a quarter of the analysis threads' time
    (quaver bench --service, profiled). Holds the push's ``power`` spectra and ``settings``
    (plain data); ``find`` runs once, under a lock, on whichever thread reads first."""

    __slots__ = ("power", "settings", "_find", "_rows", "_lock")

    def __init__(self, power: np.ndarray, settings: PeakSettings, find: PeakFinder) -> None:
        self.power, self.settings = power, settings
        self._find = find
        self._rows: list[tuple[ToneValue, ...]] | None = None
        self._lock = threading.Lock()

    def __reduce__(self) -> tuple[object, ...]:
        # picklable (a push sent between processes): the lock is made anew, the peaks found
        # so far go with it
        return (_push_peaks, (self.power, self.settings, self._find, self._rows))

    def row(self, c: int) -> tuple[ToneValue, ...]:
        rows = self._rows
        if rows is None:
            with self._lock:
                if self._rows is None:
                    self._rows = self._find(self.power, self.settings)
                rows = self._rows
        return rows[c]


def _push_peaks(power: np.ndarray, settings: PeakSettings, find: PeakFinder,
                rows: list[tuple[ToneValue, ...]] | None) -> PushPeaks:
    p = PushPeaks(power, settings, find)
    p._rows = rows
    return p


class FramePeaks(Sequence[ToneValue]):
    """One channel's row of a :class:`PushPeaks`: reads like a tuple of ToneValue."""

    __slots__ = ("_push", "_c")

    def __init__(self, push: PushPeaks, c: int) -> None:
        self._push, self._c = push, c

    @overload
    def __getitem__(self, i: int) -> ToneValue: ...
    @overload
    def __getitem__(self, i: slice) -> tuple[ToneValue, ...]: ...
    def __getitem__(self, i: int | slice) -> ToneValue | tuple[ToneValue, ...]:
        return self._push.row(self._c)[i]

    def __len__(self) -> int:
        return len(self._push.row(self._c))

    def __iter__(self) -> Iterator[ToneValue]:
        return iter(self._push.row(self._c))

    def __eq__(self, other: object) -> bool:
        if isinstance(other, (tuple, FramePeaks)):
            return tuple(self) == tuple(other)
        return NotImplemented

    __hash__ = None  # type: ignore[assignment]

    def __repr__(self) -> str:
        return f"FramePeaks({tuple(self)!r})"


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
    peaks: Sequence[ToneValue]  # a tuple, or a FramePeaks found when first read
    end_index: int = 0  # input-stream index just after the newest frame's content
    primary: bool = True  # is ``profile`` the channel's primary (first) profile
    overall_lo_hz: float = float("nan")  # the band the overall covers, Hz
    overall_hi_hz: float = float("nan")
    # "sensor-fault" when the channel's latest blocks held bad samples (zeroed before the
    # analysis; the values are not to be trusted), else "ok" (service.quality)
    quality: str = "ok"
    # The running speed order bands and tones were placed at: the frame's mean speed, r/min
    # (NaN: none), where it came from (tacho | estimated | manual | fixed | "" none), the
    # speed source's own status (ok | no-signal | sensor-fault; "" without a source), the
    # relative change of speed within the frame, and whether that exceeded the channel's
    # speed_tolerance (the frame smears its orders: service.speed)
    speed_rpm: float = float("nan")
    speed_source: str = ""
    speed_status: str = ""
    speed_variation: float = float("nan")
    speed_varied: bool = False
    # The unit of the x axis: "Hz", or "order" for an order profile's frame (then f0_hz,
    # df_hz, fmax_hz, lowcut_hz, band edges and tone frequencies are orders). An order
    # average spans one speed band (service.orders): ``average_restarted`` says the newest
    # frame's speed left it and started a new average, ``average_rpm`` is the speed the
    # current average started at (NaN for other profiles).
    x_unit: str = "Hz"
    average_restarted: bool = False
    average_rpm: float = float("nan")


@dataclass(frozen=True, slots=True)
class FrameSettings:
    """What every frame of one analysis group shares (one object per group and set-up,
    referenced by each of its pushes): the grid, window, averaging and units of
    :class:`SpectralFrame` (same names, same meanings)."""

    profile: str
    fs: float
    n: int
    df_hz: float
    f0_hz: float
    lines: int
    fmax_hz: float
    window: str
    enbw_bins: float
    averaging: str
    input_unit: str
    unit: str
    amplitude: str
    lowcut_hz: float
    x_unit: str = "Hz"  # "order" for an order profile (grid, edges, tones in orders)


class PushFrames:
    """One source push of one analysis group, column by column: what C
    :class:`SpectralFrame` objects would hold, as arrays over the group's channels.

    The pipeline makes one per group and push on the source's worker thread; the service
    (hub, trends, spectral history, alarms, metrics, stream) works on the arrays, and a
    :class:`SpectralFrame` of channel ``c`` is made only when something reads it
    (:meth:`frame`, cached). Picklable and cheap to send (numpy arrays, strings and
    numbers; the frames made so far are not sent), so a push can be analysed in another
    process and handed to the service whole.

    Fields (c indexes ``channels``; B bands, T tones, Q = lines + 1):

    - ``source_id``, ``channels`` (C ids), ``settings`` (:class:`FrameSettings`: the
      profile and everything a frame's grid and units say);
    - ``primary``: bool [C], is ``settings.profile`` channel c's primary profile;
    - ``seq0``: the first channel's frame sequence number (channel c's is ``seq0 + c``);
    - ``t_ns``: the time just after the newest frame's last sample (ns since the epoch);
      ``end_index``: the input-stream index just after it; ``averages``: frames averaged;
    - ``power``: float32 [C, Q], averaged power spectra in ``input_unit``² per line;
    - ``band_names`` (B), ``bands``: float64 [C, B + 1] RMS in the display unit (the last
      column is the overall), ``band_edges``: float64 [C, B + 1, 2] in Hz;
    - ``tone_names`` (T), ``tones``: float64 [C, T] (display unit and amplitude),
      ``tone_hz``: float64 [C, T];
    - ``fault``: bool [C], the channel's samples were bad (quality "sensor-fault");
    - ``speed_rpm``, ``speed_variation``: float64 [C] (NaN: none), ``speed_varied``:
      bool [C], ``speed_source``, ``speed_status``: C strings (``service.speed``);
    - ``peaks``: the push's :class:`PushPeaks` (found on first read);
    - ``average_restarted``, ``average_rpm``: an order profile's average (SpectralFrame's
      fields of the same names; False and NaN for other profiles);
    - ``new_frames``: frames this push folded into the averages; each primary channel's
      ``frames`` counter grows by it when the push is published
      (``SourcePipeline.count_frames``), not on the worker, so that a counter is never
      read ahead of the spectrum it counts.
    """

    __slots__ = (
        "source_id", "channels", "settings", "primary", "seq0", "t_ns", "end_index",
        "averages", "power", "band_names", "bands", "band_edges", "tone_names", "tones",
        "tone_hz", "fault", "speed_rpm", "speed_source", "speed_status", "speed_variation",
        "speed_varied", "peaks", "average_restarted", "average_rpm", "new_frames", "_frames",
        "_rows",
    )

    def __init__(
        self, *, source_id: str, channels: tuple[str, ...], settings: FrameSettings,
        primary: np.ndarray, seq0: int, t_ns: int, end_index: int, averages: int,
        power: np.ndarray, band_names: tuple[str, ...], bands: np.ndarray,
        band_edges: np.ndarray, tone_names: tuple[str, ...], tones: np.ndarray,
        tone_hz: np.ndarray, fault: np.ndarray, speed_rpm: np.ndarray,
        speed_source: tuple[str, ...], speed_status: tuple[str, ...],
        speed_variation: np.ndarray, speed_varied: np.ndarray, peaks: PushPeaks,
        average_restarted: bool = False, average_rpm: float = math.nan, new_frames: int = 0,
    ) -> None:
        self.source_id, self.channels, self.settings = source_id, channels, settings
        self.primary, self.seq0, self.t_ns, self.end_index = primary, seq0, t_ns, end_index
        self.averages, self.power = averages, power
        self.band_names, self.bands, self.band_edges = band_names, bands, band_edges
        self.tone_names, self.tones, self.tone_hz = tone_names, tones, tone_hz
        self.fault = fault
        self.speed_rpm, self.speed_source, self.speed_status = speed_rpm, speed_source, speed_status
        self.speed_variation, self.speed_varied = speed_variation, speed_varied
        self.peaks = peaks
        self.average_restarted, self.average_rpm = average_restarted, average_rpm
        self.new_frames = new_frames
        self._frames: list[SpectralFrame | None] = [None] * len(channels)
        self._rows: tuple[list[object], ...] | None = None

    def __len__(self) -> int:
        return len(self.channels)

    @property
    def profile(self) -> str:
        return self.settings.profile

    @property
    def overall(self) -> np.ndarray:
        """float64 [C]: each channel's overall (RMS, display unit)."""
        return self.bands[:, -1]

    def __getstate__(self) -> dict[str, object]:
        return {k: getattr(self, k) for k in self.__slots__ if not k.startswith("_")}

    def __setstate__(self, state: dict[str, object]) -> None:
        for k, v in state.items():
            object.__setattr__(self, k, v)
        self._frames = [None] * len(self.channels)
        self._rows = None

    def frame(self, c: int) -> SpectralFrame:
        """Channel ``c``'s :class:`SpectralFrame` (made once, then the same object)."""
        f = self._frames[c]
        if f is None:
            f = self._frames[c] = self._make(c)
        return f

    def frames(self) -> list[SpectralFrame]:
        return [self.frame(c) for c in range(len(self.channels))]

    def _make(self, c: int) -> SpectralFrame:
        rows = self._rows
        if rows is None:  # plain floats of every channel at once (numpy scalars cost more)
            rows = self._rows = (self.bands.tolist(), self.band_edges.tolist(),
                                 self.tones.tolist(), self.tone_hz.tolist())
        bands, edges, tones, tone_hz = rows
        b_c: list[float] = bands[c]  # type: ignore[assignment]
        e_c: list[list[float]] = edges[c]  # type: ignore[assignment]
        s = self.settings
        return SpectralFrame(
            channel=self.channels[c], profile=s.profile, primary=bool(self.primary[c]),
            seq=self.seq0 + c, t_ns=self.t_ns, end_index=self.end_index, fs=s.fs, n=s.n,
            df_hz=s.df_hz, f0_hz=s.f0_hz, lines=s.lines, fmax_hz=s.fmax_hz, window=s.window,
            enbw_bins=s.enbw_bins, averaging=s.averaging, averages=self.averages,
            input_unit=s.input_unit, unit=s.unit, amplitude=s.amplitude,
            lowcut_hz=s.lowcut_hz, power=self.power[c], overall=b_c[-1],
            overall_lo_hz=e_c[-1][0], overall_hi_hz=e_c[-1][1],
            # the last band is the overall one, not a configured band
            bands=tuple(BandValue(name, lo_hi[0], lo_hi[1], v) for name, lo_hi, v
                        in zip(self.band_names, e_c, b_c, strict=False)),
            tones=tuple(ToneValue(name, f, v) for name, f, v
                        in zip(self.tone_names, tone_hz[c], tones[c], strict=True)),  # type: ignore[call-overload]
            peaks=FramePeaks(self.peaks, c),
            quality="sensor-fault" if self.fault[c] else "ok",
            speed_rpm=float(self.speed_rpm[c]), speed_source=self.speed_source[c],
            speed_status=self.speed_status[c], speed_variation=float(self.speed_variation[c]),
            speed_varied=bool(self.speed_varied[c]), x_unit=s.x_unit,
            average_restarted=self.average_restarted, average_rpm=self.average_rpm,
        )


@dataclass
class ChannelState:
    """What the service knows about one channel; updated by its source's worker thread."""

    id: str
    source_id: str
    machine: str
    description: str
    input_unit: str
    sensitivity: float
    speed_rpm: float | None
    clip_level: float | None
    range: float = float("inf")  # largest plausible |sample|, input units (sensor's range)
    stale_after_s: float = 5.0  # no new frame for this long: no-signal
    loss_of_signal: str = "alert"  # the loss-of-signal alarm's level, or "off"
    fs: float = 0.0
    # The channel's data-quality state (service.quality), derived on the event loop from
    # what the worker saw (data_status) and when the latest frame came; ``fault`` says why.
    status: str = "no-signal"
    fault: str = "waiting for the first spectrum"
    status_since_ns: int = 0
    lost: bool = False  # the loss-of-signal condition (service.quality.is_lost)
    status_changes: int = 0
    # Written by the source's worker thread: what the latest blocks showed.
    data_status: str = "ok"  # ok | sensor-fault | gap | overrun
    data_fault: str = ""
    settling: bool = False  # analysis restarted after a sensor fault, no clean frame yet
    # clean samples since the latest bad one: the fault is held for FAULT_HOLD_S of them,
    # counted in the stream's own samples so that a recording analysed faster than real
    # time (quaver analyze) holds it exactly as the running service does
    clean_samples: int = 0
    overrun_until: float = 0.0
    samples: int = 0
    gaps: int = 0
    frames: int = 0
    nonfinite_blocks: int = 0
    range_blocks: int = 0
    flat_blocks: int = 0
    clipped_blocks: int = 0
    sensor_faults: int = 0  # transitions into sensor fault
    last_block_ns: int = 0
    last_frame_mono: float | None = None  # monotonic s when its latest frame arrived
    notes: tuple[str, ...] = ()
    profiles: tuple[str, ...] = ("default",)  # analysis profiles, the primary one first
    profile_info: dict[str, dict[str, object]] = field(default_factory=dict)  # at the stream's fs
    # Running speed (service.speed): "vibration" or "tacho"; where the speed comes from
    # (tacho | estimated | manual | fixed | ""), the latest value r/min and its own status
    # (ok | no-signal | sensor-fault), the latest frame's relative change of speed and flag;
    # an operator's written speed; a tacho channel's pulse counters.
    kind: str = "vibration"
    speed_source: str = ""
    speed_from: str | None = None
    speed_now_rpm: float = float("nan")
    speed_status: str = ""
    speed_variation: float = float("nan")
    speed_varied: bool = False
    manual_rpm: float | None = None
    manual_by: str = ""
    pulses: int = 0
    extra_pulses: int = 0
    missing_pulses: int = 0
    pulse_faults: int = 0
    # samples and pulses of a channel fed by a tacho: order spectra, run-up data
    # (service.speed.RunupCapture); None for other channels
    runup: RunupSource | None = None

    def speed_dict(self) -> dict[str, object] | None:
        """The channel's running speed as JSON fields, with its status; None without one."""
        if not self.speed_source and self.kind != "tacho":
            return None
        rpm = self.speed_now_rpm
        d: dict[str, object] = {
            "rpm": rpm if math.isfinite(rpm) else None,
            "source": "tacho" if self.kind == "tacho" else self.speed_source,
            "status": self.speed_status or ("ok" if math.isfinite(rpm) else "no-signal"),
            "variation": (self.speed_variation if math.isfinite(self.speed_variation)
                          else None),
            "varied": self.speed_varied,
        }
        if self.speed_from is not None:
            d["from"] = self.speed_from
        if self.speed_source == "manual":
            d["written_by"] = self.manual_by or None
        if self.kind == "tacho":
            d["pulses"] = {"accepted": self.pulses, "extra": self.extra_pulses,
                           "missing": self.missing_pulses, "faults": self.pulse_faults}
        return d

    def as_dict(self) -> dict[str, object]:
        return {
            "id": self.id,
            "source": self.source_id,
            "machine": self.machine,
            "description": self.description,
            "sample_rate_hz": self.fs,
            "input_unit": self.input_unit,
            "sensitivity": self.sensitivity,
            "speed_rpm": self.speed_rpm,
            "kind": self.kind,
            "speed": self.speed_dict(),
            "status": self.status,
            "fault": self.fault,
            "status_since_ns": self.status_since_ns,
            "range": self.range if math.isfinite(self.range) else None,
            "stale_after_s": self.stale_after_s,
            "loss_of_signal": self.loss_of_signal,
            "counters": {
                "samples": self.samples,
                "gaps": self.gaps,
                "frames": self.frames,
                "status_changes": self.status_changes,
                "nonfinite_blocks": self.nonfinite_blocks,
                "range_blocks": self.range_blocks,
                "flat_blocks": self.flat_blocks,
                "clipped_blocks": self.clipped_blocks,
                "sensor_faults": self.sensor_faults,
            },
            "notes": list(self.notes),
            "profiles": [
                self.profile_info.get(p, {"name": p, "primary": i == 0})
                for i, p in enumerate(self.profiles)
            ],
        }


class RunupSource(Protocol):
    """What the API reads of a channel's run-up capture (``service.speed.RunupCapture``)."""

    orders: tuple[float, ...]
    rpm_step: float

    def as_list(self) -> list[dict[str, object]]: ...

    def order_spectrum(self, omax: float, lines: int) -> OrderSpectrum: ...

    def take_records(self) -> list[dict[str, object]]: ...


class PipelineHealth(Protocol):
    """What the hub shows of a source's pipeline (``service.pipeline.SourcePipeline``)."""

    @property
    def failures(self) -> int: ...  # times it raised (it is restarted)

    @property
    def failed(self) -> str: ...  # the latest failure's text while it is being restarted

    @property
    def restarts(self) -> int: ...  # analysis restarts after a sensor fault

    def latest_waveform(self, channel: str, seconds: float
                        ) -> tuple[np.ndarray, float, int] | None:
        """The newest ``seconds`` of ``channel``'s samples in input units (after
        sensitivity): (samples, fs, t0_ns), or None before any data."""
        ...

    def envelope_state(self, channel: str, profile: str) -> dict[str, object] | None:
        """An envelope profile's band in use and latest kurtogram (JSON-ready), or None if
        ``profile`` is not an envelope profile of ``channel`` or it has not started."""
        ...

"""The pipeline: per source, blocks → sensor checks → dsp analyzers → SpectralFrames for the hub.

The numpy work runs on analysis threads: the service's shared pool (as many threads as
cores, ``[service] analysis_threads``; see :func:`analysis_pool`) or, without one, a thread
of the pipeline's own. Knows nothing about HTTP or storage.

Real-time contract: a source's blocks are processed in order, one hand-over to an analysis
thread at a time; the event loop only awaits the result and hands frames to the hub. Blocks
that are already queued when the pipeline takes one, and continue it (no gap, the same
channels and rate, up to :data:`BATCH_MAX_S` of samples), go to the thread in the same
hand-over and are published in the same step: each is analysed exactly as alone (the same
pushes, counters, alarms and trends), only the thread hand-offs and the per-step work on the
loop are shared. A block after a gap always starts a hand-over of its own, so its ``gap``
state is seen. If the analysis falls behind, the source's bounded queue drops its oldest
blocks and counts them (``counters.drops``); the pipeline reports that channel as
``overrun`` for a while.
"""

from __future__ import annotations

import asyncio
import logging
import math
import os
import time
from collections.abc import Awaitable, Callable, Sequence
from concurrent.futures import Executor, ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from dsp.analyzer import spectrum_peaks

from .config import Config, channel_settings, profiles_of, source_of
from .evidence import Evidence, EvidenceCapture
from .profiles import OVERALL, ChannelGroup, ProfileBank, ProfilePlan, overall_band, plan_profiles
from .quality import (
    DEFAULT_RANGE,
    FAULT_HOLD_S,
    OVERRUN_HOLD_S,
    STALE_MIN_S,
    default_stale_after_s,
)
from .sources.base import Source
from .speed import SourceSpeeds
from .types import (
    ChannelState,
    FrameSettings,
    PeakSettings,
    PushFrames,
    PushPeaks,
    SampleBlock,
    SpectralFrame,
    ToneValue,
)

log = logging.getLogger("quaver.pipeline")

__all__ = ["OVERALL", "ChannelGroup", "ChannelState", "SourcePipeline", "analysis_pool",
           "overall_band"]
FLAT_MIN_S = 0.05  # identical samples for this long = a flat (dead) sensor; our choice
# Queued blocks handed to an analysis thread together: at most this much signal (our choice:
# well under FAULT_HOLD_S, so a fault's state outlives any one hand-over, and a fraction of
# a second of latency for the first block only when the pipeline is already behind)
BATCH_MAX_S = 0.5


def analysis_pool(threads: int | None = None) -> ThreadPoolExecutor:
    """The analysis threads the service's pipelines share: ``threads``, default as many as
    the machine has cores. With one thread per source (64 sources: 64 threads) the threads
    mostly took turns at the interpreter lock: on 2 cores the service held 256 channels
    instead of 384 (docs/performance.md, "Shared analysis threads")."""
    count = threads or os.cpu_count() or 1
    return ThreadPoolExecutor(max_workers=count, thread_name_prefix="analysis")


@dataclass
class SourcePipeline:
    source: Source
    channels: dict[str, ChannelState]
    publish: Callable[[SourcePipeline, list[PushFrames], float], Awaitable[None]]
    make_bank: Callable[[float], ProfileBank]  # built at the stream's sample rate
    cfg: Config | None = None  # for each channel's stale_after_s once the plans are known
    bank: ProfileBank | None = None
    fs: float | None = None
    evidence_s: tuple[float, float] = (3.0, 3.0)  # waveform kept before / after an event
    seq: int = 0
    blocks: int = 0
    restarts: int = 0  # analysis restarts after a sensor fault
    failures: int = 0  # times run() raised; the service restarts it (service.app)
    failed: str = ""  # the latest failure's text while it is being restarted
    latency_s: float = 0.0
    speeds: SourceSpeeds | None = None  # running speed per channel (tacho, estimated, …)
    executor: Executor | None = None  # shared analysis threads (analysis_pool); None: own
    _next_index: int | None = None

    def __post_init__(self) -> None:
        self.started_mono = time.monotonic()  # when this run of the pipeline began
        self.evidence = EvidenceCapture(*self.evidence_s)
        self._last_drops = 0
        self._flat_run: np.ndarray | None = None
        self._flat_last: np.ndarray | None = None
        self._clock: tuple[int, int, float] = (0, 0, 0.0)  # latest block: first_index, t0_ns, fs
        self._checks: dict[tuple[str, ...], _Checks] = {}  # per channel-id tuple

    async def run(self) -> None:
        """Consume the source until it ends or the task is cancelled."""
        loop = asyncio.get_running_loop()
        own = self.executor is None
        executor = self.executor or ThreadPoolExecutor(
            max_workers=1, thread_name_prefix=f"dsp-{self.source.id}"
        )
        take_ready = getattr(self.source, "take_ready", None)
        try:
            async for block in self.source:
                t0 = time.perf_counter()
                blocks = [block]
                if take_ready is not None and self._continues(block):
                    blocks += take_ready(block, round(BATCH_MAX_S * block.fs) - block.n)
                pushes = await loop.run_in_executor(executor, self.process_blocks, blocks)
                self.latency_s = time.perf_counter() - t0
                await self.publish(self, pushes, self.latency_s)
        finally:
            if own:
                executor.shutdown(wait=False, cancel_futures=True)

    def _continues(self, block: SampleBlock) -> bool:
        """Does ``block`` continue the stream analysed so far (same rate, no gap)?"""
        return block.fs == self.fs and block.first_index == self._next_index

    def process_blocks(self, blocks: Sequence[SampleBlock]) -> list[PushFrames]:
        """:meth:`process_pushes` of each block in turn (on the analysis thread): every
        block's pushes, in order."""
        return [push for b in blocks for push in self.process_pushes(b)]

    def reset_analysis(self) -> None:
        """Forget the engine's state (before running again after a failure): the next block
        builds a new profile bank, as at the first block."""
        self.bank, self.fs, self._next_index = None, None, None
        self.speeds = None
        self._flat_run = self._flat_last = None
        self.evidence.drop_requests()

    # -- worker thread -----------------------------------------------------------------
    def process(self, block: SampleBlock) -> list[SpectralFrame]:
        """:meth:`process_pushes` and :meth:`count_frames`, one :class:`SpectralFrame` per
        channel and group (for callers without an event loop: ``quaver analyze``, tests)."""
        pushes = self.process_pushes(block)
        self.count_frames(pushes)
        return [f for push in pushes for f in push.frames()]

    def count_frames(self, pushes: Sequence[PushFrames]) -> None:
        """Add each push's new frames to its primary channels' ``frames`` counters. The
        publisher calls it where it makes the pushes' spectra visible (the service: on the
        event loop, beside the hub's latest frames), so no reader sees a counter ahead of
        the spectrum it counts; :meth:`process_pushes` on the worker leaves it alone."""
        chans = self.channels
        for push in pushes:
            if push.new_frames:
                for cid, primary in zip(push.channels, push.primary.tolist(), strict=True):
                    if primary:
                        chans[cid].frames += push.new_frames

    def process_pushes(self, block: SampleBlock) -> list[PushFrames]:
        """Sensor checks, gap handling and analysis of one block (runs on the worker
        thread): one :class:`PushFrames` per analysis group that finished frames."""
        now = time.monotonic()
        self.blocks += 1
        if block.fs != self.fs:  # first block, or the producer changed its rate
            if self.fs is not None:
                log.warning(
                    "source %s: sample rate %g → %g Hz; analysis restarts",
                    block.source_id,
                    self.fs,
                    block.fs,
                )
            self.bank, self.fs = self.make_bank(block.fs), block.fs
            if self.cfg is not None:
                self.speeds = SourceSpeeds(self.cfg, block.channel_ids, block.fs, self.channels)
            for cid, plans in self.bank.plans.items():
                st = self.channels[cid]
                st.profile_info = {p.name: p.as_dict() for p in plans}
                st.notes = tuple(f"{p.name}: {n}" if len(plans) > 1 else n
                                 for p in plans for n in p.notes)
                if self.cfg is not None:
                    st.stale_after_s = stale_after_s(self.cfg, cid, plans)
            self.evidence.restart(len(block.channel_ids), block.fs)
        states = [self.channels[c] for c in block.channel_ids]
        self._clock = (block.first_index, block.t0_ns, block.fs)
        x = block.data
        gap = self._next_index is not None and block.first_index != self._next_index
        self._next_index = block.first_index + block.n
        drops = self.source.counters.drops
        overrun = drops > self._last_drops
        self._last_drops = drops
        chk = self._checks.get(block.channel_ids)
        if chk is None:
            chk = self._checks[block.channel_ids] = _Checks.of(states)
        # One pass finds NaN/inf and values beyond the sensor's range: the largest |x| of
        # each row (NaN propagates through max/min and compares false); such samples become
        # 0 before anything else sees them, so no average, decimator or ring holds them, and
        # nothing overflows on the way (1e20 g squared is inf in float32).
        peak = _row_peak(x)
        in_range = peak <= chk.limit
        finite = in_range
        if not in_range.all():
            finite = np.isfinite(x).all(axis=1)
            x = np.where(np.abs(x) <= chk.limit[:, None], x, 0.0).astype(np.float32)
            peak = _row_peak(x)
        clipped_rows = peak >= chk.clip  # NaN clip level (none set) compares false
        flat = self._flat_line(x, block.fs, gap)
        if self.speeds is not None and self.speeds.tacho_rows.size == flat.size:
            flat &= ~self.speeds.tacho_rows  # a tacho rests flat between pulses
        hold = round(FAULT_HOLD_S * block.fs)  # a fault is held this many clean samples
        restart = False
        n, t0_ns = block.n, block.t0_ns
        if in_range.all() and not flat.any() and not clipped_rows.any() and not any(
                st.data_status == "sensor-fault" for st in states):
            # the common case: every channel clean and none in a fault (no per-channel checks)
            for st in states:
                st.fs = block.fs
                st.samples += n
                st.last_block_ns = t0_ns
                st.clean_samples += n
        else:
            # plain bools of every channel at once (numpy scalars one by one cost more)
            finite_l, in_range_l = finite.tolist(), in_range.tolist()
            flat_l, clipped_l = flat.tolist(), clipped_rows.tolist()
            for c, st in enumerate(states):
                st.fs = block.fs
                st.samples += n
                st.last_block_ns = t0_ns
                clipped = clipped_l[c]
                reason = (
                    "non-finite samples (NaN/inf)"
                    if not finite_l[c]
                    else f"values beyond the sensor's range (|x| > {st.range:g} {st.input_unit})"
                    if not in_range_l[c]
                    else "flat line"
                    if flat_l[c]
                    else "clipping"
                    if clipped
                    else ""
                )
                if reason:
                    st.nonfinite_blocks += not finite_l[c]
                    st.range_blocks += bool(finite_l[c] and not in_range_l[c])
                    st.flat_blocks += bool(flat_l[c])
                    st.clipped_blocks += clipped
                    if st.data_status != "sensor-fault":
                        st.sensor_faults += 1
                        log.warning("channel %s: sensor fault: %s", st.id, reason)
                    st.data_status, st.data_fault = "sensor-fault", reason
                    st.clean_samples, st.settling = 0, False
                else:
                    st.clean_samples += n
                if not reason and st.data_status == "sensor-fault" and not st.settling and (
                    st.clean_samples >= hold
                ):
                    # The fault is over: restart the analysis so that no average still holds
                    # the zeros that stood in for the bad samples (the source's other channels
                    # restart with it, as at a gap; their values stay exact).
                    restart = st.settling = True
                    st.data_fault = "analysis restarting after a sensor fault"
                    log.info("channel %s: sensor fault cleared; analysis restarts", st.id)
        if gap:
            for st in states:
                st.gaps += 1
        if overrun:
            until = now + OVERRUN_HOLD_S
            for st in states:
                st.overrun_until = until
        if chk.scale is not None:
            x = x * chk.scale  # raw units → engineering units
        self.evidence.append(x, block)
        pushes: list[PushFrames] = []
        if gap:
            for st in states:
                if st.data_status != "sensor-fault":
                    st.data_status = "gap"
        if restart and self.fs is not None:
            self.bank = self.make_bank(self.fs)
            self.restarts += 1
        speeds = self.speeds
        block_end = block.first_index + block.n
        if speeds is not None:
            if gap:
                speeds.reset(block.first_index)
            speeds.push(x, block.first_index, block.t0_ns)
            if self.bank is not None:
                speeds.place(self.bank, self.bank.groups, block_end, after=False,
                             block_n=block.n)
        if self.bank is not None:
            tachos = None if speeds is None else speeds.tracker_map
            for g, new in self.bank.push(x, block.first_index, tachos):
                if speeds is not None:
                    speeds.place(self.bank, [g], block_end, after=True)
                pushes.append(self._push(g, block, new, self.bank.end_index(g)))
                if speeds is not None:
                    speeds.estimate(g)
        for st in states:
            if st.data_status == "sensor-fault":
                if st.settling or st.clean_samples < hold:
                    continue
            if now < st.overrun_until:
                st.data_status, st.data_fault = "overrun", ""
            elif st.data_status != "gap":
                st.data_status, st.data_fault = "ok", ""
        if speeds is not None:
            speeds.tacho_quality()
        return pushes

    def _flat_line(self, x: np.ndarray, fs: float, gap: bool) -> np.ndarray:
        """Per channel: has the signal held one exact value for FLAT_MIN_S or longer?

        The run of identical samples is carried across blocks (short frames or datagrams
        each hold too few samples to tell), and restarts after a gap."""
        c_count, n = x.shape
        if self._flat_run is None or self._flat_last is None or (
                self._flat_run.size != c_count or gap):
            self._flat_run = np.zeros(c_count, dtype=np.int64)
            self._flat_last = np.full(c_count, np.nan, dtype=np.float32)
        if n:
            last = x[:, -1]
            # A row whose last two samples differ has a run of 1 (most rows of a live
            # signal); only the others are searched for where their run began.
            run = np.ones(c_count, dtype=np.int64)
            rest = np.flatnonzero(x[:, -2] == last) if n > 1 else np.arange(c_count)
            if rest.size:
                xr, lr = x[rest], last[rest]
                differs = xr != lr[:, None]
                any_differs = differs.any(axis=1)
                # samples after the last one that differs from the block's final value
                trailing = np.where(any_differs, np.argmax(differs[:, ::-1], axis=1), n)
                continues = ~any_differs & (lr == self._flat_last[rest])
                run[rest] = np.where(continues, self._flat_run[rest] + n, trailing)
            self._flat_run = run
            self._flat_last = last.copy()
        flat: np.ndarray = self._flat_run >= FLAT_MIN_S * fs
        return flat

    def request_evidence(
        self, event_id: int, channel: str, center_index: int, spectrum: dict[str, object]
    ) -> None:
        """Ask for the waveform around ``center_index`` (called from the event loop)."""
        self.evidence.request(event_id, channel, center_index, spectrum, self.fs or 0.0)

    def envelope_state(self, channel: str, profile: str) -> dict[str, object] | None:
        """An envelope profile's band in use and latest kurtogram (``service.envelope``),
        with the kurtogram's time; None if there is no such envelope profile yet. Read from
        the event loop: the worker replaces the kurtogram whole, never edits it."""
        bank = self.bank
        if bank is None:
            return None
        g = next((g for g in bank.groups if g.front is not None and g.profile == profile
                  and channel in g.channel_ids), None)
        if g is None or g.front is None:
            return None
        d = g.front.as_dict()
        end = d.get("kurtogram_end_index")
        first, t0_ns, fs = self._clock
        d["kurtogram_t_ns"] = (None if not isinstance(end, int) or not fs
                               else t0_ns + round((end - first) * 1e9 / fs))
        d["kurtogram_length_s"] = g.front.setup.length_s
        d["kurtogram_levels"] = g.front.setup.levels
        return d

    def latest_waveform(self, channel: str, seconds: float
                        ) -> tuple[np.ndarray, float, int] | None:
        """The newest ``seconds`` of ``channel``'s samples from the evidence ring (input
        units, after sensitivity): (samples, fs, t0_ns); None before any data (event loop)."""
        return self.evidence.latest(channel, seconds)

    def take_evidence(self, *, final: bool = False) -> list[Evidence]:
        """The evidence completed since the last call (called from the event loop);
        ``final`` (at shut-down): first complete every pending request with what is kept."""
        if final:
            self.evidence.finish()
        return self.evidence.take()

    def _push(self, g: ChannelGroup, block: SampleBlock, new: int, end: int) -> PushFrames:
        """The group's values of this push as one :class:`PushFrames` (arrays over its
        channels); per channel only the counters and states of its ChannelState."""
        an = g.analyzer
        spec = an.spec
        lines = an.grid.lines
        power_in = an.power(spec.input_unit)[:, : lines + 1].astype(np.float32)
        # Peaks only when a client reads them (PushPeaks), for every channel of the push at
        # once, from the same spectra: what an.peaks() gives, up to float32 rounding.
        peaks = PushPeaks(power_in, PeakSettings(
            input_unit=spec.input_unit, df_hz=an.grid.df_hz, window=spec.window, n=an.grid.n,
            unit=spec.unit, amplitude=spec.amplitude, count=spec.peaks,
            lowcut_hz=an.lowcut_hz, beta=spec.beta,
        ), _peak_rows)
        # Time of the newest frame's end (an input-stream index), from the block's own clock.
        t_ns = block.t0_ns + round((end - block.first_index) * 1e9 / block.fs)
        count = len(g.channel_ids)
        fault = np.zeros(count, dtype=bool)
        rpm = np.full(count, math.nan)
        variation = np.full(count, math.nan)
        varied = np.zeros(count, dtype=bool)
        sources: list[str] = []
        statuses: list[str] = []
        speeds = self.speeds
        for c, cid in enumerate(g.channel_ids):
            st = self.channels[cid]
            if st.settling:  # the first frame since the analysis restarted: clean again
                st.settling = False
                st.data_status, st.data_fault = "ok", ""
            elif st.data_status == "gap":
                st.data_status = "ok"
            elif st.data_status == "sensor-fault":
                fault[c] = True
            if g.order is not None:  # the frame's own mean speed, from its revolutions
                o = g.order
                rpm[c], variation[c] = o.frame_rpm, o.frame_variation
                sources.append("tacho")
                statuses.append(o.status)
            elif speeds is None:
                rpm[c] = st.speed_now_rpm
                sources.append(st.speed_source)
                statuses.append(st.speed_status)
            else:
                sp = speeds.frame(g, cid)
                rpm[c], variation[c], varied[c] = sp[0], sp[3], sp[4]
                sources.append(sp[1])
                statuses.append(sp[2])
        seq0 = self.seq + 1
        self.seq += count
        settings = FrameSettings(
            profile=g.profile, fs=an.grid.fs, n=an.grid.n, df_hz=an.grid.df_hz, f0_hz=0.0,
            lines=lines, fmax_hz=an.grid.fmax_hz, window=spec.window,
            enbw_bins=an.info.enbw_bins, averaging=spec.averaging,
            input_unit=spec.input_unit, unit=an.unit, amplitude=spec.amplitude,
            lowcut_hz=an.lowcut_hz, x_unit="Hz" if g.order is None else "order",
        )
        return PushFrames(
            source_id=block.source_id, channels=tuple(g.channel_ids), settings=settings,
            primary=np.asarray(g.primary, dtype=bool), seq0=seq0, t_ns=t_ns, end_index=end,
            averages=an.count, power=power_in,
            band_names=tuple(b.name for b in g.bands),
            bands=np.asarray(an.bands(), dtype=np.float64),
            band_edges=np.asarray(an.band_edges_hz, dtype=np.float64),
            tone_names=tuple(t.name for t in spec.tones),
            tones=np.asarray(an.tones(), dtype=np.float64),
            tone_hz=np.asarray(an.tone_hz, dtype=np.float64),
            fault=fault, speed_rpm=rpm, speed_source=tuple(sources),
            speed_status=tuple(statuses), speed_variation=variation, speed_varied=varied,
            peaks=peaks, average_restarted=g.order is not None and g.order.restarted,
            average_rpm=math.nan if g.order is None else g.order.average_rpm,
            new_frames=new,
        )


@dataclass(frozen=True)
class _Checks:
    """The sensor-check constants of a block's channels as arrays (C of them): the range
    limit in raw units, the clipping level (NaN: none), and the sensitivity (None when every
    channel's is 1, so the block need not be copied to be scaled)."""

    limit: np.ndarray
    clip: np.ndarray
    scale: np.ndarray | None

    @classmethod
    def of(cls, states: Sequence[ChannelState]) -> _Checks:
        sens = np.array([s.sensitivity for s in states], dtype=np.float32)[:, None]
        limit = np.array([s.range / abs(s.sensitivity) if s.sensitivity else np.inf
                          for s in states], dtype=np.float64)
        # float32 levels: the samples are float32 and a level compares with them in float32
        clip = np.array([math.nan if s.clip_level is None else s.clip_level for s in states],
                        dtype=np.float32).astype(np.float64)
        return cls(limit, clip, None if bool((sens == 1.0).all()) else sens)


def _row_peak(x: np.ndarray) -> np.ndarray:
    """max |x| of each row of ``x`` [C, n] as float64 (NaN where a row holds a NaN; −inf
    for no samples), without an |x| copy of the block."""
    if not x.shape[1]:
        return np.full(x.shape[0], -np.inf)
    hi = x.max(axis=1).astype(np.float64)
    lo = x.min(axis=1).astype(np.float64)
    peak: np.ndarray = np.maximum(hi, -lo)
    return peak


def _peak_rows(power_in: np.ndarray, s: PeakSettings) -> list[tuple[ToneValue, ...]]:
    """Each channel's peaks (``dsp.analyzer.spectrum_peaks``) from its input-unit power
    spectrum ``power_in`` [C, lines + 1], as the analyzer whose settings ``s`` are would
    find them."""
    pk = spectrum_peaks(
        power_in, s.input_unit, s.df_hz, s.window, s.n, unit=s.unit,
        amplitude=s.amplitude, count=s.count, lowcut_hz=s.lowcut_hz, beta=s.beta,
    )
    return [
        tuple(ToneValue("", f, a) for f, a in zip(fs, amps, strict=True) if math.isfinite(f))
        for fs, amps in zip(pk.frequency_hz.tolist(), pk.amplitude_rms.tolist(), strict=True)
    ]


def channel_states(
    cfg: Config, source_id: str, channel_ids: Sequence[str], fs: float | None = None
) -> dict[str, ChannelState]:
    """The channels of one source as configured; ``fs`` (Hz), when the config gives it, sets
    the default ``stale_after_s`` before the first block (it is set again from the plans
    when the stream's rate is known)."""
    out = {}
    for cid in channel_ids:
        ch = channel_settings(cfg, cid)
        st = ChannelState(
            id=cid,
            source_id=source_id,
            machine=ch.machine,
            description=ch.description,
            input_unit=ch.input_unit,
            sensitivity=ch.sensitivity,
            speed_rpm=ch.speed_rpm,
            clip_level=ch.clip_level,
            range=ch.range if ch.range is not None else DEFAULT_RANGE[ch.input_unit],
            loss_of_signal=ch.loss_of_signal,
            profiles=tuple(profiles_of(cfg, cid)),
        )
        st.stale_after_s = stale_after_s(cfg, cid, plan_profiles(cfg, cid, fs) if fs else [])
        out[cid] = st
    return out


def stale_after_s(cfg: Config, channel_id: str, plans: Sequence[ProfilePlan]) -> float:
    """The channel's ``stale_after_s``: as configured (the channel's own, else its source's),
    else from its profiles' frame and hop
    times (``service.quality.default_stale_after_s``; 5 s while they are not known)."""
    given = channel_settings(cfg, channel_id).stale_after_s
    if given is None:
        src = source_of(cfg, channel_id)
        given = None if src is None else src.stale_after_s
    if given is not None:
        return given
    if not plans:
        return STALE_MIN_S
    return default_stale_after_s(max(p.hop_s for p in plans), max(p.frame_s for p in plans))

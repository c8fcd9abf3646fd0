"""Running speed per channel of one source: tacho pulses, estimates from the 1X line, manual
and fixed speeds; the speed each frame's orders are placed at, and whether it varied.

Runs on the source's worker thread, driven by the pipeline; knows nothing of HTTP or storage."""

from __future__ import annotations

import math
import time
from collections.abc import Sequence

import numpy as np

from dsp.orders import OrderSpectrum, order_spectrum, order_track
from dsp.tacho import TachoSettings, TachoTracker, speed_from_spectrum

from .config import Config, channel_settings
from .config.plant import ChannelConfig
from .profiles import ChannelGroup, ProfileBank
from .runups import SweepRecorder
from .types import ChannelState

__all__ = ["FrameSpeed", "NotEnoughRevolutions", "RunupCapture", "SourceSpeeds",
           "tacho_settings"]

# the 1X estimate follows at most this relative change from one frame to the next (our choice:
# a ramp of minutes moves far less between frames; a jump beyond it is searched again)
ESTIMATE_TRACK = 0.1

TACHO_FAULT = "tacho: implausible pulses (extra, or jumping spacing)"
FrameSpeed = tuple[float, str, str, float, bool]  # rpm, source, status, variation, varied


def tacho_settings(ch: ChannelConfig) -> TachoSettings:
    """A tacho channel's trigger and plausibility settings from its config entry."""
    hyst = ch.trigger_hysteresis if ch.trigger_hysteresis is not None else 0.5
    return TachoSettings(
        pulses_per_rev=ch.pulses_per_rev, rpm_min=ch.rpm_min, rpm_max=ch.rpm_max,
        level=ch.trigger_level, hysteresis=hyst, min_swing=ch.min_swing,
    )


RUNUP_RING_S = 8.0  # samples kept for run-up capture, s (our choice: ≥ a few revolutions
# at the slowest plausible speed, plus the filters' margins)
RUNUP_REVS = 4  # revolutions per run-up step: order resolution 1/4 (common practice)
# steps resampled together (our choice: the filters' margins, 2 × 3 revolutions at rpm_min,
# are resampled with every call; measured on the demo fan at 12.8 kHz, orders 1, 2, 7: one
# step at a time cost 5 % of a core, 8 at a time 1.5 %, for 1.3-2.1 s more delay)
RUNUP_BATCH = 8


class NotEnoughRevolutions(ValueError):
    """The samples kept do not hold a frame's worth of whole revolutions yet."""


class RunupCapture:
    """The newest samples of a channel fed by a tacho, with the tacho's pulses over them (for
    order spectra on request), and amplitude and phase of chosen orders against speed: each
    stretch of whole revolutions between
    kept pulses (away from the ring's ends) goes through :func:`dsp.orders.order_track`;
    each step lands in its speed bin of ``rpm_step`` r/min, which keeps the vector (complex)
    mean of the steps of its latest visit (a new pass through the bin starts it again).
    ``rows`` is replaced, never changed in place (the API reads it from another thread)."""

    def __init__(self, row: int, tacho: str, ch: ChannelConfig, fs: float,
                 pulses_per_rev: int, rpm_min: float) -> None:
        self.row, self.tacho, self.fs = row, tacho, fs
        self.orders = tuple(float(o) for o in ch.runup_orders)
        self.rpm_step = float(ch.runup_rpm_step)
        self.ppr = pulses_per_rev
        self.keep = int(RUNUP_RING_S * fs)
        self.margin_s = 3.0 * 60.0 / rpm_min  # the resampling filters' reach: 2 revolutions
        self.x = np.zeros(0)
        self.first = 0  # stream index of x[0]
        self.done_s = -math.inf  # the last pulse already used
        # (samples, stream index of the first, pulses s): replaced whole by the worker,
        # read by the API's threads
        self.snap: tuple[np.ndarray, int, np.ndarray] = (np.zeros(0), 0, np.zeros(0))
        self.rows: dict[int, dict[str, object]] = {}
        self._sums: dict[int, tuple[np.ndarray, int, float]] = {}
        self.last_bin: int | None = None
        # run-up / coast-down records (service.runups), with runup_min_rpm … runup_max_rpm
        self.sweeps = (SweepRecorder(ch.runup_min_rpm, ch.runup_max_rpm, self.rpm_step,
                                     self.orders)
                       if ch.runup_min_rpm is not None and ch.runup_max_rpm is not None
                       else None)

    def reset(self, next_index: int) -> None:
        self.x, self.first, self.done_s = np.zeros(0), next_index, -math.inf
        if self.sweeps is not None:  # a gap: the sweep's steps would not join up
            self.sweeps.abandon()

    def take_records(self) -> list[dict[str, object]]:
        """Complete run-up / coast-down records not taken yet (any thread)."""
        return [] if self.sweeps is None else self.sweeps.take()

    def push(self, x: np.ndarray, first_index: int, tracker: TachoTracker, t0_ns: int) -> None:
        if first_index != self.first + self.x.size:
            self.reset(first_index)
        self.x = np.concatenate((self.x, x.astype(np.float64)))
        if self.x.size > self.keep:
            cut = self.x.size - self.keep
            self.x, self.first = self.x[cut:], self.first + cut
        t_lo = self.first / self.fs + self.margin_s
        t_hi = (self.first + self.x.size) / self.fs - self.margin_s
        run = tracker.run_pulses_s()
        inside = run[(run >= t_lo) & (run <= t_hi)] if t_hi > t_lo else run[:0]
        self.snap = (self.x, self.first, inside)
        if tracker.status != "ok" and self.sweeps is not None:
            self.sweeps.abandon()  # pulses lost or implausible: the sweep is not known
        if tracker.status != "ok" or t_hi <= t_lo or not self.orders:
            return
        e = run[(run >= max(t_lo, self.done_s)) & (run <= t_hi)]
        per = RUNUP_REVS * self.ppr
        use = (e.size - 1) // per * per + 1
        if use < max(4, RUNUP_BATCH * per + 1):
            return  # wait for a few steps: each call resamples its margins again
        e = e[:use]
        # only the samples these revolutions need, with the filters' margins
        lo = max(0, int((e[0] - self.margin_s) * self.fs) - self.first)
        hi = min(self.x.size, int((e[-1] + self.margin_s) * self.fs) + 1 - self.first)
        tr = order_track(self.x[lo:hi], self.fs, e, self.orders, pulses_per_rev=self.ppr,
                         revs_per_step=RUNUP_REVS, t0_s=(self.first + lo) / self.fs)
        rows = dict(self.rows)
        t_block = (first_index + x.size) / self.fs
        z = tr.amplitude_rms * np.exp(1j * np.radians(tr.phase_deg))  # [steps, orders]
        for k in range(tr.rpm.size):
            b = int(math.floor(tr.rpm[k] / self.rpm_step))
            if b != self.last_bin or b not in self._sums:  # a new visit of the bin
                self._sums[b] = (np.zeros(len(self.orders), complex), 0, 0.0)
            zs, n, rs = self._sums[b]
            zs, n, rs = zs + z[k], n + 1, rs + float(tr.rpm[k])
            self._sums[b] = (zs, n, rs)
            self.last_bin = b
            mean = zs / n
            t_ns = t0_ns - round((t_block - float(tr.t_s[k])) * 1e9)
            if self.sweeps is not None:
                self.sweeps.step(float(tr.rpm[k]), t_ns, z[k])
            rows[b] = {
                "rpm": rs / n,
                "t_ns": t_ns,
                "steps": n,
                "amplitude": [float(a) for a in np.abs(mean)],
                "phase_deg": [float(p) for p in np.degrees(np.angle(mean))],
            }
        self.rows = rows
        self.done_s = float(e[-1])

    def order_spectrum(self, omax: float, lines: int) -> OrderSpectrum:
        """The order spectrum (:func:`dsp.orders.order_spectrum`, Hann, 50 % overlap, linear
        average) of the samples kept, between the first and last pulse that lie inside them.

        Raises NotEnoughRevolutions when they hold less than one frame (lines/omax revs)."""
        x, first, pulses = self.snap
        need = lines / omax  # revolutions per frame
        have = (pulses.size - 1) / self.ppr if pulses.size else 0.0
        if pulses.size < 4 or have < need:
            raise NotEnoughRevolutions(
                f"a frame of {lines} lines to order {omax:g} spans {need:g} revolutions; the "
                f"{RUNUP_RING_S:g} s of samples kept hold {max(have, 0):.0f}")
        return order_spectrum(x, self.fs, pulses, omax, lines, pulses_per_rev=self.ppr,
                              t0_s=first / self.fs)

    def as_list(self) -> list[dict[str, object]]:
        """The bins with data, by increasing speed."""
        rows = self.rows
        return [rows[b] for b in sorted(rows)]


class SourceSpeeds:
    """The speed work of one source at one sample rate ``fs`` (Hz).

    ``push`` feeds the tacho rows of each block to their trackers (stream index = time ×
    fs); ``place`` sets each group's running speeds before its analyzer reads out; ``frame``
    gives a channel's speed for the frame just made. Channels with a fixed ``speed_rpm`` keep
    the speed their analyzer was built with, unless an operator writes one.
    """

    def __init__(self, cfg: Config, channel_ids: Sequence[str], fs: float,
                 states: dict[str, ChannelState]) -> None:
        self.fs = float(fs)
        self.states = states
        self.settings = {cid: channel_settings(cfg, cid) for cid in channel_ids}
        self.trackers: dict[str, tuple[int, TachoTracker]] = {
            cid: (row, TachoTracker(self.fs, tacho_settings(ch)))
            for row, (cid, ch) in enumerate(self.settings.items()) if ch.kind == "tacho"
        }
        self.tacho_rows = np.array([ch.kind == "tacho" for ch in self.settings.values()])
        self.runups: dict[str, RunupCapture] = {}
        for row, (cid, ch) in enumerate(self.settings.items()):
            if ch.speed_from in self.trackers:
                tacho = self.settings[ch.speed_from]
                cap = RunupCapture(row, ch.speed_from, ch, self.fs, tacho.pulses_per_rev,
                                   tacho.rpm_min)
                self.runups[cid] = cap
                states[cid].runup = cap
        self._started = False
        self._written: set[str] = set()
        # channels whose configured speed source can change while running (measured,
        # estimated, manual): looked up per group and block, so kept as one set
        self._moving = {cid for cid, ch in self.settings.items()
                        if ch.speed_source in ("tacho", "estimated", "manual")}
        self._tacho_faults: set[str] = set()  # tachos whose pulses are implausible now
        self._lag: dict[int, int] = {}  # group id → input samples its frames end before a block's
        self._frame: dict[tuple[int, str], FrameSpeed] = {}
        for cid, ch in self.settings.items():
            st = states[cid]
            st.kind, st.speed_source, st.speed_from = ch.kind, ch.speed_source, ch.speed_from
            if ch.speed_source == "fixed" or (ch.speed_source == "manual"
                                               and ch.speed_rpm is not None):
                # a manual speed starts from speed_rpm until one is written
                st.speed_now_rpm, st.speed_status = float(ch.speed_rpm or math.nan), "ok"

    @property
    def tracker_map(self) -> dict[str, TachoTracker]:
        """The tacho trackers by channel id (for order profiles' resampling)."""
        return {cid: tr for cid, (_, tr) in self.trackers.items()}

    def _dynamic(self, cid: str) -> bool:
        """Can ``cid``'s speed change while running (measured, estimated or written)?"""
        if cid in self._moving or cid in self._written:
            return True
        if self.states[cid].manual_rpm is not None:
            self._written.add(cid)  # placed from now on, also after the write is withdrawn
            return True
        return False

    def reset(self, next_index: int) -> None:
        """A gap (or a new stream): every tracker starts a new run at ``next_index``."""
        for _, tr in self.trackers.values():
            tr.reset(next_index)
        for cap in self.runups.values():
            cap.reset(next_index)
        self._started = True

    def push(self, x: np.ndarray, first_index: int, t0_ns: int = 0) -> None:
        """Feed the tacho rows of a block ``[C, n]`` (engineering units); then the run-up
        captures (``t0_ns``: the block's first sample's time, for their rows)."""
        if not self._started:
            self.reset(first_index)
        now = time.monotonic()
        for cid, (row, tr) in self.trackers.items():
            res = tr.push(x[row])
            st = self.states[cid]
            st.pulses += int(res.edges_s.size - res.bridged.sum())
            st.extra_pulses += res.extra
            st.missing_pulses += res.missing
            st.pulse_faults += res.faults
            if res.rpm.size:
                st.speed_now_rpm = float(res.rpm[-1])
            st.speed_status = res.status
            if res.status == "no-signal":
                st.speed_now_rpm = math.nan
            else:  # pulses arrive: the channel is live (a tacho has no spectra to show it)
                st.last_frame_mono = now
        for cap in self.runups.values():
            cap.push(x[cap.row], first_index, self.trackers[cap.tacho][1],
                     t0_ns + round(x.shape[1] / self.fs * 1e9))

    def tacho_quality(self) -> None:
        """A tacho whose pulses jump implausibly (or come with many extra ones) is a sensor
        fault, set here after the pipeline's own sample checks, whose faults it leaves alone.
        It is marked settling so that, unlike a sample fault, it never restarts the analysis
        of the source's other channels: their samples are fine."""
        for cid, (_, tr) in self.trackers.items():
            st = self.states[cid]
            faulty = tr.status == "sensor-fault"
            ours = st.data_fault.startswith(TACHO_FAULT)
            if faulty and cid not in self._tacho_faults:
                st.sensor_faults += 1  # a transition into the fault, as the sample checks count
            if faulty:
                self._tacho_faults.add(cid)
                if st.data_status != "sensor-fault" or ours:
                    st.data_status, st.data_fault, st.settling = "sensor-fault", TACHO_FAULT, True
            else:
                self._tacho_faults.discard(cid)
                if ours:
                    st.data_status, st.data_fault, st.settling = "ok", "", False

    def _span_speed(self, cid: str, ch: ChannelConfig, t0: float, t1: float) -> FrameSpeed:
        src = ch.speed_source
        st = self.states[cid]
        if src == "tacho" and ch.speed_from in self.trackers:
            _, tr = self.trackers[ch.speed_from]
            rpm, var = tr.mean_rpm(t0, t1)
            status = tr.status
            if status == "no-signal":
                rpm, var = math.nan, math.nan
            varied = bool(math.isfinite(var) and var > ch.speed_tolerance)
            return rpm, src, status, var, varied
        if st.manual_rpm is not None:
            return st.manual_rpm, "manual", "ok", 0.0, False
        if src in ("estimated", "fixed", "manual"):
            rpm = st.speed_now_rpm
            return rpm, src, "ok" if math.isfinite(rpm) else "no-signal", math.nan, False
        return math.nan, "", "", math.nan, False

    def place(self, bank: ProfileBank, groups: Sequence[ChannelGroup], block_end: int,
              *, after: bool, block_n: int = 0) -> None:
        """Set the running speed of ``groups``' analyzers to each channel's mean speed over
        its newest frame: before the push (``after`` False; tones are measured in it) from
        the span the next frame will likely cover, after it from the frame's own span.
        ``block_n``: the block's samples (before the push, a group that makes no frame of
        them is left alone: set_speed costs ~2 ms)."""
        for g in groups:
            if g.order is not None:  # orders are its axis: its analyzer's speed stays 1 rev/s
                continue
            if not any(self._dynamic(cid) for cid in g.channel_ids):
                continue
            key = id(g)
            factor = g.plan.factor if g.plan is not None else 1
            if not after and factor == 1 and not g.analyzer.bank.frames_ready(block_n):
                continue  # no frame (no tone) from this block: nothing to place yet
            length = g.analyzer.grid.n * factor
            if after:
                end = bank.end_index(g)
                self._lag[key] = block_end - end
            else:
                end = block_end - self._lag.get(key, 0)
            t0, t1 = (end - length) / self.fs, end / self.fs
            speeds = []
            changed = False
            for c, cid in enumerate(g.channel_ids):
                ch = self.settings[cid]
                fs_ = self._span_speed(cid, ch, t0, t1)
                self._frame[(key, cid)] = fs_
                hz = fs_[0] / 60.0
                speeds.append(hz)
                if self._dynamic(cid):
                    old = g.analyzer.speed_hz
                    was = math.nan if old is None else float(old[c])
                    changed |= not (was == hz or (math.isnan(was) and math.isnan(hz)))
            if changed:
                g.analyzer.set_speed(np.array(speeds))

    def estimate(self, g: ChannelGroup) -> None:
        """After a primary group's frame: the 1X line of channels with speed = 'estimated'."""
        rows = [c for c, cid in enumerate(g.channel_ids)
                if self.settings[cid].speed_source == "estimated" and g.primary[c]]
        if not rows:
            return
        an = g.analyzer
        power = an.power(an.spec.input_unit)
        for c in rows:
            cid = g.channel_ids[c]
            ch, st = self.settings[cid], self.states[cid]
            prev = st.speed_now_rpm
            rpm = speed_from_spectrum(
                power[c], an.grid.df_hz, an.spec.window, an.grid.n, ch.rpm_min, ch.rpm_max,
                beta=an.spec.beta, previous_rpm=[prev], max_change=ESTIMATE_TRACK,
            )[0]
            if not math.isfinite(rpm) and math.isfinite(prev):  # lost it: search the range
                rpm = speed_from_spectrum(power[c], an.grid.df_hz, an.spec.window, an.grid.n,
                                          ch.rpm_min, ch.rpm_max, beta=an.spec.beta)[0]
            st.speed_now_rpm = float(rpm)
            st.speed_status = "ok" if math.isfinite(rpm) else "no-signal"

    def frame(self, g: ChannelGroup, cid: str) -> FrameSpeed:
        """The speed of ``cid``'s newest frame in ``g`` (set by :meth:`place`)."""
        got = self._frame.get((id(g), cid))
        if got is None:
            st = self.states[cid]
            return (st.speed_now_rpm, st.speed_source,
                    st.speed_status, math.nan, False)
        st = self.states[cid]
        if g.primary[g.channel_ids.index(cid)] and st.kind != "tacho":
            if got[1] in ("tacho", "manual"):
                st.speed_now_rpm = got[0]
                st.speed_status = got[2]
            if got[1]:
                st.speed_source = got[1]
            st.speed_variation, st.speed_varied = got[3], got[4]
        return got

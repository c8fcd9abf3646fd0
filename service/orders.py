"""An order profile's front end (``OrderFront``): the channels of a group resampled at constant
shaft angle from their tacho's pulses, framed by the profile's Analyzer, with the speed rule.

Runs on the source's worker thread, driven by ``ProfileBank``; knows nothing of HTTP or storage.

The speed rule (``speed_band_pct``): an average holds only frames whose mean speed is within
± that share of the speed of its first frame. A frame outside starts a new average before it
is folded in (``Analyzer.restart_average``), and the frame says so (``average_restarted``).
A linear average that completes starts its next one at the next frame's speed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from dsp.analyzer import Analyzer
from dsp.orders import AngleStream
from dsp.tacho import TachoTracker

__all__ = ["OrderFront", "OrderSetup"]


@dataclass(frozen=True)
class OrderSetup:
    """What an order profile's front needs: its tacho (channel id, pulses per revolution,
    plausible speeds in r/min), angle samples per revolution and the speed rule (%)."""

    tacho: str
    pulses_per_rev: int
    samples_per_rev: float
    speed_band_pct: float
    rpm_min: float
    rpm_max: float

    @property
    def slowest_rev_s(self) -> float:
        """One revolution at the slowest plausible speed, s."""
        return 60.0 / self.rpm_min


class OrderFront:
    """The angle-domain front of one group of channels sharing a tacho.

    ``push`` takes the group's samples (at ``fs`` Hz: the stream, or its decimated tap),
    the time of the first (s on the stream's clock, the tacho's) and the tacho's tracker,
    and feeds the angle samples to the group's Analyzer frame by frame, restarting its
    average when a frame's speed leaves the band. ``frame_rpm`` etc. describe the newest
    frame.
    """

    def __init__(self, setup: OrderSetup, fs: float, channels: int) -> None:
        self.setup = setup
        # samples kept while no run of pulses is known: enough for 4 pulses at rpm_min
        self.stream = AngleStream(channels, fs, setup.samples_per_rev, setup.pulses_per_rev,
                                  max_span_s=6.0 * setup.slowest_rev_s)
        self.frame_rpm = math.nan  # mean speed of the newest frame, r/min
        self.frame_variation = math.nan  # (max − min)/mean revolution speed over it
        self.average_rpm = math.nan  # the speed the current average started at
        self.restarted = False  # did the newest push's frames restart the average
        self.restarts = 0  # averages restarted by the speed rule
        self.status = ""  # the tacho's status at the newest push
        self.last_end_s = math.nan  # time just after the newest frame's last angle sample

    def push(self, an: Analyzer, y: np.ndarray, t0_s: float,
             tracker: TachoTracker | None) -> int:
        """Resample ``y`` [C, n] (time of y[:, 0]: ``t0_s``) and frame it; return the number
        of new frames folded into ``an``'s averages."""
        if tracker is None:
            return 0
        self.status = tracker.status
        pulses = tracker.run_pulses_s() if self.status == "ok" else np.zeros(0)
        ys, first = self.stream.push(y, t0_s, pulses)
        self.restarted = False
        if not ys.shape[1]:
            return 0
        bank = an.bank
        if first != bank.next_index:  # a new run of pulses: a gap in angle
            an.reset(first)
        n, spr = an.grid.n, self.setup.samples_per_rev
        band = self.setup.speed_band_pct / 100.0
        new, pos, total = 0, 0, ys.shape[1]
        while pos < total:
            to_frame = n - bank.pending  # samples that complete the next frame
            take = min(to_frame, total - pos)
            if take == to_frame:
                end = bank.next_index + take  # the frame's angle samples: end − n … end − 1
                t_a, t_b = (float(v) for v in self.stream.time_at(np.array([end - n, end - 1])))
                rpm = 60.0 * (n - 1) / spr / (t_b - t_a)
                if an.count and abs(rpm / self.average_rpm - 1.0) > band:
                    an.restart_average()
                    self.restarted = True
                    self.restarts += 1
                new += an.push(ys[:, pos: pos + take])
                if an.count == 1:
                    self.average_rpm = rpm
                self.frame_rpm = rpm
                self.frame_variation = tracker.mean_rpm(t_a, t_b)[1]
                self.last_end_s = t_b + (t_b - t_a) / (n - 1)
            else:
                new += an.push(ys[:, pos: pos + take])
            pos += take
        return new

    def content_index(self, fs_in: float) -> int:
        """Input-stream index (at ``fs_in`` Hz) just after the newest frame's content."""
        return int(round(self.last_end_s * fs_in)) if math.isfinite(self.last_end_s) else 0

    def as_dict(self) -> dict[str, object]:
        """The front's state for the API (JSON-ready)."""
        return {
            "speed_from": self.setup.tacho,
            "samples_per_rev": self.setup.samples_per_rev,
            "speed_band_pct": self.setup.speed_band_pct,
            "average_rpm": None if not math.isfinite(self.average_rpm) else self.average_rpm,
            "average_restarts": self.restarts,
        }

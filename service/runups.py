"""Run-up and coast-down records: the order-tracking steps of a channel fed by a tacho, gathered
while its speed sweeps through a configured range, kept as one record per sweep.

Pure logic on numbers (numpy only), run on the source's worker thread by
``service.speed.RunupCapture``; knows nothing of threads, storage or HTTP.

Rules (docs/configuration.md, "Run-up records")
    The range is ``runup_min_rpm`` … ``runup_max_rpm``. A record starts when the speed
    leaves one end inwards: from at or below the minimum to above it (a run-up), from at or
    above the maximum to below it (a coast-down). It is complete when the speed reaches the
    other end. It is abandoned, and nothing kept, when the speed comes back to the end it
    started from, the tacho loses its pulses or the stream has a gap. While it runs each
    step (``RUNUP_REVS`` whole revolutions, :func:`dsp.orders.order_track`) lands in its
    speed bin of ``runup_rpm_step`` r/min, which keeps the vector mean of all its steps.
"""

from __future__ import annotations

import math
from collections import deque
from typing import Literal

import numpy as np

__all__ = ["RUNUP_KINDS", "RunupKind", "SweepRecorder"]

RunupKind = Literal["run-up", "coast-down"]
RUNUP_KINDS: tuple[RunupKind, ...] = ("run-up", "coast-down")
FINISHED_MAX = 16  # records held for the service to take (our choice: it takes them every block)


class SweepRecorder:
    """Records sweeps of the speed through ``lo_rpm`` … ``hi_rpm`` (r/min), ``orders`` each,
    in bins of ``rpm_step`` r/min. Feed it every step with :meth:`step`; take the complete
    records with :meth:`take` (a dict each: kind, start_ns, end_ns, rpm_lo, rpm_hi,
    rpm_step, orders, rows — rows by increasing speed: rpm, t_ns, steps, amplitude (RMS, the
    unit of the samples), phase_deg)."""

    def __init__(self, lo_rpm: float, hi_rpm: float, rpm_step: float,
                 orders: tuple[float, ...]) -> None:
        if not 0 < lo_rpm < hi_rpm:
            raise ValueError(f"run-up range {lo_rpm!r}…{hi_rpm!r} r/min: need 0 < min < max")
        self.lo, self.hi, self.rpm_step, self.orders = lo_rpm, hi_rpm, rpm_step, orders
        self.side: Literal["low", "high", ""] = ""  # the end the speed was last at
        self.kind: RunupKind | None = None  # the sweep being recorded
        self.start_ns = 0
        self._bins: dict[int, tuple[np.ndarray, int, float, int]] = {}
        self.finished: deque[dict[str, object]] = deque(maxlen=FINISHED_MAX)
        self.abandoned = 0

    def abandon(self) -> None:
        """The pulses were lost or the stream had a gap: drop the sweep, and forget which
        end the speed was at (it is not known how it moved meanwhile)."""
        if self.kind is not None:
            self.abandoned += 1
        self.kind, self.side, self._bins = None, "", {}

    def step(self, rpm: float, t_ns: int, z: np.ndarray) -> None:
        """One step of whole revolutions at mean speed ``rpm`` r/min, at ``t_ns``, with the
        complex amplitude ``z`` (RMS · e^{i·phase}) of each order."""
        if not math.isfinite(rpm):
            return
        if rpm <= self.lo or rpm >= self.hi:
            end: Literal["low", "high"] = "low" if rpm <= self.lo else "high"
            if self.kind is not None:
                done = (self.kind == "run-up") == (end == "high")
                if done:
                    self._add(rpm, t_ns, z)  # the step that reaches the end belongs to it
                    self._finish(self.kind, t_ns)
                else:
                    self.abandoned += 1
                self.kind, self._bins = None, {}
            self.side = end
            return
        if self.kind is None and self.side:
            self.kind = "run-up" if self.side == "low" else "coast-down"
            self.start_ns, self._bins = t_ns, {}
        if self.kind is not None:
            self._add(rpm, t_ns, z)

    def _add(self, rpm: float, t_ns: int, z: np.ndarray) -> None:
        b = int(math.floor(rpm / self.rpm_step))
        zs, n, rs, _ = self._bins.get(b, (np.zeros(len(self.orders), complex), 0, 0.0, 0))
        self._bins[b] = (zs + z, n + 1, rs + rpm, t_ns)

    def _finish(self, kind: RunupKind, t_ns: int) -> None:
        rows = []
        for b in sorted(self._bins):
            zs, n, rs, tb = self._bins[b]
            mean = zs / n
            rows.append({"rpm": rs / n, "t_ns": tb, "steps": n,
                         "amplitude": [float(a) for a in np.abs(mean)],
                         "phase_deg": [float(p) for p in np.degrees(np.angle(mean))]})
        self.finished.append({
            "kind": kind, "start_ns": self.start_ns, "end_ns": t_ns,
            "rpm_lo": self.lo, "rpm_hi": self.hi, "rpm_step": self.rpm_step,
            "orders": list(self.orders), "rows": rows,
        })

    def take(self) -> list[dict[str, object]]:
        """The complete records not taken yet, oldest first (the worker appends, another
        thread takes: deque's append and popleft are atomic)."""
        out = []
        while True:
            try:
                out.append(self.finished.popleft())
            except IndexError:
                return out

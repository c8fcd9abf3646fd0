"""The engine alone at the service benchmark's settings (``quaver bench --service``): how
many channels one core analyses in real time, beside what the running service holds.

Knows ``dsp.bench`` (the engine benchmark) and the plan; nothing of the service."""

from __future__ import annotations

import math
from typing import Any

from dsp.bench import _threads_limited, run_case

from .plan import BenchPlan

__all__ = ["engine_capacity"]

CHANNELS = 64  # the engine's batch at which it is timed (as `quaver bench` does)


def engine_capacity(plan: BenchPlan, seconds: float = 2.0, repeats: int = 3) -> dict[str, Any]:
    """The engine (``dsp.analyzer.Analyzer``: window, rfft, averaging, 16 bands, 8 tracked
    orders, read-outs after every 0.1 s push) on ``CHANNELS`` channels at ``plan``'s fs,
    lines and overlap, timed in CPU time of one thread (BLAS/FFT held to one thread), best
    of ``repeats``. ``capacity_channels`` = CHANNELS × real-time factor: channels one core
    analyses in real time with nothing but the engine."""
    with _threads_limited():
        res = run_case(CHANNELS, fmax_hz=plan.fmax_hz, lines=plan.lines, seconds=seconds,
                       repeats=repeats, compare=False)
    return {
        "channels_timed": CHANNELS, "seconds": seconds, "repeats": repeats,
        "realtime_factor": round(res.realtime_factor, 2),
        "capacity_channels": int(math.floor(CHANNELS * res.realtime_factor)),
        "cpu_ms_per_frame": round(1e3 * res.engine_s / res.frames, 4),
        "frames": res.frames,
    }

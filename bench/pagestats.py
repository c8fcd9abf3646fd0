"""Pure arithmetic of ``quaver bench --dashboard``: main-thread busy share from DevTools metric
samples, per-window rates, WebSocket payload sizes, and the CPU ratio.

Knows numbers only: nothing of the browser, the service or the page.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

__all__ = ["busy_shares", "cpu_ratio", "per_window_rates", "ws_payload_bytes"]

TAIL = 0.25  # fraction of a window below which a last partial window is merged


def busy_shares(samples: Sequence[tuple[float, float]], window_s: float) -> list[float]:
    """Main-thread busy share per window from ``(timestamp_s, task_duration_s)`` samples of the
    DevTools ``Performance.getMetrics`` figures ``Timestamp`` and ``TaskDuration`` (both
    cumulative seconds; Chrome DevTools Protocol, Performance domain): ΔTaskDuration /
    ΔTimestamp per window of ``window_s`` (the windows of :func:`per_window_rates`). Shares are
    of one core (the renderer's main thread), so they lie in [0, 1] up to the metrics' own
    rounding (clamped there)."""
    return [min(1.0, max(0.0, r)) for r in per_window_rates(samples, window_s)]


def per_window_rates(samples: Sequence[tuple[float, float]], window_s: float) -> list[float]:
    """Rate per second of a cumulative counter (e.g. animation frames) per window of
    ``window_s`` from the first sample, from ``(time_s, count)`` samples: windows are
    (start, end], and each runs from the last sample of the previous window (or the first
    sample) to its own last one, so no interval is lost between windows. The last window
    may be partial (the last sample closes it; shorter than ``TAIL`` of a window, it joins the
    one before); a window without samples is left out."""
    if window_s <= 0:
        raise ValueError(f"window_s must be > 0, got {window_s}")
    if len(samples) < 2:
        return []
    t0, t_end = samples[0][0], samples[-1][0]
    # a last window shorter than TAIL·window_s (e.g. clock jitter at the end) joins the one
    # before it
    last = max(0, int(math.ceil((t_end - t0) / window_s - TAIL)) - 1)
    windows: dict[int, list[tuple[float, float]]] = {}
    for t, n in samples:
        k = max(0, int(math.ceil((t - t0) / window_s)) - 1)  # windows are (start, end]
        windows.setdefault(min(k, last), []).append((t, n))
    rates = []
    for k in sorted(windows):
        prev = windows.get(k - 1)
        pts = ([prev[-1]] if prev else []) + windows[k]
        if len(pts) >= 2 and pts[-1][0] > pts[0][0]:
            rates.append((pts[-1][1] - pts[0][1]) / (pts[-1][0] - pts[0][0]))
    return rates


def ws_payload_bytes(payload: str, opcode: int) -> int:
    """Bytes of one WebSocket message as the DevTools ``Network.webSocketFrameReceived`` event
    gives it: text frames (opcode 1) as their UTF-8 text, binary frames (opcode 2) base64
    encoded (RFC 6455 opcodes; RFC 4648 base64: 4 characters per 3 bytes, minus padding)."""
    if opcode == 2:
        pad = len(payload) - len(payload.rstrip("="))
        return len(payload) * 3 // 4 - pad
    return len(payload.encode("utf-8"))


def cpu_ratio(open_cpu_s: float, open_wall_s: float, closed_cpu_s: float,
              closed_wall_s: float) -> float:
    """Service CPU share with the page open over the share with it closed (NaN when the
    closed share is 0)."""
    if open_wall_s <= 0 or closed_wall_s <= 0:
        raise ValueError("wall spans must be > 0")
    closed = closed_cpu_s / closed_wall_s
    return (open_cpu_s / open_wall_s) / closed if closed > 0 else math.nan

"""Load benchmark of a real quaver: ingest headroom, latency, WebSocket fan-out and memory.

Knows the config file shape, the framed wire format, the HTTP/WebSocket API and /proc; runs the
service as a child process (``python -m service serve``) and nothing of its internals.

``quaver bench --service`` (``run`` + ``format_report``) measures, in one run:

1. **Ingest headroom** — channels at fs 25.6 kHz (Fmax 10 kHz, 3200 lines, 75 % overlap,
   16 bands, 8 tracked tones, two alarm rules per channel) spread over TCP sources of 16
   channels, fed at real-time pace for a fixed span per step. A step passes when the service
   counted no drops and no gaps, no channel shows ``overrun``, and every fed channel's frame
   counter rose by exactly floor((n − N)/hop) + 1 for the n samples fed so far, within
   ``DRAIN_S`` of the last send (so a backlog larger than that fails the step). Steps rise
   until one fails; between the last pass and the first failure the search halves the
   interval at source granularity (``search_headroom``).
2. **Latency** — a WebSocket client subscribed to one channel stamps each spectrum message on
   arrival; the message's ``timestamp_ns`` gives the end index of the newest frame (the
   feeder's header clock is a fixed function of the sample index), hence the block that
   carried its newest sample and that block's send time. Latency = arrival − send, i.e.
   beyond the frame's own duration.
3. **WebSocket fan-out** — clients (in their own process) subscribed to 8 channels each;
   received frames per client, frames skipped (by end index) for clients that kept up, and
   the service's CPU seconds per analysis frame with and without the clients.
4. **Memory** — VmRSS of a second service (4 channels, 400 lines) after 10⁴ and 10⁶ frames
   (short mode: 10³ and 10⁵) fed faster than real time with flow control.

Every loop is bounded, every wait has a time-out, and the child processes are stopped in
``finally`` blocks (SIGTERM, then SIGKILL), also on Ctrl-C.

Modules: ``stats`` (pure arithmetic), ``plan``, ``probes`` (/proc), ``harness`` (the child
service, shared with the tests), ``target`` (the service under test), ``feeder``,
``clients`` (WebSocket), ``experiments`` (the four phases and ``run``), ``report``.

``quaver bench --dashboard`` (``dashboard.run``) measures the plant view in headless Chromium
against a generated plant: ``plant``, ``pageprobe`` (Playwright, DevTools Protocol),
``pagestats`` (pure arithmetic), ``dashboard``; imported on its own, not from here, so the
load benchmark never needs Playwright.
"""

from .experiments import run
from .feeder import FrameTemplate
from .plan import BenchPlan
from .report import format_report, main
from .stats import (
    end_index_differences,
    expected_frames,
    latencies_ns,
    newest_frame_ends,
    percentile,
    search_headroom,
    skipped_frames,
)

__all__ = [
    "BenchPlan",
    "FrameTemplate",
    "end_index_differences",
    "expected_frames",
    "format_report",
    "latencies_ns",
    "main",
    "newest_frame_ends",
    "percentile",
    "run",
    "search_headroom",
    "skipped_frames",
]

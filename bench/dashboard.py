"""``quaver bench --dashboard``: the plant view in headless Chromium against a real service
fed at real time — first full render, main-thread busy share, frame rate, retained heap,
bytes received, service CPU with the page open and closed, abnormal machines at first sight.

Knows the bench modules (plant, harness, feeder, probes, pageprobe, pagestats) and the public
HTTP API; nothing of the service's internals or of the dashboard's code.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import secrets
import sys
import tempfile
import threading
import time
from dataclasses import asdict
from pathlib import Path
from typing import Any

from . import harness
from .feeder import Feeder
from .pageprobe import VIEWPORT_H, VIEWPORT_W, PageProbe, browser_context
from .pagestats import busy_shares, cpu_ratio, per_window_rates
from .plant import ALERT_GAIN, DANGER_GAIN, PER_SOURCE, PlantPlan, config_doc
from .probes import machine, proc_cpu_s

__all__ = ["format_report", "main", "run"]

SETTLE_TIMEOUT_S = 120.0  # every channel has a spectrum and the abnormal machines alarm
RENDER_TIMEOUT_S = 120.0
POLL_S = 0.5


def _say(text: str) -> None:
    print(f"bench --dashboard: {text}", file=sys.stderr, flush=True)


class _FeedThread(threading.Thread):
    """Feeds every source at real time, one second at a time, until stopped."""

    def __init__(self, feeder: Feeder) -> None:
        super().__init__(name="dashbench-feed", daemon=True)
        self.feeder, self.stop_event = feeder, threading.Event()
        self.error: BaseException | None = None
        self.max_late_ms = 0.0

    def run(self) -> None:
        try:
            while not self.stop_event.is_set():
                got = self.feeder.realtime(self.feeder.ids, 1.0)
                self.max_late_ms = max(self.max_late_ms, got["max_late_ms"])
        except BaseException as e:  # reported by the run, which then stops
            self.error = e

    def check(self) -> None:
        if self.error is not None:
            raise RuntimeError(f"feeding the service failed: {self.error!r}")


def _settled(svc: harness.Child, plan: PlantPlan) -> bool:
    """Every channel has a spectrum and every abnormal machine has an active alarm."""
    chans = svc.get_json("/api/v1/channels")
    if len(chans) != plan.channels or not all(c.get("latest") for c in chans):
        return False
    danger, alert = plan.abnormal()
    of = dict(plan.channel_machines())
    active = {of.get(a["channel"]) for a in svc.get_json("/api/v1/alarms")
              if a.get("state") in ("alert", "danger")}
    return set(danger + alert) <= active


def _health(svc: harness.Child) -> dict[str, int]:
    """Drops over every source, channels in ``overrun`` and analysis frames so far: whether
    the service kept up with the feed (a starved service makes the page's figures lighter)."""
    health = svc.get_json("/api/v1/health")
    chans = svc.get_json("/api/v1/channels")
    return {"drops": sum(int(s["counters"]["drops"]) for s in health["sources"].values()),
            "overrun_channels": sum(c["status"] == "overrun" for c in chans),
            "frames": sum(int(c["counters"]["frames"]) for c in chans)}


def _cpu_window(pid: int, seconds: float, feed: _FeedThread) -> dict[str, float]:
    cpu0, t0 = proc_cpu_s(pid), time.monotonic()
    end = t0 + seconds
    for _ in range(int(seconds / POLL_S) + 2):
        feed.check()
        left = end - time.monotonic()
        if left <= 0:
            break
        time.sleep(min(POLL_S, left))
    return {"cpu_s": proc_cpu_s(pid) - cpu0, "wall_s": time.monotonic() - t0}


def _measure_page(probe: PageProbe, plan: PlantPlan, span_s: float, pid: int,
                  feed: _FeedThread, screenshot: str | None = None) -> dict[str, Any]:
    """Open the plant view, wait for the full render, then sample for ``span_s``
    (``screenshot``: a PNG of the first screen at the full render goes there)."""
    danger, alert = plan.abnormal()
    probe.open()
    render_s = probe.wait_rendered(plan.machine_ids(), RENDER_TIMEOUT_S)
    screen = probe.first_screen(danger + alert)
    if screenshot:
        probe.page.screenshot(path=screenshot)
    load_bytes = probe.bytes_received()
    window_s = 60.0 if span_s >= 60.0 else span_s
    step_s = min(5.0, span_s / 6.0)
    heap_at = [min(60.0, span_s / 2.0), span_s]
    heaps: list[dict[str, float]] = []
    gc_task_s = 0.0  # main-thread time of the forced collections, left out of the busy share
    samples: list[dict[str, float]] = []
    cpu0 = proc_cpu_s(pid)
    s0 = probe.sample()
    samples.append(s0)
    n_steps = int(math.ceil(span_s / step_s))
    for k in range(1, n_steps + 1):
        due = s0["wall"] + min(span_s, k * step_s)
        feed.check()
        time.sleep(max(0.0, due - time.monotonic()))
        s = probe.sample()
        s["task_s"] -= gc_task_s
        samples.append(s)
        if heap_at and s["wall"] - s0["wall"] >= heap_at[0] - 1e-6:
            heap_at.pop(0)
            heap = probe.retained_heap()
            after = probe.sample()
            gc_task_s += after["task_s"] - (s["task_s"] + gc_task_s)
            heaps.append({"after_s": round(s["wall"] - s0["wall"], 1),
                          "mb": round(heap / 2**20, 2)})
    wall = samples[-1]["wall"] - s0["wall"]
    cpu_open = proc_cpu_s(pid) - cpu0
    busy = busy_shares([(s["t"], s["task_s"]) for s in samples], window_s)
    fps = per_window_rates([(s["wall"], s["frames"]) for s in samples], window_s)
    got = {
        "render_s": round(render_s, 3),
        "first_screen": {**screen, "abnormal": danger + alert,
                         "all_abnormal_in_first_screen": not screen["not_in_first_screen"]},
        "window_s": window_s,
        "busy_share_per_window": [round(b, 4) for b in busy],
        "fps_per_window": [round(f, 1) for f in fps],
        "heap_retained": heaps,
        "load_bytes": load_bytes,
        "bytes_per_s": round((samples[-1]["bytes"] - s0["bytes"]) / wall, 1),
        "ws_messages": probe.ws_messages,
        "page_errors": probe.errors[:10],
        # the raw DevTools/page samples, to recompute any figure (t, task_s: DevTools s;
        # frames; wall: this process's monotonic clock, s; bytes received so far)
        "samples": [{k: round(v, 4) for k, v in smp.items()} for smp in samples],
        "service_cpu_open": {"cpu_s": round(cpu_open, 2), "wall_s": round(wall, 1)},
    }
    probe.close()
    return got


def run(plan: PlantPlan, minutes: float, workdir: Path | None = None,
        screenshot: str | None = None) -> dict[str, Any]:
    """The whole benchmark; a JSON-ready report. The service, the feeder and the browser
    always end."""
    if minutes <= 0:
        raise ValueError(f"minutes must be > 0, got {minutes}")
    span_s = 60.0 * minutes
    closed_s = min(60.0, span_s)
    token = secrets.token_urlsafe(24)
    plan = PlantPlan(**{**asdict(plan), "token": token})
    danger, alert = plan.abnormal()
    report: dict[str, Any] = {
        "machine": machine(),
        "setup": {"channels": plan.channels, "machines": plan.machines, "danger": danger,
                  "alert": alert, "danger_gain": DANGER_GAIN, "alert_gain": ALERT_GAIN,
                  "fs_hz": plan.fs_hz, "fmax_hz": plan.fmax_hz, "lines": plan.lines,
                  "overlap": plan.overlap, "block_s": plan.block_s,
                  "channels_per_source": PER_SOURCE, "minutes": minutes,
                  "closed_window_s": closed_s, "viewport": f"{VIEWPORT_W}x{VIEWPORT_H}"},
    }
    with contextlib.ExitStack() as stack:
        if workdir is None:
            workdir = Path(stack.enter_context(
                tempfile.TemporaryDirectory(prefix="quaver-dashbench-")))
        _say(f"starting a service with {plan.channels} channels on {plan.machines} machines")
        svc = stack.enter_context(harness.run_service(
            config_doc(plan), workdir / "service", new_session=True,
            headers={"Authorization": f"Bearer {token}"}))
        sources = plan.sources()
        feeder = Feeder(svc.ports, list(sources), PER_SOURCE, plan.fs_hz, plan.block,
                        time.time_ns(), gains=plan.gains())
        stack.callback(feeder.close)
        feed = _FeedThread(feeder)
        feed.start()

        def stop_feed() -> None:
            feed.stop_event.set()
            feed.join(timeout=10.0)

        stack.callback(stop_feed)
        deadline = time.monotonic() + SETTLE_TIMEOUT_S
        while not _settled(svc, plan):
            feed.check()
            if time.monotonic() > deadline:
                raise RuntimeError(f"the service did not settle within {SETTLE_TIMEOUT_S:g} s "
                                   f"(spectra on every channel, abnormal machines alarming)\n"
                                   f"{svc.log_tail()}")
            time.sleep(POLL_S)
        _say(f"service settled; service CPU with no page for {closed_s:g} s")
        health0, t_health0 = _health(svc), time.monotonic()
        before = _cpu_window(svc.pid, closed_s, feed)
        _say(f"opening the plant view for {span_s:g} s")
        with browser_context(workdir / "chromium") as ctx:
            page = _measure_page(PageProbe(ctx, svc.base_url, token), plan, span_s, svc.pid,
                                 feed, screenshot)
        _say(f"page closed; service CPU with no page for {closed_s:g} s")
        after = _cpu_window(svc.pid, closed_s, feed)
        feed.check()
        health1 = _health(svc)
        report["service_health"] = {
            "drops": health1["drops"] - health0["drops"],
            "overrun_channels_at_end": health1["overrun_channels"],
            "frames_per_s": round((health1["frames"] - health0["frames"])
                                  / (time.monotonic() - t_health0), 1),
            "frames_per_s_fed": round(plan.channels * plan.frames_per_s, 1)}
        closed_cpu = before["cpu_s"] + after["cpu_s"]
        closed_wall = before["wall_s"] + after["wall_s"]
        opened = page.pop("service_cpu_open")
        report["page"] = page
        report["service_cpu"] = {
            "closed_share": round(closed_cpu / closed_wall, 4),
            "open_share": round(opened["cpu_s"] / opened["wall_s"], 4),
            "open_over_closed": round(cpu_ratio(opened["cpu_s"], opened["wall_s"], closed_cpu,
                                                closed_wall), 3),
            "closed_windows": [before, after], "open_window": opened}
        report["feeder_max_late_ms"] = round(feed.max_late_ms, 1)
    report["machine"]["loadavg_at_end"] = [round(v, 2) for v in os.getloadavg()]
    return report


def _fmt_list(xs: list[float], fmt: str) -> str:
    return " ".join(format(x, fmt) for x in xs) or "—"


def format_report(r: dict[str, Any]) -> str:
    """The report as a plain-text table."""
    s, p, c, h = r["setup"], r["page"], r["service_cpu"], r["service_health"]
    fs = p["first_screen"]
    heaps = " ".join(f"{h['mb']:.1f} MB@{h['after_s']:g}s" for h in p["heap_retained"]) or "—"
    rows = [
        ("first full render", f"{p['render_s']:.2f} s (all {s['machines']} machines, "
                              f"{fs['cards_in_dom']} cards in the DOM)"),
        ("abnormal machines in first screen",
         f"{len(fs['in_first_screen'])}/{len(fs['abnormal'])}"
         + (f" (missing: {', '.join(fs['not_in_first_screen'])})"
            if fs["not_in_first_screen"] else "")),
        (f"main-thread busy share per {p['window_s']:g} s",
         _fmt_list([100 * b for b in p["busy_share_per_window"]], ".1f") + " % of a core"),
        (f"frame rate per {p['window_s']:g} s", _fmt_list(p["fps_per_window"], ".1f") + " fps"),
        ("retained JS heap", heaps),
        ("received by the page", f"{p['bytes_per_s'] / 1024:.1f} KiB/s "
                                 f"(load {p['load_bytes'] / 1024:.0f} KiB, "
                                 f"{p['ws_messages']} WebSocket messages)"),
        ("service kept up", f"{h['frames_per_s']:.0f} of {h['frames_per_s_fed']:.0f} analysis "
                            f"frames/s, {h['drops']} drops, {h['overrun_channels_at_end']} "
                            f"channels in overrun at the end"),
        ("service CPU, page closed", f"{100 * c['closed_share']:.1f} % of a core"),
        ("service CPU, page open", f"{100 * c['open_share']:.1f} % of a core "
                                   f"(× {c['open_over_closed']:.2f})"),
    ]
    width = max(len(k) for k, _ in rows)
    m = r["machine"]
    head = (f"quaver dashboard benchmark — {s['channels']} channels on {s['machines']} machines "
            f"({len(s['danger'])} danger, {len(s['alert'])} alert), fs {s['fs_hz']:g} Hz, "
            f"{s['lines']} lines, {s['overlap']:.0%} overlap, {s['minutes']:g} min, viewport "
            f"{s['viewport']}\n{m['cpu']}, {m['cores']} cores, load {m['loadavg_at_start']} → "
            f"{m.get('loadavg_at_end')}")
    lines = [head, ""] + [f"{k:<{width}}  {v}" for k, v in rows]
    if p["page_errors"]:
        lines.append(f"page errors: {p['page_errors']}")
    return "\n".join(lines)


def main(plan: PlantPlan, minutes: float, json_path: str | None = None,
         as_json: bool = False, screenshot: str | None = None) -> int:
    """Run, print the table (``as_json``: the JSON report instead), write the JSON report to
    ``json_path`` if given (and the first screen to ``screenshot``); exit status."""
    report = run(plan, minutes, screenshot=screenshot)
    print(json.dumps(report, indent=2) if as_json else format_report(report), flush=True)
    if json_path:
        Path(json_path).write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
    return 0

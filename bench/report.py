"""The benchmark's report as a readable table, and ``quaver bench --service`` (``main``).

Knows the report's keys; no I/O beyond printing.
"""

from __future__ import annotations

import contextlib
import json
import signal
import threading
from collections.abc import Iterator, Sequence
from typing import Any

from .experiments import run
from .plan import BenchPlan
from .stats import percentile

__all__ = ["format_report", "main"]


def _f(v: Any, spec: str = "") -> str:
    return "—" if v is None else format(v, spec)


def format_report(r: dict[str, Any]) -> str:
    """The report as a readable table."""
    m, s = r["machine"], r["setup"]
    out = [f"quaver service load benchmark ({r['mode']} run)",
           f"machine: {m['cpu']}, {m['cores']} cores, Python {m['python']}, numpy {m['numpy']}; "
           f"load average at start {m['loadavg_at_start']}, at end {m.get('loadavg_at_end')}",
           "BLAS threads: " + (", ".join(f"{k}={v}" for k, v in m["blas_env"].items() if v)
                               or "library default (no OPENBLAS/OMP/MKL_NUM_THREADS set)"),
           f"set-up: fs {s['fs_hz']:g} Hz, Fmax {s['fmax_hz']:g} Hz, {s['lines']} lines "
           f"(N {s['n']}, hop {s['hop']}), {s['bands']} bands, {s['tones']} tones, "
           f"{s['alarm_rules_per_channel']} alarm rules per channel; {s['per_source']} channels "
           f"per TCP source, {s['block_samples']}-sample framed blocks, queue "
           f"{s['queue_blocks']} blocks; the feeder shares the machine's cores", ""]
    e = r["engine"]
    out.append(f"headroom {r['headroom_channels']} channels, "
               f"{_f(r['cpu_ms_per_frame'], '.4f')} ms of service CPU per analysis frame; "
               f"the engine alone at these settings (one core, {e['channels_timed']} channels "
               f"timed, {e['realtime_factor']:g}x real time): {e['capacity_channels']} "
               f"channels, {e['cpu_ms_per_frame']:.4f} ms per frame; "
               f"service/engine: headroom {_f(r['headroom_over_engine_capacity'], '.3f')}, "
               f"CPU per frame {_f(r['cpu_per_frame_over_engine'], '.2f')}x")
    out.append("")
    h = r["headroom"]
    out.append(f"1. ingest headroom: largest channel count kept up with: "
               f"{h['largest_passing_channels']} (steps {s['step_s']:g} s each at real time; "
               f"pass = 0 drops, 0 gaps, no overrun, exact frame counts within {s['drain_s']:g} s)")
    out.append(f"  {'ch':>4} {'pass':>4} {'drops':>5} {'gaps':>4} {'frames got/expected':>20} "
               f"{'drain s':>7} {'queue':>5} {'svc CPU':>7} {'ms/frame':>8} {'feeder':>6} "
               f"{'bench':>6} {'lat p50':>7} {'lat p99':>7} {'RSS MiB':>7}")
    for st in h["steps"]:
        lat = st["latency"]
        out.append(
            f"  {st['channels']:>4} {'yes' if st['passed'] else 'NO':>4} {st['drops']:>5} "
            f"{st['gaps']:>4} {str(st['frames_counted']) + '/' + str(st['frames_expected']):>20} "
            f"{_f(st['drain_s'], '.2f'):>7} {st['max_queued_blocks']:>5} "
            f"{100 * st['service_cpu_share']:>6.0f}% {_f(st['service_cpu_ms_per_frame'], '.3f'):>8}"
            f" {100 * st['feeder_cpu_share']:>5.1f}% {100 * st['bench_cpu_share']:>5.1f}% "
            f"{_f(lat['median_ms'], '.1f'):>7} {_f(lat['p99_ms'], '.1f'):>7} "
            f"{st['service_rss_mb']:>7.1f}")
    if "cluster" in r and r["cluster"]["address"] != "process":
        c = r["cluster"]
        out += ["", f"  on Ray ({c['address']}, {c['workers']} workers): per step, CPU shares "
                    "of one core — head (the service process), workers (the actors), all Ray "
                    "processes — and ms per analysis frame"]
        for st in h["steps"]:
            out.append(
                f"  {st['channels']:>4} head {100 * st['service_cpu_share']:>5.0f}% workers "
                f"{100 * st['workers_cpu_share']:>5.0f}% ray {100 * st['ray_cpu_share']:>5.0f}%"
                f"  head {_f(st['head_cpu_ms_per_frame'], '.3f')} ms/frame, workers "
                f"{_f(st['workers_cpu_ms_per_frame'], '.3f')} ms/frame")
    lat = h["latency"]
    out += ["", f"2. latency, sample sent → WebSocket spectrum message that includes it "
                f"(channel {lat['channel']}, at {lat['at_channels']} channels, first "
                f"{lat['warmup_excluded_s']:g} s left out): median {_f(lat['median_ms'], '.1f')} "
                f"ms, p99 {_f(lat['p99_ms'], '.1f')} ms, max {_f(lat['max_ms'], '.1f')} ms "
                f"over {lat['count']} messages" + (f" [client: {lat['client_error']}]"
                                                    if lat["client_error"] else "")]
    if "fanout" not in r:  # a cluster run: headroom and latency only
        return "\n".join(out)
    f = r["fanout"]
    rec = f["received_per_client"]
    want = [c["expected"] for c in f["per_client"] if c.get("expected") is not None]
    skips = f["kept_up_clients_with_skips"]
    uncounted = f.get("clients_with_uncounted_skips")
    if skips is None:
        skips = uncounted = "not checkable (the service dropped blocks)"
    a, b = f["without_clients"], f["with_clients"]
    out += ["", f"3. WebSocket fan-out: {f['clients']} clients x {f['channels_per_client']} "
                f"channels ({f['subscription']['kinds'][0]}, limit "
                f"{f['subscription']['max_rate_hz']:g}/s) on {f['channels_fed']} channels fed "
                f"at real time",
            f"  frames received per client: min {min(rec, default=0)}, median "
            f"{_f(percentile(rec, 50) if rec else None, '.0f')}, max {max(rec, default=0)} "
            f"(produced for its channels: {_f(max(want, default=None))}); "
            f"clients that kept up (missed = 0): {f['clients_kept_up']}/{f['clients']}, of "
            f"which with skipped frames: {skips}; "
            f"frames of channels not subscribed: {f['unsubscribed_frames']}",
            f"  clients whose frames by end index disagree with the service (skipped more than "
            f"their `missed`, an end never produced, or seq not rising): {uncounted}",
            f"  service CPU per analysis frame: {_f(a['service_cpu_ms_per_frame'], '.4f')} ms "
            f"without, {_f(b['service_cpu_ms_per_frame'], '.4f')} ms with the clients "
            f"(ratio {_f(f['cpu_per_frame_ratio'], '.2f')}); service CPU "
            f"{100 * a['service_cpu_share']:.0f} % → {100 * b['service_cpu_share']:.0f} %; "
            f"drops {a['drops']} / {b['drops']}; client process CPU "
            f"{_f(f['client_process_cpu_s'], '.1f')} s",
            f"  hub queues (/metrics, at the end of the step): {f['hub_queues']} — at most one "
            "frame per subscribed channel waits per client, so pending cannot grow"]
    mm = r["memory"]
    pts = ", ".join(f"{p['frames']} frames: {p['rss_mb']:.1f} MiB" for p in mm["points"])
    out += ["", f"4. memory (VmRSS) of a {mm['channels']}-channel service at {mm['lines']} lines "
                f"fed faster than real time: {pts or 'no figures'}; ratio last/first "
                f"{_f(mm['rss_ratio'], '.3f')}"
                + (" (short run: checkpoints 10^3 and 10^5 frames)" if r["mode"] == "short"
                   else "") + (" [TIMED OUT]" if mm["timed_out"] else "")]
    return "\n".join(out)


def main(*, short: bool = False, as_json: bool = False,
         steps: Sequence[int] | None = None, step_s: float | None = None,
         cluster: str | None = None, workers: int = 1) -> int:
    """``quaver bench --service``: run, print the table (or JSON); 0 when it ran."""
    plan = BenchPlan.for_mode(short)
    plan.cluster, plan.workers = cluster, workers
    if steps:
        plan.steps = tuple(sorted(set(int(c) for c in steps)))
    if step_s:
        plan.step_s = float(step_s)
    with _interrupts():
        report = run(plan)
    print(json.dumps(report, indent=1) if as_json else format_report(report))
    return 0


@contextlib.contextmanager
def _interrupts() -> Iterator[None]:
    """SIGINT and SIGTERM raise KeyboardInterrupt in the main thread while the bench runs, so
    the ``finally`` blocks stop the child processes (a shell may start us with SIGINT
    ignored; a service manager sends SIGTERM)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def stop(signum: int, frame: object) -> None:
        raise KeyboardInterrupt

    old = {sig: signal.signal(sig, stop) for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield
    finally:
        for sig, handler in old.items():
            signal.signal(sig, handler)

"""The four experiments of ``quaver bench --service`` and the run that does them in order:
ingest headroom with latency, WebSocket fan-out, memory.

Knows the config shape, the HTTP/WebSocket API and /proc (through the modules beside it);
nothing of the service's internals.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

from .clients import LatencyClient, read_line
from .engine import engine_capacity
from .feeder import Feeder
from .harness import HTTP_TIMEOUT_S, REPO, child_env, stop_process
from .plan import BenchPlan
from .probes import machine
from .stats import (
    end_index_differences,
    expected_frames,
    index_of_time,
    latencies_ns,
    latency_figures,
    newest_frame_ends,
    search_headroom,
)
from .target import BenchService, run_service

__all__ = ["fanout", "headroom_and_latency", "memory", "run"]

DRAIN_S = 2.0  # after the last send, every expected frame must be counted within this
DRAIN_WAIT_S = 30.0  # ... and is waited for this long, so that the counts are final
# A step is fed at real time only if no block was sent later than this after it was due: a
# service that reads too slowly holds the feeder back through TCP (its socket buffers fill,
# sendall waits) instead of dropping blocks, and that is no more real time than a drop.
FEED_LATE_MAX_S = 1.0
WARMUP_S = 1.0  # latency samples from the first second of a step are left out (FFT plans)
FANOUT_CHANNELS_PER_CLIENT = 8
FANOUT_SETTLE_S = 1.0  # after a step drained, its last frames reach the clients within this


def _say(text: str) -> None:
    print(f"bench --service: {text}", file=sys.stderr, flush=True)


def _source_ids(count: int) -> list[str]:
    return [f"feed-{i:02d}" for i in range(count)]


def _channel_ids(sid: str, per_source: int) -> list[str]:
    return [f"{sid}-c{j:02d}" for j in range(per_source)]


@dataclass
class Counters:
    frames: dict[str, int]
    gaps: dict[str, int]
    overrun: list[str]
    drops: dict[str, int]
    queued: dict[str, int]


def _counters(svc: BenchService) -> Counters:
    health = svc.get("health")
    chans = svc.get("channels")
    return Counters(
        frames={c["id"]: int(c["counters"]["frames"]) for c in chans},
        gaps={c["id"]: int(c["counters"]["gaps"]) for c in chans},
        overrun=[c["id"] for c in chans if c["status"] == "overrun"],
        drops={sid: int(s["counters"]["drops"]) for sid, s in health["sources"].items()},
        queued={sid: int(s.get("queued", 0)) for sid, s in health["sources"].items()},
    )


class _QueueWatch:
    """Samples the sources' queue depth once a second in a thread (bounded by ``stop``)."""

    def __init__(self, svc: BenchService) -> None:
        self.svc, self.max_queued = svc, 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="queue-watch", daemon=True)

    def __enter__(self) -> _QueueWatch:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join(HTTP_TIMEOUT_S + 1)

    def _run(self) -> None:
        while not self._stop.wait(1.0):
            with contextlib.suppress(OSError, ValueError, KeyError):
                health = self.svc.get("health")
                q = max((int(s.get("queued", 0)) for s in health["sources"].values()), default=0)
                self.max_queued = max(self.max_queued, q)


def _feed_step(plan: BenchPlan, svc: BenchService, feeder: Feeder, sources: list[str],
               seconds: float) -> dict[str, Any]:
    """Feed ``sources`` in real time for ``seconds``; check counters; CPU and RSS figures.

    A source fed before restarts with a one-block jump in its index (a gap the service
    counts once per channel), so frame assembly starts afresh at the step's first sample
    whatever an earlier step dropped: then each channel must gain exactly
    floor((n − N)/hop) + 1 frames for the n samples of the step."""
    chans = [c for sid in sources for c in _channel_ids(sid, plan.per_source)]
    restart_gaps = plan.per_source * sum(feeder.restart(sid) for sid in sources)
    before = _counters(svc)
    n0 = {sid: feeder.log.next_index[sid] for sid in sources}
    cluster = plan.cluster not in (None, "process")
    w0, r0 = (svc.workers_cpu_s(), svc.ray_cpu_s()) if cluster else (0.0, 0.0)
    cpu0, proc0, wall0 = svc.cpu_s(), os.times(), time.monotonic()
    with _QueueWatch(svc) as watch:
        fed = feeder.realtime(sources, seconds)
    wall = time.monotonic() - wall0
    cpu = svc.cpu_s() - cpu0
    workers_cpu = svc.workers_cpu_s() - w0 if cluster else 0.0
    ray_cpu = svc.ray_cpu_s() - r0 if cluster else 0.0
    proc1 = os.times()
    bench_cpu = (proc1.user - proc0.user) + (proc1.system - proc0.system)
    want = {c: expected_frames(feeder.log.next_index[sid] - n0[sid], plan.n, plan.hop)
            for sid in sources for c in _channel_ids(sid, plan.per_source)}
    t_last = time.monotonic()
    after = before
    drained = None
    # Wait for the backlog (bounded) so that the counts are final, and time it; once a block
    # was dropped the frames can never all arrive: then only the queues are waited for.
    while time.monotonic() - t_last < DRAIN_WAIT_S:
        after = _counters(svc)
        if all(after.frames[c] - before.frames[c] >= want[c] for c in chans):
            drained = time.monotonic() - t_last
            break
        if any(after.drops[s] > before.drops[s] for s in sources) and not any(
                after.queued[s] for s in sources):
            time.sleep(0.5)  # the block taken last is still being analysed
            after = _counters(svc)
            break
        time.sleep(0.05)
    frames_fed = sum(want.values())
    frames_got = sum(after.frames[c] - before.frames[c] for c in chans)
    drops = sum(after.drops[s] - before.drops[s] for s in sources)
    gaps = sum(after.gaps[c] - before.gaps[c] for c in chans) - restart_gaps
    overrun = [c for c in after.overrun if c in set(chans)]
    exact = all(after.frames[c] - before.frames[c] == want[c] for c in chans)
    passed = (drops == 0 and gaps == 0 and not overrun and exact and drained is not None
              and drained <= DRAIN_S and fed["max_late_ms"] <= 1e3 * FEED_LATE_MAX_S)
    return {
        "channels": len(chans), "sources": len(sources), "seconds": round(fed["wall_s"], 3),
        "blocks": fed["blocks"],
        "samples": {sid: [n0[sid], feeder.log.next_index[sid]] for sid in sources},
        "passed": passed, "drops": drops, "gaps": gaps, "restart_gaps": restart_gaps,
        "overrun_channels": len(overrun),
        "frames_expected": frames_fed, "frames_counted": frames_got, "frames_exact": exact,
        "drain_s": None if drained is None else round(drained, 3),
        "max_queued_blocks": watch.max_queued,
        "service_cpu_s": round(cpu, 3), "service_cpu_share": round(cpu / wall, 3),
        "service_cpu_ms_per_frame": round(1e3 * cpu / frames_got, 4) if frames_got else None,
        "cpu_ms_per_frame": round(1e3 * cpu / frames_got, 4) if frames_got else None,
        "feeder_cpu_share": round(fed["cpu_s"] / wall, 4),
        "bench_cpu_share": round(bench_cpu / wall, 4),
        "feeder_max_late_ms": round(fed["max_late_ms"], 2),
        "service_rss_mb": round(svc.rss() / 2**20, 1),
        # cluster mode: the Ray actors' CPU (ingest, checks, engine) and every process the
        # service started (actors, raylet, GCS …), beside the service (head) process's own
        **({"workers_cpu_share": round(workers_cpu / wall, 3),
            "ray_cpu_share": round(ray_cpu / wall, 3),
            "head_cpu_ms_per_frame": round(1e3 * cpu / frames_got, 4) if frames_got else None,
            "workers_cpu_ms_per_frame": (round(1e3 * workers_cpu / frames_got, 4)
                                         if frames_got else None)} if cluster else {}),
    }


def headroom_and_latency(plan: BenchPlan, svc: BenchService, feeder: Feeder) -> dict[str, Any]:
    """Phases 1 and 2: rising real-time steps with a latency client on the first channel."""
    lat_source = feeder.ids[0]
    lat_channel = _channel_ids(lat_source, plan.per_source)[0]
    steps: list[dict[str, Any]] = []
    with LatencyClient(svc.base_url, lat_channel) as client:

        def trial(channels: int) -> bool:
            count = max(1, math.ceil(channels / plan.per_source))
            sources = feeder.ids[:count]
            _say(f"headroom: {count * plan.per_source} channels on {count} sources, "
                 f"{plan.step_s:g} s real time")
            seen = len(client.arrivals)
            sends0 = len(feeder.log.sends[lat_source])
            res = _feed_step(plan, svc, feeder, sources, plan.step_s)
            time.sleep(0.3)  # the last message of the step
            sends = feeder.log.sends[lat_source]
            warm_end = sends[sends0][0] + int(WARMUP_S * plan.fs_hz) if len(sends) > sends0 else 0
            arrivals = [a for a in client.arrivals[seen:]
                        if index_of_time(a[1], feeder.base_ns, plan.fs_hz) > warm_end]
            lat = latencies_ns(arrivals, sends, base_ns=feeder.base_ns, fs=plan.fs_hz)
            res["latency"] = latency_figures(lat)
            res["latency_ns"] = lat
            res["p99_ms"] = res["latency"]["p99_ms"]
            steps.append(res)
            _say(f"  {'pass' if res['passed'] else 'FAIL'}: drops {res['drops']}, frames "
                 f"{res['frames_counted']}/{res['frames_expected']}, service CPU "
                 f"{100 * res['service_cpu_share']:.0f} %, latency p99 "
                 f"{res['latency']['p99_ms']} ms")
            return bool(res["passed"])

        best, tried = search_headroom(plan.steps, trial, step=plan.per_source, refine=plan.refine)
    steps.sort(key=lambda r: r["channels"])
    pick = next((s for s in steps if s["channels"] == best), steps[0])
    return {
        "largest_passing_channels": best,
        "tried": [{"channels": c, "passed": ok} for c, ok in tried],
        "steps": [{k: v for k, v in s.items() if k != "latency_ns"} for s in steps],
        "latency": {"channel": lat_channel, "at_channels": pick["channels"],
                    "warmup_excluded_s": WARMUP_S, **pick["latency"],
                    "values_ms": [round(v / 1e6, 3) for v in pick["latency_ns"]],
                    "client_error": client.error},
    }


def _stream_metrics(svc: BenchService) -> dict[str, float] | str:
    """The hub's stream queues from /metrics: clients, frames/events pending, missed."""
    try:
        text = svc.text("/metrics")
    except OSError as e:
        return f"could not read /metrics: {e}"
    out = {}
    for line in text.splitlines():
        for name in ("clients", "pending", "missed"):
            if line.startswith(f"quaver_stream_{name} "):
                out[name] = float(line.split()[1])
    return out


def fanout(plan: BenchPlan, svc: BenchService, feeder: Feeder, headroom: int) -> dict[str, Any]:
    """Phase 3: the same feed without, then with ``fanout_clients`` WebSocket clients, on
    ``fanout_channels`` or, if fewer passed the headroom search, ``headroom`` channels (so
    the comparison starts from a load the service sustains)."""
    count = max(1, min(plan.fanout_channels, headroom) // plan.per_source)
    sources = feeder.ids[:count]
    chans = [c for sid in sources for c in _channel_ids(sid, plan.per_source)]
    k = FANOUT_CHANNELS_PER_CLIENT
    sets = [[chans[(i * k + j) % len(chans)] for j in range(k)] for i in range(plan.fanout_clients)]
    _say(f"fan-out: {len(chans)} channels, without clients, {plan.fanout_s:g} s")
    alone = _feed_step(plan, svc, feeder, sources, plan.fanout_s)
    job = {"url": svc.base_url.replace("http://", "ws://") + "/api/v1/stream",
           "channel_sets": sets, "seconds": plan.fanout_s + DRAIN_WAIT_S + FANOUT_SETTLE_S + 5.0,
           "rate_hz": plan.fanout_rate_hz,
           "deflate": plan.fanout_deflate}
    _say(f"fan-out: {len(chans)} channels, {plan.fanout_clients} clients x {k} channels")
    worker = subprocess.Popen([sys.executable, "-m", "bench.clients", json.dumps(job)],
                              cwd=REPO, env=child_env(), stdin=subprocess.PIPE,
                              stdout=subprocess.PIPE, text=True,
                              start_new_session=True)
    try:
        connected = read_line(worker, 40.0).strip() == "connected"
        sent_before = {sid: len(feeder.log.sends[sid]) for sid in sources}
        with_clients = _feed_step(plan, svc, feeder, sources, plan.fanout_s)
        queues = _stream_metrics(svc)  # while the clients are still connected
        time.sleep(FANOUT_SETTLE_S)  # the step's last frames on their way to the clients
        try:
            out, _ = worker.communicate(input="stop\n", timeout=20.0)
        except subprocess.TimeoutExpired:
            out = ""
        result = json.loads(out.strip().splitlines()[-1]) if out.strip() else {"logs": []}
    finally:
        stop_process(worker)
    expected = {}
    for sid in sources:  # the newest frame end after each block of the step with the clients
        start = with_clients["samples"][sid][0]
        ends = [e - start for e, _ in feeder.log.sends[sid][sent_before[sid]:]]
        expected[sid] = [start + e for e in newest_frame_ends(ends, plan.n, plan.hop)]
    # Dropped blocks mean frames never made (and frame assembly restarting elsewhere): the
    # end-index check needs a run without drops or gaps; the service's `missed` is kept anyway.
    checkable = with_clients["drops"] == 0 and with_clients["gaps"] == 0
    clients = []
    for log in result["logs"]:
        missing = unexpected = 0
        seq_back = 0
        foreign = sum(len(v) for c, v in log["frames"].items() if c not in log["channels"])
        for cid, pairs in log["frames"].items():
            if cid not in log["channels"]:
                continue
            sid = cid.rsplit("-c", 1)[0]
            ends = [index_of_time(t, feeder.base_ns, plan.fs_hz) for t, _ in pairs]
            m, u = end_index_differences(ends, expected[sid])
            missing += m
            unexpected += u
            seqs = [s for _, s in pairs]
            seq_back += sum(1 for a, b in zip(seqs, seqs[1:], strict=False) if b <= a)
        want = sum(len(expected[c.rsplit("-c", 1)[0]]) for c in log["channels"])
        clients.append({"received": log["received"], "missed_reported": log["missed"],
                        "expected": want if checkable else None,
                        "skipped_by_end_index": missing + unexpected if checkable else None,
                        "missing_by_end_index": missing if checkable else None,
                        "unexpected_end_index": unexpected if checkable else None,
                        "seq_not_rising": seq_back,
                        "unsubscribed_frames": foreign,
                        "error": log["error"]})
    kept_up = [c for c in clients if c["missed_reported"] == 0 and not c["error"]]
    # The service counts in `missed` every frame a client did not get since it subscribed (the
    # clients subscribe before the step), so a frame missing between a client's first and
    # last one beyond its `missed`, or an end that was never produced, is the service's fault.
    uncounted = [c for c in clients if checkable and not c["error"] and (
        c["missing_by_end_index"] > c["missed_reported"] or c["unexpected_end_index"]
        or c["seq_not_rising"])]
    a, b = alone["service_cpu_ms_per_frame"], with_clients["service_cpu_ms_per_frame"]
    return {
        "clients": plan.fanout_clients, "channels_per_client": k, "channels_fed": len(chans),
        "subscription": {"kinds": ["spectrum"], "max_rate_hz": plan.fanout_rate_hz,
                         "permessage_deflate": "offered (as browsers do)" if plan.fanout_deflate
                         else "not offered"},
        "all_connected": connected,
        "received_per_client": [c["received"] for c in clients],
        "clients_kept_up": len(kept_up),
        "kept_up_clients_with_skips": (sum(1 for c in kept_up if c["skipped_by_end_index"])
                                       if checkable else None),
        "clients_with_uncounted_skips": len(uncounted) if checkable else None,
        "unsubscribed_frames": sum(c["unsubscribed_frames"] for c in clients),
        "per_client": clients,
        "client_process_cpu_s": result.get("cpu_s"),
        "hub_queues": queues,
        "without_clients": alone, "with_clients": with_clients,
        "cpu_per_frame_ratio": round(b / a, 3) if a and b else None,
    }


def memory(plan: BenchPlan, workdir: Path) -> dict[str, Any]:
    """Phase 4: VmRSS of a small service after each checkpoint of frames (all channels)."""
    analysis = {"fmax_hz": plan.fmax_hz, "lines": plan.mem_lines, "overlap": plan.overlap,
                "window": "hann", "averaging": "exponential", "averages": 8, "unit": "velocity"}
    sid = "mem"
    chans = [f"mem-c{j}" for j in range(plan.mem_channels)]
    src = {"id": sid, "kind": "tcp", "format": "framed", "sample_rate_hz": plan.fs_hz,
           "queue_blocks": 16, "channels": chans}
    n = int(round(2.56 * plan.mem_lines))
    hop = max(1, int(round(n * (1 - plan.overlap))))
    points: list[dict[str, Any]] = []
    with run_service(workdir, analysis, [src]) as svc:
        feeder = Feeder(svc.ports, [sid], plan.mem_channels, plan.fs_hz, plan.mem_block,
                        time.time_ns())
        t_start = time.monotonic()
        window = 3  # blocks in flight beyond what the service has analysed
        try:
            for target in plan.mem_checkpoints:
                while plan.mem_channels * expected_frames(
                        feeder.log.next_index[sid], n, hop) < target:
                    if time.monotonic() - t_start > plan.mem_timeout_s:
                        raise TimeoutError
                    done = int(svc.get(f"channels/{chans[0]}")["counters"]["samples"])
                    if feeder.log.next_index[sid] - done >= window * plan.mem_block:
                        time.sleep(0.005)
                        continue
                    feeder.send_block(sid)
                want = expected_frames(feeder.log.next_index[sid], n, hop)
                deadline = time.monotonic() + 60.0
                while time.monotonic() < deadline:
                    got = svc.channels()
                    if all(got[c]["counters"]["frames"] >= want for c in chans):
                        break
                    time.sleep(0.05)
                time.sleep(0.3)
                frames = sum(int(c["counters"]["frames"]) for c in svc.channels().values())
                points.append({"frames": frames, "rss_mb": round(svc.rss() / 2**20, 2),
                               "samples_per_channel": feeder.log.next_index[sid],
                               "elapsed_s": round(time.monotonic() - t_start, 1)})
                _say(f"memory: {frames} frames, RSS {points[-1]['rss_mb']} MiB")
            timed_out = False
        except TimeoutError:
            timed_out = True
        finally:
            feeder.close()
        health = svc.get("health")
        drops = int(health["sources"][sid]["counters"]["drops"])
    first, last = (points[0], points[-1]) if points else ({}, {})
    return {
        "channels": plan.mem_channels, "lines": plan.mem_lines, "n": n, "hop": hop,
        "block_samples": plan.mem_block, "checkpoints": list(plan.mem_checkpoints),
        "points": points, "drops": drops, "timed_out": timed_out,
        "rss_ratio": round(last["rss_mb"] / first["rss_mb"], 4) if len(points) > 1 else None,
        "within_10_percent": (abs(last["rss_mb"] / first["rss_mb"] - 1) <= 0.10
                              if len(points) > 1 else None),
    }


def run(plan: BenchPlan, workdir: Path | None = None) -> dict[str, Any]:
    """Every phase of ``plan``; a JSON-ready report. Child processes always end."""
    report: dict[str, Any] = {"machine": machine(), "mode": "short" if plan.short else "full"}
    cfg = {k: v for k, v in asdict(plan).items() if not k.startswith("mem") and k != "short"}
    report["setup"] = {**cfg, "n": plan.n, "hop": plan.hop, "block_samples": plan.block,
                       "bands": 16, "tones": 8, "alarm_rules_per_channel": 2,
                       "drain_s": DRAIN_S, "window": "hann", "averaging": "exponential 8"}
    _say("the engine alone at these settings (one core)")
    report["engine"] = engine_capacity(plan)
    with contextlib.ExitStack() as stack:
        if workdir is None:
            workdir = Path(stack.enter_context(tempfile.TemporaryDirectory(prefix="quaver-bench-")))
        n_src = math.ceil(plan.max_channels / plan.per_source)
        ids = _source_ids(n_src)
        analysis = {"fmax_hz": plan.fmax_hz, "lines": plan.lines, "overlap": plan.overlap,
                    "window": "hann", "averaging": "exponential", "averages": 8,
                    "unit": "velocity"}
        # idle_timeout_s: the feeder connects every source at the start and feeds only some
        # in each step; at the default (10 s) the service dropped the idle ones and the next
        # step that fed them failed with a broken pipe
        sources = [{"id": sid, "kind": "tcp", "format": "framed", "sample_rate_hz": plan.fs_hz,
                    "queue_blocks": plan.queue_blocks, "idle_timeout_s": 3600.0,
                    "channels": _channel_ids(sid, plan.per_source)} for sid in ids]
        extra: dict[str, Any] = {}
        if plan.cluster not in (None, "process"):
            extra["cluster"] = {"engine": "ray", "address": plan.cluster,
                                "workers": plan.workers}
            report["cluster"] = {"address": plan.cluster, "workers": plan.workers}
        elif plan.cluster == "process":  # the one-process baseline of a cluster comparison
            report["cluster"] = {"address": "process", "workers": 0}
        _say(f"starting a service with {n_src * plan.per_source} channels on {n_src} sources"
             + (f", on Ray ({plan.cluster}, {plan.workers} workers)" if extra else ""))
        with run_service(workdir / "load", analysis, sources, extra=extra,
                         start_timeout_s=120.0 if extra else 30.0) as svc:
            report["service_rss_idle_mb"] = round(svc.rss() / 2**20, 1)
            feeder = Feeder(svc.ports, ids, plan.per_source, plan.fs_hz, plan.block, time.time_ns())
            try:
                report["headroom"] = headroom_and_latency(plan, svc, feeder)
                if plan.cluster is None:  # cluster runs measure headroom only
                    report["fanout"] = fanout(plan, svc, feeder,
                                              report["headroom"]["largest_passing_channels"])
            finally:
                feeder.close()
            report["service_log_tail"] = svc.log_tail(5)
        if plan.cluster is None:
            report["memory"] = memory(plan, workdir / "memory")
    report["machine"]["loadavg_at_end"] = [round(v, 2) for v in os.getloadavg()]
    summarise(report)
    return report


def summarise(report: dict[str, Any]) -> None:
    """The headline figures at the top of the report: the service's headroom and CPU per
    analysis frame (at the headroom step) beside the engine's capacity and CPU per frame
    at the same settings, and their ratios (service ÷ engine)."""
    h, eng = report["headroom"], report["engine"]
    best = h["largest_passing_channels"]
    step = next((s for s in h["steps"] if s["channels"] == best), None)
    cpu = step["cpu_ms_per_frame"] if step else None
    report["headroom_channels"] = best
    report["engine_capacity_channels"] = eng["capacity_channels"]
    report["cpu_ms_per_frame"] = cpu
    report["engine_cpu_ms_per_frame"] = eng["cpu_ms_per_frame"]
    report["headroom_over_engine_capacity"] = (
        round(best / eng["capacity_channels"], 3) if eng["capacity_channels"] else None)
    report["cpu_per_frame_over_engine"] = (
        round(cpu / eng["cpu_ms_per_frame"], 2) if cpu and eng["cpu_ms_per_frame"] else None)
    report["p99_ms_by_channels"] = {s["channels"]: s["p99_ms"] for s in h["steps"]}

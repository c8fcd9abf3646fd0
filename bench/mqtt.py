"""``quaver bench --service --mqtt BROKER``: the service's CPU per analysed frame with MQTT
publishing off and on, at 256 channels (by default) fed at real time.

Knows the config shape, the HTTP API, /proc and the mosquitto command line (to start a broker
of its own with ``--mqtt auto``); nothing of the service's internals."""

from __future__ import annotations

import contextlib
import json
import math
import os
import shutil
import socket
import subprocess
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from .experiments import _channel_ids, _feed_step, _say, _source_ids
from .feeder import Feeder
from .harness import LOOPBACK, free_ports, stop_process
from .plan import BenchPlan
from .probes import machine, proc_cpu_s
from .report import _interrupts
from .target import run_service

__all__ = ["broker", "format_mqtt", "main_mqtt", "run_mqtt"]

WARMUP_S = 3.0  # fed before the measured span (FFT plans, first connections)
PUBLISH = ["overall", "bands", "tones", "status", "alarms"]  # the [mqtt] defaults


@contextlib.contextmanager
def broker(address: str, workdir: Path) -> Iterator[tuple[str, int | None]]:
    """``address`` (host:port) as it is, or for ``auto`` a Mosquitto of our own on a free
    loopback port (no persistence), stopped on leaving; yields (host:port, broker pid)."""
    if address != "auto":
        yield address, None
        return
    exe = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
    if not Path(exe).exists():
        raise RuntimeError("--mqtt auto needs mosquitto (apt-get install mosquitto)")
    port = free_ports(1)[0]
    workdir.mkdir(parents=True, exist_ok=True)
    conf = workdir / "mosquitto.conf"
    conf.write_text(f"listener {port} {LOOPBACK}\nallow_anonymous true\npersistence false\n")
    with open(workdir / "mosquitto.log", "wb") as log:
        proc = subprocess.Popen([exe, "-c", str(conf)], stdout=log, stderr=subprocess.STDOUT,
                                start_new_session=True)
    try:
        for _ in range(200):  # 10 s
            with contextlib.suppress(OSError), socket.create_connection((LOOPBACK, port), 0.5):
                break
            if proc.poll() is not None:
                raise RuntimeError(f"mosquitto exited ({proc.returncode})")
            time.sleep(0.05)
        yield f"{LOOPBACK}:{port}", proc.pid
    finally:
        stop_process(proc)


def run_mqtt(address: str, channels: int = 256, seconds: float = 15.0,
             workdir: Path | None = None) -> dict[str, Any]:
    """The same real-time feed to a service without, then with ``[mqtt]`` (default
    ``publish``, QoS 0) publishing to ``address``; service CPU per analysed frame each time,
    the publisher's health and the broker's CPU (when it is ours)."""
    plan = BenchPlan(step_s=seconds)
    n_src = max(1, math.ceil(channels / plan.per_source))
    ids = _source_ids(n_src)
    analysis = {"fmax_hz": plan.fmax_hz, "lines": plan.lines, "overlap": plan.overlap,
                "window": "hann", "averaging": "exponential", "averages": 8, "unit": "velocity"}
    sources = [{"id": sid, "kind": "tcp", "format": "framed", "sample_rate_hz": plan.fs_hz,
                "queue_blocks": plan.queue_blocks,
                "channels": _channel_ids(sid, plan.per_source)} for sid in ids]
    report: dict[str, Any] = {"machine": machine(), "channels": n_src * plan.per_source,
                              "seconds": seconds, "publish": PUBLISH,
                              "setup": {"fs_hz": plan.fs_hz, "lines": plan.lines,
                                        "n": plan.n, "hop": plan.hop, "bands": 16, "tones": 8}}
    with contextlib.ExitStack() as stack:
        if workdir is None:
            workdir = Path(stack.enter_context(tempfile.TemporaryDirectory(prefix="quaver-mq-")))
        addr, broker_pid = stack.enter_context(broker(address, workdir / "broker"))
        report["broker"] = addr if address != "auto" else f"own mosquitto at {addr}"
        for mode in ("off", "on"):
            extra = {} if mode == "off" else {"mqtt": {
                "enabled": True, "broker": addr, "client_id": f"quaver-bench-{os.getpid()}",
                "publish": PUBLISH, "backlog_max": 100000}}
            _say(f"mqtt {mode}: {n_src * plan.per_source} channels, {seconds:g} s real time")
            with run_service(workdir / mode, analysis, sources, extra=extra) as svc:
                feeder = Feeder(svc.ports, ids, plan.per_source, plan.fs_hz, plan.block,
                                time.time_ns())
                try:
                    _feed_step(plan, svc, feeder, ids, WARMUP_S)
                    b0 = proc_cpu_s(broker_pid) if broker_pid else None
                    res = _feed_step(plan, svc, feeder, ids, seconds)
                    b1 = proc_cpu_s(broker_pid) if broker_pid else None
                finally:
                    feeder.close()
                h = svc.get("health")
                res["mqtt"] = h.get("mqtt")
                res["broker_cpu_s"] = None if b0 is None or b1 is None else round(b1 - b0, 3)
                report[mode] = res
    a = report["off"]["service_cpu_ms_per_frame"]
    b = report["on"]["service_cpu_ms_per_frame"]
    report["cpu_per_frame_ratio"] = round(b / a, 3) if a and b else None
    report["machine"]["loadavg_at_end"] = [round(v, 2) for v in os.getloadavg()]
    return report


def format_mqtt(r: dict[str, Any]) -> str:
    m, s = r["machine"], r["setup"]
    out = [f"quaver MQTT publishing cost: {r['channels']} channels fed at real time for "
           f"{r['seconds']:g} s, broker {r['broker']}",
           f"machine: {m['cpu']}, {m['cores']} cores; load average at start "
           f"{m['loadavg_at_start']}, at end {m.get('loadavg_at_end')}",
           f"set-up: fs {s['fs_hz']:g} Hz, {s['lines']} lines (N {s['n']}, hop {s['hop']}), "
           f"{s['bands']} bands, {s['tones']} tones; publish {', '.join(r['publish'])}, QoS 0",
           f"  {'mqtt':>4} {'frames':>8} {'drops':>5} {'svc CPU':>7} {'ms/frame':>8} "
           f"{'published':>9} {'dropped':>7} {'skipped':>7} {'broker CPU s':>12}"]
    for mode in ("off", "on"):
        st = r[mode]
        mq = st.get("mqtt") or {}
        out.append(f"  {mode:>4} {st['frames_counted']:>8} {st['drops']:>5} "
                   f"{100 * st['service_cpu_share']:>6.0f}% "
                   f"{st['service_cpu_ms_per_frame'] or 0:>8.4f} "
                   f"{mq.get('published', '—')!s:>9} {mq.get('dropped', '—')!s:>7} "
                   f"{mq.get('skipped', '—')!s:>7} {st['broker_cpu_s'] or '—'!s:>12}")
    out.append(f"service CPU per analysed frame, on/off: {r['cpu_per_frame_ratio']}")
    return "\n".join(out)


def main_mqtt(address: str, channels: int | None, seconds: float | None,
              as_json: bool) -> int:
    """``quaver bench --service --mqtt BROKER``: run, print the table (or JSON)."""
    with _interrupts():
        report = run_mqtt(address, channels or 256, seconds or 15.0)
    print(json.dumps(report, indent=1) if as_json else format_mqtt(report))
    return 0

"""``quaver bench --service --opcua``: the service's CPU per frame with the [opcua] server
off, then on with a client subscribed to every channel's overall and bands, at real time.

Knows the config file shape, the HTTP API and (in the client thread) asyncua; runs the
service through ``bench.target``, feeds it with ``bench.feeder`` like the load benchmark."""

from __future__ import annotations

import asyncio
import contextlib
import json
import math
import os
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

from .experiments import _channel_ids, _feed_step, _say, _source_ids
from .feeder import Feeder
from .harness import free_ports
from .plan import BenchPlan
from .probes import machine
from .target import run_service

__all__ = ["OpcuaClient", "main", "run"]

WARMUP_S = 3.0
READY_S = 180.0  # the longest wait for the address space to be built
NS_URI = "urn:quaver:bench"


class OpcuaClient:
    """A thread with one asyncua client subscribed (publishing every 100 ms) to the overall
    and every band of ``channels``; counts the data changes it receives."""

    def __init__(self, port: int, channels: list[str], bands: list[str]) -> None:
        self.url = f"opc.tcp://127.0.0.1:{port}/quaver"
        self.paths = [f"-/{c}/default/{leaf}" for c in channels
                      for leaf in ("overall", *(f"bands/{b}" for b in bands))]
        self.changes = 0
        self.error = ""
        self._stop = threading.Event()
        self._ready = threading.Event()
        self._thread = threading.Thread(target=self._run, name="opcua-client", daemon=True)

    def __enter__(self) -> OpcuaClient:
        self._thread.start()
        if not self._ready.wait(60.0):
            self.error = self.error or "the OPC UA client did not subscribe within 60 s"
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join(15.0)

    def _run(self) -> None:
        try:
            asyncio.run(self._main())
        except Exception as e:  # reported, not raised: the bench goes on
            self.error = f"{type(e).__name__}: {e}"
        finally:
            self._ready.set()

    async def _main(self) -> None:
        from asyncua import Client, ua

        client = self

        class Handler:
            def datachange_notification(self, node: Any, val: Any, data: Any) -> None:
                client.changes += 1

        async with Client(self.url, timeout=30) as c:
            idx = await c.get_namespace_index(NS_URI)
            sub = await c.create_subscription(100, Handler())
            nodes = [c.get_node(ua.NodeId(p, idx)) for p in self.paths]
            for k in range(0, len(nodes), 500):
                await sub.subscribe_data_change(nodes[k:k + 500], queuesize=1)
            self._ready.set()
            while not self._stop.is_set():
                await asyncio.sleep(0.1)
            await sub.delete()


MODES = ("off", "on", "on-no-spectra")
BOTH_MODES = ("off", "mqtt", "on", "both")  # with an MQTT broker: each alone, then both


def _extra(mode: str, port: int, share: float | None, mqtt: str | None) -> dict[str, Any]:
    """The config sections of ``mode``: ``on``/``on-no-spectra`` the OPC UA server (with or
    without spectra), ``mqtt`` the MQTT publisher (its default ``publish``, QoS 0), ``both``
    the two together."""
    extra: dict[str, Any] = {}
    if mode in ("on", "on-no-spectra", "both"):
        extra["opcua"] = {"enabled": True, "endpoint": f"opc.tcp://127.0.0.1:{port}/quaver",
                          "site": "bench", "spectra": mode != "on-no-spectra",
                          **({} if share is None else {"max_loop_share": share})}
    if mode in ("mqtt", "both"):
        if mqtt is None:
            raise ValueError(f"mode {mode!r} needs an MQTT broker")
        extra["mqtt"] = {"enabled": True, "broker": mqtt,
                         "client_id": f"quaver-bench-{os.getpid()}", "backlog_max": 100000}
    return extra


def run(channels: int = 256, seconds: float = 20.0, workdir: Path | None = None,
        modes: tuple[str, ...] = MODES, share: float | None = None,
        mqtt: str | None = None) -> dict[str, Any]:
    """The runs of ``modes`` (``share``: the server's ``max_loop_share``, default its
    default; ``mqtt``: the broker of the ``mqtt`` and ``both`` modes); a JSON-ready
    report."""
    plan = BenchPlan()
    n_src = math.ceil(channels / plan.per_source)
    ids = _source_ids(n_src)
    analysis = {"fmax_hz": plan.fmax_hz, "lines": plan.lines, "overlap": plan.overlap,
                "window": "hann", "averaging": "exponential", "averages": 8,
                "unit": "velocity"}
    sources = [{"id": sid, "kind": "tcp", "format": "framed", "sample_rate_hz": plan.fs_hz,
                "queue_blocks": plan.queue_blocks,
                "channels": _channel_ids(sid, plan.per_source)} for sid in ids]
    bands = [f"b{i:02d}" for i in range(15)] + ["overall"]  # bench.target's bands
    report: dict[str, Any] = {"machine": machine(), "channels": n_src * plan.per_source,
                              "seconds": seconds, "runs": {}}
    with contextlib.ExitStack() as stack:
        if workdir is None:
            workdir = Path(stack.enter_context(tempfile.TemporaryDirectory(
                prefix="quaver-bench-opcua-")))
        for mode in modes:
            (port,) = free_ports(1)
            extra = _extra(mode, port, share, mqtt)
            serves = "opcua" in extra
            _say(f"opcua {mode}: a service with {n_src * plan.per_source} channels")
            with run_service(workdir / mode, analysis, sources, extra=extra) as svc:
                t0 = time.monotonic()
                while serves and time.monotonic() - t0 < READY_S:
                    if (svc.get("health").get("opcua") or {}).get("state") == "running":
                        break  # the plant's nodes are all there
                    time.sleep(0.5)
                report.setdefault("address_space_s", {})[mode] = round(time.monotonic() - t0, 1)
                feeder = Feeder(svc.ports, ids, plan.per_source, plan.fs_hz, plan.block,
                                time.time_ns())
                try:
                    with contextlib.ExitStack() as inner:
                        client = None
                        if serves:
                            chans = [c for sid in ids for c in _channel_ids(sid, plan.per_source)]
                            client = inner.enter_context(OpcuaClient(port, chans, bands))
                        feeder.realtime(ids, WARMUP_S)
                        changes0 = client.changes if client else 0
                        h0 = svc.get("health")
                        o0 = h0.get("opcua") or {}
                        res = _feed_step(plan, svc, feeder, ids, seconds)
                        h1 = svc.get("health")
                        o1 = h1.get("opcua") or {}
                        res["hub_frames_published"] = (h1.get("frames_published", 0)
                                                       - h0.get("frames_published", 0))
                        if o1:  # the worker process: its own CPU and what it wrote
                            got, n = res["frames_counted"], res["channels"]
                            cpu = o1["worker_cpu_s"] - o0["worker_cpu_s"]
                            written = o1["frames"] - o0["frames"]
                            res["worker_cpu_s"] = round(cpu, 3)
                            res["worker_cpu_share"] = round(cpu / res["seconds"], 3)
                            res["worker_cpu_ms_per_frame"] = (round(1e3 * cpu / got, 4)
                                                              if got else None)
                            res["handoff_cpu_s"] = round(
                                o1["handoff_cpu_s"] - o0["handoff_cpu_s"], 3)
                            res["handoff_rest_s"] = round(
                                o1["handoff_rest_s"] - o0["handoff_rest_s"], 3)
                            res["opcua_frames_handed"] = o1["handed"] - o0["handed"]
                            res["opcua_frames_written"] = written
                            res["opcua_dropped"] = o1["dropped"] - o0["dropped"]
                            # values per channel per second reaching OPC UA vs analysed
                            res["opcua_rate_hz_per_channel"] = round(
                                written / n / res["seconds"], 2)
                            # (the hub's count of the window: the channels' frame counters
                            # also count the frames analysed while the bench drains)
                            res["analysis_rate_hz_per_channel"] = round(
                                res["hub_frames_published"] / n / res["seconds"], 2)
                        if client is not None:
                            res["client_changes"] = client.changes - changes0
                            res["client_error"] = client.error
                        health = svc.get("health")
                        res["opcua"] = health.get("opcua")
                        res["mqtt"] = health.get("mqtt")
                finally:
                    feeder.close()
            report["runs"][mode] = res
            _say(f"  service CPU {res['service_cpu_ms_per_frame']} ms/frame, "
                 f"{100 * res['service_cpu_share']:.0f} % of a core, drops {res['drops']}")
    off = report["runs"].get("off", {}).get("service_cpu_ms_per_frame")
    for mode in ("on", "on-no-spectra", "mqtt", "both"):
        on = report["runs"].get(mode, {}).get("service_cpu_ms_per_frame")
        report[f"ratio_{mode}"] = round(on / off, 3) if off and on else None
    return report


def format_report(r: dict[str, Any]) -> str:
    lines = [f"quaver bench --service --opcua{' --mqtt' if 'both' in r['runs'] else ''}: "
             f"{r['channels']} channels, {r['seconds']:g} s "
             f"real time per run ({r['machine'].get('cpu', '?')})", "",
             "| [opcua] | frames analysed / expected | service CPU ms/frame (share) | "
             "worker CPU ms/frame (share) | OPC UA frames written | dropped (newest kept) | "
             "per channel: published / written Hz | client data changes | MQTT published |",
             "|---|---|---|---|---|---|---|---|---|"]
    for mode, res in r["runs"].items():
        wcpu = (f"{res['worker_cpu_ms_per_frame']} ({100 * res['worker_cpu_share']:.0f} %)"
                if "worker_cpu_s" in res else "—")
        lines.append(f"| {mode} | {res['frames_counted']} / {res['frames_expected']} | "
                     f"{res['service_cpu_ms_per_frame']} "
                     f"({100 * res['service_cpu_share']:.0f} %) | {wcpu} | "
                     f"{res.get('opcua_frames_written', '—')} | "
                     f"{res.get('opcua_dropped', '—')} | "
                     f"{res.get('analysis_rate_hz_per_channel', '—')} / "
                     f"{res.get('opcua_rate_hz_per_channel', '—')} | "
                     f"{res.get('client_changes', '—')} | "
                     f"{(res.get('mqtt') or {}).get('published', '—')} |")
    lines.append("")
    lines.append(f"load average at the end: {os.getloadavg()[0]:.2f}")
    if "both" in r["runs"]:
        lines.append(f"service CPU per frame ÷ off: MQTT {r.get('ratio_mqtt')}, OPC UA "
                     f"{r.get('ratio_on')}, both {r.get('ratio_both')}")
    else:
        lines.append(f"on/off: {r.get('ratio_on')} (spectra on), "
                     f"{r.get('ratio_on-no-spectra')} (spectra off)")
    return "\n".join(lines)


def main(channels: int = 256, seconds: float = 20.0, as_json: bool = False,
         mqtt: str | None = None) -> int:
    """``quaver bench --service --opcua [--mqtt BROKER]``: with a broker ('auto': a
    Mosquitto of our own) the runs are off, MQTT alone, OPC UA alone and both."""
    from .mqtt import broker
    from .report import _interrupts

    with _interrupts(), contextlib.ExitStack() as stack:
        if mqtt is None:
            report = run(channels, seconds)
        else:
            work = Path(stack.enter_context(tempfile.TemporaryDirectory(prefix="quaver-b2-")))
            addr, _ = stack.enter_context(broker(mqtt, work / "broker"))
            report = run(channels, seconds, work, modes=BOTH_MODES, mqtt=addr)
    print(json.dumps(report, indent=1) if as_json else format_report(report))
    return 0

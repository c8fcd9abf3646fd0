"""GET /metrics: the Prometheus text exposition of band values, states and counters.

Reads the hub (and the alarm engine and store, when the service has them) at scrape time."""

from __future__ import annotations

import gc
import math
import time
from collections.abc import Iterator
from typing import Any

from fastapi import APIRouter, Response
from prometheus_client import CollectorRegistry, GCCollector, ProcessCollector, generate_latest
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.registry import Collector

from ..context import ServiceContext
from ..hub import Hub
from ..quality import CHANNEL_STATUSES, SUSPENDING
from ..types import COUNTER_NAMES
from .deps import HubDep, MaybeServiceDep

router = APIRouter(tags=["metrics"])

SOURCE_COUNTERS = COUNTER_NAMES


class _ServiceCollector(Collector):
    def __init__(self, hub: Hub, service: ServiceContext | None) -> None:
        self.hub, self.service = hub, service

    def collect(self) -> Iterator[Metric]:
        hub = self.hub
        overall = GaugeMetricFamily(
            "quaver_overall",
            "Overall RMS (band 'overall', else lowcut…Fmax), display unit",
            labels=["channel", "profile", "unit"],
        )
        band = GaugeMetricFamily(
            "quaver_band",
            "Band RMS value, display unit",
            labels=["channel", "profile", "band", "unit"],
        )
        tone = GaugeMetricFamily(
            "quaver_tone",
            "Tracked tone amplitude, display unit",
            labels=["channel", "profile", "tone", "unit"],
        )
        age = GaugeMetricFamily(
            "quaver_spectrum_timestamp_seconds",
            "Time of the latest spectrum, s since the Unix epoch",
            labels=["channel", "profile"],
        )
        order_rpm = GaugeMetricFamily(
            "quaver_order_average_rpm",
            "Order profiles: the speed the current average started at, r/min (its frames "
            "stay within the profile's speed_band_pct of it)",
            labels=["channel", "profile"],
        )
        for (cid, prof), f in hub.by_profile.items():
            age.add_metric([cid, prof], f.t_ns / 1e9)
            if hub.channels[cid].status in SUSPENDING:
                # not live (no signal, failed, sensor fault): its last values are not current,
                # so they are not scraped as if they were; quaver_channel_status says why
                continue
            if math.isfinite(f.overall):
                overall.add_metric([cid, prof, f.unit], f.overall)
            if f.x_unit == "order" and math.isfinite(f.average_rpm):
                order_rpm.add_metric([cid, prof], f.average_rpm)
            for b in f.bands:
                if math.isfinite(b.value):
                    band.add_metric([cid, prof, b.name, f.unit], b.value)
            for t in f.tones:
                if math.isfinite(t.value):
                    tone.add_metric([cid, prof, t.name, f.unit], t.value)
        yield from (overall, band, tone, age, order_rpm)

        status = GaugeMetricFamily(
            "quaver_channel_status",
            "1 for the channel's current status",
            labels=["channel", "status"],
        )
        faults = CounterMetricFamily(
            "quaver_channel_sensor_faults", "Transitions into sensor fault", labels=["channel"]
        )
        gaps = CounterMetricFamily(
            "quaver_channel_gaps", "Gaps seen on the channel", labels=["channel"]
        )
        changes = CounterMetricFamily(
            "quaver_channel_status_changes",
            "Changes of the channel's data-quality state (each is an event)",
            labels=["channel"],
        )
        stale = GaugeMetricFamily(
            "quaver_channel_frame_age_seconds",
            "Time since the channel's latest analysed spectrum arrived (absent before the "
            "first); no-signal beyond the channel's stale_after_s",
            labels=["channel"],
        )
        now = time.monotonic()
        for cid, st in hub.channels.items():
            for s in CHANNEL_STATUSES:
                status.add_metric([cid, s], 1.0 if st.status == s else 0.0)
            faults.add_metric([cid], st.sensor_faults)
            gaps.add_metric([cid], st.gaps)
            changes.add_metric([cid], st.status_changes)
            if st.last_frame_mono is not None:
                stale.add_metric([cid], max(0.0, now - st.last_frame_mono))
        yield from (status, faults, gaps, changes, stale)
        # running speed, with its own status beside it (a number never leaves without it)
        speed = GaugeMetricFamily(
            "quaver_speed_rpm", "Running speed, r/min (absent while unknown)",
            labels=["channel", "source"],
        )
        speed_status = GaugeMetricFamily(
            "quaver_speed_status", "1 for the running speed's current status",
            labels=["channel", "status"],
        )
        for cid, st in hub.channels.items():
            sp = st.speed_dict()
            if sp is None:
                continue
            if sp["rpm"] is not None:
                speed.add_metric([cid, str(sp["source"])], float(sp["rpm"]))  # type: ignore[arg-type]
            for s in ("ok", "no-signal", "sensor-fault"):
                speed_status.add_metric([cid, s], 1.0 if sp["status"] == s else 0.0)
        yield from (speed, speed_status)
        failures = CounterMetricFamily(
            "quaver_source_pipeline_failures",
            "Times the source's pipeline raised (it is restarted with back-off)",
            labels=["source"],
        )
        failed = GaugeMetricFamily(
            "quaver_source_pipeline_failed", "1 while the source's pipeline is failed",
            labels=["source"],
        )
        for sid, p in hub.pipelines.items():
            failures.add_metric([sid], p.failures)
            failed.add_metric([sid], 1.0 if p.failed else 0.0)
        yield from (failures, failed)

        fams = {
            k: CounterMetricFamily(f"quaver_source_{k}", f"Source counter: {k}", labels=["source"])
            for k in SOURCE_COUNTERS
        }
        # each kind's own counters (refused, idle_drops, refused_peers, wrong_format, ...)
        extra = CounterMetricFamily(
            "quaver_source_extra", "Source counter of its kind (see /api/v1/health counters)",
            labels=["source", "counter"],
        )
        for sid, src in hub.sources.items():
            c = src.counters
            for k in SOURCE_COUNTERS:
                fams[k].add_metric([sid], float(getattr(c, k)))
            for k, n in sorted(c.extra.items()):
                extra.add_metric([sid, k], float(n))
        yield from fams.values()
        yield extra

        lat = GaugeMetricFamily(
            "quaver_frame_latency_seconds",
            "Processing time of the latest block that produced a frame",
            labels=["channel"],
        )
        for cid, latency_s in hub.latency_s.items():
            lat.add_metric([cid], latency_s)
        yield lat
        subs = list(hub.subscribers)
        clients = GaugeMetricFamily("quaver_stream_clients", "WebSocket stream clients")
        clients.add_metric([], float(len(subs)))
        pending = GaugeMetricFamily(
            "quaver_stream_pending", "Frames and events waiting in the stream clients' queues"
        )
        pending.add_metric([], float(sum(s.pending() for s in subs)))
        missed = GaugeMetricFamily(
            "quaver_stream_missed",
            "Frames and events the connected clients skipped (slow or rate-limited)",
        )
        missed.add_metric([], float(sum(s.missed for s in subs)))
        yield from (clients, pending, missed)
        pub = CounterMetricFamily("quaver_frames_published", "Spectral frames published")
        pub.add_metric([], hub.frames_published)
        yield pub
        frozen = GaugeMetricFamily(
            "quaver_gc_frozen_objects",
            "Objects kept out of Python's full collections (the start-up heap, frozen once "
            "serving)",
        )
        frozen.add_metric([], float(gc.get_freeze_count()))
        yield frozen

        if self.service is None:  # an app over a bare hub: no alarms, no store
            return
        alarms, store = self.service.alarms, self.service.store
        level = GaugeMetricFamily(
            "quaver_alarm_level",
            "Alarm level per rule: 0 normal, 1 alert, 2 danger",
            labels=["channel", "rule"],
        )
        latched = GaugeMetricFamily(
            "quaver_alarm_latched",
            "1 while latched, unacknowledged",
            labels=["channel", "rule"],
        )
        for v in alarms.views():
            d = v.as_dict()
            level.add_metric([d["channel"], d["rule"]], v.state.rank)
            latched.add_metric(
                [d["channel"], d["rule"]],
                1.0 if d.get("latched") and not d.get("acked") else 0.0,
            )
        yield from (level, latched)
        h = store.health()
        ok = GaugeMetricFamily(
            "quaver_store_ok", "1 while the store writes; 0 when it cannot (see /health)"
        )
        ok.add_metric([], 1.0 if h["ok"] else 0.0)
        yield ok
        if self.service.notifier is not None:
            yield from _notify_metrics(self.service.notifier.health())
        if self.service.mqtt is not None:
            yield from _mqtt_metrics(self.service.mqtt.health())
        if self.service.opcua is not None:
            yield from _opcua_metrics(self.service.opcua.health())
        for key, what in (("write_errors", "Failed store writes"),
                          ("events_written", "Alarm events committed"),
                          ("trend_buckets_written", "Trend buckets committed"),
                          ("history_written", "Stored spectra (spectral history) committed")):
            m = CounterMetricFamily(f"quaver_store_{key}", what)
            m.add_metric([], float(h[key]))
            yield m


def _notify_metrics(h: dict[str, Any]) -> Iterator[Metric]:
    """Per [[notify]] entry: messages sent and failed attempts since start, outbox rows
    pending, given up and rate-limited (as stored), and 1 while it is failing."""
    fams: dict[str, CounterMetricFamily | GaugeMetricFamily] = {
        "sent": CounterMetricFamily("quaver_notify_sent", "Notifications sent since start",
                                    labels=["entry"]),
        "failed_attempts": CounterMetricFamily(
            "quaver_notify_failed", "Failed send attempts since start (each retry counts)",
            labels=["entry"]),
        "pending": GaugeMetricFamily("quaver_notify_pending",
                                     "Outbox rows waiting to be sent", labels=["entry"]),
        "failed": GaugeMetricFamily("quaver_notify_given_up",
                                    "Outbox rows given up (kept until pruned)", labels=["entry"]),
        "limited": GaugeMetricFamily("quaver_notify_limited",
                                     "Outbox rows held back by the rate limit (until pruned)",
                                     labels=["entry"]),
        "failing": GaugeMetricFamily("quaver_notify_failing",
                                     "1 while the entry's last attempt failed", labels=["entry"]),
    }
    for name, e in h["entries"].items():
        fams["sent"].add_metric([name], float(e["sent_since_start"]))
        fams["failed_attempts"].add_metric([name], float(e["failed_attempts"]))
        for k in ("pending", "failed", "limited"):
            fams[k].add_metric([name], float(e[k]))
        fams["failing"].add_metric([name], 1.0 if e["failing"] else 0.0)
    yield from fams.values()


def _mqtt_metrics(h: dict[str, Any]) -> Iterator[Metric]:
    """The MQTT publisher: link state, messages sent, held, dropped, lost; errors."""
    gauges = {"connected": "1 while connected to the MQTT broker",
              "backlog": "Messages held while the broker cannot take them",
              "in_flight": "Messages the MQTT client holds, not yet sent (QoS 0) or acknowledged"}
    counters = {"published": "MQTT messages sent (QoS 1: acknowledged) since start",
                "dropped": "MQTT messages dropped, oldest first, from a full backlog",
                "lost": "QoS 0 MQTT messages lost with a failing link",
                "skipped": "Frames the MQTT publisher skipped for a newer one (it fell behind)",
                "errors": "MQTT connection and publish errors since start",
                "connects": "Connections made to the MQTT broker since start",
                "speed_written": "Running speeds taken from MQTT speed/set messages",
                "speed_refused": "MQTT speed/set messages refused (bad payload, stale time, "
                                 "channel not manual)"}
    for k, what in gauges.items():
        g = GaugeMetricFamily(f"quaver_mqtt_{k}", what)
        g.add_metric([], float(h[k]))
        yield g
    for k, what in counters.items():
        c = CounterMetricFamily(f"quaver_mqtt_{k}", what)
        c.add_metric([], float(h[k]))
        yield c
def _opcua_metrics(h: dict[str, Any]) -> Iterator[Metric]:
    """The [opcua] server: 1 while running, sessions, and its counters since start."""
    up = GaugeMetricFamily("quaver_opcua_up", "1 while the OPC UA server runs")
    up.add_metric([], 1.0 if h["ok"] else 0.0)
    sessions = GaugeMetricFamily("quaver_opcua_sessions", "OPC UA sessions open")
    sessions.add_metric([], float(h["sessions"]))
    yield from (up, sessions)
    for key, what in (("frames", "Frames written into the address space"),
                      ("updates", "Node values written (values, states, alarms)"),
                      ("dropped", "Frames replaced by a newer one before they were written"),
                      ("events", "OPC UA events fired (alarm and channel-state changes)"),
                      ("errors", "Failed writes or publisher passes"),
                      ("restarts", "OPC UA worker processes started again after one died"),
                      ("worker_cpu_s", "CPU seconds of the OPC UA worker processes")):
        name = "worker_cpu_seconds" if key == "worker_cpu_s" else key
        m = CounterMetricFamily(f"quaver_opcua_{name}", what)
        m.add_metric([], float(h[key]))
        yield m


@router.get(
    "/metrics",
    include_in_schema=True,
    summary="Prometheus text exposition",
    response_class=Response,
)
def metrics(hub: HubDep, service: MaybeServiceDep) -> Response:
    registry = CollectorRegistry(auto_describe=False)
    registry.register(_ServiceCollector(hub, service))
    # prometheus_client's own: python_gc_* (collections per generation) and process_*
    # (resident memory, CPU seconds, open files) for a service that runs for months.
    GCCollector(registry=registry)
    ProcessCollector(registry=registry)
    return Response(
        generate_latest(registry), media_type="text/plain; version=0.0.4; charset=utf-8"
    )

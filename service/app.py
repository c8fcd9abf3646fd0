"""Assemble and run the service: sources → pipelines → hub → HTTP app, on one event loop.

Owns start-up and shut-down order; the pieces it wires know nothing about each other."""

from __future__ import annotations

import asyncio
import contextlib
import functools
import logging
import time
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from fastapi import FastAPI

from .alarms import AlarmEngine, AlarmEvent, rules_from_config
from .api import create_app
from .config import Config, open_source_warnings
from .history import SpectrumHistory, alarm_row
from .hub import Hub
from .mqtt import MqttPublisher
from .notify import Notifier
from .opcua import OpcuaPublisher
from .operator import commit_action
from .pipeline import ChannelState, SourcePipeline, analysis_pool, channel_states
from .profiles import ProfileBank
from .reload import reload_config
from .sources import make_source
from .spectra import spectrum_values
from .store import HistoryPolicy, HistoryRow, Retention, Store, StoreError, trend_key
from .supervise import refresh_quality, run_supervised, watch
from .types import PushFrames, SpectralFrame

if TYPE_CHECKING:
    from .cluster.head import Cluster

log = logging.getLogger("quaver")


class Service:
    """Sources, one pipeline task each, the alarm engine, the store and the hub.

    Order of work for every block's frames (on the event loop): latest spectra to the hub,
    trend values to the store, alarm evaluation; alarm events are committed to the store
    *before* they are announced, then the waveform around each raising event is requested
    from the source's pipeline and stored as evidence with the spectrum of that moment.
    """

    def __init__(self, cfg: Config, config_path: str | Path | None = None) -> None:
        self.cfg = cfg
        self.config_path = None if config_path is None else Path(config_path)
        self.http_app: FastAPI | None = None
        self.hub = Hub()
        self.pipelines: list[SourcePipeline] = []
        self.tasks: list[asyncio.Task[None]] = []
        self.store_errors = 0
        self.status_changes: dict[str, int] = {}  # transitions into each state, for /metrics
        self._trend_layouts: dict[object, list[list[tuple[str, str]]]] = {}
        all_ids: list[str] = []
        # [cluster] engine = "ray": each source's pipeline runs on a Ray actor and a
        # RemotePipeline stands in for it here (Ray is imported when the cluster starts)
        self.cluster: Cluster | None = None
        if cfg.cluster.engine == "ray":
            from .cluster.head import Cluster, make_remote

            self.cluster = Cluster(cfg, self.hub)
        # the analysis threads every source's pipeline shares (one process; not in cluster mode)
        self.analysis = None if cfg.cluster.engine == "ray" else analysis_pool(
            cfg.service.analysis_threads)
        for src_cfg in cfg.sources:
            source = make_source(src_cfg)
            ids = list(source.channel_ids)
            all_ids += ids
            states = channel_states(cfg, src_cfg.id, ids, fs=source.fs)
            self.hub.channels.update(states)
            if self.cluster is not None:
                source, remote = make_remote(cfg, self.cluster, src_cfg, states,
                                             self.on_frames)  # type: ignore[arg-type]
                self.hub.sources[src_cfg.id] = source
                self.pipelines.append(remote)  # type: ignore[arg-type]
                continue
            self.hub.sources[src_cfg.id] = source
            self.pipelines.append(
                SourcePipeline(
                    source,
                    states,
                    self.on_frames,
                    make_bank=functools.partial(ProfileBank, cfg, ids),
                    cfg=cfg,
                    evidence_s=(cfg.service.evidence_before_s, cfg.service.evidence_after_s),
                    executor=self.analysis,
                )
            )
        self.channel_ids = all_ids
        self.by_source = {p.source.id: p for p in self.pipelines}
        self.hub.pipelines.update(self.by_source)
        self.started_mono = time.monotonic()
        self.alarms = AlarmEngine(rules_from_config(cfg, channels=all_ids))
        max_bytes = None if cfg.service.max_db_mb is None else int(cfg.service.max_db_mb * 2**20)
        hist = cfg.history
        self.store = Store(
            Path(cfg.service.data_dir) / "quaver.db",
            trend_step_s=cfg.service.trend_step_s,
            retention=Retention(max_db_bytes=max_bytes),
            history=HistoryPolicy(
                fine_s=hist.fine_days * 86400, coarse_s=hist.coarse_days * 86400,
                coarse_step_s=hist.coarse_step_s, max_bytes=int(hist.max_mb * 2**20),
            ),
        )
        # [[notify]]: its router writes outbox rows in every events transaction from the start
        # a shelved rule's events are logged but not sent (the predicate runs on the store's
        # writer thread: one dict read of the current alarm engine)
        self.notifier = (
            Notifier(cfg, self.store, suppressed=lambda rule: self.alarms.is_shelved(rule))
            if cfg.notify else None
        )
        if self.notifier is not None:
            self.notifier.attach()
        # [mqtt]: a hub subscriber; paho is imported only when it starts
        self.mqtt = MqttPublisher(cfg, self.hub) if cfg.mqtt.enabled else None
        # stored spectra: interval means taken on the loop, encoded on the writer thread
        self.history = SpectrumHistory(hist.interval_s) if hist.enabled else None
        # [opcua]: a hub subscriber like any client (asyncua is imported when it starts)
        self.opcua = OpcuaPublisher(self) if cfg.opcua.enabled else None

    # -- lifecycle ---------------------------------------------------------------------
    async def start(self) -> None:
        """Open the store and restore alarm state, open every source (a port that cannot be
        bound fails the start-up), then start one pipeline task per source."""
        try:
            Path(self.cfg.service.data_dir).mkdir(parents=True, exist_ok=True)
        except OSError as e:  # the store reports it below; monitoring starts anyway
            log.error("data folder %s: %s", self.cfg.service.data_dir, e)
        for warning in open_source_warnings(self.cfg):
            log.warning("%s", warning)
        self.store.start()
        try:
            state = await asyncio.to_thread(self.store.load_alarm_state)
        except StoreError as e:
            # A store that cannot be read must not stop monitoring: start with every alarm
            # normal, say so, and let /health and /metrics show the store's state.
            self.store_errors += 1
            log.error("alarm state not restored (%s); monitoring starts without it", e)
            state = None
        if state:
            self.alarms.restore(state)
            log.info("restored %d active/latched alarms", len(self.alarms.active()))
        if self.notifier is not None:  # sends what an earlier run left pending, first
            loop = asyncio.get_running_loop()
            self.notifier.on_event = lambda ev: self._from_thread(loop, ev)
            self.notifier.start()
        if self.mqtt is not None:  # before the sources: it sees every frame and event
            await self.mqtt.start(self.store.store_id)
        if self.opcua is not None:  # like a source's port: an endpoint it cannot bind fails;
            await self.opcua.start()  # before the sources: asyncua's set-up holds the loop ~2 s
        for p in self.pipelines:
            await p.source.start()
        self.started_mono = time.monotonic()
        for st in self.hub.channels.values():
            st.status_since_ns = time.time_ns()
        for p in self.pipelines:
            self.tasks.append(asyncio.create_task(self._run(p), name=f"pipeline-{p.source.id}"))
        self.tasks.append(asyncio.create_task(self._watch(), name="quality-watch"))
        if self.opcua is not None:
            self.opcua.begin()

    async def _run(self, p: SourcePipeline) -> None:
        await run_supervised(self, p)

    async def _watch(self) -> None:
        await watch(self)

    async def _refresh_quality(self, channels: Iterable[ChannelState]) -> None:
        await refresh_quality(self, channels)

    async def stop(self) -> None:
        if self.opcua is not None:
            await self.opcua.stop()
        for t in self.tasks:
            t.cancel()
        await asyncio.gather(*self.tasks, return_exceptions=True)
        if self.analysis is not None:  # a block still being analysed ends first
            await asyncio.to_thread(self.analysis.shutdown, wait=True, cancel_futures=True)
        for p in self.pipelines:
            await p.source.aclose()
            self._store_evidence(p, final=True)
            self._store_runups(p)
            if self.history is not None and getattr(p, "keeps_history", False):
                self.store.put_history(p.finish_history())  # type: ignore[attr-defined]
        if self.cluster is not None:
            await self.cluster.close()
        if self.history is not None:
            self.store.put_history(self.history.flush())
        if self.notifier is not None:
            await asyncio.to_thread(self.notifier.stop)
        if self.mqtt is not None:
            await self.mqtt.stop()
        await asyncio.to_thread(self.store.close)

    def app(self) -> FastAPI:
        app = create_app(
            self.hub, config=self.cfg, service=self, lifespan_hooks=(self.start, self.stop)
        )
        self.http_app = app
        return app

    # -- configuration reload ----------------------------------------------------------
    async def reload(self) -> dict[str, Any]:
        """Apply the config file's alarms and tokens (service.reload.reload_config)."""
        return await reload_config(self)

    # -- per block ---------------------------------------------------------------------
    async def on_frames(
        self, p: SourcePipeline, pushes: list[PushFrames], latency_s: float
    ) -> None:
        """A block's results, one :class:`PushFrames` per analysis group, worked on as
        arrays over the channels (frames are made only where something reads them)."""
        batch = pushes
        self._store_evidence(p)
        self._store_runups(p)
        now = time.monotonic()
        chans = p.channels
        # What REST reads of the push — the frame counters, the latest spectra and the time
        # of the newest frame — changes in one step (no await between), before the states
        # derived from them; the stream gets the frames after any status event they cause.
        if batch and isinstance(p, SourcePipeline):  # a cluster actor counts its own: its
            p.count_frames(batch)  # channel states come with the push (service.cluster)
        for push in batch:
            for cid in push.channels:
                chans[cid].last_frame_mono = now
            self.hub.set_latest(push, latency_s)
        # every block: a fault seen by the worker is a state (and an event) at once
        await self._refresh_quality(chans.values())
        # cluster mode: the actor makes the interval means, where every spectrum is
        remote_history = getattr(p, "keeps_history", False)
        if remote_history and self.history is not None:
            rows = p.take_history()  # type: ignore[attr-defined]
            if rows:
                self.store.put_history(rows)
        if not batch:
            return
        events: list[tuple[AlarmEvent, SpectralFrame | None]] = []
        for push in batch:
            self.hub.offer_push(push)
            if self.history is not None and not remote_history:
                closed = self.history.add_push(push)
                if closed:
                    self.store.put_history(closed)
            keys = self._trend_keys(push)
            values = np.concatenate((push.bands[:, -1:], push.bands[:, :len(push.band_names)],
                                     push.tones), axis=1)
            self.store.record_block((push.channels, push.profile), keys, push.t_ns, values)
            states = [self.hub.channels[cid] for cid in push.channels]
            for e, c in self.alarms.evaluate_push(push, [st.status for st in states],
                                                  [st.fault for st in states], values):
                events.append((e, push.frame(c)))
        if events:
            if remote_history:  # cluster mode: the spectra of the moment, from the actor
                events = await p.exact_spectra(events)  # type: ignore[attr-defined]
            await self.commit_and_announce(p, events)

    def _trend_keys(self, push: PushFrames) -> list[list[tuple[str, str]]]:
        """The trend series (channel, name) of each cell of a push's values [overall |
        bands | tones]: made once per layout, the same list object after (compared by
        identity in the store's buckets)."""
        layout = (push.channels, push.profile, push.band_names, push.tone_names,
                  push.primary.tobytes())
        keys = self._trend_layouts.get(layout)
        if keys is None:
            names = ["overall", *(f"band:{b}" for b in push.band_names),
                     *(f"tone:{t}" for t in push.tone_names)]
            keys = [[(cid, n if primary else trend_key(push.profile, n)) for n in names]
                    for cid, primary in zip(push.channels, push.primary.tolist(), strict=True)]
            self._trend_layouts[layout] = keys
        return keys

    async def commit_and_announce(
        self, p: SourcePipeline | None, events: list[tuple[AlarmEvent, SpectralFrame | None]]
    ) -> None:
        evs = [e for e, _ in events]
        try:
            stored = await asyncio.wrap_future(
                self.store.put_events(evs, alarm_state=self.alarms.snapshot())
            )
        except Exception as err:  # the store failing must not stop monitoring
            # Nothing is announced that is not committed (README: "events are committed to
            # the store before they are announced"): the alarm states stay visible through
            # /alarms and /metrics, and /health says the store is failing.
            self.store_errors += 1
            log.error("could not store %d alarm events (not announced): %s", len(evs), err)
            return
        spectra: list[HistoryRow] = []
        for e, (_, frame) in zip(stored, events, strict=True):
            log.info("alarm event %s: %s", e.id, e.message)
            self.hub.publish_event(e.as_dict())
            if self.history is not None and frame is not None:
                # spectral history: the spectrum of the moment at every alarm change
                spectra.append(alarm_row(frame, e.id))
            if e.raises and e.id is not None and p is not None and frame is not None:
                values, unit, amp = spectrum_values(frame)
                p.request_evidence(
                    e.id,
                    frame.channel,
                    frame.end_index,
                    {
                        "f0_hz": frame.f0_hz,
                        "df_hz": frame.df_hz,
                        "unit": unit,
                        "amplitude": amp,
                        "values": values,
                        "t_ns": frame.t_ns,
                        "channel": frame.channel,
                        "profile": frame.profile,
                        "window": frame.window,
                        "averages": frame.averages,
                        "input_unit": frame.input_unit,
                    },
                )
        if spectra:
            self.store.put_history(spectra)

    def _from_thread(self, loop: asyncio.AbstractEventLoop, ev: AlarmEvent) -> None:
        """Commit and announce an event made on another thread (the notification sender's)."""
        with contextlib.suppress(RuntimeError):  # the loop has closed: shutting down
            asyncio.run_coroutine_threadsafe(self.commit_and_announce(None, [(ev, None)]), loop)

    def _store_evidence(self, p: SourcePipeline, *, final: bool = False) -> None:
        for ev in p.take_evidence(final=final):
            self.store.put_evidence(ev.event_id, ev.spectrum, ev.waveform, ev.fs, ev.t0_ns)

    def _store_runups(self, p: SourcePipeline) -> None:
        """Queue the run-up / coast-down records the worker completed (service.runups)."""
        for st in p.channels.values():
            if st.runup is None:
                continue
            for rec in st.runup.take_records():
                log.info("%s record of %s kept: %d speed bins", rec["kind"], st.id,
                         len(rec["rows"]))  # type: ignore[arg-type]
                self.store.put_runup(st.id, st.input_unit, rec)

    async def acknowledge(self, rule: str, who: str, note: str) -> dict[str, Any]:
        """Acknowledge ``rule``: the ack event and the alarm state after it are committed
        first, and only then applied in memory and announced. A store that fails raises
        :class:`StoreError` and leaves the alarm as it was (the API answers 503), so a retry
        is not refused as "already acknowledged" and a restart loses nothing announced."""
        t_ns = time.time_ns()  # one time for the trial and the live engine
        out = await commit_action(
            self, lambda eng: [eng.ack(rule, who, note, t_ns=t_ns)],
            f"acknowledgement of {rule} by {who}", undone="nothing was acknowledged",
        )
        return out[0]

    async def act(
        self, action: Callable[[AlarmEngine], list[AlarmEvent]], what: str
    ) -> list[dict[str, Any]]:
        """An operator action on the alarms (acknowledge-all, shelve, unshelve): committed,
        then applied and announced (service.operator.commit_action)."""
        return await commit_action(self, action, what)

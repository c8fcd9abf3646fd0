"""The work a Ray actor does for its group of sources: ingest, sensor checks and the engine,
with the same classes as the service process (``make_source``, ``SourcePipeline``,
``ProfileBank``), and each push as one :class:`~service.cluster.transport.PushBatch` waiting
in that source's outbox until the service process pulls it.

Imports no Ray: ``service.cluster.head`` wraps :class:`SourceGroup` in ``ray.remote``, so the
class runs (and is tested) in a plain process too. Knows nothing of the hub, alarms, store
or HTTP."""

from __future__ import annotations

import asyncio
import collections
import copy
import functools
import logging
import operator
import time
import uuid
from collections.abc import Iterable
from dataclasses import dataclass, field

import numpy as np

from ..config import Config
from ..evidence import Evidence
from ..history import SpectrumHistory
from ..pipeline import SourcePipeline, analysis_pool, channel_states
from ..profiles import ProfileBank
from ..sources import make_source
from ..speed import NotEnoughRevolutions
from ..store import HistoryRow
from ..types import ChannelState, PushFrames, PushPeaks
from .transport import PLAN_FIELDS, PushBatch, SpectraWanted, pack_states

log = logging.getLogger("quaver.cluster")
_PLAN_VALUES = operator.attrgetter(*PLAN_FIELDS)

__all__ = ["OUTBOX_BATCHES", "SourceGroup"]

OUTBOX_BATCHES = 4096  # pushes kept for a service that does not pull; then oldest dropped
# the newest pushes of each source kept whole (with their spectra) for the service's
# requests of the spectrum of an alarm's moment: a few seconds of pushes (our choice)
RECENT_PUSHES = 32
# a pull of several sources, woken by one push, waits this long for the others' (our choice:
# fewer calls, each push at most this much later)
PULL_GATHER_S = 0.02
RESTART_FIRST_S, RESTART_MAX_S = 1.0, 30.0  # a failed pipeline runs again (as service.supervise)


@dataclass
class _Run:
    pipeline: SourcePipeline
    outbox: collections.deque[PushBatch] = field(default_factory=collections.deque)
    ready: asyncio.Event = field(default_factory=asyncio.Event)
    plans_sent: dict[str, tuple[object, ...]] = field(default_factory=dict)
    dropped: int = 0
    task: asyncio.Task[None] | None = None
    # spectra: what the service asked for with its latest pull, when each group's spectrum
    # was last sent (monotonic s), the recent whole pushes, and the interval means
    wanted: SpectraWanted = field(default_factory=SpectraWanted)
    sent_mono: dict[object, float] = field(default_factory=dict)
    recent: collections.deque[PushFrames] = field(
        default_factory=lambda: collections.deque(maxlen=RECENT_PUSHES))
    history: SpectrumHistory | None = None
    history_rows: list[HistoryRow] = field(default_factory=list)


class SourceGroup:
    """Some of the config's sources, each with its own pipeline, on one event loop."""

    def __init__(self, cfg: Config, source_ids: list[str]) -> None:
        self.cfg = cfg
        self.incarnation = uuid.uuid4().hex  # Ray restarting the actor runs __init__ again
        self.runs: dict[str, _Run] = {}
        # this actor's sources share its analysis threads (service.pipeline.analysis_pool):
        # one unless [service] analysis_threads says otherwise (an actor is given a share of
        # a node's cores, not the node)
        self.analysis = analysis_pool(cfg.service.analysis_threads or 1)
        for src_cfg in cfg.sources:
            if src_cfg.id not in source_ids:
                continue
            source = make_source(src_cfg)
            ids = list(source.channel_ids)
            states = channel_states(cfg, src_cfg.id, ids, fs=source.fs)
            p = SourcePipeline(
                source, states, self._publish,
                make_bank=functools.partial(ProfileBank, cfg, ids), cfg=cfg,
                evidence_s=(cfg.service.evidence_before_s, cfg.service.evidence_after_s),
                executor=self.analysis,
            )
            hist = cfg.history
            self.runs[src_cfg.id] = _Run(
                p, history=SpectrumHistory(hist.interval_s) if hist.enabled else None)
        self._started = False
        self._any = asyncio.Event()  # a push of any source waits in its outbox
        self.gather_s = PULL_GATHER_S

    # -- called by the service process ---------------------------------------------------
    async def start(self, spectra: SpectraWanted | None = None) -> str:
        """Open every source (bind, open; raises if one cannot be set up) and start its
        pipeline. Returns this run's incarnation id. ``spectra``: as :meth:`pull`'s."""
        if spectra is not None:
            for r in self.runs.values():
                r.wanted = spectra
        if not self._started:
            self._started = True
            for r in self.runs.values():
                await r.pipeline.source.start()
            for sid, r in self.runs.items():
                r.task = asyncio.create_task(self._supervise(r), name=f"pipeline-{sid}")
        return self.incarnation

    async def pull(self, source_id: str, wait_s: float,
                   written: dict[str, tuple[float | None, str]] | None = None,
                   spectra: SpectraWanted | None = None) -> list[PushBatch]:
        """The source's pushes since the last pull (oldest first); waits up to ``wait_s`` s
        for one. Starts the sources first if this run of the actor has not (a restart).
        ``written``: the speeds written at the service (PUT /speed, MQTT, OPC UA) by channel,
        (r/min or None, who), for the worker's next block, as in one process. ``spectra``:
        which pushes carry their spectra from now on (:class:`SpectraWanted`)."""
        await self.start()
        r = self.runs[source_id]
        if spectra is not None:
            r.wanted = spectra
        self._written(r, written)
        if not r.outbox:
            r.ready.clear()
            await _wait_set(r.ready, wait_s)
        out = list(r.outbox)
        r.outbox.clear()
        return out

    async def pull_many(self, wait_s: float,
                        asks: dict[str, dict[str, tuple[float | None, str]]],
                        spectra: SpectraWanted | None = None) -> dict[str, list[PushBatch]]:
        """:meth:`pull` of several sources in one call (``asks``: source id → its written
        speeds): returns when any source of this actor has a push, or after ``wait_s`` s;
        woken by a push, a moment later (``gather_s``), so that one call takes several."""
        await self.start()
        runs = {sid: self.runs[sid] for sid in asks}
        for sid, r in runs.items():
            self._written(r, asks[sid])
            if spectra is not None:
                r.wanted = spectra
        if not any(r.outbox for r in runs.values()):
            self._any.clear()
            if await _wait_set(self._any, wait_s):
                await asyncio.sleep(self.gather_s)
        out: dict[str, list[PushBatch]] = {}
        for sid, r in runs.items():
            if r.outbox:
                out[sid] = list(r.outbox)
                r.outbox.clear()
        return out

    @staticmethod
    def _written(r: _Run, written: dict[str, tuple[float | None, str]] | None) -> None:
        for cid, (rpm, who) in (written or {}).items():
            st = r.pipeline.channels.get(cid)
            if st is not None:
                st.manual_rpm, st.manual_by = rpm, who

    def request_evidence(self, source_id: str, event_id: int, channel: str, center_index: int,
                         spectrum: dict[str, object]) -> None:
        self.runs[source_id].pipeline.request_evidence(event_id, channel, center_index, spectrum)

    def latest_waveform(self, source_id: str, channel: str, seconds: float
                        ) -> tuple[object, float, int] | None:
        return self.runs[source_id].pipeline.latest_waveform(channel, seconds)

    def envelope_state(self, source_id: str, channel: str, profile: str
                       ) -> dict[str, object] | None:
        return self.runs[source_id].pipeline.envelope_state(channel, profile)

    def runup_list(self, source_id: str, channel: str) -> list[dict[str, object]] | None:
        st = self.runs[source_id].pipeline.channels.get(channel)
        return None if st is None or st.runup is None else st.runup.as_list()

    def order_spectrum(self, source_id: str, channel: str, omax: float, lines: int
                       ) -> object:
        """The order spectrum, or the NotEnoughRevolutions it raised (returned, not raised:
        the service raises it again, whatever Ray would wrap it in)."""
        st = self.runs[source_id].pipeline.channels.get(channel)
        if st is None or st.runup is None:
            return None
        try:
            return st.runup.order_spectrum(omax, lines)
        except NotEnoughRevolutions as e:
            return e

    def finish_evidence(self, source_id: str) -> list[Evidence]:
        return self.runs[source_id].pipeline.take_evidence(final=True)

    def spectra(self, source_id: str, wanted: list[tuple[str, int, str]]
                ) -> list[np.ndarray | None]:
        """The power spectra (input unit², as ``PushFrames.power``) of (profile, end_index,
        channel) from the source's recent pushes; None for one no longer kept."""
        recent = self.runs[source_id].recent
        out: list[np.ndarray | None] = []
        for profile, end_index, channel in wanted:
            got = None
            for push in reversed(recent):
                if push.end_index == end_index and push.profile == profile \
                        and channel in push.channels:
                    got = push.power[push.channels.index(channel)]
                    break
            out.append(got)
        return out

    def finish_history(self, source_id: str) -> list[HistoryRow]:
        """The interval means still open and not yet sent (at shut-down)."""
        r = self.runs[source_id]
        rows = [row for b in r.outbox for row in b.history]  # never pulled
        for b in r.outbox:
            b.history = []
        rows += r.history_rows
        r.history_rows = []
        if r.history is not None:
            rows += r.history.flush()
        return rows

    def where(self) -> dict[str, object]:
        """Which process, host and Ray node (None outside Ray) this run is in."""
        import os
        import socket
        try:
            import ray

            node = ray.get_runtime_context().get_node_id() if ray.is_initialized() else None
        except ImportError:
            node = None
        return {"pid": os.getpid(), "host": socket.gethostname(), "node_id": node,
                "incarnation": self.incarnation}

    async def stop(self) -> None:
        for r in self.runs.values():
            if r.task is not None:
                r.task.cancel()
        await asyncio.gather(*(r.task for r in self.runs.values() if r.task is not None),
                             return_exceptions=True)
        await asyncio.to_thread(self.analysis.shutdown, wait=True, cancel_futures=True)
        for r in self.runs.values():
            await r.pipeline.source.aclose()

    # -- inside the actor -------------------------------------------------------------------
    async def _supervise(self, r: _Run) -> None:
        p = r.pipeline
        backoff_s = RESTART_FIRST_S
        while True:
            try:
                await p.run()
                return
            except asyncio.CancelledError:
                raise
            except Exception as err:
                p.failures += 1
                p.failed = f"{type(err).__name__}: {err}"[:500]
                log.exception("source %s failed; restarting in %g s", p.source.id, backoff_s)
                self._put(r, self._batch(r, [], 0.0))
            await asyncio.sleep(backoff_s)
            backoff_s = min(backoff_s * 2, RESTART_MAX_S)
            p.reset_analysis()
            p.failed = ""

    async def _publish(self, p: SourcePipeline, pushes: list[PushFrames],
                       latency_s: float) -> None:
        r = self.runs[p.source.id]
        p.count_frames(pushes)  # counted with the push, as the service does when it publishes
        now = time.monotonic()
        sent: list[PushFrames] = []
        for push in pushes:
            r.recent.append(push)
            if r.history is not None:  # interval means here, where every spectrum is
                r.history_rows += r.history.add_push(push)
            # a push carries its spectra when the service wants them (a subscriber of its
            # channels, or the group's spectrum is older than every_s), else goes without
            key = (push.channels, push.profile, push.power.shape)
            last = r.sent_mono.get(key)
            if last is None or now - last >= r.wanted.every_s or r.wanted.takes(push.channels):
                r.sent_mono[key] = now
                sent.append(push)
            else:
                sent.append(_without_spectra(push))
        self._put(r, self._batch(r, sent, latency_s))

    def _batch(self, r: _Run, pushes: list[PushFrames], latency_s: float) -> PushBatch:
        p = r.pipeline
        now = time.monotonic()
        states = p.channels.values()
        plans: dict[str, tuple[object, ...]] = {}
        for st in states:
            plan = _PLAN_VALUES(st)
            if r.plans_sent.get(st.id) != plan:
                r.plans_sent[st.id] = plans[st.id] = plan
        framed = {cid for push in pushes for cid in push.channels}
        runups = {st.id: st.runup for st in states if st.runup is not None}
        status = p.source.status()
        if r.dropped:
            status["outbox_dropped"] = r.dropped
        return PushBatch(
            source_id=p.source.id, incarnation=self.incarnation, pushes=pushes,
            states=pack_states(states), plans=plans,
            frame_age_s=_alive_without_frames(states, framed, now),
            counters=p.source.counters, status=status, latency_s=latency_s,
            failures=p.failures, restarts=p.restarts, failed=p.failed,
            evidence=p.take_evidence(),
            runup_setup={cid: (cap.orders, cap.rpm_step) for cid, cap in runups.items()},
            runup_records={cid: recs for cid, cap in runups.items()
                           if (recs := cap.take_records())},
            history=self._take_history(r),
        )

    @staticmethod
    def _take_history(r: _Run) -> list[HistoryRow]:
        rows, r.history_rows = r.history_rows, []
        return rows

    def _put(self, r: _Run, batch: PushBatch) -> None:
        if len(r.outbox) >= OUTBOX_BATCHES:
            r.outbox.popleft()
            r.dropped += 1
        r.outbox.append(batch)
        r.ready.set()
        self._any.set()


def _without_spectra(push: PushFrames) -> PushFrames:
    """A copy of ``push`` whose spectra are left behind (``power`` of shape (C, 0)): the
    bands, overall, tones, quality and speed travel, the ≈ 95 % of the bytes do not."""
    out = copy.copy(push)  # PushFrames' own __getstate__: the arrays shared, not copied
    out.power = np.empty((len(push.channels), 0), dtype=push.power.dtype)
    out.peaks = PushPeaks(out.power, push.peaks.settings, push.peaks._find)
    return out


def _alive_without_frames(states: Iterable[ChannelState], framed: set[str], now: float
                          ) -> dict[str, float]:
    """Channels whose worker marked them alive (a tacho's pulses: service.speed) without a
    frame in this push: their age, so the service process can mark them too."""
    out: dict[str, float] = {}
    for st in states:
        if st.id not in framed and st.last_frame_mono is not None:
            out[st.id] = now - st.last_frame_mono
    return out


async def _wait_set(event: asyncio.Event, wait_s: float) -> bool:
    """Wait up to ``wait_s`` s for ``event``; True if it was set. asyncio.timeout, not
    wait_for: on Python 3.11 wait_for can swallow a cancellation that arrives as the event
    is set (the caller then never stops)."""
    try:
        async with asyncio.timeout(wait_s):
            await event.wait()
    except TimeoutError:
        return False
    return True

"""The service process's side of cluster mode: connect to Ray (or start a local one), place
each group of sources on an actor, and stand in for each source's pipeline: pull its pushes,
hand their PushFrames to the service exactly as a local pipeline does.

Ray is imported here only, when a cluster starts (the optional ``ray`` extra). Knows the
service's pipeline seam (``publish``, ``failed``, evidence) but not the hub, alarms or store."""

from __future__ import annotations

import asyncio
import dataclasses
import logging
import os
import sys
import time
from collections.abc import Awaitable, Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ..config import Config, SourceConfig
from ..config.cluster import node_resource
from ..evidence import Evidence
from ..sources import make_source
from ..sources.base import Source
from ..speed import NotEnoughRevolutions
from ..store import HistoryRow
from ..types import ChannelState, PushFrames, SourceCounters, SpectralFrame

if TYPE_CHECKING:
    from dsp.orders import OrderSpectrum

    from ..alarms import AlarmEvent
    from ..hub import Hub
from .actor import SourceGroup
from .transport import PLAN_FIELDS, PushBatch, SpectraWanted, apply_states

log = logging.getLogger("quaver.cluster")

__all__ = ["ActorLost", "Cluster", "RemotePipeline", "RemoteSource", "group_sources"]

PULL_WAIT_S = 1.0  # a pull returns after this long without a push (our choice)
CALL_TIMEOUT_S = 30.0  # a start or stop call that takes longer has failed (our choice)
SPECTRA_EVERY_S = 1.0  # without a subscriber, each group's spectrum comes this often (our choice)
STALE_KEPT = 1024  # pushes remembered as having come without spectra (the actor keeps fewer)
SPECTRUM_CALL_S = 2.0  # the spectrum of an alarm's moment: asked of the actor, this bound
FINISH_CALL_S = 5.0  # at shut-down: the last evidence and interval means, this bound
# what a stream subscriber reads a frame's spectrum for (its peaks are found from it)
SPECTRUM_KINDS = frozenset({"spectrum", "tones"})
RELOCATABLE = ("file", "simulated")


def group_sources(cfg: Config) -> list[tuple[str | None, list[str]]]:
    """The actors' groups: (node or None, source ids). Sources that name a node run on one
    actor per node; the others are dealt round robin to ``workers`` actors (no empty one)."""
    pinned: dict[str, list[str]] = {}
    free: list[str] = []
    for s in cfg.sources:
        if s.node is not None:
            pinned.setdefault(s.node, []).append(s.id)
        else:
            free.append(s.id)
    groups: list[tuple[str | None, list[str]]] = [(n, ids) for n, ids in pinned.items()]
    k = min(cfg.cluster.workers, len(free))
    groups += [(None, free[i::k]) for i in range(k)]
    return groups


class Cluster:
    """Ray, connected (or started locally) on first use, and the service's actors."""

    def __init__(self, cfg: Config, hub: Hub | None = None) -> None:
        self.cfg = cfg
        self.hub = hub
        self.groups = group_sources(cfg)
        self.actors: list[Any] = []
        self.by_source: dict[str, Any] = {}
        self._started_ray = False
        self._lock = asyncio.Lock()
        self.replaced = 0  # actors started anew after Ray gave them up
        self._remote_cls: Any = None
        self._pullers: dict[int, _Puller] = {}

    async def ensure(self) -> None:
        async with self._lock:
            if self.actors:
                return
            self._connect()  # blocks the loop once, at start-up: ray.init wants the main thread
            self._spawn()

    def _connect(self) -> None:
        import signal

        cl = self.cfg.cluster
        if cl.address == "local" and "ray" not in sys.modules:
            # a Ray of this machine only: its servers on loopback (Ray reads this on import)
            os.environ.setdefault("RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER", "0")
        import ray

        if ray.is_initialized():  # a test (or an embedding program) connected already
            return
        os.environ.setdefault("RAY_USAGE_STATS_ENABLED", "0")  # no reports home
        # ray.init installs a SIGTERM handler that exits at once; the service's own
        # (orderly stop: sources, store) must stay in charge
        term = signal.getsignal(signal.SIGTERM)
        # the workers import this package from where the service runs
        root = str(Path(__file__).resolve().parents[2])
        env = {"PYTHONPATH": os.pathsep.join(
            p for p in (root, os.environ.get("PYTHONPATH", "")) if p)}
        if cl.address == "local":
            ray.init(num_cpus=cl.workers, include_dashboard=False,
                     object_store_memory=cl.object_store_mb * 2**20,
                     runtime_env={"env_vars": env}, log_to_driver=False,
                     configure_logging=False)
        else:
            ray.init(address=cl.address, runtime_env={"env_vars": env}, log_to_driver=False,
                     configure_logging=False)
        self._started_ray = True
        if term is not None:
            signal.signal(signal.SIGTERM, term)

    def _spawn(self) -> None:
        for node, ids in self.groups:
            actor = self._new_actor(node, ids)
            self.actors.append(actor)
            for sid in ids:
                self.by_source[sid] = actor

    def _new_actor(self, node: str | None, ids: list[str]) -> Any:
        import ray

        opts: dict[str, Any] = {
            "max_restarts": self.cfg.cluster.max_restarts, "max_task_retries": 0,
            # an actor mostly waits on sockets and numpy; a quarter CPU each lets a
            # node host several, and the node's CPUs bound them all together
            "num_cpus": 0.25, "max_concurrency": 1000,
        }
        if node is not None:
            opts["resources"] = {node_resource(node): 0.001}
        else:
            opts["scheduling_strategy"] = "SPREAD"
        if self._remote_cls is None:
            self._remote_cls = ray.remote(SourceGroup)
        return self._remote_cls.options(**opts).remote(self.cfg, ids)

    async def replace_if_dead(self, actor: Any) -> bool:
        """After a call to ``actor`` failed: if Ray has given it up (its ``max_restarts``
        used, or killed for good), start a new actor for its sources in its place; the
        service's back-off between a failed source's runs (``service.supervise``) paces
        the attempts. True when the sources now have another actor."""
        async with self._lock:
            try:
                i = next(k for k, a in enumerate(self.actors) if a is actor)
            except StopIteration:
                return any(a is not actor for a in self.by_source.values())  # replaced
            if await asyncio.to_thread(_actor_state, actor) != "DEAD":
                return False  # alive, or being restarted by Ray
            node, ids = self.groups[i]
            self.actors[i] = new = self._new_actor(node, ids)
            for sid in ids:
                self.by_source[sid] = new
            self.replaced += 1
            log.warning("the actor of %s was given up by Ray; a new one replaces it",
                        ", ".join(ids))
            return True

    def puller(self, actor: Any) -> _Puller:
        """The one :class:`_Puller` of ``actor`` (those of replaced actors are dropped)."""
        p = self._pullers.get(id(actor))
        if p is None or p.actor is not actor:
            live = {id(a) for a in self.actors} | {id(a) for a in self.by_source.values()}
            self._pullers = {k: v for k, v in self._pullers.items() if k in live}
            p = self._pullers[id(actor)] = _Puller(actor, self)
        return p

    def spectra_wanted(self) -> SpectraWanted:
        """Which pushes must bring their spectra: those of channels a hub subscriber reads
        spectra or tones of (MQTT and OPC UA publishers subscribe like any client)."""
        subs = [] if self.hub is None else [
            s for s in self.hub.subscribers if s.kinds & SPECTRUM_KINDS]
        if any(s.channels is None for s in subs):
            return SpectraWanted(SPECTRA_EVERY_S, None)
        return SpectraWanted(SPECTRA_EVERY_S,
                             frozenset(c for s in subs for c in (s.channels or ())))

    async def close(self) -> None:
        import ray

        # every actor at once, bounded: a dead one has nothing to stop
        try:
            stopped: list[object] = await asyncio.wait_for(asyncio.gather(
                *(a.stop.remote() for a in self.actors), return_exceptions=True),
                CALL_TIMEOUT_S)
        except TimeoutError as e:
            stopped = [e] * len(self.actors)
        for a, res in zip(self.actors, stopped, strict=True):
            if isinstance(res, BaseException):
                log.info("actor stop: %s", res)
            ray.kill(a, no_restart=True)
        self.actors.clear()
        if self._started_ray:
            ray.shutdown()  # on the thread that connected
            self._started_ray = False


def _actor_state(actor: Any) -> str | None:
    """Ray's state of ``actor`` ("ALIVE", "RESTARTING", "DEAD" …) from its control store
    (``ray._private.state``: no public call gives one actor's state without Ray's
    dashboard); None when it cannot be read."""
    try:
        from ray._private import state

        info = state.actors(actor_id=actor._actor_id.hex())
        return str(info["State"]) if info else None
    except Exception as e:  # an older or newer Ray: treated as not known
        log.info("actor state not read: %s", e)
        return None


class _Puller:
    """The pulls of one actor's sources as one call at a time (``SourceGroup.pull_many``):
    each source asks when it is ready for more; the call in flight takes every source that
    asked before it started, the next one those that asked since. One call per actor instead
    of one per source and push: Ray's cost per call, on both sides, is paid less often."""

    def __init__(self, actor: Any, cluster: Cluster) -> None:
        self.actor, self.cluster = actor, cluster
        self.asks: dict[str, tuple[asyncio.Future[list[PushBatch]],
                                   dict[str, tuple[float | None, str]]]] = {}
        self.task: asyncio.Task[None] | None = None

    async def pull(self, source_id: str, written: dict[str, tuple[float | None, str]]
                   ) -> list[PushBatch]:
        fut: asyncio.Future[list[PushBatch]] = asyncio.get_running_loop().create_future()
        self.asks[source_id] = (fut, written)
        if self.task is None or self.task.done():
            self.task = asyncio.create_task(self._run(), name="cluster-pull")
        return await fut

    async def _run(self) -> None:
        while self.asks:
            asks, self.asks = self.asks, {}
            try:
                got: dict[str, list[PushBatch]] = await self.actor.pull_many.remote(
                    PULL_WAIT_S, {sid: w for sid, (_, w) in asks.items()},
                    self.cluster.spectra_wanted())
            except Exception as e:  # every source of the actor learns it was lost
                for fut, _ in asks.values():
                    if not fut.done():
                        fut.set_exception(e)
                continue
            for sid, (fut, _) in asks.items():
                if not fut.done():
                    fut.set_result(got.get(sid, []))


class ActorLost(RuntimeError):
    """The actor running a source is gone (its process or node); the source is failed until
    Ray has restarted it."""


class RemoteSource:
    """A source running on an actor, as the hub and the API see it: its identity from the
    config, its counters and status from its latest push."""

    def __init__(self, cfg: SourceConfig, cluster: Cluster) -> None:
        local = make_source(cfg)  # never started: identity, rate and status shape only
        self.id, self.channel_ids = local.id, tuple(local.channel_ids)
        self._fs = local.fs
        self.kind = cfg.kind
        self.node = cfg.node
        self.counters: SourceCounters = local.counters
        self._status: dict[str, object] = local.status()
        self.cluster = cluster
        self.pipeline: RemotePipeline | None = None  # set by make_remote

    @property
    def fs(self) -> float | None:
        return self._fs

    @property
    def actor(self) -> Any:
        return self.cluster.by_source[self.id]

    async def start(self) -> None:
        await self.cluster.ensure()
        await asyncio.wait_for(self.actor.start.remote(self.cluster.spectra_wanted()),
                               CALL_TIMEOUT_S)

    async def aclose(self) -> None:
        # the cluster stops its actors (Cluster.close); before that the source's last
        # evidence and interval means are fetched, the loop free meanwhile
        if self.pipeline is not None:
            await self.pipeline.finish()

    def status(self) -> dict[str, object]:
        return {**self._status, "engine": "ray", "node": self.node}

    def __aiter__(self) -> RemoteSource:
        return self

    async def __anext__(self) -> Any:
        raise StopAsyncIteration  # blocks never reach the service process

    def took(self, b: PushBatch) -> None:
        self.counters, self._status = b.counters, b.status


@dataclass
class RemotePipeline:
    """A source's pipeline on an actor, seen from the service process (what
    ``service.supervise`` and the API use of a ``SourcePipeline``)."""

    source: RemoteSource
    channels: dict[str, ChannelState]
    publish: Callable[[RemotePipeline, list[PushFrames], float], Awaitable[None]]
    failures: int = 0
    failed: str = ""
    restarts: int = 0
    latency_s: float = 0.0
    incarnation: str = ""
    pushes: int = 0
    max_restarts: int = 0  # the actor's bound ([cluster] max_restarts), for the messages
    # the actor keeps the interval means of the spectral history (service.app asks)
    keeps_history: bool = True
    _evidence: list[Evidence] = field(default_factory=list)
    _history: list[HistoryRow] = field(default_factory=list)
    _remote_failures: int = 0
    # the newest push of each group that came with its spectra, and the recent pushes that
    # came without: (profile, end index) → their channels
    _spectra: dict[object, PushFrames] = field(default_factory=dict)
    _stale: dict[tuple[str, int], list[tuple[str, ...]]] = field(default_factory=dict)

    def __post_init__(self) -> None:
        self.started_mono = time.monotonic()

    async def run(self) -> None:
        """Pull the source's pushes until cancelled; raises when the actor is lost (the
        service reports the source failed and runs this again after its back-off, by which
        time Ray has restarted the actor, on another node if its own was lost)."""
        actor = self.source.actor
        try:
            await self._pull_loop(actor)
        except Exception as e:
            # Ray's text runs to many lines: say what happened and what comes next
            first = str(e).strip().splitlines()[0][:200] if str(e).strip() else ""
            if await self.source.cluster.replace_if_dead(actor):
                raise ActorLost(
                    f"actor lost ({type(e).__name__}: {first}); Ray gave it up (its "
                    f"{self.max_restarts} restarts used): a new actor takes its "
                    "sources") from e
            if type(e).__module__.startswith("ray") and "Actor" in type(e).__name__:
                raise ActorLost(
                    f"actor lost ({type(e).__name__}: {first}); Ray restarts it, on another "
                    f"node if its own is gone (at most {self.max_restarts} times)") from e
            raise

    async def _pull_loop(self, actor: Any) -> None:
        puller = self.source.cluster.puller(actor)
        while True:
            # the written speeds travel with every pull (a few bytes): the actor's worker
            # places them from its next block, and a restarted actor gets them again
            written = {cid: (st.manual_rpm, st.manual_by) for cid, st in self.channels.items()
                       if st.manual_rpm is not None or st.manual_by}
            batches = await puller.pull(self.source.id, written)
            for b in batches:
                await self._take(b)

    async def _take(self, b: PushBatch) -> None:
        if b.incarnation != self.incarnation:
            if self.incarnation:
                log.warning("source %s: its actor was restarted", self.source.id)
            self.incarnation = b.incarnation
            self._remote_failures = 0
        self.source.took(b)
        apply_states(self.channels, b.states)
        apply_states(self.channels, b.plans, PLAN_FIELDS)
        now = time.monotonic()
        for cid, age in b.frame_age_s.items():
            st = self.channels[cid]
            seen = now - age
            if st.last_frame_mono is None or seen > st.last_frame_mono:
                st.last_frame_mono = seen
        self.failures += b.failures - self._remote_failures
        self._remote_failures = b.failures
        self.failed, self.restarts, self.latency_s = b.failed, b.restarts, b.latency_s
        self._evidence += b.evidence
        for cid, (orders, step) in b.runup_setup.items():
            st = self.channels[cid]
            if not (isinstance(st.runup, RemoteRunup) and st.runup.orders == orders
                    and st.runup.rpm_step == step):
                st.runup = RemoteRunup(self, cid, orders, step)
        for cid, recs in b.runup_records.items():
            cap = self.channels[cid].runup
            if isinstance(cap, RemoteRunup):
                cap.records += recs
        self._history += b.history
        for push in b.pushes:
            self._spectra_of(push)
        self.pushes += 1
        await self.publish(self, b.pushes, b.latency_s)

    def _spectra_of(self, push: PushFrames) -> None:
        """A push that came without its spectra takes its group's newest sent ones (and their
        peaks), at most ``SpectraWanted.every_s`` older, unless a subscriber wanted them."""
        key = (push.channels, push.profile)
        if push.power.shape[1]:
            self._spectra[key] = push
            return
        last = self._spectra.get(key)
        if last is not None:
            push.power, push.peaks = last.power, last.peaks
        self._stale.setdefault((push.profile, push.end_index), []).append(push.channels)
        if len(self._stale) > STALE_KEPT:
            del self._stale[next(iter(self._stale))]

    def _is_stale(self, f: SpectralFrame) -> bool:
        return any(f.channel in chans for chans in self._stale.get((f.profile, f.end_index), ()))

    async def exact_spectra(self, events: list[tuple[AlarmEvent, SpectralFrame | None]]
                            ) -> list[tuple[AlarmEvent, SpectralFrame | None]]:
        """The events' frames with the spectra of their own moment (for the alarm's stored
        spectrum and evidence): asked of the actor for frames whose push came without them
        (one bounded call); a frame the actor no longer has keeps the newest sent one."""
        ask = [(i, f) for i, (_, f) in enumerate(events) if f is not None and self._is_stale(f)]
        if not ask:
            return events
        try:
            got = await asyncio.wait_for(self.source.actor.spectra.remote(
                self.source.id, [(f.profile, f.end_index, f.channel) for _, f in ask]),
                SPECTRUM_CALL_S)
        except Exception as e:
            log.warning("source %s: spectra of %d alarm changes not got (%s); the newest "
                        "sent ones are kept with them", self.source.id, len(ask), e)
            return events
        out = list(events)
        for (i, f), power in zip(ask, got, strict=True):
            if power is not None:
                out[i] = (events[i][0], dataclasses.replace(f, power=np.asarray(power)))
        return out

    def take_history(self) -> list[HistoryRow]:
        """The interval means the actor closed since the last call."""
        out, self._history = self._history, []
        return out

    def finish_history(self) -> list[HistoryRow]:
        """At shut-down (after :meth:`finish`): those and the intervals that were still
        open on the actor."""
        return self.take_history()

    async def finish(self) -> None:
        """At shut-down, before the service takes the last evidence and interval means: both
        asked of the actor at once, in one bounded wait on the loop (not blocking it)."""
        if self.source.id not in self.source.cluster.by_source:
            return  # the cluster never started
        actor, sid = self.source.actor, self.source.id
        try:
            ev, rows = await asyncio.wait_for(asyncio.gather(
                actor.finish_evidence.remote(sid), actor.finish_history.remote(sid)),
                FINISH_CALL_S)
        except Exception as e:  # a lost actor has nothing more to give
            log.warning("source %s: last evidence and interval means not got (%s)", sid,
                        type(e).__name__)
            return
        self._evidence += ev
        self._history += rows

    def reset_analysis(self) -> None:
        """Nothing to forget here: the actor's pipeline restarts its own analysis."""

    def request_evidence(self, event_id: int, channel: str, center_index: int,
                         spectrum: dict[str, object]) -> None:
        self.source.actor.request_evidence.remote(self.source.id, event_id, channel,
                                                  center_index, spectrum)

    def take_evidence(self, *, final: bool = False) -> list[Evidence]:
        """The evidence the actor finished (at shut-down with what :meth:`finish` got)."""
        out, self._evidence = self._evidence, []
        return out

    def latest_waveform(self, channel: str, seconds: float
                        ) -> tuple[np.ndarray, float, int] | None:
        got = self._call("latest_waveform", 2.0, channel, seconds)
        return None if got is None else (np.asarray(got[0]), float(got[1]), int(got[2]))

    def envelope_state(self, channel: str, profile: str) -> dict[str, object] | None:
        out: dict[str, object] | None = self._call("envelope_state", 2.0, channel, profile)
        return out

    def _call(self, method: str, timeout_s: float, *args: object) -> Any:
        """A bounded blocking call to the actor, for the API routes that read what only lives
        there (waveform, kurtogram, run-up, order spectrum): plain ``def`` routes, run on the
        server's worker threads, never on the event loop. None when the actor does not
        answer in time."""
        import ray

        try:
            return ray.get(getattr(self.source.actor, method).remote(self.source.id, *args),
                           timeout=timeout_s)
        except Exception as e:
            log.warning("source %s: %s: %s", self.source.id, method, e)
            return None


class RemoteRunup:
    """A channel's run-up capture on its actor, as the service and API read it
    (``service.types.RunupSource``): completed records arrive with the pushes; the live
    run-up data and order spectra are asked of the actor (bounded calls)."""

    def __init__(self, pipeline: RemotePipeline, channel: str, orders: tuple[float, ...],
                 rpm_step: float) -> None:
        self.pipeline, self.channel = pipeline, channel
        self.orders, self.rpm_step = tuple(orders), float(rpm_step)
        self.records: list[dict[str, object]] = []

    def take_records(self) -> list[dict[str, object]]:
        out, self.records = self.records, []
        return out

    def as_list(self) -> list[dict[str, object]]:
        got: list[dict[str, object]] | None = self.pipeline._call(
            "runup_list", 2.0, self.channel)
        return got or []

    def order_spectrum(self, omax: float, lines: int) -> OrderSpectrum:
        got = self.pipeline._call("order_spectrum", 5.0, self.channel, omax, lines)
        if isinstance(got, NotEnoughRevolutions):
            raise got
        if got is None:
            raise RuntimeError(f"{self.channel}: the actor gave no order spectrum")
        out: OrderSpectrum = got
        return out


def make_remote(cfg: Config, cluster: Cluster, src_cfg: SourceConfig,
                states: dict[str, ChannelState],
                publish: Callable[[RemotePipeline, list[PushFrames], float],
                                  Awaitable[None]]) -> tuple[Source, RemotePipeline]:
    src = RemoteSource(src_cfg, cluster)
    src.pipeline = RemotePipeline(src, states, publish, max_restarts=cfg.cluster.max_restarts)
    return src, src.pipeline

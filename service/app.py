"""Assemble and run the service: sources → pipelines → hub → HTTP app, on one event loop.

Owns start-up and shut-down order; the pieces it wires know nothing about each other."""

from __future__ import annotations

import asyncio
import contextlib
import copy
import functools
import gc
import logging
import signal
import time
import tomllib
from collections.abc import Callable, Iterable
from importlib import resources
from pathlib import Path
from typing import Any

import uvicorn
from fastapi import FastAPI
from threadpoolctl import threadpool_limits

from .alarms import AckRefused, AlarmEngine, AlarmEvent, UnknownAlarm, rules_from_config
from .api import create_app
from .api.edge import head_timeout_protocol
from .api.stream import revoke_sessions
from .config import (
    Config,
    ConfigError,
    check_listen_allowed,
    load_config,
    open_source_warnings,
    parse_config,
    parse_listen,
)
from .context import ReloadRefused
from .history import SpectrumHistory, alarm_row
from .hub import Hub
from .notify import Notifier
from .operator import commit_action, expire_shelves
from .pipeline import ChannelState, SourcePipeline, channel_states
from .profiles import ProfileBank
from .quality import Inputs, derive, is_lost
from .sources import make_source
from .spectra import spectrum_values
from .store import HistoryPolicy, HistoryRow, Retention, Store, StoreError, trend_key
from .types import SpectralFrame

log = logging.getLogger("quaver")
WATCH_PERIOD_S = 0.25  # how often every channel's state is derived again (our choice)
RESTART_FIRST_S = 1.0  # back-off before a failed pipeline runs again, doubled each time …
RESTART_MAX_S = 30.0  # … up to this (our choice)
RESTART_STABLE_S = 60.0  # a pipeline that ran this long before failing starts over at 1 s


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
        all_ids: list[str] = []
        for src_cfg in cfg.sources:
            source = make_source(src_cfg)
            ids = list(source.channel_ids)
            all_ids += ids
            states = channel_states(cfg, src_cfg.id, ids, fs=source.fs)
            self.hub.channels.update(states)
            self.hub.sources[src_cfg.id] = source
            self.pipelines.append(
                SourcePipeline(
                    source,
                    states,
                    self.on_frames,
                    make_bank=functools.partial(ProfileBank, cfg, ids),
                    cfg=cfg,
                    evidence_s=(cfg.service.evidence_before_s, cfg.service.evidence_after_s),
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
        # stored spectra: interval means taken on the loop, encoded on the writer thread
        self.history = SpectrumHistory(hist.interval_s) if hist.enabled else None

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
        for p in self.pipelines:
            await p.source.start()
        self.started_mono = time.monotonic()
        for st in self.hub.channels.values():
            st.status_since_ns = time.time_ns()
        for p in self.pipelines:
            self.tasks.append(asyncio.create_task(self._run(p), name=f"pipeline-{p.source.id}"))
        self.tasks.append(asyncio.create_task(self._watch(), name="quality-watch"))

    async def _run(self, p: SourcePipeline) -> None:
        """Run one source's pipeline; if it raises, report it (``failed``) and run it again
        after a back-off of 1, 2, 4 … 30 s (a source failing must not take the service
        down, nor leave its channels looking healthy)."""
        backoff_s = RESTART_FIRST_S
        while True:
            t0 = time.monotonic()
            try:
                await p.run()
                log.info("source %s ended", p.source.id)
                return
            except asyncio.CancelledError:
                raise
            except Exception as err:
                p.failures += 1
                p.failed = f"{type(err).__name__}: {err}"[:500]
                log.exception("source %s failed (failure %d); restarting in %g s",
                              p.source.id, p.failures, backoff_s)
            await self._refresh_quality(p.channels.values())
            if time.monotonic() - t0 > RESTART_STABLE_S:
                backoff_s = RESTART_FIRST_S  # it had run well for a while: start over
            await asyncio.sleep(backoff_s)
            backoff_s = min(backoff_s * 2, RESTART_MAX_S)
            p.reset_analysis()
            p.failed = ""
            for st in p.channels.values():
                st.last_frame_mono = None
            p.started_mono = time.monotonic()
            log.info("source %s: pipeline restarted", p.source.id)

    async def _watch(self) -> None:
        """Derive every channel's state a few times a second, so that a producer that goes
        silent is seen within its channel's ``stale_after_s`` (plus this period)."""
        while True:
            await asyncio.sleep(WATCH_PERIOD_S)
            try:
                await self._refresh_quality(self.hub.channels.values())
                await expire_shelves(self, time.time_ns())
            except Exception:  # the watch must outlive any one bad pass
                log.exception("channel state watch failed")

    async def _refresh_quality(
        self, channels: Iterable[ChannelState], frames: dict[str, SpectralFrame] | None = None
    ) -> None:
        """Derive the state of ``channels`` (service.quality) and, for each that changed,
        make a ``status`` event and tell the alarm engine (loss-of-signal transitions);
        commit the events, then announce them."""
        now, now_ns = time.monotonic(), time.time_ns()
        events: list[tuple[AlarmEvent, SpectralFrame | None]] = []
        connected: dict[str, object] = {}
        for st in channels:
            p = self.by_source[st.source_id]
            if (st.status == "ok" and st.data_status == "ok" and not p.failed
                    and st.last_frame_mono is not None
                    and now - st.last_frame_mono <= st.stale_after_s):
                continue  # the common case, kept cheap: it runs for every block
            started = max(self.started_mono, p.started_mono)
            if p.source.id not in connected:
                # a TCP source knows whether a producer is connected; others cannot tell
                info = p.source.status()
                connected[p.source.id] = (
                    info.get("producer") is not None if info.get("kind") == "tcp" else None
                )
            link = connected[p.source.id]
            inputs = Inputs(
                data_status=st.data_status,
                fault=st.data_fault,
                frame_age_s=None if st.last_frame_mono is None else now - st.last_frame_mono,
                since_start_s=now - started,
                stale_after_s=st.stale_after_s,
                failed=p.failed,
                connected=link if isinstance(link, bool) else None,
            )
            status, cause = derive(inputs)
            lost = is_lost(inputs)
            changed = status != st.status
            if not changed and cause == st.fault and lost == st.lost:
                continue
            before = st.status
            st.status, st.fault = status, cause
            if not changed:
                if lost != st.lost:  # e.g. no data yet, and now for longer than stale_after_s
                    st.lost = lost
                    for e in self.alarms.set_channel_status(st.id, status, now_ns,
                                                            fault=cause, lost=lost):
                        events.append((e, None))
                continue
            # The first spectrum after the start, in time, is not news: no event for it
            # (a plant of 1000 channels would log 1000 of them at every start).
            first_in_time = st.status_changes == 0 and before == "no-signal" and not st.lost
            st.lost = lost
            st.status_since_ns, st.status_changes = now_ns, st.status_changes + 1
            self.status_changes[status] = self.status_changes.get(status, 0) + 1
            msg = f"{st.id}: {status}, " + (cause if cause else f"was {before}")
            (log.info if status == "ok" else log.warning)("channel %s", msg)
            if not first_in_time:
                events.append((AlarmEvent(
                    t_ns=now_ns, channel=st.id, rule=f"{st.id}.status", kind="status",
                    from_state=before, to_state=status, value=None, level=None, unit="",
                    message=msg,
                ), None))
            for e in self.alarms.set_channel_status(st.id, status, now_ns, fault=cause,
                                                    lost=lost):
                events.append((e, None))
        if events:
            await self._commit_and_announce(None, events)

    async def stop(self) -> None:
        for t in self.tasks:
            t.cancel()
        await asyncio.gather(*self.tasks, return_exceptions=True)
        for p in self.pipelines:
            await p.source.aclose()
            self._store_evidence(p, final=True)
        if self.history is not None:
            self.store.put_history(self.history.flush())
        if self.notifier is not None:
            await asyncio.to_thread(self.notifier.stop)
        await asyncio.to_thread(self.store.close)

    def app(self) -> FastAPI:
        app = create_app(
            self.hub, config=self.cfg, service=self, lifespan_hooks=(self.start, self.stop)
        )
        self.http_app = app
        return app

    # -- configuration reload ----------------------------------------------------------
    async def reload(self) -> dict[str, Any]:
        """Re-read the config file and apply its ``[[alarms]]`` and ``[[tokens]]``.

        Everything else (sources, channels, analysis, profiles, bands, tones, service) needs
        a restart: if any of it changed, or the file is not valid, nothing is applied
        (:class:`ReloadRefused` says why). Alarm rules that stay keep their state; the new
        alarm state is committed to the store before the reload answers."""
        if self.config_path is None:
            raise ReloadRefused(409, "this service was started without a config file (the "
                                "demo has none); there is nothing to reload")
        try:
            new = await asyncio.to_thread(load_config, self.config_path)
            check_listen_allowed(new)
        except ConfigError as e:
            raise ReloadRefused(422, f"{self.config_path}: nothing applied", e.problems) from None
        live = {"alarms", "tokens"}
        before, after = self.cfg.model_dump(exclude=live), new.model_dump(exclude=live)
        fixed = [k for k in before if before[k] != after.get(k)]
        if fixed:
            raise ReloadRefused(
                409, f"changes to {', '.join(fixed)} need a restart; nothing applied"
            )
        try:
            rules = rules_from_config(new, channels=self.channel_ids)
        except ValueError as e:
            raise ReloadRefused(422, f"{self.config_path}: nothing applied", [str(e)]) from None
        active = {v.rule for v in self.alarms.active()}
        diff = self.alarms.replace_rules(rules)
        self.cfg = self.cfg.model_copy(update={"alarms": new.alarms, "tokens": new.tokens})
        if self.http_app is not None:
            self.http_app.state.config = self.cfg
            # token changes hold at once: the gate reads the new config on every request,
            # and live WebSocket sessions whose token went away or was demoted are closed
            revoked = revoke_sessions(self.http_app.state, self.cfg)
            if revoked:
                log.info("reload: closed %d stream sessions (token withdrawn or demoted)",
                         revoked)
        try:
            await asyncio.wrap_future(self.store.put_events([], alarm_state=self.alarms.snapshot()))
        except Exception as err:  # the store failing must not undo the reload
            self.store_errors += 1
            log.error("could not store the alarm state after a reload: %s", err)
        if gc.get_freeze_count():
            # The config and rules just replaced were frozen with the start-up heap: a frozen
            # object in a reference cycle is never collected, so thaw, collect (one full
            # collection, ~0.1 s, on a rare admin action) and freeze again.
            gc.unfreeze()
            _freeze_start_up_heap()
        dropped = sorted(active & set(diff["removed"]))
        log.info(
            "config reloaded from %s: alarm rules +%d ~%d -%d (%d kept), %d token(s)%s",
            self.config_path, len(diff["added"]), len(diff["changed"]), len(diff["removed"]),
            len(diff["kept"]), len(new.tokens),
            f"; active alarms dropped with their rules: {', '.join(dropped)}" if dropped else "",
        )
        return {
            "config": str(self.config_path),
            "alarm_rules": {k: diff[k] for k in ("added", "changed", "removed")},
            "alarm_rules_kept": len(diff["kept"]),
            "active_alarms_dropped": dropped,
            "tokens": len(new.tokens),
        }

    async def reload_logged(self) -> None:
        """SIGHUP: reload, and log (rather than raise) why it was refused."""
        try:
            await self.reload()
        except ReloadRefused as e:
            log.error("config reload refused: %s%s", e.reason,
                      "".join(f"\n  {p}" for p in e.problems))

    # -- per block ---------------------------------------------------------------------
    async def on_frames(
        self, p: SourcePipeline, frames: list[SpectralFrame], latency_s: float
    ) -> None:
        self._store_evidence(p)
        now = time.monotonic()
        for f in frames:
            p.channels[f.channel].last_frame_mono = now
        # every block: a fault seen by the worker is a state (and an event) at once
        await self._refresh_quality(p.channels.values())
        if not frames:
            return
        self.hub.publish(frames, latency_s)
        if self.history is not None:
            closed = self.history.add(frames)
            if closed:
                self.store.put_history(closed)
        events: list[tuple[AlarmEvent, SpectralFrame | None]] = []
        for f in frames:
            values = {"overall": f.overall}
            values.update({f"band:{b.name}": b.value for b in f.bands})
            values.update({f"tone:{t.name}": t.value for t in f.tones})
            if not f.primary:
                values = {trend_key(f.profile, k): v for k, v in values.items()}
            self.store.record_many(f.channel, f.t_ns, values)
            st = self.hub.channels[f.channel]
            for e in self.alarms.evaluate(f, st.status, fault=st.fault):
                events.append((e, f))
        if events:
            await self._commit_and_announce(p, events)

    async def _commit_and_announce(
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
            asyncio.run_coroutine_threadsafe(self._commit_and_announce(None, [(ev, None)]), loop)

    def _store_evidence(self, p: SourcePipeline, *, final: bool = False) -> None:
        for ev in p.take_evidence(final=final):
            self.store.put_evidence(ev.event_id, ev.spectrum, ev.waveform, ev.fs, ev.t0_ns)

    async def acknowledge(self, rule: str, who: str, note: str) -> dict[str, object]:
        """Acknowledge ``rule``: the ack event and the alarm state after it are committed
        first, and only then applied in memory and announced. A store that fails raises
        :class:`StoreError` and leaves the alarm as it was (the API answers 503), so a retry
        is not refused as "already acknowledged" and a restart loses nothing announced."""
        t_ns = time.time_ns()
        trial = copy.deepcopy(self.alarms)  # the ack on a copy: its event and state after
        ev = trial.ack(rule, who, note, t_ns=t_ns)  # raises UnknownAlarm / AckRefused
        try:
            stored = await asyncio.wrap_future(
                self.store.put_events([ev], alarm_state=trial.snapshot())
            )
        except Exception as err:
            self.store_errors += 1
            log.error("acknowledgement of %s by %s not stored, not applied: %s", rule, who, err)
            raise StoreError(f"the store cannot write ({err}); nothing was acknowledged") from err
        try:
            self.alarms.ack(rule, who, note, t_ns=t_ns)
        except (AckRefused, UnknownAlarm) as err:  # changed while committing (rare): logged
            log.warning("acknowledgement of %s stored but no longer applies: %s", rule, err)
        d = stored[0].as_dict()
        log.info("alarm %s acknowledged by %s", rule, who)
        self.hub.publish_event(d)
        return d

    async def act(
        self, action: Callable[[AlarmEngine], list[AlarmEvent]], what: str
    ) -> list[dict[str, Any]]:
        """An operator action on the alarms (acknowledge-all, shelve, unshelve): committed,
        then applied and announced (service.operator.commit_action)."""
        return await commit_action(self, action, what)


DEMO_OPERATOR_TOKEN = "quaver-demo-operator"  # matches the hash in examples/demo.toml


def demo_config(
    *,
    listen: str | None = None,
    data_dir: str | None = None,
    speed: float | None = None,
    fault_start_s: float | None = None,
    fault_ramp_s: float | None = None,
    feed_listen: str | None = None,
) -> Config:
    """The built-in demo: the invented pumping station from ``service/examples/demo.toml``.

    ``speed`` paces the simulation (×real time); ``fault_start_s``/``fault_ramp_s`` move
    and stretch the scripted bearing fault (plant seconds). ``feed_listen`` (HOST:PORT)
    adds the framed TCP input of ``examples/demo-feed.toml`` there, for ``quaver feed``
    (``quaver demo``: 127.0.0.1:8751 unless told otherwise; without it only HTTP is bound)."""
    examples = resources.files("service").joinpath("examples")
    data = tomllib.loads(examples.joinpath("demo.toml").read_text(encoding="utf-8"))
    if feed_listen is not None:
        feed = tomllib.loads(examples.joinpath("demo-feed.toml").read_text(encoding="utf-8"))
        for s in feed["sources"]:
            s["listen"] = feed_listen
        for table in ("sources", "channels"):
            data[table] = [*data.get(table, []), *feed[table]]
    if listen is not None:
        data.setdefault("service", {})["listen"] = listen
    if data_dir is not None:
        data.setdefault("service", {})["data_dir"] = data_dir
    for s in data.get("sources", []):
        if s.get("kind") == "simulated":
            for key, value in (
                ("speed", speed),
                ("fault_start_s", fault_start_s),
                ("fault_ramp_s", fault_ramp_s),
            ):
                if value is not None:
                    s[key] = value
    return parse_config(data, source="built-in demo")


async def serve(
    cfg: Config,
    *,
    announce: Callable[[str], None] = print,
    started: asyncio.Event | None = None,
    config_path: str | Path | None = None,
    freeze_heap: bool = False,
) -> None:
    """Run the HTTP server and the pipelines until cancelled or signalled (SIGHUP: reload
    the config file's alarms and tokens).

    ``freeze_heap`` (the service process, not tests that run several services in one): once
    serving, move every object made so far to the collector's permanent generation
    (``gc.freeze``), see :func:`_freeze_start_up_heap`."""
    host, port = parse_listen(cfg.service.listen)
    service = Service(cfg, config_path)
    svc = cfg.service
    config = uvicorn.Config(
        service.app(), host=host, port=port, log_level="warning", access_log=False,
        lifespan="on",
        # float32 spectra barely compress, and deflating them for each client was the
        # stream's largest cost (quaver bench --service: ~820 vs ~420 messages/s)
        ws_per_message_deflate=False,
        # The edge (docs/api.md "HTTP edge"): h11 with a request-head time-out (uvicorn has none),
        # at most max_connections at once (503 beyond), idle keep-alive closed, a request
        # head at most 16 KiB (h11_max_incomplete_event_size: uvicorn's default, stated),
        # WebSocket messages at most 64 KiB before the stream's own 4 KiB check.
        http=head_timeout_protocol(svc.header_timeout_s),
        limit_concurrency=svc.max_connections,
        timeout_keep_alive=svc.keep_alive_s,  # type: ignore[arg-type]
        h11_max_incomplete_event_size=16 * 1024,
        ws_max_size=64 * 1024,
        ssl_certfile=svc.tls_cert,
        ssl_keyfile=svc.tls_key,
    )
    server = uvicorn.Server(config)
    # SIGINT/SIGTERM ask for a graceful stop (the lifespan stops the pipelines and closes
    # the store) and the process then exits 0. uvicorn's own handling would re-raise the
    # signal after shutting down, which a service manager reads as a crash.
    server.capture_signals = contextlib.nullcontext  # type: ignore[method-assign,assignment]
    loop = asyncio.get_running_loop()
    reloads: set[asyncio.Task[None]] = set()

    def on_hup() -> None:
        task = asyncio.create_task(service.reload_logged())
        reloads.add(task)
        task.add_done_callback(reloads.discard)

    for sig, handler in (
        (signal.SIGINT, lambda: setattr(server, "should_exit", True)),
        (signal.SIGTERM, lambda: setattr(server, "should_exit", True)),
        (signal.SIGHUP, on_hup),
    ):
        try:
            loop.add_signal_handler(sig, handler)
        except (NotImplementedError, RuntimeError):  # not the main thread (tests)
            pass
    task = asyncio.create_task(server.serve())
    while not server.started and not task.done():
        await asyncio.sleep(0.02)
    if server.started:
        announce(
            f"quaver: {len(service.hub.channels)} channels; open "
            f"{'https' if svc.tls_cert else 'http'}://{host}:{port}/ "
            f"(API under /api/v1, docs at /docs); Ctrl-C stops"
        )
        if freeze_heap:
            _freeze_start_up_heap()
        if started is not None:
            started.set()
    await task


def _freeze_start_up_heap() -> None:
    """Keep the start-up heap out of Python's full collections.

    Imports, the app and the pipelines leave ~130 000 long-lived objects (functions, types,
    dicts). Each full (generation 2) collection walked them all: 80–120 ms with the whole
    service stopped, every 1–3 s at 64 channels (analysis frames make many short-lived
    objects), and that pause was the latency tail (quaver bench --service, 64 channels:
    p99 107–161 ms; with the heap frozen 47 ms). Garbage is collected first, so none of it
    is kept for good; objects made later are collected as usual."""
    gc.collect()
    gc.freeze()
    log.info("start-up heap frozen: %d objects left out of full collections",
             gc.get_freeze_count())


def run_service(
    cfg: Config,
    *,
    announce: Callable[[str], None] = print,
    config_path: str | Path | None = None,
) -> int:
    """Blocking entry point for ``quaver serve`` and ``quaver demo``; returns an exit code.
    ``config_path`` is the file ``cfg`` came from (what a reload re-reads)."""
    logging.basicConfig(
        level=logging.INFO, format="%(asctime)s %(levelname)s %(name)s: %(message)s"
    )
    # One BLAS thread: each source's worker thread already runs its own numpy work, and a
    # BLAS pool per call (the tracked tones' matrix product) spent more time handing work
    # between threads than computing — a 16-channel block took 123 ms instead of 10.6 ms
    # (quaver bench --service, 2 cores). threadpoolctl sets it for this process only.
    threadpool_limits(limits=1, user_api="blas")
    try:
        asyncio.run(serve(cfg, announce=announce, config_path=config_path, freeze_heap=True))
    except KeyboardInterrupt:
        pass
    except OSError as e:  # e.g. the port is taken
        log.error("cannot serve on %s: %s", cfg.service.listen, e)
        return 1
    return 0

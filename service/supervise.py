"""Keep every source watched: run each pipeline again after it fails (with a back-off), and
derive every channel's data-quality state a few times a second, as events.

Works on the running :class:`~service.app.Service` (hub, alarms, pipelines); knows nothing
about HTTP, the config file or the store's tables."""

from __future__ import annotations

import asyncio
import logging
import time
from collections.abc import Iterable
from typing import TYPE_CHECKING

from .alarms import AlarmEvent
from .operator import expire_shelves
from .pipeline import ChannelState, SourcePipeline
from .quality import Inputs, derive, is_lost
from .types import SpectralFrame

if TYPE_CHECKING:
    from .app import Service

log = logging.getLogger("quaver")
WATCH_PERIOD_S = 0.25  # how often every channel's state is derived again (our choice)
RESTART_FIRST_S = 1.0  # back-off before a failed pipeline runs again, doubled each time …
RESTART_MAX_S = 30.0  # … up to this (our choice)
RESTART_STABLE_S = 60.0  # a pipeline that ran this long before failing starts over at 1 s


async def run_supervised(svc: Service, p: SourcePipeline) -> None:
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
        await refresh_quality(svc, p.channels.values())
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


async def watch(svc: Service) -> None:
    """Derive every channel's state a few times a second, so that a producer that goes
    silent is seen within its channel's ``stale_after_s`` (plus this period)."""
    while True:
        await asyncio.sleep(WATCH_PERIOD_S)
        try:
            await refresh_quality(svc, svc.hub.channels.values())
            await expire_shelves(svc, time.time_ns())
        except Exception:  # the watch must outlive any one bad pass
            log.exception("channel state watch failed")


async def refresh_quality(
    svc: Service, channels: Iterable[ChannelState], frames: dict[str, SpectralFrame] | None = None
) -> None:
    """Derive the state of ``channels`` (service.quality) and, for each that changed,
    make a ``status`` event and tell the alarm engine (loss-of-signal transitions);
    commit the events, then announce them."""
    now, now_ns = time.monotonic(), time.time_ns()
    events: list[tuple[AlarmEvent, SpectralFrame | None]] = []
    connected: dict[str, object] = {}
    for st in channels:
        p = svc.by_source[st.source_id]
        if (st.status == "ok" and st.data_status == "ok" and not p.failed
                and st.last_frame_mono is not None
                and now - st.last_frame_mono <= st.stale_after_s):
            continue  # the common case, kept cheap: it runs for every block
        started = max(svc.started_mono, p.started_mono)
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
                for e in svc.alarms.set_channel_status(st.id, status, now_ns,
                                                        fault=cause, lost=lost):
                    events.append((e, None))
            continue
        # The first spectrum after the start, in time, is not news: no event for it
        # (a plant of 1000 channels would log 1000 of them at every start).
        first_in_time = st.status_changes == 0 and before == "no-signal" and not st.lost
        st.lost = lost
        st.status_since_ns, st.status_changes = now_ns, st.status_changes + 1
        svc.status_changes[status] = svc.status_changes.get(status, 0) + 1
        msg = f"{st.id}: {status}, " + (cause if cause else f"was {before}")
        (log.info if status == "ok" else log.warning)("channel %s", msg)
        if not first_in_time:
            events.append((AlarmEvent(
                t_ns=now_ns, channel=st.id, rule=f"{st.id}.status", kind="status",
                from_state=before, to_state=status, value=None, level=None, unit="",
                message=msg,
            ), None))
        for e in svc.alarms.set_channel_status(st.id, status, now_ns, fault=cause,
                                                lost=lost):
            events.append((e, None))
    if events:
        await svc.commit_and_announce(None, events)

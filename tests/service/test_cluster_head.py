"""The service process's side of cluster mode without Ray: a Service with
``[cluster] engine = "ray"`` whose actors are SourceGroups in this process (the same class
Ray runs), so the head's logic — pulls, frames to the hub, channel states, counters, a lost
actor shown as ``failed`` and the restarted one taken up — runs in every test run."""

from __future__ import annotations

import asyncio
import time
from collections.abc import Awaitable, Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from clusterkit import (
    capture_frames,
    frame_differences,
    local_frames,
    recording,
    replay_doc,
)

from service.app import Service
from service.cluster import head
from service.cluster.actor import SourceGroup
from service.config import Config, parse_config
from service.history import alarm_row
from service.speed import NotEnoughRevolutions
from service.speedwrite import write_speed
from service.store import HistoryRow
from service.types import SpectralFrame


class _Method:
    def __init__(self, fn: Callable[..., Any], owner: InProcessActor) -> None:
        self.fn, self.owner = fn, owner

    def remote(self, *args: Any) -> Awaitable[Any]:
        """Submitted at once, as Ray does (a call nobody awaits still runs)."""
        async def call() -> Any:
            if self.owner.lost:  # as Ray raises for a call to an actor whose process died
                raise RuntimeError("the actor died unexpectedly (test)")
            got = self.fn(*args)
            return await got if asyncio.iscoroutine(got) else got

        task = asyncio.ensure_future(call())
        task.add_done_callback(lambda t: t.cancelled() or t.exception())  # retrieved
        return task


class InProcessActor:
    """A SourceGroup called the way head.py calls a Ray actor (``actor.method.remote()``)."""

    def __init__(self, cfg: Config, ids: list[str]) -> None:
        self.group = SourceGroup(cfg, ids)
        self.lost = False

    def __getattr__(self, name: str) -> _Method:
        return _Method(getattr(self.group, name), self)


@pytest.fixture
def in_process(monkeypatch: pytest.MonkeyPatch) -> None:
    async def ensure(self: head.Cluster) -> None:
        if not self.actors:
            for _, ids in self.groups:
                a = InProcessActor(self.cfg, ids)
                self.actors.append(a)
                self.by_source.update({sid: a for sid in ids})

    async def close(self: head.Cluster) -> None:
        for a in {id(a): a for a in [*self.actors, *self.by_source.values()]}.values():
            await a.group.stop()  # each once: the first actors and any that replaced them
        self.actors.clear()

    def call(self: head.RemotePipeline, method: str, timeout_s: float, *args: Any) -> Any:
        # the blocking calls (waveform, envelope, evidence at shut-down) straight to the group
        return getattr(self.source.actor.group, method)(self.source.id, *args)

    monkeypatch.setattr(head.RemotePipeline, "_call", call)
    monkeypatch.setattr(head.Cluster, "_new_actor",
                        lambda self, node, ids: InProcessActor(self.cfg, ids))
    monkeypatch.setattr(head.Cluster, "ensure", ensure)
    monkeypatch.setattr(head.Cluster, "close", close)


async def until(cond: Callable[[], bool], timeout_s: float, what: str) -> None:
    t0 = time.monotonic()
    while not cond():
        if time.monotonic() - t0 > timeout_s:
            raise AssertionError(f"not within {timeout_s} s: {what}")
        await asyncio.sleep(0.05)


def run(coro: Awaitable[None], timeout_s: float = 60.0) -> None:
    async def bounded() -> None:
        async with asyncio.timeout(timeout_s):
            await coro

    asyncio.run(bounded())


def test_the_head_publishes_the_actors_frames_as_the_local_pipeline_does(
        in_process: None, tmp_path: Path) -> None:
    doc = replay_doc(recording(tmp_path / "rec.wav"))
    local = local_frames(doc)
    cfg = parse_config({**doc, "service": {"data_dir": str(tmp_path / "data")},
                        "cluster": {"engine": "ray"}}, source="test")
    got: list[SpectralFrame] = []

    async def go() -> None:
        svc = Service(cfg)
        capture_frames(svc, got)
        await svc.start()
        try:
            await until(lambda: len(got) >= len(local), 30, "every frame")
            st = svc.hub.channels["m1-de-h"]
            # the worker-side state and the source's counters came with the pushes
            assert st.samples == 12 * 2560 and st.fs == 2560.0
            assert st.frames == sum(1 for f in local if f.channel == "m1-de-h" and f.primary)
            assert set(st.profile_info) == {"wide", "narrow"}
            assert svc.hub.sources["rec"].counters.samples == 12 * 2560
            assert svc.hub.sources["rec"].status()["engine"] == "ray"
            assert st.status == "ok"
            assert svc.hub.latest["m1-de-h"].profile == "wide"
        finally:
            await svc.stop()

    run(go())
    assert len(got) == len(local)
    for a, b in zip(local, got, strict=True):
        assert frame_differences(a, b, skip=("t_ns",)) == [], (a.channel, a.profile, a.seq)


def test_an_alarms_stored_spectrum_is_its_own_moments_though_pushes_came_without(
        in_process: None, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    doc = replay_doc(recording(tmp_path / "rec.wav"), replay_speed=4.0)
    # raised 3 s of signal after the first frame (common practice: an on-delay counts on
    # the frames' own clock), when the pushes have long stopped bringing their spectra
    doc["alarms"] = [{"channel": "m1-de-h", "overall": True, "alert": 1e-9,
                      "danger": 1e9, "on_delay_s": 3.0}]
    local = [f for f in local_frames(doc) if f.channel == "m1-de-h" and f.profile == "wide"]
    cfg = parse_config({**doc, "service": {"data_dir": str(tmp_path / "data")},
                        "cluster": {"engine": "ray"}}, source="test")
    monkeypatch.setattr(head, "SPECTRA_EVERY_S", 60.0)  # only each group's first push
    rows: list[HistoryRow] = []
    asked: list[int] = []
    spectra = SourceGroup.spectra

    def counted(self: SourceGroup, source_id: str, wanted: list[Any]) -> Any:
        asked.append(len(wanted))
        return spectra(self, source_id, wanted)

    monkeypatch.setattr(SourceGroup, "spectra", counted)

    async def go() -> None:
        svc = Service(cfg)
        put = svc.store.put_history

        def keep(r: Any) -> Any:
            rows.extend(r)
            return put(r)

        svc.store.put_history = keep  # type: ignore[method-assign]
        await svc.start()
        try:
            await until(lambda: any(r.reason == "alarm" for r in rows), 30, "alarm spectrum")
            assert svc.hub.channels["m1-de-h"].status == "ok"
            await until(lambda: svc.hub.channels["m1-de-h"].frames == len(local), 30,
                        "the whole recording analysed")
        finally:
            await svc.stop()

    run(go())
    alarm = [r for r in rows if r.reason == "alarm"]
    assert len(alarm) == 1 and asked == [1]
    # the stored spectrum is one of the one-process frames' (bit for bit), not the first
    # one the head was sent
    match = [k for k, f in enumerate(local)
             if np.array_equal(alarm_row(f, None).power, alarm[0].power)]
    assert len(match) == 1 and match[0] >= 12, match  # 3 s at a 0.2 s hop: frame 15
    # and the interval means came from the actor at shut-down, every frame of the channel
    means = [r for r in rows if r.reason == "interval" and r.channel == "m1-de-h"
             and r.profile == "wide"]
    assert sum(r.frames for r in means) == len(local)


def test_a_lost_actor_shows_failed_with_its_reason_and_its_restart_is_taken_up(
        in_process: None, tmp_path: Path) -> None:
    ids = ["p1-de-h", "p2-de-h"]  # two of the demo plant's channels
    cfg = parse_config({
        "service": {"data_dir": str(tmp_path / "data"), "evidence_before_s": 0.5,
                    "evidence_after_s": 0.5},
        "analysis": {"fmax_hz": 4000.0, "lines": 400, "overlap": 0.5},
        "cluster": {"engine": "ray", "workers": 1},
        "sources": [{"id": "sim", "kind": "simulated", "scenario": "demo",
                     "sample_rate_hz": 10240.0, "channels": ids, "speed": 4.0}],
        # raised at the first frame (the plant's overall is far above it): its evidence,
        # the waveform around it, is captured on the actor and stored by the service
        "alarms": [{"channel": "p2-de-h", "overall": True, "alert": 1e-6, "danger": 1e9}],
    }, source="test")

    async def go() -> None:
        svc = Service(cfg)
        await svc.start()
        try:
            ch = svc.hub.channels
            await until(lambda: ch["p1-de-h"].status == "ok", 30, "first frames")
            def raised() -> list[dict[str, Any]]:
                return [e for e in svc.store.events(limit=100)
                        if e["channel"] == "p2-de-h" and e["kind"] != "status"]

            await until(lambda: bool(raised()), 30, "the alarm raised")
            first_id = int(raised()[-1]["id"])

            def stored() -> dict[str, Any] | None:
                return svc.store.get_evidence(first_id)

            await until(lambda: stored() is not None, 30, "evidence stored")
            ev = stored()
            assert ev is not None and ev["fs"] == 10240.0
            # 0.5 s before and 0.5 s after the event's frame, at most (the stream's start
            # may cut the part before)
            assert 0.5 * 10240 <= ev["waveform"].size <= 1.0 * 10240
            # a speed written at the service reaches the actor's worker: its frames carry it
            write_speed(cfg, ch, "p1-de-h", 2970.0, "tester", manual_only=False)
            await until(lambda: svc.hub.latest["p1-de-h"].speed_source == "manual", 30,
                        "frames at the written speed")
            assert svc.hub.latest["p1-de-h"].speed_rpm == 2970.0
            assert ch["p1-de-h"].speed_dict() == {  # the state the actor sent back
                "rpm": 2970.0, "source": "manual", "status": "ok", "variation": 0.0,
                "varied": False, "written_by": "tester"}
            assert svc.cluster is not None
            old = svc.cluster.by_source["sim"]
            first = svc.by_source["sim"].incarnation  # type: ignore[attr-defined]
            old.lost = True  # its process dies: every call to it raises from now on
            await until(lambda: ch["p1-de-h"].status == "failed", 30, "failed shown")

            def failed() -> list[dict[str, Any]]:
                return [e for e in svc.store.events(limit=100)
                        if e["kind"] == "status" and e["to_state"] == "failed"]

            # the state is set first, then its events are committed (then announced)
            await until(lambda: {e["channel"] for e in failed()} == set(ids), 30,
                        "both channels' failed events committed")
            assert all("pipeline failed: RuntimeError: the actor died unexpectedly"
                       in str(e["message"]) for e in failed())
            # Ray restarts it: a new run of the actor (its __init__ again) takes the calls
            await old.group.stop()
            svc.cluster.by_source["sim"] = InProcessActor(cfg, ["sim"])
            await until(lambda: ch["p1-de-h"].status == "ok", 30, "ok again")
            assert svc.by_source["sim"].incarnation != first  # type: ignore[attr-defined]
            assert svc.by_source["sim"].failures == 1
            def back() -> list[object]:
                return [e["to_state"] for e in svc.store.events(limit=100)
                        if e["kind"] == "status" and e["channel"] == "p1-de-h"]

            # newest first: ok (committed just after the state is set), after the failure
            await until(lambda: back()[:1] == ["ok"], 30, "the ok event committed")
            assert "failed" in back()
        finally:
            await svc.stop()

    run(go())


def test_an_actor_ray_gave_up_is_replaced_and_its_source_comes_back(
        in_process: None, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    cfg = parse_config({
        "service": {"data_dir": str(tmp_path / "data")},
        "analysis": {"fmax_hz": 4000.0, "lines": 400, "overlap": 0.5},
        "cluster": {"engine": "ray", "workers": 1, "max_restarts": 0},
        "sources": [{"id": "sim", "kind": "simulated", "scenario": "demo",
                     "sample_rate_hz": 10240.0, "channels": ["p1-de-h"], "speed": 4.0}],
    }, source="test")
    # Ray's state of a lost actor with no restarts left
    monkeypatch.setattr(head, "_actor_state", lambda a: "DEAD" if a.lost else "ALIVE")

    async def go() -> None:
        svc = Service(cfg)
        await svc.start()
        try:
            st = svc.hub.channels["p1-de-h"]
            await until(lambda: st.status == "ok", 30, "first frames")
            assert svc.cluster is not None
            old = svc.cluster.by_source["sim"]
            first = svc.by_source["sim"].incarnation  # type: ignore[attr-defined]
            old.lost = True
            await until(lambda: st.status == "failed", 30, "failed shown")
            await old.group.stop()
            # no one replaces it by hand: the head starts a new actor after its back-off
            await until(lambda: st.status == "ok", 30, "ok again on a new actor")
            assert svc.cluster.replaced == 1
            assert svc.cluster.by_source["sim"] is not old
            assert svc.cluster.actors == [svc.cluster.by_source["sim"]]
            assert svc.by_source["sim"].incarnation != first  # type: ignore[attr-defined]
            failed = [e for e in svc.store.events(limit=100)
                      if e["kind"] == "status" and e["to_state"] == "failed"]
            assert failed and all("Ray gave it up (its 0 restarts used): a new actor takes "
                                  "its sources" in str(e["message"]) for e in failed)
        finally:
            await svc.stop()

    run(go())


def test_run_up_data_and_order_spectra_of_a_tacho_fed_channel_come_from_its_actor(
        in_process: None, tmp_path: Path) -> None:
    from service.demo import demo_config

    cfg = demo_config(data_dir=str(tmp_path / "data"), speed=4.0)
    cfg.cluster.engine = "ray"  # the variable-speed fan v1 with its tacho, on an actor

    async def go() -> None:
        svc = Service(cfg)
        await svc.start()
        try:
            st = svc.hub.channels["v1-fan-h"]
            await until(lambda: isinstance(st.runup, head.RemoteRunup), 30, "a capture")
            assert st.runup is not None
            actor = svc.cluster.by_source["switch-room"]  # type: ignore[union-attr]
            cap = actor.group.runs["switch-room"].pipeline.channels["v1-fan-h"].runup
            # the demo's runup_orders and runup_rpm_step (service/examples/demo.toml)
            assert st.runup.orders == cap.orders == (1.0, 2.0, 7.0)
            assert st.runup.rpm_step == 25.0
            await until(lambda: bool(st.runup.as_list()), 30, "run-up rows")  # type: ignore[union-attr]
            rows = st.runup.as_list()
            assert rows and rows[0].keys() == cap.as_list()[0].keys()
            await until(lambda: st.status == "ok", 30, "frames")
            for _ in range(100):  # bounded: until the ring holds one frame's revolutions
                try:
                    res = st.runup.order_spectrum(10.0, 100)
                    break
                except NotEnoughRevolutions:
                    await asyncio.sleep(0.2)
            else:
                raise AssertionError("no order spectrum within 20 s")
            assert res.frames >= 1 and 900.0 <= res.rpm_mean <= 1500.0  # the fan's range
        finally:
            await svc.stop()

    run(go())
